"""Sizing arithmetic against hand-worked examples, the operational laws, and bad input.

The throughput tables below are constructed by hand (invented numbers, chosen so the
arithmetic is easy to follow); the real measurements are exercised in tests/test_load.py.
Laws used (textbook operational laws of queueing theory):
- utilisation law: U = X S (utilisation = throughput x service demand)
- Little's law: L = lambda W (mean number in the system = arrival rate x mean time in it)
"""
import math

import pandas as pd
import pytest

from speedbench.analyse.sizing import scaling_summary, size
from speedbench.cli import main
from speedbench.errors import UserError
from speedbench.schema import point_id


def row(model, k, t, tput, p99, mean, map_=None, host_cores=2, status="ok", **extra):
    r = dict(model=model, weights="demo", size=320, proposals=0, backend="ort", intra_threads=t,
             inter_threads=1, exec_mode="sequential", opt_level="all", affinity=0, concurrency=k,
             status=status, reason="", tput_fps=tput, tput_p99_ms=p99, tput_mean_ms=mean,
             cores_used=k * t, host_cores=host_cores, map=map_, host="testhost", **extra)
    r["point_id"] = point_id(r)
    return r


def table():
    return pd.DataFrame([
        # A: one thread per worker; K=1 gives 25 fps, K=2 gives 45 fps on the 2-core host.
        row("a", 1, 1, 25.0, 60.0, 40.0, map_=0.40),
        row("a", 2, 1, 45.0, 80.0, 44.4, map_=None),  # K>1 rows may lack accuracy
        # B: two threads, only K=1 (2 cores): 30 fps -> 15 fps/core, and less accurate than A.
        row("b", 1, 2, 30.0, 50.0, 33.3, map_=0.30),
        # C: slow but accurate: 10 fps on one core.
        row("c", 1, 1, 10.0, 120.0, 100.0, map_=0.50),
    ])


def pick(out, model, shape):
    got = out[(out["model"] == model) & (out["server_cores"] == shape)]
    assert len(got) == 1
    return got.iloc[0]


def test_hand_worked_40_cameras_at_10_fps():
    out = size(table(), streams=40, fps=10, p99_ms=70, server_cores=(2, 8, 16, 64), headroom=0.7,
               core_hour_cost=0.05)
    a8 = pick(out, "a", 8)
    # required = 40 x 10 = 400 frames/s
    assert a8["required_fps"] == 400
    # per-core fps at the largest measured K x T (K=2, T=1): 45 / 2 = 22.5; efficiency 45 / (2 x 25) = 0.9
    assert a8["per_core_fps"] == pytest.approx(22.5)
    assert a8["scaling_eff"] == pytest.approx(0.9)
    # cores needed = 400 / (22.5 x 0.7) = 400 / 15.75 = 25.397
    assert a8["cores_needed"] == pytest.approx(400 / 15.75)
    # 8-core server: 8 workers x 22.5 = 180 fps; servers = ceil(400 / (180 x 0.7)) = ceil(3.17) = 4
    assert a8["servers"] == 4 and a8["provisioned_cores"] == 32
    # capacity 4 x 180 = 720; utilisation 400 / 720 = 0.5556
    assert a8["capacity_fps"] == pytest.approx(720)
    assert a8["utilisation"] == pytest.approx(400 / 720)
    # measured utilisations on the 2-core host: K=1 -> 1/2 = 0.5, K=2 -> 2/2 = 1.0; 0.556 is nearest
    # 0.5, so the expected p99 is the K=1 under-load p99 of 60 ms, which meets the 70 ms target.
    assert a8["expected_p99_ms"] == 60.0 and a8["p99_at_util"] == 0.5
    assert a8["meets_p99"] is True or a8["meets_p99"] == True  # noqa: E712 (numpy bool)
    assert not a8["p99_beyond_measured"]
    # Little's law: frames in flight = 400 /s x 0.040 s = 16
    assert a8["in_flight"] == pytest.approx(16.0)
    # cost per million frames = 0.05 x 32 cores / (400 x 3600 frames per hour) x 1e6 = 1.6 / 1.44 = 1.111
    assert a8["cost_per_mframe"] == pytest.approx(1.6 / 1.44)
    # 8 cores > the 2 measured: extrapolated, and the assumption is spelled out.
    assert a8["extrapolated"]
    assert "linear in cores" in a8["assumption"] and "2 cores" in a8["assumption"]

    a16 = pick(out, "a", 16)
    # 16 x 22.5 = 360 fps per server; ceil(400 / 252) = ceil(1.587) = 2 servers, same 32 cores.
    assert a16["servers"] == 2 and a16["utilisation"] == pytest.approx(400 / 720)
    a64 = pick(out, "a", 64)
    # 64 x 22.5 = 1440 fps; ceil(400 / 1008) = 1 server; utilisation 400 / 1440 = 0.2778
    assert a64["servers"] == 1 and a64["utilisation"] == pytest.approx(400 / 1440)
    # cost: 0.05 x 64 / 1.44e6 x 1e6 = 2.222
    assert a64["cost_per_mframe"] == pytest.approx(3.2 / 1.44)
    a2 = pick(out, "a", 2)
    # the 2-core shape is what was measured: not extrapolated.
    # 2 x 22.5 = 45 fps; ceil(400 / 31.5) = ceil(12.70) = 13 servers; utilisation 400 / 585 = 0.684,
    # nearest measured utilisation 0.5 (|0.18| < |0.32|) -> 60 ms
    assert not a2["extrapolated"] and a2["assumption"].startswith("measured")
    assert a2["servers"] == 13 and a2["utilisation"] == pytest.approx(400 / 585)
    assert a2["expected_p99_ms"] == 60.0


