"""Pareto frontiers that respect measurement noise.

A point is *dominated* only when another point beats it beyond noise: on each of
the two metrics the other point is either equal (the same graph gives exactly the
same mAP at every thread setting) or better with non-overlapping confidence
intervals, and on at least one metric it is strictly better. A point that is beaten
on the point estimates but only within noise is *tied*: it stays in the table,
because a rerun could well swap the order. For accuracy, "beyond noise" is
decided by a paired bootstrap of the mAP difference over the shared images when
both rows have per-image results (analyse.paired), so a tie means
"indistinguishable on these images"; otherwise by disjoint unpaired intervals.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from speedbench.analyse.common import bounds, has_accuracy, require_columns, split_ok
from speedbench.analyse.paired import better_matrix

STATUS_ORDER = {"frontier": 0, "tied": 1, "dominated": 2}


def frontier(df: pd.DataFrame, x: str = "lat_p50_ms", y: str = "map", minimize_x: bool = True,
             by=None) -> pd.DataFrame:
    """Mark each usable point as ``frontier``, ``tied`` or ``dominated`` on (x, y), y maximised.

    by: column name(s) to compute separate frontiers for (e.g. ``"intra_threads"`` or ``"host"``).
    Rows without accuracy (untrained weights: y is NaN) cannot be placed on a 2-D
    frontier; they form their own group ranked by x only, flagged by
    ``accuracy_available == False``. Failed rows are left out and listed, with their
    reason, in ``result.attrs["excluded"]``, as are rows without a value of x.
    Added columns: frontier_status, dominated_by (label), dominated_by_id, tied_with, accuracy_available.
    """
    by = [by] if isinstance(by, str) else list(by or [])
    require_columns(df, [x, *by], "frontier")
    ok, bad = split_ok(df)
    ok["accuracy_available"] = has_accuracy(ok, y)
    has_x = pd.to_numeric(ok[x], errors="coerce").notna()
    if (~has_x).any():  # e.g. memory not recorded for some points: left out, and said so
        bad = pd.concat([bad, ok[~has_x].assign(reason=f"{x} not recorded")])
    ok = ok[has_x]
    parts = []
    for _, group in ok.groupby([*by, "accuracy_available"], dropna=False, sort=True):
        parts.append(_mark_group(group, x, y, minimize_x, bool(group["accuracy_available"].iloc[0])))
    cols = list(ok.columns) + ["frontier_status", "dominated_by", "dominated_by_id", "tied_with"]
    out = pd.concat(parts) if parts else pd.DataFrame(columns=cols)
    if len(out):
        sign = 1 if minimize_x else -1
        out = out.assign(_o=out["frontier_status"].map(STATUS_ORDER), _x=sign * out[x].astype(float))
        out = out.sort_values([*by, "_o", "_x"], kind="stable").drop(columns=["_o", "_x"])
    out.attrs["excluded"] = bad[[c for c in ("point_id", "label", "reason") if c in bad.columns]]
    out.attrs["x"], out.attrs["y"], out.attrs["minimize_x"] = x, y, minimize_x
    return out


def _mark_group(g: pd.DataFrame, x: str, y: str, minimize_x: bool, with_y: bool) -> pd.DataFrame:
    g = g.copy()
    # Work in "smaller is better" coordinates for both metrics.
    xv, xlo, xhi = bounds(g, x)
    if not minimize_x:
        xv, xlo, xhi = -xv, -xhi, -xlo
    if with_y:
        yv, ylo, yhi = bounds(g, y)
        yv, ylo, yhi = -yv, -yhi, -ylo
    else:
        yv = ylo = yhi = np.zeros(len(g))  # latency only: accuracy unknown, treated as equal
    on_front = _nondominated(xv, yv)
    # mAP of two graphs scored on the same images: beaten beyond noise means the paired
    # bootstrap interval of the difference excludes 0 (overlap of the two unpaired
    # intervals is kept only for pairs without per-image results).
    paired = better_matrix(g) if with_y and y == "map" else None
    beats = _beats_beyond_noise((xv, xlo, xhi), (yv, ylo, yhi, paired))
    classic = _classic_matrix(xv, yv)
    labels = g["label"].tolist()
    ids = g["point_id"].tolist()
    status, dom, dom_id, tied = [], [], [], []
    for j in range(len(g)):
        winners = np.flatnonzero(beats[:, j])
        if on_front[j]:
            status.append("frontier"); dom.append(""); dom_id.append(""); tied.append("")
        elif len(winners):
            # Name the dominator that is itself on the frontier when there is one, else the fastest.
            pref = [i for i in winners if on_front[i]] or list(winners)
            i = min(pref, key=lambda k: (xv[k], yv[k]))
            status.append("dominated"); dom.append(labels[i]); dom_id.append(ids[i]); tied.append("")
        else:
            others = [labels[i] for i in np.flatnonzero(classic[:, j])]
            status.append("tied"); dom.append(""); dom_id.append(""); tied.append("; ".join(others))
    g["frontier_status"], g["dominated_by"], g["dominated_by_id"], g["tied_with"] = status, dom, dom_id, tied
    return g


def _nondominated(xv: np.ndarray, yv: np.ndarray) -> np.ndarray:
    """Classic Pareto set (both minimised) by one sort and a sweep: O(n log n)."""
    n = len(xv)
    keep = np.zeros(n, dtype=bool)
    order = np.lexsort((yv, xv))
    best_prev = np.inf  # best y among points with strictly smaller x
    k = 0
    while k < n:
        m = k
        while m + 1 < n and xv[order[m + 1]] == xv[order[k]]:
            m += 1
        idx = order[k:m + 1]
        ymin = yv[idx].min()
        for i in idx:
            # Equal x and worse y, or no better y than some faster point: dominated.
            keep[i] = yv[i] == ymin and yv[i] < best_prev
        best_prev = min(best_prev, ymin)
        k = m + 1
    return keep


def _classic_matrix(xv, yv) -> np.ndarray:
    """D[i, j]: i dominates j on the point estimates (no worse on both, better on one)."""
    le = (xv[:, None] <= xv[None, :]) & (yv[:, None] <= yv[None, :])
    lt = (xv[:, None] < xv[None, :]) | (yv[:, None] < yv[None, :])
    return le & lt


def _beats_beyond_noise(*metrics) -> np.ndarray:
    """B[i, j]: on every metric i equals j or is better with disjoint CIs, and strictly on one.

    A metric may come with a fourth item (better, mask): where mask holds, better[i, j]
    replaces the CI-overlap test (the paired accuracy comparison).
    """
    ok = None
    strict = None
    for v, lo, hi, *override in metrics:
        eq = np.abs(v[:, None] - v[None, :]) <= 1e-12 * np.maximum(np.abs(v[:, None]), np.abs(v[None, :]))
        better = hi[:, None] < lo[None, :]
        if override and override[0] is not None:   # (better, where it applies): a paired comparison
            better = np.where(override[0][1], override[0][0], better)
        ok = (eq | better) if ok is None else ok & (eq | better)
        strict = better if strict is None else strict | better
    return ok & strict
