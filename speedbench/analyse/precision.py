"""fp32 vs int8: each int8 point beside the fp32 point of the same configuration.

The latency ratio is int8 p50 / fp32 p50 (below 1: int8 is faster), also per stage, so a
reader sees which stages got faster and which did not. The mAP change and its paired
interval come from the sweep (speedbench.sweep.quantised: both graphs scored on the same
held-out images), as does the detection agreement with fp32.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from speedbench.analyse.common import precision_of, split_ok
from speedbench.schema import CONFIG_COLUMNS, STAGES, stage_column

INT8_FLAGS = ("avx512_vnni", "avx_vnni", "amx_int8")   # x86 instructions for 8-bit dot products


def int8_flags(env: dict | None) -> list[str]:
    """The CPU's INT8 instruction flags recorded in a run's fingerprint (meta.json env)."""
    flags = (env or {}).get("cpu_flags") or {}
    return [f for f in INT8_FLAGS if flags.get(f)]


def precision_pairs(df: pd.DataFrame, latency: str = "lat_p50_ms") -> pd.DataFrame:
    """One row per int8 point that has an fp32 twin (same configuration and host)."""
    ok, _ = split_ok(df)
    if not len(ok):
        return pd.DataFrame()
    ok = ok.assign(_precision=precision_of(ok))
    key = [c for c in CONFIG_COLUMNS if c != "precision" and c in ok.columns]
    key += ["host"] if "host" in ok.columns else []
    fp32 = ok[ok["_precision"] == "fp32"]
    int8 = ok[ok["_precision"] == "int8"]
    if not len(int8):
        return pd.DataFrame()
    both = int8.merge(fp32, on=key, suffixes=("", "_fp32"))
    out = both[key].copy()
    out["label"] = both["label"]
    out["fp32_ms"], out["int8_ms"] = both[f"{latency}_fp32"], both[latency]
    out["ratio"] = out["int8_ms"] / out["fp32_ms"]
    for s in STAGES:
        c = stage_column(s)
        if c in both.columns and f"{c}_fp32" in both.columns:
            with np.errstate(divide="ignore", invalid="ignore"):
                out[f"ratio_{s}"] = pd.to_numeric(both[c], errors="coerce") / pd.to_numeric(both[f"{c}_fp32"], errors="coerce")
    for c in ("map", "map_change", "map_change_ci_lo", "map_change_ci_hi", "agree_matched_fraction",
              "agree_box_mean_px", "model_file_mib", "rss_peak_mib"):
        out[c] = pd.to_numeric(both[c], errors="coerce") if c in both.columns else np.nan
    for c in ("map", "model_file_mib", "rss_peak_mib"):
        out[f"{c}_fp32"] = pd.to_numeric(both[f"{c}_fp32"], errors="coerce") if f"{c}_fp32" in both.columns else np.nan
    return out.sort_values(["model", "size", "proposals", "intra_threads"]).reset_index(drop=True)
