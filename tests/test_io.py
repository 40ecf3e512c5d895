"""Tests for fringe.io: formats, dtypes, colour handling, sRGB decoding and refused inputs."""

from __future__ import annotations

import hashlib
import struct
from pathlib import Path

import cv2
import numpy as np
import pytest
import tifffile
from hypothesis import given, settings
from hypothesis import strategies as st

from fringe import io
from fringe._util import FringeError

# --------------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------------


def sha256(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def fringes(h: int = 48, w: int = 64, period: float = 8.0, phase: float = 0.3) -> np.ndarray:
    """cos fringes along x, values in [-1, 1]."""
    x = np.arange(w)[None, :]
    return np.broadcast_to(np.cos(2 * np.pi * x / period + phase), (h, w)).copy()


def minimal_tiff(width: int, height: int, bits: int, pixel_bytes: bytes) -> bytes:
    """A one-strip, uncompressed, little-endian grey TIFF written byte by byte.

    Tag numbers and types as in Adobe's TIFF Revision 6.0 (1992) (values from memory; tifffile
    reads the result back in the tests).
    """
    entries = [
        (256, 4, 1, width),  # ImageWidth
        (257, 4, 1, height),  # ImageLength
        (258, 3, 1, bits),  # BitsPerSample
        (259, 3, 1, 1),  # Compression: none
        (262, 3, 1, 1),  # PhotometricInterpretation: black is zero
        (273, 4, 1, 0),  # StripOffsets (filled below)
        (277, 3, 1, 1),  # SamplesPerPixel
        (278, 4, 1, height),  # RowsPerStrip
        (279, 4, 1, len(pixel_bytes)),  # StripByteCounts
    ]
    data_offset = 8 + 2 + 12 * len(entries) + 4
    out = bytearray(b"II*\x00" + struct.pack("<I", 8) + struct.pack("<H", len(entries)))
    for tag, typ, count, value in entries:
        if tag == 273:
            value = data_offset
        if typ == 3:
            out += struct.pack("<HHIHH", tag, typ, count, value, 0)
        else:
            out += struct.pack("<HHII", tag, typ, count, value)
    out += struct.pack("<I", 0)
    return bytes(out) + pixel_bytes


def pack_bits_msb(values: np.ndarray, bits: int) -> bytes:
    """Pack samples MSB first, rows padded to whole bytes (TIFF Revision 6.0; from memory)."""
    rows = []
    for row in values:
        text = "".join(format(int(v), f"0{bits}b") for v in row)
        text += "0" * (-len(text) % 8)
        rows.append(int(text, 2).to_bytes(len(text) // 8, "big"))
    return b"".join(rows)


def exif_block(exposure: tuple[int, int], iso: int, byteorder: str = "<") -> bytes:
    """EXIF TIFF block with IFD0 -> Exif IFD holding ExposureTime and ISOSpeedRatings.

    Layout per the Exif 2.3 specification (CIPA DC-008), tags 0x8769, 0x829A, 0x8827 (tag
    numbers from memory; Pillow's reader agrees in the test).
    """
    bo = byteorder
    head = (b"II" if bo == "<" else b"MM") + struct.pack(bo + "HI", 42, 8)
    exif_ifd = 8 + 2 + 12 + 4
    rational_at = exif_ifd + 2 + 2 * 12 + 4
    ifd0 = struct.pack(bo + "H", 1) + struct.pack(bo + "HHII", 0x8769, 4, 1, exif_ifd)
    ifd0 += struct.pack(bo + "I", 0)
    ifd1 = struct.pack(bo + "H", 2)
    ifd1 += struct.pack(bo + "HHII", 0x829A, 5, 1, rational_at)
    ifd1 += struct.pack(bo + "HHIHH", 0x8827, 3, 1, iso, 0)
    ifd1 += struct.pack(bo + "I", 0)
    return head + ifd0 + ifd1 + struct.pack(bo + "II", *exposure)


def with_exif(jpeg: bytes, block: bytes) -> bytes:
    payload = b"Exif\x00\x00" + block
    app1 = b"\xff\xe1" + struct.pack(">H", len(payload) + 2) + payload
    return jpeg[:2] + app1 + jpeg[2:]


# --------------------------------------------------------------------------------------------
# sRGB transfer function
# --------------------------------------------------------------------------------------------

# Decode check values: IEC 61966-2-1:1999 (Multimedia systems and equipment - Colour
# measurement and management - Part 2-1: Default RGB colour space - sRGB), values computed
# from its transfer equation; the constants 12.92, 0.04045, 0.055, 1.055 and 2.4 are from
# memory and agree with the independent implementation in scikit-image (test below).
SRGB_DECODE = [(10, 0.00303527), (11, 0.00334654), (64, 0.0512695), (128, 0.2158605),
               (200, 0.577580), (255, 1.0)]


@pytest.mark.parametrize(("code", "expected"), SRGB_DECODE)
def test_srgb_decode_check_values(code, expected):
    # IEC 61966-2-1:1999 decode; check values computed from the standard's equation.
    assert io.srgb_to_linear(code / 255) == pytest.approx(expected, rel=2e-6)


@pytest.mark.parametrize(("lin", "expected"), [(0.18, 0.461356), (0.5, 0.735357)])
def test_srgb_encode_check_values(lin, expected):
    # IEC 61966-2-1:1999 encode; check values computed from the standard's equation.
    assert io.linear_to_srgb(lin) == pytest.approx(expected, rel=2e-6)


def test_srgb_is_not_a_plain_gamma():
    # a plain 2.2 gamma maps 128 -> 0.219520, which is not the IEC 61966-2-1 curve
    assert abs(io.srgb_to_linear(128 / 255) - (128 / 255) ** 2.2) > 3e-3


def test_srgb_segments_meet_at_the_thresholds():
    # IEC 61966-2-1:1999: linear segment 12.92 L up to L = 0.0031308, i.e. V = 0.04045; the
    # two branches of each direction join there to within 1e-6 (the published constants
    # differ from exact continuity by about 5e-8: 12.92 * 0.0031308 = 0.0404499).
    assert io.linear_to_srgb(0.0031308) == pytest.approx(0.04045, abs=1e-6)
    below = io.srgb_to_linear(0.04045)
    above = io.srgb_to_linear(0.04045 + 1e-12)
    assert above == pytest.approx(below, abs=1e-8)


def test_srgb_decode_matches_scikit_image_rgb2xyz():
    # Outside implementation: scikit-image's rgb2xyz linearises sRGB before its matrix; for a
    # grey pixel (v, v, v) the Y row (0.212671, 0.715160, 0.072169) sums to 1, so Y is the
    # linear value of v.
    color = pytest.importorskip("skimage.color")
    codes = np.arange(256)
    grey = np.repeat((codes / 255.0)[:, None, None], 3, axis=2)  # (256, 1, 3)
    y = color.rgb2xyz(grey)[:, 0, 1]
    np.testing.assert_allclose(io.srgb_to_linear(codes / 255.0), y, rtol=1e-5, atol=1e-7)


def test_srgb_round_trip_all_codes():
    codes = np.arange(256) / 255.0
    np.testing.assert_allclose(io.linear_to_srgb(io.srgb_to_linear(codes)), codes, atol=1e-12)


@settings(max_examples=200, deadline=None)
@given(st.floats(min_value=0.0, max_value=1.0, allow_nan=False))
def test_srgb_round_trip_and_monotone(lin):
    enc = io.linear_to_srgb(lin)
    assert 0.0 <= enc <= 1.0
    assert io.srgb_to_linear(enc) == pytest.approx(lin, abs=1e-12)
    assert io.linear_to_srgb(min(lin + 1e-3, 1.0)) >= enc


def test_srgb_functions_do_not_modify_input():
    v = np.linspace(0, 1, 11)
    keep = v.copy()
    out = io.srgb_to_linear(v)
    assert out is not v
    np.testing.assert_array_equal(v, keep)


# --------------------------------------------------------------------------------------------
# TIFF round trips
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("dtype", "bits", "full_scale"),
    [(np.uint8, 8, 255.0), (np.uint16, 16, 65535.0), (np.float32, None, None),
     (np.float64, None, None)],
)
def test_tiff_round_trip_per_dtype(tmp_path, dtype, bits, full_scale):
    rng = np.random.default_rng(1)
    if np.dtype(dtype).kind == "u":
        arr = rng.integers(0, np.iinfo(dtype).max, (20, 30), endpoint=True).astype(dtype)
        arr[0, 0] = np.iinfo(dtype).max
        arr[0, 1] = 0
    else:
        arr = rng.normal(0, 100, (20, 30)).astype(dtype)
    path = tmp_path / "img.tif"
    tifffile.imwrite(path, arr)
    digest = sha256(path)
    fr = io.read_frame(path)
    np.testing.assert_array_equal(fr.data, arr.astype(np.float64))
    assert fr.data.dtype == np.float64 and fr.data.shape == (20, 30)
    assert fr.meta["bit_depth"] == bits
    assert fr.meta["full_scale"] == full_scale
    assert fr.meta["dtype"] == np.dtype(dtype).name
    assert fr.meta["format"] == "tiff" and fr.meta["channel"] == "mono"
    assert fr.meta["srgb_decoded"] is False and fr.meta["n_frames"] == 1
    assert fr.file == str(path) and fr.index == 0
    if full_scale is None:
        assert not fr.saturated.any()
    else:
        assert fr.saturated[0, 0] and not fr.saturated[0, 1]
        np.testing.assert_array_equal(fr.saturated, arr >= full_scale * 0.995)
    assert sha256(path) == digest


def test_tiff_12_bit_packed(tmp_path):
    # 12-bit samples packed MSB first (TIFF 6.0 BitsPerSample = 12), file built by hand.
    rng = np.random.default_rng(2)
    arr = rng.integers(0, 4096, (6, 9)).astype(np.uint16)
    arr[0, :4] = [4095, 4075, 4074, 0]
    path = tmp_path / "twelve.tif"
    path.write_bytes(minimal_tiff(9, 6, 12, pack_bits_msb(arr, 12)))
    fr = io.read_frame(path)
    np.testing.assert_array_equal(fr.data, arr)
    assert fr.meta["bit_depth"] == 12 and fr.meta["full_scale"] == 4095.0
    assert fr.meta["dtype"] == "uint16"
    # margin 0.5 % of full scale: 4095 * 0.995 = 4074.525
    assert fr.saturated[0, :4].tolist() == [True, True, False, False]
    assert fr.meta["tiff_tags"]["BitsPerSample"] == 12


def test_tiff_stack_is_read_lazily(tmp_path, monkeypatch):
    rng = np.random.default_rng(3)
    stack = rng.integers(0, 60000, (5, 16, 24)).astype(np.uint16)
    path = tmp_path / "stack.tif"
    tifffile.imwrite(path, stack, photometric="minisblack")
    assert io.count_frames(path) == 5

    calls = []
    original = tifffile.TiffPage.asarray

    def counting(self, *args, **kwargs):
        calls.append(self.index)
        return original(self, *args, **kwargs)

    monkeypatch.setattr(tifffile.TiffPage, "asarray", counting)
    it = io.iter_frames(path)
    first = next(it)
    assert len(calls) == 1  # only the first page decoded so far
    rest = list(it)
    frames = [first, *rest]
    assert [f.index for f in frames] == [0, 1, 2, 3, 4]
    assert len(calls) == 5
    for k, f in enumerate(frames):
        np.testing.assert_array_equal(f.data, stack[k])
        assert f.meta["n_frames"] == 5
    calls.clear()
    third = io.read_frame(path, 3)
    assert len(calls) == 1
    np.testing.assert_array_equal(third.data, stack[3])


def test_tiff_single_page_series_layout(tmp_path):
    # One IFD describing a contiguous (N, H, W) block (ImageJ layout with truncate=True).
    stack = np.arange(4 * 10 * 12, dtype=np.uint16).reshape(4, 10, 12)
    path = tmp_path / "ij.tif"
    tifffile.imwrite(path, stack, imagej=True, truncate=True)
    with tifffile.TiffFile(path) as tif:
        assert len(tif.pages) == 1  # the layout this test is about
    assert io.count_frames(path) == 4
    np.testing.assert_array_equal(io.read_stack([path]), stack)
    np.testing.assert_array_equal(io.read_frame(path, 2).data, stack[2])


def test_bigtiff_stack(tmp_path):
    stack = np.random.default_rng(4).integers(0, 255, (3, 12, 14)).astype(np.uint8)
    path = tmp_path / "big.tif"
    tifffile.imwrite(path, stack, bigtiff=True, photometric="minisblack")
    # BigTIFF header: version 43 instead of 42 (BigTIFF proposal, AWare Systems, 2007;
    # value from memory)
    assert path.read_bytes()[:4] == b"II+\x00"
    frames = list(io.iter_frames(path))
    assert len(frames) == 3 and frames[2].meta["bigtiff"] is True
    for k, f in enumerate(frames):
        np.testing.assert_array_equal(f.data, stack[k])


def test_rgb_tiff_stack_channels(tmp_path):
    rgb = np.random.default_rng(5).integers(0, 250, (2, 10, 12, 3)).astype(np.uint8)
    path = tmp_path / "rgb.tif"
    tifffile.imwrite(path, rgb, photometric="rgb")
    for name, k in (("red", 0), ("green", 1), ("blue", 2)):
        frames = list(io.iter_frames(path, channel=name))
        assert [f.meta["channel"] for f in frames] == [name, name]
        np.testing.assert_array_equal(frames[1].data, rgb[1, ..., k])
    # TIFF is never sRGB-decoded automatically
    assert io.read_frame(path, channel="red").meta["srgb_decoded"] is False


def test_tiff_planar_rgb(tmp_path):
    rgb = np.random.default_rng(6).integers(0, 250, (3, 10, 12)).astype(np.uint8)
    path = tmp_path / "planar.tif"
    tifffile.imwrite(path, rgb, photometric="rgb", planarconfig="separate")
    np.testing.assert_array_equal(io.read_frame(path, channel="blue").data, rgb[2])


def test_tiff_float_nonfinite_counted(tmp_path):
    arr = np.ones((8, 9), np.float32)
    arr[1, 2] = np.nan
    arr[3, 4] = np.inf
    path = tmp_path / "nan.tif"
    tifffile.imwrite(path, arr)
    fr = io.read_frame(path)
    assert fr.meta["nonfinite"] == 2
    assert np.isnan(fr.data[1, 2]) and not fr.saturated.any()


def test_tiff_tags_and_exposure(tmp_path):
    path = tmp_path / "tagged.tif"
    # TIFF/EP (ISO 12234-2) places ExposureTime (33434, RATIONAL) and ISOSpeedRatings
    # (34855, SHORT) in IFD0; tag numbers as in the Exif 2.3 specification (values from
    # memory).
    tifffile.imwrite(path, np.zeros((8, 8), np.uint16), software="bench camera",
                     extratags=[(33434, 5, 1, (1, 500), False), (34855, 3, 1, 800, False)])
    fr = io.read_frame(path)
    assert fr.meta["exposure_s"] == pytest.approx(1 / 500)
    assert fr.meta["iso"] == 800
    tags = fr.meta["tiff_tags"]
    assert tags["ImageWidth"] == 8 and tags["Software"] == "bench camera"
    assert "StripOffsets" not in tags


def test_tiff_without_exif_gives_none(tmp_path):
    path = tmp_path / "plain.tif"
    tifffile.imwrite(path, np.zeros((8, 8), np.uint8))
    fr = io.read_frame(path)
    assert fr.meta["exposure_s"] is None and fr.meta["iso"] is None


def test_read_stack_order_and_shape_check(tmp_path):
    a = np.full((2, 6, 7), 1, np.uint16)
    b = np.full((3, 6, 7), 2, np.uint16)
    tifffile.imwrite(tmp_path / "a.tif", a, photometric="minisblack")
    tifffile.imwrite(tmp_path / "b.tif", b, photometric="minisblack")
    stack = io.read_stack([tmp_path / "a.tif", tmp_path / "b.tif"])
    assert stack.shape == (5, 6, 7) and stack.dtype == np.float64
    assert stack[:, 0, 0].tolist() == [1, 1, 2, 2, 2]
    tifffile.imwrite(tmp_path / "c.tif", np.zeros((6, 8), np.uint16))
    with pytest.raises(FringeError, match=r"c\.tif: frame 0 has shape \(6, 8\)"):
        io.read_stack([tmp_path / "a.tif", tmp_path / "c.tif"])
    with pytest.raises(FringeError, match="no image files"):
        io.read_stack([])


def test_read_frame_index_out_of_range(tmp_path):
    path = tmp_path / "two.tif"
    tifffile.imwrite(path, np.zeros((2, 5, 5), np.uint8), photometric="minisblack")
    with pytest.raises(FringeError, match=r"two\.tif: frame 2 requested but the file holds 2"):
        io.read_frame(path, 2)


# --------------------------------------------------------------------------------------------
# PNG and JPEG
# --------------------------------------------------------------------------------------------


def test_png_8bit_grey_srgb_auto(tmp_path):
    Image = pytest.importorskip("PIL.Image")  # Pillow comes with scikit-image

    codes = np.tile(np.array([0, 10, 64, 128, 200, 255], np.uint8), (4, 1))
    path = tmp_path / "grey.png"
    assert cv2.imwrite(str(path), codes)
    fr = io.read_frame(path)
    assert fr.meta["format"] == "png" and fr.meta["srgb_decoded"] is True
    assert fr.meta["bit_depth"] == 8 and fr.meta["full_scale"] == 255.0
    # IEC 61966-2-1:1999 decode, check values computed from the standard, scaled by 255.
    expected = np.array([0.0, 0.00303527, 0.0512695, 0.2158605, 0.577580, 1.0]) * 255
    np.testing.assert_allclose(fr.data[0], expected, rtol=2e-6)
    assert fr.saturated[0].tolist() == [False] * 5 + [True]
    raw = io.read_frame(path, srgb=False)
    # Outside decoder: Pillow reads the same codes.
    with Image.open(path) as im:
        np.testing.assert_array_equal(raw.data, np.asarray(im))


def test_png_16bit_not_decoded_by_default(tmp_path):
    Image = pytest.importorskip("PIL.Image")  # Pillow comes with scikit-image

    arr = np.array([[0, 1000, 32896, 65535]] * 3, np.uint16)
    path = tmp_path / "deep.png"
    assert cv2.imwrite(str(path), arr)
    fr = io.read_frame(path)
    assert fr.meta["bit_depth"] == 16 and fr.meta["srgb_decoded"] is False
    with Image.open(path) as im:
        np.testing.assert_array_equal(fr.data, np.asarray(im).astype(np.float64))
    # Forced decoding: 32896 / 65535 = 128 / 255, so 0.2158605 of full scale
    # (IEC 61966-2-1:1999 decode, value computed from the standard's equation).
    dec = io.read_frame(path, srgb=True)
    assert dec.data[0, 2] == pytest.approx(0.2158605 * 65535, rel=2e-6)


def test_png_colour_order_is_rgb(tmp_path):
    Image = pytest.importorskip("PIL.Image")  # Pillow comes with scikit-image

    rgb = np.zeros((6, 8, 3), np.uint8)
    rgb[..., 0] = 200  # red
    rgb[..., 1] = 100
    rgb[..., 2] = 30
    path = tmp_path / "colour.png"
    assert cv2.imwrite(str(path), rgb[..., ::-1])  # OpenCV writes BGR order
    with Image.open(path) as im:
        ref = np.asarray(im.convert("RGB"))  # outside decoder
    for name, k in (("red", 0), ("green", 1), ("blue", 2)):
        fr = io.read_frame(path, channel=name, srgb=False)
        np.testing.assert_array_equal(fr.data, ref[..., k])


def test_png_rgba_drops_alpha(tmp_path):
    rgba = np.zeros((6, 8, 4), np.uint8)
    rgba[..., 1] = 90
    rgba[..., 3] = 255  # opaque alpha at full scale must not count as saturation
    path = tmp_path / "alpha.png"
    assert cv2.imwrite(str(path), rgba[..., [2, 1, 0, 3]])
    fr = io.read_frame(path, channel="green", srgb=False)
    np.testing.assert_array_equal(fr.data, 90.0)
    assert not fr.saturated.any()


def test_jpeg_round_trip_within_tolerance(tmp_path):
    Image = pytest.importorskip("PIL.Image")  # Pillow comes with scikit-image

    yy, xx = np.mgrid[0:64, 0:64]
    rgb = np.stack([2 * xx + 40, 2 * yy + 30, xx + yy + 20], axis=2).astype(np.uint8)
    path = tmp_path / "smooth.jpg"
    assert cv2.imwrite(str(path), rgb[..., ::-1], [cv2.IMWRITE_JPEG_QUALITY, 95])
    fr = io.read_frame(path, channel="green", srgb=False)
    assert fr.meta["format"] == "jpeg" and fr.meta["bit_depth"] == 8
    # JPEG is lossy (ITU-T T.81): mean error of a smooth image at quality 95 below 2 codes
    # (common practice).
    assert np.mean(np.abs(fr.data - rgb[..., 1])) < 2.0
    with Image.open(path) as im:
        ref = np.asarray(im.convert("RGB"))[..., 1]  # outside decoder
    assert np.max(np.abs(fr.data - ref)) <= 3  # decoders may round the IDCT differently
    assert io.read_frame(path).meta["srgb_decoded"] is True
    assert fr.meta["exposure_s"] is None and fr.meta["iso"] is None


@pytest.mark.parametrize("byteorder", ["<", ">"])
def test_jpeg_exif_exposure_and_iso(tmp_path, byteorder):
    Image = pytest.importorskip("PIL.Image")  # Pillow comes with scikit-image

    ok, enc = cv2.imencode(".jpg", np.full((16, 16), 120, np.uint8))
    assert ok
    path = tmp_path / "exif.jpg"
    path.write_bytes(with_exif(enc.tobytes(), exif_block((1, 250), 400, byteorder)))
    fr = io.read_frame(path)
    assert fr.meta["exposure_s"] == pytest.approx(1 / 250)
    assert fr.meta["iso"] == 400
    # Outside EXIF reader: Pillow finds the same values in the Exif IFD (0x8769).
    with Image.open(path) as im:
        exif = im.getexif().get_ifd(0x8769)
    assert float(exif[0x829A]) == pytest.approx(fr.meta["exposure_s"])
    assert exif[0x8827] == fr.meta["iso"]


# --------------------------------------------------------------------------------------------
# colour channel choice
# --------------------------------------------------------------------------------------------


def test_auto_picks_the_channel_with_fringes():
    rng = np.random.default_rng(7)
    f = fringes()
    rgb = np.empty(f.shape + (3,))
    rgb[..., 0] = 120 + rng.normal(0, 2, f.shape)
    rgb[..., 1] = 120 + 60 * f + rng.normal(0, 2, f.shape)
    rgb[..., 2] = 120 + rng.normal(0, 2, f.shape)
    fr = io.frame_from_array(np.clip(np.round(rgb), 0, 255).astype(np.uint8))
    assert fr.meta["channel"] == "green"
    scores = fr.meta["channel_scores"]
    assert scores["green"] > 10 * max(scores["red"], scores["blue"])


def test_auto_prefers_clean_blue_to_saturated_red(tmp_path):
    rng = np.random.default_rng(8)
    f = fringes(period=6.0)
    rgb = np.empty(f.shape + (3,))
    # same fringe amplitude in red and blue, but red clips at 255 over the crests
    rgb[..., 0] = 240 + 60 * f + rng.normal(0, 2, f.shape)
    rgb[..., 1] = 90 + rng.normal(0, 2, f.shape)
    rgb[..., 2] = 90 + 60 * f + rng.normal(0, 2, f.shape)
    img = np.clip(np.round(rgb), 0, 255).astype(np.uint8)
    assert (img[..., 0] >= 254).mean() > 0.3  # the red channel really is saturated
    path = tmp_path / "two_colours.png"
    assert cv2.imwrite(str(path), img[..., ::-1])
    fr = io.read_frame(path)
    assert fr.meta["channel"] == "blue"
    # Saturation is flagged where any channel clips (here: red), whatever channel is used.
    np.testing.assert_array_equal(fr.saturated, img.max(axis=2) >= 254)


def test_luma_uses_rec709_weights_on_linear_values():
    px = np.array([[[128, 200, 64]]], np.uint8).repeat(2, 0).repeat(2, 1)
    fr = io.frame_from_array(px, channel="luma", srgb=True)
    # ITU-R BT.709 luma weights (0.2126, 0.7152, 0.0722; values from memory) applied to the
    # IEC 61966-2-1:1999 decoded values (128 -> 0.2158605, 200 -> 0.577580,
    # 64 -> 0.0512695; computed from the standard's equation).
    expected = 255 * (0.2126 * 0.2158605 + 0.7152 * 0.577580 + 0.0722 * 0.0512695)
    assert fr.data[0, 0] == pytest.approx(expected, rel=1e-5)
    assert fr.meta["channel"] == "luma"


def test_mono_ignores_channel_and_bad_channel_refused(tmp_path):
    fr = io.frame_from_array(np.zeros((4, 4), np.uint8), channel="red")
    assert fr.meta["channel"] == "mono"
    with pytest.raises(FringeError, match="unknown channel 'purple'"):
        io.frame_from_array(np.zeros((4, 4), np.uint8), channel="purple")
    path = tmp_path / "m.tif"
    tifffile.imwrite(path, np.zeros((4, 4), np.uint8))
    with pytest.raises(FringeError, match=r"m\.tif: unknown channel"):
        io.read_frame(path, channel="cyan")


def test_frame_from_array_does_not_modify_input():
    arr = np.arange(12, dtype=np.float64).reshape(3, 4)
    keep = arr.copy()
    fr = io.frame_from_array(arr, full_scale=10.0)
    assert fr.data is not arr and not np.shares_memory(fr.data, arr)
    fr.data[:] = -1
    np.testing.assert_array_equal(arr, keep)
    assert fr.saturated.sum() == 2  # 10 and 11 are >= 10 * 0.995
    assert fr.meta["format"] == "array" and fr.file == "<array>"


def test_frame_from_array_refuses_bad_arrays():
    with pytest.raises(FringeError, match="complex"):
        io.frame_from_array(np.zeros((4, 4), np.complex64))
    with pytest.raises(FringeError, match="neither a 2-D mono image nor a 3-D colour"):
        io.frame_from_array(np.zeros((2, 4, 4, 3), np.uint8))
    with pytest.raises(FringeError, match="too small"):
        io.frame_from_array(np.zeros((1, 40), np.uint8))
    with pytest.raises(FringeError, match="full scale"):
        io.frame_from_array(np.zeros((4, 4), np.float32), srgb=True)


# --------------------------------------------------------------------------------------------
# refused inputs
# --------------------------------------------------------------------------------------------


def _refused(path: Path, match: str, **kwargs) -> str:
    digest = sha256(path) if path.is_file() else None
    with pytest.raises(FringeError, match=match) as info:
        io.read_frame(path, **kwargs)
    msg = str(info.value)
    assert path.name in msg and "\n" not in msg
    if digest is not None:
        assert sha256(path) == digest
    return msg


def test_missing_file(tmp_path):
    _refused(tmp_path / "absent.tif", "no such file")
    with pytest.raises(FringeError, match=r"absent\.tif: no such file"):
        io.count_frames(tmp_path / "absent.tif")
    with pytest.raises(FringeError, match=r"absent\.tif: no such file"):
        io.iter_frames(tmp_path / "absent.tif")  # raised at call time, not at next()


def test_zero_byte_file(tmp_path):
    path = tmp_path / "empty.tif"
    path.write_bytes(b"")
    _refused(path, "empty")


def test_text_renamed_tif(tmp_path):
    path = tmp_path / "notes.tif"
    path.write_text("exposure 10 ms, gain 2\n")
    _refused(path, "not a TIFF, PNG or JPEG image")


def test_directory_refused(tmp_path):
    d = tmp_path / "folder.tif"
    d.mkdir()
    _refused(d, "is a directory")


def test_truncated_tiff(tmp_path):
    path = tmp_path / "cut.tif"
    tifffile.imwrite(path, np.arange(64 * 64, dtype=np.uint16).reshape(64, 64))
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    _refused(path, "cannot be decoded")


def test_truncated_tiff_header(tmp_path):
    path = tmp_path / "stub.tif"
    path.write_bytes(b"II*\x00\xff\xff\x00\x00")  # first IFD offset beyond the end
    _refused(path, "no readable image")


def test_truncated_png(tmp_path):
    path = tmp_path / "cut.png"
    assert cv2.imwrite(str(path), np.full((32, 32), 7, np.uint8))
    path.write_bytes(path.read_bytes()[:40])
    _refused(path, "cannot be read as an image")


def test_absurd_declared_tiff_size(tmp_path):
    path = tmp_path / "big.tif"
    tifffile.imwrite(path, np.zeros((20, 30), np.uint8))
    raw = bytearray(path.read_bytes())
    with tifffile.TiffFile(path) as tif:
        page = tif.pages[0]
        offsets = [page.tags[t].valueoffset for t in ("ImageWidth", "ImageLength")]
        types = [page.tags[t].dtype for t in ("ImageWidth", "ImageLength")]
    assert types == [4, 4]  # LONG fields, patched in place below
    for off in offsets:
        raw[off : off + 4] = struct.pack("<I", 100_000)
    path.write_bytes(bytes(raw))
    msg = _refused(path, "page declares 100000 x 100000")
    assert "1e10 pixels" in msg and "limit of 2e8" in msg and "--max-pixels" in msg


def test_absurd_declared_size_hand_built_tiff(tmp_path):
    path = tmp_path / "huge.tif"
    path.write_bytes(minimal_tiff(100_000, 50_000, 8, b"\x00" * 64))
    _refused(path, r"page declares 100000 x 50000 = 5e9 pixels")
    # a lower limit set by the caller applies to small files too
    small = tmp_path / "small.tif"
    tifffile.imwrite(small, np.zeros((40, 50), np.uint8))
    _refused(small, "above the limit of 1e3", max_pixels=1000)


def test_absurd_declared_png_size(tmp_path):
    path = tmp_path / "wide.png"
    assert cv2.imwrite(str(path), np.zeros((4, 4), np.uint8))
    raw = bytearray(path.read_bytes())
    # IHDR width and height follow the 8-byte signature and the chunk length and type
    # (W3C PNG specification, IHDR chunk; offsets from memory)
    raw[16:24] = struct.pack(">II", 200_000, 100_000)
    path.write_bytes(bytes(raw))
    _refused(path, "page declares 200000 x 100000 = 2e10 pixels")


@pytest.mark.parametrize("shape", [(1, 1), (1, 50), (50, 1)])
def test_one_pixel_images(tmp_path, shape):
    path = tmp_path / "dot.tif"
    tifffile.imwrite(path, np.zeros(shape, np.uint8))
    msg = _refused(path, "too small")
    if shape == (1, 1):
        assert "image is 1 x 1 pixels, too small" in msg


def test_complex_tiff_refused(tmp_path):
    path = tmp_path / "complex.tif"
    tifffile.imwrite(path, np.zeros((8, 8), np.complex64))
    _refused(path, "complex")


def test_bad_options_refused(tmp_path):
    path = tmp_path / "ok.tif"
    tifffile.imwrite(path, np.zeros((8, 8), np.uint8))
    _refused(path, "srgb must be", srgb="yes")
    _refused(path, "max_pixels must be", max_pixels=-5)
