"""Interleaved upgrade check on this machine: A/A repeats, a real runtime change, and the wall time.

    python benchmarks/bench_interleaved.py [--repeats 3] [--pairs 4] [--seconds 1.5]
                                           [--other /path/to/other-venv/bin/python] [--out DIR]
                                           [--parts aa,seq,other,other-same]

Uses the upgrade-check profile's points (profiles/upgrade-check.toml) with shorter timing per
worker invocation (--seconds; an interleaved run spreads its samples over 2 x pairs invocations).
1. A/A: `speedbench compare --envs PY PY PROFILE` with this interpreter given twice, --repeats
   times (different order seeds): the exit status of each (goal: 0 every time) and its ratios.
2. Wall time of one interleaved A/A run vs two sequential `speedbench sweep` runs of the same
   points (one worker per point each), and what `speedbench compare` of those two says,
   with the host speed probe's reading.
3. With --other (for example a venv holding another onnxruntime, with the same speedbench on
   its path): the interleaved run old = this interpreter, new = --other: ratio per point and
   the verdict; also with --same-graph (the runtime alone).
The machine may be shared: the 1-minute load average is printed with every figure.
"""
from __future__ import annotations

import argparse
import json
import os
import re
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def profile_text(seconds: float) -> str:
    text = (ROOT / "profiles" / "upgrade-check.toml").read_text()
    text = re.sub(r"(?m)^max_seconds = .*$", f"max_seconds = {seconds}", text)
    text = re.sub(r"(?m)^min_reps = .*$", "min_reps = 20", text)
    return re.sub(r"(?m)^warmup_min = .*$", "warmup_min = 5", text)


def sb(*args, out_json=True) -> tuple[int, dict | str, float]:
    t0 = time.monotonic()
    cmd = [sys.executable, "-m", "speedbench", *args] + (["--format", "json"] if out_json else [])
    proc = subprocess.run(cmd, capture_output=True, text=True, cwd=ROOT)
    wall = time.monotonic() - t0
    if proc.returncode == 2 or (proc.returncode != 0 and not proc.stdout.strip()):
        print(proc.stderr[-2000:], file=sys.stderr)
    out = proc.stdout
    if out_json and "{" in out:
        try:
            return proc.returncode, json.loads(out[out.index("{"):]), wall
        except json.JSONDecodeError:
            pass
    return proc.returncode, out, wall


def load() -> str:
    return f"load {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores"


def ratios(doc) -> str:
    if not isinstance(doc, dict):
        return "?"
    pts = sorted(doc["points"], key=lambda p: p["label"])
    return "; ".join(f"{p['label']}: {p['ratio']:.3f} [{p['ci_lo']:.3f}, {p['ci_hi']:.3f}] {p['verdict']}"
                     if p.get("ci_lo") is not None else f"{p['label']}: {p['verdict']}" for p in pts)


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--pairs", type=int, default=4)
    ap.add_argument("--seconds", type=float, default=1.5)
    ap.add_argument("--other", help="interpreter of a second environment (e.g. another onnxruntime)")
    ap.add_argument("--out", default="/tmp/bench-interleaved")
    ap.add_argument("--parts", default="aa,seq,other,other-same",
                    help="which parts to run, in this order (a loaded machine may not leave time for all)")
    args = ap.parse_args()
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    prof = out / "upgrade-check-short.toml"
    prof.write_text(profile_text(args.seconds))
    py = sys.executable
    print(f"profile: upgrade-check points, max_seconds {args.seconds} per invocation, {args.pairs} pairs; {load()}",
          flush=True)

    # warm the export and accuracy caches so that no run below pays for them
    if not (out / "warm" / "meta.json").exists():
        code, _, wall = sb("sweep", str(prof), "-o", str(out / "warm"), "-q", out_json=False)
        print(f"cache warm-up sweep: exit {code}, {wall:.0f} s; {load()}", flush=True)
    for part in args.parts.split(","):
        if part == "aa":
            aa(args, out, prof, py)
        elif part == "seq":
            sequential(out, prof)
        elif part in ("other", "other-same") and args.other:
            other(args, out, prof, py, part == "other-same")
    return 0


def aa(args, out, prof, py):
    exits = []
    for r in range(args.repeats):
        run = out / f"aa{r}"
        code, doc, wall = sb("compare", "--envs", py, py, str(prof), "-o", str(run), "--pairs", str(args.pairs),
                             "--seed", str(r), "-q")
        exits.append(code)
        print(f"A/A interleaved repeat {r}: exit {code}, {wall:.0f} s ({2 * args.pairs} invocations per point); "
              f"{load()}\n  {ratios(doc)}", flush=True)
    print(f"A/A interleaved: {exits.count(0)} of {len(exits)} exit 0", flush=True)


def sequential(out, prof):
    seq = []
    for name in ("seq_before", "seq_after"):
        code, _, wall = sb("sweep", str(prof), "-o", str(out / name), "-q", out_json=False)
        seq.append(wall)
        print(f"sequential sweep {name}: exit {code}, {wall:.0f} s (1 invocation per point); {load()}", flush=True)
    code, doc, _ = sb("compare", str(out / "seq_before"), str(out / "seq_after"))
    host = doc.get("host_speed") if isinstance(doc, dict) else None
    print(f"sequential A/A compare: exit {code}; host probe {host}\n  {ratios(doc)}", flush=True)


def other(args, out, prof, py, same):
    extra = ["--same-graph"] if same else []
    run = out / ("other-same" if same else "other")
    code, doc, wall = sb("compare", "--envs", py, args.other, str(prof), "-o", str(run),
                         "--pairs", str(args.pairs), "-q", *extra)
    print(f"old {py} vs new {args.other} {' '.join(extra)}: exit {code}, {wall:.0f} s; {load()}\n"
          f"  {ratios(doc)}", flush=True)
    if isinstance(doc, dict):
        print("  env diff: " + "; ".join(f"{d['key']}: {d['base']} -> {d['new']}" for d in doc["env_diff"]
                                         if d["key"].startswith("packages")))
        print("  notes: " + " | ".join(doc["notes"]), flush=True)


if __name__ == "__main__":
    sys.exit(main())
