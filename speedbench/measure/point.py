"""What to run (Point) and how long to keep running it (Policy)."""
from __future__ import annotations

from dataclasses import asdict, dataclass, field, fields
from pathlib import Path

from speedbench.errors import UserError
from speedbench.measure.backends import NAMES as BACKENDS
from speedbench.schema import CONFIG_COLUMNS, PRECISIONS, SPIN_VALUES, point_id
from speedbench.system import cores_available

EXEC_MODES = ("sequential", "parallel")
OPT_LEVELS = ("disable", "basic", "extended", "all")
ORT_ONLY_KNOBS = ("exec_mode", "opt_level")   # "" on every other backend (schema.CONFIG_COLUMNS)


def uses_ort_knobs(backend: str) -> bool:
    """Only ONNX Runtime has an execution mode and a graph optimisation level ("adapted" runs on it too)."""
    return backend in ("ort", "adapted")


@dataclass
class Point:
    """One configuration. Fields up to `precision` are its identity (schema.CONFIG_COLUMNS).

    `graph` (the ONNX file for backends "ort" and "adapted"), `options` (settings of the
    synthetic test backend) and `adapter` (how backend "adapted" feeds and decodes an
    external graph) are not part of the identity: the same configuration
    measured from a re-exported file, or with an injected slowdown, is the same point.
    """

    model: str
    weights: str = "none"
    size: int = 0
    proposals: int = 0
    backend: str = "ort"
    intra_threads: int = 1
    inter_threads: int = 1
    exec_mode: str = "sequential"
    opt_level: str = "all"
    affinity: int = 0
    concurrency: int = 1
    precision: str = "fp32"      # "int8": `graph` is the quantised graph (the sweep prepares it)
    spin_wait: str = "on"
    env: str = ""
    graph: str | None = None
    options: dict = field(default_factory=dict)
    adapter: dict = field(default_factory=dict)   # backend "adapted": the adapter table (adapt.Adapter.to_dict)

    def __post_init__(self):
        # The one place ORT-only knobs are blanked: plan, stored row and point_id(row) then agree.
        if not uses_ort_knobs(self.backend):
            self.exec_mode, self.opt_level, self.spin_wait = "", "", ""

    def config(self) -> dict:
        return {c: getattr(self, c) for c in CONFIG_COLUMNS}

    @property
    def id(self) -> str:
        return point_id(self.config())

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict) -> "Point":
        names = {f.name for f in fields(cls)}
        return cls(**{k: v for k, v in d.items() if k in names})

    def validate(self) -> None:
        """Raise UserError naming the field for a configuration that cannot run."""
        if self.backend not in BACKENDS:
            raise UserError(f"point field 'backend': {self.backend!r} is not one of {', '.join(BACKENDS)}")
        for name in ("size", "proposals", "intra_threads", "inter_threads", "affinity"):
            value = getattr(self, name)
            if not isinstance(value, int) or isinstance(value, bool) or value < 0:
                raise UserError(f"point field {name!r}: expected an integer >= 0, got {value!r}")
        if not isinstance(self.env, str):
            raise UserError(f"point field 'env': expected a text label, got {self.env!r}")
        if not isinstance(self.concurrency, int) or isinstance(self.concurrency, bool) or self.concurrency < 1:
            raise UserError(f"point field 'concurrency': expected an integer >= 1, got {self.concurrency!r}")
        cores = cores_available()
        if self.affinity > cores:
            raise UserError(f"point field 'affinity': {self.affinity} cores requested, {cores} available")
        if self.precision not in PRECISIONS:
            raise UserError(f"point field 'precision': {self.precision!r} is not one of {', '.join(PRECISIONS)}")
        if self.precision != "fp32" and self.backend == "eager":
            raise UserError("point field 'precision': the eager backend runs fp32 only")
        if self.backend in ("ort", "adapted"):
            if self.exec_mode not in EXEC_MODES:
                raise UserError(f"point field 'exec_mode': {self.exec_mode!r} is not one of {', '.join(EXEC_MODES)}")
            if self.opt_level not in OPT_LEVELS:
                raise UserError(f"point field 'opt_level': {self.opt_level!r} is not one of {', '.join(OPT_LEVELS)}")
            if self.spin_wait not in SPIN_VALUES:
                raise UserError(f"point field 'spin_wait': {self.spin_wait!r} is not one of {', '.join(SPIN_VALUES)}")
            if not self.graph:
                raise UserError(f"point field 'graph': backend {self.backend!r} needs the path of an ONNX file")
            if not Path(self.graph).is_file():
                raise UserError(f"{self.graph}: ONNX graph file not found")
        if self.backend == "adapted":
            from speedbench.adapt import parse_adapter

            if not self.adapter:
                raise UserError("point field 'adapter': backend 'adapted' needs the adapter of the external graph")
            parse_adapter(self.adapter, f"{self.graph}: adapter")
        if not isinstance(self.options, dict):
            raise UserError(f"point field 'options': expected a table/dict, got {type(self.options).__name__}")
        if self.backend == "synthetic":
            from speedbench.measure.backends.synthetic import settings

            try:
                settings(self)
            except ValueError as exc:
                raise UserError(f"point field 'options': {exc}") from None


