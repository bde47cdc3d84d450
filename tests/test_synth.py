"""Checks of the scenario simulator against outside truth (sources named beside each check)."""

import numpy as np
import pytest
from scipy.signal import hilbert

from locate import synth
from locate.errors import ConvergenceError
from locate.physics import air

FS = 48000.0
NS = 1e-9  # one nanosecond, s
MICS = np.array([[0.0, 0.0, 1.5], [40.0, 0.0, 1.2], [0.0, 35.0, 1.0], [30.0, 30.0, 2.0],
                 [-20.0, 10.0, 1.0]])


def arrival_by_phase_slope(reference, recording, sample_rate_hz):
    """Delay of ``recording`` against ``reference`` (both starting at sample 0), s.

    Integer lag from the cross-correlation peak, then a weighted least-squares fit of the
    cross-spectrum phase, which is -2 pi f tau for a pure delay (Fourier shift theorem,
    textbook; the phase-slope delay estimate is common practice).
    """
    n = 1 << int(np.ceil(np.log2(reference.size + recording.size)))
    cross = np.conj(np.fft.rfft(reference, n)) * np.fft.rfft(recording, n)
    lag = int(np.argmax(np.fft.irfft(cross, n)))
    omega = 2 * np.pi * np.fft.rfftfreq(n, 1.0 / sample_rate_hz)
    resid = cross * np.exp(1j * omega * lag / sample_rate_hz)
    w = np.abs(resid)
    return lag / sample_rate_hz - np.sum(w * omega * np.angle(resid)) / np.sum(w * omega**2)


def only(signal, sample_rate_hz, t_s, before_s=0.05, after_s=0.3):
    """``signal`` with everything outside [t_s - before_s, t_s + after_s] set to zero."""
    out = np.zeros_like(signal)
    a, b = int((t_s - before_s) * sample_rate_hz), int((t_s + after_s) * sample_rate_hz)
    out[a:b] = signal[a:b]
    return out


@pytest.mark.parametrize("kind", ["noise", "impulse", "chirp"])
def test_burst_arrives_at_distance_over_sound_speed(kind):
    src = np.array([12.3, 7.7, 1.1])
    wf = synth.Waveform(kind, (300.0, 5000.0), 0.1 if kind != "impulse" else 0.015)
    sim = synth.simulate_events(MICS, [synth.Emission(src, 0.2137, wf)], duration_s=0.6,
                                sound_speed_mps=343.0, rng=np.random.default_rng(1))
    # textbook: free-field arrival = emission time + distance / c
    expected = 0.2137 + np.linalg.norm(MICS - src, axis=1) / 343.0
    for i in range(len(MICS)):
        got = arrival_by_phase_slope(sim.emitted_signals[0], sim.signals[i], FS)
        assert abs(got - expected[i]) < 10 * NS
    np.testing.assert_allclose(sim.arrivals_s[0], expected, rtol=0, atol=1e-12)


def test_burst_arrival_in_wind_solves_the_moving_air_equation():
    src, wind = np.array([-15.0, 22.0, 0.5]), np.array([6.0, -3.0, 0.0])
    sim = synth.simulate_events(MICS, [synth.Emission(src, 0.1, synth.Waveform())],
                                duration_s=0.6, wind_mps=wind, temperature_c=5.0,
                                rng=np.random.default_rng(2))
    c = sim.sound_speed_mps
    for i in range(len(MICS)):
        tau = arrival_by_phase_slope(sim.emitted_signals[0], sim.signals[i], FS) - 0.1
        # textbook kinematics: a wavefront moving at c in air moving at w: |r - w tau| = c tau
        mismatch_s = (np.linalg.norm(MICS[i] - src - wind * tau) - c * tau) / c
        assert abs(mismatch_s) < 10 * NS


def test_whole_sample_delay_reproduces_the_emitted_samples():
    # distance and emission time chosen so the arrival is exactly 4800 + 480 samples
    src = MICS[0] + np.array([343.0 * 4800 / FS, 0.0, 0.0])
    sim = synth.simulate_events(MICS[:1], [synth.Emission(src, 480 / FS, synth.Waveform())],
                                duration_s=0.5, sound_speed_mps=343.0, absorption=False)
    x = sim.emitted_signals[0]
    r = 343.0 * 4800 / FS
    # Fourier shift theorem (textbook): a whole-sample shift only moves samples; 1/r spreading
    np.testing.assert_allclose(sim.signals[0, 5280:5280 + x.size], x / r, rtol=0,
                               atol=1e-12 * np.max(np.abs(x)))


