"""Cut the vehicle excerpts of this folder from the Debian package openttd-opensfx (1.0.3-2).

    apt-get download openttd-opensfx && dpkg-deb -x openttd-opensfx_*.deb x
    python tests/data/sounds/vehicles/extract.py \
        x/usr/share/games/openttd/baseset/opensfx/opensfx.cat

The package's sound catalogue (opensfx.cat) holds a table of (offset, size) uint32 pairs, then
per sound a length-prefixed description and a RIFF WAV (44.1 kHz, 16-bit, mono).  Each excerpt
below is cut, resampled to 16 kHz (scipy.signal.resample_poly), given 20 ms raised-cosine fades
at both ends, scaled to a peak of 0.7 and written as 16-bit FLAC.  LICENSES.md names origins.
"""

from __future__ import annotations

import io
import struct
import sys
from pathlib import Path

import numpy as np
import soundfile as sf
from scipy.signal import resample_poly

HERE = Path(__file__).resolve().parent
# name: (index in opensfx.cat, start s, stop s)
CUTS = {"bus": (27, 0.85, 2.85), "lorry": (25, 0.90, 3.40), "propeller": (8, 0.25, 1.75),
        "propeller_b": (69, 0.75, 2.75)}
RATE_HZ = 16000
FADE_S = 0.02


def sound(cat, index):
    off, size = struct.unpack_from("<II", cat, 8 * index)
    off &= 0x7FFFFFFF
    start = off + 1 + cat[off]  # skip the description
    return sf.read(io.BytesIO(cat[start:off + size]), dtype="float64")


def main(cat_path):
    cat = Path(cat_path).read_bytes()
    n = int(round(FADE_S * RATE_HZ))
    ramp = 0.5 - 0.5 * np.cos(np.pi * (np.arange(n) + 0.5) / n)
    for name, (index, a, b) in CUTS.items():
        x, fs = sound(cat, index)
        y = resample_poly(x[int(a * fs):int(b * fs)], RATE_HZ // 100, int(fs) // 100)
        y[:n] *= ramp
        y[-n:] *= ramp[::-1]
        sf.write(HERE / f"{name}.flac", 0.7 * y / np.max(np.abs(y)), RATE_HZ, subtype="PCM_16")


if __name__ == "__main__":
    main(sys.argv[1])
