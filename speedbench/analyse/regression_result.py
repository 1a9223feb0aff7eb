"""The result of a comparison and its three renderings: terminal text, Markdown, JSON."""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from speedbench.analyse.common import as_float as _f
from speedbench.analyse.hostspeed import host_lines
from speedbench.analyse.common import md_cell as _md


def verdict_table(rows: list[dict]) -> pd.DataFrame:
    """One row per compared point, regressions first, then the largest ratio (both compare modes)."""
    points = pd.DataFrame(rows)
    if not len(points):
        return pd.DataFrame(columns=["point_id", "label", "verdict", "regression", "ratio"])
    points = points.sort_values(["regression", "ratio"], ascending=[False, False], kind="stable")
    return points.reset_index(drop=True)


@dataclass
class Comparison:
    points: pd.DataFrame          # one row per matched configuration
    env_diff: pd.DataFrame        # key, base, new
    unmatched: pd.DataFrame       # side ("base only" / "new only"), point_id, label
    threshold: float
    confidence: float
    base_name: str = "base"
    new_name: str = "new"
    fail_on_drift: bool = False
    notes: list[str] = field(default_factory=list)
    host: dict = field(default_factory=dict)     # the host's speed change (analyse/hostspeed.py)

    @property
    def regressed(self) -> bool:
        return bool(self.points["regression"].any()) if len(self.points) else False

    def counts(self) -> dict:
        c = self.points["verdict"].value_counts().to_dict() if len(self.points) else {}
        return {k: int(v) for k, v in c.items()}

    def _summary(self) -> str:
        head = "REGRESSION" if self.regressed else "no regression"
        parts = ", ".join(f"{v} {k}" for k, v in sorted(self.counts().items()))
        return (f"{head}: {len(self.points)} matched point(s) ({parts or 'none'}); "
                f"{len(self.unmatched)} unmatched; threshold {self.threshold:.0%}, "
                f"confidence {self.confidence:.0%}")

    def show_adjusted(self) -> bool:
        """Probe-adjusted columns appear when the host moved beyond the threshold, or when they
        would change a verdict: never a silent difference between the two."""
        if "adj_verdict" not in self.points.columns:
            return False
        if self.host.get("status") != "recorded" and not self.by_reference:
            return False
        ok = self.points["adj_verdict"].isin(["slower", "faster", "unchanged", "unknown"])
        return bool(self.host.get("exceeds")) or bool((self.points["adj_verdict"] != self.points["verdict"])[ok].any())

    @property
    def by_reference(self) -> bool:
        """Some points were adjusted by the host reference (analyse/hostref.py), not the probe."""
        return (self.host.get("reference") or {}).get("status") == "used"

    def _table(self) -> list[list[str]]:
        rows = []
        adjusted = self.show_adjusted()
        for _, r in self.points.iterrows():
            ungated = r["verdict"] in ("slower", "faster") and not bool(r.get("gated", True))
            row = [r["label"], _ms(r["base_p50_ms"]), _ms(r["new_p50_ms"]), _ratio(r),
                   r["verdict"] + (" (1 process, not gated)" if ungated else "")]
            if adjusted:
                row += [_ratio(r, "adj_"), r.get("adj_verdict", "n/a")]
            rows.append(row + [_signed(r["mem_delta_mib"], "MiB", 0), _acc(r), r["drift"], r["stage_note"]])
        return rows

    HEADER = ["configuration", "base p50", "new p50", "ratio [CI]", "verdict",
              "peak mem", "mAP delta [CI]", "detections", "stages"]
    ADJUSTED_HEADER = ["probe-adjusted ratio [CI]", "adjusted verdict"]

    def header(self) -> list[str]:
        if not self.show_adjusted():
            return list(self.HEADER)
        adjusted = (["host-adjusted ratio [CI]", "adjusted verdict"] if self.by_reference
                    else self.ADJUSTED_HEADER)
        return self.HEADER[:5] + adjusted + self.HEADER[5:]

    def _host_lines(self) -> list[str]:
        return host_lines(self.host, self.threshold, self.base_name, self.new_name)

    def to_text(self) -> str:
        lines = [f"compare {self.base_name} -> {self.new_name}", self._summary(), *self._host_lines(), ""]
        lines += _aligned(self.header(), self._table())
        if len(self.env_diff):
            lines += ["", "Environment changes:"]
            lines += [f"  {r.key}: {r.base} -> {r.new}" for r in self.env_diff.itertuples()]
        else:
            lines += ["", "Environment: no recorded difference"]
        if len(self.unmatched):
            lines += ["", "Unmatched points (not compared):"]
            lines += [f"  {r.side}: {r.label} [{r.point_id}]" for r in self.unmatched.itertuples()]
        lines += [f"Note: {n}" for n in self.notes]
        return "\n".join(lines)

    def to_markdown(self) -> str:
        icon = "Regression" if self.regressed else "No regression"
        header = self.header()
        out = [f"### speedbench compare: {icon}", "", _md(self._summary()), ""]
        out += [f"> {_md(x)}" for x in self._host_lines()] + ([""] if self._host_lines() else [])
        out += [f"Base: `{_md(self.base_name)}` - new: `{_md(self.new_name)}`", "",
                "| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
        for row in self._table():
            cells = [_md(c) for c in row]
            cells[4] = f"**{cells[4]}**" if row[4] in ("slower", "failed in new") else cells[4]
            out.append("| " + " | ".join(cells) + " |")
        out += ["", "#### Environment changes", ""]
        if len(self.env_diff):
            out += ["| key | base | new |", "|---|---|---|"]
            out += [f"| {_md(r.key)} | {_md(r.base)} | {_md(r.new)} |" for r in self.env_diff.itertuples()]
        else:
            out.append("No recorded difference.")
        if len(self.unmatched):
            out += ["", "#### Unmatched points (not compared)", ""]
            out += [f"- {_md(r.side)}: {_md(r.label)} (`{_md(r.point_id)}`)" for r in self.unmatched.itertuples()]
        if self.notes:
            out += [""] + [f"> {_md(n)}" for n in self.notes]
        return "\n".join(out) + "\n"

    def to_json(self) -> str:
        doc = {
            "regressed": self.regressed, "threshold": self.threshold, "confidence": self.confidence,
            "base": self.base_name, "new": self.new_name, "counts": self.counts(),
            "points": _records(self.points), "env_diff": _records(self.env_diff),
            "unmatched": _records(self.unmatched), "notes": self.notes,
            "host_speed": {k: (None if isinstance(v, float) and not math.isfinite(v) else v)
                           for k, v in self.host.items()},
        }
        return json.dumps(doc, indent=2, allow_nan=False, default=str)


def _ms(v):
    return "-" if not np.isfinite(_f(v)) else f"{v:.2f} ms"


def _ratio(r, prefix=""):
    ratio, lo, hi = _f(r.get(f"{prefix}ratio")), _f(r.get(f"{prefix}ci_lo")), _f(r.get(f"{prefix}ci_hi"))
    if not np.isfinite(ratio):
        return "-"
    if not np.isfinite(lo):
        return f"{ratio:.3f}"
    return f"{ratio:.3f} [{lo:.3f}, {hi:.3f}]"


def _signed(v, unit, digits):
    return "-" if not np.isfinite(_f(v)) else f"{v:+.{digits}f} {unit}"


def _acc(r):
    if not np.isfinite(_f(r.get("map_delta"))):
        return "n/a"
    if not np.isfinite(_f(r.get("map_delta_ci_lo"))):
        return f"{r['map_delta']:+.3f} (no CI)"
    return f"{r['map_delta']:+.3f} [{r['map_delta_ci_lo']:+.3f}, {r['map_delta_ci_hi']:+.3f}]"


def _aligned(header, rows):
    widths = [max(len(str(x)) for x in col) for col in zip(header, *rows)] if rows else [len(h) for h in header]
    fmt = lambda cells: "  ".join(str(c).ljust(w) for c, w in zip(cells, widths)).rstrip()  # noqa: E731
    return [fmt(header)] + [fmt(r) for r in rows]


def _records(df: pd.DataFrame) -> list[dict]:
    recs = df.to_dict("records")
    return [{k: (None if isinstance(v, float) and not math.isfinite(v) else
                 (v.item() if hasattr(v, "item") else v)) for k, v in r.items()} for r in recs]
