"""Parsers: the bad files found by hand, each a one-line UserError naming the file and the field
(images too large or claiming to be, deep JSON, numbers out of range, VOC sizes, no categories)."""
import json
import struct
import zlib

import numpy as np
import pytest

from speedbench.errors import UserError


def png_header_only(path, width, height):
    """A PNG whose IHDR claims width x height but whose pixel data is a few bytes
    (the shape of a "decompression bomb": the header alone decides what a decoder allocates)."""
    def chunk(kind, data):
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)

    ihdr = struct.pack(">IIBBBBB", width, height, 8, 2, 0, 0, 0)   # 8-bit RGB (PNG spec, IHDR layout)
    path.write_bytes(b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", zlib.compress(b"\0" * 16))
                     + chunk(b"IEND", b""))
    return path


def coco_folder(tmp_path, width=64, height=48, image=None, **overrides):
    from PIL import Image

    root = tmp_path / "ds"
    root.mkdir()
    if image is None:
        Image.fromarray(np.zeros((height, width, 3), np.uint8)).save(root / "a.png")
    else:
        image(root / "a.png")
    coco = {"images": [{"id": 1, "file_name": "a.png", "width": width, "height": height}],
            "annotations": [{"id": 1, "image_id": 1, "category_id": 1, "bbox": [1, 2, 10, 20]}],
            "categories": [{"id": 1, "name": "crate"}]}
    coco.update(overrides)
    (root / "annotations.json").write_text(json.dumps(coco))
    return root / "annotations.json"


# ----------------------------------------------------------------- images
@pytest.mark.parametrize("side", [100_000, 10_000])
def test_image_header_claiming_huge_size_is_refused_by_name(tmp_path, side):
    # 100000^2 trips PIL's own bomb guard (a DecompressionBombError traceback before); 10000^2 (1e8 px)
    # only warned and was decoded: 3.95 GiB. Both are refused from the header, naming the file.
    from speedbench.data import read_image

    bomb = png_header_only(tmp_path / "bomb.png", side, side)
    with pytest.raises(UserError, match=r"bomb\.png: image .*(limit|more pixels)"):
        read_image(bomb)


def test_dataset_image_above_the_pixel_limit_names_the_file_and_the_profile_key(tmp_path):
    from speedbench.data import load_dataset

    ann = coco_folder(tmp_path)
    assert len(load_dataset(ann)) == 1
    with pytest.raises(UserError, match=r"annotations\.json: image 1: a\.png is 64x48 = 3072 pixels, above the "
                                        r"limit of 1000 \(profile key dataset\.max_pixels\)"):
        load_dataset(ann, max_pixels=1000)


def test_bomb_in_a_dataset_is_exit_2_in_measure(tmp_path, capsys):
    from helpers import cli

    ann = coco_folder(tmp_path, width=50_000, height=50_000,
                      image=lambda p: png_header_only(p, 50_000, 50_000))
    code = cli(["measure", "--backend", "synthetic", "--model", "synthetic", "--dataset", str(ann)])
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1
    assert "annotations.json" in err and "max_pixels" in err


def test_profile_key_max_pixels_is_documented_and_checked():
    from speedbench.sweep import profile

    assert "max_pixels" in profile.__doc__
    text = '[run]\nname = "p"\n[dataset]\nscenes = {count = 1}\nmax_pixels = 0\n[[models]]\nid = "x"\n[[threads]]\nintra = 1\n'
    with pytest.raises(UserError, match=r"p\.toml: dataset\.max_pixels: 0 is out of range"):
        profile.parse_profile(text, "p.toml")
    assert profile.parse_profile(text.replace("max_pixels = 0", "max_pixels = 5000"), "p.toml").max_pixels == 5000


# ----------------------------------------------------------------- JSON depth and numbers
@pytest.mark.parametrize("text, what", [
    ('{"images": ' + "[" * 50_000 + "]" * 50_000 + "}", "nested deeper than 64 levels"),
    ('{"images": [{"id": 1' + "0" * 30 + ', "file_name": "a.png", "width": 64, "height": 48}], '
     '"annotations": [], "categories": []}', "out of range"),
    ('{"images": [], "annotations": [], "categories": [{"id": 1, "name": "x", "w": 1e999}]}', "not finite"),
])
def test_annotations_depth_and_numbers(tmp_path, text, what):
    from speedbench.data import load_dataset

    path = tmp_path / "gt.json"
    path.write_text(text)
    with pytest.raises(UserError, match=rf"gt\.json: .*{what}"):
        load_dataset(path, check_images=False)


def test_annotation_numbers_checked_per_field(tmp_path):
    from speedbench.data.datasets import validate_coco

    base = {"images": [{"id": 1, "file_name": "a.png", "width": 64, "height": 48}], "annotations": [],
            "categories": [{"id": 1, "name": "crate"}]}
    with pytest.raises(UserError, match=r"gt: image 1: width must be in 1..1000000"):
        validate_coco({**base, "images": [{**base["images"][0], "width": 10**7}]}, "gt")
    with pytest.raises(UserError, match=r"gt: image .*: id must fit in 64 bits"):
        validate_coco({**base, "images": [{**base["images"][0], "id": 10**400}]}, "gt")
    ann = {"id": 1, "image_id": 1, "category_id": 1, "bbox": [1, 2, 10**400, 3]}
    with pytest.raises(UserError, match=r"gt: annotation 1: bbox must be \[x, y, w, h\] numbers"):
        validate_coco({**base, "annotations": [ann]}, "gt")


