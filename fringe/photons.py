"""Photon-counting captures: event detection, count images and Poisson-likelihood fringe fits.

At the lowest light levels a fringe pattern is built one detected photon at a time. This
module turns a stack of low-light frames into a list of photon events (one per local
maximum of each cluster of bright pixels, cosmic-ray tracks rejected), accumulates them
into a count image, bins the counts
across the fringes and fits period, phase and visibility by maximum Poisson likelihood with
uncertainties from the Fisher information. The significance of the fringe modulation comes
from the likelihood ratio against a pattern without fringes, and the build-up of the pattern
(visibility and significance against the number of accumulated photons) shows how the
measurement converges.

Conventions are those of the measurement core: x = column (right), y = row (down), pixel
centres at integers, the reference point ``c`` the centre of the analysed region, the fringe
normal ``n = (cos t, -sin t)`` for an orientation ``t`` counter-clockwise from +x in
[0, 180), and the pattern ``I = B + A cos(2 pi n.(r - c)/P + phi)``.

The expected counts of a bin j holding ``m_j`` pixels, exposed for ``N`` frames, are

    lambda_j = E_j (b + s (1 + V g_j cos(2 pi u_j / P + phi))),    E_j = m_j N,

with ``b`` the background rate and ``s`` the mean signal rate (events per pixel per
frame), ``u_j`` the mean coordinate across the fringes of the bin's pixels and
``g_j = exp(-omega^2 var(u)_j / 2)`` the (second-order exact) loss of modulation from
averaging over the bin. A counts-versus-position table from a scanning single-pixel
detector uses the same model with ``E_j`` the exposure of each position (seconds, or 1).
"""

from __future__ import annotations

import csv
import math
import os
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from fringe._util import FringeError, LazyModule, fold_angle_deg, wrap_phase
from fringe.orient import spectral_peak
from fringe.profile import project
from fringe.result import FringeResult

# scipy is imported on first use, so that `fringe --help` and batch start quickly
ndimage = LazyModule("scipy.ndimage")
optimize = LazyModule("scipy.optimize")
stats = LazyModule("scipy.stats")

__all__ = [
    "PARAMETERS",
    "DarkReference",
    "EventList",
    "PoissonFit",
    "estimate_read_noise",
    "dark_reference",
    "detect_frame",
    "detect_stack",
    "reject_tracks",
    "poisson_fisher",
    "poisson_crlb",
    "fit_poisson_profile",
    "lr_significance",
    "search_curvatures_1d",
    "search_curvatures_2d",
    "photons_needed",
    "photons_needed_ideal",
    "analyze_events",
    "analyze_photons",
    "read_counts_table",
    "analyze_counts_table",
    "add_parser",
    "run",
]

#: Names of the model parameters, in the order used by `poisson_fisher` and `PoissonFit`.
PARAMETERS: tuple[str, ...] = ("background", "signal", "visibility", "phase", "omega", "kappa")

_MAD = 1.4826
_REJECT_LARGE = 1
_REJECT_BRIGHT = 2


# --------------------------------------------------------------------------------------------
# noise and offset
# --------------------------------------------------------------------------------------------


def _clipped_stats(values: np.ndarray, *, iterations: int = 8, min_clip: float = 0.0
                   ) -> tuple[float, float]:
    """Mean and standard deviation of the core of a sample, clipped at +-3 sigma.

    ``min_clip`` is the smallest clipping half-width: 1.5 DN for integer data keeps the
    neighbouring code values when the noise is below one DN.
    """
    v = np.asarray(values, dtype=np.float64).ravel()
    if v.size > 1_000_000:
        v = v[:: int(math.ceil(v.size / 1_000_000))]
    v = v[np.isfinite(v)]
    if v.size == 0:
        return 0.0, 0.0
    m = float(np.median(v))
    s = _MAD * float(np.median(np.abs(v - m)))
    if s == 0.0:
        near = v[np.abs(v - m) <= max(1.0, min_clip)]
        s = float(np.std(near)) if near.size else 0.0
    for _ in range(iterations):
        if s <= 0:
            break
        clip = max(3.0 * s, min_clip)
        sel = v[np.abs(v - m) < clip]
        if sel.size < 2:
            break
        k = clip / s
        # s.d. of a unit normal truncated to +-k
        trunc = math.sqrt(max(1.0 - 2.0 * k * math.exp(-0.5 * k * k) / math.sqrt(2 * math.pi)
                              / math.erf(k / math.sqrt(2.0)), 1e-6))
        m_new, s_new = float(sel.mean()), float(sel.std()) / trunc
        done = abs(m_new - m) < 1e-4 * s and abs(s_new - s) < 1e-4 * s
        m, s = m_new, s_new
        if done:
            break
    return m, s


def _is_integral(values: np.ndarray) -> bool:
    v = np.asarray(values).ravel()[:4096]
    return bool(v.size) and bool(np.all(np.equal(np.mod(v, 1.0), 0.0)))


def _noise_floor(values: np.ndarray) -> float:
    """Smallest usable noise scale: the 1-DN rounding noise for integer-valued data."""
    v = np.asarray(values).ravel()[:4096]
    if v.size and np.all(np.equal(np.mod(v, 1.0), 0.0)):
        return 1.0 / math.sqrt(12.0)
    return 1e-9 * max(1.0, float(np.max(np.abs(v))) if v.size else 1.0)


def estimate_read_noise(
    frames: np.ndarray, *, bias: np.ndarray | float | None = None
) -> tuple[float, float]:
    """Offset and read noise (DN) of low-light frames, robust against photon events.

    Parameters
    ----------
    frames : (H, W) or (N, H, W) ndarray
        Raw frames (DN). Not modified.
    bias : (H, W) ndarray or float, optional
        Per-pixel bias subtracted first (e.g. a master dark).

    Returns
    -------
    offset_dn, read_noise_dn : float
        Mean level and standard deviation of the noise core.

    Notes
    -----
    Photon events and cosmic rays are sparse positive outliers. The core of the
    distribution is found by iterative clipping at +-3 sigma, starting from the median and
    1.4826 times the median absolute deviation; the clipped standard deviation is divided by
    0.98658, the standard deviation of a unit normal truncated at +-3 (for integer data the
    clipping half-width is at least 1.5 DN, with the matching factor). Unlike the MAD
    alone, this stays accurate for integer data whose noise spans only a few DN.

    References
    ----------
    .. [1] P. J. Huber and E. M. Ronchetti, Robust Statistics, 2nd ed., Wiley (2009),
       sec. 5.1 (median absolute deviation).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> f = np.rint(rng.normal(100.0, 2.0, (128, 128)))
    >>> off, rn = estimate_read_noise(f)
    >>> round(off), round(rn, 1)
    (100, 2.0)
    """
    arr = np.asarray(frames, dtype=np.float64)
    if arr.ndim not in (2, 3):
        raise FringeError(f"expected a frame or a stack of frames, got shape {arr.shape}")
    if bias is not None:
        arr = arr - np.asarray(bias, dtype=np.float64)
    integral = _is_integral(frames)
    flat = arr.ravel()
    if flat.size > 400_000:
        flat = flat[:: int(math.ceil(flat.size / 400_000))]
    m, s = _clipped_stats(flat, min_clip=1.5 if integral else 0.0)
    return m, max(s, _noise_floor(np.asarray(frames)))


# --------------------------------------------------------------------------------------------
# event lists
# --------------------------------------------------------------------------------------------


@dataclass
class EventList:
    """Candidate events found in a stack of frames, with the photon events among them.

    Attributes
    ----------
    x, y : (M,) float ndarray
        Charge-weighted centroid of each event, column and row (px, full frame).
    frame : (M,) int ndarray
        Frame index of each event (0-based, in reading order).
    charge : (M,) float ndarray
        Signal of each event above the offset (DN), summed near its centroid.
    area : (M,) int ndarray
        Number of pixels of the cluster holding the event.
    cluster_charge : (M,) float ndarray
        Signal summed over the cluster holding the event (DN).
    accepted : (M,) bool ndarray
        True for photon events; False for events of rejected clusters (cosmic rays).
    reason : (M,) int ndarray
        0 accepted, 1 too large, 2 too bright (both: 3).
    shape : (int, int)
        Frame shape (H, W).
    n_frames : int
        Number of frames searched.
    read_noise_dn, noise_dn : float
        Read noise and the per-pixel noise of the bias-subtracted frames (DN).
    threshold : float
        Detection threshold in units of the noise of the detection image.
    box : int
        Side of the square summing window of the detection image (px).
    limits : dict
        ``max_area`` (px) and ``max_charge`` (DN) used for the rejection.
    saturated_fraction : float
        Fraction of saturated pixels over all frames.
    """

    x: np.ndarray
    y: np.ndarray
    frame: np.ndarray
    charge: np.ndarray
    area: np.ndarray
    cluster_charge: np.ndarray
    accepted: np.ndarray
    reason: np.ndarray
    shape: tuple[int, int]
    n_frames: int
    read_noise_dn: float
    noise_dn: float
    threshold: float
    box: int
    limits: dict = field(default_factory=dict)
    saturated_fraction: float = 0.0

    @property
    def n_events(self) -> int:
        """Number of accepted photon events."""
        return int(np.count_nonzero(self.accepted))

    @property
    def n_rejected(self) -> int:
        """Number of rejected events (local maxima of rejected clusters)."""
        return int(self.accepted.size - np.count_nonzero(self.accepted))

    def count_image(self, *, frames: int | None = None) -> np.ndarray:
        """Accepted events accumulated at their centroid pixel.

        Parameters
        ----------
        frames : int, optional
            Use only the first ``frames`` frames (all by default).

        Returns
        -------
        (H, W) int64 ndarray
            Number of events per pixel.
        """
        h, w = self.shape
        sel = self.accepted
        if frames is not None:
            sel = sel & (self.frame < int(frames))
        ix = np.clip(np.rint(self.x[sel]).astype(np.int64), 0, w - 1)
        iy = np.clip(np.rint(self.y[sel]).astype(np.int64), 0, h - 1)
        return np.bincount(iy * w + ix, minlength=h * w).reshape(h, w).astype(np.int64)


def _empty_clusters() -> dict[str, np.ndarray]:
    return {"x": np.zeros(0), "y": np.zeros(0), "charge": np.zeros(0),
            "area": np.zeros(0, dtype=np.int64), "cluster_charge": np.zeros(0)}


def _label8(mask: np.ndarray) -> tuple[np.ndarray, int]:
    """8-connected components of a boolean frame (labels 1..n, 0 outside).

    OpenCV's scan-based labelling is several times faster than scipy.ndimage.label on
    sparse frames; scipy is the fallback. Only the partition into components matters
    here, not the numbering.
    """
    try:
        import cv2

        n, labels = cv2.connectedComponents(np.ascontiguousarray(mask, dtype=np.uint8),
                                            connectivity=8, ltype=cv2.CV_32S)
        return labels, int(n) - 1
    except (ImportError, AttributeError):  # pragma: no cover - OpenCV is a dependency
        labels, n = ndimage.label(mask, structure=_EIGHT)
        return labels, int(n)


def _box_sum(d: np.ndarray, box: int) -> np.ndarray:
    """Sum over a box x box window (zero outside the frame), by shifted additions."""
    if box == 1:
        return d.copy()
    try:
        import cv2

        return cv2.boxFilter(np.ascontiguousarray(d, dtype=np.float32), cv2.CV_32F, (box, box),
                             normalize=False, borderType=cv2.BORDER_CONSTANT)
    except (ImportError, AttributeError):  # pragma: no cover - OpenCV is a dependency
        pass
    r = box // 2
    t = d.copy()
    for k in range(1, r + 1):
        t[k:] += d[:-k]
        t[:-k] += d[k:]
    s = t.copy()
    for k in range(1, r + 1):
        s[:, k:] += t[:, :-k]
        s[:, :-k] += t[:, k:]
    return s


_EIGHT = np.ones((3, 3), dtype=bool)
_PEAK_RADIUS = 2
_WR, _WC = (a.ravel() for a in np.mgrid[-_PEAK_RADIUS:_PEAK_RADIUS + 1,
                                          -_PEAK_RADIUS:_PEAK_RADIUS + 1])
_NOT_CENTRE = (_WR != 0) | (_WC != 0)
_DR, _DC = _WR[_NOT_CENTRE], _WC[_NOT_CENTRE]
_BEFORE = (_DR < 0) | ((_DR == 0) & (_DC < 0))
_WRF, _WCF = _WR.astype(np.float64), _WC.astype(np.float64)


