"""One point from plan to row: the one path the local sweep, a fleet task and `speedbench load` share.

    PlannedPoint (plan.py: a measure.Point + its GraphKey)
      -> GraphStore.prepare: export + accuracy, once per GraphKey, copied into an explicit exports dir
      -> run_point(job, context): measure in fresh worker process(es)
      -> build_row: the one row builder, for ok and failed rows alike

The callers are schedulers only: they decide the order, the parallelism and where rows go.
Every failure of a step becomes data (a failed row, a note), never an exception.
"""
from __future__ import annotations

import dataclasses
import os
import shutil
import time
from dataclasses import dataclass, field
from pathlib import Path

from speedbench import schema
from speedbench.errors import UserError, one_line
from speedbench.measure.launch import SETTLE_S, measure_point
from speedbench.measure.backends import get_backend
from speedbench.measure.concurrent_launch import add_curve, measure_load
from speedbench.measure.concurrent_result import combine_loads, single_stream_fps  # single_stream_fps: re-exported
from speedbench.measure.peak import ensure_peaks, peak_for
from speedbench.sweep import external, quantised, run_setup
from speedbench.sweep.plan import GraphKey, PlannedPoint
from speedbench.zoo import trained_sizes

NAN = float("nan")


@dataclass
class PreparedGraph:
    """One distinct graph (a GraphKey): its exported file, export facts and accuracy."""
    path: str | None = None
    ok: bool = True
    reason: str = ""
    facts: dict = field(default_factory=dict)       # params, gmacs, model_file_mib, opset, parity_passed
    accuracy: dict = field(default_factory=dict)    # schema.ACCURACY_COLUMNS (+ digest, thread check)
    notes: list = field(default_factory=list)
    run_meta: dict = field(default_factory=dict)    # what the run's meta.json keeps of it (int8: quantisation)


