"""The compact demo zoo: small detectors assembled from torchvision's detection classes.

They are sized for the synthetic yard scenes (speedbench.data.scenes, 320 px, objects
10..150 px) and trained from scratch by speedbench.demo.train; the trained weights live in
speedbench/zoo/weights/ with a manifest. The architectures are ordinary torchvision SSD,
FCOS and FasterRCNN objects, so the zoo's generic knobs (input size through the transform,
proposal count through the RPN) apply to them unchanged.

All FPN models share one backbone layout (MobileNetV3-Large features, reduced tail, the
same layout SSDlite uses) so that they can start from the backbone demo_ssdlite learned.
"""
from __future__ import annotations

from functools import partial

from speedbench.zoo.spec import DENSE_SCOPES, RCNN_SCOPES, SSD_SCOPES, ModelSpec

SCENE_LABELS = ("__background__", "crate", "drum", "pylon")  # = speedbench.data.scenes.SCENE_CLASSES
NUM_CLASSES = len(SCENE_LABELS)
NATIVE = 320

# mobilenet_v3_large(reduced_tail=True).features: index -> channels at strides 8, 16, 32.
_RETURN = {"6": 40, "12": 112, "16": 480}


def _check(weights, weights_backbone):
    # Demo weights come from speedbench/zoo/weights via the zoo's loader, never from here.
    if weights is not None or weights_backbone is not None:
        raise ValueError("compact demo builders take weights=None, weights_backbone=None; "
                         "trained weights are loaded from the demo manifest")


def _features(frozen_bn: bool):
    from torch import nn
    from torchvision.models import mobilenet_v3_large
    from torchvision.ops import FrozenBatchNorm2d

    # Same norm settings as torchvision's SSDlite so its trained backbone transfers 1:1;
    # the FPN models start from that backbone and keep its statistics frozen.
    norm = partial(FrozenBatchNorm2d, eps=0.001) if frozen_bn else partial(nn.BatchNorm2d, eps=0.001, momentum=0.03)
    return mobilenet_v3_large(weights=None, reduced_tail=True, norm_layer=norm).features


def _fpn_backbone(levels, out_channels):
    from torchvision.models.detection.backbone_utils import BackboneWithFPN
    from torchvision.ops.feature_pyramid_network import LastLevelMaxPool

    ret = {k: str(i) for i, k in enumerate(levels)}
    return BackboneWithFPN(_features(frozen_bn=True), ret, [_RETURN[k] for k in levels],
                           out_channels, extra_blocks=LastLevelMaxPool())


def demo_ssdlite(*, weights=None, weights_backbone=None, num_classes: int = NUM_CLASSES, **kwargs):
    """torchvision SSDlite320 (MobileNetV3-Large, reduced tail), our class count."""
    from torchvision.models.detection import ssdlite320_mobilenet_v3_large

    _check(weights, weights_backbone)
    model = ssdlite320_mobilenet_v3_large(weights=None, weights_backbone=None, num_classes=num_classes)
    for k, v in kwargs.items():  # e.g. score_thresh, detections_per_img
        setattr(model, k, v)
    return model


def demo_fcos(*, weights=None, weights_backbone=None, num_classes: int = NUM_CLASSES, **kwargs):
    """FCOS on a 64-channel FPN over MobileNetV3-Large strides 8/16/32 (+ pooled 64)."""
    from torchvision.models.detection import FCOS
    from torchvision.models.detection.anchor_utils import AnchorGenerator
    from torchvision.models.detection.fcos import FCOSHead

    _check(weights, weights_backbone)
    backbone = _fpn_backbone(["6", "12", "16"], 64)
    # FCOS reads one "anchor" per location whose size is the level's stride.
    anchors = AnchorGenerator(sizes=((8,), (16,), (32,), (64,)), aspect_ratios=((1.0,),) * 4)
    head = FCOSHead(64, 1, num_classes, num_convs=2)
    opts = dict(min_size=NATIVE, max_size=NATIVE, score_thresh=0.05, detections_per_img=100,
                topk_candidates=300)
    opts.update(kwargs)
    return FCOS(backbone, num_classes, anchor_generator=anchors, head=head, **opts)


