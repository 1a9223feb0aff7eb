"""Shared test fixtures (kept small; owners of other tests may ask for more)."""
import os

import pytest

# Plots are written to files only; never open a window in CI.
os.environ.setdefault("MPLBACKEND", "Agg")


@pytest.fixture(scope="session")
def heldout_scenes(tmp_path_factory):
    """Eight generated held-out yard scenes (COCO JSON); returns the annotations.json path."""
    from speedbench.data import make_scenes

    return make_scenes(tmp_path_factory.mktemp("scenes"), count=8, seed=3, split="heldout")


@pytest.fixture
def children_outlive_launcher(tmp_path):
    """Run `script` in a launcher process, kill the launcher once it has started a child, and
    return the children still alive after a grace period (they should be none).

    The launcher's TMPDIR is a fresh directory; `run.leftovers()` lists the speedbench-*
    temporary directories still in it (the launcher's own, which nobody removes if the
    worker does not)."""
    import os
    import subprocess
    import sys
    import time

    import psutil

    def run(script: str, grace_s: float = 15) -> list:
        launcher = subprocess.Popen([sys.executable, "-c", script], env={**os.environ, "TMPDIR": str(tmp_path)})
        try:
            deadline = time.monotonic() + 60
            children = []
            while not children and time.monotonic() < deadline:
                children = psutil.Process(launcher.pid).children()
                time.sleep(0.1)
            assert children, "the launcher never started a worker"
        finally:
            launcher.kill()
            launcher.wait()
        _, alive = psutil.wait_procs(children, timeout=grace_s)
        for p in alive:  # clean up before the caller fails
            p.kill()
        return alive

    run.leftovers = lambda: sorted(tmp_path.glob("speedbench-*"))
    return run
