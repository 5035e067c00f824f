"""Property tests of issue 8's classes of bad input (hypothesis, bounded examples).

Each class (config mappings with odd values, TOML texts, energy expressions,
damaged trajectory files) either is accepted or ends in ``ConfigError`` / exit
code 2 with a one-paragraph message that says what was expected, within a time
limit: never another exception, a traceback or a hang. The expectations are the
project's contract (README: exit codes and the message template); the concrete
inputs the adversarial test found are in tests/data/bad-inputs (test_bad_inputs.py).
"""
import copy
import os
import shutil
import warnings

import h5py
import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from test_bad_inputs import (CORPUS, assert_usage_message, damage, good_file,  # noqa: F401
                             run_cli, time_limit, verb_args)

from langsim import config, guards, potentials
from langsim.validation import ConfigError

#: Examples per property: the whole suite stays within its time budget on 2 cores.
EXAMPLES = 40
FUZZ = settings(max_examples=EXAMPLES, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture,
                                       HealthCheck.data_too_large])

BASE = {
    "seed": 3,
    "particles": {"count": 2, "dimensions": 2, "radius": 5e-7, "density": 1050.0},
    "medium": {"temperature": 295.0, "viscosity": "water"},
    "potential": [{"type": "harmonic", "stiffness": [1e-6, 2e-6], "center": [0.0, 1e-7]}],
    "dynamics": {"dt": 1e-5, "steps": 100},
    "output": {"every": 1},
}
KEYS = [("seed",), ("particles", "count"), ("particles", "dimensions"), ("particles", "radius"),
        ("particles", "density"), ("particles", "mass"), ("particles", "friction"),
        ("particles", "initial"), ("particles", "burn_in"), ("medium", "temperature"),
        ("medium", "viscosity"), ("potential", 0, "type"), ("potential", 0, "stiffness"),
        ("potential", 0, "center"), ("dynamics", "dt"), ("dynamics", "steps"),
        ("dynamics", "duration"), ("dynamics", "regime"), ("dynamics", "scheme"),
        ("output", "every"), ("output", "precision"), ("output", "compression"),
        ("output", "velocities"), ("output", "checkpoint_every"), ("output", "path")]
#: Other terms whose keys the fuzzer also fills (double-well, gaussian-well, periodic, expression).
TERMS = [{"type": "double-well", "barrier_kT": 5.0, "separation": 1e-6, "stiffness": 1e-6},
         {"type": "gaussian-well", "depth": 1e-20, "waist": 1e-6},
         {"type": "periodic", "barrier": 1e-20, "period": 1e-6},
         {"type": "expression", "energy": "k*x**2 + y**2*1e-7", "parameters": {"k": 1e-7}}]


def _deep_list(depth):
    value = [1.0]
    for _ in range(depth):
        value = [value]
    return value


NUMBERS = st.one_of(
    st.integers(min_value=-2**70, max_value=2**70),
    st.sampled_from([0, 1, 2, 3, 2**53 + 1, 2**63, 10**400, 5e-324, 1e-310, 1e-300, 1e300,
                     1e308, -0.0, float("inf"), float("nan")]),
    st.floats(allow_nan=True, allow_infinity=True),
)
NUMPY = st.one_of(
    NUMBERS.filter(lambda v: abs(v) < 1e300 if isinstance(v, int) else True).flatmap(
        lambda v: st.sampled_from([np.float64(float(v)), np.float32(float(v)),
                                   np.array(float(v)), np.array([float(v)]),
                                   np.array([float(v)] * 2), np.array([float(v)] * 3)])),
    st.integers(min_value=-2**62, max_value=2**62).map(np.int64),
    st.sampled_from([np.bool_(True), np.array("water"), np.array(["water"]), np.array([]),
                     np.zeros((2, 2)), np.array([1, 2], dtype=object)]),
)
ODD = st.one_of(
    st.none(), st.booleans(), st.text(max_size=12),
    st.sampled_from(["\ud800", "water\x00", "", " ", "nan", "1e-6", "baoab", "double",
                     _deep_list(3000)]),
    st.lists(NUMBERS, max_size=4), st.dictionaries(st.text(max_size=3), NUMBERS, max_size=2),
)
VALUES = st.one_of(NUMBERS, NUMPY, ODD)