def test_p99_nearest_measured_utilisation_and_beyond():
    # headroom 0.9 on 2-core servers: ceil(400 / (45 x 0.9)) = ceil(9.88) = 10 servers, 450 fps,
    # utilisation 400 / 450 = 0.889, nearest measured 1.0 (K=2) -> p99 80 ms > 70 ms target.
    out = size(table(), 40, 10, p99_ms=70, server_cores=[2], headroom=0.9)
    a2 = pick(out, "a", 2)
    assert a2["servers"] == 10 and a2["utilisation"] == pytest.approx(400 / 450)
    assert a2["expected_p99_ms"] == 80.0 and not a2["meets_p99"]
    # C was measured at K=1 only (utilisation 0.5 of its host): 10 fps/core, 2-core server -> 20 fps,
    # ceil(400 / 18) = 23 servers, 460 fps, utilisation 0.870 > 0.5 -> flagged beyond the measured range.
    c2 = pick(out, "c", 2)
    assert c2["servers"] == 23 and c2["utilisation"] == pytest.approx(400 / 460)
    assert c2["p99_beyond_measured"] and "beyond" in c2["p99_note"]


def test_paced_curve_gives_the_p99_with_queueing():
    import json

    df = table()
    # "load" = offered / capacity of the paced run; "util" = busy fraction it achieved (not used)
    curve = [{"load": 0.5, "util": 0.45, "p99_ms": 90.0, "mean_ms": 50.0, "status": "ok"},
             {"load": 0.8, "util": 0.71, "p99_ms": 140.0, "mean_ms": 70.0, "status": "ok"},
             {"util": None, "p99_ms": None, "mean_ms": None, "status": "failed: timed out"}]
    df["load_curve"] = [None, json.dumps(curve), None, None]  # on A's largest K (K=2)
    out = size(df, 40, 10, p99_ms=100, server_cores=[2, 8], headroom=0.9)
    a8 = pick(out, "a", 8)
    # 8-core: ceil(400 / (180 x 0.9) = 2.47) = 3 servers, 540 fps, utilisation 0.741 -> nearest paced
    # point 0.8 -> p99 140 ms (queueing included), misses the 100 ms target; mean 70 ms -> in flight
    # 400 x 0.070 = 28 (Little's law)
    assert a8["servers"] == 3 and a8["utilisation"] == pytest.approx(400 / 540)
    assert a8["expected_p99_ms"] == 140.0 and not a8["meets_p99"]
    assert "queueing included" in a8["p99_note"] and a8["in_flight"] == pytest.approx(28.0)
    a2 = pick(out, "a", 2)
    # 2-core: 10 servers, utilisation 0.889 > 0.8, the highest paced point: flagged beyond
    assert a2["p99_beyond_measured"] and a2["expected_p99_ms"] == 140.0
    # C has no curve: closed-loop figure, said so
    assert "no queueing" in pick(out, "c", 8)["p99_note"]


def test_threads_per_worker_set_the_workers_per_server():
    out = size(table(), 40, 10, server_cores=[1, 9], use_frontier=False)
    b9 = pick(out, "b", 9)
    # B: T=2, so a 9-core server runs floor(9 / 2) = 4 workers on 8 cores: 8 x 15 = 120 fps;
    # ceil(400 / 84) = ceil(4.76) = 5 servers (45 cores), utilisation 400 / 600 = 0.667
    assert b9["workers_per_server"] == 4 and b9["servers"] == 5
    assert b9["provisioned_cores"] == 45 and b9["utilisation"] == pytest.approx(400 / 600)
    b1 = pick(out, "b", 1)
    # a 1-core server cannot hold one 2-thread worker: no sizing, said so.
    assert math.isnan(b1["servers"]) and "cannot host" in b1["assumption"]


