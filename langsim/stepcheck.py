"""What a finite time step does to a run: curvature of user terms, and fidelity of recorded data.

* :func:`user_curvature`: expression and function terms give the step guard
  and the default burn-in no curvature of their own; here it is measured
  numerically (central differences of the force with a step set by the local
  thermal length) at the start point and at the equilibrium point a short
  minimisation finds from there.
* :func:`fidelity`: for axes where the forces are linear (harmonic terms,
  constant forces) the recorded statistics of a scheme at its step are known
  exactly (:mod:`langsim.schemes`); they are compared with the continuous-time
  process that a calibration pipeline assumes: the position variance, the
  frame-to-frame relaxation (overdamped: the rate -ln rho(T)/T implied by the
  one-frame autocorrelation rho; underdamped: the one-frame autocorrelation
  itself) and the recorded velocity variance.
"""
import math

import numpy as np

from . import schemes as _registry
from . import theory

#: Relative difference from the continuous process above which a run warns.
FIDELITY_WARN = 0.01
#: Finite-difference step as a fraction of the local thermal length sqrt(kT/k).
_FD_FRACTION = 1e-3


def _user_force(terms, d):
    """force(x) -> (d,) array (N) and energy(x) -> J of the user terms (numpy, one point)."""
    from . import potentials as _pot
    pieces = []
    for t in terms:
        if isinstance(t, _pot.Expression):
            import sympy
            expr, coords, time = t.sympy_energy(d)
            grad = [sympy.diff(-expr, c) for c in coords]
            f_energy = sympy.lambdify(coords + [time], expr, "numpy")
            f_force = sympy.lambdify(coords + [time], grad, "numpy")
            pieces.append((lambda x, fe=f_energy: float(fe(*x, 0.0)),
                           lambda x, ff=f_force: np.array(ff(*x, 0.0), dtype=float)))
        elif isinstance(t, _pot.Function) and t.function is not None:
            def energy(x, fn=t.function):
                return float(fn(np.array(x, dtype=float), 0.0, np.zeros(d)))

            def force(x, fn=t.function):
                out = np.zeros(d)
                fn(np.array(x, dtype=float), 0.0, out)
                return out
            pieces.append((energy, force))
    if not pieces:
        return None

    def energy(x):
        return sum(e(x) for e, _ in pieces)

    def force(x):
        return sum((f(x) for _, f in pieces), np.zeros(d))
    return energy, force


def _curvature_at(force, x, kT, d):
    """Per-axis curvature -dF_a/dx_a at x by central differences, the step following the
    local thermal length (a few iterations). Non-finite results count as 0."""
    out = np.zeros(d)
    for a in range(d):
        h = 1e-8
        k = 0.0
        for _ in range(5):
            e = np.zeros(d)
            e[a] = h
            k = -(force(x + e)[a] - force(x - e)[a]) / (2.0 * h)
            if not math.isfinite(k) or k == 0.0:
                break
            h_new = min(max(_FD_FRACTION * math.sqrt(kT / abs(k)), 1e-15), 1e-2)
            if abs(h_new - h) < 0.1 * h:
                break
            h = h_new
        out[a] = k if math.isfinite(k) and k > 0 else 0.0
    return out


def user_curvature(terms, d, kT, start):
    """Largest curvature (N/m, per axis) of the user terms at ``start`` and at the energy
    minimum found from there (built-in terms included in the minimisation), or None."""
    from . import potentials as _pot
    user = _user_force(terms, d)
    if user is None:
        return None
    energy_u, force_u = user
    builtin = [t for t in terms if t.code is not None]
    codes, params = _pot.builtin_rows(builtin, d)

    def force(x):
        total = force_u(x)
        if builtin:
            from .kernels.forces import builtin_forces
            F = np.empty((1, d))
            builtin_forces(codes, params, x[None, :].copy(), 0.0, F, np.empty(1), False)
            total = total + F[0]
        return total

    def energy(x):
        total = energy_u(x)
        if builtin:
            from .kernels.forces import builtin_forces
            e = np.empty(1)
            builtin_forces(codes, params, x[None, :].copy(), 0.0, np.empty((1, d)), e, True)
            total += e[0]
        return total

    x0 = np.array(start, dtype=float)
    with np.errstate(all="ignore"):
        try:
            points = [x0]
            k0 = _curvature_at(force, x0, kT, d)
            scale = math.sqrt(kT / max(float(np.max(k0)), 1e-300)) if np.any(k0 > 0) else 1e-7
            from scipy import optimize
            res = optimize.minimize(lambda u: energy(x0 + u * scale) / kT, np.zeros(d),
                                    jac=lambda u: -force(x0 + u * scale) * scale / kT,
                                    method="BFGS", options={"maxiter": 200})
            if np.all(np.isfinite(res.x)) and math.isfinite(res.fun):
                points.append(x0 + res.x * scale)
            found = np.max([_curvature_at(force_u, p, kT, d) for p in points], axis=0)
        except (ArithmeticError, ValueError, TypeError, ZeroDivisionError):
            return None
    return found if np.any(found > 0) else None


