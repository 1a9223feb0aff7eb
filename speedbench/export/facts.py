"""Model facts: parameter count and multiply-accumulates, in total and per stage.

MACs come from torch.utils.flop_counter.FlopCounterMode (FLOPs / 2). It counts the
matrix ops (convolutions, matmuls, linear layers) and credits each to the module call
stack it ran in; a module's count includes its submodules, so each module's own share
is its count minus that of its nearest counted descendants. Element-wise ops, RoIAlign,
interpolation and NMS are not counted: they are small in MACs but not in time, which is
why measured stage times are reported separately.
"""
from __future__ import annotations

from speedbench.zoo import get_spec, stage_of_scope


def count_macs(model, spec, image) -> dict:
    """Run `model([image])` under FlopCounterMode; GMACs total, per stage, and RoIs scored."""
    import torch
    from torch.utils.flop_counter import FlopCounterMode

    rois = []
    hook = None
    if hasattr(model, "roi_heads"):
        # Two-stage MACs depend on how many proposals reach the ROI head: record it.
        hook = model.roi_heads.register_forward_pre_hook(
            lambda m, args: rois.append(sum(len(p) for p in args[1])))
    counter = FlopCounterMode(display=False)
    try:
        with torch.no_grad(), counter:
            out = model([image])[0]
    finally:
        if hook is not None:
            hook.remove()
    inclusive = {name: sum(ops.values()) for name, ops in counter.get_flop_counts().items()}
    total = counter.get_total_flops()
    root = type(model).__name__
    paths = {}
    for name, flops in inclusive.items():
        if name == "Global":
            continue
        path = "" if name == root else name[len(root) + 1:] if name.startswith(root + ".") else None
        if path is not None:
            paths[path] = flops
    children: dict[str, float] = {}
    for path, flops in paths.items():
        parent = _parent(path, paths)
        if parent is not None:
            children[parent] = children.get(parent, 0) + flops
    per_stage: dict[str, float] = {}
    for path, flops in paths.items():
        own = flops - children.get(path, 0)
        if path == "":
            own += total - flops   # anything outside the model call (nothing, normally)
        stage = stage_of_scope(spec, path) if path else stage_of_scope(spec, "/Op")
        per_stage[stage] = per_stage.get(stage, 0.0) + own / 2e9
    if not paths:
        per_stage["unattributed"] = total / 2e9
    return {"gmacs": total / 2e9,
            "gmacs_per_stage": {k: round(v, 6) for k, v in per_stage.items() if v},
            "rois": rois[0] if rois else None,
            "detections": int(len(out["boxes"]))}


def _parent(path: str, paths) -> str | None:
    """Nearest ancestor of `path` that has a count ("" is the root)."""
    if path == "":
        return None
    parts = path.split(".")
    for i in range(len(parts) - 1, 0, -1):
        candidate = ".".join(parts[:i])
        if candidate in paths:
            return candidate
    return "" if "" in paths else None


def param_count(model) -> int:
    return int(sum(p.numel() for p in model.parameters()))


def facts_image(size: int):
    """The image MACs are counted on: a size x size structured pattern (so no resize aspect)."""
    import torch

    from speedbench.zoo import pattern_image

    return torch.from_numpy(pattern_image(size, size, seed=7)).permute(2, 0, 1).float() / 255.0


def model_facts(model_id, size=None, proposals=None, weights="none", image=None, onnx_path=None,
                model=None) -> dict:
    """params, gmacs, gmacs_per_stage (stage -> GMACs), rois, and onnx_mib when an export exists."""
    import os

    from speedbench.zoo import build_model

    spec = get_spec(model_id)
    size = int(size or spec.native_size)
    if model is None:
        model = build_model(model_id, weights=weights, size=size, proposals=proposals)
    facts = {"params": param_count(model)}
    facts.update(count_macs(model, spec, facts_image(size) if image is None else image))
    facts["macs_counter"] = "torch.utils.flop_counter.FlopCounterMode / 2"
    if onnx_path and os.path.exists(onnx_path):
        facts["onnx_mib"] = round(os.path.getsize(onnx_path) / 2**20, 3)
    return facts
