"""Harness time of a sweep whose graphs are all exported and scored already (the cache is warm).

Two cases, each a fresh `speedbench sweep` process, timed from launch:

- nothing left to do: `speedbench sweep PROFILE -o RUN --resume` on a finished run (wall time
  of the whole command);
- only measuring left: the same profile into a new run directory; timed until the first
  point's first worker is about to start (the process ends there), so the figure is the
  harness's own start-up: interpreter, imports, plan, dataset check, cached exports and
  accuracy of every graph, and the host's matmul peak (measured once per new run, in a
  worker process: in the wall time, not in the harness CPU time).

Both wall time and the harness's CPU time (user + sys of the sweep process itself, up to
the first worker) are printed: on a loaded host the CPU time is the steadier figure.

Run it from the directory that holds the profile's cache (for profiles/demo.toml:
`.speedbench-cache` in the current directory), after one full sweep:

    speedbench sweep profiles/demo.toml -o runs/demo
    python benchmarks/bench_sweep_startup.py profiles/demo.toml runs/demo [--repeat 3]

--code DIR times another checkout's speedbench the same way, side by side (e.g. the commit
before cached exports stopped importing torch).
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

# Ends the process when the first point's first worker is about to start, and reports the
# parent's own CPU time (user + sys) up to there, and its children's (the host's matmul peak
# is measured in a worker process before the first point of a new run).
_FIRST_POINT = """\
import importlib, json, os, resource, sys
def _stop(*a, **k):
    me, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    with open(os.environ["SPEEDBENCH_STARTUP_REPORT"], "w") as fh:
        json.dump({"cpu_s": me.ru_utime + me.ru_stime, "children_cpu_s": kids.ru_utime + kids.ru_stime}, fh)
    sys.stderr.flush()
    os._exit(0)
measure = importlib.import_module("speedbench.measure")
measure.measure_point = measure.measure_load = _stop  # where a point's worker starts
pipeline = importlib.import_module("speedbench.sweep.pipeline")
for name in ("measure_point", "measure_load", "_measure"):  # the names the point path binds (older: _measure)
    if hasattr(pipeline, name):
        setattr(pipeline, name, _stop)
from speedbench.cli import main
sys.exit(main(sys.argv[1:]))
"""


def timed(argv, code_root: Path) -> tuple[float, float]:
    """(wall s from launch, CPU s of the process) of one command; the CPU time is what the
    process reports at the first point if it stops there, else its whole user + sys time."""
    report = Path(tempfile.mkdtemp(prefix="sweep-startup-report-")) / "cpu.json"
    env = dict(os.environ, PYTHONPATH=str(code_root), SPEEDBENCH_STARTUP_REPORT=str(report))
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    subprocess.run(argv, env=env, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    if report.exists():
        cpu = json.loads(report.read_text())["cpu_s"]
    shutil.rmtree(report.parent, ignore_errors=True)
    return wall, cpu


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("profile")
    ap.add_argument("run", help="a finished run directory of that profile")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--code", action="append", default=[], metavar="DIR",
                    help="another checkout's root to time side by side (repeatable)")
    args = ap.parse_args()
    roots = [Path(__file__).resolve().parents[1], *map(Path, args.code)]
    nothing = [sys.executable, "-m", "speedbench", "sweep", args.profile, "-o", args.run, "--resume", "-q"]
    results = {str(r): {"nothing left": [], "first point": []} for r in roots}
    for _ in range(args.repeat):  # interleaved, so every checkout sees the same machine load
        for root in roots:
            results[str(root)]["nothing left"].append(timed(nothing, root))
            fresh = Path(tempfile.mkdtemp(prefix="sweep-startup-")) / "run"
            try:
                first = [sys.executable, "-c", _FIRST_POINT, "sweep", args.profile, "-o", str(fresh), "-q"]
                results[str(root)]["first point"].append(timed(first, root))
            finally:
                shutil.rmtree(fresh.parent, ignore_errors=True)
    for root, cases in results.items():
        print(f"{root}:")
        for name, ts in cases.items():
            walls, cpus = sorted(t[0] for t in ts), sorted(t[1] for t in ts)
            print(f"  {name:13s}: wall best {walls[0]:6.2f} s, median {walls[len(ts) // 2]:6.2f} s; "
                  f"harness CPU (user+sys) best {cpus[0]:5.2f} s, median {cpus[len(ts) // 2]:5.2f} s (of {len(ts)})")
    print(f"host: {os.cpu_count()} logical cores, load average {os.getloadavg()[0]:.1f} at the end")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
