"""Held-out set loaders: COCO JSON + images, Pascal VOC, validation, category mapping."""
import json
import os
import warnings

import numpy as np
import pytest
from PIL import Image

from speedbench.data import load_dataset
from speedbench.data.datasets import category_map, torchvision_coco_classes
from speedbench.errors import UserError


def png(path, w, h, value=0):
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(np.full((h, w, 3), value, np.uint8)).save(path)


def coco_set(tmp_path, mutate=None):
    """A 3-image COCO set in tmp_path/ds: annotations.json + images/."""
    root = tmp_path / "ds"
    for i in (1, 2, 3):
        png(root / "images" / f"{i}.png", 40, 30, value=10 * i)
    coco = {
        "images": [{"id": i, "file_name": f"images/{i}.png", "width": 40, "height": 30} for i in (1, 2, 3)],
        "annotations": [
            {"id": 10, "image_id": 1, "category_id": 5, "bbox": [1, 2, 10, 8], "iscrowd": 0},
            {"id": 11, "image_id": 2, "category_id": 7, "bbox": [0, 0, 40, 30], "area": 900.0},
            {"id": 12, "image_id": 2, "category_id": 5, "bbox": [5, 5, 3, 3], "iscrowd": 1},
        ],
        "categories": [{"id": 5, "name": "Person"}, {"id": 7, "name": "traffic light"}],
    }
    if mutate:
        mutate(coco, root)
    (root / "annotations.json").write_text(json.dumps(coco))
    return root


def test_load_coco_file_folder_and_images_dir(tmp_path):
    root = coco_set(tmp_path)
    a = load_dataset(root)
    b = load_dataset(root / "annotations.json")
    assert [im.id for im in a.images] == [1, 2, 3] and a.images[0]["file_name"] == "images/1.png"
    assert a.images[0].path == (root / "images" / "1.png").resolve()
    assert a.categories == [{"id": 5, "name": "Person"}, {"id": 7, "name": "traffic light"}]
    assert a.coco["annotations"][0]["area"] == 80.0  # filled in from the box when absent
    assert a.coco["annotations"][1]["iscrowd"] == 0
    assert a.read(2).shape == (30, 40, 3) and a.read(2)[0, 0, 0] == 20
    assert a.digest == b.digest
    # images given separately from the annotation file
    ann = tmp_path / "ann.json"
    coco = json.loads((root / "annotations.json").read_text())
    for im in coco["images"]:
        im["file_name"] = im["file_name"].split("/")[1]
    ann.write_text(json.dumps(coco))
    c = load_dataset(ann, images_dir=root / "images")
    assert c.images[2].path == (root / "images" / "3.png").resolve()


def test_digest_follows_image_bytes(tmp_path):
    root = coco_set(tmp_path)
    before = load_dataset(root).digest
    png(root / "images" / "2.png", 40, 30, value=99)
    assert load_dataset(root).digest != before


def test_subset_is_seeded_and_keeps_annotations(tmp_path):
    ds = load_dataset(coco_set(tmp_path))
    s1, s2 = ds.subset(2, seed=1), ds.subset(2, seed=1)
    assert [i.id for i in s1.images] == [i.id for i in s2.images] and len(s1) == 2
    ids = {i.id for i in s1.images}
    assert {a["image_id"] for a in s1.coco["annotations"]} <= ids
    assert len([a for a in ds.coco["annotations"] if a["image_id"] in ids]) == len(s1.coco["annotations"])
    assert s1.digest != ds.digest and ds.subset(10) is ds


def test_scenes_output_loads(tmp_path):
    # The synthetic-scenes writer (another package) must produce a set this loader accepts.
    scenes = pytest.importorskip("speedbench.data.scenes")
    ds = load_dataset(scenes.make_scenes(tmp_path, 2, seed=0))
    assert len(ds) == 2 and ds.read(ds.images[0].id).ndim == 3


def _ann(coco, **change):
    coco["annotations"][0].update(change)


