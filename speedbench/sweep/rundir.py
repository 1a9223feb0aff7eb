"""The run directory: where a sweep keeps everything it measured, crash-safely.

Layout of a run directory::

    meta.json        profile name, host label, start/end times, version, environment
    profile.toml     verbatim copy of the profile the sweep ran
    points.sqlite    the source of truth: points(point_id PRIMARY KEY, seq, row JSON),
                     samples(point_id, i, ms); in an interleaved A/B run also
                     invocations(point_id, invocation, seq, row JSON, samples JSON)
    points.csv       the points table, regenerated as points arrive (temp file + os.replace)
    points.parquet   the same, when pyarrow is installed
    exports/         the ONNX graphs the sweep exported (content-hash cache)

Every point is written in one SQLite transaction (row and raw samples
together) with synchronous=FULL, so a sweep killed at any moment loses at
most the point that was in flight, and a half-written point never shows up.

The CSV/Parquet copies are conveniences for other tools. Rewriting them costs
time that grows with the table, so after a write they are refreshed only when
the last refresh is older than ten times its own duration (at least 1 s), and
always by finish() and close(): a killed sweep's CSV may lag by the last few
points, never its SQLite table, which load_run reads.
"""
from __future__ import annotations

import json
import math
import os
import sqlite3
import time
from pathlib import Path

from speedbench import schema
from speedbench.errors import UserError
from speedbench.system import atomic_write
from speedbench.measure.timebase import upgrade_frame

META_FILE = "meta.json"
PROFILE_FILE = "profile.toml"
DB_FILE = "points.sqlite"
CSV_FILE = "points.csv"
PARQUET_FILE = "points.parquet"
EXPORTS_DIR = "exports"
PER_IMAGE_DIR = "per_image"   # per-image accuracy results of each graph (<per_image_key>.npz)


_SCHEMA_SQL = """
CREATE TABLE IF NOT EXISTS points (
    point_id TEXT PRIMARY KEY,
    seq INTEGER NOT NULL,
    row TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS samples (
    point_id TEXT NOT NULL,
    i INTEGER NOT NULL,
    ms REAL NOT NULL,
    PRIMARY KEY (point_id, i)
);
"""


# Worker invocations of points measured in several (interleaved A/B runs); created on first use,
# so runs without it read as having none. samples: that invocation's raw samples, JSON list (ms).
_INVOCATIONS_SQL = """
CREATE TABLE IF NOT EXISTS invocations (
    point_id TEXT NOT NULL,
    invocation INTEGER NOT NULL,
    seq INTEGER NOT NULL,
    row TEXT NOT NULL,
    samples TEXT NOT NULL,
    PRIMARY KEY (point_id, invocation)
)
"""


def now_iso() -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())


def _atomic_write_bytes(path: Path, data: bytes) -> None:
    atomic_write(path, data, fsync=True)


def _json_default(value):
    # numpy scalars and paths end up in rows; store them as plain values.
    if hasattr(value, "item"):
        return value.item()
    return str(value)


