"""Result maths of a throughput point: K workers of one configuration, measured together.

From every request's start and end timestamp and its process CPU time (written by
speedbench.measure.concurrent_worker), over the common window [start, end] (``summarise``):

- throughput X = requests completed inside the window / window length (frames/s),
- per-request latency percentiles of those requests (p50/p90/p99 under load),
- mean concurrency L = time-average number of requests in flight (their intervals clipped
  to the window, summed, divided by the window), so Little's law L = X W can be checked on
  the measured data (W = mean latency). L and X W come from the same timestamps, so their
  agreement is a consistency check (edge effects, gaps between requests), not an independent
  confirmation,
- CPU utilisation of the cores used, measured from process CPU time, next to X S (S = mean
  CPU seconds per request): the utilisation law U = X S. A gap shows CPU burnt outside
  requests (thread pools spinning between runs, harness overhead).
- scaling efficiency X(K) / (K X(1)) when the K = 1 throughput is known (set by the parent,
  speedbench.measure.concurrent_launch).

Public: ``LoadResult``, ``summarise``, ``completed_latencies_ms``, ``curve_entry``, ``single_stream_fps``
(the one X(1) of a K = 1 row: sweep, fleet, `speedbench load` and sizing), ``LOAD_COLUMNS``.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field

import numpy as np

from speedbench.measure.invocations import Replicated, hierarchical_rate_ci
from speedbench.measure.point import Point
from speedbench.schema import LATENCY_PERCENTILES, LOAD_COLUMNS

__all__ = ["LoadResult", "summarise", "completed_latencies_ms", "curve_entry", "combine_loads", "probe_summary",
           "single_stream_fps", "LOAD_COLUMNS", "NAN"]

NAN = float("nan")


@dataclass
class LoadResult:
    """K workers of one configuration measured together. ``to_row()`` gives the table row."""

    point: object                      # speedbench.measure.Point with concurrency = K
    k: int
    status: str = "ok"
    reason: str = ""
    summary: dict = field(default_factory=dict)   # LOAD_COLUMNS values
    latencies_ms: list = field(default_factory=list)  # per request, completed inside the window
    workers: list = field(default_factory=list)   # raw per-worker timelines (see concurrent_worker.worker_main)
    offered_fps: float | None = None               # paced arrivals; None = closed loop
    # R invocations (combine_loads): the invocation index of each entry of latencies_ms
    invocation: list = field(default_factory=list)
    # paced runs of this point: [(offered fraction u, invocation, [latency ms of each frame])]
    curve_runs: list = field(default_factory=list)
    extra: dict = field(default_factory=dict)      # probe records, wall_s
    failed_invocations: list = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return self.status == "ok"

    @property
    def tput_fps(self) -> float:
        return self.summary.get("tput_fps", NAN)

    def load_columns(self) -> dict:
        """Only the throughput columns, to merge into an existing K = 1 row of a run."""
        return {c: self.summary.get(c, NAN) for c in LOAD_COLUMNS}

    def to_row(self) -> dict:
        """Config columns + point_id + status + latency statistics of the requests under load
        (lat_*, from the same samples as tput_p*_ms) + LOAD_COLUMNS."""
        row = dict(self.point.config())
        row["point_id"] = self.point.id
        row["status"], row["reason"] = self.status, self.reason
        if self.latencies_ms:
            m = self.measurement()
            row.update(m.summary())
            row["fps"] = 1000.0 / m.median if m.median > 0 else NAN  # one stream's frame rate
        row.update(self.load_columns())
        row["cores_used"] = self.summary.get("cores_used", self.k * max(self.point.intra_threads, 1))
        row.update(probe_summary(self.extra.get("probes") or []))
        row["invocations_failed"] = len(self.failed_invocations)
        row["invocation_errors"] = "; ".join(self.failed_invocations)
        return row

    def measurement(self):
        """The latencies under load with their invocation index: percentiles and their intervals
        from the hierarchical bootstrap over invocations (measure.invocations.Replicated)."""
        index = self.invocation if len(self.invocation) == len(self.latencies_ms) else [0] * len(self.latencies_ms)
        return Replicated(self.latencies_ms, index)

    def to_dict(self) -> dict:
        """JSON-ready form of one invocation (stored as it finishes; resume rebuilds it). The raw
        per-worker timelines are left out: the summary and every latency are kept."""
        return {"kind": "load", "point": self.point.to_dict(), "k": self.k, "status": self.status,
                "reason": self.reason, "summary": self.summary, "latencies_ms": list(self.latencies_ms),
                "invocation": list(self.invocation), "offered_fps": self.offered_fps,
                "curve_runs": [[u, i, list(lat)] for u, i, lat in self.curve_runs], "extra": self.extra,
                "failed_invocations": list(self.failed_invocations)}

    @classmethod
    def from_dict(cls, d: dict) -> "LoadResult":
        return cls(point=Point.from_dict(d["point"]), k=int(d["k"]), status=d["status"], reason=d.get("reason", ""),
                   summary={k: (NAN if v is None else v) for k, v in (d.get("summary") or {}).items()},
                   latencies_ms=list(d.get("latencies_ms") or []), invocation=list(d.get("invocation") or []),
                   offered_fps=d.get("offered_fps"), curve_runs=[tuple(x) for x in d.get("curve_runs") or []],
                   extra=d.get("extra") or {}, failed_invocations=list(d.get("failed_invocations") or []))

    def __repr__(self) -> str:
        if not self.ok:
            return f"LoadResult(K={self.k} {self.point.model}: failed, {self.reason})"
        s = self.summary
        return (f"LoadResult(K={self.k} {self.point.model}: {s['tput_fps']:.2f} fps, "
                f"p99 {s['tput_p99_ms']:.2f} ms, L={s['littles_L']:.3f} vs XW={s['littles_XW']:.3f}, "
                f"scaling {s.get('scaling_eff', NAN):.2f})")


def summarise(workers: list[dict], start_ns: int, end_ns: int, cores_used: int) -> dict:
    """Throughput, latency under load, Little's law and utilisation law from raw timelines.

    workers: one dict per worker with int lists ``starts_ns``, ``ends_ns``, ``cpu_ns`` (CPU time
    of each request) and ints ``cpu_total_ns`` (process CPU time from the first request's start
    to the last one's end). A pure function: tests feed it hand-made timelines.
    """
    window_s = (end_ns - start_ns) / 1e9
    if window_s <= 0:
        raise ValueError("empty measurement window")
    in_flight_s = 0.0
    lat = []
    cpu_rate, xs_rate = 0.0, 0.0
    n_total = 0
    busy_s, service = 0.0, []
    for w in workers:
        s = np.asarray(w["starts_ns"], dtype=np.int64)
        e = np.asarray(w["ends_ns"], dtype=np.int64)
        # Paced runs record when service began; a request waits from its arrival (s) until then.
        v = np.asarray(w.get("service_ns", w["starts_ns"]), dtype=np.int64)
        # time in flight inside the window: each interval clipped to [start, end]
        overlap = np.clip(np.minimum(e, end_ns) - np.maximum(s, start_ns), 0, None)
        in_flight_s += overlap.sum() / 1e9
        busy_s += np.clip(np.minimum(e, end_ns) - np.maximum(v, start_ns), 0, None).sum() / 1e9
        done = (e >= start_ns) & (e <= end_ns)
        lat.extend(((e[done] - s[done]) / 1e6).tolist())
        service.extend(((e[done] - v[done]) / 1e6).tolist())
        n_total += len(s)
        # Utilisation law per worker over its own span: U_k = CPU / span vs X_k S_k.
        if len(s):
            span = (e[-1] - s[0]) / 1e9
            if span > 0:
                cpu_rate += w["cpu_total_ns"] / 1e9 / span
                xs_rate += (len(s) / span) * (np.mean(w["cpu_ns"]) / 1e9)
    n = len(lat)
    x = n / window_s
    mean_ms = float(np.mean(lat)) if n else NAN
    out = {
        "tput_fps": x,
        "tput_mean_ms": mean_ms,
        "tput_window_s": window_s,
        "tput_requests": n,
        "littles_L": float(in_flight_s / window_s),
        "littles_XW": x * mean_ms / 1000.0 if n else NAN,
        "cores_used": int(cores_used),
        # Utilisation law per worker, U = X S: busy fraction vs throughput x mean service time.
        "tput_busy": float(busy_s / window_s / len(workers)),
        "tput_busy_xs": float(x * np.mean(service) / 1000.0 / len(workers)) if n else NAN,
        "tput_service_ms": float(np.mean(service)) if n else NAN,
        "tput_cpu_util": float(cpu_rate / cores_used),
        "tput_cpu_util_xs": float(xs_rate / cores_used),
        "tput_cpu_ms": float(np.mean(np.concatenate([np.asarray(w["cpu_ns"], float) for w in workers]))) / 1e6
        if n_total else NAN,
    }
    for p in LATENCY_PERCENTILES:
        out[f"tput_p{p}_ms"] = float(np.percentile(lat, p)) if n else NAN
    return out


def completed_latencies_ms(workers: list[dict], start_ns: int, end_ns: int) -> list[float]:
    """Latency (from arrival) of every request that completed inside [start_ns, end_ns]."""
    lat = []
    for w in workers:
        s, e = np.asarray(w["starts_ns"], dtype=np.int64), np.asarray(w["ends_ns"], dtype=np.int64)
        done = (e >= start_ns) & (e <= end_ns)
        lat.extend(((e[done] - s[done]) / 1e6).tolist())
    return lat


def curve_entry(r: "LoadResult") -> dict:
    """One point of a latency-vs-utilisation curve, JSON-ready (NaN -> None)."""
    s = r.summary
    keys = {"load": "tput_offered_frac", "util": "tput_busy", "offered_fps": "tput_offered_fps",
            "tput_fps": "tput_fps",
            "p50_ms": "tput_p50_ms", "p99_ms": "tput_p99_ms", "mean_ms": "tput_mean_ms",
            "service_ms": "tput_service_ms", "littles_L": "littles_L", "littles_XW": "littles_XW"}
    out = {k: (None if not isinstance(s.get(v), (int, float)) or math.isnan(s.get(v)) else float(s[v]))
           for k, v in keys.items()}
    out["offered_fps"] = r.offered_fps
    out["status"] = r.status if r.ok else f"failed: {r.reason}"
    return out


def combine_loads(results: list["LoadResult"]) -> "LoadResult":
    """One throughput point from its R invocations (each a LoadResult of K fresh workers).

    Latencies are pooled with their invocation index, so lat_* and tput_p*_ms and their
    intervals come from the hierarchical bootstrap (measure.invocations); tput_fps is the mean
    of the invocations' throughputs with its interval from the same two-level resampling
    (hierarchical_rate_ci). The other load columns are the mean over invocations (counts and
    window lengths: the sum). Paced curve entries are combined per offered fraction the same
    way (p99_ms with p99_ci_lo/hi). Failed invocations are counted with their reasons; the
    point fails only when every invocation failed.
    """
    if not results:
        raise ValueError("no invocations to combine")
    ok = [r for r in results if r.ok and r.latencies_ms]
    failed = [f"invocation {i}: {r.reason}" for i, r in enumerate(results) if not (r.ok and r.latencies_ms)]
    if not ok:
        first = results[0]
        return LoadResult(first.point, first.k, "failed", f"all {len(results)} invocation(s) failed; first: "
                          f"{first.reason}", summary=first.summary, extra=first.extra, failed_invocations=failed)
    index = [int(r.extra.get("invocation", i)) for i, r in enumerate(results) if r in ok]
    summary = {}
    for col in ok[0].summary:
        vals = [r.summary.get(col) for r in ok]
        if all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in vals):
            summary[col] = float(np.sum(vals) if col in ("tput_window_s", "tput_requests") else np.mean(vals))
        else:
            summary[col] = vals[0]
    groups = [r.latencies_ms for r in ok]
    rates = [r.tput_fps for r in ok]
    summary["tput_fps"], summary["tput_fps_ci_lo"], summary["tput_fps_ci_hi"] = hierarchical_rate_ci(groups, rates)
    lat = [x for r in ok for x in r.latencies_ms]
    inv = [i for r, i in zip(ok, index) for _ in r.latencies_ms]
    out = LoadResult(ok[0].point, ok[0].k, "ok", "", summary=summary, latencies_ms=lat, invocation=inv,
                     offered_fps=ok[0].offered_fps, failed_invocations=failed,
                     extra={"probes": [p for r in ok for p in r.extra.get("probes", [])],
                            "invocation_tput_fps": rates})
    m = out.measurement()
    for p in LATENCY_PERCENTILES:
        summary[f"tput_p{p}_ms"] = m.percentile(p)
    summary["tput_p99_ci_lo"], summary["tput_p99_ci_hi"] = m.ci(99)
    out.curve_runs = [(u, i, lat) for r, i in zip(ok, index) for u, _, lat in r.curve_runs]
    if out.curve_runs:
        summary["load_curve"] = json.dumps(_combined_curve(ok, out.curve_runs))
    return out     # scaling_eff: the mean of X_i / (K X(1)) is mean(X_i) / (K X(1)), one baseline


def _combined_curve(ok, runs) -> list:
    """The paced curve of R invocations: per offered fraction, the entries' mean, and p99 from
    the hierarchical bootstrap of the frames' latencies with its interval."""
    entries: dict = {}
    for r in ok:
        for e in json.loads(r.summary.get("load_curve") or "[]"):
            if e.get("status") == "ok" and isinstance(e.get("load"), (int, float)):
                entries.setdefault(round(float(e["load"]), 6), []).append(e)
    out = []
    for u, group in sorted(entries.items()):
        e = {k: (float(np.mean([g[k] for g in group])) if all(isinstance(g.get(k), (int, float)) for g in group)
                 else group[0].get(k)) for k in group[0]}
        e["load"] = group[0]["load"]    # the offered fraction itself, not a float mean of equal values
        lat = [(i, x) for uu, i, xs in runs if round(float(uu), 6) == u for x in xs]
        if lat:
            m = Replicated([x for _, x in lat], [i for i, _ in lat])
            e["p99_ms"] = m.percentile(99)
            e["p99_ci_lo"], e["p99_ci_hi"] = m.ci(99)
            e["p50_ms"] = m.percentile(50)
        e["invocations"] = len(group)
        out.append(e)
    return out


def probe_summary(probes: list) -> dict:
    """schema.PROBE_COLUMNS from the probe records of every load worker (one per worker
    process, of every invocation): the median start and end times, and every record."""
    out = {}
    for phase in ("start", "end"):
        vals = sorted(float(p[phase]["ms"]) for p in probes
                      if isinstance(p.get(phase), dict) and isinstance(p[phase].get("ms"), (int, float)))
        out[f"probe_{phase}_ms"] = float(np.median(vals)) if vals else NAN
    out["probe_raw"] = json.dumps(probes, sort_keys=True) if probes else ""
    return out


def single_stream_fps(row: dict):
    """X(1) of an ok K = 1 row, the one baseline of scaling_eff = X(K) / (K X(1)) everywhere.

    The row's measured throughput (tput_fps) when it was measured under load, else
    1000 / mean latency: one closed-loop stream (L = 1) serves 1 / W frames a second by
    Little's law. Not the row's `fps` (1000 / p50): on a noisy host mean and median differ a lot.
    """
    if row.get("status") != "ok" or int(row.get("concurrency") or 1) != 1:
        return None
    for value in (row.get("tput_fps"), 1000.0 / row["lat_mean_ms"] if _positive(row.get("lat_mean_ms")) else None):
        if _positive(value):
            return float(value)
    return None


def _positive(value) -> bool:
    return isinstance(value, (int, float)) and math.isfinite(value) and value > 0
