"""Paired accuracy differences (issue 18, part 3)."""
import numpy as np
import pytest

from speedbench.evaluate.metrics import coco_evaluate
from speedbench.evaluate.paired import PerImage, paired_map_diff, per_image_results, unpaired_interval


def _scenario(n_images=40, seed=0):
    """One 100x100 box per image; A's detection overlaps it better than B's on every image.

    Images differ a lot in how well they can be localised (IoU 0.5-0.97 for A), so
    each mAP on its own has a wide interval; B is always a little worse (IoU lower by a
    fixed step), which only a paired comparison sees.
    """
    rng = np.random.default_rng(seed)
    gt = {"images": [{"id": i + 1, "width": 200, "height": 200} for i in range(n_images)],
          "categories": [{"id": 1, "name": "thing"}],
          "annotations": [{"id": i + 1, "image_id": i + 1, "category_id": 1, "bbox": [0, 0, 100, 100],
                           "area": 10000, "iscrowd": 0} for i in range(n_images)]}
    iou_a = rng.uniform(0.5, 0.97, n_images)
    iou_b = iou_a - 0.08
    scores = rng.uniform(0.3, 1.0, n_images)

    def dets(ious):
        # a box [0, 0, w, 100] inside the ground truth has IoU w / 100
        return [{"image_id": i + 1, "category_id": 1, "bbox": [0.0, 0.0, 100.0 * q, 100.0], "score": float(s)}
                for i, (q, s) in enumerate(zip(ious, scores))]
    return gt, dets(iou_a), dets(iou_b)


def test_per_image_results_reproduce_the_evaluators_map_and_survive_a_file(tmp_path):
    from pycocotools.coco import COCO
    from pycocotools.cocoeval import COCOeval

    gt, a, _ = _scenario()
    r = per_image_results(gt, a)
    # reference: pycocotools' COCOeval on the same ground truth and detections
    coco = COCO()
    coco.dataset = gt
    coco.createIndex()
    ev = COCOeval(coco, coco.loadRes(a), "bbox")
    ev.evaluate(); ev.accumulate(); ev.summarize()
    assert r.map() == pytest.approx(ev.stats[0], abs=1e-12)
    assert r.map() == pytest.approx(coco_evaluate(gt, a, bootstrap=0)["map"], abs=1e-12)
    r.save(tmp_path / "r.npz")
    back = PerImage.load(tmp_path / "r.npz")
    assert back.map() == r.map() and np.array_equal(back.tp, r.tp)


def test_better_on_every_image_paired_excludes_zero_while_unpaired_intervals_overlap():
    gt, a, b = _scenario()
    ra, rb = per_image_results(gt, a), per_image_results(gt, b)
    ia, ib = unpaired_interval(ra), unpaired_interval(rb)
    assert ra.map() > rb.map()
    assert ia[0] < ib[1] and ib[0] < ia[1], (ia, ib)          # the two intervals overlap
    d = paired_map_diff(ra, rb)
    assert d["distinct"] and d["ci_lo"] > 0, d                 # the paired interval excludes 0
    assert d["diff"] == pytest.approx(ra.map() - rb.map())
    same = paired_map_diff(ra, ra)
    assert same["diff"] == 0 and same["ci_lo"] == 0 == same["ci_hi"] and not same["distinct"]


def test_paired_bootstrap_matches_scipys_paired_bootstrap():
    # Reference: scipy.stats.bootstrap(..., paired=True) resamples the shared image
    # indices and hands both samples the same draw; the statistic scores both graphs
    # on that draw (image weights = how often each index was drawn).
    from scipy.stats import bootstrap

    from speedbench.evaluate.bootstrap import resampled_maps

    gt, a, b = _scenario(seed=3)
    ra, rb = per_image_results(gt, a), per_image_results(gt, b)
    n = ra.n_images
    idx = np.arange(n)

    def stat(ia, ib, axis=-1):
        ia = np.atleast_2d(ia)
        w = np.stack([np.bincount(row, minlength=n) for row in ia]).astype(float)
        d = resampled_maps(ra, w) - resampled_maps(rb, w)
        return d if d.size > 1 else d[0]

    ref = bootstrap((idx, idx), stat, paired=True, vectorized=True, n_resamples=4000, method="percentile",
                    confidence_level=0.95, random_state=np.random.default_rng(11))
    ours = paired_map_diff(ra, rb, bootstrap=4000, seed=5)
    width = ref.confidence_interval.high - ref.confidence_interval.low
    assert width > 0
    # Two independent Monte-Carlo runs of the same bootstrap: endpoints agree within a
    # small part of the width (4000 resamples; common practice for this tolerance).
    assert ours["ci_lo"] == pytest.approx(ref.confidence_interval.low, abs=0.15 * width)
    assert ours["ci_hi"] == pytest.approx(ref.confidence_interval.high, abs=0.15 * width)


def test_results_on_different_images_are_refused():
    from speedbench.errors import UserError

    gt, a, _ = _scenario(n_images=10)
    gt2, b, _ = _scenario(n_images=12)
    with pytest.raises(UserError, match="same images"):
        paired_map_diff(per_image_results(gt, a), per_image_results(gt2, b))


def _rows(tmp_path, with_files=True):
    import pandas as pd

    gt, a, b = _scenario()
    rows = []
    for name, dets, ms in (("a", a, 10.0), ("b", b, 12.0)):
        r = per_image_results(gt, dets)
        f = tmp_path / f"{name}.npz"
        r.save(f)
        lo, hi = unpaired_interval(r)
        rows.append({"model": name, "size": 320, "proposals": 0, "intra_threads": 1, "status": "ok",
                     "lat_p50_ms": ms, "lat_p50_ci_lo_ms": ms - 0.1, "lat_p50_ci_hi_ms": ms + 0.1,
                     "map": r.map(), "map_ci_lo": lo, "map_ci_hi": hi,
                     "per_image_file": str(f) if with_files else ""})
    return pd.DataFrame(rows)


def test_frontier_pick_and_compare_use_the_paired_difference(tmp_path):
    from speedbench.analyse import frontier, pick
    from speedbench.analyse.regression import accuracy_delta

    # b is slower and worse on every image, but its own mAP interval overlaps a's
    unpaired = frontier(_rows(tmp_path, with_files=False)).set_index("model")
    assert unpaired.loc["b", "frontier_status"] == "tied"
    df = _rows(tmp_path)
    paired = frontier(df).set_index("model")
    assert paired.loc["b", "frontier_status"] == "dominated" and paired.loc["a", "frontier_status"] == "frontier"

    p = pick(df, budget_ms=20)
    assert p.best["model"] == "a"
    r = p.runners_up.iloc[0]
    assert r["map_vs_best_paired"] and not r["map_vs_best_tied"] and r["map_vs_best_ci_hi"] < 0
    assert not any("tied with the pick" in n for n in p.notes)
    assert "paired CI" in p.to_text()

    base, new = df.iloc[0].to_dict(), df.iloc[1].to_dict()
    d = accuracy_delta(base, new)
    assert d["accuracy"] == "lower" and d["map_delta_method"].startswith("paired") and d["map_delta_ci_hi"] < 0
    base["per_image_file"] = new["per_image_file"] = ""
    wide = accuracy_delta(base, new)     # without per-image results: the unpaired fallback
    assert wide["map_delta_method"].startswith("unpaired")
    assert wide["map_delta_ci_hi"] - wide["map_delta_ci_lo"] > 3 * (d["map_delta_ci_hi"] - d["map_delta_ci_lo"])
