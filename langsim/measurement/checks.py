"""``langsim check`` rows for runs with a ``[measurement]`` table.

Called by :func:`langsim.checks.check` when the resolved config has a
measurement and the trajectory carries group ``measured``. Rows (errors from
particles as independent replicas; pass within 4.5 standard errors):

- free axes: measured displacement variance and lag-1 covariance (positions less
  the recorded drift) against 2 D Dt (1 - 2R) + 2 sigma^2 and 2 R D Dt - sigma^2
  (check-values section 8; R of the recorder's taps, derived), and D and sigma^2
  from the covariance-based estimator and the optimal-points MSD fit against the
  configured D = kT/gamma and localization_error;
- overdamped harmonic axes: variance of the exposure averages against the exact
  value for the recorder's taps on the Euler-Maruyama chain, which tends to Wong &
  Halvorsen's (kT/k) S(W/tau) (shown beside it), and the stiffness from
  :class:`~langsim.analysis.BlurredTrap`;
- images: background pixels (far from every emitter) against the camera model's
  mean g b + baseline and variance F g^2 b + (g/G)^2 r^2 + 1/12 (F = 2 with an EM
  register, else 1; photon statistics of the rendered frames);
- detector: the sensitivity recovered by a maximum-likelihood fit of the
  signal's spectrum with the detector model (corner frequency free, D = kT/gamma known).
"""
import math
import warnings

import numpy as np

from . import formulas
from .spec import Detector, shutter_taps

AXES = "xyz"
SRC_BLUR = "Berglund 2010, PRE 82, 011917; Vestergaard, Blainey & Flyvbjerg 2014, PRE 89, 022726"
#: Localization noise raises the MSD at every lag by 2 sigma^2 (check-values sections 8 and 13).
SRC_LOC = ("Berglund 2010, PRE 82, 011917 (MSD offset 2 sigma^2); Wong & Halvorsen 2006, Opt. Express 14, "
           "12517 (static noise adds to C_0 only)")
SRC_WH = "Wong & Halvorsen 2006, Opt. Express 14, 12517; exact form for the recorder's taps derived"
SRC_CAM = "Poisson photons; EM excess noise F^2 = 2 (Mortensen et al. 2010, Nat. Methods 7, 377)"
SRC_DET = "Berg-Sorensen et al. 2003, J. Appl. Phys. 93, 3167; ML fit as Berg-Sorensen & Flyvbjerg 2004"
#: Fewest particles for errors from replicas.
MIN_REPLICAS = 8
#: Frames of images used for the background check.
BACKGROUND_FRAMES = 50


def _taps(m, dt):
    """(weights, offsets, frame steps) of the exposure average from the resolved table."""
    period = int(round(1.0 / (m["frame_rate"] * dt)))
    exposure = int(round(m["exposure"] / dt))
    w, o = shutter_taps(m["shutter"], exposure, m.get("pulses", 1))
    return w, o, period


