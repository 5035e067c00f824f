"""Check a trajectory against the exact predictions for its own configuration.

:func:`check` reads ``traj.config`` (the resolved configuration), decides
which checks apply, discards an initial transient of ``transient_factor``
times the slowest relaxation time of the run (less any burn-in already done),
and returns a :class:`CheckReport`. Pass/fail rows compare with predictions
that are exact for the scheme at its finite time step (or exact for the
continuous dynamics where the scheme's bias is estimated to be below the
statistical resolution); asymptotic formulas (Kramers) are reported for
information and never fail a run. A row fails when |z| > ``z_threshold``
(default 4.5 standard errors) or, for the histogram test, when p < 1e-5.

Sources of the predictions are named in each row; see :mod:`langsim.theory`.
"""
import json
import math
import os
import re
import textwrap
from dataclasses import asdict, dataclass, field

import numpy as np
from scipy import optimize

from . import potentials as _pot
from . import schemes as _registry
from . import theory
from .analysis import (BoltzmannTest, EscapeRate, InsufficientDataError, LorentzianFit, axis_moments,
                       mean_msd, msd_at_lags)
from .analysis.spectra import SCHEMES, baoab_model, baoab_psd, segment_averaged_periodogram, fit_psd_model
from .analysis.stats import FrameSource
from .units import k_B
from .validation import Errors, Table

__all__ = ["Row", "CheckReport", "check", "write_plots"]

AXES = "xyz"
#: p-value below which the histogram test fails (about 4.4 standard errors)
P_FAIL = 1e-5

SRC_EQUI = "equipartition; exact finite-step variance of the scheme (Leimkuhler & Matthews 2013, AMRX; derived)"
SRC_OU = "Berg-Sorensen & Flyvbjerg 2004, Rev. Sci. Instrum. 75, 594"
SRC_MSD = "Einstein 1905, Ann. Phys. 17, 549; finite-step form derived"
SRC_OF = "Uhlenbeck & Ornstein 1930, Phys. Rev. 36, 823; finite-step BAOAB form derived"
SRC_HTB = "Hanggi, Talkner & Borkovec 1990, Rev. Mod. Phys. 62, 251"
SRC_MM = "Mel'nikov & Meshkov 1986, J. Chem. Phys. 85, 1018; Mel'nikov 1991, Phys. Rep. 209, 1"


@dataclass
class Row:
    """One line of a report. ``status`` is "pass", "fail", "info" or "skip".

    ``quantity`` is the name people read; ``key`` is the stable name scripts
    select rows by (``variance.x``, ``corner_frequency.y``, ``escape_rate.ab``);
    without one it is derived from the quantity (:func:`row_key`). ``unit`` is SI.
    """
    quantity: str
    measured: float = None
    error: float = None
    predicted: float = None
    z: float = None
    status: str = "info"
    formula: str = ""
    source: str = ""
    unit: str = ""
    note: str = ""
    key: str = ""

    def __post_init__(self):
        if not self.key:
            self.key = row_key(self.quantity)


def row_key(quantity):
    """A script-friendly key from a quantity name: ``"variance x"`` -> ``"variance.x"``.

    Lower case words joined by ``_``; a trailing axis letter becomes ``.x``/``.y``/``.z``.
    """
    words = re.findall(r"[a-z0-9]+", quantity.lower())
    if len(words) > 1 and words[-1] in AXES:
        return "_".join(words[:-1]) + "." + words[-1]
    return "_".join(words)


@dataclass
class CheckReport:
    """Rows of a check plus what was discarded.

    ``passed`` is True when at least one row was checked (pass or fail) and
    none failed: a run that nothing could be checked against does not pass.
    """
    rows: list = field(default_factory=list)
    start_frame: int = 0
    discarded_time: float = 0.0
    notes: list = field(default_factory=list)
    #: What the figures draw, by panel (filled by :func:`check`; not part of the table or JSON).
    plot_data: dict = field(default_factory=dict, repr=False, compare=False)

    @property
    def checked(self):
        """Number of rows compared with an exact prediction (status pass or fail)."""
        return sum(r.status in ("pass", "fail") for r in self.rows)

    @property
    def passed(self):
        return self.checked > 0 and not any(r.status == "fail" for r in self.rows)

    def to_dict(self):
        def clean(v):
            if isinstance(v, (np.floating, np.integer)):
                v = v.item()
            if isinstance(v, float) and not math.isfinite(v):
                return None
            return v
        return {"passed": self.passed, "checked": self.checked, "start_frame": self.start_frame,
                "discarded_time": self.discarded_time, "notes": list(self.notes),
                "rows": [{k: clean(v) for k, v in asdict(r).items()} for r in self.rows]}

    def to_json(self, indent=2):
        return json.dumps(self.to_dict(), indent=indent)

    def format_table(self, width=80):
        """Plain-text table that fits ``width`` columns.

        One line per row: quantity, measured +- error, predicted, unit, z,
        status and a note number; numbers in the units people read (nm, um^2/s,
        pN/nm, Hz, see ``DISPLAY_UNITS``; ``to_dict`` stays SI). Formula and
        source of each row are numbered notes under the table, each given once.
        """
        refs, notes, body = {}, [], []
        for r in self.rows:
            unit, scale = DISPLAY_UNITS.get(r.unit, (r.unit, 1.0))
            meas = _num(r.measured, scale, _digits(r.measured, r.error)) + (
                f" ± {_num(r.error, scale, 2)}" if r.error is not None else "")
            text = r.formula + (f" [{r.source}]" if r.source else "")
            ref = refs.setdefault(text, len(refs) + 1) if text else None
            if ref == len(notes) + 1:
                notes.append(text)
            body.append((r.quantity, meas, _num(r.predicted, scale), unit,
                         f"{r.z:+.2f}" if r.z is not None else "", r.status,
                         f"[{ref}]" if ref else "", r.note))
        head = ("quantity", "measured ± error", "predicted", "unit", "z", "status", "")
        widths = [max(len(h), *(len(b[i]) for b in body)) if body else len(h) for i, h in enumerate(head)]
        right = (False, True, True, False, True, False, False)
        gap = 2 if sum(widths) + 2 * 6 <= width else 1
        # too wide still: the quantity column wraps (long names take two lines)
        widths[0] = max(16, min(widths[0], width - sum(widths[1:]) - gap * 6))

        def line(cells):
            first, *rest = textwrap.wrap(cells[0], widths[0]) or [""]
            out = [(" " * gap).join(c.rjust(w) if r else c.ljust(w)
                                    for c, w, r in zip((first,) + tuple(cells[1:]), widths, right)).rstrip()]
            return "\n".join(out + ["  " + x for x in rest])
        lines = [line(head)]
        for b in body:
            lines.append(line(b[:7]))
            if b[7]:
                lines.append(textwrap.fill(b[7], width, initial_indent="    ", subsequent_indent="    "))
        wrap = dict(width=width, subsequent_indent="    ", break_on_hyphens=False)
        if notes:
            lines.append("")
        lines.extend(textwrap.fill(f"[{i}] {n}", **wrap) for i, n in enumerate(notes, 1))
        lines.append(f"discarded {self.start_frame} frames ({self.discarded_time:.4g} s) as transient")
        lines.extend(textwrap.fill("note: " + n, **wrap) for n in self.notes)
        if not self.checked:
            lines.append(textwrap.fill("NOTHING CHECKED: no exact prediction applies to this run (see the "
                                       "notes); this is not a pass", **wrap))
        else:
            lines.append("PASSED" if self.passed else "FAILED: " + ", ".join(
                r.quantity for r in self.rows if r.status == "fail"))
        return "\n".join(lines)


