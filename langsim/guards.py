"""Bounds on what langsim accepts, checked before anything runs or is created.

* TOML text: size, encoding, nesting and dotted-key length (:func:`toml_text`),
  before the standard parser sees it (a long dotted key makes its memory grow
  with the square of the key's length);
* derived values: friction, mass, diffusion and noise amplitudes, curvatures,
  step counts (:func:`check_derived`): finite, and not so small that they
  underflow to zero in the kernels;
* memory: what a run needs against what the machine has (:func:`require_memory`);
* user function terms: compiled by numba for the kernels' signature at
  validation (:func:`compile_user_function`).

Every refusal is a :class:`~langsim.validation.ConfigError` naming the key, the
value and what was expected.
"""
import math
import os
import re
import sys

from .validation import ConfigError

#: Largest step count of a run, a burn-in or ``[output] every``: times step * dt stay exact
#: integers times dt in float64, and the kernels' int64 counters never overflow.
MAX_STEPS = 2**53
#: Smallest positive derived value the kernels divide by or multiply noise with (the
#: smallest normal float64; below it values lose precision and then become 0).
TINY = sys.float_info.min
#: Largest config file read, bytes.
MAX_CONFIG_BYTES = 16 * 2**20
#: Arrays / inline tables inside each other in a TOML file.
MAX_TOML_NESTING = 32
#: Parts of one dotted key or table header in a TOML file.
MAX_KEY_PARTS = 32
#: Characters of one bare TOML value (a longer integer would fail inside the parser:
#: Python converts at most 4300 digits).
MAX_NUMBER_CHARS = 1000
#: Fraction of the available memory a run may plan to use.
MEMORY_FRACTION = 0.9


# ------------------------------------------------------------------------ TOML text

def toml_text(data, where):
    """The text of a config file's bytes, refused before parsing when too big, not UTF-8,
    or nested/dotted beyond the bounds above."""
    if len(data) > MAX_CONFIG_BYTES:
        raise ConfigError(f"{where}: {len(data) / 2**20:.1f} MiB; expected a config file of at "
                          f"most {MAX_CONFIG_BYTES // 2**20} MiB (give large per-particle arrays "
                          "through the Python API)")
    for bom, name in ((b"\xff\xfe\x00\x00", "UTF-32"), (b"\x00\x00\xfe\xff", "UTF-32"),
                      (b"\xff\xfe", "UTF-16"), (b"\xfe\xff", "UTF-16")):
        if data.startswith(bom):
            raise ConfigError(f"{where}: the file is {name} text (it starts with a {name} "
                              "byte-order mark); expected UTF-8, as TOML requires (save it "
                              "as UTF-8)")
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[:exc.start].count(b"\n") + 1
        raise ConfigError(f"{where}: line {line}: byte 0x{data[exc.start]:02x} is not UTF-8 "
                          "(a file saved as Latin-1 or UTF-16?); expected UTF-8 text, as TOML "
                          "requires") from None
    _scan_toml(text, where)
    return text


_TOKEN = re.compile(r'''
    (?P<string>"""(?:[^\\]|\\.)*?"""(?!")|'\'\'.*?\'\'\'(?!')|"(?:[^"\\\n]|\\.)*"|'[^'\n]*')
  | (?P<comment>\#[^\n]*)
  | (?P<newline>\n)
  | (?P<punct>[\[\]{}=,.])
  | (?P<other>[^\s"'\#\[\]{}=,.]+|[ \t\r]+|.)
''', re.S | re.X)


