"""Running a sweep: export each graph once, evaluate it once, measure every point
in its own worker, and store each row the moment it is measured.

Failures never stop the sweep: an export that fails or a point that fails
becomes a row with status "failed" and a reason. A sweep that is killed keeps
every point already written; `resume=True` measures only the missing ones.
"""
from __future__ import annotations

import sys
from pathlib import Path

from speedbench.errors import UserError
from speedbench.sweep import run_setup
from speedbench.sweep.env import environment_fingerprint
from speedbench.measure.launch import SETTLE_S
from speedbench.sweep.pipeline import (PointJob, baselines, finish_point, make_context, record_run_facts,
                                       run_invocation, stream_key)
from speedbench.sweep.plan import Plan, expand_plan
from speedbench.sweep.profile import Profile, load_profile, parse_profile
from speedbench.sweep.progress import Progress
from speedbench.sweep.rundir import PER_IMAGE_DIR, RunDir, now_iso
from speedbench.sweep.schedule import run_interleaved


def run_sweep(profile_path, out_dir=None, resume: bool = False, quiet: bool = False,
              stream=None, retry_failed: bool = False) -> Path:
    """Run (or resume) the sweep described by a profile file; returns the run directory.

    retry_failed (with resume): measure the points stored as failed again too, e.g.
    after a worker was killed from outside; their new rows replace the failed ones.
    """
    profile = load_profile(profile_path)
    plan = expand_plan(profile)
    out = Path(out_dir) if out_dir else profile.output_dir()
    for i, entry in enumerate(profile.models):
        if entry.weights.startswith("file:") and not Path(entry.weights[5:]).is_file():
            raise UserError(f"{profile.source}: models[{i}].weights: {entry.weights[5:]}: checkpoint file not found")
    # Check the dataset before a run directory exists, so a bad path leaves nothing behind.
    needs_data = any(p.config["backend"] != "synthetic" for p in plan.points)
    dataset = run_setup.prepare_dataset(profile, Path(profile.cache)) if needs_data else None
    rd = _open_run(profile, out, resume)
    try:
        run_plan(rd, profile, plan, quiet=quiet, stream=stream, dataset=dataset, retry_failed=retry_failed)
    finally:
        rd.close()
    return out


def same_study(a: Profile, b: Profile, ignore_host: bool = False) -> bool:
    """Equal in everything but formatting, comments and the file's name.

    ignore_host: also ignore run.host (a fleet fills the host in per worker label).
    """
    skip = {"source", "text"} | ({"host"} if ignore_host else set())
    return all(getattr(a, f) == getattr(b, f) for f in a.__dataclass_fields__ if f not in skip)


def _open_run(profile: Profile, out: Path, resume: bool) -> RunDir:
    if resume:
        rd = RunDir.open(out)
        try:
            text = rd.profile_text()   # a missing copy is said as such, not as "a different profile"
        except UserError:
            rd.close()
            raise
        try:
            stored = parse_profile(text, str(out / "profile.toml"))
        except UserError:
            stored = None
        if stored is None or not same_study(stored, profile):
            rd.close()
            raise UserError(f"{out / 'profile.toml'}: the run was started with a different profile than "
                            f"{profile.source}; resume with that file or start a new run directory")
        rd.update_meta(resumed=list(rd.meta().get("resumed") or []) + [now_iso()], finished=None)
        return rd
    if out.exists() and not out.is_dir():
        raise UserError(f"{out}: exists and is not a directory; choose another output directory")
    if out.exists() and any(out.iterdir()) and not (out / "meta.json").exists():
        raise UserError(f"{out}: exists and is not empty; choose another output directory")
    meta = {"profile_name": profile.name, "host": profile.host, "profile_source": profile.source,
            "env": environment_fingerprint()}
    return RunDir.create(out, profile.text, meta)


