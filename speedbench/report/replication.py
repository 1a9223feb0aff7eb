"""What the report says about replicated invocations: R, the between-invocation spread, what it means."""
from __future__ import annotations

import pandas as pd


def invocations_of(ok: pd.DataFrame) -> pd.Series:
    """R per row; rows of runs made before replication (no column, or NaN) measured one process."""
    if "invocations" not in ok.columns:
        return pd.Series(1.0, index=ok.index)
    return pd.to_numeric(ok["invocations"], errors="coerce").fillna(1.0)


def replication_lines(ok: pd.DataFrame) -> list[str]:
    """Sentences for the report's measurement-quality section."""
    if not len(ok):
        return []
    r = invocations_of(ok)
    lines = []
    if (r <= 1).all():
        return ["Each point was measured in one worker process (R = 1): its latency intervals cover the "
                "run-to-run variation within that process only, not where a rerun in a new process lands. "
                "On a 2-core VM two such runs disagreed far beyond their intervals; measure with "
                "`[repetitions] invocations` of 3 or more before relying on a small difference."]
    lo, hi = int(r.min()), int(r.max())
    lines.append(f"Each point was measured in {lo if lo == hi else f'{lo} to {hi}'} independent worker processes "
                 "(invocations), run round-robin over the points in a shuffled order; latency estimates and "
                 "intervals come from a hierarchical bootstrap over invocations and the runs within them, so they "
                 "include process-to-process variation.")
    single = int((r <= 1).sum())
    if single:
        lines.append(f"{single} point(s) have one successful invocation only: their intervals cover one process.")
    failed = pd.to_numeric(ok.get("invocations_failed"), errors="coerce") if "invocations_failed" in ok.columns \
        else pd.Series(dtype=float)
    if failed.fillna(0).gt(0).any():
        lines.append(f"{int(failed.fillna(0).gt(0).sum())} point(s) lost invocations to failures "
                     "(invocation_errors in the points table says why); their intervals rest on fewer processes.")
    cov = pd.to_numeric(ok.get("between_cov"), errors="coerce") if "between_cov" in ok.columns else pd.Series(dtype=float)
    if cov.notna().any():
        lines.append(f"Between-invocation spread (CoV of the invocation medians): median {cov.median():.1%}, "
                     f"worst {cov.max():.1%}. This is how far the same configuration moves from one process to "
                     "the next on this host; a difference between two configurations smaller than it is not a "
                     "ranking.")
    if "between_dominates" in ok.columns:
        dom = int(ok["between_dominates"].fillna(False).astype(bool).sum())
        if dom:
            lines.append(f"For {dom} point(s) the process-to-process variation is larger than the run-to-run "
                         "variation within a process: more invocations, not longer ones, would narrow their "
                         "intervals.")
    return lines
