"""Building a detector from the registry with its weights and the sweep's knobs applied."""
from __future__ import annotations

import importlib

from speedbench.errors import UserError
from speedbench.zoo.registry import get_spec
from speedbench.zoo.spec import ModelSpec
from speedbench.zoo.weights import (load_demo, load_torchvision_cached, parse_weights,
                                    patched_torchvision_loader, safe_load, state_dict_from, torchvision_weights)

MAX_SIZE = 4096          # px; larger inputs are a typo, not a configuration
MAX_PROPOSALS = 100_000
CALIBRATION_SIZE = 320   # px; fixed so untrained weights do not depend on the swept size
def _builder(spec: ModelSpec):
    module, _, name = spec.builder.rpartition(".")
    return getattr(importlib.import_module(module), name)


def _whole(value, flag: str) -> int:
    """An int from an int, an integral float or a digit string; else a UserError naming the flag."""
    import operator

    try:
        if isinstance(value, str):
            return int(value.strip())
        if isinstance(value, float) and value.is_integer():
            return int(value)
        return operator.index(value)
    except (TypeError, ValueError):
        raise UserError(f"{flag} must be a whole number, not {value!r}") from None


def check_size(spec: ModelSpec, size) -> int:
    value = _whole(size, "--size")
    if value < spec.min_size or value > MAX_SIZE:
        raise UserError(f"--size {value} is out of range for {spec.id}: use {spec.min_size}..{MAX_SIZE} px")
    return value


def check_proposals(spec: ModelSpec, proposals) -> int:
    value = _whole(proposals, "--proposals")
    if not spec.default_proposals:
        raise UserError(f"--proposals: model {spec.id} has no proposal/candidate knob")
    if value <= 0 or value > MAX_PROPOSALS:
        raise UserError(f"--proposals {value} is out of range: use 1..{MAX_PROPOSALS}")
    return value


def build_model(model_id: str, weights="none", size=None, proposals=None, num_classes=None,
                device: str = "cpu"):
    """The detector in eval mode, weights loaded, input size and proposal budget applied.

    device="meta" builds the structure only (no memory, no init cost): for parameter
    counts and shapes. Untrained weights on the meta device skip the calibration pass.
    """
    import torch

    spec = get_spec(model_id)
    kind, path = parse_weights(weights)
    size = None if size is None else check_size(spec, size)
    proposals = None if proposals is None else check_proposals(spec, proposals)
    builder = _builder(spec)
    with torch.device(device):
        if kind == "torchvision":
            model = _build_torchvision(spec, builder, num_classes)
        elif kind == "demo":
            sd, entry = load_demo(model_id)
            model = builder(weights=None, weights_backbone=None, num_classes=int(entry["num_classes"]))
            _load_strict(model, sd, f"demo weights of {model_id}")
        elif kind == "file":
            sd = state_dict_from(safe_load(path), path)
            n = int(num_classes) if num_classes else infer_num_classes(spec, sd, path)
            model = builder(weights=None, weights_backbone=None, num_classes=n)
            _freeze_bn_like_checkpoint(model, sd)
            _load_strict(model, sd, path)
        else:
            model = _build_untrained(spec, builder, num_classes, calibrate=device != "meta")
    model.eval()
    configure(model, size, proposals)
    return model


def _build_torchvision(spec, builder, num_classes):
    enum = torchvision_weights(spec.id)
    n = len(enum.meta["categories"])
    if num_classes not in (None, n):
        raise UserError(f"--num-classes {num_classes}: torchvision weights of {spec.id} have {n} classes")
    # The real builder, so the architecture is exactly the shipped one (FrozenBatchNorm,
    # eps overrides); only the file comes from the local cache, read with weights_only=True.
    with patched_torchvision_loader(lambda url: load_torchvision_cached(url, spec.id)):
        return builder(weights=enum, weights_backbone=None)


