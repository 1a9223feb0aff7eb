"""Host speed probe: a short, fixed piece of work timed at the start and end of every worker.

Two runs measured minutes or days apart cannot tell an upgrade from the machine itself
changing speed (other tenants, frequency scaling, thermal state). The probe is code that
no upgrade of the measured stack touches: the standard library's SHA-256 over a fixed
buffer (integer work on one core) and a copy of a large buffer through a memoryview
(memory bandwidth). If the probe got slower by the same factor as every point, the host
changed, not the software. Standard library only, so it runs identically in any
environment whatever torch, onnxruntime or numpy it holds.
"""
from __future__ import annotations

import hashlib
import time

HASH_MIB = 8          # hashed per round
COPY_MIB = 32         # copied per round (larger than the usual last-level cache)
ROUNDS = 5            # the round times are all kept; the summary is their median
PROBE_VERSION = 1     # changes whenever the work above changes (probe times are only comparable within one)

_BLOCK = bytes(range(256)) * 4096     # 1 MiB, fixed content


def _one_round(src: memoryview, dst: bytearray) -> tuple[float, float]:
    t0 = time.perf_counter_ns()
    h = hashlib.sha256()
    for _ in range(HASH_MIB):
        h.update(_BLOCK)
    h.digest()
    t1 = time.perf_counter_ns()
    memoryview(dst)[:] = src
    t2 = time.perf_counter_ns()
    return (t1 - t0) / 1e6, (t2 - t1) / 1e6


def run_probe(rounds: int = ROUNDS) -> dict:
    """Time `rounds` rounds of the probe; returns the raw round times and their median total (ms)."""
    src = memoryview(_BLOCK * COPY_MIB)
    dst = bytearray(len(src))
    hash_ms, copy_ms = [], []
    for _ in range(rounds):
        h, c = _one_round(src, dst)
        hash_ms.append(round(h, 4))
        copy_ms.append(round(c, 4))
    totals = sorted(h + c for h, c in zip(hash_ms, copy_ms))
    mid = len(totals) // 2
    median = totals[mid] if len(totals) % 2 else (totals[mid - 1] + totals[mid]) / 2
    return {"ms": round(median, 4), "hash_ms": hash_ms, "copy_ms": copy_ms, "version": PROBE_VERSION}
