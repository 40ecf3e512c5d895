"""Tests for fringe.batch: streaming batch runs, resume, bad frames, summaries and Dask."""

from __future__ import annotations

import argparse
import csv
import hashlib
import io as _stdio
import json
import os
import signal
import struct
import sys
import threading
from pathlib import Path

import cv2
import numpy as np
import pytest
import tifffile

from fringe import batch
from fringe._util import FringeError
from fringe.synth import phase_drift_stack, render_fringes

# --------------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------------

SHAPE = (64, 64)
PERIOD = 9.0
ORIENT = 25.0
DRIFT = 0.9  # rad per frame: below pi, so the unwrapping is unambiguous


def cli(argv: list[str]) -> tuple[int, str, str]:
    parser = argparse.ArgumentParser()
    sub = parser.add_subparsers(dest="command")
    batch.add_parser(sub)
    args = parser.parse_args(["batch", *argv])
    out, err = _stdio.StringIO(), _stdio.StringIO()
    rc = batch.run(args, out, err)
    return rc, out.getvalue(), err.getvalue()


def drift_stack(n: int = 12, seed: int = 3, jitter: float = 0.05):
    return phase_drift_stack(n, SHAPE, period_px=PERIOD, orientation_deg=ORIENT,
                             visibility=0.7, drift_rad_per_frame=DRIFT, jitter_rad=jitter,
                             rng=np.random.default_rng(seed), mean_e=3000.0)


def write_stack(path: Path, stack: np.ndarray, *, bigtiff: bool = False,
                description: str | None = None) -> Path:
    """Multi-page TIFF written page by page (one series of uniform pages)."""
    with tifffile.TiffWriter(path, bigtiff=bigtiff) as tw:
        for k, page in enumerate(stack):
            tw.write(page, contiguous=False, metadata=None,
                     description=description if k == 0 else None)
    return path


def read_csv(path: Path) -> list[dict]:
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def assert_same_rows(a: list[dict], b: list[dict], rtol: float = 1e-9) -> None:
    """Same rows, text fields equal and numbers equal to `rtol` (BLAS threading may differ
    between processes and change the last bits of a least-squares solve)."""
    assert [r.keys() for r in a] == [r.keys() for r in b]
    for ra, rb in zip(a, b, strict=True):
        for key, va in ra.items():
            vb = rb[key]
            try:
                fa, fb = float(va), float(vb)
            except ValueError:
                assert va == vb, key
            else:
                assert fa == pytest.approx(fb, rel=rtol, abs=1e-12), key


def sha256(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


@pytest.fixture(scope="module")
def stack_file(tmp_path_factory) -> tuple[Path, np.ndarray]:
    d = tmp_path_factory.mktemp("stack")
    st, phases = drift_stack()
    path = write_stack(d / "drift.tif", st, bigtiff=True,
                       description=json.dumps({"frame_interval_s": 0.5}))
    return path, phases


@pytest.fixture(scope="module")
def full_table(stack_file, tmp_path_factory) -> Path:
    """The table of an uninterrupted in-process run over `stack_file` (do not modify)."""
    path, _ = stack_file
    out = tmp_path_factory.mktemp("full") / "r.csv"
    rc, text, err = cli([str(path), "--out", str(out), "--workers", "1"])
    assert rc == 0, err
    return out


# --------------------------------------------------------------------------------------------
# pure functions
# --------------------------------------------------------------------------------------------


def test_unwrapper_matches_numpy_unwrap_and_resumes():
    rng = np.random.default_rng(7)
    true = np.cumsum(rng.uniform(-3.0, 3.0, 200))  # steps below pi
    wrapped = np.angle(np.exp(1j * true))
    # Reference: numpy.unwrap (discont = pi), the same rule applied to the whole series.
    ref = np.unwrap(wrapped)
    u = batch.PhaseUnwrapper()
    got = np.array([u.push(p) for p in wrapped])
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-9)
    # Resuming from a stored (wrapped, unwrapped) pair continues identically.
    u2 = batch.PhaseUnwrapper.resume_from(wrapped[99], got[99])
    cont = np.array([u2.push(p) for p in wrapped[100:]])
    np.testing.assert_array_equal(cont, got[100:])


