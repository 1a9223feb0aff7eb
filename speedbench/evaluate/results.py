"""Detections in the COCO results format: a list of {image_id, category_id, bbox, score}.

bbox is [x, y, w, h] in original-image pixels. Validation is vectorised; only
when something is wrong do we walk the entries to name the first bad one.
"""
from __future__ import annotations

import json
import math
from itertools import chain
from numbers import Real
from pathlib import Path

import numpy as np

from speedbench.data.jsonio import array_pieces, no_collection, read_bytes, read_json
from speedbench.errors import UserError
from speedbench.evaluate.cocoeval import Detections, GroundTruth, is_member

FIELDS = ("image_id", "category_id", "bbox", "score")
_NUMBER_TYPES = (int, float, np.integer, np.floating)
_PIECE_BYTES = 1 << 20  # of a large detections file parsed at a time (jsonio.array_pieces)


def load_detections(path, gt) -> list[dict]:
    """Read and validate a COCO results JSON file against ground truth (dict or Dataset)."""
    # Bounded nesting and 64-bit integers; NaN / inf get their per-field message below.
    dets = read_json(path, "detections file", allow_nonfinite=True)
    parse_detections(dets, _ground(gt), source=str(Path(path)))
    return dets


def read_detections(path, gt) -> Detections:
    """Read and validate a COCO results JSON file straight into arrays (parsed once)."""
    ground, source = _ground(gt), str(Path(path))
    data = read_bytes(path, "detections file")
    pieces = array_pieces(data, _PIECE_BYTES)
    if pieces is not None:  # a large file: a piece at a time, each made arrays at once
        parts = []
        # The cycle collector stays off until the pieces are freed: switched on between them,
        # it walks each piece's objects (they hold no cycles) once more.
        with no_collection():
            for items in pieces:
                if items is None:  # a piece did not parse
                    break
                try:
                    parts.append(parse_detections(items, ground, source))
                except UserError:
                    break  # read again whole below, so that the message counts from the file's start
                del items
            else:
                if parts:
                    return Detections.joined(parts)
        del parts
    # parse_detections checks every value, so the fast parser may skip its scans.
    data = read_json(path, "detections file", allow_nonfinite=True, values_checked=True, data=data)
    return parse_detections(data, ground, source=source)


def _ground(gt) -> GroundTruth:
    return gt if isinstance(gt, GroundTruth) else GroundTruth(getattr(gt, "coco", gt))


def parse_detections(dets, gt: GroundTruth, source: str = "detections") -> Detections:
    """Validate a results list and return it as arrays; UserError names the source and the entry."""
    if not isinstance(dets, list):
        raise UserError(f"{source}: expected a JSON list of detections, got {type(dets).__name__}")
    try:
        img = [d["image_id"] for d in dets]
        cat = [d["category_id"] for d in dets]
        score = [d["score"] for d in dets]
        boxes = [d["bbox"] for d in dets]
        # map(type, ...) runs in C; numpy alone would quietly accept strings and bools.
        types = set(map(type, chain(img, cat, score, chain.from_iterable(boxes))))
        if not all(issubclass(t, _NUMBER_TYPES) and t is not bool for t in types):
            raise ValueError
        # Box items are numbers (checked above); with four to a box, read them flat (np.array
        # of the nested lists takes twice as long).
        if dets and set(map(len, boxes)) != {4}:
            raise ValueError
        box = np.fromiter(chain.from_iterable(boxes), np.float64, count=4 * len(dets)).reshape(-1, 4)
        img_f, cat_f = np.array(img, float), np.array(cat, float)
        score = np.array(score, np.float64)
    except (KeyError, TypeError, ValueError, OverflowError):   # OverflowError: an int beyond float range
        _raise_first_bad(dets, source)
        raise  # pragma: no cover - _raise_first_bad always raises
    checks = [
        (~np.isfinite(img_f) | (img_f != np.round(img_f)), "image_id must be an integer"),
        (np.abs(img_f) >= 2 ** 63, "image_id out of range (beyond 64 bits)"),
        (~is_member(img_f, gt.image_ids), "image_id is not an image of the ground truth"),
        (~np.isfinite(cat_f) | (cat_f != np.round(cat_f)), "category_id must be an integer"),
        (np.abs(cat_f) >= 2 ** 63, "category_id out of range (beyond 64 bits)"),
        (~is_member(cat_f, gt.cat_ids), "category_id is not a category of the ground truth"),
        (~np.isfinite(box).all(axis=1), "bbox values must be finite numbers"),
        ((box[:, 2] < 0) | (box[:, 3] < 0), "bbox has negative width or height"),
        (~np.isfinite(score), "score must be a finite number"),
    ]
    for bad, why in checks:
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise UserError(f"{source}: detection [{i}]: {why} ({_short(dets[i])})")
    return Detections(gt, img_f.astype(np.int64), cat_f.astype(np.int64), box, score)


def _raise_first_bad(dets, source):
    for i, d in enumerate(dets):
        if not isinstance(d, dict):
            raise UserError(f"{source}: detection [{i}]: expected an object, got {type(d).__name__}")
        missing = [f for f in FIELDS if f not in d]
        if missing:
            raise UserError(f"{source}: detection [{i}]: missing field {missing[0]!r}")
        for f in ("image_id", "category_id", "score"):
            if not isinstance(d[f], Real) or isinstance(d[f], bool):
                raise UserError(f"{source}: detection [{i}]: {f} must be a number, got {_short(d[f])}")
            if not _is_number(d[f]):
                raise UserError(f"{source}: detection [{i}]: {f} must be a finite number in range, "
                                f"got {_short(d[f])}")
        b = d["bbox"]
        if not isinstance(b, (list, tuple)) or len(b) != 4 or not all(_is_number(v) for v in b):
            raise UserError(f"{source}: detection [{i}]: bbox must be [x, y, w, h] finite numbers, got {_short(b)}")
    raise UserError(f"{source}: malformed detections list")


def _is_number(v) -> bool:
    if not isinstance(v, Real) or isinstance(v, bool):
        return False
    try:
        return math.isfinite(float(v))
    except OverflowError:   # an int too large for a float
        return False


def _short(d) -> str:
    try:
        text = json.dumps(d, default=str)
    except (ValueError, RecursionError):
        text = "<unprintable>"
    return text if len(text) <= 120 else text[:117] + "..."
