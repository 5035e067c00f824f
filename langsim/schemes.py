"""The scheme registry: one place that says what each stepping scheme is.

The config layer reads the names and defaults per regime, the engine reads the
step data (an overdamped noise rule, a splitting, or the exact linear
transition), and theory, analysis and checks read the exact harmonic
statistics each scheme samples at a finite step.

=====================  ==========================  ==============================================
name                   regimes                     what it samples exactly in a harmonic well
=====================  ==========================  ==============================================
euler-maruyama         overdamped                  variance (kT/kappa)/(1 - kappa dt/2 gamma)
leimkuhler-matthews    overdamped                  variance kT/kappa [1, 2]
baoab                  underdamped                 positions kT/kappa; full-step velocities
                                                   (kT/m)(1 - w0^2 dt^2/4) [1]
exact                  overdamped, underdamped     the continuous process itself (linear forces
                                                   only: harmonic terms, constant forces)
=====================  ==========================  ==============================================

References
----------
.. [1] B. Leimkuhler, C. Matthews, Appl. Math. Res. Express 2013(1), 34 (2013).
.. [2] B. Leimkuhler, C. Matthews, M. V. Tretyakov, Proc. R. Soc. A 470, 20140120 (2014).
"""
import math
from dataclasses import dataclass

import numpy as np

from . import theory


@dataclass(frozen=True)
class Scheme:
    """One stepping scheme.

    Attributes
    ----------
    name : str
        The config value of ``[dynamics] scheme``.
    regimes : tuple of str
        "overdamped" and/or "underdamped".
    kind : str
        "rule" (overdamped update with a noise rule), "splitting" (letters A, B,
        O) or "exact" (exact transition of the linear process).
    averaged_noise : bool
        Rule schemes: the noise of step n is (xi_n + xi_{n+1})/2 (Leimkuhler-Matthews).
    splitting : tuple of (letter, fraction)
        Splitting schemes: e.g. BAOAB = B 1/2, A 1/2, O 1, A 1/2, B 1/2.
    linear_only : bool
        Accepts only forces linear in the position (harmonic terms, constant forces).
    description : str
    """

    name: str
    regimes: tuple
    kind: str
    description: str
    averaged_noise: bool = False
    splitting: tuple = ()
    linear_only: bool = False

    # -- exact statistics in a harmonic well of stiffness k (the scheme at step dt)
    def position_variance(self, kT, stiffness, friction, dt, mass=None):
        """Stationary position variance, m^2."""
        if self.kind == "exact":
            return theory.equipartition_variance(kT, stiffness)
        if self.name == "baoab":
            if mass is None:
                raise ValueError("mass is required for scheme 'baoab', got None")
            return theory.baoab_position_variance(kT, stiffness, mass, dt)
        return theory.scheme_position_variance(self.name, kT, stiffness, friction, dt)

    def velocity_variance(self, kT, mass, dt, stiffness=0.0):
        """Stationary variance of the recorded (full-step) velocities, m^2/s^2."""
        if self.kind == "exact":
            return theory.velocity_variance(kT, mass)
        if self.name == "baoab":
            return theory.baoab_velocity_variance(kT, mass, dt, stiffness)
        raise ValueError(f"scheme {self.name!r} has no velocities")

    def position_autocovariance(self, lags, kT, stiffness, friction, dt, every=1, mass=None):
        """Autocovariance of the recorded positions at ``lags`` frames of ``every`` steps, m^2."""
        lags = np.asarray(lags, dtype=float)
        if self.name == "baoab":
            var = self.position_variance(kT, stiffness, friction, dt, mass)
            return var * theory.baoab_position_autocorrelation(lags * every, stiffness, mass, friction, dt)
        if self.kind == "exact" and mass is not None:
            return theory.oscillator_autocorrelation(lags * every * dt, kT, stiffness, mass, friction)
        return theory.scheme_position_autocovariance("exact" if self.kind == "exact" else self.name,
                                                     lags, kT, stiffness, friction, dt, every)


