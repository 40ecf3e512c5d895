"""Photon counting: event detection, cosmic rays, Poisson-likelihood fit, significance, build-up."""

from __future__ import annotations

import argparse
import io
import json
import math

import numpy as np
import pytest
import tifffile
from scipy import stats

from fringe import photons
from fringe._util import FringeError
from fringe.photons import (
    EventList,
    analyze_counts_table,
    analyze_events,
    analyze_photons,
    dark_reference,
    detect_frame,
    detect_stack,
    estimate_read_noise,
    fit_poisson_profile,
    lr_significance,
    photons_needed,
    photons_needed_ideal,
    poisson_crlb,
    read_counts_table,
)
from fringe.report import json_line
from fringe.synth import _splat, photon_stack

# Sources of the reference values used below:
# [Cash]  W. Cash, "Parameter estimation in astronomy through application of the likelihood
#         ratio", Astrophys. J. 228, 939-947 (1979): Poisson likelihood statistic.
# [Kay]   S. M. Kay, Fundamentals of Statistical Signal Processing: Estimation Theory,
#         Prentice Hall (1993), ch. 3 (Fisher information, Cramer-Rao bound) and ch. 7
#         (asymptotic efficiency of maximum likelihood).
# [Wilks] S. S. Wilks, Ann. Math. Statist. 9, 60-62 (1938): chi-square law of the
#         likelihood ratio.
# [Scargle] J. D. Scargle, Astrophys. J. 263, 835-853 (1982), eq. 14: false-alarm
#         probability over independent frequencies.
# [RH]    M. S. Robbins and B. J. Hadwen, IEEE Trans. Electron Devices 50, 1227 (2003):
#         exponential output of one electron in a high-gain multiplication register.
# references.md sec. 6 (Poisson CRLB worked example, from the Poisson Fisher information
#         [Kay]) and sec. 13 (photons needed, background), computed values.
# Section and equation numbers cited for Kay and Scargle are from memory.


def _wrap(a: float) -> float:
    return float((a + np.pi) % (2 * np.pi) - np.pi)


def _events_from_counts(counts: np.ndarray, n_frames: int, rng) -> EventList:
    """An event list holding given counts at pixel centres, spread over the frames."""
    rows, cols = np.nonzero(counts)
    k = counts[rows, cols]
    m = int(k.sum())
    return EventList(x=np.repeat(cols, k).astype(float), y=np.repeat(rows, k).astype(float),
                     frame=rng.integers(0, n_frames, m), charge=np.full(m, 20.0),
                     area=np.full(m, 9), cluster_charge=np.full(m, 20.0),
                     accepted=np.ones(m, bool), reason=np.zeros(m, int),
                     shape=counts.shape, n_frames=n_frames, read_noise_dn=1.0, noise_dn=1.0,
                     threshold=5.0, box=3, limits={"max_area": 100.0, "max_charge": 1e9})


def _pattern_rate(shape, *, period, orientation_deg, phase, visibility, signal, background):
    """Rate per pixel per frame at the pixel centres: b + s (1 + V cos(2 pi n.(r-c)/P + phi))."""
    h, w = shape
    t = np.deg2rad(orientation_deg)
    x = np.arange(w) - (w - 1) / 2
    r = np.arange(h) - (h - 1) / 2
    u = np.cos(t) * x[None, :] - np.sin(t) * r[:, None]
    return background + signal * (1 + visibility * np.cos(2 * np.pi * u / period + phase))


# ----------------------------------------------------------------------- Fisher information


def test_poisson_crlb_worked_example():
    # references.md sec. 6, Poisson worked example: N = 256, P = 16, B = 20 per px, V = 0.5,
    # phi = 0.3: CRLB s.d. V 0.0177663, phi (at n = 0) 0.0761167, f 8.23685e-5
    # (I = sum d lam d lam / lam, [Kay] sec. 3.9 for non-Gaussian likelihoods).
    n = np.arange(256.0)
    sd = poisson_crlb(n, 1.0, background=0.0, signal=20.0, visibility=0.5, period=16.0,
                      phase=0.3, free=("signal", "visibility", "omega", "phase"))
    assert sd["visibility"] == pytest.approx(0.0177663, rel=2e-5)
    assert sd["phase"] == pytest.approx(0.0761167, rel=2e-5)
    assert sd["omega"] / (2 * np.pi) == pytest.approx(8.23685e-5, rel=2e-5)
    # Closed form over whole periods (references.md sec. 6):
    # var(V) = V^2 / (N_tot (1/sqrt(1 - V^2) - 1)).
    closed = math.sqrt(0.25 / (5120 * (1 / math.sqrt(1 - 0.25) - 1)))
    assert closed == pytest.approx(0.0177660, rel=1e-5)
    assert sd["visibility"] == pytest.approx(closed, rel=1e-4)


