"""A sweep with replicated invocations, end to end on the synthetic harness backend: invocations
interleaved round-robin in a recorded seeded order, every sample with its invocation index, a failed
invocation recorded with its reason, resume per invocation after the parent is killed."""
import json
import os
import sqlite3
import subprocess

from speedbench.sweep import expand_plan, load_profile, load_run, load_samples, run_sweep
from helpers import kill_sweep_once_stored, write_synthetic_profile

def _profile(tmp_path, sizes=(64, 96), r=3, reps=5, work_ms=1.0, synthetic=None):
    return write_synthetic_profile(tmp_path / "syn.toml", name="syn-inv", sizes=sizes, proposals=(10, 20),
                                   repetitions={"invocations": r, "min_reps": reps, "max_reps": reps,
                                                "max_seconds": 5.0},
                                   synthetic={"work_ms": work_ms, "process_cov": 0.2, **(synthetic or {})})


def test_invocations_interleaved_recorded_and_aggregated(tmp_path):
    prof = _profile(tmp_path)
    out = run_sweep(prof, out_dir=tmp_path / "run", quiet=True, stream=open(os.devnull, "w"))
    df = load_run(out)
    assert len(df) == 4 and (df.status == "ok").all()
    assert (df.invocations == 3).all() and (df.invocations_failed == 0).all()
    assert df.ci_scope.str.startswith("3 processes").all() and (df.n_samples == 15).all()
    assert (df.between_cov > 0).all()      # each worker process drew its own offset
    s = load_samples(out)
    assert (s.groupby("point_id").invocation.nunique() == 3).all()
    sched = json.loads((out / "schedule.json").read_text())
    order = [tuple(x) for x in sched["order"]]
    assert len(order) == 12 and sched["invocations"] == 3 and isinstance(sched["seed"], int)
    assert [r for _, r in order] == sorted(r for _, r in order)          # round by round
    assert sorted(order) == sorted((p, r) for p in df.point_id for r in range(3))


def test_a_failed_invocation_is_recorded_and_the_point_keeps_the_others(tmp_path):
    prof = _profile(tmp_path, sizes=(64,), synthetic={"fail_invocation": 1})
    out = run_sweep(prof, out_dir=tmp_path / "run", quiet=True, stream=open(os.devnull, "w"))
    df = load_run(out)
    assert (df.status == "ok").all() and (df.invocations == 2).all() and (df.invocations_failed == 1).all()
    assert df.invocation_errors.str.contains("invocation 1: raised ValueError").all()
    assert sorted(load_samples(out).invocation.unique()) == [0, 2]


