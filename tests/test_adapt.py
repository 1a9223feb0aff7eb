"""External graphs with adapters: host pre/postprocessing on small graphs built with onnx.helper,
checked against torchvision.ops / torch.nn.functional, and strict adapter validation."""
import numpy as np
import pytest

from speedbench.adapt import AdaptedGraph, check_graph, parse_adapter
from speedbench.adapt import host
from speedbench.adapt.stages import FALLBACK_NOTE, node_stages, scoped_copy, stage_lookup
from speedbench.errors import UserError


# ----------------------------------------------------------------- small graphs
def _save(tmp_path, name, nodes, inputs, outputs, inits=()):
    import onnx
    from onnx import helper

    graph = helper.make_graph(nodes, name, inputs, outputs, initializer=list(inits))
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.checker.check_model(model)
    path = tmp_path / f"{name}.onnx"
    onnx.save(model, str(path))
    return path


def _const_graph(tmp_path, name, outputs: dict, in_shape, in_type=None):
    """A graph whose outputs are constants plus 0 x mean(input), so the input is really consumed."""
    from onnx import TensorProto, helper, numpy_helper

    in_type = TensorProto.FLOAT if in_type is None else in_type
    nodes = [helper.make_node("Cast", ["image"], ["f"], to=TensorProto.FLOAT),
             helper.make_node("ReduceMean", ["f"], ["m"], keepdims=0),
             helper.make_node("Mul", ["m", "zero"], ["z"])]
    inits = [numpy_helper.from_array(np.zeros((), np.float32), "zero")]
    outs = []
    for out, value in outputs.items():
        value = np.asarray(value)
        inits.append(numpy_helper.from_array(value, f"{out}_c"))
        if value.dtype == np.float32:
            nodes.append(helper.make_node("Add", [f"{out}_c", "z"], [out]))
            outs.append(helper.make_tensor_value_info(out, TensorProto.FLOAT, list(value.shape)))
        else:
            nodes.append(helper.make_node("Identity", [f"{out}_c"], [out]))
            outs.append(helper.make_tensor_value_info(out, TensorProto.INT64, list(value.shape)))
    inp = helper.make_tensor_value_info("image", in_type, in_shape)
    return _save(tmp_path, name, nodes, [inp], outs, inits)


def _session(path):
    import onnxruntime as ort

    so = ort.SessionOptions()
    so.log_severity_level = 3
    return ort.InferenceSession(str(path), so, providers=["CPUExecutionProvider"])


def _adapter(input_=None, output=None, nms=None, stages=None):
    doc = {"input": {"layout": "NCHW", "size": 320, **(input_ or {})},
           "output": output or {"kind": "packed", "packed": "det"}}
    if nms is not None:
        doc["nms"] = nms
    if stages is not None:
        doc["stages"] = stages
    return parse_adapter(doc, "test.toml")


def _image(h, w, rgb=(10, 20, 30)):
    img = np.zeros((h, w, 3), np.uint8)
    img[:] = rgb
    return img


# ----------------------------------------------------------------- references
def test_nms_matches_torchvision_batched_nms():
    # Reference: torchvision.ops.batched_nms (kept indices, in its order).
    import torch
    from torchvision.ops import batched_nms

    rng = np.random.default_rng(0)
    for n, iou in ((1, 0.5), (40, 0.3), (400, 0.55), (5000, 0.5)):   # 5000: the row-by-row path
        xy = rng.random((n, 2)).astype(np.float32) * 200
        boxes = np.concatenate([xy, xy + rng.random((n, 2)).astype(np.float32) * 60 + 1], 1)
        scores = rng.random(n).astype(np.float32)
        labels = rng.integers(0, 4, n)
        ours = host.batched_nms(boxes, scores, labels, iou)
        ref = batched_nms(torch.from_numpy(boxes), torch.from_numpy(scores), torch.from_numpy(labels), iou)
        assert np.array_equal(ours, ref.numpy())


@pytest.mark.parametrize("fmt", ["xywh", "cxcywh"])
def test_box_formats_match_torchvision_box_convert(fmt):
    # Reference: torchvision.ops.box_convert.
    import torch
    from torchvision.ops import box_convert

    boxes = np.array([[10, 20, 30, 40], [0.5, 1.5, 2.0, 8.0]], np.float32)
    ref = box_convert(torch.from_numpy(boxes), fmt, "xyxy").numpy()
    assert np.allclose(host.to_xyxy(boxes, fmt), ref)


