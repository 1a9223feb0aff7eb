"""Fleet sweeps on a real Dask cluster started here (no mocks of the engine).

The cluster: a scheduler and two Nanny-managed worker processes with host labels
"a" and "b" (dask's SpecCluster, the base of its LocalCluster), plus, for the
lost-host test, a worker started with dask's own `dask worker` command line.
Points use the measure package's synthetic backend (a known sleep; no model).
What is checked against the outside: the plan each host ran equals the plan a
local sweep expands, point for point; Dask's worker resources keep one point at
a time per host; a killed worker is survived.
"""
import json
import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time

import pytest

from speedbench.errors import UserError
from speedbench.sweep import expand_plan, load_meta, load_profile, load_run
from speedbench.schema import CONFIG_COLUMNS

import psutil
from helpers import stored_points, write_synthetic_profile

def write_profile(tmp_path, sizes=(64, 96), proposals=(10, 20), **kwargs):
    return write_synthetic_profile(tmp_path / "fleet.toml", name="fleet-syn", cache=tmp_path / "cache", sizes=sizes,
                                   proposals=proposals, synthetic={"work_ms": 60.0}, **kwargs)


@pytest.fixture(scope="module")
def cluster():
    # The engine is an optional extra (pip install 'speedbench[fleet]'): without it the
    # cluster tests cannot run; the label checks and the no-engine test below still do.
    pytest.importorskip("distributed", reason="fleet cluster tests need dask[distributed]")
    import dask
    from distributed import Client, Nanny, Scheduler, SpecCluster

    def worker(label, env):
        return {"cls": Nanny, "options": {"nthreads": 1, "resources": {f"host:{label}": 1},
                                          "memory_limit": 0, "env": env}}

    # b gets a thread variable a does not have: the fingerprint in each host's
    # meta.json shows it was taken on that host's worker, not on the client.
    spec = {"a": worker("a", {}), "b": worker("b", {"OMP_WAIT_POLICY": "PASSIVE"})}
    # SpecCluster closes a worker's Nanny when, lost-worker-timeout (15 s by default) after a
    # worker death, no worker of that name is registered (distributed/deploy/spec.py,
    # _update_worker_status). These tests kill b twice; a second kill about 15 s after the first
    # caught b mid-restart, and SpecCluster then closed b for good. Real hosts run `dask worker`
    # under their own Nanny, with no SpecCluster behind it, so the tests switch that policy off.
    scheduler = {"cls": Scheduler, "options": {"dashboard_address": None}}
    with dask.config.set({"distributed.deploy.lost-worker-timeout": "1h"}), \
            SpecCluster(workers=spec, scheduler=scheduler, silence_logs=50) as cl, \
            Client(cl, set_as_default=False) as client:
        client.wait_for_workers(2, timeout=60)
        yield cl, client


def _worker_pid(client, label):
    from speedbench.fleet.engine import workers_by_label

    addr = workers_by_label(client)[label][0]["address"]
    return client.run(os.getpid, workers=[addr])[addr]


def _measuring_child(pid):
    """The point's measurement subprocess under a worker process, or None."""
    try:
        for child in psutil.Process(pid).children(recursive=True):
            if "speedbench.measure.worker" in " ".join(child.cmdline()):
                return child
    except psutil.Error:
        return None
    return None


