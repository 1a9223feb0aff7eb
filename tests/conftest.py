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
