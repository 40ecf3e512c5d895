"""Tests for fringe.wavefront: Zernike terms, unwrapping, phase-shifting algorithms, the
Fourier-transform method, PV/RMS with uncertainties, checks and the command line."""

from __future__ import annotations

import argparse
import io
import json
import math
import sys

import numpy as np
import pytest
import tifffile

from fringe import wavefront as wf
from fringe._util import FringeError

# --------------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------------


def pupil_grid(n: int, radius: float, cx: float | None = None, cy: float | None = None):
    """Pixel grid and y-up pupil coordinates (x = (col - cx)/R, y = (cy - row)/R)."""
    cx = (n - 1) / 2.0 if cx is None else cx
    cy = (n - 1) / 2.0 if cy is None else cy
    rows, cols = np.mgrid[:n, :n].astype(float)
    x = (cols - cx) / radius
    y = (cy - rows) / radius
    return rows, cols, x, y, (x * x + y * y) <= 1.0


def zmap(coeffs: dict[int, float], x: np.ndarray, y: np.ndarray) -> np.ndarray:
    terms = max(coeffs)
    basis = wf.zernike_basis(x.ravel(), y.ravel(), terms=terms)
    out = np.zeros(x.size)
    for j, c in coeffs.items():
        out += c * basis[:, j - 1]
    return out.reshape(x.shape)


def interferogram(w: np.ndarray, rows, cols, inside, *, fx=1 / 8, fy=0.0, vis=0.7,
                  mean=1000.0, dark=20.0, noise=0.0, seed=0):
    """I = a (1 + V cos(2 pi (fx x_px + fy y_px) + 2 pi W)) in the pupil, y_px up."""
    n = rows.shape[0]
    c = (n - 1) / 2.0
    carrier = 2 * np.pi * (fx * (cols - c) + fy * (c - rows))
    img = np.where(inside, mean * (1 + vis * np.cos(carrier + 2 * np.pi * w)), dark)
    if noise:
        img = img + np.random.default_rng(seed).normal(0.0, noise, img.shape)
    return img


def psi_stack(w, inside, deltas, *, mean=1000.0, vis=0.6, noise=0.0, seed=1):
    phi = 2 * np.pi * w
    st = np.stack([np.where(inside, mean * (1 + vis * np.cos(phi + d)), 15.0) for d in deltas])
    if noise:
        st = st + np.random.default_rng(seed).normal(0.0, noise, st.shape)
    return st


def coeff(res, j: int) -> float:
    return res.zernike[j - 1]["coefficient_waves"]


def cli(argv: list[str]) -> tuple[int, str, str]:
    parser = argparse.ArgumentParser(prog="fringe")
    sub = parser.add_subparsers(dest="command")
    wf.add_parser(sub)
    args = parser.parse_args(["wavefront", *argv])
    out, err = io.StringIO(), io.StringIO()
    rc = wf.run(args, out, err)
    return rc, out.getvalue(), err.getvalue()


# --------------------------------------------------------------------------------------------
# Zernike polynomials
# --------------------------------------------------------------------------------------------

# Noll, "Zernike polynomials and atmospheric turbulence", J. Opt. Soc. Am. 66(3), 207 (1976),
# Table 1, as listed in references.md sec. 11 (indices checked there against a second listing).
NOLL_TABLE = {
    1: ((0, 0), lambda r, t: np.ones_like(r)),
    2: ((1, 1), lambda r, t: 2 * r * np.cos(t)),
    3: ((1, -1), lambda r, t: 2 * r * np.sin(t)),
    4: ((2, 0), lambda r, t: np.sqrt(3) * (2 * r**2 - 1)),
    5: ((2, -2), lambda r, t: np.sqrt(6) * r**2 * np.sin(2 * t)),
    6: ((2, 2), lambda r, t: np.sqrt(6) * r**2 * np.cos(2 * t)),
    7: ((3, -1), lambda r, t: np.sqrt(8) * (3 * r**3 - 2 * r) * np.sin(t)),
    8: ((3, 1), lambda r, t: np.sqrt(8) * (3 * r**3 - 2 * r) * np.cos(t)),
    9: ((3, -3), lambda r, t: np.sqrt(8) * r**3 * np.sin(3 * t)),
    10: ((3, 3), lambda r, t: np.sqrt(8) * r**3 * np.cos(3 * t)),
    11: ((4, 0), lambda r, t: np.sqrt(5) * (6 * r**4 - 6 * r**2 + 1)),
}


def test_noll_indices_match_noll_table():
    # Noll (1976) Table 1; references.md sec. 11
    for j, ((n, m), _f) in NOLL_TABLE.items():
        assert wf.noll_to_nm(j) == (n, m)
    # each radial order n holds n + 1 terms and every (n, m) occurs once
    seen = {wf.noll_to_nm(j) for j in range(1, 67)}
    assert len(seen) == 66
    assert all(abs(m) <= n and (n - abs(m)) % 2 == 0 for n, m in seen)


def test_zernike_values_match_noll_table():
    # Noll (1976) Table 1 formulas (references.md sec. 11)
    rng = np.random.default_rng(3)
    rho = rng.uniform(0, 1, 500)
    theta = rng.uniform(-np.pi, np.pi, 500)
    for j, (_nm, f) in NOLL_TABLE.items():
        np.testing.assert_allclose(wf.zernike(j, rho, theta), f(rho, theta), atol=1e-12)


