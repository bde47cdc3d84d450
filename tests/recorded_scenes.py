"""Invented passes of recorded engine and propeller sounds (tests/data/sounds/vehicles/).

The excerpts (LICENSES.md beside them) are emitted by the project's simulator
(:func:`locate.synth.simulate_moving`: exact retarded time per sample per mic, 1/r spreading,
ISO 9613-1 air absorption, an image-source ground reflection) as a moving source; each excerpt
is looped (overlap-added over its 20 ms end fades) to cover the pass.  Air: 20 degC, 50 % RH,
as written in the site file.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import soundfile as sf

from locate import synth
from tests.cli_helpers import write_site

SOUNDS = Path(__file__).resolve().parent / "data" / "sounds" / "vehicles"
VEHICLE_MICS = np.array([(0, 0, 1.5), (25, 5, 1.2), (10, 30, 1.5), (-20, 20, 1.3),
                         (-15, -15, 1.4), (20, -20, 1.6)], float)  # 6 mics over ~60 m
AIRCRAFT_MICS = np.array([(0, 0, 1.5), (120, 30, 1.5), (-100, 80, 1.5), (-60, -110, 1.5),
                          (90, -100, 1.5), (10, 20, 10.0)], float)  # ~250 m, 10 m mast


def recorded(name, rms_pa_at_1m=1.0):
    """The excerpt ``name`` (bus, lorry, propeller, propeller_b) as a simulator waveform."""
    x, fs = sf.read(SOUNDS / f"{name}.flac", dtype="float64")
    return synth.Waveform("recording", samples=x, samples_rate_hz=float(fs), taper_s=0.02,
                          rms_pa_at_1m=rms_pa_at_1m)


def _unit(heading_deg):
    h = np.deg2rad(heading_deg)
    return np.array([np.sin(h), np.cos(h), 0.0]), np.array([np.cos(h), -np.sin(h), 0.0])


def scene(name):
    """(sound, mics, path, t_stop_s, fs, snr_db, dims, span_s, source_z or None) of a scene.

    bus / lorry: a road vehicle (source 1 m up) at 12 / 9 m/s, passing 24 / 35 m from the
    centre of a 6-mic ~60 m array, 10 dB SNR; propeller / propeller_b: a propeller aircraft
    at 450 / 300 m, 60 m/s, passing 150 m to the side of a ~250 m array with a 10 m mast mic,
    5 dB SNR, tracked in 3-D.
    """
    centre = VEHICLE_MICS.mean(axis=0)
    if name in ("bus", "lorry"):
        heading, miss, speed = (60.0, 24.0, 12.0) if name == "bus" else (150.0, 35.0, 9.0)
        d, n = _unit(heading)
        cpa = centre + miss * n
        cpa[2] = 1.0
        t_stop = 16.0
        path = synth.StraightPath(cpa - 0.5 * t_stop * speed * d, speed * d)
        return name, VEHICLE_MICS, path, t_stop, 8000.0, 10.0, 2, (1.0, 15.5), 1.0
    if name in ("propeller", "propeller_b"):
        height, heading = (450.0, 300.0) if name == "propeller" else (300.0, 40.0)
        d, n = _unit(heading)
        p0 = np.array([0.0, 0.0, height]) + 150.0 * n - 12.0 * 60.0 * d
        return (name, AIRCRAFT_MICS, synth.StraightPath(p0, 60.0 * d), 24.0, 6000.0, 5.0, 3,
                (3.0, 24.0), None)
    raise KeyError(name)


def write_scene(folder, name, seed=1, *, ground=0.7, short=False, keep=(0, 1, 3, 5)):
    """Simulate scene ``name`` and write its site + WAV; returns (site, path, span, dims, z).

    ``short``: a cheap variant of a road vehicle's pass: 4 mics, 5 s around the closest
    approach (span 0.5-4.5 s).
    """
    sound, mics, path, t_stop, fs, snr, dims, span, z = scene(name)
    if short:
        mics = mics[list(keep)]
        shift = 0.5 * t_stop - 2.5  # the closest approach at 2.5 s
        path = synth.StraightPath(path.position_m(shift), path.velocity_mps(shift))
        t_stop, span = 5.0, (0.5, 4.5)
    sim = synth.simulate_moving(mics, path, recorded(sound), t_start_s=0.0, t_stop_s=t_stop,
                                sample_rate_hz=fs, snr_db=snr, ground_reflection=ground,
                                absorption=True, rng=np.random.default_rng(seed))
    site = write_site(folder, mics, sim.signals, fs, temperature_c=20.0, humidity=50.0)
    return site, path, span, dims, z
