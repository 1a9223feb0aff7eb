"""`speedbench scenes OUT`: write synthetic yard scenes with COCO-style annotations."""
from __future__ import annotations

from speedbench.cli.args import int_in, output_dir


def add_parser(subparsers):
    p = subparsers.add_parser(
        "scenes", help="generate synthetic yard-camera scenes (images + COCO JSON)",
        description="Write deterministic synthetic scenes (crates, drums, pylons among distractors) "
                    "to OUT/images and OUT/annotations.json.")
    p.add_argument("out", type=output_dir, help="output directory")
    p.add_argument("--count", type=int_in(1, 100_000), default=100, help="number of images (default 100)")
    p.add_argument("--seed", type=int_in(0, 2**31 - 1), default=0, help="seed; the same seed gives identical files")
    p.add_argument("--split", choices=("train", "heldout"), default="heldout",
                   help="seed stream; train and heldout never share a scene (default heldout)")
    p.add_argument("--width", type=int_in(32, 4096), default=320)
    p.add_argument("--height", type=int_in(32, 4096), default=320)
    p.add_argument("--format", dest="fmt", choices=("png", "jpg"), default="png")
    p.set_defaults(run=run)


def run(args) -> int:
    from speedbench.data.scenes import make_scenes

    path = make_scenes(args.out, args.count, args.seed, split=args.split,
                       width=args.width, height=args.height, fmt=args.fmt)
    print(f"wrote {args.count} {args.split} scenes and {path}")
    return 0
