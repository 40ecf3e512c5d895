"""Property-based robustness: random bytes into every loader, random fringe parameters into
the measurement. Nothing may raise anything but FringeError, and nothing may crash."""

from __future__ import annotations

import struct

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import fringe
from fringe import io
from fringe._util import FringeError
from fringe.synth import render_fringes

_HEADERS = [b"", b"II*\x00", b"MM\x00*", b"II+\x00\x08\x00\x00\x00", b"\x89PNG\r\n\x1a\n",
            b"\xff\xd8\xff\xe0"]


@settings(max_examples=60, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(head=st.sampled_from(_HEADERS), body=st.binary(max_size=600),
       suffix=st.sampled_from([".tif", ".tiff", ".png", ".jpg"]))
def test_random_bytes_into_loaders(tmp_path, head, body, suffix):
    # Random bytes behind real magic numbers: a FringeError naming the file, or frames.
    path = tmp_path / f"blob{suffix}"
    path.write_bytes(head + body)
    try:
        for fr in io.iter_frames(path):
            assert fr.data.ndim == 2
        io.read_frame(path)
    except FringeError as exc:
        assert "blob" in str(exc)
        assert "\n" not in str(exc)


@settings(max_examples=30, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(width=st.integers(0, 2**31 - 1), height=st.integers(0, 2**31 - 1),
       bits=st.sampled_from([1, 8, 12, 16, 32, 64, 7]))
def test_random_tiff_headers(tmp_path, width, height, bits):
    # A hand-made TIFF directory with arbitrary dimensions and bit depth.
    entries = [(256, 4, 1, width), (257, 4, 1, height), (258, 3, 1, bits), (259, 3, 1, 1),
               (262, 3, 1, 1), (273, 4, 1, 8), (277, 3, 1, 1), (278, 4, 1, max(height, 1)),
               (279, 4, 1, 64)]
    ifd = struct.pack("<H", len(entries))
    for tag, typ, count, value in entries:
        if typ == 3:
            ifd += struct.pack("<HHIHH", tag, typ, count, value & 0xFFFF, 0)
        else:
            ifd += struct.pack("<HHII", tag, typ, count, value)
    ifd += struct.pack("<I", 0)
    path = tmp_path / "hdr.tif"
    path.write_bytes(b"II*\x00" + struct.pack("<I", 8) + ifd + b"\x00" * 64)
    try:
        io.read_frame(path)
    except FringeError as exc:
        assert "hdr.tif" in str(exc)


@settings(max_examples=40, deadline=None)
@given(period=st.floats(3.0, 30.0), angle=st.floats(0.0, 179.99), phase=st.floats(-3.14, 3.14),
       vis=st.floats(0.05, 1.0), mean=st.floats(1.0, 1e5), noise=st.floats(0.0, 0.05),
       seed=st.integers(0, 2**16))
def test_measurement_properties(period, angle, phase, vis, mean, noise, seed):
    # Over random parameters: either a plain error or values within a few sigma (plus a
    # floor for the rendering's own precision) of the truth.
    rng = np.random.default_rng(seed)
    img = render_fringes((64, 72), period_px=period, orientation_deg=angle, phase_rad=phase,
                         visibility=vis, mean=mean)
    img = img + rng.normal(0.0, noise * mean + 1e-9, img.shape)
    r = fringe.measure(img)
    if not r.ok:
        assert r.error and "\n" not in r.error
        return
    if period * 3 > 64 or vis * mean < 20 * noise * mean:
        return  # outside the range where a number is promised
    assert abs(r.period_px - period) <= 6 * r.period_px_err + 1e-3 * period
    d_phase = (r.phase_rad - phase + np.pi) % (2 * np.pi) - np.pi
    d_angle = (r.orientation_deg - angle + 90) % 180 - 90
    near_fold = min(angle, 180 - angle) < 0.5
    if not near_fold:
        assert abs(d_angle) <= 6 * r.orientation_deg_err + 0.02
        assert abs(d_phase) <= 6 * r.phase_rad_err + 0.01
    assert abs(r.visibility - vis) <= 6 * r.visibility_err + 0.01


@pytest.mark.parametrize("shape", [(8, 8), (8, 200), (200, 8), (9, 13)])
def test_small_and_thin_regions(shape):
    img = render_fringes(shape, period_px=3.0, orientation_deg=0.0, visibility=0.5,
                         mean=100.0)
    r = fringe.measure(img)
    assert r.status in ("ok", "error")
    if r.status == "error":
        assert "\n" not in r.error
