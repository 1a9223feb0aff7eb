"""Choose the configuration that fits a latency budget (and optional thread/memory/accuracy limits)."""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from speedbench.analyse.common import bounds, has_accuracy, latency_col, precision_of, require_columns, split_ok
from speedbench.analyse.paired import paired_diff
from speedbench.analyse.prices import SINGLE, add_costs
from speedbench.errors import UserError
from speedbench.schema import PRECISIONS


CAUTION = ("Caution: measured on one machine with a small image set; a safety-relevant deployment "
           "needs its own validation on the target hardware and data.")
CAUTION_HOSTS = ("Caution: each host's figures come from its own run, on a small image set, and are only as good "
                 "as that run's conditions; they are no guarantee, and a safety-relevant deployment needs its "
                 "own validation on the target hardware and data.")


@dataclass
class Pick:
    budget_ms: float
    latency: str                       # column used, e.g. "lat_p90_ms"
    best: pd.Series | None             # None when nothing fits
    margin_ms: float | None            # budget - best latency (>= 0)
    runners_up: pd.DataFrame           # other fitting rows, best first
    excluded: pd.DataFrame             # rows that do not fit, with `reason`
    closest_misses: pd.DataFrame       # over budget only, smallest overshoot first
    accuracy_available: bool = True    # False: ranked by latency only
    notes: list[str] = field(default_factory=list)
    per_host: pd.DataFrame | None = None  # several hosts: each host's own best fitting row (or none)
    priced: bool = False               # ranked by cost per million frames (usd_per_mframe)

    @property
    def hosts(self) -> list[str]:
        return [] if self.per_host is None else list(self.per_host["host"])

    def to_text(self) -> str:
        stat = self.latency.removeprefix("lat_").removesuffix("_ms")
        lines = []
        if self.best is None:
            lines.append(f"Nothing fits a {stat} budget of {self.budget_ms:g} ms with the given limits.")
            if len(self.closest_misses):
                lines.append("Closest misses:")
                for _, r in self.closest_misses.iterrows():
                    lines.append(f"  {r['label']}: {stat} {r[self.latency]:.2f} ms, "
                                 f"{r['over_ms']:.2f} ms over budget{_acc(r)}")
        else:
            b = self.best
            what = "Cheapest" if self.priced else "Best"
            lines.append(f"{what} within {stat} <= {self.budget_ms:g} ms: {_where(b, self.per_host)}")
            ci = f" (CI {b['_lo']:.2f} to {b['_hi']:.2f})" if b["_hi"] > b["_lo"] else " (no CI recorded)"
            lines.append(f"  {stat} {b[self.latency]:.2f} ms{ci}, margin {self.margin_ms:.2f} ms{_acc(b)}")
            if self.priced:
                lines.append(f"  {_cost(b)}")
        lines.extend(f"Note: {n}" for n in self.notes)
        if self.per_host is not None:
            lines.append("Per host:")
            for r in self.per_host.to_dict("records"):
                lines.append(f"  {r['host']}: {r['answer']}")
        if len(self.runners_up):
            lines.append("Runners-up:")
            for _, r in self.runners_up.head(5).iterrows():
                cost = f", {_cost(r, short=True)}" if self.priced else ""
                lines.append(f"  {r['label']}: {stat} {r[self.latency]:.2f} ms{_acc(r)}{_vs_best(r)}{cost}")
        if len(self.excluded):
            lines.append(f"Excluded ({len(self.excluded)}):")
            for _, r in self.excluded.iterrows():
                lines.append(f"  {r['label']}: {r['reason']}")
        lines.append(CAUTION if self.per_host is None else CAUTION_HOSTS)
        return "\n".join(lines)


def _where(r, per_host) -> str:
    """A row's configuration, naming its host whenever more than one host was considered."""
    host = r.get("host", "")
    if per_host is not None and host:
        return f"{r.get('config_label') or r['label']} on host {host}"
    return r["label"]


