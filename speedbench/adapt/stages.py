"""Which stage each node of an external graph belongs to.

With `[stages]` in the adapter, a node belongs to the stage whose node-name prefix matches
its name (the longest prefix wins); a node no prefix matches is `unattributed`.

Without it, the documented fallback goes by op type and position in the graph's (topological)
node order, because an unknown exporter's names carry no reliable module path:

- from the first NonMaxSuppression or TopK node on: `postprocess`;
- before the first convolution / matrix product (Conv, ConvTranspose, Gemm, MatMul and their
  quantised forms): `preprocess` (in-graph scaling, normalisation, resizing);
- from the first to the last convolution / matrix product: `backbone` - this includes the neck
  and the head's convolutions, which the fallback cannot tell apart;
- after the last one (reshapes, box decoding, activations): `head`;
- a graph without any convolution or matrix product: everything before NMS is `unattributed`.

Nodes inside If/Loop bodies take their parent's stage. Nodes ONNX Runtime fuses or inserts
are traced back to these names by speedbench.measure.stages.Attributor, like a zoo graph's;
what it cannot trace stays `unattributed`.
"""
from __future__ import annotations

from speedbench.adapt.spec import Adapter
from speedbench.schema import STAGES

COMPUTE_OPS = {"Conv", "ConvTranspose", "ConvInteger", "QLinearConv", "Gemm", "MatMul", "MatMulInteger",
               "QLinearMatMul"}
NMS_OPS = {"NonMaxSuppression", "TopK"}
FALLBACK_NOTE = ("stages by op type and position (no [stages] prefixes): backbone spans the first to the "
                 "last convolution, so it includes neck and head convolutions")


def _name(node, i: int) -> str:
    return node.name or f"{node.op_type}_{i}"


def node_stages(graph, adapter: Adapter) -> list:
    """The stage of each top-level node of `graph`, in node order."""
    nodes = list(graph.node)
    if adapter.stages:
        pairs = sorted(((p, s) for s, ps in adapter.stages.items() for p in ps), key=lambda x: -len(x[0]))
        return [next((s for p, s in pairs if _name(n, i).startswith(p)), "unattributed")
                for i, n in enumerate(nodes)]
    first_nms = next((i for i, n in enumerate(nodes) if n.op_type in NMS_OPS), len(nodes))
    compute = [i for i, n in enumerate(nodes[:first_nms]) if n.op_type in COMPUTE_OPS]
    out = []
    for i in range(len(nodes)):
        if i >= first_nms:
            out.append("postprocess")
        elif not compute:
            out.append("unattributed")
        elif i < compute[0]:
            out.append("preprocess")
        elif i <= compute[-1]:
            out.append("backbone")
        else:
            out.append("head")
    return out


def unmatched_prefixes(graph, adapter: Adapter) -> list[tuple[str, str]]:
    """(stage, prefix) pairs of the adapter that match no top-level node name."""
    names = [_name(n, i) for i, n in enumerate(graph.node)]
    return [(s, p) for s, ps in adapter.stages.items() for p in ps if not any(n.startswith(p) for n in names)]


def scoped_copy(model, adapter: Adapter):
    """A copy of the model whose node names are "/<stage>/<original name>" (computation untouched).

    The profiled session runs this copy, so the measure package's attribution (which reads a
    stage from a node name's first scope component) works for any exporter's names.
    """
    import onnx

    copy = onnx.ModelProto()
    copy.CopyFrom(model)
    for node, stage in zip(copy.graph.node, node_stages(copy.graph, adapter)):
        _rename(node, stage, 0)
    return copy


def _rename(node, stage: str, i: int) -> None:
    base = (node.name or f"{node.op_type}_{id(node)}").replace("/", "|")
    node.name = f"/{stage}/{base}"
    for attr in node.attribute:
        subs = [attr.g] if attr.type == attr.GRAPH else list(attr.graphs) if attr.type == attr.GRAPHS else []
        for g in subs:
            for j, child in enumerate(g.node):
                _rename(child, stage, j)


def stage_lookup(scoped_model):
    """name -> stage for a scoped_copy: its node names, and names ORT derives from tensor names.

    ONNX Runtime names a fused or re-laid-out node after the tensor it writes plus a suffix
    ("<tensor>_nchwc"); such a name is traced to the node that produced the longest known
    tensor name it starts with. Anything else is "unattributed".
    """
    node_stage, tensor_stage = {}, {}
    for node in scoped_model.graph.node:
        stage = stage_of_scope(node.name)
        node_stage[node.name] = stage
        for t in node.output:
            tensor_stage[t] = stage

    def stage_of(name: str) -> str:
        if name in node_stage:
            return node_stage[name]
        head = name
        while head:
            if head in tensor_stage:
                return tensor_stage[head]
            if "_" not in head:
                break
            head = head.rsplit("_", 1)[0]
        return "unattributed"

    return stage_of


def stage_of_scope(name: str) -> str:
    """A scoped_copy node name ("/backbone/<original>") -> its stage."""
    parts = name.split("/")
    head = parts[1] if name.startswith("/") and len(parts) > 2 else ""
    return head if head in STAGES else "unattributed"
