"""`speedbench size RUN [RUN ...] --streams S --fps F`: servers needed per frontier configuration (and host)."""
from __future__ import annotations


def add_parser(subparsers):
    p = subparsers.add_parser(
        "size", help="servers needed for S streams at F frames/s, from measured throughput",
        description="What to buy for S streams at F frames/s: first the cheapest plan that meets the "
                    "target and the most accurate one (configuration, mAP, servers x shape, cost, "
                    "utilisation, expected p99, whether it rests on extrapolation), then a table of the "
                    "frontier configurations of RUN with throughput data (speedbench load), each on its "
                    "cheapest server shape. Figures beyond the measured core count are flagged with the "
                    "assumption used. "
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
    p.add_argument("--all", action="store_true",
                   help="list every server shape of every configuration (default: the frontier "
                        "configurations, each on its cheapest shape that meets the target)")
    p.add_argument("--judge-on-point", action="store_true",
                   help="judge 'meets the p99 target' on the point estimates (default: on the upper bound "
                        "of the p99 interval, at the utilisation the throughput interval's lower bound gives)")
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
                 prices=prices, judge_on_interval=not args.judge_on_point)
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
    target = (f"{int(float(args.streams))} streams x {float(args.fps):g} fps"
              + (f" with p99 <= {float(args.p99_ms):g} ms" if args.p99_ms is not None else ""))
    print(render_text(table, args.p99_ms is not None, args.core_hour_cost is not None, prices is not None,
                      target=target, every_shape=args.all))
    return 0


def render_text(table, with_p99: bool, with_cost: bool, with_prices: bool = False, target: str = "",
                every_shape: bool = False) -> str:
    """The answer (two plans), then the table, then the notes the rows share, each said once."""
    from speedbench.analyse.buy import answer_lines, best_per_configuration

    head = (f"required: {table.attrs['required_fps']:g} frames/s"
            + (f" ({target})" if target else "") + f", planned utilisation <= {table.attrs['headroom']:.0%}")
    lines = [head, *answer_lines(table, with_p99),
             *([table.attrs["judged"]] if with_p99 and table.attrs.get("judged") else []), ""]
    shown = table if every_shape else best_per_configuration(table)
    lines += [_table_text(shown, with_p99, with_cost, with_prices), ""]
    if not every_shape and len(shown) < len(table):
        lines.append(f"Each configuration on its cheapest server shape that meets the target (else its lowest "
                     f"expected p99); --all lists every shape of every configuration ({len(table)} rows).")
    lines += shared_notes(table, with_cost, with_prices)
    return "\n".join(lines)


def _table_text(table, with_p99: bool, with_cost: bool, with_prices: bool) -> str:
    cols = ["label", "map", "per_core_fps", "scaling_eff", "server_cores", "servers", "utilisation",
            "expected_p99_ms", "extrapolated"]
    if with_p99:
        cols += ["p99_ci_hi_ms", "meets_p99"]
    if with_cost:
        cols.append("cost_per_mframe")
    if with_prices:
        cols.append("usd_per_mframe")
    view = table[cols].copy()
    view["map"] = view["map"].map(lambda v: f"{v:.3f}" if _num(v) else "-")
    view["per_core_fps"] = view["per_core_fps"].map(lambda v: f"{v:.3g}" if _num(v) else "-")
    view["scaling_eff"] = view["scaling_eff"].map(lambda v: f"{v:.2f}" if _num(v) else "-")
    view["servers"] = view["servers"].map(lambda v: f"{int(v)}" if _num(v) else "-")
    view["utilisation"] = view["utilisation"].map(lambda v: f"{v:.0%}" if _num(v) else "-")
    beyond = table["p99_beyond_measured"].fillna(False).astype(bool)
    view["expected_p99_ms"] = [f"{v:.1f}" + (" >" if b else "") if _num(v) else "-"
                               for v, b in zip(table["expected_p99_ms"], beyond)]
    view["extrapolated"] = view["extrapolated"].map(lambda v: "yes" if bool(v) else "no")
    if "p99_ci_hi_ms" in view.columns:
        view["p99_ci_hi_ms"] = view["p99_ci_hi_ms"].map(lambda v: f"{v:.1f}" if _num(v) else "-")
    for c in ("cost_per_mframe", "usd_per_mframe"):
        if c in view.columns:
            view[c] = view[c].map(lambda v: f"{v:.3f}" if _num(v) else "-")
    view = view.rename(columns={"per_core_fps": "fps/core", "scaling_eff": "scaling", "p99_ci_hi_ms": "p99 CI hi"})
    return view.to_string(index=False)


def _num(v) -> bool:
    try:
        return v == v and v is not None and float(v) == float(v)
    except (TypeError, ValueError):
        return False


def _labels(table, mask) -> str:
    return ", ".join(dict.fromkeys(table.loc[mask, "label"].astype(str)))


def shared_notes(table, with_cost: bool, with_prices: bool) -> list[str]:
    """Every note the rows share, stated once (naming the configurations it concerns)."""
    from speedbench.analyse.sizing import CONTENDED_CPU_UTIL

    lines = []
    extra = table["extrapolated"].fillna(False).astype(bool)
    if extra.any():
        cores = sorted({int(c) for c in table.loc[extra, "measured_cores"]})
        lines.append(f"extrapolated = yes: throughput is assumed linear in cores beyond the "
                     f"{' / '.join(map(str, cores))} measured cores, at the configuration's measured fps/core "
                     "(at its largest measured K x T, scaling efficiency as shown); memory bandwidth and cache "
                     "contention on larger servers may lower it.")
    if table["p99_beyond_measured"].fillna(False).astype(bool).any():
        lines.append("'>' after an expected p99: the deployed utilisation is beyond the highest one measured, "
                     "so the real p99 is likely higher.")
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
    noisy = pd_num(table["scaling_eff"]) > 1.05
    if noisy.any():
        lines.append(f"note: scaling efficiency above 1 is measurement noise (the K=1 run got less of the host "
                     f"than its share): {_labels(table, noisy)}; rerun on a quiet host before trusting the sizing")
    untrained = table["untrained"].fillna(False).astype(bool)
    if untrained.any():
        lines.append(f"note: untrained weights ({_labels(table, untrained)}): NMS typically sees far more "
                     "candidates than with trained weights, so throughput is not that of the deployed model")
    util = pd_num(table["measured_cpu_util"])
    contended = util < CONTENDED_CPU_UTIL
    if contended.any():
        lo, hi = util[contended].min(), util[contended].max()
        share = f"{lo:.0%}" if round(lo, 2) == round(hi, 2) else f"{lo:.0%}-{hi:.0%}"
        lines.append(f"note: workers got only {share} of their cores' CPU time while measured "
                     f"({_labels(table, contended)}): other load on the host, or idle threads; a dedicated "
                     "server may do better")
    if table["p99_note"].astype(str).str.startswith("closed-loop").any():
        lines.append("note: expected p99 of some rows comes from a closed-loop load test (contention, no "
                     "queueing); camera streams arriving on their own clock add queueing delay near full "
                     "utilisation. `speedbench load RUN --utilisation 0.5,0.7,0.9` measures it with paced arrivals.")
    lines.append("caution: " + table.attrs["caution"])
    excluded = table.attrs.get("excluded")
    if excluded is not None and len(excluded):
        for r in excluded.to_dict("records"):
            lines.append(f"left out: {r['label']}: {r['reason']}")
    return lines


def pd_num(series):
    import pandas as pd

    return pd.to_numeric(series, errors="coerce")
