"""PyTorch eager backend.

Timed region: `model([image])` under torch.inference_mode - the model's own
transform (resize + normalise), backbone, heads, decoding, NMS and mapping
boxes back to the image. Excludes image decoding and the uint8 -> float32
tensor conversion (done once per image before timing).

Stages come from a separate pass with forward hooks on the modules named by
the zoo's spec.stage_scopes, plus wrappers around the detectors' postprocess
methods (which are methods, not modules, so hooks cannot see them). Each
region is timed exclusive of the regions nested inside it; Python glue at the
top level is what remains and is reported as unattributed.
"""
from __future__ import annotations

import os
import time
from collections import defaultdict

TIMED_REGION = ("torch eager model([image]) under inference_mode: transform, backbone, heads, decoding, "
                "NMS, box rescale; excludes image decode and the tensor conversion")

# (object path, method) pairs holding box decoding + NMS in torchvision detectors.
POSTPROCESS_METHODS = (("", "postprocess_detections"), ("roi_heads", "postprocess_detections"),
                       ("transform", "postprocess"))


class Runner:
    timed_region = TIMED_REGION

    def __init__(self, point):
        import torch

        if point.intra_threads > 0:
            torch.set_num_threads(point.intra_threads)
        if point.inter_threads > 0:
            try:
                torch.set_num_interop_threads(point.inter_threads)
            except RuntimeError:
                pass  # already set in this process; a fresh worker never gets here
        try:
            from speedbench.zoo import build_model, get_spec
        except ImportError as exc:
            raise RuntimeError("the eager backend needs speedbench.zoo.build_model, which is not available") from exc
        self.torch = torch
        self.spec = get_spec(point.model)
        self.model = build_model(point.model, weights=point.weights, size=point.size or None,
                                 proposals=point.proposals or None).eval()
        # the model file is the weights file when there is one; the parameters' size is kept apart
        self.param_mib = sum(p.numel() * p.element_size() for p in self.model.parameters()) / 2**20
        weights_file = point.weights[5:] if str(point.weights).startswith("file:") else None
        self.model_file_mib = os.path.getsize(weights_file) / 2**20 if weights_file else float("nan")

    def prepare(self, image):
        from speedbench.data import to_input

        return self.torch.from_numpy(to_input(image))

    def __call__(self, x):
        with self.torch.inference_mode():
            return self.model([x])

    def profile(self, inputs, reps: int, warmup: int = 1) -> dict:
        from torch import nn

        from speedbench.measure.stages import DEFAULT_STAGE_SCOPES

        scopes = dict(self.spec.stage_scopes or DEFAULT_STAGE_SCOPES)
        acc = defaultdict(float)
        stack = []
        perf = time.perf_counter_ns

        def enter(stage):
            stack.append([stage, perf(), 0])

        def leave():
            stage, t0, child = stack.pop()
            dt = perf() - t0
            acc[stage] += dt - child
            if stack:
                stack[-1][2] += dt

        handles, patched = [], []
        for stage, prefixes in scopes.items():
            for prefix in prefixes:
                try:
                    module = self.model.get_submodule(prefix)
                except AttributeError:
                    continue
                if module is self.model:
                    continue
                # containers are iterated, never called: time their members instead
                members = list(module.children()) if isinstance(module, (nn.ModuleList, nn.ModuleDict)) \
                    else [module]
                for member in members:
                    handles.append(member.register_forward_pre_hook(lambda m, a, s=stage: enter(s)))
                    handles.append(member.register_forward_hook(lambda m, a, o: leave()))
        for owner_path, method in POSTPROCESS_METHODS:
            try:
                owner = self.model.get_submodule(owner_path) if owner_path else self.model
            except AttributeError:
                continue
            original = getattr(owner, method, None)
            if original is None:
                continue

            def wrapped(*a, _orig=original, **k):
                enter("postprocess")
                try:
                    return _orig(*a, **k)
                finally:
                    leave()

            setattr(owner, method, wrapped)
            patched.append((owner, method))
        try:
            for i in range(warmup):
                self(inputs[i % len(inputs)])
            acc.clear()
            runs = []
            for i in range(reps):
                t0 = perf()
                self(inputs[i % len(inputs)])
                runs.append((perf() - t0) / 1e6)
        finally:
            for h in handles:
                h.remove()
            for owner, method in patched:
                delattr(owner, method)     # the instance attribute shadowed the class method
        stages = {k: v / 1e6 / reps for k, v in acc.items()}
        profiled = sum(runs) / reps
        stages["unattributed"] = stages.get("unattributed", 0.0) + max(0.0, profiled - sum(stages.values()))
        return {"stages": stages, "profiled_ms": profiled, "run_ms": runs,
                "node_ms": sum(stages.values()), "coverage": sum(stages.values()) / profiled}

    def close(self):
        self.model = None


def load(point) -> Runner:
    return Runner(point)
