"""python -m speedbench.fleet PROFILE --cluster ADDRESS [-o DIR] [--resume] [--hosts a,b]

The same as `speedbench sweep PROFILE --cluster ADDRESS` once the sweep command forwards it.
"""
from __future__ import annotations

import argparse
import sys

from speedbench.cli.args import Parser, float_in
from speedbench.errors import UserError


def build_parser() -> argparse.ArgumentParser:
    p = Parser(
        prog="python -m speedbench.fleet",
        description="Run a sweep profile on every host of a Dask cluster: each point on a worker of its host "
                    "label, one point at a time per host, one run directory per host.")
    p.add_argument("profile", help="profile TOML file (see profiles/)")
    p.add_argument("--cluster", required=True, metavar="ADDRESS", help="Dask scheduler address, e.g. tcp://HOST:8786")
    p.add_argument("-o", "--output", metavar="DIR", help="parent directory of the per-host run directories DIR/<label>/")
    p.add_argument("--resume", action="store_true", help="measure only the points each host's run directory lacks")
    p.add_argument("--retry-failed", action="store_true",
                   help="with --resume: measure the points stored as failed again as well")
    p.add_argument("--hosts", metavar="A,B", help="only these host labels (default: every label the cluster advertises)")
    p.add_argument("--lost-after", type=float_in(0, 86400, open_lo=True), default=120.0, metavar="SECONDS",
                   help="a host with no worker for this long is given up on (default 120)")
    p.add_argument("-q", "--quiet", action="store_true", help="one plain line per point instead of a progress bar")
    return p


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        from speedbench.fleet import run_fleet_sweep

        outs = run_fleet_sweep(args.profile, args.cluster, out_dir=args.output, resume=args.resume,
                               hosts=args.hosts, quiet=args.quiet, lost_after_s=args.lost_after,
                               retry_failed=args.retry_failed)
    except UserError as exc:
        print(f"speedbench: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("speedbench: interrupted; results written so far are kept", file=sys.stderr)
        return 130
    for label, path in outs.items():
        print(f"{label}: {path}")
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