@pytest.mark.parametrize("shape", [(240, 320, 320, 320), (320, 320, 200, 260), (97, 131, 320, 320)])
def test_bilinear_resize_matches_torch_interpolate(shape):
    # Reference: torch.nn.functional.interpolate(mode="bilinear", align_corners=False), which
    # torchvision's detection transform uses for its resize (no antialiasing).
    import torch

    h, w, oh, ow = shape
    img = np.random.default_rng(1).integers(0, 256, (h, w, 3)).astype(np.float32)
    ref = torch.nn.functional.interpolate(torch.from_numpy(img).permute(2, 0, 1)[None], size=(oh, ow),
                                          mode="bilinear", align_corners=False)[0].permute(1, 2, 0).numpy()
    assert np.abs(host.resize_bilinear(img, oh, ow) - ref).max() < 1e-3


def test_softmax_and_sigmoid_match_torch():
    import torch

    x = np.random.default_rng(2).normal(size=(5, 4)).astype(np.float32) * 3
    assert np.allclose(host.activate(x, "softmax"), torch.softmax(torch.from_numpy(x), -1).numpy(), atol=1e-6)
    assert np.allclose(host.activate(x, "sigmoid"), torch.sigmoid(torch.from_numpy(x)).numpy(), atol=1e-6)


# ----------------------------------------------------------------- output kinds
def test_packed_n6_output_with_host_nms(tmp_path):
    det = np.array([[[10, 10, 110, 110, 0.9, 1],      # kept
                     [12, 12, 112, 112, 0.8, 1],      # same class, IoU ~0.92 > 0.5: suppressed
                     [12, 12, 112, 112, 0.7, 2],      # other class: kept
                     [200, 200, 300, 300, 0.04, 1]]],  # below the score threshold
                   np.float32)
    path = _const_graph(tmp_path, "packed", {"det": det}, [1, 3, 320, 320])
    ad = _adapter(output={"kind": "packed", "packed": "det"}, nms={"iou": 0.5, "score_threshold": 0.05})
    check_graph(path, ad, classes=["bg", "a", "b"])
    g = AdaptedGraph(path, ad, _session(path), classes=3)
    boxes, scores, labels = g(_image(640, 480))       # stretched 480x640 -> 320x320: x * 1.5, y * 2
    assert labels.tolist() == [1, 2]
    assert np.allclose(scores, [0.9, 0.7])
    assert np.allclose(boxes, [[15, 20, 165, 220], [18, 24, 168, 224]], atol=1e-4)


def test_packed_columns_in_another_order_without_host_nms(tmp_path):
    det = np.array([[0.9, 1, 10, 10, 110, 110], [0.8, 1, 12, 12, 112, 112]], np.float32)   # [N, 6]
    path = _const_graph(tmp_path, "packed2", {"det": det}, [1, 3, 320, 320])
    ad = _adapter(output={"kind": "packed", "packed": "det", "packed_columns": ["score", "label", "box"]},
                  nms={"enabled": False})
    boxes, scores, labels = AdaptedGraph(path, ad, _session(path))(_image(320, 320))
    assert len(boxes) == 2 and labels.tolist() == [1, 1]   # no NMS: both stay
    assert np.allclose(boxes[1], [12, 12, 112, 112])


def test_xywh_normalised_separate_outputs(tmp_path):
    boxes = np.array([[[0.25, 0.5, 0.5, 0.25]]], np.float32)          # x, y, w, h as fractions
    path = _const_graph(tmp_path, "sep", {"b": boxes, "s": np.array([[0.8]], np.float32),
                                          "l": np.array([[3]], np.int64)}, [1, 3, 256, 256])
    ad = _adapter(input_={"size": 256}, output={"kind": "separate", "boxes": "b", "scores": "s", "labels": "l",
                                                "box_format": "xywh", "box_units": "normalised"})
    check_graph(path, ad)
    out_boxes, scores, labels = AdaptedGraph(path, ad, _session(path))(_image(300, 400))
    # in the 256 px frame: x 64..192, y 128..192; stretched back to 400 x 300: x / 0.64, y / (256/300)
    assert np.allclose(out_boxes, [[100, 150, 300, 225]], atol=1e-3)
    assert labels.tolist() == [3] and np.allclose(scores, [0.8])


