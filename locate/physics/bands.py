"""Octave bands: mid-band frequencies, A-weighting, band levels of a signal, background noise.

Pure numpy; band levels have the bands on the **last** axis ``(..., B)``; signals have time on
the last axis ``(..., T)``.  A band with no usable signal is NaN.  The propagation side (source
power, receivers, barriers) is in :mod:`locate.physics.levels`, which re-exports these names.

Sources
-------
* IEC 61260-1:2014, base-10 system: G = 10^(3/10), exact mid-band frequencies
  f_m = 1000 G^(k/3) Hz (one-third-octave index k), band edges f_m G^(-+1/(2b)), b = 1 or 3.
* IEC 61672-1:2013, eq. (E.6): A-weighting with the A1000 normalisation (+2.00 dB);
  eq. (E.1): C-weighting with C1000 = -0.062 dB; the weightings as analogue filters (poles at
  20.6, 107.7, 737.9 and 12194 Hz, Annex E) for time signals; time weighting F (tau = 0.125 s)
  and S (1 s), clause 5.8: L_tau(t) = 10 lg[(1/tau) int p^2(x) e^(-(t - x)/tau) dx / p0^2].
* AES17 (common practice): 0 dBFS is the level of a full-scale sine.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "OCTAVE_BANDS_HZ",
    "exact_mid_band_hz",
    "band_edges_hz",
    "octave_band_edges_hz",
    "a_weighting_db",
    "octave_band_levels_db",
    "background_corrected_db",
    "energetic_mean_db",
    "lwa_db",
    "c_weighting_db",
    "weighting_response",
    "frequency_weighted",
    "time_weighted_ms",
    "TIME_CONSTANT_S",
]

TIME_CONSTANT_S = {"F": 0.125, "S": 1.0}  # IEC 61672-1:2013 clause 5.8
_POLES_HZ = (20.60, 107.7, 737.9, 12194.0)  # IEC 61672-1:2013 Annex E, (E.1)-(E.4)

OCTAVE_BANDS_HZ = (63, 125, 250, 500, 1000, 2000, 4000, 8000)  # nominal, IEC 61260-1 Annex E
_G = 10.0**0.3  # octave frequency ratio, base-10 system, IEC 61260-1:2014 eq. (1)
_FULL_SCALE_SINE_MS = 0.5  # mean square of a sine of amplitude 1 (0 dBFS, AES17 convention)
_MIN_BINS_BELOW_EDGE = 4  # lower band edge must be >= 4 frequency bins (record >= 4 periods)


def exact_mid_band_hz(bands_hz, *, octave_only=False):
    """Exact base-10 mid-band frequencies for nominal ones (IEC 61260-1:2014 eq. (1)).

    Parameters
    ----------
    bands_hz : array_like, shape (B,)
        Nominal (or exact) octave or one-third-octave mid-band frequencies, Hz.
    octave_only : bool
        Refuse one-third-octave bands that are not also octave bands.

    Returns
    -------
    ndarray, shape (B,)
        1000 * 10^(k/10) Hz with k the nearest one-third-octave index.

    Raises
    ------
    ValueError
        A value is more than 2 % from every exact mid-band frequency (nominal values are within
        1 %, IEC 61260-1 Annex E).
    """
    f = np.atleast_1d(np.asarray(bands_hz, dtype=float))
    if not np.all(np.isfinite(f) & (f > 0)):
        raise ValueError(f"bands_hz must be positive frequencies in Hz, got {bands_hz!r}")
    k = np.round(10.0 * np.log10(f / 1000.0))
    exact = 1000.0 * 10.0 ** (k / 10.0)
    if np.any(np.abs(f / exact - 1.0) > 0.02) or (octave_only and np.any(k % 3 != 0)):
        kind = "octave" if octave_only else "octave or one-third-octave"
        raise ValueError(f"bands_hz must be nominal {kind} mid-band frequencies, got {bands_hz!r}")
    return exact


def band_edges_hz(bands_hz, fraction=None):
    """Band edges ``(lo (B,), hi (B,))`` = f_m G^(-+1/(2 fraction)), IEC 61260-1:2014 eq. (2)-(3).

    ``fraction`` is 1 (octave) or 3 (one-third octave); ``None`` takes octave bands when every
    mid-band frequency is an octave one, else one-third-octave bands.
    """
    fm = exact_mid_band_hz(bands_hz, octave_only=fraction == 1)
    if fraction is None:
        fraction = 1 if np.all(np.round(10.0 * np.log10(fm / 1000.0)) % 3 == 0) else 3
    if fraction not in (1, 3):
        raise ValueError(f"fraction must be 1, 3 or None, got {fraction!r}")
    half = _G ** (1.0 / (2.0 * fraction))
    return fm / half, fm * half


def octave_band_edges_hz(bands_hz=OCTAVE_BANDS_HZ):
    """Lower and upper edges of octave bands, ``(lo (B,), hi (B,))``: f_m G^(-+1/2)."""
    return band_edges_hz(bands_hz, fraction=1)


def a_weighting_db(frequency_hz):
    """A-weighting, dB, IEC 61672-1:2013 eq. (E.6) with A1000 = -2.00 dB.

    Parameters
    ----------
    frequency_hz : array_like
        Frequency, Hz (use exact mid-band frequencies to reproduce the standard's table).

    Returns
    -------
    ndarray
        A(f), dB; 0.00 dB at 1 kHz.
    """
    f2 = np.asarray(frequency_hz, dtype=float) ** 2
    f1, f2p, f3, f4 = 20.60, 107.7, 737.9, 12194.0  # pole frequencies, IEC 61672-1 (E.1)-(E.4)
    with np.errstate(divide="ignore"):
        ratio = f4**2 * f2**2 / ((f2 + f1**2) * np.sqrt(f2 + f2p**2) * np.sqrt(f2 + f3**2)
                                 * (f2 + f4**2))
        return 20.0 * np.log10(ratio) + 2.00  # eq. (E.6): minus A1000 = -2.00 dB


def octave_band_levels_db(signal, sample_rate_hz, *, full_scale_db_spl=None,
                          bands_hz=OCTAVE_BANDS_HZ):
    """Equivalent continuous level per octave band over the whole signal.

    Parameters
    ----------
    signal : array_like, shape (..., T)
        Samples, time on the last axis, digital full scale = amplitude 1.
    sample_rate_hz : float
        Sample rate, Hz.
    full_scale_db_spl : float or array_like (...), optional
        Sound pressure level of a 0 dBFS sine; ``None`` returns dBFS.
    bands_hz : sequence of float, shape (B,)
        Nominal octave mid-band frequencies, increasing.

    Returns
    -------
    ndarray, shape (..., B)
        Band Leq in dBFS (a full-scale sine in its band reads 0.00 dBFS, AES17 convention, i.e.
        10 lg(mean square / 0.5)), or dB SPL (a full-scale sine reads ``full_scale_db_spl``).
        NaN where the band's upper edge is above Nyquist or its lower edge is below
        4 frequency bins (record shorter than 4 periods of the lower edge); -inf for a band
        holding exactly no energy.

    Notes
    -----
    The band energy is the FFT power summed over the exact band edges (an ideal band-pass; by
    Parseval's theorem the band mean squares of a long record add up to the signal's).  A
    class-1 filter of IEC 61260-1 has the same effective bandwidth, so broadband levels agree;
    a pure tone sitting on a band edge is split differently.
    """
    x = np.asarray(signal, dtype=float)
    fs = float(sample_rate_hz)
    if x.ndim < 1 or x.shape[-1] < 2 or not fs > 0:
        raise ValueError(f"need signal (..., T) with T >= 2 and sample_rate_hz > 0, got "
                         f"shape {x.shape!r} and {sample_rate_hz!r}")
    n = x.shape[-1]
    lo, hi = octave_band_edges_hz(bands_hz)
    if np.any(np.diff(lo) <= 0):
        raise ValueError(f"bands_hz must be in increasing order, got {bands_hz!r}")
    power = np.abs(np.fft.rfft(x, axis=-1)) ** 2
    weight = np.full(power.shape[-1], 2.0)  # one-sided spectrum: interior bins count twice
    weight[0] = 1.0
    if n % 2 == 0:
        weight[-1] = 1.0
    ms = power * (weight / n**2)  # per-bin mean square; the bins add up to the signal's
    ms = np.concatenate([ms, np.zeros(x.shape[:-1] + (1,))], axis=-1)  # an index may be K
    freqs = np.fft.rfftfreq(n, 1.0 / fs)
    i_lo = np.searchsorted(freqs, lo, side="left")  # bins with lo <= f < hi
    i_hi = np.searchsorted(freqs, hi, side="left")
    # segment sums [lo0, hi0), [hi0, lo1), [lo1, hi1), ...; keep the even ones (no cumsum, so
    # a quiet band is not lost in the rounding of a loud one)
    sums = np.add.reduceat(ms, np.stack([i_lo, i_hi], axis=-1).ravel(), axis=-1)[..., ::2]
    band_ms = np.where(i_hi > i_lo, sums, 0.0)
    with np.errstate(divide="ignore"):
        level = 10.0 * np.log10(np.maximum(band_ms, 0.0) / _FULL_SCALE_SINE_MS)
    usable = (hi <= fs / 2.0) & (lo >= _MIN_BINS_BELOW_EDGE * fs / n)
    level = np.where(usable, level, np.nan)
    if full_scale_db_spl is not None:
        level = level + np.asarray(full_scale_db_spl, dtype=float)[..., None]
    return level


def background_corrected_db(level_db, background_db, *, min_excess_db=3.0):
    """Subtract background noise energetically; NaN where the signal does not clear it.

    Parameters
    ----------
    level_db : array_like, shape (..., B)
        Band levels of the signal segment (signal + background).
    background_db : array_like, shape (..., B)
        Band levels of a background segment (same units); -inf for a silent band.
    min_excess_db : float
        Bands less than this far above the background are discarded (3 dB, common practice).

    Returns
    -------
    ndarray, shape (..., B)
        10 lg(10^(L/10) - 10^(Lbg/10)) where L - Lbg >= ``min_excess_db``, else NaN.

    Notes
    -----
    Common practice corrects bands 3-10 dB above the background and leaves bands more than
    10 dB above it uncorrected.  Here the subtraction is applied to every kept band: it is the
    same within 3-10 dB, keeps the result continuous, and above 10 dB changes it by less than
    0.46 dB.  A NaN in either input gives NaN.
    """
    lv = np.asarray(level_db, dtype=float)
    bg = np.asarray(background_db, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        excess = lv - bg
        corrected = lv + 10.0 * np.log10(1.0 - 10.0 ** (-excess / 10.0))
    keep = np.isfinite(lv) & (excess >= min_excess_db)
    return np.where(keep, corrected, np.nan)


def energetic_mean_db(values_db, axis=0):
    """NaN-aware energetic mean 10 lg(mean 10^(L/10)) along ``axis``.

    Only finite values count (NaN and +-inf are "no usable value").  Returns
    ``(mean (reduced shape), count (reduced shape))``; the mean is NaN where the count is 0.
    """
    v = np.asarray(values_db, dtype=float)
    ok = np.isfinite(v)
    top = np.max(np.where(ok, v, -np.inf), axis=axis, keepdims=True)
    top = np.where(np.isfinite(top), top, 0.0)  # shift against overflow
    energy = np.sum(np.where(ok, 10.0 ** ((np.where(ok, v, 0.0) - top) / 10.0), 0.0), axis=axis)
    count = np.sum(ok, axis=axis)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = 10.0 * np.log10(energy / np.maximum(count, 1)) + np.squeeze(top, axis=axis)
    return np.where(count > 0, mean, np.nan), count


def lwa_db(lw_bands_db, bands_hz=OCTAVE_BANDS_HZ):
    """A-weighted total of band levels, shape ``(...)`` from ``(..., B)``.

    10 lg(sum 10^((L_b + A(f_b)) / 10)) over the **usable** (finite) bands only, A(f) from
    :func:`a_weighting_db` at the exact mid-band frequencies; NaN when no band is usable.  With
    bands missing the total is a lower bound.  Works for sound power and pressure levels alike.
    """
    lv = np.asarray(lw_bands_db, dtype=float)
    weighted = lv + a_weighting_db(exact_mid_band_hz(bands_hz))
    mean, count = energetic_mean_db(weighted, axis=-1)
    with np.errstate(divide="ignore"):
        return mean + 10.0 * np.log10(np.maximum(count, 1))  # mean -> sum


def c_weighting_db(frequency_hz):
    """C-weighting, dB, IEC 61672-1:2013 eq. (E.1) with C1000 = -0.062 dB; 0.00 dB at 1 kHz."""
    f2 = np.asarray(frequency_hz, dtype=float) ** 2
    f1, _, _, f4 = _POLES_HZ
    with np.errstate(divide="ignore"):
        return 20.0 * np.log10(f4**2 * f2 / ((f2 + f1**2) * (f2 + f4**2))) + 0.062


def weighting_response(frequency_hz, weighting):
    """Complex response of the A, C or Z weighting as the analogue filter of IEC 61672-1 Annex E.

    A: s^4 / ((s + w1)^2 (s + w2) (s + w3) (s + w4)^2), C: s^2 / ((s + w1)^2 (s + w4)^2),
    w_k = 2 pi f_k, normalised to 0 dB at 1 kHz; Z: 1.  Its magnitude is
    :func:`a_weighting_db` / :func:`c_weighting_db`; the phase is that of the minimum-phase
    analogue network, which a peak (LCpeak) depends on.
    """
    w = weighting.upper()
    if w == "Z":
        return np.ones(np.shape(frequency_hz), dtype=complex)
    if w not in ("A", "C"):
        raise ValueError(f"weighting must be 'A', 'C' or 'Z', got {weighting!r}")
    w1, w2, w3, w4 = (2.0 * np.pi * f for f in _POLES_HZ)

    def h(f):
        s = 2j * np.pi * np.asarray(f, dtype=float)
        if w == "A":
            return s**4 / ((s + w1) ** 2 * (s + w2) * (s + w3) * (s + w4) ** 2)
        return s**2 / ((s + w1) ** 2 * (s + w4) ** 2)

    return h(frequency_hz) / np.abs(h(1000.0))


def frequency_weighted(signal, sample_rate_hz, weighting="A"):
    """The signal through the A, C or Z weighting filter, same shape ``(..., T)``.

    Applied in the frequency domain with the analogue response (:func:`weighting_response`)
    at every bin, so there is no bilinear frequency warping near Nyquist; the record is
    zero-padded by at least 0.25 s (the A and C filters' slowest pole, 20.6 Hz, has decayed by
    more than 250 dB by then) so the filter's tail does not wrap around.
    """
    x = np.asarray(signal, dtype=float)
    fs = float(sample_rate_hz)
    n = x.shape[-1]
    n_fft = int(2 ** np.ceil(np.log2(n + max(int(0.25 * fs), 16))))
    spec = np.fft.rfft(x, n_fft, axis=-1)
    spec = spec * weighting_response(np.fft.rfftfreq(n_fft, 1.0 / fs), weighting)
    if n_fft % 2 == 0:
        spec[..., -1] = spec[..., -1].real  # the Nyquist term of a real signal is real
    return np.fft.irfft(spec, n_fft, axis=-1)[..., :n]


def time_weighted_ms(signal, sample_rate_hz, time_constant_s=TIME_CONSTANT_S["F"]):
    """Exponentially time-weighted mean square, IEC 61672-1:2013 clause 5.8, shape ``(..., T)``.

    y(t) = (1/tau) int_{-inf}^t x^2(u) e^{-(t - u)/tau} du, evaluated exactly for a signal held
    constant over each sample (starting from rest); 10 lg(y / p0^2) is L_F (tau = 0.125 s) or
    L_S (1 s).
    """
    from scipy.signal import lfilter

    x2 = np.asarray(signal, dtype=float) ** 2
    a = np.exp(-1.0 / (float(sample_rate_hz) * float(time_constant_s)))
    return lfilter([1.0 - a], [1.0, -a], x2, axis=-1)
