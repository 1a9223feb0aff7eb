"""Paired accuracy differences: is graph A more accurate than graph B on *these* images?

Every graph of a run is scored on the same held-out images, so the difference
of two mAPs has a much tighter interval than the two mAPs' own intervals: an
image that is hard for A is usually hard for B too. A paired bootstrap draws
the image indices once per resample and scores both graphs on that draw
(Efron & Tibshirani, An Introduction to the Bootstrap, the two-sample paired
case); the interval of mAP(A) - mAP(B) that excludes 0 says A and B differ
beyond the sampling noise of the image set. Like the unpaired interval, it
says nothing about annotation error or a shift to production data.

PerImage keeps what the bootstrap needs of one graph's COCO matching (area
"all", up to 100 detections per image and class): per detection its image,
class, score, rank and true/false positive at each IoU threshold, plus the
ground-truth count per class and image. It is small, saved as .npz.
"""
from __future__ import annotations

import numpy as np

from speedbench.errors import UserError
from speedbench.evaluate.bootstrap import draw_weights, percentile_interval, resampled_maps
from speedbench.evaluate.cocoeval import Detections, GroundTruth, Matching
from speedbench.evaluate.results import parse_detections

_FIELDS = ("image_ids", "img", "cat", "score", "rank", "tp", "fp", "pos_per_image")


class PerImage:
    """One graph's per-image evaluation results (what resampling needs), area range "all"."""

    def __init__(self, image_ids, img, cat, score, rank, tp, fp, pos_per_image):
        self.image_ids = np.asarray(image_ids, np.int64)
        self.img, self.cat = np.asarray(img, np.int64), np.asarray(cat, np.int64)
        self.score, self.rank = np.asarray(score, np.float64), np.asarray(rank, np.int64)
        # [n_det, T, 1]: the layout bootstrap.resampled_maps reads (area index 0 = "all")
        self.tp = np.asarray(tp, bool).reshape(len(self.score), -1, 1)
        self.fp = np.asarray(fp, bool).reshape(len(self.score), -1, 1)
        self.pos_per_image = np.asarray(pos_per_image, np.float64)

    @classmethod
    def from_matching(cls, m: Matching, gt: GroundTruth) -> "PerImage":
        return cls(gt.image_ids, m.img, m.cat, m.score, m.rank, m.tp[:, :, 0], m.fp[:, :, 0], m.pos_per_image)

    @property
    def n_images(self) -> int:
        return len(self.image_ids)

    def map(self) -> float:
        """mAP (IoU .50:.95) on the images as they are (every weight 1)."""
        return float(resampled_maps(self, np.ones((1, self.n_images)))[0])

    def save(self, path) -> None:
        np.savez_compressed(path, **{f: getattr(self, f) for f in _FIELDS})

    @classmethod
    def load(cls, path) -> "PerImage":
        try:
            with np.load(path, allow_pickle=False) as z:
                return cls(**{f: z[f] for f in _FIELDS})
        except (OSError, KeyError, ValueError) as exc:
            raise UserError(f"{path}: not a per-image accuracy file ({exc})") from None


def per_image_results(gt, dets) -> PerImage:
    """PerImage of COCO-format detections (a results list or Detections) against ground truth."""
    ground = gt if isinstance(gt, GroundTruth) else GroundTruth(getattr(gt, "coco", gt))
    dt = dets if isinstance(dets, Detections) else parse_detections(dets, ground)
    return PerImage.from_matching(Matching(ground, dt), ground)


def paired_map_diff(a: PerImage, b: PerImage, bootstrap: int = 1000, seed: int = 0,
                    confidence: float = 0.95) -> dict:
    """mAP(a) - mAP(b) with a paired percentile bootstrap interval over the shared images.

    Returns {"diff", "ci_lo", "ci_hi", "n_images", "resamples", "confidence", "distinct"}:
    distinct is True when the interval excludes 0. ci_lo/ci_hi are NaN when mAP is
    undefined on too many resamples (no ground truth drawn).
    """
    if not np.array_equal(a.image_ids, b.image_ids):
        raise UserError("paired_map_diff: the two results are not on the same images")
    weights = draw_weights(a.n_images, bootstrap, seed)
    ma, mb = resampled_maps(a, weights), resampled_maps(b, weights)
    both = (ma > -1) & (mb > -1)
    diff = a.map() - b.map()
    lo = hi = float("nan")
    if both.any():   # central percentile interval, as the unpaired one (bootstrap.percentile_interval)
        lo, hi = (float(v) for v in np.percentile((ma - mb)[both], [50 * (1 - confidence), 50 * (1 + confidence)]))
    return {"diff": diff, "ci_lo": lo, "ci_hi": hi, "n_images": a.n_images, "resamples": bootstrap,
            "confidence": confidence, "distinct": bool(lo > 0 or hi < 0)}


def unpaired_interval(r: PerImage, bootstrap: int = 1000, seed: int = 0, confidence: float = 0.95):
    """The graph's own mAP interval (what coco_evaluate reports as map_ci95), for side-by-side use."""
    return percentile_interval(resampled_maps(r, draw_weights(r.n_images, bootstrap, seed)), confidence)

