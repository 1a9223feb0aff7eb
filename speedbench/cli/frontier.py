"""speedbench frontier RUN [RUN ...]: the configurations worth considering, per host and per thread setting.

Several runs (or a parent directory holding one run directory per host, as a fleet sweep
writes) give one frontier per host, each row also marked against every host's points.
"""
from __future__ import annotations

from speedbench.cli.args import output_file

AXES = {"latency": None, "memory": "rss_peak_mib", "fps": "fps"}


def add_parser(subparsers):
    p = subparsers.add_parser(
        "frontier", help="Pareto frontier of a run: latency, memory or throughput against accuracy",
        description="Mark every configuration as on the frontier, tied within noise, or dominated, "
                    "overall and within its thread setting; optionally draw the plot.")
    p.add_argument("run_dirs", nargs="+", metavar="RUN",
                   help="run directory written by `speedbench sweep`; several (or a parent of several, "
                        "e.g. a fleet sweep's output) give one frontier per host")
    p.add_argument("--latency", default="p50", choices=["p50", "p90", "p99"], help="latency statistic (default p50)")
    p.add_argument("--axis", default="latency", choices=sorted(AXES),
                   help="cost axis against accuracy: latency (default), memory (peak RSS) or fps (throughput)")
    p.add_argument("--all", action="store_true", help="also list dominated configurations")
    p.add_argument("-o", "--output", metavar="FILE.png", type=output_file(".png", ".svg"),
                   help="draw the frontier plot (.png or .svg)")
    p.set_defaults(run=run)


def x_column(axis: str, latency: str) -> tuple[str, bool]:
    from speedbench.analyse.common import latency_col

    col = AXES[axis] or latency_col(latency)
    return col, axis != "fps"


def run(args) -> int:
    import os

    os.environ.setdefault("MPLBACKEND", "Agg")
    from speedbench.analyse import combine, frontier, load_runs

    data = combine(load_runs(args.run_dirs))
    x, minimize = x_column(args.axis, args.latency)
    pts = data.points
    if not data.multi_host:
        overall = frontier(pts, x=x, minimize_x=minimize)
        per = frontier(pts, x=x, minimize_x=minimize, by=["intra_threads", "inter_threads"])
        overall["in_thread_setting"] = overall["point_id"].map(dict(zip(per["point_id"], per["frontier_status"])))
        print(format_table(overall, x, show_all=args.all))
    else:
        for w in data.warnings():
            print(f"WARNING: {w}")
        by_host = frontier(pts, x=x, minimize_x=minimize, by="host")
        per = frontier(pts, x=x, minimize_x=minimize, by=["host", "intra_threads", "inter_threads"])
        across = frontier(pts, x=x, minimize_x=minimize)
        by_host["in_thread_setting"] = by_host["point_id"].map(dict(zip(per["point_id"], per["frontier_status"])))
        by_host["across_hosts"] = by_host["point_id"].map(dict(zip(across["point_id"], across["frontier_status"])))
        for h in data.hosts.itertuples():
            mine = by_host[by_host["host"] == h.host]
            mine.attrs.update(by_host.attrs)
            ex = by_host.attrs.get("excluded")
            if ex is not None and len(ex):
                mine.attrs["excluded"] = ex[ex["point_id"].astype(str).str.endswith(f"@{h.host}")]
            print(f"== host {h.host}: {host_line(h)}")
            print(format_table(mine, x, show_all=args.all))
            print()
        print("status: frontier of that host's own points; across hosts: against every host's points "
              "(latency from different machines; each run's conditions apply)")
    if args.output:
        from speedbench.report import plot_frontier, plot_host_frontiers
        from speedbench.report.plots import host_titles

        if data.multi_host:
            plot_host_frontiers(pts, args.output, x=x, minimize_x=minimize, titles=host_titles(data.hosts))
        else:
            plot_frontier(pts, args.output, x=x, minimize_x=minimize)
        print(f"plot written to {args.output}")
    return 0


def host_line(h) -> str:
    cpu = h.cpu_model or "CPU model not recorded"
    cores = f", {h.cores_logical} logical cores" if h.cores_logical == h.cores_logical and h.cores_logical else ""
    return f"{cpu}{cores} ({len(h.runs)} run(s), {h.points} point(s))"


def format_table(f, x: str, show_all: bool = False) -> str:
    import pandas as pd

    lines = []
    if not len(f):
        lines.append("no usable configuration (all failed, or the cost axis was not recorded): no frontier")
    elif not f["accuracy_available"].any():
        lines.append("accuracy unavailable (untrained weights): ranked by the cost axis only")
    rows = f if show_all else f[f["frontier_status"] != "dominated"]
    across = "across_hosts" in f.columns
    head = ["status", "in thread setting", *(["across hosts"] if across else []), "configuration", x, "mAP", "note"]
    body = []
    for _, r in rows.iterrows():
        lo, hi = _ci(r, x)
        val = f"{r[x]:.2f}" + (f" [{lo:.2f}, {hi:.2f}]" if lo is not None else "")
        m = r.get("map")
        acc = "n/a" if m is None or pd.isna(m) else f"{m:.3f}" + (
            f" [{r['map_ci_lo']:.3f}, {r['map_ci_hi']:.3f}]" if pd.notna(r.get("map_ci_lo")) else "")
        note = (f"tied with {r['tied_with']}" if r["tied_with"] else
                f"dominated by {r['dominated_by']}" if r["dominated_by"] else "")
        body.append([r["frontier_status"], r.get("in_thread_setting", ""),
                     *([r.get("across_hosts", "")] if across else []),
                     r.get("config_label") if across else r["label"], val, acc, note])
    widths = [max(len(str(c)) for c in col) for col in zip(head, *body)]
    for cells in ([head] + body) if body else []:
        lines.append("  ".join(str(c).ljust(w) for c, w in zip(cells, widths)).rstrip())
    hidden = int((f["frontier_status"] == "dominated").sum()) if not show_all else 0
    if hidden:
        lines.append(f"({hidden} dominated configuration(s) not shown; --all lists them)")
    ex = f.attrs.get("excluded")
    if ex is not None and len(ex):
        lines.append(f"{len(ex)} configuration(s) left out:")
        lines += [f"  {r['label']}: {r['reason']}" for _, r in ex.iterrows()]
    return "\n".join(lines)


def _ci(r, x):
    from speedbench.analyse.common import ci_columns

    cols = ci_columns(x)
    if cols and all(c in r.index for c in cols):
        import pandas as pd

        lo, hi = r[cols[0]], r[cols[1]]
        if pd.notna(lo) and pd.notna(hi):
            return lo, hi
    return None, None
