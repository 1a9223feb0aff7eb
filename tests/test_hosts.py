"""Combining runs from several hosts: host keys, per-host frontiers, a pick naming the host, prices.

The runs are written through the sweep's own RunDir (the real storage path) with a
constructed scenario whose answers are worked out by hand in the comments. Cost per
million frames is plain arithmetic: usd_per_hour / (frames_per_s x 3600) x 1e6.
"""
import json

import numpy as np
import pandas as pd
import pytest

from speedbench.analyse import add_costs, combine, frontier, load_prices, load_runs, pick
from speedbench.cli import main
from speedbench.errors import UserError
from speedbench.schema import point_id

# Host A is a small edge box, host B a larger machine twice as fast on every configuration.
ENV_A = {"cpu_model": "Example Edge CPU", "cores_logical": 4}
ENV_B = {"cpu_model": "Example Server CPU", "cores_logical": 16}
# (model, family, size) -> (p50 ms on host A, mAP)
CONFIGS = {("det-one", "one-stage", 256): (6.0, 0.20), ("det-one", "one-stage", 320): (9.0, 0.25),
           ("det-two", "two-stage", 256): (14.0, 0.30), ("det-two", "two-stage", 320): (20.0, 0.35)}


def _row(model, family, size, p50, m, concurrency=1, **extra):
    cfg = dict(model=model, weights="demo", size=size, proposals=100 if family == "two-stage" else 0,
               backend="ort", intra_threads=1, inter_threads=1, exec_mode="sequential", opt_level="all",
               affinity=0, concurrency=concurrency)
    return dict(cfg, point_id=point_id(cfg), family=family, status="ok", n_samples=30, lat_p50_ms=p50,
                lat_p50_ci_lo_ms=p50 * 0.98, lat_p50_ci_hi_ms=p50 * 1.02, fps=1000.0 / p50,
                map=m, map_ci_lo=m - 0.01, map_ci_hi=m + 0.01, rss_peak_mib=300.0, **extra)


def write_run(path, host, env, rows, fleet=None):
    from speedbench.sweep import RunDir

    meta = {"profile_name": "hosts", "host": host, "env": env}
    if fleet is not None:
        meta["fleet"] = fleet
    rd = RunDir.create(path, "[run]\nname = 'hosts'\n", meta)
    for r in rows:
        rd.write_point(r, list(np.full(5, r.get("lat_p50_ms") or 1.0)))
    rd.finish()
    rd.close()
    return path


def rows_for(speedup, keys=None):
    return [_row(m, fam, size, p50 / speedup, acc) for (m, fam, size), (p50, acc) in CONFIGS.items()
            if keys is None or (m, size) in keys]


@pytest.fixture(scope="module")
def fleet_out(tmp_path_factory):
    """A fleet-style output directory OUT/<label>/ with one run per host."""
    out = tmp_path_factory.mktemp("fleet")
    write_run(out / "edge-a", "edge-a", ENV_A, rows_for(1.0))
    # Host B also has a throughput row: det-two 256 with K=2 workers, 8 ms under load, 240 frames/s together.
    tput = _row("det-two", "two-stage", 256, 8.0, 0.30, concurrency=2, tput_fps=240.0)
    write_run(out / "cloud-b", "cloud-b", ENV_B, rows_for(2.0) + [tput])
    return out


def test_parent_directory_expands_to_one_run_per_host(fleet_out):
    runs = load_runs([fleet_out, fleet_out / "edge-a"])   # edge-a named twice: read once
    data = combine(runs)
    assert sorted(data.host_names) == ["cloud-b", "edge-a"] and data.multi_host
    assert len(data.points) == 9 and data.points["point_id"].is_unique
    # The same configuration on two hosts stays two rows, told apart by host.
    same = data.points[(data.points["model"] == "det-one") & (data.points["size"] == 256)]
    assert sorted(same["host"]) == ["cloud-b", "edge-a"]
    assert set(same["config_label"]) == {"det-one @ 256 / - / 1t"}


