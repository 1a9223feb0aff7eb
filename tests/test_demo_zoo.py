"""The committed demo weights: manifest integrity, strict loading, accuracy as recorded.

Accuracy is scored with pycocotools' COCOeval (the reference implementation of the COCO
protocol) on held-out synthetic scenes the models never saw in training.
"""
import hashlib
import importlib
import json

import numpy as np
import pytest
import torch

from speedbench.data.scenes import SCENE_CLASSES
from speedbench.demo.accuracy import WEIGHTS_DIR, coco_scores, heldout_scenes, load_demo_model, predict
from speedbench.zoo import compact

MANIFEST = json.loads((WEIGHTS_DIR / "manifest.json").read_text())
MODELS = list(MANIFEST["models"])


@pytest.fixture(scope="module")
def check_set():
    n = max(e["heldout_check"]["n_images"] for e in MANIFEST["models"].values())
    return heldout_scenes(n)


def test_manifest_covers_the_compact_zoo():
    families = {s.id: s.family for s in compact.SPECS}
    assert set(MODELS) == set(families)
    assert sum(families[m] == "two-stage" for m in MODELS) >= 2
    assert sum(families[m] == "one-stage" for m in MODELS) >= 2


@pytest.mark.parametrize("model_id", MODELS)
def test_manifest_entry_is_complete_and_digest_matches(model_id):
    e = MANIFEST["models"][model_id]
    path = WEIGHTS_DIR / e["file"]
    assert path.is_file()
    assert hashlib.sha256(path.read_bytes()).hexdigest() == e["sha256"]
    module, fn = e["builder"].rsplit(".", 1)
    assert getattr(importlib.import_module(module), fn) is compact.BUILDERS[model_id]
    assert e["classes"] == ["__background__", *SCENE_CLASSES] and e["num_classes"] == len(e["classes"])
    for key in ("steps", "batch", "lr", "optimizer", "schedule", "seed", "init"):
        assert key in e["recipe"], key
    assert e["train_seconds"] > 0 and e["train_cpu_seconds"] > 0
    for key in ("map", "map50", "map_small", "n_images"):
        assert key in e["heldout"], key
    assert e["torch"]


def test_weights_are_fp16_and_small():
    total = 0
    for e in MANIFEST["models"].values():
        path = WEIGHTS_DIR / e["file"]
        total += path.stat().st_size
        state = torch.load(path, map_location="cpu", weights_only=True)
        assert all(v.dtype == torch.float16 for v in state.values() if v.is_floating_point())
    assert total <= 40 * 2 ** 20


@pytest.mark.parametrize("model_id", MODELS)
def test_committed_weights_reach_the_recorded_accuracy(model_id, check_set):
    model, entry = load_demo_model(model_id)  # strict load of the committed fp16 file
    rec = entry["heldout_check"]
    images, dataset = check_set
    n = rec["n_images"]
    ids = set(range(1, n + 1))
    subset = {"images": dataset["images"][:n], "categories": dataset["categories"],
              "annotations": [a for a in dataset["annotations"] if a["image_id"] in ids]}
    torch.set_num_threads(2)
    got = coco_scores(subset, predict(model, images[:n]))
    assert got["map"] >= 0.9 * rec["map"]
    assert got["map50"] >= 0.9 * rec["map50"]
    assert got["map"] > 0.05  # a trained model, not noise


def test_zoo_loader_gives_the_same_detections():
    # The zoo's own "demo" weights path (speedbench.zoo.build) must match the direct load.
    from speedbench.zoo.build import build_model

    images, _ = heldout_scenes(1)
    x = [torch.from_numpy(images[0]).permute(2, 0, 1).float() / 255]
    for model_id in MODELS:
        a, _ = load_demo_model(model_id)
        b = build_model(model_id, weights="demo")
        with torch.inference_mode():
            da, db = a(x)[0], b(x)[0]
        assert torch.equal(da["labels"], db["labels"]), model_id
        assert torch.allclose(da["boxes"], db["boxes"], atol=1e-3), model_id


def _score(model, check_set, n=20):
    images, dataset = check_set
    subset = {"images": dataset["images"][:n], "categories": dataset["categories"],
              "annotations": [a for a in dataset["annotations"] if a["image_id"] <= n]}
    return coco_scores(subset, predict(model, images[:n]))


def test_accuracy_falls_at_a_smaller_input_size(check_set):
    # COCO small objects (< 32^2 px) shrink below what the stride-8 level resolves.
    from speedbench.zoo.build import configure

    model, _ = load_demo_model("demo_fcos")
    native = _score(model, check_set)
    small = _score(configure(model, size=192), check_set)
    assert small["map"] < native["map"]
    assert small["map_small"] < native["map_small"]


def test_two_stage_accuracy_rises_with_proposals(check_set):
    # Five RPN proposals cannot cover scenes with up to seven objects.
    from speedbench.zoo.build import configure

    model, _ = load_demo_model("demo_frcnn_lite")
    few = _score(configure(model, proposals=5), check_set)
    many = _score(configure(model, proposals=300), check_set)
    assert few["map"] < many["map"]
