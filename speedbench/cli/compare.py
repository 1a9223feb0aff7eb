"""speedbench compare: regression verdicts between two runs, or of one interleaved A/B run.

    speedbench compare BASE_RUN NEW_RUN                       two runs measured separately
    speedbench compare --envs OLD_PYTHON NEW_PYTHON PROFILE   old and new environment interleaved
    speedbench compare RUN                                    the verdicts of a stored interleaved run

Exit status: 0 no regression, 1 regression, 2 usage or input error (including two runs
with no configuration in common: a gate must not pass on an empty comparison).
"""
from __future__ import annotations

from speedbench.cli.args import int_in

USAGE = ("speedbench compare [options] BASE_RUN NEW_RUN\n"
         "       speedbench compare [options] --envs OLD_PYTHON NEW_PYTHON PROFILE\n"
         "       speedbench compare [options] INTERLEAVED_RUN")


def add_parser(subparsers):
    p = subparsers.add_parser(
        "compare", help="regression verdict between two runs, or old vs new environment interleaved (exit 1 on regression)",
        usage=USAGE,
        description="Match points by configuration; per point the ratio of median latencies with a "
                    "bootstrap CI, memory and accuracy deltas, detection drift and stage ratios; plus the "
                    "environment diff and the host's own speed change between the runs. With --envs: measure a "
                    "profile under two Python environments in one run, their worker invocations interleaved in "
                    "a seeded ABBA order, and judge the A/B pairs. "
                    "Exit 0: no regression, 1: regression, 2: usage or input error.")
    p.add_argument("base", metavar="BASE_RUN", nargs="?",
                   help="run directory before the change (with --envs: the profile; alone: an interleaved run)")
    p.add_argument("new", metavar="NEW_RUN", nargs="?", help="run directory after the change")
    p.add_argument("--threshold", default="5%", type=lambda t: _fraction(t, 0, 10, "[0, 10] (0%..1000%)"),
                   help="slowdown tolerated before a verdict of slower, e.g. 5%% or 0.05 (default 5%%)")
    p.add_argument("--confidence", default=0.95, type=lambda t: _fraction(t, 0.5, 0.9999, "[0.5, 0.9999]"),
                   help="confidence of the intervals, 0.5..0.9999 (default 0.95)")
    p.add_argument("--format", default="text", choices=["text", "md", "json"], help="output format")
    p.add_argument("--fail-on-drift", action="store_true",
                   help="count changed detections on the held-out images as a regression")
    p.add_argument("--seed", type=int_in(0, 2**32 - 1), default=0,
                   help="bootstrap seed, and with --envs the order's seed (default 0)")
    p.add_argument("--gate-single-process", action="store_true",
                   help="also fail on latency of points measured in one worker process on either side "
                        "(by default reported, not gated: one process cannot show how far a rerun moves); "
                        "BASE_RUN NEW_RUN only")
    p.add_argument("--host-adjusted", action="store_true",
                   help="gate on the latency verdict adjusted for the machine's own speed instead of the "
                        "raw one: by the host reference timed beside each point (same onnxruntime on both "
                        "sides), else by the host speed probe; both are always shown when they differ")
    g = p.add_argument_group("interleaved A/B run (--envs)")
    g.add_argument("--envs", nargs=2, metavar=("OLD_PYTHON", "NEW_PYTHON"),
                   help="the two environments' interpreters (e.g. two venvs' bin/python), each with the same "
                        "speedbench installed")
    g.add_argument("--pairs", type=int_in(1, 10**6), default=None,
                   help="A/B pairs of worker invocations per point (default: the profile's invocations, "
                        "i.e. as many worker processes per side as a sweep runs per point; 6 when that is 1)")
    g.add_argument("--same-graph", action="store_true",
                   help="measure one graph file (exported by OLD) in both environments, isolating the runtime; "
                        "default: each environment exports its own graph (the whole stack changes)")
    g.add_argument("-o", "--output", help="run directory (default: the profile's output with -interleaved)")
    g.add_argument("--resume", action="store_true", help="continue an interrupted interleaved run in --output")
    g.add_argument("-q", "--quiet", action="store_true", help="no progress display")
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
    from speedbench.errors import UserError

    interleaved_only = ("pairs", "same_graph", "output", "resume", "quiet")
    if args.envs:
        if not args.base or args.new:
            raise UserError("compare --envs OLD_PYTHON NEW_PYTHON PROFILE: give exactly one profile")
        if args.host_adjusted:
            raise UserError("--host-adjusted: an interleaved run needs no host adjustment (both sides share "
                            "its time window)")
        if args.gate_single_process:
            raise UserError("--gate-single-process: only with BASE_RUN NEW_RUN (an interleaved run is judged "
                            "on its A/B pairs of worker processes)")
        return _interleaved(args)
    used = [f"--{k.replace('_', '-')}" for k in interleaved_only if getattr(args, k) not in (None, False)]
    if used:
        raise UserError(f"{used[0]}: only with --envs OLD_PYTHON NEW_PYTHON PROFILE")
    if args.base and not args.new:
        from speedbench.analyse.interleaved import compare_run

        if args.gate_single_process:
            raise UserError("--gate-single-process: only with BASE_RUN NEW_RUN (an interleaved run is judged "
                            "on its A/B pairs of worker processes)")
        return _report(args, compare_run(args.base, threshold=args.threshold, confidence=args.confidence,
                                         seed=args.seed, fail_on_drift=args.fail_on_drift), args.base)
    if not args.base:
        raise UserError("compare: give BASE_RUN NEW_RUN, an interleaved run, or --envs OLD_PYTHON NEW_PYTHON PROFILE")
    from speedbench.analyse import Run, compare

    base, new = Run.load(args.base), Run.load(args.new)
    result = compare(base, new, threshold=args.threshold, confidence=args.confidence, seed=args.seed,
                     fail_on_drift=args.fail_on_drift, host_adjusted=args.host_adjusted,
                     gate_single_process=args.gate_single_process)
    return _report(args, result, f"{args.new}: no configuration in common with {args.base}")


def _interleaved(args) -> int:
    from speedbench.analyse.interleaved import compare_run
    from speedbench.sweep.interleaved import run_interleaved

    out = run_interleaved(args.base, args.envs[0], args.envs[1], out_dir=args.output, pairs=args.pairs, seed=args.seed,
                          same_graph=args.same_graph, resume=args.resume, quiet=args.quiet)
    result = compare_run(out, threshold=args.threshold, confidence=args.confidence, seed=args.seed,
                         fail_on_drift=args.fail_on_drift)
    return _report(args, result, f"{out}: no point measured")


def _report(args, result, empty_message: str) -> int:
    import sys

    print({"text": result.to_text, "md": result.to_markdown, "json": result.to_json}[args.format]())
    if not len(result.points):
        # Nothing in common cannot pass a gate silently: treat it as an input problem.
        print(f"speedbench: error: {empty_message}; nothing compared", file=sys.stderr)
        return 2
    return 1 if result.regressed else 0
