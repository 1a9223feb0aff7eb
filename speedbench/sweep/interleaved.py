"""An upgrade check measured interleaved: the old and the new Python environment in one run.

`speedbench compare --envs OLD_PYTHON NEW_PYTHON PROFILE`. For every point of the profile,
worker invocations alternate between the two environments in a seeded, balanced ABBA order
(sweep/interleave.py), each worker started with its environment's interpreter, so a drift
of the machine hits both sides alike. This module is a scheduler on the one point path
(sweep/pipeline.run_invocation, one worker process per call, and finish_point): it decides the
order and the interpreter, and stores each invocation the moment it finishes.

Graphs: by default each environment exports (and scores) its own graph, in a subprocess
started with its own interpreter (sweep/env_graphs.py): an upgrade changes the whole stack,
the exporter included. With same_graph, the old environment's graph file is measured in both
(isolating the runtime); each environment still scores it, so changed detections show.

Both sides write into one run directory, in the sweep's store: each worker process is one
run_invocation call whose result goes into the `invocations` table, keyed by its side's point_id
(`env` "A" / "B" is part of the point's identity), with its pair index as invocation index; in
the same transaction the side's points row is rebuilt by the sweep's own finishing step
(pipeline.finish_point: the hierarchical bootstrap over that side's invocations) and written
with every sample tagged with its invocation, plus `env_python` and `env_fingerprint`.

Pairs: each side of a point gets `pairs` worker processes, one per pair (default: the profile's
`invocations`, the processes per point a sweep of the profile would run; 6 when that is 1).
"""
from __future__ import annotations

import dataclasses
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from speedbench.errors import UserError
from speedbench.measure.launch import SETTLE_S
from speedbench.measure.result import PointResult
from speedbench.sweep import steps
from speedbench.sweep.env import environment_fingerprint
from speedbench.sweep.interleave import schedule
from speedbench.sweep.interpreters import Interpreter, inspect_pair
from speedbench.sweep.pipeline import (GraphStore, PointContext, PointJob, PreparedGraph, finish_point,
                                       record_run_facts, run_invocation)
from speedbench.sweep.plan import GraphKey, expand_plan
from speedbench.sweep.profile import load_profile, parse_profile
from speedbench.sweep.progress import Progress
from speedbench.sweep.rundir import DB_FILE, PER_IMAGE_DIR, RunDir, now_iso
from speedbench.sweep.runner import same_study

SIDES = ("A", "B")
DEFAULT_PAIRS = 6
GRAPH_MODES = {"own": "each environment exported and scored its own graph",
               "same": "one graph file (exported by A) measured and scored in both environments"}


def default_pairs(profile) -> int:
    """A/B pairs per point when --pairs is not given: as many worker processes per side as a sweep
    of the profile runs per point (its `invocations`), DEFAULT_PAIRS when that is 1."""
    return profile.invocations if profile.invocations > 1 else DEFAULT_PAIRS


def run_interleaved(profile_path, old_python: str, new_python: str, out_dir=None, pairs: int | None = None,
                    seed: int = 0, same_graph: bool = False, resume: bool = False, quiet: bool = False,
                    stream=None) -> Path:
    """Measure the profile's points under both interpreters, interleaved; returns the run directory.
    pairs: A/B pairs of worker processes per point (None: default_pairs of the profile)."""
    stream = stream or sys.stderr
    if pairs is not None and (not isinstance(pairs, int) or pairs < 1):
        raise UserError(f"--pairs: expected an integer >= 1, got {pairs!r}")
    envs = dict(zip(SIDES, inspect_pair(old_python, new_python)))
    profile = load_profile(profile_path)
    pairs = default_pairs(profile) if pairs is None else pairs
    plan = expand_plan(profile)
    points = [p for p in plan.points if p.config["concurrency"] == 1]
    notes = list(plan.notes)
    if len(points) < len(plan.points):
        notes.append(f"{len(plan.points) - len(points)} throughput point(s) (concurrency > 1) left out: the "
                     "interleaved check times single streams")
    if not points:
        raise UserError(f"{profile.source}: no single-stream point to measure in an interleaved run")
    out = Path(out_dir) if out_dir else Path(str(profile.output_dir()) + "-interleaved")
    ids = [p.point_id for p in points]
    order = schedule(ids, pairs, seed)
    setup = {"envs": {s: envs[s].to_dict() for s in SIDES}, "pairs": pairs, "seed": seed,
             "graph_mode": "same" if same_graph else "own",
             "order": [[s.seq, s.point_id, s.pair, s.side] for s in order]}
    rd = _open(out, profile, setup, resume)
    try:
        _run(rd, profile, points, order, envs, same_graph, notes, quiet, stream)
    finally:
        rd.close()
    return out


