"""The outcome of measuring one point, and its rendering as one flat table row."""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field

from speedbench.measure.point import Point
from speedbench.measure.stats import Measurement
from speedbench.measure.timebase import stage_columns
from speedbench.schema import LATENCY_COLUMNS, MEMORY_COLUMNS

NAN = float("nan")


@dataclass
class PointResult:
    point: Point
    status: str = "ok"                      # "ok" | "failed"
    reason: str = ""
    measurement: Measurement | None = None
    stages: dict = field(default_factory=dict)      # stage -> ms per run of the profiled pass
    profiled_ms: float = NAN                # mean wall time of a profiled run
    profiling_overhead: float = NAN         # profiled median / unprofiled median - 1
    memory: dict = field(default_factory=dict)      # MEMORY_COLUMNS (+ details) in MiB
    extra: dict = field(default_factory=dict)

    @property
    def ok(self) -> bool:
        return self.status == "ok"

    def to_row(self) -> dict:
        """One flat dict with the schema's column names (NaN where not measured)."""
        row = dict(self.point.config())
        row["point_id"] = self.point.id
        row["status"] = self.status
        row["reason"] = self.reason
        row.update({c: NAN for c in LATENCY_COLUMNS})      # same columns for failed points
        if self.measurement is not None:
            row.update(self.measurement.summary())
            p50 = row["lat_p50_ms"]
            row["fps"] = 1000.0 / p50 if p50 > 0 else NAN
        # stage_X_ms in the unprofiled time base; the profiled pass's own ms under stage_X_profiled_ms
        median = self.measurement.median if self.measurement is not None else NAN
        row.update(stage_columns(self.stages, median))
        row["profiled_ms"] = self.profiled_ms
        row["profiling_overhead"] = self.profiling_overhead
        for col in MEMORY_COLUMNS:
            row[col] = float(self.memory.get(col, NAN))
        row.update(probe_columns(self.extra.get("probe")))
        return row

    def to_dict(self) -> dict:
        """JSON-ready form (the worker's wire format); keeps every sample."""
        m = self.measurement
        return {
            "point": self.point.to_dict(), "status": self.status, "reason": self.reason,
            "samples_ms": None if m is None else m.samples_ms.tolist(),
            "measurement_settings": None if m is None else
            {"confidence": m.confidence, "noisy_cov": m.noisy_cov, "rel_ci": m.rel_ci},
            "stages": self.stages, "profiled_ms": _json_float(self.profiled_ms),
            "profiling_overhead": _json_float(self.profiling_overhead),
            "memory": self.memory, "extra": self.extra,
        }

    @classmethod
    def from_dict(cls, d: dict) -> "PointResult":
        samples = d.get("samples_ms")
        m = Measurement(samples, **(d.get("measurement_settings") or {})) if samples else None
        return cls(point=Point.from_dict(d["point"]), status=d["status"], reason=d.get("reason", ""),
                   measurement=m, stages=d.get("stages") or {},
                   profiled_ms=_float(d.get("profiled_ms")), profiling_overhead=_float(d.get("profiling_overhead")),
                   memory=d.get("memory") or {}, extra=d.get("extra") or {})

    def __repr__(self) -> str:
        head = f"PointResult({self.point.model} size={self.point.size} {self.point.backend} " \
               f"threads={self.point.intra_threads}/{self.point.inter_threads}: {self.status}"
        if not self.ok:
            return f"{head}, {self.reason})"
        stages = ", ".join(f"{k}={v:.2f}" for k, v in self.stages.items() if v > 0)
        return f"{head}, {self.measurement!r}" + (f", stages ms: {stages}" if stages else "") + ")"


def probe_columns(probe: dict | None) -> dict:
    """schema.PROBE_COLUMNS from the worker's probe record (NaN / "" when it took none)."""
    probe = probe or {}
    out = {}
    for phase in ("start", "end"):
        ms = (probe.get(phase) or {}).get("ms")
        out[f"probe_{phase}_ms"] = float(ms) if isinstance(ms, (int, float)) else NAN
    out["probe_raw"] = json.dumps(probe, sort_keys=True) if probe else ""
    return out


def _json_float(x):
    return None if x is None or (isinstance(x, float) and math.isnan(x)) else x


def _float(x):
    return NAN if x is None else float(x)
