"""Stage reconciliation on several architectures (one-stage, two-stage, SSD).

For each model: export (speedbench.export, cached), measure one point through
the real worker, and print the profiled run, the stage times and their sum,
the share left unattributed, node time counted naively (If/Loop parents and
their subgraph children both) vs once, and the profiling overhead.
Goal: stage sum <= profiled run and >= 90 % of it; unattributed small.

    python benchmarks/bench_stages.py [--models a,b,c] [--size 320] [--threads 1] [--seconds 10]
"""
from __future__ import annotations

import argparse
import time

DEFAULT = ("ssdlite320_mobilenet_v3_large:320:0,fasterrcnn_mobilenet_v3_large_320_fpn:320:100,"
           "retinanet_resnet50_fpn:320:0")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--models", default=DEFAULT, help="comma list of MODEL:SIZE:PROPOSALS (0 = default)")
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--seconds", type=float, default=10.0, help="timing budget per point")
    ap.add_argument("--images", type=int, default=3)
    args = ap.parse_args(argv)

    from speedbench.data.scenes import render_scene, scene_rng
    from speedbench.export import export_onnx
    from speedbench.measure import Point, Policy, measure_point

    images = [render_scene(scene_rng(0, "heldout", i))[0] for i in range(args.images)]
    policy = Policy(warmup_max=10, min_reps=10, max_reps=200, max_seconds=args.seconds, profile_reps=3)
    rows = []
    for item in args.models.split(","):
        model, size, props = item.split(":")
        t0 = time.monotonic()
        rec = export_onnx(model, size=int(size), proposals=int(props) or None, verify=False)
        if not rec.ok:
            print(f"{model}: export failed: {rec.reason}")
            continue
        point = Point(model=model, size=int(size), proposals=rec.proposals, graph=rec.path,
                      intra_threads=args.threads)
        res = measure_point(point, images, policy, timeout_s=1800)
        if not res.ok:
            print(f"{model}: point failed: {res.reason}")
            continue
        prof = res.extra["profile"]
        total = sum(res.stages.values())
        rows.append((model, res, prof, total))
        print(f"\n{model} size {size} proposals {rec.proposals} ({time.monotonic() - t0:.0f} s)")
        print(f"  unprofiled p50 {res.measurement.median:.2f} ms (n {res.measurement.n}); profiled run "
              f"{res.profiled_ms:.2f} ms; profiling overhead {res.profiling_overhead * 100:+.0f}%")
        print(f"  stage sum {total:.2f} ms = {total / res.profiled_ms * 100:.1f}% of the profiled run "
              f"(kernel time only: {prof['kernel_ms']:.2f} ms = {prof['kernel_coverage'] * 100:.1f}%; "
              f"dispatch gaps {prof['dispatch_ms']:.2f} ms)")
        print(f"  node time counted naively {prof['naive_node_ms']:.2f} ms vs once {prof['kernel_ms']:.2f} ms "
              f"(If/Loop bodies {prof['subgraph_ms']:.2f} ms)")
        print(f"  unattributed {res.stages.get('unattributed', 0):.2f} ms = "
              f"{res.stages.get('unattributed', 0) / total * 100:.1f}% (kernel-only "
              f"{prof['kernel_stages'].get('unattributed', 0):.2f} ms)")
        for stage, ms in sorted(res.stages.items(), key=lambda kv: -kv[1]):
            kern = prof["kernel_stages"].get(stage, 0.0)
            print(f"    {stage:<13} {ms:9.2f} ms {ms / total * 100:5.1f}%   kernel {kern:9.2f} ms")
    print("\nsummary: model, stage sum / profiled run, unattributed share, naive / counted node time")
    for model, res, prof, total in rows:
        ok = 0.9 * res.profiled_ms <= total <= res.profiled_ms * (1 + 1e-9)
        print(f"  {model:<40} {total / res.profiled_ms:6.3f} {'OK ' if ok else 'BAD'} "
              f"{res.stages.get('unattributed', 0) / total:6.3f}  {prof['naive_node_ms'] / prof['kernel_ms']:6.3f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
