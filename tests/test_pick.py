"""pick on a constructed table whose answer is worked out by hand in the comments."""
import numpy as np
import pandas as pd
import pytest

from speedbench.analyse import pick
from speedbench.cli import main
from speedbench.errors import UserError
from speedbench.schema import point_id


def _row(model, p90, m, threads=1, mem=300.0, status="ok", size=320, **extra):
    cfg = dict(model=model, weights="demo", size=size, proposals=0, backend="ort", intra_threads=threads,
               inter_threads=1, exec_mode="sequential", opt_level="all", affinity=0, concurrency=1)
    return dict(cfg, point_id=point_id(cfg), family="one-stage", status=status, lat_p50_ms=p90 * 0.8,
                lat_p90_ms=p90, lat_p90_ci_lo_ms=p90 - 0.5, lat_p90_ci_hi_ms=p90 + 0.5,
                map=m, map_ci_lo=m - 0.02, map_ci_hi=m + 0.02, rss_peak_mib=mem, **extra)


TABLE = pd.DataFrame([
    _row("fast", 8.0, 0.20),                       # fits, least accurate
    _row("mid", 14.0, 0.30),                       # fits, most accurate -> best at 15 ms, margin 1 ms
    _row("mid", 9.0, 0.30, threads=2, mem=900.0),  # fits the budget, too much memory when capped
    _row("big", 25.0, 0.40),                       # 10 ms over a 15 ms budget
    _row("huge", 16.0, 0.45),                      # 1 ms over: the closest miss
    _row("dead", np.nan, np.nan, status="failed", reason="raised ValueError: bad graph"),
])


def test_best_margin_runners_up_and_reasons():
    p = pick(TABLE, 15.0, latency="p90")
    # Both "mid" rows have mAP 0.30; the faster (9 ms, 2 threads) wins the tie on latency.
    assert (p.best["model"], p.best["intra_threads"]) == ("mid", 2)
    assert p.margin_ms == pytest.approx(6.0)
    assert list(p.runners_up["model"]) == ["mid", "fast"]
    reasons = dict(zip(p.excluded["model"], p.excluded["reason"]))
    assert "25.00 ms > budget 15 ms by 10.00 ms" in reasons["big"]
    assert reasons["dead"].startswith("failed: raised ValueError")
    assert list(p.closest_misses["model"])[:2] == ["huge", "big"]
    assert "mid @ 320" in p.to_text() and "Excluded" in p.to_text()


def test_limits_on_threads_memory_and_accuracy():
    p = pick(TABLE, 15.0, latency="p90", max_memory_mb=500)
    assert (p.best["model"], p.best["intra_threads"], p.margin_ms) == ("mid", 1, pytest.approx(1.0))
    assert "peak memory 900.0 MiB > 500 MiB" in p.excluded.set_index("model").loc["mid", "reason"]
    p = pick(TABLE, 15.0, latency="p90", threads=2)
    assert p.best["intra_threads"] == 2 and set(p.runners_up["model"]) == set()
    p = pick(TABLE, 15.0, latency="p90", min_map=0.25)
    assert "fast" in set(p.excluded["model"]) and p.best["model"] == "mid"


def test_nothing_fits_gives_closest_misses():
    p = pick(TABLE, 5.0, latency="p90")
    assert p.best is None and p.margin_ms is None
    assert list(p.closest_misses["model"]) == ["fast", "mid", "mid"]
    assert p.to_text().startswith("Nothing fits a p90 budget of 5 ms")


def test_untrained_falls_back_to_latency_and_says_so():
    t = TABLE.assign(map=np.nan, map_ci_lo=np.nan, map_ci_hi=np.nan)
    p = pick(t, 15.0, latency="p90")
    assert p.best["model"] == "fast" and not p.accuracy_available
    assert any("ranked by latency only" in n for n in p.notes)
    p = pick(t, 15.0, latency="p90", min_map=0.1)
    assert p.best is None and "cannot be checked" in p.excluded["reason"].iloc[0]


def test_pick_flags_a_budget_inside_the_ci():
    t = pd.DataFrame([_row("edge", 14.8, 0.3)])  # CI reaches 15.3 ms, past a 15 ms budget
    assert any("may not fit" in n for n in pick(t, 15.0, latency="p90").notes)


@pytest.mark.parametrize("kwargs, match", [
    ({"budget_ms": -1}, "--budget-ms"), ({"budget_ms": float("nan")}, "--budget-ms"),
    ({"budget_ms": 10, "latency": "p95"}, "--latency"),
])
def test_bad_arguments(kwargs, match):
    with pytest.raises(UserError, match=match):
        pick(TABLE, **kwargs)


def test_cli_exit_codes(tmp_path, capsys):
    from speedbench.sweep import RunDir

    rd = RunDir.create(tmp_path / "run", "[run]\n", {"profile_name": "t", "host": "h", "env": {}})
    for r in TABLE.to_dict("records"):
        rd.write_point(r, [])
    rd.close()
    assert main(["pick", str(tmp_path / "run"), "--budget-ms", "15", "--latency", "p90"]) == 0
    assert "Best within p90 <= 15 ms: mid @ 320" in capsys.readouterr().out
    assert main(["pick", str(tmp_path / "run"), "--budget-ms", "1"]) == 1
    assert main(["pick", str(tmp_path / "missing"), "--budget-ms", "15"]) == 2
    assert "run directory not found" in capsys.readouterr().err


def test_all_failed_is_a_clear_answer_not_a_crash():
    p = pick(TABLE[TABLE["status"] == "failed"], 15.0)
    assert p.best is None and "no configuration was measured successfully" in p.notes
    assert list(p.excluded["reason"]) == ["failed: raised ValueError: bad graph"]


def test_noisy_pick_is_flagged():
    t = pd.DataFrame([_row("n", 10.0, 0.3, noisy=True, lat_cov=0.25)])
    assert any("flagged noisy (CoV 25%)" in n for n in pick(t, 15.0, latency="p90").notes)
