"""External ONNX detectors: an adapter says what the graph's input wants and what its outputs mean.

Public face:
- Adapter, parse_adapter(table, source), load_adapter(path)          (speedbench.adapt.spec)
- check_graph(path, adapter, classes) -> GraphFacts: the load-time check of declared I/O
- AdaptedGraph(path, adapter, session, size, classes): image -> detections in image pixels,
  host preprocess + InferenceSession.run + host postprocess            (speedbench.adapt.graph)
- preprocess / decode / batched_nms: the host work on its own        (speedbench.adapt.host)
- node_stages / scoped_copy: which stage each graph node belongs to  (speedbench.adapt.stages)

Sits above export and below measure / evaluate, which both run graphs through AdaptedGraph,
so the latency that is timed and the detections that are scored come from one code path.
"""
_LAZY = {
    "Adapter": "speedbench.adapt.spec",
    "parse_adapter": "speedbench.adapt.spec",
    "load_adapter": "speedbench.adapt.spec",
    "check_graph": "speedbench.adapt.graph",
    "load_onnx": "speedbench.adapt.graph",
    "GraphFacts": "speedbench.adapt.graph",
    "AdaptedGraph": "speedbench.adapt.graph",
    "preprocess": "speedbench.adapt.host",
    "decode": "speedbench.adapt.host",
    "batched_nms": "speedbench.adapt.host",
    "node_stages": "speedbench.adapt.stages",
    "scoped_copy": "speedbench.adapt.stages",
}

__all__ = list(_LAZY)


def __getattr__(name):
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(name)
