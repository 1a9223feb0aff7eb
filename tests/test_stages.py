"""Stage attribution: profiled node times -> stages, counted once each.

Checks against things outside speedbench: ONNX Runtime's own profiler output
(on a graph built with onnx.helper and on a torchvision detector exported with
torch.onnx), and sums worked by hand in the comments.
"""
import json
import os
import tempfile
import types
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper

from speedbench.measure.stages import (DEFAULT_STAGE_SCOPES, Attributor, attribute, prefix_stage_of,
                                       scope_of_name)

SCOPES = {"backbone": ("backbone.body",), "head": ("head",), "postprocess": ("postprocess",)}


def stage_of(scope):
    return prefix_stage_of(SCOPES, scope)


def if_graph() -> onnx.ModelProto:
    """x -> /backbone/body/Relu -> /head/Mul -> If_5 (unscoped, like torchvision's batched_nms) -> y.

    The If's else-branch holds an unscoped node "Sub_9" and a node "/postprocess/Neg" with a scope.
    """
    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, [4])
    y = helper.make_tensor_value_info("y", TensorProto.FLOAT, [4])
    two = helper.make_tensor("two", TensorProto.FLOAT, [1], [2.0])
    then_out = helper.make_tensor_value_info("t_out", TensorProto.FLOAT, [4])
    else_out = helper.make_tensor_value_info("e_out", TensorProto.FLOAT, [4])
    then_g = helper.make_graph([helper.make_node("Identity", ["m"], ["t_out"], name="Identity_7")],
                               "then", [], [then_out])
    else_g = helper.make_graph([helper.make_node("Sub", ["m", "m"], ["e_mid"], name="Sub_9"),
                                helper.make_node("Neg", ["e_mid"], ["e_out"], name="/postprocess/Neg")],
                               "else", [], [else_out])
    nodes = [
        helper.make_node("Relu", ["x"], ["r"], name="/backbone/body/Relu"),
        helper.make_node("Mul", ["r", "two"], ["m"], name="/head/Mul"),
        helper.make_node("ReduceSum", ["m"], ["s"], name="/head/ReduceSum", keepdims=0),
        helper.make_node("Greater", ["s", "two"], ["c1"], name="Greater_4"),
        helper.make_node("Squeeze", ["c1"], ["c"], name="Squeeze_4"),
        helper.make_node("If", ["c"], ["y"], name="If_5", then_branch=then_g, else_branch=else_g),
    ]
    graph = helper.make_graph(nodes, "g", [x], [y], initializer=[two])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    onnx.checker.check_model(model)
    return model


def ev(name, ts, dur, cat="Node"):
    return {"cat": cat, "name": name if cat != "Node" else f"{name}_kernel_time", "ts": ts, "dur": dur,
            "ph": "X", "args": {}}


def test_scope_of_name():
    # the TorchScript exporter repeats the parent's name for numbered children
    assert scope_of_name("/backbone/body/layer1/layer1.0/conv1/Conv") == "backbone.body.layer1.0.conv1"
    assert scope_of_name("/Softmax") == ""
    assert scope_of_name("If_12") is None
    # ORT's NCHWc conv is named after its output tensor; the scope survives
    assert scope_of_name("/head/cls/Conv_output_0_nchwc") == "head.cls"


def test_prefix_stage_of_longest_prefix_and_wrapper():
    assert prefix_stage_of(DEFAULT_STAGE_SCOPES, "backbone.fpn.inner_blocks.0") == "neck"
    assert prefix_stage_of(DEFAULT_STAGE_SCOPES, "backbone.body.layer1") == "backbone"
    assert prefix_stage_of(DEFAULT_STAGE_SCOPES, "roi_heads.box_head.fc6") == "roi_heads"
    assert prefix_stage_of(DEFAULT_STAGE_SCOPES, "roi_heads") == "postprocess"
    assert prefix_stage_of(DEFAULT_STAGE_SCOPES, "model.rpn.head") == "proposals"   # exporter wrapper module
    assert prefix_stage_of(DEFAULT_STAGE_SCOPES, "model") == "postprocess"          # detector's own top level
    assert prefix_stage_of(DEFAULT_STAGE_SCOPES, "/backbone/fpn/layer_blocks.0/Conv") == "neck"


