"""Command line: a thin layer over the Python API.

Each sub-command lives in its own module here with two functions:
``add_parser(subparsers)`` and ``run(args) -> int``. Modules must import
quickly: heavy libraries (torch, onnxruntime, matplotlib) are imported inside
``run`` so that ``speedbench --help`` stays instant.
"""
from __future__ import annotations

import argparse
import errno
import gc
import importlib
import os
import signal
import sqlite3
import sys

from speedbench.cli.args import Parser
from speedbench.errors import UserError, storage_error

# OSErrors that are the machine's state, not a bug: a one-line error, not a traceback.
PLACE_ERRNOS = {errno.ENOSPC, errno.EDQUOT, errno.EROFS, errno.EACCES, errno.EPERM, errno.ENAMETOOLONG}


class Terminated(KeyboardInterrupt):
    """SIGTERM, raised in the main thread so that every `finally` runs (workers stopped, temp files removed)."""


def _on_sigterm(signum, frame):
    raise Terminated()

# Order is the order shown in --help.
COMMANDS = [
    "models", "export", "scenes", "evaluate", "measure", "sweep", "load",
    "frontier", "pick", "report", "compare", "size", "demo", "train",
]


def build_parser(only: str | None = None) -> argparse.ArgumentParser:
    """The command-line parser; only: build just that command's subparser (a run of one
    command need not import the other fourteen modules: part of a cached sweep's start-up)."""
    from speedbench import __version__

    parser = Parser(
        prog="speedbench",
        description="Measure CPU object detectors and choose a configuration from the evidence.",
    )
    parser.add_argument("--version", action="version", version=f"speedbench {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMANDS if only is None else [only]:
        importlib.import_module(f"speedbench.cli.{name}").add_parser(sub)
    return parser




def entry() -> None:
    """The `speedbench` program (the console script, and python -m speedbench): main(), then exit."""
    try:
        code = main()
    except BrokenPipeError:
        # The reader went away (`speedbench ... | head`): not an error worth a traceback. Point
        # stdout at /dev/null so the interpreter's final flush does not fail again (the
        # recipe in Python's signal module documentation).
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        sys.exit(1)
    # At exit the interpreter's last cycle collection walks every object the command left,
    # all about to go with the process: some 30 ms of `evaluate`'s 0.8 s. The command has
    # closed its files and runs by now, and frozen objects are skipped by that pass.
    gc.freeze()
    sys.exit(code)


def main(argv: list[str] | None = None) -> int:
    words = sys.argv[1:] if argv is None else argv
    # A known command first: the other commands' parsers are not needed (top-level help,
    # --version and a mistyped command still get the full parser).
    parser = build_parser(words[0] if words and words[0] in COMMANDS else None)
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:   # --help / --version (0), or a refused argument, already said in one line (2)
        return exc.code if isinstance(exc.code, int) else 2
    if not getattr(args, "run", None):
        parser.print_help()
        return 2
    import threading

    main_thread = threading.current_thread() is threading.main_thread()
    previous = signal.signal(signal.SIGTERM, _on_sigterm) if main_thread else None
    try:
        return int(args.run(args) or 0)
    except UserError as exc:
        print(f"speedbench: error: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:
        if exc.errno not in PLACE_ERRNOS:
            raise
        # A full disk or a read-only place met outside the run directory's own writes.
        print(f"speedbench: error: {storage_error(exc, exc.filename or '?')}", file=sys.stderr)
        return 2
    except sqlite3.OperationalError as exc:
        if (getattr(exc, "sqlite_errorcode", None) or 0) & 0xFF != sqlite3.SQLITE_FULL:
            raise
        print(f"speedbench: error: no space left on device ({exc})", file=sys.stderr)
        return 2
    except Terminated:
        print("speedbench: terminated; results written so far are kept", file=sys.stderr)
        return 143
    except KeyboardInterrupt:
        print("speedbench: interrupted; results written so far are kept", file=sys.stderr)
        return 130
    finally:
        if main_thread:
            signal.signal(signal.SIGTERM, previous)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
