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

import gc
import json
import math
from contextlib import contextmanager
from pathlib import Path

from speedbench.errors import UserError

try:  # the optional extra speedbench[fast]: about 3x faster on a large detections file
    import orjson
except ImportError:  # pragma: no cover - exercised by tests that hide it
    orjson = None

MAX_DEPTH = 64              # nesting levels of arrays / objects; COCO files use 4
INT_LIMIT = 2**63           # integers must lie in [-2**63, 2**63)
# Text in which a number could fall outside what parse_json accepts: an integer part of 19+
# digits (an integer at or past 2**63, a float that overflows) or a 3-digit exponent. Digits
# after a decimal point are not counted: json.dumps writes a score of 0.006 with 19 of them.
# Only such text needs the standard library's per-number checks; any other text orjson parses
# to the same objects. Found with bytes.find on a translated copy (digits -> 0, e/E -> e,
# signs -> +, '.' kept, anything else -> space): a regular expression took 0.7 s on 7 MiB.
_NUMBER_SHAPE = bytes(0x30 if 0x30 <= c <= 0x39 else 0x65 if c in b"eE" else 0x2B if c in b"+-"
                      else 0x2E if c == 0x2E else 0x20 for c in range(256))
_RISKY_SHAPES = (b" " + b"0" * 19, b"+" + b"0" * 19, b"e000", b"e+000")
# Bytes other than quotes and brackets, deleted before counting the nesting.
_NOT_STRUCTURE = bytes(c for c in range(256) if c not in b'"[]{}')


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


def _risky_numbers(data: bytes) -> bool:
    shape = (b" " + data).translate(_NUMBER_SHAPE)
    return any(pattern in shape for pattern in _RISKY_SHAPES)


def nesting_depth(text) -> int:
    """Deepest nesting of [ and { outside string literals (text: str or UTF-8 bytes).

    Escaped backslashes, then escaped quotes, are removed (JSON pairs backslashes from the
    left, as bytes.replace does); what is left is quotes and brackets, and a bracket is
    inside a string when an odd number of quotes precede it. Bytes-level and vectorised:
    a 7 MiB detections file takes milliseconds, where a regular expression over the
    strings took over half a second.
    """
    import numpy as np

    data = text.encode("utf-8", "surrogatepass") if isinstance(text, str) else bytes(text)
    marks = data.replace(b"\\\\", b"").replace(b'\\"', b"").translate(None, _NOT_STRUCTURE)
    codes = np.frombuffer(marks, dtype=np.uint8)
    if not len(codes):
        return 0
    outside = ~np.logical_xor.accumulate(codes == 0x22)
    step = ((codes == 0x5B) | (codes == 0x7B)).astype(np.int32) - ((codes == 0x5D) | (codes == 0x7D))
    step *= outside
    return max(0, int(np.cumsum(step).max()))


class _NotUtf8(UserError):
    pass


@contextmanager
def no_collection():
    """Parsed JSON holds no reference cycles, so the cycle collector has nothing to find in
    it; left on, it walks the growing tree again and again (half the time of orjson.loads
    on 95,000 detections)."""
    was_on = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was_on:
            gc.enable()


def parse_json(text, source, max_depth: int = MAX_DEPTH, allow_nonfinite: bool = False,
               values_checked: bool = False):
    """json.loads with bounded nesting and numbers; a UserError names `source` on any problem.

    text: str, or bytes that must be UTF-8. allow_nonfinite: accept NaN / Infinity (files
    speedbench writes itself: Python's json writes them inside lists); user inputs get them
    refused. values_checked: the caller checks the shape, type and range of every value
    itself (results.parse_detections does). Then, when orjson takes the text, the two scans
    before it are skipped, a third of the time of reading a detections file: orjson bounds
    the nesting in its own code (no Python recursion), and an integer past 64 bits comes out
    of it as a float that the caller's range checks see. Text orjson refuses is scanned and
    read by the standard library as usual."""
    data = text.encode("utf-8", "surrogatepass") if isinstance(text, str) else text
    if values_checked and orjson is not None:
        try:
            with no_collection():
                return orjson.loads(data)
        except orjson.JSONDecodeError:
            pass
    if nesting_depth(data) > max_depth:
        raise UserError(f"{source}: JSON nested deeper than {max_depth} levels; refused")
    if orjson is not None and not values_checked and not _risky_numbers(data):
        try:
            with no_collection():
                return orjson.loads(data)  # also refuses text that is not UTF-8
        except orjson.JSONDecodeError:
            pass  # NaN, a syntax error, ...: the standard library decides and words it
    if not isinstance(text, str):
        try:
            text = text.decode("utf-8")
        except UnicodeDecodeError:
            raise _NotUtf8(f"{source}: not a readable JSON file (not UTF-8 text)") from None
    try:
        with no_collection():
            if allow_nonfinite:
                return json.loads(text, parse_int=_int)
            return json.loads(text, parse_int=_int, parse_float=_float, parse_constant=_constant)
    except _BadNumber as exc:
        raise UserError(f"{source}: {exc}") from None
    except json.JSONDecodeError as exc:
        raise UserError(f"{source}: not a readable JSON file ({exc})") from None
    except RecursionError:  # pragma: no cover - the depth check comes first
        raise UserError(f"{source}: JSON nested too deeply; refused") from None


