"""PNG figures: each plot writes one readable, non-blank PNG, and the overlays follow the
project's geometry conventions."""

from __future__ import annotations

import builtins
import copy
import importlib.util
import os

import cv2
import numpy as np
import pytest

import fringe
from fringe import figures as F
from fringe._util import FringeError
from fringe.synth import render_fringes

needs_mpl = pytest.mark.skipif(importlib.util.find_spec("matplotlib") is None,
                               reason="matplotlib (extra 'plot') is not installed")

# W3C, "Portable Network Graphics (PNG) Specification (Second Edition)", 2003, section 5.2
# (PNG signature): every PNG datastream starts with these eight bytes.
PNG_SIGNATURE = bytes([137, 80, 78, 71, 13, 10, 26, 10])

PERIOD, ANGLE, PHASE, VIS = 10.0, 30.0, 0.5, 0.6


def _check_png(path: str) -> np.ndarray:
    """The PNG exists, is complete (no .part left), decodes, and is not blank."""
    assert os.path.isfile(path)
    assert not os.path.exists(path + ".part")
    with open(path, "rb") as fh:
        data = fh.read()
    assert data[:8] == PNG_SIGNATURE
    img = cv2.imdecode(np.frombuffer(data, np.uint8), cv2.IMREAD_COLOR)
    assert img is not None and img.ndim == 3 and min(img.shape[:2]) > 100
    grey = img.astype(float).mean(axis=2)
    assert grey.var() > 100.0, "figure is (nearly) uniform"
    # A blank canvas is white; a drawn figure has a good share of non-white pixels.
    assert np.mean(grey < 200) > 0.02
    return img


@pytest.fixture(scope="module")
def frame():
    img = render_fringes((96, 128), period_px=PERIOD, orientation_deg=ANGLE, phase_rad=PHASE,
                         visibility=VIS, mean=1000.0)
    return np.random.default_rng(8).poisson(img).astype(float)


@pytest.fixture(scope="module")
def measured(frame):
    r = fringe.measure(frame)
    assert r.ok
    return r


@needs_mpl
def test_plot_frame_png_and_inputs_untouched(frame, measured, tmp_path):
    before_img = frame.copy()
    before = copy.deepcopy(measured.to_dict())
    out = F.plot_frame(frame, measured, tmp_path / "frame.png")
    assert out == str(tmp_path / "frame.png")
    _check_png(out)
    np.testing.assert_array_equal(frame, before_img)
    assert measured.to_dict() == before


@needs_mpl
def test_plot_frame_colour_roi_and_failed_result(frame, tmp_path):
    big = np.full((140, 180), 1000.0)
    big[20:116, 30:158] = frame
    r = fringe.measure(big, roi=(30, 20, 128, 96))
    assert r.ok
    colour = np.repeat(big[:, :, None], 3, axis=2)
    _check_png(F.plot_frame(colour, r, tmp_path / "roi.png"))
    flat = np.random.default_rng(1).normal(1000.0, 5.0, (64, 64))
    bad = fringe.measure(flat)
    assert not bad.ok
    _check_png(F.plot_frame(flat, bad, tmp_path / "failed.png"))
    with pytest.raises(FringeError, match="nothing to plot"):
        F.plot_profile(bad, tmp_path / "p.png")
    with pytest.raises(FringeError, match="does not fit"):
        F.plot_frame(frame, r, tmp_path / "x.png", roi=(100, 0, 64, 64))


@needs_mpl
def test_plot_profile_png(measured, tmp_path):
    before = copy.deepcopy(measured.to_dict())
    _check_png(F.plot_profile(measured, tmp_path / "profile.png"))
    assert measured.to_dict() == before


def test_pooled_model_matches_pooled_data(measured):
    # The pooled model curve must follow the pooled data: the noise model gives the bin
    # errors, so the normalised residuals have unit spread when the fit is right.
    ctx = measured.context
    model = F._pooled_model(ctx["fit"], ctx["profile"], ctx["pooled"])
    assert model.shape == ctx["pooled"].mean.shape
    z = (ctx["pooled"].mean - model) / ctx["sigma_pooled"]
    assert 0.7 < float(np.std(z)) < 1.4
    assert abs(float(np.mean(z))) < 0.3


@needs_mpl
def test_plot_spectrum_png(frame, measured, tmp_path):
    before_img = frame.copy()
    _check_png(F.plot_spectrum(frame, measured, tmp_path / "spectrum.png"))
    np.testing.assert_array_equal(frame, before_img)


def test_windowed_spectrum_peak_at_fringe_frequency(frame):
    # A cosine of spatial frequency f has its spectral power at +f and -f (R. N. Bracewell,
    # The Fourier Transform and Its Applications, 3rd ed., 2000, ch. 6); the fringe
    # frequency is n / P with n = (cos t, -sin t) (project convention, fringe.synth).
    fx, fr, power = F.windowed_spectrum(frame)
    i, j = np.unravel_index(np.argmax(power), power.shape)
    t = np.deg2rad(ANGLE)
    f = np.array([np.cos(t), -np.sin(t)]) / PERIOD
    got = np.array([fx[j], fr[i]])
    d = min(np.abs(got - f).max(), np.abs(got + f).max())
    assert d <= max(fx[1] - fx[0], fr[1] - fr[0]) + 1e-12