#: SI unit of a row -> (unit shown in the text table, factor from SI).
DISPLAY_UNITS = {
    "m": ("nm", 1e9), "m^2": ("nm^2", 1e18), "m^2/s": ("um^2/s", 1e12), "N/m": ("pN/nm", 1e3),
    "m^2/s^2": ("um^2/s^2", 1e12), "m/s": ("um/s", 1e6),
    # an [oscillator]'s own quantities (langsim.oscillator_checks)
    "rad": ("urad", 1e6), "rad^2": ("urad^2", 1e12), "V": ("uV", 1e6), "V^2": ("uV^2", 1e12),
    "V^2/Hz": ("nV^2/Hz", 1e18), "A^2": ("nA^2", 1e18), "F": ("pF", 1e12),
}


def _digits(value, error):
    """Significant digits that show ``value`` to the second digit of ``error`` (6 without one)."""
    if error is None or value is None or not (error > 0 and math.isfinite(error) and math.isfinite(value)) \
            or value == 0:
        return 6
    return int(min(8, max(2, math.floor(math.log10(abs(value))) - math.floor(math.log10(error)) + 2)))


def _num(v, scale=1.0, digits=6):
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return ""
    return f"{v * scale:.{digits}g}"


def _get(cfg, *keys, default=KeyError):
    cur = cfg
    for k in keys:
        if not isinstance(cur, dict) or k not in cur:
            if default is KeyError:
                raise KeyError(f"traj.config lacks {'.'.join(keys)!r}")
            return default
        cur = cur[k]
    return cur


def _vec(v, d, name):
    a = np.zeros(d) if v is None else np.broadcast_to(np.asarray(v, dtype=float), (d,)).copy()
    if not np.all(np.isfinite(a)):
        raise ValueError(f"{name} must hold {d} finite numbers, got {v!r}")
    return a


