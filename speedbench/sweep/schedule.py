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
