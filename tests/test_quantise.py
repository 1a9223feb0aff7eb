"""INT8 graphs: what the quantised graph computes, what it stores, what stays fp32, and the
sweep's precision axis (identity, calibration set, change vs fp32)."""
import math
import os

import numpy as np
import pytest

from speedbench import schema
from speedbench.errors import UserError
from speedbench.export import QuantSettings, agreement, export_onnx, ort_session, quantise_graph
from speedbench.export.quantise import _walk, quantise_key

MODEL, SIZE = "demo_frcnn_lite", 256   # two-stage: Conv + Gemm, RoiAlign, two NMS under If nodes


@pytest.fixture(scope="module")
def graphs(tmp_path_factory):
    from speedbench.data import load_dataset, make_scenes

    root = tmp_path_factory.mktemp("int8")
    fp32 = export_onnx(MODEL, size=SIZE, weights="demo", cache_dir=root, verify=False)
    assert fp32.ok, fp32.reason
    calib = load_dataset(make_scenes(root / "calib", count=4, seed=1, split="calibration"))
    int8 = quantise_graph(fp32, QuantSettings(), calib, cache_dir=root)
    assert int8.ok, int8.reason
    return fp32, int8, calib, root


def _model(path):
    import onnx

    return onnx.load(str(path))


def _run_node(op_type, x, scale, zero_point, axis=None):
    """One QuantizeLinear / DequantizeLinear node with the given parameters, run by ONNX Runtime."""
    import onnx
    from onnx import TensorProto, helper, numpy_helper

    inits = [numpy_helper.from_array(scale, "s"), numpy_helper.from_array(zero_point, "z")]
    attrs = {} if axis is None else {"axis": axis}
    node = helper.make_node(op_type, ["x", "s", "z"], ["y"], **attrs)
    out_type = TensorProto.FLOAT if op_type == "DequantizeLinear" else helper.np_dtype_to_tensor_dtype(zero_point.dtype)
    graph = helper.make_graph([node], "g", [helper.make_tensor_value_info("x", helper.np_dtype_to_tensor_dtype(x.dtype), x.shape)],
                              [helper.make_tensor_value_info("y", out_type, None)], inits)
    proto = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 19)])
    proto.ir_version = 9
    import onnxruntime as ort

    sess = ort.InferenceSession(proto.SerializeToString(), providers=["CPUExecutionProvider"])
    return sess.run(None, {"x": x})[0]


def test_qdq_nodes_compute_the_onnx_formula_on_the_graphs_own_scales(graphs):
    # ONNX operator docs, QuantizeLinear: y = saturate(round(x / y_scale) + y_zero_point), rounding
    # half to even; DequantizeLinear: y = (x - x_zero_point) * x_scale, per axis when the scale is 1-D.
    from onnx import numpy_helper

    _, int8, _, _ = graphs
    g = _model(int8.path).graph
    inits = {t.name: numpy_helper.to_array(t) for t in g.initializer}
    q = next(n for n in g.node if n.op_type == "QuantizeLinear" and inits[n.input[1]].ndim == 0
             and 0 < inits[n.input[2]] < 255)
    scale, zp = inits[q.input[1]], inits[q.input[2]]
    k = np.arange(-300, 300, dtype=np.float64)
    # exact halves (k + 0.5) * scale, the values either side, and far out of range (saturation)
    x = np.concatenate([(k + 0.5) * scale, k * scale * 1.37, [1e6, -1e6]]).astype(np.float32)
    # the division in float32, as the operator's inputs are (np.rint rounds half to even)
    want = np.clip(np.rint(x / scale) + int(zp), 0, 255).astype(np.uint8)
    assert np.array_equal(_run_node("QuantizeLinear", x, scale, zp), want)
    assert np.array_equal(_run_node("QuantizeLinear", np.array([0.5, 1.5, 2.5, -0.5], np.float32) * scale, scale, zp),
                          np.array([0, 2, 2, 0], np.int64) + int(zp))  # round half to even

    # a per-channel weight: DequantizeLinear along its axis
    d = next(n for n in g.node if n.op_type == "DequantizeLinear" and n.input[0] in inits
             and inits[n.input[0]].dtype == np.int8 and inits[n.input[1]].ndim == 1)
    w, ws, wz = inits[d.input[0]], inits[d.input[1]], inits[d.input[2]]
    axis = next((a.i for a in d.attribute if a.name == "axis"), 1)
    shape = [1] * w.ndim
    shape[axis] = -1
    want_w = (w.astype(np.float32) - wz.reshape(shape)) * ws.reshape(shape)
    assert np.allclose(_run_node("DequantizeLinear", w, ws, wz, axis=axis), want_w, rtol=0, atol=0)
    # and the weight is what quantising the fp32 weight with that scale gives (per channel, symmetric)
    assert np.all(wz == 0)