def test_rms_halves_at_double_distance():
    src = np.array([0.0, 0.0, 2.0])
    mics = np.array([[25.0, 0.0, 2.0], [50.0, 0.0, 2.0], [0.0, -100.0, 2.0]])
    sim = synth.simulate_events(mics, [synth.Emission(src, 0.05, synth.Waveform())],
                                duration_s=0.8, absorption=False, rng=np.random.default_rng(3))
    rms = np.sqrt(np.mean(sim.signals**2, axis=1))
    # textbook spherical spreading: -20 log10(2) = -6.02 dB per doubling of distance
    assert 20 * np.log10(rms[0] / rms[1]) == pytest.approx(20 * np.log10(2), abs=0.1)
    assert 20 * np.log10(rms[1] / rms[2]) == pytest.approx(20 * np.log10(2), abs=0.1)
    # rms_pa_at_1m = 1 Pa: the direct rms at r is 1 / r Pa (textbook 1/r law)
    np.testing.assert_allclose(20 * np.log10(sim.received_rms * np.array([25, 50, 100])), 0.0,
                               atol=0.01)


def test_absorption_matches_iso_9613_at_a_tone():
    f = 1000.0 * 10**0.6  # exact 4 kHz octave mid-band frequency (IEC 61260)
    src, r = np.array([0.0, 0.0, 1.0]), 400.0
    mic = np.array([[r, 0.0, 1.0]])
    tone = synth.Waveform("tone", fundamental_hz=f, duration_s=1.0)
    kw = dict(duration_s=3.0, temperature_c=20.0, relative_humidity=70.0)
    on = synth.simulate_events(mic, [synth.Emission(src, 0.1, tone)], **kw)
    off = synth.simulate_events(mic, [synth.Emission(src, 0.1, tone)], absorption=False, **kw)
    loss_db = 20 * np.log10(np.std(off.signals) / np.std(on.signals))
    # ISO 9613-1:1993 eq. (5) as implemented in locate.physics.air
    assert loss_db == pytest.approx(air.absorption_db_per_m(f, 20.0, 70.0) * r, abs=0.01)
    # ISO 9613-2:1996 Table 2, 20 degC / 70 %: 22.9 dB/km at 4 kHz (from memory)
    assert loss_db == pytest.approx(22.9 * r / 1000.0, abs=0.03)


def test_snr_sets_each_channels_noise_variance():
    events = [synth.Emission(np.array([10.0, 12.0, 1.0]), 0.1, synth.Waveform()),
              synth.Emission(np.array([-8.0, 30.0, 1.0]), 0.6, synth.Waveform("impulse",
                                                                              duration_s=0.02))]
    clean = synth.simulate_events(MICS, events, duration_s=2.0, rng=np.random.default_rng(4))
    noisy = synth.simulate_events(MICS, events, duration_s=2.0, snr_db=10.0,
                                  rng=np.random.default_rng(4))
    noise = noisy.signals - clean.signals
    # definition (module docstring): noise variance = mean square of the direct sound over the
    # emission duration, averaged over events, / 10**(snr/10); measured to 3 % (common practice:
    # the variance of 96000 Gaussian samples scatters by sqrt(2/96000) = 0.5 %)
    np.testing.assert_allclose(np.var(noise, axis=1), noisy.received_rms**2 / 10.0, rtol=0.03)
    ms = []
    for e, ev in enumerate(events):
        dur = ev.waveform.duration_s
        a = np.round(clean.arrivals_s[e] * FS).astype(int)
        ms.append([np.mean(clean.signals[i, a[i]:a[i] + int(dur * FS)] ** 2)
                   for i in range(len(MICS))])
    np.testing.assert_allclose(noisy.received_rms**2, np.mean(ms, axis=0), rtol=0.03)
    absolute = synth.simulate_events(MICS, events, duration_s=2.0, noise_rms=0.02,
                                     rng=np.random.default_rng(4))
    np.testing.assert_allclose(np.std(absolute.signals - clean.signals, axis=1), 0.02, rtol=0.01)


