"""Plots of a run (matplotlib, object API only: no pyplot state, safe in workers and tests).

Every function takes DataFrames, returns the Figure, and saves it when given a path
(format from the suffix; svg=True also writes an SVG next to a PNG).
"""
from __future__ import annotations

import itertools
from pathlib import Path

import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from speedbench.analyse import frontier as _frontier
from speedbench.analyse.common import bounds, precision_of, split_ok
from speedbench.schema import STAGES

# Families told apart by marker shape as well as colour (readable in greyscale and by
# colour-blind readers).
FAMILY_STYLE = {
    "one-stage": ("o", "#1f77b4"),
    "two-stage": ("s", "#d95f02"),
}
OTHER_STYLE = ("^", "#666666")
AXIS_NAMES = {"map": "mAP (COCO, IoU 0.50:0.95)", "rss_peak_mib": "peak memory (MiB)", "fps": "throughput (frames/s)"}


def _text(s) -> str:
    # Matplotlib treats $...$ as maths; a model name is plain text.
    return str(s).replace("$", r"\$")


def axis_name(col: str) -> str:
    if col.startswith("lat_") and col.endswith("_ms"):
        return f"latency {col[4:-3]} (ms)"
    return AXIS_NAMES.get(col, col)


def save(fig: Figure, path, svg: bool = False) -> None:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110, bbox_inches="tight")
    if svg and path.suffix.lower() != ".svg":
        fig.savefig(path.with_suffix(".svg"), bbox_inches="tight")


def _done(fig, path, svg):
    if path is not None:
        save(fig, path, svg)
    return fig


def _empty(message: str, path=None, svg=False) -> Figure:
    fig = Figure(figsize=(6, 1.6))
    ax = fig.add_subplot()
    ax.axis("off")
    ax.text(0.5, 0.5, _text(message), ha="center", va="center", wrap=True)
    return _done(fig, path, svg)


def plot_frontier(df: pd.DataFrame, path=None, x: str = "lat_p50_ms", y: str = "map",
                  minimize_x: bool = True, title: str | None = None, svg: bool = False,
                  max_labels: int = 14) -> Figure:
    """Scatter with CI error bars, the frontier as a staircase, frontier and tied points labelled."""
    f = _frontier(df, x=x, y=y, minimize_x=minimize_x)
    if not len(f):
        return _empty("no successful points to plot", path, svg)
    with_acc = f[f["accuracy_available"]]
    if not len(with_acc):
        return _ranking(f, x, minimize_x, title, path, svg)
    fig = Figure(figsize=(9, 6))
    ax = fig.add_subplot()
    xv, xlo, xhi = bounds(with_acc, x)
    yv, ylo, yhi = bounds(with_acc, y)
    fam = with_acc["family"] if "family" in with_acc.columns else pd.Series("", index=with_acc.index)
    status = with_acc["frontier_status"].to_numpy()
    prec = precision_of(with_acc).to_numpy()
    # One errorbar call per (family, precision, status): far fewer artists than one per point.
    for family, precision in itertools.product(pd.unique(fam), pd.unique(prec)):
        marker, colour = FAMILY_STYLE.get(family, OTHER_STYLE)
        for st in ("dominated", "tied", "frontier"):
            k = np.flatnonzero((fam.to_numpy() == family) & (prec == precision) & (status == st))
            if not len(k):
                continue
            fill = "white" if st == "dominated" else colour
            ax.errorbar(xv[k], yv[k], xerr=[xv[k] - xlo[k], xhi[k] - xv[k]], yerr=[yv[k] - ylo[k], yhi[k] - yv[k]],
                        fmt=marker, ms=8 if st == "frontier" else 6, ls="none", mfc=fill,
                        mec="black" if st == "tied" else colour, color=colour,
                        alpha=0.55 if st == "dominated" else 1.0, elinewidth=0.8, capsize=2,
                        # int8: half-filled (the other half a light tint, also when dominated)
                        **({"fillstyle": "left", "mfcalt": "#dddddd" if st == "dominated" else "white"}
                           if precision != "fp32" else {}))
    front = with_acc[with_acc["frontier_status"] == "frontier"].sort_values(x, ascending=minimize_x)
    if len(front) > 1:
        ax.step(front[x], front[y], where="post", color="black", lw=1.2, zorder=0)
    show = with_acc[with_acc["frontier_status"] != "dominated"] if len(with_acc) > max_labels else with_acc
    _place_labels(ax, show.head(max_labels * 2), x, y)
    handles = [Line2D([], [], marker=m, color=c, ls="", label=fam) for fam, (m, c) in FAMILY_STYLE.items()]
    handles += [Line2D([], [], marker="o", color="grey", mfc="grey", ls="", label="frontier (filled)"),
                Line2D([], [], marker="o", color="black", mfc="grey", ls="", label="tied within noise (black edge)"),
                Line2D([], [], marker="o", color="grey", mfc="white", ls="", label="dominated (hollow)")]
    if (prec != "fp32").any():
        handles += [Line2D([], [], marker="o", color="grey", mfc="grey", fillstyle="left", mfcalt="white", ls="",
                           label="int8 (half-filled); fp32 full")]
    ax.legend(handles=handles, fontsize=8, loc="best")
    ax.set_xlabel(axis_name(x))
    ax.set_ylabel(axis_name(y))
    ax.grid(alpha=0.3)
    ax.set_title(_text(title or f"Frontier: {axis_name(y)} vs {axis_name(x)}"), fontsize=11)
    return _done(fig, path, svg)


