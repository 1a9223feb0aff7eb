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

_CHUNK_ELEMENTS = 3_000_000  # bounds memory: resamples x thresholds x detections per chunk


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
        tps, fps = m.tp[sel, :, 0].T.astype(float), m.fp[sel, :, 0].T.astype(float)
        step = max(1, _CHUNK_ELEMENTS // max(1, tps.size))
        for c in range(0, n_boot, step):
            rows = slice(c, min(n_boot, c + step))
            ok = npos[rows] > 0
            if not ok.any():
                continue
            q = _mean_precision(weights[rows][ok][:, m.img[sel]], tps, fps, npos[rows][ok])
            idx = np.arange(rows.start, rows.stop)[ok]
            total[idx] += q
            count[idx] += 1
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / np.maximum(count, 1), -1.0)


def _mean_precision(w, tps, fps, npos):
    """Mean interpolated precision over thresholds and recall points, per weight row.

    w [B, N] weight of each detection, tps/fps [T, N] in score order, npos [B] > 0.
    """
    B, N = w.shape
    T, R = len(IOU_THRS), len(REC_THRS)
    if N == 0:
        return np.zeros(B)
    tp = np.cumsum(w[:, None, :] * tps[None], axis=2)
    fp = np.cumsum(w[:, None, :] * fps[None], axis=2)
    pr = tp / (fp + tp + EPS)
    pr = np.maximum.accumulate(pr[..., ::-1], axis=2)[..., ::-1]
    # recall tp / npos >= r  <=>  tp >= need, the least integer j with j / npos >= r.
    n = npos[:, None]
    need = np.ceil(REC_THRS[None, :] * n)
    need = np.where((need - 1) / n >= REC_THRS, need - 1, need)
    need = np.where(need / n < REC_THRS, need + 1, need)
    # One searchsorted for all rows: offset each row's (integer) counts past the previous row.
    big = int(npos.max()) + 2
    row = (np.arange(B)[:, None] * T + np.arange(T)[None, :]).astype(np.int64)  # [B, T]
    keys = (np.rint(tp).astype(np.int64) + row[..., None] * big).ravel()
    queries = need.astype(np.int64)[:, None, :] + row[..., None] * big  # [B, T, R]
    pos = np.searchsorted(keys, queries, side="left") - row[..., None] * N
    inside = pos < N
    flat = np.minimum(pos, N - 1) + row[..., None] * N
    q = np.where(inside, pr.ravel()[flat], 0.0)
    return q.mean(axis=(1, 2))


def percentile_interval(maps: np.ndarray, confidence: float):
    """Central percentile interval of the defined resampled values, or None."""
    maps = maps[maps > -1]
    if maps.size == 0:
        return None
    lo, hi = np.percentile(maps, [50 * (1 - confidence), 50 * (1 + confidence)])
    return [float(lo), float(hi)]