def _kill_mid_point(client, label, run_dir, pid=None, deadline_s=240, min_stored=1, sweep=None):
    """Wait until `label` stored min_stored point(s) and is measuring the next, then SIGKILL its worker.

    sweep: (thread, errors) of the fleet sweep under test; if it ends first, its error (or the
    fact that it finished with no point left to interrupt) is the failure, not a timeout.
    Returns (killed pid, point id of the point in flight, points stored before the kill)."""
    pid = pid or _worker_pid(client, label)
    deadline = time.monotonic() + deadline_s
    while True:
        if sweep is not None and not sweep[0].is_alive():
            stored = stored_points(run_dir / "points.sqlite")
            assert False, f"the fleet sweep ended before host {label} could be interrupted " \
                          f"({stored} point(s) stored): {sweep[1] or 'no error'}"
        assert time.monotonic() < deadline, \
            f"host {label} made no progress ({stored_points(run_dir / 'points.sqlite')} point(s) stored)"
        stored = stored_points(run_dir / "points.sqlite")
        child = _measuring_child(pid) if stored >= min_stored else None
        if child is not None:
            try:
                spec = json.loads(open(child.cmdline()[-1]).read())
            except (OSError, ValueError, psutil.Error):
                time.sleep(0.02)
                continue
            os.kill(pid, signal.SIGKILL)
            return pid, _planned_id(run_dir, spec["point"]), stored
        time.sleep(0.02)


# Knobs every row carries as planned (the measure package blanks ORT-only knobs on other backends).
KEPT = ("model", "weights", "size", "proposals", "backend", "intra_threads", "affinity", "concurrency")


def _planned_id(run_dir, point: dict) -> str:
    """The plan's id of the point a measurement subprocess was given (matched on the kept knobs)."""
    plan = expand_plan(load_profile(run_dir.parent.parent / "fleet.toml"))
    (pid,) = [p.point_id for p in plan.points if all(p.config[c] == point[c] for c in KEPT)]
    return pid


def _assert_plan_equal(run_dir, profile_path, local=None):
    """The host ran exactly the plan a local sweep of the same profile expands, point for point.

    point_id is a digest of the planned configuration, so equal id sets mean equal
    configurations; `local` (a local sweep's points table) also compares every config column."""
    plan = expand_plan(load_profile(profile_path))
    df = load_run(run_dir).set_index("point_id")
    assert sorted(df.index) == sorted(p.point_id for p in plan.points)
    for p in plan.points:
        assert {c: df.loc[p.point_id, c] for c in KEPT} == {c: p.config[c] for c in KEPT}, p.point_id
        if local is not None:
            want = local.set_index("point_id")
            assert {c: df.loc[p.point_id, c] for c in CONFIG_COLUMNS} == \
                   {c: want.loc[p.point_id, c] for c in CONFIG_COLUMNS}, p.point_id
    return df


def test_fleet_runs_each_host_plan_and_survives_a_killed_worker(cluster, tmp_path):
    cl, client = cluster
    prof = write_profile(tmp_path)
    out = tmp_path / "fleet"
    from speedbench.fleet import run_fleet_sweep
    from speedbench.sweep import run_sweep

    local = load_run(run_sweep(prof, out_dir=tmp_path / "local", quiet=True, stream=open(os.devnull, "w")))
    result, errors = {}, []

    def go():
        try:
            result.update(run_fleet_sweep(prof, cl.scheduler_address, out_dir=out, quiet=True,
                                          stream=open(os.devnull, "w")))
        except BaseException as exc:  # surfaced by the assertion below
            errors.append(exc)

    thread = threading.Thread(target=go)
    thread.start()
    killed_pid, in_flight, _ = _kill_mid_point(client, "b", out / "b", sweep=(thread, errors))
    kill_time = time.time()
    thread.join(150)
    assert not thread.is_alive() and not errors, errors
    assert result == {"a": out / "a", "b": out / "b"}

    for label in ("a", "b"):
        df = _assert_plan_equal(out / label, prof, local)
        assert (df["status"] == "ok").all(), df["reason"].tolist()
        assert (df["host"] == label).all()
        # Dask resources: one point at a time per host, so a host's intervals never overlap.
        spans = sorted(zip(df["started_unix"], df["finished_unix"]))
        assert all(end <= nxt for (_, end), (nxt, _) in zip(spans, spans[1:])), spans
        meta = load_meta(out / label)
        assert meta["host"] == label and meta["finished"]
        assert meta["fleet"]["shares_machine_with"] == ["b" if label == "a" else "a"]
    # The point in flight when b's worker died was run again on the restarted worker.
    b = load_run(out / "b").set_index("point_id")
    assert b.loc[in_flight, "started_unix"] > kill_time - 1.0
    assert _worker_pid(client, "b") != killed_pid
    # Fingerprints were taken on the workers: only b's has the variable b was started with.
    assert load_meta(out / "b")["env"]["thread_env"].get("OMP_WAIT_POLICY") == "PASSIVE"
    assert "OMP_WAIT_POLICY" not in load_meta(out / "a")["env"]["thread_env"]


