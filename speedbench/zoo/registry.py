"""The registry of detector architectures: torchvision's builders plus anything registered later.

Stage scopes are module paths inside the torchvision model. They survive into the
ONNX node names of the TorchScript exporter (``/backbone/body/layer1/...``), so the
same table attributes both FLOP counts (by module) and profiled node times (by name)
to the stages of speedbench.schema.STAGES.

How postprocess is told apart from the stage around it: torchvision runs box decoding
and NMS in *methods* (``postprocess_detections``, ``transform.postprocess``), not in
submodules. A method call opens no new module scope, so its nodes carry the scope of
the module that called it:
- one-stage models: the model itself, i.e. the top level (scope "") -> postprocess;
- two-stage models: ``roi_heads`` directly (its submodules box_roi_pool / box_head /
  box_predictor are the ROI head proper) -> postprocess; plus the top level, where
  ``transform.postprocess`` maps boxes back to the input image.
The RPN's own decoding and NMS stay in "proposals": they are what the proposal knob buys.
"""
from __future__ import annotations

import difflib

from speedbench.errors import UserError
from speedbench.schema import STAGES
from speedbench.zoo import compact
from speedbench.zoo.spec import DENSE_SCOPES, MASK_SCOPES, RCNN_SCOPES, SSD_SCOPES, ModelSpec

_REGISTRY: dict[str, ModelSpec] = {}

def _tv(id, weights, family, native, dets, thresh, props, scopes, arch, notes="", min_size=32):
    return ModelSpec(id=id, builder=f"torchvision.models.detection.{id}", family=family,
                     native_size=native, detections_per_img=dets, score_thresh=thresh,
                     default_proposals=props, stage_scopes=scopes, num_classes=91,
                     weights_enum=f"{weights}.COCO_V1", arch=arch, notes=notes, min_size=min_size)


# Values are torchvision 0.29's builder defaults; tests/test_zoo.py checks them against
# the built models so a torchvision upgrade that changes them is caught.
TORCHVISION_SPECS = (
    _tv("fasterrcnn_resnet50_fpn", "FasterRCNN_ResNet50_FPN_Weights", "two-stage", 800, 100, 0.05, 1000,
        RCNN_SCOPES, "FasterRCNN"),
    _tv("fasterrcnn_resnet50_fpn_v2", "FasterRCNN_ResNet50_FPN_V2_Weights", "two-stage", 800, 100, 0.05, 1000,
        RCNN_SCOPES, "FasterRCNN"),
    _tv("fasterrcnn_mobilenet_v3_large_fpn", "FasterRCNN_MobileNet_V3_Large_FPN_Weights", "two-stage", 800,
        100, 0.05, 1000, RCNN_SCOPES, "FasterRCNN"),
    _tv("fasterrcnn_mobilenet_v3_large_320_fpn", "FasterRCNN_MobileNet_V3_Large_320_FPN_Weights", "two-stage",
        320, 100, 0.05, 150, RCNN_SCOPES, "FasterRCNN"),
    _tv("maskrcnn_resnet50_fpn", "MaskRCNN_ResNet50_FPN_Weights", "two-stage", 800, 100, 0.05, 1000,
        MASK_SCOPES, "MaskRCNN", notes="extra output: masks [N, 1, H, W] in input-image pixels"),
    _tv("retinanet_resnet50_fpn", "RetinaNet_ResNet50_FPN_Weights", "one-stage", 800, 300, 0.05, 1000,
        DENSE_SCOPES, "RetinaNet"),
    _tv("retinanet_resnet50_fpn_v2", "RetinaNet_ResNet50_FPN_V2_Weights", "one-stage", 800, 300, 0.05, 1000,
        DENSE_SCOPES, "RetinaNet"),
    _tv("fcos_resnet50_fpn", "FCOS_ResNet50_FPN_Weights", "one-stage", 800, 100, 0.2, 1000, DENSE_SCOPES, "FCOS"),
    # Below 268 px the last unpadded 3x3 extra layers of SSD300 have nothing left to convolve.
    _tv("ssd300_vgg16", "SSD300_VGG16_Weights", "one-stage", 300, 200, 0.01, 400, SSD_SCOPES, "SSD", min_size=268),
    _tv("ssdlite320_mobilenet_v3_large", "SSDLite320_MobileNet_V3_Large_Weights", "one-stage", 320, 300,
        0.001, 300, SSD_SCOPES, "SSD"),
)