@pytest.mark.parametrize("dark, expected", [(5.0, 0.0207675), (20.0, 0.0277282)])
def test_poisson_crlb_with_known_background(dark, expected):
    # references.md sec. 13: background D per pixel in the sec. 6 Poisson example, s.d. of V
    # 0.0207675 at D = 5 and 0.0277282 at D = 20 (background known).
    n = np.arange(256.0)
    sd = poisson_crlb(n, 1.0, background=dark, signal=20.0, visibility=0.5, period=16.0,
                      phase=0.3)
    assert sd["visibility"] == pytest.approx(expected, rel=2e-5)


def test_photons_needed_against_closed_form():
    # references.md sec. 13: N_tot >= 1 / (eps^2 (1/sqrt(1 - V^2) - 1)) at eps = 1 %.
    table = {0.1: 1.98499e6, 0.3: 2.07104e5, 0.5: 64641.0, 0.9: 7727.04, 0.99: 1642.36}
    for v, n in table.items():
        assert photons_needed_ideal(v, 0.01) == pytest.approx(n, rel=1e-5)
    # The Fisher-information scaling at the worked example gives the same number.
    sd = poisson_crlb(np.arange(256.0), 1.0, background=0.0, signal=20.0, visibility=0.5,
                      period=16.0, phase=0.3)
    assert photons_needed(0.5, sd["visibility"], 5120, 0.01) == pytest.approx(64641, rel=1e-4)
    # Small-V limit 2 / (eps V)^2 (references.md sec. 13).
    assert photons_needed_ideal(0.01, 0.01) == pytest.approx(2 / (0.01 * 0.01) ** 2, rel=1e-4)


def test_photons_needed_delivers_the_precision():
    # Fisher information grows in proportion to exposure [Kay] sec. 3.7: scaling the
    # exposure to the predicted photon number gives sigma_V / V at the chosen precision.
    rng = np.random.default_rng(4)
    u = np.arange(200.0) - 99.5
    lam = 50.0 * (1 + 0.6 * np.cos(2 * np.pi * u / 12.5 + 0.4))
    fit = fit_poisson_profile(u, rng.poisson(lam), 1.0, period=12.5, background=0.0)
    v, ve = fit.values["visibility"], fit.errors["visibility"]
    need = photons_needed(v, ve, fit.counts, 0.01)
    scale = need / lam.sum()
    big = fit_poisson_profile(u, rng.poisson(lam * scale), scale, period=12.5,
                              background=0.0)
    rel = big.errors["visibility"] / big.values["visibility"]
    assert rel == pytest.approx(0.01, rel=0.12)  # V-hat of the first fit is good to ~3 %


# ------------------------------------------------------------------ likelihood ratio


def test_lr_significance_values():
    # chi-square, 2 dof: 95 % point 5.99146 = -2 ln 0.05; one-sided z(0.05) = 1.64485
    # (standard tables, values from memory; exact here by the closed forms) [Wilks].
    p, z = lr_significance(-2 * math.log(0.05), dof=2)
    assert p == pytest.approx(0.05, rel=1e-9)
    assert z == pytest.approx(1.6448536, rel=1e-6)
    # Look-elsewhere: p = 1 - (1 - p_local)^M [Scargle].
    p_m, _ = lr_significance(-2 * math.log(0.001), dof=2, trials=50)
    assert p_m == pytest.approx(1 - 0.999**50, rel=1e-9)
    # Far tail: finite, and close to sqrt(LR) for chi-square with 2 dof.
    p_far, z_far = lr_significance(4000.0, dof=2)
    assert p_far == 0.0 and 60.0 < z_far < math.sqrt(4000.0)
    p3, z3 = lr_significance(30.0, dof=3)
    assert p3 == pytest.approx(stats.chi2.sf(30.0, 3), rel=1e-9)
    assert z3 == pytest.approx(stats.norm.isf(p3), rel=1e-9)


