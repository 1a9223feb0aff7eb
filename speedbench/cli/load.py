"""`speedbench load PROFILE-or-RUN [-k 1,2]`: throughput of K concurrent workers per point.

With a run directory: re-measure that run's ok single-stream points at each K and add the rows
to the run (the K = 1 load figures are merged into the existing K = 1 row, keeping its latency
statistics). With a profile: measure the profile's points at each K into a new run directory.
Each K point runs in fresh worker processes and is stored the moment it finishes.
"""
from __future__ import annotations

import sys
from pathlib import Path

# Columns copied from a run's single-stream row onto its K > 1 rows: they describe the graph,
# not the load (accuracy does not depend on how many copies run).
CARRIED = ("host", "family", "untrained", "params", "gmacs", "model_file_mib", "map", "map50", "map75",
           "map_small", "map_medium", "map_large", "mar_100", "map_ci_lo", "map_ci_hi", "note")


def add_parser(subparsers):
    p = subparsers.add_parser(
        "load", help="throughput under concurrency: K workers per point (frames/s, p99 under load)",
        description="Measure aggregate frames/s, per-request latency under load, scaling efficiency "
                    "and Little's-law concurrency with K concurrent worker processes per point.")
    p.add_argument("target", metavar="PROFILE-or-RUN", help="a profile (.toml) or a run directory")
    p.add_argument("-k", "--concurrency", default="1,2", help="worker counts K, comma-separated (default 1,2)")
    p.add_argument("--seconds", type=float, default=5.0, help="measurement window per K (default 5)")
    p.add_argument("--pin", action="store_true", help="pin each worker to its own T cores")
    p.add_argument("--utilisation", default="0.5,0.7,0.9",
                   help="for the largest K, paced-arrival runs at these fractions of its throughput "
                        "(latency incl. queueing, read by `speedbench size`); 'none' to skip "
                        "(default 0.5,0.7,0.9)")
    p.add_argument("-o", "--out", default=None, help="run directory to create (profile mode)")
    p.add_argument("--quiet", action="store_true", help="no per-point lines")
    p.set_defaults(run=run)


def run(args) -> int:
    from speedbench.errors import UserError

    ks = parse_ks(args.concurrency)
    utils = parse_utilisations(args.utilisation)
    if not args.seconds > 0:
        raise UserError(f"--seconds: must be > 0, got {args.seconds}")
    target = Path(args.target)
    if target.is_dir():
        if args.out:
            raise UserError("-o/--out: only with a profile; a run directory gets its rows in place")
        counts = load_into_run(target, ks, seconds=args.seconds, pin=args.pin, quiet=args.quiet,
                               utilisations=utils)
        out = target
    elif target.suffix == ".toml" or target.is_file():
        out = load_from_profile(target, ks, out_dir=args.out, seconds=args.seconds, pin=args.pin,
                                quiet=args.quiet, utilisations=utils)
        counts = None
    else:
        raise UserError(f"{target}: neither a run directory nor a profile file")
    if counts is not None:
        print(f"{counts['ok']} load point(s) ok, {counts['failed']} failed; rows added to {out}")
    else:
        print(f"wrote {out}")
    return 0


def parse_ks(text) -> list[int]:
    from speedbench.errors import UserError

    ks = []
    for part in str(text).split(","):
        part = part.strip()
        if not part:
            continue
        try:
            k = int(part)
        except ValueError:
            raise UserError(f"-k/--concurrency: {part!r} is not a whole number") from None
        if k < 1:
            raise UserError(f"-k/--concurrency: K must be >= 1, got {k}")
        ks.append(k)
    if not ks:
        raise UserError("-k/--concurrency: give at least one K, e.g. -k 1,2")
    return sorted(set(ks))


def parse_utilisations(text) -> tuple:
    from speedbench.errors import UserError

    if str(text).strip().lower() in ("", "none", "0"):
        return ()
    out = []
    for part in str(text).split(","):
        try:
            u = float(part)
        except ValueError:
            raise UserError(f"--utilisation: {part.strip()!r} is not a number") from None
        if not 0 < u <= 1.5:
            raise UserError(f"--utilisation: each must be in (0, 1.5], got {u:g}")
        out.append(u)
    return tuple(out)


def load_into_run(run_dir, ks, seconds=5.0, pin=False, quiet=False, utilisations=(), only=None) -> dict:
    """Re-measure the ok single-stream points of a run at each K; rows go into the same run.

    only: point ids to measure (default: every ok single-stream point)."""
    from speedbench.errors import UserError
    from speedbench.sweep import RunDir, parse_profile, steps

    rd = RunDir.open(run_dir)
    try:
        profile = parse_profile(rd.profile_text(), source=str(Path(run_dir) / "profile.toml"))
        rows = [r for r in rd.rows() if r.get("status") == "ok" and int(r.get("concurrency") or 1) == 1
                and (only is None or r.get("point_id") in only)]
        if not rows:
            raise UserError(f"{run_dir}: no ok single-stream points to measure under load")
        samples = rd.samples()
        todo = [(_planned(r), r) for r in rows]

        def write(result, source, info):
            # K=1 unpinned is the stored row's own configuration. Match on that, not on a
            # recomputed id: the stored row keeps the id its sweep gave it.
            same = result.k == 1 and result.point.affinity == int(source.get("affinity") or 0)
            if same and result.ok:
                # add the load columns, keep its latency samples
                kept = samples.loc[samples["point_id"] == source["point_id"], "ms"].tolist()
                rd.write_point({**source, **result.load_columns()}, kept)
            elif same:
                return  # a failed K=1 load must not overwrite the measured single-stream row
            else:
                row = {**{c: source[c] for c in CARRIED if c in source}, **result.to_row()}
                rd.write_point(row, result.latencies_ms)

        return _measure_all(todo, profile, rd, ks, seconds, pin, quiet, write, steps, utilisations)
    finally:
        rd.close()