def _channel_mean_graph(tmp_path):
    """NHWC uint8 input; score = mean of channel 0 / 255, so layout, dtype and channel order all show."""
    from onnx import TensorProto, helper, numpy_helper

    nodes = [helper.make_node("Cast", ["image"], ["f"], to=TensorProto.FLOAT),
             helper.make_node("ReduceMean", ["f"], ["m"], axes=[1, 2], keepdims=0),  # [1, 3] (opset 17: axes attr)
             helper.make_node("Gather", ["m", "idx0"], ["c0"], axis=1),             # [1, 1]
             helper.make_node("Div", ["c0", "k255"], ["s"]),
             helper.make_node("Identity", ["bc"], ["b"]), helper.make_node("Identity", ["lc"], ["l"])]
    inits = [numpy_helper.from_array(np.array([0], np.int64), "idx0"),
             numpy_helper.from_array(np.array(255, np.float32), "k255"),
             numpy_helper.from_array(np.array([[[1, 2, 3, 4]]], np.float32), "bc"),
             numpy_helper.from_array(np.array([[1]], np.int64), "lc")]
    outs = [helper.make_tensor_value_info("b", TensorProto.FLOAT, [1, 1, 4]),
            helper.make_tensor_value_info("s", TensorProto.FLOAT, [1, 1]),
            helper.make_tensor_value_info("l", TensorProto.INT64, [1, 1])]
    inp = helper.make_tensor_value_info("image", TensorProto.UINT8, [1, 64, 64, 3])
    return _save(tmp_path, "nhwc", nodes, [inp], outs, inits)


@pytest.mark.parametrize("channels, expected", [("RGB", 200), ("BGR", 50)])
def test_nhwc_uint8_input_and_channel_order(tmp_path, channels, expected):
    path = _channel_mean_graph(tmp_path)
    ad = _adapter(input_={"layout": "NHWC", "dtype": "uint8", "size": 64, "channels": channels},
                  output={"kind": "separate", "boxes": "b", "scores": "s", "labels": "l"},
                  nms={"score_threshold": 0.0})
    check_graph(path, ad)
    x, _ = host.preprocess(ad, _image(100, 80, rgb=(200, 100, 50)), (64, 64))
    assert x.dtype == np.uint8 and x.shape == (1, 64, 64, 3)
    _, scores, _ = AdaptedGraph(path, ad, _session(path))(_image(100, 80, rgb=(200, 100, 50)))
    assert scores.tolist() == pytest.approx([expected / 255])


def test_letterbox_vs_stretch(tmp_path):
    # A fixed box in the 320 px frame, [80, 80, 240, 240]; the image is 640 wide, 320 high.
    det = np.array([[[80, 80, 240, 240, 0.9, 0]]], np.float32)
    path = _const_graph(tmp_path, "lb", {"det": det}, [1, 3, 320, 320])
    img = _image(320, 640, rgb=(255, 255, 255))
    stretch = _adapter(output={"kind": "packed", "packed": "det"})
    letter = _adapter(input_={"resize": "letterbox", "pad_value": 0}, output={"kind": "packed", "packed": "det"})
    # stretch: x / 0.5, y / 1
    assert np.allclose(AdaptedGraph(path, stretch, _session(path))(img)[0], [[160, 80, 480, 240]])
    # letterbox: scale 0.5, content 320 x 160 padded 80 rows top and bottom: x / 0.5, (y - 80) / 0.5
    assert np.allclose(AdaptedGraph(path, letter, _session(path))(img)[0], [[160, 0, 480, 320]])
    x, geo = host.preprocess(letter, img, (320, 320))
    assert (geo.pad_x, geo.pad_y, geo.scale_x) == (0.0, 80.0, 0.5)
    assert np.all(x[0, :, :80] == 0) and np.all(x[0, :, 240:] == 0)      # padding rows
    assert np.allclose(x[0, :, 80:240], 1.0)                            # white content, scaled to [0, 1]


