"""speedbench compare BASE NEW: regression verdict between two runs of one profile.

Exit status: 0 no regression, 1 regression, 2 usage or input error (including two runs
with no configuration in common: a gate must not pass on an empty comparison).
"""
from __future__ import annotations


def add_parser(subparsers):
    p = subparsers.add_parser(
        "compare", help="regression verdict between two runs (exit 1 on regression)",
        description="Match points by configuration; per point the ratio of median latencies with a "
                    "bootstrap CI, memory and accuracy deltas, detection drift and stage ratios; plus the "
                    "environment diff. Exit 0: no regression, 1: regression, 2: usage or input error.")
    p.add_argument("base", metavar="BASE_RUN", help="run directory before the change")
    p.add_argument("new", metavar="NEW_RUN", help="run directory after the change")
    p.add_argument("--threshold", default="5%", type=_fraction,
                   help="slowdown tolerated before a verdict of slower, e.g. 5%% or 0.05 (default 5%%)")
    p.add_argument("--confidence", default=0.95, type=_fraction, help="confidence of the intervals (default 0.95)")
    p.add_argument("--format", default="text", choices=["text", "md", "json"], help="output format")
    p.add_argument("--fail-on-drift", action="store_true",
                   help="count changed detections on the held-out images as a regression")
    p.add_argument("--seed", type=int, default=0, help="bootstrap seed (default 0)")
    p.add_argument("--host-adjusted", action="store_true",
                   help="gate on the latency verdict adjusted by the host speed probe (the machine's own "
                        "speed change between the runs) instead of the raw one; both are always shown "
                        "when they differ")
    p.set_defaults(run=run)


def _fraction(text: str) -> float:
    import argparse

    s = str(text).strip()
    try:
        return float(s[:-1]) / 100 if s.endswith("%") else float(s)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a fraction like 0.05 or a percentage like 5%, not {text!r}")


def run(args) -> int:
    from speedbench.analyse import Run, compare

    base, new = Run.load(args.base), Run.load(args.new)
    result = compare(base, new, threshold=args.threshold, confidence=args.confidence, seed=args.seed,
                     fail_on_drift=args.fail_on_drift, host_adjusted=args.host_adjusted)
    out = {"text": result.to_text, "md": result.to_markdown, "json": result.to_json}[args.format]()
    print(out)
    if not len(result.points):
        # Nothing in common cannot pass a gate silently: treat it as an input problem.
        import sys

        print(f"speedbench: error: {args.new}: no configuration in common with {args.base}; nothing compared",
              file=sys.stderr)
        return 2
    return 1 if result.regressed else 0
