"""What to buy: the two plans `speedbench size` leads with.

A plan is one row of the sizing table (speedbench.analyse.sizing.size): a configuration on a
server shape, with its server count, utilisation and expected p99. Of the plans that meet
the target (the p99 target when one is given; every sized plan otherwise):

- the cheapest: lowest cost per million frames when a price is known (usd_per_mframe from a
  price table, else cost_per_mframe from a core-hour price), else fewest provisioned cores
  (servers x server cores, the quantity any per-core price multiplies); ties go to the more
  accurate, then to the plan resting on fewer assumptions (not extrapolated);
- the most accurate: highest mAP; ties go to the cheaper.

mAP ties are exact ties here: two configurations whose mAP intervals overlap may be no
different in accuracy, which the text says next to the answer.
"""
from __future__ import annotations

import math

import pandas as pd

COST_BASES = (("usd_per_mframe", "USD per million frames"),
              ("cost_per_mframe", "per million frames at the given core-hour price"),
              ("provisioned_cores", "cores provisioned (no price given)"))


def cost_basis(table: pd.DataFrame) -> tuple[str, str]:
    """(column, wording) of the cost the cheapest plan is chosen by."""
    for col, words in COST_BASES:
        if col in table.columns and pd.to_numeric(table[col], errors="coerce").notna().any():
            return col, words
    return COST_BASES[-1]


def meeting(table: pd.DataFrame) -> pd.DataFrame:
    """The sized plans that meet the target (p99 when the table was sized against one)."""
    ok = pd.to_numeric(table["servers"], errors="coerce").notna()
    if table["meets_p99"].notna().any():
        ok &= table["meets_p99"].fillna(False).astype(bool)
    return table[ok]


def best_plans(table: pd.DataFrame) -> dict:
    """{"cheapest": row | None, "most_accurate": row | None, "basis": (col, words), "n_meeting": int,
    "closest": row | None}. Rows are dicts of the sizing table; closest (when nothing meets the
    target) is the plan with the lowest expected p99."""
    basis = cost_basis(table)
    col = basis[0]
    ok = meeting(table).copy()
    ok["_cost"] = pd.to_numeric(ok[col], errors="coerce")
    ok["_map"] = pd.to_numeric(ok["map"], errors="coerce")
    ok["_extra"] = ok["extrapolated"].fillna(False).astype(bool)
    priced = ok[ok["_cost"].notna()]
    cheapest = most = closest = None
    if len(priced):
        cheapest = _first(priced.assign(_neg_map=-priced["_map"].fillna(-1.0)),
                          ["_cost", "_neg_map", "_extra", "servers"])
    accurate = ok[ok["_map"].notna()]
    if len(accurate):
        most = _first(accurate.assign(_neg_map=-accurate["_map"],
                                      _cost=accurate["_cost"].fillna(math.inf)),
                      ["_neg_map", "_cost", "_extra", "servers"])
    if not len(ok):
        sized = table[pd.to_numeric(table["expected_p99_ms"], errors="coerce").notna()]
        if len(sized):
            closest = _first(sized, ["expected_p99_ms", "provisioned_cores"])
    return {"cheapest": cheapest, "most_accurate": most, "basis": basis, "n_meeting": len(ok),
            "closest": closest}


def _first(df: pd.DataFrame, keys: list[str]) -> dict:
    row = df.sort_values(keys, kind="stable").iloc[0]
    return {k: v for k, v in row.items() if not str(k).startswith("_")}


def best_per_configuration(table: pd.DataFrame) -> pd.DataFrame:
    """One row per configuration (and host): its cheapest shape that meets the target, else its
    shape with the lowest expected p99. The short table `speedbench size` prints."""
    basis = cost_basis(table)[0]
    key = ["label"] + (["host"] if "host" in table.columns else [])
    rows = []
    for _, group in table.groupby(key, sort=False, dropna=False):
        ok = meeting(group)
        if len(ok):
            rows.append(ok.assign(_c=pd.to_numeric(ok[basis], errors="coerce"))
                        .sort_values(["_c", "servers"], kind="stable").iloc[0])
        else:
            rows.append(group.assign(_p=pd.to_numeric(group["expected_p99_ms"], errors="coerce"))
                        .sort_values(["_p", "provisioned_cores"], kind="stable").iloc[0])
    out = pd.DataFrame(rows).drop(columns=["_c", "_p"], errors="ignore")
    out.attrs.update(table.attrs)
    return out.reset_index(drop=True)


def answer_lines(table, with_p99: bool) -> list[str]:
    """Two or three lines: the cheapest plan that meets the target and the most accurate one."""
    best = best_plans(table)
    col, words = best["basis"]
    if best["cheapest"] is None and best["most_accurate"] is None:
        c = best["closest"]
        if c is None:
            return ["No plan: no configuration could be sized on these server shapes."]
        hi = c.get("p99_ci_hi_ms")
        # A plan is judged on its p99 interval's upper bound when one was measured: say so, or an
        # expected p99 under the target reads as a contradiction.
        judged = (f"; judged on the upper bound of its p99 interval, {hi:.1f} ms at utilisation "
                  f"{c['utilisation_hi']:.2f}, it misses" if str(c.get("judged_on", "")).startswith("p99 interval")
                  and isinstance(hi, float) and math.isfinite(hi) else "")
        return [f"No plan meets the target: the lowest expected p99 is {c['expected_p99_ms']:.1f} ms "
                f"({c['label']} on {int(c['servers'])} x {int(c['server_cores'])}-core servers{judged}). Try a "
                "faster configuration, a lower --headroom, or a looser --p99-ms."]
    lines = []
    meets = "meets the p99 target" if with_p99 else "carries the load"
    if best["cheapest"] is not None:
        lines.append(f"  cheapest that {meets}: " + _plan_text(best["cheapest"], col, words))
    if best["most_accurate"] is not None:
        same = best["cheapest"] is not None and _same(best["cheapest"], best["most_accurate"])
        lines.append("  most accurate: " + ("the same plan" if same else _plan_text(best["most_accurate"], col, words)))
        if not same and best["cheapest"] is not None:
            lines.append("  (an mAP gap inside the two configurations' bootstrap intervals, shown by "
                         "`speedbench frontier`, is no real difference)")
    return lines


def _same(a: dict, b: dict) -> bool:
    return a["label"] == b["label"] and a["server_cores"] == b["server_cores"] and a.get("host") == b.get("host")


def _plan_text(r: dict, col: str, words: str) -> str:
    mAP = r.get("map")
    acc = f"mAP {mAP:.3f}" if isinstance(mAP, float) and mAP == mAP else "mAP n/a"
    cost = (f"{int(r['provisioned_cores'])} cores" if col == "provisioned_cores"
            else f"{r.get(col):.3f} {words}")
    where = ("extrapolated beyond the" if bool(r["extrapolated"]) else "within the")
    return (f"{r['label']} ({acc}) on {int(r['servers'])} x {int(r['server_cores'])}-core servers, {cost}\n"
            f"      utilisation {r['utilisation']:.0%}, expected p99 {r['expected_p99_ms']:.1f} ms, "
            f"{where} {int(r['measured_cores'])} measured cores")
