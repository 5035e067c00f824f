"""The ground truth in the resolved config and in ``langsim info``.

Check values are the worked examples of /work/shared/reference/check-values.md, quoted
there to 5-6 significant digits; the tolerance is half a unit of the last digit quoted
(for the bead, of the viscosity's 4 digits: 0.00005/0.8900 = 5.6e-5 relative).
"""
import math

import pytest

from langsim import config
from langsim.truth import describe

# check-values.md, section 1: a = 0.5 um, 25 C, eta = 0.8900 mPa s -> gamma = 8.38827e-9 kg/s,
# D = 0.49073 um^2/s (Stokes 1850/51; Einstein 1905, Ann. Phys. 17, 549).
BEAD = {"seed": 1, "particles": {"count": 1, "dimensions": 2, "radius": 0.5e-6},
        "medium": {"temperature": 298.15, "viscosity": 0.8900e-3},
        "potential": [{"type": "harmonic", "stiffness": [1e-5, 2e-6]}],
        "dynamics": {"dt": 1e-5, "steps": 10}}
# check-values.md, section on the underdamped oscillator: k = 0.1 N/m, m = 2.53303e-11 kg,
# gamma = 1.59155e-7 kg/s -> f0 = 10 kHz, Q = 10 (omega0 = sqrt(k/m), Q = m omega0/gamma).
CANTILEVER = {"seed": 1, "particles": {"count": 1, "dimensions": 1, "mass": 2.53303e-11,
                                       "friction": 1.59155e-7},
              "medium": {"temperature": 295.15},
              "potential": [{"type": "harmonic", "stiffness": 0.1}],
              "dynamics": {"regime": "underdamped", "scheme": "baoab", "dt": 1e-6, "steps": 10}}
ETA_DIGITS = 5.6e-5


def truth(cfg):
    return config.load(cfg).resolved["truth"]


def test_overdamped_bead_diffusion_and_corner_frequency():
    t = truth(BEAD)
    assert t["kT"] == pytest.approx(4.116405e-21, rel=2e-7, abs=0)          # k_B T at 298.15 K (table, sec. 1)
    assert t["diffusion"] == pytest.approx([0.49073e-12] * 2, rel=ETA_DIGITS, abs=0)
    gamma = 8.38827e-9
    # f_c = kappa/(2 pi gamma): Berg-Sorensen & Flyvbjerg 2004, Rev. Sci. Instrum. 75, 594 (sec. 4)
    assert t["corner_frequency"] == pytest.approx([1e-5 / (2 * math.pi * gamma),
                                                   2e-6 / (2 * math.pi * gamma)], rel=ETA_DIGITS, abs=0)
    assert t["variance"] == pytest.approx([4.116405e-21 / 1e-5, 4.116405e-21 / 2e-6], rel=2e-7, abs=0)
    assert "natural_frequency" not in t
    # a wrong input (water at 20 C, 1.0016 mPa s) gives D = 0.42875 um^2/s: told apart
    wrong = truth({**BEAD, "medium": {"temperature": 298.15, "viscosity": 1.0016e-3}})
    assert wrong["diffusion"][0] != pytest.approx(0.49073e-12, rel=ETA_DIGITS, abs=0)


def test_underdamped_oscillator_f0_and_q():
    t = truth(CANTILEVER)
    assert t["natural_frequency"] == pytest.approx([1e4], rel=1e-5, abs=0)
    assert t["quality_factor"] == pytest.approx([10.0], rel=1e-5, abs=0)
    assert "corner_frequency" not in t
    stiffer = truth({**CANTILEVER, "potential": [{"type": "harmonic", "stiffness": 0.4}]})
    assert stiffer["natural_frequency"] != pytest.approx([1e4], rel=1e-5, abs=0)   # 20 kHz


def test_nonlinear_potential_has_no_stiffness_and_info_reads_practical_units():
    dw = {**BEAD, "potential": [{"type": "double-well", "barrier_kT": 3, "separation": 4e-7}]}
    t = truth(dw)
    assert set(t) == {"kT", "diffusion"}
    line = describe(truth(BEAD))
    assert "D 0.4907 um^2/s" in line and "stiffness [0.01, 0.002] pN/nm" in line
    assert "kT 4.116 pN nm" in line
