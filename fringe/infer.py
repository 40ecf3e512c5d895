"""Physical inference from a measured fringe pattern, with uncertainty propagation.

From the period (and the envelope and visibility) of a two-aperture pattern this module
infers the wavelength, the aperture separation or the distance (whichever is not
given), the slit width from a resolved single-slit envelope, the size of an extended
incoherent source from the visibility (van Cittert–Zernike theorem) and a coherence
length from the fall of the visibility across the envelope.

Every geometry value is a pair (value, standard uncertainty); uncertainties combine by
first-order propagation (GUM, JCGM 100:2008, sec. 5.1.2), and `propagate_mc` gives the
Monte-Carlo propagation of GUM Supplement 1 (JCGM 101:2008) for checking it.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from fringe._util import FringeError
from fringe.result import FringeResult

__all__ = [
    "propagate",
    "propagate_mc",
    "pixel_scale_from_points",
    "sin_theta_slope",
    "wavelength_from_period",
    "separation_from_period",
    "slit_width_from_envelope",
    "missing_orders",
    "coherence_slit",
    "coherence_disk",
    "invert_coherence",
    "source_size_from_visibility",
    "coherence_length_from_visibility",
    "infer_into",
]

Measured = tuple[float, float]


def _pair(x: Any, name: str) -> Measured:
    if x is None:
        raise FringeError(f"{name} is required")
    if isinstance(x, (tuple, list)):
        v, e = float(x[0]), float(x[1]) if len(x) > 1 else 0.0
    else:
        v, e = float(x), 0.0
    if not np.isfinite(v):
        raise FringeError(f"{name} must be a finite number, got {v}")
    if v <= 0:
        raise FringeError(f"{name} must be positive, got {v:g}")
    return v, abs(e)


def propagate(func: Callable[..., float], values: Sequence[float],
              errors: Sequence[float]) -> tuple[float, float]:
    """First-order propagation of independent standard uncertainties.

    u_c² = sum_i (df/dx_i)² u_i², with the derivatives by central differences
    (JCGM 100:2008, Guide to the Expression of Uncertainty in Measurement, eq. 10).

    Examples
    --------
    >>> val, err = propagate(lambda a, b: a * b, [2.0, 3.0], [0.1, 0.2])
    >>> round(val, 6), round(err, 6)
    (6.0, 0.5)
    """
    x = np.asarray(values, dtype=float)
    u = np.asarray(errors, dtype=float)
    f0 = float(func(*x))
    var = 0.0
    for i in range(x.size):
        if u[i] == 0:
            continue
        h = max(abs(x[i]) * 1e-6, u[i] * 1e-3)
        xp, xm = x.copy(), x.copy()
        xp[i] += h
        xm[i] -= h
        d = (float(func(*xp)) - float(func(*xm))) / (2 * h)
        var += (d * u[i]) ** 2
    return f0, float(np.sqrt(var))


def propagate_mc(func: Callable[..., float], values: Sequence[float], errors: Sequence[float],
                 *, n: int = 20000, rng: np.random.Generator | None = None
                 ) -> tuple[float, float]:
    """Monte-Carlo propagation with Gaussian inputs (JCGM 101:2008, GUM Supplement 1).

    Returns the mean and standard deviation of ``func`` over ``n`` draws.
    """
    rng = np.random.default_rng(0) if rng is None else rng
    x = np.asarray(values, dtype=float)
    u = np.asarray(errors, dtype=float)
    draws = x[None, :] + u[None, :] * rng.standard_normal((n, x.size))
    out = np.array([func(*row) for row in draws], dtype=float)
    out = out[np.isfinite(out)]
    return float(out.mean()), float(out.std(ddof=1))


def pixel_scale_from_points(p1: Sequence[float], p2: Sequence[float], distance_mm: float,
                            point_err_px: float = 0.5) -> Measured:
    """Image scale (micrometres per pixel) from two points a known distance apart.

    Each point position has standard uncertainty ``point_err_px`` in x and y, so the
    pixel distance has uncertainty about sqrt(2) times that.

    Examples
    --------
    >>> s, e = pixel_scale_from_points((100, 50), (600, 50), 100.0)
    >>> round(s, 3), round(e, 4)
    (200.0, 0.2828)
    """
    dist_px = float(np.hypot(p2[0] - p1[0], p2[1] - p1[1]))
    if dist_px <= 0:
        raise FringeError("scale points coincide: give two distinct points")
    if distance_mm <= 0:
        raise FringeError(f"scale distance must be positive, got {distance_mm} mm")
    scale = distance_mm * 1000.0 / dist_px
    return scale, float(scale * np.sqrt(2.0) * point_err_px / dist_px)


def sin_theta_slope(y_um: np.ndarray, distance_um: float) -> float:
    """Least-squares slope of sin(theta) against y over the positions ``y`` (1/µm).

    On a flat screen at distance L, sin(theta) = y / sqrt(y² + L²). The fringe phase is
    2 pi d sin(theta)/lambda, so a straight-line (constant period) fit over a region sees
    this slope instead of the small-angle 1/L.
    """
    y = np.asarray(y_um, dtype=float)
    s = y / np.sqrt(y**2 + distance_um**2)
    if y.size < 2 or np.ptp(y) == 0:
        # Local slope at a single position: d(sin theta)/dy = L² / (y² + L²)^1.5
        y0 = float(y.mean()) if y.size else 0.0
        return distance_um**2 / (y0**2 + distance_um**2) ** 1.5
    yc = y - y.mean()
    return float(np.sum(yc * (s - s.mean())) / np.sum(yc * yc))


def _region_positions(res: FringeResult, scale_um: float) -> np.ndarray:
    """Fringe-plane positions (µm, from the optical axis) of the profile bins."""
    prof = res.context.get("pooled")
    u_axis = float(res.context.get("u_envelope", 0.0))
    if prof is None:
        return np.array([0.0])
    return (prof.u - u_axis) * scale_um


def wavelength_from_period(period_px: Measured, scale_um: Measured, separation_um: Measured,
                           distance_mm: Measured, y_um: np.ndarray | None = None
                           ) -> tuple[float, float, float]:
    """Wavelength (nm) from the fringe period of two apertures.

    Parameters
    ----------
    period_px, scale_um, separation_um, distance_mm : (value, error)
        Period along the normal (px), fringe-plane size of a pixel (µm), aperture centre
        separation d (µm) and apertures-to-plane distance L (mm).
    y_um : ndarray, optional
        Positions across the fringes, from the optical axis, over which the period was
        measured (µm); default the axis itself.

    Returns
    -------
    wavelength_nm, wavelength_nm_err, small_angle_error
        ``small_angle_error`` is the relative error the small-angle form lambda = d Λ / L
        would have made.

    Notes
    -----
    Maxima satisfy d sin(theta) = m lambda with tan(theta) = y / L on a flat plane
    (Hecht, Optics, 5th ed. 2017, sec. 9.3). Over the region the phase 2 pi d sin(theta)
    / lambda is fitted by a straight line of slope 2 pi / Λ, so lambda = d Λ G with G
    the least-squares slope of sin(theta) against y (G = 1/L for small angles).
    """
    y = np.array([0.0]) if y_um is None else np.asarray(y_um, dtype=float)

    def lam(p, s, d, l_mm):
        g = sin_theta_slope(y * (s / scale_um[0]), l_mm * 1000.0)
        return d * p * s * g * 1000.0  # µm -> nm

    vals = [period_px[0], scale_um[0], separation_um[0], distance_mm[0]]
    errs = [period_px[1], scale_um[1], separation_um[1], distance_mm[1]]
    val, err = propagate(lam, vals, errs)
    small = separation_um[0] * period_px[0] * scale_um[0] / (distance_mm[0] * 1000.0) * 1000.0
    return val, err, small / val - 1.0


def separation_from_period(period_px: Measured, scale_um: Measured, wavelength_nm: Measured,
                           distance_mm: Measured, y_um: np.ndarray | None = None
                           ) -> tuple[float, float, float]:
    """Aperture separation d (µm) from the period and a known wavelength.

    The inverse of `wavelength_from_period`: d = lambda / (Λ G).
    """
    y = np.array([0.0]) if y_um is None else np.asarray(y_um, dtype=float)

    def sep(p, s, lam_nm, l_mm):
        g = sin_theta_slope(y * (s / scale_um[0]), l_mm * 1000.0)
        return lam_nm / 1000.0 / (p * s * g)

    vals = [period_px[0], scale_um[0], wavelength_nm[0], distance_mm[0]]
    errs = [period_px[1], scale_um[1], wavelength_nm[1], distance_mm[1]]
    val, err = propagate(sep, vals, errs)
    small = wavelength_nm[0] / 1000.0 * distance_mm[0] * 1000.0 / (period_px[0] * scale_um[0])
    return val, err, small / val - 1.0


def slit_width_from_envelope(zero_px: Measured, scale_um: Measured, wavelength_nm: Measured,
                             distance_mm: Measured) -> Measured:
    """Slit width a (µm) from the distance of the envelope's first zero to its centre.

    The single-slit envelope (sin beta / beta)², beta = pi a sin(theta)/lambda, has its
    first zero at a sin(theta) = lambda (Hecht, Optics, 5th ed. 2017, sec. 10.2.1), with
    sin(theta) = y / sqrt(y² + L²) for y = W s on a flat plane.
    """

    def width(w, s, lam_nm, l_mm):
        y = w * s
        lu = l_mm * 1000.0
        return lam_nm / 1000.0 / (y / np.sqrt(y * y + lu * lu))

    return propagate(width, [zero_px[0], scale_um[0], wavelength_nm[0], distance_mm[0]],
                     [zero_px[1], scale_um[1], wavelength_nm[1], distance_mm[1]])


def missing_orders(separation_um: float, width_um: float, tol: float = 0.1,
                   n: int = 3) -> list[int] | None:
    """Interference orders suppressed by the envelope zeros when d/a is near an integer.

    When d/a = k exactly, orders ±k, ±2k, ... fall on the envelope zeros and vanish
    (Hecht, Optics, 5th ed. 2017, sec. 10.2.2).

    Examples
    --------
    >>> missing_orders(250.0, 50.0)
    [5, 10, 15]
    >>> missing_orders(260.0, 50.0) is None
    True
    """
    if width_um <= 0:
        return None
    ratio = separation_um / width_um
    k = round(ratio)
    if k < 1 or abs(ratio - k) > tol:
        return None
    return [k * (i + 1) for i in range(n)]


def coherence_slit(x: np.ndarray | float) -> np.ndarray | float:
    """Complex degree of coherence of a uniform incoherent slit source: sinc(x) = sin x / x.

    x = pi w d / (lambda R) (van Cittert–Zernike; Born & Wolf, Principles of Optics, 7th
    ed. 1999, sec. 10.4.2).
    """
    return np.sinc(np.asarray(x, dtype=float) / np.pi)


def coherence_disk(x: np.ndarray | float) -> np.ndarray | float:
    """Complex degree of coherence of a uniform incoherent disk: 2 J1(x) / x.

    x = pi D d / (lambda R) (Born & Wolf, Principles of Optics, 7th ed. 1999, sec. 10.4.2;
    Goodman, Statistical Optics, 2nd ed. 2015, sec. 5.6).
    """
    from scipy.special import j1

    x = np.asarray(x, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(np.abs(x) < 1e-8, 1.0 - x**2 / 8.0, 2.0 * j1(x) / np.where(x == 0, 1, x))
    return out if out.ndim else float(out)


_FIRST_ZERO = {"slit": np.pi, "disk": 3.8317059702075125}
_SECOND_ZERO = {"slit": 2 * np.pi, "disk": 7.015586669815619}


def invert_coherence(gamma: float, shape: str, lobe: int = 1) -> float:
    """Argument x of the coherence function with |mu(x)| = gamma in the given lobe.

    Lobe 1 is the main lobe (0 < x < first zero, mu > 0); lobe 2 lies between the first
    and second zeros, where mu < 0 and the fringes are reversed.

    Examples
    --------
    >>> round(invert_coherence(0.8, "slit"), 5)
    1.1311
    """
    from scipy.optimize import brentq

    func = coherence_slit if shape == "slit" else coherence_disk
    if shape not in _FIRST_ZERO:
        raise FringeError(f"source shape must be 'slit' or 'disk', got {shape!r}")
    z1, z2 = _FIRST_ZERO[shape], _SECOND_ZERO[shape]
    if lobe == 1:
        g = float(np.clip(gamma, 1e-9, 1.0 - 1e-12))
        return float(brentq(lambda x: func(x) - g, 1e-9, z1))
    # second lobe: find the extremum, then the root on the near side of it
    xs = np.linspace(z1, z2, 2001)
    mu = func(xs)
    k = int(np.argmin(mu))
    g = float(np.clip(gamma, 1e-9, -mu[k] * (1 - 1e-9)))
    return float(brentq(lambda x: func(x) + g, z1, xs[k]))


def source_size_from_visibility(gamma: Measured, shape: str, wavelength_nm: Measured,
                                separation_um: Measured, source_distance_mm: Measured,
                                lobe: int = 1) -> tuple[Measured, Measured]:
    """Source width (slit) or diameter (disk), µm, and its angular size (mrad).

    From |mu| = gamma with x = pi w d / (lambda R): w = x lambda R / (pi d).
    """

    def size(g, lam_nm, d_um, r_mm):
        x = invert_coherence(g, shape, lobe)
        return x * lam_nm * 1e-3 * r_mm * 1e3 / (np.pi * d_um)

    vals = [gamma[0], wavelength_nm[0], separation_um[0], source_distance_mm[0]]
    errs = [gamma[1], wavelength_nm[1], separation_um[1], source_distance_mm[1]]
    w, w_err = propagate(size, vals, errs)

    def ang(g, lam_nm, d_um):
        x = invert_coherence(g, shape, lobe)
        return x * lam_nm * 1e-3 / (np.pi * d_um) * 1e3  # mrad

    a, a_err = propagate(ang, vals[:3], errs[:3])
    return (w, w_err), (a, a_err)


def coherence_length_from_visibility(opd_um: np.ndarray, vis: np.ndarray, vis_err: np.ndarray
                                     ) -> dict | None:
    """Coherence length from the fall of visibility with optical path difference.

    Fits V(D) = V0 exp(-(pi Δσ D)² / (4 ln 2)), the modulus of the Fourier transform of
    a Gaussian spectrum of FWHM Δσ in wavenumber (Goodman, Statistical Optics, 2nd ed.
    2015, sec. 5.1; references: V = 1/2 at 0.441271 lambda²/Δλ). Returns the coherence
    length l_c = 1/Δσ = lambda²/Δλ (µm) with uncertainty, or a lower limit when the fall
    is not significant.
    """
    from scipy.optimize import curve_fit

    opd = np.asarray(opd_um, dtype=float)
    v = np.asarray(vis, dtype=float)
    e = np.asarray(vis_err, dtype=float)
    ok = np.isfinite(v) & np.isfinite(e) & (e > 0)
    if ok.sum() < 4 or np.ptp(np.abs(opd[ok])) == 0:
        return None
    opd, v, e = np.abs(opd[ok]), v[ok], e[ok]
    k = np.pi**2 / (4 * np.log(2.0))

    def model(dd, v0, q):  # q = Δσ² (1/µm²), may be fitted negative within noise
        return v0 * np.exp(-k * q * dd**2)

    try:
        popt, pcov = curve_fit(model, opd, v, p0=[float(v.max()), 0.0], sigma=e,
                               absolute_sigma=True, maxfev=5000)
    except (RuntimeError, ValueError):
        return None
    q, q_err = float(popt[1]), float(np.sqrt(max(pcov[1, 1], 0.0)))
    out: dict = {"v0": float(popt[0]), "dmax_um": float(opd.max())}
    if q > 3 * q_err and q > 0:
        ds = np.sqrt(q)
        out["coherence_length_um"] = 1.0 / ds
        out["coherence_length_um_err"] = 0.5 * q_err / q / ds
        out["significant"] = True
    else:
        # 2-sigma upper limit on Δσ gives a lower limit on the coherence length
        q_up = max(q, 0.0) + 2 * q_err
        out["coherence_length_min_um"] = 1.0 / np.sqrt(q_up) if q_up > 0 else float("inf")
        out["significant"] = False
    return out


def infer_into(res: FringeResult, **geom: Any) -> FringeResult:
    """Add the physical quantities that the given geometry allows to a measurement.

    Parameters
    ----------
    res : FringeResult
        A successful measurement (from `fringe.measure`).
    **geom
        ``pixel_um`` or ``scale_points`` ((x1, y1), (x2, y2), mm, point_err_px),
        ``distance_mm``, ``slit_separation_um``, ``wavelength_nm``,
        ``source_distance_mm``, ``source_shape`` ("slit" or "disk"),
        ``intensity_ratio`` ((I1, I2) from single-aperture frames). Values may be
        numbers or (value, standard uncertainty) pairs.

    Returns
    -------
    FringeResult
        The same object, with keys such as ``wavelength_nm``, ``slit_separation_um``,
        ``distance_mm``, ``fringe_spacing_mm``, ``slit_width_um``, ``source_size_um``,
        ``source_angle_mrad``, ``coherence_length_um`` (each with ``_err``).
    """
    if not res.ok:
        return res
    period = (float(res.period_px), float(res.period_px_err or 0.0))
    scale = None
    if geom.get("pixel_um") is not None:
        scale = _pair(geom["pixel_um"], "pixel_um")
        src = "pixel_um"
    elif geom.get("scale_points") is not None:
        p1, p2, mm, perr = geom["scale_points"]
        scale = pixel_scale_from_points(p1, p2, float(mm), float(perr))
        src = "scale_points"
    lam = _pair(geom["wavelength_nm"], "wavelength_nm") if geom.get("wavelength_nm") else None
    sep = (_pair(geom["slit_separation_um"], "slit_separation_um")
           if geom.get("slit_separation_um") else None)
    dist = _pair(geom["distance_mm"], "distance_mm") if geom.get("distance_mm") else None
    info: dict = {}
    if scale is not None:
        if scale[0] <= 0:
            raise FringeError(f"pixel size must be positive, got {scale[0]} um")
        res.set("pixel_scale_um", scale[0], scale[1])
        info["scale_from"] = src
        spacing = propagate(lambda p, s: p * s / 1000.0, [period[0], scale[0]],
                            [period[1], scale[1]])
        res.set("fringe_spacing_mm", *spacing)
    if scale is not None and dist is not None:
        y = _region_positions(res, scale[0])
        small_err = None
        if sep is not None and lam is None:
            val, err, small_err = wavelength_from_period(period, scale, sep, dist, y)
            res.set("wavelength_nm", val, err)
            lam = (val, err)
        elif lam is not None and sep is None:
            val, err, small_err = separation_from_period(period, scale, lam, dist, y)
            res.set("slit_separation_um", val, err)
            sep = (val, err)
        elif lam is not None and sep is not None:
            # Everything given: report the predicted period as a check.
            def pred(lam_nm, d_um, l_mm, s):
                g = sin_theta_slope(y * (s / scale[0]), l_mm * 1000.0)
                return lam_nm / 1000.0 / (d_um * g * s)

            pp = propagate(pred, [lam[0], sep[0], dist[0], scale[0]],
                           [lam[1], sep[1], dist[1], scale[1]])
            res.set("predicted_period_px", *pp)
            dev = (period[0] - pp[0]) / np.hypot(period[1], pp[1])
            if abs(dev) > 3:
                res.warn(f"measured period differs from the geometry's prediction by "
                         f"{dev:.1f} sigma: check wavelength, separation, distance and scale")
        if small_err is not None:
            res.set("small_angle_error", small_err)
            if abs(small_err) > 1e-3:
                res.warn(f"small-angle approximation would be off by {100 * small_err:.2f} %; "
                         "the exact flat-plane relation d sin(theta) = m lambda was used")
    elif lam is not None and sep is not None and scale is not None and dist is None:
        val = propagate(lambda p, s, d, lm: p * s * d / (lm / 1000.0) / 1000.0,
                        [period[0], scale[0], sep[0], lam[0]],
                        [period[1], scale[1], sep[1], lam[1]])
        res.set("distance_mm", *val)
        dist = val
    elif lam is not None and sep is not None and dist is not None and scale is None:
        val = propagate(lambda lm, lmm, d, p: lm / 1000.0 * lmm * 1000.0 / d / p,
                        [lam[0], dist[0], sep[0], period[0]],
                        [lam[1], dist[1], sep[1], period[1]])
        res.set("pixel_scale_um", *val)
        scale = val

    # Slit width from a resolved sinc² envelope.
    zero = res.get("envelope_zero_px")
    if zero is not None and scale is not None and dist is not None and lam is not None:
        a = slit_width_from_envelope((zero, res.get("envelope_zero_px_err") or 0.0), scale,
                                     lam, dist)
        res.set("slit_width_um", *a)
        if sep is not None:
            miss = missing_orders(sep[0], a[0])
            res.set("separation_to_width", sep[0] / a[0])
            if miss:
                res.set("missing_orders", miss)
                res.warn(f"d/a = {sep[0] / a[0]:.2f} is near an integer: orders "
                         f"{', '.join(f'±{m}' for m in miss)} fall on envelope zeros")
    elif zero is not None and sep is not None:
        # Small-angle ratio a/d = P/W needs no scale or distance.
        a = propagate(lambda d, p, w: d * p / w, [sep[0], period[0], zero],
                      [sep[1], period[1], res.get("envelope_zero_px_err") or 0.0])
        res.set("slit_width_um", *a)

    # Spatial coherence of an extended source: the visibility of the two-beam pattern
    # itself, i.e. with the level under the envelope (offset, ambient light) removed when
    # the single-slit envelope fit has measured it.
    gamma = (float(res.visibility), float(res.visibility_err or 0.0))
    env = res.context.get("envelope_fit")
    gamma_from = "visibility"
    if env is not None and res.get("envelope_visibility") is not None:
        mtf = float(res.get("pixel_mtf") or 1.0)
        gamma = (float(res.envelope_visibility) / mtf,
                 float(res.envelope_visibility_err or 0.0) / mtf)
        gamma_from = "envelope_visibility"
    ratio = geom.get("intensity_ratio")
    if ratio is not None:
        i1, i2 = (float(v) for v in ratio)
        if i1 <= 0 or i2 <= 0:
            raise FringeError("single-aperture intensities must both be positive")
        factor = 2 * np.sqrt(i1 * i2) / (i1 + i2)
        gamma = (gamma[0] / factor, gamma[1] / factor)
        res.set("intensity_balance", factor)
    if geom.get("source_distance_mm") is not None and geom.get("source_shape"):
        shape = str(geom["source_shape"])
        rdist = _pair(geom["source_distance_mm"], "source_distance_mm")
        if lam is None or sep is None:
            res.warn("source size needs the wavelength and the aperture separation (given or "
                     "inferred)")
        else:
            res.set("coherence_degree", *gamma)
            phase_c = res.get("phase_at_envelope_rad")
            lobe = 1
            if phase_c is not None and abs(phase_c) > np.pi / 2:
                lobe = 2
                res.warn("contrast reversal: the fringe at the envelope centre is dark (phase "
                         f"{phase_c:.2f} rad), so the coherence is past its first zero; the "
                         "second lobe was used")
            elif phase_c is not None and abs(abs(phase_c) - np.pi / 2) < 0.3:
                res.warn("the fringe phase at the envelope centre is near ±pi/2: the lobe "
                         "(contrast reversal or not) is uncertain")
            res.set("coherence_lobe", lobe)
            if gamma[0] >= 1.0:
                res.warn("visibility is at or above 1: the source is unresolved (size below "
                         "the resolution of this baseline)")
            try:
                (w, w_err), (ang, ang_err) = source_size_from_visibility(
                    gamma, shape, lam, sep, rdist, lobe)
                res.set("source_size_um", w, w_err)
                res.set("source_angle_mrad", ang, ang_err)
                res.set("source_shape", shape)
                res.warn("source size assumes the visibility loss is due to the source size "
                         "alone (equal intensities, narrow band, no blur); it uses the "
                         + ("visibility above the level under the envelope"
                            if gamma_from == "envelope_visibility" else "visibility"))
            except ValueError as exc:
                res.warn(f"source size could not be inferred: {exc}")

    # Temporal coherence from the visibility across the envelope.
    if lam is not None and res.context.get("fit") is not None:
        _coherence_length(res, lam)
    res.provenance.append(("infer", {k: v for k, v in geom.items() if k != "scale_points"}
                           | info))
    return res


def _coherence_length(res: FringeResult, lam: Measured) -> None:
    from fringe.fit import local_visibility

    fit = res.context["fit"]
    prof = res.context["pooled"]
    sigma = res.context["sigma_pooled"]
    env = res.context.get("envelope_fit")
    period = float(res.period_px)
    # Needs the level under the pattern (from the single-slit envelope fit): without it a
    # falling envelope over an offset or ambient light also lowers the visibility.
    if env is None or res.fringes_in_region is None or res.fringes_in_region < 12:
        return
    u, v, e = local_visibility(prof, omega=fit.omega, kappa=fit.kappa, phi=fit.phi,
                               sigma=sigma, window_px=3 * period, background=env.background)
    u_axis = float(env.u0)
    inner = np.abs(u - u_axis) < 0.8 * env.width  # central lobe, away from the zeros
    u, v, e = u[inner], v[inner], e[inner]
    if u.size < 4:
        return
    opd_um = (u - u_axis) / period * lam[0] / 1000.0  # fringe order times wavelength
    out = coherence_length_from_visibility(opd_um, v, e)
    if out is None:
        return
    drop = 1.0 - float(np.exp(-np.pi**2 / (4 * np.log(2.0)) * (out["dmax_um"] /
                                                                 out.get("coherence_length_um",
                                                                         np.inf)) ** 2))
    if out.get("significant") and drop >= 0.03:
        lc = out["coherence_length_um"]
        lc_err = out["coherence_length_um_err"]
        res.set("coherence_length_um", lc, lc_err)
        bw = propagate(lambda lm, l_c: (lm / 1000.0) ** 2 / l_c * 1000.0, [lam[0], lc],
                       [lam[1], lc_err])
        res.set("bandwidth_nm", *bw)
        res.warn("coherence length assumes a Gaussian spectrum and that the visibility falls "
                 "across the pattern because of the bandwidth alone")
    elif "coherence_length_min_um" in out:
        res.set("coherence_length_min_um", out["coherence_length_min_um"])
