"""Host speed probe: recorded by every worker, and compare of two runs reports the host's own
speed change, says when a verdict may be the machine's, and shows the adjusted verdict beside it."""
import hashlib
import json

import numpy as np
import pytest

from speedbench.analyse import compare
from speedbench.analyse.hostspeed import adjust, probe_values
from speedbench.cli import main
from speedbench.measure import probe
from test_compare import _row, _run, _samples, _write


def _probe_cols(rng, n_rounds=5, scale=20.0):
    start, end = scale * np.exp(rng.normal(0, 0.02, n_rounds)), scale * np.exp(rng.normal(0, 0.02, n_rounds))
    rec = {"start": {"ms": float(np.median(start)), "hash_ms": start.tolist(), "copy_ms": [0.0] * n_rounds},
           "end": {"ms": float(np.median(end)), "hash_ms": end.tolist(), "copy_ms": [0.0] * n_rounds}}
    return {"probe_start_ms": rec["start"]["ms"], "probe_end_ms": rec["end"]["ms"], "probe_raw": json.dumps(rec)}


# The simulated runs measure each point in one worker process; compare reports such points
# ungated by default (replicated invocations), so the gate tests below opt in with
# gate_single_process=True to exercise the raw and probe-adjusted gates.
def _pair(host_factor=1.0, point_factor=1.0, n_points=12, seed=0, with_probe=(True, True)):
    """Two runs of n_points configurations; the new one's samples and probes scaled."""
    rng = np.random.default_rng(seed)
    rows_a, rows_b, sa, sb = [], [], [], []
    for k in range(n_points):
        a = _samples(rng)
        b = _samples(rng) * point_factor
        pa = _probe_cols(rng) if with_probe[0] else {}
        pb = _probe_cols(rng, scale=20.0 * host_factor) if with_probe[1] else {}
        rows_a.append(_row("m", a, size=100 + k, **pa))
        rows_b.append(_row("m", b, size=100 + k, **pb))
        sa.append(a)
        sb.append(b)
    return _run(rows_a, sa), _run(rows_b, sb)


def test_probe_work_is_the_documented_work():
    # The probe's hash is SHA-256 of the fixed block (reference: hashlib, i.e. FIPS 180-4), and
    # its copy really copies: checked on the same buffers the probe uses.
    src = memoryview(probe._BLOCK * 2)
    dst = bytearray(len(src))
    h_ms, c_ms = probe._one_round(src, dst)
    # > 0: the round returns elapsed times at all (structure, not a speed target; any real hash takes time)
    assert bytes(dst) == bytes(src) and h_ms > 0 and c_ms > 0
    assert hashlib.sha256(probe._BLOCK).hexdigest() == hashlib.sha256(bytes(range(256)) * 4096).hexdigest()
    out = probe.run_probe(rounds=3)
    assert len(out["hash_ms"]) == len(out["copy_ms"]) == 3
    totals = sorted(h + c for h, c in zip(out["hash_ms"], out["copy_ms"]))
    assert out["ms"] == pytest.approx(totals[1], abs=1e-3)


def test_every_worker_records_the_probe_at_start_and_end():
    from speedbench.measure import Point, Policy, measure_point

    policy = Policy(warmup_min=1, warmup_max=2, min_reps=5, max_reps=10, max_seconds=0.3, profile_stages=False)
    point = Point("synthetic", backend="synthetic", size=320, options={"work_ms": 1.0, "mode": "sleep"})
    res = measure_point(point, [np.zeros((8, 8, 3), np.uint8)], policy, timeout_s=60)
    assert res.ok, res.reason
    row = res.to_row()
    assert row["probe_start_ms"] > 0 and row["probe_end_ms"] > 0
    raw = json.loads(row["probe_raw"])
    assert len(raw["start"]["hash_ms"]) == probe.ROUNDS and len(raw["end"]["copy_ms"]) == probe.ROUNDS
    assert raw["start"]["version"] == probe.PROBE_VERSION
    # one reading per worker process: the mean of its start and end probes
    import pandas as pd

    assert probe_values(pd.DataFrame([row]))[0] == pytest.approx((row["probe_start_ms"] + row["probe_end_ms"]) / 2)


