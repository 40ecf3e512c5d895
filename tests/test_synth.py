"""Tests for fringe.synth: optics against closed forms, sensor statistics, file output."""

from __future__ import annotations

import hashlib
import io
import json
from pathlib import Path

import cv2
import numpy as np
import pytest
import tifffile
from scipy import optimize, special

from fringe import synth
from fringe._util import FringeError

SAMPLES = Path(__file__).resolve().parents[1] / "sample-images"

# Section numbers cited for Hecht (Optics, 5th ed., 2017), Born & Wolf (Principles of
# Optics, 7th ed., 1999) and Goodman (Statistical Optics, 2nd ed., 2015) are from memory.


def closed_form_two_slit(y, lam, d, a, L):
    """(sin b / b)^2 cos^2 a' with the exact flat-screen sin(theta)."""
    s = y / np.hypot(y, L)
    return np.sinc(a * s / lam) ** 2 * np.cos(np.pi * d * s / lam) ** 2


def michelson_visibility(values):
    hi, lo = float(np.max(values)), float(np.min(values))
    return (hi - lo) / (hi + lo)


# ------------------------------------------------------------------ two_slit_intensity


def test_two_slit_matches_reference_values():
    # Hecht, Optics, 5th ed., 2017, sec. 10.2.2 (Fraunhofer double slit); check values
    # from references.md sec. 1 (computed from the closed form): 632.8 nm, d 0.25 mm,
    # a 50 um, L 1 m -> I/I(0) = 0.658464 at 0.5 mm, 0.102654 at 1.0 mm, 0 at dy/2.
    kw = dict(wavelength_m=632.8e-9, separation_m=0.25e-3, width_m=50e-6, distance_m=1.0)
    i = synth.two_slit_intensity(np.array([0.0, 0.5e-3, 1.0e-3]), **kw)
    np.testing.assert_allclose(i, [1.0, 0.658464, 0.102654], atol=1e-6)
    half_spacing = 0.5 * 1.0 * np.tan(np.arcsin(632.8e-9 / 0.25e-3))
    assert synth.two_slit_intensity(half_spacing, **kw) < 1e-9


def test_two_slit_matches_closed_form_everywhere():
    # Hecht, Optics, 5th ed., 2017, sec. 10.2.2: I = I(0) (sin b / b)^2 cos^2 a.
    lam, d, a, L = 632.8e-9, 0.25e-3, 50e-6, 1.0
    y = np.linspace(-30e-3, 30e-3, 2001)
    y_before = y.copy()
    i = synth.two_slit_intensity(y, wavelength_m=lam, separation_m=d, width_m=a, distance_m=L)
    np.testing.assert_allclose(i, closed_form_two_slit(y, lam, d, a, L), atol=1e-9)
    np.testing.assert_array_equal(y, y_before)


def test_two_slit_first_maximum_uses_flat_screen_geometry():
    # references.md sec. 1: d sin(theta_m) = m lambda, y_m = L tan(theta_m); 532 nm,
    # d = 5 um, L = 1 m -> y1 = 0.107007 m (the small-angle 0.106400 m is 0.57 % low).
    kw = dict(wavelength_m=532e-9, separation_m=5e-6, width_m=1e-9, distance_m=1.0)
    res = optimize.minimize_scalar(lambda y: -synth.two_slit_intensity(y, **kw),
                                   bounds=(0.100, 0.114), method="bounded",
                                   options={"xatol": 1e-10})
    assert res.x == pytest.approx(0.107007, abs=1e-6)


def test_two_slit_envelope_zero_and_missing_order():
    # references.md sec. 1: envelope zero a sin(theta) = lambda at 12.6570 mm exact
    # (12.6560 mm small-angle) for 632.8 nm, a = 50 um, L = 1 m; d / a = 5 removes order
    # 5 and leaves 2k - 1 = 9 fringes in the central envelope (Hecht 2017, sec. 10.2.2).
    kw = dict(wavelength_m=632.8e-9, separation_m=0.25e-3, width_m=50e-6, distance_m=1.0)
    at_exact = synth.two_slit_intensity(12.6570e-3, **kw)
    at_small_angle = synth.two_slit_intensity(12.6560e-3, **kw)
    assert at_exact < 1e-9
    assert at_exact < at_small_angle / 100
    y = np.linspace(-12.6570e-3, 12.6570e-3, 20001)
    i = synth.two_slit_intensity(y, **kw)
    # bright fringes: local maxima above 1 % of the centre (the suppressed 5th order leaves
    # only two faint shoulders, 0.0014 of the centre, next to the envelope zeros)
    peaks = np.flatnonzero((i[1:-1] > i[:-2]) & (i[1:-1] > i[2:]) & (i[1:-1] > 0.01))
    assert peaks.size == 9
    y5 = 1.0 * np.tan(np.arcsin(5 * 632.8e-9 / 0.25e-3))
    y4 = 1.0 * np.tan(np.arcsin(4 * 632.8e-9 / 0.25e-3))
    assert synth.two_slit_intensity(y5, **kw) < 1e-9
    # order 4 sits at sinc^2(4/5) of the envelope, cos^2 = 1 there
    assert synth.two_slit_intensity(y4, **kw) == pytest.approx(np.sinc(0.8) ** 2, rel=1e-9)