def detect_frame(
    frame: np.ndarray,
    *,
    noise_dn: float,
    bias: np.ndarray | float = 0.0,
    threshold: float = 5.0,
    box: int = 3,
    offset: str | float = "frame",
) -> dict[str, np.ndarray]:
    """Find the photon events of one low-light frame.

    Parameters
    ----------
    frame : (H, W) ndarray
        Raw frame (DN). Not modified.
    noise_dn : float
        Per-pixel noise of the bias-subtracted frame (DN), e.g. from
        `estimate_read_noise` or a `DarkReference`.
    bias : (H, W) ndarray or float
        Bias (master dark) subtracted first.
    threshold : float
        Detection threshold in units of the noise of the detection image (see Notes).
    box : int
        Odd side of the summing window of the detection image; 1 thresholds single pixels.
    offset : "frame" or float
        "frame" removes a residual per-frame black level (clipped mean of a sample of
        pixels); a number is subtracted as given.

    Returns
    -------
    dict
        One entry per event: ``x``, ``y`` (centroid, px), ``charge`` (DN above the offset
        in the 5 x 5 window around the event's peak, within its cluster), and the
        ``area`` (px) and ``cluster_charge`` (DN) of the connected cluster holding it.

    Notes
    -----
    The detection image is the box x box sum of the bias-subtracted frame; for white read
    noise of s.d. sigma its noise is ``box * sigma``, and pixels where it exceeds
    ``threshold * box * sigma`` are marked. Summing collects the charge of an event
    spread over a few pixels by the spot, so that faint events are found. Marked pixels
    form 8-connected clusters (`scipy.ndimage.label`). Each local maximum of the
    detection image over its 5 x 5 neighbourhood inside a cluster is one event, so a
    photon spread over several pixels counts once while two photons at least 3 px
    apart count twice (closer ones merge: coincidence loss). The event lies at the
    centroid of the positive bias-subtracted values of its cluster within 5 x 5 pixels of
    the maximum. Clusters, not events, carry the size and charge used to reject cosmic
    rays (`reject_tracks`).

    References
    ----------
    .. [1] A. G. Basden, C. A. Haniff and C. D. Mackay, "Photon counting strategies with
       low-light-level CCDs", Mon. Not. R. Astron. Soc. 345, 985-991 (2003).
    .. [2] A. Rosenfeld and J. L. Pfaltz, "Sequential operations in digital picture
       processing", J. ACM 13(4), 471-494 (1966) (connected-component labelling).

    Examples
    --------
    >>> f = np.full((16, 16), 100.0)
    >>> f[7:10, 4:7] += [[10, 20, 10], [20, 60, 20], [10, 20, 10]]
    >>> ev = detect_frame(f, noise_dn=1.0, offset=100.0)
    >>> ev["x"].round(3).tolist(), ev["y"].round(3).tolist(), ev["charge"].tolist()
    ([5.0], [8.0], [180.0])
    """
    if box < 1 or box % 2 == 0:
        raise FringeError(f"detection box must be an odd number of pixels >= 1, got {box}")
    d = np.subtract(frame, np.asarray(bias, dtype=np.float32), dtype=np.float32)
    if d.ndim != 2:
        raise FringeError(f"expected a 2-D frame, got shape {d.shape}")
    if offset == "frame":
        # Offset of this frame: median of a 2048-pixel sample, then one 3-sigma clipped
        # mean (standard error about 0.03 of the noise: ample for a 5-sigma threshold).
        sample = d.ravel()
        if sample.size > 2048:
            sample = sample[:: sample.size // 2048]
        m = float(np.median(sample))
        sel = sample[np.abs(sample - m) < 3.0 * noise_dn]
        if sel.size >= 16:
            m = float(sel.mean(dtype=np.float64))
        d -= np.float32(m)
    else:
        d -= np.float32(offset)
    s = _box_sum(d, box)
    mask = s > threshold * box * max(noise_dn, 1e-300)
    idx = np.flatnonzero(mask)
    if idx.size == 0:
        return _empty_clusters()
    h, w = d.shape
    labels, n = _label8(mask)
    lflat = labels.ravel()
    lab = lflat[idx] - 1
    dflat = d.ravel()
    area = np.bincount(lab, minlength=n)
    cl_charge = np.bincount(lab, weights=dflat[idx].astype(np.float64), minlength=n)
    # Local maxima of the detection image (ties go to the first pixel in raster order).
    rows, cols = np.divmod(idx, w)
    rr = rows[:, None] + _DR[None, :]
    cc = cols[:, None] + _DC[None, :]
    ok = (rr >= 0) & (rr < h) & (cc >= 0) & (cc < w)
    sflat = s.ravel()
    other = np.where(ok, sflat[np.where(ok, rr * w + cc, 0)], -np.inf)
    centre = sflat[idx][:, None]
    peak = np.all(np.where(_BEFORE[None, :], centre > other, centre >= other), axis=1)
    seeds = np.flatnonzero(peak)
    if seeds.size == 0:
        return _empty_clusters()
    # Centroid of the cluster's positive values within the window around each maximum.
    sr, sc = rows[seeds], cols[seeds]
    own = lab[seeds]
    rr = sr[:, None] + _WR[None, :]
    cc = sc[:, None] + _WC[None, :]
    ok = (rr >= 0) & (rr < h) & (cc >= 0) & (cc < w)
    j = np.where(ok, rr * w + cc, 0)
    ok &= lflat[j] == (own + 1)[:, None]
    v = np.where(ok, dflat[j], 0.0).astype(np.float64)
    wv = np.maximum(v, 0.0)
    sq = v.sum(axis=1)
    sw = wv.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        ox = np.where(sw > 0, np.einsum("ij,j->i", wv, _WCF) / sw, 0.0)
        oy = np.where(sw > 0, np.einsum("ij,j->i", wv, _WRF) / sw, 0.0)
    return {"x": sc + ox, "y": sr + oy, "charge": sq,
            "area": area[own].astype(np.int64), "cluster_charge": cl_charge[own]}


def reject_tracks(
    events: EventList, *, max_area: float | None = None, max_charge: float | None = None
) -> EventList:
    """Reject the events of clusters too large or too bright for photons (cosmic rays).

    Parameters
    ----------
    events : EventList
        Candidate events; not modified.
    max_area : float, optional
        Largest accepted cluster (px). Default ``max(6 box^2, 8 median area)``.
    max_charge : float, optional
        Largest accepted cluster charge (DN). Default 15 times the median cluster charge
        of the events.

    Returns
    -------
    EventList
        A copy with ``accepted``, ``reason`` and ``limits`` set.

    Notes
    -----
    A cosmic ray leaves a straight track of hundreds to thousands of DN per pixel over many
    pixels; a photon event leaves the charge of one photo-electron multiplied by the gain,
    spread over the spot. With high-gain electron multiplication the charge of one event is
    nearly exponentially distributed [1]_, so the default charge limit (15 times the median)
    loses a fraction exp(-15 ln 2) = 3e-5 of genuine events, uniformly over the frame.

    References
    ----------
    .. [1] M. S. Robbins and B. J. Hadwen, "The noise performance of electron multiplying
       charge-coupled devices", IEEE Trans. Electron Devices 50(5), 1227-1232 (2003).
    """
    area = events.area
    charge = events.cluster_charge
    if max_area is None:
        med_a = float(np.median(area)) if area.size else 1.0
        max_area = max(6.0 * events.box**2, 8.0 * med_a)
    if max_charge is None:
        small = charge[area <= max_area]
        med_q = float(np.median(small)) if small.size else 0.0
        max_charge = 15.0 * med_q if med_q > 0 else math.inf
    reason = np.where(area > max_area, _REJECT_LARGE, 0)
    reason = reason + np.where(charge > max_charge, _REJECT_BRIGHT, 0)
    out = EventList(**{k: getattr(events, k) for k in events.__dataclass_fields__})
    out.accepted = reason == 0
    out.reason = reason.astype(np.int64)
    out.limits = {"max_area": float(max_area), "max_charge": float(max_charge)}
    return out


@dataclass
class DarkReference:
    """What a stack of dark frames tells: bias, read noise and the dark event rate.

    Attributes
    ----------
    bias : (H, W) ndarray
        Per-pixel bias (DN): the median over the dark frames (mean for fewer than 3).
    read_noise_dn : float
        Read noise of one frame (DN).
    noise_dn : float
        Noise of a frame once the bias is subtracted (read noise and bias uncertainty).
    clusters : EventList
        Clusters found in the dark frames (rejection still to be applied).
    n_frames : int
        Number of dark frames.
    name : str
        Name of the dark stack for messages.
    """

    bias: np.ndarray
    read_noise_dn: float
    noise_dn: float
    clusters: EventList
    n_frames: int
    name: str = "dark"

    def events(self, limits: dict | None = None) -> EventList:
        """The dark clusters with cosmic rays rejected (with the science limits if given)."""
        return reject_tracks(self.clusters, **(limits or {}))

    def rate(self, limits: dict | None = None, roi: Sequence[int] | None = None
             ) -> tuple[float, float, int, int]:
        """Dark event rate (events per pixel per frame), its error, counts and exposure."""
        img = self.events(limits).count_image()
        if roi is not None:
            x, y, w, h = (int(v) for v in roi)
            img = img[y:y + h, x:x + w]
        k = int(img.sum())
        e = int(img.size * self.n_frames)
        return k / e, math.sqrt(max(k, 1)) / e, k, e


def dark_reference(
    dark_frames: np.ndarray, *, threshold: float = 5.0, box: int = 3, name: str = "dark"
) -> DarkReference:
    """Bias, read noise and dark clusters from a stack of dark frames.

    Parameters
    ----------
    dark_frames : (K, H, W) or (H, W) ndarray
        Dark frames (DN), taken like the science frames with the light blocked.
    threshold, box
        As for `detect_frame`.
    name : str
        Name of the dark stack (file) for messages.

    Returns
    -------
    DarkReference

    Notes
    -----
    The read noise is the clipped standard deviation of the dark frames about their
    per-pixel mean, scaled by sqrt(K / (K - 1)). A science frame minus a median bias of K
    frames then has the noise ``sigma sqrt(1 + pi / (2 K))`` (mean bias: ``1 + 1/K``), the
    noise used for the detection threshold.

    References
    ----------
    .. [1] EMVA Standard 1288, release 4.0 (2021), sec. 4 (dark signal and temporal noise).
    """
    arr = np.asarray(dark_frames, dtype=np.float64)
    if arr.ndim == 2:
        arr = arr[None]
    if arr.ndim != 3 or arr.shape[0] < 1:
        raise FringeError(f"{name}: expected a stack of frames, got shape {arr.shape}")
    k = arr.shape[0]
    if k >= 3:
        bias = np.median(arr, axis=0)
        factor = 1.0 + math.pi / (2.0 * k)
    else:
        bias = arr.mean(axis=0)
        factor = 1.0 + 1.0 / k
    min_clip = 1.5 if _is_integral(dark_frames) else 0.0
    if k >= 2:
        _, s = _clipped_stats(arr - arr.mean(axis=0), min_clip=min_clip)
        read = s * math.sqrt(k / (k - 1.0))
    else:
        _, read = _clipped_stats(arr[0] - np.median(arr[0]), min_clip=min_clip)
        factor = 1.0
    read = max(read, _noise_floor(arr[0]))
    noise = read * math.sqrt(factor)
    clusters = _collect(iter(arr), bias=bias, noise_dn=noise, read_noise_dn=read,
                        threshold=threshold, box=box)
    return DarkReference(bias=bias, read_noise_dn=read, noise_dn=noise, clusters=clusters,
                         n_frames=k, name=name)


def _frame_data(item: Any) -> tuple[np.ndarray, np.ndarray | None]:
    if hasattr(item, "data") and hasattr(item, "saturated"):
        return np.asarray(item.data), np.asarray(item.saturated)
    return np.asarray(item), None


def _collect(frames: Iterable[Any], *, bias: np.ndarray | float, noise_dn: float,
             read_noise_dn: float, threshold: float, box: int,
             offset: str | float = "frame", shape: tuple[int, int] | None = None
             ) -> EventList:
    xs, ys, fs, qs, as_, cs = [], [], [], [], [], []
    n = 0
    sat = 0
    npix = 0
    for item in frames:
        data, saturated = _frame_data(item)
        if data.ndim != 2:
            raise FringeError(f"frame {n}: expected a 2-D frame, got shape {data.shape}")
        if shape is None:
            shape = data.shape
        elif data.shape != tuple(shape):
            raise FringeError(f"frame {n}: shape {data.shape} does not match the first frame "
                              f"{tuple(shape)}")
        if saturated is not None:
            sat += int(np.count_nonzero(saturated))
        elif data.dtype.kind in "ui":
            sat += int(np.count_nonzero(data == np.iinfo(data.dtype).max))
        npix += data.size
        c = detect_frame(data, noise_dn=noise_dn, bias=bias, threshold=threshold, box=box,
                         offset=offset)
        if c["x"].size:
            xs.append(c["x"])
            ys.append(c["y"])
            qs.append(c["charge"])
            as_.append(c["area"])
            cs.append(c["cluster_charge"])
            fs.append(np.full(c["x"].size, n, dtype=np.int64))
        n += 1
    if n == 0 or shape is None:
        raise FringeError("no frames to search for photon events")

    def cat(parts, dtype=np.float64):
        return np.concatenate(parts).astype(dtype) if parts else np.zeros(0, dtype=dtype)

    m = sum(p.size for p in xs)
    return EventList(x=cat(xs), y=cat(ys), frame=cat(fs, np.int64), charge=cat(qs),
                     area=cat(as_, np.int64), cluster_charge=cat(cs),
                     accepted=np.ones(m, dtype=bool),
                     reason=np.zeros(m, dtype=np.int64), shape=(int(shape[0]), int(shape[1])),
                     n_frames=n, read_noise_dn=float(read_noise_dn), noise_dn=float(noise_dn),
                     threshold=float(threshold), box=int(box),
                     saturated_fraction=sat / npix if npix else 0.0)


def detect_stack(
    frames: Any,
    *,
    dark: DarkReference | None = None,
    threshold: float = 5.0,
    box: int = 3,
    read_noise_dn: float | None = None,
    max_area: float | None = None,
    max_charge: float | None = None,
) -> EventList:
    """Detect photon events frame by frame and reject cosmic-ray tracks.

    Parameters
    ----------
    frames : (N, H, W) or (H, W) ndarray, or iterable of 2-D arrays or `fringe.io.Frame`
        Raw low-light frames (DN), read one at a time; not modified.
    dark : DarkReference, optional
        Bias and noise from dark frames (`dark_reference`). Without it a scalar offset is
        removed from every frame and the noise is estimated from the first frame.
    threshold : float
        Detection threshold, in units of the noise of the detection image
        (``box * noise``; see `detect_frame`).
    box : int
        Odd side of the summing window of the detection image (px).
    read_noise_dn : float, optional
        Known read noise (DN) instead of the estimate.
    max_area, max_charge : float, optional
        Cosmic-ray rejection limits (see `reject_tracks`).

    Returns
    -------
    EventList
        All candidate events, with ``accepted`` marking the photon events.

    Examples
    --------
    >>> from fringe.synth import photon_stack
    >>> st, truth = photon_stack(40, (32, 32), period_px=8.0, orientation_deg=0.0,
    ...     visibility=0.8, phase_rad=0.0, photons_per_frame=3, background_per_px=0.0,
    ...     rng=np.random.default_rng(3), read_noise_e=0.02, cosmic_rays_per_frame=0.0)
    >>> ev = detect_stack(st)
    >>> ev.n_frames, 0.6 < ev.n_events / sum(truth["signal_photons"]) <= 0.8
    (40, True)
    """
    chain: Iterable[Any]
    if isinstance(frames, np.ndarray) or not hasattr(frames, "__iter__"):
        arr = np.asarray(frames)
        if arr.ndim == 2:
            arr = arr[None]
        if arr.ndim != 3 or arr.shape[0] == 0:
            raise FringeError(f"expected a stack of frames (N, H, W), got shape {arr.shape}")
        first_data = arr[0]
        chain = arr
    else:
        it = iter(frames)
        try:
            first_item = next(it)
        except StopIteration:
            raise FringeError("no frames to search for photon events") from None
        first_data, _ = _frame_data(first_item)

        def _chain():
            yield first_item
            yield from it

        chain = _chain()
    if dark is not None:
        bias: np.ndarray | float = dark.bias
        if dark.bias.shape != np.shape(first_data):
            raise FringeError(f"{dark.name}: shape {dark.bias.shape} does not match frame "
                              f"shape {np.shape(first_data)}")
        noise = dark.noise_dn
        read = dark.read_noise_dn
    else:
        bias = 0.0
        _, read = estimate_read_noise(first_data)
        noise = read
    if read_noise_dn is not None:
        if not read_noise_dn > 0:
            raise FringeError(f"read noise must be positive, got {read_noise_dn}")
        scale = noise / read if read > 0 else 1.0
        read = float(read_noise_dn)
        noise = read * scale
    clusters = _collect(chain, bias=bias, noise_dn=noise, read_noise_dn=read,
                        threshold=threshold, box=box)
    return reject_tracks(clusters, max_area=max_area, max_charge=max_charge)


# --------------------------------------------------------------------------------------------
# Poisson likelihood
# --------------------------------------------------------------------------------------------


@dataclass
class _Data:
    u: np.ndarray
    v: np.ndarray
    u_var: np.ndarray
    k: np.ndarray
    e: np.ndarray
    bg_k: np.ndarray
    bg_e: np.ndarray


def _expected(theta: np.ndarray, data: _Data, want_grad: bool = True):
    """Expected counts of the pattern bins and of the background bins, with gradients."""
    b, s, vis, phi, om, ka = theta
    psi = om * data.u + ka * data.v + phi
    g = np.exp(-0.5 * om * om * data.u_var)
    c, sn = np.cos(psi), np.sin(psi)
    e = data.e
    lam = e * (b + s * (1.0 + vis * g * c))
    lam_bg = data.bg_e * b
    if not want_grad:
        return lam, lam_bg, None, None
    svg = e * s * vis * g
    grad = np.empty((6, lam.size))
    grad[0] = e
    grad[1] = e * (1.0 + vis * g * c)
    grad[2] = e * s * g * c
    grad[3] = -svg * sn
    grad[4] = -svg * (data.u * sn + om * data.u_var * c)
    grad[5] = -svg * data.v * sn
    grad_bg = np.zeros((6, lam_bg.size))
    grad_bg[0] = data.bg_e
    return lam, lam_bg, grad, grad_bg


def _deviance_half(lam: np.ndarray, k: np.ndarray) -> float:
    """Half the Poisson deviance, sum(lambda - k + k ln(k / lambda)) (Cash statistic / 2)."""
    pos = k > 0
    if np.any(lam[pos] <= 0):
        return math.inf
    with np.errstate(divide="ignore", invalid="ignore"):
        term = lam - k
        term[pos] += k[pos] * np.log(k[pos] / lam[pos])
    return float(term.sum())


def _nll(theta: np.ndarray, data: _Data) -> float:
    lam, lam_bg, _, _ = _expected(theta, data, want_grad=False)
    return _deviance_half(lam, data.k) + _deviance_half(lam_bg, data.bg_k)


# Small products by einsum: it avoids multithreaded BLAS, whose start-up costs more than
# these products on the few hundred to few thousand bins of a profile.
def _mv(a: np.ndarray, x: np.ndarray) -> np.ndarray:
    return np.einsum("ij,j->i", a, x)


def _gram(g: np.ndarray, w: np.ndarray) -> np.ndarray:
    return np.einsum("im,jm->ij", g * w, g)


def _value_score(theta: np.ndarray, data: _Data, free: np.ndarray
                 ) -> tuple[float, np.ndarray | None]:
    """Half the deviance and its gradient over the free parameters, in one pass."""
    lam, lam_bg, grad, grad_bg = _expected(theta, data)
    val = _deviance_half(lam, data.k) + _deviance_half(lam_bg, data.bg_k)
    if not math.isfinite(val):
        return val, None
    with np.errstate(divide="ignore", invalid="ignore"):
        resid = np.where(lam > 0, 1.0 - data.k / lam, 1.0)
        resid_bg = np.where(lam_bg > 0, 1.0 - data.bg_k / lam_bg, 1.0)
    return val, _mv(grad[free], resid) + _mv(grad_bg[free], resid_bg)


def _score_fisher(theta: np.ndarray, data: _Data, free: np.ndarray):
    lam, lam_bg, grad, grad_bg = _expected(theta, data)
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(lam > 0, 1.0 / lam, 0.0)
        wb = np.where(lam_bg > 0, 1.0 / lam_bg, 0.0)
    resid = 1.0 - data.k * w
    resid_bg = 1.0 - data.bg_k * wb
    # A background measurement with (almost) no counts has no finite information at
    # b = 0; weigh it as one count at most (the rate error is then 1 / exposure).
    wb = 1.0 / np.maximum(lam_bg, 1.0)
    gr = grad[free]
    gb = grad_bg[free]
    score = _mv(gr, resid) + _mv(gb, resid_bg)
    fisher = _gram(gr, w) + _gram(gb, wb)
    return score, fisher


def poisson_fisher(
    u: np.ndarray,
    exposure: np.ndarray | float,
    *,
    background: float,
    signal: float,
    visibility: float,
    period: float,
    phase: float,
    kappa: float = 0.0,
    v: np.ndarray | None = None,
    u_var: np.ndarray | None = None,
    background_exposure: float = 0.0,
    free: Sequence[str] = ("signal", "visibility", "phase", "omega"),
) -> np.ndarray:
    """Fisher information of binned Poisson counts from a fringe pattern.

    Parameters
    ----------
    u : (M,) ndarray
        Bin coordinates across the fringes (px or position units).
    exposure : (M,) ndarray or float
        Exposure of each bin (pixel-frames, or seconds).
    background, signal : float
        Rates b and s (events per pixel per frame, or per second).
    visibility, period, phase : float
        V, P and phi of the pattern; ``omega = 2 pi / P``.
    kappa : float
        Phase gradient along the fringes (rad/px) with `v` the bin coordinates along them.
    v, u_var : (M,) ndarray, optional
        Along-fringe coordinate and variance of u inside each bin.
    background_exposure : float
        Exposure of separate background-only data (dark frames or regions outside the
        pattern), which measure b alone.
    free : sequence of str
        Parameters (names from `PARAMETERS`) whose information matrix is wanted.

    Returns
    -------
    (F, F) ndarray
        ``I_ij = sum_n (1 / lambda_n) d_i lambda_n d_j lambda_n`` over the bins, in the
        order of `free`.

    Notes
    -----
    For Poisson counts with means ``lambda_n(theta)`` the Fisher information is
    ``I(theta)_ij = sum_n d_i lambda_n d_j lambda_n / lambda_n``, and the Cramer-Rao bound
    is ``cov(theta_hat) >= I^-1``. For ``lambda_n = B (1 + V cos(2 pi f n + phi))`` over
    whole periods with ``N_tot = N B`` counts it gives
    ``var(V_hat) >= V^2 / (N_tot (1 / sqrt(1 - V^2) - 1))``.

    References
    ----------
    .. [1] S. M. Kay, Fundamentals of Statistical Signal Processing: Estimation Theory,
       Prentice Hall (1993), sec. 3.7 and 3.9 (Fisher information, general Gaussian and
       non-Gaussian cases).
    .. [2] W. Cash, "Parameter estimation in astronomy through application of the
       likelihood ratio", Astrophys. J. 228, 939-947 (1979).

    Examples
    --------
    >>> n = np.arange(256.0)
    >>> fim = poisson_fisher(n, 1.0, background=0.0, signal=20.0, visibility=0.5,
    ...                      period=16.0, phase=0.3)
    >>> round(float(np.sqrt(np.linalg.inv(fim)[1, 1])), 5)
    0.01777
    """
    u = np.asarray(u, dtype=np.float64)
    data = _Data(u=u, v=np.zeros_like(u) if v is None else np.asarray(v, dtype=np.float64),
                 u_var=np.zeros_like(u) if u_var is None else np.asarray(u_var, float),
                 k=np.zeros_like(u), e=np.broadcast_to(np.asarray(exposure, float), u.shape),
                 bg_k=np.zeros(1), bg_e=np.array([float(background_exposure)]))
    theta = np.array([background, signal, visibility, phase, 2 * np.pi / period, kappa])
    idx = np.array([PARAMETERS.index(f) for f in free])
    lam, lam_bg, grad, grad_bg = _expected(theta, data)
    with np.errstate(divide="ignore"):
        w = np.where(lam > 0, 1.0 / lam, 0.0)
        wb = np.where(lam_bg > 0, 1.0 / lam_bg, 0.0)
    g, gb = grad[idx], grad_bg[idx]
    return _gram(g, w) + _gram(gb, wb)


def poisson_crlb(u: np.ndarray, exposure: np.ndarray | float, **model: Any) -> dict[str, float]:
    """Cramer-Rao standard deviations of the free parameters (see `poisson_fisher`).

    Returns
    -------
    dict
        Standard deviation of each free parameter, plus ``period`` (from omega) when
        omega is free.
    """
    free = tuple(model.pop("free", ("signal", "visibility", "phase", "omega")))
    fim = poisson_fisher(u, exposure, free=free, **model)
    cov = np.linalg.inv(fim)
    out = {name: float(np.sqrt(cov[i, i])) for i, name in enumerate(free)}
    if "omega" in out:
        out["period"] = model["period"] ** 2 / (2 * np.pi) * out["omega"]
    return out


@dataclass
class PoissonFit:
    """Maximum-likelihood fit of a fringe pattern to binned Poisson counts.

    Attributes
    ----------
    values, errors : dict
        Parameter values and 1-sigma errors (inverse Fisher information; 0 for fixed
        parameters) by name: ``background``, ``signal``, ``visibility``, ``phase``,
        ``omega``, ``kappa``, and the derived ``period``.
    free : tuple of str
        Free parameters, the order of `cov`.
    cov : ndarray
        Inverse Fisher information at the fitted values.
    nll, nll_null : float
        Minimum of half the Poisson deviance (Cash statistic / 2) with and without fringes.
    lr : float
        Likelihood-ratio statistic ``2 (nll_null - nll)``.
    dof : int
        Parameters that the fringes add at a fixed frequency (2: visibility and phase).
    p_value_local, sigma_local : float
        Significance at a fixed frequency (Wilks: chi-square with `dof`).
    counts, exposure : float
        Total counts and exposure of the pattern bins.
    expected : ndarray
        Fitted expected counts of the pattern bins.
    deviance : float
        Poisson deviance of the fit (goodness of fit; about the number of bins for
        well-filled bins).
    n_bins : int
        Number of pattern bins.
    converged : bool
    """

    values: dict[str, float]
    errors: dict[str, float]
    free: tuple[str, ...]
    cov: np.ndarray
    nll: float
    nll_null: float
    lr: float
    dof: int
    p_value_local: float
    sigma_local: float
    counts: float
    exposure: float
    expected: np.ndarray
    deviance: float
    n_bins: int
    converged: bool
    warnings: list[str] = field(default_factory=list)


def _minimise(theta0: np.ndarray, data: _Data, free_names: Sequence[str],
              scale: np.ndarray) -> tuple[np.ndarray, bool]:
    """Minimise the Poisson deviance over the free parameters (TNC, then Fisher scoring)."""
    free = np.array([PARAMETERS.index(f) for f in free_names])
    theta0 = theta0.copy()
    sc = scale[free]
    lower = {"background": 0.0, "signal": 1e-12 * scale[1], "visibility": 0.0}
    upper = {"visibility": 1.0 - 1e-9}
    bounds = [((lower.get(f, -np.inf)) / sc[i], upper.get(f, np.inf) / sc[i])
              for i, f in enumerate(free_names)]
    bounds = [(None if not np.isfinite(lo) else lo, None if not np.isfinite(hi) else hi)
              for lo, hi in bounds]
    ref = theta0.copy()

    def full(x):
        th = ref.copy()
        th[free] = x * sc
        return th

    def fun(x):
        val, score = _value_score(full(x), data, free)
        if score is None:
            return 1e300, np.zeros_like(x)
        return val, score * sc

    x0 = theta0[free] / sc
    for i, (lo, hi) in enumerate(bounds):
        if lo is not None:
            x0[i] = max(x0[i], lo)
        if hi is not None:
            x0[i] = min(x0[i], hi)
    # Truncated Newton with bounds: unlike L-BFGS-B it makes no BLAS calls, whose thread
    # start-up dominates on problems with a handful of parameters.
    res = optimize.minimize(fun, x0, jac=True, method="TNC", bounds=bounds,
                            options={"maxfun": 600, "ftol": 1e-12, "gtol": 1e-8,
                                     "xtol": 1e-10})
    theta = full(res.x)
    ok = bool(res.success)
    # Fisher scoring polishes the optimum (quadratic convergence near it).
    f_best = _nll(theta, data)
    lo_arr = np.array([lower.get(f, -np.inf) for f in free_names])
    hi_arr = np.array([upper.get(f, np.inf) for f in free_names])
    for _ in range(8):
        score, fisher = _score_fisher(theta, data, free)
        try:
            step = -np.linalg.solve(fisher, score)
        except np.linalg.LinAlgError:
            break
        t = 1.0
        improved = False
        for _h in range(20):
            cand = theta.copy()
            cand[free] = np.clip(theta[free] + t * step, lo_arr, hi_arr)
            f_c = _nll(cand, data)
            if f_c <= f_best:
                improved = f_best - f_c > 1e-13 * max(1.0, abs(f_best))
                theta, f_best = cand, f_c
                break
            t *= 0.5
        if not improved:
            break
    return theta, ok


def _chi2_logsf(x: float, dof: int) -> float:
    """Logarithm of the chi-square survival function, accurate far into the tail."""
    if dof == 2:
        return -0.5 * x
    val = float(stats.chi2.logsf(x, dof))
    if math.isfinite(val):
        return val
    a, z = 0.5 * dof, 0.5 * x  # Q(a, z) ~ z^(a-1) e^-z / Gamma(a) (1 + (a-1)/z)
    return (a - 1.0) * math.log(z) - z - math.lgamma(a) + math.log1p((a - 1.0) / z)


def _log_ec_density(u: float, dof: int, d: int) -> float:
    """Log of the Euler-characteristic density rho_d(u) of a chi-square field, d = 1, 2."""
    s = float(dof)
    if u <= 0:
        return -math.inf
    common = -0.5 * u - math.lgamma(0.5 * s) - 0.5 * (s - 2.0) * math.log(2.0)
    if d == 1:
        return common + 0.5 * (s - 1.0) * math.log(u) - 0.5 * math.log(2.0 * math.pi)
    if u - s + 1.0 <= 0:
        return -math.inf
    return common + 0.5 * (s - 2.0) * math.log(u) + math.log(u - s + 1.0) - math.log(
        2.0 * math.pi)


def lr_significance(statistic: float, *, dof: int = 2, trials: float = 1.0,
                    search: tuple[float, float] | None = None) -> tuple[float, float]:
    """p-value and one-sided Gaussian-equivalent significance of a likelihood ratio.

    Parameters
    ----------
    statistic : float
        ``2 (ln L_1 - ln L_0)``.
    dof : int
        Degrees of freedom of the asymptotic chi-square law at a fixed frequency (Wilks).
    trials : float
        Number of independent frequencies searched (Bonferroni-type correction).
    search : (L1, L2), optional
        Lipschitz-Killing curvatures of the searched frequency region (see Notes); when
        given, the look-elsewhere correction uses them instead of `trials`.

    Returns
    -------
    p_value, sigma : float
        The p-value and ``sigma = Phi^-1(1 - p)`` (0 when p >= 0.5).

    Notes
    -----
    Under the no-fringe hypothesis at a fixed frequency the statistic follows a chi-square
    law with ``dof`` = 2 degrees of freedom (visibility and phase, or the cosine and sine
    amplitudes) for many counts [1]_: ``p_local = P(chi2_dof > statistic)``. When the
    frequency was searched it is undefined under the null and Wilks' theorem fails [2]_.
    With ``trials`` M independent frequencies, ``p = 1 - (1 - p_local)^M`` [3]_. With the
    search region, the expected Euler characteristic of the excursion set of the
    chi-square random field over the frequencies approximates the p-value of its maximum
    [4]_, [5]_:

    .. math:: p \approx \rho_0(u) + L_1 \rho_1(u) + L_2 \rho_2(u),

    with ``rho_0 = p_local``, ``rho_1 = u^((s-1)/2) e^(-u/2) / (sqrt(2 pi) Gamma(s/2)
    2^((s-2)/2))`` and ``rho_2 = u^((s-2)/2) e^(-u/2) (u - s + 1) / (2 pi Gamma(s/2)
    2^((s-2)/2))``. For frequencies ``omega`` and unit-variance cosine and sine components
    the metric is the covariance of the positions: a 1-D search over a width ``dw`` of
    omega on data with position s.d. ``sd`` has ``L1 = dw sd``; a 2-D region has
    ``L2`` its area times ``sd_x sd_y`` and ``L1`` half its boundary length in that
    metric. In one dimension this is Davies' upcrossing bound [2]_.

    References
    ----------
    .. [1] S. S. Wilks, "The large-sample distribution of the likelihood ratio for testing
       composite hypotheses", Ann. Math. Statist. 9, 60-62 (1938).
    .. [2] R. B. Davies, "Hypothesis testing when a nuisance parameter is present only
       under the alternative", Biometrika 74, 33-43 (1987).
    .. [3] J. D. Scargle, "Studies in astronomical time series analysis. II", Astrophys.
       J. 263, 835-853 (1982), eq. 14.
    .. [4] R. J. Adler and J. E. Taylor, Random Fields and Geometry, Springer (2007),
       ch. 12-15 (expected Euler characteristic).
    .. [5] O. Vitells and E. Gross, "Estimating the significance of a signal in a
       multi-dimensional search", Astropart. Phys. 35, 230-234 (2011).

    Examples
    --------
    >>> p, z = lr_significance(5.991464547107979, dof=2)
    >>> round(p, 6), round(z, 4)
    (0.05, 1.6449)
    """
    stat = max(float(statistic), 0.0)
    logp_local = _chi2_logsf(stat, int(dof))
    if search is not None:
        l1, l2 = (max(float(v), 0.0) for v in search)
        terms = [logp_local]
        if l1 > 0:
            terms.append(math.log(l1) + _log_ec_density(stat, dof, 1))
        if l2 > 0:
            terms.append(math.log(l2) + _log_ec_density(stat, dof, 2))
        top = max(terms)
        logp = min(0.0, top + math.log(sum(math.exp(t - top) for t in terms)))
    else:
        m = max(float(trials), 1.0)
        p_local = math.exp(logp_local)
        if p_local < 1e-12:
            logp = min(0.0, math.log(m) + logp_local)
        elif p_local < 1.0:
            logp = math.log(-math.expm1(m * math.log1p(-p_local)))
        else:
            logp = 0.0
    p = math.exp(logp)
    if logp > -700.0:
        z = float(stats.norm.isf(p)) if p < 0.5 else 0.0
    else:  # asymptotic inverse of the normal tail
        t = -2.0 * logp
        z = math.sqrt(t - math.log(t) - math.log(2.0 * math.pi))
    return p, max(z, 0.0)


def search_curvatures_1d(omega_width: float, position_sd: float) -> tuple[float, float]:
    """Lipschitz-Killing curvatures (L1, L2) of a 1-D frequency search (`lr_significance`).

    ``omega_width`` is the searched range of omega (rad per unit), ``position_sd`` the
    standard deviation of the positions (weighted by exposure).
    """
    return max(omega_width, 0.0) * max(position_sd, 0.0), 0.0


def search_curvatures_2d(shape: tuple[int, int], *, min_period: float, max_period: float
                         ) -> tuple[float, float]:
    """Lipschitz-Killing curvatures (L1, L2) of the spectral search of an image.

    The search covers the frequency vectors with ``1/max_period <= |f| <= 1/min_period``
    modulo sign (``f`` and ``-f`` give the same pattern): an annulus of omega of area
    ``2 pi^3 (f_hi^2 - f_lo^2)`` bounded by two circles of length ``2 pi^2 f`` each, in
    the metric of the pixel positions (s.d. ``sqrt((W^2 - 1)/12)`` and
    ``sqrt((H^2 - 1)/12)``).
    """
    h, w = shape
    sx = math.sqrt(max(w * w - 1.0, 1.0) / 12.0)
    sy = math.sqrt(max(h * h - 1.0, 1.0) / 12.0)
    f_hi, f_lo = 1.0 / min_period, 1.0 / max_period
    l2 = 2.0 * math.pi**3 * (f_hi**2 - f_lo**2) * sx * sy
    l1 = math.pi**2 * (f_hi + f_lo) * math.sqrt(sx * sy)
    return l1, l2


def _initial(data: _Data, omega: float, kappa: float, b0: float) -> tuple[float, float, float]:
    """Linear first guess of (s, V, phi) at a fixed frequency."""
    psi = omega * data.u + kappa * data.v
    g = np.exp(-0.5 * omega**2 * data.u_var)
    x = np.stack([np.ones_like(psi), g * np.cos(psi), -g * np.sin(psi)])
    a = _gram(x, data.e)
    rhs = _mv(x, data.k)
    try:
        r, c, d = np.linalg.solve(a, rhs)
    except np.linalg.LinAlgError:
        r, c, d = float(data.k.sum() / data.e.sum()), 0.0, 0.0
    s0 = r - b0
    total = float(data.k.sum() / max(data.e.sum(), 1e-300))
    if not s0 > 0.05 * total:
        s0 = max(0.5 * total, 1e-12) if total > 0 else 1e-12
    vis = float(np.clip(np.hypot(c, d) / s0, 0.05, 0.95))
    return float(s0), vis, float(np.arctan2(d, c))


def _grid_search(data: _Data, omega0: float, half_width: float, n: int = 41) -> float:
    """Frequency with the largest modulation power near omega0."""
    grid = omega0 + np.linspace(-half_width, half_width, n)
    grid = grid[grid > 0]
    rate = data.k.sum() / data.e.sum()
    resid = data.k - data.e * rate
    z = _mv(np.exp(-1j * np.outer(grid, data.u)), resid)
    return float(grid[int(np.argmax(np.abs(z)))])


def fit_poisson_profile(
    u: np.ndarray,
    counts: np.ndarray,
    exposure: np.ndarray | float,
    *,
    period: float,
    v: np.ndarray | None = None,
    u_var: np.ndarray | None = None,
    background: float | None = None,
    background_counts: float | Sequence[float] = (),
    background_exposure: float | Sequence[float] = (),
    fix_frequency: bool = False,
    fit_kappa: bool = False,
    kappa: float = 0.0,
    search_width: float | None = None,
) -> PoissonFit:
    """Fit ``E (b + s (1 + V g cos(omega u + kappa v + phi)))`` to counts by Poisson ML.

    Parameters
    ----------
    u : (M,) ndarray
        Bin coordinates across the fringes, measured from the reference point.
    counts : (M,) ndarray
        Counts per bin (non-negative).
    exposure : (M,) ndarray or float
        Exposure per bin (pixel-frames or seconds).
    period : float
        Period (start value, or the value held when `fix_frequency`).
    v, u_var : (M,) ndarray, optional
        Along-fringe bin coordinate and within-bin variance of u.
    background : float, optional
        Known background rate b, held fixed. Without it, b is fitted when
        `background_counts` are given, else held at 0 (the visibility then includes the
        background).
    background_counts, background_exposure : float or sequence
        Counts and exposures of background-only data (dark frames, regions outside the
        pattern), whose expectation is ``exposure * b``.
    fix_frequency : bool
        Hold omega (and kappa) at the given values.
    fit_kappa : bool
        Fit the phase gradient along the fringes (orientation refinement).
    kappa : float
        Start (or fixed) value of kappa.
    search_width : float, optional
        Half-width (rad/unit) of a grid search for omega before the local fit; default two
        resolution cells, ``4 pi / span(u)``; 0 disables it.

    Returns
    -------
    PoissonFit

    Notes
    -----
    The negative log-likelihood of Poisson counts ``k_j`` with means ``lambda_j`` is,
    up to a constant, ``sum(lambda_j - k_j ln lambda_j)``; minimised in the form
    ``sum(lambda - k + k ln(k / lambda))`` (half of Cash's C statistic referred to the
    saturated model) with `scipy.optimize.minimize` (TNC with bounds b >= 0, s > 0,
    0 <= V < 1 and the analytic gradient), then polished by Fisher scoring. Unlike least
    squares it stays unbiased when most bins hold 0 or 1 count. Uncertainties are the
    square roots of the diagonal of the inverse Fisher information at the fitted values.
    The no-fringe model (V = 0) is fitted too; the likelihood ratio gives the local
    significance with 2 degrees of freedom.

    References
    ----------
    .. [1] W. Cash, "Parameter estimation in astronomy through application of the
       likelihood ratio", Astrophys. J. 228, 939-947 (1979).
    .. [2] S. M. Kay, Fundamentals of Statistical Signal Processing: Estimation Theory,
       Prentice Hall (1993), ch. 3 and 7 (Cramer-Rao bound, maximum likelihood).
    .. [3] S. S. Wilks, Ann. Math. Statist. 9, 60-62 (1938).

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> u = np.arange(256.0) - 127.5
    >>> k = rng.poisson(20.0 * (1 + 0.5 * np.cos(2 * np.pi * u / 16 + 0.3)))
    >>> fit = fit_poisson_profile(u, k, 1.0, period=15.8)
    >>> abs(fit.values["period"] - 16) < 3 * fit.errors["period"], fit.sigma_local > 10
    (True, True)
    """
    u = np.asarray(u, dtype=np.float64).ravel()
    k = np.asarray(counts, dtype=np.float64).ravel()
    if u.shape != k.shape:
        raise FringeError(f"{u.size} positions but {k.size} counts")
    if k.size < 4:
        raise FringeError(f"only {k.size} bins: too few to fit fringes")
    if np.any(~np.isfinite(k)) or np.any(k < 0):
        raise FringeError("counts must be finite and non-negative")
    e = np.broadcast_to(np.asarray(exposure, dtype=np.float64), u.shape).astype(np.float64)
    if np.any(~(e > 0)):
        raise FringeError("exposures must be positive")
    if not (period > 0 and math.isfinite(period)):
        raise FringeError(f"period must be positive, got {period}")
    bg_k = np.atleast_1d(np.asarray(background_counts, dtype=np.float64))
    bg_e = np.atleast_1d(np.asarray(background_exposure, dtype=np.float64))
    if bg_k.shape != bg_e.shape:
        raise FringeError("background counts and exposures differ in number")
    data = _Data(u=u, v=np.zeros_like(u) if v is None else np.asarray(v, float).ravel(),
                 u_var=np.zeros_like(u) if u_var is None else np.asarray(u_var, float).ravel(),
                 k=k, e=e, bg_k=bg_k, bg_e=bg_e)
    total = float(k.sum())
    rate = total / float(e.sum())
    warnings: list[str] = []
    if total <= 0:
        raise FringeError("no counts in the pattern region")
    fit_b = background is None and bg_e.size > 0 and float(bg_e.sum()) > 0
    if background is not None:
        b0 = float(background)
        if b0 < 0:
            raise FringeError(f"background rate must be non-negative, got {b0}")
    elif fit_b:
        b0 = float(bg_k.sum() / bg_e.sum())
    else:
        b0 = 0.0
    omega0 = 2 * np.pi / float(period)
    span = float(np.ptp(u)) if u.size > 1 else 1.0
    if not fix_frequency:
        width = 4 * np.pi / max(span, 1e-9) if search_width is None else float(search_width)
        if width > 0:
            omega0 = _grid_search(data, omega0, min(width, 0.5 * omega0))
    s0, v0, phi0 = _initial(data, omega0, kappa, b0)
    theta0 = np.array([b0, s0, v0, phi0, omega0, kappa])
    half_u = max(0.5 * span, 1e-9)
    span_v = float(np.ptp(data.v)) if data.v.size > 1 else 0.0
    fit_k = bool(fit_kappa) and span_v > 0 and not fix_frequency
    scale = np.array([max(rate, 1e-300), max(rate, 1e-300), 1.0, 1.0, 1.0 / half_u,
                      1.0 / max(0.5 * span_v, 1e-9)])
    free = (["background"] if fit_b else []) + ["signal", "visibility", "phase"]
    if not fix_frequency:
        free.append("omega")
        if fit_k:
            free.append("kappa")
    theta, ok = _minimise(theta0, data, free, scale)
    best = _nll(theta, data)
    if theta[2] < 1e-3:
        # Stuck at V = 0, where the phase has no gradient: start again half a period away.
        alt = theta0.copy()
        alt[3] += np.pi
        theta2, ok2 = _minimise(alt, data, free, scale)
        if _nll(theta2, data) < best - 1e-9:
            theta, ok = theta2, ok2
            best = _nll(theta, data)
    null_free = (["background"] if fit_b else []) + ["signal"]
    null0 = theta.copy()
    null0[2] = 0.0
    null0[1] = max(rate - (theta[0] if fit_b or background is not None else 0.0),
                   1e-12 * rate)
    theta_null, _ = _minimise(null0, data, null_free, scale)
    best_null = _nll(theta_null, data)
    lr = max(2.0 * (best_null - best), 0.0)
    dof = 2
    p_loc, z_loc = lr_significance(lr, dof=dof)

    idx = np.array([PARAMETERS.index(f) for f in free])
    _, fisher = _score_fisher(theta, data, idx)
    try:
        cov = np.linalg.inv(fisher)
        if np.any(np.diag(cov) < 0):
            raise np.linalg.LinAlgError
    except np.linalg.LinAlgError:
        cov = np.linalg.pinv(fisher)
        warnings.append("the Fisher information is singular (no visible modulation?): "
                        "some uncertainties are undefined")
    values = {name: float(theta[i]) for i, name in enumerate(PARAMETERS)}
    values["phase"] = float(wrap_phase(values["phase"]))
    errors = dict.fromkeys(PARAMETERS, 0.0)
    for j, name in enumerate(free):
        errors[name] = float(np.sqrt(max(cov[j, j], 0.0)))
    hyp = float(np.hypot(values["omega"], values["kappa"]))
    values["period"] = 2 * np.pi / hyp
    g_p = np.zeros(len(free))
    for j, name in enumerate(free):
        if name == "omega":
            g_p[j] = -2 * np.pi * values["omega"] / hyp**3
        elif name == "kappa":
            g_p[j] = -2 * np.pi * values["kappa"] / hyp**3
    errors["period"] = float(np.sqrt(max(g_p @ cov @ g_p, 0.0)))
    if values["visibility"] < 1e-6:
        warnings.append("fitted visibility is at its lower limit 0")
    elif values["visibility"] > 1 - 1e-6:
        warnings.append("fitted visibility is at its upper limit 1")
    lam, _, _, _ = _expected(theta, data, want_grad=False)
    return PoissonFit(values=values, errors=errors, free=tuple(free), cov=cov, nll=best,
                      nll_null=best_null, lr=lr, dof=dof, p_value_local=p_loc,
                      sigma_local=z_loc, counts=total, exposure=float(e.sum()),
                      expected=lam, deviance=2.0 * _deviance_half(lam, k), n_bins=int(k.size),
                      converged=ok, warnings=warnings)


def _set_significance(res: FringeResult, fit: Any, search: Any, note: str) -> None:
    """Likelihood-ratio significance of the fringe modulation, into the result."""
    p_val, z = lr_significance(fit.lr, dof=fit.dof, search=search)
    res.set("lr_statistic", fit.lr)
    res.set("lr_dof", fit.dof)
    res.set("trials_factor", p_val / fit.p_value_local if fit.p_value_local > 0 else math.nan)
    res.set("p_value_local", fit.p_value_local)
    res.set("significance_local", fit.sigma_local)
    res.set("p_value", p_val)
    res.set("significance", z)
    res.set("significance_note", note)
    if z < 3.0:
        res.warn(f"fringe modulation not significant ({z:.1f} sigma, p = {p_val:.2g}): "
                 "period, phase and visibility may be noise")


def photons_needed(visibility: float, visibility_err: float, photons: float,
                   precision: float) -> float:
    """Photons needed for a relative visibility precision, scaled from a measurement.

    Parameters
    ----------
    visibility, visibility_err : float
        Fitted V and its Fisher-information error at ``photons`` detected events.
    photons : float
        Events in the pattern region behind that error.
    precision : float
        Wanted relative precision ``epsilon = sigma_V / V`` (0.01 for 1 %).

    Returns
    -------
    float
        ``photons (sigma_V / (epsilon V))^2``: the Fisher information grows in proportion
        to the exposure at fixed rates, so sigma_V falls as 1/sqrt(photons).

    Examples
    --------
    >>> round(photons_needed(0.5, 0.0177663, 5120, 0.01), -1)
    64640.0
    """
    if not precision > 0:
        raise FringeError(f"precision must be positive, got {precision}")
    if not visibility > 0:
        return math.inf
    return float(photons) * (float(visibility_err) / (precision * float(visibility))) ** 2


def photons_needed_ideal(visibility: float, precision: float) -> float:
    """Photon bound for a relative visibility precision without background.

    ``N_tot = 1 / (epsilon^2 (1 / sqrt(1 - V^2) - 1))``, about ``2 / (epsilon V)^2`` for
    small V: the Cramer-Rao bound for ``lambda = B (1 + V cos(...))`` over whole periods
    with B, V, phase and frequency unknown.

    Examples
    --------
    >>> round(photons_needed_ideal(0.5, 0.01))
    64641
    """
    v = float(visibility)
    if not 0 < v < 1:
        return math.inf if v <= 0 else 0.0
    return 1.0 / (precision**2 * (1.0 / math.sqrt(1.0 - v * v) - 1.0))


# --------------------------------------------------------------------------------------------
# analysis of event lists
# --------------------------------------------------------------------------------------------


def _check_region(roi: Sequence[int], shape: tuple[int, int], what: str) -> tuple[int, ...]:
    if len(roi) != 4:
        raise FringeError(f"{what} needs four integers X Y W H, got {list(roi)}")
    x, y, w, h = (int(v) for v in roi)
    hh, ww = shape
    if w < 1 or h < 1 or x < 0 or y < 0 or x + w > ww or y + h > hh:
        raise FringeError(f"{what} X={x} Y={y} W={w} H={h} does not fit in the {ww} x {hh} "
                          "frame")
    return x, y, w, h


def _bins(counts: np.ndarray, mask: np.ndarray | None, *, orientation_deg: float,
          bin_width: float, n_strips: int, n_frames: int) -> tuple[_Data, Any]:
    prof = project(counts.astype(np.float64), mask, orientation_deg=orientation_deg,
                   bin_width=bin_width, n_strips=n_strips)
    k = np.rint(prof.mean * prof.count)
    return _Data(u=prof.u, v=prof.v, u_var=prof.u_var, k=k, e=prof.count * float(n_frames),
                 bg_k=np.zeros(0), bg_e=np.zeros(0)), prof


def _with_bg(data: _Data, bg_k: Sequence[float], bg_e: Sequence[float]) -> _Data:
    return _Data(u=data.u, v=data.v, u_var=data.u_var, k=data.k, e=data.e,
                 bg_k=np.asarray(bg_k, float), bg_e=np.asarray(bg_e, float))


def _fit_data(data: _Data, **kw: Any) -> PoissonFit:
    return fit_poisson_profile(data.u, data.k, data.e, v=data.v, u_var=data.u_var,
                               background_counts=data.bg_k, background_exposure=data.bg_e,
                               **kw)


def _orientation_after(t_deg: float, fit: PoissonFit
                       ) -> tuple[float, float, float, float, bool]:
    """Orientation after the kappa correction: unfolded and folded (deg), its error, the
    phase for the folded normal and whether the fold reversed the normal."""
    om, ka = fit.values["omega"], fit.values["kappa"]
    t = t_deg + math.degrees(math.atan2(-ka, om))
    hyp2 = om * om + ka * ka
    names = fit.free
    g = np.zeros(len(names))
    for j, name in enumerate(names):
        if name == "omega":
            g[j] = ka / hyp2
        elif name == "kappa":
            g[j] = -om / hyp2
    t_err = math.degrees(math.sqrt(max(g @ fit.cov @ g, 0.0)))
    phi = fit.values["phase"]
    folded = fold_angle_deg(t)
    flip = bool(math.floor(t / 180.0) % 2)
    if flip:
        phi = -phi  # the normal reversed
    return t, folded, t_err, float(wrap_phase(phi)), flip


def _build_up_points(cum: np.ndarray, n_points: int) -> list[int]:
    """Frame counts at which the accumulated events are about log-spaced."""
    total = float(cum[-1]) if cum.size else 0.0
    if total <= 0 or n_points < 1:
        return []
    lo = max(20.0, total / 1000.0)
    if lo >= total:
        return [int(cum.size)]
    targets = np.geomspace(lo, total, n_points)
    frames = sorted({int(np.searchsorted(cum, t) + 1) for t in targets})
    return [min(f, int(cum.size)) for f in frames]


def _sanitise(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _sanitise(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_sanitise(v) for v in value]
    if hasattr(value, "item"):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def analyze_events(
    events: EventList,
    *,
    dark: DarkReference | None = None,
    roi: Sequence[int] | None = None,
    period_px: float | None = None,
    orientation_deg: float | None = None,
    fix_frequency: bool = False,
    background_rate: float | None = None,
    background_regions: Sequence[Sequence[int]] = (),
    precision: float = 0.01,
    build_up_points: int = 10,
    file: str = "<array>",
) -> FringeResult:
    """Fit the fringes of accumulated photon events by Poisson maximum likelihood.

    Parameters
    ----------
    events : EventList
        Detected events (`detect_stack`).
    dark : DarkReference, optional
        Dark frames: their event rate (same detection and rejection) is the background.
    roi : (X, Y, W, H), optional
        Region holding the pattern; the reference point is its centre.
    period_px, orientation_deg : float, optional
        Known geometry; both given skip the spectral search of the count image.
    fix_frequency : bool
        Hold period and orientation at the given values (needs both).
    background_rate : float, optional
        Known background rate (events per pixel per frame), held fixed.
    background_regions : sequence of (X, Y, W, H)
        Regions outside the pattern (full-frame coordinates) whose events measure the
        background, stray light included; they take precedence over the dark rate.
    precision : float
        Relative visibility precision for ``photons_needed`` (0.01 = 1 %).
    build_up_points : int
        Number of points of the build-up table (0: none).
    file : str
        Name for the result.

    Returns
    -------
    FringeResult
        The measurement keys (``period_px``, ``phase_rad``, ``visibility``,
        ``orientation_deg``, each with ``_err``, ``visibility_raw``, ``snr``,
        ``saturated_fraction``) plus ``photons`` (events in the pattern region),
        ``signal_photons``, ``background_rate`` (with ``_err``, events per pixel per
        frame), ``background_source``, ``signal_rate``, ``visibility_apparent``,
        ``significance`` (Gaussian sigma after the look-elsewhere correction),
        ``significance_local``, ``p_value``, ``p_value_local``, ``lr_statistic``,
        ``lr_dof``, ``trials_factor``, ``photons_needed`` and ``photons_needed_ideal``
        (for ``precision``), ``frames``, ``events_rejected``, ``read_noise_dn`` and
        ``build_up`` (list of dicts: ``frames``, ``photons``, ``visibility``,
        ``visibility_err``, ``phase_rad``, ``phase_rad_err``, ``significance``,
        ``p_value``, ``lr_statistic``).

    Notes
    -----
    The count image is binned across the fringes (bins of at most P/12, strips along the
    fringes for the orientation) and fitted with `fit_poisson_profile`; a first fit at the
    spectral orientation (`fringe.orient.spectral_peak` of the count image) gives a phase
    gradient along the fringes, the bins are re-projected along the refined normal and
    fitted again. ``visibility_raw`` is the modulation of the count image; ``visibility``
    divides it by the transfer of the unit pixel in which events are counted,
    ``sinc(n_x / P) sinc(n_y / P)``. ``snr`` is visibility / visibility_err.

    The local significance is that of the likelihood ratio at a fixed frequency (chi-square
    with 2 degrees of freedom, Wilks). With a searched frequency, Wilks' theorem does not
    hold (the frequency is undefined without fringes) and the p-value is corrected for
    the look-elsewhere effect by the expected Euler characteristic of the search region
    (`search_curvatures_2d`: the annulus of the 2-D spectrum between the shortest and
    longest period searched; `lr_significance`); ``trials_factor`` is the resulting ratio
    p_value / p_value_local. With a fixed frequency no correction applies. The build-up
    fits hold period and orientation at their final values (2 degrees of freedom, no
    correction), so their significance at few photons is optimistic by about the
    look-elsewhere factor.

    References
    ----------
    .. [1] W. Cash, Astrophys. J. 228, 939-947 (1979).
    .. [2] S. S. Wilks, Ann. Math. Statist. 9, 60-62 (1938).
    .. [3] O. Vitells and E. Gross, "Estimating the significance of a signal in a
       multi-dimensional search", Astropart. Phys. 35, 230-234 (2011).
    """
    res = FringeResult(file=file, frame=0)
    h_full, w_full = events.shape
    if roi is not None:
        x0, y0, w, h = _check_region(roi, events.shape, "--roi")
    else:
        x0, y0, w, h = 0, 0, w_full, h_full
    res.set("frames", int(events.n_frames))
    res.set("events_rejected", int(events.n_rejected))
    res.set("read_noise_dn", events.read_noise_dn)
    res.set("threshold_sigma", events.threshold)
    res.set("saturated_fraction", float(events.saturated_fraction))
    res.provenance.append(("events", {"threshold_sigma": events.threshold, "box": events.box,
                                      "noise_dn": events.noise_dn, **events.limits}))
    if h < 8 or w < 8:
        return res.fail(f"region is {w} x {h} pixels, too small to measure fringes (min 8 x 8)")
    full = events.count_image()
    counts = full[y0:y0 + h, x0:x0 + w]
    mask = np.zeros((h, w), dtype=bool)
    regions = [_check_region(r, events.shape, "background region") for r in background_regions]
    for rx, ry, rw, rh in regions:
        ox0, oy0 = max(rx, x0), max(ry, y0)
        ox1, oy1 = min(rx + rw, x0 + w), min(ry + rh, y0 + h)
        if ox1 > ox0 and oy1 > oy0:
            mask[oy0 - y0:oy1 - y0, ox0 - x0:ox1 - x0] = True
    if mask.any():
        res.warn("background regions overlap the pattern region; their pixels were left out "
                 "of the fringe fit")
    if mask.all():
        return res.fail("the background regions cover the whole pattern region")
    n_frames = events.n_frames
    photons = int(counts[~mask].sum())
    res.set("photons", photons)
    if photons < 10:
        return res.fail(f"only {photons} photon events in the region: too few to fit fringes")
    occupancy = photons / (float((~mask).sum()) * n_frames)
    res.set("event_rate", occupancy)
    # Another event within the 5 x 5 neighbourhood of a maximum merges with it.
    loss = -math.expm1(-float(len(_DR)) * occupancy)
    res.set("coincidence_loss", loss)
    if loss > 0.02:
        res.warn(f"about {100 * loss:.0f} % of the events merge with a neighbour "
                 "(coincidence losses, more in the bright fringes): the visibility is "
                 f"biased low by about {100 * loss:.0f} %; reduce the light level per frame")

    # Background data.
    bg_k: list[float] = []
    bg_e: list[float] = []
    limits = events.limits
    dark_rate = None
    if dark is not None:
        if dark.bias.shape != events.shape:
            raise FringeError(f"{dark.name}: shape {dark.bias.shape} does not match frame "
                              f"shape {events.shape}")
        dr, dr_err, dk, de = dark.rate(limits, (x0, y0, w, h))
        dark_rate = (dr, dr_err, dk, de)
        res.set("background_rate_dark", dr, dr_err)
        res.set("dark_frames", dark.n_frames)
    out_rate = None
    if regions:
        ok_ = 0
        ee = 0
        for rx, ry, rw, rh in regions:
            ok_ += int(full[ry:ry + rh, rx:rx + rw].sum())
            ee += rw * rh * n_frames
        out_rate = (ok_ / ee, math.sqrt(max(ok_, 1)) / ee, ok_, ee)
        res.set("background_rate_outside", out_rate[0], out_rate[1])
    if background_rate is not None:
        source = "given"
        b_fixed: float | None = float(background_rate)
    elif out_rate is not None:
        source = "outside"
        b_fixed = None
        bg_k, bg_e = [out_rate[2]], [out_rate[3]]
        if dark_rate is not None:
            res.set("stray_light_rate", out_rate[0] - dark_rate[0],
                    math.hypot(out_rate[1], dark_rate[1]))
    elif dark_rate is not None:
        source = "dark"
        b_fixed = None
        bg_k, bg_e = [dark_rate[2]], [dark_rate[3]]
    else:
        source = "none"
        b_fixed = None
        res.warn("no background measurement (dark frames, background regions or a known "
                 "rate): the background was taken as 0, so the visibility includes its "
                 "dilution (a lower bound)")
    res.set("background_source", source)

    # Geometry.
    extent_min = min(h, w)
    min_period, max_period = 2.0, extent_min / 3.0
    have_geom = period_px is not None and orientation_deg is not None
    if fix_frequency and not have_geom:
        raise FringeError("a fixed frequency needs both the period and the orientation")
    if period_px is not None and not period_px > 0:
        raise FringeError(f"period must be positive, got {period_px}")
    searched = not have_geom
    img = counts.astype(np.float64)
    if searched or period_px is None or orientation_deg is None:
        try:
            peak = spectral_peak(img, mask if mask.any() else None, min_period=min_period,
                                 max_period=max_period)
        except ValueError as exc:
            return res.fail(f"no fringe pattern found: {exc}")
        res.set("spectral_snr", peak.snr)
        t0 = peak.orientation_deg if orientation_deg is None else float(orientation_deg)
        p0 = peak.period_px if period_px is None else float(period_px)
    else:
        t0, p0 = fold_angle_deg(float(orientation_deg)), float(period_px)
    res.provenance.append(("geometry", {"orientation_deg": t0, "period_px": p0,
                                        "searched": searched, "fixed": fix_frequency}))
    tr = math.radians(t0)
    extent_u = abs(math.cos(tr)) * (w - 1) + abs(math.sin(tr)) * (h - 1)
    extent_v = abs(math.sin(tr)) * (w - 1) + abs(math.cos(tr)) * (h - 1)
    bin_width = min(0.25, p0 / 12.0)
    n_strips = int(np.clip(extent_v // 16.0, 2, 8)) if extent_v >= 32 else 1
    if extent_u / bin_width * n_strips > 30_000:
        bin_width = min(p0 / 8.0, extent_u * n_strips / 30_000)
    fit_kw = {"background": b_fixed}
    try:
        if fix_frequency:
            data, prof = _bins(counts, mask if mask.any() else None, orientation_deg=t0,
                               bin_width=bin_width, n_strips=1, n_frames=n_frames)
            data = _with_bg(data, bg_k, bg_e)
            fit = _fit_data(data, period=p0, fix_frequency=True, **fit_kw)
            t_fit = t0
        else:
            data, prof = _bins(counts, mask if mask.any() else None, orientation_deg=t0,
                               bin_width=bin_width, n_strips=n_strips, n_frames=n_frames)
            data = _with_bg(data, bg_k, bg_e)
            fit1 = _fit_data(data, period=p0, fit_kappa=n_strips > 1, **fit_kw)
            t1 = t0 + math.degrees(math.atan2(-fit1.values["kappa"], fit1.values["omega"]))
            p1 = fit1.values["period"]
            data, prof = _bins(counts, mask if mask.any() else None, orientation_deg=t1,
                               bin_width=bin_width, n_strips=n_strips, n_frames=n_frames)
            data = _with_bg(data, bg_k, bg_e)
            fit = _fit_data(data, period=p1, fit_kappa=n_strips > 1, search_width=0.0,
                            **fit_kw)
            t_fit = t1
    except FringeError as exc:
        return res.fail(f"fringe fit failed: {exc}")
    for wmsg in fit.warnings:
        res.warn(wmsg)

    t_unfolded, t_final, t_err, phi, flip = _orientation_after(t_fit, fit)
    period = fit.values["period"]
    if fix_frequency:
        t_err = 0.0
    elif n_strips == 1:
        t_err = math.degrees(period / (math.pi * max(extent_v, 1.0)
                                       * max(fit.sigma_local, 1.0)))
        res.warn("orientation from the spectrum only (region too short along the fringes)")
    if not fix_frequency and 180.0 - t_final < max(2.0 * t_err, 1e-6):
        t_final, phi, flip = 0.0, -phi, not flip
    trad = math.radians(t_final)
    mtf = float(np.sinc(math.cos(trad) / period) * np.sinc(math.sin(trad) / period))
    vis_raw, vis_raw_err = fit.values["visibility"], fit.errors["visibility"]
    b, s = fit.values["background"], fit.values["signal"]
    res.set("orientation_deg", t_final, t_err)
    res.set("period_px", period, fit.errors["period"])
    res.set("phase_rad", phi, fit.errors["phase"])
    res.set("visibility", vis_raw / mtf, vis_raw_err / mtf)
    res.set("visibility_raw", vis_raw, vis_raw_err)
    res.set("pixel_mtf", mtf)
    res.set("snr", vis_raw / vis_raw_err if vis_raw_err > 0 else math.inf)
    res.set("background_rate", b, fit.errors["background"] if b_fixed is None else 0.0)
    res.set("signal_rate", s, fit.errors["signal"])
    res.set("signal_photons", s * fit.exposure)
    res.set("visibility_apparent", s * vis_raw / (b + s) / mtf if b + s > 0 else 0.0)
    res.set("fringes_in_region", extent_u / period)
    res.set("deviance", fit.deviance)
    res.set("bins", fit.n_bins)

    # Significance.
    cell = 8.0 * math.pi / math.sqrt(12.0)  # L1 of a +-2 resolution-cell refinement
    if searched:
        search = search_curvatures_2d((h, w), min_period=min_period, max_period=max_period)
        note = ("frequency searched over the 2-D spectrum: local p-value (chi-square, 2 dof, "
                "Wilks) corrected for the look-elsewhere effect (expected Euler "
                "characteristic of the search region)")
    elif fix_frequency:
        search = (0.0, 0.0)
        note = "frequency fixed: chi-square with 2 dof (Wilks)"
    else:
        search = (2 * cell, cell * cell) if n_strips > 1 else (cell, 0.0)
        note = ("frequency refined near the given one: local p-value (chi-square, 2 dof) "
                "corrected for the look-elsewhere effect within the refinement range")
    _set_significance(res, fit, search, note)
    res.warn_sampling(period, extent_u / period)

    # Photons needed for the chosen precision.
    res.set("precision", float(precision))
    res.set("photons_needed", photons_needed(vis_raw, vis_raw_err, photons, precision))
    res.set("photons_needed_ideal", photons_needed_ideal(vis_raw, precision))

    # Build-up: events accumulated frame by frame, geometry held at the final values.
    if build_up_points > 0:
        inside = events.accepted & (events.x >= x0 - 0.5) & (events.x < x0 + w - 0.5)
        inside &= (events.y >= y0 - 0.5) & (events.y < y0 + h - 0.5)
        per_frame = np.bincount(events.frame[inside], minlength=n_frames)
        cum = np.cumsum(per_frame)
        rows = []
        for nf in _build_up_points(cum, int(build_up_points)):
            sub = events.count_image(frames=nf)[y0:y0 + h, x0:x0 + w]
            kk, ee = list(bg_k), list(bg_e)
            if source == "outside":
                kk = [float(sum(int(events.count_image(frames=nf)[ry:ry + rh, rx:rx + rw]
                                    .sum()) for rx, ry, rw, rh in regions))]
                ee = [float(sum(rw * rh for _, _, rw, rh in regions) * nf)]
            d_sub, _ = _bins(sub, mask if mask.any() else None, orientation_deg=t_unfolded,
                             bin_width=bin_width, n_strips=1, n_frames=nf)
            d_sub = _with_bg(d_sub, kk, ee)
            row = {"frames": int(nf), "photons": int(sub[~mask].sum())}
            try:
                f_sub = _fit_data(d_sub, period=period, fix_frequency=True,
                                  kappa=0.0, **fit_kw)
                ph = -f_sub.values["phase"] if flip else f_sub.values["phase"]
                row.update({
                    "visibility": f_sub.values["visibility"] / mtf,
                    "visibility_err": f_sub.errors["visibility"] / mtf,
                    "phase_rad": float(wrap_phase(ph)),
                    "phase_rad_err": f_sub.errors["phase"],
                    "significance": f_sub.sigma_local,
                    "p_value": f_sub.p_value_local,
                    "lr_statistic": f_sub.lr,
                })
            except FringeError:
                row.update({"visibility": None, "visibility_err": None, "phase_rad": None,
                            "phase_rad_err": None, "significance": None, "p_value": None,
                            "lr_statistic": None})
            rows.append(_sanitise(row))
        res.values["build_up"] = rows
    res.provenance.append(("poisson fit", {"bins": fit.n_bins, "strips": n_strips,
                                           "bin_width_px": bin_width,
                                           "background": source,
                                           "deviance": fit.deviance}))
    res.context.update({"fit": None, "poisson_fit": fit, "count_image": counts})
    return res


def analyze_photons(
    stack: Any,
    *,
    dark: Any = None,
    threshold: float = 5.0,
    box: int = 3,
    read_noise_dn: float | None = None,
    max_area: float | None = None,
    max_charge: float | None = None,
    file: str = "<array>",
    **options: Any,
) -> FringeResult:
    """Detect photon events in a stack and fit its fringes (`detect_stack` + `analyze_events`).

    Parameters
    ----------
    stack : (N, H, W) ndarray or iterable of frames
        Raw low-light frames (DN).
    dark : (K, H, W) ndarray or DarkReference, optional
        Dark frames.
    threshold, box, read_noise_dn, max_area, max_charge
        Detection settings (`detect_stack`).
    file : str
        Name for the result.
    **options
        Options of `analyze_events` (``roi``, ``period_px``, ``orientation_deg``,
        ``fix_frequency``, ``background_rate``, ``background_regions``, ``precision``,
        ``build_up_points``).

    Returns
    -------
    FringeResult

    Examples
    --------
    >>> from fringe.synth import photon_stack
    >>> st, _ = photon_stack(300, (48, 48), period_px=8.0, orientation_deg=20.0,
    ...     visibility=0.9, phase_rad=1.0, photons_per_frame=8, background_per_px=0.0,
    ...     rng=np.random.default_rng(5), read_noise_e=0.02, cosmic_rays_per_frame=0.0)
    >>> r = analyze_photons(st, background_rate=0.0, build_up_points=0)
    >>> abs(r.period_px - 8.0) < 3 * r.period_px_err, r.significance > 10
    (True, True)
    """
    ref = dark
    if dark is not None and not isinstance(dark, DarkReference):
        ref = dark_reference(np.asarray(dark), threshold=threshold, box=box)
    events = detect_stack(stack, dark=ref, threshold=threshold, box=box,
                          read_noise_dn=read_noise_dn, max_area=max_area,
                          max_charge=max_charge)
    return analyze_events(events, dark=ref, file=file, **options)


# --------------------------------------------------------------------------------------------
# counts-versus-position tables
# --------------------------------------------------------------------------------------------


def read_counts_table(path: str | os.PathLike) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Read a CSV table of counts against position from a scanning detector.

    Parameters
    ----------
    path : str or path-like
        CSV file with a header row naming the columns ``position``, ``counts`` and
        optionally ``exposure_s`` (any order, case-insensitive); lines starting with ``#``
        are comments.

    Returns
    -------
    position, counts, exposure : (M,) ndarray
        Exposure is 1 for every row without an ``exposure_s`` column.

    Raises
    ------
    FringeError
        Missing file or column, a value that is not a number, negative or non-integer
        counts, non-positive exposure, fewer than 4 rows.
    """
    name = os.fspath(path)
    try:
        with open(name, newline="", encoding="utf-8-sig") as fh:
            lines = [ln for ln in fh if ln.strip() and not ln.lstrip().startswith("#")]
    except OSError as exc:
        raise FringeError(f"{name}: cannot read ({exc.strerror or exc})") from None
    except UnicodeDecodeError:
        raise FringeError(f"{name}: not a text (CSV) file") from None
    rows = list(csv.reader(lines))
    if not rows:
        raise FringeError(f"{name}: empty table")
    header = [c.strip().lower() for c in rows[0]]
    for need in ("position", "counts"):
        if need not in header:
            raise FringeError(f"{name}: no '{need}' column in the header {rows[0]}")
    ip, ic = header.index("position"), header.index("counts")
    ie = header.index("exposure_s") if "exposure_s" in header else None
    pos, cnt, exp = [], [], []
    for i, row in enumerate(rows[1:], start=2):
        try:
            p = float(row[ip])
            c = float(row[ic])
            e = float(row[ie]) if ie is not None else 1.0
        except (ValueError, IndexError):
            raise FringeError(f"{name}: row {i}: expected numbers, got {row}") from None
        if not (math.isfinite(p) and math.isfinite(c) and math.isfinite(e)):
            raise FringeError(f"{name}: row {i}: non-finite value")
        if c < 0 or c != math.floor(c):
            raise FringeError(f"{name}: row {i}: counts must be non-negative integers, got "
                              f"{row[ic].strip()}")
        if not e > 0:
            raise FringeError(f"{name}: row {i}: exposure must be positive, got {e}")
        pos.append(p)
        cnt.append(c)
        exp.append(e)
    if len(pos) < 4:
        raise FringeError(f"{name}: only {len(pos)} rows, at least 4 are needed")
    return np.array(pos), np.array(cnt), np.array(exp)


def analyze_counts_table(
    table: str | os.PathLike | tuple[np.ndarray, np.ndarray, np.ndarray],
    *,
    period: float | None = None,
    fix_frequency: bool = False,
    background_rate: float | None = None,
    precision: float = 0.01,
    units: str = "position",
    file: str | None = None,
) -> FringeResult:
    """Poisson-likelihood fringe fit of counts against position (scanning detector).

    Parameters
    ----------
    table : path or (position, counts, exposure)
        A CSV file (`read_counts_table`) or the three arrays.
    period : float, optional
        Period in position units (start value, or held with `fix_frequency`). Without it
        the strongest modulation of a periodogram sets the start.
    fix_frequency : bool
        Hold the period.
    background_rate : float, optional
        Known background (counts per unit exposure); else the background is taken as 0
        and the visibility includes it.
    precision : float
        Relative visibility precision for ``photons_needed``.
    units : str
        Name of the position unit, reported as ``period_units``.
    file : str, optional
        Name for the result.

    Returns
    -------
    FringeResult
        ``period_px`` holds the period in the table's position units (the same number as
        ``period``, with ``period_units``), ``phase_rad`` the phase at the centre of the
        scanned range, ``visibility`` (no pixel correction), ``photons``, ``background_rate``,
        ``significance`` and the other keys of `analyze_events` except the orientation
        (reported as 0) and the build-up.

    Notes
    -----
    Model: ``counts_j ~ Poisson(exposure_j (b + s (1 + V cos(2 pi x_j / P + phi))))`` with
    ``x`` the position relative to the centre of the scanned range. Without a given period
    the search covers periods from twice the median step to the scanned span (a
    periodogram, then the likelihood fit); the p-value is corrected for the look-elsewhere
    effect by Davies' upcrossing bound over that range of frequencies [1]_
    (`search_curvatures_1d`, `lr_significance`).

    References
    ----------
    .. [1] R. B. Davies, Biometrika 74, 33-43 (1987).
    .. [2] W. Cash, Astrophys. J. 228, 939-947 (1979).
    """
    if isinstance(table, (str, os.PathLike)):
        name = os.fspath(table) if file is None else file
        pos, cnt, exp = read_counts_table(table)
    else:
        name = "<table>" if file is None else file
        pos, cnt, exp = (np.asarray(a, dtype=np.float64) for a in table)
    res = FringeResult(file=name, frame=0)
    order = np.argsort(pos, kind="stable")
    pos, cnt, exp = pos[order], cnt[order], exp[order]
    centre = 0.5 * (float(pos.min()) + float(pos.max()))
    x = pos - centre
    span = float(np.ptp(x))
    if span <= 0:
        return res.fail("all positions are equal")
    steps = np.diff(pos)
    steps = steps[steps > 0]
    step = float(np.median(steps)) if steps.size else span
    photons = float(cnt.sum())
    res.set("photons", int(photons))
    res.set("period_units", units)
    res.set("reference_position", centre)
    if photons < 10:
        return res.fail(f"only {int(photons)} counts: too few to fit fringes")
    f_lo, f_hi = 1.0 / span, 0.5 / step
    if period is None:
        if fix_frequency:
            raise FringeError("a fixed frequency needs the period")
        rate = photons / float(exp.sum())
        resid = cnt - exp * rate
        freqs = np.arange(f_lo, f_hi + 1e-12, 1.0 / (5.0 * span))
        power = np.abs(_mv(np.exp(-2j * np.pi * np.outer(freqs, x)), resid))
        p0 = 1.0 / float(freqs[int(np.argmax(power))])
        sd = math.sqrt(float(np.average((x - np.average(x, weights=exp)) ** 2, weights=exp)))
        search = search_curvatures_1d(2 * math.pi * (f_hi - f_lo), sd)
        searched = True
    else:
        p0 = float(period)
        search = (0.0, 0.0) if fix_frequency else (8.0 * math.pi / math.sqrt(12.0), 0.0)
        searched = False
    try:
        fit = fit_poisson_profile(x, cnt, exp, period=p0, background=background_rate,
                                  fix_frequency=fix_frequency)
    except FringeError as exc:
        return res.fail(f"fringe fit failed: {exc}")
    for wmsg in fit.warnings:
        res.warn(wmsg)
    if background_rate is None:
        res.warn("no background given: the background was taken as 0, so the visibility "
                 "includes its dilution (a lower bound)")
    vis, vis_err = fit.values["visibility"], fit.errors["visibility"]
    res.set("orientation_deg", 0.0, 0.0)
    res.set("period_px", fit.values["period"], fit.errors["period"])
    res.set("phase_rad", fit.values["phase"], fit.errors["phase"])
    res.set("visibility", vis, vis_err)
    res.set("visibility_raw", vis, vis_err)
    res.set("snr", vis / vis_err if vis_err > 0 else math.inf)
    res.set("saturated_fraction", 0.0)
    b, s = fit.values["background"], fit.values["signal"]
    res.set("background_rate", b, 0.0)
    res.set("background_source", "given" if background_rate is not None else "none")
    res.set("signal_rate", s, fit.errors["signal"])
    res.set("signal_photons", s * fit.exposure)
    res.set("visibility_apparent", s * vis / (b + s) if b + s > 0 else 0.0)
    res.set("fringes_in_region", span / fit.values["period"])
    res.set("deviance", fit.deviance)
    res.set("bins", fit.n_bins)
    _set_significance(
        res, fit, search,
        "frequency searched by periodogram: local p-value (chi-square, 2 dof, Wilks) "
        "corrected for the look-elsewhere effect (Davies' bound)" if searched else
        ("frequency fixed: chi-square with 2 dof (Wilks)" if fix_frequency else
         "frequency refined near the given one: corrected for a few frequencies"))
    res.set("precision", float(precision))
    res.set("photons_needed", photons_needed(vis, vis_err, photons, precision))
    res.set("photons_needed_ideal", photons_needed_ideal(vis, precision))
    res.values["build_up"] = []
    res.provenance.append(("poisson fit", {"bins": fit.n_bins, "units": units}))
    res.context.update({"poisson_fit": fit})
    return res


# --------------------------------------------------------------------------------------------
# command line
# --------------------------------------------------------------------------------------------


def _positive_float(text: str) -> float:
    from fringe.cli import _positive

    return _positive(text)


def _odd_box(text: str) -> int:
    import argparse

    try:
        val = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected an odd integer, got {text!r}") from None
    if val < 1 or val % 2 == 0:
        raise argparse.ArgumentTypeError(f"expected an odd integer >= 1, got {text!r}")
    return val


def add_parser(subparsers: Any) -> None:
    """Register ``fringe photons`` on the sub-command parsers of the CLI."""
    from fringe.cli import _add_geometry, _add_input

    p = subparsers.add_parser(
        "photons", help="photon-counting stacks: events, Poisson fit, build-up",
        description="Detect photon events frame by frame, accumulate them into a count "
                    "image and fit period, phase and visibility by maximum Poisson "
                    "likelihood, with the significance of the fringes and their build-up. "
                    "A CSV input (position, counts[, exposure_s]) from a scanning detector "
                    "is fitted the same way.")
    p.add_argument("stacks", nargs="+", metavar="STACK",
                   help="TIFF stacks of low-light frames, or CSV counts tables")
    p.add_argument("--dark", action="append", default=[], metavar="STACK",
                   help="dark frames (light blocked, same exposure); repeatable")
    p.add_argument("--threshold", type=_positive_float, default=5.0, metavar="SIGMA",
                   help="detection threshold in units of the detection-image noise "
                        "(default 5)")
    p.add_argument("--box", type=_odd_box, default=3, metavar="N",
                   help="side of the summing window of the detection image (odd, default 3)")
    p.add_argument("--read-noise", type=_positive_float, dest="read_noise_dn", metavar="DN",
                   help="read noise in DN (default: estimated from the darks or frames)")
    p.add_argument("--max-cluster-px", type=_positive_float, metavar="PX",
                   help="largest cluster accepted as one photon (default from the data)")
    p.add_argument("--max-charge", type=_positive_float, metavar="DN",
                   help="brightest cluster accepted as one photon (default 15 x median)")
    p.add_argument("--roi", nargs=4, type=int, metavar=("X", "Y", "W", "H"),
                   help="region holding the pattern: top-left column X, row Y, width W, "
                        "height H")
    p.add_argument("--background-roi", nargs=4, type=int, action="append", default=[],
                   metavar=("X", "Y", "W", "H"),
                   help="region outside the pattern that measures the background; "
                        "repeatable")
    p.add_argument("--background-rate", type=float, metavar="R",
                   help="known background, events per pixel per frame (counts per unit "
                        "exposure for tables)")
    p.add_argument("--period-px", type=_positive_float, metavar="P",
                   help="known period (px; position units for tables) as the start")
    p.add_argument("--orientation-deg", type=float, metavar="T",
                   help="known orientation of the fringe normal (deg)")
    p.add_argument("--fix-frequency", action="store_true",
                   help="hold the given period and orientation fixed")
    p.add_argument("--combine", action="store_true",
                   help="accumulate all stacks into one pattern (default: one per stack)")
    p.add_argument("--build-up", type=int, default=10, metavar="N",
                   help="points of the build-up table (default 10, 0 for none)")
    p.add_argument("--precision", type=_positive_float, default=0.01, metavar="F",
                   help="relative visibility precision for the photons-needed estimate "
                        "(default 0.01 = 1 %%)")
    p.add_argument("--units", default="position",
                   help="name of the position unit of CSV tables (default 'position')")
    p.add_argument("--format", choices=["text", "json"], default="text",
                   help="text report or JSON Lines (one object per result)")
    _add_input(p)
    _add_geometry(p)


def _is_table(path: str) -> bool:
    return path.lower().endswith((".csv", ".txt"))


def _geometry(args: Any) -> dict:
    geom: dict = {}
    for key in ("pixel_um", "distance_mm", "slit_separation_um", "wavelength_nm",
                "source_distance_mm", "source_shape"):
        val = getattr(args, key, None)
        if val is not None:
            geom[key] = val
    if getattr(args, "scale_points", None) is not None:
        x1, y1, x2, y2, mm = args.scale_points
        geom["scale_points"] = ((x1, y1), (x2, y2), mm, args.scale_points_err_px)
    return geom


def _io_opts(args: Any) -> dict:
    opts: dict = {"channel": getattr(args, "channel", "auto"),
                  "srgb": getattr(args, "srgb", "auto")}
    if getattr(args, "max_pixels", None):
        opts["max_pixels"] = int(args.max_pixels)
    return opts


def _frames(paths: Sequence[str], opts: dict):
    from fringe import io

    for path in paths:
        yield from io.iter_frames(path, **opts)


def _text_report(res: FringeResult) -> str:
    from fringe.report import format_value, text_table

    extra = [("photons", "photons", ""), ("background_rate", "background", "ev/px/frame"),
             ("significance", "significance", "sigma")]
    out = [text_table([res], extra)]
    if not res.ok:
        return "".join(out)
    d = res.to_dict()
    out.append(f"  significance: {format_value(d.get('significance'))} sigma "
               f"(p = {d.get('p_value'):.3g}; local {format_value(d.get('significance_local'))}"
               f" sigma, likelihood ratio {d.get('lr_statistic'):.4g}, "
               f"{d.get('lr_dof')} dof, trials factor {format_value(d.get('trials_factor'))}: "
               f"{d.get('significance_note')})\n")
    pn = d.get("photons_needed")
    if pn is not None:
        ideal = d.get("photons_needed_ideal")
        out.append(f"  photons needed for {100 * d['precision']:.3g} % on the visibility: "
                   f"{pn:.3g} (Fisher information at the fitted values; background-free "
                   f"bound {ideal:.3g})\n" if ideal is not None else
                   f"  photons needed for {100 * d['precision']:.3g} % on the visibility: "
                   f"{pn:.3g}\n")
    rows = d.get("build_up") or []
    if rows:
        out.append("  build-up (period and orientation held at the final values; "
                   "significance at a fixed frequency, 2 dof):\n")
        out.append(f"  {'frames':>8}  {'photons':>9}  {'visibility':<20}  "
                   f"{'significance':>12}  {'p-value':>9}\n")
        for r in rows:
            vis = format_value(r.get("visibility"), r.get("visibility_err"))
            sig = "-" if r.get("significance") is None else f"{r['significance']:.2f}"
            pv = "-" if r.get("p_value") is None else f"{r['p_value']:.2g}"
            out.append(f"  {r['frames']:>8}  {r['photons']:>9}  {vis:<20}  {sig:>12}  "
                       f"{pv:>9}\n")
    return "".join(out)


def run(args: Any, out: Any, err: Any) -> int:
    """Run ``fringe photons``; returns 0 when every input was analysed, 1 otherwise."""
    from fringe import io
    from fringe.report import json_line

    failed = False
    opts = _io_opts(args)
    geom = _geometry(args)
    regions = [tuple(r) for r in (args.background_roi or [])]
    analysis = {"roi": args.roi, "period_px": args.period_px,
                "orientation_deg": args.orientation_deg, "fix_frequency": args.fix_frequency,
                "background_rate": args.background_rate, "background_regions": regions,
                "precision": args.precision, "build_up_points": max(0, args.build_up)}
    detect = {"threshold": args.threshold, "box": args.box,
              "read_noise_dn": args.read_noise_dn, "max_area": args.max_cluster_px,
              "max_charge": args.max_charge}

    def emit(res: FringeResult) -> None:
        if args.format == "json":
            out.write(json_line(res) + "\n")
        else:
            out.write(_text_report(res))
        out.flush()

    dark = None
    if args.dark:
        try:
            from fringe.cli import expand_paths

            args.dark = expand_paths(args.dark)
            stack = io.read_stack(args.dark, **opts)
            dark = dark_reference(stack, threshold=args.threshold, box=args.box,
                                  name=args.dark[0] if len(args.dark) == 1 else
                                  f"{args.dark[0]} (+{len(args.dark) - 1})")
        except FringeError as exc:
            err.write(f"fringe: {exc}\n")
            return 1
    if getattr(args, "single_aperture", None):
        try:
            levels = []
            for path in args.single_aperture:
                ev = detect_stack(_frames([path], opts), dark=dark, **detect)
                img = ev.count_image()
                if args.roi is not None:
                    x, y, w, h = _check_region(args.roi, ev.shape, "--roi")
                    img = img[y:y + h, x:x + w]
                if img.sum() <= 0:
                    raise FringeError(f"{path}: no photon events in the single-aperture stack")
                levels.append(float(img.sum()) / ev.n_frames)
            geom["intensity_ratio"] = tuple(levels)
        except FringeError as exc:
            err.write(f"fringe: {exc}\n")
            return 1

    tables = [p for p in args.stacks if _is_table(p)]
    stacks = [p for p in args.stacks if not _is_table(p)]
    groups = [stacks] if args.combine and stacks else [[p] for p in stacks]
    jobs: list[tuple[str, list[str]]] = [("table", [p]) for p in tables]
    jobs += [("stack", g) for g in groups]
    jobs.sort(key=lambda j: args.stacks.index(j[1][0]))
    for kind, paths in jobs:
        name = paths[0] if len(paths) == 1 else f"{paths[0]} (+{len(paths) - 1})"
        try:
            if kind == "table":
                res = analyze_counts_table(paths[0], period=args.period_px,
                                           fix_frequency=args.fix_frequency,
                                           background_rate=args.background_rate,
                                           precision=args.precision, units=args.units)
            else:
                events = detect_stack(_frames(paths, opts), dark=dark, **detect)
                res = analyze_events(events, dark=dark, file=name, **analysis)
            if res.ok and geom:
                from fringe import infer

                infer.infer_into(res, **geom)
        except FringeError as exc:
            msg = str(exc).split("\n")[0]
            known = [*paths] + ([dark.name] if dark is not None else [])
            if not any(msg.startswith(k) for k in known):
                msg = f"{name}: {msg}"
            err.write(f"fringe: {msg}\n")
            res = FringeResult(file=name, frame=0).fail(msg)
            failed = True
            emit(res)
            continue
        if not res.ok:
            failed = True
            err.write(f"fringe: {res.file}: {res.error}\n")
        res.values = _sanitise(res.values)
        emit(res)
    return 1 if failed else 0