def plot_host_frontiers(df: pd.DataFrame, path=None, x: str = "lat_p50_ms", y: str = "map",
                        minimize_x: bool = True, titles: dict | None = None, svg: bool = False,
                        max_cols: int = 3) -> Figure:
    """One frontier panel per host, side by side, sharing both axes so hosts compare at a glance.

    Marker shape = family (one-/two-stage), colour = model, the same in every panel.
    titles: {host: panel title}, e.g. CPU model and a shared-machine warning.
    """
    f = _frontier(df, x=x, y=y, minimize_x=minimize_x, by="host")
    if not len(f):
        return _empty("no successful points to plot", path, svg)
    hosts = sorted(pd.unique(f["host"].astype(str)))
    models = sorted(pd.unique(f["model"].astype(str)))
    palette = [f"C{k % 10}" for k in range(len(models))]
    colour = dict(zip(models, palette))
    family = f.drop_duplicates("model").set_index("model")["family"].to_dict() if "family" in f.columns else {}
    with_acc = f[f["accuracy_available"]]
    ncols = min(len(hosts), max_cols)
    nrows = -(-len(hosts) // ncols)
    ranking = not len(with_acc)
    per_row = max(f.groupby("host").size()) if ranking else 0
    height = (_height(per_row) if ranking else 4.2) * nrows
    fig = Figure(figsize=(4.6 * ncols + 1.8, height + 0.6))
    axes = fig.subplots(nrows, ncols, sharex=True, sharey=not ranking, squeeze=False).ravel()
    for ax in axes[len(hosts):]:
        ax.axis("off")
    for ax, host in zip(axes, hosts):
        g = f[f["host"].astype(str) == host]
        if ranking:
            _host_ranking(ax, g, x, minimize_x, colour)
        elif g["accuracy_available"].any():
            _host_panel(ax, g[g["accuracy_available"]], x, y, minimize_x, colour)
        else:
            ax.text(0.5, 0.5, "accuracy unavailable on this host\n(untrained weights): no frontier to draw",
                    transform=ax.transAxes, ha="center", va="center", fontsize=8, color="#a00")
        ax.set_title(_text((titles or {}).get(host, host)), fontsize=9,
                     color="#a00" if "shared machine" in str((titles or {}).get(host, "")) else "black")
        ax.set_xlabel(axis_name(x), fontsize=9)
        ax.xaxis.set_tick_params(labelbottom=True)  # shared x: keep the numbers on every panel
        ax.grid(alpha=0.3)
    if not ranking:
        for ax in axes[::ncols]:
            ax.set_ylabel(axis_name(y))
    handles = [Line2D([], [], marker=FAMILY_STYLE.get(family.get(m), OTHER_STYLE)[0], color=colour[m], ls="",
                      label=_text(f"{m} ({family.get(m) or 'other'})")) for m in models]
    handles += [Line2D([], [], marker="o", color="grey", mfc="grey", ls="", label="frontier (filled)"),
                Line2D([], [], marker="o", color="black", mfc="grey", ls="", label="tied within noise (black edge)"),
                Line2D([], [], marker="o", color="grey", mfc="white", ls="", label="dominated (hollow)")]
    fig.legend(handles=handles, fontsize=8, loc="upper left", bbox_to_anchor=(1.0, 0.95))
    what = f"ranking on {axis_name(x)} (no accuracy)" if ranking else f"{axis_name(y)} vs {axis_name(x)}"
    fig.suptitle(f"Per-host frontiers: {what}; each host's points measured on that host only", fontsize=10)
    fig.tight_layout()
    return _done(fig, path, svg)


def host_titles(hosts: pd.DataFrame) -> dict:
    """Panel titles from a Combined.hosts table: label, CPU, and a warning for a shared machine."""
    out = {}
    for h in hosts.itertuples():
        t = f"{h.host}\n{h.cpu_model or 'CPU not recorded'}"
        cores = pd.to_numeric(pd.Series([h.cores_logical]), errors="coerce").iloc[0]
        if cores == cores and cores:
            t += f", {int(cores)} cores"
        if h.shares_machine_with:
            t += "\nshared machine: not for hardware comparison"
        out[h.host] = t
    return out


def _host_panel(ax, g: pd.DataFrame, x: str, y: str, minimize_x: bool, colour: dict) -> None:
    xv, xlo, xhi = bounds(g, x)
    yv, ylo, yhi = bounds(g, y)
    status = g["frontier_status"].to_numpy()
    models = g["model"].astype(str).to_numpy()
    fam = g["family"].to_numpy() if "family" in g.columns else np.array([""] * len(g))
    for m in pd.unique(models):
        for st in ("dominated", "tied", "frontier"):
            k = np.flatnonzero((models == m) & (status == st))
            if not len(k):
                continue
            c = colour[m]
            ax.errorbar(xv[k], yv[k], xerr=[xv[k] - xlo[k], xhi[k] - xv[k]], yerr=[yv[k] - ylo[k], yhi[k] - yv[k]],
                        fmt=FAMILY_STYLE.get(fam[k[0]], OTHER_STYLE)[0], ms=8 if st == "frontier" else 6, ls="none",
                        mfc="white" if st == "dominated" else c, mec="black" if st == "tied" else c, color=c,
                        alpha=0.55 if st == "dominated" else 1.0, elinewidth=0.8, capsize=2)
    front = g[g["frontier_status"] == "frontier"].sort_values(x, ascending=minimize_x)
    if len(front) > 1:
        ax.step(front[x], front[y], where="post", color="black", lw=1.0, zorder=0)
    for _, r in front.iterrows():  # colour names the model; the label gives the rest
        short = str(r.get("config_label") or r["label"]).split(" @ ", 1)[-1]
        ax.annotate(_text(short), (r[x], r[y]), xytext=(4, 4), textcoords="offset points", fontsize=6.5)


def _host_ranking(ax, g: pd.DataFrame, x: str, minimize_x: bool, colour: dict) -> None:
    g = g.sort_values(x, ascending=minimize_x)
    xv, xlo, xhi = bounds(g, x)
    for k, (_, r) in enumerate(g.iterrows()):
        c = colour[str(r["model"])]
        st = r["frontier_status"]
        ax.errorbar(xv[k], k, xerr=[[xv[k] - xlo[k]], [xhi[k] - xv[k]]], fmt=FAMILY_STYLE.get(r.get("family"), OTHER_STYLE)[0],
                    color=c, mfc=c if st != "dominated" else "white", mec=c if st != "tied" else "black", capsize=2, ms=7)
    ax.set_yticks(np.arange(len(g)), [_text(r.get("config_label") or r["label"]) for _, r in g.iterrows()], fontsize=7)
    ax.invert_yaxis()


# Label positions tried in turn, in points from the marker: right/left of it, then further up/down
# and sideways (with a leader line), so a crowded cluster still gets one free spot per label.
_OFFSETS = [(dx, dy) for dy in (4, -11, 14, -21, 24, -31, 34, -41, 44, -51, 54, -61, 64, -71)
            for dx in (5, -5, 40, -40)]


def _place_labels(ax, rows: pd.DataFrame, x: str, y: str) -> None:
    """Annotate points (frontier first), each at the first offset where its text overlaps no earlier label.

    Overlap is checked on the rendered text boxes, so it holds whatever the axis ranges; a label
    with no free spot goes to the last offset with a leader line rather than being dropped.
    """
    if not len(rows):
        return
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.text import Text

    renderer = FigureCanvasAgg(ax.figure).get_renderer()
    ax.autoscale_view()
    frame = ax.get_window_extent(renderer)
    order = rows.assign(_first=(rows["frontier_status"] != "frontier").astype(int)).sort_values("_first", kind="stable")
    placed = []
    for _, r in order.iterrows():
        for n, (dx, dy) in enumerate(_OFFSETS):
            last = n == len(_OFFSETS) - 1
            a = ax.annotate(_text(r["label"]), (float(r[x]), float(r[y])), xytext=(dx, dy),
                            textcoords="offset points", fontsize=7, ha="left" if dx > 0 else "right",
                            arrowprops={"arrowstyle": "-", "lw": 0.4, "color": "grey"} if abs(dy) > 11 or abs(dx) > 5
                            else None)
            a.update_positions(renderer)
            box = Text.get_window_extent(a, renderer)   # the text alone, not its leader line
            free = not any(box.overlaps(b) for b in placed) and frame.contains(box.x0, box.y0) \
                and frame.contains(box.x1, box.y1)
            if free or last:
                placed.append(box)
                break
            a.remove()


def _ranking(f, x, minimize_x, title, path, svg) -> Figure:
    """Without accuracy there is no 2-D frontier: rank the configurations on x, with CIs."""
    f = f.sort_values(x, ascending=minimize_x)
    fig = Figure(figsize=(9, _height(len(f))))
    ax = fig.add_subplot()
    xv, xlo, xhi = bounds(f, x)
    for k, (_, r) in enumerate(f.iterrows()):
        marker, colour = FAMILY_STYLE.get(r.get("family"), OTHER_STYLE)
        st = r["frontier_status"]
        ax.errorbar(xv[k], k, xerr=[[xv[k] - xlo[k]], [xhi[k] - xv[k]]], fmt=marker, color=colour,
                    mfc=colour if st != "dominated" else "white", mec=colour if st != "tied" else "black",
                    capsize=2, ms=7)
    ax.set_yticks(np.arange(len(f)), [_text(s) for s in f["label"]], fontsize=8)
    ax.invert_yaxis()
    ax.set_xlabel(axis_name(x))
    ax.grid(axis="x", alpha=0.3)
    ax.set_title(_text(title or f"Ranking on {axis_name(x)} (no accuracy)"), fontsize=11, pad=18)
    ax.text(0.5, 1.0, "accuracy unavailable (untrained weights): ranked by this axis only",
            transform=ax.transAxes, ha="center", va="bottom", fontsize=9, color="#a00")
    return _done(fig, path, svg)


def _configs(df: pd.DataFrame, sort_by: str | None = None) -> pd.DataFrame:
    ok, _ = split_ok(df)
    if sort_by and sort_by in ok.columns:
        ok = ok.sort_values(sort_by, ascending=False)
    return ok


def _num(df: pd.DataFrame, col: str) -> pd.Series:
    if col not in df.columns:
        return pd.Series(np.nan, index=df.index)
    return pd.to_numeric(df[col], errors="coerce")


def _height(n: int) -> float:
    return max(2.8, 0.32 * n + 1.4)


def plot_stages(df: pd.DataFrame, path=None, svg: bool = False) -> Figure:
    """Stacked bars of per-stage time for each configuration, the unprofiled p50 marked."""
    ok = _configs(df, "lat_p50_ms")
    cols = [f"stage_{s}_ms" for s in STAGES if _num(ok, f"stage_{s}_ms").fillna(0).gt(0).any()]
    if not len(ok) or not cols:
        return _empty("no stage times recorded", path, svg)
    fig = Figure(figsize=(9, _height(len(ok))))
    ax = fig.add_subplot()
    ypos = np.arange(len(ok))
    left = np.zeros(len(ok))
    colours = ["#4e79a7", "#f28e2b", "#e15759", "#76b7b2", "#59a14f", "#edc948", "#b07aa1", "#bab0ac"]
    for k, c in enumerate(cols):
        v = _num(ok, c).fillna(0).to_numpy()
        ax.barh(ypos, v, left=left, color=colours[STAGES.index(c[6:-3]) % len(colours)], label=c[6:-3],
                hatch="//" if c == "stage_unattributed_ms" else None)
        left += v
    if "lat_p50_ms" in ok.columns:
        ax.plot(ok["lat_p50_ms"], ypos, "k|", ms=14, mew=2, label="p50 (unprofiled)")
    ax.set_yticks(ypos, [_text(s) for s in ok["label"]], fontsize=8)
    ax.invert_yaxis()
    ax.set_xlabel("time per image (ms), profiled pass")
    ax.set_title("Where the time goes, per stage", fontsize=11)
    ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0))  # outside: never hides a bar
    ax.grid(axis="x", alpha=0.3)
    return _done(fig, path, svg)


