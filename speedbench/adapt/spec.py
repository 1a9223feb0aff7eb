"""The adapter of an external ONNX detector: what its input wants and what its outputs mean.

An adapter is a TOML file (or an inline `[models.adapter]` table of a profile). Every key,
with its default where it has one::

    [input]
    name        = ""          # the graph input fed; "" = the graph's only input
    layout      = "NCHW"      # required: "NCHW", "CHW" or "NHWC"
    dtype       = "float32"   # "float32" or "uint8" (uint8: raw pixels, no scaling/normalisation)
    size        = 320         # required: fixed input 320 or [height, width]; or "dynamic"
    native_size = 320         # dynamic input only: the size a profile's "native" stands for
    resize      = "stretch"   # "stretch" (to size x size), "letterbox" (keep aspect, pad), or
                              # "none" (the graph takes each image at its own size; dynamic only)
    pad_value   = 114         # letterbox padding, in 0..255 pixel units
    scale       = 0.00392156862745098   # pixel values x scale (1/255: [0, 1]), float32 only
    mean        = [0.0, 0.0, 0.0]       # then (x - mean) / std per channel, float32 only
    std         = [1.0, 1.0, 1.0]
    channels    = "RGB"       # channel order the graph expects: "RGB" or "BGR"

    [output]
    kind        = "dense"     # required. "dense": per-anchor boxes + class scores needing NMS;
                              # "packed": one [1, N, 6] (or [N, 6]) detections tensor;
                              # "separate": boxes [N, 4], scores [N], labels [N] tensors
    predictions = "output0"   # dense: one [1, A, 4 + C] tensor (4 box values, C class scores);
                              # the graph outputs named here must exist (checked against the file)
    transposed  = false       # dense: predictions are [1, 4 + C, A]
    boxes       = ""          # dense (with scores [1, A, C]) or separate: the boxes tensor
    scores      = ""          # dense: [1, A, C]; separate: [N]
    labels      = ""          # separate: [N]
    packed      = ""          # packed: the [1, N, 6] tensor
    packed_columns = ["box", "score", "label"]   # packed: column order ("box" = 4 columns)
    box_format  = "xyxy"      # "xyxy", "xywh" (corner + size) or "cxcywh" (centre + size)
    box_units   = "pixels"    # "pixels" or "normalised" (fractions of the graph's input size)
    score_activation = "none" # "none", "sigmoid" or "softmax" (softmax over all class columns)
    background  = -1          # dense: class column dropped after the activation (-1 = none)

    [nms]                     # host-side decoding; dense outputs always need it
    enabled     = true        # packed / separate: also run NMS on the host (false = use as is)
    iou         = 0.5         # suppress a box overlapping a higher-scoring one of its class above this
    score_threshold = 0.05    # drop scores at or below this (after the activation)
    detections  = 100         # keep at most this many per image
    candidates  = 1000        # keep at most this many before NMS (the proposals axis maps here)
    candidates_per = "class"  # top-k per class (as torchvision's SSD) or per "image"

    [stages]                  # optional: node-name prefixes per stage (schema.STAGES)
    backbone = ["/backbone/"]
    head     = ["/head/"]

Without [stages], graph nodes are split by op type and position (speedbench.adapt.stages).
Boxes come back in original-image pixels: the host undoes the resize or letterbox and clips
boxes to the image. Errors are one line: ``<source>: <key path>: <what is wrong>``.
"""
from __future__ import annotations

import hashlib
import json
import tomllib
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path

from speedbench.checker import Checker
from speedbench.errors import UserError
from speedbench.schema import STAGES

LAYOUTS = ("NCHW", "CHW", "NHWC")
DTYPES = ("float32", "uint8")
RESIZES = ("stretch", "letterbox", "none")
CHANNELS = ("RGB", "BGR")
KINDS = ("dense", "packed", "separate")
BOX_FORMATS = ("xyxy", "xywh", "cxcywh")
BOX_UNITS = ("pixels", "normalised")
ACTIVATIONS = ("none", "sigmoid", "softmax")
CANDIDATES_PER = ("class", "image")
PACKED_COLUMNS = ("box", "score", "label")
STAGE_KEYS = tuple(s for s in STAGES if s != "unattributed")


