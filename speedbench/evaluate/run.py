"""Run an exported graph over a held-out set and score it.

A zoo graph resizes, normalises and post-processes internally (DEVELOPERS.md,
"Graph I/O"), so its boxes are already in original-image pixels. An external graph
runs with its adapter (speedbench.adapt.AdaptedGraph: host preprocess, graph, host
postprocess), the same call the measure backend "adapted" times; every box is
checked to lie inside its image, which catches a graph that returns boxes in
its resized frame. Raw outputs are cached per (graph sha256, dataset digest):
intra-op threads only split the same arithmetic, which check_thread_invariance
verifies (and records) instead of assuming.
"""
from __future__ import annotations

import hashlib
import math
from pathlib import Path

import numpy as np

from speedbench.data import to_input
from speedbench.errors import UserError
from speedbench.system import atomic_path
from speedbench.evaluate.metrics import coco_evaluate

OUTPUTS = ("boxes", "scores", "labels")
_BOX_SLACK = 1.0  # px; boxes are clipped to the image inside the graph


def detect_dataset(graph_path, dataset, label_map, intra_threads: int = 1, cache_dir=None,
                   adapter=None, size: int = 0) -> list[dict]:
    """COCO results list for every image of the dataset (labels mapped by label_map).

    Model labels absent from label_map are dropped (classes the dataset does not have).
    adapter (speedbench.adapt.Adapter, candidates already set) and size: run an external
    graph through its host pre/postprocessing.
    """
    raw = raw_detections(graph_path, dataset, intra_threads, cache_dir, adapter, size)
    return to_results(raw, label_map)


def raw_detections(graph_path, dataset, intra_threads: int = 1, cache_dir=None, adapter=None,
                   size: int = 0) -> dict:
    """{image_id: (boxes xyxy float32 [N, 4], scores [N], labels int64 [N])}, cached on disk."""
    graph_path = _graph(graph_path)
    cache = None
    if cache_dir is not None:
        key = f"{_sha256(graph_path)[:20]}-{dataset.digest[:20]}"
        if adapter is not None:
            key += f"-a{adapter.digest()}-s{int(size)}"
        cache = Path(cache_dir) / f"detections-{key}.npz"
        if cache.is_file():
            try:
                return _load_raw(cache)
            except (OSError, ValueError, KeyError):
                pass  # a damaged cache entry is recomputed
    run = _runner(graph_path, intra_threads, adapter, size)
    raw = {rec.id: _checked(run(img := dataset.read(rec.id)), img, graph_path, rec) for rec in dataset.images}
    if cache is not None:
        _save_raw(cache, raw)
    return raw


def to_results(raw: dict, label_map: dict) -> list[dict]:
    out = []
    for image_id, (boxes, scores, labels) in raw.items():
        xyxy = boxes.astype(np.float64)
        wh = xyxy[:, 2:] - xyxy[:, :2]
        for (x, y), (w, h), s, lab in zip(xyxy[:, :2].tolist(), wh.tolist(), scores.tolist(), labels.tolist()):
            cat = label_map.get(int(lab))
            if cat is not None:
                out.append({"image_id": image_id, "category_id": cat, "bbox": [x, y, w, h], "score": s})
    return out


def check_thread_invariance(graph_path, dataset, label_map=None, threads=(1, 2), n_images: int = 4,
                            adapter=None, size: int = 0) -> dict:
    """Run the first n_images with each intra-op thread count and compare the raw outputs.

    identical is True only if every output array is bit-for-bit equal; max_box_diff and
    max_score_diff are the largest absolute differences (inf when the counts differ).
    label_map is accepted for symmetry with detect_dataset; raw outputs are compared.
    """
    graph_path = _graph(graph_path)
    images = dataset.images[:n_images]
    pixels = [dataset.read(rec.id) for rec in images]
    runs = []
    for n in threads:
        run = _runner(graph_path, n, adapter, size)
        runs.append([_checked(run(img), img, graph_path, rec) for img, rec in zip(pixels, images)])
    identical, box_diff, score_diff = True, 0.0, 0.0
    for other in runs[1:]:
        for a, b in zip(runs[0], other):
            if any(x.shape != y.shape for x, y in zip(a, b)) or not np.array_equal(a[2], b[2]):
                identical, box_diff, score_diff = False, math.inf, math.inf
                continue
            identical &= all(np.array_equal(x, y) for x, y in zip(a, b))
            if a[0].size:
                box_diff = max(box_diff, float(np.abs(a[0] - b[0]).max()))
                score_diff = max(score_diff, float(np.abs(a[1] - b[1]).max()))
    return {"identical": bool(identical), "max_box_diff": box_diff, "max_score_diff": score_diff,
            "threads": list(threads), "n_images": len(images),
            "n_detections": [sum(len(r[1]) for r in run) for run in runs]}


