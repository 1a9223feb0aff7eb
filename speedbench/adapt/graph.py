"""An external graph with its adapter: the load-time check, and running image -> detections.

check_graph() reads the ONNX file's declared inputs and outputs (no session) and refuses an
adapter that does not fit them, naming the graph's actual inputs/outputs and shapes.
AdaptedGraph runs host preprocess -> InferenceSession.run -> host postprocess; the measure
backend times exactly that call, and evaluation scores exactly its detections.
"""
from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from speedbench.adapt import host
from speedbench.adapt.spec import Adapter
from speedbench.errors import UserError

_ELEM = {1: "float32", 2: "uint8", 3: "int8", 6: "int32", 7: "int64", 10: "float16", 11: "float64"}


@dataclass(frozen=True)
class GraphFacts:
    input_name: str
    input_shape: tuple          # ints, or names for dynamic dims
    num_classes: int | None     # score columns of a dense output when the graph states them
    params: int
    file_mib: float


def _dims(value_info) -> tuple:
    t = value_info.type.tensor_type
    if not t.HasField("shape"):
        return ()
    return tuple(d.dim_value if d.HasField("dim_value") else (d.dim_param or "?") for d in t.shape.dim)


def _shape_text(dims) -> str:
    return "[" + ", ".join(str(d) for d in dims) + "]"


def load_onnx(path):
    import onnx

    path = Path(path)
    if not path.is_file():
        raise UserError(f"{path}: ONNX graph not found")
    try:
        return onnx.load(str(path), load_external_data=False)
    except Exception as exc:   # onnx raises DecodeError & co for a file that is not a graph
        raise UserError(f"{path}: not a readable ONNX graph ({type(exc).__name__})") from None


def check_graph(path, adapter: Adapter, classes=None, model=None) -> GraphFacts:
    """Check that the adapter fits the graph's declared input and outputs; UserError names both."""
    model = model if model is not None else load_onnx(path)
    src = adapter.source
    inits = {i.name for i in model.graph.initializer}
    inputs = [i for i in model.graph.input if i.name not in inits]
    outputs = {o.name: o for o in model.graph.output}
    have_in = ", ".join(f"{i.name} {_shape_text(_dims(i))} {_ELEM.get(i.type.tensor_type.elem_type, '?')}"
                        for i in inputs)
    have_out = ", ".join(f"{n} {_shape_text(_dims(o))}" for n, o in outputs.items())
    spec = adapter.input
    if spec.name:
        match = [i for i in inputs if i.name == spec.name]
        if not match:
            raise UserError(f"{src}: input.name: the graph has no input {spec.name!r} (it has {have_in})")
        inp = match[0]
    elif len(inputs) == 1:
        inp = inputs[0]
    else:
        raise UserError(f"{src}: input.name: the graph has {len(inputs)} inputs ({have_in}); name the image input")
    others = [i.name for i in inputs if i is not inp]
    if others:
        raise UserError(f"{src}: input: the graph has further inputs the adapter cannot feed: {', '.join(others)}")
    dims = _dims(inp)
    want_rank = 3 if spec.layout == "CHW" else 4
    if len(dims) != want_rank:
        raise UserError(f"{src}: input.layout: {spec.layout} needs a rank-{want_rank} input; graph input "
                        f"{inp.name} is {_shape_text(dims)}")
    if spec.layout == "NHWC":
        h, w, ch = dims[1], dims[2], dims[3]
    else:
        ch, h, w = dims[-3], dims[-2], dims[-1]
    if isinstance(ch, int) and ch != 3:
        raise UserError(f"{src}: input.layout: {spec.layout} puts channels where graph input {inp.name} "
                        f"{_shape_text(dims)} has {ch}; is the layout right?")
    if want_rank == 4 and isinstance(dims[0], int) and dims[0] != 1:
        raise UserError(f"{src}: input: graph input {inp.name} {_shape_text(dims)} has batch {dims[0]}; "
                        f"images are measured one at a time (batch 1)")
    elem = _ELEM.get(inp.type.tensor_type.elem_type, str(inp.type.tensor_type.elem_type))
    if elem != spec.dtype:
        raise UserError(f"{src}: input.dtype: adapter says {spec.dtype}, graph input {inp.name} is {elem}")
    static = isinstance(h, int) and isinstance(w, int)
    if adapter.fixed and static and (h, w) != tuple(spec.size):
        raise UserError(f"{src}: input.size: adapter says {list(spec.size)}, graph input {inp.name} is "
                        f"{_shape_text(dims)} ({h} x {w})")
    if adapter.fixed and not static:
        raise UserError(f"{src}: input.size: adapter says fixed {list(spec.size)} but graph input {inp.name} "
                        f"{_shape_text(dims)} has dynamic height/width; use size = \"dynamic\"")
    if not adapter.fixed and static:
        raise UserError(f"{src}: input.size: adapter says \"dynamic\" but graph input {inp.name} is fixed "
                        f"at {h} x {w}; use size = [{h}, {w}]")
    num_classes = _check_outputs(adapter, outputs, have_out, classes)
    params = sum(int(np.prod(t.dims)) for t in model.graph.initializer)
    size = os.path.getsize(path) / 2**20 if path is not None and Path(path).is_file() else float("nan")
    return GraphFacts(inp.name, dims, num_classes, params, size)


