"""The parent side of a throughput point: K fresh worker processes of one configuration.

Throughput is not 1 / latency: K copies of a model on K x T cores compete for memory
bandwidth, caches and (with more threads than cores) the cores themselves. So we run them.

How one throughput point is measured (``measure_load``):

1. K fresh worker processes (``python -m speedbench.measure.concurrent_worker SPEC.json``), each
   loading its own session through the measure package's backend loaders, with
   T = point.intra_threads threads (thread environment variables set before the worker imports
   anything) and, optionally, pinned to its own disjoint set of cores.
2. Each worker warms up, then reports ready. When all K are ready the parent writes one
   start time (a "go" file); every worker sleeps until that instant and issues requests back
   to back (closed loop: the next frame as soon as the last returns) until the common end time.
   Clocks: ``time.monotonic_ns`` (CLOCK_MONOTONIC on Linux), one clock for all processes.
3. The parent turns the workers' timelines into a ``LoadResult``
   (speedbench.measure.concurrent_result: throughput, latency under load, Little's law,
   utilisation law, scaling efficiency).
4. The parent enforces one timeout for the whole point and survives any worker dying;
   the point is then "failed" with the reason, as for single points.

Paced runs (``measure_curve``): frames arrive on a fixed clock at a fraction u of the closed-loop
capacity, split over the K workers as cameras would be, and each frame's latency runs from its
arrival, so queueing is included; the p99 at each achieved utilisation is what sizing reads.

Public: ``measure_load``, ``measure_scaling``, ``measure_curve``, ``add_curve``, ``host_cores``.
"""
from __future__ import annotations

import dataclasses
import json
import os
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from speedbench.errors import UserError
from speedbench.measure.concurrent_result import (LOAD_COLUMNS, NAN, LoadResult, completed_latencies_ms,
                                                  curve_entry, summarise)
from speedbench.measure.concurrent_worker import read_json, write_json
from speedbench.measure.launch import load_images, signal_reason, thread_env
from speedbench.measure.point import Policy
from speedbench.system import cores_available

# Re-exported: callers take the result type and its maths from the module they measure with.
__all__ = ["measure_load", "measure_scaling", "measure_curve", "add_curve", "host_cores",
           "LoadResult", "summarise", "curve_entry", "LOAD_COLUMNS"]


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


def _save_images(images, path: Path) -> Path:
    arrays = load_images(images)  # UserError naming a bad image
    np.savez(path, *arrays)
    return path


def _worker_env(point) -> dict:
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
            procs.append(subprocess.Popen([sys.executable, "-m", "speedbench.measure.concurrent_worker", str(path)],
                                          env=env, stdout=log, stderr=subprocess.STDOUT,
                                          start_new_session=True))
            log.close()
        # Barrier: wait until every worker has loaded and warmed up.
        ready = [None] * k
        while not all(ready):
            for i, (spec, _) in enumerate(specs):
                if ready[i] is None and os.path.exists(spec["ready"]):
                    ready[i] = read_json(spec["ready"])
            stop = _stop_reason(procs, specs, tmp, deadline, f"timed out after {timeout_s:g} s (workers not ready)")
            if stop:
                return LoadResult(point, k, "failed", stop)
            time.sleep(0.01)
        # Stretch the window so the slowest worker completes about min_requests requests.
        slowest_ms = max(r.get("warmup_p50_ms", 0.0) for r in ready)
        stretched = max(window, min_requests * slowest_ms / 1000.0)
        # ... but leave half of the remaining time budget for draining and reporting.
        window = min(stretched, max(window, 0.5 * (deadline - time.monotonic())))
        lead_ns = 200_000_000  # 0.2 s for every worker to see the go file
        start_ns = time.monotonic_ns() + lead_ns
        end_ns = start_ns + int(window * 1e9)
        write_json(Path(specs[0][0]["go"]), {"start_ns": start_ns, "end_ns": end_ns})
        while any(p.poll() is None for p in procs):
            stop = _stop_reason(procs, specs, tmp, deadline, f"timed out after {timeout_s:g} s")
            if stop:
                return LoadResult(point, k, "failed", stop)
            time.sleep(0.02)
        failed = _first_failure(procs, specs, tmp)
        if failed:
            return LoadResult(point, k, "failed", failed)
        workers = [read_json(spec["result"]) for spec, _ in specs]
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


def _stop_reason(procs, specs, tmp: Path, deadline: float, timed_out: str) -> str:
    """Why the point must stop now: a worker failed, or the deadline passed (``timed_out``); '' to go on."""
    failed = _first_failure(procs, specs, tmp)
    if failed:
        return failed
    return timed_out if time.monotonic() > deadline else ""


def _first_failure(procs, specs, tmp: Path) -> str:
    """Reason of the first worker that exited badly, or ''."""
    for i, p in enumerate(procs):
        code = p.poll()
        if code is None or (code == 0 and os.path.exists(specs[i][0]["result"])):
            continue
        who = f"worker {i + 1} of {len(procs)}"
        if code < 0:
            return f"{who}: {signal_reason(code)}"
        result = specs[i][0]["result"]
        if os.path.exists(result):
            reason = read_json(result).get("reason", "")
            if reason:
                return f"{who}: {reason}"
        tail = (tmp / f"worker.{i}.log").read_text(errors="replace").strip().splitlines()[-1:] or [""]
        return f"{who}: exited with status {code} {tail[0]}".strip()
    return ""

