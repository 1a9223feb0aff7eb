"""Harness time of a sweep whose graphs are all exported and scored already (the cache is warm).

Two cases, each a fresh `speedbench sweep` process, timed from launch:

- nothing left to do: `speedbench sweep PROFILE -o RUN --resume` on a finished run (wall time
  of the whole command);
- only measuring left: the same profile into a new run directory; timed until the first
  point's measurement is about to start (the process ends there), so the figure is the
  harness's own start-up: interpreter, imports, plan, dataset check, cached exports and
  accuracy of the first graph.

Run it from the directory that holds the profile's cache (for profiles/demo.toml:
`.speedbench-cache` in the current directory), after one full sweep:

    speedbench sweep profiles/demo.toml -o runs/demo
    python benchmarks/bench_sweep_startup.py profiles/demo.toml runs/demo [--repeat 3]

--code DIR times another checkout's speedbench the same way, side by side (e.g. the commit
before cached exports stopped importing torch).
"""
from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

# Ends the process when the first point is about to be measured.
_FIRST_POINT = """\
import importlib, os, sys
def _stop(*a, **k):
    sys.stderr.flush()
    os._exit(0)
try:  # the one point path (sweep.pipeline), or an older checkout's sweep.steps.measure
    importlib.import_module("speedbench.sweep.pipeline")._measure = _stop
except (ImportError, AttributeError):
    importlib.import_module("speedbench.sweep.steps").measure = _stop
from speedbench.cli import main
sys.exit(main(sys.argv[1:]))
"""


def timed(argv, code_root: Path) -> float:
    env = dict(os.environ, PYTHONPATH=str(code_root))
    t0 = time.perf_counter()
    subprocess.run(argv, env=env, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return time.perf_counter() - t0


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
            print(f"  {name:13s}: best {min(ts):6.2f} s, median {sorted(ts)[len(ts) // 2]:6.2f} s "
                  f"(of {len(ts)}, wall time from process launch)")
    print(f"host: {os.cpu_count()} logical cores, load average {os.getloadavg()[0]:.1f} at the end")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
