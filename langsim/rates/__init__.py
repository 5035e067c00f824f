"""Thermal escape rates: direct counting and adaptive multilevel splitting on the engine's bursts.

``langsim.escape_rate(config, **overrides)`` answers a config's ``[escape]``
question (see :mod:`langsim.rates.spec`) with a rate, its 95 % interval and
the theory that applies; ``langsim rate CONFIG`` does the same from the shell.
"""
from .driver import EscapeResult, compute, escape_rate
from .methods import RateError
from .spec import EscapeSpec

__all__ = ["escape_rate", "EscapeResult", "EscapeSpec", "RateError", "compute"]
