"""Tests for fringe.calibrate: masters, corrections, masks, outliers, noise model, EMVA 1288."""

from __future__ import annotations

import math

import numpy as np
import pytest
import tifffile

from fringe import calibrate as cal
from fringe import io
from fringe._util import FringeError

# --------------------------------------------------------------------------------------------
# combining frames
# --------------------------------------------------------------------------------------------


def test_median_master_hand_worked():
    # per-pixel values 1, 2, 3, 4, 100: median 3; |deviations| 2, 1, 0, 1, 97 -> MAD 1;
    # error = sqrt(pi/2) * 1.4826 * 1 / sqrt(5) = 1.25331 * 0.663040 = 0.830996
    stack = np.array([1.0, 2.0, 3.0, 4.0, 100.0])[:, None, None] * np.ones((5, 2, 3))
    master, err = cal.combine(stack)
    np.testing.assert_allclose(master, 3.0)
    np.testing.assert_allclose(err, 0.830996, rtol=1e-5)
    # even count: 1, 2, 3, 10 -> median 2.5; |dev| 1.5, 0.5, 0.5, 7.5 -> MAD 1.0;
    # error = 1.25331 * 1.4826 / 2 = 0.929082
    even = np.array([1.0, 2.0, 3.0, 10.0])[:, None, None] * np.ones((4, 2, 2))
    master, err = cal.combine(even)
    np.testing.assert_allclose(master, 2.5)
    np.testing.assert_allclose(err, 0.929082, rtol=1e-5)


def test_median_error_matches_scatter_of_the_master():
    # The standard error of the median of N normal values tends to sqrt(pi/2) sigma / sqrt(N)
    # (H. Cramer, Mathematical Methods of Statistics, 1946, ch. 28; value from memory). With
    # N = 25 the predicted error must match the scatter of the master over many pixels to a
    # few per cent (the factor alone changes it by 25 %).
    rng = np.random.default_rng(11)
    stack = rng.normal(50.0, 2.0, (25, 64, 64))
    master, err = cal.combine(stack)
    ratio = master.std() / err.mean()
    assert 0.93 < ratio < 1.08


def test_sigma_clip_drops_an_injected_outlier():
    values = np.array([10.1, 9.8, 10.0, 10.2, 9.9, 50.0])
    stack = values[:, None, None] * np.ones((6, 3, 3))
    master, err = cal.combine(stack, method="sigma_clip")
    # the five kept values: mean 10.0, std (ddof 1) 0.158114 -> error 0.0707107
    np.testing.assert_allclose(master, 10.0, atol=1e-12)
    np.testing.assert_allclose(err, 0.158114 / math.sqrt(5), rtol=1e-5)
    assert abs(values.mean() - 10.0) > 6  # the plain mean would be far off


def test_sigma_clip_on_noise_keeps_nearly_everything():
    rng = np.random.default_rng(12)
    stack = rng.normal(0.0, 1.0, (10, 64, 64))
    master, err = cal.combine(stack, method="sigma_clip")
    # mean of 10 normal values has s.d. 1/sqrt(10) = 0.316; clipping at 3 sigma barely
    # changes that (common practice)
    assert 0.29 < master.std() < 0.35
    assert 0.27 < err.mean() < 0.34


def test_single_frame_master_has_zero_error():
    frame = np.arange(12.0).reshape(1, 3, 4)
    for method in ("median", "sigma_clip"):
        master, err = cal.combine(frame, method=method)
        np.testing.assert_array_equal(master, frame[0])
        np.testing.assert_array_equal(err, 0.0)


def test_combine_ignores_nonfinite_values_quietly():
    stack = np.array([1.0, 2.0, np.nan, 4.0, 5.0])[:, None, None] * np.ones((5, 2, 2))
    stack[:, 0, 0] = np.nan  # a pixel with no data at all
    master, err = cal.combine(stack)
    assert np.isnan(master[0, 0])
    np.testing.assert_allclose(master[1, 1], 3.0)  # median of 1, 2, 4, 5


def test_combine_refuses_bad_input():
    with pytest.raises(FringeError, match=r"expected a stack of shape \(N, H, W\)"):
        cal.combine(np.zeros((4, 4)))
    with pytest.raises(FringeError, match="unknown method 'mean'"):
        cal.combine(np.zeros((2, 4, 4)), method="mean")


# --------------------------------------------------------------------------------------------
# dark and flat
# --------------------------------------------------------------------------------------------


