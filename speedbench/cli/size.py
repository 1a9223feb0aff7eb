"""`speedbench size RUN [RUN ...] --streams S --fps F`: servers needed per frontier configuration (and host)."""
from __future__ import annotations


def add_parser(subparsers):
    p = subparsers.add_parser(
        "size", help="servers needed for S streams at F frames/s, from measured throughput",
        description="For each frontier configuration of RUN with throughput data (speedbench load): "
                    "required frames/s, cores, servers per shape, utilisation, expected p99 under load "
                    "and cost. Figures beyond the measured core count are flagged with the assumption used. "
                    "With several runs (one per host, or a parent directory of them) every host is sized "
                    "from its own measurements, on its own frontier, and rows name the host.")
    p.add_argument("run_dirs", nargs="+", metavar="RUN",
                   help="run directory with throughput rows; several, or a parent of several "
                        "(a fleet sweep's output), to size each host")
    p.add_argument("--streams", required=True, help="number of camera streams, 1..1000000")
    p.add_argument("--fps", required=True,
                   help="frames per second per stream, 0.001..10000")
    p.add_argument("--p99-ms", default=None,
                   help="p99 latency target per frame (ms), (0, 1e6]")
    p.add_argument("--server-cores", default="8,16,32,64",
                   help="server shapes in cores, each 1..4096 (default 8,16,32,64)")
    p.add_argument("--headroom", default="0.7",
                   help="highest planned utilisation, in (0, 1] (default 0.7)")
    p.add_argument("--core-hour-cost", default=None,
                   help="price of one core for one hour (any currency, same for every host): cost_per_mframe = "
                        "servers x C x price / (required fps x 3600) x 1e6, C = server cores")
    p.add_argument("--price-table", metavar="FILE",
                   help="USD per host-hour for each whole measured host (TOML `[prices] label = 0.34` or CSV "
                        "`host,usd_per_hour`). A host of N logical cores (its run's fingerprint) prices a C-core "
                        "server at usd_per_hour x C / N per hour: usd_per_mframe = servers x C x usd_per_hour / N "
                        "/ (required fps x 3600) x 1e6")
    p.add_argument("--all", action="store_true", help="size every configuration, not only the frontier")
    p.add_argument("--json", action="store_true", help="print the table as JSON records")
    p.set_defaults(run=run)


def run(args) -> int:
    import sys

    from speedbench.analyse import combine, load_prices, load_runs
    from speedbench.analyse.sizing import check_args, size

    shapes = [s.strip() for s in str(args.server_cores).split(",") if s.strip()]
    # every figure checked (ranges: speedbench.analyse.sizing.check_args) before any run is read
    check_args(args.streams, args.fps, args.p99_ms, shapes, args.headroom, args.core_hour_cost)
    prices = load_prices(args.price_table) if args.price_table else None
    data = combine(load_runs(args.run_dirs))
    table = size(data, args.streams, args.fps, p99_ms=args.p99_ms, server_cores=shapes,
                 headroom=args.headroom, core_hour_cost=args.core_hour_cost, use_frontier=not args.all,
                 prices=prices)
    # Warnings go to stderr with --json so the records stay parseable.
    notes = [f"WARNING: {w}" for w in data.warnings()]
    if prices is not None:
        unknown = sorted(set(prices) - set(data.host_names))
        if unknown:
            notes.append(f"note: {args.price_table}: no run for host(s) {', '.join(unknown)}; "
                         f"hosts in these runs: {', '.join(data.host_names)}")
        notes += [f"note: {n}" for n in table.attrs["price_notes"]]
    if args.json:
        for n in notes:
            print(n, file=sys.stderr)
        print(table.to_json(orient="records", indent=1))
        return 0
    for n in notes:
        print(n)
    print(render_text(table, args.p99_ms is not None, args.core_hour_cost is not None, prices is not None))
    return 0


