"""Cost of storing a point (SQLite transaction + CSV/Parquet regeneration) against the cost
of measuring one, side by side in one run.

Each write is one SQLite transaction; the CSV/Parquet copies, whose cost grows with the
table, are refreshed at a bounded rate. Goal: at 1000 stored points, a write costs on
average < 5 % of measuring the cheapest real point (a synthetic-backend point: worker
start + a few runs, the floor of any real point's time).

    python benchmarks/bench_sweep_store.py [--points 1000]
"""
from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from pathlib import Path


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--points", type=int, default=1000)
    args = ap.parse_args()

    from speedbench import schema
    from speedbench.measure import Point, Policy, measure_point
    from speedbench.sweep import RunDir

    import numpy as np

    # One synthetic point measured the way the sweep measures every point.
    policy = Policy(warmup_min=1, warmup_max=2, min_reps=3, max_reps=5, max_seconds=0.5, profile_stages=False)
    image = np.zeros((64, 64, 3), dtype=np.uint8)
    walls = []
    for _ in range(3):
        t = time.perf_counter()
        measure_point(Point(model="synthetic", backend="synthetic", size=64,
                            options={"work_ms": 1.0, "mode": "sleep"}), [image], policy, 60)
        walls.append(time.perf_counter() - t)
    point_s = statistics.median(walls)

    with tempfile.TemporaryDirectory() as tmp:
        rd = RunDir.create(Path(tmp) / "run", "", {"env": {}})
        row = {c: 1.0 for c in schema.RESULT_COLUMNS}
        row.update(model="m", weights="none", backend="ort", exec_mode="sequential", opt_level="all",
                   status="ok", reason="", host="h", family="one-stage", note="")
        marks = {10, 100, args.points}
        window = []
        for n in range(1, args.points + 1):
            t = time.perf_counter()
            rd.write_point(dict(row, point_id=f"p{n:06d}", size=n), [1.0] * 200)
            window = (window + [time.perf_counter() - t])[-50:]
            if n in marks:
                # mean over the last writes: refreshes of the CSV/Parquet copies are amortised
                dt = statistics.mean(window)
                print(f"write_point with {n:5d} stored (mean of last {len(window)}): {dt * 1000:7.1f} ms "
                      f"= {dt / point_s:6.1%} of one synthetic point ({point_s:.2f} s)")
        rd.close()


if __name__ == "__main__":
    main()