def _start_cli_worker(address, label):
    """A worker as it is started on a real host: dask's own command line, no nanny (nothing restarts it)."""
    cmd = [sys.executable, "-m", "distributed.cli.dask_worker", address, "--nthreads", "1",
           "--resources", f"host:{label}=1", "--no-nanny", "--memory-limit", "0", "--name", label]
    return subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)


def _wait_label(client, label, present=True, timeout=60):
    from speedbench.fleet.engine import workers_by_label

    deadline = time.monotonic() + timeout
    while (label in workers_by_label(client)) != present:
        assert time.monotonic() < deadline, f"worker {label} did not {'join' if present else 'leave'}"
        time.sleep(0.1)


def test_lost_host_records_its_point_in_flight_and_resume_completes_it(cluster, tmp_path):
    cl, client = cluster
    prof = write_profile(tmp_path, sizes=(64, 96, 128), proposals=(10,))
    out = tmp_path / "fleet"
    addr = cl.scheduler_address
    worker = _start_cli_worker(addr, "c")
    try:
        _wait_label(client, "c")
        cmd = [sys.executable, "-m", "speedbench.fleet", str(prof), "--cluster", addr, "-o", str(out),
               "--hosts", "a,c", "--lost-after", "3", "-q"]
        sweep = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        _, in_flight, stored = _kill_mid_point(client, "c", out / "c", pid=worker.pid)
        worker.wait(10)
        stdout, stderr = sweep.communicate(timeout=180)
        assert sweep.returncode == 0, stderr
        assert "host c: lost" in stderr
    finally:
        if worker.poll() is None:
            worker.kill()
            worker.wait()
    _wait_label(client, "c", present=False)

    # The other host finished everything; c kept what it measured, its point in
    # flight is a failed row saying why, the rest is left for --resume.
    a = _assert_plan_equal(out / "a", prof)
    assert (a["status"] == "ok").all()
    c = load_run(out / "c").set_index("point_id")
    assert c.loc[in_flight, "status"] == "failed"
    assert "host c lost during the point" in c.loc[in_flight, "reason"]
    assert (c.drop(index=in_flight)["status"] == "ok").all()
    assert len(c) == stored + 1
    assert load_meta(out / "c")["finished"] is None

    # Without --resume the existing run directories are refused, nothing is touched.
    seq_a = sqlite3.connect(out / "a" / "points.sqlite").execute("SELECT point_id, seq FROM points").fetchall()
    from speedbench.fleet import run_fleet_sweep

    with pytest.raises(UserError, match="already holds a run; resume it"):
        run_fleet_sweep(prof, addr, out_dir=out, hosts="a")

    worker = _start_cli_worker(addr, "c")
    try:
        _wait_label(client, "c")
        got = run_fleet_sweep(prof, addr, out_dir=out, hosts="a,c", resume=True, quiet=True,
                              stream=open(os.devnull, "w"))
        assert got == {"a": out / "a", "c": out / "c"}
        c = _assert_plan_equal(out / "c", prof)
        assert (c["status"] == "failed").sum() == 1 and c.loc[in_flight, "status"] == "failed"
        assert load_meta(out / "c")["finished"]
        # --retry-failed measures the point the lost host had in flight again.
        run_fleet_sweep(prof, addr, out_dir=out, hosts="c", resume=True, retry_failed=True, quiet=True,
                        stream=open(os.devnull, "w"))
    finally:
        worker.kill()
        worker.wait()
    c = _assert_plan_equal(out / "c", prof)
    assert (c["status"] == "ok").all()
    after_a = sqlite3.connect(out / "a" / "points.sqlite").execute("SELECT point_id, seq FROM points").fetchall()
    assert sorted(after_a) == sorted(seq_a)   # a had everything: nothing re-measured