def _build_untrained(spec, builder, num_classes, calibrate):
    """Seeded random init in the architecture the trained weights use.

    torchvision builds a different module tree without weights (BatchNorm2d instead of
    FrozenBatchNorm2d in the backbone): building through the weights path with the plain
    build's random state dict gives the shipped architecture (and its parameter count).
    """
    import torch

    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(0)
        n = spec.num_classes if num_classes is None else int(num_classes)
        plain = builder(weights=None, weights_backbone=None, num_classes=n)
        if spec.weights_enum and n == spec.num_classes:
            enum = torchvision_weights(spec.id)
            with patched_torchvision_loader(lambda url: plain.state_dict()):
                model = builder(weights=enum, weights_backbone=None)
        else:
            model = plain
        model.eval()
        if calibrate:
            calibrate_norms(model)
    return model


def calibrate_norms(model) -> None:
    """Set every batch norm's statistics from its own input on one generated image.

    Why: in eval mode a random-init batch norm divides by running_var = 1, so activations
    shrink layer after layer; MobileNetV3's depthwise stacks reach exactly 0 and every score
    ties, which makes parity checks meaningless. One pass with pre-hooks normalises each
    layer to zero mean / unit variance per channel, in order, as data-dependent inits do.
    """
    import torch
    from torch import nn
    from torchvision.ops import FrozenBatchNorm2d

    from speedbench.zoo.patterns import pattern_image

    def hook(module, args):
        x = args[0].detach()
        dims = [d for d in range(x.dim()) if d != 1]
        module.running_mean.copy_(x.mean(dims))
        module.running_var.copy_(x.var(dims, unbiased=False).clamp_min(1e-4))

    norms = [m for m in model.modules() if isinstance(m, (nn.BatchNorm2d, FrozenBatchNorm2d))]
    if not norms:
        return
    handles = [m.register_forward_pre_hook(hook) for m in norms]
    image = torch.from_numpy(pattern_image(CALIBRATION_SIZE, CALIBRATION_SIZE, seed=0)).permute(2, 0, 1) / 255.0
    try:
        configure(model, CALIBRATION_SIZE, None)
        with torch.no_grad():
            model([image.float()])
    finally:
        for h in handles:
            h.remove()
        configure(model, None, None)


def infer_num_classes(spec: ModelSpec, sd: dict, path) -> int:
    """Number of classes the checkpoint was trained for, read off its class-dependent tensors.

    Two meta-device builds (C and C+1 classes) show which tensors depend on the class count
    and how (first dimension = a * C + b); the checkpoint's shape then gives C.
    """
    import torch

    builder = _builder(spec)
    c0 = spec.num_classes
    with torch.device("meta"):
        s0 = builder(weights=None, weights_backbone=None, num_classes=c0).state_dict()
        s1 = builder(weights=None, weights_backbone=None, num_classes=c0 + 1).state_dict()
    for key, t0 in s0.items():
        if t0.dim() and s1[key].shape[0] != t0.shape[0] and key in sd and sd[key].dim():
            a = s1[key].shape[0] - t0.shape[0]
            b = t0.shape[0] - a * c0
            n, rem = divmod(sd[key].shape[0] - b, a)
            if rem or n < 1:
                raise UserError(f"{path}: {key} has shape {tuple(sd[key].shape)}, which fits no class "
                                f"count for {spec.id}")
            return n
    raise UserError(f"{path}: cannot tell the number of classes (no classifier tensors for {spec.id}); "
                    f"pass --num-classes")


def _set_module(model, name, new):
    parent, _, attr = name.rpartition(".")
    setattr(model.get_submodule(parent) if parent else model, attr, new)


def _freeze_bn_like_checkpoint(model, sd) -> None:
    """Batch norms saved without num_batches_tracked came from FrozenBatchNorm2d: use that.

    torchvision's builders freeze the backbone's batch norms whenever they start from
    pretrained weights, so fine-tuned checkpoints usually carry frozen ones. eps is the
    FrozenBatchNorm2d default (1e-5), as in those builders.
    """
    from torch import nn
    from torchvision.ops import FrozenBatchNorm2d

    for name, module in list(model.named_modules()):
        if (isinstance(module, nn.BatchNorm2d) and f"{name}.running_mean" in sd
                and f"{name}.num_batches_tracked" not in sd):
            _set_module(model, name, FrozenBatchNorm2d(module.num_features))


