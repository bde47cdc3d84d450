"""Time differences of arrival between microphones, with their uncertainty.

Method, per analysed span (all pairs at once, one forward FFT per channel):

1. **Coarse lag** - GCC-PHAT (Knapp & Carter 1976, IEEE Trans. ASSP 24(4) 320-327): the
   cross-spectrum of every pair is whitened to unit magnitude over the analysis band and
   transformed back; the highest peak inside the pair's geometric search window
   (``|delay| <= distance / c + margin``) is the coarse lag.  The peak height, its height over
   the correlation floor and the next-highest separate peak give the quality flag.
2. **Fine delay** - the delay that maximises the continuous maximum-likelihood-weighted
   cross-correlation  sum_k  W_k |G_k| cos(phi_k + omega_k tau)  (Newton steps on the exact
   cosine sum, so there is no interpolation bias), with the Hannan-Thomson weight
   W = gamma^2 / (|G| (1 - gamma^2)) from the magnitude-squared coherence gamma^2 (Carter 1987,
   Proc. IEEE 75(2) 236-255).  The coherence is estimated by smoothing the cross- and
   auto-spectra over frequency after the coarse lag is removed, and bias-corrected for its
   number of degrees of freedom.
3. **Uncertainty** - the variance of each pair's delay follows Carter's bound
   var = [2 T  integral (2 pi f)^2 gamma^2 / (1 - gamma^2) df]^-1, and the covariance between
   pairs that share a microphone follows from the same linearised phase-error model, with the
   per-microphone noise-to-signal ratio of every frequency recovered from the pairwise
   coherences (log|G_ij| = (log S_i + log S_j)/2, least squares over pairs).

Sign convention: ``delay_s`` of pair (i, j) is ``t_j - t_i``: positive when the sound reaches
mic j later than mic i.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
from scipy import fft as sfft

__all__ = [
    "DelaySet",
    "all_pairs",
    "geometric_max_lag_s",
    "gcc_phat",
    "estimate_delays",
    "multipath_bias_s",
    "multipath_biases_s",
    "WEAK_PEAK_SCORE",
    "AMBIGUOUS_RATIO",
    # shared with the windowed estimator (locate.signal.windowed) and the onset delays
    "band_mask",
    "coherent_band",
    "delay_covariance",
    "binned_weights",
    "newton_delays",
    "COHERENCE_DOF",
    "MIN_BAND_COHERENCE",
    "VARIANCE_MARGIN",
]

WEAK_PEAK_SCORE = 6.0
"""A GCC-PHAT peak less than this many floor standard deviations above the floor is 'weak'."""

AMBIGUOUS_RATIO = 0.7
"""A separate correlation peak at least this fraction of the highest makes a pair 'ambiguous'."""

COHERENCE_DOF = 32.0
"""Degrees of freedom of the frequency-smoothed coherence estimate."""
MIN_BAND_COHERENCE = 0.05
"""Bias-corrected coherence below which a bin carries no signal."""
VARIANCE_MARGIN = 1.1
"""Factor on the modelled delay variance.  Calibrated by Monte Carlo on the simulator: at high
coherence the linearised model misses a few per cent (weights estimated from the same data,
signal self-noise); over 0-20 dB SNR, bursts and bangs, the scatter/model sd ratio is then
0.91-1.05."""


@dataclass
class DelaySet:
    """Delays for every analysed microphone pair of one span.

    Attributes
    ----------
    pairs : ndarray, shape (P, 2)
        Mic indices (i, j), i < j.
    delay_s : ndarray, shape (P,)
        t_j - t_i, seconds.
    sd_s : ndarray, shape (P,)
        Standard deviation of each delay, seconds.
    covariance_s2 : ndarray, shape (P, P)
        Covariance of the delays (pairs sharing a mic are correlated).
    peak : ndarray, shape (P,)
        GCC-PHAT peak height (1 for a perfectly coherent pair).
    score : ndarray, shape (P,)
        Peak height above the correlation floor, in floor standard deviations.
    second_ratio : ndarray, shape (P,)
        Height of the next separate peak relative to the highest.
    quality : tuple of str
        'good', 'weak' or 'ambiguous' per pair.
    t_s, duration_s : float
        Start and length of the analysed span, seconds into the recording.
    band_hz : tuple of float
        Band that carried the signal (lo, hi), Hz.
    sample_rate_hz : float
    max_lag_s : ndarray, shape (P,)
        Half-width of each pair's search window.
    curves : list of dict or None
        Per pair ``{"lags_s", "correlation"}`` inside the search window (when asked for).
    warnings : list of str
    """

    pairs: np.ndarray
    delay_s: np.ndarray
    sd_s: np.ndarray
    covariance_s2: np.ndarray
    peak: np.ndarray
    score: np.ndarray
    second_ratio: np.ndarray
    quality: tuple
    t_s: float
    duration_s: float
    band_hz: tuple
    sample_rate_hz: float
    max_lag_s: np.ndarray
    curves: list | None = None
    warnings: list = field(default_factory=list)
    spectral_freqs_hz: np.ndarray | None = None
    spectral_weight: np.ndarray | None = None
    spectral_power: np.ndarray | None = None
    bias_covariance_s2: np.ndarray | None = None
    second_lag_s: np.ndarray | None = None

    def with_bias(self, bias_covariance_s2) -> DelaySet:
        """The same set with a (P, P) second moment of systematic delay errors (reflections)
        added to ``covariance_s2`` and ``sd_s``, and kept apart in ``bias_covariance_s2`` (the
        budget reports it as its own component)."""
        m = np.asarray(bias_covariance_s2, dtype=float)
        m = 0.5 * (m + m.T)
        base = self.covariance_s2 if self.bias_covariance_s2 is None else (
            self.covariance_s2 - self.bias_covariance_s2)
        cov = base + m
        return replace(self, covariance_s2=cov, sd_s=np.sqrt(np.diag(cov)),
                       bias_covariance_s2=m)

    @property
    def n_mics(self) -> int:
        return int(self.pairs.max()) + 1 if len(self.pairs) else 0

    def subset(self, keep) -> DelaySet:
        """The same set restricted to the pairs where ``keep`` (bool, shape (P,)) is true."""
        keep = np.asarray(keep, dtype=bool)
        idx = np.flatnonzero(keep)
        return DelaySet(
            pairs=self.pairs[idx], delay_s=self.delay_s[idx], sd_s=self.sd_s[idx],
            covariance_s2=self.covariance_s2[np.ix_(idx, idx)], peak=self.peak[idx],
            score=self.score[idx], second_ratio=self.second_ratio[idx],
            quality=tuple(self.quality[k] for k in idx), t_s=self.t_s,
            duration_s=self.duration_s, band_hz=self.band_hz,
            sample_rate_hz=self.sample_rate_hz, max_lag_s=self.max_lag_s[idx],
            curves=None if self.curves is None else [self.curves[k] for k in idx],
            warnings=list(self.warnings), spectral_freqs_hz=self.spectral_freqs_hz,
            spectral_weight=None if self.spectral_weight is None else self.spectral_weight[idx],
            spectral_power=self.spectral_power,
            bias_covariance_s2=None if self.bias_covariance_s2 is None
            else self.bias_covariance_s2[np.ix_(idx, idx)],
            second_lag_s=None if self.second_lag_s is None else self.second_lag_s[idx],
        )

    def to_dicts(self, mic_names) -> list[dict]:
        """Per-pair dictionaries for the result JSON (``"delays"`` entries)."""
        out = []
        for k, (i, j) in enumerate(self.pairs):
            out.append({
                "mics": [mic_names[i], mic_names[j]],
                "delay_s": float(self.delay_s[k]),
                "sd_s": float(self.sd_s[k]),
                "peak": float(self.peak[k]),
                "quality": self.quality[k],
                "search_s": [-float(self.max_lag_s[k]), float(self.max_lag_s[k])],
            })
        return out


def all_pairs(n_mics: int) -> np.ndarray:
    """All pairs (i, j) with i < j, shape (n(n-1)/2, 2), in row order."""
    i, j = np.triu_indices(int(n_mics), k=1)
    return np.stack([i, j], axis=1)


def geometric_max_lag_s(mic_positions_m, pairs, sound_speed_mps, *, wind_speed_mps=0.0,
                        margin_s=5e-4):
    """Largest physically possible |delay| of each pair: distance / (c - |w|) + margin.

    Parameters
    ----------
    mic_positions_m : array_like, shape (N, 3)
    pairs : array_like, shape (P, 2)
    sound_speed_mps : float
    wind_speed_mps : float
        Wind speed; sound can cover a baseline no faster than c + |w| and the bound is taken
        against c - |w| to stay conservative.
    margin_s : float or array_like (P,)
        Extra half-width for clock and temperature uncertainty.

    Returns
    -------
    ndarray, shape (P,)
    """
    pos = np.asarray(mic_positions_m, dtype=float)
    pairs = np.asarray(pairs, dtype=int)
    dist = np.linalg.norm(pos[pairs[:, 1]] - pos[pairs[:, 0]], axis=-1)
    c_slow = float(sound_speed_mps) - abs(float(wind_speed_mps))
    return dist / c_slow * 1.02 + np.asarray(margin_s, dtype=float)


def band_mask(freqs_hz, band_hz, sample_rate_hz):
    lo, hi = (20.0, 0.45 * sample_rate_hz) if band_hz is None else band_hz
    return (freqs_hz >= lo) & (freqs_hz <= hi)


def gcc_phat(x, y, sample_rate_hz, *, max_lag_s=None, band_hz=None):
    """GCC-PHAT cross-correlation of two signals (Knapp & Carter 1976).

    Parameters
    ----------
    x, y : array_like, shape (T,)
        The two signals (mic i, mic j).
    sample_rate_hz : float
    max_lag_s : float, optional
        Return only lags with |lag| <= max_lag_s.
    band_hz : (float, float), optional
        Frequency band over which the whitened cross-spectrum is kept.

    Returns
    -------
    lags_s : ndarray, shape (L,)
    correlation : ndarray, shape (L,)
        Normalised so that two identical, delayed signals give a peak of 1.

    Notes
    -----
    The peak lies at ``t_y - t_x``: positive when the sound reaches ``y`` later than ``x``
    (the same lag as the peak of ``scipy.signal.correlate(y, x)`` with
    ``scipy.signal.correlation_lags(len(y), len(x))``).
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    fs = float(sample_rate_hz)
    nfft = sfft.next_fast_len(x.size + y.size - 1, real=True)
    freqs = sfft.rfftfreq(nfft, 1.0 / fs)
    mask = band_mask(freqs, band_hz, fs)
    g = np.conj(sfft.rfft(x, nfft)) * sfft.rfft(y, nfft)
    g = np.where(mask, g / np.maximum(np.abs(g), 1e-300), 0.0)
    r = sfft.irfft(g, nfft) / max(sfft.irfft(mask.astype(float), nfft)[0], 1e-300)
    lags = np.arange(-(x.size - 1), y.size)
    if max_lag_s is not None:
        lim = int(np.floor(max_lag_s * fs))
        lags = lags[np.abs(lags) <= lim]
    return lags / fs, r[lags % nfft]


