"""``langsim check`` rows for runs with a wall term: heights and short-time diffusion.

* **Height histogram** along the wall's normal against the Boltzmann density
  exp(-U(z)/kT) of the terms on that axis (wall, gravity, a trap): the
  stationary density whatever the friction, provided the overdamped scheme adds
  the drift kT d(1/gamma)/dz (Ito; Lau & Lubensky 2007, PRE 76, 011123; the
  reference notes, section 18); Hotelling's T^2 over time blocks as for the
  double well.
* **Decay length** of the heights above the wall's range against kT/(m_b g)
  (the barometric law; with the temperature it gives k_B back, Perrin's
  sedimentation method, from memory in the reference notes section 11).
* **Short-time diffusion by height**: in equal-probability height bins, the
  mean squared displacement over one frame, <dx^2>/(2 tau), against the same
  average of its expectation at the starting height: 2 D(h) tau to first order,
  with D = kT/gamma0 times Faxen's factor along the wall and the closed form
  (Schaffer et al. 2007) along the normal, which is what the engine simulates;
  Brenner's exact value (1961) is shown beside it. The tau^2 term is included
  (derived from the scheme: exact for one Euler-Maruyama step, O(tau^3) left
  over otherwise; a row whose estimated remainder exceeds a quarter of its
  error is information only).
"""
import math

import numpy as np
from scipy import integrate

from . import units
from .analysis import BoltzmannTest, InsufficientDataError, equal_probability_edges
from .analysis.boltzmann import boltzmann_weights
from .analysis.near_wall import decay_length, increments_by_height
from .analysis.stats import FrameSource
from .kernels import walls as _walls

AXES = "xyz"
SRC_BOLTZMANN = "Boltzmann distribution with the Ito drift (Lau & Lubensky 2007); Hotelling 1931"
SRC_PERRIN = "barometric law kT/(m_b g); Perrin 1909 (from memory)"
SRC_D = "Faxen (Happel & Brenner 1965); Schaffer, Norrelykke & Howard 2007 closed form of Brenner 1961"
#: Energy of the wall (in kT) below which heights count as outside its range.
DECAY_CUT_KT = 1e-4
#: Height bins of the short-time diffusion rows.
D_BINS = 3
#: Points of the grid on which the expected squared displacements are tabulated.
GRID = 20001
#: Relaxation times of the heights discarded as transient.
TRANSIENT_RELAXATIONS = 10.0