def _check_outputs(adapter: Adapter, outputs: dict, have_out: str, classes) -> int | None:
    src, out = adapter.source, adapter.output
    keys = {"packed": ("packed",), "separate": ("boxes", "scores", "labels")}.get(
        out.kind, ("predictions",) if out.predictions else ("boxes", "scores"))
    shapes = {}
    for key, name in zip(keys, out.names()):
        if name not in outputs:
            raise UserError(f"{src}: output.{key}: the graph has no output {name!r} (it has {have_out})")
        shapes[key] = _dims(outputs[name])

    def need(key, ranks, last=None, what=""):
        dims = shapes[key]
        if dims and len(dims) not in ranks:
            raise UserError(f"{src}: output.{key}: {what} needs rank {' or '.join(map(str, ranks))}; output "
                            f"{getattr(out, key)} is {_shape_text(dims)}")
        if dims and last is not None and isinstance(dims[-1], int) and dims[-1] != last:
            raise UserError(f"{src}: output.{key}: {what} needs {last} values in the last dimension; output "
                            f"{getattr(out, key)} is {_shape_text(dims)}")
        return dims

    n_classes = None
    if out.kind == "packed":
        need("packed", (2, 3), 6, "a packed detections tensor [1, N, 6]")
    elif out.kind == "separate":
        need("boxes", (2, 3), 4, "boxes [1, N, 4]")
        need("scores", (1, 2), None, "scores [1, N]")
        need("labels", (1, 2), None, "labels [1, N]")
    elif out.predictions:
        dims = need("predictions", (2, 3), None, "dense predictions [1, A, 4 + C]")
        width = dims[-2] if out.transposed and len(dims) >= 2 else (dims[-1] if dims else None)
        if isinstance(width, int):
            if width <= 4:
                raise UserError(f"{src}: output.predictions: output {out.predictions} {_shape_text(dims)} has "
                                f"{width} values per anchor, need 4 box values + class scores"
                                + ("" if out.transposed else "; set transposed = true for [1, 4 + C, A]"))
            n_classes = width - 4
    else:
        need("boxes", (2, 3), 4, "dense boxes [1, A, 4]")
        dims = need("scores", (2, 3), None, "dense class scores [1, A, C]")
        if dims and isinstance(dims[-1], int):
            n_classes = dims[-1]
    if n_classes is not None and classes is not None and n_classes != len(classes):
        raise UserError(f"{src}: output: the graph scores {n_classes} classes per box but the model entry "
                        f"names {len(classes)} classes")
    if n_classes is not None and out.background >= n_classes:
        raise UserError(f"{src}: output.background: column {out.background} does not exist "
                        f"(the graph scores {n_classes} classes)")
    return n_classes


class AdaptedGraph:
    """image uint8 [H, W, 3] RGB -> (boxes xyxy image px, scores, labels) through graph + adapter."""

    def __init__(self, path, adapter: Adapter, session, size: int = 0, classes: int | None = None):
        self.path, self.adapter, self.session = str(path), adapter, session
        ins = [i.name for i in session.get_inputs()]
        self.input_name = adapter.input.name or ins[0]
        self.output_names = list(adapter.output.names())
        self.shape = host.target_shape(adapter, size)
        self.classes = classes

    def preprocess(self, image):
        return host.preprocess(self.adapter, image, self.shape)

    def infer(self, x):
        return self.session.run(self.output_names, {self.input_name: x})

    def postprocess(self, outputs, geo):
        try:
            return host.decode(self.adapter, outputs, geo, self.classes)
        except ValueError as exc:
            raise UserError(f"{self.path}: {self.adapter.source}: {exc}") from None

    def __call__(self, image):
        x, geo = self.preprocess(image)
        return self.postprocess(self.infer(x), geo)