@pytest.mark.slow
def test_fisher_errors_match_monte_carlo_spread():
    # [Kay] ch. 7: maximum likelihood is asymptotically unbiased and reaches the CRLB; the
    # Fisher s.d. must match the spread of 200 fits within ~15 % (expected scatter of an
    # s.d. ratio from 200 trials: 1/sqrt(2 * 199) = 5 %). Poisson likelihood [Cash].
    rng = np.random.default_rng(11)
    n_bins, period, level, vis, phase = 128, 16.0, 10.0, 0.5, 0.3
    u = np.arange(n_bins) - (n_bins - 1) / 2
    lam = level * (1 + vis * np.cos(2 * np.pi * u / period + phase))
    est, err = [], []
    for _ in range(200):
        k = rng.poisson(lam)
        f = fit_poisson_profile(u, k, 1.0, period=period * (1 + 0.01 * rng.standard_normal()),
                                background=0.0)
        est.append([f.values["visibility"], f.values["phase"], f.values["period"]])
        err.append([f.errors["visibility"], f.errors["phase"], f.errors["period"]])
    est, err = np.array(est), np.array(err)
    spread = est.std(axis=0, ddof=1)
    ratio = spread / err.mean(axis=0)
    assert np.all(np.abs(ratio - 1) < 0.15), ratio
    truth = np.array([vis, phase, period])
    assert np.all(np.abs(est.mean(axis=0) - truth) < 4 * spread / np.sqrt(200))
    # The Fisher errors at the fitted values agree with the CRLB at the truth.
    sd = poisson_crlb(u, 1.0, background=0.0, signal=level, visibility=vis, period=period,
                      phase=phase)
    assert err[:, 0].mean() == pytest.approx(sd["visibility"], rel=0.05)
    assert err[:, 2].mean() == pytest.approx(sd["period"], rel=0.05)


@pytest.mark.slow
def test_null_false_alarm_rate_at_fixed_frequency():
    # [Wilks]: with no fringes and the frequency fixed, 2 (ln L1 - ln L0) ~ chi-square with
    # 2 dof, so p < 0.05 in 5 % of the trials; 300 trials: binomial s.d. 1.3 %, accepted
    # range 2-9 %. Low counts (2 per bin) [Cash].
    rng = np.random.default_rng(5)
    u = np.arange(64.0) - 31.5
    p = np.array([fit_poisson_profile(u, rng.poisson(2.0, 64), 1.0, period=8.0,
                                      fix_frequency=True, background=0.0).p_value_local
                  for _ in range(300)])
    assert 0.02 <= np.mean(p < 0.05) <= 0.09


@pytest.mark.slow
def test_null_false_alarm_with_searched_frequency():
    # With the frequency searched, the local p-value is far too optimistic (no Wilks: the
    # frequency is undefined under the null, Davies 1987). Davies' upcrossing bound over
    # the searched band (R. B. Davies, Biometrika 74, 33-43, 1987) brings the false-alarm
    # rate back near its nominal 5 %; 200 trials: binomial s.d. 1.5 %, accepted 2-11 %.
    rng = np.random.default_rng(8)
    x = np.arange(64.0)
    loc, glob = [], []
    for _ in range(200):
        r = analyze_counts_table((x, rng.poisson(3.0, x.size), np.ones(x.size)),
                                 background_rate=0.0)
        loc.append(r.p_value_local)
        glob.append(r.p_value)
    assert np.mean(np.array(loc) < 0.05) > 0.5
    assert 0.02 <= np.mean(np.array(glob) < 0.05) <= 0.11


def test_null_image_search_is_not_optimistic():
    # 2-D search of count images without fringes: the corrected p-value (expected Euler
    # characteristic; Vitells & Gross, Astropart. Phys. 35, 230, 2011) must not claim
    # fringes more often than its nominal 5 % (it is conservative for images).
    rng = np.random.default_rng(3)
    glob = []
    for _ in range(25):
        ev = _events_from_counts(rng.poisson(2.0, (32, 32)), 100, rng)
        r = analyze_events(ev, background_rate=0.0, build_up_points=0)
        assert r.p_value_local < r.p_value
        glob.append(r.p_value)
    assert np.mean(np.array(glob) < 0.05) <= 0.08