class GraphStore:
    """Prepares each graph once: export (content-hash cache), a copy in `exports_dir`, accuracy.

    status(text): told what is being prepared (a progress line); on_prepared(key, graph): called
    once per newly prepared graph (the sweep records its thread check in meta.json).
    """

    def __init__(self, profile, dataset, exports_dir, per_image_dir=None, status=None, on_prepared=None):
        self.profile, self.dataset = profile, dataset
        self.cache = Path(profile.cache)
        self.exports_dir = Path(exports_dir)
        self.per_image_dir = Path(per_image_dir) if per_image_dir else None
        self.status = status or (lambda text: None)
        self.on_prepared = on_prepared
        self._graphs: dict[GraphKey, PreparedGraph] = {}
        self.sealed = False     # True: every graph was prepared elsewhere; never export here

    @classmethod
    def prepared(cls, profile, graphs: dict) -> "GraphStore":
        """A store of graphs prepared elsewhere (an interleaved run prepares each environment's
        graphs with that environment's interpreter); a graph it lacks is a failed graph."""
        store = cls(profile, None, ".")
        store._graphs.update(graphs)
        store.sealed = True
        return store

    def prepare(self, planned: PlannedPoint) -> PreparedGraph:
        if planned.config["backend"] == "synthetic":
            return PreparedGraph()   # the synthetic backend runs no graph
        key = planned.graph_key
        if key not in self._graphs and self.sealed:
            return PreparedGraph(ok=False, reason=f"graph {key.model} {key.size}px was not prepared")
        if key not in self._graphs:
            self.status(f"export {key.model} {key.size}px")
            self._graphs[key] = graph = self._prepare(key)
            if self.on_prepared is not None:
                self.on_prepared(key, graph)
        return self._graphs[key]

    def _prepare(self, key: GraphKey) -> PreparedGraph:
        from speedbench.export import export_onnx

        entry = external.entry_of(self.profile, key.model)
        if entry is not None:
            return self._prepare_external(key, entry)

        try:
            # proposals 0 means "no such knob": the exporter keeps the model's own setting.
            record = export_onnx(key.model, weights=key.weights, size=key.size, proposals=key.proposals or None,
                                 cache_dir=self.cache / "exports")
        except UserError as exc:
            return PreparedGraph(ok=False, reason=f"export: {exc}")
        except Exception as exc:  # an exporter crash is a failed graph, not a failed sweep
            return PreparedGraph(ok=False, reason=f"export: {type(exc).__name__}: {one_line(exc)}")
        fp32 = record
        if key.precision == "int8" and record.ok:
            self.status(f"quantise {key.model} {key.size}px")
            try:
                record = quantised.quantised_record(record, self.profile, self.cache, self.dataset)
            except UserError as exc:
                return PreparedGraph(ok=False, reason=f"quantisation: {exc}")
        if not record.ok:
            return PreparedGraph(ok=False, reason=f"export: {record.reason}")
        graph = PreparedGraph(path=str(link_into(Path(record.path), self.exports_dir)), facts=_facts(record),
                              notes=list(record.notes or []))
        if record is not fp32:   # its export record (settings, calibration set) goes with the run
            link_into(Path(record.path).with_suffix(".json"), self.exports_dir)
            graph.run_meta["quantisation"] = quantised.run_meta(self.profile, self.cache, self.dataset)
        if key.weights == "none" or not self.profile.accuracy or self.dataset is None:
            return graph
        self.status(f"accuracy {key.model} {key.size}px")
        graph.accuracy = self._accuracy(record.path, key, graph.notes)
        if record is not fp32 and graph.accuracy:
            # the fp32 graph of the same configuration, on the same images (its accuracy is cached)
            try:
                graph.accuracy.update(quantised.change_vs_fp32(
                    fp32.path, record.path, self._accuracy(fp32.path, key, []), graph.accuracy, self.dataset,
                    self.profile, self.cache / "accuracy", run_setup.detections_dir(self.cache)))
            except UserError as exc:
                graph.notes.append(f"change vs fp32 not measured: {exc}")
        return graph

    def score(self, key: GraphKey, graph: PreparedGraph) -> PreparedGraph:
        """Accuracy of a graph prepared elsewhere, on the profile's dataset (with this process's
        runtime): an interleaved run scores each environment's graph with its own interpreter."""
        if not graph.ok or key.weights == "none" or not self.profile.accuracy or self.dataset is None:
            return graph
        self.status(f"accuracy {key.model} {key.size}px")
        graph.accuracy = self._accuracy(graph.path, key, graph.notes)
        return graph

    def _accuracy(self, path, key: GraphKey, notes: list) -> dict:
        acc = run_setup.accuracy(Path(path), key.model, self.profile, self.dataset, self.cache, notes)
        if acc.get("per_image_key") and self.per_image_dir is not None:
            link_into(self.cache / "accuracy" / f"{acc['per_image_key']}.npz", self.per_image_dir)
        return acc


    def _prepare_external(self, key: GraphKey, entry) -> PreparedGraph:
        """An external graph: the user's file (no export), its facts, accuracy through its adapter."""
        try:
            src = Path(entry.onnx)
            # named by content: a file replaced under the same name is a new graph, never a stale link
            linked = link_into(src, self.exports_dir, f"{src.stem}-{run_setup.file_digest(src)}{src.suffix}")
            graph = PreparedGraph(path=str(linked), facts=external.graph_facts(entry),
                                  notes=external.graph_notes(entry))
        except UserError as exc:
            return PreparedGraph(ok=False, reason=f"external graph: {exc}")
        if not self.profile.accuracy or self.dataset is None:
            return graph
        self.status(f"accuracy {key.model} {key.size}px")
        graph.accuracy = run_setup.accuracy(src, key.model, self.profile, self.dataset, self.cache, graph.notes,
                                        external.evaluation_args(entry, key.size, key.proposals))
        if graph.accuracy.get("per_image_key") and self.per_image_dir is not None:
            link_into(self.cache / "accuracy" / f"{graph.accuracy['per_image_key']}.npz", self.per_image_dir)
        return graph