def test_cartesian_basis_matches_polar_form():
    rng = np.random.default_rng(4)
    x, y = rng.uniform(-0.7, 0.7, (2, 300))
    basis = wf.zernike_basis(x, y, terms=45)
    rho, theta = np.hypot(x, y), np.arctan2(y, x)
    for j in range(1, 46):
        np.testing.assert_allclose(basis[:, j - 1], wf.zernike(j, rho, theta), atol=1e-11)


@pytest.mark.parametrize("terms, tol", [(11, 1e-13), (45, 1e-12)])
def test_noll_normalisation_orthonormal_by_quadrature(terms, tol):
    # Noll (1976): (1/pi) int Z_i Z_j rho drho dtheta = delta_ij; references.md sec. 11 gives
    # max|G - I| = 1.3e-14 for j = 1..11 with quadrature. Gauss-Legendre in rho is exact for
    # these polynomial degrees and the equispaced sum in theta is exact for the trig terms.
    nodes, weights = np.polynomial.legendre.leggauss(30)
    rho = 0.5 * (nodes + 1.0)
    wr = 0.5 * weights * rho
    nt = 64
    theta = np.arange(nt) * 2 * np.pi / nt
    rr, tt = np.meshgrid(rho, theta, indexing="ij")
    z = np.stack([wf.zernike(j, rr, tt).ravel() for j in range(1, terms + 1)])
    wts = (wr[:, None] * np.full(nt, 2 * np.pi / nt)[None, :]).ravel() / np.pi
    gram = (z * wts) @ z.T
    assert np.max(np.abs(gram - np.eye(terms))) < tol


def disk_metrics(coeffs, n=401, remove_defocus=False):
    radius = (n - 1) / 2.0
    _r, _c, x, y, inside = pupil_grid(n, radius)
    w = np.where(inside, zmap(coeffs, x, y), np.nan)
    return wf.wavefront_metrics(w, pupil=((n - 1) / 2, (n - 1) / 2, radius),
                                remove_defocus=remove_defocus)


@pytest.mark.parametrize("j, ratio", [(4, 3.46410), (11, 3.35410), (6, 4.89898)])
def test_pv_over_rms_of_single_terms(j, ratio):
    # references.md sec. 11 [V-calc]: PV/RMS of Z4 = 2 sqrt(3) = 3.46410, of Z11 = 1.5 sqrt(5)
    # = 3.35410, of Z5/Z6 = 2 sqrt(6) = 4.89898 (continuous disk; the pixel grid here is fine,
    # 401 px across, so the sampled values agree to about 1e-3).
    res = disk_metrics({j: 0.1})
    assert res.rms_waves == pytest.approx(0.1, rel=2e-3)
    assert res.pv_waves / res.rms_waves == pytest.approx(ratio, rel=2e-3)
    assert res.pv_waves == pytest.approx(0.1 * ratio, rel=2e-3)


def test_pure_defocus_pv_rms_values():
    # references.md sec. 11 [V-calc]: c4 = 0.1 wave gives PV 0.346410 and RMS 0.1
    res = disk_metrics({4: 0.1})
    assert res.pv_waves == pytest.approx(0.346410, abs=5e-4)
    assert res.rms_waves == pytest.approx(0.1, abs=2e-4)
    assert coeff(res, 4) == pytest.approx(0.1, abs=1e-12)
    # with defocus removed nothing is left
    gone = disk_metrics({4: 0.1}, remove_defocus=True)
    assert gone.rms_waves < 1e-12
    assert gone.removed_terms == [1, 2, 3, 4]


def test_eleven_term_refit_and_rms():
    # references.md sec. 11 [V-calc]: c2..c11 = (0.2, -0.1, 0.1, 0, 0.03, 0, 0, 0, 0, 0.02)
    # is refitted to 2e-16; its RMS excluding Z1-3 is 0.106301
    c = dict(zip(range(2, 12), (0.2, -0.1, 0.1, 0, 0.03, 0, 0, 0, 0, 0.02), strict=True))
    rng = np.random.default_rng(8)
    r = np.sqrt(rng.uniform(0, 1, 4000))
    t = rng.uniform(0, 2 * np.pi, 4000)
    x, y = r * np.cos(t), r * np.sin(t)
    w = zmap(c, x, y)
    fit = wf.fit_zernike(w, x, y, terms=11)
    np.testing.assert_allclose(fit.coefficients[1:], list(c.values()), atol=1e-12)
    res = disk_metrics(c)
    assert res.rms_zernike_waves == pytest.approx(0.106301, abs=1e-6)
    assert res.rms_waves == pytest.approx(0.106301, rel=3e-3)


def test_strehl_and_rules_of_thumb():
    # Mahajan, J. Opt. Soc. Am. 73, 860 (1983) (value from memory): S = exp(-(2 pi sigma)^2);
    # values from references.md sec. 11 [V-calc]
    assert wf.strehl_estimate(0.1) == pytest.approx(0.673825, abs=1e-6)
    assert wf.strehl_estimate(1 / 14) == pytest.approx(0.817569, abs=1e-6)
    assert wf.strehl_estimate(0.05) == pytest.approx(0.906018, abs=1e-6)
    # Rayleigh lambda/4 PV and Marechal lambda/14 RMS: rules of thumb (common practice)
    checks = wf.quality_checks(0.2, 0.08, pv_err=0.01, rms_err=0.004, max_rms_waves=0.1)
    kinds = {c["check"]: c for c in checks}
    user = [c for c in checks if c["kind"] == "user tolerance"]
    thumbs = [c for c in checks if c["kind"] == "rule of thumb"]
    assert len(user) == 1 and user[0]["passed"] and user[0]["margin_sigma"] == pytest.approx(5.0)
    assert sorted(c["limit_waves"] for c in thumbs) == pytest.approx([1 / 14, 0.25])
    assert [c["passed"] for c in thumbs if c["limit_waves"] == 0.25] == [True]
    assert [c["passed"] for c in thumbs if c["limit_waves"] < 0.1] == [False]
    assert any("Rayleigh" in k for k in kinds) and any("Marechal" in k for k in kinds)