def coherent_band(freqs, coherence, mask):
    """Contiguous band holding the coherent signal: 0.5 %..99.5 % of the coherent weight.

    ``coherence`` is the (bias-corrected) median coherence over pairs, shape (K,).  Scattered
    noise bins carry a negligible share of the weight gamma^2 / (1 - gamma^2), so the band
    does not stretch to reach them.
    """
    wts = np.where(mask, coherence / (1.0 - coherence), 0.0)
    wts = np.where(coherence > 2 * MIN_BAND_COHERENCE, wts, 0.0)
    total = wts.sum()
    if total <= 0 or np.count_nonzero(wts) < 8:
        return None
    cum = np.cumsum(wts) / total
    lo = freqs[np.searchsorted(cum, 0.005)]
    hi = freqs[min(np.searchsorted(cum, 0.995), len(freqs) - 1)]
    # widen by 5 % each side so the band edges keep their (small) coherent contribution
    return mask & (freqs >= lo / 1.05) & (freqs <= hi * 1.05)


def newton_delays(weight, phase, omega, limit_s, steps=6):
    """Fine delays: Newton steps on the continuous weighted correlation.

    Maximises ``sum_k weight_k cos(phase_k + omega_k d)`` over ``|d| <= limit_s`` for every
    row, starting at d = 0, on the exact cosine sums (no interpolation bias); stops when every
    step is below 1 ps.  A row without curvature stays at 0.

    Parameters
    ----------
    weight, phase : ndarray, shape (R, K)
    omega : ndarray, shape (K,)
        Angular frequencies, rad/s.
    limit_s : float
    steps : int
        Most Newton steps.

    Returns
    -------
    ndarray, shape (R,)
    """
    weight = np.asarray(weight, dtype=float)
    d = np.zeros(weight.shape[0])
    cw1 = weight * omega
    cw2 = cw1 * omega
    for _ in range(int(steps)):
        arg = phase + omega[None, :] * d[:, None]
        g1 = np.sum(cw1 * np.sin(arg), axis=1)
        g2 = np.sum(cw2 * np.cos(arg), axis=1)
        step = np.where(g2 > 0, g1 / np.where(g2 > 0, g2, 1.0), 0.0)
        d = np.clip(d - step, -limit_s, limit_s)
        if np.all(np.abs(step) < 1e-12):
            break
    return d


