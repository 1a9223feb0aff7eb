"""Bootstrap confidence interval of mAP over the images of a held-out set.

A percentile bootstrap: draw the images with replacement (a seeded numpy
Generator), recompute mAP on each draw, report the central percentiles. It
measures how much mAP would move if another set of the same size were drawn
from the same source: sampling noise of a small held-out set. It does not
cover annotation errors, a shift between the held-out set and production
data, or the randomness of training. Two configurations whose intervals
overlap heavily should not be ranked by mAP alone.

Matching is per image, so a draw reuses every image's matched detections;
only the accumulation is redone, with each image weighted by how many times
it was drawn. Ties in score between copies of one image are grouped, which
cannot change the interpolated precision (tests/test_cocoeval.py checks a draw
against the reference evaluator run on explicitly duplicated images).
"""
from __future__ import annotations

import numpy as np

from speedbench.evaluate.cocoeval import EPS, IOU_THRS, MAX_DETS, REC_THRS, Matching

_CHUNK_ELEMENTS = 2_000_000  # bounds memory: resamples x detections per chunk


def draw_weights(n_images: int, n_boot: int, seed: int) -> np.ndarray:
    """[n_boot, n_images] counts: how often each image appears in each resample."""
    rng = np.random.default_rng(seed)
    idx = rng.integers(0, n_images, size=(n_boot, n_images))
    flat = (idx + np.arange(n_boot)[:, None] * n_images).ravel()
    return np.bincount(flat, minlength=n_boot * n_images).reshape(n_boot, n_images).astype(float)


def resampled_maps(m: Matching, weights: np.ndarray) -> np.ndarray:
    """mAP (IoU .50:.95, area all, maxDets 100) for each row of image weights; -1 if undefined."""
    n_boot = len(weights)
    n_cat = m.pos_per_image.shape[0]
    total = np.zeros(n_boot)
    count = np.zeros(n_boot)
    order = np.lexsort((m.rank, m.img, -m.score, m.cat))
    order = order[m.rank[order] < MAX_DETS[-1]]
    starts = np.searchsorted(m.cat[order], np.arange(n_cat + 1))
    for k in range(n_cat):
        sel = order[starts[k]:starts[k + 1]]
        npos = weights @ m.pos_per_image[k]
        tp, ig = m.tp[sel, :, 0].T, ~m.tp[sel, :, 0].T & ~m.fp[sel, :, 0].T
        step = max(1, _CHUNK_ELEMENTS // max(1, len(sel)))
        for c in range(0, n_boot, step):
            rows = np.arange(c, min(n_boot, c + step))
            rows = rows[npos[rows] > 0]
            if rows.size:
                total[rows] += _mean_precision(weights[rows][:, m.img[sel]], tp, ig, npos[rows])
                count[rows] += 1
    return np.where(count > 0, total / np.maximum(count, 1), -1.0)


def _mean_precision(w, tp_mask, ig_mask, npos):
    """Mean interpolated precision over thresholds and recall points, per weight row.

    w [B, N]: weight of each detection (in score order); tp_mask / ig_mask [T, N]: true
    positive / ignored at each threshold; npos [B] > 0: weighted count of ground truths.
    The precision envelope read at a recall point is a suffix maximum that is always
    reached at a true positive (precision only rises there), so only true-positive
    positions are evaluated: |TP| instead of N per row and threshold.
    """
    B, N = w.shape
    T, R = len(IOU_THRS), len(REC_THRS)
    if N == 0:
        return np.zeros(B)
    seen = np.cumsum(w, axis=1)
    # recall tp / npos >= r  <=>  tp >= need, the least integer j with j / npos >= r.
    n = npos[:, None]
    need = np.ceil(REC_THRS[None, :] * n)
    need = np.where((need - 1) / n >= REC_THRS, need - 1, need)
    need = np.where(need / n < REC_THRS, need + 1, need).astype(np.int64)
    big = int(npos.max()) + 2
    total = np.zeros(B)
    for t in range(T):
        P = np.flatnonzero(tp_mask[t])
        if P.size == 0:
            continue  # no true positive: precision 0 at every recall point
        tp = np.cumsum(w[:, P], axis=1)
        fp = seen[:, P] - tp
        I = np.flatnonzero(ig_mask[t])
        if I.size:
            ig = np.concatenate([np.zeros((B, 1)), np.cumsum(w[:, I], axis=1)], axis=1)
            fp -= ig[:, np.searchsorted(I, P, side="right")]
        pr = tp / (fp + tp + EPS)
        pr = np.maximum.accumulate(pr[:, ::-1], axis=1)[:, ::-1]
        # One searchsorted for all rows: offset each row's integer counts past the previous row.
        off = np.arange(B, dtype=np.int64)[:, None] * big
        pos = np.searchsorted((np.rint(tp).astype(np.int64) + off).ravel(), need + off)
        pos -= np.arange(B)[:, None] * P.size
        q = np.where(pos < P.size, pr.ravel()[np.minimum(pos, P.size - 1) + np.arange(B)[:, None] * P.size], 0.0)
        total += q.sum(axis=1)
    return total / (T * R)


def percentile_interval(maps: np.ndarray, confidence: float):
    """Central percentile interval of the defined resampled values, or None."""
    maps = maps[maps > -1]
    if maps.size == 0:
        return None
    lo, hi = np.percentile(maps, [50 * (1 - confidence), 50 * (1 + confidence)])
    return [float(lo), float(hi)]
