"""Zoo registry: specs, knobs, stage attribution, parameter counts and MACs.

External references used here:
- torchvision's shipped weights metadata (`Weights.meta["num_params"]`, `meta["_ops"]`,
  the GFLOPS column of torchvision's model table, which is in fact GMACs);
- the torchvision builders themselves (their default thresholds / top-k values).
"""
import json
import os

import pytest
import torch

from speedbench.cli import main
from speedbench.errors import UserError
from speedbench.schema import STAGES
from speedbench.zoo import (build_model, configure, describe_knobs, get_spec, list_specs,
                            stage_of_scope)
from speedbench.zoo.build import knob_values

ISSUE_MODELS = {
    "fasterrcnn_resnet50_fpn": "two-stage", "fasterrcnn_resnet50_fpn_v2": "two-stage",
    "fasterrcnn_mobilenet_v3_large_fpn": "two-stage", "fasterrcnn_mobilenet_v3_large_320_fpn": "two-stage",
    "maskrcnn_resnet50_fpn": "two-stage", "retinanet_resnet50_fpn": "one-stage",
    "retinanet_resnet50_fpn_v2": "one-stage", "fcos_resnet50_fpn": "one-stage",
    "ssd300_vgg16": "one-stage", "ssdlite320_mobilenet_v3_large": "one-stage",
}
SLOW = pytest.mark.skipif(os.environ.get("SPEEDBENCH_SLOW") != "1",
                          reason="full-size ResNet-50 / VGG forward passes; set SPEEDBENCH_SLOW=1")


def _meta(model_id):
    from torchvision.models import get_weight

    return get_weight(get_spec(model_id).weights_enum).meta


def test_registry_has_the_issue_models_with_their_family():
    ids = {s.id: s.family for s in list_specs()}
    for model_id, family in ISSUE_MODELS.items():
        assert ids.get(model_id) == family


@pytest.mark.parametrize("model_id", sorted(ISSUE_MODELS))
def test_spec_defaults_are_the_builders_defaults(model_id):
    # Source: the torchvision builder, built on the meta device (no weights, no memory).
    spec = get_spec(model_id)
    model = build_model(model_id, device="meta")
    knobs = knob_values(model)
    assert knobs["score_thresh"] == pytest.approx(spec.score_thresh)
    assert knobs["detections_per_img"] == spec.detections_per_img
    assert (knobs["fixed_size"] or (knobs["min_size"],))[0] == spec.native_size
    assert knobs.get("rpn_post_nms_top_n", knobs.get("topk_candidates")) == spec.default_proposals


@pytest.mark.parametrize("model_id", sorted(ISSUE_MODELS))
def test_parameter_count_equals_torchvision_meta(model_id):
    # Source: torchvision weights meta "num_params" (counted on the trained architecture,
    # whose backbone uses FrozenBatchNorm2d; a plain weights=None build has more params).
    model = build_model(model_id, device="meta")
    assert sum(p.numel() for p in model.parameters()) == _meta(model_id)["num_params"]


def _gmacs(model_id, image=None):
    from speedbench.export import model_facts

    return model_facts(model_id, image=image)


# Source: torchvision weights meta "_ops" (GFLOPS column of its docs; counted as MACs).
DENSE_OPS = {"ssdlite320_mobilenet_v3_large": 0.583, "retinanet_resnet50_fpn": 151.54}
SLOW_DENSE_OPS = {"ssd300_vgg16": 34.858, "retinanet_resnet50_fpn_v2": 152.238, "fcos_resnet50_fpn": 128.207}


@pytest.mark.parametrize("model_id", sorted(DENSE_OPS))
def test_macs_equal_torchvision_meta(model_id):
    facts = _gmacs(model_id)
    assert round(facts["gmacs"], 3) == pytest.approx(DENSE_OPS[model_id], abs=5e-4)
    # The per-stage split comes from the same counter and must add up to the total.
    assert sum(facts["gmacs_per_stage"].values()) == pytest.approx(facts["gmacs"], rel=1e-6)
    assert set(facts["gmacs_per_stage"]) <= set(STAGES) - {"unattributed"}
    assert facts["gmacs_per_stage"]["backbone"] > facts["gmacs_per_stage"].get("neck", 0)


