"""`speedbench demo --check`: the regression gate, shown on a change that changes nothing.

Runs profiles/upgrade-check.toml twice with nothing changed in between (two run
directories), then `compare` on them. With nothing changed the honest verdict is "no
regression": a gate that fails here would fail a team's CI on every no-op change, so this is
also a check of the host. A second call reuses finished runs (delete them to measure again).
"""
from __future__ import annotations

import sys
from pathlib import Path

from speedbench.errors import UserError

RUN_NAMES = ("upgrade-check-1", "upgrade-check-2")

CLEAN_VERDICT = """\
What a clean verdict looks like: exit status 0 and "no regression": every configuration
"unchanged" (the confidence interval of its new/base latency ratio does not reach past the
threshold, 5 % by default), no accuracy drop, no point that measured before and fails now,
and an environment diff that lists nothing, since nothing was changed. In a CI job the same
command gates an upgrade: run the profile before and after it, `speedbench compare BEFORE
AFTER`, and fail the job on exit status 1. If this no-op comparison is not clean, the host is
too noisy for a gate at this threshold: measure on a quieter machine, give the profile more
repetitions, or raise --threshold, before trusting a verdict on a real change."""


def check_profile_path() -> Path:
    """profiles/upgrade-check.toml, installed with the package or in the source checkout."""
    from speedbench.demo.run import demo_profile_path

    path = demo_profile_path().parent / "upgrade-check.toml"
    if not path.is_file():
        raise UserError(f"{path}: upgrade-check profile not found next to the demo profile")
    return path


def run_check(out_root=None, quiet: bool = False, stream=None) -> dict:
    """Two runs of the upgrade-check profile, and their comparison (speedbench.analyse.compare)."""
    from speedbench.analyse import Run, compare
    from speedbench.sweep import load_profile
    from speedbench.sweep.runner import run_sweep

    stream = stream or sys.stderr
    profile_path = check_profile_path()
    root = Path(out_root) if out_root else load_profile(profile_path).output_dir().parent
    runs = []
    for name in RUN_NAMES:
        out = root / name
        resume = (out / "meta.json").exists()
        print(f"{'continuing' if resume else 'measuring'} {out} ({profile_path.name}, run "
              f"{len(runs) + 1} of 2)", file=stream)
        run_sweep(profile_path, out_dir=out, resume=resume, quiet=quiet, stream=stream, retry_failed=resume)
        runs.append(out)
    result = compare(Run.load(runs[0]), Run.load(runs[1]))
    return {"runs": runs, "comparison": result, "exit_status": 1 if result.regressed else 0}
