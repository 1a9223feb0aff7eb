"""speedbench: which object detector, at which input size, proposal count and
thread setting, to run on a given CPU, with the measurements to prove it.

The public Python API returns pandas DataFrames; see README.md.
"""
__version__ = "0.1.0"

__all__ = ["__version__", "load_run"]


def load_run(path):
    """Load a run directory's points table as a pandas DataFrame (see README: columns)."""
    from speedbench.sweep import load_run as _load_run

    return _load_run(path)
