"""Wavefront maps from interferograms: Fourier-transform and phase-shifting phase, unwrapping,
Zernike fit, PV and RMS with uncertainties, and pass/fail checks.

Conventions
-----------
Images are indexed ``[row, col]`` and rows run *down* the screen. A pupil is a circle of
centre ``(cx, cy)`` in pixel coordinates (``cx`` a column, ``cy`` a row, as an image viewer
shows them) and radius ``R`` pixels. Pupil coordinates are **y-up**, as everywhere in
``fringe``::

    x = (col - cx) / R,    y = (cy - row) / R,    rho = hypot(x, y),    theta = atan2(y, x)

so ``theta`` is counter-clockwise from +x as seen on screen and a positive Noll Z3 (tilt y,
``2 rho sin theta``) is a wavefront that rises towards the *top* of the image.

The wavefront in waves is ``W = phi / (2 pi)`` with ``phi`` the interference phase:

* Fourier-transform method: ``I = a + b cos(2 pi (f_x x_px + f_y y_px) + phi)`` with the
  carrier ``(f_x, f_y)`` in cycles/px (``y_px`` up). A single fringe image cannot tell
  ``phi`` from ``-phi`` with the opposite carrier; the automatic choice takes the carrier
  whose larger component is positive (``f_x > 0`` for near-vertical fringes, ``f_y > 0``
  for near-horizontal ones). Give the carrier explicitly to fix the sign. Nor can it tell
  a wavefront tilt from the carrier: its Z2 and Z3 are relative to the carrier bin.
* Phase-shifting stacks: ``I_k = a + b cos(phi + delta_k)`` with the steps ``delta_k``
  increasing from frame to frame.

``W`` is the optical path difference in waves (transmission); a surface seen in reflection
has height ``h = W lambda / 2``.

Command line
------------
``fringe wavefront IMAGE... [--steps 4|5|carre] [--out-map FILE] ...`` (:func:`add_parser`,
:func:`run`) writes one record per interferogram frame, or per phase-shifting stack. With
``--out-map map.tif`` a single record writes ``map.tif``; several records write
``map_0.tif``, ``map_1.tif``, ... with the record index counted over all inputs and frames
in command-line order (a failed record keeps its index and writes nothing). Maps are
float32 TIFF files written to ``FILE.part`` and renamed, so an interrupted run never leaves
a partial map; values are waves with piston and tilt (and defocus) removed, NaN outside
the analysed pupil, rows down as in the input image. The Fourier-transform map is on the
analysis grid, whose spacing in input pixels is ``map_step_px`` (also in the TIFF
description).
"""

from __future__ import annotations

import argparse
import json
import math
import os
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from fringe._util import FringeError, atomic_output, fold_angle_deg
from fringe.result import jsonable as _clean

__all__ = [
    "MAX_ZERNIKE_TERMS",
    "PhaseEstimate",
    "PhaseMap",
    "Pupil",
    "WavefrontResult",
    "ZernikeFit",
    "add_parser",
    "analyze_wavefront",
    "estimate_phase_step",
    "find_pupil",
    "fit_zernike",
    "ftm_phase",
    "noll_to_nm",
    "phase_carre",
    "phase_four_step",
    "phase_hariharan",
    "psi_phase",
    "quality_checks",
    "run",
    "strehl_estimate",
    "unwrap",
    "wavefront_metrics",
    "write_map",
    "zernike",
    "zernike_basis",
    "zernike_name",
]

MAX_ZERNIKE_TERMS = 231
"""Largest number of Noll terms accepted (all terms up to radial order n = 20)."""

ZERNIKE_ORDERING = "Noll (1976)"
ZERNIKE_NORMALISATION = (
    "Noll (1976): orthonormal over the unit disk, (1/pi) int Z_i Z_j rho drho dtheta = "
    "delta_ij; N = sqrt(2(n+1)) for m != 0, sqrt(n+1) for m = 0; even j cos, odd j sin; "
    "theta counter-clockwise from +x, y up"
)
RULE_QUARTER_WAVE_PV = 0.25
RULE_MARECHAL_RMS = 1.0 / 14.0

_NAMES = {
    1: "piston",
    2: "tilt x",
    3: "tilt y",
    4: "defocus",
    5: "oblique astigmatism",
    6: "astigmatism 0/90 deg",
    7: "coma y",
    8: "coma x",
    9: "trefoil (sin)",
    10: "trefoil (cos)",
    11: "primary spherical",
    12: "secondary astigmatism 0/90 deg",
    13: "secondary oblique astigmatism",
    14: "quadrafoil (cos)",
    15: "quadrafoil (sin)",
    16: "secondary coma x",
    17: "secondary coma y",
    18: "secondary trefoil (cos)",
    19: "secondary trefoil (sin)",
    20: "pentafoil (cos)",
    21: "pentafoil (sin)",
    22: "secondary spherical",
}

_STEP_ALGORITHMS = {"4": "4-step", "5": "5-step (Hariharan)", "carre": "Carre"}
_STEP_FRAMES = {"4": 4, "5": 5, "carre": 4}
_SUPPORT_MIN = 0.95
_MODULATION_MIN = 0.25
_TAPER = 0.2
_MODEL_TOLERANCE = 5e-4  # waves: model change below which one extrapolation suffices
_WINDOW = 0.7
_FIT_SAMPLE_BUDGET = 6_000_000


# --------------------------------------------------------------------------------------------
# Zernike polynomials (Noll 1976)
# --------------------------------------------------------------------------------------------


