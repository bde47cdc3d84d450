"""Moving-source tracks end to end on simulated recordings (issue 3 acceptance).

Truth comes from the simulator (locate.synth, exact retarded time per sample per mic); the
Doppler and kinematics references are named beside each check.
"""

import json

import numpy as np
import pytest
from scipy import stats

from locate import synth
from locate.errors import NothingFoundError, OptionError
from locate.track.motion import heading_deg, straight_path
from locate.track.pathfit import fit_path
from locate.track.retarded import Parametrisation, predict_delays
from locate.track.tracker import describe_fit, naive_fit, track_recording, track_to_dict

FS = 8000.0
C = 343.0
CHI2_95_2D = stats.chi2.ppf(0.95, 2)  # 5.991 (scipy.stats.chi2; REFERENCES.md)

VEHICLE_MICS = np.array([(0, 0, 1.5), (25, 5, 1.2), (10, 30, 1.5), (-20, 20, 1.3),
                         (-15, -15, 1.4), (20, -20, 1.6)], float)
AIRCRAFT_MICS = np.array([(0, 0, 1.5), (120, 30, 1.5), (-100, 80, 1.5), (-60, -110, 1.5),
                          (90, -100, 1.5), (10, 20, 10.0)], float)  # mic 6 on a 10 m mast


def _vehicle_path(heading=60.0, speed=20.0, miss_m=30.0, t_cpa=7.0):
    """Straight road passing ``miss_m`` from the array centroid at ``t_cpa``, height 0.5 m."""
    h = np.deg2rad(heading)
    d = np.array([np.sin(h), np.cos(h), 0.0])
    n = np.array([np.cos(h), -np.sin(h), 0.0])
    cpa = VEHICLE_MICS.mean(axis=0) + miss_m * n
    cpa[2] = 0.5
    return synth.StraightPath(cpa - speed * t_cpa * d, speed * d, 0.0)


def _simulate(mics, path, waveform, t_stop, snr_db, seed, fs=FS):
    return synth.simulate_moving(mics, path, waveform, t_start_s=0.0, t_stop_s=t_stop,
                                 sample_rate_hz=fs, sound_speed_mps=C, snr_db=snr_db,
                                 absorption=False, rng=np.random.default_rng(seed))


def _span(sim, t_from, t_to):
    fs = sim.sample_rate_hz
    return sim.signals[:, int(round(t_from * fs)):int(round(t_to * fs))]


def _horizontal_m2(err, cov):
    e = err[:, :2]
    return np.einsum("wi,wij,wj->w", e, np.linalg.inv(cov[:, :2, :2]), e)


VEHICLE_SOUND = (synth.Waveform("noise", band_hz=(150.0, 3000.0)),
                 synth.Waveform("tone", fundamental_hz=220.0, harmonics=(1.0, 0.5),
                                rms_pa_at_1m=0.7))


@pytest.fixture(scope="module")
def vehicle():
    path = _vehicle_path()
    sim = _simulate(VEHICLE_MICS, path, VEHICLE_SOUND, 14.0, 10.0, seed=11)
    res = track_recording(_span(sim, 1.0, 13.5), FS, VEHICLE_MICS, C, t0_s=1.0, source_z_m=0.5,
                          band_hz=(150.0, 3000.0), tone_hz="auto")
    return path, res


def test_vehicle_heading_and_speed_meet_the_acceptance(vehicle):
    # Issue 3: 20 m/s straight road 30 m from a 6-mic array, SNR 10 dB: heading <= 2 deg,
    # speed <= 3 %.  Truth: the simulator's path.
    path, res = vehicle
    assert abs((res.heading_deg - 60.0 + 180.0) % 360.0 - 180.0) <= 2.0
    assert abs(res.speed_mps - 20.0) <= 0.03 * 20.0
    # the stated uncertainty explains the error (3 sd)
    assert abs(res.speed_mps - 20.0) <= 3 * res.speed_sd_mps + 1e-3
    assert res.fit.used.sum() >= 0.9 * len(res.t_heard_s)


