"""The trained compact demo zoo and `speedbench demo`.

Public face:
- train(models="all", steps=None, out_dir=None, seed=0, ...)  (speedbench.demo.train)
- heldout_accuracy(model, n=100, seed=0) -> COCO figures      (speedbench.demo.accuracy)
- load_demo_model(model_id) -> (eager model, manifest entry)  (speedbench.demo.accuracy)
The weights and manifest.json live in speedbench/zoo/weights/; the architectures in
speedbench.zoo.compact.
"""

_LAZY = {
    "train": "speedbench.demo.train",
    "heldout_accuracy": "speedbench.demo.accuracy",
    "load_demo_model": "speedbench.demo.accuracy",
}

__all__ = list(_LAZY)


def __getattr__(name):
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(name)
