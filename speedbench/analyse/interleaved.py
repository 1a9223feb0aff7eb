"""Verdicts of an interleaved A/B run (old and new environment measured in one time window).

Each point was measured in pairs of adjacent worker invocations, one per environment
(speedbench/sweep/interleave.py). The unit of analysis is the pair: its ratio is the new
side's invocation median over the old side's. A drift of the machine that is slow
compared with one pair divides out of every ratio. The point's ratio is the geometric
mean of its pair ratios, and its interval the percentile bootstrap over pairs (Efron &
Tibshirani, "An Introduction to the Bootstrap", ch. 13: resample whole pairs, keep each
pair's two halves together). With a handful of pairs the plain percentile interval is too
narrow (its coverage falls well below the nominal level for n < 10), so it is widened the
way Hesterberg's "expanded percentile interval" does (T. Hesterberg, "What Teachers Should
Know About the Bootstrap", The American Statistician 69(4), 2015): the percentiles taken are
those of a normal tail of z = sqrt(n / (n - 1)) t_(n-1), with the Student t quantile from
the Cornish-Fisher expansion (Abramowitz & Stegun 26.7.5). Thresholds, verdicts and exit
codes are those of compare: slower only when the whole interval lies above 1 + threshold.
"""
from __future__ import annotations

import math
import zlib
from pathlib import Path
from statistics import NormalDist

import numpy as np
import pandas as pd

from speedbench.analyse.common import label
from speedbench.analyse.regression import accuracy_delta
from speedbench.analyse.regression_result import Comparison, verdict_table
from speedbench.analyse.run_changes import env_diff
from speedbench.analyse.hostspeed import verdict as threshold_verdict
from speedbench.errors import UserError
from speedbench.measure.result import PointResult
from speedbench.schema import point_id
from speedbench.sweep.rundir import RunDir

N_BOOT = 2000
MIN_PAIRS = 3     # fewer complete pairs than this: the ratio is reported without a verdict
INVOCATION_COLUMNS = ("point_id", "label", "env", "pair", "status", "lat_p50_ms")


def t_quantile(p: float, df: int) -> float:
    """Student t quantile. df 1 and 2 in closed form (Cauchy: tan(pi (p - 1/2)); df 2:
    (2p - 1) / sqrt(2 p (1 - p))); df >= 3 by the Cornish-Fisher expansion in 1/df
    (Abramowitz & Stegun 26.7.5), within 0.005 of the exact value up to p = 0.975 and
    within 0.05 at p = 0.995."""
    if df == 1:
        return math.tan(math.pi * (p - 0.5))
    if df == 2:
        return (2 * p - 1) / math.sqrt(2 * p * (1 - p))
    z, v = NormalDist().inv_cdf(p), float(df)
    return (z + (z ** 3 + z) / (4 * v) + (5 * z ** 5 + 16 * z ** 3 + 3 * z) / (96 * v ** 2)
            + (3 * z ** 7 + 19 * z ** 5 + 17 * z ** 3 - 15 * z) / (384 * v ** 3)
            + (79 * z ** 9 + 776 * z ** 7 + 1482 * z ** 5 - 1920 * z ** 3 - 945 * z) / (92160 * v ** 4))


def expanded_alpha(alpha: float, n: int) -> float:
    """The tail probability the expanded percentile interval takes for n observations."""
    if n < 2:
        return alpha
    z = math.sqrt(n / (n - 1)) * t_quantile(1 - alpha / 2, n - 1)
    return 2 * (1 - NormalDist().cdf(z))


def paired_ratio(base_ms, new_ms, confidence=0.95, n_boot=N_BOOT, rng=None, expand: bool = True):
    """(geometric mean of new/base per pair, ci_lo, ci_hi) by the bootstrap over pairs.

    expand: widen the percentile interval for small n (module docstring); False gives the
    plain percentile interval.
    """
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
    if expand:
        alpha = expanded_alpha(alpha, len(logs))
    lo, hi = np.quantile(means, [alpha / 2, 1 - alpha / 2])
    return ratio, float(np.exp(lo)), float(np.exp(hi))


def complete_pairs(inv: pd.DataFrame) -> pd.DataFrame:
    """One row per pair whose two invocations both succeeded: columns pair, base_ms, new_ms."""
    twice = inv[inv.duplicated(["point_id", "env", "pair"], keep=False)]
    if len(twice):
        # each side has one worker process per pair: a second one would be a pair counted twice
        r = twice.iloc[0]
        raise UserError(f"interleaved run: point {r['point_id']}: side {r['env']} has {len(twice)} invocations "
                        f"for pair {r['pair']} (one per side and pair)")
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
    points = verdict_table(rows)
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