def test_clock_offset_moves_the_recorded_arrival_by_exactly_the_offset():
    offsets = np.array([0.0, 1e-3, -2.5e-4, 3.3e-5, 0.1])
    sim = synth.simulate_events(MICS, [synth.Emission(np.array([5.0, 9.0, 1.0]), 0.2,
                                                      synth.Waveform())],
                                duration_s=0.8, clock_offsets_s=offsets,
                                rng=np.random.default_rng(5))
    for i in range(len(MICS)):
        got = arrival_by_phase_slope(sim.emitted_signals[0], sim.signals[i], FS)
        # site-file convention: true time = recorded time + offset_s
        assert abs(got - (sim.arrivals_s[0, i] - offsets[i])) < 1 * NS


def test_clock_drift_stretches_the_recorded_time_base():
    ppm = np.array([0.0, 100.0, -50.0, 20.0, 0.0])
    offsets = np.array([0.0, 2e-3, 0.0, -1e-3, 0.05])
    events = [synth.Emission(np.array([12.3, 7.7, 1.1]), 0.21, synth.Waveform("impulse",
                                                                              duration_s=0.02)),
              synth.Emission(np.array([-5.0, 20.0, 1.1]), 4.21, synth.Waveform("impulse",
                                                                               duration_s=0.02))]
    sim = synth.simulate_events(MICS, events, duration_s=5.0, clock_offsets_s=offsets,
                                clock_drift_ppm=ppm, rng=np.random.default_rng(6))
    for e in range(2):
        x = sim.emitted_signals[e]
        # a point u of the burst is recorded at R + u (1 + ppm 1e-6); the phase-slope fit aligns
        # the centroid of |x'|^2 (the omega^2 |X|^2 weighting of the fit, by Parseval)
        dx = np.gradient(x)
        u_c = np.sum(np.arange(x.size) / FS * dx**2) / np.sum(dx**2)
        for i in range(len(MICS)):
            recorded = (sim.arrivals_s[e, i] - offsets[i]) * (1 + ppm[i] * 1e-6)
            assert sim.recorded_arrivals_s[e, i] == pytest.approx(recorded, abs=1e-12)
            got = arrival_by_phase_slope(x, only(sim.signals[i], FS, recorded), FS)
            assert abs(got - recorded - ppm[i] * 1e-6 * u_c) < 5 * NS


def test_ground_image_arrives_at_the_image_path_time():
    src = np.array([20.0, 5.0, 1.8])
    image = src * np.array([1.0, 1.0, -1.0])
    kw = dict(duration_s=0.6, sound_speed_mps=343.0, absorption=False)
    ev = [synth.Emission(src, 0.1, synth.Waveform("impulse", duration_s=0.01))]
    direct = synth.simulate_events(MICS, ev, **kw)
    both = synth.simulate_events(MICS, ev, ground_reflection=0.7, **kw)
    reflected = both.signals - direct.signals
    for i in range(len(MICS)):
        r_dir, r_img = np.linalg.norm(MICS[i] - src), np.linalg.norm(MICS[i] - image)
        # textbook image method: the reflection comes from (x, y, -z), scaled by Q / r_image
        got = arrival_by_phase_slope(direct.emitted_signals[0], reflected[i], FS)
        assert abs(got - (0.1 + r_img / 343.0)) < 10 * NS
        level_db = 20 * np.log10(np.std(reflected[i]) / np.std(direct.signals[i]))
        assert level_db == pytest.approx(20 * np.log10(0.7 * r_dir / r_img), abs=0.01)
    np.testing.assert_allclose(both.image_arrivals_s[0],
                               0.1 + np.linalg.norm(MICS - image, axis=1) / 343.0, atol=1e-12)


