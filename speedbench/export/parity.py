"""Torch eager vs ONNX Runtime on the same structured images: match detections, compare.

Detections are matched, not compared by index: near-equal scores may come out in another
order, so each eager detection (best score first) takes the unmatched ORT detection of
the same label with the highest IoU (>= MATCH_IOU, or all corners within the box tolerance
for degenerate boxes). Matched pairs give the box and score
differences; unmatched detections count against the verdict, except those whose score sits
at a cut-off (within score tolerance of the score threshold or of the other side's lowest
kept score when that side is full), where a tiny difference legitimately flips membership.
"""
from __future__ import annotations

import numpy as np

# Tolerances (our own choice, recorded with every verdict). Two float32 implementations of
# the same graph differ by ~1e-5 relative; a pixel and 1e-3 in score leave room for
# accumulation-order effects while catching real export bugs (wrong resize, lost offset).
BOX_TOL_PX = 1.0
SCORE_TOL = 1e-3
MATCH_IOU = 0.5
MAX_UNMATCHED_FRACTION = 0.02
MIN_COMPARED = 5   # fewer matched detections than this says too little: check a low-threshold copy

# Image shapes (H, W) of the verification images: landscape, portrait, square, so the
# dynamic-size path and the box rescaling back to the input are exercised.
SHAPES = ((240, 320), (320, 240), (288, 288))


def verification_images(seed: int = 11):
    from speedbench.zoo import pattern_image

    return [pattern_image(h, w, seed=seed + i) for i, (h, w) in enumerate(SHAPES)]


def _iou(box, boxes):
    x1 = np.maximum(box[0], boxes[:, 0]); y1 = np.maximum(box[1], boxes[:, 1])
    x2 = np.minimum(box[2], boxes[:, 2]); y2 = np.minimum(box[3], boxes[:, 3])
    inter = np.clip(x2 - x1, 0, None) * np.clip(y2 - y1, 0, None)
    area = (box[2] - box[0]) * (box[3] - box[1])
    areas = (boxes[:, 2] - boxes[:, 0]) * (boxes[:, 3] - boxes[:, 1])
    return inter / np.maximum(area + areas - inter, 1e-9)


def _close(box, boxes, box_tol):
    """IoU with each of `boxes`, and whether each counts as the same box.

    Same box: IoU >= MATCH_IOU, or every coordinate within box_tol - the second test is
    what matches degenerate (zero-width or zero-height) boxes, whose IoU is 0 even with
    themselves; untrained regressors produce many.
    """
    ious = _iou(box, boxes)
    linf = np.abs(boxes - box).max(axis=1) if len(boxes) else np.zeros(0)
    return ious, linf, (ious >= MATCH_IOU) | (linf <= box_tol)


def match(ref, other, box_tol=BOX_TOL_PX):
    """Greedy same-label matching, best eager score first; returns list of (i_ref, j_other)."""
    rb, rs, rl = ref
    ob, os_, ol = other
    used = np.zeros(len(ob), bool)
    pairs = []
    for i in np.argsort(-rs, kind="stable"):
        cand = np.flatnonzero((ol == rl[i]) & ~used)
        if not len(cand):
            continue
        ious, linf, same = _close(rb[i], ob[cand], box_tol)
        # Highest IoU, then nearest corners, then closest score: identical boxes with
        # near-tied scores pair up right.
        key = np.lexsort((np.abs(os_[cand] - rs[i]), linf, -np.round(ious, 4)))
        if same[key[0]]:
            used[cand[key[0]]] = True
            pairs.append((int(i), int(cand[key[0]])))
    return pairs


def _at_cutoff(score, other_scores, other_full, score_thresh, tol):
    if abs(score - score_thresh) <= tol:
        return True
    return bool(other_full and len(other_scores) and score <= other_scores.min() + tol)


