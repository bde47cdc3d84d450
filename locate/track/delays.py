"""Windowed delays of a moving source: plain windows, then windows warped along a path.

A GCC over a window shared by two channels measures one delay, but the delay of a moving
source drifts during the window: by ``rate * window`` with ``rate = d(delay)/dt``, up to about
``v b / (c R)`` for a baseline ``b`` at range ``R`` (0.13 s/s for 55 m/s at 300 m over a 250 m
baseline).  Once the drift exceeds the correlation main lobe (about ``1 / bandwidth``) the peak
smears into a plateau.  Two passes deal with it:

1. **Plain windows** (long enough that every pair shares most of its signal: at least twice the
   largest geometric lag): coarse delays, anchored at the pair centre (see
   :mod:`locate.track.retarded`), their variance raised by the drift ``(rate * window)^2 / 12`` of a
   uniform smear; they only start the path.
2. **Warped windows**: every channel is resampled at the predicted arrival times of the sound
   that the reference mic hears during the window (emission times from the current path), so
   that the channels line up sample by sample; the GCC then measures small residual delays with
   no drift to first order, and the path is refitted to them.  Repeated until the path settles.

Window rule (defaults): the track window keeps the source's own motion during a window below an
eighth of the array aperture, ``window = aperture / (8 v)`` for the expected speed ``v``,
clipped to 0.1-1 s (so the warped delays follow a nearly linear stretch of the path and keep
enough samples for a precise GCC), and the hop is half the window.  Limits: the warping is only
as good as the path model over one window (sharp manoeuvres within a window smear the delays),
and a source that stays beyond ~20 apertures gives directions but hardly any range.

Resampling uses a Kaiser-windowed sinc (16 taps, beta = 8; common practice for band-limited
interpolation of content below ~0.4 fs).
"""

from __future__ import annotations

import numpy as np
from scipy import fft as sfft
from scipy import signal

from locate.errors import OptionError
from locate.signal.delays import estimate_delays, geometric_max_lag_s
from locate.track.motion import emission_time_s
from locate.track.retarded import arrival_times

__all__ = ["default_window_s", "window_centres", "plain_delays", "warped_delays", "resample"]

_HALF = 8
_BETA = 8.0
_PHASES = 4096  # phase step 1/4096 sample: < 0.03 us at 8 kHz
_TABLE = []


def _kernel():
    """Kaiser-windowed sinc taps for every sub-sample phase, shape (_PHASES + 1, 2 _HALF)."""
    if not _TABLE:
        frac = np.arange(_PHASES + 1) / _PHASES
        arg = frac[:, None] - np.arange(-_HALF + 1, _HALF + 1)
        win = np.i0(_BETA * np.sqrt(np.clip(1.0 - (arg / _HALF) ** 2, 0.0, 1.0))) / np.i0(_BETA)
        _TABLE.append(np.sinc(arg) * win)
    return _TABLE[0]


def default_window_s(mic_positions_m, sound_speed_mps, expected_speed_mps=20.0):
    """Default track window and hop (module docstring), seconds.

    Parameters
    ----------
    mic_positions_m : array_like, shape (N, 3)
    sound_speed_mps : float
    expected_speed_mps : float

    Returns
    -------
    window_s, hop_s, plain_window_s : float
        Track window, its hop, and the window of the first (plain) pass.
    """
    mics = np.asarray(mic_positions_m, float)
    aperture = float(np.max(np.linalg.norm(mics[:, None] - mics[None], axis=-1)))
    v = max(float(expected_speed_mps), 1.0)
    window = float(np.clip(aperture / (8.0 * v), 0.1, 1.0))
    plain = float(max(2.0 * aperture / sound_speed_mps + 0.05, window, 0.2))
    return window, window / 2.0, plain


def window_centres(n_samples, sample_rate_hz, t0_s, window_s, hop_s):
    """Centres (reference-mic time) of the windows that fit in a span, shape (W,).

    Raises
    ------
    locate.errors.OptionError
        If the window is longer than the span or not positive, or the hop is not positive.
    """
    span = n_samples / float(sample_rate_hz)
    if not hop_s > 0:
        raise OptionError(f"the hop must be positive, got {hop_s!r} s", field="hop_s")
    if not window_s > 0:
        raise OptionError(f"the window must be positive, got {window_s!r} s", field="window_s")
    if window_s > span:
        raise OptionError(f"the window ({window_s:g} s) is longer than the span analysed "
                          f"({span:g} s); shorten --window or widen --from/--to",
                          field="window_s")
    n = int(np.floor((span - window_s) / hop_s + 1e-9)) + 1
    return t0_s + window_s / 2.0 + hop_s * np.arange(n)