def _clean(value):
    """JSON has no NaN: store non-finite floats as null (they load back as NaN)."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


class RunDir:
    """A run directory on disk. Build with RunDir.create(...) or RunDir.open(...)."""

    def __init__(self, path: Path):
        self.path = Path(path)
        self.exports = self.path / EXPORTS_DIR
        self._db: sqlite3.Connection | None = None
        self._copies_at = 0.0       # monotonic time of the last CSV/Parquet refresh
        self._copies_cost = 0.0     # how long that refresh took
        self._copies_stale = False

    # ----------------------------------------------------------------- creation
    @classmethod
    def create(cls, path, profile_text: str, meta: dict) -> "RunDir":
        """Start a new run directory. An existing run directory at `path` is refused
        (resume it with RunDir.open instead); an existing empty directory is fine."""
        path = Path(path)
        if (path / DB_FILE).exists() or (path / META_FILE).exists():
            raise UserError(f"{path}: already holds a run; resume it (--resume) or choose another output directory")
        if path.exists() and not path.is_dir():
            raise UserError(f"{path}: exists and is not a directory")
        try:
            path.mkdir(parents=True, exist_ok=True)
            (path / EXPORTS_DIR).mkdir(exist_ok=True)
        except OSError as exc:
            raise UserError(f"{path}: cannot create run directory ({exc.strerror})") from None
        full = {
            "profile_name": "",
            "host": "",
            "started": now_iso(),
            "finished": None,
            "speedbench_version": _version(),
        }
        full.update(meta or {})
        if "env" not in full:
            from speedbench.sweep.env import environment_fingerprint

            full["env"] = environment_fingerprint()
        _atomic_write_bytes(path / PROFILE_FILE, profile_text.encode())
        rd = cls(path)
        rd._connect(create=True)
        # meta.json last: its presence marks the directory as a complete, openable run.
        _atomic_write_bytes(path / META_FILE, json.dumps(full, indent=2, default=_json_default).encode())
        rd._export_tables()
        return rd

    @classmethod
    def open(cls, path) -> "RunDir":
        """Open an existing run directory; anything missing or corrupt is a UserError naming it."""
        path = Path(path)
        if not path.exists():
            raise UserError(f"{path}: run directory not found")
        if not path.is_dir():
            raise UserError(f"{path}: not a run directory (not a directory)")
        if not (path / META_FILE).exists() and not (path / DB_FILE).exists():
            raise UserError(f"{path}: not a run directory (no {META_FILE} or {DB_FILE})")
        rd = cls(path)
        rd.meta()  # validates meta.json
        rd._connect(create=False)
        (path / EXPORTS_DIR).mkdir(exist_ok=True)
        return rd

    # ----------------------------------------------------------------- database
    def _connect(self, create: bool) -> None:
        db_path = self.path / DB_FILE
        if not create and not db_path.exists():
            raise UserError(f"{db_path}: missing points table (incomplete run directory)")
        try:
            db = sqlite3.connect(db_path, timeout=30, isolation_level=None)
            db.execute("PRAGMA synchronous=FULL")
            if create:
                db.executescript(_SCHEMA_SQL)
            tables = {r[0] for r in db.execute("SELECT name FROM sqlite_master WHERE type='table'")}
            for name in ("points", "samples"):
                if name not in tables:
                    raise UserError(f"{db_path}: missing table {name!r} (incomplete or foreign run directory)")
            db.execute("SELECT point_id, seq, row FROM points LIMIT 1").fetchall()
            db.execute("SELECT point_id, i, ms FROM samples LIMIT 1").fetchall()
        except sqlite3.DatabaseError as exc:
            raise UserError(f"{db_path}: corrupt points database ({exc})") from None
        self._db = db

    def close(self) -> None:
        if self._db is not None:
            if self._copies_stale:
                self._export_tables()
            self._db.close()
            self._db = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    # ----------------------------------------------------------------- writing
    def write_point(self, row: dict, samples_ms) -> None:
        """Store one finished point and its raw samples in a single transaction.

        The row is keyed by row["point_id"]; writing the same point_id again
        replaces both the row and its samples. The CSV/Parquet copies are
        regenerated afterwards (they are conveniences; SQLite is the truth).
        """
        self._transaction(row, samples_ms)

    def write_invocation(self, row: dict, samples_ms, invocation: dict, invocation_samples_ms) -> None:
        """Store one worker invocation of a point measured in several (an interleaved A/B run)
        together with the point's updated row and pooled samples, in one transaction.

        invocation: that invocation's own row; its key is (row["point_id"], invocation["invocation"]).
        """
        self._transaction(row, samples_ms, (invocation, invocation_samples_ms))

    def _transaction(self, row: dict, samples_ms, invocation=None) -> None:
        pid = row.get("point_id")
        if not pid:
            raise ValueError("row has no point_id")
        blob = json.dumps({k: _clean(v) for k, v in row.items()}, default=_json_default)
        samples = [(pid, i, float(ms)) for i, ms in enumerate(samples_ms or [])]
        db = self._db
        try:
            db.execute("BEGIN IMMEDIATE")
            seq = db.execute("SELECT COALESCE(MAX(seq), 0) + 1 FROM points").fetchone()[0]
            db.execute("INSERT OR REPLACE INTO points (point_id, seq, row) VALUES (?, ?, ?)", (pid, seq, blob))
            db.execute("DELETE FROM samples WHERE point_id = ?", (pid,))
            db.executemany("INSERT INTO samples (point_id, i, ms) VALUES (?, ?, ?)", samples)
            if invocation is not None:
                inv, inv_samples = invocation
                db.execute(_INVOCATIONS_SQL)
                inv_seq = db.execute("SELECT COALESCE(MAX(seq), 0) + 1 FROM invocations").fetchone()[0]
                db.execute("INSERT OR REPLACE INTO invocations (point_id, invocation, seq, row, samples) "
                           "VALUES (?, ?, ?, ?, ?)",
                           (pid, int(inv["invocation"]), inv_seq,
                            json.dumps({k: _clean(v) for k, v in inv.items()}, default=_json_default),
                            json.dumps([float(x) for x in inv_samples or []])))
            db.execute("COMMIT")
        except sqlite3.Error as exc:
            if db.in_transaction:
                db.execute("ROLLBACK")
            # e.g. disk full or the file made read-only: say so; earlier points are intact.
            raise UserError(f"{self.path / DB_FILE}: cannot store point {pid} ({exc}); "
                            f"points stored so far are kept") from None
        except BaseException:
            if db.in_transaction:
                db.execute("ROLLBACK")
            raise
        self._copies_stale = True
        if time.monotonic() - self._copies_at >= max(1.0, 10 * self._copies_cost):
            self._export_tables()

    def done_ids(self) -> set[str]:
        """Ids of every point already stored (measured or failed)."""
        return {r[0] for r in self._db.execute("SELECT point_id FROM points")}

    def failed_ids(self) -> set[str]:
        """Ids of stored points whose status is "failed"."""
        return {r["point_id"] for r in self.rows() if r.get("status") == "failed"}

    def finish(self) -> None:
        """Stamp the end time into meta.json and regenerate the CSV/Parquet copies."""
        meta = self.meta()
        meta["finished"] = now_iso()
        _atomic_write_bytes(self.path / META_FILE, json.dumps(meta, indent=2, default=_json_default).encode())
        self._export_tables()

    def update_meta(self, **fields) -> None:
        meta = self.meta()
        meta.update(fields)
        _atomic_write_bytes(self.path / META_FILE, json.dumps(meta, indent=2, default=_json_default).encode())

    # ----------------------------------------------------------------- reading
    def meta(self) -> dict:
        meta_path = self.path / META_FILE
        try:
            meta = json.loads(meta_path.read_text())
        except FileNotFoundError:
            # meta.json is written last at creation and only ever replaced atomically after:
            # without it the run was interrupted while being created, before any point.
            raise UserError(f"{meta_path}: missing (incomplete run directory, interrupted before any "
                            f"point was measured; start a new one)") from None
        except (json.JSONDecodeError, UnicodeDecodeError) as exc:
            raise UserError(f"{meta_path}: corrupt metadata ({exc})") from None
        if not isinstance(meta, dict):
            raise UserError(f"{meta_path}: corrupt metadata (not a JSON object)")
        return meta

    def profile_text(self) -> str:
        try:
            return (self.path / PROFILE_FILE).read_text()
        except FileNotFoundError:
            raise UserError(f"{self.path / PROFILE_FILE}: missing (incomplete run directory)") from None

    def rows(self) -> list[dict]:
        out = []
        try:
            for pid, blob in self._db.execute("SELECT point_id, row FROM points ORDER BY seq"):
                try:
                    row = json.loads(blob)
                except json.JSONDecodeError:
                    raise UserError(f"{self.path / DB_FILE}: corrupt row for point {pid}") from None
                row["point_id"] = pid
                out.append(row)
        except sqlite3.DatabaseError as exc:
            raise UserError(f"{self.path / DB_FILE}: corrupt points database ({exc})") from None
        return out

    def points(self):
        """The points table as a DataFrame (columns: README.md, "Python API: the points table")."""
        df = rows_to_frame(self.rows())
        if "per_image_key" in df.columns:
            # where this run keeps each graph's per-image results (paired accuracy comparisons)
            files = [str(self.path / PER_IMAGE_DIR / f"{k}.npz") if isinstance(k, str) and k else ""
                     for k in df["per_image_key"]]
            df["per_image_file"] = [f if f and os.path.isfile(f) else "" for f in files]
        return df

    def invocations(self, point_id: str | None = None) -> list[dict]:
        """Stored worker invocations' rows (with point_id, invocation, seq and samples_ms), all or one point's."""
        try:
            if not self._db.execute("SELECT 1 FROM sqlite_master WHERE type='table' AND name='invocations'").fetchone():
                return []
            sql = "SELECT point_id, invocation, seq, row, samples FROM invocations"
            args = ()
            if point_id is not None:
                sql, args = sql + " WHERE point_id = ?", (point_id,)
            got = self._db.execute(sql + " ORDER BY seq", args).fetchall()
        except sqlite3.DatabaseError as exc:
            raise UserError(f"{self.path / DB_FILE}: corrupt points database ({exc})") from None
        out = []
        for pid, inv, seq, blob, samples in got:
            try:
                row, ms = json.loads(blob), json.loads(samples)
            except json.JSONDecodeError:
                raise UserError(f"{self.path / DB_FILE}: corrupt invocation {inv} of point {pid}") from None
            if not isinstance(row, dict) or not isinstance(ms, list):
                raise UserError(f"{self.path / DB_FILE}: corrupt invocation {inv} of point {pid}")
            row.update(point_id=pid, invocation=inv, seq=seq, samples_ms=ms)
            out.append(row)
        return out

    def samples(self):
        import pandas as pd

        try:
            got = self._db.execute("SELECT point_id, i, ms FROM samples ORDER BY point_id, i").fetchall()
        except sqlite3.DatabaseError as exc:
            raise UserError(f"{self.path / DB_FILE}: corrupt points database ({exc})") from None
        df = pd.DataFrame(got, columns=["point_id", "i", "ms"])
        return df.astype({"point_id": "object", "i": "int64", "ms": "float64"})

    # ----------------------------------------------------------------- copies
    def _export_tables(self) -> None:
        started = time.monotonic()
        df = self.points()
        _atomic_write_bytes(self.path / CSV_FILE, df.to_csv(index=False).encode())
        try:
            import pyarrow  # noqa: F401
        except ImportError:
            pyarrow = None
        if pyarrow is not None:
            import io

            buf = io.BytesIO()
            df.to_parquet(buf, index=False)
            _atomic_write_bytes(self.path / PARQUET_FILE, buf.getvalue())
        self._copies_at = time.monotonic()
        self._copies_cost = self._copies_at - started
        self._copies_stale = False


def rows_to_frame(rows: list[dict]):
    """Rows -> tidy DataFrame: schema columns first (always present), extra columns after.

    Missing numeric values are NaN, missing text is "", flags are booleans. The frame is built
    in one go from converted columns, so a user adding a column to it gets no fragmentation warning.
    """
    import pandas as pd

    known = list(schema.CONFIG_COLUMNS) + [c for c in schema.RESULT_COLUMNS if c not in schema.CONFIG_COLUMNS]
    extra = []
    for row in rows:
        for key in row:
            if key not in known and key not in extra:
                extra.append(key)
    raw = pd.DataFrame.from_records(rows, columns=known + extra) if rows else pd.DataFrame(columns=known)
    columns = {col: _known_column(raw[col], col) for col in known}
    columns.update({col: _extra_column(raw[col]) for col in extra})
    return upgrade_frame(pd.DataFrame(columns, index=raw.index))


# Config knobs are whole numbers; kept integral when every row has them.
_INT_COLUMNS = ("size", "proposals", "intra_threads", "inter_threads", "affinity", "concurrency", "n_samples")


def _known_column(values, col: str):
    import pandas as pd

    if col in schema.TEXT_COLUMNS:
        return values.where(values.notna(), "").astype(str).astype(object)
    if col in schema.BOOL_COLUMNS:
        return values.where(values.notna(), False).astype(bool)
    out = pd.to_numeric(values, errors="coerce").astype("float64")
    return out.astype("int64") if col in _INT_COLUMNS and len(out) and out.notna().all() else out


def _extra_column(values):
    import pandas as pd

    # Extra columns of mixed kinds (e.g. a note that is text in one row, null in
    # another) stay objects; Parquet needs one type per column, so stringify those.
    present = values.dropna()
    if len(present) and not all(isinstance(v, (int, float, bool)) for v in present):
        return values.map(lambda v: "" if v is None or (isinstance(v, float) and math.isnan(v))
                          else (v if isinstance(v, str) else json.dumps(v, default=_json_default)))
    if len(present) == 0:
        return pd.to_numeric(values, errors="coerce").astype("float64")
    return values


def _version() -> str:
    from speedbench import __version__

    return __version__


# ----------------------------------------------------------------- public loaders
def load_run(path):
    """Load a run directory's points table: one row per point (columns: README.md, "Python API: the points table")."""
    with RunDir.open(path) as rd:
        return rd.points()


def load_samples(path):
    """Raw latency samples of a run: DataFrame[point_id, i, ms]."""
    with RunDir.open(path) as rd:
        return rd.samples()


def load_meta(path) -> dict:
    """A run's metadata (profile_name, host, started, finished, speedbench_version, env)."""
    with RunDir.open(path) as rd:
        return rd.meta()
