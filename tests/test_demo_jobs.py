"""The demo's throughput, sizing and regression-gate parts, on the synthetic harness backend
(no model is run): what they measure, store and print. The sizing arithmetic itself is checked
by hand-worked examples in tests/test_sizing.py; here the plumbing around it."""
import os

import pytest

from speedbench.cli import main
from speedbench.demo import check, sizing
from speedbench.sweep import load_run, run_sweep
from helpers import synthetic_profile

PROFILE = synthetic_profile(timeout_s=60)


@pytest.fixture
def synthetic_run(tmp_path):
    prof = tmp_path / "syn.toml"
    prof.write_text(PROFILE)
    return prof, run_sweep(prof, out_dir=tmp_path / "run", quiet=True, stream=open(os.devnull, "w"))


def test_throughput_of_frontier_points_then_the_fleet_answer(synthetic_run, monkeypatch):
    monkeypatch.setattr(sizing, "LOAD_SECONDS", 0.3)
    _, run = synthetic_run
    df = load_run(run)
    ids = sizing.frontier_points(df)
    assert set(ids) == {1} and set(ids[1]) <= set(df["point_id"])
    got = sizing.measure_throughput(run, df, quiet=True)
    assert got["measured"] == len(ids[1]) and got["counts"]["failed"] == 0
    after = load_run(run)
    # K = 1 load figures join the existing rows, K = 2 rows are added (one per frontier point)
    k1 = after[(after["concurrency"] == 1) & after["point_id"].isin(ids[1])]
    assert k1["tput_fps"].notna().all()
    assert (after["concurrency"] == 2).sum() == len(ids[1])
    # the K = 2 rows carry the paced-arrival run at the planned utilisation
    assert after.loc[after["concurrency"] == 2, "load_curve"].str.contains('"load": 0.7').all()
    table = sizing.size_fleet(run)
    assert table.attrs["required_fps"] == 24 * 10.0
    text = sizing.fleet_text(table)
    assert text.startswith("What to buy for our example yard: 24 cameras x 10 fps = 240 frames/s")
    assert "cheapest that meets the p99 target: synthetic @" in text
    # a resumed demo does not measure the same points again
    assert sizing.measure_throughput(run, after, quiet=True)["measured"] == 0


def test_throughput_keeps_the_invocations_of_the_single_stream_rows(tmp_path, monkeypatch):
    # The K = 1 load figures are merged into the stored row: its samples must keep their
    # invocation index, or the row's R processes would look like one to `compare` (which
    # resamples invocations, Kalibera and Jones, ISMM 2013) and the point would not be gated.
    from speedbench.analyse import compare
    from speedbench.sweep import load_samples

    monkeypatch.setattr(sizing, "LOAD_SECONDS", 0.3)
    prof = tmp_path / "syn.toml"
    prof.write_text(synthetic_profile(timeout_s=60, repetitions={"invocations": 3}))
    run = run_sweep(prof, out_dir=tmp_path / "run", quiet=True, stream=open(os.devnull, "w"))
    before = load_samples(run).sort_values(["point_id", "i"]).reset_index(drop=True)
    assert (before.groupby("point_id")["invocation"].nunique() == 3).all()
    sizing.measure_throughput(run, load_run(run), quiet=True)
    after = load_samples(run)
    after = after[after["point_id"].isin(before["point_id"])].sort_values(["point_id", "i"]).reset_index(drop=True)
    assert after[["point_id", "ms", "invocation"]].equals(before[["point_id", "ms", "invocation"]])
    table = compare(run, run).points
    single = table[table["point_id"].isin(before["point_id"])]
    assert (single["invocations_base"] == 3).all() and single["gated"].all()
    assert (single["method"] == "hierarchical bootstrap").all()


def test_two_thread_points_get_only_the_ks_that_fit(monkeypatch):
    import pandas as pd

    calls = []
    monkeypatch.setattr("speedbench.system.cores_available", lambda: 2)
    monkeypatch.setattr("speedbench.sweep.throughput.load_into_run",
                        lambda run, ks, **kw: calls.append((tuple(ks), sorted(kw["only"]))) or {"ok": 1, "failed": 0})
    df = pd.DataFrame([dict(point_id="a", status="ok", concurrency=1, intra_threads=1, lat_p50_ms=10.0, map=0.4),
                       dict(point_id="b", status="ok", concurrency=1, intra_threads=2, lat_p50_ms=6.0, map=0.3),
                       dict(point_id="c", status="ok", concurrency=1, intra_threads=1, lat_p50_ms=20.0, map=0.5)])
    got = sizing.measure_throughput("run", df)
    # all three are on the latency-accuracy frontier (faster ones less accurate);
    # on 2 cores: 1-thread points at K = 1 and 2; the 2-thread point at K = 1 only (2 x 2 > 2)
    assert calls == [((1, 2), ["a", "c"]), ((1,), ["b"])]
    assert got["skipped_k"] == [(2, 2)]


def test_demo_check_runs_the_profile_twice_and_compares(synthetic_run, tmp_path, monkeypatch, capsys):
    prof, _ = synthetic_run
    monkeypatch.setattr(check, "check_profile_path", lambda: prof)
    code = main(["demo", "--check", "-q", "-o", str(tmp_path / "checks")])
    out = capsys.readouterr().out
    runs = [tmp_path / "checks" / name for name in check.RUN_NAMES]
    assert all((r / "meta.json").is_file() for r in runs)
    # Two runs of a synthetic workload on a shared machine may or may not differ: the test
    # checks that the verdict, the exit status and the explanation agree, not which it is.
    assert code in (0, 1)
    assert ("REGRESSION" in out) == (code == 1)
    assert f"speedbench compare {runs[0]} {runs[1]}; exit status {code}" in out
    assert "What a clean verdict looks like: exit status 0" in out
    assert len(load_run(runs[0])) == len(load_run(runs[1])) == 2