def test_vehicle_track_points_sit_at_the_true_emission_positions(vehicle):
    path, res = vehicle
    err = res.position_m - path.position_m(res.t_emit_s)
    assert np.sqrt(np.mean(np.sum(err[:, :2] ** 2, axis=1))) < 0.5  # m
    # emission times: the true ones for the sound heard at mic 0 (simulator probes)
    t_e_true = synth.emission_time_s(res.t_heard_s, VEHICLE_MICS[0], path, C)
    np.testing.assert_allclose(res.t_emit_s, t_e_true, atol=1e-4)  # 0.1 ms


def test_vehicle_is_now_position_and_lag(vehicle):
    # Where the source IS when heard: p(t_heard); the lag is the distance moved during the
    # travel time, about v * r / c (textbook kinematics) for the reference mic.
    path, res = vehicle
    np.testing.assert_allclose(res.position_now_m[:, :2], path.position_m(res.t_heard_s)[:, :2],
                               atol=0.5)
    r = np.linalg.norm(res.position_m - VEHICLE_MICS[0], axis=1)
    np.testing.assert_allclose(res.lag_m, 20.0 * r / C, rtol=0.05)
    # seen from a mic near the road's height, the bearing lag is nearly the whole sight-line angle
    np.testing.assert_allclose(np.abs(res.lag_bearing_deg), res.lag_angle_deg, atol=0.01)


def test_vehicle_closest_approach_to_each_mic(vehicle):
    path, res = vehicle
    for cpa in res.closest:
        m = VEHICLE_MICS[cpa["index"]]
        t = np.linspace(-5, 20, 250001)
        d = np.linalg.norm(path.position_m(t) - m, axis=1)
        k = np.argmin(d)
        assert abs(cpa["distance_m"] - d[k]) < 0.5  # m
        assert abs(cpa["t_s"] - t[k]) < 0.05  # s
        assert cpa["t_heard_s"] > cpa["t_s"]


def test_vehicle_doppler_speed_agrees_with_the_delay_speed(vehicle):
    # Doppler (textbook): f_heard = f0 c / (c - v cos(theta)); f0 = 220 Hz emitted.
    _, res = vehicle
    dop = res.doppler
    assert dop is not None
    assert abs(dop["f0_hz"] - 220.0) < 0.5  # Hz (the 220 Hz line is the strongest)
    assert abs(dop["speed_mps"] - 20.0) < 0.3  # m/s
    assert dop["agree"]


def test_track_to_dict_follows_the_result_schema(vehicle):
    _, res = vehicle
    names = [f"M{k + 1}" for k in range(6)]
    out = track_to_dict(res, names)
    for key in ("points", "heading_deg", "heading_sd_deg", "speed_mps", "speed_sd_mps"):
        assert key in out  # DESIGN.md "track" schema
    p = out["points"][0]
    for key in ("t_emit_s", "t_heard_s", "position_m", "covariance_m2", "position_now_m",
                "lag_m", "lag_bearing_deg"):
        assert key in p
    assert {c["name"] for c in out["closest_approach"]} == set(names)
    assert json.loads(json.dumps(out))["speed_mps"] == pytest.approx(res.speed_mps)


@pytest.fixture(scope="module")
def aircraft():
    hd = np.deg2rad(70.0)
    v = 55.0 * np.array([np.sin(hd), np.cos(hd), 0.0])
    path = synth.StraightPath(np.array([0.0, 0.0, 300.0]) - 12.0 * v, v, 0.0)
    sim = _simulate(AIRCRAFT_MICS, path, (synth.Waveform("noise", band_hz=(80.0, 2000.0)),),
                    24.0, 5.0, seed=3, fs=6000.0)
    res = track_recording(_span(sim, 2.0, 24.0), 6000.0, AIRCRAFT_MICS, C,
                          t0_s=2.0, dims=3, band_hz=(80.0, 2000.0), expected_speed_mps=50.0)
    return path, res