def _cost(r, short: bool = False) -> str:
    c = r.get("usd_per_mframe")
    if c is None or pd.isna(c):
        return "cost unknown"
    if short:
        return f"${c:.4g} per million frames"
    return (f"cost ${c:.4g} per million frames (host ${r['usd_per_hour']:g}/h, {r['frames_per_s']:.1f} frames/s "
            f"from {r['fps_source']})")


def _vs_best(r) -> str:
    d = r.get("map_vs_best")
    if d is None or pd.isna(d):
        return ""
    lo, hi = r.get("map_vs_best_ci_lo"), r.get("map_vs_best_ci_hi")
    if r.get("map_vs_best_paired") and pd.notna(lo):
        return f", {d:+.3f} vs pick (paired CI {lo:+.3f} to {hi:+.3f})"
    return f", {d:+.3f} vs pick"


def _acc(r) -> str:
    m = r.get("map")
    if m is None or pd.isna(m):
        return ", mAP unavailable"
    lo, hi = r.get("map_ci_lo"), r.get("map_ci_hi")
    ci = f" (CI {lo:.3f} to {hi:.3f})" if lo is not None and pd.notna(lo) and pd.notna(hi) else ""
    return f", mAP {m:.3f}{ci}"


def pick(df: pd.DataFrame, budget_ms: float, latency: str = "p50", threads=None,
         max_memory_mb=None, min_map=None, prices: dict | None = None, precision: str | None = None) -> Pick:
    """Best configuration whose latency statistic fits the budget.

    Ranking: highest mAP first, lower latency breaking ties. When no fitting row has
    accuracy (untrained weights) the ranking falls back to latency only, and says so.
    A pick whose latency CI reaches past the budget is flagged: on a rerun it may not fit.

    prices: {host: USD per host-hour} (analyse.prices.load_prices). Then the answer is the
    cheapest fitting row per million frames (mAP, then latency, breaking ties); rows of a
    host without a price, or without a frame rate, are excluded with that reason.
    With rows from several hosts (a `host` column) `per_host` holds each host's own answer.
    precision: only configurations of that precision ("fp32" or "int8").
    """
    if budget_ms is None or not np.isfinite(budget_ms) or budget_ms <= 0:
        raise UserError(f"--budget-ms: must be a positive number of milliseconds, not {budget_ms!r}")
    col = latency_col(latency)
    require_columns(df, [col], "pick")
    if precision is not None and precision not in PRECISIONS:
        raise UserError(f"--precision: must be one of {', '.join(PRECISIONS)}, not {precision!r}")
    ok, bad = split_ok(df)
    ok["_precision"] = precision_of(ok)
    v, lo, hi = bounds(ok, col) if len(ok) else (np.array([]),) * 3
    ok["_lo"], ok["_hi"] = lo, hi
    if prices is not None:
        ok = add_costs(ok, prices)
    stat = col.removeprefix("lat_").removesuffix("_ms")
    reasons, over = [], []
    for k, r in enumerate(ok.to_dict("records")):
        why = []
        if prices is not None:
            if r.get("host", "") not in prices:
                why.append(f"no price for host {r.get('host', '')!r} in the price table")
            elif not r["frames_per_s"] > 0:
                why.append("no frame rate recorded, cost per million frames unknown")
        if threads is not None and int(r.get("intra_threads", -1)) != int(threads):
            why.append(f"intra threads {r.get('intra_threads')} != {threads}")
        if precision is not None and r["_precision"] != precision:
            why.append(f"precision {r['_precision']} != {precision}")
        if max_memory_mb is not None:
            mem = r.get("rss_peak_mib")
            if mem is None or pd.isna(mem):
                why.append("peak memory not recorded")
            elif mem > max_memory_mb:
                why.append(f"peak memory {mem:.1f} MiB > {max_memory_mb:g} MiB")
        if min_map is not None:
            m = r.get("map")
            if m is None or pd.isna(m):
                why.append("mAP unavailable (untrained weights), --min-map cannot be checked")
            elif m < min_map:
                why.append(f"mAP {m:.3f} < {min_map:g}")
        lat = v[k]
        if np.isnan(lat):
            why.append(f"{stat} not recorded")
        elif lat > budget_ms:
            why.append(f"{stat} {lat:.2f} ms > budget {budget_ms:g} ms by {lat - budget_ms:.2f} ms")
        over.append(lat - budget_ms if not np.isnan(lat) else np.inf)
        reasons.append("; ".join(why))
    ok["reason"] = pd.Series(reasons, index=ok.index, dtype=object)
    ok["over_ms"] = pd.Series(over, index=ok.index, dtype=float)
    fits = ok[ok["reason"] == ""].copy()
    out_of = ok[ok["reason"] != ""]
    excluded = pd.concat([out_of, bad]) if len(bad) else out_of
    # Closest misses: rows that fail only on the budget, smallest overshoot first.
    only_budget = out_of[out_of["reason"].str.count(";").eq(0) & out_of["reason"].str.contains("> budget")]
    misses = only_budget.sort_values("over_ms").head(3)
    notes = [] if len(ok) else ["no configuration was measured successfully"]
    acc = bool(has_accuracy(fits).any()) if len(fits) else bool(has_accuracy(ok).any())
    if len(fits):
        fits["_acc"] = pd.to_numeric(fits["map"], errors="coerce") if "map" in fits.columns else np.nan
        if prices is not None:
            fits = fits.sort_values(["usd_per_mframe", "_acc", col], ascending=[True, False, True],
                                    na_position="last")
            if min_map is None and acc:
                notes.append("no --min-map given: this is the cheapest configuration whatever its accuracy")
            if (fits["fps_source"] == SINGLE).any():
                notes.append("single-stream rows assume the host serves one stream at a time; throughput "
                             "rows (`speedbench load`) show what the whole host delivers")
        elif acc:
            fits = fits.sort_values(["_acc", col], ascending=[False, True], na_position="last")
            if not has_accuracy(fits).all():
                notes.append("some fitting configurations have no accuracy (untrained) and rank last")
        else:
            fits = fits.sort_values(col)
            notes.append("accuracy unavailable (untrained weights): ranked by latency only, "
                         "which says nothing about detection quality")
        best = fits.iloc[0]
        runners = fits.iloc[1:].drop(columns=["reason"])
        if acc and len(runners):
            runners = _versus_best(runners, best)
        if prices is None and acc and len(runners) and pd.notna(best.get("map_ci_lo")):
            close = runners[runners["map_vs_best_tied"]]
            if len(close):
                how = ("paired bootstrap of the mAP difference over the same images includes 0"
                       if close["map_vs_best_paired"].all() else
                       "mAP within noise of the best one's (paired where per-image results exist, "
                       "else overlapping intervals)")
                notes.append(f"{len(close)} runner(s)-up are tied with the pick on accuracy ({how}); "
                             "the accuracy ranking between them is within noise")
        if best["_hi"] > budget_ms:
            notes.append(f"the {stat} CI of the pick reaches {best['_hi']:.2f} ms, past the budget: "
                         "a rerun may not fit")
        reps = pd.to_numeric(pd.Series([best.get("invocations")]), errors="coerce").fillna(1).iloc[0]
        if reps <= 1:
            notes.append(f"the pick's {stat} interval covers one worker process only: a rerun in a new process "
                         "can land outside it; measure with [repetitions] invocations >= 3 before relying on it")
        noisy = best.get("noisy", False)
        if isinstance(noisy, (bool, np.bool_)) and noisy:
            cov = best.get("lat_cov")
            spread = f" (CoV {cov:.0%})" if cov is not None and pd.notna(cov) else ""
            # "A quiet machine" alone misleads on a VM whose own speed drifts with nothing else running
            # (README, "What is left is the host"): there, more invocations help, longer ones do not.
            notes.append(f"the pick was flagged noisy{spread}: its timed runs spread widely; remeasure with other "
                         "work on the host stopped, or, if the host's own speed drifts, with more invocations "
                         "([repetitions] invocations) rather than longer ones")
        k = best.get("concurrency", 1)
        if k == k and k is not None and int(k) > 1:
            notes.append(f"the pick is a throughput point: its {stat} is per request while {int(k)} workers run "
                         "at once on the host, and it holds only at that load")
        shared = best.get("shares_machine_with", "")
        if isinstance(shared, str) and shared:
            notes.insert(0, f"the pick's host {best.get('host', '')} shared its machine with {shared} while it was "
                            "measured: its latencies are not fit to compare hardware; remeasure that host alone")
        margin = float(budget_ms - best[col])
    else:
        best, margin, runners = None, None, fits
    return Pick(budget_ms=float(budget_ms), latency=col, best=best, margin_ms=margin,
                runners_up=runners, excluded=excluded.reset_index(drop=True),
                closest_misses=misses.reset_index(drop=True), accuracy_available=acc, notes=notes,
                per_host=_per_host(ok, fits, col, stat, prices is not None), priced=prices is not None)


