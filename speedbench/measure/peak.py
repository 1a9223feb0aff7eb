"""This host's dense fp32 matrix-multiply peak: the yardstick for "how close a stage runs to the machine".

A stage's achieved GMAC/s (its counted multiply-accumulates over its time) means
little on its own: 20 GMAC/s is most of one host and a fraction of another.
So each run measures, once, what a large dense fp32 matrix product reaches on
this host at 1 thread and at each thread count the run uses, and records it in
the run's meta with the method. Each thread count runs in a fresh process with
the thread environment set before the math library loads (as a measurement
worker does), so one setting cannot leak into the next.

    python -m speedbench.measure.peak --threads 2      # prints one JSON result
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time

SIZE = 2048      # n: an n x n by n x n product is n^3 multiply-accumulates
REPS = 5
WARMUP = 1


def method(n: int = SIZE, reps: int = REPS, library: str = "torch") -> str:
    return (f"{library} fp32 matmul {n}x{n} @ {n}x{n} (n^3 MACs), best of {reps} after {WARMUP} warm-up, "
            f"one fresh process per thread count with the thread variables set before import")


def measure_here(threads: int, n: int = SIZE, reps: int = REPS) -> dict:
    """Time the product in this process at `threads` (0 = the library's default)."""
    try:
        import torch

        if threads > 0:
            torch.set_num_threads(threads)
        gen = torch.Generator().manual_seed(0)
        a = torch.rand(n, n, generator=gen, dtype=torch.float32)
        b = torch.rand(n, n, generator=gen, dtype=torch.float32)
        mm, library = torch.matmul, f"torch {torch.__version__}"
        used = torch.get_num_threads()
    except ImportError:   # torch is optional for the measuring side; numpy's BLAS then
        import numpy as np

        rng = np.random.default_rng(0)
        a = rng.random((n, n), dtype=np.float32)
        b = rng.random((n, n), dtype=np.float32)
        mm, library = np.matmul, f"numpy {np.__version__}"
        used = threads
    times = []
    for i in range(WARMUP + reps):
        t0 = time.perf_counter()
        mm(a, b)
        dt = time.perf_counter() - t0
        if i >= WARMUP:
            times.append(dt)
    macs = float(n) ** 3
    best, median = min(times), sorted(times)[len(times) // 2]
    return {"threads": threads, "threads_used": used, "n": n, "library": library,
            "gmac_s": macs / best / 1e9, "gmac_s_median": macs / median / 1e9,
            "gflop_s": 2 * macs / best / 1e9, "method": method(n, reps, library.split()[0])}


def measure_peaks(thread_counts, n: int = SIZE, reps: int = REPS, timeout_s: float = 300) -> dict:
    """{"method": ..., "by_threads": {"1": {...}, ...}} measured in one fresh process per thread count.

    A thread count that fails to measure is recorded with its reason instead of a figure.
    """
    from speedbench.measure.worker import THREAD_VARS

    out: dict = {}
    for t in sorted({int(t) for t in thread_counts}):
        env = dict(os.environ)
        if t > 0:
            env.update({v: str(t) for v in THREAD_VARS})
        cmd = [sys.executable, "-m", "speedbench.measure.peak", "--threads", str(t), "--n", str(n),
               "--reps", str(reps)]
        try:
            proc = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=timeout_s)
            if proc.returncode != 0:
                raise RuntimeError((proc.stderr.strip().splitlines() or ["no output"])[-1][-300:])
            out[str(t)] = json.loads(proc.stdout.strip().splitlines()[-1])
        except (OSError, RuntimeError, ValueError, IndexError, subprocess.TimeoutExpired) as exc:
            out[str(t)] = {"threads": t, "error": f"{type(exc).__name__}: {exc}"[:300]}
    methods = sorted({r["method"] for r in out.values() if "method" in r})
    return {"method": "; ".join(methods) or method(n, reps), "by_threads": out,
            "measured_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())}


def ensure_peaks(peaks: dict | None, thread_counts) -> dict:
    """`peaks` with every thread count of `thread_counts` (0 = all cores) measured; only missing ones run.

    Returns a new dict (the input is left alone), so a caller can tell whether anything was added.
    """
    have = dict(peaks or {})
    by = dict(have.get("by_threads") or {})
    wanted = {int(t) or default_threads() for t in thread_counts}
    missing = sorted(t for t in wanted if "gmac_s" not in by.get(str(t), {}))
    if not missing:
        return have
    new = measure_peaks(missing)
    by.update(new["by_threads"])
    return {"method": new["method"], "by_threads": by, "measured_at": new["measured_at"]}


def peak_for(peaks: dict | None, threads: int) -> float:
    """The recorded GMAC/s peak at `threads` (0 = every core the process may use); NaN if none."""
    if not peaks:
        return float("nan")
    if threads <= 0:
        threads = default_threads()
    rec = (peaks.get("by_threads") or {}).get(str(int(threads))) or {}
    v = rec.get("gmac_s")
    return float(v) if isinstance(v, (int, float)) else float("nan")


def default_threads() -> int:
    """What intra_threads = 0 (the runtime's default) means here: every core this process may use."""
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="dense fp32 matmul peak of this host at one thread count")
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--n", type=int, default=SIZE)
    ap.add_argument("--reps", type=int, default=REPS)
    args = ap.parse_args(argv)
    print(json.dumps(measure_here(args.threads, args.n, args.reps)))
    return 0


if __name__ == "__main__":
    sys.exit(main())
