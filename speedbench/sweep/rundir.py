"""The run directory: where a sweep keeps everything it measured, crash-safely.

Layout of a run directory::

    meta.json        profile name, host label, start/end times, version, environment
    profile.toml     verbatim copy of the profile the sweep ran
    points.sqlite    the source of truth: points(point_id PRIMARY KEY, seq, row JSON),
                     samples(point_id, i, ms, invocation), and invocations(point_id,
                     invocation, status, result JSON): each worker process's result the
                     moment it finishes, before its point's row exists (resume per invocation);
                     an interleaved A/B run uses the same table, keyed by each side's point_id
                     (`env` is part of the id). Interleaved runs made before that kept their
                     worker runs in a table env_invocations, still read (legacy_env_invocations)
    schedule.json    the seeded shuffled order the invocations were run in
    points.csv       the points table, regenerated as points arrive (temp file + os.replace)
    points.parquet   the same, when pyarrow is installed
    exports/         the ONNX graphs the sweep exported (content-hash cache)

    .lock            held (an OS file lock, fcntl.flock) by the one process writing the run;
                     it holds its pid. The OS releases it when that process dies.

Every point is written in one SQLite transaction (row and raw samples
together) with synchronous=FULL, so a sweep killed at any moment loses at
most the point that was in flight, and a half-written point never shows up.

One writer at a time: RunDir.create and RunDir.open take the lock for as long
as the RunDir is open; a second writer gets a UserError naming the holder's
pid. Readers (RunDir.open(path, readonly=True), load_run, frontier, report)
take no lock, open SQLite read-only and never create or change a file, so
they work during a sweep, on a read-only copy, and see only committed points.

A full disk or a read-only place is a one-line UserError naming the path
("no space left on device at PATH"); points already committed are kept and
`--resume` finishes the run once there is room again. A run directory whose
creation fails that way is removed again (nothing was measured in it).

The CSV/Parquet copies are conveniences for other tools. Rewriting them costs
time that grows with the table, so after a write they are refreshed only when
the last refresh is older than ten times its own duration (at least 1 s), and
always by finish() and close(): a killed sweep's CSV may lag by the last few
points, never its SQLite table, which load_run reads.
"""
from __future__ import annotations

import errno
import fcntl
import json
import math
import os
import shutil
import sqlite3
import time
from pathlib import Path

from speedbench import schema
from speedbench.data.jsonio import parse_json
from speedbench.errors import UserError, storage_error
from speedbench.system import atomic_write
from speedbench.measure.timebase import upgrade_frame

META_FILE = "meta.json"
PROFILE_FILE = "profile.toml"
DB_FILE = "points.sqlite"
CSV_FILE = "points.csv"
PARQUET_FILE = "points.parquet"
EXPORTS_DIR = "exports"
PER_IMAGE_DIR = "per_image"   # per-image accuracy results of each graph (<per_image_key>.npz)
LOCK_FILE = ".lock"
KEPT = "points stored so far are kept; make room, then continue with --resume"
UNDONE = "nothing was measured: the incomplete run directory was removed, start again once the problem is fixed"

