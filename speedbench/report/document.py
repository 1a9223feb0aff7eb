"""The content of a review report as a list of blocks, independent of the output format.

Blocks: ("h2", text) ("p", text) ("warn", text) ("list", [text]) ("table", header, rows)
("figure", name, Figure, caption) ("pre", text) ("details", summary, text).
Everything is plain text here; the renderers escape it.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from speedbench.analyse import add_costs, combine, frontier, pick
from speedbench.analyse.common import latency_col, split_ok
from speedbench.analyse.precision import INT8_FLAGS, int8_flags, precision_pairs
from speedbench.analyse.runs import Run
from speedbench.report import plots
from speedbench.report.replication import invocations_of, replication_lines
from speedbench.report.machine import efficiency_blocks, peak_rows
from speedbench.schema import STAGES

SAFETY = ("These are benchmark figures from one machine and a small held-out image set. They are no "
          "guarantee of latency or detection quality in a safety-relevant deployment (people, vehicles, "
          "machinery): such a deployment needs its own validation on its own hardware, data and failure "
          "modes, including worst-case latency under load.")

SAFETY_HOSTS = ("These are benchmark figures from the hosts listed below, each measured in its own run on a small "
                "held-out image set. They are no guarantee of latency or detection quality in a safety-relevant "
                "deployment (people, vehicles, machinery): such a deployment needs its own validation on its own "
                "hardware, data and failure modes, including worst-case latency under load.")

TIMED = ("What is timed: one call of the exported ONNX graph on one image (onnxruntime session.run, or "
         "the eager model's forward under inference mode). Inside the timed region: the model's own "
         "preprocessing (resize, normalisation), backbone, neck, proposal / head stages and "
         "postprocessing (box decoding, NMS, mapping boxes back to the image). Outside it: reading the "
         "image and converting uint8 HWC to float CHW. Each configuration runs in its own fresh worker "
         "process, warms up until the running median settles, then repeats over several real images "
         "until the confidence interval of the median is narrow enough or the time budget is spent.")


def build(runs, budget_ms=None, latency: str = "p50", title: str | None = None,
          prices: dict | None = None) -> tuple[str, list]:
    data = combine(runs)
    points, samples, runs = data.points, data.samples, data.runs
    col = latency_col(latency)
    stat = col[4:-3]
    ok, failed = split_ok(points)
    blocks: list = []
    trained = ok["map"].notna().any() if "map" in ok.columns else False
    multi = data.multi_host
    hosts = data.host_names

    blocks.append(("h2", "The question"))
    if multi:
        q = (f"Which host and configuration (model, input size, proposal count, thread setting) to run, among "
             f"{len(hosts)} hosts ({', '.join(hosts)})")
    else:
        cpu = (runs[0].meta.get("env") or {}).get("cpu_model") or "this CPU"
        q = f"Which detector configuration (model, input size, proposal count, thread setting) to run on {cpu}"
    if budget_ms:
        q += f" within {budget_ms:g} ms ({stat} latency)"
        q += ", at the lowest cost per million frames?" if prices is not None else "?"
    else:
        q += f", trading {stat} latency against accuracy?"
    blocks.append(("p", q))
    for w in data.warnings():
        blocks.append(("warn", w[0].upper() + w[1:] + "."))
    blocks.extend(_answer(ok, budget_ms, latency, col, trained, prices, multi))
    safety = SAFETY_HOSTS if multi else SAFETY
    blocks.append(("warn", safety))

    if multi:
        blocks.extend(_hosts_section(data, prices))
    blocks.append(("h2", "Environment"))
    for r in runs:
        if multi:
            blocks.append(("p", f"Run {r.name}:"))
        blocks.append(("table", ["item", "value"], _env_rows(r)))

    blocks.append(("h2", "Method"))
    blocks.append(("p", TIMED))
    regions = _timed_regions(ok, runs)
    if regions:
        blocks.append(("list", regions))
    blocks.append(("list", _noise_lines(ok)))
    for r in runs:
        if r.profile_text:
            blocks.append(("details", f"Profile of {r.name}", r.profile_text))

    blocks.append(("h2", f"Frontier ({stat} latency vs accuracy)"))
    if not trained:
        blocks.append(("warn", "Accuracy is unavailable (untrained weights): configurations are ranked by "
                               "latency only, which says nothing about detection quality."))
    if multi:
        blocks.extend(_host_frontier_blocks(ok, data, col, stat))
    else:
        blocks.append(("figure", "frontier", plots.plot_frontier(ok, x=col), f"Frontier on {stat} latency. "
                       "Filled: on the frontier; black edge: beaten only within noise (tied); hollow: dominated."))
    f = frontier(ok, x=col) if len(ok) and not multi else pd.DataFrame()
    if len(f):
        # Status within each thread setting too: a team with a fixed core budget reads that column.
        per = frontier(ok, x=col, by=["host", "intra_threads", "inter_threads"])
        within = dict(zip(per["point_id"], per["frontier_status"]))
        keep = f[f["frontier_status"] != "dominated"]
        blocks.append(("table", ["status", "in its thread setting", "configuration", f"{stat} ms [CI]", "mAP [CI]",
                                 "peak MiB", "tied with"],
                       [[r["frontier_status"], within.get(r["point_id"], ""), r["label"], _ms_ci(r, col), _map_ci(r),
                         _num(r.get("rss_peak_mib"), 0), r["tied_with"]] for _, r in keep.iterrows()]))
        blocks.append(("p", f"{int((f['frontier_status'] == 'dominated').sum())} dominated configuration(s) "
                            "are not listed here; they appear in the table of all points."))
    def draw(x, **kw):  # several hosts: side-by-side panels, never one mixed cloud of points
        if multi:
            return plots.plot_host_frontiers(ok, x=x, titles=plots.host_titles(data.hosts), **kw)
        return plots.plot_frontier(ok, x=x, **kw)

    if len(ok) and "rss_peak_mib" in ok.columns and ok["rss_peak_mib"].notna().any():
        blocks.append(("figure", "frontier_memory", draw("rss_peak_mib"), "Frontier on peak memory."))
    if len(ok) and "fps" in ok.columns and ok["fps"].notna().any():
        blocks.append(("figure", "frontier_fps", draw("fps", minimize_x=False),
                       "Frontier on single-stream throughput (frames/s)."))
    if prices is not None:
        blocks.extend(_cost_blocks(ok, prices, col, stat, multi))

    blocks.append(("h2", "Stage breakdown"))
    blocks.append(("figure", "stages", plots.plot_stages(ok), _stage_caption(ok)))
    blocks.extend(efficiency_blocks(ok))

    blocks.append(("h2", "Latency distributions"))
    blocks.append(("figure", "latency", plots.plot_latency_distributions(samples, ok), "Raw samples per configuration."))

    blocks.append(("h2", "Accuracy"))
    if trained:
        acc = ok[ok["map"].notna()].drop_duplicates(["model", "weights", "size", "proposals"])
        blocks.append(("table", ["model", "weights", "size", "proposals", "mAP [CI]", "AP50", "AP75"],
                       [[r["model"], r["weights"], _num(r["size"], 0), _num(r["proposals"], 0), _map_ci(r),
                         _num(r.get("map50"), 3), _num(r.get("map75"), 3)] for _, r in acc.iterrows()]))
        blocks.append(("figure", "accuracy_size", plots.plot_accuracy_vs(ok, "size"), "mAP vs input size."))
        if ok["proposals"].nunique() > 1:
            blocks.append(("figure", "accuracy_proposals", plots.plot_accuracy_vs(ok, "proposals"),
                           "mAP vs proposal count."))
    else:
        blocks.append(("p", "Accuracy unavailable: every point used untrained weights."))

    pairs = precision_pairs(ok, col) if len(ok) else pd.DataFrame()
    if len(pairs):
        blocks.extend(_precision_blocks(pairs, runs, stat))

    blocks.append(("h2", "Memory"))
    blocks.append(("figure", "memory", plots.plot_memory(ok), "Worker resident memory per configuration."))

    blocks.append(("h2", "All points"))
    reps = invocations_of(ok)
    blocks.append(("table", ["configuration", "p50 [95 % CI]", "p90", "p99", "CoV", "R", "between CoV", "n", "fps",
                             "peak MiB", "mAP", "noisy"],
                   [[r["label"], f"{_num(r.get('lat_p50_ms'), 2)} [{_num(r.get('lat_p50_ci_lo_ms'), 2)}, "
                     f"{_num(r.get('lat_p50_ci_hi_ms'), 2)}]", _num(r.get("lat_p90_ms"), 2),
                     _num(r.get("lat_p99_ms"), 2), _num(r.get("lat_cov"), 3), f"{int(reps[i])}",
                     _num(r.get("between_cov"), 3), _num(r.get("n_samples"), 0), _num(r.get("fps"), 1),
                     _num(r.get("rss_peak_mib"), 0), _num(r.get("map"), 3), "yes" if _flag(r.get("noisy")) else ""]
                    for i, r in ok.sort_values(col).iterrows()]))
    if len(failed):
        blocks.append(("p", f"{len(failed)} configuration(s) failed and are excluded:"))
        blocks.append(("table", ["configuration", "reason"], [[r["label"], r["reason"]] for _, r in failed.iterrows()]))

    blocks.append(("h2", "Caveats"))
    blocks.append(("list", _caveats(ok, trained, hosts, runs, prices is not None)))
    blocks.append(("warn", safety))
    name = title or f"speedbench report: {', '.join(r.name for r in runs) or 'run'}"
    return name, blocks


def _answer(ok, budget_ms, latency, col, trained, prices=None, multi=False):
    out = []
    if not len(ok):
        return [("warn", "No configuration was measured successfully; there is nothing to recommend.")]
    if budget_ms:
        p = pick(ok, budget_ms, latency=latency, prices=prices)
        out.append(("pre", p.to_text()))
        return out
    if multi:
        return [("list", [f"Host {h}: {_host_summary(g, col, trained)}" for h, g in ok.groupby("host", sort=True)]),
                ("p", "Pick within your budget with `speedbench pick RUN... --budget-ms X` "
                      "(add --price-table for the cheapest host per million frames).")]
    f = frontier(ok, x=col)
    front = f[f["frontier_status"] == "frontier"]
    if trained:
        best = front.loc[front["map"].idxmax()] if front["map"].notna().any() else front.iloc[0]
        fast = front.loc[front[col].idxmin()]
        out.append(("p", f"{len(front)} configuration(s) are on the frontier, "
                         f"{int((f['frontier_status'] == 'tied').sum())} more are tied within noise. "
                         f"Fastest on the frontier: {fast['label']} ({fast[col]:.2f} ms, mAP {_num(fast['map'], 3)}). "
                         f"Most accurate: {best['label']} ({best[col]:.2f} ms, mAP {_num(best['map'], 3)}). "
                         "Pick within your budget with `speedbench pick`."))
    else:
        fast = f.iloc[0]
        out.append(("p", f"Fastest: {fast['label']} ({fast[col]:.2f} ms). Accuracy is unavailable "
                         "(untrained weights), so this answers the latency question only."))
    return out


def _host_summary(g, col, trained) -> str:
    f = frontier(g, x=col)
    front = f[f["frontier_status"] == "frontier"]
    fast = front.loc[front[col].idxmin()]
    text = f"fastest on its frontier {fast['config_label']} ({fast[col]:.2f} ms"
    if trained and front["map"].notna().any():
        best = front.loc[front["map"].idxmax()]
        return text + f", mAP {_num(fast['map'], 3)}); most accurate {best['config_label']} ({best[col]:.2f} ms, " \
                      f"mAP {_num(best['map'], 3)})"
    return text + "; accuracy unavailable)"


def _hosts_section(data, prices) -> list:
    rows = []
    for h in data.hosts.itertuples():
        price = "" if prices is None else (f"{prices[h.host]:g}" if h.host in prices else "not in table")
        rows.append([h.host, h.cpu_model or "", _num(h.cores_logical, 0), "; ".join(h.runs), str(h.points),
                     price, ", ".join(h.shares_machine_with) or "-"])
    head = ["host", "CPU model", "logical cores", "run(s)", "points", "USD / host-hour", "shared machine with"]
    return [("h2", "Hosts"),
            ("p", "Each host's points were measured on that host, in its own run; a host is its label, or, "
                  "without one, its CPU model and core count. Compare hosts through their own frontiers, "
                  "not through single figures."),
            ("table", head if prices is not None else head[:5] + head[6:],
             rows if prices is not None else [r[:5] + r[6:] for r in rows])]


def _host_frontier_blocks(ok, data, col, stat) -> list:
    blocks = [("figure", "frontier", plots.plot_host_frontiers(ok, x=col, titles=plots.host_titles(data.hosts)),
               f"Per-host frontiers on {stat} latency, side by side with shared axes. Marker: one-stage "
               "(circle) or two-stage (square); colour: model. Filled: on that host's frontier; black edge: "
               "tied within noise; hollow: dominated.")]
    if not len(ok):
        return blocks
    by_host = frontier(ok, x=col, by="host")
    overall = frontier(ok, x=col)
    across = dict(zip(overall["point_id"], overall["frontier_status"]))
    per = frontier(ok, x=col, by=["host", "intra_threads", "inter_threads"])
    within = dict(zip(per["point_id"], per["frontier_status"]))
    keep = by_host[by_host["frontier_status"] != "dominated"]
    blocks.append(("table", ["host", "status on its host", "across hosts", "in its thread setting", "configuration",
                             f"{stat} ms [CI]", "mAP [CI]", "peak MiB"],
                   [[_host_cell(r), r["frontier_status"], across.get(r["point_id"], ""), within.get(r["point_id"], ""),
                     r["config_label"], _ms_ci(r, col), _map_ci(r), _num(r.get("rss_peak_mib"), 0)]
                    for _, r in keep.iterrows()]))
    blocks.append(("p", f"{int((by_host['frontier_status'] == 'dominated').sum())} configuration(s) dominated on "
                        "their own host are not listed here; they appear in the table of all points. "
                        "\"Across hosts\" marks a point against every host's points: latencies from different "
                        "machines, each under its own run's conditions."))
    return blocks


def _host_cell(r) -> str:
    shared = r.get("shares_machine_with", "")
    return f"{r['host']} (shared machine!)" if isinstance(shared, str) and shared else str(r["host"])


def _cost_blocks(ok, prices, col, stat, multi) -> list:
    c = add_costs(ok, prices)
    c = c[c["usd_per_mframe"].notna()].sort_values("usd_per_mframe")
    blocks = [("h2", "Cost per million frames")]
    if not len(c):
        return blocks + [("p", "No host of these runs has a price in the price table (or no frame rate was "
                               "recorded): no cost can be given.")]
    blocks.append(("p", "Cost per million frames = USD per host-hour / (frames per second x 3600) x 1e6. The frame "
                        "rate is the throughput of K concurrent workers (tput_fps, `speedbench load`) where a "
                        "row has one, else one stream's rate (1000 / p50), which leaves the host's other cores "
                        "idle and so overstates the cost on a host with many cores. Each row says which."))
    blocks.append(("table", ["host", "configuration", f"{stat} ms", "mAP", "frames/s", "frame rate from",
                             "USD / h", "USD / million frames"],
                   [[_host_cell(r), r.get("config_label") or r["label"], _num(r[col], 2), _num(r.get("map"), 3),
                     _num(r["frames_per_s"], 1), r["fps_source"], f"{r['usd_per_hour']:g}",
                     f"{r['usd_per_mframe']:.4g}"] for _, r in c.head(30).iterrows()]))
    missing = sorted(set(ok["host"].astype(str)) - set(prices))
    if missing:
        blocks.append(("p", f"No price for host(s) {', '.join(missing)}: left out of this table."))
    return blocks


def _env_rows(run: Run) -> list[list[str]]:
    m = run.meta or {}
    env = m.get("env") or {}
    rows = [["run", run.name], ["profile", m.get("profile_name", "")], ["host", m.get("host", "")],
            ["started / finished", f"{m.get('started', '')} / {m.get('finished', '') or 'not finished'}"],
            ["speedbench", m.get("speedbench_version", "")]]
    for k in ("cpu_model", "cores_logical", "cores_physical", "mem_gib", "os", "governor", "python", "git_rev"):
        if env.get(k) not in (None, ""):
            rows.append([k, env[k]])
    flags = env.get("cpu_flags") or {}
    if flags:
        rows.append(["cpu flags", ", ".join(f"{k}={'yes' if v else 'no'}" for k, v in sorted(flags.items()))])
    pk = env.get("packages") or {}
    if pk:
        rows.append(["packages", ", ".join(f"{k} {v}" for k, v in sorted(pk.items()))])
    rows.extend(peak_rows(m))
    te = env.get("thread_env") or {}
    rows.append(["thread environment", ", ".join(f"{k}={v}" for k, v in sorted(te.items())) or "(none set)"])
    return [[str(a), str(b)] for a, b in rows]


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


def _precision_blocks(pairs, runs, stat) -> list:
    """The "fp32 vs int8" section: latency ratio, stages, mAP change [CI], agreement, sizes."""
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
        lo, hi = _num(r["map_change_ci_lo"], 3), _num(r["map_change_ci_hi"], 3)
        change = _num(r["map_change"], 3)
        rows.append([r["label"].removesuffix(" / int8"), _num(r["fp32_ms"], 2), _num(r["int8_ms"], 2),
                     _num(r["ratio"], 2), _num(r.get("ratio_backbone"), 2), ", ".join(faster) or "none",
                     _num(r["map_fp32"], 3), f"{change} [{lo}, {hi}]" if change and lo and hi else (change or "n/a"),
                     _num(r["agree_matched_fraction"], 2),
                     f"{_num(r['model_file_mib_fp32'], 1)} -> {_num(r['model_file_mib'], 1)}",
                     f"{_num(r['rss_peak_mib_fp32'], 0)} -> {_num(r['rss_peak_mib'], 0)}"])
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


def _num(v, digits) -> str:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return ""
    return "" if np.isnan(f) else f"{f:.{digits}f}"


def _ms_ci(r, col) -> str:
    lo, hi = r.get(col.replace("_ms", "_ci_lo_ms")), r.get(col.replace("_ms", "_ci_hi_ms"))
    ci = f" [{_num(lo, 2)}, {_num(hi, 2)}]" if _num(lo, 2) and _num(hi, 2) else ""
    return f"{_num(r.get(col), 2)}{ci}"


def _map_ci(r) -> str:
    m = _num(r.get("map"), 3)
    if not m:
        return "n/a"
    lo, hi = _num(r.get("map_ci_lo"), 3), _num(r.get("map_ci_hi"), 3)
    return f"{m} [{lo}, {hi}]" if lo and hi else m


def _flag(v) -> bool:
    # A flag column may hold numpy booleans, Python booleans or NaN (not recorded).
    return isinstance(v, (bool, np.bool_)) and bool(v)


def _stage_caption(ok) -> str:
    """How the stage times were obtained and how far they add up to the unprofiled median."""
    cols = [f"stage_{s}_ms" for s in STAGES if f"stage_{s}_ms" in ok.columns]
    text = ("Per-stage time in the timed runs' own time base: each stage's share of the node time of a "
            "separate profiled pass, times the unprofiled median (the profiler's own milliseconds are "
            "inflated, so they are kept only as stage_*_profiled_ms). The tick marks the unprofiled median; "
            "time not tied to a stage is hatched.")
    if not cols or "lat_p50_ms" not in ok.columns:
        return text
    total = ok[cols].apply(pd.to_numeric, errors="coerce").sum(axis=1, min_count=1)
    ratio = (total / pd.to_numeric(ok["lat_p50_ms"], errors="coerce")).dropna()
    if len(ratio):
        text += f" Stage sum / p50: {ratio.min():.0%} to {ratio.max():.0%} over {len(ratio)} point(s)."
    methods = sorted({m for m in ok.get("stage_method", pd.Series(dtype=str)).astype(str) if m})
    if methods:
        text += " Method: " + "; ".join(methods) + "."
    if "subgraph_residual" in ok.columns and pd.to_numeric(ok["subgraph_residual"], errors="coerce").notna().any():
        r = pd.to_numeric(ok["subgraph_residual"], errors="coerce").dropna()
        text += (f" Independent check (stage sub-graphs timed alone): sum of sub-graphs vs whole graph "
                 f"{r.min():+.0%} to {r.max():+.0%}.")
    return text
