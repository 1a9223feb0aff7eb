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
    "precision",      # "fp32" (the exported graph) or "int8" (its static QDQ quantisation)
    "spin_wait",      # ORT intra-/inter-op threads spin while waiting for work: "on" / "off"; "" for eager
    "env",            # interleaved A/B runs: which Python environment ("A" old, "B" new); "" otherwise
)

# Identity columns added after runs already existed, with the value every older run
# implicitly had. point_id leaves such a column out while it holds that value, so the
# ids of configurations that existed before stay the same (resume and compare rely on it).
# A new identity column is appended to CONFIG_COLUMNS and entered here. A blank value
# ("" or None: the knob does not apply to the point's backend) is left out too.
ID_DEFAULTS: dict = {
    "precision": "fp32",
    "spin_wait": "on",    # ONNX Runtime's own default: session.intra_op.allow_spinning = "1"
    "env": "",            # not an interleaved A/B run
}

PRECISIONS = ("fp32", "int8")
# int8 settings a profile may name ([quantisation]; speedbench.export.quantise documents them)
QUANT_METHODS = ("minmax", "entropy", "percentile")
QUANT_OP_TYPES = ("Conv", "MatMul", "Gemm")

# Values of spin_wait. Spinning threads poll for work instead of sleeping: lower wake-up
# latency, but they burn CPU while idle and fight other processes for the cores.
SPIN_VALUES = ("on", "off")

# Percentiles reported for every latency distribution, in milliseconds.
LATENCY_PERCENTILES = (50, 90, 99)
LATENCY_STATS = tuple(f"p{p}" for p in LATENCY_PERCENTILES)

# Columns that hold text and flags; every other schema column is numeric (NaN when missing).
TEXT_COLUMNS = frozenset({"model", "weights", "backend", "exec_mode", "opt_level", "precision", "spin_wait",
                          "point_id", "host", "family", "status", "reason", "stage_method",
                          "calibration_fingerprint", "ci_scope", "invocation_errors",
                          "probe_raw", "host_ref_raw", "env", "env_python", "env_fingerprint"})
BOOL_COLUMNS = frozenset({"noisy", "untrained", "between_dominates"})

# Groups of result columns, named here once; RESULT_COLUMNS below lists them in table order.
LATENCY_COLUMNS = (
    "n_samples", "lat_min_ms", "lat_mean_ms", "lat_std_ms", "lat_cov",
    *[f"lat_{s}_{k}ms" for s in LATENCY_STATS for k in ("", "ci_lo_", "ci_hi_")],
    "noisy",
    "fps",                     # frames/s of one stream = 1000 / lat_p50_ms (concurrency 1)
    "invocations", "between_cov", "between_dominates", "ci_scope",   # see RESULT_COLUMNS
)
MEMORY_COLUMNS = ("rss_imports_mib", "rss_loaded_mib", "rss_peak_mib", "model_file_mib")
# Columns a throughput point (K concurrent workers, speedbench.measure.concurrent_result) adds to its row;
# speedbench/analyse/sizing.py reads them:
#   tput_fps            aggregate frames/s of the K workers over the common window
#   tput_p50/p90/p99_ms per-request latency under load (paced: from arrival, queueing included)
#   tput_mean_ms        mean of the same (W of Little's law)
#   scaling_eff         X(K) / (K X(1)); NaN when X(1) was not measured alongside
#   littles_L           time-average requests in flight, from the timestamps
#   littles_XW          X W, to set beside littles_L (Little's law)
#   cores_used          K x T (K x affinity when pinned); host_cores: cores of the measuring host
#   tput_window_s       length of the common window; tput_requests: requests completed in it
#                       (both summed over the point's invocations)
#   tput_fps_ci_lo/hi   95 % interval of tput_fps (mean over invocations), tput_p99_ci_lo/hi of
#                       tput_p99_ms: the hierarchical bootstrap over invocations (measure/invocations.py)
#   tput_cpu_util       process CPU time / (span x cores_used); tput_cpu_util_xs: X x CPU per request
#   tput_cpu_ms         mean process CPU time per request (all threads)
#   tput_rss_total_mib  sum of the workers' peak resident memory
#   tput_busy           busy fraction per worker; tput_busy_xs: X x mean service time / K (U = X S)
#   tput_service_ms     mean service time (equals tput_mean_ms in a closed loop)
#   load_curve          JSON list of paced points of the largest K: load (offered / capacity),
#                       util (busy), offered_fps, tput_fps, p50_ms, p99_ms, mean_ms, status; over R
#                       invocations also p99_ci_lo/hi (hierarchical bootstrap) and invocations
LOAD_COLUMNS = (
    "tput_fps", "tput_p50_ms", "tput_p90_ms", "tput_p99_ms", "tput_mean_ms", "scaling_eff",
    "littles_L", "littles_XW", "cores_used", "host_cores", "tput_window_s", "tput_requests",
    "tput_cpu_util", "tput_cpu_util_xs", "tput_cpu_ms", "tput_rss_total_mib",
    "tput_busy", "tput_busy_xs", "tput_service_ms", "load_curve",
    "tput_fps_ci_lo", "tput_fps_ci_hi", "tput_p99_ci_lo", "tput_p99_ci_hi",
)
ACCURACY_COLUMNS = ("map", "map50", "map75", "map_small", "map_medium", "map_large", "mar_100",
                    "map_ci_lo", "map_ci_hi")