def test_bad_input_is_a_one_line_error(cluster, tmp_path):
    cl, _ = cluster
    from speedbench.fleet import run_fleet_sweep

    prof = write_profile(tmp_path)
    with pytest.raises(UserError, match=r"--hosts: no worker advertises host label 'zz' \(the cluster has: a, b\)"):
        run_fleet_sweep(prof, cl.scheduler_address, out_dir=tmp_path / "o", hosts="a,zz")
    with pytest.raises(UserError, match="--retry-failed: only together with --resume"):
        run_fleet_sweep(prof, cl.scheduler_address, out_dir=tmp_path / "o", retry_failed=True)
    with pytest.raises(UserError, match="--hosts: .* empty host label"):
        run_fleet_sweep(prof, cl.scheduler_address, out_dir=tmp_path / "o", hosts="a,,b")
    with pytest.raises(UserError, match=r"--cluster tcp://127.0.0.1:9: cannot reach the scheduler"):
        run_fleet_sweep(prof, "tcp://127.0.0.1:9", out_dir=tmp_path / "o", connect_timeout_s=1)
    bad = tmp_path / "bad.toml"
    bad.write_text(prof.read_text().replace('backends = ["synthetic"]', 'backends = ["gpu"]'))
    with pytest.raises(UserError, match=r"bad.toml: sweep.backends\[0\]"):
        run_fleet_sweep(bad, cl.scheduler_address, out_dir=tmp_path / "o")
    # A dataset the hosts do not have: every host is skipped with the reason, no run directory is made.
    nodata = tmp_path / "nodata.toml"
    nodata.write_text(prof.read_text().replace("scenes = {count = 1}", f'path = "{tmp_path}/missing.json"')
                      .replace('backends = ["synthetic"]', 'backends = ["ort"]')
                      .replace('id = "synthetic"', 'id = "ssdlite320_mobilenet_v3_large"'))
    with pytest.raises(UserError, match=r"no host could run .*host a: .*missing.json"):
        run_fleet_sweep(nodata, cl.scheduler_address, out_dir=tmp_path / "o", stream=open(os.devnull, "w"))
    assert not (tmp_path / "o").exists()   # no error left a directory behind


def test_a_point_that_keeps_killing_its_worker_is_recorded_failed(cluster, tmp_path):
    """Past the scheduler's allowed-failures the point in flight is a failed row; the points
    queued behind it (caught in the same worker death, never started) are sent again."""
    cl, client = cluster

    def set_allowed(dask_scheduler, n):
        old, dask_scheduler.allowed_failures = dask_scheduler.allowed_failures, n
        return old

    prof = write_profile(tmp_path, sizes=(64,), proposals=(10, 20, 30))
    out = tmp_path / "fleet"
    from speedbench.fleet import run_fleet_sweep

    old = client.run_on_scheduler(set_allowed, n=0)   # the first worker death is already one too many
    errors = []
    try:
        thread = threading.Thread(target=lambda: _catch(errors, run_fleet_sweep, prof, cl.scheduler_address,
                                                        out_dir=out, hosts="b", quiet=True,
                                                        stream=open(os.devnull, "w")))
        thread.start()
        _, in_flight, _ = _kill_mid_point(client, "b", out / "b", min_stored=0, sweep=(thread, errors))
        thread.join(150)
    finally:
        client.run_on_scheduler(set_allowed, n=old)
    assert not thread.is_alive() and not errors, errors
    df = _assert_plan_equal(out / "b", prof)
    assert df.loc[in_flight, "status"] == "failed"
    assert "host b lost during the point (its worker died while running it" in df.loc[in_flight, "reason"]
    assert (df.drop(index=in_flight)["status"] == "ok").all()


