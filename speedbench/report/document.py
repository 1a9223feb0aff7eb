"""The content of a review report as a list of blocks, independent of the output format.

``build`` works out what every section shares once (``report_data.prepare``: the runs combined,
ok and failed rows, frontiers, fp32/int8 pairs), then each section in ``SECTIONS`` turns that one
ReportData into its blocks (report/sections.py: the question, the answer and the evidence;
report/caveats.py: the method, fp32 vs int8, the caveats). Each figure is drawn once, in its
section; the renderers (report/render.py) only encode it.

Blocks: ("h2", text) ("p", text) ("warn", text) ("list", [text]) ("table", header, rows)
("figure", name, Figure, caption) ("pre", text) ("details", summary, text).
Everything is plain text here; the renderers escape it.
"""
from __future__ import annotations

from speedbench.report import caveats, sections
from speedbench.report.report_data import ReportData, prepare

# The order of the report.
SECTIONS = (sections.question, sections.hosts, sections.environment, caveats.method, sections.frontier_section,
            sections.costs, sections.stages, sections.latency, sections.accuracy, caveats.precision,
            sections.memory, sections.all_points, caveats.caveats)


def build(runs, budget_ms=None, latency: str = "p50", title: str | None = None,
          prices: dict | None = None) -> tuple[str, list]:
    """(title, blocks) of the report of ``runs`` (run directories, Runs or points frames)."""
    return blocks_of(prepare(runs, budget_ms=budget_ms, latency=latency, title=title, prices=prices))


def blocks_of(d: ReportData) -> tuple[str, list]:
    return d.title, [b for section in SECTIONS for b in section(d)]
