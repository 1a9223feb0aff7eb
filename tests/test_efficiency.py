"""Achieved GMAC/s per stage and the host's fp32 matmul peak (issue 18, item 4)."""
import math

import pandas as pd
import pytest

from speedbench.analyse.efficiency import stage_efficiency
from speedbench.measure.peak import measure_peaks, peak_for
from speedbench.report.machine import efficiency_blocks, peak_rows


def _row(**kw):
    row = {"model": "m", "size": 320, "proposals": 0, "intra_threads": 1, "status": "ok", "point_id": "p1",
           "stage_backbone_ms": 10.0, "stage_backbone_gmacs": 0.5,
           "stage_postprocess_ms": 2.0, "stage_postprocess_gmacs": 0.0, "matmul_peak_gmac_s": 100.0}
    row.update(kw)
    return row


def test_rate_and_fraction_of_peak_are_macs_over_time():
    # Worked by hand: 0.5 GMAC in 10 ms = 50 GMAC/s; half of a 100 GMAC/s peak.
    eff = stage_efficiency(pd.DataFrame([_row()])).set_index("stage")
    assert eff.at["backbone", "gmac_s"] == pytest.approx(50.0)
    assert eff.at["backbone", "peak_frac"] == pytest.approx(0.5)
    # a stage with time but no counted MACs has no rate (not a rate of zero)
    assert eff.at["postprocess", "ms"] == 2.0 and math.isnan(eff.at["postprocess", "gmac_s"])
    assert "neck" not in eff.index        # no time recorded: not listed


def test_failed_rows_and_missing_peak():
    df = pd.DataFrame([_row(matmul_peak_gmac_s=float("nan")), _row(point_id="p2", status="failed")])
    eff = stage_efficiency(df)
    assert set(eff["point_id"]) == {"p1"}
    assert eff["gmac_s"].notna().any() and eff["peak_frac"].isna().all()


def test_report_blocks_show_rate_and_share():
    blocks = efficiency_blocks(pd.DataFrame([_row()]))
    table = [b for b in blocks if b[0] == "table"][0]
    assert table[1][:3] == ["configuration", "peak GMAC/s", "backbone GMAC/s"]
    assert table[2][0][1:] == ["100.0", "50.0 (50%)"]
    assert efficiency_blocks(pd.DataFrame([_row(stage_backbone_gmacs=0.0)])) == []
    assert not any(b[0] == "warn" for b in blocks)
    # faster than the host's own matmul peak: flagged, never shown as plain headroom
    over = efficiency_blocks(pd.DataFrame([_row(stage_backbone_gmacs=1.5)]))
    assert any(b[0] == "warn" and "exceed the measured peak (backbone)" in b[1] for b in over)


def test_peak_is_measured_per_thread_count_in_its_own_process():
    # A tiny product so the test is quick; the figure itself is never asserted (shared host).
    peaks = measure_peaks([2, 1], n=64, reps=2)
    assert set(peaks["by_threads"]) == {"1", "2"}
    for t in ("1", "2"):
        r = peaks["by_threads"][t]
        assert r["gmac_s"] > 0 and r["threads_used"] == int(t), r   # the thread setting took effect
    assert "fp32 matmul 64x64" in peaks["method"]
    assert peak_for(peaks, 2) == peaks["by_threads"]["2"]["gmac_s"]
    assert math.isnan(peak_for(peaks, 7)) and math.isnan(peak_for(None, 1))
    rows = dict(peak_rows({"matmul_peak": peaks}))
    assert "1 thread(s)" in rows["fp32 matmul peak"] and "64x64" in rows["peak method"]
