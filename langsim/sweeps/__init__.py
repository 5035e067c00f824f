"""Parameter sweeps: many runs of one base config, on local processes or a Dask cluster.

:func:`sweep` (also ``langsim.sweep``) takes a base config and axes (dotted config
keys -> values), runs every point ``replicates`` times with seeds spawned from
the base seed, checks each run against theory and applies the user's
``analyze``, and returns tables of runs and checks (pandas). ``langsim sweep
SWEEP.toml`` does the same from a sweep file (:func:`read_sweep_file`).

Importing this package does no work; the machinery loads on first use.
"""
import importlib

__all__ = ["sweep", "SweepResult", "SweepInterrupted", "Plan", "make_plan", "read_sweep_file",
           "run_plan", "calibration"]

_LAZY = {"sweep": "core", "SweepResult": "core", "SweepInterrupted": "core", "run_plan": "core",
         "Plan": "plan", "make_plan": "plan", "read_sweep_file": "plan", "calibration": "report"}


def __getattr__(name):
    if name not in _LAZY:
        raise AttributeError(f"module 'langsim.sweeps' has no attribute {name!r}")
    return getattr(importlib.import_module(f"{__name__}.{_LAZY[name]}"), name)
