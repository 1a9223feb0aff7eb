"""speedbench pick RUN [RUN ...] --budget-ms X: the best configuration (and host) within a latency budget."""
from __future__ import annotations

from speedbench.cli.args import float_in, int_in


def add_parser(subparsers):
    p = subparsers.add_parser(
        "pick", help="best configuration (and host) within a latency budget, with runners-up and exclusions",
        description="Choose the most accurate configuration whose latency statistic fits the budget "
                    "(and the optional thread, memory and accuracy limits); explain every exclusion. "
                    "With several runs (one per host, or a parent directory of them) the answer names the "
                    "host; with --price-table it is the cheapest per million frames. "
                    "Exit 0: a configuration fits, 1: nothing fits, 2: usage or input error.")
    p.add_argument("run_dirs", nargs="+", metavar="RUN",
                   help="run directory written by `speedbench sweep`; several, or a parent of several "
                        "(a fleet sweep's output), to choose between hosts")
    p.add_argument("--budget-ms", type=float_in(0, 1e6, open_lo=True), required=True, metavar="X",
                   help="latency budget per image (ms), (0, 1e6]")
    p.add_argument("--latency", default="p50", choices=["p50", "p90", "p99"], help="statistic held to the budget")
    p.add_argument("--threads", type=int_in(0, 256), metavar="N", help="only configurations with N intra-op threads (0..256)")
    p.add_argument("--max-memory-mb", type=float_in(0, 1e7, open_lo=True), metavar="M",
                   help="peak worker memory limit (MiB), (0, 1e7]")
    p.add_argument("--min-map", type=float_in(0, 1), metavar="A", help="minimum mAP, [0, 1]")
    p.add_argument("--precision", choices=["fp32", "int8"], help="only configurations of this precision")
    p.add_argument("--price-table", metavar="FILE",
                   help="USD per host-hour: TOML `[prices] label = 0.34` or CSV `host,usd_per_hour`; "
                        "the pick becomes the cheapest per million frames")
    p.set_defaults(run=run)


def run(args) -> int:
    from speedbench.analyse import combine, load_prices, load_runs, pick

    prices = load_prices(args.price_table) if args.price_table else None
    data = combine(load_runs(args.run_dirs))
    if prices is not None:
        unknown = sorted(set(prices) - set(data.host_names))
        if unknown:
            print(f"note: {args.price_table}: no run for host(s) {', '.join(unknown)}; "
                  f"hosts in these runs: {', '.join(data.host_names)}")
    for w in data.warnings():
        print(f"WARNING: {w}")
    result = pick(data.points, args.budget_ms, latency=args.latency, threads=args.threads,
                  max_memory_mb=args.max_memory_mb, min_map=args.min_map, prices=prices,
                  precision=args.precision)
    print(result.to_text())
    return 0 if result.best is not None else 1  # 1: nothing fits (scripts can branch on it)
