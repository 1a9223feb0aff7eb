"""Shared vocabulary: stage names and the columns of a run's points table.

This module is the contract between measure/evaluate (which produce rows),
sweep (which stores them) and analyse/report (which read them). It imports
nothing heavy. README.md documents the same columns for notebook users.
"""

# Stages a detector's time is split into. One-stage models use "head";
# two-stage models use "proposals" and "roi_heads". Time that cannot be tied
# to a stage through the graph's module scopes goes to "unattributed".
STAGES = (
    "preprocess",
    "backbone",
    "neck",
    "proposals",
    "roi_heads",
    "head",
    "postprocess",
    "unattributed",
)

FAMILIES = ("one-stage", "two-stage")

# Columns that identify a point (a configuration). Two rows with equal values
# here are the same point, whichever run they come from.
CONFIG_COLUMNS = (
    "model",          # zoo id
    "weights",        # "none", "torchvision", "file:<name>" or a demo weights id
    "size",           # input size the model's own transform resizes to (px)
    "proposals",      # proposal / candidate budget; 0 when the model has no such knob
    "backend",        # "ort" or "eager"
    "intra_threads",
    "inter_threads",
    "exec_mode",      # "sequential" / "parallel" (ORT); "" for eager
    "opt_level",      # ORT graph optimisation level name; "" for eager
    "affinity",       # number of cores the worker was pinned to; 0 = not pinned
    "concurrency",    # K concurrent workers for throughput points; 1 otherwise
    "env",            # interleaved A/B runs: which Python environment ("A" old, "B" new); "" otherwise
)

# Identity columns added after runs already existed, with the value every older run
# implicitly had. point_id leaves such a column out while it holds that value, so the
# ids of configurations that existed before stay the same (resume and compare rely on it).
# A new identity column is appended to CONFIG_COLUMNS and entered here.
ID_DEFAULTS: dict = {"env": ""}

# Percentiles reported for every latency distribution, in milliseconds.
LATENCY_STATS = ("p50", "p90", "p99")

# Interleaved A/B runs (speedbench compare --envs): the environment's interpreter and a digest of
# its software (Python, package versions, code revision), and the worker invocations of the row.
INTERLEAVED_COLUMNS = ("env_python", "env_fingerprint", "invocations")

# Host speed probe (speedbench/measure/probe.py), timed at the start and the end of each worker
# process: median ms of its rounds; probe_raw keeps every round time as JSON
# ({"start": {"hash_ms": [...], "copy_ms": [...], "ms": m, "version": v}, "end": {...}}).
PROBE_COLUMNS = ("probe_start_ms", "probe_end_ms", "probe_raw")

# Other columns of the points table (see README.md for their meaning).
RESULT_COLUMNS = (
    "point_id", "host", "family", "status", "reason",
    *INTERLEAVED_COLUMNS,
    "n_samples", "lat_min_ms", "lat_mean_ms", "lat_std_ms", "lat_cov",
    *[f"lat_{s}_ms" for s in LATENCY_STATS],
    *[f"lat_{s}_ci_lo_ms" for s in LATENCY_STATS],
    *[f"lat_{s}_ci_hi_ms" for s in LATENCY_STATS],
    "noisy",
    "fps",                     # frames/s of one stream = 1000 / lat_p50_ms (concurrency 1)
    *[f"stage_{s}_ms" for s in STAGES],          # in the unprofiled time base (see STAGE_METHOD)
    *[f"stage_{s}_share" for s in STAGES],       # share of the profiled pass's attributed time
    *[f"stage_{s}_profiled_ms" for s in STAGES],  # the profiled pass's own ms (inflated by the profiler)
    "stage_method",
    "profiled_ms", "profiling_overhead",
    "rss_imports_mib", "rss_loaded_mib", "rss_peak_mib", "model_file_mib",
    "params", "gmacs",
    "map", "map50", "map75", "map_small", "map_medium", "map_large", "mar_100",
    "map_ci_lo", "map_ci_hi", "untrained",
    *PROBE_COLUMNS,
)


# How stage_X_ms is obtained. The profiler inflates node times unevenly (many
# tiny nodes suffer most), so its ms never happened; its split is kept and
# scaled onto the run's own unprofiled median.
STAGE_METHOD = "share of profiled node time x unprofiled median"
# Rows of runs recorded before STAGE_METHOD existed held the profiled ms in
# stage_X_ms; loading them rescales the same way and says so.
STAGE_METHOD_RESCALED = "rescaled at load from the profiled ms: share x unprofiled p50"


def stage_column(stage: str) -> str:
    return f"stage_{stage}_ms"


def stage_share_column(stage: str) -> str:
    return f"stage_{stage}_share"


def stage_profiled_column(stage: str) -> str:
    return f"stage_{stage}_profiled_ms"


def latency_column(stat: str) -> str:
    if stat not in LATENCY_STATS:
        raise ValueError(f"latency statistic must be one of {LATENCY_STATS}, not {stat!r}")
    return f"lat_{stat}_ms"


def _is_default(column: str, value) -> bool:
    """A later identity column that is missing (None, NaN: a frame without it) or at its default."""
    return value is None or value != value or value == ID_DEFAULTS[column]


def point_id(config: dict) -> str:
    """Stable id of a configuration: a digest of its CONFIG_COLUMNS values.

    The same configuration gets the same id in every run, which is how resume
    avoids duplicates and how compare matches points across runs.
    """
    import hashlib
    import json

    key = {c: config.get(c) for c in CONFIG_COLUMNS if not (c in ID_DEFAULTS and _is_default(c, config.get(c)))}
    blob = json.dumps(key, sort_keys=True, default=str).encode()
    return hashlib.sha1(blob).hexdigest()[:12]