def _smooth(a, width, axis=-1):
    """Moving average of ``width`` bins along ``axis`` (edges use the available bins)."""
    width = max(int(width), 1)
    if width == 1:
        return a
    a = np.moveaxis(a, axis, -1)
    pad = width // 2
    cs = np.cumsum(np.pad(a, [(0, 0)] * (a.ndim - 1) + [(pad + 1, pad)]), axis=-1)
    num = cs[..., width:] - cs[..., :-width]
    ones = np.cumsum(np.pad(np.ones(a.shape[-1]), (pad + 1, pad)))
    den = ones[width:] - ones[:-width]
    return np.moveaxis(num[..., : a.shape[-1]] / den[: a.shape[-1]], -1, axis)


def _coarse_peaks(r, max_lag_samp, fs, band_hz):
    """Integer + parabolic peak of each row of r (circular lags), with quality measures."""
    n_pairs, nfft = r.shape
    big = int(max_lag_samp.max())
    lags = np.arange(-big, big + 1)
    seg = r[:, lags % nfft]  # (P, 2L+1)
    inside = np.abs(lags)[None, :] <= max_lag_samp[:, None]
    masked = np.where(inside, seg, -np.inf)
    k = np.argmax(masked, axis=1)
    rows = np.arange(n_pairs)
    peak = seg[rows, k]
    km = np.clip(k - 1, 0, seg.shape[1] - 1)
    kp = np.clip(k + 1, 0, seg.shape[1] - 1)
    y0, y1, y2 = seg[rows, km], peak, seg[rows, kp]
    den = y0 - 2 * y1 + y2
    frac = np.where(den < 0, 0.5 * (y0 - y2) / np.where(den < 0, den, -1.0), 0.0)
    frac = np.clip(frac, -0.5, 0.5)
    lag0_s = (lags[k] + frac) / fs
    # main-lobe exclusion: 3/4 of a period of the band centre, at least 2 samples
    lo, hi = band_hz
    lobe = max(2.0, 0.75 * fs / max(0.5 * (lo + hi), 1.0))
    away = np.abs(lags[None, :] - lags[k][:, None]) > lobe
    floor_vals = np.where(inside & away, seg, np.nan)
    floor_vals[~np.any(inside & away, axis=1), 0] = 0.0  # no floor (tiny span): no NaN warning
    with np.errstate(invalid="ignore"):
        med = np.nanmedian(floor_vals, axis=1)
        mad = np.nanmedian(np.abs(floor_vals - med[:, None]), axis=1) * 1.4826
    n_floor = np.sum(inside & away, axis=1)
    score = np.where(n_floor > 8, (peak - med) / np.maximum(mad, 1e-12), np.inf)
    # next separate local maximum
    locmax = np.zeros_like(seg, dtype=bool)
    locmax[:, 1:-1] = (seg[:, 1:-1] > seg[:, :-2]) & (seg[:, 1:-1] >= seg[:, 2:])
    cand = np.where(locmax & inside & away, seg, -np.inf)
    second = cand.max(axis=1)
    second_lag_s = lags[np.argmax(cand, axis=1)] / fs
    second_ratio = np.where(np.isfinite(second) & (peak > 0), second / np.maximum(peak, 1e-12),
                            0.0)
    return (lag0_s, peak, score, np.clip(second_ratio, 0.0, None), seg, lags, inside,
            second_lag_s)