# --------------------------------------------------------------------------------------------
# unwrapping
# --------------------------------------------------------------------------------------------


def test_unwrap_1d_matches_numpy_unwrap():
    # numpy.unwrap is the 1-D reference (Itoh's condition: steps below pi)
    rng = np.random.default_rng(2)
    true = np.cumsum(rng.uniform(-0.9 * np.pi, 0.9 * np.pi, 400))
    wrapped = np.angle(np.exp(1j * true))
    ours = wf.unwrap(wrapped)
    diff = ours - np.unwrap(wrapped)
    assert np.ptp(diff) < 1e-9
    assert abs(diff[0] / (2 * np.pi) - round(diff[0] / (2 * np.pi))) < 1e-9


def test_unwrap_2d_recovers_known_surface():
    # a masked 2-D surface with ~10 fringes of defocus and tilt, recovered up to 2 pi k
    _r, _c, x, y, inside = pupil_grid(96, 40)
    true = 2 * np.pi * zmap({2: 1.5, 4: 2.0, 6: 0.7}, x, y)
    wrapped = np.angle(np.exp(1j * true))
    out = wf.unwrap(wrapped, mask=~inside)
    diff = (out - true)[inside]
    assert np.ptp(diff) < 1e-9
    assert abs(diff[0] / (2 * np.pi) - round(diff[0] / (2 * np.pi))) < 1e-9
    assert np.all(np.isnan(out[~inside]))


def test_unwrap_without_scikit_image(monkeypatch):
    monkeypatch.setitem(sys.modules, "skimage.restoration", None)
    with pytest.raises(FringeError, match="install scikit-image"):
        wf.unwrap(np.zeros((4, 4)))


# --------------------------------------------------------------------------------------------
# phase-shifting algorithms
# --------------------------------------------------------------------------------------------


def test_four_step_formula_exact():
    # references.md sec. 10: phi = atan2(I4 - I2, I1 - I3), b = sqrt(...)/2, exact for
    # phi = 0.9, V = 0.6
    deltas = np.arange(4) * np.pi / 2
    frames = (1 + 0.6 * np.cos(0.9 + deltas))[:, None, None] * np.ones((4, 5, 5))
    est = wf.phase_four_step(frames)
    assert np.allclose(est.phase, 0.9, atol=1e-14)
    assert np.allclose(est.modulation / est.background, 0.6, atol=1e-14)
    assert est.step_rad == pytest.approx(np.pi / 2, abs=1e-12)


def test_hariharan_five_step_formula_exact():
    # Hariharan, Oreb & Eiju, Appl. Opt. 26, 2504 (1987) (value from memory):
    # phi = atan2(2(I2 - I4), 2 I3 - I1 - I5) for steps -pi ... pi
    rng = np.random.default_rng(5)
    phi = rng.uniform(-np.pi, np.pi, (6, 7))
    deltas = (np.arange(5) - 2) * np.pi / 2
    frames = 3.0 + 1.2 * np.cos(phi[None] + deltas[:, None, None])
    est = wf.phase_hariharan(frames)
    assert np.max(np.abs(np.angle(np.exp(1j * (est.phase - phi))))) < 1e-12
    assert np.allclose(est.modulation, 1.2) and np.allclose(est.background, 3.0)
    assert est.step_rad == pytest.approx(np.pi / 2, abs=1e-10)


@pytest.mark.parametrize("alpha_deg", [30.0, 45.0, 55.0])
def test_carre_formula_exact_for_unknown_step(alpha_deg):
    # Carre, Metrologia 2, 13 (1966) (value from memory); references.md sec. 10: exact for
    # alpha = 30, 45 and 55 deg with delta = -3a, -a, a, 3a
    a = np.deg2rad(alpha_deg)
    rng = np.random.default_rng(6)
    phi = rng.uniform(-np.pi, np.pi, (8, 8))
    deltas = np.array([-3, -1, 1, 3]) * a
    frames = 2.0 + 0.8 * np.cos(phi[None] + deltas[:, None, None])
    est = wf.phase_carre(frames)
    assert np.max(np.abs(np.angle(np.exp(1j * (est.phase - phi))))) < 1e-10
    assert est.step_rad == pytest.approx(2 * a, abs=1e-10)
    assert np.allclose(est.modulation, 0.8) and np.allclose(est.background, 2.0)


PHASES = np.linspace(-np.pi, np.pi, 3600, endpoint=False)


def _phase_error(fn, deltas):
    frames = (1 + 0.6 * np.cos(PHASES[None, :] + deltas[:, None]))[:, None, :]
    return np.angle(np.exp(1j * (fn(frames).phase[0] - PHASES)))


@pytest.mark.parametrize("eps, pv4, pv5", [(0.01, 0.0157084, 1.23375e-4),
                                           (0.05, 0.0786, 3.087e-3),
                                           (0.10, 0.158, 0.01239)])
