"""Do the figures survive a rerun? Independent runs of a profile, side by side.

    python benchmarks/bench_rerun.py                              # demo pair + 5 upgrade-check pairs + slowdown
    python benchmarks/bench_rerun.py --profile profiles/demo.toml --pairs 1
    python benchmarks/bench_rerun.py --profile profiles/upgrade-check.toml --pairs 5 [--chained]
    python benchmarks/bench_rerun.py --slowdown-only              # the synthetic 15 % slowdown check
    python benchmarks/bench_rerun.py --cold-demo                  # `speedbench demo` from an empty cache, timed

For each pair of independent runs (`speedbench sweep`, each in a fresh run directory; the
exported graphs are cached after the first run, the latency is measured anew):
  (a) the fraction of points whose 95 % interval of p50 in run 1 contains run 2's p50
      (and the other way round);
  (b) `speedbench compare run1 run2`: exit code and verdict counts (an A/A pair: exit 0 expected);
  (c) the median relative half-width of the p50 intervals, so coverage is never bought with width.
Where the runs recorded the host reference (ONNX Runtime points, measure/reference.py), (a) and
(c) again for p50 in reference units (each invocation's samples divided by its reference time,
the same hierarchical interval), and (b) with `compare --host-adjusted`.
Then, with the synthetic backend and a between-process effect, a pair whose second run is
15 % slower must be called slower (exit 1). Every figure is printed with the wall time and the
host's load average: on a shared or busy host, say so next to the figures.

Goals on a 2-core VM: (a) >= 80 % on the demo profile at a median half-width under 10 %;
(b) exit 0 on at least 4 of 5 A/A pairs of upgrade-check; the injected slowdown called slower;
the cold demo within 10 minutes.
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))   # the tests' profile writer (tests/helpers.py)

from helpers import synthetic_profile  # noqa: E402


def slowdown_profile(work_ms: float) -> str:
    """The synthetic A/A and 15 %-slower sweeps: 3 sizes x 2 thread settings, 5 invocations each."""
    return synthetic_profile("rerun-synthetic", sizes=(160, 224, 320), proposals=(50,), threads=(1, 2), timeout_s=60,
                             repetitions={"invocations": 5, "warmup_min": 2, "warmup_max": 5, "min_reps": 30,
                                          "max_reps": 30, "max_seconds": 2.0},
                             synthetic={"work_ms": work_ms, "jitter": 0.05, "process_cov": 0.02})


def _env() -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    return env


def _speedbench(args, cwd) -> tuple[int, str, float]:
    t0 = time.monotonic()
    got = subprocess.run([sys.executable, "-m", "speedbench", *args], cwd=cwd, env=_env(),
                         capture_output=True, text=True)
    if got.returncode not in (0, 1):
        sys.stderr.write(got.stderr[-3000:])
    return got.returncode, got.stdout, time.monotonic() - t0


def sweep(profile: Path, out: Path, cwd: Path) -> float:
    code, _, wall = _speedbench(["sweep", str(profile), "-o", str(out), "-q"], cwd)
    if code != 0:
        raise SystemExit(f"sweep of {profile} into {out} failed (exit {code})")
    return wall


def rerun_figures(run1: Path, run2: Path) -> dict:
    from speedbench.sweep import load_run

    a, b = load_run(run1), load_run(run2)
    a = a[a.status == "ok"].set_index("point_id")
    b = b[b.status == "ok"].set_index("point_id")
    common = [p for p in a.index if p in b.index]
    a, b = a.loc[common], b.loc[common]

    def holds(x, y):
        return ((x.lat_p50_ci_lo_ms <= y.lat_p50_ms) & (y.lat_p50_ms <= x.lat_p50_ci_hi_ms)).to_numpy()

    half = np.concatenate([((r.lat_p50_ci_hi_ms - r.lat_p50_ci_lo_ms) / 2 / r.lat_p50_ms).to_numpy() for r in (a, b)])
    ratio = (b.lat_p50_ms / a.lat_p50_ms).to_numpy()
    inv = a["invocations"] if "invocations" in a.columns else None
    return {"points": len(common), "holds_1_in_2": float(holds(a, b).mean()) if common else float("nan"),
            "holds_2_in_1": float(holds(b, a).mean()) if common else float("nan"),
            "median_halfwidth": float(np.median(half)) if common else float("nan"),
            "ratio_min": float(ratio.min()) if common else float("nan"),
            "ratio_max": float(ratio.max()) if common else float("nan"),
            "median_abs_log_ratio": float(np.median(np.abs(np.log(ratio)))) if common else float("nan"),
            "invocations": int(np.nanmedian(inv)) if inv is not None and inv.notna().any() else 1,
            "median_between_cov": float(np.nanmedian(a["between_cov"])) if "between_cov" in a.columns
            and a["between_cov"].notna().any() else float("nan")}


def reference_figures(run1: Path, run2: Path) -> dict:
    """(a) and (c) for p50 in reference units: samples / their invocation's host reference time."""
    from speedbench.analyse.hostref import readings
    from speedbench.measure.invocations import Replicated
    from speedbench.sweep import load_run, load_samples

    est = []
    for run in (run1, run2):
        pts, smp = load_run(run), load_samples(run)
        out = {}
        for _, row in pts[pts.status == "ok"].iterrows():
            ref = readings(row.get("host_ref_raw"))
            s = smp[smp.point_id == row.point_id]
            if not ref or not set(s.invocation) <= set(ref):
                continue
            m = Replicated(s.ms.to_numpy() / s.invocation.map(ref).to_numpy(), s.invocation.to_numpy())
            p50, lo, hi = m.percentile(50), *m.ci(50)
            out[row.point_id] = (p50, lo, hi)
        est.append(out)
    common = [p for p in est[0] if p in est[1]]
    if not common:
        return {"ref_points": 0}
    a, b = (np.array([e[p] for p in common]) for e in est)
    holds = ((a[:, 1] <= b[:, 0]) & (b[:, 0] <= a[:, 2])).mean()
    half = np.concatenate([(x[:, 2] - x[:, 1]) / 2 / x[:, 0] for x in (a, b)])
    return {"ref_points": len(common), "ref_holds_1_in_2": float(holds), "ref_median_halfwidth": float(np.median(half))}