def test_two_slit_tilted_source_centres_the_pattern_on_its_angle():
    # Born & Wolf, Principles of Optics, 7th ed., 1999, sec. 8.5: a plane wave incident at
    # alpha is diffracted as exp(-i k x (sin theta - sin alpha)), centred on theta = alpha.
    kw = dict(wavelength_m=600e-9, separation_m=0.5e-3, width_m=0.1e-3, distance_m=1.0)
    alpha = 2e-4
    centre = np.tan(alpha)
    on = synth.two_slit_intensity(centre, source_angles=[alpha], **kw)
    assert on == pytest.approx(1.0, abs=1e-12)
    assert synth.two_slit_intensity(0.0, source_angles=[alpha], **kw) < 0.9


def test_two_slit_input_checks():
    kw = dict(wavelength_m=600e-9, distance_m=1.0)
    with pytest.raises(FringeError, match="smaller than separation"):
        synth.two_slit_intensity(0.0, separation_m=1e-4, width_m=2e-4, **kw)
    with pytest.raises(FringeError, match="source_weights"):
        synth.two_slit_intensity(0.0, separation_m=1e-3, width_m=1e-4,
                                 source_angles=[0.0, 1e-4], source_weights=[1.0], **kw)
    with pytest.raises(FringeError, match="wavelength_m"):
        synth.two_slit_intensity(0.0, wavelength_m=-1.0, separation_m=1e-3, width_m=1e-4,
                                 distance_m=1.0)


# -------------------------------------------------------------- spatial coherence


def visibility_near_centre(lam, d, L, angles, weights, a=20e-6):
    period = lam * L / d
    y = np.linspace(-0.5 * period, 0.5 * period, 2001)
    i = synth.two_slit_intensity(y, wavelength_m=lam, separation_m=d, width_m=a,
                                 distance_m=L, source_angles=angles, source_weights=weights)
    return michelson_visibility(i), i


def test_slit_source_visibility_reference_value():
    # Born & Wolf, Principles of Optics, 7th ed., 1999, sec. 10.4 (van Cittert-Zernike):
    # V = |sinc(pi w d / (lambda R))|; references.md sec. 3: 550 nm, w 0.1 mm, R 1 m,
    # d 2 mm -> x = 1.14240, V = 0.796248.
    ang, wt = synth.source_points("slit", size_m=0.1e-3, distance_m=1.0)
    v, _ = visibility_near_centre(550e-9, 2e-3, 1.0, ang, wt)
    assert v == pytest.approx(0.796248, abs=2e-4)


@pytest.mark.parametrize("w", [0.05e-3, 0.2e-3, 0.35e-3])
def test_slit_source_visibility_formula(w):
    # Born & Wolf 1999, sec. 10.4: |mu| = |sin x / x|, x = pi w d / (lambda R).
    lam, d, R = 550e-9, 2e-3, 1.0
    ang, wt = synth.source_points("slit", size_m=w, distance_m=R)
    v, _ = visibility_near_centre(lam, d, 1.0, ang, wt)
    assert v == pytest.approx(abs(np.sinc(w * d / (lam * R))), abs=2e-4)


