"""Stage times in the unprofiled time base (issue 18, part 1)."""
import math
import os

import pytest

from speedbench.measure.timebase import stage_columns
from speedbench.schema import STAGE_METHOD, STAGE_METHOD_RESCALED, STAGES
from speedbench.sweep.rundir import rows_to_frame

MS = [f"stage_{s}_ms" for s in STAGES]


def test_stage_columns_keep_the_split_and_scale_onto_the_median():
    # profiled pass: 30 + 10 ms (the profiler inflated it); unprofiled median 20 ms
    row = stage_columns({"backbone": 30.0, "head": 10.0}, 20.0)
    assert row["stage_backbone_share"] == 0.75 and row["stage_head_share"] == 0.25
    assert row["stage_backbone_ms"] == 15.0 and row["stage_head_ms"] == 5.0
    assert row["stage_backbone_profiled_ms"] == 30.0
    assert math.isnan(row["stage_neck_ms"]) and row["stage_method"] == STAGE_METHOD
    empty = stage_columns({}, 20.0)
    assert empty["stage_method"] == "" and all(math.isnan(empty[c]) for c in MS)


def test_rows_of_an_old_run_are_rescaled_and_labelled():
    # A row as runs recorded it before the time base existed: stage_X_ms were profiled ms.
    old = {"point_id": "a", "status": "ok", "lat_p50_ms": 10.0,
           "stage_backbone_ms": 12.0, "stage_postprocess_ms": 4.0, "stage_unattributed_ms": 4.0}
    new = {"point_id": "b", "status": "ok", "lat_p50_ms": 10.0, **stage_columns({"backbone": 6.0}, 10.0)}
    df = rows_to_frame([old, new]).set_index("point_id")
    assert df.loc["a", "stage_method"] == STAGE_METHOD_RESCALED
    assert df.loc["a", "stage_backbone_profiled_ms"] == 12.0
    assert df.loc["a", "stage_backbone_ms"] == pytest.approx(6.0)    # 12 / 20 of 10 ms
    assert df.loc["a", MS].sum() == pytest.approx(10.0)
    assert df.loc["b", "stage_method"] == STAGE_METHOD and df.loc["b", "stage_backbone_ms"] == 10.0


PROFILE = """
[run]
name = "timebase"
cache = "{cache}"
timeout_s = 240

[dataset]
scenes = {{count = 2, seed = 3}}
accuracy = false
timing_images = 2

[sweep]
sizes = [128]

[[models]]
id = "demo_ssdlite"
weights = "demo"

[[threads]]
intra = 1
[[threads]]
intra = 2

[repetitions]
warmup_min = 1
warmup_max = 3
min_reps = 5
max_reps = 15
max_seconds = 1.0
stages = true
"""


def test_on_a_real_run_every_stage_sum_is_the_unprofiled_median(tmp_path):
    # An accounting identity, not a timing: the stage ms are the profiled split scaled onto
    # the unprofiled p50, so they add up to it (the profiled ms added up to 1.1x-3x of it).
    from speedbench.sweep import load_run, run_sweep

    prof = tmp_path / "p.toml"
    prof.write_text(PROFILE.format(cache=tmp_path / "cache"))
    df = load_run(run_sweep(prof, out_dir=tmp_path / "run", quiet=True, stream=open(os.devnull, "w")))
    ok = df[df.status == "ok"]
    assert len(ok) == 2, df[["status", "reason"]]
    ratio = ok[MS].sum(axis=1, min_count=1) / ok["lat_p50_ms"]
    assert ratio.between(0.9, 1.1).all(), ratio
    assert (ok["stage_method"] == STAGE_METHOD).all()
    shares = ok[[f"stage_{s}_share" for s in STAGES]].sum(axis=1)
    assert shares.sub(1).abs().max() < 1e-9
    profiled = ok[[f"stage_{s}_profiled_ms" for s in STAGES]].sum(axis=1)
    assert (profiled > 0).all()
    # issue 18, item 4: the host's matmul peak once per run (1 thread and the run's counts),
    # on every row at its thread count, and the counted MACs per stage beside the stage ms
    from speedbench.sweep import RunDir

    with RunDir.open(tmp_path / "run") as rd:
        peak = rd.meta()["matmul_peak"]
    assert set(peak["by_threads"]) == {"1", "2"} and "matmul" in peak["method"]
    for _, r in ok.iterrows():
        assert r["matmul_peak_gmac_s"] == peak["by_threads"][str(r["intra_threads"])]["gmac_s"]
    assert (ok["stage_backbone_gmacs"] > 0).all() and (ok["stage_postprocess_gmacs"] == 0).all()