@SLOW
@pytest.mark.parametrize("model_id", sorted(SLOW_DENSE_OPS))
def test_macs_equal_torchvision_meta_slow(model_id):
    assert round(_gmacs(model_id)["gmacs"], 3) == pytest.approx(SLOW_DENSE_OPS[model_id], abs=5e-4)


@SLOW
@pytest.mark.parametrize("model_id,ops", [("fasterrcnn_resnet50_fpn", 134.38),
                                          ("fasterrcnn_resnet50_fpn_v2", 280.371),
                                          ("maskrcnn_resnet50_fpn", 134.38)])
def test_two_stage_resnet_macs_equal_meta(model_id, ops):
    # The meta figure is reached when all 1000 RPN proposals reach the box head, which
    # happens with untrained weights on a uniform-noise image (noise only here: counting).
    # Mask R-CNN's meta equals Faster R-CNN's: it was counted with no detection reaching
    # the mask head; a score threshold of 1.0 reproduces that, and any detection adds MACs.
    from speedbench.export.facts import count_macs

    torch.manual_seed(0)
    image = torch.rand(3, 800, 800)
    model = build_model(model_id)
    facts = count_macs(model, get_spec(model_id), image)
    assert facts["rois"] == 1000
    if model_id.startswith("maskrcnn"):
        configure(model, None, None, score_thresh=1.0)
        with_masks, facts = facts, count_macs(model, get_spec(model_id), image)
        assert facts["detections"] == 0 and facts["rois"] == 1000
        assert with_masks["detections"] == 0 or with_masks["gmacs"] > facts["gmacs"]
    assert round(facts["gmacs"], 3) == pytest.approx(ops, abs=5e-4)


def test_mobilenet_two_stage_macs_follow_the_roi_count():
    """Why the MobileNet two-stage figures differ from the meta value (0.719 GMACs).

    Their ROI head (TwoMLPHead 256*7*7 -> 1024 -> 1024, predictor 1024 -> 91 + 364) costs
    about 13.9 M MACs per RoI, more than the whole 320 px backbone per 40 RoIs, and the
    number of RoIs is whatever survives RPN NMS: with trained weights on a real image few
    do, with untrained weights up to the budget. So the total is checked as
    (count without RoIs) + RoIs x (per-RoI MACs from the layer shapes), not against the meta.
    """
    per_roi = 256 * 7 * 7 * 1024 + 1024 * 1024 + 1024 * 91 + 1024 * 91 * 4
    model = build_model("fasterrcnn_mobilenet_v3_large_320_fpn", proposals=40)
    from speedbench.export.facts import count_macs, facts_image

    spec = get_spec("fasterrcnn_mobilenet_v3_large_320_fpn")
    a = count_macs(model, spec, facts_image(320))
    configure(model, 320, 20)
    b = count_macs(model, spec, facts_image(320))
    assert a["rois"] != b["rois"]
    diff = a["gmacs_per_stage"]["roi_heads"] - b["gmacs_per_stage"]["roi_heads"]
    # per-stage figures are rounded to 1e-6 GMACs (1000 MACs) per stage
    assert diff * 1e9 == pytest.approx((a["rois"] - b["rois"]) * per_roi, abs=2e3)
    assert a["gmacs"] > _meta("fasterrcnn_mobilenet_v3_large_320_fpn")["_ops"] > b["gmacs"] - b["rois"] * per_roi / 1e9


def test_configure_maps_size_and_proposals_onto_torchvision_knobs():
    rcnn = build_model("fasterrcnn_mobilenet_v3_large_320_fpn", device="meta", size=480, proposals=77)
    k = knob_values(rcnn)
    # Builder: min_size=320, max_size=640 -> the aspect cap 2.0 is kept.
    assert (k["min_size"], k["max_size"]) == (480, 960)
    assert (k["rpn_pre_nms_top_n"], k["rpn_post_nms_top_n"]) == (77, 77)
    configure(rcnn, None, None)
    k = knob_values(rcnn)
    assert (k["min_size"], k["max_size"], k["rpn_post_nms_top_n"]) == (320, 640, 150)

    ssd = build_model("ssdlite320_mobilenet_v3_large", device="meta", size=256, proposals=50)
    assert knob_values(ssd)["fixed_size"] == (256, 256) and ssd.topk_candidates == 50
    retina = build_model("retinanet_resnet50_fpn", device="meta", size=512, proposals=300)
    assert knob_values(retina)["max_size"] == round(512 * 1333 / 800) and retina.topk_candidates == 300


