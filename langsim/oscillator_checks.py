"""Check rows for oscillators, cold damping and the quantum limit.

:func:`extend` is called at the end of :func:`langsim.checks.check` with the
report built so far. It adds

- effective-temperature rows for axes under cold damping (three estimators of
  :class:`~langsim.analysis.EffectiveTemperature`, for information: the
  variance, velocity-variance and spectrum rows above already test the same
  data against predictions at T gamma/(gamma + gamma_fb));
- for modes whose hbar omega/kT is not small, the quantum (Planck) value of
  each variance beside the classical one (information; the simulation is
  classical);
- for circuits, the capacitor-voltage noise density at a few frequencies,
  measured with ``scipy.signal.welch`` (an outside spectral estimate) and
  compared with the exact expectation of that estimate for the recorded
  process: the resistor's Johnson noise 4 kT R filtered by the circuit,
  sampled by the scheme at its step (the continuous formula is shown beside);

and finally renames the rows of an ``[oscillator]`` run into its own terms
(angle variance in rad^2, capacitor voltage variance kT/C in V^2, current
variance kT/L in A^2, torsion constant or capacitance from the spectrum, ...).
"""
import math

import numpy as np

from . import theory
from .analysis import EffectiveTemperature
from .analysis.stats import FrameSource
from .checks import AXES, Row, _row, _segment     # checks imports this module only inside check()
from .oscillators import KINDS, QUANTUM_WARN
from .units import k_B

__all__ = ["extend", "expected_welch", "recorded_autocovariance"]

#: Replicas (particles x time blocks) behind the standard error of a Welch estimate.
WELCH_REPLICAS = 16
#: Relative half width of the band of Welch bins averaged around each frequency.
WELCH_BAND = 0.1
SRC_JOHNSON = ("Johnson 1928 and Nyquist 1928, Phys. Rev. 32; circuit as Langevin equation "
               "(reference sheet sections 9, 17); estimate scipy.signal.welch")
SRC_PLANCK = "Planck mean energy with zero point (Callen & Welton 1951, Phys. Rev. 83, 34; from memory)"
SRC_COLD = "cold damping: fluctuation-dissipation with noiseless feedback damping (common practice)"


def extend(report, traj, s, start, kw):
    """Add the rows of this module to ``report`` (see the module docstring)."""
    cfg = traj.config
    osc = cfg.get("oscillator")
    harmonic = [a for a in range(s.d) if s.axis_kind(a) == "harmonic"]
    for a in harmonic:
        if s.feedback[a] > 0 and s.regime == "underdamped":
            _temperature_rows(report, traj, s, a, start)
    _quantum_rows(report, s, harmonic)
    if osc and osc["kind"] == "circuit" and harmonic:
        _circuit_rows(report, traj, s, start, osc, kw)
    if osc:
        relabel(report, osc, s.kT, kw.get("z_threshold", 4.5))


