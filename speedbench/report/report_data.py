"""Everything the sections of a report share, worked out once: the runs combined, the ok and failed
rows, the frontiers, the fp32/int8 pairs. Sections (report/sections.py, report/caveats.py) only read it."""
from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd

from speedbench.analyse import combine, frontier
from speedbench.analyse.common import latency_col, split_ok
from speedbench.analyse.hosts import Combined
from speedbench.analyse.precision import precision_pairs


@dataclass
class ReportData:
    data: Combined                  # the runs, keyed by host
    ok: pd.DataFrame                # ok rows of every run
    failed: pd.DataFrame
    col: str                        # the latency column the report ranks on (lat_p50_ms ...)
    latency: str                    # "p50" ...
    budget_ms: float | None
    prices: dict | None
    title: str
    front: pd.DataFrame = field(default_factory=pd.DataFrame)      # frontier over all ok points
    by_host: pd.DataFrame = field(default_factory=pd.DataFrame)    # one frontier per host (several hosts)
    within: dict = field(default_factory=dict)   # point_id -> status within its host and thread setting
    pairs: pd.DataFrame = field(default_factory=pd.DataFrame)      # fp32 / int8 pairs

    @property
    def runs(self) -> list:
        return self.data.runs

    @property
    def samples(self) -> pd.DataFrame:
        return self.data.samples

    @property
    def stat(self) -> str:
        return self.col[4:-3]

    @property
    def multi(self) -> bool:
        return self.data.multi_host

    @property
    def hosts(self) -> list[str]:
        return self.data.host_names

    @property
    def trained(self) -> bool:
        return bool(self.ok["map"].notna().any()) if "map" in self.ok.columns else False


def prepare(runs, budget_ms=None, latency: str = "p50", title: str | None = None,
            prices: dict | None = None) -> ReportData:
    data = combine(runs)
    col = latency_col(latency)
    ok, failed = split_ok(data.points)
    name = title or f"speedbench report: {', '.join(r.name for r in data.runs) or 'run'}"
    d = ReportData(data=data, ok=ok, failed=failed, col=col, latency=latency, budget_ms=budget_ms, prices=prices,
                   title=name)
    if len(ok):
        d.front = frontier(ok, x=col)
        # Status within each thread setting too: a team with a fixed core budget reads that column.
        per = frontier(ok, x=col, by=["host", "intra_threads", "inter_threads"])
        d.within = dict(zip(per["point_id"], per["frontier_status"]))
        if d.multi:
            d.by_host = frontier(ok, x=col, by="host")
        d.pairs = precision_pairs(ok, col)
    return d
