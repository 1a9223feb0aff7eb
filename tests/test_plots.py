"""Plots: structure of the figures (markers, frontier line, bars, boxes), files written, no crash on
odd input. Checked against the data they were drawn from, not against pictures."""
import numpy as np
import pandas as pd
import pytest
from matplotlib.figure import Figure

from speedbench.analyse import frontier
from speedbench.report import (plot_accuracy_vs, plot_frontier, plot_latency_distributions, plot_memory,
                               plot_stages)
from speedbench.schema import point_id


def _df():
    rows = []
    for model, fam, props in (("one$a", "one-stage", 0), ("two", "two-stage", 100)):
        for size in (256, 320):
            for t in (1, 2):
                cfg = dict(model=model, weights="demo", size=size, proposals=props, backend="ort", intra_threads=t,
                           inter_threads=1, exec_mode="sequential", opt_level="all", affinity=0, concurrency=1)
                ms = (5.0 if fam == "one-stage" else 15.0) * size / 256 / t
                m = (0.2 if fam == "one-stage" else 0.3) * size / 320
                rows.append(dict(cfg, point_id=point_id(cfg), family=fam, status="ok", lat_p50_ms=ms,
                                 lat_p50_ci_lo_ms=ms * 0.98, lat_p50_ci_hi_ms=ms * 1.02, map=m, map_ci_lo=m - 0.01,
                                 map_ci_hi=m + 0.01, fps=1000 / ms, stage_backbone_ms=ms * 0.6, stage_head_ms=ms * 0.3,
                                 rss_imports_mib=100.0, rss_loaded_mib=150.0, rss_peak_mib=180.0 + size))
    return pd.DataFrame(rows)


def _data_markers(ax):
    """(marker, x, y) of every plotted data point (error-bar caps excluded)."""
    out = []
    for ln in ax.get_lines():
        if ln.get_marker() in ("o", "s", "^") and ln.get_linestyle() in ("None", "none", ""):
            out += [(ln.get_marker(), (x,), (y,)) for x, y in zip(ln.get_xdata(), ln.get_ydata())]
    return out


def test_frontier_labels_in_a_crowded_cluster_do_not_overlap():
    # Ten configurations within 1 ms and 0.01 mAP of each other (ties, as in a real demo run):
    # each gets its own label and no two label texts overlap once rendered.
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.text import Text

    df = _df()
    crowd = pd.concat([df.iloc[[0]]] * 10, ignore_index=True)
    crowd["size"] = [224 + 8 * k for k in range(10)]
    crowd["point_id"] = [f"p{k}" for k in range(10)]
    crowd["lat_p50_ms"] = 10 + 0.1 * np.arange(10)
    crowd["lat_p50_ci_lo_ms"], crowd["lat_p50_ci_hi_ms"] = crowd["lat_p50_ms"] - 1, crowd["lat_p50_ms"] + 1
    crowd["map"] = 0.30 + 0.001 * np.arange(10)
    fig = plot_frontier(pd.concat([df, crowd], ignore_index=True))
    ax = fig.axes[0]
    renderer = FigureCanvasAgg(fig).get_renderer()
    boxes = [Text.get_window_extent(t, renderer) for t in ax.texts]
    assert len({t.get_text() for t in ax.texts}) == len(ax.texts) >= 10
    assert not [(i, j) for i in range(len(boxes)) for j in range(i + 1, len(boxes)) if boxes[i].overlaps(boxes[j])]


