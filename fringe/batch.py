"""Batch measurement of stacks, image files, folders and globs: ``fringe batch``.

Every frame of every input is measured with the same pipeline as ``fringe measure`` and
written as one row of a CSV (or JSON Lines) table, in frame order, as soon as it and all
frames before it are done. The phase is unwrapped along each stack's frame order and a
per-stack summary of the stability figures an interferometer check needs (period and
visibility spread, phase drift rate, phase jitter, visibility drops) is printed and
written beside the table.

Design
------
* Streaming: frames are read one page at a time; the parent process never holds image
  data, only a few numbers per frame for the summary.
* Parallel: a process pool receives (file, frame indices); each worker opens the file
  itself and keeps it open for its next task. At most ``2 * workers`` tasks are in flight
  and a small reorder buffer puts the results back into frame order, so memory stays flat
  however long the stack is.
* Nothing lost: each row is written and flushed on its own. A killed run leaves a valid
  table of completed frames (at worst a truncated last line, which ``resume`` drops);
  ``resume`` skips the (file, frame) pairs already present and carries on the phase
  unwrapping from the last row.
* Optional Dask: the same tasks run on a ``dask.distributed`` cluster.
"""

from __future__ import annotations

import csv
import io as _stdio
import json
import math
import os
import signal
import threading
import time
from array import array
from collections import deque
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any, TextIO

import numpy as np

from fringe._util import FringeError, atomic_output
from fringe.result import MEASURED_KEYS
from fringe.result import jsonable as _jsonable

__all__ = [
    "IMAGE_EXTENSIONS",
    "BatchOptions",
    "BatchOutcome",
    "DriftFit",
    "PhaseUnwrapper",
    "add_parser",
    "drift_fit",
    "expand_inputs",
    "run",
    "run_batch",
    "stack_summary",
    "summary_paths",
    "summary_text",
]

#: File name endings taken from folders and glob matches (case-insensitive).
IMAGE_EXTENSIONS: tuple[str, ...] = (".tif", ".tiff", ".png", ".jpg", ".jpeg")

_TWO_PI = 2.0 * math.pi
_MAD_TO_SIGMA = 1.482602218505602  # 1 / Phi^-1(3/4): MAD of a normal sample -> sigma
_JSON_EXTENSIONS = (".jsonl", ".ndjson", ".json")
_INTERRUPTED = 130

# Columns of the CSV table, in order. Keys a result carries that are not listed here go
# into the last column, "extra", as one JSON object, so that nothing is dropped.
_FIRST = ["file", "frame", "status", "error"]
_MEASURED = list(MEASURED_KEYS)  # each with its "_err" partner
_CORE_EXTRA = [
    "phase_unwrapped_rad",
    "snr", "spectral_snr", "saturated_fraction", "mean_level", "amplitude", "pixel_noise",
    "pixel_mtf", "fringes_in_region", "envelope_terms", "chi2_red",
    "envelope_zero_px", "envelope_zero_px_err", "envelope_visibility",
    "envelope_visibility_err", "envelope_centre_x_px", "envelope_centre_y_px",
    "phase_at_envelope_rad",
]
_INFER_WITH_ERR = [
    "pixel_scale_um", "fringe_spacing_mm", "wavelength_nm", "slit_separation_um",
    "predicted_period_px", "distance_mm", "slit_width_um", "coherence_degree",
    "source_size_um", "source_angle_mrad", "coherence_length_um", "bandwidth_nm",
]
_INFER_PLAIN = [
    "small_angle_error", "separation_to_width", "missing_orders", "intensity_balance",
    "coherence_lobe", "source_shape", "coherence_length_min_um",
]
_GEOMETRY_OPTIONS = ("pixel_um", "distance_mm", "slit_separation_um", "wavelength_nm",
                     "source_distance_mm", "source_shape", "scale_points", "single_aperture",
                     "intensity_ratio")


def _columns(with_inference: bool) -> list[str]:
    cols = list(_FIRST)
    for key in _MEASURED:
        cols += [key, key + "_err"]
    cols += _CORE_EXTRA
    if with_inference:
        for key in _INFER_WITH_ERR:
            cols += [key, key + "_err"]
        cols += _INFER_PLAIN
    return cols + ["warnings", "extra"]


# --------------------------------------------------------------------------------------------
# inputs
# --------------------------------------------------------------------------------------------


def _is_image_name(name: str) -> bool:
    base = os.path.basename(name)
    return not base.startswith(".") and base.lower().endswith(IMAGE_EXTENSIONS)


def _folder_images(folder: str) -> list[str]:
    try:
        names = sorted(os.listdir(folder))
    except OSError as exc:
        raise FringeError(f"{folder}: cannot list the folder ({exc.strerror or exc})") from exc
    return [os.path.join(folder, n) for n in names
            if _is_image_name(n) and os.path.isfile(os.path.join(folder, n))]


def expand_inputs(inputs: Sequence[str | os.PathLike]) -> tuple[list[str], list[str]]:
    """Expand files, folders and glob patterns into the list of image files to measure.

    Parameters
    ----------
    inputs : sequence of str or path-like
        Image files (taken as given, whatever their name), folders (their image files,
        not recursive, sorted by name) and glob patterns (``*``, ``?``, ``[...]``; ``**``
        matches folders recursively), whose matches are filtered to image files.

    Returns
    -------
    files : list of str
        Image files in input order, each once (the first occurrence wins).
    problems : list of str
        One line per input that gave no file, naming it.

    Notes
    -----
    Image files are those ending in one of `IMAGE_EXTENSIONS`; names starting with a dot
    are skipped. A path that exists is never treated as a pattern.

    Examples
    --------
    >>> expand_inputs(["no/such/file.tif"])
    ([], ['no/such/file.tif: no such file or folder'])
    """
    import glob

    files: list[str] = []
    problems: list[str] = []
    seen: set[str] = set()
    for item in inputs:
        name = os.fsdecode(item)
        try:
            if os.path.isdir(name):
                found = _folder_images(name)
                if not found:
                    exts = ", ".join(IMAGE_EXTENSIONS)
                    problems.append(f"{name}: folder holds no image files ({exts})")
            elif os.path.exists(name):
                found = [name]
            elif any(c in name for c in "*?["):
                found = []
                for hit in sorted(glob.glob(name, recursive=True)):
                    if os.path.isdir(hit):
                        found += _folder_images(hit)
                    elif _is_image_name(hit):
                        found.append(hit)
                if not found:
                    problems.append(f"{name}: no image files match this pattern")
            else:
                found = []
                problems.append(f"{name}: no such file or folder")
        except FringeError as exc:
            problems.append(str(exc))
            continue
        for f in found:
            key = os.path.normcase(os.path.abspath(f))
            if key not in seen:
                seen.add(key)
                files.append(f)
    return files, problems


def summary_paths(out_path: str | os.PathLike) -> tuple[str, str]:
    """Paths of the JSON and text summaries written beside a results table.

    Examples
    --------
    >>> summary_paths("run/results.csv")
    ('run/results.summary.json', 'run/results.summary.txt')
    """
    base = os.path.splitext(os.fsdecode(out_path))[0]
    return base + ".summary.json", base + ".summary.txt"


# --------------------------------------------------------------------------------------------
# phase unwrapping, drift fit and the per-stack summary (pure functions)
# --------------------------------------------------------------------------------------------


class PhaseUnwrapper:
    """Unwrap a phase series one value at a time, exactly as `numpy.unwrap` does at once.

    The state is the last wrapped value and an integer number of turns, so that the
    unwrapping can be resumed from a stored (wrapped, unwrapped) pair with the same result.

    Notes
    -----
    With d the difference between consecutive wrapped phases, the number of turns k changes
    by ``round((d' - d) / 2 pi)`` whenever ``|d| >= pi``, where d' = d folded into
    [-pi, pi) (and +pi for d > 0 on the boundary); the unwrapped phase is
    ``phi + 2 pi k``. This is Itoh's condition: the true phase changes by less than pi
    between consecutive samples.

    References
    ----------
    .. [1] K. Itoh, "Analysis of the phase unwrapping algorithm", Appl. Opt. 21(14), 2470
       (1982).

    Examples
    --------
    >>> u = PhaseUnwrapper()
    >>> [round(u.push(p), 3) for p in (3.0, -3.0, -1.0)]
    [3.0, 3.283, 5.283]
    """

    def __init__(self) -> None:
        self._last: float | None = None
        self._turns = 0

    @classmethod
    def resume_from(cls, wrapped: float, unwrapped: float) -> PhaseUnwrapper:
        """An unwrapper whose last value was `wrapped`, unwrapped to `unwrapped` (rad)."""
        u = cls()
        u._last = float(wrapped)
        u._turns = int(round((float(unwrapped) - float(wrapped)) / _TWO_PI))
        return u

    @property
    def turns(self) -> int:
        """Whole turns added to the last wrapped value."""
        return self._turns

    def push(self, wrapped: float) -> float:
        """Unwrap the next value of the series (rad); returns the unwrapped phase (rad)."""
        p = float(wrapped)
        if self._last is not None:
            d = p - self._last
            if abs(d) >= math.pi:
                dmod = (d + math.pi) % _TWO_PI - math.pi
                if dmod == -math.pi and d > 0:
                    dmod = math.pi
                self._turns += int(round((dmod - d) / _TWO_PI))
        self._last = p
        return p + _TWO_PI * self._turns


