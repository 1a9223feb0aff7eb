"""The worker side of a throughput point: one of K processes, timing requests until a common end.

Run as ``python -m speedbench.measure.concurrent_worker SPEC.json`` by
speedbench.measure.concurrent_launch. It loads its session, warms up, reports ready, waits for
the parent's common start time, then runs a closed loop (the next frame as soon as the last
returns) or a paced loop (frames arrive on a clock), and writes every request's timestamps and
CPU time as JSON (atomically: the parent reads all of it or nothing).
"""
from __future__ import annotations

import json
import os
import sys
import time
from pathlib import Path

import numpy as np

from speedbench.system import atomic_write


def read_json(path) -> dict:
    with open(path) as fh:
        return json.load(fh)


def write_json(path: Path, obj) -> None:
    atomic_write(path, json.dumps(obj))  # a reader sees all of it or nothing


def worker_main(spec_path: str) -> int:
    spec = read_json(spec_path)
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
        write_json(Path(spec["ready"]), {"warmup_p50_ms": float(np.median(warm_ms)), "pid": os.getpid()})
        go = Path(spec["go"])
        give_up = time.monotonic() + float(spec.get("timeout_s", 600))
        while not go.exists():
            if time.monotonic() > give_up:  # a parent that gave up never writes the go file
                return 3
            time.sleep(0.002)
        times = read_json(go)
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
        write_json(result_path, {"status": "ok", "starts_ns": starts, "ends_ns": ends, "cpu_ns": cpus,
                                  **({"service_ns": service} if service is not None else {}),
                                  "cpu_total_ns": cpu_total, "rss_peak_mib": rss_peak, "probe": probe,
                                  "affinity": sorted(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity")
                                  else []})
        return 0
    except Exception as exc:  # reported to the parent, which records the point as failed
        msg = " ".join(str(exc).split())
        write_json(result_path, {"status": "failed", "reason": f"raised {type(exc).__name__}: {msg}"[:500]})
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



if __name__ == "__main__":  # python -m speedbench.measure.concurrent_worker SPEC.json
    sys.exit(worker_main(sys.argv[1]))
