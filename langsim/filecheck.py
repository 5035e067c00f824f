"""The layout of a trajectory file, validated once when the file is opened.

:func:`validate` reads the root attributes, the stored config, the datasets'
shapes and the checkpoint group of an open file and returns a :class:`Layout`
of plain values; every reader (``load``, ``info``, ``check``, ``--resume``)
works from it. Anything that is not what langsim writes raises
:class:`DamagedFile`, naming the file, the item and what was expected. Only
attributes and shapes are read here (no frames), and h5py is not imported: the
file object comes from :mod:`langsim.trajectory`.
"""
import json
import math
import numbers
from dataclasses import dataclass

import numpy as np

from .validation import ConfigError, _fmt

STATES = ("running", "interrupted", "complete", "failed")


class DamagedFile(ConfigError):
    """A trajectory file whose layout is not what langsim writes.

    Attributes: ``path``, ``item`` (attribute or dataset), ``expected``.
    """

    def __init__(self, path, item, found, expected):
        super().__init__(f"{path}: {item} = {found}: expected {expected} (the file is damaged, "
                         "or was not written by langsim)")
        self.path, self.item, self.expected = path, item, expected


@dataclass
class Layout:
    """What an open trajectory file holds, checked."""

    format_version: int
    config: dict
    n_frames: int              # root attribute: frames known valid when the writer stopped
    state: str
    status: dict
    seed: int
    created: str
    langsim_version: str
    expected_frames: int       # frames of the complete run
    checkpoint_step: int
    checkpoint_frames: int
    checkpoint_slot: int
    stored_frames: int
    tail_frames: int
    velocities: bool
    groups: dict               # {name: valid frames} of frame groups besides the root

    @property
    def valid_frames(self):
        """Frames a reader may use: for a writer still running (or killed), those of the
        last checkpoint."""
        if self.state == "running":
            return min(self.n_frames, self.checkpoint_frames)
        return self.n_frames


def _text(value):
    if isinstance(value, bytes):
        try:
            return value.decode("utf-8")
        except UnicodeDecodeError:
            return None
    return value if isinstance(value, str) else None


def _int(value):
    """An attribute as a Python int, or None (bools and floats are not ints here)."""
    if isinstance(value, np.ndarray) and value.shape in ((), (1,)):
        value = value.reshape(())[()]
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (numbers.Integral, np.integer)):
        return None
    return int(value)


class _Reader:
    def __init__(self, f, path):
        self.f, self.path = f, path

    def fail(self, item, found, expected):
        raise DamagedFile(self.path, item, found, expected)

    def attr(self, obj, name, prefix=""):
        try:
            return obj.attrs[name]
        except KeyError:
            self.fail(prefix + name, "missing", "an attribute written by langsim")
        except (OSError, RuntimeError, TypeError, ValueError) as exc:
            self.fail(prefix + name, f"unreadable ({exc})", "a readable attribute")

    def integer(self, obj, name, low, high=None, prefix=""):
        raw = self.attr(obj, name, prefix)
        v = _int(raw)
        if v is None or v < low or (high is not None and v > high):
            bound = f"an integer >= {low}" + (f" and <= {high}" if high is not None else "")
            self.fail(prefix + name, _fmt(raw), bound)
        return v

    def string(self, obj, name, prefix=""):
        raw = self.attr(obj, name, prefix)
        v = _text(raw)
        if v is None:
            self.fail(prefix + name, _fmt(raw), "a UTF-8 string")
        return v

    def json(self, obj, name, kind=dict):
        text = self.string(obj, name)
        try:
            v = json.loads(text)
        except (ValueError, RecursionError):
            self.fail(name, _fmt(text), "JSON text")
        if not isinstance(v, kind):
            self.fail(name, _fmt(text), f"a JSON {'object' if kind is dict else kind.__name__}")
        return v

    def dataset(self, name, shape_tail, min_rows, prefix=""):
        try:
            ds = self.f[prefix + name]
        except KeyError:
            self.fail(prefix + name, "missing", "a dataset written by langsim")
        except (OSError, RuntimeError, ValueError) as exc:
            self.fail(prefix + name, f"unreadable ({exc})", "a readable dataset")
        shape, dtype = getattr(ds, "shape", None), getattr(ds, "dtype", None)
        if shape is None or dtype is None:
            self.fail(prefix + name, "a group", "a dataset")
        if np.dtype(dtype).kind != "f" or tuple(shape[1:]) != tuple(shape_tail):
            self.fail(prefix + name, f"a dataset of shape {tuple(shape)} and type {dtype}",
                      f"floats of shape (n, {', '.join(map(str, shape_tail))})".replace(", )", ")"))
        if shape[0] < min_rows:
            self.fail(prefix + name, f"{shape[0]} rows", f"at least {min_rows} rows "
                      "(the frames the file says are valid)")
        return ds


