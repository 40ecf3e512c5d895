"""A self-contained HTML report of a run: inputs, calibration, settings, results, figures.

The report is one HTML file that needs nothing else: figures are embedded as base64 PNG
``data:`` URIs, the style sheet is inline, there are no scripts, fonts or links to other
sites, and a Content-Security-Policy forbids the browser to fetch anything. It lists
every input and calibration file with its SHA-256, the settings, the results with their
1-sigma uncertainties and units, the warnings, the safety notes, the software versions
and the command line: enough to reproduce the run.
"""

from __future__ import annotations

import base64
import datetime as _dt
import hashlib
import html
import json
import math
import os
import platform
import shlex
import tempfile
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from fringe._util import FringeError, atomic_output

__all__ = [
    "SAFETY_NOTES",
    "write_report",
    "report_for_results",
    "measure_outputs",
    "render_result_figures",
    "sha256_file",
    "split_unit",
]

#: Safety notes printed in every report.
SAFETY_NOTES: tuple[str, ...] = (
    "Never look into a laser beam or its reflections (specular reflections from optics, "
    "mirrors, watches and jewellery are as dangerous as the beam).",
    "Know your laser's class and use the lowest class that does the job; attenuate the "
    "beam before it reaches a camera, and never point binoculars, a telescope or an "
    "optical viewfinder into it.",
    "Keep beams horizontal and below eye level, and end them on matte beam stops.",
    "Never view the Sun directly or through any optics without a proper, certified solar "
    "filter mounted in front of the optics; eclipse glasses are for the naked eye only.",
    "Local rules and your laser safety officer come first.",
)

_MAX_DETAILS = 200
_PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"

_UNITS = {
    "px": "px", "deg": "deg", "rad": "rad", "mrad": "mrad", "nm": "nm", "um": "µm",
    "mm": "mm", "m": "m", "s": "s", "ms": "ms", "waves": "waves", "dn": "DN", "dn2": "DN²",
    "e": "e⁻", "frame": "frame", "pct": "%", "hz": "Hz", "k": "K",
}

_CSS = """
:root { color-scheme: light; }
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, "DejaVu Sans", sans-serif;
  margin: 0; background: #fafafa; color: #1a1a1a; line-height: 1.45; }
header { background: #0072B2; color: #ffffff; padding: 1.1em 2em; }
header h1 { margin: 0; font-size: 1.45em; font-weight: 600; }
header p { margin: 0.3em 0 0; opacity: 0.9; font-size: 0.92em; }
main { max-width: 1100px; margin: 0 auto; padding: 1em 2em 3em; }
h2 { font-size: 1.15em; border-bottom: 2px solid #56B4E9; padding-bottom: 0.2em;
  margin-top: 1.8em; }
h3 { font-size: 1.0em; margin: 1.4em 0 0.4em; }
table { border-collapse: collapse; margin: 0.4em 0 1em; font-size: 0.9em; background: #fff; }
th, td { border: 1px solid #d0d0d0; padding: 0.25em 0.6em; text-align: left;
  vertical-align: top; }
th { background: #eef5fb; font-weight: 600; }
td.num { font-variant-numeric: tabular-nums; white-space: nowrap; }
td.hash, code { font-family: ui-monospace, "DejaVu Sans Mono", monospace; font-size: 0.85em;
  word-break: break-all; }
.status-ok { color: #006d4f; font-weight: 600; }
.status-error { color: #b34700; font-weight: 600; }
ul.warnings li { color: #7a3d00; }
section.safety { background: #fff7e0; border-left: 5px solid #E69F00; padding: 0.6em 1.2em;
  margin-top: 1.5em; }
section.result { background: #ffffff; border: 1px solid #e0e0e0; border-radius: 4px;
  padding: 0.3em 1.2em 1em; margin: 1.2em 0; }
figure { display: inline-block; margin: 0.6em 1em 0.6em 0; vertical-align: top; }
figure img { max-width: 100%; width: 640px; height: auto; border: 1px solid #e0e0e0;
  background: #fff; }
figcaption { font-size: 0.85em; color: #444; max-width: 640px; }
details { margin: 0.4em 0; }
summary { cursor: pointer; color: #0072B2; }
pre { background: #f2f2f2; padding: 0.6em; overflow-x: auto; font-size: 0.82em; }
p.note { color: #555; font-size: 0.9em; }
"""