# tput_mean_ms of table()'s rows by (model, cores used / host cores)
MEAN_MS_AT = {("a", 0.5): 40.0, ("a", 1.0): 44.4, ("b", 1.0): 33.3, ("c", 0.5): 100.0}


def test_utilisation_law_and_littles_law_hold_for_every_row():
    out = size(table(), 7, 12.5, server_cores=(2, 8, 16, 32, 64), use_frontier=False)
    out = out[out["servers"].notna()]
    for r in out.to_dict("records"):
        # utilisation law U = X S: X = required fps, S = 1 / per-core fps core-seconds per frame,
        # divided by the cores doing the work (workers x threads on every server).
        busy_cores = r["servers"] * r["workers_per_server"] * r["intra_threads"]
        assert r["utilisation"] == pytest.approx(r["required_fps"] / r["per_core_fps"] / busy_cores)
        assert 0 < r["utilisation"] <= 0.7 + 1e-9  # never planned above the headroom
        # capacity with headroom covers the demand; one server fewer would not (servers is minimal).
        per_server = r["capacity_fps"] / r["servers"]
        assert r["servers"] * per_server * 0.7 >= r["required_fps"] - 1e-9
        assert (r["servers"] - 1) * per_server * 0.7 < r["required_fps"]
        # Little's law L = lambda W: frames in flight = arrival rate x mean time in the system,
        # W being the mean latency the table above measured at the utilisation the row looked up
        # (host of 2 cores: K x T = 1 core -> 0.5, 2 cores -> 1.0).
        w_ms = MEAN_MS_AT[(r["model"], r["p99_at_util"])]
        assert r["in_flight"] == pytest.approx(r["required_fps"] * w_ms / 1000.0)


def test_frontier_drops_dominated_configurations():
    out = size(table(), 40, 10)
    # B (15 fps/core, mAP 0.30) is beaten by A (22.5 fps/core, mAP 0.40) on both axes.
    assert set(out["model"]) == {"a", "c"}
    assert set(out["frontier_status"]) <= {"frontier", "tied"}
    everything = size(table(), 40, 10, use_frontier=False)
    assert set(everything["model"]) == {"a", "b", "c"}


def test_plain_table_without_ids_or_host():
    # a hand-built DataFrame (no point_id, no host) works; B is still dominated by A
    out = size(table().drop(columns=["point_id", "host"]), 40, 10, server_cores=[8])
    assert list(out["model"]) == ["a", "c"] and list(out["servers"]) == [4, 8]
    # C: 10 fps/core -> 80 fps per 8-core server; ceil(400 / 56) = ceil(7.14) = 8


def test_scaling_summary_recomputes_efficiency_from_rows():
    configs, excluded = scaling_summary(table().assign(scaling_eff=99.0))  # a stale column is ignored
    a = configs[configs["model"] == "a"].iloc[0]
    assert a["scaling_eff"] == pytest.approx(0.9) and a["measured_cores"] == 2
    assert a["map"] == 0.40  # accuracy taken from the K=1 row
    assert excluded.empty


def test_k1_throughput_from_a_single_stream_latency_row():
    # A sweep measures K=1 as a latency point (no tput_fps) and K=2 as a load point. One closed-loop
    # stream has X = 1 / W (Little's law with L = 1): mean latency 50 ms -> X(1) = 20 fps.
    lat_row = row("e", 1, 1, None, None, None, map_=0.6)
    lat_row.update(lat_mean_ms=50.0, lat_p99_ms=70.0)
    df = pd.DataFrame([lat_row, row("e", 2, 1, 36.0, 90.0, 55.0)])
    configs, _ = scaling_summary(df)
    e = configs.iloc[0]
    # efficiency = 36 / (2 x 20) = 0.9; per-core = 36 / 2 = 18
    assert e["x1_fps"] == pytest.approx(20.0) and e["scaling_eff"] == pytest.approx(0.9)
    assert e["per_core_fps"] == pytest.approx(18.0) and "single-stream" in e["k1_source"]
    out = size(df, 10, 10, server_cores=[8])
    # 100 fps / (8 x 18 x 0.7 = 100.8) -> 1 server; utilisation 100 / 144 = 0.694, nearest measured
    # utilisation 0.5 (K=1) -> p99 70 ms from the latency row
    assert out["servers"].iloc[0] == 1 and out["expected_p99_ms"].iloc[0] == 70.0


def test_configuration_without_k1_is_left_out_with_reason():
    df = pd.concat([table(), pd.DataFrame([row("d", 2, 1, 40.0, 90.0, 50.0, map_=0.9)])])
    out = size(df, 40, 10)
    assert "d" not in set(out["model"])
    ex = out.attrs["excluded"]
    assert list(ex["model"]) == ["d"] and "K=1" in ex["reason"].iloc[0]


