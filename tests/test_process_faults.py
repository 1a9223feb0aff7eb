"""Process faults: a writer killed during its commits, SIGTERM in the middle of a point, an
unreachable cluster. Committed rows survive bit for bit; nothing is left behind; one line."""
import hashlib
import os
import random
import signal
import sqlite3
import subprocess
import sys
import time

import psutil

from helpers import write_profile

WRITER = r"""
import hashlib, json, sys
from speedbench.sweep.rundir import RunDir
from speedbench.sweep import rundir as rd_mod

path, start = sys.argv[1], int(sys.argv[2])
rd = RunDir.open(path) if start else RunDir.create(path, "", {"env": {}})
for i in range(start, start + 10_000):
    row = {"point_id": f"p{i:05d}", "status": "ok", "model": "synthetic", "size": 64, "n_samples": 2000,
           "lat_p50_ms": i / 7, "note": "x" * (i % 500)}
    samples = [i + j / 997 for j in range(2000)]     # big enough that a commit takes a while
    rd.write_point(row, samples)
    blob = rd._db.execute("SELECT row FROM points WHERE point_id = ?", (row["point_id"],)).fetchone()[0]
    # Reported only once committed: the parent holds us to every row we announce.
    digest = hashlib.sha256((blob + json.dumps(samples)).encode()).hexdigest()
    print(row["point_id"], digest, flush=True)
"""


def stored(run) -> dict:
    """point_id -> sha256 of (row JSON as stored + its samples), read as a reader would."""
    import json

    con = sqlite3.connect(run / "points.sqlite", timeout=30)
    try:
        out = {}
        for pid, blob in con.execute("SELECT point_id, row FROM points"):
            ms = [m for (m,) in con.execute("SELECT ms FROM samples WHERE point_id = ? ORDER BY i", (pid,))]
            out[pid] = hashlib.sha256((blob + json.dumps(ms)).encode()).hexdigest()
        return out
    finally:
        con.close()


