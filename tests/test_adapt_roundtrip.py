"""Round trip: demo_ssdlite exported with raw head outputs + the shipped adapter (host resize,
softmax, top-k, NMS) reproduces the native graph, which does all of that inside itself."""
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]
SHIPPED = ROOT / "profiles" / "adapters" / "demo_ssdlite_raw.toml"


@pytest.fixture(scope="module")
def graphs(tmp_path_factory):
    from speedbench.export import export_onnx
    from speedbench.export.raw_head import export_raw_head

    tmp = tmp_path_factory.mktemp("roundtrip")
    native = export_onnx("demo_ssdlite", weights="demo", size=320, cache_dir=tmp / "cache", verify=False)
    assert native.ok, native.reason
    raw = export_raw_head("demo_ssdlite", tmp / "demo_ssdlite_raw.onnx", weights="demo", size=320)
    return native.path, raw


def _session(path):
    from speedbench.export.onnx_export import ort_session

    return ort_session(path)


def _matched(native, host, box_tol=0.5):
    """Greedy one-to-one matching: same label, |score diff| < 1e-4, every coordinate within box_tol px.

    Detections with near-equal scores can come out in either order (float rounding), so the
    two lists are compared as sets, not position by position.
    """
    (b1, s1, l1), (b2, s2, l2) = native, host
    used = np.zeros(len(b2), bool)
    worst = 0.0
    for b, s, lab in zip(b1, s1, l1):
        cand = np.flatnonzero(~used & (l2 == lab) & (np.abs(s2 - s) < 1e-4))
        if not len(cand):
            return False, worst
        diff = np.abs(b2[cand] - b).max(axis=1)
        j = cand[int(np.argmin(diff))]
        if diff.min() > box_tol:
            return False, float(diff.min())
        used[j] = True
        worst = max(worst, float(diff.min()))
    return bool(used.all()), worst


def test_shipped_adapter_is_what_the_export_writes(graphs):
    from speedbench.adapt import load_adapter

    _, raw = graphs
    written, shipped = load_adapter(raw["adapter"]), load_adapter(SHIPPED)
    assert written.to_dict() == shipped.to_dict()


def test_host_decode_reproduces_native_detections(graphs):
    # Reference: the native graph (torchvision's SSD postprocess exported into ONNX: softmax, per-class
    # top-k, batched_nms, resize back). Sizes other than 320 exercise the host resize.
    from speedbench.adapt import AdaptedGraph, check_graph, load_adapter
    from speedbench.data import to_input
    from speedbench.data.scenes import render_scene, scene_rng
    from speedbench.adapt.host import resize_bilinear

    native_path, raw = graphs
    adapter = load_adapter(SHIPPED)
    check_graph(raw["graph"], adapter, classes=["__background__", "crate", "drum", "pylon"])
    host = AdaptedGraph(raw["graph"], adapter, _session(raw["graph"]), classes=4)
    native = _session(native_path)
    shapes = [None, None, None, (240, 320), (400, 300), (256, 352)]
    worst = 0.0
    for i, shape in enumerate(shapes):
        img = render_scene(scene_rng(0, "heldout", i))[0]
        if shape is not None:
            img = np.clip(np.rint(resize_bilinear(img, *shape)), 0, 255).astype(np.uint8)
        ref = [np.asarray(a) for a in native.run(None, {"image": to_input(img)})[:3]]
        got = host(img)
        assert len(ref[0]) == len(got[0]) > 0
        ok, diff = _matched(ref, got)
        assert ok, f"image {i} {img.shape}: host detections differ from the native graph's (box diff {diff})"
        worst = max(worst, diff)
    assert worst <= 0.5


def test_host_decode_map_matches_native(graphs, tmp_path):
    # mAP of both paths over the same held-out scenes (COCO protocol, ours = pycocotools, see
    # test_cocoeval.py): within 0.005.
    from speedbench.adapt import load_adapter
    from speedbench.data import load_dataset, make_scenes
    from speedbench.evaluate import evaluate_graph

    native_path, raw = graphs
    ds = load_dataset(make_scenes(tmp_path / "scenes", count=24, seed=11, split="heldout"))
    classes = ["__background__", "crate", "drum", "pylon"]
    a = evaluate_graph(native_path, ds, model_classes=classes, bootstrap=0, check_threads=False)
    b = evaluate_graph(raw["graph"], ds, model_classes=classes, bootstrap=0, check_threads=False,
                       adapter=load_adapter(SHIPPED), size=320)
    assert a["map"] > 0.1
    assert abs(a["map"] - b["map"]) <= 0.005, (a["map"], b["map"])


def test_shipped_example_profile(graphs, tmp_path, monkeypatch):
    # profiles/external-example.toml, run from a checkout after `speedbench export demo_ssdlite
    # --raw-head -o examples/demo_ssdlite_raw.onnx`: parses, and plans both graphs at 320 px.
    import os
    import shutil

    from speedbench.sweep import expand_plan, load_profile

    _, raw = graphs
    (tmp_path / "examples").mkdir()
    os.link(raw["graph"], tmp_path / "examples" / "demo_ssdlite_raw.onnx")
    shutil.copytree(ROOT / "profiles", tmp_path / "profiles")
    monkeypatch.chdir(tmp_path)
    plan = expand_plan(load_profile("profiles/external-example.toml"))
    got = sorted((p.config["model"], p.config["backend"], p.config["size"], p.config["proposals"]) for p in plan.points)
    assert got == [("demo_ssdlite", "ort", 320, 100), ("demo_ssdlite", "ort", 320, 300),
                   ("demo_ssdlite_raw", "adapted", 320, 100), ("demo_ssdlite_raw", "adapted", 320, 300)]
