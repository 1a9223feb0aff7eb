"""The host's own speed change between two runs, from the probe every worker times.

Each worker process times a fixed piece of standard-library work at its start and end
(speedbench/measure/probe.py). One value per worker process (the mean of its two probe
times) is a reading of how fast the machine was while that process ran. Between two
separately measured runs, the ratio of the median probe times new / base (with a
bootstrap interval over worker processes) is the host's speed change: a shift that hits
every point alike and that no resampling inside a run can see.

The probe-adjusted latency ratio divides a point's ratio by the host's; its interval
combines the two intervals' half-widths in log space in quadrature (an approximation
that treats the two estimates as independent).
"""
from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd

from speedbench.analyse.common import as_float as _f


def probe_values(points: pd.DataFrame) -> np.ndarray:
    """One probe reading (ms) per worker process of a run; empty when the run recorded none."""
    out = []
    for raw, start, end in zip(_col(points, "probe_raw"), _col(points, "probe_start_ms"),
                               _col(points, "probe_end_ms")):
        records = _parse(raw)
        if records:
            out += [v for v in (_reading(r) for r in records) if v is not None]
            continue
        vals = [x for x in (_f(start), _f(end)) if np.isfinite(x) and x > 0]
        if vals:
            out.append(sum(vals) / len(vals))
    return np.asarray(out, dtype=float)


def _col(points, name):
    return points[name].tolist() if name in points.columns else [None] * len(points)


def _parse(raw) -> list[dict]:
    """probe_raw holds one worker's record, or a list of them (one per invocation)."""
    if not isinstance(raw, str) or not raw:
        return []
    try:
        data = json.loads(raw)
    except json.JSONDecodeError:
        return []
    items = data if isinstance(data, list) else [data]
    return [d for d in items if isinstance(d, dict)]


def _reading(record: dict):
    vals = [_f((record.get(phase) or {}).get("ms")) for phase in ("start", "end")
            if isinstance(record.get(phase), dict)]
    vals = [v for v in vals if np.isfinite(v) and v > 0]
    return sum(vals) / len(vals) if vals else None


def host_status(h: dict, threshold: float) -> dict:
    """Complete a host-change record {ratio, ci_lo, ci_hi, ...}: does it exceed the threshold?"""
    ratio = h.get("ratio", math.nan)
    h["exceeds"] = bool(np.isfinite(ratio) and (ratio > 1 + threshold or ratio < 1 / (1 + threshold)))
    return h


def adjust(row: dict, host: dict, threshold: float) -> dict:
    """The point's ratio divided by the host's, with its interval and verdict."""
    r, lo, hi = _f(row.get("ratio")), _f(row.get("ci_lo")), _f(row.get("ci_hi"))
    h, hlo, hhi = host["ratio"], host["ci_lo"], host["ci_hi"]
    if not all(np.isfinite([r, lo, hi, h, hlo, hhi])) or min(r, lo, hi, h, hlo, hhi) <= 0:
        return {"adj_ratio": math.nan, "adj_ci_lo": math.nan, "adj_ci_hi": math.nan, "adj_verdict": "n/a"}
    centre = math.log(r) - math.log(h)
    # dividing by h: the host's upper uncertainty widens the adjusted ratio's lower side
    down = math.hypot(math.log(r) - math.log(lo), math.log(hhi) - math.log(h))
    up = math.hypot(math.log(hi) - math.log(r), math.log(h) - math.log(hlo))
    a_lo, a_hi = math.exp(centre - down), math.exp(centre + up)
    return {"adj_ratio": math.exp(centre), "adj_ci_lo": a_lo, "adj_ci_hi": a_hi,
            "adj_verdict": verdict(a_lo, a_hi, threshold)}


def verdict(lo: float, hi: float, threshold: float) -> str:
    """slower / faster only when the whole interval lies beyond the threshold."""
    if not (np.isfinite(lo) and np.isfinite(hi)):
        return "unknown"
    if lo > 1 + threshold:
        return "slower"
    if hi < 1 / (1 + threshold):
        return "faster"
    return "unchanged"


def host_lines(host: dict, threshold: float, base_name: str, new_name: str) -> list[str]:
    """What the report says about the host's speed between the runs (always something)."""
    if not host:
        return []
    ref = host.get("reference") or {}
    if ref.get("status") == "used":
        r = ref.get("ratio", math.nan)
        moved = (f"; its time moved by {(r - 1) * 100:+.1f}% between the runs" if np.isfinite(r) else "")
        rest = ref.get("of", ref["points"]) - ref["points"]
        ref_line = [f"Host reference: {ref['points']} point(s) adjusted by a fixed graph timed in the same "
                    f"worker processes ({ref['why']}){moved}. The adjusted ratio divides the host's phase "
                    f"out of a rerun of one stack" + (f"; the probe adjusts the other {rest}" if rest else "")]
    elif ref.get("status", "not recorded") != "not recorded":
        ref_line = [f"Host reference {ref['status']}; the probe adjusts instead"]
    else:
        ref_line = []
    return ref_line + _probe_lines(host, threshold, base_name, new_name)


def _probe_lines(host: dict, threshold: float, base_name: str, new_name: str) -> list[str]:
    if host.get("status") != "recorded":
        return [f"Host speed probe: {host.get('status')}; a change of the machine's own speed between "
                f"the runs cannot be told from a change of the software"]
    pct = (host["ratio"] - 1) * 100
    slower = "slower" if pct > 0 else "faster"
    line = (f"Host speed probe: the machine was {abs(pct):.1f}% {slower} during {new_name} than during "
            f"{base_name} (probe time ratio {host['ratio']:.3f} [{host['ci_lo']:.3f}, {host['ci_hi']:.3f}], "
            f"{host['n_base']} and {host['n_new']} worker processes)")
    if not host["exceeds"]:
        return [line + f"; within the {threshold:.0%} threshold"]
    return [line, f"The host's speed changed by more than the {threshold:.0%} threshold: verdicts may be the "
                  f"machine's, not the software's. Host-adjusted ratios and verdicts are shown next to the "
                  f"raw ones (the gate uses the {host.get('gate', 'raw')} verdict)."]
