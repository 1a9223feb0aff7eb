"""Sweeps end to end on the measure package's synthetic harness backend (no model is run):
rows written as points finish, failures kept as rows, resume after SIGKILL of the parent."""
import os
import signal
import sqlite3
import subprocess
import sys
import time

import pytest

from speedbench.sweep import expand_plan, load_profile, load_run, load_samples, run_sweep
from helpers import stored_points

PROFILE = """
[run]
name = "syn"
timeout_s = 30

[dataset]
scenes = {{count = 1}}
accuracy = false

[sweep]
sizes = {sizes}
proposals = [10, 20]
backends = ["synthetic"]

[[models]]
id = "synthetic"
{extra_model}
[[threads]]
intra = 1

[repetitions]
warmup_min = 1
warmup_max = 2
min_reps = 3
max_reps = 5
max_seconds = 0.5
stages = false

[synthetic]
work_ms = {work_ms}
mode = "sleep"
"""


def write_profile(tmp_path, sizes="[64, 96]", extra_model="", work_ms=1.0):
    path = tmp_path / "syn.toml"
    path.write_text(PROFILE.format(sizes=sizes, extra_model=extra_model, work_ms=work_ms))
    return path


def test_sweep_writes_rows_and_keeps_failures(tmp_path):
    prof = write_profile(tmp_path, extra_model='[[models]]\nid = "synthetic:fail=raise"\nsizes = [64]\n')
    out = run_sweep(prof, out_dir=tmp_path / "run", quiet=True, stream=open(os.devnull, "w"))
    df = load_run(out)
    assert len(df) == 2 * 2 + 2 and df["point_id"].is_unique
    ok, failed = df[df.status == "ok"], df[df.status == "failed"]
    assert len(ok) == 4 and len(failed) == 2
    # Every stored row hashes to its own id (non-ORT backends store exec_mode/opt_level blank).
    from speedbench.schema import point_id

    assert all(point_id(r) == r["point_id"] for r in df.to_dict("records"))
    assert set(df["exec_mode"]) == {""} and set(df["opt_level"]) == {""}
    assert failed["reason"].str.contains("synthetic failure requested").all()
    assert (ok["lat_p50_ms"] > 0).all() and (ok["n_samples"] >= 3).all()
    # untrained ("none" weights): accuracy NaN and flagged
    assert df["untrained"].all() and df["map"].isna().all()
    assert (df["host"] != "").all() and (df["family"] == "two-stage").all()
    # raw samples: one set per ok point, as many as n_samples
    s = load_samples(out)
    counts = s.groupby("point_id").size()
    for _, row in ok.iterrows():
        assert counts[row.point_id] == row.n_samples
    assert set(s.point_id) == set(ok.point_id)
    # a rerun into the same directory without --resume is refused; with it, nothing is re-measured
    from speedbench.errors import UserError

    with pytest.raises(UserError, match="already holds a run"):
        run_sweep(prof, out_dir=tmp_path / "run", quiet=True)
    before = sqlite3.connect(out / "points.sqlite").execute("SELECT point_id, seq FROM points").fetchall()
    run_sweep(prof, out_dir=tmp_path / "run", resume=True, quiet=True, stream=open(os.devnull, "w"))
    after = sqlite3.connect(out / "points.sqlite").execute("SELECT point_id, seq FROM points").fetchall()
    assert sorted(before) == sorted(after)
    # --retry-failed re-measures exactly the failed points (they fail again: same injected fault)
    run_sweep(prof, out_dir=tmp_path / "run", resume=True, retry_failed=True, quiet=True,
              stream=open(os.devnull, "w"))
    again = dict(sqlite3.connect(out / "points.sqlite").execute("SELECT point_id, seq FROM points").fetchall())
    old = dict(after)
    assert set(again) == set(old) and len(load_run(out)) == 6
    assert {p for p in again if again[p] != old[p]} == set(failed.point_id)


