"""Stage times in the run's own (unprofiled) time base.

The profiled pass says *where* the time goes, but its milliseconds are inflated
by the profiler, unevenly (a graph of many tiny nodes suffers most; 1.1x to 3x
the unprofiled median on the demo). So each stage keeps its share of the
profiled pass's attributed time and is scaled onto the unprofiled median:
the stage ms then add up to the median latency by construction, and the
profiled ms stay available under their own column names.
"""
from __future__ import annotations

import math

from speedbench.schema import (STAGE_METHOD, STAGE_METHOD_RESCALED, STAGES, stage_column,
                               stage_profiled_column, stage_share_column, stage_subgraph_column)

NAN = float("nan")


def stage_columns(profiled: dict, median_ms: float, method: str = STAGE_METHOD) -> dict:
    """stage_X_ms (share x median_ms), stage_X_share, stage_X_profiled_ms and stage_method.

    profiled: stage -> profiled ms per run. Stages not present are NaN; without a
    profile (or without a positive total) every column is NaN and the method "".
    """
    total = sum(float(v) for v in profiled.values() if _finite(v))
    ok = total > 0 and _finite(median_ms)
    row = {}
    for s in STAGES:
        v = profiled.get(s)
        has = ok and _finite(v)
        share = float(v) / total if has else NAN
        row[stage_share_column(s)] = share
        row[stage_column(s)] = share * median_ms if has else NAN
        row[stage_profiled_column(s)] = float(v) if _finite(v) else NAN
    row["stage_method"] = method if ok else ""
    return row


def subgraph_columns(result: dict | None) -> dict:
    """Columns of the opt-in sub-graph check (measure.subgraphs); NaN where it did not run."""
    result = result if isinstance(result, dict) else {}
    stages = result.get("stages") or {}
    row = {stage_subgraph_column(s): float(stages[s]) if _finite(stages.get(s)) else NAN for s in STAGES}
    for col, key in (("subgraph_sum_ms", "sum_ms"), ("subgraph_whole_ms", "whole_ms"),
                     ("subgraph_residual", "residual")):
        row[col] = float(result[key]) if _finite(result.get(key)) else NAN
    return row


def upgrade_frame(df):
    """Rows recorded before the time base existed: their stage_X_ms were profiled ms.

    Those rows (stage_method empty, stage ms present, no profiled columns) are
    rescaled the same way, on their lat_p50_ms, and labelled STAGE_METHOD_RESCALED.
    Returns the frame (changed in place).
    """
    if not len(df) or "lat_p50_ms" not in df.columns:
        return df
    import numpy as np

    ms_cols = [stage_column(s) for s in STAGES]
    prof_cols = [stage_profiled_column(s) for s in STAGES]
    old = (df["stage_method"].astype(str) == "") & df[ms_cols].notna().any(axis=1) \
        & df[prof_cols].isna().all(axis=1)
    if not old.any():
        return df
    for i in df.index[old]:
        profiled = {s: df.at[i, stage_column(s)] for s in STAGES if not np.isnan(df.at[i, stage_column(s)])}
        for col, v in stage_columns(profiled, float(df.at[i, "lat_p50_ms"]), STAGE_METHOD_RESCALED).items():
            df.at[i, col] = v
    return df


def _finite(v) -> bool:
    try:
        return v is not None and math.isfinite(float(v))
    except (TypeError, ValueError):
        return False
