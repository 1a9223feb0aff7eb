"""The worker process: measures one point and writes its result as JSON.

Run as `python -m speedbench.measure.worker SPEC.json` by speedbench.measure.launch
(never imported by the parent for measuring). The parent has already put the
thread environment variables (OMP_NUM_THREADS, MKL_NUM_THREADS, ...) in this
process's environment; CPU affinity is applied here before any heavy import.
The result file is written atomically (temp file + os.replace), so the parent
either reads a complete result or none.
"""
from __future__ import annotations

import json
import os
import sys
import traceback

from speedbench.measure.probe import run_probe
from speedbench.measure.reference import ReferenceTimer
from speedbench.system import atomic_write

# Libraries whose import cost belongs to "after imports" for each backend. Only what the timed
# path needs: `onnx` (about 1 s to import here) is used only by the stage profile of the first
# invocation, after timing, and paying it in every worker process doubled a short invocation.
IMPORTS = {"ort": ("numpy", "onnxruntime"), "eager": ("numpy", "torch", "torchvision"),
           "synthetic": ("numpy",), "adapted": ("numpy", "onnxruntime", "onnx")}


def pin(cores: int) -> list[int]:
    """Pin this process to the first `cores` allowed CPUs (emulates an N-core budget)."""
    import psutil

    proc = psutil.Process()
    allowed = sorted(proc.cpu_affinity())
    chosen = allowed[:cores]
    proc.cpu_affinity(chosen)
    return chosen


def write_json_atomic(path: str, data: dict) -> None:
    atomic_write(path, json.dumps(data, allow_nan=True), fsync=True)


def run_worker(spec: dict) -> dict:
    """Measure the point described by `spec` in this process; returns PointResult.to_dict()."""
    point_d, policy_d = spec["point"], spec["policy"]
    extra = {}
    if point_d.get("affinity"):
        extra["cpus"] = pin(int(point_d["affinity"]))
    # Host speed before anything of the measured stack is imported (see measure/probe.py).
    probe = {"start": run_probe()}

    import importlib

    for name in IMPORTS[point_d["backend"]]:
        importlib.import_module(name)

    import numpy as np

    from speedbench.measure import memory, timing
    from speedbench.measure.backends import get_backend
    from speedbench.measure.point import Point, Policy
    from speedbench.measure.result import PointResult

    point, policy = Point.from_dict(point_d), Policy.from_dict(policy_d)
    mem = {"rss_imports_mib": memory.rss_mib()}

    runner = get_backend(point.backend).load(point)
    with np.load(spec["images"]) as z:
        images = [z[k] for k in sorted(z.files, key=lambda k: int(k.split("_")[-1]))]
    inputs = [runner.prepare(img) for img in images]
    mem["rss_loaded_mib"] = memory.rss_mib()
    mem["model_file_mib"] = runner.model_file_mib
    if getattr(runner, "param_mib", None) is not None:
        extra["param_mib"] = runner.param_mib

    warm = timing.warm_up(runner, inputs, policy)
    tracker = memory.PeakTracker(policy.memory_every)
    reference = _reference(point, policy, extra)
    between = tracker if reference is None else (lambda i: (tracker(i), reference.tick()))
    measurement, how = timing.timed_runs(runner, inputs, policy, between=between)
    mem.update(tracker.result())
    if reference is not None:
        extra["reference"] = reference.summary()

    result = PointResult(point=point, measurement=measurement, memory=mem, extra=extra)
    extra.update(how)
    extra["warmup_runs"], extra["warmup_settled"] = warm["runs"], warm["settled"]
    extra["warmup_ms"] = warm["samples_ms"]
    extra["timed_region"] = runner.timed_region
    extra["n_images"] = len(inputs)
    extra["threads_env"] = {k: os.environ.get(k) for k in THREAD_VARS if k in os.environ}
    if policy.profile_stages and policy.profile_reps > 0:
        prof = runner.profile(inputs, policy.profile_reps)
        if prof:
            result.stages = prof.pop("stages")
            result.profiled_ms = float(prof["profiled_ms"])
            runs = sorted(prof.get("run_ms") or [result.profiled_ms])
            result.profiling_overhead = float(np.median(runs)) / measurement.median - 1
            extra["profile"] = prof
    if policy.subgraph_check and hasattr(runner, "subgraphs"):
        # Opt-in: the stage split checked without the profiler (each stage's sub-graph timed alone).
        try:
            extra["subgraphs"] = runner.subgraphs(inputs, policy.subgraph_reps)
        except Exception as exc:  # the check is extra; its failure must not cost the point
            extra["subgraphs"] = {"error": f"{type(exc).__name__}: {' '.join(str(exc).split())}"[:300]}
    runner.close()
    probe["end"] = run_probe()
    extra["probe"] = probe
    return result.to_dict()


def _reference(point, policy, extra: dict):
    """The host reference timer for an ONNX Runtime point (measure/reference.py), or None.

    The reference only helps compare two runs: if it cannot run (a damaged install), the point
    is measured without it and the reason is kept in extra["reference_error"]."""
    if not policy.host_reference or point.backend not in ("ort", "adapted"):
        return None
    try:
        return ReferenceTimer()
    except Exception as exc:
        extra["reference_error"] = f"{type(exc).__name__}: {' '.join(str(exc).split())}"[:300]
        return None


THREAD_VARS = ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS", "VECLIB_MAXIMUM_THREADS",
               "NUMEXPR_NUM_THREADS", "BLIS_NUM_THREADS")


def watch_parent(parent_pid: int, every_s: float = 1.0, leftovers: str | None = None) -> None:
    """End this worker (and its process group) if the process that launched it dies.

    The worker runs in its own session so the parent can kill the whole group on a
    timeout; the price is that it would outlive a parent that is itself killed (a
    sweep killed mid-point, a lost cluster worker) and disturb whatever runs next.
    A daemon thread that wakes once a second costs nothing measurable.
    leftovers: the launcher's temporary point directory; nobody will read it now,
    so it is removed (only a directory named speedbench-*, the launchers' prefix).
    """
    import shutil
    import signal
    import threading
    import time

    def check():
        while True:
            time.sleep(every_s)
            if os.getppid() != parent_pid:
                try:
                    if leftovers and os.path.basename(leftovers).startswith("speedbench-"):
                        shutil.rmtree(leftovers, ignore_errors=True)
                    os.killpg(os.getpgrp(), signal.SIGKILL)
                finally:
                    os._exit(1)

    threading.Thread(target=check, name="parent-watch", daemon=True).start()


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    with open(argv[0]) as f:
        spec = json.load(f)
    if spec.get("parent_pid"):
        watch_parent(int(spec["parent_pid"]), leftovers=os.path.dirname(os.path.abspath(argv[0])))
    try:
        out = run_worker(spec)
    except BaseException as exc:  # report every failure to the parent, then exit non-zero
        reason = f"raised {type(exc).__name__}: {' '.join(str(exc).split())}"[:500]
        write_json_atomic(spec["result"], {"point": spec["point"], "status": "failed", "reason": reason,
                                           "extra": {"traceback": traceback.format_exc()[-4000:]}})
        return 1
    write_json_atomic(spec["result"], out)
    return 0


if __name__ == "__main__":
    sys.exit(main())