@pytest.mark.parametrize("kwargs, field", [
    (dict(streams=40, fps=0), "fps"),
    (dict(streams=40, fps=-5), "fps"),
    (dict(streams=0, fps=10), "streams"),
    (dict(streams=-3, fps=10), "streams"),
    (dict(streams=2.5, fps=10), "streams"),
    (dict(streams="x", fps=10), "streams"),
    (dict(streams=4, fps=10, p99_ms=0), "p99_ms"),
    (dict(streams=4, fps=10, headroom=0), "headroom"),
    (dict(streams=4, fps=10, headroom=1.5), "headroom"),
    (dict(streams=4, fps=10, server_cores=[]), "server_cores"),
    (dict(streams=4, fps=10, server_cores=[8, 0]), "server_cores"),
    (dict(streams=4, fps=10, core_hour_cost=-1), "core_hour_cost"),
    (dict(streams=4, fps=float("nan")), "fps"),
])
def test_bad_arguments_are_one_line_errors(kwargs, field):
    with pytest.raises(UserError) as info:
        size(table(), **kwargs)
    assert field in str(info.value) and "\n" not in str(info.value)


def test_run_without_throughput_data():
    latency_only = table().drop(columns=["tput_fps"])
    with pytest.raises(UserError, match="no throughput data"):
        size(latency_only, 40, 10)
    with pytest.raises(UserError, match="no throughput data"):
        size(table().assign(tput_fps=float("nan")), 40, 10)
    with pytest.raises(UserError, match="no points"):
        size(pd.DataFrame(), 40, 10)


def test_empty_frontier():
    failed = table().assign(status="failed")
    with pytest.raises(UserError, match="frontier is empty"):
        size(failed, 40, 10)
    only_k2 = pd.DataFrame([row("d", 2, 1, 40.0, 90.0, 50.0, map_=0.9)])
    with pytest.raises(UserError, match="frontier is empty"):
        size(only_k2, 40, 10)


def test_cli_on_a_run_directory(tmp_path, capsys):
    from speedbench.sweep import RunDir

    rd = RunDir.create(tmp_path / "run", "# test\n", {"profile_name": "t", "env": {}})
    for r in table().assign(tput_cpu_util=0.45).to_dict("records"):
        rd.write_point({k: v for k, v in r.items() if v is not None}, [1.0, 2.0])
    rd.close()
    code = main(["size", str(tmp_path / "run"), "--streams", "40", "--fps", "10", "--p99-ms", "150",
                 "--server-cores", "8,16", "--core-hour-cost", "0.05"])
    out = capsys.readouterr().out
    assert code == 0
    assert "400 frames/s" in out and "extrapolated" in out and "linear in cores" in out
    assert "safety-relevant" in out
    assert "only 45% of their cores' CPU time" in out  # a contended measurement is called out
    # --json gives machine-readable records with the same arithmetic
    code = main(["size", str(tmp_path / "run"), "--streams", "40", "--fps", "10", "--server-cores", "8", "--json"])
    recs = pd.read_json(__import__("io").StringIO(capsys.readouterr().out))
    assert code == 0 and int(recs.loc[recs["model"] == "a", "servers"].iloc[0]) == 4


@pytest.mark.parametrize("argv, text", [
    (["--streams", "40", "--fps", "0"], "fps"),
    (["--streams", "0", "--fps", "10"], "streams"),
    (["--streams", "4", "--fps", "10", "--server-cores", "8,x"], "server_cores"),
])
def test_cli_bad_input_exit_2(tmp_path, capsys, argv, text):
    from speedbench.sweep import RunDir

    rd = RunDir.create(tmp_path / "run", "# test\n", {"profile_name": "t", "env": {}})
    for r in table().to_dict("records"):
        rd.write_point({k: v for k, v in r.items() if v is not None}, [1.0])
    rd.close()
    assert main(["size", str(tmp_path / "run"), *argv]) == 2
    err = capsys.readouterr().err
    assert err.startswith("speedbench: error:") and text in err and err.count("\n") == 1


def test_cli_missing_run_and_run_without_throughput(tmp_path, capsys):
    from speedbench.sweep import RunDir

    assert main(["size", str(tmp_path / "nope"), "--streams", "1", "--fps", "1"]) == 2
    assert "not found" in capsys.readouterr().err
    rd = RunDir.create(tmp_path / "lat", "# test\n", {"profile_name": "t", "env": {}})
    r = row("a", 1, 1, None, None, None)
    rd.write_point({k: v for k, v in r.items() if v is not None}, [1.0])
    rd.close()
    assert main(["size", str(tmp_path / "lat"), "--streams", "1", "--fps", "1"]) == 2
    assert "no throughput data" in capsys.readouterr().err