# --------------------------------------------------------------- cold damping
def _temperature_rows(report, traj, s, a, start):
    T = s.kT / k_B
    T_eff = theory.cold_damping_temperature(T, s.thermal_friction[a], s.feedback[a])
    k, m, g = s.kappa[a], s.mass, s.friction[a]
    note = f"T = {T:.6g} K, friction {s.thermal_friction[a]:.4g}, feedback {s.feedback[a]:.4g} kg/s"
    form = "T gamma/(gamma + gamma_fb)"
    pos = EffectiveTemperature("position", stiffness=k, axis=a, start=start).fit(traj.positions)
    report.rows.append(_row(f"effective temperature {AXES[a]} (position variance)", pos.temperature_,
                            pos.temperature_err_, T_eff, form + "; kappa <x^2>/k_B (BAOAB positions exact)",
                            SRC_COLD, "K", info=True, note=note + "; same data as the variance row"))
    vel = getattr(traj, "velocities", None)
    if vel is not None:
        v = EffectiveTemperature("velocity", mass=m, axis=a, start=start).fit(vel)
        corr = 1.0 - k / m * s.dt ** 2 / 4.0
        report.rows.append(_row(f"effective temperature {AXES[a]} (velocity variance)", v.temperature_,
                                v.temperature_err_, T_eff * corr,
                                form + " x (1 - w0^2 dt^2/4) (BAOAB full-step velocities); m <v^2>/k_B",
                                SRC_COLD, "K", info=True, note="same data as the velocity variance row"))
    f0, Q = math.sqrt(k / m) / (2 * math.pi), math.sqrt(k * m) / g
    n = FrameSource(traj.positions).n_frames - start
    ring_f = Q / (math.pi * f0) / s.frame_dt
    if 2.0 * f0 * s.frame_dt > 0.5:
        return
    N = _segment(report, a, n, ring_f, 256)
    if N is None:
        return
    sp = EffectiveTemperature("spectrum", friction=g, dt=s.frame_dt, scheme="baoab", step_dt=s.dt,
                              every=s.every, segment_length=N, f_max=2.0 * f0, axis=a, start=start,
                              guess=(f0, Q)).fit(traj.positions)
    report.rows.append(_row(f"effective temperature {AXES[a]} (spectrum)", sp.temperature_, sp.temperature_err_,
                            T_eff, form + "; <x^2> 2 pi f0 Q (gamma + gamma_fb)/k_B from the ML fit of BAOAB's "
                            "spectrum up to 2 f0 (broadened, lowered peak)", SRC_COLD, "K", info=True, note=note))


# --------------------------------------------------------------- quantum limit
def _quantum_rows(report, s, harmonic):
    measured = {r.quantity: r for r in report.rows}
    for a in harmonic:
        under = s.regime == "underdamped"
        omega = math.sqrt(s.kappa[a] / s.mass) if under else s.kappa[a] / s.friction[a]
        kT = s.kT_axis[a]
        x = theory.quantum_ratio(omega, kT)
        if x < QUANTUM_WARN:
            continue
        full, thermal = (float(v) for v in theory.planck_energy_ratio(x))
        what = f"hbar omega/kT = {x:.3g} ({'resonance' if under else 'relaxation rate'} {omega:.4g} rad/s)"
        pairs = [(f"variance {AXES[a]}", s.kappa[a], "m^2")]
        if under:
            pairs.append((f"velocity variance {AXES[a]}", s.mass, "m^2/s^2"))
        for name, stiff, unit in pairs:
            row = measured.get(name)
            quantum = full * kT / stiff
            report.rows.append(Row(f"{name}, quantum", None if row is None else row.measured,
                                   None if row is None else row.error, quantum, None, "info",
                                   f"Planck hbar w (1/2 + 1/(e^x - 1)) = {full:.6g} kT (thermal part alone "
                                   f"{thermal:.6g} kT) in place of kT (the classical row: {name})", SRC_PLANCK,
                                   unit, what + "; the simulation is classical"))


# --------------------------------------------------------------- circuits
def recorded_autocovariance(s, a, n_lags):
    """Exact autocovariance of the recorded coordinate on axis ``a`` at frame lags 0..n_lags-1."""
    k, g, kT = s.kappa[a], s.friction[a], s.kT_axis[a]
    if s.regime == "overdamped":
        return theory.scheme_position_autocovariance(s.scheme, np.arange(n_lags), kT, k, g, s.dt, s.every)
    A = np.linalg.matrix_power(theory.baoab_transition_matrix(k, s.mass, g, s.dt), s.every)
    lam, V = np.linalg.eig(A)
    coef = V[0, :] * np.linalg.inv(V)[:, 0]
    j = np.arange(n_lags)
    return (kT / k) * np.real((coef[None, :] * lam[None, :] ** j[:, None]).sum(axis=1))


