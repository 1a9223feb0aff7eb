"""`speedbench models [--json]`: the detectors the zoo knows and how the sweep's knobs map onto them."""
from __future__ import annotations


def add_parser(subparsers):
    p = subparsers.add_parser("models", help="list the detector zoo",
                              description="List the detectors speedbench can build, with their knobs.")
    p.add_argument("--json", action="store_true", help="print a JSON list of objects instead of a table")
    p.add_argument("--profile", metavar="P", help="also list the external ONNX graphs of this profile")
    p.set_defaults(run=run)
    return p


def model_rows() -> list[dict]:
    from speedbench.zoo import describe_knobs, list_specs

    rows = []
    for spec in list_specs():
        rows.append({
            "id": spec.id, "builder": spec.builder, "family": spec.family,
            "native_size": spec.native_size, "default_proposals": spec.default_proposals,
            "detections_per_img": spec.detections_per_img, "score_thresh": spec.score_thresh,
            "num_classes": spec.num_classes, "default_weights": spec.default_weights,
            "torchvision_weights": spec.weights_enum, **describe_knobs(spec),
            "stage_scopes": {k: list(v) for k, v in spec.stage_scopes.items()},
            "notes": spec.notes,
        })
    return rows


def external_rows(profile) -> list[dict]:
    """The external-graph entries of a profile, with how the sweep's knobs map onto them."""
    rows = []
    for entry in profile.models:
        if not entry.external:
            continue
        ad = entry.adapter
        size = (f"fixed {ad.input.size[0]}x{ad.input.size[1]}" if ad.fixed else
                "dynamic, taken as is" if ad.input.resize == "none" else f"dynamic, host {ad.input.resize}")
        rows.append({
            "id": entry.id, "onnx": entry.onnx, "family": entry.family, "native_size": ad.native_size,
            "default_proposals": ad.nms.candidates if ad.host_nms else 0, "default_weights": entry.weights,
            "arch": f"external ({ad.output.kind} outputs)", "classes": list(entry.classes),
            "size_knob": f"input {size}" + ("; other sizes skipped" if ad.fixed else ""),
            "proposal_knob": ("host pre-NMS top-k (nms.candidates)" if ad.host_nms
                              else "none: NMS inside the graph"),
            "adapter": ad.source, "stages": "adapter prefixes" if ad.stages else "op-type fallback",
        })
    return rows


def run(args) -> int:
    import json

    rows = model_rows()
    if args.profile:
        from speedbench.sweep.profile import load_profile

        rows += external_rows(load_profile(args.profile))
    if args.json:
        print(json.dumps(rows, indent=2))
        return 0
    head = f"{'id':40} {'family':10} {'native':>6} {'proposals':>9} {'weights':12} arch"
    print(head)
    print("-" * len(head))
    for r in rows:
        print(f"{r['id']:40} {r['family']:10} {r['native_size']:>6} {r['default_proposals']:>9} "
              f"{r['default_weights']:12} {r['arch']}")
    for r in rows:
        if "onnx" in r:
            print(f"  {r['id']}: {r['onnx']}, {r['size_knob']}; proposals: {r['proposal_knob']}; "
                  f"stages: {r['stages']}")
    print("\nsize knob and proposal knob per model: speedbench models --json")
    return 0
