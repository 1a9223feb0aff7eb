"""COCO-protocol evaluator checked against pycocotools (the COCO evaluation reference
implementation), against hand-worked examples, and for bad results files."""
import contextlib
import copy
import io
import json

import numpy as np
import pytest

from speedbench.errors import UserError
from speedbench.evaluate import coco_evaluate, load_detections
from speedbench.evaluate.bootstrap import resampled_maps
from speedbench.evaluate.cocoeval import REC_THRS, GroundTruth, Matching
from speedbench.evaluate.metrics import SUMMARY_KEYS
from speedbench.evaluate.results import parse_detections

pycocotools = pytest.importorskip("pycocotools")
from pycocotools.coco import COCO  # noqa: E402
from pycocotools.cocoeval import COCOeval  # noqa: E402


def reference(gt: dict, dets: list):
    """pycocotools COCOeval (bbox): the 12 stats and its precision array."""
    with contextlib.redirect_stdout(io.StringIO()):
        coco = COCO()
        coco.dataset = copy.deepcopy(gt)
        coco.createIndex()
        res = coco.loadRes(copy.deepcopy(dets))
        ev = COCOeval(coco, res, "bbox")
        ev.evaluate()
        ev.accumulate()
        ev.summarize()
    return ev.stats, ev.eval["precision"]


def random_case(seed: int):
    """A randomised ground truth + detections, covering the protocol's corner cases."""
    rng = np.random.default_rng(seed)
    n_img = int(rng.integers(1, 9))
    n_cat = int(rng.integers(1, 5))
    img_ids = [int(i) for i in rng.choice(np.arange(1, 1000), n_img, replace=False)]
    cat_ids = [int(i) for i in rng.choice(np.arange(1, 100), n_cat, replace=False)]
    images = [{"id": i, "width": 640, "height": 480, "file_name": f"{i}.png"} for i in img_ids]
    anns, dets = [], []
    silent_cat = cat_ids[0] if n_cat > 1 and rng.random() < 0.5 else None  # class without detections
    many = rng.random() < 0.25  # > 100 detections for one (image, class)
    for im in img_ids:
        n_gt = 0 if rng.random() < 0.2 else int(rng.integers(1, 8))  # some images without GT
        for _ in range(n_gt):
            side = rng.choice([rng.uniform(4, 30), rng.uniform(32, 95), rng.uniform(97, 300)])
            w, h = side * rng.uniform(0.6, 1.6), side * rng.uniform(0.6, 1.6)
            x, y = rng.uniform(0, 640 - w), rng.uniform(0, 480 - h)
            anns.append({"id": len(anns) + 1, "image_id": im, "category_id": int(rng.choice(cat_ids)),
                         "bbox": [x, y, w, h], "area": w * h * rng.uniform(0.5, 1.0),
                         "iscrowd": int(rng.random() < 0.15)})
        # detections: jittered copies of this image's boxes (sometimes with the wrong class) + noise
        for a in [a for a in anns if a["image_id"] == im]:
            for _ in range(int(rng.integers(0, 4))):
                x, y, w, h = a["bbox"]
                j = rng.normal(0, 0.08, 4) * [w, h, w, h]
                cat = a["category_id"] if rng.random() < 0.85 else int(rng.choice(cat_ids))
                dets.append({"image_id": im, "category_id": cat,
                             "bbox": [x + j[0], y + j[1], max(0.5, w + j[2]), max(0.5, h + j[3])],
                             "score": float(rng.random())})
        for _ in range(int(rng.integers(0, 6)) + (130 if many and im == img_ids[0] else 0)):
            w, h = rng.uniform(3, 200, 2)
            dets.append({"image_id": im, "category_id": cat_ids[-1],
                         "bbox": [rng.uniform(0, 600), rng.uniform(0, 440), w, h],
                         "score": float(rng.random())})
    dets = [d for d in dets if d["category_id"] != silent_cat]
    if rng.random() < 0.3:  # tied scores: order between images and inside one must follow the reference
        for d in dets:
            d["score"] = round(d["score"], 1)
    order = rng.permutation(len(dets))
    dets = [dets[i] for i in order]
    cats = [{"id": c, "name": f"class{c}"} for c in cat_ids]
    return {"images": images, "annotations": anns, "categories": cats}, dets


