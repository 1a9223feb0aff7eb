"""speedbench report RUN [RUN ...] -o report.html: a self-contained review report."""
from __future__ import annotations

from speedbench.cli.args import float_in, output_file


def add_parser(subparsers):
    p = subparsers.add_parser(
        "report", help="self-contained HTML (and optionally Markdown) report of one or more runs",
        description="Write a design-review report: the question answered, environment, method, frontier, "
                    "stage breakdown, tables, accuracy with CIs and caveats. Runs from several hosts (or a "
                    "parent directory of them, as a fleet sweep writes) give per-host frontiers side by side.")
    p.add_argument("run_dirs", nargs="+", metavar="RUN",
                   help="run directory, or a parent of run directories (several: one report over all, per host)")
    p.add_argument("-o", "--output", default="report.html", metavar="FILE", type=output_file(".html", ".htm"),
                   help="HTML file (.html; default report.html)")
    p.add_argument("--markdown", action="store_true", help="also write FILE.md with the figures as PNGs beside it")
    p.add_argument("--budget-ms", type=float_in(0, 1e6, open_lo=True), metavar="X",
                   help="answer the question for this latency budget (ms), (0, 1e6]")
    p.add_argument("--latency", default="p50", choices=["p50", "p90", "p99"], help="latency statistic")
    p.add_argument("--price-table", metavar="FILE",
                   help="USD per host-hour (TOML `[prices] label = 0.34` or CSV `host,usd_per_hour`): "
                        "adds cost per million frames; with --budget-ms the answer is the cheapest")
    p.set_defaults(run=run)


def run(args) -> int:
    import os
    from pathlib import Path

    os.environ.setdefault("MPLBACKEND", "Agg")
    from speedbench.analyse import load_prices, load_runs
    from speedbench.report import render_reports

    prices = load_prices(args.price_table) if args.price_table else None
    runs = load_runs(args.run_dirs)
    outs = render_reports(runs, args.output, Path(args.output).with_suffix(".md") if args.markdown else None,
                          budget_ms=args.budget_ms, latency=args.latency, prices=prices)
    print(f"report written to {outs[0]}")
    if args.markdown:
        print(f"markdown written to {outs[1]}")
    return 0