def test_int8_weights_take_a_quarter_of_the_fp32_storage(graphs):
    # 8 vs 32 bits per weight (textbook); per-channel scales and zero points add a little
    _, int8, _, _ = graphs
    ratio = int8.facts["weights_int8_bytes"] / int8.facts["weights_fp32_bytes"]
    assert 0.25 <= ratio < 0.30
    assert int8.facts["onnx_mib"] < 0.5 * _size_mib(graphs[0].path)


def _size_mib(path):
    return os.path.getsize(path) / 2**20


def test_nms_box_decoding_and_control_flow_stay_fp32(graphs):
    fp32, int8, _, _ = graphs
    g = _model(int8.path).graph
    # no Q/DQ inside If/Loop bodies: they hold the fp32 graph's ops (pre-processing folds constants)
    assert not [n for n, inside in _walk(g) if inside and n.op_type in ("QuantizeLinear", "DequantizeLinear")]
    sub = lambda graph: {n.op_type for n, inside in _walk(graph) if inside}
    assert sub(g) and sub(g) <= sub(_model(fp32.path).graph)
    producer = {o: n for n in g.node for o in n.output}
    # NMS (inside the If around torchvision's batched_nms) is kept, fed by no Q/DQ node
    nms = [n for n, _ in _walk(g) if n.op_type == "NonMaxSuppression"]
    assert len(nms) == sum(n.op_type == "NonMaxSuppression" for n, _ in _walk(_model(fp32.path).graph)) > 0
    for n in nms:
        assert all(producer[i].op_type not in ("QuantizeLinear", "DequantizeLinear") for i in n.input if i in producer)
    # only Conv / Gemm / MatMul take dequantised weights; every quantised op is one of them
    inits = {t.name for t in g.initializer}
    consumers = {}
    for n in g.node:
        for i in n.input:
            consumers.setdefault(i, []).append(n)
    for d in (n for n in g.node if n.op_type == "DequantizeLinear" and n.input[0] in inits):
        assert {c.op_type for c in consumers.get(d.output[0], [])} <= set(schema.QUANT_OP_TYPES)
    # every QuantizeLinear sits at a quantised op: on its input, or on its output
    quantised = set(schema.QUANT_OP_TYPES)
    for q in (n for n in g.node if n.op_type == "QuantizeLinear"):
        src = producer.get(q.input[0])
        feeds = {c.op_type for d in consumers.get(q.output[0], []) for c in consumers.get(d.output[0], [])}
        assert (src is not None and src.op_type in quantised) or feeds & quantised, q.name
    assert int8.facts["fp32_compute_nodes"] == {} and int8.facts["qdq_in_subgraphs"] == 0
    assert set(int8.facts["quantised_nodes"]) == {"Conv", "Gemm"}


def test_record_names_settings_and_calibration_and_is_cached(graphs):
    fp32, int8, calib, root = graphs
    assert int8.precision == "int8" and fp32.precision == "fp32"
    q = int8.quantisation
    assert q["method"] == "minmax" and q["per_channel"] is True and q["op_types"] == ["Conv", "MatMul", "Gemm"]
    assert q["calibration"]["fingerprint"] == calib.fingerprint and q["fp32_sha256"] == fp32.facts["onnx_sha256"]
    again = quantise_graph(fp32, QuantSettings(), calib, cache_dir=root)
    assert again.path == int8.path and again.seconds == int8.seconds       # served from the cache
    other = [quantise_key(fp32, QuantSettings(method="percentile"), calib.fingerprint),
             quantise_key(fp32, QuantSettings(per_channel=False), calib.fingerprint),
             quantise_key(fp32, QuantSettings(), "another calibration set")]
    assert len({int8.digest, *other}) == 4
    # agreement with fp32 instead of parity with torch
    assert int8.parity["kind"].startswith("agreement") and 0 < int8.parity["matched_fraction"] <= 1