def _load_strict(model, sd: dict, source) -> None:
    own = model.state_dict()
    missing = [k for k in own if k not in sd and not k.endswith("num_batches_tracked")]
    unexpected = [k for k in sd if k not in own]
    shapes = [f"{k} {tuple(sd[k].shape)} vs {tuple(own[k].shape)}"
              for k in sd if k in own and tuple(sd[k].shape) != tuple(own[k].shape)]
    if missing or unexpected or shapes:
        parts = []
        if shapes:
            parts.append(f"shape mismatches (checkpoint vs model): {'; '.join(shapes[:3])}")
        if missing:
            parts.append(f"{len(missing)} missing keys, first: {', '.join(missing[:3])}")
        if unexpected:
            parts.append(f"{len(unexpected)} unexpected keys, first: {', '.join(unexpected[:3])}")
        raise UserError(f"{source}: does not fit the architecture: {' | '.join(parts)}")
    model.load_state_dict({k: v for k, v in sd.items()}, strict=False)


def _native(model) -> dict:
    if not hasattr(model, "_speedbench_native"):
        t = model.transform
        nat = {"min_size": t.min_size, "max_size": t.max_size, "fixed_size": t.fixed_size}
        if hasattr(model, "rpn"):
            nat["pre"] = dict(model.rpn._pre_nms_top_n)
            nat["post"] = dict(model.rpn._post_nms_top_n)
        if hasattr(model, "topk_candidates"):
            nat["topk"] = model.topk_candidates
        model._speedbench_native = nat
    return model._speedbench_native


def configure(model, size=None, proposals=None, score_thresh=None):
    """Apply the sweep's input size and proposal budget to a built torchvision detector.

    None leaves a knob at the builder's native value (restoring it if it was changed).
    size: GeneralizedRCNNTransform resizes the shorter side to `size` and caps the longer at
    size x native max/min (the builder's aspect cap); SSD-style fixed_size becomes size x size.
    proposals: two-stage -> RPN test-time pre/post-NMS top-n (pre/post ratio kept);
    RetinaNet / FCOS -> per-level topk_candidates; SSD -> per-class topk_candidates.
    """
    if size is not None and (int(size) <= 0 or int(size) > MAX_SIZE):
        raise UserError(f"--size {size} is out of range: use 1..{MAX_SIZE} px")
    if proposals is not None and (int(proposals) <= 0 or int(proposals) > MAX_PROPOSALS):
        raise UserError(f"--proposals {proposals} is out of range: use 1..{MAX_PROPOSALS}")
    nat = _native(model)
    t = model.transform
    if nat["fixed_size"]:
        t.fixed_size = (int(size), int(size)) if size else nat["fixed_size"]
    elif size:
        t.min_size = (int(size),)
        t.max_size = int(round(int(size) * nat["max_size"] / nat["min_size"][-1]))
    else:
        t.min_size, t.max_size = nat["min_size"], nat["max_size"]
    if "pre" in nat:
        k = int(proposals) if proposals else None
        ratio = nat["pre"]["testing"] / nat["post"]["testing"]
        model.rpn._post_nms_top_n["testing"] = k or nat["post"]["testing"]
        model.rpn._pre_nms_top_n["testing"] = int(round(k * ratio)) if k else nat["pre"]["testing"]
    elif "topk" in nat:
        model.topk_candidates = int(proposals) if proposals else nat["topk"]
    elif proposals:
        raise UserError(f"--proposals: {type(model).__name__} has no proposal/candidate knob")
    if score_thresh is not None:
        target = model.roi_heads if hasattr(model, "roi_heads") else model
        target.score_thresh = float(score_thresh)
    return model


def knob_values(model) -> dict:
    """The knob values a model currently runs with (for records and tests)."""
    t = model.transform
    out = {"min_size": t.min_size[-1], "max_size": t.max_size, "fixed_size": t.fixed_size}
    if hasattr(model, "rpn"):
        out["rpn_pre_nms_top_n"] = model.rpn._pre_nms_top_n["testing"]
        out["rpn_post_nms_top_n"] = model.rpn._post_nms_top_n["testing"]
        out["score_thresh"] = model.roi_heads.score_thresh
        out["detections_per_img"] = model.roi_heads.detections_per_img
    else:
        out["topk_candidates"] = getattr(model, "topk_candidates", None)
        out["score_thresh"] = model.score_thresh
        out["detections_per_img"] = model.detections_per_img
    return out
