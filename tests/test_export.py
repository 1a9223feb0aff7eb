"""ONNX export: graph I/O contract, parity against torch eager, cache, failure records.

References: ONNX Runtime is the independent implementation the graph is checked against;
torchvision.ops.box_iou is the reference for the IoU used in matching.
"""
import json
import os

import numpy as np
import onnx
import pytest
import torch

from speedbench.cli import main
from speedbench.export import export_onnx, ort_session
from speedbench.export import onnx_export, parity
from speedbench.zoo import get_spec, stage_of_scope

# Small architectures whose parity runs in CI; the size keeps the ResNet-50 one cheap.
SMALL = {"ssdlite320_mobilenet_v3_large": None, "fasterrcnn_mobilenet_v3_large_320_fpn": None,
         "retinanet_resnet50_fpn": 256}


@pytest.fixture(scope="module")
def cache(tmp_path_factory):
    return tmp_path_factory.mktemp("exports")


@pytest.fixture(scope="module")
def records(cache):
    return {m: export_onnx(m, size=s, cache_dir=cache) for m, s in SMALL.items()}


@pytest.mark.parametrize("model_id", sorted(SMALL))
def test_parity_passes_on_structured_images(records, model_id):
    rec = records[model_id]
    assert rec.ok, rec.reason
    par = rec.parity
    assert par["passed"] and par["matched"] >= parity.MIN_COMPARED
    assert par["box_max_abs_diff_px"] <= par["tolerances"]["box_px"]
    assert par["score_max_abs_diff"] <= par["tolerances"]["score"]
    assert par["label_agreement"] == 1.0
    assert len(par["per_image"]) == len(parity.SHAPES)
    # The record on disk is the record returned.
    assert json.loads(open(rec.path[:-5] + ".json").read()) == json.loads(json.dumps(rec.to_dict()))


@pytest.mark.parametrize("model_id", sorted(SMALL))
def test_graph_io_and_scopes(records, model_id):
    rec = records[model_id]
    g = onnx.load(rec.path, load_external_data=False)
    (inp,) = g.graph.input
    dims = inp.type.tensor_type.shape.dim
    assert inp.name == "image" and inp.type.tensor_type.elem_type == onnx.TensorProto.FLOAT
    assert dims[0].dim_value == 3 and dims[1].dim_param and dims[2].dim_param   # H, W dynamic
    outs = {o.name: o.type.tensor_type.elem_type for o in g.graph.output}
    assert outs == {"boxes": onnx.TensorProto.FLOAT, "scores": onnx.TensorProto.FLOAT,
                    "labels": onnx.TensorProto.INT64}
    spec = get_spec(model_id)
    stages = {}
    for node in g.graph.node:
        if node.op_type in ("Constant", "Identity"):
            continue
        stage = stage_of_scope(spec, node.name)
        stages[stage] = stages.get(stage, 0) + 1
    # Every node carries a module scope that maps to a stage of the spec: the exporter's
    # own unscoped nodes (NMS and the shape checks around it) were given their neighbours'.
    assert stages.get("unattributed", 0) == 0, stages
    nms = [stage_of_scope(spec, n.name) for n in _all_nodes(g.graph) if n.op_type == "NonMaxSuppression"]
    assert nms and set(nms) <= ({"proposals", "postprocess"} if spec.family == "two-stage" else {"postprocess"})
    expected = {"preprocess", "backbone", "neck", "postprocess"}
    expected |= {"proposals", "roi_heads"} if spec.family == "two-stage" else {"head"}
    assert expected <= set(stages)


def _all_nodes(graph):
    for node in graph.node:
        yield node
        for attr in node.attribute:
            if attr.type == attr.GRAPH:
                yield from _all_nodes(attr.g)


@pytest.mark.parametrize("model_id", sorted(SMALL))
def test_facts(records, model_id):
    from torchvision.models import get_weight

    facts = records[model_id].facts
    # Source: torchvision weights meta num_params.
    assert facts["params"] == get_weight(get_spec(model_id).weights_enum).meta["num_params"]
    assert facts["onnx_mib"] == pytest.approx(os.path.getsize(records[model_id].path) / 2**20, abs=1e-3)
    assert sum(facts["gmacs_per_stage"].values()) == pytest.approx(facts["gmacs"], rel=1e-5)