def test_handcrafted_profile_counts_if_subgraph_once():
    model = if_graph()
    # One warm-up run (ts 0..100) and two measured runs. In each measured run the If
    # node's event (40 µs) spans its children Sub_9 (10) + /postprocess/Neg (20).
    events = [ev("model_run", 0, 100, "Session"), ev("/backbone/body/Relu", 5, 90)]
    for start in (1000, 2000):
        events += [ev("model_run", start, 100, "Session"),
                   ev("/backbone/body/Relu", start + 2, 30),     # 2 µs before it: edge, unattributed
                   ev("/head/Mul", start + 35, 10),             # 3 µs gap -> charged to /head/Mul
                   ev("/head/ReduceSum", start + 45, 5),
                   ev("Greater_4", start + 50, 1), ev("Squeeze_4", start + 51, 1),
                   ev("If_5", start + 55, 40),                  # 3 µs gap -> charged to If_5
                   ev("Sub_9", start + 60, 10), ev("/postprocess/Neg", start + 72, 20)]
        # 5 µs after If_5 ends (start+95 .. start+100): edge, unattributed
    out = attribute(events, Attributor(model), stage_of, last_runs=2)
    ms = 1e-3
    # Kernel self times per run: Relu 30 | Mul 10 + ReduceSum 5 | Greater 1 + Squeeze 1 (ancestry: they
    # consume /head/ReduceSum's output -> head) + If self 40-30=10 (If_5 unscoped -> ancestry -> head)
    # + Sub_9 10 (unscoped, inside If -> ancestry of its input m -> head) | Neg 20 (postprocess).
    assert out["kernel_stages"]["backbone"] == pytest.approx(30 * ms)
    assert out["kernel_stages"]["head"] == pytest.approx((10 + 5 + 1 + 1 + 10 + 10) * ms)
    assert out["kernel_stages"]["postprocess"] == pytest.approx(20 * ms)
    assert out["kernel_ms"] == pytest.approx(87 * ms)
    assert out["naive_node_ms"] == pytest.approx(117 * ms)   # If and its children both counted
    assert out["subgraph_ms"] == pytest.approx(30 * ms)
    # Dispatch gaps between top-level nodes: before Mul 35-32=3, ReduceSum 45-45=0, Greater 50-50=0,
    # Squeeze 51-51=0, If 55-52=3 -> head +6; Sub_9 and Neg are inside If_5, so no gap of their own.
    assert out["stages"]["head"] == pytest.approx((37 + 6) * ms)
    assert out["stages"]["unattributed"] == pytest.approx((2 + 5) * ms)
    assert out["profiled_ms"] == pytest.approx(100 * ms)
    assert out["stage_sum_ms"] == pytest.approx(100 * ms)     # a partition of the run
    assert out["coverage"] == pytest.approx(1.0)


def test_ort_inserted_node_resolved_by_ancestry_or_unattributed():
    original = if_graph()
    optimized = onnx.ModelProto()
    optimized.CopyFrom(original)
    # a node ORT might insert: reads the backbone's output tensor "r"
    optimized.graph.node.insert(1, helper.make_node("Identity", ["r"], ["r2"], name="ReorderInput_token_3"))
    # and one with no tie to anything in the original graph
    optimized.graph.node.insert(1, helper.make_node("Identity", ["nowhere"], ["zz"], name="MemcpyX_1"))
    # an unscoped Identity that feeds a weight to a scoped node: its consumer decides
    optimized.graph.node.insert(0, helper.make_node("Identity", ["two"], ["two_copy"], name="Identity_1"))
    optimized.graph.node.append(helper.make_node("Mul", ["r", "two_copy"], ["m3"], name="/head/Mul_3"))
    # a fusion ORT names after the original node it replaced
    optimized.graph.node.insert(1, helper.make_node("Identity", ["s"], ["s2"], name="/head/ReduceSum/SomeFusion"))
    att = Attributor(original, optimized)
    assert att.resolve("/head/ReduceSum/SomeFusion") == ("/head/ReduceSum", "fused-name")
    assert att.resolve("Identity_1") == ("/head/Mul_3", "consumer")
    assert att.resolve("ReorderInput_token_3") == ("/backbone/body/Relu", "ancestry")
    assert att.resolve("MemcpyX_1") == (None, "none")
    assert att.resolve("Sub_9")[0] == "/head/Mul"
    events = [ev("model_run", 0, 50, "Session"), ev("MemcpyX_1", 0, 10), ev("ReorderInput_token_3", 10, 10)]
    out = attribute(events, att, stage_of)
    assert out["kernel_stages"] == {"unattributed": pytest.approx(0.01), "backbone": pytest.approx(0.01)}


def test_real_ort_profile_of_if_graph_has_parent_and_child_events(tmp_path):
    """ORT itself reports the If node and its subgraph nodes; attribution must not add both."""
    import onnxruntime as ort

    path = tmp_path / "if.onnx"
    onnx.save(if_graph(), path)
    so = ort.SessionOptions()
    so.enable_profiling = True
    so.log_severity_level = 3
    so.profile_file_prefix = str(tmp_path / "prof")
    so.optimized_model_filepath = str(tmp_path / "opt.onnx")
    sess = ort.InferenceSession(str(path), so, providers=["CPUExecutionProvider"])
    x = np.array([1, 2, 3, 4], dtype=np.float32)      # sum(2x) = 20 > 2: c is true -> then_branch
    for _ in range(3):
        sess.run(None, {"x": x})
    events = json.loads(Path(sess.end_profiling()).read_text())
    names = {e["name"] for e in events if e.get("cat") == "Node"}
    assert "If_5_kernel_time" in names and "Identity_7_kernel_time" in names
    out = attribute(events, Attributor(if_graph(), onnx.load(tmp_path / "opt.onnx")), stage_of, last_runs=2)
    assert out["kernel_ms"] < out["naive_node_ms"]
    assert out["stage_sum_ms"] <= out["profiled_ms"] + 1e-9


# --- a real detector -------------------------------------------------------------------------