SCHEMES = {s.name: s for s in (
    Scheme("euler-maruyama", ("overdamped",), "rule",
           "Euler-Maruyama: x += (dt/gamma) F + sqrt(2 kT dt/gamma) xi_n"),
    Scheme("leimkuhler-matthews", ("overdamped",), "rule",
           "Leimkuhler-Matthews: the noise (xi_n + xi_{n+1})/2; samples kT/kappa exactly",
           averaged_noise=True),
    Scheme("baoab", ("underdamped",), "splitting",
           "BAOAB splitting: half kick, half drift, exact Ornstein-Uhlenbeck velocity, half drift, "
           "half kick",
           splitting=(("B", 0.5), ("A", 0.5), ("O", 1.0), ("A", 0.5), ("B", 0.5))),
    Scheme("exact", ("overdamped", "underdamped"), "exact",
           "exact transition of the Ornstein-Uhlenbeck process (harmonic and constant forces only): "
           "the recorded data are the continuous-time process at any step",
           linear_only=True),
)}

#: Default scheme of each regime.
DEFAULT = {"overdamped": "euler-maruyama", "underdamped": "baoab"}


def names(regime):
    """Scheme names of ``regime``, the default first."""
    rest = [s.name for s in SCHEMES.values() if regime in s.regimes and s.name != DEFAULT[regime]]
    return (DEFAULT[regime],) + tuple(rest)


def get(name):
    """The :class:`Scheme` called ``name`` (ValueError listing the valid ones otherwise)."""
    try:
        return SCHEMES[name]
    except KeyError:
        raise ValueError(f"scheme must be one of {', '.join(map(repr, SCHEMES))}, got {name!r}") from None


# ------------------------------------------------------------ the exact scheme
def _van_loan(A, B, C, h):
    """Top-right block of expm([[A, B], [0, C]] h) = int_0^h e^{A(h-s)} B e^{C s} ds."""
    from scipy.linalg import expm
    n, m = A.shape[0], C.shape[0]
    big = np.zeros((n + m, n + m), dtype=np.result_type(A, B, C))
    big[:n, :n], big[:n, n:], big[n:, n:] = A, B, C
    return expm(big * h)[:n, n:]


def linear_step(kT, stiffness, friction, dt, mass=None, feedback=0.0):
    """Exact one-step transition of the linear Langevin process on one axis.

    Overdamped (``mass`` None): dx = -(k/gamma) x dt + f(t)/gamma dt + sqrt(2 kT/gamma) dW;
    underdamped: dx = v dt, m dv = -k x dt - (gamma + gamma_fb) v dt + f(t) dt
    + sqrt(2 gamma kT) dW (velocity feedback gamma_fb adds damping, no noise).
    Over one step h the state z moves to e^{Ah} z + int_0^h e^{A(h-s)} b f(t+s) ds
    plus Gaussian noise of covariance Q = int_0^h e^{As} G G^T e^{A^T s} ds
    (the standard solution of a linear SDE; Q and the forcing integrals by Van
    Loan's block matrix exponential, C. F. Van Loan, IEEE Trans. Autom. Control
    23, 395 (1978)).

    Returns (M, L, b, I0, I1): M = e^{Ah}, L = Cholesky factor of Q (lower), the
    forcing vector b, and I0, I1 = int_0^h e^{A(h-s)} b (1, s) ds.
    """
    if mass is None:
        A = np.array([[-stiffness / friction]])
        b = np.array([[1.0 / friction]])
        G = np.array([[math.sqrt(2.0 * kT / friction)]])
    else:
        A = np.array([[0.0, 1.0], [-stiffness / mass, -(friction + feedback) / mass]])
        b = np.array([[0.0], [1.0 / mass]])
        G = np.array([[0.0], [math.sqrt(2.0 * friction * kT) / mass]])
    from scipy.linalg import expm
    M = expm(A * dt)
    I = _van_loan(A, np.hstack([b, np.zeros_like(b)]), np.array([[0.0, 1.0], [0.0, 0.0]]), dt)
    # Q = F22^T F12 with expm([[-A, G G^T], [0, A^T]] h) = [[., F12], [0, F22]]
    n = A.shape[0]
    big = np.zeros((2 * n, 2 * n))
    big[:n, :n], big[:n, n:], big[n:, n:] = -A, G @ G.T, A.T
    E = expm(big * dt)
    Q = E[n:, n:].T @ E[:n, n:]
    Q = 0.5 * (Q + Q.T)
    L = np.linalg.cholesky(Q) if n == 2 else np.sqrt(Q)
    return M, L, b, I[:, 0], I[:, 1]


