"""Weights sources: torchvision cache only, file:PATH checkpoints, demo manifest; bad files.

References: torch.load(weights_only=True) semantics (PyTorch serialization docs: only
tensors, primitive containers and allow-listed types are unpickled); torchvision's
weights enum (its URL gives the cache file name under $TORCH_HOME/hub/checkpoints).
"""
import hashlib
import json
import os
import random
from pathlib import Path

import pytest
import torch

from speedbench.cli import main
from speedbench.errors import UserError
from speedbench.zoo import build_model, weights_digest
from speedbench.zoo.weights import torchvision_cache_file

SSD = "ssdlite320_mobilenet_v3_large"


@pytest.fixture(scope="module")
def ssd_state():
    # Trained-architecture random weights: the same key set torchvision's file has.
    return build_model(SSD).state_dict()


def _one_line_exit_2(capsys, argv, needle):
    code = main(argv)
    err = capsys.readouterr().err.strip()
    assert code == 2, err
    assert err.startswith("speedbench: error:") and err.count("\n") == 0 and "Traceback" not in err
    assert needle in err
    return err


def test_missing_checkpoint_file(capsys, tmp_path):
    _one_line_exit_2(capsys, ["export", SSD, "--weights", f"file:{tmp_path / 'nope.pt'}",
                              "--cache-dir", str(tmp_path)], "nope.pt")


def test_corrupt_checkpoint(capsys, tmp_path):
    bad = tmp_path / "corrupt.pt"
    bad.write_bytes(random.Random(0).randbytes(4096))
    _one_line_exit_2(capsys, ["export", SSD, "--weights", f"file:{bad}", "--cache-dir", str(tmp_path)],
                     "corrupt.pt")
    truncated = tmp_path / "truncated.pt"
    torch.save({"w": torch.ones(1000)}, truncated)
    truncated.write_bytes(truncated.read_bytes()[:300])
    with pytest.raises(UserError, match="truncated.pt"):
        build_model(SSD, weights=f"file:{truncated}")


def test_random_bytes_never_escape_as_a_traceback(tmp_path):
    # Random files reach torch's weights-only unpickler with arbitrary opcodes; some make it
    # raise IndexError (seed 2 here, with torch 2.14), which once escaped as a traceback. Every
    # one must be a UserError naming the file. Seeded, so a failure repeats.
    from speedbench.zoo.weights import safe_load

    for seed in range(60):
        bad = tmp_path / f"random-{seed}.pt"
        bad.write_bytes(random.Random(seed).randbytes(4096))
        with pytest.raises(UserError, match=f"random-{seed}.pt"):
            safe_load(bad)


class _Payload:
    """Unpickling this runs Path.touch(marker): a stand-in for arbitrary code."""

    def __init__(self, marker):
        self.marker = marker

    def __reduce__(self):
        return (Path.touch, (Path(self.marker),))


def test_code_executing_pickle_is_refused_and_nothing_runs(capsys, tmp_path):
    marker = tmp_path / "payload_ran"
    evil = tmp_path / "evil.pt"
    torch.save({"model": {"backbone.w": torch.zeros(1)}, "hook": _Payload(marker)}, evil)
    err = _one_line_exit_2(capsys, ["export", SSD, "--weights", f"file:{evil}", "--cache-dir", str(tmp_path)],
                           "evil.pt")
    assert "refused" in err
    assert not marker.exists()
    # The payload is live: an unsafe load (weights_only=False) does run it. This proves
    # the check above could fail.
    torch.load(evil, weights_only=False)
    assert marker.exists()


def test_wrong_shapes_list_first_mismatches(ssd_state, tmp_path):
    sd = dict(ssd_state)
    key = "backbone.features.0.0.0.weight"
    sd[key] = torch.zeros(8, 3, 3, 3)
    path = tmp_path / "wrong.pt"
    torch.save(sd, path)
    with pytest.raises(UserError) as info:
        build_model(SSD, weights=f"file:{path}")
    msg = str(info.value)
    assert "wrong.pt" in msg and key in msg and "(8, 3, 3, 3)" in msg and "\n" not in msg


def test_missing_and_unexpected_keys_are_named(ssd_state, tmp_path):
    sd = dict(ssd_state)
    sd.pop("head.regression_head.module_list.0.1.bias")
    sd["extra.thing"] = torch.zeros(2)
    path = tmp_path / "keys.pt"
    torch.save(sd, path)
    with pytest.raises(UserError, match=r"1 missing keys, first: head\.regression_head.*extra\.thing"):
        build_model(SSD, weights=f"file:{path}")


def test_checkpoint_dict_with_other_class_count_is_inferred_and_loaded(tmp_path):
    # A training checkpoint ({"model": state_dict, ...}), 5 classes, fp16, DataParallel keys.
    src = build_model(SSD, num_classes=5)
    sd = {f"module.{k}": (v.half() if v.is_floating_point() else v) for k, v in src.state_dict().items()}
    path = tmp_path / "ckpt.pt"
    torch.save({"model": sd, "epoch": 12, "optimizer": {"lr": 0.01}}, path)
    model = build_model(SSD, weights=f"file:{path}")
    got = model.state_dict()
    for k, v in src.state_dict().items():
        assert got[k].dtype == v.dtype
        assert torch.equal(got[k], v.half().float() if v.is_floating_point() else v), k
    assert model.head.classification_head.module_list[0][1].out_channels == 6 * 5   # 6 anchors x 5 classes