# ----------------------------------------------------------------------- event detection


def test_read_noise_estimate_robust_against_events():
    # Clipped standard deviation of the noise core (Huber & Ronchetti, Robust Statistics,
    # 2009, sec. 5.1); photon events are sparse positive outliers.
    rng = np.random.default_rng(1)
    noise = rng.normal(100.0, 2.0, (256, 256))
    frame = noise.copy()
    hits = rng.integers(0, 256, (300, 2))
    frame[hits[:, 0], hits[:, 1]] += rng.exponential(60.0, 300)
    off, rn = estimate_read_noise(np.rint(frame))
    # Reference: the standard deviation of the rounded noise alone.
    assert rn == pytest.approx(np.std(np.rint(noise)), rel=0.02)
    assert off == pytest.approx(100.0, abs=0.05)


def _spots(shape, xy, charge, sigma, read, rng, offset=100.0):
    img = np.zeros((1,) + shape)
    xy = np.asarray(xy, dtype=float)
    _splat(img, np.zeros(len(xy), int), xy[:, 0], xy[:, 1], np.full(len(xy), charge), sigma)
    return np.rint(img[0] + offset + rng.normal(0, read, shape))


@pytest.mark.parametrize("box", [1, 3])
def test_photon_spread_over_pixels_counts_once(box):
    # A single event spread by a spot of s.d. 1.2 px over ~30 pixels is one photon; two
    # photons 4 px apart stay two (local maxima of the detection image).
    rng = np.random.default_rng(2)
    xy = [(8.3, 8.6), (24.3, 9.1), (40.0, 8.0), (9.7, 30.2), (26.1, 28.8), (41.4, 31.3),
          (10.0, 47.0), (14.0, 47.0)]
    frame = _spots((56, 56), xy, 400.0, 1.2, 2.0, rng)
    ev = detect_frame(frame, noise_dn=2.0, box=box)
    assert ev["x"].size == len(xy)
    got = np.stack([ev["x"], ev["y"]], axis=1)
    for x, y in xy:
        d = np.hypot(got[:, 0] - x, got[:, 1] - y)
        assert d.min() < 0.4  # the centroid window (5 x 5 px) truncates a wide spot
        assert np.array_equal(np.rint(got[np.argmin(d)]), np.rint([x, y]))
    big = [a for a, x in zip(ev["area"], ev["x"], strict=True) if x < 20 and x > 5]
    assert max(big) >= 9  # the event covered many pixels


def test_detection_efficiency_no_double_counting():
    # With exponential event charges [RH] a threshold T keeps a fraction about
    # exp(-T / (g f)) of the photons, f the charge fraction of a 0.7 px spot inside the 3 x 3
    # box (0.94 centred on a pixel, 0.85 at a corner; 0.91 on average, computed from the
    # normal integral): here about 0.7, and never more photons than were sent.
    rng = np.random.default_rng(3)
    st, truth = photon_stack(300, (48, 48), period_px=8.0, orientation_deg=30.0,
                             visibility=0.8, phase_rad=0.0, photons_per_frame=3.0,
                             background_per_px=0.0, rng=rng, read_noise_e=0.02,
                             cosmic_rays_per_frame=0.0)
    ev = detect_stack(st)
    ratio = ev.n_events / sum(truth["signal_photons"])
    thr = 5.0 * 3 * ev.noise_dn
    expected = math.exp(-thr / (truth["gain_dn_per_photon"] * 0.91))
    assert ratio == pytest.approx(expected, abs=0.08)
    assert ratio < 1.0
    assert ev.read_noise_dn == pytest.approx(math.sqrt(0.4**2 + 1 / 12), rel=0.1)