class _Wall:
    """The resolved wall term with the 1D potential and diffusion along its normal."""

    def __init__(self, cfg, s):
        terms = cfg.get("potential") or []
        walls = [t for t in terms if t.get("type") == "wall"]
        self.n_walls = len(walls)
        w = walls[0]
        self.axis = a = int(w["axis"])
        self.side = 1.0 if w.get("side", "above") == "above" else -1.0
        self.position = float(w["position"])
        self.radius = float(w["radius"])
        self.strength = float(w["strength"])
        self.range = float(w["range"])
        self.hydrodynamic = bool(w.get("hydrodynamic"))
        self.kT = s.kT
        self.force = float(s.force[a])
        self.kappa = float(s.kappa[a])
        self.center = 0.0
        other = []
        kc = 0.0
        for t in terms:
            kind = t.get("type")
            if kind == "harmonic":
                k = np.broadcast_to(t["stiffness"], (s.d,))[a]
                kc += k * np.broadcast_to(t["center"], (s.d,))[a]
            elif kind not in ("wall", "gravity", "constant-force"):
                other.append(kind)
        self.trap_center = kc / self.kappa if self.kappa > 0 else 0.0
        self.other = other
        self.bulk = float(cfg["particles"].get("bulk_friction") or s.friction[a])
        self.friction = s.friction

    # ---------------------------------------------------------- potential
    def gap(self, z):
        return self.side * (np.asarray(z, dtype=float) - self.position) - self.radius

    def U(self, z):
        z = np.asarray(z, dtype=float)
        return (self.strength * np.exp(-self.gap(z) / self.range) - self.force * z
                + 0.5 * self.kappa * (z - self.trap_center) ** 2)

    def dU(self, z):
        z = np.asarray(z, dtype=float)
        return (-self.side * self.strength / self.range * np.exp(-self.gap(z) / self.range)
                - self.force + self.kappa * (z - self.trap_center))

    def support(self):
        """Heights holding the density: U within 40 kT of its minimum."""
        lo = self.position + self.side * (self.radius + self.range * math.log(self.strength / (60 * self.kT)))
        reach = 60 * self.kT / max(abs(self.force), 1e-300)
        if self.kappa > 0:
            reach = min(reach, math.sqrt(120 * self.kT / self.kappa) + abs(self.trap_center - lo))
        hi = lo + self.side * reach
        lo, hi = min(lo, hi), max(lo, hi)
        grid = np.linspace(lo, hi, 20001)
        u = self.U(grid) / self.kT
        inside = grid[u - u.min() < 40.0]
        return float(inside[0]), float(inside[-1])

    # ---------------------------------------------------------- mobility
    def factors(self, z, axis):
        """gamma0/gamma on ``axis`` at heights z (1 without hydrodynamics, or a fixed value)."""
        z = np.asarray(z, dtype=float)
        if not self.hydrodynamic:
            return np.full(z.shape, self.bulk / self.friction[axis])
        h = np.maximum(self.side * (z - self.position), self.radius * (1 + _walls.MIN_GAP))
        eps = self.radius / h
        if axis == self.axis:
            return _walls.closed_form_perpendicular.py_func(eps)
        return _walls.faxen_parallel.py_func(eps)

    def diffusion(self, z, axis):
        return self.kT / self.bulk * self.factors(z, axis)

    def drift(self, z):
        """Ito drift along the normal, m/s: D F/kT + dD/dz."""
        z = np.asarray(z, dtype=float)
        D = self.diffusion(z, self.axis)
        return D * (-self.dU(z)) / self.kT + _deriv(lambda q: self.diffusion(q, self.axis), z)

    def expected_square(self, z, axis, tau, m):
        """E[dx^2] over tau = m steps of Euler-Maruyama from height z, to O(tau^2) (derived).

        Normal axis: 2 D tau + tau^2 [(1 - 1/m)(v D' + D D'' + v^2 + 2 D v') + v^2/m];
        a free parallel axis: 2 D_par tau + tau^2 (1 - 1/m)(v D_par' + D D_par''),
        D, v the normal diffusion coefficient and drift. m = 1 is exact.
        """
        z = np.asarray(z, dtype=float)
        D = self.diffusion(z, self.axis)
        v = self.drift(z)
        f = 1.0 - 1.0 / m
        if axis == self.axis:
            dD = _deriv(lambda q: self.diffusion(q, self.axis), z)
            d2D = _deriv2(lambda q: self.diffusion(q, self.axis), z)
            dv = _deriv(self.drift, z)
            second = f * (v * dD + D * d2D + v * v + 2 * D * dv) + v * v / m
            first = 2 * D
        else:
            Dp = self.diffusion(z, axis)
            second = f * (v * _deriv(lambda q: self.diffusion(q, axis), z)
                          + D * _deriv2(lambda q: self.diffusion(q, axis), z))
            first = 2 * Dp
        return first * tau + second * tau * tau, second * tau * tau

    def brenner_diffusion(self, z):
        h = np.maximum(self.side * (np.asarray(z, dtype=float) - self.position), self.radius * (1 + 1e-9))
        return self.kT / self.bulk / units.brenner_perpendicular_factor(h, self.radius)

    # ---------------------------------------------------------- time scales
    def relaxation_time(self):
        """(Decay length)^2 / D_perp at the mean height: the time the heights decorrelate in, s."""
        lo, hi = self.support()
        grid = np.linspace(lo, hi, 4001)
        w = np.exp(-(self.U(grid) - self.U(grid).min()) / self.kT)
        mean = float(np.sum(grid * w) / np.sum(w))
        spread = float(np.sqrt(np.sum((grid - mean) ** 2 * w) / np.sum(w)))
        return spread * spread / float(self.diffusion(mean, self.axis)), mean

    def fall_time(self, z0, z_eq):
        """Time to sediment from z0 to z_eq at the drift velocity, s (0 when already below)."""
        if self.force == 0 or self.side * (z0 - z_eq) <= 0:
            return 0.0
        speed = lambda q: abs(self.force) * self.diffusion(q, self.axis) / self.kT  # noqa: E731
        return float(integrate.quad(lambda q: 1.0 / speed(q), min(z0, z_eq), max(z0, z_eq), limit=200)[0])