@pytest.mark.parametrize("seed", range(60))
def test_summary_matches_pycocotools(seed):
    # source: pycocotools COCOeval, the COCO evaluation reference implementation
    gt, dets = random_case(seed)
    assert dets  # pycocotools cannot load an empty list; that case is test_no_detections_...
    stats, precision = reference(gt, dets)
    ours = coco_evaluate(gt, dets, bootstrap=0)
    got = [ours[k] for k in SUMMARY_KEYS]
    np.testing.assert_allclose(got, stats, rtol=0, atol=1e-9)
    for k, c in enumerate(sorted(gt["categories"], key=lambda c: c["id"])):
        p = precision[:, :, k, 0, -1]
        ref = float(np.mean(p[p > -1])) if (p > -1).any() else -1.0
        assert ours["per_class"][c["name"]] == pytest.approx(ref, abs=1e-9)


def test_random_cases_cover_corner_cases():
    # The randomised set must really contain what the issue asks for.
    seen = {"crowd": 0, "image_without_gt": 0, "class_without_dets": 0, "over_100": 0}
    for seed in range(60):
        gt, dets = random_case(seed)
        seen["crowd"] += any(a["iscrowd"] for a in gt["annotations"])
        seen["image_without_gt"] += len({i["id"] for i in gt["images"]} - {a["image_id"] for a in gt["annotations"]}) > 0
        seen["class_without_dets"] += len({c["id"] for c in gt["categories"]} - {d["category_id"] for d in dets}) > 0
        per = {}
        for d in dets:
            per[d["image_id"], d["category_id"]] = per.get((d["image_id"], d["category_id"]), 0) + 1
        seen["over_100"] += max(per.values(), default=0) > 100
    assert all(v >= 5 for v in seen.values()), seen


def one_image(boxes, crowd=()):
    anns = [{"id": i + 1, "image_id": 1, "category_id": 1, "bbox": b, "area": b[2] * b[3],
             "iscrowd": int(i in crowd)} for i, b in enumerate(boxes)]
    return {"images": [{"id": 1, "width": 300, "height": 300}], "annotations": anns,
            "categories": [{"id": 1, "name": "box"}]}


def test_hand_worked_example():
    # Two ground-truth boxes A=[0,0,10,10], B=[20,20,10,10]; three detections by score:
    #   D1 0.9 [0,0,10,10]   IoU(A) = 1
    #   D2 0.8 [50,50,10,10] overlaps nothing -> false positive
    #   D3 0.7 [20,20,10,5]  IoU(B) = 50 / (100 + 50 - 50) = 0.5
    # IoU 0.50: TP FP TP -> recall .5 .5 1, precision 1 .5 2/3, envelope 1 2/3 2/3.
    #   The 51 recall points 0.00..0.50 read 1, the 50 points 0.51..1.00 read 2/3:
    #   AP50 = (51 + 50 * 2/3) / 101.
    # IoU 0.55..0.95 (9 thresholds): D3 is a false positive, recall stops at .5:
    #   AP = 51 / 101 at each.  mAP = (AP50 + 9 * 51/101) / 10.
    # Recall: 1 at IoU .5, .5 at the other nine -> mar_100 = (1 + 9 * .5) / 10 = .55;
    #   with one detection per image only D1 counts -> mar_1 = .5.
    # All boxes are 100 px^2 < 32^2: "small" equals "all"; medium / large have no GT -> -1.
    assert REC_THRS[50] == 0.5
    gt = one_image([[0, 0, 10, 10], [20, 20, 10, 10]])
    dets = [{"image_id": 1, "category_id": 1, "bbox": [0, 0, 10, 10], "score": 0.9},
            {"image_id": 1, "category_id": 1, "bbox": [50, 50, 10, 10], "score": 0.8},
            {"image_id": 1, "category_id": 1, "bbox": [20, 20, 10, 5], "score": 0.7}]
    r = coco_evaluate(gt, dets, bootstrap=0)
    ap50 = (51 + 50 * 2 / 3) / 101
    assert r["map50"] == pytest.approx(ap50, abs=1e-12)
    assert r["map75"] == pytest.approx(51 / 101, abs=1e-12)
    assert r["map"] == pytest.approx((ap50 + 9 * 51 / 101) / 10, abs=1e-12)
    assert r["map_small"] == pytest.approx(r["map"], abs=1e-12)
    assert r["map_medium"] == -1 and r["map_large"] == -1
    assert r["mar_1"] == pytest.approx(0.5) and r["mar_10"] == pytest.approx(0.55)
    assert r["mar_100"] == pytest.approx(0.55)
    assert r["per_class"] == {"box": pytest.approx(r["map"], abs=1e-12)}


