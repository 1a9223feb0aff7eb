"""What runs on a cluster worker: host set-up and one point, by the local sweep's own path.

A point here goes through exactly the path of a local sweep, speedbench.sweep.pipeline.run_point:
the graph is prepared on the host (export + accuracy, cached there) and the point runs in its
own fresh worker subprocess. Only the row and the raw samples travel back to the client, which
stores them.

Everything here is imported by the Dask worker process by reference (the
workers need speedbench installed, the same version as the client).
"""
from __future__ import annotations

import os
import re
import time
from pathlib import Path

import speedbench
from speedbench.errors import UserError
from speedbench.sweep import run_setup
from speedbench.sweep.env import environment_fingerprint
from speedbench.sweep.pipeline import (PointJob, PreparedGraph, build_row, finish_point, make_context,
                                      run_invocation, run_point, single_stream_fps)
from speedbench.sweep.schedule import result_from_dict
from speedbench.sweep.plan import expand_plan
from speedbench.sweep.profile import parse_profile
from speedbench.sweep.rundir import PER_IMAGE_DIR

TOPIC = "speedbench-fleet"          # start events: the client learns which point is in flight
LABEL_PREFIX = "host:"              # a worker advertises resource {"host:<label>": 1}
LABEL_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")

# Per worker process: parsed profiles, datasets and one point context per (profile, host), so
# a host exports and evaluates each distinct graph once per sweep (the disk caches of export
# and accuracy make a later sweep cheap too).
_PROFILES: dict = {}
_DATASETS: dict = {}
_CONTEXTS: dict = {}


def labels_of(resources: dict) -> list[str]:
    return sorted(k[len(LABEL_PREFIX):] for k in resources if str(k).startswith(LABEL_PREFIX))


def worker_label(expected: str) -> str:
    """The host label this worker advertises; it must be the one the client asked for."""
    from distributed import get_worker

    labels = labels_of(get_worker().state.total_resources)
    if labels != [expected]:
        raise RuntimeError(f"worker advertises host label(s) {labels}, expected [{expected!r}]")
    return expected


def _profile(text: str, source: str):
    if (text, source) not in _PROFILES:
        _PROFILES[(text, source)] = parse_profile(text, source)
    return _PROFILES[(text, source)]


def _needs_data(plan) -> bool:
    return any(p.config["backend"] != "synthetic" for p in plan.points)


def _dataset(profile):
    key = (profile.dataset_path, profile.scenes_count, profile.scenes_seed, profile.cache)
    if key not in _DATASETS:
        _DATASETS[key] = run_setup.prepare_dataset(profile, Path(profile.cache))
    return _DATASETS[key]


def host_setup(text: str, source: str, label: str) -> dict:
    """Run once per host before its points: fingerprint, plan and dataset, all taken ON the host.

    The plan is expanded here so that skips that depend on the machine (pins to
    more cores than the host has) follow the host, not the client.
    """
    worker_label(label)
    profile = _profile(text, source)
    out = {"env": environment_fingerprint(), "version": speedbench.__version__,
           "hostname": os.uname().nodename, "plan": None, "error": ""}
    try:
        for i, entry in enumerate(profile.models):
            # A checkpoint is read where the graph is exported: on this host.
            if entry.weights.startswith("file:") and not Path(entry.weights[5:]).is_file():
                raise UserError(f"{profile.source}: models[{i}].weights: {entry.weights[5:]}: "
                                f"checkpoint file not found on this host")
        out["plan"] = expand_plan(profile)
        if _needs_data(out["plan"]):
            _dataset(profile)   # checked before the client creates this host's run directory
    except UserError as exc:
        out["error"] = str(exc)
    return out


