"""Resident memory of the worker process, in MiB.

Peak during the timed runs: Linux keeps a high-water mark of the resident set
(VmHWM, also what getrusage's ru_maxrss reports). Writing "5" to
/proc/self/clear_refs resets it, so resetting right before the timed runs
makes the mark cover only those runs; a short allocation that is freed again
between our RSS samples still shows in it. Where the reset is not possible,
the peak covers the whole process life and `peak_scope` says so.
"""
from __future__ import annotations

import os
import resource

MIB = 1024 * 1024


def rss_mib() -> float:
    """Current resident set size."""
    import psutil

    return psutil.Process().memory_info().rss / MIB


def hwm_mib() -> float | None:
    """Resident high-water mark from /proc/self/status (None where unavailable)."""
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024
    except OSError:
        pass
    return None


def ru_maxrss_mib() -> float:
    # Linux reports ru_maxrss in KiB.
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def reset_peak() -> bool:
    """Reset the high-water mark; False if the kernel does not allow it here."""
    try:
        with open(f"/proc/{os.getpid()}/clear_refs", "w") as f:
            f.write("5")
        return True
    except OSError:
        return False


class PeakTracker:
    """Samples RSS between runs and reads the kernel's high-water mark at the end."""

    def __init__(self, every: int = 5):
        self.every = max(1, every)
        self.scope = "timed runs" if reset_peak() else "process"
        self.sampled = rss_mib()

    def __call__(self, i: int) -> None:
        if i % self.every == 0:
            self.sampled = max(self.sampled, rss_mib())

    def result(self) -> dict:
        self.sampled = max(self.sampled, rss_mib())
        hwm = hwm_mib()
        maxrss = ru_maxrss_mib()
        peak = max(x for x in (self.sampled, hwm, maxrss if self.scope == "process" else None) if x is not None)
        return {"rss_peak_mib": peak, "rss_sampled_peak_mib": self.sampled,
                "vm_hwm_mib": hwm, "ru_maxrss_mib": maxrss, "peak_scope": self.scope}