def test_dense_output_decoding_sigmoid_and_transposed(tmp_path):
    # Two anchors, two classes, [1, 4 + C, A] (transposed), cxcywh pixels, logits.
    preds = np.array([[[50, 52], [50, 50], [20, 20], [20, 20],    # box rows
                       [3.0, 2.0], [-4.0, -4.0]]], np.float32)    # class 0 / class 1 logits
    path = _const_graph(tmp_path, "dense", {"p": preds}, [1, 3, 100, 100])
    ad = _adapter(input_={"size": 100}, output={"kind": "dense", "predictions": "p", "transposed": True,
                                                "box_format": "cxcywh", "score_activation": "sigmoid"},
                  nms={"iou": 0.5, "score_threshold": 0.1})
    assert check_graph(path, ad, classes=["a", "b"]).num_classes == 2
    boxes, scores, labels = AdaptedGraph(path, ad, _session(path), classes=2)(_image(100, 100))
    assert labels.tolist() == [0]                                    # the second anchor overlaps: suppressed
    assert np.allclose(boxes, [[40, 40, 60, 60]]) and np.allclose(scores, [1 / (1 + np.exp(-3))])


def test_candidates_per_image_and_per_class():
    ad = _adapter(output={"kind": "dense", "predictions": "p"},
                  nms={"candidates": 1, "candidates_per": "class", "score_threshold": 0.0, "iou": 0.5})
    boxes = np.array([[0, 0, 10, 10], [50, 50, 60, 60], [100, 100, 110, 110]], np.float32)
    scores = np.array([[0.9, 0.1], [0.8, 0.7], [0.2, 0.3]], np.float32)
    _, s, lab = host._candidates_nms(ad, boxes, scores)
    assert sorted(zip(lab.tolist(), s.tolist())) == [(0, pytest.approx(0.9)), (1, pytest.approx(0.7))]
    ad2 = ad.with_candidates(2)
    per_image = parse_adapter({**ad2.to_dict(), "nms": {**ad2.to_dict()["nms"], "candidates_per": "image"}})
    _, s, _ = host._candidates_nms(per_image, boxes, scores)
    assert sorted(s.tolist()) == pytest.approx([0.8, 0.9])


def test_adapter_round_trips_through_its_table():
    ad = _adapter(input_={"resize": "letterbox", "pad_value": 0},
                  output={"kind": "dense", "predictions": "p", "background": 0}, stages={"head": ["/h/"]})
    again = parse_adapter(ad.to_dict(), "test.toml")
    assert again == ad and again.digest() == ad.digest()


# ----------------------------------------------------------------- stages
def _staged_graph(tmp_path):
    from onnx import TensorProto, helper, numpy_helper

    w = numpy_helper.from_array(np.ones((3, 3, 1, 1), np.float32), "w")
    nodes = [helper.make_node("Sub", ["image", "mean"], ["a"], name="norm"),
             helper.make_node("Conv", ["a", "w"], ["b"], name="/net/conv1"),
             helper.make_node("Relu", ["b"], ["c"], name="/net/relu"),
             helper.make_node("Conv", ["c", "w"], ["d"], name="/det/conv2"),
             helper.make_node("Flatten", ["d"], ["e"], name="/det/flat"),
             helper.make_node("TopK", ["e", "k"], ["v", "i"], name="topk", axis=1),
             helper.make_node("Identity", ["v"], ["out"], name="after")]
    inits = [w, numpy_helper.from_array(np.zeros((1, 3, 1, 1), np.float32), "mean"),
             numpy_helper.from_array(np.array([5], np.int64), "k")]
    inp = helper.make_tensor_value_info("image", TensorProto.FLOAT, [1, 3, 8, 8])
    out = helper.make_tensor_value_info("out", TensorProto.FLOAT, [1, 5])
    return _save(tmp_path, "staged", nodes, [inp], [out], inits)


def test_stage_fallback_by_op_type_and_position(tmp_path):
    import onnx

    model = onnx.load(str(_staged_graph(tmp_path)))
    ad = _adapter(output={"kind": "packed", "packed": "out"})
    assert node_stages(model.graph, ad) == ["preprocess", "backbone", "backbone", "backbone", "head",
                                            "postprocess", "postprocess"]
    assert "neck and head" in FALLBACK_NOTE