def estimate_delays(signals, sample_rate_hz, *, max_lag_s, band_hz=None, pairs=None,
                    offsets_s=None, t_s=0.0, keep_curves=False):
    """Delays, uncertainties and quality for microphone pairs of one span.

    Parameters
    ----------
    signals : array_like, shape (N, T)
        Time-aligned recordings of N mics, time on the last axis.
    sample_rate_hz : float
    max_lag_s : float or array_like, shape (P,)
        Half-width of each pair's lag search window (see :func:`geometric_max_lag_s`).
    band_hz : (float, float), optional
        Analysis band.  Default: found from the data - the bins where the pairs are coherent
        (signal above the noise), within 20 Hz .. 0.45 fs.
    pairs : array_like, shape (P, 2), optional
        Pairs to analyse (default: all pairs i < j).
    offsets_s : array_like, shape (N,), optional
        Sub-sample clock corrections: the true arrival time at mic i is its time in
        ``signals`` plus ``offsets_s[i]``; the returned delays include them.
    t_s : float
        Time of the first sample, seconds into the recording (kept on the result).
    keep_curves : bool
        Keep each pair's GCC-PHAT curve inside its search window (for diagnostics plots).

    Returns
    -------
    DelaySet

    Notes
    -----
    Positive delay: the sound reaches mic j later than mic i.
    """
    x = np.asarray(signals, dtype=float)
    if x.ndim != 2 or x.shape[0] < 2:
        raise ValueError(f"signals must have shape (n_mics >= 2, n_samples), got {x.shape!r}")
    n_mics, n_samp = x.shape
    fs = float(sample_rate_hz)
    pairs = all_pairs(n_mics) if pairs is None else np.asarray(pairs, dtype=int).reshape(-1, 2)
    n_pairs = len(pairs)
    max_lag_s = np.broadcast_to(np.asarray(max_lag_s, dtype=float), (n_pairs,)).copy()
    max_lag_samp = np.minimum(np.ceil(max_lag_s * fs).astype(int) + 1, n_samp - 1)
    x = x - x.mean(axis=1, keepdims=True)
    nfft = sfft.next_fast_len(n_samp + int(max_lag_samp.max()) + 1, real=True)
    freqs = sfft.rfftfreq(nfft, 1.0 / fs)
    omega = 2 * np.pi * freqs
    spec = sfft.rfft(x, nfft, axis=-1)  # (N, K), one forward transform per channel
    ii, jj = pairs[:, 0], pairs[:, 1]
    cross = np.conj(spec[ii]) * spec[jj]  # (P, K); phase -omega*delay
    mag = np.abs(cross)
    unit = cross / np.maximum(mag, 1e-300)

    def phat_peaks(mask):
        norm = max(sfft.irfft(mask.astype(float), nfft)[0], 1e-300)
        r = sfft.irfft(np.where(mask, unit, 0.0), nfft, axis=-1) / norm
        lo_hi = (float(freqs[mask].min()), float(freqs[mask].max())) if mask.any() else (0, fs / 2)
        return _coarse_peaks(r, max_lag_samp, fs, lo_hi), lo_hi

    mask = band_mask(freqs, band_hz, fs)
    if not mask.any():
        raise ValueError(f"band_hz {band_hz!r} holds no frequency bin at {fs:g} Hz")
    (lag0, peak, score, second, seg, lags, inside, second_lag), lo_hi = phat_peaks(mask)

    # Coherence after removing the coarse lag (frequency smoothing, Daniell estimator).
    width = int(np.ceil(COHERENCE_DOF * nfft / n_samp))
    dof = width * n_samp / nfft
    rot = cross * np.exp(1j * omega[None, :] * lag0[:, None])
    s_cross = _smooth(rot.real, width) + 1j * _smooth(rot.imag, width)
    s_auto = _smooth(np.abs(spec) ** 2, width)  # (N, K)
    denom = np.maximum(s_auto[ii] * s_auto[jj], 1e-300)
    coh = np.abs(s_cross) ** 2 / denom
    coh = np.clip((dof * coh - 1.0) / (dof - 1.0), 0.0, 0.9999)  # bias correction

    # Keep only bins whose coherence is significant: under no signal the raw estimate with n
    # degrees of freedom exceeds x with probability (1 - x)^(n - 1) (Carter 1987); the
    # bias-corrected threshold below corresponds to a 1e-3 false-alarm probability per cell.
    raw_threshold = 1.0 - 1e-3 ** (1.0 / (dof - 1.0))
    threshold = max((dof * raw_threshold - 1.0) / (dof - 1.0), MIN_BAND_COHERENCE)
    good = (score >= WEAK_PEAK_SCORE) & (second < AMBIGUOUS_RATIO)
    ref = np.median(coh[good] if good.any() else coh, axis=0)  # consensus coherence (K,)
    if band_hz is None:
        new_mask = coherent_band(freqs, ref, mask)
        if new_mask is not None and new_mask.sum() >= 8:
            mask = new_mask
            lo_hi = (float(freqs[mask].min()), float(freqs[mask].max()))

    # Second, weighted pass for the coarse lag and the quality flags: the smoothed-coherence
    # transform (G / sqrt(S_ii S_jj), Carter 1987) weighted by the consensus coherence, so that
    # bins without signal (outside the band, between the harmonics of a tonal sound) carry
    # no weight.  It does not depend on the first-pass lag, so a pair whose PHAT peak was
    # wrong is recovered here.
    v = np.where(mask & (ref > threshold), ref / (1.0 - np.clip(ref, 0, 0.9999)), 0.0)
    if np.count_nonzero(v) >= 4:
        scot = cross / np.sqrt(denom)
        r2 = sfft.irfft(v[None, :] * scot, nfft, axis=-1)
        norm2 = sfft.irfft(v[None, :] * np.abs(scot), nfft, axis=-1)[:, 0]
        r2 = r2 / np.maximum(norm2, 1e-300)[:, None]
        lag2, _, score, second, _, _, _, second_lag = _coarse_peaks(r2, max_lag_samp, fs,
                                                                    lo_hi)
        moved = np.abs(lag2 - lag0) > 0.5 / fs
        if moved.any():
            rot_m = cross[moved] * np.exp(1j * omega[None, :] * lag2[moved, None])
            sc = _smooth(rot_m.real, width) + 1j * _smooth(rot_m.imag, width)
            c_m = np.abs(sc) ** 2 / denom[moved]
            coh[moved] = np.clip((dof * c_m - 1.0) / (dof - 1.0), 0.0, 0.9999)
            rot[moved] = rot_m
            s_cross[moved] = sc
            lag0 = np.where(moved, lag2, lag0)  # the fine step below is relative to lag0
    else:
        score = np.zeros(n_pairs)

    coh = np.where(mask[None, :] & (coh > threshold), coh, 0.0)
    w = coh / (1.0 - coh)  # Hannan-Thomson weight on the normalised phasor
    # Fine delay: maximise sum c_k cos(phi_k + omega_k d) with c_k = w_k |G_k| / |G_smooth|,
    # over the bins that carry weight only.
    kb = np.flatnonzero(np.any(w > 0, axis=0))
    c = w[:, kb] * mag[:, kb] / np.maximum(np.abs(s_cross[:, kb]), 1e-300)
    delay = lag0 + newton_delays(c, np.angle(rot[:, kb]), omega[kb], 1.5 / fs)
    cov, nsr = delay_covariance(pairs, n_mics, w, coh, s_auto, s_cross, omega, n_samp, nfft,
                                 mask)
    # each mic's power without its noise (signal share 1 / (1 + noise-to-signal ratio)), so
    # that the notches of a reflection are not filled by the noise floor
    power = np.abs(spec[:, kb]) ** 2
    if nsr is not None and nsr.shape == power.shape:
        power = power / (1.0 + nsr)
    spec_f, spec_w, spec_p = binned_weights(freqs[kb], c, power)
    sd = np.sqrt(np.diag(cov))

    quality = []
    for k in range(n_pairs):
        if second[k] >= AMBIGUOUS_RATIO:
            quality.append("ambiguous")
        elif score[k] < WEAK_PEAK_SCORE or not np.isfinite(sd[k]):
            quality.append("weak")
        else:
            quality.append("good")
    if offsets_s is not None:
        off = np.asarray(offsets_s, dtype=float)
        delay = delay + off[jj] - off[ii]
        second_lag = second_lag + off[jj] - off[ii]

    curves = None
    if keep_curves:  # GCC-PHAT over the final band, for the diagnostics figure
        (_, _, _, _, seg, lags, inside, _), _ = phat_peaks(mask)
        curves = []
        step = max(1, int(np.ceil(seg.shape[1] / 1000)))
        near = int(np.ceil(1e-3 * fs))  # every sample within 1 ms of the delay
        for k in range(n_pairs):
            idx = np.flatnonzero(inside[k])
            close = np.abs(lags[idx] - delay[k] * fs) <= near
            sel = np.union1d(idx[::step], idx[close])
            curves.append({"lags_s": (lags[sel] / fs).tolist(),
                           "correlation": seg[k, sel].astype(float).round(4).tolist()})
    return DelaySet(
        pairs=pairs, delay_s=delay, sd_s=sd, covariance_s2=cov, peak=peak, score=score,
        second_ratio=second, quality=tuple(quality), t_s=float(t_s),
        duration_s=n_samp / fs, band_hz=lo_hi, sample_rate_hz=fs, max_lag_s=max_lag_s,
        curves=curves, spectral_freqs_hz=spec_f, spectral_weight=spec_w,
        spectral_power=spec_p, second_lag_s=second_lag,
    )


