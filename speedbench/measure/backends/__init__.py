"""Backends: how one point's model is loaded, run and profiled.

Each backend module has `load(point) -> Runner`. A Runner has
- prepare(image uint8 [H, W, 3]) -> input     (done once per image, outside the timed region)
- __call__(input) -> outputs                  (the timed region)
- profile(inputs, reps) -> dict | None        (stages, profiled_ms, details; a separate pass)
- model_file_mib, timed_region (text saying what the timed call includes), close()
"""
from __future__ import annotations

import importlib

NAMES = ("ort", "eager", "synthetic", "adapted")   # adapted: an external graph + its adapter


def get_backend(name: str):
    if name not in NAMES:
        raise ValueError(f"unknown backend {name!r}")
    return importlib.import_module(f"speedbench.measure.backends.{name}")