def test_text_calls_out_noise_and_untrained_weights():
    from speedbench.cli.size import render_text

    df = table()
    df.loc[df["model"] == "a", "weights"] = "none"
    df.loc[(df["model"] == "a") & (df["concurrency"] == 2), "tput_fps"] = 55.0  # 55 / (2 x 25) = 1.1
    out = size(df, 40, 10, server_cores=[8])
    a = out[out["model"] == "a"].iloc[0]
    assert a["scaling_eff"] == pytest.approx(1.1) and a["untrained"]
    text = render_text(out, with_p99=False, with_cost=False)
    assert "above 1 is measurement noise" in text and "untrained weights" in text


# --------------------------------------------------------------------------- several hosts
# Two hosts with different fingerprints, written through the sweep's RunDir (as tests/test_hosts.py
# does). Invented numbers chosen for easy arithmetic:
# edge-a (4 logical cores): A as in table(): K=1 25 fps, K=2 45 fps -> 22.5 fps/core; C: 10 fps/core, mAP 0.50.
# big-b (16 logical cores): A: K=1 50 fps, K=4 180 fps -> 45 fps/core, efficiency 180 / (4 x 50) = 0.9.
EDGE = {"cpu_model": "Example Edge CPU", "cores_logical": 4}
BIG = {"cpu_model": "Example Server CPU", "cores_logical": 16}


def write_host_run(path, host, env, rows):
    from speedbench.sweep import RunDir

    rd = RunDir.create(path, "# test\n", {"profile_name": "t", "host": host, "env": env})
    for r in rows:
        rd.write_point({k: v for k, v in dict(r, host=host).items() if v is not None}, [1.0, 2.0])
    rd.finish()
    rd.close()
    return path


def edge_rows():
    return [row("a", 1, 1, 25.0, 60.0, 40.0, map_=0.40, host_cores=4),
            row("a", 2, 1, 45.0, 80.0, 44.4, host_cores=4),
            row("c", 1, 1, 10.0, 120.0, 100.0, map_=0.50, host_cores=4)]


def big_rows():
    return [row("a", 1, 1, 50.0, 30.0, 20.0, map_=0.40, host_cores=16),
            row("a", 4, 1, 180.0, 40.0, 22.0, host_cores=16)]


@pytest.fixture(scope="module")
def two_hosts(tmp_path_factory):
    out = tmp_path_factory.mktemp("hosts")
    write_host_run(out / "edge-a", "edge-a", EDGE, edge_rows())
    write_host_run(out / "big-b", "big-b", BIG, big_rows())
    prices = out / "prices.csv"
    # USD per whole host-hour: edge-a 0.40 for 4 cores (0.10 per core-hour), big-b 2.40 for 16 (0.15)
    prices.write_text("host,usd_per_hour\nedge-a,0.40\nbig-b,2.40\n")
    return out


def test_two_hosts_sized_each_on_its_own_frontier(two_hosts):
    import speedbench.analyse as analyse
    from speedbench.analyse import combine, frontier, load_runs

    assert analyse.size is size and analyse.scaling_summary is scaling_summary  # the public face
    data = combine(load_runs([two_hosts]))
    configs, _ = scaling_summary(data.points)
    # One frontier over both hosts would drop edge-a's A (22.5 fps/core) behind big-b's A (45, same mAP) ...
    one = frontier(configs.drop(columns=["curve", "paced"]), x="per_core_fps", y="map", minimize_x=False)
    assert one.loc[one["label"] == "a @ 320 / - / 1t [edge-a]", "frontier_status"].iloc[0] == "dominated"
    # ... so sizing uses one frontier per host and edge-a keeps A.
    out = size(data, 40, 10, server_cores=[8, 16], core_hour_cost=0.05,
               prices={"edge-a": 0.40, "big-b": 2.40})
    assert sorted(set(zip(out["host"], out["model"]))) == [("big-b", "a"), ("edge-a", "a"), ("edge-a", "c")]
    assert out["label"].str.endswith("]").all()  # every label names its host

    def one_row(host, model, shape):
        got = out[(out["host"] == host) & (out["model"] == model) & (out["server_cores"] == shape)]
        assert len(got) == 1
        return got.iloc[0]

    e8, b8, b16 = one_row("edge-a", "a", 8), one_row("big-b", "a", 8), one_row("big-b", "a", 16)
    # edge-a A, 8 cores: 8 x 22.5 = 180 fps per server; ceil(400 / 126) = 4 servers, 32 cores.
    # usd_per_mframe: 0.40 / 4 cores = 0.10 per core-hour; 8-core server 0.80 /h;
    # 4 x 0.80 / (400 x 3600) x 1e6 = 3.2 / 1.44 = 2.222
    assert e8["servers"] == 4 and e8["priced_host_cores"] == 4
    assert e8["usd_per_server_hour"] == pytest.approx(0.80)
    assert e8["usd_per_mframe"] == pytest.approx(3.2 / 1.44)
    # big-b A, 8 cores: 8 x 45 = 360 fps; ceil(400 / 252) = 2 servers, 16 cores; 2.40 / 16 = 0.15 per
    # core-hour, 8-core server 1.20 /h; 2 x 1.20 / 1.44e6 x 1e6 = 1.667
    assert b8["servers"] == 2 and b8["per_core_fps"] == pytest.approx(45.0)
    assert b8["scaling_eff"] == pytest.approx(0.9)
    assert b8["usd_per_mframe"] == pytest.approx(2.4 / 1.44)
    # big-b A, 16 cores (its measured host size, 4 cores used): 720 fps, ceil(400 / 504) = 1 server,
    # priced as the whole host: 1 x 2.40 / 1.44 = 1.667
    assert b16["servers"] == 1 and b16["usd_per_server_hour"] == pytest.approx(2.40)
    assert b16["usd_per_mframe"] == pytest.approx(2.4 / 1.44)
    # --core-hour-cost stays a per-core price, the same on both hosts: 0.05 x 32 / 1.44 = 1.111 on
    # edge-a, 0.05 x 16 / 1.44 = 0.556 on big-b; it does not mix with the host prices.
    assert e8["cost_per_mframe"] == pytest.approx(1.6 / 1.44)
    assert b8["cost_per_mframe"] == pytest.approx(0.8 / 1.44)
    assert "2 hosts (edge-a, big-b)" in out.attrs["caution"] or "2 hosts (big-b, edge-a)" in out.attrs["caution"]
    assert "one host" not in out.attrs["caution"]