def test_hand_worked_crowd_region():
    # GT A=[0,0,10,10] and a crowd region C=[50,50,40,40]. D2 [60,60,10,10] lies inside C:
    # against a crowd box IoU = intersection / detection area = 100/100 = 1, so D2 is
    # ignored, not a false positive. D1 matches A (TP), D3 far away (FP): precision 1 then .5,
    # recall 1 from the first detection on -> AP = 1 at every threshold.
    # Without the crowd flag C is a normal box: D2 IoU = 100 / 1600 -> FP, recall stops at
    # 1/2 -> AP = 51/101 at every threshold.
    boxes = [[0, 0, 10, 10], [50, 50, 40, 40]]
    dets = [{"image_id": 1, "category_id": 1, "bbox": [0, 0, 10, 10], "score": 0.9},
            {"image_id": 1, "category_id": 1, "bbox": [60, 60, 10, 10], "score": 0.8},
            {"image_id": 1, "category_id": 1, "bbox": [200, 200, 10, 10], "score": 0.7}]
    assert coco_evaluate(one_image(boxes, crowd=(1,)), dets, bootstrap=0)["map"] == pytest.approx(1.0)
    assert coco_evaluate(one_image(boxes), dets, bootstrap=0)["map"] == pytest.approx(51 / 101)


def test_no_detections_and_no_ground_truth():
    gt = one_image([[0, 0, 10, 10]])
    r = coco_evaluate(gt, [], bootstrap=10)
    # Ground truth but nothing detected: precision 0 everywhere (protocol), recall 0.
    assert r["map"] == 0.0 and r["mar_100"] == 0.0 and r["per_class"] == {"box": 0.0}
    empty = {"images": gt["images"], "annotations": [], "categories": gt["categories"]}
    dets = [{"image_id": 1, "category_id": 1, "bbox": [0, 0, 5, 5], "score": 0.5}]
    r = coco_evaluate(empty, dets)
    # No ground truth for any class: undefined -> -1 (pycocotools prints -1 as well).
    assert r["map"] == -1 and r["per_class"] == {"box": -1} and r["map_ci95"] is None
    assert reference(empty, dets)[0][0] == -1


def test_torchmetrics_cross_check():
    tm = pytest.importorskip("torchmetrics", reason="torchmetrics is not installed (optional cross-check)")
    import torch
    from torchmetrics.detection import MeanAveragePrecision

    gt, dets = random_case(3)
    metric = MeanAveragePrecision(box_format="xywh", iou_type="bbox")
    preds, target = [], []
    for im in gt["images"]:
        d = [x for x in dets if x["image_id"] == im["id"]]
        g = [x for x in gt["annotations"] if x["image_id"] == im["id"] and not x["iscrowd"]]
        preds.append({"boxes": torch.tensor([x["bbox"] for x in d]).reshape(-1, 4),
                      "scores": torch.tensor([x["score"] for x in d]),
                      "labels": torch.tensor([x["category_id"] for x in d], dtype=torch.long)})
        target.append({"boxes": torch.tensor([x["bbox"] for x in g]).reshape(-1, 4),
                       "labels": torch.tensor([x["category_id"] for x in g], dtype=torch.long)})
    metric.update(preds, target)
    gt = dict(gt, annotations=[a for a in gt["annotations"] if not a["iscrowd"]])
    gt["annotations"] = [dict(a, area=a["bbox"][2] * a["bbox"][3]) for a in gt["annotations"]]
    assert coco_evaluate(gt, dets, bootstrap=0)["map"] == pytest.approx(float(metric.compute()["map"]), abs=1e-4)
    del tm