def compare_figures(run1: Path, run2: Path, cwd: Path) -> dict:
    code, out, _ = _speedbench(["compare", str(run1), str(run2), "--format", "json"], cwd)
    doc = json.loads(out[out.index("{"):]) if "{" in out else {}
    fig = {"exit": code, "counts": doc.get("counts", {})}
    code, out, _ = _speedbench(["compare", str(run1), str(run2), "--format", "json", "--host-adjusted"], cwd)
    if "{" in out:
        doc = json.loads(out[out.index("{"):])
        verdicts = [p.get("adj_verdict") or "n/a" for p in doc.get("points", [])]
        fig.update(adj_exit=code, adj_counts={v: verdicts.count(v) for v in sorted(set(verdicts))},
                   adj_by=(doc.get("host_speed") or {}).get("reference", {}).get("status"))
    return fig


def pairs(profile: Path, n: int, work: Path, chained: bool = False) -> list[dict]:
    """n A/A pairs: 2n independent runs, or with `chained` n + 1 runs, pair k = (run k, run k + 1)
    (each pair is still two independent runs with nothing changed; neighbouring pairs share a run)."""
    out = []
    walls: dict = {}

    def run(k: int) -> tuple[Path, float]:
        path = work / f"{profile.stem}-{k}"
        if k not in walls:
            walls[k] = sweep(profile, path, work)
        return path, walls[k]

    for k in range(n):
        (r1, w1), (r2, w2) = (run(k), run(k + 1)) if chained else (run(2 * k), run(2 * k + 1))
        fig = {**rerun_figures(r1, r2), **reference_figures(r1, r2), **compare_figures(r1, r2, work),
               "wall_s": (w1, w2), "load": os.getloadavg()[0]}
        out.append(fig)
        print(f"  pair {k + 1}: (a) run-1 interval holds run-2 p50 in {fig['holds_1_in_2']:.0%} of "
              f"{fig['points']} points (2 in 1: {fig['holds_2_in_1']:.0%}); (c) median half-width "
              f"{fig['median_halfwidth']:.1%}; ratio run2/run1 {fig['ratio_min']:.2f}..{fig['ratio_max']:.2f}, "
              f"median |log ratio| {fig['median_abs_log_ratio']:.3f}; R = {fig['invocations']}, median between_cov "
              f"{fig['median_between_cov']:.1%}; (b) compare exit {fig['exit']} {fig['counts']}; "
              f"wall {w1:.0f} s + {w2:.0f} s; load average {fig['load']:.1f}", flush=True)
        if fig.get("ref_points"):
            print(f"    in reference units: (a) {fig['ref_holds_1_in_2']:.0%} of {fig['ref_points']} points; "
                  f"(c) median half-width {fig['ref_median_halfwidth']:.1%}; (b) compare --host-adjusted exit "
                  f"{fig.get('adj_exit')} {fig.get('adj_counts')} (reference {fig.get('adj_by')})", flush=True)
    return out


