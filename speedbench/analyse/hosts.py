"""Several runs, one table: each run's points keyed by the host that measured them.

Latency only means something on the machine that produced it, so points from
different runs are told apart by a *host key*: the run's host label when it has
one, else one derived from its fingerprint (CPU model and logical cores). Two
runs under one key must come from the same machine (same fingerprint) and must
not both hold the same configuration; either problem is a one-line UserError,
because silently merging them would mix two machines, or two measurements of one
point, into one figure.
"""
from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from speedbench.analyse.common import with_ids
from speedbench.analyse.runs import Run, as_run
from speedbench.errors import UserError

FINGERPRINT = ("cpu_model", "cores_logical")   # what must match for two runs to be one host
RUN_MARKERS = ("meta.json", "points.sqlite")


def is_run_dir(p: Path) -> bool:
    return p.is_dir() and any((p / m).exists() for m in RUN_MARKERS)


def run_paths(paths) -> list[Path]:
    """Expand the paths given on a command line into run directories.

    A path is a run directory, or a parent holding run directories one level down
    (a fleet sweep writes OUT/<label>/ per host). The same directory given twice is
    read once.
    """
    out: list[Path] = []
    for raw in ([paths] if isinstance(paths, (str, Path)) else list(paths)):
        p = Path(raw)
        if not p.exists():
            raise UserError(f"{p}: run directory not found")
        if is_run_dir(p) or not p.is_dir():
            found = [p]          # a file or a broken run directory: Run.load names the problem
        else:
            found = sorted(c for c in p.iterdir() if is_run_dir(c))
            if not found:
                raise UserError(f"{p}: not a run directory, and holds no run directories (no meta.json "
                                "or points.sqlite in it or in its subdirectories)")
        for f in found:
            if f.resolve() not in {o.resolve() for o in out}:
                out.append(f)
    return out


def load_runs(paths) -> list[Run]:
    """Run directories (or parents of run directories, see run_paths) -> Runs."""
    return [Run.load(p) for p in run_paths(paths)]


def fingerprint(run: Run) -> dict:
    env = (run.meta or {}).get("env") or {}
    return {k: env.get(k) for k in FINGERPRINT}


def host_key(run: Run) -> str:
    """The user's label when set; else the label on the rows; else CPU model and core count."""
    label = str((run.meta or {}).get("host") or "").strip()
    if label:
        return label
    if "host" in run.points.columns:
        rows = {str(h) for h in run.points["host"] if isinstance(h, str) and h}
        if len(rows) == 1:
            return rows.pop()
    fp = fingerprint(run)
    if fp["cpu_model"]:
        model = re.sub(r"\((R|TM|tm|r)\)|\bCPU\b", "", str(fp["cpu_model"]))
        model = " ".join(model.split())
        return f"{model} x{fp['cores_logical']}" if fp["cores_logical"] else model
    return ""


def shares_machine_with(run: Run) -> list[str]:
    """Other host labels that measured on the same machine at the same time (fleet sweeps)."""
    meta = run.meta or {}
    entries = [meta.get("fleet") or {}] + [e for e in (meta.get("fleet_resumed") or []) if isinstance(e, dict)]
    out: list[str] = []
    for e in entries:
        for lb in e.get("shares_machine_with") or []:
            if str(lb) not in out:
                out.append(str(lb))
    return out


@dataclass
class Combined:
    """Points and samples of several runs, every row tagged with its host key."""
    points: pd.DataFrame                 # `host` = host key; `config_label` = label without the host;
                                         # `shares_machine_with` = other labels on that machine ("" = none)
    samples: pd.DataFrame                # [point_id, i, ms], point ids as in `points`
    hosts: pd.DataFrame                  # one row per host: host, cpu_model, cores_logical, runs, points, shares_machine_with
    runs: list[Run] = field(default_factory=list)

    @property
    def host_names(self) -> list[str]:
        return list(self.hosts["host"])

    @property
    def multi_host(self) -> bool:
        return len(self.hosts) > 1

    def warnings(self) -> list[str]:
        """Everything a reader comparing these hosts must see first."""
        return self.shared_machine_warnings() + self.same_cpu_notes()

    def same_cpu_notes(self) -> list[str]:
        """Hosts with the same CPU model and core count: their differences are run conditions, not hardware."""
        out = []
        known = self.hosts.dropna(subset=list(FINGERPRINT))
        for _, g in known.groupby(list(FINGERPRINT), sort=False):
            if len(g) > 1:
                names = ", ".join(g["host"])
                cores = g["cores_logical"].iloc[0]
                cores = int(cores) if isinstance(cores, (int, float)) and cores == int(cores) else cores
                out.append(f"hosts {names} report the same CPU ({g['cpu_model'].iloc[0]}, "
                           f"{cores} logical cores): differences between them come from "
                           "run conditions (load, frequency, neighbours) or the machine itself, not the CPU type")
        return out

    def shared_machine_warnings(self) -> list[str]:
        out = []
        for r in self.hosts.itertuples():
            if r.shares_machine_with:
                out.append(f"host {r.host} shared its machine with {', '.join(r.shares_machine_with)} during a "
                           "fleet sweep: its latencies were measured while other points ran on the same cores "
                           "and must not be used to compare hardware")
        return out


