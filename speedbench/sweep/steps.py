"""What a run prepares once for all its points: the dataset (generated scenes cached), the timing
images, the repetition policy, and each graph's accuracy (cached by graph bytes + dataset).

A failure here becomes data (a note), never a stopped sweep; see sweep/pipeline.py for the path
of one point.
"""
from __future__ import annotations

import hashlib
import json
import math
import os
import shutil
from pathlib import Path

from speedbench import schema
from speedbench.errors import UserError, one_line
from speedbench.system import atomic_path, atomic_write, cores_available

NAN = float("nan")


# ----------------------------------------------------------------- dataset
CHECKED_FILE = "checked.json"  # beside a cached scene set's annotations: what passed the image check


def prepare_dataset(profile, cache: Path):
    """The profile's dataset: a path as given, or generated scenes kept in the cache.

    A cached scene set has its images decoded and checked once; the digest of those exact
    bytes (annotations and every image, the accuracy cache's key, computed anyway) is then
    kept beside them, and a later run whose files hash the same skips the decoding. Any
    changed, missing or added byte changes the digest: then every image is decoded and
    checked again, as on the first run.
    """
    from speedbench.data import load_dataset

    if profile.dataset_path:
        return load_dataset(profile.dataset_path, max_pixels=profile.max_pixels)
    ann = scenes_path(profile, cache)
    dataset = load_dataset(ann, max_pixels=profile.max_pixels, check_images=False)
    stamp = ann.parent / CHECKED_FILE
    try:
        passed = {"digest": dataset.digest, "max_pixels": profile.max_pixels}
    except UserError:
        dataset.check_images()  # words what is wrong with the file, as on the first run
        raise
    try:
        if json.loads(stamp.read_text()) == passed:
            return dataset
    except (OSError, ValueError):
        pass  # no stamp yet (or an unreadable one): check the images
    dataset.check_images()
    try:
        with atomic_path(stamp) as tmp:
            tmp.write_text(json.dumps(passed))
    except OSError:
        pass  # a read-only cache: the next run checks the images again
    return dataset


def scenes_path(profile, cache: Path) -> Path:
    """Generate the profile's held-out scenes once; later runs reuse the same files."""
    from speedbench.data import make_scenes

    out = Path(cache) / "scenes" / f"heldout-n{profile.scenes_count}-s{profile.scenes_seed}"
    ann = out / "annotations.json"
    if not ann.exists():
        tmp = out.with_name(out.name + f".tmp{os.getpid()}")
        shutil.rmtree(tmp, ignore_errors=True)
        make_scenes(tmp, count=profile.scenes_count, seed=profile.scenes_seed, split="heldout")
        out.parent.mkdir(parents=True, exist_ok=True)
        try:
            os.replace(tmp, out)   # atomic: a half-generated set is never picked up
        except OSError:
            shutil.rmtree(tmp, ignore_errors=True)  # another sweep generated it meanwhile
    return ann


def timing_images(dataset, n: int, size: int = 320) -> list:
    """The first n images of the dataset, decoded once (decode is outside every timed region)."""
    import numpy as np

    if dataset is None:
        # Synthetic backend only: it does not look at pixels.
        return [np.zeros((size, size, 3), dtype=np.uint8)]
    if len(dataset) == 0:
        raise UserError(f"{dataset.source}: dataset has no images")
    return [dataset.read(rec.id) for rec in dataset.images[:n]]


def make_policy(repetitions: dict):
    from speedbench.measure import Policy

    policy = Policy(**repetitions)
    # A profile that raises only the lower bound keeps a consistent policy.
    if "warmup_max" not in repetitions and policy.warmup_max < policy.warmup_min:
        policy.warmup_max = policy.warmup_min
    if "max_reps" not in repetitions and policy.max_reps < policy.min_reps:
        policy.max_reps = policy.min_reps
    policy.validate()
    return policy


# ----------------------------------------------------------------- host peak
def host_peak(rd, points, stream=None) -> dict | None:
    """This host's dense fp32 matmul peak at 1 thread and at the points' thread counts, once per run.

    Kept in meta["matmul_peak"]; a resumed run measures only thread counts it lacks.
    Nothing is measured when no point runs a model (the synthetic test backend).
    """
    from speedbench.measure.peak import ensure_peaks

    have = rd.meta().get("matmul_peak")
    real = [p for p in points if p.config["backend"] != "synthetic"]
    if not real:
        return have
    peak = ensure_peaks(have, {1} | {int(p.config["intra_threads"]) for p in real})
    if peak != (have or {}):
        if stream is not None:
            print("note: measured this host's fp32 matmul peak (GMAC/s per thread count): " + ", ".join(
                f"{t}: {r.get('gmac_s', float('nan')):.1f}" for t, r in sorted(peak["by_threads"].items())),
                file=stream)
        rd.update_meta(matmul_peak=peak)
    return peak


