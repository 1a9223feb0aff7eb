"""The stage split checked without the profiler, on an SSD, an FCOS and a Faster R-CNN style graph.

For each model: export (cached), measure one point through the real worker with
the opt-in sub-graph check, and print side by side, per stage: the stage ms the
point reports (the profiled split scaled onto the unprofiled median), the same
stage's sub-graph timed alone, and the cut (nodes, boundary tensors, If/Loop
nodes kept whole). Then the reconciliation: sum of sub-graph medians vs the
whole graph's median timed alongside (residual), and the largest difference
between a sub-graph's outputs and the whole graph's tensors.
Goal: residual within +/-10 %; a stage whose two figures differ a lot is a
stage whose split (or whose cut) deserves a look.

    python benchmarks/bench_stage_subgraphs.py [--models a,b,c] [--threads 1] [--seconds 10] [--reps 30]
"""
from __future__ import annotations

import argparse
import time

DEFAULT = "demo_ssdlite:320:0,demo_fcos:320:0,demo_frcnn_lite:320:0"


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--models", default=DEFAULT, help="comma list of MODEL:SIZE:PROPOSALS (0 = default)")
    ap.add_argument("--weights", default="demo")
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--seconds", type=float, default=10.0, help="timing budget per point")
    ap.add_argument("--reps", type=int, default=30, help="round-robin repetitions of the sub-graph check")
    ap.add_argument("--images", type=int, default=4)
    ap.add_argument("--cache", default=".speedbench-cache/exports")
    args = ap.parse_args(argv)

    from speedbench.data.scenes import render_scene, scene_rng
    from speedbench.export import export_onnx
    from speedbench.measure import Point, Policy, measure_point
    from speedbench.schema import STAGES

    images = [render_scene(scene_rng(0, "heldout", i))[0] for i in range(args.images)]
    policy = Policy(warmup_max=10, min_reps=10, max_reps=300, max_seconds=args.seconds, profile_reps=5,
                    subgraph_check=True, subgraph_reps=args.reps)
    summary = []
    for item in args.models.split(","):
        model, size, props = item.split(":")
        t0 = time.monotonic()
        rec = export_onnx(model, weights=args.weights, size=int(size), proposals=int(props) or None,
                          cache_dir=args.cache, verify=False)
        if not rec.ok:
            print(f"{model}: export failed: {rec.reason}")
            continue
        point = Point(model=model, weights=args.weights, size=int(size), proposals=rec.proposals,
                      graph=rec.path, intra_threads=args.threads)
        res = measure_point(point, images, policy, timeout_s=1800)
        if not res.ok:
            print(f"{model}: point failed: {res.reason}")
            continue
        row, sg = res.to_row(), res.extra.get("subgraphs") or {}
        if "error" in sg or not sg:
            print(f"{model}: sub-graph check failed: {sg.get('error', 'not run')}")
            continue
        print(f"\n{model} @ {size} px, {rec.proposals} proposals, {args.threads} thread(s) "
              f"({time.monotonic() - t0:.0f} s)")
        print(f"  unprofiled p50 {row['lat_p50_ms']:.2f} ms; profiled run {res.profiled_ms:.2f} ms "
              f"(overhead {res.profiling_overhead:+.0%})")
        print(f"  {'stage':<13} {'split ms':>9} {'alone ms':>9} {'alone/split':>11}   nodes in  out  If/Loop"
              f"  max|diff|")
        for s in STAGES:
            split, alone = row[f"stage_{s}_ms"], sg["stages"].get(s)
            if alone is None and not split == split:
                continue
            cut = sg["cuts"].get(s, {})
            ratio = alone / split if alone is not None and split == split and split > 0 else float("nan")
            print(f"  {s:<13} {split:9.2f} {alone if alone is not None else float('nan'):9.2f} {ratio:11.2f}"
                  f"   {cut.get('nodes', 0):5d} {cut.get('inputs', 0):3d} {cut.get('outputs', 0):4d} "
                  f"{cut.get('control_flow', 0):7d}  {sg['max_abs_diff'].get(s, float('nan')):.2g}")
        print(f"  sum of sub-graphs {sg['sum_ms']:.2f} ms vs whole graph {sg['whole_ms']:.2f} ms timed alongside: "
              f"residual {sg['residual']:+.1%} (whole graph vs the point's own p50: "
              f"{sg['whole_ms'] / row['lat_p50_ms'] - 1:+.1%})")
        summary.append((model, sg["residual"], sg["sum_ms"], sg["whole_ms"]))
    print("\nsummary: model, sum of sub-graphs / whole graph - 1 (goal within +/-10 %)")
    for model, r, total, whole in summary:
        print(f"  {model:<20} {r:+7.1%}  ({total:.2f} / {whole:.2f} ms) {'OK' if abs(r) <= 0.10 else 'OUTSIDE'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