def test_bootstrap_unit_weights_reproduce_map():
    gt, dets = random_case(7)
    ground = GroundTruth(gt)
    m = Matching(ground, parse_detections(dets, ground))
    maps = resampled_maps(m, np.ones((1, ground.n_images)))
    assert maps[0] == pytest.approx(coco_evaluate(gt, dets, bootstrap=0)["map"], abs=1e-12)


@pytest.mark.parametrize("path", ["product", "running_sum"])
@pytest.mark.parametrize("draw_seed", [5, 6, 7])
def test_bootstrap_draw_equals_reference_on_duplicated_images(monkeypatch, path, draw_seed):
    # A resample drawn with counts w must score what pycocotools gives on a dataset where
    # image i really appears w[i] times (fresh image and annotation ids for the copies).
    # Both ways of counting the detections so far (a BLAS product for few images, a running
    # sum otherwise) are checked against it.
    from speedbench.evaluate import bootstrap

    monkeypatch.setattr(bootstrap, "_PRODUCT_RATIO", 10 ** 9 if path == "product" else 0)
    gt, dets = merged_case(range(30, 36))
    assert any(a["iscrowd"] for a in gt["annotations"])  # the ignored-detection path is used
    ground = GroundTruth(gt)
    m = Matching(ground, parse_detections(dets, ground))
    rng = np.random.default_rng(draw_seed)
    w = np.bincount(rng.integers(0, ground.n_images, ground.n_images), minlength=ground.n_images)
    sorted_ids = list(ground.image_ids)
    images, anns, dups = [], [], []
    for i, im_id in enumerate(sorted_ids):
        for c in range(w[i]):
            new = int(im_id) * 100 + c
            images.append({"id": new, "width": 640, "height": 480})
            anns += [dict(a, id=len(anns) + 1 + j, image_id=new) for j, a in
                     enumerate(x for x in gt["annotations"] if x["image_id"] == im_id)]
            dups += [dict(d, image_id=new) for d in dets if d["image_id"] == im_id]
    dup_gt = {"images": images, "annotations": anns, "categories": gt["categories"]}
    expected = reference(dup_gt, dups)[0][0]
    assert resampled_maps(m, w[None].astype(float))[0] == pytest.approx(expected, abs=1e-9)


def merged_case(seeds):
    """Several random cases side by side as one larger set (image ids made distinct)."""
    images, anns, dets = [], [], []
    cats = {}
    for n, seed in enumerate(seeds):
        g, d = random_case(seed)
        off = 1000 * (n + 1)
        images += [dict(i, id=i["id"] + off) for i in g["images"]]
        anns += [dict(a, id=len(anns) + j + 1, image_id=a["image_id"] + off)
                 for j, a in enumerate(g["annotations"])]
        dets += [dict(x, image_id=x["image_id"] + off) for x in d]
        cats.update({c["id"]: c for c in g["categories"]})
    return {"images": images, "annotations": anns, "categories": list(cats.values())}, dets


def test_bootstrap_interval_is_seeded_and_brackets_map():
    gt, dets = merged_case(range(20, 30))
    a = coco_evaluate(gt, dets, bootstrap=200, seed=3)
    b = coco_evaluate(gt, dets, bootstrap=200, seed=3)
    c = coco_evaluate(gt, dets, bootstrap=200, seed=4)
    assert a["map_ci95"] == b["map_ci95"] and a["map_ci95"] != c["map_ci95"]
    lo, hi = a["map_ci95"]
    assert lo <= a["map"] <= hi and lo < hi


def write(tmp_path, obj, name="dets.json"):
    p = tmp_path / name
    p.write_text(obj if isinstance(obj, str) else json.dumps(obj))
    return p