def run_plan(rd: RunDir, profile: Profile, plan: Plan, quiet: bool = False, stream=None,
             dataset=None, retry_failed: bool = False) -> dict:
    """Measure every point of `plan` not yet in `rd`; returns counts by status."""
    stream = stream or sys.stderr
    done = rd.done_ids() - (rd.failed_ids() if retry_failed else set())
    todo = plan.missing(done)
    counts = {"ok": 0, "failed": 0, "skipped_done": len(plan.points) - len(todo)}
    rd.update_meta(plan_points=len(plan.points), plan_notes=plan.notes)
    record_run_facts(rd, plan.points)
    for note in plan.notes:
        print(f"note: {note}", file=stream)
    orphans = orphaned_workers()
    if orphans and todo:
        # A killed sweep's last worker runs on in its own session until its point is done.
        print(f"note: {orphans} orphaned measurement worker(s) of an interrupted sweep still running on "
              f"this machine; they compete for the cores and may slow the first points (not stopped)",
              file=stream)
    if not todo:
        rd.finish()
        return counts

    if dataset is None and any(p.config["backend"] != "synthetic" for p in todo):
        dataset = run_setup.prepare_dataset(profile, Path(profile.cache))
    reps = profile.invocations
    one_stream = [p for p in plan.points if p.config["concurrency"] == 1]
    throughput = [p for p in todo if p.config["concurrency"] != 1]
    progress = Progress(len(todo), quiet=quiet, stream=stream, steps=reps * len(todo))
    context = make_context(profile, dataset, rd.exports, host=profile.host, per_image_dir=rd.path / PER_IMAGE_DIR,
                           status=progress.status, on_prepared=lambda key, graph: _note_thread_check(rd, key, graph))
    rd.update_meta(invocations=reps)
    if retry_failed:
        for pid in rd.failed_ids():
            rd.clear_invocations(pid)
    # the host's matmul peak at every thread count of the plan, once per run, recorded in meta.json
    context.peaks = run_setup.host_peak(rd, todo, None if quiet else stream)
    try:
        # Exports and accuracy first: nothing heavy runs in this process while a worker measures.
        for planned in todo:
            context.graphs.prepare(planned)
        # One-stream points first: their invocations round-robin over the points in a seeded shuffled
        # order. Then the throughput points, whose scaling baseline is the K = 1 rows just stored: their
        # R invocations (K workers each) round-robin the same way, in a seed of their own.
        for points, section in ((one_stream, None), (throughput, "throughput")):
            x1 = baselines(rd.rows()) if section else {}

            def job(planned, x1=x1):
                return PointJob(planned, baseline_fps=x1.get(stream_key(planned.config)))

            got = run_interleaved(
                rd, points, reps, settle_s=SETTLE_S, complete=done, section=section,
                measure=lambda planned, i: run_invocation(job(planned), context, i),
                finish=lambda planned, what: _stored(finish_point(job(planned), context, what)),
                on_start=lambda planned, i: progress.start(f"{planned.label} #{i + 1}/{reps}"),
                on_invocation=lambda planned, i, result: progress.advance(),
                on_point=lambda planned, row: progress.done(planned.label, row))
            for k in ("ok", "failed"):
                counts[k] += got[k]
    finally:
        progress.close()
    rd.finish()
    return counts


def _stored(outcome) -> tuple:
    """(row, samples, invocation index per sample): what the run directory stores of a point."""
    return outcome.row, outcome.samples, outcome.invocations


def _note_thread_check(rd: RunDir, key: tuple, graph) -> None:
    """meta["thread_invariance"]: per graph, did 1 and 2 intra-op threads detect the same?
    Also what a graph brings to meta.json (int8: quantisation settings and both fingerprints)."""
    if graph.run_meta:
        rd.update_meta(**graph.run_meta)
    acc = graph.accuracy or {}
    if "threads_identical" not in acc:
        return
    checks = dict(rd.meta().get("thread_invariance") or {})
    checks["/".join(str(k) for k in key)] = {"identical": acc["threads_identical"],
                                             "max_box_diff": acc.get("threads_max_box_diff")}
    rd.update_meta(thread_invariance=checks)


def orphaned_workers() -> int:
    """Measurement workers whose parent process is gone (reparented to init or a subreaper)."""
    try:
        import psutil
    except ImportError:
        return 0
    count = 0
    for proc in psutil.process_iter(["cmdline", "ppid"]):
        try:
            cmd = proc.info["cmdline"] or []
            if "speedbench.measure.worker" in cmd and proc.info["ppid"] in (0, 1):
                count += 1
        except (psutil.Error, OSError):
            continue
    return count