def test_step_error_sensitivity_matches_reference(eps, pv4, pv5):
    # references.md sec. 10 [V-calc], delta_k -> delta_k (1 + eps) over 3600 phases:
    # 4-step PV (pi/2) eps with a 3 pi eps / 4 piston; Hariharan 5-step PV (pi^2/8) eps^2
    # (Hariharan et al. 1987 give (eps^2/4) sin 2 phi, value from memory); Carre immune.
    e4 = _phase_error(wf.phase_four_step, np.arange(4) * np.pi / 2 * (1 + eps))
    digits = 1e-5 if eps == 0.01 else 5e-4
    assert np.ptp(e4) == pytest.approx(pv4, rel=digits if eps == 0.01 else 3e-3)
    assert e4.mean() == pytest.approx(3 * np.pi * eps / 4, rel=1e-6)
    e5 = _phase_error(wf.phase_hariharan, (np.arange(5) - 2) * np.pi / 2 * (1 + eps))
    assert np.ptp(e5) == pytest.approx(pv5, rel=1e-4 if eps == 0.01 else 1e-3)
    ec = _phase_error(wf.phase_carre, np.array([-3, -1, 1, 3]) * np.pi / 4 * (1 + eps))
    assert np.ptp(ec) < 1e-12


@pytest.mark.parametrize("steps, deltas, expect_deg", [
    ("4", np.arange(4) * np.pi / 2 * 1.05, 94.5),
    ("5", (np.arange(5) - 2) * np.pi / 2 * 0.95, 85.5),
    ("carre", np.array([-3, -1, 1, 3]) * np.deg2rad(55.0), 110.0),
])
def test_phase_step_estimated_from_data(steps, deltas, expect_deg):
    _r, _c, x, y, inside = pupil_grid(64, 28)
    w = zmap({2: 2.0, 4: 0.5}, x, y)
    st = psi_stack(w, inside, deltas, noise=1.0)
    step, err, noise = wf.estimate_phase_step(st, algorithm=steps, mask=~inside)
    assert math.degrees(step) == pytest.approx(expect_deg, abs=max(5 * math.degrees(err), 0.05))
    assert noise == pytest.approx(1.0, rel=0.25)  # the added noise is 1 DN per frame


@pytest.mark.parametrize("steps, deltas", [
    ("4", np.arange(4) * np.pi / 2),
    ("5", (np.arange(5) - 2) * np.pi / 2),
    ("carre", np.array([-3, -1, 1, 3]) * np.deg2rad(50.0)),
])
def test_phase_shifting_stack_recovers_zernike_terms(steps, deltas):
    n, radius = 96, 40.0
    _r, _c, x, y, inside = pupil_grid(n, radius)
    truth = {2: 0.3, 3: -0.2, 4: 0.6, 5: 0.15, 7: -0.1, 11: 0.05}
    st = psi_stack(zmap(truth, x, y), inside, deltas, noise=2.0)
    res = wf.analyze_wavefront(st, steps=steps, pupil=((n - 1) / 2, (n - 1) / 2, radius))
    assert res.ok and res.method != "fourier-transform"
    for j in range(2, 16):
        c = coeff(res, j)
        err = res.zernike[j - 1]["err"]
        assert abs(c - truth.get(j, 0.0)) < max(5 * err, 2e-4), (j, c, err)
    if steps != "carre":
        assert res.phase_step_deg == pytest.approx(90.0, abs=0.2)


def test_four_step_step_error_is_reported():
    _r, _c, x, y, inside = pupil_grid(80, 34)
    st = psi_stack(zmap({4: 0.4, 8: 0.1}, x, y), inside, np.arange(4) * np.pi / 2 * 1.08)
    res = wf.analyze_wavefront(st, steps=4)
    assert res.phase_step_error == pytest.approx(0.08, abs=0.002)
    # references.md sec. 10: 4-step ripple PV (pi/2) eps rad
    assert res.step_ripple_pv_waves == pytest.approx(0.08 / 4, rel=0.03)
    assert any("phase step" in w for w in res.warnings)


# --------------------------------------------------------------------------------------------
# Fourier-transform method
# --------------------------------------------------------------------------------------------


def test_ftm_recovers_known_zernike_content():
    # Takeda, Ina & Kobayashi, J. Opt. Soc. Am. 72, 156 (1982). Stated tolerance: 0.003 waves
    # per coefficient and 0.01 waves PV; the scale comes from the worked example of
    # references.md sec. 9 (RMS error 0.0108 rad = 0.0017 waves inside rho < 0.8).
    n, radius = 192, 80.0
    rows, cols, x, y, inside = pupil_grid(n, radius)
    truth = {4: 0.25, 5: 0.1, 6: -0.08, 7: -0.06, 8: 0.05, 9: 0.04, 11: 0.03}
    w = zmap(truth, x, y)
    img = interferogram(w, rows, cols, inside, fx=1 / 6, fy=0.01, noise=2.0)
    res = wf.analyze_wavefront(img, pupil=((n - 1) / 2, (n - 1) / 2, radius))
    assert res.ok and res.method == "fourier-transform"
    for j in range(4, 16):
        assert coeff(res, j) == pytest.approx(truth.get(j, 0.0), abs=3e-3), j
    base = w - w[inside].mean()
    true_pv = float(np.ptp(base[inside]))
    true_rms = float(base[inside].std())
    assert res.pv_waves == pytest.approx(true_pv, abs=0.01)
    assert res.rms_waves == pytest.approx(true_rms, abs=0.002)
    assert res.carrier["period_px"] == pytest.approx(1 / math.hypot(1 / 6, 0.01), rel=1e-3)
    assert res.visibility_mean == pytest.approx(0.7, abs=0.03)
    assert res.wavefront_map.dtype == np.float32
    # the spectral noise floor recovers the added intensity noise (2 DN per pixel)
    assert res.intensity_noise_dn == pytest.approx(2.0, rel=0.2)
    assert np.isnan(res.visibility_map[0, 0]) and np.isnan(res.wavefront_map[0, 0])