@dataclass(frozen=True)
class DriftFit:
    """Straight line phase = intercept + slope * x fitted by weighted least squares.

    Attributes
    ----------
    slope, slope_err : float
        Drift rate and its 1-sigma uncertainty (phase unit per x unit).
    intercept, intercept_err : float
        Phase at x = 0 and its uncertainty.
    chi2_red : float
        Weighted residual sum of squares over N - 2 (NaN for N = 2).
    residuals : ndarray, shape (N,)
        phase - fitted line.
    weighted : bool
        True when the points were weighted by their uncertainties.
    """

    slope: float
    slope_err: float
    intercept: float
    intercept_err: float
    chi2_red: float
    residuals: np.ndarray
    weighted: bool


def drift_fit(x: np.ndarray, phase_rad: np.ndarray, *,
              sigma_rad: np.ndarray | None = None) -> DriftFit:
    """Fit a straight line to an unwrapped phase series (the drift) with its uncertainty.

    Parameters
    ----------
    x : (N,) array_like
        Frame numbers (or times); N >= 2 distinct values.
    phase_rad : (N,) array_like
        Unwrapped phase, radians.
    sigma_rad : (N,) array_like, optional
        1-sigma uncertainty of each phase. Non-finite or non-positive entries are replaced
        by the largest valid one; without any valid one the fit is unweighted.

    Returns
    -------
    DriftFit
        Slope (rad per unit of x), intercept, uncertainties, reduced chi-square, residuals.

    Notes
    -----
    Weights w_i = 1 / sigma_i**2. With x centred on its weighted mean, xc = x - xbar,

    .. math::

        b = \\frac{\\sum w_i x_{c,i} y_i}{\\sum w_i x_{c,i}^2}, \\qquad
        \\sigma_b^2 = \\frac{s}{\\sum w_i x_{c,i}^2},

    with s = max(1, chi2 / (N - 2)) for weighted fits (the stated uncertainties are a
    floor; scatter beyond them, such as real phase jitter, scales the uncertainty up:
    Birge's ratio) and s = chi2 / (N - 2) for unweighted fits (weights known only
    relatively), which is also what ``numpy.polyfit(..., cov=True)`` does.

    References
    ----------
    .. [1] P. R. Bevington and D. K. Robinson, Data Reduction and Error Analysis for the
       Physical Sciences, 3rd ed., McGraw-Hill (2003), ch. 6 (straight-line fit).
    .. [2] R. T. Birge, "The calculation of errors by the method of least squares",
       Phys. Rev. 40, 207 (1932).

    Examples
    --------
    >>> f = drift_fit([0, 1, 2, 3], [0.1, 0.6, 1.1, 1.6])
    >>> round(f.slope, 12), round(f.intercept, 12)
    (0.5, 0.1)
    """
    xa = np.asarray(x, dtype=np.float64).ravel()
    ya = np.asarray(phase_rad, dtype=np.float64).ravel()
    n = xa.size
    if ya.size != n:
        raise FringeError(f"drift fit: {n} x values but {ya.size} phases")
    if n < 2 or not np.all(np.isfinite(xa)) or not np.all(np.isfinite(ya)):
        raise FringeError("drift fit: needs at least 2 finite points")
    weighted = False
    w = np.ones(n)
    if sigma_rad is not None:
        s = np.asarray(sigma_rad, dtype=np.float64).ravel()
        if s.size != n:
            raise FringeError(f"drift fit: {n} phases but {s.size} uncertainties")
        good = np.isfinite(s) & (s > 0)
        if good.any():
            s = np.where(good, s, np.max(s[good]))
            w = 1.0 / s**2
            weighted = True
    sw = float(np.sum(w))
    xbar = float(np.sum(w * xa)) / sw
    xc = xa - xbar
    sxx = float(np.sum(w * xc * xc))
    if not sxx > 0:
        raise FringeError("drift fit: needs at least 2 distinct frame numbers")
    slope = float(np.sum(w * xc * ya)) / sxx
    ybar = float(np.sum(w * ya)) / sw
    intercept = ybar - slope * xbar
    resid = ya - (intercept + slope * xa)
    dof = n - 2
    chi2 = float(np.sum(w * resid**2))
    chi2_red = chi2 / dof if dof > 0 else math.nan
    if dof > 0:
        scale = max(1.0, chi2_red) if weighted else chi2_red
    else:
        scale = 1.0 if weighted else math.nan
    var_b = scale / sxx
    var_a = scale * (1.0 / sw + xbar**2 / sxx)
    return DriftFit(slope=slope, slope_err=math.sqrt(var_b), intercept=intercept,
                    intercept_err=math.sqrt(var_a), chi2_red=chi2_red, residuals=resid,
                    weighted=weighted)


def _finite(a: np.ndarray) -> np.ndarray:
    return a[np.isfinite(a)]


def _spread(values: np.ndarray) -> dict[str, float | None]:
    v = _finite(values)
    if v.size == 0:
        return {"mean": None, "std": None, "min": None, "max": None}
    return {"mean": float(np.mean(v)), "std": float(np.std(v, ddof=1)) if v.size > 1 else None,
            "min": float(np.min(v)), "max": float(np.max(v))}