def test_flat_field_worked_example():
    # Dark and flat correction (common practice): (R - D) / (F - D) * mean(F - D); with
    # R = 1200, D = 100, F = 2100 and mean(F - D) = 1800 it gives 1100 / 2000 * 1800 = 990.000.
    dark_frames = np.full((3, 2, 2), 100.0)
    flat_minus_dark = np.array([[2000.0, 1600.0], [1800.0, 1800.0]])  # mean 1800
    flat_frames = np.stack([flat_minus_dark + 100.0] * 4)
    dark, dark_err = cal.master_dark(dark_frames)
    flat, flat_err, flat_bad = cal.master_flat(flat_frames, dark=dark)
    assert not flat_bad.any()
    raw = np.full((2, 2), 1200.0)
    out = cal.flat_correct(cal.subtract_dark(raw, dark), flat, flat_bad=flat_bad)
    assert out[0, 0] == pytest.approx(990.000, abs=1e-9)
    np.testing.assert_allclose(out, 1100.0 * 1800.0 / flat_minus_dark)


def test_master_flat_marks_dark_pixels_and_never_divides_by_them():
    frames = np.ones((3, 4, 4)) * 1000.0
    frames[:, 1, 2] = 10.0  # 1 % of the mean: below min_level 0.05
    frames[:, 3, 3] = np.nan
    flat, flat_err, flat_bad = cal.master_flat(frames)
    assert flat_bad[1, 2] and flat_bad[3, 3] and flat_bad.sum() == 2
    assert flat[1, 2] == 1.0 and flat[3, 3] == 1.0
    good = ~flat_bad
    assert flat[good].mean() == pytest.approx(1.0)
    image = np.full((4, 4), 500.0)
    out = cal.flat_correct(image, flat, flat_bad=flat_bad)
    assert out[1, 2] == 500.0  # left as is


def test_master_flat_refuses_non_positive_level():
    with pytest.raises(FringeError, match="not positive"):
        cal.master_flat(np.full((2, 3, 3), 100.0), dark=np.full((3, 3), 150.0))


def test_subtract_dark_shape_message():
    expected = r"^dark\.tif: shape \(480, 640\) does not match image shape \(512, 512\)$"
    with pytest.raises(FringeError, match=expected):
        cal.subtract_dark(np.zeros((512, 512)), np.zeros((480, 640)), dark_name="dark.tif")


def test_saturation_mask_at_full_scale():
    raw = np.array([4095, 4075, 4074, 0, 2000])
    # margin 0.5 % of 4095: threshold 4074.525
    assert cal.saturation_mask(raw, 4095).tolist() == [True, True, False, False, False]
    assert cal.saturation_mask(raw, 4095, margin=0.0).tolist() == [True] + [False] * 4
    assert not cal.saturation_mask(raw, None).any()
    assert not cal.saturation_mask(raw.astype(float), float("inf")).any()


def test_hot_pixel_found():
    rng = np.random.default_rng(13)
    dark = rng.normal(100.0, 2.0, (64, 64))
    dark[10, 20] += 50.0  # 25 sigma
    bad = cal.bad_pixel_map(dark=dark)
    assert bad[10, 20] and bad.sum() == 1


def test_dead_and_abnormal_flat_pixels_found():
    rng = np.random.default_rng(14)
    flat = 1.0 + rng.normal(0.0, 0.01, (64, 64))
    flat[5, 5] = 0.3  # dead: below half the median
    flat[6, 7] = 1.2  # abnormal: 20 sigma
    bad = cal.bad_pixel_map(flat=flat)
    assert bad[5, 5] and bad[6, 7] and bad.sum() == 2
    with pytest.raises(FringeError, match="give a dark, a flat or both"):
        cal.bad_pixel_map()


# --------------------------------------------------------------------------------------------
# outliers
# --------------------------------------------------------------------------------------------


def _fringe_image(rng, shape=(64, 64), period=16.0, amp=50.0, base=100.0, noise=2.0):
    x = np.arange(shape[1])[None, :]
    truth = base + amp * np.cos(2 * np.pi * x / period) * np.ones(shape)
    return truth, truth + rng.normal(0.0, noise, shape)