def test_host_price_falls_back_to_recorded_cores_and_names_unpriced_hosts():
    # a bare table, one host, no fingerprint: N = host_cores of its load rows (2 in table());
    # 0.20 USD per host-hour -> 0.10 per core-hour; A on 8 cores: 4 servers x 0.80 /h / 1.44 = 2.222
    out = size(table(), 40, 10, server_cores=[8], prices={"testhost": 0.20})
    a8 = pick(out, "a", 8)
    assert a8["priced_host_cores"] == 2 and a8["usd_per_mframe"] == pytest.approx(3.2 / 1.44)
    unpriced = size(table(), 40, 10, server_cores=[8], prices={"other": 1.0})
    assert unpriced["usd_per_mframe"].isna().all()
    assert "testhost has no price" in unpriced.attrs["price_notes"][0]


def test_cli_two_hosts_with_price_table(two_hosts, capsys):
    code = main(["size", str(two_hosts / "edge-a"), str(two_hosts / "big-b"), "--streams", "40", "--fps", "10",
                 "--server-cores", "8", "--price-table", str(two_hosts / "prices.csv")])
    out = capsys.readouterr().out
    assert code == 0
    assert "[edge-a]" in out and "[big-b]" in out and "usd_per_mframe" in out
    assert "2.222" in out and "1.667" in out           # the hand-worked figures above
    assert "price big-b: 2.4 USD per hour for its 16 logical cores" in out
    assert "each sized from its own measurements" in out and "safety-relevant" in out
    # a parent directory works too; --json records carry the host
    assert main(["size", str(two_hosts), "--streams", "40", "--fps", "10", "--server-cores", "8", "--json"]) == 0
    recs = pd.read_json(__import__("io").StringIO(capsys.readouterr().out))
    assert sorted(set(recs["host"])) == ["big-b", "edge-a"]


def test_cli_several_hosts_bad_input(two_hosts, tmp_path, capsys):
    # no run at all
    assert main(["size", str(tmp_path / "missing"), "--streams", "1", "--fps", "1"]) == 2
    assert "not found" in capsys.readouterr().err
    # a second machine under the label edge-a (other CPU): the hosts module refuses it, one line
    write_host_run(tmp_path / "impostor", "edge-a", BIG, big_rows())
    assert main(["size", str(two_hosts / "edge-a"), str(tmp_path / "impostor"),
                 "--streams", "1", "--fps", "1"]) == 2
    err = capsys.readouterr().err
    assert "two machines under one label" in err and err.count("\n") == 1
    # a broken price table names the file
    bad = tmp_path / "prices.csv"
    bad.write_text("host,usd_per_hour\nedge-a,free\n")
    assert main(["size", str(two_hosts), "--streams", "1", "--fps", "1", "--price-table", str(bad)]) == 2
    assert "prices.csv: line 2" in capsys.readouterr().err


