"""Sweeps: profile (TOML) -> plan -> crash-safe run directory, resume, load_run.

Public face:
- RunDir (create / open / write_point / done_ids / finish), load_run, load_samples, load_meta
- environment_fingerprint()
- load_profile(path) / parse_profile(text, source) -> Profile
- expand_plan(profile) -> Plan (points + notes), estimate_seconds(plan)
- run_sweep(profile_path, out_dir=None, resume=False, quiet=False) -> RunDir path
- run_point(job, context): one point from plan to row (sweep.pipeline), the path the local
  sweep, the fleet and `speedbench load` (sweep.throughput) share
"""
from speedbench.sweep.rundir import RunDir, load_meta, load_run, load_samples, rows_to_frame

_LAZY = {
    "environment_fingerprint": "speedbench.sweep.env",
    "Profile": "speedbench.sweep.profile",
    "load_profile": "speedbench.sweep.profile",
    "parse_profile": "speedbench.sweep.profile",
    "Plan": "speedbench.sweep.plan",
    "PlannedPoint": "speedbench.sweep.plan",
    "GraphKey": "speedbench.sweep.plan",
    "run_point": "speedbench.sweep.pipeline",
    "build_row": "speedbench.sweep.pipeline",
    "load_into_run": "speedbench.sweep.throughput",
    "load_from_profile": "speedbench.sweep.throughput",
    "expand_plan": "speedbench.sweep.plan",
    "estimate_seconds": "speedbench.sweep.plan",
    "run_sweep": "speedbench.sweep.runner",
}

__all__ = ["RunDir", "load_run", "load_samples", "load_meta", "rows_to_frame", *_LAZY]


def __getattr__(name):
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(name)
