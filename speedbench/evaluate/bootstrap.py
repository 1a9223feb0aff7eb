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

import math
from concurrent.futures import ThreadPoolExecutor
from functools import partial

import numpy as np

from speedbench.evaluate.cocoeval import IOU_THRS, MAX_DETS, REC_THRS, Matching

_BLOCK_ELEMENTS = 1 << 18  # resamples x detections per block: about 1 MiB per array, cache-sized
_MIN_ROWS = 16  # rows per block at least, so that wide classes do not pay numpy call overhead per row
_PRODUCT_RATIO = 200  # images x marks per detection below which the BLAS product is used


def draw_weights(n_images: int, n_boot: int, seed: int) -> np.ndarray:
    """[n_boot, n_images] int32 counts: how often each image appears in each resample."""
    rng = np.random.default_rng(seed)
    idx = rng.integers(0, n_images, size=(n_boot, n_images))
    idx += np.arange(n_boot)[:, None] * n_images  # in place: fresh memory is slow on some hosts
    counts = np.bincount(idx.ravel(), minlength=n_boot * n_images)
    del idx
    return counts.reshape(n_boot, n_images).astype(np.int32)


def resampled_maps(m: Matching, weights: np.ndarray, threads: int = 1) -> np.ndarray:
    """mAP (IoU .50:.95, area all, maxDets 100) for each row of image counts; -1 if undefined.

    weights [n_boot, n_images]: whole numbers >= 0 (how often each image is drawn).
    """
    weights = np.asarray(weights)
    counts = weights if weights.dtype.kind in "iu" else np.rint(weights)
    if weights.size and (counts.min() < 0 or counts.max() >= 2 ** 20 or not np.array_equal(weights, counts)):
        raise ValueError("bootstrap weights must be whole numbers between 0 and 2**20")
    n_boot, n_cat = len(weights), m.pos_per_image.shape[0]
    n_images = weights.shape[1]
    # One extra image column of zeros: index n_images reads weight 0 (see _Class).
    w = np.zeros((n_boot, n_images + 1), np.int32)
    w[:, :-1] = counts
    npos = counts @ m.pos_per_image.T  # [n_boot, K]
    drawn = int(counts.sum(axis=1).max()) if counts.size else 0  # most images in one resample
    order = np.lexsort((m.rank, m.img, -m.score, m.cat))
    order = order[m.rank[order] < MAX_DETS[-1]]
    starts = np.searchsorted(m.cat[order], np.arange(n_cat + 1))

    def run(k, cls, rows):
        wb = w[rows]
        # Each block does its own part of the matrix product, so that it too runs on the
        # pool's threads (BLAS is held to one thread on the results-file path).
        return cls.mean_precision(wb, npos[rows, k], cls.seen_by_product(wb) if cls.upto is not None else None)

    def blocks(k):
        """(rows, a call that gives their mean precision) for class k, built on demand."""
        live = np.flatnonzero(npos[:, k] > 0)
        if not live.size:
            return []
        sel = order[starts[k]:starts[k + 1]]
        cls = _Class(m.img[sel], m.tp[sel, :, 0], m.fp[sel, :, 0], n_images, drawn)
        step = max(_MIN_ROWS, _BLOCK_ELEMENTS // max(1, cls.width))
        return [(rows, partial(run, k, cls, rows)) for rows in (live[c:c + step] for c in range(0, live.size, step))]

    parts = []  # (rows, mean precision of one class on them), in class order
    if threads > 1:
        with ThreadPoolExecutor(threads) as pool:
            # A class is set up here while the pool works on the one before, and at most two
            # are held at once (a class holds its matrix for the product: MiBs each).
            queued = []
            for k in range(n_cat):
                queued.append([(rows, pool.submit(call)) for rows, call in blocks(k)])
                if len(queued) > 1:
                    parts += [(rows, f.result()) for rows, f in queued.pop(0)]
            for q in queued:
                parts += [(rows, f.result()) for rows, f in q]
    else:
        for k in range(n_cat):
            parts += [(rows, call()) for rows, call in blocks(k)]
    total, count = np.zeros(n_boot), np.zeros(n_boot)
    for rows, r in parts:
        total[rows] += r
        count[rows] += 1
    return np.where(count > 0, total / np.maximum(count, 1), -1.0)


class _Class:
    """One class's detections in score order, and what each threshold needs of them.

    Precision is only ever read at true positives (see mean_precision), so what a draw
    needs is, at each true positive of each threshold: the true positives so far and the
    detections so far that are not ignored. The second is "detections so far" (shared by
    the thresholds, read at the union of their true positives) minus the ignored ones.
    """

    def __init__(self, img, tp_mask, fp_mask, n_images: int, drawn: int):
        ig_mask = ~tp_mask & ~fp_mask  # [N, T]
        marks = np.flatnonzero(tp_mask.any(axis=1))  # true positive at some threshold
        # Detections after the last true positive cannot change precision at any recall.
        self.n = int(marks[-1]) + 1 if marks.size else 0
        self.img = img[:self.n]
        self.marks = marks
        self.per_t = []
        for t in range(len(IOU_THRS)):
            tp_at = np.flatnonzero(tp_mask[:self.n, t])
            if tp_at.size == 0:
                continue  # no true positive: precision 0 at every recall point
            ig = np.flatnonzero(ig_mask[:self.n, t])
            # Ignored detections, led by the zero-weight sentinel so that the running sum
            # starts at 0; ig_before: how many of them precede each true positive.
            ig_img = np.r_[n_images, img[ig]]
            ig_before = np.searchsorted(ig, tp_at, side="right")
            self.per_t.append((img[tp_at], np.searchsorted(marks, tp_at),
                               ig_img if ig.size else None, ig_before))
        # "Detections so far" at the marks is a matrix product, weights [B, images] x
        # upto [images, marks] (upto[i, p]: detections of image i up to mark p), when
        # images x marks is small next to the running sum over every detection it replaces
        # (a BLAS product does some 50 multiply-adds in the time of one running-sum step).
        # Whole numbers below 2**24 are exact in float32 whatever the order of the sums,
        # and no partial sum exceeds the total: most images drawn x most detections of one image.
        self.upto = None
        per_image = np.bincount(self.img, minlength=n_images + 1)
        exact32 = drawn * int(per_image.max(initial=0)) < 2 ** 24
        if exact32 and marks.size and (n_images + 1) * marks.size <= _PRODUCT_RATIO * self.n:
            segment = np.searchsorted(marks, np.arange(self.n))  # first mark at or after
            # Counted and summed in place in float32 (exact, as above): one array of
            # (images + 1) x marks, where bincount and an int64 running sum took five times
            # the memory, and fresh memory is slow on some hosts (virtual machines).
            upto = np.zeros((n_images + 1) * marks.size, np.float32)
            np.add.at(upto, self.img * marks.size + segment, 1)
            upto = upto.reshape(n_images + 1, -1)
            self.upto = np.cumsum(upto, axis=1, out=upto)
        self.width = marks.size if self.upto is not None else self.n

    def seen_by_product(self, w):
        """[B, marks] int32: detections so far at each mark, per row of w (needs upto)."""
        return (w.astype(np.float32) @ self.upto).astype(np.int32)

    def seen_by_running_sum(self, w):
        """The same by a running sum over every detection (any number of images)."""
        running = np.take(w, self.img, axis=1)
        np.cumsum(running, axis=1, out=running)
        return np.take(running, self.marks, axis=1)

    def mean_precision(self, w, npos, seen=None):
        """Mean interpolated precision over thresholds and recall points, per row of w.

        w [B, n_images + 1] int32 counts; npos [B] > 0: weighted count of ground truths;
        seen: seen_by_product(w) if already computed. The precision envelope read at a recall point is a suffix maximum that is always
        reached at a true positive (precision only rises there), so only true-positive
        positions are evaluated. The reference reads the envelope at the first detection
        whose recall tp / npos reaches each recall point r; summed over the points, that is
        each true positive's envelope times how many points its count tp is the first to
        reach: reached(tp) - reached(tp before it), with reached(x) = #{r : x / npos >= r}.
        """
        B = len(w)
        total = np.zeros(B)
        if not self.per_t:
            return total
        if seen is None:
            seen = self.seen_by_running_sum(w)
        # need[b, r]: the least count j with j / npos >= r, in floating point as the
        # reference compares; reached(x) = #{r : need[b, r] <= x}, tabulated per row for
        # x = 0 .. npos (a true-positive count never exceeds npos).
        n = npos[:, None]
        need = np.ceil(REC_THRS[None, :] * n)
        need = np.where((need - 1) / n >= REC_THRS, need - 1, need)
        need = np.where(need / n < REC_THRS, need + 1, need)
        span = int(n.max()) + 1
        index_type = np.int32 if B * span < 2 ** 31 else np.int64
        off = (np.arange(B) * span).astype(index_type)[:, None]
        reached = np.bincount((need.astype(index_type) + off).ravel(), minlength=B * span)
        # At most len(REC_THRS) = 101: one byte per entry keeps the table small in the cache.
        reached = np.cumsum(reached.reshape(B, span), axis=1, dtype=np.int32).ravel().astype(np.uint8)
        # Every index below is in range by construction; mode "wrap" / "clip" skip the bounds
        # check that numpy's default mode makes (a slower path for each element).
        for img_tp, mark_at, ig_img, ig_before in self.per_t:
            tp = np.take(w, img_tp, axis=1, mode="wrap")
            np.cumsum(tp, axis=1, dtype=tp.dtype, out=tp)
            den = np.take(seen, mark_at, axis=1, mode="wrap")  # tp + fp + ignored so far
            if ig_img is not None:
                ig = np.take(w, ig_img, axis=1, mode="wrap")
                np.cumsum(ig, axis=1, dtype=ig.dtype, out=ig)
                den -= np.take(ig, ig_before, axis=1, mode="wrap")
            # The reference divides by den + cocoeval.EPS (tp = den = 0 at a true positive of an image
            # drawn 0 times gives 0). For whole numbers den >= 2 that sum rounds back to den; at
            # den = 1 it is the next double above 1, so 1 / 1 here may exceed the reference's
            # quotient by one unit in the last place (2e-16), far below any digit reported.
            np.maximum(den, 1, out=den)
            pr = tp.astype(np.float64)  # converted first: numpy's mixed-type divide is slower
            pr /= den.astype(np.float64)
            # Suffix maximum. Non-negative doubles order like their bit patterns read as
            # integers, and the integer maximum runs several times faster.
            bits = pr.view(np.int64)[:, ::-1]
            np.maximum.accumulate(bits, axis=1, out=bits)
            index = tp.astype(index_type, copy=False)
            index += off
            reached_at = np.take(reached, index, mode="clip")  # reached(tp) at each true positive
            first = np.empty(pr.shape)
            first[:, 0] = reached_at[:, 0]
            np.subtract(reached_at[:, 1:], reached_at[:, :-1], out=first[:, 1:])
            total += _row_dot(pr, first)
        return total / (len(IOU_THRS) * len(REC_THRS))


def _row_dot(a, b):
    """Row-wise dot product of two float64 matrices (numpy >= 2 has a vectorised one)."""
    vecdot = getattr(np, "vecdot", None)
    return vecdot(a, b) if vecdot is not None else np.einsum("ij,ij->i", a, b)


def percentile_interval(maps: np.ndarray, confidence: float):
    """Central percentile interval of the defined resampled values, or None."""
    maps = np.sort(maps[maps > -1])
    if maps.size == 0:
        return None
    return [_percentile(maps, 50 * (1 - confidence)), _percentile(maps, 50 * (1 + confidence))]


def _percentile(values: np.ndarray, percent: float) -> float:
    """np.percentile(values, percent) of sorted values, numpy's default ("linear") method.

    Written out because np.percentile imports numpy.ma on first use, about 20 ms of the
    evaluate command's start; the same arithmetic as numpy's, in the same order (its
    virtual index and its two-sided interpolation), so the figures do not change
    (tests/test_cocoeval.py compares the two).
    """
    q = percent / 100
    n = len(values)
    index = (n - 1) * q                          # numpy's virtual index, "linear"
    below = math.floor(index)
    gamma = index - below
    if index >= n - 1:
        return float(values[-1])
    lo, hi = max(below, 0), max(below + 1, 0)
    a, b = float(values[lo]), float(values[hi])
    diff = b - a
    return b - diff * (1 - gamma) if gamma >= 0.5 else a + diff * gamma
