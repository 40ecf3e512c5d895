"""Fringe orientation and first estimates from the windowed 2-D spectrum.

Coordinates follow the project convention: x = column (right), y = row (down), pixel
centres at integers. An orientation ``t`` (degrees, counter-clockwise from +x as seen on
screen, folded into [0, 180)) is the direction of the fringe normal; the unit normal in
(x, row) coordinates is ``n = (cos t, -sin t)``.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["SpectralPeak", "spectral_peak", "normal_vector", "local_fringe_map"]

_LN2 = float(np.log(2.0))


def normal_vector(orientation_deg: float) -> tuple[float, float]:
    """Unit fringe normal ``(n_x, n_row)`` for an orientation in degrees.

    Examples
    --------
    >>> normal_vector(90.0)  # fringes varying up the screen: the normal points to row -1
    (6.123233995736766e-17, -1.0)
    """
    t = np.deg2rad(orientation_deg)
    return float(np.cos(t)), float(-np.sin(t))


@dataclass
class SpectralPeak:
    """First estimate of a fringe pattern from its 2-D spectrum.

    Attributes
    ----------
    f_x, f_row : float
        Spatial frequency of the fringes along x (columns) and rows, cycles/px, with the
        sign chosen so that the orientation lies in [0, 180).
    period_px, orientation_deg : float
        The same as period and normal direction.
    snr : float
        Spectral signal-to-noise ratio: sqrt(peak power / mean noise power on the ring of
        the same radius). Pure noise gives values near sqrt(ln M) for M searched bins
        (about 3.5 for a 256 x 256 image).
    second : dict or None
        The strongest peak not explained by the first pattern or its harmonics
        (``period_px``, ``orientation_deg``, ``relative_amplitude``, ``snr``).
    """

    f_x: float
    f_row: float
    period_px: float
    orientation_deg: float
    snr: float
    second: dict | None = None
    warnings: list[str] = field(default_factory=list)


def _prepare(image: np.ndarray, mask: np.ndarray | None) -> np.ndarray:
    img = np.asarray(image, dtype=np.float64)
    if mask is not None and mask.any():
        valid = ~mask
        level = float(img[valid].mean()) if valid.any() else 0.0
        img = np.where(mask, level, img)
    else:
        level = float(img.mean())
    return img - level


def block_mean(image: np.ndarray, factor: int) -> np.ndarray:
    """Mean over non-overlapping ``factor`` x ``factor`` blocks (edges trimmed)."""
    f = int(factor)
    if f <= 1:
        return np.asarray(image, dtype=np.float64)
    h, w = np.shape(image)
    hh, ww = (h // f) * f, (w // f) * f
    a = np.asarray(image, dtype=np.float64)[:hh, :ww]
    try:
        import cv2

        # area interpolation on an exact multiple of the block is the block mean
        return cv2.resize(np.ascontiguousarray(a), (ww // f, hh // f),
                          interpolation=cv2.INTER_AREA)
    except (ImportError, AttributeError):  # pragma: no cover - OpenCV is a dependency
        return a.reshape(hh // f, f, ww // f, f).mean(axis=(1, 3))


def spectral_peak(
    image: np.ndarray,
    mask: np.ndarray | None = None,
    *,
    min_period: float = 2.0,
    max_period: float | None = None,
) -> SpectralPeak:
    """Locate the dominant fringe frequency in the Hann-windowed 2-D power spectrum.

    Parameters
    ----------
    image : (H, W) ndarray
        Calibrated image.
    mask : (H, W) bool ndarray, optional
        True where pixels are unusable; they are replaced by the mean level.
    min_period, max_period : float
        Search range of periods in pixels. The default upper limit is a third of the
        shorter side, so that at least three fringes fit.

    Returns
    -------
    SpectralPeak

    Notes
    -----
    The image, mean removed, is multiplied by a separable Hann window and transformed
    with a real FFT (zero-padded twofold for images up to 256 x 256 pixels). The peak is
    refined to sub-bin precision by a parabola through the logarithm of the power in
    each axis, which is exact for a Gaussian-shaped main lobe and a close approximation
    for the Hann lobe.

    References
    ----------
    .. [1] F. J. Harris, "On the use of windows for harmonic analysis with the discrete
       Fourier transform", Proc. IEEE 66(1), 51-83 (1978). doi:10.1109/PROC.1978.10837
    .. [2] M. Takeda, H. Ina and S. Kobayashi, "Fourier-transform method of fringe-pattern
       analysis for computer-based topography and interferometry", J. Opt. Soc. Am. 72,
       156-160 (1982). doi:10.1364/JOSA.72.000156
    """
    full_h, full_w = np.shape(image)
    if max_period is None:
        max_period = min(full_h, full_w) / 3.0
    best = _spectral_peak_large(image, mask, min_period, max_period)
    # A pattern filling only part of the frame (a laser spot on a wall) spreads its peak
    # over many bins of the whole-frame spectrum; tiles see it concentrated.
    if best.snr < 20.0 and min(full_h, full_w) >= 192:
        tiled = _spectral_peak_tiles(image, mask, min_period, max_period)
        if tiled is not None and tiled.snr > best.snr:
            best = tiled
    return best


def _spectral_peak_tiles(image, mask, min_period, max_period) -> SpectralPeak | None:
    """Strongest spectral peak over overlapping tiles of the (central) frame."""
    h, w = np.shape(image)
    size = int(min(256, min(h, w) // 2))
    r0, c0 = max(0, (h - 1024) // 2), max(0, (w - 1024) // 2)
    r1, c1 = min(h, r0 + 1024), min(w, c0 + 1024)
    step = size // 2
    best = None
    tile_max = min(max_period, size / 3.0)
    if tile_max <= min_period:
        return None
    for r in range(r0, max(r0 + 1, r1 - size + 1), step):
        for c in range(c0, max(c0 + 1, c1 - size + 1), step):
            sub = np.asarray(image)[r:r + size, c:c + size]
            sub_mask = None if mask is None else mask[r:r + size, c:c + size]
            if sub_mask is not None and sub_mask.mean() > 0.5:
                continue
            try:
                pk = _spectral_peak_core(sub, sub_mask, min_period, tile_max)
            except ValueError:
                continue
            if np.isfinite(pk.snr) and (best is None or pk.snr > best.snr):
                best = pk
    if best is not None:
        best.second = None  # a tile cannot judge crossings over the whole frame
    return best


def _spectral_peak_large(image, mask, min_period, max_period) -> SpectralPeak:
    full_h, full_w = np.shape(image)
    crop = 1024
    if max(full_h, full_w) <= crop:
        return _spectral_peak_core(image, mask, min_period, max_period)
    # Large frames: the central crop gives the first estimate for short periods (the fit
    # that follows uses every pixel); a block-averaged copy of the whole frame covers
    # periods too long for the crop.
    r0, c0 = max(0, (full_h - crop) // 2), max(0, (full_w - crop) // 2)
    sub = np.asarray(image)[r0:r0 + crop, c0:c0 + crop]
    sub_mask = None if mask is None else mask[r0:r0 + crop, c0:c0 + crop]
    crop_max = min(sub.shape) / 3.0
    best = _spectral_peak_core(sub, sub_mask, min_period, min(max_period, crop_max))
    # The whole frame, block-averaged, only when the crop's answer is weak or near its
    # longest period (a strong short-period pattern cannot hide a stronger long one).
    if max_period > crop_max and (best.snr < 20.0 or best.period_px > 0.5 * crop_max):
        factor = int(np.ceil(max(full_h, full_w) / crop))
        prepared = _prepare(image, mask) if mask is not None and mask.any() else image
        binned = block_mean(prepared, factor)
        lo = max(min_period, 0.8 * crop_max) / factor
        pk = _spectral_peak_core(binned, None, max(lo, 2.0), max_period / factor)
        if pk.snr > best.snr:
            second = None
            if pk.second is not None:
                second = dict(pk.second, period_px=pk.second["period_px"] * factor)
            best = SpectralPeak(f_x=pk.f_x / factor, f_row=pk.f_row / factor,
                                period_px=pk.period_px * factor,
                                orientation_deg=pk.orientation_deg, snr=pk.snr,
                                second=second)
    return best


def _spectral_peak_core(image, mask, min_period, max_period) -> SpectralPeak:
    from scipy import fft as sfft

    img = _prepare(image, mask)
    h, w = img.shape
    wy = np.hanning(h + 2)[1:-1]
    wx = np.hanning(w + 2)[1:-1]
    windowed = img * wy[:, None] * wx[None, :]
    pad = 2 if h * w <= 65_536 else 1
    ny, nx = sfft.next_fast_len(pad * h), sfft.next_fast_len(pad * w, real=True)
    dtype = np.float32 if h * w > 262_144 else np.float64
    spec = sfft.rfft2(windowed.astype(dtype, copy=False), s=(ny, nx), workers=-1)
    power = spec.real.astype(np.float64) ** 2 + spec.imag.astype(np.float64) ** 2
    del spec
    fr = sfft.fftfreq(ny)[:, None]
    fc = sfft.rfftfreq(nx)[None, :]
    radius = np.hypot(fr, fc)
    f_lo = 1.0 / max_period
    f_hi = 1.0 / min_period
    allowed = (radius >= f_lo) & (radius <= f_hi)
    # Half-plane uniqueness: column 0 holds both signs of rows; keep f_row <= 0 there.
    allowed &= ~((fc == 0) & (fr > 0))
    if not allowed.any():
        raise ValueError("no spatial frequencies in the search range")
    searched = np.where(allowed, power, -1.0)
    k = int(np.argmax(searched))
    iy, ix = np.unravel_index(k, power.shape)
    peak_power = float(power[iy, ix])

    # Sub-bin refinement in each axis (log-parabola).
    def _refine(p_m: float, p_0: float, p_p: float) -> float:
        if p_m <= 0 or p_0 <= 0 or p_p <= 0:
            return 0.0
        a, b, c = np.log(p_m), np.log(p_0), np.log(p_p)
        den = a - 2 * b + c
        if den >= 0:
            return 0.0
        return float(np.clip(0.5 * (a - c) / den, -0.5, 0.5))

    dy = _refine(power[(iy - 1) % ny, ix], power[iy, ix], power[(iy + 1) % ny, ix])
    if 0 < ix < power.shape[1] - 1:
        dx = _refine(power[iy, ix - 1], power[iy, ix], power[iy, ix + 1])
    elif ix == 0:
        # Column 0 is mirrored: power[-row, 1] equals the value at column -1.
        dx = _refine(power[(-iy) % ny, 1], power[iy, 0], power[iy, 1])
    else:
        dx = 0.0
    f_row = float(fr[iy, 0]) + dy / ny
    f_x = float(fc[0, ix]) + dx / nx
    # The fringe normal n = (cos t, -sin t) has frequency vector (f_x, f_row) = n / P.
    t = np.rad2deg(np.arctan2(-f_row, f_x))
    if t < 0:
        t += 180.0
        f_x, f_row = -f_x, -f_row
    if t >= 180.0:
        t -= 180.0
        f_x, f_row = -f_x, -f_row
    fmag = float(np.hypot(f_x, f_row))

    # Noise level: median power on the ring of the same radius, away from the peak.
    bin_r = 1.0 / min(ny, nx)
    guard = max(4.0 * pad, 0.15 * fmag / bin_r)
    dist_peak = np.hypot((fr - fr[iy, 0]) * ny, (fc - fc[0, ix]) * nx)
    dist_mirror = np.hypot((fr + fr[iy, 0]) * ny, (fc + fc[0, ix]) * nx)
    ring = (np.abs(radius - radius[iy, ix]) <= 3 * bin_r * pad) & (dist_peak > guard)
    ring &= dist_mirror > guard
    ring &= radius >= f_lo
    if ring.sum() < 16:
        ring = allowed & (dist_peak > guard) & (dist_mirror > guard)
    noise = float(np.median(power[ring])) / _LN2 if ring.any() else 0.0
    if noise <= 0:
        snr = float("inf") if peak_power > 0 else 0.0
    else:
        snr = float(np.sqrt(peak_power / noise))

    # A second pattern: strongest peak away from the first and its harmonics.
    second = None
    if np.isfinite(snr) and noise > 0:
        excl = (dist_peak > guard) & (dist_mirror > guard)
        for m in (2, 3):
            hy, hx = fr[iy, 0] * m, fc[0, ix] * m
            excl &= np.hypot((fr - hy) * ny, (fc - hx) * nx) > guard
            excl &= np.hypot((fr + hy) * ny, (fc + hx) * nx) > guard
        excl &= allowed & (radius >= max(f_lo, 1.5 * 2.0 / min(h, w)))
        if excl.any():
            p2 = np.where(excl, power, -1.0)
            k2 = int(np.argmax(p2))
            jy, jx = np.unravel_index(k2, power.shape)
            snr2 = float(np.sqrt(power[jy, jx] / noise))
            rel = float(np.sqrt(power[jy, jx] / peak_power))
            f2r, f2x = float(fr[jy, 0]), float(fc[0, jx])
            t2 = float(np.rad2deg(np.arctan2(-f2r, f2x))) % 180.0
            second = {
                "period_px": float(1.0 / np.hypot(f2r, f2x)),
                "orientation_deg": t2,
                "relative_amplitude": rel,
                "snr": snr2,
            }
    return SpectralPeak(
        f_x=f_x,
        f_row=f_row,
        period_px=1.0 / fmag,
        orientation_deg=float(t),
        snr=snr,
        second=second,
    )


def local_fringe_map(
    image: np.ndarray,
    mask: np.ndarray | None,
    *,
    period_px: float,
    orientation_deg: float,
    block: int | None = None,
) -> dict:
    """Complex demodulation of the fringes on blocks, for curvature and crossing checks.

    The image is multiplied by ``exp(-2 pi i n.r / P)`` and averaged over square blocks
    about one to two periods wide (a low-pass filter), giving the local complex fringe
    amplitude ``z``. Its phase gradient is the local deviation of the fringe frequency
    vector from the nominal one.

    Returns
    -------
    dict
        ``orientation_spread_deg`` and ``period_spread``: half the 5-95 % range of the local
        orientation (degrees) and relative period over blocks holding a clear signal, and
        ``n_blocks`` used.

    References
    ----------
    .. [1] M. Takeda, H. Ina and S. Kobayashi, J. Opt. Soc. Am. 72, 156-160 (1982).
       doi:10.1364/JOSA.72.000156
    """
    img = _prepare(image, mask)
    h, w = img.shape
    if block is None:
        block = int(np.clip(round(1.5 * period_px), 4, max(4, min(h, w) // 6)))
    nby, nbx = h // block, w // block
    out = {"orientation_spread_deg": 0.0, "period_spread": 0.0, "n_blocks": 0}
    if nby < 3 or nbx < 3:
        return out
    nx_, nr_ = normal_vector(orientation_deg)
    rows = np.arange(nby * block, dtype=np.float64)
    cols = np.arange(nbx * block, dtype=np.float64)
    ph_r = np.exp(-2j * np.pi * nr_ * rows / period_px)
    ph_c = np.exp(-2j * np.pi * nx_ * cols / period_px)
    sub = img[: nby * block, : nbx * block]
    z = (sub * ph_r[:, None]) * ph_c[None, :]
    z = z.reshape(nby, block, nbx, block).mean(axis=(1, 3))
    mag = np.abs(z)
    # Phase differences between neighbouring blocks give the local frequency offset.
    gx = np.angle(z[:, 1:] * np.conj(z[:, :-1]))[:-1, :] / (2 * np.pi * block)
    gr = np.angle(z[1:, :] * np.conj(z[:-1, :]))[:, :-1] / (2 * np.pi * block)
    strength = np.minimum.reduce([mag[:-1, :-1], mag[:-1, 1:], mag[1:, :-1]])
    # Blocks with a clear fringe signal only (outside an envelope the phase is noise).
    good = strength > 0.3 * np.max(mag) + 1e-300
    if good.sum() < 4:
        return out
    fx = nx_ / period_px + gx[good]
    fr = nr_ / period_px + gr[good]
    t_loc = np.rad2deg(np.arctan2(-fr, fx))
    t_loc = (t_loc - orientation_deg + 90.0) % 180.0 - 90.0
    p_loc = 1.0 / np.maximum(np.hypot(fx, fr), 1e-12)
    q = np.percentile
    out["orientation_spread_deg"] = float((q(t_loc, 95) - q(t_loc, 5)) / 2)
    out["period_spread"] = float((q(p_loc, 95) - q(p_loc, 5)) / 2 / period_px)
    out["n_blocks"] = int(good.sum())
    return out