def _open(out: Path, profile, setup: dict, resume: bool) -> RunDir:
    if resume:
        rd = RunDir.open(out)
        meta = rd.meta()
        stored = meta.get("interleaved") or {}
        try:
            same_profile = same_study(parse_profile(rd.profile_text(), str(out / "profile.toml")), profile)
        except UserError:
            same_profile = False
        problem = ("it is not an interleaved run" if not stored else
                   "the run was started with a different profile" if not same_profile else
                   next((f"its {k} differ" for k in ("pairs", "seed", "graph_mode") if stored.get(k) != setup[k]),
                        None))
        if problem is None and rd.legacy_env_invocations() is not None:
            problem = (f"it was made by an earlier speedbench (worker runs in the env_invocations table of "
                       f"{out / DB_FILE}); `speedbench compare {out}` still judges it")
        if problem is None:
            fp = {s: (stored.get("envs") or {}).get(s, {}).get("fingerprint") for s in SIDES}
            if fp != {s: setup["envs"][s]["fingerprint"] for s in SIDES}:
                problem = "an environment changed since it started (fingerprints differ)"
        if problem:
            rd.close()
            raise UserError(f"{out}: cannot resume: {problem}; start a new run directory")
        rd.update_meta(resumed=list(meta.get("resumed") or []) + [now_iso()], finished=None)
        return rd
    if out.exists() and any(out.iterdir()):
        raise UserError(f"{out}: exists and is not empty; resume it (--resume) or choose another output directory")
    meta = {"profile_name": profile.name, "host": profile.host, "profile_source": profile.source,
            "env": environment_fingerprint(), "interleaved": setup}
    return RunDir.create(out, profile.text, meta)


def _run(rd: RunDir, profile, points, order, envs, same_graph, notes, quiet, stream) -> None:
    by_id = {p.point_id: p for p in points}
    sides = {(pid, s): _side(planned, s) for pid, planned in by_id.items() for s in SIDES}
    stored = _stored(rd, sides)
    done = {(pid, k) for pid in by_id for k in stored[(pid, "A")] if k in stored[(pid, "B")]}
    todo = [s for s in order if (s.point_id, s.pair) not in done]
    rd.update_meta(plan_points=len(points), plan_notes=notes)
    record_run_facts(rd, points)
    for note in notes:
        print(f"note: {note}", file=stream)
    if not todo:
        rd.finish()
        return
    needs_data = any(p.config["backend"] != "synthetic" for p in points)
    dataset = steps.prepare_dataset(profile, Path(profile.cache)) if needs_data else None
    progress = Progress(len(todo), quiet=quiet, stream=stream)
    try:
        graphs = _prepare_graphs(rd, profile, points, envs, same_graph, progress, quiet) if needs_data else {}
        images, policy = steps.timing_images(dataset, profile.timing_images), steps.make_policy(profile.repetitions)
        # the host's matmul peak once per run (meta.json), shared by both sides' rows
        peaks = steps.host_peak(rd, points, None if quiet else stream)
        contexts = {s: PointContext(profile=profile, graphs=GraphStore.prepared(profile, graphs.get(s, {})),
                                    images=images, policy=policy, host=profile.host, peaks=peaks,
                                    python=envs[s].python)
                    for s in SIDES}
        for n, slot in enumerate(todo):
            if n and SETTLE_S > 0:
                time.sleep(SETTLE_S)    # the pause a sweep leaves between worker processes
            planned, context = sides[(slot.point_id, slot.side)], contexts[slot.side]
            label = f"{by_id[slot.point_id].label} [{slot.side}] pair {slot.pair + 1}"
            progress.start(label)
            got = run_invocation(PointJob(planned), context, slot.pair)     # one worker process
            if isinstance(got, str):     # no worker could run (the graph failed): the pair stays incomplete
                got = PointResult(point=planned.point, status="failed", reason=got)
            got.extra.update(invocation=slot.pair, pair=slot.pair, slot=slot.seq, env=slot.side)
            mine = stored[(slot.point_id, slot.side)]
            mine[slot.pair] = got
            out = finish_point(PointJob(planned), context, [mine[k] for k in sorted(mine)])
            row = {**out.row, "env_python": envs[slot.side].python, "env_fingerprint": envs[slot.side].fingerprint}
            rd.write_point(row, out.samples, out.invocations, invocation_result=(slot.pair, got.to_dict()))
            progress.done(label, row)
    finally:
        progress.close()
    rd.finish()