_SPECTRAL_BINS = 1024  # most frequency bins kept for the multipath-bias model
_COARSE_BINS = 128  # bins for the modelled correlation curve (resolves lags of +-4 ms)
_MAX_MULTIPATH_LAG_S = 4e-3  # second paths later than this give a separate peak (not a bias)


def binned_weights(freqs_hz, c, power):
    """The fine-delay weights c_k of every pair summed, and each mic's smoothed power averaged,
    into at most ``_SPECTRAL_BINS`` bins.

    Returns (bin centre frequencies (B,), weights (P, B), power (N, B)); the reflection model
    (:func:`multipath_bias_s`, :mod:`locate.accuracy.reflections`) needs only sums of c_k
    times smooth functions of frequency and the ripple of each mic's spectrum.
    """
    if freqs_hz.size == 0:
        return np.zeros(0), np.zeros((c.shape[0], 0)), np.zeros((power.shape[0], 0))
    n_bins = min(_SPECTRAL_BINS, freqs_hz.size)
    edges = np.linspace(freqs_hz[0], freqs_hz[-1] * (1 + 1e-12), n_bins + 1)
    which = np.clip(np.searchsorted(edges, freqs_hz, side="right") - 1, 0, n_bins - 1)
    fsum = np.bincount(which, weights=freqs_hz, minlength=n_bins)
    count = np.bincount(which, minlength=n_bins)
    w = np.stack([np.bincount(which, weights=row, minlength=n_bins) for row in c])
    pw = np.stack([np.bincount(which, weights=row, minlength=n_bins) for row in power])
    keep = count > 0
    return fsum[keep] / count[keep], w[:, keep], pw[:, keep] / count[keep]


