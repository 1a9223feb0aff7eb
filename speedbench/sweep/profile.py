"""Sweep profiles: a TOML file saying what to measure, validated strictly.

Every key, with its default where it has one (the shipped profiles under
profiles/ explain the keys they use in comments)::

    [run]
    name       = "cpu-budget"     # required; names the run: 1..64 letters, digits, '.', '_', '-',
                                  # starting with a letter or digit (it becomes a directory name)
    host       = ""               # label for this machine in reports; "" = the hostname; same
                                  # characters as name
    output     = "runs/{name}"    # run directory; only the fields {name} and {host} are filled in
    cache      = ".speedbench-cache"  # exported graphs, generated scenes, accuracy results
    timeout_s  = 600              # per point (its worker process), seconds, 1..86400

    [dataset]                     # required; exactly one of `path` or `scenes`
    path       = "data/val"       # COCO-style JSON file (or its folder), or a Pascal VOC folder
    scenes     = {count = 40, seed = 0}   # generated held-out scenes (speedbench.data.make_scenes)
    accuracy   = true             # evaluate mAP once per distinct graph (trained weights only)
    limit      = 0                # images used for mAP; 0 = all
    timing_images = 8             # images cycled during latency measurement, >= 1
    max_pixels = 40000000         # refuse images with more pixels than this (width x height),
                                  # 1..1000000000; a decompression bomb is refused by name, not decoded

    [sweep]                       # the global axes; each a non-empty list without repeats
    sizes       = ["native"]      # input sizes (px, 32..4096); "native" = the model's own
    proposals   = ["default"]     # proposal / candidate budgets (1..10000); "default" = the
                                  # model's own; a model without the knob is measured at 0
    backends    = ["ort"]         # "ort", "eager", or "synthetic" (a test harness, no model)
    opt_levels  = ["all"]         # ORT graph optimisation: "disable", "basic", "extended", "all"
    concurrency = [1]             # K concurrent workers (throughput points when K > 1)
    precisions  = ["fp32"]        # "fp32" (the exported graph) and/or "int8" (its static QDQ
                                  # quantisation, ORT backend only; see [quantisation])

    [[models]]                    # required: one table per model
    id        = "ssdlite320_mobilenet_v3_large"   # zoo id (`speedbench models`), or
                                  # "synthetic[:key=value,...]" for the synthetic backend
    weights   = "none"            # "none" (untrained: latency only), "torchvision" (local
                                  # cache only), "demo", or "file:PATH" (local checkpoint)
    sizes     = [320]             # optional: replaces [sweep].sizes for this model
    proposals = [100]             # optional: replaces [sweep].proposals for this model
    precisions = ["fp32", "int8"] # optional: replaces [sweep].precisions for this model

    [[models]]                    # an external ONNX detector (any exporter), instead of a zoo id
    id        = "yard_raw"        # a name of your own (not a zoo id); weights = "onnx:<file name>"
    onnx      = "path/model.onnx" # the graph; it carries its own weights
    family    = "one-stage"       # "one-stage" or "two-stage"
    classes   = ["__background__", "crate"]   # names by label index (or classes_file = "names.txt",
                                  # one per line, or a JSON list); matched to the dataset's categories
    adapter   = "adapter.toml"    # its input/output adapter (speedbench/adapt/spec.py lists every
                                  # key), or an inline [models.adapter] table
                                  # The size axis applies when the graph's input is dynamic and the
                                  # adapter resizes; proposals map to the host's pre-NMS top-k.

    [[threads]]                   # required: one table per thread setting
    intra    = 2                  # required; intra-op threads, 0..256 (0 = library default)
    inter    = 1                  # inter-op threads, 0..256 (ORT uses them in parallel mode only)
    mode     = "sequential"       # ORT execution mode: "sequential" or "parallel"
    affinity = 0                  # pin the worker to this many cores; 0 = not pinned
    spin     = true               # ORT pool threads spin while waiting for work (ORT's default);
                                  # false sleeps them: less CPU burned, steadier on a busy host

    [repetitions]                 # how long each point is measured (speedbench.measure.Policy)
    warmup_min  = 3               # warm-up runs at least, >= 0
    warmup_max  = 50              # warm-up runs at most (warm-up ends once latency settles)
    min_reps    = 10              # timed runs at least, >= 1
    max_reps    = 1000            # timed runs at most, >= min_reps (per invocation)
    invocations = 1               # R independent worker processes per point, >= 1; R >= 2 gives
                                  # intervals that include process-to-process variation
    max_seconds = 30.0            # stop timing after this long, > 0 and < run.timeout_s
    rel_ci      = 0.02            # stop once the p50's CI half-width / p50 is below this, (0, 1)
    stages      = true            # also run a few profiled passes for per-stage times
    subgraphs   = false           # also time each stage's sub-graph alone (an independent check
                                  # of the stage split, no profiler; costs about 2x the point's time)
    host_reference = true         # ONNX Runtime points: time a fixed small graph after every timed
                                  # run (outside the timed region) so compare can divide the host's
                                  # own speed out of a rerun (speedbench/measure/reference.py)

    [quantisation]                # how "int8" graphs are made (speedbench.export.quantise)
    method       = "minmax"       # activation ranges from calibration: "minmax", "entropy", "percentile"
    per_channel  = true           # one weight scale per output channel (false: per tensor)
    op_types     = ["Conv", "MatMul", "Gemm"]   # the only nodes quantised; the rest stays fp32
    reduce_range = false          # 7-bit weights (ONNX Runtime's advice for CPUs without VNNI)
    calibration  = {count = 16, seed = 1}   # generated calibration scenes (their own split, so
                                  # never the held-out ones), or a path to a COCO JSON / VOC folder
                                  # of images disjoint from the held-out set (checked)

    [synthetic]                   # options of the synthetic backend, passed through as the
    work_ms = 5.0                 # points' options (see speedbench.measure.backends.synthetic)

Relative paths are taken from the current directory. Errors are one line:
``<file>: <key path>: <what is wrong>``.
"""
from __future__ import annotations