def test_drift_fit_against_numpy_polyfit():
    rng = np.random.default_rng(11)
    x = np.arange(40.0)
    sigma = rng.uniform(0.01, 0.03, x.size)
    y = 0.3 + 0.05 * x + rng.normal(0, 0.2, x.size)  # scatter far above sigma: chi2_red >> 1
    x0, y0, s0 = x.copy(), y.copy(), sigma.copy()
    fit = batch.drift_fit(x, y, sigma_rad=sigma)
    # Reference: numpy.polyfit with w = 1/sigma; cov=True scales by chi2/(N - 2), which is
    # the Birge-ratio scaling applied when the scatter exceeds the stated uncertainties
    # (Bevington & Robinson, Data Reduction and Error Analysis, 3rd ed., 2003, ch. 6).
    coef, cov = np.polyfit(x, y, 1, w=1 / sigma, cov=True)
    assert fit.chi2_red > 1
    np.testing.assert_allclose([fit.slope, fit.intercept], coef, rtol=1e-10)
    np.testing.assert_allclose([fit.slope_err, fit.intercept_err], np.sqrt(np.diag(cov)),
                               rtol=1e-8)
    np.testing.assert_allclose(fit.residuals, y - np.polyval(coef, x), atol=1e-12)
    # Inputs are not modified.
    np.testing.assert_array_equal(x, x0)
    np.testing.assert_array_equal(y, y0)
    np.testing.assert_array_equal(sigma, s0)

    # Scatter below the stated uncertainties: the unscaled covariance stands.
    y2 = 0.3 + 0.05 * x + rng.normal(0, 0.001, x.size)
    fit2 = batch.drift_fit(x, y2, sigma_rad=sigma)
    coef2, cov2 = np.polyfit(x, y2, 1, w=1 / sigma, cov="unscaled")
    assert fit2.chi2_red < 1
    np.testing.assert_allclose(fit2.slope, coef2[0], rtol=1e-10)
    np.testing.assert_allclose(fit2.slope_err, np.sqrt(cov2[0, 0]), rtol=1e-8)

    # Without uncertainties: equal weights, covariance scaled by chi2 / (N - 2).
    fit3 = batch.drift_fit(x, y)
    coef3, cov3 = np.polyfit(x, y, 1, cov=True)
    np.testing.assert_allclose([fit3.slope, fit3.slope_err], [coef3[0], np.sqrt(cov3[0, 0])],
                               rtol=1e-8)
    assert not fit3.weighted

    with pytest.raises(FringeError, match="at least 2"):
        batch.drift_fit([1.0], [2.0])


def test_stack_summary_against_references():
    rng = np.random.default_rng(5)
    n = 60
    pos = np.arange(n)
    phase = 1.0 + 0.12 * pos + rng.normal(0, 0.04, n)
    perr = np.full(n, 0.01)
    period = 12.0 + rng.normal(0, 0.01, n)
    vis = 0.8 + rng.normal(0, 0.005, n)
    vis[[17, 41]] = [0.6, 0.7]  # two misaligned frames
    verr = np.full(n, 0.002)
    copies = [a.copy() for a in (pos, period, vis, phase, perr, verr)]
    s = batch.stack_summary(pos, period, vis, phase, phase_err_rad=perr, visibility_err=verr,
                            frame_interval_s=0.25)
    for a, c in zip((pos, period, vis, phase, perr, verr), copies, strict=True):
        np.testing.assert_array_equal(a, c)  # inputs untouched

    # Reference: numpy.polyfit on the same series (chi2_red > 1 here, so cov=True applies).
    coef, cov = np.polyfit(pos, phase, 1, w=1 / perr, cov=True)
    assert s["phase_drift_rad_per_frame"] == pytest.approx(coef[0], rel=1e-10)
    assert s["phase_drift_rad_per_frame_err"] == pytest.approx(np.sqrt(cov[0, 0]), rel=1e-8)
    assert s["phase_drift_rad_per_s"] == pytest.approx(coef[0] / 0.25, rel=1e-10)
    assert s["phase_drift_waves_per_s"] == pytest.approx(coef[0] / 0.25 / (2 * np.pi),
                                                         rel=1e-10)
    resid = phase - np.polyval(coef, pos)
    assert s["phase_jitter_rms_rad"] == pytest.approx(np.sqrt(np.mean(resid**2)), rel=1e-9)
    assert s["phase_jitter_rms_waves"] == pytest.approx(s["phase_jitter_rms_rad"] / (2 * np.pi))
    assert s["phase_ptp_waves"] == pytest.approx(np.ptp(phase) / (2 * np.pi), rel=1e-12)
    assert s["phase_residual_ptp_waves"] == pytest.approx(np.ptp(resid) / (2 * np.pi), rel=1e-9)
    # The true drift and jitter are recovered (values of the generator above).
    assert abs(s["phase_drift_rad_per_frame"] - 0.12) < 4 * s["phase_drift_rad_per_frame_err"]
    assert s["phase_jitter_rms_rad"] == pytest.approx(0.04, rel=0.25)
    # Spread: sample mean and standard deviation (ddof = 1).
    assert s["period_px_mean"] == pytest.approx(np.mean(period))
    assert s["period_px_std"] == pytest.approx(np.std(period, ddof=1))
    assert s["visibility_std"] == pytest.approx(np.std(vis, ddof=1))
    # Drops: median - 3 x 1.4826 MAD (Hampel 1974; scipy's median_abs_deviation with
    # scale="normal" is the reference implementation of the same estimator).
    from scipy.stats import median_abs_deviation

    thr = np.median(vis) - 3 * median_abs_deviation(vis, scale="normal")
    assert s["visibility_drop_threshold"] == pytest.approx(thr, rel=1e-9)
    assert s["visibility_drop_frames"] == [17, 41]
    # Relative rule: below (1 - f) x median.
    s2 = batch.stack_summary(pos, period, vis, phase, drop_fraction=0.2)
    assert s2["visibility_drop_frames"] == [17]
    assert s2["visibility_drop_threshold"] == pytest.approx(0.8 * np.median(vis))


