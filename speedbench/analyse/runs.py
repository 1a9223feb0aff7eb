"""A run as analyse sees it: points table, raw samples and metadata, from a directory or frames."""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from speedbench.errors import UserError


@dataclass
class Run:
    points: pd.DataFrame
    samples: pd.DataFrame | None = None        # [point_id, i, ms]
    meta: dict = field(default_factory=dict)
    path: str = ""
    profile_text: str = ""                      # the profile the run was made with, as recorded

    @classmethod
    def load(cls, path) -> "Run":
        """Read a run directory written by speedbench.sweep; problems are UserErrors naming the path."""
        from speedbench.sweep import RunDir

        p = Path(path)
        if not p.exists():
            raise UserError(f"{p}: run directory not found")
        with RunDir.open(p, readonly=True) as rd:
            return cls(points=rd.points(), samples=rd.samples(), meta=rd.meta(), path=str(p),
                       profile_text=rd.profile_text())

    @property
    def name(self) -> str:
        return self.path or self.meta.get("profile_name", "") or "run"


def as_run(obj) -> Run:
    """Accept a Run, a run directory path or a bare points DataFrame."""
    if isinstance(obj, Run):
        return obj
    if isinstance(obj, pd.DataFrame):
        return Run(points=obj)
    if isinstance(obj, (str, Path)):
        return Run.load(obj)
    raise TypeError(f"expected a Run, a run directory path or a DataFrame, not {type(obj).__name__}")