def _nanmean(x, axis=0):
    """Mean over finite values; NaN (without a warning) for a particle never seen."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmean(x, axis=axis)


def _replica_row(_row, quantity, per, pred, formula, source, unit, kw, note=""):
    per = per[np.isfinite(per)]
    return _row(quantity, per.mean(), per.std(ddof=1) / math.sqrt(per.size), pred, formula, source, unit,
                note=note, **kw)


def measurement_rows(report, traj, s, kw):
    """Append the rows that apply to ``report`` (see the module notes)."""
    from ..checks import _row
    from .export import measured
    cfg = traj.config
    m = cfg["measurement"]
    try:
        data = measured(traj)
    except ValueError:
        report.notes.append("measurement configured but no group 'measured' in the trajectory; "
                            "measurement checks skipped")
        return
    n_part = int(cfg["particles"]["count"])
    if n_part < MIN_REPLICAS:
        report.notes.append(f"measurement checks need at least {MIN_REPLICAS} particles (replicas); skipped")
        return
    kinds = [s.axis_kind(a) for a in range(s.d)]
    if m.get("frame_rate") and "positions" in data:
        w, o, period = _taps(m, s.dt)
        R = formulas.tap_blur_coefficient(w, o, period)
        interval = period * s.dt
        start = int(math.ceil(report.discarded_time / interval - 1e-9))
        pos = np.asarray(data["positions"][start:], dtype=float)
        drift = np.asarray(data["drift"][start:], dtype=float) if "drift" in data else 0.0
        y = pos - (drift[:, None, :] if np.ndim(drift) else 0.0)
        sig = np.asarray(m["localization_error"], dtype=float)
        free = [a for a in range(s.d) if kinds[a] == "free"]
        for a in free:
            dx = np.diff(y[:, :, a], axis=0)
            D = s.kT / s.friction[a]
            sv, cv = formulas.displacement_moments(D, interval, sig[a] ** 2, R)
            form = f"R = {R:.5g} (recorder taps), sigma = {sig[a]:.4g} m"
            report.rows.append(_replica_row(_row, f"displacement variance {AXES[a]}",
                                            _nanmean(dx * dx), sv, "2 D Dt (1 - 2R) + 2 sigma^2; " + form,
                                            SRC_BLUR, "m^2", kw))
            report.rows.append(_replica_row(_row, f"displacement lag-1 covariance {AXES[a]}",
                                            _nanmean(dx[1:] * dx[:-1]), cv,
                                            "2 R D Dt - sigma^2; " + form, SRC_BLUR, "m^2", kw))
        if free:
            from ..analysis import CovarianceDiffusion, OptimalMSDFit
            same = len({s.friction[a] for a in free}) == 1 and len({sig[a] for a in free}) == 1
            groups = [free] if same else [[a] for a in free]
            for axes in groups:
                tag = "" if same and len(free) == s.d else " " + "".join(AXES[a] for a in axes)
                D = s.kT / s.friction[axes[0]]
                for est, name in ((CovarianceDiffusion(interval, blur=R), "covariance estimator"),
                                  (OptimalMSDFit(interval, blur=R), "optimal MSD fit")):
                    try:
                        est.fit(y[:, :, axes])
                    except ValueError as e:
                        report.notes.append(f"{name} skipped: {e}")
                        continue
                    report.rows.append(_row(f"D{tag} ({name})", est.diffusion_, est.diffusion_err_, D,
                                            "D = kT/gamma", SRC_BLUR, "m^2/s", **kw))
                    report.rows.append(_row(f"localization variance{tag} ({name})", est.localization_variance_,
                                            est.localization_variance_err_, sig[axes[0]] ** 2,
                                            "sigma^2 = localization_error^2", SRC_BLUR, "m^2", **kw))
        true = np.asarray(data["true_positions"][start:], dtype=float)
        _localization_rows(report, y, true, sig, _row, kw)
        for a in range(s.d):
            if kinds[a] != "harmonic" or s.regime != "overdamped":
                continue
            k, g = s.kappa[a], s.friction[a]
            tau = g / k
            x = true[:, :, a] - s.center[a]
            exposure = m["exposure"]
            wh = s.kT / k * formulas.wong_halvorsen_factor(exposure / tau) if exposure > 0 else s.kT / k
            if s.scheme == "euler-maruyama":
                pred = formulas.tap_average_autocovariance([0], w, o, period, theory_em_variance(s, a),
                                                           1.0 - k * s.dt / g)[0]
                form = f"exact for the taps on the EM chain; Wong-Halvorsen (kT/k) S(W/tau) = {wh:.6g}"
            else:
                pred, form = wh, "(kT/k) S(W/tau), W/tau = " + f"{exposure / tau:.4g}"
            report.rows.append(_replica_row(_row, f"blurred variance {AXES[a]}", np.mean(x * x, axis=0), pred,
                                            form, SRC_WH, "m^2", kw))
            if sig[a] > 0:      # what the instrument reports: the blurred variance + sigma^2
                xm = y[:, :, a] - s.center[a]
                report.rows.append(_replica_row(_row, f"measured variance {AXES[a]}", _nanmean(xm * xm), pred + sig[a] ** 2,
                                                "blurred variance + sigma^2, sigma = localization_error = "
                                                f"{sig[a]:.4g} m", SRC_LOC, "m^2", kw))
            if exposure > 0 and interval < 3 * tau:
                from ..analysis import BlurredTrap
                try:
                    est = BlurredTrap(s.kT, interval, exposure, center=0.0).fit(x)
                    report.rows.append(_row(f"stiffness {AXES[a]} (blurred trap)", est.stiffness_, est.stiffness_err_,
                                            k, "from blurred variance and lag-1 covariance; naive kT/var = "
                                            f"{est.naive_stiffness_ * 1e3:.4g} pN/nm", SRC_WH, "N/m", **kw))
                except ValueError as e:
                    report.notes.append(f"blurred trap {AXES[a]} skipped: {e}")
    if "images" in data:
        _background_rows(report, data, m, _row, kw)
        if "photons" in data:
            _spot_rows(report, data, m, _row, kw)
    if "signal" in data and m.get("detector"):
        _detector_rows(report, data, cfg, s, _row, kw)


def _localization_rows(report, y, true, sig, _row, kw):
    """Per axis with localization error: the offset of the reported positions' MSD (drift
    removed) over that of the exposure averages, against 2 sigma^2. The noise e is independent
    of the path, so the offset is E[(Delta e)^2] at every lag; it is estimated from the
    one-frame differences of e = reported - true (the path's own displacements, which only
    add variance, drop out); particles as replicas."""
    de = np.diff(y - true, axis=0)
    for a in range(y.shape[2]):
        if sig[a] <= 0:
            continue
        per = _nanmean(de[:, :, a] ** 2)
        report.rows.append(_replica_row(_row, f"localization MSD offset {AXES[a]}", per, 2.0 * sig[a] ** 2,
                                        "MSD(positions) - MSD(true_positions) = <(Delta e)^2> = 2 sigma^2, "
                                        f"one frame, sigma = localization_error = {sig[a]:.4g} m", SRC_LOC,
                                        "m^2", kw))


def theory_em_variance(s, a):
    from .. import theory
    return theory.em_variance(s.kT, s.kappa[a], s.friction[a], s.dt)


def _background_rows(report, data, m, _row, kw):
    images = data["images"]
    n = min(len(images), BACKGROUND_FRAMES)
    rows, cols = m["image_shape"]
    a, (x0, y0) = m["pixel_size"], m["origin"]
    xc = x0 + a * (np.arange(cols) + 0.5)
    yc = y0 + a * (np.arange(rows) + 0.5)
    true = np.asarray(data["true_positions"][:n], dtype=float)
    drift = np.asarray(data["drift"][:n], dtype=float) if "drift" in data else np.zeros((n, true.shape[2]))
    reach = 8.0 * m["psf_sigma"]
    values = []
    for f in range(n):
        img = np.asarray(images[f], dtype=float)
        keep = np.ones((rows, cols), bool)
        for p in true[f] + drift[f][None, :]:
            keep[np.ix_(np.abs(yc - (p[1] if p.size > 1 else 0.0)) < reach, np.abs(xc - p[0]) < reach)] = False
        values.append(img[keep])
    v = np.concatenate(values) - m["baseline"]
    if v.size < 1000:
        report.notes.append("fewer than 1000 background pixels far from emitters; background check skipped")
        return
    g, b, r = m["gain"], m["background"], m["read_noise"]
    G = m.get("em_gain") or 0.0
    F = 2.0 if G else 1.0
    mean = g * b
    var = F * g * g * b + (g / (G or 1.0) * r) ** 2 + 1.0 / 12.0
    vv = v.var()
    mu4 = np.mean((v - v.mean()) ** 4)
    report.rows.append(_row("background mean", v.mean(), math.sqrt(vv / v.size), mean,
                            "gain x background (counts above baseline)", SRC_CAM, "counts", **kw))
    report.rows.append(_row("background variance", vv, math.sqrt(max(mu4 - vv * vv, 0.0) / v.size), var,
                            f"F g^2 b + (g/G)^2 r^2 + 1/12, F = {F:g}", SRC_CAM, "counts^2", **kw))


def _spot_rows(report, data, m, _row, kw):
    """Photons in the windows of isolated emitters (no other within 12 sigma, 7 sigma from the edges)."""
    images = data["images"]
    n = min(len(images), BACKGROUND_FRAMES)
    rows, cols = m["image_shape"]
    a, (x0, y0), sg = m["pixel_size"], m["origin"], m["psf_sigma"]
    if m.get("defocus_depth"):
        report.notes.append("spot photons not checked with defocus (the window would need z)")
        return
    true = np.asarray(data["true_positions"][:n], dtype=float)
    drift = np.asarray(data["drift"][:n], dtype=float) if "drift" in data else np.zeros((n, true.shape[2]))
    photons = np.asarray(data["photons"][:n], dtype=float)
    h = int(math.ceil(7.0 * sg / a))
    top = 2 ** m["bit_depth"] - 1
    est, pred = [], []
    for f in range(n):
        p = true[f, :, :2] + drift[f][None, :2]
        img = None
        for k in range(p.shape[0]):
            if photons[f, k] <= 0:
                continue
            others = np.delete(p, k, axis=0)
            if others.size and np.min(np.hypot(*(others - p[k]).T)) < 12.0 * sg:
                continue
            j, i = int((p[k, 0] - x0) // a), int((p[k, 1] - y0) // a)
            if not (h <= j < cols - h and h <= i < rows - h):
                continue
            if img is None:
                img = np.asarray(images[f], dtype=float)
            win = img[i - h:i + h + 1, j - h:j + h + 1]
            if win.max() >= top:
                continue
            est.append(np.sum(win - m["baseline"]) / m["gain"] - m["background"] * win.size)
            pred.append(photons[f, k])
    if len(est) < 30:
        report.notes.append(f"only {len(est)} isolated spots; spot photon check skipped")
        return
    est, pred = np.array(est), np.array(pred)
    report.rows.append(_row("spot photons (isolated emitters)", est.mean(), (est - pred).std(ddof=1) / math.sqrt(est.size),
                            pred.mean(), f"window of +-{h} pixels: (counts - baseline)/gain - background, "
                            f"{est.size} spots", SRC_CAM, "photons", **kw))


def _detector_rows(report, data, cfg, s, _row, kw):
    from ..analysis.spectra import segment_averaged_periodogram
    from . import detector as det_mod
    d = dict(cfg["measurement"]["detector"])
    steps = int(round(1.0 / (d.pop("sampling_rate") * s.dt)))
    det = Detector(steps, tuple(d["sensitivity"]), tuple(np.ravel(d["cross_talk"]).tolist()), d["filter"],
                   d["cutoff"], d["diode_frequency"], d["diode_fraction"], d["noise"], d["anti_alias_cutoff"],
                   d["anti_alias_order"], d["adc_bits"], d["adc_range"])
    model = det_mod.DetectorModel(det, 1, s.d, s.dt, cfg["seed"])
    sig = data["signal"]
    interval = model.sampling_interval
    for a in range(s.d):
        if s.axis_kind(a) != "harmonic" or s.scheme != "euler-maruyama":
            continue
        k, g = s.kappa[a], s.friction[a]
        tau_f = g / k / interval
        N = 1 << int(math.ceil(math.log2(max(256.0, 64.0 * tau_f))))
        x = np.asarray(sig[:, :, a], dtype=float)
        skip = int(math.ceil(20 * tau_f)) + 64
        if x.shape[0] - skip < 4 * N:
            report.notes.append(f"detector {AXES[a]}: too few samples for a spectrum fit; skipped")
            continue
        f, P, count = segment_averaged_periodogram(x[skip:], interval, N)
        keep = f > 2.0 / (N * interval)
        D = s.kT / g
        others = [(b, s.kappa[b], s.friction[b]) for b in range(s.d) if b != a]
        M = det.matrix(s.d)

        def volts(h, fc, A):
            out = A / D * det_mod.em_trap_psd(h, s.kT, 2 * math.pi * fc * g, g, s.dt)
            for b, kb, gb in others:             # cross-talk from the other axes at their configured values
                if M[a, b] and kb > 0:
                    out = out + M[a, b] ** 2 * det_mod.em_trap_psd(h, s.kT, kb, gb, s.dt)
            return out

        def expected(ff, fc, A):
            return det_mod.expected_periodogram(lambda q: model.spectrum(q, lambda h: volts(h, fc, A)),
                                                N, interval)[keep]
        try:
            r = det_mod.fit_sensitivity(f[keep], P[keep], count, expected, D,
                                        (k / (2 * math.pi * g), M[a, a] ** 2 * D))
        except (ValueError, np.linalg.LinAlgError) as e:
            report.notes.append(f"detector {AXES[a]}: spectrum fit failed ({e})")
            continue
        report.rows.append(_row(f"detector sensitivity {AXES[a]}", r["sensitivity"], r["sensitivity_err"],
                                float(det.sensitivity[a]), "sqrt(fitted D_volts / (kT/gamma)); ML fit of the "
                                "spectrum with the detector model (filters, noise, ADC)", SRC_DET, "V/m", **kw))
        report.rows.append(_row(f"detector corner frequency {AXES[a]}", r["corner_frequency"],
                                r["corner_frequency_err"], k / (2 * math.pi * g), "f_c = k/(2 pi gamma)",
                                SRC_DET, "Hz", **kw))
