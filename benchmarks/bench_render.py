"""Camera rendering speed: 512 x 512 frames with 100 emitters, frames per second.

Rows (best of ``--repeat`` timings of ``--frames`` frames):

* ``numpy Poisson floor``: ``Generator.poisson(mu)`` on the frame's expected image, i.e.
  drawing the frame's photon noise alone (what any renderer must at least do);
* ``langsim, 1 thread`` / ``2 threads``: :func:`langsim.measurement.render.render_frame`
  (spots along a 16-sample path per emitter, erf pixel integrals, counter-based Poisson,
  read noise, ADC), and the same with an EM register.

Usage: ``python benchmarks/bench_render.py [--repeat 5] [--frames 20]``. The table is
printed and written to ``benchmarks/results/render.json``.
"""
import argparse
import json
import os
import platform

import numba
import numpy as np

from langsim import config
from bench_noise import best          # the same best-of-n timer (this folder)
from langsim.measurement import render

HERE = os.path.dirname(os.path.abspath(__file__))


def camera(em):
    m = {"frame_rate": 100.0, "exposure": 0.01, "pixel_size": 100e-9, "image_shape": [512, 512],
         "psf_sigma": 130e-9, "photons": 2000.0, "background": 20.0, "read_noise": 1.6, "gain": 2.0}
    if em:
        m.update(em_gain=300.0, read_noise=50.0)
    return config.load({"seed": 1, "particles": {"dimensions": 2, "radius": 1e-7},
                        "dynamics": {"dt": 1e-3, "duration": 0.1}, "measurement": m}).measurement.camera


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--frames", type=int, default=20)
    args = ap.parse_args()
    rng = np.random.default_rng(1)
    n_emit, n_taps = 100, 16
    centre = rng.uniform(-24e-6, 24e-6, (1, n_emit, 2))
    path = centre + np.cumsum(rng.normal(0, 20e-9, (n_taps, n_emit, 2)), axis=0)
    w = np.full(n_taps, 1.0 / (n_taps - 1))
    w[0] = w[-1] = 0.5 / (n_taps - 1)
    key = render.measurement_key(1)
    rows = []
    cam = camera(False)
    spots = render.spots_from_path(path, w, np.full(n_emit, 2000.0), cam)
    mu = render.render_frame(spots, cam, 0, key, noise=False)
    gen = np.random.default_rng(2)
    floor = best(lambda: [gen.poisson(mu) for _ in range(args.frames)], args.repeat) / args.frames
    rows.append(("numpy Poisson floor (photon noise only)", 1, floor))
    threads0 = numba.get_num_threads()
    for em in (False, True):
        cam = camera(em)
        for th in (1, 2):
            if th > numba.config.NUMBA_NUM_THREADS:
                continue
            numba.set_num_threads(th)
            t = best(lambda: [render.render_frame(spots, cam, f, key) for f in range(args.frames)],
                     args.repeat) / args.frames
            rows.append((f"langsim{' + EM register' if em else ''}, {th} thread{'s' if th > 1 else ''}", th, t))
    numba.set_num_threads(threads0)
    print(f"512 x 512 frames, {n_emit} emitters x {n_taps} path samples, background 20 photons/pixel")
    print(f"{'case':<44} {'ms/frame':>9} {'frames/s':>9} {'x floor':>8}")
    out = []
    for name, th, t in rows:
        print(f"{name:<44} {1e3 * t:9.2f} {1 / t:9.1f} {t / floor:8.2f}")
        out.append({"case": name, "threads": th, "ms_per_frame": 1e3 * t, "frames_per_s": 1 / t,
                    "times_floor": t / floor})
    os.makedirs(os.path.join(HERE, "results"), exist_ok=True)
    with open(os.path.join(HERE, "results", "render.json"), "w") as f:
        json.dump({"machine": platform.platform(), "cpus": os.cpu_count(), "rows": out}, f, indent=2)


if __name__ == "__main__":
    main()