def _versus_best(runners: pd.DataFrame, best) -> pd.DataFrame:
    """Each runner-up's mAP minus the pick's, with a paired interval where both have per-image results."""
    runners = runners.copy()
    d, lo, hi, paired, tied = [], [], [], [], []
    bm = pd.to_numeric(pd.Series([best.get("map")]), errors="coerce").iloc[0]
    for r in runners.to_dict("records"):
        p = paired_diff(r, best)
        m = pd.to_numeric(pd.Series([r.get("map")]), errors="coerce").iloc[0]
        if p is not None:
            d.append(p["diff"]); lo.append(p["ci_lo"]); hi.append(p["ci_hi"]); paired.append(True)
            tied.append(not p["distinct"])
        else:
            d.append(m - bm); lo.append(np.nan); hi.append(np.nan); paired.append(False)
            r_hi = pd.to_numeric(pd.Series([r.get("map_ci_hi")]), errors="coerce").iloc[0]
            tied.append(bool(pd.notna(r_hi) and pd.notna(best.get("map_ci_lo")) and r_hi >= best["map_ci_lo"]))
    runners["map_vs_best"], runners["map_vs_best_ci_lo"], runners["map_vs_best_ci_hi"] = d, lo, hi
    runners["map_vs_best_paired"], runners["map_vs_best_tied"] = paired, tied
    return runners