def test_describe_knobs_names_the_torchvision_attributes():
    assert "fixed_size" in describe_knobs(get_spec("ssd300_vgg16"))["size_knob"]
    assert "RPN" in describe_knobs(get_spec("fasterrcnn_resnet50_fpn"))["proposal_knob"]
    assert "topk_candidates" in describe_knobs(get_spec("fcos_resnet50_fpn"))["proposal_knob"]


@pytest.mark.parametrize("name,stage", [
    ("/transform/Div", "preprocess"),
    ("/backbone/body/layer1/layer1.0/conv1/Conv", "backbone"),
    ("/backbone/fpn/inner_blocks.0/inner_blocks.0.0/Conv", "neck"),
    ("/rpn/head/conv/conv.0/conv.0.0/Conv", "proposals"),
    ("/rpn/NonMaxSuppression", "proposals"),
    ("/roi_heads/box_roi_pool/RoiAlign", "roi_heads"),
    ("/roi_heads/box_head/fc6/Gemm", "roi_heads"),
    ("/roi_heads/NonMaxSuppression", "postprocess"),
    ("/Gather_12", "postprocess"),
    ("Identity_5", "unattributed"),
    ("ReorderInput_token_83", "unattributed"),            # ONNX Runtime layout transform
    ("fused /roi_heads/box_head/fc6/Gemm", "roi_heads"),  # ONNX Runtime fused node
    ("backbone.body.layer2", "backbone"),
])
def test_stage_of_scope_two_stage(name, stage):
    assert stage_of_scope(get_spec("fasterrcnn_resnet50_fpn"), name) == stage


@pytest.mark.parametrize("name,stage", [
    ("/backbone/features.0/features.0.1/block/block.0/block.0.0/Conv", "backbone"),
    ("/backbone/extra.0/extra.0.0/extra.0.0.0/Conv", "neck"),
    ("/head/classification_head/module_list.0/module_list.0.1/Conv", "head"),
    ("/anchor_generator/Cast", "postprocess"),
    ("/TopK_3", "postprocess"),
    ("/unknown_module/Conv", "unattributed"),
])
def test_stage_of_scope_ssd(name, stage):
    assert stage_of_scope(get_spec("ssdlite320_mobilenet_v3_large"), name) == stage


def test_models_json_lists_every_model(capsys):
    assert main(["models", "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert {r["id"] for r in rows} >= set(ISSUE_MODELS)
    for r in rows:
        assert {"id", "builder", "family", "native_size", "size_knob", "proposal_knob"} <= set(r)


def test_unknown_model_is_one_line_error_with_close_match(capsys):
    with pytest.raises(UserError, match="did you mean ssdlite320_mobilenet_v3_large"):
        get_spec("ssdlite320_mobilenet_v3")
    assert main(["export", "retinanet_resnet51_fpn"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "retinanet_resnet50_fpn" in err and "Traceback" not in err


@pytest.mark.parametrize("argv,needle", [
    # the message names the option and the value given (argparse's own "argument --X:" form)
    (["--size", "0"], "--size: must be between 32 and 4096, not 0"),
    (["--size", "-5"], "--size: must be between 32 and 4096, not -5"),
    (["--size", "100000"], "--size: must be between 32 and 4096, not 100000"),
    (["--proposals", "0"], "--proposals: must be between 1 and 10000, not 0"),
    (["--proposals", "-3"], "--proposals: must be between 1 and 10000, not -3"),
    (["--weights", "imagenet"], "weights 'imagenet'"), (["--opset", "5"], "--opset: must be between 7 and 30, not 5"),
])
def test_bad_export_arguments_exit_2(capsys, tmp_path, argv, needle):
    code = main(["export", "ssdlite320_mobilenet_v3_large", "--cache-dir", str(tmp_path), *argv])
    err = capsys.readouterr().err.strip()
    assert code == 2 and needle in err and err.count("\n") == 0
    assert not list(tmp_path.glob("*.onnx"))
