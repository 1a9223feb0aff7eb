"""The worker process: every point in a fresh process, failures contained, results structured.

Uses the synthetic harness backend (known work, scripted failures). No timings are asserted.
"""
import numpy as np
import pytest

from speedbench.errors import UserError
from speedbench.measure import Point, PointResult, Policy, measure_point
from speedbench.schema import CONFIG_COLUMNS, RESULT_COLUMNS

FAST = Policy(warmup_min=2, warmup_max=6, min_reps=5, max_reps=30, max_seconds=1.0, profile_reps=2)
IMAGES = [np.full((24, 32, 3), i * 40, np.uint8) for i in range(3)]


def synthetic(**options):
    return Point(model="synthetic", backend="synthetic", size=160, options=options)


def test_ok_point_structure_and_row():
    res = measure_point(synthetic(work_ms=1.0), IMAGES, FAST, timeout_s=60)
    assert res.ok, res.reason
    m = res.measurement
    assert 5 <= m.n <= 30 and len(m.samples_ms) == m.n
    # a busy-wait of 1 ms cannot take less than 1 ms
    assert m.min >= 1.0
    assert res.extra["n_images"] == 3 and len(res.extra["per_image_p50_ms"]) == 3
    assert res.extra["stop"] in ("ci_reached", "max_reps", "max_seconds")
    assert set(res.stages) == {"preprocess", "backbone", "head", "postprocess"}
    # stage shares of the known work (10/50/30/10 %) are measured: each at least its busy-wait
    assert res.stages["backbone"] >= 0.5 and res.stages["head"] >= 0.3
    row = res.to_row()
    assert set(CONFIG_COLUMNS) <= set(row) and row["point_id"] == res.point.id
    known = set(RESULT_COLUMNS) | set(CONFIG_COLUMNS)
    assert set(row) <= known, set(row) - known
    assert row["status"] == "ok" and row["n_samples"] == m.n
    assert row["fps"] == pytest.approx(1000 / row["lat_p50_ms"])
    assert np.isnan(row["stage_neck_ms"])
    back = PointResult.from_dict(res.to_dict())
    back_row = back.to_row()
    assert back_row.keys() == row.keys()
    for k, v in row.items():
        assert back_row[k] == v or (isinstance(v, float) and np.isnan(v) and np.isnan(back_row[k])), k
    assert back.measurement.samples_ms.tolist() == m.samples_ms.tolist()


@pytest.mark.parametrize("fail, reason", [
    ("sigkill", "killed by SIGKILL (out of memory?)"),
    ("segv", "crashed with SIGSEGV (segmentation fault)"),
    ("abort", "aborted (SIGABRT)"),
])
def test_worker_killed_or_crashing_is_a_failed_point(fail, reason):
    res = measure_point(synthetic(fail=fail, fail_at="run", fail_after=2), IMAGES, FAST, timeout_s=60)
    assert res.status == "failed" and res.reason == reason
    assert res.measurement is None
    row = res.to_row()
    assert row["status"] == "failed" and row["reason"] == reason and np.isnan(row["stage_backbone_ms"])
    assert np.isnan(row["lat_p50_ms"]) and np.isnan(row["fps"])     # same columns as an ok row


def test_worker_raising_reports_the_exception():
    res = measure_point(synthetic(fail="raise"), IMAGES, FAST, timeout_s=60)
    assert res.status == "failed"
    assert res.reason == "raised ValueError: synthetic failure requested"
    assert "Traceback" in res.extra["traceback"]


def test_worker_out_of_memory_is_a_failed_point():
    # cap the worker's address space 1 GiB above what it uses at load, then allocate 4 GiB per run
    res = measure_point(synthetic(limit_mib=1024, alloc_mib=4096), IMAGES, FAST, timeout_s=60)
    assert res.status == "failed" and res.reason.startswith("raised MemoryError")


def test_hung_worker_times_out_and_group_is_killed():
    import psutil

    res = measure_point(synthetic(fail="hang", fail_at="run"), IMAGES, FAST, timeout_s=3)
    assert res.status == "failed" and res.reason == "timed out after 3 s"
    # no worker left behind
    me = psutil.Process()
    assert not [c for c in me.children(recursive=True) if "speedbench.measure.worker" in " ".join(c.cmdline())]


def test_failures_do_not_affect_other_points():
    points = [synthetic(work_ms=0.5), synthetic(fail="sigkill"), synthetic(fail="raise", fail_at="run"),
              synthetic(work_ms=0.5, jitter=0.1)]
    results = [measure_point(p, IMAGES, FAST, timeout_s=60) for p in points]
    assert [r.status for r in results] == ["ok", "failed", "failed", "ok"]
    assert results[0].measurement.min >= 0.5 and results[3].measurement.n >= 5


def test_thread_environment_and_affinity_reach_the_worker():
    point = Point(model="synthetic", backend="synthetic", intra_threads=2, affinity=1, options={"work_ms": 0.2})
    res = measure_point(point, IMAGES, FAST, timeout_s=60)
    assert res.ok, res.reason
    env = res.extra["threads_env"]
    assert env["OMP_NUM_THREADS"] == "2" and env["MKL_NUM_THREADS"] == "2" and env["OPENBLAS_NUM_THREADS"] == "2"
    assert len(res.extra["cpus"]) == 1


