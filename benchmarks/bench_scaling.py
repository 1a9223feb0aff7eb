"""Throughput scaling K = 1 vs K = 2 for a small detector, measured side by side in one run.

    python benchmarks/bench_scaling.py [--size 224] [--seconds 8] [--model ssdlite320_mobilenet_v3_large]

Measures, with speedbench.measure.concurrent_launch (fresh worker processes, synchronised start):
  K=1 x T=1, K=2 x T=1 (two single-thread workers), and K=1 x T=2 (one two-thread worker),
so the two ways of spending two cores are compared on the same graph in the same run, plus
K=2 with paced arrivals at 50 % and 80 % of its capacity (p99 including queueing).
Prints throughput, per-request p50/p99 under load, scaling efficiency X(2) / (2 X(1)), and the
Little's-law and utilisation-law consistency figures. The machine may be shared: the 1-minute
load average is printed before and after; read the ratios with it in mind.

Graph: speedbench.export.export_onnx when available, else a TorchScript ONNX export done here
(weights=None, weights_backbone=None: untrained, so NMS sees many candidates -- the time split is
not representative of a trained model, the scaling comparison still is a real measurement).
"""
from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path


def graph_for(model_id: str, size: int, cache: Path) -> str:
    try:
        from speedbench.export import export_onnx

        rec = export_onnx(model_id, size=size, weights="none", verify=False)
        if rec.ok:
            return str(rec.path)
        print(f"export_onnx failed ({rec.reason}); exporting here", file=sys.stderr)
    except (ImportError, AttributeError):
        pass
    out = cache / f"{model_id}-{size}.onnx"
    if out.exists():
        return str(out)
    import torch
    import torchvision

    model = getattr(torchvision.models.detection, model_id)(weights=None, weights_backbone=None).eval()
    if hasattr(model.transform, "fixed_size") and model.transform.fixed_size:
        model.transform.fixed_size = (size, size)
    else:
        model.transform.min_size, model.transform.max_size = (size,), size

    class Graph(torch.nn.Module):  # graph I/O of DEVELOPERS.md: image [3, H, W] -> boxes, scores, labels
        def __init__(self, m):
            super().__init__()
            self.m = m

        def forward(self, image):
            d = self.m([image])[0]
            return d["boxes"], d["scores"], d["labels"]

    cache.mkdir(parents=True, exist_ok=True)
    tmp = out.with_suffix(".tmp")
    torch.onnx.export(Graph(model), (torch.rand(3, size, size),), str(tmp), dynamo=False, opset_version=17,
                      input_names=["image"], output_names=["boxes", "scores", "labels"],
                      dynamic_axes={"image": {1: "H", 2: "W"}})
    os.replace(tmp, out)
    return str(out)


def images(n: int = 4):
    from speedbench.data import read_image
    from speedbench.data.scenes import make_scenes

    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        make_scenes(tmp, count=n, seed=7, split="heldout")
        return [read_image(p) for p in sorted(Path(tmp, "images").iterdir())]


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--model", default="ssdlite320_mobilenet_v3_large")
    ap.add_argument("--size", type=int, default=224)
    ap.add_argument("--seconds", type=float, default=8.0)
    args = ap.parse_args()

    from speedbench.measure import Point, Policy
    from speedbench.measure.concurrent_launch import host_cores, measure_load, measure_scaling

    cores = host_cores()
    if cores < 2:
        print("needs at least 2 cores", file=sys.stderr)
        return 1
    cache = Path(os.environ.get("SPEEDBENCH_CACHE", Path.home() / ".cache" / "speedbench")) / "bench"
    t0 = time.monotonic()
    graph = graph_for(args.model, args.size, cache)
    print(f"graph: {graph} (ready in {time.monotonic() - t0:.0f} s)")
    imgs = images()
    policy = Policy(warmup_min=3, warmup_max=30)
    base = dict(model=args.model, weights="none", size=args.size, proposals=0, backend="ort", graph=graph)
    load_before = os.getloadavg()[0]
    t1 = Point(**base, intra_threads=1)
    r1, r2 = measure_scaling(t1, imgs, ks=(1, 2), policy=policy, seconds=args.seconds, timeout_s=900,
                             utilisations=(0.5, 0.8))
    t2 = measure_load(Point(**base, intra_threads=2), imgs, k=1, policy=policy, seconds=args.seconds,
                      timeout_s=900)
    load_after = os.getloadavg()[0]

    print(f"host: {cores} cores; 1-min load average before {load_before:.2f}, after {load_after:.2f} "
          "(other processes share this machine)")
    print(f"{'setting':<16}{'fps':>8}{'p50 ms':>9}{'p99 ms':>9}{'eff':>6}{'L':>7}{'X*W':>7}"
          f"{'U cpu':>7}{'X*S':>7}")
    for name, r in (("K=1 x T=1", r1), ("K=2 x T=1", r2), ("K=1 x T=2", t2)):
        if not r.ok:
            print(f"{name:<16} failed: {r.reason}")
            continue
        s = r.summary
        eff = s.get("scaling_eff", float("nan"))
        print(f"{name:<16}{s['tput_fps']:>8.2f}{s['tput_p50_ms']:>9.1f}{s['tput_p99_ms']:>9.1f}{eff:>6.2f}"
              f"{s['littles_L']:>7.3f}{s['littles_XW']:>7.3f}{s['tput_cpu_util']:>7.2f}{s['tput_cpu_util_xs']:>7.2f}")
    if r2.ok:
        import json

        for e in json.loads(r2.summary.get("load_curve") or "[]"):
            if e["status"] == "ok":
                print(f"K=2 paced at {e['load']:.0%} of capacity: busy {e['util']:.2f}, p50 {e['p50_ms']:.1f} ms, "
                      f"p99 {e['p99_ms']:.1f} ms (latency from arrival), L {e['littles_L']:.3f} vs "
                      f"X*W {e['littles_XW']:.3f}")
    if r1.ok and r2.ok:
        print(f"ratio X(K=2) / X(K=1) = {r2.tput_fps / r1.tput_fps:.3f}  (2.0 = perfect scaling)")
        print(f"p99 under load K=2 / K=1 = {r2.summary['tput_p99_ms'] / r1.summary['tput_p99_ms']:.3f}")
    if r2.ok and t2.ok:
        print(f"two cores as 2 workers x 1 thread vs 1 worker x 2 threads: X ratio "
              f"{r2.tput_fps / t2.tput_fps:.3f}, p50 ratio {r2.summary['tput_p50_ms'] / t2.summary['tput_p50_ms']:.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