@pytest.mark.parametrize("x", [1.0, 2.5, 4.5])
def test_disk_source_visibility_bessel(x):
    # Born & Wolf 1999, sec. 10.4: uniform disk, |mu| = |2 J1(x) / x| with
    # x = pi D d / (lambda R); scipy.special.j1 as the reference Bessel function. Past the
    # first zero (x = 3.83171, references.md sec. 3) mu < 0 and the centre becomes dark.
    lam, d, R = 550e-9, 2e-3, 1.0
    diameter = x * lam * R / (np.pi * d)
    ang, wt = synth.source_points("disk", size_m=diameter, distance_m=R)
    v, i = visibility_near_centre(lam, d, 1.0, ang, wt)
    mu = 2 * special.j1(x) / x
    assert v == pytest.approx(abs(mu), abs=1e-3)
    centre_is_bright = i[i.size // 2] > i[0]
    assert centre_is_bright == (mu > 0)


def test_source_points_checks():
    with pytest.raises(FringeError, match="'slit' or 'disk'"):
        synth.source_points("square", size_m=1e-4, distance_m=1.0)
    ang, wt = synth.source_points("disk", size_m=1e-3, distance_m=0.5, n=9)
    assert wt.sum() == pytest.approx(1.0)
    np.testing.assert_allclose(ang, -ang[::-1], atol=1e-18)
    assert np.all(np.abs(ang) <= np.arctan(0.5e-3 / 0.5))


# ------------------------------------------------------------ temporal coherence


def local_modulation(y0, lam, d, L, **kw):
    """Fit B + (c + c' dy) cos(psi) + (s + s' dy) sin(psi) + B' dy over +-1 fringe."""
    period = lam * L / d / np.cos(np.arctan(y0 / L)) ** 3
    y = y0 + np.linspace(-period, period, 801)
    i = synth.two_slit_intensity(y, wavelength_m=lam, separation_m=d, distance_m=L, **kw)
    psi = 2 * np.pi * d * (y / np.hypot(y, L)) / lam
    dy = (y - y0) / period
    m = np.column_stack([np.ones_like(y), dy, np.cos(psi), dy * np.cos(psi),
                         np.sin(psi), dy * np.sin(psi)])
    c = np.linalg.lstsq(m, i, rcond=None)[0]
    return np.hypot(c[2], c[4]) / c[0]


@pytest.mark.parametrize(("opd_m", "expected"), [
    # references.md sec. 4: Gaussian spectrum, V = 1/2 at 0.441271 lambda^2 / dlambda
    (0.441271 * 632.8e-9**2 / 2e-9, 0.5),
    # references.md sec. 4: sampled Gaussian spectrum, 632.8 nm, FWHM 2 nm:
    # |gamma| = 0.410686 at 0.100109 mm
    (0.100109e-3, 0.410686),
])
def test_gaussian_spectrum_visibility_against_opd(opd_m, expected):
    # Goodman, Statistical Optics, 2nd ed., 2015, sec. 5.1: V(OPD) = |FT of the
    # normalised spectrum| = exp(-(pi dsigma OPD)^2 / (4 ln 2)).
    lam, d, L = 632.8e-9, 1e-3, 1.0
    lams, wts = synth.gaussian_spectrum(lam, fwhm_m=2e-9)
    y0 = L * np.tan(np.arcsin(opd_m / d))
    v = local_modulation(y0, lam, d, L, width_m=0.1e-6, wavelengths_m=lams,
                         wavelength_weights=wts)
    assert v == pytest.approx(expected, abs=1e-3)


# ----------------------------------------------------------------- render_fringes


def brute_force(shape, period, t_deg, phase, vis, mean, m=16):
    h, w = shape
    t = np.deg2rad(t_deg)
    acc = np.zeros(shape)
    offs = (np.arange(m) + 0.5) / m - 0.5
    x = np.arange(w) - (w - 1) / 2
    y = np.arange(h) - (h - 1) / 2
    for oy in offs:
        for ox in offs:
            u = np.cos(t) * (x[None, :] + ox) - np.sin(t) * (y[:, None] + oy)
            acc += mean * (1 + vis * np.cos(2 * np.pi * u / period + phase))
    return acc / m**2


def test_pixel_area_matches_supersampled_average():
    # The pixel average of a cosine is exact with sinc factors; a 16 x 16 brute-force
    # average (midpoint rule, relative error ~(pi f / 16)^2 / 6 < 3e-4) must agree.
    kw = dict(period_px=5.0, orientation_deg=23.0, phase_rad=0.3, visibility=0.7, mean=2.0)
    ref = brute_force((21, 25), 5.0, 23.0, 0.3, 0.7, 2.0)
    img = synth.render_fringes((21, 25), **kw)
    np.testing.assert_allclose(img, ref, atol=1e-3 * 0.7 * 2.0)
    point = synth.render_fringes((21, 25), pixel_area=False, **kw)
    assert np.max(np.abs(point - ref)) > 0.02  # the sinc attenuation is visible at P = 5


@pytest.mark.parametrize(("period", "mtf"), [(4.0, 0.900316), (8.0, 0.974495),
                                             (16.0, 0.993587)])
def test_pixel_mtf_reference_values(period, mtf):
    # Boreman, Modulation Transfer Function in Optical and Electro-Optical Systems, SPIE
    # 2001, ch. 2 (value from memory): |sin(pi f)/(pi f)|; values from references.md sec. 7.
    w = int(4 * period) + 1
    img = synth.render_fringes((3, w), period_px=period, orientation_deg=0.0)
    assert (img.max() - img.min()) / 2 == pytest.approx(mtf, abs=2e-6)


def test_phase_convention_orientation_0():
    # Conventions in fringe.synth: at t = 0 the normal is +x; phase 0 puts a maximum on
    # column c_x, and a phase of -pi/2 moves it P/4 to the right.
    img = synth.render_fringes((5, 41), period_px=8.0, orientation_deg=0.0, pixel_area=False)
    assert int(np.argmax(img[2, 16:25])) + 16 == 20
    assert np.ptp(img, axis=0).max() < 1e-12  # constant down each column
    shifted = synth.render_fringes((5, 41), period_px=8.0, orientation_deg=0.0,
                                   phase_rad=-np.pi / 2, pixel_area=False)
    assert int(np.argmax(shifted[2, 16:28])) + 16 == 22


def test_phase_convention_orientation_90_increases_upwards():
    # At t = 90 deg, n = (0, -1): the phase grows going UP the screen.
    img = synth.render_fringes((41, 5), period_px=8.0, orientation_deg=90.0,
                               phase_rad=-np.pi / 2, pixel_area=False)
    col = img[:, 2]
    assert np.ptp(img, axis=1).max() < 1e-12
    assert int(np.argmax(col[14:26])) + 14 == 20 - 2  # maximum P/4 above the centre row


def test_phase_convention_general_angle():
    # n = (cos t, -sin t): moving one pixel along n raises the phase by 2 pi / P.
    t = 30.0
    img = synth.render_fringes((61, 61), period_px=12.0, orientation_deg=t, pixel_area=False,
                               phase_rad=-np.pi / 2)
    # the phase is pi/2 (a maximum of sin-like shift) at distance P/4 along n from c
    n = np.array([np.cos(np.deg2rad(t)), -np.sin(np.deg2rad(t))])
    x, y = 30 + 3.0 * n[0], 30 + 3.0 * n[1]
    assert img[int(round(y)), int(round(x))] > 1.9
    x2, y2 = 30 - 3.0 * n[0], 30 - 3.0 * n[1]
    assert img[int(round(y2)), int(round(x2))] < 0.1


def test_envelope_path():
    kw = dict(period_px=9.0, orientation_deg=0.0, visibility=0.5, mean=3.0)
    flat = synth.render_fringes((11, 13), envelope=lambda u, v: np.ones_like(u),
                                pixel_area=False, **kw)
    np.testing.assert_allclose(flat, synth.render_fringes((11, 13), pixel_area=False, **kw))
    approx = synth.render_fringes((11, 13), envelope=lambda u, v: np.ones_like(u), **kw)
    # 4 x 4 sub-pixel samples approximate the exact sinc factor to (pi / (4 P))^2 / 6
    np.testing.assert_allclose(approx, synth.render_fringes((11, 13), **kw), atol=1.5 * 2e-3)
    # v runs along the fringes, i.e. down the rows at t = 0
    half = synth.render_fringes((11, 13), envelope=lambda u, v: (v > 0).astype(float),
                                pixel_area=False, **kw)
    assert np.all(half[:6] == 0) and np.all(half[6:] > 0)


def test_render_input_checks():
    with pytest.raises(FringeError, match="period_px"):
        synth.render_fringes((4, 4), period_px=0.0, orientation_deg=0.0)
    with pytest.raises(FringeError, match="visibility"):
        synth.render_fringes((4, 4), period_px=5.0, orientation_deg=0.0, visibility=1.2)
    with pytest.raises(FringeError, match="shape"):
        synth.render_fringes((4,), period_px=5.0, orientation_deg=0.0)


# ----------------------------------------------------------------- two_slit_image


def test_two_slit_image_matches_pixel_averaged_closed_form():
    # Hecht 2017, sec. 10.2.2 closed form, averaged over 11 x 11 points of each pixel.
    lam, d, a, L, pix = 532e-9, 2e-3, 250e-6, 0.3, 4.8e-6
    img = synth.two_slit_image((5, 301), wavelength_nm=532.0, slit_separation_um=2000.0,
                               slit_width_um=250.0, distance_mm=300.0, pixel_um=4.8)
    offs = (np.arange(11) + 0.5) / 11 - 0.5
    x = np.arange(301) - 150.0
    ref = np.mean([closed_form_two_slit((x + o) * pix, lam, d, a, L) for o in offs], axis=0)
    np.testing.assert_allclose(img[2], ref, atol=5e-4)
    assert np.ptp(img, axis=0).max() < 1e-12


@pytest.mark.parametrize(("t", "offset", "peak"), [
    (0.0, (4.0, 0.0), (10, 34)),     # (row, col) of the brightest pixel
    (90.0, (0.0, -5.0), (5, 30)),
    (180.0, (-3.0, 2.0), (12, 27)),
])
def test_two_slit_image_axis_position(t, offset, peak):
    img = synth.two_slit_image((21, 61), wavelength_nm=532.0, slit_separation_um=2000.0,
                               slit_width_um=250.0, distance_mm=300.0, pixel_um=4.8,
                               orientation_deg=t, axis_offset_px=offset, beam_sigma_px=6.0)
    assert np.unravel_index(np.argmax(img), img.shape) == peak


def test_two_slit_image_beam_envelope_and_scale():
    kw = dict(wavelength_nm=532.0, slit_separation_um=2000.0, slit_width_um=250.0,
              distance_mm=300.0, pixel_um=4.8, oversample=1)
    img = synth.two_slit_image((41, 9), beam_sigma_px=10.0, peak_irradiance=500.0, **kw)
    assert img[20, 4] == pytest.approx(500.0, rel=1e-9)
    # along the fringes (down the rows at t = 0) the beam is Gaussian
    assert img[30, 4] / img[20, 4] == pytest.approx(np.exp(-0.5), rel=1e-9)


def test_two_slit_image_slit_source_lowers_visibility():
    # Born & Wolf 1999, sec. 10.4: a slit source of width w multiplies the modulation by
    # |sinc(w d / (lambda R))|; here 0.28 mm at 500 mm, d = 0.5 mm, 546.1 nm -> 0.6203.
    kw = dict(wavelength_nm=546.1, slit_separation_um=500.0, slit_width_um=20.0,
              distance_mm=100.0, pixel_um=4.8)
    coherent = synth.two_slit_image((3, 47), **kw)[1]
    partial = synth.two_slit_image((3, 47), source=("slit", 280.0, 500.0), **kw)[1]
    centre = slice(12, 35)  # one period (22.75 px) around the axis
    ratio = (michelson_visibility(partial[centre]) / michelson_visibility(coherent[centre]))
    assert ratio == pytest.approx(abs(np.sinc(0.28e-3 * 0.5e-3 / (546.1e-9 * 0.5))), abs=2e-3)


def fitted_modulation(row, u, lam, d, L, pix):
    """Modulation at the middle of a row.

    Fits (B + B' du) + (c + c' du) cos psi + (s + s' du) sin psi with the exact phase psi.
    """
    psi = 2 * np.pi * d * np.sin(np.arctan(u * pix / L)) / lam
    du = (u - u[u.size // 2]) / u.size
    m = np.column_stack([np.ones_like(u), du, np.cos(psi), du * np.cos(psi), np.sin(psi),
                         du * np.sin(psi)])
    c = np.linalg.lstsq(m, row, rcond=None)[0]
    return np.hypot(c[2], c[4]) / c[0]


def test_two_slit_image_bandwidth_fades_far_fringes():
    kw = dict(wavelength_nm=546.1, slit_separation_um=500.0, slit_width_um=10.0,
              distance_mm=100.0, pixel_um=4.8)
    fit = dict(lam=546.1e-9, d=500e-6, L=0.1, pix=4.8e-6)
    u = np.arange(47) - 23.0
    centre = [synth.two_slit_image((1, 47), bandwidth_nm=bw, **kw)[0] for bw in (0.0, 10.0)]
    v0 = [fitted_modulation(r, u, **fit) for r in centre]
    assert v0[1] == pytest.approx(v0[0], abs=1e-3)
    # pixels 455 +- 23 px from the axis: about 20 fringes out (OPD ~ 10.9 um)
    far = [synth.two_slit_image((1, 47), bandwidth_nm=bw, axis_offset_px=(-455.0, 0.0),
                                **kw)[0] for bw in (0.0, 10.0)]
    v1 = [fitted_modulation(r, u + 455.0, **fit) for r in far]
    # Goodman 2015, sec. 5.1: Gaussian spectrum, V = exp(-(pi dsigma OPD)^2 / (4 ln 2))
    opd = 500e-6 * np.sin(np.arctan(455 * 4.8e-6 / 0.1))
    dsig = 10e-9 / 546.1e-9**2
    expected = np.exp(-(np.pi * dsig * opd) ** 2 / (4 * np.log(2)))
    assert v1[1] / v1[0] == pytest.approx(expected, abs=5e-3)


# -------------------------------------------------------------------------- camera


def test_camera_photon_transfer():
    # EMVA 1288 Release 4.0 Linear (2021), linear model (value from memory):
    # mu_y = mu_dark + K mu_e, sigma_y^2 = K^2 (sigma_d^2 + mu_e) + 1/12; references.md
    # sec. 7 worked example: K = 0.5, 2000 e-, 5 e- read noise -> dmu = 1000 DN,
    # dsigma^2 = 500 DN^2, sigma_dark^2 = 6.33333 DN^2.
    rng = np.random.default_rng(11)
    shape = (2, 256, 256)
    light = synth.camera(np.full(shape, 2000.0), rng=rng).astype(float)
    dark = synth.camera(np.zeros(shape), rng=rng).astype(float)
    # pair variance (temporal): var(A - B) / 2
    var_light = np.var(light[0] - light[1]) / 2
    var_dark = np.var(dark[0] - dark[1]) / 2
    assert light.mean() - dark.mean() == pytest.approx(1000.0, abs=0.5)
    assert var_light == pytest.approx(0.25 * (2000 + 25) + 1 / 12, rel=0.03)
    assert var_light - var_dark == pytest.approx(500.0, rel=0.04)
    assert var_dark == pytest.approx(6.33333, rel=0.03)
    assert dark.mean() == pytest.approx(100.0, abs=0.05)


def test_camera_fixed_pattern_is_shared_and_prnu_recovered():
    # EMVA 1288 R4.0 (2021) PRNU as in references.md sec. 7:
    # PRNU = sqrt(s_y^2 - s_y.dark^2) / (mu_y - mu_y.dark), with the temporal part removed.
    kw = dict(gain_dn_per_e=0.5, read_noise_e=5.0, prnu=0.02, dsnu_dn=3.0, fixed_seed=77)
    d1 = synth.camera(np.zeros((128, 128)), rng=np.random.default_rng(1), **kw).astype(float)
    d2 = synth.camera(np.zeros((128, 128)), rng=np.random.default_rng(2), **kw).astype(float)
    r = np.corrcoef(d1.ravel(), d2.ravel())[0, 1]
    assert r > 0.5  # DSNU 3 DN vs 2.5 DN read noise: the same pattern in both darks
    other = synth.camera(np.zeros((128, 128)), rng=np.random.default_rng(2),
                         **{**kw, "fixed_seed": 78}).astype(float)
    assert abs(np.corrcoef(d1.ravel(), other.ravel())[0, 1]) < 0.05
    rng = np.random.default_rng(3)
    f = synth.camera(np.full((2, 128, 128), 4000.0), rng=rng, **kw).astype(float)
    d = synth.camera(np.zeros((2, 128, 128)), rng=rng, **kw).astype(float)
    temporal_f = np.var(f[0] - f[1]) / 2
    temporal_d = np.var(d[0] - d[1]) / 2
    s2_f = np.var(f.mean(0)) - temporal_f / 2
    s2_d = np.var(d.mean(0)) - temporal_d / 2
    prnu = np.sqrt(s2_f - s2_d) / (f.mean() - d.mean())
    assert prnu == pytest.approx(0.02, rel=0.08)


def test_camera_hot_pixels_clipping_and_dtype():
    img = np.zeros((64, 64))
    raw = synth.camera(img, rng=np.random.default_rng(0), read_noise_e=1.0, hot_pixels=12,
                       bit_depth=12)
    assert raw.dtype == np.uint16
    assert int((raw > 200).sum()) == 12  # 10**2.5 e- * 0.5 DN/e- = 158 DN above offset
    assert not np.any(img)  # input untouched
    sat = synth.camera(np.full((8, 8), 1e7), rng=np.random.default_rng(0), bit_depth=12)
    assert np.all(sat == 4095)
    sat16 = synth.camera(np.full((8, 8), 1e7), rng=np.random.default_rng(0))
    assert np.all(sat16 == 65535)


def test_camera_input_checks():
    rng = np.random.default_rng(0)
    with pytest.raises(FringeError, match="non-negative"):
        synth.camera(np.full((4, 4), -1.0), rng=rng)
    with pytest.raises(FringeError, match="bit_depth"):
        synth.camera(np.zeros((4, 4)), rng=rng, bit_depth=20)
    with pytest.raises(FringeError, match="shape"):
        synth.camera(np.zeros(4), rng=rng)


# ----------------------------------------------------------------------- phone JPEG


@pytest.mark.parametrize(("linear", "encoded"), [(0.18, 0.461356), (0.5, 0.735357),
                                                 (0.2158605, 128 / 255), (0.002, 0.02584)])
def test_srgb_encode_reference_values(linear, encoded):
    # IEC 61966-2-1:1999 sRGB encoding; values from references.md sec. 8 (checked against
    # an independent implementation); 0.002 is on the linear segment, 12.92 * 0.002.
    assert float(synth.srgb_encode(linear)) == pytest.approx(encoded, abs=1e-6)


def test_phone_jpeg_decodes_with_bgr_order_and_srgb_codes():
    scene = np.zeros((64, 96, 3))
    scene[:, :48] = 0.18          # grey: code 255 * 0.461356 = 117.6
    scene[:, 48:, 0] = 0.5        # red only on the right half
    jpg = synth.phone_jpeg(scene, quality=95)
    img = cv2.imdecode(np.frombuffer(jpg, np.uint8), cv2.IMREAD_COLOR)
    assert img.shape == (64, 96, 3)
    assert np.abs(img[8:56, 8:40].astype(float) - 117.6).max() <= 2.5
    right = img[8:56, 56:88].astype(float).mean(axis=(0, 1))  # B, G, R
    assert right[2] == pytest.approx(255 * 0.735357, abs=3)
    assert right[2] > 5 * max(right[0], right[1])
    assert not np.any(scene[:, :, 1:][:, 48:])  # input untouched


def test_phone_jpeg_exif_read_back_by_pillow():
    image_module = pytest.importorskip("PIL.Image")
    jpg = synth.phone_jpeg(np.full((16, 16, 3), 0.3), exif={"exposure_s": 1 / 120, "iso": 200})
    assert jpg[:4] == b"\xff\xd8\xff\xe1"
    with image_module.open(io.BytesIO(jpg)) as im:
        exif = im.getexif().get_ifd(0x8769)
    assert float(exif[0x829A]) == pytest.approx(1 / 120, rel=1e-12)
    assert int(exif[0x8827]) == 200


def test_phone_jpeg_checks():
    with pytest.raises(FringeError, match=r"\(H, W, 3\)"):
        synth.phone_jpeg(np.zeros((4, 4)))
    with pytest.raises(FringeError, match="unknown keys"):
        synth.phone_jpeg(np.zeros((4, 4, 3)), exif={"fnumber": 2.0})


# ------------------------------------------------------------------------- ruler


@pytest.mark.parametrize("direction", [0.0, 30.0])
def test_ruler_ticks_at_their_positions(direction):
    ov = synth.ruler_overlay((200, 260), start_px=(30.0, 120.0), direction_deg=direction,
                             tick_spacing_px=20.0, n_ticks=10, width_px=30.0,
                             tick_width_px=3.0)
    alpha, refl = ov
    assert alpha.max() == pytest.approx(1.0) and alpha.min() == 0.0
    t = np.deg2rad(direction)
    e = np.array([np.cos(t), -np.sin(t)])
    p = np.array([np.sin(t), np.cos(t)])
    for k in range(10):
        tick = np.array([30.0, 120.0]) + 20.0 * k * e + 5.0 * p
        between = tick + (10.0 if k < 9 else -10.0) * e
        x, y = np.rint(tick).astype(int)
        xb, yb = np.rint(between).astype(int)
        assert alpha[y, x] == pytest.approx(1.0)
        assert refl[y, x] < 0.5 < refl[yb, xb]


# ------------------------------------------------------------------------ stacks


def test_phase_drift_stack_phases_and_fringes():
    rng = np.random.default_rng(5)
    stack, phases = synth.phase_drift_stack(
        30, (64, 64), period_px=12.0, orientation_deg=30.0, visibility=0.8,
        drift_rad_per_frame=0.12, jitter_rad=0.02, rng=rng, mean_e=4000.0, phase0_rad=0.4,
        camera_options={"gain_dn_per_e": 0.25, "offset_dn": 100.0, "bit_depth": 12})
    assert stack.shape == (30, 64, 64) and stack.dtype == np.uint16
    steps = np.diff(phases)
    assert steps.mean() == pytest.approx(0.12, abs=0.02)
    assert np.std(steps) == pytest.approx(0.02 * np.sqrt(2), rel=0.4)
    # project each frame on the known carrier: recovered phase = true phase
    t = np.deg2rad(30.0)
    yy, xx = np.mgrid[0:64, 0:64] - 31.5
    u = np.cos(t) * xx - np.sin(t) * yy
    k = 2 * np.pi / 12.0
    design = np.column_stack([np.ones(u.size), np.cos(k * u).ravel(), np.sin(k * u).ravel()])
    for frame, true in zip(stack[::7], phases[::7], strict=True):
        c = np.linalg.lstsq(design, frame.astype(float).ravel(), rcond=None)[0]
        est = np.arctan2(-c[2], c[1])
        assert np.angle(np.exp(1j * (est - true))) == pytest.approx(0.0, abs=0.01)
        # visibility after the offset: V sinc(nx/P) sinc(ny/P)
        mtf = np.sinc(np.cos(t) / 12) * np.sinc(np.sin(t) / 12)
        assert np.hypot(c[1], c[2]) / (c[0] - 100.0) == pytest.approx(0.8 * mtf, abs=0.01)


def test_photon_stack_counts_and_visibility():
    rng = np.random.default_rng(9)
    kw = dict(period_px=8.0, orientation_deg=0.0, visibility=0.8, phase_rad=0.5,
              background_per_px=0.01, rng=rng, psf_sigma_px=0.7, read_noise_e=0.05,
              cosmic_rays_per_frame=0.0)
    stack, truth = synth.photon_stack(100, (32, 64), photons_per_frame=400.0, **kw)
    assert stack.shape == (100, 32, 64) and stack.dtype == np.uint16
    signal = stack.astype(float) - truth["offset_dn"]
    events = sum(truth["signal_photons"]) + sum(truth["background_events"])
    # Poisson mean: total events ~ N (photons + D H W); each carries 20 DN on average.
    # A Gaussian spot loses sigma / sqrt(2 pi) px of charge per unit length of frame edge.
    assert sum(truth["signal_photons"]) == pytest.approx(100 * 400, rel=0.02)
    kept = 1 - 2 * (32 + 64) * 0.7 / np.sqrt(2 * np.pi) / (32 * 64)
    assert signal.sum() / 20.0 == pytest.approx(events * kept, rel=0.01)
    mean_img = signal.sum(axis=0)
    bg = 0.01 * 100 * 20.0  # background DN per pixel over the stack
    x = np.arange(3, 61) - 31.5  # edge columns lose part of each spot
    profile = mean_img.mean(axis=0)[3:61] - bg
    design = np.column_stack([np.ones(x.size), np.cos(2 * np.pi * x / 8),
                              np.sin(2 * np.pi * x / 8)])
    c = np.linalg.lstsq(design, profile, rcond=None)[0]
    v = np.hypot(c[1], c[2]) / c[0]
    # Robbins & Hadwen 2003 (exponential multiplication): the spot and pixel transfer
    # reduce V by exp(-2 pi^2 sigma^2 / P^2) sinc(1/P)
    expected = 0.8 * np.exp(-2 * (np.pi * 0.7 / 8) ** 2) * np.sinc(1 / 8)
    assert truth["visibility_expected_image"] == pytest.approx(expected, rel=1e-12)
    assert v == pytest.approx(expected, abs=0.03)
    assert np.angle(np.exp(1j * (np.arctan2(-c[2], c[1]) - 0.5))) == pytest.approx(0, abs=0.05)


def test_photon_stack_cosmic_rays_are_bright_tracks():
    rng = np.random.default_rng(4)
    stack, truth = synth.photon_stack(
        20, (64, 64), period_px=8.0, orientation_deg=0.0, visibility=0.5, phase_rad=0.0,
        photons_per_frame=5.0, background_per_px=0.0, rng=rng, cosmic_rays_per_frame=1.0)
    assert len(truth["cosmic_rays"]) > 5
    for ray in truth["cosmic_rays"]:
        mid_x = int(round((ray["x0"] + ray["x1"]) / 2))
        mid_y = int(round((ray["y0"] + ray["y1"]) / 2))
        if 1 <= mid_x < 63 and 1 <= mid_y < 63:
            near = stack[ray["frame"], mid_y - 1:mid_y + 2, mid_x - 1:mid_x + 2]
            assert near.max() > 100 + 0.5 * ray["dn_per_px"]


# -------------------------------------------------------------- TIFF and samples


def test_tiff_writer_round_trip_with_tifffile_and_opencv(tmp_path):
    rng = np.random.default_rng(0)
    smooth = (1000 + 500 * np.sin(np.arange(40 * 50) / 30.0)).astype(np.uint16).reshape(40, 50)
    noisy = rng.integers(0, 65535, size=(3, 40, 50), dtype=np.uint16)
    cases = (("s.tif", smooth, None), ("n.tif", noisy, '{"frame_interval_s": 0.1}'))
    for name, data, desc in cases:
        path = tmp_path / name
        path.write_bytes(synth._tiff_bytes(data, description=desc))
        with tifffile.TiffFile(path) as tf:
            np.testing.assert_array_equal(tf.asarray(), data)
            assert tf.pages[0].description == (desc or "")
        ok, pages = cv2.imreadmulti(str(path), flags=cv2.IMREAD_UNCHANGED)
        assert ok
        np.testing.assert_array_equal(np.stack(pages).reshape(data.shape), data)


@pytest.fixture(scope="module")
def generated(tmp_path_factory):
    out = tmp_path_factory.mktemp("samples")
    scenario = synth.make_samples(out)
    return out, scenario


def read_manifest(path):
    rows = {}
    for line in path.read_text().splitlines():
        digest, name = line.split("  ", 1)
        rows[name] = digest
    return rows


@pytest.mark.slow
def test_make_samples_is_deterministic(generated, tmp_path):
    out, _ = generated
    synth.make_samples(tmp_path)
    assert (tmp_path / "MANIFEST.sha256").read_text() == (out / "MANIFEST.sha256").read_text()
    for name, digest in read_manifest(out / "MANIFEST.sha256").items():
        assert hashlib.sha256((out / name).read_bytes()).hexdigest() == digest


@pytest.mark.slow
def test_make_samples_matches_bundled_files(generated):
    # Compressed TIFF bytes depend on the zlib build and JPEG bytes on the libjpeg build,
    # so the bundled set is compared by decoded pixel content (pixel_sha256) and by the
    # exact bytes of scenario.json and README.md; file hashes are checked for integrity.
    if not (SAMPLES / "MANIFEST.sha256").is_file():
        pytest.skip("bundled sample-images/ are absent (regenerate with python -m fringe.synth)")
    out, scenario = generated
    bundled = read_manifest(SAMPLES / "MANIFEST.sha256")
    for name, digest in bundled.items():
        assert hashlib.sha256((SAMPLES / name).read_bytes()).hexdigest() == digest, name
    assert sorted(bundled) == sorted(read_manifest(out / "MANIFEST.sha256"))
    for name in ("scenario.json", "README.md"):
        assert (SAMPLES / name).read_bytes() == (out / name).read_bytes(), name
    for name, digest in scenario["pixel_sha256"].items():
        data = tifffile.imread(SAMPLES / name)
        assert hashlib.sha256(data.astype("<u2").tobytes()).hexdigest() == digest, name


@pytest.mark.slow
def test_sample_contents_match_scenario(generated):
    out, scenario = generated
    scenes = scenario["scenes"]
    assert json.loads((out / "scenario.json").read_text()) == scenario
    total = sum(p.stat().st_size for p in out.iterdir())
    assert total < 8e6
    # bench 1: 12-bit values, peak near 70 % and flats near 50 % of full scale
    sci = tifffile.imread(out / "green532-slits.tif")
    assert sci.dtype == np.uint16 and sci.shape == (480, 640) and sci.max() <= 4095
    assert np.percentile(sci, 99.9) / 4095 == pytest.approx(0.70, abs=0.04)
    flat = tifffile.imread(out / "green532-flat-03.tif")
    assert flat.mean() / 4095 == pytest.approx(0.50, abs=0.01)
    dark = tifffile.imread(out / "green532-dark-01.tif")
    assert dark.mean() == pytest.approx(100 + 0.25 * 12, abs=1.0)
    # the period along the normal: FFT peak of the dark-subtracted centre rows
    g = scenes["green532"]["truth"]
    assert g["period_px"] == pytest.approx(532e-9 * 0.3 / 2e-3 / 4.8e-6)
    row = sci[200:280].astype(float).mean(axis=0) - 103.0
    spec = np.abs(np.fft.rfft(row * np.hanning(row.size), n=1 << 16))
    f = np.fft.rfftfreq(1 << 16)
    f_peak = f[np.argmax(spec[f > 0.02]) + np.searchsorted(f, 0.02, side="right")]
    # along a row the period is P / cos(t)
    assert 1 / f_peak == pytest.approx(g["period_px"] / np.cos(np.deg2rad(8.0)), rel=0.01)
    # bench 2: phone JPEG, red strongest, EXIF, ruler ticks dark where listed
    jpg = (out / "phone-red650-wall.jpg").read_bytes()
    img = cv2.imdecode(np.frombuffer(jpg, np.uint8), cv2.IMREAD_COLOR)
    assert img.shape == (1200, 1600, 3)
    cx, cy = (int(round(v)) for v in scenes["phone_red650"]["truth"]["central_maximum_px"])
    b, gch, r = (float(v) for v in img[cy - 2:cy + 3, cx - 2:cx + 3].reshape(-1, 3).mean(0))
    assert r > gch > b and r < 255
    ruler = scenes["phone_red650"]["ruler"]
    t = np.deg2rad(ruler["direction_deg"])
    e, p = np.array([np.cos(t), -np.sin(t)]), np.array([np.sin(t), np.cos(t)])
    last = len(ruler["tick_positions_px"]) - 1
    for k, (x, y) in enumerate(ruler["tick_positions_px"]):
        on = np.rint(np.array([x, y]) + 8 * p).astype(int)
        off = np.rint(np.array([x, y]) + 8 * p + (25 if k < last else -25) * e).astype(int)
        assert int(img[on[1], on[0], 1]) + 20 < int(img[off[1], off[0], 1])
    # bench 4: frame interval in the ImageDescription
    with tifffile.TiffFile(out / "hene633-drift-stack.tif") as tf:
        assert json.loads(tf.pages[0].description) == {"frame_interval_s": 0.1}
        assert tf.series[0].shape == (40, 256, 256)
    assert len(scenes["hene633_drift"]["truth"]["phases_rad"]) == 40
    # bench 5: photon stacks
    assert tifffile.imread(out / "photons-stack.tif").shape == (200, 128, 128)
    assert tifffile.imread(out / "photons-dark.tif").shape == (50, 128, 128)
    assert "laser safety officer" in scenario["safety"]
