"""Configs whose langsim 0.1.0 outputs are stored beside this file (regression data).

Written once with langsim 0.1.0 (commit e5be72e) by ``python tests/data/regression/configs.py``;
the regression test compares today's engine with these arrays.
"""
CONFIGS = {
    "em-2d-trap": {
        "seed": 11, "particles": {"count": 5, "dimensions": 2, "radius": 0.5e-6},
        "potential": [{"type": "harmonic", "stiffness": [1e-6, 3e-6], "center": [1e-7, 0.0]}],
        "dynamics": {"dt": 1e-4, "steps": 400}, "output": {"every": 2}},
    "lm-double-well": {
        "seed": 12, "particles": {"count": 70, "radius": 0.5e-6},
        "potential": [{"type": "double-well", "barrier_kT": 3.0, "separation": 4e-7}],
        "dynamics": {"scheme": "leimkuhler-matthews", "dt": 2e-5, "steps": 300}},
    "baoab-3d": {
        "seed": 13, "particles": {"count": 4, "dimensions": 3, "radius": 1e-6, "density": 2000.0},
        "potential": [{"type": "harmonic", "stiffness": [1e-5, 1e-5, 2e-6]},
                      {"type": "constant-force", "force": [0.0, 0.0, 1e-13]}],
        "dynamics": {"regime": "underdamped", "dt": 1e-8, "steps": 500}, "output": {"every": 5}},
    "periodic-tilt-em": {
        "seed": 14, "particles": {"count": 3, "dimensions": 1, "radius": 0.5e-6},
        "potential": [{"type": "periodic", "barrier_kT": 4.0, "period": 1e-6, "tilt": 1e-14},
                      {"type": "harmonic", "stiffness": 1e-7}],
        "dynamics": {"dt": 1e-4, "steps": 200}},
    "gaussian-well-burn-in": {
        "seed": 15, "particles": {"count": 66, "dimensions": 3, "radius": 0.5e-6},
        "potential": [{"type": "gaussian-well", "depth_kT": 8.0, "waist": 1e-6}],
        "dynamics": {"dt": 5e-5, "steps": 100}, "output": {"every": 10}},
    "expression-2d": {
        "seed": 16, "particles": {"count": 2, "dimensions": 2, "radius": 0.5e-6, "burn_in": 0.002},
        "potential": [{"type": "expression", "energy": "a*(x**2 + y**2)**2 + b*x*y",
                       "parameters": {"a": 1e10, "b": 1e-7}}],
        "dynamics": {"dt": 1e-4, "steps": 100}},
    "oscillating-trap-lm": {
        "seed": 17, "particles": {"count": 1, "radius": 0.5e-6, "initial": [2e-7]},
        "potential": [{"type": "harmonic", "stiffness": 2e-6, "amplitude": 1e-7, "frequency": 50.0,
                       "phase": 0.3}],
        "dynamics": {"scheme": "leimkuhler-matthews", "dt": 1e-4, "steps": 333}},
    "free-underdamped": {
        "seed": 18, "particles": {"count": 3, "dimensions": 2, "radius": 1e-6, "mass": 1e-14},
        "dynamics": {"regime": "underdamped", "dt": 1e-7, "steps": 64}},
}

if __name__ == "__main__":
    import os
    import numpy as np
    import langsim
    from langsim.kernels import noise
    from langsim import seeding
    here = os.path.dirname(os.path.abspath(__file__))
    for name, cfg in CONFIGS.items():
        traj = langsim.run(cfg, progress=False)
        arrays = {"time": traj.time, "positions": np.asarray(traj.positions)}
        if traj.velocities is not None:
            arrays["velocities"] = np.asarray(traj.velocities)
        np.savez_compressed(os.path.join(here, name + ".npz"), **arrays)
    # raw dynamics noise of seed 11: particles 0..2, components 0..1, steps 0..9, and from step 1001
    key = seeding.kernel_key(11)
    rows = [noise.normals(key, p, c, s0, 10) for p in range(3) for c in range(2) for s0 in (0, 1001)]
    np.save(os.path.join(here, "noise-seed-11.npy"), np.array(rows))
