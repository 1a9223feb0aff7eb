"""The sections of a review report that answer the question and show the evidence, one function a
section, each reading one precomputed ReportData (report/report_data.py) and returning its blocks.

Blocks: ("h2", text) ("p", text) ("warn", text) ("list", [text]) ("table", header, rows)
("figure", name, Figure, caption) ("pre", text) ("details", summary, text); plain text, the
renderers escape it. Every figure is drawn here once; the renderers only encode it.
"""
from __future__ import annotations

import pandas as pd

from speedbench.analyse import add_costs, pick
from speedbench.report import plots
from speedbench.report.cells import flag, host_cell, map_ci, ms_ci, num
from speedbench.report.machine import efficiency_blocks, peak_rows
from speedbench.report.replication import invocations_of
from speedbench.report.report_data import ReportData
from speedbench.schema import STAGES

SAFETY = ("These are benchmark figures from one machine and a small held-out image set. They are no "
          "guarantee of latency or detection quality in a safety-relevant deployment (people, vehicles, "
          "machinery): such a deployment needs its own validation on its own hardware, data and failure "
          "modes, including worst-case latency under load.")

SAFETY_HOSTS = ("These are benchmark figures from the hosts listed below, each measured in its own run on a small "
                "held-out image set. They are no guarantee of latency or detection quality in a safety-relevant "
                "deployment (people, vehicles, machinery): such a deployment needs its own validation on its own "
                "hardware, data and failure modes, including worst-case latency under load.")


def safety(d: ReportData) -> str:
    return SAFETY_HOSTS if d.multi else SAFETY


def question(d: ReportData) -> list:
    """The question, the warnings a reader must see first, the answer and the safety note."""
    if d.multi:
        q = (f"Which host and configuration (model, input size, proposal count, thread setting) to run, among "
             f"{len(d.hosts)} hosts ({', '.join(d.hosts)})")
    else:
        cpu = (d.runs[0].meta.get("env") or {}).get("cpu_model") or "this CPU"
        q = f"Which detector configuration (model, input size, proposal count, thread setting) to run on {cpu}"
    if d.budget_ms:
        q += f" within {d.budget_ms:g} ms ({d.stat} latency)"
        q += ", at the lowest cost per million frames?" if d.prices is not None else "?"
    else:
        q += f", trading {d.stat} latency against accuracy?"
    blocks = [("h2", "The question"), ("p", q)]
    blocks += [("warn", w[0].upper() + w[1:] + ".") for w in d.data.warnings()]
    return blocks + _answer(d) + [("warn", safety(d))]


def _answer(d: ReportData) -> list:
    ok, col = d.ok, d.col
    if not len(ok):
        return [("warn", "No configuration was measured successfully; there is nothing to recommend.")]
    if d.budget_ms:
        return [("pre", pick(ok, d.budget_ms, latency=d.latency, prices=d.prices).to_text())]
    if d.multi:
        return [("list", [f"Host {h}: {_host_summary(d.by_host[d.by_host['host'] == h], col, d.trained)}"
                          for h in sorted(ok["host"].unique())]),
                ("p", "Pick within your budget with `speedbench pick RUN... --budget-ms X` "
                      "(add --price-table for the cheapest host per million frames).")]
    f = d.front
    front = f[f["frontier_status"] == "frontier"]
    if not len(front):  # every successful point lacks the latency column ranked on
        return [("warn", f"No successful configuration recorded {col}; there is nothing to rank.")]
    if d.trained:
        best = front.loc[front["map"].idxmax()] if front["map"].notna().any() else front.iloc[0]
        fast = front.loc[front[col].idxmin()]
        return [("p", f"{len(front)} configuration(s) are on the frontier, "
                      f"{int((f['frontier_status'] == 'tied').sum())} more are tied within noise. "
                      f"Fastest on the frontier: {fast['label']} ({fast[col]:.2f} ms, mAP {num(fast['map'], 3)}). "
                      f"Most accurate: {best['label']} ({best[col]:.2f} ms, mAP {num(best['map'], 3)}). "
                      "Pick within your budget with `speedbench pick`.")]
    fast = f.iloc[0]
    return [("p", f"Fastest: {fast['label']} ({fast[col]:.2f} ms). Accuracy is unavailable "
                  "(untrained weights), so this answers the latency question only.")]


