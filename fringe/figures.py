"""PNG figures of fringe measurements: frame, profile and fit, spectrum, drift, build-up,
wavefront.

Every ``plot_*`` function is pure: it reads its inputs (never changing them), writes ONE
PNG file and returns its path. The file is written to ``path + ".part"`` and renamed into
place, so that a reader never sees half a figure. matplotlib is an optional dependency
(``pip install 'fringe[plot]'``); it is imported only when a figure is drawn, with the
headless Agg canvas and no pyplot state.

Colours are the colour-blind-safe set of Okabe and Ito; images use grey (frames),
``cividis`` (spectra) and the diverging ``PuOr`` map (wavefronts), all readable with
the common colour-vision deficiencies.

Geometry conventions are the project's: x is the column (to the right), the row grows
downwards, pixel centres sit at integers, and an orientation ``t`` (degrees,
counter-clockwise from +x as seen on screen) is the direction of the fringe normal
``n = (cos t, -sin t)`` in (x, row) coordinates.
"""

from __future__ import annotations

import math
import os
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from fringe._util import FringeError, atomic_output

__all__ = [
    "PALETTE",
    "FIGSIZE",
    "DPI",
    "plot_frame",
    "plot_profile",
    "plot_spectrum",
    "plot_drift",
    "plot_buildup",
    "plot_wavefront",
    "overlay_geometry",
    "windowed_spectrum",
]

#: Okabe-Ito colour-blind-safe colours.
PALETTE: dict[str, str] = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky": "#56B4E9",
    "green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "purple": "#CC79A7",
}
#: Default figure size (inches) and resolution (dots per inch).
FIGSIZE = (6.4, 4.0)
DPI = 110

_MISSING = "figures need matplotlib: pip install 'fringe[plot]'"

_STYLE = {
    "font.size": 8.5,
    "axes.titlesize": 9.0,
    "axes.titleweight": "normal",
    "axes.labelsize": 8.5,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.edgecolor": "#444444",
    "axes.linewidth": 0.7,
    "axes.grid": True,
    "grid.color": "#dddddd",
    "grid.linewidth": 0.5,
    "xtick.labelsize": 7.5,
    "ytick.labelsize": 7.5,
    "legend.fontsize": 7.5,
    "legend.frameon": False,
    "figure.facecolor": "white",
    "savefig.facecolor": "white",
    "image.interpolation": "nearest",
}


# --------------------------------------------------------------------------------------------
# matplotlib plumbing
# --------------------------------------------------------------------------------------------


def _mpl():
    """matplotlib, its Figure class and the Agg canvas (FringeError when not installed)."""
    try:
        import matplotlib
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure
    except ImportError:
        raise FringeError(_MISSING) from None
    return matplotlib, Figure, FigureCanvasAgg


class _Drawing:
    """A figure on its own Agg canvas, drawn inside a temporary style context."""

    def __init__(self, size: tuple[float, float] = FIGSIZE):
        self.mpl, figure_cls, canvas_cls = _mpl()
        self.size = size
        self._ctx = None
        self._figure_cls, self._canvas_cls = figure_cls, canvas_cls

    def __enter__(self):
        self._ctx = self.mpl.rc_context(_STYLE)
        self._ctx.__enter__()
        self.fig = self._figure_cls(figsize=self.size, dpi=DPI, layout="constrained")
        self._canvas_cls(self.fig)
        return self

    def __exit__(self, *exc):
        return self._ctx.__exit__(*exc)

    def save(self, path: str | os.PathLike) -> str:
        return _save(self.fig, path)


def _save(fig: Any, path: str | os.PathLike) -> str:
    from fringe import __version__

    out = os.fspath(path)
    with atomic_output(out, "figure") as tmp:
        fig.savefig(tmp, format="png", dpi=DPI, metadata={"Software": f"fringe {__version__}"})
    return out


# --------------------------------------------------------------------------------------------
# helpers on results and arrays
# --------------------------------------------------------------------------------------------


def _label(result: Any) -> str:
    name = os.path.basename(str(getattr(result, "file", "<array>")))
    return f"{name} frame {getattr(result, 'frame', 0)}"


def _title(result: Any, text: str, width: int = 90) -> str:
    """Two-part title: the file and frame, then the text (wrapped)."""
    import textwrap

    return _label(result) + "\n" + textwrap.fill(text, width)


def _prov(result: Any, stage: str) -> dict | None:
    """Parameters of the last provenance entry of a stage (None when absent)."""
    found = None
    for entry in getattr(result, "provenance", ()) or ():
        if isinstance(entry, (tuple, list)) and len(entry) == 2 and entry[0] == stage:
            found = entry[1]
    return found


def _fit_context(result: Any) -> dict:
    ctx = getattr(result, "context", None) or {}
    if getattr(result, "status", "ok") != "ok" or "fit" not in ctx or "pooled" not in ctx:
        why = getattr(result, "error", None) or "no fit kept with this result"
        raise FringeError(f"{_label(result)}: nothing to plot ({why})")
    return ctx


def _fmt(value: Any, err: Any = None, unit: str = "") -> str:
    from fringe.report import format_value

    return format_value(value, err, unit)