def _scan_toml(text, where):
    """Bound nesting depth and dotted-key parts, tracking strings and comments."""
    stack = []             # "[" array, "{" inline table, "h" table header
    key_mode, parts, line, line_start = True, 1, 1, True
    for m in _TOKEN.finditer(text):
        kind, tok = m.lastgroup, m.group()
        if kind == "newline":
            line += 1
            if not stack or stack[-1] == "h":
                key_mode, parts, line_start = True, 1, True
            continue
        if kind == "string":
            line += tok.count("\n")
        if kind in ("comment", "other") and (kind == "comment" or not tok.strip()):
            continue
        if kind != "punct":
            if kind == "other" and len(tok) > MAX_NUMBER_CHARS and not key_mode:
                key = text.splitlines()[line - 1].split("=")[0].strip()[:60]
                raise ConfigError(f"{where}: line {line}: {key} = a number written with "
                                  f"{len(tok)} digits; expected a number of at most "
                                  f"{MAX_NUMBER_CHARS} digits")
            line_start = False
            continue
        if tok == "." and key_mode:
            parts += 1
            if parts > MAX_KEY_PARTS:
                raise ConfigError(f"{where}: line {line}: a dotted key of more than "
                                  f"{MAX_KEY_PARTS} parts; expected at most {MAX_KEY_PARTS}")
        elif tok == "=" and key_mode:
            key_mode = False
        elif tok == "[":
            if line_start and not stack:
                stack.append("h")            # [table] or [[array of tables]]
            elif stack and stack[-1] == "h":
                pass
            else:
                stack.append("[")
                if len(stack) > MAX_TOML_NESTING:
                    raise ConfigError(f"{where}: line {line}: arrays or inline tables nested "
                                      f"more than {MAX_TOML_NESTING} deep; expected at most "
                                      f"{MAX_TOML_NESTING}")
        elif tok == "{":
            stack.append("{")
            key_mode, parts = True, 1
            if len(stack) > MAX_TOML_NESTING:
                raise ConfigError(f"{where}: line {line}: arrays or inline tables nested more "
                                  f"than {MAX_TOML_NESTING} deep; expected at most "
                                  f"{MAX_TOML_NESTING}")
        elif tok in "]}":
            if stack and stack[-1] == "h" and tok == "]":
                if text[m.end():m.end() + 1] != "]":
                    stack.pop()
            elif stack:
                stack.pop()
        elif tok == "," and stack and stack[-1] == "{":
            key_mode, parts = True, 1
        line_start = False


# --------------------------------------------------------------------- derived values

def _bad(errors, key, value, what, expected):
    errors.note(f"{key} = {_show(value)}: {what}; expected {expected}")


def _show(value):
    from .validation import _fmt
    return _fmt(value)


def _usable(v):
    """Finite and either 0 or at least the smallest normal float (no underflow)."""
    return math.isfinite(v) and (v == 0 or abs(v) >= TINY)


def check_derived(spec, errors, friction_key="[particles] friction"):
    """Add a message for every derived value a kernel could not use (overflow, underflow).

    ``spec`` is the provisional RunSpec (burn-in not resolved yet); ``friction_key`` names
    the key the friction comes from ("[particles] radius" for Stokes drag).
    """
    p, dyn, med = spec.particles, spec.dynamics, spec.medium
    kT = med.kT
    if not kT >= TINY:
        _bad(errors, "[medium] temperature", med.temperature, f"gives kT = {kT:.3g} J",
             "a temperature whose kT is a normal float (K)")
        return
    for a, g in enumerate(p.friction):
        values = {"friction": g}
        if math.isfinite(g) and g > 0:
            values.update({"diffusion coefficient kT/friction": kT / g, "dt/friction": dyn.dt / g,
                           "noise amplitude sqrt(2 kT dt/friction)": math.sqrt(2 * kT * dyn.dt / g)})
        bad = [(name, v) for name, v in values.items() if not (math.isfinite(v) and v >= TINY)]
        if bad:
            value = p.radius if friction_key.endswith("radius") else g
            _bad(errors, friction_key, value, f"gives {bad[0][0]} = {bad[0][1]:.3g} on axis {a} "
                 "(overflows or underflows in float64)", "a friction (kg/s) between about 1e-290 "
                 "and 1e290, or a radius and viscosity giving one")
            break
    if p.mass is not None:
        m = p.mass
        if not (math.isfinite(m) and m >= TINY):
            key = "[particles] density" if p.density is not None else "[particles] mass"
            _bad(errors, key, p.density if p.density is not None else m,
                 f"gives mass = {m:.3g} kg (overflows or underflows in float64)",
                 "a mass (kg) between about 1e-290 and 1e290")
        elif dyn.regime == "underdamped":
            g = max(p.friction)
            for name, v in (("kT/mass", kT / m), ("friction*dt/mass", g * dyn.dt / m),
                            ("dt/mass", dyn.dt / m)):
                if not (math.isfinite(v) and v >= TINY):
                    _bad(errors, "[particles] mass", m, f"gives {name} = {v:.3g}", "a mass whose "
                         "ratios to kT, friction and dt are finite in float64 (kg)")
                    break
    if not math.isfinite(dyn.duration):
        _bad(errors, "[dynamics] steps", dyn.steps, f"gives a duration of {dyn.duration} s",
             "a finite duration steps * dt (s)")
    for i, term in enumerate(spec.terms):
        _check_term(errors, f"potential[{i}]", term, p.dimensions)


