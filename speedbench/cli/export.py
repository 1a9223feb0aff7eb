"""`speedbench export MODEL`: export one configuration to ONNX and verify it against torch eager."""
from __future__ import annotations

from speedbench.cli.args import int_in, output_file


def add_parser(subparsers):
    p = subparsers.add_parser(
        "export", help="export a detector to ONNX and check it against torch",
        description="Export one (model, weights, size, proposals, opset) to ONNX, cached by content hash; "
                    "the graph is run on structured images in torch and ONNX Runtime and the detections "
                    "compared. Exits 1 if the export fails or diverges.")
    p.add_argument("model", help="zoo model id (speedbench models)")
    p.add_argument("--size", type=int_in(32, 4096), default=None, help="input size the model's transform resizes to (px); "
                   "default: the model's native size")
    p.add_argument("--proposals", type=int_in(1, 10_000), default=None, help="proposal / candidate budget; default: the model's")
    p.add_argument("--weights", default=None, help="none | torchvision | demo | file:PATH (default: the model's)")
    p.add_argument("--num-classes", type=int_in(1, 100_000), default=None,
                   help="classes of a file:PATH checkpoint (default: read off the checkpoint)")
    p.add_argument("--opset", type=int_in(7, 30), default=17, help="ONNX opset (default 17)")
    p.add_argument("-o", "--out", default=None, type=output_file(".onnx"), help="also copy the verified graph here (record next to it)")
    p.add_argument("--cache-dir", default=None, help="export cache (default $SPEEDBENCH_CACHE or "
                   "~/.cache/speedbench/exports)")
    p.add_argument("--no-verify", action="store_true", help="skip the torch-vs-ONNX Runtime comparison")
    p.add_argument("--force", action="store_true", help="export again even if the cache has this graph")
    p.add_argument("--json", action="store_true", help="print the export record as JSON")
    p.add_argument("--raw-head", action="store_true",
                   help="export WITHOUT in-graph pre/postprocessing (raw dense head outputs) to -o OUT.onnx, "
                        "and write the adapter describing it to OUT.adapter.toml: an external graph example")
    p.set_defaults(run=run)
    return p


def run(args) -> int:
    import json

    from speedbench.export import export_onnx
    from speedbench.zoo import get_spec

    spec = get_spec(args.model)
    weights = args.weights or spec.default_weights
    if args.raw_head:
        return _raw_head(args, weights)
    record = export_onnx(args.model, size=args.size, proposals=args.proposals, weights=weights,
                         opset=args.opset, cache_dir=args.cache_dir, verify=not args.no_verify,
                         out=args.out, force=args.force, num_classes=args.num_classes)
    if args.json:
        print(json.dumps(record.to_dict(), indent=2, default=str))
    else:
        _print(record)
    return 0 if record.ok else 1


def _raw_head(args, weights) -> int:
    import json

    from speedbench.errors import UserError
    from speedbench.export.raw_head import export_raw_head

    if not args.out:
        raise UserError("--raw-head: give -o OUT.onnx (the raw graph is not cached)")
    if args.proposals is not None:
        raise UserError("--raw-head: --proposals does not apply (top-k runs on the host; see the adapter's nms table)")
    result = export_raw_head(args.model, args.out, weights=weights, size=args.size, opset=args.opset)
    if args.json:
        print(json.dumps(result, indent=2))
    else:
        print(f"{args.model} raw head outputs, weights={weights}: {result['graph']}\n"
              f"  ONNX Runtime vs torch: max abs difference {result['max_abs_diff']:.3g}\n"
              f"  adapter: {result['adapter']}")
    return 0


def _print(record) -> None:
    facts, par = record.facts, record.parity
    print(f"{record.model_id} size={record.size} proposals={record.proposals} weights={record.weights} "
          f"opset={record.opset}")
    if facts:
        stages = ", ".join(f"{k} {v:.3f}" for k, v in facts.get("gmacs_per_stage", {}).items())
        print(f"  params {facts['params']:,}   GMACs {facts['gmacs']:.3f} ({stages})   "
              f"ONNX {facts.get('onnx_mib', 0):.1f} MiB")
    if par:
        print(f"  parity vs torch eager ({par.get('graph', '')}): matched {par.get('matched')} detections, "
              f"box diff {par.get('box_max_abs_diff_px', 0):.3g} px, score diff {par.get('score_max_abs_diff', 0):.3g}"
              f" (tolerances {par.get('tolerances', {})})")
    for note in record.notes:
        print(f"  note: {note}")
    if record.ok:
        print(f"  ok: {record.path}")
    else:
        print(f"  NOT USABLE: {record.reason}")
