"""Does a reference graph timed beside the model track the host's drift? (a study for issue 16)

On a shared VM the host's own speed moves by tens of percent over seconds, and a whole
rerun can land several percent slower; an interval from one run cannot cover that. This
benchmark asks whether the host reference that speedbench ships (speedbench/measure/
reference.py: a fixed small convolution graph), run on one thread as speedbench runs it,
in the same process, alternately with the model, moves with the model. If it does, the model's time divided by the reference's time is steadier between
processes than the model's time alone, and could serve as a per-invocation covariate.

No speedbench measuring code is used (only the reference graph and its seeded inputs): a
bare InferenceSession loop per process, several
fresh processes per configuration, in an interleaved order. For each configuration it
prints the process medians of the model, of the reference and of their ratio, and the
coefficient of variation (CoV) of each across processes.

    python benchmarks/bench_host_reference.py GRAPH.onnx [GRAPH.onnx ...] [--processes 8]
        [--seconds 4] [--threads 1,2] [--spin on|off]
    python benchmarks/bench_host_reference.py GRAPH.onnx ... --overhead [--processes 6]

--overhead asks the other question: does timing the reference between the timed runs change
the model's own latency? Each configuration is measured by speedbench's worker with
`host_reference` on and off, in alternating worker processes, and the p50 ratio on / off is
printed with its hierarchical interval (the regression gate's method).

Caveat: the reference is run by the same onnxruntime as the model. A ratio cannot be used
to compare two onnxruntime versions (an upgrade moves both); it is for reruns of one stack.
"""
from __future__ import annotations

import argparse
import json
import os
import random
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]

_CHILD = r'''
import json, sys, time
import numpy as np, onnxruntime as ort
from speedbench.measure.reference import GRAPH, feeds as reference_feeds, session_options as reference_options
model, secs, threads, spin = sys.argv[1], float(sys.argv[2]), int(sys.argv[3]), sys.argv[4]
def session(path):
    so = ort.SessionOptions(); so.intra_op_num_threads = threads; so.inter_op_num_threads = 1
    so.add_session_config_entry("session.intra_op.allow_spinning", spin)
    return ort.InferenceSession(path, so, providers=["CPUExecutionProvider"])
def feeds(s):
    rng = np.random.default_rng(0)
    return {i.name: rng.random([d if isinstance(d, int) else 1 for d in i.shape], dtype=np.float32)
            for i in s.get_inputs()}
sm = session(model)
sr = ort.InferenceSession(str(GRAPH), reference_options(), providers=["CPUExecutionProvider"])
fm, fr = feeds(sm), reference_feeds()
for _ in range(5):
    sm.run(None, fm); sr.run(None, fr)
pairs, end = [], time.perf_counter() + secs
while time.perf_counter() < end:
    a = time.perf_counter(); sm.run(None, fm); b = time.perf_counter(); sr.run(None, fr); c = time.perf_counter()
    pairs.append((b - a, c - b))
json.dump(pairs, sys.stdout)
'''


def cov(x) -> float:
    x = np.asarray(x, float)
    return float(x.std(ddof=1) / x.mean()) if len(x) > 1 else float("nan")


def overhead(args, threads) -> int:
    sys.path.insert(0, str(ROOT))
    from speedbench.analyse.regression import hierarchical_ratio
    from speedbench.measure import Point, Policy, measure_point

    images = [np.full((240, 320, 3), 127, np.uint8)]
    base = Policy(warmup_min=3, warmup_max=8, min_reps=10, max_reps=1000, max_seconds=1.0, profile_stages=False)
    print(f"{'configuration':44s} {'p50 on':>8s} {'p50 off':>8s} {'ratio on/off [CI]':>24s} {'ref runs':>8s}")
    for g in args.graphs:
        for t in threads:
            point = Point(model=g.stem, backend="ort", graph=str(g), intra_threads=t,
                          spin_wait=args.spin)
            groups = {True: [], False: []}
            refs = []
            for i in range(2 * args.processes):
                on = (i % 2 == 0) if (i // 2) % 2 == 0 else (i % 2 == 1)   # ABBA: neither side always first
                res = measure_point(point, images, Policy(**{**base.to_dict(), "host_reference": on}), timeout_s=120)
                if not res.ok:
                    raise SystemExit(f"{g.name} {t}t: {res.reason}")
                groups[on].append(res.measurement.samples_ms)
                if on:
                    refs.append(res.extra["reference"]["n"])
            ratio, lo, hi = hierarchical_ratio(groups[False], groups[True], 0.95, 2000, np.random.default_rng(0))
            p50 = {k: float(np.median(np.concatenate(v))) for k, v in groups.items()}
            print(f"{g.stem[:36] + f' {t}t':44s} {p50[True]:8.2f} {p50[False]:8.2f} "
                  f"{ratio:10.3f} [{lo:.3f}, {hi:.3f}] {int(np.median(refs)):8d}", flush=True)
    return 0


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("graphs", nargs="+", type=Path)
    ap.add_argument("--processes", type=int, default=8, help="fresh processes per configuration")
    ap.add_argument("--seconds", type=float, default=4.0, help="timed seconds per process")
    ap.add_argument("--threads", default="1,2")
    ap.add_argument("--spin", choices=("on", "off"), default="off")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--overhead", action="store_true", help="the reference's effect on the model's latency")
    args = ap.parse_args()
    threads = [int(t) for t in args.threads.split(",")]
    if args.overhead:
        return overhead(args, threads)
    configs = [(g, t) for g in args.graphs for t in threads]
    order = [c for c in configs for _ in range(args.processes)]
    random.Random(args.seed).shuffle(order)  # interleaved: a slow phase spreads over configurations
    got = {c: [] for c in configs}
    t0 = time.time()
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")])))
    for g, t in order:
        out = subprocess.run([sys.executable, "-c", _CHILD, str(g), str(args.seconds), str(t),
                              "1" if args.spin == "on" else "0"], capture_output=True, text=True, check=True, env=env)
        pairs = np.array(json.loads(out.stdout)) * 1000
        got[(g, t)].append((np.median(pairs[:, 0]), np.median(pairs[:, 1]), np.median(pairs[:, 0] / pairs[:, 1]),
                            float(np.corrcoef(pairs[:, 0], pairs[:, 1])[0, 1]), len(pairs)))
    print(f"{len(order)} processes of {args.seconds:g} s in {time.time() - t0:.0f} s; spin-waiting {args.spin}; "
          f"{os.cpu_count()} logical cores, load average {os.getloadavg()[0]:.1f} at the end\n")
    print(f"{'configuration':44s} {'model ms (range)':>20s} {'CoV':>6s} {'ref ms':>7s} {'CoV':>6s} "
          f"{'model/ref':>10s} {'CoV':>6s} {'r in-process':>12s}")
    summary = []
    for (g, t), rows in got.items():
        m, r, q, corr, _ = map(np.array, zip(*rows))
        name = f"{g.stem[:36]} {t}t"
        summary.append((cov(m), cov(q)))
        print(f"{name:44s} {np.median(m):7.2f} ({m.min():5.2f}-{m.max():5.2f}) {cov(m):6.1%} {np.median(r):7.2f} "
              f"{cov(r):6.1%} {np.median(q):10.4f} {cov(q):6.1%} {np.median(corr):12.2f}")
    raw, adj = map(np.array, zip(*summary))
    print(f"\nbetween-process CoV, median over configurations: model alone {np.median(raw):.1%}, "
          f"model / reference {np.median(adj):.1%}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