def test_overlay_normal_points_towards_increasing_phase(frame, measured):
    # Project convention (fringe.synth, fringe.orient): I = B + A cos(2 pi n.(r - c)/P + phi)
    # with n = (cos t, -sin t) in (x, row). Along the drawn arrow the image must follow
    # cos(+2 pi s/P + phi), not cos(-2 pi s/P + phi).
    from scipy.ndimage import map_coordinates

    g = F.overlay_geometry(measured, shape=frame.shape)
    cx, cy = g["centre"]
    nx, nr = g["normal"]
    s = np.linspace(-30, 30, 241)
    vals = map_coordinates(frame, [cy + s * nr, cx + s * nx], order=1)
    vals = vals - vals.mean()
    plus = np.cos(2 * np.pi * s / PERIOD + PHASE)
    minus = np.cos(-2 * np.pi * s / PERIOD + PHASE)
    # Over whole periods corr(cos(x + phi), cos(-x + phi)) = cos(2 phi) = 0.54 for 0.5 rad.
    c_plus, c_minus = np.corrcoef(vals, plus)[0, 1], np.corrcoef(vals, minus)[0, 1]
    assert c_plus > 0.95
    assert c_minus < c_plus - 0.3
    ex, ey = g["arrow_end"]
    assert ex > cx and ey < cy  # 30 deg: to the right and up the screen


def test_overlay_vertical_normal_and_roi_offset():
    # t = 90 deg: n = (0, -1), the arrow points up the screen (rows decrease).
    img = render_fringes((64, 80), period_px=8.0, orientation_deg=90.0, phase_rad=0.3,
                         visibility=0.8, mean=500.0)
    big = np.full((100, 120), 500.0)
    big[10:74, 20:100] = img
    r = fringe.measure(big, roi=(20, 10, 80, 64))
    assert r.ok
    g = F.overlay_geometry(r, shape=big.shape)
    assert g["region"] == (20, 10, 80, 64)
    assert g["centre"] == pytest.approx((20 + 79 / 2, 10 + 63 / 2))
    ex, ey = g["arrow_end"]
    assert ex == pytest.approx(g["centre"][0], abs=0.5)
    assert ey < g["centre"][1] - 5
    # Band corners cover the region (all pixels used).
    band = g["band"]
    assert band[:, 0].min() <= 20 and band[:, 0].max() >= 99
    assert band[:, 1].min() <= 10 and band[:, 1].max() >= 73


def test_overlay_band_follows_a_spot_fading_along_the_fringes():
    # The fringes are bright only in a band along them (a beam spot): the band drawn
    # must be narrower than the region and hold the brightest part.
    v0 = 20.0
    img = render_fringes((120, 160), period_px=9.0, orientation_deg=20.0, phase_rad=0.5,
                         visibility=0.7, mean=1000.0,
                         envelope=lambda u, v: 0.05 + np.exp(-0.5 * ((v - v0) / 10.0) ** 2))
    img = np.random.default_rng(3).poisson(img).astype(float)
    r = fringe.measure(img)
    assert r.ok
    g = F.overlay_geometry(r, shape=img.shape)
    assert g["band_source"].startswith("brightest band")
    t = np.deg2rad(20.0)
    s_vec = np.array([np.sin(t), np.cos(t)])
    c = np.array(g["centre"])
    v_corners = (g["band"] - c) @ s_vec
    lo, hi = v_corners.min(), v_corners.max()
    assert hi - lo < 0.5 * (120 + 160)
    assert lo - 3 <= v0 <= hi + 3


@needs_mpl
def test_plot_drift_png_and_summary(tmp_path):
    rng = np.random.default_rng(4)
    k = np.arange(40)
    ph = 0.15 * k + rng.normal(0, 0.05, k.size)
    _check_png(F.plot_drift(k, ph, tmp_path / "drift.png", phase_err=np.full(k.size, 0.05)))
    summ = {"phase_drift_rad_per_frame": 0.15, "phase_drift_rad_per_frame_err": 0.001,
            "phase_drift_rad_per_s": 1.5, "phase_drift_rad_per_s_err": 0.01,
            "phase_jitter_rms_rad": 0.05, "frame_interval_s": 0.1}
    ph_nan = ph.copy()
    ph_nan[3] = np.nan
    before = ph_nan.copy()
    _check_png(F.plot_drift(k, ph_nan, tmp_path / "drift_t.png", summary=summ))
    np.testing.assert_array_equal(ph_nan, before)
    with pytest.raises(FringeError, match="fewer than 2"):
        F.plot_drift([0], [1.0], tmp_path / "x.png")


