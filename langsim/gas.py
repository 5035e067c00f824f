"""A gas as the medium: ``[medium] gas``, ``pressure`` and ``slip``.

The viscosity follows from the temperature (Sutherland's law), the mean free
path from viscosity, temperature and pressure, and the friction of a sphere of
radius a from the Knudsen number Kn = lambda/a: Stokes drag with Cunningham's
slip correction from the continuum through the transition regime to the
free-molecular limit, or Epstein's free-molecular drag. The formulas and
their sources are in :mod:`langsim.units`; this module only reads the config
keys and records what was derived.
"""
from dataclasses import dataclass

from . import units
from .validation import Invalid, choice, number

#: Values of ``[medium] slip`` (the first is the default).
SLIP_LAWS = ("kim-2005", "davies-1945", "epstein")
#: Knudsen number below which the free-molecular ("epstein") law is refused: the
#: transition regime reaches Kn ~ 10 (reference sheet section 15, "Regimes").
EPSTEIN_MIN_KNUDSEN = 10.0


@dataclass(frozen=True)
class Gas:
    """A dilute gas at one temperature and pressure (SI)."""

    name: str
    pressure: float
    slip: str
    temperature: float
    viscosity: float

    @property
    def mean_free_path(self):
        return units.mean_free_path(self.name, self.temperature, self.pressure, self.viscosity)

    @property
    def density(self):
        return units.gas_density(self.name, self.temperature, self.pressure)

    def knudsen(self, radius):
        """Kn = lambda/a (the aerosol Kn = 2 lambda/d)."""
        return self.mean_free_path / radius

    def sphere_friction(self, radius):
        """Friction of a sphere of ``radius`` (m) in this gas, kg/s."""
        if self.slip == "epstein":
            return units.epstein_friction(self.name, self.temperature, self.pressure, radius)
        return (units.stokes_friction(self.viscosity, radius)
                / units.slip_correction(self.knudsen(radius), self.slip))

    def resolved(self):
        return {"gas": self.name, "pressure": self.pressure, "slip": self.slip,
                "mean_free_path": self.mean_free_path, "gas_density": self.density}


def read(t, temperature):
    """The :class:`Gas` of a ``[medium]`` table, or None when it has no ``gas`` key.

    Reads ``gas``, ``pressure`` and ``slip`` (and ``viscosity``, a number that
    overrides Sutherland's law); errors go to the table's error list.
    """
    if not t.has("gas"):
        for key in ("pressure", "slip"):
            if t.has(key):
                t.raw(key)
                t.errors.note(f"{t.where(key)} needs [medium] gas: expected gas = one of "
                              + ", ".join(repr(g) for g in units.GASES))
        return None
    name = t.get("gas", choice(*units.GASES))
    pressure = t.get("pressure", number(low=0.0), required=True, units="Pa")
    slip = t.get("slip", choice(*SLIP_LAWS), default=SLIP_LAWS[0])
    visc = t.raw("viscosity")
    viscosity = None
    if visc is not None:
        try:
            viscosity = number(low=0.0)(visc)
        except Invalid:
            t.errors.add(t.where("viscosity"), visc, f"a number > 0 with gas = {name!r} (or leave it "
                         "out: Sutherland's law at the temperature)", "Pa s")
    elif name is not None:
        lo, hi = units.GAS_T_RANGE
        if lo <= temperature <= hi:
            viscosity = units.gas_viscosity(name, temperature)
        else:
            t.errors.add(t.where("temperature"), temperature,
                         f"a temperature between {lo:g} and {hi:g} K for the viscosity of {name} by "
                         "Sutherland's law, or give [medium] viscosity (Pa s)", "K")
    if name is None or pressure is None or viscosity is None:
        return None
    return Gas(name, pressure, slip, temperature, viscosity)


def check_knudsen(gas, radius, errors):
    """Refuse the free-molecular law where the gas is not rarefied around the sphere."""
    if gas is not None and gas.slip == "epstein" and gas.knudsen(radius) < EPSTEIN_MIN_KNUDSEN:
        errors.note(f"[medium] slip = 'epstein': Knudsen number lambda/radius = {gas.knudsen(radius):.3g} "
                    f"at pressure = {gas.pressure!r} Pa; expected Kn >= {EPSTEIN_MIN_KNUDSEN:g} for "
                    "free-molecular drag (use 'kim-2005', valid at any Kn)")


def describe(cfg):
    """Text for ``langsim info`` about a gas medium (resolved config), or None."""
    medium = cfg["medium"]
    if not medium.get("gas"):
        return None
    lam = medium["mean_free_path"]
    text = (f"{medium['gas']} at {medium['pressure']:.6g} Pa ({medium['pressure'] / 100:.4g} mbar), mean free "
            + (f"path {lam * 1e9:.4g} nm" if lam < 1e-6 else f"path {lam * 1e6:.4g} um"))
    kn = cfg.get("particles", {}).get("knudsen")
    if kn is not None:
        text += f", Knudsen number {kn:.4g} (lambda/radius)"
    return text + f", slip law {medium['slip']}"
