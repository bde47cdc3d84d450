"""Small helpers every layer may use (layer 0): the atomic writer and length formatting.

* :func:`write_atomic` / :func:`atomic_target` - the one way this package writes a file:
  a temporary file in the target folder, flushed to disk (``fsync``), then renamed over the
  target, so a reader never sees half a file and a failure leaves the old file as it was.
* :class:`OutputSet` - one output transaction: while one is open (``with OutputSet():``),
  :func:`write_atomic` and :func:`atomic_target` only *stage* their files (temporary files
  in the target folders, written and flushed); the set renames them all into place when it
  closes without an error, and removes them all otherwise, so a failed or interrupted
  command leaves every earlier output as it was.
* :func:`format_length` - the one way a length is written for a person (screen, map, report).
"""

from __future__ import annotations

import contextlib
import contextvars
import errno
import math
import os
import tempfile
from pathlib import Path

__all__ = ["write_atomic", "atomic_target", "OutputSet", "format_length"]

_OPEN_SETS: contextvars.ContextVar[tuple] = contextvars.ContextVar("tdoa_output_sets",
                                                                   default=())


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
    outputs = OutputSet.current()
    tmp = _temporary(path, suffix)
    try:
        yield Path(tmp)
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        _normal_permissions(tmp)
        if outputs is not None:
            outputs._register(path, tmp)  # renamed when the whole set is done
        else:
            os.replace(tmp, path)
    except OSError as exc:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise _naming(exc, path, tmp) from None
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def _naming(exc: OSError, path, tmp=None) -> OSError:
    """The same OS error, naming the file the user asked for (not our temporary name)."""
    if exc.filename is None or exc.filename == tmp or str(exc.filename).endswith(".part"):
        new = type(exc)(exc.errno, exc.strerror or str(exc), str(path))
        return new
    return exc


def _temporary(path: Path, suffix: str) -> str:
    """A new empty temporary file beside ``path`` (same folder: the rename stays atomic)."""
    folder = path.parent if str(path.parent) else Path(".")
    if os.path.isdir(path) and not os.path.islink(path):
        raise IsADirectoryError(errno.EISDIR, "is a folder, not a file", str(path))
    # keep the temporary name within NAME_MAX: a long target name gets a shortened prefix
    prefix = f".{path.name[:80]}."
    try:
        fd, tmp = tempfile.mkstemp(prefix=prefix, suffix=suffix, dir=folder)
    except OSError as exc:
        raise _naming(exc, path) from None
    os.close(fd)
    return tmp


class OutputSet:
    """One output transaction: every file written while it is open is renamed into place
    together, only when the block ends without an error.

    Usage::

        with OutputSet():
            write_atomic("a.json", text)        # staged: .a.json.XXXX.part
            save_figure(fig, "a.png")           # staged too (rendered first, in memory)
        # both renamed here; on any exception (KeyboardInterrupt too) both temporaries are
        # removed and a.json / a.png are left as they were

    Sets nest: an inner set commits its own files when it ends (``tdoa demo`` runs commands
    one after another, each reading the files of the one before).

    If a rename fails half-way (a target turned into a folder, a vanished folder), the files
    already renamed are put back: the previous versions are kept as hard links until the set
    is done.
    """

    def __init__(self):
        self._staged: dict[str, str] = {}  # target (absolute, as given) -> temporary file
        self._after: list = []
        self._token = None

    @staticmethod
    def current() -> OutputSet | None:
        """The innermost open set, or None."""
        sets = _OPEN_SETS.get()
        return sets[-1] if sets else None

    def __enter__(self) -> OutputSet:
        self._token = _OPEN_SETS.set(_OPEN_SETS.get() + (self,))
        return self

    def __exit__(self, exc_type, exc, tb):
        _OPEN_SETS.reset(self._token)
        if exc_type is None:
            self.commit()
        else:
            self.discard()
        return False

    # ------------------------------------------------------------------ staging
    def _register(self, path, tmp) -> None:
        key = os.path.abspath(path)
        old = self._staged.pop(key, None)
        if old is not None and old != tmp:
            with contextlib.suppress(OSError):
                os.unlink(old)
        self._staged[key] = str(tmp)

    def add(self, path, data) -> Path:
        """Stage ``data`` for ``path``: str (UTF-8) or bytes, or a callable ``writer(tmp)``
        that writes the file it is given.  Written and flushed now; renamed at commit."""
        path = Path(path)
        token = _OPEN_SETS.set(_OPEN_SETS.get() + (self,))
        try:
            if callable(data):
                with atomic_target(path) as tmp:
                    data(tmp)
            else:
                raw = data.encode("utf-8") if isinstance(data, str) else bytes(data)
                with atomic_target(path) as tmp, open(tmp, "wb") as fh:
                    fh.write(raw)
        finally:
            _OPEN_SETS.reset(token)
        return path

    def staged(self, path) -> Path | None:
        """The temporary file staged for ``path`` (to read it back before the commit)."""
        tmp = self._staged.get(os.path.abspath(path))
        return None if tmp is None else Path(tmp)

    @property
    def targets(self) -> list[Path]:
        """The files this set will write, in staging order."""
        return [Path(p) for p in self._staged]

    def after_commit(self, callback) -> None:
        """Call ``callback()`` once every file is in place (e.g. to say "written to")."""
        self._after.append(callback)

    # ------------------------------------------------------------------ ending
    def discard(self) -> None:
        """Remove every staged temporary file; the targets stay as they were."""
        for tmp in self._staged.values():
            with contextlib.suppress(OSError):
                os.unlink(tmp)
        self._staged.clear()
        self._after.clear()

    def commit(self) -> None:
        """Rename every staged file into place (all, or none: see the class notes)."""
        items = list(self._staged.items())
        self._staged.clear()
        done: list[tuple[str, str | None]] = []
        try:
            for target, _ in items:  # before any rename: a folder in the way fails all
                if os.path.isdir(target) and not os.path.islink(target):
                    raise IsADirectoryError(errno.EISDIR, "is a folder, not a file", target)
            for target, tmp in items:
                backup = None
                if os.path.lexists(target):
                    backup = tmp + ".old"
                    try:
                        os.link(target, backup, follow_symlinks=False)
                    except OSError:  # no hard links here: this one cannot be put back
                        backup = None
                os.replace(tmp, target)
                done.append((target, backup))
        except BaseException:
            for target, backup in reversed(done):
                with contextlib.suppress(OSError):
                    if backup is not None:
                        os.replace(backup, target)
                    else:
                        os.unlink(target)
            for _, tmp in items:
                with contextlib.suppress(OSError):
                    os.unlink(tmp)
            self._after.clear()
            raise
        for _, backup in done:
            if backup is not None:
                with contextlib.suppress(OSError):
                    os.unlink(backup)
        after, self._after = self._after, []
        for callback in after:
            callback()


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
        fh.write(raw)  # inside an OutputSet: staged, renamed when the set commits
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
