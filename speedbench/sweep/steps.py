"""The sweep's calls into the packages above it: data, export, evaluate, measure.

Kept in one place so the runner reads as the procedure it is, and so every
failure of a step becomes data (a failed row, a note) instead of stopping the sweep.
"""
from __future__ import annotations

import hashlib
import json
import math
import os
import shutil
import time
from dataclasses import dataclass, field
from pathlib import Path

from speedbench.errors import UserError
from speedbench.sweep.rundir import PER_IMAGE_DIR

NAN = float("nan")
ACCURACY_COLUMNS = ("map", "map50", "map75", "map_small", "map_medium", "map_large", "mar_100",
                    "map_ci_lo", "map_ci_hi")


@dataclass
class GraphInfo:
    """One distinct graph (model, weights, size, proposals): its export and its accuracy."""
    path: str | None = None
    ok: bool = True
    reason: str = ""
    facts: dict = field(default_factory=dict)       # params, gmacs, model_file_mib, ...
    accuracy: dict = field(default_factory=dict)    # ACCURACY_COLUMNS (+ extras)
    notes: list = field(default_factory=list)


# ----------------------------------------------------------------- dataset
def prepare_dataset(profile, cache: Path):
    """The profile's dataset: a path as given, or generated scenes kept in the cache."""
    from speedbench.data import load_dataset

    if profile.dataset_path:
        return load_dataset(profile.dataset_path)
    return load_dataset(scenes_path(profile, cache))


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


# ----------------------------------------------------------------- export + accuracy
def prepare_graph(point, profile, dataset, rd, cache: Path, progress) -> GraphInfo:
    """Export the point's graph (cached by content) and evaluate its accuracy (cached too)."""
    model, weights, size, proposals = point.graph_key
    info = GraphInfo()
    try:
        from speedbench.export import export_onnx

        # proposals 0 means "no such knob": the exporter keeps the model's own setting.
        record = export_onnx(model, weights=weights, size=size, proposals=proposals or None,
                             cache_dir=Path(cache) / "exports")
    except UserError as exc:
        return GraphInfo(ok=False, reason=f"export: {exc}")
    except Exception as exc:  # an exporter crash is a failed graph, not a failed sweep
        return GraphInfo(ok=False, reason=f"export: {type(exc).__name__}: {_one_line(exc)}")
    if not record.ok:
        return GraphInfo(ok=False, reason=f"export: {record.reason}")
    info.path = str(_link_into_run(Path(record.path), rd.exports))
    info.facts = _facts(record)
    info.notes.extend(record.notes or [])
    if weights == "none" or not profile.accuracy or dataset is None:
        return info
    progress.status(f"accuracy {model} {size}px")
    info.accuracy = _accuracy(Path(record.path), point, profile, dataset, cache, info)
    if info.accuracy.get("per_image_key"):
        _link_into_run(Path(cache) / "accuracy" / f"{info.accuracy['per_image_key']}.npz",
                       rd.path / PER_IMAGE_DIR)
    return info


def _facts(record) -> dict:
    """Export facts as row columns: params, gmacs, file size, opset, parity with torch eager."""
    facts = dict(record.facts or {})
    out = {k: facts[k] for k in ("params", "gmacs") if facts.get(k) is not None}
    out["model_file_mib"] = round(Path(record.path).stat().st_size / 2**20, 3)
    out["opset"] = record.opset
    parity = record.parity or {}
    if "passed" in parity:
        out["parity_passed"] = bool(parity["passed"])
    return out


def _link_into_run(path: Path, exports: Path) -> Path:
    """Keep a copy of the graph in the run directory (a hard link when possible: no extra space)."""
    exports.mkdir(exist_ok=True)
    target = exports / path.name
    if target.exists():
        return target
    tmp = exports / f".{path.name}.{os.getpid()}.tmp"
    try:
        os.link(path, tmp)
    except OSError:
        shutil.copyfile(path, tmp)
    os.replace(tmp, target)
    return target


