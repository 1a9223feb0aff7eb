"""Frontier: the fast sort-and-sweep + matrix implementation against a brute-force O(n^2)
check written straight from the definition (Pareto dominance, as in any multi-objective
optimisation text), and the noise-aware tie rule on a constructed case."""
import numpy as np
import pandas as pd
import pytest

from speedbench.analyse import frontier
from speedbench.errors import UserError


def _row(model, ms, ms_ci, m, m_ci, threads=1, size=320, status="ok", **extra):
    return dict(model=model, weights="demo", size=size, proposals=0, backend="ort", intra_threads=threads,
                inter_threads=1, exec_mode="sequential", opt_level="all", affinity=0, concurrency=1,
                family="one-stage", status=status, lat_p50_ms=ms, lat_p50_ci_lo_ms=ms - ms_ci,
                lat_p50_ci_hi_ms=ms + ms_ci, map=m, map_ci_lo=m - m_ci, map_ci_hi=m + m_ci,
                fps=1000.0 / ms, **extra)


def _random_table(rng, n):
    # Values on a coarse grid so that exact ties in one or both metrics occur often.
    ms = rng.integers(5, 25, n).astype(float)
    mp = rng.integers(10, 30, n) / 100.0
    return pd.DataFrame([_row(f"m{i}", ms[i], rng.choice([0.0, 0.5, 2.0]), mp[i],
                              rng.choice([0.0, 0.005, 0.03]), size=300 + i) for i in range(n)])


def _brute_force(df):
    """Status of each row by the definitions, in plain loops."""
    rows = df.to_dict("records")
    out = {}
    for j, b in enumerate(rows):
        classic = beyond = False
        for i, a in enumerate(rows):
            if i == j:
                continue
            no_worse = a["lat_p50_ms"] <= b["lat_p50_ms"] and a["map"] >= b["map"]
            better = a["lat_p50_ms"] < b["lat_p50_ms"] or a["map"] > b["map"]
            if no_worse and better:
                classic = True
            lat_ok = a["lat_p50_ms"] == b["lat_p50_ms"] or a["lat_p50_ci_hi_ms"] < b["lat_p50_ci_lo_ms"]
            map_ok = a["map"] == b["map"] or a["map_ci_lo"] > b["map_ci_hi"]
            strict = a["lat_p50_ci_hi_ms"] < b["lat_p50_ci_lo_ms"] or a["map_ci_lo"] > b["map_ci_hi"]
            if lat_ok and map_ok and strict:
                beyond = True
        out[b["point_id"]] = "frontier" if not classic else ("dominated" if beyond else "tied")
    return out


@pytest.mark.parametrize("seed", range(40))
def test_matches_brute_force_on_random_tables(seed):
    rng = np.random.default_rng(seed)
    df = _random_table(rng, int(rng.integers(1, 40)))
    got = frontier(df)
    want = _brute_force(got)
    assert dict(zip(got["point_id"], got["frontier_status"])) == want
    assert len(got) == len(df)


def test_fps_frontier_equals_latency_frontier():
    # fps = 1000 / p50 is a strictly decreasing transform, so the classic set must be the same
    # whether we minimise latency or maximise throughput.
    rng = np.random.default_rng(7)
    df = _random_table(rng, 30)
    by_lat = frontier(df).set_index("point_id")["frontier_status"]
    by_fps = frontier(df, x="fps", minimize_x=False).set_index("point_id")["frontier_status"]
    assert set(by_lat[by_lat == "frontier"].index) == set(by_fps[by_fps == "frontier"].index)


def test_ties_within_noise_are_kept_and_clear_losses_dominated():
    df = pd.DataFrame([
        _row("a", 10.0, 0.5, 0.30, 0.02),             # the frontier
        _row("b", 10.3, 0.5, 0.29, 0.02),             # worse on both, but inside both CIs -> tied
        _row("c", 20.0, 1.0, 0.20, 0.02),             # worse beyond both CIs -> dominated
        _row("a", 15.0, 0.5, 0.30, 0.02, threads=2),  # same graph (equal mAP), slower beyond CI
        _row("d", 30.0, 0.5, 0.285, 0.05),            # much slower, mAP lower only within noise
    ])
    got = frontier(df).set_index("model")
    st = got.groupby(level=0)["frontier_status"].apply(list).to_dict()
    assert st["a"] == ["frontier", "dominated"]
    assert st["b"] == ["tied"] and "a @ 320" in got.loc["b", "tied_with"]
    assert st["c"] == ["dominated"] and got.loc["c", "dominated_by"].startswith("a @ 320")
    assert st["d"] == ["tied"]