def expected_welch(acov, frame_dt, nperseg, window="hann"):
    """Exact expectation of ``scipy.signal.welch`` (density, one-sided, no detrending) of a
    stationary series with autocovariance ``acov`` (lags 0..nperseg-1), at rfft frequencies.

    E|sum_n w_n x_n e^{-iwn}|^2 = sum_j g_|j| W_|j| e^{-iwj}, W_j = sum_n w_n w_{n+j};
    welch scales by frame_dt/sum(w^2) and doubles bins other than 0 and Nyquist (derived).
    """
    from scipy import signal
    w = signal.get_window(window, nperseg)
    spec = np.fft.rfft(w, 2 * nperseg)
    W = np.fft.irfft(spec * spec.conj(), 2 * nperseg)[:nperseg]       # sum_n w_n w_{n+j}, j >= 0
    h = np.asarray(acov[:nperseg], dtype=float) * W
    S = 2.0 * np.fft.rfft(h).real - h[0]
    S *= frame_dt / np.sum(w * w)
    S[1:] *= 2.0
    if nperseg % 2 == 0:
        S[-1] /= 2.0
    return S


def _circuit_rows(report, traj, s, start, osc, kw):
    from scipy import signal
    C, R, L = osc["capacitance"], osc["resistance"], osc["inductance"] or 0.0
    kT, T = s.kT_axis[0], s.frame_dt
    tau_f = (R * C if L == 0 else 2.0 * L / R) / T          # correlation (ring-down) time in frames
    src = FrameSource(traj.positions, axis=0)
    n, n_part = src.n_frames - start, src.n_particles
    if L == 0:
        f_ref, marks = 1.0 / (2 * math.pi * R * C), ((0.25, "f_c/4"), (1.0, "f_c"), (4.0, "4 f_c"))
    else:
        f_ref, marks = 1.0 / (2 * math.pi * math.sqrt(L * C)), ((0.5, "f0/2"), (1.0, "f0"), (2.0, "2 f0"))
    # segments of >= 64 correlation times (window smoothing negligible beside the statistics),
    # and >= 3 bins in the band around the lowest frequency
    need = max(64.0 * tau_f, 3.0 / (2.0 * WELCH_BAND * marks[0][0] * f_ref * T))
    nperseg = 1 << max(8, int(math.ceil(math.log2(need))))
    per_particle = max(1, int(math.ceil(WELCH_REPLICAS / n_part)))
    block = n // per_particle
    if block < 4 * nperseg:
        report.notes.append(f"voltage noise density skipped: {n} frames x {n_part} particle(s) are fewer "
                            f"than {WELCH_REPLICAS} replicas of {4 * nperseg} frames (4 Welch segments of "
                            f"64 correlation times)")
        return
    x = src.read(start, start + per_particle * block)[:, :, 0] / C      # capacitor voltage, V
    reps = x.reshape(per_particle, block, n_part).transpose(0, 2, 1).reshape(-1, block)
    f, P = signal.welch(reps, fs=1.0 / T, window="hann", nperseg=nperseg, noverlap=nperseg // 2,
                        detrend=False, axis=-1)
    expect = expected_welch(recorded_autocovariance(s, 0, nperseg), T, nperseg) / C ** 2
    circuit = "R C" if L == 0 else "R L C"
    for factor, label in marks:
        fc = factor * f_ref
        band = (f >= fc * (1 - WELCH_BAND)) & (f <= fc * (1 + WELCH_BAND))
        if fc > 0.4 / T or band.sum() < 3:
            report.notes.append(f"voltage noise density at {label}: outside the resolved band; skipped")
            continue
        per = P[:, band].mean(axis=1)
        meas, err = float(per.mean()), float(per.std(ddof=1) / math.sqrt(per.size))
        pred = float(expect[band].mean())
        cont = float(theory.circuit_voltage_psd(f[band], kT, R, C, L).mean())
        report.rows.append(_row(
            f"voltage noise density at {label}", meas, err, pred,
            f"4kTR/|1 - w^2 LC + i w RC|^2 ({circuit}), exact expectation of welch (Hann, {nperseg} frames, "
            f"half overlap) for the {s.scheme} process recorded every {s.every} step(s); band "
            f"{fc * (1 - WELCH_BAND):.4g}-{fc * (1 + WELCH_BAND):.4g} Hz",
            SRC_JOHNSON, "V^2/Hz", note=f"continuous circuit {cont:.6g} ({cont / pred - 1:+.2%}); "
            f"{per.size} replicas", **kw))


# --------------------------------------------------------------- own terms
def _squared(unit):
    """"rad/s" -> "rad^2/s^2"."""
    return "/".join(part + "^2" for part in unit.split("/"))


