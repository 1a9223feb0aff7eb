"""Interleaved upgrade check on this machine: A/A repeats, a second environment, and the wall time.

The figures for the closing note (a quiet machine; about an hour with these settings). Run
from the repository root, with speedbench on the path of both interpreters:

    PYTHONPATH=$PWD python benchmarks/bench_interleaved.py --repeats 5 \\
        --other OTHER_VENV/bin/python --out /tmp/bench-interleaved

OTHER_VENV: a second virtual environment with the same speedbench (through PYTHONPATH) and
another stack, e.g. `python -m venv OTHER_VENV && OTHER_VENV/bin/pip install onnxruntime==1.20.1`
plus speedbench's other dependencies. A check that the script works (minutes, not the figures):

    PYTHONPATH=$PWD python benchmarks/bench_interleaved.py --repeats 1 --pairs 2 --seconds 0.3 \\
        --min-reps 10 --other OTHER_VENV/bin/python --out /tmp/bench-interleaved-check

What it runs, on the upgrade-check profile's points (profiles/upgrade-check.toml; --pairs sets
its `invocations` too, so the interleaved and the sequential runs start the same number of
worker processes per side and point):
1. A/A: `speedbench compare --envs PY PY PROFILE` with this interpreter given twice, --repeats
   times (order seeds 0, 1, ...): per repeat the exit status, the verdict counts, the range of
   the ratios and the wall time; then "k of N exit 0" (goal: every one).
2. Two sequential `speedbench sweep` runs of the same profile: the wall time of each and of both,
   against the mean wall time of one interleaved run; and what `speedbench compare` says of them.
3. With --other: `speedbench compare --envs PY OTHER PROFILE` (old = this interpreter, new =
   OTHER), each environment exporting its own graph, then with --same-graph (the runtime alone):
   ratio per point, verdicts, the packages that differ, the exit status and wall time.
A cache warm-up sweep (shortest timing) runs first so that no measured run pays for exports.
The 1-minute load average is printed with every figure: figures from a loaded machine say so.
"""
from __future__ import annotations

import argparse
import json
import math
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def set_key(text: str, key: str, value) -> str:
    """Set `key = value` in the profile's [repetitions] table (the key exists there)."""
    new, n = re.subn(rf"(?m)^{key} *=.*$", f"{key} = {value}", text)
    if not n:
        raise SystemExit(f"profiles/upgrade-check.toml has no '{key}' line")
    return new


def profile_text(pairs=None, seconds=None, min_reps=None, warm=False) -> str:
    text = (ROOT / "profiles" / "upgrade-check.toml").read_text()
    if warm:   # exports and accuracy only: the shortest timing
        pairs, seconds, min_reps = 1, 0.1, 1
    if pairs is not None:
        text = set_key(text, "invocations", pairs)
    if seconds is not None:
        text = set_key(text, "max_seconds", seconds)
    if min_reps is not None:
        text = set_key(set_key(text, "min_reps", min_reps), "warmup_min", min(min_reps, 10))
    return text


def sb(*args, json_out=True) -> tuple[int, dict | str, float]:
    """Run `python -m speedbench ARGS`; (exit status, parsed JSON or stdout, wall seconds)."""
    t0 = time.monotonic()
    cmd = [sys.executable, "-m", "speedbench", *args] + (["--format", "json"] if json_out else [])
    proc = subprocess.run(cmd, capture_output=True, text=True, cwd=ROOT)
    wall = time.monotonic() - t0
    if proc.returncode == 2 or (proc.returncode != 0 and not proc.stdout.strip()):
        print("  " + (proc.stderr.strip().splitlines() or ["(no message)"])[-1], file=sys.stderr)
    if json_out and proc.stdout.strip().startswith("{"):
        try:
            return proc.returncode, json.loads(proc.stdout), wall
        except json.JSONDecodeError:
            pass
    return proc.returncode, proc.stdout, wall


def load() -> str:
    return f"load {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores"


def summary(doc) -> str:
    """Verdict counts and the range of the ratios of a compare JSON document."""
    if not isinstance(doc, dict):
        return "no result"
    counts = Counter(p["verdict"] for p in doc["points"])
    ratios = [p["ratio"] for p in doc["points"] if isinstance(p.get("ratio"), (int, float)) and math.isfinite(p["ratio"])]
    span = f"ratios {min(ratios):.3f}-{max(ratios):.3f}" if ratios else "no ratio"
    return ", ".join(f"{n} {v}" for v, n in counts.most_common()) + f"; {span}"


def per_point(doc) -> str:
    if not isinstance(doc, dict):
        return ""
    lines = []
    for p in sorted(doc["points"], key=lambda p: p["label"]):
        ci = (f" [{p['ci_lo']:.3f}, {p['ci_hi']:.3f}]" if isinstance(p.get("ci_lo"), (int, float))
              and math.isfinite(p["ci_lo"]) else "")
        ratio = f"{p['ratio']:.3f}" if isinstance(p.get("ratio"), (int, float)) else "n/a"
        lines.append(f"    {p['label']}: {ratio}{ci} {p['verdict']} ({p.get('pairs', '?')} pairs)")
    return "\n".join(lines)