def read_bytes(path, what: str = "JSON file") -> bytes:
    """A file's bytes; a missing or unreadable file is a UserError naming it."""
    path = Path(path)
    try:
        return path.read_bytes()
    except FileNotFoundError:
        raise UserError(f"{path}: {what} not found") from None
    except IsADirectoryError:
        raise UserError(f"{path}: is a directory, not a {what}") from None
    except OSError as exc:
        raise UserError(f"{path}: cannot read {what} ({exc.strerror})") from None


def read_json(path, what: str = "JSON file", max_depth: int = MAX_DEPTH, allow_nonfinite: bool = False,
              values_checked: bool = False, data: bytes | None = None):
    """Read and parse a JSON file (UTF-8); a missing, unreadable or bad file is a UserError naming it.

    data: the file's bytes, if already read (read_bytes)."""
    path = Path(path)
    if data is None:
        data = read_bytes(path, what)  # decoded only if the fast parser does not take it
    try:
        return parse_json(data, path, max_depth, allow_nonfinite, values_checked)
    except _NotUtf8:
        raise UserError(f"{path}: not a readable {what} (not UTF-8 text)") from None


_JSON_SPACE = b" \t\n\r"


def array_pieces(data: bytes, size: int):
    """A large JSON array parsed a piece at a time: an iterator of lists, or None.

    The text is cut after an element's closing brace where a comma and an opening brace
    follow, about `size` bytes apart, and each piece is parsed as an array of its own (with
    orjson). Why: a detections file of 7 MiB becomes some 40 MiB of Python objects at once,
    and on a machine where fresh memory is slow to come by (virtual machines that hand
    freed pages back to their host) touching it costs more than parsing it. The caller
    turns each piece into arrays before asking for the next, so its objects are freed and
    their memory reused.

    Safe by construction: a cut inside a string, or inside a nested array or object, leaves
    a piece that is not valid JSON, so when every piece parses, every cut was between two
    elements of the outer array and the pieces' lists joined are that array. The iterator
    yields None (and stops) at a piece that does not parse; None instead of an iterator when
    orjson is missing, the text is short or not an array. Either way the caller then reads
    the whole text as usual, which words any error.
    """
    if orjson is None or len(data) < 2 * size:
        return None
    start = len(data) - len(data.lstrip(_JSON_SPACE))
    end = len(data.rstrip(_JSON_SPACE))
    if data[start:start + 1] != b"[" or data[end - 1:end] != b"]":
        return None
    return _pieces(data, size, start + 1, end)


def _pieces(data: bytes, size: int, pos: int, end: int):
    while True:
        cut, after = _next_cut(data, pos + size, end)
        try:
            with no_collection():
                items = orjson.loads(b"[" + data[pos:cut] + b"]")
        except orjson.JSONDecodeError:
            yield None
            return
        yield items
        del items  # the caller has made arrays of it: free it before parsing the next
        if after is None:
            return
        pos = after


def _next_cut(data: bytes, after: int, end: int):
    """(end of this piece, start of the next) at the first "}" ws* "," ws* "{" after `after`."""
    i = data.find(b"}", after, end)
    while i >= 0:
        j = _skip_space(data, i + 1, end)
        if data[j:j + 1] == b",":
            k = _skip_space(data, j + 1, end)
            if data[k:k + 1] == b"{":
                return i + 1, k
        i = data.find(b"}", i + 1, end)
    return end - 1, None


def _skip_space(data: bytes, i: int, end: int) -> int:
    """The first index at or after i (before end) that is not JSON whitespace."""
    while i < end and data[i] in _JSON_SPACE:
        i += 1
    return i