def test_stack_summary_small_and_noise_free():
    # Noise-free visibilities (MAD = 0): nothing flagged thanks to the uncertainty floor.
    s = batch.stack_summary([0, 1, 2, 3], [10.0] * 4, [0.5, 0.5, 0.5, 0.4999],
                            [0.0, 0.1, 0.2, 0.3], visibility_err=[0.001] * 4)
    assert s["visibility_drop_frames"] == []
    one = batch.stack_summary([0], [10.0], [0.5], [0.3])
    assert one["phase_drift_rad_per_frame"] is None and one["period_px_std"] is None
    with pytest.raises(FringeError, match="drop_fraction"):
        batch.stack_summary([0], [1.0], [0.5], [0.0], drop_fraction=1.5)


def test_expand_inputs_folders_globs_and_problems(tmp_path):
    d = tmp_path / "caps"
    d.mkdir()
    for name in ("b.png", "a.tif", "c.TIFF", "notes.txt", ".hidden.tif"):
        (d / name).write_bytes(b"x")
    (d / "sub").mkdir()
    (d / "sub" / "z.jpg").write_bytes(b"x")
    files, problems = batch.expand_inputs([str(d)])
    assert [os.path.basename(f) for f in files] == ["a.tif", "b.png", "c.TIFF"]  # sorted
    assert problems == []
    files, problems = batch.expand_inputs([str(d / "*.png"), str(d / "**" / "*.jpg"),
                                           str(d / "a.tif"), str(d / "b.png")])
    assert [os.path.basename(f) for f in files] == ["b.png", "z.jpg", "a.tif"]  # each once
    files, problems = batch.expand_inputs([str(d / "*.bmp"), str(tmp_path / "nope.tif"),
                                           str(d / "sub")])
    assert [os.path.basename(f) for f in files] == ["z.jpg"]
    assert len(problems) == 2
    assert "nope.tif: no such file or folder" in problems[1]
    assert "no image files match" in problems[0]


# --------------------------------------------------------------------------------------------
# the batch run
# --------------------------------------------------------------------------------------------


def test_phase_drift_recovered_from_stack(stack_file, full_table):
    path, phases = stack_file
    out = full_table
    rows = read_csv(out)
    assert [int(r["frame"]) for r in rows] == list(range(len(phases)))
    assert all(r["status"] == "ok" for r in rows)
    unwrapped = np.array([float(r["phase_unwrapped_rad"]) for r in rows])
    err_phase = np.array([float(r["phase_rad_err"]) for r in rows])
    # The generator's phases are exact (fringe.synth.phase_drift_stack); the unwrapped
    # phase follows them through several turns (DRIFT x 11 frames = 9.9 rad).
    offset = 2 * np.pi * np.round((unwrapped[0] - phases[0]) / (2 * np.pi))
    np.testing.assert_allclose(unwrapped - offset, phases, atol=max(0.01, 6 * err_phase.max()))
    # Reference for the summary: numpy.polyfit on the table's own unwrapped phases.
    doc = json.loads(out.with_suffix(".summary.json").read_text())
    s = doc["stacks"][0]
    coef, cov = np.polyfit(np.arange(len(rows)), unwrapped, 1, w=1 / err_phase, cov=True)
    assert s["phase_drift_rad_per_frame"] == pytest.approx(coef[0], rel=1e-9)
    assert abs(s["phase_drift_rad_per_frame"] - DRIFT) < 4 * s["phase_drift_rad_per_frame_err"]
    # Frame interval from the ImageDescription JSON.
    assert s["frame_interval_source"] == "metadata"
    assert s["phase_drift_rad_per_s"] == pytest.approx(coef[0] / 0.5, rel=1e-9)
    assert s["frames_ok"] == 12 and s["frames_failed"] == 0
    txt = out.with_suffix(".summary.txt").read_text()
    assert "phase drift" in txt and "waves/s" in txt
    # Every measured key is a column, with its uncertainty.
    for key in ("period_px", "visibility", "orientation_deg", "phase_rad"):
        assert key in rows[0] and key + "_err" in rows[0]