import re
import socket
import string
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from speedbench.checker import Checker as _Checker
from speedbench.checker import kind as _kind
from speedbench.errors import UserError
from speedbench.schema import PRECISIONS
from speedbench.schema import QUANT_METHODS as METHODS
from speedbench.schema import QUANT_OP_TYPES as QUANTISABLE_OPS

BACKENDS = ("ort", "eager", "synthetic")
OPT_LEVELS = ("disable", "basic", "extended", "all")
EXEC_MODES = ("sequential", "parallel")
NAME_RE = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}")   # run.name, run.host: one safe path component
OUTPUT_FIELDS = {"name", "host"}
DEFAULT_MAX_PIXELS = 40_000_000   # same default as speedbench.data.images.DEFAULT_MAX_PIXELS


@dataclass(frozen=True)
class ModelEntry:
    id: str
    weights: str = "none"
    sizes: tuple | None = None        # None = use [sweep].sizes
    proposals: tuple | None = None    # None = use [sweep].proposals
    precisions: tuple | None = None   # None = use [sweep].precisions
    onnx: str | None = None           # external graph (then family, classes, adapter too)
    family: str = ""
    classes: tuple | None = None
    adapter: object = field(default=None, compare=False)   # speedbench.adapt.Adapter

    @property
    def external(self) -> bool:
        return self.onnx is not None


@dataclass(frozen=True)
class ThreadSetting:
    intra: int
    inter: int = 1
    mode: str = "sequential"
    affinity: int = 0
    spin: bool = True               # ORT's default; see schema.SPIN_VALUES