def test_cosmic_ray_removed_in_single_frame():
    rng = np.random.default_rng(15)
    truth, img = _fringe_image(rng)
    hit = img.copy()
    hit[20, 30] += 300.0
    hit[40, 10] += 200.0  # a two-pixel track
    hit[40, 11] += 200.0
    clean, mask = cal.reject_outliers_frame(hit)
    assert set(zip(*np.nonzero(mask), strict=True)) == {(20, 30), (40, 10), (40, 11)}
    for r, c in [(20, 30), (40, 10), (40, 11)]:
        assert abs(clean[r, c] - truth[r, c]) < 10.0
    np.testing.assert_array_equal(clean[~mask], hit[~mask])


@pytest.mark.parametrize("angle_deg", [0.0, 30.0, 45.0, 90.0])
def test_single_frame_rejection_leaves_fringe_crests_alone(angle_deg):
    # short-period fringes lose A(1 - cos(2 pi / P)) = 0.5 A at their crests under a 3 x 3
    # median; they must not be taken for hits
    rng = np.random.default_rng(16)
    yy, xx = np.mgrid[0:96, 0:96]
    t = np.deg2rad(angle_deg)
    img = 100 + 40 * np.cos(2 * np.pi * (xx * np.cos(t) + yy * np.sin(t)) / 6.0)
    img = img + rng.normal(0.0, 1.0, img.shape)
    img[50, 50] += 60.0  # a hit is still found among them
    clean, mask = cal.reject_outliers_frame(img)
    assert mask[50, 50] and mask.sum() == 1


def test_single_frame_rejection_quiet_on_pure_noise():
    rng = np.random.default_rng(23)
    img = rng.normal(1000.0, 30.0, (256, 256))
    _, mask = cal.reject_outliers_frame(img)
    assert not mask.any()


def test_cosmic_ray_removed_across_a_stack():
    rng = np.random.default_rng(17)
    stack = rng.normal(100.0, 3.0, (7, 32, 32))
    stack[3, 4, 5] += 200.0
    clean, mask = cal.reject_outliers_stack(stack)
    assert mask[3, 4, 5] and mask.sum() == 1
    assert clean[3, 4, 5] == pytest.approx(np.median(stack[:, 4, 5]))
    np.testing.assert_array_equal(clean[~mask], stack[~mask])


def test_stack_rejection_has_few_false_alarms_with_few_frames():
    # With only 5 frames the per-pixel MAD is often tiny by chance; the pooled scale keeps
    # false alarms at 5 sigma rare (the normal two-sided tail beyond 5 sigma is 5.7e-7,
    # 2 * scipy.stats.norm.sf(5); with a per-pixel MAD the rate is about 3e-2).
    rng = np.random.default_rng(18)
    stack = rng.normal(100.0, 3.0, (5, 128, 128))
    _, mask = cal.reject_outliers_stack(stack)
    assert mask.mean() < 2e-4


# --------------------------------------------------------------------------------------------
# noise model and photon transfer
# --------------------------------------------------------------------------------------------


def test_noise_variance_hand_values():
    # shot + read: 1000 DN / 2 e-/DN + 3^2 = 509 DN^2; negative signal: read noise only
    var = cal.noise_variance(np.array([1000.0, -50.0]), gain_e_per_dn=2.0, read_noise_dn=3.0)
    np.testing.assert_allclose(var, [509.0, 9.0])
    var = cal.noise_variance(1000.0, gain_e_per_dn=2.0, read_noise_dn=3.0, dark_var=4.0)
    assert float(var) == 513.0
    with pytest.raises(FringeError, match="gain must be a positive"):
        cal.noise_variance(1.0, gain_e_per_dn=0.0, read_noise_dn=1.0)


def _emva_pair(rng, mu_e, *, k=0.5, read_e=5.0, offset=100.0, dsnu, prnu, full_scale=4095):
    """Two frames of the EMVA 1288 linear camera model, quantised to integers."""
    frames = []
    for _ in range(2):
        electrons = rng.poisson(mu_e * prnu) if mu_e > 0 else np.zeros(prnu.shape)
        y = offset + dsnu + k * (electrons + rng.normal(0.0, read_e, prnu.shape))
        frames.append(np.clip(np.round(y), 0, full_scale))
    return frames[0], frames[1]


@pytest.fixture(scope="module")
def emva_data():
    rng = np.random.default_rng(2021)
    shape = (256, 256)
    dsnu = rng.normal(0.0, 2.0, shape)  # DSNU 2 DN: fixed pattern, cancels in pair differences
    prnu = 1.0 + rng.normal(0.0, 0.01, shape)  # PRNU 1 %
    levels = [200, 500, 1000, 2000, 3000, 4000, 5000, 6500, 9000]  # electrons
    pairs = [_emva_pair(rng, m, dsnu=dsnu, prnu=prnu) for m in levels]
    dark = _emva_pair(rng, 0, dsnu=dsnu, prnu=prnu)
    return levels, pairs, dark


