"""ONNX Runtime CPU backend.

Timed region: one `InferenceSession.run` on the graph input `image` (float32
[3, H, W] in [0, 1], prepared by speedbench.data.to_input before timing). It
includes everything inside the graph - resize + normalisation (the model's own
transform), backbone, heads, box decoding, NMS, mapping boxes back to the
image - and ORT copying the outputs to numpy arrays. It excludes image decoding
and the uint8 -> float32 conversion.
"""
from __future__ import annotations

import glob
import os
import tempfile

import numpy as np

from speedbench.errors import UserError
from speedbench.zoo import get_spec

TIMED_REGION = ("onnxruntime InferenceSession.run: in-graph resize+normalise, backbone, heads, "
                "decoding, NMS, box rescale, output copy to numpy; excludes image decode and to_input")

_MODES = {"sequential": "ORT_SEQUENTIAL", "parallel": "ORT_PARALLEL"}
_LEVELS = {"disable": "ORT_DISABLE_ALL", "basic": "ORT_ENABLE_BASIC",
           "extended": "ORT_ENABLE_EXTENDED", "all": "ORT_ENABLE_ALL"}


def session_options(point, profile_dir: str | None = None):
    import onnxruntime as ort

    so = ort.SessionOptions()
    so.log_severity_level = 3
    so.intra_op_num_threads = int(point.intra_threads)
    so.inter_op_num_threads = int(point.inter_threads)
    so.execution_mode = getattr(ort.ExecutionMode, _MODES[point.exec_mode])
    so.graph_optimization_level = getattr(ort.GraphOptimizationLevel, _LEVELS[point.opt_level])
    # Spin-waiting (ORT's default) keeps idle pool threads polling for work: see schema.SPIN_VALUES.
    spin = "0" if getattr(point, "spin_wait", "on") == "off" else "1"
    so.add_session_config_entry("session.intra_op.allow_spinning", spin)
    so.add_session_config_entry("session.inter_op.allow_spinning", spin)
    if profile_dir is not None:
        so.enable_profiling = True
        so.profile_file_prefix = os.path.join(profile_dir, "ort_profile")
        so.optimized_model_filepath = os.path.join(profile_dir, "optimized.onnx")
    return so


class Runner:
    timed_region = TIMED_REGION

    def __init__(self, point):
        import onnxruntime as ort

        self.point = point
        self.session = ort.InferenceSession(point.graph, session_options(point), providers=["CPUExecutionProvider"])
        inputs = [i.name for i in self.session.get_inputs()]
        if inputs != ["image"]:
            raise ValueError(f"{point.graph}: graph inputs are {inputs}, expected exactly ['image']")
        self.model_file_mib = os.path.getsize(point.graph) / 2**20

    def prepare(self, image: np.ndarray) -> dict:
        from speedbench.data import to_input

        return {"image": to_input(image)}

    def __call__(self, feed):
        return self.session.run(None, feed)

    def profile(self, inputs, reps: int, warmup: int = 2) -> dict:
        """A separate profiled session with the same options; node times attributed to stages."""
        import onnx
        import onnxruntime as ort

        from speedbench.measure import stages as st

        with tempfile.TemporaryDirectory(prefix="speedbench-prof-") as tmp:
            sess = ort.InferenceSession(self.point.graph, session_options(self.point, tmp),
                                        providers=["CPUExecutionProvider"])
            for i in range(warmup + reps):
                sess.run(None, inputs[i % len(inputs)])
            path = sess.end_profiling()
            events = st.read_ort_profile(path)
            optimized = None
            opt_files = glob.glob(os.path.join(tmp, "optimized.onnx"))
            if opt_files:
                optimized = onnx.load(opt_files[0], load_external_data=False)
            original = onnx.load(self.point.graph, load_external_data=False)
        attributor = st.Attributor(original, optimized)
        out = st.attribute(events, attributor, st.stage_function(_spec(self.point.model)), last_runs=reps,
                           dispatch=self.point.exec_mode == "sequential")
        if self.point.exec_mode == "parallel":
            out["note"] = ("parallel executor: node times overlap across threads, "
                           "so stage times can add up to more than the run")
        return out

    def subgraphs(self, inputs, reps: int) -> dict:
        """The stage split checked without the profiler (speedbench.measure.subgraphs)."""
        import onnx
        import onnxruntime as ort

        from speedbench.measure import stages as st
        from speedbench.measure.subgraphs import time_stage_subgraphs

        def session(blob):
            return ort.InferenceSession(blob, session_options(self.point), providers=["CPUExecutionProvider"])

        model = onnx.load(self.point.graph)
        return time_stage_subgraphs(model, st.stage_function(_spec(self.point.model)), inputs, session,
                                    self.session, reps)

    def close(self):
        self.session = None


def _spec(model_id):
    try:
        return get_spec(model_id)
    except UserError:   # not a zoo model (a user's own graph): default torchvision scopes
        return None


def load(point) -> Runner:
    return Runner(point)
