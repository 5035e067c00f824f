"""What a sweep runs: axes -> points -> one config and one seed per run.

Nothing here runs a simulation. A :class:`Plan` holds the base config (plain
JSON data), the axes (dotted path -> list of plain values), how they combine,
the replicates and the base seed; ``configs()`` yields the config of every run.

Seeds: run ``i`` (points in order, replicates innermost) takes the child
``numpy.random.SeedSequence(base_seed).spawn(n_runs)[i]``; its first 64-bit
word, reduced to 63 bits, is recorded as the integer seed that
:func:`langsim.run` accepts, so a row re-run alone gives the same trajectory.
"""
import copy
import difflib
import itertools
import math
import numbers
import os
import tomllib
from dataclasses import dataclass, field

import numpy as np

from .. import seeding
from ..validation import ConfigError, Errors

COMBINE = ("grid", "zip")
SPACINGS = ("linear", "log")
#: Keys a sweep file may hold at its top level.
SWEEP_FILE_KEYS = ("base", "axes", "replicates", "combine")
RANGE_KEYS = ("start", "stop", "count", "spacing")
#: Paths the sweep sets itself: an axis on them is refused.
RESERVED = {"seed": "every run gets its own seed from the base seed; use replicates for repeats",
            "output.path": "the sweep names the run files itself (in out)"}


def plain(value, where="value"):
    """``value`` as plain JSON data: numpy scalars and arrays become Python numbers and
    lists, tuples lists, ``pathlib`` paths strings; anything else not JSON is refused."""
    if isinstance(value, dict):
        out = {}
        for k, v in value.items():
            if not isinstance(k, str):
                raise ConfigError(f"{where}: key {k!r} is not a string; expected string keys")
            out[k] = plain(v, f"{where}.{k}")
        return out
    if isinstance(value, np.ndarray):
        return plain(value.tolist(), where)
    if isinstance(value, (list, tuple)):
        return [plain(v, f"{where}.{i}") for i, v in enumerate(value)]
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    raise ConfigError(f"{where} = {value!r}: expected plain data (numbers, strings, booleans, "
                      "lists, tables): a sweep carries configs to its workers as data (a "
                      "'function' term cannot be swept; an 'expression' term can)")


# ------------------------------------------------------------------ paths

def split_path(path):
    """``"potential.0.stiffness"`` -> ``["potential", 0, "stiffness"]``."""
    return [int(p) if p.isdigit() else p for p in path.split(".")]


def set_path(config, path, value):
    """Set ``path`` (dotted) in the nested ``config`` (tables are created where missing)."""
    node = config
    parts = split_path(path)
    for i, part in enumerate(parts):
        last = i == len(parts) - 1
        here = ".".join(map(str, parts[:i])) or "the config"
        if isinstance(node, list):
            if not isinstance(part, int) or not 0 <= part < len(node):
                raise ConfigError(f"axis {path!r}: {here} is an array of {len(node)} tables; "
                                  f"expected an index 0 to {len(node) - 1} after it, got {part!r}")
        elif isinstance(node, dict):
            if isinstance(part, int):
                raise ConfigError(f"axis {path!r}: {here} is a table; expected a key name after "
                                  f"it, got the index {part}")
            if not last and part not in node:
                node[part] = [] if part == "potential" else {}
        else:
            raise ConfigError(f"axis {path!r}: {here} = {node!r} is a value; expected a table")
        if last:
            node[part] = copy.deepcopy(value)
        else:
            node = node[part]
            if part == "potential" and isinstance(node, dict):     # one term given as a table
                raise ConfigError(f"axis {path!r}: potential is a single table; write it as an "
                                  "array of tables ([[potential]]) to sweep its keys")


# ------------------------------------------------------------------ axes

def axis_values(path, spec, errors):
    """The list of plain values of one axis: a sequence, or a table of start, stop, count and
    spacing ("linear" or "log"). Problems go to ``errors``; returns None then."""
    if isinstance(spec, dict):
        return _range(path, spec, errors)
    if isinstance(spec, (str, bytes)) or not hasattr(spec, "__len__") and not hasattr(spec, "__iter__"):
        errors.add(f"axes.{path}", spec, "an array of values, or a table of start, stop, count "
                                         "(and spacing = 'linear' or 'log')")
        return None
    try:
        values = plain(list(spec), f"axes.{path}")
    except ConfigError as exc:
        errors.messages.extend(exc.messages)
        return None
    if not values:
        errors.add(f"axes.{path}", spec, "at least one value")
        return None
    return values


