"""Warm-up and adaptive repetitions around one callable.

The timed region is exactly `run(x)`: time.perf_counter_ns immediately
before and after it, nothing else inside. Inputs are prepared beforehand
(one per image) and cycled, so content-dependent costs (proposal counts,
NMS) are sampled over several images.
"""
from __future__ import annotations

import statistics
import time

from speedbench.measure.point import Policy
from speedbench.measure.stats import Measurement


def warm_up(run, inputs, policy: Policy, clock=time.perf_counter_ns) -> dict:
    """Run until latency settles; returns {"runs": n, "settled": bool, "samples_ms": [...]}.

    `clock` (ns) is injectable so tests can script latencies exactly.
    """
    w = max(1, policy.warmup_window)
    times = []
    settled = False
    perf = clock
    while len(times) < policy.warmup_max:
        x = inputs[len(times) % len(inputs)]
        t0 = perf()
        run(x)
        times.append((perf() - t0) / 1e6)
        n = len(times)
        if n >= policy.warmup_min and n >= 2 * w:
            now = statistics.median(times[-w:])
            before = statistics.median(times[-2 * w:-w])
            if abs(now - before) <= policy.settle_tol * before:
                settled = True
                break
    if policy.warmup_max == 0:
        settled = True
    return {"runs": len(times), "settled": settled, "samples_ms": times}


def timed_runs(run, inputs, policy: Policy, between=None, clock=time.perf_counter_ns) -> tuple[Measurement, dict]:
    """Adaptive repetitions; returns the Measurement and how/why it stopped.

    `between(i)` is called after every run, outside the timed region (memory sampling).
    The stopping check sorts the samples, so it runs every ~5 % of the count.
    """
    samples = []
    perf = clock
    start = clock()
    stop = "max_reps"
    next_check = policy.min_reps
    n_inputs = len(inputs)
    while len(samples) < policy.max_reps:
        x = inputs[len(samples) % n_inputs]
        t0 = perf()
        run(x)
        t1 = perf()
        samples.append((t1 - t0) / 1e6)
        if between is not None:
            between(len(samples))
        n = len(samples)
        if n >= next_check:
            next_check = n + max(1, n // 20)
            m = _measurement(samples, policy)
            if m.ci_complete(50) and m.median_rel_halfwidth <= policy.rel_ci:
                stop = "ci_reached"
                break
        if n >= policy.min_reps and (clock() - start) / 1e9 >= policy.max_seconds:
            stop = "max_seconds"
            break
    m = _measurement(samples, policy)
    per_image = {}
    for i in range(min(n_inputs, len(samples))):
        per_image[i] = statistics.median(samples[i::n_inputs])
    return m, {"stop": stop, "seconds": (clock() - start) / 1e9, "per_image_p50_ms": list(per_image.values())}


def _measurement(samples, policy: Policy) -> Measurement:
    return Measurement(samples, confidence=policy.confidence, noisy_cov=policy.noisy_cov, rel_ci=policy.rel_ci)