def test_line_fit_matches_numpy_polyfit():
    # Reference: numpy.polyfit (independent least-squares implementation); its default
    # covariance is scaled by chi2/(N - 2) for a line, as is ours without sigmas, and
    # with cov="unscaled" and w = 1/sigma it is the inverse information matrix
    # (P. R. Bevington and D. K. Robinson, Data Reduction and Error Analysis, 3rd ed.,
    # 2003, eqs. 6.12 and 6.21).
    rng = np.random.default_rng(5)
    x = np.arange(25, dtype=float)
    y = 0.3 - 0.07 * x + rng.normal(0, 0.1, x.size)
    b, sb, a, _ = F._line_fit(x, y, None)
    coef, cov = np.polyfit(x, y, 1, cov=True)
    assert b == pytest.approx(coef[0], rel=1e-10) and a == pytest.approx(coef[1], rel=1e-9)
    assert sb == pytest.approx(np.sqrt(cov[0, 0]), rel=1e-8)
    sig = np.full(x.size, 0.2)  # errors larger than the scatter: chi2_red < 1, not scaled
    b, sb, _, chi = F._line_fit(x, y, sig)
    coef, cov = np.polyfit(x, y, 1, w=1 / sig, cov="unscaled")
    assert chi < 1
    assert sb == pytest.approx(np.sqrt(cov[0, 0]), rel=1e-8)


@needs_mpl
def test_plot_buildup_png(tmp_path):
    # Rows shaped like the photon-counting build-up table; visibility error ~ 1/sqrt(N)
    # and significance ~ sqrt(N) (common practice scaling, used here as plausible data).
    rows = [{"frames": i + 1, "photons": int(n), "visibility": 0.6,
             "visibility_err": 1.4 / np.sqrt(n), "significance": 0.3 * np.sqrt(n)}
            for i, n in enumerate([20, 50, 200, 800, 3000])]
    rows.append({"frames": 9, "photons": 4000, "visibility": None, "visibility_err": None,
                 "significance": None})
    before = copy.deepcopy(rows)
    _check_png(F.plot_buildup(rows, tmp_path / "build.png"))
    assert rows == before
    _check_png(F.plot_buildup({"build_up": rows}, tmp_path / "build2.png"))
    with pytest.raises(FringeError, match="no rows"):
        F.plot_buildup([], tmp_path / "x.png")


@needs_mpl
def test_plot_wavefront_png(tmp_path):
    y, x = np.mgrid[-1:1:64j, -1:1:64j]
    rho2 = x * x + y * y
    w = 0.1 * np.sqrt(3) * (2 * rho2 - 1) + 0.04 * 2 * x
    w[rho2 > 1] = np.nan
    before = w.copy()
    z = [{"j": 1, "name": "piston", "coefficient_waves": 0.0, "err": 0.001},
         {"j": 2, "name": "tilt x", "coefficient_waves": 0.04, "err": 0.001},
         {"j": 3, "name": "tilt y", "coefficient_waves": 0.0, "err": 0.001},
         {"j": 4, "name": "defocus", "coefficient_waves": 0.1, "err": 0.002}]
    _check_png(F.plot_wavefront(w, z, tmp_path / "wf.png"))
    np.testing.assert_array_equal(w, before)

    class Coefs:
        coefficients = np.array([0.0, 0.04, 0.0, 0.1, -0.01])
        errors = np.full(5, 0.002)

    _check_png(F.plot_wavefront(w, Coefs(), tmp_path / "wf2.png"))
    _check_png(F.plot_wavefront(w, [0.0, 0.04, 0.0, 0.1], tmp_path / "wf3.png"))
    _check_png(F.plot_wavefront(np.ma.masked_invalid(w), None, tmp_path / "wf4.png"))
    with pytest.raises(FringeError, match="no valid samples"):
        F.plot_wavefront(np.full((8, 8), np.nan), z, tmp_path / "x.png")


def test_missing_matplotlib_is_a_fringe_error(measured, frame, tmp_path, monkeypatch):
    real_import = builtins.__import__

    def fake_import(name, *args, **kwargs):
        if name == "matplotlib" or name.startswith("matplotlib."):
            raise ImportError(f"No module named {name!r}")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", fake_import)
    calls = [lambda p: F.plot_frame(frame, measured, p),
             lambda p: F.plot_profile(measured, p),
             lambda p: F.plot_spectrum(frame, measured, p),
             lambda p: F.plot_drift([0, 1, 2], [0.0, 0.1, 0.2], p),
             lambda p: F.plot_buildup([{"photons": 10, "visibility": 0.5}], p),
             lambda p: F.plot_wavefront(np.zeros((4, 4)), [0.1], p)]
    for k, call in enumerate(calls):
        target = tmp_path / f"f{k}.png"
        with pytest.raises(FringeError, match=r"pip install 'fringe\[plot\]'"):
            call(target)
        assert not target.exists() and not os.path.exists(str(target) + ".part")


@needs_mpl
def test_unwritable_path_is_a_fringe_error(measured, tmp_path):
    with pytest.raises(FringeError, match="cannot write figure"):
        F.plot_profile(measured, tmp_path / "no-such-folder" / "p.png")
