"""An upgrade check measured interleaved: the old and the new Python environment in one run.

`speedbench compare --envs OLD_PYTHON NEW_PYTHON PROFILE`. For every point of the profile,
worker invocations alternate between the two environments in a seeded, balanced ABBA order
(sweep/interleave.py), each worker started with its environment's interpreter, so a drift
of the machine hits both sides alike. This module is a scheduler on the one point path
(sweep/pipeline.run_point): it decides the order and the interpreter, and stores each
invocation the moment it finishes; run_point measures and builds the row.

Graphs: by default each environment exports (and scores) its own graph, in a subprocess
started with its own interpreter (sweep/env_graphs.py): an upgrade changes the whole stack,
the exporter included. With same_graph, the old environment's graph file is measured in both
(isolating the runtime); each environment still scores it, so changed detections show.

Both sides write into one run directory: an `env_invocations` table (one row per worker run,
with its samples) and one points row per configuration and environment (`env` "A" / "B", with
`env_python` and `env_fingerprint`), pooled over that side's invocations with the hierarchical
intervals of replicated invocations (measure.invocations); each pooled sample keeps its
invocation index (the pair) in the samples table. (The sweep's own `invocations` table holds
per-process results awaiting their point's row, a different shape; an interleaved run leaves it empty.)
"""
from __future__ import annotations

import dataclasses
import json
import math
import os
import subprocess
import sys
import tempfile
from pathlib import Path

from speedbench.errors import UserError
from speedbench.measure.result import NAN
from speedbench.measure.invocations import Replicated
from speedbench.sweep import run_setup
from speedbench.sweep.env import environment_fingerprint
from speedbench.sweep.interleave import schedule
from speedbench.sweep.interpreters import Interpreter, inspect_pair
from speedbench.sweep.pipeline import GraphStore, PointContext, PointJob, PreparedGraph, run_point
from speedbench.sweep.plan import expand_plan
from speedbench.sweep.profile import load_profile, parse_profile
from speedbench.sweep.progress import Progress
from speedbench.sweep.rundir import PER_IMAGE_DIR, RunDir, now_iso
from speedbench.sweep.runner import same_study

SIDES = ("A", "B")
DEFAULT_PAIRS = 6
GRAPH_MODES = {"own": "each environment exported and scored its own graph",
               "same": "one graph file (exported by A) measured and scored in both environments"}


def run_interleaved(profile_path, old_python: str, new_python: str, out_dir=None, pairs: int = DEFAULT_PAIRS,
                    seed: int = 0, same_graph: bool = False, resume: bool = False, quiet: bool = False,
                    stream=None) -> Path:
    """Measure the profile's points under both interpreters, interleaved; returns the run directory."""
    stream = stream or sys.stderr
    if not isinstance(pairs, int) or pairs < 1:
        raise UserError(f"--pairs: expected an integer >= 1, got {pairs!r}")
    envs = dict(zip(SIDES, inspect_pair(old_python, new_python)))
    profile = load_profile(profile_path)
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
    done = _done_pairs(rd)
    todo = [s for s in order if (s.point_id, s.pair) not in done]
    rd.update_meta(plan_points=len(points), plan_notes=notes)
    for note in notes:
        print(f"note: {note}", file=stream)
    if not todo:
        rd.finish()
        return
    needs_data = any(p.config["backend"] != "synthetic" for p in points)
    dataset = run_setup.prepare_dataset(profile, Path(profile.cache)) if needs_data else None
    progress = Progress(len(todo), quiet=quiet, stream=stream)
    try:
        graphs = _prepare_graphs(rd, profile, points, envs, same_graph, progress, quiet) if needs_data else {}
        images = run_setup.timing_images(dataset, profile.timing_images)
        policy = run_setup.make_policy(profile.repetitions)
        contexts = {s: PointContext(profile=profile, graphs=GraphStore.prepared(profile, graphs.get(s, {})),
                                    images=images, policy=policy, host=profile.host, python=envs[s].python)
                    for s in SIDES}
        for slot in todo:
            planned = by_id[slot.point_id]
            side = dataclasses.replace(planned, point=dataclasses.replace(planned.point, env=slot.side))
            label = f"{planned.label} [{slot.side}] pair {slot.pair + 1}"
            progress.start(label)
            got = run_point(PointJob(side), contexts[slot.side])
            inv = _tag(got.row, envs[slot.side], slot)
            others = rd.env_invocations(point_id=inv["point_id"])
            others = [x for x in others if x["invocation"] != inv["invocation"]]
            pooled, index = _pooled_samples(others, inv, got.samples)
            rd.write_env_invocation(_pooled_row(others, inv, pooled, index), pooled, index, inv, got.samples)
            progress.done(label, got.row)
    finally:
        progress.close()
    rd.finish()


