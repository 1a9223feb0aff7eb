"""Small helpers shared by several test modules (tests/ is on sys.path under pytest; benchmarks put
it there themselves)."""
import json
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

# The repetition policy of most synthetic test sweeps: a couple of warm-up runs, a handful of timed
# runs, no stage profile (the synthetic backend has no graph to profile).
REPETITIONS = {"warmup_min": 1, "warmup_max": 2, "min_reps": 3, "max_reps": 5, "max_seconds": 0.3, "stages": False}
# The synthetic harness backend sleeps a known time per run (no model is run).
SYNTHETIC = {"work_ms": 2.0, "mode": "sleep"}


def synthetic_profile(name="syn", *, sizes=(64, 96), proposals=(10,), backends=("synthetic",),
                      models=("synthetic",), threads=(1,), concurrency=None, timeout_s=30, cache=None,
                      repetitions=None, synthetic=None) -> str:
    """A sweep profile (TOML text) on the synthetic harness backend.

    models: model ids, or dicts of a [[models]] table (e.g. {"id": "synthetic:fail=raise", "sizes": [64]}).
    repetitions / synthetic: keys over REPETITIONS / SYNTHETIC; a key given as None is left out.
    """
    sweep = {"sizes": list(sizes), "proposals": list(proposals), "backends": list(backends)}
    if concurrency is not None:
        sweep["concurrency"] = list(concurrency)
    run = {"name": name, "timeout_s": timeout_s, **({"cache": str(cache)} if cache is not None else {})}
    parts = [_table("run", run), _table("dataset", {"scenes": {"count": 1}, "accuracy": False}), _table("sweep", sweep)]
    parts += [_table("[models]", m if isinstance(m, dict) else {"id": m}) for m in models]
    parts += [_table("[threads]", {"intra": t}) for t in threads]
    parts += [_table("repetitions", _over(REPETITIONS, repetitions)), _table("synthetic", _over(SYNTHETIC, synthetic))]
    return "\n".join(parts)


def write_synthetic_profile(path, **kwargs):
    """synthetic_profile(**kwargs) written to `path`; returns the path."""
    path.write_text(synthetic_profile(**kwargs))
    return path


def write_profile(tmp_path, sizes="[64, 96]", work_ms=1.0, **kwargs):
    """tmp_path/syn.toml: the sweep tests' profile (sizes as TOML text or a list; proposals [10, 20])."""
    sizes = json.loads(sizes) if isinstance(sizes, str) else sizes
    kwargs = {"proposals": (10, 20), "repetitions": {"max_seconds": 0.5}, **kwargs}
    return write_synthetic_profile(tmp_path / "syn.toml", sizes=sizes, synthetic={"work_ms": work_ms}, **kwargs)


def _over(base: dict, changes) -> dict:
    out = {**base, **(changes or {})}
    return {k: v for k, v in out.items() if v is not None}


def _table(name: str, values: dict) -> str:
    return f"[{name}]\n" + "".join(f"{k} = {_value(v)}\n" for k, v in values.items())


def _value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{k} = {_value(x)}" for k, x in v.items()) + "}"
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if isinstance(v, str):
        return json.dumps(v)   # a TOML basic string for these names and paths
    return repr(v)


def stored_rows(db, table: str = "points") -> int:
    """Rows in a table of a run directory's points.sqlite, or 0 while it does not exist yet (a sweep
    starting)."""
    try:
        # Read-only: a plain connect creates an empty points.sqlite when the directory exists but
        # the file does not, and a sweep that has just made its directory then finds "a run" there.
        con = sqlite3.connect(Path(db).resolve().as_uri() + "?mode=ro", uri=True, timeout=5)
        try:
            return con.execute(f"SELECT COUNT(*) FROM {table}").fetchone()[0]
        finally:
            con.close()
    except sqlite3.OperationalError:
        return 0


def kill_sweep_once_stored(prof, run, rows: int, table: str = "points", timeout_s: float = 120) -> list[str]:
    """`speedbench sweep PROF -o RUN --quiet` in a child process, SIGKILLed once `rows` rows of `table`
    are stored: the parent only; its workers (own sessions) may still finish. Returns the command
    (add --resume to go on)."""
    cmd = [sys.executable, "-m", "speedbench", "sweep", str(prof), "-o", str(run), "--quiet"]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.monotonic() + timeout_s
    while stored_rows(run / "points.sqlite", table) < rows:
        assert proc.poll() is None, proc.stderr.read().decode()
        assert time.monotonic() < deadline, "sweep made no progress"
        time.sleep(0.05)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    return cmd


def stored_points(db) -> int:
    """Rows in a run directory's points table (0 while it does not exist yet)."""
    return stored_rows(db, "points")


def cli(args) -> int:
    """speedbench's exit status for `args`, run in this process (argparse refusals raise SystemExit)."""
    from speedbench.cli import main

    try:
        return main(args)
    except SystemExit as exc:
        return exc.code