def _side(planned, side: str):
    """The planned point as measured in environment `side` (its own point_id: env is part of it)."""
    return dataclasses.replace(planned, point=dataclasses.replace(planned.point, env=side))


def _stored(rd: RunDir, sides: dict) -> dict:
    """{(config point_id, side): {pair: PointResult}} of the worker processes already stored (resume).
    A pair with both halves stored is done; a half-done pair is measured again whole (its stored
    half replaced), so its two invocations stay adjacent in time."""
    got = rd.invocation_results()
    return {key: {k: PointResult.from_dict(d) for k, d in got.get(planned.point_id, {}).items()}
            for key, planned in sides.items()}


# ----------------------------------------------------------------- graphs, prepared in each environment
def _prepare_graphs(rd: RunDir, profile, points, envs, same_graph, progress, quiet) -> dict:
    """{side: {GraphKey: PreparedGraph}}, each side's prepared by its own interpreter."""
    keys = []
    for p in points:
        if p.config["backend"] != "synthetic" and p.graph_key not in keys:
            keys.append(p.graph_key)
    out = {}
    for side in SIDES:
        given = None
        if same_graph and side == "B":
            given = {json.dumps(list(k)): {"path": g.path, "facts": g.facts, "ok": g.ok, "reason": g.reason}
                     for k, g in out["A"].items()}
        progress.status(f"graphs in {side}: {envs[side].python}")
        out[side] = _graphs_in(envs[side], rd, profile, keys, side, given, quiet)
    return out


def _graphs_in(env: Interpreter, rd: RunDir, profile, keys, side: str, given, quiet) -> dict:
    with tempfile.TemporaryDirectory(prefix="speedbench-graphs-") as tmp:
        spec = {"profile_text": profile.text, "profile_source": profile.source,
                "keys": [list(k) for k in keys], "exports_dir": str(rd.exports / side),
                "per_image_dir": str(rd.path / PER_IMAGE_DIR), "given": given,
                "result": os.path.join(tmp, "graphs.json")}
        Path(tmp, "spec.json").write_text(json.dumps(spec))
        proc = subprocess.run([env.python, "-m", "speedbench.sweep.env_graphs", os.path.join(tmp, "spec.json")],
                              stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                              stderr=subprocess.DEVNULL if quiet else None)
        result = Path(spec["result"])
        if proc.returncode != 0 or not result.exists():
            reason = f"graphs could not be prepared in {side} ({env.python}): exit status {proc.returncode}"
            return {k: PreparedGraph(ok=False, reason=reason) for k in keys}
        got = json.loads(result.read_text())
    return {GraphKey(*json.loads(k)): PreparedGraph(**v) for k, v in got.items()}
