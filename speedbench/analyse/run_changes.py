"""What changed between two runs besides the measurements: environment, thread settings, a busy machine."""
from __future__ import annotations

import pandas as pd

from speedbench.analyse.runs import Run


THREAD_COLUMNS = ("intra_threads", "inter_threads", "exec_mode", "affinity")


def thread_change_notes(bi: pd.DataFrame, ni: pd.DataFrame, unmatched: pd.DataFrame) -> list[str]:
    """Unmatched points that differ only in their thread setting: the profile's threads changed."""
    from speedbench.schema import CONFIG_COLUMNS

    rest = [c for c in CONFIG_COLUMNS if c not in THREAD_COLUMNS]

    def keys(frame, ids):
        cols = [c for c in rest if c in frame.columns]
        return {tuple(str(frame.at[p, c]) for c in cols) for p in ids}

    kb = keys(bi, unmatched.loc[unmatched["side"] == "base only", "point_id"])
    kn = keys(ni, unmatched.loc[unmatched["side"] == "new only", "point_id"])
    both = kb & kn
    if not both:
        return []
    return [f"{len(both)} configuration(s) appear in both runs with different thread settings; they are "
            "listed as unmatched, not compared (verdicts compare equal configurations only)"]


def busy_machine_notes(b: Run, n: Run, new_pts, base_pts) -> list[str]:
    """Say when a run was measured on a busy machine or has noisy points: wide intervals follow."""
    out = []
    pairs = ((b, base_pts), (n, new_pts)) if b.path != n.path or not b.path else ((b, base_pts),)
    for run, pts in pairs:
        env = run.meta.get("env") or {}
        load, cores = env.get("load_avg"), env.get("cores_logical")
        if isinstance(load, (list, tuple)) and load and cores and float(load[0]) > float(cores):
            out.append(f"{run.name}: load average {float(load[0]):.1f} on {cores} logical cores at the start; "
                       "the machine was busy, so intervals are wide and fewer verdicts are reached")
        if "noisy" in pts.columns:
            k = int(pts["noisy"].fillna(False).astype(bool).sum())
            if k:
                out.append(f"{run.name}: {k} point(s) flagged noisy")
    return out


# Readings of the moment rather than of the setup: reported as load notes, not as changes.
VOLATILE_ENV = {"load_avg"}


def env_diff(meta_b: dict, meta_n: dict) -> pd.DataFrame:
    """Flattened environment keys whose values differ (packages, CPU, cores, thread env...)."""
    fb = _flatten({"host": meta_b.get("host"), **(meta_b.get("env") or {})})
    fn = _flatten({"host": meta_n.get("host"), **(meta_n.get("env") or {})})
    rows = [(k, _show(fb.get(k)), _show(fn.get(k))) for k in sorted(set(fb) | set(fn))
            if fb.get(k) != fn.get(k) and k not in VOLATILE_ENV]
    return pd.DataFrame(rows, columns=["key", "base", "new"])


def _flatten(d, prefix=""):
    out = {}
    for k, v in (d or {}).items():
        key = f"{prefix}{k}"
        if isinstance(v, dict):
            out.update(_flatten(v, key + "."))
        elif v is not None and v != "":
            out[key] = v
    return out


def _show(v):
    return "(absent)" if v is None else str(v)
