"""Every declared key rejects an invalid value with key, value and expectation."""
import copy

import numpy as np
import pytest

from langsim import config
from langsim.validation import ConfigError

BASE = {
    "seed": 1,
    "particles": {"count": 4, "dimensions": 2, "radius": 0.5e-6, "density": 2200.0,
                  "initial": "equilibrium"},
    "medium": {"temperature": 295.15, "viscosity": "water"},
    "potential": [
        {"type": "harmonic", "stiffness": [1e-6, 2e-6], "center": [0.0, 0.0],
         "velocity": 0.0, "amplitude": 0.0, "frequency": 0.0, "phase": 0.0},
        {"type": "double-well", "barrier_kT": 5.0, "separation": 1e-6, "axis": 0,
         "stiffness": 1e-6, "center": 0.0},
        {"type": "periodic", "barrier": 1e-20, "period": 1e-6, "tilt": 0.0, "axis": 1},
        {"type": "gaussian-well", "depth_kT": 8.0, "waist": 1e-6},
        {"type": "constant-force", "force": [0.0, 1e-15]},
        {"type": "expression", "energy": "k*x**2", "parameters": {"k": 1e-7}},
        {"type": "wall", "strength_kT": 100.0, "range": 2e-8, "position": -1e-6, "axis": 1,
         "side": "above", "radius": 0.5e-6, "hydrodynamic": False},
        {"type": "gravity", "acceleration": 9.80665, "axis": 1, "fluid_density": "water"},
    ],
    "dynamics": {"regime": "overdamped", "scheme": "euler-maruyama", "dt": 1e-5, "steps": 100,
                 "allow_unstable": False},
    "output": {"every": 10, "path": "out.h5", "velocities": False, "precision": "double",
               "compression": "gzip", "checkpoint_every": 30.0},
}

# (path to the key, invalid value, fragment of the expectation)
INVALID = [
    (("seed",), -1, "an integer >= 0"),
    (("seed",), 1.5, "an integer"),
    (("particles", "count"), 0, "an integer >= 1"),
    (("particles", "count"), "many", "an integer"),
    (("particles", "dimensions"), 4, "<= 3"),
    (("particles", "radius"), -1e-6, "a number > 0 (m)"),
    (("particles", "radius"), float("nan"), "a number > 0 (m)"),
    (("particles", "density"), 0.0, "a number > 0 (kg/m^3)"),
    (("particles", "friction"), [1e-8, -1e-8], "a number > 0 for every axis"),
    (("particles", "friction"), [1e-8, 1e-8, 1e-8], "an array of 2 values"),
    (("particles", "initial"), "somewhere", "'equilibrium', a point"),
    (("particles", "initial"), [[0.0, 0.0]], "an array of shape (4, 2)"),
    (("particles", "burn_in"), -1.0, "a number >= 0 (s)"),
    (("medium", "temperature"), -5.0, "a number > 0 (K)"),
    (("medium", "temperature"), float("inf"), "a number > 0 (K)"),
    (("medium", "viscosity"), "honey", "a number > 0 or the string 'water'"),
    (("medium", "wall_distance"), -1e-6, "a number > 0 (m)"),
    (("medium", "wall_distance"), 0.4e-6, "a number > [particles] radius = 5e-07"),
    (("medium", "wall_axis"), 3, "an integer >= 0 and <= 2"),
    (("potential", 0, "stiffness"), [1e-6], "an array of 2 values"),
    (("potential", 0, "stiffness"), -1.0, "a number >= 0"),
    (("potential", 0, "center"), "middle", "a finite number"),
    (("potential", 0, "velocity"), [0.0, None], "a finite number"),
    (("potential", 0, "frequency"), -1.0, "a number >= 0 (Hz)"),
    (("potential", 0, "phase"), "zero", "a finite number (rad)"),
    (("potential", 1, "barrier_kT"), 0.0, "a number > 0 (kT)"),
    (("potential", 1, "separation"), -1e-6, "a number > 0 (m)"),
    (("potential", 1, "axis"), 2, "an integer >= 0 and <= 1"),
    (("potential", 2, "barrier"), -1.0, "a number > 0 (J"),
    (("potential", 2, "period"), 0.0, "a number > 0 (m)"),
    (("potential", 2, "tilt"), "left", "a finite number (N)"),
    (("potential", 3, "depth_kT"), -8.0, "a number > 0 (kT)"),
    (("potential", 3, "waist"), 0.0, "a number > 0"),
    (("potential", 4, "force"), [1.0, 2.0, 3.0], "an array of 2 values"),
    (("potential", 5, "energy"), "k*x**", "does not parse"),
    (("potential", 5, "energy"), "", "a non-empty string"),
    (("potential", 5, "parameters"), {"k": "big"}, "a finite number"),
    (("potential", 5, "parameters"), {"x": 1.0}, "a parameter name"),
    (("potential", 0, "type"), "harmonik", "did you mean 'harmonic'"),
    (("potential", 6, "strength_kT"), -1.0, "a number > 0 (kT)"),
    (("potential", 6, "range"), 0.0, "a number > 0 (m)"),
    (("potential", 6, "position"), "glass", "a finite number (m)"),
    (("potential", 6, "axis"), 2, "an integer >= 0 and <= 1"),
    (("potential", 6, "side"), "up", "one of 'above', 'below'"),
    (("potential", 6, "radius"), -1e-6, "a number >= 0 (m)"),
    (("potential", 6, "hydrodynamic"), "yes", "true or false"),
    (("potential", 7, "acceleration"), "down", "a finite number (m/s^2)"),
    (("potential", 7, "axis"), 5, "an integer >= 0 and <= 1"),
    (("potential", 7, "fluid_density"), -3.0, "a number > 0 or the string 'water' (kg/m^3)"),
    (("dynamics", "regime"), "overdamp", "did you mean 'overdamped'"),
    (("dynamics", "scheme"), "baoab", "a scheme of the underdamped regime"),
    (("dynamics", "dt"), 0.0, "a number > 0 (s)"),
    (("dynamics", "steps"), 0, "an integer >= 1"),
    (("dynamics", "allow_unstable"), "yes", "true or false"),
    (("output", "every"), 0, "an integer >= 1"),
    (("output", "every"), 7, "a divisor of the number of steps (100)"),
    (("output", "path"), 5, "a non-empty string"),
    (("output", "velocities"), True, "false: overdamped runs have no velocities"),
    (("output", "precision"), "half", "one of 'double', 'single'"),
    (("output", "compression"), "zip", "one of 'none', 'gzip', 'lzf'"),
    (("output", "checkpoint_every"), 0.0, "a number > 0"),
]


