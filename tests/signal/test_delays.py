"""Delay estimation: GCC-PHAT lag, sub-sample accuracy, honest delay uncertainty, quality."""

import numpy as np
import pytest
from scipy import signal

from locate.signal.delays import all_pairs, estimate_delays, gcc_phat, geometric_max_lag_s
from locate.synth import Waveform
from tests.scenes import ARRAY_40M, RATE_HZ, burst_delays

US = 1e-6


@pytest.mark.parametrize("n", [2047, 2048])
@pytest.mark.parametrize("lag", [-37, 0, 5, 212])
def test_gcc_phat_peak_lag_matches_scipy_correlate(n, lag):
    # Reference: scipy.signal.correlate + scipy.signal.correlation_lags (plain correlation peak).
    rng = np.random.default_rng(abs(lag) + n)
    base = rng.normal(size=n + 600)
    x = base[300:300 + n]
    y = base[300 - lag:300 - lag + n]  # y is x delayed by `lag` samples
    y = y + 0.1 * rng.normal(size=n)
    ref = signal.correlate(y, x)
    ref_lag = signal.correlation_lags(len(y), len(x))[np.argmax(ref)]
    lags_s, r = gcc_phat(x, y, 1000.0, max_lag_s=0.3)
    assert ref_lag == lag
    assert round(lags_s[np.argmax(r)] * 1000.0) == ref_lag


def test_gcc_phat_of_identical_signals_peaks_at_one():
    rng = np.random.default_rng(1)
    x = rng.normal(size=4000)
    lags, r = gcc_phat(x, x, 8000.0)
    assert r.max() == pytest.approx(1.0, abs=1e-9)
    assert lags[np.argmax(r)] == 0.0


@pytest.mark.parametrize("frac", [0.0, 0.13, 0.25, 0.5, 0.77])
def test_fractional_delay_is_recovered_without_bias(frac):
    # A simulated delay that is a fraction of a sample (exact in the frequency domain) must be
    # recovered with a bias far below 1/20 sample (1.04 us at 48 kHz); high SNR exposes bias.
    rng = np.random.default_rng(7)
    mics = np.array([[0.0, 0.0, 0.0], [10.0, 0.0, 0.0], [0.0, 10.0, 0.0]])
    c = 343.0
    # place the source on the x axis so that t1 - t0 = (10 - 2 * x_off) / c hits the fraction
    target = (round(0.01 * RATE_HZ) + frac) / RATE_HZ
    src = np.array([(10.0 - target * c) / 2.0, 0.0, 0.0])
    ds, sim = burst_delays(mics, src, rng, snr_db=40.0, sound_speed_mps=c)
    true = sim.arrivals_s[0][ds.pairs[:, 1]] - sim.arrivals_s[0][ds.pairs[:, 0]]
    assert np.max(np.abs(ds.delay_s - true)) < 0.01 / RATE_HZ  # 1/100 sample


def test_geometric_search_window_limits_the_lag():
    # Physical bound (common practice): |delay| <= distance / c (+ margin).
    pairs = all_pairs(len(ARRAY_40M))
    lim = geometric_max_lag_s(ARRAY_40M, pairs, 343.0, margin_s=0.0)
    d01 = np.linalg.norm(ARRAY_40M[1] - ARRAY_40M[0])
    assert lim[0] == pytest.approx(d01 / 343.0 * 1.02)


@pytest.mark.slow
def test_delay_sd_matches_the_scatter_of_repeated_trials():
    # Carter (1987) bound with estimated coherence must predict the empirical scatter.
    rng = np.random.default_rng(11)
    src = np.array([14.0, 22.0, 0.0])
    errs, sds, covs = [], [], []
    for _ in range(60):
        ds, sim = burst_delays(ARRAY_40M, src, rng)
        true = sim.arrivals_s[0][ds.pairs[:, 1]] - sim.arrivals_s[0][ds.pairs[:, 0]]
        errs.append(ds.delay_s - true)
        sds.append(ds.sd_s)
        covs.append(ds.covariance_s2)
    errs = np.array(errs)
    ratio = errs.std(axis=0) / np.mean(sds, axis=0)
    assert np.all((ratio > 0.7) & (ratio < 1.35)), ratio
    # bias far below the noise and below 1/20 sample
    assert np.max(np.abs(errs.mean(axis=0))) < 0.05 / RATE_HZ
    # the modelled correlation between pairs sharing a mic matches the empirical one
    emp = np.corrcoef(errs.T)
    cov = np.mean(covs, axis=0)
    mod = cov / np.sqrt(np.outer(np.diag(cov), np.diag(cov)))
    share = np.abs(mod) > 0.2
    assert np.mean(np.abs(emp[share] - mod[share])) < 0.15


def test_tonal_source_is_flagged_ambiguous():
    # A periodic sound correlates at every period: several near-equal peaks (common practice).
    rng = np.random.default_rng(3)
    tone = Waveform(kind="tone", fundamental_hz=250.0, harmonics=(1.0, 0.5), duration_s=1.0)
    ds, _ = burst_delays(ARRAY_40M, np.array([10.0, 10.0, 0.0]), rng, waveform=tone)
    assert sum(q == "ambiguous" for q in ds.quality) >= len(ds.quality) // 2


def test_noise_only_is_flagged_weak():
    rng = np.random.default_rng(5)
    x = rng.normal(size=(4, 24000))
    pairs = all_pairs(4)
    ds = estimate_delays(x, RATE_HZ, max_lag_s=0.1, pairs=pairs)
    assert all(q in ("weak", "ambiguous") for q in ds.quality)


def test_offsets_enter_the_delays_with_the_documented_sign():
    # true arrival = time in block + offset: delay(i, j) gains offset_j - offset_i.
    rng = np.random.default_rng(9)
    x = rng.normal(size=(3, 8000))
    base = estimate_delays(x, RATE_HZ, max_lag_s=0.01)
    shifted = estimate_delays(x, RATE_HZ, max_lag_s=0.01, offsets_s=[0.0, 1e-3, -2e-3])
    assert shifted.delay_s - base.delay_s == pytest.approx([1e-3, -2e-3, -3e-3], abs=1e-15)