BAD_COCO = {
    "box outside": (lambda c, r: _ann(c, bbox=[35, 2, 10, 8]), "annotation 10: box [35, 2, 10, 8] lies outside the 40x30 image"),
    "negative size": (lambda c, r: _ann(c, bbox=[1, 2, -3, 8]), "annotation 10: box [1, 2, -3, 8] has negative size"),
    "zero area": (lambda c, r: _ann(c, bbox=[1, 2, 0, 8]), "annotation 10: box [1, 2, 0, 8] has zero area"),
    "unknown category": (lambda c, r: _ann(c, category_id=99), "annotation 10: unknown category_id 99"),
    "unknown image": (lambda c, r: _ann(c, image_id=99), "annotation 10: unknown image_id 99"),
    "duplicate annotation id": (lambda c, r: _ann(c, id=11), "duplicate annotation id 11"),
    "duplicate image id": (lambda c, r: c["images"][1].update(id=1), "duplicate image id 1"),
    "duplicate category id": (lambda c, r: c["categories"].append({"id": 5, "name": "x"}), "duplicate category id 5"),
    "bad bbox": (lambda c, r: _ann(c, bbox=[1, 2, 3]), "annotation 10: bbox must be"),
    "string id": (lambda c, r: _ann(c, id="10"), "annotation 10: id must be an integer"),
    "escape dotdot": (lambda c, r: c["images"][0].update(file_name="../secret.png"), "image 1: file_name '../secret.png' leads outside"),
    "escape absolute": (lambda c, r: c["images"][0].update(file_name=str(r / "images" / "1.png")), "leads outside"),
    "missing file": (lambda c, r: os.remove(r / "images" / "3.png"), "image 3: missing image file"),
    "corrupt image": (lambda c, r: (r / "images" / "2.png").write_bytes((r / "images" / "2.png").read_bytes()[:60]),
                      "image 2: "),
    "size mismatch": (lambda c, r: c["images"][0].update(width=50), "image 1: images/1.png is 40x30 but the annotations say 50x30"),
    "no categories": (lambda c, r: c.pop("categories"), "missing or non-list 'categories'"),
}


@pytest.mark.parametrize("case", list(BAD_COCO))
def test_bad_coco_inputs(tmp_path, case):
    mutate, words = BAD_COCO[case]
    root = coco_set(tmp_path, mutate)
    with pytest.raises(UserError) as e:
        load_dataset(root)
    msg = str(e.value)
    assert words in msg and "annotations.json" in msg and "\n" not in msg
    if case == "corrupt image":
        assert "corrupt" in msg


def test_symlink_out_of_root_is_refused(tmp_path):
    outside = tmp_path / "outside.png"
    png(outside, 40, 30)

    def link(c, r):
        (r / "images" / "1.png").unlink()
        (r / "images" / "1.png").symlink_to(outside)

    with pytest.raises(UserError, match="image 1: file_name 'images/1.png' leads outside"):
        load_dataset(coco_set(tmp_path, link))


def test_not_a_dataset(tmp_path):
    with pytest.raises(UserError, match="dataset not found"):
        load_dataset(tmp_path / "nothing")
    (tmp_path / "empty").mkdir()
    with pytest.raises(UserError, match="not a dataset"):
        load_dataset(tmp_path / "empty")
    (tmp_path / "x.json").write_text("{not json")
    with pytest.raises(UserError, match="x.json: not a readable JSON"):
        load_dataset(tmp_path / "x.json")


def test_check_images_off_needs_no_pixels(tmp_path):
    root = coco_set(tmp_path, lambda c, r: os.remove(r / "images" / "3.png"))
    assert len(load_dataset(root, check_images=False)) == 3


def test_annotation_checks_on_whole_columns_agree_with_the_entry_loop(monkeypatch):
    # validate_coco checks annotations column-wise and walks them one by one only when
    # something is wrong; both routes must give the same clean dict (defaults filled in).
    from speedbench.data import datasets

    coco = {"images": [{"id": 1, "file_name": "a.png", "width": 40, "height": 30}],
            "categories": [{"id": 5, "name": "crate"}],
            "annotations": [{"id": 1, "image_id": 1, "category_id": 5, "bbox": [0, 0, 4, 3]},
                            {"id": 2, "image_id": 1, "category_id": 5, "bbox": [1.5, 2, 10, 8.25],
                             "area": 60, "iscrowd": True},
                            {"id": 3, "image_id": 1, "category_id": 5, "bbox": [-0.5, 0, 40.5, 30],
                             "area": 0.0, "iscrowd": 0}]}
    fast = datasets.validate_coco(coco, "x.json")
    monkeypatch.setattr(datasets, "_clean_annotations", lambda *a: None)
    slow = datasets.validate_coco(coco, "x.json")
    assert fast == slow
    assert json.dumps(fast) == json.dumps(slow)  # same types too (floats, ints)
    assert fast["annotations"][0]["area"] == 12.0 and fast["annotations"][1]["iscrowd"] == 1
    for bad in ({"area": None}, {"iscrowd": [1]}, {"bbox": [0, 0, 4, True]}, {"id": 2}):
        broken = json.loads(json.dumps(coco))
        broken["annotations"][0].update(bad)
        monkeypatch.undo()
        assert datasets._clean_annotations(broken["annotations"], {1: coco["images"][0]}, {5: {}}) is None
        with pytest.raises(UserError):
            datasets.validate_coco(broken, "x.json")


