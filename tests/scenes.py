"""Shared invented test scenes built on the project's exact simulator (locate.synth)."""

from __future__ import annotations

import numpy as np

from locate.fix.solver import locate_source
from locate.signal.delays import all_pairs, estimate_delays, geometric_max_lag_s
from locate.synth import Emission, Waveform, simulate_events

# A 5-mic, ~40 m aperture array of an invented survey (heights of tripods vary a little).
ARRAY_40M = np.array([[0.0, 0.0, 1.2], [40.0, 0.0, 1.5], [38.0, 35.0, 1.1],
                      [2.0, 38.0, 1.3], [20.0, 18.0, 1.0]])
CENTRE_40M = np.array([20.0, 18.0])
RATE_HZ = 48000.0
BROADBAND = Waveform(kind="noise", band_hz=(100.0, 4000.0), duration_s=1.0, taper_s=0.01)


def burst_delays(mics, source_m, rng, *, waveform=BROADBAND, snr_db=10.0, rate_hz=RATE_HZ,
                 temperature_c=20.0, relative_humidity=50.0, wind_mps=None, clock_offsets_s=None,
                 sound_speed_mps=None, ground_reflection=None, analysis_speed_mps=None):
    """Simulate one burst at ``source_m`` and estimate its delays; returns (DelaySet, sim)."""
    far = float(np.max(np.linalg.norm(np.asarray(mics) - np.asarray(source_m), axis=1)))
    duration_s = 0.05 + waveform.duration_s + far / 330.0 + 0.1  # the whole burst at every mic
    sim = simulate_events(mics, [Emission(np.asarray(source_m, float), 0.05, waveform)],
                          sample_rate_hz=rate_hz, duration_s=duration_s,
                          temperature_c=temperature_c, relative_humidity=relative_humidity,
                          wind_mps=wind_mps, snr_db=snr_db, clock_offsets_s=clock_offsets_s,
                          sound_speed_mps=sound_speed_mps, ground_reflection=ground_reflection,
                          rng=rng)
    c = sim.sound_speed_mps if analysis_speed_mps is None else analysis_speed_mps
    pairs = all_pairs(len(mics))
    wind_speed = 0.0 if wind_mps is None else float(np.linalg.norm(wind_mps))
    max_lag = geometric_max_lag_s(mics, pairs, c, wind_speed_mps=wind_speed)
    ds = estimate_delays(sim.signals, rate_hz, max_lag_s=max_lag, pairs=pairs)
    return ds, sim


def fix_burst(mics, source_m, rng, *, dims=2, **kw):
    """Simulate, estimate delays and fix; returns (Fix, DelaySet, sim)."""
    ds, sim = burst_delays(mics, source_m, rng, **kw)
    fx = locate_source(mics, ds, sim.sound_speed_mps, wind_mps=kw.get("wind_mps"), dims=dims,
                       source_z_m=float(source_m[2]))
    return fx, ds, sim


def inside(fx, truth, probability_scale=5.991):
    """True when the truth lies inside the fix's 95 % ellipse (chi-square, 2 dof)."""
    e = np.asarray(fx.position_m[:2]) - np.asarray(truth[:2])
    cov = fx.covariance_m2[:2, :2]
    return float(e @ np.linalg.solve(cov, e)) <= probability_scale
