"""Small helpers shared by several test modules (tests/ is on sys.path under pytest)."""
import sqlite3


def stored_points(db) -> int:
    """Rows in a run directory's points.sqlite, or 0 while it does not exist yet (a sweep starting)."""
    try:
        con = sqlite3.connect(db, timeout=5)
        try:
            return con.execute("SELECT COUNT(*) FROM points").fetchone()[0]
        finally:
            con.close()
    except sqlite3.OperationalError:
        return 0


def cli(args) -> int:
    """speedbench's exit status for `args`, run in this process (argparse refusals raise SystemExit)."""
    from speedbench.cli import main

    try:
        return main(args)
    except SystemExit as exc:
        return exc.code
