"""`speedbench demo`: the README's main job, end to end, offline.

Runs profiles/demo.toml (the four compact yard detectors with their trained
demo weights, on generated held-out scenes), then writes the accuracy-latency
frontier plot and the review report next to the run. A second call with the
same output directory resumes the run (measuring only what is missing) and
re-renders the plot and report.
"""
from __future__ import annotations

import sys
from pathlib import Path

from speedbench.demo.sizing import measure_throughput, size_fleet
from speedbench.errors import UserError

# The checkout's copy; speedbench/demo/demo.toml is a symlink to it, which a wheel build
# turns into package data (one file to edit, no second copy to keep in sync).
DEMO_PROFILE = Path(__file__).resolve().parents[2] / "profiles" / "demo.toml"


def demo_profile_path() -> Path:
    """The demo profile: the installed package's demo.toml, else the source checkout's."""
    from importlib import resources

    try:
        shipped = resources.files("speedbench.demo") / "demo.toml"
        if shipped.is_file():
            # A real file on disk for a normal install (wheel or editable); resolve() follows
            # the checkout's symlink, so relative neighbours (profiles/*.toml) stay reachable.
            return Path(str(shipped)).resolve()
    except (ModuleNotFoundError, OSError, TypeError):
        pass
    if not DEMO_PROFILE.is_file():
        raise UserError(f"{DEMO_PROFILE}: demo profile not found (neither installed with speedbench "
                        f"nor in a source checkout)")
    return DEMO_PROFILE


EXAMPLE_BUDGET_MS = 30.0   # the printed pick's latency budget when --budget-ms is not given


def run_demo(out_dir=None, quiet: bool = False, budget_ms: float | None = None, stream=None) -> dict:
    """Run (or resume) the demo sweep, measure throughput of its frontier configurations, size the
    example fleet, then plot and report. Returns the paths written, the points, "throughput"
    (what was measured under load) and "sizing" (the example fleet's table, or None)."""
    from speedbench.sweep import load_profile, load_run
    from speedbench.sweep.runner import run_sweep

    stream = stream or sys.stderr
    profile_path = demo_profile_path()
    profile = load_profile(profile_path)
    out = Path(out_dir) if out_dir else profile.output_dir()
    resume = (out / "meta.json").exists()
    if resume:
        print(f"{out}: continuing the demo run there (only missing points are measured)", file=stream)
    # A rerun also retries points that failed (for example a worker killed from outside).
    run_sweep(profile_path, out_dir=out, resume=resume, quiet=quiet, stream=stream, retry_failed=resume)

    print("throughput of the frontier configurations (K = 1 and 2 workers, short runs):", file=stream)
    throughput = measure_throughput(out, load_run(out), quiet=quiet)
    sizing, error = None, ""
    try:
        sizing = size_fleet(out)
    except UserError as exc:  # e.g. every load point failed: the rest of the demo still stands
        error = str(exc)
    df = load_run(out)
    ok = int((df["status"] == "ok").sum())
    return {"run": out, "points": df, "points_ok": ok, "points_failed": len(df) - ok,
            "throughput": throughput, "sizing": sizing, "sizing_error": error, **render(out, df, budget_ms)}


def family_table(df):
    """Per input size and thread setting: the fastest measured one-stage and two-stage configuration.

    The demo's "one-stage vs two-stage at equal size" view: one row per (size, intra_threads,
    family) with that family's lowest-p50 point, its mAP, and its p50 relative to the
    fastest point of the same size and threads.
    """
    import pandas as pd

    ok = df[(df["status"] == "ok") & df["lat_p50_ms"].notna()]
    if not len(ok):
        return pd.DataFrame(columns=["size", "intra_threads", "family", "model", "proposals", "lat_p50_ms",
                                     "map", "vs_fastest"])
    best = ok.loc[ok.groupby(["size", "intra_threads", "family"])["lat_p50_ms"].idxmin()]
    best = best[["size", "intra_threads", "family", "model", "proposals", "lat_p50_ms", "map"]].copy()
    fastest = best.groupby(["size", "intra_threads"])["lat_p50_ms"].transform("min")
    best["vs_fastest"] = (best["lat_p50_ms"] / fastest).round(2)
    return best.sort_values(["size", "intra_threads", "lat_p50_ms"]).reset_index(drop=True)


def render(out: Path, df, budget_ms: float | None = None) -> dict:
    """Frontier plot + HTML and Markdown reports of a finished run directory."""
    from speedbench.report import plot_frontier, render_reports

    paths = {"frontier": out / "frontier.png"}
    fig = plot_frontier(df, path=paths["frontier"], title="Demo: accuracy vs latency on this CPU")
    del fig
    paths["report_html"], paths["report_md"] = render_reports([out], out / "report.html", out / "report.md",
                                                              budget_ms=budget_ms)
    return paths