# --------------------------------------------------------------------------- the answer first
def test_answer_cheapest_and_most_accurate_hand_worked():
    from speedbench.analyse.buy import best_per_configuration, best_plans

    # table(): A 22.5 fps/core (mAP 0.40), C 10 fps/core (mAP 0.50); B (15 fps/core, mAP 0.30) is
    # dominated by A and left off the frontier. 400 frames/s, headroom 0.7, core-hour price 0.05.
    out = size(table(), 40, 10, p99_ms=150, server_cores=(8, 16), headroom=0.7, core_hour_cost=0.05)
    best = best_plans(out)
    assert best["basis"][0] == "cost_per_mframe" and best["n_meeting"] == 4
    # A: 8-core -> 4 servers, 16-core -> 2 servers: 32 cores either way (test above), cost
    # 0.05 x 32 / (400 x 3600) x 1e6 = 1.111 per million frames; the tie goes to fewer servers.
    cheap = best["cheapest"]
    assert cheap["model"] == "a" and cheap["server_cores"] == 16 and cheap["servers"] == 2
    assert cheap["cost_per_mframe"] == pytest.approx(1.6 / 1.44)
    assert cheap["utilisation"] == pytest.approx(400 / 720) and cheap["expected_p99_ms"] == 60.0
    assert cheap["extrapolated"]  # 16 cores > the 2 measured
    # C: 8-core -> 80 fps per server, ceil(400 / 56) = 8 servers; 16-core -> 160 fps, ceil(400 / 112)
    # = 4 servers; 64 cores either way, cost 2.222; p99 120 ms <= 150: it meets, and is more accurate.
    acc = best["most_accurate"]
    assert acc["model"] == "c" and acc["server_cores"] == 16 and acc["servers"] == 4
    assert acc["cost_per_mframe"] == pytest.approx(3.2 / 1.44) and acc["map"] == 0.5
    # The short table: one row per configuration, on its cheapest shape that meets the target.
    short = best_per_configuration(out)
    assert list(short["model"]) == ["a", "c"] and list(short["server_cores"]) == [16, 16]

    # p99 <= 100 ms: C's 120 ms misses it, so the most accurate plan that meets it is A's.
    best = best_plans(size(table(), 40, 10, p99_ms=100, server_cores=(8, 16), core_hour_cost=0.05))
    assert best["most_accurate"]["model"] == "a" and best["cheapest"]["model"] == "a"
    # p99 <= 50 ms: nothing meets it; the closest plan is A at 60 ms.
    best = best_plans(size(table(), 40, 10, p99_ms=50, server_cores=(8, 16)))
    assert best["cheapest"] is None and best["most_accurate"] is None
    assert best["closest"]["model"] == "a" and best["closest"]["expected_p99_ms"] == 60.0


def test_no_plan_line_names_the_interval_it_was_judged_on():
    from speedbench.analyse.buy import answer_lines

    # The closest plan's expected p99 (60 ms) is under a 100 ms target, but its p99 interval's
    # upper bound (130 ms) is not: the line must say which figure decided, not only the 60 ms.
    out = size(table(), 40, 10, p99_ms=100, server_cores=(8,))
    out["judged_on"] = "p99 interval upper bound at utilisation 0.80"
    out["p99_ci_hi_ms"] = 130.0
    out["utilisation_hi"] = 0.8
    out["meets_p99"] = False
    (line,) = answer_lines(out, with_p99=True)
    assert line.startswith("No plan meets the target: the lowest expected p99 is 60.0 ms")
    assert "upper bound of its p99 interval, 130.0 ms at utilisation 0.80, it misses" in line
    out["judged_on"] = "point estimate (asked)"
    (line,) = answer_lines(out, with_p99=True)
    assert "interval" not in line


def test_answer_without_prices_counts_provisioned_cores():
    from speedbench.analyse.buy import best_plans

    # No price: the cheapest plan is the one with the fewest cores. On 2-core servers A needs
    # 13 servers (26 cores, see the first test), on 8-core ones 4 servers (32 cores).
    best = best_plans(size(table(), 40, 10, server_cores=(2, 8)))
    assert best["basis"][0] == "provisioned_cores"
    assert best["cheapest"]["model"] == "a" and best["cheapest"]["provisioned_cores"] == 26
    # C on 2-core servers: 20 fps each, ceil(400 / 14) = 29 servers = 58 cores; on 8-core ones
    # 8 servers = 64 cores: the most accurate plan is C on 29 x 2-core servers.
    assert best["most_accurate"]["model"] == "c" and best["most_accurate"]["servers"] == 29


