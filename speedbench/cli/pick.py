"""speedbench pick RUN --budget-ms X: the best configuration within a latency budget."""
from __future__ import annotations


def add_parser(subparsers):
    p = subparsers.add_parser(
        "pick", help="best configuration within a latency budget, with runners-up and exclusions",
        description="Choose the most accurate configuration whose latency statistic fits the budget "
                    "(and the optional thread, memory and accuracy limits); explain every exclusion. "
                    "Exit 0: a configuration fits, 1: nothing fits, 2: usage or input error.")
    p.add_argument("run_dir", metavar="RUN", help="run directory written by `speedbench sweep`")
    p.add_argument("--budget-ms", type=float, required=True, metavar="X", help="latency budget per image (ms)")
    p.add_argument("--latency", default="p50", choices=["p50", "p90", "p99"], help="statistic held to the budget")
    p.add_argument("--threads", type=int, metavar="N", help="only configurations with N intra-op threads")
    p.add_argument("--max-memory-mb", type=float, metavar="M", help="peak worker memory limit (MiB)")
    p.add_argument("--min-map", type=float, metavar="A", help="minimum mAP (0-1)")
    p.set_defaults(run=run)


def run(args) -> int:
    from speedbench.analyse import Run, pick

    run_ = Run.load(args.run_dir)
    result = pick(run_.points, args.budget_ms, latency=args.latency, threads=args.threads,
                  max_memory_mb=args.max_memory_mb, min_map=args.min_map)
    print(result.to_text())
    return 0 if result.best is not None else 1  # 1: nothing fits (scripts can branch on it)
