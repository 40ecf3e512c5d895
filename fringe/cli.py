"""Command-line interface: ``fringe measure``, ``fringe calib``, ``fringe demo``.

``main(argv) -> int`` returns 0 when every input was processed, 1 when any input
failed (each failure is reported on one line and the others are still processed), and
2 for usage errors. Tracebacks appear only with ``--debug``.
"""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Sequence

from fringe import __version__
from fringe._util import FringeError, atomic_output

__all__ = ["main", "build_parser"]

SAFETY = (
    "Safety: never look into a laser beam or its reflections; know your laser's class; keep "
    "beams below eye level; never view the Sun without a proper solar filter. Local rules and "
    "your laser safety officer come first."
)


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # one line, exit 2
        self.exit(2, f"{self.prog}: error: {message}\n")


def _value_with_error(text: str) -> tuple[float, float]:
    """Parse ``1.5``, ``1.5+-0.02``, ``1.5±0.02`` or ``1.5,0.02``."""
    for sep in ("±", "+-", "+/-", ","):
        if sep in text:
            a, b = text.split(sep, 1)
            try:
                return float(a), abs(float(b))
            except ValueError:
                break
    try:
        return float(text), 0.0
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected a number, optionally with an uncertainty as VALUE±ERR or VALUE+-ERR, "
            f"got {text!r}") from None


def _positive(text: str) -> float:
    """argparse type: a positive finite number."""
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not (v > 0 and v < float("inf")):
        raise argparse.ArgumentTypeError(f"must be a positive number, got {text!r}")
    return v


