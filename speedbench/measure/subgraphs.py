"""An independent check of the stage split: the graph cut into one sub-graph per stage, each timed alone.

The stage times of a point come from the profiler (its split, scaled onto the
unprofiled median). This check does not use the profiler at all:

1. Every top-level node of the exported graph gets its stage through the same
   module-scope attribution as the profile (speedbench.measure.stages).
2. The graph is cut at the stage-boundary tensors: each stage's nodes become a
   sub-graph whose inputs are the tensors it takes from other stages (or the
   graph input) and whose outputs are the tensors other stages (or the graph's
   outputs) take from it. A stage need not be contiguous (the model's transform
   resizes at the start and maps boxes back at the end): its sub-graph holds
   both parts.
3. The whole graph runs once per timing image with every boundary tensor added
   as an output; those values feed the sub-graphs, so each one does exactly the
   work it does inside the whole graph (the same proposals, the same NMS input).
4. Each sub-graph and the whole graph get their own session with the point's
   session options (no profiler) and are timed round-robin (so a drift of the
   host hits all of them alike); sum of sub-graph medians vs the whole graph's
   median gives the residual.

What cannot be cut: nodes inside If/Loop bodies stay with their control-flow
node, whose stage is the If/Loop node's own (a body that mixes stages is
charged to one). What the residual contains besides a wrong split: each
sub-graph's own session.run overhead, and optimisations across a boundary
that the cut prevents (a fused Conv+activation split in two, a layout change
to ORT's blocked format and back at every boundary).
"""
from __future__ import annotations

import statistics
import time
from dataclasses import dataclass, field

import numpy as np

CONTROL_FLOW = ("If", "Loop", "Scan")


@dataclass
class Cut:
    """One stage's sub-graph: indices of its top-level nodes, and its boundary tensors."""
    stage: str
    nodes: list = field(default_factory=list)
    inputs: list = field(default_factory=list)
    outputs: list = field(default_factory=list)
    control_flow: int = 0       # If/Loop/Scan nodes kept whole inside this stage


def outer_refs(graph) -> set:
    """Names a (sub)graph reads from an enclosing scope: used but not defined inside it."""
    import onnx

    defined = {i.name for i in graph.input} | {i.name for i in graph.initializer}
    used = set()
    for node in graph.node:
        used.update(t for t in node.input if t)
        for attr in node.attribute:
            if attr.type == onnx.AttributeProto.GRAPH:
                used |= outer_refs(attr.g)
            elif attr.type == onnx.AttributeProto.GRAPHS:
                for g in attr.graphs:
                    used |= outer_refs(g)
        defined.update(t for t in node.output if t)
    used.update(o.name for o in graph.output)
    return used - defined


def node_inputs(node) -> list:
    """A node's explicit inputs, then what its If/Loop bodies read from the enclosing graph."""
    import onnx

    names = [t for t in node.input if t]
    implicit = set()
    for attr in node.attribute:
        if attr.type == onnx.AttributeProto.GRAPH:
            implicit |= outer_refs(attr.g)
        elif attr.type == onnx.AttributeProto.GRAPHS:
            for g in attr.graphs:
                implicit |= outer_refs(g)
    return names + sorted(implicit - set(names))


def name_nodes(model) -> None:
    """Give unnamed top-level nodes unique names (in place), so attribution can refer to them."""
    taken = {n.name for n in model.graph.node if n.name}
    for i, node in enumerate(model.graph.node):
        if not node.name:
            name = f"{node.op_type}_cut_{i}"
            while name in taken:
                name += "_"
            node.name = name
            taken.add(name)


def node_stages(model, stage_of) -> list[str]:
    """Stage of each top-level node (stage_of: module scope -> stage), as the profile attributes it."""
    from speedbench.measure.stages import Attributor

    att = Attributor(model, None)
    out = []
    for node in model.graph.node:
        scope, _ = att.resolve(node.name)
        out.append("unattributed" if scope is None else stage_of(scope))
    return out


def plan_cuts(model, stages: list[str]) -> list[Cut]:
    """One Cut per stage present, in the order stages first appear in the graph."""
    inits = {i.name for i in model.graph.initializer}
    graph_outputs = {o.name for o in model.graph.output}
    producer = {}
    for i, node in enumerate(model.graph.node):
        for t in node.output:
            if t:
                producer[t] = i
    consumers: dict = {}
    for i, node in enumerate(model.graph.node):
        for t in node_inputs(node):
            consumers.setdefault(t, set()).add(i)
    cuts: dict[str, Cut] = {}
    for i, node in enumerate(model.graph.node):
        cut = cuts.setdefault(stages[i], Cut(stages[i]))
        cut.nodes.append(i)
        cut.control_flow += node.op_type in CONTROL_FLOW
    for cut in cuts.values():
        mine = set(cut.nodes)
        ins, outs = [], []
        for i in cut.nodes:
            for t in node_inputs(model.graph.node[i]):
                if t not in inits and producer.get(t) not in mine and t not in ins:
                    ins.append(t)
            for t in model.graph.node[i].output:
                if t and (t in graph_outputs or (consumers.get(t, set()) - mine)) and t not in outs:
                    outs.append(t)
        cut.inputs, cut.outputs = ins, outs
    return [c for c in cuts.values() if c.outputs]


