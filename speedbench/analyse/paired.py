"""Paired accuracy comparisons between rows of a points table.

A row of a run measured with accuracy carries `per_image_file`: its graph's
per-image results in the run directory (speedbench.evaluate.paired). Two rows
whose files are on the same images are compared by a paired bootstrap of the
mAP difference; otherwise (no file, other images) the caller falls back to the
rows' own unpaired intervals, and says which it used.
"""
from __future__ import annotations

from functools import lru_cache

import numpy as np
import pandas as pd

from speedbench.evaluate.paired import PerImage, paired_map_diff

RESAMPLES = 1000
SEED = 0


def _file(row) -> str:
    f = row.get("per_image_file", "") if hasattr(row, "get") else ""
    return f if isinstance(f, str) else ""


@lru_cache(maxsize=64)
def _load(path: str) -> PerImage:
    return PerImage.load(path)


@lru_cache(maxsize=4096)
def _diff(path_a: str, path_b: str) -> dict | None:
    a, b = _load(path_a), _load(path_b)
    if not np.array_equal(a.image_ids, b.image_ids):
        return None
    return paired_map_diff(a, b, bootstrap=RESAMPLES, seed=SEED)


def paired_diff(row_a, row_b) -> dict | None:
    """mAP(a) - mAP(b) with its paired bootstrap interval, or None when the rows cannot be paired."""
    fa, fb = _file(row_a), _file(row_b)
    if not fa or not fb:
        return None
    if fa == fb:   # the same graph: the same detections on the same images
        return {"diff": 0.0, "ci_lo": 0.0, "ci_hi": 0.0, "distinct": False, "paired": True}
    try:
        d = _diff(fa, fb)
    except Exception:  # an unreadable file: no paired answer, the unpaired intervals still serve
        return None
    return None if d is None else {**d, "paired": True}


def better_matrix(df: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """(B, P): B[i, j] row i's mAP beats row j's beyond the paired interval; P[i, j] the pair was paired."""
    rows = df.to_dict("records")
    n = len(rows)
    better = np.zeros((n, n), bool)
    paired = np.zeros((n, n), bool)
    for i in range(n):
        for j in range(i + 1, n):
            d = paired_diff(rows[i], rows[j])
            if d is None:
                continue
            paired[i, j] = paired[j, i] = True
            better[i, j] = d["ci_lo"] > 0
            better[j, i] = d["ci_hi"] < 0
    return better, paired