def _unit_phasors(om, lag, g):
    """e^{i phi} with phi = arg(1 + g e^{-i omega lag}), (S, N, B); 1 where the sum is zero
    (numpy.angle(0) = 0)."""
    # the scenarios share their lags (the same height at several reflection coefficients)
    rows, which = np.unique(lag.reshape(-1, lag.shape[-1]), axis=0, return_inverse=True)
    turn = np.exp(-1j * om[None, None, :] * rows[..., None])[which.reshape(-1)]
    h = 1.0 + g[..., None] * turn.reshape(lag.shape + om.shape)
    mag = np.abs(h)
    return np.where(mag > 0, h / np.where(mag > 0, mag, 1.0), 1.0)


def _taylor_terms(x_max):
    """Terms of the series of e^{i x} needed for |x| <= x_max to 1e-17 of its largest term."""
    k, term = 0, 1.0
    while term > 1e-17 or k < 4:
        k += 1
        term *= x_max / k
    return k + 1


def multipath_bias_s(delays: DelaySet, lag_s, gain, *, coarse=True):
    """Delay bias of every pair from a second path at each mic (ground or wall reflection).

    A copy of the sound ``gain`` times as strong arriving ``lag_s`` after the direct sound at
    mic u multiplies its spectrum by 1 + g e^{-i omega lag}: a phase error
    phi_u = arg(1 + g e^{-i omega lag}) in every bin.  Linearising the fine-delay estimator
    (the maximum of sum_k c_k cos(phase_k + omega_k d)) about the true delay gives the bias of
    pair (i, j):  b = -sum_k c_k omega_k (phi_j - phi_i) / sum_k c_k omega_k^2  (the same
    first-order expansion as the noise model; the two-path phase is textbook, e.g. the image
    method of a reflecting plane).  A strong reflection makes the estimator non-linear: the
    modelled correlation can peak on a cross term (the direct sound at one mic with the
    reflection at the other, lag_j or -lag_i away) or on another fine-structure maximum.  So
    the bias is the estimator run on the model: the highest lag of the modelled correlation
    within the pair's search window, then Newton steps on the exact weighted cosine sum.

    Parameters
    ----------
    delays : DelaySet
        With ``spectral_weight`` (from :func:`estimate_delays`).
    lag_s, gain : array_like, shape (S, N)
        Extra travel time and relative amplitude of the second path at each mic, for S
        scenarios.

    coarse : bool
        Run the coarse peak choice on the modelled correlation (default).  False: the fine
        step only, from the true delay (the bias of the right peak; its difference from the
        default is the error of a peak jump).

    Returns
    -------
    ndarray, shape (S, P), seconds (zero when the set carries no spectral weights).
    """
    jumped, direct = multipath_biases_s(delays, lag_s, gain)
    return jumped if coarse else direct