def load_from_profile(profile_path, ks, out_dir=None, seconds=5.0, pin=False, quiet=False,
                      utilisations=()) -> Path:
    """Measure a profile's points at each K into a new run directory; returns its path."""
    from speedbench.errors import UserError
    from speedbench.sweep import RunDir, environment_fingerprint, expand_plan, load_profile, steps

    profile = load_profile(profile_path)
    plan = expand_plan(profile)
    planned = [p for p in plan.points if p.config["concurrency"] == 1]
    if not planned:
        raise UserError(f"{profile_path}: the profile plans no points")
    out = Path(out_dir) if out_dir else Path(str(profile.output_dir()) + "-load")
    meta = {"profile_name": profile.name, "host": profile.host, "profile_source": str(profile_path),
            "env": environment_fingerprint(), "load": {"ks": ks, "seconds": seconds, "pin": pin}}
    rd = RunDir.create(out, profile.text, meta)
    try:
        def write(result, planned_point, info):
            merged = steps.merge_columns(planned_point, info, profile)
            merged["point_id"] = result.point.id  # the load point's own id (concurrency = K)
            rd.write_point({**result.to_row(), **merged}, result.latencies_ms)

        _measure_all([(p, p) for p in planned], profile, rd, ks, seconds, pin, quiet, write, steps, utilisations)
        rd.finish()
    finally:
        rd.close()
    return out


def _measure_all(todo, profile, rd, ks, seconds, pin, quiet, write, steps, utilisations=()) -> dict:
    from speedbench.errors import UserError
    from speedbench.measure import Point
    from speedbench.measure.load import measure_scaling

    needs_data = any(p.config["backend"] != "synthetic" for p, _ in todo)
    cache = Path(profile.cache)
    dataset = steps.prepare_dataset(profile, cache) if needs_data else None
    images = steps.timing_images(dataset, profile.timing_images)
    policy = steps.make_policy(profile.repetitions)
    graphs: dict = {}
    counts = {"ok": 0, "failed": 0}
    for planned, source in todo:
        c = planned.config
        if c["backend"] != "synthetic" and planned.graph_key not in graphs:
            graphs[planned.graph_key] = steps.prepare_graph(planned, profile, dataset, rd, cache, _Quiet())
        info = graphs.get(planned.graph_key, steps.GraphInfo())
        point = Point(**c, graph=info.path,
                      options=dict(profile.synthetic) if c["backend"] == "synthetic" else {})

        def on_result(result, source=source, info=info, label=planned.label):
            write(result, source, info)
            counts["ok" if result.ok else "failed"] += 1
            if not quiet:
                print(f"  {label} K={result.k}: " + (_describe(result) if result.ok else f"failed: {result.reason}"),
                      file=sys.stderr)

        if not info.ok and c["backend"] != "eager":  # eager builds its model without the export
            print(f"  {planned.label}: skipped, {info.reason}", file=sys.stderr)
            counts["failed"] += 1
            continue
        try:
            measure_scaling(point, images, ks=ks, policy=policy, timeout_s=profile.timeout_s,
                            seconds=seconds, pin=pin, on_result=on_result, utilisations=utilisations)
        except UserError as exc:  # e.g. K x T above this host's cores: say so, go on with the rest
            counts["failed"] += 1
            print(f"  {planned.label}: not measured, {exc}", file=sys.stderr)
    return counts


def _describe(r) -> str:
    import json

    s = r.summary
    text = (f"{s['tput_fps']:.2f} frames/s, p99 {s['tput_p99_ms']:.1f} ms under load, "
            f"scaling efficiency {s.get('scaling_eff', float('nan')):.2f}, "
            f"L={s['littles_L']:.2f} (X*W={s['littles_XW']:.2f})")
    for e in json.loads(s.get("load_curve") or "[]"):
        text += (f"\n    paced at {e['load']:.0%} of capacity ({e['offered_fps']:.1f} frames/s): busy "
                 f"{e['util']:.2f}, p99 {e['p99_ms']:.1f} ms" if e["status"] == "ok" else f"\n    paced: {e['status']}")
    return text


def _planned(row: dict):
    """A stored row -> the sweep's PlannedPoint for its configuration (concurrency 1)."""
    from speedbench.schema import CONFIG_COLUMNS
    from speedbench.sweep.plan import PlannedPoint

    config = {c: row.get(c) for c in CONFIG_COLUMNS}
    for c in ("size", "proposals", "intra_threads", "inter_threads", "affinity", "concurrency"):
        config[c] = int(config[c] or 0)
    config["concurrency"] = 1
    for c, ort_default in (("exec_mode", "sequential"), ("opt_level", "all")):
        config[c] = config[c] or (ort_default if config["backend"] == "ort" else "")
    return PlannedPoint(config=config, point_id=row["point_id"], family=row.get("family", ""),
                        graph_key=(config["model"], config["weights"], config["size"], config["proposals"]))


class _Quiet:
    def status(self, text):
        pass