def _config_value(r, cfg, keys, check, expected):
    cur = cfg
    for k in keys:
        if not isinstance(cur, dict) or k not in cur:
            r.fail("config", f"without {'.'.join(keys)}", "the resolved config of a langsim run")
        cur = cur[k]
    if not check(cur):
        r.fail(f"config {'.'.join(keys)}", _fmt(cur), expected)
    return cur


def _is_int(v, low=None, high=None):
    return (isinstance(v, int) and not isinstance(v, bool) and (low is None or v >= low)
            and (high is None or v <= high))


def _is_pos(v):
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) and v > 0


def _plain_values(value, depth=0):
    """JSON scalars, lists of them, or (for parameter tables) dicts of them."""
    if value is None or isinstance(value, (bool, str)):
        return True
    if isinstance(value, (int, float)):
        return True
    if isinstance(value, list) and depth < 3:
        return all(_plain_values(v, depth + 1) for v in value)
    if isinstance(value, dict) and depth < 2:
        return all(isinstance(k, str) and _plain_values(v, depth + 1) for k, v in value.items())
    return False


def _check_config(r, cfg):
    count = _config_value(r, cfg, ("particles", "count"), lambda v: _is_int(v, 1),
                          "an integer >= 1")
    d = _config_value(r, cfg, ("particles", "dimensions"), lambda v: _is_int(v, 1, 3), "1, 2 or 3")
    _config_value(r, cfg, ("particles", "friction"),
                  lambda v: isinstance(v, list) and len(v) == d and all(_is_pos(g) for g in v),
                  f"{d} numbers > 0 (kg/s)")
    _config_value(r, cfg, ("medium", "temperature"), _is_pos, "a number > 0 (K)")
    regime = _config_value(r, cfg, ("dynamics", "regime"),
                           lambda v: v in ("overdamped", "underdamped"),
                           "'overdamped' or 'underdamped'")
    if regime == "underdamped":
        _config_value(r, cfg, ("particles", "mass"), _is_pos, "a number > 0 (kg)")
    _config_value(r, cfg, ("dynamics", "scheme"), lambda v: isinstance(v, str), "a scheme name")
    _config_value(r, cfg, ("dynamics", "dt"), _is_pos, "a number > 0 (s)")
    steps = _config_value(r, cfg, ("dynamics", "steps"), lambda v: _is_int(v, 1), "an integer >= 1")
    _config_value(r, cfg, ("dynamics", "duration"), _is_pos, "a number > 0 (s)")
    every = _config_value(r, cfg, ("output", "every"),
                          lambda v: _is_int(v, 1) and steps % v == 0,
                          f"an integer >= 1 dividing dynamics.steps = {steps}")
    velocities = _config_value(r, cfg, ("output", "velocities"), lambda v: isinstance(v, bool),
                               "true or false")
    _config_value(r, cfg, ("particles", "burn_in"),
                  lambda v: isinstance(v, (int, float)) and not isinstance(v, bool) and v >= 0,
                  "a number >= 0 (s)")
    _config_value(r, cfg, ("seed",), lambda v: _is_int(v, 0), "an integer >= 0")
    terms = cfg.get("potential", [])
    if not isinstance(terms, list) or not all(
            isinstance(t, dict) and isinstance(t.get("type"), str) and _plain_values(t)
            for t in terms):
        r.fail("config potential", _fmt(terms), "a list of tables, each with a type and "
               "plain values")
    return count, d, steps, every, velocities