def plot_latency_distributions(samples: pd.DataFrame, df: pd.DataFrame | None = None, path=None,
                               svg: bool = False, max_points: int = 40) -> Figure:
    """Box plots of the raw samples per configuration (whiskers at the 1st and 99th percentiles)."""
    if samples is None or not len(samples):
        return _empty("no raw latency samples recorded", path, svg)
    labels = {}
    if df is not None and len(df):
        ok, _ = split_ok(df)
        labels = dict(zip(ok["point_id"], ok["label"]))
    groups = [(pid, g["ms"].to_numpy(dtype=float)) for pid, g in samples.groupby("point_id")
              if not labels or pid in labels]
    groups.sort(key=lambda t: np.median(t[1]))
    groups = groups[:max_points]
    if not groups:
        return _empty("no raw latency samples for successful points", path, svg)
    fig = Figure(figsize=(9, _height(len(groups))))
    ax = fig.add_subplot()
    ax.boxplot([g for _, g in groups], orientation="horizontal", whis=(1, 99), showfliers=True,
               flierprops={"markersize": 2, "alpha": 0.4}, medianprops={"color": "black"})
    ax.set_yticks(np.arange(1, len(groups) + 1), [_text(labels.get(p, p)) for p, _ in groups], fontsize=8)
    ax.invert_yaxis()
    ax.set_xlabel("latency per image (ms); box = p25-p75, whiskers = p1-p99")
    ax.set_title("Latency distributions", fontsize=11)
    ax.grid(axis="x", alpha=0.3)
    return _done(fig, path, svg)