def stack_summary(
    position: np.ndarray,
    period_px: np.ndarray,
    visibility: np.ndarray,
    phase_unwrapped_rad: np.ndarray,
    *,
    phase_err_rad: np.ndarray | None = None,
    visibility_err: np.ndarray | None = None,
    frame_interval_s: float | None = None,
    drop_fraction: float | None = None,
    drop_sigma: float = 3.0,
) -> dict[str, Any]:
    """Stability figures of one stack from its per-frame measurements.

    Parameters
    ----------
    position : (N,) array_like of int
        Frame number of each measured frame in the stack's frame order.
    period_px, visibility : (N,) array_like
        Fringe period (px) and visibility of each frame (NaN where missing).
    phase_unwrapped_rad : (N,) array_like
        Phase unwrapped along the frame order (rad; NaN where missing).
    phase_err_rad, visibility_err : (N,) array_like, optional
        1-sigma uncertainties, used as fit weights and as a floor of the drop threshold.
    frame_interval_s : float, optional
        Time between frames; adds rates per second.
    drop_fraction : float, optional
        Flag frames whose visibility is below ``(1 - drop_fraction) * median``. Default:
        below ``median - drop_sigma * sigma_r``.
    drop_sigma : float
        Threshold in robust standard deviations for the default rule.

    Returns
    -------
    dict
        ``frames_measured``; ``period_px_mean``/``_std``/``_min``/``_max`` and the same for
        ``visibility`` (plus ``visibility_median``); ``phase_drift_rad_per_frame`` and its
        ``_err``, ``drift_chi2_red``, ``drift_weighted``; with a frame interval
        ``phase_drift_rad_per_s``, ``phase_drift_waves_per_s`` and their ``_err``;
        ``phase_jitter_rms_rad`` and ``phase_jitter_rms_waves``; ``phase_ptp_waves``
        (drift included) and ``phase_residual_ptp_waves`` (drift removed);
        ``visibility_drop_threshold``, ``visibility_drop_rule`` and
        ``visibility_drop_frames``. Values that need more frames are None.

    Notes
    -----
    Spread is the sample standard deviation (ddof = 1). The drift is the slope of
    `drift_fit` of the unwrapped phase against the frame number (N >= 3); the jitter is
    the RMS (ddof = 0) of its residuals. Peak-to-peak values are max - min over 2 pi.
    The robust standard deviation is sigma_r = max(1.4826 MAD, median visibility_err):
    1.4826 MAD estimates sigma of a normal sample and is insensitive to the drops
    themselves; the floor keeps drops smaller than the measurement uncertainty (as in
    noise-free data, MAD = 0) from being flagged.

    References
    ----------
    .. [1] F. R. Hampel, "The influence curve and its role in robust estimation",
       J. Am. Stat. Assoc. 69(346), 383 (1974) (median absolute deviation).
    .. [2] P. R. Bevington and D. K. Robinson, Data Reduction and Error Analysis for the
       Physical Sciences, 3rd ed., McGraw-Hill (2003), ch. 6.

    Examples
    --------
    >>> s = stack_summary([0, 1, 2, 3], [10.0] * 4, [0.5, 0.5, 0.5, 0.1],
    ...                   [0.0, 0.2, 0.4, 0.6])
    >>> round(s["phase_drift_rad_per_frame"], 12), s["visibility_drop_frames"]
    (0.2, [3])
    """
    pos = np.asarray(position, dtype=np.int64).ravel()
    per = np.asarray(period_px, dtype=np.float64).ravel()
    vis = np.asarray(visibility, dtype=np.float64).ravel()
    ph = np.asarray(phase_unwrapped_rad, dtype=np.float64).ravel()
    n = pos.size
    if not (per.size == vis.size == ph.size == n):
        raise FringeError("stack summary: position, period, visibility and phase differ in "
                          "length")
    perr = (np.full(n, np.nan) if phase_err_rad is None
            else np.asarray(phase_err_rad, dtype=np.float64).ravel())
    verr = (np.full(n, np.nan) if visibility_err is None
            else np.asarray(visibility_err, dtype=np.float64).ravel())
    if drop_fraction is not None and not 0.0 < float(drop_fraction) < 1.0:
        raise FringeError(f"drop_fraction must be between 0 and 1, got {drop_fraction!r}")
    if not float(drop_sigma) > 0:
        raise FringeError(f"drop_sigma must be positive, got {drop_sigma!r}")
    out: dict[str, Any] = {"frames_measured": int(n)}
    for key, values in (("period_px", per), ("visibility", vis)):
        for stat, val in _spread(values).items():
            out[f"{key}_{stat}"] = val
    fv = np.isfinite(vis)
    out["visibility_median"] = float(np.median(vis[fv])) if fv.any() else None

    # Phase drift and jitter.
    keys = ("phase_drift_rad_per_frame", "phase_drift_rad_per_frame_err", "drift_chi2_red",
            "drift_weighted", "phase_jitter_rms_rad", "phase_jitter_rms_waves",
            "phase_ptp_waves", "phase_residual_ptp_waves")
    out.update(dict.fromkeys(keys))
    good = np.isfinite(ph)
    if good.sum() >= 2:
        out["phase_ptp_waves"] = float(np.ptp(ph[good])) / _TWO_PI
    if good.sum() >= 3 and np.unique(pos[good]).size >= 3:
        fit = drift_fit(pos[good], ph[good], sigma_rad=perr[good])
        out["phase_drift_rad_per_frame"] = fit.slope
        out["phase_drift_rad_per_frame_err"] = fit.slope_err
        out["drift_chi2_red"] = fit.chi2_red
        out["drift_weighted"] = fit.weighted
        rms = float(np.sqrt(np.mean(fit.residuals**2)))
        out["phase_jitter_rms_rad"] = rms
        out["phase_jitter_rms_waves"] = rms / _TWO_PI
        out["phase_residual_ptp_waves"] = float(np.ptp(fit.residuals)) / _TWO_PI
    out["frame_interval_s"] = None if frame_interval_s is None else float(frame_interval_s)
    for key in ("phase_drift_rad_per_s", "phase_drift_rad_per_s_err",
                "phase_drift_waves_per_s", "phase_drift_waves_per_s_err"):
        out[key] = None
    if frame_interval_s is not None and out["phase_drift_rad_per_frame"] is not None:
        dt = float(frame_interval_s)
        if not dt > 0:
            raise FringeError(f"frame interval must be positive, got {frame_interval_s!r}")
        out["phase_drift_rad_per_s"] = out["phase_drift_rad_per_frame"] / dt
        out["phase_drift_rad_per_s_err"] = out["phase_drift_rad_per_frame_err"] / dt
        out["phase_drift_waves_per_s"] = out["phase_drift_rad_per_s"] / _TWO_PI
        out["phase_drift_waves_per_s_err"] = out["phase_drift_rad_per_s_err"] / _TWO_PI

    # Visibility drops.
    out["visibility_drop_threshold"] = None
    out["visibility_drop_frames"] = []
    if drop_fraction is not None:
        out["visibility_drop_rule"] = f"below (1 - {float(drop_fraction):g}) x median"
    else:
        out["visibility_drop_rule"] = f"below median - {float(drop_sigma):g} robust sigma"
    if fv.sum() >= 3:
        v = vis[fv]
        med = float(np.median(v))
        if drop_fraction is not None:
            thr = (1.0 - float(drop_fraction)) * med
        else:
            sig = _MAD_TO_SIGMA * float(np.median(np.abs(v - med)))
            ve = verr[fv]
            ve = ve[np.isfinite(ve) & (ve > 0)]
            if ve.size:
                sig = max(sig, float(np.median(ve)))
            thr = med - float(drop_sigma) * sig
        out["visibility_drop_threshold"] = thr
        out["visibility_drop_frames"] = [int(p) for p in pos[fv][v < thr]]
    return out


# --------------------------------------------------------------------------------------------
# work done in the worker processes
# --------------------------------------------------------------------------------------------


@dataclass
class _Config:
    """Everything a worker needs to measure a frame (pickled once per worker)."""

    cal: Any
    roi: tuple[int, int, int, int] | None
    options: dict
    io_opts: dict


class _Reader:
    """Random access to the frames of one file, kept open between tasks."""

    def __init__(self, path: str, io_opts: dict):
        from fringe import io

        self.path = path
        self.io_opts = io_opts
        self._src = None
        name, fmt = io._sniff(path)
        if fmt == "tiff" and hasattr(io, "_TiffSource"):
            self._src = io._TiffSource(name)

    def frame(self, index: int):
        from fringe import io

        src = self._src
        if src is None:
            return io.read_frame(self.path, index, **self.io_opts)
        if not 0 <= index < src.n:
            raise FringeError(f"{self.path}: frame {index} requested but the file holds "
                              f"{src.n} frame" + ("s" if src.n != 1 else ""))
        return src.frame(index, channel=self.io_opts.get("channel", "auto"),
                         srgb=self.io_opts.get("srgb", "auto"),
                         max_pixels=self.io_opts.get("max_pixels", io.DEFAULT_MAX_PIXELS),
                         margin=io.SATURATION_MARGIN)

    def close(self) -> None:
        if self._src is not None:
            self._src.close()
            self._src = None


_LOCAL = threading.local()
_WORKER_CONFIG: _Config | None = None


def _reader_for(path: str, io_opts: dict) -> _Reader:
    cached = getattr(_LOCAL, "reader", None)
    if cached is not None and cached.path == path and cached.io_opts == io_opts:
        return cached
    if cached is not None:
        cached.close()
        _LOCAL.reader = None
    reader = _Reader(path, io_opts)
    _LOCAL.reader = reader
    return reader


def _fail_row(path: str, frame: int | None, message: str) -> dict:
    from fringe.result import FringeResult

    res = FringeResult(file=path, frame=0).fail(" ".join(str(message).split()))
    row = res.to_dict()
    row["frame"] = frame
    return row


def _measure_chunk(config: _Config, path: str, frames: Sequence[int],
                   geometry: tuple[float, float] | None, keep_open: bool = True) -> list[dict]:
    """Measure frames of one file; one row dict per frame, errors as error rows.

    With `keep_open` the file stays open for the next task of this thread (process pool
    workers, in-process runs); otherwise it is closed before returning (Dask tasks, which
    may run on threads that are never told to close it).
    """
    from fringe.analyze import _inference, _measure_frame

    options = dict(config.options)
    if geometry is not None:
        options["orientation_deg"], options["period_px"] = geometry
        options["fast"] = True  # one projection and a linearised fit along the known normal
    infer_fn = _inference(options)
    rows = []
    for index in frames:
        try:
            reader = _reader_for(path, config.io_opts)
            frame = reader.frame(int(index))
            res = _measure_frame(frame, config.cal, config.roi, options, infer_fn)
            row = res.to_dict()
        except FringeError as exc:
            row = _fail_row(path, int(index), str(exc).split("\n")[0])
        except MemoryError:
            row = _fail_row(path, int(index), "out of memory while measuring this frame")
        except Exception as exc:  # a bad frame must not stop the batch
            row = _fail_row(path, int(index), f"internal error: {type(exc).__name__}: {exc}")
        row["file"] = path
        row["frame"] = int(index)
        rows.append(row)
    if not keep_open:
        reader = getattr(_LOCAL, "reader", None)
        if reader is not None:
            reader.close()
            _LOCAL.reader = None
    return rows


def _dask_task(config: _Config, path: str, frames: Sequence[int],
               geometry: tuple[float, float] | None) -> list[dict]:
    return _measure_chunk(config, path, frames, geometry, keep_open=False)


def _init_worker(config: _Config) -> None:
    global _WORKER_CONFIG
    # Ctrl-C is the parent's to handle: it stops submitting and terminates the workers.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _WORKER_CONFIG = config


def _pool_task(path: str, frames: Sequence[int],
               geometry: tuple[float, float] | None) -> list[dict]:
    assert _WORKER_CONFIG is not None
    return _measure_chunk(_WORKER_CONFIG, path, frames, geometry)


# --------------------------------------------------------------------------------------------
# back ends: in-process, process pool, Dask
# --------------------------------------------------------------------------------------------


class _DaskMissing(Exception):
    pass