@pytest.mark.parametrize("entry, field", [
    ({"image_id": 10**30, "category_id": 1, "bbox": [1, 2, 3, 4], "score": 0.5}, "out of range"),
    ({"image_id": 2**63, "category_id": 1, "bbox": [1, 2, 3, 4], "score": 0.5}, "out of range"),
    ({"image_id": 1, "category_id": -(10**25), "bbox": [1, 2, 3, 4], "score": 0.5}, "out of range"),
    ({"image_id": 1, "category_id": 1, "bbox": [1, 2, 3, 4], "score": "1e400"}, "score must be a finite number"),
])
@pytest.mark.parametrize("fast", [True, False], ids=["orjson", "stdlib"])
def test_detections_huge_numbers(tmp_path, monkeypatch, entry, field, fast):
    # load_detections scans the text before parsing; read_detections (the evaluate command's
    # path) lets orjson parse first and relies on its own per-field checks: both must refuse.
    from speedbench.data import jsonio
    from speedbench.evaluate import load_detections, read_detections

    if fast:
        pytest.importorskip("orjson")
    else:
        monkeypatch.setattr(jsonio, "orjson", None)
    gt = {"images": [{"id": 1, "file_name": "a.png", "width": 64, "height": 48}], "annotations": [],
          "categories": [{"id": 1, "name": "crate"}]}
    path = tmp_path / "dets.json"
    path.write_text(json.dumps([entry]).replace('"1e400"', "1e400"))
    for read in (load_detections, read_detections):
        with pytest.raises(UserError, match=rf"dets\.json: .*{field}"):
            read(path, gt)
    path.write_text("[" * 100_000 + "]" * 100_000)
    for read in (load_detections, read_detections):
        with pytest.raises(UserError, match=r"dets\.json: JSON nested deeper"):
            read(path, gt)
    path.write_text("[" * 70 + "]" * 70)  # deeper than MAX_DEPTH, within orjson's own bound
    for read in (load_detections, read_detections):
        with pytest.raises(UserError, match=r"dets\.json: "):
            read(path, gt)


def test_detections_built_in_python_with_a_huge_integer():
    # No JSON on the way (the API): numpy's float conversion raised OverflowError before.
    from speedbench.evaluate.cocoeval import GroundTruth
    from speedbench.evaluate.results import parse_detections

    gt = GroundTruth({"images": [{"id": 1, "file_name": "a.png", "width": 64, "height": 48}], "annotations": [],
                      "categories": [{"id": 1, "name": "crate"}]})
    with pytest.raises(UserError, match=r"dets: detection \[0\]: image_id must be a finite number in range"):
        parse_detections([{"image_id": 10**400, "category_id": 1, "bbox": [1, 2, 3, 4], "score": 0.5}], gt, "dets")


@pytest.mark.parametrize("width", ["inf", "nan", "1e400", "-3", "12.5"])
def test_voc_size_must_be_a_whole_number_in_range(tmp_path, width):
    from speedbench.data import load_dataset

    (tmp_path / "voc" / "Annotations").mkdir(parents=True)
    (tmp_path / "voc" / "JPEGImages").mkdir()
    (tmp_path / "voc" / "Annotations" / "a.xml").write_text(
        f"<annotation><filename>a.png</filename><size><width>{width}</width><height>48</height></size>"
        "<object><name>crate</name><bndbox><xmin>1</xmin><ymin>1</ymin><xmax>5</xmax><ymax>5</ymax></bndbox>"
        "</object></annotation>")
    with pytest.raises(UserError, match=r"a\.xml: size/width: must be a whole number in 1\.\.1000000"):
        load_dataset(tmp_path / "voc", check_images=False)


def test_run_meta_too_deep_is_a_corrupt_run_not_a_recursion_error(tmp_path):
    from speedbench.sweep import RunDir, load_run

    RunDir.create(tmp_path / "run", "", {"env": {}}).close()
    (tmp_path / "run" / "meta.json").write_text('{"env": ' + "[" * 100_000 + "]" * 100_000 + "}")
    with pytest.raises(UserError, match=r"meta\.json: corrupt metadata \(JSON nested deeper"):
        load_run(tmp_path / "run")


# ----------------------------------------------------------------- categories
def test_dataset_without_categories_names_the_file(tmp_path):
    from speedbench.data import load_dataset
    from speedbench.data.datasets import category_map

    ds = load_dataset(coco_folder(tmp_path, annotations=[], categories=[]))
    with pytest.raises(UserError, match=r"annotations\.json: the dataset has no categories"):
        category_map(ds, ["__background__", "crate"])