@pytest.mark.parametrize("wind", [None, np.array([4.0, -7.0, 0.0])])
def test_closed_form_and_iterative_emission_times_agree(wind):
    rng = np.random.default_rng(7)
    path = synth.StraightPath([-80.0, 12.0, 3.0], [28.0, -4.0, 0.5], t0_s=1.0)
    t = rng.uniform(0.0, 8.0, 400)
    mic = rng.uniform(-50.0, 50.0, (400, 3))
    closed = synth.emission_time_s(t, mic, path, 340.0, wind, method="closed")
    iterated = synth.emission_time_s(t, mic, path, 340.0, wind, method="iterate")
    assert np.max(np.abs(closed - iterated)) < 1 * NS
    # textbook kinematics: |m - p(t_e) - w (t - t_e)| = c (t - t_e)
    w = np.zeros(3) if wind is None else wind
    tau = t - closed
    gap = np.linalg.norm(mic - path.position_m(closed) - w * tau[:, None], axis=1) - 340.0 * tau
    assert np.max(np.abs(gap)) / 340.0 < 1 * NS


def test_emission_time_broadcasts_times_against_mics():
    path = synth.StraightPath([0.0, 0.0, 1.0], [10.0, 0.0, 0.0])
    t = np.linspace(1.0, 2.0, 4)[:, None]
    te = synth.emission_time_s(t, MICS, path, 343.0)
    assert te.shape == (4, len(MICS))
    # common practice: element (k, i) equals the single-instant, single-mic solve
    assert te[2, 3] == pytest.approx(synth.emission_time_s(t[2, 0], MICS[3], path, 343.0),
                                     abs=1e-12)


def test_waypoint_emission_times_solve_the_retarded_equation():
    path = synth.WaypointPath([0.0, 3.0, 6.0], [[-60.0, 10.0, 1.0], [0.0, 10.0, 1.0],
                                                [30.0, 50.0, 1.0]])
    t = np.linspace(0.0, 8.0, 2001)
    for mic in MICS:
        te = synth.emission_time_s(t, mic, path, 343.0)
        # textbook: t = t_e + |p(t_e) - m| / c
        gap = t - te - np.linalg.norm(path.position_m(te) - mic, axis=-1) / 343.0
        assert np.max(np.abs(gap)) < 1 * NS


def test_iteration_that_cannot_settle_raises():
    path = synth.WaypointPath([0.0, 3.0], [[-60.0, 10.0, 1.0], [0.0, 10.0, 1.0]])
    with pytest.raises(ConvergenceError):
        synth.emission_time_s(np.linspace(0, 3, 10), MICS[0], path, 343.0, max_iter=1)


def test_moving_tone_equals_the_analytic_retarded_signal():
    f0, c = 1000.0, 343.0
    path = synth.StraightPath([-60.0, 10.0, 1.0], [25.0, 3.0, 0.0])
    tone = synth.Waveform("tone", fundamental_hz=f0, harmonics=(1.0, 0.5), taper_s=0.01)
    sim = synth.simulate_moving(MICS[:3], path, tone, t_start_s=0.1, t_stop_s=3.1,
                                absorption=False, sound_speed_mps=c)

    def tone_at(u):
        return np.sin(2 * np.pi * f0 * u) + 0.5 * np.sin(4 * np.pi * f0 * u)

    src = sim.emitted_signals[0]
    u = np.arange(src.size) / sim.emitted_rate_hz
    mid = (u > 0.02) & (u < 2.98)
    amp = np.sum(src[mid] * tone_at(u[mid])) / np.sum(tone_at(u[mid]) ** 2)
    t = np.arange(sim.signals.shape[1]) / FS
    for i in range(3):
        te = synth.emission_time_s(t, MICS[i], path, c)
        keep = (te > 0.15) & (te < 3.05)
        ref = amp * tone_at(te - 0.1) / np.linalg.norm(MICS[i] - path.position_m(te), axis=-1)
        # textbook retarded-time signal s(t_e) / r(t_e); error below -100 dB of the peak
        err = np.max(np.abs(sim.signals[i, keep] - ref[keep])) / np.max(np.abs(ref[keep]))
        assert err < 1e-5


