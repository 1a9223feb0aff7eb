"""Plan: a profile expanded into the exact list of points to measure.

Expansion is the cross product models x sizes x proposals x precisions x backends x
opt_levels x threads x concurrency, after mapping the values that do not apply
to a combination (so two combinations that mean the same measurement become one
point), and skipping the ones that cannot be measured here. Every mapping or
skip leaves a note; none is an error.
"""
from __future__ import annotations

import dataclasses
import itertools
from collections import Counter
from dataclasses import dataclass, field
from typing import NamedTuple

from speedbench import schema
from speedbench.errors import UserError
from speedbench.measure.point import Point, uses_ort_knobs
from speedbench.sweep.profile import Profile
from speedbench.system import cores_available
from speedbench.zoo import get_spec as zoo_spec

# Rough costs for the dry-run estimate, from the demo sweep on the shared 2-core
# development machine (exports of the compact detectors with parity check took
# 8-22 s, median 14 s; a point 2-11 s including its worker's start). Rules of
# thumb, not promises: the estimate says so when printed.
WORKER_START_S = 5.0
EXPORT_S = 15.0
EVAL_S_PER_IMAGE = 0.25
DEFAULT_MAX_SECONDS = 10.0   # used when the profile does not set repetitions.max_seconds


class GraphKey(NamedTuple):
    """What one export and one accuracy run are shared by: the points of one graph."""
    model: str
    weights: str
    size: int
    proposals: int
    precision: str = "fp32"      # "int8": the fp32 export quantised (sweep.quantised)


@dataclass(frozen=True)
class PlannedPoint:
    """A point of the plan: what to measure (a measure.Point) and which graph it needs."""
    point: Point                 # identity = schema.CONFIG_COLUMNS; ORT-only knobs blanked by Point
    graph_key: GraphKey
    family: str
    notes: tuple = ()            # per-point notes (mappings applied to this point)

    @property
    def config(self) -> dict:
        return self.point.config()

    @property
    def point_id(self) -> str:
        return self.point.id

    def at_concurrency(self, k: int) -> "PlannedPoint":
        """The same configuration measured with K concurrent workers."""
        return dataclasses.replace(self, point=dataclasses.replace(self.point, concurrency=int(k)))

    @classmethod
    def from_row(cls, row: dict) -> "PlannedPoint":
        """A stored row -> the PlannedPoint of its configuration (old rows: missing knobs defaulted)."""
        config = {c: row.get(c, schema.ID_DEFAULTS.get(c)) for c in schema.CONFIG_COLUMNS}
        for c in ("size", "proposals", "intra_threads", "inter_threads", "affinity"):
            config[c] = int(config[c] or 0)
        config["concurrency"] = int(config["concurrency"] or 1)
        for c in ("exec_mode", "opt_level", "spin_wait"):
            if not config[c]:
                config.pop(c)   # Point's defaults (ORT; spin_wait: ORT's own, as old rows ran) or blank (others)
        point = Point(**config)
        return cls(point=point, family=row.get("family") or "",
                   graph_key=GraphKey(point.model, point.weights, point.size, point.proposals,
                                            point.precision))

    @property
    def label(self) -> str:
        return schema.config_label(self.config)


@dataclass
class Plan:
    points: list[PlannedPoint]
    notes: list[str] = field(default_factory=list)   # plan-level notes (mappings, skips, merges)

    @property
    def graphs(self) -> list[tuple]:
        seen = []
        for p in self.points:
            if p.graph_key not in seen:
                seen.append(p.graph_key)
        return seen

    def missing(self, done_ids) -> list[PlannedPoint]:
        done = set(done_ids)
        return [p for p in self.points if p.point_id not in done]


def synthetic_spec(model_id: str):
    """Stand-in spec for the measure package's synthetic harness backend (no real model).

    Its work grows with size and proposals, so both axes can be exercised.
    """
    from speedbench.zoo.spec import ModelSpec

    return ModelSpec(id=model_id, builder="", family="two-stage", native_size=320,
                     detections_per_img=0, score_thresh=0.0, default_proposals=100,
                     arch="", notes="harness test backend, not a detector")


def external_spec(entry):
    """A ModelSpec standing for an external graph, so the plan maps its knobs like a zoo model's.

    native size: the fixed input's size, else the adapter's native_size; the proposal knob is
    the host's pre-NMS top-k (nms.candidates) when NMS runs on the host, else there is none.
    """
    from speedbench.zoo.spec import ModelSpec

    ad = entry.adapter
    return ModelSpec(id=entry.id, builder="", family=entry.family, native_size=ad.native_size,
                     detections_per_img=ad.nms.detections, score_thresh=ad.nms.score_threshold,
                     default_proposals=ad.nms.candidates if ad.host_nms else 0, classes=tuple(entry.classes),
                     num_classes=len(entry.classes), min_size=0, arch="",
                     notes=f"external graph {entry.onnx}")