def _set(mapping, path, value):
    node = mapping
    for key in path[:-1]:
        node = node[key]
    if value is None and isinstance(node, dict):
        node.pop(path[-1], None)
    else:
        node[path[-1]] = value


def _accepted_or_refused(source):
    """config.load(source) and the memory estimate: a RunSpec or a ConfigError, in time."""
    with time_limit(), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            spec = config.load(source)
            guards.require_memory(spec, keep_frames=True)
        except ConfigError as exc:
            text = "\n".join(exc.messages)
            assert_usage_message(2, "error: " + text, [])
            return None
    return spec


@FUZZ
@given(st.lists(st.tuples(st.sampled_from(KEYS), VALUES), min_size=1, max_size=3),
       st.sampled_from([None] + TERMS), st.data())
def test_config_mappings_are_accepted_or_refused_with_a_message(changes, term, data):
    """Odd values (numpy scalars and arrays, huge integers, subnormals, surrogates,
    deep nesting) for every key, also for the keys of other terms."""
    mapping = copy.deepcopy(BASE)
    if term is not None:
        mapping["potential"] = [dict(term)]
        key = data.draw(st.sampled_from(sorted(k for k in term if k != "type")))
        changes = changes + [(("potential", 0, key), data.draw(VALUES))]
    for path, value in changes:
        try:
            _set(mapping, path, value)
        except (KeyError, IndexError, TypeError):
            pass
    _accepted_or_refused(mapping)


def test_the_fuzzed_base_config_is_accepted():
    """The wrong-input side: the base of the mapping fuzzer and each of its terms are valid."""
    assert _accepted_or_refused(copy.deepcopy(BASE)) is not None
    for term in TERMS:
        assert _accepted_or_refused({**copy.deepcopy(BASE), "potential": [dict(term)]}) is not None


# ---------------------------------------------------------------------- expressions

ATOMS = st.one_of(
    st.sampled_from(["x", "y", "t", "k", "z", "pi", "e", "1", "0", "2.5", "1e308", "1e-320",
                     "10", "1e400", "_p0", "k2", "__import__", "x.real", "[x]", "'s'", "True",
                     "\ud800", "é"]),
    st.integers(min_value=-10**30, max_value=10**30).map(str),
)
EXPRESSIONS = st.recursive(ATOMS, lambda inner: st.one_of(
    st.tuples(inner, st.sampled_from(["+", "-", "*", "/", "**", "^", "%", "//", " if "]),
              inner).map(lambda p: f"({p[0]}{p[1]}{p[2]})"),
    st.tuples(st.sampled_from(["exp", "log", "sqrt", "sin", "cos", "tanh", "Abs", "foo",
                               "eval"]), inner).map(lambda p: f"{p[0]}({p[1]})"),
    inner.map(lambda s: "-" + s)), max_leaves=24)
LONG = st.tuples(EXPRESSIONS, st.sampled_from(["+", "*", "-", "**"]),
                 st.integers(min_value=2, max_value=3000)).map(lambda p: p[1].join([p[0]] * p[2]))


@FUZZ
@given(st.one_of(EXPRESSIONS, LONG, st.integers(0, 6000).map(lambda n: "-" * n + "x")),
       st.dictionaries(st.sampled_from(["k", "k2", "_p0", "x", "if", 3, "\ud800"]),
                       st.one_of(st.floats(-1e3, 1e3), st.sampled_from([1e308, np.float64(2.0)])),
                       max_size=3))
def test_energy_expressions_are_accepted_or_refused_with_a_message(energy, parameters):
    """Power towers, long sums, deep nesting, complex constants, odd parameter names:
    refused at validation, or accepted with a kernel source that Python can compile."""
    mapping = copy.deepcopy(BASE)
    mapping["potential"] = [{"type": "expression", "energy": f"1e-20*({energy})",
                             "parameters": parameters}]
    spec = _accepted_or_refused(mapping)
    if spec is not None:
        with time_limit():
            user = potentials.user_terms(list(spec.terms), spec.particles.dimensions)
        compile(user.source, "<user term>", "exec")


