"""The ground-reflection delay term (locate.accuracy.reflections, locate.signal.delays).

Reference: the simulator's image method (a reflecting plane z = 0, image source at
(x, y, -z), textbook) - the delay error a reflection puts into the estimator is measured on
it and compared with the model.
"""

import numpy as np

from locate.accuracy.reflections import (
    TYPICAL_MIC_HEIGHT_M,
    ground_bias_covariance,
    ground_reflection_term,
)
from locate.physics.air import sound_speed_mps, travel_time_s
from locate.signal.delays import all_pairs, estimate_delays, geometric_max_lag_s, multipath_bias_s
from locate.synth import Emission, Waveform, simulate_events

RATE_HZ = 16000.0
MICS = np.array([[0.0, 0.0, 1.2], [40.0, 0.0, 1.5], [38.0, 35.0, 1.1], [2.0, 38.0, 1.3],
                 [20.0, 18.0, 1.6], [-4.0, 19.0, 1.4]])


def _bang(src, q, seed):
    c = float(sound_speed_mps(12.0, 70.0))
    wave = Waveform(kind="impulse", band_hz=(150.0, 4000.0), duration_s=0.08, rms_pa_at_1m=5.0)
    sim = simulate_events(MICS, [Emission(src, 0.3, wave)], sample_rate_hz=RATE_HZ,
                          duration_s=0.6, temperature_c=12.0, relative_humidity=70.0,
                          snr_db=20.0, ground_reflection=q, rng=np.random.default_rng(seed))
    pairs = all_pairs(len(MICS))
    d = estimate_delays(sim.signals[:, int(0.3 * RATE_HZ):int(0.5 * RATE_HZ)], RATE_HZ,
                        pairs=pairs, max_lag_s=geometric_max_lag_s(MICS, pairs, c,
                                                                   margin_s=5e-4))
    tt = travel_time_s(src, MICS, c, np.zeros(3))
    return d, c, tt[pairs[:, 1]] - tt[pairs[:, 0]]


def test_modelled_bias_matches_the_delay_error_a_ground_reflection_makes():
    src = np.array([17.0, 7.0, 0.68])
    d, c, true = _bang(src, 0.57, 3)
    img = src * np.array([1, 1, -1])
    lag = travel_time_s(img, MICS, c, np.zeros(3)) - travel_time_s(src, MICS, c, np.zeros(3))
    gain = 0.57 * np.linalg.norm(MICS - src, axis=1) / np.linalg.norm(MICS - img, axis=1)
    b = multipath_bias_s(d, lag[None], gain[None])[0]
    err = d.delay_s - true
    clear = d.second_ratio < 0.7  # a near-tie of two peaks is a coin flip, not a bias
    assert clear.sum() >= 8
    assert np.max(np.abs(err)[clear]) > 15e-6  # the reflection matters (tens of µs) ...
    assert np.max(np.abs(err - b)[clear]) < 2e-6  # ... and the model predicts it to 2 µs


def test_the_ground_term_follows_the_ground_not_the_frame():
    # the image method depends on heights above the plane only: the same scene 100 m higher
    # with the ground at z = 100 m gives the same term; an unknown ground (WGS84) is taken a
    # typical mic height below the lowest mic
    src = np.array([20.0, 25.0, 1.0])
    d, c, _ = _bang(src, 0.8, 4)
    local = ground_bias_covariance(d, src, MICS, c, source_z_sd_m=0.6)
    up = np.array([0, 0, 100.0])
    moved = ground_reflection_term(d, src + up, MICS + up, c, ground_z_m=100.0,
                                   source_z_sd_m=0.6)
    assert np.allclose(moved.bias_covariance_s2, local, rtol=1e-9, atol=1e-18)
    unknown = ground_reflection_term(d, src + up, MICS + up, c, ground_z_m=None,
                                     source_z_sd_m=0.6)
    ground = 100.0 + MICS[:, 2].min() - TYPICAL_MIC_HEIGHT_M
    given = ground_reflection_term(d, src + up, MICS + up, c, ground_z_m=ground,
                                   source_z_sd_m=0.6)
    assert np.allclose(unknown.bias_covariance_s2, given.bias_covariance_s2)
    assert np.sqrt(np.diag(local)).max() > 5e-6  # a term of some µs, not zero


def test_fine_step_is_the_maximum_of_the_modelled_cosine_sum():
    # multipath_biases_s runs Newton on Taylor moments of the bins; reference:
    # scipy.optimize.minimize_scalar (bounded) on the exact weighted cosine sum of every bin,
    # sum_b c_b cos(dphi_b + omega_b d), within +-1.5 samples of the true delay
    from scipy.optimize import minimize_scalar

    from locate.signal.delays import multipath_biases_s

    d, _, _ = _bang(np.array([17.0, 7.0, 0.68]), 0.9, 5)
    rng = np.random.default_rng(2)
    lag = rng.uniform(0.0, 1.5e-3, (3, len(MICS)))
    gain = rng.uniform(0.3, 1.0, (3, len(MICS)))
    jumped, direct = multipath_biases_s(d, lag, gain)
    assert np.array_equal(jumped, multipath_bias_s(d, lag, gain))
    assert np.array_equal(direct, multipath_bias_s(d, lag, gain, coarse=False))
    om = 2 * np.pi * d.spectral_freqs_hz
    phi = np.angle(1.0 + gain[..., None] * np.exp(-1j * om * lag[..., None]))
    lim = 1.5 / d.sample_rate_hz
    for s in range(lag.shape[0]):
        for p, (i, j) in enumerate(d.pairs):
            c, dphi = d.spectral_weight[p], phi[s, j] - phi[s, i]
            ref = minimize_scalar(lambda x, c=c, dphi=dphi: -np.sum(c * np.cos(dphi + om * x)),
                                  bounds=(-lim, lim), method="bounded",
                                  options={"xatol": 1e-12})
            assert abs(direct[s, p] - ref.x) < 1e-9  # 1 ns, against biases of µs
    assert np.max(np.abs(direct)) > 5e-6
