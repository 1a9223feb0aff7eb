"""Speed of speedbench's COCO evaluator against pycocotools, side by side in one run.

Workload: 500 images x 100 detections x 3 classes (synthetic boxes; the numbers
are only for timing). Goal: >= 10x faster than pycocotools with the same
12 summary values (checked to 1e-9 here).

    python benchmarks/bench_cocoeval.py [--images 500] [--dets 100] [--repeat 3]
"""
from __future__ import annotations

import argparse
import contextlib
import copy
import io
import time

import numpy as np


def workload(n_images: int, n_dets: int, n_classes: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    images = [{"id": i + 1, "width": 640, "height": 480} for i in range(n_images)]
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


def main() -> int:
    from speedbench.evaluate import coco_evaluate
    from speedbench.evaluate.metrics import SUMMARY_KEYS

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--images", type=int, default=500)
    ap.add_argument("--dets", type=int, default=100, help="detections per image")
    ap.add_argument("--classes", type=int, default=3)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    gt, dets = workload(args.images, args.dets, args.classes)
    print(f"workload: {args.images} images, {len(dets)} detections, {len(gt['annotations'])} "
          f"ground-truth boxes, {args.classes} classes")

    ref_t, our_t, boot_t = [], [], []
    for _ in range(args.repeat):  # interleaved, so both see the same machine load
        t0 = time.perf_counter()
        stats = run_reference(gt, dets)
        ref_t.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        ours = coco_evaluate(gt, dets, bootstrap=0)
        our_t.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        coco_evaluate(gt, dets, bootstrap=1000)
        boot_t.append(time.perf_counter() - t0)
    diff = max(abs(ours[k] - s) for k, s in zip(SUMMARY_KEYS, stats))
    ref, our, boot = min(ref_t), min(our_t), min(boot_t)
    print(f"pycocotools          : {ref:7.3f} s (best of {args.repeat})")
    print(f"speedbench           : {our:7.3f} s (best of {args.repeat})")
    print(f"speed-up             : {ref / our:7.1f} x  (goal >= 10 x)")
    print(f"max |difference|     : {diff:.2e} over the 12 summary values (goal <= 1e-9)")
    print(f"with 1000 bootstrap resamples: {boot:7.3f} s")
    return 0 if diff <= 1e-9 else 1


if __name__ == "__main__":
    raise SystemExit(main())