# Interleaved A/B runs (speedbench compare --envs): the environment's interpreter and a digest of
# its software (Python, package versions, code revision). The row's worker invocations are the
# replicated-invocation columns ("invocations", ...) below.
INTERLEAVED_COLUMNS = ("env_python", "env_fingerprint")

# Host speed probe (speedbench/measure/probe.py), timed at the start and the end of each worker
# process: median ms of its rounds; probe_raw keeps every round time as JSON
# ({"start": {"hash_ms": [...], "copy_ms": [...], "ms": m, "version": v}, "end": {...}}).
PROBE_COLUMNS = ("probe_start_ms", "probe_end_ms", "probe_raw")

# Host reference (speedbench/measure/reference.py): a fixed small graph run by the point's own
# onnxruntime session settings after every timed run, outside the timed region.
#   host_ref_ms     median over the invocations of each invocation's median reference time
#   host_ref_raw    JSON {"version": v, "ms": {invocation index: median ms}}
REFERENCE_COLUMNS = ("host_ref_ms", "host_ref_raw")

# Other columns of the points table (see README.md for their meaning).
RESULT_COLUMNS = (
    "point_id", "host", "family", "status", "reason",
    *INTERLEAVED_COLUMNS,
    "n_samples", "lat_min_ms", "lat_mean_ms", "lat_std_ms", "lat_cov",
    *[f"lat_{s}_ms" for s in LATENCY_STATS],
    *[f"lat_{s}_ci_lo_ms" for s in LATENCY_STATS],
    *[f"lat_{s}_ci_hi_ms" for s in LATENCY_STATS],
    "noisy",
    # Replicated invocations (each point measured in R independent worker processes)
    "invocations",             # invocations that succeeded (R); 1 for runs made before replication
    "invocations_failed",      # invocations that failed
    "invocation_errors",       # their reasons, "; "-separated, each prefixed with the invocation index
    "between_cov",             # CoV of the invocation medians (process-to-process spread)
    "between_dominates",       # between-invocation variance of the median exceeds the within one
    "ci_scope",                # what the latency intervals cover: one process, or R processes
    "fps",                     # frames/s of one stream = 1000 / lat_p50_ms (concurrency 1)
    *[f"stage_{s}_ms" for s in STAGES],          # in the unprofiled time base (see STAGE_METHOD)
    *[f"stage_{s}_share" for s in STAGES],       # share of the profiled pass's attributed time
    *[f"stage_{s}_profiled_ms" for s in STAGES],  # the profiled pass's own ms (inflated by the profiler)
    "stage_method",
    "profiled_ms", "profiling_overhead",
    # opt-in check without the profiler: each stage's sub-graph timed alone (median ms), their
    # sum, the whole graph timed alongside, and sum / whole - 1
    *[f"stage_{s}_subgraph_ms" for s in STAGES],
    "subgraph_sum_ms", "subgraph_whole_ms", "subgraph_residual",
    *[f"stage_{s}_gmacs" for s in STAGES],       # counted multiply-accumulates per image (export facts)
    "matmul_peak_gmac_s",      # this host's dense fp32 matmul peak at the point's thread count (meta)
    "rss_imports_mib", "rss_loaded_mib", "rss_peak_mib", "model_file_mib",
    "params", "gmacs",
    "map", "map50", "map75", "map_small", "map_medium", "map_large", "mar_100",
    "map_ci_lo", "map_ci_hi", "untrained",
    *PROBE_COLUMNS,
    *REFERENCE_COLUMNS,
    # int8 rows: accuracy change vs the fp32 graph of the same configuration (paired bootstrap
    # over the same held-out images) and detection agreement with it
    "map_change", "map_change_ci_lo", "map_change_ci_hi",
    "agree_matched_fraction", "agree_box_mean_px", "agree_box_max_px",
    "calibration_fingerprint",
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


def stage_subgraph_column(stage: str) -> str:
    return f"stage_{stage}_subgraph_ms"


def stage_gmacs_column(stage: str) -> str:
    return f"stage_{stage}_gmacs"


def latency_column(stat: str) -> str:
    if stat not in LATENCY_STATS:
        raise ValueError(f"latency statistic must be one of {LATENCY_STATS}, not {stat!r}")
    return f"lat_{stat}_ms"


def _is_default(column: str, value) -> bool:
    """A later identity column that is missing (None, NaN: a frame without it), blank (the knob
    does not apply to the point's backend) or at its default."""
    return value is None or value != value or value == "" or value == ID_DEFAULTS[column]


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


def config_label(row) -> str:
    """The one human label of a configuration (progress lines, tables, plots, reports):
    ``model @ size / proposals / threads`` plus the knobs that differ from the usual setting."""
    get = row.get if hasattr(row, "get") else (lambda k, d=None: getattr(row, k, d))
    size, props = _int_or(get("size", None)), _int_or(get("proposals", None))
    intra, inter = _int_or(get("intra_threads", None)), _int_or(get("inter_threads", None))
    threads = f"{intra}t" if inter in (None, 0, 1) else f"{intra}x{inter}t"
    parts = [f"{get('model', '?')} @ {size}", f"{props}p" if props else "-", threads]
    conc = _int_or(get("concurrency", None))
    if conc and conc > 1:
        parts.append(f"K={conc}")
    backend = get("backend", None)
    if backend and backend != "ort":
        parts.append(str(backend))
    # Knobs shown only when they differ from the usual setting, to keep labels short.
    if get("exec_mode", "") == "parallel":
        parts.append("parallel")
    opt = get("opt_level", "")
    if isinstance(opt, str) and opt not in ("", "all"):
        parts.append(f"opt {opt}")
    env = get("env", "")
    if isinstance(env, str) and env:
        parts.append(f"[{env}]")      # interleaved A/B runs: which environment
    pin = _int_or(get("affinity", None))
    if pin:
        parts.append(f"{pin} cores")
    precision = get("precision", None)
    if isinstance(precision, str) and precision not in ("", "fp32"):
        parts.append(precision)
    if get("spin_wait", "") == "off":
        parts.append("no spin")
    return " / ".join(parts)


def _int_or(v):
    try:
        if v is None or (isinstance(v, float) and v != v):   # None or NaN
            return None
        return int(v)
    except (TypeError, ValueError):
        return v
