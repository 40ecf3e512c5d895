"""Formatting results: readable text tables, JSON Lines and CSV."""

from __future__ import annotations

import csv
import io as _io
import json
import math
from collections.abc import Iterable, Sequence
from typing import TextIO

from fringe.result import MEASURED_KEYS, FringeResult
from fringe.result import jsonable as _jsonable

__all__ = ["format_value", "text_table", "json_line", "CsvStream", "TEXT_COLUMNS"]

#: Columns of the text table: (key, heading, unit).
TEXT_COLUMNS: list[tuple[str, str, str]] = [
    ("period_px", "period", "px"),
    ("orientation_deg", "orientation", "deg"),
    ("phase_rad", "phase", "rad"),
    ("visibility", "visibility", ""),
    ("snr", "SNR", ""),
]


def format_value(value: float | None, err: float | None = None, unit: str = "") -> str:
    """Format a value with its uncertainty, rounded to two significant digits of the error.

    Examples
    --------
    >>> format_value(16.63214, 0.00421, "px")
    '16.6321 ± 0.0042 px'
    >>> format_value(0.5, None)
    '0.5'
    """
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    suffix = f" {unit}" if unit else ""
    if err is None or not math.isfinite(err) or err <= 0:
        return f"{value:.6g}{suffix}"
    digits = max(0, 1 - int(math.floor(math.log10(err))))
    digits = min(digits, 12)
    return f"{value:.{digits}f} ± {err:.{digits}f}{suffix}"


def text_table(results: Sequence[FringeResult], extra: Sequence[tuple[str, str, str]] = ()) -> str:
    """A readable table, one row per result, warnings and errors below each row."""
    cols = list(TEXT_COLUMNS) + list(extra)
    header = ["file", "frame", "status"] + [
        f"{h} ({u})" if u else h for _, h, u in cols
    ]
    rows = []
    notes: list[list[str]] = []
    for r in results:
        d = r.to_dict()
        row = [str(d["file"]), str(d["frame"]), d["status"]]
        for key, _, _unit in cols:
            row.append(format_value(d.get(key), d.get(key + "_err")))
        rows.append(row)
        n = [f"  warning: {w}" for w in r.warnings]
        if r.status != "ok":
            n.insert(0, f"  error: {r.error}")
        notes.append(n)
    widths = [max(len(header[i]), *(len(row[i]) for row in rows)) if rows else len(header[i])
              for i in range(len(header))]
    out = _io.StringIO()
    out.write("  ".join(h.ljust(w) for h, w in zip(header, widths, strict=False)).rstrip() + "\n")
    for row, n in zip(rows, notes, strict=False):
        out.write("  ".join(c.ljust(w) for c, w in zip(row, widths, strict=False)).rstrip() + "\n")
        for line in n:
            out.write(line + "\n")
    return out.getvalue()


def json_line(result: FringeResult) -> str:
    """One JSON object on one line (JSON Lines)."""
    d = {k: _jsonable(v) for k, v in result.to_dict().items()}
    return json.dumps(d, allow_nan=False, default=str)


class CsvStream:
    """CSV writer with a header row: the standard columns, then the first row's other keys.

    Rows are written (and flushed) one at a time, so that nothing finished is lost.
    """

    FIRST = ["file", "frame", "status", "error"]

    def __init__(self, stream: TextIO, columns: Iterable[str] | None = None):
        self.stream = stream
        self.columns: list[str] | None = list(columns) if columns else None
        self._writer: csv.writer | None = None

    def write(self, result: FringeResult) -> None:
        d = result.to_dict()
        d["warnings"] = "; ".join(d.get("warnings") or [])
        if self.columns is None:
            std = list(self.FIRST)
            for key in MEASURED_KEYS:
                std += [key, key + "_err"]
            std += ["snr", "spectral_snr", "saturated_fraction"]
            rest = [k for k in d if k not in std and k != "warnings"]
            self.columns = std + rest + ["warnings"]
            self._writer = csv.writer(self.stream)
            self._writer.writerow(self.columns)
        assert self._writer is not None
        self._writer.writerow(["" if d.get(c) is None else _jsonable(d.get(c))
                               for c in self.columns])
        self.stream.flush()