def test_photon_transfer_recovers_gain_and_read_noise(emva_data):
    # EMVA 1288 (European Machine Vision Association, Standard for Characterization of Image
    # Sensors and Cameras, Release 4.0 Linear, 2021), photon-transfer method on its linear
    # camera model: K = 0.5 DN/e-, read noise 5 e-, offset 100 DN, 12-bit, 256 x 256 px.
    # Required: K within 2 %, read noise within 5 %.
    levels, pairs, dark = emva_data
    pt = cal.photon_transfer(pairs, dark, full_scale=4095)
    assert pt.k_dn_per_e == pytest.approx(0.5, rel=0.02)
    assert pt.gain_e_per_dn == pytest.approx(2.0, rel=0.02)
    assert pt.read_noise_e == pytest.approx(5.0, rel=0.05)
    # sigma_d in DN = K * 5 e- = 2.5 DN once the 1/12 DN^2 quantisation term of the EMVA
    # model, sigma_y^2 = K^2 (sigma_d^2 + mu_e) + 1/12 (EMVA 1288 R4.0; from memory)
    assert pt.read_noise_dn == pytest.approx(2.5, rel=0.05)
    assert pt.dark_level_dn == pytest.approx(100.0, abs=0.1)
    assert 0 < pt.k_dn_per_e_err < 0.005
    assert abs(pt.k_dn_per_e - 0.5) < 4 * pt.k_dn_per_e_err
    assert 0 < pt.read_noise_e_err < 0.25
    # the clipped level lies beyond saturation and the top levels beyond 70 % of it
    assert pt.saturation_dn is not None and pt.saturation_dn <= 4095
    assert any("left out of the fit" in w for w in pt.warnings)


def test_photon_transfer_point_matches_the_analytic_model(emva_data):
    # EMVA 1288 Release 4.0 (2021) linear model: at 2000 e-, mean above dark K * 2000 =
    # 1000 DN and temporal variance above dark K^2 * 2000 = 500 DN^2.
    levels, pairs, dark = emva_data
    pt = cal.photon_transfer(pairs, dark, full_scale=4095)
    x, y = pt.points[levels.index(2000)]
    assert x == pytest.approx(1000.0, rel=0.005)
    assert y == pytest.approx(500.0, rel=0.02)
    d = pt.to_dict()
    assert d["k_dn_per_e"] == pt.k_dn_per_e and len(d["points"]) == len(levels)
    assert d["saturation_dn"] == pt.saturation_dn


def test_photon_transfer_without_full_scale_finds_the_variance_peak(emva_data):
    levels, pairs, dark = emva_data
    pt = cal.photon_transfer(pairs, dark)
    assert pt.saturation_dn is not None and pt.saturation_dn < 4095
    assert pt.k_dn_per_e == pytest.approx(0.5, rel=0.02)
    # saturation onset at the variance peak: the 6500 e- level, 100 + 0.5 * 6500 DN
    assert pt.saturation_dn == pytest.approx(3350.0, rel=0.01)


def test_photon_transfer_needs_two_levels(emva_data):
    _, pairs, dark = emva_data
    with pytest.raises(FringeError, match="2 or more illumination levels, got 1"):
        cal.photon_transfer(pairs[:1], dark)
    with pytest.raises(FringeError, match="below 70 % of saturation, got 1"):
        cal.photon_transfer([pairs[0], pairs[-1]], dark, full_scale=4095)


def test_calibrated_variance_matches_measured_noise():
    # The propagated variance (shot + read + quantisation, divided by flat^2) must match the
    # temporal variance of two calibrated frames (EMVA 1288 Release 4.0 (2021) linear model).
    rng = np.random.default_rng(19)
    shape = (128, 128)
    flat = 1.0 + 0.05 * rng.normal(size=shape)
    dark = np.full(shape, 100.0)
    frames = []
    for _ in range(2):
        electrons = rng.poisson(1500.0 * flat)
        raw = np.round(100.0 + 0.5 * (electrons + rng.normal(0.0, 5.0, shape)))
        frames.append(io.frame_from_array(raw.astype(np.uint16)))
    cs = cal.CalibrationSet(dark=dark, dark_err=np.zeros(shape), flat=flat,
                            flat_err=np.zeros(shape), flat_bad=np.zeros(shape, bool),
                            gain_e_per_dn=2.0, read_noise_dn=2.5, bit_depth=16)
    a, b = (cal.calibrate_frame(f, cs) for f in frames)
    measured = np.var(a.data - b.data) / 2
    assert a.variance.mean() == pytest.approx(measured, rel=0.03)
    # shot noise after flat division is (750 F) / F^2 DN^2: pixels with a low flat carry
    # more variance than pixels with a high one
    hi, lo = flat > 1.05, flat < 0.95
    assert a.variance[lo].mean() > a.variance[hi].mean()


