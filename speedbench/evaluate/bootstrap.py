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

How it is fast: counts are integers, so the running sums are int32 and exact;
resamples are processed a block of rows at a time, small enough to stay in the
CPU cache; per class, everything that does not depend on the draw (which
detections are true positives or ignored at each threshold, where they sit) is
worked out once. Blocks are independent and can run on several threads (numpy
releases the interpreter lock inside these loops).
"""
from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numpy as np

from speedbench.evaluate.cocoeval import EPS, IOU_THRS, MAX_DETS, REC_THRS, Matching

_BLOCK_ELEMENTS = 1 << 20  # resamples x detections per block: a few MiB, cache-sized


def draw_weights(n_images: int, n_boot: int, seed: int) -> np.ndarray:
    """[n_boot, n_images] counts: how often each image appears in each resample."""
    rng = np.random.default_rng(seed)
    idx = rng.integers(0, n_images, size=(n_boot, n_images))
    flat = (idx + np.arange(n_boot)[:, None] * n_images).ravel()
    return np.bincount(flat, minlength=n_boot * n_images).reshape(n_boot, n_images).astype(float)


def resampled_maps(m: Matching, weights: np.ndarray, threads: int = 1) -> np.ndarray:
    """mAP (IoU .50:.95, area all, maxDets 100) for each row of image counts; -1 if undefined.

    weights [n_boot, n_images]: whole numbers >= 0 (how often each image is drawn).
    """
    weights = np.asarray(weights)
    counts = np.rint(weights)
    if weights.size and (counts.min() < 0 or counts.max() >= 2 ** 20 or not np.array_equal(weights, counts)):
        raise ValueError("bootstrap weights must be whole numbers between 0 and 2**20")
    n_boot, n_cat = len(weights), m.pos_per_image.shape[0]
    # One extra image column of zeros: index n_images reads weight 0 (see _Class).
    w = np.zeros((n_boot, weights.shape[1] + 1), np.int32)
    w[:, :-1] = counts
    npos = counts @ m.pos_per_image.T  # [n_boot, K]
    order = np.lexsort((m.rank, m.img, -m.score, m.cat))
    order = order[m.rank[order] < MAX_DETS[-1]]
    starts = np.searchsorted(m.cat[order], np.arange(n_cat + 1))
    jobs = []
    for k in range(n_cat):
        sel = order[starts[k]:starts[k + 1]]
        live = np.flatnonzero(npos[:, k] > 0)
        if live.size:
            cls = _Class(m.img[sel], m.tp[sel, :, 0], m.fp[sel, :, 0], sentinel=weights.shape[1])
            step = max(1, _BLOCK_ELEMENTS // max(1, cls.n))
            jobs += [(k, cls, live[c:c + step]) for c in range(0, live.size, step)]
    run = lambda job: job[1].mean_precision(w[job[2]], npos[job[2], job[0]])  # noqa: E731
    if threads > 1 and len(jobs) > 1:
        with ThreadPoolExecutor(threads) as pool:
            results = list(pool.map(run, jobs))
    else:
        results = [run(job) for job in jobs]
    total, count = np.zeros(n_boot), np.zeros(n_boot)
    for (_, _, rows), r in zip(jobs, results):
        total[rows] += r
        count[rows] += 1
    return np.where(count > 0, total / np.maximum(count, 1), -1.0)


class _Class:
    """One class's detections in score order, and what each threshold needs of them."""

    def __init__(self, img, tp_mask, fp_mask, sentinel: int):
        ig_mask = ~tp_mask & ~fp_mask  # [N, T]
        marks = np.flatnonzero(tp_mask.any(axis=1))
        # Detections after the last true positive cannot change precision at any recall.
        self.n = int(marks[-1]) + 1 if marks.size else 0
        self.img = img[:self.n]
        self.per_t = []
        for t in range(len(IOU_THRS)):
            tp_at = np.flatnonzero(tp_mask[:self.n, t])
            if tp_at.size == 0:
                continue  # no true positive: precision 0 at every recall point
            ig = np.flatnonzero(ig_mask[:self.n, t])
            # Ignored detections, led by the zero-weight sentinel so that the running sum
            # starts at 0; ig_before: how many of them precede each true positive.
            ig_img = np.r_[sentinel, img[ig]]
            ig_before = np.searchsorted(ig, tp_at, side="right")
            self.per_t.append((img[tp_at], tp_at, ig_img if ig.size else None, ig_before))

    def mean_precision(self, w, npos):
        """Mean interpolated precision over thresholds and recall points, per row of w.

        w [B, n_images + 1] int32 counts; npos [B] > 0: weighted count of ground truths.
        The precision envelope read at a recall point is a suffix maximum that is always
        reached at a true positive (precision only rises there), so only true-positive
        positions are evaluated.
        """
        B = len(w)
        total = np.zeros(B)
        if not self.per_t:
            return total
        seen = np.cumsum(w[:, self.img], axis=1, dtype=np.int32)  # detections so far
        # recall tp / npos >= r  <=>  tp >= need, the least integer j with j / npos >= r
        # (in floating point, as the reference compares).
        n = npos[:, None]
        need = np.ceil(REC_THRS[None, :] * n)
        need = np.where((need - 1) / n >= REC_THRS, need - 1, need)
        need = np.where(need / n < REC_THRS, need + 1, need)
        # One searchsorted for all rows: each row's counts are shifted past the previous row's.
        big = int(n.max()) + 2
        off_type = np.int32 if B * big < 2 ** 31 else np.int64
        off = (np.arange(B) * big).astype(off_type)[:, None]
        need = need.astype(off_type) + off
        for img_tp, tp_at, ig_img, ig_before in self.per_t:
            n_tp = len(img_tp)
            tp = np.cumsum(w[:, img_tp], axis=1, dtype=np.int32)
            den = seen[:, tp_at]  # tp + fp + ignored so far
            if ig_img is not None:
                den -= np.cumsum(w[:, ig_img], axis=1, dtype=np.int32)[:, ig_before]
            pr = den.astype(np.float64)
            pr += EPS
            np.divide(tp, pr, out=pr)
            # Suffix maximum. Non-negative doubles order like their bit patterns read as
            # integers, and the integer maximum runs several times faster.
            bits = pr.view(np.int64)[:, ::-1]
            np.maximum.accumulate(bits, axis=1, out=bits)
            row = np.arange(B)[:, None] * n_tp
            pos = np.searchsorted((tp + off).ravel(), need) - row
            q = np.where(pos < n_tp, pr.ravel()[np.minimum(pos, n_tp - 1) + row], 0.0)
            total += q.sum(axis=1)
        return total / (len(IOU_THRS) * len(REC_THRS))


def percentile_interval(maps: np.ndarray, confidence: float):
    """Central percentile interval of the defined resampled values, or None."""
    maps = maps[maps > -1]
    if maps.size == 0:
        return None
    lo, hi = np.percentile(maps, [50 * (1 - confidence), 50 * (1 + confidence)])
    return [float(lo), float(hi)]
