"""Training smoke test: a few seeded iterations lower the loss; backbone transfer; CLI errors."""
import numpy as np
import pytest
import torch

from speedbench.demo.train import batch_targets, train_model, transfer_backbone
from speedbench.zoo import compact


def test_few_iterations_lower_the_loss():
    torch.set_num_threads(2)
    _, info = train_model("demo_ssdlite", steps=14, batch=2, seed=0, lr=3e-3)
    losses = info["losses"]
    assert len(losses) == 14 and all(np.isfinite(losses))
    # From random initialisation SSD's classification loss falls steeply; the mean of the
    # last four steps must sit clearly below the mean of the first four.
    assert np.mean(losses[-4:]) < 0.85 * np.mean(losses[:4])
    assert info["recipe"]["init"].startswith("random")


def test_training_is_reproducible():
    torch.set_num_threads(2)
    _, a = train_model("demo_ssdlite", steps=2, batch=2, seed=3)
    _, b = train_model("demo_ssdlite", steps=2, batch=2, seed=3)
    assert a["losses"] == b["losses"]


def test_batch_targets_are_valid_torchvision_targets():
    images, targets = batch_targets(np.random.default_rng(0), 0, 0, 4)
    for img, t in zip(images, targets):
        assert img.shape == (3, 320, 320) and img.dtype == torch.float32
        assert 0.0 <= float(img.min()) and float(img.max()) <= 1.0
        b = t["boxes"]
        assert b.ndim == 2 and b.shape[1] == 4 and len(t["labels"]) == len(b)
        assert bool((b[:, 2] > b[:, 0]).all() and (b[:, 3] > b[:, 1]).all())
        assert bool((b >= 0).all() and (b <= 320).all())
        assert set(t["labels"].tolist()) <= {1, 2, 3}


@pytest.mark.parametrize("model_id", ["demo_fcos", "demo_frcnn", "demo_frcnn_lite"])
def test_backbone_transfer_copies_every_body_tensor(model_id):
    torch.manual_seed(0)
    src = compact.demo_ssdlite().state_dict()
    model = compact.BUILDERS[model_id]()
    n = transfer_backbone(src, model)
    body = [k for k in model.state_dict() if k.startswith("backbone.body.")]
    assert n == len(body)
    first_src = next(v for k, v in src.items() if k.startswith("backbone.features."))
    assert torch.equal(model.state_dict()[body[0]], first_src.float())


@pytest.mark.parametrize("argv, needle", [
    (["--steps", "0"], "--steps"),
    (["--model", "nope", "--steps", "1"], "--model"),
    (["--heldout-images", "0"], "--heldout-images"),
])
def test_train_cli_bad_input(tmp_path, capsys, argv, needle):
    from speedbench.cli import main

    assert main(["train", "--out", str(tmp_path), *argv]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("speedbench: error:") and needle in err and "\n" not in err


def test_fpn_model_without_its_source_backbone_is_a_user_error(tmp_path, capsys):
    from speedbench.cli import main

    assert main(["train", "--model", "demo_frcnn", "--steps", "1", "--out", str(tmp_path)]) == 2
    assert "demo_ssdlite" in capsys.readouterr().err


def test_two_phase_chain_writes_weights_manifest_and_backbone_source(tmp_path, monkeypatch):
    # The real recipe shrunk to a few steps: phase 1, phase 2 on fresh scenes, then an FPN
    # model that starts from the phase-1 backbone; all entries land in one manifest.
    import json

    from speedbench.demo import train as tr

    small = {k: {**v, "steps": 2, "batch": 2} for k, v in tr.RECIPES.items()}
    small["demo_ssdlite"]["second"] = {"steps": 2, "lr": 1e-3, "sizes": [256, 288]}
    monkeypatch.setattr(tr, "RECIPES", small)
    tr.train(["demo_ssdlite", "demo_frcnn_lite"], out_dir=tmp_path, heldout_images=2, threads=2,
             log=lambda s: None)
    manifest = json.loads((tmp_path / "manifest.json").read_text())["models"]
    assert list(manifest) == ["demo_ssdlite", "demo_frcnn_lite"]
    ssd = manifest["demo_ssdlite"]
    assert [p["recipe"]["steps"] for p in ssd["phases"]] == [2, 2] and ssd["recipe"]["steps"] == 4
    assert ssd["phases"][1]["recipe"]["first_scene"] == 4  # phase 2 sees new scenes
    assert (tmp_path / ssd["recipe"]["phase1_file"]).is_file()
    assert ssd["recipe"]["train_sizes"] == [256, 288] and "256/288 px" in ssd["recipe"]["augment"]
    lite = manifest["demo_frcnn_lite"]
    assert "demo_ssdlite.phase1" in lite["recipe"]["init"]
    for e in manifest.values():
        assert e["heldout"]["n_images"] == 2 and e["heldout_check"]["n_images"] == 2
        assert (tmp_path / e["file"]).is_file()


@pytest.mark.parametrize("model_id", ["demo_ssdlite", "demo_fcos", "demo_frcnn_lite"])
def test_multi_size_training_resizes_through_the_models_own_transform(model_id):
    # Multi-scale training (common practice for detectors) sets the size each batch through the
    # zoo's size knob; the transform (torchvision's GeneralizedRCNNTransform) must then produce it.
    from speedbench.zoo.build import configure

    model = compact.BUILDERS[model_id]().eval()
    image = [torch.rand(3, 320, 320)]
    for size in (256, 352, compact.NATIVE):
        configure(model, size=size)
        batch, _ = model.transform(image)
        assert tuple(batch.tensors.shape[-2:]) == (size, size), size


def test_multi_size_training_records_its_sizes_and_returns_a_native_size_model():
    # batch 2: BatchNorm needs two values per channel at SSDlite's 1x1 level
    model, info = train_model("demo_ssdlite", steps=2, batch=2, seed=0, sizes=[256])
    assert info["recipe"]["train_sizes"] == [256]
    assert model.transform.fixed_size == (compact.NATIVE, compact.NATIVE)