def test_straight_pass_doppler_matches_the_textbook_formula():
    f0, v = 1000.0, np.array([30.0, 0.0, 0.0])
    path = synth.StraightPath([-90.0, 15.0, 1.0], v)
    mic = np.array([[0.0, 0.0, 1.5]])
    sim = synth.simulate_moving(mic, path, synth.Waveform("tone", fundamental_hz=f0),
                                t_start_s=0.0, t_stop_s=6.0, sound_speed_mps=343.0)
    phase = np.unwrap(np.angle(hilbert(sim.signals[0])))
    for t_heard in (1.0, 2.5, 3.2, 4.0, 5.5):
        k = int(t_heard * FS)
        f_heard = (phase[k + 480] - phase[k - 480]) / (2 * np.pi * 960 / FS)
        te = synth.emission_time_s(t_heard, mic[0], path, 343.0)
        to_mic = mic[0] - path.position_m(te)
        cos_theta = to_mic @ v / (np.linalg.norm(to_mic) * np.linalg.norm(v))
        # textbook Doppler, moving source and still receiver: f c / (c - v cos(theta))
        expected = f0 * 343.0 / (343.0 - 30.0 * cos_theta)
        assert f_heard == pytest.approx(expected, rel=1e-3)


def test_moving_scene_probes_and_noise_follow_the_definitions():
    path = synth.WaypointPath([0.0, 2.0, 4.0], [[-40.0, 20.0, 1.0], [0.0, 20.0, 1.0],
                                                [20.0, 40.0, 1.0]])
    wf = (synth.Waveform("noise", (100.0, 6000.0)), synth.Waveform("tone", fundamental_hz=150.0,
                                                                   harmonics=(1.0, 0.5, 0.3)))
    offsets, ppm = np.array([0.0, 0.01, -0.02]), np.array([0.0, 30.0, -10.0])
    kw = dict(t_start_s=0.2, t_stop_s=3.8, clock_offsets_s=offsets, clock_drift_ppm=ppm,
              ground_reflection=0.5)
    clean = synth.simulate_moving(MICS[:3], path, wf, rng=np.random.default_rng(8), **kw)
    noisy = synth.simulate_moving(MICS[:3], path, wf, snr_db=6.0, rng=np.random.default_rng(8),
                                  **kw)
    # SNR definition (module docstring), variance of ~200000 samples to 3 % (common practice)
    np.testing.assert_allclose(np.var(noisy.signals - clean.signals, axis=1),
                               noisy.received_rms**2 / 10**0.6, rtol=0.03)
    # probes: clock time -> true time (t / (1 + ppm) + offset), then t = t_e + |p(t_e) - m| / c
    true_t = noisy.probe_times_s / (1 + ppm[:, None] * 1e-6) + offsets[:, None]
    te = noisy.probe_emission_times_s
    gap = true_t - te - np.linalg.norm(noisy.probe_positions_m - MICS[:3, None, :],
                                       axis=-1) / noisy.sound_speed_mps
    assert np.max(np.abs(gap)) < 1 * NS


def test_recorded_waveform_is_the_recording_resampled_and_looped():
    # A 'recording' waveform is the excerpt resampled by scipy.signal.resample_poly (the
    # reference library) and repeated with its fades overlap-added; its rms is the one asked.
    from scipy.signal import resample_poly

    rng = np.random.default_rng(3)
    fs_in, rate = 16000.0, 32000.0
    x = rng.standard_normal(8000) * np.hanning(8000) ** 0.05  # 0.5 s, faded ends
    wf = synth.Waveform("recording", samples=x, samples_rate_hz=fs_in, taper_s=0.02,
                        rms_pa_at_1m=2.0)
    y = synth.emitted_signal(wf, rate, rng, duration_s=1.2, max_hz=7000.0)
    ref = resample_poly(x, 2, 1)
    ref_f = np.fft.rfft(ref)
    ref_f[np.fft.rfftfreq(ref.size, 1 / rate) >= 0.98 * 7000.0] = 0.0
    ref = np.fft.irfft(ref_f, ref.size)
    scale = y[2000:6000] @ ref[2000:6000] / (ref[2000:6000] @ ref[2000:6000])
    assert np.allclose(y[640:15000], scale * ref[640:15000], atol=1e-6 * np.abs(y).max())
    period = ref.size - 640  # 20 ms of overlap at 32 kHz
    assert np.allclose(y[period + 640:period + 15000], y[640:15000], atol=1e-9)
    assert np.sqrt(np.mean(y**2)) == pytest.approx(2.0, rel=1e-9)


def test_recorded_waveform_needs_its_samples():
    with pytest.raises(ValueError, match="samples"):
        synth.emitted_signal(synth.Waveform("recording"), 8000.0, np.random.default_rng(0),
                             duration_s=0.5)