def test_boxes_are_in_input_pixels_for_any_shape(records):
    # Box coordinates come back in the input image's pixels, whatever its shape.
    rec = records["ssdlite320_mobilenet_v3_large"]
    sess = ort_session(rec.path)
    from speedbench.zoo import pattern_image
    from speedbench.data import to_input

    for h, w in ((120, 500), (500, 130)):
        boxes, scores, labels = sess.run(None, {"image": to_input(pattern_image(h, w, 5))})
        assert len(boxes) and boxes.dtype == np.float32 and labels.dtype == np.int64
        assert boxes[:, [0, 2]].max() <= w + 1e-3 and boxes[:, [1, 3]].max() <= h + 1e-3
        assert (boxes[:, 2] >= boxes[:, 0]).all() and (boxes[:, 3] >= boxes[:, 1]).all()


def test_cache_reuses_and_keys_on_the_configuration(records, cache):
    rec = records["ssdlite320_mobilenet_v3_large"]
    mtime = os.path.getmtime(rec.path)
    again = export_onnx("ssdlite320_mobilenet_v3_large", cache_dir=cache)
    assert again.path == rec.path and again.digest == rec.digest and os.path.getmtime(rec.path) == mtime
    key = onnx_export.export_key
    base = key("ssdlite320_mobilenet_v3_large", 320, 300, "none", 17)[0]
    assert base == rec.digest
    assert len({base, key("ssdlite320_mobilenet_v3_large", 288, 300, "none", 17)[0],
                key("ssdlite320_mobilenet_v3_large", 320, 200, "none", 17)[0],
                key("ssdlite320_mobilenet_v3_large", 320, 300, "none", 18)[0],
                key("ssd300_vgg16", 320, 300, "none", 17)[0]}) == 5