def _done_pairs(rd: RunDir) -> set:
    """(config id, pair) whose two halves are stored; a half-done pair is measured again whole,
    so its two invocations stay adjacent in time."""
    halves: dict = {}
    for inv in rd.env_invocations():
        halves.setdefault((inv.get("config_id"), inv.get("pair")), set()).add(inv.get("env"))
    return {k for k, v in halves.items() if set(SIDES) <= v}


def _tag(row: dict, env: Interpreter, slot) -> dict:
    return {**row, "env": slot.side, "env_python": env.python, "env_fingerprint": env.fingerprint,
            "invocation": slot.pair, "pair": slot.pair, "slot": slot.seq, "config_id": slot.point_id}


def _pooled_samples(others: list[dict], inv: dict, samples) -> tuple[list, list]:
    """All samples of this side's ok invocations (the points row's samples), in invocation order,
    and each sample's invocation index (the samples table's `invocation` column).
    others: the side's other stored invocations of this point."""
    runs = [(x["invocation"], x["samples_ms"]) for x in others if x.get("status") == "ok"]
    if inv.get("status") == "ok":
        runs.append((inv["invocation"], list(samples)))
    runs.sort(key=lambda t: t[0])
    return [ms for _, run in runs for ms in run], [int(k) for k, run in runs for _ in run]


def _pooled_row(others: list[dict], inv: dict, pooled: list, index: list) -> dict:
    """The side's points row: this invocation's row, with latency pooled over its ok invocations.

    invocations: how many succeeded; between_cov: CoV of their medians (the spread between
    worker processes, which pooled samples hide); probe_raw: every invocation's probe record.
    """
    own = ("invocation", "pair", "slot", "samples_ms", "seq")
    ok = [x for x in others if x.get("status") == "ok"] + ([inv] if inv.get("status") == "ok" else [])
    row = {k: v for k, v in (inv if inv.get("status") == "ok" or not ok else ok[-1]).items() if k not in own}
    row["invocations"] = len(ok)
    if not ok:
        return row
    # the same hierarchical intervals over invocations as a replicated sweep row (issue 16)
    row.update(Replicated(pooled, index).summary())
    row["fps"] = 1000.0 / row["lat_p50_ms"] if row["lat_p50_ms"] > 0 else NAN
    probes = [json.loads(x["probe_raw"]) for x in ok if isinstance(x.get("probe_raw"), str) and x["probe_raw"]]
    row["probe_raw"] = json.dumps(probes) if probes else ""
    for phase in ("start", "end"):
        vals = sorted(v for v in (x.get(f"probe_{phase}_ms") for x in ok)
                      if isinstance(v, (int, float)) and math.isfinite(v))
        row[f"probe_{phase}_ms"] = vals[len(vals) // 2] if vals else NAN
    failed = [x for x in others + [inv] if x.get("status") != "ok"]
    row["status"] = "ok"
    row["reason"] = (f"{len(failed)} invocation(s) failed, the last: {failed[-1].get('reason')}" if failed else "")
    return row


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
    from speedbench.sweep.plan import GraphKey

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
