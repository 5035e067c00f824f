"""langsim: Langevin dynamics of colloidal particles and mechanical oscillators.

Importing the package does no work; the compiled kernels load on first use.
"""
__version__ = "0.1.0"

__all__ = ["run", "load", "check", "Trajectory", "potentials", "__version__"]


def __getattr__(name):  # lazy: keep ``import langsim`` cheap
    if name == "run":
        from .engine import run
        return run
    if name in ("load", "Trajectory"):
        from . import trajectory
        return getattr(trajectory, name)
    if name == "check":
        from .check import check
        return check
    if name == "potentials":
        from . import potentials
        return potentials
    raise AttributeError(f"module 'langsim' has no attribute {name!r}")