SCHEDULE_FILE = "schedule.json"

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
    invocation INTEGER NOT NULL DEFAULT 0,
    PRIMARY KEY (point_id, i)
);
"""
# One row per finished worker process of a point not yet complete (and kept after).
_INVOCATIONS_SQL = """
CREATE TABLE IF NOT EXISTS invocations (
    point_id TEXT NOT NULL,
    invocation INTEGER NOT NULL,
    status TEXT NOT NULL,
    result TEXT NOT NULL,
    PRIMARY KEY (point_id, invocation)
);
"""


def now_iso() -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())


def io_step(step: str, path: Path) -> None:
    """Called before each write of a run directory ("mkdir", "write", "commit").

    The fault-injection seam of the tests (tests/test_rundir_integrity.py): they replace
    it with a function raising OSError(ENOSPC) or OSError(EROFS) at a chosen step, which is
    how a full disk or a read-only file system looks from here. Does nothing otherwise."""


def _atomic_write_bytes(path: Path, data: bytes, hint: str = KEPT) -> None:
    """Write atomically (temp file, fsync, rename). An OSError (disk full, read-only, ...)
    becomes a UserError naming `path`; the old file, if any, is untouched."""
    try:
        io_step("write", path)
        atomic_write(path, data, fsync=True)
    except OSError as exc:
        raise storage_error(exc, path, hint) from None


def _db_error(exc: sqlite3.Error, db_path: Path, hint: str = KEPT) -> UserError:
    """Name what SQLite's error means for the user: a full disk is not a corrupt database."""
    code = (getattr(exc, "sqlite_errorcode", None) or 0) & 0xFF
    if code == sqlite3.SQLITE_FULL:
        return storage_error(OSError(errno.ENOSPC, "No space left on device"), db_path, hint)
    if code in (sqlite3.SQLITE_READONLY, sqlite3.SQLITE_PERM, sqlite3.SQLITE_CANTOPEN):
        return UserError(f"{db_path}: cannot write the points database ({exc}); {hint}")
    if code in (sqlite3.SQLITE_BUSY, sqlite3.SQLITE_LOCKED):
        return UserError(f"{db_path}: points database busy ({exc}); try again")
    if code == sqlite3.SQLITE_IOERR:
        return UserError(f"{db_path}: input/output error on the points database ({exc}); {hint}")
    return UserError(f"{db_path}: corrupt points database ({exc})")


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

    page_limit: int | None = None   # test seam: PRAGMA max_page_count, makes SQLite report SQLITE_FULL

    def __init__(self, path: Path, readonly: bool = False):
        self.path = Path(path)
        self.exports = self.path / EXPORTS_DIR
        self.readonly = readonly
        self._db: sqlite3.Connection | None = None
        self._lock_fd: int | None = None
        self._copies_at = 0.0       # monotonic time of the last CSV/Parquet refresh
        self._copies_cost = 0.0     # how long that refresh took
        self._copies_stale = False

    # ----------------------------------------------------------------- creation
    @classmethod
    def create(cls, path, profile_text: str, meta: dict) -> "RunDir":
        """Start a new run directory. An existing run directory at `path` is refused
        (resume it with RunDir.open instead); an existing empty directory is fine.

        The lock is taken first, so two processes starting on one directory cannot both
        write; if writing fails (disk full, read-only), what was created is removed again."""
        path = Path(path)
        check_dir_name(path)
        if path.exists() and not path.is_dir():
            raise UserError(f"{path}: exists and is not a directory")
        made = not path.exists()
        try:
            io_step("mkdir", path)
            path.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise storage_error(exc, path, "cannot create the run directory") from None
        rd = cls(path)
        try:
            rd._lock(hint=UNDONE)
        except BaseException:
            if made:
                shutil.rmtree(path, ignore_errors=True)
            raise
        if (path / DB_FILE).exists() or (path / META_FILE).exists():
            rd._unlock()
            raise UserError(f"{path}: already holds a run; resume it (--resume) or choose another output directory")
        try:
            rd._populate(profile_text, meta)
        except BaseException as exc:
            rd._undo_create(made)
            if isinstance(exc, UserError):
                raise UserError(f"{exc}; {UNDONE}") from None
            raise
        return rd

    def _populate(self, profile_text: str, meta: dict) -> None:
        path = self.path
        try:
            io_step("mkdir", path / EXPORTS_DIR)
            (path / EXPORTS_DIR).mkdir(exist_ok=True)
        except OSError as exc:
            raise storage_error(exc, path / EXPORTS_DIR) from None
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
        _atomic_write_bytes(path / PROFILE_FILE, profile_text.encode(), hint="")
        self._connect(create=True)
        # meta.json last: its presence marks the directory as a complete, openable run.
        _atomic_write_bytes(path / META_FILE, json.dumps(full, indent=2, default=_json_default).encode(), hint="")
        # No copies yet: there is no point to copy, and writing an empty table costs the pandas
        # import (seconds on a busy host) before the first point. The first point writes them.
        self._copies_stale = True

    def _undo_create(self, made: bool) -> None:
        """Remove what create() wrote (only its own files; a directory it did not make stays)."""
        if self._db is not None:
            self._db.close()
            self._db = None
        for name in (META_FILE, PROFILE_FILE, DB_FILE, DB_FILE + "-journal", CSV_FILE, PARQUET_FILE):
            try:
                os.unlink(self.path / name)
            except OSError:
                pass
        try:
            (self.path / EXPORTS_DIR).rmdir()
        except OSError:
            pass
        for leftover in self.path.glob(".*.tmp*"):
            try:
                leftover.unlink()
            except OSError:
                pass
        try:
            os.unlink(self.path / LOCK_FILE)
        except OSError:
            pass
        self._unlock()
        if made:
            try:
                self.path.rmdir()
            except OSError:
                pass

    # ----------------------------------------------------------------- the lock
    def _lock(self, hint: str = KEPT) -> None:
        """Take the run directory's exclusive lock (fcntl.flock) or say who holds it."""
        lock_path = self.path / LOCK_FILE
        try:
            io_step("write", lock_path)
            fd = os.open(lock_path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as exc:
            if exc.errno in (errno.ENOSPC, errno.EDQUOT):
                raise storage_error(exc, lock_path, hint) from None
            raise storage_error(exc, self.path, "a run directory must be writable to add points to it") from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            holder = ""
            if exc.errno in (errno.EWOULDBLOCK, errno.EAGAIN):
                try:
                    holder = os.pread(fd, 32, 0).decode("ascii", "replace").strip()
                except OSError:
                    pass
            os.close(fd)
            if exc.errno not in (errno.EWOULDBLOCK, errno.EAGAIN):
                raise storage_error(exc, lock_path) from None
            who = f"process {holder}" if holder.isdigit() else "another process"
            raise UserError(f"{self.path}: run directory in use by {who} (a sweep writing to it); wait for it "
                            f"to finish, or use another output directory") from None
        try:
            os.ftruncate(fd, 0)
            os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
        except OSError:
            pass  # a full disk: the lock still holds, only the pid is not recorded
        self._lock_fd = fd

    def _unlock(self) -> None:
        if self._lock_fd is not None:
            os.close(self._lock_fd)   # closing the descriptor releases the lock
            self._lock_fd = None

    @classmethod
    def open(cls, path, readonly: bool = False) -> "RunDir":
        """Open an existing run directory; anything missing or corrupt is a UserError naming it.

        readonly: for reading only: no lock, SQLite opened read-only, nothing on disk created
        or changed. Otherwise the run directory's lock is taken (one writer at a time)."""
        path = Path(path)
        if not path.exists():
            raise UserError(f"{path}: run directory not found")
        if not path.is_dir():
            raise UserError(f"{path}: not a run directory (not a directory)")
        if not (path / META_FILE).exists() and not (path / DB_FILE).exists():
            raise UserError(f"{path}: not a run directory (no {META_FILE} or {DB_FILE})")
        rd = cls(path, readonly=readonly)
        rd.meta()  # validates meta.json
        if not readonly:
            rd._lock()
        try:
            rd._connect(create=False)
        except BaseException:
            rd._unlock()
            raise
        rd._copies_stale = not _newer_or_same(path / CSV_FILE, path / DB_FILE)
        return rd

    # ----------------------------------------------------------------- database
    def _connect(self, create: bool) -> None:
        db_path = self.path / DB_FILE
        if not create and not db_path.exists():
            raise UserError(f"{db_path}: missing points table (incomplete run directory)")
        db = None
        try:
            if self.readonly:
                db = _connect_readonly(db_path)
            else:
                io_step("commit", db_path)
                db = sqlite3.connect(db_path, timeout=30, isolation_level=None)
                db.execute("PRAGMA synchronous=FULL")
                if self.page_limit:
                    db.execute(f"PRAGMA max_page_count={int(self.page_limit)}")
            if create:
                db.executescript(_SCHEMA_SQL)
            tables = {r[0] for r in db.execute("SELECT name FROM sqlite_master WHERE type='table'")}
            for name in ("points", "samples"):
                if name not in tables:
                    raise UserError(f"{db_path}: missing table {name!r} (incomplete or foreign run directory)")
            db.execute("SELECT point_id, seq, row FROM points LIMIT 1").fetchall()
            db.execute("SELECT point_id, i, ms FROM samples LIMIT 1").fetchall()
            # Runs made before replicated invocations have no invocation column (all index 0).
            self._has_invocation = "invocation" in {r[1] for r in db.execute("PRAGMA table_info(samples)")}
            self._has_invocations_table = "invocations" in tables
        except sqlite3.Error as exc:
            if db is not None:
                db.close()
            raise _db_error(exc, db_path) from None
        except OSError as exc:
            if db is not None:
                db.close()
            raise storage_error(exc, db_path, KEPT) from None
        except BaseException:
            if db is not None:
                db.close()
            raise
        self._db = db

    def close(self) -> None:
        try:
            if self._db is not None and self._copies_stale and not self.readonly:
                try:
                    self._export_tables()
                except UserError:
                    # A full disk: the copies lag (SQLite holds every point); the error that
                    # stopped the sweep, if any, is the one to report, not this one.
                    pass
        finally:
            if self._db is not None:
                self._db.close()
                self._db = None
            self._unlock()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    # ----------------------------------------------------------------- writing
    def write_point(self, row: dict, samples_ms, invocations=None, invocation_result=None) -> None:
        """Store one finished point and its raw samples in a single transaction.

        The row is keyed by row["point_id"]; writing the same point_id again
        replaces both the row and its samples. invocations: the invocation index of
        each sample (all 0 when omitted). invocation_result: (index, PointResult.to_dict())
        of the worker process just finished, stored in the `invocations` table in the same
        transaction (an interleaved A/B run rewrites its side's row after every invocation).
        The CSV/Parquet copies are regenerated afterwards (they are conveniences; SQLite is the truth).
        """
        self._transaction(row, samples_ms, invocations, invocation_result)

    def _transaction(self, row: dict, samples_ms, invocations=None, invocation_result=None) -> None:
        self._check_writable()
        pid = row.get("point_id")
        if not pid:
            raise ValueError("row has no point_id")
        blob = json.dumps({k: _clean(v) for k, v in row.items()}, default=_json_default)
        samples_ms = [] if samples_ms is None else list(samples_ms)
        index = [0] * len(samples_ms) if invocations is None else [int(k) for k in invocations]
        if len(index) != len(samples_ms):
            raise ValueError("one invocation index per sample")
        samples = [(pid, i, float(ms), k) for i, (ms, k) in enumerate(zip(samples_ms, index))]
        db = self._db
        self._add_invocation_column()
        try:
            db.execute("BEGIN IMMEDIATE")
            io_step("commit", self.path / DB_FILE)
            seq = db.execute("SELECT COALESCE(MAX(seq), 0) + 1 FROM points").fetchone()[0]
            db.execute("INSERT OR REPLACE INTO points (point_id, seq, row) VALUES (?, ?, ?)", (pid, seq, blob))
            db.execute("DELETE FROM samples WHERE point_id = ?", (pid,))
            db.executemany("INSERT INTO samples (point_id, i, ms, invocation) VALUES (?, ?, ?, ?)", samples)
            if invocation_result is not None:
                index, result = invocation_result
                db.execute(_INVOCATIONS_SQL)    # IF NOT EXISTS; rolled back with the rest on failure
                db.execute("INSERT OR REPLACE INTO invocations (point_id, invocation, status, result) "
                           "VALUES (?, ?, ?, ?)", (pid, int(index), str(result.get("status", "")),
                                                   json.dumps(result, default=_json_default)))
            db.execute("COMMIT")
            self._has_invocations_table = self._has_invocations_table or invocation_result is not None
        except (sqlite3.Error, OSError) as exc:
            if db.in_transaction:
                db.execute("ROLLBACK")
            # e.g. disk full or the file made read-only: say so; earlier points are intact.
            db_path = self.path / DB_FILE
            hint = f"cannot store point {pid}; {KEPT}"
            if isinstance(exc, OSError):
                raise storage_error(exc, db_path, hint) from None
            if (getattr(exc, "sqlite_errorcode", None) or 0) & 0xFF == sqlite3.SQLITE_FULL:
                raise _db_error(exc, db_path, hint) from None
            raise UserError(f"{db_path}: cannot store point {pid} ({exc}); {KEPT}") from None
        except BaseException:
            if db.in_transaction:
                db.execute("ROLLBACK")
            raise
        self._copies_stale = True
        if time.monotonic() - self._copies_at >= max(1.0, 10 * self._copies_cost):
            self._export_tables()

    def _add_invocation_column(self) -> None:
        """A run started before replicated invocations gains the column when it is resumed."""
        if not self._has_invocation:
            self._db.execute("ALTER TABLE samples ADD COLUMN invocation INTEGER NOT NULL DEFAULT 0")
            self._has_invocation = True

    def write_invocation(self, point_id: str, invocation: int, result: dict) -> None:
        """Store one worker process's result (PointResult.to_dict()) the moment it finishes."""
        blob = json.dumps(result, default=_json_default)
        try:
            self._ensure_invocations_table()
            self._db.execute("INSERT OR REPLACE INTO invocations (point_id, invocation, status, result) "
                             "VALUES (?, ?, ?, ?)", (point_id, int(invocation), str(result.get("status", "")), blob))
        except sqlite3.Error as exc:
            raise UserError(f"{self.path / DB_FILE}: cannot store invocation {invocation} of point {point_id} "
                            f"({exc}); results stored so far are kept") from None

    def _ensure_invocations_table(self) -> None:
        if not self._has_invocations_table:
            self._db.execute(_INVOCATIONS_SQL)
            self._has_invocations_table = True

    def invocation_results(self, point_id: str | None = None) -> dict:
        """{point_id: {invocation: result dict}} of the stored worker processes (of one point, or all)."""
        if not self._has_invocations_table:
            return {}
        sql, args = "SELECT point_id, invocation, result FROM invocations", ()
        if point_id is not None:
            sql, args = sql + " WHERE point_id = ?", (point_id,)
        out: dict = {}
        try:
            for pid, k, blob in self._db.execute(sql + " ORDER BY point_id, invocation", args):
                out.setdefault(pid, {})[int(k)] = json.loads(blob)
        except (sqlite3.DatabaseError, json.JSONDecodeError) as exc:
            raise UserError(f"{self.path / DB_FILE}: corrupt invocations table ({exc})") from None
        return out

    def clear_invocations(self, point_id: str) -> None:
        """Forget a point's stored worker processes (before measuring a failed point again)."""
        if self._has_invocations_table:
            self._db.execute("DELETE FROM invocations WHERE point_id = ?", (point_id,))

    def write_schedule(self, schedule: dict) -> None:
        """The order the invocations ran in (seed and list), next to the points table."""
        _atomic_write_bytes(self.path / SCHEDULE_FILE, json.dumps(schedule, indent=1, default=_json_default).encode())

    def schedule(self) -> dict | None:
        """The recorded invocation order (schedule.json), or None before the first one."""
        try:
            return json.loads((self.path / SCHEDULE_FILE).read_text())
        except FileNotFoundError:
            return None
        except (json.JSONDecodeError, UnicodeDecodeError) as exc:
            raise UserError(f"{self.path / SCHEDULE_FILE}: corrupt schedule ({exc})") from None

    def done_ids(self) -> set[str]:
        """Ids of every point already stored (measured or failed)."""
        return {r[0] for r in self._db.execute("SELECT point_id FROM points")}

    def failed_ids(self) -> set[str]:
        """Ids of stored points whose status is "failed"."""
        return {r["point_id"] for r in self.rows() if r.get("status") == "failed"}

    def _check_writable(self) -> None:
        if self.readonly:
            raise RuntimeError(f"{self.path}: opened read-only")

    def finish(self) -> None:
        """Stamp the end time into meta.json and regenerate the CSV/Parquet copies if they are behind."""
        self._check_writable()
        meta = self.meta()
        meta["finished"] = now_iso()
        _atomic_write_bytes(self.path / META_FILE, json.dumps(meta, indent=2, default=_json_default).encode())
        if self._copies_stale or not (self.path / CSV_FILE).exists():
            self._export_tables()

    def update_meta(self, **fields) -> None:
        self._check_writable()
        meta = self.meta()
        meta.update(fields)
        _atomic_write_bytes(self.path / META_FILE, json.dumps(meta, indent=2, default=_json_default).encode())

    # ----------------------------------------------------------------- reading
    def meta(self) -> dict:
        meta_path = self.path / META_FILE
        try:
            text = meta_path.read_bytes().decode("utf-8")
        except FileNotFoundError:
            # meta.json is written last at creation and only ever replaced atomically after:
            # without it the run was interrupted while being created, before any point.
            raise UserError(f"{meta_path}: missing (incomplete run directory, interrupted before any "
                            f"point was measured; start a new one)") from None
        except UnicodeDecodeError:
            raise UserError(f"{meta_path}: corrupt metadata (not UTF-8 text)") from None
        except OSError as exc:
            raise UserError(f"{meta_path}: cannot read ({exc.strerror})") from None
        try:
            meta = parse_json(text, meta_path, allow_nonfinite=True)
        except UserError as exc:
            raise UserError(f"{meta_path}: corrupt metadata ({str(exc).removeprefix(f'{meta_path}: ')})") from None
        if not isinstance(meta, dict):
            raise UserError(f"{meta_path}: corrupt metadata (not a JSON object)")
        return meta

    def profile_text(self) -> str:
        try:
            return (self.path / PROFILE_FILE).read_text()
        except FileNotFoundError:
            raise UserError(f"{self.path / PROFILE_FILE}: missing: the run's copy of its profile was deleted; "
                            f"put the profile the run was started with back there to resume it") from None
        except (OSError, UnicodeDecodeError) as exc:
            raise UserError(f"{self.path / PROFILE_FILE}: cannot read ({exc})") from None

    def rows(self) -> list[dict]:
        out = []
        db_path = self.path / DB_FILE
        try:
            for pid, seq, blob in self._db.execute("SELECT point_id, seq, row FROM points ORDER BY seq"):
                where = f"{db_path}: damaged run directory: row {seq!r} (point {str(pid)[:40]!r})"
                if not isinstance(pid, str) or not isinstance(blob, str):
                    raise UserError(f"{where}: not a text row")
                try:
                    row = parse_json(blob, where, allow_nonfinite=True)
                except UserError as exc:
                    raise UserError(str(exc)) from None
                if not isinstance(row, dict):
                    raise UserError(f"{where}: not a JSON object but {type(row).__name__}")
                row["point_id"] = pid
                out.append(row)
        except sqlite3.Error as exc:
            raise _db_error(exc, db_path) from None
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

    def legacy_env_invocations(self) -> list[dict] | None:
        """The worker runs of an interleaved A/B run made before it used the `invocations` table
        (table env_invocations: one row per invocation with its samples), or None when the run
        has no such table. Read only: nothing writes that table any more."""
        where = self.path / DB_FILE
        try:
            if not self._db.execute("SELECT 1 FROM sqlite_master WHERE type='table' "
                                    "AND name='env_invocations'").fetchone():
                return None
            got = self._db.execute("SELECT point_id, invocation, seq, row, samples FROM env_invocations "
                                   "ORDER BY seq").fetchall()
        except sqlite3.DatabaseError as exc:
            raise UserError(f"{where}: cannot read the env_invocations table of an older interleaved run "
                            f"({exc})") from None
        out = []
        for pid, inv, seq, blob, samples in got:
            try:
                row, ms = json.loads(blob), json.loads(samples)
            except (TypeError, json.JSONDecodeError):
                row = ms = None
            if not isinstance(row, dict) or not isinstance(ms, list):
                raise UserError(f"{where}: cannot read the env_invocations table of an older interleaved run "
                                f"(invocation {inv} of point {str(pid)[:40]} is damaged)")
            row.update(point_id=pid, invocation=inv, seq=seq, samples_ms=ms)
            out.append(row)
        return out

    def samples(self):
        import pandas as pd

        db_path = self.path / DB_FILE
        inv = "invocation" if self._has_invocation else "0"
        try:
            got = self._db.execute(f"SELECT point_id, i, ms, {inv} FROM samples ORDER BY point_id, i").fetchall()
        except sqlite3.Error as exc:
            raise _db_error(exc, db_path) from None
        df = pd.DataFrame(got, columns=["point_id", "i", "ms", "invocation"])
        try:
            return df.astype({"point_id": "object", "i": "int64", "ms": "float64", "invocation": "int64"})
        except (TypeError, ValueError, OverflowError):
            bad = next(r for r in got if not (isinstance(r[1], int) and isinstance(r[2], (int, float))))
            raise UserError(f"{db_path}: damaged run directory: sample {bad[1]!r} of point {str(bad[0])[:40]!r} "
                            f"is not a number") from None

    # ----------------------------------------------------------------- copies
    def _export_tables(self) -> None:
        self._check_writable()
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


def _newer_or_same(copy: Path, source: Path) -> bool:
    """Was `copy` written after the last change of `source` (and its journal)?"""
    try:
        t = copy.stat().st_mtime_ns
    except FileNotFoundError:
        return False
    changed = [f.stat().st_mtime_ns for f in (source, source.with_name(source.name + "-wal")) if f.exists()]
    return all(t >= c for c in changed)


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
_INT_COLUMNS = ("size", "proposals", "intra_threads", "inter_threads", "affinity", "concurrency", "n_samples",
                "invocations", "invocations_failed")


def _known_column(values, col: str):
    import pandas as pd

    if col in schema.TEXT_COLUMNS:
        text = values.where(values.notna(), "").astype(str).astype(object)
        # rows recorded before an identity column existed had its legacy value
        return text.replace("", schema.ID_DEFAULTS[col]) if col in schema.ID_DEFAULTS else text
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


def _connect_readonly(db_path: Path) -> sqlite3.Connection:
    """SQLite opened read-only: never creates or changes a file.

    One exception, SQLite's own: a writer killed during a commit leaves a hot journal
    that a read-only connection cannot roll back (SQLITE_READONLY_ROLLBACK); then a
    read-write connection lets SQLite restore the last committed state, when allowed."""
    db = sqlite3.connect(db_path.resolve().as_uri() + "?mode=ro", uri=True, timeout=30, isolation_level=None)
    try:
        db.execute("SELECT COUNT(*) FROM sqlite_master").fetchone()
        return db
    except sqlite3.OperationalError as exc:
        db.close()
        if getattr(exc, "sqlite_errorcode", 0) & 0xFF != sqlite3.SQLITE_READONLY:
            raise
    return sqlite3.connect(db_path, timeout=30, isolation_level=None)


MAX_NAME_BYTES = 255   # one path component, on every common Linux / macOS file system


def check_dir_name(path: Path) -> None:
    """A run directory's path must be one the file system can hold: refused before anything is created."""
    for part in Path(path).parts:
        if len(os.fsencode(part)) > MAX_NAME_BYTES:
            raise UserError(f"{path}: path component {part[:40]!r}... is longer than {MAX_NAME_BYTES} bytes")
    if "\0" in str(path):
        raise UserError(f"{path!r}: path contains a NUL character")


def _version() -> str:
    from speedbench import __version__

    return __version__


# ----------------------------------------------------------------- public loaders
def load_run(path):
    """Load a run directory's points table: one row per point (columns: README.md, "Python API: the points table")."""
    with RunDir.open(path, readonly=True) as rd:
        return rd.points()


def load_samples(path):
    """Raw latency samples of a run: DataFrame[point_id, i, ms, invocation] (invocation 0 in older runs)."""
    with RunDir.open(path, readonly=True) as rd:
        return rd.samples()


def load_meta(path) -> dict:
    """A run's metadata (profile_name, host, started, finished, speedbench_version, env)."""
    with RunDir.open(path, readonly=True) as rd:
        return rd.meta()