def test_aircraft_meets_the_acceptance(aircraft):
    # Issue 3: 300 m altitude, 55 m/s level flight over a ~250 m array with a 10 m mast,
    # SNR 5 dB: horizontal RMS of track points <= 15 m, heading <= 3 deg, speed <= 5 %.
    path, res = aircraft
    err = res.position_m - path.position_m(res.t_emit_s)
    rms_h = np.sqrt(np.mean(np.sum(err[:, :2] ** 2, axis=1)))
    assert rms_h <= 15.0
    assert abs((res.heading_deg - 70.0 + 180.0) % 360.0 - 180.0) <= 3.0
    assert abs(res.speed_mps - 55.0) <= 0.05 * 55.0
    assert abs(np.mean(res.position_m[:, 2]) - 300.0) < 5.0  # m, altitude from the 3-D fit


def test_ignoring_the_retarded_time_biases_the_aircraft_track(aircraft):
    # The naive reading (source at p(t_heard) while its sound travels) puts the aircraft where
    # it was about r / c earlier: ~55 m/s x ~1 s behind (textbook kinematics).
    path, res = aircraft
    naive = naive_fit(res, AIRCRAFT_MICS, C)
    err_n = naive.position_m - path.position_m(naive.t_heard_s)
    err_r = res.position_now_m - path.position_m(res.t_heard_s)
    rms_n = np.sqrt(np.mean(np.sum(err_n[:, :2] ** 2, axis=1)))
    rms_r = np.sqrt(np.mean(np.sum(err_r[:, :2] ** 2, axis=1)))
    assert rms_n > 30.0  # m
    assert rms_n > 5.0 * max(rms_r, 1.0)
    # the lag the listener gets wrong: the distance flown during the travel time, v r / c
    # (textbook kinematics), 50-115 m here, and several degrees of sight line overhead
    r = np.linalg.norm(res.position_m - AIRCRAFT_MICS[0], axis=1)
    np.testing.assert_allclose(res.lag_m, 55.0 * r / C, rtol=0.02)
    assert np.max(res.lag_angle_deg) > 5.0


def _delays_with_noise(path, t_c, sd_s, rng):
    """Reference-anchored delays of ``path`` plus independent arrival noise per mic."""
    par = Parametrisation(path.knot_times_s, 2, 0.5)
    d0 = predict_delays(par, par.theta(path), t_c, VEHICLE_MICS, PAIRS, C, jacobian=False)[0]
    noise = rng.normal(size=(len(t_c), 6)) * sd_s
    return d0 + noise[:, PAIRS[:, 1]] - noise[:, PAIRS[:, 0]]


PAIRS = np.stack(np.triu_indices(6, 1), axis=1)
DIFF = np.zeros((len(PAIRS), 6))
DIFF[np.arange(len(PAIRS)), PAIRS[:, 1]] = 1.0
DIFF[np.arange(len(PAIRS)), PAIRS[:, 0]] = -1.0


def test_ellipses_cover_the_truth_with_known_gaussian_delays():
    # Delays = exact retarded-time delays + N(0, (50 us)^2) per arrival; the pair covariance
    # sd^2 D D^T is singular (rank 5) and exercises the eigen whitening.  Coverage of the 95 %
    # ellipse (chi-square 2 dof, scipy.stats.chi2) over 24 independent tracks.
    rng = np.random.default_rng(7)
    path = straight_path([-120.0, -30.0, 0.5], [20.0, 4.0, 0.0], 0.0, (0.0, 12.0))
    t_c = np.arange(0.5, 12.0, 0.5)
    cov = np.broadcast_to((50e-6) ** 2 * DIFF @ DIFF.T, (len(t_c), len(PAIRS), len(PAIRS)))
    inside, speed_z = [], []
    for _ in range(24):
        d = _delays_with_noise(path, t_c, 50e-6, rng)
        fit = fit_path(t_c, d, cov, VEHICLE_MICS, PAIRS, C, source_z_m=0.5)
        err = fit.path.position_m(fit.t_emit_s) - path.position_m(fit.t_emit_s)
        res = describe_fit(fit, VEHICLE_MICS, C)
        inside.append(np.mean(_horizontal_m2(err, res.covariance_m2) < CHI2_95_2D))
        speed_z.append((res.speed_mps - np.hypot(20.0, 4.0)) / res.speed_sd_mps)
    assert np.mean(inside) >= 0.85
    assert 0.6 < np.std(speed_z) < 1.5  # standardised speed errors have unit spread


