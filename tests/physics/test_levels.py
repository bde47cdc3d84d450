"""Tests for locate.physics.bands / locate.physics.levels against published values and reference
libraries."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal

from locate.errors import SiteFileError, TdoaError
from locate.physics import levels
from locate.physics.air import absorption_db_per_m

DB = 1.0  # unit: decibel
DB_PER_KM = 1e-3  # dB/m per dB/km
M = 1.0  # unit: metre

BANDS = levels.OCTAVE_BANDS_HZ
# exact base-10 octave mid-band frequencies, IEC 61260-1:2014: 1000 * 10^(0.3 k), k = -4..3
EXACT = 1000.0 * 10.0 ** (0.3 * np.arange(-4, 4))
EDGE = 10.0**0.15  # octave band edge ratio G^(1/2), G = 10^0.3, IEC 61260-1:2014


# --- mid-band frequencies, A-weighting -------------------------------------------------------

def test_exact_mid_band_frequencies_follow_the_base_10_system():
    # IEC 61260-1:2014 eq. (1), base-10 system
    np.testing.assert_allclose(levels.exact_mid_band_hz(BANDS), EXACT, rtol=1e-12)
    # one-third-octave nominal values map too (IEC 61260-1 Annex E: 160 Hz is 158.49 Hz exact)
    assert levels.exact_mid_band_hz([160.0])[0] == pytest.approx(1000 * 10 ** (-0.8), rel=1e-12)
    with pytest.raises(ValueError, match="mid-band"):
        levels.exact_mid_band_hz([90.0])
    with pytest.raises(ValueError, match="octave"):
        levels.octave_band_levels_db(np.zeros(4800), 48000.0, bands_hz=(160,))


@pytest.mark.parametrize("nominal_hz, table_db", [
    # IEC 61672-1:2013 Table 3, A-weighting at nominal frequencies (from memory), 0.1 dB steps
    (31.5, -39.4), (63, -26.2), (100, -19.1), (125, -16.1), (250, -8.6), (500, -3.2),
    (1000, 0.0), (1250, 0.6), (2000, 1.2), (4000, 1.0), (6300, -0.1), (8000, -1.1),
    (10000, -2.5), (16000, -6.6),
])
def test_a_weighting_matches_the_iec_61672_table(nominal_hz, table_db):
    exact = levels.exact_mid_band_hz([nominal_hz])
    # table values are printed to 0.1 dB: half a step, computed at the exact frequency
    assert levels.a_weighting_db(exact)[0] == pytest.approx(table_db, abs=0.05 * DB)


def test_a_weighting_is_zero_at_1_khz():
    # IEC 61672-1:2013 eq. (E.6): the A1000 normalisation makes A(1 kHz) = 0.00 dB
    assert float(levels.a_weighting_db(1000.0)) == pytest.approx(0.0, abs=0.005 * DB)


# --- band levels of a signal -------------------------------------------------------------------

def test_full_scale_sine_reads_0_dbfs_or_the_stated_spl():
    fs = 48000.0
    t = np.arange(int(fs)) / fs
    sine = np.sin(2 * np.pi * 997.0 * t)  # not on a bin edge pattern: 997 Hz, 1 s
    dbfs = levels.octave_band_levels_db(sine, fs)
    # convention (AES17, common practice): a full-scale sine is 0 dBFS, i.e. its mean square
    # 0.5 (10 lg 0.5 = -3.01 dB re unit mean square) reads 0.00
    assert dbfs[4] == pytest.approx(0.0, abs=0.01 * DB)
    assert 10 * np.log10(np.mean(sine**2)) == pytest.approx(-3.01, abs=0.005 * DB)
    assert np.all(dbfs[[0, 1, 2, 6, 7]] < -40 * DB)  # the tone stays in its band
    spl = levels.octave_band_levels_db(0.5 * sine, fs, full_scale_db_spl=100.0)
    # half amplitude: 20 lg 0.5 = -6.02 dB (textbook)
    assert spl[4] == pytest.approx(100.0 - 6.02, abs=0.01 * DB)


def test_band_levels_broadcast_over_leading_axes():
    rng = np.random.default_rng(7)
    x = rng.standard_normal((2, 3, 9600))
    out = levels.octave_band_levels_db(x, 48000.0, full_scale_db_spl=np.array([[90.0], [100.0]]))
    assert out.shape == (2, 3, 8)
    one = levels.octave_band_levels_db(x[1, 2], 48000.0, full_scale_db_spl=100.0)
    np.testing.assert_allclose(out[1, 2], one, atol=1e-9 * DB)


def test_bands_beyond_nyquist_or_too_short_are_nan():
    # 16 kHz: Nyquist 8 kHz < upper edge of the 8 kHz band (11.2 kHz, IEC 61260-1)
    rng = np.random.default_rng(3)
    out = levels.octave_band_levels_db(rng.standard_normal(16000), 16000.0)
    assert np.isnan(out[7]) and np.all(np.isfinite(out[:7]))
    # 20 ms at 48 kHz: 50 Hz bins; the 63-250 Hz bands' lower edges (44.7-178 Hz) are below
    # 4 bins, i.e. fewer than 4 periods of the edge frequency in the record
    short = levels.octave_band_levels_db(rng.standard_normal(960), 48000.0)
    assert np.all(np.isnan(short[:3])) and np.all(np.isfinite(short[3:]))


def test_white_noise_spreads_over_bands_in_proportion_to_bandwidth():
    fs = 16000.0
    rng = np.random.default_rng(11)
    noise = 0.1 * rng.standard_normal(int(16 * fs))  # 16 s
    out = levels.octave_band_levels_db(noise, fs)
    total = 10 * np.log10(np.mean(noise**2) / 0.5)
    lo, hi = EXACT / EDGE, EXACT * EDGE
    # white noise: band share = bandwidth / Nyquist (common practice).  Bands 500 Hz - 4 kHz
    # hold >= 5600 bins, so the estimate's own scatter is <= 0.06 dB (1/sqrt(bins)).
    expected = total + 10 * np.log10((hi - lo) / (fs / 2))
    np.testing.assert_allclose(out[3:7], expected[3:7], atol=0.25 * DB)

    # reference library: scipy.signal.welch PSD integrated over the same exact edges
    f, psd = scipy.signal.welch(noise, fs, nperseg=8192)
    for b in range(3, 7):
        band = (f >= lo[b]) & (f < hi[b])
        welch_db = 10 * np.log10(np.sum(psd[band]) * (f[1] - f[0]) / 0.5)
        assert out[b] == pytest.approx(welch_db, abs=0.15 * DB)

    # reference library: scipy.signal.butter order-3 band-pass (6th order) filters.  Their
    # noise bandwidth is (pi/6)/sin(pi/6) = 1.047 times nominal, +0.2 dB (textbook), so the
    # ideal band reads up to a few tenths of a dB lower.
    for b in range(1, 7):
        sos = scipy.signal.butter(3, [lo[b], hi[b]], btype="bandpass", fs=fs, output="sos")
        y = scipy.signal.sosfilt(sos, noise)
        butter_db = 10 * np.log10(np.mean(y[int(fs):] ** 2) / 0.5)  # skip 1 s transient
        assert butter_db - out[b] == pytest.approx(0.2, abs=0.3 * DB)


def test_background_correction_discards_and_subtracts_energetically():
    signal = np.array([60.0, 60.0, 60.0, 60.0, np.nan, 60.0])
    background = np.array([58.0, 57.0, 54.0, 40.0, 40.0, -np.inf])
    out = levels.background_corrected_db(signal, background)
    # < 3 dB above background: discarded (common practice)
    assert np.isnan(out[0])
    # 3 dB above: 10 lg(10^6 - 10^5.7) = 56.98 dB (energetic subtraction, common practice)
    assert out[1] == pytest.approx(10 * np.log10(10**6 - 10**5.7), abs=0.001 * DB)
    assert out[1] == pytest.approx(57.0, abs=0.05 * DB)
    # 6 dB above: the textbook correction is -1.26 dB
    assert out[2] == pytest.approx(60.0 - 1.26, abs=0.01 * DB)
    # 20 dB above: -0.04 dB
    assert out[3] == pytest.approx(60.0 - 0.04, abs=0.005 * DB)
    assert np.isnan(out[4])  # no signal value: NaN
    assert out[5] == 60.0  # silent background: no correction


# --- air absorption used for levels ------------------------------------------------------------

@pytest.mark.parametrize("temperature_c, rh, table_db_per_km", [
    # ISO 9613-2:1996 Table 2 (from memory, as listed in REFERENCES.md), 63 Hz ... 8 kHz
    (10.0, 70.0, [0.1, 0.4, 1.0, 1.9, 3.7, 9.7, 32.8, 117.0]),
    (20.0, 70.0, [0.1, 0.3, 1.1, 2.8, 5.0, 9.0, 22.9, 76.6]),
    (15.0, 20.0, [0.3, 0.6, 1.2, 2.7, 8.2, 28.2, 88.8, 202.0]),
    (15.0, 50.0, [0.1, 0.5, 1.2, 2.2, 4.2, 10.8, 36.2, 129.0]),
])
def test_absorption_at_exact_mid_band_frequencies_matches_iso_9613_2_table(
        temperature_c, rh, table_db_per_km):
    table = np.array(table_db_per_km)
    got = absorption_db_per_m(EXACT, temperature_c, rh) / DB_PER_KM
    # printed to 0.1 dB/km (whole dB/km above 100): allow half a step of the last digit
    tol = np.where(table >= 100.0, 0.5, 0.05) + 1e-9
    assert np.all(np.abs(got - table) <= tol), (got, table)
    # and levels uses the same values per metre at the mid-band frequencies (ISO 9613-2 7.2)
    att = levels.air_attenuation_db(1000.0, BANDS, temperature_c, rh)
    assert np.all(np.abs(att - table) <= tol)


# --- spreading, source power, combination ------------------------------------------------------

def test_spherical_spreading_loses_6_db_per_doubling():
    lw = np.full(8, 100.0)
    src = np.zeros(3)
    near = levels.receiver_levels_db(lw, src, [50.0, 0, 0], BANDS, 10.0, 70.0)
    far = levels.receiver_levels_db(lw, src, [100.0, 0, 0], BANDS, 10.0, 70.0)
    alpha = absorption_db_per_m(EXACT, 10.0, 70.0)
    # point source in free field, textbook: Lp = Lw - 20 lg r - 11 dB (then air absorption)
    np.testing.assert_allclose(near["lp_db"], 100.0 - 20 * np.log10(50.0) - 11.0 - 50.0 * alpha,
                               atol=1e-9 * DB)
    # -6.02 dB per doubling of distance (textbook), once absorption is taken out
    np.testing.assert_allclose(far["lp_db"] + 100.0 * alpha - (near["lp_db"] + 50.0 * alpha),
                               -6.02, atol=0.005 * DB)
    assert near["distance_m"] == pytest.approx(50.0, abs=1e-9 * M)
    # hemispherical radiation over a reflecting plane: 3 dB more (10 lg 2, textbook)
    half = levels.receiver_levels_db(lw, src, [50.0, 0, 0], BANDS, 10.0, 70.0, hemisphere=True)
    np.testing.assert_allclose(half["lp_db"] - near["lp_db"], 3.0, atol=0.02 * DB)


def test_source_power_inverts_the_receiver_prediction():
    lw = np.array([95.0, 97.0, 99.0, 100.0, 98.0, 96.0, 92.0, 88.0])
    rcv = levels.receiver_levels_db(lw, [0, 0, 1.0], [120.0, 35.0, 1.5], BANDS, 15.0, 50.0)
    back = levels.source_power_level_db(rcv["lp_db"], rcv["distance_m"], BANDS, 15.0, 50.0)
    np.testing.assert_allclose(back, lw, atol=1e-9 * DB)


def test_receiver_at_the_source_is_refused():
    with pytest.raises(SiteFileError, match="R1.*from the source"):
        levels.receiver_levels_db(np.full(8, 90.0), [1.0, 2.0, 0.0], [1.2, 2.0, 0.0], BANDS,
                                  10.0, 70.0, receiver_name="R1")


def test_combining_mics_is_an_energetic_mean_that_ignores_missing_bands():
    lw = np.array([[100.0, 90.0, np.nan, 80.0],
                   [106.0, 90.0, np.nan, np.nan]])
    mean, spread = levels.combine_mics(lw)
    # energetic mean of 100 and 106 dB: 10 lg((10^10 + 10^10.6) / 2) = 103.96 dB (textbook)
    assert mean[0] == pytest.approx(10 * np.log10((1e10 + 10**10.6) / 2), abs=1e-9 * DB)
    assert mean[0] == pytest.approx(103.96, abs=0.005 * DB)
    assert spread[0] == pytest.approx(6.0, abs=1e-9 * DB)
    assert mean[1] == pytest.approx(90.0, abs=1e-9 * DB) and spread[1] == 0.0
    assert np.isnan(mean[2]) and np.isnan(spread[2])
    assert mean[3] == pytest.approx(80.0, abs=1e-9 * DB) and spread[3] == 0.0


def test_lwa_sums_only_usable_bands_with_a_weights():
    flat = np.full(8, 90.0)
    # 8 flat bands of 90 dB with the IEC 61672-1 octave A-weights (from memory, table values)
    a_table = np.array([-26.2, -16.1, -8.6, -3.2, 0.0, 1.2, 1.0, -1.1])
    expected = 10 * np.log10(np.sum(10 ** ((90.0 + a_table) / 10)))
    assert float(levels.lwa_db(flat, BANDS)) == pytest.approx(expected, abs=0.05 * DB)
    one = np.full(8, np.nan)
    one[4] = 90.0
    # A(1 kHz) = 0 to the rounding of the IEC 61672-1 pole frequencies (0.0001 dB)
    assert float(levels.lwa_db(one, BANDS)) == pytest.approx(90.0, abs=0.001 * DB)
    assert np.isnan(levels.lwa_db(np.full(8, np.nan), BANDS))


def test_level_uncertainty_from_distance_follows_20_lg_r():
    # first-order propagation of 20 lg r (textbook): 20 / ln 10 * sd / r = 8.686 sd / r
    assert float(levels.level_uncertainty_db(60.0, 0.6)) == pytest.approx(0.08686, abs=1e-5 * DB)
    # against a central difference of 20 lg r itself
    r, h = 25.0, 1e-4
    slope = (20 * np.log10(r + h) - 20 * np.log10(r - h)) / (2 * h)
    assert float(levels.level_uncertainty_db(r, 1.0)) == pytest.approx(slope, rel=1e-6)


# --- barrier -----------------------------------------------------------------------------------

def test_maekawa_fit_values_and_cap():
    # the common fit of Maekawa (1968), 10 lg(3 + 20 N): 10 lg 23 = 13.62 dB at N = 1,
    # 10 lg 103 = 20.13 dB at N = 5 ...
    at_1 = float(levels.barrier_attenuation_db(1.0, cap_db=None))
    at_5 = float(levels.barrier_attenuation_db(5.0, cap_db=None))
    assert at_1 == pytest.approx(13.62, abs=0.005 * DB)
    assert at_5 == pytest.approx(20.13, abs=0.005 * DB)
    # ... against ~13 dB and ~20 dB read from Maekawa's chart (as commonly quoted, from memory)
    assert at_1 == pytest.approx(13.0, abs=1.0 * DB) and at_5 == pytest.approx(20.0, abs=1.0 * DB)
    # grazing incidence N = 0: 10 lg 3 = 4.77 dB (about 5 dB, common practice)
    assert float(levels.barrier_attenuation_db(0.0)) == pytest.approx(4.77, abs=0.005 * DB)
    # cap honoured (20 dB default, common practice)
    assert float(levels.barrier_attenuation_db(5.0)) == 20.0
    assert float(levels.barrier_attenuation_db(50.0, cap_db=25.0)) == 25.0
    # clear line of sight: 0 dB, continuous where the fit reaches 0 dB (N = -0.1)
    assert float(levels.barrier_attenuation_db(-0.3)) == 0.0
    assert float(levels.barrier_attenuation_db(-0.1 + 1e-9)) == pytest.approx(0.0, abs=1e-6)
    assert float(levels.barrier_attenuation_db(-np.inf)) == 0.0


def test_fresnel_number_over_a_wall_between_source_and_receiver():
    src, rcv = np.array([0.0, 0.0, 1.0]), np.array([20.0, 0.0, 1.0])
    c = 343.0
    # hand geometry: top at (10, 0, 3), delta = 2 sqrt(10^2 + 2^2) - 20 = 0.3961 m;
    # N = 2 delta f / c (Maekawa 1968)
    delta = 2 * np.hypot(10.0, 2.0) - 20.0
    wall = np.array([[10.0, -5.0], [10.0, 5.0]])
    n = levels.fresnel_number(src, rcv, (wall, 3.0), [1000.0], c)
    assert n[0] == pytest.approx(2 * delta * 1000.0 / c, rel=1e-9)
    assert n[0] == pytest.approx(2.309, abs=0.001)
    # the same from the top point directly, and through a polyline crossed on its 2nd segment
    assert levels.fresnel_number(src, rcv, [10.0, 0.0, 3.0], [1000.0], c)[0] == pytest.approx(n[0])
    bent = np.array([[4.0, -6.0], [10.0, -1.0], [10.0, 6.0]])
    assert levels.barrier_path_difference_m(src, rcv, bent, 3.0) == pytest.approx(delta, abs=1e-9)
    # a wall below the line of sight: negative N (sight line 5 m up, top at 1 m)
    low = levels.fresnel_number(src + [0, 0, 4], rcv + [0, 0, 4], (wall, 1.0), [1000.0], c)
    assert low[0] == pytest.approx(-2 * (2 * np.hypot(10.0, 4.0) - 20.0) * 1000 / c, rel=1e-9)
    # a wall beside the path is not in the way
    aside = np.array([[10.0, 2.0], [10.0, 5.0]])
    assert levels.fresnel_number(src, rcv, (aside, 3.0), [1000.0], c)[0] == -np.inf


def test_receiver_levels_apply_the_barrier_per_band():
    lw = np.full(8, 100.0)
    src, rcv = [0.0, 0.0, 1.0], [20.0, 0.0, 1.0]
    wall = ([[10.0, -5.0], [10.0, 5.0]], 3.0)
    open_ = levels.receiver_levels_db(lw, src, rcv, BANDS, 20.0, 70.0, sound_speed_mps=343.0)
    walled = levels.receiver_levels_db(lw, src, rcv, BANDS, 20.0, 70.0, barriers=[wall],
                                       sound_speed_mps=343.0)
    delta = 2 * np.hypot(10.0, 2.0) - 20.0
    # Maekawa (1968) fit 10 lg(3 + 20 N), N = 2 delta f / c at the exact mid-band frequencies
    expected = np.minimum(10 * np.log10(3 + 20 * 2 * delta * EXACT / 343.0), 20.0)
    np.testing.assert_allclose(walled["barrier_db"], expected, atol=1e-9 * DB)
    assert walled["barrier_db"][4] == pytest.approx(16.92, abs=0.01 * DB)
    np.testing.assert_allclose(open_["lp_db"] - walled["lp_db"], expected, atol=1e-9 * DB)
    assert np.all(open_["barrier_db"] == 0.0)


@pytest.mark.parametrize("height_m", [0.0, -2.0])
def test_barrier_without_positive_height_is_refused(height_m):
    wall = ([[10.0, -5.0], [10.0, 5.0]], height_m)
    with pytest.raises(SiteFileError, match="height") as info:
        levels.receiver_levels_db(np.full(8, 90.0), [0, 0, 1.0], [20.0, 0, 1.0], BANDS, 10.0,
                                  70.0, barriers=[wall])
    assert info.value.field == "barriers[0].height_m"
    with pytest.raises(TdoaError):
        levels.fresnel_number([0, 0, 1.0], [20.0, 0, 1.0], wall, [1000.0], 343.0)


# --- round trip from a synthesised recording ---------------------------------------------------

def _received_recording(lw_db, distance_m, temperature_c, rh, fs, full_scale_db_spl, seed):
    """Digital samples heard at distance_m from a point source of band powers lw_db.

    Built in the frequency domain with numpy only: a spectrum flat per hertz inside each exact
    octave band, band mean square p0^2 10^((Lw - 11)/10) at 1 m (textbook point source), 1/r
    spreading and ISO 9613-1 absorption at every bin's own frequency, random phases.
    """
    n = int(fs)  # 1 s
    freqs = np.fft.rfftfreq(n, 1.0 / fs)
    amp = np.zeros(freqs.shape)
    p0 = 20e-6  # Pa, reference sound pressure
    for lw, fm in zip(lw_db, EXACT, strict=True):  # eight bands, not samples
        inside = (freqs >= fm / EDGE) & (freqs < fm * EDGE)
        ms_1m = p0**2 * 10 ** ((lw - 11.0) / 10)
        amp[inside] = np.sqrt(ms_1m * n**2 / (2 * inside.sum()))  # one-sided: 2|X|^2 / n^2
    loss_db = 20 * np.log10(distance_m) + absorption_db_per_m(freqs, temperature_c, rh) * distance_m
    phase = np.random.default_rng(seed).uniform(0, 2 * np.pi, freqs.shape)
    pressure = np.fft.irfft(amp * 10 ** (-loss_db / 20) * np.exp(1j * phase), n)
    return pressure / (np.sqrt(2) * p0 * 10 ** (full_scale_db_spl / 20))  # 0 dBFS sine = FS


LW_TRUE = np.array([98.0, 101.0, 104.0, 103.0, 100.0, 97.0, 93.0, 88.0])


@pytest.mark.parametrize("distance_m", [60.0, 300.0])
def test_round_trip_recovers_source_power_within_half_a_db(distance_m):
    fs, fsdb = 32000.0, 110.0
    x = _received_recording(LW_TRUE, distance_m, 10.0, 70.0, fs, fsdb, seed=5)
    lp = levels.octave_band_levels_db(x, fs, full_scale_db_spl=fsdb)
    lw = levels.source_power_level_db(lp, distance_m, BANDS, 10.0, 70.0)
    # 125 Hz - 4 kHz within 0.5 dB with the ISO 9613-2 mid-band absorption
    np.testing.assert_allclose(lw[1:7], LW_TRUE[1:7], atol=0.5 * DB)
    # the band-average absorption of a flat-per-hertz band inverts the synthesis exactly
    flat = levels.source_power_level_db(lp, distance_m, BANDS, 10.0, 70.0,
                                        absorption="band-average")
    np.testing.assert_allclose(flat, LW_TRUE, atol=0.02 * DB)


def test_mid_band_absorption_overstates_long_range_loss_in_dry_air():
    # 15 degC / 20 % at 300 m: absorption across the 4 kHz band runs from about 40 to
    # 180 dB/km (ISO 9613-1), so the band keeps its lower-frequency energy and the mid-band
    # value (88.8 dB/km, ISO 9613-2 Table 2) overstates the band's loss
    fs, fsdb, r = 32000.0, 110.0, 300.0
    x = _received_recording(LW_TRUE, r, 15.0, 20.0, fs, fsdb, seed=8)
    lp = levels.octave_band_levels_db(x, fs, full_scale_db_spl=fsdb)
    mid = levels.source_power_level_db(lp, r, BANDS, 15.0, 20.0)
    flat = levels.source_power_level_db(lp, r, BANDS, 15.0, 20.0, absorption="band-average")
    assert mid[6] - LW_TRUE[6] > 2.0 * DB
    np.testing.assert_allclose(flat, LW_TRUE, atol=0.02 * DB)


def test_two_mics_combine_to_the_source_power():
    fs, fsdb = 32000.0, 110.0
    x = np.stack([_received_recording(LW_TRUE, r, 10.0, 70.0, fs, fsdb, seed=s)
                  for r, s in ((60.0, 1), (150.0, 2))])
    lp = levels.octave_band_levels_db(x, fs, full_scale_db_spl=fsdb)
    lw = levels.source_power_level_db(lp, np.array([60.0, 150.0]), BANDS, 10.0, 70.0,
                                      absorption="band-average")
    mean, spread = levels.combine_mics(lw)
    np.testing.assert_allclose(mean, LW_TRUE, atol=0.02 * DB)
    assert np.all(spread < 0.02 * DB)


def test_level_result_follows_the_schema_with_nulls():
    lw = LW_TRUE.copy()
    lw[0] = np.nan
    rcv = levels.receiver_levels_db(lw, [0, 0, 1.0], [80.0, 0, 1.5], BANDS, 10.0, 70.0)
    out = levels.level_result(BANDS, lw, np.zeros(8), [("R1", rcv)])
    # DESIGN.md "Levels": kind, bands_hz, source_lw_db, source_lwa_db, mic_spread_db, receivers
    assert out["kind"] == "level" and out["bands_hz"] == list(BANDS)
    assert out["source_lw_db"][0] is None and out["source_lw_db"][1] == 101.0
    assert out["receivers"][0]["name"] == "R1" and out["receivers"][0]["lp_db"][0] is None
    assert out["receivers"][0]["distance_m"] == pytest.approx(80.0, abs=0.01 * M)
    assert out["source_lwa_db"] == pytest.approx(float(levels.lwa_db(lw, BANDS)), abs=0.01 * DB)
    assert any("compliance" in c for c in out["cautions"])


# --- issue 21: C weighting, weighting filters, time weighting, event measures ----------------

@pytest.mark.parametrize("nominal_hz, table_db", [
    # IEC 61672-1:2013 Table 3, C-weighting at nominal frequencies (from memory), 0.1 dB steps
    (31.5, -3.0), (63, -0.8), (125, -0.2), (250, 0.0), (500, 0.0), (1000, 0.0), (2000, -0.2),
    (4000, -0.8), (8000, -3.0), (16000, -8.5),
])
def test_c_weighting_matches_the_iec_61672_table(nominal_hz, table_db):
    exact = levels.exact_mid_band_hz([nominal_hz])
    assert levels.c_weighting_db(exact)[0] == pytest.approx(table_db, abs=0.05 * DB)


def test_weighting_filters_match_scipy_analogue_responses():
    # reference library: scipy.signal.freqs_zpk on the IEC 61672-1 Annex E poles and zeros
    # (A: four zeros at 0 Hz, poles 20.6 (x2), 107.7, 737.9, 12194 (x2) Hz; C: two zeros,
    # poles 20.6 (x2), 12194 (x2) Hz), normalised at 1 kHz
    f = np.array([31.5, 100.0, 400.0, 1000.0, 3150.0, 10000.0])
    w = 2 * np.pi * np.array([20.6, 107.7, 737.9, 12194.0])
    for kind, zeros, poles in (("A", 4, [w[0], w[0], w[1], w[2], w[3], w[3]]),
                               ("C", 2, [w[0], w[0], w[3], w[3]])):
        _, h = scipy.signal.freqs_zpk([0.0] * zeros, [-p for p in poles], 1.0,
                                      worN=2 * np.pi * np.append(f, 1000.0))
        ref = h[:-1] / abs(h[-1])
        got = levels.weighting_response(f, kind)
        np.testing.assert_allclose(got, ref, rtol=1e-9)
        table = levels.a_weighting_db(f) if kind == "A" else levels.c_weighting_db(f)
        np.testing.assert_allclose(20 * np.log10(np.abs(got)), table, atol=0.005 * DB)


def test_a_weighted_signal_of_a_sine_loses_the_table_value():
    fs = 48000.0
    t = np.arange(int(fs)) / fs
    for f, a_db in ((1000.0, 0.0), (125.0, -16.1), (4000.0, 1.0)):  # IEC 61672-1 Table 3
        x = np.sin(2 * np.pi * f * t)
        y = levels.frequency_weighted(x, fs, "A")
        mid = slice(int(0.3 * fs), int(0.7 * fs))  # away from the start and end transients
        got = 10 * np.log10(np.mean(y[mid] ** 2) / np.mean(x[mid] ** 2))
        assert got == pytest.approx(a_db, abs=0.1 * DB), f


def test_time_weighting_f_has_the_125_ms_time_constant():
    # IEC 61672-1:2013 clause 5.8: exponential time weighting, tau = 0.125 s (F); a step of
    # mean square 1 reaches 1 - 1/e after tau, and after switching off decays at
    # 10 lg(e) / tau = 34.7 dB/s (F; 4.3 dB/s for S, 1 s) -- from memory of the standard
    fs = 8000.0
    x = np.ones(int(2 * fs))
    x[int(fs):] = 0.0
    ms = levels.time_weighted_ms(x, fs, levels.TIME_CONSTANT_S["F"])
    assert ms[int(0.125 * fs) - 1] == pytest.approx(1 - np.exp(-1), abs=2e-3)
    decay = 10 * np.log10(ms[int(1.2 * fs)] / ms[int(1.7 * fs)]) / 0.5
    assert decay == pytest.approx(34.7, abs=0.1)
    slow = levels.time_weighted_ms(x, fs, levels.TIME_CONSTANT_S["S"])
    assert 10 * np.log10(slow[int(1.2 * fs)] / slow[int(1.7 * fs)]) / 0.5 == pytest.approx(
        4.34, abs=0.02)


@pytest.mark.parametrize("burst_s, table_db", [
    # IEC 61672-1:2013 Table 4, toneburst response, F: LAFmax - LA of the steady 4 kHz tone
    # (from memory): 200 ms -1.0 dB, 2 ms -18.0 dB, 0.25 ms -27.0 dB; the hand calculation
    # 10 lg(1 - e^(-T/tau)) gives -0.98, -17.99, -27.0
    (0.2, -1.0), (0.002, -18.0), (0.00025, -27.0),
])
def test_sine_burst_lafmax_and_lae_match_the_hand_calculation(burst_s, table_db):
    fs, f, amp = 96000.0, 4000.0, 2.0  # 2 Pa amplitude: 1.414 Pa rms
    p0 = 20e-6
    n = int(round(burst_s * fs))
    x = np.zeros(int(0.6 * fs))
    t = np.arange(n) / fs
    x[int(0.2 * fs):int(0.2 * fs) + n] = amp * np.sin(2 * np.pi * f * t)
    meas = levels.event_measures(x / p0, fs)
    la = 20 * np.log10(amp / np.sqrt(2) / p0) + float(levels.a_weighting_db(f))  # steady LA
    hand = 10 * np.log10(1 - np.exp(-burst_s / 0.125))
    assert meas["lafmax_db"] - la == pytest.approx(hand, abs=0.15 * DB)
    assert meas["lafmax_db"] - la == pytest.approx(table_db, abs=0.3 * DB)  # table tolerance
    # LAE: the burst's energy, (A^2 / 2) T re p0^2 x 1 s (ISO 1996-1), A-weighted
    lae = 10 * np.log10(amp**2 / 2 * burst_s / p0**2) + float(levels.a_weighting_db(f))
    tol = 0.05 if burst_s >= 0.002 else 0.3  # a 1-cycle burst spreads beyond one tone
    assert meas["lae_db"] == pytest.approx(lae, abs=tol * DB)


def test_lcpeak_of_a_1_khz_sine_is_its_amplitude():
    # C(1 kHz) = 0 dB (IEC 61672-1); peak 20 lg(A / p0) = the rms level + 3.01 dB (textbook)
    fs, amp = 48000.0, 3.0
    t = np.arange(int(fs)) / fs
    fade = np.minimum(1.0, t / 0.05)  # a 50 ms fade-in: no switch-on transient in the filter
    meas = levels.event_measures(amp * fade * np.sin(2 * np.pi * 1000.0 * t) / 20e-6, fs)
    assert meas["lcpeak_db"] == pytest.approx(20 * np.log10(amp / 20e-6), abs=0.05 * DB)
    assert meas["laeq_db"] == pytest.approx(20 * np.log10(amp / np.sqrt(2) / 20e-6),
                                            abs=0.15 * DB)  # less the fade-in: -0.07 dB


def test_event_measures_take_the_background_off():
    # energetic subtraction of a steady background (common practice): an event 10 dB above
    # the background over 1 s within a 2 s record
    fs = 16000.0
    rng = np.random.default_rng(21)
    bg = 0.01 * rng.standard_normal(int(4 * fs))
    event = np.zeros(int(2 * fs))
    event[int(0.5 * fs):int(1.5 * fs)] = np.sqrt(10.0) * 0.01 * rng.standard_normal(int(fs))
    clean = levels.event_measures(event / 20e-6, fs)
    got = levels.event_measures((event + bg[:event.size]) / 20e-6, fs,
                                background_ref=bg[event.size:] / 20e-6)
    assert got["lae_db"] == pytest.approx(clean["lae_db"], abs=0.2 * DB)
    plain = levels.event_measures((event + bg[:event.size]) / 20e-6, fs)
    assert plain["lae_db"] - clean["lae_db"] > 0.5  # 2 s of background add about 0.8 dB


# --- issue 21: ISO 9613-2 ground effect and barrier (from memory) --------------------------

def test_iso_9613_2_ground_effect_values():
    # ISO 9613-2:1996 Table 3 (from memory).  Hard ground (G = 0): -1.5 dB in each end region
    # and -3 q in the middle, q = 1 - 30 (hs + hr) / dp beyond 30 (hs + hr)
    near = levels.ground_attenuation_db(50.0, 1.5, 1.5, ground_factor=0.0)
    np.testing.assert_allclose(near, -3.0, atol=1e-9)
    far = levels.ground_attenuation_db(200.0, 1.5, 1.5, ground_factor=0.0)
    np.testing.assert_allclose(far, -3.0 - 3.0 * (1 - 90.0 / 200.0), atol=1e-9)
    # porous ground (G = 1) at 1.5 m over 200 m, 500 Hz: 2 (-1.5 + c'(1.5)),
    # c'(h) = 1.5 + 14 e^(-0.46 h^2) (1 - e^(-dp/50)): 9.77 dB; 2-8 kHz: 0; 63 Hz: -3 - 3q
    soft = levels.ground_attenuation_db(200.0, 1.5, 1.5, ground_factor=1.0)
    c = 1.5 + 14.0 * np.exp(-0.46 * 1.5**2) * (1 - np.exp(-4.0))
    assert soft[3] == pytest.approx(2 * (-1.5 + c), abs=1e-9)
    assert soft[3] == pytest.approx(9.77, abs=0.01)
    np.testing.assert_allclose(soft[5:], 0.0, atol=1e-12)
    assert soft[0] == pytest.approx(-3.0 - 3.0 * 0.55, abs=1e-9)
    with pytest.raises(TdoaError):
        levels.ground_attenuation_db(200.0, 1.5, 1.5, ground_factor=1.5)


def test_iso_9613_2_barrier_dz():
    # ISO 9613-2:1996 eq. (14) (from memory): D_z = 10 lg(3 + (C2 / lambda) C3 z K_met),
    # C2 = 20, C3 = 1; grazing (z = 0) gives 10 lg 3 = 4.8 dB at every frequency
    fm = levels.exact_mid_band_hz(BANDS)
    wall = ([[20.0, -10.0], [20.0, 10.0]], 2.0)
    graze = levels.iso9613_barrier_db([0, 0, 2.0], [40.0, 0, 2.0], wall, fm, 343.0)
    np.testing.assert_allclose(graze, 10 * np.log10(3.0), atol=1e-9)
    # a 4 m wall halfway along a 40 m path at 1 m heights: z = 2 sqrt(20^2 + 3^2) - 40
    deep = levels.iso9613_barrier_db([0, 0, 1.0], [40.0, 0, 1.0], ([[20.0, -10.0],
                                                                  [20.0, 10.0]], 4.0), fm, 343.0)
    z = 2 * np.hypot(20.0, 3.0) - 40.0
    kmet = np.exp(-np.sqrt(np.hypot(20.0, 3.0) ** 2 * 40.0 / (2 * z)) / 2000.0)
    hand = np.minimum(10 * np.log10(3 + 20 * fm / 343.0 * z * kmet), 20.0)
    np.testing.assert_allclose(deep, hand, atol=1e-9)
    assert deep[-1] == 20.0  # the single-diffraction cap (ISO 9613-2, from memory)
    # the screening replaces the ground effect where larger: A_bar = D_z - A_gr >= 0
    out = levels.receiver_levels_db(np.full(8, 100.0), [0, 0, 1.0], [40.0, 0, 1.0], BANDS,
                                    15.0, 70.0, barriers=[wall[:1] + (4.0,)], ground=1.0,
                                    barrier_method="iso9613-2", sound_speed_mps=343.0)
    np.testing.assert_allclose(out["ground_db"] + out["screen_db"],
                               np.maximum(out["barrier_db"], out["ground_db"]), atol=1e-9)


# --- issue 21: the source's part from cross-spectra -------------------------------------------

def _common_plus_noise(signal_db, noise_db, n_mics, seconds, fs, seed):
    """White common signal and independent white noise, band levels re 1 (numpy only)."""
    rng = np.random.default_rng(seed)
    n = int(seconds * fs)
    common = rng.standard_normal(n) * 10 ** (signal_db / 20)
    noise = rng.standard_normal((n_mics, n)) * 10 ** (noise_db / 20)
    return common, common[None, :] + noise


@pytest.mark.parametrize("signal_db", [-6.0, -25.0])
def test_cross_spectra_find_a_common_signal_under_the_noise_or_bound_it(signal_db):
    # Independent noise averages out of the cross-spectra (textbook: coherent output power);
    # a white signal 6 dB under white noise is found within 1 dB in every band with thousands
    # of bins (8 s at 16 kHz); 25 dB under, it is not clearly above the cross-spectra's own
    # noise floor: upper bounds, which hold
    fs = 16000.0
    common, x = _common_plus_noise(signal_db, 0.0, 4, 8.0, fs, seed=5)
    truth = levels.octave_band_levels_db(common, fs)
    cross = levels.pair_cross_powers(x, fs)
    coh = levels.coherent_source_power(cross, np.zeros((4, 8)))
    lw, up = coh["lw_db"], coh["upper_db"]  # dBFS, as octave_band_levels_db
    found = np.isfinite(lw)
    if signal_db > -10:
        assert found[3:7].all()  # 500 Hz - 4 kHz
    np.testing.assert_allclose(lw[found], truth[found], atol=1.0 * DB)
    bounded = ~found & np.isfinite(truth)
    assert np.all(up[bounded] >= truth[bounded])
    if signal_db < -20:
        assert bounded[3:7].all()


@pytest.mark.parametrize("seed", [1, 2, 3, 4])
def test_noise_alone_is_never_a_level(seed):
    # no common sound at all: every band is an upper bound, and it bounds the nothing there
    fs = 16000.0
    x = np.random.default_rng(seed).standard_normal((3, int(2 * fs)))
    coh = levels.coherent_source_power(levels.pair_cross_powers(x, fs), np.zeros((3, 8)))
    usable = np.isfinite(levels.octave_band_levels_db(x[0], fs))
    assert not np.any(np.isfinite(coh["lw_db"]))
    assert np.all(coh["is_upper"][usable])
    # the bound sits well below the noise's own band level (the cross-spectra see past it):
    # about 4.4 / sqrt(bins) of it for three mics (three parts per band, 3 standard errors)
    noise = levels.octave_band_levels_db(x, fs).mean(axis=0)
    assert np.all(coh["upper_db"][4:7] < noise[4:7] - 6.0)


def test_level_result_marks_upper_bounds_and_sums_only_levels():
    lw = LW_TRUE.copy()
    lw[7] = np.nan
    up = np.full(8, np.nan)
    up[7] = 80.0
    out = levels.level_result(BANDS, lw, np.zeros(8), upper_db=up)
    assert out["source_lw_db"][7] is None and out["source_lw_upper_db"][7] == 80.0
    assert out["source_lw_is_upper_bound"] == [False] * 7 + [True]
    assert out["source_lwa_bands_hz"] == list(BANDS[:7])
    assert out["source_lwa_db"] == pytest.approx(float(levels.lwa_db(LW_TRUE[:7], BANDS[:7])),
                                                 abs=0.01)
    assert "8000" in out["source_lwa_note"] and "lower bound" in out["source_lwa_note"]
    assert out["source_lwa_upper_db"] >= out["source_lwa_db"]