def fresh(path: Path) -> Path:
    """This script's own output directory of one run, emptied (runs refuse a non-empty one)."""
    shutil.rmtree(path, ignore_errors=True)
    return path


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--repeats", type=int, default=5, help="A/A interleaved runs (default 5)")
    ap.add_argument("--pairs", type=int, default=None,
                    help="A/B pairs per point = the profile's invocations (default: the profile's)")
    ap.add_argument("--seconds", type=float, default=None,
                    help="max_seconds of timing per worker process (default: the profile's)")
    ap.add_argument("--min-reps", type=int, default=None,
                    help="timed runs at least per worker process (default: the profile's)")
    ap.add_argument("--other", help="interpreter of a second environment (e.g. another onnxruntime)")
    ap.add_argument("--out", default=str(Path(tempfile.gettempdir()) / "bench-interleaved"))
    ap.add_argument("--parts", default="aa,seq,other",
                    help="which parts to run, in this order: aa, seq, other (default: all)")
    args = ap.parse_args()
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    prof, warm = out / "upgrade-check-bench.toml", out / "upgrade-check-warm.toml"
    prof.write_text(profile_text(args.pairs, args.seconds, args.min_reps))
    warm.write_text(profile_text(warm=True))
    pairs = int(re.search(r"(?m)^invocations = (\d+)", prof.read_text()).group(1))
    py = sys.executable
    print(f"profile: upgrade-check points, {pairs} A/B pairs (= invocations) per point, max_seconds "
          f"{args.seconds or 'as profiled'}, min_reps {args.min_reps or 'as profiled'}; {load()}", flush=True)
    code, _, wall = sb("sweep", str(warm), "-o", str(fresh(out / "warm")), "-q", json_out=False)
    print(f"cache warm-up sweep: exit {code}, {wall:.0f} s", flush=True)
    walls = {}
    for part in args.parts.split(","):
        if part == "aa":
            walls["aa"] = aa(args, out, prof, py)
        elif part == "seq":
            walls["seq"] = sequential(out, prof)
        elif part == "other" and args.other:
            for same in (False, True):
                other(args, out, prof, py, same)
        elif part == "other":
            print("other environment: skipped (no --other)")
    if walls.get("aa") and walls.get("seq"):
        print(f"wall time: one interleaved A/A run {walls['aa']:.0f} s (mean of {args.repeats}) vs two sequential "
              f"sweeps {walls['seq']:.0f} s: {walls['aa'] / walls['seq']:.2f}x, the same worker processes per side",
              flush=True)
    return 0


def aa(args, out, prof, py) -> float:
    exits, walls = [], []
    for r in range(args.repeats):
        code, doc, wall = sb("compare", "--envs", py, py, str(prof), "-o", str(fresh(out / f"aa{r}")),
                             "--seed", str(r), "-q")
        exits.append(code)
        walls.append(wall)
        print(f"A/A interleaved repeat {r + 1}/{args.repeats} (seed {r}): exit {code}; {summary(doc)}; "
              f"{wall:.0f} s; {load()}", flush=True)
    print(f"A/A interleaved: {exits.count(0)} of {len(exits)} exit 0", flush=True)
    return sum(walls) / len(walls) if walls else 0.0


def sequential(out, prof) -> float:
    total = 0.0
    for name in ("seq_before", "seq_after"):
        code, _, wall = sb("sweep", str(prof), "-o", str(fresh(out / name)), "-q", json_out=False)
        total += wall
        print(f"sequential sweep {name}: exit {code}, {wall:.0f} s; {load()}", flush=True)
    code, doc, _ = sb("compare", str(out / "seq_before"), str(out / "seq_after"))
    h = (doc.get("host_speed") or {}) if isinstance(doc, dict) else {}
    host = (f"; host probe after/before {h['ratio']:.3f} [{h['ci_lo']:.3f}, {h['ci_hi']:.3f}]"
            if all(isinstance(h.get(k), (int, float)) for k in ("ratio", "ci_lo", "ci_hi")) else "")
    print(f"two sequential sweeps: {total:.0f} s; their compare (A/A): exit {code}; {summary(doc)}{host}",
          flush=True)
    return total


def other(args, out, prof, py, same: bool) -> None:
    extra = ["--same-graph"] if same else []
    code, doc, wall = sb("compare", "--envs", py, args.other, str(prof),
                         "-o", str(fresh(out / ("other-same" if same else "other"))), "-q", *extra)
    mode = "one graph (--same-graph)" if same else "own graphs"
    print(f"old {py} vs new {args.other}, {mode}: exit {code}; {summary(doc)}; {wall:.0f} s; {load()}", flush=True)
    if isinstance(doc, dict):
        print(per_point(doc))
        print("    packages: " + ("; ".join(f"{d['key']}: {d['base']} -> {d['new']}" for d in doc["env_diff"]
                                            if d["key"].startswith("packages")) or "no difference"), flush=True)


if __name__ == "__main__":
    sys.exit(main())
