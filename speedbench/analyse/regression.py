"""Regression verdicts between two runs of one profile (before / after an upgrade).

Latency: for every configuration present in both runs, the ratio of median latencies
new / base with a bootstrap confidence interval. Method: the percentile bootstrap
(Efron & Tibshirani, "An Introduction to the Bootstrap", ch. 13): each run's raw
samples are resampled independently with replacement (seeded), the ratio of the two
resampled medians is taken, and the interval is the (a/2, 1 - a/2) percentiles of
those ratios. A point is *slower* only when the whole interval lies above
1 + threshold, *faster* only when it lies below 1 / (1 + threshold).
"""
from __future__ import annotations

import math
import zlib

import numpy as np
import pandas as pd

from speedbench.analyse.common import as_float as _f
from speedbench.analyse.common import require_columns, with_ids
from speedbench.analyse.paired import paired_diff
from speedbench.analyse.regression_result import Comparison, verdict_table
from speedbench.analyse import hostref
from speedbench.analyse.hostspeed import adjust, host_status, probe_values, verdict as verdict_of
from speedbench.analyse.run_changes import busy_machine_notes, env_diff, thread_change_notes
from speedbench.analyse.runs import Run, as_run
from speedbench.errors import UserError
from speedbench.measure.invocations import bootstrap_distribution, expanded_alpha, mixture_percentiles
from speedbench.schema import STAGES


N_BOOT = 2000
MIN_SAMPLES = 5  # fewer raw samples than this: fall back to the recorded CIs of the median


def bootstrap_ratio(base_ms, new_ms, confidence=0.95, n_boot=N_BOOT, rng=None):
    """(ratio of medians new/base, ci_lo, ci_hi) by the percentile bootstrap."""
    rng = rng or np.random.default_rng(0)
    a = np.asarray(base_ms, dtype=float)
    b = np.asarray(new_ms, dtype=float)
    ratio = float(np.median(b) / np.median(a))
    ma = _boot_medians(a, n_boot, rng)
    mb = _boot_medians(b, n_boot, rng)
    r = mb / ma
    alpha = 1.0 - confidence
    lo, hi = np.quantile(r, [alpha / 2, 1 - alpha / 2])
    return ratio, float(lo), float(hi)


def hierarchical_ratio(base_groups, new_groups, confidence=0.95, n_boot=N_BOOT, rng=None):
    """(ratio of medians new/base, ci_lo, ci_hi): both sides resampled at two levels.

    Each side is a list of sample arrays, one per invocation. The estimate is the ratio of
    the equal-weight mixture medians; the interval is the expanded percentile interval of
    the bootstrap ratios, with the smaller side's invocation count as the units and the
    pooled two-sample degrees of freedom (speedbench.measure.invocations.expanded_alpha).
    """
    rng = rng or np.random.default_rng(0)
    est = mixture_percentiles(new_groups, (50,))[0] / mixture_percentiles(base_groups, (50,))[0]
    r = bootstrap_distribution(new_groups, (50,), n_boot, rng)[:, 0] / \
        bootstrap_distribution(base_groups, (50,), n_boot, rng)[:, 0]
    rb, rn = len(base_groups), len(new_groups)
    tail = expanded_alpha(confidence, min(rb, rn), rb + rn - 2)
    lo, hi = np.quantile(r, [tail, 1 - tail])
    return float(est), float(min(lo, est)), float(max(hi, est))