_CSP = "default-src 'none'; img-src data:; style-src 'unsafe-inline'; base-uri 'none'; " \
       "form-action 'none'"


# --------------------------------------------------------------------------------------------
# small helpers
# --------------------------------------------------------------------------------------------


def _e(text: Any) -> str:
    return html.escape(str(text), quote=True)


def sha256_file(path: str | os.PathLike, *, chunk: int = 1 << 20) -> str:
    """SHA-256 of a file's bytes as 64 hex digits (the file is opened read-only).

    Examples
    --------
    >>> import os, tempfile
    >>> with tempfile.TemporaryDirectory() as d:
    ...     p = os.path.join(d, "abc.txt")
    ...     with open(p, "wb") as fh:
    ...         _ = fh.write(b"abc")
    ...     sha256_file(p)[:16]  # FIPS 180-2, appendix B.1: SHA-256("abc")
    'ba7816bf8f01cfea'
    """
    h = hashlib.sha256()
    name = os.fspath(path)
    try:
        with open(name, "rb") as fh:
            while True:
                block = fh.read(chunk)
                if not block:
                    break
                h.update(block)
    except OSError as exc:
        raise FringeError(f"{name}: cannot read for its checksum ({exc.strerror or exc})") from None
    return h.hexdigest()


def split_unit(key: str) -> tuple[str, str]:
    """Quantity name and unit of a unit-suffixed result key.

    Examples
    --------
    >>> split_unit("period_px")
    ('period', 'px')
    >>> split_unit("phase_drift_rad_per_frame")
    ('phase drift', 'rad/frame')
    >>> split_unit("visibility")
    ('visibility', '')
    """
    parts = key.split("_")
    if len(parts) >= 4 and parts[-2] == "per" and parts[-3] in _UNITS:
        return " ".join(parts[:-3]), f"{_UNITS[parts[-3]]}/{_UNITS.get(parts[-1], parts[-1])}"
    if len(parts) >= 2 and parts[-1] in _UNITS:
        return " ".join(parts[:-1]), _UNITS[parts[-1]]
    return key.replace("_", " "), ""


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(
        value, bool)


def _cell(value: Any) -> str:
    """Plain text of a non-measured value (numbers, strings, lists, mappings)."""
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if _is_number(value):
        v = float(value)
        if not math.isfinite(v):
            return "-"
        return f"{int(value)}" if isinstance(value, (int, np.integer)) else f"{v:.6g}"
    if isinstance(value, str):
        return value
    try:
        return json.dumps(value, default=_json_default, ensure_ascii=False)
    except (TypeError, ValueError):
        return str(value)


def _json_default(obj: Any) -> Any:
    if hasattr(obj, "item"):
        return obj.item()
    if hasattr(obj, "tolist"):
        return obj.tolist()
    if hasattr(obj, "__fspath__"):
        return os.fspath(obj)
    return str(obj)


def _result_dict(result: Any) -> dict[str, Any]:
    if hasattr(result, "to_dict"):
        return dict(result.to_dict())
    if isinstance(result, Mapping):
        return dict(result)
    raise FringeError(f"report: cannot read a result of type {type(result).__name__}")


def _versions(version: Any) -> list[tuple[str, str]]:
    from importlib import metadata

    from fringe import __version__

    rows: list[tuple[str, str]] = []
    if isinstance(version, Mapping):
        rows.extend((str(k), str(v)) for k, v in version.items())
    else:
        rows.append(("fringe", str(version) if version else __version__))
    have = {k for k, _ in rows}
    if "python" not in have:
        rows.append(("python", platform.python_version()))
    for dist in ("numpy", "scipy", "tifffile", "opencv-python-headless", "matplotlib"):
        if dist in have:
            continue
        try:
            rows.append((dist, metadata.version(dist)))
        except metadata.PackageNotFoundError:
            rows.append((dist, "not installed"))
    rows.append(("platform", platform.platform()))
    return rows


