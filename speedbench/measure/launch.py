"""The parent side: run one point in a fresh worker process and collect its result.

The parent never measures. It validates the point, hands the images to the
worker through a temporary .npz, starts `python -m speedbench.measure.worker`
in a new session (its own process group) with the thread environment set,
waits at most timeout_s, and kills the whole group if it overruns. A worker
that is killed, segfaults, runs out of memory or raises becomes a failed
PointResult with the reason; the caller goes on with the next point.
"""
from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

from speedbench.errors import UserError
from speedbench.measure.point import Point, Policy
from speedbench.measure.invocations import Replicated
from speedbench.measure.result import PointResult, combine_invocations
from speedbench.measure.worker import THREAD_VARS

_SIGNAL_REASONS = {
    signal.SIGKILL: "killed by SIGKILL (out of memory?)",
    signal.SIGSEGV: "crashed with SIGSEGV (segmentation fault)",
    signal.SIGABRT: "aborted (SIGABRT)",
    signal.SIGBUS: "crashed with SIGBUS",
    signal.SIGTERM: "terminated by SIGTERM",
}


def thread_env(point: Point, base: dict | None = None) -> dict:
    """The worker's environment: thread-count variables pinned to intra_threads (0 = leave as is)."""
    env = dict(os.environ if base is None else base)
    if point.intra_threads > 0:
        for var in THREAD_VARS:
            env[var] = str(point.intra_threads)
    env.setdefault("PYTHONHASHSEED", "0")
    return env


def load_images(images) -> list[np.ndarray]:
    """A list of uint8 [H, W, 3] arrays or image paths -> arrays (UserError naming a bad one)."""
    from speedbench.data import read_image

    if images is None or len(images) == 0:
        raise UserError("measure: no images given to time the model on")
    out = []
    for i, img in enumerate(images):
        if isinstance(img, (str, os.PathLike)):
            out.append(read_image(img))
            continue
        arr = np.asarray(img)
        if arr.dtype != np.uint8 or arr.ndim != 3 or arr.shape[2] != 3 or min(arr.shape[:2]) < 1:
            raise UserError(f"measure: image {i} must be a uint8 [H, W, 3] array, got {arr.dtype} {arr.shape}")
        out.append(arr)
    return out


def signal_reason(returncode: int) -> str:
    try:
        sig = signal.Signals(-returncode)
    except ValueError:
        return f"killed by signal {-returncode}"
    return _SIGNAL_REASONS.get(sig, f"killed by {sig.name}")


# Pause between two worker processes, so the next one does not start while the last one's
# exit (freeing its memory, the OS reclaiming its pages) still takes a core. See README, method.
SETTLE_S = 0.5
# The worker's invocation index, in its environment (the synthetic backend can fail on one of them).
INVOCATION_VAR = "SPEEDBENCH_INVOCATION"


def measure_point(point: Point, images, policy: Policy | None = None, timeout_s: float = 600,
                  invocation: int = 0, python: str | None = None) -> PointResult:
    """Measure one point in its own worker process (one invocation); never raises for a worker failure.

    invocation: the index this process has among the point's invocations; every sample
    of the result carries it (result.measurement.invocation).
    python: the interpreter the worker is started with (default: this one). An upgrade check
    measures the same point under two environments' interpreters (speedbench.sweep.interpreters
    checks them first).
    """
    result = _measure_once(point, images, policy, timeout_s, invocation, python)
    result.extra["invocation"] = int(invocation)
    m = result.measurement
    if m is not None:
        result.measurement = Replicated(m.samples_ms, [int(invocation)] * m.n, confidence=m.confidence,
                                        noisy_cov=m.noisy_cov, rel_ci=m.rel_ci)
    return result


def measure_invocations(point: Point, images, policy: Policy | None = None, invocations: int = 1,
                        timeout_s: float = 600, settle_s: float = SETTLE_S) -> PointResult:
    """Measure one point in `invocations` fresh worker processes, one after the other; combined result.

    Only the first invocation runs the stage profile (the others time only). A sweep
    interleaves the invocations of all its points instead (speedbench.sweep); this is the
    one-point form for the API and `speedbench measure`.
    """
    if not isinstance(invocations, int) or invocations < 1:
        raise UserError(f"measure: invocations must be an integer >= 1, got {invocations!r}")
    policy = policy or Policy()
    results = []
    for i in range(invocations):
        if i:
            time.sleep(settle_s)
        results.append(measure_point(point, images, policy if i == 0 else replace(policy, profile_stages=False),
                                     timeout_s, invocation=i))
    return combine_invocations(results)


def _measure_once(point: Point, images, policy: Policy | None, timeout_s: float, invocation: int = 0,
                  python: str | None = None) -> PointResult:
    policy = policy or Policy()
    point.validate()
    policy.validate()
    if point.concurrency != 1:
        raise UserError(f"point field 'concurrency': measure_point times one stream; "
                        f"use measure_load for K={point.concurrency} concurrent workers")
    if not timeout_s or timeout_s <= 0:
        raise UserError(f"measure: timeout must be > 0 s, got {timeout_s!r}")
    arrays = load_images(images)
    with tempfile.TemporaryDirectory(prefix="speedbench-point-") as tmp:
        tmp = Path(tmp)
        np.savez(tmp / "images.npz", **{f"image_{i}": a for i, a in enumerate(arrays)})
        spec = {"point": point.to_dict(), "policy": policy.to_dict(),
                "images": str(tmp / "images.npz"), "result": str(tmp / "result.json"),
                "parent_pid": os.getpid()}
        (tmp / "spec.json").write_text(json.dumps(spec))
        with open(tmp / "stderr.txt", "wb") as err:
            proc = subprocess.Popen([python or sys.executable, "-m", "speedbench.measure.worker", str(tmp / "spec.json")],
                                    env={**thread_env(point), INVOCATION_VAR: str(int(invocation))},
                                    stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                    stderr=err, start_new_session=True)
            timed_out = False
            try:
                proc.wait(timeout=timeout_s)
            except subprocess.TimeoutExpired:
                timed_out = True
            finally:
                _kill_group(proc)       # also reaps anything the worker left behind
        stderr_tail = _tail(tmp / "stderr.txt")
        result_file = tmp / "result.json"
        if timed_out:
            return _failed(point, f"timed out after {timeout_s:g} s", stderr_tail)
        if result_file.exists():
            data = json.loads(result_file.read_text())
            if data.get("status") == "failed" or proc.returncode == 0:
                result = PointResult.from_dict({**data, "point": point.to_dict()})
                if not result.ok:
                    result.extra.setdefault("stderr_tail", stderr_tail)
                return result
        if proc.returncode < 0:
            return _failed(point, signal_reason(proc.returncode), stderr_tail)
        last = stderr_tail.strip().splitlines()[-1:] or [""]
        return _failed(point, f"worker exited with code {proc.returncode}: {last[0]}"[:300], stderr_tail)


def _kill_group(proc: subprocess.Popen) -> None:
    try:
        os.killpg(proc.pid, signal.SIGKILL)
    except (ProcessLookupError, PermissionError):
        pass
    proc.wait()


def _tail(path: Path, n: int = 4000) -> str:
    try:
        data = path.read_bytes()[-n:]
    except OSError:
        return ""
    return data.decode("utf-8", "replace")


def _failed(point: Point, reason: str, stderr_tail: str = "") -> PointResult:
    return PointResult(point=point, status="failed", reason=reason, extra={"stderr_tail": stderr_tail})
