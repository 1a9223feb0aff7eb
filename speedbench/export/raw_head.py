"""A zoo detector exported WITHOUT its in-graph pre/postprocessing: raw dense head outputs.

This is the kind of graph many training codebases ship, and the worked example of an external
graph: `speedbench export demo_ssdlite --raw-head -o demo_ssdlite_raw.onnx` writes the graph and,
next to it, the adapter that describes it (demo_ssdlite_raw.adapter.toml).

The graph takes a normalised, already resized float32 [1, 3, S, S] tensor (S fixed) and returns
`predictions` [1, A, 4 + C]: per default box, the decoded box (centre x, centre y, width,
height in input pixels, not clipped) then the C class logits (background first). Resizing,
normalisation, softmax, score threshold, per-class top-k, NMS and mapping boxes back to the
image are left to the host - the adapter's job - so host decoding can be checked against the
native graph of the same weights, which does all of that inside.
"""
from __future__ import annotations

import warnings
from pathlib import Path

from speedbench.errors import UserError
from speedbench.export.onnx_export import DEFAULT_OPSET, ort_session
from speedbench.zoo import build_model, get_spec

OUTPUT = "predictions"
INPUT = "input"


def _raw_module(model, size: int):
    import torch
    from torchvision.models.detection.image_list import ImageList
    from torchvision.ops import box_convert

    class RawSSD(torch.nn.Module):
        # Same submodule names as the detector, so node names carry /backbone/..., /head/...
        def __init__(self):
            super().__init__()
            self.backbone, self.head = model.backbone, model.head
            self.anchor_generator, self.box_coder = model.anchor_generator, model.box_coder

        def forward(self, x):
            features = list(self.backbone(x).values())
            out = self.head(features)
            anchors = self.anchor_generator(ImageList(x, [(size, size)]), features)[0]
            boxes = self.box_coder.decode_single(out["bbox_regression"][0], anchors)
            return torch.cat([box_convert(boxes, "xyxy", "cxcywh"), out["cls_logits"][0]], 1)[None]

    return RawSSD().eval()


def adapter_text(model, size: int, model_id: str) -> str:
    """The adapter TOML describing the raw graph, read off the model's own transform and postprocess."""
    t = model.transform
    mean, std = [float(v) for v in t.image_mean], [float(v) for v in t.image_std]
    return f"""# Adapter of {model_id} exported with --raw-head (written by speedbench export).
# The graph wants the image stretched to {size} x {size}, scaled to [0, 1] and normalised; it returns one
# [1, A, 4 + C] tensor: decoded boxes (cx, cy, w, h in input pixels) and raw class logits, background first.
# The host does what the native graph does inside: softmax, drop background, score threshold, top-k per
# class, per-class NMS, keep the best detections, boxes back to image pixels.

[input]
name = "{INPUT}"
layout = "NCHW"
dtype = "float32"
size = {size}
resize = "stretch"
scale = 0.00392156862745098   # 1 / 255
mean = {mean}
std = {std}
channels = "RGB"

[output]
kind = "dense"
predictions = "{OUTPUT}"
box_format = "cxcywh"
box_units = "pixels"
score_activation = "softmax"
background = 0

[nms]
iou = {float(model.nms_thresh)}
score_threshold = {float(model.score_thresh)}
detections = {int(model.detections_per_img)}
candidates = {int(model.topk_candidates)}
candidates_per = "class"

[stages]
backbone = ["/backbone/"]
head = ["/head/"]
# the box decoding at the top level ("/Add", "/Exp", ...) is postprocess, as in the native graph
postprocess = ["/anchor_generator/", "/"]
"""


def export_raw_head(model_id: str, out, weights: str = "demo", size: int | None = None,
                    opset: int = DEFAULT_OPSET) -> dict:
    """Export the raw-head graph and its adapter; returns {"graph", "adapter", "max_abs_diff"}."""
    import numpy as np
    import onnx
    import torch

    from speedbench.zoo import pattern_image

    spec = get_spec(model_id)
    if spec.arch != "SSD":
        raise UserError(f"--raw-head: only SSD-style models have a raw-head export so far, not {model_id} "
                        f"({spec.arch or 'unknown architecture'})")
    size = int(size or spec.native_size)
    model = build_model(model_id, weights=weights, size=size).eval()
    raw = _raw_module(model, size)
    img = pattern_image(size, size, seed=5).astype(np.float32) / 255.0
    mean = np.asarray(model.transform.image_mean, np.float32)
    std = np.asarray(model.transform.image_std, np.float32)
    x = torch.from_numpy(((img - mean) / std).transpose(2, 0, 1)[None].copy())
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    with torch.no_grad(), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        torch.onnx.export(raw, (x,), str(out), input_names=[INPUT], output_names=[OUTPUT],
                          opset_version=opset, dynamo=False)
        expected = raw(x).numpy()
    onnx.checker.check_model(str(out))
    got = ort_session(out).run([OUTPUT], {INPUT: x.numpy()})[0]
    diff = float(np.abs(got - expected).max())
    if not np.allclose(got, expected, atol=1e-3, rtol=1e-4):
        raise UserError(f"{out}: ONNX Runtime's raw outputs differ from torch by {diff:.3g}")
    adapter = out.with_suffix(".adapter.toml")
    adapter.write_text(adapter_text(model, size, model_id))
    return {"graph": str(out), "adapter": str(adapter), "max_abs_diff": diff}