#: Curvatures that are positive by construction, per built-in term name: the key that
#: sets the length scale and how the curvature is named in the message.
_SCALE_KEY = {"double-well": ("separation", "32 barrier/separation^2"),
              "periodic": ("period", "barrier/2 (2 pi/period)^2"),
              "gaussian-well": ("waist", "4 depth/waist^2")}


def _check_term(errors, where, term, d):
    import numpy as np
    if term.code is None:
        return
    try:            # Python float arithmetic raises where the kernels would see inf or 0
        row = term.encode(d)
        curv = np.asarray(term.curvature(d), dtype=float)
    except (ZeroDivisionError, OverflowError):
        row, curv = np.array([math.inf]), np.full(d, math.inf)
    scale = _SCALE_KEY.get(term.name)
    bad_row = not np.all(np.isfinite(row))
    bad_curv = not np.all(np.isfinite(curv)) or (scale is not None and not np.all(
        (curv[[a for a in range(d) if _positive_axis(term, a)]] >= TINY)))
    if bad_row or bad_curv:
        if scale:
            key, formula = scale
            value = getattr(term, key, None)
            what = f"gives a curvature {formula} = {_show(curv.tolist())} N/m"
        else:
            key, value = "type", term.name
            what = f"has parameters {_show(row.tolist())} or curvatures {_show(curv.tolist())}"
        _bad(errors, f"{where}.{key}", list(value) if isinstance(value, tuple) else value,
             what + " (overflows or underflows in float64)",
             "values whose curvature is finite and above 1e-300 N/m")


def _positive_axis(term, a):
    if term.name in ("double-well", "periodic"):
        return a == term.axis
    return term.name == "gaussian-well"


def bounded_steps(where, value, ratio_of, dt, errors):
    """``value / dt`` as a whole number of steps, or None (with a message) when it exceeds
    :data:`MAX_STEPS` or is not finite."""
    ratio = value / dt
    if not math.isfinite(ratio) or ratio > MAX_STEPS:
        errors.note(f"{where} = {_show(value)}: is {ratio:.3g} steps of dt = {dt!r} s; expected "
                    f"at most {MAX_STEPS} steps (2^53) ({ratio_of})")
        return None
    return ratio


# ------------------------------------------------------------------------- memory

def _available_bytes():
    """Memory this process can still use, bytes, or None when it cannot be told."""
    found = []
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    found.append(int(line.split()[1]) * 1024)
    except (OSError, ValueError):
        pass
    for limit_file, usage_file in (("/sys/fs/cgroup/memory.max", "/sys/fs/cgroup/memory.current"),
                                   ("/sys/fs/cgroup/memory/memory.limit_in_bytes",
                                    "/sys/fs/cgroup/memory/memory.usage_in_bytes")):
        try:
            with open(limit_file) as fh:
                limit = fh.read().strip()
            with open(usage_file) as fh:
                usage = int(fh.read().strip())
            if limit != "max" and int(limit) < 2**60:
                found.append(int(limit) - usage)
            break
        except (OSError, ValueError):
            continue
    try:
        import resource
        soft = resource.getrlimit(resource.RLIMIT_AS)[0]
        if soft != resource.RLIM_INFINITY:
            with open("/proc/self/statm") as fh:
                used = int(fh.read().split()[0]) * os.sysconf("SC_PAGE_SIZE")
            found.append(soft - used)
    except (OSError, ValueError, ImportError):
        pass
    return max(0, min(found)) if found else None