def _set(cfg, path, value):
    node = cfg
    for key in path[:-1]:
        node = node[key]
    node[path[-1]] = value


def _name(path):
    if path[0] == "potential":
        return f"potential[{path[1]}].{path[2]}"
    if len(path) == 1:
        return path[0]
    return f"[{path[0]}] {path[1]}"


def test_base_config_is_valid():
    spec = config.load(copy.deepcopy(BASE))
    assert spec.resolved["potential"][1]["barrier"] == pytest.approx(5 * spec.kT)


@pytest.mark.parametrize("path, value, expected", INVALID, ids=lambda v: str(v))
def test_invalid_value_names_key_value_and_expectation(path, value, expected):
    cfg = copy.deepcopy(BASE)
    _set(cfg, path, value)
    with pytest.raises(ConfigError) as info:
        config.load(cfg)
    text = str(info.value)
    assert _name(path) in text or (path[-2:] and f"parameters.{next(iter(value))}" in text)
    assert expected in text, text


def test_unknown_keys_get_a_suggestion_and_all_errors_come_together():
    cfg = copy.deepcopy(BASE)
    cfg["particles"]["raduis"] = 1e-6
    cfg["dynamic"] = {}
    cfg["medium"]["temperature"] = -1.0
    with pytest.raises(ConfigError) as info:
        config.load(cfg)
    messages = info.value.messages
    assert any("[particles] raduis: unknown key (did you mean 'radius'?)" in m for m in messages)
    assert any("dynamic: unknown key (did you mean 'dynamics'?)" in m for m in messages)
    assert any("[medium] temperature = -1.0" in m for m in messages)