def test_resume_with_a_different_profile_is_refused(tmp_path):
    prof = write_profile(tmp_path, sizes="[64]")
    run_sweep(prof, out_dir=tmp_path / "run", quiet=True, stream=open(os.devnull, "w"))
    # Comments and formatting may change between the start and the resume...
    prof.write_text("# edited\n" + prof.read_text().replace("sizes = [64]", "sizes   =   [ 64 ]  # one size"))
    run_sweep(prof, out_dir=tmp_path / "run", resume=True, quiet=True, stream=open(os.devnull, "w"))
    # ...the study may not.
    prof.write_text(prof.read_text().replace("[ 64 ]", "[64, 96]"))
    from speedbench.errors import UserError

    with pytest.raises(UserError, match="different profile"):
        run_sweep(prof, out_dir=tmp_path / "run", resume=True, quiet=True)


def test_resume_after_sigkill_of_parent_gives_full_set_without_duplicates(tmp_path):
    # Slow enough per point (~0.5 s of timed work + worker start) to kill the parent mid-sweep.
    prof = write_profile(tmp_path, sizes="[64, 96, 128, 160]", work_ms=100.0)
    run = tmp_path / "run"
    plan_ids = {p.point_id for p in expand_plan(load_profile(prof)).points}
    assert len(plan_ids) == 8
    cmd = [sys.executable, "-m", "speedbench", "sweep", str(prof), "-o", str(run), "--quiet"]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 120
    while stored_points(run / "points.sqlite") < 2:
        assert proc.poll() is None, proc.stderr.read().decode()
        assert time.monotonic() < deadline, "sweep made no progress"
        time.sleep(0.05)
    proc.send_signal(signal.SIGKILL)   # the parent only; its worker (own session) may still finish
    proc.wait()
    partial = load_run(run)
    assert 2 <= len(partial) < 8, "kill came too late to test resume"
    assert set(partial.point_id) <= plan_ids

    res = subprocess.run(cmd + ["--resume"], capture_output=True, text=True, timeout=240)
    assert res.returncode == 0, res.stderr
    measured_now = [l for l in res.stderr.splitlines() if l.startswith("[")]
    assert len(measured_now) == 8 - len(partial)   # only the missing points were measured
    full = load_run(run)
    assert len(full) == 8 and set(full.point_id) == plan_ids and full.point_id.is_unique
    assert (full.status == "ok").all()
    # points measured before the kill are untouched by the resume
    kept = full.set_index("point_id").loc[list(partial.point_id), "lat_p50_ms"]
    assert (kept.values == partial.set_index("point_id")["lat_p50_ms"].values).all()
    s = load_samples(run)
    assert not s.duplicated(["point_id", "i"]).any() and set(s.point_id) == plan_ids
    import pandas as pd

    csv = pd.read_csv(run / "points.csv")
    assert len(csv) == 8 and csv.point_id.is_unique


# ---------------------------------------------------------------- real graphs (ONNX Runtime)
ORT_PROFILE = """
[run]
name = "ort"
cache = "{cache}"
timeout_s = 180

[dataset]
scenes = {{count = 4, seed = 1}}
timing_images = 2

[sweep]
sizes = [128]

[[models]]
id = "demo_ssdlite"
weights = "file:{weights}"
{threads}
[repetitions]
warmup_min = 1
warmup_max = 3
min_reps = 3
max_reps = 10
max_seconds = 1.0
stages = false
"""


