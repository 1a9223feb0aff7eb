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