def test_settings_are_checked():
    with pytest.raises(UserError, match="quantisation method"):
        QuantSettings(method="kl")
    with pytest.raises(UserError, match="op_types"):
        QuantSettings(op_types=("Conv", "NonMaxSuppression"))


def test_agreement_counts_matches_and_box_differences():
    boxes = np.array([[10, 10, 50, 50], [60, 60, 90, 90]], np.float32)
    ref = (boxes, np.array([0.9, 0.8], np.float32), np.array([1, 2]))
    assert agreement([ref], [ref])["matched_fraction"] == 1.0
    moved = (boxes + np.array([2, 0, 2, 0], np.float32), ref[1], ref[2])
    dropped = (boxes[:1], ref[1][:1], ref[2][:1])
    a = agreement([ref, ref], [moved, dropped])
    assert a["matched"] == 3 and a["detections"] == 4 and a["matched_fraction"] == 0.75
    assert a["box_max_abs_diff_px"] == 2.0 and math.isclose(a["box_mean_abs_diff_px"], 4 / 3)


def test_int8_graph_runs_and_detects(graphs, heldout_scenes):
    from speedbench.data import load_dataset, to_input

    _, int8, _, _ = graphs
    ds = load_dataset(heldout_scenes)
    boxes, scores, labels = ort_session(int8.path).run(None, {"image": to_input(ds.read(ds.images[0].id))})[:3]
    assert boxes.dtype == np.float32 and boxes.shape[1] == 4 and len(scores) == len(labels) > 0


# ----------------------------------------------------------------- identity and calibration set
LEGACY = {"model": "demo_ssdlite", "weights": "demo", "size": 320, "proposals": 0, "backend": "ort",
          "intra_threads": 1, "inter_threads": 1, "exec_mode": "sequential", "opt_level": "all",
          "affinity": 0, "concurrency": 1}


def test_existing_point_ids_are_unchanged_by_the_precision_column():
    # the literal id this configuration had before `precision` existed
    assert schema.point_id(LEGACY) == "01e42b7f7fb7"
    assert schema.point_id({**LEGACY, "precision": "fp32"}) == "01e42b7f7fb7"
    assert schema.point_id({**LEGACY, "precision": "int8"}) != "01e42b7f7fb7"


def test_calibration_scenes_are_disjoint_from_the_heldout_ones(tmp_path, heldout_scenes):
    from speedbench.data import load_dataset
    from speedbench.sweep.profile import parse_profile
    from speedbench.sweep.quantised import calibration_dataset, image_digests

    held = load_dataset(heldout_scenes)   # held-out split, seed 3
    prof = parse_profile(PROFILE.format(cal="{count = 8, seed = 3}"), "p.toml")   # same seed on purpose
    cal = calibration_dataset(prof, tmp_path, held)
    assert cal.fingerprint != held.fingerprint
    assert not image_digests(cal) & image_digests(held) and len(image_digests(cal)) == 8
    same = parse_profile(PROFILE.format(cal=f'"{heldout_scenes}"'), "same.toml")
    with pytest.raises(UserError, match=r"same.toml: quantisation.calibration: 8 image\(s\) also in the held-out"):
        calibration_dataset(same, tmp_path, held)
    missing = parse_profile(PROFILE.format(cal=f'"{tmp_path / "nope.json"}"'), "m.toml")
    with pytest.raises(UserError, match="m.toml: quantisation.calibration: "):
        calibration_dataset(missing, tmp_path, held)