def compare(ref, other, detections_per_img, score_thresh, box_tol=BOX_TOL_PX, score_tol=SCORE_TOL):
    """Statistics of one image's eager (ref) vs ORT (other) detections."""
    pairs = match(ref, other, box_tol)
    ri = np.array([p[0] for p in pairs], int)
    oi = np.array([p[1] for p in pairs], int)
    box_diff = float(np.abs(ref[0][ri] - other[0][oi]).max()) if pairs else 0.0
    score_diff = float(np.abs(ref[1][ri] - other[1][oi]).max()) if pairs else 0.0
    un_ref = sorted(set(range(len(ref[1]))) - set(ri.tolist()))
    un_oth = sorted(set(range(len(other[1]))) - set(oi.tolist()))
    full_o, full_r = len(other[1]) >= detections_per_img, len(ref[1]) >= detections_per_img
    hard = [i for i in un_ref if not _at_cutoff(ref[1][i], other[1], full_o, score_thresh, score_tol)]
    hard += [j for j in un_oth if not _at_cutoff(other[1][j], ref[1], full_r, score_thresh, score_tol)]
    # Label agreement: of eager boxes with a same-box partner of any label, how many of the
    # best partners (same label preferred on equal IoU / distance) carry the same label.
    agree = total = 0
    for i in range(len(ref[1])):
        if not len(other[1]):
            break
        ious, linf, same = _close(ref[0][i], other[0], box_tol)
        if same.any():
            total += 1
            best = (ious >= ious[same].max() - 1e-6) & same
            if ious[same].max() < MATCH_IOU:
                best = same & (linf <= linf[same].min() + 1e-6)
            agree += bool(np.any(best & (other[2] == ref[2][i])))
    return {"n_torch": int(len(ref[1])), "n_ort": int(len(other[1])), "matched": len(pairs),
            "unmatched_at_cutoff": len(un_ref) + len(un_oth) - len(hard), "unmatched": len(hard),
            "box_max_abs_diff_px": box_diff, "score_max_abs_diff": score_diff,
            "label_agreement": (agree / total) if total else None}


def summarise(per_image: list[dict], box_tol=BOX_TOL_PX, score_tol=SCORE_TOL) -> dict:
    matched = sum(p["matched"] for p in per_image)
    unmatched = sum(p["unmatched"] for p in per_image)
    n = max(sum(max(p["n_torch"], p["n_ort"]) for p in per_image), 1)
    box = max((p["box_max_abs_diff_px"] for p in per_image), default=0.0)
    score = max((p["score_max_abs_diff"] for p in per_image), default=0.0)
    labels = [p["label_agreement"] for p in per_image if p["label_agreement"] is not None]
    failures = []
    if box > box_tol:
        failures.append(f"box diff {box:.3g} px > {box_tol} px")
    if score > score_tol:
        failures.append(f"score diff {score:.3g} > {score_tol}")
    if unmatched > int(MAX_UNMATCHED_FRACTION * n):
        failures.append(f"{unmatched} of {n} detections unmatched")
    return {"matched": matched, "unmatched": unmatched,
            "unmatched_at_cutoff": sum(p["unmatched_at_cutoff"] for p in per_image),
            "box_max_abs_diff_px": box, "score_max_abs_diff": score,
            "label_agreement": min(labels) if labels else None,
            "failures": failures, "passed": not failures and matched > 0}


def run_pair(model, session, images):
    """Eager and ORT detections for each image: lists of (boxes, scores, labels) numpy triples."""
    import torch

    from speedbench.data import to_input

    eager, ort = [], []
    for img in images:
        x = to_input(img)
        with torch.no_grad():
            out = model([torch.from_numpy(x)])[0]
        eager.append((out["boxes"].numpy(), out["scores"].numpy(), out["labels"].numpy()))
        res = session.run(None, {"image": x})
        ort.append((res[0], res[1], res[2]))
    return eager, ort


def check(model, session, images, detections_per_img, score_thresh) -> dict:
    eager, ort = run_pair(model, session, images)
    per_image = [compare(e, o, detections_per_img, score_thresh) for e, o in zip(eager, ort)]
    result = summarise(per_image)
    result["per_image"] = per_image
    return result
