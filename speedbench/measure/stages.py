"""Per-stage latency from an ONNX Runtime profile.

ORT's profile (SessionOptions.enable_profiling) has one "Node" event per
kernel run, named "<node name>_kernel_time", and one "model_run" event per
session.run. Node names come from the graph ORT actually ran (the optimized
graph), which differs from the exported one:

- The exporter names nodes after module scopes ("/backbone/body/.../Conv").
  A node's scope is its name without the last component.
- ORT rewrites the graph: fused or layout-changed nodes (e.g. NCHWc Conv named
  after its output tensor, "..._nchwc") and nodes it inserts (ReorderInput /
  ReorderOutput, "Reshape_token_77"). These are resolved through ancestry: the
  original producer of one of their output tensors, else of their input
  tensors (walking up), else of a node consuming their output (an Identity
  passing a shared weight to a Conv), else the control-flow node that holds them.
- If/Loop/Scan nodes own subgraphs whose nodes get their own events while the
  parent's event spans all of them. Each node is counted by its *self* time
  (its time minus its direct children's), so no time is counted twice.
- Between two nodes the executor spends time preparing the next one (output
  allocation, shape inference, the profiler's own bookkeeping). With the
  sequential executor that gap is charged to the node that follows, so the
  stages partition the profiled run; the profiler's share of it is why
  `profiling_overhead` is reported and why `kernel_stages` (kernel time only)
  is kept as well - for graphs of many tiny nodes (the unrolled per-class NMS
  of SSD-style heads) the two splits differ.

Whatever cannot be tied to a scope is reported as "unattributed". Attribution
is a pure function of (original graph, optimized graph, profile events), so
it can be tested on hand-built graphs.
"""
from __future__ import annotations

import json
from collections import defaultdict

from speedbench.zoo import stage_of_scope

CONTROL_FLOW = ("If", "Loop", "Scan")
KERNEL_SUFFIX = "_kernel_time"


def scope_of_name(name: str) -> str | None:
    """Module path of an exporter node name, or None for a name without a scope.

    "/backbone/body/layer1/layer1.0/conv1/Conv" -> "backbone.body.layer1.0.conv1"
    (the exporter repeats a parent's name for numbered children: "layer1/layer1.0"),
    "/Softmax" -> "" (the model's own forward), "If_12" -> None.
    """
    if not name.startswith("/"):
        return None
    path: list[str] = []
    for part in [p for p in name.split("/")[1:-1] if p]:
        if path and part.startswith(path[-1] + "."):
            path[-1] = part
        else:
            path.append(part)
    return ".".join(path)


class GraphIndex:
    """Names, producers and subgraph parents of every node of an ONNX model (subgraphs included)."""

    def __init__(self, model):
        self.nodes = {}        # name -> NodeProto
        self.producer = {}     # tensor name -> node name
        self.consumers = {}    # tensor name -> [node name]
        self.parent = {}       # subgraph node name -> control-flow node name
        if model is not None:
            self._walk(model.graph, None)

    def _walk(self, graph, parent):
        import onnx

        for i, node in enumerate(graph.node):
            name = node.name or f"{node.op_type}_unnamed_{id(graph)}_{i}"
            self.nodes[name] = node
            if parent is not None:
                self.parent[name] = parent
            for out in node.output:
                if out:
                    self.producer.setdefault(out, name)
            for inp in node.input:
                if inp:
                    self.consumers.setdefault(inp, []).append(name)
            for attr in node.attribute:
                if attr.type == onnx.AttributeProto.GRAPH:
                    self._walk(attr.g, name)
                elif attr.type == onnx.AttributeProto.GRAPHS:
                    for g in attr.graphs:
                        self._walk(g, name)


