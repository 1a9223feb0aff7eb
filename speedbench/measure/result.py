"""The outcome of measuring one point, and its rendering as one flat table row."""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field

import numpy as np

from speedbench.measure.invocations import Replicated
from speedbench.measure.point import Point
from speedbench.measure.stats import Measurement
from speedbench.measure.timebase import stage_columns, subgraph_columns
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
    failed_invocations: list = field(default_factory=list)   # "invocation i: reason" of each failed one

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
        row["ci_scope"] = ""
        if self.measurement is not None:
            row.update(self.measurement.summary())
            p50 = row["lat_p50_ms"]
            row["fps"] = 1000.0 / p50 if p50 > 0 else NAN
        # stage_X_ms in the unprofiled time base; the profiled pass's own ms under stage_X_profiled_ms
        median = self.measurement.median if self.measurement is not None else NAN
        row.update(stage_columns(self.stages, median))
        row.update(subgraph_columns(self.extra.get("subgraphs")))
        row["profiled_ms"] = self.profiled_ms
        row["profiling_overhead"] = self.profiling_overhead
        for col in MEMORY_COLUMNS:
            row[col] = float(self.memory.get(col, NAN))
        row.update(probe_columns(self.extra.get("probe")))
        row.update(reference_columns(self.extra))
        row["invocations_failed"] = len(self.failed_invocations)
        row["invocation_errors"] = "; ".join(self.failed_invocations)
        return row

    def to_dict(self) -> dict:
        """JSON-ready form (the worker's wire format); keeps every sample."""
        m = self.measurement
        return {
            "point": self.point.to_dict(), "status": self.status, "reason": self.reason,
            "samples_ms": None if m is None else m.samples_ms.tolist(),
            "invocation": None if m is None else getattr(m, "invocation", np.zeros(m.n, dtype=int)).tolist(),
            "measurement_settings": None if m is None else
            {"confidence": m.confidence, "noisy_cov": m.noisy_cov, "rel_ci": m.rel_ci},
            "stages": self.stages, "profiled_ms": _json_float(self.profiled_ms),
            "profiling_overhead": _json_float(self.profiling_overhead),
            "memory": self.memory, "extra": self.extra, "failed_invocations": self.failed_invocations,
        }

    @classmethod
    def from_dict(cls, d: dict) -> "PointResult":
        samples = d.get("samples_ms")
        invocation = d.get("invocation") or [0] * len(samples or [])
        m = Replicated(samples, invocation, **(d.get("measurement_settings") or {})) if samples else None
        return cls(point=Point.from_dict(d["point"]), status=d["status"], reason=d.get("reason", ""),
                   measurement=m, stages=d.get("stages") or {},
                   profiled_ms=_float(d.get("profiled_ms")), profiling_overhead=_float(d.get("profiling_overhead")),
                   memory=d.get("memory") or {}, extra=d.get("extra") or {},
                   failed_invocations=list(d.get("failed_invocations") or []))

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


def reference_columns(extra: dict) -> dict:
    """schema.REFERENCE_COLUMNS from one invocation's reference record or a point's per-invocation map."""
    per = extra.get("reference_by_invocation")
    if per is None:
        one = extra.get("reference")
        per = {str(int(extra.get("invocation", 0))): one} if isinstance(one, dict) else {}
    ms = {k: float(r["ms"]) for k, r in per.items()
          if isinstance(r, dict) and isinstance(r.get("ms"), (int, float)) and r["ms"] > 0}
    if not ms:
        return {"host_ref_ms": NAN, "host_ref_raw": ""}
    version = next(iter(per.values())).get("version")
    return {"host_ref_ms": float(np.median(list(ms.values()))),
            "host_ref_raw": json.dumps({"version": version, "ms": ms}, sort_keys=True)}


def combine_invocations(results: list[PointResult]) -> PointResult:
    """One point's result from its R invocations (each a PointResult whose samples carry its index).

    Samples are pooled with their invocation index (the intervals then come from the
    hierarchical bootstrap, measure.invocations); failed invocations are counted and their
    reasons kept; the point fails only when every invocation failed. Memory: the peak is the
    largest of any invocation, the other figures the median. Stages: mean over the invocations
    that profiled (usually only the first does).
    """
    if not results:
        raise ValueError("no invocations to combine")
    ok = [r for r in results if r.ok and r.measurement is not None]
    failed = [f"invocation {_index(r, i)}: {r.reason}" for i, r in enumerate(results) if not (r.ok and r.measurement)]
    if not ok:
        first = results[0]
        return PointResult(point=first.point, status="failed", extra=first.extra, failed_invocations=failed,
                           reason=f"all {len(results)} invocation(s) failed; first: {first.reason}")
    m0 = ok[0].measurement
    samples = np.concatenate([r.measurement.samples_ms for r in ok])
    index = np.concatenate([getattr(r.measurement, "invocation", np.full(r.measurement.n, i))
                            for i, r in enumerate(ok)])
    measurement = Replicated(samples, index, confidence=m0.confidence, noisy_cov=m0.noisy_cov, rel_ci=m0.rel_ci)
    profiled = [r for r in ok if r.stages]
    stages = {k: float(np.mean([r.stages.get(k, 0.0) for r in profiled])) for r in profiled for k in r.stages}
    memory = dict(ok[0].memory)
    for col in ("rss_imports_mib", "rss_loaded_mib"):
        vals = [r.memory[col] for r in ok if col in r.memory]
        if vals:
            memory[col] = float(np.median(vals))
    peaks = [r.memory["rss_peak_mib"] for r in ok if "rss_peak_mib" in r.memory]
    if peaks:
        memory["rss_peak_mib"] = float(max(peaks))
    extra = dict(ok[0].extra)
    extra["invocation_p50_ms"] = [float(np.median(r.measurement.samples_ms)) for r in ok]
    extra["reference_by_invocation"] = {str(_index(r, i)): r.extra["reference"] for i, r in enumerate(ok)
                                        if isinstance(r.extra.get("reference"), dict)}
    extra["seconds"] = float(sum(r.extra.get("seconds", 0.0) for r in ok))
    extra["stop"] = ",".join(sorted({str(r.extra["stop"]) for r in ok if "stop" in r.extra}))
    extra["warmup_runs"] = int(np.median([r.extra.get("warmup_runs", 0) for r in ok]))
    extra["warmup_settled"] = all(bool(r.extra.get("warmup_settled", True)) for r in ok)
    return PointResult(point=ok[0].point, measurement=measurement, stages=stages,
                       profiled_ms=float(np.mean([r.profiled_ms for r in profiled])) if profiled else NAN,
                       profiling_overhead=(float(np.mean([r.profiling_overhead for r in profiled]))
                                           if profiled else NAN),
                       memory=memory, extra=extra, failed_invocations=failed)


def _index(result: PointResult, position: int) -> int:
    return int(result.extra.get("invocation", position))


def _json_float(x):
    return None if x is None or (isinstance(x, float) and math.isnan(x)) else x


def _float(x):
    return NAN if x is None else float(x)
