"""Images and datasets: synthetic scenes, COCO-JSON / Pascal VOC loaders, image I/O.

Public face (imported lazily so that `import speedbench.data` stays light):
- read_image(path) -> uint8 [H, W, 3] RGB array
- to_input(image) -> float32 [3, H, W] in [0, 1], the exported graphs' input
- make_scenes(...)            (speedbench.data.scenes)
- load_dataset(path, ...)     (speedbench.data.datasets)
- load_annotations(path)      (the validated COCO dict only; no image is touched)
- read_json(path)             (speedbench.data.jsonio: bounded, orjson when installed)
"""
from speedbench.data.images import read_image, to_input

_LAZY = {
    "make_scenes": "speedbench.data.scenes",
    "SCENE_CLASSES": "speedbench.data.scenes",
    "load_dataset": "speedbench.data.datasets",
    "Dataset": "speedbench.data.datasets",
    "load_annotations": "speedbench.data.datasets",
    "read_json": "speedbench.data.jsonio",
}

__all__ = ["read_image", "to_input", *_LAZY]


def __getattr__(name):
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(name)