class Attributor:
    """Maps a node name from a profile to a scope, using the original and optimized graphs."""

    def __init__(self, original, optimized=None, max_depth: int = 64):
        self.orig = GraphIndex(original)
        self.opt = GraphIndex(optimized) if optimized is not None else GraphIndex(None)
        self.max_depth = max_depth
        self._memo: dict[str, tuple[str | None, str]] = {}

    def parent_of(self, name: str) -> str | None:
        return self.opt.parent.get(name, self.orig.parent.get(name))

    def node(self, name: str):
        return self.opt.nodes.get(name) or self.orig.nodes.get(name)

    def resolve(self, name: str) -> tuple[str | None, str]:
        """(a scoped name or None, how: name | fused-name | ancestry | consumer | parent | none).

        The scoped name is the node's own name when it carries a scope, else the name of
        the ancestor (node or tensor) that does; scope_of_name() turns it into a module path.
        """
        if name not in self._memo:
            self._memo[name] = self._resolve(name)
        return self._memo[name]

    def _resolve(self, name: str):
        if name in self.orig.nodes and scope_of_name(name) is not None:
            return name, "name"
        if scope_of_name(name) is not None:
            # ORT derived the name from an original node or tensor: "<node>/GatherSliceToSplitFusion",
            # "<tensor>_nchwc"; prefer the original node it names, if any
            head = name
            while "/" in head.strip("/"):
                head = head.rsplit("/", 1)[0]
                if head in self.orig.nodes and scope_of_name(head) is not None:
                    return head, "fused-name"
            return name, "fused-name"
        scope = self._ancestry(name)
        if scope is not None:
            return scope, "ancestry"
        scope = self._consumer(name)
        if scope is not None:       # e.g. an Identity handing a shared weight to a Conv
            return scope, "consumer"
        parent = self.parent_of(name)
        if parent is not None:
            scope, _ = self.resolve(parent)
            if scope is not None:
                return scope, "parent"
        return None, "none"

    def _tensor_scope(self, tensor: str) -> str | None:
        prod = self.orig.producer.get(tensor)
        if prod is not None and scope_of_name(prod) is not None:
            return prod
        return None

    def _ancestry(self, name: str) -> str | None:
        node = self.node(name)
        if node is None:
            return None
        for out in node.output:                       # what it produces, as the original graph knew it
            scope = self._tensor_scope(out)
            if scope is not None:
                return scope
        seen, frontier = {name}, [node]
        for _ in range(self.max_depth):               # then walk up through its inputs
            nxt = []
            for n in frontier:
                for t in n.input:
                    if not t:
                        continue
                    scope = self._tensor_scope(t)
                    if scope is not None:
                        return scope
                    prod = self.opt.producer.get(t) or self.orig.producer.get(t)
                    if prod and prod not in seen:
                        seen.add(prod)
                        if scope_of_name(prod) is not None:
                            return prod
                        p = self.node(prod)
                        if p is not None:
                            nxt.append(p)
            if not nxt:
                break
            frontier = nxt
        return None


    def _consumer(self, name: str) -> str | None:
        node = self.node(name)
        if node is None:
            return None
        for out in node.output:
            for index in (self.opt, self.orig):
                for c in index.consumers.get(out, ()):
                    if scope_of_name(c) is not None:
                        return c
        return None


def read_ort_profile(path) -> list[dict]:
    with open(path) as f:
        return json.load(f)


def run_windows(events: list[dict], last: int | None = None) -> list[tuple[int, int]]:
    """(start, end) in µs of each session.run ("model_run" events), the last `last` of them."""
    runs = sorted((e["ts"], e["ts"] + e["dur"]) for e in events
                  if e.get("cat") == "Session" and e.get("name") == "model_run")
    return runs[-last:] if last else runs


