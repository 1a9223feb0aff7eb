"""Running a graph over a held-out set: original-image coordinates, label mapping,
the per-(graph, dataset) cache, thread invariance, evaluate_graph end to end."""
import json
import warnings

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper
from PIL import Image

from speedbench.data import load_dataset
from speedbench.errors import UserError
from speedbench.evaluate import (check_thread_invariance, coco_evaluate, detect_dataset,
                                 evaluate_graph)
from speedbench.evaluate import run as run_mod

# Fixed boxes as fractions of the input image (x1, y1, x2, y2), with model labels.
FRACS = np.array([[0.1, 0.2, 0.5, 0.6], [0.5, 0.5, 0.9, 0.8], [0.0, 0.0, 1.0, 1.0]], np.float32)
LABELS = np.array([1, 2, 3], np.int64)
BASE_SCORES = np.array([0.9, 0.6, 0.3], np.float32)
MODEL_CLASSES = ["__background__", "crate", "drum", "mystery"]  # label 3 is not in the dataset


def tiny_graph(path, fracs=FRACS, absolute=False):
    """A graph with the exported graphs' I/O: image [3,H,W] -> boxes, scores, labels.

    boxes = fracs * [W, H, W, H] (original-image pixels), or fracs taken as absolute pixels
    when absolute=True (a graph that ignores the input size). scores depend on the
    image mean so different images give different outputs.
    """
    n = len(fracs)
    nodes = [
        helper.make_node("Shape", ["image"], ["shape"]),
        helper.make_node("Gather", ["shape", "whwh_idx"], ["whwh_i"], axis=0),
        helper.make_node("Cast", ["whwh_i"], ["whwh"], to=TensorProto.FLOAT),
        helper.make_node("Mul", ["fracs", "whwh"], ["boxes"]) if not absolute
        else helper.make_node("Identity", ["fracs"], ["boxes"]),
        helper.make_node("ReduceMean", ["image"], ["mean"], keepdims=0),
        helper.make_node("Mul", ["mean", "tenth"], ["bump"]),
        helper.make_node("Add", ["base", "bump"], ["scores"]),
        helper.make_node("Identity", ["labels_c"], ["labels"]),
    ]
    inits = [
        helper.make_tensor("whwh_idx", TensorProto.INT64, [4], [2, 1, 2, 1]),
        helper.make_tensor("fracs", TensorProto.FLOAT, [n, 4], np.asarray(fracs, np.float32).ravel()),
        helper.make_tensor("tenth", TensorProto.FLOAT, [], [0.1]),
        helper.make_tensor("base", TensorProto.FLOAT, [n], BASE_SCORES[:n]),
        helper.make_tensor("labels_c", TensorProto.INT64, [n], LABELS[:n]),
    ]
    graph = helper.make_graph(
        nodes, "tiny", [helper.make_tensor_value_info("image", TensorProto.FLOAT, [3, "H", "W"])],
        [helper.make_tensor_value_info("boxes", TensorProto.FLOAT, [n, 4]),
         helper.make_tensor_value_info("scores", TensorProto.FLOAT, [n]),
         helper.make_tensor_value_info("labels", TensorProto.INT64, [n])], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.checker.check_model(model)
    onnx.save(model, path)
    return path


SIZES = {1: (40, 30), 2: (64, 48), 3: (50, 80)}  # image id -> (width, height)


def dataset(tmp_path, exact_gt=True):
    root = tmp_path / "ds"
    (root / "images").mkdir(parents=True)
    images, anns = [], []
    for i, (w, h) in SIZES.items():
        Image.fromarray(np.full((h, w, 3), 40 * i, np.uint8)).save(root / "images" / f"{i}.png")
        images.append({"id": i, "file_name": f"images/{i}.png", "width": w, "height": h})
        for (x1, y1, x2, y2), cat in zip(FRACS[:2].astype(float) * [w, h, w, h], (1, 2)):
            if exact_gt or i != 3:
                anns.append({"id": len(anns) + 1, "image_id": i, "category_id": cat,
                             "bbox": [x1, y1, x2 - x1, y2 - y1], "iscrowd": 0})
    coco = {"images": images, "annotations": anns,
            "categories": [{"id": 1, "name": "crate"}, {"id": 2, "name": "drum"}]}
    (root / "annotations.json").write_text(json.dumps(coco))
    return load_dataset(root)


def test_boxes_in_original_coordinates_and_labels_mapped(tmp_path):
    graph = tiny_graph(tmp_path / "g.onnx")
    ds = dataset(tmp_path)
    dets = detect_dataset(graph, ds, {1: 1, 2: 2})  # label 3 unmapped -> dropped
    assert len(dets) == 2 * len(SIZES) and {d["category_id"] for d in dets} == {1, 2}
    for d in dets:
        w, h = SIZES[d["image_id"]]
        x1, y1, x2, y2 = FRACS[d["category_id"] - 1] * [w, h, w, h]
        np.testing.assert_allclose(d["bbox"], [x1, y1, x2 - x1, y2 - y1], atol=1e-4)
        # score = base + 0.1 * mean pixel in [0, 1]; the image is filled with 40 * id
        base = BASE_SCORES[d["category_id"] - 1]
        assert d["score"] == pytest.approx(base + 0.1 * 40 * d["image_id"] / 255, abs=1e-6)


def test_cache_per_graph_and_dataset(tmp_path, monkeypatch):
    graph = tiny_graph(tmp_path / "g.onnx")
    ds = dataset(tmp_path)
    first = detect_dataset(graph, ds, {1: 1, 2: 2}, cache_dir=tmp_path / "cache")
    assert len(list((tmp_path / "cache").glob("detections-*.npz"))) == 1

    def no_session(*a, **k):
        raise AssertionError("the cache should have answered")

    monkeypatch.setattr(run_mod, "_session", no_session)
    again = detect_dataset(graph, ds, {1: 1, 2: 2}, intra_threads=2, cache_dir=tmp_path / "cache")
    assert again == first
    monkeypatch.undo()
    # another dataset (a subset has its own digest) is another cache entry
    detect_dataset(graph, ds.first(2), {1: 1}, cache_dir=tmp_path / "cache")
    assert len(list((tmp_path / "cache").glob("detections-*.npz"))) == 2


def test_thread_invariance_recorded(tmp_path):
    graph = tiny_graph(tmp_path / "g.onnx")
    r = check_thread_invariance(graph, dataset(tmp_path), {1: 1, 2: 2}, threads=(1, 2), n_images=2)
    assert r["identical"] is True and r["max_box_diff"] == 0.0 and r["n_images"] == 2
    assert r["threads"] == [1, 2] and r["n_detections"] == [6, 6]


def test_evaluate_graph_end_to_end(tmp_path):
    graph = tiny_graph(tmp_path / "g.onnx")
    # Ground truth identical to the graph's crate/drum boxes: every detection is a true
    # positive at IoU 1 -> AP 1 per class (COCO protocol), mAP 1.
    r = evaluate_graph(graph, dataset(tmp_path), model_classes=MODEL_CLASSES, bootstrap=50,
                       check_threads=True)
    assert r["map"] == pytest.approx(1.0) and r["per_class"] == {"crate": 1.0, "drum": 1.0}
    assert r["label_map"] == {1: 1, 2: 2} and r["thread_invariance"]["identical"]
    assert r["map_ci_lo"] == pytest.approx(1.0) and r["map_ci_hi"] == pytest.approx(1.0)
    # Image 3 without ground truth: its two detections are false positives with the
    # highest scores (the brightest image bumps scores most), so precision starts at 0:
    # the result must equal the evaluator on the same detections.
    ds = dataset(tmp_path / "b", exact_gt=False)
    r = evaluate_graph(graph, ds, model_classes=MODEL_CLASSES, bootstrap=0, limit=3)
    expected = coco_evaluate(ds.coco, detect_dataset(graph, ds, {1: 1, 2: 2}), bootstrap=0)
    assert r["map"] == expected["map"] < 1.0 and np.isnan(r["map_ci_lo"])


def test_graph_in_resized_frame_is_refused(tmp_path):
    # Boxes in a 320 x 320 frame on a 40 x 30 image: the contract (input-image pixels) is broken.
    graph = tiny_graph(tmp_path / "bad.onnx", fracs=[[10, 10, 300, 300]], absolute=True)
    with pytest.raises(UserError, match="image 1 \\(40x30\\): boxes fall outside the image"):
        detect_dataset(graph, dataset(tmp_path), {1: 1})


def test_bad_graph_files(tmp_path):
    ds = dataset(tmp_path)
    with pytest.raises(UserError, match="ONNX graph not found"):
        detect_dataset(tmp_path / "none.onnx", ds, {1: 1})
    (tmp_path / "junk.onnx").write_bytes(b"not a graph")
    with pytest.raises(UserError, match="junk.onnx: not a loadable ONNX graph"):
        detect_dataset(tmp_path / "junk.onnx", ds, {1: 1})
    g = helper.make_graph([helper.make_node("Identity", ["image"], ["out"])], "g",
                          [helper.make_tensor_value_info("image", TensorProto.FLOAT, [3, "H", "W"])],
                          [helper.make_tensor_value_info("out", TensorProto.FLOAT, [3, "H", "W"])])
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    m.ir_version = 8
    onnx.save(m, tmp_path / "other.onnx")
    with pytest.raises(UserError, match="expected input 'image' and outputs boxes, scores, labels"):
        detect_dataset(tmp_path / "other.onnx", ds, {1: 1})
    with pytest.raises(UserError, match="intra-op threads must be a whole number >= 1"):
        detect_dataset(tiny_graph(tmp_path / "g.onnx"), ds, {1: 1}, intra_threads=0)
    with pytest.raises(UserError, match="needs label_map"):
        evaluate_graph(tmp_path / "junk.onnx", ds)


def test_torchvision_export_boxes_match_eager_in_original_frame(tmp_path):
    # source: torchvision's own eager model (its transform maps boxes back to the original
    # image), ssdlite320_mobilenet_v3_large. A real detector exported with the graph I/O contract, run through detect's
    # path on a 260 x 150 image (the model resizes to 320 x 320 inside), must give the
    # eager model's boxes in the 260 x 150 frame.
    import torch

    from speedbench.zoo import build_model

    # The zoo's untrained recipe (seeded init + norm calibration) gives spread-out scores,
    # so the ranking of detections is stable between the two runtimes.
    model = build_model("ssdlite320_mobilenet_v3_large", weights="none", num_classes=4).eval()
    graph = tmp_path / "ssd.onnx"
    with warnings.catch_warnings():  # the TorchScript exporter warns about traced shapes
        warnings.simplefilter("ignore")
        torch.onnx.export(model, ([torch.rand(3, 90, 120)],), str(graph), input_names=["image"],
                          output_names=["boxes", "scores", "labels"], opset_version=17,
                          dynamic_axes={"image": {1: "h", 2: "w"}}, dynamo=False)
    img = (np.random.default_rng(0).random((150, 260, 3)) * 255).astype(np.uint8)
    session = run_mod._session(graph, 1)
    boxes, scores, labels = run_mod._run(session, img, graph, type("R", (), {"id": 0})())
    with torch.no_grad():
        eager = model([torch.from_numpy(run_mod.to_input(img))])[0]
    top = min(20, len(eager["scores"]))
    assert top > 0 and boxes[:, [0, 2]].max() <= 260 and boxes[:, [1, 3]].max() <= 150
    np.testing.assert_allclose(boxes[:top], eager["boxes"][:top].numpy(), atol=0.05)
    np.testing.assert_allclose(scores[:top], eager["scores"][:top].numpy(), atol=1e-4)
    assert (labels[:top] == eager["labels"][:top].numpy()).all()
    # The detection cache assumes thread settings do not change a graph's outputs; on a
    # real detector ORT gives bit-identical outputs under 1 and 2 intra-op threads.
    root = tmp_path / "set"
    (root / "images").mkdir(parents=True)
    Image.fromarray(img).save(root / "images" / "a.png")
    Image.fromarray(img[:100, :180].copy()).save(root / "images" / "b.png")
    coco = {"images": [{"id": 1, "file_name": "images/a.png", "width": 260, "height": 150},
                       {"id": 2, "file_name": "images/b.png", "width": 180, "height": 100}],
            "annotations": [], "categories": [{"id": 1, "name": "thing"}]}
    (root / "annotations.json").write_text(json.dumps(coco))
    inv = check_thread_invariance(graph, load_dataset(root), threads=(1, 2), n_images=2)
    assert inv["identical"] and inv["max_box_diff"] == 0.0 and min(inv["n_detections"]) > 0


def test_classes_of_zoo_models():
    # source: torchvision's COCO weights metadata (91 names, index == COCO id) for
    # torchvision architectures; the demo zoo's own class tuple otherwise.
    from speedbench.evaluate.run import classes_of

    assert classes_of("ssdlite320_mobilenet_v3_large")[1] == "person"
    assert len(classes_of("ssdlite320_mobilenet_v3_large")) == 91
    assert classes_of("demo_ssdlite") == ["__background__", "crate", "drum", "pylon"]


def test_cli_runs_a_graph(tmp_path, capsys):
    from speedbench.cli import main

    graph = tiny_graph(tmp_path / "g.onnx")
    ds = dataset(tmp_path)
    out = tmp_path / "dets.json"
    assert main(["evaluate", str(ds.source), "--graph", str(graph), "--classes",
                 ",".join(MODEL_CLASSES), "--save-dets", str(out), "--json", "--bootstrap", "0"]) == 0
    assert json.loads(capsys.readouterr().out)["map"] == pytest.approx(1.0)
    assert len(json.loads(out.read_text())) == 6
    assert main(["evaluate", str(ds.source), "--graph", str(graph)]) == 2
    assert "--model or --classes" in capsys.readouterr().err
