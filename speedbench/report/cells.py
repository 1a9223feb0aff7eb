"""How a report cell shows a number, an interval or a flag (plain text; the renderers escape it)."""
from __future__ import annotations

import numpy as np


def num(v, digits) -> str:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return ""
    return "" if np.isnan(f) else f"{f:.{digits}f}"


def ms_ci(r, col) -> str:
    lo, hi = r.get(col.replace("_ms", "_ci_lo_ms")), r.get(col.replace("_ms", "_ci_hi_ms"))
    ci = f" [{num(lo, 2)}, {num(hi, 2)}]" if num(lo, 2) and num(hi, 2) else ""
    return f"{num(r.get(col), 2)}{ci}"


def map_ci(r) -> str:
    m = num(r.get("map"), 3)
    if not m:
        return "n/a"
    lo, hi = num(r.get("map_ci_lo"), 3), num(r.get("map_ci_hi"), 3)
    return f"{m} [{lo}, {hi}]" if lo and hi else m


def flag(v) -> bool:
    # A flag column may hold numpy booleans, Python booleans or NaN (not recorded).
    return isinstance(v, (bool, np.bool_)) and bool(v)


def host_cell(r) -> str:
    shared = r.get("shares_machine_with", "")
    return f"{r['host']} (shared machine!)" if isinstance(shared, str) and shared else str(r["host"])
