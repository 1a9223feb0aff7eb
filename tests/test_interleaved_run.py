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
from speedbench.sweep import load_run
from speedbench.sweep.interleaved import run_interleaved
from helpers import synthetic_profile

PROFILE = synthetic_profile("ab", timeout_s=60, repetitions={"min_reps": 10, "max_reps": 20, "max_seconds": 0.5},
                            synthetic={"work_ms": 10.0})


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
    # so no real difference exists; the verdict must not call one.
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
    # recorded order: per point, pairs AB / BA balanced, both halves of a pair adjacent
    for pid in {o[1] for o in order}:
        mine = sorted((o for o in order if o[1] == pid), key=lambda o: o[0])
        pairs = ["".join(o[3] for o in mine if o[2] == r) for r in range(4)]
        assert sorted(pairs) == ["AB", "AB", "BA", "BA"]
    with sqlite3.connect(out / "points.sqlite") as db:
        assert db.execute("SELECT COUNT(*) FROM env_invocations").fetchone()[0] == 16
        # interrupted run: the last pair of one point lost; --resume measures that pair again, whole
        db.execute("DELETE FROM env_invocations WHERE invocation = 3 AND point_id IN "
                   "(SELECT point_id FROM env_invocations LIMIT 1)")
    assert "planned pairs complete" not in text
    c = compare_run(out)
    assert any("7 of 8 planned pairs complete" in n for n in c.notes)
    run_interleaved(profile, sys.executable, sys.executable, out_dir=out, pairs=4, resume=True, quiet=True)
    with sqlite3.connect(out / "points.sqlite") as db:
        assert db.execute("SELECT COUNT(*) FROM env_invocations").fetchone()[0] == 16
    assert not any("planned pairs complete" in n for n in compare_run(out).notes)
    # the stored run can be judged again without measuring
    assert main(["compare", str(out), "--format", "json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["regressed"] is False and len(doc["points"]) == 2


def test_a_slower_environment_is_called_slower(tmp_path, profile, capsys):
    # The new environment stands for a slower stack: its interpreter runs the same speedbench with
    # the synthetic work scaled by 1.5 (a wrapper script around the test venv's interpreter).
    slow = _script(tmp_path / "slow-python", f'SPEEDBENCH_SYNTHETIC_FACTOR=1.5 exec "{sys.executable}" "$@"\n')
    code = main(["compare", "--envs", sys.executable, slow, str(profile), "-o", str(tmp_path / "run"),
                 "--pairs", "4", "-q"])
    text = capsys.readouterr().out
    assert code == 1, text
    c = compare_run(tmp_path / "run")
    assert (c.points["verdict"] == "slower").all()
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
    from speedbench.sweep import RunDir

    RunDir.create(tmp_path / "plain", "[run]\n", {"profile_name": "ab"}).close()
    with pytest.raises(UserError, match="not an interleaved run"):
        compare_run(tmp_path / "plain")
