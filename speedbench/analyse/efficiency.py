"""How close each stage runs to the machine: achieved GMAC/s per stage vs the host's matmul peak.

A stage's counted multiply-accumulates (export facts: convolutions, matmuls and
linear layers, counted on a size x size image) over its time in the unprofiled
time base (stage_X_ms) give the rate it achieves; the host's dense fp32
matrix-multiply peak at the point's thread count (matmul_peak_gmac_s, measured
once per run) says how much of the machine that is. A backbone near the peak
leaves little for a faster runtime to win; a stage far below it (NMS, decoding,
resizing: few counted MACs, much time) is where a different model or runtime
could still help. Stages without counted MACs have no rate (NaN), not zero.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from speedbench.analyse.common import with_ids
from speedbench.schema import STAGES, stage_column, stage_gmacs_column

COLUMNS = ["point_id", "label", "stage", "ms", "gmacs", "gmac_s", "peak_gmac_s", "peak_frac"]


def stage_efficiency(df: pd.DataFrame) -> pd.DataFrame:
    """One row per (point, stage) with time: ms, gmacs, gmac_s, peak_gmac_s, peak_frac."""
    if not len(df):
        return pd.DataFrame(columns=COLUMNS)
    df = with_ids(df.copy())
    if "status" in df.columns:
        df = df[df["status"] == "ok"]
    peak = pd.to_numeric(df.get("matmul_peak_gmac_s", pd.Series(np.nan, index=df.index)), errors="coerce")
    out = []
    for s in STAGES:
        ms_col, mac_col = stage_column(s), stage_gmacs_column(s)
        if ms_col not in df.columns:
            continue
        ms = pd.to_numeric(df[ms_col], errors="coerce")
        macs = pd.to_numeric(df[mac_col], errors="coerce") if mac_col in df.columns else ms * np.nan
        has = ms.notna() & (ms > 0)
        if not has.any():
            continue
        rate = (macs / (ms / 1000)).where(macs > 0)
        out.append(pd.DataFrame({"point_id": df["point_id"], "label": df["label"], "stage": s, "ms": ms,
                                 "gmacs": macs, "gmac_s": rate, "peak_gmac_s": peak,
                                 "peak_frac": rate / peak})[has])
    if not out:
        return pd.DataFrame(columns=COLUMNS)
    order = {s: i for i, s in enumerate(STAGES)}
    res = pd.concat(out, ignore_index=True)
    return res.assign(_o=res["stage"].map(order)).sort_values(["label", "_o"], kind="stable") \
        .drop(columns="_o").reset_index(drop=True)[COLUMNS]
