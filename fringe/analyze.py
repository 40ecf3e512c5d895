"""Measure fringe period, orientation, phase and visibility with 1-sigma uncertainties.

Pipeline for one frame: calibrated image -> windowed 2-D spectrum (orientation, first
period) -> rotation-aware profile in strips -> weighted nonlinear least-squares fit ->
noise model from the residuals -> final fit and uncertainties from its covariance.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from typing import Any

import numpy as np

from fringe._util import FringeError, fold_angle_deg, wrap_phase
from fringe.fit import (
    FitResult,
    basis_candidates,
    choose_basis,
    fit_pooled_envelope,
    fit_profile,
    fit_sinc2_envelope,
)
from fringe.orient import block_mean, local_fringe_map, spectral_peak
from fringe.profile import Profile, project
from fringe.result import FringeResult

__all__ = ["measure", "measure_frames", "analyze_image", "NoiseModel", "DEFAULT_MIN_SNR"]

#: Spectral SNR below which an image is reported as holding no fringe pattern.
DEFAULT_MIN_SNR = 5.0
_CHI2_MEDIAN_1DOF = 0.454936423119572  # median of the chi-square distribution, 1 dof


class NoiseModel:
    """Per-pixel noise variance ``alpha + beta * level`` (read-like plus shot-like)."""

    def __init__(self, alpha: float, beta: float = 0.0, source: str = "residuals"):
        self.alpha = float(alpha)
        self.beta = float(beta)
        self.source = source

    def variance(self, level: np.ndarray | float) -> np.ndarray:
        return self.alpha + self.beta * np.maximum(level, 0.0)

    def as_dict(self) -> dict:
        return {"alpha_dn2": self.alpha, "beta_dn": self.beta, "source": self.source}


def _noise_from_residuals(
    image: np.ndarray,
    mask: np.ndarray | None,
    fit: FitResult,
    prof: Profile,
    max_pixels: int = 60_000,
) -> NoiseModel:
    """Estimate the per-pixel noise from neighbouring-pixel differences of fit residuals.

    Differences of horizontally adjacent residuals cancel any slow model mismatch
    (envelope variation along the fringes, for instance) and leave twice the pixel
    variance. The median of d²/2 in bins of signal level, divided by the chi-square
    median, is robust to hot pixels and cosmic rays; a straight line through those
    estimates against level gives read-like and shot-like terms.
    """
    h, w = image.shape
    step = max(1, int(np.ceil(h * w / max_pixels)))
    rows = np.arange(0, h, step)
    sub = image[rows].astype(np.float64, copy=False)
    nx, nr = np.cos(np.deg2rad(prof.orientation_deg)), -np.sin(np.deg2rad(prof.orientation_deg))
    x = np.arange(w, dtype=np.float64) - prof.centre[0]
    r = rows.astype(np.float64) - prof.centre[1]
    u = nx * x[None, :] + nr * r[:, None]
    v = -nr * x[None, :] + nx * r[:, None]
    strip = prof.strip_of(v)
    model = fit.model(u.ravel(), v.ravel(), strip.ravel()).reshape(sub.shape)
    resid = sub - model
    d = resid[:, 1:] - resid[:, :-1]
    level = 0.5 * (model[:, 1:] + model[:, :-1])
    good = np.isfinite(d)
    if mask is not None:
        msub = mask[rows]
        good &= ~(msub[:, 1:] | msub[:, :-1])
    d2 = 0.5 * d[good] ** 2
    lev = level[good]
    # Floor: noise-free (synthetic) images would otherwise get infinite weights.
    scale = float(np.nanmax(np.abs(model))) if model.size else 1.0
    var_floor = (1e-4 * max(scale, 1e-30)) ** 2
    d2 = np.maximum(d2, var_floor)
    if d2.size < 16:
        var = float(np.mean(d2)) if d2.size else 1.0
        return NoiseModel(max(var, var_floor))
    overall = float(np.median(d2)) / _CHI2_MEDIAN_1DOF
    nq = int(np.clip(d2.size // 2000, 1, 16))
    if nq >= 4 and np.ptp(lev) > 0:
        edges = np.quantile(lev, np.linspace(0, 1, nq + 1))
        idx = np.clip(np.searchsorted(edges, lev, side="right") - 1, 0, nq - 1)
        xs, ys, ns = [], [], []
        for q in range(nq):
            sel = idx == q
            if sel.sum() >= 50:
                xs.append(float(np.mean(lev[sel])))
                ys.append(float(np.median(d2[sel])) / _CHI2_MEDIAN_1DOF)
                ns.append(int(sel.sum()))
        if len(xs) >= 4 and np.ptp(xs) > 0:
            xs_a, ys_a, ns_a = np.array(xs), np.array(ys), np.array(ns, dtype=float)
            # Weighted line; the relative uncertainty of each estimate is ~ 1.6/sqrt(n).
            wts = ns_a / np.maximum(ys_a, 1e-300) ** 2
            design = np.vstack([np.ones_like(xs_a), xs_a]).T
            coef = np.linalg.lstsq(design * np.sqrt(wts)[:, None], ys_a * np.sqrt(wts),
                                   rcond=None)[0]
            alpha, beta = float(coef[0]), float(coef[1])
            # Keep the shot-like term only when the data ask for it (slope above 3 sigma).
            res_w = (ys_a - design @ coef) * np.sqrt(wts)
            dof = max(len(xs_a) - 2, 1)
            try:
                cov_c = np.linalg.inv((design * wts[:, None]).T @ design)
                s_beta = float(np.sqrt(cov_c[1, 1] * max(1.0, res_w @ res_w / dof)))
            except np.linalg.LinAlgError:
                s_beta = np.inf
            if not beta > 3 * s_beta:
                return NoiseModel(max(overall, var_floor))
            floor = max(1e-3 * overall, var_floor)
            if beta > 0 and alpha > floor:
                return NoiseModel(alpha, beta)
            if beta > 0:
                # Shot-noise dominated: keep the line, floored so that no weight is infinite.
                return NoiseModel(max(alpha, floor), beta)
    return NoiseModel(max(overall, var_floor))


def _bin_sigma(prof: Profile, noise: NoiseModel | None) -> np.ndarray:
    if prof.var_mean is not None:
        return np.sqrt(np.maximum(prof.var_mean, 1e-300))
    if noise is None:
        return 1.0 / np.sqrt(prof.count)
    if noise.beta == 0.0:
        return np.sqrt(noise.alpha / prof.count)
    # Level from a smoothed profile (not the noisy bin means) to avoid weighting bias.
    from scipy.ndimage import uniform_filter1d

    order = np.argsort(prof.u, kind="stable")
    smooth = np.empty_like(prof.mean)
    smooth[order] = uniform_filter1d(prof.mean[order], size=5, mode="nearest")
    return np.sqrt(noise.variance(smooth) / prof.count)


def _strip_amplitudes(prof: Profile, fit: FitResult) -> np.ndarray:
    """Fringe amplitude in each strip with the fringe frequency and phase held."""
    g = np.exp(-0.5 * fit.omega**2 * prof.u_var)
    psi = fit.omega * prof.u + fit.kappa * prof.v + fit.phi
    out = np.full(prof.n_strips, np.nan)
    bounds = np.searchsorted(prof.strip, np.arange(prof.n_strips + 1))
    for j in range(prof.n_strips):
        sel = slice(int(bounds[j]), int(bounds[j + 1]))
        if sel.stop - sel.start < 8:
            continue
        w = np.sqrt(prof.count[sel])
        des = np.vstack([np.ones(sel.stop - sel.start), g[sel] * np.cos(psi[sel]),
                         g[sel] * np.sin(psi[sel])]).T * w[:, None]
        coef = np.linalg.lstsq(des, prof.mean[sel] * w, rcond=None)[0]
        out[j] = float(np.hypot(coef[1], coef[2]))
    return out


def _pooled_envelope(fit: FitResult, prof: Profile, sigma: np.ndarray):
    """Background S and amplitude A of the integrated (single-strip) profile at the peak
    of the fringe envelope, with the 1-sigma uncertainty of V = A/S there.

    The fringe frequency and phase are held at the strip fit's values (the visibility's
    dependence on them is of second order); the Legendre series of the pooled profile
    are solved linearly with their covariance.
    """
    env_basis, a, b, cov = fit_pooled_envelope(prof, omega=fit.omega, kappa=fit.kappa,
                                               phi=fit.phi, n_basis=fit.n_basis, sigma=sigma)
    eligible = prof.count >= 0.5 * np.max(prof.count)
    u_grid = prof.u[eligible] if eligible.any() else prof.u
    basis = env_basis.matrix(u_grid)
    s_curve = basis @ a
    a_curve = basis @ b
    kstar = int(np.argmax(a_curve))
    s_pk, a_pk = float(s_curve[kstar]), float(a_curve[kstar])
    lk = basis[kstar]
    if s_pk > 0:
        grad = np.concatenate([-a_pk / s_pk**2 * lk, lk / s_pk])
        v_err = float(np.sqrt(max(grad @ cov @ grad, 0.0)))
    else:
        v_err = float("nan")
    return s_pk, a_pk, v_err, float(u_grid[kstar]), s_curve, a_curve


def analyze_image(
    image: np.ndarray,
    mask: np.ndarray | None = None,
    *,
    variance: np.ndarray | None = None,
    min_snr: float = DEFAULT_MIN_SNR,
    orientation_deg: float | None = None,
    period_px: float | None = None,
    max_envelope_terms: int | None = None,
    fast: bool = False,
    result: FringeResult | None = None,
) -> FringeResult:
    """Measure the fringes of one calibrated 2-D image.

    Parameters
    ----------
    image : (H, W) ndarray
        Dark-subtracted, flat-corrected image (linear light).
    mask : (H, W) bool ndarray, optional
        True where pixels are unusable (saturated, bad, non-finite).
    variance : (H, W) ndarray, optional
        Per-pixel noise variance from a camera noise model. Without it the noise is
        estimated from the fit residuals.
    min_snr : float
        Spectral SNR below which no fringe pattern is reported.
    orientation_deg, period_px : float, optional
        Known geometry (e.g. from the first frame of a stack): the fit starts there and
        the spectral SNR threshold is not applied (the spectrum is still computed for
        ``spectral_snr`` and the crossed-fringe check).
    max_envelope_terms : int, optional
        Largest number of envelope functions tried (default: as many as keep the spline
        knots 2.5 periods apart).
    fast : bool
        With ``orientation_deg`` and ``period_px`` given: one projection along the given
        normal and a linearised least-squares fit (phase, visibility and a period
        correction; the orientation is taken as given). For long stacks of one setup.
    result : FringeResult, optional
        Result to fill in (carrying file, frame and calibration provenance).

    Returns
    -------
    FringeResult
        ``orientation_deg``, ``period_px``, ``phase_rad``, ``visibility``,
        ``visibility_raw`` with ``_err`` partners, and ``snr``, ``spectral_snr``,
        ``mean_level``, ``amplitude``, ``fringes_in_region``, ``envelope_terms``,
        ``chi2_red``.

    Notes
    -----
    Phase convention: I(r) = B(r) + A(r) cos(2 pi n.(r - c)/P + phi), with
    n = (cos t, -sin t) in (x, row) coordinates and c the centre of the region.
    ``visibility_raw`` is A/B of the recorded pixels at the envelope peak; ``visibility``
    divides it by the modulation transfer of a square unit pixel,
    sinc(f_x) sinc(f_y) with (f_x, f_y) = n/P (np.sinc normalisation).

    References
    ----------
    .. [1] S. M. Kay, Fundamentals of Statistical Signal Processing: Estimation Theory,
       Prentice Hall (1993), example 3.14.
    .. [2] G. D. Boreman, Modulation Transfer Function in Optical and Electro-Optical
       Systems, SPIE Press (2001), ch. 2 (pixel-aperture MTF).
    .. [3] A. A. Michelson, Studies in Optics, University of Chicago Press (1927)
       (visibility (Imax - Imin)/(Imax + Imin)).
    """
    res = result if result is not None else FringeResult()
    img = np.asarray(image)
    if img.ndim != 2:
        return res.fail(f"expected a 2-D image, got an array of shape {img.shape}")
    h, w = img.shape
    if h < 8 or w < 8:
        return res.fail(f"region is {w} x {h} pixels, too small to measure fringes (min 8 x 8)")
    bad = ~np.isfinite(img)
    if mask is not None:
        bad = bad | mask
    n_valid = int((~bad).sum())
    if n_valid < 0.25 * h * w:
        n_nonfinite = int((~np.isfinite(img)).sum())
        if n_valid == 0:
            if n_nonfinite == h * w:
                return res.fail(f"no usable pixels: all {h * w} are NaN or infinite")
            if n_nonfinite == 0:
                return res.fail(f"no usable pixels: all {h * w} are saturated or bad")
            return res.fail(f"no usable pixels ({n_nonfinite} NaN or infinite, the rest "
                            "saturated or bad)")
        return res.fail(f"only {n_valid} of {h * w} pixels are usable (the others are "
                        f"{'NaN, infinite, ' if n_nonfinite else ''}saturated or bad)")
    if bad.any():
        img = np.where(bad, 0.0, img)
    sample = img[::7, ::5]  # a quick look first: most images vary within a sample
    if bad.any() or np.ptp(sample) == 0.0:
        if bad.any():
            lo_v, hi_v = float(np.min(img, where=~bad, initial=np.inf)), float(
                np.max(img, where=~bad, initial=-np.inf))
        else:
            lo_v, hi_v = float(img.min()), float(img.max())
    else:
        lo_v, hi_v = 0.0, 1.0
    if hi_v - lo_v == 0.0:
        return res.fail("image is uniform (every usable pixel has the same value): "
                        "no fringe pattern")
    res.provenance.append(("region", {"width": w, "height": h, "usable_pixels": n_valid}))

    # 1. First estimate from the spectrum (skipped when the geometry is given).
    fixed = orientation_deg is not None and period_px is not None
    if fixed and fast:
        return _analyze_fast(img, bad, variance, fold_angle_deg(orientation_deg),
                             float(period_px), min_snr, res)
    if fixed:
        from fringe.orient import SpectralPeak

        t_fix = fold_angle_deg(orientation_deg)
        peak = SpectralPeak(f_x=0.0, f_row=0.0, period_px=float(period_px),
                            orientation_deg=t_fix, snr=float("nan"))
    else:
        try:
            peak = spectral_peak(img, bad if bad.any() else None)
        except ValueError as exc:
            return res.fail(f"no fringe pattern found: {exc}")
        res.set("spectral_snr", peak.snr)
    if not fixed:
        if not peak.snr >= min_snr:
            return res.fail(
                f"no fringe pattern found: strongest spatial frequency has SNR "
                f"{peak.snr:.1f}, below {min_snr:g}"
            )
        t0, p0 = peak.orientation_deg, peak.period_px
    else:
        t0, p0 = fold_angle_deg(orientation_deg), float(period_px)
    res.provenance.append(("spectrum", {"orientation_deg": t0, "period_px": p0,
                                        "snr": peak.snr}))
    second = peak.second
    if second is not None:
        d_angle = abs((second["orientation_deg"] - t0 + 90.0) % 180.0 - 90.0)
        # A second pattern, not the envelope's own low-frequency structure or sidebands.
        crossed = (second["snr"] >= min_snr and second["relative_amplitude"] >= 0.25
                   and d_angle >= 5.0 and second["period_px"] < 2.5 * p0)
    if second is not None and crossed:
        s = peak.second
        res.warn(
            f"crossed fringes: a second pattern (period {s['period_px']:.2f} px, orientation "
            f"{s['orientation_deg']:.1f} deg) has {100 * s['relative_amplitude']:.0f} % of the "
            "main amplitude; only the main pattern was measured"
        )

    # 2. Projection settings.
    extent_u = abs(np.cos(np.deg2rad(t0))) * (w - 1) + abs(np.sin(np.deg2rad(t0))) * (h - 1)
    extent_v = abs(np.sin(np.deg2rad(t0))) * (w - 1) + abs(np.cos(np.deg2rad(t0))) * (h - 1)
    bin_width = p0 / 16.0
    n_bins = extent_u / bin_width
    n_strips = int(np.clip(extent_v // 16.0, 2, 8)) if extent_v >= 32 else 1
    max_rows = 30_000
    if n_bins * n_strips > max_rows:
        bin_width = min(p0 / 8.0, max(bin_width, extent_u * n_strips / max_rows))  # noqa: E501
        n_bins = extent_u / bin_width
        if n_bins * n_strips > max_rows:
            n_strips = max(2, int(max_rows // n_bins)) if extent_v >= 32 else 1

    # 3. First fit, equal pixel weights, to refine the orientation and model the noise.
    omega0 = 2 * np.pi / p0
    row_step = max(1, int(h * w // 500_000))  # the first pass only refines the angle
    prof = project(img, bad, orientation_deg=t0, bin_width=bin_width, n_strips=n_strips,
                   variance=variance, row_step=row_step)
    candidates = basis_candidates(prof.u_range, p0)
    if max_envelope_terms is not None:
        candidates = [n for n in candidates if n <= max_envelope_terms] or [1]
    try:
        fit1 = fit_profile(prof, omega0=omega0, n_basis=min(3, candidates[-1]),
                           sigma=_bin_sigma(prof, None) if variance is None else None)
    except (np.linalg.LinAlgError, ValueError) as exc:
        return res.fail(f"fringe fit failed: {exc}")
    t1 = t0 + np.rad2deg(np.arctan2(-fit1.kappa, fit1.omega))
    omega1 = float(np.hypot(fit1.omega, fit1.kappa))
    if variance is None:
        noise = _noise_from_residuals(img, bad, fit1, prof)
    else:
        noise = NoiseModel(float(np.median(variance[~bad])), 0.0, source="calibration")

    # 4. Re-project along the refined normal, choose the envelope order, final fit.
    prof2 = project(img, bad, orientation_deg=t1, bin_width=bin_width, n_strips=n_strips,
                    variance=variance)
    prof1 = prof2.pooled()
    # Order by BIC with the fringe frequency and phase of the first fit held (rotated
    # into the new projection: the phase at the centre is unchanged).
    n_basis = choose_basis(prof1, omega=omega1, kappa=0.0, phi=fit1.phi,
                           sigma=_bin_sigma(prof1, noise), candidates=candidates)
    try:
        fit = fit_profile(prof2, omega0=omega1, n_basis=n_basis,
                          sigma=_bin_sigma(prof2, noise))
        if variance is None:
            # The noise again from the better model's residuals, then the final fit with
            # weights from the model level (data-derived weights would bias the level).
            noise_prev = noise
            noise = _noise_from_residuals(img, bad, fit, prof2)
            if noise.beta == 0.0 and noise_prev.beta == 0.0:
                # Equal weights both times: the same solution, only the scale differs.
                ratio = noise_prev.alpha / noise.alpha
                fit.chi2 *= ratio
                fit.cov = fit.cov / fit.cov_scale
                fit.cov_scale = max(1.0, fit.chi2 / max(fit.dof, 1))
                fit.cov = fit.cov / ratio * fit.cov_scale
            else:
                level = fit.model(prof2.u, prof2.v, prof2.strip, prof2.u_var)
                sig2 = np.sqrt(noise.variance(level) / prof2.count)
                fit = fit_profile(prof2, omega0=fit.omega, n_basis=n_basis, sigma=sig2,
                                  kappa0=fit.kappa)
    except (np.linalg.LinAlgError, ValueError) as exc:
        return res.fail(f"fringe fit failed: {exc}")

    # 5. Derived quantities and their uncertainties.
    om, ka = fit.omega, fit.kappa
    hyp = float(np.hypot(om, ka))
    c3 = fit.cov[:3, :3]
    g_p = np.array([-2 * np.pi * om / hyp**3, -2 * np.pi * ka / hyp**3, 0.0])
    g_t = np.array([ka / hyp**2, -om / hyp**2, 0.0])
    period = 2 * np.pi / hyp
    period_err = float(np.sqrt(max(g_p @ c3 @ g_p, 0.0)))
    t_final = t1 + np.rad2deg(np.arctan2(-ka, om))
    t_err = float(np.rad2deg(np.sqrt(max(g_t @ c3 @ g_t, 0.0)))) if fit.kappa_free else None
    phi = fit.phi
    flip = 1.0  # -1 when the reported normal is opposite to the fit's projection normal
    folded = t_final % 180.0
    if (t_final - folded) % 360.0 != 0.0:
        phi = -phi  # the normal flipped sign
        flip = -flip
    t_final = folded
    phi_err = float(np.sqrt(max(fit.cov[2, 2], 0.0)))
    if t_err is None:
        # A single strip cannot see the orientation; the spectral estimate stands.
        t_err = float(np.rad2deg(period / (np.pi * max(extent_v, 1.0) * max(peak.snr, 1.0))))
        res.warn("orientation from the spectrum only (region too short along the fringes)")
    if 180.0 - t_final < max(2.0 * t_err, 1e-6):
        # Within the uncertainty of the fold: prefer 0 deg (normal along +x) to 179.99 deg.
        t_final = 0.0
        phi = -phi
        flip = -flip

    # The envelope peak along the fringes: pool the strips whose fringe amplitude is at
    # least half the largest (all of them for a pattern filling the region).
    mat = fit.basis.matrix(prof2.u)
    amp_bins = np.einsum("ik,ik->i", mat, fit.b[prof2.strip]) * prof2.count
    strip_amp = (np.bincount(prof2.strip, weights=amp_bins, minlength=prof2.n_strips)
                 / np.maximum(np.bincount(prof2.strip, weights=prof2.count,
                                          minlength=prof2.n_strips), 1e-300))
    bright = np.nonzero(strip_amp >= 0.5 * strip_amp.max())[0]
    prof_v = prof1
    if bright.size < prof2.n_strips:
        # The fringes fade along their length (a beam spot): find the brightest band in
        # fine strips and take the visibility there.
        n_fine = int(np.clip(extent_v // 6, prof2.n_strips, 400))
        fine = project(img, bad, orientation_deg=t1, bin_width=bin_width, n_strips=n_fine,
                       variance=variance)
        amp_fine = _strip_amplitudes(fine, fit)
        band = np.nonzero(amp_fine >= 0.9 * np.nanmax(amp_fine))[0]
        bright = band
        prof_v = fine.subset(band).pooled()
    s_pk, a_pk, v_raw_err, u_star, s_curve, a_curve = _pooled_envelope(
        fit, prof_v, _bin_sigma(prof_v, noise))
    if bright.size < prof2.n_strips:
        n_used = prof2.n_strips if prof_v is prof1 else n_fine
        v_lo, v_hi = prof2.v_range
        step_v = (v_hi - v_lo) / max(n_used, 1)
        res.provenance.append(("envelope_along_fringes",
                               {"strips_used": [int(j) for j in bright],
                                "strips": int(n_used),
                                "v_band_px": [float(v_lo + step_v * bright.min()),
                                              float(v_lo + step_v * (bright.max() + 1))]}))
    if s_pk <= 0:
        return res.fail(f"mean level at the fringe envelope peak is {s_pk:.3g}, not positive "
                        "(is the dark frame right?)")
    v_raw = a_pk / s_pk
    tr = np.deg2rad(t_final)
    mtf = float(np.sinc(np.cos(tr) / period) * np.sinc(np.sin(tr) / period))
    sigma_pix = float(np.sqrt(noise.variance(s_pk)))

    res.set("orientation_deg", float(t_final), t_err)
    res.set("period_px", float(period), period_err)
    res.set("phase_rad", wrap_phase(phi), phi_err)
    res.set("visibility", v_raw / mtf, v_raw_err / mtf)
    res.set("visibility_raw", v_raw, v_raw_err)
    res.set("snr", a_pk / sigma_pix if sigma_pix > 0 else float("inf"))
    res.set("mean_level", s_pk)
    res.set("amplitude", a_pk)
    res.set("pixel_noise", sigma_pix)
    res.set("pixel_mtf", mtf)
    res.set("fringes_in_region", float(extent_u / period))
    res.set("envelope_terms", int(fit.n_basis))
    res.set("chi2_red", fit.chi2_red)
    res.provenance.append(("fit", {"envelope": fit.basis.describe(),
                                   "strips": prof2.n_strips,
                                   "bin_width_px": bin_width, "chi2_red": fit.chi2_red,
                                   "noise": noise.as_dict()}))

    # Single-slit (sinc²) envelope, when the envelope is resolved in the region.
    u_env = u_star
    if fit.n_basis >= 3 and extent_u / period >= 6 and np.min(a_curve) < 0.5 * np.max(a_curve):
        env = fit_sinc2_envelope(prof_v, omega=fit.omega, kappa=fit.kappa, phi=fit.phi,
                                 sigma=_bin_sigma(prof_v, noise), u_peak=u_star)
        if env is not None and env.width_err < 0.2 * env.width:
            u_env = env.u0
            res.context["envelope_fit"] = env
            res.set("envelope_zero_px", env.width, env.width_err)
            res.set("envelope_visibility", env.visibility, env.visibility_err)
            res.provenance.append(("envelope", {"model": "sinc2", "chi2_red":
                                                env.chi2 / max(env.dof, 1)}))
    nx1, nr1 = np.cos(np.deg2rad(t1)), -np.sin(np.deg2rad(t1))
    # along the fringes: the middle of the band the visibility was taken in
    v_env = float(np.average(prof_v.v, weights=prof_v.count)) if prof_v is not prof1 else 0.0
    res.set("envelope_centre_x_px", prof2.centre[0] + u_env * nx1 - v_env * nr1)
    res.set("envelope_centre_y_px", prof2.centre[1] + u_env * nr1 + v_env * nx1)
    res.set("phase_at_envelope_rad", wrap_phase(flip * (fit.omega * u_env + fit.phi)))
    res.context.update({"fit": fit, "profile": prof2, "pooled": prof1, "noise": noise,
                        "u_envelope": u_env, "orientation_fit_deg": t1,
                        "sigma_pooled": _bin_sigma(prof1, noise)})

    # 6. Warnings that make a number unreliable.
    res.warn_sampling(period, extent_u / period)
    if not fixed and peak.snr < 2 * min_snr:
        res.warn(f"weak fringe signal (spectral SNR {peak.snr:.1f})")
    if fixed and v_raw_err > 0 and v_raw / v_raw_err < min_snr:
        return res.fail(f"no fringe signal at the given period and orientation: the "
                        f"modulation is {v_raw / v_raw_err:.1f} sigma, below {min_snr:g}")
    if v_raw_err > 0.2 * max(abs(v_raw), 1e-12) or phi_err > 0.5:
        res.warn("low SNR: the visibility or phase uncertainty is large")
    if fit.cov_scale > 2.0:
        sig_bin = float(np.median(_bin_sigma(prof1, noise)))
        misfit = np.sqrt(max(fit.chi2_red - 1.0, 0.0)) * sig_bin / max(abs(a_pk), 1e-300)
        res.warn(f"the profile departs from the model by more than its noise (reduced "
                 f"chi-square {fit.chi2_red:.1f}, about {100 * misfit:.2g} % of the fringe "
                 "amplitude); uncertainties were scaled up accordingly")
    if v_raw / mtf > 1.05:
        res.warn(f"visibility {v_raw / mtf:.3f} exceeds 1: check the dark frame and any "
                 "offset (or a non-linear, e.g. sharpened, camera response)")
    # Curvature check on a block-averaged copy for large frames (periods of 8 px or more).
    factor = int(min(period // 4, np.ceil(np.sqrt(h * w / 2e6)))) if period >= 8 else 1
    if factor > 1:
        src = np.where(bad, np.mean(img[~bad]), img) if bad.any() else img
        lmap = local_fringe_map(block_mean(src, factor), None,
                                period_px=period / factor, orientation_deg=t_final)
    else:
        lmap = local_fringe_map(img, bad if bad.any() else None, period_px=period,
                                orientation_deg=t_final)
    if lmap["n_blocks"] >= 9 and (lmap["orientation_spread_deg"] > 3.0
                                  or lmap["period_spread"] > 0.08):
        res.warn(
            f"curved or non-uniform fringes: local orientation varies by "
            f"±{lmap['orientation_spread_deg']:.1f} deg and period by "
            f"±{100 * lmap['period_spread']:.0f} % across the region; values are averages"
        )
    return res


def _analyze_fast(img, bad, variance, t, period, min_snr, res) -> FringeResult:
    """Linearised fit along a known normal.

    Notes
    -----
    Step 1 solves S(u) + c(u) cos psi + s(u) sin psi (psi = 2 pi u / P, Legendre series
    of three terms) for a first phase phi0 at the centre. Step 2 works in the rotated
    frame psi' = psi + phi0: S(u) + A(u) cos psi' + q0 sin psi' + q1 u sin psi', linear
    in all coefficients, where -q0/A(0) is the phase correction and -q1/A(0) the
    frequency correction (first-order Taylor expansion of cos(psi' + d phi + d omega u)).
    The pixel noise comes from the weighted residuals; the uncertainties from the
    coefficient covariance by first-order propagation.
    """
    from numpy.polynomial import legendre as leg

    prof = project(img, bad if bad.any() else None, orientation_deg=t,
                   bin_width=period / 16.0, n_strips=1, variance=variance)
    omega = 2 * np.pi / period
    lo, hi = prof.u_range
    mid, half = 0.5 * (lo + hi), max(0.5 * (hi - lo), 1e-9)
    k = 3 if (hi - lo) / period >= 6 else 1
    basis = leg.legvander((prof.u - mid) / half, k - 1)
    b0 = leg.legvander(np.array([-mid / half]), k - 1)[0]
    g = np.exp(-0.5 * omega**2 * prof.u_var)
    wts = (1.0 / np.sqrt(np.maximum(prof.var_mean, 1e-300)) if prof.var_mean is not None
           else np.sqrt(prof.count))
    psi = omega * prof.u
    d1 = np.hstack([basis, basis * (g * np.cos(psi))[:, None],
                    basis * (g * np.sin(psi))[:, None]])
    c1 = np.linalg.lstsq(d1 * wts[:, None], prof.mean * wts, rcond=None)[0]
    phi0 = float(np.arctan2(-(b0 @ c1[2 * k:]), b0 @ c1[k:2 * k]))
    psi2 = psi + phi0
    cp, sp = g * np.cos(psi2), g * np.sin(psi2)
    design = np.hstack([basis, basis * cp[:, None], sp[:, None], (prof.u * sp)[:, None]])
    dw = design * wts[:, None]
    coef = np.linalg.lstsq(dw, prof.mean * wts, rcond=None)[0]
    r = (prof.mean - design @ coef) * wts
    dof = max(r.size - coef.size, 1)
    scale = float(r @ r) / dof if prof.var_mean is None else max(1.0, float(r @ r) / dof)
    try:
        cov = np.linalg.inv(dw.T @ dw) * scale
    except np.linalg.LinAlgError:
        return res.fail("fit along the given geometry failed (singular design)")
    eligible = prof.count >= 0.5 * prof.count.max()
    grid = basis[eligible]

    def derived(cf):
        a0 = b0 @ cf[k:2 * k]
        dphi = -cf[2 * k] / a0
        domega = -cf[2 * k + 1] / a0
        amp = grid @ cf[k:2 * k]
        j = int(np.argmax(amp))
        level = grid[j] @ cf[:k]
        return phi0 + dphi, 2 * np.pi / (omega + domega), amp[j] / level, level, amp[j]

    phi, per, v_raw, level, amp = derived(coef)
    if level <= 0 or amp <= 0:
        return res.fail("no fringe signal at the given period and orientation")
    jac = np.zeros((3, coef.size))
    for i in range(coef.size):
        hstep = 1e-6 * max(abs(coef[i]), np.sqrt(max(cov[i, i], 1e-300)), 1e-12)
        up, dn = coef.copy(), coef.copy()
        up[i] += hstep
        dn[i] -= hstep
        a1, a2 = derived(up), derived(dn)
        jac[:, i] = [(a1[0] - a2[0]) / (2 * hstep), (a1[1] - a2[1]) / (2 * hstep),
                     (a1[2] - a2[2]) / (2 * hstep)]
    errs = np.sqrt(np.maximum(np.diag(jac @ cov @ jac.T), 0.0))
    if errs[2] > 0 and v_raw / errs[2] < min_snr:
        return res.fail(f"no fringe signal at the given period and orientation: the "
                        f"modulation is {v_raw / errs[2]:.1f} sigma, below {min_snr:g}")
    tr = np.deg2rad(t)
    mtf = float(np.sinc(np.cos(tr) / per) * np.sinc(np.sin(tr) / per))
    sigma_pix = (float(np.sqrt(scale)) if prof.var_mean is None
                 else float(np.sqrt(np.median(variance[~bad]))))
    res.set("orientation_deg", t, 0.0)
    res.set("period_px", float(per), float(errs[1]))
    res.set("phase_rad", wrap_phase(float(phi)), float(errs[0]))
    res.set("visibility", float(v_raw) / mtf, float(errs[2]) / mtf)
    res.set("visibility_raw", float(v_raw), float(errs[2]))
    res.set("snr", float(amp) / sigma_pix if sigma_pix > 0 else float("inf"))
    res.set("mean_level", float(level))
    res.set("amplitude", float(amp))
    res.set("pixel_mtf", mtf)
    res.set("fringes_in_region", float((hi - lo) / per))
    res.provenance.append(("fit", {"model": "linearised along a fixed normal",
                                   "orientation_deg": t, "period_px": period}))
    res.warn("fixed geometry: the orientation is taken as given (its uncertainty is not "
             "included)")
    return res


def _crop(arr: np.ndarray | None, roi: Sequence[int] | None) -> np.ndarray | None:
    if arr is None or roi is None:
        return arr
    x, y, w, h = (int(v) for v in roi)
    return arr[y:y + h, x:x + w]


def _check_roi(roi: Sequence[int] | None, shape: tuple[int, int],
               name: str | None = None) -> None:
    if roi is None:
        return
    where = f"{name}: " if name else ""
    if len(roi) != 4:
        raise FringeError(f"{where}--roi needs four integers X Y W H, got {list(roi)}")
    x, y, w, h = (int(v) for v in roi)
    hh, ww = shape
    if w < 1 or h < 1 or x < 0 or y < 0 or x + w > ww or y + h > hh:
        raise FringeError(f"{where}region X={x} Y={y} W={w} H={h} does not fit in the "
                          f"{ww} x {hh} image")


def _calibration(dark: Any, flat: Any, options: dict):
    """Build a CalibrationSet from paths, arrays (one frame or a stack) or an existing set.

    Arrays are combined like files: a (N, H, W) stack, or a list of 2-D frames, is
    median-combined; a flat is dark-subtracted and normalised to unit mean.
    """
    from fringe import calibrate

    if isinstance(dark, calibrate.CalibrationSet):
        return dark
    if dark is None and flat is None and options.get("gain_e_per_dn") is None:
        return None

    def _split(obj):
        """(file list, frame stack or None)."""
        if obj is None:
            return [], None
        if isinstance(obj, (str, bytes)) or hasattr(obj, "__fspath__"):
            return [str(obj)], None
        if isinstance(obj, np.ndarray):
            arr = np.asarray(obj, dtype=np.float64)
            return [], arr[None] if arr.ndim == 2 else arr
        items = list(obj)
        if items and all(isinstance(o, np.ndarray) for o in items):
            return [], np.stack([np.asarray(o, dtype=np.float64) for o in items])
        return [str(o) for o in items], None

    dfiles, darr = _split(dark)
    ffiles, farr = _split(flat)
    io_opts = {k: options[k] for k in ("channel",) if k in options}
    cal = calibrate.build_calibration(
        dfiles, ffiles,
        gain_e_per_dn=options.get("gain_e_per_dn"),
        read_noise_dn=options.get("read_noise_dn"),
        **io_opts,
    )
    if darr is not None:
        if darr.ndim != 3:
            raise FringeError(f"<dark array>: expected a 2-D frame or a stack of frames, got "
                              f"shape {darr.shape}")
        cal.dark, cal.dark_err = calibrate.master_dark(darr)
        cal.dark_files = ["<array>"]
        cal.n_dark_frames = int(darr.shape[0])
    if farr is not None:
        if farr.ndim != 3:
            raise FringeError(f"<flat array>: expected a 2-D frame or a stack of frames, got "
                              f"shape {farr.shape}")
        if cal.dark is not None and cal.dark.shape != farr.shape[1:]:
            raise FringeError(f"<flat array>: shape {farr.shape[1:]} does not match the dark "
                              f"shape {cal.dark.shape}")
        try:
            cal.flat, cal.flat_err, cal.flat_bad = calibrate.master_flat(farr, dark=cal.dark)
        except FringeError as exc:
            raise FringeError(f"<flat array>: {exc}") from None
        cal.flat_files = ["<array>"]
        cal.n_flat_frames = int(farr.shape[0])
    if darr is not None or farr is not None:
        cal.bad_pixels = calibrate.bad_pixel_map(dark=cal.dark, flat=cal.flat)
        if cal.flat_bad is not None:
            cal.bad_pixels |= cal.flat_bad
    return cal


_ANALYZE_OPTS = ("min_snr", "orientation_deg", "period_px", "max_envelope_terms", "fast")


def _measure_frame(frame, cal, roi, options, infer_fn=None) -> FringeResult:
    from fringe import calibrate

    res = FringeResult(file=frame.file, frame=frame.index)
    try:
        _check_roi(roi, frame.data.shape)  # the record names the file already
        calib = calibrate.calibrate_frame(frame, cal,
                                          reject_cosmics=bool(options.get("reject_cosmics")))
    except FringeError as exc:
        return res.fail(str(exc).split("\n")[0])
    res.provenance.append(("input", {k: frame.meta.get(k) for k in
                                     ("format", "bit_depth", "full_scale", "channel",
                                      "srgb_decoded", "exposure_s", "iso")}))
    res.provenance.extend(calib.provenance)
    for wmsg in calib.warnings:
        res.warn(wmsg)
    data = _crop(calib.data, roi)
    mask = _crop(calib.mask, roi)
    var = _crop(calib.variance, roi)
    sat = _crop(frame.saturated, roi)
    sat_frac = float(sat.mean()) if sat is not None and sat.size else 0.0
    res.set("saturated_fraction", sat_frac)
    if sat_frac > 0.001:
        res.warn(f"{100 * sat_frac:.1f} % of the pixels are saturated (excluded from the fit); "
                 "reduce the exposure")
    if roi is not None:
        res.provenance.append(("roi", {"x": roi[0], "y": roi[1], "w": roi[2], "h": roi[3]}))
    analyze_image(data, mask, variance=var, result=res,
            **{k: options[k] for k in _ANALYZE_OPTS if options.get(k) is not None})
    if (cal is None or cal.dark is None) and frame.meta.get("bit_depth") and not frame.meta.get(
            "srgb_decoded"):
        res.warn("no dark frame given: a camera offset or dark signal adds to the level and "
                 "lowers the visibility (give --dark)")
    if frame.meta.get("format") == "jpeg" and res.ok and res.period_px < 16:
        res.warn(f"JPEG compression (8 x 8 blocks) lowers the contrast of fine fringes: at "
                 f"{res.period_px:.1f} px per fringe the visibility may read a few per cent "
                 "low; prefer RAW or TIFF")
    if frame.meta.get("srgb_decoded"):
        res.warn("8-bit sRGB input decoded to linear light; phone processing (tone curves, "
                 "sharpening) can still bias the visibility")
    if infer_fn is not None and res.ok:
        infer_fn(res)
    return res


def measure_frames(
    image: Any,
    *,
    dark: Any = None,
    flat: Any = None,
    roi: Sequence[int] | None = None,
    **options: Any,
) -> Iterator[FringeResult]:
    """Measure every frame of an image file (or an array), yielding one result per frame.

    Options are those of `measure`. Frames are read one at a time.
    """
    from fringe import io

    cal = _calibration(dark, flat, options)
    io_opts = {k: options[k] for k in ("channel", "srgb", "max_pixels") if k in options}
    if options.get("single_aperture") is not None:
        options = dict(options)
        options["intensity_ratio"] = _single_aperture_levels(options.pop("single_aperture"),
                                                             cal, roi, options)
    infer_fn = _inference(options)
    if isinstance(image, np.ndarray):
        arr = np.asarray(image)
        if arr.ndim == 3 and arr.shape[-1] not in (3, 4):
            frames = (io.frame_from_array(a, name=f"<array>[{i}]") for i, a in enumerate(arr))
        else:
            frames = iter([io.frame_from_array(arr, **{k: v for k, v in io_opts.items()
                                                       if k in ("channel", "srgb")})])
        for i, fr in enumerate(frames):
            fr.index = i
            yield _measure_frame(fr, cal, roi, options, infer_fn)
        return
    for fr in io.iter_frames(str(image), **io_opts):
        yield _measure_frame(fr, cal, roi, options, infer_fn)


_GEOMETRY_KEYS = ("pixel_um", "distance_mm", "slit_separation_um", "wavelength_nm",
                  "source_distance_mm", "source_shape", "scale_points", "intensity_ratio")


def _inference(options: dict):
    if not any(options.get(k) is not None for k in _GEOMETRY_KEYS):
        return None
    from fringe import infer

    geom = {k: options[k] for k in _GEOMETRY_KEYS if options.get(k) is not None}
    return lambda res: infer.infer_into(res, **geom)


def _single_aperture_levels(files, cal, roi, options) -> tuple[float, float]:
    """Mean calibrated level of each single-aperture frame over the region."""
    from fringe import calibrate, io

    io_opts = {k: options[k] for k in ("channel", "srgb", "max_pixels") if k in options}
    levels = []
    for path in files:
        fr = io.read_frame(str(path), 0, **io_opts)
        _check_roi(roi, fr.data.shape, fr.file)
        c = calibrate.calibrate_frame(fr, cal)
        data, mask = _crop(c.data, roi), _crop(c.mask, roi)
        good = ~mask & np.isfinite(data)
        if not good.any():
            raise FringeError(f"{path}: no usable pixels for the single-aperture level")
        levels.append(float(np.mean(data[good])))
    return levels[0], levels[1]


def measure(
    image: Any,
    *,
    dark: Any = None,
    flat: Any = None,
    roi: Sequence[int] | None = None,
    **options: Any,
) -> FringeResult:
    """Measure fringe period, orientation, phase and visibility of one image.

    Parameters
    ----------
    image : str, path-like or ndarray
        An image file (the first frame of a stack unless ``frame=`` is given) or a 2-D
        array (a 3-D (H, W, 3) array is colour).
    dark, flat : path, list of paths, ndarray or CalibrationSet, optional
        Dark and flat-field frames; several files are combined (median).
    roi : (X, Y, W, H), optional
        Region to analyse: X, Y the column and row of its top-left pixel.
    **options
        ``channel`` ("auto", "luma", "red", "green", "blue"), ``srgb`` ("auto", True,
        False), ``frame`` (index in a stack), ``min_snr``, ``orientation_deg`` and
        ``period_px`` (known geometry), ``max_envelope_terms``, ``gain_e_per_dn`` and
        ``read_noise_dn`` (camera noise model), ``reject_cosmics``, and the geometry
        options of `fringe.infer` (``pixel_um``, ``distance_mm``, ...).

    Returns
    -------
    FringeResult
        ``.to_dict()`` gives the JSON record; on failure ``status == "error"`` and
        ``error`` says why.

    Raises
    ------
    FringeError
        When the file cannot be read or the calibration frames do not match.

    Examples
    --------
    >>> from fringe.synth import render_fringes
    >>> img = render_fringes((128, 160), period_px=12.0, orientation_deg=30.0, phase_rad=0.5,
    ...                      visibility=0.6, mean=1000.0)
    >>> r = measure(img)
    >>> round(r.period_px, 3), round(r.orientation_deg, 2), round(r.phase_rad, 3)
    (12.0, 30.0, 0.5)
    """
    frame_index = int(options.pop("frame", 0))
    if isinstance(image, np.ndarray):
        arr = np.asarray(image)
        if arr.ndim == 3 and arr.shape[-1] not in (3, 4):
            image = arr[frame_index]
        for res in measure_frames(image, dark=dark, flat=flat, roi=roi, **options):
            return res
    from fringe import io

    cal = _calibration(dark, flat, options)
    io_opts = {k: options[k] for k in ("channel", "srgb", "max_pixels") if k in options}
    if options.get("single_aperture") is not None:
        options["intensity_ratio"] = _single_aperture_levels(options.pop("single_aperture"),
                                                             cal, roi, options)
    fr = io.read_frame(str(image), frame_index, **io_opts)
    return _measure_frame(fr, cal, roi, options, _inference(options))
