"""Frame input: TIFF images and stacks, PNG and JPEG captures, as linear-light float frames.

Every reader returns :class:`Frame` objects holding a 2-D float64 image in the data units of
the file, a saturation mask computed on the stored (raw) values, and a small metadata
dictionary. Stacks are read page by page; input files are opened read-only and never written.
"""

from __future__ import annotations

import math
import os
import struct
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from fringe._util import FringeError

__all__ = [
    "DEFAULT_MAX_PIXELS",
    "SATURATION_MARGIN",
    "Frame",
    "count_frames",
    "frame_from_array",
    "iter_frames",
    "linear_to_srgb",
    "read_frame",
    "read_stack",
    "srgb_to_linear",
]

DEFAULT_MAX_PIXELS = 200_000_000
"""Largest number of pixels a single frame may declare before it is decoded."""

SATURATION_MARGIN = 0.005
"""Default saturation margin as a fraction of full scale (0.5 %)."""

LUMA_709 = (0.2126, 0.7152, 0.0722)
"""Rec. 709 luma weights for linear R, G, B."""

_CHANNELS = ("auto", "luma", "red", "green", "blue")
_RGB_INDEX = {"red": 0, "green": 1, "blue": 2}
# Order in which channels are scored: on a tie the earlier one wins (green first: on a Bayer
# sensor it has twice the pixels of red or blue).
_AUTO_ORDER = ("green", "red", "blue")
_AUTO_MAX_PIXELS = 4_000_000

