"""Host reference: the shipped graph is the one the module builds, every ONNX Runtime worker times it,
and compare divides it out of a rerun of one stack (never across onnxruntime versions)."""
import json

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper

from speedbench.analyse import compare
from speedbench.analyse import hostref
from speedbench.measure import Point, Policy, measure_point
from speedbench.measure.launch import measure_invocations
from speedbench.measure.reference import GRAPH, LAYERS, REFERENCE_VERSION, SIZE, build_graph, feeds
from test_compare import ENV, _row, _samples
from speedbench.analyse.runs import Run

import pandas as pd

IMAGES = [np.zeros((24, 32, 3), np.uint8)]
FAST = Policy(warmup_min=1, warmup_max=2, min_reps=5, max_reps=8, max_seconds=0.3, profile_stages=False)


def test_shipped_graph_is_the_built_graph_and_runs():
    shipped = onnx.load(str(GRAPH))
    built = build_graph()
    onnx.checker.check_model(shipped)
    assert onnx.printer.to_text(shipped.graph) == onnx.printer.to_text(built.graph)
    assert shipped.ir_version == built.ir_version == 8
    assert [(o.domain, o.version) for o in shipped.opset_import] == [("", 17)]
    assert GRAPH.stat().st_size < 2048   # weights are inputs, not stored
    import onnxruntime as ort

    out = ort.InferenceSession(str(GRAPH), providers=["CPUExecutionProvider"]).run(None, feeds())[0]
    # Output side of each 3x3 conv with padding 1: floor((n + 2 - 3) / s) + 1 (ONNX Conv operator spec).
    side = SIZE
    for _, stride in LAYERS:
        side = (side + 2 - 3) // stride + 1
    assert out.shape == (1, LAYERS[-1][0], side, side)
    assert np.isfinite(out).all() and 0 < (out > 0).mean() < 1   # ReLU output: live, not saturated