def measure_on_host(text: str, source: str, label: str, planned, baseline=None, baseline_fps=None) -> dict:
    """Measure one planned point on this host by pipeline.run_point; returns {"row", "samples"}.

    baseline: the result of this host's single-stream point of the same configuration (a Dask
    dependency) or baseline_fps its X(1), for the scaling efficiency of K > 1 points.
    """
    from distributed import get_worker

    worker_label(label)
    worker = get_worker()
    worker.log_event(TOPIC, {"label": label, "point_id": planned.point_id, "key": str(worker.get_current_task()),
                             "pid": os.getpid()})
    started = time.time()
    busy = other_measurements()
    if baseline_fps is None and baseline is not None:
        baseline_fps = single_stream_fps(baseline["row"])
    try:
        context = _context(_profile(text, source), label, needs_data=planned.config["backend"] != "synthetic")
        got = run_point(PointJob(planned, baseline_fps=baseline_fps), context)
        row, samples, index = got.row, got.samples, got.invocations
        if got.graph.path:
            row["host_graph"] = got.graph.path   # the graph stays on the host (its export cache)
    except UserError as exc:            # the host's dataset cannot be read
        row, samples, index = build_row(planned, PreparedGraph(), label, reason=str(exc)), [], None
    finished = time.time()
    row["wall_s"] = round(finished - started, 3)
    row["started_unix"], row["finished_unix"] = round(started, 3), round(finished, 3)
    if busy:
        row["note"] = "; ".join(([row["note"]] if row.get("note") else [])
                                + [f"{busy} other measurement worker(s) were running on this host when the point "
                                   f"started"])
    # index: the invocation of each sample (the profile's [repetitions] invocations, one after the other)
    return {"row": row, "samples": [float(x) for x in samples], "invocations": index}


def measure_invocation_on_host(text: str, source: str, label: str, planned, index: int) -> dict:
    """Invocation `index` of one point on this host (pipeline.run_invocation), for a host whose
    points' invocations are interleaved (fleet/runner.py orders them by sweep/schedule.py).
    Returns {"result": the result's to_dict()} or {"reason": why nothing could run}."""
    from distributed import get_worker

    worker_label(label)
    worker = get_worker()
    worker.log_event(TOPIC, {"label": label, "point_id": planned.point_id, "invocation": index,
                             "key": str(worker.get_current_task()), "pid": os.getpid()})
    try:
        context = _context(_profile(text, source), label, needs_data=planned.config["backend"] != "synthetic")
        got = run_invocation(PointJob(planned), context, index)
    except UserError as exc:            # the host's dataset cannot be read
        got = str(exc)
    return {"reason": got} if isinstance(got, str) else {"result": got.to_dict()}


def finish_on_host(text: str, source: str, label: str, planned, outcome, baseline=None, baseline_fps=None) -> dict:
    """A point's row from its invocations (stored result dicts, or the reason none could run),
    by pipeline.finish_point on this host (its graph's facts and accuracy, its matmul peak).
    Returns {"row", "samples", "invocations"} as measure_on_host does."""
    worker_label(label)
    if baseline_fps is None and baseline is not None:
        baseline_fps = single_stream_fps(baseline["row"])
    what = outcome if isinstance(outcome, str) else [result_from_dict(d) for d in outcome]
    try:
        context = _context(_profile(text, source), label, needs_data=planned.config["backend"] != "synthetic")
        got = finish_point(PointJob(planned, baseline_fps=baseline_fps), context, what)
        row, samples, index = got.row, got.samples, got.invocations
        if got.graph.path:
            row["host_graph"] = got.graph.path
    except UserError as exc:
        row, samples, index = build_row(planned, PreparedGraph(), label, reason=str(exc)), [], None
    return {"row": row, "samples": [float(x) for x in samples], "invocations": index}


def _context(profile, label: str, needs_data: bool):
    key = (profile.text, profile.source, label, needs_data)
    if key not in _CONTEXTS:
        cache = Path(profile.cache) / "fleet" / label
        _CONTEXTS[key] = make_context(profile, _dataset(profile) if needs_data else None, cache / "exports",
                                      host=label, per_image_dir=cache / PER_IMAGE_DIR)
    return _CONTEXTS[key]


def other_measurements() -> int:
    """How many measurement workers are running on this host besides our own.

    Only counted, never touched: they may belong to another user's sweep. A
    worker whose launcher died ends itself within a second (measure.worker's
    parent watch), so a retried point does not compete with its lost attempt.
    """
    import psutil

    busy = 0
    for proc in psutil.process_iter(["pid", "cmdline"]):
        cmd = proc.info["cmdline"] or []
        if any(m in cmd for m in ("speedbench.measure.worker", "speedbench.measure.concurrent_worker")):
            busy += 1
    return busy
