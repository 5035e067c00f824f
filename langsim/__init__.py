"""langsim: Langevin dynamics of colloidal particles and mechanical oscillators.

Importing the package does no work; the compiled kernels load on first use.
"""
import importlib

__version__ = "0.1.0"

__all__ = ["run", "load", "check", "escape_rate", "sweep", "Trajectory", "potentials", "__version__"]

_LAZY = {"run": ("engine", "run"), "load": ("trajectory", "load"),
         "Trajectory": ("trajectory", "Trajectory"), "check": ("checks", "check"),
         "escape_rate": ("rates", "escape_rate"), "sweep": ("sweeps", "sweep"),
         "potentials": ("potentials", None)}


def __getattr__(name):  # lazy, so that ``import langsim`` stays cheap
    if name not in _LAZY:
        raise AttributeError(f"module 'langsim' has no attribute {name!r}")
    module, attr = _LAZY[name]
    mod = importlib.import_module(f"{__name__}.{module}")
    return mod if attr is None else getattr(mod, attr)
