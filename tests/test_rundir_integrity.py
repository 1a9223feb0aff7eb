"""Run-directory integrity: a full disk at each write step, read-only places, two writers on one
run directory, damaged rows. Each case checks the one-line message, the exit status, and that
every committed row survives bit for bit (its stored JSON and its samples, byte-equal).

How faults are made (the same on every machine, root or not, no mounts needed):
- a full disk or a read-only file system: speedbench.sweep.rundir.io_step, the seam called
  before each write of a run directory, raises OSError(ENOSPC) / OSError(EROFS) at a chosen step;
- SQLite's own "database or disk is full" (SQLITE_FULL): RunDir.page_limit sets
  PRAGMA max_page_count, so SQLite itself refuses to grow the file;
- a second writer: a real second process holding the run directory's lock.
"""
import errno
import os
import sqlite3
import subprocess
import sys
import time

import pytest

from speedbench.errors import UserError
from speedbench.sweep import rundir
from speedbench.sweep.rundir import RunDir
from helpers import cli, write_profile


def committed(run) -> dict:
    """point_id -> (row JSON text, samples) exactly as stored: what must survive bit for bit."""
    db = run / "points.sqlite"
    if not db.exists():
        return {}
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        rows = dict(con.execute("SELECT point_id, row FROM points"))
        samples = {}
        for pid, i, ms in con.execute("SELECT point_id, i, ms FROM samples ORDER BY point_id, i"):
            samples.setdefault(pid, []).append((i, ms))
    finally:
        con.close()
    return {pid: (blob, samples.get(pid, [])) for pid, blob in rows.items()}


def one_line_error(capsys) -> str:
    """The error line: exactly one, last on stderr (after any progress lines), no traceback."""
    err = capsys.readouterr().err.strip()
    lines = err.splitlines()
    assert "Traceback" not in err and lines, err
    assert [l for l in lines if "error" in l] == lines[-1:] and lines[-1].startswith("speedbench"), err
    return lines[-1]


def sweep(prof, run, *extra):
    return cli(["sweep", str(prof), "-o", str(run), "-q", *extra])


class Fault:
    """io_step replacement: fails the n-th write step with `code`, records every step seen."""

    def __init__(self, n, code=errno.ENOSPC):
        self.n, self.code, self.seen = n, code, []

    def __call__(self, step, path):
        self.seen.append((step, str(path)))
        if len(self.seen) == self.n:
            raise OSError(self.code, os.strerror(self.code), str(path))


# ----------------------------------------------------------------- disk full
def test_disk_full_at_each_write_step_keeps_committed_rows_and_resume_finishes(tmp_path, monkeypatch, capsys):
    prof = write_profile(tmp_path, sizes="[64]")        # 2 points: before the first point and mid-run
    n, results = 0, []
    while True:
        n += 1
        run = tmp_path / f"run{n}"
        fault = Fault(n)
        monkeypatch.setattr(rundir, "io_step", fault)
        code = sweep(prof, run)
        monkeypatch.setattr(rundir, "io_step", lambda step, path: None)
        if len(fault.seen) < n:          # the sweep wrote fewer than n times: every step was covered
            assert code == 0
            break
        err = one_line_error(capsys)
        step, path = fault.seen[n - 1]     # the failing step (closing the run may write after it)
        assert code == 2, err
        assert f"no space left on device at {path}" in err, err
        assert "corrupt" not in err
        kept = committed(run)
        if (run / "meta.json").exists():
            # a run exists: --resume finishes it and leaves every committed row as it was
            assert "--resume" in err, err
            assert sweep(prof, run, "--resume") == 0
        else:
            # failed while being created: nothing measured, nothing left behind, a plain rerun works
            assert kept == {} and ("removed" in err or "cannot create the run directory" in err), err
            assert not run.exists() or not any(run.iterdir())
            assert sweep(prof, run) == 0
        capsys.readouterr()
        after = committed(run)
        assert len(after) == 2
        assert all(after[pid] == kept[pid] for pid in kept)      # bit for bit
        results.append((step, len(kept)))
    # the steps covered include creation, before the first point and between points
    assert {s for s, _ in results} >= {"mkdir", "write", "commit"}
    assert {k for _, k in results} >= {0, 1}, results