def multipath_biases_s(delays: DelaySet, lag_s, gain):
    """Both biases of :func:`multipath_bias_s` from one model: ``(with the coarse peak choice,
    fine step only from the true delay)``, each (S, P) seconds.

    The two share the modelled phases, and where the coarse choice keeps the direct peak (most
    scenarios) they are the same Newton run.  The Newton steps use the Taylor moments
    M_k = sum_b c_b omega_b^k e^{i(dphi_b + omega_b d0)} about the start d0 (the steps stay
    within +-1.5 samples of it, so the series of e^{i omega delta} is summed to rounding with
    a few tens of terms): the same sums as the cosine sums of every bin, without
    trigonometry per bin and step.
    """
    lag = np.atleast_2d(np.asarray(lag_s, dtype=float))
    g = np.atleast_2d(np.asarray(gain, dtype=float))
    n_s, n_pairs = lag.shape[0], len(delays.pairs)
    if delays.spectral_weight is None or delays.spectral_weight.shape[1] == 0:
        zero = np.zeros((n_s, n_pairs))
        return zero, zero.copy()
    om = 2 * np.pi * np.asarray(delays.spectral_freqs_hz, dtype=float)
    c = np.asarray(delays.spectral_weight, dtype=float)  # (P, B)
    ii, jj = delays.pairs[:, 0], delays.pairs[:, 1]
    fs = float(delays.sample_rate_hz)
    # 1. The coarse peak: the estimator takes the highest correlation lag first.  Two paths at
    # both mics give peaks at the delay, at +lag_j and at -lag_i (cross terms); with a strong
    # reflection a cross term can be the highest, and the fine step then stays on it.  The
    # modelled correlation  sum_k c_k cos(dphi_k + omega_k tau)  on the sample grid, within
    # the pair's search window, gives the peak the estimator would take.
    n_lag = int(np.ceil(min(float(np.max(lag, initial=0.0)), _MAX_MULTIPATH_LAG_S) * fs)) + 2
    tau = np.arange(-n_lag, n_lag + 1) / fs
    step_b = max(1, int(np.ceil(om.size / _COARSE_BINS)))
    grp = np.arange(om.size) // step_b
    cnt = np.bincount(grp)
    om_c = np.bincount(grp, weights=om) / cnt
    c_c = np.stack([np.bincount(grp, weights=row) for row in c])  # (P, Bc)
    u_c = _unit_phasors(om_c, lag, g)
    z = (c_c[None] * (u_c[:, jj, :] * np.conj(u_c[:, ii, :]))).reshape(n_s * n_pairs, -1)
    ang = om_c[:, None] * tau[None, :]  # (Bc, T): Re(z e^{i omega tau}) as real products
    corr = (z.real @ np.cos(ang) - z.imag @ np.sin(ang)).reshape(n_s, n_pairs, -1)
    centre = np.asarray(delays.delay_s, float)
    reach = np.asarray(delays.max_lag_s, float)
    inside = np.abs(np.where(np.isfinite(centre), centre, 0.0)[:, None] + tau[None, :]) <= (
        reach[:, None] + 0.5 / fs)
    inside[:, n_lag] = True  # the direct peak is always inside
    corr = np.where(inside[None], corr, -np.inf)
    d0 = tau[np.argmax(corr, axis=2)]  # (S, P)
    # 2. The fine step: Newton on the exact weighted cosine sum from that lag, kept within
    # +-1.5 samples of it (the same iteration estimate_delays runs on the measured phases).
    # To first order about the delay this is b = -sum c omega dphi / sum c omega^2.
    u = _unit_phasors(om, lag, g)
    cu = np.conj(u)
    om_max = float(np.max(om))
    lim = 1.5 / fs  # the steps stay within +-1.5 samples of their start
    n_k = _taylor_terms(om_max * lim) + 2
    powers = ((om / om_max)[:, None] ** np.arange(n_k + 1)[None, :]).astype(complex)
    moments = np.empty((n_s, n_pairs, n_k + 1), complex)
    for a in range(0, n_s, 8):  # a few scenarios at a time: the temporaries stay small
        cv = c[None] * (u[a:a + 8][:, jj] * cu[a:a + 8][:, ii])  # c e^{i dphi}
        moments[a:a + 8] = cv @ powers
    direct = _newton_moments(moments.reshape(n_s * n_pairs, -1), om_max, lim)
    direct = direct.reshape(n_s, n_pairs)
    jumped = direct.copy()
    s_m, p_m = np.nonzero(d0 != 0.0)
    if s_m.size:
        start = d0[s_m, p_m]
        cv = c[p_m] * (u[s_m, jj[p_m]] * cu[s_m, ii[p_m]]) * np.exp(
            1j * om[None, :] * start[:, None])
        jumped[s_m, p_m] = start + _newton_moments(cv @ powers, om_max, lim)
    return jumped, direct


