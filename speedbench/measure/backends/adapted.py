"""External ONNX graph + adapter: host preprocess, ONNX Runtime, host postprocess, all timed.

Timed region: one call that takes the decoded uint8 image and returns detections in image
pixels: the host preprocess (resize or letterbox, scaling, normalisation, channel order, layout,
dtype), `InferenceSession.run` (everything inside the graph, outputs copied to numpy) and the
host postprocess (box format, score activation, threshold, top-k, per-class NMS, boxes back to
the image). A zoo graph does its resize, normalisation and NMS inside the graph, so both kinds
carry the same work in the timed region; the external path also carries the uint8 -> float
conversion, which the zoo path does before timing. Image decoding is outside both.

Stages: the profiled pass times the host preprocess and postprocess around each profiled run
and adds them to the graph's own `preprocess` / `postprocess` stages; graph nodes are split by
the adapter's [stages] prefixes or the op-type fallback (speedbench.adapt.stages).
"""
from __future__ import annotations

import glob
import os
import tempfile
import time

import numpy as np

from speedbench.measure.backends.ort import session_options

TIMED_REGION = ("host preprocess (resize/letterbox, scale, normalise, layout) + onnxruntime "
                "InferenceSession.run + host postprocess (decode, score activation, top-k, NMS, boxes back "
                "to image pixels); excludes image decode")


class Runner:
    timed_region = TIMED_REGION

    def __init__(self, point):
        import onnxruntime as ort

        from speedbench.adapt import AdaptedGraph, parse_adapter

        self.point = point
        self.adapter = parse_adapter(point.adapter, f"{point.graph}: adapter")
        if point.proposals and self.adapter.host_nms:
            self.adapter = self.adapter.with_candidates(point.proposals)
        session = ort.InferenceSession(point.graph, session_options(point), providers=["CPUExecutionProvider"])
        self.graph = AdaptedGraph(point.graph, self.adapter, session, size=point.size)
        self.model_file_mib = os.path.getsize(point.graph) / 2**20

    def prepare(self, image: np.ndarray) -> np.ndarray:
        return np.ascontiguousarray(image)

    def __call__(self, image):
        return self.graph(image)

    def profile(self, inputs, reps: int, warmup: int = 2) -> dict:
        """Host pre/post timed around a profiled session of a stage-named copy of the graph."""
        import onnx
        import onnxruntime as ort

        from speedbench.adapt import load_onnx, scoped_copy
        from speedbench.adapt.graph import AdaptedGraph
        from speedbench.adapt.stages import FALLBACK_NOTE, stage_lookup
        from speedbench.measure import stages as st

        original = scoped_copy(load_onnx(self.point.graph), self.adapter)
        pre, post, runs = [], [], []
        with tempfile.TemporaryDirectory(prefix="speedbench-prof-") as tmp:
            scoped = os.path.join(tmp, "scoped.onnx")
            onnx.save(original, scoped)
            sess = ort.InferenceSession(scoped, session_options(self.point, tmp), providers=["CPUExecutionProvider"])
            graph = AdaptedGraph(self.point.graph, self.adapter, sess, size=self.point.size)
            for i in range(warmup + reps):
                t0 = time.perf_counter()
                x, geo = graph.preprocess(inputs[i % len(inputs)])
                t1 = time.perf_counter()
                outs = graph.infer(x)
                t2 = time.perf_counter()
                graph.postprocess(outs, geo)
                t3 = time.perf_counter()
                if i >= warmup:
                    pre.append((t1 - t0) * 1e3)
                    post.append((t3 - t2) * 1e3)
                    runs.append((t3 - t0) * 1e3)
            events = st.read_ort_profile(sess.end_profiling())
            opt_files = glob.glob(os.path.join(tmp, "optimized.onnx"))
            optimized = onnx.load(opt_files[0], load_external_data=False) if opt_files else None
        out = st.attribute(events, st.Attributor(original, optimized), stage_lookup(original), last_runs=reps,
                           dispatch=self.point.exec_mode == "sequential")
        host_pre, host_post = float(np.mean(pre)), float(np.mean(post))
        stages = out["stages"]
        stages["preprocess"] = stages.get("preprocess", 0.0) + host_pre
        stages["postprocess"] = stages.get("postprocess", 0.0) + host_post
        out["graph_profiled_ms"] = out["profiled_ms"]
        out["profiled_ms"] = float(np.mean(runs))
        out["run_ms"] = runs
        out["host_preprocess_ms"], out["host_postprocess_ms"] = host_pre, host_post
        out["host"] = ("host preprocess and postprocess timed around each profiled run and added to "
                       "stages preprocess / postprocess")
        if not self.adapter.stages:
            out["note"] = FALLBACK_NOTE
        return out

    def close(self):
        self.graph = None


def load(point) -> Runner:
    return Runner(point)
