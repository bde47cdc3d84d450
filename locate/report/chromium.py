"""Headless Chromium: print an HTML page to PDF, or take a screenshot of it, offline.

The page is written to a private temporary folder and opened as a ``file://`` URL in a
throw-away browser profile, with every network service Chromium starts on its own turned off
and host names resolving nowhere (``--host-resolver-rules``), so a report is rendered from its
own bytes and nothing else.  Chromium is a program on the machine (Debian: ``apt-get install
chromium``), not a Python dependency: :func:`find_chromium` says whether it is there.

Functions
---------
* :func:`find_chromium` - the browser executable, or None.
* :func:`print_pdf` - HTML text -> PDF bytes (A4 unless the page's ``@page`` rule says
  otherwise).
* :func:`screenshot` - HTML text -> PNG bytes of the first ``width_px x height_px`` pixels.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import tempfile
from pathlib import Path

from locate.errors import OptionError, TdoaError

__all__ = ["CHROMIUM_NAMES", "OFFLINE_FLAGS", "find_chromium", "require_chromium", "print_pdf",
           "screenshot"]

CHROMIUM_NAMES = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable")
"""Executable names tried in turn on ``PATH`` (the ``TDOA_CHROMIUM`` variable goes first)."""

OFFLINE_FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--disable-extensions",
    "--disable-default-apps",
    "--disable-domain-reliability",
    "--disable-breakpad",
    "--metrics-recording-only",
    "--mute-audio",
    "--hide-scrollbars",
    "--host-resolver-rules=MAP * ~NOTFOUND",
)
"""Command-line flags for an offline, headless, single-use browser."""

TIMEOUT_S = 120.0


def find_chromium() -> str | None:
    """Path of a Chromium (or Chrome) executable, or None when there is none.

    ``TDOA_CHROMIUM`` (an executable path) overrides the search; an empty value means "none".
    """
    env = os.environ.get("TDOA_CHROMIUM")
    if env is not None:
        return env if env and shutil.which(env) else None
    for name in CHROMIUM_NAMES:
        path = shutil.which(name)
        if path:
            return path
    return None


def require_chromium() -> str:
    """The Chromium executable; :class:`OptionError` suggesting HTML output when missing."""
    exe = find_chromium()
    if exe is None:
        raise OptionError("PDF output needs Chromium, which was not found (tried "
                          + ", ".join(CHROMIUM_NAMES) + "): install it (Debian: apt-get "
                          "install chromium) or write HTML instead (-o report.html) and print "
                          "that from a browser", field="-o")
    return exe


def _run(html: str, output_flag: str, out_name: str, extra=(), timeout_s=TIMEOUT_S) -> bytes:
    """Render ``html`` with one output flag; returns the output file's bytes."""
    exe = require_chromium()
    with tempfile.TemporaryDirectory(prefix="tdoa-chromium-") as tmp:
        tmp = Path(tmp)
        page = tmp / "page.html"
        page.write_text(html, encoding="utf-8")
        out = tmp / out_name
        args = [exe, *OFFLINE_FLAGS, f"--user-data-dir={tmp / 'profile'}",
                f"--crash-dumps-dir={tmp / 'crashes'}", *extra, f"{output_flag}={out}",
                page.as_uri()]
        proc = subprocess.Popen(args, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE, start_new_session=True,
                                env={**os.environ, "HOME": str(tmp)})
        try:
            _, err = proc.communicate(timeout=timeout_s)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)  # the group we started (browser + helpers)
            proc.communicate()
            raise TdoaError(f"Chromium did not finish within {timeout_s:.0f} s",
                            file=exe, field="-o") from None
        if proc.returncode != 0 or not out.is_file() or out.stat().st_size == 0:
            lines = [ln for ln in err.decode("utf-8", "replace").splitlines()
                     if ln.strip() and "dbus" not in ln]
            tail = lines[-1].strip() if lines else "no message"
            raise TdoaError(f"Chromium failed (exit code {proc.returncode}): {tail}",
                            file=exe, field="-o")
        return out.read_bytes()


def print_pdf(html: str, *, timeout_s: float = TIMEOUT_S) -> bytes:
    """Print an HTML page to PDF with headless Chromium, offline.

    Parameters
    ----------
    html : str
        A self-contained page (its ``@page`` CSS sets the paper size and margins).
    timeout_s : float
        Give up (and kill the browser) after this long.

    Returns
    -------
    bytes
        The PDF file.

    Raises
    ------
    locate.errors.OptionError
        Chromium is not installed.
    locate.errors.TdoaError
        Chromium failed or timed out.
    """
    pdf = _run(html, "--print-to-pdf", "page.pdf",
               extra=("--no-pdf-header-footer", "--print-to-pdf-no-header"),
               timeout_s=timeout_s)
    if not pdf.startswith(b"%PDF-"):
        raise TdoaError("Chromium wrote something that is not a PDF", field="-o")
    return pdf


def screenshot(html: str, *, width_px: int = 1240, height_px: int = 1754,
               timeout_s: float = TIMEOUT_S) -> bytes:
    """PNG screenshot of the top ``width_px`` x ``height_px`` of an HTML page (screen CSS).

    Returns
    -------
    bytes
        The PNG file.
    """
    png = _run(html, "--screenshot", "page.png",
               extra=(f"--window-size={int(width_px)},{int(height_px)}",),
               timeout_s=timeout_s)
    if not png.startswith(b"\x89PNG"):
        raise TdoaError("Chromium wrote something that is not a PNG", field="-o")
    return png
