"""Validators that return the checked value, and one error message template.

Every message reads ``<where> <key> = <value repr>: expected <what> (<units>)``,
for example ``[medium] temperature = -5.0: expected a number > 0 (K)``.
Errors of one configuration are collected and raised together.
"""
import difflib
import math
import numbers


class ConfigError(ValueError):
    """Invalid input. ``messages`` lists every problem found."""

    def __init__(self, messages):
        if isinstance(messages, str):
            messages = [messages]
        self.messages = list(messages)
        super().__init__("\n".join(self.messages))


def _fmt(value):
    """A short repr for messages, for any value (a 5000-digit integer, an array, ...)."""
    if isinstance(value, int) and not isinstance(value, bool) and value.bit_length() > 200:
        return f"an integer of about {int(value.bit_length() * math.log10(2)) + 1} digits"
    try:
        text = repr(value)
    except Exception:          # a repr that fails is still a value to report
        text = f"<{type(value).__name__}>"
    return text if len(text) <= 80 else text[:77] + "..."


def plain(value):
    """numpy scalars and 0-d arrays as the Python number (or str, bool) they hold; other
    values unchanged. Validators see numpy numbers as numbers through this."""
    import numpy as np
    if isinstance(value, np.ndarray) and value.ndim == 0:
        value = value[()]
    if isinstance(value, np.generic):
        return value.item()
    return value


class Errors:
    """Collects messages; ``raise_if_any`` raises them as one :class:`ConfigError`."""

    def __init__(self, source=None):
        self.source = source
        self.messages = []

    def add(self, path, value, expected, units=None):
        tail = f" ({units})" if units else ""
        self.messages.append(f"{path} = {_fmt(value)}: expected {expected}{tail}")

    def note(self, text):
        self.messages.append(text)

    def raise_if_any(self):
        if self.messages:
            prefix = f"{self.source}: " if self.source else ""
            raise ConfigError([prefix + m for m in self.messages])


class Invalid(Exception):
    """Raised by a validator; the table turns it into a message."""

    def __init__(self, expected):
        super().__init__(expected)
        self.expected = expected


def _is_number(value):
    return isinstance(value, numbers.Real) and not isinstance(value, bool)


def number(low=None, high=None, low_open=True, high_open=False, finite=True):
    """A validator of a real number in an interval; returns a float."""
    parts = []
    if low is not None:
        parts.append(f"{'>' if low_open else '>='} {low:g}")
    if high is not None:
        parts.append(f"{'<' if high_open else '<='} {high:g}")
    what = "a finite number" if not parts else "a number " + " and ".join(parts)

    def check(value):
        value = plain(value)
        if not _is_number(value):
            raise Invalid(what)
        try:
            v = float(value)
        except OverflowError:       # an integer beyond float range
            raise Invalid(what + " (within float range, |x| < 1.8e308)") from None
        if finite and not math.isfinite(v):
            raise Invalid(what)
        if low is not None and (v <= low if low_open else v < low):
            raise Invalid(what)
        if high is not None and (v >= high if high_open else v > high):
            raise Invalid(what)
        return v
    check.expected = what
    return check


def integer(low=None, high=None):
    """A validator of an integer in [low, high]; returns an int."""
    parts = []
    if low is not None:
        parts.append(f">= {low}")
    if high is not None:
        parts.append(f"<= {high}")
    what = "an integer" + (" " + " and ".join(parts) if parts else "")

    def check(value):
        value = plain(value)
        if isinstance(value, bool) or not isinstance(value, numbers.Integral):
            if isinstance(value, float) and value.is_integer():
                value = int(value)
            else:
                raise Invalid(what)
        v = int(value)
        if (low is not None and v < low) or (high is not None and v > high):
            raise Invalid(what)
        return v
    check.expected = what
    return check


def boolean(value):
    value = plain(value)
    if not isinstance(value, bool):
        raise Invalid("true or false")
    return value


