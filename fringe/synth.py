"""Physical scene generator: synthetic fringe captures with a known ground truth.

The functions here compute the optics numerically (aperture integrals, incoherent sums
over source points and wavelengths, pixel-area integration, shot and read noise) so that
measurements made on their output can be checked against handbook formulas.

Conventions
-----------
Arrays are indexed ``[row, col]``; x is the column (to the right) and y the row (down),
with pixel centres at integer coordinates and pixel ``(row, col)`` covering the unit
square around its centre. The reference point is ``c = ((W - 1) / 2, (H - 1) / 2)`` in
``(x, row)`` order. ``orientation_deg`` ``t`` is the direction of the fringe *normal*
(across the fringes) in degrees counter-clockwise from +x as seen on screen, so the unit
normal in ``(x, row)`` coordinates is ``n = (cos t, -sin t)`` and the unit vector along
the fringes is ``s = (sin t, cos t)``. A pure fringe pattern is

    I(r) = B + A cos(2 pi n . (r - c) / P + phi).

``python -m fringe.synth OUTDIR`` regenerates the bundled sample images.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import struct
import textwrap
import zlib
from collections.abc import Callable, Mapping, Sequence
from fractions import Fraction
from pathlib import Path
from typing import Any

import cv2
import numpy as np
from scipy import special

from fringe._util import FringeError

__all__ = [
    "render_fringes",
    "two_slit_intensity",
    "source_points",
    "gaussian_spectrum",
    "two_slit_image",
    "camera",
    "srgb_encode",
    "phone_jpeg",
    "ruler_overlay",
    "phase_drift_stack",
    "photon_stack",
    "make_samples",
    "main",
]

# --------------------------------------------------------------------------- helpers


def _shape2(shape: Sequence[int], name: str = "shape") -> tuple[int, int]:
    try:
        h, w = (int(v) for v in shape)
    except (TypeError, ValueError):
        raise FringeError(f"{name}: expected (rows, cols), got {shape!r}") from None
    if h < 1 or w < 1:
        raise FringeError(f"{name}: both sides must be at least 1 px, got {shape!r}")
    return h, w


def _positive(value: float, name: str) -> float:
    v = float(value)
    if not np.isfinite(v) or v <= 0:
        raise FringeError(f"{name} must be a positive finite number, got {value!r}")
    return v


def _nonnegative(value: float, name: str) -> float:
    v = float(value)
    if not np.isfinite(v) or v < 0:
        raise FringeError(f"{name} must be a non-negative finite number, got {value!r}")
    return v


def _visibility(value: float) -> float:
    v = float(value)
    if not 0.0 <= v <= 1.0:
        raise FringeError(f"visibility must lie in [0, 1], got {value!r}")
    return v


def _axes(orientation_deg: float) -> tuple[float, float, float, float]:
    """Return (nx, ny, sx, sy): the fringe normal n and the along-fringe vector s."""
    t = np.deg2rad(float(orientation_deg))
    return float(np.cos(t)), float(-np.sin(t)), float(np.sin(t)), float(np.cos(t))


def _weights(values: Sequence[float] | np.ndarray | None, n: int, name: str) -> np.ndarray:
    if values is None:
        return np.full(n, 1.0 / n)
    w = np.asarray(values, dtype=float).ravel()
    if w.size != n:
        raise FringeError(f"{name}: {w.size} weights for {n} points")
    if not np.all(np.isfinite(w)) or np.any(w < 0) or w.sum() <= 0:
        raise FringeError(f"{name}: weights must be finite, non-negative and not all zero")
    return w / w.sum()


def _subpixel_offsets(m: int) -> np.ndarray:
    """Centres of an m x m grid of equal sub-squares of a unit pixel, relative to its centre."""
    return (np.arange(m) + 0.5) / m - 0.5


# ------------------------------------------------------------------------ fringe maps


def render_fringes(
    shape: Sequence[int],
    *,
    period_px: float,
    orientation_deg: float,
    phase_rad: float = 0.0,
    visibility: float = 1.0,
    mean: float = 1.0,
    envelope: Callable[[np.ndarray, np.ndarray], np.ndarray] | None = None,
    pixel_area: bool = True,
) -> np.ndarray:
    """Render an ideal two-beam fringe pattern, optionally integrated over each pixel.

    Parameters
    ----------
    shape : (int, int)
        Image shape (rows H, columns W).
    period_px : float
        Fringe period P along the normal, in pixels.
    orientation_deg : float
        Direction t of the fringe normal, degrees counter-clockwise from +x on screen.
    phase_rad : float
        Fringe phase phi at the reference point c, in radians.
    visibility : float
        Fringe visibility V in [0, 1].
    mean : float
        Mean level B (any unit, e.g. photo-electrons per pixel).
    envelope : callable, optional
        ``env(u, v) -> array`` multiplying the pattern, with ``u = n . (r - c)`` across and
        ``v = s . (r - c)`` along the fringes (pixels, arrays of shape (H, W)).
    pixel_area : bool
        Average over each unit-square pixel (True) or sample at pixel centres (False).

    Returns
    -------
    image : ndarray of float64, shape (H, W)
        The pattern, in the unit of `mean`.

    Notes
    -----
    Without an envelope the pattern is ``I = B [1 + V M cos(2 pi u / P + phi)]`` where
    ``M = sinc(n_x / P) sinc(n_y / P)`` (``sinc(x) = sin(pi x) / (pi x)``) is the exact
    average of the cosine over the unit square, i.e. the pixel-aperture transfer
    function; ``M = 1`` when ``pixel_area`` is False. With an envelope the pattern is
    ``I = B env(u, v) [1 + V cos(2 pi u / P + phi)]``; the pixel average is then
    approximated by 4 x 4 sub-pixel samples (error of order (pi / (4 P))**2 / 6 of the
    modulation for a slow envelope).

    References
    ----------
    .. [1] G. D. Boreman, "Modulation Transfer Function in Optical and Electro-Optical
       Systems", SPIE Press, 2001, ch. 2 (pixel-aperture MTF).

    Examples
    --------
    >>> img = render_fringes((5, 9), period_px=4.0, orientation_deg=0.0)
    >>> round(float(img.max() - img.min()) / 2, 6)  # pixel MTF at P = 4 px
    0.900316
    """
    h, w = _shape2(shape)
    period = _positive(period_px, "period_px")
    vis = _visibility(visibility)
    b = float(mean)
    if not np.isfinite(b):
        raise FringeError(f"mean must be finite, got {mean!r}")
    nx, ny, sx, sy = _axes(orientation_deg)
    x = np.arange(w, dtype=float) - (w - 1) / 2.0
    y = np.arange(h, dtype=float) - (h - 1) / 2.0
    k = 2.0 * np.pi / period
    phi = float(phase_rad)
    if envelope is None:
        u = nx * x[None, :] + ny * y[:, None]
        mtf = float(np.sinc(nx / period) * np.sinc(ny / period)) if pixel_area else 1.0
        return b * (1.0 + vis * mtf * np.cos(k * u + phi))
    offsets = _subpixel_offsets(4) if pixel_area else np.zeros(1)
    acc = np.zeros((h, w))
    for oy in offsets:
        for ox in offsets:
            xx = (x + ox)[None, :]
            yy = (y + oy)[:, None]
            u = nx * xx + ny * yy
            v = sx * xx + sy * yy
            env = np.broadcast_to(np.asarray(envelope(u, v), dtype=float), (h, w))
            acc += env * (1.0 + vis * np.cos(k * u + phi))
    return b * acc / offsets.size**2


# ------------------------------------------------------------------ two-slit optics


def two_slit_intensity(
    y_m: float | np.ndarray,
    *,
    wavelength_m: float,
    separation_m: float,
    width_m: float,
    distance_m: float,
    source_angles: Sequence[float] | np.ndarray = (0.0,),
    source_weights: Sequence[float] | np.ndarray | None = None,
    wavelengths_m: Sequence[float] | np.ndarray | None = None,
    wavelength_weights: Sequence[float] | np.ndarray | None = None,
    n_nodes: int = 64,
) -> np.ndarray:
    """Far-field intensity of two slits on a flat screen, by numerical aperture integration.

    Parameters
    ----------
    y_m : float or ndarray
        Screen positions measured from the optical axis across the slits, in metres.
    wavelength_m : float
        Wavelength lambda in metres (ignored when `wavelengths_m` is given).
    separation_m : float
        Centre-to-centre slit separation d in metres.
    width_m : float
        Width a of each slit in metres (a < d).
    distance_m : float
        Distance L from the slits to the flat screen, in metres (or the focal length of a
        distortion-free lens mapping angle theta to L tan(theta)).
    source_angles : sequence of float
        Propagation angles alpha (radians) of the incident plane waves, one per mutually
        incoherent source point; the pattern of each is centred on theta = alpha.
    source_weights : sequence of float, optional
        Relative power of each source point (uniform when omitted; normalised to sum 1).
    wavelengths_m, wavelength_weights : sequence of float, optional
        A spectrum for an incoherent sum over wavelengths (weights normalised to sum 1).
    n_nodes : int
        Gauss-Legendre nodes per slit.

    Returns
    -------
    intensity : ndarray of float64, shape of `y_m`
        Relative intensity: 1 at y = 0 for one on-axis source at one wavelength.

    Notes
    -----
    For a plane wave at angle alpha the diffracted field in direction theta is

        E(theta) = integral over both slits of exp(-i k x (sin theta - sin alpha)) dx,

    evaluated with Gauss-Legendre nodes on each slit, with ``k = 2 pi / lambda`` and the
    exact flat-screen direction ``sin theta = y / sqrt(y**2 + L**2)``. The result is
    ``sum_j sum_s w_j w_s |E|**2 / (2 a)**2``; for one on-axis source it equals the
    closed form ``(sin beta / beta)**2 cos(alpha')**2`` with ``beta = pi a sin(theta) /
    lambda`` and ``alpha' = pi d sin(theta) / lambda``. The 1/r**2 fall-off and the
    obliquity factor of the screen irradiance are not included.

    References
    ----------
    .. [1] E. Hecht, "Optics", 5th ed., Pearson, 2017, sec. 10.2.2.
    .. [2] M. Born and E. Wolf, "Principles of Optics", 7th ed., Cambridge University
       Press, 1999, sec. 8.5 (Fraunhofer diffraction) and 10.4 (extended sources).

    Examples
    --------
    >>> i = two_slit_intensity(0.5e-3, wavelength_m=632.8e-9, separation_m=0.25e-3,
    ...                        width_m=50e-6, distance_m=1.0)
    >>> round(float(i), 6)
    0.658464
    """
    d = _positive(separation_m, "separation_m")
    a = _positive(width_m, "width_m")
    dist = _positive(distance_m, "distance_m")
    if a >= d:
        raise FringeError(f"width_m ({a:g}) must be smaller than separation_m ({d:g})")
    n_nodes = int(n_nodes)
    if n_nodes < 1:
        raise FringeError(f"n_nodes must be at least 1, got {n_nodes}")
    y = np.asarray(y_m, dtype=float)
    if not np.all(np.isfinite(y)):
        raise FringeError("y_m: positions must be finite")
    angles = np.asarray(source_angles, dtype=float).ravel()
    if angles.size == 0 or not np.all(np.abs(angles) < np.pi / 2):
        raise FringeError("source_angles: need at least one angle inside (-pi/2, pi/2)")
    sw = _weights(source_weights, angles.size, "source_weights")
    if wavelengths_m is None:
        lams = np.array([_positive(wavelength_m, "wavelength_m")])
    else:
        lams = np.asarray(wavelengths_m, dtype=float).ravel()
        if lams.size == 0 or not np.all(np.isfinite(lams) & (lams > 0)):
            raise FringeError("wavelengths_m: need positive finite wavelengths")
    lw = _weights(wavelength_weights, lams.size, "wavelength_weights")

    nodes, gw = np.polynomial.legendre.leggauss(n_nodes)
    half = a / 2.0
    xs = np.concatenate([-d / 2.0 + half * nodes, d / 2.0 + half * nodes])
    wx = np.concatenate([half * gw, half * gw])
    sin_a = np.sin(angles)
    flat = y.ravel()
    sin_t = flat / np.hypot(flat, dist)
    out = np.zeros(flat.size)
    block = 8192
    for lam, lwt in zip(lams, lw, strict=True):
        k = 2.0 * np.pi / lam
        g = np.exp(1j * k * np.outer(xs, sin_a))  # (2 n_nodes, n_sources)
        for start in range(0, flat.size, block):
            e = np.exp(-1j * k * np.outer(sin_t[start : start + block], xs)) * wx
            field = e @ g
            out[start : start + block] += lwt * ((field.real**2 + field.imag**2) @ sw)
    return (out / (2.0 * a) ** 2).reshape(y.shape)


def source_points(
    shape: str = "slit", *, size_m: float, distance_m: float, n: int = 41
) -> tuple[np.ndarray, np.ndarray]:
    """Point-source decomposition of a uniform incoherent slit or disk source.

    Parameters
    ----------
    shape : {"slit", "disk"}
        A slit of width `size_m` (long axis parallel to the slits) or a disk of diameter
        `size_m`.
    size_m : float
        Slit width w or disk diameter D, in metres.
    distance_m : float
        Distance R from the source to the slits, in metres.
    n : int
        Number of points (Gauss-Legendre nodes across the source).

    Returns
    -------
    angles : ndarray of float64, shape (n,)
        Incidence angles alpha_j = arctan(s_j / R) in radians (the set is symmetric, so a
        point at height s and its mirror image give the same set).
    weights : ndarray of float64, shape (n,)
        Relative power of each point, summing to 1. For the disk each point stands for the
        strip across the disk at s_j, so its weight is proportional to the chord length.

    Notes
    -----
    The positions s are projected on the axis across the slits. For the slit,
    ``s_j = (w / 2) x_j`` with Gauss-Legendre nodes x_j and weights g_j. For the disk the
    substitution ``s = (D / 2) sin(psi)`` removes the square-root edge of the chord
    ``2 sqrt((D / 2)**2 - s**2)``: ``psi_j = (pi / 2) x_j`` and ``weights ~ g_j cos(psi_j)**2``
    (chord times ds). With these points the fringe visibility is the modulus of the complex
    degree of coherence, ``|sinc(w d / (lambda R))|`` for the slit and ``|2 J1(x) / x|``
    with ``x = pi D d / (lambda R)`` for the disk (van Cittert-Zernike theorem).

    References
    ----------
    .. [1] M. Born and E. Wolf, "Principles of Optics", 7th ed., Cambridge University
       Press, 1999, sec. 10.4.
    .. [2] J. W. Goodman, "Statistical Optics", 2nd ed., Wiley, 2015, sec. 5.6.

    Examples
    --------
    >>> ang, wt = source_points("slit", size_m=1e-4, distance_m=1.0, n=5)
    >>> ang.shape, round(float(wt.sum()), 12)
    ((5,), 1.0)
    """
    size = _positive(size_m, "size_m")
    dist = _positive(distance_m, "distance_m")
    n = int(n)
    if n < 1:
        raise FringeError(f"n must be at least 1, got {n}")
    nodes, gw = np.polynomial.legendre.leggauss(n)
    if shape == "slit":
        s = 0.5 * size * nodes
        weights = gw.copy()
    elif shape == "disk":
        psi = 0.5 * np.pi * nodes
        s = 0.5 * size * np.sin(psi)
        weights = gw * np.cos(psi) ** 2
    else:
        raise FringeError(f"source shape must be 'slit' or 'disk', got {shape!r}")
    return np.arctan(s / dist), weights / weights.sum()


def gaussian_spectrum(
    wavelength_m: float, *, fwhm_m: float, n: int = 21
) -> tuple[np.ndarray, np.ndarray]:
    """Sample a Gaussian spectrum (in wavelength) for an incoherent sum.

    Parameters
    ----------
    wavelength_m : float
        Centre wavelength lambda_0 in metres.
    fwhm_m : float
        Full width at half maximum Delta lambda in metres.
    n : int
        Number of equally spaced wavelengths over lambda_0 +- 2 FWHM (odd n keeps the centre).

    Returns
    -------
    wavelengths : ndarray of float64, shape (n,)
        Wavelengths in metres.
    weights : ndarray of float64, shape (n,)
        ``exp(-4 ln2 (lambda - lambda_0)**2 / FWHM**2)``, normalised to sum 1.

    Notes
    -----
    The fringe visibility at optical path difference Delta is the modulus of the Fourier
    transform of the normalised spectrum, ``exp(-(pi Delta_sigma Delta)**2 / (4 ln 2))``
    with ``Delta_sigma = Delta lambda / lambda_0**2`` for a narrow line. With a step of
    0.2 FWHM the sampled sum reproduces it far beyond the coherence length (its first
    alias lies at Delta = 5 lambda_0**2 / Delta lambda).

    References
    ----------
    .. [1] J. W. Goodman, "Statistical Optics", 2nd ed., Wiley, 2015, sec. 5.1.

    Examples
    --------
    >>> lam, wt = gaussian_spectrum(546.1e-9, fwhm_m=10e-9, n=5)
    >>> [round(float(v) * 1e9, 1) for v in lam]
    [526.1, 536.1, 546.1, 556.1, 566.1]
    """
    lam0 = _positive(wavelength_m, "wavelength_m")
    fwhm = _positive(fwhm_m, "fwhm_m")
    n = int(n)
    if n < 1:
        raise FringeError(f"n must be at least 1, got {n}")
    offsets = np.linspace(-2.0 * fwhm, 2.0 * fwhm, n) if n > 1 else np.zeros(1)
    if lam0 + offsets[0] <= 0:
        raise FringeError(f"fwhm_m ({fwhm:g}) is too wide for wavelength_m ({lam0:g})")
    weights = np.exp(-4.0 * np.log(2.0) * (offsets / fwhm) ** 2)
    return lam0 + offsets, weights / weights.sum()


def two_slit_image(
    shape: Sequence[int],
    *,
    wavelength_nm: float,
    slit_separation_um: float,
    slit_width_um: float,
    distance_mm: float,
    pixel_um: float,
    orientation_deg: float = 0.0,
    axis_offset_px: tuple[float, float] = (0.0, 0.0),
    source: tuple[str, float, float] | None = None,
    bandwidth_nm: float = 0.0,
    oversample: int = 5,
    peak_irradiance: float = 1.0,
    beam_sigma_px: float | None = None,
) -> np.ndarray:
    """Irradiance of a two-slit pattern on a pixelated sensor or screen.

    Parameters
    ----------
    shape : (int, int)
        Image shape (rows H, columns W).
    wavelength_nm : float
        Centre wavelength in nm.
    slit_separation_um, slit_width_um : float
        Slit separation d and slit width a in micrometres.
    distance_mm : float
        Slit-to-sensor distance L in mm (or the focal length of a lens forming the far field).
    pixel_um : float
        Pixel pitch in micrometres, in the fringe plane (for a photographed wall: the scale).
    orientation_deg : float
        Direction of the fringe normal, degrees counter-clockwise from +x on screen.
    axis_offset_px : (float, float)
        Position (dx, dy) of the optical axis relative to the image centre c, in pixels.
    source : (str, float, float), optional
        Extended incoherent source ``("slit" | "disk", size_um, distance_mm)``; None for a
        point source on the axis.
    bandwidth_nm : float
        Full width at half maximum of a Gaussian spectrum (0: monochromatic), sampled
        with 21 wavelengths.
    oversample : int
        Sub-pixel samples per axis for the pixel-area average.
    peak_irradiance : float
        Scale: the value of relative intensity 1 (the on-axis irradiance of a point
        source), e.g. in photo-electrons per pixel.
    beam_sigma_px : float, optional
        Standard deviation of a Gaussian beam envelope along the fringes, in pixels,
        centred on the axis.

    Returns
    -------
    irradiance : ndarray of float64, shape (H, W)
        Pixel-averaged irradiance in the unit of `peak_irradiance`.

    Notes
    -----
    The 1-D pattern ``I(y)`` of :func:`two_slit_intensity` is computed on a fine grid of
    the fringe-plane coordinate ``y = pixel * u`` with ``u = n . (r - c - offset)``
    (step at most 0.05 px and P / 200), interpolated linearly to ``oversample**2``
    sub-pixel positions per pixel and averaged, which integrates it over the pixel area.
    The beam envelope ``exp(-v**2 / (2 sigma**2))`` uses ``v = s . (r - c - offset)``.
    The local fringe period at the axis is ``lambda L / (d pixel)`` pixels.

    References
    ----------
    .. [1] E. Hecht, "Optics", 5th ed., Pearson, 2017, sec. 10.2.2.
    .. [2] M. Born and E. Wolf, "Principles of Optics", 7th ed., Cambridge University
       Press, 1999, sec. 10.4.

    Examples
    --------
    >>> img = two_slit_image((9, 33), wavelength_nm=532.0, slit_separation_um=2000.0,
    ...                      slit_width_um=250.0, distance_mm=300.0, pixel_um=4.8)
    >>> int(np.argmax(img[4]))  # the central maximum sits on the axis
    16
    """
    h, w = _shape2(shape)
    lam = _positive(wavelength_nm, "wavelength_nm") * 1e-9
    d = _positive(slit_separation_um, "slit_separation_um") * 1e-6
    a = _positive(slit_width_um, "slit_width_um") * 1e-6
    dist = _positive(distance_mm, "distance_mm") * 1e-3
    pix = _positive(pixel_um, "pixel_um") * 1e-6
    bandwidth = _nonnegative(bandwidth_nm, "bandwidth_nm") * 1e-9
    oversample = int(oversample)
    if oversample < 1:
        raise FringeError(f"oversample must be at least 1, got {oversample}")
    try:
        off_x, off_y = (float(v) for v in axis_offset_px)
    except (TypeError, ValueError):
        raise FringeError(f"axis_offset_px: expected (dx, dy), got {axis_offset_px!r}") from None
    nx, ny, sx, sy = _axes(orientation_deg)
    ax = (w - 1) / 2.0 + off_x
    ay = (h - 1) / 2.0 + off_y

    angles, weights = np.zeros(1), None
    if source is not None:
        try:
            kind, size_um, src_mm = source
        except (TypeError, ValueError):
            raise FringeError(
                f"source: expected (kind, size_um, distance_mm), got {source!r}") from None
        angles, weights = source_points(
            kind, size_m=_positive(size_um, "source size") * 1e-6,
            distance_m=_positive(src_mm, "source distance") * 1e-3,
        )
    lams, lam_w = (None, None)
    if bandwidth > 0:
        lams, lam_w = gaussian_spectrum(lam, fwhm_m=bandwidth, n=21)

    period_px = lam * dist / (d * pix)
    step = min(0.05, period_px / 200.0)
    corners_x = np.array([-0.5, w - 0.5, -0.5, w - 0.5]) - ax
    corners_y = np.array([-0.5, -0.5, h - 0.5, h - 0.5]) - ay
    u_corner = nx * corners_x + ny * corners_y
    grid = np.arange(u_corner.min() - 2 * step, u_corner.max() + 3 * step, step)
    profile = two_slit_intensity(
        grid * pix, wavelength_m=lam, separation_m=d, width_m=a, distance_m=dist,
        source_angles=angles, source_weights=weights,
        wavelengths_m=lams, wavelength_weights=lam_w,
    )
    sigma = None if beam_sigma_px is None else _positive(beam_sigma_px, "beam_sigma_px")
    x = np.arange(w, dtype=float) - ax
    y = np.arange(h, dtype=float) - ay
    offsets = _subpixel_offsets(oversample)
    acc = np.zeros((h, w))
    for oy in offsets:
        yy = (y + oy)[:, None]
        for ox in offsets:
            xx = (x + ox)[None, :]
            val = np.interp(nx * xx + ny * yy, grid, profile)
            if sigma is not None:
                val = val * np.exp(-0.5 * ((sx * xx + sy * yy) / sigma) ** 2)
            acc += val
    return float(peak_irradiance) * acc / offsets.size**2


# --------------------------------------------------------------------------- sensors


def _fixed_pattern(
    frame_shape: tuple[int, int], fixed_seed: int, hot_pixels: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Unit PRNU and DSNU maps and the hot-pixel excess (electrons) of one camera."""
    g = np.random.default_rng(int(fixed_seed))
    prnu_unit = g.standard_normal(frame_shape)
    dsnu_unit = g.standard_normal(frame_shape)
    order = g.permutation(frame_shape[0] * frame_shape[1])
    levels = 10.0 ** g.uniform(2.5, 4.0, size=hot_pixels)
    hot = np.zeros(frame_shape[0] * frame_shape[1])
    hot[order[:hot_pixels]] = levels
    return prnu_unit, dsnu_unit, hot.reshape(frame_shape)


def camera(
    irradiance_e: np.ndarray,
    *,
    rng: np.random.Generator,
    gain_dn_per_e: float = 0.5,
    read_noise_e: float = 5.0,
    offset_dn: float = 100.0,
    dark_e: float = 0.0,
    bit_depth: int = 16,
    prnu: float = 0.0,
    dsnu_dn: float = 0.0,
    hot_pixels: int = 0,
    fixed_seed: int = 1234,
) -> np.ndarray:
    """Turn expected photo-electrons into raw counts of a linear camera.

    Parameters
    ----------
    irradiance_e : ndarray, shape (H, W) or (N, H, W)
        Expected photo-electrons per pixel (per frame for a stack); not modified.
    rng : numpy.random.Generator
        Generator for the temporal noise (shot and read noise).
    gain_dn_per_e : float
        System gain K in DN per electron.
    read_noise_e : float
        Read-noise standard deviation in electrons.
    offset_dn : float
        Black level in DN.
    dark_e : float
        Mean dark electrons per pixel per frame.
    bit_depth : int
        ADC bits (1-16); values are clipped to [0, 2**bit_depth - 1] and stored as uint16.
    prnu : float
        Relative standard deviation of the pixel response (photo-response non-uniformity).
    dsnu_dn : float
        Standard deviation of the per-pixel offset pattern in DN (dark-signal
        non-uniformity).
    hot_pixels : int
        Number of hot pixels, each with an extra fixed dark signal of 10**U(2.5, 4) electrons.
    fixed_seed : int
        Seed of the separate generator that draws the fixed pattern (PRNU, DSNU, hot
        pixels), so that dark, flat and science frames of one camera share it.

    Returns
    -------
    raw : ndarray of uint16, shape of `irradiance_e`
        Raw counts in DN.

    Notes
    -----
    ``n_e ~ Poisson(e (1 + prnu g1) + dark + hot)``, ``y = round(K (n_e + N(0, sigma_r))
    + offset + dsnu g2)``, clipped, with fixed unit-normal maps g1, g2. Without
    saturation the mean is ``K (e + dark) + offset`` and the temporal variance
    ``K**2 (e + dark + sigma_r**2) + 1/12`` DN**2 (the last term from rounding), the
    linear photon-transfer model.

    References
    ----------
    .. [1] EMVA Standard 1288, "Standard for Characterization of Image Sensors and
       Cameras", Release 4.0 Linear, European Machine Vision Association, 2021.

    Examples
    --------
    >>> raw = camera(np.full((2, 3), 1000.0), rng=np.random.default_rng(0), bit_depth=12)
    >>> raw.dtype.name, raw.shape
    ('uint16', (2, 3))
    """
    e = np.asarray(irradiance_e, dtype=float)
    if e.ndim not in (2, 3) or e.size == 0:
        raise FringeError(
            f"irradiance_e: expected a (H, W) or (N, H, W) array, got shape {e.shape}")
    if not np.all(np.isfinite(e)) or np.any(e < 0):
        raise FringeError("irradiance_e: expected electrons must be finite and non-negative")
    gain = _positive(gain_dn_per_e, "gain_dn_per_e")
    read = _nonnegative(read_noise_e, "read_noise_e")
    dark = _nonnegative(dark_e, "dark_e")
    prnu = _nonnegative(prnu, "prnu")
    dsnu = _nonnegative(dsnu_dn, "dsnu_dn")
    bits = int(bit_depth)
    if not 1 <= bits <= 16:
        raise FringeError(f"bit_depth must be between 1 and 16, got {bit_depth!r}")
    frame_shape = (e.shape[-2], e.shape[-1])
    hot_pixels = int(hot_pixels)
    if not 0 <= hot_pixels <= frame_shape[0] * frame_shape[1]:
        raise FringeError(f"hot_pixels must be between 0 and the pixel count, got {hot_pixels}")
    prnu_unit, dsnu_unit, hot = _fixed_pattern(frame_shape, fixed_seed, hot_pixels)
    expected = np.maximum(e * (1.0 + prnu * prnu_unit), 0.0) + dark + hot
    electrons = rng.poisson(expected).astype(float)
    if read > 0:
        electrons += rng.normal(0.0, read, size=e.shape)
    dn = gain * electrons + float(offset_dn) + dsnu * dsnu_unit
    return np.clip(np.rint(dn), 0, 2**bits - 1).astype(np.uint16)


def srgb_encode(linear: np.ndarray | float) -> np.ndarray:
    """Encode linear values with the sRGB transfer function (IEC 61966-2-1).

    Parameters
    ----------
    linear : array_like
        Linear values; clipped to [0, 1] first.

    Returns
    -------
    encoded : ndarray of float64
        ``12.92 L`` for ``L <= 0.0031308``, else ``1.055 L**(1/2.4) - 0.055``.

    References
    ----------
    .. [1] IEC 61966-2-1:1999, "Multimedia systems and equipment - Colour measurement and
       management - Part 2-1: Default RGB colour space - sRGB".

    Examples
    --------
    >>> round(float(srgb_encode(0.18)), 6)
    0.461356
    """
    lin = np.clip(np.asarray(linear, dtype=float), 0.0, 1.0)
    return np.where(
        lin <= 0.0031308, 12.92 * lin, 1.055 * np.maximum(lin, 0.0031308) ** (1 / 2.4) - 0.055
    )


def _exif_app1(exif: Mapping[str, float]) -> bytes:
    """A minimal EXIF APP1 segment with ExposureTime and ISOSpeedRatings (little-endian)."""
    unknown = set(exif) - {"exposure_s", "iso"}
    if unknown:
        raise FringeError(f"exif: unknown keys {sorted(unknown)}; allowed: exposure_s, iso")
    entries: list[tuple[int, int, int, bytes]] = []  # tag, type, count, 4-byte value field
    data = b""
    n_entries = len(exif)
    data_offset = 8 + 18 + 2 + 12 * n_entries + 4  # header, IFD0, Exif IFD
    if "exposure_s" in exif:
        t = _positive(exif["exposure_s"], "exif exposure_s")
        frac = Fraction(t).limit_denominator(1_000_000)
        entries.append((0x829A, 5, 1, struct.pack("<I", data_offset + len(data))))
        data += struct.pack("<II", frac.numerator, frac.denominator)
    if "iso" in exif:
        iso = int(exif["iso"])
        if not 1 <= iso <= 65535:
            raise FringeError(f"exif iso must be between 1 and 65535, got {exif['iso']!r}")
        entries.append((0x8827, 3, 1, struct.pack("<HH", iso, 0)))
    tiff = b"II*\x00" + struct.pack("<I", 8)
    tiff += struct.pack("<HHHII", 1, 0x8769, 4, 1, 26) + struct.pack("<I", 0)
    tiff += struct.pack("<H", len(entries))
    for tag, typ, count, value in entries:
        tiff += struct.pack("<HHI", tag, typ, count) + value
    tiff += struct.pack("<I", 0) + data
    payload = b"Exif\x00\x00" + tiff
    return b"\xff\xe1" + struct.pack(">H", len(payload) + 2) + payload


def phone_jpeg(
    linear_rgb: np.ndarray,
    *,
    quality: int = 92,
    exposure: float = 1.0,
    white_balance: tuple[float, float, float] = (1.0, 1.0, 1.0),
    rng: np.random.Generator | None = None,
    exif: Mapping[str, float] | None = None,
) -> bytes:
    """Encode a linear RGB scene the way a phone camera app would: sRGB, 8 bit, JPEG.

    Parameters
    ----------
    linear_rgb : ndarray, shape (H, W, 3)
        Scene-referred linear R, G, B (1 = full scale); not modified.
    quality : int
        JPEG quality (1-100).
    exposure : float
        Multiplier applied before white balance.
    white_balance : (float, float, float)
        Per-channel gains for R, G, B.
    rng : numpy.random.Generator, optional
        When given, a uniform dither of +-0.5 code value is added before 8-bit rounding.
    exif : dict, optional
        ``{"exposure_s": 1/120, "iso": 200}``: written as a minimal EXIF APP1 segment
        (ExposureTime 0x829A RATIONAL and ISOSpeedRatings 0x8827 SHORT in the Exif sub-IFD
        0x8769) right after the start-of-image marker.

    Returns
    -------
    jpeg : bytes
        The JPEG file.

    Notes
    -----
    ``code = round(255 srgb(clip(exposure * wb * L, 0, 1)))``. OpenCV stores pixels in
    B, G, R order, so the channels are reversed before encoding; decoding with
    ``cv2.imdecode`` returns B, G, R. JPEG adds 8 x 8 DCT quantisation and chroma
    subsampling, so the decoded codes are not exactly the encoded ones.

    References
    ----------
    .. [1] IEC 61966-2-1:1999 (sRGB).
    .. [2] ITU-T Recommendation T.81 (1992), ISO/IEC 10918-1 (JPEG).
    .. [3] CIPA DC-008, "Exchangeable image file format for digital still cameras: Exif".

    Examples
    --------
    >>> jpg = phone_jpeg(np.full((8, 8, 3), 0.18), exif={"exposure_s": 1 / 120, "iso": 200})
    >>> jpg[:4] == b"\\xff\\xd8\\xff\\xe1"
    True
    """
    img = np.asarray(linear_rgb, dtype=float)
    if img.ndim != 3 or img.shape[2] != 3 or img.shape[0] < 1 or img.shape[1] < 1:
        raise FringeError(f"linear_rgb: expected an (H, W, 3) array, got shape {img.shape}")
    if not np.all(np.isfinite(img)):
        raise FringeError("linear_rgb: values must be finite")
    q = int(quality)
    if not 1 <= q <= 100:
        raise FringeError(f"quality must be between 1 and 100, got {quality!r}")
    wb = np.asarray(white_balance, dtype=float)
    if wb.shape != (3,) or not np.all(np.isfinite(wb) & (wb >= 0)):
        raise FringeError(
            f"white_balance: expected three non-negative gains, got {white_balance!r}")
    codes = 255.0 * srgb_encode(img * float(exposure) * wb)
    if rng is not None:
        codes = codes + rng.uniform(-0.5, 0.5, size=codes.shape)
    codes8 = np.clip(np.rint(codes), 0, 255).astype(np.uint8)
    ok, buf = cv2.imencode(
        ".jpg", np.ascontiguousarray(codes8[:, :, ::-1]), [cv2.IMWRITE_JPEG_QUALITY, q]
    )
    if not ok:
        raise FringeError("phone_jpeg: the JPEG encoder failed")
    data = buf.tobytes()
    if exif:
        data = data[:2] + _exif_app1(exif) + data[2:]
    return data


def ruler_overlay(
    shape: Sequence[int],
    *,
    start_px: tuple[float, float],
    direction_deg: float,
    tick_spacing_px: float,
    n_ticks: int,
    width_px: float = 40.0,
    tick_width_px: float = 2.0,
) -> np.ndarray:
    """A bright ruler band with dark tick marks, to composite into a scene.

    Parameters
    ----------
    shape : (int, int)
        Image shape (rows H, columns W).
    start_px : (float, float)
        Position (x, y) of tick 0 on the ticked edge of the ruler, in pixels.
    direction_deg : float
        Direction along the ruler, degrees counter-clockwise from +x on screen.
    tick_spacing_px : float
        Distance between neighbouring ticks in pixels.
    n_ticks : int
        Number of ticks; tick k sits at ``start + k * spacing * e`` with
        ``e = (cos t, -sin t)``.
    width_px : float
        Width of the band across the ruler; it lies on the side of
        ``p = (sin t, cos t)`` (below the ticked edge for t = 0).
    tick_width_px : float
        Width of each tick line.

    Returns
    -------
    overlay : ndarray of float64, shape (2, H, W)
        ``overlay[0]`` is the ruler's pixel coverage alpha in [0, 1] and ``overlay[1]`` the
        mean reflectance of the covered part (0.85 on the band, 0.05 on the ticks).
        Composite with ``scene * (1 - alpha) + alpha * reflectance * illumination``.

    Notes
    -----
    Ticks are 0.35 of the width long, every fifth 0.55 and every tenth 0.8. Coverage is
    computed from 4 x 4 sub-pixel samples inside the ruler's bounding box.

    Examples
    --------
    >>> ov = ruler_overlay((40, 60), start_px=(10, 5), direction_deg=0.0,
    ...                    tick_spacing_px=10, n_ticks=5, width_px=20)
    >>> ov.shape
    (2, 40, 60)
    """
    h, w = _shape2(shape)
    spacing = _positive(tick_spacing_px, "tick_spacing_px")
    width = _positive(width_px, "width_px")
    tick_w = _positive(tick_width_px, "tick_width_px")
    n_ticks = int(n_ticks)
    if n_ticks < 1:
        raise FringeError(f"n_ticks must be at least 1, got {n_ticks}")
    x0, y0 = (float(v) for v in start_px)
    ex, ey, perp_x, perp_y = _axes(direction_deg)
    margin = max(0.5 * spacing, 2.0 * tick_w)
    a_lo, a_hi = -margin, (n_ticks - 1) * spacing + margin
    corners = [(a, b) for a in (a_lo, a_hi) for b in (0.0, width)]
    cx = [x0 + a * ex + b * perp_x for a, b in corners]
    cy = [y0 + a * ey + b * perp_y for a, b in corners]
    c0, c1 = max(int(np.floor(min(cx))) - 1, 0), min(int(np.ceil(max(cx))) + 2, w)
    r0, r1 = max(int(np.floor(min(cy))) - 1, 0), min(int(np.ceil(max(cy))) + 2, h)
    out = np.zeros((2, h, w))
    if c0 >= c1 or r0 >= r1:
        return out
    xs = np.arange(c0, c1, dtype=float)[None, :]
    ys = np.arange(r0, r1, dtype=float)[:, None]
    cover = np.zeros((r1 - r0, c1 - c0))
    refl = np.zeros_like(cover)
    offs = _subpixel_offsets(4)
    for oy in offs:
        for ox in offs:
            dx, dy = xs + ox - x0, ys + oy - y0
            a = dx * ex + dy * ey
            b = dx * perp_x + dy * perp_y
            inside = (a >= a_lo) & (a <= a_hi) & (b >= 0) & (b <= width)
            k = np.clip(np.rint(a / spacing), 0, n_ticks - 1)
            length = np.where(k % 10 == 0, 0.8, np.where(k % 5 == 0, 0.55, 0.35)) * width
            tick = inside & (np.abs(a - k * spacing) <= tick_w / 2) & (b <= length)
            cover += inside
            refl += np.where(tick, 0.05, 0.85) * inside
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_refl = np.where(cover > 0, refl / cover, 0.0)
    out[0, r0:r1, c0:c1] = cover / offs.size**2
    out[1, r0:r1, c0:c1] = mean_refl
    return out


# ---------------------------------------------------------------------------- stacks


def phase_drift_stack(
    n_frames: int,
    shape: Sequence[int],
    *,
    period_px: float,
    orientation_deg: float,
    visibility: float,
    drift_rad_per_frame: float,
    jitter_rad: float,
    rng: np.random.Generator,
    mean_e: float,
    phase0_rad: float = 0.0,
    camera_options: Mapping[str, Any] | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """A stack of tilt fringes whose phase drifts linearly with random jitter.

    Parameters
    ----------
    n_frames : int
        Number of frames N.
    shape : (int, int)
        Frame shape (H, W).
    period_px, orientation_deg, visibility : float
        Fringe period (px), normal direction (deg) and visibility, as in
        :func:`render_fringes`.
    drift_rad_per_frame : float
        Phase change per frame in radians.
    jitter_rad : float
        Standard deviation of the extra random phase of each frame, in radians.
    rng : numpy.random.Generator
        Draws the jitter, then the camera noise.
    mean_e : float
        Mean photo-electrons per pixel.
    phase0_rad : float
        Phase of frame 0 before jitter.
    camera_options : dict, optional
        Keyword options passed to :func:`camera` (e.g. ``gain_dn_per_e``, ``bit_depth``).

    Returns
    -------
    stack : ndarray of uint16, shape (N, H, W)
        Raw frames.
    phases : ndarray of float64, shape (N,)
        True (unwrapped) phase of each frame at the reference point c, in radians.

    Notes
    -----
    ``phi_k = phi_0 + k delta + sigma_j g_k`` with standard normal g_k; frame k is
    ``camera(render_fringes(..., phase_rad=phi_k, mean=mean_e))`` with pixel-area
    integration, so its visibility in the image is V sinc(n_x / P) sinc(n_y / P).

    Examples
    --------
    >>> st, ph = phase_drift_stack(3, (16, 16), period_px=8.0, orientation_deg=0.0,
    ...     visibility=0.8, drift_rad_per_frame=0.5, jitter_rad=0.0,
    ...     rng=np.random.default_rng(1), mean_e=1000.0)
    >>> st.shape, [round(float(p), 2) for p in ph]
    ((3, 16, 16), [0.0, 0.5, 1.0])
    """
    n = int(n_frames)
    if n < 1:
        raise FringeError(f"n_frames must be at least 1, got {n_frames!r}")
    jitter = _nonnegative(jitter_rad, "jitter_rad")
    mean = _nonnegative(mean_e, "mean_e")
    phases = float(phase0_rad) + float(drift_rad_per_frame) * np.arange(n)
    phases = phases + jitter * rng.standard_normal(n)
    expected = np.stack([
        render_fringes(shape, period_px=period_px, orientation_deg=orientation_deg,
                       phase_rad=p, visibility=visibility, mean=mean)
        for p in phases
    ])
    return camera(expected, rng=rng, **dict(camera_options or {})), phases


def _fringe_positions(
    count: int, shape: tuple[int, int], *, period: float, orientation_deg: float,
    visibility: float, phase: float, rng: np.random.Generator,
) -> tuple[np.ndarray, np.ndarray]:
    """Draw photon positions from the density 1 + V cos(2 pi u / P + phi) by rejection."""
    h, w = shape
    nx, ny, _, _ = _axes(orientation_deg)
    xs, ys = [np.zeros(0)], [np.zeros(0)]
    got = 0
    while got < count:
        m = int(1.3 * (count - got) * (1 + visibility)) + 16
        x = rng.uniform(-0.5, w - 0.5, m)
        y = rng.uniform(-0.5, h - 0.5, m)
        u = nx * (x - (w - 1) / 2.0) + ny * (y - (h - 1) / 2.0)
        density = 1.0 + visibility * np.cos(2 * np.pi * u / period + phase)
        keep = rng.uniform(0.0, 1.0 + visibility, m) < density
        take = min(int(keep.sum()), count - got)
        xs.append(x[keep][:take])
        ys.append(y[keep][:take])
        got += take
    return np.concatenate(xs), np.concatenate(ys)


def _splat(
    image: np.ndarray, frame: np.ndarray, x: np.ndarray, y: np.ndarray, charge: np.ndarray,
    sigma: float,
) -> None:
    """Add Gaussian-PSF events (integrated over pixels) to a float stack, in place."""
    n, h, w = image.shape
    flat = image.reshape(-1)
    if sigma <= 0:
        ix, iy = np.rint(x).astype(int), np.rint(y).astype(int)
        ok = (ix >= 0) & (ix < w) & (iy >= 0) & (iy < h)
        np.add.at(flat, ((frame * h + iy) * w + ix)[ok], charge[ok])
        return
    r = max(1, int(np.ceil(4 * sigma)))
    offs = np.arange(-r, r + 1)
    px = np.rint(x).astype(int)[:, None] + offs[None, :]
    py = np.rint(y).astype(int)[:, None] + offs[None, :]
    dx = (px - x[:, None]) / sigma
    dy = (py - y[:, None]) / sigma
    half = 0.5 / sigma
    wx = special.ndtr(dx + half) - special.ndtr(dx - half)
    wy = special.ndtr(dy + half) - special.ndtr(dy - half)
    weights = charge[:, None, None] * wy[:, :, None] * wx[:, None, :]
    valid = ((py >= 0) & (py < h))[:, :, None] & ((px >= 0) & (px < w))[:, None, :]
    idx = (frame[:, None, None] * h + py[:, :, None]) * w + px[:, None, :]
    np.add.at(flat, idx[valid], weights[valid])


def photon_stack(
    n_frames: int,
    shape: Sequence[int],
    *,
    period_px: float,
    orientation_deg: float,
    visibility: float,
    phase_rad: float,
    photons_per_frame: float,
    background_per_px: float,
    rng: np.random.Generator,
    gain_dn_per_photon: float = 20.0,
    read_noise_e: float = 0.1,
    offset_dn: float = 100.0,
    psf_sigma_px: float = 0.7,
    cosmic_rays_per_frame: float = 0.02,
) -> tuple[np.ndarray, dict[str, Any]]:
    """A low-light stack of single-photon events from a fringe pattern.

    Parameters
    ----------
    n_frames : int
        Number of frames N.
    shape : (int, int)
        Frame shape (H, W).
    period_px, orientation_deg, visibility, phase_rad : float
        The fringe pattern of the photon arrival density, as in :func:`render_fringes`.
    photons_per_frame : float
        Mean number of signal photons per frame (Poisson).
    background_per_px : float
        Mean uniform background events per pixel per frame (stray light, dark counts and
        clock-induced charge; present in dark frames too).
    rng : numpy.random.Generator
        Source of all randomness.
    gain_dn_per_photon : float
        Mean signal of one event in DN; each event's signal is exponentially distributed
        (high-gain electron multiplication).
    read_noise_e : float
        Read noise in photo-electron units (DN standard deviation = read_noise_e *
        gain_dn_per_photon).
    offset_dn : float
        Black level in DN.
    psf_sigma_px : float
        Standard deviation of the Gaussian spot of one event, in pixels.
    cosmic_rays_per_frame : float
        Mean number of cosmic-ray tracks per frame.

    Returns
    -------
    stack : ndarray of uint16, shape (N, H, W)
        Raw frames (16 bit).
    truth : dict
        The inputs plus ``signal_photons`` and ``background_events`` (per-frame counts),
        ``cosmic_rays`` (list of {frame, x0, y0, x1, y1, dn_per_px}) and
        ``visibility_expected_image``: V times the Gaussian-spot and pixel transfer
        factors, the visibility of the mean image once offset and background are removed.

    Notes
    -----
    Signal photons are placed with density ``1 + V cos(2 pi u / P + phi)`` over the
    frame (rejection sampling), background events uniformly; each event deposits its
    signal over the pixels by the pixel-integrated Gaussian spot. The expected image
    is the pattern convolved with spot and pixel, so its modulation is
    ``V exp(-2 pi**2 sigma**2 / P**2) sinc(n_x / P) sinc(n_y / P)``; with the background
    ``D`` per pixel it is diluted by ``S / (S + D)`` with ``S = photons / (H W)``.
    Cosmic rays are straight tracks, 5-30 px long, of 400-3000 DN per pixel.

    References
    ----------
    .. [1] M. S. Robbins and B. J. Hadwen, "The noise performance of electron multiplying
       charge-coupled devices", IEEE Trans. Electron Devices 50(5), 1227-1232, 2003.

    Examples
    --------
    >>> st, truth = photon_stack(2, (32, 32), period_px=8.0, orientation_deg=0.0,
    ...     visibility=0.8, phase_rad=0.0, photons_per_frame=30, background_per_px=0.0,
    ...     rng=np.random.default_rng(3), cosmic_rays_per_frame=0.0)
    >>> st.shape, st.dtype.name
    ((2, 32, 32), 'uint16')
    """
    n = int(n_frames)
    if n < 1:
        raise FringeError(f"n_frames must be at least 1, got {n_frames!r}")
    h, w = _shape2(shape)
    period = _positive(period_px, "period_px")
    vis = _visibility(visibility)
    photons = _nonnegative(photons_per_frame, "photons_per_frame")
    bg = _nonnegative(background_per_px, "background_per_px")
    gain = _positive(gain_dn_per_photon, "gain_dn_per_photon")
    read_dn = _nonnegative(read_noise_e, "read_noise_e") * gain
    sigma = _nonnegative(psf_sigma_px, "psf_sigma_px")
    cr_rate = _nonnegative(cosmic_rays_per_frame, "cosmic_rays_per_frame")

    n_sig = rng.poisson(photons, n)
    n_bg = rng.poisson(bg * h * w, n)
    sx, sy = _fringe_positions(int(n_sig.sum()), (h, w), period=period,
                               orientation_deg=orientation_deg, visibility=vis,
                               phase=float(phase_rad), rng=rng)
    bx = rng.uniform(-0.5, w - 0.5, int(n_bg.sum()))
    by = rng.uniform(-0.5, h - 0.5, int(n_bg.sum()))
    x = np.concatenate([sx, bx])
    y = np.concatenate([sy, by])
    frame = np.concatenate([np.repeat(np.arange(n), n_sig), np.repeat(np.arange(n), n_bg)])
    charge = rng.exponential(gain, size=x.size)
    image = np.zeros((n, h, w))
    _splat(image, frame, x, y, charge, sigma)

    rays = []
    for f, count in enumerate(rng.poisson(cr_rate, n)):
        for _ in range(int(count)):
            x0, y0 = rng.uniform(0, w - 1), rng.uniform(0, h - 1)
            ang = rng.uniform(0, np.pi)
            length = rng.uniform(5.0, 30.0)
            level = rng.uniform(400.0, 3000.0)
            t = np.arange(0.0, length + 1e-9, 0.25)
            px = np.rint(x0 + t * np.cos(ang)).astype(int)
            py = np.rint(y0 + t * np.sin(ang)).astype(int)
            ok = (px >= 0) & (px < w) & (py >= 0) & (py < h)
            np.add.at(image[f], (py[ok], px[ok]), 0.25 * level)
            rays.append({
                "frame": f, "x0": round(x0, 3), "y0": round(y0, 3),
                "x1": round(x0 + length * np.cos(ang), 3),
                "y1": round(y0 + length * np.sin(ang), 3), "dn_per_px": round(level, 1),
            })
    if read_dn > 0:
        image += rng.normal(0.0, read_dn, size=image.shape)
    stack = np.clip(np.rint(image + float(offset_dn)), 0, 65535).astype(np.uint16)

    nx, ny, _, _ = _axes(orientation_deg)
    mtf = float(np.exp(-2 * (np.pi * sigma / period) ** 2)
                * np.sinc(nx / period) * np.sinc(ny / period))
    s = photons / (h * w)
    truth = {
        "period_px": period, "orientation_deg": float(orientation_deg), "visibility": vis,
        "phase_rad": float(phase_rad), "photons_per_frame": photons,
        "background_per_px": bg, "gain_dn_per_photon": gain, "read_noise_dn": read_dn,
        "offset_dn": float(offset_dn), "psf_sigma_px": sigma,
        "signal_photons": [int(v) for v in n_sig],
        "background_events": [int(v) for v in n_bg],
        "cosmic_rays": rays,
        "visibility_expected_image": vis * mtf,
        "visibility_expected_with_background": vis * mtf * s / (s + bg) if s + bg > 0 else 0.0,
    }
    return stack, truth


# -------------------------------------------------------------------- file writing


def _tiff_bytes(pages: np.ndarray, *, description: str | None = None) -> bytes:
    """Encode uint16 page(s) as a little-endian, deflate-compressed baseline TIFF.

    One strip per page. The horizontal-differencing predictor (TIFF tag 317 = 2) is used
    for the whole file when a quick trial shows it makes the file smaller. Written here
    rather than with a TIFF library so that the bytes do not depend on its version.
    """
    arr = np.asarray(pages)
    if arr.ndim == 2:
        arr = arr[None]
    if arr.dtype != np.uint16 or arr.ndim != 3:
        raise FringeError(f"TIFF writer: expected uint16 (N, H, W), got {arr.dtype} {arr.shape}")
    _, h, w = arr.shape
    diff = arr.copy()
    diff[:, :, 1:] = arr[:, :, 1:] - arr[:, :, :-1]  # modulo 2**16, as the predictor defines

    def trial(a: np.ndarray) -> int:
        return sum(len(zlib.compress(p.astype("<u2").tobytes(), 1)) for p in a)

    use_pred = trial(diff) < trial(arr)
    strips = [zlib.compress(p.astype("<u2").tobytes(), 6) for p in (diff if use_pred else arr)]
    desc = None if description is None else description.encode("ascii") + b"\x00"
    software = b"fringe.synth\x00"
    short, long_, ascii_ = 3, 4, 2
    out = bytearray(b"II*\x00\x00\x00\x00\x00")
    next_ptr = 4
    for i, strip in enumerate(strips):
        strip_off = len(out)
        out += strip + b"\x00" * (len(strip) % 2)
        blobs = {305: software, **({270: desc} if (desc and i == 0) else {})}
        blob_off = {}
        for tag, blob in blobs.items():
            blob_off[tag] = len(out)
            out += blob + b"\x00" * (len(blob) % 2)
        entries = [(254, long_, 1, 0), (256, long_, 1, w), (257, long_, 1, h),
                   (258, short, 1, 16), (259, short, 1, 8), (262, short, 1, 1)]
        if 270 in blobs:
            entries.append((270, ascii_, len(blobs[270]), blob_off[270]))
        entries += [(273, long_, 1, strip_off), (277, short, 1, 1), (278, long_, 1, h),
                    (279, long_, 1, len(strip)), (284, short, 1, 1),
                    (305, ascii_, len(software), blob_off[305])]
        if use_pred:
            entries.append((317, short, 1, 2))
        entries.append((339, short, 1, 1))
        struct.pack_into("<I", out, next_ptr, len(out))
        out += struct.pack("<H", len(entries))
        for tag, typ, count, value in entries:
            field = struct.pack("<HH", value, 0) if typ == short else struct.pack("<I", value)
            out += struct.pack("<HHI", tag, typ, count) + field
        next_ptr = len(out)
        out += b"\x00\x00\x00\x00"
    return bytes(out)


def _sig(x: float, digits: int = 6) -> float:
    """Round to `digits` significant digits (stable JSON across platforms)."""
    return float(f"{float(x):.{digits}g}")


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _local_visibility(profile: np.ndarray) -> float:
    """Michelson visibility (max - min) / (max + min) of a noiseless profile."""
    hi, lo = float(np.max(profile)), float(np.min(profile))
    return (hi - lo) / (hi + lo)


_SAFETY = (
    "Never look into a laser beam or its specular reflections, and never point an optical "
    "viewfinder, binoculars or a telescope into one; know the class of every laser you use "
    "and end beams on matte stops below eye level. Never view the Sun directly or through "
    "optics without a proper certified solar filter. Local rules and the lab's laser "
    "safety officer come first."
)

_README = """# Sample images: Lantern Street Optics Lab (fictional)

Synthetic captures from an invented teaching-and-test lab, made by `fringe.synth` with
seed {seed} (`python -m fringe.synth sample-images` regenerates them bit for bit on the
same library versions). `scenario.json` lists every true parameter (period in px along
the fringe normal, orientation of the normal in degrees counter-clockwise from +x on
screen, visibility, phase, camera settings); `MANIFEST.sha256` checks the files
(`sha256sum -c MANIFEST.sha256`).

- Bench 1, `green532-*`: 532 nm laser, double slit, 12-bit mono camera; darks and flats.
- Bench 2, `phone-red650-wall.jpg`: 650 nm diode laser fringes on a wall, phone photo
  with a 10 mm ruler.
- Bench 3, `lamp546-slit-source.tif`: filtered mercury lamp behind a slit source
  (partial spatial coherence).
- Bench 4, `hene633-drift-stack.tif`: drifting HeNe tilt fringes, 0.1 s frame interval.
- Bench 5, `photons-*.tif`: photon-counting run and its dark stack.
- Bench 6, `hene633-slits.tif`, `sodium589-slits.tif`, `linecheck-dark.tif`: one double
  slit lit by a HeNe laser and by a sodium lamp, for checking known lines.

## Safety

{safety}
"""


def make_samples(outdir: str | Path, *, seed: int = 2026) -> dict[str, Any]:
    """Write the sample-image scenario (images, scenario.json, README.md, MANIFEST.sha256).

    Parameters
    ----------
    outdir : str or Path
        Output folder (created if missing; files of the same names are overwritten).
    seed : int
        Master seed; each scene draws from its own child of ``SeedSequence(seed)``.

    Returns
    -------
    scenario : dict
        The content of ``scenario.json``.

    Notes
    -----
    The output is deterministic for given library versions. TIFF pixel data are also
    recorded as SHA-256 of their little-endian bytes (``pixel_sha256``), which does not
    depend on the compressor.
    """
    out = Path(outdir)
    out.mkdir(parents=True, exist_ok=True)
    rngs = [np.random.default_rng(s) for s in np.random.SeedSequence(int(seed)).spawn(8)]
    files: dict[str, bytes] = {}
    pixel_sha: dict[str, str] = {}

    def put_tiff(name: str, data: np.ndarray, description: str | None = None) -> None:
        files[name] = _tiff_bytes(data, description=description)
        pixel_sha[name] = _sha256(np.ascontiguousarray(data, dtype="<u2").tobytes())

    scenes: dict[str, Any] = {}

    # Bench 1: green laser, double slit, 12-bit camera with darks and flats.
    g_shape = (480, 640)
    g_cam = {"gain_dn_per_e": 0.25, "read_noise_e": 5.0, "offset_dn": 100.0, "dark_e": 12.0,
             "bit_depth": 12, "prnu": 0.008, "dsnu_dn": 1.5, "hot_pixels": 25, "fixed_seed": 4801}
    g_opt = {"wavelength_nm": 532.0, "slit_separation_um": 2000.0, "slit_width_um": 250.0,
             "distance_mm": 300.0, "pixel_um": 4.8}
    g_orient, g_off, g_beam = 8.0, (7.5, -5.0), 170.0
    full = 2**12 - 1
    g_peak = (0.70 * full - g_cam["offset_dn"]) / g_cam["gain_dn_per_e"] - g_cam["dark_e"]
    irr = two_slit_image(g_shape, **g_opt, orientation_deg=g_orient, axis_offset_px=g_off,
                         peak_irradiance=g_peak, beam_sigma_px=g_beam)
    put_tiff("green532-slits.tif", camera(irr, rng=rngs[0], **g_cam))
    darks = camera(np.zeros((5, *g_shape)), rng=rngs[1], **g_cam)
    flat_e = (0.5 * full - g_cam["offset_dn"]) / g_cam["gain_dn_per_e"] - g_cam["dark_e"]
    flats = camera(np.full((5, *g_shape), flat_e), rng=rngs[2], **g_cam)
    for i in range(5):
        put_tiff(f"green532-dark-{i + 1:02d}.tif", darks[i])
        put_tiff(f"green532-flat-{i + 1:02d}.tif", flats[i])
    p_g = g_opt["wavelength_nm"] * 1e-9 * g_opt["distance_mm"] * 1e-3 / (
        g_opt["slit_separation_um"] * 1e-6 * g_opt["pixel_um"] * 1e-6)
    zero_g = g_opt["distance_mm"] * np.tan(np.arcsin(
        g_opt["wavelength_nm"] * 1e-3 / g_opt["slit_width_um"])) * 1e3 / g_opt["pixel_um"]
    nx, ny, _, _ = _axes(g_orient)
    mtf_g = float(np.sinc(nx / p_g) * np.sinc(ny / p_g))
    scenes["green532"] = {
        "bench": 1,
        "description": "532 nm laser through a double slit; the far field is formed on the "
                       "sensor by an f = 300 mm lens (f tan(theta) mapping, L = f)",
        "files": {"science": "green532-slits.tif",
                  "darks": [f"green532-dark-{i:02d}.tif" for i in range(1, 6)],
                  "flats": [f"green532-flat-{i:02d}.tif" for i in range(1, 6)]},
        "optics": {**g_opt, "beam_sigma_px_along_fringes": g_beam,
                   "axis_offset_px": list(g_off)},
        "camera": {**g_cam, "shape": list(g_shape), "stored_as": "uint16 (12-bit values)"},
        "exposure": "darks, flats and science share exposure time and temperature",
        "flat_level_e": _sig(flat_e), "peak_irradiance_e": _sig(g_peak),
        "truth": {
            "period_px": _sig(p_g), "orientation_deg": g_orient, "visibility": 1.0,
            "visibility_expected_image_centre": _sig(mtf_g),
            "phase_at_reference_rad": _sig(float(np.angle(np.exp(
                -2j * np.pi * (nx * g_off[0] + ny * g_off[1]) / p_g)))),
            "central_maximum_px": [_sig((g_shape[1] - 1) / 2 + g_off[0]),
                                   _sig((g_shape[0] - 1) / 2 + g_off[1])],
            "envelope_first_zero_px_from_axis": _sig(zero_g),
            "missing_orders": "+-8, +-16 (d / a = 8)",
            "peak_fraction_of_full_scale": 0.70, "flat_fraction_of_full_scale": 0.50,
        },
    }

    # Bench 2: red diode laser on a wall, photographed with a phone.
    ph_shape = (1200, 1600)
    ph_opt = {"wavelength_nm": 650.0, "slit_separation_um": 250.0, "slit_width_um": 50.0,
              "distance_mm": 2500.0, "pixel_um": 200.0}
    ph_orient, ph_off, ph_beam = -2.0, (-40.0, -150.0), 25.0
    laser = two_slit_image(ph_shape, **ph_opt, orientation_deg=ph_orient, axis_offset_px=ph_off,
                           oversample=3, beam_sigma_px=ph_beam)
    hh, ww = ph_shape
    yy, xx = np.mgrid[0:hh, 0:ww]
    rr2 = ((xx - (ww - 1) / 2) ** 2 + (yy - (hh - 1) / 2) ** 2) / ((ww / 2) ** 2 + (hh / 2) ** 2)
    illum = 0.09 * (1.0 - 0.3 * rr2) * (1.0 + 0.05 * (xx / ww - 0.5))
    ambient = np.array([1.05, 1.0, 0.82])  # warm room light on a white wall
    wall_albedo = 0.8
    laser_rgb = np.array([0.95, 0.06, 0.012])  # sensor response to 650 nm light
    scene = wall_albedo * illum[:, :, None] * ambient + laser[:, :, None] * laser_rgb
    tick0 = (300.0, 910.0)
    ruler = ruler_overlay(ph_shape, start_px=tick0, direction_deg=ph_orient,
                          tick_spacing_px=50.0, n_ticks=21, width_px=60.0, tick_width_px=3.0)
    alpha, refl = ruler[0][:, :, None], ruler[1][:, :, None]
    scene = scene * (1 - alpha) + alpha * refl * illum[:, :, None] * ambient
    clean = scene.copy()
    rng_ph = rngs[3]
    scene = scene + rng_ph.normal(size=scene.shape) * np.sqrt(1.5e-5 * scene + 0.0008**2)
    wb = (0.92, 1.0, 1.18)
    files["phone-red650-wall.jpg"] = phone_jpeg(
        scene, quality=92, white_balance=wb, rng=rng_ph,
        exif={"exposure_s": 1 / 120, "iso": 200})
    p_ph = ph_opt["wavelength_nm"] * 1e-9 * ph_opt["distance_mm"] * 1e-3 / (
        ph_opt["slit_separation_um"] * 1e-6 * ph_opt["pixel_um"] * 1e-6)
    ex, ey, _, _ = _axes(ph_orient)
    ticks = [[_sig(tick0[0] + k * 50.0 * ex), _sig(tick0[1] + k * 50.0 * ey)] for k in range(21)]
    # Visibility of the central fringes in the noiseless red channel, sampled along the
    # normal through the axis over one period each side.
    axis = ((ww - 1) / 2 + ph_off[0], (hh - 1) / 2 + ph_off[1])
    uu = np.linspace(-p_ph, p_ph, 81)
    cols = np.rint(axis[0] + uu * ex).astype(int)
    rows = np.rint(axis[1] + uu * ey).astype(int)
    red_lin = np.clip(clean[rows, cols, 0] * wb[0], 0, 1)
    scenes["phone_red650"] = {
        "bench": 2,
        "description": "650 nm diode laser through a double slit onto a white wall 2.5 m "
                       "away, photographed with a phone; a ruler with 10 mm ticks is taped "
                       "to the wall below the pattern",
        "files": {"science": "phone-red650-wall.jpg"},
        "optics": {**ph_opt, "pixel_um_meaning": "wall-plane scale (0.2 mm per px)",
                   "beam_sigma_px_along_fringes": ph_beam, "axis_offset_px": list(ph_off)},
        "phone": {"shape": list(ph_shape), "jpeg_quality": 92, "exposure_s": 1 / 120,
                  "iso": 200, "white_balance_rgb": list(wb), "encoding": "sRGB 8-bit JPEG",
                  "laser_response_rgb": laser_rgb.tolist()},
        "ruler": {"tick_spacing_mm": 10.0, "tick_spacing_px": 50.0, "n_ticks": 21,
                  "direction_deg": ph_orient, "mm_per_px": 0.2,
                  "tick_positions_px": ticks,
                  "tick_positions_note": "(x, y) of each tick on the ruler's upper edge"},
        "truth": {
            "period_px": _sig(p_ph), "period_mm_on_wall": _sig(p_ph * 0.2),
            "orientation_deg": ph_orient, "visibility": 1.0,
            "visibility_linear_red_centre_expected": _sig(_local_visibility(red_lin)),
            "visibility_srgb_red_codes_centre_expected": _sig(
                _local_visibility(srgb_encode(red_lin))),
            "central_maximum_px": [_sig(axis[0]), _sig(axis[1])],
            "envelope_first_zero_px_from_axis": _sig(
                2500.0 * np.tan(np.arcsin(650e-9 / 50e-6)) / 0.2),
            "missing_orders": "+-5, +-10 (d / a = 5)",
        },
    }

    # Bench 3: filtered mercury lamp behind a slit source (van Cittert-Zernike).
    l_shape = (480, 640)
    l_opt = {"wavelength_nm": 546.1, "slit_separation_um": 500.0, "slit_width_um": 60.0,
             "distance_mm": 100.0, "pixel_um": 4.8}
    l_src = ("slit", 280.0, 500.0)
    l_bw, l_orient, l_off = 10.0, 95.0, (-3.0, 4.0)
    l_cam = {"gain_dn_per_e": 1.0, "read_noise_e": 3.0, "offset_dn": 300.0, "dark_e": 30.0,
             "bit_depth": 16, "prnu": 0.006, "dsnu_dn": 2.0, "hot_pixels": 10, "fixed_seed": 4802}
    l_peak = 9000.0
    irr = two_slit_image(l_shape, **l_opt, orientation_deg=l_orient, axis_offset_px=l_off,
                         source=l_src, bandwidth_nm=l_bw, peak_irradiance=l_peak)
    put_tiff("lamp546-slit-source.tif", camera(irr, rng=rngs[4], **l_cam))
    lam_l = l_opt["wavelength_nm"] * 1e-9
    p_l = lam_l * l_opt["distance_mm"] * 1e-3 / (l_opt["slit_separation_um"] * 1e-6
                                                 * l_opt["pixel_um"] * 1e-6)
    x_vcz = np.pi * l_src[1] * 1e-6 * l_opt["slit_separation_um"] * 1e-6 / (
        lam_l * l_src[2] * 1e-3)
    mu = abs(np.sin(x_vcz) / x_vcz)
    dsig = l_bw * 1e-9 / lam_l**2
    v_orders = [_sig(mu * np.exp(-(np.pi * dsig * m * lam_l) ** 2 / (4 * np.log(2))))
                for m in range(11)]
    nx, ny, _, _ = _axes(l_orient)
    scenes["lamp546"] = {
        "bench": 3,
        "description": "mercury lamp with a 546.1 nm interference filter (10 nm FWHM) behind "
                       "a slit source 500 mm before the double slit (each source point "
                       "arrives as a plane wave); far field on the sensor through an "
                       "f = 100 mm lens",
        "files": {"science": "lamp546-slit-source.tif"},
        "optics": {**l_opt, "source": {"shape": "slit", "width_um": l_src[1],
                                       "distance_mm": l_src[2]},
                   "bandwidth_nm_fwhm": l_bw, "spectrum": "Gaussian",
                   "axis_offset_px": list(l_off)},
        "camera": {**l_cam, "shape": list(l_shape), "stored_as": "uint16 (16-bit values)"},
        "peak_irradiance_e": l_peak,
        "truth": {
            "period_px": _sig(p_l), "orientation_deg": l_orient,
            "visibility": _sig(mu),
            "visibility_formula": "|sin x / x|, x = pi w d / (lambda R)",
            "x": _sig(x_vcz),
            "visibility_expected_image_centre": _sig(
                mu * np.sinc(nx / p_l) * np.sinc(ny / p_l)),
            "visibility_at_order_m": v_orders,
            "visibility_at_order_note": "m = 0..10 (OPD = m lambda; Gaussian spectrum)",
            "coherence_length_um": _sig(lam_l**2 / (l_bw * 1e-9) * 1e6),
            "phase_at_reference_rad": _sig(float(np.angle(np.exp(
                -2j * np.pi * (nx * l_off[0] + ny * l_off[1]) / p_l)))),
            "envelope_first_zero_px_from_axis": _sig(
                l_opt["distance_mm"] * np.tan(np.arcsin(lam_l / (l_opt["slit_width_um"] * 1e-6)))
                * 1e3 / l_opt["pixel_um"]),
        },
    }

    # Bench 4: drifting HeNe tilt fringes.
    d_kw = {"period_px": 21.0, "orientation_deg": 30.0, "visibility": 0.85,
            "drift_rad_per_frame": 0.12, "jitter_rad": 0.02, "mean_e": 1200.0,
            "phase0_rad": 0.4}
    d_cam = {"gain_dn_per_e": 0.1, "read_noise_e": 4.0, "offset_dn": 100.0, "dark_e": 5.0,
             "bit_depth": 12, "prnu": 0.005, "dsnu_dn": 1.0, "hot_pixels": 5,
             "fixed_seed": 4803}
    stack, phases = phase_drift_stack(40, (256, 256), rng=rngs[5], camera_options=d_cam, **d_kw)
    put_tiff("hene633-drift-stack.tif", stack, description='{"frame_interval_s": 0.1}')
    nx, ny, _, _ = _axes(d_kw["orientation_deg"])
    scenes["hene633_drift"] = {
        "bench": 4,
        "description": "Michelson-type interferometer with a 632.8 nm HeNe laser, tilted "
                       "mirror (straight tilt fringes), slow thermal drift",
        "files": {"science": "hene633-drift-stack.tif"},
        "camera": {**d_cam, "shape": [40, 256, 256], "stored_as": "uint16 (12-bit values)"},
        "frame_interval_s": 0.1,
        "image_description": '{"frame_interval_s": 0.1}',
        "truth": {
            "period_px": d_kw["period_px"], "orientation_deg": d_kw["orientation_deg"],
            "visibility": d_kw["visibility"],
            "visibility_expected_image": _sig(d_kw["visibility"] * np.sinc(nx / 21.0)
                                              * np.sinc(ny / 21.0)),
            "mean_e": d_kw["mean_e"], "drift_rad_per_frame": 0.12,
            "drift_rad_per_s": _sig(0.12 / 0.1), "jitter_rad": 0.02,
            "phases_rad": [_sig(p, 7) for p in phases],
            "phase_note": "unwrapped phase of each frame at the image centre",
        },
    }

    # Bench 5: photon counting.
    p_kw = {"period_px": 16.0, "orientation_deg": 60.0, "visibility": 0.8, "phase_rad": 1.0,
            "background_per_px": 0.0005, "gain_dn_per_photon": 20.0, "read_noise_e": 0.05,
            "offset_dn": 100.0, "psf_sigma_px": 0.7, "cosmic_rays_per_frame": 0.02}
    stack, truth = photon_stack(200, (128, 128), photons_per_frame=40.0, rng=rngs[6], **p_kw)
    put_tiff("photons-stack.tif", stack)
    dstack, dtruth = photon_stack(50, (128, 128), photons_per_frame=0.0, rng=rngs[7], **p_kw)
    put_tiff("photons-dark.tif", dstack)
    truth = {k: (_sig(v) if isinstance(v, float) else v) for k, v in truth.items()}
    scenes["photons"] = {
        "bench": 5,
        "description": "two-beam fringes at a few photons per frame on an electron-"
                       "multiplying camera (exponential single-photon signal, Gaussian "
                       "spot); the dark stack has the same background and no signal",
        "files": {"science": "photons-stack.tif", "dark": "photons-dark.tif"},
        "truth": truth,
        "dark_truth": {"background_events": dtruth["background_events"],
                       "cosmic_rays": dtruth["cosmic_rays"]},
    }

    # Bench 6: a HeNe laser and a sodium lamp through one double slit (laser-line checks).
    xrngs = [np.random.default_rng(q)
             for q in np.random.SeedSequence([int(seed), 6]).spawn(3)]
    k_shape = (240, 320)
    k_opt = {"slit_separation_um": 1000.0, "slit_width_um": 180.0, "distance_mm": 250.0,
             "pixel_um": 5.5}
    k_cam = {"gain_dn_per_e": 0.5, "read_noise_e": 4.0, "offset_dn": 100.0, "dark_e": 8.0,
             "bit_depth": 16, "prnu": 0.004, "dsnu_dn": 1.0, "hot_pixels": 8, "fixed_seed": 4806}
    k_peak = 24000.0
    hene = two_slit_image(k_shape, wavelength_nm=632.8, **k_opt, orientation_deg=20.0,
                          axis_offset_px=(4.0, -6.0), peak_irradiance=k_peak)
    put_tiff("hene633-slits.tif", camera(hene, rng=xrngs[0], **k_cam))
    # sodium D2 and D1 (air), D2 about twice as bright: an incoherent sum of two patterns
    d2, d1 = 588.9950, 589.5924
    na = (2.0 * two_slit_image(k_shape, wavelength_nm=d2, **k_opt, orientation_deg=110.0,
                               axis_offset_px=(-5.0, 3.0), peak_irradiance=k_peak)
          + two_slit_image(k_shape, wavelength_nm=d1, **k_opt, orientation_deg=110.0,
                           axis_offset_px=(-5.0, 3.0), peak_irradiance=k_peak)) / 3.0
    put_tiff("sodium589-slits.tif", camera(na, rng=xrngs[1], **k_cam))
    put_tiff("linecheck-dark.tif", camera(np.zeros((3, *k_shape)), rng=xrngs[2], **k_cam))
    na_mean = (2.0 * d2 + d1) / 3.0

    def _per(lam_nm: float) -> float:
        return _sig(lam_nm * 1e-9 * k_opt["distance_mm"] * 1e-3
                    / (k_opt["slit_separation_um"] * 1e-6 * k_opt["pixel_um"] * 1e-6))

    scenes["linecheck"] = {
        "bench": 6,
        "description": "one double slit and sensor, lit by a HeNe laser and then by a sodium "
                       "lamp (D2 and D1 lines, D2 about twice as bright); three dark frames in "
                       "one stack",
        "files": {"hene": "hene633-slits.tif", "sodium": "sodium589-slits.tif",
                  "dark": "linecheck-dark.tif"},
        "optics": {**k_opt, "hene_wavelength_nm": 632.8,
                   "sodium_lines_nm": [d2, d1], "sodium_weights": [2, 1]},
        "camera": {**k_cam, "shape": list(k_shape), "stored_as": "uint16 (16-bit values)"},
        "peak_irradiance_e": k_peak,
        "truth": {
            "hene": {"period_px": _per(632.8), "orientation_deg": 20.0, "visibility": 1.0},
            "sodium": {"period_px": _per(na_mean), "orientation_deg": 110.0,
                       "wavelength_nm_weighted_mean": _sig(na_mean),
                       "note": "two incoherent line patterns; their fringes slip by 1/986 "
                               "of a period per fringe, so the visibility stays near 1 "
                               "over this field"},
        },
    }

    scenario = {
        "lab": "Lantern Street Optics Lab (fictional)",
        "generator": "fringe.synth.make_samples",
        "seed": int(seed),
        "conventions": {
            "axes": "x = column (right), y = row (down), pixel centres at integers",
            "reference_point": "c = ((W - 1) / 2, (H - 1) / 2)",
            "orientation_deg": "direction of the fringe normal, counter-clockwise from +x "
                               "on screen; normal n = (cos t, -sin t) in (x, row)",
            "period_px": "along the normal",
            "model": "I = B + A cos(2 pi n.(r - c) / P + phi)",
        },
        "safety": _SAFETY,
        "scenes": scenes,
        "pixel_sha256": dict(sorted(pixel_sha.items())),
    }
    files["scenario.json"] = (json.dumps(scenario, indent=2) + "\n").encode("utf-8")
    files["README.md"] = _README.format(
        seed=int(seed), safety=textwrap.fill(_SAFETY, 88)).encode("utf-8")
    for name, data in files.items():
        (out / name).write_bytes(data)
    manifest = "".join(f"{_sha256(files[n])}  {n}\n" for n in sorted(files))
    (out / "MANIFEST.sha256").write_text(manifest, encoding="utf-8")
    return scenario


def main(argv: Sequence[str] | None = None) -> int:
    """Command line: ``python -m fringe.synth OUTDIR [--seed N]``; returns the exit status."""
    parser = argparse.ArgumentParser(
        prog="python -m fringe.synth",
        description="Regenerate the synthetic sample images and their scenario.json.")
    parser.add_argument("outdir", help="output folder, e.g. sample-images")
    parser.add_argument("--seed", type=int, default=2026, help="master seed (default 2026)")
    args = parser.parse_args(argv)
    scenario = make_samples(args.outdir, seed=args.seed)
    for name, scene in scenario["scenes"].items():
        truths = scene["truth"]
        parts = truths.items() if "period_px" not in truths else [(None, truths)]
        for sub, t in parts:
            label = name if sub is None else f"{name}/{sub}"
            vis = t.get("visibility", "-")
            print(f"{label}: period {t['period_px']} px, orientation {t['orientation_deg']} "
                  f"deg, visibility {vis}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