def _command_text(command: Any) -> str:
    if command is None:
        return "not recorded (library call)"
    if isinstance(command, str):
        return command
    return shlex.join(str(c) for c in command)


def _file_row(path: Any) -> tuple[str, str, str]:
    """(name, size, sha256 or why there is none)."""
    name = os.fspath(path) if hasattr(path, "__fspath__") else str(path)
    if os.path.isfile(name):
        return name, f"{os.path.getsize(name)} bytes", sha256_file(name)
    return name, "-", "in-memory data or missing file (no checksum)"


def _calibration_rows(calibration: Any) -> tuple[list[tuple[str, Any]], list[tuple[str, Any]]]:
    """(role, file) rows and (parameter, value) rows from paths, a mapping or a set."""
    files: list[tuple[str, Any]] = []
    params: list[tuple[str, Any]] = []
    if calibration is None:
        return files, params
    if hasattr(calibration, "dark_files") or hasattr(calibration, "flat_files"):
        files += [("dark", f) for f in getattr(calibration, "dark_files", []) or []]
        files += [("flat", f) for f in getattr(calibration, "flat_files", []) or []]
        for key in ("method", "n_dark_frames", "n_flat_frames", "gain_e_per_dn",
                    "read_noise_dn", "bit_depth", "channel"):
            val = getattr(calibration, key, None)
            if val is not None:
                params.append((key, val))
        return files, params
    if isinstance(calibration, Mapping):
        for key, val in calibration.items():
            if isinstance(val, (str, os.PathLike)):
                files.append((str(key), val))
            elif isinstance(val, Sequence) and val and all(
                    isinstance(v, (str, os.PathLike)) for v in val):
                files += [(str(key), v) for v in val]
            else:
                params.append((str(key), val))
        return files, params
    if isinstance(calibration, (str, os.PathLike)):
        return [("calibration", calibration)], params
    return [("calibration", f) for f in calibration], params


def _figure_items(figures: Any) -> list[tuple[str, str]]:
    if figures is None:
        return []
    if isinstance(figures, Mapping):
        return [(str(k), os.fspath(v)) for k, v in figures.items()]
    out = []
    for item in figures:
        if isinstance(item, (tuple, list)) and len(item) == 2:
            out.append((str(item[0]), os.fspath(item[1])))
        else:
            p = os.fspath(item)
            out.append((os.path.basename(p), p))
    return out


def _png_data_uri(path: str) -> str:
    try:
        with open(path, "rb") as fh:
            data = fh.read()
    except OSError as exc:
        raise FringeError(f"{path}: cannot read figure ({exc.strerror or exc})") from None
    if not data.startswith(_PNG_SIGNATURE):
        raise FringeError(f"{path}: not a PNG file, cannot embed it in the report")
    return "data:image/png;base64," + base64.b64encode(data).decode("ascii")


def _same_file(a: str, b: str) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:
        return os.path.abspath(a) == os.path.abspath(b)


# --------------------------------------------------------------------------------------------
# HTML pieces
# --------------------------------------------------------------------------------------------


def _table(header: Sequence[str], rows: Sequence[Sequence[str]], *, cls: str = "",
           raw: bool = False, num_cols: Sequence[int] = ()) -> str:
    """An HTML table; cells are escaped unless ``raw``."""
    c = f' class="{cls}"' if cls else ""
    out = [f"<table{c}>", "<thead><tr>" + "".join(f"<th>{_e(h)}</th>" for h in header)
           + "</tr></thead>", "<tbody>"]
    for row in rows:
        cells = []
        for i, v in enumerate(row):
            klass = ' class="num"' if i in num_cols else ""
            cells.append(f"<td{klass}>{v if raw else _e(v)}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</tbody></table>")
    return "\n".join(out)


_SUMMARY_COLUMNS = (("period_px", "period", "px"), ("orientation_deg", "orientation", "deg"),
                    ("phase_rad", "phase", "rad"), ("visibility", "visibility", ""),
                    ("snr", "SNR", ""))