def _names(osc):
    """Generic row name (axis x) -> (name, unit, kind of transform, formula in own terms)."""
    kind = KINDS[osc["kind"]]
    if kind.name == "circuit":
        C = osc["capacitance"]
        return {
            "variance x": ("capacitor voltage variance", "V^2", ("scale", 1.0 / C**2), "<V_C^2> = kT/C (kT/C noise)"),
            "mean x": ("mean capacitor voltage", "V", ("scale", 1.0 / C), "no bias: 0"),
            "velocity variance x": ("current variance", "A^2", None, "<I^2> = kT/L"),
            "stiffness x (PSD)": ("capacitance (PSD)", "F", ("inverse", 1.0), "C = <q^2>/kT"),
            "diffusion coefficient x (PSD)": ("resistance (PSD)", "ohm", ("inverse", "kT"), "R = kT/D"),
            "corner frequency x": ("corner frequency", "Hz", None, "1/(2 pi R C)"),
            "resonance frequency x": ("resonance frequency", "Hz", None, "1/(2 pi sqrt(L C))"),
            "quality factor x": ("quality factor", "", None, "sqrt(L/C)/R"),
            "variance x, quantum": ("capacitor voltage variance, quantum", "V^2", ("scale", 1.0 / C**2), ""),
            "velocity variance x, quantum": ("current variance, quantum", "A^2", None, ""),
        }
    u = kind.units
    i, k, g = kind.inertia.replace("_", " "), kind.stiffness.replace("_", " "), kind.damping
    coord, vel = kind.coordinate, kind.velocity
    sq = "" if u["positions"] == "m" else f" in {u['positions']}^2"
    return {
        "variance x": (f"{coord} variance", _squared(u["positions"]), None, f"kT/({k}){sq}"),
        "mean x": (f"mean {coord}", u["positions"], None, ""),
        "velocity variance x": (f"{vel} variance", _squared(u["velocities"]), None, f"kT/({i})"),
        "stiffness x (PSD)": (f"{k} (PSD)", u[kind.stiffness], None, ""),
        "diffusion coefficient x (PSD)": (f"{g} (PSD)", u[kind.damping], ("inverse", "kT"), f"{g} = kT/D"),
        "corner frequency x": ("corner frequency", "Hz", None, ""),
        "resonance frequency x": ("resonance frequency", "Hz", None, f"sqrt({k}/{i})/(2 pi)"),
        "quality factor x": ("quality factor", "", None, f"sqrt({i} {k})/{g}"),
        "variance x, quantum": (f"{coord} variance, quantum", _squared(u["positions"]), None, ""),
        "velocity variance x, quantum": (f"{vel} variance, quantum", _squared(u["velocities"]), None, ""),
    }


def relabel(report, osc, kT, z_threshold=4.5):
    """Rename the rows of a 1D oscillator run into its own quantities and units (in place).

    A row whose value is a reciprocal in the oscillator's terms (capacitance
    from the fitted 1/C, resistance from the fitted D = kT/R) is transformed
    with its error (delta method) and its z and status recomputed.
    """
    names = _names(osc)
    for r in report.rows:
        key = r.quantity
        if key.startswith("effective temperature x"):
            r.quantity = key.replace("effective temperature x", "effective temperature")
            continue
        if key not in names:
            continue
        name, unit, how, formula = names[key]
        r.quantity, r.unit = name, unit
        if formula:
            r.formula = f"{formula}; {r.formula}"
        if how is None or r.predicted is None:
            continue
        kind, c = how
        c = kT if c == "kT" else c
        if kind == "scale":
            r.measured = None if r.measured is None else r.measured * c
            r.error = None if r.error is None else r.error * c
            r.predicted *= c
        else:
            m, e = r.measured, r.error
            r.measured, r.predicted = c / m, c / r.predicted
            r.error = None if e is None else c * e / m**2
            if r.error:
                r.z = (r.measured - r.predicted) / r.error
                if r.status in ("pass", "fail"):
                    r.status = "pass" if abs(r.z) <= z_threshold else "fail"
