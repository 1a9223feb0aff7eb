"""Argument types shared by the sub-commands: every number gets its range and every output
path its allowed suffixes, checked by argparse while parsing, so before any work starts.

A refused value is one line (`speedbench: error: argument --min-map: ...`) and exit status 2.
"""
from __future__ import annotations

import argparse
import math
import os
from pathlib import Path

MAX_NAME_BYTES = 255   # one path component, on every common Linux / macOS file system


class Parser(argparse.ArgumentParser):
    """argparse with one-line errors: `speedbench: error: argument --min-map: ... (see speedbench pick --help)`,
    exit status 2 (main() returns it, like every other user mistake)."""

    def error(self, message):
        self.exit(2, f"speedbench: error: {' '.join(message.split())} (see {self.prog} --help)\n")


def _number(text, kind):
    try:
        value = kind(str(text).strip())
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected {'a whole number' if kind is int else 'a number'}, "
                                         f"not {text!r}") from None
    if kind is float and not math.isfinite(value):
        raise argparse.ArgumentTypeError(f"must be finite, not {text!r}")
    return value


def _fmt(v) -> str:
    return f"{v:g}" if isinstance(v, float) else str(v)


def int_in(lo: int, hi: int):
    """argparse type: an integer in [lo, hi]."""
    def parse(text):
        v = _number(text, int)
        if not lo <= v <= hi:
            raise argparse.ArgumentTypeError(f"must be between {lo} and {hi}, not {text}")
        return v
    parse.__name__ = "integer"
    return parse


def float_in(lo: float, hi: float, open_lo: bool = False, open_hi: bool = False):
    """argparse type: a finite number in [lo, hi] (open ends where asked)."""
    def parse(text):
        v = _number(text, float)
        if v < lo or v > hi or (open_lo and v == lo) or (open_hi and v == hi):
            left, right = "(" if open_lo else "[", ")" if open_hi else "]"
            raise argparse.ArgumentTypeError(f"must be in {left}{_fmt(lo)}, {_fmt(hi)}{right}, not {text}")
        return v
    parse.__name__ = "number"
    return parse


def output_file(*suffixes: str):
    """argparse type: a file to write, with one of `suffixes`, in an existing writable directory."""
    def parse(text):
        path = Path(text)
        if path.is_dir():
            raise argparse.ArgumentTypeError(f"{path}: is a directory; give a file name")
        if path.suffix.lower() not in suffixes:
            raise argparse.ArgumentTypeError(f"{text}: the file name must end in {' or '.join(suffixes)}")
        check_writable_place(path)
        return text
    parse.__name__ = "output file"
    return parse


def output_dir(text):
    """argparse type: a directory to create or fill (a run directory): a name the file system can hold."""
    path = Path(text)
    if "\0" in text:
        raise argparse.ArgumentTypeError("the path contains a NUL character")
    for part in path.parts:
        if len(os.fsencode(part)) > MAX_NAME_BYTES:
            raise argparse.ArgumentTypeError(f"{part[:40]}...: a path component longer than {MAX_NAME_BYTES} bytes")
    return text


def check_writable_place(path: Path) -> None:
    """The folder `path` goes into must exist and be writable (the file itself need not exist)."""
    output_dir(str(path))
    parent = path.parent if str(path.parent) else Path(".")
    if path.is_dir():
        raise argparse.ArgumentTypeError(f"{path}: is a directory; give a file name")
    if not parent.is_dir():
        raise argparse.ArgumentTypeError(f"{path}: folder {parent} does not exist")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise argparse.ArgumentTypeError(f"{path}: folder {parent} is not writable (read-only or no permission)")


def cluster_address(text):
    """argparse type: a scheduler address, [tcp|tls|ws|wss|ucx]://HOST:PORT (or HOST:PORT), checked for form."""
    from speedbench.errors import UserError
    from speedbench.fleet.engine import check_address

    try:
        check_address(text)
    except UserError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a scheduler address such as tcp://HOST:8786") from None
    return text.strip()
