"""Verdicts of an interleaved A/B run (old and new environment measured in one time window).

Each point was measured in pairs of adjacent worker invocations, one per environment
(speedbench/sweep/interleave.py). The unit of analysis is the pair: its ratio is the new
side's invocation median over the old side's. A drift of the machine that is slow
compared with one pair divides out of every ratio. The point's ratio is the geometric
mean of its pair ratios, and its interval the percentile bootstrap over pairs (Efron &
Tibshirani, "An Introduction to the Bootstrap", ch. 13: resample whole pairs, keep each
pair's two halves together). Thresholds, verdicts and exit codes are those of compare:
slower only when the whole interval lies above 1 + threshold.
"""
from __future__ import annotations

import math
import zlib

import numpy as np
import pandas as pd

from speedbench.analyse.comparison import Comparison
from speedbench.analyse.hostspeed import verdict as threshold_verdict
from speedbench.errors import UserError

N_BOOT = 2000
MIN_PAIRS = 3     # fewer complete pairs than this: the ratio is reported without a verdict
INVOCATION_COLUMNS = ("point_id", "label", "env", "pair", "status", "lat_p50_ms")


def paired_ratio(base_ms, new_ms, confidence=0.95, n_boot=N_BOOT, rng=None):
    """(geometric mean of new/base per pair, ci_lo, ci_hi) by the percentile bootstrap over pairs."""
    rng = rng or np.random.default_rng(0)
    a, b = np.asarray(base_ms, dtype=float), np.asarray(new_ms, dtype=float)
    if a.shape != b.shape or a.ndim != 1 or not len(a):
        raise ValueError("paired_ratio: needs two equally long, non-empty series (one value per pair)")
    logs = np.log(b) - np.log(a)
    ratio = float(np.exp(logs.mean()))
    if len(logs) < 2:
        return ratio, math.nan, math.nan
    means = logs[rng.integers(0, len(logs), size=(n_boot, len(logs)))].mean(axis=1)
    alpha = 1.0 - confidence
    lo, hi = np.quantile(means, [alpha / 2, 1 - alpha / 2])
    return ratio, float(np.exp(lo)), float(np.exp(hi))


def complete_pairs(inv: pd.DataFrame) -> pd.DataFrame:
    """One row per pair whose two invocations both succeeded: columns pair, base_ms, new_ms."""
    ok = inv[(inv["status"] == "ok") & np.isfinite(inv["lat_p50_ms"].astype(float))]
    side = {s: dict(zip(ok.loc[ok["env"] == s, "pair"], ok.loc[ok["env"] == s, "lat_p50_ms"])) for s in "AB"}
    both = sorted(set(side["A"]) & set(side["B"]))
    return pd.DataFrame({"pair": both, "base_ms": [float(side["A"][p]) for p in both],
                         "new_ms": [float(side["B"][p]) for p in both]})


