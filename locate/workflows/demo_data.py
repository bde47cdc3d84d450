"""Where the bundled demo recordings are (invented scenes, made by the simulator).

The recordings live in ``demo_recordings/`` at the top of the project; an installed package
carries a copy as package data (``locate/demo_recordings``).  :func:`demo_dir` finds either.
"""

from __future__ import annotations

from pathlib import Path

from locate.errors import OptionError

__all__ = ["demo_dir"]

_PACKAGE = Path(__file__).resolve().parents[1]


def demo_dir() -> Path:
    """The folder holding ``yard.toml`` and ``lane.toml`` and their recordings.

    Looked for in the installed package, beside the package's source (a checkout), and in the
    working folder, in that order.

    Raises
    ------
    locate.errors.OptionError
        When none of them holds the demo (a broken install).
    """
    for d in (_PACKAGE / "demo_recordings", _PACKAGE.parent / "demo_recordings",
              Path.cwd() / "demo_recordings"):
        if (d / "yard.toml").is_file():
            return d
    raise OptionError("the demo recordings are not installed with this copy of tdoa: "
                      "reinstall the package (pip install tdoa-locate)", field="demo_recordings")