# ------------------------------------------------------------------------- TOML text

BASE_TOML = (CORPUS / "base.toml").read_text()
JUNK = st.one_of(st.text(max_size=40), st.sampled_from(
    ["[", "]]", "{", "\x00", "\ufeff", '"""', "'''", "a.b.c.d = 1", "[[potential]]",
     "x = " + "[" * 500, "k = " + "9" * 5000, "\\u0000", "= =", "\n[particles]\n"]))


@FUZZ
@given(st.lists(st.tuples(st.integers(0, len(BASE_TOML)), JUNK), max_size=3),
       st.sampled_from(["utf-8", "utf-8-sig", "utf-16", "utf-32", "latin-1", "cp1252"]),
       st.binary(max_size=8))
def test_toml_texts_are_accepted_or_refused_with_a_message(tmp_path_factory, inserts, codec,
                                                         raw):
    """Junk inserted anywhere, other encodings, stray bytes: accepted or refused with a message."""
    text = BASE_TOML
    for at, junk in sorted(inserts, reverse=True):
        text = text[:at] + junk + text[at:]
    data = text.encode(codec, errors="replace") + raw
    path = tmp_path_factory.mktemp("toml") / "fuzzed.toml"
    path.write_bytes(data)
    _accepted_or_refused(str(path))


# --------------------------------------------------------------------- damaged files

ROOT_ATTRS = ["config", "n_frames", "format_version", "state", "status", "seed", "created",
              "langsim_version", "format"]
CHECKPOINT_ATTRS = ["step", "slot", "n_frames", "stored_frames", "tail_frames"]
ATTR_VALUES = st.one_of(
    st.integers(min_value=-2**63, max_value=2**63 - 1), st.floats(), st.text(max_size=20),
    st.sampled_from(["{}", "[]", '{"particles": 1}', "null", "complete", "running", b"\xff\xfe",
                     "1", "101", "100", "-1"]),
    st.lists(st.integers(-5, 5), min_size=1, max_size=3).map(np.array))
MUTATIONS = st.one_of(
    st.tuples(st.just("set_attr"), st.just("/"), st.sampled_from(ROOT_ATTRS), ATTR_VALUES),
    st.tuples(st.just("set_attr"), st.just("checkpoint"), st.sampled_from(CHECKPOINT_ATTRS),
              ATTR_VALUES),
    st.tuples(st.just("del_attr"), st.just("/"), st.sampled_from(ROOT_ATTRS)),
    st.tuples(st.just("del_attr"), st.just("checkpoint"), st.sampled_from(CHECKPOINT_ATTRS)),
    st.tuples(st.just("del"), st.sampled_from(["time", "positions", "checkpoint",
                                               "checkpoint/positions"])),
    st.tuples(st.just("resize"), st.sampled_from(["time", "positions"]), st.integers(0, 200)),
    st.tuples(st.just("truncate"), st.floats(0.0, 0.99)),
).map(list)


@settings(max_examples=EXAMPLES, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(st.lists(MUTATIONS, min_size=1, max_size=2), st.sampled_from(["info", "check", "resume"]))
def test_damaged_files_give_exit_2_or_work_and_are_never_spoilt(good_file, tmp_path_factory, capsys,
                                                               mutations, verb):
    """Attributes and datasets of a real file mutated: info, check and --resume end with
    0/1 or exit 2 naming the file; a refused file is left as it was."""
    cfg, good = good_file
    path = tmp_path_factory.mktemp("damaged") / "file.h5"
    shutil.copyfile(good, path)
    try:
        damage(path, mutations)
    except (KeyError, TypeError, ValueError, OSError):
        return                      # h5py cannot store that value there: nothing to test
    before = path.read_bytes()
    code, err = run_cli(verb_args(verb, cfg, path), capsys)
    assert code in (0, 1, 2), (code, err)
    if code == 2:
        assert_usage_message(code, err, [])
        assert path.read_bytes() == before
    assert not [n for n in os.listdir(path.parent) if n.endswith(".part")]
    if code == 0 and verb == "resume":
        with h5py.File(path, "r") as f:
            assert f.attrs["state"] == "complete"
