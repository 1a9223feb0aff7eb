"""COCO-protocol box evaluation, vectorised with numpy.

The protocol is the published COCO detection evaluation: IoU thresholds
.50:.05:.95, 101-point interpolated precision, maxDets 1/10/100, area ranges
all/small/medium/large, crowd regions as ignore regions (IoU against a crowd
box is intersection / detection area, and a crowd box can absorb any number of
detections). Values the protocol leaves undefined (a class without ground
truth) are -1, as in pycocotools, the reference implementation; its results
are reproduced to floating-point precision (tests/test_cocoeval.py).

How it is fast: the greedy matching is sequential only within one
(image, class) group, so the loop runs over detection *rank* (at most 100
iterations) and each iteration handles every group, IoU threshold and area
range at once, touching only (detection, ground truth) pairs with IoU >= 0.5.

One deliberate difference: pycocotools stores the matched annotation's id and
tests it for truth, so a match to an annotation whose id is 0 is miscounted
as a false positive. Here a match is a match whatever the id.
"""
from __future__ import annotations

import numpy as np

from speedbench.errors import UserError

IOU_THRS = np.linspace(0.5, 0.95, int(np.round((0.95 - 0.5) / 0.05)) + 1, endpoint=True)
REC_THRS = np.linspace(0.0, 1.00, int(np.round((1.00 - 0.0) / 0.01)) + 1, endpoint=True)
MAX_DETS = (1, 10, 100)
AREA_NAMES = ("all", "small", "medium", "large")
AREA_RANGES = np.array([[0, 1e5 ** 2], [0, 32 ** 2], [32 ** 2, 96 ** 2], [96 ** 2, 1e5 ** 2]], float)
EPS = np.spacing(1)


def is_member(values, sorted_ids) -> np.ndarray:
    """np.isin(values, sorted_ids) for ids in ascending order (repeats allowed).

    By binary search: np.isin goes through np.unique, which imports numpy.ma on first
    use (about 20 ms of the evaluate command's start). Both sides are compared in their
    common type, as np.isin does (tests/test_cocoeval.py compares the two).
    """
    values = np.asarray(values)
    ids = np.asarray(sorted_ids)
    if ids.size == 0:
        return np.zeros(values.shape, bool)
    common = np.result_type(values, ids)
    values, ids = values.astype(common, copy=False), ids.astype(common, copy=False)
    at = np.minimum(np.searchsorted(ids, values), ids.size - 1)
    return ids[at] == values


class GroundTruth:
    """Ground truth as flat arrays; images and classes ranked by sorted id."""

    def __init__(self, gt: dict):
        try:
            # Sorted, each id once (np.unique would import numpy.ma: 20 ms of start-up).
            ids = np.sort(np.array([im["id"] for im in gt["images"]], dtype=np.int64))
            self.image_ids = ids[np.r_[True, ids[1:] != ids[:-1]]] if ids.size else ids
            cats = sorted(gt["categories"], key=lambda c: c["id"])
            self.cat_ids = np.array([c["id"] for c in cats], dtype=np.int64)
            self.cat_names = [str(c.get("name", c["id"])) for c in cats]
            anns = gt.get("annotations", [])
            img = np.array([a["image_id"] for a in anns], dtype=np.int64)
            cat = np.array([a["category_id"] for a in anns], dtype=np.int64)
            box = np.array([a["bbox"] for a in anns], dtype=np.float64).reshape(-1, 4)
            area = np.array([a["area"] if "area" in a else a["bbox"][2] * a["bbox"][3]
                             for a in anns], dtype=np.float64)
            crowd = np.array([bool(a.get("iscrowd", 0)) for a in anns], dtype=bool)
        except (KeyError, TypeError, ValueError) as exc:
            raise UserError(f"ground truth: malformed COCO dict ({type(exc).__name__}: {exc})") from None
        # Like pycocotools, annotations of unlisted images or categories are not evaluated.
        keep = is_member(img, self.image_ids) & is_member(cat, self.cat_ids)
        self.img = np.searchsorted(self.image_ids, img[keep])
        self.cat = np.searchsorted(self.cat_ids, cat[keep])
        self.box, self.area, self.crowd = box[keep], area[keep], crowd[keep]

    @property
    def n_images(self) -> int:
        return len(self.image_ids)


