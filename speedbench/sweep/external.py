"""External-graph entries on the sweep's one path: no export, the adapter travels with the point.

The graph of an external entry is the user's file itself (linked into the run directory like an
export); its facts are read off the file; its accuracy is evaluated through the adapter at the
point's size and candidate count; its points run on the measure backend "adapted".
"""
from __future__ import annotations

import math
from pathlib import Path


def entry_of(profile, model_id: str):
    """The profile's external ModelEntry with this id, or None (a zoo model)."""
    for entry in profile.models:
        if entry.external and entry.id == model_id:
            return entry
    return None


def bound_adapter(entry, proposals: int):
    """The entry's adapter with the point's candidate count (the proposals axis) applied."""
    ad = entry.adapter
    return ad.with_candidates(proposals) if proposals and ad.host_nms else ad


def graph_facts(entry) -> dict:
    """Row columns for an external graph: parameters and file size (MACs are not counted)."""
    from speedbench.adapt import check_graph

    facts = check_graph(entry.onnx, entry.adapter, classes=entry.classes)
    return {"params": facts.params, "gmacs": math.nan,
            "model_file_mib": round(Path(entry.onnx).stat().st_size / 2**20, 3),
            "adapter_digest": entry.adapter.digest()}


def graph_notes(entry) -> list[str]:
    from speedbench.adapt.stages import FALLBACK_NOTE

    notes = [f"external graph {Path(entry.onnx).name} with adapter {entry.adapter.source}: host pre/postprocessing "
             f"timed in the same call as the graph"]
    if not entry.adapter.stages:
        notes.append(FALLBACK_NOTE)
    return notes


def evaluation_args(entry, size: int, proposals: int) -> dict:
    """Keyword arguments of evaluate_graph / detect_dataset for this entry at one point's knobs."""
    return {"model_classes": list(entry.classes), "adapter": bound_adapter(entry, proposals), "size": int(size)}


def point_fields(entry, proposals: int) -> dict:
    """Extra measure.Point fields for a point of this entry."""
    return {"adapter": bound_adapter(entry, proposals).to_dict()}