class _Setup:
    """What the configuration implies, axis by axis."""

    def __init__(self, cfg):
        if not isinstance(cfg, dict):
            raise TypeError(f"traj.config must be the resolved configuration dict, got {type(cfg).__name__}")
        self.d = d = int(_get(cfg, "particles", "dimensions"))
        if d not in (1, 2, 3):
            raise ValueError(f"particles.dimensions must be 1, 2 or 3, got {d!r}")
        T = float(_get(cfg, "medium", "temperature"))
        if not T > 0:
            raise ValueError(f"medium.temperature must be > 0 K, got {T!r}")
        self.kT = k_B * T
        self.friction = _vec(_get(cfg, "particles", "friction"), d, "particles.friction")
        if np.any(self.friction <= 0):
            raise ValueError(f"particles.friction must be > 0, got {self.friction.tolist()}")
        # cold damping: the dynamics sees the total damping, the noise only the friction, so
        # each axis is thermal at kT friction/(friction + feedback)
        self.feedback = _vec(_get(cfg, "particles", "feedback", default=None), d, "particles.feedback")
        self.thermal_friction = self.friction
        self.friction = self.friction + self.feedback
        self.kT_axis = self.kT * self.thermal_friction / self.friction
        self.mass = _get(cfg, "particles", "mass", default=None)
        self.regime = _get(cfg, "dynamics", "regime")
        self.scheme = _get(cfg, "dynamics", "scheme")
        self.dt = float(_get(cfg, "dynamics", "dt"))
        self.every = int(_get(cfg, "output", "every", default=1))
        if not self.dt > 0 or self.every < 1:
            raise ValueError(f"dynamics.dt must be > 0 and output.every >= 1, got {self.dt!r}, {self.every!r}")
        if self.regime == "underdamped" and not (self.mass and self.mass > 0):
            raise ValueError(f"particles.mass must be > 0 kg for underdamped dynamics, got {self.mass!r}")
        self.frame_dt = self.dt * self.every
        self.burn_in = float(_get(cfg, "particles", "burn_in", default=0.0) or 0.0)
        self.kappa = np.zeros(d)
        kc = np.zeros(d)
        self.force = np.zeros(d)
        self.nonlinear = [None] * d
        self.moving = np.zeros(d, bool)
        self.well = None
        self.coupled = False
        self.on_axis = []  # extra 1D terms along the double-well axis
        for term in _get(cfg, "potential", default=[]) or []:
            kind = term.get("type")
            if kind == "harmonic":
                k = _vec(term.get("stiffness"), d, "harmonic.stiffness")
                c = _vec(term.get("center"), d, "harmonic.center")
                self.kappa += k
                kc += k * c
                mv = (_vec(term.get("velocity"), d, "velocity") != 0) | (_vec(term.get("amplitude"), d, "amplitude") != 0)
                self.moving |= mv & (k != 0)
                self.on_axis.append(("harmonic", k, c))
            elif kind == "double-well":
                a = int(term.get("axis", 0))
                k = _vec(term.get("stiffness"), d, "double-well.stiffness")
                c = _vec(term.get("center"), d, "double-well.center")
                k[a] = 0.0
                self.kappa += k
                kc += k * c
                self.nonlinear[a] = "double-well"
                self.well = None if self.well is not None else (a, float(term["barrier"]),
                                                                 float(term["separation"]), c[a])
            elif kind == "periodic":
                a = int(term.get("axis", 0))
                self.nonlinear[a] = "periodic"
                self.on_axis.append(("periodic", a, term))
            elif kind in ("constant-force", "gravity"):
                self.force += _vec(term.get("force"), d, f"{kind}.force")
            elif kind == "wall":
                self.nonlinear[int(term["axis"])] = "wall"
                if term.get("hydrodynamic"):   # the friction of every axis depends on the height
                    self.nonlinear = [k or "near-wall" for k in self.nonlinear]
            elif kind in ("gaussian-well", "expression"):
                self.coupled = True
                self.nonlinear = [kind] * d
            else:
                raise ValueError(f"unknown potential type {kind!r} in traj.config['potential']")
        with np.errstate(invalid="ignore", divide="ignore"):
            self.center = np.where(self.kappa > 0, (kc + self.force) / self.kappa, 0.0)
        if self.well is not None and not self.coupled:
            self.axis_terms = _separable_terms(_get(cfg, "potential", default=[]), d, self.kT)

    def axis_kind(self, a):
        if self.nonlinear[a]:
            return self.nonlinear[a]
        if self.kappa[a] > 0:
            return "moving-trap" if self.moving[a] else "harmonic"
        return "drift" if self.force[a] != 0 else "free"

    def relaxation_time(self, a):
        kind = self.axis_kind(a)
        stiff = self.kappa[a] if kind in ("harmonic", "moving-trap") else 0.0
        if kind == "double-well":
            stiff = theory.double_well_curvatures(self.well[1], self.well[2])[0]
        elif kind not in ("harmonic", "moving-trap", "free", "drift"):
            return 0.0
        mass = self.mass if self.regime == "underdamped" else None
        rate = theory.slowest_relaxation_rate(mass, self.friction[a], stiff)
        return 1.0 / rate if rate > 0 else 0.0

    def axis_potential(self):
        """1D potential along the double-well axis (J), or None when not separable.

        Built from the terms' own energies (:meth:`langsim.potentials.Term.energy_at`),
        the functions the kernels compute; other axes add only a constant.
        """
        if self.well is None or self.coupled:
            return None
        return _pot.axis_profile(self.axis_terms, self.well[0], self.d)


def _separable_terms(entries, d, kT):
    """Term objects of a resolved config's separable entries (gravity as its resolved force)."""
    errors = Errors("traj.config")
    terms = []
    for i, entry in enumerate(entries):
        kind = entry.get("type")
        if kind == "gravity":
            entry, kind = {"type": "constant-force", "force": entry["force"]}, "constant-force"
        if kind in ("harmonic", "double-well", "periodic", "constant-force"):
            terms.append(_pot.TERMS[kind].from_table(Table(errors, f"potential[{i}]", entry), d, kT))
    errors.raise_if_any()
    return terms


def _z(measured, error, predicted):
    if error is None or not error > 0 or not math.isfinite(error):
        return None
    return (measured - predicted) / error


def _row(quantity, measured, error, predicted, formula, source, unit="", z_threshold=4.5, info=False, note="",
         key=""):
    z = _z(measured, error, predicted)
    status = "info" if info else ("pass" if z is not None and abs(z) <= z_threshold else "fail")
    return Row(quantity, float(measured), None if error is None else float(error), float(predicted),
               None if z is None else float(z), status, formula, source, unit, note, key)


def _scheme_bias(setup, curvature, a):
    """Rough relative bias of configurational statistics from the finite step (for gating)."""
    r = curvature * setup.dt / setup.friction[a]
    if setup.scheme == "exact":
        return 0.0
    if setup.scheme == "euler-maruyama":
        return r / 2.0
    if setup.scheme == "leimkuhler-matthews":
        return r * r
    return curvature / setup.mass * setup.dt ** 2 / 4.0  # baoab


def _note_short(report, moments, a, what):
    """Say so when a run is too short for a trustworthy blocking error on this axis.

    With the blocking level chosen by B^3 > 2 n g^2 (see analysis.stats.blocking),
    the error's downward bias for an exponentially correlated series is about
    g/B = (g / 2n)^(1/3) (derived from the criterion); above 10 % it is said.
    """
    bias = (moments["inefficiency"][a] / (2.0 * moments["n_frames"])) ** (1 / 3)
    if bias > 0.1:
        report.notes.append(f"axis {AXES[a]}: the {what} error bars may be low by about {100 * bias:.0f} % "
                            f"(only {moments['n_frames'] / moments['inefficiency'][a]:.0f} independent "
                            "samples); a longer run fixes it")


