"""The measurement result: values with 1-sigma uncertainties, warnings and provenance."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

__all__ = ["FringeResult", "MEASURED_KEYS", "jsonable"]

#: Measured quantities that always come with an ``_err`` partner (1 sigma), with units.
MEASURED_KEYS: dict[str, str] = {
    "orientation_deg": "deg",
    "period_px": "px",
    "phase_rad": "rad",
    "visibility": "",
    "visibility_raw": "",
}


@dataclass
class FringeResult:
    """Result of measuring one image or one stack frame.

    ``values`` holds every measured or inferred quantity by its unit-suffixed key, each
    measured one with a ``<key>_err`` partner (one standard uncertainty). ``status`` is
    "ok" or "error"; on error ``error`` gives a plain one-line message and no numbers
    are reported. ``provenance`` lists (stage, parameters) in the order applied.

    Examples
    --------
    >>> r = FringeResult(file="a.tif", frame=0)
    >>> r.set("period_px", 12.5, 0.01)
    >>> r.to_dict()["period_px_err"]
    0.01
    """

    file: str = "<array>"
    frame: int = 0
    status: str = "ok"
    error: str | None = None
    warnings: list[str] = field(default_factory=list)
    values: dict[str, Any] = field(default_factory=dict)
    provenance: list[tuple[str, dict]] = field(default_factory=list)
    #: Intermediate objects of the measurement (profile, fit) for inference; not reported.
    context: dict = field(default_factory=dict, repr=False, compare=False)

    def set(self, key: str, value: float, err: float | None = None) -> None:
        """Store a value (and its 1-sigma uncertainty)."""
        self.values[key] = _clean(value)
        if err is not None:
            self.values[key + "_err"] = _clean(err)

    def get(self, key: str, default: Any = None) -> Any:
        return self.values.get(key, default)

    def __getattr__(self, name: str) -> Any:
        values = self.__dict__.get("values")
        if values is not None and name in values:
            return values[name]
        raise AttributeError(name)

    @property
    def ok(self) -> bool:
        return self.status == "ok"

    def warn(self, message: str) -> None:
        if message not in self.warnings:
            self.warnings.append(message)

    def warn_sampling(self, period_px: float, fringes: float) -> None:
        """Warnings when the period is near the sampling limit or too few fringes fit.

        Below 2.5 px per fringe the pattern is within a quarter of the Nyquist limit
        (2 px), where aliasing can give a wrong period; with fewer than three fringes the
        period and visibility rest on too little of the pattern (common practice).
        """
        if period_px < 2.5:
            self.warn(f"period {period_px:.2f} px is close to the sampling limit of 2 px: "
                      "aliasing risk, the period may be wrong")
        if fringes < 3:
            self.warn(f"only {fringes:.1f} fringes in the region (fewer than 3): period and "
                      "visibility are unreliable")

    def fail(self, message: str) -> FringeResult:
        """Mark as failed: no numbers are kept except ``snr`` and ``saturated_fraction``."""
        self.status = "error"
        self.error = message
        keep = {k: v for k, v in self.values.items() if k in ("snr", "saturated_fraction",
                                                                "spectral_snr")}
        self.values = keep
        self.context = {}
        return self

    def to_dict(self) -> dict[str, Any]:
        """Flat dictionary with unit-suffixed keys (the JSON Lines record)."""
        out: dict[str, Any] = {"file": self.file, "frame": self.frame, "status": self.status,
                               "error": self.error}
        if self.status == "ok":
            for key in MEASURED_KEYS:
                out.setdefault(key, None)
                out.setdefault(key + "_err", None)
        out.update(self.values)
        out.setdefault("snr", None)
        out.setdefault("saturated_fraction", None)
        out["warnings"] = list(self.warnings)
        return out


def jsonable(value: Any) -> Any:
    """A value ready for JSON: numpy scalars and arrays to Python, NaN and inf to None.

    Examples
    --------
    >>> import numpy as np
    >>> jsonable({"a": np.float64(1.5), "b": [np.nan, np.int64(2)], "c": np.arange(2)})
    {'a': 1.5, 'b': [None, 2], 'c': [0, 1]}
    """
    if isinstance(value, dict):
        return {k: jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    if hasattr(value, "tolist") and not isinstance(value, (str, bytes)):
        return jsonable(value.tolist())  # numpy scalar or array
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


_clean = jsonable