_TIFF_MAGIC = (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+")
_PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
_JPEG_MAGIC = b"\xff\xd8\xff"

# Tags holding offsets, tables or nested directories: never copied into meta["tiff_tags"].
_SKIPPED_TAGS = frozenset(
    {
        "StripOffsets",
        "StripByteCounts",
        "TileOffsets",
        "TileByteCounts",
        "JPEGTables",
        "ExifTag",
        "GPSTag",
        "InteroperabilityTag",
        "ICCProfile",
        "SubIFDs",
        "ColorMap",
        "XMP",
        "IPTCNAA",
        "Photoshop",
    }
)


@dataclass
class Frame:
    """One image of a file, converted to linear light.

    Attributes
    ----------
    data : ndarray, shape (H, W), float64
        Linear light in the data units (DN) of the file. sRGB-decoded inputs are mapped to
        linear light and rescaled to ``0 .. full_scale`` (``linear * 255`` for 8-bit codes).
    file : str
        Path as given, or ``"<array>"``.
    index : int
        Frame index within the file (0 for single images).
    saturated : ndarray, shape (H, W), bool
        True where the stored value is at or near full scale
        (``raw >= full_scale * (1 - margin)``); for colour input a pixel counts as saturated
        when any of its R, G, B values is.
    meta : dict
        ``bit_depth`` (int or None for floating data), ``dtype`` (stored dtype name),
        ``full_scale`` (float in data units, None for floating data: no saturation test),
        ``format`` ("tiff", "png", "jpeg" or "array"), ``channel`` ("mono", "luma", "red",
        "green" or "blue"), ``channel_scores`` (auto selection only), ``srgb_decoded``,
        ``exposure_s`` and ``iso`` (EXIF, else None), ``tiff_tags`` (simple tags of the page),
        ``shape``, ``n_frames`` (frames in the file) and ``nonfinite`` (count of NaN/inf).
    """

    data: np.ndarray
    file: str
    index: int
    saturated: np.ndarray
    meta: dict = field(default_factory=dict)


# --------------------------------------------------------------------------------------------
# sRGB transfer function
# --------------------------------------------------------------------------------------------


def srgb_to_linear(v: float | np.ndarray) -> float | np.ndarray:
    """Decode sRGB-encoded values to linear light.

    Parameters
    ----------
    v : float or array_like
        Encoded values, nominally in [0, 1] (8-bit code / 255).

    Returns
    -------
    float or ndarray
        Linear values in [0, 1] for inputs in [0, 1]; a float for scalar input.

    Notes
    -----
    .. math::

        L = V / 12.92 \\quad (V \\le 0.04045), \\qquad
        L = \\left(\\frac{V + 0.055}{1.055}\\right)^{2.4} \\quad (V > 0.04045)

    References
    ----------
    .. [1] IEC 61966-2-1:1999, Multimedia systems and equipment - Colour measurement and
       management - Part 2-1: Default RGB colour space - sRGB.

    Examples
    --------
    >>> round(srgb_to_linear(128 / 255), 7)
    0.2158605
    """
    arr = np.asarray(v, dtype=np.float64)
    high = ((np.maximum(arr, 0.04045) + 0.055) / 1.055) ** 2.4
    out = np.where(arr <= 0.04045, arr / 12.92, high)
    return float(out) if out.ndim == 0 else out


def linear_to_srgb(lin: float | np.ndarray) -> float | np.ndarray:
    """Encode linear light with the sRGB transfer function.

    Parameters
    ----------
    lin : float or array_like
        Linear values, nominally in [0, 1].

    Returns
    -------
    float or ndarray
        Encoded values in [0, 1] for inputs in [0, 1]; a float for scalar input.

    Notes
    -----
    .. math::

        V = 12.92 L \\quad (L \\le 0.0031308), \\qquad
        V = 1.055 L^{1/2.4} - 0.055 \\quad (L > 0.0031308)

    References
    ----------
    .. [1] IEC 61966-2-1:1999, Multimedia systems and equipment - Colour measurement and
       management - Part 2-1: Default RGB colour space - sRGB.

    Examples
    --------
    >>> round(linear_to_srgb(0.18), 6)
    0.461356
    """
    arr = np.asarray(lin, dtype=np.float64)
    high = 1.055 * np.maximum(arr, 0.0031308) ** (1.0 / 2.4) - 0.055
    out = np.where(arr <= 0.0031308, 12.92 * arr, high)
    return float(out) if out.ndim == 0 else out


_SRGB_LUT8 = np.asarray(srgb_to_linear(np.arange(256) / 255.0)) * 255.0


# --------------------------------------------------------------------------------------------
# small helpers
# --------------------------------------------------------------------------------------------


def _reason(exc: BaseException) -> str:
    """One-line, bounded description of an exception."""
    text = " ".join(str(exc).split()) or type(exc).__name__
    if len(text) > 160:
        text = text[:157] + "..."
    return text


def _sci(n: float) -> str:
    """Compact scientific notation: 1e10, 2e8, 1.5e9."""
    mant, exp = f"{float(n):.3e}".split("e")
    mant = mant.rstrip("0").rstrip(".")
    return f"{mant}e{int(exp)}"


def _check_options(name: str, channel: str, srgb: Any, max_pixels: Any, margin: Any) -> None:
    if channel not in _CHANNELS:
        choices = ", ".join(_CHANNELS)
        raise FringeError(f"{name}: unknown channel {channel!r} (use one of {choices})")
    if not (srgb == "auto" or srgb is True or srgb is False):
        raise FringeError(f"{name}: srgb must be 'auto', True or False, got {srgb!r}")
    if max_pixels is not None and (not isinstance(max_pixels, (int, np.integer)) or max_pixels < 4):
        raise FringeError(f"{name}: max_pixels must be an integer >= 4, got {max_pixels!r}")
    if not (0.0 <= float(margin) < 1.0):
        raise FringeError(f"{name}: saturation margin must be in [0, 1), got {margin!r}")


def _check_size(name: str, width: int, height: int, max_pixels: int | None) -> None:
    """Refuse absurd or degenerate frame sizes before any pixel is decoded."""
    npix = int(width) * int(height)
    if max_pixels is not None and npix > max_pixels:
        raise FringeError(
            f"{name}: page declares {width} x {height} = {_sci(npix)} pixels, above the limit "
            f"of {_sci(max_pixels)} (raise it with --max-pixels)"
        )
    if width < 2 or height < 2:
        raise FringeError(f"{name}: image is {width} x {height} pixels, too small")


def _sniff(path: Any) -> tuple[str, str]:
    """Check that `path` is a readable, non-empty image file; return (name, format)."""
    try:
        name = os.fsdecode(path)
    except TypeError:
        raise FringeError(f"{path!r}: not a file path") from None
    if not os.path.exists(name):
        raise FringeError(f"{name}: no such file")
    if os.path.isdir(name):
        raise FringeError(f"{name}: is a directory, not an image file")
    try:
        size = os.path.getsize(name)
        with open(name, "rb") as fh:
            head = fh.read(16)
    except OSError as exc:
        raise FringeError(f"{name}: cannot be opened ({exc.strerror or _reason(exc)})") from exc
    if size == 0:
        raise FringeError(f"{name}: file is empty (0 bytes)")
    if head[:4] in _TIFF_MAGIC:
        return name, "tiff"
    if head.startswith(_PNG_MAGIC):
        return name, "png"
    if head.startswith(_JPEG_MAGIC):
        return name, "jpeg"
    raise FringeError(
        f"{name}: not a TIFF, PNG or JPEG image (file starts with {head[:8]!r})"
    )


def _integer_scale(dtype: np.dtype, bits: int | None = None) -> tuple[int, float]:
    """Bit depth and full scale of an integer dtype (optionally fewer significant bits)."""
    nbits = dtype.itemsize * 8
    if bits is None or not (1 <= bits < nbits):
        bits = nbits
    if dtype.kind == "i":
        return bits, float(2 ** (bits - 1) - 1)
    return bits, float(2**bits - 1)


# --------------------------------------------------------------------------------------------
# conversion of stored values to a Frame
# --------------------------------------------------------------------------------------------


def _fringe_score(lin: np.ndarray, sat: np.ndarray) -> float:
    """Spectral peak-to-noise ratio of one channel times its unsaturated fraction."""
    good = ~sat & np.isfinite(lin)
    frac = float(np.count_nonzero(good)) / good.size
    if frac == 0.0:
        return 0.0
    fill = float(np.median(lin[good]))
    x = np.where(good, lin, fill)
    x -= x.mean()
    h, w = x.shape
    x *= np.hanning(h)[:, None] * np.hanning(w)[None, :]
    power = np.abs(np.fft.rfft2(x)) ** 2
    fy = np.fft.fftfreq(h)[:, None]
    fx = np.fft.rfftfreq(w)[None, :]
    keep = np.hypot(fx, fy) >= 2.0 / min(h, w)
    values = power[keep]
    if values.size == 0:
        return 0.0
    peak = float(values.max())
    if peak <= 0.0:
        return 0.0
    noise = max(float(np.median(values)), peak * 1e-12)
    return peak / noise * frac


def _to_frame(
    raw: np.ndarray,
    *,
    name: str,
    index: int,
    fmt: str,
    n_frames: int,
    bit_depth: int | None,
    full_scale: float | None,
    channel: str,
    srgb: bool,
    margin: float,
    extra: dict | None = None,
) -> Frame:
    """Build a Frame from stored values (2-D mono or 3-D colour with samples last)."""
    raw = np.asarray(raw)
    if np.iscomplexobj(raw):
        raise FringeError(f"{name}: complex pixel data ({raw.dtype}) is not supported")
    if raw.dtype == np.bool_:
        raw = raw.astype(np.uint8)
        bit_depth, full_scale = 1, 1.0
    if raw.dtype.kind not in "uif":
        raise FringeError(f"{name}: pixel data of type {raw.dtype} is not supported")
    if raw.ndim == 3 and raw.shape[2] in (1, 2):
        raw = raw[..., 0]  # mono, or mono + alpha
    if raw.ndim == 3 and raw.shape[2] not in (3, 4):
        raise FringeError(
            f"{name}: image has {raw.shape[2]} samples per pixel; expected 1 (mono), "
            "3 (RGB) or 4 (RGBA)"
        )
    if raw.ndim not in (2, 3):
        raise FringeError(
            f"{name}: array of shape {raw.shape} is neither a 2-D mono image nor a 3-D colour "
            "image"
        )
    height, width = raw.shape[:2]
    if width < 2 or height < 2:
        raise FringeError(f"{name}: image is {width} x {height} pixels, too small")
    colour = raw.ndim == 3
    if colour:
        raw = raw[..., :3]  # drop alpha
    if srgb and (full_scale is None or not math.isfinite(full_scale) or full_scale <= 0):
        raise FringeError(f"{name}: sRGB decoding needs a finite full scale ({raw.dtype} data)")

    if full_scale is None or not math.isfinite(full_scale):
        sat_c = np.zeros(raw.shape, dtype=bool)
    else:
        sat_c = raw >= full_scale * (1.0 - margin)
    saturated = sat_c.any(axis=2) if colour else sat_c

    def linear(stored: np.ndarray) -> np.ndarray:
        """Stored values of one channel as linear light in data units (a new array)."""
        if srgb and stored.dtype == np.uint8 and full_scale == 255.0:
            return _SRGB_LUT8[stored]
        if srgb:
            return np.asarray(srgb_to_linear(stored / full_scale)) * full_scale
        return stored.astype(np.float64)

    scores: dict[str, float] | None = None
    if not colour:
        data, chosen = linear(raw), "mono"
    elif channel == "luma":
        data = sum(w * linear(raw[..., k]) for k, w in enumerate(LUMA_709))
        chosen = "luma"
    elif channel == "auto":
        step = 1
        if height * width > _AUTO_MAX_PIXELS:
            step = int(math.ceil(math.sqrt(height * width / _AUTO_MAX_PIXELS)))
        scores = {}
        for c in _AUTO_ORDER:
            k = _RGB_INDEX[c]
            scores[c] = _fringe_score(linear(raw[::step, ::step, k]), sat_c[::step, ::step, k])
        chosen = max(_AUTO_ORDER, key=lambda c: scores[c])
        data = linear(raw[..., _RGB_INDEX[chosen]])
    else:
        chosen = channel
        data = linear(raw[..., _RGB_INDEX[channel]])
    data = np.ascontiguousarray(data, dtype=np.float64)
    nonfinite = 0
    if raw.dtype.kind == "f":
        nonfinite = int(data.size - np.count_nonzero(np.isfinite(data)))

    meta: dict[str, Any] = {
        "bit_depth": bit_depth,
        "dtype": raw.dtype.name,
        "full_scale": full_scale,
        "format": fmt,
        "channel": chosen,
        "srgb_decoded": bool(srgb),
        "exposure_s": None,
        "iso": None,
        "tiff_tags": {},
        "shape": tuple(int(s) for s in data.shape),
        "n_frames": int(n_frames),
        "nonfinite": nonfinite,
        "saturation_margin": float(margin),
    }
    if scores is not None:
        meta["channel_scores"] = scores
    if extra:
        meta.update(extra)
    return Frame(data=data, file=name, index=int(index), saturated=saturated, meta=meta)


def _stored_scale(
    name: str, dtype: np.dtype, bits_tag: int | None, full_scale: float | None = None
) -> tuple[int | None, float | None]:
    """Bit depth and full scale for stored data (None, None for floating point)."""
    if dtype.kind in "ui":
        bits, scale = _integer_scale(dtype, bits_tag)
        return bits, (scale if full_scale is None else float(full_scale))
    if dtype.kind == "b":
        return 1, 1.0
    if dtype.kind == "f":
        return None, (None if full_scale is None else float(full_scale))
    if dtype.kind == "c":
        raise FringeError(f"{name}: complex pixel data ({dtype}) is not supported")
    raise FringeError(f"{name}: pixel data of type {dtype} is not supported")


def _decide_srgb(srgb: Any, fmt: str, bit_depth: int | None) -> bool:
    if srgb == "auto":
        return fmt in ("png", "jpeg") and bit_depth == 8
    return bool(srgb)


# --------------------------------------------------------------------------------------------
# TIFF
# --------------------------------------------------------------------------------------------


def _simple_tags(page: Any) -> dict[str, Any]:
    """Small, plain tag values of a TIFF page (name -> value)."""
    out: dict[str, Any] = {}
    tags = getattr(page, "tags", None)
    if tags is None:
        return out
    for tag in tags.values():
        tname = tag.name
        if tname in _SKIPPED_TAGS:
            continue
        value = tag.value
        if hasattr(value, "name") and isinstance(value, int):  # enum
            value = value.name
        if isinstance(value, (bool, int, float)):
            out[tname] = value
        elif isinstance(value, str):
            if len(value) <= 256:
                out[tname] = value
        elif isinstance(value, tuple) and len(value) <= 16:
            if all(isinstance(v, (int, float)) for v in value):
                out[tname] = tuple(value)
    return out


def _rational(value: Any) -> float | None:
    """EXIF rational (tuple of two ints, or a number) as float."""
    try:
        if isinstance(value, (tuple, list)):
            if len(value) >= 2 and value[1]:
                return float(value[0]) / float(value[1])
            return None
        return float(value)
    except (TypeError, ValueError):
        return None


def _first_int(value: Any) -> int | None:
    try:
        if isinstance(value, (tuple, list)):
            value = value[0]
        return int(value)
    except (TypeError, ValueError, IndexError):
        return None


def _tiff_exif(page: Any) -> tuple[float | None, int | None]:
    """Exposure time and ISO from the Exif IFD or (TIFF/EP) the page IFD."""
    tags = getattr(page, "tags", None)
    if tags is None:
        return None, None
    sources: list[dict] = []
    exif = tags.get("ExifTag")
    if exif is not None and isinstance(exif.value, dict):
        sources.append(exif.value)
    sources.append({t.name: t.value for t in tags.values() if t.code in (0x829A, 0x8827)})
    exposure = iso = None
    for src in sources:
        if exposure is None and "ExposureTime" in src:
            exposure = _rational(src["ExposureTime"])
        for key in ("ISOSpeedRatings", "PhotographicSensitivity"):
            if iso is None and key in src:
                iso = _first_int(src[key])
    return exposure, iso


def _unpack_bits(buf: bytes, height: int, count: int, bits: int) -> np.ndarray:
    """Unpack MSB-first packed unsigned samples (rows padded to whole bytes)."""
    row_bytes = (count * bits + 7) // 8
    rows = np.frombuffer(buf, dtype=np.uint8, count=row_bytes * height).reshape(height, row_bytes)
    padded = np.zeros((height, row_bytes + 2), dtype=np.uint32)
    padded[:, :row_bytes] = rows
    bitpos = np.arange(count, dtype=np.int64) * bits
    j = bitpos // 8
    shift = (24 - bits - (bitpos % 8)).astype(np.uint32)
    word = (padded[:, j] << 16) | (padded[:, j + 1] << 8) | padded[:, j + 2]
    values = (word >> shift) & np.uint32((1 << bits) - 1)
    return values.astype(np.uint16 if bits > 8 else np.uint8)


def _decode_packed_page(tif: Any, page: Any, key: Any, name: str) -> np.ndarray:
    """Decode an uncompressed strip page of 2..16-bit packed samples without extra codecs.

    `page` supplies the data offsets, `key` (its key frame) the image structure.
    """
    bits = int(key.bitspersample)
    spp = int(key.samplesperpixel)
    height, width = int(key.imagelength), int(key.imagewidth)
    if (
        int(key.compression) != 1
        or key.is_tiled
        or not (2 <= bits <= 16)
        or (spp > 1 and int(key.planarconfig) != 1)
        or int(getattr(key, "imagedepth", 1)) != 1
    ):
        raise FringeError(
            f"{name}: {bits}-bit packed TIFF data in this layout needs the optional "
            "'imagecodecs' package"
        )
    fh = tif.filehandle
    chunks = []
    for offset, nbytes in zip(page.dataoffsets, page.databytecounts, strict=False):
        fh.seek(offset)
        chunks.append(fh.read(nbytes))
    buf = b"".join(chunks)
    need = ((width * spp * bits + 7) // 8) * height
    if len(buf) < need:
        raise FringeError(
            f"{name}: pixel data truncated ({len(buf)} of {need} bytes present)"
        )
    values = _unpack_bits(buf, height, width * spp, bits)
    return values.reshape(height, width, spp) if spp > 1 else values


class _TiffSource:
    """Page-by-page access to the first image series of an open TIFF file."""

    def __init__(self, name: str):
        import tifffile

        self.name = name
        self._cache: tuple[int, np.ndarray] | None = None
        self._mmap: np.ndarray | None = None
        try:
            self.tif = tifffile.TiffFile(name, mode="rb")
        except Exception as exc:
            raise FringeError(f"{name}: cannot be read as a TIFF file ({_reason(exc)})") from exc
        try:
            self._layout()
        except FringeError:
            self.close()
            raise
        except Exception as exc:
            self.close()
            raise FringeError(f"{name}: cannot be read as a TIFF file ({_reason(exc)})") from exc

    def _layout(self) -> None:
        name = self.name
        if not self.tif.series:
            raise FringeError(f"{name}: no readable image in the TIFF file (damaged or truncated)")
        series = self.tif.series[0]
        shape, axes = tuple(int(s) for s in series.shape), str(series.axes)
        if axes.endswith(("YXS", "SYX")) and len(shape) >= 3:
            fshape, lead = shape[-3:], shape[:-3]
        elif axes.endswith("YX") and len(shape) >= 2:
            fshape, lead = shape[-2:], shape[:-2]
        else:
            raise FringeError(f"{name}: unsupported TIFF image layout (axes {axes}, shape {shape})")
        self.planar = axes.endswith("SYX")
        if self.planar:
            self.height, self.width = fshape[1], fshape[2]
        else:
            self.height, self.width = fshape[0], fshape[1]
        self.series = series
        self.fshape = fshape
        self.n = int(np.prod(lead)) if lead else 1
        self.pages = series.pages
        npages = len(self.pages)
        per_frame = int(np.prod(fshape))
        self.mode = "whole"
        self.per_page = 1
        if npages == self.n:
            self.mode = "page"
        elif npages > 0 and self.n % npages == 0:
            k = self.n // npages
            first = self.pages[0]
            if first is not None and int(np.prod(first.shape)) == k * per_frame:
                self.mode, self.per_page = "subpage", k
        if self.mode == "whole" and getattr(series, "dataoffset", None) is not None:
            self.mode = "contiguous"
        key = getattr(series, "keyframe", None)
        if key is None:
            key = self.tif.pages[0]
        self.keyframe = key
        self.dtype = np.dtype(series.dtype)
        self.bits_tag = int(getattr(key, "bitspersample", 0) or 0) or None

    def close(self) -> None:
        self._mmap = None
        self._cache = None
        self.tif.close()

    def _page_for(self, i: int) -> Any:
        if self.mode in ("page", "subpage"):
            page = self.pages[i // self.per_page]
            if page is None:
                raise FringeError(f"{self.name}: frame {i} is missing from the file")
            return page
        return self.keyframe

    def _decode(self, page: Any) -> np.ndarray:
        try:
            return page.asarray()
        except NotImplementedError:
            key = getattr(page, "keyframe", None)
            return _decode_packed_page(self.tif, page, page if key is None else key, self.name)

    def raw(self, i: int) -> tuple[np.ndarray, Any]:
        """Stored values of frame `i` (2-D, or 3-D with samples last) and its page."""
        page = self._page_for(i)
        try:
            if self.mode == "page":
                arr = self._decode(page).reshape(self.fshape)
            elif self.mode == "subpage":
                pidx = i // self.per_page
                if self._cache is None or self._cache[0] != pidx:
                    self._cache = (pidx, self._decode(page).reshape((self.per_page,) + self.fshape))
                arr = self._cache[1][i % self.per_page]
            elif self.mode == "contiguous":
                if self._mmap is None:
                    stored = self.dtype.newbyteorder(self.tif.byteorder)
                    self._mmap = np.memmap(
                        self.name,
                        dtype=stored,
                        mode="r",
                        offset=int(self.series.dataoffset),
                        shape=(self.n,) + self.fshape,
                    )
                arr = np.array(self._mmap[i], dtype=self.dtype.newbyteorder("="))
            else:
                if self._cache is None:
                    whole = np.asarray(self.series.asarray())
                    self._cache = (-1, whole.reshape((self.n,) + self.fshape))
                arr = self._cache[1][i]
        except FringeError:
            raise
        except Exception as exc:
            raise FringeError(
                f"{self.name}: frame {i} cannot be decoded ({_reason(exc)})"
            ) from exc
        if self.planar:
            arr = np.moveaxis(arr, 0, -1)
        return arr, page

    def frame(self, i: int, *, channel: str, srgb: Any, max_pixels: int | None,
              margin: float) -> Frame:
        name = self.name
        _check_size(name, self.width, self.height, max_pixels)
        bit_depth, full_scale = _stored_scale(name, self.dtype, self.bits_tag)
        raw, page = self.raw(i)
        tag_page = page if getattr(page, "tags", None) is not None else self.keyframe
        exposure, iso = _tiff_exif(tag_page)
        extra = {
            "exposure_s": exposure,
            "iso": iso,
            "tiff_tags": _simple_tags(tag_page),
            "bigtiff": bool(self.tif.is_bigtiff),
        }
        return _to_frame(
            raw,
            name=name,
            index=i,
            fmt="tiff",
            n_frames=self.n,
            bit_depth=bit_depth,
            full_scale=full_scale,
            channel=channel,
            srgb=_decide_srgb(srgb, "tiff", bit_depth),
            margin=margin,
            extra=extra,
        )


# --------------------------------------------------------------------------------------------
# PNG and JPEG
# --------------------------------------------------------------------------------------------


def _png_size(buf: bytes, name: str) -> tuple[int, int]:
    if len(buf) < 24 or buf[12:16] != b"IHDR":
        raise FringeError(f"{name}: cannot be read as an image (PNG header is damaged)")
    width, height = struct.unpack(">II", buf[16:24])
    return width, height


_SOF_MARKERS = frozenset(range(0xC0, 0xD0)) - {0xC4, 0xC8, 0xCC}


def _jpeg_scan(buf: bytes, name: str) -> tuple[int, int, bytes | None]:
    """Width, height and the EXIF TIFF block (or None) from JPEG markers before the scan."""
    pos, size = 2, None
    exif: bytes | None = None
    n = len(buf)
    while pos + 4 <= n:
        if buf[pos] != 0xFF:
            break
        marker = buf[pos + 1]
        if marker == 0xFF:
            pos += 1
            continue
        if marker == 0x01 or 0xD0 <= marker <= 0xD8:
            pos += 2
            continue
        if marker in (0xD9, 0xDA):
            break
        (seglen,) = struct.unpack(">H", buf[pos + 2 : pos + 4])
        seg = buf[pos + 4 : pos + 2 + seglen]
        if marker == 0xE1 and exif is None and seg.startswith(b"Exif\x00\x00"):
            exif = seg[6:]
        elif marker in _SOF_MARKERS and len(seg) >= 6 and size is None:
            height, width = struct.unpack(">HH", seg[1:5])
            size = (width, height)
        pos += 2 + seglen
    if size is None:
        raise FringeError(f"{name}: cannot be read as an image (no JPEG frame header found)")
    return size[0], size[1], exif


def _parse_exif(block: bytes | None) -> tuple[float | None, int | None]:
    """ExposureTime (0x829A) and ISOSpeedRatings (0x8827) from an EXIF TIFF block."""
    if not block or len(block) < 8:
        return None, None
    try:
        if block[:2] == b"II":
            bo = "<"
        elif block[:2] == b"MM":
            bo = ">"
        else:
            return None, None
        if struct.unpack(bo + "H", block[2:4])[0] != 42:
            return None, None
        sizes = {1: 1, 2: 1, 3: 2, 4: 4, 5: 8, 7: 1, 9: 4, 10: 8}

        def entries(offset: int) -> dict[int, tuple[int, int, int]]:
            (count,) = struct.unpack(bo + "H", block[offset : offset + 2])
            out = {}
            for k in range(min(count, 512)):
                e = offset + 2 + 12 * k
                tag, typ, cnt = struct.unpack(bo + "HHI", block[e : e + 8])
                nbytes = sizes.get(typ, 1) * cnt
                voff = e + 8 if nbytes <= 4 else struct.unpack(bo + "I", block[e + 8 : e + 12])[0]
                out[tag] = (typ, cnt, voff)
            return out

        def value(entry: tuple[int, int, int]) -> float | int | None:
            typ, _cnt, voff = entry
            if typ in (5, 10):
                num, den = struct.unpack(bo + ("II" if typ == 5 else "ii"), block[voff : voff + 8])
                return num / den if den else None
            if typ == 3:
                return struct.unpack(bo + "H", block[voff : voff + 2])[0]
            if typ in (4, 9):
                return struct.unpack(bo + ("I" if typ == 4 else "i"), block[voff : voff + 4])[0]
            return None

        (ifd0,) = struct.unpack(bo + "I", block[4:8])
        top = entries(ifd0)
        found = dict(top)
        if 0x8769 in top:
            exif_off = value(top[0x8769])
            if isinstance(exif_off, int):
                found.update(entries(exif_off))
        exposure = value(found[0x829A]) if 0x829A in found else None
        iso = value(found[0x8827]) if 0x8827 in found else None
        return (None if exposure is None else float(exposure)), (
            None if iso is None else int(iso)
        )
    except (struct.error, IndexError, ValueError, ZeroDivisionError):
        return None, None


def _read_raster(name: str, fmt: str, *, channel: str, srgb: Any, max_pixels: int | None,
                 margin: float) -> Frame:
    """Read a PNG or JPEG file with OpenCV."""
    import cv2

    try:
        with open(name, "rb") as fh:
            buf = fh.read()
    except OSError as exc:
        raise FringeError(f"{name}: cannot be opened ({exc.strerror or _reason(exc)})") from exc
    exposure = iso = None
    if fmt == "png":
        width, height = _png_size(buf, name)
    else:
        width, height, exif = _jpeg_scan(buf, name)
        exposure, iso = _parse_exif(exif)
    _check_size(name, width, height, max_pixels)
    try:
        img = cv2.imdecode(np.frombuffer(buf, dtype=np.uint8), cv2.IMREAD_UNCHANGED)
    except Exception as exc:
        raise FringeError(f"{name}: cannot be read as an image ({_reason(exc)})") from exc
    if img is None:
        raise FringeError(
            f"{name}: cannot be read as an image (the {fmt.upper()} decoder failed: "
            "damaged or unsupported file)"
        )
    if img.ndim == 3 and img.shape[2] >= 3:
        img = img[..., 2::-1]  # BGR(A) -> RGB
    bit_depth, full_scale = _stored_scale(name, img.dtype, None)
    return _to_frame(
        img,
        name=name,
        index=0,
        fmt=fmt,
        n_frames=1,
        bit_depth=bit_depth,
        full_scale=full_scale,
        channel=channel,
        srgb=_decide_srgb(srgb, fmt, bit_depth),
        margin=margin,
        extra={"exposure_s": exposure, "iso": iso},
    )


# --------------------------------------------------------------------------------------------
# public readers
# --------------------------------------------------------------------------------------------


def count_frames(path: str | os.PathLike) -> int:
    """Number of frames in an image file without decoding any pixel data.

    Parameters
    ----------
    path : str or path-like
        TIFF, PNG or JPEG file.

    Returns
    -------
    int
        Frames in the first image series of a TIFF file; 1 for PNG and JPEG.

    Raises
    ------
    FringeError
        Missing, empty or unreadable file.
    """
    name, fmt = _sniff(path)
    if fmt != "tiff":
        return 1
    src = _TiffSource(name)
    try:
        return src.n
    finally:
        src.close()


def iter_frames(
    path: str | os.PathLike,
    *,
    channel: str = "auto",
    srgb: str | bool = "auto",
    max_pixels: int | None = DEFAULT_MAX_PIXELS,
    saturation_margin: float = SATURATION_MARGIN,
) -> Iterator[Frame]:
    """Iterate over the frames of an image file, one page at a time.

    Parameters
    ----------
    path : str or path-like
        TIFF (single page, multi-page stack or BigTIFF), PNG or JPEG file.
    channel : {"auto", "luma", "red", "green", "blue"}
        Channel of colour images; ignored for mono images. ``"luma"`` is the Rec. 709
        weighting 0.2126 R + 0.7152 G + 0.0722 B of linear values. ``"auto"`` picks the
        channel with the strongest unsaturated fringe signal (see Notes).
    srgb : {"auto", True, False}
        Decode the sRGB transfer function. ``"auto"`` decodes 8-bit PNG and JPEG only.
    max_pixels : int or None
        Largest frame size (pixels) accepted; checked before decoding. None disables it.
    saturation_margin : float
        Stored values ``>= full_scale * (1 - saturation_margin)`` count as saturated.

    Yields
    ------
    Frame
        One frame per page (or per plane of a multi-plane page).

    Raises
    ------
    FringeError
        Missing, empty, unrecognised, truncated or undecodable file, absurd declared size,
        image smaller than 2 x 2 pixels, or unsupported pixel type. Raised by this call for
        problems found before the first frame, otherwise while iterating.

    Notes
    -----
    A TIFF file stays open only while the iterator runs and each page is decoded on demand,
    so stacks larger than memory can be streamed.

    Automatic channel choice: for each of R, G, B the linear channel, with saturated pixels
    replaced by its median, is mean-subtracted, Hann-windowed and Fourier transformed. The
    score is

    .. math:: s = \\frac{\\max_{|f| \\ge 2/\\min(H, W)} |G(f)|^2}
                     {\\operatorname{median}_{|f| \\ge 2/\\min(H, W)} |G(f)|^2} \\, (1 - q)

    with :math:`q` the saturated fraction of that channel; the largest score wins. Images
    above 4 Mpx are scored on a strided copy. A pixel is flagged saturated when any channel
    is, because demosaicing spreads clipping from one channel into its neighbours.

    References
    ----------
    .. [1] ITU-R Recommendation BT.709-6 (2015), Parameter values for the HDTV standards,
       item 3.2 (luma coefficients).
    .. [2] IEC 61966-2-1:1999, Default RGB colour space - sRGB.
    """
    name, fmt = _sniff(path)
    _check_options(name, channel, srgb, max_pixels, saturation_margin)
    opts = {"channel": channel, "srgb": srgb, "max_pixels": max_pixels,
            "margin": float(saturation_margin)}
    if fmt != "tiff":
        return _single(_read_raster(name, fmt, **opts))
    _TiffSource(name).close()  # refuse unreadable files now, not at the first next()
    return _tiff_iter(name, opts)


def _single(frame: Frame) -> Iterator[Frame]:
    yield frame


def _tiff_iter(name: str, opts: dict) -> Iterator[Frame]:
    src = _TiffSource(name)
    try:
        for i in range(src.n):
            yield src.frame(i, **opts)
    finally:
        src.close()


def read_frame(
    path: str | os.PathLike,
    index: int = 0,
    *,
    channel: str = "auto",
    srgb: str | bool = "auto",
    max_pixels: int | None = DEFAULT_MAX_PIXELS,
    saturation_margin: float = SATURATION_MARGIN,
) -> Frame:
    """Read one frame of an image file.

    Parameters
    ----------
    path : str or path-like
        TIFF, PNG or JPEG file.
    index : int
        Frame index, ``0 <= index < count_frames(path)``. Only that page is decoded.
    channel, srgb, max_pixels, saturation_margin
        As for :func:`iter_frames`.

    Returns
    -------
    Frame
        The requested frame.

    Raises
    ------
    FringeError
        As for :func:`iter_frames`, or `index` out of range.
    """
    name, fmt = _sniff(path)
    _check_options(name, channel, srgb, max_pixels, saturation_margin)
    opts = {"channel": channel, "srgb": srgb, "max_pixels": max_pixels,
            "margin": float(saturation_margin)}
    if fmt != "tiff":
        if index != 0:
            raise FringeError(f"{name}: frame {index} requested but the file holds 1 frame")
        return _read_raster(name, fmt, **opts)
    src = _TiffSource(name)
    try:
        if not (0 <= int(index) < src.n):
            raise FringeError(
                f"{name}: frame {index} requested but the file holds {src.n} frame"
                + ("s" if src.n != 1 else "")
            )
        return src.frame(int(index), **opts)
    finally:
        src.close()


def frame_from_array(
    array: np.ndarray,
    *,
    channel: str = "auto",
    srgb: bool = False,
    full_scale: float | None = None,
    name: str = "<array>",
    saturation_margin: float = SATURATION_MARGIN,
) -> Frame:
    """Wrap an in-memory image as a :class:`Frame`.

    Parameters
    ----------
    array : array_like, shape (H, W) or (H, W, 3|4)
        Mono or RGB(A) stored values. Not modified; the frame holds a new array.
    channel : {"auto", "luma", "red", "green", "blue"}
        As for :func:`iter_frames`.
    srgb : bool
        Decode the sRGB transfer function, with ``V = value / full_scale``.
    full_scale : float or None
        Saturation level in stored units. Default: the dtype maximum for integers, none
        (no saturation test) for floating data.
    name : str
        Name used in messages and in ``Frame.file``.
    saturation_margin : float
        As for :func:`iter_frames`.

    Returns
    -------
    Frame
        Frame with ``meta["format"] == "array"``.

    Examples
    --------
    >>> import numpy as np
    >>> f = frame_from_array(np.array([[0, 255], [10, 20]], dtype=np.uint8))
    >>> f.meta["full_scale"], bool(f.saturated[0, 1]), f.data.dtype.name
    (255.0, True, 'float64')
    """
    _check_options(name, channel, srgb, None, saturation_margin)
    if srgb == "auto":
        raise FringeError(f"{name}: srgb must be True or False for in-memory arrays")
    arr = np.asarray(array)
    bits, scale = _stored_scale(name, arr.dtype, None)
    if full_scale is not None:
        scale = float(full_scale)
        b = math.log2(scale + 1.0) if scale > 0 else 0.0
        bits = int(round(b)) if arr.dtype.kind in "ui" and abs(b - round(b)) < 1e-9 else None
    return _to_frame(
        arr,
        name=name,
        index=0,
        fmt="array",
        n_frames=1,
        bit_depth=bits,
        full_scale=scale,
        channel=channel,
        srgb=bool(srgb),
        margin=float(saturation_margin),
    )


def _read_stack(paths: Sequence[str | os.PathLike] | str | os.PathLike,
                **opts: Any) -> tuple[np.ndarray, list[dict]]:
    """Frames of several files as one (N, H, W) array plus per-frame metadata."""
    if isinstance(paths, (str, bytes, os.PathLike)):
        paths = [paths]
    paths = list(paths)
    if not paths:
        raise FringeError("no image files given")
    counts = [(p, count_frames(p)) for p in paths]
    total = sum(c for _p, c in counts)
    stack: np.ndarray | None = None
    metas: list[dict] = []
    first = ""
    k = 0
    for p, _c in counts:
        for fr in iter_frames(p, **opts):
            if stack is None:
                stack = np.empty((total,) + fr.data.shape, dtype=np.float64)
                first = fr.file
            elif fr.data.shape != stack.shape[1:]:
                raise FringeError(
                    f"{fr.file}: frame {fr.index} has shape {fr.data.shape}, which does not "
                    f"match shape {stack.shape[1:]} of {first}"
                )
            stack[k] = fr.data
            metas.append(dict(fr.meta, file=fr.file, index=fr.index,
                              saturated_count=int(np.count_nonzero(fr.saturated))))
            k += 1
    assert stack is not None
    return stack[:k], metas


def read_stack(paths: Sequence[str | os.PathLike], **opts: Any) -> np.ndarray:
    """Read all frames of all files into one array (for dark and flat masters).

    Parameters
    ----------
    paths : sequence of str or path-like
        Image files; a single path is accepted too.
    **opts
        ``channel``, ``srgb``, ``max_pixels``, ``saturation_margin`` as for
        :func:`iter_frames`.

    Returns
    -------
    ndarray, shape (N, H, W), float64
        Frames in file order, then page order.

    Raises
    ------
    FringeError
        No paths, unreadable files, or frames whose shapes differ (naming the file).
    """
    return _read_stack(paths, **opts)[0]
