"""External-graph entries in profiles: validation at load time and how the plan maps the knobs."""
import numpy as np
import pytest

from speedbench.errors import UserError
from speedbench.sweep.plan import expand_plan
from speedbench.sweep.profile import parse_profile


def _graph(tmp_path, name="ext", dims=(1, 3, 320, 320), width=7):
    """A dense graph: input image -> predictions [1, 10, width] (constant + 0 x mean(input))."""
    import onnx
    from onnx import TensorProto, helper, numpy_helper

    nodes = [helper.make_node("ReduceMean", ["image"], ["m"], keepdims=0),
             helper.make_node("Mul", ["m", "zero"], ["z"]),
             helper.make_node("Add", ["c", "z"], ["predictions"])]
    inits = [numpy_helper.from_array(np.zeros((), np.float32), "zero"),
             numpy_helper.from_array(np.zeros((1, 10, width), np.float32), "c")]
    graph = helper.make_graph(nodes, name, [helper.make_tensor_value_info("image", TensorProto.FLOAT, list(dims))],
                              [helper.make_tensor_value_info("predictions", TensorProto.FLOAT, [1, 10, width])],
                              initializer=inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    path = tmp_path / f"{name}.onnx"
    onnx.save(model, str(path))
    return path


def _profile(entry: str, sweep: str = 'sizes = ["native", 256]\nproposals = ["default", 50]\nbackends = ["ort", "eager"]'):
    return f"""
[run]
name = "t"
[dataset]
scenes = {{count = 2}}
[sweep]
{sweep}
[[models]]
{entry}
[[threads]]
intra = 1
"""


def _entry(path, size="320", extra="", classes='["bg", "a", "b"]'):
    return f"""id = "mine"
onnx = "{path}"
family = "one-stage"
classes = {classes}
{extra}
[models.adapter.input]
layout = "NCHW"
size = {size}
[models.adapter.output]
kind = "dense"
predictions = "predictions"
"""


def test_fixed_size_graph_plan(tmp_path):
    profile = parse_profile(_profile(_entry(_graph(tmp_path))), "p.toml")
    entry = profile.models[0]
    assert entry.external and entry.weights == "onnx:ext.onnx" and entry.classes == ("bg", "a", "b")
    plan = expand_plan(profile)
    configs = sorted((p.config["size"], p.config["proposals"], p.config["backend"]) for p in plan.points)
    assert configs == [(320, 50, "adapted"), (320, 1000, "adapted")]   # default = nms.candidates
    notes = " | ".join(plan.notes)
    assert "skipped mine at size 256: the graph's input is fixed at 320 x 320" in notes
    assert "skipped mine on backend eager" in notes
    assert all("pre-NMS top-k" in " ".join(p.notes) for p in plan.points)


def test_dynamic_graph_takes_the_size_axis(tmp_path):
    path = _graph(tmp_path, "dyn", dims=(1, 3, "h", "w"))
    profile = parse_profile(_profile(_entry(path, size='"dynamic"\nnative_size = 288'),
                                     'sizes = ["native", 256]'), "p.toml")
    assert sorted(p.config["size"] for p in expand_plan(profile).points) == [256, 288]


def test_resize_none_measured_once_at_size_0(tmp_path):
    path = _graph(tmp_path, "dyn", dims=(1, 3, "h", "w"))
    entry = _entry(path, size='"dynamic"\nresize = "none"')
    plan = expand_plan(parse_profile(_profile(entry, 'sizes = [320, 256]'), "p.toml"))
    assert [p.config["size"] for p in plan.points] == [0]
    assert any("at its own size" in n for n in plan.notes)


def test_proposals_skipped_when_nms_is_in_the_graph(tmp_path):
    import onnx
    from onnx import TensorProto, helper, numpy_helper

    nodes = [helper.make_node("ReduceMean", ["image"], ["m"], keepdims=0),
             helper.make_node("Mul", ["m", "zero"], ["z"]), helper.make_node("Add", ["c", "z"], ["det"])]
    g = helper.make_graph(nodes, "p", [helper.make_tensor_value_info("image", TensorProto.FLOAT, [1, 3, 64, 64])],
                          [helper.make_tensor_value_info("det", TensorProto.FLOAT, [1, 5, 6])],
                          initializer=[numpy_helper.from_array(np.zeros((), np.float32), "zero"),
                                       numpy_helper.from_array(np.zeros((1, 5, 6), np.float32), "c")])
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    m.ir_version = 8
    onnx.save(m, str(tmp_path / "p.onnx"))
    entry = f"""id = "packed"
onnx = "{tmp_path / 'p.onnx'}"
family = "one-stage"
classes = ["a"]
adapter = {{input = {{layout = "NCHW", size = 64}}, output = {{kind = "packed", packed = "det"}}, nms = {{enabled = false}}}}
"""
    plan = expand_plan(parse_profile(_profile(entry, 'proposals = [100, 300]'), "p.toml"))
    assert [p.config["proposals"] for p in plan.points] == [0]
    assert any("NMS runs inside the graph" in n for n in plan.notes)


def test_classes_file(tmp_path):
    (tmp_path / "names.txt").write_text("bg\na\n\nb\n")
    entry = _entry(_graph(tmp_path), classes='[]').replace('classes = []', f'classes_file = "{tmp_path / "names.txt"}"')
    assert parse_profile(_profile(entry), "p.toml").models[0].classes == ("bg", "a", "b")


@pytest.mark.parametrize("change, words", [
    (lambda e, p: e.replace('family = "one-stage"', 'family = "three-stage"'), "models[0].family: 'three-stage'"),
    (lambda e, p: e.replace('classes = ["bg", "a", "b"]', ''), "models[0]: give exactly one of `classes`"),
    (lambda e, p: e.replace('classes = ["bg", "a", "b"]', 'classes = ["bg", "a"]'),
     "models[0].adapter: output: the graph scores 3 classes per box but the model entry names 2"),
    (lambda e, p: e.replace(str(p), str(p) + ".missing"), "models[0].onnx: "),
    (lambda e, p: e.replace('id = "mine"', 'id = "mine"\nweights = "demo"'), "models[0].weights: an external graph"),
    (lambda e, p: e.replace('layout = "NCHW"', 'layout = "NHWC"'),
     "models[0].adapter: input.layout: NHWC puts channels where graph input image [1, 3, 320, 320] has 320"),
    (lambda e, p: e.replace('predictions = "predictions"', 'predictions = "output0"'),
     "models[0].adapter: output.predictions: the graph has no output 'output0' (it has predictions [1, 10, 7])"),
])
def test_bad_external_entry_is_one_line(tmp_path, change, words):
    path = _graph(tmp_path)
    with pytest.raises(UserError) as err:
        parse_profile(_profile(change(_entry(path), path)), "p.toml")
    assert "\n" not in str(err.value) and words in str(err.value), str(err.value)


def test_external_id_must_not_be_a_zoo_id(tmp_path):
    profile = parse_profile(_profile(_entry(_graph(tmp_path)).replace('"mine"', '"demo_ssdlite"')), "p.toml")
    with pytest.raises(UserError, match=r"models\[0\]\.id: 'demo_ssdlite' is a zoo model id"):
        expand_plan(profile)


def test_models_lists_external_entries(tmp_path):
    from speedbench.cli.models import external_rows

    rows = external_rows(parse_profile(_profile(_entry(_graph(tmp_path))), "p.toml"))
    assert [r["id"] for r in rows] == ["mine"]
    assert rows[0]["size_knob"].startswith("input fixed 320x320")
    assert rows[0]["proposal_knob"].startswith("host pre-NMS top-k")