def choice(*options):
    """A validator of one of the given strings."""
    what = "one of " + ", ".join(repr(o) for o in options)

    def check(value):
        value = plain(value)
        if not isinstance(value, str) or value not in options:
            close = difflib.get_close_matches(str(value), options, n=1) if isinstance(value, str) else []
            raise Invalid(what + (f" (did you mean {close[0]!r}?)" if close else ""))
        return value
    check.expected = what
    return check


def text(value):
    value = plain(value)
    if not isinstance(value, str) or not value.strip():
        raise Invalid("a non-empty string")
    if "\x00" in value or not _encodable(value):
        raise Invalid("a string without NUL characters or lone surrogates (valid UTF-8)")
    return str(value)


def _encodable(value):
    try:
        value.encode("utf-8")
    except UnicodeEncodeError:
        return False
    return True


def path_like(value):
    """A file name: a string or an os.PathLike (pathlib.Path); returns a str. What the name
    may contain is checked where every output path passes
    (:func:`langsim.trajectory.check_output_path`)."""
    import os
    if isinstance(value, os.PathLike):
        value = os.fspath(value)
        if isinstance(value, bytes):
            value = os.fsdecode(value)
    value = plain(value)
    if not isinstance(value, str) or not value.strip():
        raise Invalid("a non-empty string (a file name)")
    import unicodedata
    bad = [c for c in value if unicodedata.category(c) == "Cc"]
    if bad:         # refused here too, so that a config is wrong whatever -o says
        raise Invalid(f"a file name without control characters (this one holds {bad[0]!r})")
    return str(value)


def per_axis(element, dimensions):
    """A validator of a scalar (all axes) or an array of ``dimensions`` values."""
    def check(value):
        value = plain(value)
        if isinstance(value, (list, tuple)) or hasattr(value, "__array__"):
            try:
                items = list(value.tolist() if hasattr(value, "tolist") else value)
            except TypeError:
                raise Invalid(f"a scalar or an array of {dimensions} values") from None
            if len(items) != dimensions:
                raise Invalid(f"a scalar or an array of {dimensions} values "
                              f"(one per axis; dimensions = {dimensions})")
            try:
                return [element(v) for v in items]
            except Invalid as exc:
                raise Invalid(f"{exc.expected} for every axis") from None
        return [element(value)] * dimensions
    return check


class Table:
    """One table of a configuration, read key by key.

    ``get`` validates and records each key; ``finish`` reports keys that were
    never read as unknown, with a did-you-mean suggestion.
    """

    def __init__(self, errors, path, mapping, key_format="{path}.{key}"):
        self.errors = errors
        self.path = path
        self.key_format = key_format
        self.seen = set()
        self.known = []
        if mapping is None:
            mapping = {}
        if not isinstance(mapping, dict):
            errors.add(path, mapping, "a table of keys")
            mapping = {}
        self.mapping = mapping

    def where(self, key):
        return self.key_format.format(path=self.path, key=key)

    def has(self, key):
        return key in self.mapping

    def get(self, key, validator, default=None, required=False, units=None):
        """The validated value of ``key``, ``default`` when absent."""
        self.known.append(key)
        if key not in self.mapping:
            if required:
                what = getattr(validator, "expected", "a value")
                self.errors.note(f"{self.where(key)} is missing: expected {what}"
                                 + (f" ({units})" if units else ""))
            return default
        self.seen.add(key)
        value = self.mapping[key]
        try:
            return validator(value)
        except Invalid as exc:
            self.errors.add(self.where(key), value, exc.expected, units)
            return default

    def raw(self, key, default=None):
        """The unvalidated value of ``key`` (validated by the caller)."""
        self.known.append(key)
        if key in self.mapping:
            self.seen.add(key)
        return self.mapping.get(key, default)

    def bad(self, key, expected, units=None):
        self.errors.add(self.where(key), self.mapping.get(key), expected, units)

    def finish(self, extra_known=()):
        known = list(self.known) + list(extra_known)
        for key in self.mapping:
            if key not in self.seen and key not in extra_known:
                close = difflib.get_close_matches(str(key), known, n=1)
                hint = f" (did you mean {close[0]!r}?)" if close else ""
                valid = ", ".join(sorted(set(known)))
                self.errors.note(f"{self.where(key)}: unknown key{hint}; valid keys: {valid}")