def attribute(events: list[dict], attributor: Attributor, stage_of, last_runs: int | None = None,
              dispatch: bool = True) -> dict:
    """Stage times (ms per run) from profile events.

    stage_of(scope) -> stage name; scope None means unattributed. Only node
    events inside the last `last_runs` model_run windows are used (the earlier
    ones are warm-up).

    Each node counts with its self time (control-flow parents minus their
    subgraph children). With `dispatch` (sequential executor: one node at a
    time), the gap between one top-level node and the next - the executor
    preparing that node, and the profiler's own bookkeeping - is charged to
    the node that follows, so the stages partition the profiled run; the time
    before the first and after the last node goes to "unattributed". The pure
    kernel split is returned too (kernel_stages).
    """
    import bisect

    windows = run_windows(events, last_runs)
    if not windows:
        raise ValueError("profile has no model_run events")
    starts = [w[0] for w in windows]
    per_window = defaultdict(list)
    for e in events:
        if e.get("cat") != "Node" or not e.get("name", "").endswith(KERNEL_SUFFIX):
            continue
        i = bisect.bisect_right(starts, e["ts"]) - 1
        if i >= 0 and e["ts"] <= windows[i][1]:
            per_window[i].append(e)

    total = defaultdict(float)        # node name -> summed kernel µs over the windows
    gap = defaultdict(float)          # node name -> summed dispatch gap µs before it
    edge_us = 0.0                     # before the first / after the last node of each run
    for i, evs in per_window.items():
        evs.sort(key=lambda e: (e["ts"], -e["dur"]))
        top_end = None
        for e in evs:
            name = e["name"][: -len(KERNEL_SUFFIX)]
            total[name] += e["dur"]
            if top_end is None:
                edge_us += e["ts"] - windows[i][0]
                top_end = e["ts"] + e["dur"]
            elif e["ts"] >= top_end:             # a top-level node (not inside a control-flow node)
                gap[name] += e["ts"] - top_end
                top_end = e["ts"] + e["dur"]
            else:
                top_end = max(top_end, e["ts"] + e["dur"])
        if top_end is not None:
            edge_us += max(0.0, windows[i][1] - top_end)

    child_sum = defaultdict(float)
    for name, us in total.items():
        parent = attributor.parent_of(name)
        if parent is not None and parent in total:
            child_sum[parent] += us
    self_us = {name: max(0.0, us - child_sum.get(name, 0.0)) for name, us in total.items()}

    n = len(windows)
    stages, kernel_stages, how = defaultdict(float), defaultdict(float), defaultdict(float)
    per_node = []
    for name, us in self_us.items():
        scope, method = attributor.resolve(name)
        stage = "unattributed" if scope is None else stage_of(scope)
        ms = us / n / 1000
        kernel_stages[stage] += ms
        stages[stage] += ms + (gap.get(name, 0.0) / n / 1000 if dispatch else 0.0)
        how[method] += ms
        per_node.append((ms, name, stage))
    if dispatch:
        stages["unattributed"] += edge_us / n / 1000
    run_ms = sum(b - a for a, b in windows) / n / 1000
    kernel_ms = sum(kernel_stages.values())
    stage_ms = sum(stages.values())
    per_node.sort(reverse=True)
    return {
        "stages": dict(stages),
        "kernel_stages": dict(kernel_stages),
        "profiled_ms": run_ms,
        "run_ms": [(b - a) / 1000 for a, b in windows],
        "stage_sum_ms": stage_ms,
        "kernel_ms": kernel_ms,
        "dispatch_ms": sum(gap.values()) / n / 1000 if dispatch else 0.0,
        "naive_node_ms": sum(total.values()) / n / 1000,   # parents and children both counted (wrong)
        "subgraph_ms": sum(child_sum.values()) / n / 1000,  # time inside If/Loop bodies, counted once
        "coverage": stage_ms / run_ms if run_ms > 0 else float("nan"),
        "kernel_coverage": kernel_ms / run_ms if run_ms > 0 else float("nan"),
        "resolved_by": dict(how),
        "top_nodes": [{"node": nm, "stage": st, "ms": round(ms, 4)} for ms, nm, st in per_node[:10]],
    }


def prefix_stage_of(stage_scopes: dict, scope: str) -> str:
    """Fallback (node name or module path) -> stage by the longest matching prefix of stage_scopes.

    A leading wrapper component (an exporter's own module) is tolerated. Code
    at the detector's top level (not inside any stage module) is box decoding
    and NMS in torchvision's one-stage detectors, so it counts as postprocess.
    """
    path = scope_of_name(scope) if scope.startswith("/") else scope
    parts = path.split(".") if path else []
    for start in (0, 1):
        cand = ".".join(parts[start:])
        best, best_len = None, -1
        for stage, prefixes in stage_scopes.items():
            for p in prefixes:
                if p and (cand == p or cand.startswith(p + ".")) and len(p) > best_len:
                    best, best_len = stage, len(p)
        if best is not None:
            return best
    if len(parts) <= 1:
        return "postprocess"
    return "unattributed"


# Module paths of torchvision's detectors, used when the zoo does not know the model.
# Longest prefix wins: RoIHeads' and RPN's own code (not their sub-modules) is box
# decoding + NMS; for RoIHeads that is the detections' postprocess, for the RPN it
# is part of making proposals.
DEFAULT_STAGE_SCOPES = {
    "preprocess": ("transform",),
    "backbone": ("backbone.body", "backbone"),
    "neck": ("backbone.fpn",),
    "proposals": ("rpn",),
    "roi_heads": ("roi_heads.box_roi_pool", "roi_heads.box_head", "roi_heads.box_predictor",
                  "roi_heads.mask_roi_pool", "roi_heads.mask_head", "roi_heads.mask_predictor"),
    "head": ("head",),
    "postprocess": ("roi_heads", "anchor_generator"),
}


def stage_function(spec):
    """scope -> stage for a ModelSpec (the zoo's stage_of_scope), or torchvision's usual module
    prefixes for a graph that is not a zoo model (spec None)."""
    if spec is not None:
        return lambda scope: stage_of_scope(spec, scope)
    return lambda scope: prefix_stage_of(DEFAULT_STAGE_SCOPES, scope)
