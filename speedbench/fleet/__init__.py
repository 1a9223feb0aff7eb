"""Fleet sweeps: one profile run on several hosts of a Dask cluster, one run directory per host.

Public face:
- run_fleet_sweep(profile_path, cluster, out_dir=None, resume=False, hosts=None, quiet=False,
  stream=None, lost_after_s=120.0) -> {host label: run directory}
- INSTALL_HINT: what to install when the optional engine (dask[distributed]) is missing

Importing this package does not import Dask; run_fleet_sweep raises a one-line
UserError naming what to install when it is absent. See README.md, "Fleet sweeps".
"""
from speedbench.fleet.engine import INSTALL_HINT

__all__ = ["run_fleet_sweep", "INSTALL_HINT"]


def __getattr__(name):
    if name == "run_fleet_sweep":
        from speedbench.fleet.runner import run_fleet_sweep

        return run_fleet_sweep
    raise AttributeError(name)
