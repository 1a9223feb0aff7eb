"""coco_evaluate: the COCO summary, per-class AP and a bootstrap interval of mAP."""
from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

from speedbench.errors import UserError
from speedbench.evaluate.bootstrap import draw_weights, percentile_interval, resampled_maps
from speedbench.evaluate.cocoeval import (Detections, GroundTruth, Matching, accumulate,
                                          per_class_ap, summarize)
from speedbench.evaluate.results import parse_detections

SUMMARY_KEYS = ("map", "map50", "map75", "map_small", "map_medium", "map_large",
                "mar_1", "mar_10", "mar_100", "mar_small", "mar_medium", "mar_large")


def coco_evaluate(gt, dets, bootstrap: int = 1000, seed: int = 0, confidence: float = 0.95,
                  threads: int = 1) -> dict:
    """Evaluate COCO-format detections against ground truth with the COCO protocol.

    gt: a COCO dict (images / annotations / categories), a Dataset (its .coco) or a GroundTruth.
    dets: a COCO results list [{image_id, category_id, bbox [x, y, w, h], score}], or
    Detections parsed against the same GroundTruth (results.read_detections).
    Returns the summary (SUMMARY_KEYS; -1 where undefined, as the reference),
    per_class {name: AP}, per_class_gt {name: non-crowd boxes}, n_images, n_detections, and map_ci95 = [lo, hi]: a
    percentile bootstrap over images (`bootstrap` resamples, seeded) at the given
    confidence. It reflects the sampling noise of the held-out set only, not
    annotation error or dataset shift; None when bootstrap=0 or mAP is undefined.
    threads: how many threads the bootstrap may use (the figures do not depend on it).
    """
    if not isinstance(bootstrap, int) or isinstance(bootstrap, bool) or bootstrap < 0:
        raise UserError(f"bootstrap must be a whole number >= 0, not {bootstrap!r}")
    if not 0 < confidence < 1:
        raise UserError(f"confidence must be between 0 and 1, not {confidence!r}")
    ground = gt if isinstance(gt, GroundTruth) else GroundTruth(getattr(gt, "coco", gt))
    dt = dets if isinstance(dets, Detections) else parse_detections(dets, ground)
    matching = Matching(ground, dt)
    with ThreadPoolExecutor(1) as side:
        # With threads to spare, the resamples start at once and the summary is worked out
        # beside them (the resamples need only the matching, not the summary).
        early = None
        if threads > 1 and bootstrap and ground.n_images and matching.n_pos[:, 0].any():
            early = side.submit(_resampled, matching, ground.n_images, bootstrap, seed, threads)
        precision, recall = accumulate(matching, len(ground.cat_ids))
        out = summarize(precision, recall)
        names = _unique_names(ground)
        out["per_class"] = per_class_ap(precision, names)
        out["per_class_gt"] = {n: int(c) for n, c in zip(names, matching.n_pos[:, 0])}
        out["n_images"] = ground.n_images
        out["n_detections"] = len(dt.score)
        out["map_ci95"] = None
        if bootstrap and out["map"] > -1 and ground.n_images:
            maps = early.result() if early else _resampled(matching, ground.n_images, bootstrap, seed, threads)
            out["map_ci95"] = percentile_interval(maps, confidence)
    out["bootstrap"] = {"resamples": bootstrap, "seed": seed, "confidence": confidence}
    return out


def _resampled(matching, n_images, bootstrap, seed, threads):
    return resampled_maps(matching, draw_weights(n_images, bootstrap, seed), threads)


def _unique_names(ground: GroundTruth) -> list[str]:
    seen: dict[str, int] = {}
    for name in ground.cat_names:
        seen[name] = seen.get(name, 0) + 1
    return [f"{n} (id {i})" if seen[n] > 1 else n for n, i in zip(ground.cat_names, ground.cat_ids)]