class _SerialBackend:
    """Measure in the calling process (one worker); futures are already done."""

    name = "serial"

    def __init__(self, config: _Config):
        self.config = config

    def submit(self, path, frames, geometry):
        from concurrent.futures import Future

        fut: Future = Future()
        try:
            fut.set_result(_measure_chunk(self.config, path, frames, geometry))
        except BaseException as exc:  # noqa: B036 - handed to the caller through the future
            if isinstance(exc, KeyboardInterrupt):
                raise
            fut.set_exception(exc)
        return fut

    def restart(self) -> None:
        pass

    def close(self, terminate: bool = False) -> None:
        reader = getattr(_LOCAL, "reader", None)
        if reader is not None:
            reader.close()
            _LOCAL.reader = None


class _PoolBackend:
    """A process pool; each worker opens the files itself."""

    name = "processes"

    def __init__(self, config: _Config, workers: int):
        self.config = config
        self.workers = workers
        self._start()

    def _start(self) -> None:
        import multiprocessing as mp
        from concurrent.futures import ProcessPoolExecutor

        methods = mp.get_all_start_methods()
        method = "forkserver" if "forkserver" in methods else "spawn"
        ctx = mp.get_context(method)
        if method == "forkserver":
            ctx.set_forkserver_preload(["fringe.batch", "fringe.analyze"])
        self.pool = ProcessPoolExecutor(max_workers=self.workers, mp_context=ctx,
                                        initializer=_init_worker, initargs=(self.config,))

    def submit(self, path, frames, geometry):
        return self.pool.submit(_pool_task, path, list(frames), geometry)

    def restart(self) -> None:
        self.close(terminate=True)
        self._start()

    def close(self, terminate: bool = False) -> None:
        pool = self.pool
        if terminate:
            if hasattr(pool, "terminate_workers"):
                pool.terminate_workers()
            else:
                for proc in list((getattr(pool, "_processes", None) or {}).values()):
                    try:
                        proc.terminate()
                    except Exception:  # already gone
                        pass
        pool.shutdown(wait=True, cancel_futures=True)


class _DaskBackend:
    """Tasks on a dask.distributed cluster (an address, "local" or a Client)."""

    name = "dask"

    def __init__(self, config: _Config, cluster: Any, workers: int):
        try:
            import distributed
        except ImportError:
            raise _DaskMissing() from None
        self._own: list[Any] = []
        if isinstance(cluster, distributed.Client):
            client = cluster
        elif cluster == "local":
            lc = distributed.LocalCluster(n_workers=workers, threads_per_worker=1,
                                          processes=True, dashboard_address=None)
            self._own.append(lc)
            client = distributed.Client(lc)
            self._own.insert(0, client)
        else:
            try:
                client = distributed.Client(cluster, timeout="20s")
            except Exception as exc:
                raise FringeError(f"{cluster}: cannot connect to the Dask scheduler "
                                  f"({type(exc).__name__}: {exc})") from None
            self._own.append(client)
        self.client = client
        try:  # keep every thread of the cluster busy
            self.workers = max(1, int(sum(client.nthreads().values())))
        except Exception:
            self.workers = workers
        self._config = client.scatter(config, broadcast=True, hash=False)
        self.executor = client.get_executor(pure=False)

    def submit(self, path, frames, geometry):
        return self.executor.submit(_dask_task, self._config, path, list(frames), geometry)

    def restart(self) -> None:
        pass

    def close(self, terminate: bool = False) -> None:
        try:
            self.executor.shutdown(wait=not terminate)
        except Exception:
            pass
        for obj in self._own:
            try:
                obj.close()
            except Exception:
                pass


class _OneThreadPerLibrary:
    """Ask numerical libraries in worker processes for one thread each (if not set)."""

    _VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")

    def __enter__(self):
        self._saved = {k: os.environ.get(k) for k in self._VARS}
        for k in self._VARS:
            os.environ.setdefault(k, "1")
        return self

    def __exit__(self, *exc):
        for k, v in self._saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v
        return False


# --------------------------------------------------------------------------------------------
# output tables
# --------------------------------------------------------------------------------------------


def _cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value) if math.isfinite(value) else ""
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (list, tuple, dict)):
        return json.dumps(value, default=str)
    return " ".join(str(value).split())


class _CsvTable:
    def __init__(self, fh: TextIO, columns: list[str], write_header: bool):
        self.fh = fh
        self.columns = columns
        self._known = set(columns)
        if write_header:
            self._line(columns)

    def _line(self, cells: list[str]) -> None:
        buf = _stdio.StringIO()
        csv.writer(buf, lineterminator="\n").writerow(cells)
        self.fh.write(buf.getvalue())
        self.fh.flush()

    def write(self, row: dict) -> None:
        cells = []
        for c in self.columns:
            if c == "warnings":
                cells.append(_cell("; ".join(row.get("warnings") or [])))
            elif c == "extra":
                extra = {k: v for k, v in row.items()
                         if k not in self._known and v is not None}
                cells.append(json.dumps(extra, default=str, allow_nan=False) if extra else "")
            else:
                cells.append(_cell(row.get(c)))
        self._line(cells)


class _JsonTable:
    def __init__(self, fh: TextIO):
        self.fh = fh

    def write(self, row: dict) -> None:
        clean = {k: (None if isinstance(v, float) and not math.isfinite(v) else v)
                 for k, v in row.items()}
        self.fh.write(json.dumps(clean, allow_nan=False, default=str) + "\n")
        self.fh.flush()


def _ordered_row(row: dict) -> dict:
    """The row with phase_unwrapped_rad placed after phase_rad_err."""
    out: dict = {}
    for k, v in row.items():
        if k == "phase_unwrapped_rad":
            continue
        out[k] = v
        if k == "phase_rad_err":
            out["phase_unwrapped_rad"] = row.get("phase_unwrapped_rad")
    out.setdefault("phase_unwrapped_rad", row.get("phase_unwrapped_rad"))
    return out


def _num(value: Any) -> float | None:
    if value is None or value == "":
        return None
    try:
        f = float(value)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


class _ExistingTable:
    """Stream the rows of an existing table (for resuming), one line at a time.

    After `rows` is exhausted, `valid` is the byte length of the complete lines: a last
    line without its newline (an interrupted write) is not returned. A complete line that
    cannot be parsed raises FringeError.
    """

    def __init__(self, path: str, fmt: str):
        self.path = path
        self.fmt = fmt
        self.header: list[str] | None = None
        self.valid = 0

    def _problem(self, lineno: int, what: str) -> FringeError:
        return FringeError(f"{self.path}: line {lineno} {what}; cannot resume (move the file "
                           "away or use --overwrite)")

    def rows(self) -> Iterator[dict]:
        with open(self.path, "rb") as fh:
            for lineno, raw in enumerate(fh, start=1):
                if not raw.endswith(b"\n"):
                    break
                try:
                    text = raw.decode("utf-8").rstrip("\r\n")
                except UnicodeDecodeError:
                    raise self._problem(lineno, "is not UTF-8 text") from None
                row = self._parse(lineno, text)
                self.valid += len(raw)
                if row is not None:
                    yield row

    def _parse(self, lineno: int, text: str) -> dict | None:
        if self.fmt == "csv":
            cells = next(csv.reader([text]), [])
            if self.header is None:
                if not {"file", "frame", "status"} <= set(cells):
                    raise FringeError(f"{self.path}: not a fringe batch table (no file, frame "
                                      "and status columns); cannot resume")
                self.header = cells
                return None
            if not text:
                return None
            if len(cells) != len(self.header):
                raise self._problem(lineno, f"has {len(cells)} fields, the header "
                                            f"{len(self.header)}")
            return dict(zip(self.header, cells, strict=True))
        if not text.strip():
            return None
        try:
            obj = json.loads(text)
        except ValueError:
            raise self._problem(lineno, "is not valid JSON") from None
        if not isinstance(obj, dict) or "file" not in obj or "status" not in obj:
            raise self._problem(lineno, "is not a fringe batch record")
        return obj


def _row_numbers(row: dict) -> dict:
    """Numbers of an existing row (CSV text or JSON values) needed by the summary."""
    frame = row.get("frame")
    try:
        frame = None if frame in (None, "") else int(frame)
    except (TypeError, ValueError):
        frame = None
    out = {"file": str(row.get("file", "")), "frame": frame,
           "status": str(row.get("status", "")), "error": row.get("error") or None}
    for key in ("period_px", "visibility", "visibility_err", "phase_rad", "phase_rad_err",
                "phase_unwrapped_rad", "orientation_deg"):
        out[key] = _num(row.get(key))
    return out


# --------------------------------------------------------------------------------------------
# per-stack state in the parent
# --------------------------------------------------------------------------------------------