def test_ftm_worked_example_tolerance():
    # references.md sec. 9 worked example (Takeda et al. 1982 method): 256 x 256, f0 = 1/8
    # along x, phi = 2 pi 0.8 (2 rho^2 - 1) with rho in units of 128 px, I = 1 + 0.7 cos(...),
    # fringes over the whole frame; error inside rho < 0.8 RMS 0.0108 rad, max 0.032 rad.
    n = 256
    rows, cols = np.mgrid[:n, :n].astype(float)
    c = (n - 1) / 2
    rho2 = ((cols - c) ** 2 + (rows - c) ** 2) / 128.0**2
    phi = 2 * np.pi * 0.8 * (2 * rho2 - 1)
    img = 1 + 0.7 * np.cos(2 * np.pi * cols / 8 + phi)
    res = wf.analyze_wavefront(img, pupil=(c, c, 128.0))
    m = res.wavefront_map.astype(float)
    sel = (rho2 < 0.64) & np.isfinite(m)
    true_w = phi / (2 * np.pi)
    a = np.stack([np.ones(sel.sum()), cols[sel], rows[sel]], axis=1)
    diff = m[sel] - true_w[sel]
    diff = diff - a @ np.linalg.lstsq(a, diff, rcond=None)[0]
    err_rad = 2 * np.pi * diff
    assert err_rad.std() < 0.0108
    assert np.abs(err_rad).max() < 0.032


def test_pupil_found_from_intensity():
    n = 160
    rows, cols, x, y, inside = pupil_grid(n, 55.0, cx=84.0, cy=74.0)
    img = interferogram(zmap({4: 0.1}, x, y), rows, cols, inside, fx=1 / 7, noise=3.0)
    p = wf.find_pupil(img)
    assert p.source == "detected"
    assert p.cx == pytest.approx(84.0, abs=0.5)
    assert p.cy == pytest.approx(74.0, abs=0.5)
    assert p.radius == pytest.approx(55.0, abs=0.5)
    res = wf.analyze_wavefront(img)
    assert res.pupil["source"] == "detected"
    assert coeff(res, 4) == pytest.approx(0.1, abs=0.005)


def test_full_frame_illumination_falls_back_to_centred_circle():
    n = 96
    rows, cols = np.mgrid[:n, :n].astype(float)
    img = 1 + 0.5 * np.cos(2 * np.pi * cols / 6)
    p = wf.find_pupil(img)
    assert p.source == "frame"
    assert p.radius == pytest.approx(n / 2 - 1)
    res = wf.analyze_wavefront(img)
    assert any("no dark surround" in w for w in res.warnings)
    assert res.rms_waves < 0.003


def _y_up_wavefront(n, radius):
    """Written pixel by pixel, without the library's basis (rows run down, y runs up)."""
    c = (n - 1) / 2
    rows, cols = np.mgrid[:n, :n].astype(float)
    up = (c - rows) / radius
    right = (cols - c) / radius
    inside = up**2 + right**2 <= 1
    r2 = up**2 + right**2
    w = {3: 2 * up,  # Z3 = 2 rho sin(theta) = 2 y
         5: 2 * np.sqrt(6) * right * up,  # Z5 = sqrt(6) rho^2 sin(2 theta) = 2 sqrt(6) x y
         7: np.sqrt(8) * (3 * r2 - 2) * up}  # Z7 = sqrt(8) (3 rho^3 - 2 rho) sin(theta)
    return rows, cols, inside, w


def test_y_up_sign_convention_for_tilt_y_and_sin_terms():
    # fringe's convention: image rows run down, pupil y runs up (references.md sec. 11,
    # "test the tilt-y and sin-term signs separately", common practice)
    n, radius = 128, 50.0
    c = (n - 1) / 2
    rows, cols, inside, z = _y_up_wavefront(n, radius)
    assert z[3][10, 64] > z[3][n - 11, 64]  # tilt y rises towards the top rows
    assert z[5][30, 90] > 0 > z[5][30, 30]  # upper right positive, upper left negative
    # an unwrapped map
    wmap = np.where(inside, 0.2 * z[3] + 0.1 * z[5] - 0.05 * z[7], np.nan)
    res = wf.wavefront_metrics(wmap, pupil=(c, c, radius))
    assert coeff(res, 3) == pytest.approx(0.2, abs=1e-9)
    assert coeff(res, 5) == pytest.approx(0.1, abs=1e-9)
    assert coeff(res, 7) == pytest.approx(-0.05, abs=1e-9)
    # a phase-shifting stack: I_k = a + b cos(2 pi W + delta_k)
    st = psi_stack(np.where(inside, 0.2 * z[3] + 0.1 * z[5] - 0.05 * z[7], 0.0), inside,
                   np.arange(4) * np.pi / 2)
    res = wf.analyze_wavefront(st, steps=4, pupil=(c, c, radius))
    assert coeff(res, 3) == pytest.approx(0.2, abs=1e-6)
    assert coeff(res, 5) == pytest.approx(0.1, abs=1e-6)
    assert coeff(res, 7) == pytest.approx(-0.05, abs=1e-6)


def test_y_up_sign_of_sin_terms_with_the_fourier_transform_method():
    # a single fringe image cannot tell a tilt from the carrier, so only the sin terms are
    # checked; the carrier (+x, 16 whole cycles) fixes the sign of the phase
    n, radius = 128, 50.0
    c = (n - 1) / 2
    rows, cols, inside, z = _y_up_wavefront(n, radius)
    img = interferogram(0.1 * z[5] - 0.05 * z[7], rows, cols, inside, fx=1 / 8)
    res = wf.analyze_wavefront(img, pupil=(c, c, radius))
    assert coeff(res, 5) == pytest.approx(0.1, abs=2e-3)
    assert coeff(res, 7) == pytest.approx(-0.05, abs=2e-3)
    assert abs(coeff(res, 6)) < 2e-3 and abs(coeff(res, 8)) < 2e-3


