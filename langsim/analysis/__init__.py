"""Estimators for Langevin trajectories: numpy/scipy only, never the engine.

Plain functions live in the submodules; the main estimators follow the
scikit-learn shape (options in the constructor, ``fit(data)`` returns self,
results end in ``_``):

- :class:`Equipartition` -- per-axis mean/variance, stiffness kT/var
- :class:`MSD`, :class:`RelaxationStiffness` -- displacements, relaxation time
- :class:`LorentzianFit`, :class:`OscillatorFit` -- spectral fits
- :class:`BoltzmannTest` -- histogram vs exp(-U/kT)
- :class:`EscapeRate` -- core-set transition counting
- :class:`CovarianceDiffusion`, :class:`OptimalMSDFit` -- D and localization error from
  measured tracks; :class:`BlurredTrap` -- trap stiffness through motion blur
- :class:`EffectiveTemperature` -- a mode's temperature three ways
- :class:`BoltzmannFromDiffusion` -- k_B and N_A from the MSD (Perrin)
"""
from .boltzmann import BoltzmannTest, boltzmann_test, equal_probability_edges
from .diffusion import BlurredTrap, CovarianceDiffusion, OptimalMSDFit, track_segments
from .equipartition import Equipartition, axis_moments
from .escape import EscapeRate, dwell_times, rate_from_events
from .msd import (MSD, RelaxationStiffness, lag_autocorrelation, mean_msd, msd_at_lags,
                  msd_direct, msd_fft, velocity_autocorrelation)
from .spectra import LorentzianFit, OscillatorFit, segment_averaged_periodogram, fit_psd_model
from .stats import (FrameSource, InsufficientDataError, NotFittedError, blocking,
                    integrated_autocorr_time)
from .temperature import BoltzmannFromDiffusion, EffectiveTemperature

__all__ = ["BlurredTrap", "CovarianceDiffusion", "OptimalMSDFit", "track_segments", "BoltzmannTest", "boltzmann_test", "equal_probability_edges", "Equipartition",
           "axis_moments", "EscapeRate", "dwell_times", "rate_from_events", "MSD",
           "RelaxationStiffness", "lag_autocorrelation", "mean_msd", "msd_at_lags", "msd_direct",
           "msd_fft", "velocity_autocorrelation", "LorentzianFit", "OscillatorFit",
           "segment_averaged_periodogram", "fit_psd_model", "FrameSource", "InsufficientDataError",
           "NotFittedError", "blocking", "integrated_autocorr_time", "EffectiveTemperature",
           "BoltzmannFromDiffusion"]
