"""Synthetic scenes: determinism, split disjointness, COCO size coverage, valid boxes, CLI errors."""
import hashlib
import json

import numpy as np
import pytest

from speedbench.data.scenes import SCENE_CLASSES, make_scenes, render_scene, scene_rng


def _digest(root):
    h = hashlib.sha256()
    for p in sorted((root / "images").iterdir()):
        h.update(p.name.encode())
        h.update(p.read_bytes())
    h.update((root / "annotations.json").read_bytes())
    return h.hexdigest()


@pytest.fixture(scope="module")
def heldout(tmp_path_factory):
    root = tmp_path_factory.mktemp("heldout")
    make_scenes(root, 24, seed=7, split="heldout")
    return root


def test_same_seed_gives_identical_bytes(heldout, tmp_path):
    make_scenes(tmp_path, 24, seed=7, split="heldout")
    assert _digest(tmp_path) == _digest(heldout)


def test_other_seed_differs(heldout, tmp_path):
    make_scenes(tmp_path, 24, seed=8, split="heldout")
    assert _digest(tmp_path) != _digest(heldout)


def test_train_and_heldout_share_no_scene():
    train = {hashlib.sha1(render_scene(scene_rng(3, "train", i))[0].tobytes()).hexdigest()
             for i in range(30)}
    held = {hashlib.sha1(render_scene(scene_rng(3, "heldout", i))[0].tobytes()).hexdigest()
            for i in range(30)}
    assert len(train) == 30 and len(held) == 30
    assert not train & held


def test_pycocotools_loads_and_sizes_cover_small_medium_large(heldout):
    # Reference: pycocotools (PyPI) parses the file and indexes it.
    from pycocotools.coco import COCO

    coco = COCO(str(heldout / "annotations.json"))
    assert sorted(coco.getCatIds()) == list(range(1, len(SCENE_CLASSES) + 1))
    assert [c["name"] for c in coco.loadCats(coco.getCatIds())] == list(SCENE_CLASSES)
    assert len(coco.getImgIds()) == 24
    areas = np.array([a["area"] for a in coco.dataset["annotations"] if not a["iscrowd"]])
    # COCO protocol area ranges: small < 32^2, medium < 96^2, large >= 96^2 (cocodataset.org/#detection-eval).
    assert (areas < 32 ** 2).sum() >= 5
    assert ((areas >= 32 ** 2) & (areas < 96 ** 2)).sum() >= 5
    assert (areas >= 96 ** 2).sum() >= 2
    labels = {a["category_id"] for a in coco.dataset["annotations"]}
    assert labels == set(range(1, len(SCENE_CLASSES) + 1))


def test_boxes_inside_image_with_positive_area(heldout):
    data = json.loads((heldout / "annotations.json").read_text())
    sizes = {im["id"]: (im["width"], im["height"]) for im in data["images"]}
    assert data["annotations"], "scenes should contain objects"
    ids = [a["id"] for a in data["annotations"]]
    assert len(set(ids)) == len(ids)
    for a in data["annotations"]:
        x, y, w, h = a["bbox"]
        W, H = sizes[a["image_id"]]
        assert w > 0 and h > 0 and a["area"] > 0
        assert x >= 0 and y >= 0 and x + w <= W and y + h <= H
        assert a["area"] <= w * h  # visible pixels fit inside their box
        assert a["iscrowd"] in (0, 1)
    for im in data["images"]:
        assert (heldout / im["file_name"]).is_file()
        assert not im["file_name"].startswith("/")


def test_render_scene_in_memory_respects_size_and_has_objects():
    counts = [len(render_scene(scene_rng(0, "train", i), 320, 240)[1]) for i in range(20)]
    image, _ = render_scene(scene_rng(0, "train", 0), 320, 240)
    assert image.shape == (240, 320, 3) and image.dtype == np.uint8
    assert sum(c > 0 for c in counts) >= 18


@pytest.mark.parametrize("argv, needle", [
    (["--count", "0"], "--count"),
    (["--count", "-3"], "--count"),
    (["--count", "2", "--width", "10"], "--width: must be between 32 and 4096, not 10"),
])
def test_cli_bad_input_is_one_line_exit_2(tmp_path, capsys, argv, needle):
    from speedbench.cli import main

    rc = main(["scenes", str(tmp_path / "out"), *argv])
    err = capsys.readouterr().err.strip()
    assert rc == 2
    assert err.startswith("speedbench: error:") and needle in err and "\n" not in err


def test_cli_out_is_a_file(tmp_path, capsys):
    from speedbench.cli import main

    f = tmp_path / "file"
    f.write_text("x")
    assert main(["scenes", str(f), "--count", "1"]) == 2
    assert "not a directory" in capsys.readouterr().err


def test_cli_writes(tmp_path):
    from speedbench.cli import main

    assert main(["scenes", str(tmp_path / "o"), "--count", "2", "--seed", "5", "--split", "train"]) == 0
    data = json.loads((tmp_path / "o" / "annotations.json").read_text())
    assert len(data["images"]) == 2
