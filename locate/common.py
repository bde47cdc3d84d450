"""Small helpers every layer may use (layer 0): the atomic writer and length formatting.

* :func:`write_atomic` / :func:`atomic_target` - the one way this package writes a file:
  a temporary file in the target folder, flushed to disk (``fsync``), then renamed over the
  target, so a reader never sees half a file and a failure leaves the old file as it was.
* :func:`format_length` - the one way a length is written for a person (screen, map, report).
"""

from __future__ import annotations

import contextlib
import math
import os
import tempfile
from pathlib import Path

__all__ = ["write_atomic", "atomic_target", "format_length"]


def _normal_permissions(path) -> None:
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(path, 0o666 & ~umask)  # mkstemp makes 0600; give the file normal permissions


@contextlib.contextmanager
def atomic_target(path, *, suffix=".part"):
    """A temporary path beside ``path`` to write to; renamed over ``path`` on success.

    For writers that want a file name (soundfile, matplotlib).  On any exception (including
    KeyboardInterrupt) the temporary file is removed and ``path`` is left as it was.

    Yields
    ------
    pathlib.Path
        The temporary file (already created, empty).
    """
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=suffix, dir=folder)
    os.close(fd)
    try:
        yield Path(tmp)
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        _normal_permissions(tmp)
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def write_atomic(path, data) -> Path:
    """Write ``data`` (str as UTF-8, or bytes) to ``path`` through a temp file + rename.

    Parameters
    ----------
    path : str or os.PathLike
    data : str or bytes

    Returns
    -------
    pathlib.Path
    """
    path = Path(path)
    raw = data.encode("utf-8") if isinstance(data, str) else bytes(data)
    with atomic_target(path) as tmp, open(tmp, "wb") as fh:
        fh.write(raw)
    return path


def _digits(value: float, significant: int) -> int:
    """Decimals that show ``significant`` figures of ``value`` (never negative)."""
    if value == 0:
        return 0
    return max(0, significant - 1 - math.floor(math.log10(abs(value))))


def format_length(v_m, *, sep: str = " ", significant: int = 3) -> str:
    """A length with a unit chosen for its size, ``significant`` figures at most.

    ``0.049 mm`` is written ``49 µm``; then ``4.9 mm``, ``27 cm``, ``3.52 m``, ``240 m``,
    ``12.5 km`` (no trailing zeros).  None or a non-finite value is ``unbounded`` (the
    position is not determined along some direction).

    Parameters
    ----------
    v_m : float or None
        Length in metres.
    sep : str
        Between number and unit (the report uses a no-break space).
    significant : int
        Significant figures.
    """
    if v_m is None:
        return "unbounded"
    try:
        v = float(v_m)
    except (TypeError, ValueError):
        return "unbounded"
    if not math.isfinite(v):
        return "unbounded"
    a = abs(v)
    units = ((1e3, "km"), (1.0, "m"), (1e-2, "cm"), (1e-3, "mm"), (1e-6, "µm"))
    scale, unit = next((s, u) for s, u in units if a >= s or u == "µm")
    x = v / scale
    d = _digits(round(x, _digits(x, significant)) if x else 0.0, significant)
    text = f"{x:.{d}f}"
    if "." in text:
        text = text.rstrip("0").rstrip(".")  # "27 cm", "4.9 mm": no trailing zeros
    if unit == "µm" and a == 0:
        text, unit = "0", "m"
    return f"{text}{sep}{unit}"
