"""The order of an interleaved A/B run: which environment's worker runs when.

A machine's speed drifts over minutes (other tenants, frequency, heat). Measuring all
of A and then all of B turns that drift into a difference between A and B. Here the two
conditions share the same time window instead (randomised, counterbalanced order, the
standard remedy in experimental design):

- every pair is two adjacent invocations of one point, one per environment;
- pairs come in ABBA-style blocks of two, "AB BA" or "BA AB": within a block each side is
  first once, so a drift that is linear over the block cancels; across a point's blocks,
  each order opens half of them (seeded shuffle; an odd count leaves one block to a coin);
- a round gives every point one pair, the points in a seeded shuffled order, so a slow
  phase of the machine is spread over many configurations.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

BLOCKS = ("ABBA", "BAAB")


@dataclass(frozen=True)
class Slot:
    """One worker invocation in the schedule."""
    seq: int          # position in the whole run
    point_id: str
    pair: int         # pair index within the point (0 .. pairs-1)
    side: str         # "A" or "B"
    block: int        # ABBA block index within the point (pair // 2)


def block_orders(n_blocks: int, rng: np.random.Generator) -> list[str]:
    """n_blocks block orders: "ABBA" and "BAAB" each half of the time (seeded shuffle)."""
    orders = [BLOCKS[i % 2] for i in range(n_blocks - n_blocks % 2)]
    if n_blocks % 2:
        orders.append(BLOCKS[int(rng.integers(2))])
    rng.shuffle(orders)
    return orders


def pair_orders(pairs: int, rng: np.random.Generator) -> list[str]:
    """The order ("AB" / "BA") of each of `pairs` pairs: consecutive halves of balanced blocks."""
    out = []
    for block in block_orders((pairs + 1) // 2, rng):
        out += [block[:2], block[2:]]
    return out[:pairs]


def schedule(point_ids: list[str], pairs: int, seed: int = 0) -> list[Slot]:
    """The whole run's invocation order: `pairs` A/B pairs per point, interleaved in rounds."""
    if pairs < 1:
        raise ValueError("an interleaved run needs at least one A/B pair per point")
    rng = np.random.default_rng([seed, 17])
    orders = {pid: pair_orders(pairs, rng) for pid in point_ids}
    out: list[Slot] = []
    for r in range(pairs):
        for pid in rng.permutation(np.array(point_ids, dtype=object)).tolist():
            for side in orders[pid][r]:
                out.append(Slot(seq=len(out), point_id=pid, pair=r, side=side, block=r // 2))
    return out