def test_cosmic_ray_track_rejected():
    rng = np.random.default_rng(6)
    frames = []
    spots = []
    for _ in range(40):
        xy = rng.uniform(4, 60, (3, 2))
        spots.append(xy)
        charge = rng.exponential(40.0)
        frames.append(_spots((64, 64), xy, 40.0 + charge, 0.7, 2.0, rng))
    stack = np.array(frames)
    # A straight track of 30 px at 800 DN per pixel in frame 7 (common practice: cosmic
    # rays deposit hundreds to thousands of DN along a line).
    t = np.arange(0, 30, 0.25)
    px = np.rint(10 + t * np.cos(0.4)).astype(int)
    py = np.rint(20 + t * np.sin(0.4)).astype(int)
    np.add.at(stack[7], (py, px), 200.0)
    before = stack.copy()
    ev = detect_stack(stack)
    np.testing.assert_array_equal(stack, before)
    on_track = (ev.frame == 7) & (ev.x > 8) & (ev.x < 39) & (np.abs(
        (ev.y - 20) * np.cos(0.4) - (ev.x - 10) * np.sin(0.4)) < 2.5)
    assert on_track.any()
    assert not ev.accepted[on_track].any()
    assert np.all(ev.reason[on_track] > 0)
    # The photons are kept (a few may fall on the track by chance).
    assert ev.n_events >= 0.9 * 3 * 40
    assert ev.count_image().sum() == ev.n_events


def test_cosmic_rays_from_photon_stack_leave_no_counts():
    rng = np.random.default_rng(9)
    st, truth = photon_stack(200, (64, 64), period_px=8.0, orientation_deg=0.0,
                             visibility=0.8, phase_rad=0.0, photons_per_frame=4.0,
                             background_per_px=0.0, rng=rng, read_noise_e=0.02,
                             cosmic_rays_per_frame=0.3)
    ev = detect_stack(st)
    tracks = truth["cosmic_rays"]
    assert len(tracks) > 30
    found = 0
    accepted_near = 0
    for cr in tracks:
        x0, y0, x1, y1 = cr["x0"], cr["y0"], cr["x1"], cr["y1"]
        sel = ev.frame == cr["frame"]
        px, py = ev.x[sel] - x0, ev.y[sel] - y0
        dx, dy = x1 - x0, y1 - y0
        t = np.clip((px * dx + py * dy) / (dx * dx + dy * dy), 0, 1)
        near = np.hypot(px - t * dx, py - t * dy) < 1.5
        found += bool((near & ~ev.accepted[sel]).any())
        accepted_near += int((near & ev.accepted[sel]).sum())
    assert found >= 0.95 * len(tracks)
    # Photons fall near a track by chance only: 4 photons per 4096 px per frame, ~3 px^2
    # per unit length of a 5-30 px track.
    assert accepted_near <= 5
    assert ev.n_events <= sum(truth["signal_photons"])


# ------------------------------------------------------------------ fits of count images


@pytest.mark.parametrize("angle, phase", [(0.0, 0.7), (35.0, -2.0), (120.0, 1.2)])
def test_count_image_fit_within_errors(angle, phase):
    # Poisson counts from the interface model (pixel-centre sampling) with background from
    # regions outside the pattern; Poisson ML [Cash], errors from the Fisher information
    # [Kay]. Each estimate within 3.5 sigma of the truth.
    rng = np.random.default_rng(int(angle) + 3)
    n_frames, shape = 1000, (80, 80)
    roi = (8, 8, 64, 64)
    b, s, vis, period = 2e-4, 1e-3, 0.7, 9.0
    rate = np.full(shape, b)
    rate[8:72, 8:72] = _pattern_rate((64, 64), period=period, orientation_deg=angle,
                                     phase=phase, visibility=vis, signal=s, background=b)
    counts = rng.poisson(rate * n_frames)
    ev = _events_from_counts(counts, n_frames, rng)
    regions = [(0, 0, 80, 6), (0, 74, 80, 6)]
    r = analyze_events(ev, roi=roi, background_regions=regions, build_up_points=0)
    assert r.ok, r.error
    t = np.deg2rad(r.orientation_deg)
    mtf = np.sinc(np.cos(t) / r.period_px) * np.sinc(np.sin(t) / r.period_px)
    assert abs(r.period_px - period) < 3.5 * r.period_px_err
    assert abs(r.orientation_deg - angle) < 3.5 * r.orientation_deg_err + 1e-9
    assert abs(_wrap(r.phase_rad - phase)) < 3.5 * r.phase_rad_err
    # Pixel-centre sampling: the raw modulation is V itself (no pixel averaging here).
    assert abs(r.visibility_raw - vis) < 3.5 * r.visibility_raw_err
    assert r.visibility == pytest.approx(r.visibility_raw / mtf)
    assert abs(r.background_rate - b) < 3.5 * r.background_rate_err
    assert r.background_source == "outside"
    assert r.significance > 10
    json.dumps(r.to_dict(), allow_nan=False)