def _as_image(image: Any, what: str = "image") -> np.ndarray:
    """A 2-D float copy for display (colour (H, W, 3|4) is averaged over R, G, B)."""
    arr = np.asarray(image)
    if arr.ndim == 3 and arr.shape[-1] in (3, 4):
        arr = arr[..., :3].astype(np.float64).mean(axis=-1)
    if arr.ndim != 2:
        raise FringeError(f"{what}: expected a 2-D image, got an array of shape {arr.shape}")
    if arr.size == 0:
        raise FringeError(f"{what}: the image is empty")
    return np.array(arr, dtype=np.float64)


def _region(result: Any, shape: tuple[int, int],
            roi: Sequence[int] | None) -> tuple[int, int, int, int]:
    """The analysed region (x0, y0, w, h) in the coordinates of the image shown."""
    h_img, w_img = shape
    if roi is None:
        p = _prov(result, "roi")
        if p is not None and (int(p["h"]), int(p["w"])) != (h_img, w_img):
            roi = (p["x"], p["y"], p["w"], p["h"])
    if roi is None:
        return 0, 0, w_img, h_img
    if len(roi) != 4:
        raise FringeError(f"{_label(result)}: roi needs four integers X Y W H, got {list(roi)}")
    x0, y0, w, h = (int(v) for v in roi)
    if w < 1 or h < 1 or x0 < 0 or y0 < 0 or x0 + w > w_img or y0 + h > h_img:
        raise FringeError(f"{_label(result)}: region X={x0} Y={y0} W={w} H={h} does not fit in "
                          f"the {w_img} x {h_img} image")
    return x0, y0, w, h


