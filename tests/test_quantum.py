"""The quantum limit: hbar omega/kT of a mode, the Planck mean energy, the warning and check rows.

Outside reference: reference sheet section 16 (calc/s5_quantum.py): E/kT = (x/2) coth(x/2)
with the zero point (Planck; Callen & Welton 1951, Phys. Rev. 83, 34), x/(e^x - 1) without;
(x/2) coth(x/2) = 1.01 at x = 0.346757, x/(e^x - 1) = 0.99 at x = 0.020067; E/kT = 2.439476 at
1 GHz and 10 mK, 1.001199 at 10 GHz and 4 K; constants from scipy.constants.
"""
import math
import warnings

import numpy as np
import pytest
import scipy.constants as sc

import langsim
from langsim import config, oscillators, theory
from langsim.checks import check
from langsim.config import LangsimWarning


def test_planck_energy_against_reference_sheet():
    full, thermal = theory.planck_energy_ratio(np.array([0.346757, 0.020067]))
    assert full[0] == pytest.approx(1.01, abs=2e-7) and thermal[1] == pytest.approx(0.99, abs=2e-7)
    for f, T, want in ((1e9, 0.01, 2.439476), (1e10, 4.0, 1.001199), (1e4, 300.0, 1.000000)):
        x = sc.h * f / (sc.k * T)
        assert theory.quantum_ratio(2 * math.pi * f, sc.k * T) == pytest.approx(x, rel=1e-12)
        assert theory.planck_mean_energy(2 * math.pi * f, sc.k * T) / (sc.k * T) == pytest.approx(want, abs=1e-6)
    # classical limit
    assert float(theory.planck_energy_ratio(0.0)[0]) == 1.0


def rlc(f0, T, count=1, steps=10, Q=20.0):
    L = 1e-9
    C = 1.0 / ((2 * math.pi * f0) ** 2 * L)
    R = math.sqrt(L / C) / Q
    return {"seed": 3, "oscillator": {"kind": "circuit", "resistance": R, "capacitance": C, "inductance": L,
                                      "count": count},
            "medium": {"temperature": T}, "dynamics": {"dt": 0.05 / (2 * math.pi * f0), "steps": steps},
            "output": {"every": 1}}


def quantum_warnings(cfg):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        config.load(cfg)
    return [str(w.message) for w in caught if issubclass(w.category, LangsimWarning)
            and "quantum limit" in str(w.message)]


def test_warning_threshold_and_text():
    T = 1.0
    f_star = oscillators.QUANTUM_WARN * sc.k * T / sc.h      # x = 0.02 exactly
    assert quantum_warnings(rlc(0.99 * f_star, T)) == []
    above = quantum_warnings(rlc(1.01 * f_star, T))
    assert len(above) == 1
    assert "hbar omega/kT = 0.0202" in above[0] and "zero point included" in above[0]
    assert "thermal part" in above[0] and "0.98993" in above[0]    # x/(e^x - 1) at x = 0.0202
    # a microwave resonator at 10 mK: far from classical, and still run (refuse nothing)
    cold = quantum_warnings(rlc(1e9, 0.01))
    assert "hbar omega/kT = 4.8" in cold[0] and "2.43948 kT" in cold[0]
    # a 10 kHz cantilever at room temperature is classical: no warning
    assert quantum_warnings({"seed": 1, "oscillator": {"kind": "mechanical", "stiffness": 0.1,
                                                       "resonance_frequency": 1e4, "quality_factor": 10},
                             "dynamics": {"dt": 1e-6, "steps": 10}}) == []


def test_check_shows_quantum_values_beside_classical():
    cfg = rlc(1e9, 0.01, count=32, steps=40000, Q=2.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", LangsimWarning)
        traj = langsim.run(cfg, progress=False)
    rep = check(traj)
    rows = {r.quantity: r for r in rep.rows}
    assert rep.passed, rep.format_table()
    classical, quantum = rows["capacitor voltage variance"], rows["capacitor voltage variance, quantum"]
    assert quantum.status == "info" and quantum.predicted / classical.predicted == pytest.approx(2.439476, rel=1e-5)
    assert rows["current variance, quantum"].unit == "A^2"
    # the classical simulation agrees with kT/C, not with the quantum value
    assert abs(classical.z) < 4.5 and abs((quantum.measured - quantum.predicted) / quantum.error) > 4.5
