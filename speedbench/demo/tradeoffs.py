"""Accuracy of the trained demo zoo across input sizes and proposal budgets (eager PyTorch).

    python -m speedbench.demo.tradeoffs [--images N] [--sizes 320,256,192] [--proposals 5,20,100,300]

A quick check that the demo zoo shows the trade-offs the sweep is meant to find: accuracy
(small objects first) falls as the input shrinks, two-stage accuracy rises with the RPN
proposal budget up to a knee. Latency is printed for orientation only (eager, this
machine, at this moment); the sweep measures it properly in ONNX Runtime workers.
"""
from __future__ import annotations

import argparse
import sys
import time

import pandas as pd

from speedbench.demo.accuracy import coco_scores, heldout_scenes, load_demo_model, predict


def _median_ms(model, images, repeats: int = 5) -> float:
    import torch

    x = [torch.from_numpy(images[0]).permute(2, 0, 1).float().div_(255)]
    times = []
    with torch.inference_mode():
        model(x)  # warm-up
        for _ in range(repeats):
            t0 = time.perf_counter()
            model(x)
            times.append((time.perf_counter() - t0) * 1000)
    return float(sorted(times)[len(times) // 2])


def tradeoff_table(models=None, n_images: int = 60, sizes=(320, 256, 192),
                   proposals=(5, 20, 100, 300)) -> pd.DataFrame:
    """One row per (model, size, proposals) with COCO figures and an eager latency median."""
    from speedbench.zoo.build import configure
    from speedbench.zoo.compact import SPECS

    specs = [s for s in SPECS if models is None or s.id in models]
    images, dataset = heldout_scenes(n_images)
    rows = []
    for spec in specs:
        model, _ = load_demo_model(spec.id)
        points = [(s, None) for s in sizes]
        if spec.family == "two-stage":
            points += [(spec.native_size, p) for p in proposals if p != spec.default_proposals]
        for size, props in points:
            configure(model, size=size, proposals=props)
            scores = coco_scores(dataset, predict(model, images))
            rows.append({"model": spec.id, "family": spec.family, "size": size,
                         "proposals": props or spec.default_proposals,
                         **{k: round(v, 3) for k, v in scores.items() if k != "n_images"},
                         "eager_ms": round(_median_ms(model, images), 1)})
        configure(model)
    return pd.DataFrame(rows)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="python -m speedbench.demo.tradeoffs", description=__doc__.split("\n\n")[0])
    p.add_argument("--images", type=int, default=60)
    p.add_argument("--sizes", default="320,256,192")
    p.add_argument("--proposals", default="5,20,100,300")
    p.add_argument("--models", default=None, help="comma-separated ids (default all)")
    args = p.parse_args(argv)
    import torch

    torch.set_num_threads(2)
    table = tradeoff_table(args.models.split(",") if args.models else None, args.images,
                           [int(s) for s in args.sizes.split(",")], [int(s) for s in args.proposals.split(",")])
    with pd.option_context("display.width", 160, "display.max_columns", 20):
        print(table.to_string(index=False))
    return 0


if __name__ == "__main__":
    sys.exit(main())