def test_carrier_direction_fixes_the_sign():
    n, radius = 128, 50.0
    c = (n - 1) / 2
    rows, cols, x, y, inside = pupil_grid(n, radius)
    w = zmap({4: 0.2}, x, y)
    pupil = (c, c, radius)
    # carrier along -x: the same pattern as +x carrier with -W, so the default rule (larger
    # carrier component positive) reports -W; naming the carrier restores +W
    img = interferogram(w, rows, cols, inside, fx=-1 / 8)
    assert coeff(wf.analyze_wavefront(img, pupil=pupil), 4) == pytest.approx(-0.2, abs=2e-3)
    named = wf.analyze_wavefront(img, pupil=pupil, carrier=(-1 / 8, 0.0))
    assert coeff(named, 4) == pytest.approx(0.2, abs=2e-3)
    assert named.carrier["fx_cyc_per_px"] == pytest.approx(-1 / 8, abs=1e-3)
    # near-horizontal fringes: carrier up the screen is the positive one
    img_y = interferogram(w, rows, cols, inside, fx=0.0, fy=1 / 8)
    res_y = wf.analyze_wavefront(img_y, pupil=pupil)
    assert coeff(res_y, 4) == pytest.approx(0.2, abs=2e-3)
    assert res_y.carrier["orientation_deg"] == pytest.approx(90.0, abs=0.5)


def test_masked_pixels_inside_the_pupil_are_bridged():
    n, radius = 128, 50.0
    c = (n - 1) / 2
    rows, cols, x, y, inside = pupil_grid(n, radius)
    truth = {4: 0.15, 6: 0.05}
    img = interferogram(zmap(truth, x, y), rows, cols, inside, fx=1 / 8)
    mask = np.zeros_like(inside)
    mask[40:46, 70:76] = True  # a dust spot
    img[mask] = 65535.0
    res = wf.analyze_wavefront(img, pupil=(c, c, radius), mask=mask)
    assert coeff(res, 4) == pytest.approx(0.15, abs=2e-3)
    assert coeff(res, 6) == pytest.approx(0.05, abs=2e-3)


def test_central_obstruction_is_excluded_and_bridged():
    # an annular pupil (a dark central obstruction of 0.3 R): the dark pixels are not used and
    # the fringes are continued across them, so the terms come out as for a full pupil
    n, radius = 160, 64.0
    c = (n - 1) / 2
    rows, cols, x, y, disk = pupil_grid(n, radius)
    annulus = disk & (x * x + y * y >= 0.3**2)
    truth = {4: 0.2, 6: 0.05, 8: -0.04, 11: 0.03}
    img = interferogram(zmap(truth, x, y), rows, cols, annulus, fx=1 / 7, noise=2.0)
    res = wf.analyze_wavefront(img, pupil=(c, c, radius))
    for j in range(4, 16):
        assert coeff(res, j) == pytest.approx(truth.get(j, 0.0), abs=3e-3), j
    assert np.all(np.isnan(res.wavefront_map[x * x + y * y < 0.3**2]))
    assert any("dark" in w for w in res.warnings)


def test_strong_aberration_for_the_carrier_is_flagged():
    n, radius = 128, 55.0
    c = (n - 1) / 2
    rows, cols, x, y, inside = pupil_grid(n, radius)
    img = interferogram(zmap({4: 1.0}, x, y), rows, cols, inside, fx=1 / 10)
    res = wf.analyze_wavefront(img, pupil=(c, c, radius))
    assert any("local fringe frequency" in w for w in res.warnings)


@pytest.mark.slow
def test_uncertainties_match_the_scatter():
    # Monte Carlo: the reported 1-sigma errors of the defocus coefficient and of the RMS
    # should match the scatter over noise realisations (within a factor 2 for 16 trials)
    n, radius = 96, 38.0
    c = (n - 1) / 2
    rows, cols, x, y, inside = pupil_grid(n, radius)
    w = zmap({4: 0.1, 6: 0.05, 8: -0.03}, x, y)
    c4, c4e, rms, rmse = [], [], [], []
    for k in range(16):
        img = interferogram(w, rows, cols, inside, fx=1 / 6, noise=60.0, seed=k)
        res = wf.analyze_wavefront(img, pupil=(c, c, radius))
        c4.append(coeff(res, 4))
        c4e.append(res.zernike[3]["err"])
        rms.append(res.rms_waves)
        rmse.append(res.rms_waves_err)
    assert 0.5 < np.mean(c4e) / np.std(c4) < 2.0
    assert 0.5 < np.mean(rmse) / np.std(rms) < 2.5
    assert abs(np.mean(c4) - 0.1) < 3 * np.mean(c4e)