def test_resume_per_invocation_after_sigkill_of_parent(tmp_path):
    # ~1 s of timed work per invocation: the parent is killed once two invocations are stored.
    prof = _profile(tmp_path, sizes=(64, 96), r=3, reps=10, work_ms=100.0)
    run = tmp_path / "run"
    plan_ids = {p.point_id for p in expand_plan(load_profile(prof)).points}
    cmd = kill_sweep_once_stored(prof, run, 2, table="invocations")
    con = sqlite3.connect(run / "points.sqlite")
    before = {(p, k): r for p, k, r in con.execute("SELECT point_id, invocation, result FROM invocations")}
    con.close()
    assert 2 <= len(before) < 12, "kill came too late to test resume"

    res = subprocess.run(cmd + ["--resume"], capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stderr
    full = load_run(run)
    assert set(full.point_id) == plan_ids and (full.invocations == 3).all()
    con = sqlite3.connect(run / "points.sqlite")
    after = {(p, k): r for p, k, r in con.execute("SELECT point_id, invocation, result FROM invocations")}
    con.close()
    assert len(after) == 12 and all(after[key] == value for key, value in before.items())   # kept, not redone
    s = load_samples(run)
    assert not s.duplicated(["point_id", "i"]).any() and (s.groupby("point_id").invocation.nunique() == 3).all()


# ----------------------------------------------------------------- throughput points (K > 1)
def _tput_profile(tmp_path, r, name="syn.toml", process_cov=0.2):
    return write_synthetic_profile(tmp_path / name, name="syn-inv", sizes=(64,), proposals=(10,), concurrency=(1, 2),
                                   repetitions={"invocations": r, "min_reps": 5, "max_reps": 5, "max_seconds": 5.0},
                                   synthetic={"work_ms": 10.0, "process_cov": process_cov, "jitter": 0.05})


def test_throughput_point_measured_in_r_invocations_with_a_wider_interval(tmp_path):
    # A K = 2 point with R = 3: three launches of its two workers, each request tagged with its
    # launch; its intervals come from the hierarchical bootstrap. Every worker process draws its
    # own offset (process_cov), an effect one launch's requests cannot show: the R = 1 throughput
    # interval (one launch, its requests resampled) must be narrower than the R = 3 one.
    out3 = run_sweep(_tput_profile(tmp_path, 3), out_dir=tmp_path / "r3", quiet=True, stream=open(os.devnull, "w"))
    df = load_run(out3)
    k2 = df[df.concurrency == 2].iloc[0]
    assert k2.status == "ok" and k2.invocations == 3 and k2.ci_scope.startswith("3 processes")
    s = load_samples(out3)
    assert sorted(s[s.point_id == k2.point_id].invocation.unique()) == [0, 1, 2]
    assert k2.tput_fps_ci_lo < k2.tput_fps < k2.tput_fps_ci_hi
    assert k2.tput_p99_ci_lo <= k2.tput_p99_ms <= k2.tput_p99_ci_hi
    assert json.loads(k2.probe_raw) and k2.probe_start_ms > 0     # every load worker timed the probe
    sched = json.loads((out3 / "schedule.json").read_text())
    assert sched["throughput"]["order"] == [[k2.point_id, i] for i in range(3)]

    out1 = run_sweep(_tput_profile(tmp_path, 1, "one.toml"), out_dir=tmp_path / "r1", quiet=True,
                     stream=open(os.devnull, "w"))
    one = load_run(out1)
    one = one[one.concurrency == 2].iloc[0]
    assert one.invocations == 1 and one.ci_scope.startswith("one process")

    def width(row, lo, hi, est):
        return (row[hi] - row[lo]) / row[est]
    # Throughput: one launch's interval sees only its requests (5 % jitter); three launches see the
    # launch-to-launch spread (each launch's two workers draw offsets with a 20 % CoV). The p99's
    # widths are not compared: one launch's p99 interval is an order-statistic interval of the
    # slower of two differently offset workers, already wide, so which is wider is a coin toss.
    assert width(k2, "tput_fps_ci_lo", "tput_fps_ci_hi", "tput_fps") > width(one, "tput_fps_ci_lo", "tput_fps_ci_hi",
                                                                             "tput_fps")


def test_throughput_point_resumes_per_invocation(tmp_path):
    # A run interrupted after invocation 0 of its K = 2 point: resume measures invocation 1
    # only and keeps the stored one as it was (its JSON byte for byte).
    prof = _tput_profile(tmp_path, 2)
    run = run_sweep(prof, out_dir=tmp_path / "run", quiet=True, stream=open(os.devnull, "w"))
    k2 = load_run(run).query("concurrency == 2").point_id.iloc[0]
    con = sqlite3.connect(run / "points.sqlite")
    kept = con.execute("SELECT result FROM invocations WHERE point_id = ? AND invocation = 0", (k2,)).fetchone()[0]
    assert json.loads(kept)["kind"] == "load"
    for sql in ("DELETE FROM points WHERE point_id = ?", "DELETE FROM samples WHERE point_id = ?",
                "DELETE FROM invocations WHERE point_id = ? AND invocation = 1"):
        con.execute(sql, (k2,))
    con.commit()
    con.close()
    run_sweep(prof, out_dir=run, resume=True, quiet=True, stream=open(os.devnull, "w"))
    row = load_run(run).query("concurrency == 2").iloc[0]
    assert row.status == "ok" and row.invocations == 2
    con = sqlite3.connect(run / "points.sqlite")
    got = dict(con.execute("SELECT invocation, result FROM invocations WHERE point_id = ?", (k2,)).fetchall())
    con.close()
    assert sorted(got) == [0, 1] and got[0] == kept
    s = load_samples(run)
    assert sorted(s[s.point_id == k2].invocation.unique()) == [0, 1]
