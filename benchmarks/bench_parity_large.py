"""Export the large architectures and check ONNX Runtime against torch eager (on demand).

The CI tests cover parity for the small architectures; this script covers the big ones
at a size you choose, printing per model: parity verdict, detections compared, worst
box / score difference, GMACs, ONNX size, and torch-eager vs ORT latency measured side by
side in this one run (a ratio, not an absolute figure: machines are shared and noisy).

    python benchmarks/bench_parity_large.py [--size 512] [--models a,b] [--cache-dir DIR]
"""
from __future__ import annotations

import argparse
import statistics
import sys
import time

LARGE = ["fasterrcnn_resnet50_fpn", "fasterrcnn_resnet50_fpn_v2", "fasterrcnn_mobilenet_v3_large_fpn",
         "maskrcnn_resnet50_fpn", "retinanet_resnet50_fpn", "retinanet_resnet50_fpn_v2",
         "fcos_resnet50_fpn", "ssd300_vgg16"]


def _median_ms(fn, repeats):
    fn()   # warm-up
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        times.append((time.perf_counter() - t) * 1000)
    return statistics.median(times)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=None, help="input size (default: each model's native size)")
    ap.add_argument("--models", default=",".join(LARGE))
    ap.add_argument("--cache-dir", default=None)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--threads", type=int, default=1)
    args = ap.parse_args(argv)

    import torch

    from speedbench.data import to_input
    from speedbench.export import export_onnx, ort_session
    from speedbench.zoo import build_model, get_spec, pattern_image

    torch.set_num_threads(args.threads)
    print(f"{'model':38} {'size':>5} {'ok':>3} {'compared':>8} {'box px':>8} {'score':>9} {'GMACs':>8} "
          f"{'MiB':>6} {'eager ms':>9} {'ort ms':>8} {'ort/eager':>9}  graph")
    failures = 0
    for model_id in args.models.split(","):
        spec = get_spec(model_id)
        size = args.size or spec.native_size
        rec = export_onnx(model_id, size=size, cache_dir=args.cache_dir)
        par, facts = rec.parity, rec.facts
        eager_ms = ort_ms = float("nan")
        if rec.ok:
            model = build_model(model_id, size=size)
            x = to_input(pattern_image(size * 3 // 4, size, seed=21))
            sess = ort_session(rec.path, intra_threads=args.threads)
            with torch.no_grad():
                eager_ms = _median_ms(lambda: model([torch.from_numpy(x)]), args.repeats)
            ort_ms = _median_ms(lambda: sess.run(None, {"image": x}), args.repeats)
        else:
            failures += 1
        print(f"{model_id:38} {size:>5} {'yes' if rec.ok else 'NO':>3} {par.get('matched', 0):>8} "
              f"{par.get('box_max_abs_diff_px', float('nan')):>8.4f} {par.get('score_max_abs_diff', float('nan')):>9.2e} "
              f"{facts.get('gmacs', float('nan')):>8.2f} {facts.get('onnx_mib', float('nan')):>6.1f} "
              f"{eager_ms:>9.0f} {ort_ms:>8.0f} {ort_ms / eager_ms:>9.2f}  {par.get('graph', rec.reason)}")
        sys.stdout.flush()
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
