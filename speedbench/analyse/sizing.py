"""Server sizing: how many servers of which shape carry S streams at F frames/s.

The inputs are throughput rows written by ``speedbench load`` (speedbench.measure.concurrent_launch):
for a configuration measured with K concurrent workers of T threads each, ``tput_fps`` is
the aggregate frames/s on ``cores_used = K x T`` cores and ``tput_p99_ms`` the per-request
p99 under that load. The per-configuration basis read from them (per-core fps at the largest
measured K x T, X(1), the p99 curves) is the scaling table, speedbench.analyse.scaling; the
USD prices of a sized fleet are worked out in speedbench.analyse.prices (``sizing_prices``,
``fleet_cost``). This module is the model itself.

The model, stated so that nobody mistakes it for a measurement:

- per-core throughput = tput_fps / cores_used at the *largest* measured K x T of the
  configuration. That point carries the most contention (threads, memory bandwidth, caches)
  we saw, so it is the conservative one; the K = 1 figure would overstate a full server.
- up to the measured core count this is measured. Beyond it throughput is assumed to grow
  linearly in cores at that last measured per-core rate (i.e. at the last measured scaling
  efficiency). Every row of a server shape larger than the measured core count says so in
  ``assumption`` and has ``extrapolated=True``.
- a server of C cores runs floor(C / T) workers; servers = ceil(required / (capacity per
  server x headroom)), which is ceil(cores_needed / C) when T divides C.
- expected p99 = the p99 measured at the utilisation nearest to the deployed one. Preferred:
  the paced-arrival curve of the largest K (``load_curve``, speedbench.measure.concurrent_launch.measure_curve):
  frames arrive on a clock at a fraction of capacity, latency counted from arrival, so queueing
  is included; its utilisation is the offered load / closed-loop capacity, the same definition
  as the deployed required / capacity. Without a curve: the
  closed-loop rows (a worker sends its next frame when the last one returns), measured
  utilisation = cores_used / cores of the measuring host; those contain contention but no
  queueing, and as utilisation nears 1 queueing delay adds to them. ``p99_note`` says which.
  Rows beyond the highest measured utilisation are flagged.

Textbook operational laws the output satisfies (checked in tests/test_sizing.py):
utilisation law U = X S (S = 1 / per-core fps core-seconds per frame, X = required fps,
divided by the provisioned cores) and Little's law L = lambda W (``in_flight`` = frames being
processed on average across the fleet).

Several hosts (a combined table with a ``host`` column, or a speedbench.analyse.Combined):
every host is sized from its own measurements only, its frontier is its own (a slower
host's configurations are not dropped for being beaten by a faster host), and rows name
the host. Two prices, kept apart:

- core_hour_cost (any currency, per core-hour, the same for every host):
  cost_per_mframe = servers x C x core_hour_cost / (required fps x 3600) x 1e6.
- prices {host: USD per host-hour} (speedbench.analyse.load_prices): the price of the whole
  measured host of N logical cores (env.cores_logical of its run, else the cores its load test
  could use). A C-core server of that host type is assumed to cost usd_per_hour x C / N per
  hour (price linear in cores), so
  usd_per_mframe = servers x C x usd_per_hour / N / (required fps x 3600) x 1e6.
  This is the cost of the provisioned fleet (headroom included) per frame delivered, so it is
  higher than prices.add_costs' figure for one host running flat out.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd

from speedbench.analyse.frontier import frontier
from speedbench.analyse.prices import fleet_cost, sizing_prices
from speedbench.analyse.scaling import hosts_of, scaling_summary  # noqa: F401 (scaling_summary: also importable here)
from speedbench.errors import UserError

# Rule of thumb (ours): workers that got less than this share of their cores' CPU time were
# competing with other work on the host (or idling threads), so the throughput understates a
# dedicated server and the sizing errs on the side of more servers.
CONTENDED_CPU_UTIL = 0.8

SIZE_COLUMNS = [
    "label", "host", "model", "size", "proposals", "backend", "intra_threads", "map", "frontier_status",
    "required_fps", "per_core_fps", "measured_cores", "scaling_eff", "cores_needed",
    "server_cores", "workers_per_server", "servers", "provisioned_cores", "capacity_fps",
    "utilisation", "in_flight", "expected_p99_ms", "p99_at_util", "p99_beyond_measured",
    "meets_p99", "cost_per_mframe", "usd_per_hour", "priced_host_cores", "usd_per_server_hour",
    "usd_per_mframe", "extrapolated", "assumption", "p99_note", "k1_source",
    "measured_cpu_util", "untrained", "utilisation_hi", "p99_ci_hi_ms", "judged_on",
]


def size(df, streams, fps, p99_ms=None, server_cores=(8, 16, 32, 64), headroom=0.7,
         core_hour_cost=None, use_frontier: bool = True, prices=None, host_cores=None,
         judge_on_interval: bool = True) -> pd.DataFrame:
    """Servers needed for ``streams`` x ``fps`` frames/s, one row per (configuration, host, server shape).

    df: a points table holding throughput rows (tput_fps ...): one run's (speedbench.load_run),
    several hosts' (Combined.points, with a ``host`` column) or a Combined itself.
    use_frontier: size only the configurations on the throughput-vs-accuracy frontier
    (per-core fps maximised, mAP maximised; ties within noise are kept), one frontier per
    host when there are several; False sizes all.
    prices: {host: USD per host-hour} for usd_per_mframe; host_cores: {host: logical cores of
    that host} (taken from a Combined's hosts table when df is one). See the module docstring
    for both cost formulas.
    judge_on_interval: a plan meets the p99 target only if the upper bound of its p99 95 %
    interval does, read at the utilisation the lower bound of the throughput interval gives
    (``utilisation_hi``); rows without recorded intervals fall back to the point estimate and
    ``judged_on`` says so. False: judge on the point estimates.
    Configurations left out and why are in ``result.attrs["excluded"]``; ``attrs["caution"]``
    is the text a report must carry next to these figures; ``attrs["price_notes"]`` says which
    hosts could not be priced and why.
    Columns: see SIZE_COLUMNS; cost_per_mframe is NaN without core_hour_cost, usd_per_mframe
    without a price for the row's host.
    """
    if hasattr(df, "points") and hasattr(df, "hosts"):   # a Combined: its fingerprints give the cores
        known = {str(h.host): h.cores_logical for h in df.hosts.itertuples()}
        host_cores = {**known, **(host_cores or {})}
        df = df.points
    streams, fps, p99_ms, shapes, headroom, core_hour_cost = check_args(
        streams, fps, p99_ms, server_cores, headroom, core_hour_cost)
    required = streams * fps
    configs, excluded = scaling_summary(df)
    hosts = hosts_of(configs)
    if use_frontier:
        configs = _frontier(configs, by_host=len(hosts) > 1)
    if configs.empty:
        raise UserError("size: the frontier is empty (no configuration with throughput data survived)")
    price_of, price_notes = sizing_prices(configs, hosts_of(configs), prices, host_cores)
    rows = []
    for cfg in configs.to_dict("records"):
        for shape in shapes:
            rows.append(_size_one(cfg, shape, required, p99_ms, headroom, core_hour_cost,
                                  price_of.get(cfg.get("host")), judge_on_interval))
    out = pd.DataFrame(rows, columns=SIZE_COLUMNS)
    out.attrs["excluded"] = excluded
    out.attrs["required_fps"] = required
    out.attrs["headroom"] = headroom
    out.attrs["hosts"] = hosts
    out.attrs["price_notes"] = price_notes
    out.attrs["judged"] = JUDGED_INTERVAL if judge_on_interval else JUDGED_POINT
    if len(hosts) > 1:
        out.attrs["caution"] = (
            f"Estimates from {len(hosts)} hosts ({', '.join(hosts)}), each sized from its own measurements "
            "only: a host's figures hold for that machine under the conditions it was measured in (other load, "
            "frequency, neighbours), so differences between hosts are only as good as those conditions were "
            "alike; figures beyond a host's measured core count rest on the stated assumption. A "
            "safety-relevant deployment needs its own validation on the chosen hardware at the planned load.")
    else:
        out.attrs["caution"] = ("Estimates from one host's measurements; figures beyond the measured core count "
                                "rest on the stated assumption. A safety-relevant deployment needs its own "
                                "validation at the planned load.")
    return out


JUDGED_INTERVAL = ("meets p99: judged on the upper bound of the p99 95 % interval (over the worker launches), "
                   "read at the utilisation the lower bound of the throughput interval gives; rows without "
                   "intervals are judged on the point estimate (column judged_on)")
JUDGED_POINT = "meets p99: judged on the point estimates (p99 and throughput), not their intervals"


def _frontier(configs: pd.DataFrame, by_host: bool = False) -> pd.DataFrame:
    """Keep configurations on the (per-core fps, mAP) frontier, ties within noise included.

    by_host: one frontier per host; otherwise a faster host would push every configuration of
    a slower one off the frontier, and that host could not be sized at all.
    """
    if configs.empty:
        return configs
    marked = frontier(configs.drop(columns=["curve", "paced"]), x="per_core_fps", y="map", minimize_x=False,
                      by="host" if by_host else None)
    keep = marked[marked["frontier_status"].isin(["frontier", "tied"])]
    status = dict(zip(keep["point_id"], keep["frontier_status"]))
    out = configs[configs["point_id"].isin(status)].copy()
    out["frontier_status"] = out["point_id"].map(status)
    return out


def _size_one(cfg: dict, shape: int, required: float, p99_ms, headroom: float, cost, host_price=None,
              judge_on_interval: bool = True) -> dict:
    threads = max(int(cfg["intra_threads"] or 1), 1)
    per_core = cfg["per_core_fps"]
    measured_cores = cfg["measured_cores"]
    cores_needed = required / (per_core * headroom)
    workers = shape // threads
    row = {k: cfg.get(k) for k in ("label", "host", "model", "size", "proposals", "backend", "intra_threads",
                                   "map", "frontier_status", "per_core_fps", "measured_cores", "scaling_eff",
                                   "k1_source", "measured_cpu_util", "untrained")}
    row.update(required_fps=required, cores_needed=cores_needed, server_cores=shape,
               workers_per_server=workers, extrapolated=shape > measured_cores)
    if workers == 0:
        row.update(servers=np.nan, provisioned_cores=np.nan, capacity_fps=np.nan, utilisation=np.nan,
                   in_flight=np.nan, expected_p99_ms=np.nan, p99_at_util=np.nan, p99_beyond_measured=True,
                   meets_p99=False if p99_ms is not None else None, cost_per_mframe=np.nan,
                   usd_per_hour=np.nan, priced_host_cores=np.nan, usd_per_server_hour=np.nan, usd_per_mframe=np.nan,
                   assumption=f"a {shape}-core server cannot host one worker of {threads} threads",
                   p99_note="", utilisation_hi=np.nan, p99_ci_hi_ms=np.nan, judged_on="")
        return row
    per_server = workers * threads * per_core
    servers = math.ceil(required / (per_server * headroom) - 1e-9)
    capacity = servers * per_server
    util = required / capacity
    paced = cfg.get("paced") or []
    p99, at_util, mean_ms, beyond = _p99_at(paced or cfg["curve"], util)
    # The interval judgement: capacity at the throughput interval's lower bound (a higher
    # utilisation, U = X / capacity), and the p99 interval's upper bound measured nearest to it.
    lo = cfg.get("per_core_fps_lo")
    util_hi = required / (servers * workers * threads * lo) if _finite(lo) and lo > 0 else util
    p99_hi = _p99_hi_at(paced or cfg["curve"], util_hi)
    if not judge_on_interval:
        judged = "point estimate (asked)"
    elif _finite(p99_hi):
        judged = f"p99 interval upper bound at utilisation {util_hi:.2f}"
    else:
        judged = "point estimate (no p99 interval recorded)"
    verdict = p99_hi if judged.startswith("p99 interval") else p99
    provisioned = servers * shape
    row.update(
        servers=servers, provisioned_cores=provisioned, capacity_fps=capacity, utilisation=util,
        # Little's law L = lambda W: frames in flight across the fleet on average.
        in_flight=required * mean_ms / 1000.0,
        expected_p99_ms=p99, p99_at_util=at_util, p99_beyond_measured=beyond,
        meets_p99=None if p99_ms is None else bool(verdict <= p99_ms),
        utilisation_hi=util_hi, p99_ci_hi_ms=p99_hi, judged_on=judged,
        cost_per_mframe=np.nan if cost is None else cost * provisioned / (required * 3600.0) * 1e6,
        **fleet_cost(host_price, servers, shape, required),
        assumption=_assumption(cfg, shape),
        p99_note=((f"paced-arrival p99 at utilisation {at_util:.2f} (queueing included)" if paced else
                   f"closed-loop p99 at utilisation {at_util:.2f} (no queueing)")
                  + ("; deployed utilisation is beyond the highest measured" if beyond else "")),
    )
    return row


def _p99_at(curve, util: float):
    """(p99, utilisation it was measured at, mean ms there, beyond the measured range?)."""
    best = min(curve, key=lambda c: (abs(c[0] - util), -c[0]))
    top = max(c[0] for c in curve)
    return best[1], best[0], best[2], bool(util > top + 1e-9)


def _p99_hi_at(curve, util: float) -> float:
    """Upper bound of the p99 interval measured nearest to `util` (NaN when none was recorded)."""
    best = min(curve, key=lambda c: (abs(c[0] - util), -c[0]))
    return float(best[4]) if len(best) > 4 else math.nan


def _finite(v) -> bool:
    return isinstance(v, (int, float)) and math.isfinite(v)


def _assumption(cfg: dict, shape: int) -> str:
    mc = cfg["measured_cores"]
    basis = (f"{cfg['per_core_fps']:.3g} fps/core measured at K={cfg['measured_k']} x "
             f"T={int(cfg['intra_threads'] or 1)} ({mc} cores, scaling efficiency {cfg['scaling_eff']:.2f})")
    if shape <= mc:
        return f"measured: {basis}"
    return (f"extrapolated: throughput assumed linear in cores beyond the measured {mc} cores at "
            f"{basis}; memory bandwidth and cache contention on larger hosts may lower it")


MAX_STREAMS = 1_000_000
MIN_FPS, MAX_FPS = 0.001, 10_000.0


def check_args(streams, fps, p99_ms, server_cores, headroom, cost):
    def number(name, value):
        try:
            v = float(value)
        except (TypeError, ValueError):
            raise UserError(f"{name}: must be a number, got {value!r}") from None
        if not math.isfinite(v):
            raise UserError(f"{name}: must be finite, got {value!r}")
        return v

    # Ranges wide enough for any real deployment and narrow enough that streams x fps,
    # servers and costs stay finite numbers (1e-300 fps used to divide by zero, 1e308 overflow).
    s = number("streams (--streams)", streams)
    if not 0 < s <= MAX_STREAMS or s != int(s):
        raise UserError(f"streams (--streams): must be a whole number in 1..{MAX_STREAMS}, got {streams!r}")
    f = number("fps (--fps)", fps)
    if not MIN_FPS <= f <= MAX_FPS:
        raise UserError(f"fps (--fps): must be in [{MIN_FPS:g}, {MAX_FPS:g}], got {fps!r}")
    if p99_ms is not None:
        p99_ms = number("p99_ms (--p99-ms)", p99_ms)
        if not 0 < p99_ms <= 1e6:
            raise UserError(f"p99_ms (--p99-ms): must be in (0, 1e6], got {p99_ms!r}")
    if isinstance(server_cores, (int, float, str)):
        server_cores = [server_cores]
    shapes = []
    for c in server_cores or ():
        v = number("server_cores (--server-cores)", c)
        if not 0 < v <= 4096 or v != int(v):
            raise UserError(f"server_cores (--server-cores): each must be a whole number in 1..4096, got {c!r}")
        shapes.append(int(v))
    if not shapes:
        raise UserError("server_cores (--server-cores): give at least one server core count")
    h = number("headroom (--headroom)", headroom)
    if not 0 < h <= 1:
        raise UserError(f"headroom (--headroom): must be in (0, 1], got {headroom!r}")
    if cost is not None:
        cost = number("core_hour_cost (--core-hour-cost)", cost)
        if not 0 <= cost <= 1e6:
            raise UserError(f"core_hour_cost (--core-hour-cost): must be in [0, 1e6], got {cost!r}")
    return int(s), f, p99_ms, sorted(set(shapes)), h, cost
