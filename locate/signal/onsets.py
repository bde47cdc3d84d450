"""The delays of a sound that starts over a steady one (a bang over a fan or a hum).

A span holding a bang also holds whatever else was sounding; a steady source goes on through
the whole span and, being coherent across the mics, pulls the correlation toward its own
delays (a bang 100 m from a fan was placed on the fan, the mics that heard the bang rejected as
"clock errors").  Here the steady part is measured where it is alone - the stretch just before
the earliest onset - and removed:

1. **Onset gate** - only the part of the span from just before the earliest onset to the
   latest onset plus ``gate_s`` is correlated (the bang's own start, where it stands highest
   over the background).
2. **Background cross-spectrum removed** - the cross-spectral matrix of the steady sound is
   the Welch average (rectangular segments as long as the gate, half overlapping) of the
   stretch before the onset; its expectation equals the background's share of the gated
   periodogram, so it is subtracted from the gated cross-spectrum pair by pair (the mean of a
   coherent steady source is removed, not only its level).
3. **Weights** - each mic's bang-to-background ratio s(f) (gated power over background power,
   minus one, smoothed over frequency) gives the pair coherence
   gamma^2 = s_i s_j / ((1 + s_i)(1 + s_j)) (signal in independent noise, Carter 1987, Proc.
   IEEE 75(2) 236-255), and the Hannan-Thomson weight gamma^2 / (1 - gamma^2) on the unit
   phasor of the cleaned cross-spectrum: bins the bang leaves to the background carry none.
4. **Delay and uncertainty** - the coarse lag is the peak of the weighted correlation inside
   the pair's search window; the fine delay maximises sum w cos(phi + omega tau) by Newton
   steps; its variance is Carter's bound [2 T sum omega^2 gamma^2/(1 - gamma^2) df]^-1 and the
   covariance between pairs sharing a mic follows the linearised phase-error model
   e_i - e_j + n_ij with var(e_u) = 1 / (2 s_u), var(n_ij) = 1 / (2 s_i s_j) (as in
   :mod:`locate.signal.delays`).

The result is a :class:`locate.signal.delays.DelaySet`, so the locator takes it as it takes
any other.  :func:`locate.signal.delays.estimate_delays` is unchanged for plain spans.
"""

from __future__ import annotations

import numpy as np
from scipy import fft as sfft

from locate.signal.delays import (
    AMBIGUOUS_RATIO,
    WEAK_PEAK_SCORE,
    DelaySet,
    all_pairs,
    newton_delays,
)

__all__ = ["onset_delays", "ONSET_GUARD_S", "GATE_S", "MIN_BACKGROUND_S"]

ONSET_GUARD_S = 0.01
"""The gate opens this long before the earliest detected onset (frame-rounded onsets)."""

GATE_S = 0.12
"""Length of the bang's own part correlated after the latest onset, s."""

MIN_BACKGROUND_S = 0.25
"""Shortest stretch before the onset that measures the steady background."""

_SMOOTH_BINS = 16  # frequency smoothing of the bang-to-background ratio (Daniell)
_MIN_RATIO = 0.5  # smoothed gated/background power ratio - 1 below which a bin holds no bang
_VARIANCE_MARGIN = 1.2
"""Factor on the modelled variance: the residual of a coherent steady source is not white
across pairs (it shares |F|^2); calibrated on the simulator (tests/benchmarks/
accept_bangs_over_steady.py)."""


def _smooth(a, width):
    width = max(int(width), 1)
    if width == 1:
        return a
    pad = width // 2
    ap = np.pad(a, [(0, 0)] * (a.ndim - 1) + [(pad, width - 1 - pad)], mode="edge")
    cs = np.cumsum(ap, axis=-1)
    cs = np.concatenate([np.zeros(a.shape[:-1] + (1,)), cs], axis=-1)
    return (cs[..., width:] - cs[..., :-width]) / width


