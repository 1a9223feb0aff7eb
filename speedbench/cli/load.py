"""`speedbench load PROFILE-or-RUN [-k 1,2]`: throughput of K concurrent workers per point.

A thin layer over speedbench.sweep.throughput (load_into_run / load_from_profile).
"""
from __future__ import annotations

import sys
from pathlib import Path

from speedbench.cli.args import float_in, int_in, output_dir

def add_parser(subparsers):
    p = subparsers.add_parser(
        "load", help="throughput under concurrency: K workers per point (frames/s, p99 under load)",
        description="Measure aggregate frames/s, per-request latency under load, scaling efficiency "
                    "and Little's-law concurrency with K concurrent worker processes per point.")
    p.add_argument("target", metavar="PROFILE-or-RUN", help="a profile (.toml) or a run directory")
    p.add_argument("-k", "--concurrency", default="1,2", help="worker counts K, comma-separated (default 1,2)")
    p.add_argument("--seconds", type=float_in(0, 3600, open_lo=True), default=5.0,
                   help="measurement window per K, (0, 3600] (default 5)")
    p.add_argument("--pin", action="store_true", help="pin each worker to its own T cores")
    p.add_argument("--invocations", type=int_in(1, 100), default=None,
                   help="R: independent launches of the K workers per K, each its own window; throughput "
                        "and p99 intervals then cover launch-to-launch variation (default: the profile's "
                        "[repetitions] invocations)")
    p.add_argument("--utilisation", default="0.5,0.7,0.9",
                   help="for the largest K, paced-arrival runs at these fractions of its throughput "
                        "(latency incl. queueing, read by `speedbench size`); 'none' to skip "
                        "(default 0.5,0.7,0.9)")
    p.add_argument("-o", "--out", default=None, type=output_dir, help="run directory to create (profile mode)")
    p.add_argument("--quiet", action="store_true", help="no per-point lines")
    p.set_defaults(run=run)


def run(args) -> int:
    from speedbench.errors import UserError
    from speedbench.sweep.throughput import load_from_profile, load_into_run

    ks = parse_ks(args.concurrency)
    utils = parse_utilisations(args.utilisation)
    if not args.seconds > 0:
        raise UserError(f"--seconds: must be > 0, got {args.seconds}")
    target = Path(args.target)
    if target.is_dir():
        if args.out:
            raise UserError("-o/--out: only with a profile; a run directory gets its rows in place")
        counts = load_into_run(target, ks, seconds=args.seconds, pin=args.pin, utilisations=utils,
                               invocations=args.invocations,
                               report=None if args.quiet else _report)
        out = target
    elif target.suffix == ".toml" or target.is_file():
        out = load_from_profile(target, ks, out_dir=args.out, seconds=args.seconds, pin=args.pin,
                                invocations=args.invocations,
                                utilisations=utils, report=None if args.quiet else _report)
        counts = None
    else:
        raise UserError(f"{target}: neither a run directory nor a profile file")
    if counts is not None:
        print(f"{counts['ok']} load point(s) ok, {counts['failed']} failed; rows added to {out}")
    else:
        print(f"wrote {out}")
    return 0


def parse_ks(text) -> list[int]:
    from speedbench.errors import UserError

    ks = []
    for part in str(text).split(","):
        part = part.strip()
        if not part:
            continue
        try:
            k = int(part)
        except ValueError:
            raise UserError(f"-k/--concurrency: {part!r} is not a whole number") from None
        if not 1 <= k <= 256:
            raise UserError(f"-k/--concurrency: K must be >= 1 and <= 256, got {k}")
        ks.append(k)
    if not ks:
        raise UserError("-k/--concurrency: give at least one K, e.g. -k 1,2")
    return sorted(set(ks))


def parse_utilisations(text) -> tuple:
    from speedbench.errors import UserError

    if str(text).strip().lower() in ("", "none", "0"):
        return ()
    out = []
    for part in str(text).split(","):
        try:
            u = float(part)
        except ValueError:
            raise UserError(f"--utilisation: {part.strip()!r} is not a number") from None
        if not 0 < u <= 1.5:   # also refuses nan
            raise UserError(f"--utilisation: each must be in (0, 1.5], got {u:g}")
        out.append(u)
    return tuple(out)


def _report(label: str, row, reason: str) -> None:
    if row is None:
        print(f"  {label}: not measured, {reason}", file=sys.stderr)
    else:
        print(f"  {label}: " + (_describe(row) if row["status"] == "ok" else f"failed: {reason}"), file=sys.stderr)


def _describe(row: dict) -> str:
    import json

    text = (f"{row['tput_fps']:.2f} frames/s, p99 {row['tput_p99_ms']:.1f} ms under load, "
            f"scaling efficiency {row['scaling_eff']:.2f}, "
            f"L={row['littles_L']:.2f} (X*W={row['littles_XW']:.2f})")
    curve = row.get("load_curve")
    for e in json.loads(curve) if isinstance(curve, str) and curve else []:
        text += (f"\n    paced at {e['load']:.0%} of capacity ({e['offered_fps']:.1f} frames/s): busy "
                 f"{e['util']:.2f}, p99 {e['p99_ms']:.1f} ms" if e["status"] == "ok" else f"\n    paced: {e['status']}")
    return text
