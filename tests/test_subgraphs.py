"""Cutting a graph into per-stage sub-graphs (issue 18, item 2)."""
import numpy as np
import onnx
import onnxruntime as ort
import pytest
from onnx import TensorProto as T
from onnx import helper

from speedbench.measure.stages import prefix_stage_of
from speedbench.measure.subgraphs import (StageCuts, boundary_tensors, extract, node_stages, plan_cuts,
                                          time_stage_subgraphs, with_outputs)

SCOPES = {"preprocess": ("transform",), "backbone": ("backbone",), "head": ("head",)}


def stage_of(scope):
    return prefix_stage_of(SCOPES, scope)


def _model():
    """image -> transform (Mul) -> backbone (Conv, Relu) -> head (Conv) -> top level (If: keep or zero the
    scores) -> transform again (boxes scaled back). Built with onnx.helper, as the exporter names nodes."""
    rng = np.random.default_rng(0)
    w1 = helper.make_tensor("w1", T.FLOAT, [4, 3, 3, 3], rng.standard_normal(108).astype(np.float32))
    w2 = helper.make_tensor("w2", T.FLOAT, [2, 4, 1, 1], rng.standard_normal(8).astype(np.float32))
    half = helper.make_tensor("half", T.FLOAT, [], [0.5])
    two = helper.make_tensor("two", T.FLOAT, [], [2.0])
    zero = helper.make_tensor("zero", T.FLOAT, [], [0.0])
    then_g = helper.make_graph([helper.make_node("Identity", ["h"], ["then_out"], name="then_id")], "then", [],
                               [helper.make_tensor_value_info("then_out", T.FLOAT, [1, 2, 8, 8])])
    else_g = helper.make_graph([helper.make_node("Mul", ["h", "zero"], ["else_out"], name="else_mul")], "else", [],
                               [helper.make_tensor_value_info("else_out", T.FLOAT, [1, 2, 8, 8])])
    nodes = [
        helper.make_node("Mul", ["image", "half"], ["x"], name="/transform/Mul"),
        helper.make_node("Conv", ["x", "w1"], ["c1"], name="/backbone/body/conv/Conv", pads=[1, 1, 1, 1]),
        helper.make_node("Relu", ["c1"], ["f"], name="/backbone/body/relu/Relu"),
        helper.make_node("Conv", ["f", "w2"], ["h"], name="/head/cls/Conv"),
        helper.make_node("ReduceMax", ["h"], ["m"], name="/ReduceMax", keepdims=0),
        helper.make_node("Greater", ["m", "zero"], ["cond"], name="/Greater"),
        helper.make_node("If", ["cond"], ["scores"], then_branch=then_g, else_branch=else_g),  # unnamed
        helper.make_node("Mul", ["scores", "two"], ["boxes"], name="/transform/Mul_1"),
    ]
    g = helper.make_graph(nodes, "toy", [helper.make_tensor_value_info("image", T.FLOAT, [1, 3, 8, 8])],
                          [helper.make_tensor_value_info("boxes", T.FLOAT, [1, 2, 8, 8])],
                          initializer=[w1, w2, half, two, zero])
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    onnx.checker.check_model(m)
    return m


def _session(blob):
    so = ort.SessionOptions()
    so.intra_op_num_threads = 1
    return ort.InferenceSession(blob, so, providers=["CPUExecutionProvider"])


def test_cuts_follow_the_stages_and_carry_the_if_with_its_outer_inputs():
    m = _model()
    cuts = StageCuts(m, stage_of, [{"image": np.ones((1, 3, 8, 8), np.float32)}], _session)
    by = {c.stage: c for c in cuts.cuts}
    assert set(by) == {"preprocess", "backbone", "head", "postprocess"}
    # the transform resizes at the start and scales boxes at the end: one sub-graph, both parts
    assert by["preprocess"].inputs == ["image", "scores"] and by["preprocess"].outputs == ["x", "boxes"]
    assert by["backbone"].inputs == ["x"] and by["backbone"].outputs == ["f"]
    # the If reads "h" from the enclosing graph only inside its branches: still a boundary input
    assert by["postprocess"].inputs == ["h"] and by["postprocess"].control_flow == 1
    assert set(boundary_tensors(m, cuts.cuts)) == {"x", "f", "h", "scores"}


