"""Reading JSON from files we do not control (annotations, detections, a run's meta.json and rows).

Python's json module recurses once per nesting level and turns any integer or
float literal into a Python number, so a hostile or damaged file can raise
RecursionError (deep nesting), OverflowError later (an integer too large for a
float) or carry inf (1e999). parse_json bounds all three and turns every
problem into one UserError naming the source:

- nesting deeper than MAX_DEPTH levels is refused before parsing;
- integers must fit in 64 bits (what numpy and SQLite hold), floats must be
  finite (JSON has no NaN or Infinity; 1e999 parses as inf and is refused);
- what each field means (a positive width, an id in range) is still checked by
  the parser of that file.
"""
from __future__ import annotations

import json
import math
import re
from pathlib import Path

from speedbench.errors import UserError

try:  # the optional extra speedbench[fast]: about 3x faster on a large detections file
    import orjson
except ImportError:  # pragma: no cover - exercised by tests that hide it
    orjson = None

MAX_DEPTH = 64              # nesting levels of arrays / objects; COCO files use 4
INT_LIMIT = 2**63           # integers must lie in [-2**63, 2**63)
_STRINGS = re.compile(r'"(?:[^"\\]|\\.)*"', re.DOTALL)
# Text in which a number could fall outside what parse_json accepts: 19+ digits in a row (an
# integer at or past 2**63, a float that overflows) or a 3-digit exponent. Only such text
# needs the standard library's per-number checks; any other text orjson parses to the same objects.
_RISKY_NUMBER = re.compile(rb"\d{19}|[eE][+-]?\d{3}")


class _BadNumber(ValueError):
    pass


def _int(text: str) -> int:
    # Length first: int() of a 5000-digit literal is itself refused by Python (ValueError).
    if len(text.lstrip("-")) > 20:
        raise _BadNumber(f"integer {text[:24]}... out of range")
    value = int(text)
    if not -INT_LIMIT <= value < INT_LIMIT:
        raise _BadNumber(f"integer {text} out of range (beyond 64 bits)")
    return value


def _float(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):
        raise _BadNumber(f"number {text[:24]} is not finite")
    return value


def _constant(name: str):
    raise _BadNumber(f"{name} is not a JSON number")


def nesting_depth(text: str) -> int:
    """Deepest nesting of [ and { outside string literals."""
    import numpy as np

    bare = _STRINGS.sub("", text).encode("utf-8", "replace")
    codes = np.frombuffer(bare, dtype=np.uint8)
    step = np.isin(codes, (0x5B, 0x7B)).astype(np.int32) - np.isin(codes, (0x5D, 0x7D)).astype(np.int32)
    return int(np.cumsum(step).max()) if len(step) else 0


def parse_json(text: str, source, max_depth: int = MAX_DEPTH, allow_nonfinite: bool = False):
    """json.loads with bounded nesting and numbers; a UserError names `source` on any problem.

    allow_nonfinite: accept NaN / Infinity (files speedbench writes itself: Python's json
    writes them inside lists); user inputs get them refused."""
    if nesting_depth(text) > max_depth:
        raise UserError(f"{source}: JSON nested deeper than {max_depth} levels; refused")
    if orjson is not None:
        data = text.encode("utf-8", "surrogatepass") if isinstance(text, str) else text
        if not _RISKY_NUMBER.search(data):
            try:
                return orjson.loads(data)
            except orjson.JSONDecodeError:
                pass  # NaN, a syntax error, ...: the standard library decides and words it
    try:
        if allow_nonfinite:
            return json.loads(text, parse_int=_int)
        return json.loads(text, parse_int=_int, parse_float=_float, parse_constant=_constant)
    except _BadNumber as exc:
        raise UserError(f"{source}: {exc}") from None
    except json.JSONDecodeError as exc:
        raise UserError(f"{source}: not a readable JSON file ({exc})") from None
    except RecursionError:  # pragma: no cover - the depth check comes first
        raise UserError(f"{source}: JSON nested too deeply; refused") from None


def read_json(path, what: str = "JSON file", max_depth: int = MAX_DEPTH, allow_nonfinite: bool = False):
    """Read and parse a JSON file (UTF-8); a missing, unreadable or bad file is a UserError naming it."""
    path = Path(path)
    try:
        text = path.read_bytes().decode("utf-8")
    except FileNotFoundError:
        raise UserError(f"{path}: {what} not found") from None
    except IsADirectoryError:
        raise UserError(f"{path}: is a directory, not a {what}") from None
    except OSError as exc:
        raise UserError(f"{path}: cannot read {what} ({exc.strerror})") from None
    except UnicodeDecodeError:
        raise UserError(f"{path}: not a readable {what} (not UTF-8 text)") from None
    return parse_json(text, path, max_depth, allow_nonfinite)
