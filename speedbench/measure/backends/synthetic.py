"""Synthetic backend - a harness test backend, not a model.

It does a known amount of work per run so the harness itself can be tested
and so other tests can inject a known slowdown: busy-waits (or sleeps) for a
configured time, optionally allocates memory, and can fail in every way a
real worker can (abort, segfault, hang, raise, be SIGKILLed).

Settings come from Point.options (not part of the point's identity), with
key=value pairs after "synthetic:" in the model id as a fallback, e.g.
model "synthetic:work_ms=5,alloc_mib=300". Keys:
- work_ms      time one run takes (default: 2 ms x (size/320)^2 + 0.002 ms x proposals);
               delay_ms is accepted as another name for it
- mode         "busy" (spin on the CPU, default) or "sleep"
- jitter       relative spread of the work, uniform +-jitter, seeded (default 0)
- process_cov  a between-process effect: each worker process draws its own offset once, at load,
               from fresh OS entropy, and every run of that process takes work_ms x (1 + offset)
               x (1 +- jitter); offset ~ Normal(0, process_cov), clipped to >= -0.8. One process's
               samples cannot see it; only several invocations can (measure.invocations)
- alloc_mib    MiB allocated, written and freed in every run
- load_mib     MiB allocated at load time and held
- limit_mib    cap the worker's address space (RLIMIT_AS) at load to this many MiB above
               what it uses then: a later allocation beyond it fails the way an
               out-of-memory worker does (MemoryError)
- fail         "abort" | "segv" | "hang" | "raise" | "sigkill"
- fail_at      "load" (default) or "run"; fail_after: runs before failing at "run"
- fail_invocation  fail (as `fail` says, "raise" by default) only in the worker process of this
               invocation index (the launcher puts it in SPEEDBENCH_INVOCATION)
- stages       {"backbone": 0.6, ...} fractions of work_ms reported by profile()
- SPEEDBENCH_SYNTHETIC_FACTOR (environment variable, not a setting): multiplies work_ms; a test
               gives it to one side of an interleaved A/B run to stand for a slower environment
- drift_per_s  a slow drift of the whole machine: work_ms x (1 + drift_per_s x (t - drift_t0)),
               t the wall clock (s since the epoch) when a run starts, drift_t0 a given
               start time (default: when the worker loaded); see drift_factor
"""
from __future__ import annotations

import os
import signal
import time

import numpy as np

TIMED_REGION = "synthetic: one busy-wait/sleep of work_ms (+ alloc_mib written and freed)"
DEFAULT_STAGES = {"preprocess": 0.1, "backbone": 0.5, "head": 0.3, "postprocess": 0.1}


KEYS = ("work_ms", "delay_ms", "mode", "jitter", "process_cov", "seed", "alloc_mib", "load_mib", "limit_mib",
        "fail", "fail_at", "fail_after", "fail_invocation", "stages", "drift_per_s", "drift_t0")


def settings(point) -> dict:
    """The synthetic settings of a point; ValueError naming an unknown key."""
    opts = {}
    model = point.model or ""
    if ":" in model:
        for item in model.split(":", 1)[1].split(","):
            if "=" in item:
                k, v = item.split("=", 1)
                opts[k.strip()] = _number(v.strip())
    opts.update(point.options or {})
    unknown = sorted(set(opts) - set(KEYS))
    if unknown:
        raise ValueError(f"unknown synthetic setting {unknown[0]!r} (known: {', '.join(KEYS)})")
    if "delay_ms" in opts:
        opts.setdefault("work_ms", opts.pop("delay_ms"))
    if "work_ms" not in opts:
        size = point.size or 320
        opts["work_ms"] = 2.0 * (size / 320) ** 2 + 0.002 * (point.proposals or 0)
    return opts


def drift_factor(opts: dict, t: float) -> float:
    """How much slower the simulated machine is at wall-clock time t (1 = not at all).

    Linear in time from drift_t0, floored at 0.1 so that a long negative drift stays a
    machine getting faster, not one taking no time at all.
    """
    rate = float(opts.get("drift_per_s", 0.0) or 0.0)
    if not rate:
        return 1.0
    return max(0.1, 1.0 + rate * (t - float(opts.get("drift_t0", t))))
def process_offset(opts: dict, rng: np.random.Generator) -> float:
    """The relative offset one worker process runs at (0 without process_cov)."""
    cov = float(opts.get("process_cov", 0.0))
    return max(-0.8, cov * float(rng.standard_normal())) if cov else 0.0