def test_inputs_are_not_modified():
    n, radius = 96, 38.0
    c = (n - 1) / 2
    rows, cols, x, y, inside = pupil_grid(n, radius)
    w = zmap({4: 0.1}, x, y)
    img = interferogram(w, rows, cols, inside, fx=1 / 6)
    mask = np.zeros(img.shape, dtype=bool)
    mask[5, 5] = True
    img0, mask0 = img.copy(), mask.copy()
    wf.analyze_wavefront(img, mask=mask)
    wf.ftm_phase(img, mask=mask, model=[0.0, 0.0, 0.0, 0.1])
    assert np.array_equal(img, img0) and np.array_equal(mask, mask0)
    st = psi_stack(w, inside, np.arange(4) * np.pi / 2)
    st0 = st.copy()
    wf.analyze_wavefront(st, steps=4, mask=mask)
    wf.phase_carre(st)
    assert np.array_equal(st, st0)
    wmap = np.where(inside, w, np.nan)
    wmap0 = wmap.copy()
    wf.wavefront_metrics(wmap, pupil=(c, c, radius))
    assert np.array_equal(wmap, wmap0, equal_nan=True)


# --------------------------------------------------------------------------------------------
# result record
# --------------------------------------------------------------------------------------------


def test_result_dictionary_keys_and_units():
    n, radius = 96, 38.0
    c = (n - 1) / 2
    rows, cols, x, y, inside = pupil_grid(n, radius)
    img = interferogram(zmap({4: 0.1}, x, y), rows, cols, inside, fx=1 / 6, noise=1.0)
    res = wf.analyze_wavefront(img, pupil=(c, c, radius), wavelength_nm=632.8,
                               wavelength_nm_err=0.5, max_rms_waves=0.5, file="a.tif")
    d = res.to_dict()
    for key in ("pv_waves", "pv_waves_err", "rms_waves", "rms_waves_err", "pv_nm", "rms_nm",
                "strehl_estimate", "carrier", "pupil", "warnings", "status", "error", "file",
                "frame", "zernike"):
        assert key in d
    assert d["zernike_ordering"] == "Noll (1976)"
    assert "orthonormal" in d["zernike_normalisation"]
    assert set(d["zernike"][0]) >= {"j", "n", "m", "name", "coefficient_waves", "err"}
    assert d["pv_nm"] == pytest.approx(d["pv_waves"] * 632.8)
    assert d["tolerance_pass"] is True
    json.dumps(d, allow_nan=False)
    plain = wf.analyze_wavefront(img, pupil=(c, c, radius)).to_dict()
    assert "pv_nm" not in plain and plain["tolerance_pass"] is None
    failed = wf.WavefrontResult(file="x.tif").fail("broken").to_dict()
    assert failed["status"] == "error" and failed["error"] == "broken"
    assert failed["zernike"] == [] and "pv_waves" not in failed


# --------------------------------------------------------------------------------------------
# bad inputs
# --------------------------------------------------------------------------------------------


def _good_image():
    n, radius = 64, 26.0
    rows, cols, x, y, inside = pupil_grid(n, radius)
    return interferogram(zmap({4: 0.05}, x, y), rows, cols, inside, fx=1 / 5)


@pytest.mark.parametrize("kwargs, match", [
    ({"zernike_terms": 2}, "at least 3"),
    ({"zernike_terms": 500}, "between 1 and"),
    ({"wavelength_nm": -5.0}, "wavelength_nm"),
    ({"max_rms_waves": 0.0}, "max_rms_waves"),
    ({"pupil": (30.0, 30.0, 0.5)}, "radius"),
    ({"pupil": (500.0, 30.0, 10.0)}, "outside"),
    ({"steps": "7"}, "unknown phase-shifting"),
    ({"steps": 4}, r"\(4, H, W\)|4 frames"),
    ({"mask": np.zeros((3, 3), dtype=bool)}, "mask shape"),
])
def test_bad_options_raise(kwargs, match):
    with pytest.raises(FringeError, match=match):
        wf.analyze_wavefront(_good_image(), **kwargs)


def test_bad_data_raise():
    with pytest.raises(FringeError, match="2-D"):
        wf.analyze_wavefront(np.ones(50))
    with pytest.raises(FringeError, match="2-D"):
        wf.analyze_wavefront(np.ones((4, 40, 40)))
    with pytest.raises(FringeError, match="^flat.tif: .*no carrier"):
        flat = 100.0 + np.random.default_rng(0).normal(0.0, 1.0, (64, 64))
        wf.analyze_wavefront(flat, file="flat.tif")
    with pytest.raises(FringeError, match="no usable pixels"):
        wf.analyze_wavefront(np.full((64, 64), np.nan))
    with pytest.raises(FringeError, match="needs 5 frames|\\(5, H, W\\)"):
        wf.analyze_wavefront(np.ones((4, 32, 32)), steps=5)
    with pytest.raises(FringeError, match="valid samples"):
        wf.fit_zernike(np.zeros(5), np.zeros(5), np.zeros(5), terms=4)
    with pytest.raises(FringeError, match="too small or irregular"):
        wf.fit_zernike(np.zeros(50), np.linspace(-1, 1, 50), np.zeros(50), terms=6)
    with pytest.raises(FringeError, match="Noll index"):
        wf.noll_to_nm(0)


# --------------------------------------------------------------------------------------------
# command line
# --------------------------------------------------------------------------------------------


@pytest.fixture()
def tiffs(tmp_path):
    n, radius = 96, 38.0
    rows, cols, x, y, inside = pupil_grid(n, radius)
    w = zmap({4: 0.1, 6: 0.03}, x, y)
    img = interferogram(w, rows, cols, inside, fx=1 / 6, noise=2.0).astype(np.uint16)
    a = tmp_path / "a.tif"
    tifffile.imwrite(a, img)
    two = tmp_path / "two.tif"
    tifffile.imwrite(two, np.stack([img, img]), photometric="minisblack")
    stack = psi_stack(w, inside, np.arange(4) * np.pi / 2, noise=2.0).astype(np.uint16)
    s4 = tmp_path / "s4.tif"
    tifffile.imwrite(s4, stack, photometric="minisblack")
    singles = []
    for k in range(4):
        p = tmp_path / f"f{k}.tif"
        tifffile.imwrite(p, stack[k])
        singles.append(str(p))
    return {"a": str(a), "two": str(two), "s4": str(s4), "singles": singles,
            "dir": tmp_path}