def test_sqlite_full_is_reported_as_no_space_not_as_a_corrupt_database(tmp_path, monkeypatch, capsys):
    prof = write_profile(tmp_path, sizes="[64]")
    # At creation: the tables themselves do not fit.
    monkeypatch.setattr(RunDir, "page_limit", 1)
    assert sweep(prof, tmp_path / "a") == 2
    err = one_line_error(capsys)
    assert f"no space left on device at {tmp_path / 'a' / 'points.sqlite'}" in err and "corrupt" not in err
    # Mid-run: the first point is stored; then the file may not grow by one page and the
    # second point (given many samples, so that it needs new pages) does not fit.
    monkeypatch.setattr(RunDir, "page_limit", None)
    original, calls = RunDir.write_point, []

    def second_does_not_fit(self, row, samples, invocations=None):
        calls.append(row["point_id"])
        if len(calls) == 2:
            pages = self._db.execute("PRAGMA page_count").fetchone()[0]
            self._db.execute(f"PRAGMA max_page_count = {pages}")
            samples = list(samples) * 2000
            invocations = None if invocations is None else list(invocations) * 2000
        return original(self, row, samples, invocations)

    monkeypatch.setattr(RunDir, "write_point", second_does_not_fit)
    run = tmp_path / "b"
    assert sweep(prof, run) == 2
    err = one_line_error(capsys)
    assert f"no space left on device at {run / 'points.sqlite'}" in err and "corrupt" not in err
    assert f"cannot store point {calls[1]}" in err and "--resume" in err
    kept = committed(run)
    assert list(kept) == calls[:1]
    monkeypatch.setattr(RunDir, "write_point", original)   # space is back
    assert sweep(prof, run, "--resume") == 0
    after = committed(run)
    assert len(after) == 2 and after[calls[0]] == kept[calls[0]]


def test_disk_full_outside_the_run_directory_is_one_line(tmp_path, monkeypatch, capsys):
    # e.g. the cache filling up while scenes are generated: the CLI's own last line of defence.
    from speedbench.sweep import runner

    def full(*a, **k):
        raise OSError(errno.ENOSPC, "No space left on device", str(tmp_path / "cache" / "x.png"))

    monkeypatch.setattr(runner, "run_plan", full)
    assert sweep(write_profile(tmp_path, sizes="[64]"), tmp_path / "run") == 2
    assert one_line_error(capsys) == f"speedbench: error: no space left on device at {tmp_path / 'cache' / 'x.png'}"


# ----------------------------------------------------------------- read-only places
def snapshot(run) -> dict:
    return {str(p.relative_to(run)): (p.stat().st_mtime_ns, p.read_bytes() if p.is_file() else b"")
            for p in sorted(run.rglob("*"))} | {".": run.stat().st_mtime_ns}


def finished_run(tmp_path, sizes="[64]"):
    prof = write_profile(tmp_path, sizes=sizes)
    run = tmp_path / "run"
    assert sweep(prof, run) == 0
    return prof, run


def test_reading_a_run_never_writes_to_it(tmp_path, monkeypatch, capsys):
    prof, run = finished_run(tmp_path)
    for p in (run / "exports").iterdir():
        p.unlink()
    (run / "exports").rmdir()                 # a run copied without its graphs
    before = snapshot(run)

    def no_writes(step, path):
        raise AssertionError(f"a reader wrote: {step} {path}")

    monkeypatch.setattr(rundir, "io_step", no_writes)
    assert cli(["frontier", str(run)]) == 0
    assert cli(["pick", str(run), "--budget-ms", "1000"]) in (0, 1)
    assert cli(["report", str(run), "-o", str(tmp_path / "r.html")]) == 0
    assert cli(["compare", str(run), str(run)]) in (0, 1)
    assert cli(["size", str(run), "--streams", "2", "--fps", "5"]) in (0, 2)
    assert cli(["sweep", str(prof), "-o", str(run), "--resume", "--dry-run"]) == 0
    capsys.readouterr()
    from speedbench.sweep import load_meta, load_run, load_samples

    load_run(run), load_samples(run), load_meta(run)
    assert snapshot(run) == before
    assert not (run / "exports").exists()


@pytest.mark.parametrize("code, words", [(errno.EROFS, "read-only file system"),
                                         (errno.EACCES, "permission denied")])
def test_resume_of_a_read_only_run_is_one_line(tmp_path, monkeypatch, capsys, code, words):
    prof, run = finished_run(tmp_path)
    kept = committed(run)
    before = snapshot(run)
    monkeypatch.setattr(rundir, "io_step", Fault(1, code))
    assert sweep(prof, run, "--resume") == 2
    err = one_line_error(capsys)
    assert str(run) in err and words in err
    assert committed(run) == kept and snapshot(run) == before


@pytest.mark.parametrize("command", ["report", "frontier"])
def test_output_into_a_read_only_or_missing_folder_is_refused_before_work(tmp_path, monkeypatch, capsys, command):
    _, run = finished_run(tmp_path)
    suffix = ".html" if command == "report" else ".png"
    # A folder that does not exist: refused while parsing the arguments.
    assert cli([command, str(run), "-o", str(tmp_path / "nowhere" / f"x{suffix}")]) == 2
    err = one_line_error(capsys)
    assert "does not exist" in err and "-o" in err
    # A folder that cannot be written (a read-only file system reports EROFS even to root).
    real_access = os.access
    monkeypatch.setattr(os, "access", lambda p, mode, **k: False if str(p) == str(tmp_path / "ro")
                        else real_access(p, mode, **k))
    (tmp_path / "ro").mkdir()
    assert cli([command, str(run), "-o", str(tmp_path / "ro" / f"x{suffix}")]) == 2
    assert "not writable" in one_line_error(capsys)