def noll_to_nm(j: int) -> tuple[int, int]:
    """Radial order ``n`` and signed azimuthal frequency ``m`` of Noll term ``j``.

    Parameters
    ----------
    j : int
        Noll index, ``j >= 1``.

    Returns
    -------
    (n, m) : tuple of int
        ``m > 0`` takes ``cos(m theta)``, ``m < 0`` takes ``sin(|m| theta)``.

    Raises
    ------
    FringeError
        ``j < 1`` or not an integer.

    Notes
    -----
    Within radial order ``n`` the indices ``j = n(n+1)/2 + 1 ... (n+1)(n+2)/2`` take
    ``|m|`` in increasing order; of each pair with the same ``|m| > 0`` the even ``j`` is the
    cosine and the odd ``j`` the sine term.

    References
    ----------
    .. [1] R. J. Noll, "Zernike polynomials and atmospheric turbulence", J. Opt. Soc. Am.
       66(3), 207-211 (1976), doi:10.1364/JOSA.66.000207.

    Examples
    --------
    >>> [noll_to_nm(j) for j in (1, 2, 3, 4, 5, 6, 7, 11)]
    [(0, 0), (1, 1), (1, -1), (2, 0), (2, -2), (2, 2), (3, -1), (4, 0)]
    """
    if isinstance(j, bool) or not isinstance(j, (int, np.integer)) or j < 1:
        raise FringeError(f"Noll index must be an integer >= 1, got {j!r}")
    j = int(j)
    n = 0
    while (n + 1) * (n + 2) // 2 < j:
        n += 1
    k = j - n * (n + 1) // 2 - 1  # position within the row, 0-based
    # |m| sequence of row n: (0,) 2,2, 4,4 ... for even n; 1,1, 3,3 ... for odd n
    mabs = 2 * ((k + 1) // 2) if n % 2 == 0 else 2 * (k // 2) + 1
    if mabs == 0:
        return n, 0
    return n, (mabs if j % 2 == 0 else -mabs)


def zernike_name(j: int) -> str:
    """Common name of Noll term ``j`` (y-up axes), e.g. ``"defocus"`` for ``j = 4``.

    Examples
    --------
    >>> zernike_name(3), zernike_name(40)
    ('tilt y', 'Z(8,4)')
    """
    n, m = noll_to_nm(j)
    return _NAMES.get(int(j), f"Z({n},{m})")


def _radial_poly(n: int, mabs: int) -> list[float]:
    """Coefficients ``a_k`` of ``R_n^m(rho) / rho^m = sum_k a_k rho^(2k)``."""
    coeffs = [0.0] * ((n - mabs) // 2 + 1)
    for s in range((n - mabs) // 2 + 1):
        c = (-1) ** s * math.factorial(n - s) / (
            math.factorial(s)
            * math.factorial((n + mabs) // 2 - s)
            * math.factorial((n - mabs) // 2 - s)
        )
        coeffs[(n - mabs) // 2 - s] = float(c)
    return coeffs


def _norm(n: int, m: int) -> float:
    return math.sqrt(n + 1.0) if m == 0 else math.sqrt(2.0 * (n + 1.0))


def zernike(j: int, rho: np.ndarray | float, theta: np.ndarray | float) -> np.ndarray:
    """Noll-normalised Zernike polynomial ``Z_j`` in polar form.

    Parameters
    ----------
    j : int
        Noll index.
    rho : array_like
        Normalised radius (1 at the pupil edge); any shape.
    theta : array_like
        Angle in radians, counter-clockwise from +x with y up; broadcast with `rho`.

    Returns
    -------
    ndarray of float64
        ``Z_j(rho, theta)``, shape of the broadcast inputs.

    Notes
    -----
    .. math::

        Z_j = N_n^m R_n^{|m|}(\\rho) \\begin{cases} \\cos(m\\theta) & m > 0 \\\\
        \\sin(|m|\\theta) & m < 0 \\\\ 1 & m = 0 \\end{cases}, \\qquad
        R_n^{|m|}(\\rho) = \\sum_{s=0}^{(n-|m|)/2} \\frac{(-1)^s (n-s)!}
        {s! (\\frac{n+|m|}{2}-s)! (\\frac{n-|m|}{2}-s)!} \\rho^{n-2s},

    with :math:`N = \\sqrt{2(n+1)}` for :math:`m \\ne 0` and :math:`\\sqrt{n+1}` for
    :math:`m = 0`, so that :math:`\\frac{1}{\\pi}\\int_0^1\\int_0^{2\\pi} Z_i Z_j
    \\rho\\,d\\rho\\,d\\theta = \\delta_{ij}`.

    References
    ----------
    .. [1] R. J. Noll, J. Opt. Soc. Am. 66(3), 207-211 (1976), doi:10.1364/JOSA.66.000207.

    Examples
    --------
    >>> round(float(zernike(4, 1.0, 0.0)), 6)  # sqrt(3) (2 rho^2 - 1) at the edge
    1.732051
    """
    n, m = noll_to_nm(j)
    r = np.asarray(rho, dtype=np.float64)
    t = np.asarray(theta, dtype=np.float64)
    r2 = r * r
    poly = np.zeros_like(r2)
    for a in reversed(_radial_poly(n, abs(m))):
        poly = poly * r2 + a
    radial = poly * r ** abs(m)
    if m > 0:
        return _norm(n, m) * radial * np.cos(m * t)
    if m < 0:
        return _norm(n, m) * radial * np.sin(-m * t)
    return _norm(n, m) * radial * np.ones_like(t)


def zernike_basis(x: np.ndarray, y: np.ndarray, *, terms: int) -> np.ndarray:
    """Noll Zernike terms ``Z_1 ... Z_terms`` at Cartesian pupil points.

    Parameters
    ----------
    x, y : array_like, shape (N,)
        Pupil coordinates in units of the pupil radius, y up.
    terms : int
        Number of Noll terms, ``1 <= terms <= MAX_ZERNIKE_TERMS``.

    Returns
    -------
    ndarray of float64, shape (N, terms)
        Column ``j - 1`` holds ``Z_j``.

    Notes
    -----
    Uses ``R_n^m(rho) e^{i m theta} = [R_n^m(rho) / rho^m] (x + i y)^m``: the bracket is a
    polynomial in ``rho^2`` and ``(x + i y)^m`` is built by a recurrence, so no angle is
    computed and the origin needs no special case. Same values as :func:`zernike`.

    Examples
    --------
    >>> zernike_basis(np.array([0.0]), np.array([0.5]), terms=3).round(6).tolist()
    [[1.0, 0.0, 1.0]]
    """
    terms = _check_terms(terms)
    xv = np.asarray(x, dtype=np.float64).ravel()
    yv = np.asarray(y, dtype=np.float64).ravel()
    if xv.shape != yv.shape:
        raise FringeError(f"x and y must have the same length, got {xv.size} and {yv.size}")
    out = np.empty((xv.size, terms), dtype=np.float64)
    by_m: dict[int, list[tuple[int, int, int]]] = {}
    for j in range(1, terms + 1):
        n, m = noll_to_nm(j)
        by_m.setdefault(abs(m), []).append((j, n, m))
    r2 = xv * xv + yv * yv
    cm = np.ones_like(xv)  # Re (x + i y)^m
    sm = np.zeros_like(xv)  # Im (x + i y)^m
    for mabs in range(max(by_m) + 1):
        if mabs > 0:
            cm, sm = cm * xv - sm * yv, sm * xv + cm * yv
        for j, n, m in by_m.get(mabs, []):
            poly = np.zeros_like(r2)
            for a in reversed(_radial_poly(n, mabs)):
                poly *= r2
                poly += a
            ang = cm if m >= 0 else sm
            np.multiply(poly, ang, out=out[:, j - 1])
            out[:, j - 1] *= _norm(n, m)
    return out


def _check_terms(terms: Any) -> int:
    if isinstance(terms, bool) or not isinstance(terms, (int, np.integer)):
        raise FringeError(f"zernike_terms must be an integer, got {terms!r}")
    if not 1 <= int(terms) <= MAX_ZERNIKE_TERMS:
        raise FringeError(
            f"zernike_terms must be between 1 and {MAX_ZERNIKE_TERMS}, got {terms}"
        )
    return int(terms)


@dataclass
class ZernikeFit:
    """Least-squares Zernike coefficients of sampled wavefront values.

    Attributes
    ----------
    coefficients : ndarray, shape (terms,)
        ``c_j`` in the unit of the values (waves), index ``j - 1``.
    errors : ndarray, shape (terms,)
        One standard uncertainty of each coefficient.
    covariance : ndarray, shape (terms, terms)
        Covariance of the coefficients.
    residual_rms : float
        ``sqrt(sum r^2 / (N - terms))`` of the fit residual ``r``.
    n_samples : int
        Number of samples fitted.
    """

    coefficients: np.ndarray
    errors: np.ndarray
    covariance: np.ndarray
    residual_rms: float
    n_samples: int


def fit_zernike(
    values: np.ndarray,
    x: np.ndarray,
    y: np.ndarray,
    *,
    terms: int = 15,
    correlation: float = 1.0,
) -> ZernikeFit:
    """Fit Noll Zernike terms to wavefront samples by linear least squares.

    Parameters
    ----------
    values : array_like, shape (N,)
        Wavefront samples (e.g. waves).
    x, y : array_like, shape (N,)
        Pupil coordinates of the samples in units of the pupil radius, y up.
    terms : int
        Number of Noll terms ``Z_1 ... Z_terms``.
    correlation : float
        Number of samples per independent noise sample (>= 1): the coefficient covariance
        is multiplied by it (1 for independent pixels).

    Returns
    -------
    ZernikeFit
        Coefficients, uncertainties, covariance and residual RMS.

    Raises
    ------
    FringeError
        Mismatched lengths, non-finite values, fewer than ``max(2 terms, terms + 5)``
        samples, or a sample region on which the terms are not independent.

    Notes
    -----
    With ``A_ij = Z_j(x_i, y_i)``, ``c = (A^T A)^{-1} A^T w`` (normal equations, scaled to
    unit diagonal; the Zernike terms are nearly orthogonal on a pupil, so they are well
    conditioned) and

    .. math:: \\operatorname{cov}(c) = \\kappa\\,s^2 (A^T A)^{-1},
              \\qquad s^2 = \\frac{\\lVert w - A c \\rVert^2}{N - J},

    the textbook regression covariance, with :math:`\\kappa` = `correlation`. The residual
    holds the noise and any wavefront structure beyond the fitted terms, so the errors are
    an upper bound for noise alone.

    References
    ----------
    .. [1] R. J. Noll, J. Opt. Soc. Am. 66(3), 207-211 (1976), doi:10.1364/JOSA.66.000207.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> x, y = rng.uniform(-0.7, 0.7, (2, 200))
    >>> w = 0.1 * zernike_basis(x, y, terms=4)[:, 3]
    >>> round(float(fit_zernike(w, x, y, terms=6).coefficients[3]), 6)
    0.1
    """
    terms = _check_terms(terms)
    w = np.asarray(values, dtype=np.float64).ravel()
    xv = np.asarray(x, dtype=np.float64).ravel()
    yv = np.asarray(y, dtype=np.float64).ravel()
    if not (w.size == xv.size == yv.size):
        raise FringeError(
            f"values, x and y must have the same length, got {w.size}, {xv.size}, {yv.size}"
        )
    if not (np.all(np.isfinite(w)) and np.all(np.isfinite(xv)) and np.all(np.isfinite(yv))):
        raise FringeError("wavefront samples must be finite")
    return _lsq(zernike_basis(xv, yv, terms=terms), w, terms, correlation)


def _lsq(a: np.ndarray, w: np.ndarray, terms: int, correlation: float) -> ZernikeFit:
    """Least squares on a given basis matrix (see :func:`fit_zernike`)."""
    need = max(2 * terms, terms + 5)
    if w.size < need:
        raise FringeError(
            f"only {w.size} valid samples; fitting {terms} Zernike terms needs at least {need}"
        )
    gram = a.T @ a
    scale = np.sqrt(np.diag(gram))
    bad = FringeError(
        f"the valid pupil region is too small or irregular to fit {terms} Zernike terms"
    )
    if scale.min() <= 0:
        raise bad
    gn = gram / np.outer(scale, scale)
    ev = np.linalg.eigvalsh(gn)
    if ev[0] <= 1e-10 * ev[-1]:
        raise bad
    ginv = np.linalg.inv(gn) / np.outer(scale, scale)
    coef = ginv @ (a.T @ w)
    resid = w - a @ coef
    s2 = float(resid @ resid) / (w.size - terms)
    cov = max(float(correlation), 1.0) * s2 * ginv
    return ZernikeFit(
        coefficients=coef,
        errors=np.sqrt(np.diag(cov)),
        covariance=cov,
        residual_rms=math.sqrt(s2),
        n_samples=int(w.size),
    )


# --------------------------------------------------------------------------------------------
# pupil
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Pupil:
    """A circular pupil in pixel coordinates.

    Attributes
    ----------
    cx, cy : float
        Centre column and row (pixels; rows run down).
    radius : float
        Radius in pixels; Zernike polynomials are normalised to it.
    source : str
        ``"given"``, ``"detected"`` (from the intensity) or ``"frame"`` (no pupil edge
        found: the largest circle centred in the frame).
    """

    cx: float
    cy: float
    radius: float
    source: str = "given"

    def to_dict(self) -> dict[str, Any]:
        return {"cx_px": float(self.cx), "cy_px": float(self.cy),
                "radius_px": float(self.radius), "source": self.source}


def _as_pupil(pupil: Any, shape: tuple[int, int], name: str) -> Pupil | None:
    if pupil is None:
        return None
    if isinstance(pupil, Pupil):
        p = pupil
    else:
        try:
            cx, cy, r = (float(v) for v in pupil)
        except (TypeError, ValueError):
            raise FringeError(
                f"{name}: pupil must be (cx, cy, radius) in pixels, got {pupil!r}"
            ) from None
        p = Pupil(cx, cy, r, "given")
    if not (math.isfinite(p.cx) and math.isfinite(p.cy) and math.isfinite(p.radius)):
        raise FringeError(f"{name}: pupil centre and radius must be finite")
    if p.radius < 2.0:
        raise FringeError(f"{name}: pupil radius must be at least 2 px, got {p.radius:g}")
    h, w = shape
    if not (-0.5 <= p.cx <= w - 0.5 and -0.5 <= p.cy <= h - 0.5):
        raise FringeError(
            f"{name}: pupil centre ({p.cx:g}, {p.cy:g}) lies outside the {w} x {h} image"
        )
    return p


def _edge_warning(p: Pupil, shape: tuple[int, int], warnings: list[str]) -> None:
    h, w = shape
    if (p.cx - p.radius < -0.5 or p.cy - p.radius < -0.5 or p.cx + p.radius > w - 0.5
            or p.cy + p.radius > h - 0.5):
        warnings.append("the pupil extends past the image edge: PV and RMS cover only the "
                        "part inside the image")


def _otsu(values: np.ndarray) -> float:
    """Otsu's threshold of a 1-D sample (256-bin histogram)."""
    lo, hi = float(values.min()), float(values.max())
    if hi <= lo:
        return lo
    hist, edges = np.histogram(values, bins=256, range=(lo, hi))
    p = hist.astype(np.float64)
    centres = 0.5 * (edges[:-1] + edges[1:])
    w0 = np.cumsum(p)
    w1 = w0[-1] - w0
    m0 = np.cumsum(p * centres)
    mt = m0[-1]
    with np.errstate(invalid="ignore", divide="ignore"):
        between = (mt * w0 / w0[-1] - m0) ** 2 / (w0 * w1)
    between[~np.isfinite(between)] = -1.0
    return float(centres[int(np.argmax(between))])


def find_pupil(image: np.ndarray, *, mask: np.ndarray | None = None) -> Pupil:
    """Find a bright circular pupil on a darker surround from the intensity.

    Parameters
    ----------
    image : array_like, shape (H, W)
        Interferogram or modulation map (any linear unit). Not modified.
    mask : array_like of bool, shape (H, W), optional
        True for pixels not to use (saturated, bad).

    Returns
    -------
    Pupil
        Centre and radius (``source="detected"``), or the largest centred circle
        (``source="frame"``) when no dark surround is found.

    Raises
    ------
    FringeError
        Not a 2-D image, or no finite pixels.

    Notes
    -----
    Frames of 1024 px and more are first binned by ``q = min(H, W) // 512``. The image is
    smoothed twice with a box of side ``s = max(5, min(H, W) // 32)`` pixels (a triangle
    filter; it averages fringes of period up to about ``s`` to a fraction ``sinc^2``),
    thresholded half way between the two Otsu class means, and the largest connected bright
    region, holes filled, gives the centre (centroid) and radius ``sqrt(area / pi)``. The
    surround counts as dark when the lower class mean is below half the upper one. The
    circle from area and centroid is exact for a full disk and averages out edge noise
    (common practice).

    References
    ----------
    .. [1] N. Otsu, "A threshold selection method from gray-level histograms", IEEE Trans.
       Syst. Man Cybern. 9(1), 62-66 (1979), doi:10.1109/TSMC.1979.4310076.
    """
    img = np.asarray(image, dtype=np.float64)
    if img.ndim != 2:
        raise FringeError(f"expected a 2-D image, got shape {img.shape}")
    good = np.isfinite(img)
    if mask is not None:
        mk = np.asarray(mask, dtype=bool)
        if mk.shape != img.shape:
            raise FringeError(f"mask shape {mk.shape} does not match image shape {img.shape}")
        good &= ~mk
    if not good.any():
        raise FringeError("image has no usable pixels")
    return _find_pupil(img, good)


def _find_pupil(img: np.ndarray, good: np.ndarray) -> Pupil:
    from scipy import ndimage

    h, w = img.shape
    if good.all():
        work = img
    else:
        stride = max(1, int(math.sqrt(img.size / 250_000)))
        probe = img[::stride, ::stride][good[::stride, ::stride]]
        fill = float(np.median(probe)) if probe.size else float(np.median(img[good]))
        work = np.where(good, img, fill)
    # bin large frames first: the pupil edge needs no more than ~512 samples across
    q = max(1, min(h, w) // 512)
    hb, wb = h // q, w // q
    if q > 1:
        work = work[: hb * q, : wb * q].reshape(hb, q, wb, q).mean(axis=(1, 3))
    s = max(3, max(5, min(h, w) // 32) // q) | 1  # odd: an even box shifts by half a sample
    sm = ndimage.uniform_filter(ndimage.uniform_filter(work, s, mode="nearest"), s,
                                mode="nearest")
    step = max(1, int(math.sqrt(sm.size / 250_000)))
    sample = sm[::step, ::step].ravel()
    t = _otsu(sample)
    lo_vals, hi_vals = sample[sample <= t], sample[sample > t]
    frame = Pupil((w - 1) / 2.0, (h - 1) / 2.0, min(h, w) / 2.0 - 1.0, "frame")
    if lo_vals.size == 0 or hi_vals.size == 0:
        return frame
    lo, hi = float(lo_vals.mean()), float(hi_vals.mean())
    if hi <= 0 or lo > 0.5 * hi:
        return frame
    bright = sm > 0.5 * (lo + hi)
    labels, count = ndimage.label(bright)
    if count == 0:
        return frame
    sizes = np.bincount(labels.ravel())
    sizes[0] = 0
    region = ndimage.binary_fill_holes(labels == int(np.argmax(sizes)))
    area = float(np.count_nonzero(region)) * q * q
    if area < 16 or area > 0.97 * h * w:
        return frame
    rows, cols = np.nonzero(region)
    cx = float(cols.mean()) * q + (q - 1) / 2.0
    cy = float(rows.mean()) * q + (q - 1) / 2.0
    return Pupil(cx, cy, math.sqrt(area / math.pi), "detected")


# --------------------------------------------------------------------------------------------
# phase maps
# --------------------------------------------------------------------------------------------


@dataclass
class PhaseMap:
    """Wrapped phase on a sampling grid, with what the wavefront statistics need.

    Attributes
    ----------
    phase : ndarray, shape (h, w)
        Wrapped phase in radians, in [-pi, pi).
    valid : ndarray of bool, shape (h, w)
        Samples to use.
    rows, cols : ndarray, shape (h,), (w,)
        Pixel positions of the grid rows and columns in the input image.
    sigma_phase : ndarray, shape (h, w), or None
        One standard deviation of the phase noise of each sample (radians).
    correlation : float
        Grid samples per independent noise sample (``kappa``, >= 1).
    visibility : ndarray, shape (h, w)
        Fringe visibility ``b / a``.
    pupil : Pupil
        Pupil used.
    method : str
        ``"fourier-transform"``, ``"4-step"``, ``"5-step (Hariharan)"`` or ``"Carre"``.
    info : dict
        Method details (carrier, phase step, noise estimates).
    warnings : list of str
        Problems found.
    reference : ndarray, shape (h, w), or None
        A smooth unwrapped phase close to the true one (radians); when given, the
        difference ``phase - reference`` is unwrapped instead of the phase itself.
    """

    phase: np.ndarray
    valid: np.ndarray
    rows: np.ndarray
    cols: np.ndarray
    sigma_phase: np.ndarray | None
    correlation: float
    visibility: np.ndarray
    pupil: Pupil
    method: str
    info: dict = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)
    reference: np.ndarray | None = None


def _disk(rows: np.ndarray, cols: np.ndarray, p: Pupil) -> np.ndarray:
    dy = (rows[:, None] - p.cy) ** 2
    dx = (cols[None, :] - p.cx) ** 2
    return (dy + dx) <= p.radius * p.radius


def _window(d: np.ndarray, radius: float) -> np.ndarray:
    """Radial flat-top window: 1 up to ``(1 - t) r``, cos^2 taper to 0 at ``r`` (t = 0.2)."""
    r1 = radius * (1.0 - _TAPER)
    out = np.cos(np.clip((d - r1) / (radius - r1), 0.0, 1.0) * (np.pi / 2.0)) ** 2
    out[d >= radius] = 0.0
    return out


def _spectrum_block(spec: np.ndarray, shape: tuple[int, int], ky0: int, kx0: int,
                    hy: int, hx: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Values of the full 2-D DFT of a real (H, W) array from its rfft2 ``spec``.

    Returns the block at bins ``ky0 + dy``, ``kx0 + dx`` (``|dy| <= hy``, ``|dx| <= hx``)
    and the offsets ``dy``, ``dx``.
    """
    h, w = shape
    dy = np.arange(-hy, hy + 1)
    dx = np.arange(-hx, hx + 1)
    ky = (ky0 + dy)[:, None] % h
    kx = np.broadcast_to((kx0 + dx)[None, :] % w, (dy.size, dx.size))
    direct = kx <= w // 2
    rows = np.where(direct, ky, (-ky) % h)
    cols = np.where(direct, kx, (w - kx) % w)
    vals = spec[rows, cols]
    return np.where(direct, vals, np.conj(vals)), dy, dx


def _field_on_grid(block: np.ndarray, dy: np.ndarray, dx: np.ndarray,
                   grid: tuple[int, int], shape: tuple[int, int]) -> np.ndarray:
    """Band-limited field of a spectral block, demodulated, on an (gh, gw) grid."""
    from scipy import fft as sfft

    gh, gw = grid
    arr = np.zeros((gh, gw), dtype=np.complex128)
    arr[np.ix_(dy % gh, dx % gw)] = block
    return sfft.ifft2(arr) * (gh * gw / float(shape[0] * shape[1]))


def _wrap_freq(f: np.ndarray) -> np.ndarray:
    return (f + 0.5) % 1.0 - 0.5


def _noise_floor(spec: np.ndarray, shape: tuple[int, int], f_row: float, f_col: float,
                 r_w: float) -> float | None:
    """Mean spectral power per bin away from the DC, carrier and second-harmonic lobes."""
    h, w = shape
    sy = max(1, h // 256)
    sx = max(1, (w // 2 + 1) // 128)
    sub = spec[::sy, ::sx]
    fys = np.fft.fftfreq(h)[::sy][:, None]
    fxs = np.fft.rfftfreq(w)[::sx][None, :]
    keep = np.ones(sub.shape, dtype=bool)
    for ay, ax in ((0.0, 0.0), (f_row, f_col), (-f_row, -f_col), (2 * f_row, 2 * f_col),
                   (-2 * f_row, -2 * f_col)):
        keep &= (_wrap_freq(fys - ay) ** 2 + _wrap_freq(fxs - ax) ** 2) > (1.25 * r_w) ** 2
    if np.count_nonzero(keep) < 200:
        # lobes cover most of the spectrum: the median of all bins is still robust as long
        # as the lobes hold a minority of them
        keep = np.ones(sub.shape, dtype=bool)
        for ay, ax in ((0.0, 0.0), (f_row, f_col), (-f_row, -f_col)):
            keep &= (_wrap_freq(fys - ay) ** 2 + _wrap_freq(fxs - ax) ** 2) > (0.25 * r_w) ** 2
        if np.count_nonzero(keep) < 200:
            return None
    pw = np.abs(sub[keep]) ** 2
    return float(np.median(pw)) / math.log(2.0)


@dataclass
class _FTMState:
    """Intermediate results of the first Fourier-transform pass, reused by the second."""

    name: str
    shape: tuple[int, int]
    inside: np.ndarray
    g: np.ndarray
    pupil: Pupil
    ky0: int
    kx0: int
    f_row: float
    f_col: float
    r_w: float
    win: np.ndarray
    dy: np.ndarray
    dx: np.ndarray
    grid: tuple[int, int]
    rows: np.ndarray
    cols: np.ndarray
    flip: bool
    support: np.ndarray
    visibility: np.ndarray
    b_median: float
    b_image: float
    wsum2: float
    kappa: float
    info: dict
    warnings: list[str]
    cache: dict = field(default_factory=dict)


def _ftm_first(image: np.ndarray, *, pupil: Any, mask: Any, carrier: Any, window: float,
               name: str) -> tuple[PhaseMap, _FTMState]:
    """First Fourier-transform pass: carrier, sideband filter, phase on the analysis grid."""
    from scipy import fft as sfft
    from scipy.fft import next_fast_len

    img = np.asarray(image)
    if img.ndim != 2:
        raise FringeError(f"{name}: expected a 2-D interferogram, got shape {img.shape}")
    if img.dtype.kind not in "uif" or np.iscomplexobj(img):
        raise FringeError(f"{name}: expected real pixel values, got {img.dtype}")
    img = img.astype(np.float64, copy=False)
    h, w = img.shape
    if min(h, w) < 16:
        raise FringeError(f"{name}: image is {w} x {h} pixels; the wavefront needs >= 16 x 16")
    if not 0.2 <= float(window) <= 0.8:
        raise FringeError(f"{name}: window must be between 0.2 and 0.8, got {window!r}")
    good = np.isfinite(img)
    if mask is not None:
        mk = np.asarray(mask, dtype=bool)
        if mk.shape != img.shape:
            raise FringeError(f"{name}: mask shape {mk.shape} does not match image shape "
                              f"{img.shape}")
        good &= ~mk
    if not good.any():
        raise FringeError(f"{name}: no usable pixels")
    warnings: list[str] = []
    p = _as_pupil(pupil, img.shape, name)
    if p is None:
        p = _find_pupil(img, good)
        if p.source == "frame":
            warnings.append("no dark surround found: using the largest circle centred in "
                            "the frame as the pupil (give --pupil to choose it)")
    _edge_warning(p, (h, w), warnings)
    inside = _disk(np.arange(h, dtype=np.float64), np.arange(w, dtype=np.float64), p)
    inside &= good
    n_pupil = int(np.count_nonzero(inside))
    if n_pupil < 64:
        raise FringeError(f"{name}: only {n_pupil} usable pixels inside the pupil")
    with np.errstate(invalid="ignore"):
        m = float(np.sum(img, where=inside)) / n_pupil
        g = img - m
    g[~inside] = 0.0
    spec = sfft.rfft2(g)
    spec_p = sfft.rfft2(inside.astype(np.float64))

    # ---- carrier: strongest peak away from the lowest frequencies (rfft half plane)
    fy = np.fft.fftfreq(h)
    fx = np.fft.rfftfreq(w)
    power = spec.real * spec.real + spec.imag * spec.imag
    f_low = max(2.5 / p.radius, 3.0 / min(h, w))
    ky_low = int(math.ceil(f_low * h))
    kx_low = int(math.ceil(f_low * w))
    power[: ky_low + 1, : kx_low + 1] = 0.0
    power[h - ky_low:, : kx_low + 1] = 0.0
    cfx = cfy = 0.0
    if carrier is not None:
        try:
            cfx, cfy = (float(v) for v in carrier)
        except (TypeError, ValueError):
            raise FringeError(f"{name}: carrier must be (f_x, f_y) in cycles/px") from None
        if not (math.isfinite(cfx) and math.isfinite(cfy)) or math.hypot(cfx, cfy) <= f_low:
            raise FringeError(f"{name}: carrier ({cfx:g}, {cfy:g}) cycles/px is too low "
                              f"(needs more than {f_low:.3g} cycles/px)")
        # the rfft half plane holds f_x >= 0; its row frequency is -f_y
        sg = 1.0 if (cfx > 0 or (cfx == 0 and cfy <= 0)) else -1.0
        near = (_wrap_freq(fy[:, None] + sg * cfy) ** 2 + (fx[None, :] - sg * cfx) ** 2
                <= (0.25 * math.hypot(cfx, cfy)) ** 2)
        power = np.where(near, power, 0.0)
    ky0, kx0 = divmod(int(np.argmax(power)), power.shape[1])
    peak = float(power[ky0, kx0])
    del power
    ky0 = ky0 if ky0 <= h // 2 else ky0 - h
    f_row, f_col = ky0 / h, kx0 / w
    f0 = math.hypot(f_row, f_col)
    if f0 <= 0 or peak <= 0:
        raise FringeError(f"{name}: no carrier fringes found")
    r_w = float(window) * f0
    noise_power = _noise_floor(spec, (h, w), f_row, f_col, r_w)
    snr = peak / noise_power if noise_power else float("inf")
    if snr < 30.0 or f0 * p.radius < 3.0:
        raise FringeError(
            f"{name}: no carrier fringes found (the Fourier-transform method needs open, "
            "tilted fringes across the pupil; for closed fringes use a phase-shifting stack "
            "with --steps)"
        )

    # ---- analysis grid: above twice the filter bandwidth, at least 512 (or the image)
    gh = min(h, max(next_fast_len(int(math.ceil(3.0 * r_w * h))), 512))
    gw = min(w, max(next_fast_len(int(math.ceil(3.0 * r_w * w))), 512))
    hy = int(math.ceil(r_w * h))
    hx = int(math.ceil(r_w * w))
    gh = max(gh, min(h, 2 * hy + 2))
    gw = max(gw, min(w, 2 * hx + 2))

    blk, dy, dx = _spectrum_block(spec, (h, w), ky0, kx0, hy, hx)
    win = _window(np.hypot(dy[:, None] / h, dx[None, :] / w), r_w)
    c = _field_on_grid(blk * win, dy, dx, (gh, gw), (h, w))
    dc_g, _, _ = _spectrum_block(spec, (h, w), 0, 0, hy, hx)
    dc_p, _, _ = _spectrum_block(spec_p, (h, w), 0, 0, hy, hx)
    lp_g = _field_on_grid(dc_g * win, dy, dx, (gh, gw), (h, w)).real
    support = _field_on_grid(dc_p * win, dy, dx, (gh, gw), (h, w)).real
    background = lp_g + m * support

    # ---- sign convention: the larger carrier component positive (y up)
    fx_up, fy_up = f_col, -f_row
    if carrier is not None:
        flip = (fx_up * cfx + fy_up * cfy) < 0
    elif abs(fy_up) > abs(fx_up):
        flip = fy_up < 0
    else:
        flip = fx_up < 0
    if flip:
        c = np.conj(c)
        fx_up, fy_up = -fx_up, -fy_up

    grow = np.arange(gh) * (h / gh)
    gcol = np.arange(gw) * (w / gw)
    amp = np.abs(c)
    with np.errstate(divide="ignore", invalid="ignore"):
        visibility = np.where(background > 0, 2.0 * amp / background, np.nan)
        modulation = np.where(support > 0.05, 2.0 * amp / support, 0.0)
    disk = _disk(grow, gcol, p)
    valid = disk & (support >= _SUPPORT_MIN)
    if np.count_nonzero(valid) == 0:
        raise FringeError(f"{name}: the pupil is too small for the carrier filter "
                          f"(radius {p.radius:.1f} px, carrier period {1 / f0:.1f} px)")
    b_med = float(np.median(modulation[valid]))
    mod_ok = modulation >= _MODULATION_MIN * b_med
    valid &= mod_ok
    # unmodulated parts of the pupil (an obstruction, a shadow) count as holes for the
    # extrapolation passes, so that their edges do not act as steps in the data
    dark_grid = disk & (support >= _SUPPORT_MIN) & ~mod_ok
    if dark_grid.any():
        from scipy import ndimage

        # mean over about one fringe period marks the dark pixels themselves
        k = max(3, int(round(1.0 / f0)) | 1)
        wgt = inside.astype(np.float64)
        with np.errstate(invalid="ignore", divide="ignore"):
            local = (ndimage.uniform_filter(np.where(inside, img, 0.0), k, mode="constant")
                     / ndimage.uniform_filter(wgt, k, mode="constant"))
        dark_px = inside & (local < 0.5 * float(np.median(local[inside])))
        if dark_px.any():
            # the box smears the edge by k/2 pixels: drop that margin as well
            dark_px = ndimage.binary_dilation(dark_px, iterations=k // 2 + 1) & inside
            inside &= ~dark_px
            g[dark_px] = 0.0
            n_dark = int(np.count_nonzero(dark_px))
            spec_p = sfft.rfft2(inside.astype(np.float64))
            dc_p, _, _ = _spectrum_block(spec_p, (h, w), 0, 0, hy, hx)
            support = _field_on_grid(dc_p * win, dy, dx, (gh, gw), (h, w)).real
            warnings.append(f"{100 * n_dark / n_pupil:.1f} % of the pupil is dark (an "
                            "obstruction or shadow; with a margin) and is not used")
    # fringe amplitude in the image (not attenuated by the filter), for the extrapolation
    n_used = max(int(np.count_nonzero(inside)), 1)
    var_pupil = float(np.dot(g.ravel(), g.ravel())) / n_used

    wsum2 = float(np.sum(win * win))
    sigma_phase = None
    if noise_power is not None:
        var_c = noise_power / n_pupil * wsum2 / (h * w)
        sigma_phase = np.sqrt(var_c / (2.0 * np.maximum(amp, 1e-300) ** 2))
    kappa = max(1.0, h * w / wsum2 / ((h / gh) * (w / gw)))

    phase = np.angle(c)
    phase[phase >= np.pi] = -np.pi
    if f0 > 0.35:
        warnings.append(f"carrier of {f0:.3f} cycles/px is close to the sampling limit: "
                        "pixel averaging lowers the modulation")
    if f0 * p.radius < 8.0:
        warnings.append(f"only {f0 * 2 * p.radius:.0f} carrier fringes across the pupil: "
                        "the phase is smoothed over a large fraction of it")
    info = {
        "carrier": {
            "fx_cyc_per_px": fx_up,
            "fy_cyc_per_px": fy_up,
            "period_px": 1.0 / f0,
            "orientation_deg": fold_angle_deg(math.degrees(math.atan2(fy_up, fx_up))),
            "filter_radius_cyc_per_px": r_w,
            "filter": "radial flat-top, cos^2 taper over the outer 20 %",
            "peak_to_noise": snr,
        },
        "grid_step_px": [h / gh, w / gw],
        "intensity_noise": math.sqrt(noise_power / n_pupil) if noise_power else None,
        "noise_source": "spectral noise floor",
        "fringe_extrapolation": False,
    }
    pm = PhaseMap(phase=phase, valid=valid, rows=grow, cols=gcol, sigma_phase=sigma_phase,
                  correlation=kappa, visibility=visibility, pupil=p,
                  method="fourier-transform", info=info, warnings=warnings)
    var_noise = noise_power / n_pupil if noise_power else 0.0
    b_img = math.sqrt(max(2.0 * (var_pupil - var_noise), 0.0)) or b_med
    state = _FTMState(name=name, shape=(h, w), inside=inside, g=g, pupil=p, ky0=ky0,
                      kx0=kx0, f_row=f_row, f_col=f_col, r_w=r_w, win=win, dy=dy, dx=dx,
                      grid=(gh, gw), rows=grow, cols=gcol, flip=flip, support=support,
                      visibility=visibility, b_median=b_med, b_image=b_img,
                      wsum2=wsum2, kappa=kappa, info=info, warnings=warnings)
    return pm, state


class _FillModel:
    """Zernike model at fixed pixels; continued linearly in radius past the pupil edge.

    Points inside the unit circle use the basis directly. Outside, a point at radius
    ``rho`` and angle ``theta`` gets ``W(1, theta) + (rho - 1) dW/drho(1, theta)``, with the
    edge value and slope tabulated at ``K`` angles and interpolated linearly (the model is
    smooth, and the fill only steers the filter at the rim).
    """

    def __init__(self, x: np.ndarray, y: np.ndarray, terms: int, angles: int = 2048):
        rho = np.hypot(x, y)
        self.inner = np.flatnonzero(rho <= 1.0)
        self.outer = np.flatnonzero(rho > 1.0)
        self.n = x.size
        self.b_inner = zernike_basis(x[self.inner], y[self.inner], terms=terms)
        t = np.arange(angles + 1) * (2.0 * np.pi / angles)
        step = 0.02
        e1 = zernike_basis(np.cos(t), np.sin(t), terms=terms)
        e0 = zernike_basis((1 - step) * np.cos(t), (1 - step) * np.sin(t), terms=terms)
        self.edge, self.slope = e1, (e1 - e0) / step
        pos = (np.arctan2(y[self.outer], x[self.outer]) % (2.0 * np.pi)) * (angles / (2 * np.pi))
        self.i0 = np.minimum(pos.astype(np.intp), angles - 1)
        self.frac = pos - self.i0
        self.dr = rho[self.outer] - 1.0

    def __call__(self, coef: np.ndarray) -> np.ndarray:
        out = np.empty(self.n)
        out[self.inner] = self.b_inner @ coef
        if self.outer.size:
            e = self.edge @ coef
            s = self.slope @ coef
            f, i0 = self.frac, self.i0
            out[self.outer] = ((1 - f) * e[i0] + f * e[i0 + 1]
                               + self.dr * ((1 - f) * s[i0] + f * s[i0 + 1]))
        return out


def _model_cache(st: _FTMState, terms: int) -> dict:
    """Fill pixels, grid pupil samples and their Zernike matrices, computed once."""
    cache = st.cache
    if cache.get("terms") == terms:
        return cache
    h, w = st.shape
    p = st.pupil
    margin = float(math.ceil(1.5 / st.r_w))
    r_ext = p.radius + margin
    r0, r1 = max(0, int(math.floor(p.cy - r_ext))), min(h, int(math.ceil(p.cy + r_ext)) + 1)
    c0, c1 = max(0, int(math.floor(p.cx - r_ext))), min(w, int(math.ceil(p.cx + r_ext)) + 1)
    sub_r = np.arange(r0, r1, dtype=np.float64)
    sub_c = np.arange(c0, c1, dtype=np.float64)
    d2 = (sub_r[:, None] - p.cy) ** 2 + (sub_c[None, :] - p.cx) ** 2
    fi, fj = np.nonzero((d2 <= r_ext * r_ext) & ~st.inside[r0:r1, c0:c1])
    rr, cc = sub_r[fi], sub_c[fj]
    dist = np.sqrt(d2[fi, fj])
    taper = np.cos(np.clip((dist - p.radius) / margin, 0.0, 1.0) * np.pi / 2) ** 2
    cache.update(
        terms=terms,
        fill_index=(r0 + fi) * w + (c0 + fj),
        fill_amplitude=st.b_image * taper,
        fill_carrier=2.0 * np.pi * (st.ky0 * rr / h + st.kx0 * cc / w),
        fill_model=_FillModel((cc - p.cx) / p.radius, (p.cy - rr) / p.radius, terms),
    )
    disk = _disk(st.rows, st.cols, p)
    ri = np.clip(np.rint(st.rows).astype(np.intp), 0, h - 1)
    ci = np.clip(np.rint(st.cols).astype(np.intp), 0, w - 1)
    cache["on_data"] = st.inside[ri[:, None], ci[None, :]]  # nearest pixel holds data
    gi, gj = np.nonzero(disk)
    index = np.full(st.grid, -1, dtype=np.intp)
    index[gi, gj] = np.arange(gi.size)
    cache.update(
        disk=disk, disk_rows=gi, disk_cols=gj, disk_index=index,
        disk_matrix=zernike_basis((st.cols[gj] - p.cx) / p.radius,
                                  (p.cy - st.rows[gi]) / p.radius, terms=terms),
    )
    return cache


def _ftm_extrapolated(st: _FTMState, coef: np.ndarray) -> PhaseMap:
    """Second pass: fringes continued past the pupil edge and into holes from a model."""
    from scipy import fft as sfft

    h, w = st.shape
    p = st.pupil
    coef = np.asarray(coef, dtype=np.float64).ravel()
    cache = _model_cache(st, coef.size)
    g2 = st.g  # private working copy: only the fill pixels (zero in the data) change
    idx = cache["fill_index"]
    if idx.size:
        psi = (-2.0 * np.pi if st.flip else 2.0 * np.pi) * cache["fill_model"](coef)
        g2.ravel()[idx] = cache["fill_amplitude"] * np.cos(cache["fill_carrier"] + psi)
    spec2 = sfft.rfft2(g2)
    hy, hx = (st.dy.size - 1) // 2, (st.dx.size - 1) // 2
    blk, dy, dx = _spectrum_block(spec2, (h, w), st.ky0, st.kx0, hy, hx)
    c = _field_on_grid(blk * st.win, dy, dx, st.grid, (h, w))
    if st.flip:
        c = np.conj(c)
    noise_power = _noise_floor(spec2, (h, w), st.f_row, st.f_col, st.r_w)
    del spec2
    amp = np.abs(c)
    valid = cache["disk"] & (st.support >= 0.4) & (amp * 2.0 >= _MODULATION_MIN * st.b_median)
    valid &= cache["on_data"]
    reference = np.zeros(st.grid)
    reference[cache["disk_rows"], cache["disk_cols"]] = 2.0 * np.pi * (cache["disk_matrix"]
                                                                       @ coef)
    sigma_phase = None
    info = dict(st.info, fringe_extrapolation=True)
    n_pupil = int(np.count_nonzero(st.inside))
    if noise_power is not None:
        var_c = noise_power / n_pupil * st.wsum2 / (h * w)
        info["intensity_noise"] = math.sqrt(noise_power / n_pupil)
        sigma_phase = np.sqrt(var_c * np.clip(st.support, 0.0, 1.0)
                              / (2.0 * np.maximum(amp, 1e-300) ** 2))
    phase = np.angle(c)
    phase[phase >= np.pi] = -np.pi
    return PhaseMap(phase=phase, valid=valid, rows=st.rows, cols=st.cols,
                    sigma_phase=sigma_phase, correlation=st.kappa, visibility=st.visibility,
                    pupil=p, method="fourier-transform", info=info,
                    warnings=list(st.warnings), reference=reference)


def _fit_on_grid(st: _FTMState, w_map: np.ndarray, valid: np.ndarray,
                 terms: int) -> ZernikeFit:
    cache = _model_cache(st, terms)
    return _lsq(_disk_rows(cache, valid), w_map[valid], terms, 1.0)


def _disk_rows(cache: dict, valid: np.ndarray) -> np.ndarray:
    """Rows of the cached pupil-sample basis for the valid samples (no copy if all)."""
    matrix = cache["disk_matrix"]
    rows = cache["disk_index"][valid]
    if rows.size == matrix.shape[0]:
        return matrix  # every pupil sample is valid; both are in row-major order
    return matrix[rows]


def ftm_phase(
    image: np.ndarray,
    *,
    pupil: Pupil | Sequence[float] | None = None,
    mask: np.ndarray | None = None,
    carrier: Sequence[float] | None = None,
    window: float = _WINDOW,
    model: Sequence[float] | None = None,
    name: str = "<array>",
) -> PhaseMap:
    """Wrapped phase of one tilt-fringe interferogram by the Fourier-transform method.

    Parameters
    ----------
    image : array_like, shape (H, W)
        Interferogram (linear intensity, any unit). Not modified.
    pupil : Pupil or (cx, cy, radius), optional
        Pupil in pixels (``cx`` column, ``cy`` row). Found with :func:`find_pupil` when
        omitted.
    mask : array_like of bool, shape (H, W), optional
        True for pixels not to use (saturated, hot, dead).
    carrier : (f_x, f_y), optional
        Approximate carrier in cycles/px, ``f_y`` up the screen. The spectral peak nearest
        to it (within a quarter of its length) is used and the sign of the phase follows
        it. Default: the strongest spectral peak, sign as in the module conventions.
    window : float
        Radius of the sideband filter as a fraction of the carrier frequency (0.2-0.8;
        default 0.7, see Notes).
    model : sequence of float, optional
        Noll Zernike coefficients (waves, normalised to `pupil`) of an approximate
        wavefront, e.g. from a first pass. When given, fringes computed from it fill the
        pixels around the pupil and in masked holes before the transform (see Notes), so
        the phase is valid up to the pupil edge; the model is also returned as
        ``reference`` for unwrapping.
    name : str
        Name used in messages.

    Returns
    -------
    PhaseMap
        Wrapped phase on the analysis grid, valid samples, per-sample phase noise,
        visibility, pupil, and ``info["carrier"]``.

    Raises
    ------
    FringeError
        Not a 2-D finite image, no usable pixels, or no carrier fringes.

    Notes
    -----
    With ``g = (I - m) P`` (``m`` the mean over the pupil ``P``, zero outside), the
    spectrum ``G = FFT(g)`` holds the lobe ``C(f - f_0)`` of ``c = (b/2) e^{i phi}``. The
    strongest peak outside the lowest frequencies gives the carrier bin ``f_0``; a radial
    window of radius ``r_w = window |f_0|``, flat out to ``0.8 r_w`` with a ``cos^2`` taper
    beyond, isolates the lobe, and its inverse transform, centred on ``f_0``, is ``c``
    without the carrier (a sub-bin carrier remainder is a tilt, removed with Z2, Z3). The
    usual choice is a radius near ``|f_0|/2``; the default 0.7 keeps ``0.3 |f_0|`` clear of
    the zero-order lobe (the mean is subtracted, so that lobe is weak) while its flat part
    passes local fringe frequencies up to ``0.56 |f_0|`` from the carrier without the phase
    distortion a sloping window gives a chirp; on the test interferograms it cut the map
    error by a factor of 3 or more against a Hann window of radius ``|f_0|/2``.

    Because ``c`` is band-limited to ``r_w``, it is computed directly on a grid of
    ``max(3 r_w N, 512)`` samples per axis (never more than the image size ``N``), above
    twice its bandwidth, so neighbouring samples differ by less than ``pi`` for every local
    frequency the filter passes (Itoh's condition); this keeps unwrapping fast on large
    frames.

    Near the pupil edge the filter kernel reaches outside the data and biases the phase.
    The same window applied to the spectrum of ``P`` gives the data support ``s``; without
    a model, samples with ``s < 0.95`` (a rim of about ``1/r_w`` pixels) are not used. With
    a model, the pixels within ``1.5 / r_w`` outside the pupil and in holes are filled with
    ``b cos(2 pi f_0 . r + phi_model)`` (tapered by ``cos^2`` to zero outwards, with ``b``
    the fringe amplitude of the image, ``sqrt(2 (var(g) - sigma_I^2))``, and the model
    continued linearly in radius past the edge), the transform is repeated, and samples with
    ``s >= 0.4`` are used: the rim phase is then a kernel-weighted mean of data and model
    instead of data and zeros. Samples with a modulation ``2|c|/s`` below a quarter of the
    median are not used. Visibility is ``2|c| / LP(I P)``, both filtered with the same
    window.

    Phase noise: white intensity noise of variance ``sigma_I^2`` puts
    ``s sigma_I^2 sum_k w_k^2 / (H W)`` into ``|c|^2``, so
    ``sigma_phi^2 = s sigma_I^2 sum w_k^2 / (2 H W |c|^2)``. ``sigma_I^2`` is the mean
    spectral power per bin away from the lobes (median / ln 2 of the exponentially
    distributed powers) divided by the number of pupil pixels. The noise is correlated over
    ``A_c = H W / sum w_k^2`` pixels, i.e. ``kappa = A_c / (grid step area)`` samples.

    References
    ----------
    .. [1] M. Takeda, H. Ina and S. Kobayashi, "Fourier-transform method of fringe-pattern
       analysis for computer-based topography and interferometry", J. Opt. Soc. Am. 72(1),
       156-160 (1982), doi:10.1364/JOSA.72.000156.
    .. [2] W. W. Macy, "Two-dimensional fringe-pattern analysis", Appl. Opt. 22(23),
       3898-3901 (1983), doi:10.1364/AO.22.003898 (details from memory).
    .. [3] C. Roddier and F. Roddier, "Interferogram analysis using Fourier transform
       techniques", Appl. Opt. 26(9), 1668-1673 (1987), doi:10.1364/AO.26.001668 (fringe
       extrapolation past the pupil edge; details from memory).
    .. [4] K. Itoh, "Analysis of the phase unwrapping algorithm", Appl. Opt. 21(14), 2470
       (1982), doi:10.1364/AO.21.002470 (details from memory).
    """
    pm, state = _ftm_first(image, pupil=pupil, mask=mask, carrier=carrier, window=window,
                           name=name)
    if model is None:
        return pm
    coef = np.asarray(model, dtype=np.float64).ravel()
    if coef.size < 1 or coef.size > MAX_ZERNIKE_TERMS or not np.all(np.isfinite(coef)):
        raise FringeError(f"{name}: model must hold 1 to {MAX_ZERNIKE_TERMS} finite Zernike "
                          "coefficients")
    return _ftm_extrapolated(state, coef)


# --------------------------------------------------------------------------------------------
# phase-shifting algorithms
# --------------------------------------------------------------------------------------------


@dataclass
class PhaseEstimate:
    """Phase, modulation and background from a phase-shifting stack.

    Attributes
    ----------
    phase : ndarray, shape (H, W)
        Wrapped phase ``phi`` in radians, in (-pi, pi].
    modulation : ndarray, shape (H, W)
        Fringe amplitude ``b``.
    background : ndarray, shape (H, W)
        Mean level ``a``.
    step_rad, step_err_rad : float
        Phase step between frames estimated from the data, and its standard error.
    intensity_noise : float
        Intensity noise per frame (one standard deviation) from the frames' consistency.
    """

    phase: np.ndarray
    modulation: np.ndarray
    background: np.ndarray
    step_rad: float
    step_err_rad: float
    intensity_noise: float


def _stack(stack: Any, k: int, label: str) -> np.ndarray:
    arr = np.asarray(stack)
    if arr.ndim != 3 or arr.shape[0] != k:
        raise FringeError(f"{label} needs a stack of shape ({k}, H, W), got {arr.shape}")
    if arr.dtype.kind not in "uif" or np.iscomplexobj(arr):
        raise FringeError(f"{label}: expected real pixel values, got {arr.dtype}")
    return arr.astype(np.float64, copy=False)


def _sel(mask: np.ndarray | None, shape: tuple[int, ...]) -> np.ndarray:
    if mask is None:
        return np.ones(shape, dtype=bool)
    mk = np.asarray(mask, dtype=bool)
    if mk.shape != shape:
        raise FringeError(f"mask shape {mk.shape} does not match frame shape {shape}")
    return ~mk


def _slope(num: np.ndarray, den: np.ndarray) -> tuple[float, float, np.ndarray]:
    """Least-squares slope t of num = t den (no intercept), its standard error, residual."""
    sxx = float(den @ den)
    if sxx <= 0:
        return float("nan"), float("nan"), num
    t = float(num @ den) / sxx
    r = num - t * den
    se = math.sqrt(float(r @ r) / max(num.size - 1, 1) / sxx)
    return t, se, r


def estimate_phase_step(
    stack: np.ndarray, *, algorithm: str, mask: np.ndarray | None = None
) -> tuple[float, float, float]:
    """Phase step between frames of a stack, estimated from the data.

    Parameters
    ----------
    stack : array_like, shape (K, H, W)
        ``K = 4`` for ``"4"`` and ``"carre"``, 5 for ``"5"``.
    algorithm : {"4", "5", "carre"}
        Frame layout (see :func:`phase_four_step`, :func:`phase_hariharan`,
        :func:`phase_carre`).
    mask : array_like of bool, shape (H, W), optional
        True for pixels not to use; use it to keep only the modulated pupil.

    Returns
    -------
    step_rad : float
        Step between consecutive frames, radians.
    step_err_rad : float
        Its standard error.
    intensity_noise : float
        Intensity noise per frame (one s.d.) from the scatter about the step relation.

    Notes
    -----
    Four frames at ``-3 beta, -beta, beta, 3 beta`` (the 4-step stack is the case
    ``beta = pi/4`` with a shifted origin) obey Carre's relation

    .. math:: 3(I_2 - I_3) - (I_1 - I_4) = \\tan^2\\beta\\,[(I_2 - I_3) + (I_1 - I_4)],

    and five frames at ``-2 alpha ... 2 alpha`` obey Hariharan's
    ``I_5 - I_1 = 2 \\cos\\alpha (I_4 - I_2)``. The slope is fitted through the origin over
    all selected pixels (weights ``den^2``, so unmodulated pixels barely count); the step is
    ``2 beta`` or ``alpha``. The residual, divided by its noise gain
    (``2[(3 - t)^2 + (1 + t)^2]`` resp. ``2(1 + 4 cos^2 alpha)`` times ``sigma_I^2``), gives
    the intensity noise; it also absorbs non-linear steps and frame-to-frame intensity
    changes, so it is an upper bound for the noise.

    References
    ----------
    .. [1] P. Carre, "Installation et utilisation du comparateur photoelectrique et
       interferentiel du Bureau International des Poids et Mesures", Metrologia 2(1), 13-23
       (1966), doi:10.1088/0026-1394/2/1/005 (details from memory).
    .. [2] P. Hariharan, B. F. Oreb and T. Eiju, "Digital phase-shifting interferometry: a
       simple error-compensating phase calculation algorithm", Appl. Opt. 26(13), 2504-2506
       (1987), doi:10.1364/AO.26.002504 (details from memory).
    """
    algo = _check_steps(algorithm)
    k = _STEP_FRAMES[algo]
    st = _stack(stack, k, _STEP_ALGORITHMS[algo])
    sel = _sel(mask, st.shape[1:]) & np.all(np.isfinite(st), axis=0)
    if np.count_nonzero(sel) < 10:
        raise FringeError("too few usable pixels to estimate the phase step")
    v = st[:, sel]
    if algo in ("4", "carre"):
        d14 = v[0] - v[3]
        d23 = v[1] - v[2]
        t, se, r = _slope(3.0 * d23 - d14, d23 + d14)
        if not math.isfinite(t) or t <= 0:
            raise FringeError("the frames do not follow the 4-frame phase-step relation "
                              "(no modulation, or frames out of order)")
        beta = math.atan(math.sqrt(t))
        dbeta = se / (2.0 * math.sqrt(t) * (1.0 + t))
        gain = 2.0 * ((3.0 - t) ** 2 + (1.0 + t) ** 2)
        noise = math.sqrt(float(np.mean(r * r)) / gain)
        return 2.0 * beta, 2.0 * dbeta, noise
    c, se, r = _slope(v[4] - v[0], 2.0 * (v[3] - v[1]))
    if not math.isfinite(c):
        raise FringeError("the frames do not follow the 5-frame phase-step relation "
                          "(no modulation)")
    cc = min(max(c, -1.0), 1.0)
    alpha = math.acos(cc)
    dalpha = se / max(math.sin(alpha), 1e-6)
    noise = math.sqrt(float(np.mean(r * r)) / (2.0 * (1.0 + 4.0 * cc * cc)))
    return alpha, dalpha, noise


def phase_four_step(stack: np.ndarray, *, mask: np.ndarray | None = None) -> PhaseEstimate:
    """Phase from four frames with steps of pi/2: ``delta = 0, pi/2, pi, 3 pi/2``.

    Parameters
    ----------
    stack : array_like, shape (4, H, W)
        Frames ``I_1 ... I_4``. Not modified.
    mask : array_like of bool, shape (H, W), optional
        Pixels not used for the step estimate.

    Returns
    -------
    PhaseEstimate
        ``phi`` at frame 1, ``b``, ``a``, and the step estimated from the data.

    Notes
    -----
    .. math:: \\phi = \\operatorname{atan2}(I_4 - I_2, I_1 - I_3), \\quad
              b = \\tfrac12\\sqrt{(I_4 - I_2)^2 + (I_1 - I_3)^2}, \\quad
              a = \\tfrac14 \\textstyle\\sum I_k.

    A step error ``delta_k -> delta_k (1 + eps)`` gives a phase error of about
    ``(pi/4) eps`` oscillating at ``2 phi`` (PV ``(pi/2) eps``), plus a piston.

    References
    ----------
    .. [1] J. H. Bruning, D. R. Herriott, J. E. Gallagher, D. P. Rosenfeld, A. D. White
       and D. J. Brangaccio, "Digital wavefront measuring interferometer for testing
       optical surfaces and lenses", Appl. Opt. 13(11), 2693-2703 (1974),
       doi:10.1364/AO.13.002693.

    Examples
    --------
    >>> d = np.arange(4) * np.pi / 2
    >>> st = (1 + 0.6 * np.cos(0.9 + d))[:, None, None] * np.ones((4, 2, 2))
    >>> round(float(phase_four_step(st).phase[0, 0]), 12)
    0.9
    """
    st = _stack(stack, 4, "4-step")
    num = st[3] - st[1]
    den = st[0] - st[2]
    step, step_err, noise = _step_or_nan(st, "4", mask)
    return PhaseEstimate(np.arctan2(num, den), 0.5 * np.hypot(num, den), st.mean(axis=0),
                         step, step_err, noise)


def phase_hariharan(stack: np.ndarray, *, mask: np.ndarray | None = None) -> PhaseEstimate:
    """Phase from five frames at ``delta = -pi, -pi/2, 0, pi/2, pi`` (Hariharan et al.).

    Parameters
    ----------
    stack : array_like, shape (5, H, W)
        Frames ``I_1 ... I_5``. Not modified.
    mask : array_like of bool, shape (H, W), optional
        Pixels not used for the step estimate.

    Returns
    -------
    PhaseEstimate
        ``phi`` at frame 3, ``b``, ``a``, and the step estimated from the data.

    Notes
    -----
    .. math:: \\phi = \\operatorname{atan2}(2(I_2 - I_4), 2I_3 - I_1 - I_5), \\quad
              b = \\tfrac14\\sqrt{4(I_2 - I_4)^2 + (2I_3 - I_1 - I_5)^2}, \\quad
              a = \\tfrac18 (I_1 + 2I_2 + 2I_3 + 2I_4 + I_5).

    A step error ``eps`` gives a phase error of second order, about ``(pi^2/16) eps^2``
    at ``2 phi``. The step itself follows from ``cos(alpha) = (I_5 - I_1) / (2(I_4 - I_2))``.

    References
    ----------
    .. [1] P. Hariharan, B. F. Oreb and T. Eiju, Appl. Opt. 26(13), 2504-2506 (1987),
       doi:10.1364/AO.26.002504 (details from memory).

    Examples
    --------
    >>> d = (np.arange(5) - 2) * np.pi / 2
    >>> st = (1 + 0.6 * np.cos(-2.0 + d))[:, None, None] * np.ones((5, 2, 2))
    >>> round(float(phase_hariharan(st).phase[0, 0]), 12)
    -2.0
    """
    st = _stack(stack, 5, "5-step (Hariharan)")
    num = 2.0 * (st[1] - st[3])
    den = 2.0 * st[2] - st[0] - st[4]
    step, step_err, noise = _step_or_nan(st, "5", mask)
    bg = (st[0] + 2.0 * (st[1] + st[2] + st[3]) + st[4]) / 8.0
    return PhaseEstimate(np.arctan2(num, den), 0.25 * np.hypot(num, den), bg,
                         step, step_err, noise)


def phase_carre(stack: np.ndarray, *, mask: np.ndarray | None = None) -> PhaseEstimate:
    """Phase from four frames at ``delta = -3 beta, -beta, beta, 3 beta``, unknown step.

    Parameters
    ----------
    stack : array_like, shape (4, H, W)
        Frames ``I_1 ... I_4`` with equal unknown steps ``2 beta``, ``0 < beta < pi/2``.
        Not modified.
    mask : array_like of bool, shape (H, W), optional
        Pixels not used for the step estimate.

    Returns
    -------
    PhaseEstimate
        ``phi`` at the middle of the stack, ``b`` and ``a`` (using the estimated step),
        and the step.

    Notes
    -----
    .. math::

        \\phi = \\operatorname{atan2}\\Big(\\operatorname{sgn}(I_2 - I_3)
        \\sqrt{|[3(I_2 - I_3) - (I_1 - I_4)][(I_2 - I_3) + (I_1 - I_4)]|},\\;
        (I_2 + I_3) - (I_1 + I_4)\\Big).

    The numerator and denominator equal ``8 b sin^2(beta) cos(beta)`` times ``sin phi``
    and ``cos phi``, so ``phi`` is exact for any equal step; ``b`` and ``a`` use the step of
    :func:`estimate_phase_step`.

    References
    ----------
    .. [1] P. Carre, Metrologia 2(1), 13-23 (1966), doi:10.1088/0026-1394/2/1/005 (details
       from memory).

    Examples
    --------
    >>> beta = np.deg2rad(40.0)
    >>> d = np.array([-3, -1, 1, 3]) * beta
    >>> st = (1 + 0.6 * np.cos(1.2 + d))[:, None, None] * np.ones((4, 2, 2))
    >>> round(float(phase_carre(st).phase[0, 0]), 12)
    1.2
    """
    st = _stack(stack, 4, "Carre")
    d14 = st[0] - st[3]
    d23 = st[1] - st[2]
    num = np.sign(d23) * np.sqrt(np.abs((3.0 * d23 - d14) * (d23 + d14)))
    den = (st[1] + st[2]) - (st[0] + st[3])
    step, step_err, noise = _step_or_nan(st, "carre", mask)
    beta = 0.5 * step
    if math.isfinite(beta) and 0 < beta < math.pi / 2:
        k = 8.0 * math.sin(beta) ** 2 * math.cos(beta)
        amp = np.hypot(num, den) / k
        bg = (st.sum(axis=0) - 2.0 * (math.cos(3 * beta) + math.cos(beta)) * den / k) / 4.0
    else:
        amp = np.full(st.shape[1:], np.nan)
        bg = st.mean(axis=0)
    return PhaseEstimate(np.arctan2(num, den), amp, bg, step, step_err, noise)


def _step_or_nan(st: np.ndarray, algo: str, mask: np.ndarray | None) -> tuple[float, ...]:
    try:
        return estimate_phase_step(st, algorithm=algo, mask=mask)
    except FringeError:
        return float("nan"), float("nan"), float("nan")


def _check_steps(steps: Any) -> str:
    key = str(steps).strip().lower().replace("é", "e")
    if key not in _STEP_FRAMES:
        raise FringeError(f"unknown phase-shifting algorithm {steps!r} (use 4, 5 or carre)")
    return key


def _psi_sigma(algo: str, phase: np.ndarray, amp: np.ndarray, noise: float,
               step: float) -> np.ndarray:
    """Per-pixel phase noise (rad) of a phase-shifting algorithm, linearised.

    ``var phi = sigma_I^2 (cos^2 phi sum n_k^2 + sin^2 phi sum d_k^2) / (K b)^2`` for
    ``N = sum n_k I_k = K b sin phi`` and ``D = sum d_k I_k = K b cos phi`` with
    ``sum n_k d_k = 0``.
    """
    c2 = np.cos(phase) ** 2
    s2 = 1.0 - c2
    if algo == "4":
        sn, sd, k = 2.0, 2.0, 2.0
    elif algo == "5":
        sn, sd, k = 8.0, 6.0, 4.0
    else:
        beta = 0.5 * step if math.isfinite(step) and 0 < step < math.pi else math.pi / 4
        sn, sd = 4.0 * math.tan(beta) ** 2, 4.0
        k = 8.0 * math.sin(beta) ** 2 * math.cos(beta)
    with np.errstate(divide="ignore", invalid="ignore"):
        return noise * np.sqrt(c2 * sn + s2 * sd) / (k * np.maximum(amp, 1e-300))


def psi_phase(
    stack: np.ndarray,
    *,
    steps: str | int,
    pupil: Pupil | Sequence[float] | None = None,
    mask: np.ndarray | None = None,
    name: str = "<array>",
) -> PhaseMap:
    """Wrapped phase of a phase-shifting stack, with the pupil and the step estimate.

    Parameters
    ----------
    stack : array_like, shape (K, H, W)
        Frames (K = 4 for ``steps=4`` and ``"carre"``, 5 for ``steps=5``). Not modified.
    steps : {4, 5, "carre"}
        Algorithm: :func:`phase_four_step`, :func:`phase_hariharan` or :func:`phase_carre`.
    pupil : Pupil or (cx, cy, radius), optional
        Pupil in pixels; found from the modulation map with :func:`find_pupil` if omitted.
    mask : array_like of bool, shape (H, W), optional
        True for pixels not to use in any frame.
    name : str
        Name used in messages.

    Returns
    -------
    PhaseMap
        Phase at full resolution, valid pixels (pupil, modulation at least a quarter of
        the median), per-pixel phase noise and ``info["phase_step_deg"]`` etc.

    Raises
    ------
    FringeError
        Wrong stack shape, unknown algorithm or no usable pixels.

    Notes
    -----
    The step is estimated over the valid pixels (:func:`estimate_phase_step`) and compared
    with the nominal 90 deg (4 and 5 frames): a relative step error ``eps`` leaves a
    ripple at twice the fringe frequency of PV ``(pi/2)|eps|`` rad (4-step) or
    ``(pi^2/8) eps^2`` rad (5-step), reported as ``step_ripple_pv_waves``. Carre's
    algorithm is insensitive to a uniform step error. Pixel noise is independent, so
    ``correlation`` is 1.

    References
    ----------
    .. [1] K. Creath, "Phase-measurement interferometry techniques", Progress in Optics 26,
       349-393 (1988) (details from memory).
    """
    algo = _check_steps(steps)
    k = _STEP_FRAMES[algo]
    label = _STEP_ALGORITHMS[algo]
    arr = np.asarray(stack)
    if arr.ndim != 3 or arr.shape[0] != k:
        raise FringeError(f"{name}: {label} needs {k} frames of equal shape, got an array of "
                          f"shape {arr.shape}")
    st = _stack(arr, k, label)
    h, w = st.shape[1:]
    if min(h, w) < 16:
        raise FringeError(f"{name}: frames are {w} x {h} pixels; the wavefront needs "
                          ">= 16 x 16")
    good = np.all(np.isfinite(st), axis=0) & _sel(mask, (h, w))
    if not good.any():
        raise FringeError(f"{name}: no usable pixels")
    fn = {"4": phase_four_step, "5": phase_hariharan, "carre": phase_carre}[algo]
    warnings: list[str] = []
    p = _as_pupil(pupil, (h, w), name)
    if p is None:
        # the scatter of the frames is proportional to the modulation for every algorithm
        p = _find_pupil(np.where(good, np.std(st, axis=0), 0.0), good)
        if p.source == "frame":
            warnings.append("no pupil edge found in the modulation: using the largest circle "
                            "centred in the frame (give --pupil to choose it)")
    _edge_warning(p, (h, w), warnings)
    rows = np.arange(h, dtype=np.float64)
    cols = np.arange(w, dtype=np.float64)
    valid = _disk(rows, cols, p) & good
    if not valid.any():
        raise FringeError(f"{name}: no usable pixels inside the pupil")
    # refine the step on the pupil only
    est = fn(np.where(good, st, 0.0), mask=~valid)
    amp = est.modulation
    if not np.all(np.isfinite(amp[valid])):
        raise FringeError(f"{name}: the frames do not follow the {label} phase-step relation "
                          "(no fringe modulation, or frames out of order)")
    med = float(np.median(amp[valid]))
    valid &= amp >= _MODULATION_MIN * med
    with np.errstate(divide="ignore", invalid="ignore"):
        visibility = np.where(est.background > 0, amp / est.background, np.nan)
    sigma = None
    if math.isfinite(est.intensity_noise):
        sigma = _psi_sigma(algo, est.phase, amp, est.intensity_noise, est.step_rad)
    step_deg = math.degrees(est.step_rad)
    step_err_deg = math.degrees(est.step_err_rad)
    info: dict[str, Any] = {
        "phase_step_deg": step_deg,
        "phase_step_deg_err": step_err_deg,
        "grid_step_px": [1.0, 1.0],
        "intensity_noise": est.intensity_noise,
        "noise_source": "frame consistency",
        "frames": k,
    }
    if algo in ("4", "5") and math.isfinite(step_deg):
        eps = step_deg / 90.0 - 1.0
        ripple_rad = (math.pi / 2.0) * abs(eps) if algo == "4" else (math.pi ** 2 / 8.0) * eps ** 2
        info["phase_step_error"] = eps
        info["phase_step_error_err"] = step_err_deg / 90.0
        info["step_ripple_pv_waves"] = ripple_rad / (2.0 * math.pi)
        if abs(eps) > 3.0 * step_err_deg / 90.0 and ripple_rad / (2 * math.pi) > 0.005:
            warnings.append(
                f"phase step {step_deg:.1f} deg differs from 90 deg: expect a ripple at twice "
                f"the fringe frequency of PV {ripple_rad / (2 * math.pi):.3f} waves "
                "(recalibrate the phase shifter)"
            )
    elif algo == "carre" and math.isfinite(step_deg) and not 40.0 <= step_deg <= 160.0:
        warnings.append(f"phase step {step_deg:.1f} deg: Carre's formula grows sensitive to "
                        "noise far from steps of about 90-110 deg")
    phase = np.where(est.phase >= np.pi, -np.pi, est.phase)
    return PhaseMap(phase=phase, valid=valid, rows=rows, cols=cols, sigma_phase=sigma,
                    correlation=1.0, visibility=visibility, pupil=p, method=label,
                    info=info, warnings=warnings)


# --------------------------------------------------------------------------------------------
# unwrapping
# --------------------------------------------------------------------------------------------


def unwrap(phase: np.ndarray, *, mask: np.ndarray | None = None) -> np.ndarray:
    """Unwrap a 1-D, 2-D or 3-D wrapped phase (radians).

    Parameters
    ----------
    phase : array_like, shape (N,), (H, W) or (D, H, W)
        Wrapped phase in radians. Not modified.
    mask : array_like of bool, same shape, optional
        True for samples not to use; they are NaN in the output.

    Returns
    -------
    ndarray of float64
        Unwrapped phase (same shape); it carries an arbitrary ``2 pi k`` offset per
        connected region.

    Raises
    ------
    FringeError
        scikit-image is not installed, or wrong dimensions.

    Notes
    -----
    The input is wrapped into ``[-pi, pi)`` and passed to scikit-image's
    ``unwrap_phase``, a reliability-sorting, non-continuous-path unwrapper; the random
    start is fixed so the result is reproducible. Itoh's condition, ``|Delta phi| < pi``
    between neighbours, must hold for the result to equal the true phase.

    References
    ----------
    .. [1] M. A. Herraez, D. R. Burton, M. J. Lalor and M. A. Gdeisat, "Fast
       two-dimensional phase-unwrapping algorithm based on sorting by reliability following
       a noncontinuous path", Appl. Opt. 41(35), 7437-7444 (2002),
       doi:10.1364/AO.41.007437.
    .. [2] D. C. Ghiglia and M. D. Pritt, Two-Dimensional Phase Unwrapping: Theory,
       Algorithms, and Software (Wiley, 1998).
    """
    try:
        from skimage.restoration import unwrap_phase
    except ImportError:
        raise FringeError(
            "phase unwrapping needs scikit-image: install scikit-image "
            "(pip install scikit-image)"
        ) from None
    ph = np.asarray(phase, dtype=np.float64)
    if ph.ndim not in (1, 2, 3):
        raise FringeError(f"phase must be 1-D, 2-D or 3-D, got shape {ph.shape}")
    wrapped = (ph + np.pi) % (2.0 * np.pi) - np.pi
    bad = ~np.isfinite(wrapped)
    if mask is not None:
        mk = np.asarray(mask, dtype=bool)
        if mk.shape != ph.shape:
            raise FringeError(f"mask shape {mk.shape} does not match phase shape {ph.shape}")
        bad = bad | mk
    if bad.all():
        raise FringeError("no valid phase samples to unwrap")
    if ph.ndim == 1:  # each run of valid samples is its own region
        res = np.full(ph.shape, np.nan)
        edges = np.flatnonzero(np.diff(np.concatenate(([1], bad.astype(np.int8), [1]))))
        for start, stop in zip(edges[::2], edges[1::2], strict=True):
            if stop - start == 1:
                res[start] = wrapped[start]
            else:
                res[start:stop] = unwrap_phase(wrapped[start:stop], rng=0)
        return res
    data = np.where(bad, 0.0, wrapped)
    if bad.any():
        out = unwrap_phase(np.ma.masked_array(data, mask=bad), rng=0)
        return np.ma.filled(out.astype(np.float64), np.nan)
    return np.asarray(unwrap_phase(data, rng=0), dtype=np.float64)


def _largest_component(valid: np.ndarray) -> tuple[np.ndarray, float]:
    from scipy import ndimage

    labels, count = ndimage.label(valid)
    if count <= 1:
        return valid, 0.0
    sizes = np.bincount(labels.ravel())
    sizes[0] = 0
    keep = labels == int(np.argmax(sizes))
    dropped = 1.0 - float(sizes.max()) / float(sizes.sum())
    return keep, dropped


# --------------------------------------------------------------------------------------------
# statistics and checks
# --------------------------------------------------------------------------------------------


def strehl_estimate(rms_waves: float) -> float:
    """Strehl ratio from the RMS wavefront error, ``exp(-(2 pi sigma)^2)`` (rule of thumb).

    Parameters
    ----------
    rms_waves : float
        RMS wavefront error ``sigma`` in waves (piston and tilt removed).

    Returns
    -------
    float
        Estimated Strehl ratio; a rule of thumb, good to a few per cent for
        ``sigma < 0.1`` wave.

    References
    ----------
    .. [1] V. N. Mahajan, "Strehl ratio for primary aberrations in terms of their
       aberration variance", J. Opt. Soc. Am. 73(6), 860-861 (1983),
       doi:10.1364/JOSA.73.000860.

    Examples
    --------
    >>> round(strehl_estimate(0.1), 6)
    0.673825
    """
    s = float(rms_waves)
    if not math.isfinite(s) or s < 0:
        raise FringeError(f"rms_waves must be finite and >= 0, got {rms_waves!r}")
    return math.exp(-((2.0 * math.pi * s) ** 2))


def _positive_or_none(value: Any, label: str) -> float | None:
    if value is None:
        return None
    v = float(value)
    if not math.isfinite(v) or v <= 0:
        raise FringeError(f"{label} must be a positive number, got {value!r}")
    return v


def quality_checks(
    pv_waves: float,
    rms_waves: float,
    *,
    pv_err: float = 0.0,
    rms_err: float = 0.0,
    max_pv_waves: float | None = None,
    max_rms_waves: float | None = None,
) -> list[dict[str, Any]]:
    """Pass/fail checks: user tolerances and the usual rules of thumb.

    Parameters
    ----------
    pv_waves, rms_waves : float
        Measured PV and RMS (waves).
    pv_err, rms_err : float
        Their standard uncertainties (for the margin in sigmas).
    max_pv_waves, max_rms_waves : float, optional
        User tolerances.

    Returns
    -------
    list of dict
        One dict per check: ``check``, ``kind`` (``"user tolerance"`` or ``"rule of
        thumb"``), ``value_waves``, ``limit_waves``, ``passed`` and ``margin_sigma``
        (``(limit - value) / err``, None without an uncertainty).

    Notes
    -----
    Rules of thumb (common practice, not a specification): Rayleigh's quarter-wave PV
    limit, ``PV <= lambda/4``, and Marechal's criterion ``RMS <= lambda/14``, which
    corresponds to a Strehl ratio of about 0.8.

    References
    ----------
    .. [1] M. Born and E. Wolf, Principles of Optics, 7th ed. (Cambridge University Press,
       1999), sec. 9.3 (Marechal's criterion; value from memory).

    Examples
    --------
    >>> [c["passed"] for c in quality_checks(0.3, 0.05, max_rms_waves=0.04)]
    [False, False, True]
    """
    max_pv = _positive_or_none(max_pv_waves, "max_pv_waves")
    max_rms = _positive_or_none(max_rms_waves, "max_rms_waves")

    def one(check: str, kind: str, value: float, limit: float, err: float) -> dict[str, Any]:
        margin = (limit - value) / err if err and err > 0 else None
        return {"check": check, "kind": kind, "value_waves": float(value),
                "limit_waves": float(limit), "passed": bool(value <= limit),
                "margin_sigma": margin}

    out = []
    if max_pv is not None:
        out.append(one(f"PV <= {max_pv:g} waves", "user tolerance", pv_waves, max_pv, pv_err))
    if max_rms is not None:
        out.append(one(f"RMS <= {max_rms:g} waves", "user tolerance", rms_waves, max_rms,
                       rms_err))
    out.append(one("PV <= lambda/4 (Rayleigh quarter-wave)", "rule of thumb", pv_waves,
                   RULE_QUARTER_WAVE_PV, pv_err))
    out.append(one("RMS <= lambda/14 (Marechal, Strehl about 0.8)", "rule of thumb",
                   rms_waves, RULE_MARECHAL_RMS, rms_err))
    return out


@dataclass
class WavefrontResult:
    """Wavefront of one interferogram or phase-shifting stack.

    Attributes
    ----------
    file, frame : str, int
        Source of the data.
    status, error : str, str or None
        ``"ok"`` or ``"error"`` with a one-line message.
    method : str
        Phase method.
    values : dict
        Scalar results with unit-suffixed keys (``pv_waves``, ``pv_waves_err``,
        ``rms_waves``, ...).
    zernike : list of dict
        ``{"j", "n", "m", "name", "coefficient_waves", "err"}`` per Noll term.
    removed_terms : list of int
        Noll terms subtracted before PV/RMS.
    carrier, pupil : dict or None
        Carrier (Fourier-transform method) and pupil details.
    checks : list of dict
        :func:`quality_checks`.
    warnings : list of str
        Problems worth telling the user.
    wavefront_map : ndarray or None
        Wavefront in waves after removing `removed_terms`, NaN where not valid; on the
        analysis grid (``values["map_step_px"]``). Not in :meth:`to_dict`.
    visibility_map : ndarray or None
        Fringe visibility on the same grid. Not in :meth:`to_dict`.
    """

    file: str = "<array>"
    frame: int = 0
    status: str = "ok"
    error: str | None = None
    method: str | None = None
    values: dict[str, Any] = field(default_factory=dict)
    zernike: list[dict[str, Any]] = field(default_factory=list)
    removed_terms: list[int] = field(default_factory=list)
    carrier: dict[str, Any] | None = None
    pupil: dict[str, Any] | None = None
    checks: list[dict[str, Any]] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    wavefront_map: np.ndarray | None = field(default=None, repr=False, compare=False)
    visibility_map: np.ndarray | None = field(default=None, repr=False, compare=False)

    @property
    def ok(self) -> bool:
        return self.status == "ok"

    def __getattr__(self, name: str) -> Any:
        values = self.__dict__.get("values")
        if values is not None and name in values:
            return values[name]
        raise AttributeError(name)

    def warn(self, message: str) -> None:
        if message not in self.warnings:
            self.warnings.append(message)

    def fail(self, message: str) -> WavefrontResult:
        """Mark as failed and drop all numbers."""
        self.status = "error"
        self.error = message
        self.values = {}
        self.zernike = []
        self.checks = []
        self.wavefront_map = None
        self.visibility_map = None
        return self

    @property
    def tolerance_pass(self) -> bool | None:
        """True/False when user tolerances were given and all/some passed, else None."""
        user = [c for c in self.checks if c["kind"] == "user tolerance"]
        if not user:
            return None
        return all(c["passed"] for c in user)

    def to_dict(self) -> dict[str, Any]:
        """Flat dictionary with unit-suffixed keys (one JSON Lines record)."""
        out: dict[str, Any] = {"file": self.file, "frame": self.frame, "status": self.status,
                               "error": self.error, "method": self.method}
        if self.status == "ok":
            for key in ("pv_waves", "pv_waves_err", "rms_waves", "rms_waves_err",
                        "strehl_estimate"):
                out[key] = None
        out.update({k: _clean(v) for k, v in self.values.items()})
        out["zernike"] = [{k: _clean(v) for k, v in z.items()} for z in self.zernike]
        out["zernike_ordering"] = ZERNIKE_ORDERING
        out["zernike_normalisation"] = ZERNIKE_NORMALISATION
        out["removed_terms"] = list(self.removed_terms)
        out["carrier"] = None if self.carrier is None else {k: _clean(v) for k, v in
                                                             self.carrier.items()}
        out["pupil"] = None if self.pupil is None else {k: _clean(v) for k, v in
                                                         self.pupil.items()}
        out["checks"] = [{k: _clean(v) for k, v in c.items()} for c in self.checks]
        out["tolerance_pass"] = self.tolerance_pass
        out["warnings"] = list(self.warnings)
        return out


def _removed(remove_defocus: bool) -> list[int]:
    return [1, 2, 3, 4] if remove_defocus else [1, 2, 3]


def _metrics(
    w_map: np.ndarray,
    valid: np.ndarray,
    rows: np.ndarray,
    cols: np.ndarray,
    pupil: Pupil,
    sigma_waves: np.ndarray | None,
    kappa: float,
    *,
    terms: int,
    remove_defocus: bool,
    res: WavefrontResult,
    basis: np.ndarray | None = None,
) -> np.ndarray:
    """Zernike fit, term removal, PV/RMS and their uncertainties; returns the residual map.

    `basis`, if given, holds the Zernike terms (at least `terms` columns) of the valid
    samples in ``np.nonzero(valid)`` order.
    """
    ii, jj = np.nonzero(valid)
    w = w_map[ii, jj]
    x = (cols[jj] - pupil.cx) / pupil.radius
    y = (pupil.cy - rows[ii]) / pupil.radius
    n = w.size
    removed = _removed(remove_defocus)
    if terms < max(removed):
        raise FringeError(f"zernike_terms must be at least {max(removed)} to remove "
                          f"{', '.join(_NAMES[j] for j in removed)}")
    budget = max(20_000, _FIT_SAMPLE_BUDGET // terms)
    if n > budget:
        pick = np.linspace(0, n - 1, budget).astype(np.intp)
        kfit = max(1.0, kappa * budget / n)
    else:
        pick = slice(None)
        kfit = kappa
    if basis is None:
        a = zernike_basis(x[pick], y[pick], terms=terms)
    else:
        a = basis[pick, :terms]
    fit = _lsq(a, w[pick], terms, kfit)
    c = fit.coefficients
    r2 = x * x + y * y
    wr = w - c[0] - c[1] * (2.0 * x) - c[2] * (2.0 * y)
    if 4 in removed:
        wr = wr - c[3] * math.sqrt(3.0) * (2.0 * r2 - 1.0)
    mean = float(wr.mean())
    dev = wr - mean
    rms = float(np.sqrt(np.mean(dev * dev)))
    imax, imin = int(np.argmax(wr)), int(np.argmin(wr))
    pv = float(wr[imax] - wr[imin])
    if sigma_waves is not None:
        sig = sigma_waves[ii, jj]
        noise_source = "noise model"
    else:
        sig = np.full(n, fit.residual_rms)
        noise_source = "Zernike fit residual"
    var_mean = float(np.mean(sig * sig))
    if rms > 0:
        var_rand = kappa * float(np.sum(dev * dev * sig * sig)) / (n * rms) ** 2
        bias = rms - math.sqrt(max(rms * rms - var_mean, 0.0))
        rms_err = math.sqrt(var_rand + bias * bias)
    else:
        rms_err = math.sqrt(var_mean)
    pv_err = math.hypot(float(sig[imax]), float(sig[imin]))
    kept = [j for j in range(1, terms + 1) if j not in removed]
    ck = c[[j - 1 for j in kept]]
    cov_k = fit.covariance[np.ix_([j - 1 for j in kept], [j - 1 for j in kept])]
    rms_z = float(np.sqrt(np.sum(ck * ck)))
    rms_z_err = float(math.sqrt(max(float(ck @ cov_k @ ck), 0.0)) / rms_z) if rms_z > 0 else \
        float(math.sqrt(max(float(np.trace(cov_k)), 0.0)))
    c_kept = np.zeros(a.shape[1])
    c_kept[[j - 1 for j in kept]] = ck
    model = a @ c_kept
    pv_z = float(model.max() - model.min())

    v = res.values
    v["pv_waves"], v["pv_waves_err"] = pv, pv_err
    v["rms_waves"], v["rms_waves_err"] = rms, rms_err
    v["pv_zernike_waves"] = pv_z
    v["rms_zernike_waves"], v["rms_zernike_waves_err"] = rms_z, rms_z_err
    v["fit_residual_rms_waves"] = fit.residual_rms
    v["phase_noise_waves"] = math.sqrt(var_mean)
    v["noise_source"] = noise_source
    v["valid_samples"] = int(n)
    v["zernike_terms"] = terms
    s = strehl_estimate(rms)
    v["strehl_estimate"] = s
    v["strehl_estimate_err"] = s * 8.0 * math.pi ** 2 * rms * rms_err
    v["strehl_method"] = "exp(-(2 pi rms)^2), rule of thumb (Mahajan 1983)"
    res.removed_terms = removed
    res.zernike = []
    for j in range(1, terms + 1):
        nn, mm = noll_to_nm(j)
        res.zernike.append({"j": j, "n": nn, "m": mm, "name": zernike_name(j),
                            "coefficient_waves": float(c[j - 1]),
                            "err": float(fit.errors[j - 1])})
    rr = np.sqrt(r2)
    res.pupil = dict(pupil.to_dict(), analysed_radius_px=float(rr.max() * pupil.radius))
    if rms > 0 and math.sqrt(var_mean) > rms / 3.0:
        res.warn(f"phase noise ({math.sqrt(var_mean):.3g} waves per sample) is large "
                 "against the RMS: PV and RMS are inflated by noise")
    out = np.full(w_map.shape, np.nan)
    out[ii, jj] = wr - mean
    return out


def _unwrap_map(pm: PhaseMap, res: WavefrontResult) -> tuple[np.ndarray, np.ndarray]:
    """Unwrapped wavefront (waves) of the largest connected valid region, and that region."""
    valid, dropped = _largest_component(pm.valid)
    if dropped > 0.01:
        res.warn(f"{100 * dropped:.1f} % of the valid pupil is not connected to the main "
                 "region and was not used")
    if pm.reference is not None:
        diff = (pm.phase - pm.reference + np.pi) % (2.0 * np.pi) - np.pi
        if np.all(np.abs(diff[valid]) < np.pi / 2):
            un = np.where(valid, diff, np.nan) + pm.reference  # the model is within 1/4 wave
        else:
            un = unwrap(diff, mask=~valid) + pm.reference
    else:
        un = unwrap(pm.phase, mask=~valid)
    # deterministic piston: bring the mean into (-pi, pi]
    un = un - 2.0 * np.pi * np.round(float(un[valid].mean()) / (2.0 * np.pi))
    masked = np.where(valid, un, np.nan)
    d0 = np.abs(np.diff(masked, axis=0))
    d1 = np.abs(np.diff(masked, axis=1))
    with np.errstate(invalid="ignore"):
        jumps = int(np.count_nonzero(d0 > np.pi)) + int(np.count_nonzero(d1 > np.pi))
    pairs = int(np.count_nonzero(np.isfinite(d0))) + int(np.count_nonzero(np.isfinite(d1)))
    if pairs and jumps > 0.001 * pairs:
        res.warn(f"{jumps} neighbouring samples differ by more than pi after unwrapping: "
                 "the map may hold unwrapping errors (noise, dust or closed fringes)")
    return un / (2.0 * np.pi), valid


def _finish(pm: PhaseMap, res: WavefrontResult, *, unwrapped: np.ndarray | None,
            terms: int, remove_defocus: bool, wavelength_nm: float | None,
            wavelength_nm_err: float, max_pv_waves: float | None,
            max_rms_waves: float | None, state: _FTMState | None = None) -> WavefrontResult:
    if unwrapped is None:
        w_map, valid = _unwrap_map(pm, res)
    else:
        w_map, valid = unwrapped, pm.valid
    sig_w = None if pm.sigma_phase is None else pm.sigma_phase / (2.0 * np.pi)
    basis = None
    if state is not None and state.cache.get("terms", 0) >= terms:
        basis = _disk_rows(state.cache, valid)
    resid = _metrics(w_map, valid, pm.rows, pm.cols, pm.pupil, sig_w, pm.correlation,
                     terms=terms, remove_defocus=remove_defocus, res=res, basis=basis)
    v = res.values
    vis = pm.visibility[valid]
    vis = vis[np.isfinite(vis)]
    if vis.size:
        v["visibility_mean"] = float(vis.mean())
        v["visibility_min"] = float(vis.min())
        v["visibility_max"] = float(vis.max())
        if float(np.median(vis)) < 0.1:
            res.warn(f"low fringe visibility (median {float(np.median(vis)):.3f}): the phase "
                     "is noisy")
    v["map_step_px"] = [float(s) for s in pm.info.get("grid_step_px", [1.0, 1.0])]
    for key in ("phase_step_deg", "phase_step_deg_err", "phase_step_error",
                "phase_step_error_err", "step_ripple_pv_waves"):
        if key in pm.info:
            v[key] = pm.info[key]
    if "intensity_noise" in pm.info:
        v["intensity_noise_dn"] = pm.info["intensity_noise"]  # data units of the input
    if pm.info.get("noise_source") and pm.sigma_phase is not None:
        v["noise_source"] = pm.info["noise_source"]
    if wavelength_nm is not None:
        lam = float(wavelength_nm)
        dlam = float(wavelength_nm_err or 0.0)
        v["wavelength_nm"], v["wavelength_nm_err"] = lam, dlam
        for key in ("pv", "rms"):
            val, err = v[f"{key}_waves"], v[f"{key}_waves_err"]
            v[f"{key}_nm"] = val * lam
            v[f"{key}_nm_err"] = math.hypot(err * lam, val * dlam)
        for z in res.zernike:
            z["coefficient_nm"] = z["coefficient_waves"] * lam
            z["err_nm"] = math.hypot(z["err"] * lam, z["coefficient_waves"] * dlam)
    res.checks = quality_checks(v["pv_waves"], v["rms_waves"], pv_err=v["pv_waves_err"],
                                rms_err=v["rms_waves_err"], max_pv_waves=max_pv_waves,
                                max_rms_waves=max_rms_waves)
    res.wavefront_map = resid.astype(np.float32)
    in_pupil = _disk(pm.rows, pm.cols, pm.pupil)
    res.visibility_map = np.where(in_pupil & np.isfinite(pm.visibility), pm.visibility,
                                  np.nan).astype(np.float32)
    if pm.info.get("carrier"):
        car = dict(pm.info["carrier"])
        # a tilt of the wavefront and a carrier offset are the same thing: refine with Z2, Z3
        c2 = res.zernike[1]["coefficient_waves"]
        c3 = res.zernike[2]["coefficient_waves"]
        fxr = car["fx_cyc_per_px"] + 2.0 * c2 / pm.pupil.radius
        fyr = car["fy_cyc_per_px"] + 2.0 * c3 / pm.pupil.radius
        car["fx_cyc_per_px"], car["fy_cyc_per_px"] = fxr, fyr
        car["period_px"] = 1.0 / math.hypot(fxr, fyr)
        car["orientation_deg"] = fold_angle_deg(math.degrees(math.atan2(fyr, fxr)))
        res.carrier = car
    for wmsg in pm.warnings:
        res.warn(wmsg)
    return res


def _local_frequency_check(pm: PhaseMap, st: _FTMState, coef: np.ndarray) -> None:
    """Warn when the wavefront slope moves the local fringe frequency out of the flat filter."""
    ref = pm.reference
    if ref is None:
        return
    step_r, step_c = pm.info["grid_step_px"]
    inside = _disk(pm.rows, pm.cols, pm.pupil)
    with np.errstate(invalid="ignore"):
        gr = np.diff(ref, axis=0)[:, :-1] / (2.0 * np.pi * step_r)
        gc = np.diff(ref, axis=1)[:-1, :] / (2.0 * np.pi * step_c)
    both = inside[:-1, :-1] & inside[1:, :-1] & inside[:-1, 1:]
    if not both.any():
        return
    # the tilt terms only move the carrier; the filter is centred on it
    tilt = np.hypot(2.0 * coef[1], 2.0 * coef[2]) / pm.pupil.radius if coef.size >= 3 else 0.0
    fmax = float(np.max(np.hypot(gr, gc)[both]) - tilt)
    flat = (1.0 - _TAPER) * st.r_w
    pm.info["carrier"]["max_local_offset_cyc_per_px"] = fmax
    if fmax > flat:
        pm.warnings.append(
            f"the wavefront slope shifts the local fringe frequency by up to {fmax:.3f} "
            f"cycles/px, beyond the flat part of the filter ({flat:.3f}): strong aberration "
            "for this carrier, expect errors (add tilt fringes)")


def _check_common(terms: Any, wavelength_nm: Any, wavelength_nm_err: Any,
                  max_pv_waves: Any, max_rms_waves: Any) -> int:
    terms = _check_terms(terms)
    if terms < 3:
        raise FringeError(f"zernike_terms must be at least 3 (piston and tilts), got {terms}")
    _positive_or_none(wavelength_nm, "wavelength_nm")
    if wavelength_nm_err is not None:
        e = float(wavelength_nm_err)
        if not math.isfinite(e) or e < 0:
            raise FringeError(f"wavelength_nm_err must be >= 0, got {wavelength_nm_err!r}")
    _positive_or_none(max_pv_waves, "max_pv_waves")
    _positive_or_none(max_rms_waves, "max_rms_waves")
    return terms


def analyze_wavefront(
    data: np.ndarray,
    *,
    steps: str | int | None = None,
    pupil: Pupil | Sequence[float] | None = None,
    mask: np.ndarray | None = None,
    carrier: Sequence[float] | None = None,
    wavelength_nm: float | None = None,
    wavelength_nm_err: float = 0.0,
    remove_defocus: bool = False,
    zernike_terms: int = 15,
    max_pv_waves: float | None = None,
    max_rms_waves: float | None = None,
    file: str = "<array>",
    frame: int = 0,
) -> WavefrontResult:
    """Wavefront, Zernike terms, PV/RMS with uncertainties and checks from fringe data.

    Parameters
    ----------
    data : array_like, shape (H, W) or (K, H, W)
        One tilt-fringe interferogram (Fourier-transform method) or, with `steps`, a
        phase-shifting stack. Not modified.
    steps : {None, 4, 5, "carre"}
        Phase-shifting algorithm for a stack; None for a single interferogram.
    pupil : Pupil or (cx, cy, radius), optional
        Pupil in pixels (``cx`` column, ``cy`` row down); found from the intensity
        (or the modulation, for stacks) when omitted.
    mask : array_like of bool, shape (H, W), optional
        True for unusable pixels (saturated, bad).
    carrier : (f_x, f_y), optional
        Approximate carrier in cycles/px (y up) for :func:`ftm_phase`.
    wavelength_nm, wavelength_nm_err : float, optional
        Wavelength and its uncertainty; adds ``pv_nm``, ``rms_nm`` and ``coefficient_nm``.
    remove_defocus : bool
        Also remove Z4 (defocus) before PV/RMS; piston and tilt are always removed.
    zernike_terms : int
        Number of Noll terms fitted (default 15, up to radial order 4).
    max_pv_waves, max_rms_waves : float, optional
        User tolerances for pass/fail.
    file, frame : str, int
        Recorded in the result.

    Returns
    -------
    WavefrontResult
        PV and RMS in waves (and nm) with uncertainties, Zernike coefficients, Strehl
        estimate, checks, and the residual and visibility maps.

    Raises
    ------
    FringeError
        Bad options or data that give no wavefront (no carrier, no pupil, too few
        pixels, scikit-image missing).

    Notes
    -----
    Pipeline: phase (:func:`ftm_phase` or :func:`psi_phase`), unwrapping (:func:`unwrap`)
    of the largest connected valid region, Zernike fit (:func:`fit_zernike`) over the valid
    samples, subtraction of piston and tilt (and defocus) with the fitted coefficients,
    then over the valid samples ``PV = max - min`` and ``RMS`` = standard deviation
    (ddof 0) of the remaining wavefront ``W_r``.

    Single interferograms take up to three Fourier-transform passes: the first, without
    the pupil rim, gives a Zernike model (at least 15 terms); the second repeats the
    transform with fringes extrapolated from that model past the pupil edge and into masked
    holes (``ftm_phase(model=...)``), so the map reaches the pupil edge; a third pass with
    the refined model runs when the model changed by more than 5e-4 wave. The model also
    guides the unwrapping. A tilt of the wavefront cannot be told from the carrier, so Z2
    and Z3 of a single interferogram are relative to the carrier bin; the refined carrier
    is ``result.carrier``. Piston (Z1) is arbitrary: the phase has an unknown ``2 pi k``
    offset; it is set so the mean phase lies in ``(-pi, pi]``. Coefficient uncertainties
    are conditional on the pupil: a pupil radius wrong by ``dR`` changes ``c_4`` by about
    ``2 c_4 dR / R``.

    Uncertainties. The phase noise ``sigma_i`` of each sample comes from the local
    amplitude and the noise level (the spectral noise floor for the Fourier-transform
    method; the scatter of the frames about the phase-step relation for stacks); without
    it, from the Zernike-fit residual. Linear propagation through the RMS gives
    ``var_RMS = kappa sum_i (W_i - <W>)^2 sigma_i^2 / (N RMS)^2``, with ``kappa`` the
    samples per independent noise sample; noise also raises the RMS by about
    ``RMS - sqrt(RMS^2 - <sigma^2>)``, added in quadrature. The PV uncertainty is
    ``sqrt(sigma_max^2 + sigma_min^2)`` at the two extreme samples (the PV is also biased up
    by noise; ``pv_zernike_waves``, the PV of the fitted terms, is a noise-robust
    alternative). Coefficient errors use the fit residual (:func:`fit_zernike`), which
    includes structure beyond the fitted terms, times ``kappa``.

    The Strehl estimate ``exp(-(2 pi RMS)^2)`` and the checks ``PV <= lambda/4`` and
    ``RMS <= lambda/14`` are rules of thumb.

    References
    ----------
    .. [1] M. Takeda, H. Ina and S. Kobayashi, J. Opt. Soc. Am. 72(1), 156-160 (1982),
       doi:10.1364/JOSA.72.000156.
    .. [2] R. J. Noll, J. Opt. Soc. Am. 66(3), 207-211 (1976), doi:10.1364/JOSA.66.000207.
    .. [3] V. N. Mahajan, J. Opt. Soc. Am. 73(6), 860-861 (1983),
       doi:10.1364/JOSA.73.000860.
    """
    try:
        return _analyze(data, steps=steps, pupil=pupil, mask=mask, carrier=carrier,
                        wavelength_nm=wavelength_nm, wavelength_nm_err=wavelength_nm_err,
                        remove_defocus=remove_defocus, zernike_terms=zernike_terms,
                        max_pv_waves=max_pv_waves, max_rms_waves=max_rms_waves, file=file,
                        frame=frame)
    except FringeError as exc:
        msg = str(exc)
        if msg.startswith(f"{file}: "):
            raise
        raise FringeError(f"{file}: {msg}") from None


def _analyze(data: Any, *, steps: Any, pupil: Any, mask: Any, carrier: Any,
             wavelength_nm: Any, wavelength_nm_err: Any, remove_defocus: bool,
             zernike_terms: Any, max_pv_waves: Any, max_rms_waves: Any, file: str,
             frame: int) -> WavefrontResult:
    terms = _check_common(zernike_terms, wavelength_nm, wavelength_nm_err, max_pv_waves,
                          max_rms_waves)
    res = WavefrontResult(file=file, frame=int(frame))
    state = None
    if steps is None:
        pm1, state = _ftm_first(data, pupil=pupil, mask=mask, carrier=carrier, window=_WINDOW,
                                name=file)
        scratch = WavefrontResult(file=file, frame=int(frame))
        model_terms = max(terms, 15)
        w1, valid1 = _unwrap_map(pm1, scratch)
        fit = _fit_on_grid(state, w1, valid1, model_terms)
        # two passes with fringes extrapolated from the model of the previous pass; the
        # second removes most of the rim error left by the first
        pm = _ftm_extrapolated(state, fit.coefficients)
        w2, valid2 = _unwrap_map(pm, scratch)
        fit2 = _fit_on_grid(state, w2, valid2, model_terms)
        change = float(np.max(np.abs(fit2.coefficients[1:] - fit.coefficients[1:])))
        if change > _MODEL_TOLERANCE:
            # the first model was off near the rim: extrapolate once more with the better one
            pm = _ftm_extrapolated(state, fit2.coefficients)
            fit = fit2
        pm.info["carrier"]["extrapolation_passes"] = 2 if change > _MODEL_TOLERANCE else 1
        _local_frequency_check(pm, state, fit.coefficients)
    else:
        pm = psi_phase(data, steps=steps, pupil=pupil, mask=mask, name=file)
    res.method = pm.method
    return _finish(pm, res, unwrapped=None, terms=terms, remove_defocus=remove_defocus,
                   wavelength_nm=wavelength_nm, wavelength_nm_err=wavelength_nm_err or 0.0,
                   max_pv_waves=max_pv_waves, max_rms_waves=max_rms_waves,
                   state=state)


def wavefront_metrics(
    wavefront: np.ndarray,
    *,
    pupil: Pupil | Sequence[float],
    mask: np.ndarray | None = None,
    sigma_waves: np.ndarray | float | None = None,
    remove_defocus: bool = False,
    zernike_terms: int = 15,
    wavelength_nm: float | None = None,
    max_pv_waves: float | None = None,
    max_rms_waves: float | None = None,
) -> WavefrontResult:
    """Zernike fit, PV/RMS and checks of an already unwrapped wavefront map.

    Parameters
    ----------
    wavefront : array_like, shape (H, W)
        Wavefront in waves (NaN where unknown). Not modified.
    pupil : Pupil or (cx, cy, radius)
        Pupil in pixels (``cx`` column, ``cy`` row down).
    mask : array_like of bool, shape (H, W), optional
        True for samples not to use.
    sigma_waves : float or array_like, shape (H, W), optional
        Noise of each sample (waves, independent); default: the Zernike-fit residual.
    remove_defocus, zernike_terms, wavelength_nm, max_pv_waves, max_rms_waves
        As for :func:`analyze_wavefront`.

    Returns
    -------
    WavefrontResult
        As for :func:`analyze_wavefront` (no carrier, no visibility).

    Raises
    ------
    FringeError
        Not a 2-D map, bad pupil or options, too few valid samples.

    Examples
    --------
    >>> yy, xx = np.mgrid[:101, :101]
    >>> x, y = (xx - 50) / 50.0, (50 - yy) / 50.0
    >>> w = 0.1 * np.sqrt(3) * (2 * (x * x + y * y) - 1)
    >>> r = wavefront_metrics(w, pupil=(50, 50, 50))
    >>> round(r.zernike[3]["coefficient_waves"], 6)
    0.1
    """
    terms = _check_common(zernike_terms, wavelength_nm, None, max_pv_waves, max_rms_waves)
    wmap = np.asarray(wavefront, dtype=np.float64)
    if wmap.ndim != 2:
        raise FringeError(f"wavefront must be a 2-D map, got shape {wmap.shape}")
    p = _as_pupil(pupil, wmap.shape, "wavefront")
    assert p is not None
    h, w = wmap.shape
    rows = np.arange(h, dtype=np.float64)
    cols = np.arange(w, dtype=np.float64)
    valid = _disk(rows, cols, p) & np.isfinite(wmap) & _sel(mask, wmap.shape)
    sig = None
    if sigma_waves is not None:
        sig = np.broadcast_to(np.asarray(sigma_waves, dtype=np.float64), wmap.shape)
        if not np.all(np.isfinite(sig[valid])) or np.any(sig[valid] < 0):
            raise FringeError("sigma_waves must be finite and >= 0")
        sig = sig * 2.0 * np.pi
    pm = PhaseMap(phase=wmap * 0.0, valid=valid, rows=rows, cols=cols, sigma_phase=sig,
                  correlation=1.0, visibility=np.full(wmap.shape, np.nan), pupil=p,
                  method="wavefront map", info={"grid_step_px": [1.0, 1.0]})
    res = WavefrontResult(method="wavefront map")
    if not valid.any():
        raise FringeError("no valid wavefront samples inside the pupil")
    res = _finish(pm, res, unwrapped=np.where(valid, wmap, 0.0), terms=terms,
                  remove_defocus=remove_defocus, wavelength_nm=wavelength_nm,
                  wavelength_nm_err=0.0, max_pv_waves=max_pv_waves,
                  max_rms_waves=max_rms_waves)
    res.visibility_map = None
    for key in ("visibility_mean", "visibility_min", "visibility_max"):
        res.values.pop(key, None)
    if sig is None:
        res.values["noise_source"] = "Zernike fit residual"
    else:
        res.values["noise_source"] = "given"
    return res


# --------------------------------------------------------------------------------------------
# output files
# --------------------------------------------------------------------------------------------


def write_map(path: str | os.PathLike, array: np.ndarray, *,
              description: dict[str, Any] | None = None) -> None:
    """Write a 2-D map as a float32 TIFF, atomically (``path + ".part"``, then rename).

    Parameters
    ----------
    path : str or path-like
        Output file.
    array : array_like, shape (H, W)
        Map values (NaN where unknown).
    description : dict, optional
        Stored as JSON in the TIFF ImageDescription tag.

    Raises
    ------
    FringeError
        The file cannot be written (the message names it).
    """
    import tifffile

    name = os.fsdecode(path)
    arr = np.asarray(array, dtype=np.float32)
    if arr.ndim != 2:
        raise FringeError(f"{name}: a map must be 2-D, got shape {arr.shape}")
    desc = json.dumps(_clean_tree(description or {}), allow_nan=False)
    with atomic_output(name, "the map") as tmp:
        tifffile.imwrite(tmp, arr, description=desc, metadata=None)


def _clean_tree(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {str(k): _clean_tree(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean_tree(v) for v in obj]
    return _clean(obj)


def _indexed_path(path: str, index: int, total: int) -> str:
    if total <= 1:
        return path
    root, ext = os.path.splitext(path)
    return f"{root}_{index}{ext or '.tif'}"


# --------------------------------------------------------------------------------------------
# command line
# --------------------------------------------------------------------------------------------


def _terms_arg(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected an integer, got {text!r}") from None
    if not 3 <= v <= MAX_ZERNIKE_TERMS:
        raise argparse.ArgumentTypeError(
            f"must be between 3 and {MAX_ZERNIKE_TERMS}, got {v}")
    return v


def _positive_arg(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not math.isfinite(v) or v <= 0:
        raise argparse.ArgumentTypeError(f"must be a positive number, got {text!r}")
    return v


def _wavelength_arg(text: str) -> tuple[float, float]:
    from fringe.cli import _value_with_error

    v, e = _value_with_error(text)
    if not math.isfinite(v) or v <= 0 or not math.isfinite(e):
        raise argparse.ArgumentTypeError(f"wavelength must be a positive number, got {text!r}")
    return v, e


class _PupilAction(argparse.Action):
    def __call__(self, parser, namespace, values, option_string=None):  # noqa: D102
        cx, cy, r = values
        if not (math.isfinite(cx) and math.isfinite(cy) and math.isfinite(r)) or r <= 0:
            parser.error(f"argument {option_string}: radius must be positive and all values "
                         f"finite, got {cx:g} {cy:g} {r:g}")
        setattr(namespace, self.dest, (cx, cy, r))


def add_parser(subparsers: Any) -> None:
    """Register ``fringe wavefront`` on an argparse sub-parser collection.

    Parameters
    ----------
    subparsers : argparse._SubParsersAction
        The object returned by ``parser.add_subparsers(...)``.
    """
    from fringe.cli import _add_calibration, _add_input

    p = subparsers.add_parser(
        "wavefront",
        help="wavefront map, Zernike terms and PV/RMS from interferograms",
        description=(
            "Wavefront from a tilt-fringe interferogram (Fourier-transform method) or a "
            "phase-shifting stack (--steps): phase unwrapping, piston and tilt removal, "
            "Zernike fit (Noll 1976 ordering and normalisation), PV and RMS in waves with "
            "uncertainties, Strehl estimate and pass/fail checks. One record per image "
            "frame, or per stack with --steps. Exit status 1 when any input fails or "
            "misses a --max-* tolerance."
        ),
        epilog=(
            "Pupil coordinates: CX is a column and CY a row (down), as image viewers show "
            "them; Zernike terms use y up. Rules of thumb (lambda/4 PV, Marechal lambda/14 "
            "RMS, Strehl exp(-(2 pi rms)^2)) are reported as such, never as a specification."
        ),
    )
    p.add_argument("images", nargs="+", metavar="IMAGE",
                   help="interferograms, or with --steps phase-shifting stacks (a TIFF with "
                        "the frames, or single-frame files in step order)")
    p.add_argument("--format", choices=["text", "json"], default="text",
                   help="readable text or JSON Lines (one object per record)")
    p.add_argument("--out-map", metavar="FILE",
                   help="write the wavefront (waves, piston/tilt removed, NaN outside the "
                        "analysed pupil) as a float32 TIFF; with several records each gets "
                        "its own file, FILE with _0, _1, ... before the extension. The "
                        "Fourier-transform map is on the analysis grid (spacing in the TIFF "
                        "description)")
    p.add_argument("--out-visibility", metavar="FILE",
                   help="write the fringe visibility map as a float32 TIFF (same naming)")
    p.add_argument("--steps", choices=["4", "5", "carre"],
                   help="phase-shifting stack: 4 frames at 90 deg steps, Hariharan's 5 "
                        "frames at 90 deg steps, or Carre's 4 frames with an unknown equal "
                        "step")
    p.add_argument("--wavelength-nm", type=_wavelength_arg, metavar="F",
                   help="wavelength in nm (VALUE or VALUE+-ERR) for PV/RMS in nm")
    p.add_argument("--pupil", nargs=3, type=float, action=_PupilAction,
                   metavar=("CX", "CY", "R"),
                   help="pupil centre column, row and radius in pixels (default: found from "
                        "the intensity)")
    p.add_argument("--carrier", nargs=2, type=float, metavar=("FX", "FY"),
                   help="approximate carrier in cycles/px (FY up); fixes the sign of the "
                        "single-image phase")
    p.add_argument("--remove-defocus", action="store_true",
                   help="also remove defocus (Z4) before PV/RMS")
    p.add_argument("--zernike-terms", type=_terms_arg, default=15, metavar="N",
                   help="number of Noll terms to fit (default 15)")
    p.add_argument("--max-rms-waves", type=_positive_arg, metavar="F",
                   help="RMS tolerance in waves (pass/fail)")
    p.add_argument("--max-pv-waves", type=_positive_arg, metavar="F",
                   help="PV tolerance in waves (pass/fail)")
    _add_input(p)
    _add_calibration(p)


@dataclass
class _Job:
    files: list[str]
    frame: int | None  # frame index for single images; None for stacks


def _jobs(args: argparse.Namespace) -> tuple[list[_Job | str], bool]:
    """Records to produce, in order; strings are error messages for failed inputs."""
    from fringe import io

    jobs: list[_Job | str] = []
    failed = False
    need = _STEP_FRAMES.get(args.steps or "", 0)
    pending: list[str] = []
    for path in args.images:
        try:
            n = io.count_frames(path)
        except FringeError as exc:
            jobs.append(str(exc))
            failed = True
            continue
        if not need:
            jobs.extend(_Job([path], i) for i in range(n))
        elif n == 1:
            pending.append(path)
            if len(pending) == need:
                jobs.append(_Job(pending, None))
                pending = []
        elif n == need:
            jobs.append(_Job([path], None))
        else:
            jobs.append(f"{path}: holds {n} frames; --steps {args.steps} needs a stack of "
                        f"{need} frames (or {need} single-frame files in step order)")
            failed = True
    if pending:
        jobs.append(f"{pending[0]}: {len(pending)} single-frame file(s) left over; --steps "
                    f"{args.steps} needs {need} per stack")
        failed = True
    return jobs, failed


def _load(job: _Job, args: argparse.Namespace, cal: Any) -> tuple[np.ndarray, np.ndarray,
                                                                 list[str]]:
    from fringe import calibrate, io

    opts: dict[str, Any] = {"channel": args.channel, "srgb": args.srgb}
    if args.max_pixels:
        opts["max_pixels"] = int(args.max_pixels)
    frames = []
    if job.frame is not None:
        frames.append(io.read_frame(job.files[0], job.frame, **opts))
    elif len(job.files) == 1:
        frames.extend(io.iter_frames(job.files[0], **opts))
    else:
        frames.extend(io.read_frame(f, 0, **opts) for f in job.files)
    datas, masks, warns = [], [], []
    shape = frames[0].data.shape
    for fr in frames:
        if fr.data.shape != shape:
            raise FringeError(f"{fr.file}: frame shape {fr.data.shape} does not match shape "
                              f"{shape} of {frames[0].file}")
        c = calibrate.calibrate_frame(fr, cal, reject_cosmics=bool(args.reject_cosmics))
        datas.append(c.data)
        masks.append(c.mask)
        warns.extend(c.warnings)
        if fr.meta.get("srgb_decoded"):
            warns.append("8-bit sRGB input decoded to linear light; phone processing (tone "
                         "curves) distorts the fringe profile")
    mask = np.any(np.stack(masks), axis=0)
    data = datas[0] if job.frame is not None else np.stack(datas)
    return data, mask, warns


def _text_record(r: WavefrontResult) -> str:
    from fringe.report import format_value

    d = r.to_dict()
    label = f"{r.file} frame {r.frame}" if r.method == "fourier-transform" else r.file
    lines = [f"{label}: {r.status}"]
    if not r.ok:
        lines.append(f"  error: {r.error}")
        return "\n".join(lines) + "\n"
    lines.append(f"  method       {r.method}")
    if r.carrier:
        c = r.carrier
        lines.append(f"  carrier      period {c['period_px']:.3f} px, orientation "
                     f"{c['orientation_deg']:.2f} deg")
    if d.get("phase_step_deg") is not None:
        lines.append("  phase step   "
                     + format_value(d["phase_step_deg"], d.get("phase_step_deg_err"), "deg"))
    if r.pupil:
        pp = r.pupil
        lines.append(f"  pupil        centre ({pp['cx_px']:.1f}, {pp['cy_px']:.1f}) px, radius "
                     f"{pp['radius_px']:.1f} px ({pp['source']}); analysed to "
                     f"{pp['analysed_radius_px']:.1f} px")
    removed = ", ".join(_NAMES[j] for j in r.removed_terms)
    lines.append(f"  removed      {removed}")
    for key, lab in (("pv", "PV"), ("rms", "RMS")):
        text = format_value(d[f"{key}_waves"], d[f"{key}_waves_err"], "waves")
        if d.get(f"{key}_nm") is not None:
            text += f"  ({format_value(d[f'{key}_nm'], d[f'{key}_nm_err'], 'nm')})"
        lines.append(f"  {lab:<12} {text}")
    lines.append(f"  Strehl       {format_value(d['strehl_estimate'], d['strehl_estimate_err'])}"
                 "  (exp(-(2 pi rms)^2), rule of thumb)")
    lines.append(f"  Zernike      {ZERNIKE_ORDERING}, orthonormal over the unit disk, y up, "
                 "waves")
    for z in r.zernike:
        lines.append(f"    Z{z['j']:<3d} ({z['n']},{z['m']:+d}) {z['name']:<32} "
                     f"{format_value(z['coefficient_waves'], z['err'])}")
    for c in r.checks:
        verdict = "pass" if c["passed"] else "FAIL"
        lines.append(f"  check        {c['check']} [{c['kind']}]: {verdict}")
    for wmsg in r.warnings:
        lines.append(f"  warning: {wmsg}")
    return "\n".join(lines) + "\n"


def run(args: argparse.Namespace, out: Any, err: Any) -> int:
    """Run ``fringe wavefront`` for parsed arguments.

    Parameters
    ----------
    args : argparse.Namespace
        From the parser built by :func:`add_parser`.
    out, err : text streams
        Records go to `out`; one line per failed input (or missed tolerance) to `err`.

    Returns
    -------
    int
        0 when every record was produced and passed its tolerances, 1 otherwise.
    """
    from fringe import calibrate, cli

    failed = False
    try:
        expand = getattr(cli, "expand_paths", list)  # quoted patterns such as 'dark-*.tif'
        darks, flats = expand(args.dark), expand(args.flat)
        cal = None
        if darks or flats or args.gain_e_per_dn is not None:
            cal = calibrate.build_calibration(
                darks, flats, gain_e_per_dn=args.gain_e_per_dn,
                read_noise_dn=args.read_noise_dn, channel=args.channel)
    except FringeError as exc:
        err.write(f"fringe: {exc}\n")
        return 1
    jobs, failed = _jobs(args)
    total = len(jobs)
    lam, lam_err = args.wavelength_nm if args.wavelength_nm else (None, 0.0)
    for index, job in enumerate(jobs):
        if isinstance(job, str):
            err.write(f"fringe: {job}\n")
            name, _sep, problem = job.partition(": ")
            res = WavefrontResult(file=name, frame=0).fail(problem or job)
        else:
            label = job.files[0]
            res = WavefrontResult(file=label, frame=job.frame or 0)
            try:
                data, mask, warns = _load(job, args, cal)
                res = analyze_wavefront(
                    data, steps=args.steps, pupil=args.pupil, mask=mask,
                    carrier=args.carrier, wavelength_nm=lam, wavelength_nm_err=lam_err,
                    remove_defocus=args.remove_defocus, zernike_terms=args.zernike_terms,
                    max_pv_waves=args.max_pv_waves, max_rms_waves=args.max_rms_waves,
                    file=label, frame=job.frame or 0)
                for wmsg in warns:
                    res.warn(wmsg)
                if len(job.files) > 1:
                    res.values["stack_files"] = list(job.files)
                _write_outputs(res, args, index, total)
            except FringeError as exc:
                msg = str(exc).splitlines()[0]
                err.write(f"fringe: {msg}\n")
                res = res.fail(msg)
                failed = True
            except OSError as exc:
                msg = f"{getattr(exc, 'filename', None) or label}: {exc.strerror or exc}"
                err.write(f"fringe: {msg}\n")
                res = res.fail(msg)
                failed = True
            if res.ok and res.tolerance_pass is False:
                bad = [c["check"] for c in res.checks
                       if c["kind"] == "user tolerance" and not c["passed"]]
                err.write(f"fringe: {label}: fails tolerance: {'; '.join(bad)}\n")
                failed = True
        if args.format == "json":
            out.write(json.dumps(res.to_dict(), allow_nan=False) + "\n")
        else:
            out.write(_text_record(res))
        out.flush()
    return 1 if failed else 0


def _write_outputs(res: WavefrontResult, args: argparse.Namespace, index: int,
                   total: int) -> None:
    desc = {
        "fringe": "wavefront map",
        "unit": "waves",
        "file": res.file,
        "frame": res.frame,
        "method": res.method,
        "removed_terms": res.removed_terms,
        "pupil": res.pupil,
        "map_step_px": res.values.get("map_step_px"),
        "wavelength_nm": res.values.get("wavelength_nm"),
        "axes": "rows down, columns right, as the input image",
    }
    if args.out_map and res.wavefront_map is not None:
        path = _indexed_path(args.out_map, index, total)
        write_map(path, res.wavefront_map, description=desc)
        res.values["map_file"] = path
    if args.out_visibility and res.visibility_map is not None:
        path = _indexed_path(args.out_visibility, index, total)
        write_map(path, res.visibility_map, description=dict(desc, fringe="visibility map",
                                                             unit=""))
        res.values["visibility_file"] = path