def slowdown(work: Path) -> dict:
    base, slow = work / "syn-base.toml", work / "syn-slow.toml"
    base.write_text(slowdown_profile(4.0))
    slow.write_text(slowdown_profile(4.0 * 1.15))
    a, b, c = work / "syn-a", work / "syn-b", work / "syn-slow"
    sweep(base, a, work)
    sweep(base, b, work)
    sweep(slow, c, work)
    aa, ab = compare_figures(a, b, work), compare_figures(a, c, work)
    print(f"  synthetic A/A: exit {aa['exit']} {aa['counts']}; 15 % slower: exit {ab['exit']} {ab['counts']}")
    return {"aa": aa, "slow": ab}


def cold_demo(work: Path) -> float:
    cwd = Path(tempfile.mkdtemp(prefix="cold-demo-", dir=work))   # empty: no cache, no runs
    code, _, wall = _speedbench(["demo", "-o", str(cwd / "runs" / "demo"), "-q"], cwd)
    print(f"  cold `speedbench demo`: exit {code}, wall {wall:.0f} s ({wall / 60:.1f} min); "
          f"load average {os.getloadavg()[0]:.1f}")
    return wall


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--profile", action="append", help="profile to rerun (repeatable); default demo (1 pair) "
                                                       "and upgrade-check (--pairs pairs)")
    ap.add_argument("--pairs", type=int, default=5, help="A/A pairs of each profile given (default 5)")
    ap.add_argument("--chained", action="store_true",
                    help="n pairs from n + 1 runs (pair k = runs k and k + 1) instead of 2n runs")
    ap.add_argument("--work", default=None, help="working directory (default: a new temporary one)")
    ap.add_argument("--slowdown-only", action="store_true")
    ap.add_argument("--no-slowdown", action="store_true")
    ap.add_argument("--cold-demo", action="store_true", help="also time `speedbench demo` from an empty cache")
    args = ap.parse_args(argv)
    work = Path(args.work or tempfile.mkdtemp(prefix="bench-rerun-")).resolve()
    work.mkdir(parents=True, exist_ok=True)
    t0 = time.monotonic()
    print(f"bench_rerun: working in {work}; {os.cpu_count()} logical cores; load average "
          f"{os.getloadavg()[0]:.1f} at start")
    if not args.slowdown_only:
        todo = [(Path(p), args.pairs) for p in args.profile] if args.profile else \
            [(ROOT / "profiles" / "demo.toml", 1), (ROOT / "profiles" / "upgrade-check.toml", args.pairs)]
        for profile, n in todo:
            print(f"{profile.name}: {n} pair(s) of independent runs", flush=True)
            figs = pairs(profile.resolve(), n, work, args.chained)
            ok = sum(f["exit"] == 0 for f in figs)
            print(f"  summary {profile.name}: (a) {np.mean([f['holds_1_in_2'] for f in figs]):.0%} mean coverage, "
                  f"(c) {np.median([f['median_halfwidth'] for f in figs]):.1%} median half-width, "
                  f"(b) exit 0 in {ok} of {len(figs)} A/A pairs")
    if not args.no_slowdown:
        print("synthetic backend, between-process effect (process_cov 2 %), R = 5:", flush=True)
        slowdown(work)
    if args.cold_demo:
        cold_demo(work)
    print(f"wall time {time.monotonic() - t0:.0f} s; load average {os.getloadavg()[0]:.1f} at the end")
    return 0


if __name__ == "__main__":
    sys.exit(main())
