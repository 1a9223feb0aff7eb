"""ORT intra-op spin-waiting: latency, process-to-process spread and CPU cost, side by side.

Two parts, both on one exported graph:
1. a bare `InferenceSession.run` loop (no speedbench code), each setting in several fresh
   processes in a seeded shuffled order: per process the median latency and the CPU seconds
   the process burned per run (spinning threads burn CPU while waiting for work);
2. the same settings measured through speedbench (measure_point with R invocations), to
   show the harness reports the same picture.

    python benchmarks/bench_spin.py GRAPH.onnx [--procs 6] [--runs 120] [--invocations 5]

Prints one line per setting: process medians (min..max), their CoV, CPU ms per run
(CPU time / wall time = cores kept busy), then speedbench's p50 [CI], between_cov.
The figures are this host's; on a loaded host say so next to them.
"""
from __future__ import annotations

import argparse
import json
import random
import statistics
import subprocess
import sys
import time

SETTINGS = [  # (label, intra threads, spinning)
    ("1t", 1, True),
    ("2t spin on", 2, True),
    ("2t spin off", 2, False),
]

CHILD = r"""
import json, sys, time, os
import numpy as np, onnxruntime as ort
graph, intra, spin, runs = sys.argv[1], int(sys.argv[2]), sys.argv[3] == "1", int(sys.argv[4])
so = ort.SessionOptions()
so.intra_op_num_threads = intra
so.inter_op_num_threads = 1
so.add_session_config_entry("session.intra_op.allow_spinning", "1" if spin else "0")
so.add_session_config_entry("session.inter_op.allow_spinning", "1" if spin else "0")
sess = ort.InferenceSession(graph, so, providers=["CPUExecutionProvider"])
rng = np.random.default_rng(0)
x = {"image": rng.random((3, 320, 320), dtype=np.float32)}
for _ in range(10):
    sess.run(None, x)
ms = []
c0, w0 = time.process_time(), time.perf_counter()
for _ in range(runs):
    t0 = time.perf_counter_ns()
    sess.run(None, x)
    ms.append((time.perf_counter_ns() - t0) / 1e6)
cpu, wall = time.process_time() - c0, time.perf_counter() - w0
print(json.dumps({"median": float(np.median(ms)), "cpu_ms_per_run": 1000 * cpu / runs, "busy_cores": cpu / wall}))
"""


def bare(graph: str, procs: int, runs: int, seed: int = 0) -> dict:
    order = [s for s in SETTINGS for _ in range(procs)]
    random.Random(seed).shuffle(order)
    out = {s[0]: [] for s in SETTINGS}
    for label, intra, spin in order:
        got = subprocess.run([sys.executable, "-c", CHILD, graph, str(intra), "1" if spin else "0", str(runs)],
                             capture_output=True, text=True, check=True)
        out[label].append(json.loads(got.stdout.strip().splitlines()[-1]))
    return out


def through_speedbench(graph: str, invocations: int) -> dict:
    from speedbench.measure import Point, Policy
    from speedbench.measure.launch import measure_invocations

    from speedbench.data.scenes import render_scene, scene_rng

    images = [render_scene(scene_rng(7, "heldout", i))[0] for i in range(4)]
    policy = Policy(warmup_min=3, warmup_max=20, min_reps=30, max_reps=60, max_seconds=2.0,
                    profile_stages=False)
    out = {}
    for label, intra, spin in SETTINGS:
        point = Point(model="demo_ssdlite", weights="demo", size=320, backend="ort", intra_threads=intra,
                      spin_wait="on" if spin else "off", graph=graph)
        res = measure_invocations(point, images, policy, invocations=invocations, timeout_s=300)
        out[label] = res.to_row()
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("graph")
    ap.add_argument("--procs", type=int, default=6)
    ap.add_argument("--runs", type=int, default=120)
    ap.add_argument("--invocations", type=int, default=5)
    ap.add_argument("--skip-speedbench", action="store_true")
    args = ap.parse_args(argv)
    t0 = time.monotonic()
    print(f"bare ORT loop: {args.procs} fresh processes per setting x {args.runs} runs, shuffled order")
    for label, res in bare(args.graph, args.procs, args.runs).items():
        med = [r["median"] for r in res]
        cov = statistics.stdev(med) / statistics.mean(med)
        cpu = statistics.median(r["cpu_ms_per_run"] for r in res)
        busy = statistics.median(r["busy_cores"] for r in res)
        print(f"  {label:12s} process medians {min(med):6.2f}..{max(med):6.2f} ms  (median "
              f"{statistics.median(med):6.2f}, CoV {cov:5.1%}); CPU {cpu:6.2f} ms/run = {busy:4.2f} cores busy; "
              f"all: {', '.join(f'{m:.1f}' for m in sorted(med))}")
    if not args.skip_speedbench:
        print(f"through speedbench: {args.invocations} invocations per setting")
        for label, row in through_speedbench(args.graph, args.invocations).items():
            print(f"  {label:12s} p50 {row['lat_p50_ms']:6.2f} ms [{row['lat_p50_ci_lo_ms']:.2f}, "
                  f"{row['lat_p50_ci_hi_ms']:.2f}]  between_cov {row['between_cov']:.1%}  "
                  f"between dominates: {row['between_dominates']}")
    print(f"wall time {time.monotonic() - t0:.0f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
