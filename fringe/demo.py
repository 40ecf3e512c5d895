"""``fringe demo``: the whole job on the bundled sample scenario, with a readable summary.

The samples are an invented teaching-and-test lab (see ``sample-images/README.md``):
each bench is measured from its raw files, the physical quantities are inferred, and
the results are printed beside the values the scene generator used.
"""

from __future__ import annotations

import json
import os
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from fringe._util import FringeError, atomic_output
from fringe.report import format_value

__all__ = ["run_demo", "find_samples", "SAFETY_LINES"]

SAFETY_LINES = [
    "Safety first:",
    "  * Never look into a laser beam or its reflections; know your laser's class;",
    "    keep beams below eye level and end them on matte stops.",
    "  * Never view the Sun directly or through optics without a proper solar filter.",
    "  * Local rules and your lab's laser safety officer come first.",
]


def find_samples(samples: str | os.PathLike | None = None) -> Path:
    """The sample-images folder: the given one, or the one beside the package."""
    if samples is not None:
        path = Path(samples)
    else:
        path = Path(__file__).resolve().parent.parent / "sample-images"
    if not (path / "scenario.json").is_file():
        raise FringeError(f"{path}: no sample scenario here (scenario.json missing); give "
                          "--samples DIR")
    return path


class _Table:
    def __init__(self, stream: TextIO):
        self.stream = stream
        self.rows: list[tuple[str, str, str, str]] = []

    def add(self, name: str, value: Any, err: Any, unit: str, truth: Any = None,
            tol_sigma: float = 3.0, rel_floor: float = 0.0, digits: int = 3) -> None:
        if err is None and isinstance(value, (int, float)):
            meas = f"{value:.{digits}g} {unit}".strip()  # a statistic without its own error
        else:
            meas = format_value(value, err, unit)
        if truth is None:
            self.rows.append((name, meas, "", ""))
            return
        tr = f"{truth:.5g} {unit}".strip()
        verdict = ""
        if value is not None and err is not None:
            dev = abs(value - truth)
            ok = dev <= tol_sigma * err + rel_floor * abs(truth)
            verdict = "agrees" if ok else "differs"
        self.rows.append((name, meas, tr, verdict))

    def flush(self) -> None:
        if not self.rows:
            return
        w0 = max(len(r[0]) for r in self.rows)
        w1 = max(len(r[1]) for r in self.rows)
        w2 = max(len(r[2]) for r in self.rows)
        self.stream.write(f"    {'quantity'.ljust(w0)}  {'measured'.ljust(w1)}  "
                          f"{'scene value'.ljust(w2)}\n")
        for r in self.rows:
            self.stream.write(f"    {r[0].ljust(w0)}  {r[1].ljust(w1)}  {r[2].ljust(w2)}  "
                              f"{r[3]}".rstrip() + "\n")
        self.rows = []
        self.stream.flush()


_NOTES: list[str] = []


def _warnings(stream: TextIO, res) -> None:
    _NOTES.extend(res.warnings)