def voc_object(name, box, difficult=0):
    x1, y1, x2, y2 = box
    return (f"<object><name>{name}</name><difficult>{difficult}</difficult><bndbox><xmin>{x1}</xmin>"
            f"<ymin>{y1}</ymin><xmax>{x2}</xmax><ymax>{y2}</ymax></bndbox></object>")


def voc_set(tmp_path, objects_b=None):
    root = tmp_path / "voc"
    (root / "Annotations").mkdir(parents=True)
    files = {"b_0002": objects_b or [voc_object("dog", (1, 1, 40, 30))],
             "a_0001": [voc_object("Cat", (11, 6, 20, 15)), voc_object("dog", (2, 3, 5, 6), difficult=1)]}
    for stem, objs in files.items():
        png(root / "JPEGImages" / f"{stem}.jpg.png", 40, 30)
        xml = (f"<annotation><filename>{stem}.jpg.png</filename><size><width>40</width>"
               f"<height>30</height><depth>3</depth></size>{''.join(objs)}</annotation>")
        (root / "Annotations" / f"{stem}.xml").write_text(xml)
    return root


def test_load_voc_converts_to_coco(tmp_path):
    ds = load_dataset(voc_set(tmp_path))
    # ids in sorted file order / sorted name order: stable whatever the directory order
    assert [(im.id, im.file_name) for im in ds.images] == [(1, "a_0001.jpg.png"), (2, "b_0002.jpg.png")]
    assert ds.categories == [{"id": 1, "name": "Cat"}, {"id": 2, "name": "dog"}]
    a = ds.coco["annotations"]
    # VOC corners are 1-based and inclusive: xmin=11..xmax=20 is 10 px wide starting at x=10
    assert a[0]["bbox"] == [10.0, 5.0, 10.0, 10.0] and a[0]["iscrowd"] == 0
    assert a[1]["iscrowd"] == 1  # difficult -> ignored by the protocol
    assert a[2]["bbox"] == [0.0, 0.0, 40.0, 30.0]  # a full-image box stays inside
    assert ds.read(2).shape == (30, 40, 3)


@pytest.mark.parametrize("obj, words", [
    (voc_object("dog", (1, 1, 60, 30)), "b_0002.xml: object 0: box [0.0, 0.0, 60.0, 30.0] lies outside"),
    (voc_object("dog", (10, 1, 5, 30)), "b_0002.xml: object 0: box [9.0, 0.0, -4.0, 30.0] has negative size"),
    ("<object><name></name></object>", "b_0002.xml: object 0: missing name"),
    ("<object><name>dog</name><bndbox><xmin>a</xmin></bndbox></object>", "object 0: bndbox needs numeric"),
    ("<object>", "b_0002.xml: not a readable Pascal VOC XML"),
])
def test_bad_voc_inputs(tmp_path, obj, words):
    with pytest.raises(UserError) as e:
        load_dataset(voc_set(tmp_path, [obj]))
    assert words in str(e.value)


def test_category_map_torchvision_names():
    # source: torchvision's COCO weights metadata, where label index == COCO category id
    # (person = 1, traffic light = 10, from the COCO category list).
    classes = torchvision_coco_classes()
    assert len(classes) == 91 and classes[1] == "person" and classes[10] == "traffic light"
    ds = {"categories": [{"id": 5, "name": "Person"}, {"id": 7, "name": "Traffic_Light"}]}
    assert category_map(ds, classes) == {1: 5, 10: 7}


def test_category_map_by_id_fallback_warns():
    ds = {"categories": [{"id": 1, "name": "crate"}, {"id": 2, "name": "drum"}]}
    with pytest.warns(UserWarning, match="mapping label index to category id"):
        assert category_map(ds, ["__background__", "c1", "c2"]) == {1: 1, 2: 2}


def test_category_map_warns_on_unmapped_and_fails_on_nothing():
    ds = {"categories": [{"id": 1, "name": "crate"}, {"id": 2, "name": "drum"}]}
    with pytest.warns(UserWarning, match="score AP 0.*drum"):
        assert category_map(ds, ["__background__", "crate"]) == {1: 1}
    with pytest.raises(UserError, match="no model class maps"):
        category_map({"categories": [{"id": 50, "name": "crate"}]}, ["__background__", "cat"])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert category_map(ds, ["__background__", "DRUM", "crate"]) == {1: 2, 2: 1}
