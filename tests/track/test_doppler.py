"""Received frequency of a tone and the Doppler formula."""

import numpy as np

from locate import synth
from locate.track.doppler import peak_frequency_hz, predicted_frequency
from locate.track.motion import straight_path

FS = 8000.0
C = 343.0


def test_peak_frequency_of_a_steady_sine():
    # Reference: the sine's own frequency (numpy-generated, 0.37 s, Hann, 8x zero padding).
    t = np.arange(int(0.37 * FS)) / FS
    for f in (187.3, 441.0, 1234.5):
        got, level = peak_frequency_hz(np.sin(2 * np.pi * f * t + 0.4), FS, 100.0, 2000.0)
        assert abs(got - f) < 0.05  # Hz
        assert level > 40.0  # dB over the band's median


def test_received_tone_follows_the_textbook_doppler_formula():
    # Textbook Doppler for a moving source and a still receiver:
    # f_heard = f0 c / (c - v cos(theta)), theta between the velocity and the direction from
    # the source to the mic at emission.  The tone is synthesised by locate.synth with the exact
    # retarded time per sample; the emission times used below are the simulator's own.
    mic = np.array([[0.0, 0.0, 1.5], [5.0, 0.0, 1.5]])
    v = np.array([25.0, 0.0, 0.0])
    path = synth.StraightPath([-150.0, -20.0, 1.0], v, 0.0)
    f0 = 500.0
    sim = synth.simulate_moving(mic, path, synth.Waveform("tone", fundamental_hz=f0), t_start_s=0.0,
                                t_stop_s=12.0, sample_rate_hz=FS, sound_speed_mps=C,
                                absorption=False, rng=np.random.default_rng(0))
    x = sim.signals[0]
    n = int(0.25 * FS)
    for t_c in (2.0, 5.0, 6.5, 8.0, 11.0):
        s0 = int(round(t_c * FS)) - n // 2
        got, _ = peak_frequency_hz(x[s0:s0 + n], FS, 400.0, 600.0)
        t_e = synth.emission_time_s(np.array(t_c), mic[0], path, C)
        u = mic[0] - path.position_m(t_e)
        cos_theta = np.dot(v, u) / (np.linalg.norm(v) * np.linalg.norm(u))
        expected = f0 * C / (C - np.linalg.norm(v) * cos_theta)
        assert abs(got - expected) < 0.3  # Hz (the sweep within a 0.25 s window is ~1 Hz)
        # the model used by the Doppler fit gives the same
        ours = predicted_frequency(f0, straight_path(path.position_m(0.0), v, 0.0),
                                   np.array([t_c]), mic[:1], C)[0, 0]
        assert abs(ours - expected) < 1e-6  # Hz
