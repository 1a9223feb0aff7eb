"""What moving pre/postprocessing out of the graph costs: host vs in-graph, side by side.

demo_ssdlite at 320 px, 1 intra-op thread, two graphs of the same weights:
- native: resize, normalisation, softmax, top-k, NMS and box rescale inside the graph;
- raw head + adapter: the same work in numpy on the host (speedbench.adapt), timed in the
  same worker call (backend "adapted").
Each is measured in its own worker process, alternating A B A B ... so that drift on a shared
host hits both. Prints per round: whole-call p50, pre+post stage time (share of the profiled
pass x unprofiled p50), the host's own pre and post ms, and the ratios.

    python benchmarks/bench_external.py [--rounds 3] [--images 8] [--cache DIR]
"""
from __future__ import annotations

import argparse
import statistics
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--images", type=int, default=8)
    ap.add_argument("--cache", default=None, help="export cache (default: a temporary directory)")
    args = ap.parse_args()

    from speedbench.adapt import load_adapter
    from speedbench.data.scenes import render_scene, scene_rng
    from speedbench.export import export_onnx
    from speedbench.export.raw_head import export_raw_head
    from speedbench.measure import Point, Policy, measure_point

    tmp = Path(args.cache or tempfile.mkdtemp(prefix="speedbench-bench-external-"))
    native = export_onnx("demo_ssdlite", weights="demo", size=320, cache_dir=tmp / "exports", verify=False)
    raw = export_raw_head("demo_ssdlite", tmp / "demo_ssdlite_raw.onnx", weights="demo", size=320)
    adapter = load_adapter(ROOT / "profiles" / "adapters" / "demo_ssdlite_raw.toml")
    images = [render_scene(scene_rng(0, "heldout", i))[0] for i in range(args.images)]
    points = {
        "native": Point(model="demo_ssdlite", weights="demo", size=320, proposals=300, graph=native.path),
        "host": Point(model="demo_ssdlite_raw", weights="onnx:demo_ssdlite_raw.onnx", size=320, proposals=300,
                      backend="adapted", graph=raw["graph"], adapter=adapter.to_dict()),
    }
    policy = Policy(min_reps=30, max_reps=300, max_seconds=15, profile_reps=10)
    rows = {k: [] for k in points}
    for r in range(args.rounds):
        for name, point in points.items():
            res = measure_point(point, images, policy, 300)
            if not res.ok:
                raise SystemExit(f"{name}: {res.reason}")
            total = sum(res.stages.values())
            med = res.measurement.median
            prepost = (res.stages.get("preprocess", 0) + res.stages.get("postprocess", 0)) / total * med
            prof = res.extra.get("profile", {})
            rows[name].append({"p50": med, "prepost": prepost, "noisy": res.measurement.noisy,
                               "host_pre": prof.get("host_preprocess_ms"), "host_post": prof.get("host_postprocess_ms")})
            print(f"round {r + 1} {name:6} p50 {med:7.2f} ms  pre+post {prepost:6.2f} ms"
                  + (f"  (host pre {prof['host_preprocess_ms']:.2f}, host post {prof['host_postprocess_ms']:.2f} "
                     f"profiled ms)" if name == "host" else "") + ("  NOISY" if res.measurement.noisy else ""))
    med = {k: {m: statistics.median(x[m] for x in v) for m in ("p50", "prepost")} for k, v in rows.items()}
    print(f"\nmedian over {args.rounds} rounds, demo_ssdlite 320 px, 1 thread:")
    print(f"  pre+post: in-graph {med['native']['prepost']:.2f} ms, host {med['host']['prepost']:.2f} ms, "
          f"ratio host / in-graph {med['host']['prepost'] / med['native']['prepost']:.2f}")
    print(f"  whole call p50: native {med['native']['p50']:.2f} ms, raw + host {med['host']['p50']:.2f} ms, "
          f"ratio {med['host']['p50'] / med['native']['p50']:.2f}")


if __name__ == "__main__":
    main()