def resample(x, sample_rate_hz, t0_s, times_s):
    """Band-limited values of signals at arbitrary times (windowed sinc).

    Parameters
    ----------
    x : array_like, shape (N, T)
        Signals, sample n at ``t0_s + n / sample_rate_hz``.
    sample_rate_hz : float
    t0_s : float
    times_s : array_like, shape (N, L)
        Times at which to evaluate each channel.

    Returns
    -------
    ndarray, shape (N, L)
        Zero outside the recording.
    """
    x = np.asarray(x, float)
    u = (np.asarray(times_s, float) - t0_s) * float(sample_rate_hz)
    n0 = np.floor(u).astype(int)
    phase = np.rint((u - n0) * _PHASES).astype(int)  # nearest of _PHASES sub-sample phases
    h = _kernel()[phase]  # (N, L, 2H)
    idx = n0[..., None] + np.arange(-_HALF + 1, _HALF + 1)
    inside = (idx >= 0) & (idx < x.shape[1])
    rows = np.arange(x.shape[0])[:, None, None]
    vals = np.where(inside, x[rows, np.clip(idx, 0, x.shape[1] - 1)], 0.0)
    return np.sum(vals * h, axis=-1)


def _segment(signals, fs, t0_s, centre, window_s):
    n = int(round(window_s * fs))
    start = int(round((centre - window_s / 2.0 - t0_s) * fs))
    return signals[:, start:start + n]


def _collect(sets, n_pairs, qualities):
    n_w = len(sets)
    d = np.full((n_w, n_pairs), np.nan)
    cov = np.zeros((n_w, n_pairs, n_pairs))
    ok = np.zeros((n_w, n_pairs), bool)
    for w, ds in enumerate(sets):
        d[w] = ds.delay_s
        cov[w] = ds.covariance_s2
        ok[w] = np.isin(np.asarray(ds.quality), qualities) & np.isfinite(ds.sd_s)
    return d, cov, ok


def gcc_curves(signals, sample_rate_hz, t0_s, centres_s, window_s, pairs, max_lag_s, *,
               band_hz=None, warp=None, mic_positions_m=None, sound_speed_mps=None,
               wind_mps=None, reference_mic=0, progress=None):
    """GCC-PHAT curves of every pair in every window, over the whole lag search.

    The window of mic i is cross-correlated (Knapp & Carter 1976) against a segment of mic j
    longer by the largest lag on each side, so that all of mic i's sound is inside it whatever
    the delay.  With ``warp`` every channel is first resampled along that path (module
    docstring) and the lags are residuals.

    Returns
    -------
    lags_s : ndarray, shape (L,)
    curves : ndarray, shape (W, P, L)
        Correlation at each lag (positive: mic j later).
    """
    x = np.asarray(signals, float)
    fs = float(sample_rate_hz)
    pairs = np.asarray(pairs, int)
    ii, jj = pairs[:, 0], pairs[:, 1]
    big = int(np.ceil(np.max(max_lag_s) * fs)) + 2
    n = int(round(window_s * fs))
    nfft = sfft.next_fast_len(2 * n + 2 * big, real=True)
    f = sfft.rfftfreq(nfft, 1.0 / fs)
    lo, hi = (20.0, 0.45 * fs) if band_hz is None else band_hz
    mask = (f >= lo) & (f <= hi)
    lags = np.arange(-big, big + 1)
    xp = np.pad(x, ((0, 0), (big, big)))
    local = (np.arange(n + 2 * big) - big - (n - 1) / 2.0) / fs
    curves = np.zeros((len(centres_s), len(pairs), lags.size), dtype=np.float32)
    for w, tc in enumerate(centres_s):  # loop over windows; pairs and lags are vectorised
        if warp is None:
            s0 = int(round((tc - window_s / 2.0 - t0_s) * fs)) + big
            seg = xp[:, s0 - big:s0 + n + big]
        else:
            _, arr = arrival_times(warp, tc + local, mic_positions_m, sound_speed_mps, wind_mps,
                                   reference_mic)
            seg = resample(x, fs, t0_s, arr.T)
        short = sfft.rfft(seg[:, big:big + n], nfft, axis=1)
        long_ = sfft.rfft(seg, nfft, axis=1)
        cross = np.conj(short[ii]) * long_[jj]
        cross = np.where(mask, cross / np.maximum(np.abs(cross), 1e-300), 0.0)
        curves[w] = sfft.irfft(cross, nfft, axis=1)[:, lags + big] / max(mask.sum(), 1) * 2
        if progress is not None:
            progress(w + 1, len(centres_s))
    return lags / fs, curves


