"""fringe: image-based fringe analysis of camera captures.

Measure fringe period, orientation, phase and visibility with honest 1-sigma
uncertainties from single images, phone JPEGs and TIFF stacks, after dark subtraction
and flat-field correction; infer wavelength, aperture separation, slit width and source
size from them.

>>> import fringe
>>> callable(fringe.measure)
True
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

__version__ = "0.1.0"

__all__ = [
    "FringeError",
    "FringeResult",
    "measure",
    "measure_frames",
    "analyze_image",
    "__version__",
]

_LAZY = {
    "FringeError": "fringe._util",
    "FringeResult": "fringe.result",
    "measure": "fringe.analyze",
    "measure_frames": "fringe.analyze",
    "analyze_image": "fringe.analyze",
}


def __getattr__(name: str) -> Any:
    # Lazy imports keep `fringe --help` and batch start-up fast.
    if name in _LAZY:
        return getattr(import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'fringe' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(__all__)