@pytest.mark.parametrize("drop, expected", [
    (("particles", "radius"), "[particles] radius is missing"),
    (("dynamics", "dt"), "[dynamics] dt is missing"),
    (("dynamics", "steps"), "[dynamics] duration is missing"),
    (("potential", 1, "separation"), "potential[1].separation is missing"),
])
def test_missing_required_keys(drop, expected):
    cfg = copy.deepcopy(BASE)
    node = cfg
    for key in drop[:-1]:
        node = node[key]
    del node[drop[-1]]
    with pytest.raises(ConfigError, match=expected.replace("[", r"\[").replace("]", r"\]")):
        config.load(cfg)


def test_underdamped_needs_a_mass():
    cfg = copy.deepcopy(BASE)
    del cfg["particles"]["density"]
    cfg["dynamics"] = {"regime": "underdamped", "dt": 1e-8, "steps": 10}
    cfg["output"] = {}
    with pytest.raises(ConfigError, match=r"\[particles\] mass is missing"):
        config.load(cfg)


def test_toml_file_errors(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("[particles\ncount = 1\n")
    with pytest.raises(ConfigError, match="bad.toml: not valid TOML"):
        config.load(bad)
    with pytest.raises(ConfigError, match="no such config file"):
        config.load(tmp_path / "missing.toml")
    wrong = tmp_path / "wrong.toml"
    wrong.write_text("[medium]\ntemperature = -3.0\n[dynamics]\ndt = 1e-5\nsteps = 1\n"
                     "[particles]\nfriction = 1e-8\n")
    with pytest.raises(ConfigError, match=r"wrong.toml: \[medium\] temperature = -3.0: "
                                          r"expected a number > 0 \(K\)"):
        config.load(wrong)


def test_wall_distance_needs_a_radius_and_a_single_bulk_friction():
    cfg = copy.deepcopy(BASE)
    cfg["medium"]["wall_distance"] = 2e-6
    cfg["particles"]["friction"] = [1e-8, 2e-8]
    with pytest.raises(ConfigError, match=r"\[particles\] friction = \[1e-08, 2e-08\]: expected a single"):
        config.load(cfg)
    del cfg["particles"]["radius"], cfg["particles"]["density"]
    cfg["particles"]["friction"] = 1e-8
    with pytest.raises(ConfigError, match=r"wall_distance = 2e-06: the wall correction needs \[particles\] radius"):
        config.load(cfg)
    cfg = copy.deepcopy(BASE)
    cfg["medium"]["wall_axis"] = 0
    with pytest.raises(ConfigError, match="wall_axis = 0 without wall_distance"):
        config.load(cfg)


def test_gravity_and_wall_take_the_bead_from_particles():
    cfg = copy.deepcopy(BASE)
    del cfg["potential"][6]["radius"]
    spec = config.load(cfg)
    wall, gravity = spec.resolved["potential"][6:8]
    assert wall["radius"] == 0.5e-6 and wall["side"] == "above"
    # m_b = (4/3) pi a^3 (rho_p - rho_water(295.15 K)), Kell 1975 density
    from langsim import units
    mb = 4 / 3 * np.pi * 0.5e-6**3 * (2200.0 - units.water_density(295.15))
    assert gravity["buoyant_mass"] == pytest.approx(mb, rel=1e-12)
    assert gravity["force"] == pytest.approx([0.0, -mb * 9.80665], rel=1e-12)
    del cfg["particles"]["density"]
    with pytest.raises(ConfigError, match=r"potential\[7\].type = 'gravity' needs \[particles\] radius"):
        config.load(cfg)


def test_hydrodynamic_wall_needs_the_friction_stage():
    cfg = copy.deepcopy(BASE)
    cfg["potential"][6]["hydrodynamic"] = True
    cfg["dynamics"]["scheme"] = "leimkuhler-matthews"
    with pytest.raises(ConfigError) as info:
        config.load(cfg)
    text = str(info.value)
    assert ("[dynamics] scheme = 'leimkuhler-matthews': expected 'euler-maruyama' (overdamped) "
            "with potential[6].hydrodynamic = true") in text
    cfg["dynamics"]["scheme"] = "euler-maruyama"
    assert config.load(cfg).particles.wall_friction.axis == 1


def test_per_particle_positions_from_an_array():
    cfg = copy.deepcopy(BASE)
    cfg["particles"]["initial"] = np.zeros((4, 2))
    assert config.load(cfg).resolved["particles"]["initial"] == [[0.0, 0.0]] * 4
