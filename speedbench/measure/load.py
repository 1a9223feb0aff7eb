"""Throughput under concurrency: K worker processes of one configuration, measured together.

Throughput is not 1 / latency: K copies of a model on K x T cores compete for memory
bandwidth, caches and (with more threads than cores) the cores themselves. So we run them.

How one load point is measured (``measure_load``):

1. K fresh worker processes (``python -m speedbench.measure.load SPEC.json``), each loading
   its own session through the measure package's backend loaders, with T = point.intra_threads
   threads (thread environment variables set before the worker imports anything) and,
   optionally, pinned to its own disjoint set of cores.
2. Each worker warms up, then reports ready. When all K are ready the parent writes one
   start time (a "go" file); every worker sleeps until that instant and issues requests back
   to back (closed loop: the next frame as soon as the last returns) until the common end time.
   Clocks: ``time.monotonic_ns`` (CLOCK_MONOTONIC on Linux), one clock for all processes.
3. Every request's start and end timestamp and its process CPU time are recorded. From them
   (``summarise``), over the common window [start, end]:
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
   - scaling efficiency X(K) / (K X(1)) when the K = 1 throughput is known.
4. The parent enforces one timeout for the whole point and survives any worker dying;
   the point is then "failed" with the reason, as for single points.

Paced runs (``measure_curve``): frames arrive on a fixed clock at a fraction u of the closed-loop
capacity, split over the K workers as cameras would be, and each frame's latency runs from its
arrival, so queueing is included; the p99 at each achieved utilisation is what sizing reads.

Public: ``measure_load``, ``measure_scaling``, ``measure_curve``, ``LoadResult``, ``summarise``,
``LOAD_COLUMNS``.
"""
from __future__ import annotations

import dataclasses
import json
import math
import os
import signal
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from speedbench.errors import UserError

from speedbench.schema import LATENCY_PERCENTILES, LOAD_COLUMNS
from speedbench.system import atomic_write, cores_available

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
        from speedbench.measure.stats import Measurement

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
        from speedbench.measure.invocations import Replicated

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
        from speedbench.measure.point import Point

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


# --------------------------------------------------------------------------- analysis
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


# --------------------------------------------------------------------------- parent side
def host_cores() -> int:
    """Cores this process may run on."""
    return cores_available()


