"""ONNX export (TorchScript path), content-hash cache, torch-vs-ORT parity, model facts.

Public face:
- export_onnx(model_id, size=None, proposals=None, weights="none", opset=17, cache_dir=None,
  verify=True, out=None) -> ExportRecord (path, digest, ..., parity, facts, ok, reason; .to_dict())
- model_facts(model_id, size, proposals, weights) -> {params, gmacs, gmacs_per_stage, onnx_mib?}
- ort_session(path, intra_threads=1): a quiet ONNX Runtime CPU session
- default_cache_dir(): $SPEEDBENCH_CACHE or ~/.cache/speedbench/exports
- quantise_graph(fp32_record, QuantSettings(...), calibration_dataset, cache_dir=None) -> ExportRecord
  (precision "int8", static QDQ, cached by content; speedbench.export.quantise), agreement(fp32, int8)
"""
from speedbench.export.facts import model_facts
from speedbench.export.onnx_export import ExportRecord, default_cache_dir, export_onnx, ort_session
from speedbench.export.quantise import PRECISIONS, QuantSettings, agreement, quantise_graph

__all__ = ["export_onnx", "ExportRecord", "model_facts", "ort_session", "default_cache_dir",
           "quantise_graph", "QuantSettings", "PRECISIONS", "agreement"]