def test_cache_hit_imports_neither_torch_nor_onnx(records, cache):
    # A sweep whose graphs are all exported pays no torch import (seconds) to find them:
    # the key's weights digest and versions come from files. The digest of untrained weights
    # must stay what it was when it was computed from torch.__version__ (existing caches hit).
    import subprocess
    import sys

    import torchvision

    from speedbench.zoo.build import UNTRAINED_RECIPE
    from speedbench.zoo.weights import weights_digest

    rec = records["ssdlite320_mobilenet_v3_large"]
    code = ("import sys\nfrom speedbench.export import export_onnx\n"
            f"r = export_onnx('ssdlite320_mobilenet_v3_large', cache_dir={str(cache)!r})\n"
            "print(r.path)\n"
            "print(sorted(m for m in sys.modules if m.split('.')[0] in ('torch', 'torchvision', 'onnx')))\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.split("\n")
    assert out[0] == rec.path and out[1] == "[]"
    import hashlib

    blob = f"none|ssdlite320_mobilenet_v3_large|{UNTRAINED_RECIPE}|{torch.__version__}|{torchvision.__version__}"
    assert weights_digest("ssdlite320_mobilenet_v3_large", "none") == hashlib.sha256(blob.encode()).hexdigest()[:16]


def test_cli_export_uses_cache_and_copies_out(records, cache, tmp_path, capsys):
    out = tmp_path / "model.onnx"
    code = main(["export", "ssdlite320_mobilenet_v3_large", "--cache-dir", str(cache), "-o", str(out)])
    assert code == 0, capsys.readouterr().err
    assert out.read_bytes() == open(records["ssdlite320_mobilenet_v3_large"].path, "rb").read()
    assert json.loads(out.with_suffix(".json").read_text())["ok"] is True
    assert "parity" in capsys.readouterr().out


def test_tampered_graph_is_caught_by_the_parity_check(records, tmp_path):
    """Shift every output box by 3 px inside the graph: the verdict must fail."""
    from onnx import helper

    rec = records["ssdlite320_mobilenet_v3_large"]
    g = onnx.load(rec.path)
    for node in g.graph.node:
        node.output[:] = ["boxes_raw" if o == "boxes" else o for o in node.output]
    g.graph.initializer.append(onnx.numpy_helper.from_array(np.array(3.0, np.float32), "shift"))
    g.graph.node.append(helper.make_node("Add", ["boxes_raw", "shift"], ["boxes"], name="/tamper/Add"))
    bad = tmp_path / "tampered.onnx"
    onnx.save(g, bad)
    from speedbench.zoo import build_model

    model = build_model("ssdlite320_mobilenet_v3_large")
    good = parity.check(model, ort_session(rec.path), parity.verification_images()[:1], 300, 0.001)
    tampered = parity.check(model, ort_session(bad), parity.verification_images()[:1], 300, 0.001)
    assert good["passed"]
    assert not tampered["passed"] and any("box diff" in f for f in tampered["failures"])


def test_failed_export_is_recorded_not_used(monkeypatch, tmp_path, capsys):
    def boom(*a, **k):
        raise RuntimeError("exporter exploded\nsecond line")

    monkeypatch.setattr(onnx_export, "_torch_export", boom)
    rec = export_onnx("ssdlite320_mobilenet_v3_large", cache_dir=tmp_path)
    assert not rec.ok and rec.reason == "export failed: RuntimeError: exporter exploded"
    assert not list(tmp_path.glob("*.onnx"))
    stored = json.loads(next(tmp_path.glob("*.json")).read_text())
    assert stored["ok"] is False and stored["reason"] == rec.reason
    out = tmp_path / "o.onnx"
    assert main(["export", "ssdlite320_mobilenet_v3_large", "--cache-dir", str(tmp_path), "-o", str(out)]) == 1
    assert "NOT USABLE" in capsys.readouterr().out and not out.exists()


def test_match_handles_reordered_near_ties():
    # Two identical boxes with near-tied scores come out in swapped order: still matched.
    from torchvision.ops import box_iou

    ref = (np.array([[0, 0, 10, 10], [20, 20, 40, 40], [0, 0, 10, 10]], np.float32),
           np.array([0.5, 0.5000001, 0.4], np.float32), np.array([1, 1, 2]))
    other = (ref[0][[1, 0, 2]], ref[1][[1, 0, 2]], ref[2][[1, 0, 2]])
    stats = parity.compare(ref, other, detections_per_img=100, score_thresh=0.01)
    assert stats["matched"] == 3 and stats["unmatched"] == 0 and stats["box_max_abs_diff_px"] == 0
    # The IoU used for matching agrees with torchvision.ops.box_iou.
    ours = parity._iou(ref[0][1], ref[0])
    theirs = box_iou(torch.from_numpy(ref[0][1:2]), torch.from_numpy(ref[0]))[0].numpy()
    assert np.allclose(ours, theirs)
    # Degenerate boxes (zero width: IoU 0 even with themselves, common with untrained
    # regressors) match when every corner agrees within the box tolerance.
    flat = (np.array([[5, 5, 5, 30]], np.float32), np.array([0.3], np.float32), np.array([4]))
    assert parity.compare(flat, (flat[0] + 0.01, flat[1], flat[2]), 100, 0.01)["matched"] == 1
    # A detection only one side has, far from any cut-off, fails the verdict.
    lone = (ref[0][:2], ref[1][:2], ref[2][:2])
    assert parity.summarise([parity.compare(ref, lone, 100, 0.01)])["passed"] is False


SLOW = pytest.mark.skipif(os.environ.get("SPEEDBENCH_SLOW") != "1",
                          reason="full-size exports of the large architectures; set SPEEDBENCH_SLOW=1")


@SLOW
@pytest.mark.parametrize("model_id", ["fasterrcnn_resnet50_fpn", "maskrcnn_resnet50_fpn", "fcos_resnet50_fpn",
                                      "ssd300_vgg16", "retinanet_resnet50_fpn_v2", "fasterrcnn_resnet50_fpn_v2",
                                      "fasterrcnn_mobilenet_v3_large_fpn"])
def test_parity_large(cache, model_id):
    rec = export_onnx(model_id, size=min(get_spec(model_id).native_size, 512), cache_dir=cache)
    assert rec.ok, rec.reason
