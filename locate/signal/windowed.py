"""Delays of many sliding windows at once, with the method of
:func:`locate.signal.delays.estimate_delays`.

Same estimator, window by window (GCC-PHAT coarse lag, smoothed-coherence weighted second pass,
maximum-likelihood fine delay, analytic delay covariance: see :mod:`locate.signal.delays`),
organised
for throughput:

* **One forward FFT per channel per hop.**  When the window is a whole number m of hops (50 %
  overlap: m = 2) the zero-padded spectrum of a window is the sum of the spectra of its m hop
  segments, each shifted by its offset (linearity of the DFT, exact):
  X_w = sum_q exp(-i omega q H) F_{w+q} - mean_w B, with B the spectrum of a box of ones
  (the window mean is removed as in ``estimate_delays``).  Every segment is transformed once
  and shared by the m windows that hold it and by all pairs.
* **Only the analysis band is kept.**  Everything after the forward transform works on the band
  bins (plus the smoothing margin), and the two inverse transforms per pair (PHAT pass and
  coherence-weighted pass) are done at a decimated size M ~ 2.5 x the band's top bin instead
  of the padded window length: the correlation is sampled at ~1.25 x its Nyquist rate, the
  coarse peak is refined by a parabola through the three highest samples (vertex height and
  position) and the fine delay does not use the grid at all.
* **Fine delay without trigonometry per iteration.**  The Newton steps on
  sum_k c_k cos(phi_k + omega_k d) use the Taylor moments nu_n = sum_k c_k e^{i phi_k} x_k^n
  (x_k = omega_k / omega_max), one matrix product per chunk; the series is cut where the
  remainder is below 1e-17 for the largest step allowed.
* Vectorised over chunks of windows; ``scipy.fft`` with ``workers``.

With a band spanning most of the spectrum (``band_hz=None``) there is nothing to decimate and
the correlation grid is the sample grid, as in ``estimate_delays``.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
from scipy import fft as sfft

from locate.signal.delays import (
    COHERENCE_DOF,
    MIN_BAND_COHERENCE,
    DelaySet,
    all_pairs,
    band_mask,
)
from locate.signal.window_core import chunk_delays

__all__ = ["WindowDelays", "estimate_delays_windows", "recording_window_delays", "window_starts"]


@dataclass
class WindowDelays:
    """Delays of every pair in every window.

    Attributes
    ----------
    pairs : ndarray, shape (P, 2)
    t_s : ndarray, shape (W,)
        Start of each window, seconds into the recording.
    duration_s : float
        Window length.
    delay_s, sd_s, peak, score, second_ratio : ndarray, shape (W, P)
        As in :class:`locate.signal.delays.DelaySet`, per window.
    covariance_s2 : ndarray, shape (W, P, P)
    quality : ndarray of str, shape (W, P)
        'good', 'weak' or 'ambiguous'.
    band_hz : ndarray, shape (W, 2)
    sample_rate_hz : float
    max_lag_s : ndarray, shape (P,)
    second_lag_s : ndarray, shape (W, P)
        Lag of the next separate correlation peak (the ground-echo check).
    spectral : list of tuple
        Per window (freqs (B,), weights (P, B), power (N, B)): the binned fine-delay weights
        and mic powers the reflection model uses (``DelaySet.spectral_*``).
    """

    pairs: np.ndarray
    t_s: np.ndarray
    duration_s: float
    delay_s: np.ndarray
    sd_s: np.ndarray
    covariance_s2: np.ndarray
    peak: np.ndarray
    score: np.ndarray
    second_ratio: np.ndarray
    quality: np.ndarray
    band_hz: np.ndarray
    sample_rate_hz: float
    max_lag_s: np.ndarray
    second_lag_s: np.ndarray | None = None
    spectral: list | None = None

    def __len__(self) -> int:
        return len(self.t_s)

    def window(self, w: int) -> DelaySet:
        """Window ``w`` as a :class:`locate.signal.delays.DelaySet`."""
        return DelaySet(
            pairs=self.pairs, delay_s=self.delay_s[w], sd_s=self.sd_s[w],
            covariance_s2=self.covariance_s2[w], peak=self.peak[w], score=self.score[w],
            second_ratio=self.second_ratio[w], quality=tuple(self.quality[w]),
            t_s=float(self.t_s[w]), duration_s=self.duration_s,
            band_hz=tuple(float(v) for v in self.band_hz[w]),
            sample_rate_hz=self.sample_rate_hz, max_lag_s=self.max_lag_s,
            second_lag_s=None if self.second_lag_s is None else self.second_lag_s[w],
            **({} if self.spectral is None else dict(zip(
                ("spectral_freqs_hz", "spectral_weight", "spectral_power"),
                self.spectral[w], strict=True))))

    @classmethod
    def concatenate(cls, parts) -> WindowDelays:
        """Join the windows of several results (same pairs and window length)."""
        parts = list(parts)
        cat = {k: np.concatenate([getattr(p, k) for p in parts]) for k in
               ("t_s", "delay_s", "sd_s", "covariance_s2", "peak", "score", "second_ratio",
                "quality", "band_hz", "second_lag_s")}
        cat["spectral"] = [s for p in parts for s in p.spectral]
        p0 = parts[0]
        return cls(pairs=p0.pairs, duration_s=p0.duration_s, sample_rate_hz=p0.sample_rate_hz,
                   max_lag_s=p0.max_lag_s, **cat)


def window_starts(n_samples, window_n, hop_n) -> np.ndarray:
    """First sample of every whole window in ``n_samples``, shape (W,)."""
    if window_n < 2 or hop_n < 1:
        raise ValueError(f"window ({window_n}) must be >= 2 samples and hop ({hop_n}) >= 1")
    if n_samples < window_n:
        return np.zeros(0, dtype=int)
    return np.arange((n_samples - window_n) // hop_n + 1) * hop_n


class _Setup:
    """Sizes, bins and grids shared by every window of one call."""

    def __init__(self, fs, n, hop, n_mics, pairs, max_lag_s, band_hz, oversample, step=None,
                 single=None, search_hz=None):
        self.fs, self.n, self.hop = fs, n, hop
        self.pairs = pairs
        self.ii, self.jj = pairs[:, 0], pairs[:, 1]
        self.n_mics = n_mics
        self.max_lag_s = max_lag_s
        self.max_lag_samp = np.minimum(np.ceil(max_lag_s * fs).astype(int) + 1, n - 1)
        self.nfft = sfft.next_fast_len(n + int(self.max_lag_samp.max()) + 1, real=True)
        freqs = sfft.rfftfreq(self.nfft, 1.0 / fs)
        full = band_mask(freqs, None, fs)
        # the first (PHAT) pass's band for the main-lobe exclusion, as estimate_delays
        self.first_band = np.array([freqs[full].min(), freqs[full].max()])
        mask = band_mask(freqs, band_hz if band_hz is not None else search_hz, fs)
        if not mask.any():
            raise ValueError(f"band_hz {band_hz!r} holds no frequency bin at {fs:g} Hz")
        self.auto_band = band_hz is None
        if self.auto_band:  # the band found bin for bin, as estimate_delays
            step = 1
        self.width = int(np.ceil(COHERENCE_DOF * self.nfft / n))
        self.dof = self.width * n / self.nfft
        raw = 1.0 - 1e-3 ** (1.0 / (self.dof - 1.0))  # as in estimate_delays (Carter 1987)
        self.threshold = max((self.dof * raw - 1.0) / (self.dof - 1.0), MIN_BAND_COHERENCE)
        k = np.flatnonzero(mask)
        kmin, kmax = int(k[0]), int(k[-1])
        margin = self.width // 2 + 2
        self.s0 = max(kmin - margin, 0)
        self.s1 = min(kmax + margin + 1, len(freqs))
        self.n_bins = len(freqs)
        self.freqs = freqs[self.s0:self.s1]
        self.omega = 2 * np.pi * self.freqs
        self.mask = mask[self.s0:self.s1]
        # decimated inverse size: the correlation sampled at ~oversample x its Nyquist rate
        m = sfft.next_fast_len(int(np.ceil(2.0 * oversample * (kmax + 1))), real=True)
        m += m % 2
        self.m = self.nfft if m >= self.nfft else m
        self.decimated = self.m < self.nfft
        self.step_s = self.nfft / (self.m * fs)  # lag grid spacing
        big = int(self.max_lag_samp.max())
        nlag = int(np.ceil(big * self.m / self.nfft)) if self.decimated else big
        self.lags = np.arange(-nlag, nlag + 1)
        lag_samp = self.lags * (self.nfft / self.m)
        self.inside = np.abs(lag_samp)[None, :] <= self.max_lag_samp[:, None] + 1e-9
        self.k_inv = min(self.s1, self.m // 2 + 1)  # slice bins that enter the inverse
        # grid of smoothed quantities: every q-th bin (q = 1 on the full-band path)
        q = (max(self.width // 8, 1) if self.decimated else 1) if step is None else int(step)
        ks = self.s1 - self.s0
        grid = np.arange(0, ks, q)
        if grid[-1] != ks - 1:
            grid = np.append(grid, ks - 1)
        self.q, self.grid = q, grid
        # single precision after the forward FFT on the decimated path when the band bins have
        # smoothing margins on both sides (spectra normalised per window)
        self.single = bool(self.decimated and self.s0 > 0 and self.s1 < len(freqs)
                           and (single is None or single))
        pad = self.width // 2
        b = np.arange(ks)
        self.box_lo = np.maximum(b - pad, 0)
        self.box_hi = np.minimum(b + self.width - pad, ks)  # exclusive
        self.box_n = self.box_hi - self.box_lo
        full = np.flatnonzero(self.box_n == self.width)
        self.box_full = (int(full[0]), int(full[-1]) + 1) if full.size else (0, 0)
        self.ij = np.clip(np.searchsorted(grid, b, side="right") - 1, 0, max(len(grid) - 2, 0))
        if len(grid) > 1:
            self.frac = (b - grid[self.ij]) / (grid[self.ij + 1] - grid[self.ij])
        self.freqs_q, self.omega_q, self.mask_q = self.freqs[grid], self.omega[grid], \
            self.mask[grid]
        design = np.zeros((len(pairs), n_mics))
        design[np.arange(len(pairs)), self.ii] = 0.5
        design[np.arange(len(pairs)), self.jj] = 0.5
        self.full_design = (n_mics >= 3 and len(np.unique(pairs)) == n_mics
                            and np.linalg.matrix_rank(design) == n_mics)
        self.design_pinv = np.linalg.pinv(design)


def _spectra(x, g: _Setup, starts, workers):
    """Band spectra (C, N, Ks) of the mean-removed, zero-padded windows at ``starts``."""
    n, hop = g.n, g.hop
    n_mics = x.shape[0]
    sl = slice(g.s0, g.s1)
    if n % hop == 0 and len(starts) > 1 and np.all(np.diff(starts) == hop):
        m = n // hop
        first = int(starts[0])
        n_seg = len(starts) + m - 1
        seg = x[:, first:first + n_seg * hop].reshape(n_mics, n_seg, hop)
        # single precision where the spectra are used in single precision anyway
        f = sfft.rfft(seg.astype(np.float32) if g.single else seg, g.nfft, axis=-1,
                      workers=workers)[..., sl]  # (N, S, Ks)
        f = np.moveaxis(f, 1, 0)  # (S, N, Ks)
        sums = seg.sum(axis=-1).T  # (S, N)
        out = f[: len(starts)].copy()
        wsum = sums[: len(starts)].copy()
        for q in range(1, m):  # shift segment q of each window to its offset q * hop
            shift = np.exp(-1j * g.omega * (q * hop / g.fs)).astype(f.dtype)
            out += shift * f[q:q + len(starts)]
            wsum += sums[q:q + len(starts)]
        box = sfft.rfft(np.ones(n), g.nfft)[sl]
        return out - (wsum / n)[:, :, None] * box
    win = np.stack([x[:, s:s + n] for s in starts])  # (C, N, n)
    win = win - win.mean(axis=-1, keepdims=True)
    return sfft.rfft(win, g.nfft, axis=-1, workers=workers)[..., sl]


def estimate_delays_windows(signals, sample_rate_hz, window_s, hop_s, *, max_lag_s,
                            band_hz=None, pairs=None, offsets_s=None, t0_s=0.0, workers=None,
                            chunk=8, oversample=1.25, coherence_step=None,
                            search_band_hz=None) -> WindowDelays:
    """Delays, uncertainties and quality of every pair in sliding windows.

    Parameters
    ----------
    signals : array_like, shape (N, T)
        Time-aligned recordings, time on the last axis.
    sample_rate_hz : float
    window_s, hop_s : float
        Window length and the step between window starts (rounded to whole samples).
    max_lag_s : float or array_like, shape (P,)
        Half-width of each pair's lag search (:func:`locate.signal.delays.geometric_max_lag_s`).
    band_hz : (float, float), optional
        Analysis band; default: found from the data in each window (no decimation then).
    pairs : array_like, shape (P, 2), optional
        Default: all pairs i < j.
    offsets_s : array_like, shape (N,), optional
        Sub-sample clock corrections added to the delays, as in ``estimate_delays``.
    t0_s : float
        Time of sample 0, seconds into the recording.
    workers : int, optional
        Threads (default: all cores): chunks of windows run in parallel threads, each with
        single-threaded transforms; 1 runs everything in the calling thread.
    chunk : int
        Windows processed together (memory ~ chunk x P x band bins x 16 bytes x 12).
    oversample : float
        Sampling of the decimated correlation relative to its Nyquist rate (>= 1.2).
    search_band_hz : (float, float), optional
        Without ``band_hz``: where the band is searched for (default 20 Hz .. 0.45 fs, as
        ``estimate_delays``).  A sound known to stay below some frequency (a first pass over
        the span) lets the inverse transforms run at a decimated size.
    coherence_step : int, optional
        Evaluate the smoothed coherence, the weights and the covariance integrands on every
        this-many bins (default: an eighth of the smoothing width when the band is given,
        1 - bin for bin - when it is found from the data).

    Returns
    -------
    WindowDelays
        Window w starts at ``t0_s + w * hop``; only whole windows are analysed.

    Notes
    -----
    Positive delay: the sound reaches mic j later than mic i.  Window by window the delays,
    their covariance and the quality flags follow :func:`locate.signal.delays.estimate_delays`; the
    coarse peak and its quality measures are taken on the decimated lag grid.
    """
    x = np.asarray(signals, dtype=float)
    if x.ndim != 2 or x.shape[0] < 2:
        raise ValueError(f"signals must have shape (n_mics >= 2, n_samples), got {x.shape!r}")
    if oversample < 1.2:
        raise ValueError(f"oversample must be >= 1.2, got {oversample!r}")
    fs = float(sample_rate_hz)
    n = int(round(window_s * fs))
    hop = int(round(hop_s * fs))
    starts = window_starts(x.shape[1], n, hop)
    pairs = all_pairs(x.shape[0]) if pairs is None else np.asarray(pairs, int).reshape(-1, 2)
    max_lag_s = np.broadcast_to(np.asarray(max_lag_s, float), (len(pairs),)).copy()
    g = _Setup(fs, n, hop, x.shape[0], pairs, max_lag_s, band_hz, oversample, coherence_step,
               search_hz=search_band_hz)
    workers = workers if workers is not None else -1
    chunk = max(int(chunk), 1)
    groups = [starts[k:k + chunk] for k in range(0, len(starts), chunk)]
    threads = (os.cpu_count() or 1) if workers == -1 else max(int(workers), 1)
    if threads > 1 and len(groups) > 1:  # numpy and scipy.fft release the GIL on big arrays
        with ThreadPoolExecutor(max_workers=threads) as pool:
            parts = list(pool.map(lambda st: chunk_delays(_spectra(x, g, st, 1), g, 1),
                                  groups))
    else:
        parts = [chunk_delays(_spectra(x, g, st, workers), g, workers) for st in groups]
    keys = ("delay_s", "sd_s", "covariance_s2", "peak", "score", "second_ratio", "quality",
            "band_hz", "second_lag_s")
    n_p = len(pairs)
    empty = {"delay_s": (0, n_p), "sd_s": (0, n_p), "covariance_s2": (0, n_p, n_p),
             "peak": (0, n_p), "score": (0, n_p), "second_ratio": (0, n_p),
             "quality": (0, n_p), "band_hz": (0, 2), "second_lag_s": (0, n_p)}
    out = {k: (np.concatenate([p[k] for p in parts]) if parts else
               np.zeros(empty[k], dtype="<U9" if k == "quality" else float)) for k in keys}
    if offsets_s is not None:
        off = np.asarray(offsets_s, dtype=float)
        out["delay_s"] = out["delay_s"] + (off[pairs[:, 1]] - off[pairs[:, 0]])
        out["second_lag_s"] = out["second_lag_s"] + (off[pairs[:, 1]] - off[pairs[:, 0]])
    out["spectral"] = [s for p in parts for s in p["spectral"]]
    return WindowDelays(pairs=pairs, t_s=float(t0_s) + starts / fs, duration_s=n / fs,
                        sample_rate_hz=fs, max_lag_s=max_lag_s, **out)


def recording_window_delays(recordings, window_s, hop_s, *, max_lag_s, band_hz=None,
                            pairs=None, start_s=None, stop_s=None, block_windows=240,
                            workers=None):
    """Yield :class:`WindowDelays` over a span of recordings, one block of windows at a time.

    Blocks of ``block_windows`` windows are read with ``window_s - hop_s`` of overlap
    (:meth:`locate.io.audio.Recordings.blocks`), so the windows run on without a gap across
    blocks and memory is one block whatever the span.  The sub-sample alignment offsets of
    each block are added to its delays.

    Parameters
    ----------
    recordings : locate.io.audio.Recordings
    window_s, hop_s : float
    max_lag_s, band_hz, pairs, workers
        As :func:`estimate_delays_windows`.
    start_s, stop_s : float, optional
        Default: the span all mics cover.
    block_windows : int

    Yields
    ------
    WindowDelays
    """
    fs = recordings.sample_rate_hz
    n, hop = int(round(window_s * fs)), int(round(hop_s * fs))
    bw = max(int(block_windows), 1)
    block_s = ((bw - 1) * hop + n) / fs
    for t0, signals, residual in recordings.blocks(block_s, (n - hop) / fs, start_s, stop_s,
                                                   reuse=True):
        if signals.shape[1] < n:
            break
        yield estimate_delays_windows(signals, fs, n / fs, hop / fs, max_lag_s=max_lag_s,
                                      band_hz=band_hz, pairs=pairs, offsets_s=residual,
                                      t0_s=t0, workers=workers)
