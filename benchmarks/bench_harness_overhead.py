"""Harness overhead: speedbench's timing loop vs a bare `session.run` loop, side by side.

One process, one ONNX Runtime session, one input. Blocks of the bare loop
(perf_counter_ns around session.run, nothing else) and of the harness
(speedbench.measure.timing.timed_runs with the ort Runner, memory sampling and
the stopping checks on) alternate, so machine noise hits both alike. Prints
the ratio of the two medians; the goal is <= 1.01.

    python benchmarks/bench_harness_overhead.py [--model fasterrcnn_mobilenet_v3_large_320_fpn]
           [--size 320] [--proposals 100] [--blocks 40] [--reps 5] [--graph FILE.onnx]

(Untrained one-stage SSD graphs spend ~1 s per run in NMS, so the default is the
small two-stage model, whose untrained cost is steady.)
"""
from __future__ import annotations

import argparse
import statistics
import time

import numpy as np


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--model", default="fasterrcnn_mobilenet_v3_large_320_fpn")
    ap.add_argument("--size", type=int, default=320)
    ap.add_argument("--proposals", type=int, default=100)
    ap.add_argument("--graph", help="ONNX file (default: speedbench.export.export_onnx of --model)")
    ap.add_argument("--blocks", type=int, default=40, help="blocks per method, interleaved")
    ap.add_argument("--reps", type=int, default=5, help="runs per block")
    ap.add_argument("--threads", type=int, default=1)
    args = ap.parse_args(argv)

    from speedbench.measure import Point, Policy
    from speedbench.measure.backends import ort as ort_backend
    from speedbench.measure.memory import PeakTracker
    from speedbench.measure.timing import timed_runs
    from speedbench.zoo import pattern_image

    graph = args.graph
    if graph is None:
        from speedbench.export import export_onnx

        rec = export_onnx(args.model, size=args.size, proposals=args.proposals or None, verify=False)
        if not rec.ok:
            raise SystemExit(f"export failed: {rec.reason}")
        graph = rec.path
    point = Point(model=args.model, size=args.size, graph=graph, intra_threads=args.threads)
    runner = ort_backend.load(point)
    feed = runner.prepare(pattern_image(240, 320, seed=1))
    session = runner.session
    policy = Policy(min_reps=args.reps, max_reps=args.reps, max_seconds=1e9, rel_ci=1e-9, memory_every=5)
    for _ in range(10):                    # warm both paths alike
        session.run(None, feed)

    bare, harness = [], []
    started = time.monotonic()
    for block in range(2 * args.blocks):
        if block % 2 == 0:
            perf = time.perf_counter_ns
            for _ in range(args.reps):
                t0 = perf()
                session.run(None, feed)
                bare.append((perf() - t0) / 1e6)
        else:
            tracker = PeakTracker(policy.memory_every)
            m, _ = timed_runs(runner, [feed], policy, between=tracker)
            harness.append(m.samples_ms)
    harness = np.concatenate(harness)
    b, h = statistics.median(bare), float(np.median(harness))
    # per-block medians: a rough spread of the ratio under this machine's noise
    nb = len(bare) // args.blocks
    ratios = [float(np.median(harness[i * args.reps:(i + 1) * args.reps])) / statistics.median(bare[i * nb:(i + 1) * nb])
              for i in range(args.blocks)]
    import os

    print(f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} CPUs")
    print(f"model {args.model} size {args.size} threads {args.threads}: {len(bare)} bare + {len(harness)} harness "
          f"runs in {time.monotonic() - started:.0f} s, interleaved in {args.blocks} block pairs")
    print(f"bare session.run median     {b:9.3f} ms")
    print(f"harness timed_runs median   {h:9.3f} ms")
    print(f"ratio harness / bare        {h / b:9.4f}   (goal <= 1.01)")
    print(f"per-block-pair ratios: median {statistics.median(ratios):.4f}, "
          f"min {min(ratios):.4f}, max {max(ratios):.4f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