def boundary_tensors(model, cuts: list[Cut]) -> list[str]:
    """Every tensor some sub-graph takes as input, except the graph's own inputs."""
    graph_inputs = {i.name for i in model.graph.input}
    seen: list = []
    for c in cuts:
        for t in c.inputs:
            if t not in graph_inputs and t not in seen:
                seen.append(t)
    return seen


def with_outputs(model, names: list[str]):
    """A copy of the model that also outputs `names` (untyped: the runtime infers them)."""
    import onnx

    m = onnx.ModelProto()
    m.CopyFrom(model)
    have = {o.name for o in m.graph.output}
    for n in names:
        if n not in have:
            m.graph.output.append(onnx.ValueInfoProto(name=n))
    return m


def extract(model, cut: Cut, sample: dict):
    """The sub-graph of one cut as a model; `sample` gives each input's value (for its element type)."""
    import onnx
    from onnx import helper

    nodes = [model.graph.node[i] for i in cut.nodes]
    needed = set()
    for n in nodes:
        needed.update(node_inputs(n))
    inits = [t for t in model.graph.initializer if t.name in needed]
    inputs = []
    for name in cut.inputs:
        value = np.asarray(sample[name])
        inputs.append(helper.make_tensor_value_info(name, helper.np_dtype_to_tensor_dtype(value.dtype), None))
    outputs = [onnx.ValueInfoProto(name=n) for n in cut.outputs]
    graph = helper.make_graph(nodes, f"stage_{cut.stage}", inputs, outputs, initializer=inits)
    sub = helper.make_model(graph, opset_imports=list(model.opset_import), ir_version=model.ir_version)
    sub.functions.extend(model.functions)
    return sub


class StageCuts:
    """The graph cut by stage, with each sub-graph's inputs captured for a list of feeds."""

    def __init__(self, model, stage_of, feeds: list[dict], session):
        """session(model_bytes) -> an InferenceSession with the point's options."""
        self.model = model
        name_nodes(model)
        self.cuts = plan_cuts(model, node_stages(model, stage_of))
        names = boundary_tensors(model, self.cuts)
        capture = session(with_outputs(model, names).SerializeToString())
        out_names = [o.name for o in capture.get_outputs()]
        self.values = []            # per feed: tensor name -> value (boundary tensors and graph outputs)
        for feed in feeds:
            got = dict(zip(out_names, capture.run(None, feed)))
            got.update(feed)
            self.values.append(got)
        self.feeds = feeds
        self.subs = {c.stage: extract(model, c, self.values[0]) for c in self.cuts}
        self.session = session

    def sub_feeds(self, cut: Cut) -> list[dict]:
        return [{n: v[n] for n in cut.inputs} for v in self.values]

    def check(self) -> dict:
        """Max |sub-graph output - the whole graph's tensor| per stage, on the first feed."""
        diffs = {}
        for c in self.cuts:
            sess = self.session(self.subs[c.stage].SerializeToString())
            got = sess.run(c.outputs, self.sub_feeds(c)[0])
            worst = 0.0
            for name, value in zip(c.outputs, got):
                ref = self.values[0].get(name)
                if ref is None:
                    continue
                a, b = np.asarray(value), np.asarray(ref)
                if a.shape != b.shape:
                    worst = float("inf")
                elif a.size:
                    worst = max(worst, float(np.max(np.abs(a.astype(np.float64) - b.astype(np.float64)))))
            diffs[c.stage] = worst
        return diffs

    def time(self, whole_session, reps: int, warmup: int = 3) -> dict:
        """Median ms of each sub-graph alone and of the whole graph, timed round-robin."""
        runners = [(c.stage, self.session(self.subs[c.stage].SerializeToString()), self.sub_feeds(c))
                   for c in self.cuts]
        runners.append(("__whole__", whole_session, self.feeds))
        samples = {name: [] for name, _, _ in runners}
        n = len(self.feeds)
        for r in range(warmup + reps):
            for name, sess, feeds in runners:
                feed = feeds[r % n]
                t0 = time.perf_counter()
                sess.run(None, feed)
                dt = (time.perf_counter() - t0) * 1000
                if r >= warmup:
                    samples[name].append(dt)
        med = {name: statistics.median(v) for name, v in samples.items()}
        whole = med.pop("__whole__")
        total = sum(med.values())
        return {"stages": med, "sum_ms": total, "whole_ms": whole,
                "residual": total / whole - 1 if whole > 0 else float("nan"), "reps": reps,
                "cuts": {c.stage: {"nodes": len(c.nodes), "inputs": len(c.inputs), "outputs": len(c.outputs),
                                   "control_flow": c.control_flow} for c in self.cuts}}


def time_stage_subgraphs(model, stage_of, feeds: list[dict], session, whole_session, reps: int = 20) -> dict:
    """Cut, check and time: the result a point records under extra["subgraphs"]."""
    cuts = StageCuts(model, stage_of, feeds, session)
    out = cuts.time(whole_session, reps)
    out["max_abs_diff"] = cuts.check()
    out["method"] = ("graph cut at stage-boundary tensors; each stage's sub-graph timed alone on the whole "
                     "graph's own boundary values, same session options, no profiler, round-robin with the "
                     "whole graph; residual = sum of sub-graph medians / whole-graph median - 1")
    return out