def test_machine_slower_as_a_whole_is_named_and_adjusted():
    # The whole host 10 % slower in the new run: every point and the probe move together.
    base, new = _pair(host_factor=1.10, point_factor=1.10)
    c = compare(base, new, gate_single_process=True)
    assert c.host["status"] == "recorded" and c.host["exceeds"]
    assert 1.08 < c.host["ratio"] < 1.12 and c.host["ci_lo"] > 1.05
    assert (c.points["verdict"] == "slower").mean() > 0.5 and c.regressed      # the raw gate stays raw
    assert (c.points["adj_verdict"] == "unchanged").all()
    text = c.to_text()
    assert "verdicts may be the machine's" in text and "probe-adjusted ratio [CI]" in text
    assert "adjusted verdict" in c.to_markdown()
    assert json.loads(c.to_json())["host_speed"]["exceeds"] is True
    gated = compare(base, new, host_adjusted=True, gate_single_process=True)
    assert not gated.regressed and "probe-adjusted verdict" in gated.to_text()


def test_real_slowdown_on_a_steady_host_and_under_host_drift():
    base, new = _pair(host_factor=1.0, point_factor=1.15)
    c = compare(base, new, gate_single_process=True)
    assert not c.host["exceeds"] and "within the 5% threshold" in c.to_text()
    assert (c.points["verdict"] == "slower").all() and c.regressed
    assert "adjusted verdict" not in c.to_text()           # nothing differs: no extra columns
    # a 15 % regression hidden by a machine that got 10 % faster: raw says unchanged, adjusted says slower
    base, new = _pair(host_factor=1 / 1.10, point_factor=1.15 / 1.10)
    c = compare(base, new, host_adjusted=True, gate_single_process=True)
    assert (c.points["adj_verdict"] == "slower").all() and c.regressed
    assert "adjusted verdict" in c.to_text()


def test_adjusted_interval_close_to_a_joint_bootstrap():
    # Reference: the direct definition, a percentile bootstrap (Efron & Tibshirani, ch. 13) of
    # (median new / median base) / (median probe new / median probe base), all four resampled.
    rng = np.random.default_rng(11)
    a, b = _samples(rng, n=300), _samples(rng, n=300) * 1.2
    pa, pb = 20 * np.exp(rng.normal(0, 0.05, 40)), 22 * np.exp(rng.normal(0, 0.05, 40))
    boot = np.random.default_rng(12)

    def med(x, k=4000):
        return np.median(x[boot.integers(0, len(x), (k, len(x)))], axis=1)

    joint = (med(b) / med(a)) / (med(pb) / med(pa))
    lo_ref, hi_ref = np.quantile(joint, [0.025, 0.975])
    from speedbench.analyse import bootstrap_ratio

    r = bootstrap_ratio(a, b, 0.95, 4000, np.random.default_rng(1))
    h = bootstrap_ratio(pa, pb, 0.95, 4000, np.random.default_rng(2))
    out = adjust({"ratio": r[0], "ci_lo": r[1], "ci_hi": r[2]},
                 {"ratio": h[0], "ci_lo": h[1], "ci_hi": h[2]}, 0.05)
    assert out["adj_ratio"] == pytest.approx(r[0] / h[0])
    assert out["adj_ci_lo"] == pytest.approx(lo_ref, rel=0.01) and out["adj_ci_hi"] == pytest.approx(hi_ref, rel=0.01)


def test_old_runs_without_probe_still_compare(tmp_path, capsys):
    base, new = _pair(with_probe=(False, True))
    c = compare(base, new)
    assert c.host["status"].startswith("not recorded in") and "adj_verdict" not in c.points.columns
    assert "Host speed probe: not recorded" in c.to_text()
    b = _write(tmp_path / "old", base)
    n = _write(tmp_path / "new", new)
    assert main(["compare", str(b), str(n)]) == 0
    assert "not recorded in" in capsys.readouterr().out
    assert main(["compare", str(b), str(n), "--host-adjusted"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--host-adjusted" in err[0] and "not recorded" in err[0]