def plot_accuracy_vs(df: pd.DataFrame, knob: str = "size", path=None, svg: bool = False) -> Figure:
    """mAP (with CI) against input size or proposal count, one line per model (and other knob)."""
    ok, _ = split_ok(df)
    if "map" not in ok.columns or not pd.to_numeric(ok["map"], errors="coerce").notna().any():
        return _empty("accuracy unavailable (untrained weights)", path, svg)
    other = "proposals" if knob == "size" else "size"
    ok = ok[pd.to_numeric(ok["map"], errors="coerce").notna()]
    if knob == "proposals":
        ok = ok[pd.to_numeric(ok["proposals"], errors="coerce").fillna(0) > 0]  # models without the knob
        if not len(ok):
            return _empty("no model with a proposal-count knob", path, svg)
    # Accuracy depends on the graph, not on the thread setting: one value per graph.
    cols = [c for c in ("map", "map_ci_lo", "map_ci_hi") if c in ok.columns]
    graph = ok.groupby(["model", "family", other, knob], dropna=False)[cols].mean().reset_index()
    fig = Figure(figsize=(8, 5))
    ax = fig.add_subplot()
    for (model, fam, o), g in graph.groupby(["model", "family", other], dropna=False):
        g = g.sort_values(knob)
        marker, colour = FAMILY_STYLE.get(fam, OTHER_STYLE)
        lo = g["map"] - g.get("map_ci_lo", g["map"])
        hi = g.get("map_ci_hi", g["map"]) - g["map"]
        name = f"{model} ({other} {int(o)})" if pd.notna(o) and graph[other].nunique() > 1 else str(model)
        ax.errorbar(g[knob], g["map"], yerr=[lo.fillna(0), hi.fillna(0)], marker=marker, capsize=3,
                    label=_text(name))
    ax.set_xlabel({"size": "input size (px)", "proposals": "proposal count"}.get(knob, knob))
    ax.set_ylabel(axis_name("map"))
    ax.set_title(f"Accuracy vs {knob}", fontsize=11)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    return _done(fig, path, svg)


