"""Measure one configuration (a point) in its own worker process.

Public face:
- Point(model, weights, size, proposals, backend, intra_threads, inter_threads,
  exec_mode, opt_level, affinity, concurrency, graph=None, options={})  - what to run
- Policy(warmup_min, ..., rel_ci=0.02, confidence=0.95, profile_stages=True, ...) - when to stop
- Measurement(samples_ms) - every sample, percentiles, order-statistic CIs, CoV, noisy flag
- PointResult - status/reason, measurement, stages (ms), profiling overhead, memory; .to_row()
- measure_point(point, images, policy=Policy(), timeout_s=600) -> PointResult
- measure_load(point, images, k, ...) / measure_scaling / measure_curve - throughput of K
  concurrent workers, latency under load (speedbench.measure.concurrent_launch; results and their maths in
  concurrent_result, the worker loop in concurrent_worker)
- attribute_profile / Attributor - ORT profile node times -> stages (speedbench.measure.stages)

Backends: "ort" (ONNX Runtime CPU), "eager" (PyTorch) and "synthetic" (a harness
test backend doing a known amount of work; see speedbench.measure.backends.synthetic).
Imports are lazy so that the worker can pin its CPUs before numpy/torch load.
"""
_LAZY = {
    "Point": "speedbench.measure.point",
    "Policy": "speedbench.measure.point",
    "BACKENDS": "speedbench.measure.point",
    "Measurement": "speedbench.measure.stats",
    "PointResult": "speedbench.measure.result",
    "measure_point": "speedbench.measure.launch",
    "Attributor": "speedbench.measure.stages",
    "attribute_profile": "speedbench.measure.stages",
    "measure_load": "speedbench.measure.concurrent_launch",
    "measure_scaling": "speedbench.measure.concurrent_launch",
    "measure_curve": "speedbench.measure.concurrent_launch",
}

__all__ = [*_LAZY]


def __getattr__(name):
    if name in _LAZY:
        import importlib

        module = importlib.import_module(_LAZY[name])
        return getattr(module, "attribute" if name == "attribute_profile" else name)
    raise AttributeError(name)