def _summary_table(dicts: Sequence[dict]) -> str:
    from fringe.report import format_value

    header = ["file", "frame", "status"] + [f"{h} ({u})" if u else h
                                            for _, h, u in _SUMMARY_COLUMNS]
    rows = []
    for d in dicts:
        status = str(d.get("status", "ok"))
        row = [_e(d.get("file", "")), _e(d.get("frame", "")),
               f'<span class="status-{_e(status)}">{_e(status)}</span>']
        for key, _, _ in _SUMMARY_COLUMNS:
            row.append(_e(format_value(d.get(key), d.get(key + "_err"))))
        rows.append(row)
    return _table(header, rows, cls="results", raw=True, num_cols=range(3, 3 + 5))


def _values_table(d: dict) -> str:
    """Every value of one result: quantity, value ± 1 sigma, unit."""
    from fringe.report import format_value

    skip = {"file", "frame", "status", "error", "warnings"}
    rows, nested = [], []
    for key, val in d.items():
        if key in skip or key.endswith("_err") and key[:-4] in d:
            continue
        if isinstance(val, (list, tuple)) and val and isinstance(val[0], Mapping):
            nested.append((key, val))
            continue
        name, unit = split_unit(key)
        err = d.get(key + "_err")
        if _is_number(val) and (err is None or _is_number(err)):
            text = format_value(float(val), None if err is None else float(err))
        else:
            text = _cell(val)
        rows.append((name, text, unit, key))
    out = [_table(["quantity", "value ± 1σ", "unit", "key"], rows, cls="values",
                  num_cols=(1,))]
    for key, items in nested:
        cols: list[str] = []
        for it in items:
            cols += [k for k in it if k not in cols]
        body = [[_cell(it.get(k)) for k in cols] for it in items]
        out.append(f"<h3>{_e(split_unit(key)[0])}</h3>")
        out.append(_table(cols, body, num_cols=range(len(cols))))
    return "\n".join(out)


def _provenance_block(result: Any) -> str:
    prov = getattr(result, "provenance", None)
    if not prov:
        return ""
    lines = []
    for entry in prov:
        if isinstance(entry, (tuple, list)) and len(entry) == 2:
            lines.append(f"{entry[0]}: {json.dumps(entry[1], default=_json_default)}")
        else:
            lines.append(json.dumps(entry, default=_json_default))
    return ("<details><summary>processing steps (provenance)</summary><pre>"
            + _e("\n".join(lines)) + "</pre></details>")


# --------------------------------------------------------------------------------------------
# the report
# --------------------------------------------------------------------------------------------