def run_ms(opts: dict, offset: float, rng: np.random.Generator, n: int = 1) -> np.ndarray:
    """How long n runs of a process with this offset take, ms: the latency model the Runner busy-waits.

    Symmetric around work_ms over processes and runs, so the true median of the population
    of all processes' runs is work_ms (what the tests check intervals against).
    """
    jitter = float(opts.get("jitter", 0.0))
    noise = 1 + rng.uniform(-jitter, jitter, size=n) if jitter else np.ones(n)
    return float(opts["work_ms"]) * (1 + offset) * noise


def _number(v: str):
    for cast in (int, float):
        try:
            return cast(v)
        except ValueError:
            pass
    return v


def _fail(kind: str):
    if kind == "abort":
        os.abort()
    if kind == "segv":
        os.kill(os.getpid(), signal.SIGSEGV)
    if kind == "sigkill":
        os.kill(os.getpid(), signal.SIGKILL)
    if kind == "hang":
        while True:
            time.sleep(3600)
    if kind == "raise":
        raise ValueError("synthetic failure requested")
    raise ValueError(f"synthetic: unknown fail kind {kind!r}")


def _work(ms: float, mode: str):
    if ms <= 0:
        return
    if mode == "sleep":
        time.sleep(ms / 1000)
        return
    end = time.perf_counter_ns() + int(ms * 1e6)
    while time.perf_counter_ns() < end:
        pass


class Runner:
    timed_region = TIMED_REGION
    model_file_mib = 0.0

    def __init__(self, point):
        self.opts = settings(point)
        self.work_ms = float(self.opts["work_ms"]) * float(os.environ.get("SPEEDBENCH_SYNTHETIC_FACTOR") or 1.0)
        self.mode = self.opts.get("mode", "busy")
        self.jitter = float(self.opts.get("jitter", 0.0))
        self.alloc = int(float(self.opts.get("alloc_mib", 0)) * 2**20)
        self.rng = np.random.default_rng(int(self.opts.get("seed", 0)))
        self.offset = process_offset(self.opts, np.random.default_rng())   # fresh entropy per process
        self.runs = 0
        self.opts.setdefault("drift_t0", time.time())
        if "fail_invocation" in self.opts:
            if os.environ.get("SPEEDBENCH_INVOCATION") != str(int(self.opts["fail_invocation"])):
                self.opts.pop("fail", None)        # not this process's turn
            else:
                self.opts.setdefault("fail", "raise")
        fail = self.opts.get("fail")
        if fail and self.opts.get("fail_at", "load") == "load":
            _fail(fail)
        if self.opts.get("limit_mib"):
            import resource

            import psutil

            cap = psutil.Process().memory_info().vms + int(float(self.opts["limit_mib"]) * 2**20)
            resource.setrlimit(resource.RLIMIT_AS, (cap, resource.getrlimit(resource.RLIMIT_AS)[1]))
        load_bytes = int(float(self.opts.get("load_mib", 0)) * 2**20)
        self.held = np.ones(load_bytes, dtype=np.uint8) if load_bytes else None

    def prepare(self, image):
        return np.asarray(image)

    def _ms(self) -> float:
        drift = drift_factor(self.opts, time.time())
        if self.jitter or self.offset:
            return float(run_ms(self.opts, self.offset, self.rng)[0]) * drift
        return self.work_ms * drift

    def __call__(self, x):
        self.runs += 1
        fail = self.opts.get("fail")
        if fail and self.opts.get("fail_at", "load") == "run" and self.runs > int(self.opts.get("fail_after", 0)):
            _fail(fail)
        if self.alloc:
            block = np.empty(self.alloc, dtype=np.uint8)
            block[::4096] = 1            # touch every page so it becomes resident
            del block
        _work(self._ms(), self.mode)
        return x.shape

    def profile(self, inputs, reps: int) -> dict:
        """Times each stage's share of the work separately (a real measurement of known work)."""
        fractions = self.opts.get("stages") or DEFAULT_STAGES
        totals = {k: 0.0 for k in fractions}
        runs = []
        for _ in range(reps):
            t_run = time.perf_counter_ns()
            ms = self._ms()
            for stage, frac in fractions.items():
                t0 = time.perf_counter_ns()
                _work(ms * float(frac), self.mode)
                totals[stage] += (time.perf_counter_ns() - t0) / 1e6
            runs.append((time.perf_counter_ns() - t_run) / 1e6)
        stages = {k: v / reps for k, v in totals.items()}
        profiled = sum(runs) / reps
        return {"stages": stages, "profiled_ms": profiled, "run_ms": runs, "node_ms": sum(stages.values()),
                "coverage": sum(stages.values()) / profiled}

    def close(self):
        self.held = None


def load(point) -> Runner:
    return Runner(point)
