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
  tensors (walking up), else the control-flow node that holds them.
- If/Loop/Scan nodes own subgraphs whose nodes get their own events while the
  parent's event spans all of them. Each node is counted by its *self* time
  (its time minus its direct children's), so no time is counted twice.

Whatever cannot be tied to a scope is reported as "unattributed". Attribution
is a pure function of (original graph, optimized graph, profile events), so
it can be tested on hand-built graphs.
"""
from __future__ import annotations

import json
from collections import defaultdict

CONTROL_FLOW = ("If", "Loop", "Scan")
KERNEL_SUFFIX = "_kernel_time"


def scope_of_name(name: str) -> str | None:
    """"/backbone/body/features.0/Conv" -> "backbone.body.features.0"; "/Softmax" -> ""; "If_12" -> None."""
    if not name.startswith("/"):
        return None
    parts = name.strip("/").split("/")
    return ".".join(parts[:-1])


class GraphIndex:
    """Names, producers and subgraph parents of every node of an ONNX model (subgraphs included)."""

    def __init__(self, model):
        self.nodes = {}        # name -> NodeProto
        self.producer = {}     # tensor name -> node name
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
        """(scope or None, how it was found: name | fused-name | ancestry | parent | none)."""
        if name not in self._memo:
            self._memo[name] = self._resolve(name)
        return self._memo[name]

    def _resolve(self, name: str):
        if name in self.orig.nodes and scope_of_name(name) is not None:
            return scope_of_name(name), "name"
        if scope_of_name(name) is not None:          # ORT derived the name from an original tensor
            return scope_of_name(name), "fused-name"
        scope = self._ancestry(name)
        if scope is not None:
            return scope, "ancestry"
        parent = self.parent_of(name)
        if parent is not None:
            scope, _ = self.resolve(parent)
            if scope is not None:
                return scope, "parent"
        return None, "none"

    def _tensor_scope(self, tensor: str) -> str | None:
        prod = self.orig.producer.get(tensor)
        if prod is not None and scope_of_name(prod) is not None:
            return scope_of_name(prod)
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
                            return scope_of_name(prod)
                        p = self.node(prod)
                        if p is not None:
                            nxt.append(p)
            if not nxt:
                break
            frontier = nxt
        return None


def load_profile(path) -> list[dict]:
    with open(path) as f:
        return json.load(f)


def run_windows(events: list[dict], last: int | None = None) -> list[tuple[int, int]]:
    """(start, end) in µs of each session.run ("model_run" events), the last `last` of them."""
    runs = sorted((e["ts"], e["ts"] + e["dur"]) for e in events
                  if e.get("cat") == "Session" and e.get("name") == "model_run")
    return runs[-last:] if last else runs


def attribute(events: list[dict], attributor: Attributor, stage_of, last_runs: int | None = None) -> dict:
    """Stage times (ms per run) from profile events.

    stage_of(scope) -> stage name; scope None means unattributed. Only node
    events inside the last `last_runs` model_run windows are used (the earlier
    ones are warm-up). Returns stages, profiled_ms (mean run), node_ms (sum of
    self times per run), coverage (node_ms / profiled_ms) and the slowest nodes.
    """
    windows = run_windows(events, last_runs)
    if not windows:
        raise ValueError("profile has no model_run events")
    starts = [w[0] for w in windows]

    def in_window(ts):
        import bisect

        i = bisect.bisect_right(starts, ts) - 1
        return i >= 0 and ts <= windows[i][1]

    total = defaultdict(float)                       # node name -> summed µs over the windows
    for e in events:
        if e.get("cat") != "Node" or not e.get("name", "").endswith(KERNEL_SUFFIX):
            continue
        if in_window(e["ts"]):
            total[e["name"][: -len(KERNEL_SUFFIX)]] += e["dur"]

    # Self time: a control-flow node's event includes its subgraph's node events.
    child_sum = defaultdict(float)
    for name, us in total.items():
        parent = attributor.parent_of(name)
        if parent is not None and parent in total:
            child_sum[parent] += us
    self_us = {name: max(0.0, us - child_sum.get(name, 0.0)) for name, us in total.items()}

    n = len(windows)
    stages = defaultdict(float)
    how = defaultdict(float)
    per_node = []
    for name, us in self_us.items():
        scope, method = attributor.resolve(name)
        stage = "unattributed" if scope is None else stage_of(scope)
        stages[stage] += us / n / 1000
        how[method] += us / n / 1000
        per_node.append((us / n / 1000, name, stage))
    run_ms = sum(b - a for a, b in windows) / n / 1000
    node_ms = sum(stages.values())
    per_node.sort(reverse=True)
    return {
        "stages": dict(stages),
        "profiled_ms": run_ms,
        "run_ms": [(b - a) / 1000 for a, b in windows],
        "node_ms": node_ms,
        "naive_node_ms": sum(total.values()) / n / 1000,   # parents and children both counted (wrong)
        "coverage": node_ms / run_ms if run_ms > 0 else float("nan"),
        "resolved_by": dict(how),
        "top_nodes": [{"node": nm, "stage": st, "ms": round(ms, 4)} for ms, nm, st in per_node[:10]],
    }


def prefix_stage_of(stage_scopes: dict, scope: str) -> str:
    """Fallback scope -> stage by the longest matching module-path prefix of spec.stage_scopes.

    A leading wrapper component (the exporter's own module) is tolerated. Code
    at the detector's top level (not inside any stage module) is box decoding
    and NMS in torchvision's one-stage detectors, so it counts as postprocess.
    """
    parts = scope.split(".") if scope else []
    best, best_len = None, -1
    for start in (0, 1):
        cand = ".".join(parts[start:])
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
    """scope -> stage for a ModelSpec (or None): the zoo's stage_of_scope when it exists, else prefixes."""
    try:
        from speedbench.zoo import stage_of_scope
    except ImportError:
        stage_of_scope = None
    if stage_of_scope is not None and spec is not None:
        return lambda scope: stage_of_scope(spec, scope)
    scopes = dict(getattr(spec, "stage_scopes", None) or DEFAULT_STAGE_SCOPES)
    return lambda scope: prefix_stage_of(scopes, scope)