def _identity_graph(path):
    x = helper.make_tensor_value_info("image", TensorProto.FLOAT, [3, "h", "w"])
    y = helper.make_tensor_value_info("out", TensorProto.FLOAT, None)
    node = helper.make_node("ReduceMean", ["image"], ["out"], keepdims=0)
    model = helper.make_model(helper.make_graph([node], "g", [x], [y]), opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.save(model, str(path))
    return str(path)


def test_every_ort_worker_times_the_reference_per_invocation(tmp_path):
    graph = _identity_graph(tmp_path / "m.onnx")
    res = measure_invocations(Point(model="x", backend="ort", graph=graph), IMAGES, FAST, invocations=2,
                              timeout_s=60, settle_s=0)
    assert res.ok, res.reason
    row = res.to_row()
    raw = json.loads(row["host_ref_raw"])
    assert raw["version"] == REFERENCE_VERSION and sorted(raw["ms"]) == ["0", "1"]
    assert row["host_ref_ms"] == pytest.approx(np.median(list(raw["ms"].values())))
    # One reference run after every timed run (outside the timed region).
    assert res.extra["reference_by_invocation"]["0"]["n"] >= FAST.min_reps
    off = measure_point(Point(model="x", backend="ort", graph=graph), IMAGES,
                        Policy(**{**FAST.to_dict(), "host_reference": False}), timeout_s=60).to_row()
    assert np.isnan(off["host_ref_ms"]) and off["host_ref_raw"] == ""
    syn = measure_point(Point("synthetic", backend="synthetic", size=64, options={"work_ms": 1.0, "mode": "sleep"}),
                        IMAGES, FAST, timeout_s=60).to_row()
    assert syn["host_ref_raw"] == ""   # no onnxruntime in the timed path: nothing to reference


def _pair(host_new=1.0, software_new=1.0, invocations=6, points=8, seed=0, ort=("1.32.0", "1.32.0"), phase=0.04):
    """Two runs of `points` configurations in `invocations` processes each. Each process draws its
    own host phase h (a between-process effect, lognormal `phase`), which slows the model and the
    reference alike; the new run's host is host_new slower and its software software_new slower."""
    rng = np.random.default_rng(seed)
    runs = []
    for side, (host, soft) in enumerate(((1.0, 1.0), (host_new, software_new))):
        rows, smp = [], []
        for k in range(points):
            ref, inv_samples = {}, []
            for i in range(invocations):
                h = host * np.exp(rng.normal(0, phase))
                s = _samples(rng, n=60) * h * soft
                ref[str(i)] = 1.0 * h * np.exp(rng.normal(0, 0.005))
                inv_samples.append(s)
            row = _row("m", np.concatenate(inv_samples), size=100 + k, invocations=invocations,
                       host_ref_ms=float(np.median(list(ref.values()))),
                       host_ref_raw=json.dumps({"version": REFERENCE_VERSION, "ms": ref}))
            rows.append(row)
            smp += [(row["point_id"], j, v, i) for i, s in enumerate(inv_samples) for j, v in enumerate(s)]
        env = {**ENV, "packages": {**ENV["packages"], "onnxruntime": ort[side]}}
        runs.append(Run(points=pd.DataFrame(rows), samples=pd.DataFrame(smp, columns=["point_id", "i", "ms", "invocation"]),
                        meta={"profile_name": "check", "host": "box", "env": env}))
    return runs


def test_host_slower_between_runs_is_divided_out():
    # The whole host 15 % slower in the new run, software unchanged: the raw ratio calls points slower
    # (an A/A pair on a drifting host), the reference-adjusted ratio does not.
    base, new = _pair(host_new=1.15)
    c = compare(base, new)
    assert c.host["reference"]["status"] == "used" and c.host["reference"]["points"] == 8
    assert (c.points["adj_by"] == "reference").all()
    assert (c.points["verdict"] == "slower").sum() >= 4
    assert (c.points["adj_verdict"] == "unchanged").all()
    assert all(0.95 < r < 1.05 for r in c.points["adj_ratio"])
    text = c.to_text()
    assert "host-adjusted ratio [CI]" in text and "Host reference: 8 point(s) adjusted" in text
    assert c.regressed and not compare(base, new, host_adjusted=True).regressed


def test_software_slowdown_is_still_caught_after_adjustment():
    base, new = _pair(host_new=1.0, software_new=1.15, seed=1)
    c = compare(base, new, host_adjusted=True)
    assert (c.points["adj_verdict"] == "slower").all() and c.regressed
    # Host-adjusted intervals are narrower than raw ones: the between-process phase is divided out.
    raw_w = np.log(c.points["ci_hi"] / c.points["ci_lo"])
    adj_w = np.log(c.points["adj_ci_hi"] / c.points["adj_ci_lo"])
    assert (adj_w < raw_w).all()


def test_reference_is_not_used_across_onnxruntime_versions():
    # The reference runs on the measured onnxruntime: across versions it moves with the software.
    base, new = _pair(host_new=1.15, ort=("1.20.1", "1.32.0"))
    c = compare(base, new)
    assert c.host["reference"]["status"].startswith("not used: onnxruntime 1.20.1 -> 1.32.0")
    assert "adj_by" not in c.points.columns or (c.points["adj_by"] != "reference").all()
    assert "Host reference not used" in c.to_text()


def test_a_reference_that_cannot_load_costs_the_point_nothing(tmp_path, monkeypatch):
    # The reference only helps compare runs: a damaged install measures the point without it.
    from speedbench.measure import reference, worker

    monkeypatch.setattr(reference, "GRAPH", tmp_path / "missing.onnx")
    extra = {}
    assert worker._reference(Point(model="x", backend="ort", graph="g.onnx"), FAST, extra) is None
    assert "missing.onnx" in extra["reference_error"]
    assert worker._reference(Point(model="x", backend="ort", graph="g.onnx"),
                             Policy(host_reference=False), extra := {}) is None and extra == {}


def test_another_reference_version_is_not_compared():
    base, new = _pair(host_new=1.15)
    new.points["host_ref_raw"] = [r.replace(f'"version": {REFERENCE_VERSION}', '"version": 999')
                                  for r in new.points["host_ref_raw"]]
    c = compare(base, new)
    assert c.host["reference"]["status"] == "not recorded"
    assert "adj_by" not in c.points.columns or (c.points["adj_by"] != "reference").all()


def test_readings_of_bad_cells_are_empty():
    assert hostref.readings("") == {} and hostref.readings("{not json") == {}
    assert hostref.readings(json.dumps({"ms": {"0": -1, "1": "x", "2": 1.5}})) == {2: 1.5}
    groups = [(0, np.ones(3)), (1, np.ones(3))]
    assert hostref.normalised(groups, hostref.readings(json.dumps({"ms": {"0": 2.0}}))) is None  # 1 unread
    out = hostref.normalised(groups, hostref.readings(json.dumps({"ms": {"0": 2.0, "1": 4.0}})))
    assert [float(g[0]) for g in out] == [0.5, 0.25]