# How the sweep's knobs land on each torchvision class (shown by `speedbench models`).
# All of them resize through GeneralizedRCNNTransform; SSD builders give it a fixed size.
_RCNN_ARCHS = ("FasterRCNN", "MaskRCNN", "KeypointRCNN")
SIZE_KNOBS = {
    "min_max": "transform.min_size = size, transform.max_size = size x (native max/min): the shorter "
               "image side is resized to `size`, the longer one capped",
    "fixed": "transform.fixed_size = (size, size): the image is resized to a size x size square",
}
PROPOSAL_KNOBS = {
    "rpn": "RPN at test time keeps the top `proposals` anchors per FPN level before NMS and `proposals` "
           "boxes after NMS (rpn pre/post_nms_top_n_test; the builder's pre/post ratio is kept)",
    "per_level": "head keeps the top `proposals` scoring candidates per FPN level before NMS (topk_candidates)",
    "per_class": "keeps the top `proposals` scoring candidates per class before NMS (topk_candidates)",
}


def register(spec: ModelSpec) -> None:
    if spec.family not in ("one-stage", "two-stage"):
        raise ValueError(f"model {spec.id}: family must be one-stage or two-stage, not {spec.family!r}")
    bad = [s for s in spec.stage_scopes if s not in STAGES]
    if bad:
        raise ValueError(f"model {spec.id}: unknown stage names {bad}; expected {STAGES}")
    _REGISTRY[spec.id] = spec


for _spec in TORCHVISION_SPECS + compact.SPECS:
    register(_spec)


def list_specs() -> list[ModelSpec]:
    return list(_REGISTRY.values())


def get_spec(model_id: str) -> ModelSpec:
    spec = _REGISTRY.get(str(model_id))
    if spec is None:
        close = difflib.get_close_matches(str(model_id), list(_REGISTRY), n=3, cutoff=0.5)
        hint = f"; did you mean {', '.join(close)}?" if close else "; `speedbench models` lists them"
        raise UserError(f"unknown model id {model_id!r}{hint}")
    return spec


def describe_knobs(spec: ModelSpec) -> dict:
    arch = spec.arch
    size = SIZE_KNOBS["fixed" if arch == "SSD" else "min_max"]
    if not spec.default_proposals:
        props = "none (the model has no proposal / candidate knob)"
    elif arch in _RCNN_ARCHS:
        props = PROPOSAL_KNOBS["rpn"]
    else:
        props = PROPOSAL_KNOBS["per_class" if arch == "SSD" else "per_level"]
    return {"arch": arch, "size_knob": size, "proposal_knob": props}


def scope_to_path(scope: str) -> str:
    """ONNX node name or module path -> dotted module path ("" for the top level).

    The TorchScript exporter names nodes ``/backbone/body/layer1/layer1.0/conv1/Conv``:
    one component per module call, where a component repeats its parent's name for
    numbered children. Collapsing those repeats gives ``backbone.body.layer1.0.conv1``.
    """
    scope = str(scope)
    if not scope.startswith("/"):
        return scope.strip(".")
    parts = [p for p in scope.split("/")[1:-1] if p]   # last part is the op's own name
    path: list[str] = []
    for part in parts:
        if path and part.startswith(path[-1] + "."):
            path[-1] = part
        else:
            path.append(part)
    return ".".join(path)


def stage_of_scope(spec: ModelSpec, scope: str) -> str:
    """Stage of an ONNX node name (``/rpn/head/conv/Conv``) or module path (``rpn.head.conv``).

    The longest matching prefix in spec.stage_scopes wins; "" stands for nodes outside any
    submodule (the top-level forward). Names without a module scope that the exporter or
    ONNX Runtime made up (``Identity_12``, layout reorders) are "unattributed"; ONNX Runtime's
    fused nodes ("fused /roi_heads/box_head/fc6/Gemm") count for the scope they name.
    """
    scope = str(scope)
    if scope.startswith("fused "):
        scope = scope[len("fused "):]
    if not str(scope).startswith("/") and "." not in str(scope) and str(scope) not in _all_prefixes(spec):
        return "unattributed"
    path = scope_to_path(scope)
    best, best_len = "unattributed", -1
    scopes = dict(spec.stage_scopes)
    scopes.setdefault("preprocess", ("transform",))
    if not any("" in p for p in scopes.values()):
        scopes = {**scopes, "postprocess": tuple(scopes.get("postprocess", ())) + ("",)}
    for stage, prefixes in scopes.items():
        for prefix in prefixes:
            hit = prefix == "" or path == prefix or path.startswith(prefix + ".")
            if hit and len(prefix) > best_len:
                best, best_len = stage, len(prefix)
    if best_len == 0 and path != "":
        return "unattributed"   # a submodule no stage lists: say so rather than guess
    return best


def _all_prefixes(spec: ModelSpec) -> set[str]:
    return {p for prefixes in spec.stage_scopes.values() for p in prefixes} | {"transform"}
