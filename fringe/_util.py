"""Small shared helpers: the domain exception, float policy and geometry conventions."""

from __future__ import annotations

import contextlib
import os
from collections.abc import Iterator

import numpy as np

__all__ = ["FringeError", "as_float", "wrap_phase", "fold_angle_deg", "LazyModule",
           "atomic_output"]


class FringeError(ValueError):
    """An input or measurement problem a user can act on.

    The message is one line that names the file (where there is one) and the problem.
    The command line prints it and exits with status 1; it never shows a traceback.
    """


def as_float(image: np.ndarray) -> np.ndarray:
    """Return `image` as a floating array (float32 stays float32, all else float64).

    Never returns the input object itself, so callers may modify the result.
    """
    arr = np.asarray(image)
    if arr.dtype == np.float32:
        return arr.astype(np.float32, copy=True)
    return arr.astype(np.float64, copy=True)


def wrap_phase(phi: float | np.ndarray) -> float | np.ndarray:
    """Wrap a phase into (-pi, pi]."""
    out = -((-np.asarray(phi, dtype=float) + np.pi) % (2 * np.pi) - np.pi)
    return float(out) if np.ndim(out) == 0 else out


def fold_angle_deg(t: float) -> float:
    """Fold an angle in degrees into [0, 180)."""
    f = float(t) % 180.0
    return 0.0 if f >= 180.0 else f


class LazyModule:
    """A module imported on first attribute access (keeps command start-up fast).

    Examples
    --------
    >>> special = LazyModule("scipy.special")
    >>> float(special.j1(0.0))
    0.0
    """

    def __init__(self, name: str):
        self._name = name
        self._module = None

    def __getattr__(self, attr: str):
        if self._module is None:
            import importlib

            self._module = importlib.import_module(self._name)
        return getattr(self._module, attr)


@contextlib.contextmanager
def atomic_output(path: str | os.PathLike, what: str = "output") -> Iterator[str]:
    """Write a file atomically: yield ``path + ".part"``, rename it into place on success.

    A crash or an error leaves either the previous file or none, never half a file. An
    ``OSError`` becomes a one-line `FringeError` naming the file.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = tempfile.mkdtemp()
    >>> with atomic_output(d + "/a.txt") as tmp:
    ...     _ = pathlib.Path(tmp).write_text("done")
    >>> pathlib.Path(d + "/a.txt").read_text()
    'done'
    """
    out = os.fspath(path)
    tmp = out + ".part"
    try:
        yield tmp
        os.replace(tmp, out)
    except OSError as exc:
        with contextlib.suppress(OSError):
            os.remove(tmp)
        raise FringeError(f"{out}: cannot write {what} ({exc.strerror or exc})") from None