def _facts(record) -> dict:
    """Export facts as row columns: params, gmacs, file size, opset, parity with torch eager."""
    facts = dict(record.facts or {})
    out = {k: facts[k] for k in ("params", "gmacs") if facts.get(k) is not None}
    per_stage = facts.get("gmacs_per_stage")
    if isinstance(per_stage, dict):
        # achieved GMAC/s per stage = these / the stage's ms (analyse.efficiency); a stage the
        # counter saw no matrix op in has 0 (NaN would read as "not recorded")
        for stage in schema.STAGES:
            out[schema.stage_gmacs_column(stage)] = float(per_stage.get(stage) or 0.0)
    out["model_file_mib"] = round(Path(record.path).stat().st_size / 2**20, 3)
    out["opset"] = record.opset
    parity = record.parity or {}
    if "passed" in parity:
        out["parity_passed"] = bool(parity["passed"])
    if record.precision != "fp32":
        q = record.quantisation or {}
        out["calibration_fingerprint"] = (q.get("calibration") or {}).get("fingerprint")
        out["quantisation"] = ", ".join(f"{k}={v}" for k, v in q.items()
                                        if k in ("method", "per_channel", "op_types", "reduce_range"))
    return out


def link_into(path: Path, directory: Path, name: str | None = None) -> Path:
    """Keep a copy of a file in `directory` (a hard link when possible: no extra space)."""
    directory.mkdir(parents=True, exist_ok=True)
    target = directory / (name or path.name)
    if target.exists():
        return target
    tmp = directory / f".{path.name}.{os.getpid()}.tmp"
    try:
        os.link(path, tmp)
    except OSError:
        shutil.copyfile(path, tmp)
    os.replace(tmp, target)
    return target


# ----------------------------------------------------------------- running one point
@dataclass(frozen=True)
class ThroughputSettings:
    """`speedbench load`: every K (K = 1 too) measured as a throughput point with these settings."""
    seconds: float = 5.0
    pin: bool = False
    invocations: int | None = None   # worker launches (R) per K; None: the profile's [repetitions] invocations


@dataclass
class PointContext:
    """What every point of one run on one host shares."""
    profile: object                  # sweep.profile.Profile
    graphs: GraphStore
    images: list                     # timing images, decoded once
    policy: object                   # measure.Policy
    host: str
    throughput: ThroughputSettings | None = None   # `speedbench load`: every K measured under load
    # this host's fp32 matmul peak (measure.peak), filled in for each thread count a point needs
    peaks: dict | None = None
    python: str | None = None        # the workers' interpreter (default: this one; see sweep/interleaved.py)


@dataclass
class PointJob:
    planned: PlannedPoint
    baseline_fps: float | None = None   # X(1) of the K = 1 sibling (single_stream_fps), for scaling_eff
    curve: tuple = ()                    # paced runs at these fractions of capacity (load_curve column)


@dataclass
class PointOutcome:
    row: dict
    samples: list
    measured: bool          # False: nothing ran (graph missing, a configuration this host cannot run)
    graph: PreparedGraph
    invocations: list | None = None     # the invocation index of each sample (None: all 0)


def make_context(profile, dataset, exports_dir, host: str, per_image_dir=None, status=None, on_prepared=None,
                 throughput: ThroughputSettings | None = None) -> PointContext:
    return PointContext(profile=profile, graphs=GraphStore(profile, dataset, exports_dir, per_image_dir, status,
                                                           on_prepared),
                        images=run_setup.timing_images(dataset, profile.timing_images),
                        policy=run_setup.make_policy(profile.repetitions), host=host, throughput=throughput)


def invocations_of(context: PointContext) -> int:
    """R: how many invocations (fresh worker launches) a point of this context gets."""
    settings = context.throughput
    got = settings.invocations if settings is not None and settings.invocations else getattr(context.profile,
                                                                                              "invocations", 1)
    return max(1, int(got))


def run_point(job: PointJob, context: PointContext) -> PointOutcome:
    """Prepare the point's graph, measure it in its own worker(s), build its row. Never raises
    for a failure of the point: the row then has status "failed" and the reason.

    Every point, one-stream or throughput (K workers at once), runs R invocations one after
    the other (invocations_of); the local sweep interleaves them over all points instead
    (run_invocation + finish_point, sweep/schedule.py).
    """
    outcome = []
    for i in range(invocations_of(context)):
        if i:
            time.sleep(SETTLE_S)
        got = run_invocation(job, context, i)
        if isinstance(got, str):
            outcome = got
            break
        outcome.append(got)
    return finish_point(job, context, outcome)


def _peaks(peaks: dict | None, config: dict) -> dict | None:
    """The host's matmul peak at 1 thread and at this point's thread count, measured once per
    context (a local sweep measures every thread count up front and records it in meta.json)."""
    if config["backend"] == "synthetic":
        return peaks
    return ensure_peaks(peaks, {1, int(config["intra_threads"])})