def test_cli_json_record_and_map(tiffs):
    out_map = tiffs["dir"] / "map.tif"
    rc, out, err = cli([tiffs["a"], "--format", "json", "--out-map", str(out_map),
                        "--wavelength-nm", "632.8+-0.2"])
    assert rc == 0 and err == ""
    rec = json.loads(out.strip())
    assert rec["status"] == "ok" and rec["file"] == tiffs["a"]
    assert rec["zernike"][3]["coefficient_waves"] == pytest.approx(0.1, abs=0.003)
    assert rec["rms_nm_err"] > 0 and rec["zernike_ordering"] == "Noll (1976)"
    with tifffile.TiffFile(out_map) as tf:
        page = tf.pages[0]
        assert page.dtype == np.float32
        desc = json.loads(page.description)
        data = page.asarray()
    assert desc["unit"] == "waves"
    assert np.isnan(data[0, 0]) and np.isfinite(data[48, 48])
    assert not list(tiffs["dir"].glob("*.part"))


def test_cli_several_inputs_indexed_maps_and_failures(tiffs):
    out_map = tiffs["dir"] / "m.tif"
    missing = str(tiffs["dir"] / "missing.tif")
    rc, out, err = cli([tiffs["a"], missing, tiffs["two"], "--out-map", str(out_map)])
    assert rc == 1
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("fringe: ") and "missing.tif" in lines[0]
    assert "Traceback" not in err
    # records: a.tif (0), missing (1, no map), two.tif frames 0 and 1 (2, 3)
    names = sorted(p.name for p in tiffs["dir"].glob("m_*.tif"))
    assert names == ["m_0.tif", "m_2.tif", "m_3.tif"]
    assert out.count(": ok") == 3 and "error" in out


def test_cli_phase_shifting_stack_and_single_files(tiffs):
    rc, out, err = cli([tiffs["s4"], "--steps", "4", "--format", "json"])
    assert rc == 0, err
    rec = json.loads(out)
    assert rec["method"] == "4-step" and rec["phase_step_deg"] == pytest.approx(90, abs=0.5)
    rc, out, err = cli([*tiffs["singles"], "--steps", "4", "--format", "json"])
    assert rc == 0, err
    assert json.loads(out)["zernike"][3]["coefficient_waves"] == pytest.approx(0.1, abs=1e-3)
    rc, out, err = cli([tiffs["s4"], "--steps", "5"])
    assert rc == 1 and "needs a stack of 5 frames" in err


def test_cli_tolerance_failure_exits_1(tiffs):
    rc, out, err = cli([tiffs["a"], "--max-rms-waves", "0.01", "--max-pv-waves", "5"])
    assert rc == 1
    assert "fails tolerance: RMS <= 0.01 waves" in err
    assert "user tolerance]: FAIL" in out and "rule of thumb" in out
    rc, out, err = cli([tiffs["a"], "--max-rms-waves", "0.5", "--remove-defocus"])
    assert rc == 0 and "defocus" in out.split("removed")[1].splitlines()[0]


@pytest.mark.parametrize("argv", [
    ["--zernike-terms", "2"],
    ["--pupil", "10", "10", "-5"],
    ["--max-rms-waves", "-1"],
    ["--wavelength-nm", "abc"],
    ["--steps", "6"],
])
def test_cli_bad_option_values_exit_2(tiffs, argv, capsys):
    with pytest.raises(SystemExit) as exc:
        cli([tiffs["a"], *argv])
    assert exc.value.code == 2


def test_cli_dark_pattern_and_visibility_map(tiffs):
    dark = tiffs["dir"] / "dark-1.tif"
    tifffile.imwrite(dark, np.full((96, 96), 20, dtype=np.uint16))
    vis = tiffs["dir"] / "vis.tif"
    pattern = str(tiffs["dir"] / "dark-*.tif")
    rc, out, err = cli([tiffs["a"], "--dark", pattern, "--out-visibility", str(vis),
                        "--format", "json"])
    assert rc == 0, err
    rec = json.loads(out)
    assert rec["visibility_file"] == str(vis)
    v = tifffile.imread(vis)
    assert v.dtype == np.float32 and np.isnan(v[0, 0])
    # the dark (20 DN) is subtracted: the visibility of a 1000 (1 + 0.7 cos) pattern stays
    assert np.nanmedian(v) == pytest.approx(0.7, abs=0.05)


def test_cli_dark_of_wrong_shape(tiffs):
    dark = tiffs["dir"] / "dark.tif"
    tifffile.imwrite(dark, np.zeros((10, 12), dtype=np.uint16))
    rc, out, err = cli([tiffs["a"], "--dark", str(dark)])
    assert rc == 1
    assert len(err.strip().splitlines()) == 1 and "dark.tif" in err and "shape" in err


def test_write_map_is_atomic(tmp_path):
    target = tmp_path / "no-such-dir" / "m.tif"
    with pytest.raises(FringeError, match="m.tif"):
        wf.write_map(target, np.zeros((4, 4)))
    good = tmp_path / "m.tif"
    wf.write_map(good, np.ones((4, 5)), description={"a": float("nan")})
    assert tifffile.imread(good).dtype == np.float32
    assert not list(tmp_path.glob("*.part"))