def ssdlite_graph() -> str:
    """ssdlite320 (weights=None) exported at 128 px; cached across test files in the temp dir.

    Untrained, every score is exactly 1/91 (the backbone's features vanish), so NMS gets
    all candidates or none. Seeded random class biases and score_thresh 0.08 let ~270
    boxes through: NMS inside batched_nms's If subgraph runs, at a test-friendly cost.
    """
    cache = Path(tempfile.gettempdir()) / "speedbench-test-graphs"
    cache.mkdir(exist_ok=True)
    import torch

    path = cache / f"ssdlite128_bias_t008_torch{torch.__version__}.onnx"
    if path.exists():
        return str(path)
    from torchvision.models.detection import ssdlite320_mobilenet_v3_large

    torch.manual_seed(0)
    model = ssdlite320_mobilenet_v3_large(weights=None, weights_backbone=None, score_thresh=0.08).eval()
    model.transform.fixed_size = (128, 128)
    for mod in model.head.classification_head.modules():
        if isinstance(mod, torch.nn.Conv2d) and mod.bias is not None:
            torch.nn.init.normal_(mod.bias, std=1.0)

    def forward(self, image):   # graph I/O contract of DEVELOPERS.md, scopes relative to the detector
        out = type(self).forward(self, [image])[0]
        return out["boxes"], out["scores"], out["labels"]

    model.forward = types.MethodType(forward, model)
    tmp = path.with_suffix(f".tmp{os.getpid()}")
    torch.onnx.export(model, (torch.rand(3, 96, 128),), str(tmp), input_names=["image"],
                      output_names=["boxes", "scores", "labels"], dynamic_axes={"image": {1: "H", 2: "W"}},
                      opset_version=17, dynamo=False)
    os.replace(tmp, path)
    return str(path)


def scenes(n=3, h=96, w=128):
    """Structured images (shapes on a gradient), not noise: NMS cost depends on content."""
    rng = np.random.default_rng(0)
    out = []
    for _ in range(n):
        img = np.zeros((h, w, 3), np.uint8)
        img[:] = np.linspace(40, 200, w, dtype=np.uint8)[None, :, None]
        for _ in range(4):
            y, x = rng.integers(0, h - 20), rng.integers(0, w - 20)
            img[y:y + rng.integers(8, 20), x:x + rng.integers(8, 20)] = rng.integers(0, 255, 3)
        out.append(img)
    return out


def test_real_ssdlite_stages_reconcile():
    from speedbench.measure import Point, Policy, measure_point

    point = Point(model="ssdlite320_mobilenet_v3_large", size=128, backend="ort", graph=ssdlite_graph())
    res = measure_point(point, scenes(), Policy(warmup_max=5, min_reps=5, max_reps=15, max_seconds=2,
                                                profile_reps=3), timeout_s=300)
    assert res.ok, res.reason
    prof = res.extra["profile"]
    # reconciliation: the stages sum to at most the profiled run and at least 90 % of it
    total = sum(res.stages.values())
    assert 0.9 * res.profiled_ms <= total <= res.profiled_ms * (1 + 1e-9)
    assert res.stages["backbone"] > 0 and res.stages["head"] > 0 and res.stages["preprocess"] > 0
    # the If subgraph (batched_nms's empty check) really is in the profile and counted once
    assert prof["subgraph_ms"] > 0.01
    assert prof["naive_node_ms"] == pytest.approx(prof["kernel_ms"] + prof["subgraph_ms"])
    assert prof["kernel_coverage"] <= 1.0 + 1e-9
    # everything the exporter scoped or ORT fused got a scope
    assert res.stages.get("unattributed", 0) < 0.1 * res.profiled_ms
    row = res.to_row()
    assert row["stage_backbone_profiled_ms"] == res.stages["backbone"] and row["profiled_ms"] == res.profiled_ms
    # the row's stage ms: the profiled split scaled onto the unprofiled median (issue 18)
    assert sum(row[f"stage_{s}_ms"] for s in res.stages) == pytest.approx(res.measurement.median)
    assert np.isfinite(row["profiling_overhead"])
    assert row["model_file_mib"] == pytest.approx(os.path.getsize(point.graph) / 2**20)


def test_eager_stages_via_hooks_cover_the_run():
    """PyTorch eager: the same stages through forward hooks on the zoo's stage modules."""
    from speedbench.measure import Point, Policy, measure_point

    point = Point(model="ssdlite320_mobilenet_v3_large", size=128, backend="eager", exec_mode="", opt_level="")
    res = measure_point(point, scenes(), Policy(warmup_max=3, min_reps=3, max_reps=5, max_seconds=1,
                                                profile_reps=2), timeout_s=300)
    assert res.ok, res.reason
    for stage in ("preprocess", "backbone", "neck", "head", "postprocess"):
        assert res.stages.get(stage, 0) > 0, stage
    # exclusive timing: the stages (with top-level glue as unattributed) add up to the profiled run
    assert sum(res.stages.values()) == pytest.approx(res.profiled_ms, rel=1e-6)
    assert res.stages["unattributed"] < 0.1 * res.profiled_ms
