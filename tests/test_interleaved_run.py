"""`speedbench compare --envs`: an interleaved A/B run end to end through real interpreters and
worker processes (synthetic backend: the harness test backend, sleeping a known time per run)."""
import json
import sqlite3
import stat
import sys

import pytest

from speedbench.analyse.interleaved import compare_run
from speedbench.cli import main
from speedbench.errors import UserError
from speedbench.measure.result import PointResult, combine_invocations
from speedbench.schema import point_id
from speedbench.sweep import RunDir, load_run
from speedbench.sweep.interleaved import run_interleaved

PROFILE = """
[run]
name = "ab"
timeout_s = 60

[dataset]
scenes = {count = 1}
accuracy = false

[sweep]
sizes = [64, 96]
proposals = [10]
backends = ["synthetic"]

[[models]]
id = "synthetic"

[[threads]]
intra = 1

[repetitions]
invocations = 3
warmup_min = 1
warmup_max = 2
min_reps = 10
max_reps = 20
max_seconds = 0.5
stages = false

[synthetic]
work_ms = 10.0
mode = "sleep"
"""


def _script(path, body):
    path.write_text("#!/bin/sh\n" + body)
    path.chmod(path.stat().st_mode | stat.S_IXUSR)
    return str(path)


@pytest.fixture
def profile(tmp_path):
    p = tmp_path / "ab.toml"
    p.write_text(PROFILE)
    return p