@dataclass
class Profile:
    source: str                       # file name (for messages)
    text: str                         # verbatim TOML (copied into the run directory)
    name: str
    host: str
    output: str
    cache: str
    timeout_s: float
    dataset_path: str | None
    scenes_count: int
    scenes_seed: int
    accuracy: bool
    limit: int
    timing_images: int
    models: tuple[ModelEntry, ...]
    sizes: tuple
    proposals: tuple
    backends: tuple[str, ...]
    opt_levels: tuple[str, ...]
    concurrency: tuple[int, ...]
    threads: tuple[ThreadSetting, ...]
    repetitions: dict = field(default_factory=dict)   # speedbench.measure.Policy fields
    invocations: int = 1                              # worker processes per point (R)
    synthetic: dict = field(default_factory=dict)     # options of the synthetic test backend
    max_pixels: int = DEFAULT_MAX_PIXELS              # [dataset] max_pixels
    precisions: tuple = ("fp32",)
    quantisation: dict = field(default_factory=dict)  # QuantSettings fields ([quantisation])
    calibration_path: str | None = None               # else generated calibration scenes:
    calibration_count: int = 16
    calibration_seed: int = 1

    def output_dir(self) -> Path:
        return Path(self.output.format(name=self.name, host=self.host))


# ----------------------------------------------------------------- parsing
def load_profile(path) -> Profile:
    path = Path(path)
    try:
        text = path.read_text()
    except FileNotFoundError:
        raise UserError(f"{path}: profile not found") from None
    except IsADirectoryError:
        raise UserError(f"{path}: is a directory, not a profile file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise UserError(f"{path}: cannot read profile ({exc})") from None
    return parse_profile(text, str(path))


def parse_profile(text: str, source: str = "<profile>") -> Profile:
    """Validate a profile's TOML text; any problem is a one-line UserError naming the key path."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise UserError(f"{source}: TOML syntax error: {exc}") from None
    except RecursionError:
        raise UserError(f"{source}: TOML nested too deeply; refused") from None
    except ValueError as exc:   # e.g. an integer literal with more digits than Python converts
        raise UserError(f"{source}: TOML value refused ({exc})") from None
    c = _Checker(source)
    c.table(doc, "", {"run", "dataset", "sweep", "models", "threads", "repetitions", "synthetic", "quantisation"},
            {"run", "dataset", "models", "threads"})

    run = c.table(doc["run"], "run", {"name", "host", "output", "cache", "timeout_s"}, {"name"})
    name = c.str_(run["name"], "run.name", allow_empty=False)
    if not NAME_RE.fullmatch(name):
        c.fail("run.name", f"{name[:80]!r} is not a run name: 1..64 letters, digits, '.', '_' or '-', "
                           f"starting with a letter or digit (it names a directory)")
    host = c.str_(run.get("host", ""), "run.host")
    if host and not NAME_RE.fullmatch(host):
        c.fail("run.host", f"{host[:80]!r} is not a host label: 1..64 letters, digits, '.', '_' or '-', "
                           f"starting with a letter or digit")
    host = host or socket.gethostname()
    output = c.str_(run.get("output", "runs/{name}"), "run.output", allow_empty=False)
    try:
        fields = [(f, spec, conv) for _, f, spec, conv in string.Formatter().parse(output) if f is not None]
    except ValueError:
        fields = [("?", "", None)]
    if any(f not in OUTPUT_FIELDS or spec or conv for f, spec, conv in fields):
        c.fail("run.output", f"{output[:80]!r}: only the fields {{name}} and {{host}} may be filled in")
    if "\0" in output or any(len(part.encode()) > 255 for part in output.split("/")):
        c.fail("run.output", "not a usable path (a NUL character or a component longer than 255 bytes)")
    cache = c.str_(run.get("cache", ".speedbench-cache"), "run.cache", allow_empty=False)
    timeout_s = c.num(run.get("timeout_s", 600), "run.timeout_s", 1, 86400)

    ds = c.table(doc["dataset"], "dataset", {"path", "scenes", "accuracy", "limit", "timing_images", "max_pixels"})
    if ("path" in ds) == ("scenes" in ds):
        c.fail("dataset", "give exactly one of `path` or `scenes`")
    dataset_path, count, seed = None, 0, 0
    if "path" in ds:
        dataset_path = c.str_(ds["path"], "dataset.path", allow_empty=False)
    else:
        sc = c.table(ds["scenes"], "dataset.scenes", {"count", "seed"}, {"count"})
        count = c.int_(sc["count"], "dataset.scenes.count", 1, 100_000)
        seed = c.int_(sc.get("seed", 0), "dataset.scenes.seed", 0, 2**31 - 1)
    accuracy = c.bool_(ds.get("accuracy", True), "dataset.accuracy")
    limit = c.int_(ds.get("limit", 0), "dataset.limit", 0, 1_000_000)
    timing_images = c.int_(ds.get("timing_images", 8), "dataset.timing_images", 1, 10_000)
    max_pixels = c.int_(ds.get("max_pixels", DEFAULT_MAX_PIXELS), "dataset.max_pixels", 1, 1_000_000_000)

    sw = c.table(doc.get("sweep", {}), "sweep",
                 {"sizes", "proposals", "backends", "opt_levels", "concurrency", "precisions"})
    sizes = c.list_(sw.get("sizes", ["native"]), "sweep.sizes", lambda v, k: _size(c, v, k))
    proposals = c.list_(sw.get("proposals", ["default"]), "sweep.proposals", lambda v, k: _proposal(c, v, k))
    backends = c.list_(sw.get("backends", ["ort"]), "sweep.backends", lambda v, k: c.str_(v, k, BACKENDS))
    opt_levels = c.list_(sw.get("opt_levels", ["all"]), "sweep.opt_levels",
                         lambda v, k: c.str_(v, k, OPT_LEVELS))
    concurrency = c.list_(sw.get("concurrency", [1]), "sweep.concurrency", lambda v, k: c.int_(v, k, 1, 256))
    precisions = c.list_(sw.get("precisions", ["fp32"]), "sweep.precisions", lambda v, k: c.str_(v, k, PRECISIONS))

    if not isinstance(doc["models"], list):
        c.fail("models", "expected one or more [[models]] tables")
    if not doc["models"]:
        c.fail("models", "must not be empty")
    models = []
    for i, m in enumerate(doc["models"]):
        kp = f"models[{i}]"
        if isinstance(m, dict) and "onnx" in m:
            models.append(_external(c, m, kp, models))
            continue
        c.table(m, kp, {"id", "weights", "sizes", "proposals", "precisions"}, {"id"})
        entry = ModelEntry(
            id=c.str_(m["id"], f"{kp}.id", allow_empty=False),
            weights=_weights(c, m.get("weights", "none"), f"{kp}.weights"),
            sizes=c.list_(m["sizes"], f"{kp}.sizes", lambda v, k: _size(c, v, k)) if "sizes" in m else None,
            proposals=(c.list_(m["proposals"], f"{kp}.proposals", lambda v, k: _proposal(c, v, k))
                       if "proposals" in m else None),
            precisions=(c.list_(m["precisions"], f"{kp}.precisions", lambda v, k: c.str_(v, k, PRECISIONS))
                        if "precisions" in m else None),
        )
        if any((e.id, e.weights) == (entry.id, entry.weights) for e in models):
            c.fail(kp, f"model {entry.id!r} with weights {entry.weights!r} is listed twice")
        models.append(entry)

    if not isinstance(doc["threads"], list):
        c.fail("threads", "expected one or more [[threads]] tables")
    if not doc["threads"]:
        c.fail("threads", "must not be empty")
    threads = []
    for i, t in enumerate(doc["threads"]):
        kp = f"threads[{i}]"
        c.table(t, kp, {"intra", "inter", "mode", "affinity", "spin"}, {"intra"})
        setting = ThreadSetting(
            intra=c.int_(t["intra"], f"{kp}.intra", 0, 256),
            inter=c.int_(t.get("inter", 1), f"{kp}.inter", 0, 256),
            mode=c.str_(t.get("mode", "sequential"), f"{kp}.mode", EXEC_MODES),
            affinity=c.int_(t.get("affinity", 0), f"{kp}.affinity", 0, 1024),
            spin=c.bool_(t.get("spin", True), f"{kp}.spin"),
        )
        if setting in threads:
            c.fail(kp, "same thread setting listed twice")
        threads.append(setting)

    rep = c.table(doc.get("repetitions", {}), "repetitions",
                  {"warmup_min", "warmup_max", "min_reps", "max_reps", "max_seconds", "rel_ci", "stages",
                   "invocations", "subgraphs", "host_reference"})
    repetitions = {}
    invocations = c.int_(rep.get("invocations", 1), "repetitions.invocations", 1, 1000)
    if "warmup_min" in rep:
        repetitions["warmup_min"] = c.int_(rep["warmup_min"], "repetitions.warmup_min", 0, 10_000)
    if "warmup_max" in rep:
        repetitions["warmup_max"] = c.int_(rep["warmup_max"], "repetitions.warmup_max", 0, 100_000)
    if "stages" in rep:
        repetitions["profile_stages"] = c.bool_(rep["stages"], "repetitions.stages")
    if "subgraphs" in rep:
        repetitions["subgraph_check"] = c.bool_(rep["subgraphs"], "repetitions.subgraphs")
    if "host_reference" in rep:
        repetitions["host_reference"] = c.bool_(rep["host_reference"], "repetitions.host_reference")
    if "min_reps" in rep:
        repetitions["min_reps"] = c.int_(rep["min_reps"], "repetitions.min_reps", 1, 1_000_000)
    if "max_reps" in rep:
        repetitions["max_reps"] = c.int_(rep["max_reps"], "repetitions.max_reps", 1, 1_000_000)
    if "max_seconds" in rep:
        repetitions["max_seconds"] = c.num(rep["max_seconds"], "repetitions.max_seconds", 0, 86400, open_lo=True)
    if "rel_ci" in rep:
        repetitions["rel_ci"] = c.num(rep["rel_ci"], "repetitions.rel_ci", 0, 1, open_lo=True, open_hi=True)
    if repetitions.get("warmup_min", 0) > repetitions.get("warmup_max", 100_000):
        c.fail("repetitions.warmup_max", "must be >= repetitions.warmup_min")
    if repetitions.get("min_reps", 1) > repetitions.get("max_reps", 1_000_000):
        c.fail("repetitions.max_reps", "must be >= repetitions.min_reps")
    if "max_seconds" in repetitions and repetitions["max_seconds"] >= timeout_s:
        c.fail("repetitions.max_seconds", f"must be below run.timeout_s ({timeout_s:g})")

    synthetic = doc.get("synthetic", {})
    c.table(synthetic, "synthetic", set(synthetic) if isinstance(synthetic, dict) else set())
    for key, value in synthetic.items():
        if isinstance(value, (dict, list)):
            c.fail(f"synthetic.{key}", f"expected a number, string or boolean, got {_kind(value)}")

    return Profile(
        source=source, text=text, name=name, host=host, output=output, cache=cache,
        timeout_s=timeout_s, dataset_path=dataset_path, scenes_count=count, scenes_seed=seed,
        accuracy=accuracy, limit=limit, timing_images=timing_images, models=tuple(models),
        sizes=sizes, proposals=proposals, backends=backends, opt_levels=opt_levels,
        concurrency=concurrency, threads=tuple(threads), repetitions=repetitions,
        invocations=invocations, synthetic=dict(synthetic), max_pixels=max_pixels, precisions=precisions,
        **_quantisation(c, doc.get("quantisation", {})),
    )


def _quantisation(c: _Checker, q) -> dict:
    """The [quantisation] table as Profile fields (defaults documented at the top)."""
    q = c.table(q, "quantisation", {"method", "per_channel", "op_types", "reduce_range", "calibration"})
    settings = {
        "method": c.str_(q.get("method", "minmax"), "quantisation.method", METHODS),
        "per_channel": c.bool_(q.get("per_channel", True), "quantisation.per_channel"),
        "op_types": c.list_(q.get("op_types", list(QUANTISABLE_OPS)), "quantisation.op_types",
                            lambda v, k: c.str_(v, k, QUANTISABLE_OPS)),
        "reduce_range": c.bool_(q.get("reduce_range", False), "quantisation.reduce_range"),
    }
    out = {"quantisation": settings}
    cal = q.get("calibration", {})
    if isinstance(cal, str):
        out["calibration_path"] = c.str_(cal, "quantisation.calibration", allow_empty=False)
    elif isinstance(cal, dict):
        c.table(cal, "quantisation.calibration", {"count", "seed"})
        out["calibration_count"] = c.int_(cal.get("count", 16), "quantisation.calibration.count", 1, 10_000)
        out["calibration_seed"] = c.int_(cal.get("seed", 1), "quantisation.calibration.seed", 0, 2**31 - 1)
    else:
        c.fail("quantisation.calibration", f"expected a path or a table {{count, seed}}, got {_kind(cal)}")
    return out


def _external(c: _Checker, m: dict, kp: str, earlier) -> ModelEntry:
    """An external-graph entry: the graph, its classes and adapter, checked against each other now."""
    from speedbench.adapt import check_graph, load_adapter, parse_adapter
    from speedbench.schema import FAMILIES

    if "weights" in m:
        c.fail(f"{kp}.weights", "an external graph carries its own weights")
    c.table(m, kp, {"id", "onnx", "family", "classes", "classes_file", "adapter", "sizes", "proposals"},
            {"id", "onnx", "family", "adapter"})
    ident = c.str_(m["id"], f"{kp}.id", allow_empty=False)
    onnx = c.str_(m["onnx"], f"{kp}.onnx", allow_empty=False)
    if not Path(onnx).is_file():
        c.fail(f"{kp}.onnx", f"{onnx}: ONNX graph file not found")
    family = c.str_(m["family"], f"{kp}.family", FAMILIES)
    if ("classes" in m) == ("classes_file" in m):
        c.fail(kp, "give exactly one of `classes` or `classes_file`")
    if "classes" in m:
        classes = c.list_(m["classes"], f"{kp}.classes", lambda v, k: c.str_(v, k), unique=False)
    else:
        classes = _classes_file(c, c.str_(m["classes_file"], f"{kp}.classes_file", allow_empty=False),
                                f"{kp}.classes_file")
    spec = m["adapter"]
    if isinstance(spec, dict):
        adapter = parse_adapter(spec, f"{c.source}: {kp}.adapter")
    else:
        adapter = load_adapter(c.str_(spec, f"{kp}.adapter", allow_empty=False))
    check_graph(onnx, adapter, classes=classes)
    weights = f"onnx:{Path(onnx).name}"
    if any(e.id == ident for e in earlier):
        c.fail(f"{kp}.id", f"model {ident!r} is listed twice")
    return ModelEntry(
        id=ident, weights=weights, onnx=onnx, family=family, classes=classes, adapter=adapter,
        sizes=c.list_(m["sizes"], f"{kp}.sizes", lambda v, k: _size(c, v, k)) if "sizes" in m else None,
        proposals=(c.list_(m["proposals"], f"{kp}.proposals", lambda v, k: _proposal(c, v, k))
                   if "proposals" in m else None))


def _classes_file(c: _Checker, path: str, keypath: str) -> tuple:
    import json

    try:
        text = Path(path).read_text()
    except (OSError, UnicodeDecodeError) as exc:
        c.fail(keypath, f"{path}: cannot read ({type(exc).__name__})")
    if path.endswith(".json"):
        try:
            names = json.loads(text)
        except ValueError:
            c.fail(keypath, f"{path}: not valid JSON")
        if not isinstance(names, list) or not names or not all(isinstance(n, str) for n in names):
            c.fail(keypath, f"{path}: expected a JSON list of class names")
        return tuple(names)
    names = tuple(line.strip() for line in text.splitlines() if line.strip())
    if not names:
        c.fail(keypath, f"{path}: no class names in it")
    return names


def _size(c: _Checker, value, keypath: str):
    if value == "native":
        return value
    if isinstance(value, str):
        c.fail(keypath, f"{value!r} is not a size (an integer in pixels, or \"native\")")
    return c.int_(value, keypath, 32, 4096)


def _proposal(c: _Checker, value, keypath: str):
    if value == "default":
        return value
    if isinstance(value, str):
        c.fail(keypath, f"{value!r} is not a proposal count (an integer, or \"default\")")
    return c.int_(value, keypath, 1, 10_000)


def _weights(c: _Checker, value, keypath: str) -> str:
    c.str_(value, keypath, allow_empty=False)
    if value in ("none", "torchvision", "demo"):
        return value
    if value.startswith("file:") and len(value) > len("file:"):
        return value
    c.fail(keypath, f"{value!r} is not one of none, torchvision, demo, file:PATH")