def write_report(
    path: str | os.PathLike,
    *,
    title: str,
    inputs: Sequence[Any],
    calibration: Any,
    settings: Mapping[str, Any] | None,
    results: Sequence[Any],
    warnings: Sequence[str],
    figures: Any,
    version: Any = None,
    command: str | Sequence[str] | None = None,
) -> str:
    """Write one self-contained HTML report.

    Parameters
    ----------
    path : str or path-like
        HTML file to write (atomically: ``path + ".part"``, then renamed).
    title : str
        Heading of the report.
    inputs : sequence of paths
        Input files; each is listed with its size and SHA-256 (non-files such as
        ``"<array>"`` are listed without).
    calibration : CalibrationSet, mapping, sequence of paths or None
        Calibration frames used: a set (its ``dark_files``, ``flat_files`` and noise
        parameters), a mapping of role to path(s) or values, or plain paths.
    settings : mapping or None
        Options of the run, listed as given.
    results : sequence of FringeResult (or of their ``to_dict()`` mappings)
        Measurements: a summary table, then every value with its 1-sigma uncertainty and
        unit, the warnings and the processing steps of each.
    warnings : sequence of str
        Notes for the whole run (the results' own warnings are shown with them).
    figures : sequence of paths or (caption, path) pairs, or mapping caption -> path
        PNG figures, embedded as base64 ``data:`` URIs.
    version : str or mapping, optional
        Software version (default ``fringe.__version__``); numpy, scipy, tifffile,
        OpenCV and matplotlib versions and the platform are added.
    command : str or sequence of str, optional
        Command line of the run.

    Returns
    -------
    str
        The path written.

    Raises
    ------
    FringeError
        When a figure is not a PNG, an input cannot be read for its checksum, the report
        would overwrite an input, or the file cannot be written.

    Notes
    -----
    The page carries a Content-Security-Policy (``default-src 'none'; img-src data:;
    style-src 'unsafe-inline'``), so a browser fetches nothing beyond the file itself.
    Input files are opened read-only.
    """
    from fringe.report import format_value

    out_path = os.fspath(path)
    input_list = [os.fspath(p) if hasattr(p, "__fspath__") else str(p) for p in inputs or ()]
    cal_files, cal_params = _calibration_rows(calibration)
    for p in input_list + [os.fspath(f) if hasattr(f, "__fspath__") else str(f)
                           for _, f in cal_files]:
        if os.path.exists(out_path) and os.path.isfile(p) and _same_file(p, out_path):
            raise FringeError(f"{out_path}: the report would overwrite the input {p}")
    dicts = [_result_dict(r) for r in results]
    now = _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat()
    parts: list[str] = []
    parts.append("<!DOCTYPE html>")
    parts.append('<html lang="en"><head><meta charset="utf-8">')
    parts.append(f'<meta http-equiv="Content-Security-Policy" content="{_e(_CSP)}">')
    parts.append('<meta name="viewport" content="width=device-width, initial-scale=1">')
    parts.append('<meta name="referrer" content="no-referrer">')
    parts.append(f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>")
    n_ok = sum(1 for d in dicts if d.get("status", "ok") == "ok")
    parts.append(f"<header><h1>{_e(title)}</h1><p>{n_ok} of {len(dicts)} measurement"
                 f"{'s' if len(dicts) != 1 else ''} succeeded &middot; written {_e(now)}</p>"
                 "</header><main>")

    parts.append('<section class="safety" id="safety"><h2>Safety</h2><ul>'
                 + "".join(f"<li>{_e(s)}</li>" for s in SAFETY_NOTES) + "</ul></section>")

    # Results.
    parts.append('<section id="results"><h2>Results</h2>')
    parts.append('<p class="note">Values are given as value ± one standard uncertainty '
                 "(1σ), rounded to two significant digits of the uncertainty.</p>")
    parts.append(_summary_table(dicts) if dicts else "<p>No results.</p>")
    parts.append("</section>")

    # Warnings for the run.
    all_warn = list(warnings or [])
    for d in dicts:
        label = f"{d.get('file', '')} frame {d.get('frame', '')}"
        if d.get("status", "ok") != "ok":
            all_warn.append(f"{label}: error: {d.get('error')}")
        all_warn += [f"{label}: {w}" for w in d.get("warnings") or []]
    parts.append('<section id="warnings"><h2>Warnings</h2>')
    if all_warn:
        parts.append('<ul class="warnings">' + "".join(f"<li>{_e(w)}</li>" for w in all_warn)
                     + "</ul>")
    else:
        parts.append("<p>None.</p>")
    parts.append("</section>")

    # Figures.
    figs = _figure_items(figures)
    parts.append('<section id="figures"><h2>Figures</h2>')
    if figs:
        for caption, fpath in figs:
            uri = _png_data_uri(fpath)
            parts.append(f'<figure><img src="{uri}" alt="{_e(caption)}">'
                         f"<figcaption>{_e(caption)}</figcaption></figure>")
    else:
        parts.append("<p>No figures.</p>")
    parts.append("</section>")

    # Per-result details.
    parts.append('<section id="details"><h2>Measurement details</h2>')
    if len(dicts) > _MAX_DETAILS:
        parts.append(f'<p class="note">Details of the first {_MAX_DETAILS} of {len(dicts)} '
                     "results; the summary above lists them all.</p>")
    for r, d in list(zip(results, dicts, strict=True))[:_MAX_DETAILS]:
        status = str(d.get("status", "ok"))
        parts.append(f'<section class="result"><h3>{_e(d.get("file", ""))} &middot; frame '
                     f'{_e(d.get("frame", ""))} &middot; <span class="status-{_e(status)}">'
                     f"{_e(status)}</span></h3>")
        if status != "ok":
            parts.append(f"<p>Error: {_e(d.get('error'))}</p>")
        parts.append(_values_table(d))
        if d.get("warnings"):
            parts.append('<ul class="warnings">' + "".join(f"<li>{_e(w)}</li>"
                                                             for w in d["warnings"]) + "</ul>")
        parts.append(_provenance_block(r))
        parts.append("</section>")
    parts.append("</section>")

    # Inputs and calibration.
    parts.append('<section id="inputs"><h2>Inputs</h2>')
    rows = [_file_row(p) for p in input_list]
    parts.append(_table(["file", "size", "SHA-256"], rows, cls="files") if rows
                 else "<p>None listed.</p>")
    parts.append("<h3>Calibration frames</h3>")
    if cal_files:
        crow = [(role, *_file_row(f)) for role, f in cal_files]
        parts.append(_table(["role", "file", "size", "SHA-256"], crow, cls="files"))
    else:
        parts.append("<p>None (no dark or flat frames were used).</p>")
    if cal_params:
        parts.append(_table(["calibration parameter", "value"],
                            [(k, _cell(v)) for k, v in cal_params]))
    parts.append("</section>")

    # Settings, software, command.
    parts.append('<section id="settings"><h2>Settings</h2>')
    if settings:
        srows = []
        for k, v in settings.items():
            if (isinstance(v, (tuple, list)) and len(v) == 2 and all(_is_number(x) for x in v)
                    and str(k).endswith(("_um", "_mm", "_nm", "_px"))):
                text = format_value(float(v[0]), float(v[1]) or None)
            else:
                text = _cell(v)
            srows.append((str(k), text))
        parts.append(_table(["setting", "value"], srows))
    else:
        parts.append("<p>Defaults.</p>")
    parts.append("</section>")
    parts.append('<section id="software"><h2>Software and command</h2>')
    parts.append(_table(["component", "version"], _versions(version)))
    parts.append(f"<p>Command line:</p><pre>{_e(_command_text(command))}</pre>")
    parts.append(f'<p class="note">Report written {_e(now)} by fringe; '
                 "this file embeds everything it shows.</p>")
    parts.append("</section></main></body></html>\n")
    text = "\n".join(parts)

    with atomic_output(out_path, "report") as tmp, open(tmp, "w", encoding="utf-8",
                                                         newline="\n") as fh:
        fh.write(text)
    return out_path


# --------------------------------------------------------------------------------------------
# figures for results, and the glue the command line uses
# --------------------------------------------------------------------------------------------


def _stem(result: Any) -> str:
    name = os.path.basename(str(getattr(result, "file", "array")))
    stem = os.path.splitext(name)[0] or "array"
    safe = "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in stem).strip("_.")
    return f"{safe or 'array'}-frame{int(getattr(result, 'frame', 0)):04d}"


def _read_options(result: Any) -> dict:
    """Reader options that reproduce the channel and decoding the measurement used."""
    opts: dict[str, Any] = {}
    for entry in getattr(result, "provenance", ()) or ():
        if isinstance(entry, (tuple, list)) and len(entry) == 2 and entry[0] == "input":
            p = entry[1]
            if p.get("channel") in ("luma", "red", "green", "blue"):
                opts["channel"] = p["channel"]
            if "srgb_decoded" in p and p.get("format") in ("png", "jpeg"):
                opts["srgb"] = bool(p["srgb_decoded"])
            break
    return opts


def _pixels(result: Any, item: Any) -> np.ndarray | None:
    """Pixel data of a result's frame: from an array, a path, or the result's file."""
    if isinstance(item, np.ndarray):
        arr = item
        if arr.ndim == 3 and arr.shape[-1] not in (3, 4):
            arr = arr[int(getattr(result, "frame", 0))]
        return arr
    source = item if item is not None else getattr(result, "file", None)
    if source is None:
        return None
    name = os.fspath(source) if hasattr(source, "__fspath__") else str(source)
    if not os.path.isfile(name):
        return None
    from fringe import io

    frame = io.read_frame(name, int(getattr(result, "frame", 0)), **_read_options(result))
    return frame.data


def render_result_figures(
    results: Sequence[Any],
    out_dir: str | os.PathLike,
    *,
    images: Sequence[Any] | None = None,
    max_results: int = 50,
) -> tuple[list[tuple[str, str]], list[str]]:
    """Frame, profile and spectrum figures of each successful result.

    Parameters
    ----------
    results : sequence of FringeResult
        Measurements; failed ones get the frame and spectrum figures only.
    out_dir : str or path-like
        Folder for the PNG files (created when missing), named
        ``<file stem>-frame<NNNN>-{frame,profile,spectrum}.png``.
    images : sequence, optional
        Per result, its pixels (2-D array, a stack indexed by the result's frame, a
        path) or None to read the result's own file.
    max_results : int
        Figures are drawn for at most this many results.

    Returns
    -------
    figures : list of (caption, path)
    notes : list of str
        What was skipped and why.

    Raises
    ------
    FringeError
        When matplotlib is not installed.
    """
    from fringe import figures as fig

    fig._mpl()  # fail early, with the install hint
    folder = os.fspath(out_dir)
    try:
        os.makedirs(folder, exist_ok=True)
    except OSError as exc:
        raise FringeError(f"{folder}: cannot create the figure folder "
                          f"({exc.strerror or exc})") from None
    if images is not None and len(images) != len(results):
        raise FringeError(f"figures: {len(images)} images for {len(results)} results")
    out: list[tuple[str, str]] = []
    notes: list[str] = []
    done = 0
    used: set[str] = set()
    for i, r in enumerate(results):
        fitted = getattr(r, "status", "ok") == "ok" and bool(getattr(r, "context", None))
        if done >= max_results:
            notes.append(f"figures drawn for the first {max_results} of {len(results)} "
                         "results only")
            break
        done += 1
        stem = _stem(r)
        k = 1
        while stem in used:
            k += 1
            stem = f"{_stem(r)}-{k}"
        used.add(stem)
        label = f"{getattr(r, 'file', '')} frame {getattr(r, 'frame', 0)}"
        try:
            pix = _pixels(r, None if images is None else images[i])
        except FringeError as exc:
            pix = None
            notes.append(f"{label}: frame and spectrum figures skipped ({exc})")
        if pix is not None:
            what = ("raw frame with the analysed region, fringe normal and profile band"
                    if fitted else "raw frame (not measured)")
            out.append((f"{label}: {what}",
                        fig.plot_frame(pix, r, os.path.join(folder, f"{stem}-frame.png"))))
        if fitted:
            out.append((f"{label}: fringe profile across the fringes, fitted model and "
                        "residuals",
                        fig.plot_profile(r, os.path.join(folder, f"{stem}-profile.png"))))
        if pix is not None:
            out.append((f"{label}: windowed 2-D power spectrum with the fringe frequency",
                        fig.plot_spectrum(pix, r, os.path.join(folder, f"{stem}-spectrum.png"))))
    return out, notes


def _calibration_from(results: Sequence[Any]) -> dict[str, list[str]]:
    """Dark and flat files named in the results' provenance, in order of first use."""
    found: dict[str, list[str]] = {}
    for r in results:
        for entry in getattr(r, "provenance", ()) or ():
            if (isinstance(entry, (tuple, list)) and len(entry) == 2
                    and entry[0] in ("dark", "flat") and isinstance(entry[1], Mapping)):
                for f in entry[1].get("files") or []:
                    lst = found.setdefault(str(entry[0]), [])
                    if str(f) not in lst:
                        lst.append(str(f))
    return found


def _inputs_from(results: Sequence[Any], extra: Sequence[Any] | None) -> list[str]:
    seen: list[str] = []
    for p in list(extra or []) + [getattr(r, "file", None) for r in results]:
        if p is None or isinstance(p, np.ndarray):
            continue
        name = os.fspath(p) if hasattr(p, "__fspath__") else str(p)
        if name not in seen:
            seen.append(name)
    return seen


def report_for_results(
    path: str | os.PathLike,
    results: Sequence[Any],
    *,
    images: Sequence[Any] | None = None,
    figures_dir: str | os.PathLike | None = None,
    settings: Mapping[str, Any] | None = None,
    command: str | Sequence[str] | None = None,
    calibration: Any = None,
    inputs: Sequence[Any] | None = None,
    title: str | None = None,
    figures: Any = None,
    warnings: Sequence[str] = (),
) -> str:
    """Draw the figures of some measurements and write their HTML report.

    Parameters
    ----------
    path : str or path-like
        HTML file to write.
    results : sequence of FringeResult
        The measurements.
    images : sequence, optional
        Per result, its pixels (array or path) or None (read from the result's file); see
        `render_result_figures`.
    figures_dir : str or path-like, optional
        Keep the PNG figures in this folder (default: a temporary folder, removed after
        they are embedded).
    settings : mapping, optional
        Options of the run.
    command : str or sequence of str, optional
        Command line of the run.
    calibration : optional
        As for `write_report`; default the dark and flat files named in the results'
        provenance.
    inputs : sequence of paths, optional
        Input files (default: the results' files).
    title : str, optional
        Heading (default "Fringe measurement report").
    figures : optional
        Figures already drawn ((caption, path) pairs): used instead of drawing new ones.
    warnings : sequence of str
        Extra notes for the run.

    Returns
    -------
    str
        The path of the report.

    Notes
    -----
    Without matplotlib the report is written without figures and says so.
    """
    from fringe import figures as fig

    results = list(results)
    notes = list(warnings)
    cal = calibration if calibration is not None else _calibration_from(results)
    ins = _inputs_from(results, inputs)

    def write(figs: Any) -> str:
        return write_report(path, title=title or "Fringe measurement report", inputs=ins,
                            calibration=cal, settings=settings, results=results,
                            warnings=notes, figures=figs, command=command)

    if figures is not None:
        return write(figures)
    try:
        fig._mpl()
    except FringeError as exc:
        notes.append(f"figures omitted: {exc}")
        return write(None)
    if figures_dir is not None:
        figs, more = render_result_figures(results, figures_dir, images=images)
        notes += more
        return write(figs)
    with tempfile.TemporaryDirectory(prefix="fringe-figures-") as tmp:
        figs, more = render_result_figures(results, tmp, images=images)
        notes += more
        return write(figs)


def measure_outputs(
    results: Sequence[Any],
    *,
    images: Sequence[Any] | None,
    plot_dir: str | os.PathLike | None = None,
    report: str | os.PathLike | None = None,
    settings: Mapping[str, Any] | None = None,
    command: str | Sequence[str] | None = None,
    calibration: Any = None,
) -> dict[str, Any]:
    """Figures (``--plot DIR``) and the HTML report (``--report FILE``) of a measure run.

    Parameters
    ----------
    results : sequence of FringeResult
        Every record of the run, in order (failed ones included: they appear in the
        report).
    images : sequence or None
        The input files as given on the command line (listed with their SHA-256; each
        result's pixels are read from its own file), or arrays aligned with `results`.
    plot_dir : str or path-like, optional
        Folder for the PNG figures.
    report : str or path-like, optional
        HTML report to write (embedding the same figures).
    settings : mapping, optional
        Options of the run (e.g. the measure options).
    command : str or sequence of str, optional
        Command line (e.g. ``["fringe", *sys.argv[1:]]``).
    calibration : optional
        As for `write_report` (default: from the results' provenance).

    Returns
    -------
    dict
        ``figures`` (list of paths written to `plot_dir`), ``report`` (path or None) and
        ``notes`` (list of str: what was skipped, to show the user).

    Raises
    ------
    FringeError
        When `plot_dir` is given but matplotlib is missing, or a file cannot be written.
    """
    results = list(results)
    arrays = (images is not None and len(images) == len(results) and len(images) > 0
              and all(isinstance(a, np.ndarray) for a in images))
    pixel_items = list(images) if arrays else None
    inputs = None if arrays else list(images or [])
    out: dict[str, Any] = {"figures": [], "report": None, "notes": []}
    figs = None
    if plot_dir is not None:
        figs, notes = render_result_figures(results, plot_dir, images=pixel_items)
        out["figures"] = [p for _, p in figs]
        out["notes"] += notes
    if report is not None:
        out["report"] = report_for_results(
            report, results, images=pixel_items, settings=settings, command=command,
            calibration=calibration, inputs=inputs, figures=figs,
            warnings=out["notes"])
    return out