def _host_summary(f, col, trained) -> str:
    """One host's answer from that host's own frontier."""
    front = f[f["frontier_status"] == "frontier"]
    if not len(front):  # the host's successful points all lack the latency column ranked on
        return f"no successful configuration recorded {col}; nothing to rank"
    fast = front.loc[front[col].idxmin()]
    text = f"fastest on its frontier {fast['config_label']} ({fast[col]:.2f} ms"
    if trained and front["map"].notna().any():
        best = front.loc[front["map"].idxmax()]
        return text + f", mAP {num(fast['map'], 3)}); most accurate {best['config_label']} ({best[col]:.2f} ms, " \
                      f"mAP {num(best['map'], 3)})"
    return text + "; accuracy unavailable)"


def hosts(d: ReportData) -> list:
    """Several hosts: which runs each host is and what it costs."""
    if not d.multi:
        return []
    prices, rows = d.prices, []
    for h in d.data.hosts.itertuples():
        price = "" if prices is None else (f"{prices[h.host]:g}" if h.host in prices else "not in table")
        rows.append([h.host, h.cpu_model or "", num(h.cores_logical, 0), "; ".join(h.runs), str(h.points),
                     price, ", ".join(h.shares_machine_with) or "-"])
    head = ["host", "CPU model", "logical cores", "run(s)", "points", "USD / host-hour", "shared machine with"]
    return [("h2", "Hosts"),
            ("p", "Each host's points were measured on that host, in its own run; a host is its label, or, "
                  "without one, its CPU model and core count. Compare hosts through their own frontiers, "
                  "not through single figures."),
            ("table", head if prices is not None else head[:5] + head[6:],
             rows if prices is not None else [r[:5] + r[6:] for r in rows])]


def environment(d: ReportData) -> list:
    blocks = [("h2", "Environment")]
    for r in d.runs:
        if d.multi:
            blocks.append(("p", f"Run {r.name}:"))
        blocks.append(("table", ["item", "value"], _env_rows(r)))
    return blocks


def _env_rows(run) -> list[list[str]]:
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


def frontier_section(d: ReportData) -> list:
    ok, col, stat = d.ok, d.col, d.stat
    blocks = [("h2", f"Frontier ({stat} latency vs accuracy)")]
    if not d.trained:
        blocks.append(("warn", "Accuracy is unavailable (untrained weights): configurations are ranked by "
                               "latency only, which says nothing about detection quality."))
    if d.multi:
        blocks.extend(_host_frontier_blocks(d))
    else:
        blocks.append(("figure", "frontier", plots.plot_frontier(ok, x=col), f"Frontier on {stat} latency. "
                       "Filled: on the frontier; black edge: beaten only within noise (tied); hollow: dominated."))
        f = d.front
        if len(f):
            keep = f[f["frontier_status"] != "dominated"]
            blocks.append(("table", ["status", "in its thread setting", "configuration", f"{stat} ms [CI]",
                                     "mAP [CI]", "peak MiB", "tied with"],
                           [[r["frontier_status"], d.within.get(r["point_id"], ""), r["label"], ms_ci(r, col),
                             map_ci(r), num(r.get("rss_peak_mib"), 0), r["tied_with"]] for _, r in keep.iterrows()]))
            blocks.append(("p", f"{int((f['frontier_status'] == 'dominated').sum())} dominated configuration(s) "
                                "are not listed here; they appear in the table of all points."))

    def draw(x, **kw):  # several hosts: side-by-side panels, never one mixed cloud of points
        if d.multi:
            return plots.plot_host_frontiers(ok, x=x, titles=plots.host_titles(d.data.hosts), **kw)
        return plots.plot_frontier(ok, x=x, **kw)

    if len(ok) and "rss_peak_mib" in ok.columns and ok["rss_peak_mib"].notna().any():
        blocks.append(("figure", "frontier_memory", draw("rss_peak_mib"), "Frontier on peak memory."))
    if len(ok) and "fps" in ok.columns and ok["fps"].notna().any():
        blocks.append(("figure", "frontier_fps", draw("fps", minimize_x=False),
                       "Frontier on single-stream throughput (frames/s)."))
    return blocks


