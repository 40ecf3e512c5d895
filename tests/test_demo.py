"""The demo on the bundled sample scenario, and laser lines recovered from it."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

import fringe
from fringe.calibrate import build_calibration
from fringe.cli import main

SAMPLES = Path(__file__).resolve().parent.parent / "sample-images"
SCEN = json.loads((SAMPLES / "scenario.json").read_text())["scenes"]


@pytest.mark.slow
def test_demo_runs_and_agrees(tmp_path, capsys):
    rc = main(["demo", "--out", str(tmp_path)])
    text = capsys.readouterr().out
    assert rc == 0, text
    assert "laser safety officer" in text and "solar filter" in text
    # every compared wavelength agrees with the scene within its stated uncertainty
    lines = [ln for ln in text.splitlines() if ln.strip().startswith("wavelength")]
    assert len(lines) >= 2
    for line in lines:
        assert line.rstrip().endswith("agrees"), line
    assert (tmp_path / "demo-results.jsonl").is_file()
    assert "Outputs folder" in text


def test_green_laser_line_from_sample():
    # 532 nm (frequency-doubled Nd:YAG, nominal; references.md sec. 5) recovered from the
    # bundled 12-bit capture with its darks and flats, within the stated uncertainty.
    s = SCEN["green532"]
    f, o = s["files"], s["optics"]
    cal = build_calibration([SAMPLES / p for p in f["darks"]], [SAMPLES / p for p in f["flats"]])
    r = fringe.measure(SAMPLES / f["science"], dark=cal, pixel_um=(o["pixel_um"], 0.01),
                       distance_mm=(o["distance_mm"], 0.5),
                       slit_separation_um=(o["slit_separation_um"], 5.0))
    assert r.ok, r.error
    assert abs(r.wavelength_nm - 532.0) <= 2 * r.wavelength_nm_err
    assert r.missing_orders[0] == 8  # d/a = 2000/250 (Hecht, Optics, 2017, sec. 10.2.2)


def test_hene_and_sodium_lines_from_generated_scenes():
    # HeNe 632.8 nm (air; references.md sec. 5, CIPM 2007 value 632.9908 nm in vacuum) and
    # the sodium D2 line 588.9950 nm (air; HyperPhysics, value from memory for NIST) from
    # numerically integrated two-slit scenes with camera noise.
    from fringe.synth import camera, two_slit_image

    for lam in (632.8, 588.995):
        irr = two_slit_image((240, 400), wavelength_nm=lam, slit_separation_um=800.0,
                             slit_width_um=90.0, distance_mm=200.0, pixel_um=5.5,
                             orientation_deg=33.0, peak_irradiance=8000.0)
        raw = camera(irr, rng=np.random.default_rng(7), gain_dn_per_e=0.5, read_noise_e=4.0,
                     offset_dn=0.0, bit_depth=16)
        r = fringe.measure(raw, pixel_um=(5.5, 0.005), distance_mm=(200.0, 0.2),
                           slit_separation_um=(800.0, 1.0))
        assert r.ok, r.error
        assert abs(r.wavelength_nm - lam) <= 2 * r.wavelength_nm_err, (lam, r.wavelength_nm)


def test_drift_stack_phase_series():
    # The unwrapped phase of each frame of the bundled interferometer stack against the
    # generator's phase series (numpy.unwrap as the reference unwrapping).
    truth = np.array(SCEN["hene633_drift"]["truth"]["phases_rad"])
    got = [r.phase_rad for r in fringe.measure_frames(SAMPLES / "hene633-drift-stack.tif")]
    diff = np.unwrap(np.array(got)) - truth
    diff -= 2 * np.pi * np.round(np.mean(diff) / (2 * np.pi))
    assert np.max(np.abs(diff)) < 0.01


@pytest.mark.parametrize("name", ["phone-red650-wall.jpg", "lamp546-slit-source.tif"])
def test_samples_measure_ok(name):
    r = fringe.measure(SAMPLES / name)
    assert r.ok, r.error


@pytest.mark.parametrize("which, nominal_nm", [("hene", 632.8), ("sodium", None)])
def test_laser_and_lamp_lines_from_sample(which, nominal_nm):
    # HeNe 632.8 nm (in air; references.md sec. 5, from the CIPM 2007 vacuum value 632.9908
    # nm) and the sodium D lines 588.9950 / 589.5924 nm in air (HyperPhysics; NIST ASD value
    # from memory), D2 about twice as bright as D1, recovered from the bundled captures
    # within two standard uncertainties.
    s = SCEN["linecheck"]
    f, o = s["files"], s["optics"]
    if nominal_nm is None:
        (d2, d1), (w2, w1) = o["sodium_lines_nm"], o["sodium_weights"]
        assert (d2, d1) == (588.995, 589.5924)
        nominal_nm = (w2 * d2 + w1 * d1) / (w2 + w1)
    r = fringe.measure(SAMPLES / f[which], dark=SAMPLES / f["dark"],
                       pixel_um=(o["pixel_um"], 0.0), distance_mm=(o["distance_mm"], 0.0),
                       slit_separation_um=(o["slit_separation_um"], 0.0))
    assert r.ok, r.error
    assert abs(r.wavelength_nm - nominal_nm) <= 2 * r.wavelength_nm_err + 1e-3, (
        r.wavelength_nm, r.wavelength_nm_err)
    # the slit width from the single-slit envelope (Hecht, Optics, 2017, sec. 10.2.1)
    assert r.slit_width_um == pytest.approx(o["slit_width_um"], rel=0.01)
