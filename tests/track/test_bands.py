"""The band above an engine's harmonic lines (locate.track.bands)."""

from __future__ import annotations

import numpy as np

from locate import synth
from locate.track.bands import band_above_lines_hz

FS = 8000.0


def _engine(f0_hz, n_harm, rng, noise_band=(100.0, 3000.0), seconds=6.0):
    parts = (synth.Waveform("tone", fundamental_hz=f0_hz, harmonics=(1.0,) * n_harm),
             synth.Waveform("noise", band_hz=noise_band, rms_pa_at_1m=0.5))
    x = synth.emitted_signal(parts, FS, rng, duration_s=seconds)
    return np.stack([x + 0.01 * rng.standard_normal(x.size) for _ in range(3)])


def test_band_starts_above_the_highest_harmonic_and_ends_where_the_noise_does():
    # Ten harmonics of 50 Hz (the top one at 500 Hz, by construction) over broadband noise of
    # 100-3000 Hz (raised-cosine edges inside the band, locate.synth): the band must start
    # above 500 Hz (by 1/6 octave, 561 Hz) and end at the noise's upper edge: 2700-3000 Hz,
    # give or take the half-width of the 1/3-octave smoothing (x 2^(1/6), IEC 61260).
    lo, hi, top = band_above_lines_hz(_engine(50.0, 10, np.random.default_rng(1)), FS)
    assert 492.0 <= top <= 508.0  # Hz: the 10th harmonic, within two 4 Hz bins (Hann leakage)
    assert top * 2 ** (1 / 6) <= lo <= top * 2 ** (1 / 6) + 4.0
    assert 2700.0 <= hi <= 3000.0 * 2 ** (1 / 6)


def test_broadband_sound_without_lines_has_no_band_to_propose():
    rng = np.random.default_rng(2)
    x = synth.emitted_signal(synth.Waveform("noise", band_hz=(100.0, 3000.0)), FS, rng,
                             duration_s=6.0)
    assert band_above_lines_hz(np.stack([x, x]), FS) is None


def test_lines_up_to_the_top_of_the_band_leave_nothing_above_them():
    # Harmonics of 100 Hz up to 3400 Hz, noise to 3000 Hz: nothing stands above the lines.
    assert band_above_lines_hz(_engine(100.0, 34, np.random.default_rng(4)), FS) is None
