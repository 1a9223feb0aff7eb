"""Plots and review reports of a run.

Public face:
- plot_frontier(df, path=None, x="lat_p50_ms", y="map", minimize_x=True, ...) -> Figure
- plot_host_frontiers(df, path=None, x=..., titles={host: title}) -> Figure: one panel per host,
  side by side, shared axes; marker = family, colour = model
- plot_stages(df, path=None), plot_latency_distributions(samples, df=None, path=None),
  plot_accuracy_vs(df, knob="size"|"proposals", path=None), plot_memory(df, path=None)
  (a path ending .png/.svg saves the figure; svg=True writes an SVG beside a PNG)
- render_html(run_paths_or_frames, out_path, budget_ms=None, latency="p50", prices=None) -> Path
  (several runs: per-host sections, keyed by host; prices {host: usd_per_hour} add costs)
- render_markdown(run_paths_or_frames, out_path, ...) -> Path
- render_reports(run_paths_or_frames, html_path, markdown_path=None, ...) -> [Path]: both from one build
Inputs: a run directory path, an analyse.Run, a points DataFrame, or a list of these.
"""
from speedbench.report.plots import (plot_accuracy_vs, plot_frontier, plot_host_frontiers,
                                     plot_latency_distributions, plot_memory, plot_stages)
from speedbench.report.render import render_html, render_markdown, render_reports

__all__ = ["plot_frontier", "plot_host_frontiers", "plot_stages", "plot_latency_distributions", "plot_accuracy_vs",
           "plot_memory", "render_html", "render_markdown",
           "render_reports"]