#: Frames and particles of the MSD figure (its FFT holds one particle's frames at a time).
PLOT_FRAMES = 1 << 20
PLOT_PARTICLES = 64
#: Frames of traj.time read to compare its spacing with dt * every.
TIME_HEAD = 1 << 16


def check(traj, z_threshold=4.5, min_events=20, transient_factor=10.0):
    """Check a trajectory against the predictions for its configuration.

    Parameters
    ----------
    traj : object with ``time`` (frames,) s, ``positions`` (frames, particles,
        dims) m (array or lazily sliced), ``velocities`` (same shape or None)
        and ``config`` (resolved configuration dict).
    z_threshold : float, |z| above which a row fails.
    min_events : int, completed transitions needed for the escape-rate check.
    transient_factor : float, transient discarded = this times the slowest
        relaxation time, less the configured burn-in (at most a quarter of the run).

    Returns
    -------
    CheckReport
    """
    for attr in ("time", "positions", "config"):
        if not hasattr(traj, attr):
            raise TypeError(f"traj must have .time, .positions, .velocities and .config; missing {attr!r}")
    s = _Setup(traj.config)
    src = FrameSource(traj.positions, name="traj.positions")
    if len(src.shape) != 3 or src.shape[2] != s.d:
        raise ValueError(f"traj.positions must have shape (frames, particles, {s.d}), got {src.shape}")
    report = CheckReport()
    shape = tuple(np.shape(traj.time)) if not hasattr(traj.time, "shape") else tuple(traj.time.shape)
    if shape != (src.n_frames,):
        raise ValueError(f"traj.time must have shape ({src.n_frames},), got {shape}")
    time = np.asarray(traj.time[:TIME_HEAD], dtype=float)     # O(1) memory for any file
    spacing = float(np.median(np.diff(time)))
    if not math.isclose(spacing, s.frame_dt, rel_tol=1e-6):
        report.rows.append(Row("frame interval", spacing, None, s.frame_dt, None, "fail",
                               "time step of traj.time = dynamics.dt * output.every", "configuration", "s"))
    # ---------------------------------------------------------------- transient
    tau = max(s.relaxation_time(a) for a in range(s.d))
    want = max(0.0, transient_factor * tau - s.burn_in)
    start = int(math.ceil(want / s.frame_dt))
    cap = src.n_frames // 4
    if start > cap:
        report.notes.append(f"transient of {want:.3g} s ({start} frames) exceeds a quarter of the run; "
                            f"only {cap} frames discarded")
        start = cap
    report.start_frame, report.discarded_time = start, start * s.frame_dt
    unknown = sorted({s.axis_kind(a) for a in range(s.d) if s.relaxation_time(a) == 0.0}
                     - {"free", "drift"})
    if tau == 0.0 and unknown:
        report.notes.append(f"transient: no relaxation time is known for {', '.join(unknown)} terms; "
                            f"only the burn-in of {s.burn_in:.3g} s is relied on")
    else:
        report.notes.append(f"transient: {transient_factor:g} x slowest relaxation time {tau:.3g} s "
                            f"minus burn-in {s.burn_in:.3g} s")
    kinds = [s.axis_kind(a) for a in range(s.d)]
    for a, k in enumerate(kinds):
        if k == "moving-trap":
            report.notes.append(f"axis {AXES[a]}: moving trap, equilibrium checks skipped")
        elif k == "drift":
            report.notes.append(f"axis {AXES[a]}: constant force without trap, MSD check skipped")
        elif k in ("periodic", "expression"):
            report.notes.append(f"axis {AXES[a]}: {k} potential, no exact prediction; skipped")
        elif k == "gaussian-well" and a == 0:
            report.notes.append("gaussian-well potential: escape from the well checked, other checks skipped")
    wall_h = _get(traj.config, "medium", "wall_distance", default=None)
    if wall_h is not None:
        report.notes.append(f"friction corrected for a wall at {wall_h * 1e6:.4g} um from the bead's centre "
                            f"(normal axis {_get(traj.config, 'medium', 'wall_axis')}): parallel Faxen, "
                            "perpendicular Brenner 1961; predictions use it")
    under = s.regime == "underdamped"
    if under and s.scheme not in ("baoab", "exact"):
        report.notes.append(f"underdamped scheme {s.scheme!r} has no exact prediction here; checks skipped")
        return report
    kw = dict(z_threshold=z_threshold)
    # ------------------------------------------------------------ equipartition
    harm = [a for a in range(s.d) if kinds[a] == "harmonic"]
    if harm:
        m = axis_moments(traj.positions, start=start, strict=False)
        for a in harm:
            if not np.isfinite(m["variance_err"][a]):
                report.notes.append(f"axis {AXES[a]}: too few frames for a blocking error; equipartition skipped")
                continue
            try:
                pred = _registry.get(s.scheme).position_variance(s.kT_axis[a], s.kappa[a], s.friction[a],
                                                                 s.dt, s.mass)
            except ValueError as e:
                report.notes.append(f"axis {AXES[a]}: {e}")
                continue
            _note_short(report, m, a, "position")
            report.rows.append(_row(f"variance {AXES[a]}", m["variance"][a], m["variance_err"][a], pred,
                                    f"{s.scheme} stationary variance (kT/kappa at dt -> 0)", SRC_EQUI, "m^2", **kw))
            report.rows.append(_row(f"mean {AXES[a]}", m["mean"][a], m["mean_err"][a], s.center[a],
                                    "force balance: center + F/kappa", "common practice", "m", **kw))
    # ------------------------------------------------------------ velocities
    vel = getattr(traj, "velocities", None)
    if under and vel is not None:
        mv = axis_moments(vel, start=start, strict=False)
        for a in range(s.d):
            if not np.isfinite(mv["variance_err"][a]):
                report.notes.append(f"axis {AXES[a]}: too few frames for a velocity blocking error; skipped")
            elif kinds[a] in ("harmonic", "free"):
                _note_short(report, mv, a, "velocity")
                pred = _registry.get(s.scheme).velocity_variance(
                    s.kT_axis[a], s.mass, s.dt, s.kappa[a] if kinds[a] == "harmonic" else 0.0)
                form = ("kT/m (exact scheme)" if s.scheme == "exact" else
                        "BAOAB full-step (kT/m)(1 - w0^2 dt^2/4)")
                report.rows.append(_row(f"velocity variance {AXES[a]}", mv["variance"][a], mv["variance_err"][a],
                                        pred, form,
                                        "Leimkuhler & Matthews 2013, AMRX; derived", "m^2/s^2", **kw))
            elif kinds[a] != "moving-trap":
                report.rows.append(_row(f"velocity variance {AXES[a]}", mv["variance"][a], mv["variance_err"][a],
                                        s.kT_axis[a] / s.mass, "kT/m (exact only as dt -> 0 for this force)",
                                        "equipartition", "m^2/s^2", info=True, **kw))
    # ------------------------------------------------------------ free MSD
    free = [a for a in range(s.d) if kinds[a] == "free"]
    n = src.n_frames - start
    if free and n >= 400:
        roles = {1: "short", int(round(math.sqrt(n))): "medium", n // 200: "long"}   # key of each lag
        for lag in sorted(roles):
            try:
                msd, err = msd_at_lags(traj.positions, [lag], start)
            except InsufficientDataError as e:
                report.notes.append(f"MSD at lag {lag} frames skipped: {e}")
                continue
            msd, err = np.atleast_1d(msd[0]), np.atleast_1d(err[0])
            steps = lag * s.every
            t = steps * s.dt
            for a in free:
                D = s.kT_axis[a] / s.friction[a]
                if s.scheme == "exact" and not under:
                    pred, form, src_ = 2 * D * t, "2 D t (exact scheme)", SRC_MSD
                elif s.scheme == "exact":
                    pred = float(theory.ornstein_furth_msd(t, s.kT_axis[a], s.mass, s.friction[a]))
                    form, src_ = "Ornstein-Furth MSD (exact scheme)", SRC_OF
                elif s.scheme == "euler-maruyama":
                    pred, form, src_ = 2 * D * t, "2 D t (exact for Euler-Maruyama)", SRC_MSD
                elif s.scheme == "leimkuhler-matthews":
                    pred, form, src_ = float(theory.lm_free_msd(steps, D, s.dt)), "2 D (t - dt/2) (LM)", SRC_MSD
                else:
                    pred = float(theory.baoab_free_msd(steps, s.kT_axis[a], s.mass, s.friction[a], s.dt))
                    of = float(theory.ornstein_furth_msd(t, s.kT_axis[a], s.mass, s.friction[a]))
                    form, src_ = f"BAOAB free-particle MSD (Ornstein-Furth: {of:.6g})", SRC_OF
                report.rows.append(_row(f"MSD {AXES[a]} at {t:.3g} s", msd[a], err[a], pred, form, src_,
                                        "m^2", key=f"msd_{roles[lag]}.{AXES[a]}", **kw))
    # ------------------------------------------------------------ PSD
    for a in harm:
        (_baoab_psd_rows if under else _psd_rows)(report, traj, s, a, start, kw)
    # ------------------------------------------------------------ double well
    if s.well is not None:
        _well_rows(report, traj, s, start, min_events, kw)
    # ------------------------------------------------ cold damping, quantum limit, oscillators
    from .oscillator_checks import extend
    extend(report, traj, s, start, kw)
    # ------------------------------------------------------------ wall
    if "wall" in kinds:
        from .wall_checks import extend as _wall_rows
        _wall_rows(report, traj, s, start, kw)
    if "gaussian-well" in kinds:
        from .rates.checkrows import gaussian_well_rows
        rows, notes = gaussian_well_rows(traj, s.kT, s.friction, s.frame_dt, s.regime)
        report.rows.extend(Row(**r) for r in rows)
        report.notes.extend(notes)
    if "measurement" in traj.config:       # camera and detector rows
        from .measurement.checks import measurement_rows
        measurement_rows(report, traj, s, kw)
    return report


def _segment(report, a, n, tau_f, lowest):
    """Segment length: a power of two >= 32 tau_f (and >= ``lowest``), 16 tau_f^2 if the data allow.

    ``tau_f`` is the relaxation (or ring-down) time in frames; at most 2^16 and a
    quarter of the ``n`` frames. None (with a note) when fewer than 4 segments fit.
    """
    n_min = max(lowest, 1 << int(math.ceil(math.log2(32.0 * tau_f))))
    N = 1 << int(math.ceil(math.log2(max(n_min, 16.0 * tau_f * tau_f))))
    N = min(N, 1 << 16, 1 << int(math.floor(math.log2(max(n // 4, 1)))))
    if N < n_min or n < 4 * N:
        report.notes.append(f"axis {AXES[a]}: {n} frames are fewer than 4 segments of {n_min}; PSD check skipped")
        return None
    return N


def _psd_rows(report, traj, s, a, start, kw):
    """Corner frequency, D and stiffness from an ML fit of the scheme's exact expected periodogram.

    The model (:func:`~langsim.analysis.spectra.scheme_psd`) is the exact
    expectation of the segment-averaged periodogram of the scheme's recorded positions,
    leakage included, parametrised by the physical (f_c, D); fitted to that
    expectation it returns them exactly, so the predictions are the physical
    kappa/(2 pi gamma) and kT/gamma. Segments are at least 32 relaxation times
    and, data permitting, 16 tau_f^2 frames (tau_f = relaxation time in
    frames): the segment edges add leakage noise correlated across all
    frequencies, which the Fisher errors miss; it inflates the spread of the
    estimates by about sqrt(1 + tau_f^2/N) (derived scaling, confirmed by
    simulation), so the errors are multiplied by that factor.
    """
    k, g = s.kappa[a], s.friction[a]
    tau = g / k
    n = FrameSource(traj.positions).n_frames - start
    if tau < s.frame_dt:
        report.notes.append(f"axis {AXES[a]}: relaxation time below the frame interval, PSD check skipped")
        return
    if s.scheme not in SCHEMES:
        report.notes.append(f"axis {AXES[a]}: no spectrum model for scheme {s.scheme!r}; PSD check skipped")
        return
    tau_f = tau / s.frame_dt
    N = _segment(report, a, n, tau_f, 64)
    if N is None:
        return
    try:
        acov = theory.scheme_position_autocovariance(s.scheme, np.arange(N), s.kT_axis[a], k, g, s.dt, s.every)
    except ValueError as e:
        report.notes.append(f"axis {AXES[a]}: {e}")
        return
    # Leimkuhler-Matthews recorded every step has a spectral zero at the Nyquist frequency, where the
    # periodogram is dominated by (correlated) leakage: fit below half the Nyquist frequency there.
    f_max = 0.25 / s.frame_dt if (s.scheme == "leimkuhler-matthews" and s.every == 1) else None
    fit = LorentzianFit(s.frame_dt, model=s.scheme, step_dt=s.dt, every=s.every, segment_length=N, f_max=f_max,
                        friction=g, axis=a, start=start).fit(traj.positions)
    infl = math.sqrt(1.0 + tau_f * tau_f / N)
    fc, D = k / (2.0 * math.pi * g), s.kT_axis[a] / g
    band = "" if f_max is None else f" up to {f_max:.4g} Hz"
    form = (f"ML fit{band} of the exact expected periodogram of the {s.scheme} process (step {s.dt:.3g} s, "
            f"every {s.every}, {N}-frame segments) in physical f_c, D; errors x {infl:.3f} for edge leakage")
    src = SRC_OU + "; scheme spectrum derived"
    report.rows.append(_row(f"corner frequency {AXES[a]}", fit.corner_frequency_, infl * fit.corner_frequency_err_,
                            fc, "f_c = kappa/(2 pi gamma); " + form, src, "Hz", **kw))
    report.rows.append(_row(f"diffusion coefficient {AXES[a]} (PSD)", fit.diffusion_, infl * fit.diffusion_err_,
                            D, "D = kT/gamma; " + form, src, "m^2/s",
                            key=f"diffusion_coefficient_psd.{AXES[a]}", **kw))
    report.rows.append(_row(f"stiffness {AXES[a]} (PSD)", fit.stiffness_, infl * fit.stiffness_err_, k,
                            "kappa = 2 pi gamma f_c with the configured friction", "common practice", "N/m",
                            info=True, note="same test as the corner frequency", key=f"stiffness_psd.{AXES[a]}", **kw))
    expected = theory.expected_periodogram(acov, s.frame_dt)[1:N // 2 + 1][:fit.frequencies_.size]
    report.plot_data[f"psd {AXES[a]}"] = {"f": fit.frequencies_, "P": fit.psd_, "fit": fit.predict(fit.frequencies_),
                                          "predicted": expected, "label": f"fitted {s.scheme} spectrum"}


def _baoab_psd_rows(report, traj, s, a, start, kw):
    """Resonance frequency, Q and stiffness from an ML fit of BAOAB's exact expected periodogram.

    The model (:func:`~langsim.analysis.spectra.baoab_psd`) is the exact
    expectation of the segment-averaged periodogram of BAOAB's recorded positions in a
    harmonic well, leakage included, in the physical f0 = sqrt(k/m)/(2 pi),
    Q = sqrt(k m)/gamma and variance kT/k; fitted to that expectation it
    returns them to ~1e-7, so the predictions are the configured values.
    The fit is restricted to f <= 2 f0: above the peak the spectrum falls as
    f^-4 while segment-edge leakage falls only as f^-2, so those bins are
    dominated by noise correlated across frequencies that the Fisher errors
    miss. In that band the Fisher errors are calibrated (standard deviation of z
    over 40 synthetic BAOAB runs with the cantilever parameters, 16 particles x
    2^14 frames, 8192-frame segments: 1.07 (variance), 0.93 (f0), 1.15 (Q), each
    +- 0.11; over the whole band it was 6.8 for the variance), so they are not inflated.
    """
    k, m, g, kT = s.kappa[a], s.mass, s.friction[a], s.kT_axis[a]
    w0 = math.sqrt(k / m)
    f0, Q = w0 / (2.0 * math.pi), math.sqrt(k * m) / g
    n = FrameSource(traj.positions).n_frames - start
    ring_f = Q / (math.pi * f0) / s.frame_dt  # amplitude ring-down time in frames
    if 2.0 * f0 * s.frame_dt > 0.5:
        report.notes.append(f"axis {AXES[a]}: resonance above a quarter of the frame rate; PSD check skipped")
        return
    if w0 * s.dt >= 2.0 and s.scheme == "baoab":
        report.notes.append(f"axis {AXES[a]}: w0 dt >= 2, BAOAB unstable; PSD check skipped")
        return
    N = _segment(report, a, n, ring_f, 256)
    if N is None:
        return
    f, P, count = segment_averaged_periodogram(traj.positions, s.frame_dt, N, start, axis=a)
    keep = f <= 2.0 * f0
    f, P = f[keep], P[keep]
    # start the search from the data: the highest bin of the (5-bin smoothed) periodogram and its half width
    sm = np.convolve(P, np.ones(5) / 5.0, mode="same")
    i = int(np.argmax(sm))
    above = np.flatnonzero(sm >= sm[i] / 2.0)
    width = max(f[min(above[-1] + 1, f.size - 1)] - f[max(above[0] - 1, 0)], 2.0 * f[0])
    model = baoab_model(s.dt, s.every, N, s.scheme)
    r = fit_psd_model(f, P, count, model, s.frame_dt, start=(f[i], max(f[i] / width, 0.1)),
                      tol=1e-8)
    (var, f0_m, Q_m), (var_e, f0_e, Q_e) = r["params"], r["errors"]
    form = (f"ML fit up to 2 f0 of the exact expected periodogram of the {s.scheme} process (step {s.dt:.3g} s, "
            f"every {s.every}, {N}-frame segments, leakage included) in physical f0, Q, kT/k")
    src = "BAOAB: Leimkuhler & Matthews 2013, AMRX; spectrum derived; ML fit as Berg-Sorensen & Flyvbjerg 2004"
    report.rows.append(_row(f"resonance frequency {AXES[a]}", f0_m, f0_e, f0, "f0 = sqrt(k/m)/(2 pi); " + form,
                            src, "Hz", **kw))
    report.rows.append(_row(f"quality factor {AXES[a]}", Q_m, Q_e, Q, "Q = sqrt(k m)/gamma; " + form, src, "", **kw))
    report.rows.append(_row(f"stiffness {AXES[a]} (PSD)", kT / var, kT / var * var_e / var, k,
                            "k = kT/variance (fitted peak area; exact for BAOAB positions); " + form, src,
                            "N/m", key=f"stiffness_psd.{AXES[a]}", **kw))
    report.plot_data[f"psd {AXES[a]}"] = {"f": f, "P": P, "fit": baoab_psd(f, f0_m, Q_m, var, s.dt, s.every, N, s.scheme),
                                          "predicted": baoab_psd(f, f0, Q, kT / k, s.dt, s.every, N, s.scheme),
                                          "label": "fitted BAOAB spectrum"}


def _extrema(U, c, L):
    lo = optimize.minimize_scalar(U, bounds=(c - L, c), method="bounded", options={"xatol": 1e-12 * L}).x
    hi = optimize.minimize_scalar(U, bounds=(c, c + L), method="bounded", options={"xatol": 1e-12 * L}).x
    top = optimize.minimize_scalar(lambda x: -U(x), bounds=(lo, hi), method="bounded",
                                   options={"xatol": 1e-12 * L}).x
    return float(lo), float(top), float(hi)


def _curv(U, x, h):
    return float((U(x + h) - 2 * U(x) + U(x - h)) / (h * h))


def _well_rows(report, traj, s, start, min_events, kw):
    U = s.axis_potential()
    a, dU, L, c = s.well
    kT = s.kT_axis[a]
    if U is None:
        report.notes.append("double well coupled to other potential terms: histogram and rate checks skipped")
        return
    xa, xt, xb = _extrema(U, c, L)
    grid = np.linspace(c - 3 * L, c + 3 * L, 6001)
    ug = U(grid)
    inside = grid[ug - ug.min() < 40.0 * kT]
    support = (float(inside[0]), float(inside[-1]))
    h = 1e-4 * L
    k_min, k_top = _curv(U, xa, h), -_curv(U, xt, h)
    bias = _scheme_bias(s, max(k_min, _curv(U, xb, h)), a)
    try:
        bt = BoltzmannTest(U, kT, support, n_bins=10, axis=a, start=start).fit(traj.positions)
        resolution = float(np.median(bt.errors_ / bt.probabilities_))
        gated = bias > 0.25 * resolution
        status = "info" if gated else ("pass" if bt.p_value_ >= P_FAIL else "fail")
        report.rows.append(Row(f"Boltzmann histogram {AXES[a]}", bt.statistic_, None, float(bt.dof_), None, status,
                               f"chi-square with block covariance, {bt.dof_} dof, p = {bt.p_value_:.3g} "
                               f"(fail below {P_FAIL:g})", "Boltzmann distribution; Hotelling 1931", "",
                               f"scheme bias ~{bias:.2g} vs resolution {resolution:.2g}"
                               + (" (too coarse a step: information only)" if gated else "")))
        report.plot_data["histogram"] = {"edges": bt.edges_, "observed": bt.observed_, "errors": bt.errors_,
                                          "probabilities": bt.probabilities_, "support": support,
                                          "U": U, "kT": kT}
    except InsufficientDataError as e:
        report.notes.append(f"Boltzmann histogram skipped: {e}")
    try:
        er = EscapeRate(xa, xb, s.frame_dt, axis=a, start=start).fit(traj.positions)
    except ValueError as e:
        report.notes.append(f"escape rate skipped: {e}")
        return
    report.plot_data["dwell"] = {"dwells": np.concatenate([er.dwell_a_, er.dwell_b_]), "rate": er.rate_}
    barrier = float(U(xt) - U(xa))
    if s.regime == "overdamped":
        for name, rate, err, x0, x1, cnt in (("A->B", er.rate_ab_, er.rate_ab_err_, xa, xb, er.dwell_a_.size),
                                             ("B->A", er.rate_ba_, er.rate_ba_err_, xb, xa, er.dwell_b_.size)):
            key = "escape_rate." + name.replace("->", "").lower()
            pred = 1.0 / theory.mfpt(U, x0, x1, kT, s.friction[a], rtol=1e-8)
            if cnt < min_events:
                report.notes.append(f"escape {name}: {cnt} transitions < {min_events}; rate check skipped")
                continue
            gated = bias > 0.25 / math.sqrt(cnt)
            report.rows.append(_row(f"escape rate {name}", rate, err, pred,
                                    "1/MFPT minimum to minimum (exact double integral); core-set counting",
                                    SRC_HTB, "1/s", info=gated, note=f"{cnt} transitions", key=key, **kw))
        kod = theory.kramers_rate_overdamped(k_min, k_top, s.friction[a], barrier, kT)
        report.rows.append(_row("escape rate (Kramers, overdamped)", er.rate_, er.rate_err_, kod,
                                "asymptotic; expected error about +0.5 kT/dU relative "
                                f"({0.5 * kT / barrier:.1%})", SRC_HTB, "1/s", info=True,
                                key="escape_rate_kramers", **kw))
    else:
        m = s.mass
        Ib = theory.barrier_action(U, xa, xt, m)
        sym = abs(float(U(xb) - U(xa))) < 1e-6 * barrier
        kt = theory.kramers_rate_turnover(k_min, k_top, m, s.friction[a], Ib, barrier, kT, symmetric_double_well=sym)
        report.rows.append(_row("escape rate (Mel'nikov-Meshkov)", er.rate_, er.rate_err_, kt,
                                "asymptotic turnover rate" + (" A^2(D)/A(2D) k_SD" if sym else " A(D) k_SD")
                                + "; expect errors of order 10 % at 5 kT", SRC_MM, "1/s", info=True,
                                note=f"{er.n_events_} transitions", key="escape_rate_turnover", **kw))


def write_plots(traj, report, directory):
    """Write PNG figures for a checked trajectory into ``directory``; returns the paths.

    MSD vs theory (log axes), PSD vs fitted and predicted spectra, histogram vs
    Boltzmann density, dwell-time distribution, as far as the report has them.
    Needs matplotlib (``pip install langsim[plot]``).
    """
    try:
        import matplotlib
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError as e:
        raise ImportError("write_plots needs matplotlib: pip install langsim[plot]") from e
    if not isinstance(report, CheckReport):
        raise TypeError(f"report must be a CheckReport, got {type(report).__name__}")
    os.makedirs(directory, exist_ok=True)
    data = report.plot_data or check(traj).plot_data
    s = _Setup(traj.config)
    paths = []
    unit = (getattr(traj, "units", None) or {}).get("positions", "m")   # an oscillator's own: rad, C

    def save(fig, name):
        p = os.path.join(directory, name)
        fig.savefig(p, dpi=110)
        plt.close(fig)
        paths.append(p)

    n = FrameSource(traj.positions).n_frames - report.start_frame
    L = max(1, min(n // 10, 4096))
    stop = min(n + report.start_frame, report.start_frame + PLOT_FRAMES)   # bounded memory
    msd = np.atleast_2d(mean_msd(traj.positions, L, report.start_frame, stop=stop,
                                 particles=PLOT_PARTICLES).T).T
    lags = np.arange(1, L + 1)
    t = lags * s.frame_dt
    fig, ax = plt.subplots()
    for a in range(s.d):
        ax.loglog(t, msd[1:, a], ".", ms=3, label=f"measured {AXES[a]}")
        kind = s.axis_kind(a)
        if kind == "free":
            ax.loglog(t, 2 * s.kT_axis[a] / s.friction[a] * t, "-", label=f"2Dt {AXES[a]}")
        elif kind == "harmonic" and s.regime == "overdamped":
            ax.loglog(t, theory.ou_msd(t, s.kT_axis[a], s.kappa[a], s.friction[a]), "-", label=f"OU {AXES[a]}")
    ax.set_xlabel("lag time (s)")
    ax.set_ylabel(f"MSD ({unit}$^2$)")
    ax.legend(fontsize=7)
    save(fig, "msd.png")
    for key, d in data.items():
        if key.startswith("psd"):
            fig, ax = plt.subplots()
            ax.loglog(d["f"], d["P"], ".", ms=2, label="segment-averaged periodogram")
            ax.loglog(d["f"], d["fit"], "-", label=d.get("label", "fitted model"))
            ax.loglog(d["f"], d["predicted"], "--", label="predicted (exact expectation)")
            ax.set_xlabel("f (Hz)")
            ax.set_ylabel(f"two-sided PSD ({unit}$^2$/Hz)")
            ax.legend(fontsize=7)
            save(fig, key.replace(" ", "_") + ".png")
    if "histogram" in data:
        d = data["histogram"]
        x = np.linspace(*d["support"], 400)
        u = d["U"](x) / d["kT"]
        w = np.exp(-(u - u.min()))
        w /= np.trapezoid(w, x)
        edges = np.concatenate([[d["support"][0]], d["edges"], [d["support"][1]]])
        width = np.diff(edges)
        fig, ax = plt.subplots()
        k = d.get("scale", 1.0)   # plotted unit per stored unit (1e6: m -> um)
        ax.plot(x * k, w / k, "-", label="Boltzmann density")
        ax.errorbar(0.5 * (edges[1:] + edges[:-1]) * k, d["observed"] / width / k, d["errors"] / width / k,
                    fmt="o", ms=3, label="measured (equal-probability bins)")
        ax.set_xlabel(d.get("xlabel", f"position ({unit})"))
        ax.set_ylabel(d.get("ylabel", f"density (1/{unit})"))
        ax.set_title(d.get("title", "position histogram"))
        ax.legend(fontsize=7)
        save(fig, "histogram.png")
    if "dwell" in data:
        d = data["dwell"]
        fig, ax = plt.subplots()
        ax.hist(d["dwells"], bins=40, density=True, alpha=0.6, label="dwell times")
        tt = np.linspace(0, d["dwells"].max(), 200)
        ax.semilogy(tt, d["rate"] * np.exp(-d["rate"] * tt), "-", label="exponential, fitted rate")
        ax.set_xlabel("dwell time (s)")
        ax.set_ylabel("probability density (1/s)")
        ax.legend(fontsize=7)
        save(fig, "dwell_times.png")
    return paths