@dataclass
class _Stack:
    name: str
    files: list[str]
    frames_expected: int = 0
    frame_interval_s: float | None = None
    frame_interval_source: str | None = None
    geometry: tuple[float, float] | None = None
    geometry_from: int | None = None
    probe_pending: bool = False
    unwrapper: PhaseUnwrapper = field(default_factory=PhaseUnwrapper)
    pos: array = field(default_factory=lambda: array("q"))
    period: array = field(default_factory=lambda: array("d"))
    vis: array = field(default_factory=lambda: array("d"))
    vis_err: array = field(default_factory=lambda: array("d"))
    phase: array = field(default_factory=lambda: array("d"))
    phase_err: array = field(default_factory=lambda: array("d"))
    n_ok: int = 0
    failed: array = field(default_factory=lambda: array("q"))
    file_errors: list[str] = field(default_factory=list)

    def add(self, pos: int, nums: dict) -> None:
        if nums["status"] != "ok":
            self.failed.append(pos)
            return
        self.n_ok += 1
        self.pos.append(pos)
        for arr, key in ((self.period, "period_px"), (self.vis, "visibility"),
                         (self.vis_err, "visibility_err"),
                         (self.phase, "phase_unwrapped_rad"), (self.phase_err, "phase_rad_err")):
            v = nums.get(key)
            arr.append(math.nan if v is None else float(v))


@dataclass
class _Task:
    seq: int
    stack: str
    path: str
    frame: int
    pos: int
    row: dict | None = None  # pre-completed (an input that could not be opened)
    probe: bool = False  # measured fully to fix the stack geometry