def test_checkpoint_from_frozen_batchnorm_backbone_loads(tmp_path):
    # torchvision freezes backbone batch norms when fine-tuning from pretrained weights:
    # such checkpoints have no num_batches_tracked. The trained-architecture build here is
    # exactly that layout.
    from torchvision.ops import FrozenBatchNorm2d

    model_id = "fasterrcnn_mobilenet_v3_large_320_fpn"
    src = build_model(model_id)
    sd = src.state_dict()
    assert not any(k.endswith("num_batches_tracked") for k in sd if k.startswith("backbone.body"))
    path = tmp_path / "frozen.pt"
    torch.save(sd, path)
    model = build_model(model_id, weights=f"file:{path}")
    assert isinstance(model.backbone.body["0"][1], FrozenBatchNorm2d)
    assert torch.equal(model.state_dict()["backbone.body.0.0.weight"], sd["backbone.body.0.0.weight"])


def test_torchvision_weights_never_download(capsys, tmp_path, monkeypatch):
    monkeypatch.setenv("TORCH_HOME", str(tmp_path / "torch_home"))
    import torchvision

    monkeypatch.setattr(torch.hub, "download_url_to_file",
                        lambda *a, **k: pytest.fail("tried to download"))
    expected = torchvision_cache_file(torchvision.models.get_weight(
        "SSDLite320_MobileNet_V3_Large_Weights.COCO_V1").url)
    err = _one_line_exit_2(capsys, ["export", SSD, "--weights", "torchvision", "--cache-dir", str(tmp_path)],
                           str(expected))
    assert "not cached" in err


def test_torchvision_weights_from_local_cache(ssd_state, tmp_path, monkeypatch):
    monkeypatch.setenv("TORCH_HOME", str(tmp_path / "torch_home"))
    import torchvision

    file = torchvision_cache_file(torchvision.models.get_weight(
        "SSDLite320_MobileNet_V3_Large_Weights.COCO_V1").url)
    file.parent.mkdir(parents=True)
    sd = {k: v + 0.5 if v.is_floating_point() else v for k, v in ssd_state.items()}
    torch.save(sd, file)
    model = build_model(SSD, weights="torchvision")
    assert torch.equal(model.state_dict()["head.classification_head.module_list.0.1.weight"],
                       sd["head.classification_head.module_list.0.1.weight"])
    # The digest is the cached file's content hash.
    assert weights_digest(SSD, "torchvision") == hashlib.sha256(file.read_bytes()).hexdigest()[:16]


def _demo_root(tmp_path, monkeypatch, sd, sha=None, name="demo_ssdlite.pt"):
    from speedbench.zoo import weights as w

    root = tmp_path / "demo_weights"
    root.mkdir(exist_ok=True)
    torch.save(sd, root / name)
    digest = sha or hashlib.sha256((root / name).read_bytes()).hexdigest()
    manifest = {"models": {"demo_ssdlite": {"file": name, "sha256": digest, "num_classes": 4,
                                             "classes": ["__background__", "crate", "drum", "pylon"]}}}
    (root / "manifest.json").write_text(json.dumps(manifest))
    monkeypatch.setattr(w, "DEMO_ROOT", root)
    return root


def test_demo_weights_are_checked_and_cast(tmp_path, monkeypatch):
    src = build_model("demo_ssdlite", num_classes=4)
    half = {k: (v.half() if v.is_floating_point() else v) for k, v in src.state_dict().items()}
    _demo_root(tmp_path, monkeypatch, half)
    model = build_model("demo_ssdlite", weights="demo")
    for k, v in half.items():
        assert model.state_dict()[k].dtype == (torch.float32 if v.is_floating_point() else v.dtype)
    _demo_root(tmp_path, monkeypatch, half, sha="0" * 64)
    with pytest.raises(UserError, match="sha256 does not match"):
        build_model("demo_ssdlite", weights="demo")


def test_demo_manifest_cannot_point_outside_its_root(tmp_path, monkeypatch):
    _demo_root(tmp_path, monkeypatch, {"w": torch.zeros(1)}, name="../outside.pt")
    with pytest.raises(UserError, match="outside"):
        build_model("demo_ssdlite", weights="demo")


def test_untrained_weights_are_deterministic():
    # weights "none" = torchvision's own builder under torch.manual_seed(0), then BatchNorm
    # statistics calibrated: every conv / linear weight is what torchvision draws from that seed.
    import torchvision

    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(0)
        ref = torchvision.models.detection.ssdlite320_mobilenet_v3_large(
            weights=None, weights_backbone=None, num_classes=91).state_dict()
    a = build_model(SSD).state_dict()
    drawn = [k for k in ref if k.endswith(".weight") and ref[k].dim() > 1]
    assert len(drawn) > 50 and all(torch.equal(a[k], ref[k]) for k in drawn)
    b = build_model(SSD).state_dict()       # the calibration is deterministic too
    assert all(torch.equal(a[k], b[k]) for k in a)
    assert weights_digest(SSD, "none") == weights_digest(SSD, "none") != weights_digest("ssd300_vgg16", "none")
