"""Detector zoo: torchvision's detection builders plus the compact demo zoo.

Public face:
- get_spec(id) -> ModelSpec, list_specs(), register(spec)
- build_model(model_id, weights="none", size=None, proposals=None, num_classes=None)
- configure(model, size, proposals), describe_knobs(spec), stage_of_scope(spec, scope)
- weights_digest(model_id, weights); trained_sizes(model_id, weights): sizes the weights were trained at
- pattern_image(h, w, seed): structured test image (numpy)

Weights sources: "none" (seeded random init, see weights.UNTRAINED_RECIPE), "torchvision"
(local TORCH_HOME cache only), "demo" (speedbench/zoo/weights, sha256-checked), "file:PATH".
"""
from speedbench.zoo.registry import (describe_knobs, get_spec, list_specs, register, scope_to_path,
                                     stage_of_scope)
from speedbench.zoo.spec import ModelSpec

__all__ = ["ModelSpec", "get_spec", "list_specs", "register", "build_model", "configure",
           "describe_knobs", "stage_of_scope", "scope_to_path", "weights_digest", "pattern_image",
           "parse_weights", "trained_sizes"]


def trained_sizes(model_id, weights="none"):
    from speedbench.zoo.weights import trained_sizes as _sizes

    return _sizes(model_id, weights)


def build_model(model_id, weights="none", size=None, proposals=None, num_classes=None, device="cpu"):
    from speedbench.zoo.build import build_model as _build

    return _build(model_id, weights=weights, size=size, proposals=proposals,
                  num_classes=num_classes, device=device)


def configure(model, size=None, proposals=None, score_thresh=None):
    from speedbench.zoo.build import configure as _configure

    return _configure(model, size, proposals, score_thresh=score_thresh)


def weights_digest(model_id, weights="none") -> str:
    from speedbench.zoo.weights import weights_digest as _digest

    get_spec(model_id)
    return _digest(model_id, weights)


def parse_weights(weights):
    from speedbench.zoo.weights import parse_weights as _parse

    return _parse(weights)


def pattern_image(height, width, seed=0):
    from speedbench.zoo.patterns import pattern_image as _pattern

    return _pattern(height, width, seed)