def _worker_point(planned: PlannedPoint, profile, graph: PreparedGraph):
    """The measure.Point a worker runs: the planned point with its graph file, the synthetic
    backend's settings, and an external graph's adapter (the proposals axis applied)."""
    c = planned.config
    entry = external.entry_of(profile, c["model"]) if c["backend"] == "adapted" else None
    return dataclasses.replace(planned.point, graph=graph.path,
                               options=dict(profile.synthetic) if c["backend"] == "synthetic" else {},
                               **(external.point_fields(entry, c["proposals"]) if entry is not None else {}))


def _measure_load(job: PointJob, context: PointContext, point):
    """One invocation of a throughput point: K workers together (+ its paced curve runs)."""
    c, profile = job.planned.config, context.profile
    settings = context.throughput or ThroughputSettings(seconds=None)
    kwargs = {"policy": context.policy, "timeout_s": profile.timeout_s, "seconds": settings.seconds,
              "pin": settings.pin}
    result = measure_load(point, context.images, k=c["concurrency"], baseline_fps=job.baseline_fps, **kwargs)
    if job.curve:
        add_curve(result, point, context.images, job.curve, **kwargs)
    return result


def run_invocation(job: PointJob, context: PointContext, index: int):
    """Invocation `index` of a point: one worker process of a one-stream point (a PointResult),
    or K workers measured together of a throughput point (a LoadResult); or a str saying why
    nothing could run (the graph failed; a configuration this host cannot run; a harness
    error). Only invocation 0 of a one-stream point runs the stage profile."""
    planned, profile = job.planned, context.profile
    try:
        graph = context.graphs.prepare(planned)
        if not graph.ok and planned.config["backend"] != "eager":   # eager builds its model itself
            return graph.reason
        point = _worker_point(planned, profile, graph)
        t0 = time.monotonic()
        if is_throughput(planned, context):
            result = _measure_load(job, context, point)
            result.invocation = [index] * len(result.latencies_ms)
            result.curve_runs = [(u, index, lat) for u, _, lat in result.curve_runs]
            result.extra["invocation"] = index
        else:
            policy = context.policy if index == 0 else dataclasses.replace(context.policy, profile_stages=False)
            result = measure_point(point, context.images, policy, profile.timeout_s, invocation=index,
                                   python=context.python)
        result.extra["wall_s"] = round(time.monotonic() - t0, 3)
        return result
    except UserError as exc:
        return str(exc)
    except Exception as exc:  # a harness bug on one point must not cost the others
        return f"{type(exc).__name__}: {one_line(exc)}"


def is_throughput(planned: PlannedPoint, context: PointContext) -> bool:
    """K > 1, or any K under `speedbench load`: measured by K workers at once (measure.concurrent_launch)."""
    return planned.config["concurrency"] != 1 or context.throughput is not None


def finish_point(job: PointJob, context: PointContext, outcome) -> PointOutcome:
    """The row of a point from its invocations (PointResults or LoadResults, combined by the
    hierarchical bootstrap), or a failed row from the reason none ran."""
    from speedbench.measure.result import combine_invocations

    graph = context.graphs.prepare(job.planned)     # prepared already: served from the store
    if isinstance(outcome, str):
        row = build_row(job.planned, graph, context.host, reason=outcome)
        row["wall_s"] = 0.0
        return PointOutcome(row=row, samples=[], measured=False, graph=graph)
    if is_throughput(job.planned, context):
        result = combine_loads(list(outcome))
        index = list(result.invocation)
        k = int(job.planned.config["concurrency"])
        if result.ok and job.baseline_fps and k > 1:   # X(1) known now (a fleet host may learn it late)
            result.summary["scaling_eff"] = result.tput_fps / (k * job.baseline_fps)
    else:
        result = combine_invocations(list(outcome))
        index = None if result.measurement is None else result.measurement.invocation.tolist()
    row = build_row(job.planned, graph, context.host, result=result)
    if job.planned.config["backend"] != "synthetic":
        context.peaks = _peaks(context.peaks, job.planned.config)
        row["matmul_peak_gmac_s"] = peak_for(context.peaks, int(job.planned.config["intra_threads"]))
    row["wall_s"] = round(sum(float(r.extra.get("wall_s", 0.0)) for r in outcome), 3)
    return PointOutcome(row=row, samples=_samples(result), measured=True, graph=graph, invocations=index)