def evaluate_graph(graph_path, dataset, label_map=None, *, model=None, model_classes=None,
                   limit=None, intra_threads: int = 1, cache_dir=None, bootstrap: int = 1000,
                   seed: int = 0, check_threads: bool = True, adapter=None, size: int = 0) -> dict:
    """detect_dataset + coco_evaluate.

    label_map, else model_classes (names by label index), else model (a zoo id: its
    classes, or torchvision's COCO names) gives the label mapping. limit: score only the
    first `limit` images. Adds map_ci_lo / map_ci_hi (NaN when undefined) and, unless
    check_threads=False, thread_invariance: the raw outputs of 4 images under 1 and 2
    intra-op threads compared (see check_thread_invariance), the evidence that one
    accuracy figure serves every thread setting of this graph. adapter, size: an external
    graph, run through its adapter (see detect_dataset).
    """
    from speedbench.data.datasets import category_map

    if label_map is None:
        if model_classes is None:
            if model is None:
                raise UserError("evaluate_graph needs label_map, model_classes or model")
            model_classes = classes_of(model)
        label_map = category_map(dataset, model_classes)
    if limit:
        dataset = dataset.first(int(limit))
    dets = detect_dataset(graph_path, dataset, label_map, intra_threads, cache_dir, adapter, size)
    # The bootstrap may use the cores the caller grants the graph (the figures do not depend on it).
    result = coco_evaluate(dataset.coco, dets, bootstrap=bootstrap, seed=seed, threads=max(1, int(intra_threads)))
    lo, hi = result["map_ci95"] or (math.nan, math.nan)
    result.update(map_ci_lo=lo, map_ci_hi=hi, label_map={int(k): int(v) for k, v in label_map.items()})
    if check_threads:
        result["thread_invariance"] = check_thread_invariance(graph_path, dataset, label_map,
                                                              adapter=adapter, size=size)
    return result


def classes_of(model_id: str) -> list[str]:
    """Class names by label index of a zoo model ( () in its spec = torchvision's COCO names)."""
    from speedbench.data.datasets import torchvision_coco_classes
    from speedbench.zoo import get_spec

    spec = get_spec(model_id)
    return list(spec.classes) if spec.classes else torchvision_coco_classes()


def _graph(path) -> Path:
    path = Path(path)
    if not path.is_file():
        raise UserError(f"{path}: ONNX graph not found")
    return path


def _runner(graph_path: Path, intra_threads: int, adapter=None, size: int = 0):
    """image -> (boxes, scores, labels): the zoo graph's own I/O, or the external graph's adapter."""
    if adapter is None:
        session = _session(graph_path, intra_threads)
        return lambda image: _outputs(session, image)
    from speedbench.adapt import AdaptedGraph

    return AdaptedGraph(graph_path, adapter, _session(graph_path, intra_threads, check_io=False), size=size)


def _session(graph_path: Path, intra_threads: int, check_io: bool = True):
    import onnxruntime as ort

    if not isinstance(intra_threads, int) or isinstance(intra_threads, bool) or intra_threads < 1:
        raise UserError(f"intra-op threads must be a whole number >= 1, not {intra_threads!r}")
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = int(intra_threads)
    opts.inter_op_num_threads = 1
    opts.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    opts.log_severity_level = 3
    try:
        session = ort.InferenceSession(str(graph_path), opts, providers=["CPUExecutionProvider"])
    except Exception as exc:  # onnxruntime raises its own exception types for bad files
        raise UserError(f"{graph_path}: not a loadable ONNX graph ({type(exc).__name__})") from None
    names = [o.name for o in session.get_outputs()]
    inputs = [i.name for i in session.get_inputs()]
    if check_io and (inputs[:1] != ["image"] or names[:3] != list(OUTPUTS)):
        raise UserError(f"{graph_path}: expected input 'image' and outputs boxes, scores, labels; "
                        f"graph has inputs {inputs} and outputs {names}")
    return session


def _run(session, image: np.ndarray, graph_path, rec):
    return _checked(_outputs(session, image), image, graph_path, rec)


def _outputs(session, image: np.ndarray):
    return session.run(list(OUTPUTS), {"image": to_input(image)})[:3]


def _checked(detections, image: np.ndarray, graph_path, rec):
    boxes, scores, labels = detections
    boxes = np.asarray(boxes, np.float32).reshape(-1, 4)
    h, w = image.shape[:2]
    if boxes.size and (boxes.min() < -_BOX_SLACK or (boxes[:, [0, 2]].max() > w + _BOX_SLACK)
                       or boxes[:, [1, 3]].max() > h + _BOX_SLACK):
        raise UserError(f"{graph_path}: image {rec.id} ({w}x{h}): boxes fall outside the image; "
                        f"the graph must return boxes in input-image pixels")
    return boxes, np.asarray(scores, np.float32).reshape(-1), np.asarray(labels, np.int64).reshape(-1)


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _save_raw(path: Path, raw: dict) -> None:
    ids = np.array(list(raw), np.int64)
    counts = np.array([len(v[1]) for v in raw.values()], np.int64)
    cat = [np.concatenate([v[i] for v in raw.values()]) if raw else np.zeros(0) for i in range(3)]
    with atomic_path(path) as tmp:   # readers never see half a file
        np.savez(tmp, ids=ids, counts=counts, boxes=cat[0].reshape(-1, 4), scores=cat[1], labels=cat[2])


def _load_raw(path: Path) -> dict:
    with np.load(path, allow_pickle=False) as z:
        ids, counts = z["ids"], z["counts"]
        edges = np.r_[0, np.cumsum(counts)]
        boxes, scores, labels = z["boxes"], z["scores"], z["labels"]
    return {int(i): (boxes[a:b].astype(np.float32), scores[a:b].astype(np.float32), labels[a:b].astype(np.int64))
            for i, a, b in zip(ids, edges[:-1], edges[1:])}
