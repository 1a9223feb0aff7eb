"""What runs on a cluster worker: host set-up and one point, by the local sweep's own steps.

A point here goes through exactly the path of a local sweep: the graph is
prepared with speedbench.sweep.steps (export + accuracy, cached on the host)
and steps.measure runs the point in its own fresh worker subprocess. Only the
row and the raw samples travel back to the client, which stores them.

Everything here is imported by the Dask worker process by reference (the
workers need speedbench installed, the same version as the client).
"""
from __future__ import annotations

import os
import re
import time
from pathlib import Path

TOPIC = "speedbench-fleet"          # start events: the client learns which point is in flight
LABEL_PREFIX = "host:"              # a worker advertises resource {"host:<label>": 1}
LABEL_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")

# Per worker process: parsed profiles, datasets and prepared graphs, so a host
# exports and evaluates each distinct graph once per sweep (the disk caches of
# export and accuracy make a later sweep cheap too).
_PROFILES: dict = {}
_DATASETS: dict = {}
_GRAPHS: dict = {}


class _Quiet:
    """Stands in for the sweep's progress display: a worker has no terminal."""

    def status(self, text: str) -> None:
        pass


class _HostExports:
    """Where prepare_graph keeps its copy of a graph on this host (a run directory's exports/)."""

    def __init__(self, path: Path):
        path.mkdir(parents=True, exist_ok=True)
        self.exports = path


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
    from speedbench.sweep.profile import parse_profile

    if (text, source) not in _PROFILES:
        _PROFILES[(text, source)] = parse_profile(text, source)
    return _PROFILES[(text, source)]


def _needs_data(plan) -> bool:
    return any(p.config["backend"] != "synthetic" for p in plan.points)


def _dataset(profile):
    from speedbench.sweep import steps

    key = (profile.dataset_path, profile.scenes_count, profile.scenes_seed, profile.cache)
    if key not in _DATASETS:
        _DATASETS[key] = steps.prepare_dataset(profile, Path(profile.cache))
    return _DATASETS[key]


def host_setup(text: str, source: str, label: str) -> dict:
    """Run once per host before its points: fingerprint, plan and dataset, all taken ON the host.

    The plan is expanded here so that skips that depend on the machine (pins to
    more cores than the host has) follow the host, not the client.
    """
    import speedbench
    from speedbench.errors import UserError
    from speedbench.sweep.env import environment_fingerprint
    from speedbench.sweep.plan import expand_plan

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


def run_point(text: str, source: str, label: str, planned, baseline=None, baseline_fps=None) -> dict:
    """Measure one planned point on this host; always returns {"row", "samples"}.

    baseline: the result of this host's single-stream point of the same
    configuration (a Dask dependency), for the scaling efficiency of K > 1 points.
    """
    from distributed import get_worker

    from speedbench.errors import UserError
    from speedbench.sweep import steps

    worker_label(label)
    worker = get_worker()
    worker.log_event(TOPIC, {"label": label, "point_id": planned.point_id, "key": str(worker.get_current_task()),
                             "pid": os.getpid()})
    profile = _profile(text, source)
    started = time.time()
    notes = []
    busy = other_measurements()
    if busy:
        notes.append(f"{busy} other measurement worker(s) were running on this host when the point started")
    if baseline_fps is None and baseline and baseline["row"].get("status") == "ok":
        baseline_fps = baseline["row"].get("fps")
    needs_data, info = planned.config["backend"] != "synthetic", None
    try:
        dataset = _dataset(profile) if needs_data else None
        images = steps.timing_images(dataset, profile.timing_images)
        policy = steps.make_policy(profile.repetitions)
        info = _graph(planned, profile, dataset, label) if needs_data else steps.GraphInfo()
        index = None
        if planned.config["concurrency"] == 1:
            # [repetitions] invocations: R fresh worker processes, one after the other on this host.
            row, samples, index = steps.invocations_row(planned, info, profile,
                                                        _invocations(planned, info, profile, images, policy))
        else:
            row, samples = steps.measure(planned, info, profile, images, policy, baseline_fps=baseline_fps)
    except UserError as exc:
        row, samples, index = _failed(planned, profile, str(exc)), [], None
    except Exception as exc:  # a harness bug on one point must not cost the others
        row, samples, index = (_failed(planned, profile, f"{type(exc).__name__}: {' '.join(str(exc).split())[:300]}"),
                               [], None)
    finished = time.time()
    if info is not None and info.path:
        row["host_graph"] = info.path   # the graph stays on the host (its export cache)
    row["host"] = label
    row["wall_s"] = round(finished - started, 3)
    row["started_unix"], row["finished_unix"] = round(started, 3), round(finished, 3)
    if notes:
        row["note"] = "; ".join(([row["note"]] if row.get("note") else []) + notes)
    return {"row": row, "samples": [float(x) for x in samples], "invocations": index}


def _invocations(planned, info, profile, images, policy):
    """The point's R invocations (PointResults), or the reason none could run."""
    from speedbench.measure.launch import SETTLE_S
    from speedbench.sweep import steps

    results = []
    for i in range(profile.invocations):
        if i:
            time.sleep(SETTLE_S)
        got = steps.measure_invocation(planned, info, profile, images, policy, i)
        if isinstance(got, str):
            return got
        results.append(got)
    return results


def _graph(planned, profile, dataset, label):
    from speedbench.sweep import steps

    key = (profile.text, planned.graph_key)
    if key not in _GRAPHS:
        cache = Path(profile.cache)
        exports = _HostExports(cache / "fleet" / label / "exports")
        _GRAPHS[key] = steps.prepare_graph(planned, profile, dataset, exports, cache, _Quiet())
    return _GRAPHS[key]


def _failed(planned, profile, reason: str) -> dict:
    from speedbench.sweep import steps

    row = {**planned.config, "point_id": planned.point_id, "status": "failed", "reason": reason}
    row.update(steps.merge_columns(planned, steps.GraphInfo(), profile))
    return row


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
        if any(m in cmd for m in ("speedbench.measure.worker", "speedbench.measure.load")):
            busy += 1
    return busy