def test_write_failing_late_in_a_read_only_place_is_one_line(tmp_path, monkeypatch, capsys):
    # The folder looked writable when checked but the write itself fails (EROFS): still one line.
    _, run = finished_run(tmp_path)
    from speedbench import report

    def refuse(*a, **k):
        raise OSError(errno.EROFS, "Read-only file system", str(tmp_path / "r.html"))

    monkeypatch.setattr(report, "render_reports", refuse)  # what `speedbench report` writes with
    assert cli(["report", str(run), "-o", str(tmp_path / "r.html")]) == 2
    assert one_line_error(capsys) == f"speedbench: error: {tmp_path / 'r.html'}: cannot write (read-only file system)"


# ----------------------------------------------------------------- two writers
HOLD = """
import sys, time
from speedbench.sweep.rundir import RunDir
rd = RunDir.open(sys.argv[1])
print("locked", flush=True)
time.sleep(600)
"""


def test_second_writer_exits_2_naming_the_holder_and_readers_keep_working(tmp_path, capsys):
    prof, run = finished_run(tmp_path)
    kept = committed(run)
    holder = subprocess.Popen([sys.executable, "-c", HOLD, str(run)], stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "locked"
        for args in (["--resume"], ["--resume", "--retry-failed"], []):
            assert sweep(prof, run, *args) == 2
            err = one_line_error(capsys)
            assert f"in use by process {holder.pid}" in err, err
        # readers are not blocked by the writer's lock
        from speedbench.sweep import load_run

        assert len(load_run(run)) == 2
        assert cli(["frontier", str(run)]) == 0
        capsys.readouterr()
    finally:
        holder.kill()     # SIGKILL: the OS releases the lock; nothing is left stuck
        holder.wait()
    assert sweep(prof, run, "--resume") == 0
    assert committed(run) == kept


def test_two_sweeps_started_together_one_runs_one_is_refused(tmp_path):
    # Slow points so that the two processes overlap; readers poll while the sweep writes.
    prof = write_profile(tmp_path, sizes="[64, 96]", work_ms=40.0)
    run = tmp_path / "run"
    cmd = [sys.executable, "-m", "speedbench", "sweep", str(prof), "-o", str(run), "-q"]
    procs = [subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for _ in range(2)]
    from speedbench.sweep import load_run, load_samples

    seen = 0
    while any(p.poll() is None for p in procs):
        if (run / "meta.json").exists():
            try:
                df, s = load_run(run), load_samples(run)
            except UserError as exc:
                assert "not a run directory" in str(exc) or "missing" in str(exc), exc
                continue
            # a reader sees only whole points: every ok row has all its samples
            counts = s.groupby("point_id").size()
            for r in df[df.status == "ok"].itertuples():
                assert counts.get(r.point_id, 0) == r.n_samples
            seen = max(seen, len(df))
        time.sleep(0.05)
    outs = [p.communicate() for p in procs]
    codes = sorted(p.returncode for p in procs)
    assert codes == [0, 2], outs
    err = next(e for p, (_, e) in zip(procs, outs) if p.returncode == 2).strip()
    assert len(err.splitlines()) == 1
    assert "in use by process" in err or "already holds a run" in err, err
    assert len(committed(run)) == 4


# ----------------------------------------------------------------- damaged rows
@pytest.mark.parametrize("blob", ['[1, 2]', "7"])
def test_row_that_is_not_an_object_is_a_damaged_run_directory_naming_the_row(tmp_path, capsys, blob):
    prof, run = finished_run(tmp_path)
    con = sqlite3.connect(run / "points.sqlite")
    pid, seq = con.execute("SELECT point_id, seq FROM points ORDER BY seq LIMIT 1").fetchone()
    con.execute("UPDATE points SET row = ? WHERE point_id = ?", (blob, pid))
    con.commit()
    con.close()
    for args in (["frontier", str(run)], ["pick", str(run), "--budget-ms", "100"],
                 ["report", str(run), "-o", str(tmp_path / "r.html")], ["compare", str(run), str(run)],
                 ["size", str(run), "--streams", "1", "--fps", "1"]):
        assert cli(args) == 2, args
        err = one_line_error(capsys)
        assert f"damaged run directory: row {seq} (point '{pid}')" in err, err
