"""Decisions from measurements: Pareto frontiers, budget picks and regression verdicts.

Public face (all take pandas DataFrames of points, which may carry a `host` column):
- frontier(df, x="lat_p50_ms", y="map", minimize_x=True, by=None) -> DataFrame
  (adds frontier_status in {"frontier", "tied", "dominated"}, dominated_by, tied_with);
  by="host" gives per-host frontiers
- pick(df, budget_ms, latency="p50", threads=None, max_memory_mb=None, min_map=None, prices=None) -> Pick
  (with several hosts it names the host; with prices it picks the cheapest per million frames)
- compare(base, new, threshold=0.05, confidence=0.95, seed=0) -> Comparison
- compare_invocations(inv, threshold=0.05, ...) -> Comparison: an interleaved A/B run's verdicts from
  pairs of adjacent invocations (paired_ratio: geometric mean ratio, bootstrap over pairs)
- Run / as_run: a run's points, raw samples and metadata, from a directory or frames
- load_runs(paths) -> [Run]: run directories, or parents holding run directories (fleet OUT/<label>/)
- combine(runs) -> Combined: one points table keyed by host (label, else CPU model + cores)
- load_prices(path) -> {host: usd_per_hour}; add_costs(df, prices) -> df with usd_per_mframe
- size(df_or_combined, streams, fps, p99_ms=None, server_cores=(8, 16, 32, 64), headroom=0.7,
  core_hour_cost=None, use_frontier=True, prices=None, host_cores=None) -> DataFrame:
  servers per (configuration, host, server shape) from throughput rows, per-host frontiers
- scaling_summary(df) -> (configs, excluded): per-configuration (and host) scaling basis of size
  (speedbench.analyse.scaling; the model is analyse.sizing, fleet prices analyse.prices)
- label(row): "model @ size / proposals / threads"
"""
from speedbench.analyse.common import label
from speedbench.analyse.regression import Comparison, bootstrap_ratio, compare, env_diff
from speedbench.analyse.frontier import frontier
from speedbench.analyse.interleaved import compare_invocations, paired_ratio
from speedbench.analyse.hosts import Combined, combine, load_runs
from speedbench.analyse.pick import Pick, pick
from speedbench.analyse.prices import add_costs, load_prices
from speedbench.analyse.runs import Run, as_run
from speedbench.analyse.scaling import scaling_summary
from speedbench.analyse.sizing import size

__all__ = ["frontier", "pick", "Pick", "compare", "Comparison", "bootstrap_ratio", "env_diff",
           "compare_invocations", "paired_ratio",
           "Run", "as_run", "load_runs", "combine", "Combined", "load_prices", "add_costs", "label",
           "size", "scaling_summary"]
