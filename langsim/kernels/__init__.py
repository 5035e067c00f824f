"""Compiled numba kernels: noise, forces and the stepping schemes.

Pure functions over arrays and scalars: no Python objects, no I/O, no validation.
"""