def test_photon_stack_estimates_within_errors_and_dark_background():
    # End to end on the physics generator: events detected, background from a dark stack,
    # fit within the uncertainties; without background data the visibility is diluted by
    # s / (s + b) (references sec. 13: V_obs = V B / (B + D)).
    rng = np.random.default_rng(21)
    kw = {"period_px": 8.0, "orientation_deg": 30.0, "visibility": 0.8, "phase_rad": 0.5,
          "background_per_px": 4e-4, "read_noise_e": 0.02, "cosmic_rays_per_frame": 0.05}
    st, truth = photon_stack(900, (64, 64), photons_per_frame=2.0, rng=rng, **kw)
    dark, _ = photon_stack(300, (64, 64), photons_per_frame=0.0, rng=rng, **kw)
    st_before = st.copy()
    ref = dark_reference(dark)
    r = analyze_photons(st, dark=ref, build_up_points=10)
    np.testing.assert_array_equal(st, st_before)
    assert r.ok, r.error
    assert r.background_source == "dark"
    assert abs(r.period_px - 8.0) < 3.5 * r.period_px_err
    assert abs(r.orientation_deg - 30.0) < 3.5 * r.orientation_deg_err
    assert abs(_wrap(r.phase_rad - 0.5)) < 3.5 * r.phase_rad_err
    # Centroids remove the spot blur; the pixel transfer is divided out.
    assert abs(r.visibility - 0.8) < 3.5 * r.visibility_err + 0.01
    # Background events and photons are detected with the same efficiency (~0.7).
    s_true, dark_rate_true = 2.0 / 64**2, 4e-4
    eff_b, eff_b_err = r.background_rate / dark_rate_true, r.background_rate_err / dark_rate_true
    eff_s, eff_s_err = r.signal_rate / s_true, r.signal_rate_err / s_true
    assert 0.5 < eff_b < 0.9
    assert abs(eff_s - eff_b) < 3.5 * math.hypot(eff_b_err, eff_s_err)
    assert r.events_rejected >= 20
    # Build-up table: photons grow, errors shrink about as 1/sqrt(photons).
    bu = r.build_up
    assert 8 <= len(bu) <= 10
    ph = [row["photons"] for row in bu]
    assert ph == sorted(ph) and ph[-1] == r.photons
    scaled = np.array([row["visibility_err"] * math.sqrt(row["photons"]) for row in bu[3:]])
    assert np.ptp(scaled) / scaled.mean() < 0.5
    assert bu[-1]["significance"] > bu[0]["significance"]
    assert json.loads(json_line(r))["build_up"][-1]["photons"] == r.photons
    # No background information: background taken as 0, visibility diluted.
    r0 = analyze_photons(st, build_up_points=0)
    assert r0.background_source == "none"
    assert any("background" in w for w in r0.warnings)
    dil = r.signal_rate / (r.signal_rate + r.background_rate)
    assert r0.visibility == pytest.approx(r.visibility * dil, abs=3 * r0.visibility_err)


def test_fixed_frequency_and_errors_reported():
    rng = np.random.default_rng(13)
    counts = rng.poisson(_pattern_rate((48, 48), period=7.0, orientation_deg=60.0, phase=0.2,
                                       visibility=0.5, signal=0.003, background=0.0) * 800)
    ev = _events_from_counts(counts, 800, rng)
    r = analyze_events(ev, period_px=7.0, orientation_deg=60.0, fix_frequency=True,
                       background_rate=0.0, build_up_points=4)
    assert r.ok
    assert r.period_px == 7.0 and r.period_px_err == 0.0 and r.orientation_deg_err == 0.0
    assert r.trials_factor == 1.0 and r.lr_dof == 2
    assert r.significance == pytest.approx(r.significance_local)
    assert abs(_wrap(r.phase_rad - 0.2)) < 3.5 * r.phase_rad_err
    with pytest.raises(FringeError):
        analyze_events(ev, period_px=7.0, fix_frequency=True)


