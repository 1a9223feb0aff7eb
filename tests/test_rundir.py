"""Run directory: atomic write / replace / reopen, loaders, and clear errors on damage."""
import json
import math
import sqlite3

import pytest

from speedbench import schema
from speedbench.errors import UserError
from speedbench.sweep import RunDir, load_meta, load_run, load_samples


def _row(pid, **kw):
    row = {"point_id": pid, "model": "m", "weights": "none", "size": 320, "proposals": 0,
           "backend": "ort", "intra_threads": 1, "inter_threads": 1, "exec_mode": "sequential",
           "opt_level": "all", "affinity": 0, "concurrency": 1, "status": "ok",
           "lat_p50_ms": 10.0}
    row.update(kw)
    return row


def test_create_write_reopen_and_replace(tmp_path):
    rd = RunDir.create(tmp_path / "run", "[run]\nname = 'x'\n", {"profile_name": "x", "host": "h1"})
    rd.write_point(_row("a"), [1.0, 2.0, 3.0])
    rd.write_point(_row("b", status="failed", reason="timeout", lat_p50_ms=float("nan")), [])
    rd.close()

    rd = RunDir.open(tmp_path / "run")
    assert rd.done_ids() == {"a", "b"}
    # Same point_id again replaces the row and its samples; it is not a second row.
    rd.write_point(_row("a", lat_p50_ms=12.5, extra_note="re-measured"), [4.0, 5.0])
    rd.finish()
    rd.close()

    df = load_run(tmp_path / "run")
    assert len(df) == 2 and sorted(df["point_id"]) == ["a", "b"]
    # Every schema column is present, extra columns come along.
    for col in (*schema.CONFIG_COLUMNS, *schema.RESULT_COLUMNS):
        assert col in df.columns
    assert "extra_note" in df.columns
    a = df.set_index("point_id").loc["a"]
    assert a["lat_p50_ms"] == 12.5
    b = df.set_index("point_id").loc["b"]
    assert b["status"] == "failed" and b["reason"] == "timeout"
    assert math.isnan(b["lat_p50_ms"]) and math.isnan(b["map"])  # missing numeric -> NaN
    assert df["size"].dtype.kind == "i"

    s = load_samples(tmp_path / "run")
    assert list(s.columns) == ["point_id", "i", "ms", "invocation"]
    assert s[s.point_id == "a"]["ms"].tolist() == [4.0, 5.0]
    assert (s.point_id == "b").sum() == 0

    meta = load_meta(tmp_path / "run")
    for key in ("profile_name", "host", "started", "finished", "speedbench_version", "env"):
        assert key in meta
    assert meta["finished"] and meta["host"] == "h1"
    for key in ("cpu_model", "cpu_flags", "cores_logical", "mem_gib", "os", "python", "packages",
                "thread_env", "git_rev"):
        assert key in meta["env"]
    assert meta["env"]["packages"]["numpy"]

    # The CSV copy is regenerated after each write and matches the table.
    import pandas as pd

    csv = pd.read_csv(tmp_path / "run" / "points.csv")
    assert sorted(csv["point_id"]) == ["a", "b"]
    pytest.importorskip("pyarrow")
    pq = pd.read_parquet(tmp_path / "run" / "points.parquet")
    assert sorted(pq["point_id"]) == ["a", "b"] and list(pq.columns) == list(df.columns)
    assert (tmp_path / "run" / "profile.toml").read_text().startswith("[run]")


def test_create_refuses_existing_run(tmp_path):
    RunDir.create(tmp_path / "run", "", {"env": {}}).close()
    with pytest.raises(UserError, match="already holds a run"):
        RunDir.create(tmp_path / "run", "", {"env": {}})


def test_open_missing_and_non_run_dirs(tmp_path):
    with pytest.raises(UserError, match="not found"):
        load_run(tmp_path / "nope")
    (tmp_path / "empty").mkdir()
    with pytest.raises(UserError, match="not a run directory"):
        load_run(tmp_path / "empty")
    (tmp_path / "file.txt").write_text("x")
    with pytest.raises(UserError, match="not a run directory"):
        load_run(tmp_path / "file.txt")