def test_frontier_plot_markers_line_and_labels(tmp_path):
    df = _df()
    fig = plot_frontier(df, tmp_path / "f.png", svg=True)
    assert (tmp_path / "f.png").stat().st_size > 0 and (tmp_path / "f.svg").read_text().lstrip().startswith("<?xml")
    ax = fig.axes[0]
    marks = _data_markers(ax)
    assert len(marks) == len(df)
    # One-stage and two-stage differ in marker shape (circle vs square), not only colour.
    one = {m for m, xs, ys in marks if xs[0] in set(df.loc[df.family == "one-stage", "lat_p50_ms"])
           and ys[0] in set(df.loc[df.family == "one-stage", "map"])}
    two = {m for m, xs, ys in marks if xs[0] in set(df.loc[df.family == "two-stage", "lat_p50_ms"])
           and ys[0] in set(df.loc[df.family == "two-stage", "map"])}
    assert one == {"o"} and two == {"s"}
    # The staircase goes through exactly the frontier points, fastest first.
    front = frontier(df).query("frontier_status == 'frontier'").sort_values("lat_p50_ms")
    steps = [ln for ln in ax.get_lines() if len(ln.get_xdata()) > 1 and ln.get_drawstyle().startswith("steps")]
    assert len(steps) == 1
    assert list(steps[0].get_xdata()) == list(front["lat_p50_ms"]) and list(steps[0].get_ydata()) == list(front["map"])
    texts = {t.get_text() for t in ax.texts}
    assert r"one\$a @ 320 / - / 2t" in texts  # "$" escaped so matplotlib does not read maths


def test_frontier_plot_without_accuracy_and_throughput_axis():
    df = _df().assign(map=np.nan, map_ci_lo=np.nan, map_ci_hi=np.nan)
    fig = plot_frontier(df)
    assert any("accuracy unavailable" in t.get_text() for t in fig.axes[0].texts)
    fig = plot_frontier(_df(), x="fps", minimize_x=False)
    assert fig.axes[0].get_xlabel() == "throughput (frames/s)"


def test_stage_bars_add_up():
    df = _df()
    fig = plot_stages(df)
    ax = fig.axes[0]
    widths = {}
    for patch in ax.patches:
        y = round(patch.get_y() + patch.get_height() / 2)
        widths[y] = widths.get(y, 0) + patch.get_width()
    want = sorted((df["stage_backbone_ms"] + df["stage_head_ms"]).round(6))
    assert sorted(round(w, 6) for w in widths.values()) == want


def test_latency_distributions_one_box_per_point():
    df = _df()
    rng = np.random.default_rng(0)
    samples = pd.DataFrame([(pid, i, v) for pid in df["point_id"] for i, v in enumerate(rng.normal(10, 1, 30))],
                           columns=["point_id", "i", "ms"])
    fig = plot_latency_distributions(samples, df)
    ax = fig.axes[0]
    assert len(ax.get_yticklabels()) == len(df)
    assert isinstance(plot_latency_distributions(samples.iloc[:0], df), Figure)


def test_accuracy_and_memory_plots(tmp_path):
    df = _df()
    fig = plot_accuracy_vs(df, "size", tmp_path / "acc.svg")
    assert (tmp_path / "acc.svg").exists()
    lines = [ln for ln in fig.axes[0].get_lines() if ln.get_marker() in ("o", "s") and len(ln.get_xdata()) > 1]
    assert len(lines) == 2 and all(list(ln.get_xdata()) == [256, 320] for ln in lines)
    fig = plot_memory(df)
    ax = fig.axes[0]
    # Three stacked segments per configuration ending at the peak.
    ends = sorted(round(p.get_x() + p.get_width(), 6) for p in ax.patches if p.get_width() > 0 and p.get_x() > 149)
    assert ends == sorted(df["rss_peak_mib"])


@pytest.mark.parametrize("fn", [plot_frontier, plot_stages, plot_memory, plot_accuracy_vs])
def test_empty_and_failed_only_input_does_not_crash(fn):
    df = pd.DataFrame([{"model": "x", "status": "failed", "reason": "boom", "lat_p50_ms": np.nan, "map": np.nan,
                        "rss_peak_mib": np.nan, "size": 320, "proposals": 0, "family": "one-stage"}])
    assert isinstance(fn(df), Figure)