def test_no_events_fails_cleanly():
    ev = detect_stack(np.full((3, 32, 32), 100, dtype=np.uint16))
    assert ev.n_events == 0
    r = analyze_events(ev)
    assert not r.ok and "photon events" in r.error


# ---------------------------------------------------------------- counts-versus-position


def _write_table(path, pos, counts, exposure=None):
    with open(path, "w", encoding="utf-8") as fh:
        fh.write("# scan of a fringe pattern\n")
        fh.write("position,counts" + (",exposure_s" if exposure is not None else "") + "\n")
        for i, (p, c) in enumerate(zip(pos, counts, strict=True)):
            extra = f",{exposure[i]:.4f}" if exposure is not None else ""
            fh.write(f"{p:.5f},{int(c)}{extra}\n")


def test_counts_table_fit(tmp_path):
    # Scanning single-pixel detector: counts ~ Poisson(t_j (b + s (1 + V cos(2 pi x/P + phi))))
    # with exposures t_j; Poisson ML [Cash] in position units.
    rng = np.random.default_rng(17)
    pos = np.linspace(-1.2, 2.0, 161)  # mm
    exposure = rng.uniform(0.5, 2.0, pos.size)
    centre = 0.5 * (pos.min() + pos.max())
    rate = 30.0 * (1 + 0.6 * np.cos(2 * np.pi * (pos - centre) / 0.45 - 1.0))
    counts = rng.poisson(rate * exposure)
    path = tmp_path / "scan.csv"
    _write_table(path, pos, counts, exposure)
    p, c, e = read_counts_table(path)
    assert p.size == 161 and np.allclose(e, np.round(exposure, 4))
    r = analyze_counts_table(path, background_rate=0.0, units="mm")
    assert r.ok, r.error
    assert r.period_units == "mm" and r.period_px == r.to_dict()["period_px"]
    assert abs(r.period_px - 0.45) < 3.5 * r.period_px_err
    assert abs(_wrap(r.phase_rad + 1.0)) < 3.5 * r.phase_rad_err
    assert abs(r.visibility - 0.6) < 3.5 * r.visibility_err
    assert r.photons == int(counts.sum())
    assert r.significance > 10
    json.dumps(r.to_dict(), allow_nan=False)
    # Rates are per unit exposure: 30 counts/s on average.
    assert abs(r.signal_rate - 30.0) < 3.5 * r.signal_rate_err
    # For many counts the Poisson deviance follows chi-square with bins - parameters dof
    # [Cash] (s.d. sqrt(2 * 157) = 18 here).
    assert abs(r.deviance - (161 - 4)) < 4 * math.sqrt(2 * 157)
    # Ignoring the exposures: rates per row, and a model that no longer fits.
    _write_table(tmp_path / "noexp.csv", pos, counts)
    r2 = analyze_counts_table(tmp_path / "noexp.csv", background_rate=0.0)
    assert r2.signal_rate == pytest.approx(30.0 * exposure.mean(), rel=0.1)
    assert r2.deviance > 161 + 10 * math.sqrt(2 * 157)


def test_counts_table_errors(tmp_path):
    bad = tmp_path / "bad.csv"
    bad.write_text("x,counts\n1,2\n")
    with pytest.raises(FringeError, match="bad.csv: no 'position' column"):
        read_counts_table(bad)
    neg = tmp_path / "neg.csv"
    neg.write_text("position,counts\n" + "".join(f"{i},{3 - i}\n" for i in range(6)))
    with pytest.raises(FringeError, match="neg.csv: row 6: counts must be non-negative"):
        read_counts_table(neg)
    with pytest.raises(FringeError, match="cannot read"):
        read_counts_table(tmp_path / "missing.csv")


# ----------------------------------------------------------------------------- purity


def test_inputs_not_mutated():
    rng = np.random.default_rng(0)
    u = np.arange(64.0) - 31.5
    k = rng.poisson(5 * (1 + 0.5 * np.cos(u))).astype(float)
    e = np.ones(64)
    u0, k0, e0 = u.copy(), k.copy(), e.copy()
    fit_poisson_profile(u, k, e, period=2 * np.pi, background=0.0)
    np.testing.assert_array_equal(u, u0)
    np.testing.assert_array_equal(k, k0)
    np.testing.assert_array_equal(e, e0)
    frame = rng.normal(100, 2, (32, 32))
    f0 = frame.copy()
    detect_frame(frame, noise_dn=2.0)
    np.testing.assert_array_equal(frame, f0)


