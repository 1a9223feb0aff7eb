"""Host prices and what a million frames costs on each host with each configuration.

A price table is a small file the user writes, one price per host label, in US dollars
per host-hour:

    TOML:  [prices]                 CSV:  host,usd_per_hour
           c6i-large = 0.085              c6i-large,0.085
           "edge box" = 0.02              edge box,0.02

Cost per million frames = usd_per_hour / (frames per second x 3600) x 1e6, where the
frame rate is the throughput the host delivers with that configuration: `tput_fps` of a
throughput row (K concurrent workers, `speedbench load`) when the row has one, else the
single-stream rate (fps = 1000 / p50). `fps_source` says which one each row used.
"""
from __future__ import annotations

import csv
import math
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd

from speedbench.errors import UserError

SINGLE = "single stream (fps = 1000 / p50)"


def load_prices(path) -> dict[str, float]:
    """Read a TOML ([prices] label = usd_per_hour) or CSV (host,usd_per_hour) price table."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise UserError(f"{p}: price table not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise UserError(f"{p}: cannot read price table ({exc})") from None
    suffix = p.suffix.lower()
    if suffix == ".toml":
        prices = _from_toml(p, text)
    elif suffix == ".csv":
        prices = _from_csv(p, text)
    else:
        raise UserError(f"{p}: price table must be a .toml or .csv file")
    if not prices:
        raise UserError(f"{p}: price table lists no host")
    return prices


def _price(p: Path, where: str, value) -> float:
    try:
        v = float(value) if not isinstance(value, bool) else math.nan
    except (TypeError, ValueError):
        v = math.nan
    if not math.isfinite(v) or v <= 0:
        raise UserError(f"{p}: {where}: price must be a positive number of USD per host-hour, not {value!r}")
    return v


def _from_toml(p: Path, text: str) -> dict[str, float]:
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise UserError(f"{p}: not valid TOML ({exc})") from None
    extra = sorted(set(doc) - {"prices"})
    if extra:
        raise UserError(f"{p}: {extra[0]}: unknown key; the table is [prices] with one `label = usd_per_hour` per host")
    table = doc.get("prices")
    if not isinstance(table, dict):
        raise UserError(f"{p}: prices: missing [prices] table (one `label = usd_per_hour` per host)")
    return {str(k): _price(p, f"prices.{k}", v) for k, v in table.items()}


def _from_csv(p: Path, text: str) -> dict[str, float]:
    rows = list(csv.reader(text.splitlines()))
    rows = [r for r in rows if any(c.strip() for c in r)]
    if not rows or [c.strip().lower() for c in rows[0]] != ["host", "usd_per_hour"]:
        raise UserError(f"{p}: line 1: header must be `host,usd_per_hour`")
    out: dict[str, float] = {}
    for n, r in enumerate(rows[1:], start=2):
        if len(r) != 2 or not r[0].strip():
            raise UserError(f"{p}: line {n}: expected `host,usd_per_hour`, got {','.join(r)!r}")
        host = r[0].strip()
        if host in out:
            raise UserError(f"{p}: line {n}: host {host!r} is listed twice")
        out[host] = _price(p, f"line {n}", r[1].strip())
    return out


def frame_rate(df: pd.DataFrame) -> tuple[np.ndarray, list[str]]:
    """(frames/s the host delivers with each row's configuration, where the figure comes from)."""
    n = len(df)
    tput = _col(df, "tput_fps")
    fps = _col(df, "fps")
    p50 = _col(df, "lat_p50_ms")
    with np.errstate(divide="ignore", invalid="ignore"):
        fps = np.where(np.isnan(fps) & (p50 > 0), 1000.0 / p50, fps)
    conc = _col(df, "concurrency")
    rate, source = np.full(n, np.nan), []
    for i in range(n):
        if tput[i] > 0:
            k = int(conc[i]) if conc[i] == conc[i] else 1
            rate[i] = tput[i]
            source.append(f"throughput of {k} concurrent worker(s) (tput_fps)")
        elif fps[i] > 0:
            rate[i] = fps[i]
            source.append(SINGLE)
        else:
            source.append("no frame rate recorded")
    return rate, source


def add_costs(df: pd.DataFrame, prices: dict[str, float]) -> pd.DataFrame:
    """Add usd_per_hour, frames_per_s, fps_source and usd_per_mframe (NaN when a host has no price)."""
    out = df.copy()
    rate, source = frame_rate(out)
    hosts = out["host"].astype(str) if "host" in out.columns else pd.Series("", index=out.index)
    price = hosts.map(lambda h: prices.get(h, math.nan)).astype(float).to_numpy()
    out["usd_per_hour"] = price
    out["frames_per_s"] = rate
    out["fps_source"] = source
    with np.errstate(divide="ignore", invalid="ignore"):
        out["usd_per_mframe"] = price / (rate * 3600.0) * 1e6
    return out


def _col(df: pd.DataFrame, col: str) -> np.ndarray:
    if col not in df.columns:
        return np.full(len(df), np.nan)
    return pd.to_numeric(df[col], errors="coerce").to_numpy(dtype=float)


# --------------------------------------------------------------------------- prices of a sized fleet
def sizing_prices(configs: pd.DataFrame, hosts: list[str], prices, host_cores) -> tuple[dict, list[str]]:
    """{host: (usd_per_hour, N cores it buys)} for every host of a scaling table that can be priced,
    and notes for the rest (speedbench.analyse.sizing)."""
    if not prices:
        return {}, []
    out, notes = {}, []
    for h in hosts or [None]:
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


def fleet_cost(host_price, servers: int, shape: int, required: float) -> dict:
    """usd_per_mframe of a sized fleet from a whole-host price: a C-core server costs usd_per_hour x C / N
    per hour (price linear in cores), servers x that per frame delivered."""
    if host_price is None:
        return dict(usd_per_hour=np.nan, priced_host_cores=np.nan, usd_per_server_hour=np.nan, usd_per_mframe=np.nan)
    usd_per_hour, n = host_price
    per_server = usd_per_hour * shape / n
    return dict(usd_per_hour=usd_per_hour, priced_host_cores=n, usd_per_server_hour=per_server,
                usd_per_mframe=servers * per_server / (required * 3600.0) * 1e6)


def _number(v) -> float:
    v = pd.to_numeric(pd.Series([v]), errors="coerce").iloc[0]
    return float(v) if v == v else math.nan
