"""Server sizing: how many servers of which shape carry S streams at F frames/s.

The inputs are throughput rows written by ``speedbench load`` (speedbench.measure.load):
for a configuration measured with K concurrent workers of T threads each, ``tput_fps`` is
the aggregate frames/s on ``cores_used = K x T`` cores and ``tput_p99_ms`` the per-request
p99 under that load.

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
  the paced-arrival curve of the largest K (``load_curve``, speedbench.measure.load.measure_curve):
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
from speedbench.errors import UserError
from speedbench.measure.point import ORT_ONLY_KNOBS, uses_ort_knobs
from speedbench.schema import CONFIG_COLUMNS, ID_DEFAULTS

# Rule of thumb (ours): workers that got less than this share of their cores' CPU time were
# competing with other work on the host (or idling threads), so the throughput understates a
# dedicated server and the sizing errs on the side of more servers.
CONTENDED_CPU_UTIL = 0.8

# A configuration is everything that identifies a point except how many copies run at once.
CONFIG_KEY = tuple(c for c in CONFIG_COLUMNS if c != "concurrency")

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
    hosts = _hosts(configs)
    if use_frontier:
        configs = _frontier(configs, by_host=len(hosts) > 1)
    if configs.empty:
        raise UserError("size: the frontier is empty (no configuration with throughput data survived)")
    price_of, price_notes = _host_prices(configs, prices, host_cores)
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


def _hosts(configs: pd.DataFrame) -> list[str]:
    if "host" not in configs.columns:
        return []
    return [str(h) for h in pd.unique(configs["host"].dropna()) if str(h)]


def _host_prices(configs: pd.DataFrame, prices, host_cores) -> tuple[dict, list[str]]:
    """{host: (usd_per_hour, N cores it buys)} for every host that can be priced, and notes for the rest."""
    if not prices:
        return {}, []
    out, notes = {}, []
    for h in _hosts(configs) or [None]:
        if h is None or h not in prices:
            notes.append(f"host {h or '(unnamed)'} has no price in the price table: no usd_per_mframe for it")
            continue
        n = _number((host_cores or {}).get(h))
        if not n > 0:   # no fingerprint: the cores the load test could use on that host
            n = _number(configs.loc[configs["host"] == h, "recorded_host_cores"].max())
        if not n > 0:
            notes.append(f"host {h}: its logical core count is unknown (no env.cores_logical, no host_cores "
                         "in its load rows), so its host price cannot be split per core: no usd_per_mframe")
            continue
        out[h] = (float(prices[h]), n)
    return out, notes


JUDGED_INTERVAL = ("meets p99: judged on the upper bound of the p99 95 % interval (over the worker launches), "
                   "read at the utilisation the lower bound of the throughput interval gives; rows without "
                   "intervals are judged on the point estimate (column judged_on)")
JUDGED_POINT = "meets p99: judged on the point estimates (p99 and throughput), not their intervals"


def _number(v) -> float:
    v = pd.to_numeric(pd.Series([v]), errors="coerce").iloc[0]
    return float(v) if v == v else math.nan


def scaling_summary(df: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """One row per configuration with throughput data at K = 1: (configs, excluded).

    configs carry the basis of the sizing model (per_core_fps, measured_cores, scaling_eff
    recomputed here as X(K) / (K X(1)) from the rows themselves) plus ``curve``: a list of
    (utilisation on the measuring host, p99 ms, mean ms) per measured K, for the p99 lookup.
    """
    if df is None or len(df) == 0:
        raise UserError("size: the run has no points")
    if "tput_fps" not in df.columns or pd.to_numeric(df["tput_fps"], errors="coerce").notna().sum() == 0:
        raise UserError("size: the run has no throughput data (tput_fps); "
                        "measure it first with `speedbench load RUN -k 1,2`")
    df = df.copy()
    for col in CONFIG_KEY:
        if col not in df.columns:
            df[col] = ID_DEFAULTS[col] if col in ID_DEFAULTS else (
                "" if col in ("model", "weights", "backend", "exec_mode", "opt_level") else 0)
    if "status" in df.columns:
        df = df[df["status"].fillna("ok").astype(str) == "ok"]
    for col in ("tput_fps", "tput_p99_ms", "tput_mean_ms", "cores_used", "concurrency",
                "intra_threads", "host_cores", "lat_mean_ms", "lat_p99_ms", "lat_p99_ci_hi",
                "tput_fps_ci_lo", "tput_p99_ci_hi"):
        df[col] = pd.to_numeric(df[col], errors="coerce") if col in df.columns else np.nan
    df["concurrency"] = df["concurrency"].fillna(1)
    # ORT-only knobs mean nothing for other backends; rows of old runs may record them either way.
    df.loc[~df["backend"].astype(str).map(uses_ort_knobs), list(ORT_ONLY_KNOBS)] = ""
    # cores_used = K x T; rebuild it for rows that lack it.
    df["cores_used"] = df["cores_used"].fillna(df["concurrency"] * df["intra_threads"].fillna(1).clip(lower=1))
    key = list(CONFIG_KEY) + (["host"] if "host" in df.columns else [])
    configs, excluded = [], []
    for _, group in df.groupby(key, dropna=False, sort=False):
        measured = group[group["tput_fps"].notna() & (group["tput_fps"] > 0)]
        first = group.iloc[0]
        if measured.empty:
            continue  # a latency-only point; nothing to size
        base = measured[measured["concurrency"] == 1]
        k1_source = "load"
        if base.empty:
            # One closed-loop stream: X(1) = 1 / W (Little's law with L = 1), so a single-stream
            # latency row of the same configuration gives the K = 1 throughput.
            single = group[(group["concurrency"] == 1) & (group["lat_mean_ms"] > 0)]
            if single.empty:
                excluded.append({**_ident(first), "reason": "no throughput or latency measured at K=1"})
                continue
            base = single.iloc[[0]].assign(tput_fps=1000.0 / single["lat_mean_ms"].iloc[0],
                                           tput_p99_ms=single["lat_p99_ms"].iloc[0],
                                           tput_mean_ms=single["lat_mean_ms"].iloc[0],
                                           tput_p99_ci_hi=single["lat_p99_ci_hi"].iloc[0])
            measured = pd.concat([base, measured])
            k1_source = "single-stream latency (X(1) = 1 / mean latency)"
        x1 = float(base["tput_fps"].iloc[0])
        measured = measured.sort_values(["cores_used", "concurrency"], kind="stable")
        host_cores = recorded = measured["host_cores"].max()
        if not np.isfinite(host_cores) or host_cores <= 0:
            host_cores = measured["cores_used"].max()  # unknown host: assume the largest load filled it
        curve = [(float(r.cores_used) / host_cores, float(r.tput_p99_ms), float(r.tput_mean_ms),
                  int(r.concurrency), float(r.tput_p99_ci_hi)) for r in measured.itertuples()]
        top = measured.iloc[-1]
        k_top = int(top["concurrency"])
        maps = pd.to_numeric(group["map"], errors="coerce") if "map" in group.columns else None
        acc_src = group[maps.notna()].iloc[0] if maps is not None and maps.notna().any() else base.iloc[0]
        configs.append({
            **_ident(base.iloc[0]),
            **{c: acc_src.get(c, np.nan) for c in ("map", "map_ci_lo", "map_ci_hi")},
            "point_id": _config_id(base.iloc[0]),
            "per_core_fps": float(top["tput_fps"]) / float(top["cores_used"]),
            "per_core_fps_lo": float(top["tput_fps_ci_lo"]) / float(top["cores_used"]),
            "measured_cores": int(top["cores_used"]),
            "measured_k": k_top,
            "scaling_eff": float(top["tput_fps"]) / (k_top * x1),
            "x1_fps": x1,
            "host_cores": float(host_cores),
            "recorded_host_cores": float(recorded),
            "curve": curve,
            "k1_source": k1_source,
            "measured_cpu_util": float(pd.to_numeric(top.get("tput_cpu_util", np.nan), errors="coerce")),
            "paced": _paced_curve(top.get("load_curve")),
            "untrained": bool(acc_src.get("untrained", False) is True or str(acc_src.get("weights")) == "none"),
        })
    cols = [*_IDENT, "host", "map", "map_ci_lo", "map_ci_hi", "point_id", "per_core_fps", "per_core_fps_lo",
            "measured_cores",
            "measured_k", "scaling_eff", "x1_fps", "host_cores", "recorded_host_cores", "curve", "k1_source",
            "measured_cpu_util", "paced", "untrained"]
    configs = pd.DataFrame(configs, columns=cols)
    excluded = pd.DataFrame(excluded, columns=[*_IDENT, "host", "reason"])
    if configs["host"].dropna().astype(str).replace("", np.nan).nunique() > 1:
        # One configuration measured on two hosts stays two rows: labels name the host, ids are unique.
        for t in (configs, excluded):
            named = t["host"].notna() & (t["host"].astype(str) != "")
            t.loc[named, "label"] = t.loc[named, "label"] + " [" + t.loc[named, "host"].astype(str) + "]"
        configs["point_id"] = [pid if str(pid).endswith(f"@{h}") else f"{pid}@{h}"
                               for pid, h in zip(configs["point_id"], configs["host"])]
    return configs, excluded


_IDENT = ("label", *CONFIG_KEY)


def _config_id(row) -> str:
    """The K = 1 point id of a configuration (computed when the table carries none)."""
    pid = row.get("point_id")
    if isinstance(pid, str) and pid:
        return pid
    from speedbench.schema import point_id

    return point_id({**{c: row.get(c) for c in CONFIG_KEY}, "concurrency": 1})


def _ident(row) -> dict:
    from speedbench.analyse.common import label

    out = {c: row.get(c) for c in CONFIG_KEY}
    if "host" in row.index:
        out["host"] = row.get("host")
    out["label"] = label({**out, "concurrency": 1})
    return out


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
        **_host_cost(host_price, servers, shape, required),
        assumption=_assumption(cfg, shape),
        p99_note=((f"paced-arrival p99 at utilisation {at_util:.2f} (queueing included)" if paced else
                   f"closed-loop p99 at utilisation {at_util:.2f} (no queueing)")
                  + ("; deployed utilisation is beyond the highest measured" if beyond else "")),
    )
    return row


def _host_cost(host_price, servers: int, shape: int, required: float) -> dict:
    """usd_per_mframe from a whole-host price: a C-core server costs usd_per_hour x C / N per hour."""
    if host_price is None:
        return dict(usd_per_hour=np.nan, priced_host_cores=np.nan, usd_per_server_hour=np.nan, usd_per_mframe=np.nan)
    usd_per_hour, n = host_price
    per_server = usd_per_hour * shape / n
    return dict(usd_per_hour=usd_per_hour, priced_host_cores=n, usd_per_server_hour=per_server,
                usd_per_mframe=servers * per_server / (required * 3600.0) * 1e6)


def _paced_curve(value) -> list:
    """The load_curve column (JSON text or a list) -> [(utilisation, p99, mean, K)] of ok points."""
    import json

    if isinstance(value, str) and value.strip():
        try:
            value = json.loads(value)
        except json.JSONDecodeError:
            return []
    if not isinstance(value, list):
        return []
    out = []
    for e in value:
        # "load" = offered / closed-loop capacity, the same definition as the deployed utilisation
        # (required / capacity); older curves only carry the busy fraction "util".
        u = e.get("load", e.get("util")) if isinstance(e, dict) else None
        if isinstance(e, dict) and e.get("status") == "ok" and isinstance(u, (int, float)) and all(
                isinstance(e.get(k), (int, float)) for k in ("p99_ms", "mean_ms")):
            hi = e.get("p99_ci_hi")
            out.append((float(u), float(e["p99_ms"]), float(e["mean_ms"]), 0,
                        float(hi) if isinstance(hi, (int, float)) else math.nan))
    return out


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