def memory_needed(spec, keep_frames):
    """Bytes a run needs, as a dict of named parts (the engine's working set)."""
    from .engine import CHUNK_BYTES
    p, out = spec.particles, spec.output
    state = p.count * p.dimensions * 8
    n_arrays = 2 if out.velocities else 1
    # factors measured with peak RSS (VmHWM) of runs of 10^6 particles in 3D
    work = 6 if spec.dynamics.regime == "underdamped" else 4
    parts = {"state (positions, velocities, noise and force work arrays)": work * state,
             "output buffer of one chunk": max(n_arrays * state, min(CHUNK_BYTES, n_arrays * state
                                                                   * spec.n_frames))}
    if keep_frames:
        item = 4 if out.precision == "single" else 8
        parts["frames kept in memory"] = spec.n_frames * (n_arrays * p.count * p.dimensions
                                                          * item + 8)
    else:
        parts["file buffers (chunk cache, checkpoint)"] = state + 16 * 2**20
    return parts


def _gb(n):
    return f"{n / 1e9:.3g} GB" if n >= 1e8 else f"{n / 1e6:.3g} MB"


def require_memory(spec, keep_frames, available=None):
    """Refuse a run that cannot fit in memory, before anything is created."""
    parts = memory_needed(spec, keep_frames)
    total = sum(parts.values())
    available = _available_bytes() if available is None else available
    if available is None or total <= MEMORY_FRACTION * available:
        return total
    p = spec.particles
    detail = ", ".join(f"{name} {_gb(v)}" for name, v in parts.items())
    hint = ("fewer particles ([particles] count), or fewer frames ([output] every) or an output "
            "file (out=..., [output] path) so that frames are streamed" if keep_frames
            else "fewer particles ([particles] count) or fewer dimensions")
    raise ConfigError(f"[particles] count = {p.count} in {p.dimensions}D: the run needs about "
                      f"{_gb(total)} of memory ({detail}); {_gb(available)} are available; "
                      f"expected {hint}")


# --------------------------------------------------------------------- user functions

def compile_user_function(fn):
    """A numba dispatcher of ``fn`` compiled for (float64[::1], float64, float64[::1]) ->
    float64, or raise :class:`~langsim.validation.Invalid` saying why it cannot be."""
    from .validation import Invalid
    try:
        import numba
        from numba import types
    except ImportError as exc:                       # pragma: no cover - numba is a dependency
        raise Invalid(f"a numba function, but numba cannot be imported ({exc})") from None
    dispatcher = fn if hasattr(fn, "py_func") and hasattr(fn, "compile") else None
    if dispatcher is None:
        try:
            dispatcher = numba.njit(fn, error_model="numpy")
        except Exception as exc:                     # numba refuses the object itself
            raise Invalid(f"a function numba can compile; {_first_line(exc)}") from None
    signature = (types.float64[::1], types.float64, types.float64[::1])
    try:
        dispatcher.compile(signature)
        restype = dispatcher.overloads[signature].signature.return_type
    except Exception as exc:                         # numba's typing/lowering errors vary
        raise Invalid("a function numba compiles as f(x: float64[::1], t: float64, force: "
                      f"float64[::1]) -> float; numba says: {_first_line(exc)}") from None
    if not isinstance(restype, (types.Float, types.Integer)) or isinstance(restype, types.Boolean):
        raise Invalid(f"a function returning the energy as a float (J); it returns {restype}")
    return dispatcher


def _first_line(exc):
    text = " ".join(str(exc).split())
    text = re.sub(r"\x1b\[[0-9;]*m", "", text)
    return text[:300] + ("..." if len(text) > 300 else "")