# ------------------------------------------------------------------- fidelity
def linear_axes(spec):
    """{axis: stiffness} of the axes on which every term is harmonic or a constant force."""
    from . import potentials as _pot
    d = spec.particles.dimensions
    kappa = np.zeros(d)
    linear = np.ones(d, bool)
    for t in spec.terms:
        if isinstance(t, _pot.Harmonic):
            kappa += np.array(t.stiffness, dtype=float)
        elif isinstance(t, _pot.ConstantForce):
            continue
        elif isinstance(t, (_pot.DoubleWell, _pot.Periodic)):
            linear[t.axis] = False
            if isinstance(t, _pot.DoubleWell):
                kappa += np.where(np.arange(d) == t.axis, 0.0, np.array(t.stiffness, dtype=float))
        else:
            linear[:] = False
    return {a: float(kappa[a]) for a in range(d) if linear[a] and kappa[a] > 0}


def fidelity(spec, dt=None, every=None):
    """Relative differences of the recorded statistics from the continuous process, per linear axis.

    Returns {axis: {"variance": ..., "relaxation": ..., "velocity variance": ...}} (signed
    fractions; the keys present depend on the regime).
    """
    scheme = _registry.get(spec.dynamics.scheme)
    dt = spec.dynamics.dt if dt is None else dt
    every = spec.output.every if every is None else every
    if scheme.kind == "exact":
        return {}
    kT = spec.kT
    out = {}
    under = spec.dynamics.regime == "underdamped"
    mass = spec.particles.mass if under else None
    T = dt * every
    for a, k in linear_axes(spec).items():
        g = float(spec.particles.friction[a])
        try:
            var = scheme.position_variance(kT, k, g, dt, mass)
            rho = float(scheme.position_autocovariance([1], kT, k, g, dt, every, mass)[0]) / var
        except ValueError:
            continue        # unstable: the step guard says so
        res = {"variance": var / (kT / k) - 1.0}
        if under:
            rho_c = float(theory.oscillator_autocorrelation(T, kT, k, mass, g)) / (kT / k)
            res["relaxation"] = rho - rho_c
            if spec.output.velocities:
                res["velocity variance"] = scheme.velocity_variance(kT, mass, dt, k) / (kT / mass) - 1.0
        elif rho > 0:
            res["relaxation"] = math.log(rho) / (-k * T / g) - 1.0
        out[a] = res
    return out


def fidelity_warning(spec):
    """The warning text when a linear axis' recorded statistics are off by more than
    FIDELITY_WARN, with a suggested step (same frame interval, more steps per frame), or None."""
    found = fidelity(spec)
    worst = {a: max(abs(v) for v in r.values()) for a, r in found.items()}
    if not worst or max(worst.values()) <= FIDELITY_WARN:
        return None
    a = max(worst, key=worst.get)
    axis = "xyz"[a]
    dyn, every = spec.dynamics, spec.output.every
    parts = ", ".join(f"{name} {value:+.1%}" for name, value in found[a].items())
    factor, suggestion = 1, None
    for _ in range(20):
        factor *= 2
        trial = fidelity(spec, dt=dyn.dt / factor, every=every * factor).get(a, {})
        if trial and max(abs(v) for v in trial.values()) <= FIDELITY_WARN / 2:
            suggestion = (f"dt = {dyn.dt / factor:.3g} s ({every * factor} steps per frame, "
                          "the same frame interval)")
            break
    hint = f"use {suggestion}, or " if suggestion else "use "
    return (f"[dynamics] dt = {dyn.dt!r} s with {every} step(s) per frame: the recorded data are "
            f"the {dyn.scheme} process, not the continuous one; on axis {axis} they differ from "
            f"it by {parts} (a calibration fit of these data inherits these biases); for about "
            f"1 % {hint}scheme = 'exact' (exact for these linear forces)")