def test_per_host_frontiers(fleet_out):
    pts = combine(load_runs([fleet_out])).points
    f = frontier(pts, by="host")
    on = {h: sorted(zip(g["model"], g["size"], g["concurrency"]))
          for h, g in f[f["frontier_status"] == "frontier"].groupby("host")}
    # Within one host, faster always comes with lower mAP here: every point is on its host's frontier,
    # except B's K=2 row, which has the same mAP as B's K=1 det-two 256 at 8 ms > 7 ms, CIs apart.
    assert on["edge-a"] == sorted((m, s, 1) for (m, _, s) in CONFIGS)
    assert on["cloud-b"] == sorted((m, s, 1) for (m, _, s) in CONFIGS)
    k2 = f[(f["host"] == "cloud-b") & (f["concurrency"] == 2)].iloc[0]
    assert k2["frontier_status"] == "dominated" and k2["dominated_by"] == "det-two @ 256 / 100p / 1t [cloud-b]"
    # Across hosts (no `by`), B's point at the same mAP and half the latency beats every A point.
    across = frontier(pts)
    assert set(across.loc[across["host"] == "edge-a", "frontier_status"]) == {"dominated"}


def test_pick_names_the_host(fleet_out, capsys):
    pts = combine(load_runs([fleet_out])).points
    # 10 ms p50 budget: A fits det-one 256 (6 ms) and 320 (9 ms); B fits all four (det-two 320 at exactly 10 ms).
    p = pick(pts, 10.0)
    assert (p.best["host"], p.best["model"], p.best["size"]) == ("cloud-b", "det-two", 320)
    assert "det-two @ 320 / 100p / 1t on host cloud-b" in p.to_text()
    answers = dict(zip(p.per_host["host"], p.per_host["answer"]))
    assert answers["edge-a"].startswith("det-one @ 320 / - / 1t: p50 9.00 ms")
    # A 5 ms budget: nothing on A fits (its fastest is 6 ms), B's det-one 320 (4.5 ms) does.
    p = pick(pts, 5.0)
    answers = dict(zip(p.per_host["host"], p.per_host["answer"]))
    assert answers["edge-a"] == "nothing fits the limits (fastest p50 6.00 ms, best mAP 0.350)"
    assert main(["pick", str(fleet_out), "--budget-ms", "10"]) == 0
    out = capsys.readouterr().out
    assert "Best within p50 <= 10 ms: det-two @ 320 / 100p / 1t on host cloud-b" in out and "Per host:" in out


def test_cost_per_million_frames_worked_by_hand(fleet_out):
    pts = combine(load_runs([fleet_out])).points
    prices = {"edge-a": 0.10, "cloud-b": 0.80}
    c = add_costs(pts, prices).set_index(["host", "model", "size", "concurrency"])
    # A, det-one 256: 6 ms -> 166.67 frames/s -> 600 000 frames/h; 0.10 / 600 000 x 1e6 = 0.1667 USD.
    assert c.loc[("edge-a", "det-one", 256, 1), "usd_per_mframe"] == pytest.approx(0.10 / 600_000 * 1e6)
    # B, det-two 256 at K=2: 240 frames/s together -> 864 000 frames/h; 0.80 / 864 000 x 1e6 = 0.9259 USD.
    k2 = c.loc[("cloud-b", "det-two", 256, 2)]
    assert k2["usd_per_mframe"] == pytest.approx(0.80 / 864_000 * 1e6)
    assert "tput_fps" in k2["fps_source"]
    assert c.loc[("cloud-b", "det-two", 256, 1), "fps_source"].startswith("single stream")
    # Cheapest within 10 ms, no accuracy floor: A's det-one 256 at 0.1667 USD per million frames.
    p = pick(pts, 10.0, prices=prices)
    assert (p.best["host"], p.best["model"], p.best["size"]) == ("edge-a", "det-one", 256)
    assert any("whatever its accuracy" in n for n in p.notes)
    # With mAP >= 0.30 only B's det-two rows qualify: K=1 256 costs 0.80 / (142.86 x 3600) x 1e6 = 1.556,
    # K=2 256 costs 0.926, 320 costs 2.222 -> the K=2 throughput row is the cheapest.
    p = pick(pts, 10.0, prices=prices, min_map=0.30)
    assert (p.best["host"], p.best["model"], p.best["size"], p.best["concurrency"]) == ("cloud-b", "det-two", 256, 2)
    text = p.to_text()
    assert "Cheapest within p50 <= 10 ms" in text and "on host cloud-b" in text
    assert "$0.9259 per million frames" in text and "tput_fps" in text
    assert any("throughput point" in n and "2 workers run at once" in n for n in p.notes)
    # A host missing from the price table is left out, with the reason.
    p = pick(pts, 10.0, prices={"cloud-b": 0.80})
    assert p.best["host"] == "cloud-b"
    assert p.excluded.loc[p.excluded["host"] == "edge-a", "reason"].str.contains("no price for host 'edge-a'").all()


