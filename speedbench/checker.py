"""Strict checking of parsed TOML tables: every problem one line, `<source>: <key path>: <what>`.

Shared by the sweep profile and the adapters of external graphs (speedbench.adapt).
"""
from __future__ import annotations

from speedbench.errors import UserError


class Checker:
    def __init__(self, source: str):
        self.source = source

    def fail(self, keypath: str, message: str):
        raise UserError(f"{self.source}: {keypath}: {message}")

    def table(self, value, keypath: str, allowed: set[str], required: set[str] = frozenset()) -> dict:
        if not isinstance(value, dict):
            self.fail(keypath, f"expected a table, got {kind(value)}")
        for key in value:
            if key not in allowed:
                self.fail(f"{keypath}.{key}" if keypath else key,
                          f"unknown key (allowed: {', '.join(sorted(allowed))})")
        for key in sorted(required):
            if key not in value:
                self.fail(f"{keypath}.{key}" if keypath else key, "missing required key")
        return value

    def int_(self, value, keypath: str, lo: int, hi: int) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            self.fail(keypath, f"expected an integer, got {kind(value)}")
        if not lo <= value <= hi:
            self.fail(keypath, f"{value} is out of range {lo}..{hi}")
        return value

    def num(self, value, keypath: str, lo: float, hi: float, open_lo=False, open_hi=False) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.fail(keypath, f"expected a number, got {kind(value)}")
        bad = value < lo or value > hi or (open_lo and value == lo) or (open_hi and value == hi)
        if bad or value != value:
            lo_s = f"({lo}" if open_lo else f"[{lo}"
            hi_s = f"{hi})" if open_hi else f"{hi}]"
            self.fail(keypath, f"{value} is out of range {lo_s}, {hi_s}")
        return float(value)

    def str_(self, value, keypath: str, choices=None, allow_empty=True) -> str:
        if not isinstance(value, str):
            self.fail(keypath, f"expected a string, got {kind(value)}")
        if choices is not None and value not in choices:
            self.fail(keypath, f"{value!r} is not one of {', '.join(choices)}")
        if not allow_empty and not value.strip():
            self.fail(keypath, "must not be empty")
        return value

    def bool_(self, value, keypath: str) -> bool:
        if not isinstance(value, bool):
            self.fail(keypath, f"expected true or false, got {kind(value)}")
        return value

    def list_(self, value, keypath: str, item, unique=True) -> tuple:
        if not isinstance(value, list):
            self.fail(keypath, f"expected a list, got {kind(value)}")
        if not value:
            self.fail(keypath, "must not be empty")
        out = tuple(item(v, f"{keypath}[{i}]") for i, v in enumerate(value))
        if unique and len(set(out)) != len(out):
            dup = next(v for v in out if out.count(v) > 1)
            self.fail(keypath, f"lists {dup!r} more than once")
        return out


def kind(value) -> str:
    return {bool: "a boolean", int: "an integer", float: "a number", str: "a string",
            list: "a list", dict: "a table"}.get(type(value), type(value).__name__)