def _frame_interval_from_file(path: str) -> float | None:
    """Frame interval (s) from TIFF metadata, or None.

    ImageDescription holding JSON with "frame_interval_s", or ImageJ "finterval" (with
    its "tunit" when given).
    """
    if not path.lower().endswith((".tif", ".tiff")):
        try:
            with open(path, "rb") as fh:
                if fh.read(4) not in (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+"):
                    return None
        except OSError:
            return None
    try:
        import tifffile

        with tifffile.TiffFile(path) as tf:
            desc = tf.pages[0].description if len(tf.pages) else ""
            if desc and desc.lstrip().startswith("{"):
                try:
                    meta = json.loads(desc)
                except ValueError:
                    meta = None
                if isinstance(meta, dict):
                    val = _num(meta.get("frame_interval_s"))
                    if val is not None and val > 0:
                        return val
            ij = tf.imagej_metadata
            if ij:
                val = _num(ij.get("finterval"))
                if val is not None and val > 0:
                    unit = str(ij.get("tunit", "s")).strip().lower()
                    scale = {"s": 1.0, "sec": 1.0, "second": 1.0, "seconds": 1.0,
                             "ms": 1e-3, "msec": 1e-3, "us": 1e-6, "\u00b5s": 1e-6,
                             "min": 60.0, "h": 3600.0}.get(unit)
                    if scale is not None:
                        return val * scale
    except Exception:  # metadata is optional: any problem means "not known"
        return None
    return None


# --------------------------------------------------------------------------------------------
# the batch run
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class BatchOptions:
    """Options of a batch run (those of ``fringe batch``).

    Attributes
    ----------
    fmt : {"csv", "json"} or None
        Table format; None: JSON Lines for .jsonl/.ndjson/.json, else CSV.
    resume : bool
        Continue an existing table: skip (file, frame) pairs already in it.
    overwrite : bool
        Replace an existing table (otherwise an existing table is refused).
    workers : int or None
        Worker processes (default: the CPU count); 1 measures in this process.
    chunk_size : int or None
        Frames per task (default 1 locally, 4 on a Dask cluster).
    fixed_geometry : bool
        Measure the first good frame of each stack fully, then give its orientation and
        period to the measurement of the other frames (no spectral search).
    sequence : bool
        Treat all single-frame image files, in input order, as the frames of one stack.
    frame_interval_s : float or None
        Time between frames; overrides the TIFF metadata.
    drop_fraction, drop_sigma : float
        Visibility-drop rule of `stack_summary`.
    cluster : str, distributed.Client or None
        Run on a Dask cluster: a scheduler address, "local", or a Client.
    dark, flat : sequence of str
        Calibration files (as for ``fringe measure``).
    roi : (X, Y, W, H) or None
        Region to analyse.
    measure : dict
        Options of `fringe.analyze.measure` (channel, srgb, min_snr, gain_e_per_dn, ...).
    progress : bool or None
        Progress bar on the log stream; None: only when it is a terminal.
    """

    fmt: str | None = None
    resume: bool = False
    overwrite: bool = False
    workers: int | None = None
    chunk_size: int | None = None
    fixed_geometry: bool = False
    sequence: bool = False
    frame_interval_s: float | None = None
    drop_fraction: float | None = None
    drop_sigma: float = 3.0
    cluster: Any = None
    dark: Sequence[str] = ()
    flat: Sequence[str] = ()
    roi: tuple[int, int, int, int] | None = None
    measure: dict = field(default_factory=dict)
    progress: bool | None = None


@dataclass
class BatchOutcome:
    """What a batch run did.

    Attributes
    ----------
    out_path, summary_json, summary_txt : str
        The table and the summaries beside it.
    files : list of str
        Input files measured.
    rows_written, rows_resumed : int
        Rows written by this run and rows already present (resume).
    frames_ok, frames_failed : int
        Over this run and the resumed rows of the same inputs.
    problems : list of str
        Inputs that gave no file or could not be opened.
    interrupted : bool
        Stopped by Ctrl-C before the end.
    summaries : list of dict
        One per stack (see `stack_summary`, plus ``stack``, ``files``, ``frames``,
        ``frames_failed``, ``geometry``, ``frame_interval_source``).
    backend : str
        "serial", "processes" or "dask".
    elapsed_s : float
        Wall time of the run.
    """

    out_path: str
    summary_json: str
    summary_txt: str
    files: list[str] = field(default_factory=list)
    rows_written: int = 0
    rows_resumed: int = 0
    frames_ok: int = 0
    frames_failed: int = 0
    problems: list[str] = field(default_factory=list)
    interrupted: bool = False
    summaries: list[dict] = field(default_factory=list)
    backend: str = "serial"
    elapsed_s: float = 0.0

    @property
    def ok(self) -> bool:
        """True when every frame was measured and every input could be read."""
        return not self.interrupted and self.frames_failed == 0 and not self.problems


def _default_workers() -> int:
    if hasattr(os, "process_cpu_count"):
        n = os.process_cpu_count()
    elif hasattr(os, "sched_getaffinity"):
        n = len(os.sched_getaffinity(0))
    else:
        n = os.cpu_count()
    return max(1, int(n or 1))


def _fmt_from(out_path: str, fmt: str | None) -> str:
    if fmt is None:
        return "json" if out_path.lower().endswith(_JSON_EXTENSIONS) else "csv"
    if fmt not in ("csv", "json"):
        raise FringeError(f"{out_path}: unknown table format {fmt!r} (use 'csv' or 'json')")
    return fmt


class _UsageProblem(Exception):
    pass


class _Runner:
    def __init__(self, inputs, out_path: str, opts: BatchOptions, log: TextIO | None):
        self.inputs = list(inputs)
        self.out_path = os.fsdecode(out_path)
        self.opts = opts
        self.log = log
        self.fmt = _fmt_from(self.out_path, opts.fmt)
        json_path, txt_path = summary_paths(self.out_path)
        self.outcome = BatchOutcome(out_path=self.out_path, summary_json=json_path,
                                    summary_txt=txt_path)
        self._stop = False
        self._bar = None

    # -- messages -------------------------------------------------------------------------
    def say(self, text: str) -> None:
        if self.log is None:
            return
        if self._bar is not None:
            self._bar.write(text, file=self.log)
        else:
            self.log.write(text + "\n")
            self.log.flush()

    # -- set-up ---------------------------------------------------------------------------
    def _check_output(self, files: list[str]) -> None:
        out_key = os.path.normcase(os.path.realpath(self.out_path))
        for f in files:
            if os.path.normcase(os.path.realpath(f)) == out_key:
                raise _UsageProblem(f"{self.out_path}: the output is also an input; "
                                    "choose another --out")
        for p in summary_paths(self.out_path):
            if os.path.normcase(os.path.realpath(p)) in {
                    os.path.normcase(os.path.realpath(f)) for f in files}:
                raise _UsageProblem(f"{p}: the summary would overwrite an input")
        if os.path.isdir(self.out_path):
            raise _UsageProblem(f"{self.out_path}: is a folder; --out needs a file name")
        exists = os.path.exists(self.out_path) and os.path.getsize(self.out_path) > 0
        if exists and not (self.opts.resume or self.opts.overwrite):
            raise _UsageProblem(f"{self.out_path}: already exists; use --resume to continue "
                                "it or --overwrite to replace it")

    def _calibration_and_options(self):
        options = dict(self.opts.measure)
        cal = None
        needs_core = (self.opts.dark or self.opts.flat or options.get("gain_e_per_dn") is not None
                      or options.get("single_aperture") is not None)
        if needs_core:  # the measurement core is imported only when needed (start-up time)
            from fringe.analyze import _calibration, _single_aperture_levels

            cal = _calibration(list(self.opts.dark) or None, list(self.opts.flat) or None,
                               options)
            if options.get("single_aperture") is not None:
                options["intensity_ratio"] = _single_aperture_levels(
                    options.pop("single_aperture"), cal, self.opts.roi, options)
        io_opts = {k: options[k] for k in ("channel", "srgb", "max_pixels") if k in options}
        return _Config(cal=cal, roi=None if self.opts.roi is None else tuple(self.opts.roi),
                       options=options, io_opts=io_opts)

    def _plan(self, files: list[str]):
        """Stacks, frame counts and pre-completed rows of inputs that cannot be opened."""
        from fringe import io

        counts: dict[str, int | None] = {}
        errors: dict[str, str] = {}
        for f in files:
            try:
                counts[f] = int(io.count_frames(f))
            except FringeError as exc:
                counts[f] = None
                errors[f] = str(exc).split("\n")[0]
        stacks: dict[str, _Stack] = {}
        file_stack: dict[str, str] = {}
        file_pos0: dict[str, int] = {}
        seq_name = "<sequence>"
        for f in files:
            n = counts[f]
            if self.opts.sequence and n == 1:
                st = stacks.setdefault(seq_name, _Stack(name=seq_name, files=[]))
                file_pos0[f] = len(st.files)
                st.files.append(f)
                st.frames_expected += 1
                file_stack[f] = seq_name
            else:
                st = stacks.setdefault(f, _Stack(name=f, files=[f]))
                st.frames_expected = n or 0
                file_pos0[f] = 0
                file_stack[f] = f
        for st in stacks.values():
            if self.opts.frame_interval_s is not None:
                st.frame_interval_s = float(self.opts.frame_interval_s)
                st.frame_interval_source = "option"
            elif st.name != seq_name and counts.get(st.name):
                dt = _frame_interval_from_file(st.name)
                if dt is not None:
                    st.frame_interval_s, st.frame_interval_source = dt, "metadata"
        return counts, errors, stacks, file_stack, file_pos0

    # -- main -----------------------------------------------------------------------------
    def run(self) -> BatchOutcome:
        t0 = time.perf_counter()
        opts = self.opts
        files, problems = expand_inputs(self.inputs)
        self.outcome.files = files
        self.outcome.problems = list(problems)
        for p in problems:
            self.say(f"fringe: {p}")
        self._check_output(files)
        config = self._calibration_and_options()
        counts, errors, stacks, file_stack, file_pos0 = self._plan(files)
        self.stacks = stacks
        self.file_stack = file_stack
        self.file_pos0 = file_pos0

        # Existing rows (resume).
        norm = {os.path.normcase(os.path.normpath(f)): f for f in files}
        # One byte per frame: memory stays small for very long stacks.
        done: dict[str, bytearray] = {f: bytearray(counts[f] or 0) for f in files}
        header = None
        truncate_to = None
        if opts.resume and os.path.exists(self.out_path):
            existing = _ExistingTable(self.out_path, self.fmt)
            for row in existing.rows():
                nums = _row_numbers(row)
                f = norm.get(os.path.normcase(os.path.normpath(nums["file"])))
                k = nums["frame"]
                if f is None or k is None or not 0 <= k < len(done[f]) or done[f][k]:
                    continue
                done[f][k] = 1
                self.outcome.rows_resumed += 1
                self._absorb(f, nums)
            header = existing.header
            if existing.valid != os.path.getsize(self.out_path):
                truncate_to = existing.valid

        with_inference = any(config.options.get(k) is not None for k in _GEOMETRY_OPTIONS)
        columns = header if header is not None else _columns(with_inference)
        if truncate_to is not None:
            with open(self.out_path, "r+b") as fh:
                fh.truncate(truncate_to)
        if self.fmt == "csv":
            mode = "w" if header is None else "a"
        else:
            mode = "a" if opts.resume else "w"
        try:
            fh = open(self.out_path, mode, encoding="utf-8", newline="")
        except OSError as exc:
            raise FringeError(f"{self.out_path}: cannot write the table "
                              f"({exc.strerror or exc})") from exc
        try:
            table = (_CsvTable(fh, columns, write_header=header is None)
                     if self.fmt == "csv" else _JsonTable(fh))
            n_todo = sum(len(d) - sum(d) for d in done.values())
            self._progress_start(n_todo)
            self._execute(config, files, counts, errors, done, table, n_todo)
        finally:
            fh.close()
            if self._bar is not None:
                self._bar.close()
                self._bar = None
        self._finish(t0)
        return self.outcome

    def _absorb(self, f: str, nums: dict) -> None:
        """Feed a row of an earlier run into the stack state."""
        st = self.stacks[self.file_stack[f]]
        pos = nums["frame"] if st.name == f else self.file_pos0[f]
        ok = nums["status"] == "ok"
        if ok and nums["phase_rad"] is not None and nums["phase_unwrapped_rad"] is not None:
            st.unwrapper = PhaseUnwrapper.resume_from(nums["phase_rad"],
                                                      nums["phase_unwrapped_rad"])
        if (ok and self.opts.fixed_geometry and st.geometry is None
                and nums["orientation_deg"] is not None and nums["period_px"] is not None):
            st.geometry = (nums["orientation_deg"], nums["period_px"])
            st.geometry_from = pos
        st.add(pos, nums)
        if ok:
            self.outcome.frames_ok += 1
        else:
            self.outcome.frames_failed += 1

    def _tasks(self, files, counts, errors, done) -> Iterator[_Task]:
        seq = 0
        for f in files:
            st_name = self.file_stack[f]
            if counts[f] is None:
                yield _Task(seq, st_name, f, -1, -1, row=_fail_row(f, None, errors[f]))
                seq += 1
                continue
            for i in range(counts[f]):
                if done[f][i]:
                    continue
                pos = i if st_name == f else self.file_pos0[f]
                yield _Task(seq, st_name, f, i, pos)
                seq += 1

    def _progress_start(self, total: int) -> None:
        want = self.opts.progress
        if want is None:
            want = bool(self.log is not None and hasattr(self.log, "isatty")
                        and self.log.isatty())
        if not want or self.log is None or total <= 0:
            return
        try:
            from tqdm import tqdm
        except ImportError:
            return
        self._bar = tqdm(total=total, file=self.log, unit="frame", dynamic_ncols=True,
                         leave=False, desc="fringe batch")

    def _backend(self, config: _Config, n_todo: int):
        opts = self.opts
        workers = opts.workers if opts.workers is not None else _default_workers()
        if workers < 1:
            raise FringeError(f"workers must be at least 1, got {workers}")
        if opts.cluster is not None:
            return _DaskBackend(config, opts.cluster, workers)
        if workers == 1 or n_todo <= 1:
            return _SerialBackend(config)
        return _PoolBackend(config, min(workers, n_todo))

    def _execute(self, config, files, counts, errors, done, table, n_todo: int) -> None:
        from concurrent.futures import FIRST_COMPLETED, wait
        from concurrent.futures.process import BrokenProcessPool

        opts = self.opts
        gen = self._tasks(files, counts, errors, done)
        ready: deque[_Task] = deque()
        exhausted = False
        buffer: dict[int, tuple[_Task, dict]] = {}
        inflight: dict[Any, list[_Task]] = {}
        suspects: deque[list[_Task]] = deque()
        pool_worked = False
        next_write = 0
        backend = None
        hard = False
        old_handler = None
        main = threading.current_thread() is threading.main_thread()

        def on_sigint(signum, frame):
            if self._stop:
                raise KeyboardInterrupt
            self._stop = True

        with _OneThreadPerLibrary():
            try:
                if main:
                    old_handler = signal.signal(signal.SIGINT, on_sigint)
                if n_todo > 0:
                    backend = self._backend(config, n_todo)
                    self.outcome.backend = backend.name
                workers = getattr(backend, "workers", 1) if backend else 1
                chunk = opts.chunk_size or (4 if isinstance(backend, _DaskBackend) else 1)
                max_inflight = 2 * workers
                window = max(64, 4 * max_inflight * chunk)

                def blocked(task: _Task) -> bool:
                    st = self.stacks[task.stack]
                    return opts.fixed_geometry and st.geometry is None and st.probe_pending

                while not self._stop:
                    # Refill the look-ahead window.
                    while not exhausted and (not ready or ready[-1].seq - next_write < window):
                        try:
                            task = next(gen)
                        except StopIteration:
                            exhausted = True
                            break
                        if task.row is not None:
                            buffer[task.seq] = (task, task.row)
                        else:
                            ready.append(task)
                    # Submit.
                    while backend is not None and len(inflight) < (1 if suspects
                                                                   else max_inflight):
                        group = self._next_group(ready, suspects, blocked, chunk)
                        if not group:
                            break
                        st = self.stacks[group[0].stack]
                        geometry = st.geometry if opts.fixed_geometry else None
                        fut = backend.submit(group[0].path, [t.frame for t in group], geometry)
                        inflight[fut] = group
                    # Write what is complete, in order.
                    next_write = self._flush(buffer, next_write, table)
                    if not inflight:
                        if exhausted and not ready and not suspects:
                            break
                        # Only blocked tasks wait for a probe, and a probe is in flight.
                        raise RuntimeError("batch scheduler stalled")
                    finished, _ = wait(list(inflight), timeout=0.25,
                                       return_when=FIRST_COMPLETED)
                    victims: list[list[_Task]] = []
                    for fut in finished:
                        group = inflight.pop(fut)
                        try:
                            rows = fut.result()
                            pool_worked = True
                        except BrokenProcessPool:
                            victims.append(group)
                            continue
                        except Exception as exc:
                            rows = [_fail_row(t.path, t.frame,
                                              f"worker failed: {type(exc).__name__}: {exc}")
                                    for t in group]
                        for t, row in zip(group, rows, strict=True):
                            self._completed(t, row)
                            buffer[t.seq] = (t, row)
                    if victims:
                        # A worker process died: every task in flight is lost.
                        victims += list(inflight.values())
                        inflight.clear()
                        lost = sorted((t for g in victims for t in g), key=lambda t: t.seq)
                        if not pool_worked:
                            # The workers never started (e.g. a calling script without the
                            # ``if __name__ == "__main__":`` guard): measure in this process.
                            self.say("fringe: worker processes could not be started; "
                                     "measuring in this process")
                            backend.close(terminate=True)
                            backend = _SerialBackend(config)
                            self.outcome.backend = backend.name
                            suspects.extend([t] for t in lost)
                        elif len(lost) == 1:
                            # It died alone with this frame: the frame is the cause.
                            t = lost[0]
                            row = _fail_row(t.path, t.frame, "the worker process died while "
                                            "measuring this frame")
                            self._completed(t, row)
                            buffer[t.seq] = (t, row)
                            backend.restart()
                        else:
                            # Retry them one at a time to find the frame that kills workers.
                            suspects.extend([t] for t in lost)
                            backend.restart()
                    next_write = self._flush(buffer, next_write, table)
            except KeyboardInterrupt:
                # A second Ctrl-C may have cut a row short: write nothing more.
                self._stop = hard = True
            finally:
                if main and old_handler is not None:
                    signal.signal(signal.SIGINT, old_handler)
                if backend is not None:
                    for fut in inflight:
                        fut.cancel()
                    backend.close(terminate=self._stop)
        if not hard:
            next_write = self._flush(buffer, next_write, table)
        self.outcome.interrupted = self._stop

    def _next_group(self, ready: deque, suspects: deque, blocked, chunk: int) -> list[_Task]:
        """The next task(s) to submit: consecutive frames of one file, or a probe."""
        opts = self.opts
        if suspects:
            return suspects.popleft()
        for idx, task in enumerate(ready):
            if blocked(task):
                continue
            st = self.stacks[task.stack]
            del ready[idx]
            if opts.fixed_geometry and st.geometry is None:
                st.probe_pending = True
                task.probe = True
                return [task]
            group = [task]
            while (len(group) < chunk and idx < len(ready) and ready[idx].path == task.path
                   and ready[idx].seq == group[-1].seq + 1):
                group.append(ready[idx])
                del ready[idx]
            return group
        return []

    def _completed(self, task: _Task, row: dict) -> None:
        """A result arrived (in any order): settle the stack geometry of a probe."""
        if task.probe:
            st = self.stacks[task.stack]
            st.probe_pending = False
            if row.get("status") == "ok" and st.geometry is None:
                o, p = row.get("orientation_deg"), row.get("period_px")
                if o is not None and p is not None:
                    st.geometry = (float(o), float(p))
                    st.geometry_from = task.pos

    def _flush(self, buffer: dict, next_write: int, table) -> int:
        while next_write in buffer:
            task, row = buffer.pop(next_write)
            self._write(task, row, table)
            next_write += 1
        return next_write

    def _write(self, task: _Task, row: dict, table) -> None:
        st = self.stacks[task.stack]
        ok = row.get("status") == "ok"
        phase = row.get("phase_rad")
        row["phase_unwrapped_rad"] = (st.unwrapper.push(phase)
                                      if ok and phase is not None else None)
        row = _ordered_row(row)
        table.write(row)
        self.outcome.rows_written += 1
        if task.row is not None:  # the whole input failed
            st.file_errors.append(str(row.get("error")))
            self.outcome.problems.append(str(row.get("error")))
            self.say(f"fringe: {row.get('error')}")
            return
        nums = _row_numbers(row)
        st.add(task.pos, nums)
        if ok:
            self.outcome.frames_ok += 1
        else:
            self.outcome.frames_failed += 1
            self.say(f"fringe: {task.path} frame {task.frame}: {row.get('error')}")
        if self._bar is not None:
            self._bar.update(1)

    # -- summary --------------------------------------------------------------------------
    def _finish(self, t0: float) -> None:
        opts = self.opts
        summaries = []
        for st in self.stacks.values():
            s: dict[str, Any] = {"stack": st.name, "files": list(st.files),
                                 "frames": st.frames_expected, "frames_ok": st.n_ok,
                                 "frames_failed": len(st.failed),
                                 "failed_frames": [int(p) for p in st.failed]}
            s.update(stack_summary(np.frombuffer(st.pos, dtype=np.int64) if st.pos else
                                   np.zeros(0, dtype=np.int64),
                                   np.asarray(st.period), np.asarray(st.vis),
                                   np.asarray(st.phase), phase_err_rad=np.asarray(st.phase_err),
                                   visibility_err=np.asarray(st.vis_err),
                                   frame_interval_s=st.frame_interval_s,
                                   drop_fraction=opts.drop_fraction, drop_sigma=opts.drop_sigma))
            s["frame_interval_source"] = st.frame_interval_source
            if opts.fixed_geometry:
                s["geometry"] = {"mode": "fixed", "from_frame": st.geometry_from,
                                 "orientation_deg": None if st.geometry is None
                                 else st.geometry[0],
                                 "period_px": None if st.geometry is None else st.geometry[1]}
            else:
                s["geometry"] = {"mode": "searched per frame"}
            if st.file_errors:
                s["errors"] = list(st.file_errors)
            if st.name == "<sequence>":
                s["visibility_drop_files"] = [st.files[p] for p in s["visibility_drop_frames"]
                                              if 0 <= p < len(st.files)]
            summaries.append(s)
        self.outcome.summaries = summaries
        self.outcome.elapsed_s = time.perf_counter() - t0
        doc = {
            "fringe_batch_summary": 1,
            "table": self.out_path,
            "complete": not self.outcome.interrupted,
            "frames_ok": self.outcome.frames_ok,
            "frames_failed": self.outcome.frames_failed,
            "input_problems": list(self.outcome.problems),
            "stacks": summaries,
        }
        _write_atomic(self.outcome.summary_json,
                      json.dumps(_jsonable(doc), indent=2, allow_nan=False) + "\n")
        _write_atomic(self.outcome.summary_txt, summary_text(self.outcome))


def _write_atomic(path: str, text: str) -> None:
    with atomic_output(path, "the summary") as tmp, open(tmp, "w", encoding="utf-8") as fh:
        fh.write(text)


def _list_frames(frames: Sequence[int], limit: int = 20) -> str:
    items = [str(f) for f in frames[:limit]]
    more = len(frames) - limit
    return ", ".join(items) + (f" and {more} more" if more > 0 else "")


def summary_text(outcome: BatchOutcome) -> str:
    """The readable per-stack summary of a batch run (printed and written beside the table)."""
    from fringe.report import format_value

    lines = []
    state = "interrupted" if outcome.interrupted else "done"
    lines.append(f"fringe batch {state}: {outcome.frames_ok} frames ok, "
                 f"{outcome.frames_failed} failed -> {outcome.out_path}")
    for s in outcome.summaries:
        lines.append("")
        lines.append(f"stack {s['stack']}: {s['frames']} frames, {s['frames_ok']} ok, "
                     f"{s['frames_failed']} failed")
        for e in s.get("errors", []):
            lines.append(f"  error           {e}")
        if s["frames_failed"]:
            lines.append(f"  failed frames   {_list_frames(s['failed_frames'])}")
        if not s["frames_ok"]:
            continue

        def spread(s: dict, key: str, unit: str) -> str:
            mean, std = s[f"{key}_mean"], s[f"{key}_std"]
            u = f" {unit}" if unit else ""
            if std is None:
                return f"{mean:.6g}{u}"
            return (f"{mean:.6g}{u} mean, {std:.3g}{u} s.d. "
                    f"(range {s[f'{key}_min']:.6g} .. {s[f'{key}_max']:.6g})")

        lines.append(f"  period          {spread(s, 'period_px', 'px')}")
        lines.append(f"  visibility      {spread(s, 'visibility', '')}")
        if s["phase_drift_rad_per_frame"] is not None:
            drift = format_value(s["phase_drift_rad_per_frame"],
                                 s["phase_drift_rad_per_frame_err"], "rad/frame")
            if s["phase_drift_rad_per_s"] is not None:
                per_s = format_value(s["phase_drift_rad_per_s"], s["phase_drift_rad_per_s_err"],
                                     "rad/s")
                waves = format_value(s["phase_drift_waves_per_s"],
                                     s["phase_drift_waves_per_s_err"], "waves/s")
                drift += (f" = {per_s} = {waves} (frame interval {s['frame_interval_s']:g} s "
                          f"from {s['frame_interval_source']})")
            lines.append(f"  phase drift     {drift}")
            lines.append(f"  phase jitter    {s['phase_jitter_rms_rad']:.3g} rad RMS = "
                         f"{s['phase_jitter_rms_waves']:.3g} waves (drift removed)")
            lines.append(f"  phase p-p       {s['phase_ptp_waves']:.4g} waves; "
                         f"{s['phase_residual_ptp_waves']:.3g} waves with the drift removed")
        elif s["phase_ptp_waves"] is not None:
            lines.append(f"  phase p-p       {s['phase_ptp_waves']:.4g} waves")
        if s["visibility_drop_threshold"] is not None:
            drops = s["visibility_drop_frames"]
            what = _list_frames(drops) if drops else "none"
            lines.append(f"  visibility drop {what} ({s['visibility_drop_rule']}: "
                         f"{s['visibility_drop_threshold']:.4g})")
        geo = s.get("geometry") or {}
        if geo.get("mode") == "fixed" and geo.get("orientation_deg") is not None:
            lines.append(f"  geometry        fixed from frame {geo['from_frame']}: orientation "
                         f"{geo['orientation_deg']:.4f} deg, period {geo['period_px']:.5f} px")
    for p in outcome.problems:
        lines.append(f"problem: {p}")
    return "\n".join(lines) + "\n"


def run_batch(inputs: Sequence[str | os.PathLike], out_path: str | os.PathLike, *,
              options: BatchOptions | None = None,
              log: TextIO | None = None) -> BatchOutcome:
    """Measure every frame of the inputs into a table, in frame order, with a summary.

    Parameters
    ----------
    inputs : sequence of str or path-like
        TIFF stacks (BigTIFF included), image files, folders and glob patterns
        (`expand_inputs`).
    out_path : str or path-like
        The table: CSV, or JSON Lines (``.jsonl``, ``.ndjson``, ``.json`` or
        ``options.fmt == "json"``). The summaries go beside it (`summary_paths`).
    options : BatchOptions, optional
        Run options.
    log : text stream, optional
        Where one line per failed frame or input (and a progress bar) is written.

    Returns
    -------
    BatchOutcome
        Counts, per-stack summaries and whether the run was interrupted.

    Raises
    ------
    FringeError
        Calibration files that cannot be used, or a table that cannot be read for resuming
        or cannot be written. Problems with single inputs or frames are reported in the
        outcome and the table instead.

    Notes
    -----
    Columns: ``file``, ``frame``, ``status``, ``error``, every measured value with its
    ``_err``, ``phase_unwrapped_rad`` (the phase unwrapped along the stack's frame order
    by `PhaseUnwrapper`, over the frames measured successfully), the other values of the
    measurement, ``warnings`` and ``extra`` (a JSON object of any value without a column).
    """
    opts = options or BatchOptions()
    return _Runner(inputs, out_path, opts, log).run()


# --------------------------------------------------------------------------------------------
# command line
# --------------------------------------------------------------------------------------------


def _positive_float(text: str) -> float:
    from fringe.cli import _positive

    return _positive(text)


def _positive_int(text: str) -> int:
    import argparse

    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if v < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1, got {v}")
    return v


def _fraction(text: str) -> float:
    import argparse

    v = _positive_float(text)
    if not v < 1:
        raise argparse.ArgumentTypeError(f"must be between 0 and 1, got {text!r}")
    return v


def add_parser(subparsers) -> None:
    """Add the ``batch`` command to the subparsers of the ``fringe`` command line."""
    from fringe.cli import _add_calibration, _add_geometry, _add_input

    p = subparsers.add_parser(
        "batch",
        help="measure every frame of stacks, folders and globs into one table, with a "
             "phase-drift and stability summary",
        description="Measure every frame of TIFF stacks (BigTIFF included), image files, "
                    "folders and glob patterns into one CSV or JSON Lines table, in frame "
                    "order, using all cores; print and write a per-stack summary (period and "
                    "visibility spread, phase drift rate, phase jitter, visibility drops). "
                    "Rows are written as they finish: an interrupted run keeps them and "
                    "--resume continues it.",
    )
    p.add_argument("inputs", nargs="+", metavar="INPUT",
                   help="TIFF stacks, image files, folders (their image files, sorted by "
                        "name) or glob patterns such as 'runs/*.tif'")
    p.add_argument("-o", "--out", "--output", dest="out", required=True, metavar="FILE",
                   help="results table (CSV, or JSON Lines for .jsonl/.ndjson/.json); the "
                        "summary is written beside it (results.csv gives "
                        "results.summary.json and results.summary.txt)")
    p.add_argument("--format", choices=["csv", "json"], default=None,
                   help="table format (default: from the --out extension, else CSV)")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--resume", action="store_true",
                   help="continue an existing table: skip the frames already in it")
    g.add_argument("--overwrite", action="store_true", help="replace an existing table")
    p.add_argument("--workers", type=_positive_int, default=None, metavar="N",
                   help="worker processes (default: the number of CPUs)")
    p.add_argument("--chunk-size", type=_positive_int, default=None, metavar="N",
                   help="frames per task (default 1, 4 on a Dask cluster)")
    p.add_argument("--fixed-geometry", action="store_true",
                   help="measure the first good frame of each stack fully, then measure the "
                        "others along its orientation and period (faster, steadier)")
    p.add_argument("--sequence", action="store_true",
                   help="treat single-image files, in input order, as the frames of one "
                        "stack (phase unwrapped across them, one summary)")
    p.add_argument("--frame-interval-s", type=_positive_float, default=None, metavar="S",
                   help="time between frames in seconds, for drift rates per second "
                        "(default: from the TIFF metadata when present)")
    p.add_argument("--drop-fraction", type=_fraction, default=None, metavar="F",
                   help="flag frames whose visibility is below (1 - F) x the median "
                        "(default: below median - --drop-sigma robust sigma)")
    p.add_argument("--drop-sigma", type=_positive_float, default=3.0, metavar="K",
                   help="robust sigmas below the median visibility that flag a drop "
                        "(default 3)")
    p.add_argument("--roi", nargs=4, type=int, metavar=("X", "Y", "W", "H"),
                   help="region to analyse: top-left column X, row Y, width W, height H")
    p.add_argument("--min-snr", type=float, default=None,
                   help="spectral SNR below which no fringe pattern is reported (default 5)")
    p.add_argument("--cluster", metavar="ADDRESS", default=None,
                   help="run on a Dask cluster: scheduler address (tcp://host:8786) or "
                        "'local' (needs fringe[dask])")
    p.add_argument("--no-progress", dest="progress", action="store_false", default=None,
                   help="no progress bar (it is shown only on a terminal anyway)")
    _add_input(p)
    _add_calibration(p)
    _add_geometry(p)