def measure_load(point, images, k: int | None = None, policy=None, timeout_s: float = 600,
                 seconds: float | None = None, min_requests: int = 20, pin: bool = False,
                 baseline_fps: float | None = None, offered_fps: float | None = None) -> "LoadResult":
    """Measure throughput of ``k`` concurrent workers of ``point`` (a speedbench.measure.Point).

    images: uint8 [H, W, 3] arrays or image paths, cycled by every worker.
    k: number of concurrent workers (default point.concurrency); k x T must fit the host's cores.
    policy: speedbench.measure.Policy; its warmup_min/warmup_max/settle_tol drive each worker's
      warm-up, and its max_seconds is the default window when ``seconds`` is None (capped at 10 s).
    seconds: length of the common measurement window; it is stretched so that every worker can
      complete about ``min_requests`` requests (from the slowest warm-up median).
    pin: give each worker its own disjoint set of T cores (psutil-free: os.sched_setaffinity).
      A point with affinity > 0 is always pinned, to that many cores per worker.
    baseline_fps: X(1) of the same configuration, for scaling_eff = X(K) / (K X(1)); for k = 1
      the efficiency is 1 by definition.
    offered_fps: paced (open-loop) arrivals instead of a closed loop: frames arrive on a fixed
      clock at offered_fps in total, split evenly over the K workers (like cameras); each frame's
      latency runs from its arrival, so it includes queueing. A paced result describes the same
      configuration at a given load (it has the same point id as the closed-loop K point, so it
      is kept as a curve entry, not a row); see ``measure_curve``.
    timeout_s: for the whole point (start-up, warm-up, window). On timeout or any worker failure
      every worker is killed and the result is status "failed" with the reason; no exception.
    Bad arguments (k < 1, K x T above the host's cores, thread count 0) raise UserError.
    """
    from speedbench.measure.point import Policy

    policy = policy or Policy()
    k = int(point.concurrency if k is None else k)
    threads = int(point.intra_threads)
    if k < 1:
        raise UserError(f"concurrency: K must be >= 1, got {k}")
    if threads < 1:
        raise UserError("intra_threads: a load point needs an explicit thread count (0 = library default "
                        "has no defined core count)")
    per_worker = int(point.affinity) if point.affinity else (threads if pin else 0)
    cores = host_cores()
    need = k * (per_worker or threads)
    if need > cores:
        raise UserError(f"concurrency: K={k} workers x {per_worker or threads} cores = {need} cores, "
                        f"but this host has {cores}")
    point = dataclasses.replace(point, concurrency=1, affinity=per_worker)
    point.validate()  # the single-stream checks (graph file, backend, thread fields)
    point = dataclasses.replace(point, concurrency=k)
    window = float(seconds if seconds is not None else min(policy.max_seconds, 10.0))
    if window <= 0:
        raise UserError(f"seconds: the measurement window must be > 0, got {seconds!r}")
    if offered_fps is not None and not offered_fps > 0:
        raise UserError(f"offered_fps: must be > 0, got {offered_fps!r}")
    with tempfile.TemporaryDirectory(prefix="speedbench-load-") as tmp:
        tmp = Path(tmp)
        images_path = _save_images(images, tmp / "images.npz")
        allowed = sorted(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else []
        specs = []
        for i in range(k):
            spec = {
                "point": {**point.to_dict(), "concurrency": 1}, "images": str(images_path),
                "cores": allowed[i * per_worker:(i + 1) * per_worker] if per_worker else None,
                "policy": policy.to_dict(), "ready": str(tmp / f"ready.{i}"), "go": str(tmp / "go.json"),
                "result": str(tmp / f"result.{i}.json"), "index": i,
                "parent_pid": os.getpid(), "timeout_s": timeout_s,
                # paced: worker i gets every K-th frame of one clock at offered_fps
                "period_ns": int(k * 1e9 / offered_fps) if offered_fps else 0,
                "phase_ns": int(i * 1e9 / offered_fps) if offered_fps else 0,
            }
            path = tmp / f"spec.{i}.json"
            path.write_text(json.dumps(spec))
            specs.append((spec, path))
        result = _run_workers(point, k, specs, tmp, window, min_requests, timeout_s)
    result.offered_fps = offered_fps
    if result.ok:
        result.summary["host_cores"] = cores
        result.summary["tput_offered_fps"] = offered_fps if offered_fps else NAN
        if k == 1:
            result.summary["scaling_eff"] = 1.0
        elif baseline_fps and baseline_fps > 0:
            result.summary["scaling_eff"] = result.tput_fps / (k * baseline_fps)
        else:
            result.summary["scaling_eff"] = NAN
    return result


def measure_scaling(point, images, ks=(1, 2), on_result=None, utilisations=(), **kwargs) -> list["LoadResult"]:
    """measure_load at each K in ``ks`` (K = 1 first, so every efficiency has its baseline).

    Each K runs its own fresh workers; a failed K does not stop the others.
    utilisations: for the largest K, also run ``measure_curve`` at these fractions of its
    closed-loop throughput and keep the curve in that result's ``load_curve`` column.
    on_result(result) is called as each K finishes, so callers can store it at once.
    kwargs go to measure_load (policy, timeout_s, seconds, min_requests, pin, baseline_fps).
    """
    ks = sorted({int(x) for x in ks})
    baseline = kwargs.pop("baseline_fps", None)
    out = []
    for k in ([1] if 1 not in ks and baseline is None else []) + ks:
        res = measure_load(point, images, k=k, baseline_fps=baseline, **kwargs)
        if k == 1 and res.ok:
            baseline = res.tput_fps
        if k == ks[-1] and utilisations:
            add_curve(res, point, images, utilisations, **kwargs)
        if k in ks:
            out.append(res)
            if on_result is not None:
                on_result(res)
    return out


def add_curve(result: "LoadResult", point, images, utilisations, **kwargs) -> None:
    """Paced runs at fractions of an ok closed-loop result's throughput, kept in its load_curve column."""
    if result.ok and utilisations:
        paced = measure_curve(point, images, result.k, utilisations, capacity_fps=result.tput_fps, **kwargs)
        result.summary["load_curve"] = json.dumps([curve_entry(r) for r in paced])
        result.curve_runs = [(float(r.summary.get("tput_offered_frac", u)), 0, list(r.latencies_ms))
                             for u, r in zip(utilisations, paced) if r.ok]
        result.extra.setdefault("probes", []).extend(p for r in paced for p in r.extra.get("probes", []))


def measure_curve(point, images, k: int, utilisations=(0.5, 0.7, 0.9), capacity_fps: float | None = None,
                  **kwargs) -> list["LoadResult"]:
    """Latency against utilisation: paced runs of K workers at fractions of their capacity.

    capacity_fps: the closed-loop throughput X(K) (measured first when not given). Frames then
    arrive on a fixed clock at u x capacity for each u; the latency of each frame runs from its
    arrival, so waiting behind earlier frames (queueing) is included, unlike the closed loop.
    Each result records u as ``tput_offered_frac`` (the same definition of utilisation as a
    deployment's required / capacity) and the busy fraction per worker it achieved, ``tput_busy``
    (lower than u when service is faster below saturation).
    """
    for u in utilisations:
        if not 0 < float(u) <= 1.5:
            raise UserError(f"utilisations: each must be in (0, 1.5], got {u!r}")
    if capacity_fps is None:
        closed = measure_load(point, images, k=k, **kwargs)
        if not closed.ok:
            return [closed]
        capacity_fps = closed.tput_fps
    out = []
    for u in utilisations:
        r = measure_load(point, images, k=k, offered_fps=float(u) * capacity_fps, **kwargs)
        r.summary["tput_offered_frac"] = float(u)  # offered load / closed-loop capacity
        out.append(r)
    return out


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
    from speedbench.measure.invocations import hierarchical_rate_ci

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
    from speedbench.measure.invocations import Replicated

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


def _save_images(images, path: Path) -> Path:
    from speedbench.measure.launch import load_images

    arrays = load_images(images)  # UserError naming a bad image
    np.savez(path, *arrays)
    return path


def _worker_env(point) -> dict:
    from speedbench.measure.launch import thread_env

    env = thread_env(point)
    # The worker must import this working tree, whatever the caller's directory.
    root = str(Path(__file__).resolve().parents[2])
    env["PYTHONPATH"] = root + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    return env


def _run_workers(point, k, specs, tmp: Path, window: float, min_requests: int, timeout_s: float):
    deadline = time.monotonic() + timeout_s
    env = _worker_env(point)
    procs = []
    try:
        for spec, path in specs:
            log = open(tmp / f"worker.{spec['index']}.log", "wb")
            procs.append(subprocess.Popen([sys.executable, "-m", "speedbench.measure.load", str(path)],
                                          env=env, stdout=log, stderr=subprocess.STDOUT,
                                          start_new_session=True))
            log.close()
        # Barrier: wait until every worker has loaded and warmed up.
        ready = [None] * k
        while not all(ready):
            for i, (spec, _) in enumerate(specs):
                if ready[i] is None and os.path.exists(spec["ready"]):
                    ready[i] = _read_json(spec["ready"])
            failed = _first_failure(procs, specs, tmp)
            if failed:
                return LoadResult(point, k, "failed", failed)
            if time.monotonic() > deadline:
                return LoadResult(point, k, "failed", f"timed out after {timeout_s:g} s (workers not ready)")
            time.sleep(0.01)
        # Stretch the window so the slowest worker completes about min_requests requests.
        slowest_ms = max(r.get("warmup_p50_ms", 0.0) for r in ready)
        stretched = max(window, min_requests * slowest_ms / 1000.0)
        # ... but leave half of the remaining time budget for draining and reporting.
        window = min(stretched, max(window, 0.5 * (deadline - time.monotonic())))
        lead_ns = 200_000_000  # 0.2 s for every worker to see the go file
        start_ns = time.monotonic_ns() + lead_ns
        end_ns = start_ns + int(window * 1e9)
        _write_json(Path(specs[0][0]["go"]), {"start_ns": start_ns, "end_ns": end_ns})
        while any(p.poll() is None for p in procs):
            failed = _first_failure(procs, specs, tmp)
            if failed:
                return LoadResult(point, k, "failed", failed)
            if time.monotonic() > deadline:
                return LoadResult(point, k, "failed", f"timed out after {timeout_s:g} s")
            time.sleep(0.02)
        failed = _first_failure(procs, specs, tmp)
        if failed:
            return LoadResult(point, k, "failed", failed)
        workers = [_read_json(spec["result"]) for spec, _ in specs]
    finally:
        for p in procs:
            if p.poll() is None:
                try:
                    os.killpg(p.pid, signal.SIGKILL)
                except ProcessLookupError:
                    pass
                p.wait()
    cores_used = k * (point.affinity or point.intra_threads)
    summary = summarise(workers, start_ns, end_ns, cores_used)
    summary["tput_rss_total_mib"] = float(sum(w.get("rss_peak_mib", NAN) for w in workers))
    lat = completed_latencies_ms(workers, start_ns, end_ns)
    if not lat:
        return LoadResult(point, k, "failed", "no request completed inside the measurement window",
                          summary=summary, workers=workers)
    return LoadResult(point, k, "ok", "", summary=summary, latencies_ms=lat, workers=workers,
                      extra={"probes": [w["probe"] for w in workers if isinstance(w.get("probe"), dict)]})


def _first_failure(procs, specs, tmp: Path) -> str:
    """Reason of the first worker that exited badly, or ''."""
    for i, p in enumerate(procs):
        code = p.poll()
        if code is None or (code == 0 and os.path.exists(specs[i][0]["result"])):
            continue
        who = f"worker {i + 1} of {len(procs)}"
        if code < 0:
            from speedbench.measure.launch import signal_reason

            return f"{who}: {signal_reason(code)}"
        result = specs[i][0]["result"]
        if os.path.exists(result):
            reason = _read_json(result).get("reason", "")
            if reason:
                return f"{who}: {reason}"
        tail = (tmp / f"worker.{i}.log").read_text(errors="replace").strip().splitlines()[-1:] or [""]
        return f"{who}: exited with status {code} {tail[0]}".strip()
    return ""


def _read_json(path) -> dict:
    with open(path) as fh:
        return json.load(fh)


def _write_json(path: Path, obj) -> None:
    atomic_write(path, json.dumps(obj))  # a reader sees all of it or nothing


# --------------------------------------------------------------------------- worker side
def _worker_main(spec_path: str) -> int:
    spec = _read_json(spec_path)
    result_path = Path(spec["result"])
    if spec.get("parent_pid"):
        # Each load worker runs in its own session (start_new_session), so the watch ending
        # its process group ends this worker alone.
        from speedbench.measure.worker import watch_parent

        watch_parent(int(spec["parent_pid"]), leftovers=os.path.dirname(os.path.abspath(spec_path)))
    try:
        if spec.get("cores"):
            os.sched_setaffinity(0, spec["cores"])
        from speedbench.measure.probe import run_probe

        # Host speed before the measured stack is imported, and again after the window
        # (measure/probe.py; the same record a single-stream worker keeps).
        probe = {"start": run_probe()}
        from speedbench.measure.point import Point, Policy
        from speedbench.measure.timing import warm_up

        point = Point.from_dict(spec["point"])
        policy = Policy.from_dict(spec["policy"])
        run = _load_runner(point)
        with np.load(spec["images"]) as npz:
            inputs = [run.prepare(npz[name]) for name in npz.files]  # outside the timed region
        warm = warm_up(run, inputs, policy)
        warm_ms = warm["samples_ms"][-max(1, policy.warmup_window):] or [0.0]
        _write_json(Path(spec["ready"]), {"warmup_p50_ms": float(np.median(warm_ms)), "pid": os.getpid()})
        go = Path(spec["go"])
        give_up = time.monotonic() + float(spec.get("timeout_s", 600))
        while not go.exists():
            if time.monotonic() > give_up:  # a parent that gave up never writes the go file
                return 3
            time.sleep(0.002)
        times = _read_json(go)
        start_ns, end_ns = times["start_ns"], times["end_ns"]
        delay = (start_ns - time.monotonic_ns()) / 1e9
        if delay > 0:
            time.sleep(delay)
        service = None
        if spec.get("period_ns"):
            starts, service, ends, cpus = _paced_loop(run, inputs, start_ns + spec["phase_ns"], end_ns,
                                                      spec["period_ns"], spec["index"])
        else:
            starts, ends, cpus = _closed_loop(run, inputs, end_ns, spec["index"])
        cpu_total = cpus.pop()
        probe["end"] = run_probe()
        import resource

        rss_peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # KiB on Linux
        _write_json(result_path, {"status": "ok", "starts_ns": starts, "ends_ns": ends, "cpu_ns": cpus,
                                  **({"service_ns": service} if service is not None else {}),
                                  "cpu_total_ns": cpu_total, "rss_peak_mib": rss_peak, "probe": probe,
                                  "affinity": sorted(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity")
                                  else []})
        return 0
    except Exception as exc:  # reported to the parent, which records the point as failed
        msg = " ".join(str(exc).split())
        _write_json(result_path, {"status": "failed", "reason": f"raised {type(exc).__name__}: {msg}"[:500]})
        return 1


def _closed_loop(run, inputs, end_ns: int, offset: int):
    """Back-to-back requests until end_ns. Returns start/end timestamps and CPU per request;
    the last element of the CPU list is the CPU time over the whole loop."""
    mono, cpu = time.monotonic_ns, time.process_time_ns
    starts, ends, cpus = [], [], []
    n_inputs = len(inputs)
    i = offset  # workers start at different images so they do not run in lock-step
    c_first = cpu()
    while True:
        c0 = cpu()
        t0 = mono()
        if t0 >= end_ns:
            break
        run(inputs[i % n_inputs])
        t1 = mono()
        c1 = cpu()
        starts.append(t0)
        ends.append(t1)
        cpus.append(c1 - c0)
        i += 1
    cpus.append(c0 - c_first)
    return starts, ends, cpus


def _paced_loop(run, inputs, first_ns: int, end_ns: int, period_ns: int, offset: int):
    """Frames arrive every period_ns from first_ns until end_ns and are served in order.

    Returns arrival, service-start and end timestamps, CPU per request (+ loop total last).
    An overloaded worker stops serving a backlog one window after end_ns; frames it never
    served simply do not count as completed.
    """
    mono, cpu = time.monotonic_ns, time.process_time_ns
    arrivals, service, ends, cpus = [], [], [], []
    n_inputs = len(inputs)
    give_up = end_ns + (end_ns - first_ns)
    c_first = cpu()
    j = 0
    while True:
        a = first_ns + j * period_ns
        if a >= end_ns:
            break
        now = mono()
        if now < a:
            time.sleep((a - now) / 1e9)
        elif now > give_up:
            break
        c0 = cpu()
        t0 = mono()
        run(inputs[(offset + j) % n_inputs])
        t1 = mono()
        cpus.append(cpu() - c0)
        arrivals.append(a)
        service.append(t0)
        ends.append(t1)
        j += 1
    cpus.append(cpu() - c_first)
    return arrivals, service, ends, cpus


def _load_runner(point):
    """The measure package's backend Runner: prepare(image) -> input, __call__(input) -> outputs."""
    from speedbench.measure.backends import get_backend

    return get_backend(point.backend).load(point)


if __name__ == "__main__":  # python -m speedbench.measure.load SPEC.json
    sys.exit(_worker_main(sys.argv[1]))