# -------------------------------------------------------------------------------- CLI


def _cli(argv):
    p = argparse.ArgumentParser()
    sub = p.add_subparsers(dest="command")
    photons.add_parser(sub)
    args = p.parse_args(["photons", *argv])
    out, err = io.StringIO(), io.StringIO()
    rc = photons.run(args, out, err)
    return rc, out.getvalue(), err.getvalue()


def test_cli_json_text_and_errors(tmp_path):
    rng = np.random.default_rng(31)
    kw = {"period_px": 7.0, "orientation_deg": 100.0, "visibility": 0.9, "phase_rad": -1.0,
          "background_per_px": 3e-4, "read_noise_e": 0.02, "cosmic_rays_per_frame": 0.05}
    st, _ = photon_stack(300, (48, 48), photons_per_frame=2.0, rng=rng, **kw)
    dk, _ = photon_stack(100, (48, 48), photons_per_frame=0.0, rng=rng, **kw)
    tifffile.imwrite(tmp_path / "run.tif", st)
    tifffile.imwrite(tmp_path / "dark.tif", dk)
    pos = np.arange(80.0)
    _write_table(tmp_path / "scan.csv", pos,
                 rng.poisson(20 * (1 + 0.7 * np.cos(2 * np.pi * pos / 9.0))))
    rc, out, err = _cli([str(tmp_path / "run.tif"), str(tmp_path / "missing.tif"),
                         str(tmp_path / "scan.csv"), "--dark", str(tmp_path / "dark.tif"),
                         "--format", "json", "--build-up", "5", "--precision", "0.05"])
    assert rc == 1
    lines = [json.loads(x) for x in out.splitlines()]
    assert len(lines) == 3
    good = lines[0]
    for key in ("period_px", "phase_rad", "visibility", "orientation_deg"):
        assert good[key] is not None and good[key + "_err"] is not None
    for key in ("photons", "background_rate", "significance", "build_up", "snr",
                "saturated_fraction", "photons_needed"):
        assert key in good
    assert good["background_source"] == "dark" and len(good["build_up"]) == 5
    assert good["precision"] == 0.05
    assert lines[1]["status"] == "error"
    assert lines[2]["status"] == "ok" and lines[2]["period_units"] == "position"
    assert abs(lines[2]["period_px"] - 9.0) < 4 * lines[2]["period_px_err"]
    assert err.count("\n") == 1 and "missing.tif" in err and "Traceback" not in err
    rc, out, err = _cli([str(tmp_path / "run.tif"), "--dark", str(tmp_path / "dark.tif"),
                         "--roi", "4", "4", "40", "40", "--pixel-um", "5.0"])
    assert rc == 0, err
    assert "build-up" in out and "photons needed" in out and "significance" in out
    # Bad option values are usage errors (argparse exits with status 2).
    with pytest.raises(SystemExit) as exc:
        _cli([str(tmp_path / "run.tif"), "--box", "4"])
    assert exc.value.code == 2


def test_fast_labelling_matches_scipy_ndimage():
    # The 8-connected labelling used for event clusters gives the same partition as the
    # general-purpose reference, scipy.ndimage.label with a 3 x 3 structuring element.
    from scipy import ndimage

    from fringe.photons import _box_sum, _label8

    rng = np.random.default_rng(11)
    for _ in range(40):
        m = rng.random((40, 61)) < rng.uniform(0.005, 0.4)
        lab, n = _label8(m)
        ref, n_ref = ndimage.label(m, structure=np.ones((3, 3), bool))
        assert n == n_ref
        assert len(set(zip(lab[m].tolist(), ref[m].tolist(), strict=True))) == n
    d = rng.normal(0, 1, (30, 45)).astype(np.float32)
    padded = np.pad(d, 1)
    ref_sum = sum(padded[i:i + 30, j:j + 45] for i in range(3) for j in range(3))
    np.testing.assert_allclose(_box_sum(d, 3), ref_sum, atol=1e-5)