def test_corrupt_database_and_missing_table(tmp_path):
    RunDir.create(tmp_path / "run", "", {"env": {}}).close()
    db = tmp_path / "run" / "points.sqlite"
    con = sqlite3.connect(db)
    con.execute("DROP TABLE samples")
    con.commit()
    con.close()
    with pytest.raises(UserError, match=r"points.sqlite: missing table 'samples'"):
        load_run(tmp_path / "run")

    db.write_bytes(b"this is not a database" * 100)
    with pytest.raises(UserError, match=r"points.sqlite: corrupt"):
        load_run(tmp_path / "run")

    db.unlink()
    with pytest.raises(UserError, match=r"points.sqlite: missing"):
        load_run(tmp_path / "run")


def test_corrupt_meta(tmp_path):
    RunDir.create(tmp_path / "run", "", {"env": {}}).close()
    (tmp_path / "run" / "meta.json").write_text("{not json")
    with pytest.raises(UserError, match=r"meta.json: corrupt"):
        load_meta(tmp_path / "run")


def test_row_values_survive_roundtrip(tmp_path):
    import numpy as np

    rd = RunDir.create(tmp_path / "run", "", {"env": {}})
    rd.write_point(_row("a", lat_p50_ms=np.float32(7.25), untrained=True, noisy=np.bool_(False)), [1.5])
    rd.close()
    df = load_run(tmp_path / "run")
    assert df.loc[0, "lat_p50_ms"] == 7.25 and bool(df.loc[0, "untrained"]) is True
    raw = json.loads(sqlite3.connect(tmp_path / "run" / "points.sqlite").execute(
        "SELECT row FROM points").fetchone()[0])
    assert raw["point_id"] == "a"


def test_run_interrupted_while_being_created(tmp_path):
    RunDir.create(tmp_path / "run", "", {"env": {}}).close()
    (tmp_path / "run" / "meta.json").unlink()      # as if killed before meta.json was written
    with pytest.raises(UserError, match=r"meta.json: missing \(incomplete run directory"):
        load_run(tmp_path / "run")


def test_write_failure_keeps_earlier_points(tmp_path):
    rd = RunDir.create(tmp_path / "run", "", {"env": {}})
    rd.write_point(_row("a"), [1.0])
    # Another connection holds the write lock: the store cannot commit (like a full disk would).
    blocker = sqlite3.connect(tmp_path / "run" / "points.sqlite", isolation_level=None)
    blocker.execute("BEGIN EXCLUSIVE")
    rd._db.execute("PRAGMA busy_timeout = 50")
    with pytest.raises(UserError, match=r"cannot store point b .*points stored so far are kept"):
        rd.write_point(_row("b"), [2.0])
    blocker.execute("ROLLBACK")
    blocker.close()
    rd.close()
    assert list(load_run(tmp_path / "run")["point_id"]) == ["a"]


def test_loaded_frame_takes_a_new_column_without_warnings(tmp_path):
    # pandas warns "DataFrame is highly fragmented" (PerformanceWarning) when a column is added
    # to a frame that was assembled column by column; load_run builds it in one go.
    import warnings

    with RunDir.create(tmp_path / "run", "[run]\n", {"env": {}}) as rd:
        # a real run's rows: the schema columns plus throughput and worker details (extras)
        extras = {c: 1.0 for c in schema.LOAD_COLUMNS if c != "load_curve"}
        extras.update({f"detail_{i}": None for i in range(30)})   # extras nobody measured here
        rd.write_point({**_row("a"), **extras, "extra_text": "x", "extra_num": 1.5}, [1.0, 2.0])
        rd.write_point(_row("b"), [])
    df = load_run(tmp_path / "run")
    assert len(df.columns) > 100
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        df["mine"] = df["lat_p50_ms"] * 2
        df["mine2"] = 1
    assert list(df["extra_text"]) == ["x", ""] and df["size"].dtype == "int64"
