"""Helpers to run the ``tdoa`` command line in tests and to build small invented sites."""

from __future__ import annotations

import contextlib
import hashlib
import io
from pathlib import Path

import numpy as np

from locate.cli import main
from locate.io.audio import write_audio


def run(args):
    """Run ``tdoa ARGS``; returns (exit_code, stdout, stderr)."""
    out, err = io.StringIO(), io.StringIO()
    code = 0
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            main([str(a) for a in args])
        except SystemExit as exc:
            code = exc.code if isinstance(exc.code, int) else 1
    return code, out.getvalue(), err.getvalue()


def digest(paths):
    return {str(p): hashlib.sha256(Path(p).read_bytes()).hexdigest() for p in paths}


def write_site(folder, mics, signals, rate_hz, *, temperature_c=12.0, humidity=70.0,
               extra="", wind=None, name="site.toml", audio="rec.wav", full_scale_pa=None):
    """Write an invented site file + multichannel WAV; returns the site path."""
    folder = Path(folder)
    x = np.asarray(signals, float)
    scale = full_scale_pa or max(np.max(np.abs(x)) * 1.25, 1e-12)
    write_audio(folder / audio, x / scale, rate_hz, subtype="FLOAT")
    lines = ['title = "Test survey at Fenwick Marsh"', 'coordinates = "local"', "", "[air]",
             f"temperature_c = {temperature_c}", f"relative_humidity = {humidity}"]
    if wind is not None:
        lines += [f"wind_speed_mps = {wind[0]}", f"wind_from_deg = {wind[1]}"]
    lines += ["", "[recording]", f'file = "{audio}"', ""]
    for k, (px, py, pz) in enumerate(mics, 1):
        lines += ["[[mics]]", f'name = "M{k}"', f"x = {px}", f"y = {py}", f"z = {pz}",
                  f"channel = {k}", ""]
    path = folder / name
    path.write_text("\n".join(lines) + extra)
    return path
