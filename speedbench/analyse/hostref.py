"""Reruns of one stack with the host's phase divided out, by the host reference.

Every ONNX Runtime worker times a fixed small graph after each timed run
(measure/reference.py) and records its median per invocation (schema.REFERENCE_COLUMNS).
Dividing each invocation's samples by that invocation's reference time gives the model's
speed in units of the host's speed at that moment; the hierarchical ratio of those
normalised samples (regression.hierarchical_ratio) is the host-adjusted ratio of a point.

The reference runs on the measured onnxruntime. Between runs with different onnxruntime
versions it moves with the software under test, so it is not used there (the
stack-independent probe, hostspeed.py, adjusts instead) and the comparison says why.
"""
from __future__ import annotations

import json
import math

import numpy as np


def parse(raw) -> tuple[object, dict[int, float]]:
    """(reference version, {invocation index: reference ms}) from a host_ref_raw cell; (None, {}) when
    none was recorded or the cell is unreadable."""
    if not isinstance(raw, str) or not raw:
        return None, {}
    try:
        data = json.loads(raw)
        return data.get("version"), {int(k): float(v) for k, v in (data.get("ms") or {}).items()
                                     if isinstance(v, (int, float)) and math.isfinite(v) and v > 0}
    except (ValueError, TypeError, AttributeError):
        return None, {}


def readings(raw) -> dict[int, float]:
    """{invocation index: reference ms} from a host_ref_raw cell ({} when none was recorded)."""
    return parse(raw)[1]


def normalised(groups: list[tuple[int, np.ndarray]] | None, ref: dict[int, float]) -> list[np.ndarray] | None:
    """Each invocation's samples divided by its reference time (ref: readings), or None unless every
    invocation has a reading."""
    if not groups or not ref or any(k not in ref for k, _ in groups):
        return None
    return [g / ref[k] for k, g in groups]


def usable(base_meta: dict, new_meta: dict) -> tuple[bool, str]:
    """Whether the reference may adjust a comparison of these two runs, and the reason if not."""
    versions = [((m.get("env") or {}).get("packages") or {}).get("onnxruntime") for m in (base_meta, new_meta)]
    if versions[0] != versions[1]:
        return False, (f"onnxruntime {versions[0] or '?'} -> {versions[1] or '?'} moves the reference "
                       f"graph too, so it cannot tell the host from the software")
    return True, f"onnxruntime {versions[0] or '?'} on both sides"


def reference_ratio(base_points, new_points) -> float:
    """Median reference time new / base over all points that recorded one (NaN if either has none)."""
    vals = []
    for pts in (base_points, new_points):
        col = pts["host_ref_ms"] if "host_ref_ms" in pts.columns else []
        v = np.asarray([x for x in col if isinstance(x, (int, float)) and math.isfinite(x) and x > 0], float)
        vals.append(float(np.median(v)) if len(v) else math.nan)
    return vals[1] / vals[0] if all(math.isfinite(v) for v in vals) else math.nan
