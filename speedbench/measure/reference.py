"""Host reference: a small fixed convolution graph timed between a point's timed runs.

On a shared host the machine's own speed moves by tens of percent over seconds (other
tenants, frequency), and a rerun minutes later can land several percent slower as a
whole; no interval from inside one run can see that. The stack-independent probe
(probe.py: SHA-256 and a copy) does not follow these phases on our VM. A graph of the
model's own kind, run by the same ONNX Runtime in the same process, does:
benchmarks/bench_host_reference.py gives the between-process CoV of the model's median
and of model / reference (figures in the README's method section).

Each ONNX Runtime worker runs the reference once after every timed run, outside the
timed region (about 1 ms against the model's 15-50 ms), on one thread, and reports its
median. Per
invocation, model / reference is then a reading of the model's speed with the host's
phase divided out; `speedbench compare` uses it for reruns of one stack.

The reference runs on the measured onnxruntime, so an onnxruntime upgrade moves it too:
it must never adjust a comparison across onnxruntime versions (analyse.regression falls
back to the probe there and says so).

The graph holds no weights (they are graph inputs, fed from a seeded generator), so the
file shipped with the package is under 2 KiB. It is made by this module
(`python -m speedbench.measure.reference`); tests/test_reference.py rebuilds it and
checks it is the same graph.
"""
from __future__ import annotations

import statistics
import time
from pathlib import Path

REFERENCE_VERSION = 1                 # changes whenever the graph or its inputs change
SIZE = 160                            # input side (pixels)
LAYERS = ((16, 2), (32, 2), (64, 2), (64, 1), (96, 2))   # (output channels, stride) of each 3x3 conv
GRAPH = Path(__file__).with_name("reference.onnx")


def build_graph():
    """The reference graph as an onnx.ModelProto (opset 17, IR 8: any onnxruntime >= 1.18 reads it)."""
    from onnx import TensorProto, helper

    inputs = [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 3, SIZE, SIZE])]
    nodes, prev, channels, side = [], "x", 3, SIZE
    for k, (out, stride) in enumerate(LAYERS):
        side = (side + 2 - 3) // stride + 1
        inputs += [helper.make_tensor_value_info(f"w{k}", TensorProto.FLOAT, [out, channels, 3, 3]),
                   helper.make_tensor_value_info(f"b{k}", TensorProto.FLOAT, [out])]
        nodes += [helper.make_node("Conv", [prev, f"w{k}", f"b{k}"], [f"conv{k}"], kernel_shape=[3, 3],
                                   strides=[stride, stride], pads=[1, 1, 1, 1]),
                  helper.make_node("Relu", [f"conv{k}"], [f"relu{k}"])]
        prev, channels = f"relu{k}", out
    output = helper.make_tensor_value_info(prev, TensorProto.FLOAT, [1, channels, side, side])
    graph = helper.make_graph(nodes, "speedbench_host_reference", inputs, [output])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)], producer_name="speedbench")
    model.ir_version = 8
    return model


def feeds(seed: int = 0) -> dict:
    """The image and the weights, seeded (He-scaled weights keep the activations in range)."""
    import numpy as np

    rng = np.random.default_rng(seed)
    out = {"x": rng.random((1, 3, SIZE, SIZE), dtype=np.float32)}
    channels = 3
    for k, (n, _) in enumerate(LAYERS):
        scale = (2.0 / (channels * 9)) ** 0.5
        out[f"w{k}"] = (rng.standard_normal((n, channels, 3, 3)) * scale).astype(np.float32)
        out[f"b{k}"] = np.zeros(n, np.float32)
        channels = n
    return out


def session_options():
    """One intra-op thread, always: a second thread pool in the worker would spin-wait beside the
    model's own pool (ORT's default) and slow the model's next run; one thread has no pool."""
    import onnxruntime as ort

    so = ort.SessionOptions()
    so.log_severity_level = 3
    so.intra_op_num_threads = 1
    so.inter_op_num_threads = 1
    return so


class ReferenceTimer:
    """The reference graph in its own one-thread session; tick() times one run."""

    def __init__(self, warmup: int = 5):
        import onnxruntime as ort

        self.session = ort.InferenceSession(str(GRAPH), session_options(), providers=["CPUExecutionProvider"])
        self.feed = feeds()
        self.samples_ns: list[int] = []
        for _ in range(warmup):
            self.session.run(None, self.feed)

    def tick(self, *_) -> None:
        t0 = time.perf_counter_ns()
        self.session.run(None, self.feed)
        self.samples_ns.append(time.perf_counter_ns() - t0)

    def summary(self) -> dict:
        """{"ms": median time of one reference run, "n": runs, "version"} (ms NaN before any tick)."""
        ms = statistics.median(self.samples_ns) / 1e6 if self.samples_ns else float("nan")
        return {"ms": round(ms, 5), "n": len(self.samples_ns), "version": REFERENCE_VERSION}


if __name__ == "__main__":  # regenerate the shipped file
    GRAPH.write_bytes(build_graph().SerializeToString())
    print(f"wrote {GRAPH} ({GRAPH.stat().st_size} bytes)")