class Detections:
    """Detections as flat arrays, indexed against a GroundTruth."""

    def __init__(self, gt: GroundTruth, image_id, category_id, box, score):
        self.img = np.searchsorted(gt.image_ids, np.asarray(image_id, np.int64))
        self.cat = np.searchsorted(gt.cat_ids, np.asarray(category_id, np.int64))
        self.box = np.asarray(box, np.float64).reshape(-1, 4)
        self.score = np.asarray(score, np.float64)
        self.area = self.box[:, 2] * self.box[:, 3]

    @classmethod
    def joined(cls, parts: list[Detections]) -> Detections:
        """The detections of several parts (against the same GroundTruth), in order."""
        out = cls.__new__(cls)
        for name in ("img", "cat", "box", "score", "area"):
            setattr(out, name, np.concatenate([getattr(p, name) for p in parts]))
        return out


def box_iou(d: np.ndarray, g: np.ndarray, crowd: np.ndarray) -> np.ndarray:
    """IoU of paired [x, y, w, h] boxes, the same float operations as pycocotools' bbIou."""
    w = np.minimum(d[:, 2] + d[:, 0], g[:, 2] + g[:, 0]) - np.maximum(d[:, 0], g[:, 0])
    h = np.minimum(d[:, 3] + d[:, 1], g[:, 3] + g[:, 1]) - np.maximum(d[:, 1], g[:, 1])
    da = d[:, 2] * d[:, 3]
    ga = g[:, 2] * g[:, 3]
    inter = w * h
    union = np.where(crowd, da, da + ga - inter)
    ok = (w > 0) & (h > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(ok, inter / np.where(ok, union, 1.0), 0.0)


class Matching:
    """Per-detection outcome of the greedy matching, for every IoU threshold and area range.

    Detections are kept sorted by (image, class, score desc, input order) and cut to
    the top MAX_DETS[-1] per (image, class), as the protocol does. Attributes:
    img, cat, score, rank (position within its (image, class) group),
    tp / fp: bool [n_det, T, A]; n_pos: [K, A] non-ignored ground truths;
    pos_per_image: [K, n_images] non-ignored ground truths (area "all").
    """

    def __init__(self, gt: GroundTruth, dt: Detections):
        n_cat, T, A = len(gt.cat_ids), len(IOU_THRS), len(AREA_RANGES)
        lo, hi = AREA_RANGES[:, 0], AREA_RANGES[:, 1]

        # Ground truth grouped by (image, class), input order kept inside a group.
        g_group = gt.img * n_cat + gt.cat
        g_order = np.argsort(g_group, kind="stable")
        g_group = g_group[g_order]
        g_box, g_crowd, g_area = gt.box[g_order], gt.crowd[g_order], gt.area[g_order]
        g_ignore = g_crowd[:, None] | (g_area[:, None] < lo) | (g_area[:, None] > hi)  # [G, A]
        n_groups = gt.n_images * n_cat
        g_count = np.bincount(g_group, minlength=n_groups)
        g_start = np.cumsum(g_count) - g_count

        # Detections sorted by group, then score (desc), then input order; keep top 100.
        d_group = dt.img * n_cat + dt.cat
        order = np.lexsort((np.arange(len(d_group)), -dt.score, d_group))
        d_group = d_group[order]
        rank = np.arange(len(d_group)) - np.searchsorted(d_group, d_group, side="left")
        order = order[rank < MAX_DETS[-1]]
        self.rank = rank[rank < MAX_DETS[-1]]
        d_group = d_group[rank < MAX_DETS[-1]]
        self.img, self.cat, self.score = dt.img[order], dt.cat[order], dt.score[order]
        d_box, d_area = dt.box[order], dt.area[order]
        n_det = len(order)

        # Every (detection, ground truth) pair of the same group; only IoU >= 0.5 can match.
        per_det = g_count[d_group]
        p_det = np.repeat(np.arange(n_det), per_det)
        first = np.cumsum(per_det) - per_det
        p_gt = g_start[d_group][p_det] + (np.arange(len(p_det)) - first[p_det])
        p_iou = box_iou(d_box[p_det], g_box[p_gt], g_crowd[p_gt])
        near = p_iou >= IOU_THRS[0]
        p_det, p_gt, p_iou = p_det[near], p_gt[near], p_iou[near]
        # Pairs by detection rank; inside a rank by detection then ground-truth order.
        p_order = np.argsort(self.rank[p_det], kind="stable")
        p_det, p_gt, p_iou = p_det[p_order], p_gt[p_order], p_iou[p_order]

        matched = np.zeros((n_det, T, A), bool)
        to_ignored = np.zeros((n_det, T, A), bool)
        taken = np.zeros((len(g_group), T, A), bool)
        bounds = np.searchsorted(self.rank[p_det], np.arange(MAX_DETS[-1] + 1), side="left")
        for r in range(MAX_DETS[-1]):
            s = slice(bounds[r], bounds[r + 1])
            if s.start == s.stop:
                continue
            self._match_rank(p_det[s], p_gt[s], p_iou[s], taken, g_ignore, g_crowd,
                             matched, to_ignored)

        d_out = (d_area[:, None] < lo) | (d_area[:, None] > hi)  # [D, A]
        ignored = to_ignored | (~matched & d_out[:, None, :])
        self.tp = matched & ~ignored
        self.fp = ~matched & ~ignored
        g_cat = gt.cat[g_order]
        self.n_pos = np.stack([np.bincount(g_cat, weights=~g_ignore[:, a], minlength=n_cat)
                               for a in range(A)], axis=1)
        self.pos_per_image = np.zeros((n_cat, gt.n_images))
        np.add.at(self.pos_per_image, (g_cat, gt.img[g_order]), ~g_ignore[:, 0])

    @staticmethod
    def _match_rank(p_det, p_gt, p_iou, taken, g_ignore, g_crowd, matched, to_ignored):
        """Match the detections of one rank (one per group) for all thresholds and areas.

        pycocotools walks the ground truths (non-ignored first) and keeps the last one
        with the highest IoU >= threshold that is still free (crowd boxes stay free);
        it looks at ignored ones only when no non-ignored one matched.
        """
        P = len(p_det)
        new_det = p_det[1:] != p_det[:-1]
        seg = np.flatnonzero(np.concatenate(([True], new_det)))  # one segment per detection
        seg_of = np.cumsum(np.concatenate(([False], new_det)))
        cand = (p_iou[:, None] >= IOU_THRS[None, :])[:, :, None] & ~taken[p_gt]  # [P, T, A]
        # Both tiers in one key: a non-negative double orders like its bits read as an integer
        # (an IoU is at most 1.0, whose bits are below 2**62), and a non-ignored ground truth
        # gets 2**62 added, so it outranks every ignored one. Not a candidate: -1.
        bits = np.ascontiguousarray(p_iou).view(np.int64)
        key = bits[:, None, None] + np.where(g_ignore[p_gt], 0, 1 << 62)[:, None, :]  # [P, 1, A]
        key = np.where(cand, key, -1)
        top = np.maximum.reduceat(key, seg, axis=0)  # [S, T, A]: the best key of each detection
        hit = cand & (key == top[seg_of])
        pos = np.broadcast_to(np.arange(P)[:, None, None], cand.shape)
        chosen = np.maximum.reduceat(np.where(hit, pos, -1), seg, axis=0)  # the last such pair, or -1
        dets = p_det[seg]
        matched[dets] = top >= 0
        to_ignored[dets] = (top >= 0) & (top < 1 << 62)
        s, t, a = np.nonzero(top >= 0)
        g = p_gt[chosen[s, t, a]]
        keep = ~g_crowd[g]
        taken[g[keep], t[keep], a[keep]] = True


def accumulate(m: Matching, n_cat: int):
    """precision [T, R, K, A, M] and recall [T, K, A, M], -1 where undefined (as pycocotools)."""
    T, R, A, M = len(IOU_THRS), len(REC_THRS), len(AREA_RANGES), len(MAX_DETS)
    precision = -np.ones((T, R, n_cat, A, M))
    recall = -np.ones((T, n_cat, A, M))
    # Global order inside a class: score desc, then image id, then place within the image.
    order = np.lexsort((m.rank, m.img, -m.score, m.cat))
    cat_sorted = m.cat[order]
    starts = np.searchsorted(cat_sorted, np.arange(n_cat + 1))
    for k in range(n_cat):
        idx = order[starts[k]:starts[k + 1]]
        for mi, max_det in enumerate(MAX_DETS):
            sel = idx[m.rank[idx] < max_det]
            tp, fp = m.tp[sel].transpose(2, 1, 0), m.fp[sel].transpose(2, 1, 0)  # [A, T, N]
            for a in range(A):
                npig = m.n_pos[k, a]
                if npig == 0:
                    continue
                q, rc_last = _precision_at_recalls(tp[a], fp[a], npig)
                precision[:, :, k, a, mi] = q
                recall[:, k, a, mi] = rc_last
    return precision, recall


def _precision_at_recalls(tps: np.ndarray, fps: np.ndarray, npig: float):
    """tps/fps [T, N] in score order -> (interpolated precision [T, R], final recall [T])."""
    T, nd = tps.shape
    q = np.zeros((T, len(REC_THRS)))
    if nd == 0:
        return q, np.zeros(T)
    # Counts as int32 (exact, and numpy's bool -> int64 default takes a slow casting path).
    tp = np.cumsum(tps, axis=1, dtype=np.int32).astype(float)
    fp = np.cumsum(fps, axis=1, dtype=np.int32).astype(float)
    rc = tp / npig
    pr = tp / (fp + tp + EPS)
    # Precision envelope (suffix maximum); non-negative doubles order like their bits as integers.
    bits = pr.view(np.int64)[:, ::-1]
    np.maximum.accumulate(bits, axis=1, out=bits)
    for t in range(T):
        inds = np.searchsorted(rc[t], REC_THRS, side="left")
        q[t] = np.where(inds < nd, pr[t, np.minimum(inds, nd - 1)], 0.0)
    return q, rc[:, -1]


def _mean_defined(s: np.ndarray) -> float:
    s = s[s > -1]
    return float(np.mean(s)) if s.size else -1.0


def summarize(precision: np.ndarray, recall: np.ndarray) -> dict:
    """The twelve COCO summary numbers, named; -1 where the protocol leaves them undefined."""
    all_, m100 = AREA_NAMES.index("all"), MAX_DETS.index(100)
    t50 = np.where(IOU_THRS == 0.5)[0]
    t75 = np.where(IOU_THRS == 0.75)[0]
    out = {
        "map": _mean_defined(precision[:, :, :, all_, m100]),
        "map50": _mean_defined(precision[t50][:, :, :, all_, m100]),
        "map75": _mean_defined(precision[t75][:, :, :, all_, m100]),
    }
    for name in ("small", "medium", "large"):
        out[f"map_{name}"] = _mean_defined(precision[:, :, :, AREA_NAMES.index(name), m100])
    for mi, max_det in enumerate(MAX_DETS):
        out[f"mar_{max_det}"] = _mean_defined(recall[:, :, all_, mi])
    for name in ("small", "medium", "large"):
        out[f"mar_{name}"] = _mean_defined(recall[:, :, AREA_NAMES.index(name), m100])
    return out


def per_class_ap(precision: np.ndarray, names: list[str]) -> dict:
    """AP per class (area all, maxDets 100); -1 for a class without ground truth."""
    return {name: _mean_defined(precision[:, :, k, 0, -1]) for k, name in enumerate(names)}