def compare_point(pid: str, inv: pd.DataFrame, threshold: float, confidence: float, seed: int,
                  n_boot: int = N_BOOT, fail_on_drift: bool = False) -> dict:
    """The verdict row of one point from its invocations (same columns as compare's rows)."""
    side_ok = {s: inv[(inv["env"] == s) & (inv["status"] == "ok")] for s in ("A", "B")}
    pairs = complete_pairs(inv)
    row = {"point_id": pid, "label": str(inv["label"].iloc[0]), "ratio": math.nan, "ci_lo": math.nan,
           "ci_hi": math.nan, "method": "", "n_base": len(side_ok["A"]), "n_new": len(side_ok["B"]),
           "pairs": len(pairs), "failed_invocations": int((inv["status"] != "ok").sum()),
           "base_p50_ms": _median(side_ok["A"], "lat_p50_ms"), "new_p50_ms": _median(side_ok["B"], "lat_p50_ms"),
           "mem_delta_mib": _median(side_ok["B"], "rss_peak_mib") - _median(side_ok["A"], "rss_peak_mib"),
           "map_delta": math.nan, "map_delta_ci_lo": math.nan, "map_delta_ci_hi": math.nan,
           "accuracy": "n/a", "drift": _drift(inv), "stage_note": ""}
    if not len(side_ok["A"]) or not len(side_ok["B"]):
        verdict = {(False, True): "failed in base", (True, False): "failed in new"}.get(
            (bool(len(side_ok["A"])), bool(len(side_ok["B"]))), "failed in both")
        reasons = inv.loc[inv["status"] != "ok", "reason"] if "reason" in inv.columns else pd.Series([], dtype=object)
        row.update(verdict=verdict, regression=verdict == "failed in new",
                   stage_note=str(reasons.iloc[-1]) if len(reasons) else "")
        return row
    if len(pairs):
        rng = np.random.default_rng([seed, zlib.crc32(str(pid).encode())])
        ratio, lo, hi = paired_ratio(pairs["base_ms"], pairs["new_ms"], confidence, n_boot, rng)
        row.update(ratio=ratio, ci_lo=lo, ci_hi=hi, method=f"paired bootstrap over {len(pairs)} pairs")
    if len(pairs) < MIN_PAIRS:
        verdict = "too few pairs"
        row["stage_note"] = f"{len(pairs)} complete pair(s); a verdict needs {MIN_PAIRS}"
    else:
        verdict = threshold_verdict(row["ci_lo"], row["ci_hi"], threshold)
    row["verdict"] = verdict
    row["regression"] = verdict == "slower" or (fail_on_drift and row["drift"] == "changed")
    return row


def compare_invocations(inv: pd.DataFrame, threshold: float = 0.05, confidence: float = 0.95, seed: int = 0,
                        n_boot: int = N_BOOT, fail_on_drift: bool = False, base_name: str = "A",
                        new_name: str = "B", env_diff: pd.DataFrame | None = None,
                        notes: list[str] | None = None) -> Comparison:
    """A Comparison (the one compare renders) from an interleaved run's invocation table."""
    if not (0 <= threshold < 1):
        raise UserError(f"--threshold: must be between 0% and 100%, not {threshold!r}")
    if not (0.5 <= confidence < 1):
        raise UserError(f"--confidence: must be in [0.5, 1), not {confidence!r}")
    missing = [c for c in INVOCATION_COLUMNS if c not in inv.columns]
    if missing:
        raise UserError(f"interleaved run: invocation table lacks column(s) {', '.join(missing)}")
    rows = [compare_point(pid, g, threshold, confidence, seed, n_boot, fail_on_drift)
            for pid, g in inv.groupby("point_id", sort=False)]
    points = pd.DataFrame(rows)
    if len(points):
        points = points.sort_values(["regression", "ratio"], ascending=[False, False], kind="stable")
        points = points.reset_index(drop=True)
    else:
        points = pd.DataFrame(columns=["point_id", "label", "verdict", "regression", "ratio"])
    notes = list(notes or [])
    if len(points) and (points["verdict"] == "too few pairs").any():
        notes.append(f"points with fewer than {MIN_PAIRS} complete A/B pairs are reported, not gated")
    unmatched = pd.DataFrame(columns=["side", "point_id", "label"])
    return Comparison(points=points, env_diff=env_diff if env_diff is not None else
                      pd.DataFrame(columns=["key", "base", "new"]), unmatched=unmatched, threshold=threshold,
                      confidence=confidence, base_name=base_name, new_name=new_name,
                      fail_on_drift=fail_on_drift, notes=notes)


def _median(frame: pd.DataFrame, col: str) -> float:
    if col not in frame.columns:
        return math.nan
    vals = pd.to_numeric(frame[col], errors="coerce").dropna()
    return float(vals.median()) if len(vals) else math.nan


def _drift(inv: pd.DataFrame) -> str:
    """Did the two environments' graphs detect the same on the held-out images?"""
    if "det_digest" not in inv.columns:
        return "not recorded"
    d = {s: {x for x in inv.loc[inv["env"] == s, "det_digest"] if isinstance(x, str) and x} for s in ("A", "B")}
    if not d["A"] or not d["B"]:
        return "not recorded"
    return "same" if d["A"] == d["B"] else "changed"

