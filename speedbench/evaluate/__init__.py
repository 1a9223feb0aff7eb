"""COCO-protocol evaluation: mAP (vectorised), bootstrap CIs, running a graph over a dataset.

Public face:
- coco_evaluate(gt, dets, bootstrap=1000, seed=0, confidence=0.95) -> dict
- load_detections(path, gt) -> list[dict]        (a validated COCO results file)
- read_detections(path, gt) -> Detections        (the same, parsed once into arrays)
- detect_dataset(graph_path, dataset, label_map, intra_threads=1, cache_dir=None) -> list[dict]
- check_thread_invariance(graph_path, dataset, label_map, threads=(1, 2), n_images=4) -> dict
- evaluate_graph(graph_path, dataset, label_map, ...) -> dict
"""
_LAZY = {
    "coco_evaluate": "speedbench.evaluate.metrics",
    "SUMMARY_KEYS": "speedbench.evaluate.metrics",
    "load_detections": "speedbench.evaluate.results",
    "read_detections": "speedbench.evaluate.results",
    "GroundTruth": "speedbench.evaluate.cocoeval",
    "detect_dataset": "speedbench.evaluate.run",
    "check_thread_invariance": "speedbench.evaluate.run",
    "evaluate_graph": "speedbench.evaluate.run",
}

__all__ = list(_LAZY)


def __getattr__(name):
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(name)
