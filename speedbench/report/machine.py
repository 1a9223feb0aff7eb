"""Report blocks: how close each stage runs to the machine (achieved GMAC/s vs the host's matmul peak)."""
from __future__ import annotations

import pandas as pd

from speedbench.analyse.efficiency import stage_efficiency
from speedbench.schema import STAGES

CAPTION = ("Achieved rate per stage: the stage's counted multiply-accumulates (convolutions, matrix products and "
           "linear layers, counted once per graph on a square image of the input size; two-stage heads at the "
           "proposal count the graph was exported with) over its time in the unprofiled time base, and in "
           "brackets that rate as a share of this host's dense fp32 matrix-multiply peak at the point's thread "
           "count (measured once per run; method in the environment table). Near the peak, a faster runtime has "
           "little left to win; far below it (resizing, decoding, NMS do few counted MACs in much time), a "
           "different model or postprocess could still help. \"-\": no counted MACs in that stage.")


def efficiency_blocks(ok: pd.DataFrame) -> list:
    eff = stage_efficiency(ok)
    if not len(eff) or not eff["gmac_s"].notna().any():
        return []
    stages = [s for s in STAGES if eff.loc[eff["stage"] == s, "gmac_s"].notna().any()]
    rows = []
    for (pid, label), g in eff.groupby(["point_id", "label"], sort=False):
        by = g.set_index("stage")
        peak = by["peak_gmac_s"].dropna()
        cells = [label, f"{peak.iloc[0]:.1f}" if len(peak) else "not measured"]
        for s in stages:
            if s not in by.index or pd.isna(by.at[s, "gmac_s"]):
                cells.append("-")
                continue
            frac = by.at[s, "peak_frac"]
            cells.append(f"{by.at[s, 'gmac_s']:.1f}" + (f" ({frac:.0%})" if pd.notna(frac) else ""))
        rows.append(cells)
    blocks = [("h2", "How close each stage runs to the machine"),
              ("table", ["configuration", "peak GMAC/s", *[f"{s} GMAC/s" for s in stages]], rows),
              ("p", CAPTION)]
    summary = []
    for s in stages:
        f = eff.loc[eff["stage"] == s, "peak_frac"].dropna()
        if len(f):
            summary.append(f"{s}: median {f.median():.0%} of peak (range {f.min():.0%} to {f.max():.0%})")
    if summary:
        blocks.append(("list", summary))
    over = eff[eff["peak_frac"] > 1]
    if len(over):
        stages_over = ", ".join(sorted(set(over["stage"]), key=STAGES.index))
        blocks.append(("warn", f"{len(over)} stage figure(s) exceed the measured peak ({stages_over}). A stage "
                               "cannot outrun a dense matrix product on the same cores: either the peak was "
                               "measured at a busier moment than the point (a shared host), or that stage's "
                               "share of the profiled time is too small (the profiler's split, which the "
                               "sub-graph check, `[repetitions] subgraphs = true`, can confirm or refute). "
                               "Read those rates as unreliable, not as headroom."))
    return blocks


def peak_rows(meta: dict) -> list[list[str]]:
    """Environment-table rows for the run's recorded matmul peak."""
    peak = (meta or {}).get("matmul_peak") or {}
    by = peak.get("by_threads") or {}
    if not by:
        return []
    figs = []
    for t in sorted(by, key=lambda k: int(k)):
        r = by[t]
        figs.append(f"{t} thread(s): {r['gmac_s']:.1f} GMAC/s ({r['gflop_s']:.1f} GFLOP/s)" if "gmac_s" in r
                    else f"{t} thread(s): not measured ({r.get('error', '?')})")
    return [["fp32 matmul peak", "; ".join(figs)], ["peak method", f"{peak.get('method', '')}, "
                                                                   f"at {peak.get('measured_at', '')}"]]
