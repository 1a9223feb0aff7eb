"""`speedbench train`: train the compact demo zoo on synthetic scenes (wraps speedbench.demo.train)."""
from __future__ import annotations

from speedbench.cli.args import int_in, output_dir


def add_parser(subparsers):
    p = subparsers.add_parser(
        "train", help="train the compact demo detectors from scratch on synthetic scenes",
        description="Train, evaluate on held-out scenes and save the compact demo zoo "
                    "(fp16 weights + manifest.json). Seeded and reproducible.")
    p.add_argument("--model", default="all",
                   help="demo_ssdlite, demo_fcos, demo_frcnn, demo_frcnn_lite or all (default all)")
    p.add_argument("--steps", type=int_in(1, 1_000_000), default=None, help="override the recipe's step count")
    p.add_argument("--out", default=None, type=output_dir, help="weights directory (default: the package's zoo/weights)")
    p.add_argument("--seed", type=int_in(0, 2**31 - 1), default=0)
    p.add_argument("--heldout-images", type=int_in(1, 100_000), default=100,
                   help="held-out scenes scored for the manifest (default 100)")
    p.set_defaults(run=run)


def run(args) -> int:
    from speedbench.demo.train import train
    from speedbench.errors import UserError

    if args.heldout_images <= 0:
        raise UserError(f"--heldout-images must be positive, not {args.heldout_images}")
    if args.steps is not None and args.steps <= 0:
        raise UserError(f"--steps must be positive, not {args.steps}")
    entries = train(args.model, args.steps, args.out, args.seed, args.heldout_images,
                    log=lambda s: print(s, flush=True))
    for m, e in entries.items():
        h = e["heldout"]
        print(f"{m}: mAP {h['map']:.3f}  AP50 {h['map50']:.3f}  AP_small {h['map_small']:.3f}  "
              f"{e['train_seconds']:.0f} s")
    return 0
