"""The content of a review report as a list of blocks, independent of the output format.

Blocks: ("h2", text) ("p", text) ("warn", text) ("list", [text]) ("table", header, rows)
("figure", name, Figure, caption) ("pre", text) ("details", summary, text).
Everything is plain text here; the renderers escape it.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from speedbench.analyse import frontier, pick
from speedbench.analyse.common import latency_col, split_ok, with_ids
from speedbench.analyse.runs import Run, as_run
from speedbench.report import plots

SAFETY = ("These are benchmark figures from one machine and a small held-out image set. They are no "
          "guarantee of latency or detection quality in a safety-relevant deployment (people, vehicles, "
          "machinery): such a deployment needs its own validation on its own hardware, data and failure "
          "modes, including worst-case latency under load.")

TIMED = ("What is timed: one call of the exported ONNX graph on one image (onnxruntime session.run, or "
         "the eager model's forward under inference mode). Inside the timed region: the model's own "
         "preprocessing (resize, normalisation), backbone, neck, proposal / head stages and "
         "postprocessing (box decoding, NMS, mapping boxes back to the image). Outside it: reading the "
         "image and converting uint8 HWC to float CHW. Each configuration runs in its own fresh worker "
         "process, warms up until the running median settles, then repeats over several real images "
         "until the confidence interval of the median is narrow enough or the time budget is spent.")


def collect(runs) -> tuple[pd.DataFrame, pd.DataFrame, list[Run]]:
    """One points table and one samples table from one or several runs.

    Each row gets a `host` (from the run's metadata when the row has none). With several
    runs, labels and point ids carry a tag of their run (the host when hosts differ, else
    the run's directory name) so that the same configuration from two runs stays apart.
    """
    runs = [as_run(r) for r in (runs if isinstance(runs, (list, tuple)) else [runs])]
    hosts = [str(r.meta.get("host") or "") for r in runs]
    tags = hosts if len(set(hosts)) == len(runs) and all(hosts) else [Path(r.name).name or r.name for r in runs]
    pts, smp = [], []
    for r, host, tag in zip(runs, hosts, tags):
        p = with_ids(r.points)
        p["host"] = p["host"].where(p["host"].astype(str) != "", host) if "host" in p.columns else host
        s = r.samples.copy() if r.samples is not None else pd.DataFrame(columns=["point_id", "i", "ms"])
        if len(runs) > 1:
            p["label"] = p["label"] + f" [{tag}]"
            p["point_id"] = p["point_id"].astype(str) + f"@{tag}"
            s["point_id"] = s["point_id"].astype(str) + f"@{tag}"
        pts.append(p)
        smp.append(s)
    points = pd.concat(pts, ignore_index=True) if pts else pd.DataFrame()
    samples = pd.concat(smp, ignore_index=True) if smp else pd.DataFrame(columns=["point_id", "i", "ms"])
    return points, samples, runs


def build(runs, budget_ms=None, latency: str = "p50", title: str | None = None) -> tuple[str, list]:
    points, samples, runs = collect(runs)
    col = latency_col(latency)
    stat = col[4:-3]
    ok, failed = split_ok(points)
    blocks: list = []
    trained = ok["map"].notna().any() if "map" in ok.columns else False
    hosts = sorted({str(h) for h in ok.get("host", pd.Series(dtype=str)) if str(h)})

    blocks.append(("h2", "The question"))
    cpu = (runs[0].meta.get("env") or {}).get("cpu_model", "this CPU") if runs else "this CPU"
    q = f"Which detector configuration (model, input size, proposal count, thread setting) to run on {cpu}"
    q += f" within {budget_ms:g} ms ({stat} latency)?" if budget_ms else f", trading {stat} latency against accuracy?"
    blocks.append(("p", q))
    blocks.extend(_answer(ok, budget_ms, latency, col, trained))
    blocks.append(("warn", SAFETY))

    blocks.append(("h2", "Environment"))
    for r in runs:
        blocks.append(("table", ["item", "value"], _env_rows(r)))
    if len(hosts) > 1:
        blocks.append(("p", f"Points come from {len(hosts)} hosts ({', '.join(hosts)}); compare them per host."))

    blocks.append(("h2", "Method"))
    blocks.append(("p", TIMED))
    regions = _timed_regions(ok)
    if regions:
        blocks.append(("list", regions))
    blocks.append(("list", _noise_lines(ok)))
    for r in runs:
        if r.path:
            try:
                from speedbench.sweep import RunDir

                with RunDir.open(r.path) as rd:
                    blocks.append(("details", f"Profile of {r.name}", rd.profile_text()))
            except Exception:  # the profile copy is a courtesy; its absence must not stop the report
                pass

    blocks.append(("h2", f"Frontier ({stat} latency vs accuracy)"))
    if not trained:
        blocks.append(("warn", "Accuracy is unavailable (untrained weights): configurations are ranked by "
                               "latency only, which says nothing about detection quality."))
    blocks.append(("figure", "frontier", plots.plot_frontier(ok, x=col), f"Frontier on {stat} latency. "
                   "Filled: on the frontier; black edge: beaten only within noise (tied); hollow: dominated."))
    f = frontier(ok, x=col) if len(ok) else pd.DataFrame()
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
    if len(ok) and "rss_peak_mib" in ok.columns and ok["rss_peak_mib"].notna().any():
        blocks.append(("figure", "frontier_memory", plots.plot_frontier(ok, x="rss_peak_mib"),
                       "Frontier on peak memory."))
    if len(ok) and "fps" in ok.columns and ok["fps"].notna().any():
        blocks.append(("figure", "frontier_fps", plots.plot_frontier(ok, x="fps", minimize_x=False),
                       "Frontier on single-stream throughput (frames/s)."))

    blocks.append(("h2", "Stage breakdown"))
    blocks.append(("figure", "stages", plots.plot_stages(ok), "Per-stage time from a separate profiled pass; "
                   "the tick marks the unprofiled median. Time not tied to a stage is shown hatched."))

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

    blocks.append(("h2", "Memory"))
    blocks.append(("figure", "memory", plots.plot_memory(ok), "Worker resident memory per configuration."))

    blocks.append(("h2", "All points"))
    blocks.append(("table", ["configuration", "p50", "p90", "p99", "CoV", "n", "fps", "peak MiB", "mAP", "noisy"],
                   [[r["label"], _num(r.get("lat_p50_ms"), 2), _num(r.get("lat_p90_ms"), 2), _num(r.get("lat_p99_ms"), 2),
                     _num(r.get("lat_cov"), 3), _num(r.get("n_samples"), 0), _num(r.get("fps"), 1),
                     _num(r.get("rss_peak_mib"), 0), _num(r.get("map"), 3), "yes" if _flag(r.get("noisy")) else ""]
                    for _, r in ok.sort_values(col).iterrows()]))
    if len(failed):
        blocks.append(("p", f"{len(failed)} configuration(s) failed and are excluded:"))
        blocks.append(("table", ["configuration", "reason"], [[r["label"], r["reason"]] for _, r in failed.iterrows()]))

    blocks.append(("h2", "Caveats"))
    blocks.append(("list", _caveats(ok, trained, hosts)))
    blocks.append(("warn", SAFETY))
    name = title or f"speedbench report: {', '.join(r.name for r in runs) or 'run'}"
    return name, blocks


def _answer(ok, budget_ms, latency, col, trained):
    out = []
    if not len(ok):
        return [("warn", "No configuration was measured successfully; there is nothing to recommend.")]
    if budget_ms:
        p = pick(ok, budget_ms, latency=latency)
        out.append(("pre", p.to_text()))
        return out
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
    te = env.get("thread_env") or {}
    rows.append(["thread environment", ", ".join(f"{k}={v}" for k, v in sorted(te.items())) or "(none set)"])
    return [[str(a), str(b)] for a, b in rows]


def _timed_regions(ok) -> list[str]:
    """The measure package's own statement of each backend's timed region."""
    import importlib

    out = []
    backends = sorted({str(b) for b in ok.get("backend", pd.Series(dtype=str)) if str(b)}) if len(ok) else []
    for b in backends:
        try:
            region = importlib.import_module(f"speedbench.measure.backends.{b}").TIMED_REGION
        except (ImportError, AttributeError):
            continue
        out.append(f"Timed region, backend {b}: {region}")
    return out


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
    lines.append("Latency intervals are distribution-free confidence intervals of each percentile (order "
                 "statistics); accuracy intervals are bootstrap intervals over the held-out images.")
    if "profiling_overhead" in ok.columns and ok["profiling_overhead"].notna().any():
        lines.append(f"Profiling overhead of the stage pass: median {ok['profiling_overhead'].median():.1%} "
                     "(stage times come from that pass, not from the timed runs).")
    return lines


def _caveats(ok, trained, hosts) -> list[str]:
    out = [f"One host{'' if len(hosts) <= 1 else ' per run'}: the figures hold for this CPU, its instruction "
           "set (AVX2 / AVX-512 / AMX), memory and load. Another CPU model can rank configurations differently.",
           "No extrapolation: sizes, proposal counts and thread settings that were not measured are not "
           "covered; latency is not linear in input size or thread count.",
           "The machine may be shared: points flagged noisy, and ties on the frontier, can swap on a rerun."]
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
    return out


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