def test_interrupted_then_resumed_gives_same_rows(stack_file, full_table, tmp_path):
    path, _ = stack_file
    before = sha256(path)
    data = full_table.read_bytes()
    # Simulate a kill in the middle of writing row 7: cut the file mid-line.
    starts = [i + 1 for i, b in enumerate(data) if b == ord("\n")]
    cut = starts[7] + (starts[8] - starts[7]) // 2
    part = tmp_path / "part.csv"
    part.write_bytes(data[:cut])
    rc, _, err = cli([str(path), "--out", str(part), "--workers", "1", "--resume"])
    assert rc == 0, err
    assert part.read_bytes() == data  # same rows, header once
    assert sha256(path) == before  # the input is never modified
    doc_full = json.loads(full_table.with_suffix(".summary.json").read_text())["stacks"]
    doc_part = json.loads((tmp_path / "part.summary.json").read_text())["stacks"]
    assert doc_part == doc_full
    # A finished table resumes to itself.
    rc, _, _ = cli([str(path), "--out", str(part), "--workers", "1", "--resume"])
    assert rc == 0 and part.read_bytes() == data


def test_json_lines_output_and_resume(stack_file, full_table, tmp_path):
    path, _ = stack_file
    out = tmp_path / "r.jsonl"
    rc, _, err = cli([str(path), "--out", str(out), "--workers", "1"])
    assert rc == 0, err
    lines = out.read_text().splitlines()
    recs = [json.loads(line) for line in lines]
    assert len(recs) == 12 and all("phase_unwrapped_rad" in r for r in recs)
    assert isinstance(recs[0]["warnings"], list)
    # Same numbers as the CSV table of the same stack.
    rows = read_csv(full_table)
    for r, c in zip(recs, rows, strict=True):
        assert r["phase_unwrapped_rad"] == float(c["phase_unwrapped_rad"])
        assert r["period_px"] == float(c["period_px"])
    # Truncated JSON Lines resume as well; --format overrides the extension.
    data = out.read_bytes()
    cut = data.index(b"\n", len(data) // 2) - 5
    (tmp_path / "p.txt").write_bytes(data[:cut])
    rc, _, err = cli([str(path), "--out", str(tmp_path / "p.txt"), "--format", "json",
                      "--workers", "1", "--resume"])
    assert rc == 0, err
    assert (tmp_path / "p.txt").read_bytes() == data


def test_corrupt_page_gives_one_error_row(tmp_path):
    st, _ = drift_stack(n=6)
    path = write_stack(tmp_path / "bad.tif", st)
    # Point the strip of page 3 beyond the end of the file (StripOffsets, tag 273).
    with tifffile.TiffFile(path) as tf:
        value_offset = tf.pages[3].tags["StripOffsets"].valueoffset
    size = path.stat().st_size
    with open(path, "r+b") as fh:
        fh.seek(value_offset)
        fh.write(struct.pack("<I", size + 4096))
    out = tmp_path / "r.csv"
    rc, text, err = cli([str(path), "--out", str(out), "--workers", "1"])
    assert rc == 1
    rows = read_csv(out)
    assert [r["status"] for r in rows] == ["ok", "ok", "ok", "error", "ok", "ok"]
    assert "frame 3" in rows[3]["error"] and rows[3]["phase_unwrapped_rad"] == ""
    assert err.count("\n") == 1 and "bad.tif frame 3" in err
    assert "failed frames   3" in text
    # The unwrapping continues across the bad frame.
    assert rows[4]["phase_unwrapped_rad"] != ""


def test_folder_and_glob_with_problems(tmp_path):
    d = tmp_path / "caps"
    d.mkdir()
    for k, phase in enumerate((0.2, 0.9, 1.6)):
        img = render_fringes(SHAPE, period_px=PERIOD, orientation_deg=ORIENT,
                             phase_rad=phase, visibility=0.6, mean=20000.0)
        cv2.imwrite(str(d / f"cap{k}.png"), np.round(img).astype(np.uint16))
    (d / "readme.txt").write_text("not an image")
    (d / "broken.png").write_bytes(b"\x89PNG\r\n\x1a\n" + b"\x00" * 10)
    (d / "empty.tif").write_bytes(b"")
    out = tmp_path / "r.csv"
    rc, _, err = cli([str(d), str(tmp_path / "missing*.tif"), "--out", str(out),
                      "--workers", "1", "--sequence"])
    assert rc == 1  # two unreadable files, one pattern without matches
    assert "no image files match" in err and "broken.png" in err and "empty" in err
    rows = read_csv(out)
    names = [os.path.basename(r["file"]) for r in rows]
    assert names == ["broken.png", "cap0.png", "cap1.png", "cap2.png", "empty.tif"]  # sorted
    assert rows[0]["status"] == "error" and rows[0]["frame"] == "0"  # its frame is bad
    assert rows[4]["status"] == "error" and rows[4]["frame"] == ""  # the file is unreadable
    good = rows[1:4]
    assert all(r["status"] == "ok" for r in good)
    # --sequence: the single images form one stack, unwrapped across files.
    ph = np.array([float(r["phase_unwrapped_rad"]) for r in good])
    np.testing.assert_allclose(ph, [0.2, 0.9, 1.6], atol=0.01)
    summ = json.loads((tmp_path / "r.summary.json").read_text())
    seq = [s for s in summ["stacks"] if s["stack"] == "<sequence>"][0]
    assert seq["frames_ok"] == 3 and seq["failed_frames"] == [0]
    assert seq["phase_drift_rad_per_frame"] == pytest.approx(0.7, abs=0.01)
    # A glob of the same files gives the same rows.
    out2 = tmp_path / "g.csv"
    rc, _, _ = cli([str(d / "cap*.png"), "--out", str(out2), "--workers", "1", "--sequence"])
    assert rc == 0
    assert [r["phase_unwrapped_rad"] for r in read_csv(out2)] == [
        r["phase_unwrapped_rad"] for r in good]


def test_existing_output_is_refused(stack_file, tmp_path):
    path, _ = stack_file
    out = tmp_path / "r.csv"
    out.write_text("keep me\n")
    rc, _, err = cli([str(path), "--out", str(out)])
    assert rc == 2 and "--resume" in err and "--overwrite" in err
    assert out.read_text() == "keep me\n"
    rc, _, err = cli([str(path), "--out", str(out), "--resume"])
    assert rc == 1 and "not a fringe batch table" in err
    rc, _, err = cli([str(path), "--out", str(path), "--overwrite"])
    assert rc == 2 and "also an input" in err
    # A complete line that is not a row of the header is refused, not silently dropped.
    out.write_text("file,frame,status,error\nx.tif,0,ok\n")
    rc, _, err = cli([str(path), "--out", str(out), "--resume"])
    assert rc == 1 and "line 2 has 3 fields" in err
    assert out.read_text() == "file,frame,status,error\nx.tif,0,ok\n"


def test_progress_bar_when_asked(stack_file, tmp_path):
    pytest.importorskip("tqdm", reason="tqdm (optional progress bar) is not installed")
    path, _ = stack_file
    log = _stdio.StringIO()
    res = batch.run_batch([str(path), str(tmp_path / "none*.tif")], tmp_path / "r.csv",
                          options=batch.BatchOptions(workers=1, progress=True), log=log)
    text = log.getvalue()
    assert "/12 [" in text and "frame/s" in text  # the bar, on the log stream
    assert "no image files match" in text
    assert res.problems and not res.ok
    quiet = _stdio.StringIO()  # not a terminal: no bar by default
    batch.run_batch([str(path)], tmp_path / "q.csv", options=batch.BatchOptions(workers=1),
                    log=quiet)
    assert quiet.getvalue() == ""


def test_fixed_geometry_and_process_pool(stack_file, tmp_path):
    path, phases = stack_file
    serial = tmp_path / "s.csv"
    pool = tmp_path / "p.csv"
    rc1, _, err1 = cli([str(path), "--out", str(serial), "--workers", "1", "--fixed-geometry"])
    rc2, _, err2 = cli([str(path), "--out", str(pool), "--workers", "2", "--fixed-geometry",
                        "--chunk-size", "2"])
    assert rc1 == 0 and rc2 == 0, err1 + err2
    a, b = read_csv(serial), read_csv(pool)
    assert_same_rows(a, b)  # the pool gives the same rows, in frame order
    summ = json.loads((tmp_path / "p.summary.json").read_text())["stacks"][0]
    geo = summ["geometry"]
    assert geo["mode"] == "fixed" and geo["from_frame"] == 0
    assert geo["period_px"] == float(a[0]["period_px"])
    ph = np.array([float(r["phase_unwrapped_rad"]) for r in a])
    offset = 2 * np.pi * np.round((ph[0] - phases[0]) / (2 * np.pi))
    np.testing.assert_allclose(ph - offset, phases, atol=0.01)


def test_ctrl_c_keeps_completed_rows(tmp_path):
    n = 40
    st, _ = drift_stack(n=n, seed=9)
    path = write_stack(tmp_path / "long.tif", st)
    out = tmp_path / "r.csv"
    timer = threading.Timer(0.3, os.kill, (os.getpid(), signal.SIGINT))
    timer.start()
    try:
        rc, _, err = cli([str(path), "--out", str(out), "--workers", "1"])
    finally:
        timer.cancel()
    assert rc == 130 and "--resume" in err
    rows = read_csv(out)
    assert 0 < len(rows) < n
    assert [int(r["frame"]) for r in rows] == list(range(len(rows)))
    assert json.loads(out.with_suffix(".summary.json").read_text())["complete"] is False
    rc, _, _ = cli([str(path), "--out", str(out), "--workers", "1", "--resume"])
    assert rc == 0
    assert [int(r["frame"]) for r in read_csv(out)] == list(range(n))


def test_cluster_without_dask(stack_file, tmp_path, monkeypatch):
    path, _ = stack_file
    monkeypatch.setitem(sys.modules, "distributed", None)  # import fails
    rc, _, err = cli([str(path), "--out", str(tmp_path / "r.csv"), "--cluster", "local"])
    assert rc == 2
    assert err.strip().count("\n") == 0 and "install fringe[dask]" in err


def test_dask_cluster_matches_local_run(stack_file, full_table, tmp_path):
    distributed = pytest.importorskip(
        "distributed", reason="dask.distributed is not installed (pip install fringe[dask])")
    path, _ = stack_file
    local = full_table
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                                  dashboard_address=None, protocol="tcp",
                                  host="127.0.0.1") as lc:
        with distributed.Client(lc) as client:
            # Through the command line, by scheduler address ...
            remote = tmp_path / "dask.csv"
            rc, _, err = cli([str(path), "--out", str(remote), "--cluster",
                              lc.scheduler_address, "--chunk-size", "3"])
            assert rc == 0, err
            # ... and through the library, with a Client.
            out3 = tmp_path / "dask2.csv"
            res = batch.run_batch([str(path)], out3,
                                  options=batch.BatchOptions(cluster=client, chunk_size=5))
            assert res.backend == "dask" and res.frames_ok == 12
    assert read_csv(remote) == read_csv(local)
    assert read_csv(out3) == read_csv(local)