def _newton_moments(moments, om_max, lim):
    """Newton steps on the weighted cosine sum f(delta) = sum_b Re(cv_b e^{i omega_b delta})
    from delta = 0, kept within +-lim, given its Taylor moments M_k = sum_b cv_b
    (omega_b / om_max)^k (R, K+1); returns the maxima delta (R,) s.

    f' = -sum cv omega sin, f'' = -sum cv omega^2 cos; e^{i omega delta} as its series in
    x = om_max delta (|x| <= om_max lim, summed to rounding by K terms)."""
    n_k = moments.shape[1] - 1
    k = np.arange(n_k - 1)
    fact = np.cumprod(np.concatenate([[1.0], np.arange(1, n_k - 1)]))
    d = np.zeros(moments.shape[0])
    for _ in range(8):
        series = (1j * om_max * d[:, None]) ** k[None, :] / fact[None, :]
        g1 = om_max * np.sum(series * moments[:, 1:n_k], axis=1).imag  # sum c omega sin
        g2 = om_max**2 * np.sum(series * moments[:, 2:n_k + 1], axis=1).real  # c omega^2 cos
        step = np.where(g2 > 0, g1 / np.where(g2 > 0, g2, 1.0), 0.0)
        d = np.clip(d - step, -lim, lim)
        if np.all(np.abs(step) < 1e-12):
            break
    return d


def delay_covariance(pairs, n_mics, w, coh, s_auto, s_cross, omega, n_samp, nfft, mask):
    """Covariance of the fine delays from the linearised phase-error model, and the per-mic
    noise-to-signal ratio of every weighted bin (N, K_w) it was built on.

    The phase error of pair (i, j) in bin k is e_i - e_j + n_ij with var(e_u) = a_u / 2 and
    var(n_ij) = a_i a_j / 2 per independent bin, a_u the noise-to-signal ratio of mic u.
    Bins are correlated over nfft / n_samp neighbours by the zero padding, which scales the
    sums (independent cells are 1/T Hz wide).
    """
    n_pairs = len(pairs)
    ii, jj = pairs[:, 0], pairs[:, 1]
    scale = nfft / n_samp
    d_norm = np.sum(w * omega**2, axis=1)  # (P,)
    cov = np.zeros((n_pairs, n_pairs))
    usable = d_norm > 0
    if not usable.any():
        return np.diag(np.full(n_pairs, np.inf)), None
    # Per-mic signal spectrum from pairwise coherent cross-power (least squares in log domain).
    bins = np.flatnonzero(mask & np.any(w > 0, axis=0))
    log_cross = np.log(np.maximum(np.abs(s_cross[:, bins]), 1e-300))
    design = np.zeros((n_pairs, n_mics))
    design[np.arange(n_pairs), ii] = 0.5
    design[np.arange(n_pairs), jj] = 0.5
    ok = usable & (np.sum(coh[:, bins] > 0, axis=1) > 0)
    involved = np.unique(pairs[ok])
    if len(involved) >= 3 and np.linalg.matrix_rank(design[ok][:, involved]) == len(involved):
        sol = np.linalg.pinv(design[ok][:, involved]) @ log_cross[ok]
        log_sig = np.full((n_mics, len(bins)), np.nan)
        log_sig[involved] = sol
    else:  # two mics (or a pair graph too thin): share the noise equally
        log_sig = np.full((n_mics, len(bins)), np.nan)
        for k in np.flatnonzero(ok):
            log_sig[ii[k]] = log_cross[k]
            log_sig[jj[k]] = log_cross[k]
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        a = s_auto[:, bins] / np.exp(log_sig) - 1.0
    # Floor the per-mic ratio at the value that reproduces each pair's own coherence if all
    # noise were in one channel; keeps the model consistent with the measured coherence.
    a = np.where(np.isfinite(a), np.clip(a, 1e-6, 1e6), 1e6)
    wb = w[:, bins]
    om = omega[bins]
    for u in range(n_mics):
        sel = np.flatnonzero(((ii == u) | (jj == u)) & usable)
        if sel.size == 0:
            continue
        sign = np.where(ii[sel] == u, 1.0, -1.0)
        f = wb[sel] * om[None, :] * np.sqrt(a[u] / 2.0)[None, :]
        cov[np.ix_(sel, sel)] += np.outer(sign, sign) * (f @ f.T)
    cross_term = np.sum(wb**2 * om[None, :] ** 2 * (a[ii] * a[jj] / 2.0), axis=1)
    cov[np.diag_indices(n_pairs)] += cross_term
    cov *= scale
    dn = np.where(usable, d_norm, 1.0)
    cov /= np.outer(dn, dn)
    # Carter's bound for each pair on its own (exact for the HT weight): use the larger of the
    # model and the bound on the diagonal so that a poorly resolved noise split never shrinks it.
    carter = scale / (2.0 * np.where(usable, d_norm, 1.0))
    model = np.diag(cov)
    ratio = np.where(usable & (model > 0), np.sqrt(np.maximum(model, carter)
                                                   / np.where(model > 0, model, 1.0)), 1.0)
    cov = cov * np.outer(ratio, ratio)
    cov *= VARIANCE_MARGIN
    bad = ~usable
    if bad.any():
        cov[bad, :] = 0.0
        cov[:, bad] = 0.0
        cov[bad, bad] = np.inf
    return cov, a