# --------------------------------------------------------------------------------------------
# building and applying a calibration set
# --------------------------------------------------------------------------------------------


@pytest.fixture()
def cal_files(tmp_path):
    rng = np.random.default_rng(20)
    shape = (16, 20)
    darks = np.round(rng.normal(100.0, 2.0, (5,) + shape)).astype(np.uint16)
    darks[:, 3, 4] += 400  # hot pixel
    flats = np.round(rng.normal(2000.0, 10.0, (4,) + shape)).astype(np.uint16)
    flats[:, 7, 8] = 150  # dead pixel: near the dark level
    tifffile.imwrite(tmp_path / "dark_a.tif", darks[:3], photometric="minisblack")
    tifffile.imwrite(tmp_path / "dark_b.tif", darks[3])
    tifffile.imwrite(tmp_path / "dark_c.tif", darks[4])
    tifffile.imwrite(tmp_path / "flat.tif", flats, photometric="minisblack")
    darks_f = [str(tmp_path / n) for n in ("dark_a.tif", "dark_b.tif", "dark_c.tif")]
    return darks_f, [str(tmp_path / "flat.tif")], darks, flats


def test_build_calibration_from_files(cal_files):
    dark_files, flat_files, darks, flats = cal_files
    cs = cal.build_calibration(dark_files, flat_files, gain_e_per_dn=2.0, read_noise_dn=1.5)
    assert cs.n_dark_frames == 5 and cs.n_flat_frames == 4 and cs.bit_depth == 16
    np.testing.assert_array_equal(cs.dark, np.median(darks.astype(float), axis=0))
    fd = np.median(flats.astype(float), axis=0) - cs.dark
    assert cs.flat_bad[7, 8] and cs.flat[7, 8] == 1.0
    good = ~cs.flat_bad
    np.testing.assert_allclose(cs.flat[good], fd[good] / fd[good].mean())
    assert cs.bad_pixels[3, 4] and cs.bad_pixels[7, 8]
    assert cs.dark_files == dark_files and cs.flat_files == flat_files


def test_calibrate_frame_end_to_end(cal_files, tmp_path):
    dark_files, flat_files, darks, flats = cal_files
    cs = cal.build_calibration(dark_files, flat_files, gain_e_per_dn=2.0, read_noise_dn=1.5)
    raw = np.full((16, 20), 1200, np.uint16)
    raw[0, 0] = 65535  # saturated
    path = tmp_path / "image.tif"
    tifffile.imwrite(path, raw)
    frame = io.read_frame(path)
    keep = frame.data.copy()
    out = cal.calibrate_frame(frame, cs)
    # (R - D) / (F - D) * mean(F - D) over good pixels (common practice)
    fd = np.median(flats.astype(float), axis=0) - cs.dark
    good = ~cs.flat_bad
    expected = (raw - cs.dark) / fd * fd[good].mean()
    np.testing.assert_allclose(out.data[good], expected[good])
    assert out.mask[0, 0] and out.mask[3, 4] and out.mask[7, 8]
    assert out.saturated_fraction == pytest.approx(1 / raw.size)
    steps = [name for name, _ in out.provenance]
    assert steps[:3] == ["input", "saturation", "dark"]
    assert {"flat", "bad_pixels", "noise_model"} <= set(steps)
    assert dict(out.provenance)["dark"] == {"frames": 5, "method": "median",
                                            "files": dark_files}
    assert out.variance is not None and np.all(out.variance[good] > 0)
    np.testing.assert_array_equal(frame.data, keep)  # the input frame is untouched
    assert out.data is not frame.data


def test_calibrate_plain_array_without_calibration():
    img = np.array([[1.0, np.nan], [3.0, 4.0]])
    keep = img.copy()
    out = cal.calibrate_frame(img)
    assert out.variance is None
    assert out.mask.tolist() == [[False, True], [False, False]]
    assert any("non-finite" in w for w in out.warnings)
    np.testing.assert_array_equal(img, keep)
    assert out.data is not img