def _per_host(ok: pd.DataFrame, fits: pd.DataFrame, col: str, stat: str, priced: bool) -> pd.DataFrame | None:
    """Each host's best fitting row (fits is already ranked), or why it has none."""
    hosts = [h for h in pd.unique(ok["host"].astype(str))] if "host" in ok.columns else []
    if len(hosts) < 2:
        return None
    rows = []
    for h in sorted(hosts):
        mine = fits[fits["host"].astype(str) == h] if len(fits) else fits
        if len(mine):
            b = mine.iloc[0]
            extra = f", {_cost(b, short=True)}" if priced else ""
            answer = f"{b.get('config_label') or b['label']}: {stat} {b[col]:.2f} ms{_acc(b)}{extra}"
            if isinstance(b.get("shares_machine_with", ""), str) and b.get("shares_machine_with", ""):
                answer += " (shared machine: not for hardware comparison)"
            rows.append({"host": h, "point_id": b["point_id"], "answer": answer})
        else:
            theirs = ok[ok["host"].astype(str) == h]
            fastest = pd.to_numeric(theirs[col], errors="coerce").min()
            best_map = pd.to_numeric(theirs["map"], errors="coerce").max() if "map" in theirs.columns else np.nan
            facts = [f"fastest {stat} {fastest:.2f} ms" if fastest == fastest else "",
                     f"best mAP {best_map:.3f}" if best_map == best_map else ""]
            facts = ", ".join(x for x in facts if x)
            rows.append({"host": h, "point_id": "", "answer": "nothing fits the limits" + (f" ({facts})" if facts else "")})
    return pd.DataFrame(rows)