def test_ort_sweep_exports_and_evaluates_once_then_reuses_the_cache(tmp_path, monkeypatch):
    import torch

    from speedbench.sweep import RunDir, steps
    from speedbench.sweep.pipeline import GraphStore
    from speedbench.zoo import build_model

    weights = tmp_path / "ssd.pt"
    # A checkpoint file counts as trained to the sweep, so the accuracy path runs for real
    # (a random-init model: mAP near 0, but computed by the COCO protocol end to end).
    torch.save(build_model("demo_ssdlite", weights="none").state_dict(), weights)
    cache = tmp_path / "cache"
    prof = tmp_path / "ort.toml"
    prof.write_text(ORT_PROFILE.format(cache=cache, weights=weights, threads="[[threads]]\nintra = 1\n"))
    first = load_run(run_sweep(prof, out_dir=tmp_path / "run1", quiet=True, stream=open(os.devnull, "w")))
    assert len(first) == 1 and first.status[0] == "ok", first[["status", "reason"]]
    row = first.iloc[0]
    assert 0 <= row["map"] <= 1 and 0 <= row["map50"] <= 1               # accuracy measured
    assert row["params"] > 0 and row["gmacs"] > 0 and row["model_file_mib"] > 0
    assert row["lat_p50_ms"] > 0 and row["n_samples"] >= 3
    assert not row["untrained"] and row["parity_passed"]
    # 1 vs 2 intra-op threads checked once for the graph and kept on its rows and in meta
    assert row["threads_identical"] in (True, False) and row["threads_max_box_diff"] >= 0
    from speedbench.sweep import load_meta

    (check,) = load_meta(tmp_path / "run1")["thread_invariance"].values()
    assert check["identical"] == row["threads_identical"]
    assert isinstance(row["det_digest"], str) and len(row["det_digest"]) == 20
    # per-image results kept with the run, for paired accuracy comparisons (issue 18)
    from speedbench.evaluate.paired import PerImage

    assert PerImage.load(row["per_image_file"]).map() == pytest.approx(row["map"], abs=1e-9)
    assert len(list((tmp_path / "run1" / "exports").glob("*.onnx"))) == 1   # graph kept with the run
    assert len(list((cache / "exports").glob("*.json"))) == 1
    assert len(list((cache / "accuracy").glob("*.json"))) == 1

    # Preparing the same graph for another run directory: neither export nor evaluation runs again.
    import speedbench.evaluate.run as ev
    import speedbench.export.onnx_export as ex

    def refuse(*a, **k):
        raise AssertionError("cache miss: this step should not run again")

    monkeypatch.setattr(ex, "_export_into", refuse)
    monkeypatch.setattr(ev, "evaluate_graph", refuse)
    profile = load_profile(prof)
    planned = expand_plan(profile).points[0]
    rd = RunDir.create(tmp_path / "run2", profile.text, {"env": {}})
    info = GraphStore(profile, steps.prepare_dataset(profile, cache), rd.exports).prepare(planned)
    rd.close()
    assert info.ok and info.accuracy["map"] == row["map"] and info.facts["params"] == row["params"]
    assert planned.point_id == row["point_id"]   # same configuration, same id in every run

    # A second sweep of the same graph with nothing cached re-detects: the digest is unchanged.
    monkeypatch.undo()
    import shutil

    shutil.rmtree(cache / "accuracy")
    shutil.rmtree(cache / "detections")
    again = load_run(run_sweep(prof, out_dir=tmp_path / "run3", quiet=True, stream=open(os.devnull, "w")))
    assert again["det_digest"][0] == row["det_digest"]
    assert len(list((cache / "accuracy").glob("*.json"))) == 1


def test_failed_export_becomes_failed_rows_and_the_sweep_goes_on(tmp_path, monkeypatch):
    import speedbench.export as export

    calls = []

    def broken(model_id, **kw):
        calls.append(model_id)
        raise RuntimeError("exporter exploded\nwith a second line")

    monkeypatch.setattr(export, "export_onnx", broken)
    prof = tmp_path / "p.toml"
    prof.write_text(PROFILE.format(sizes="[64]", extra_model="", work_ms=1.0).replace(
        'backends = ["synthetic"]', 'backends = ["ort", "synthetic"]'))
    text = prof.read_text().replace('[[models]]\nid = "synthetic"',
                                    '[[models]]\nid = "synthetic"\n[[models]]\nid = "demo_fcos"')
    prof.write_text(text)
    df = load_run(run_sweep(prof, out_dir=tmp_path / "run", quiet=True, stream=open(os.devnull, "w")))
    # proposals [10, 20] x {ort, synthetic} for each model; the synthetic model runs on synthetic only
    fcos_ort = df[(df.model == "demo_fcos") & (df.backend == "ort")]
    assert sorted(calls) == ["demo_fcos", "demo_fcos"]    # one export attempt per distinct graph
    assert len(fcos_ort) == 2 and (fcos_ort.status == "failed").all()
    assert (fcos_ort.reason == "export: RuntimeError: exporter exploded with a second line").all()
    # the synthetic backend needs no graph: the same model's synthetic points are measured
    rest = df[df.backend == "synthetic"]
    assert len(rest) == 4 and (rest.status == "ok").all() and len(df) == 6