def exact_tables(spec, terms):
    """Kernel data (kind, coef, letters) of the exact scheme for ``terms``.

    Per axis, the force is linear: -k x + sum_i k_i c_i(t) + F with trap
    centres c_i(t) = c_i + v_i t + A_i sin(w_i t + phi_i) (harmonic terms) and
    constant forces F. The forcing integrals over one step from t_n are
    a + b t_n + sum_o (p_o sin(w_o t_n + phi_o) + q_o cos(w_o t_n + phi_o)).
    """
    from . import potentials as _pot
    from .kernels import schemes as _k
    d = spec.particles.dimensions
    dt, kT = spec.dynamics.dt, spec.kT
    friction = np.array(spec.particles.friction, dtype=float)
    feedback = np.array(spec.particles.feedback or (0.0,) * d, dtype=float)
    under = spec.dynamics.regime == "underdamped"
    mass = float(spec.particles.mass) if under else None
    stiffness = np.zeros(d)
    alpha = np.zeros(d)         # constant part of the forcing, N
    beta = np.zeros(d)          # its rate of change, N/s
    waves = []                  # (omega, phase, amplitude per axis in N)
    for t in terms:
        if isinstance(t, _pot.Harmonic):
            k = np.array(t.stiffness, dtype=float)
            stiffness += k
            alpha += k * np.array(t.center)
            beta += k * np.array(t.velocity)
            amp = k * np.array(t.amplitude)
            if np.any(amp != 0):
                if t.frequency > 0:
                    waves.append((2.0 * math.pi * t.frequency, t.phase, amp))
                else:
                    alpha += amp * math.sin(t.phase)
        elif isinstance(t, _pot.ConstantForce):
            alpha += np.array(t.force, dtype=float)
        else:
            raise ValueError(f"scheme 'exact' takes harmonic and constant-force terms only, "
                             f"got {t.name!r}")
    coef = np.zeros((2 + len(waves), 8, d))
    for a in range(d):
        M, L, b, I0, I1 = linear_step(kT, stiffness[a], friction[a], dt, mass, feedback[a])
        if under:
            coef[0, 0:4, a] = M[0, 0], M[0, 1], M[1, 0], M[1, 1]
            coef[0, 4:7, a] = L[0, 0], L[1, 0], L[1, 1]
        else:
            coef[0, 0, a], coef[0, 4, a] = M[0, 0], L[0, 0]
        a_vec = alpha[a] * I0 + beta[a] * I1
        b_vec = beta[a] * I0
        coef[1, 0, a], coef[1, 1, a] = a_vec[0], b_vec[0]
        if under:
            coef[1, 2, a], coef[1, 3, a] = a_vec[1], b_vec[1]
        A = (np.array([[-stiffness[a] / friction[a]]]) if not under else
             np.array([[0.0, 1.0], [-stiffness[a] / mass, -(friction[a] + feedback[a]) / mass]]))
        for o, (omega, phase, amp) in enumerate(waves):
            J = _van_loan(A.astype(complex), b.astype(complex), np.array([[1j * omega]]), dt)[:, 0]
            coef[2 + o, 0, a], coef[2 + o, 1, a] = amp[a] * J[0].real, amp[a] * J[0].imag
            if under:
                coef[2 + o, 2, a], coef[2 + o, 3, a] = amp[a] * J[1].real, amp[a] * J[1].imag
            coef[2 + o, 4, 0], coef[2 + o, 5, 0] = omega, phase
    return (_k.EXACT_UD if under else _k.EXACT_OD), coef, np.zeros(0, dtype=np.int64)