def test_writer_killed_during_commits_loses_no_committed_row(tmp_path):
    # SIGKILL at seeded random moments while a writer commits point after point (rows of 2000
    # samples, synchronous=FULL): every row it announced as committed must be there, byte-equal,
    # with all its samples; no half-written row ever shows up; the lock is released by the OS.
    run = tmp_path / "run"
    rng = random.Random(19)
    announced: dict = {}
    unannounced: set = set()        # rows committed in an earlier round just before its kill
    start = 0
    for _round in range(4):
        proc = subprocess.Popen([sys.executable, "-c", WRITER, str(run), str(start)],
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        got = 0
        wanted = rng.randint(2, 6)
        while got < wanted:                     # let it commit a few rows, then kill it mid-stream
            line = proc.stdout.readline()
            assert line, proc.stderr.read()
            pid, digest = line.split()
            announced[pid] = digest
            got += 1
        time.sleep(rng.uniform(0.0, 0.05))
        proc.send_signal(signal.SIGKILL)
        out, _ = proc.communicate()
        for line in out.splitlines():           # rows committed between the last read and the kill
            pid, digest = line.split()
            announced[pid] = digest
        now = stored(run)
        assert {p: now.get(p) for p in announced} == announced
        # at most the row committed between its commit and its announcement is extra, per round
        # (a row left unannounced by an earlier round's kill stays stored and is not counted again)
        extra = set(now) - set(announced) - unannounced
        assert len(extra) <= 1
        unannounced |= extra
        start = max(int(p[1:]) for p in now) + 1
    from speedbench.sweep import load_run, load_samples

    df, s = load_run(run), load_samples(run)
    assert set(announced) <= set(df.point_id)
    assert (s.groupby("point_id").size() == 2000).all()


def test_sigterm_during_a_point_exits_143_keeps_rows_and_leaves_no_temp_files(tmp_path):
    prof = write_profile(tmp_path, sizes="[64, 96]", work_ms=300.0)
    run = tmp_path / "run"
    tmp = tmp_path / "tmp"
    tmp.mkdir()
    proc = subprocess.Popen([sys.executable, "-m", "speedbench", "sweep", str(prof), "-o", str(run), "-q"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env={**os.environ, "TMPDIR": str(tmp)})
    parent = psutil.Process(proc.pid)
    deadline = time.monotonic() + 120
    from helpers import stored_points

    # wait for one stored point and a worker busy with the next one
    while not (stored_points(run / "points.sqlite") >= 1 and parent.children()):
        assert proc.poll() is None, proc.communicate()
        assert time.monotonic() < deadline, "the sweep made no progress"
        time.sleep(0.05)
    workers = parent.children(recursive=True)
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 143, err
    assert err.strip().splitlines()[-1] == "speedbench: terminated; results written so far are kept"
    assert "Traceback" not in err
    assert sorted(tmp.glob("speedbench-*")) == []               # the point's temp dir was removed
    _, alive = psutil.wait_procs(workers, timeout=15)
    assert alive == []                                         # and its worker stopped
    assert stored_points(run / "points.sqlite") >= 1


def test_cluster_that_is_not_an_address_fails_at_once_in_one_line(tmp_path):
    prof = write_profile(tmp_path, sizes="[64]")
    for address in ("notanaddress", "tcp://", "tcp://host:99999", "http://x:1"):
        res = subprocess.run([sys.executable, "-m", "speedbench", "sweep", str(prof), "--cluster", address],
                             capture_output=True, text=True, timeout=120)
        assert res.returncode == 2
        assert res.stderr.strip().splitlines() == [
            f"speedbench: error: argument --cluster: {address!r} is not a scheduler address such as "
            f"tcp://HOST:8786 (see speedbench sweep --help)"]
    assert not (tmp_path / "runs").exists()


def test_cluster_where_nothing_answers_is_one_line_without_noise_at_exit(tmp_path):
    # A well-formed address with no scheduler behind it (port 9 on this machine: refused, or
    # a name that does not resolve): one line, and nothing printed by the client's destructor.
    prof = write_profile(tmp_path, sizes="[64]")
    for address in ("tcp://127.0.0.1:9", "no-such-host.invalid:8786"):
        res = subprocess.run([sys.executable, "-m", "speedbench", "sweep", str(prof), "--cluster", address,
                              "-o", str(tmp_path / "out")], capture_output=True, text=True, timeout=120)
        assert res.returncode == 2
        lines = res.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith(f"speedbench: error: --cluster {address}: cannot "), lines
    assert not (tmp_path / "out").exists()


MID_COMMIT = r"""
import sys, time
from speedbench.sweep.rundir import RunDir
rd = RunDir.open(sys.argv[1])
db = rd._db
db.execute("PRAGMA cache_size = 1")          # spill to the file: a hot journal exists from here on
db.execute("BEGIN IMMEDIATE")
for i in range(5000):
    db.execute("INSERT INTO samples (point_id, i, ms) VALUES ('half-written', ?, 1.0)", (i,))
db.execute("INSERT INTO points (point_id, seq, row) VALUES ('half-written', 99, '{}')")
print("mid-commit", flush=True)
time.sleep(600)
"""


def test_reader_after_a_writer_killed_mid_commit_sees_the_committed_state(tmp_path):
    # The killed writer leaves a hot journal; a read-only connection cannot roll it back
    # (SQLITE_READONLY_ROLLBACK), so the reader lets SQLite restore the last commit.
    from speedbench.sweep import RunDir, load_run, load_samples

    run = tmp_path / "run"
    with RunDir.create(run, "", {"env": {}}) as rd:
        rd.write_point({"point_id": "kept", "status": "ok", "n_samples": 3}, [1.0, 2.0, 3.0])
    before = stored(run)
    proc = subprocess.Popen([sys.executable, "-c", MID_COMMIT, str(run)], stdout=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "mid-commit"
    proc.kill()
    proc.wait()
    assert (run / "points.sqlite-journal").exists()
    df, s = load_run(run), load_samples(run)          # readers first, before anything else opens it
    assert list(df.point_id) == ["kept"] and list(s.ms) == [1.0, 2.0, 3.0]
    assert stored(run) == before