def test_cli_progress_bar_and_quiet_lines(tmp_path, capsys):
    from speedbench.cli import main

    prof = write_profile(tmp_path, sizes="[64]")
    assert main(["sweep", str(prof), "-o", str(tmp_path / "bar")]) == 0
    cap = capsys.readouterr()
    assert "2/2 points" in cap.err and "measuring synthetic @ 64 / 10p" in cap.err   # tqdm bar on stderr
    assert "2 point(s), 2 ok, 0 failed" in cap.out
    assert main(["sweep", str(prof), "-o", str(tmp_path / "quiet"), "--quiet"]) == 0
    lines = [l for l in capsys.readouterr().err.splitlines() if l.startswith("[")]
    # the points run in a seeded shuffled order (sweep.schedule), so either may come last
    assert len(lines) == 2 and lines[-1].startswith("[2/2] synthetic @ 64 / ") and ": ok p50 " in lines[-1]
    meta_resumed = main(["sweep", str(prof), "-o", str(tmp_path / "quiet"), "--resume", "-q"])
    assert meta_resumed == 0
    from speedbench.sweep import load_meta

    meta = load_meta(tmp_path / "quiet")
    assert len(meta["resumed"]) == 1 and meta["finished"] and meta["plan_points"] == 2


def test_missing_checkpoint_or_dataset_fails_before_any_run_directory(tmp_path, capsys):
    from speedbench.cli import main

    prof = write_profile(tmp_path, sizes="[64]").read_text()
    bad_weights = tmp_path / "w.toml"
    bad_weights.write_text(prof.replace('id = "synthetic"', 'id = "synthetic"\nweights = "file:nope.pt"'))
    assert main(["sweep", str(bad_weights), "-o", str(tmp_path / "r1")]) == 2
    assert "models[0].weights: nope.pt: checkpoint file not found" in capsys.readouterr().err
    bad_data = tmp_path / "d.toml"
    bad_data.write_text(prof.replace('scenes = {count = 1}', 'path = "no/such/set.json"')
                        .replace('backends = ["synthetic"]', 'backends = ["ort"]')
                        .replace('id = "synthetic"', 'id = "demo_ssdlite"'))
    assert main(["sweep", str(bad_data), "-o", str(tmp_path / "r2")]) == 2
    assert "no/such/set.json: dataset not found" in capsys.readouterr().err
    assert not (tmp_path / "r1").exists() and not (tmp_path / "r2").exists()
    (tmp_path / "afile").write_text("x")
    good = write_profile(tmp_path, sizes="[64]")
    assert main(["sweep", str(good), "-o", str(tmp_path / "afile")]) == 2
    assert "afile: exists and is not a directory" in capsys.readouterr().err
    (tmp_path / "full").mkdir()
    (tmp_path / "full" / "keep.txt").write_text("x")
    assert main(["sweep", str(good), "-o", str(tmp_path / "full")]) == 2
    assert "full: exists and is not empty" in capsys.readouterr().err
    assert main(["sweep", str(good), "-o", str(tmp_path / "none"), "--resume"]) == 2
    assert "none: run directory not found" in capsys.readouterr().err
    assert main(["sweep", str(good), "--retry-failed"]) == 2
    assert "--retry-failed: only together with --resume" in capsys.readouterr().err


def test_concurrency_axis_measures_throughput_points(tmp_path):
    # K=2 workers x 1 thread fits 2 cores; K=4 would not and is skipped with a note by the plan.
    prof = write_profile(tmp_path, sizes="[64]", work_ms=2.0)
    prof.write_text(prof.read_text().replace('backends = ["synthetic"]',
                                             'backends = ["synthetic"]\nconcurrency = [1, 2]')
                    .replace("proposals = [10, 20]", "proposals = [10]"))
    plan = expand_plan(load_profile(prof), cores=2)
    assert [p.config["concurrency"] for p in plan.points] == [1, 2]
    df = load_run(run_sweep(prof, out_dir=tmp_path / "run", quiet=True, stream=open(os.devnull, "w")))
    one, two = df[df.concurrency == 1].iloc[0], df[df.concurrency == 2].iloc[0]
    assert one.status == "ok" and two.status == "ok", two.reason
    assert two["tput_fps"] > 0 and two["n_samples"] > 0
    # scaling efficiency = X(2) / (2 X(1)) against the K=1 point measured just before
    assert two["scaling_eff"] > 0
    # X(1) of one closed-loop stream is 1000 / mean latency (Little's law with one request in flight),
    # the same baseline speedbench.analyse.sizing derives from the K=1 row.
    assert two["scaling_eff"] == pytest.approx(two["tput_fps"] / (2 * 1000.0 / one["lat_mean_ms"]), rel=1e-9)
    assert two["point_id"] != one["point_id"]
    # what a report quotes later is recorded now, in meta.json (the report never asks today's code)
    from speedbench.measure.backends.synthetic import TIMED_REGION
    from speedbench.sweep import load_meta

    assert load_meta(tmp_path / "run")["timed_regions"] == {"synthetic": TIMED_REGION}