@pytest.mark.slow
def test_vehicle_ellipse_coverage_on_simulated_audio():
    # Issue 3: track points inside their 95 % ellipses ~95 % of the time (Monte Carlo over
    # independent passes; chi-square 2 dof from scipy.stats.chi2).  The points of one pass share
    # most of their error (one fitted path), so a pass is nearly all in or all out and the
    # passes, not the points, are the independent trials: 12 passes in random directions.
    # A 60-pass run of this scene gave 96.8 % of 4 140 points inside, heading and speed z-score
    # spreads 0.99 and 0.82.
    rng = np.random.default_rng(2000)
    m2, heading_z, speed_z = [], [], []
    for k in range(12):
        heading = float(rng.uniform(0.0, 360.0))
        path = _vehicle_path(heading=heading)
        sim = _simulate(VEHICLE_MICS, path, (synth.Waveform("noise", band_hz=(150.0, 3000.0)),),
                        14.0, 10.0, seed=2000 + k)
        res = track_recording(_span(sim, 1.0, 13.5), FS, VEHICLE_MICS, C, t0_s=1.0,
                              source_z_m=0.5, band_hz=(150.0, 3000.0))
        err = res.position_m - path.position_m(res.t_emit_s)
        m2.append(_horizontal_m2(err, res.covariance_m2))
        heading_z.append((((res.heading_deg - heading + 180.0) % 360.0) - 180.0)
                         / res.heading_sd_deg)
        speed_z.append((res.speed_mps - 20.0) / res.speed_sd_mps)
    frac = np.mean(np.concatenate(m2) < CHI2_95_2D)
    assert 0.85 <= frac  # 0.93 on these passes
    assert np.mean(np.abs(heading_z) < 1.96) >= 0.75  # normal 95 % interval, 12 trials
    # stated sds neither too small (spread > 1.6) nor grossly too large; 12 trials put the
    # spread of a z-score within about +-0.4 of its true value (speed 0.48, heading 1.24 here)
    assert 0.3 < np.std(speed_z) < 1.6 and 0.3 < np.std(heading_z) < 1.6


def test_window_longer_than_the_span_is_an_option_error():
    x = np.random.default_rng(0).normal(size=(6, 8000))
    with pytest.raises(OptionError, match="longer than the span"):
        track_recording(x, FS, VEHICLE_MICS, C, window_s=2.0)


@pytest.mark.parametrize("hop", [0.0, -0.1])
def test_non_positive_hop_is_an_option_error(hop):
    x = np.random.default_rng(0).normal(size=(6, 8000))
    with pytest.raises(OptionError, match="hop must be positive"):
        track_recording(x, FS, VEHICLE_MICS, C, window_s=0.3, hop_s=hop)


def test_silent_span_is_nothing_found():
    with pytest.raises(NothingFoundError, match="no signal"):
        track_recording(np.zeros((6, 16000)), FS, VEHICLE_MICS, C)


def test_span_of_independent_noise_is_nothing_found():
    x = np.random.default_rng(5).normal(size=(6, 24000))
    with pytest.raises(NothingFoundError, match="hear alike|does not line up the mics' sound"):
        track_recording(x, FS, VEHICLE_MICS, C, source_z_m=0.5, band_hz=(150.0, 3000.0))


def test_stationary_source_says_so_and_suggests_fix():
    path = synth.StraightPath([-50.0, -30.0, 0.5], [0.0, 0.0, 0.0], 0.0)
    sim = _simulate(VEHICLE_MICS, path, (synth.Waveform("noise", band_hz=(150.0, 3000.0)),),
                    5.0, 10.0, seed=1)
    with pytest.raises(NothingFoundError, match="stationary.*tdoa fix"):
        track_recording(_span(sim, 0.5, 4.5), FS, VEHICLE_MICS, C, t0_s=0.5, source_z_m=0.5,
                        band_hz=(150.0, 3000.0))


def test_heading_helper_agrees_with_result_convention(vehicle):
    _, res = vehicle
    assert heading_deg(res.velocity_mps) == pytest.approx(res.heading_deg)
