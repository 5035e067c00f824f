"""Shared helpers for the physics tests.

Statistics: particles of a run are independent replicas (independent noise
streams), so an estimate averaged over particles has its standard error from
the spread of the per-particle estimates: SE = std / sqrt(n_particles). Bounds
are Z_MAX standard errors.
"""
import numpy as np
import pytest

from langsim.units import k_B

#: Acceptance bound in standard errors for the physics checks.
Z_MAX = 4.5


def replica_mean(values):
    """Mean over the last axis-0 replicas and its standard error."""
    values = np.asarray(values, dtype=float)
    n = values.shape[0]
    return values.mean(axis=0), values.std(axis=0, ddof=1) / np.sqrt(n)


def z_score(measured, error, predicted):
    return (np.asarray(measured) - np.asarray(predicted)) / np.asarray(error)


def per_particle_variance(positions, start=0):
    """(mean over particles of each particle's time-averaged x^2 about 0, SE) per axis."""
    x = np.asarray(positions[start:], dtype=float)
    per = (x * x).mean(axis=0)  # (particles, dims)
    return replica_mean(per)


@pytest.fixture
def kT_295():
    return k_B * 295.15
