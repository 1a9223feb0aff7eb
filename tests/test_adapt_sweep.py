"""An external graph through a whole sweep: the same run_point path as zoo models, rows like theirs."""
import os

import numpy as np


def _packed_graph(path):
    """Input [1, 3, 64, 64] float; output det [1, 2, 6]: two fixed detections in the 64 px frame."""
    import onnx
    from onnx import TensorProto, helper, numpy_helper

    det = np.array([[[8, 8, 40, 40, 0.9, 1], [20, 30, 60, 62, 0.6, 2]]], np.float32)
    nodes = [helper.make_node("ReduceMean", ["image"], ["m"], keepdims=0),
             helper.make_node("Mul", ["m", "zero"], ["z"]), helper.make_node("Add", ["c", "z"], ["det"])]
    g = helper.make_graph(nodes, "packed", [helper.make_tensor_value_info("image", TensorProto.FLOAT, [1, 3, 64, 64])],
                          [helper.make_tensor_value_info("det", TensorProto.FLOAT, [1, 2, 6])],
                          initializer=[numpy_helper.from_array(np.zeros((), np.float32), "zero"),
                                       numpy_helper.from_array(det, "c")])
    m = helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)])
    m.ir_version = 8
    onnx.save(m, str(path))


def test_sweep_measures_and_scores_an_external_graph(tmp_path):
    from speedbench.sweep import load_run, run_sweep

    graph = tmp_path / "mine.onnx"
    _packed_graph(graph)
    prof = tmp_path / "p.toml"
    prof.write_text(f"""
[run]
name = "ext"
cache = "{tmp_path / 'cache'}"
[dataset]
scenes = {{count = 3, seed = 2}}
timing_images = 2
[sweep]
proposals = ["default", 1]
[[models]]
id = "mine"
onnx = "{graph}"
family = "one-stage"
classes = ["__background__", "crate", "drum", "pylon"]
[models.adapter]
input = {{layout = "NCHW", size = 64, resize = "letterbox"}}
output = {{kind = "packed", packed = "det"}}
nms = {{iou = 0.5, score_threshold = 0.05, candidates = 10}}
[[threads]]
intra = 1
[repetitions]
warmup_min = 1
warmup_max = 3
min_reps = 3
max_reps = 5
max_seconds = 2
""")
    out = run_sweep(prof, out_dir=tmp_path / "run", quiet=True, stream=open(os.devnull, "w"))
    df = load_run(out)
    assert sorted(df["proposals"]) == [1, 10]          # default = nms.candidates; 1 = host top-k of 1
    assert set(df["backend"]) == {"adapted"} and set(df["status"]) == {"ok"}, df[["status", "reason"]]
    assert set(df["weights"]) == {"onnx:mine.onnx"}
    assert df["map"].notna().all() and df["lat_p50_ms"].gt(0).all()
    assert df["stage_preprocess_ms"].gt(0).all() and df["stage_postprocess_ms"].gt(0).all()
    assert all("external graph mine.onnx" in n for n in df["note"])
    assert list((out / "exports").glob("mine-*.onnx"))