PROFILE = """
[run]
name = "q"
[dataset]
scenes = {{count = 4, seed = 3}}
[sweep]
precisions = ["fp32", "int8"]
backends = ["ort", "eager"]
[[models]]
id = "demo_ssdlite"
weights = "demo"
[[models]]
id = "demo_fcos"
weights = "demo"
precisions = ["fp32"]
[[threads]]
intra = 1
[quantisation]
calibration = {cal}
"""


@pytest.mark.parametrize("table,fragment", [
    ('calibration = {count = 8, sed = 2}', "q.toml: quantisation.calibration.sed: unknown key"),
    ('calibration = 5', "q.toml: quantisation.calibration: expected a path or a table"),
    ('method = "kl"', "q.toml: quantisation.method: 'kl' is not one of minmax, entropy, percentile"),
    ('op_types = ["Conv", "Resize"]', "q.toml: quantisation.op_types[1]: 'Resize' is not one of"),
    ('calibrate = "x"', "q.toml: quantisation.calibrate: unknown key"),
])
def test_bad_quantisation_keys_are_one_line_errors(table, fragment):
    from speedbench.sweep.profile import parse_profile

    text = PROFILE.format(cal="{count = 2}").replace("calibration = {count = 2}", table)
    with pytest.raises(UserError) as exc:
        parse_profile(text, "q.toml")
    assert fragment in str(exc.value) and "\n" not in str(exc.value)


def test_plan_expands_precisions_per_model_and_on_ort_only():
    from speedbench.sweep import expand_plan
    from speedbench.sweep.profile import parse_profile

    prof = parse_profile(PROFILE.format(cal="{count = 2}"), "q.toml")
    assert prof.precisions == ("fp32", "int8") and prof.calibration_count == 2 and prof.calibration_seed == 1
    assert prof.quantisation == {"method": "minmax", "per_channel": True,
                                 "op_types": ("Conv", "MatMul", "Gemm"), "reduce_range": False}
    plan = expand_plan(prof, concurrency_supported=False, cores=2)
    got = sorted((p.config["model"], p.config["backend"], p.config["precision"]) for p in plan.points)
    assert got == [("demo_fcos", "eager", "fp32"), ("demo_fcos", "ort", "fp32"),
                   ("demo_ssdlite", "eager", "fp32"), ("demo_ssdlite", "ort", "fp32"), ("demo_ssdlite", "ort", "int8")]
    assert any("int8 on backend eager" in n for n in plan.notes)
    int8 = next(p for p in plan.points if p.config["precision"] == "int8")
    assert int8.graph_key[-1] == "int8" and int8.label.endswith("int8")


# ----------------------------------------------------------------- end to end
SWEEP = """
[run]
name = "int8"
timeout_s = 300
cache = "{cache}"

[dataset]
scenes = {{count = 6, seed = 5}}
timing_images = 2

[sweep]
sizes = [256]
precisions = ["fp32", "int8"]

[[models]]
id = "demo_frcnn_lite"
weights = "demo"

[[threads]]
intra = 1

[repetitions]
warmup_min = 1
warmup_max = 3
min_reps = 5
max_reps = 10
max_seconds = 1.0

[quantisation]
calibration = {{count = 4, seed = 1}}
"""


