"""The scaling table: one row per configuration (and host) with the basis of the sizing model.

Input: a points table holding throughput rows (``tput_fps`` ..., speedbench.measure.concurrent_result).
Every configuration needs its single-stream throughput X(1). A K = 1 row has one of two shapes:
measured under load (``speedbench load RUN`` merges the load columns into it) or a plain latency row
(a sweep's ``concurrency`` axis, whose K = 1 point is the single-stream measurement). ``k1_throughput``
is the one place that turns either into one shape, with X(1) from
``speedbench.measure.concurrent_result.single_stream_fps`` (the baseline every stored ``scaling_eff``
uses); everything after it reads that one shape.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd

from speedbench.analyse.common import label
from speedbench.errors import UserError
from speedbench.measure.concurrent_result import single_stream_fps
from speedbench.measure.point import ORT_ONLY_KNOBS, uses_ort_knobs
from speedbench.schema import CONFIG_COLUMNS, ID_DEFAULTS, point_id

# A configuration is everything that identifies a point except how many copies run at once.
CONFIG_KEY = tuple(c for c in CONFIG_COLUMNS if c != "concurrency")

K1_FROM_LOAD = "load"
K1_FROM_LATENCY = "single-stream latency (X(1) = 1 / mean latency)"

_IDENT = ("label", *CONFIG_KEY)
SCALING_COLUMNS = [*_IDENT, "host", "map", "map_ci_lo", "map_ci_hi", "point_id", "per_core_fps", "per_core_fps_lo",
                   "measured_cores",
                   "measured_k", "scaling_eff", "x1_fps", "host_cores", "recorded_host_cores", "curve", "k1_source",
                   "measured_cpu_util", "paced", "untrained"]


def scaling_summary(df: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """One row per configuration with throughput data at K = 1: (configs, excluded).

    configs carry the basis of the sizing model (per_core_fps, measured_cores, scaling_eff
    recomputed here as X(K) / (K X(1)) from the rows themselves) plus ``curve``: a list of
    (utilisation on the measuring host, p99 ms, mean ms, K, upper bound of the p99 interval) per
    measured K, for the p99 lookup.
    """
    df = _throughput_frame(df)
    key = list(CONFIG_KEY) + (["host"] if "host" in df.columns else [])
    configs, excluded = [], []
    for _, group in df.groupby(key, dropna=False, sort=False):
        first = group.iloc[0]
        if not (group["tput_fps"] > 0).any():
            continue  # a latency-only point; nothing to size
        base, k1_source = k1_throughput(group)
        if base is None:
            excluded.append({**_ident(first), "reason": "no throughput or latency measured at K=1"})
            continue
        others = group[(group["concurrency"] != 1) & (group["tput_fps"] > 0)]
        configs.append(_config_row(group, base, others, k1_source))
    configs = pd.DataFrame(configs, columns=SCALING_COLUMNS)
    excluded = pd.DataFrame(excluded, columns=[*_IDENT, "host", "reason"])
    if configs["host"].dropna().astype(str).replace("", np.nan).nunique() > 1:
        # One configuration measured on two hosts stays two rows: labels name the host, ids are unique.
        for t in (configs, excluded):
            named = t["host"].notna() & (t["host"].astype(str) != "")
            t.loc[named, "label"] = t.loc[named, "label"] + " [" + t.loc[named, "host"].astype(str) + "]"
        configs["point_id"] = [pid if str(pid).endswith(f"@{h}") else f"{pid}@{h}"
                               for pid, h in zip(configs["point_id"], configs["host"])]
    return configs, excluded


def hosts_of(configs: pd.DataFrame) -> list[str]:
    """The named hosts of a table, in order of appearance."""
    if "host" not in configs.columns:
        return []
    return [str(h) for h in pd.unique(configs["host"].dropna()) if str(h)]


def k1_throughput(group: pd.DataFrame) -> tuple[pd.DataFrame | None, str]:
    """A configuration's K = 1 row as a one-row throughput frame (tput_fps, tput_p99_ms, tput_mean_ms),
    and where its X(1) came from.

    Measured under load: the row as it is. A latency row: one closed-loop stream serves
    X(1) = 1 / W frames a second (Little's law with L = 1), its latencies are those of that stream.
    (None, "") when the configuration has neither.
    """
    k1 = group[group["concurrency"] == 1]
    loaded = k1[k1["tput_fps"] > 0]
    rows = loaded if len(loaded) else k1
    for i in range(len(rows)):
        row = rows.iloc[[i]]
        x1 = single_stream_fps({**row.iloc[0].to_dict(), "status": "ok", "concurrency": 1})
        if x1 is None:
            continue
        if len(loaded):
            return row, K1_FROM_LOAD
        return row.assign(tput_fps=x1, tput_p99_ms=row["lat_p99_ms"], tput_mean_ms=row["lat_mean_ms"],
                          tput_p99_ci_hi=row["lat_p99_ci_hi"]), K1_FROM_LATENCY
    return None, ""


def _throughput_frame(df: pd.DataFrame) -> pd.DataFrame:
    """The ok rows with every column the scaling table reads, numeric where it is a number."""
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
    return df


def _config_row(group: pd.DataFrame, k1: pd.DataFrame, others: pd.DataFrame, k1_source: str) -> dict:
    """The sizing basis of one configuration from its K = 1 throughput row and its K > 1 rows."""
    base = k1.iloc[0]
    x1 = float(base["tput_fps"])
    measured = pd.concat([k1, others]) if len(others) else k1
    measured = measured.sort_values(["cores_used", "concurrency"], kind="stable")
    host_cores = recorded = measured["host_cores"].max()
    if not np.isfinite(host_cores) or host_cores <= 0:
        host_cores = measured["cores_used"].max()  # unknown host: assume the largest load filled it
    curve = [(float(r.cores_used) / host_cores, float(r.tput_p99_ms), float(r.tput_mean_ms),
              int(r.concurrency), float(r.tput_p99_ci_hi)) for r in measured.itertuples()]
    top = measured.iloc[-1]
    k_top = int(top["concurrency"])
    maps = pd.to_numeric(group["map"], errors="coerce") if "map" in group.columns else None
    acc_src = group[maps.notna()].iloc[0] if maps is not None and maps.notna().any() else base
    return {
        **_ident(base),
        **{c: acc_src.get(c, np.nan) for c in ("map", "map_ci_lo", "map_ci_hi")},
        "point_id": _config_id(base),
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
        "paced": paced_curve(top.get("load_curve")),
        "untrained": bool(acc_src.get("untrained", False) is True or str(acc_src.get("weights")) == "none"),
    }


def _config_id(row) -> str:
    """The K = 1 point id of a configuration (computed when the table carries none)."""
    pid = row.get("point_id")
    if isinstance(pid, str) and pid:
        return pid
    return point_id({**{c: row.get(c) for c in CONFIG_KEY}, "concurrency": 1})


def _ident(row) -> dict:
    out = {c: row.get(c) for c in CONFIG_KEY}
    if "host" in row.index:
        out["host"] = row.get("host")
    out["label"] = label({**out, "concurrency": 1})
    return out


def paced_curve(value) -> list:
    """The load_curve column (JSON text or a list) -> [(utilisation, p99, mean, K, p99 upper bound)] of ok points."""
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
