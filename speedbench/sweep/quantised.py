"""The sweep's int8 graphs: the calibration set, the quantised graph, its change vs fp32.

An int8 point's graph is the fp32 export of the same (model, weights, size, proposals),
quantised with the profile's [quantisation] settings (speedbench.export.quantise) on
calibration images that share no image with the held-out set. Its accuracy is compared with
that fp32 graph on the same held-out images: mAP change with a paired bootstrap interval
(speedbench.evaluate.paired) and detection agreement (matched fraction, box difference).
"""
from __future__ import annotations

import hashlib
import math
import os
import shutil
from pathlib import Path

from speedbench.errors import UserError

_CALIBRATION: dict = {}   # (profile source, settings) -> dataset: loaded and checked once per process


def settings_of(profile):
    from speedbench.export import QuantSettings

    q = dict(profile.quantisation or {})
    return QuantSettings(**{**q, "op_types": tuple(q.get("op_types") or QuantSettings().op_types)})


def calibration_dataset(profile, cache: Path, heldout):
    """The profile's calibration images: a path as given, or generated calibration-split scenes.

    Refuses (one line) a set that shares an image with the held-out set: int8 accuracy
    measured on the images it was calibrated on would flatter it.
    """
    key = (profile.source, profile.calibration_path, profile.calibration_count, profile.calibration_seed,
           getattr(heldout, "fingerprint", None))
    if key in _CALIBRATION:
        return _CALIBRATION[key]
    from speedbench.data import load_dataset

    where = f"{profile.source}: quantisation.calibration"
    if profile.calibration_path:
        try:
            ds = load_dataset(profile.calibration_path)
        except UserError as exc:
            raise UserError(f"{where}: {exc}") from None
    else:
        ds = load_dataset(_generated(cache, profile.calibration_count, profile.calibration_seed))
    if heldout is not None:
        shared = image_digests(ds) & image_digests(heldout)
        if shared:
            raise UserError(f"{where}: {len(shared)} image(s) also in the held-out set; calibrate on other images")
    _CALIBRATION[key] = ds
    return ds


def _generated(cache: Path, count: int, seed: int) -> Path:
    from speedbench.data import make_scenes

    out = Path(cache) / "scenes" / f"calibration-n{count}-s{seed}"
    ann = out / "annotations.json"
    if not ann.exists():
        tmp = out.with_name(out.name + f".tmp{os.getpid()}")
        shutil.rmtree(tmp, ignore_errors=True)
        make_scenes(tmp, count=count, seed=seed, split="calibration")
        out.parent.mkdir(parents=True, exist_ok=True)
        try:
            os.replace(tmp, out)
        except OSError:
            shutil.rmtree(tmp, ignore_errors=True)   # generated meanwhile by another sweep
    return ann


def image_digests(dataset) -> set[str]:
    """sha256 of each image file's bytes: two sets are disjoint when these are."""
    return {hashlib.sha256(rec.path.read_bytes()).hexdigest() for rec in dataset.images}


def quantised_record(fp32_record, profile, cache: Path, heldout):
    """The int8 export record of an fp32 export (cached by content under cache/exports)."""
    from speedbench.export import quantise_graph

    calibration = calibration_dataset(profile, cache, heldout)
    source = profile.calibration_path or (f"generated calibration scenes (count {profile.calibration_count}, "
                                          f"seed {profile.calibration_seed})")
    return quantise_graph(fp32_record, settings_of(profile), calibration, cache_dir=Path(cache) / "exports",
                          calibration_source=source)


def run_meta(profile, cache: Path, heldout) -> dict:
    """What meta.json keeps about int8: settings and both fingerprints."""
    calibration = calibration_dataset(profile, cache, heldout)
    return {"settings": settings_of(profile).to_dict(),
            "calibration_source": profile.calibration_path or "generated",
            "calibration_fingerprint": calibration.fingerprint,
            "calibration_images": len(calibration.images),
            "heldout_fingerprint": getattr(heldout, "fingerprint", None)}


def change_vs_fp32(fp32_graph, int8_graph, fp32_acc: dict, int8_acc: dict, dataset, profile,
                   accuracy_dir: Path, detections_dir: Path) -> dict:
    """Row columns of an int8 graph: mAP change vs fp32 [paired CI] and detection agreement."""
    from speedbench.evaluate.paired import PerImage, paired_map_diff
    from speedbench.evaluate.run import raw_detections
    from speedbench.export import agreement

    out: dict = {}
    keys = fp32_acc.get("per_image_key"), int8_acc.get("per_image_key")
    if all(keys):
        a = PerImage.load(Path(accuracy_dir) / f"{keys[1]}.npz")
        b = PerImage.load(Path(accuracy_dir) / f"{keys[0]}.npz")
        d = paired_map_diff(a, b)
        out.update(map_change=d["diff"], map_change_ci_lo=_finite(d["ci_lo"]), map_change_ci_hi=_finite(d["ci_hi"]))
    scored = dataset.first(int(profile.limit)) if profile.limit else dataset
    raw32 = raw_detections(fp32_graph, scored, 1, detections_dir)
    raw8 = raw_detections(int8_graph, scored, 1, detections_dir)
    ids = sorted(raw32)
    agree = agreement([raw32[i] for i in ids], [raw8[i] for i in ids])
    out.update(agree_matched_fraction=agree["matched_fraction"], agree_box_mean_px=agree["box_mean_abs_diff_px"],
               agree_box_max_px=agree["box_max_abs_diff_px"])
    return {k: (math.nan if v is None else v) for k, v in out.items()}


def _finite(v):
    return v if v is not None and math.isfinite(v) else math.nan