@dataclass(frozen=True)
class InputSpec:
    name: str = ""
    layout: str = "NCHW"
    dtype: str = "float32"
    size: tuple | None = None          # (h, w) when fixed; None = dynamic
    native_size: int = 0
    resize: str = "stretch"
    pad_value: int = 114
    scale: float = 1.0 / 255.0
    mean: tuple = (0.0, 0.0, 0.0)
    std: tuple = (1.0, 1.0, 1.0)
    channels: str = "RGB"


@dataclass(frozen=True)
class OutputSpec:
    kind: str = "dense"
    predictions: str = ""
    transposed: bool = False
    boxes: str = ""
    scores: str = ""
    labels: str = ""
    packed: str = ""
    packed_columns: tuple = PACKED_COLUMNS
    box_format: str = "xyxy"
    box_units: str = "pixels"
    score_activation: str = "none"
    background: int = -1

    def names(self) -> tuple:
        """The graph outputs the adapter reads, in the order they are fetched."""
        if self.kind == "packed":
            return (self.packed,)
        if self.kind == "separate":
            return (self.boxes, self.scores, self.labels)
        return (self.predictions,) if self.predictions else (self.boxes, self.scores)


@dataclass(frozen=True)
class NmsSpec:
    enabled: bool = True
    iou: float = 0.5
    score_threshold: float = 0.05
    detections: int = 100
    candidates: int = 1000
    candidates_per: str = "class"


@dataclass(frozen=True)
class Adapter:
    input: InputSpec
    output: OutputSpec
    nms: NmsSpec
    stages: dict = field(default_factory=dict)   # stage -> tuple of node-name prefixes
    source: str = "<adapter>"

    @property
    def host_nms(self) -> bool:
        return self.output.kind == "dense" or self.nms.enabled

    @property
    def fixed(self) -> bool:
        return self.input.size is not None

    @property
    def native_size(self) -> int:
        """The size a profile's "native" stands for: the fixed input's longer side, else native_size."""
        return max(self.input.size) if self.fixed else self.input.native_size

    def to_dict(self) -> dict:
        """The TOML-shaped table, keys that apply only (parse_adapter(to_dict()) gives it back)."""
        i, o = self.input, self.output
        inp = {"name": i.name, "layout": i.layout, "dtype": i.dtype, "resize": i.resize, "channels": i.channels,
               "size": "dynamic" if i.size is None else list(i.size)}
        if i.size is None and i.resize != "none":
            inp["native_size"] = i.native_size
        if i.resize == "letterbox":
            inp["pad_value"] = i.pad_value
        if i.dtype == "float32":
            inp.update(scale=i.scale, mean=list(i.mean), std=list(i.std))
        out = {"kind": o.kind, "box_format": o.box_format, "box_units": o.box_units,
               "score_activation": o.score_activation}
        out.update({k: getattr(o, k) for k in ("predictions", "boxes", "scores", "labels", "packed")
                    if getattr(o, k)})
        if o.predictions:
            out["transposed"] = o.transposed
        if o.kind == "packed":
            out["packed_columns"] = list(o.packed_columns)
        if o.kind == "dense":
            out["background"] = o.background
        return {"input": inp, "output": out, "nms": asdict(self.nms),
                "stages": {k: list(v) for k, v in self.stages.items()}}

    def digest(self) -> str:
        return hashlib.sha256(json.dumps(self.to_dict(), sort_keys=True).encode()).hexdigest()[:16]

    def with_candidates(self, candidates: int) -> "Adapter":
        return replace(self, nms=replace(self.nms, candidates=int(candidates)))