def combine(runs) -> Combined:
    """One points table from one or several runs (Run, path or DataFrame each), keyed by host.

    Point ids and labels stay as they are when only one host is involved. With several
    hosts, point ids become ``<id>@<host>`` (samples follow) and labels gain `` [host]``,
    so one configuration measured on two hosts stays two rows everywhere downstream;
    `config_label` keeps the label without the host, for per-host views.
    """
    runs = [as_run(r) for r in (runs if isinstance(runs, (list, tuple)) else [runs])]
    if not runs:
        raise UserError("no run given")
    runs = [part for r in runs for part in _split_hosts(r)]
    keys = []
    for k, r in enumerate(runs):
        keys.append(host_key(r) or (Path(r.path).name if r.path else f"run{k + 1}"))
    _check_same_key(runs, keys)
    multi = len(set(keys)) > 1
    pts, smp, hosts = [], [], {}
    for r, key in zip(runs, keys):
        p = with_ids(r.points)
        p["host"] = key
        p["config_label"] = p["label"]
        p["shares_machine_with"] = ", ".join(shares_machine_with(r))  # read by pick to flag its answer
        s = r.samples.copy() if r.samples is not None else pd.DataFrame(columns=["point_id", "i", "ms"])
        if multi:
            p["label"] = p["label"] + f" [{key}]"
            p["point_id"] = p["point_id"].astype(str) + f"@{key}"
            s["point_id"] = s["point_id"].astype(str) + f"@{key}"
        pts.append(p)
        smp.append(s)
        h = hosts.setdefault(key, {"host": key, **fingerprint(r), "runs": [], "points": 0,
                                   "shares_machine_with": []})
        h["runs"].append(r.name)
        h["points"] += len(p)
        for lb in shares_machine_with(r):
            if lb not in h["shares_machine_with"]:
                h["shares_machine_with"].append(lb)
    points = pd.concat(pts, ignore_index=True)
    samples = pd.concat(smp, ignore_index=True) if smp else pd.DataFrame(columns=["point_id", "i", "ms"])
    table = pd.DataFrame(list(hosts.values()), columns=["host", *FINGERPRINT, "runs", "points", "shares_machine_with"])
    return Combined(points=points, samples=samples, hosts=table, runs=runs)


def _split_hosts(run: Run) -> list[Run]:
    """A bare table that already holds several hosts (e.g. Combined.points) -> one Run per host.

    Tags added by an earlier combine (``@host`` on ids, `` [host]`` on labels) are taken off,
    so combining a combined table again gives the same result.
    """
    if run.meta or "host" not in run.points.columns:
        return [run]
    hosts = [h for h in pd.unique(run.points["host"].astype(str)) if h]
    if len(hosts) < 2:
        return [run]
    parts = []
    for h in hosts:
        p = run.points[run.points["host"].astype(str) == h].copy()
        tag = f"@{h}"
        old_ids = set(p["point_id"].astype(str)) if "point_id" in p.columns else set()
        if "point_id" in p.columns:
            p["point_id"] = [i.removesuffix(tag) if isinstance(i, str) else i for i in p["point_id"]]
        if "config_label" in p.columns:
            p["label"] = p["config_label"]
        s = None
        if run.samples is not None and len(old_ids):
            s = run.samples[run.samples["point_id"].astype(str).isin(old_ids)].copy()
            s["point_id"] = s["point_id"].astype(str).str.removesuffix(tag)
        shared = sorted({x.strip() for v in p.get("shares_machine_with", pd.Series(dtype=str))
                         if isinstance(v, str) for x in v.split(",") if x.strip()})
        parts.append(Run(points=p.drop(columns=["shares_machine_with"], errors="ignore"), samples=s,
                         meta={**run.meta, "host": h, "fleet": {"shares_machine_with": shared}},
                         path=f"{run.name} [{h}]", profile_text=run.profile_text))
    return parts


def _check_same_key(runs: list[Run], keys: list[str]) -> None:
    """Runs sharing a host key: same machine, and no configuration measured twice."""
    first: dict[str, int] = {}
    for k, key in enumerate(keys):
        if key not in first:
            first[key] = k
            continue
        a, b = runs[first[key]], runs[k]
        fa, fb = fingerprint(a), fingerprint(b)
        for field_ in FINGERPRINT:
            if fa[field_] is not None and fb[field_] is not None and fa[field_] != fb[field_]:
                raise UserError(f"{b.name}: host {key!r} has env.{field_} {fb[field_]!r} here but {fa[field_]!r} "
                                f"in {a.name}; two machines under one label: give each its own host label")
    ids = {}
    for k, (r, key) in enumerate(zip(runs, keys)):
        p = with_ids(r.points)
        for pid, lab in zip(p["point_id"], p["label"]):
            seen = ids.setdefault((key, pid), k)
            if seen != k:
                raise UserError(f"{r.name}: configuration {lab} on host {key!r} is also in {runs[seen].name}; "
                                "pass only one of the two runs (or give the runs different host labels)")
