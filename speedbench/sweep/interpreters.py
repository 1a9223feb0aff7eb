"""The two Python environments of an interleaved upgrade check: found, working, and compatible.

Each environment is named by its interpreter (a venv's bin/python, a container image's
python). Before anything is measured, each is asked, in a subprocess, for its speedbench
version and its environment fingerprint (the same record a run's meta.json holds). A
missing or broken interpreter, or two speedbench versions, are refused in one line: the
worker protocol between parent and worker is only promised within one version.
"""
from __future__ import annotations

import hashlib
import json
import os
import shutil
import subprocess
from dataclasses import dataclass, field

from speedbench.errors import UserError

# Run in the other interpreter. Prints one JSON line; imports what a worker imports first.
_SCRIPT = (
    "import json, sys\n"
    "import speedbench\n"
    "from speedbench.sweep.env import environment_fingerprint\n"
    "print(json.dumps({'speedbench': speedbench.__version__, 'python': sys.version.split()[0],\n"
    "                  'executable': sys.executable, 'module': speedbench.__file__,\n"
    "                  'env': environment_fingerprint()}))\n"
)
TIMEOUT_S = 120
# What identifies an environment's software (the machine is the same for both sides).
FINGERPRINT_KEYS = ("python", "packages", "git_rev")


@dataclass
class Interpreter:
    label: str                 # "A" (old) / "B" (new), or the user's name for it
    python: str                # the path as given (resolved on PATH when it is a bare name)
    speedbench_version: str
    python_version: str
    env: dict = field(default_factory=dict)      # environment_fingerprint() of that interpreter
    module: str = ""                             # where its speedbench was imported from

    @property
    def fingerprint(self) -> str:
        """A short digest of the environment's software: Python, package versions, code revision."""
        key = {k: self.env.get(k) for k in FINGERPRINT_KEYS}
        return hashlib.sha1(json.dumps(key, sort_keys=True, default=str).encode()).hexdigest()[:12]

    def describe(self) -> str:
        pk = self.env.get("packages") or {}
        libs = ", ".join(f"{k} {pk[k]}" for k in ("onnxruntime", "torch", "numpy") if pk.get(k))
        return f"{self.label}: {self.python} (Python {self.python_version}, speedbench {self.speedbench_version}" \
               + (f", {libs}" if libs else "") + f"; fingerprint {self.fingerprint})"

    def to_dict(self) -> dict:
        return {"label": self.label, "python": self.python, "speedbench_version": self.speedbench_version,
                "python_version": self.python_version, "module": self.module, "fingerprint": self.fingerprint,
                "env": self.env}


def inspect_interpreter(python: str, label: str, option: str = "--envs") -> Interpreter:
    """Ask `python` for its speedbench version and fingerprint; UserError naming it if it cannot."""
    path = python if os.sep in python else (shutil.which(python) or python)
    if not os.path.exists(path):
        raise UserError(f"{option}: {python}: interpreter not found")
    if os.path.isdir(path) or not os.access(path, os.X_OK):
        raise UserError(f"{option}: {python}: not an executable interpreter")
    try:
        out = subprocess.run([path, "-c", _SCRIPT], capture_output=True, text=True, timeout=TIMEOUT_S,
                             stdin=subprocess.DEVNULL)
    except subprocess.TimeoutExpired:
        raise UserError(f"{option}: {python}: did not answer within {TIMEOUT_S} s") from None
    except OSError as exc:
        raise UserError(f"{option}: {python}: cannot be started ({exc.strerror or exc})") from None
    if out.returncode != 0:
        last = (out.stderr.strip().splitlines() or [f"exit status {out.returncode}"])[-1]
        raise UserError(f"{option}: {python}: cannot run speedbench ({last.strip()[:200]})")
    try:
        info = json.loads((out.stdout.strip().splitlines() or [""])[-1])
        version, pyver = str(info["speedbench"]), str(info["python"])
    except (ValueError, KeyError, TypeError):
        raise UserError(f"{option}: {python}: did not report a speedbench version "
                        f"(printed {out.stdout.strip()[:80]!r})") from None
    env = info.get("env") if isinstance(info.get("env"), dict) else {}
    return Interpreter(label=label, python=path, speedbench_version=version, python_version=pyver,
                       env=env, module=str(info.get("module") or ""))


def inspect_pair(old: str, new: str, labels=("A", "B"), option: str = "--envs") -> tuple[Interpreter, Interpreter]:
    """Both environments, checked to run the same speedbench version."""
    a = inspect_interpreter(old, labels[0], option)
    b = inspect_interpreter(new, labels[1], option)
    if a.speedbench_version != b.speedbench_version:
        raise UserError(f"{option}: speedbench versions differ: {old} has {a.speedbench_version}, "
                        f"{new} has {b.speedbench_version}; install the same speedbench in both environments")
    return a, b
