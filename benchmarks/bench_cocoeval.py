"""Speed of speedbench's COCO evaluator against pycocotools, side by side in one run.

Workload: 500 images x 100 detections x 3 classes (synthetic boxes; the numbers
are only for timing). Two comparisons, interleaved so that both sides see the same
machine load, with the same 12 summary values (checked to 1e-9):

- in memory: the evaluator alone on Python objects (goal >= 10x);
- end to end from files, what a user waits for: `speedbench evaluate GT DETS --json`
  as a subprocess (interpreter start, imports, reading both files, evaluation and the
  default 1000-resample bootstrap interval) against pycocotools reading the same two
  files in one Python process, with no interval (goal >= 5x at 500 images). Ours runs
  with orjson if installed, again with the standard library's json, and once with
  --bootstrap 0 (no interval: the same work as pycocotools).

    python benchmarks/bench_cocoeval.py [--images 500,5000] [--dets 95] [--repeat 3]
"""
from __future__ import annotations

import argparse
import contextlib
import copy
import io
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def workload(n_images: int, n_dets: int, n_classes: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    images = [{"id": i + 1, "file_name": f"{i + 1:06d}.png", "width": 640, "height": 480} for i in range(n_images)]
    anns, dets = [], []
    for im in range(1, n_images + 1):
        gts = []
        for _ in range(int(rng.integers(2, 12))):
            side = rng.choice([rng.uniform(8, 30), rng.uniform(32, 95), rng.uniform(97, 250)])
            w, h = side * rng.uniform(0.7, 1.4, 2)
            box = [rng.uniform(0, 640 - w), rng.uniform(0, 480 - h), w, h]
            gts.append((box, int(rng.integers(1, n_classes + 1))))
            anns.append({"id": len(anns) + 1, "image_id": im, "category_id": gts[-1][1], "bbox": box,
                         "area": w * h, "iscrowd": int(rng.random() < 0.03)})
        for _ in range(n_dets):
            if rng.random() < 0.5:
                (x, y, w, h), c = gts[int(rng.integers(len(gts)))]
                j = rng.normal(0, 0.1, 4) * [w, h, w, h]
                box = [x + j[0], y + j[1], max(1.0, w + j[2]), max(1.0, h + j[3])]
            else:
                c = int(rng.integers(1, n_classes + 1))
                box = [*rng.uniform(0, 560, 2), *rng.uniform(5, 150, 2)]
            dets.append({"image_id": im, "category_id": c, "bbox": box, "score": float(rng.random())})
    cats = [{"id": c, "name": f"class{c}"} for c in range(1, n_classes + 1)]
    return {"images": images, "annotations": anns, "categories": cats}, dets


def run_reference(gt, dets):
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval

    with contextlib.redirect_stdout(io.StringIO()):
        coco = COCO()
        coco.dataset = copy.deepcopy(gt)
        coco.createIndex()
        res = coco.loadRes(copy.deepcopy(dets))
        ev = COCOeval(coco, res, "bbox")
        ev.evaluate()
        ev.accumulate()
        ev.summarize()
    return ev.stats


def reference_from_files(gt_path, dets_path):
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval

    with contextlib.redirect_stdout(io.StringIO()):
        coco = COCO(str(gt_path))
        ev = COCOeval(coco, coco.loadRes(str(dets_path)), "bbox")
        ev.evaluate()
        ev.accumulate()
        ev.summarize()
    return ev.stats


# The CLI in a fresh interpreter, by the console script's own entry; with hide_orjson,
# `import orjson` fails inside it.
_CLI = "import sys\n{hide}from speedbench.cli import entry\nentry()\n"


def ours_from_files(gt_path, dets_path, hide_orjson=False, extra=()):
    code = _CLI.format(hide="sys.modules['orjson'] = None\n" if hide_orjson else "")
    out = subprocess.run([sys.executable, "-c", code, "evaluate", str(gt_path), str(dets_path), "--json", *extra],
                         capture_output=True, text=True, check=True, env=_env())
    return json.loads(out.stdout)


def _env():
    root = str(Path(__file__).resolve().parents[1])
    path = os.environ.get("PYTHONPATH", "")
    return dict(os.environ, PYTHONPATH=root + (os.pathsep + path if path else ""))


def _timed(fn, *a, **kw):
    t0 = time.perf_counter()
    out = fn(*a, **kw)
    return time.perf_counter() - t0, out


def in_memory(args, n_images):
    from speedbench.evaluate import coco_evaluate
    from speedbench.evaluate.metrics import SUMMARY_KEYS

    gt, dets = workload(n_images, args.dets, args.classes)
    print(f"\nin memory: {n_images} images, {len(dets)} detections, {len(gt['annotations'])} "
          f"ground-truth boxes, {args.classes} classes")
    ref_t, our_t, boot_t = [], [], []
    for _ in range(args.repeat):  # interleaved, so both see the same machine load
        t, stats = _timed(run_reference, gt, dets)
        ref_t.append(t)
        t, ours = _timed(coco_evaluate, gt, dets, bootstrap=0)
        our_t.append(t)
        boot_t.append(_timed(coco_evaluate, gt, dets, bootstrap=1000)[0])
    diff = max(abs(ours[k] - s) for k, s in zip(SUMMARY_KEYS, stats))
    ref, our, boot = min(ref_t), min(our_t), min(boot_t)
    print(f"  pycocotools          : {ref:7.3f} s (best of {args.repeat})")
    print(f"  speedbench           : {our:7.3f} s (best of {args.repeat})")
    print(f"  speed-up             : {ref / our:7.1f} x  (goal >= 10 x)")
    print(f"  max |difference|     : {diff:.2e} over the 12 summary values (goal <= 1e-9)")
    print(f"  with 1000 bootstrap resamples: {boot:7.3f} s")
    return diff


def from_files(args, n_images, tmp):
    from speedbench.data import jsonio as jsonfile
    from speedbench.evaluate.metrics import SUMMARY_KEYS

    gt, dets = workload(n_images, args.dets, args.classes)
    gt_path, dets_path = Path(tmp) / f"gt{n_images}.json", Path(tmp) / f"dets{n_images}.json"
    gt_path.write_text(json.dumps(gt))
    dets_path.write_text(json.dumps(dets))
    mib = dets_path.stat().st_size / 2 ** 20
    print(f"\nend to end from files: {n_images} images, {len(dets)} detections ({mib:.1f} MiB)")
    sides = {"pycocotools, in-process, no interval": lambda: reference_from_files(gt_path, dets_path),
             "speedbench evaluate --json (subprocess)": lambda: ours_from_files(gt_path, dets_path)}
    if jsonfile.orjson is not None:
        sides["the same, standard-library json"] = lambda: ours_from_files(gt_path, dets_path, True)
    # pycocotools computes no interval; this side does the same work as it does.
    sides["ours with --bootstrap 0 (no interval)"] = lambda: ours_from_files(gt_path, dets_path, extra=("--bootstrap", "0"))
    times = {name: [] for name in sides}
    results = {}
    for _ in range(args.repeat):  # interleaved
        for name, fn in sides.items():
            t, results[name] = _timed(fn)
            times[name].append(t)
    ref_name, *ours = list(sides)
    stats = results[ref_name]
    ref = min(times[ref_name])
    print(f"  {ref_name:42s}: {ref:7.3f} s (best of {args.repeat})")
    diff = 0.0
    for name in ours:
        t = min(times[name])
        d = max(abs(results[name][k] - s) for k, s in zip(SUMMARY_KEYS, stats))
        diff = max(diff, d)
        print(f"  {name:42s}: {t:7.3f} s  speed-up {ref / t:5.1f} x  max |difference| {d:.1e}")
    ci = results[ours[0]]["map_ci95"]
    print(f"  (ours includes the 1000-resample bootstrap interval: {ci[0]:.4f} .. {ci[1]:.4f};"
          f" goal >= 5 x at 500 images)")
    return diff, {name: min(t) for name, t in times.items()}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--images", default="500,5000", help="comma-separated set sizes (default 500,5000)")
    ap.add_argument("--dets", type=int, default=95, help="detections per image")
    ap.add_argument("--classes", type=int, default=3)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--skip-memory", action="store_true", help="only the end-to-end comparison")
    args = ap.parse_args()
    sizes = [int(x) for x in args.images.split(",")]
    diff = 0.0
    best = {}
    with tempfile.TemporaryDirectory() as tmp:
        for n in sizes:
            if not args.skip_memory:
                diff = max(diff, in_memory(args, n))
            d, best[n] = from_files(args, n, tmp)
            diff = max(diff, d)
    if len(sizes) > 1:  # growth of the end-to-end time with the set size (linear = the size ratio)
        lo, hi = min(sizes), max(sizes)
        print(f"\ngrowth from {lo} to {hi} images (x{hi / lo:g} the data), end to end:")
        for name in best[lo]:
            print(f"  {name:42s}: x{best[hi][name] / best[lo][name]:.1f}")
    print(f"\nhost: {os.cpu_count()} logical cores, load average {os.getloadavg()[0]:.1f} at the end")
    return 0 if diff <= 1e-9 else 1


if __name__ == "__main__":
    raise SystemExit(main())