def _host_frontier_blocks(d: ReportData) -> list:
    ok, col, stat = d.ok, d.col, d.stat
    blocks = [("figure", "frontier", plots.plot_host_frontiers(ok, x=col, titles=plots.host_titles(d.data.hosts)),
               f"Per-host frontiers on {stat} latency, side by side with shared axes. Marker: one-stage "
               "(circle) or two-stage (square); colour: model. Filled: on that host's frontier; black edge: "
               "tied within noise; hollow: dominated.")]
    if not len(ok):
        return blocks
    by_host = d.by_host
    across = dict(zip(d.front["point_id"], d.front["frontier_status"]))
    keep = by_host[by_host["frontier_status"] != "dominated"]
    blocks.append(("table", ["host", "status on its host", "across hosts", "in its thread setting", "configuration",
                             f"{stat} ms [CI]", "mAP [CI]", "peak MiB"],
                   [[host_cell(r), r["frontier_status"], across.get(r["point_id"], ""),
                     d.within.get(r["point_id"], ""), r["config_label"], ms_ci(r, col), map_ci(r),
                     num(r.get("rss_peak_mib"), 0)] for _, r in keep.iterrows()]))
    blocks.append(("p", f"{int((by_host['frontier_status'] == 'dominated').sum())} configuration(s) dominated on "
                        "their own host are not listed here; they appear in the table of all points. "
                        "\"Across hosts\" marks a point against every host's points: latencies from different "
                        "machines, each under its own run's conditions."))
    return blocks


def costs(d: ReportData) -> list:
    """Cost per million frames, when a price table was given."""
    if d.prices is None:
        return []
    ok, prices, col = d.ok, d.prices, d.col
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
    blocks.append(("table", ["host", "configuration", f"{d.stat} ms", "mAP", "frames/s", "frame rate from",
                             "USD / h", "USD / million frames"],
                   [[host_cell(r), r.get("config_label") or r["label"], num(r[col], 2), num(r.get("map"), 3),
                     num(r["frames_per_s"], 1), r["fps_source"], f"{r['usd_per_hour']:g}",
                     f"{r['usd_per_mframe']:.4g}"] for _, r in c.head(30).iterrows()]))
    missing = sorted(set(ok["host"].astype(str)) - set(prices))
    if missing:
        blocks.append(("p", f"No price for host(s) {', '.join(missing)}: left out of this table."))
    return blocks


def stages(d: ReportData) -> list:
    return [("h2", "Stage breakdown"), ("figure", "stages", plots.plot_stages(d.ok), _stage_caption(d.ok)),
            *efficiency_blocks(d.ok)]


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


def latency(d: ReportData) -> list:
    return [("h2", "Latency distributions"),
            ("figure", "latency", plots.plot_latency_distributions(d.samples, d.ok), "Raw samples per configuration.")]


def accuracy(d: ReportData) -> list:
    ok = d.ok
    blocks = [("h2", "Accuracy")]
    if not d.trained:
        return blocks + [("p", "Accuracy unavailable: every point used untrained weights.")]
    acc = ok[ok["map"].notna()].drop_duplicates(["model", "weights", "size", "proposals"])
    blocks.append(("table", ["model", "weights", "size", "proposals", "mAP [CI]", "AP50", "AP75"],
                   [[r["model"], r["weights"], num(r["size"], 0), num(r["proposals"], 0), map_ci(r),
                     num(r.get("map50"), 3), num(r.get("map75"), 3)] for _, r in acc.iterrows()]))
    blocks.append(("figure", "accuracy_size", plots.plot_accuracy_vs(ok, "size"), "mAP vs input size."))
    if ok["proposals"].nunique() > 1:
        blocks.append(("figure", "accuracy_proposals", plots.plot_accuracy_vs(ok, "proposals"),
                       "mAP vs proposal count."))
    return blocks


def memory(d: ReportData) -> list:
    return [("h2", "Memory"),
            ("figure", "memory", plots.plot_memory(d.ok), "Worker resident memory per configuration.")]


def all_points(d: ReportData) -> list:
    ok, failed = d.ok, d.failed
    reps = invocations_of(ok)
    blocks = [("h2", "All points"),
              ("table", ["configuration", "p50 [95 % CI]", "p90", "p99", "CoV", "R", "between CoV", "n", "fps",
                         "peak MiB", "mAP", "noisy"],
               [[r["label"], f"{num(r.get('lat_p50_ms'), 2)} [{num(r.get('lat_p50_ci_lo_ms'), 2)}, "
                 f"{num(r.get('lat_p50_ci_hi_ms'), 2)}]", num(r.get("lat_p90_ms"), 2),
                 num(r.get("lat_p99_ms"), 2), num(r.get("lat_cov"), 3), f"{int(reps[i])}",
                 num(r.get("between_cov"), 3), num(r.get("n_samples"), 0), num(r.get("fps"), 1),
                 num(r.get("rss_peak_mib"), 0), num(r.get("map"), 3), "yes" if flag(r.get("noisy")) else ""]
                for i, r in ok.sort_values(d.col).iterrows()])]
    if len(failed):
        blocks.append(("p", f"{len(failed)} configuration(s) failed and are excluded:"))
        blocks.append(("table", ["configuration", "reason"], [[r["label"], r["reason"]] for _, r in failed.iterrows()]))
    return blocks