def plot_memory(df: pd.DataFrame, path=None, svg: bool = False) -> Figure:
    """Peak RSS per configuration, split into imports, model load and inference."""
    ok = _configs(df, "rss_peak_mib")
    if not len(ok) or "rss_peak_mib" not in ok.columns or ok["rss_peak_mib"].isna().all():
        return _empty("no memory figures recorded", path, svg)
    imp = _num(ok, "rss_imports_mib").fillna(0).to_numpy()
    load = _num(ok, "rss_loaded_mib").fillna(0).to_numpy()
    peak = _num(ok, "rss_peak_mib").fillna(0).to_numpy()
    load = np.maximum(load, imp)
    peak = np.maximum(peak, load)
    fig = Figure(figsize=(9, _height(len(ok))))
    ax = fig.add_subplot()
    ypos = np.arange(len(ok))
    ax.barh(ypos, imp, color="#bab0ac", label="after imports")
    ax.barh(ypos, load - imp, left=imp, color="#4e79a7", label="+ model / session loaded")
    ax.barh(ypos, peak - load, left=load, color="#e15759", label="+ peak while running")
    ax.set_yticks(ypos, [_text(s) for s in ok["label"]], fontsize=8)
    ax.invert_yaxis()
    ax.set_xlabel("worker resident memory (MiB)")
    ax.set_title("Memory per configuration", fontsize=11)
    ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0))  # outside: never hides a bar
    ax.grid(axis="x", alpha=0.3)
    return _done(fig, path, svg)