def _catch(errors, fn, *args, **kwargs):
    try:
        fn(*args, **kwargs)
    except BaseException as exc:  # surfaced by the test's assertion
        errors.append(exc)


def test_labels_that_would_mix_or_disturb_measurements_are_refused():
    from speedbench.fleet.engine import check_labels, shared_machines

    one = {"address": "tcp://10.0.0.1:1", "ip": "10.0.0.1", "name": "x", "nthreads": 1}
    two = {"address": "tcp://10.0.0.2:1", "ip": "10.0.0.2", "name": "y", "nthreads": 1}
    with pytest.raises(UserError, match="2 workers advertise host label 'a'.*exactly one worker per host label"):
        check_labels({"a": [one, two]}, "tcp://s:8786")
    with pytest.raises(UserError, match="host label '../x'"):
        check_labels({"../x": [one]}, "tcp://s:8786")
    with pytest.raises(UserError, match="no worker advertises a host label"):
        check_labels({}, "tcp://s:8786")
    assert check_labels({"b": [two], "a": [one]}, "s") == ["a", "b"]
    assert shared_machines({"a": [one], "b": [one], "c": [two]}, ["a", "b", "c"]) == {"a": ["b"], "b": ["a"]}


def test_without_the_engine_cluster_says_what_to_install(monkeypatch, tmp_path, capsys):
    # Simulates the extra not being installed: importing `distributed` fails.
    monkeypatch.setitem(sys.modules, "distributed", None)
    from speedbench.fleet import INSTALL_HINT, run_fleet_sweep
    from speedbench.fleet.__main__ import main

    prof = write_profile(tmp_path)
    with pytest.raises(UserError) as err:
        run_fleet_sweep(prof, "tcp://127.0.0.1:8786")
    assert str(err.value) == "fleet sweeps need the optional engine: pip install 'speedbench[fleet]'" == INSTALL_HINT
    assert main([str(prof), "--cluster", "tcp://127.0.0.1:8786"]) == 2
    assert capsys.readouterr().err.strip() == f"speedbench: error: {INSTALL_HINT}"


def test_killed_client_keeps_what_it_stored_and_resume_finishes_without_duplicates(cluster, tmp_path):
    cl, _ = cluster
    prof = write_profile(tmp_path, sizes=(64, 96, 128), proposals=(10,))
    out = tmp_path / "fleet"
    cmd = [sys.executable, "-m", "speedbench.fleet", str(prof), "--cluster", cl.scheduler_address,
           "-o", str(out), "--hosts", "a", "-q"]
    sweep = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 90
    while stored_points(out / "a" / "points.sqlite") < 1:
        assert sweep.poll() is None, sweep.stderr.read().decode()
        assert time.monotonic() < deadline, "fleet sweep made no progress"
        time.sleep(0.05)
    sweep.kill()
    sweep.wait()
    before = sqlite3.connect(out / "a" / "points.sqlite").execute("SELECT point_id, seq FROM points").fetchall()
    assert 1 <= len(before) < 3
    from speedbench.fleet import run_fleet_sweep

    run_fleet_sweep(prof, cl.scheduler_address, out_dir=out, hosts="a", resume=True, quiet=True,
                    stream=open(os.devnull, "w"))
    after = sqlite3.connect(out / "a" / "points.sqlite").execute("SELECT point_id, seq FROM points").fetchall()
    assert set(before) <= set(after)              # stored points are kept, not measured again
    df = _assert_plan_equal(out / "a", prof)      # the full plan, each point once
    assert (df["status"] == "ok").all()