def _is_zoo_id(get_spec, model_id: str) -> bool:
    try:
        get_spec(model_id)
    except (KeyError, UserError):
        return False
    return True


def _external_sizes(entry, sizes, notes) -> list:
    """The sizes an external graph can be measured at: a fixed input only at its own size."""
    ad = entry.adapter
    if ad.fixed:
        other = [s for s in sizes if s != ad.native_size]
        if other:
            notes[f"skipped {entry.id} at size {', '.join(map(str, other))}: the graph's input is fixed at "
                  f"{ad.input.size[0]} x {ad.input.size[1]}"] += 1
        return [s for s in sizes if s == ad.native_size]
    if ad.input.resize == "none":
        notes[f"{entry.id}: the graph takes each image at its own size (resize = \"none\"); sizes "
              f"{', '.join(map(str, sizes))} measured once as 0"] += 1
        return [0]
    return sizes


def expand_plan(profile: Profile, get_spec=None, concurrency_supported: bool = True,
                cores: int | None = None) -> Plan:
    """Expand `profile` into a Plan.

    get_spec(model_id) -> ModelSpec (default: the zoo); an unknown id is a
    UserError naming models[i].id. concurrency_supported: False plans no K > 1
    (throughput) points. cores: cores
    this process may use (default: the affinity mask), for skipping pins that
    cannot be honoured.
    """
    get_spec = get_spec or zoo_spec
    cores = cores or cores_available()
    notes: Counter = Counter()
    points: dict[str, PlannedPoint] = {}
    merged = 0

    for mi, entry in enumerate(profile.models):
        try:
            if entry.external:
                if _is_zoo_id(get_spec, entry.id):
                    raise UserError(f"{entry.id!r} is a zoo model id; give the external graph a name of its own")
                spec = external_spec(entry)
            else:
                spec = synthetic_spec(entry.id) if entry.id.startswith("synthetic") else get_spec(entry.id)
        except UserError as exc:
            raise UserError(f"{profile.source}: models[{mi}].id: {exc}") from None
        except KeyError:
            raise UserError(f"{profile.source}: models[{mi}].id: unknown model {entry.id!r} "
                            f"(list them with `speedbench models`)") from None
        sizes = _dedupe(spec.native_size if s == "native" else s for s in (entry.sizes or profile.sizes))
        if entry.external:
            sizes = _external_sizes(entry, sizes, notes)
        min_size = getattr(spec, "min_size", 0) or 0
        too_small = [s for s in sizes if s < min_size]
        if too_small:
            # e.g. a backbone whose feature maps vanish below a minimum input size
            notes[f"skipped {entry.id} at size {', '.join(map(str, too_small))}: "
                  f"below its minimum input size {min_size} px"] += 1
            sizes = [s for s in sizes if s >= min_size]
        wanted = entry.proposals or profile.proposals
        if spec.default_proposals == 0:
            if entry.external and any(p != "default" for p in wanted):
                notes[f"{entry.id}: NMS runs inside the graph (nms.enabled = false), so there is no host "
                      f"top-k to set; proposals {', '.join(map(str, wanted))} measured once as 0"] += 1
            elif any(p != "default" for p in wanted):
                notes[f"{entry.id}: has no proposal knob; proposals {', '.join(map(str, wanted))} "
                      f"measured once as 0"] += 1
            proposals, prop_note = [0], ("proposals mapped to 0: model has no proposal knob",)
        else:
            proposals = _dedupe(spec.default_proposals if p == "default" else p for p in wanted)
            prop_note = ("proposals = the host's pre-NMS top-k (nms.candidates)",) if entry.external else ()
        precisions = entry.precisions or profile.precisions
        for size, prop, precision, backend, opt, t, k in itertools.product(
                sizes, proposals, precisions, profile.backends, profile.opt_levels, profile.threads,
                profile.concurrency):
            got = _one_point(profile, entry, spec, size, prop, backend, opt, t, k,
                             cores, concurrency_supported, notes, precision)
            if got is None:
                continue
            point, point_notes = got
            if point.id in points:
                merged += 1
                continue
            points[point.id] = PlannedPoint(
                point=point, family=spec.family,
                graph_key=GraphKey(entry.id, entry.weights, int(size), int(prop), precision),
                notes=prop_note + point_notes)
    if merged:
        notes[f"{merged} combination(s) mapped onto points already planned (measured once)"] += 1
    plan_notes = [n if c == 1 or n.startswith(tuple("0123456789")) else f"{n} ({c} combinations)"
                  for n, c in notes.items()]
    return Plan(points=list(points.values()), notes=plan_notes)