def test_cli_leads_with_the_answer_and_states_shared_notes_once(tmp_path, capsys):
    from speedbench.sweep import RunDir

    rd = RunDir.create(tmp_path / "run", "# test\n", {"profile_name": "t", "env": {}})
    for r in table().to_dict("records"):
        rd.write_point({k: v for k, v in r.items() if v is not None}, [1.0, 2.0])
    rd.close()
    argv = ["size", str(tmp_path / "run"), "--streams", "40", "--fps", "10", "--p99-ms", "150",
            "--server-cores", "8,16", "--core-hour-cost", "0.05"]
    assert main(argv) == 0
    out = capsys.readouterr().out
    lines = out.splitlines()
    assert lines[0].startswith("required: 400 frames/s (40 streams x 10 fps with p99 <= 150 ms)")
    assert lines[1].startswith("  cheapest that meets the p99 target: a @ 320") and "2 x 16-core" in lines[1]
    assert "1.111" in lines[1] and "expected p99 60.0 ms" in lines[2] and "extrapolated beyond" in lines[2]
    assert lines[3].startswith("  most accurate: c @ 320") and "4 x 16-core" in lines[3]
    # the table: one row per frontier configuration by default, every shape with --all
    table_rows = [ln for ln in lines if ln.startswith(("a @", "c @"))]
    assert len(table_rows) == 2
    assert out.count("linear in cores") == 1  # the extrapolation note, once for every row
    assert main(argv + ["--all"]) == 0
    every = capsys.readouterr().out
    assert len([ln for ln in every.splitlines() if ln.startswith(("a @", "b @", "c @"))]) == 6
    assert every.count("linear in cores") == 1


def test_meets_p99_judged_on_the_interval_upper_bound_hand_worked():
    # The table of table() with 95 % intervals as the hierarchical bootstrap records them (invented):
    # A at K=1: 25 fps [22, 28], p99 60 ms [55, 66]; at K=2: 45 fps [40, 50], p99 80 ms [72, 95].
    # Utilisation law (operational analysis: Denning & Buzen, "The Operational Analysis of Queueing
    # Network Models", ACM Computing Surveys 10(3), 1978): U = X / capacity, so the capacity at the
    # throughput interval's lower bound gives the higher utilisation the plan may really run at.
    df = table()
    df["tput_fps_ci_lo"] = [22.0, 40.0, float("nan"), float("nan")]
    df["tput_p99_ci_hi"] = [66.0, 95.0, float("nan"), float("nan")]
    out = size(df, 40, 10, p99_ms=70, server_cores=[2, 8], headroom=0.7)
    a8 = pick(out, "a", 8)
    # 8-core: 4 servers, 32 workers; per-core fps lower bound 40 / 2 = 20 -> capacity 32 x 20 = 640,
    # utilisation_hi = 400 / 640 = 0.625, nearest measured 0.5 (K=1) -> p99 upper bound 66 <= 70: meets
    assert a8["servers"] == 4 and a8["utilisation_hi"] == pytest.approx(0.625)
    assert a8["p99_ci_hi_ms"] == 66.0 and a8["meets_p99"] == True  # noqa: E712 (numpy bool)
    assert a8["judged_on"].startswith("p99 interval upper bound")
    a2 = pick(out, "a", 2)
    # 2-core: 13 servers, 26 workers; capacity at the lower bound 26 x 20 = 520, utilisation_hi =
    # 400 / 520 = 0.769, nearest measured 1.0 (|0.231| < |0.269|) -> upper bound 95 ms > 70: misses,
    # although the point estimate (utilisation 0.684 -> 0.5 -> 60 ms) meets the target.
    assert a2["utilisation_hi"] == pytest.approx(400 / 520) and a2["p99_ci_hi_ms"] == 95.0
    assert a2["expected_p99_ms"] == 60.0 and a2["meets_p99"] == False  # noqa: E712
    # C records no interval: judged on its point estimate, and the row says so.
    assert "no p99 interval" in pick(out, "c", 8)["judged_on"]
    assert "upper bound" in out.attrs["judged"]

    # the opt-out judges on the point estimates: 60 ms <= 70 on the 2-core plan
    point = size(df, 40, 10, p99_ms=70, server_cores=[2], headroom=0.7, judge_on_interval=False)
    assert pick(point, "a", 2)["meets_p99"] == True and "point" in point.attrs["judged"]  # noqa: E712


def test_cli_states_how_meets_p99_is_judged_and_the_flag(tmp_path, capsys):
    from speedbench.sweep.rundir import RunDir

    df = table()
    df["tput_fps_ci_lo"] = [22.0, 40.0, float("nan"), float("nan")]
    df["tput_p99_ci_hi"] = [66.0, 95.0, float("nan"), float("nan")]
    rd = RunDir.create(tmp_path / "run", "", {"host": "testhost"})
    for r in df.to_dict("records"):
        rd.write_point(r, [])
    rd.close()
    argv = ["size", str(tmp_path / "run"), "--streams", "40", "--fps", "10", "--p99-ms", "70", "--server-cores", "2"]
    assert main(argv) == 0
    assert "judged on the upper bound of the p99 95 % interval" in capsys.readouterr().out
    assert main(argv + ["--judge-on-point"]) == 0
    assert "judged on the point estimates" in capsys.readouterr().out
