"""Sweeps end to end on the measure package's synthetic harness backend (no model is run):
rows written as points finish, failures kept as rows, resume after SIGKILL of the parent."""
import os
import signal
import sqlite3
import subprocess
import sys
import time

import pytest

from speedbench.sweep import expand_plan, load_profile, load_run, load_samples, run_sweep

PROFILE = """
[run]
name = "syn"
timeout_s = 30

[dataset]
scenes = {{count = 1}}
accuracy = false

[sweep]
sizes = {sizes}
proposals = [10, 20]
backends = ["synthetic"]

[[models]]
id = "synthetic"
{extra_model}
[[threads]]
intra = 1

[repetitions]
warmup_min = 1
warmup_max = 2
min_reps = 3
max_reps = 5
max_seconds = 0.5
stages = false

[synthetic]
work_ms = {work_ms}
mode = "sleep"
"""


def write_profile(tmp_path, sizes="[64, 96]", extra_model="", work_ms=1.0):
    path = tmp_path / "syn.toml"
    path.write_text(PROFILE.format(sizes=sizes, extra_model=extra_model, work_ms=work_ms))
    return path


def test_sweep_writes_rows_and_keeps_failures(tmp_path):
    prof = write_profile(tmp_path, extra_model='[[models]]\nid = "synthetic:fail=raise"\nsizes = [64]\n')
    out = run_sweep(prof, out_dir=tmp_path / "run", quiet=True, stream=open(os.devnull, "w"))
    df = load_run(out)
    assert len(df) == 2 * 2 + 2 and df["point_id"].is_unique
    ok, failed = df[df.status == "ok"], df[df.status == "failed"]
    assert len(ok) == 4 and len(failed) == 2
    assert failed["reason"].str.contains("synthetic failure requested").all()
    assert (ok["lat_p50_ms"] > 0).all() and (ok["n_samples"] >= 3).all()
    # untrained ("none" weights): accuracy NaN and flagged
    assert df["untrained"].all() and df["map"].isna().all()
    assert (df["host"] != "").all() and (df["family"] == "two-stage").all()
    # raw samples: one set per ok point, as many as n_samples
    s = load_samples(out)
    counts = s.groupby("point_id").size()
    for _, row in ok.iterrows():
        assert counts[row.point_id] == row.n_samples
    assert set(s.point_id) == set(ok.point_id)
    # a rerun into the same directory without --resume is refused; with it, nothing is re-measured
    from speedbench.errors import UserError

    with pytest.raises(UserError, match="already holds a run"):
        run_sweep(prof, out_dir=tmp_path / "run", quiet=True)
    before = sqlite3.connect(out / "points.sqlite").execute("SELECT point_id, seq FROM points").fetchall()
    run_sweep(prof, out_dir=tmp_path / "run", resume=True, quiet=True, stream=open(os.devnull, "w"))
    after = sqlite3.connect(out / "points.sqlite").execute("SELECT point_id, seq FROM points").fetchall()
    assert sorted(before) == sorted(after)


def test_resume_with_a_different_profile_is_refused(tmp_path):
    prof = write_profile(tmp_path, sizes="[64]")
    run_sweep(prof, out_dir=tmp_path / "run", quiet=True, stream=open(os.devnull, "w"))
    # Comments and formatting may change between the start and the resume...
    prof.write_text("# edited\n" + prof.read_text().replace("sizes = [64]", "sizes   =   [ 64 ]  # one size"))
    run_sweep(prof, out_dir=tmp_path / "run", resume=True, quiet=True, stream=open(os.devnull, "w"))
    # ...the study may not.
    prof.write_text(prof.read_text().replace("[ 64 ]", "[64, 96]"))
    from speedbench.errors import UserError

    with pytest.raises(UserError, match="different profile"):
        run_sweep(prof, out_dir=tmp_path / "run", resume=True, quiet=True)


def _done(db):
    try:
        con = sqlite3.connect(db, timeout=5)
        try:
            return con.execute("SELECT COUNT(*) FROM points").fetchone()[0]
        finally:
            con.close()
    except sqlite3.OperationalError:
        return 0


def test_resume_after_sigkill_of_parent_gives_full_set_without_duplicates(tmp_path):
    # Slow enough per point (~0.5 s of timed work + worker start) to kill the parent mid-sweep.
    prof = write_profile(tmp_path, sizes="[64, 96, 128, 160]", work_ms=100.0)
    run = tmp_path / "run"
    plan_ids = {p.point_id for p in expand_plan(load_profile(prof)).points}
    assert len(plan_ids) == 8
    cmd = [sys.executable, "-m", "speedbench", "sweep", str(prof), "-o", str(run), "--quiet"]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 120
    while _done(run / "points.sqlite") < 2:
        assert proc.poll() is None, proc.stderr.read().decode()
        assert time.monotonic() < deadline, "sweep made no progress"
        time.sleep(0.05)
    proc.send_signal(signal.SIGKILL)   # the parent only; its worker (own session) may still finish
    proc.wait()
    partial = load_run(run)
    assert 2 <= len(partial) < 8, "kill came too late to test resume"
    assert set(partial.point_id) <= plan_ids

    res = subprocess.run(cmd + ["--resume"], capture_output=True, text=True, timeout=240)
    assert res.returncode == 0, res.stderr
    measured_now = [l for l in res.stderr.splitlines() if l.startswith("[")]
    assert len(measured_now) == 8 - len(partial)   # only the missing points were measured
    full = load_run(run)
    assert len(full) == 8 and set(full.point_id) == plan_ids and full.point_id.is_unique
    assert (full.status == "ok").all()
    # points measured before the kill are untouched by the resume
    kept = full.set_index("point_id").loc[list(partial.point_id), "lat_p50_ms"]
    assert (kept.values == partial.set_index("point_id")["lat_p50_ms"].values).all()
    s = load_samples(run)
    assert not s.duplicated(["point_id", "i"]).any() and set(s.point_id) == plan_ids
    import pandas as pd

    csv = pd.read_csv(run / "points.csv")
    assert len(csv) == 8 and csv.point_id.is_unique
