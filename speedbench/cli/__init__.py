"""Command line: a thin layer over the Python API.

Each sub-command lives in its own module here with two functions:
``add_parser(subparsers)`` and ``run(args) -> int``. Modules must import
quickly: heavy libraries (torch, onnxruntime, matplotlib) are imported inside
``run`` so that ``speedbench --help`` stays instant.
"""
from __future__ import annotations

import argparse
import importlib
import sys

from speedbench.errors import UserError

# Order is the order shown in --help.
COMMANDS = [
    "models", "export", "scenes", "evaluate", "measure", "sweep", "load",
    "frontier", "pick", "report", "compare", "size", "demo", "train",
]


def build_parser() -> argparse.ArgumentParser:
    from speedbench import __version__

    parser = argparse.ArgumentParser(
        prog="speedbench",
        description="Measure CPU object detectors and choose a configuration from the evidence.",
    )
    parser.add_argument("--version", action="version", version=f"speedbench {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMANDS:
        importlib.import_module(f"speedbench.cli.{name}").add_parser(sub)
    return parser




def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "run", None):
        parser.print_help()
        return 2
    try:
        return int(args.run(args) or 0)
    except UserError as exc:
        print(f"speedbench: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("speedbench: interrupted; results written so far are kept", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