def test_same_interpreter_twice_is_a_true_aa(tmp_path, profile, capsys):
    # The test venv's own interpreter as both environments: sleeping 10 ms per run on both sides,
    # so no real difference exists; the verdict must not call one. The profile asks for 3 worker
    # processes per point; --pairs 4 gives each side 4, one per pair.
    out = tmp_path / "run"
    code = main(["compare", "--envs", sys.executable, sys.executable, str(profile), "-o", str(out),
                 "--pairs", "4", "-q"])
    text = capsys.readouterr().out
    assert code == 0, text
    assert "no regression" in text and "interleaved run: 4 A/B pair(s)" in text
    df = load_run(out)
    assert sorted(df["env"]) == ["A", "A", "B", "B"]
    assert (df["invocations"] == 4).all() and df["env_fingerprint"].nunique() == 1
    assert (df["env_python"] == sys.executable).all()
    assert df["probe_start_ms"].gt(0).all()
    meta = json.loads((out / "meta.json").read_text())
    order = meta["interleaved"]["order"]
    assert len(order) == 2 * 4 * 2
    _check_store(out, pairs=4)
    with sqlite3.connect(out / "points.sqlite") as db:
        # interrupted run: the last pair of one point lost; --resume measures that pair again, whole
        db.execute("DELETE FROM invocations WHERE invocation = 3 AND point_id IN "
                   "(SELECT point_id FROM invocations LIMIT 1)")
    assert "planned pairs complete" not in text
    c = compare_run(out)
    assert any("7 of 8 planned pairs complete" in n for n in c.notes)
    run_interleaved(profile, sys.executable, sys.executable, out_dir=out, pairs=4, resume=True, quiet=True)
    _check_store(out, pairs=4)
    assert not any("planned pairs complete" in n for n in compare_run(out).notes)
    # the stored run can be judged again without measuring
    assert main(["compare", str(out), "--format", "json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["regressed"] is False and len(doc["points"]) == 2


def _check_store(out, pairs):
    """The interleaved run's worker processes are in the sweep's `invocations` table (no second
    table), keyed by each side's point_id, one per side and pair; the samples table tags every
    sample with its invocation; each side's row is the sweep's finish_point over them; and each
    pair is two invocations adjacent in the recorded order, counted once by the verdict."""
    order = json.loads((out / "meta.json").read_text())["interleaved"]["order"]
    at = {seq: (pid, pair, side) for seq, pid, pair, side in order}
    with RunDir.open(out, readonly=True) as rd:
        results, samples = rd.invocation_results(), rd.samples()
        rows = {r["point_id"]: r for r in rd.rows()}
    with sqlite3.connect(out / "points.sqlite") as db:
        tables = {r[0] for r in db.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    assert "env_invocations" not in tables
    assert set(results) == set(rows) and len(rows) == 4
    slots = {}
    for side_id, got in results.items():
        row = rows[side_id]
        assert sorted(got) == list(range(pairs))                  # one worker process per pair and side
        mine = samples[samples["point_id"] == side_id]
        assert sorted(mine["invocation"].unique()) == list(range(pairs))
        for k, d in got.items():
            r = PointResult.from_dict(d)
            assert r.ok and r.point.env == row["env"] and r.extra["pair"] == k
            assert list(mine.loc[mine["invocation"] == k, "ms"]) == d["samples_ms"]
            config_id = point_id({**r.point.config(), "env": ""})
            assert at[r.extra["slot"]] == (config_id, k, row["env"])     # where the order put it
            slots.setdefault((config_id, k), {})[row["env"]] = r.extra["slot"]
        # the side's row: the sweep's finishing step (hierarchical bootstrap) over its invocations
        combined = combine_invocations([PointResult.from_dict(got[k]) for k in sorted(got)]).to_row()
        assert row["lat_p50_ms"] == pytest.approx(combined["lat_p50_ms"])
        assert row["lat_p50_ci_hi_ms"] == pytest.approx(combined["lat_p50_ci_hi_ms"])
        assert row["invocations"] == pairs and str(pairs) in row["ci_scope"]
    # each pair: its A and its B run one right after the other
    assert len(slots) == 2 * pairs and all(abs(s["A"] - s["B"]) == 1 for s in slots.values())
    c = compare_run(out)
    assert (c.points["pairs"] == pairs).all()
    assert (c.points["n_base"] == pairs).all() and (c.points["n_new"] == pairs).all()


def test_a_slower_environment_is_called_slower(tmp_path, profile, capsys):
    # The new environment stands for a slower stack: its interpreter runs the same speedbench with
    # the synthetic work scaled by 1.5 (a wrapper script around the test venv's interpreter).
    slow = _script(tmp_path / "slow-python", f'SPEEDBENCH_SYNTHETIC_FACTOR=1.5 exec "{sys.executable}" "$@"\n')
    # no --pairs: as many pairs as the profile's invocations (3 worker processes per side)
    code = main(["compare", "--envs", sys.executable, slow, str(profile), "-o", str(tmp_path / "run"), "-q"])
    text = capsys.readouterr().out
    assert code == 1, text
    c = compare_run(tmp_path / "run")
    assert (c.points["verdict"] == "slower").all() and (c.points["pairs"] == 3).all()
    assert all(1.35 < r < 1.65 for r in c.points["ratio"])


def test_bad_interpreters_are_one_line_errors(tmp_path, profile, capsys):
    older = _script(tmp_path / "older-python", "echo '{\"speedbench\": \"0.0.9\", \"python\": \"3.11.7\"}'\n")
    cases = [
        ([str(tmp_path / "no" / "python"), sys.executable], "interpreter not found"),
        ([sys.executable, older], "speedbench versions differ"),
    ]
    for envs, expected in cases:
        code = main(["compare", "--envs", *envs, str(profile), "-o", str(tmp_path / "never"), "-q"])
        err = capsys.readouterr().err.strip().splitlines()
        assert code == 2 and len(err) == 1 and expected in err[0], err
        assert not (tmp_path / "never").exists()     # refused before anything was created
    assert "0.0.9" in err[0] and older in err[0]
    assert main(["compare", "--envs", sys.executable, sys.executable]) == 2
    assert "give exactly one profile" in capsys.readouterr().err
    assert main(["compare", "a", "b", "--pairs", "3"]) == 2
    assert "--pairs: only with --envs" in capsys.readouterr().err
    RunDir.create(tmp_path / "plain", "[run]\n", {"profile_name": "ab"}).close()
    with pytest.raises(UserError, match="not an interleaved run"):
        compare_run(tmp_path / "plain")


# The table an interleaved run kept its worker runs in before it used the sweep's `invocations`
# table (the DDL of that version, verbatim): such run directories must still be judged.
_OLD_TABLE = """CREATE TABLE env_invocations (point_id TEXT NOT NULL, invocation INTEGER NOT NULL,
    seq INTEGER NOT NULL, row TEXT NOT NULL, samples TEXT NOT NULL, PRIMARY KEY (point_id, invocation))"""


def _old_interleaved_run(path, profile_text, slower=1.0):
    """An interleaved run directory as the earlier version wrote it: points rows per side and one
    env_invocations row per worker run (with its pair and median), no `invocations` table."""
    from speedbench.sweep.plan import expand_plan
    from speedbench.sweep.profile import parse_profile

    planned = expand_plan(parse_profile(profile_text, "ab.toml")).points
    envs = {s: {"python": sys.executable, "fingerprint": "f", "env": {"python": "3"}} for s in "AB"}
    order, seq = [], 0
    rd = RunDir.create(path, profile_text, {"profile_name": "ab", "interleaved": {
        "envs": envs, "pairs": 4, "seed": 0, "graph_mode": "own", "order": order}})
    with rd:
        for p in planned:
            for side in "AB":
                sid = point_id({**p.config, "env": side})
                rd.write_point({**p.config, "env": side, "point_id": sid, "status": "ok", "lat_p50_ms": 10.0}, [])
    with sqlite3.connect(path / "points.sqlite") as db:
        db.execute(_OLD_TABLE)
        for p in planned:
            for pair in range(4):
                for side in ("AB" if pair % 2 == 0 else "BA"):
                    ms = 10.0 * (1 + 0.01 * pair) * (slower if side == "B" else 1.0)
                    row = {**p.config, "env": side, "config_id": p.point_id, "pair": pair, "status": "ok",
                           "lat_p50_ms": ms, "invocation": pair, "slot": seq}
                    db.execute("INSERT INTO env_invocations VALUES (?, ?, ?, ?, ?)",
                               (point_id({**p.config, "env": side}), pair, seq, json.dumps(row), json.dumps([ms])))
                    order.append([seq, p.point_id, pair, side])
                    seq += 1
    meta = json.loads((path / "meta.json").read_text())
    meta["interleaved"]["order"] = order
    (path / "meta.json").write_text(json.dumps(meta))


def test_run_made_with_the_old_env_invocations_table_still_loads(tmp_path, profile, capsys):
    old = tmp_path / "old"
    _old_interleaved_run(old, PROFILE, slower=1.3)
    assert sorted(load_run(old)["env"]) == ["A", "A", "B", "B"]
    c = compare_run(old)
    assert (c.points["pairs"] == 4).all() and (c.points["verdict"] == "slower").all()
    assert c.points["ratio"].tolist() == pytest.approx([1.3, 1.3])
    assert main(["compare", str(old)]) == 1
    capsys.readouterr()
    # it cannot be continued: resume refuses in one line, naming the database file
    code = main(["compare", "--envs", sys.executable, sys.executable, str(profile), "-o", str(old), "--pairs", "4",
                 "--resume", "-q"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "env_invocations" in err[0] and "points.sqlite" in err[0], err
    # a damaged row of that table: one line naming the file, not a traceback
    with sqlite3.connect(old / "points.sqlite") as db:
        db.execute("UPDATE env_invocations SET row = '{not json' WHERE seq = 3")
    assert main(["compare", str(old)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and str(old / "points.sqlite") in err[0] and "env_invocations" in err[0], err
