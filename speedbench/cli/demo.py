"""speedbench demo: run the demo study offline and write its frontier plot and report."""
from __future__ import annotations

from speedbench.cli.args import float_in, output_dir


def add_parser(subparsers):
    p = subparsers.add_parser(
        "demo", help="run the demo study (compact trained detectors on generated scenes) and report it",
        description="Generate held-out yard scenes if absent, run profiles/demo.toml with the trained demo "
                    "zoo, measure throughput (K = 1 and 2 workers) of the frontier configurations, then print "
                    "the frontier, a pick for an example latency budget and what to buy for an example camera "
                    "fleet, and write the frontier plot and the review report. Offline; about 9 minutes on 2 "
                    "cores. Run it again to resume an interrupted demo. --check shows the regression gate.")
    p.add_argument("-o", "--output", metavar="RUN_DIR", type=output_dir, help="run directory (default: runs/demo)")
    p.add_argument("--budget-ms", type=float_in(0, 1e6, open_lo=True), default=None,
                   help="latency budget per image for the report's pick (default: the report's own choice)")
    p.add_argument("--dry-run", action="store_true", help="print the demo plan and a time estimate only")
    p.add_argument("-q", "--quiet", action="store_true", help="one plain line per point instead of a progress bar")
    p.add_argument("--check", action="store_true",
                   help="instead: run profiles/upgrade-check.toml twice with nothing changed, then compare the "
                        "two runs and explain what a clean verdict looks like (about 6 minutes "
                        "on 2 cores); "
                        "-o names the parent directory of the two runs (default runs/)")
    p.set_defaults(run=run)


def run(args) -> int:
    from pathlib import Path

    from speedbench.demo.run import demo_profile_path, run_demo
    from speedbench.errors import UserError

    if args.budget_ms is not None and not args.budget_ms > 0:
        raise UserError(f"--budget-ms: must be a positive number of milliseconds, not {args.budget_ms:g}")
    if args.dry_run:
        from speedbench.cli.sweep import format_plan
        from speedbench.sweep import expand_plan, load_profile

        profile = load_profile(demo_profile_path())
        out = Path(args.output) if args.output else profile.output_dir()
        print(format_plan(expand_plan(profile), profile, out, resume=True))
        return 0
    if args.check:
        return _check(args)
    paths = run_demo(args.output, quiet=args.quiet, budget_ms=args.budget_ms)
    df = paths["points"]
    single = df[df["concurrency"].fillna(1).astype(int) == 1]
    _print_tables(single)
    _print_pick(single, args.budget_ms)
    _print_fleet(paths)
    print(f"run directory:    {paths['run']} ({paths['points_ok']} point(s) measured, "
          f"{paths['points_failed']} failed)")
    print(f"frontier plot:    {paths['frontier']}")
    print(f"report (HTML):    {paths['report_html']}")
    print(f"report (Markdown): {paths['report_md']}")
    print(f"in Python:        speedbench.load_run({str(paths['run'])!r})")
    print("regression gate:  speedbench demo --check")
    return 0


def _print_pick(df, budget_ms) -> None:
    from speedbench.analyse import pick
    from speedbench.demo.run import EXAMPLE_BUDGET_MS

    budget = budget_ms or EXAMPLE_BUDGET_MS
    print(f"Pick for an example budget of {budget:g} ms per image (p50; `speedbench pick RUN --budget-ms X`):")
    text = pick(df, budget).to_text().splitlines()
    cut = next((i for i, line in enumerate(text) if line.startswith("Excluded (")), None)
    if cut is not None:  # the demo shows the answer; `speedbench pick` lists every exclusion
        excluded = [line for line in text[cut + 1:] if line.startswith("  ")]
        text = text[:cut] + [f"({len(excluded)} configuration(s) excluded; `speedbench pick` lists them)"] + \
            text[cut + 1 + len(excluded):]
    print("\n".join(text))
    print()


def _print_fleet(paths) -> None:
    from speedbench.demo.sizing import fleet_text

    load = paths["throughput"]
    if load.get("skipped_k"):
        skipped = ", ".join(f"K={k} of {t}-thread points" for t, k in load["skipped_k"])
        print(f"Throughput: {skipped} not measured (needs more than this host's {load['cores']} cores).")
    if paths.get("sizing") is None:
        print(f"Sizing: not available ({paths.get('sizing_error', 'no throughput data')}).\n")
        return
    print(fleet_text(paths["sizing"]))
    print(f"  (full table: speedbench size {paths['run']} --streams 24 --fps 10 --p99-ms 100)\n")


def _check(args) -> int:
    from speedbench.demo.check import CLEAN_VERDICT, run_check

    done = run_check(args.output, quiet=args.quiet)
    print(done["comparison"].to_text())
    print()
    first, second = done["runs"]
    print(f"(the same as: speedbench compare {first} {second}; exit status {done['exit_status']})")
    print()
    print(CLEAN_VERDICT)
    return done["exit_status"]


def _print_tables(df) -> None:
    """The frontier and the fastest point of each family per size, as `speedbench frontier` prints them."""
    import pandas as pd

    from speedbench.analyse import frontier
    from speedbench.cli.frontier import format_table
    from speedbench.demo.run import family_table

    print("Accuracy-latency frontier (p50 ms, mAP on the held-out scenes):")
    print(format_table(frontier(df), "lat_p50_ms"))
    table = family_table(df)
    if len(table):
        print("\nFastest configuration of each family at equal input size and threads:")
        with pd.option_context("display.width", 120):
            print(table.to_string(index=False, float_format=lambda v: f"{v:.3f}"))
    print()
