"""Oscillators in their own quantities: mapping, units, equipartition, circuits' Johnson noise.

Outside references (reference sheet /work/shared/reference/check-values.md, with the
original sources it names):
- section 5 (cantilever k = 0.1 N/m, f0 = 10 kHz, Q = 10: m_eff, gamma);
- section 6 (BAOAB, Leimkuhler & Matthews 2013, AMRX: <q^2> = kT/k exactly, full-step
  <p^2>/(m kT) = 1 - h^2 w0^2/4);
- section 9 and 17 (Johnson 1928, Nyquist 1928, Phys. Rev. 32: <V_C^2> = kT/C,
  <I^2> = kT/L, S_V = 4kTR filtered by the circuit; table of S_VC at R = 1 kohm,
  C = 1 nF, L = 1 mH, 300 K);
- section 10 (torsion: <theta^2> = kT/kappa; MEMS resonator I = 1e-18 kg m^2, f0 = 10 kHz);
- scipy.signal.welch as the outside spectral estimate.
Statistics: copies are independent replicas (conftest.replica_mean); bound Z_MAX.
"""
import copy
import math
import warnings

import numpy as np
import pytest
from scipy import signal

import langsim
from langsim import cli, config, theory
from langsim.analysis import EffectiveTemperature
from langsim.checks import check
from langsim.oscillator_checks import expected_welch
from langsim.units import k_B
from langsim.validation import ConfigError

from conftest import Z_MAX, replica_mean, z_score


def rel(a, b):
    return abs(a / b - 1.0)


def osc_config(oscillator, dt, steps, every=1, T=300.0, seed=7):
    return {"seed": seed, "oscillator": oscillator, "medium": {"temperature": T},
            "dynamics": {"dt": dt, "steps": steps}, "output": {"every": every}}


def rows(report):
    return {r.quantity: r for r in report.rows}


def failed(report):
    return {r.quantity for r in report.rows if r.status == "fail"}


def with_config(traj, change):
    """The trajectory with a changed (wrong) resolved config."""
    bad = copy.deepcopy(traj.config)
    change(bad)
    t = copy.copy(traj)
    t.config = bad
    return t


# ------------------------------------------------------------------ mapping
def test_mechanical_mode_from_f0_q_and_k_matches_reference_sheet():
    # section 5: k = 0.1 N/m, f0 = 10 kHz, Q = 10 -> m_eff = 2.53303e-11 kg, gamma = 1.59155e-7 kg/s
    spec = config.load(osc_config({"kind": "mechanical", "stiffness": 0.1, "resonance_frequency": 1e4,
                                   "quality_factor": 10}, 1e-6, 10))
    assert rel(spec.particles.mass, 2.53303e-11) < 2e-6 and rel(spec.particles.friction[0], 1.59155e-7) < 2e-6
    assert spec.dynamics.regime == "underdamped" and spec.units == {"positions": "m", "velocities": "m/s"}
    osc = spec.resolved["oscillator"]
    assert osc["kind"] == "mechanical" and osc["mass"] == spec.particles.mass
    assert osc["as_particle"]["stiffness"] == 0.1 and spec.resolved["potential"][0]["stiffness"] == [0.1]
    # the same mode given by mass and friction
    same = config.load(osc_config({"kind": "mechanical", "mass": spec.particles.mass, "stiffness": 0.1,
                                   "friction": spec.particles.friction[0]}, 1e-6, 10))
    assert rel(same.resolved["oscillator"]["quality_factor"], 10.0) < 1e-12


