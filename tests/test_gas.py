"""Gas media: Sutherland viscosity, mean free path, sphere friction from Stokes to Epstein.

Outside references:
- CRC Handbook of Chemistry and Physics, "Viscosity of Gases" (M. L. Huber, A. H. Harvey):
  eta at 200-500 K in uPa s, stated uncertainty generally below 3 %.
- Reference sheet section 15 (/work/shared/reference, calc/s4_gas_damping.py): air at 300 K,
  silica sphere (2200 kg/m^3) of radius 50 nm and 100 nm, lambda = 2 eta/(rho c_bar),
  Cunningham slip with the coefficients of Kim et al., J. Res. NIST 110, 31 (2005) and
  Davies, Proc. Phys. Soc. 57, 259 (1945); Epstein, Phys. Rev. 23, 710 (1924) with
  delta = 1 + pi/8. Values quoted there to 7 digits, so compared to 1e-6 relative.
"""
import math

import pytest

from langsim import config, units
from langsim.validation import ConfigError

# CRC Handbook, Viscosity of Gases (uPa s) at 200, 300, 400, 500 K
CRC = {"air": (13.3, 18.5, 23.1, 27.1), "nitrogen": (12.9, 17.9, 22.2, 26.1),
       "helium": (15.1, 19.9, 24.3, 28.3)}
CRC_T = (200.0, 300.0, 400.0, 500.0)
CRC_REL = 0.03          # the table's stated uncertainty

T_SHEET = 300.0
RHO_SILICA = 2200.0
DIGITS = 1e-6           # the sheet's 7 significant digits


def rel(a, b):
    return abs(a / b - 1.0)


@pytest.mark.parametrize("gas", sorted(CRC))
def test_sutherland_viscosity_against_crc_handbook(gas):
    for T, table in zip(CRC_T, CRC[gas]):
        assert rel(units.gas_viscosity(gas, T) * 1e6, table) < CRC_REL, (gas, T)
    # fails on a wrong gas: nitrogen's table is 10 % below helium's law
    assert max(rel(units.gas_viscosity("helium", T) * 1e6, v) for T, v in zip(CRC_T, CRC["nitrogen"])) > CRC_REL


def damping_rate(friction, radius):
    """gamma/M (1/s), the sheet's damping rate."""
    return friction / units.sphere_mass(radius, RHO_SILICA)


def test_mean_free_path_and_friction_against_reference_sheet():
    assert rel(units.gas_viscosity("air", T_SHEET), 1.845916e-5) < DIGITS
    assert rel(units.mean_molecular_speed("air", T_SHEET), 468.288249) < DIGITS
    assert rel(units.gas_density("air", T_SHEET, 1e5), 1.161218) < DIGITS
    lam = units.mean_free_path("air", T_SHEET, 1e5)
    assert rel(lam, 6.789146e-08) < DIGITS
    kn = lam / 50e-9
    assert rel(units.slip_correction(kn, "kim-2005"), 2.89658) < DIGITS
    assert rel(units.slip_correction(kn, "davies-1945"), 2.94838) < DIGITS
    # three pressures, 1000 mbar / 1 mbar / 1e-3 mbar (1 mbar = 100 Pa), R = 50 nm, Stokes/C_Kim
    for p_mbar, want in ((1000.0, 5.214066e6), (1.0, 6.747748e3), (1e-3, 6.749310)):
        got = damping_rate(units.gas_friction("air", T_SHEET, 100.0 * p_mbar, 50e-9), 50e-9)
        assert rel(got, want) < DIGITS, p_mbar
    # Epstein, delta = 1 + pi/8, in the free-molecular regime
    for p_mbar, want in ((1.0, 6.884802e3), (1e-3, 6.884802)):
        got = damping_rate(units.gas_friction("air", T_SHEET, 100.0 * p_mbar, 50e-9, "epstein"), 50e-9)
        assert rel(got, want) < DIGITS
    assert rel(damping_rate(units.gas_friction("air", T_SHEET, 1e5, 100e-9), 100e-9), 2.022959e6) < DIGITS
    # a wrong slip law or a wrong mean free path (hard-sphere, d = 0.372 nm) is told apart
    assert rel(damping_rate(units.gas_friction("air", T_SHEET, 1e5, 50e-9, "davies-1945"), 50e-9),
               5.214066e6) > 1e-3
    lam_hs = units.k_B * T_SHEET / (math.sqrt(2) * math.pi * 0.372e-9**2 * 1e5)
    assert rel(lam_hs, 6.736802e-08) < DIGITS and rel(lam_hs, lam) > 1e-3


