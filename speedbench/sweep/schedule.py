"""The order a sweep runs its worker processes in: round-robin over the points, shuffled.

Each point is measured in R invocations (fresh worker processes). Running a point's R
invocations back to back would put all of them into the same phase of the machine
(another job starting, a thermal or frequency change) and that phase would then be
mistaken for the configuration's own latency. Instead round r runs the r-th invocation of
every point, in a shuffled order drawn from (seed, r): a slow phase is spread thinly over
many configurations, and it shows up as between-invocation spread, which the
hierarchical bootstrap counts, instead of as a bias of one point.
"""
from __future__ import annotations

import secrets
import time

import numpy as np


def new_seed() -> int:
    """A fresh seed for a new run (recorded in its run directory, reused on resume)."""
    return secrets.randbits(31)


def invocation_order(point_ids, invocations, seed: int, done=None) -> list[tuple[str, int]]:
    """[(point_id, invocation index)] still to run, round by round.

    point_ids: the points in plan order. invocations: R for every point (an int) or
    {point_id: R}. done: {point_id: indices already stored} (resume): those are left out,
    the rest keep the places the full schedule gives them.
    """
    ids = list(point_ids)
    counts = {p: int(invocations[p] if isinstance(invocations, dict) else invocations) for p in ids}
    done = done or {}
    order = []
    for r in range(max(counts.values(), default=0)):
        rng = np.random.default_rng([int(seed), r])
        for k in rng.permutation(len(ids)):
            p = ids[k]
            if r < counts[p] and r not in done.get(p, ()):
                order.append((p, r))
    return order


SECTIONS = ("throughput",)     # schedule.json keys of later passes (the top level is the K = 1 pass)


def planned_order(rd, ids, invocations: int, settle_s: float, complete=(), section: str | None = None):
    """(order still to run, {point_id: {invocation: stored result dict}}) for the points `ids`
    of a run directory, and the schedule recorded in it (schedule.json): the seed of an earlier
    session is reused, so a resumed run keeps the places of its missing invocations.
    complete: ids whose rows are stored (nothing of theirs runs). section: see run_interleaved.
    The local sweep (run_interleaved) and a fleet host (fleet/runner.py) both order by this."""
    complete = set(complete)
    wanted = set(ids)
    stored = {pid: got for pid, got in rd.invocation_results().items() if pid in wanted and pid not in complete}
    whole = rd.schedule() or {}
    previous = (whole.get(section) or {}) if section else whole
    seed = int(previous.get("seed", new_seed()))
    done = {pid: set(got) for pid, got in stored.items()}
    done.update({pid: set(range(invocations)) for pid in complete})
    order = invocation_order(ids, invocations, seed, done)
    if previous.get("seed") == seed and previous.get("invocations") == invocations:
        mine = {**previous, "resumed": int(previous.get("resumed", 0)) + 1}
    else:
        mine = {"seed": seed, "invocations": invocations, "settle_s": settle_s,
                "order": [list(x) for x in invocation_order(ids, invocations, seed)]}
    if section:
        rd.write_schedule({**whole, section: mine})
    else:
        rd.write_schedule({**{k: whole[k] for k in SECTIONS if k in whole}, **mine})
    return order, stored


def result_from_dict(d: dict):
    """A stored invocation (RunDir.invocation_results) as the result object it was."""
    from speedbench.measure.concurrent_result import LoadResult
    from speedbench.measure.result import PointResult

    return LoadResult.from_dict(d) if d.get("kind") == "load" else PointResult.from_dict(d)


def run_interleaved(rd, points, invocations: int, measure, finish, settle_s: float, complete=(),
                    on_start=None, on_invocation=None, on_point=None, section: str | None = None) -> dict:
    """Run the invocations of `points` round-robin; `complete`: ids of points whose rows are
    stored and stay (resume), so nothing of theirs runs. section: None for the plan's K = 1
    points (recorded at the top level of schedule.json), "throughput" for its K > 1 points
    (run after them, recorded under that key); each pass keeps its own seed.

    measure(planned, index) -> PointResult of one worker process, or a str: the point cannot
    be measured at all (its graph failed); it then gets its failed row at once.
    finish(planned, results or reason) -> (row, samples_ms, invocation index per sample).
    Each invocation's result is stored the moment it finishes (rd.write_invocation), the
    point's row once its last invocation is in. Stored invocations are reused (resume):
    only the missing ones run, in the places the run's seeded order gives them. The seed
    and the order are recorded in the run directory (schedule.json).
    Returns counts {"ok": n, "failed": n} of the points written.
    """
    ids = [p.point_id for p in points]
    by_id = {p.point_id: p for p in points}
    complete = set(complete)
    order, stored = planned_order(rd, ids, invocations, settle_s, complete, section)
    results = {pid: [result_from_dict(d) for _, d in sorted(got.items())] for pid, got in stored.items()}
    closed: set = set()
    counts = {"ok": 0, "failed": 0}

    def close(planned, what) -> None:
        row, samples, index = finish(planned, what)
        rd.write_point(row, samples, index)
        closed.add(planned.point_id)
        counts["ok" if row.get("status") == "ok" else "failed"] += 1
        if on_point is not None:
            on_point(planned, row)

    for pid in ids:     # all invocations in, no row yet (killed between the last one and the row)
        if pid not in complete and len(results.get(pid, ())) >= invocations:
            close(by_id[pid], results[pid])
    first = True
    for pid, index in order:
        if pid in closed:
            continue
        planned = by_id[pid]
        if not first and settle_s > 0:
            time.sleep(settle_s)
        first = False
        if on_start is not None:
            on_start(planned, index)
        got = measure(planned, index)
        if isinstance(got, str):
            close(planned, got)
            continue
        rd.write_invocation(pid, index, got.to_dict())
        results.setdefault(pid, []).append(got)
        if on_invocation is not None:
            on_invocation(planned, index, got)
        if len(results[pid]) >= invocations:
            close(planned, results[pid])
    return counts