def test_options_from_model_id_and_identity():
    a = Point(model="synthetic", backend="synthetic", options={"work_ms": 1})
    b = Point(model="synthetic", backend="synthetic", options={"work_ms": 3})
    assert a.id == b.id                    # options (an injected slowdown) are not identity
    assert a.exec_mode == "" and a.opt_level == ""     # ORT-only knobs are blank elsewhere (schema)
    from speedbench.measure.backends.synthetic import settings

    assert settings(Point(model="synthetic:work_ms=5,alloc_mib=2", backend="synthetic"))["work_ms"] == 5
    assert settings(Point(model="synthetic", backend="synthetic", options={"delay_ms": 7}))["work_ms"] == 7


def test_images_from_files(tmp_path):
    from PIL import Image

    paths = []
    for i, img in enumerate(IMAGES):
        paths.append(tmp_path / f"{i}.png")
        Image.fromarray(img).save(paths[-1])
    res = measure_point(synthetic(work_ms=0.2), paths, FAST, timeout_s=60)
    assert res.ok and res.extra["n_images"] == 3


@pytest.mark.parametrize("point, message", [
    (Point(model="x", backend="gpu"), "'backend'"),
    (Point(model="x", backend="ort", graph="/nonexistent/model.onnx"), "/nonexistent/model.onnx"),
    (Point(model="x", backend="ort"), "'graph'"),
    (Point(model="x", backend="synthetic", intra_threads=-1), "'intra_threads'"),
    (Point(model="x", backend="synthetic", affinity=4096), "'affinity'"),
    (Point(model="x", backend="ort", exec_mode="fast", graph=__file__), "'exec_mode'"),
    (Point(model="x", backend="synthetic", options={"wrok_ms": 3}), "unknown synthetic setting 'wrok_ms'"),
])
def test_bad_points_are_user_errors(point, message):
    with pytest.raises(UserError, match=message):
        measure_point(point, IMAGES, FAST)


def test_bad_images_and_policy_are_user_errors(tmp_path):
    with pytest.raises(UserError, match="no images"):
        measure_point(synthetic(), [], FAST)
    with pytest.raises(UserError, match="image 1"):
        measure_point(synthetic(), [IMAGES[0], np.zeros((4, 4), np.float32)], FAST)
    bad = tmp_path / "bad.png"
    bad.write_bytes(b"not a png")
    with pytest.raises(UserError, match="bad.png"):
        measure_point(synthetic(), [bad], FAST)
    with pytest.raises(UserError, match="min_reps"):
        measure_point(synthetic(), IMAGES, Policy(min_reps=10, max_reps=5))
    with pytest.raises(UserError, match="unknown key 'reps'"):
        Policy.from_dict({"reps": 3})


def test_corrupt_graph_is_a_failed_point_not_a_crash(tmp_path):
    graph = tmp_path / "broken.onnx"
    graph.write_bytes(b"\x00garbage")
    res = measure_point(Point(model="x", backend="ort", graph=str(graph)), IMAGES, FAST, timeout_s=60)
    assert res.status == "failed" and res.reason.startswith("raised ")


def test_cli_measure_synthetic_and_bad_input(tmp_path, capsys):
    import json

    from speedbench.cli import main

    out = tmp_path / "res.json"
    rc = main(["measure", "--backend", "synthetic", "--model", "synthetic", "--scenes", "2", "--max-seconds", "0.5",
               "--min-reps", "5", "--json", "-o", str(out)])
    row = json.loads(capsys.readouterr().out)
    assert rc == 0 and row["status"] == "ok" and row["n_samples"] >= 5
    assert len(json.loads(out.read_text())["samples_ms"]) == row["n_samples"]
    assert main(["measure", str(tmp_path / "missing.onnx")]) == 2
    assert "missing.onnx: ONNX graph file not found" in capsys.readouterr().err
    assert main(["measure", "--backend", "synthetic", "--model", "s", "--images", str(tmp_path / "nope")]) == 2
    assert main(["measure", "--backend", "synthetic", "--model", "s", "--threads", "-2"]) == 2


def test_worker_ends_itself_when_its_launcher_dies(children_outlive_launcher):
    """A sweep killed mid-point (or a lost cluster worker) must not leave its measurement running:
    the worker runs in its own session, so only its parent watch can end it. Nor its point
    directory: the launcher that would have removed it is gone."""
    script = ("import numpy as np\n"
              "from speedbench.measure import Point, Policy, measure_point\n"
              "p = Point(model='synthetic', backend='synthetic', intra_threads=1,"
              " options={'fail': 'hang', 'fail_at': 'load'})\n"
              "measure_point(p, [np.zeros((8, 8, 3), np.uint8)], timeout_s=120)\n")
    assert not children_outlive_launcher(script), "the measurement worker outlived its launcher"
    assert not children_outlive_launcher.leftovers(), "the point directory outlived its launcher"