GOOD = {"image_id": 1, "category_id": 1, "bbox": [0, 0, 5, 5], "score": 0.5}


@pytest.mark.parametrize("bad, words", [
    ([GOOD, {"image_id": 1, "category_id": 1, "bbox": [0, 0, 5, 5]}], "[1]: missing field 'score'"),
    ([GOOD, dict(GOOD, image_id=7)], "[1]: image_id is not an image"),
    ([dict(GOOD, category_id=9)], "[0]: category_id is not a category"),
    ([GOOD, GOOD, dict(GOOD, bbox=[0, 0, -1, 5])], "[2]: bbox has negative width"),
    ([dict(GOOD, bbox=[0, 0, 5])], "[0]: bbox must be [x, y, w, h]"),
    ([dict(GOOD, bbox="0 0 5 5")], "[0]: bbox must be"),
    ([dict(GOOD, score="high")], "[0]: score must be a number"),
    ([dict(GOOD, score=float("nan"))], "[0]: score must be a finite number"),
    ([dict(GOOD, image_id=1.5)], "[0]: image_id must be an integer"),
    ([GOOD, 3], "[1]: expected an object"),
    ({"image_id": 1}, "expected a JSON list"),
])
def test_bad_results_file(tmp_path, bad, words):
    p = write(tmp_path, bad)
    with pytest.raises(UserError) as e:
        load_detections(p, one_image([[0, 0, 10, 10]]))
    assert words in str(e.value) and str(p) in str(e.value)


def test_results_file_not_json_or_missing(tmp_path):
    with pytest.raises(UserError, match="not a readable JSON"):
        load_detections(write(tmp_path, "[{"), one_image([[0, 0, 10, 10]]))
    with pytest.raises(UserError, match="not found"):
        load_detections(tmp_path / "nope.json", one_image([[0, 0, 10, 10]]))


def test_bad_arguments():
    with pytest.raises(UserError, match="bootstrap"):
        coco_evaluate(one_image([[0, 0, 10, 10]]), [GOOD], bootstrap=-1)
    with pytest.raises(UserError, match="confidence"):
        coco_evaluate(one_image([[0, 0, 10, 10]]), [GOOD], confidence=1.5)


def test_larger_set_matches_pycocotools():
    # source: pycocotools COCOeval; ~300 images, many classes, ties across images.
    gt, dets = merged_case(range(60, 120))
    stats, _ = reference(gt, dets)
    ours = coco_evaluate(gt, dets, bootstrap=0)
    np.testing.assert_allclose([ours[k] for k in SUMMARY_KEYS], stats, rtol=0, atol=1e-9)


def test_cli_json_and_text(tmp_path, capsys):
    from speedbench.cli import main

    gt, dets = random_case(5)
    g, d = write(tmp_path, gt, "gt.json"), write(tmp_path, dets)
    assert main(["evaluate", str(g), str(d), "--json", "--bootstrap", "50"]) == 0
    out = json.loads(capsys.readouterr().out)
    want = coco_evaluate(gt, dets, bootstrap=50)
    for key in ("map", "map50", "map75", "map_small", "map_medium", "map_large",
                "mar_1", "mar_10", "mar_100", "per_class", "map_ci95"):
        assert out[key] == want[key]
    assert main(["evaluate", str(g), str(d)]) == 0
    text = capsys.readouterr().out
    assert f"{want['map']:.3f}" in text and "class5" in text and "bootstrap over the 6 images" in text