def _range(path, spec, errors):
    where = f"axes.{path}"
    unknown = [k for k in spec if k not in RANGE_KEYS]
    for k in unknown:
        close = difflib.get_close_matches(str(k), RANGE_KEYS, n=1)
        errors.note(f"{where}.{k}: unknown key" + (f" (did you mean {close[0]!r}?)" if close else "")
                    + f"; valid keys: {', '.join(RANGE_KEYS)}")
    bad = bool(unknown)
    ends = []
    for key in ("start", "stop"):
        v = spec.get(key)
        if key not in spec:
            errors.note(f"{where}.{key} is missing: expected a number")
            bad = True
        elif not _real(v):
            errors.add(f"{where}.{key}", v, "a finite number")
            bad = True
        else:
            ends.append(float(v))
    count = spec.get("count")
    if "count" not in spec:
        errors.note(f"{where}.count is missing: expected an integer >= 1")
        bad = True
    elif isinstance(count, bool) or not isinstance(count, numbers.Integral) or count < 1:
        errors.add(f"{where}.count", count, "an integer >= 1")
        bad = True
    spacing = spec.get("spacing", "linear")
    if spacing not in SPACINGS:
        errors.add(f"{where}.spacing", spacing, "'linear' or 'log'")
        bad = True
    elif spacing == "log" and len(ends) == 2 and not (ends[0] > 0 and ends[1] > 0):
        errors.add(f"{where}", plain(spec), "start > 0 and stop > 0 for spacing = 'log'")
        bad = True
    if bad:
        return None
    count = int(count)
    if spacing == "log":
        return np.geomspace(ends[0], ends[1], count).tolist()
    return np.linspace(ends[0], ends[1], count).tolist()


def _real(v):
    return isinstance(v, numbers.Real) and not isinstance(v, bool) and math.isfinite(v)


def flatten_axes(table, prefix=""):
    """TOML's dotted keys nest (``potential.0.stiffness = [...]`` is a table of tables):
    back to ``{"potential.0.stiffness": [...]}``. A range table (with ``start``) is a leaf."""
    out = {}
    for key, value in table.items():
        path = f"{prefix}.{key}" if prefix else str(key)
        if isinstance(value, dict) and "start" not in value and "count" not in value:
            out.update(flatten_axes(value, path))
        else:
            out[path] = value
    return out


# ------------------------------------------------------------------ plan