def _add_calibration(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("calibration")
    g.add_argument("--dark", action="append", default=[], metavar="FILE",
                   help="dark frame(s) or a master dark; repeatable (a quoted pattern such as "
                        "'dark-*.tif' also works); several are median-combined")
    g.add_argument("--flat", action="append", default=[], metavar="FILE",
                   help="flat-field frame(s) or a master flat; repeatable, patterns allowed")
    g.add_argument("--gain", type=float, metavar="E_PER_DN", dest="gain_e_per_dn",
                   help="camera gain in electrons per DN (enables the shot+read noise model)")
    g.add_argument("--read-noise", type=float, metavar="DN", dest="read_noise_dn",
                   help="read noise in DN (with --gain)")
    g.add_argument("--reject-cosmics", action="store_true",
                   help="replace single-pixel outliers (cosmic rays) before measuring")


def _add_input(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("input")
    g.add_argument("--channel", choices=["auto", "luma", "red", "green", "blue"], default="auto",
                   help="colour channel to measure (auto: strongest unsaturated fringes)")
    g.add_argument("--no-srgb", dest="srgb", action="store_false", default="auto",
                   help="do not decode 8-bit sRGB inputs (PNG/JPEG) to linear light")
    g.add_argument("--max-pixels", type=_positive, default=None,
                   help="refuse images with more pixels than this (default 2e8)")


def _add_geometry(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group(
        "geometry (physical inference; each value may carry an uncertainty as VALUE±ERR)")
    g.add_argument("--pixel-um", type=_value_with_error, metavar="F",
                   help="size of one image pixel in the fringe plane, micrometres")
    g.add_argument("--scale-points", nargs=5, type=float, metavar=("X1", "Y1", "X2", "Y2", "MM"),
                   help="two image points (pixels) a known distance apart (mm), e.g. on a ruler, "
                        "instead of --pixel-um")
    g.add_argument("--scale-points-err-px", type=float, default=0.5, metavar="PX",
                   help="uncertainty of each scale point position (default 0.5 px)")
    g.add_argument("--distance-mm", type=_value_with_error, metavar="F",
                   help="apertures to fringe plane distance, mm")
    g.add_argument("--slit-separation-um", type=_value_with_error, metavar="F",
                   help="aperture (slit) centre separation, micrometres")
    g.add_argument("--wavelength-nm", type=_value_with_error, metavar="F",
                   help="wavelength, nm")
    g.add_argument("--source-distance-mm", type=_value_with_error, metavar="F",
                   help="extended source to apertures distance, mm")
    g.add_argument("--source-shape", choices=["slit", "disk"],
                   help="shape of the extended source (uniform slit or disk)")
    g.add_argument("--single-aperture", nargs=2, metavar=("FILE1", "FILE2"),
                   help="frames with one aperture blocked each, to separate intensity "
                        "imbalance from coherence")


def build_parser() -> argparse.ArgumentParser:
    """The argument parser (also used to write the CLI reference)."""
    p = _Parser(prog="fringe", description="Fringe analysis of camera captures.",
                epilog=SAFETY)
    p.add_argument("--version", action="version", version=f"fringe {__version__}")
    p.add_argument("--debug", action="store_true", help="show tracebacks on errors")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    m = sub.add_parser("measure", help="measure period, orientation, phase and visibility",
                       description="Measure fringe period, orientation, phase and visibility "
                                   "with 1-sigma uncertainties, one record per image or frame.",
                       epilog=SAFETY)
    m.add_argument("images", nargs="+", metavar="IMAGE", help="image files or TIFF stacks")
    m.add_argument("--roi", nargs=4, type=int, metavar=("X", "Y", "W", "H"),
                   help="region to analyse: top-left column X, row Y, width W, height H")
    m.add_argument("--format", choices=["text", "json", "csv"], default="text",
                   help="text table, JSON Lines (one object per frame) or CSV")
    m.add_argument("--min-snr", type=float, default=None,
                   help="spectral SNR below which no fringe pattern is reported (default 5)")
    m.add_argument("-o", "--output", metavar="FILE", help="write the records to FILE")
    m.add_argument("--plot", metavar="DIR",
                   help="write PNG figures (frame, profile and fit, spectrum) to DIR")
    m.add_argument("--report", metavar="FILE.html",
                   help="write a self-contained HTML report of the run")
    _add_input(m)
    _add_calibration(m)
    _add_geometry(m)

    c = sub.add_parser("calib", help="build master darks and flats, estimate camera gain",
                       description="Calibration frames: master dark, master flat and the "
                                   "EMVA 1288 photon-transfer gain and read noise.")
    csub = c.add_subparsers(dest="calib_command", metavar="WHAT", parser_class=_Parser)
    d = csub.add_parser("dark", help="combine dark frames into a master dark")
    d.add_argument("frames", nargs="+", metavar="FILE")
    d.add_argument("-o", "--output", required=True, metavar="FILE", help="master dark TIFF")
    d.add_argument("--method", choices=["median", "sigma-clip"], default="median")
    f = csub.add_parser("flat", help="combine flat-field frames into a unit-mean master flat")
    f.add_argument("frames", nargs="+", metavar="FILE")
    f.add_argument("--dark", action="append", default=[], metavar="FILE",
                   help="dark frame(s) matching the flats' exposure")
    f.add_argument("-o", "--output", required=True, metavar="FILE", help="master flat TIFF")
    f.add_argument("--method", choices=["median", "sigma-clip"], default="median")
    gn = csub.add_parser("gain", help="camera gain and read noise by photon transfer",
                         description="Gain (e-/DN) and read noise from pairs of flats at "
                                     "several levels and one pair of darks (EMVA 1288).")
    gn.add_argument("--flat-pair", nargs=2, action="append", required=True,
                    metavar=("A", "B"), help="two flats at one exposure level; repeat per level")
    gn.add_argument("--dark-pair", nargs=2, required=True, metavar=("A", "B"))
    gn.add_argument("--format", choices=["text", "json"], default="text")
    for sp in (d, f, gn):
        sp.add_argument("--channel", choices=["auto", "luma", "red", "green", "blue"],
                        default="luma")

    from fringe import batch, photons, wavefront

    batch.add_parser(sub)
    photons.add_parser(sub)
    wavefront.add_parser(sub)
    dm = sub.add_parser("demo", help="run the whole job on the bundled sample images",
                        epilog=SAFETY)
    dm.add_argument("--samples", metavar="DIR", help="sample-images folder (default: bundled)")
    dm.add_argument("--out", metavar="DIR", help="folder for the demo's outputs")
    return p


def _options(args: argparse.Namespace) -> dict:
    opts: dict = {"channel": args.channel, "srgb": args.srgb}
    if args.max_pixels:
        opts["max_pixels"] = int(args.max_pixels)
    for key in ("gain_e_per_dn", "read_noise_dn", "min_snr"):
        if getattr(args, key, None) is not None:
            opts[key] = getattr(args, key)
    if args.reject_cosmics:
        opts["reject_cosmics"] = True
    for key in ("pixel_um", "distance_mm", "slit_separation_um", "wavelength_nm",
                "source_distance_mm", "source_shape", "single_aperture"):
        val = getattr(args, key, None)
        if val is not None:
            opts[key] = val
    if args.scale_points is not None:
        x1, y1, x2, y2, mm = args.scale_points
        opts["scale_points"] = ((x1, y1), (x2, y2), mm, args.scale_points_err_px)
    return opts


def expand_paths(paths: Sequence[str]) -> list[str]:
    """Expand shell-style patterns (``dark-*.tif``) that the shell left alone, in order."""
    import glob

    out: list[str] = []
    for p in paths:
        if any(ch in p for ch in "*?[") and not os.path.exists(p):
            hits = sorted(glob.glob(p))
            if not hits:
                raise FringeError(f"{p}: no files match this pattern")
            out.extend(hits)
        else:
            out.append(p)
    return out


def _cmd_measure(args: argparse.Namespace, out, err) -> int:
    from fringe import report
    from fringe.analyze import _calibration, measure_frames

    opts = _options(args)
    try:
        args.dark = expand_paths(args.dark)
        args.flat = expand_paths(args.flat)
        cal = _calibration(args.dark or None, args.flat or None, opts)
    except FringeError as exc:
        err.write(f"fringe: {exc}\n")
        return 1
    target = out
    fh = None
    if args.output:
        try:
            fh = open(args.output, "w", encoding="utf-8", newline="")
        except OSError as exc:
            err.write(f"fringe: {args.output}: cannot write output ({exc.strerror})\n")
            return 1
        target = fh
    failed = False
    results = []
    keep_all = bool(args.plot or args.report)
    csvw = report.CsvStream(target) if args.format == "csv" else None
    try:
        for path in args.images:
            try:
                for res in measure_frames(path, dark=cal, roi=args.roi, **opts):
                    if not res.ok:
                        failed = True
                        err.write(f"fringe: {res.file} frame {res.frame}: {res.error}\n")
                    if args.format == "json":
                        target.write(report.json_line(res) + "\n")
                        target.flush()
                    elif csvw is not None:
                        csvw.write(res)
                    if args.format == "text" or keep_all:
                        results.append(res)
            except FringeError as exc:
                failed = True
                err.write(f"fringe: {exc}\n")
                from fringe.result import FringeResult

                bad = FringeResult(file=path, frame=0).fail(str(exc))
                if args.format == "json":
                    target.write(report.json_line(bad) + "\n")
                elif csvw is not None:
                    csvw.write(bad)
                if args.format == "text" or keep_all:
                    results.append(bad)
        if args.format == "text":
            extra = _inferred_columns(results)
            target.write(report.text_table(results, extra))
    finally:
        if fh is not None:
            fh.close()
    if keep_all:
        from fringe.htmlreport import measure_outputs

        try:
            made = measure_outputs(results, images=args.images, plot_dir=args.plot,
                                   report=args.report, settings=_printable(opts),
                                   command=["fringe", *getattr(args, "argv", [])],
                                   calibration=cal)
        except FringeError as exc:
            err.write(f"fringe: {exc}\n")
            return 1
        for note in made.get("notes", []):
            err.write(f"fringe: note: {note}\n")
        if made.get("report"):
            err.write(f"fringe: report written to {made['report']}\n")
    return 1 if failed else 0


def _printable(opts: dict) -> dict:
    return {k: (list(v) if isinstance(v, tuple) else v) for k, v in opts.items()}


def _inferred_columns(results) -> list[tuple[str, str, str]]:
    known = [("wavelength_nm", "wavelength", "nm"),
             ("slit_separation_um", "separation", "um"),
             ("slit_width_um", "slit width", "um"),
             ("fringe_spacing_mm", "spacing", "mm"),
             ("source_size_um", "source size", "um"),
             ("coherence_length_um", "coherence length", "um")]
    present = set()
    for r in results:
        present.update(k for k in r.values if r.values.get(k) is not None)
    return [c for c in known if c[0] in present]


def _write_master(path: str, data, description: dict) -> None:
    import json

    import numpy as np
    import tifffile

    with atomic_output(path, "the master frame") as tmp:
        tifffile.imwrite(tmp, np.asarray(data, dtype=np.float32),
                         description=json.dumps(description), metadata=None)


def _cmd_calib(args: argparse.Namespace, out, err) -> int:
    import json

    import numpy as np

    from fringe import calibrate, io

    what = args.calib_command
    if what is None:
        err.write("fringe calib: error: choose one of: dark, flat, gain\n")
        return 2
    method = "sigma_clip" if getattr(args, "method", "median") == "sigma-clip" else "median"
    try:
        if what == "dark":
            stack = io.read_stack(args.frames, channel=args.channel)
            master, master_err = calibrate.master_dark(stack, method=method)
            _write_master(args.output, master, {"fringe": "master dark", "frames": len(stack),
                                                "method": method})
            out.write(f"master dark from {len(stack)} frames ({method}): mean "
                      f"{float(np.mean(master)):.2f} DN, median uncertainty "
                      f"{float(np.median(master_err)):.3f} DN -> {args.output}\n")
            return 0
        if what == "flat":
            stack = io.read_stack(args.frames, channel=args.channel)
            dark = None
            if args.dark:
                dstack = io.read_stack(args.dark, channel=args.channel)
                dark = calibrate.master_dark(dstack)[0] if len(dstack) > 1 else dstack[0]
            flat, flat_err, flat_bad = calibrate.master_flat(stack, dark=dark, method=method)
            _write_master(args.output, flat, {"fringe": "master flat", "frames": len(stack),
                                              "method": method, "darks": len(args.dark)})
            out.write(f"master flat from {len(stack)} frames ({method}), unit mean; "
                      f"{int(flat_bad.sum())} unusable pixels; pixel-to-pixel spread "
                      f"{100 * float(np.std(flat[~flat_bad])):.2f} % -> {args.output}\n")
            return 0
        # gain
        for a, b in [*args.flat_pair, args.dark_pair]:
            if os.path.realpath(a) == os.path.realpath(b):
                raise FringeError(f"{a}: given twice as one pair; a pair needs two frames "
                                  "taken one after the other")
        pairs = []
        for a, b in args.flat_pair:
            pairs.append((io.read_frame(a, channel=args.channel).data,
                          io.read_frame(b, channel=args.channel).data))
        da, db = args.dark_pair
        fa = io.read_frame(da, channel=args.channel)
        dark_pair = (fa.data, io.read_frame(db, channel=args.channel).data)
        try:
            pt = calibrate.photon_transfer(pairs, dark_pair,
                                           full_scale=fa.meta.get("full_scale"))
        except FringeError as exc:
            raise FringeError(f"{da}, {args.flat_pair[0][0]} ...: {exc}") from None
        if args.format == "json":
            out.write(json.dumps(pt.to_dict()) + "\n")
        else:
            from fringe.report import format_value

            out.write("photon transfer (EMVA 1288)\n")
            out.write(f"  gain        {format_value(pt.gain_e_per_dn, pt.gain_e_per_dn_err)} "
                      "e-/DN\n")
            out.write(f"  K           {format_value(pt.k_dn_per_e, pt.k_dn_per_e_err)} DN/e-\n")
            out.write(f"  read noise  {format_value(pt.read_noise_e, pt.read_noise_e_err)} e- "
                      f"({pt.read_noise_dn:.3f} DN)\n")
            for wmsg in pt.warnings:
                out.write(f"  warning: {wmsg}\n")
        return 0
    except FringeError as exc:
        err.write(f"fringe: {exc}\n")
        return 1
    except OSError as exc:
        err.write(f"fringe: {getattr(exc, 'filename', '') or ''}: {exc.strerror or exc}\n")
        return 1


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status."""
    parser = build_parser()
    argv = list(sys.argv[1:] if argv is None else argv)
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # usage errors (2) and --help/--version (0)
        return int(exc.code) if isinstance(exc.code, int) else (0 if exc.code is None else 2)
    args.argv = argv
    out, err = sys.stdout, sys.stderr
    if args.command is None:
        parser.print_help(out)
        return 2
    try:
        if args.command == "measure":
            return _cmd_measure(args, out, err)
        if args.command == "calib":
            return _cmd_calib(args, out, err)
        if args.command == "batch":
            from fringe import batch

            return batch.run(args, out, err)
        if args.command == "wavefront":
            from fringe import wavefront

            return wavefront.run(args, out, err)
        if args.command == "photons":
            from fringe import photons

            return photons.run(args, out, err)
        if args.command == "demo":
            from fringe.demo import run_demo

            return run_demo(samples=args.samples, out_dir=args.out, stream=out)
    except KeyboardInterrupt:
        err.write("fringe: interrupted\n")
        return 130
    except BrokenPipeError:
        # The reader went away (e.g. `| head`): stop quietly.
        try:
            sys.stdout = open(os.devnull, "w")  # noqa: SIM115
        except OSError:
            pass
        return 1
    except FringeError as exc:
        if args.debug:
            raise
        err.write(f"fringe: {exc}\n")
        return 1
    except Exception as exc:  # never a traceback for users
        if args.debug:
            raise
        err.write(f"fringe: internal error: {type(exc).__name__}: {exc} (run with --debug "
                  "for details)\n")
        return 1
    return 2