def _samples(result) -> list:
    if result is None:
        return []
    if hasattr(result, "latencies_ms"):
        return [float(x) for x in result.latencies_ms or []]
    return [] if result.measurement is None else [float(x) for x in result.measurement.samples_ms]


def build_row(planned: PlannedPoint, graph: PreparedGraph, host: str, result=None, reason: str = "") -> dict:
    """The one row builder: a measured result's row, or a failed row with `reason`, plus the
    graph's columns (facts, accuracy), host, family and notes. Column names: speedbench.schema."""
    if result is not None:
        row = result.to_row()                   # its own config (a pinned load point may differ)
        row.update(_worker_columns(getattr(result, "extra", None) or {}))
    else:
        row = {**planned.config, "point_id": planned.point_id, "status": "failed", "reason": reason}
    c = planned.config
    untrained = c["weights"] == "none"
    row.update(host=host, family=planned.family, untrained=untrained)
    for k, v in graph.facts.items():
        # Eager points keep the worker's own model size (parameter bytes), not the ONNX file's.
        if not (k == "model_file_mib" and c["backend"] == "eager"):
            row[k] = v
    for k in schema.ACCURACY_COLUMNS:
        row[k] = NAN if untrained else graph.accuracy.get(k, NAN)
    if not untrained:
        row.update({k: v for k, v in graph.accuracy.items() if k not in schema.ACCURACY_COLUMNS})
    notes = list(planned.notes) + list(graph.notes)
    if not graph.ok and c["backend"] == "eager":
        notes.append(f"accuracy not measured ({graph.reason})")
    if untrained and not any(n.startswith("untrained") for n in notes):
        notes.append("untrained weights: latency only, accuracy not meaningful")
    row["note"] = "; ".join(notes)
    return row


def _worker_columns(extra: dict) -> dict:
    """The worker's details that help read a row: how warm-up and timing ended."""
    out = {}
    if "warmup_runs" in extra:
        out["warmup_runs"] = extra["warmup_runs"]
        out["warmup_settled"] = bool(extra.get("warmup_settled"))
    if "stop" in extra:
        out["stop_reason"] = extra["stop"]
    if "seconds" in extra:
        out["timing_s"] = extra["seconds"]
    tail = (extra.get("stderr_tail") or "").strip().splitlines()
    if tail:
        # Last line the worker printed before it failed: often the actual cause.
        out["worker_stderr"] = tail[-1][-300:]
    return out


# ----------------------------------------------------------------- what a report needs later
def run_facts(points) -> dict:
    """Facts of this version of speedbench that a report of the run quotes, recorded in meta.json
    when the run is made (a report renders only what the run recorded, never today's code):
    timed_regions {backend: what its timed call includes}; trained_sizes {"model|weights": input
    sizes the weights were trained at, or None where nothing records them}."""
    regions, sizes = {}, {}
    for p in points:
        c = p.config
        regions.setdefault(c["backend"], get_backend(c["backend"]).TIMED_REGION)
        if c["backend"] != "synthetic":
            sizes.setdefault(f"{c['model']}|{c['weights']}", trained_sizes(c["model"], c["weights"]))
    return {"timed_regions": regions, "trained_sizes": sizes}


def record_run_facts(rd, points) -> None:
    """Add run_facts(points) to a run directory's meta.json, keeping what earlier sessions recorded."""
    meta, facts = rd.meta(), run_facts(points)
    rd.update_meta(**{k: {**v, **(meta.get(k) or {})} for k, v in facts.items()})


# ----------------------------------------------------------------- the scaling baseline
def stream_key(config: dict) -> tuple:
    """A configuration apart from K: a K > 1 point's baseline is the K = 1 row of the same key."""
    return tuple(config.get(c, schema.ID_DEFAULTS.get(c)) for c in schema.CONFIG_COLUMNS if c != "concurrency")


def baselines(rows) -> dict:
    """{stream_key: X(1)} of the ok K = 1 rows among `rows`."""
    out = {}
    for r in rows:
        fps = single_stream_fps(r)
        if fps is not None:
            out[stream_key(r)] = fps
    return out