# ----------------------------------------------------------------- a stored interleaved run
def compare_run(path, threshold: float = 0.05, confidence: float = 0.95, seed: int = 0, n_boot: int = N_BOOT,
                fail_on_drift: bool = False) -> Comparison:
    """The verdicts of an interleaved run directory (made by `speedbench compare --envs`)."""
    if not Path(path).exists():
        raise UserError(f"{path}: run directory not found")
    with RunDir.open(path, readonly=True) as rd:
        meta, points = rd.meta(), rd.points()
        setup = meta.get("interleaved")
        if not isinstance(setup, dict) or not isinstance(setup.get("envs"), dict):
            raise UserError(f"{path}: not an interleaved run (one made by speedbench compare --envs)")
        legacy = rd.legacy_env_invocations()
        recs = _legacy_records(legacy) if legacy is not None else _records(rd.invocation_results(), points)
    envs = setup["envs"]
    inv = pd.DataFrame(recs, columns=[*INVOCATION_COLUMNS, "rss_peak_mib", "det_digest", "reason"])
    names = {s: f"{s} ({(envs.get(s) or {}).get('python', '?')})" for s in ("A", "B")}
    notes = [f"interleaved run: {setup.get('pairs')} A/B pair(s) per point in a seeded ABBA order "
             f"(seed {setup.get('seed')}); {_graph_mode(setup)}"]
    expected = len({tuple(o[1:3]) for o in setup.get("order") or []})
    got = len(complete_pairs_all(inv))
    if got < expected:
        notes.append(f"{got} of {expected} planned pairs complete (an unfinished run: still running, or "
                     f"interrupted; --resume continues it)")
    c = compare_invocations(inv, threshold, confidence, seed, n_boot, fail_on_drift, names["A"], names["B"],
                            env_diff({"env": (envs.get("A") or {}).get("env")}, {"env": (envs.get("B") or {}).get("env")}),
                            notes)
    _add_accuracy(c, points)
    drift = c.points["drift"].value_counts().to_dict() if len(c.points) else {}
    if drift.get("changed"):
        c.notes.append(f"detections on the held-out images differ between the environments for {drift['changed']} "
                       f"configuration(s)" + ("" if fail_on_drift else " (reported; --fail-on-drift gates on it)"))
    elif drift.get("same"):
        c.notes.append("detections on the held-out images are the same in both environments")
    return c


def _records(results: dict, points: pd.DataFrame) -> list[dict]:
    """One record per stored worker process (the `invocations` table: {side point_id: {index:
    PointResult dict}}); its pair is its invocation index. The graph's detection digest comes
    from the side's points row (one graph per side and configuration)."""
    digests = dict(zip(points["point_id"], points["det_digest"])) if "det_digest" in points.columns else {}
    out = []
    for side_id, got in results.items():
        for k, d in sorted(got.items()):
            r = PointResult.from_dict(d)
            config = {**r.point.config(), "env": ""}
            m = r.measurement
            out.append({"point_id": point_id(config), "label": label(config), "env": r.point.env,
                        "pair": int(r.extra.get("pair", k)), "status": r.status,
                        "lat_p50_ms": m.percentile(50) if r.ok and m is not None else math.nan,
                        "rss_peak_mib": _num(r.memory.get("rss_peak_mib")), "det_digest": digests.get(side_id),
                        "reason": r.reason or ""})
    return out


def _legacy_records(rows: list[dict]) -> list[dict]:
    """The same records from an interleaved run made before the one store (table env_invocations)."""
    return [{"point_id": r.get("config_id"), "label": label({**r, "env": ""}), "env": r.get("env"),
             "pair": r.get("pair"), "status": r.get("status"), "lat_p50_ms": _num(r.get("lat_p50_ms")),
             "rss_peak_mib": _num(r.get("rss_peak_mib")), "det_digest": r.get("det_digest"),
             "reason": r.get("reason") or ""} for r in rows]


def complete_pairs_all(inv: pd.DataFrame) -> list:
    return [(pid, p) for pid, g in inv.groupby("point_id", sort=False) for p in complete_pairs(g)["pair"]]


def _graph_mode(setup: dict) -> str:
    if setup.get("graph_mode") == "same":
        return "one graph file (exported in A) measured in both environments: the runtime alone is compared"
    return "each environment exported its own graph: the whole stack is compared, exporter included"


def _add_accuracy(c: Comparison, points: pd.DataFrame) -> None:
    """mAP change B - A per configuration (paired over the same images where both kept per-image results)."""
    if not len(c.points) or "env" not in points.columns:
        return
    rows = {}
    for r in points.to_dict("records"):
        rows[(point_id({**r, "env": ""}), r.get("env"))] = pd.Series(r)   # A's and B's rows share this id
    for i, p in c.points.iterrows():
        a, b = rows.get((p["point_id"], "A")), rows.get((p["point_id"], "B"))
        if a is None or b is None or str(p["verdict"]).startswith("failed"):
            continue
        for k, v in accuracy_delta(a, b).items():
            c.points.at[i, k] = v
        if c.points.at[i, "accuracy"] == "lower":
            c.points.at[i, "regression"] = True


def _num(v) -> float:
    return float(v) if isinstance(v, (int, float)) and v is not None else math.nan