def run(args, out: TextIO, err: TextIO) -> int:
    """Run ``fringe batch``; returns 0 when every frame was measured, 1 if any failed.

    130 after Ctrl-C (the completed rows are kept) and 2 for usage problems (an existing
    table without --resume or --overwrite, --cluster without Dask installed).
    """
    from fringe.cli import _options

    if args.cluster is not None:
        try:
            import distributed  # noqa: F401
        except ImportError:
            err.write("fringe: --cluster needs Dask: install fringe[dask]\n")
            return 2
    from fringe.cli import expand_paths

    try:
        args.dark, args.flat = expand_paths(args.dark), expand_paths(args.flat)
    except FringeError as exc:
        err.write(f"fringe: {exc}\n")
        return 1
    opts = BatchOptions(
        fmt=args.format, resume=args.resume, overwrite=args.overwrite, workers=args.workers,
        chunk_size=args.chunk_size, fixed_geometry=args.fixed_geometry,
        sequence=args.sequence, frame_interval_s=args.frame_interval_s,
        drop_fraction=args.drop_fraction, drop_sigma=args.drop_sigma, cluster=args.cluster,
        dark=list(args.dark), flat=list(args.flat),
        roi=None if args.roi is None else tuple(args.roi), measure=_options(args),
        progress=args.progress,
    )
    try:
        outcome = run_batch(args.inputs, args.out, options=opts, log=err)
    except _UsageProblem as exc:
        err.write(f"fringe: {exc}\n")
        return 2
    except _DaskMissing:
        err.write("fringe: --cluster needs Dask: install fringe[dask]\n")
        return 2
    except FringeError as exc:
        err.write(f"fringe: {exc}\n")
        return 1
    except OSError as exc:
        name = getattr(exc, "filename", None) or args.out
        err.write(f"fringe: {name}: {exc.strerror or exc}\n")
        return 1
    out.write(summary_text(outcome))
    out.flush()
    if outcome.interrupted:
        err.write(f"fringe: interrupted; {outcome.rows_written} rows written to "
                  f"{outcome.out_path}; run again with --resume to continue\n")
        return _INTERRUPTED
    return 0 if outcome.ok else 1
