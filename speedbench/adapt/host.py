"""Host-side pre- and postprocessing of an external graph, as its adapter describes it.

Preprocess: uint8 [H, W, 3] RGB image -> the graph's input tensor, plus the geometry that maps
the graph's box coordinates back to the image. Resizing is bilinear with half-pixel centres and
no antialiasing, the arithmetic of torch.nn.functional.interpolate(mode="bilinear",
align_corners=False) that torchvision's detection transform uses, so a stretched input matches
what a zoo graph computes inside itself.

Postprocess: the graph's outputs -> (boxes xyxy float32 [N, 4] in image pixels, scores [N],
labels int64 [N]): box format and units, score activation, background column, score threshold,
top-k candidates, per-class NMS (greedy, IoU strictly above the threshold suppresses; the rule
of torchvision.ops.batched_nms), detections cap. Plain numpy: nothing here imports torch.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from speedbench.adapt.spec import Adapter


@dataclass(frozen=True)
class Geometry:
    """Graph-input frame -> image frame: x_img = (x_net - pad_x) / scale_x."""
    net_w: int
    net_h: int
    img_w: int
    img_h: int
    scale_x: float = 1.0
    scale_y: float = 1.0
    pad_x: float = 0.0
    pad_y: float = 0.0


# ----------------------------------------------------------------- resizing
_TAPS: dict = {}


def _taps(n_in: int, n_out: int):
    """Source indices and weights of half-pixel bilinear sampling (torch's align_corners=False)."""
    key = (n_in, n_out)
    if key not in _TAPS:
        # float32 position arithmetic, as torch's CPU kernel does for float32 images
        scale = np.float32(n_in) / np.float32(n_out)
        src = np.maximum((np.arange(n_out, dtype=np.float32) + np.float32(0.5)) * scale - np.float32(0.5),
                         np.float32(0))
        i0 = np.minimum(np.floor(src).astype(np.int64), n_in - 1)
        i1 = np.minimum(i0 + 1, n_in - 1)
        w1 = (src - i0).astype(np.float32)
        _TAPS[key] = (i0, i1, w1[:, None, None], w1[None, :, None])
        if len(_TAPS) > 64:
            _TAPS.pop(next(iter(_TAPS)))
    return _TAPS[key]


def resize_bilinear(image: np.ndarray, out_h: int, out_w: int) -> np.ndarray:
    """[h, w, c] -> float32 [out_h, out_w, c], separable bilinear (rows, then columns); same size: as is."""
    h, w = image.shape[:2]
    if (h, w) == (out_h, out_w):
        return image                          # nothing to resample; the caller converts the dtype
    img = image.astype(np.float32, copy=False)
    y0, y1, wy, _ = _taps(h, out_h)
    rows = img[y0] * (1 - wy) + img[y1] * wy
    x0, x1, _, wx = _taps(w, out_w)
    return rows[:, x0] * (1 - wx) + rows[:, x1] * wx


def target_shape(adapter: Adapter, size: int) -> tuple[int, int] | None:
    """(h, w) of the graph's input for a point at `size`; None = the image's own size."""
    if adapter.fixed:
        return adapter.input.size
    if adapter.input.resize == "none":
        return None
    s = int(size) or adapter.input.native_size
    return s, s


def preprocess(adapter: Adapter, image: np.ndarray, shape) -> tuple[np.ndarray, Geometry]:
    """uint8 [H, W, 3] RGB -> (graph input tensor, geometry)."""
    spec = adapter.input
    ih, iw = image.shape[:2]
    if spec.channels == "BGR":
        image = image[:, :, ::-1]
    if shape is None:
        img = image
        geo = Geometry(iw, ih, iw, ih)
    elif spec.resize == "letterbox":
        th, tw = shape
        r = min(th / ih, tw / iw)
        nh, nw = max(1, int(round(ih * r))), max(1, int(round(iw * r)))
        top, left = (th - nh) // 2, (tw - nw) // 2
        img = np.full((th, tw, 3), float(spec.pad_value), np.float32)
        img[top:top + nh, left:left + nw] = resize_bilinear(image, nh, nw)
        geo = Geometry(tw, th, iw, ih, nw / iw, nh / ih, float(left), float(top))
    else:
        th, tw = shape
        img = resize_bilinear(image, th, tw)
        geo = Geometry(tw, th, iw, ih, tw / iw, th / ih)
    if spec.layout != "NHWC":
        img = img.transpose(2, 0, 1)          # a view; the arithmetic below writes it contiguous
    if spec.dtype == "uint8":
        x = np.clip(np.rint(img), 0, 255).astype(np.uint8) if img.dtype != np.uint8 else img
    else:
        # ((x * scale) - mean) / std as one multiply-add per channel
        shape = (3, 1, 1) if spec.layout != "NHWC" else (1, 1, 3)
        a = (np.float32(spec.scale) / np.asarray(spec.std, np.float32)).reshape(shape)
        x = np.multiply(img, a, out=np.empty(img.shape, np.float32))   # C order: the layout the graph wants
        if spec.mean != (0.0, 0.0, 0.0):
            x -= (np.asarray(spec.mean, np.float32) / np.asarray(spec.std, np.float32)).reshape(shape)
    if spec.layout != "CHW":
        x = x[None]
    return np.ascontiguousarray(x), geo


# ----------------------------------------------------------------- decoding
def to_xyxy(boxes: np.ndarray, fmt: str) -> np.ndarray:
    """[N, 4] in xyxy / xywh / cxcywh -> xyxy (torchvision.ops.box_convert's definitions)."""
    if fmt == "xyxy":
        return boxes
    a, b, c, d = boxes[:, 0], boxes[:, 1], boxes[:, 2], boxes[:, 3]
    if fmt == "xywh":
        return np.stack([a, b, a + c, b + d], axis=1)
    return np.stack([a - 0.5 * c, b - 0.5 * d, a + 0.5 * c, b + 0.5 * d], axis=1)


def activate(scores: np.ndarray, how: str) -> np.ndarray:
    if how == "sigmoid":
        return 1.0 / (1.0 + np.exp(-scores))
    if how == "softmax":
        e = np.exp(scores - scores.max(axis=-1, keepdims=True))
        return e / e.sum(axis=-1, keepdims=True)
    return scores


def _squeeze(a: np.ndarray, rank: int, what: str) -> np.ndarray:
    a = np.asarray(a)
    while a.ndim > rank and a.shape[0] == 1:
        a = a[0]
    if a.ndim != rank:
        raise ValueError(f"output {what}: expected {rank} dimensions after dropping a batch of 1, "
                         f"got shape {list(np.shape(a))}")
    return a


def decode(adapter: Adapter, outputs: list, geo: Geometry, classes: int | None = None):
    """Graph outputs (in OutputSpec.names() order) -> (boxes xyxy image px, scores, labels)."""
    out = adapter.output
    if out.kind == "dense":
        if out.predictions:
            p = _squeeze(outputs[0], 2, out.predictions).astype(np.float32, copy=False)
            if out.transposed:
                p = p.T
            boxes, scores = p[:, :4], p[:, 4:]
        else:
            boxes = _squeeze(outputs[0], 2, out.boxes)
            scores = _squeeze(outputs[1], 2, out.scores)
            if len(boxes) != len(scores):
                raise ValueError(f"outputs {out.boxes} and {out.scores}: {len(boxes)} boxes but "
                                 f"{len(scores)} score rows")
        if boxes.shape[1] != 4:
            raise ValueError(f"boxes have {boxes.shape[1]} values each, expected 4")
        if classes is not None and scores.shape[1] != classes:
            raise ValueError(f"the graph scores {scores.shape[1]} classes, the entry names {classes}")
        scores = activate(scores.astype(np.float32, copy=False), out.score_activation)
        boxes = _to_image(to_xyxy(boxes.astype(np.float32, copy=False), out.box_format), out.box_units, geo)
        return _candidates_nms(adapter, boxes, scores)
    if out.kind == "packed":
        p = _squeeze(outputs[0], 2, out.packed).astype(np.float32, copy=False)
        if p.shape[1] != 6:
            raise ValueError(f"output {out.packed}: expected 6 columns, got {p.shape[1]}")
        cols, at = {}, 0
        for name in out.packed_columns:
            width = 4 if name == "box" else 1
            cols[name] = p[:, at:at + width]
            at += width
        boxes, scores, labels = cols["box"], cols["score"][:, 0], cols["label"][:, 0]
    else:
        boxes = _squeeze(outputs[0], 2, out.boxes).astype(np.float32, copy=False)
        scores = _squeeze(outputs[1], 1, out.scores).astype(np.float32, copy=False)
        labels = _squeeze(outputs[2], 1, out.labels)
        if not len(boxes) == len(scores) == len(labels):
            raise ValueError(f"outputs {out.boxes}, {out.scores}, {out.labels} disagree on the "
                             f"detection count: {len(boxes)}, {len(scores)}, {len(labels)}")
    labels = np.rint(labels).astype(np.int64)
    if classes is not None and len(labels) and (labels.min() < 0 or labels.max() >= classes):
        raise ValueError(f"label {int(labels.max() if labels.max() >= classes else labels.min())} is "
                         f"outside the entry's {classes} classes")
    scores = activate(scores, out.score_activation)
    boxes = _to_image(to_xyxy(boxes, out.box_format), out.box_units, geo)
    keep = scores > adapter.nms.score_threshold
    boxes, scores, labels = boxes[keep], scores[keep], labels[keep]
    if adapter.nms.enabled:
        order = np.argsort(-scores, kind="stable")[: adapter.nms.candidates]
        boxes, scores, labels = boxes[order], scores[order], labels[order]
        keep = batched_nms(boxes, scores, labels, adapter.nms.iou)
    else:
        keep = np.argsort(-scores, kind="stable")
    keep = keep[: adapter.nms.detections]
    return boxes[keep], scores[keep], labels[keep]


def _to_image(boxes: np.ndarray, units: str, geo: Geometry) -> np.ndarray:
    """Graph-frame xyxy -> image pixels, clipped to the image."""
    b = boxes.astype(np.float32, copy=True)
    if units == "normalised":
        b[:, [0, 2]] *= geo.net_w
        b[:, [1, 3]] *= geo.net_h
    if geo.pad_x or geo.pad_y or geo.scale_x != 1.0 or geo.scale_y != 1.0:
        b[:, [0, 2]] = (b[:, [0, 2]] - geo.pad_x) / np.float32(geo.scale_x)
        b[:, [1, 3]] = (b[:, [1, 3]] - geo.pad_y) / np.float32(geo.scale_y)
    b[:, [0, 2]] = np.clip(b[:, [0, 2]], 0, geo.img_w)
    b[:, [1, 3]] = np.clip(b[:, [1, 3]], 0, geo.img_h)
    return b


def _candidates_nms(adapter: Adapter, boxes, scores):
    """Dense [A, 4] boxes and [A, C] class scores -> top-k candidates -> NMS -> detections."""
    nms = adapter.nms
    bg = adapter.output.background
    picked_i, picked_c = [], []
    if nms.candidates_per == "class":
        for c in range(scores.shape[1]):
            if c == bg:
                continue
            col = scores[:, c]
            idx = np.flatnonzero(col > nms.score_threshold)
            if len(idx) > nms.candidates:
                idx = idx[np.argpartition(-col[idx], nms.candidates - 1)[: nms.candidates]]
            picked_i.append(idx)
            picked_c.append(np.full(len(idx), c, np.int64))
        anchors = np.concatenate(picked_i) if picked_i else np.zeros(0, np.int64)
        labels = np.concatenate(picked_c) if picked_c else np.zeros(0, np.int64)
    else:
        s = scores.copy()
        if bg >= 0:
            s[:, bg] = -np.inf
        flat = np.flatnonzero(s.ravel() > nms.score_threshold)
        if len(flat) > nms.candidates:
            flat = flat[np.argpartition(-s.ravel()[flat], nms.candidates - 1)[: nms.candidates]]
        anchors, labels = np.divmod(flat, s.shape[1])
    b, sc = boxes[anchors], scores[anchors, labels]
    keep = batched_nms(b, sc, labels, nms.iou)[: nms.detections]
    return b[keep], sc[keep].astype(np.float32), labels[keep]


# ----------------------------------------------------------------- NMS
_MATRIX_MAX = 4096   # boxes of one class handled with one IoU matrix; more: row by row


def batched_nms(boxes: np.ndarray, scores: np.ndarray, labels: np.ndarray, iou: float) -> np.ndarray:
    """Indices kept by per-class greedy NMS, by decreasing score (torchvision.ops.batched_nms's contract)."""
    keep = []
    for c in np.unique(labels):
        idx = np.flatnonzero(labels == c)
        keep.append(idx[nms(boxes[idx], scores[idx], iou)])
    if not keep:
        return np.zeros(0, np.int64)
    keep = np.concatenate(keep)
    return keep[np.argsort(-scores[keep], kind="stable")]


def nms(boxes: np.ndarray, scores: np.ndarray, iou: float) -> np.ndarray:
    """Greedy NMS of one class: a box is dropped when its IoU with a kept, higher-scoring box is > iou."""
    order = np.argsort(-scores, kind="stable")
    b = boxes[order].astype(np.float32)
    area = (b[:, 2] - b[:, 0]) * (b[:, 3] - b[:, 1])
    n = len(b)
    keep = []
    if n <= _MATRIX_MAX:
        # over[i, j]: j falls if i is kept; marks on boxes already decided (j <= i) are never read
        over = _iou_matrix(b, area) > iou
        suppressed = np.zeros(n, bool)
        for i in range(n):
            if not suppressed[i]:
                keep.append(i)
                suppressed |= over[i]
    else:
        rest = np.arange(n)
        while rest.size:            # one pass per kept box
            i, rest = rest[0], rest[1:]
            keep.append(i)
            if rest.size:
                rest = rest[_iou_row(b, area, i, rest) <= iou]
    return order[np.asarray(keep, np.int64)]


def _iou_matrix(b, area):
    x1, y1, x2, y2 = b[:, 0], b[:, 1], b[:, 2], b[:, 3]
    w = np.clip(np.minimum.outer(x2, x2) - np.maximum.outer(x1, x1), 0, None)
    h = np.clip(np.minimum.outer(y2, y2) - np.maximum.outer(y1, y1), 0, None)
    inter = w * h
    return inter / np.maximum(np.add.outer(area, area) - inter, np.float32(1e-12))


def _iou_row(b, area, i, rest):
    other = b[rest]
    wh = np.clip(np.minimum(b[i, 2:], other[:, 2:]) - np.maximum(b[i, :2], other[:, :2]), 0, None)
    inter = wh[:, 0] * wh[:, 1]
    return inter / np.maximum(area[i] + area[rest] - inter, np.float32(1e-12))
