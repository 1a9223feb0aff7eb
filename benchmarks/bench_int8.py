"""INT8 vs fp32 on the demo zoo: latency ratio (whole graph and backbone stage) and mAP change.

For each demo model at one input size: export the fp32 graph, quantise it (static QDQ,
speedbench.export.quantise, calibrated on generated calibration scenes disjoint from the
held-out ones), score both on the same held-out scenes (mAP change with a paired bootstrap
interval, detection agreement), then time fp32 and int8 side by side through the real
worker at each thread count, alternating fp32/int8 `--rounds` times so that a change in
the host's load hits both alike. Ratios are int8 / fp32 (below 1 = int8 faster) of the
median of the rounds' p50s. Prints the CPU's INT8 instruction flags.

Goal (issue 22): backbone speed-up >= 1.5x (ratio <= 0.667) with a mAP drop < 0.02 for at
least one model.

    python benchmarks/bench_int8.py [--models demo_ssdlite,demo_fcos,...] [--size 320]
        [--threads 1,2] [--seconds 4] [--rounds 2] [--heldout 40] [--calibration 16]
        [--method minmax] [--reduce-range] [--per-tensor]
"""
from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from pathlib import Path

MODELS = "demo_ssdlite,demo_fcos,demo_frcnn,demo_frcnn_lite"


