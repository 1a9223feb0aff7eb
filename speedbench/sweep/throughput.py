"""`speedbench load`'s scheduler: each point at several K (concurrent workers), by pipeline.run_point.

Two sources of points: an existing run's ok single-stream rows (rows go into that run; the K = 1
throughput columns are merged into the stored K = 1 row, keeping its latency statistics), or a
profile's K = 1 points (rows go into a new run directory). Every K runs in fresh worker
processes and is stored the moment it finishes; K = 1 is measured first, as the baseline X(1)
of the others' scaling_eff.
"""
from __future__ import annotations

from pathlib import Path

from speedbench import schema
from speedbench.errors import UserError
from speedbench.sweep import run_setup
from speedbench.sweep.env import environment_fingerprint
from speedbench.sweep.pipeline import (ThroughputSettings, PointJob, make_context, record_run_facts, run_point,
                                      single_stream_fps)
from speedbench.sweep.plan import PlannedPoint, expand_plan
from speedbench.sweep.profile import load_profile, parse_profile
from speedbench.sweep.rundir import PER_IMAGE_DIR, RunDir


def load_into_run(run_dir, ks, seconds=5.0, pin=False, utilisations=(), report=None, only=None,
                  invocations=None) -> dict:
    """Re-measure the ok single-stream points of a run at each K; rows go into the same run.

    report(label, row_or_None, reason): told about each K as it finishes (None: not measured).
    only: point ids to measure (default: every ok single-stream point).
    invocations: R launches of the K workers per K (default: the profile's [repetitions] invocations).
    Returns counts {"ok", "failed"}.
    """
    rd = RunDir.open(run_dir)
    try:
        profile = parse_profile(rd.profile_text(), source=str(Path(run_dir) / "profile.toml"))
        rows = [r for r in rd.rows() if r.get("status") == "ok" and int(r.get("concurrency") or 1) == 1
                and (only is None or r.get("point_id") in only)]
        if not rows:
            raise UserError(f"{run_dir}: no ok single-stream points to measure under load")
        samples = rd.samples()

        def store(row, got_samples, source):
            # K = 1 unpinned is the stored row's own configuration. Match on that, not on a
            # recomputed id: the stored row keeps the id its sweep gave it.
            if int(row["concurrency"]) == 1 and int(row["affinity"] or 0) == int(source.get("affinity") or 0):
                if row["status"] == "ok":      # add the load columns, keep its latency samples
                    # ... with their invocation index: the row's interval and compare's resampling of
                    # invocations rest on it (all 0 would make R processes look like one).
                    kept = samples[samples["point_id"] == source["point_id"]]
                    rd.write_point({**source, **{c: row.get(c) for c in schema.LOAD_COLUMNS}},
                                   kept["ms"].tolist(), kept["invocation"].tolist())
                return  # a failed K = 1 load must not overwrite the measured single-stream row
            rd.write_point(row, got_samples)

        host = rd.meta().get("host") or profile.host
        todo = [(PlannedPoint.from_row(r), r) for r in rows]
        return _measure_all(todo, profile, rd, host, ks, ThroughputSettings(seconds, pin, invocations), utilisations,
                            store, report)
    finally:
        rd.close()


def load_from_profile(profile_path, ks, out_dir=None, seconds=5.0, pin=False, utilisations=(), report=None,
                      invocations=None) -> Path:
    """Measure a profile's points at each K into a new run directory; returns its path."""
    profile = load_profile(profile_path)
    planned = [p for p in expand_plan(profile).points if p.config["concurrency"] == 1]
    if not planned:
        raise UserError(f"{profile_path}: the profile plans no points")
    out = Path(out_dir) if out_dir else Path(str(profile.output_dir()) + "-load")
    meta = {"profile_name": profile.name, "host": profile.host, "profile_source": str(profile_path),
            "env": environment_fingerprint(), "load": {"ks": ks, "seconds": seconds, "pin": pin, "invocations": invocations or profile.invocations}}
    rd = RunDir.create(out, profile.text, meta)
    try:
        _measure_all([(p, None) for p in planned], profile, rd, profile.host, ks,
                     ThroughputSettings(seconds, pin, invocations), utilisations,
                     lambda row, got_samples, source: rd.write_point(row, got_samples), report)
        rd.finish()
    finally:
        rd.close()
    return out


def _measure_all(todo, profile, rd, host, ks, settings, utilisations, store, report) -> dict:
    report = report or (lambda label, row, reason: None)
    ks = sorted({int(k) for k in ks})
    dataset = run_setup.prepare_dataset(profile, Path(profile.cache)) \
        if any(p.config["backend"] != "synthetic" for p, _ in todo) else None
    context = make_context(profile, dataset, rd.exports, host=host, per_image_dir=rd.path / PER_IMAGE_DIR,
                           throughput=settings)
    record_run_facts(rd, [p for p, _ in todo])
    counts = {"ok": 0, "failed": 0}
    for planned, source in todo:
        x1 = None
        for k in ([1] if 1 not in ks else []) + ks:
            job = PointJob(planned.at_concurrency(k), baseline_fps=x1, curve=utilisations if k == ks[-1] else ())
            got = run_point(job, context)
            if not got.measured:   # e.g. K x T above this host's cores, or no graph: say so, go on
                counts["failed"] += 1
                report(planned.label, None, got.row["reason"])
                break
            if k == 1:
                x1 = single_stream_fps(got.row)
            if k in ks:
                store(got.row, got.samples, source)
                counts["ok" if got.row["status"] == "ok" else "failed"] += 1
                report(f"{planned.label} K={k}", got.row, got.row["reason"])
    return counts