def test_stage_prefixes_and_unattributed(tmp_path):
    import onnx

    model = onnx.load(str(_staged_graph(tmp_path)))
    ad = _adapter(output={"kind": "packed", "packed": "out"}, stages={"backbone": ["/net/"], "head": ["/det/"]})
    assert node_stages(model.graph, ad) == ["unattributed", "backbone", "backbone", "head", "head",
                                            "unattributed", "unattributed"]
    scoped = scoped_copy(model, ad)
    stage_of = stage_lookup(scoped)
    assert [stage_of(n.name) for n in scoped.graph.node][1:3] == ["backbone", "backbone"]
    assert stage_of("d_nchwc") == "head"          # ORT's name for a node writing tensor "d"
    assert stage_of("Reorder_token_3") == "unattributed"


def test_adapted_backend_times_host_work_and_splits_stages(tmp_path):
    # One real point in its own worker: the timed call includes host pre/post, stages carry them.
    from speedbench.measure import Point, Policy, measure_point

    det = np.array([[[10, 10, 50, 50, 0.9, 1]]], np.float32)
    path = _const_graph(tmp_path, "point", {"det": det}, [1, 3, 320, 320])
    ad = _adapter(output={"kind": "packed", "packed": "det"})
    point = Point(model="ext", weights="onnx:point.onnx", size=320, backend="adapted", graph=str(path),
                  adapter=ad.to_dict())
    point.validate()
    result = measure_point(point, [_image(240, 320)], Policy(min_reps=5, max_reps=10, max_seconds=5,
                                                             profile_reps=3), 120)
    assert result.ok, result.reason
    prof = result.extra["profile"]
    assert prof["host_preprocess_ms"] > 0 and prof["host_postprocess_ms"] > 0
    assert result.stages["preprocess"] >= prof["host_preprocess_ms"]
    assert "host preprocess" in result.extra["timed_region"]
    assert prof["note"] == FALLBACK_NOTE


# ----------------------------------------------------------------- bad adapters: one line each
BAD = [
    (lambda d: d["input"].update(layout="HWCN"), "input.layout", "not one of"),
    (lambda d: d["input"].pop("size"), "input.size", "missing"),
    (lambda d: d["input"].update(size="big"), "input.size", "not a size"),
    (lambda d: d["input"].update(dtype="uint8", mean=[0.5, 0.5, 0.5]), "input.mean", "uint8"),
    (lambda d: d["input"].update(mean=[0.5, 0.5]), "input.mean", "3 numbers"),
    (lambda d: d["input"].update(std=[1, 0, 1]), "input.std[1]", "out of range"),
    (lambda d: d["input"].update(pad_value=0), "input.pad_value", "letterbox"),
    (lambda d: d["input"].update(resize="none"), "input.resize", "dynamic"),
    (lambda d: d["input"].update(size="dynamic"), "input.native_size", "missing"),
    (lambda d: d["output"].update(kind="yolo"), "output.kind", "not one of"),
    (lambda d: d["output"].pop("packed"), "output.packed", "missing"),
    (lambda d: d["output"].update(box_format="ltrb"), "output.box_format", "not one of"),
    (lambda d: d["output"].update(score_activation="tanh"), "output.score_activation", "not one of"),
    (lambda d: d["output"].update(background=0), "output.background", "dense"),
    (lambda d: d["output"].update(labels="l"), "output.labels", "does not apply"),
    (lambda d: d["output"].update(packed_columns=["box", "score"]), "output.packed_columns", "three names"),
    (lambda d: d.update(output={"kind": "dense", "predictions": "p"}, nms={"enabled": False}), "nms.enabled",
     "dense"),
    (lambda d: d.update(nms={"iou": 1.5}), "nms.iou", "out of range"),
    (lambda d: d.update(nms={"candidates_per": "anchor"}), "nms.candidates_per", "not one of"),
    (lambda d: d.update(stages={"decoder": ["/x"]}), "stages.decoder", "unknown key"),
    (lambda d: d.update(extra=1), "extra", "unknown key"),
]


@pytest.mark.parametrize("mutate, key, words", BAD, ids=[b[1] + ":" + b[2] for b in BAD])
def test_bad_adapter_is_one_line_naming_the_key(mutate, key, words):
    doc = {"input": {"layout": "NCHW", "size": 320}, "output": {"kind": "packed", "packed": "det"}}
    mutate(doc)
    with pytest.raises(UserError) as err:
        parse_adapter(doc, "my.toml")
    msg = str(err.value)
    assert "\n" not in msg and msg.startswith(f"my.toml: {key}:") and words in msg, msg