def test_torsional_and_circuit_mapping_and_units():
    # section 10: I = 1e-18 kg m^2, f0 = 10 kHz -> kappa = 3.94784e-9 N m/rad
    tor = config.load(osc_config({"kind": "torsional", "moment_of_inertia": 1e-18, "resonance_frequency": 1e4,
                                  "damping": 1e-15}, 1e-6, 10))
    assert rel(tor.resolved["oscillator"]["torsion_constant"], 3.94784e-9) < 2e-6
    assert tor.units == {"positions": "rad", "velocities": "rad/s"}
    # section 17: R = 1 kohm, C = 1 nF, L = 1 mH -> f0 = 1.591549e5 Hz, Q = 1
    rlc = config.load(osc_config({"kind": "circuit", "resistance": 1e3, "capacitance": 1e-9,
                                  "inductance": 1e-3}, 1e-8, 10))
    o = rlc.resolved["oscillator"]
    assert rel(o["resonance_frequency"], 1.591549e5) < 1e-6 and rel(o["quality_factor"], 1.0) < 1e-12
    assert rlc.particles.mass == 1e-3 and rlc.particles.friction[0] == 1e3 and rel(rlc.curvature()[0], 1e9) < 1e-15
    assert rlc.units == {"positions": "C", "velocities": "A"}
    rc = config.load(osc_config({"kind": "circuit", "resistance": 1e3, "capacitance": 1e-9}, 1e-8, 10))
    assert rc.dynamics.regime == "overdamped" and rel(rc.resolved["oscillator"]["time_constant"], 1e-6) < 1e-15


@pytest.mark.parametrize("osc, words", [
    ({"kind": "mechanical", "mass": 1e-11, "stiffness": 0.1, "resonance_frequency": 1e4, "friction": 1e-7},
     ["mass = 1e-11", "stiffness = 0.1", "resonance_frequency = 10000.0", "contradictory"]),
    ({"kind": "torsional", "moment_of_inertia": 1e-18, "torsion_constant": 1e-9, "resonance_frequency": 1e3,
      "damping": 1e-15}, ["moment_of_inertia = 1e-18", "torsion_constant = 1e-09", "resonance_frequency",
                          "contradictory"]),
    ({"kind": "mechanical", "stiffness": 0.1, "resonance_frequency": 1e4, "quality_factor": 10,
      "friction": 1e-6}, ["friction = 1e-06", "quality_factor = 10", "contradictory"]),
    ({"kind": "mechanical", "mass": 1e-11, "friction": 1e-7}, ["stiffness", "resonance_frequency", "missing"]),
    ({"kind": "mechanical", "stiffness": 0.1, "quality_factor": 10}, ["quality_factor = 10", "inertia"]),
    ({"kind": "circuit", "capacitance": 1e-9}, ["[oscillator] resistance is missing", "(ohm)"]),
    ({"kind": "circuit", "resistance": -1.0, "capacitance": 1e-9}, ["[oscillator] resistance = -1.0", "(ohm)"]),
    ({"kind": "circuit", "resistance": 1.0, "capacitance": 1e-9, "feedback": 1.0}, ["feedback = 1.0", "inertia"]),
    ({"kind": "pendulum", "mass": 1.0}, ["[oscillator] kind = 'pendulum'", "'torsional'"]),
    ({"kind": "torsional", "moment_of_inertia": 1e-18, "resonance_frequency": 1e4, "damping": 1e-15,
      "torsion": 1.0}, ["[oscillator] torsion: unknown key", "did you mean"]),
    ({"kind": "torsional", "moment_of_inertia": 1e-18, "resonance_frequency": 1e4, "damping": 1e-15,
      "initial": [1.0, 2.0]}, ["[oscillator] initial", "count = 1", "(rad)"]),
])
def test_oscillator_errors_name_key_value_expectation(osc, words):
    with pytest.raises(ConfigError) as exc:
        config.load(osc_config(osc, 1e-8, 10))
    for w in words:
        assert w in str(exc.value), str(exc.value)


