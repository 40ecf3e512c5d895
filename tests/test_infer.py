"""Physical inference: worked examples from the handbooks and propagation checks."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.special import j1, jn_zeros

import fringe
from fringe import infer
from fringe.synth import two_slit_image


def test_young_spacing_worked_example():
    # Young's spacing Δy = λL/d (E. Hecht, Optics, 5th ed. 2017, sec. 9.3); worked example in
    # references.md sec. 1: 632.8 nm, d = 0.25 mm, L = 1 m give 2.53120 mm.
    pix_um = 5.0
    period_px = 2531.20 / pix_um
    lam, lam_err, small = infer.wavelength_from_period(
        (period_px, 0.0), (pix_um, 0.0), (250.0, 0.0), (1000.0, 0.0))
    assert lam == pytest.approx(632.8, abs=0.01)
    assert abs(small) < 1e-6  # at the axis the small-angle form is exact
    d, _, _ = infer.separation_from_period((period_px, 0.0), (pix_um, 0.0), (632.8, 0.0),
                                           (1000.0, 0.0))
    assert d == pytest.approx(250.0, rel=1e-5)


def test_large_angle_flat_screen():
    # Exact flat-screen relation d sin θ = mλ, tan θ = y/L (Hecht 2017, sec. 9.3).
    # references.md sec. 1: 532 nm, d = 5 µm, L = 1 m: y1 = 0.107007 m; small-angle 0.106400 m.
    lam_m, d_m, l_m = 532e-9, 5e-6, 1.0
    y1 = l_m * np.tan(np.arcsin(lam_m / d_m))
    assert y1 == pytest.approx(0.107007, abs=1e-6)
    # A region from the axis to the first maximum, sampled finely: the phase is
    # 2π d sinθ / λ; its straight-line slope is what a constant-period fit measures.
    y = np.linspace(0.0, y1, 2001) * 1e6  # µm
    phase = 2 * np.pi * d_m * 1e6 * (y / np.sqrt(y**2 + 1e12)) / (lam_m * 1e6)
    slope = np.polyfit(y, phase, 1)[0]
    pix_um = 10.0
    period_px = 2 * np.pi / slope / pix_um
    lam, _, small = infer.wavelength_from_period((period_px, 0.0), (pix_um, 0.0),
                                                 (5.0, 0.0), (1000.0, 0.0), y)
    assert lam == pytest.approx(532.0, rel=1e-6)
    assert small > 1e-3  # the small-angle form would be off by more than 0.1 %


def test_local_sin_theta_slope():
    # d(sin θ)/dy = L²/(y² + L²)^1.5 for sin θ = y/sqrt(y² + L²) (calculus; checked by
    # central differences).
    l_um, y0 = 1e6, 3e5
    h = 1.0
    fd = ((y0 + h) / np.hypot(y0 + h, l_um) - (y0 - h) / np.hypot(y0 - h, l_um)) / (2 * h)
    assert infer.sin_theta_slope(np.array([y0]), l_um) == pytest.approx(fd, rel=1e-8)


def test_single_slit_minima_and_missing_orders():
    # Envelope zeros a sin θ = mλ (Hecht 2017, sec. 10.2.1); references.md sec. 1: a = 50 µm,
    # 632.8 nm, L = 1 m: first zero at 12.6570 mm (exact), 12.6560 mm (small angle).
    a, _ = infer.slit_width_from_envelope((12657.0, 0.0), (1.0, 0.0), (632.8, 0.0),
                                          (1000.0, 0.0))
    assert a == pytest.approx(50.0, rel=1e-4)
    # d/a = 5: orders ±5, ±10 vanish (and the central envelope holds 2k - 1 = 9 fringes)
    assert infer.missing_orders(250.0, 50.0) == [5, 10, 15]
    assert infer.missing_orders(260.0, 50.0) is None  # d/a = 5.2: no order falls on a zero


def test_van_cittert_zernike_slit():
    # Uniform slit source: |μ| = |sinc(π w d/(λR))| (M. Born & E. Wolf, Principles of
    # Optics, 7th ed. 1999, sec. 10.4.2; J. W. Goodman, Statistical Optics, 2nd ed. 2015,
    # ch. 5). references.md sec. 3: 550 nm, w = 0.1 mm, R = 1 m, d = 2 mm -> 0.796248;
    # V = 0.8 -> x = 1.13110, w = 99.0113 µm.
    x = np.pi * 100e-6 * 2e-3 / (550e-9 * 1.0)
    assert float(infer.coherence_slit(x)) == pytest.approx(0.796248, abs=1e-6)
    assert infer.invert_coherence(0.8, "slit") == pytest.approx(1.13110, abs=1e-5)
    (w, _), _ = infer.source_size_from_visibility((0.8, 0.0), "slit", (550.0, 0.0),
                                                  (2000.0, 0.0), (1000.0, 0.0))
    assert w == pytest.approx(99.0113, abs=1e-3)


def test_van_cittert_zernike_disk_with_scipy_bessel():
    # Uniform disk: |μ| = |2 J1(x)/x|, x = π D d/(λR) (Born & Wolf 1999, sec. 10.4.2), with
    # scipy.special.j1 as the reference Bessel function and jn_zeros for the first zero.
    xs = np.linspace(0.01, 10, 500)
    np.testing.assert_allclose(infer.coherence_disk(xs), 2 * j1(xs) / xs, rtol=1e-12)
    z1 = jn_zeros(1, 1)[0]
    assert z1 == pytest.approx(3.83171, abs=1e-5)
    # references.md sec. 3: V = 0.5 at d = 0.5 mm, 550 nm -> x = 2.21509, θ = 7.75593e-4 rad
    assert infer.invert_coherence(0.5, "disk") == pytest.approx(2.21509, abs=1e-5)
    _, (ang, _) = infer.source_size_from_visibility((0.5, 0.0), "disk", (550.0, 0.0),
                                                    (500.0, 0.0), (1000.0, 0.0))
    assert ang == pytest.approx(0.775593, abs=1e-5)
    # second lobe (contrast reversal) lies beyond the first zero
    x2 = infer.invert_coherence(0.1, "disk", lobe=2)
    assert z1 < x2 < jn_zeros(1, 2)[1]
    assert float(infer.coherence_disk(x2)) == pytest.approx(-0.1, abs=1e-9)


def test_sun_angular_size_and_coherence_width():
    # The Sun's angular diameter from the IAU 2015 Resolution B3 nominal radius 695 700 km and
    # the astronomical unit 149 597 870.7 km (au value from memory): 0.532906°
    # (references.md sec. 3). Coherence at 550 nm: first zero 72.1235 µm, |μ| = 0.88 at
    # 18.8311 µm (van Cittert–Zernike, Born & Wolf 1999, sec. 10.4).
    theta = 2 * np.arcsin(695700.0 / 149597870.7)
    assert np.rad2deg(theta) == pytest.approx(0.532906, abs=1e-6)
    lam = 550e-9
    d_zero = jn_zeros(1, 1)[0] * lam / (np.pi * theta)
    assert d_zero * 1e6 == pytest.approx(72.1235, abs=1e-3)
    x = np.pi * theta * 18.8311e-6 / lam
    assert float(infer.coherence_disk(x)) == pytest.approx(0.88, abs=1e-4)
    # and the inversion recovers the Sun's angular diameter from |μ| = 0.88 at 18.8311 µm
    _, (ang, _) = infer.source_size_from_visibility((0.88, 0.0), "disk", (550.0, 0.0),
                                                    (18.8311, 0.0), (1.0, 0.0))
    assert ang * 1e-3 == pytest.approx(theta, rel=1e-4)


def test_first_order_against_monte_carlo():
    # First-order propagation (JCGM 100:2008, eq. 10) against Monte-Carlo propagation
    # (JCGM 101:2008, GUM Supplement 1) for the wavelength from a two-slit geometry.
    vals = [50.6, 5.0, 1000.0, 1000.0]  # period px, pixel µm, d µm, L mm
    errs = [0.05, 0.01, 5.0, 2.0]

    def lam(p, s, d, l_mm):
        return d * p * s / (l_mm * 1000.0) * 1000.0

    v1, e1 = infer.propagate(lam, vals, errs)
    v2, e2 = infer.propagate_mc(lam, vals, errs, n=40000, rng=np.random.default_rng(1))
    assert v1 == pytest.approx(v2, rel=1e-3)
    assert e1 == pytest.approx(e2, rel=0.03)
    # and for the nonlinear source-size inversion
    g = lambda gam: infer.invert_coherence(gam, "slit")  # noqa: E731
    s1 = infer.propagate(g, [0.7], [0.01])
    s2 = infer.propagate_mc(g, [0.7], [0.01], n=20000, rng=np.random.default_rng(2))
    assert s1[1] == pytest.approx(s2[1], rel=0.05)


def test_pixel_scale_from_ruler_points():
    # First-order propagation (JCGM 100:2008, eq. 10) of 0.5 px per coordinate over a
    # 500 px baseline: the distance carries sqrt(2) * 0.5 px, so the scale 0.141 %.
    s, e = infer.pixel_scale_from_points((10, 20), (10, 520), 100.0, 0.5)
    assert s == pytest.approx(200.0)
    assert e == pytest.approx(200.0 * np.sqrt(2) * 0.5 / 500.0)


def test_generated_scene_wavelength_and_slit_width():
    # A numerically integrated two-slit scene (generator) measured and inverted: 532 nm
    # recovered within its stated uncertainty, and the slit width from the sinc² envelope.
    lam, d, a, l_mm, pix = 532.0, 1500.0, 150.0, 300.0, 4.8
    img = two_slit_image((200, 480), wavelength_nm=lam, slit_separation_um=d, slit_width_um=a,
                         distance_mm=l_mm, pixel_um=pix, orientation_deg=4.0)
    rng = np.random.default_rng(4)
    img = rng.poisson(img * 3000.0).astype(float)
    r = fringe.measure(img, pixel_um=(pix, 0.0), distance_mm=(l_mm, 0.0),
                       slit_separation_um=(d, 0.0))
    assert r.ok, r.error
    assert abs(r.wavelength_nm - lam) < 3 * r.wavelength_nm_err + 0.5
    assert r.get("slit_width_um") is not None
    assert r.slit_width_um == pytest.approx(a, rel=0.05)


def test_extended_slit_source_size_from_scene():
    # Extended incoherent slit source (sum of point sources in the generator): the source
    # width follows from V = |sinc(π w d / (λR))| (Born & Wolf 1999, sec. 10.4.2).
    lam, d, a, l_mm, pix = 546.1, 1000.0, 100.0, 400.0, 5.0
    w_um, r_mm = 120.0, 500.0
    img = two_slit_image((160, 400), wavelength_nm=lam, slit_separation_um=d, slit_width_um=a,
                         distance_mm=l_mm, pixel_um=pix, source=("slit", w_um, r_mm))
    expected_v = abs(np.sinc(w_um * d / (lam * 1e-3 * r_mm * 1e3)))
    r = fringe.measure(img * 2000.0, wavelength_nm=lam, slit_separation_um=d,
                       source_distance_mm=r_mm, source_shape="slit")
    assert r.ok, r.error
    assert r.visibility == pytest.approx(expected_v, abs=0.02)
    assert r.source_size_um == pytest.approx(w_um, rel=0.08)
    assert r.coherence_lobe == 1
