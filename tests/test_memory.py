"""Memory figures of a worker: RSS after imports, after loading, and the peak of the timed runs."""
import numpy as np

from speedbench.measure import Point, Policy, measure_point
from speedbench.measure.memory import MIB, PeakTracker

POLICY = Policy(warmup_min=1, warmup_max=2, min_reps=3, max_reps=6, max_seconds=1.0, profile_stages=False)
IMAGES = [np.zeros((16, 16, 3), np.uint8)]


def test_allocation_during_runs_shows_in_peak():
    res = measure_point(Point(model="synthetic", backend="synthetic", options={"work_ms": 0.5, "alloc_mib": 300}),
                        IMAGES, POLICY, timeout_s=120)
    assert res.ok, res.reason
    mem = res.memory
    assert mem["peak_scope"] == "timed runs"
    # 300 MiB written and freed inside every run: the sampled RSS (between runs) misses it,
    # the kernel's high-water mark does not
    assert mem["rss_peak_mib"] - mem["rss_loaded_mib"] >= 270
    assert mem["rss_imports_mib"] > 0 and mem["rss_loaded_mib"] >= mem["rss_imports_mib"] - 1


def test_allocation_at_load_shows_in_loaded_not_in_growth():
    res = measure_point(Point(model="synthetic", backend="synthetic", options={"work_ms": 0.5, "load_mib": 200}),
                        IMAGES, POLICY, timeout_s=120)
    assert res.ok, res.reason
    mem = res.memory
    assert mem["rss_loaded_mib"] - mem["rss_imports_mib"] >= 180
    assert mem["rss_peak_mib"] - mem["rss_loaded_mib"] < 50     # nothing new allocated during the runs
    row = res.to_row()
    assert row["rss_loaded_mib"] == mem["rss_loaded_mib"] and row["model_file_mib"] == 0.0


def test_no_allocation_no_peak_growth():
    res = measure_point(Point(model="synthetic", backend="synthetic", options={"work_ms": 0.5}),
                        IMAGES, POLICY, timeout_s=120)
    assert res.memory["rss_peak_mib"] - res.memory["rss_loaded_mib"] < 50


def test_peak_tracker_in_process_sees_freed_block():
    # In a fresh process, as in a worker: a long-lived process (this pytest run) may serve the
    # block from pages it already holds, so its RSS would not rise at all.
    import json
    import subprocess
    import sys

    script = ("import json, numpy as np\n"
              "from speedbench.measure.memory import MIB, PeakTracker\n"
              "tracker = PeakTracker(every=1000)\n"
              "block = np.ones(64 * MIB, dtype=np.uint8)\n"
              "del block\n"
              "print(json.dumps(tracker.result()))\n")
    out = json.loads(subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                                    check=True).stdout)
    assert out["rss_peak_mib"] - out["rss_sampled_peak_mib"] >= 56 or out["peak_scope"] == "process"
    assert out["rss_peak_mib"] >= out["rss_sampled_peak_mib"]