def pick_delays(lags_s, curves, max_lag_s, lobe_s):
    """Delay of each curve's peak after the box smoothing that makes it stand out most.

    The Hilbert envelopes of the curves (scipy.signal.hilbert; a band-pass correlation sums to
    about zero over wide lags, its envelope does not) are smoothed with boxes of 1, 4, 16, 64
    and 256 main lobes and the box that
    lifts the peak highest above its curve (in robust standard deviations) is kept: a drifting
    delay spreads its correlation over a plateau and a box of the plateau's width integrates
    it back (a matched filter for a uniform smear).

    Returns
    -------
    delays_s : ndarray, shape (W, P)
    variance_s2 : ndarray, shape (W, P)
        (box^2 + lobe^2) / 12.
    score : ndarray, shape (W, P)
        Peak height in robust standard deviations.
    """
    dt = lags_s[1] - lags_s[0]
    lobe = max(1, int(round(lobe_s / dt)))
    n_w, n_p, n_l = curves.shape
    inside = np.abs(lags_s)[None, :] <= np.asarray(max_lag_s, float).reshape(-1)[:, None] + dt / 2
    r = np.abs(signal.hilbert(curves.reshape(n_w * n_p, n_l).astype(float), axis=-1))
    ins = np.tile(inside, (n_w, 1))
    best = np.full(n_w * n_p, -np.inf)
    d = np.zeros(n_w * n_p)
    var = np.zeros(n_w * n_p)
    rows = np.arange(n_w * n_p)
    for width in [lobe * k for k in (1, 4, 16, 64, 256) if lobe * k < n_l // 2] or [1]:
        sm = _box(r, width)
        masked = np.where(ins, sm, np.nan)
        med = np.nanmedian(masked, axis=1)
        mad = 1.4826 * np.nanmedian(np.abs(masked - med[:, None]), axis=1)
        k = np.nanargmax(masked, axis=1)
        z = (sm[rows, k] - med) / np.maximum(mad, 1e-12)
        better = z > best
        best = np.where(better, z, best)
        d = np.where(better, lags_s[k], d)
        var = np.where(better, (width**2 + lobe**2) / 12.0 * dt**2, var)
    return d.reshape(n_w, n_p), var.reshape(n_w, n_p), best.reshape(n_w, n_p)


def plain_delays(signals, sample_rate_hz, t0_s, centres_s, window_s, mic_positions_m, pairs,
                 sound_speed_mps, *, wind_speed_mps=0.0, band_hz=None, progress=None):
    """Coarse delays over plain windows, tolerant of drift (:func:`gcc_curves`,
    :func:`pick_delays`).

    Returns
    -------
    delays_s : ndarray, shape (W, P)
        Anchored at the pair centre (see :mod:`locate.track.retarded`).
    covariance_s2 : ndarray, shape (W, P, P)
        Diagonal.
    usable : ndarray, shape (W, P) bool
        Peaks at least 6 robust standard deviations above their curve.
    lags_s, curves
        From :func:`gcc_curves`.
    """
    max_lag = geometric_max_lag_s(mic_positions_m, pairs, sound_speed_mps,
                                  wind_speed_mps=wind_speed_mps)
    lags, curves = gcc_curves(signals, sample_rate_hz, t0_s, centres_s, window_s, pairs, max_lag,
                              band_hz=band_hz, progress=progress)
    lo, hi = (20.0, 0.45 * sample_rate_hz) if band_hz is None else band_hz
    d, var, score = pick_delays(lags, curves, max_lag, 1.0 / max(hi - lo, 1.0))
    ok = score >= 6.0
    cov = np.zeros(d.shape + (d.shape[1],))
    idx = np.arange(d.shape[1])
    cov[:, idx, idx] = var
    return d, cov, ok, lags, curves


def _box(r, width):
    """Centred moving sum of ``width`` lags along the last axis (zero beyond the ends)."""
    if width <= 1:
        return r
    cs = np.cumsum(np.pad(r, ((0, 0), (width // 2 + 1, width - width // 2))), axis=1)
    return cs[:, width:width + r.shape[1]] - cs[:, :r.shape[1]]


def warped_delays(signals, sample_rate_hz, t0_s, centres_s, window_s, path, mic_positions_m,
                  pairs, sound_speed_mps, *, wind_mps=None, band_hz=None, max_lag_s=0.01,
                  reference_mic=0, tolerant=False, progress=None):
    """Residual GCC delays over windows warped along ``path`` (module docstring, pass 2).

    Parameters
    ----------
    signals : array_like, shape (N, T)
    sample_rate_hz, t0_s : float
        ``t0_s``: time of sample 0 (reference-mic time base).
    centres_s : array_like, shape (W,)
    window_s : float
    path : Path
    mic_positions_m : array_like, shape (N, 3)
    pairs : array_like, shape (P, 2)
    sound_speed_mps : float
    wind_mps : array_like, shape (3,), optional
    band_hz : (float, float), optional
    max_lag_s : float
        Half-width of the residual search.
    reference_mic : int
    tolerant : bool
        Use the drift-tolerant box-smoothed peaks of :func:`pick_delays` (for a path still far
        from the truth) instead of the ML fine delays and covariance of
        :func:`locate.signal.delays.estimate_delays`.

    Returns
    -------
    residual_s : ndarray, shape (W, P)
        Measured ``t*_j - t*_i`` in the warped time base (to be fitted with ``warp=path``).
    covariance_s2 : ndarray, shape (W, P, P)
    usable : ndarray, shape (W, P) bool
        Pairs whose peak is not weak.
    """
    x = np.asarray(signals, float)
    fs = float(sample_rate_hz)
    mics = np.asarray(mic_positions_m, float)
    if tolerant:
        lags, curves = gcc_curves(x, fs, t0_s, centres_s, window_s, pairs,
                                  np.full(len(pairs), max_lag_s), band_hz=band_hz, warp=path,
                                  mic_positions_m=mics, sound_speed_mps=sound_speed_mps,
                                  wind_mps=wind_mps, reference_mic=reference_mic,
                                  progress=progress)
        lo, hi = (20.0, 0.45 * fs) if band_hz is None else band_hz
        d, var, score = pick_delays(lags, curves, np.full(len(pairs), max_lag_s),
                                    1.0 / max(hi - lo, 1.0))
        cov = np.zeros(d.shape + (d.shape[1],))
        idx = np.arange(d.shape[1])
        cov[:, idx, idx] = var
        return d, cov, score >= 6.0
    n = int(round(window_s * fs))
    local = (np.arange(n) - (n - 1) / 2.0) / fs
    sets = []
    whole = np.ones((len(centres_s), len(mics)), bool)
    for w, tc in enumerate(centres_s):  # loop over windows; samples are vectorised
        t_ref = tc + local
        _, arr = arrival_times(path, t_ref, mics, sound_speed_mps, wind_mps, reference_mic)
        whole[w] = _inside(arr, t0_s, x.shape[1], fs)
        y = resample(x, fs, t0_s, arr.T)
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            sets.append(estimate_delays(y, fs, max_lag_s=max_lag_s, band_hz=band_hz,
                                        pairs=pairs, t_s=tc - window_s / 2.0))
        if progress is not None:
            progress(w + 1, len(centres_s))
    # a narrow search centred on the prediction: a tonal second peak is no ambiguity here
    d, cov, ok = _collect(sets, len(pairs), ("good", "ambiguous"))
    pairs = np.asarray(pairs, int)
    return d, cov, ok & whole[:, pairs[:, 0]] & whole[:, pairs[:, 1]]


def _inside(arr_s, t0_s, n_samples, fs):
    """Per mic: does the whole warped window (arrival times ``arr_s`` (L, N)) lie inside the
    recording?  A window that reaches past either end is partly zeros at that mic: its delay
    is biased toward the edge and is not used (at a source kilometres away the mics hear the
    same sound up to a second apart, so the first and last windows of a span are cut short at
    some mics)."""
    lo = t0_s + (_HALF - 1) / fs
    hi = t0_s + (n_samples - _HALF) / fs
    return (arr_s.min(axis=0) >= lo) & (arr_s.max(axis=0) <= hi)


def emission_span_s(path, centres_s, window_s, mic_m, sound_speed_mps, wind_mps=None):
    """Emission times of the first and last sound analysed at ``mic_m``."""
    ends = np.array([centres_s[0] - window_s / 2.0, centres_s[-1] + window_s / 2.0])
    return emission_time_s(ends, mic_m, path, sound_speed_mps, wind_mps)