def render_text(table, with_p99: bool, with_cost: bool, with_prices: bool = False) -> str:
    from speedbench.analyse.sizing import CONTENDED_CPU_UTIL

    cols = ["label", "server_cores", "servers", "utilisation", "expected_p99_ms", "extrapolated"]
    if with_p99:
        cols.append("meets_p99")
    if with_cost:
        cols.append("cost_per_mframe")
    if with_prices:
        cols.append("usd_per_mframe")
    view = table[cols].copy()
    view["utilisation"] = view["utilisation"].map(lambda v: f"{v:.0%}" if v == v else "-")
    view["expected_p99_ms"] = view["expected_p99_ms"].map(lambda v: f"{v:.1f}" if v == v else "-")
    for c in ("cost_per_mframe", "usd_per_mframe"):
        if c in view.columns:
            view[c] = view[c].map(lambda v: f"{v:.3f}" if v == v else "-")
    lines = [f"required: {table.attrs['required_fps']:g} frames/s, planned utilisation <= "
             f"{table.attrs['headroom']:.0%}", "", view.to_string(index=False), ""]
    if with_prices:
        for (host, n, usd), g in table.dropna(subset=["usd_per_hour"]).groupby(
                ["host", "priced_host_cores", "usd_per_hour"], sort=False):
            other = sorted({int(c) for c in g["server_cores"] if c != n})
            lines.append(f"price {host}: {usd:g} USD per hour for its {n:g} logical cores = {usd / n:.4g} USD "
                         "per core-hour; usd_per_mframe = servers x server cores x that / (required fps x 3600) "
                         "x 1e6" + (f"; {', '.join(map(str, other))}-core servers are priced pro rata (price "
                                    "assumed linear in cores; check that such a shape of this host type exists "
                                    "at that price)" if other else ""))
    if with_cost:
        lines.append("cost_per_mframe = servers x server cores x --core-hour-cost / (required fps x 3600) x 1e6")
    for label, group in table.groupby("label", sort=False):
        first = group.iloc[0]
        lines.append(f"{label}: {first['per_core_fps']:.3g} fps/core, scaling efficiency "
                     f"{first['scaling_eff']:.2f} at {int(first['measured_cores'])} measured cores")
        if first["scaling_eff"] > 1.05:
            lines.append("  note: scaling efficiency above 1 is measurement noise (the K=1 run got less of "
                         "the host than its share); rerun on a quiet host before trusting the sizing")
        if bool(first.get("untrained", False)):
            lines.append("  note: untrained weights: NMS typically sees far more candidates than with trained weights, "
                         "so throughput is not that of the deployed model")
        util = first.get("measured_cpu_util", float("nan"))
        if util == util and util < CONTENDED_CPU_UTIL:
            lines.append(f"  note: its workers got only {util:.0%} of their cores' CPU time while measured "
                         "(other load on the host, or idle threads): a dedicated server may do better")
        extra = group[group["extrapolated"].astype(bool)]
        for note in dict.fromkeys(extra["assumption"]):
            shapes = ", ".join(str(int(c)) for c in extra.loc[extra["assumption"] == note, "server_cores"])
            lines.append(f"  note ({shapes}-core servers): {note}")
        beyond = group[group["p99_beyond_measured"].astype(bool)]
        if len(beyond):
            lines.append("  note: p99 for " + ", ".join(f"{int(c)}-core" for c in beyond["server_cores"])
                         + " servers is read beyond the highest measured utilisation")
    if table["p99_note"].astype(str).str.startswith("closed-loop").any():
        lines.append("note: expected p99 of some rows comes from a closed-loop load test (contention, no "
                     "queueing); camera streams arriving on their own clock add queueing delay near full "
                     "utilisation. `speedbench load RUN --utilisation 0.5,0.7,0.9` measures it with paced arrivals.")
    lines.append("caution: " + table.attrs["caution"])
    excluded = table.attrs.get("excluded")
    if excluded is not None and len(excluded):
        for r in excluded.to_dict("records"):
            lines.append(f"left out: {r['label']}: {r['reason']}")
    return "\n".join(lines)