def test_price_tables(tmp_path):
    t = tmp_path / "p.toml"
    t.write_text('[prices]\nedge-a = 0.10\n"cloud b" = 0.8\n')
    assert load_prices(t) == {"edge-a": 0.10, "cloud b": 0.80}
    c = tmp_path / "p.csv"
    c.write_text("host,usd_per_hour\nedge-a,0.10\ncloud-b, 0.8\n")
    assert load_prices(c) == {"edge-a": 0.10, "cloud-b": 0.80}
    bad = {"neg.toml": ("[prices]\na = -1\n", "prices.a: price must be a positive"),
           "text.toml": ('[prices]\na = "cheap"\n', "prices.a"),
           "noprices.toml": ("[cost]\na = 1\n", "cost: unknown key"),
           "broken.toml": ("[prices\n", "not valid TOML"),
           "head.csv": ("name,price\na,1\n", "line 1: header"),
           "dup.csv": ("host,usd_per_hour\na,1\na,2\n", "line 3: host 'a' is listed twice"),
           "nan.csv": ("host,usd_per_hour\na,nan\n", "line 2: price must be"),
           "empty.csv": ("host,usd_per_hour\n", "lists no host"),
           "p.json": ("{}", "must be a .toml or .csv")}
    for name, (text, match) in bad.items():
        (tmp_path / name).write_text(text)
        with pytest.raises(UserError, match=match):
            load_prices(tmp_path / name)
    with pytest.raises(UserError, match="price table not found"):
        load_prices(tmp_path / "missing.toml")


def test_cli_pick_with_price_table(fleet_out, tmp_path, capsys):
    prices = tmp_path / "prices.csv"
    prices.write_text("host,usd_per_hour\nedge-a,0.10\ncloud-b,0.80\nspare,1.0\n")
    args = ["pick", str(fleet_out), "--budget-ms", "10", "--min-map", "0.3", "--price-table", str(prices)]
    assert main(args) == 0
    out = capsys.readouterr().out
    assert "no run for host(s) spare" in out
    assert "Cheapest within p50 <= 10 ms: det-two @ 256 / 100p / 1t / K=2 on host cloud-b" in out
    (tmp_path / "bad.csv").write_text("host,usd_per_hour\nedge-a,free\n")
    assert main(args[:-1] + [str(tmp_path / "bad.csv")]) == 2
    assert "bad.csv: line 2: price must be" in capsys.readouterr().err


def test_same_label_on_two_machines_is_refused(tmp_path):
    a = write_run(tmp_path / "a", "box", ENV_A, rows_for(1.0, {("det-one", 256)}))
    b = write_run(tmp_path / "b", "box", ENV_B, rows_for(2.0, {("det-one", 320)}))
    with pytest.raises(UserError, match=r"host 'box' has env.cpu_model 'Example Server CPU' here but "
                                        r"'Example Edge CPU' in .*a; two machines under one label"):
        combine(load_runs([a, b]))
    assert main(["pick", str(a), str(b), "--budget-ms", "10"]) == 2


def test_two_runs_of_one_host(tmp_path, capsys):
    a = write_run(tmp_path / "a", "box", ENV_A, rows_for(1.0, {("det-one", 256)}))
    b = write_run(tmp_path / "b", "box", ENV_A, rows_for(1.0, {("det-one", 320), ("det-two", 256)}))
    data = combine(load_runs([a, b]))
    # Disjoint configurations of one machine: merged into one host, ids and labels unchanged.
    assert data.host_names == ["box"] and not data.multi_host and len(data.points) == 3
    assert data.hosts.iloc[0]["points"] == 3 and len(data.hosts.iloc[0]["runs"]) == 2
    c = write_run(tmp_path / "c", "box", ENV_A, rows_for(1.0, {("det-one", 256)}))
    with pytest.raises(UserError, match=r"configuration det-one @ 256 / - / 1t on host 'box' is also in .*a"):
        combine(load_runs([a, c]))
    assert main(["frontier", str(a), str(c)]) == 2
    assert "is also in" in capsys.readouterr().err


def test_host_key_without_a_label_comes_from_the_fingerprint(tmp_path):
    env = {"cpu_model": "Example(R) Edge CPU(TM)  @ 2.0GHz", "cores_logical": 4}
    a = write_run(tmp_path / "a", "", env, [dict(r, host="") for r in rows_for(1.0, {("det-one", 256)})])
    data = combine(load_runs([a]))
    assert data.host_names == ["Example Edge @ 2.0GHz x4"]


def test_not_a_run_directory(tmp_path):
    (tmp_path / "empty").mkdir()
    with pytest.raises(UserError, match="empty: not a run directory, and holds no run directories"):
        load_runs([tmp_path / "empty"])
    with pytest.raises(UserError, match="run directory not found"):
        load_runs([tmp_path / "nope"])