# ----------------------------------------------------------------- accuracy
def _file_digest(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()[:16]


def accuracy(graph: Path, model: str, profile, dataset, cache: Path, notes: list, adapted=None) -> dict:
    """mAP of one graph over the dataset; cached by (graph bytes, dataset, limit, runtime version).

    The runtime version is part of the key so that an upgrade which changes what the
    graph outputs shows up as an accuracy change instead of being served from the cache.
    adapted: evaluate_graph's arguments for an external graph (classes, adapter, size); the
    adapter (with its candidate count) and the size join the key.
    """
    ort = _ort_version()
    parts = [_file_digest(graph), dataset_fingerprint(dataset), profile.limit, ort]
    if adapted:
        parts += [adapted["adapter"].digest(), adapted["size"]]
    key = hashlib.sha256(json.dumps(parts).encode()).hexdigest()[:20]
    path = Path(cache) / "accuracy" / f"{key}.json"
    if path.exists():
        try:
            cached = json.loads(path.read_text())
            # entries written before the digest / the per-image results existed are redone
            if "det_digest" in cached and path.with_suffix(".npz").is_file():
                return cached
        except (OSError, json.JSONDecodeError):
            pass  # a damaged cache entry is recomputed
    det_cache = detections_dir(cache)
    try:
        from speedbench.evaluate import detect_dataset, evaluate_graph
        from speedbench.evaluate.paired import per_image_results

        # Always check threads (once per graph, cached with the accuracy): the one accuracy
        # figure stands for every thread setting only if 1 and 2 threads detect the same.
        how = dict(adapted) if adapted else {"model": model}
        result = evaluate_graph(graph, dataset, limit=profile.limit or None, intra_threads=cores_available(),
                                cache_dir=det_cache, check_threads=True, **how)
        scored = dataset.first(int(profile.limit)) if profile.limit else dataset
        # Same graph, images and cache as evaluate_graph: served from its detections cache.
        dets = detect_dataset(graph, scored, result["label_map"], cores_available(), det_cache,
                              adapter=how.get("adapter"), size=how.get("size", 0))
    except UserError as exc:
        notes.append(f"accuracy not measured: {exc}")
        return {}
    except Exception as exc:
        notes.append(f"accuracy failed: {type(exc).__name__}: {one_line(exc)}")
        return {}
    acc = {k: _metric(result.get(k)) for k in schema.ACCURACY_COLUMNS}
    inv = result.get("thread_invariance")
    if inv:
        # Do detections change with the thread count? (floating-point reduction order can.)
        acc["threads_identical"] = bool(inv["identical"])
        acc["threads_max_box_diff"] = float(inv["max_box_diff"])
    acc["det_digest"] = detections_digest(dets)
    # Per-image results (what a paired comparison of two graphs resamples), kept per graph.
    with atomic_path(path.with_suffix(".npz")) as tmp:
        per_image_results(scored.coco, dets).save(tmp)
    acc["per_image_key"] = key
    atomic_write(path, json.dumps({k: (None if isinstance(v, float) and not math.isfinite(v) else v)
                                   for k, v in acc.items()}))
    return acc


def detections_digest(dets: list[dict]) -> str:
    """sha256 of a graph's detections (COCO results), for speedbench compare's drift check.

    Boxes are rounded to 0.01 px and scores to 1e-4 and each image's detections sorted:
    float noise from another thread count or reduction order is not drift, a changed
    detection is. (A value right at a rounding edge can still flip; compare then reports
    drift that a look at the boxes dismisses.)
    """
    per_image: dict = {}
    for d in dets:
        x, y, w, h = (round(float(v), 2) + 0.0 for v in d["bbox"])  # + 0.0: -0.0 is 0.0
        per_image.setdefault(str(d["image_id"]), []).append(
            (int(d["category_id"]), x, y, w, h, round(float(d["score"]), 4)))
    blob = json.dumps(sorted((k, sorted(v)) for k, v in per_image.items()), separators=(",", ":"))
    return hashlib.sha256(blob.encode()).hexdigest()[:20]


def detections_dir(cache: Path) -> Path:
    """Where a graph's raw detections are cached (per onnxruntime version)."""
    return Path(cache) / "detections" / f"ort-{_ort_version()}"


def _ort_version() -> str:
    from importlib import metadata

    try:
        return metadata.version("onnxruntime")
    except metadata.PackageNotFoundError:
        return "none"


def _metric(value) -> float:
    # COCO evaluation reports -1 for "undefined" (no ground truth in that area range).
    if value is None:
        return NAN
    value = float(value)
    return NAN if value < 0 else value


def dataset_fingerprint(dataset) -> str:
    fp = getattr(dataset, "fingerprint", None)
    if callable(fp):
        return str(fp())
    if fp:
        return str(fp)
    return str(getattr(dataset, "source", ""))