def _one_point(profile, entry, spec, size, prop, backend, opt, t, k, cores, concurrency_supported, notes,
               precision="fp32"):
    point_notes = []
    mode, inter = t.mode, t.inter
    if precision != "fp32" and backend != "ort":
        notes[f"skipped {precision} on backend {backend}: quantised graphs run on ONNX Runtime only"] += 1
        return None
    if entry.external:
        if precision != "fp32":
            notes[f"skipped {precision} for {entry.id}: an external graph is measured as given (not quantised)"] += 1
            return None
        if backend != "ort":
            notes[f"skipped {entry.id} on backend {backend}: an external graph runs on ONNX Runtime only"] += 1
            return None
        backend = "adapted"   # ONNX Runtime with the adapter's host pre/postprocessing
    if entry.id.startswith("synthetic") and backend != "synthetic":
        notes[f"skipped {entry.id} on backend {backend}: a synthetic model runs on the synthetic backend only"] += 1
        return None
    if not uses_ort_knobs(backend):
        # measure.Point blanks the ORT-only knobs (before the id is taken); the plan only says so.
        if len(profile.opt_levels) > 1 and opt == profile.opt_levels[0]:
            notes[f"{backend} backend: opt_levels do not apply; measured once"] += 1
    elif mode == "sequential" and inter != 1:
        # ORT uses its inter-op pool only in parallel execution mode.
        notes[f"threads inter={inter} has no effect in sequential mode; measured as inter=1"] += 1
        inter = 1
        point_notes.append("inter_threads mapped to 1 (sequential mode)")
    if t.affinity > cores:
        notes[f"skipped affinity={t.affinity}: only {cores} core(s) available here"] += 1
        return None
    if k > 1 and not concurrency_supported:
        notes[f"skipped concurrency={k}: throughput points not wanted here"] += 1
        return None
    if k > 1 and t.intra == 0:
        notes[f"skipped concurrency={k} with intra=0: throughput points need an explicit thread count"] += 1
        return None
    if k > 1 and k * max(t.intra, t.affinity) > cores:
        # K workers x T threads beyond the cores measures contention, not the configuration.
        notes[f"skipped concurrency={k} x {max(t.intra, t.affinity)} threads: more than the {cores} core(s) here"] += 1
        return None
    point = Point(model=entry.id, weights=entry.weights, size=int(size), proposals=int(prop), backend=backend,
                  intra_threads=t.intra, inter_threads=inter, exec_mode=mode, opt_level=opt,
                  affinity=t.affinity, concurrency=k, precision=precision,
                  spin_wait="on" if t.spin else "off")
    return point, tuple(point_notes)


def _dedupe(values) -> list:
    out = []
    for v in values:
        if v not in out:
            out.append(v)
    return out


def estimate_seconds(plan: Plan, profile: Profile, done_ids=(), n_images: int | None = None,
                     cached_graphs=(), point_wall_s: float | None = None) -> dict:
    """Rough wall-time estimate for the points still to measure (a rule of thumb).

    Per worker process (invocation): a worker start plus the repetition budget, or per
    point point_wall_s when the run already measured points (their median wall time); per distinct
    graph still needed: one export and one accuracy pass over the dataset.
    """
    todo = plan.missing(done_ids)
    budget = profile.repetitions.get("max_seconds", DEFAULT_MAX_SECONDS)
    # A one-stream point runs in `invocations` worker processes; a stored row's wall_s covers all of them.
    runs = sum(profile.invocations if p.config["concurrency"] == 1 else 1 for p in todo)
    measure_s = len(todo) * point_wall_s if point_wall_s else runs * (WORKER_START_S + budget)
    graphs = []
    for p in todo:
        if p.graph_key not in graphs and p.config["backend"] != "synthetic":
            graphs.append(p.graph_key)
    graphs = [g for g in graphs if g not in set(cached_graphs)]
    if n_images is None:
        n_images = profile.scenes_count or 50
    if profile.limit:
        n_images = min(n_images, profile.limit)
    evals = [g for g in graphs if g[1] != "none"] if profile.accuracy else []
    export_s = len(graphs) * EXPORT_S
    eval_s = len(evals) * n_images * EVAL_S_PER_IMAGE
    return {"points": len(todo), "graphs": len(graphs), "evaluations": len(evals),
            "measure_s": measure_s, "export_s": export_s, "eval_s": eval_s,
            "total_s": measure_s + export_s + eval_s}