def test_calibrate_frame_with_cosmic_rejection():
    rng = np.random.default_rng(21)
    _, img = _fringe_image(rng)
    img[30, 30] += 400.0
    out = cal.calibrate_frame(img, reject_cosmics=True)
    assert out.mask[30, 30] and out.mask.sum() == 1
    assert ("cosmics", {"replaced": 1, "sigma": 6.0, "size": 3}) in out.provenance


def test_shape_and_bit_depth_mismatch(cal_files, tmp_path):
    dark_files, flat_files, _, _ = cal_files
    cs = cal.build_calibration(dark_files, flat_files)
    wrong = io.frame_from_array(np.zeros((12, 20), np.uint16), name="small.tif")
    with pytest.raises(
        FringeError,
        match=r"dark_a\.tif: shape \(16, 20\) does not match image shape \(12, 20\) of small\.tif",
    ):
        cal.calibrate_frame(wrong, cs)
    eight = io.frame_from_array(np.zeros((16, 20), np.uint8), name="phone.png")
    with pytest.raises(
        FringeError, match=r"dark_a\.tif: bit depth 16 does not match image bit depth 8"
    ):
        cal.calibrate_frame(eight, cs)
    # darks of differing shapes, and flats of another bit depth, are refused when building
    tifffile.imwrite(tmp_path / "odd.tif", np.zeros((16, 21), np.uint16))
    with pytest.raises(FringeError, match=r"odd\.tif: frame 0 has shape \(16, 21\)"):
        cal.build_calibration([*dark_files, str(tmp_path / "odd.tif")])
    tifffile.imwrite(tmp_path / "flat8.tif", np.full((16, 20), 200, np.uint8))
    with pytest.raises(FringeError, match=r"flat8\.tif: bit depth 8 does not match bit depth 16"):
        cal.build_calibration(dark_files, [str(tmp_path / "flat8.tif")])
    tifffile.imwrite(tmp_path / "flatwide.tif", np.full((16, 22), 200, np.uint16))
    with pytest.raises(FringeError, match=r"flatwide\.tif: shape \(16, 22\) does not match dark"):
        cal.build_calibration(dark_files, [str(tmp_path / "flatwide.tif")])


# --------------------------------------------------------------------------------------------
# inputs are never modified
# --------------------------------------------------------------------------------------------


def test_functions_do_not_modify_inputs():
    rng = np.random.default_rng(22)
    stack = rng.normal(100.0, 3.0, (5, 8, 9))
    stack[2, 3, 3] = 1e4
    image = rng.normal(500.0, 5.0, (8, 9))
    image[4, 4] = 1e4
    dark = rng.normal(100.0, 1.0, (8, 9))
    flat = 1.0 + 0.01 * rng.normal(size=(8, 9))
    bad = np.zeros((8, 9), bool)
    copies = [a.copy() for a in (stack, image, dark, flat, bad)]

    outputs = [
        *cal.combine(stack),
        *cal.combine(stack, method="sigma_clip"),
        cal.master_dark(stack)[0],
        *cal.master_flat(stack + 1000, dark=dark),
        cal.subtract_dark(image, dark),
        cal.flat_correct(image, flat, flat_bad=bad),
        cal.saturation_mask(image, 1000.0),
        cal.bad_pixel_map(dark=dark, flat=flat),
        *cal.reject_outliers_stack(stack),
        *cal.reject_outliers_frame(image),
        cal.noise_variance(image, gain_e_per_dn=2.0, read_noise_dn=1.0),
        cal.calibrate_frame(image, cal.CalibrationSet(dark=dark, flat=flat, flat_bad=bad)).data,
    ]
    for original, copy in zip((stack, image, dark, flat, bad), copies, strict=True):
        np.testing.assert_array_equal(original, copy)
        assert all(out is not original for out in outputs)
        assert not any(np.shares_memory(out, original) for out in outputs)


def test_extra_saturation_mask_is_combined():
    img = np.full((4, 5), 10.0)
    extra = np.zeros((4, 5), bool)
    extra[1, 1] = True
    out = cal.calibrate_frame(img, saturated=extra)
    assert out.mask[1, 1] and out.mask.sum() == 1
    assert out.saturated_fraction == pytest.approx(1 / 20)
    with pytest.raises(FringeError, match=r"saturation mask: shape \(2, 2\) does not match"):
        cal.calibrate_frame(img, saturated=np.zeros((2, 2), bool))
