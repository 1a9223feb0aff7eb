"""speedbench evaluate: COCO-protocol mAP of a results file (or of a graph run over the set)."""
from __future__ import annotations

import json
import os
import sys

from speedbench.cli.args import int_in, output_file

FEW_BOXES = 10  # per-class AP from fewer ground-truth boxes than this is flagged (common practice)


def add_parser(subparsers):
    p = subparsers.add_parser(
        "evaluate", help="COCO-protocol mAP of detections against a held-out set",
        description="Score detections (COCO results list: image_id, category_id, bbox [x,y,w,h], "
                    "score) against ground truth with the COCO protocol, with a bootstrap "
                    "interval of mAP over images. Or run an ONNX graph over the set with --graph.")
    p.add_argument("gt", metavar="GT", help="COCO JSON, a folder with annotations.json, or a Pascal VOC folder")
    p.add_argument("dets", metavar="DETS", nargs="?", help="detections JSON (COCO results list)")
    p.add_argument("--graph", help="ONNX graph to run over the set instead of reading DETS")
    p.add_argument("--model", help="zoo id whose class names label the graph's outputs (with --graph)")
    p.add_argument("--classes", help="comma-separated class names by label index (with --graph)")
    p.add_argument("--threads", type=int_in(0, 256), default=1, help="intra-op threads for --graph, 0..256 (default 1)")
    p.add_argument("--save-dets", metavar="PATH", type=output_file(".json"),
                   help="write the graph's detections here (.json, with --graph)")
    p.add_argument("--bootstrap", type=int_in(0, 100_000), default=1000,
                   help="bootstrap resamples, 0..100000 (0 = no interval)")
    p.add_argument("--seed", type=int_in(0, 2**32 - 1), default=0, help="seed of the bootstrap (default 0)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(run=run)


def run(args) -> int:
    # Scoring a results file is a command users wait on: it reads the two files once each,
    # straight into arrays, and imports neither torch nor matplotlib (tests/test_cocoeval.py).
    if args.graph is None and "numpy" not in sys.modules:
        # The bootstrap runs its own threads; OpenBLAS's (read once, when numpy loads) would
        # spin against them. No child process is started on this path.
        os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    from speedbench.data import load_annotations, load_dataset
    from speedbench.errors import UserError
    from speedbench.evaluate import GroundTruth, coco_evaluate, read_detections

    if (args.dets is None) == (args.graph is None):
        raise UserError("give either DETS (a results file) or --graph, not both or neither")
    if args.graph:
        dataset = load_dataset(args.gt)
        ground = GroundTruth(dataset.coco)
        dets = _run_graph(args, dataset)
    else:
        ground = GroundTruth(load_annotations(args.gt))
        dets = read_detections(args.dets, ground)
    result = coco_evaluate(ground, dets, bootstrap=args.bootstrap, seed=args.seed, threads=_cores())
    if args.json:
        json.dump(result, sys.stdout)
        sys.stdout.write("\n")
    else:
        sys.stdout.write(format_result(result, args.gt, args.dets or args.graph))
    return 0


def _cores() -> int:
    """Threads for the bootstrap: the cores this process may run on."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


def _run_graph(args, dataset):
    from speedbench.data.datasets import category_map
    from speedbench.errors import UserError
    from speedbench.evaluate import detect_dataset
    from speedbench.evaluate.run import classes_of

    if bool(args.model) == bool(args.classes):
        raise UserError("--graph needs exactly one of --model or --classes to name its labels")
    classes = classes_of(args.model) if args.model else [c.strip() for c in args.classes.split(",")]
    dets = detect_dataset(args.graph, dataset, category_map(dataset, classes), intra_threads=args.threads)
    if args.save_dets:
        try:
            with open(args.save_dets, "w") as fh:
                json.dump(dets, fh)
        except OSError as exc:
            raise UserError(f"{args.save_dets}: cannot write detections ({exc.strerror})") from None
    return dets


def _num(v) -> str:
    return "  n/a" if v is None or v < 0 else f"{v:.3f}"


def format_result(r: dict, gt_name, dets_name) -> str:
    ci = r["map_ci95"]
    conf = r["bootstrap"]["confidence"]
    lines = [
        f"ground truth : {gt_name} ({r['n_images']} images)",
        f"detections   : {dets_name} ({r['n_detections']})",
        "",
        f"  mAP  IoU .50:.95        {_num(r['map'])}"
        + (f"   {conf:.0%} interval {ci[0]:.3f} .. {ci[1]:.3f}" if ci else ""),
        f"  mAP  IoU .50            {_num(r['map50'])}",
        f"  mAP  IoU .75            {_num(r['map75'])}",
        f"  mAP  small/medium/large {_num(r['map_small'])} / {_num(r['map_medium'])} / {_num(r['map_large'])}",
        f"  mAR  1 / 10 / 100 dets  {_num(r['mar_1'])} / {_num(r['mar_10'])} / {_num(r['mar_100'])}",
        "",
        "  class                    AP     boxes",
    ]
    flagged = False
    for name, ap in r["per_class"].items():
        n = r["per_class_gt"].get(name, 0)
        mark = " *" if 0 < n < FEW_BOXES else ""
        flagged |= bool(mark)
        lines.append(f"  {name[:22]:<22} {_num(ap):>6} {n:>8}{mark}")
    lines.append("")
    lines.append("n/a: undefined by the protocol (no ground truth).")
    if flagged:
        lines.append(f"*: fewer than {FEW_BOXES} ground-truth boxes; that class's AP is a rough estimate.")
    if ci:
        lines.append(f"The interval is a bootstrap over the {r['n_images']} images: it shows how much mAP "
                     "moves with the choice of images, not annotation error or data this set does not "
                     "represent. Check a safety-relevant deployment on data from its own site.")
    return "\n".join(lines) + "\n"