def _boot_medians(x, n_boot, rng, chunk_elems=4_000_000):
    n = len(x)
    out = np.empty(n_boot)
    step = max(1, chunk_elems // max(n, 1))  # bound memory for long sample lists
    for s in range(0, n_boot, step):
        k = min(step, n_boot - s)
        out[s:s + k] = np.median(x[rng.integers(0, n, size=(k, n))], axis=1)
    return out


def compare(base, new, threshold: float = 0.05, confidence: float = 0.95, seed: int = 0,
            n_boot: int = N_BOOT, fail_on_drift: bool = False, host_adjusted: bool = False,
            gate_single_process: bool = False) -> Comparison:
    """Match points by configuration and give each a verdict (see the module docstring).

    base, new: Run objects, run directory paths, or bare points DataFrames (then the
    recorded CIs of the median stand in for raw samples).
    A regression is: a point slower beyond the threshold (measured in two or more worker
    processes on both sides, or any point with gate_single_process), a point that failed
    only in the new run, mAP lower beyond its CI, or (with fail_on_drift) changed detections.
    The host's own speed change between the runs (hostspeed.py) is reported with every
    comparison; host_adjusted: gate on the probe-adjusted latency verdict instead of the raw one.
    """
    if not (0 <= threshold < 1):
        raise UserError(f"--threshold: must be between 0% and 100%, not {threshold!r}")
    if not (0.5 <= confidence < 1):
        raise UserError(f"--confidence: must be in [0.5, 1), not {confidence!r}")
    b, n = as_run(base), as_run(new)
    pb, pn = b.meta.get("profile_name"), n.meta.get("profile_name")
    if pb and pn and pb != pn:
        raise UserError(f"{n.name}: run of profile {pn!r}, but {b.name} is of profile {pb!r}; "
                        "compare two runs of the same profile")
    for run in (b, n):
        require_columns(run.points, ["lat_p50_ms"], run.name)
    bp, np_ = with_ids(b.points), with_ids(n.points)
    for run, pts in ((b, bp), (n, np_)):
        if pts["point_id"].duplicated().any():
            raise UserError(f"{run.name}: points table has duplicate point ids (corrupt run)")
    bi, ni = bp.set_index("point_id"), np_.set_index("point_id")
    common = [p for p in bi.index if p in ni.index]
    unmatched = pd.DataFrame(
        [("base only", p, bi.at[p, "label"]) for p in bi.index if p not in ni.index]
        + [("new only", p, ni.at[p, "label"]) for p in ni.index if p not in bi.index],
        columns=["side", "point_id", "label"])
    # Grouped once; the raw ratio reads the arrays, the host reference also the invocation index.
    gb, gn = _samples_by_id(b), _samples_by_id(n)
    sb, sn = ({pid: [x for _, x in g] for pid, g in groups.items()} for groups in (gb, gn))
    rows = [_compare_point(pid, bi.loc[pid], ni.loc[pid], sb.get(pid), sn.get(pid),
                           threshold, confidence, seed, n_boot, fail_on_drift, gate_single_process)
            for pid in common]
    host = host_change(b, n, confidence, seed, n_boot, threshold)
    host["reference"] = _reference_adjust(b, n, bi, ni, gb, gn, rows, threshold, confidence, seed, n_boot)
    by_reference = host["reference"]["status"] == "used"
    host["gate"] = ("host-adjusted" if by_reference else "probe-adjusted") if host_adjusted else "raw"
    if host.get("status") == "recorded":
        for row in rows:
            if row["method"] and "adj_by" not in row:
                row.update(adjust(row, host, threshold), adj_by="probe")
    adjusted = [row for row in rows if "adj_by" in row]
    if host_adjusted and not adjusted:
        raise UserError(f"--host-adjusted: host probe {host['status']}; host reference "
                        f"{host['reference']['status']}; nothing to adjust by")
    if host_adjusted:
        for row in adjusted:
            row["regression"] = ((row["adj_verdict"] == "slower" and row["gated"])
                                 or row["accuracy"] == "lower"
                                 or (fail_on_drift and row["drift"] == "changed"))
    points = verdict_table(rows)
    notes = thread_change_notes(bi, ni, unmatched)
    if not common:
        notes.append("no configuration appears in both runs: nothing was compared")
    if len(points) and (points["method"] == "recorded CIs").any():
        notes.append("some points had no raw samples; their ratio CI is built from the recorded "
                     "CIs of the medians (conservative)")
    single = points[~points["gated"].astype(bool) & points["verdict"].isin(["slower", "faster"])] \
        if len(points) and "gated" in points.columns else points.iloc[0:0]
    if len(single):
        notes.append(f"{len(single)} latency verdict(s) from points measured in one worker process on at "
                     f"least one side are reported, not gated: one process cannot show how far a rerun "
                     f"moves (measure with [repetitions] invocations >= 2, or pass --gate-single-process)")
    if len(points) and (points["drift"] == "not recorded").all():
        notes.append("detection drift not recorded in these runs")
    notes += [x for x in busy_machine_notes(b, n, np_, bp) if x not in notes]
    return Comparison(points=points, env_diff=env_diff(b.meta, n.meta), unmatched=unmatched,
                      threshold=threshold, confidence=confidence, base_name=b.name, new_name=n.name,
                      fail_on_drift=fail_on_drift, notes=notes, host=host)


def host_change(b: Run, n: Run, confidence=0.95, seed=0, n_boot=N_BOOT, threshold=0.05) -> dict:
    """The host's speed change new / base from the worker probes, or why it is unknown."""
    vb, vn = probe_values(b.points), probe_values(n.points)
    missing = [r.name for r, v in ((b, vb), (n, vn)) if not len(v)]
    if missing:
        return {"status": "not recorded in " + " and ".join(missing)}
    if min(len(vb), len(vn)) < 2:
        return {"status": "too few worker processes with a probe reading"}
    rng = np.random.default_rng([seed, zlib.crc32(b"host probe")])
    ratio, lo, hi = bootstrap_ratio(vb, vn, confidence, n_boot, rng)
    return host_status({"status": "recorded", "ratio": ratio, "ci_lo": lo, "ci_hi": hi,
                        "n_base": len(vb), "n_new": len(vn)}, threshold)


def _reference_adjust(b: Run, n: Run, bi, ni, gb, gn, rows, threshold, confidence, seed, n_boot) -> dict:
    """Host-adjusted ratios from the host reference (hostref.py) on the rows that allow it.

    gb, gn: each run's samples as _samples_by_id gives them (invocation index, samples)."""
    if "host_ref_raw" not in bi.columns or "host_ref_raw" not in ni.columns:
        return {"status": "not recorded"}
    ok, why = hostref.usable(b.meta, n.meta)
    if not ok:
        return {"status": "not used: " + why}
    used = 0
    for row in rows:
        pid = row["point_id"]
        if row["method"] != "hierarchical bootstrap":
            continue
        (vb, rb), (vn, rn) = hostref.parse(bi.at[pid, "host_ref_raw"]), hostref.parse(ni.at[pid, "host_ref_raw"])
        if vb != vn:
            continue   # another reference graph: its times are not comparable
        xb, xn = hostref.normalised(gb.get(pid), rb), hostref.normalised(gn.get(pid), rn)
        if xb is None or xn is None:
            continue
        rng = np.random.default_rng([seed, zlib.crc32(f"host reference {pid}".encode())])
        ratio, lo, hi = hierarchical_ratio(xb, xn, confidence, n_boot, rng)
        row.update(adj_ratio=ratio, adj_ci_lo=lo, adj_ci_hi=hi, adj_verdict=verdict_of(lo, hi, threshold),
                   adj_by="reference")
        used += 1
    if not used:
        return {"status": "not recorded"}
    return {"status": "used", "why": why, "points": used, "of": sum(1 for row in rows if row["method"]),
            "ratio": hostref.reference_ratio(b.points, n.points)}


def _samples_by_id(run: Run) -> dict:
    """point_id -> list of (invocation index, sample array), one per invocation (one, index 0, for runs
    without `invocation`)."""
    s = run.samples
    if s is None or not len(s):
        return {}
    require_columns(s, ["point_id", "ms"], f"{run.name} samples")
    s = s.sort_values([c for c in ("point_id", "invocation", "i") if c in s.columns])
    out = {}
    for pid, g in s.groupby("point_id", sort=False):
        if "invocation" in g.columns:
            out[pid] = [(int(k), h["ms"].to_numpy(dtype=float)) for k, h in g.groupby("invocation", sort=True)]
        else:
            out[pid] = [(0, g["ms"].to_numpy(dtype=float))]
    return out


def _compare_point(pid, rb, rn, sb, sn, threshold, confidence, seed, n_boot, fail_on_drift,
                   gate_single_process=False) -> dict:
    ok_b = _is_ok(rb)
    ok_n = _is_ok(rn)
    row = {"point_id": pid, "label": rb["label"], "base_p50_ms": _f(rb.get("lat_p50_ms")),
           "new_p50_ms": _f(rn.get("lat_p50_ms")), "ratio": math.nan, "ci_lo": math.nan,
           "ci_hi": math.nan, "method": "", "n_base": 0, "n_new": 0, "invocations_base": 0,
           "invocations_new": 0, "gated": False}
    if not (ok_b and ok_n):
        verdict = {(False, True): "failed in base", (True, False): "failed in new"}.get((ok_b, ok_n), "failed in both")
        row.update(verdict=verdict, regression=verdict == "failed in new",
                   mem_delta_mib=math.nan, map_delta=math.nan, map_delta_ci_lo=math.nan,
                   map_delta_ci_hi=math.nan, accuracy="n/a", drift="n/a",
                   stage_note=str(rn.get("reason") if not ok_n else rb.get("reason") or ""))
        return row
    nb, nn = (sum(len(g) for g in x) if x else 0 for x in (sb, sn))
    if nb >= MIN_SAMPLES and nn >= MIN_SAMPLES:
        rng = np.random.default_rng([seed, zlib.crc32(str(pid).encode())])
        if len(sb) >= 2 and len(sn) >= 2:
            ratio, lo, hi = hierarchical_ratio(sb, sn, confidence, n_boot, rng)
            method = "hierarchical bootstrap"
        else:
            ratio, lo, hi = bootstrap_ratio(np.concatenate(sb), np.concatenate(sn), confidence, n_boot, rng)
            method = "bootstrap (one process)"
        row.update(method=method, n_base=nb, n_new=nn, invocations_base=len(sb), invocations_new=len(sn))
    else:
        ratio, lo, hi = _ratio_from_recorded(rb, rn)
        ib, in_ = (int(v) if np.isfinite(v) else 1 for v in (_f(rb.get("invocations")), _f(rn.get("invocations"))))
        row.update(method="recorded CIs", invocations_base=ib, invocations_new=in_)
    row["gated"] = bool(gate_single_process or (row["invocations_base"] >= 2 and row["invocations_new"] >= 2))
    row.update(ratio=ratio, ci_lo=lo, ci_hi=hi)
    if not np.isfinite(lo) or not np.isfinite(hi):
        verdict = "unknown"
    elif lo > 1 + threshold:
        verdict = "slower"
    elif hi < 1 / (1 + threshold):
        verdict = "faster"
    else:
        verdict = "unchanged"
    row["verdict"] = verdict
    row["mem_delta_mib"] = _f(rn.get("rss_peak_mib")) - _f(rb.get("rss_peak_mib"))
    row.update(accuracy_delta(rb, rn))
    row["drift"] = _drift(rb, rn)
    row.update(_stages(rb, rn))
    row["regression"] = ((verdict == "slower" and row["gated"]) or row["accuracy"] == "lower"
                         or (fail_on_drift and row["drift"] == "changed"))
    return row


def _ratio_from_recorded(rb, rn):
    """Ratio of recorded medians; interval from the extremes of their CIs (conservative)."""
    b, n = _f(rb.get("lat_p50_ms")), _f(rn.get("lat_p50_ms"))
    blo, bhi = _f(rb.get("lat_p50_ci_lo_ms")), _f(rb.get("lat_p50_ci_hi_ms"))
    nlo, nhi = _f(rn.get("lat_p50_ci_lo_ms")), _f(rn.get("lat_p50_ci_hi_ms"))
    if not all(np.isfinite([b, n, blo, bhi, nlo, nhi])) or b <= 0 or blo <= 0:
        return (n / b if b and np.isfinite(b) and b > 0 else math.nan), math.nan, math.nan
    return n / b, nlo / bhi, nhi / blo


def accuracy_delta(rb, rn) -> dict:
    mb, mn = _f(rb.get("map")), _f(rn.get("map"))
    if not (np.isfinite(mb) and np.isfinite(mn)):
        return {"map_delta": math.nan, "map_delta_ci_lo": math.nan, "map_delta_ci_hi": math.nan,
                "accuracy": "n/a"}
    paired = paired_diff(rn, rb)
    if paired is not None:
        # Both runs scored their graph on the same images: a paired bootstrap of the difference.
        lo, hi = paired["ci_lo"], paired["ci_hi"]
        verdict = "lower" if hi < 0 else ("higher" if lo > 0 else "unchanged")
        return {"map_delta": paired["diff"], "map_delta_ci_lo": lo, "map_delta_ci_hi": hi,
                "accuracy": verdict, "map_delta_method": "paired bootstrap over the same images"}
    d = mn - mb
    # Not paired (no per-image results, or other images). Half-widths of the two CIs combined in quadrature: an approximation that treats the two
    # runs' bootstrap intervals as independent and roughly symmetric.
    hb = (_f(rb.get("map_ci_hi")) - _f(rb.get("map_ci_lo"))) / 2
    hn = (_f(rn.get("map_ci_hi")) - _f(rn.get("map_ci_lo"))) / 2
    if not (np.isfinite(hb) and np.isfinite(hn)) or hb + hn <= 0:
        # Without intervals a difference cannot be told from noise: report it, do not gate on it.
        verdict = "unchanged" if abs(d) <= 1e-12 else "changed (no CI)"
        return {"map_delta": d, "map_delta_ci_lo": math.nan, "map_delta_ci_hi": math.nan, "accuracy": verdict}
    h = math.sqrt(hb * hb + hn * hn)
    verdict = "lower" if d + h < 0 else ("higher" if d - h > 0 else "unchanged")
    return {"map_delta": d, "map_delta_ci_lo": d - h, "map_delta_ci_hi": d + h, "accuracy": verdict,
            "map_delta_method": "unpaired intervals in quadrature"}


def _drift(rb, rn) -> str:
    db, dn = rb.get("det_digest"), rn.get("det_digest")
    if not (isinstance(db, str) and db and isinstance(dn, str) and dn):
        return "not recorded"
    return "same" if db == dn else "changed"


def _stages(rb, rn) -> dict:
    """Per-stage ratios new/base, and a note naming the stage that grew the most."""
    out, grew = {}, []
    for s in STAGES:
        c = f"stage_{s}_ms"
        vb, vn = _f(rb.get(c)), _f(rn.get(c))
        if np.isfinite(vb) and np.isfinite(vn) and vb > 0:
            out[f"stage_{s}_ratio"] = vn / vb
            grew.append((vn - vb, s, vn / vb))
    note = ""
    if grew:
        delta, s, r = max(grew)
        note = f"{s} {delta:+.2f} ms (x{r:.2f})" if delta > 0 else "no stage grew"
    out["stage_note"] = note
    return out


def _is_ok(r) -> bool:
    s = r.get("status")
    return not isinstance(s, str) or s in ("", "ok")