def _file_digest(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()[:16]


def _accuracy(graph: Path, point, profile, dataset, cache: Path, info: GraphInfo) -> dict:
    """mAP of one graph over the dataset; cached by (graph bytes, dataset, limit, runtime version).

    The runtime version is part of the key so that an upgrade which changes what the
    graph outputs shows up as an accuracy change instead of being served from the cache.
    """
    ort = _ort_version()
    key = hashlib.sha256(json.dumps([_file_digest(graph), dataset_fingerprint(dataset), profile.limit, ort])
                         .encode()).hexdigest()[:20]
    path = Path(cache) / "accuracy" / f"{key}.json"
    if path.exists():
        try:
            cached = json.loads(path.read_text())
            # entries written before the digest / the per-image results existed are redone
            if "det_digest" in cached and path.with_suffix(".npz").is_file():
                return cached
        except (OSError, json.JSONDecodeError):
            pass  # a damaged cache entry is recomputed
    det_cache = Path(cache) / "detections" / f"ort-{ort}"
    try:
        from speedbench.evaluate import detect_dataset, evaluate_graph

        # Always check threads (once per graph, cached with the accuracy): the one accuracy
        # figure stands for every thread setting only if 1 and 2 threads detect the same.
        result = evaluate_graph(graph, dataset, model=point.graph_key[0], limit=profile.limit or None,
                                intra_threads=_cores(), cache_dir=det_cache, check_threads=True)
        scored = dataset.first(int(profile.limit)) if profile.limit else dataset
        # Same graph, images and cache as evaluate_graph: served from its detections cache.
        dets = detect_dataset(graph, scored, result["label_map"], _cores(), det_cache)
    except UserError as exc:
        info.notes.append(f"accuracy not measured: {exc}")
        return {}
    except Exception as exc:
        info.notes.append(f"accuracy failed: {type(exc).__name__}: {_one_line(exc)}")
        return {}
    acc = {k: _metric(result.get(k)) for k in ACCURACY_COLUMNS}
    inv = result.get("thread_invariance")
    if inv:
        # Do detections change with the thread count? (floating-point reduction order can.)
        acc["threads_identical"] = bool(inv["identical"])
        acc["threads_max_box_diff"] = float(inv["max_box_diff"])
    acc["det_digest"] = detections_digest(dets)
    path.parent.mkdir(parents=True, exist_ok=True)
    # Per-image results (what a paired comparison of two graphs resamples), kept per graph.
    from speedbench.evaluate.paired import per_image_results

    npz = path.with_suffix(f".{os.getpid()}.tmp.npz")
    per_image_results(scored.coco, dets).save(npz)
    os.replace(npz, path.with_suffix(".npz"))
    acc["per_image_key"] = key
    tmp = path.with_suffix(f".{os.getpid()}.tmp")
    tmp.write_text(json.dumps({k: (None if isinstance(v, float) and not math.isfinite(v) else v)
                               for k, v in acc.items()}))
    os.replace(tmp, path)
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


def _cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


def dataset_fingerprint(dataset) -> str:
    fp = getattr(dataset, "fingerprint", None)
    if callable(fp):
        return str(fp())
    if fp:
        return str(fp)
    return str(getattr(dataset, "source", ""))


# ----------------------------------------------------------------- measuring
def measure(planned, info: GraphInfo, profile, images, policy, baseline_fps=None) -> tuple[dict, list]:
    """Measure one planned point in its own worker; always returns a row (failed rows included)."""
    from speedbench.measure import Point

    c = planned.config
    point = Point(**c, graph=info.path,
                  options=dict(profile.synthetic) if c["backend"] == "synthetic" else {})
    samples: list = []
    if not info.ok and c["backend"] != "eager":
        row = {**c, "point_id": planned.point_id, "status": "failed", "reason": info.reason}
    else:
        try:
            if c["concurrency"] > 1:
                from speedbench.measure.load import measure_load

                result = measure_load(point, images, k=c["concurrency"], policy=policy,
                                      timeout_s=profile.timeout_s, baseline_fps=baseline_fps)
                samples = list(result.latencies_ms or [])
            else:
                from speedbench.measure import measure_point

                result = measure_point(point, images, policy, profile.timeout_s)
                if result.measurement is not None:
                    samples = [float(x) for x in result.measurement.samples_ms]
            row = result.to_row()
            row.update(_extra_columns(getattr(result, "extra", None) or {}))
        except UserError as exc:
            row = {**c, "point_id": planned.point_id, "status": "failed", "reason": str(exc)}
        except Exception as exc:  # a harness bug on one point must not cost the others
            row = {**c, "point_id": planned.point_id, "status": "failed",
                   "reason": f"{type(exc).__name__}: {_one_line(exc)}"}
    row.update(merge_columns(planned, info, profile))
    return row, samples


def measure_invocation(planned, info: GraphInfo, profile, images, policy, index: int):
    """One worker process (invocation `index`) of a one-stream point: its PointResult, or a str
    saying why no worker could run (the graph failed; a harness error). Only invocation 0 runs
    the stage profile: the others time only."""
    import dataclasses

    from speedbench.measure import Point
    from speedbench.measure.launch import measure_point

    c = planned.config
    if not info.ok and c["backend"] != "eager":
        return info.reason
    point = Point(**c, graph=info.path, options=dict(profile.synthetic) if c["backend"] == "synthetic" else {})
    if index:
        policy = dataclasses.replace(policy, profile_stages=False)
    try:
        t0 = time.monotonic()
        result = measure_point(point, images, policy, profile.timeout_s, invocation=index)
        result.extra["wall_s"] = round(time.monotonic() - t0, 3)
        return result
    except UserError as exc:
        return str(exc)
    except Exception as exc:  # a harness bug on one point must not cost the others
        return f"{type(exc).__name__}: {_one_line(exc)}"


def invocations_row(planned, info: GraphInfo, profile, outcome) -> tuple[dict, list, list]:
    """(row, samples, invocation index per sample) of a one-stream point from its invocations
    (PointResults), or a failed row from the reason none ran."""
    from speedbench.measure.result import combine_invocations

    if isinstance(outcome, str):
        row = {**planned.config, "point_id": planned.point_id, "status": "failed", "reason": outcome}
        row.update(merge_columns(planned, info, profile))
        return row, [], []
    result = combine_invocations(list(outcome))
    row = result.to_row()
    row.update(_extra_columns(result.extra))
    row["wall_s"] = round(sum(float(r.extra.get("wall_s", 0.0)) for r in outcome), 3)
    row.update(merge_columns(planned, info, profile))
    m = result.measurement
    return row, ([] if m is None else m.samples_ms.tolist()), ([] if m is None else m.invocation.tolist())


def _extra_columns(extra: dict) -> dict:
    """The worker's details that help read a row: how warm-up and timing ended."""
    out = {}
    if "warmup_runs" in extra:
        out["warmup_runs"] = extra["warmup_runs"]
        out["warmup_settled"] = bool(extra.get("warmup_settled"))
    if "stop" in extra:
        out["stop_reason"] = extra["stop"]
    if "seconds" in extra:
        out["timing_s"] = extra["seconds"]
    tail = (extra.get("stderr_tail") or "").strip().splitlines()
    if tail:
        # Last line the worker printed before it failed: often the actual cause.
        out["worker_stderr"] = tail[-1][-300:]
    return out


def merge_columns(planned, info: GraphInfo, profile) -> dict:
    """Columns the sweep adds to what the measurement produced."""
    c = planned.config
    untrained = c["weights"] == "none"
    out = {"point_id": planned.point_id, "host": profile.host, "family": planned.family,
           "untrained": untrained}
    for k, v in info.facts.items():
        # Eager points keep the worker's own model size (parameter bytes), not the ONNX file's.
        if k == "model_file_mib" and c["backend"] == "eager":
            continue
        out[k] = v
    for k in ACCURACY_COLUMNS:
        out[k] = NAN if untrained else info.accuracy.get(k, NAN)
    for k, v in info.accuracy.items():
        if k not in ACCURACY_COLUMNS and not untrained:
            out[k] = v
    notes = list(planned.notes) + list(info.notes)
    if not info.ok and c["backend"] == "eager":
        notes.append(f"accuracy not measured ({info.reason})")
    if untrained and not any(n.startswith("untrained") for n in notes):
        notes.append("untrained weights: latency only, accuracy not meaningful")
    out["note"] = "; ".join(notes)
    return out


def _one_line(exc) -> str:
    return " ".join(str(exc).split())[:300]