def _step(z):
    return 1e-4 * np.maximum(np.abs(z), 1e-9) + 1e-12


def _deriv(f, z):
    h = _step(z)
    return (f(z + h) - f(z - h)) / (2 * h)


def _deriv2(f, z):
    h = 10 * _step(z)
    return (f(z + h) - 2 * f(z) + f(z - h)) / (h * h)


def _start(report, w, s, cfg, start, n_frames):
    """The transient to discard for the heights: fall from the initial heights + relaxation."""
    tau, mean = w.relaxation_time()
    initial = cfg["particles"].get("initial", "equilibrium")
    z0 = None
    if isinstance(initial, list):
        z0 = np.asarray(initial, dtype=float)[..., w.axis]
    elif isinstance(initial, dict):   # a region: box ranges per axis, or a disc with its z range
        ranges = initial.get("box") or [None, None, initial.get("z")]
        z0 = ranges[w.axis] if w.axis < len(ranges) else None
    if z0 is not None:
        z0 = float(np.max(z0) if w.side > 0 else np.min(z0))
    fall = w.fall_time(z0, mean) if z0 is not None else 0.0
    want = max(0.0, fall + TRANSIENT_RELAXATIONS * tau - s.burn_in)
    frames = int(math.ceil(want / s.frame_dt))
    cap = n_frames // 2
    if frames > cap:
        report.notes.append(f"wall: a transient of {want:.3g} s (sedimentation {fall:.3g} s + "
                            f"{TRANSIENT_RELAXATIONS:g} height relaxation times {tau:.3g} s) exceeds "
                            f"half the run; only {cap} frames discarded for the height rows")
        frames = cap
    report.notes.append(f"wall: height rows discard {max(start, frames)} frames (sedimentation "
                        f"{fall:.3g} s + {TRANSIENT_RELAXATIONS:g} height relaxation times {tau:.3g} s)")
    return max(start, frames)