def test_summary_paths_and_outcome(stack_file, tmp_path):
    path, _ = stack_file
    out = tmp_path / "nested.results.csv"
    res = batch.run_batch([str(path)], out, options=batch.BatchOptions(
        workers=1, frame_interval_s=2.0, drop_fraction=0.5))
    assert res.ok and res.rows_written == 12
    assert batch.summary_paths(out) == (res.summary_json, res.summary_txt)
    s = res.summaries[0]
    assert s["frame_interval_source"] == "option" and s["frame_interval_s"] == 2.0
    assert s["visibility_drop_frames"] == []


def test_imagej_frame_interval(tmp_path):
    st, _ = drift_stack(n=4)
    path = tmp_path / "ij.tif"
    # ImageJ hyperstack metadata: "finterval" in seconds (tifffile writes ImageJ's format).
    tifffile.imwrite(path, st, imagej=True, metadata={"axes": "TYX", "finterval": 0.25})
    res = batch.run_batch([str(path)], tmp_path / "r.csv",
                          options=batch.BatchOptions(workers=1))
    s = res.summaries[0]
    assert res.frames_ok == 4
    assert s["frame_interval_source"] == "metadata" and s["frame_interval_s"] == 0.25
    assert s["phase_drift_rad_per_s"] == pytest.approx(s["phase_drift_rad_per_frame"] / 0.25)