def validate(f, path):
    """Check the layout of the open trajectory file ``f``; returns a :class:`Layout`.

    Raises
    ------
    DamagedFile
        Naming the file, the item and what was expected.
    ConfigError
        When the file is not a langsim trajectory, or of a newer format version.
    """
    from .trajectory import FORMAT, FORMAT_VERSION
    r = _Reader(f, path)
    fmt = f.attrs.get("format")
    if _text(fmt) != FORMAT:
        raise ConfigError(f"{path}: not a langsim trajectory (root attribute format = "
                          f"{_fmt(_text(fmt) if _text(fmt) is not None else fmt)}; expected "
                          f"{FORMAT!r})")
    version = _int(f.attrs.get("format_version"))
    if version is None or version < 1:
        r.fail("format_version", _fmt(f.attrs.get("format_version")), "an integer >= 1")
    if version > FORMAT_VERSION:
        raise ConfigError(f"{path}: format_version = {version}; expected 1 to {FORMAT_VERSION} "
                          "(written by a newer langsim? upgrade langsim)")
    cfg = r.json(f, "config")
    count, d, steps, every, velocities = _check_config(r, cfg)
    expected = steps // every + 1
    state = r.string(f, "state")
    if state not in STATES:
        r.fail("state", _fmt(state), "one of " + ", ".join(map(repr, STATES)))
    status = r.json(f, "status")
    from .trajectory import REASONS
    if ((status.get("reason") not in REASONS and not isinstance(status.get("complete"), bool))
            or not isinstance(status.get("message"), str)
            or not all(status.get(k) is None or _is_int(status.get(k), -1)
                       for k in ("step", "particle"))
            or not (status.get("time") is None or (isinstance(status.get("time"), (int, float))
                                                   and not isinstance(status.get("time"), bool)))):
        r.fail("status", _fmt(status), "a JSON object with reason (one of "
               f"{', '.join(REASONS)}), message, and integer (or null) step and particle")
    seed = r.integer(f, "seed", 0)
    created = r.string(f, "created")
    version_text = r.string(f, "langsim_version")
    n_frames = r.integer(f, "n_frames", 0, expected)
    if state == "complete" and n_frames != expected:
        r.fail("n_frames", n_frames, f"{expected} frames for a complete run "
               f"(steps {steps} / every {every} + 1)")
    time = r.dataset("time", (), n_frames)
    positions = r.dataset("positions", (count, d), n_frames)
    if velocities:
        r.dataset("velocities", (count, d), n_frames)
    cp = "checkpoint/"
    if "checkpoint" not in f:
        r.fail("checkpoint", "missing", "the checkpoint group written by langsim")
    group = f["checkpoint"]
    slot = r.integer(group, "slot", -1, 1, cp)
    step = r.integer(group, "step", -1, steps, cp)
    cp_frames = r.integer(group, "n_frames", 0, expected, cp)
    stored, tail = _counters(r, group, "", cp_frames)
    if slot >= 0:
        if step < 0 or cp_frames != step // every + 1:
            r.fail(cp + "step", step, f"a step between 0 and {steps}, with checkpoint n_frames "
                   f"= step // every + 1 (every = {every}; n_frames is {cp_frames})")
        r.dataset("positions", (count, d), 2, cp)
        if cfg["dynamics"]["regime"] == "underdamped":
            r.dataset("velocities", (count, d), 2, cp)
        if time.shape[0] < cp_frames or positions.shape[0] < stored:
            r.fail("time", f"{time.shape[0]} rows", f"at least the {cp_frames} frames of the "
                   "last checkpoint")
        _tails(r, group, "", ["positions"] + (["velocities"] if velocities else []), tail,
               (count, d))
    elif step != -1 and state == "running":
        r.fail(cp + "step", step, "-1 before the first checkpoint (slot = -1)")
    if state == "complete" and (slot < 0 or step != steps):
        r.fail(cp + "step", step, f"{steps}, the last step, for a complete run")
    groups = _groups(r, f, group, state, slot)
    return Layout(version, cfg, n_frames, state, status, seed, created, version_text, expected,
                  step, cp_frames, slot, stored, tail, "velocities" in f, groups)


