"""What the zoo knows about one detector architecture."""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping


@dataclass(frozen=True)
class ModelSpec:
    id: str
    # Dotted path of the function that builds the architecture. It accepts the
    # torchvision builder keywords (weights=None, weights_backbone=None, num_classes=...).
    builder: str
    family: str                      # "one-stage" or "two-stage" (speedbench.schema.FAMILIES)
    native_size: int                 # input size the architecture was designed for (px)
    detections_per_img: int
    score_thresh: float
    # Proposal / candidate budget at its default; 0 means the model has no such knob.
    default_proposals: int
    # torchvision detector class name ("FasterRCNN", "MaskRCNN", "RetinaNet", "FCOS", "SSD"):
    # how configure() maps the knobs and how `speedbench models` describes them.
    arch: str
    # stage name (speedbench.schema.STAGES) -> module path prefixes inside the model,
    # e.g. {"preprocess": ("transform",), "backbone": ("backbone.body",), ...}
    stage_scopes: Mapping[str, tuple[str, ...]] = field(default_factory=dict)
    num_classes: int = 91            # including background where the architecture has one
    classes: tuple[str, ...] = ()    # names by label index; () = torchvision's COCO labels
    weights_enum: str | None = None  # torchvision weights enum name, if torchvision ships weights
    default_weights: str = "none"    # "none", "torchvision", "demo" or "file:PATH"
    notes: str = ""
    # Smallest input size (px) the architecture runs at; export refuses smaller ones.
    min_size: int = 32


# Stage scope tables by module layout; reuse them for a new model with the same layout.

FPN_SCOPES = {"preprocess": ("transform",), "backbone": ("backbone.body",), "neck": ("backbone.fpn",)}
RCNN_SCOPES = {**FPN_SCOPES, "proposals": ("rpn",),
               "roi_heads": ("roi_heads.box_roi_pool", "roi_heads.box_head", "roi_heads.box_predictor"),
               "postprocess": ("roi_heads", "")}
MASK_SCOPES = {**RCNN_SCOPES, "roi_heads": RCNN_SCOPES["roi_heads"] + (
    "roi_heads.mask_roi_pool", "roi_heads.mask_head", "roi_heads.mask_predictor")}
DENSE_SCOPES = {**FPN_SCOPES, "head": ("head",), "postprocess": ("anchor_generator", "")}
# SSD: the base network's layers are the backbone, the extra layers play the neck's part.
SSD_SCOPES = {"preprocess": ("transform",), "backbone": ("backbone", "backbone.features"),
              "neck": ("backbone.extra",), "head": ("head",), "postprocess": ("anchor_generator", "")}
