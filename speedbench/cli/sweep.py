"""speedbench sweep PROFILE: measure every point a profile describes, crash-safely."""
from __future__ import annotations

from pathlib import Path

from speedbench.cli.args import cluster_address, output_dir


def add_parser(subparsers):
    p = subparsers.add_parser(
        "sweep", help="run a sweep profile (models x sizes x proposals x threads) into a run directory",
        description="Expand a TOML profile into points, export and evaluate each graph once, measure every "
                    "point in its own worker and store each result as soon as it is measured.")
    p.add_argument("profile", help="profile TOML file (see profiles/)")
    p.add_argument("-o", "--output", metavar="RUN_DIR", type=output_dir, help="run directory (default: the profile's run.output)")
    p.add_argument("--resume", action="store_true",
                   help="continue an interrupted run: measure only the points it does not have yet")
    p.add_argument("--retry-failed", action="store_true",
                   help="with --resume: measure the points stored as failed again as well")
    p.add_argument("--cluster", metavar="ADDRESS", type=cluster_address, help="run on a Dask cluster (tcp://HOST:8786): each point on a worker of its host label, one run directory per host under -o (needs speedbench[fleet])")
    p.add_argument("--hosts", metavar="A,B", help="with --cluster: only these host labels (default: every label the cluster advertises)")
    p.add_argument("--dry-run", action="store_true", help="print the plan and a time estimate; measure nothing")
    p.add_argument("-q", "--quiet", action="store_true", help="one plain line per point instead of a progress bar")
    p.set_defaults(run=run)


def run(args) -> int:
    from speedbench.errors import UserError
    from speedbench.sweep import expand_plan, load_profile

    profile = load_profile(args.profile)
    plan = expand_plan(profile)
    out = Path(args.output) if args.output else profile.output_dir()
    if args.dry_run:
        print(format_plan(plan, profile, out, resume=args.resume))
        return 0
    if args.hosts and not args.cluster:
        raise UserError("--hosts: only together with --cluster")
    if args.cluster:
        from speedbench.fleet import run_fleet_sweep
        outs = run_fleet_sweep(args.profile, args.cluster, out_dir=args.output, resume=args.resume,
                               hosts=args.hosts, quiet=args.quiet, retry_failed=args.retry_failed)
        for label, path in outs.items():
            print(f"{label}: {path}")
        return 0
    from speedbench.sweep.runner import run_sweep

    if args.retry_failed and not args.resume:
        raise UserError("--retry-failed: only together with --resume")
    run_sweep(args.profile, out_dir=out, resume=args.resume, quiet=args.quiet, retry_failed=args.retry_failed)
    from speedbench.sweep import RunDir

    with RunDir.open(out) as rd:  # the stored rows, without the pandas import a table would cost
        status = [r.get("status") for r in rd.rows()]
    ok = status.count("ok")
    print(f"{out}: {len(status)} point(s), {ok} ok, {len(status) - ok} failed; "
          f"load with speedbench.load_run({str(out)!r})")
    return 0


def format_plan(plan, profile, out, resume: bool = False) -> str:
    from speedbench.sweep import RunDir, estimate_seconds

    done, wall = set(), None
    if resume and (Path(out) / "meta.json").exists():
        with RunDir.open(out, readonly=True) as rd:
            done = rd.done_ids()
            walls = sorted(r["wall_s"] for r in rd.rows() if isinstance(r.get("wall_s"), (int, float)))
            wall = walls[len(walls) // 2] if walls else None
    est = estimate_seconds(plan, profile, done, point_wall_s=wall)
    lines = [f"profile {profile.name!r} ({profile.source}) -> {out}",
             f"{len(plan.points)} point(s) over {len(plan.graphs)} distinct graph(s)"
             + (f"; {len(done & {p.point_id for p in plan.points})} already measured" if resume else "")]
    lines.append(f"{'point_id':<12}  {'graph (model/weights/size/proposals/prec)':<44}  backend  intra inter "
                 f"mode        affinity  K  opt")
    for p in plan.points:
        c = p.config
        graph = f"{c['model']}/{c['weights']}/{c['size']}/{c['proposals']}"
        graph += f"/{c['precision']}" if c.get("precision", "fp32") != "fp32" else ""
        mark = " (done)" if p.point_id in done else ""
        lines.append(f"{p.point_id:<12}  {graph:<44}  {c['backend']:<7}  {c['intra_threads']:>5} "
                     f"{c['inter_threads']:>5} {c['exec_mode'] or '-':<11} {c['affinity']:>8} "
                     f"{c['concurrency']:>2}  {c['opt_level'] or '-'}{mark}")
    per_model: dict = {}
    for p in plan.points:
        per_model[p.config["model"]] = per_model.get(p.config["model"], 0) + 1
    lines.append("points per model: " + ", ".join(f"{m} {n}" for m, n in per_model.items()))
    for note in plan.notes:
        lines.append(f"note: {note}")
    lines.append(
        f"estimate (rule of thumb, an upper bound for small models): {_minutes(est['total_s'])} for "
        f"{est['points']} point(s) to measure: {_minutes(est['measure_s'])} measuring, "
        f"{_minutes(est['export_s'])} exporting {est['graphs']} graph(s), "
        f"{_minutes(est['eval_s'])} evaluating accuracy of {est['evaluations']}")
    return "\n".join(lines)


def _minutes(seconds: float) -> str:
    return f"{seconds / 60:.1f} min" if seconds >= 60 else f"{seconds:.0f} s"