def onset_delays(signals, sample_rate_hz, onset_index, *, max_lag_s, pairs=None,
                 band_hz=None, gate_s=GATE_S, guard_s=ONSET_GUARD_S, t_s=0.0,
                 offsets_s=None, spread_s=None):
    """Delays of the sound that starts at ``onset_index``, the steady background removed.

    Parameters
    ----------
    signals : array_like, shape (N, T)
        A span: at least :data:`MIN_BACKGROUND_S` of background before the earliest onset,
        then the event.
    sample_rate_hz : float
    onset_index : array_like, shape (N,)
        Detected onset of each mic in samples into ``signals`` (NaN: not heard).
    max_lag_s : float or array_like (P,)
        Half-width of each pair's search window.
    pairs : array_like (P, 2), optional
    band_hz : (float, float), optional
        Bins used (default 20 Hz .. 0.45 fs).
    gate_s, guard_s : float
        The gated part: from ``guard_s`` before the earliest onset to ``gate_s`` after the
        latest (or after the earliest plus ``spread_s``, whichever is shorter).
    t_s : float
        Time of the first sample (kept on the result).
    offsets_s : array_like (N,), optional
        Sub-sample clock corrections added to the delays (as in ``estimate_delays``).
    spread_s : float, optional
        Largest arrival spread across the array (bounds the gate).

    Returns
    -------
    DelaySet or None
        None when there is not enough background before the onset.
    """
    x = np.asarray(signals, dtype=float)
    n_mics, n = x.shape
    fs = float(sample_rate_hz)
    pairs = all_pairs(n_mics) if pairs is None else np.asarray(pairs, int).reshape(-1, 2)
    n_pairs = len(pairs)
    on = np.asarray(onset_index, dtype=float)
    if not np.any(np.isfinite(on)):
        return None
    first = float(np.nanmin(on))
    last = float(np.nanmax(on))
    if spread_s is not None:
        last = min(last, first + spread_s * fs)
    a = int(max(first - guard_s * fs, 0))
    b = int(min(last + gate_s * fs, n))
    length = b - a
    if a < MIN_BACKGROUND_S * fs or length < 64 or a < length:
        return None
    max_lag_s = np.broadcast_to(np.asarray(max_lag_s, float), (n_pairs,)).copy()
    max_lag_samp = np.minimum(np.ceil(max_lag_s * fs).astype(int) + 1, length - 1)
    nfft = sfft.next_fast_len(length + int(max_lag_samp.max()) + 1, real=True)
    freqs = sfft.rfftfreq(nfft, 1.0 / fs)
    omega = 2 * np.pi * freqs
    lo, hi = (20.0, 0.45 * fs) if band_hz is None else band_hz
    mask = (freqs >= lo) & (freqs <= hi)
    ii, jj = pairs[:, 0], pairs[:, 1]

    def spectra(seg):
        seg = seg - seg.mean(axis=-1, keepdims=True)
        return sfft.rfft(seg, nfft, axis=-1)

    post = spectra(x[:, a:b])  # (N, K)
    # background: Welch average of rectangular segments as long as the gate, half overlapping
    hop = max(length // 2, 1)
    starts = np.arange(0, a - length + 1, hop)
    bg_auto = np.zeros((n_mics, freqs.size))
    bg_cross = np.zeros((n_pairs, freqs.size), dtype=complex)
    for s in starts:
        sp = spectra(x[:, s:s + length])
        bg_auto += np.abs(sp) ** 2
        bg_cross += np.conj(sp[ii]) * sp[jj]
    bg_auto /= len(starts)
    bg_cross /= len(starts)

    p_post = np.abs(post) ** 2
    width = int(np.ceil(_SMOOTH_BINS * nfft / length))
    ratio = _smooth(p_post, width) / np.maximum(_smooth(bg_auto, width), 1e-300) - 1.0
    snr = np.where(ratio > _MIN_RATIO, ratio, 0.0)  # (N, K) bang-to-background power
    snr = np.where(mask[None, :], snr, 0.0)
    si, sj = snr[ii], snr[jj]
    gamma2 = si * sj / ((1.0 + si) * (1.0 + sj))
    w = gamma2 / np.maximum(1.0 - gamma2, 1e-6)  # (P, K)

    cross = np.conj(post[ii]) * post[jj] - bg_cross
    unit = cross / np.maximum(np.abs(cross), 1e-300)
    # coarse lag: weighted phasor correlation inside the search window
    r = sfft.irfft(w * unit, nfft, axis=-1)
    norm = np.maximum(np.sum(w, axis=1) * 2.0 / nfft, 1e-300)
    r = r / norm[:, None]
    big = int(max_lag_samp.max())
    lags = np.arange(-big, big + 1)
    seg = r[:, lags % nfft]
    inside = np.abs(lags)[None, :] <= max_lag_samp[:, None]
    masked = np.where(inside, seg, -np.inf)
    k = np.argmax(masked, axis=1)
    rows = np.arange(n_pairs)
    peak = seg[rows, k]
    lag0 = lags[k] / fs
    # quality: height over the floor, and the next separate peak
    band_c = float(np.sum(freqs * w.sum(0)) / max(w.sum(), 1e-300)) if w.sum() > 0 else fs / 4
    lobe = max(2.0, 0.75 * fs / max(band_c, 1.0))
    away = np.abs(lags[None, :] - lags[k][:, None]) > lobe
    floor = np.where(inside & away, seg, np.nan)
    floor[~np.any(inside & away, axis=1), 0] = 0.0
    with np.errstate(invalid="ignore"):
        med = np.nanmedian(floor, axis=1)
        mad = np.nanmedian(np.abs(floor - med[:, None]), axis=1) * 1.4826
    score = (peak - med) / np.maximum(mad, 1e-12)
    locmax = np.zeros_like(seg, dtype=bool)
    locmax[:, 1:-1] = (seg[:, 1:-1] > seg[:, :-2]) & (seg[:, 1:-1] >= seg[:, 2:])
    second = np.where(locmax & inside & away, seg, -np.inf).max(axis=1)
    second_ratio = np.clip(np.where(np.isfinite(second) & (peak > 0),
                                    second / np.maximum(peak, 1e-12), 0.0), 0.0, None)

    # fine delay: Newton on sum w cos(phi + omega (lag0 + d))
    phase = np.angle(cross * np.exp(1j * omega[None, :] * lag0[:, None]))
    delay = lag0 + newton_delays(w, phase, omega, 1.5 / fs, steps=8)

    cov = _covariance(pairs, n_mics, w, snr, omega, length, nfft) * _VARIANCE_MARGIN
    sd = np.sqrt(np.diag(cov))
    quality = tuple("ambiguous" if second_ratio[q] >= AMBIGUOUS_RATIO
                    else "weak" if (score[q] < WEAK_PEAK_SCORE or not np.isfinite(sd[q]))
                    else "good" for q in range(n_pairs))
    if offsets_s is not None:
        off = np.asarray(offsets_s, float)
        delay = delay + off[jj] - off[ii]
    used = np.any(w > 0, axis=0) & mask
    band = (float(freqs[used].min()), float(freqs[used].max())) if used.any() else (lo, hi)
    return DelaySet(pairs=pairs, delay_s=delay, sd_s=sd, covariance_s2=cov, peak=peak,
                    score=score, second_ratio=second_ratio, quality=quality,
                    t_s=float(t_s) + a / fs, duration_s=length / fs, band_hz=band,
                    sample_rate_hz=fs, max_lag_s=max_lag_s, curves=None,
                    warnings=[])


def _covariance(pairs, n_mics, w, snr, omega, length, nfft):
    """Linearised phase-error covariance of the fine delays (module notes, step 4)."""
    n_pairs = len(pairs)
    ii, jj = pairs[:, 0], pairs[:, 1]
    scale = nfft / length  # zero-padded bins per independent cell
    d_norm = np.sum(w * omega**2, axis=1)
    usable = d_norm > 0
    with np.errstate(divide="ignore"):
        a = np.where(snr > 0, 1.0 / np.maximum(snr, 1e-12), 0.0)  # noise-to-bang per mic, bin
    cov = np.zeros((n_pairs, n_pairs))
    for u in range(n_mics):
        sel = np.flatnonzero(((ii == u) | (jj == u)) & usable)
        if sel.size == 0:
            continue
        sign = np.where(ii[sel] == u, 1.0, -1.0)
        f = w[sel] * omega[None, :] * np.sqrt(a[u] / 2.0)[None, :]
        cov[np.ix_(sel, sel)] += np.outer(sign, sign) * (f @ f.T)
    cov[np.diag_indices(n_pairs)] += np.sum(w**2 * omega[None, :] ** 2 * a[ii] * a[jj] / 2.0,
                                            axis=1)
    cov *= scale
    dn = np.where(usable, d_norm, 1.0)
    cov /= np.outer(dn, dn)
    carter = scale / (2.0 * dn)  # Carter's bound alone: never below it
    model = np.diag(cov)
    ratio = np.where(usable & (model > 0),
                     np.sqrt(np.maximum(model, carter) / np.where(model > 0, model, 1.0)), 1.0)
    cov = cov * np.outer(ratio, ratio)
    bad = ~usable
    if bad.any():
        cov[bad, :] = 0.0
        cov[:, bad] = 0.0
        cov[bad, bad] = np.inf
    return cov
