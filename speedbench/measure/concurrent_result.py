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

import math
from dataclasses import dataclass, field

import numpy as np

from speedbench.measure.stats import Measurement
from speedbench.schema import LATENCY_PERCENTILES, LOAD_COLUMNS

__all__ = ["LoadResult", "summarise", "completed_latencies_ms", "curve_entry", "single_stream_fps", "LOAD_COLUMNS",
           "NAN"]

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
    workers: list = field(default_factory=list)   # raw per-worker timelines (see _worker_main)
    offered_fps: float | None = None               # paced arrivals; None = closed loop

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
            m = Measurement(self.latencies_ms)
            row.update(m.summary())
            row["fps"] = 1000.0 / m.median if m.median > 0 else NAN  # one stream's frame rate
        row.update(self.load_columns())
        row["cores_used"] = self.summary.get("cores_used", self.k * max(self.point.intra_threads, 1))
        return row

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