def test_oscillator_refuses_particles_potential_and_other_regime():
    cfg = osc_config({"kind": "circuit", "resistance": 1e3, "capacitance": 1e-9}, 1e-8, 10)
    cfg["particles"] = {"radius": 1e-6}
    cfg["potential"] = [{"type": "harmonic", "stiffness": 1.0}]
    cfg["dynamics"]["regime"] = "underdamped"
    with pytest.raises(ConfigError) as exc:
        config.load(cfg)
    text = str(exc.value)
    assert "[particles] given with [oscillator]" in text and "[[potential]] given with [oscillator]" in text
    assert "[dynamics] regime = 'underdamped': expected 'overdamped'" in text


# ------------------------------------------------------------- equipartition
@pytest.fixture(scope="module")
def torsion_run():
    # a torsional mode at a coarse step, h w0 = 1.0: BAOAB's full-step velocity variance is then
    # 25 % below kT/I (section 6), its angle variance still exactly kT/kappa
    I, f0 = 1e-18, 1e4
    dt = 1.0 / (2 * math.pi * f0)
    cfg = osc_config({"kind": "torsional", "moment_of_inertia": I, "resonance_frequency": f0, "quality_factor": 5,
                      "count": 64}, dt, 40000)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")     # the coarse step is meant
        return langsim.run(cfg, progress=False)


def test_torsional_equipartition_in_rad_and_baoab_velocity_variance(torsion_run):
    traj = torsion_run
    assert traj.units == {"positions": "rad", "velocities": "rad/s"}
    osc, kT = traj.config["oscillator"], k_B * 300.0
    kappa, I = osc["torsion_constant"], osc["moment_of_inertia"]
    start = 2000
    th2, th2_err = replica_mean((np.asarray(traj.positions[start:, :, 0]) ** 2).mean(axis=0))
    w2, w2_err = replica_mean((np.asarray(traj.velocities[start:, :, 0]) ** 2).mean(axis=0))
    h_w0 = traj.config["dynamics"]["dt"] * math.sqrt(kappa / I)
    assert abs(z_score(th2, th2_err, kT / kappa)) < Z_MAX                            # section 10 / 6
    assert abs(z_score(w2, w2_err, kT / I * (1 - h_w0**2 / 4))) < Z_MAX               # section 6
    assert abs(z_score(w2, w2_err, kT / I)) > Z_MAX        # fails against the continuous kT/I
    rep = check(traj)
    r = rows(rep)
    assert rep.passed, rep.format_table()
    assert r["angle variance"].unit == "rad^2" and r["angular velocity variance"].unit == "rad^2/s^2"
    assert {"resonance frequency", "quality factor", "torsion constant (PSD)"} <= set(r)
    assert "kT/(torsion constant)" in r["angle variance"].formula
    hot = with_config(traj, lambda c: c["medium"].update(temperature=330.0))
    assert {"angle variance", "angular velocity variance"} <= failed(check(hot))


def test_info_speaks_in_the_oscillators_terms(tmp_path, capsys):
    cfg = osc_config({"kind": "torsional", "moment_of_inertia": 1e-18, "resonance_frequency": 1e4,
                      "quality_factor": 20, "feedback": 1e-15}, 1e-6, 100)
    langsim.run(cfg, tmp_path / "mirror.h5", progress=False).close()
    assert cli.main(["info", str(tmp_path / "mirror.h5")]) == 0
    out = capsys.readouterr().out
    assert "oscillator   torsional, 1 independent copy: moment of inertia 1e-18 kg m^2" in out
    assert "resonance frequency 10000 Hz, quality factor 20" in out and "angle in rad" in out
    assert "cold damping: feedback 1e-15 N m s/rad, effective temperature" in out
    assert "particles " not in out and "potential " not in out