BAD_FOR_GRAPH = [
    ({"output": {"kind": "packed", "packed": "dets"}}, None, "output.packed: the graph has no output 'dets' "
                                                             "(it has det [1, 3, 6])"),
    ({"output": {"kind": "separate", "boxes": "det", "scores": "s", "labels": "l"}}, None, "no output 's'"),
    ({"output": {"kind": "dense", "boxes": "det", "scores": "det2"}}, None, "no output 'det2'"),
    ({"input": {"layout": "NHWC", "size": 320}}, None, "NHWC puts channels where graph input image [1, 3, 320, 320]"),
    ({"input": {"layout": "CHW", "size": 320}}, None, "needs a rank-3 input"),
    ({"input": {"layout": "NCHW", "size": 256}}, None, "input.size: adapter says [256, 256], graph input image"),
    ({"input": {"layout": "NCHW", "size": "dynamic", "native_size": 320}}, None, "is fixed at 320 x 320"),
    ({"input": {"layout": "NCHW", "size": 320, "dtype": "uint8"}}, None, "input.dtype: adapter says uint8, "
                                                                         "graph input image is float32"),
    ({"input": {"layout": "NCHW", "size": 320, "name": "images"}}, None, "no input 'images' (it has image"),
    ({"output": {"kind": "dense", "predictions": "det"}}, ["bg", "a", "b"], "scores 2 classes per box but the "
                                                                            "model entry names 3"),
    ({"output": {"kind": "dense", "predictions": "det", "background": 5}}, None, "column 5 does not exist"),
]


@pytest.mark.parametrize("doc, classes, words", BAD_FOR_GRAPH, ids=[b[2][:30] for b in BAD_FOR_GRAPH])
def test_adapter_that_does_not_fit_the_graph(tmp_path, doc, classes, words):
    # Load-time check: declared outputs exist with compatible shapes; the message shows the real ones.
    path = _const_graph(tmp_path, "fit", {"det": np.zeros((1, 3, 6), np.float32)}, [1, 3, 320, 320])
    full = {"input": {"layout": "NCHW", "size": 320}, "output": {"kind": "packed", "packed": "det"}, **doc}
    with pytest.raises(UserError) as err:
        check_graph(path, parse_adapter(full, "my.toml"), classes=classes)
    msg = str(err.value)
    assert "\n" not in msg and msg.startswith("my.toml: ") and words in msg, msg


def test_packed_wrong_width_and_rank(tmp_path):
    path = _const_graph(tmp_path, "w7", {"det": np.zeros((1, 3, 7), np.float32)}, [1, 3, 320, 320])
    with pytest.raises(UserError, match=r"output.packed: .* 6 values in the last dimension; output det is \[1, 3, 7\]"):
        check_graph(path, _adapter())
    path = _const_graph(tmp_path, "r4", {"det": np.zeros((1, 1, 3, 6), np.float32)}, [1, 3, 320, 320])
    with pytest.raises(UserError, match=r"needs rank 2 or 3; output det is \[1, 1, 3, 6\]"):
        check_graph(path, _adapter())


# ----------------------------------------------------------------- CLI
def test_measure_cli_with_adapter(tmp_path, capsys):
    from speedbench.cli import main

    det = np.array([[[10, 10, 50, 50, 0.9, 1]]], np.float32)
    path = _const_graph(tmp_path, "cli", {"det": det}, [1, 3, 320, 320])
    adapter = tmp_path / "a.toml"
    adapter.write_text('[input]\nlayout = "NCHW"\nsize = 320\n[output]\nkind = "packed"\npacked = "det"\n')
    assert main(["measure", str(path), "--adapter", str(adapter), "--scenes", "2", "--min-reps", "3",
                 "--max-reps", "5", "--no-stages", "--json"]) == 0
    row = __import__("json").loads(capsys.readouterr().out.strip().splitlines()[-1])
    assert row["backend"] == "adapted" and row["size"] == 320 and row["proposals"] == 1000
    assert main(["measure", str(path), "--adapter", str(adapter), "--size", "256"]) == 2
    assert "fixed input of 320 x 320" in capsys.readouterr().err
    adapter.write_text('[input]\nlayout = "NCHW"\nsize = 320\n[output]\nkind = "packed"\npacked = "boxes"\n')
    assert main(["measure", str(path), "--adapter", str(adapter)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "no output 'boxes' (it has det [1, 1, 6])" in err