@dataclass
class Plan:
    """A validated sweep definition.

    ``points`` lists, per point, the value of every axis (in ``axes`` order);
    run ``i`` is point ``i // replicates``, replicate ``i % replicates``.
    """

    base: dict
    axes: dict
    combine: str
    replicates: int
    seed: int
    base_path: str = None
    points: list = field(default_factory=list)
    sweep_file: str = None

    @property
    def n_runs(self):
        return len(self.points) * self.replicates

    @property
    def keys(self):
        return list(self.axes)

    def seeds(self):
        """The integer seed of every run (see the module docstring)."""
        children = np.random.SeedSequence(self.seed).spawn(self.n_runs)
        return [int(c.generate_state(1, dtype=np.uint64)[0]) & seeding.MAX_SEED for c in children]

    def point(self, run):
        return dict(zip(self.axes, self.points[run // self.replicates]))

    def configs(self):
        """(run index, point values, replicate, seed, config) of every run."""
        for i, seed in enumerate(self.seeds()):
            values = self.point(i)
            cfg = copy.deepcopy(self.base)
            for path, value in values.items():
                set_path(cfg, path, value)
            cfg["seed"] = seed
            output = cfg.get("output")
            if isinstance(output, dict):
                output.pop("path", None)
            yield i, values, i % self.replicates, seed, cfg

    def definition(self):
        """What must match for a resume: plain JSON."""
        return {"base": self.base, "axes": self.axes, "combine": self.combine,
                "replicates": self.replicates, "seed": self.seed}


def make_plan(base, axes, combine="grid", replicates=1, errors=None):
    """Validate a sweep definition into a :class:`Plan`.

    ``base`` is a config mapping or a TOML path; ``axes`` maps dotted paths to
    sequences of values or range tables. Every problem is collected and raised
    together as one :class:`ConfigError` (or added to ``errors`` when given).
    """
    own = errors is None
    errors = Errors() if own else errors
    from .. import config as _config
    mapping = base_path = None
    if isinstance(base, (str, os.PathLike)):
        base_path = os.fspath(base)
        try:
            mapping, _ = _config.read(base_path)
        except ConfigError as exc:
            errors.messages.extend(exc.messages)
    elif isinstance(base, dict):
        try:
            mapping = plain(base, "base")
        except ConfigError as exc:
            errors.messages.extend(exc.messages)
    else:
        errors.add("base", base, "a config mapping or the path of a TOML config file")
    if mapping is not None:
        try:
            mapping = plain(mapping, "base")
        except ConfigError as exc:
            errors.messages.extend(exc.messages)
            mapping = None
    if combine not in COMBINE:
        close = difflib.get_close_matches(str(combine), COMBINE, n=1)
        errors.add("combine", combine, "'grid' (every combination) or 'zip' (axes walked together)"
                   + (f" (did you mean {close[0]!r}?)" if close else ""))
    if isinstance(replicates, bool) or not isinstance(replicates, numbers.Integral) or replicates < 1:
        errors.add("replicates", replicates, "an integer >= 1")
    values = {}
    if not isinstance(axes, dict) or not axes:
        errors.add("axes", axes, "a table of dotted config keys, each with an array of values "
                                 "(e.g. 'potential.0.stiffness': [1e-6, 2e-6])")
        axes = {}
    for path, spec in axes.items():
        path = str(path)
        reserved = [r for r in RESERVED if path == r or path.startswith(r + ".")]
        if reserved:
            errors.note(f"axes.{path}: cannot be swept: {RESERVED[reserved[0]]}")
            continue
        parts = path.split(".")
        if not all(parts) or not parts[0].strip():
            errors.add("axes", path, "dotted config keys such as 'medium.temperature'")
            continue
        v = axis_values(path, spec, errors)
        if v is not None:
            values[path] = v
    for a in values:
        for b in values:
            if a != b and b.startswith(a + "."):
                errors.note(f"axes.{a} and axes.{b} overlap: expected each key swept once")
    if combine == "zip" and len({len(v) for v in values.values()}) > 1:
        lengths = ", ".join(f"{k}: {len(v)}" for k, v in values.items())
        errors.note(f"combine = 'zip' walks the axes together: expected arrays of equal length, "
                    f"got {lengths}")
    if mapping is not None and values:
        for path, v in values.items():    # the path must lead somewhere in the config
            try:
                set_path(copy.deepcopy(mapping), path, v[0])
            except ConfigError as exc:
                errors.messages.extend(exc.messages)
    if own:
        errors.raise_if_any()
    if errors.messages:
        return None
    seed = mapping.get("seed")
    if seed is None:
        seed = seeding.fresh_seed()
    elif isinstance(seed, bool) or not isinstance(seed, int) or not 0 <= seed <= seeding.MAX_SEED:
        raise ConfigError(f"base seed = {seed!r}: expected an integer 0 ... {seeding.MAX_SEED}")
    if combine == "grid":
        points = [list(p) for p in itertools.product(*values.values())]
    else:
        points = [list(p) for p in zip(*values.values())]
    return Plan(mapping, values, combine, int(replicates), seed, base_path, points)


def read_sweep_file(path):
    """A sweep file (TOML) -> :class:`Plan`, every problem named in one ConfigError.

    Keys: ``base`` (a config path relative to the sweep file, or an inline config table),
    ``[axes]`` (dotted key = array of values, or a table of start, stop, count and
    spacing = "linear" | "log"), optional ``replicates`` (default 1) and ``combine``
    ("grid", default, or "zip").
    """
    path = os.fspath(path)
    try:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    except FileNotFoundError:
        raise ConfigError(f"{path}: no such sweep file") from None
    except IsADirectoryError:
        raise ConfigError(f"{path}: is a folder; expected a sweep file (TOML)") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML: {exc}") from None
    errors = Errors(path)
    for key in data:
        if key not in SWEEP_FILE_KEYS:
            close = difflib.get_close_matches(key, SWEEP_FILE_KEYS, n=1)
            errors.note(f"{key}: unknown key" + (f" (did you mean {close[0]!r}?)" if close else "")
                        + f"; valid keys: {', '.join(SWEEP_FILE_KEYS)}")
    base = data.get("base")
    if base is None:
        errors.note("base is missing: expected the path of a config file (relative to the sweep "
                    "file) or an inline table [base]")
        base = {}
    elif isinstance(base, str):
        base = os.path.join(os.path.dirname(path), base)
    axes = data.get("axes", {})
    plan = make_plan(base, flatten_axes(axes) if isinstance(axes, dict) else axes,
                     data.get("combine", "grid"), data.get("replicates", 1), errors=errors)
    errors.raise_if_any()
    plan.sweep_file = path
    return plan