def test_cli_cluster_without_the_engine_and_hosts_without_cluster(monkeypatch, tmp_path, capsys):
    # Simulates the fleet extra not installed, as tests/test_fleet.py does: importing `distributed` fails.
    from speedbench.cli import main
    from speedbench.fleet import INSTALL_HINT

    prof = write_profile(tmp_path)
    monkeypatch.setitem(sys.modules, "distributed", None)
    assert main(["sweep", str(prof), "--cluster", "tcp://127.0.0.1:8786", "-o", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err.strip()
    assert err == f"speedbench: error: {INSTALL_HINT}" and "\n" not in err
    assert main(["sweep", str(prof), "--hosts", "a", "-o", str(tmp_path / "o")]) == 2
    assert "--hosts: only together with --cluster" in capsys.readouterr().err
    assert not (tmp_path / "o").exists()


def test_detection_digest_ignores_float_noise_and_order_but_not_a_moved_box():
    from speedbench.sweep.steps import detections_digest

    a = [{"image_id": 1, "category_id": 2, "bbox": [10.0, 20.0, 30.0, 40.0], "score": 0.9},
         {"image_id": 1, "category_id": 3, "bbox": [0.0, 0.0, 5.0, 5.0], "score": 0.5}]
    noisy = [{**a[1], "bbox": [-1e-6, 1e-6, 5.000001, 5.0]}, {**a[0], "score": 0.9000001}]
    moved = [a[0], {**a[1], "bbox": [0.0, 0.0, 5.5, 5.0]}]
    assert detections_digest(a) == detections_digest(noisy)
    assert detections_digest(a) != detections_digest(moved)


def test_cached_scenes_are_decoded_once_and_a_changed_file_is_still_refused(tmp_path, monkeypatch):
    # A fully cached sweep checks its generated scenes by the digest of their bytes instead of
    # decoding every image again; any change to a file must bring the full check back.
    from types import SimpleNamespace

    from PIL import Image

    from speedbench.data.datasets import Dataset
    from speedbench.errors import UserError
    from speedbench.sweep import steps

    profile = SimpleNamespace(dataset_path=None, scenes_count=3, scenes_seed=5, max_pixels=40_000_000)
    first = steps.prepare_dataset(profile, tmp_path)
    stamp = tmp_path / "scenes" / "heldout-n3-s5" / steps.CHECKED_FILE
    assert stamp.is_file()

    decoded = []
    original = Dataset.check_images
    monkeypatch.setattr(Dataset, "check_images", lambda self: decoded.append(1) or original(self))
    again = steps.prepare_dataset(profile, tmp_path)
    assert decoded == [] and again.digest == first.digest  # same bytes: no decoding

    image = first.images[1].path
    data = image.read_bytes()
    image.write_bytes(data[: len(data) // 2])  # truncated: a corrupt file
    with pytest.raises(UserError, match=rf"image {first.images[1].id}"):
        steps.prepare_dataset(profile, tmp_path)
    assert decoded == [1]

    Image.new("RGB", (17, 9)).save(image)  # a readable image of the wrong size
    with pytest.raises(UserError, match="17x9 but the annotations say"):
        steps.prepare_dataset(profile, tmp_path)

    image.write_bytes(data)  # restored: passes the (full) check, then is trusted again
    steps.prepare_dataset(profile, tmp_path)
    count = len(decoded)
    steps.prepare_dataset(profile, tmp_path)
    assert len(decoded) == count

    profile.max_pixels = 100  # a tighter pixel limit is a different check: decoded again
    with pytest.raises(UserError, match="pixels"):
        steps.prepare_dataset(profile, tmp_path)