@dataclass
class Policy:
    """When warm-up ends and when timing stops.

    Warm-up: at least warmup_min runs, then until the median of the last
    `warmup_window` runs moves less than settle_tol (relative) from the window
    before it, at most warmup_max runs. Timing: at least min_reps runs, then
    stop as soon as the `confidence` CI of the median has a half-width
    <= rel_ci x median, or max_reps runs, or max_seconds of timing.
    """

    warmup_min: int = 3
    warmup_max: int = 50
    warmup_window: int = 5
    settle_tol: float = 0.05
    min_reps: int = 20
    max_reps: int = 1000
    max_seconds: float = 30.0
    rel_ci: float = 0.02
    confidence: float = 0.95
    noisy_cov: float = 0.10     # rule of thumb (common practice): CoV above 10 % = too noisy to rank on
    profile_stages: bool = True
    profile_reps: int = 5
    memory_every: int = 5       # sample process RSS every N timed runs (outside the timed region)
    subgraph_check: bool = False  # also time each stage's sub-graph alone (measure.subgraphs); costs time
    subgraph_reps: int = 20
    host_reference: bool = True   # ONNX Runtime points: time measure/reference.py's graph between runs

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict) -> "Policy":
        names = {f.name for f in fields(cls)}
        unknown = sorted(set(d) - names)
        if unknown:
            raise UserError(f"repetition policy: unknown key {unknown[0]!r} (known: {', '.join(sorted(names))})")
        return cls(**d)

    def validate(self) -> None:
        for name in ("warmup_min", "warmup_max", "warmup_window", "min_reps", "max_reps", "profile_reps",
                     "memory_every", "subgraph_reps"):
            value = getattr(self, name)
            if not isinstance(value, int) or isinstance(value, bool) or value < 0:
                raise UserError(f"repetition policy {name!r}: expected an integer >= 0, got {value!r}")
        if self.min_reps < 1 or self.max_reps < self.min_reps:
            raise UserError(f"repetition policy: need 1 <= min_reps <= max_reps, got {self.min_reps}, {self.max_reps}")
        if self.warmup_max < self.warmup_min:
            raise UserError("repetition policy: warmup_max must be >= warmup_min")
        if not 0 < self.confidence < 1:
            raise UserError(f"repetition policy 'confidence': must be in (0, 1), got {self.confidence!r}")
        for name in ("rel_ci", "settle_tol", "max_seconds", "noisy_cov"):
            value = getattr(self, name)
            if not isinstance(value, (int, float)) or value <= 0:
                raise UserError(f"repetition policy {name!r}: expected a number > 0, got {value!r}")
        if self.memory_every < 1:
            raise UserError("repetition policy 'memory_every': must be >= 1")