def test_limits_stokes_and_free_molecular():
    eta = units.gas_viscosity("nitrogen", 295.0)
    a = 2e-6
    # continuum: a dense gas gives Stokes drag (Kn -> 0)
    dense = units.gas_friction("nitrogen", 295.0, 1e9, a)
    assert rel(dense, units.stokes_friction(eta, a)) < 1e-3
    # free molecular: the slip law tends to Epstein's form with delta = 9/(4 (A1 + A2)) = 1.365291
    # (reference sheet section 15), i.e. friction proportional to the pressure
    thin = units.gas_friction("nitrogen", 295.0, 1e-3, a)
    ep = units.epstein_friction("nitrogen", 295.0, 1e-3, a, delta=1.365291)
    assert rel(thin, ep) < 1e-5
    assert rel(units.gas_friction("nitrogen", 295.0, 2e-3, a) / thin, 2.0) < 1e-5


def gas_config(**medium):
    return {"seed": 1, "particles": {"radius": 50e-9, "density": RHO_SILICA, "count": 2},
            "medium": {"temperature": 300.0, **medium},
            "potential": [{"type": "harmonic", "stiffness": 1e-6}],
            "dynamics": {"regime": "underdamped", "dt": 1e-7, "steps": 10}}


def test_config_records_friction_viscosity_knudsen():
    spec = config.load(gas_config(gas="air", pressure=100.0))
    r = spec.resolved
    assert rel(r["particles"]["friction"][0], units.gas_friction("air", 300.0, 100.0, 50e-9)) < 1e-12
    assert rel(r["medium"]["viscosity"], 1.845916e-5) < DIGITS
    assert rel(r["particles"]["knudsen"], 1357.83) < DIGITS
    assert r["medium"]["gas"] == "air" and r["medium"]["pressure"] == 100.0 and r["medium"]["slip"] == "kim-2005"
    ep = config.load(gas_config(gas="helium", pressure=1.0, slip="epstein"))
    assert rel(ep.particles.friction[0], units.epstein_friction("helium", 300.0, 1.0, 50e-9)) < 1e-12
    override = config.load(gas_config(gas="air", pressure=100.0, viscosity=2e-5))
    assert override.medium.viscosity == 2e-5


@pytest.mark.parametrize("medium, words", [
    ({"gas": "argonne", "pressure": 1.0}, ["[medium] gas = 'argonne'", "'air'"]),
    ({"gas": "air"}, ["[medium] pressure is missing", "(Pa)"]),
    ({"gas": "air", "pressure": -3.0}, ["[medium] pressure = -3.0", "> 0", "(Pa)"]),
    ({"pressure": 100.0}, ["[medium] pressure needs [medium] gas"]),
    ({"gas": "air", "pressure": 1e5, "slip": "epstein"}, ["slip = 'epstein'", "Knudsen number"]),
    ({"gas": "air", "pressure": 1.0, "slip": "stokes"}, ["[medium] slip = 'stokes'", "kim-2005"]),
    ({"gas": "air", "pressure": 1.0, "viscosity": "water"}, ["[medium] viscosity = 'water'", "(Pa s)"]),
    ({"gas": "nitrogen", "pressure": 1.0, "temperature": 77.0}, ["[medium] temperature = 77.0",
                                                                 "200 and 500 K", "viscosity"]),
])
def test_config_errors_name_key_value_expectation(medium, words):
    with pytest.raises(ConfigError) as exc:
        config.load(gas_config(**medium))
    text = str(exc.value)
    for w in words:
        assert w in text, text