def _frcnn(levels, anchor_sizes, roi_size, head_dim, num_classes, kwargs):
    from torchvision.models.detection import FasterRCNN
    from torchvision.models.detection.anchor_utils import AnchorGenerator
    from torchvision.models.detection.faster_rcnn import FastRCNNPredictor, TwoMLPHead
    from torchvision.ops import MultiScaleRoIAlign

    channels = 64
    backbone = _fpn_backbone(levels, channels)
    # Anchors sized to the scenes' objects (10..150 px); torchvision's defaults start at 32 px.
    anchors = AnchorGenerator(sizes=anchor_sizes, aspect_ratios=((0.5, 1.0, 2.0),) * len(anchor_sizes))
    pool = MultiScaleRoIAlign([str(i) for i in range(len(levels))], output_size=roi_size, sampling_ratio=2)
    opts = dict(
        min_size=NATIVE, max_size=NATIVE,
        rpn_pre_nms_top_n_train=1000, rpn_post_nms_top_n_train=300,
        rpn_pre_nms_top_n_test=600, rpn_post_nms_top_n_test=300,
        rpn_batch_size_per_image=128, box_batch_size_per_image=128,
        box_score_thresh=0.05, box_detections_per_img=100,
    )
    opts.update(kwargs)
    return FasterRCNN(
        backbone, num_classes=None, rpn_anchor_generator=anchors, box_roi_pool=pool,
        box_head=TwoMLPHead(channels * roi_size * roi_size, head_dim),
        box_predictor=FastRCNNPredictor(head_dim, num_classes), **opts)


def demo_frcnn(*, weights=None, weights_backbone=None, num_classes: int = NUM_CLASSES, **kwargs):
    """Faster R-CNN, 64-channel FPN on strides 8..64, 7x7 RoIAlign, 256-wide box head."""
    _check(weights, weights_backbone)
    sizes = ((12, 20), (28, 40), (56, 80), (112, 160))
    return _frcnn(["6", "12", "16"], sizes, 7, 256, num_classes, kwargs)


def demo_frcnn_lite(*, weights=None, weights_backbone=None, num_classes: int = NUM_CLASSES, **kwargs):
    """Lighter Faster R-CNN: FPN on strides 16..64 only, 5x5 RoIAlign, 128-wide box head."""
    _check(weights, weights_backbone)
    sizes = ((12, 24), (40, 72), (110, 160))
    return _frcnn(["12", "16"], sizes, 5, 128, num_classes, kwargs)


# Stage scopes: the registry's tables for the same torchvision classes (box decoding and NMS run
# in methods, so their nodes carry the caller's scope: "" or roi_heads).
_COMMON = dict(native_size=NATIVE, num_classes=NUM_CLASSES, classes=SCENE_LABELS, default_weights="demo")

SPECS = (
    # One-stage "proposals" = candidates kept before NMS (topk_candidates), as for torchvision's.
    ModelSpec(id="demo_ssdlite", builder="speedbench.zoo.compact.demo_ssdlite", family="one-stage",
              detections_per_img=300, score_thresh=0.001, default_proposals=300, stage_scopes=SSD_SCOPES,
              arch="SSD", **_COMMON,
              notes="SSDlite320 MobileNetV3-Large trained from scratch on the synthetic yard scenes"),
    ModelSpec(id="demo_fcos", builder="speedbench.zoo.compact.demo_fcos", family="one-stage",
              detections_per_img=100, score_thresh=0.05, default_proposals=300, stage_scopes=DENSE_SCOPES,
              arch="FCOS", **_COMMON,
              notes="FCOS, 64-channel FPN on strides 8-64; backbone started from demo_ssdlite's"),
    ModelSpec(id="demo_frcnn", builder="speedbench.zoo.compact.demo_frcnn", family="two-stage",
              detections_per_img=100, score_thresh=0.05, default_proposals=300, stage_scopes=RCNN_SCOPES,
              arch="FasterRCNN", **_COMMON,
              notes="Faster R-CNN, FPN strides 8-64, small box head; backbone started from demo_ssdlite's"),
    ModelSpec(id="demo_frcnn_lite", builder="speedbench.zoo.compact.demo_frcnn_lite", family="two-stage",
              detections_per_img=100, score_thresh=0.05, default_proposals=300, stage_scopes=RCNN_SCOPES,
              arch="FasterRCNN", **_COMMON,
              notes="Faster R-CNN without the stride-8 level, 5x5 RoIs, 128-wide head; "
                    "backbone started from demo_ssdlite's"),
)

BUILDERS = {"demo_ssdlite": demo_ssdlite, "demo_fcos": demo_fcos,
            "demo_frcnn": demo_frcnn, "demo_frcnn_lite": demo_frcnn_lite}