def extend(report, traj, s, start, kw):
    """Add the wall rows to ``report`` (see the module notes)."""
    from .checks import _row, Row, P_FAIL
    cfg = traj.config
    w = _Wall(cfg, s)
    a = w.axis
    if w.n_walls > 1 or w.other:
        report.notes.append("wall: more than one wall, or other terms on its axis "
                            f"({', '.join(w.other) or 'wall'}): height checks skipped")
        return
    if w.force * w.side >= 0 and w.kappa == 0:
        report.notes.append(f"wall on axis {AXES[a]}: no force toward it and no trap, so no equilibrium; "
                            "height checks skipped")
        return
    src = FrameSource(traj.positions, name="traj.positions")
    first = _start(report, w, s, cfg, start, src.n_frames)
    support = w.support()
    under = s.regime == "underdamped"
    # ------------------------------------------------------------ histogram
    try:
        bt = BoltzmannTest(w.U, s.kT, support, n_bins=10, axis=a, start=first).fit(traj.positions)
        status = "pass" if bt.p_value_ >= P_FAIL else "fail"
        report.rows.append(Row(f"height histogram {AXES[a]}", bt.statistic_, None, float(bt.dof_), None, status,
                               f"chi-square with block covariance, {bt.dof_} dof, p = {bt.p_value_:.3g} "
                               f"(fail below {P_FAIL:g}) against exp(-U/kT) of wall, gravity and traps",
                               SRC_BOLTZMANN, "", "", key=f"height_histogram.{AXES[a]}"))
        x, p, cdf = boltzmann_weights(w.U, s.kT, support)
        shown = (support[0], float(np.interp(1.0 - 1e-4, cdf, x)))   # the visible part
        report.plot_data["histogram"] = {
            "edges": bt.edges_, "observed": bt.observed_, "errors": bt.errors_,
            "probabilities": bt.probabilities_, "support": shown, "U": w.U, "kT": s.kT, "scale": 1e6,
            "xlabel": f"{AXES[a]}: bead centre (um)", "ylabel": "density (1/um)",
            "title": f"heights: p = {bt.p_value_:.3g} against the Boltzmann density"}
    except InsufficientDataError as e:
        report.notes.append(f"height histogram skipped: {e}")
    # ------------------------------------------------------------ decay length
    if w.force * w.side < 0 and w.kappa == 0:
        cut = w.position + w.side * (w.radius + w.range * math.log(w.strength / (DECAY_CUT_KT * s.kT)))
        predicted = s.kT / abs(w.force)
        src1 = FrameSource(traj.positions, axis=a)
        heights = np.concatenate([blk[:, :, 0] for _, blk in src1.chunks(first)])
        try:
            ell, err = decay_length(w.side * (heights - cut) + cut, cut)
            report.rows.append(_row(f"decay length {AXES[a]}", ell, err, predicted,
                                    "mean height above the wall's range (ML of exp(-z/l)) vs l = kT/(m_b g)",
                                    SRC_PERRIN, "m", key=f"decay_length.{AXES[a]}", **kw))
            T = s.kT / units.k_B
            report.rows.append(_row("Boltzmann constant (sedimentation)", abs(w.force) * ell / T,
                                    abs(w.force) * err / T, units.k_B, "k_B = m_b g l / T from the decay length",
                                    SRC_PERRIN, "J/K", info=True, note="same test as the decay length",
                                    key="boltzmann_constant_sedimentation", **kw))
        except InsufficientDataError as e:
            report.notes.append(f"decay length skipped: {e}")
    # ------------------------------------------------------------ short-time diffusion
    if under:
        report.notes.append("wall: short-time diffusion rows need the overdamped regime; skipped")
        return
    if s.scheme != "euler-maruyama":
        report.notes.append(f"wall: no short-time diffusion model for scheme {s.scheme!r}; skipped")
        return
    axes = [b for b in range(s.d) if b == a or s.kappa[b] == 0 and s.force[b] == 0]
    inner = equal_probability_edges(w.U, s.kT, support, D_BINS)
    edges = np.concatenate([[support[0]], inner, [support[1]]])
    tau = s.frame_dt
    # the expectation on a fine grid of starting heights (interpolated per pair), with the
    # Boltzmann weights that give each bin's size of the tau^2 term and of the remainder
    grid = np.linspace(support[0], support[1], GRID)
    table = {ax: w.expected_square(grid, ax, tau, s.every) for ax in axes}
    weight = np.exp(-(w.U(grid) - w.U(grid).min()) / s.kT)

    def prediction(h0, ax):
        return np.interp(h0, grid, table[ax][0])

    try:
        r = increments_by_height(traj.positions, a, edges, prediction, lag=1, start=first)
    except InsufficientDataError as e:
        report.notes.append(f"short-time diffusion skipped: {e}")
        return
    for k in range(D_BINS):
        h = r["mean_height"][k]
        for ax in axes:
            meas = r["measured"][k, ax] / (2 * tau)
            pred = r["predicted"][k, ax] / (2 * tau)
            err = r["difference_err"][k, ax] / (2 * tau)
            if not np.isfinite(err):
                continue
            inside = (grid >= edges[k]) & (grid <= edges[k + 1])
            full, second = table[ax][0][inside], table[ax][1][inside]
            wk = weight[inside] / weight[inside].sum()
            # the next order is about (tau^2 term)^2 / (tau term): information only when it could matter
            remainder = 0.0 if s.every == 1 else float(np.sum(wk * second**2 / (full - second))) / (2 * tau)
            normal = ax == a
            name = "perpendicular" if normal else "parallel"
            what = (("closed form" if normal else "Faxen") if w.hydrodynamic else "bulk")
            note = ""
            if normal and w.hydrodynamic:
                note = f"Brenner's exact series: {float(w.brenner_diffusion(h)):.6g} m^2/s"
            report.rows.append(_row(f"D {name} {AXES[ax]} at {(w.gap(h) + w.radius) * 1e6:.3g} um",
                                    meas, err, pred,
                                    f"<dx^2>/(2 tau) over one frame in height bin {k + 1}/{D_BINS} vs "
                                    f"<2 D(h) tau + O(tau^2)>/(2 tau), D = kT/gamma0 x {what} factor",
                                    SRC_D, "m^2/s", info=remainder > 0.25 * err, note=note,
                                    key=f"diffusion_by_height.{k}.{AXES[ax]}", **kw))