def test_mechanical_mode_from_file_keeps_units(tmp_path):
    cfg = osc_config({"kind": "mechanical", "stiffness": 0.1, "resonance_frequency": 1e4, "quality_factor": 10,
                      "count": 16}, 1e-6, 40000, every=5, T=295.0)
    traj = langsim.run(cfg, tmp_path / "mode.h5", progress=False)
    assert traj._file["positions"].attrs["units"] == "m" and traj.units["velocities"] == "m/s"
    x2, err = replica_mean((np.asarray(traj.positions[1000:, :, 0]) ** 2).mean(axis=0))
    assert abs(z_score(x2, err, k_B * 295.0 / 0.1)) < Z_MAX    # section 5: z_rms^2 = kT/k
    r = rows(check(traj))
    assert r["displacement variance"].status == "pass" and r["velocity variance"].unit == "m^2/s^2"
    traj.close()
    with langsim.load(tmp_path / "mode.h5") as back:
        assert back.units == {"positions": "m", "velocities": "m/s"}


# ------------------------------------------------------------------ circuits
R_SHEET, C_SHEET, L_SHEET, T_SHEET = 1e3, 1e-9, 1e-3, 300.0
DT_RC = 2.5e-9


def test_circuit_spectra_against_reference_sheet():
    kT = k_B * T_SHEET
    f = np.array([1e2, 1e4, 1.0 / (2 * math.pi * math.sqrt(L_SHEET * C_SHEET)), 1e6, 1e7])
    rlc = theory.circuit_voltage_psd(f, kT, R_SHEET, C_SHEET, L_SHEET)
    np.testing.assert_allclose(rlc, [1.656779e-17, 1.663319e-17, 1.656779e-17, 1.089938e-20, 1.063298e-24],
                               rtol=2e-6)                                      # section 17 table, S_VC RLC
    rc = theory.circuit_voltage_psd(f, kT, R_SHEET, C_SHEET)
    np.testing.assert_allclose(rc, [1.656778e-17, 1.650264e-17, 8.283894e-18, 4.092993e-19, 4.195607e-21],
                               rtol=2e-6)                                      # section 17 table, S_VC RC
    # integral kT/C (section 9), independent of R
    from scipy import integrate
    fc = 1 / (2 * math.pi * 50.0 * C_SHEET)
    total = fc * integrate.quad(lambda u: theory.circuit_voltage_psd(u * fc, kT, 50.0, C_SHEET), 0, np.inf)[0]
    assert rel(total, kT / C_SHEET) < 1e-7 and rel(total, 4.141947e-12) < 2e-6


@pytest.fixture(scope="module")
def rc_run():
    # the section 17 RC circuit (1 kohm, 1 nF, RC = 1 us), Euler-Maruyama at dt = RC/400, 40 MHz frames
    cfg = osc_config({"kind": "circuit", "resistance": R_SHEET, "capacitance": C_SHEET, "count": 16},
                     DT_RC, 10 * 140000, every=10, T=T_SHEET)
    return langsim.run(cfg, progress=False)