def _display(img: np.ndarray, max_side: int = 1600) -> tuple[np.ndarray, float, float]:
    """Block-averaged copy for display of large frames and its robust grey range."""
    h, w = img.shape
    f = int(math.ceil(max(h, w) / max_side))
    if f > 1:
        hh, ww = (h // f) * f, (w // f) * f
        with np.errstate(invalid="ignore"):
            img = img[:hh, :ww].reshape(hh // f, f, ww // f, f).mean(axis=(1, 3))
    fin = img[np.isfinite(img)]
    if fin.size == 0:
        return img, 0.0, 1.0
    lo, hi = (float(v) for v in np.percentile(fin, [0.5, 99.5]))
    if not hi > lo:
        lo, hi = float(fin.min()), float(fin.max())
        if not hi > lo:
            lo, hi = lo - 0.5, hi + 0.5
    return img, lo, hi


def _level_unit(result: Any) -> str:
    inp = _prov(result, "input")
    return "counts" if inp is not None and inp.get("format") == "array" else "DN"


# --------------------------------------------------------------------------------------------
# frame with region, normal and band
# --------------------------------------------------------------------------------------------


def overlay_geometry(
    result: Any,
    *,
    shape: tuple[int, int],
    roi: Sequence[int] | None = None,
) -> dict[str, Any]:
    """Where the region, the fringe normal and the profile band lie on the frame.

    Parameters
    ----------
    result : FringeResult
        A measurement (failed ones give the region only).
    shape : (H, W)
        Shape of the image the overlay is drawn on.
    roi : (X, Y, W, H), optional
        Analysed region in that image. Default: the ``roi`` of the result's provenance
        when the image is larger than it, else the whole image.

    Returns
    -------
    dict
        ``region`` (x0, y0, w, h) in pixels; ``centre`` (x, row) of the projection;
        ``normal`` unit vector (n_x, n_row) or None; ``arrow_end`` (x, row) or None;
        ``band`` (4, 2) array of the band corners (x, row) or None; ``band_source``
        (what the band shows).

    Notes
    -----
    The band is the rotated rectangle ``c + u n1 + v s1`` with u over the profile's
    range and v over the strips used for the visibility, where ``n1 = (cos t1, -sin t1)``
    and ``s1 = (sin t1, cos t1)`` for the projection orientation t1 of the fit. The
    arrow starts at the centre c and points along the reported normal
    ``n = (cos t, -sin t)``; its length is two periods, kept between a fifth and two
    fifths of the shorter side of the region.

    Examples
    --------
    >>> from fringe.result import FringeResult
    >>> g = overlay_geometry(FringeResult(), shape=(40, 60), roi=(10, 5, 30, 20))
    >>> g["region"], g["centre"]
    ((10, 5, 30, 20), (24.5, 14.5))
    """
    h_img, w_img = (int(v) for v in shape)
    x0, y0, w, h = _region(result, (h_img, w_img), roi)
    out: dict[str, Any] = {"region": (x0, y0, w, h),
                           "centre": (x0 + (w - 1) / 2.0, y0 + (h - 1) / 2.0),
                           "normal": None, "arrow_end": None, "band": None,
                           "band_source": None}
    ctx = getattr(result, "context", None) or {}
    values = getattr(result, "values", {}) or {}
    t = values.get("orientation_deg")
    if getattr(result, "status", "ok") != "ok" or t is None:
        return out
    prof = ctx.get("profile")
    if prof is not None:
        out["centre"] = (x0 + float(prof.centre[0]), y0 + float(prof.centre[1]))
    cx, cy = out["centre"]
    tr = math.radians(float(t))
    n = (math.cos(tr), -math.sin(tr))
    period = float(values.get("period_px") or 0.0)
    length = float(np.clip(2.0 * period, 0.2 * min(w, h), 0.4 * min(w, h)))
    out["normal"] = n
    out["arrow_end"] = (cx + length * n[0], cy + length * n[1])
    if prof is None:
        return out
    t1 = math.radians(float(ctx.get("orientation_fit_deg", prof.orientation_deg)))
    n1 = np.array([math.cos(t1), -math.sin(t1)])
    s1 = np.array([math.sin(t1), math.cos(t1)])
    u_lo, u_hi = (float(v) for v in prof.u_range)
    v_lo, v_hi = (float(v) for v in prof.v_range)
    source = "all pixels of the region"
    env = _prov(result, "envelope_along_fringes")
    if env is not None:
        source = "central third of the region (band along the fringes)"
        span = v_hi - v_lo
        band_lo, band_hi = v_lo + span / 3.0, v_hi - span / 3.0
        spec, reg = _prov(result, "spectrum"), _prov(result, "region")
        used = [int(j) for j in env.get("strips_used") or []]
        if spec is not None and reg is not None and used:
            # The fine strips of the envelope search: as many as fit 6 px apart along the
            # fringes at the spectral orientation, between the fit's strips and 400.
            t0 = math.radians(float(spec["orientation_deg"]))
            ext_v = (abs(math.sin(t0)) * (int(reg["width"]) - 1)
                     + abs(math.cos(t0)) * (int(reg["height"]) - 1))
            n_fine = int(np.clip(ext_v // 6, prof.n_strips, 400))
            if 0 <= min(used) and max(used) < n_fine:
                band_lo = v_lo + min(used) * span / n_fine
                band_hi = v_lo + (max(used) + 1) * span / n_fine
                source = "brightest band along the fringes (used for the visibility)"
        v_lo, v_hi = band_lo, band_hi
    c = np.array([cx, cy])
    corners = [c + u * n1 + v * s1 for u, v in ((u_lo, v_lo), (u_hi, v_lo), (u_hi, v_hi),
                                                 (u_lo, v_hi))]
    out["band"] = np.array(corners)
    out["band_source"] = source
    return out


def plot_frame(
    image: np.ndarray,
    result: Any,
    path: str | os.PathLike,
    *,
    roi: Sequence[int] | None = None,
) -> str:
    """The frame with the analysed region, the fringe normal and the profile band.

    Parameters
    ----------
    image : (H, W) or (H, W, 3) ndarray
        The frame (raw or calibrated; colour is shown as the mean of R, G, B).
    result : FringeResult
        Its measurement. A failed one shows the region and the error.
    path : str or path-like
        PNG file to write.
    roi : (X, Y, W, H), optional
        Analysed region within ``image`` (default as in `overlay_geometry`).

    Returns
    -------
    str
        The path written.

    Notes
    -----
    Grey levels are stretched between the 0.5 and 99.5 percentiles of the finite
    pixels, so that hot pixels do not flatten the fringes. The orange outline is the
    region, the blue shade the pixels averaged into the profile band for the
    visibility, the vermillion arrow the fringe normal (the direction of increasing
    phase).

    References
    ----------
    .. [1] M. Okabe and K. Ito, "Color Universal Design (CUD): how to make figures and
       presentations that are friendly to colorblind people" (2008), https://jfly.uni-koeln.de/color/
    """
    img = _as_image(image, _label(result))
    geo = overlay_geometry(result, shape=img.shape, roi=roi)
    h_img, w_img = img.shape
    shown, lo, hi = _display(img)
    with _Drawing() as d:
        from matplotlib.lines import Line2D
        from matplotlib.patches import Patch, Polygon, Rectangle

        ax = d.fig.add_subplot()
        ax.imshow(shown, cmap="gray", vmin=lo, vmax=hi, origin="upper",
                  extent=(-0.5, w_img - 0.5, h_img - 0.5, -0.5),
                  interpolation="nearest" if max(h_img, w_img) <= 400 else "antialiased")
        ax.grid(False)
        x0, y0, w, h = geo["region"]
        rect = Rectangle((x0 - 0.5, y0 - 0.5), w, h, fill=False, ec=PALETTE["orange"], lw=1.6,
                         clip_on=False, zorder=4)
        ax.add_patch(rect)
        handles = [Patch(fill=False, ec=PALETTE["orange"], lw=1.6, label="analysed region")]
        if geo["band"] is not None:
            band = Polygon(geo["band"], closed=True, fc=PALETTE["sky"], ec=PALETTE["sky"],
                           alpha=0.22, lw=1.2)
            ax.add_patch(band)
            band.set_clip_path(rect)
            source = str(geo["band_source"]).split(" (")[0]
            handles.append(Patch(fc=PALETTE["sky"], alpha=0.5, label=f"profile band ({source})"))
        values = getattr(result, "values", {}) or {}
        if geo["arrow_end"] is not None:
            ax.annotate("", xy=geo["arrow_end"], xytext=geo["centre"],
                        arrowprops={"arrowstyle": "-|>", "color": PALETTE["vermillion"],
                                    "lw": 2.0, "shrinkA": 0, "shrinkB": 0})
            ax.plot(*geo["centre"], "o", color=PALETTE["vermillion"], ms=3)
            handles.append(Line2D([], [], color=PALETTE["vermillion"], lw=2.0,
                                  label="fringe normal"))
        ctx = getattr(result, "context", None) or {}
        if "envelope_fit" in ctx and values.get("envelope_centre_x_px") is not None:
            ex = x0 + float(values["envelope_centre_x_px"])
            ey = y0 + float(values["envelope_centre_y_px"])
            ax.plot(ex, ey, "+", color=PALETTE["yellow"], ms=9, mew=1.8)
            handles.append(Line2D([], [], color=PALETTE["yellow"], marker="+", ls="",
                                  ms=8, mew=1.8, label="envelope centre"))
        ax.set_xlim(-0.5, w_img - 0.5)
        ax.set_ylim(h_img - 0.5, -0.5)
        ax.set_xlabel("x (px)")
        ax.set_ylabel("row (px)")
        if getattr(result, "status", "ok") == "ok":
            t_txt = _fmt(values.get("orientation_deg"), values.get("orientation_deg_err"), "deg")
            p_txt = _fmt(values.get("period_px"), values.get("period_px_err"), "px")
            title = _title(result, f"orientation {t_txt}, period {p_txt}")
        else:
            title = _title(result, str(getattr(result, "error", None) or "not measured"))
        ax.set_title(title, loc="left")
        d.fig.legend(handles=handles, loc="outside lower center",
                     ncols=len(handles) if len(handles) <= 3 else 2)
        return d.save(path)


# --------------------------------------------------------------------------------------------
# profile with model and residuals
# --------------------------------------------------------------------------------------------


def _pooled_model(fit: Any, prof: Any, pooled: Any) -> np.ndarray:
    """The strip models averaged over the pixels of each pooled bin.

    The pooled bin k holds the pixels of the bins of every strip with the same u index,
    so its model is the count-weighted mean of their models (the binning of
    ``Profile.pooled``).
    """
    m = fit.model(prof.u, prof.v, prof.strip, prof.u_var)
    kb = np.clip(np.floor((prof.u - prof.u_range[0]) / prof.bin_width).astype(np.int64), 0, None)
    cnt = np.bincount(kb, weights=prof.count)
    ok = cnt > 0
    model = np.bincount(kb, weights=prof.count * m)[ok] / cnt[ok]
    if model.shape != pooled.u.shape:
        # Not the same binning: evaluate the first strip's model on the pooled bins.
        model = fit.model(pooled.u, pooled.v, np.zeros(pooled.u.size, dtype=np.int64),
                          pooled.u_var)
    return model


def plot_profile(result: Any, path: str | os.PathLike) -> str:
    """The pooled fringe profile with the fitted model and normalised residuals.

    Parameters
    ----------
    result : FringeResult
        A successful measurement (its ``context`` holds the profile and the fit).
    path : str or path-like
        PNG file to write.

    Returns
    -------
    str
        The path written.

    Raises
    ------
    FringeError
        When the result holds no fit (a failed measurement) or matplotlib is missing.

    Notes
    -----
    Points are the bin means of the single-strip profile against u (distance across the
    fringes from the region centre) with their 1-sigma errors from the noise model. The
    curve is the fitted model of every strip averaged over the pixels of each bin,
    ``m_k = sum_j n_jk m_jk / sum_j n_jk``; the lower panel shows ``(mean - m) / sigma``.
    """
    ctx = _fit_context(result)
    pooled, fit = ctx["pooled"], ctx["fit"]
    prof = ctx.get("profile", pooled)
    model = _pooled_model(fit, prof, pooled)
    sigma = np.asarray(ctx.get("sigma_pooled", np.ones_like(pooled.mean)), dtype=np.float64)
    if sigma.shape != pooled.mean.shape:
        sigma = np.full(pooled.mean.shape, float(np.median(sigma)))
    with np.errstate(divide="ignore", invalid="ignore"):
        resid = np.where(sigma > 0, (pooled.mean - model) / sigma, np.nan)
    values = getattr(result, "values", {}) or {}
    unit = _level_unit(result)
    order = np.argsort(pooled.u, kind="stable")
    u = pooled.u[order]
    with _Drawing() as d:
        gs = d.fig.add_gridspec(2, 1, height_ratios=(3.0, 1.2))
        ax = d.fig.add_subplot(gs[0])
        axr = d.fig.add_subplot(gs[1], sharex=ax)
        many = u.size > 400
        ax.errorbar(u, pooled.mean[order], yerr=sigma[order], fmt="." if many else "o",
                    ms=1.5 if many else 2.5, color=PALETTE["blue"], ecolor=PALETTE["sky"],
                    elinewidth=0.6, capsize=0, label="bin means ± 1σ", zorder=2)
        ax.plot(u, model[order], color=PALETTE["vermillion"], lw=1.1, label="fitted model",
                zorder=3)
        ax.set_ylabel(f"mean level ({unit})")
        ax.margins(y=0.22)
        ax.legend(loc="upper center", ncols=2, frameon=True, framealpha=0.9, edgecolor="none")
        ax.tick_params(labelbottom=False)
        axr.axhspan(-1.0, 1.0, color=PALETTE["sky"], alpha=0.2, lw=0)
        axr.axhline(0.0, color=PALETTE["black"], lw=0.6)
        axr.plot(u, resid[order], ".", ms=2.0, color=PALETTE["blue"])
        axr.set_ylabel("residual (σ)")
        axr.set_xlabel("u, distance across the fringes (px)")
        chi = values.get("chi2_red")
        if chi is not None:
            axr.text(0.99, 0.95, f"χ²/dof = {chi:.2f}", transform=axr.transAxes, ha="right",
                     va="top", fontsize=7.5)
        p_txt = _fmt(values.get("period_px"), values.get("period_px_err"), "px")
        v_txt = _fmt(values.get("visibility"), values.get("visibility_err"))
        ax.set_title(_title(result, f"period {p_txt}, visibility {v_txt}"), loc="left")
        return d.save(path)


# --------------------------------------------------------------------------------------------
# spectrum
# --------------------------------------------------------------------------------------------


def windowed_spectrum(
    image: np.ndarray,
    *,
    max_side: int = 1024,
    pad: int | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Power spectrum of the mean-removed, Hann-windowed image, zero frequency centred.

    Parameters
    ----------
    image : (H, W) ndarray
        Image; non-finite pixels are replaced by the mean of the others.
    max_side : int
        Larger images are cut to their central ``max_side`` x ``max_side`` pixels.
    pad : int, optional
        Zero-padding factor (default 2 for sides up to 256 px, else 1).

    Returns
    -------
    f_x : (Nx,) ndarray
        Frequencies along x (columns), cycles/px, increasing.
    f_row : (Ny,) ndarray
        Frequencies along the rows, cycles/px, increasing.
    power : (Ny, Nx) ndarray
        |DFT|^2 with ``power[i, j]`` at ``(f_row[i], f_x[j])``.

    Notes
    -----
    A pattern ``cos(2 pi f . r + phi)`` puts its power at ``+f`` and ``-f``, with
    ``f = n / P`` for fringes of period P and normal n.

    References
    ----------
    .. [1] F. J. Harris, "On the use of windows for harmonic analysis with the discrete
       Fourier transform", Proc. IEEE 66(1), 51-83 (1978).

    Examples
    --------
    >>> fx, fr, p = windowed_spectrum(np.cos(2 * np.pi * np.arange(64) / 8)[None, :]
    ...                               * np.ones((32, 1)))
    >>> float(abs(fx[np.argmax(p.max(axis=0))]))
    0.125
    """
    img = _as_image(image)
    h, w = img.shape
    if h > max_side or w > max_side:
        r0, c0 = max(0, (h - max_side) // 2), max(0, (w - max_side) // 2)
        img = img[r0:r0 + max_side, c0:c0 + max_side]
        h, w = img.shape
    good = np.isfinite(img)
    level = float(img[good].mean()) if good.any() else 0.0
    img = np.where(good, img - level, 0.0)
    win = np.hanning(h + 2)[1:-1][:, None] * np.hanning(w + 2)[1:-1][None, :]
    k = int(pad) if pad is not None else (2 if max(h, w) <= 256 else 1)
    k = max(1, k)
    spec = np.fft.fftshift(np.fft.fft2(img * win, s=(k * h, k * w)))
    power = spec.real**2 + spec.imag**2
    f_x = np.fft.fftshift(np.fft.fftfreq(k * w))
    f_row = np.fft.fftshift(np.fft.fftfreq(k * h))
    return f_x, f_row, power


def plot_spectrum(
    image: np.ndarray,
    result: Any,
    path: str | os.PathLike,
    *,
    roi: Sequence[int] | None = None,
) -> str:
    """Log power of the windowed 2-D spectrum with the measured fringe frequency marked.

    Parameters
    ----------
    image : (H, W) or (H, W, 3) ndarray
        The frame (the analysed region is cut out as in `plot_frame`).
    result : FringeResult
        Its measurement; the peak ``f = n / P`` and its mirror ``-f`` are marked.
    path : str or path-like
        PNG file to write.
    roi : (X, Y, W, H), optional
        Analysed region within ``image``.

    Returns
    -------
    str
        The path written.

    Notes
    -----
    The vertical axis is the row frequency, growing downwards like the rows of the
    frame, so that the peak lies in the direction of the fringe normal drawn by
    `plot_frame`. The view is zoomed to about three times the fringe frequency.
    """
    img = _as_image(image, _label(result))
    x0, y0, w, h = _region(result, img.shape, roi)
    img = img[y0:y0 + h, x0:x0 + w]
    f_x, f_row, power = windowed_spectrum(img)
    top = float(power.max())
    floor = max(top * 1e-12, 1e-300)
    logp = np.log10(np.maximum(power, floor))
    lo = float(np.median(logp))
    hi = float(logp.max())
    if not hi > lo:
        hi = lo + 1.0
    dfx = f_x[1] - f_x[0] if f_x.size > 1 else 1.0
    dfr = f_row[1] - f_row[0] if f_row.size > 1 else 1.0
    extent = (f_x[0] - dfx / 2, f_x[-1] + dfx / 2, f_row[-1] + dfr / 2, f_row[0] - dfr / 2)
    values = getattr(result, "values", {}) or {}
    ok = getattr(result, "status", "ok") == "ok" and values.get("period_px")
    lim = 0.5
    if ok:
        t = math.radians(float(values["orientation_deg"]))
        p = float(values["period_px"])
        f = (math.cos(t) / p, -math.sin(t) / p)
        lim = float(min(0.5, max(3.0 / p, 10.0 / min(h, w))))
    with _Drawing() as d:
        ax = d.fig.add_subplot()
        im = ax.imshow(logp, cmap="cividis", vmin=lo, vmax=hi, origin="upper", extent=extent,
                       interpolation="nearest", aspect="equal")
        ax.grid(False)
        if ok:
            ax.plot([f[0], -f[0]], [f[1], -f[1]], "o", ms=11, mfc="none",
                    mec=PALETTE["orange"], mew=1.6, label="fringe frequency ±n/P")
            ax.annotate("n/P", xy=f, xytext=(6, 6), textcoords="offset points",
                        color=PALETTE["orange"], fontsize=8)
            ax.legend(loc="lower left", frameon=True, framealpha=0.9, edgecolor="none")
            p_txt = _fmt(values.get("period_px"), values.get("period_px_err"), "px")
            title = _title(result, f"fringe peak at n/P, P = {p_txt}")
        else:
            title = _title(result, str(getattr(result, "error", None) or "not measured"))
        ax.set_xlim(-lim, lim)
        ax.set_ylim(lim, -lim)
        ax.set_xlabel("f_x (cycles/px)")
        ax.set_ylabel("f_row (cycles/px, rows downwards)")
        ax.set_title(title, loc="left")
        cb = d.fig.colorbar(im, ax=ax, shrink=0.9)
        cb.set_label("log10 power (arbitrary units)")
        return d.save(path)


# --------------------------------------------------------------------------------------------
# phase drift
# --------------------------------------------------------------------------------------------


def _line_fit(x: np.ndarray, y: np.ndarray,
              sigma: np.ndarray | None) -> tuple[float, float, float, float]:
    """Weighted straight line y = a + b x: (b, sigma_b, a, chi2_red).

    The slope variance S / Delta (weights 1/sigma²) is scaled by max(1, chi²/(N-2));
    without sigmas the weights are equal and the variance is scaled by the residual
    variance (Bevington and Robinson, ch. 6).
    """
    weighted = sigma is not None and np.all(np.isfinite(sigma)) and np.all(sigma > 0)
    wts = 1.0 / sigma**2 if weighted else np.ones_like(x)
    s, sx, sy = wts.sum(), (wts * x).sum(), (wts * y).sum()
    sxx, sxy = (wts * x * x).sum(), (wts * x * y).sum()
    delta = s * sxx - sx * sx
    if not delta > 0:
        raise FringeError("drift: the frame positions do not vary")
    b = (s * sxy - sx * sy) / delta
    a = (sxx * sy - sx * sxy) / delta
    var_b = s / delta
    n = x.size
    resid = y - a - b * x
    chi2 = float((wts * resid**2).sum())
    chi2_red = chi2 / (n - 2) if n > 2 else float("nan")
    if n > 2:
        var_b *= max(1.0, chi2_red) if weighted else chi2_red
    return float(b), float(math.sqrt(max(var_b, 0.0))), float(a), chi2_red


def plot_drift(
    frames: Sequence[float] | np.ndarray,
    phases_unwrapped: Sequence[float] | np.ndarray,
    path: str | os.PathLike,
    *,
    summary: Mapping[str, Any] | None = None,
    phase_err: Sequence[float] | np.ndarray | None = None,
    frame_interval_s: float | None = None,
) -> str:
    """Phase against frame (or time) with the linear drift and the residual jitter.

    Parameters
    ----------
    frames : (N,) array_like
        Frame numbers of the measured frames.
    phases_unwrapped : (N,) array_like
        Unwrapped fringe phase of each frame, rad (NaN where missing).
    path : str or path-like
        PNG file to write.
    summary : mapping, optional
        A stack summary (``fringe.batch.stack_summary``): its
        ``phase_drift_rad_per_frame`` (``_err``), ``phase_drift_rad_per_s`` (``_err``),
        ``phase_jitter_rms_rad`` and ``frame_interval_s`` are annotated when present.
    phase_err : (N,) array_like, optional
        1-sigma phase uncertainties (rad): error bars and fit weights.
    frame_interval_s : float, optional
        Time between frames: the x axis is then time in seconds.

    Returns
    -------
    str
        The path written.

    Notes
    -----
    The line is the weighted least-squares fit ``phi = a + b x``; the lower panel is
    ``phi - a - b x``. The right axis gives the phase in waves (rad / 2 pi).

    References
    ----------
    .. [1] P. R. Bevington and D. K. Robinson, Data Reduction and Error Analysis for the
       Physical Sciences, 3rd ed., McGraw-Hill (2003), ch. 6.
    """
    x = np.asarray(frames, dtype=np.float64).ravel()
    ph = np.asarray(phases_unwrapped, dtype=np.float64).ravel()
    if x.shape != ph.shape:
        raise FringeError(f"drift: {x.size} frame numbers but {ph.size} phases")
    err = None if phase_err is None else np.asarray(phase_err, dtype=np.float64).ravel()
    if err is not None and err.shape != ph.shape:
        raise FringeError(f"drift: {ph.size} phases but {err.size} uncertainties")
    summ = dict(summary or {})
    dt = frame_interval_s if frame_interval_s is not None else summ.get("frame_interval_s")
    dt = float(dt) if dt is not None else None
    if dt is not None and not dt > 0:
        raise FringeError(f"drift: frame interval must be positive, got {dt!r}")
    good = np.isfinite(x) & np.isfinite(ph)
    if err is not None:
        good &= np.isfinite(err)
    if good.sum() < 2:
        raise FringeError("drift: fewer than 2 frames with a phase, nothing to plot")
    xs = x[good] * (dt if dt is not None else 1.0)
    ys = ph[good]
    es = err[good] if err is not None else None
    slope, slope_err, icpt, _ = _line_fit(xs, ys, es)
    resid = ys - icpt - slope * xs
    rms = float(np.sqrt(np.mean(resid**2)))
    per = "s" if dt is not None else "frame"
    if dt is not None and summ.get("phase_drift_rad_per_s") is not None:
        rate, rate_err = summ["phase_drift_rad_per_s"], summ.get("phase_drift_rad_per_s_err")
    elif dt is None and summ.get("phase_drift_rad_per_frame") is not None:
        rate = summ["phase_drift_rad_per_frame"]
        rate_err = summ.get("phase_drift_rad_per_frame_err")
    else:
        rate, rate_err = slope, slope_err
    if summ.get("phase_jitter_rms_rad") is not None:
        rms = float(summ["phase_jitter_rms_rad"])
    two_pi = 2.0 * math.pi
    with _Drawing() as d:
        gs = d.fig.add_gridspec(2, 1, height_ratios=(3.0, 1.3))
        ax = d.fig.add_subplot(gs[0])
        axr = d.fig.add_subplot(gs[1], sharex=ax)
        if es is not None:
            ax.errorbar(xs, ys, yerr=es, fmt="o", ms=3, color=PALETTE["blue"],
                        ecolor=PALETTE["sky"], elinewidth=0.7, capsize=0, label="measured")
            axr.errorbar(xs, resid, yerr=es, fmt="o", ms=2.5, color=PALETTE["blue"],
                         ecolor=PALETTE["sky"], elinewidth=0.7, capsize=0)
        else:
            ax.plot(xs, ys, "o", ms=3, color=PALETTE["blue"], label="measured")
            axr.plot(xs, resid, "o", ms=2.5, color=PALETTE["blue"])
        xx = np.array([xs.min(), xs.max()])
        ax.plot(xx, icpt + slope * xx, color=PALETTE["vermillion"], lw=1.2,
                label=f"drift {_fmt(rate, rate_err, f'rad/{per}')}")
        ax.set_ylabel("phase, unwrapped (rad)")
        ax.tick_params(labelbottom=False)
        sec = ax.secondary_yaxis("right", functions=(lambda r: r / two_pi,
                                                     lambda wv: wv * two_pi))
        sec.set_ylabel("phase (waves)")
        ax.legend(loc="best")
        axr.axhspan(-rms, rms, color=PALETTE["sky"], alpha=0.2, lw=0)
        axr.axhline(0.0, color=PALETTE["black"], lw=0.6)
        axr.set_ylabel("residual (rad)")
        axr.set_xlabel("time (s)" if dt is not None else "frame")
        axr.text(0.99, 0.95, f"jitter RMS {rms:.3g} rad ({rms / two_pi:.3g} waves)",
                 transform=axr.transAxes, ha="right", va="top", fontsize=7.5)
        ax.set_title(f"phase drift over {int(good.sum())} frames: "
                     f"{_fmt(rate, rate_err, f'rad/{per}')}", loc="left")
        return d.save(path)


# --------------------------------------------------------------------------------------------
# photon build-up
# --------------------------------------------------------------------------------------------


def _rows_of(table: Any) -> list[Mapping[str, Any]]:
    if hasattr(table, "values") and isinstance(getattr(table, "values", None), dict):
        table = table.values.get("build_up")
    elif isinstance(table, Mapping):
        table = table.get("build_up")
    if table is None:
        return []
    return [r for r in table if isinstance(r, Mapping)]


def plot_buildup(table: Any, path: str | os.PathLike) -> str:
    """Visibility and significance of a photon-counting run against the photons detected.

    Parameters
    ----------
    table : sequence of mappings, or a photon result
        Build-up rows with ``photons``, ``visibility``, ``visibility_err`` and
        ``significance`` (Gaussian sigma); a result (or its dict) holding them under
        ``build_up`` is accepted too. Rows without a visibility are skipped.
    path : str or path-like
        PNG file to write.

    Returns
    -------
    str
        The path written.

    Notes
    -----
    The photon axis is logarithmic: the visibility error shrinks as 1/sqrt(photons)
    and the significance grows as sqrt(photons) for a fixed pattern. Dashed lines mark
    3 and 5 sigma (common practice thresholds for evidence and detection).
    """
    rows = _rows_of(table)

    def num(r: Mapping[str, Any], key: str) -> float:
        v = r.get(key)
        return float(v) if v is not None else float("nan")

    n = np.array([num(r, "photons") for r in rows])
    vis = np.array([num(r, "visibility") for r in rows])
    verr = np.array([num(r, "visibility_err") for r in rows])
    sig = np.array([num(r, "significance") for r in rows])
    keep = np.isfinite(n) & (n > 0)
    if not (keep & np.isfinite(vis)).any():
        raise FringeError("build-up: no rows with photons and a visibility to plot")
    n, vis, verr, sig = n[keep], vis[keep], verr[keep], sig[keep]
    with _Drawing() as d:
        gs = d.fig.add_gridspec(2, 1, height_ratios=(1.0, 1.0))
        ax = d.fig.add_subplot(gs[0])
        ax2 = d.fig.add_subplot(gs[1], sharex=ax)
        fv = np.isfinite(vis)
        ax.errorbar(n[fv], vis[fv], yerr=np.where(np.isfinite(verr[fv]), verr[fv], 0.0),
                    fmt="o-", ms=3.5, lw=0.8, color=PALETTE["blue"], ecolor=PALETTE["sky"],
                    elinewidth=0.9, capsize=2)
        ax.set_xscale("log")
        ax.set_ylabel("visibility")
        ax.tick_params(labelbottom=False)
        fs = np.isfinite(sig)
        if fs.any():
            ax2.plot(n[fs], sig[fs], "s-", ms=3.5, lw=0.8, color=PALETTE["vermillion"])
        for level, style in ((3.0, ":"), (5.0, "--")):
            ax2.axhline(level, color=PALETTE["black"], lw=0.7, ls=style)
            ax2.text(1.0, level, f" {level:g} σ", transform=ax2.get_yaxis_transform(),
                     va="center", ha="left", fontsize=7)
        ax2.set_ylabel("significance (σ)")
        ax2.set_xlabel("photons detected")
        last = -1
        ax.set_title(f"photon build-up: visibility {_fmt(vis[fv][last], verr[fv][last])} "
                     f"after {int(n[fv][last])} photons", loc="left")
        return d.save(path)


# --------------------------------------------------------------------------------------------
# wavefront
# --------------------------------------------------------------------------------------------


def _zernike_rows(zernike: Any) -> list[tuple[int, str, float, float]]:
    """(j, name, coefficient, error) from dicts, a coefficient object or an array."""
    if zernike is None:
        return []
    if hasattr(zernike, "coefficients"):
        coef = np.asarray(zernike.coefficients, dtype=np.float64).ravel()
        errs = np.asarray(getattr(zernike, "errors", np.full(coef.size, np.nan)),
                          dtype=np.float64).ravel()
        return [(j + 1, "", float(coef[j]), float(errs[j]) if j < errs.size else float("nan"))
                for j in range(coef.size)]
    items = list(zernike)
    if items and isinstance(items[0], Mapping):
        out = []
        for k, r in enumerate(items):
            c = r.get("coefficient_waves", r.get("coefficient", r.get("value")))
            e = r.get("err", r.get("coefficient_waves_err", r.get("error")))
            if c is None:
                continue
            out.append((int(r.get("j", k + 1)), str(r.get("name", "") or ""), float(c),
                        float(e) if e is not None else float("nan")))
        return out
    coef = np.asarray(items, dtype=np.float64).ravel()
    return [(j + 1, "", float(coef[j]), float("nan")) for j in range(coef.size)]


def plot_wavefront(phase_map: np.ndarray, zernike: Any, path: str | os.PathLike) -> str:
    """Wavefront map (waves) beside a bar chart of its Zernike coefficients.

    Parameters
    ----------
    phase_map : (h, w) ndarray
        Wavefront in waves, NaN (or masked) outside the pupil.
    zernike : sequence of mappings, coefficient object or (J,) array_like
        Coefficients by Noll index: mappings with ``j``, ``name``, ``coefficient_waves``
        and ``err`` (as in a wavefront result), an object with ``coefficients`` and
        ``errors``, or plain coefficients for j = 1, 2, ...; None for the map alone.
    path : str or path-like
        PNG file to write.

    Returns
    -------
    str
        The path written.

    Notes
    -----
    The colour scale is symmetric about zero, to the 99.5th percentile of |W|. RMS and
    peak-to-valley in the title are those of the map as shown (after any terms removed
    from it).

    References
    ----------
    .. [1] R. J. Noll, "Zernike polynomials and atmospheric turbulence", J. Opt. Soc. Am.
       66(3), 207-211 (1976) (index j).
    """
    arr = np.ma.filled(np.ma.asarray(phase_map, dtype=np.float64), np.nan)
    if arr.ndim != 2:
        raise FringeError(f"wavefront map: expected a 2-D array, got shape {arr.shape}")
    fin = arr[np.isfinite(arr)]
    if fin.size == 0:
        raise FringeError("wavefront map: no valid samples to plot")
    lim = float(np.percentile(np.abs(fin), 99.5))
    if not lim > 0:
        lim = max(float(np.max(np.abs(fin))), 1e-3)
    rms = float(np.sqrt(np.mean((fin - fin.mean()) ** 2)))
    pv = float(np.ptp(fin))
    rows = _zernike_rows(zernike)
    size = (6.4, max(4.0, 0.15 * len(rows) + 1.2))
    with _Drawing(size) as d:
        if rows:
            gs = d.fig.add_gridspec(1, 2, width_ratios=(1.25, 1.0))
            ax = d.fig.add_subplot(gs[0])
            axb = d.fig.add_subplot(gs[1])
        else:
            ax, axb = d.fig.add_subplot(), None
        h, w = arr.shape
        im = ax.imshow(arr, cmap="PuOr_r", vmin=-lim, vmax=lim, origin="upper",
                       extent=(-0.5, w - 0.5, h - 0.5, -0.5), interpolation="nearest")
        ax.grid(False)
        ax.set_xlabel("x (map samples)")
        ax.set_ylabel("row (map samples)")
        cb = d.fig.colorbar(im, ax=ax, shrink=0.85, location="bottom")
        cb.set_label("wavefront (waves)")
        ax.set_title(f"RMS {rms:.3g} waves, PV {pv:.3g} waves", loc="left")
        if axb is not None:
            ypos = np.arange(len(rows))[::-1]
            coef = np.array([r[2] for r in rows])
            errs = np.array([r[3] for r in rows])
            colours = [PALETTE["blue"] if c >= 0 else PALETTE["orange"] for c in coef]
            axb.barh(ypos, coef, color=colours, height=0.7,
                     xerr=np.where(np.isfinite(errs), errs, 0.0),
                     error_kw={"elinewidth": 0.8, "ecolor": PALETTE["black"], "capsize": 1.5})
            axb.set_axisbelow(True)
            axb.axvline(0.0, color=PALETTE["black"], lw=0.6)
            labels = [f"{j} {name}".strip() for j, name, _, _ in rows]
            axb.set_yticks(ypos, labels, fontsize=7 if len(rows) <= 15 else 5.5)
            axb.set_xlabel("coefficient (waves)")
            axb.set_title("Zernike terms (Noll j)", loc="left")
            axb.grid(axis="y", visible=False)
        return d.save(path)
