"""Environment fingerprint: what machine and software a run was measured on.

Two runs are only comparable when this matches closely enough; analyse/regression
uses it to warn. Everything is read best-effort: a field that cannot be read
is None (never a guess).
"""
from __future__ import annotations

import os
import platform
import subprocess
import sys
from pathlib import Path

from speedbench.system import cores_available

# CPU features that change which kernels ONNX Runtime / PyTorch pick.
CPU_FLAGS = ("sse4_2", "avx", "avx2", "fma", "f16c", "avx_vnni", "avx512f", "avx512bw",
             "avx512vl", "avx512_vnni", "avx512_bf16", "avx512_fp16", "amx_tile", "amx_bf16", "amx_int8")

PACKAGES = ("torch", "torchvision", "onnxruntime", "onnx", "numpy", "pandas", "psutil",
            "pycocotools", "pyarrow", "matplotlib", "pillow", "tqdm")

# Variables that change thread counts or placement behind the profile's back.
THREAD_ENV = ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS", "NUMEXPR_NUM_THREADS",
              "OMP_PROC_BIND", "OMP_PLACES", "OMP_WAIT_POLICY", "KMP_AFFINITY", "KMP_BLOCKTIME",
              "GOMP_CPU_AFFINITY", "ORT_NUM_THREADS", "TORCH_NUM_THREADS")


def _read(path: str) -> str | None:
    try:
        return Path(path).read_text().strip()
    except OSError:
        return None


def _cpuinfo() -> tuple[str | None, set[str]]:
    text = _read("/proc/cpuinfo") or ""
    model, flags = None, set()
    for line in text.splitlines():
        key, _, value = line.partition(":")
        key = key.strip()
        if key == "model name" and model is None:
            model = value.strip()
        elif key in ("flags", "Features") and not flags:
            flags = set(value.split())
    if model is None:
        model = platform.processor() or None
    return model, flags


def _git_rev() -> str | None:
    here = Path(__file__).resolve().parent
    try:
        out = subprocess.run(["git", "rev-parse", "HEAD"], cwd=here, capture_output=True,
                             text=True, timeout=5)
        if out.returncode != 0:
            return None
        rev = out.stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--untracked-files=no"], cwd=here,
                               capture_output=True, text=True, timeout=5)
        return rev + ("+dirty" if dirty.returncode == 0 and dirty.stdout.strip() else "")
    except (OSError, subprocess.SubprocessError):
        return None


def _package_versions() -> dict:
    from importlib import metadata

    out = {}
    for name in PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = None
    return out


def _cpu_quota() -> float | None:
    """CPUs allowed by a cgroup v2 quota (containers), or None when unlimited/unreadable."""
    text = _read("/sys/fs/cgroup/cpu.max")
    if not text:
        return None
    quota, _, period = text.partition(" ")
    if quota == "max" or not period:
        return None
    try:
        return round(int(quota) / int(period), 2)
    except ValueError:
        return None


def environment_fingerprint() -> dict:
    """Machine and software description stored in every run's meta.json."""
    import psutil

    model, flags = _cpuinfo()
    try:
        freq = psutil.cpu_freq()
    except (OSError, NotImplementedError):
        freq = None
    affinity = cores_available()
    try:
        load = [round(x, 2) for x in os.getloadavg()]
    except OSError:
        load = None
    return {
        "cpu_model": model,
        "cpu_flags": {f: (f in flags) for f in CPU_FLAGS},
        "cores_logical": psutil.cpu_count(logical=True),
        "cores_physical": psutil.cpu_count(logical=False),
        "cores_allowed": affinity,
        "cpu_quota": _cpu_quota(),
        "mem_gib": round(psutil.virtual_memory().total / 2**30, 2),
        "os": platform.platform(),
        "governor": _read("/sys/devices/system/cpu/cpu0/cpufreq/scaling_governor"),
        "freq_mhz_max": round(freq.max, 1) if freq and freq.max else None,
        "load_avg": load,
        "python": sys.version.split()[0],
        "packages": _package_versions(),
        "thread_env": {k: os.environ[k] for k in THREAD_ENV if k in os.environ},
        "git_rev": _git_rev(),
    }
