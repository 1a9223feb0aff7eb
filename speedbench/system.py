"""The few operating-system calls every step shares: how many cores this process may use, and
writing a file so that a reader sees all of it or nothing. Imports nothing heavy."""
from __future__ import annotations

import os
import tempfile
from contextlib import contextmanager
from pathlib import Path


def cores_available() -> int:
    """Cores this process may run on (its affinity mask where the OS has one)."""
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


@contextmanager
def atomic_path(path):
    """A temporary path next to `path` (same suffix, for writers that add one), renamed over
    `path` when the block ends without error and removed when it raises."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=f".tmp{path.suffix}")
    os.close(fd)
    try:
        yield Path(tmp)
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise


def atomic_write(path, data, fsync: bool = False) -> None:
    """Write bytes or text to `path` atomically; fsync=True also forces it to disk first."""
    with atomic_path(path) as tmp, open(tmp, "wb") as fh:
        fh.write(data.encode() if isinstance(data, str) else data)
        if fsync:
            fh.flush()
            os.fsync(fh.fileno())