def test_cli_bad_input_exits_2_with_one_line(tmp_path, capsys):
    from speedbench.cli import main

    gt, dets = random_case(5)
    g = write(tmp_path, gt, "gt.json")
    dets[3]["bbox"] = [1, 2, 3]
    d = write(tmp_path, dets)
    assert main(["evaluate", str(g), str(d)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("speedbench: error:") and "detection [3]" in err and "\n" not in err
    assert main(["evaluate", str(g)]) == 2
    assert "either DETS" in capsys.readouterr().err
    bad_gt = dict(gt, annotations=gt["annotations"] + [dict(gt["annotations"][0], id=9999, category_id=555)])
    assert main(["evaluate", str(write(tmp_path, bad_gt, "bad.json")), str(d)]) == 2
    assert "unknown category_id 555" in capsys.readouterr().err


def test_bootstrap_blocks_and_threads_do_not_change_the_draws(monkeypatch):
    # The resamples are cut into blocks and may run on threads: each draw's mAP must not
    # depend on that. Checked against the same draws in one block on one thread, and one
    # draw against pycocotools run on a set where the images really repeat (above).
    from speedbench.evaluate import bootstrap
    from speedbench.evaluate.bootstrap import draw_weights

    gt, dets = merged_case(range(40, 52))
    ground = GroundTruth(gt)
    m = Matching(ground, parse_detections(dets, ground))
    w = draw_weights(ground.n_images, 64, seed=1)
    whole = resampled_maps(m, w)
    monkeypatch.setattr(bootstrap, "_BLOCK_ELEMENTS", 50)  # a few rows per block
    monkeypatch.setattr(bootstrap, "_MIN_ROWS", 1)
    assert np.array_equal(resampled_maps(m, w, threads=2), whole)
    assert np.array_equal(resampled_maps(m, w), whole)
    # The BLAS product and the running sum count the same whole numbers exactly.
    monkeypatch.setattr(bootstrap, "_PRODUCT_RATIO", 0)
    assert np.array_equal(resampled_maps(m, w), whole)
    monkeypatch.setattr(bootstrap, "_PRODUCT_RATIO", 10 ** 9)
    assert np.array_equal(resampled_maps(m, w, threads=2), whole)
    with pytest.raises(ValueError, match="whole numbers"):
        resampled_maps(m, w * 0.5 + 0.25)


def test_membership_and_percentile_agree_with_numpy():
    # Reference: numpy's own np.isin and np.percentile (default "linear" method), which the
    # evaluate path replaces to keep numpy.ma out of its start-up. Exact equality.
    from speedbench.evaluate.bootstrap import _percentile
    from speedbench.evaluate.cocoeval import is_member

    rng = np.random.default_rng(3)
    for _ in range(300):
        ids = np.sort(rng.integers(-50, 50, int(rng.integers(0, 30))))
        values = rng.integers(-60, 60, int(rng.integers(0, 40)))
        assert np.array_equal(is_member(values, ids), np.isin(values, ids))
        floats = np.r_[values + rng.choice([0.0, 0.5], values.size), np.nan, np.inf, -np.inf]
        assert np.array_equal(is_member(floats, ids), np.isin(floats, ids))
    for _ in range(2000):
        v = np.sort(rng.random(int(rng.integers(1, 2000))) * rng.choice([1e-3, 1.0, 1e3]))
        for pct in (2.5, 97.5, 0.0, 100.0, 50.0, float(rng.random() * 100)):
            assert _percentile(v, pct) == np.percentile(v, pct)


def test_cli_scoring_a_file_imports_neither_torch_nor_matplotlib(tmp_path):
    # `speedbench evaluate GT DETS` is a command users wait on: torch and matplotlib
    # take seconds to import and nothing on this path needs them.
    import subprocess
    import sys

    gt, dets = random_case(5)
    g, d = write(tmp_path, gt, "gt.json"), write(tmp_path, dets)
    # numpy.ma too where numpy loads it lazily (numpy >= 2): np.isin, np.unique and
    # np.percentile import it on first use, 20 ms of a command that takes well under a second.
    code = ("import sys\nimport numpy\nlazy_ma = 'numpy.ma' not in sys.modules\n"
            "from speedbench.cli import main\n"
            "assert main(['evaluate', sys.argv[1], sys.argv[2], '--json']) == 0\n"
            "heavy = sorted(m for m in sys.modules if m.split('.')[0] in ('torch', 'torchvision', 'matplotlib')"
            " or (lazy_ma and m == 'numpy.ma'))\n"
            "print('HEAVY', heavy, file=sys.stderr)\n")
    out = subprocess.run([sys.executable, "-c", code, str(g), str(d)], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    assert "HEAVY []" in out.stderr
    assert json.loads(out.stdout)["map"] == coco_evaluate(gt, dets, bootstrap=0)["map"]


@pytest.mark.parametrize("fast", [True, False], ids=["orjson", "stdlib"])
def test_results_file_reads_the_same_with_and_without_orjson(tmp_path, monkeypatch, fast):
    # orjson is an optional extra; the standard library's json is the fallback. Both must
    # give the same figures, and the same verdict and message on a file only one of them
    # would accept (NaN is not JSON; the standard library reads it, orjson refuses it).
    from speedbench.data import jsonio as jsonfile
    from speedbench.evaluate import read_detections

    if fast:
        pytest.importorskip("orjson")
    else:
        monkeypatch.setattr(jsonfile, "orjson", None)
    gt, dets = random_case(11)
    p = write(tmp_path, dets)
    ground = GroundTruth(gt)
    assert coco_evaluate(ground, read_detections(p, ground), bootstrap=20) == coco_evaluate(gt, dets, bootstrap=20)
    assert jsonfile.read_json(p) == json.loads(p.read_text())
    nan = write(tmp_path, '[{"image_id": 1, "category_id": 1, "bbox": [0, 0, 5, 5], "score": NaN}]', "nan.json")
    with pytest.raises(UserError, match=r"\[0\]: score must be a finite number"):
        read_detections(nan, one_image([[0, 0, 10, 10]]))
    with pytest.raises(UserError, match="not a readable JSON file .*Expecting"):
        read_detections(write(tmp_path, "[{", "broken.json"), one_image([[0, 0, 10, 10]]))


def test_small_scores_take_the_fast_parser(tmp_path, monkeypatch):
    # json.dumps writes a score of 0.006 with 19 digits after the point; that is no risk to
    # the fast parser (only an integer part of 19+ digits or a 3-digit exponent is), so such a
    # file must not fall back to the standard library. Large integers still must.
    from speedbench.data import jsonio

    pytest.importorskip("orjson")
    text = json.dumps([{"image_id": 1, "category_id": 1, "bbox": [0, 0, 5, 5], "score": 0.0061768287842781655}])
    assert "0061768287842781655" in text
    monkeypatch.setattr(jsonio.json, "loads", lambda *a, **k: pytest.fail("standard library used"))
    assert jsonio.read_json(write(tmp_path, text))[0]["score"] == 0.0061768287842781655
    monkeypatch.undo()
    with pytest.raises(UserError, match="beyond 64 bits"):
        jsonio.read_json(write(tmp_path, '[{"image_id": 9223372036854775808}]', "big.json"))
    with pytest.raises(UserError, match="not finite"):
        jsonio.read_json(write(tmp_path, '[1.5e999]', "inf.json"))


@pytest.mark.parametrize("seed", range(5))
def test_nesting_depth_counts_brackets_outside_strings(seed):
    # Reference: the depth of the object Python's json module builds from the same text.
    from speedbench.data.jsonio import nesting_depth

    rng = np.random.default_rng(seed)
    chars = ['"', "\\", "[", "]", "{", "}", "a", "é"]

    def text():
        return "".join(rng.choice(chars) for _ in range(int(rng.integers(0, 6))))

    def build(d):
        r = rng.random()
        if d > 5 or r < 0.3:
            return text()
        if r < 0.65:
            return [build(d + 1) for _ in range(int(rng.integers(0, 3)))]
        return {text(): build(d + 1) for _ in range(int(rng.integers(0, 3)))}

    def depth(o):
        if isinstance(o, list):
            return 1 + max(map(depth, o), default=0)
        if isinstance(o, dict):
            return 1 + max(map(depth, o.values()), default=0)
        return 0

    for _ in range(200):
        obj = build(0)
        s = json.dumps(obj, ensure_ascii=bool(rng.random() < 0.5))
        assert nesting_depth(s) == nesting_depth(s.encode()) == depth(obj), s