def test_sub_graph_outputs_equal_the_whole_graphs_intermediate_tensors_exactly():
    m = _model()
    rng = np.random.default_rng(1)
    feeds = [{"image": rng.standard_normal((1, 3, 8, 8)).astype(np.float32)} for _ in range(3)]
    cuts = StageCuts(m, stage_of, feeds, _session)
    # Reference: the intermediate tensors of the *unmodified* graph, read with onnx's own reference
    # evaluator (onnx.reference, outside speedbench and outside onnxruntime).
    from onnx.reference import ReferenceEvaluator

    names = boundary_tensors(m, cuts.cuts) + ["boxes"]
    ref = ReferenceEvaluator(with_outputs(_model(), names))
    for feed, values in zip(feeds, cuts.values):
        want = dict(zip([o.name for o in ref.proto_.graph.output], ref.run(None, feed)))
        for c in cuts.cuts:
            got = _session(cuts.subs[c.stage].SerializeToString()).run(c.outputs, {n: values[n] for n in c.inputs})
            for name, value in zip(c.outputs, got):
                np.testing.assert_array_equal(value, values[name])          # bit for bit vs the whole graph
                np.testing.assert_allclose(value, want[name], rtol=1e-5, atol=1e-6)  # and vs onnx.reference
    assert all(d == 0.0 for d in cuts.check().values())


def test_a_contiguous_stage_matches_onnx_utils_extractor():
    # Reference: onnx.utils.Extractor cuts the same tensors into the same node set.
    from onnx.utils import Extractor

    m = onnx.shape_inference.infer_shapes(_model())
    cuts = plan_cuts(m, node_stages(m, stage_of))
    backbone = [c for c in cuts if c.stage == "backbone"][0]
    ref = Extractor(m).extract_model(backbone.inputs, backbone.outputs)
    ours = extract(m, backbone, {"x": np.zeros(1, np.float32)})
    assert [n.name for n in ours.graph.node] == [n.name for n in ref.graph.node]
    assert sorted(i.name for i in ours.graph.initializer) == sorted(i.name for i in ref.graph.initializer)


def test_timing_reports_every_stage_and_the_residual():
    m = _model()
    feeds = [{"image": np.ones((1, 3, 8, 8), np.float32)}]
    out = time_stage_subgraphs(m, stage_of, feeds, _session, _session(m.SerializeToString()), reps=3)
    assert set(out["stages"]) == {"preprocess", "backbone", "head", "postprocess"}
    assert out["sum_ms"] == pytest.approx(sum(out["stages"].values()))
    assert out["residual"] == pytest.approx(out["sum_ms"] / out["whole_ms"] - 1)
    assert out["cuts"]["postprocess"]["control_flow"] == 1


def test_the_opt_in_check_runs_in_the_worker_and_lands_in_the_row(tmp_path):
    # The real worker path: a graph with the `image` [3, H, W] input every exported graph has.
    from speedbench.measure import Point, Policy, measure_point

    m = _model()
    g = m.graph
    g.input[0].CopyFrom(helper.make_tensor_value_info("image", T.FLOAT, [3, 8, 8]))
    g.initializer.append(helper.make_tensor("axes0", T.INT64, [1], [0]))
    g.node.insert(0, helper.make_node("Unsqueeze", ["image", "axes0"], ["image4"], name="/transform/Unsqueeze"))
    g.node[1].input[0] = "image4"
    path = tmp_path / "toy.onnx"
    onnx.save(m, path)
    img = np.random.default_rng(2).integers(0, 255, (8, 8, 3), dtype=np.uint8)
    policy = Policy(warmup_min=1, warmup_max=2, min_reps=3, max_reps=5, profile_reps=2,
                    subgraph_check=True, subgraph_reps=3)
    res = measure_point(Point(model="toy", graph=str(path)), [img], policy, timeout_s=120)
    assert res.ok, res.reason
    sg = res.extra["subgraphs"]
    assert "error" not in sg and set(sg["stages"]) == {"preprocess", "backbone", "head", "postprocess"}
    assert all(d == 0.0 for d in sg["max_abs_diff"].values())
    row = res.to_row()
    assert row["stage_backbone_subgraph_ms"] == sg["stages"]["backbone"]
    assert row["subgraph_residual"] == pytest.approx(sg["residual"])
    off = measure_point(Point(model="toy", graph=str(path)), [img],
                        Policy(warmup_min=1, warmup_max=2, min_reps=3, max_reps=5, profile_reps=2), timeout_s=120)
    assert "subgraphs" not in off.extra and np.isnan(off.to_row()["subgraph_residual"])
