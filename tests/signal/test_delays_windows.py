"""Windowed, batched delays: the same answers as estimate_delays, window by window."""

import numpy as np
import pytest
from scipy import signal

from locate.signal.delays import all_pairs, estimate_delays, geometric_max_lag_s
from locate.signal.windowed import estimate_delays_windows, window_starts
from locate.synth import Emission, Waveform, simulate_events
from tests.scenes import ARRAY_40M, RATE_HZ

US = 1e-6


@pytest.fixture(scope="module")
def scene():
    # An invented 3 s broadband source 60 m from a 5-mic array (exact simulator, 5 dB SNR).
    rng = np.random.default_rng(11)
    wf = Waveform(kind="noise", band_hz=(150.0, 3000.0), duration_s=2.6, taper_s=0.01)
    sim = simulate_events(ARRAY_40M, [Emission(np.array([70.0, 50.0, 1.0]), 0.1, wf)],
                          sample_rate_hz=RATE_HZ, duration_s=3.0, snr_db=5.0, rng=rng)
    pairs = all_pairs(len(ARRAY_40M))
    max_lag = geometric_max_lag_s(ARRAY_40M, pairs, sim.sound_speed_mps)
    return sim, pairs, max_lag


def _reference(sim, starts, n, max_lag, band):
    return [estimate_delays(sim.signals[:, s:s + n], RATE_HZ, max_lag_s=max_lag, band_hz=band)
            for s in starts]


def test_window_starts_cover_only_whole_windows():
    # common practice: a sliding window never runs past the data
    assert window_starts(10, 4, 2).tolist() == [0, 2, 4, 6]
    assert window_starts(3, 4, 2).size == 0


@pytest.mark.parametrize("hop_s", [0.25, 0.2])  # whole-hop windows (shared segments) or not
def test_band_given_delays_agree_with_estimate_delays_within_a_tenth_of_sd(scene, hop_s):
    # Reference: locate.signal.delays.estimate_delays on each window (the published method).
    sim, pairs, max_lag = scene
    band = (100.0, 3000.0)
    wd = estimate_delays_windows(sim.signals, RATE_HZ, 0.5, hop_s, max_lag_s=max_lag,
                                 band_hz=band)
    starts = np.round((wd.t_s) * RATE_HZ).astype(int)
    refs = _reference(sim, starts, 24000, max_lag, band)
    d = np.array([r.delay_s for r in refs])
    sd = np.array([r.sd_s for r in refs])
    good = np.array([r.quality for r in refs]) == "good"
    assert good.sum() > 0.8 * good.size
    assert np.all(wd.quality[good] == "good")
    assert np.max(np.abs(wd.delay_s - d)[good] / sd[good]) < 0.1
    assert np.max(np.abs(wd.sd_s / sd - 1.0)[good]) < 0.03  # sd within 3 %
    # and both are close to the truth (exact simulator arrival times)
    true = sim.arrivals_s[0][pairs[:, 1]] - sim.arrivals_s[0][pairs[:, 0]]
    z = (wd.delay_s - true)[good] / wd.sd_s[good]
    assert np.sqrt(np.mean(z**2)) < 1.5


def test_data_found_band_reproduces_estimate_delays_bin_for_bin(scene):
    # Reference: estimate_delays with its own band search; no decimation on this path.
    sim, _, max_lag = scene
    x = sim.signals[:, : int(1.5 * RATE_HZ)]
    wd = estimate_delays_windows(x, RATE_HZ, 0.5, 0.25, max_lag_s=max_lag)
    refs = _reference(sim, np.round(wd.t_s * RATE_HZ).astype(int), 24000, max_lag, None)
    for w, r in enumerate(refs):
        ok = np.isfinite(r.sd_s)
        assert np.max(np.abs(wd.delay_s[w] - r.delay_s)[ok] / r.sd_s[ok]) < 1e-3
        assert np.allclose(wd.sd_s[w][ok], r.sd_s[ok], rtol=1e-6)
        assert tuple(wd.quality[w]) == r.quality
        assert wd.band_hz[w] == pytest.approx(r.band_hz)


def test_integer_lag_matches_scipy_correlate_and_offsets_are_added():
    # Reference: scipy.signal.correlate + correlation_lags on a hidden integer shift.
    rng = np.random.default_rng(5)
    fs, lag = 8000.0, 23
    base = rng.normal(size=3 * 8000 + 400)
    x = np.stack([base[200:200 + 24000], base[200 - lag:200 - lag + 24000]])
    x = x + 0.05 * rng.normal(size=x.shape)
    ref = signal.correlate(x[1, :4000], x[0, :4000])
    ref_lag = signal.correlation_lags(4000, 4000)[np.argmax(ref)]
    off = np.array([0.0, 3.0 * US])
    wd = estimate_delays_windows(x, fs, 0.5, 0.25, max_lag_s=0.01, band_hz=(50.0, 3000.0),
                                 offsets_s=off)
    assert ref_lag == lag
    assert np.all(np.abs(wd.delay_s[:, 0] - lag / fs - 3.0 * US) < 1.0 * US)
    ds = wd.window(2)
    assert ds.delay_s[0] == wd.delay_s[2, 0] and ds.t_s == pytest.approx(0.5)


def test_windows_read_in_overlapping_blocks_equal_one_pass_over_the_span(scene, tmp_path):
    # Reference: estimate_delays_windows over the whole span in memory (same samples).
    from locate.io.audio import open_recordings
    from locate.io.site import load_site
    from locate.signal.windowed import WindowDelays, recording_window_delays
    from tests.cli_helpers import write_site

    sim, _, max_lag = scene
    rec = open_recordings(load_site(write_site(tmp_path, ARRAY_40M, sim.signals, RATE_HZ)))
    parts = list(recording_window_delays(rec, 0.5, 0.25, max_lag_s=max_lag,
                                         band_hz=(100.0, 3000.0), block_windows=3))
    assert len(parts) > 2
    got = WindowDelays.concatenate(parts)
    x, _ = rec.read(rec.start_s, rec.stop_s)
    ref = estimate_delays_windows(x, RATE_HZ, 0.5, 0.25, max_lag_s=max_lag,
                                  band_hz=(100.0, 3000.0))
    assert np.allclose(got.t_s, ref.t_s, atol=1e-9)
    assert np.max(np.abs(got.delay_s - ref.delay_s)) < 1e-3 * US
    assert np.array_equal(got.quality, ref.quality)
