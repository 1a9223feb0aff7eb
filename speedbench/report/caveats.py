"""The sections of a review report that qualify its figures: the method (what is timed, how noisy),
fp32 vs int8, and the caveats. One function a section over one ReportData (report/report_data.py)."""
from __future__ import annotations

import numpy as np
import pandas as pd

from speedbench.analyse.precision import INT8_FLAGS, int8_flags
from speedbench.report.cells import num
from speedbench.report.replication import replication_lines
from speedbench.report.report_data import ReportData
from speedbench.report.sections import safety
from speedbench.schema import STAGES

TIMED = ("What is timed: one call of the exported ONNX graph on one image (onnxruntime session.run, or "
         "the eager model's forward under inference mode). Inside the timed region: the model's own "
         "preprocessing (resize, normalisation), backbone, neck, proposal / head stages and "
         "postprocessing (box decoding, NMS, mapping boxes back to the image). Outside it: reading the "
         "image and converting uint8 HWC to float CHW. Each configuration runs in its own fresh worker "
         "process, warms up until the running median settles, then repeats over several real images "
         "until the confidence interval of the median is narrow enough or the time budget is spent.")


def method(d: ReportData) -> list:
    blocks = [("h2", "Method"), ("p", TIMED)]
    regions = _timed_regions(d.ok, d.runs)
    if regions:
        blocks.append(("list", regions))
    blocks.append(("list", _noise_lines(d.ok)))
    blocks += [("details", f"Profile of {r.name}", r.profile_text) for r in d.runs if r.profile_text]
    return blocks


def _timed_regions(ok, runs) -> list[str]:
    """Each backend's timed region as the runs recorded it (meta.json timed_regions) when measured."""
    recorded = {}
    for r in runs:
        recorded.update({b: t for b, t in (r.meta.get("timed_regions") or {}).items() if b not in recorded})
    backends = sorted({str(b) for b in ok.get("backend", pd.Series(dtype=str)) if str(b)}) if len(ok) else []
    return [f"Timed region, backend {b}: {recorded.get(b, 'not recorded (a run made before speedbench recorded it)')}"
            for b in backends]


def _noise_lines(ok) -> list[str]:
    if not len(ok):
        return ["No successful points."]
    n = pd.to_numeric(ok.get("n_samples"), errors="coerce") if "n_samples" in ok.columns else pd.Series(dtype=float)
    cov = pd.to_numeric(ok.get("lat_cov"), errors="coerce") if "lat_cov" in ok.columns else pd.Series(dtype=float)
    lines = []
    if n.notna().any():
        lines.append(f"Repetitions per point: {int(n.min())} to {int(n.max())} timed runs (median {int(n.median())}).")
    if cov.notna().any():
        lines.append(f"Run-to-run spread (coefficient of variation): median {cov.median():.1%}, worst {cov.max():.1%}.")
    noisy = int(ok["noisy"].fillna(False).astype(bool).sum()) if "noisy" in ok.columns else 0
    lines.append(f"{noisy} point(s) flagged noisy (high spread): treat their figures with extra care.")
    lines += replication_lines(ok)
    lines.append("Latency intervals are 95 % confidence intervals of each percentile (hierarchical bootstrap "
                 "with several invocations, order statistics of one process otherwise); accuracy intervals are "
                 "bootstrap intervals over the held-out images.")
    if "per_image_file" in ok.columns and ok["per_image_file"].astype(str).ne("").any():
        lines.append("Accuracy comparisons between configurations (dominated / tied, the pick's runners-up) use a "
                     "paired bootstrap of the mAP difference over the same images; \"tied\" on accuracy means "
                     "indistinguishable on these images, not that two wide intervals overlap.")
    if "profiling_overhead" in ok.columns and ok["profiling_overhead"].notna().any():
        lines.append(f"Profiling overhead of the stage pass: median {ok['profiling_overhead'].median():.1%} "
                     "(the stage split comes from that pass; stage milliseconds are scaled onto the timed runs' "
                     "median, see the stage breakdown).")
    return lines


def precision(d: ReportData) -> list:
    """The "fp32 vs int8" section: latency ratio, stages, mAP change [CI], agreement, sizes."""
    if not len(d.pairs):
        return []
    pairs, runs, stat = d.pairs, d.runs, d.stat
    blocks = [("h2", "fp32 vs int8")]
    for r in runs:
        flags = int8_flags(r.meta.get("env"))
        where = f" ({r.name})" if len(runs) > 1 else ""
        blocks.append(("p", f"CPU INT8 instructions{where}: {', '.join(flags)}." if flags else
                       f"CPU INT8 instructions{where}: none of {', '.join(INT8_FLAGS)} in the run's fingerprint; "
                       "8-bit products run on the wider fp32/AVX2 units, so expect less from int8 than a "
                       "CPU with VNNI or AMX gives."))
    rows = []
    for _, r in pairs.iterrows():
        faster = [s for s in STAGES if r.get(f"ratio_{s}", np.nan) < 0.95]
        lo, hi = num(r["map_change_ci_lo"], 3), num(r["map_change_ci_hi"], 3)
        change = num(r["map_change"], 3)
        rows.append([r["label"].removesuffix(" / int8"), num(r["fp32_ms"], 2), num(r["int8_ms"], 2),
                     num(r["ratio"], 2), num(r.get("ratio_backbone"), 2), ", ".join(faster) or "none",
                     num(r["map_fp32"], 3), f"{change} [{lo}, {hi}]" if change and lo and hi else (change or "n/a"),
                     num(r["agree_matched_fraction"], 2),
                     f"{num(r['model_file_mib_fp32'], 1)} -> {num(r['model_file_mib'], 1)}",
                     f"{num(r['rss_peak_mib_fp32'], 0)} -> {num(r['rss_peak_mib'], 0)}"])
    blocks.append(("table", ["configuration", f"fp32 {stat} ms", f"int8 {stat} ms", "int8/fp32",
                             "backbone int8/fp32", "stages >5 % faster", "fp32 mAP", "mAP change [paired CI]",
                             "detections matched", "file MiB", "peak MiB"], rows))
    blocks.append(("p", "Ratios below 1: int8 is faster. The mAP change is int8 minus fp32 on the same held-out "
                        "images, with a paired bootstrap interval; detections matched is the share of detections "
                        "that int8 and fp32 agree on (same label, IoU >= 0.5). The int8 graphs were calibrated on "
                        "separate images (fingerprints in meta.json)."))
    blocks.append(("warn", "An int8 graph detects differently from its fp32 graph by design: check the mAP change "
                           "and the agreement on your own data before a safety-relevant deployment."))
    return blocks


