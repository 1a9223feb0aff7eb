"""Small helpers shared by frontier, pick and compare: labels, CI columns, row filters."""
from __future__ import annotations

import re

import numpy as np
import pandas as pd

from speedbench.errors import UserError
from speedbench.schema import CONFIG_COLUMNS, LATENCY_STATS, latency_column, point_id
from speedbench.schema import config_label as label  # noqa: F401 (the one labeller, re-exported)


def latency_col(stat: str) -> str:
    """schema.latency_column for a user's --latency value (p99, lat_p99_ms, ...)."""
    stat = str(stat).lower().removeprefix("lat_").removesuffix("_ms")
    if stat not in LATENCY_STATS:
        raise UserError(f"--latency: must be one of {', '.join(LATENCY_STATS)}, not {stat!r}")
    return latency_column(stat)


def ci_columns(col: str) -> tuple[str, str] | None:
    """Names of the CI bounds recorded for a metric column, if the schema has them."""
    if col.startswith("lat_") and col.endswith("_ms"):
        stat = col[len("lat_"):-len("_ms")]
        return f"lat_{stat}_ci_lo_ms", f"lat_{stat}_ci_hi_ms"
    if col == "map":
        return "map_ci_lo", "map_ci_hi"
    return None


def bounds(df: pd.DataFrame, col: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(value, lo, hi) arrays for a metric; a metric without recorded CIs gets lo = hi = value.

    fps has no CI column of its own; it is 1000 / p50 for one stream, so its interval is
    derived from the CI of the median latency (the bounds swap because 1/x is decreasing).
    """
    v = pd.to_numeric(df[col], errors="coerce").to_numpy(dtype=float)
    lo, hi = v.copy(), v.copy()
    cis = ci_columns(col)
    if col == "fps" and {"lat_p50_ci_lo_ms", "lat_p50_ci_hi_ms"} <= set(df.columns):
        with np.errstate(divide="ignore", invalid="ignore"):
            lo = 1000.0 / pd.to_numeric(df["lat_p50_ci_hi_ms"], errors="coerce").to_numpy(dtype=float)
            hi = 1000.0 / pd.to_numeric(df["lat_p50_ci_lo_ms"], errors="coerce").to_numpy(dtype=float)
    elif cis and set(cis) <= set(df.columns):
        lo = pd.to_numeric(df[cis[0]], errors="coerce").to_numpy(dtype=float)
        hi = pd.to_numeric(df[cis[1]], errors="coerce").to_numpy(dtype=float)
    # A missing bound means "no interval recorded": fall back to the value itself.
    lo = np.where(np.isnan(lo), v, np.minimum(lo, v))
    hi = np.where(np.isnan(hi), v, np.maximum(hi, v))
    return v, lo, hi


def require_columns(df: pd.DataFrame, cols, what: str) -> None:
    missing = [c for c in cols if c not in df.columns]
    if missing:
        raise UserError(f"{what}: points table lacks column(s) {', '.join(missing)}")


def split_ok(df: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """(usable rows, failed rows with a `reason`). A row without status counts as ok."""
    df = with_ids(df)
    status = pd.Series("ok", index=df.index)
    if "status" in df.columns:  # an empty status (older rows, hand-made frames) counts as ok
        status = df["status"].fillna("").astype(str).replace("", "ok")
    ok = df[status == "ok"].copy()
    bad = df[status != "ok"].copy()
    reason = bad["reason"] if "reason" in bad.columns else pd.Series("", index=bad.index)
    bad["reason"] = ["failed: " + (str(r) if isinstance(r, str) and r else "no reason recorded") for r in reason]
    return ok, bad


def with_ids(df: pd.DataFrame) -> pd.DataFrame:
    """Make sure every row has a point_id and a label."""
    df = df.copy()
    if "point_id" not in df.columns or df["point_id"].isna().any():
        ids = [point_id({c: r.get(c) for c in CONFIG_COLUMNS}) for r in df.to_dict("records")]
        if "point_id" in df.columns:
            df["point_id"] = df["point_id"].where(df["point_id"].notna(), pd.Series(ids, index=df.index))
        else:
            df["point_id"] = ids
    if "label" not in df.columns:
        df["label"] = [label(r) for r in df.to_dict("records")]
        # Same label for different configurations (e.g. two weights of one model): say which.
        dup = df["label"].duplicated(keep=False) & ~df["point_id"].duplicated(keep=False)
        if dup.any() and "weights" in df.columns:
            df.loc[dup, "label"] = df.loc[dup, "label"] + " / " + df.loc[dup, "weights"].astype(str)
        dup = df["label"].duplicated(keep=False) & ~df["point_id"].duplicated(keep=False)
        if dup.any():
            df.loc[dup, "label"] = df.loc[dup, "label"] + " [" + df.loc[dup, "point_id"].astype(str) + "]"
    return df


def precision_of(df: pd.DataFrame) -> pd.Series:
    """Each row's precision ("fp32" for rows recorded before the axis existed)."""
    if "precision" not in df.columns:
        return pd.Series("fp32", index=df.index)
    return df["precision"].fillna("").astype(str).replace("", "fp32")


def has_accuracy(df: pd.DataFrame, col: str = "map") -> pd.Series:
    if col not in df.columns:
        return pd.Series(False, index=df.index)
    return pd.to_numeric(df[col], errors="coerce").notna()


def as_float(v) -> float:
    """float(v), or NaN for anything that is not a number (None, "", text)."""
    try:
        return float(v)
    except (TypeError, ValueError):
        return float("nan")


# The one Markdown escaping rule (reports and compare): backslash escapes, never HTML entities
# (which a Markdown viewer shows literally), and only where the character would change the
# rendering (CommonMark: "Backslash escapes", "Entity references", "Raw HTML", list items, ATX
# headings, block quotes, tables). So `0.1.0`, `3.11.7` and `speedbench pick` in backticks read as typed.
_MD_INLINE = re.compile(r"\\(?=[!-/:-@\[-`{-~])"      # a backslash that would escape what follows
                        r"|<"                            # could open a raw HTML tag
                        r"|&(?=#?[A-Za-z0-9]+;)"         # would start an entity reference
                        r"|[|\[\]]")                     # table cell separator, link brackets
# Only at the start of a line: heading, block quote, bullet ("- x"), ordered list ("1. x").
_MD_LEADING = re.compile(r"^(\s*)(#{1,6}(?=\s|$)|>|[*+-](?=\s|$)|\d{1,9}(?=[.)](?:\s|$)))", re.M)


def md(text) -> str:
    """Text as Markdown that renders exactly as written (an escaped "<script>" stays inert text)."""
    out = _MD_INLINE.sub(lambda m: "\\" + m.group(0), str(text))
    return _MD_LEADING.sub(lambda m: m.group(1) + (m.group(2) + "\\" if m.group(2)[0].isdigit()
                                                     else "\\" + m.group(2)), out)


def md_cell(text) -> str:
    """md() for one table cell: on one line."""
    return md(str(text).replace("\n", " "))
