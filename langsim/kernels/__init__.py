"""Compiled numba kernels: noise, forces and the tile loop of every scheme.

Pure functions over arrays and scalars: no Python objects, no I/O, no validation.
Their compiled code is cached in the user cache folder (:mod:`langsim.cache`),
never inside the installed package.
"""
from ..cache import install_numba_locator

install_numba_locator()