def test_frontier_cli_per_host_and_plot(fleet_out, tmp_path, capsys):
    png = tmp_path / "hosts.png"
    assert main(["frontier", str(fleet_out), "--all", "-o", str(png)]) == 0
    out = capsys.readouterr().out
    assert "== host cloud-b: Example Server CPU, 16 logical cores" in out
    assert "== host edge-a: Example Edge CPU, 4 logical cores" in out
    assert "across hosts" in out and png.stat().st_size > 0


def test_host_plot_panels_share_accuracy_axis_markers_and_colours(fleet_out):
    from speedbench.report import plot_host_frontiers

    pts = combine(load_runs([fleet_out])).points
    fig = plot_host_frontiers(pts, titles={"edge-a": "edge-a\nshared machine: not for hardware comparison"})
    axes = [ax for ax in fig.axes if ax.has_data()]
    assert len(axes) == 2
    assert axes[0].get_shared_y_axes().joined(axes[0], axes[1])
    assert axes[0].get_title().startswith("cloud-b") and axes[1].get_title().startswith("edge-a")

    def styles(ax):
        # (marker, colour) of every plotted point series (error-bar caps, drawn as "|" and "_", left aside).
        return {(ln.get_marker(), ln.get_color()) for ln in ax.get_lines() if ln.get_marker() in ("o", "s", "^")}

    a, b = styles(axes[0]), styles(axes[1])
    assert a == b == {("o", "C0"), ("s", "C1")}   # det-one: circle, det-two: square, same colours on both hosts


def test_report_over_hosts_warns_about_a_shared_machine(tmp_path):
    from speedbench.report import render_html, render_markdown

    out = tmp_path / "fleet"
    write_run(out / "edge-a", "edge-a", ENV_A, rows_for(1.0), fleet={"shares_machine_with": ["edge-c"]})
    write_run(out / "cloud-b", "cloud-b", ENV_B, rows_for(2.0))
    (tmp_path / "prices.toml").write_text("[prices]\nedge-a = 0.10\ncloud-b = 0.80\n")
    prices = load_prices(tmp_path / "prices.toml")
    html = render_html(load_runs([out]), tmp_path / "r.html", budget_ms=10, prices=prices).read_text()
    # Prominent: a caution box right under the question, before the answer.
    warn = '<div class="warn"><strong>Caution.</strong> Host edge-a shared its machine with edge-c'
    assert warn in html and html.index(warn) < html.index("<pre>") < html.index("<h2>Hosts")
    assert "Per-host frontiers" in html and html.count("<img") >= 1
    assert "Cost per million frames" in html and "<td>edge-a (shared machine!)</td>" in html
    # The cheapest answer is on the shared host: the pick itself says it is not fit to compare hardware.
    assert "the pick&#x27;s host edge-a shared its machine with edge-c" in html
    assert "per-host comparisons are only as good as each host&#x27;s run conditions" in html
    md = render_markdown(load_runs([out]), tmp_path / "r.md", budget_ms=10, prices=prices).read_text()
    assert "Which host and configuration" in md and "cheapest" in md.lower()
    assert main(["report", str(out), "-o", str(tmp_path / "c.html"), "--budget-ms", "10",
                 "--price-table", str(tmp_path / "prices.toml")]) == 0


def test_combining_a_combined_table_again_changes_nothing(fleet_out):
    data = combine(load_runs([fleet_out]))
    again = combine(data.points)
    assert sorted(again.host_names) == sorted(data.host_names)
    cols = ["host", "point_id", "label", "config_label"]
    key = ["host", "point_id"]
    assert again.points[cols].sort_values(key).reset_index(drop=True).equals(
        data.points[cols].sort_values(key).reset_index(drop=True))


def test_same_cpu_under_two_labels_is_pointed_out(tmp_path, capsys):
    a = write_run(tmp_path / "a", "box-1", ENV_A, rows_for(1.0))
    b = write_run(tmp_path / "b", "box-2", ENV_A, rows_for(2.0))
    data = combine(load_runs([a, b]))
    assert data.multi_host and data.warnings() == [
        "hosts box-1, box-2 report the same CPU (Example Edge CPU, 4 logical cores): differences between them "
        "come from run conditions (load, frequency, neighbours) or the machine itself, not the CPU type"]
    assert main(["pick", str(a), str(b), "--budget-ms", "10"]) == 0
    assert "WARNING: hosts box-1, box-2 report the same CPU" in capsys.readouterr().out
