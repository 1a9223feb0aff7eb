"""speedbench compare BASE NEW: regression verdict between two runs of one profile.

Exit status: 0 no regression, 1 regression, 2 usage or input error (including two runs
with no configuration in common: a gate must not pass on an empty comparison).
"""
from __future__ import annotations

from speedbench.cli.args import int_in


def add_parser(subparsers):
    p = subparsers.add_parser(
        "compare", help="regression verdict between two runs (exit 1 on regression)",
        description="Match points by configuration; per point the ratio of median latencies with a "
                    "bootstrap CI, memory and accuracy deltas, detection drift and stage ratios; plus the "
                    "environment diff. Exit 0: no regression, 1: regression, 2: usage or input error.")
    p.add_argument("base", metavar="BASE_RUN", help="run directory before the change")
    p.add_argument("new", metavar="NEW_RUN", help="run directory after the change")
    p.add_argument("--threshold", default="5%", type=lambda t: _fraction(t, 0, 10, "[0, 10] (0%..1000%)"),
                   help="slowdown tolerated before a verdict of slower, e.g. 5%% or 0.05 (default 5%%)")
    p.add_argument("--confidence", default=0.95, type=lambda t: _fraction(t, 0.5, 0.9999, "[0.5, 0.9999]"),
                   help="confidence of the intervals, 0.5..0.9999 (default 0.95)")
    p.add_argument("--format", default="text", choices=["text", "md", "json"], help="output format")
    p.add_argument("--fail-on-drift", action="store_true",
                   help="count changed detections on the held-out images as a regression")
    p.add_argument("--seed", type=int_in(0, 2**32 - 1), default=0, help="bootstrap seed (default 0)")
    p.add_argument("--gate-single-process", action="store_true",
                   help="also fail on latency of points measured in one worker process on either side "
                        "(by default reported, not gated: one process cannot show how far a rerun moves)")
    p.set_defaults(run=run)


def _fraction(text: str, lo: float = 0.0, hi: float = 10.0, span: str = "[0, 10]") -> float:
    import argparse
    import math

    s = str(text).strip()
    try:
        value = float(s[:-1]) / 100 if s.endswith("%") else float(s)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a fraction like 0.05 or a percentage like 5%, not {text!r}")
    if not (math.isfinite(value) and lo <= value <= hi):
        raise argparse.ArgumentTypeError(f"must be in {span}, not {text}")
    return value


def run(args) -> int:
    from speedbench.analyse import Run, compare

    base, new = Run.load(args.base), Run.load(args.new)
    result = compare(base, new, threshold=args.threshold, confidence=args.confidence, seed=args.seed,
                     fail_on_drift=args.fail_on_drift, gate_single_process=args.gate_single_process)
    out = {"text": result.to_text, "md": result.to_markdown, "json": result.to_json}[args.format]()
    print(out)
    if not len(result.points):
        # Nothing in common cannot pass a gate silently: treat it as an input problem.
        import sys

        print(f"speedbench: error: {args.new}: no configuration in common with {args.base}; nothing compared",
              file=sys.stderr)
        return 2
    return 1 if result.regressed else 0