def test_per_thread_setting_and_untrained_rows():
    df = pd.DataFrame([
        _row("a", 10.0, 0.1, 0.30, 0.01, threads=1), _row("b", 20.0, 0.1, 0.20, 0.01, threads=1),
        _row("a", 6.0, 0.1, 0.30, 0.01, threads=2), _row("b", 12.0, 0.1, 0.20, 0.01, threads=2),
        _row("u", 3.0, 0.1, np.nan, np.nan, threads=1), _row("v", 9.0, 0.1, np.nan, np.nan, threads=1),
    ])
    per = frontier(df, by="intra_threads")
    trained = per[per["accuracy_available"]]
    assert (trained.groupby("intra_threads")["frontier_status"].apply(list) == [["frontier", "dominated"]] * 2).all()
    # Without accuracy the rows are ranked by latency alone, in their own flagged group.
    untrained = per[~per["accuracy_available"]].set_index("model")
    assert untrained.loc["u", "frontier_status"] == "frontier"
    assert untrained.loc["v", "frontier_status"] == "dominated"
    overall = frontier(df).query("accuracy_available").set_index(["model", "intra_threads"])
    assert overall.loc[("a", 2), "frontier_status"] == "frontier"
    assert overall.loc[("b", 1), "frontier_status"] == "dominated"


def test_failed_rows_are_left_out_with_reason_and_bad_columns_rejected():
    df = pd.DataFrame([_row("a", 10.0, 0.1, 0.3, 0.01),
                       _row("x", np.nan, np.nan, np.nan, np.nan, status="failed", reason="timed out after 30 s")])
    got = frontier(df)
    assert list(got["model"]) == ["a"]
    assert "timed out" in got.attrs["excluded"]["reason"].iloc[0]
    with pytest.raises(UserError, match="lat_p99_ms"):
        frontier(df.drop(columns=["lat_p50_ms"]).assign(), x="lat_p99_ms")


def test_all_failed_gives_an_empty_frontier_with_reasons():
    df = pd.DataFrame([_row("x", np.nan, np.nan, np.nan, np.nan, status="failed", reason="killed by SIGKILL")])
    got = frontier(df)
    assert len(got) == 0 and "frontier_status" in got.columns
    assert list(got.attrs["excluded"]["reason"]) == ["failed: killed by SIGKILL"]


def test_cli_table_plot_and_errors(tmp_path, capsys):
    from speedbench.cli import main
    from speedbench.schema import point_id
    from speedbench.sweep import RunDir

    rd = RunDir.create(tmp_path / "run", "[run]\n", {"profile_name": "t", "host": "h", "env": {}})
    df = pd.DataFrame([_row("a", 10.0, 0.1, 0.30, 0.01), _row("b", 20.0, 0.1, 0.20, 0.01),
                       _row("a", 6.0, 0.1, 0.30, 0.01, threads=2)])
    for r in df.to_dict("records"):
        cfg = {k: r[k] for k in ("model", "weights", "size", "proposals", "backend", "intra_threads",
                                 "inter_threads", "exec_mode", "opt_level", "affinity", "concurrency")}
        rd.write_point(dict(r, point_id=point_id(cfg)), [])
    rd.close()
    assert main(["frontier", str(tmp_path / "run"), "--all", "-o", str(tmp_path / "f.png")]) == 0
    out = capsys.readouterr().out
    # "a" at 1 thread loses overall to "a" at 2 threads but is the frontier of its own thread setting.
    line = next(ln for ln in out.splitlines() if "a @ 320 / - / 1t" in ln and ln.startswith("dominated"))
    assert line.split()[1] == "frontier"
    assert (tmp_path / "f.png").stat().st_size > 0
    assert main(["frontier", str(tmp_path / "nope")]) == 2
    assert main(["frontier", str(tmp_path / "run"), "--axis", "memory"]) == 0  # memory was not recorded
    assert "a @ 320 / - / 1t: rss_peak_mib not recorded" in capsys.readouterr().out