def _counters(r, cp_group, name, cp_frames):
    """(stored_frames, tail_frames) of frame group ``name`` in the checkpoint, checked."""
    cp, prefix = "checkpoint/", f"{name}." if name else ""
    stored = _int(cp_group.attrs.get(prefix + "stored_frames", cp_frames))
    tail = _int(cp_group.attrs.get(prefix + "tail_frames", 0))
    if stored is None or not 0 <= stored <= cp_frames:
        r.fail(cp + prefix + "stored_frames", _fmt(cp_group.attrs.get(prefix + "stored_frames")),
               f"an integer between 0 and checkpoint {prefix}n_frames = {cp_frames}")
    if tail is None or tail != cp_frames - stored:
        r.fail(cp + prefix + "tail_frames", _fmt(cp_group.attrs.get(prefix + "tail_frames")),
               f"checkpoint {prefix}n_frames - stored_frames = {cp_frames - stored}")
    return stored, tail


def _tails(r, cp_group, name, data_names, tail, frame_shape=None):
    """The checkpointed frames of an unfinished compressed chunk, when there are any."""
    if not tail:
        return
    for data in data_names:
        item = f"tail_{name}.{data}" if name else f"tail_{data}"
        try:
            ds = cp_group[item]
        except KeyError:
            r.fail("checkpoint/" + item, "missing", "the unfinished chunk of frames")
        shape = tuple(getattr(ds, "shape", ()))
        if (len(shape) < 2 or shape[0] != 2 or shape[1] < tail
                or (frame_shape is not None and shape[2:] != tuple(frame_shape))):
            want = f"(2, >= {tail}" + (f", {', '.join(map(str, frame_shape))})"
                                        if frame_shape is not None else ", ...)")
            r.fail("checkpoint/" + item, f"shape {shape}", want)


def _groups(r, f, cp_group, state, slot):
    """{name: valid frames} of the frame groups besides the root (``measured``, ...)."""
    groups = {}
    for name in f:
        if name == "checkpoint":
            continue
        node = f[name]
        if not hasattr(node, "keys") or "time" not in node:
            continue
        prefix = f"{name}/"
        n = r.integer(node, "n_frames", 0, prefix=prefix)
        time = r.dataset("time", (), n, prefix)
        data = []
        for key in node:
            if key == "time":
                continue
            ds = node[key]
            shape = getattr(ds, "shape", None)
            if shape is None or len(shape) < 1:
                r.fail(prefix + key, "a group or a scalar", "a dataset of frames")
            if shape[0] < n:
                r.fail(prefix + key, f"{shape[0]} rows", f"at least {n} rows (the frames "
                       f"{name}/n_frames says are valid)")
            data.append(key)
        # a complete file needs no checkpoint counters of its groups (a resume does)
        if slot >= 0 and (state != "complete" or f"{name}.n_frames" in cp_group.attrs):
            cp_frames = r.integer(cp_group, f"{name}.n_frames", 0, prefix="checkpoint/")
            stored, tail = _counters(r, cp_group, name, cp_frames)
            if time.shape[0] < cp_frames:
                r.fail(prefix + "time", f"{time.shape[0]} rows", f"at least the {cp_frames} "
                       "frames of the last checkpoint")
            _tails(r, cp_group, name, data, tail)
            if state == "running":
                n = min(n, cp_frames)
        elif state == "running":
            n = 0
        groups[name] = n
    return groups
