"""Command line: output formats, exit codes and the bad-input corpus.

Every bad input gives a one-line error naming the file, exit status 1 and no traceback;
good inputs given alongside are still measured; input files are never written to
(SHA-256 compared before and after).
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import struct
from pathlib import Path

import numpy as np
import pytest
import tifffile

import fringe
from fringe._util import FringeError
from fringe.cli import main
from fringe.synth import render_fringes


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture()
def good(tmp_path) -> Path:
    rng = np.random.default_rng(0)
    img = render_fringes((64, 80), period_px=8.0, orientation_deg=20.0, visibility=0.5,
                         mean=1000.0) + rng.normal(0, 5, (64, 80))
    p = tmp_path / "good.tif"
    tifffile.imwrite(p, img.astype(np.uint16))
    return p


def _absurd_tiff(path: Path) -> None:
    """A minimal little-endian TIFF whose header declares 100000 x 100000 pixels."""
    entries = [(256, 4, 1, 100000), (257, 4, 1, 100000), (258, 3, 1, 16), (259, 3, 1, 1),
               (262, 3, 1, 1), (273, 4, 1, 8), (277, 3, 1, 1), (278, 4, 1, 100000),
               (279, 4, 1, 2 * 10**10 % 2**32)]
    ifd = struct.pack("<H", len(entries))
    for tag, typ, count, value in entries:
        if typ == 3:
            ifd += struct.pack("<HHIHH", tag, typ, count, value, 0)
        else:
            ifd += struct.pack("<HHII", tag, typ, count, value)
    ifd += struct.pack("<I", 0)
    path.write_bytes(b"II*\x00" + struct.pack("<I", 8) + ifd + b"\x00" * 64)


def _corpus(d: Path) -> dict[str, Path]:
    """The bad-input corpus, written fresh for each test."""
    files = {}
    src = d / "src.tif"
    tifffile.imwrite(src, (np.arange(64 * 80, dtype=np.uint16) % 4096).reshape(64, 80))
    raw = src.read_bytes()
    files["truncated"] = d / "truncated.tif"
    files["truncated"].write_bytes(raw[: len(raw) // 2])
    files["zero_bytes"] = d / "zero.tif"
    files["zero_bytes"].write_bytes(b"")
    files["text"] = d / "text.tif"
    files["text"].write_text("this is a text file, not an image\n")
    for name, arr in {
        "all_zero": np.zeros((64, 64), np.uint16),
        "uniform": np.full((64, 64), 1234, np.uint16),
        "saturated": np.full((64, 64), 65535, np.uint16),
        "nan": np.full((64, 64), np.nan, np.float32),
        "inf": np.full((64, 64), np.inf, np.float64),
        "one_pixel": np.zeros((1, 1), np.uint16),
    }.items():
        files[name] = d / f"{name}.tif"
        tifffile.imwrite(files[name], arr)
    files["absurd"] = d / "absurd.tif"
    _absurd_tiff(files["absurd"])
    files["missing"] = d / "does-not-exist.tif"
    return files


def _run(argv, capsys):
    rc = main([str(a) for a in argv])
    cap = capsys.readouterr()
    return rc, cap.out, cap.err


@pytest.mark.parametrize("case", ["truncated", "zero_bytes", "text", "all_zero", "uniform",
                                  "saturated", "nan", "inf", "one_pixel", "absurd", "missing"])
def test_bad_input_corpus(tmp_path, good, capsys, case):
    files = _corpus(tmp_path)
    bad = files[case]
    before = {p: _sha(p) for p in [*files.values(), good] if p.exists()}
    rc, out, err = _run(["measure", bad, good, "--format", "json"], capsys)
    assert rc == 1
    assert "Traceback" not in err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert lines, "an error line is expected"
    assert all(bad.name in ln for ln in lines), lines
    records = [json.loads(ln) for ln in out.splitlines()]
    by_file = {Path(r["file"]).name: r for r in records}
    assert by_file[good.name]["status"] == "ok"  # the good input is still measured
    assert by_file[bad.name]["status"] == "error"
    after = {p: _sha(p) for p in before}
    assert before == after  # inputs never written to


def test_absurd_dimensions_guard_can_be_raised(tmp_path, capsys):
    files = _corpus(tmp_path)
    rc, _, err = _run(["measure", files["absurd"]], capsys)
    assert rc == 1 and "--max-pixels" in err
    rc, _, err = _run(["measure", files["absurd"], "--max-pixels", "2e10"], capsys)
    assert rc == 1 and "Traceback" not in err  # passes the guard, then fails to decode


def test_wrong_shape_dark_and_flat(tmp_path, good, capsys):
    small = tmp_path / "small.tif"
    tifffile.imwrite(small, np.full((32, 32), 900, np.uint16))
    for opt in ("--dark", "--flat"):
        rc, _, err = _run(["measure", good, opt, small], capsys)
        assert rc == 1
        assert "small.tif" in err and "(32, 32)" in err and "(64, 80)" in err


def test_mismatched_bit_depth(tmp_path, good, capsys):
    d8 = tmp_path / "dark8.tif"
    tifffile.imwrite(d8, np.zeros((64, 80), np.uint8))
    rc, _, err = _run(["measure", good, "--dark", d8], capsys)
    assert rc == 1 and "bit depth 8" in err and "dark8.tif" in err


def test_unwritable_output(tmp_path, good, capsys):
    rc, _, err = _run(["measure", good, "-o", tmp_path / "no" / "such" / "dir" / "x.csv"],
                      capsys)
    assert rc == 1 and "cannot write" in err and "Traceback" not in err


def test_usage_errors_exit_2(capsys):
    assert main(["measure"]) == 2
    assert main(["measure", "--roi", "1", "2"]) == 2
    assert main(["measure", "x.tif", "--format", "xml"]) == 2
    assert main(["--version"]) == 0
    err = capsys.readouterr().err
    assert "Traceback" not in err


def test_formats(tmp_path, good, capsys):
    rc, out, _ = _run(["measure", good], capsys)
    assert rc == 0 and "period (px)" in out and "±" in out
    rc, out, _ = _run(["measure", good, "--format", "csv"], capsys)
    rows = list(csv.DictReader(io.StringIO(out)))
    assert rc == 0 and rows[0]["status"] == "ok" and float(rows[0]["period_px"]) > 0
    assert "period_px_err" in rows[0]
    rc, out, _ = _run(["measure", good, "--format", "json"], capsys)
    rec = json.loads(out.splitlines()[0])
    for key in ("orientation_deg", "period_px", "phase_rad", "visibility", "visibility_raw"):
        assert rec[key] is not None and rec[key + "_err"] is not None
    for key in ("file", "frame", "status", "error", "warnings", "snr", "saturated_fraction"):
        assert key in rec


def test_roi_option(good, capsys):
    rc, out, _ = _run(["measure", good, "--roi", "8", "8", "48", "40", "--format", "json"],
                      capsys)
    assert rc == 0 and json.loads(out)["status"] == "ok"
    rc, _, err = _run(["measure", good, "--roi", "50", "50", "48", "40"], capsys)
    assert rc == 1 and "does not fit" in err


def test_python_api_errors(tmp_path):
    files = _corpus(tmp_path)
    with pytest.raises(FringeError, match="truncated.tif"):
        fringe.measure(files["truncated"])
    with pytest.raises(FringeError, match="does-not-exist.tif"):
        fringe.measure(files["missing"])
    with pytest.raises(FringeError, match="shape"):
        fringe.measure(np.zeros((4, 64, 64, 2)))  # 4-D: not an image
    r = fringe.measure(files["uniform"])
    assert r.status == "error" and "uniform" in r.error


def test_calib_commands(tmp_path, capsys):
    from fringe.synth import camera

    rng = np.random.default_rng(3)
    darks, flats = [], []
    for i in range(3):
        p = tmp_path / f"d{i}.tif"
        tifffile.imwrite(p, camera(np.zeros((48, 64)), rng=rng, offset_dn=100.0))
        darks.append(p)
        q = tmp_path / f"f{i}.tif"
        tifffile.imwrite(q, camera(np.full((48, 64), 4000.0), rng=rng, offset_dn=100.0))
        flats.append(q)
    rc, out, _ = _run(["calib", "dark", *darks, "-o", tmp_path / "md.tif"], capsys)
    assert rc == 0 and (tmp_path / "md.tif").is_file()
    rc, out, _ = _run(["calib", "flat", *flats, "--dark", darks[0], "-o",
                       tmp_path / "mf.tif"], capsys)
    assert rc == 0
    flat = tifffile.imread(tmp_path / "mf.tif")
    assert abs(float(flat.mean()) - 1.0) < 1e-6  # unit mean (ccdproc-style normalisation)
    rc, out, err = _run(["calib", "dark", tmp_path / "nope.tif", "-o", tmp_path / "x.tif"],
                        capsys)
    assert rc == 1 and "nope.tif" in err