def test_sweep_measures_int8_beside_fp32_and_the_report_compares_them(tmp_path, graphs):
    from speedbench.analyse import load_runs, pick
    from speedbench.report.document import build
    from speedbench.sweep import load_meta, load_run, run_sweep

    prof = tmp_path / "int8.toml"
    cache = tmp_path / "cache"
    # the fixture's export and int8 graph are this sweep's too (same configuration, same
    # generated calibration scenes): served from the cache instead of made again
    (cache / "scenes").mkdir(parents=True)
    os.symlink(graphs[3], cache / "exports")
    prof.write_text(SWEEP.format(cache=cache))
    out = run_sweep(prof, out_dir=tmp_path / "run", quiet=True, stream=open(os.devnull, "w"))
    df = load_run(out).set_index("precision")
    assert set(df.index) == {"fp32", "int8"} and (df["status"] == "ok").all(), df["reason"].tolist()
    fp32, int8 = df.loc["fp32"], df.loc["int8"]
    # the fp32 row keeps the id it had before the precision axis existed
    legacy = {c: getattr(fp32[c], "item", lambda: fp32[c])() for c in schema.CONFIG_COLUMNS if c != "precision"}
    assert fp32["point_id"] == schema.point_id(legacy)
    assert int8["model_file_mib"] < 0.5 * fp32["model_file_mib"]
    # mAP change = int8 mAP - fp32 mAP on the same images, its paired interval around it
    assert math.isclose(int8["map_change"], int8["map"] - fp32["map"], abs_tol=1e-9)
    assert int8["map_change_ci_lo"] <= int8["map_change"] <= int8["map_change_ci_hi"]
    assert 0 < int8["agree_matched_fraction"] <= 1 and int8["stage_backbone_ms"] > 0
    meta = load_meta(out)["quantisation"]
    assert meta["calibration_fingerprint"] == int8["calibration_fingerprint"] != meta["heldout_fingerprint"]
    assert list((out / "exports").glob("*-int8-*.json"))     # the int8 export record goes with the run
    # pick limited to a precision, and the report's fp32 vs int8 table
    runs = load_runs([out])
    assert pick(runs[0].points, 10_000, precision="int8").best["precision"] == "int8"
    with pytest.raises(UserError, match="--precision"):
        pick(runs[0].points, 10_000, precision="int4")
    _, blocks = build(runs)
    i = blocks.index(("h2", "fp32 vs int8"))
    assert blocks[i + 1][1].startswith("CPU INT8 instructions")
    table = blocks[i + 2]
    assert table[0] == "table" and len(table[2]) == 1 and table[2][0][0].startswith("demo_frcnn_lite @ 256")


def _rows():
    base = {**LEGACY, "status": "ok", "family": "one-stage", "lat_p50_ms": 20.0, "stage_backbone_ms": 10.0,
            "stage_method": schema.STAGE_METHOD,
            "map": 0.40, "map_ci_lo": 0.35, "map_ci_hi": 0.45, "model_file_mib": 8.0, "rss_peak_mib": 140.0}
    int8 = {**base, "precision": "int8", "lat_p50_ms": 15.0, "stage_backbone_ms": 5.0, "map": 0.39,
            "map_change": -0.01, "map_change_ci_lo": -0.02, "map_change_ci_hi": 0.0, "model_file_mib": 2.5,
            "agree_matched_fraction": 0.9}
    return [base, int8]


def test_old_rows_load_as_fp32_and_pairs_give_ratios():
    from speedbench.analyse.precision import int8_flags, precision_pairs
    from speedbench.sweep.rundir import rows_to_frame

    df = rows_to_frame(_rows())
    assert list(df["precision"]) == ["fp32", "int8"]        # the first row has no precision: legacy fp32
    pairs = precision_pairs(df)
    assert len(pairs) == 1 and pairs.loc[0, "ratio"] == 0.75 and pairs.loc[0, "ratio_backbone"] == 0.5
    assert pairs.loc[0, "map_fp32"] == 0.40 and pairs.loc[0, "model_file_mib_fp32"] == 8.0
    assert int8_flags({"cpu_flags": {"avx2": True, "avx512_vnni": True, "amx_int8": False}}) == ["avx512_vnni"]


def test_frontier_plot_marks_int8_in_marker_and_legend():
    from speedbench.report.plots import plot_frontier
    from speedbench.sweep.rundir import rows_to_frame

    fig = plot_frontier(rows_to_frame(_rows()))
    ax = fig.axes[0]
    assert any("int8" in t.get_text() for t in ax.get_legend().get_texts())
    assert sorted(line.get_fillstyle() for line in ax.lines if line.get_marker() == "o") == ["full", "left"]


def test_eager_points_are_fp32_only():
    from speedbench.measure import Point

    with pytest.raises(UserError, match="precision"):
        Point(model="m", backend="eager", precision="int8").validate()
    with pytest.raises(UserError, match="precision"):
        Point(model="m", backend="ort", precision="int4", graph="x.onnx").validate()