def load_adapter(path) -> Adapter:
    path = Path(path)
    try:
        text = path.read_text()
    except FileNotFoundError:
        raise UserError(f"{path}: adapter file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise UserError(f"{path}: cannot read adapter ({exc})") from None
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise UserError(f"{path}: TOML syntax error: {exc}") from None
    return parse_adapter(doc, str(path))


def parse_adapter(doc, source: str = "<adapter>", keypath: str = "") -> Adapter:
    """Validate an adapter table; any problem is a one-line UserError naming the key path."""
    c = Checker(source)
    k = (lambda key: f"{keypath}.{key}" if keypath else key)
    c.table(doc, keypath, {"input", "output", "nms", "stages"}, {"input", "output"})
    return Adapter(input=_input(c, doc["input"], k("input")), output=_output(c, doc["output"], k("output")),
                   nms=_nms(c, doc.get("nms", {}), k("nms"), doc["output"]),
                   stages=_stages(c, doc.get("stages", {}), k("stages")), source=source)


def _input(c: Checker, t, kp: str) -> InputSpec:
    c.table(t, kp, {"name", "layout", "dtype", "size", "native_size", "resize", "pad_value", "scale",
                    "mean", "std", "channels"}, {"layout", "size"})
    d = InputSpec()
    layout = c.str_(t["layout"], f"{kp}.layout", LAYOUTS)
    dtype = c.str_(t.get("dtype", d.dtype), f"{kp}.dtype", DTYPES)
    size, native = _size(c, t["size"], f"{kp}.size"), 0
    resize = c.str_(t.get("resize", d.resize), f"{kp}.resize", RESIZES)
    if size is None:
        if resize != "none":
            if "native_size" not in t:
                c.fail(f"{kp}.native_size", "missing: a dynamic input that the host resizes needs the "
                                            "size a profile's \"native\" stands for")
            native = c.int_(t["native_size"], f"{kp}.native_size", 32, 4096)
    else:
        if "native_size" in t:
            c.fail(f"{kp}.native_size", "only for size = \"dynamic\" (a fixed input's size is its native size)")
        if resize == "none":
            c.fail(f"{kp}.resize", "\"none\" needs size = \"dynamic\": a fixed-size graph cannot take "
                                   "images at their own size")
    if "pad_value" in t and resize != "letterbox":
        c.fail(f"{kp}.pad_value", "only for resize = \"letterbox\"")
    pad = c.int_(t.get("pad_value", d.pad_value), f"{kp}.pad_value", 0, 255)
    if dtype == "uint8":
        for key in ("scale", "mean", "std"):
            if key in t:
                c.fail(f"{kp}.{key}", "not for dtype = \"uint8\": raw 0..255 pixels go in unscaled")
    scale = c.num(t.get("scale", d.scale), f"{kp}.scale", 0, 1e6, open_lo=True)
    mean = _triple(c, t.get("mean", list(d.mean)), f"{kp}.mean", -1e6, 1e6)
    std = _triple(c, t.get("std", list(d.std)), f"{kp}.std", 0, 1e6, open_lo=True)
    return InputSpec(name=c.str_(t.get("name", ""), f"{kp}.name"), layout=layout, dtype=dtype, size=size,
                     native_size=native, resize=resize, pad_value=pad, scale=scale, mean=mean, std=std,
                     channels=c.str_(t.get("channels", d.channels), f"{kp}.channels", CHANNELS))


def _size(c: Checker, value, kp: str):
    if value == "dynamic":
        return None
    if isinstance(value, str):
        c.fail(kp, f"{value!r} is not a size (pixels, [height, width], or \"dynamic\")")
    if isinstance(value, list):
        if len(value) != 2:
            c.fail(kp, f"expected [height, width], got {len(value)} values")
        return tuple(c.int_(v, f"{kp}[{i}]", 8, 8192) for i, v in enumerate(value))
    n = c.int_(value, kp, 8, 8192)
    return (n, n)


def _triple(c: Checker, value, kp: str, lo: float, hi: float, open_lo=False) -> tuple:
    if not isinstance(value, list) or len(value) != 3:
        c.fail(kp, "expected a list of 3 numbers (one per channel, in the graph's channel order)")
    return tuple(c.num(v, f"{kp}[{i}]", lo, hi, open_lo=open_lo) for i, v in enumerate(value))


def _output(c: Checker, t, kp: str) -> OutputSpec:
    names = {"predictions", "transposed", "boxes", "scores", "labels", "packed", "packed_columns"}
    c.table(t, kp, {"kind", "box_format", "box_units", "score_activation", "background"} | names, {"kind"})
    kind = c.str_(t["kind"], f"{kp}.kind", KINDS)
    allowed = {"dense": {"predictions", "transposed", "boxes", "scores"},
               "packed": {"packed", "packed_columns"}, "separate": {"boxes", "scores", "labels"}}[kind]
    for key in sorted(names & set(t)):
        if key not in allowed:
            c.fail(f"{kp}.{key}", f"does not apply to kind = \"{kind}\" (it takes {', '.join(sorted(allowed))})")
    got = {key: c.str_(t[key], f"{kp}.{key}", allow_empty=False)
           for key in ("predictions", "boxes", "scores", "labels", "packed") if key in t}
    if kind == "dense":
        if ("predictions" in got) == ("boxes" in got or "scores" in got):
            c.fail(kp, "dense output: give either `predictions` ([1, A, 4 + C]) or both `boxes` and `scores`")
        if "predictions" not in got:
            for key in ("boxes", "scores"):
                if key not in got:
                    c.fail(f"{kp}.{key}", "missing: dense output given as two tensors needs boxes and scores")
        if "transposed" in t and "predictions" not in got:
            c.fail(f"{kp}.transposed", "only for a single `predictions` tensor")
    else:
        for key in sorted(allowed - {"packed_columns"}):
            if key not in got:
                c.fail(f"{kp}.{key}", f"missing: kind = \"{kind}\" needs the name of its {key} output")
    if len(set(got.values())) != len(got):
        c.fail(kp, "the same graph output is named twice")
    cols = tuple(t.get("packed_columns", list(PACKED_COLUMNS)))
    if "packed_columns" in t and (not isinstance(t["packed_columns"], list)
                                  or sorted(map(str, cols)) != sorted(PACKED_COLUMNS)):
        c.fail(f"{kp}.packed_columns", "expected the three names \"box\", \"score\", \"label\" in column order")
    background = c.int_(t.get("background", -1), f"{kp}.background", -1, 100_000)
    if background >= 0 and kind != "dense":
        c.fail(f"{kp}.background", "only for kind = \"dense\" (class score columns)")
    return OutputSpec(kind=kind, transposed=c.bool_(t.get("transposed", False), f"{kp}.transposed"),
                      packed_columns=cols, background=background,
                      box_format=c.str_(t.get("box_format", "xyxy"), f"{kp}.box_format", BOX_FORMATS),
                      box_units=c.str_(t.get("box_units", "pixels"), f"{kp}.box_units", BOX_UNITS),
                      score_activation=c.str_(t.get("score_activation", "none"), f"{kp}.score_activation",
                                              ACTIVATIONS),
                      **got)


def _nms(c: Checker, t, kp: str, output) -> NmsSpec:
    c.table(t, kp, {"enabled", "iou", "score_threshold", "detections", "candidates", "candidates_per"})
    d = NmsSpec()
    enabled = c.bool_(t.get("enabled", True), f"{kp}.enabled")
    if not enabled and isinstance(output, dict) and output.get("kind") == "dense":
        c.fail(f"{kp}.enabled", "dense outputs need host NMS (one box per anchor, not detections)")
    return NmsSpec(enabled=enabled, iou=c.num(t.get("iou", d.iou), f"{kp}.iou", 0, 1, open_lo=True),
                   score_threshold=c.num(t.get("score_threshold", d.score_threshold), f"{kp}.score_threshold",
                                         0, 1, open_hi=True),
                   detections=c.int_(t.get("detections", d.detections), f"{kp}.detections", 1, 100_000),
                   candidates=c.int_(t.get("candidates", d.candidates), f"{kp}.candidates", 1, 1_000_000),
                   candidates_per=c.str_(t.get("candidates_per", d.candidates_per), f"{kp}.candidates_per",
                                         CANDIDATES_PER))


def _stages(c: Checker, t, kp: str) -> dict:
    c.table(t, kp, set(STAGE_KEYS))
    out = {}
    for stage, prefixes in t.items():
        out[stage] = c.list_(prefixes, f"{kp}.{stage}", lambda v, key: c.str_(v, key, allow_empty=False))
    return out