def run_demo(samples: str | None = None, out_dir: str | None = None,
             stream: TextIO | None = None) -> int:
    """Run the demo; returns 0 when every bench was measured, 1 otherwise."""
    from fringe.analyze import measure, measure_frames
    from fringe.calibrate import build_calibration

    out = stream if stream is not None else sys.stdout
    root = find_samples(samples)
    scen = json.loads((root / "scenario.json").read_text())["scenes"]
    out_path = Path(out_dir) if out_dir else Path.cwd() / "fringe-demo-output"
    out_path.mkdir(parents=True, exist_ok=True)
    records: list[dict] = []
    objects: list = []  # results with their in-memory context, for the figures
    drift_series: list = []
    failed = False
    for line in SAFETY_LINES:
        out.write(line + "\n")
    out.write(f"\nSample scenario: {root}\n")
    table = _Table(out)

    def keep(r, *, figure: bool = True, where: str = "") -> bool:
        """Record a result; on failure say so and mark the demo failed."""
        nonlocal failed
        records.append(r.to_dict())
        if figure:
            objects.append(r)
        if not r.ok:
            failed = True
            out.write(f"    {where or 'error'}: {r.error}\n")
        return r.ok

    def bench(title: str, job: Callable[[], None]) -> None:
        nonlocal failed
        out.write(f"\n{title}\n")
        _NOTES.clear()
        try:
            job()
        except FringeError as exc:
            failed = True
            out.write(f"    error: {exc}\n")
        table.flush()
        for note in _NOTES:
            out.write(f"    note: {note}\n")

    # Bench 1: green laser, double slit, mono sensor with darks and flats.
    def green() -> None:
        s = scen["green532"]
        f, o, t = s["files"], s["optics"], s["truth"]
        cal = build_calibration([root / p for p in f["darks"]], [root / p for p in f["flats"]])
        out.write(f"    {f['science']}: {len(f['darks'])} darks and {len(f['flats'])} flats "
                  "median-combined\n")
        r = measure(root / f["science"], dark=cal, pixel_um=(o["pixel_um"], 0.01),
                    distance_mm=(o["distance_mm"], 0.5),
                    slit_separation_um=(o["slit_separation_um"], 5.0))
        if not keep(r):
            return
        table.add("period", r.period_px, r.period_px_err, "px", t["period_px"])
        table.add("orientation", r.orientation_deg, r.orientation_deg_err, "deg",
                  t["orientation_deg"])
        table.add("visibility", r.visibility, r.visibility_err, "", t["visibility"],
                  rel_floor=0.005)
        table.add("wavelength", r.get("wavelength_nm"), r.get("wavelength_nm_err"), "nm",
                  o["wavelength_nm"])
        table.add("slit width", r.get("slit_width_um"), r.get("slit_width_um_err"), "um",
                  o["slit_width_um"])
        if r.get("missing_orders"):
            scene_orders = str(t.get("missing_orders", "")).replace("+-", "±")
            out.write(f"    missing orders: ±{', ±'.join(str(m) for m in r.missing_orders)} "
                      f"(scene: {scene_orders})\n")
        _warnings(out, r)

    # Bench 2: phone JPEG of a red laser on a wall, scale from the ruler in the picture.
    def phone() -> None:
        s = scen["phone_red650"]
        f, o, t, ruler = s["files"], s["optics"], s["truth"], s["ruler"]
        ticks = ruler["tick_positions_px"]
        p1, p2 = ticks[0], ticks[-1]
        mm = ruler["tick_spacing_mm"] * (len(ticks) - 1)
        out.write(f"    {f['science']}: scale from ruler ticks at ({p1[0]:.0f}, {p1[1]:.0f}) "
                  f"and ({p2[0]:.0f}, {p2[1]:.0f}) px, {mm:g} mm apart\n")
        r = measure(root / f["science"], scale_points=(p1, p2, mm, 1.0),
                    distance_mm=(o["distance_mm"], 10.0),
                    slit_separation_um=(o["slit_separation_um"], 2.0))
        if not keep(r):
            return
        table.add("period", r.period_px, r.period_px_err, "px", t["period_px"])
        table.add("fringe spacing", r.get("fringe_spacing_mm"), r.get("fringe_spacing_mm_err"),
                  "mm", t["period_mm_on_wall"])
        table.add("visibility (red, linear)", r.visibility, r.visibility_err, "",
                  t["visibility_linear_red_centre_expected"], rel_floor=0.02)
        table.add("wavelength", r.get("wavelength_nm"), r.get("wavelength_nm_err"), "nm",
                  o["wavelength_nm"])
        table.add("slit width", r.get("slit_width_um"), r.get("slit_width_um_err"), "um",
                  o["slit_width_um"], rel_floor=0.02)
        _warnings(out, r)

    # Bench 3: filtered lamp behind a slit source: partial coherence.
    def lamp() -> None:
        s = scen["lamp546"]
        f, o, t = s["files"], s["optics"], s["truth"]
        src = o["source"]
        r = measure(root / f["science"], pixel_um=o["pixel_um"], distance_mm=o["distance_mm"],
                    wavelength_nm=(o["wavelength_nm"], 0.5),
                    slit_separation_um=(o["slit_separation_um"], 2.0),
                    source_distance_mm=(src["distance_mm"], 1.0), source_shape=src["shape"])
        if not keep(r):
            return
        table.add("period", r.period_px, r.period_px_err, "px")
        out.write(f"    nominal lambda L/d is {t.get('period_px'):.4g} px; an extended source "
                  "shifts each point's envelope, which bends the fringe phase slightly\n")
        table.add("visibility", r.visibility, r.visibility_err, "")
        table.add("visibility above the envelope's base", r.get("envelope_visibility"),
                  r.get("envelope_visibility_err"), "", t.get("visibility"),
                  rel_floor=0.02)
        table.add("source width", r.get("source_size_um"), r.get("source_size_um_err"), "um",
                  src["width_um"])
        table.add("source angle", r.get("source_angle_mrad"), r.get("source_angle_mrad_err"),
                  "mrad", src["width_um"] / src["distance_mm"])
        if r.get("coherence_length_um") is not None:
            table.add("coherence length", r.coherence_length_um, r.coherence_length_um_err,
                      "um", t.get("coherence_length_um"))
        _warnings(out, r)

    # Bench 4: interferometer stack with phase drift.
    def drift() -> None:
        s = scen["hene633_drift"]
        f, t = s["files"], s["truth"]
        phases, errs = [], []
        for r in measure_frames(root / f["science"]):
            if not keep(r, figure=r.frame == 0, where=f"frame {r.frame}"):
                continue
            phases.append(r.phase_rad)
            errs.append(r.phase_rad_err)
        if len(phases) < 3:
            raise FringeError(f"{f['science']}: too few frames measured for a drift rate")
        ph = np.unwrap(np.array(phases))
        k = np.arange(ph.size, dtype=float)
        w = 1.0 / np.maximum(np.array(errs), 1e-12)
        coef, cov = np.polyfit(k, ph, 1, w=w, cov="unscaled")
        resid = ph - np.polyval(coef, k)
        scale = max(1.0, float(np.sum((resid * w) ** 2)) / max(ph.size - 2, 1))
        rate_err = float(np.sqrt(cov[0, 0] * scale))
        dt = s.get("frame_interval_s")
        drift_series[:] = [k, ph, np.array(errs), dt]
        out.write(f"    {f['science']}: {ph.size} frames measured one at a time\n")
        table.add("drift", float(coef[0]), rate_err, "rad/frame", t["drift_rad_per_frame"])
        if dt:
            table.add("drift", float(coef[0]) / dt, rate_err / dt, "rad/s",
                      t["drift_rad_per_s"])
        jit = float(np.std(resid, ddof=2))
        # standard error of an RMS from n - 2 degrees of freedom: s / sqrt(2 (n - 2))
        table.add("jitter (RMS after drift)", jit, jit / np.sqrt(2 * max(ph.size - 2, 1)),
                  "rad", t["jitter_rad"], tol_sigma=3.0, rel_floor=0.05)
        table.add("peak-to-peak phase", float(np.ptp(ph)) / (2 * np.pi), None, "waves")

    # Bench 4 again: the first frame as a wavefront check (Fourier-transform method).
    def wavefront_check() -> None:
        from fringe.io import read_frame
        from fringe.wavefront import analyze_wavefront

        s = scen["hene633_drift"]
        f = s["files"]
        fr = read_frame(root / f["science"], 0)
        h, w = fr.data.shape
        radius = 0.43 * min(h, w)  # inside the frame edge, where the method is reliable
        wres = analyze_wavefront(fr.data, pupil=((w - 1) / 2, (h - 1) / 2, radius),
                                 wavelength_nm=632.8, max_rms_waves=1 / 14,
                                 file=f["science"])
        d = wres.to_dict()
        records.append(d)
        if d.get("status") != "ok":
            raise FringeError(f"{f['science']}: {d.get('error')}")
        out.write(f"    {f['science']} frame 0, pupil radius {radius:.0f} px, tilt fringes "
                  "as the carrier (a flat reference surface)\n")
        table.add("PV", d.get("pv_waves"), d.get("pv_waves_err"), "waves")
        table.add("RMS", d.get("rms_waves"), d.get("rms_waves_err"), "waves")
        table.add("RMS", d.get("rms_nm"), d.get("rms_nm_err"), "nm")
        table.add("Strehl (exp(-(2 pi rms)^2), rule of thumb)", d.get("strehl_estimate"),
                  d.get("strehl_estimate_err"), "")
        _NOTES.extend(d.get("warnings") or [])

    # Bench 5: photon counting.
    def photon_run() -> None:
        from fringe.io import iter_frames
        from fringe.photons import analyze_photons

        s = scen["photons"]
        f, t = s["files"], s["truth"]
        stack = (fr.data for fr in iter_frames(root / f["science"]))
        dark = np.stack([fr.data for fr in iter_frames(root / f["dark"])])
        r = analyze_photons(stack, dark=dark, file=f["science"])
        if not keep(r, figure=False):
            return
        out.write(f"    {f['science']}: {r.get('photons'):.0f} photon events; dark stack "
                  f"{f['dark']} for the background\n")
        table.add("period", r.period_px, r.period_px_err, "px", t["period_px"])
        table.add("orientation", r.orientation_deg, r.orientation_deg_err, "deg",
                  t["orientation_deg"])
        table.add("visibility", r.visibility, r.visibility_err, "",
                  t.get("visibility_expected_background_removed", t["visibility"]),
                  rel_floor=0.03)
        table.add("significance", r.get("significance"), None, "sigma", digits=3)
        if r.get("photons_needed") is not None:
            table.add("photons for 1 % on V", r.get("photons_needed"), None, "", digits=2)
        build = r.get("build_up") or []
        if build:
            out.write("    build-up (photons: visibility):" + "".join(
                f"  {b.get('photons', 0):.0f}: "
                f"{format_value(b.get('visibility'), b.get('visibility_err'))}"
                for b in build[:: max(1, len(build) // 4)]) + "\n")
        _warnings(out, r)

    # Bench 6: known lines through one double slit.
    def lines() -> None:
        s = scen["linecheck"]
        f, o, t = s["files"], s["optics"], s["truth"]
        geo = {"pixel_um": (o["pixel_um"], 0.005), "distance_mm": (o["distance_mm"], 0.1),
               "slit_separation_um": (o["slit_separation_um"], 1.0)}
        out.write(f"    {f['hene']} and {f['sodium']}, dark stack {f['dark']}\n")
        for key, label, nominal in (
                ("hene", "HeNe wavelength", o["hene_wavelength_nm"]),
                ("sodium", "sodium wavelength (D2:D1 = 2:1 mean)",
                 t["sodium"]["wavelength_nm_weighted_mean"])):
            r = measure(root / f[key], dark=root / f["dark"], **geo)
            if not keep(r, where=f[key]):
                continue
            table.add(label, r.get("wavelength_nm"), r.get("wavelength_nm_err"), "nm", nominal)
            _warnings(out, r)

    bench("Bench 1 - 532 nm laser, double slit, 12-bit mono sensor", green)
    bench("Bench 2 - 650 nm diode laser on a wall, phone JPEG with a ruler", phone)
    bench("Bench 3 - filtered mercury lamp behind a slit source (partial coherence)", lamp)
    bench("Bench 4 - HeNe interferometer stack with thermal drift", drift)
    bench("Bench 4b - the same interferometer: wavefront from one frame", wavefront_check)
    bench("Bench 5 - two-beam fringes, a few photons per frame", photon_run)
    bench("Bench 6 - known lines: HeNe laser and sodium lamp through one double slit", lines)

    # Figures and the HTML report (when matplotlib is installed).
    try:
        from fringe import figures
        from fringe.htmlreport import measure_outputs

        made = measure_outputs(objects, images=[o.file for o in objects],
                               plot_dir=out_path / "figures", report=None,
                               settings={"samples": str(root)}, command=["fringe", "demo"])
        extra = []
        if drift_series:
            k, ph, errs_, dt = drift_series
            extra.append(("Bench 4: phase drift", figures.plot_drift(
                k, ph, out_path / "figures" / "hene633-drift.png", phase_err=errs_,
                frame_interval_s=dt)))
        from fringe.htmlreport import report_for_results

        report_for_results(out_path / "report.html", objects,
                           images=[o.file for o in objects],
                           figures=[*made.get("figures", []), *extra],
                           settings={"samples": str(root)}, command=["fringe", "demo"],
                           title="fringe demo: the Lantern Street Optics Lab samples")
        out.write(f"\nFigures: {out_path / 'figures'}\nReport:  {out_path / 'report.html'}\n")
    except FringeError as exc:
        out.write(f"\nFigures and report skipped: {exc}\n")

    results = out_path / "demo-results.jsonl"
    with atomic_output(results, "the demo records") as tmp, open(tmp, "w",
                                                                 encoding="utf-8") as fh:
        for rec in records:
            fh.write(json.dumps(rec, default=str) + "\n")
    out.write(f"\nEvery record (JSON Lines) is in {results}\n")
    out.write(f"Outputs folder: {out_path}\n")
    return 1 if failed else 0