def caveats(d: ReportData) -> list:
    return [("h2", "Caveats"), ("list", _caveats(d.ok, d.trained, d.hosts, d.runs, d.prices is not None)),
            ("warn", safety(d))]


def _caveats(ok, trained, hosts, runs, priced=False) -> list[str]:
    out = [f"One host{'' if len(hosts) <= 1 else ' per run'}: the figures hold for this CPU, its instruction "
           "set (AVX2 / AVX-512 / AMX), memory and load. Another CPU model can rank configurations differently.",
           "Benchmark figures measured on one host are not guarantees, not even for another machine of the "
           "same type; a safety-relevant deployment needs its own validation."]
    if len(hosts) > 1:
        out.append("Several hosts: per-host comparisons are only as good as each host's run conditions (other "
                   "load, frequency governor, thermal state, neighbours on shared cloud hardware, the "
                   "speedbench and library versions of each run). A host that shared its machine with another "
                   "label during a fleet sweep must not be used to compare hardware.")
    if priced:
        out.append("Costs use the prices in the given table and the measured frame rates; they leave out "
                   "everything else a deployment pays for (storage, network, idle capacity, operations).")
    out += [
           "No extrapolation: sizes, proposal counts and thread settings that were not measured are not "
           "covered; latency is not linear in input size or thread count.",
           "The machine may be shared: points flagged noisy, and ties on the frontier, can swap on a rerun.",
           "Latency intervals measured with several invocations include process-to-process variation on this "
           "host at the time of the run; a busier or quieter period, a new library version or another host "
           "can still move them. Points measured in one process describe that process only. Rerun the sweep "
           "and check the two runs with `speedbench compare` before relying on a small difference."]
    untrained = ok["untrained"].fillna(False).astype(bool).any() if "untrained" in ok.columns else not trained
    if untrained or not trained:
        out.append("Untrained weights: accuracy is unavailable for those points, and their latency may not "
                   "match a trained model's, because NMS and second-stage cost depend on how many boxes "
                   "the model proposes.")
    if len(ok) and "backend" in ok.columns and (ok["backend"] == "synthetic").any():
        out.append("Some points use the synthetic harness test backend: no detector ran for them; their "
                   "figures exercise the tool, not a model.")
    if trained:
        out.append("Accuracy comes from a small held-out set: mind the confidence intervals; differences "
                   "inside them are not evidence. Images from another domain can change the ranking.")
    out += _outside_training(ok, runs)
    return out


def _outside_training(ok, runs) -> list[str]:
    """A caveat per model measured at input sizes outside those its weights were trained at, from the
    training sizes the runs recorded (meta.json trained_sizes) when they were measured."""
    if not len(ok) or not {"model", "weights", "size"} <= set(ok.columns):
        return []
    recorded, found, unknown = {}, [], []
    for r in runs:
        for key, sizes in (r.meta.get("trained_sizes") or {}).items():
            recorded.setdefault(key, sizes)
    for (model, weights), g in ok.groupby(["model", "weights"], sort=True):
        key = f"{model}|{weights}"
        if key not in recorded:
            if str(weights) == "demo":   # only demo weights carry training sizes
                unknown.append(str(model))
            continue
        sizes = recorded[key]
        if not sizes:
            continue
        lo, hi = min(sizes), max(sizes)
        outside = sorted({int(s) for s in pd.to_numeric(g["size"], errors="coerce").dropna() if not lo <= s <= hi})
        if outside:
            trained_at = f"{lo} px" if lo == hi else f"{lo}-{hi} px"
            found.append(f"{model} at {', '.join(map(str, outside))} px (its {weights} weights were trained at "
                         f"{trained_at})")
    out = [f"Training input sizes of the demo weights of {', '.join(unknown)}: not recorded (a run made "
           f"before speedbench recorded them), so sizes outside training are not flagged."] if unknown else []
    if found:
        out.append("Measured outside the input sizes the weights were trained at: " + "; ".join(found) + ". Their "
                   "accuracy there is measured, not assumed, but nothing in training prepared the model for those "
                   "sizes, which can explain a sharp drop.")
    return out
