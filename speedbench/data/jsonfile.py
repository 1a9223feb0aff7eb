"""Reading JSON files, with orjson when it is installed.

orjson (the optional extra `speedbench[fast]`) parses a large detections file
about three times faster than the standard library (benchmarks/bench_cocoeval.py).
Both give the same Python objects. Where orjson is stricter than the standard
library (NaN and Infinity literals, integers beyond 64 bits, text that is not
UTF-8), the standard library gets the last word, so a file is accepted or
refused, and the message reads, the same with or without orjson.
"""
from __future__ import annotations

import json
from pathlib import Path

from speedbench.errors import UserError

try:
    import orjson
except ImportError:  # pragma: no cover - exercised by tests that hide it
    orjson = None


def loads(data: bytes):
    """Parse JSON text (bytes); raises json.JSONDecodeError / UnicodeDecodeError like json.loads."""
    if orjson is not None:
        try:
            return orjson.loads(data)
        except orjson.JSONDecodeError:
            pass  # let the standard library decide, and word the error
    return json.loads(data)


def read_json(path, what: str = "JSON file"):
    """Parse the JSON file at path; UserError naming the file when it is missing or unreadable."""
    path = Path(path)
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise UserError(f"{path}: {what} not found") from None
    except OSError as exc:
        raise UserError(f"{path}: cannot read {what} ({exc.strerror})") from None
    try:
        return loads(data)
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise UserError(f"{path}: not a readable JSON file ({exc})") from None