def test_scaling_efficiency_has_one_definition_locally_and_on_the_fleet(cluster, tmp_path):
    # One K = 2 profile run by a local sweep and by the fleet: both store
    # scaling_eff = X(2) / (2 X(1)) with X(1) = 1000 / mean latency of the K = 1 row (one
    # closed-loop stream, Little's law with L = 1). The fleet used 1000 / p50 (the row's fps)
    # until both went through sweep.pipeline.run_point.
    from speedbench.fleet import run_fleet_sweep
    from speedbench.sweep import run_sweep

    _, client = cluster
    path = write_profile(tmp_path, sizes=(64,), proposals=(10,), concurrency=(1, 2))
    local = load_run(run_sweep(path, out_dir=tmp_path / "local", quiet=True, stream=open(os.devnull, "w")))
    runs = run_fleet_sweep(path, client, out_dir=tmp_path / "fleet", hosts="a", quiet=True,
                           stream=open(os.devnull, "w"))
    fleet = load_run(runs["a"])
    for df in (local, fleet):
        assert sorted(df["concurrency"]) == [1, 2] and set(df["status"]) == {"ok"}
        one, two = df[df.concurrency == 1].iloc[0], df[df.concurrency == 2].iloc[0]
        assert two["scaling_eff"] == pytest.approx(two["tput_fps"] / (2 * 1000.0 / one["lat_mean_ms"]), rel=1e-9)
        # the p50 baseline is another number, so the check above can tell the two apart
        assert two["scaling_eff"] != pytest.approx(two["tput_fps"] / (2 * one["fps"]), rel=1e-9)


def test_a_host_interleaves_invocations_in_the_local_sweeps_seeded_order(cluster, tmp_path):
    # R = 2 on one host: the host runs every invocation as its own task, in the order the local
    # sweep's scheduler (sweep/schedule.py planned_order / invocation_order) gives for the seed
    # recorded in its schedule.json: round by round over its points, K = 1 points first, then
    # the K = 2 point in a pass of its own. The invocations table's insertion order is the order
    # they ran in (a host runs one task at a time).
    from speedbench.fleet import run_fleet_sweep
    from speedbench.sweep.schedule import invocation_order

    _, client = cluster
    path = write_profile(tmp_path, sizes=(64, 96), proposals=(10,), concurrency=(1, 2),
                         repetitions={"invocations": 2})
    runs = run_fleet_sweep(path, client, out_dir=tmp_path / "fleet", hosts="a", quiet=True,
                           stream=open(os.devnull, "w"))
    run = runs["a"]
    df = load_run(run)
    assert set(df["status"]) == {"ok"} and (df["invocations"] == 2).all() and len(df) == 4
    sched = json.loads((run / "schedule.json").read_text())
    ones = [p.point_id for p in expand_plan(load_profile(path)).points if p.config["concurrency"] == 1]
    twos = [p.point_id for p in expand_plan(load_profile(path)).points if p.config["concurrency"] != 1]
    expected = invocation_order(ones, 2, sched["seed"]) + invocation_order(twos, 2, sched["throughput"]["seed"])
    assert [tuple(x) for x in sched["order"]] == invocation_order(ones, 2, sched["seed"])
    con = sqlite3.connect(run / "points.sqlite")
    ran = [(p, k) for p, k in con.execute("SELECT point_id, invocation FROM invocations ORDER BY rowid")]
    con.close()
    assert ran == expected, (ran, expected)
    two = df[df.concurrency == 2].iloc[0]
    one = df[(df.concurrency == 1) & (df["size"] == two["size"])].iloc[0]
    assert two["scaling_eff"] == pytest.approx(two["tput_fps"] / (2 * 1000.0 / one["lat_mean_ms"]), rel=1e-9)


def test_fleet_module_argument_errors_are_one_line(capsys):
    # `python -m speedbench.fleet` refuses bad arguments like every speedbench command: one line, exit 2.
    from speedbench.fleet.__main__ import main

    for argv, said in ((["p.toml"], "the following arguments are required: --cluster"),
                       (["p.toml", "--cluster", "tcp://s:8786", "--lost-after", "-3"], "argument --lost-after")):
        with pytest.raises(SystemExit) as stop:
            main(argv)
        err = capsys.readouterr().err
        assert stop.value.code == 2 and err.count("\n") == 1 and said in err
        assert err.startswith("speedbench: error: ") and "(see python -m speedbench.fleet --help)" in err