def _accuracy(graph, dataset, model, cache):
    from speedbench.evaluate import detect_dataset, evaluate_graph
    from speedbench.evaluate.paired import per_image_results
    from speedbench.evaluate.run import raw_detections

    result = evaluate_graph(graph, dataset, model=model, cache_dir=cache, check_threads=False)
    dets = detect_dataset(graph, dataset, result["label_map"], 2, cache)
    raw = raw_detections(graph, dataset, 2, cache)
    return result["map"], per_image_results(dataset.coco, dets), [raw[k] for k in sorted(raw)]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--models", default=MODELS)
    ap.add_argument("--size", type=int, default=320)
    ap.add_argument("--threads", default="1,2")
    ap.add_argument("--seconds", type=float, default=4.0, help="timing budget per point and round")
    ap.add_argument("--rounds", type=int, default=2, help="fp32/int8 alternations per thread count")
    ap.add_argument("--heldout", type=int, default=40)
    ap.add_argument("--calibration", type=int, default=16)
    ap.add_argument("--method", default="minmax")
    ap.add_argument("--reduce-range", action="store_true")
    ap.add_argument("--per-tensor", action="store_true", help="one weight scale per tensor (default: per channel)")
    ap.add_argument("--cache", default=None, help="export cache (default: a temporary directory)")
    args = ap.parse_args(argv)

    from speedbench.data import load_dataset, make_scenes
    from speedbench.evaluate.paired import paired_map_diff
    from speedbench.export import QuantSettings, agreement, export_onnx, quantise_graph
    from speedbench.measure import Point, Policy, measure_point
    from speedbench.sweep.env import environment_fingerprint

    flags = environment_fingerprint()["cpu_flags"]
    int8_flags = [f for f in ("avx512_vnni", "avx_vnni", "amx_int8") if flags.get(f)]
    print(f"CPU INT8 instruction flags: {', '.join(int8_flags) or 'none (no VNNI / AMX-INT8)'}; "
          f"avx2 {flags.get('avx2')}, avx512f {flags.get('avx512f')}")
    tmp = Path(tempfile.mkdtemp(prefix="bench-int8-"))
    cache = Path(args.cache) if args.cache else tmp / "exports"
    heldout = load_dataset(make_scenes(tmp / "heldout", count=args.heldout, seed=7, split="heldout"))
    calib = load_dataset(make_scenes(tmp / "calib", count=args.calibration, seed=1, split="calibration"))
    settings = QuantSettings(method=args.method, reduce_range=args.reduce_range, per_channel=not args.per_tensor)
    print(f"held-out {heldout.fingerprint[:12]} ({len(heldout)} scenes), calibration {calib.fingerprint[:12]} "
          f"({len(calib)} scenes), settings {settings.to_dict()}")
    images = [heldout.read(r.id) for r in heldout.images[:8]]
    policy = Policy(warmup_max=10, min_reps=10, max_reps=300, max_seconds=args.seconds, profile_reps=3)
    threads = [int(t) for t in args.threads.split(",")]
    table = []
    for model in args.models.split(","):
        t0 = time.monotonic()
        fp32 = export_onnx(model, size=args.size, weights="demo", cache_dir=cache)
        int8 = quantise_graph(fp32, settings, calib, cache_dir=cache) if fp32.ok else fp32
        if not int8.ok:
            print(f"{model}: {int8.reason}")
            continue
        map32, pi32, raw32 = _accuracy(fp32.path, heldout, model, tmp / "det")
        map8, pi8, raw8 = _accuracy(int8.path, heldout, model, tmp / "det")
        diff = paired_map_diff(pi8, pi32)
        agree = agreement(raw32, raw8)
        print(f"\n{model} @ {args.size} px (prepared in {time.monotonic() - t0:.0f} s): file "
              f"{Path(fp32.path).stat().st_size / 2**20:.1f} -> {Path(int8.path).stat().st_size / 2**20:.1f} MiB; "
              f"quantised {int8.facts['quantised_nodes']}, Q {int8.facts['quantize_linear']} "
              f"DQ {int8.facts['dequantize_linear']}")
        print(f"  mAP fp32 {map32:.3f}  int8 {map8:.3f}  change {diff['diff']:+.3f} "
              f"[{diff['ci_lo']:+.3f}, {diff['ci_hi']:+.3f}] (paired, {diff['n_images']} images); "
              f"agreement: {agree['matched_fraction']:.2f} matched, box diff mean "
              f"{agree['box_mean_abs_diff_px'] or 0:.2f} / max {agree['box_max_abs_diff_px'] or 0:.1f} px")
        for t in threads:
            got = {"fp32": [], "int8": []}
            for _ in range(args.rounds):
                for name, rec in (("fp32", fp32), ("int8", int8)):
                    res = measure_point(Point(model=model, weights="demo", size=args.size, proposals=rec.proposals,
                                              graph=rec.path, intra_threads=t), images, policy, timeout_s=600)
                    if not res.ok:
                        print(f"  {name} t{t}: failed: {res.reason}")
                        continue
                    row = res.to_row()
                    got[name].append((row["lat_p50_ms"], row.get("stage_backbone_ms"), row.get("rss_peak_mib")))
            if not got["fp32"] or not got["int8"]:
                continue
            med = {k: [statistics.median(x[i] for x in v) for i in range(3)] for k, v in got.items()}
            whole, backbone = med["int8"][0] / med["fp32"][0], med["int8"][1] / med["fp32"][1]
            print(f"  t{t}: p50 fp32 {med['fp32'][0]:.1f} ms, int8 {med['int8'][0]:.1f} ms -> ratio {whole:.2f}; "
                  f"backbone {med['fp32'][1]:.1f} -> {med['int8'][1]:.1f} ms -> ratio {backbone:.2f} "
                  f"(speed-up {1 / backbone:.2f}x); peak RSS {med['fp32'][2]:.0f} -> {med['int8'][2]:.0f} MiB")
            table.append((model, t, whole, backbone, diff["diff"], diff["ci_lo"], diff["ci_hi"]))
    print("\nmodel | threads | int8/fp32 whole | int8/fp32 backbone | mAP change [95% CI]")
    for model, t, whole, backbone, d, lo, hi in table:
        print(f"{model} | {t} | {whole:.2f} | {backbone:.2f} | {d:+.3f} [{lo:+.3f}, {hi:+.3f}]")
    hit = [r for r in table if r[3] <= 1 / 1.5 and r[4] > -0.02]
    print(f"\ngoal (backbone >= 1.5x faster, mAP drop < 0.02): {'met by ' + ', '.join(f'{r[0]} t{r[1]}' for r in hit) if hit else 'not met'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