def test_rc_kT_over_C_and_johnson_density_against_welch(rc_run):
    traj = rc_run
    kT, dt = k_B * T_SHEET, DT_RC
    r_dt = dt / (R_SHEET * C_SHEET)
    V = np.asarray(traj.positions[200:, :, 0]) / C_SHEET
    v2, v2_err = replica_mean((V ** 2).mean(axis=0))
    # kT/C noise (section 9), at Euler-Maruyama's exact finite step (kT/C)/(1 - dt/2RC) (section 6)
    assert abs(z_score(v2, v2_err, kT / C_SHEET / (1 - r_dt / 2))) < Z_MAX
    assert abs(z_score(v2, v2_err, kT / C_SHEET / 2)) > Z_MAX     # a 4kTR-correlated source would give 2kT/C
    # scipy.signal.welch per copy, against 4kTR/(1 + (w RC)^2) (Johnson, Nyquist; section 17)
    frame = 10 * dt
    nperseg = 16384
    f, P = signal.welch(V.T, fs=1 / frame, nperseg=nperseg, detrend=False, axis=-1)
    fc = 1 / (2 * math.pi * R_SHEET * C_SHEET)
    acov = theory.scheme_position_autocovariance("euler-maruyama", np.arange(nperseg), kT, 1 / C_SHEET,
                                                 R_SHEET, dt, 10)
    expected = expected_welch(acov, frame, nperseg) / C_SHEET**2
    for factor in (0.25, 1.0, 4.0):
        band = (f > factor * fc * 0.9) & (f < factor * fc * 1.1)
        per = P[:, band].mean(axis=1)
        m, e = per.mean(), per.std(ddof=1) / math.sqrt(per.size)
        cont = theory.circuit_voltage_psd(f[band], kT, R_SHEET, C_SHEET).mean()
        # the exact Welch expectation for the recorded Euler-Maruyama process (finite step, aliasing, Hann
        # window) differs from the continuous circuit by less than half the standard error here (a bias of
        # 0.5 SE leaves the false-fail rate at |z| > 4.5 negligible), so the continuous 4kTR formula is a
        # fair prediction at this resolution
        exact = expected[band].mean()
        assert abs(exact - cont) < e / 2, (factor, exact, cont, e)
        assert abs(z_score(m, e, cont)) < Z_MAX, factor
        if factor >= 1:          # resolved to 2-3 %: a 4kTR source 25 % off is seen
            assert abs(z_score(m, e, cont * 1.25)) > Z_MAX
    rep = check(traj)
    r = rows(rep)
    assert rep.passed, rep.format_table()
    assert {"capacitor voltage variance", "corner frequency", "resistance (PSD)",
            "voltage noise density at f_c"} <= set(r)
    assert r["capacitor voltage variance"].unit == "V^2" and r["voltage noise density at f_c"].unit == "V^2/Hz"
    wrong = with_config(traj, lambda c: (c["particles"].update(friction=[2e3]),
                                         c["oscillator"].update(resistance=2e3)))
    assert {"voltage noise density at f_c", "resistance (PSD)"} <= failed(check(wrong))
    # the temperature from the spectrum with the known resistance: kT = D R (overdamped, EM model)
    est = EffectiveTemperature("spectrum", friction=R_SHEET, dt=10 * dt, regime="overdamped",
                               scheme="euler-maruyama", step_dt=dt, every=10, segment_length=8192,
                               start=200).fit(traj.positions)
    assert abs(z_score(est.temperature_, est.temperature_err_, T_SHEET)) < Z_MAX
    assert abs(z_score(est.temperature_, est.temperature_err_, 1.1 * T_SHEET)) > Z_MAX


def test_rlc_resonance_and_current_variance():
    # our own RLC: R = 100 ohm, C = 1 nF, L = 1 mH -> f0 = 159.155 kHz, Q = 10
    R, C, L = 100.0, 1e-9, 1e-3
    cfg = osc_config({"kind": "circuit", "resistance": R, "capacitance": C, "inductance": L, "count": 16},
                     1e-7, 200000, every=2)
    traj = langsim.run(cfg, progress=False)
    kT, w0dt = k_B * 300.0, 1e-7 / math.sqrt(L * C)
    I2, I2_err = replica_mean((np.asarray(traj.velocities[1000:, :, 0]) ** 2).mean(axis=0))
    assert abs(z_score(I2, I2_err, kT / L * (1 - w0dt**2 / 4))) < Z_MAX      # kT/L (section 17), BAOAB step
    rep = check(traj)
    r = rows(rep)
    assert rep.passed, rep.format_table()
    f0 = 1 / (2 * math.pi * math.sqrt(L * C))
    assert r["resonance frequency"].predicted == pytest.approx(f0, rel=1e-12)
    assert r["quality factor"].predicted == pytest.approx(math.sqrt(L / C) / R, rel=1e-12)
    assert {"current variance", "capacitance (PSD)", "voltage noise density at f0"} <= set(r)
    wrong = with_config(traj, lambda c: (c["particles"].update(mass=1.2 * L),
                                         c["oscillator"].update(inductance=1.2 * L)))
    assert {"resonance frequency", "voltage noise density at f0"} <= failed(check(wrong))
