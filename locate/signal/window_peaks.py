"""Coarse correlation peaks of many windows and pairs at once, with their quality measures.

The batched counterpart of the coarse-peak step of :mod:`locate.signal.delays` (highest sample
inside
each pair's search window, parabolic refinement, floor median and MAD away from the main lobe,
next separate local maximum), on a lag grid that may be coarser than the sample grid (see
:mod:`locate.signal.windowed`).  On a coarse grid the heights are the vertices of the parabola
through the three samples around each maximum, so that they stay close to the continuous peak.
"""

from __future__ import annotations

import numpy as np

__all__ = ["coarse_peaks", "masked_median"]


def masked_median(values, keep, exact=True):
    """Median of ``values`` along the last axis over the entries where ``keep`` is true.

    Exact (the mean of the two middle values for an even count) unless ``exact`` is false:
    then one of the two middle values when the counts' parity differs.  NaN where nothing is
    kept.
    One ``np.partition`` at fixed ranks for every row: half of the excluded entries are set to
    -inf and the rest to +inf, which moves the kept entries' middle to a known rank.

    Parameters
    ----------
    values : ndarray, shape (..., L)
    keep : ndarray of bool, shape (..., L)

    Returns
    -------
    ndarray, shape (...)
    """
    length = values.shape[-1]
    n = keep.sum(axis=-1)
    excl = ~keep
    e = (length - n) // 2
    neg = excl & (np.cumsum(excl, axis=-1) <= e[..., None])
    filled = np.where(keep, values, np.where(neg, -np.inf, np.inf))
    ranks = ((length // 2 - 1, (length - 1) // 2 - 1, (length - 1) // 2, length // 2)
             if exact else ((length - 1) // 2, length // 2))
    kth = sorted({min(max(k, 0), length - 1) for k in ranks})
    part = np.partition(filled, kth, axis=-1)
    if exact:
        lo = np.clip(e + (n - 1) // 2, 0, length - 1)
        hi = np.clip(e + n // 2, 0, length - 1)
    else:  # the middle rank(s) of the row: off by half a rank when length - n is odd
        lo = np.full(n.shape, (length - 1) // 2)
        hi = np.full(n.shape, length // 2)
    a = np.take_along_axis(part, lo[..., None], axis=-1)[..., 0]
    b = np.take_along_axis(part, hi[..., None], axis=-1)[..., 0]
    with np.errstate(invalid="ignore"):
        return np.where(n > 0, 0.5 * (a + b), np.nan)


def _split_median(values, keep, below):
    """Median along the last axis of the kept values, excluded ones set to -inf where
    ``below`` and +inf elsewhere (one partition at the middle rank)."""
    length = values.shape[-1]
    filled = np.where(keep, values, np.where(below, -np.inf, np.inf))
    part = np.partition(filled, length // 2, axis=-1)
    out = part[..., length // 2]
    return np.where(keep.any(axis=-1), out, np.nan)


def coarse_peaks(r, setup, bands_hz, stride=3):
    """Coarse lag, peak height, score and second-peak ratio of every correlation curve.

    Parameters
    ----------
    r : ndarray, shape (C, P, L)
        Normalised correlation on the lag grid ``setup.lags`` (grid step ``setup.step_s``).
    setup : locate.signal.windowed._Setup
        Grid, search windows (``inside`` (P, L)) and whether the grid is decimated.
    bands_hz : ndarray, shape (C, 2)
        Band of each window (sets the main-lobe exclusion: 3/4 of a period of the band
        centre, at least two grid steps).
    stride : int
        On a decimated grid, the floor median and MAD use every ``stride``-th lag.

    Returns
    -------
    lag_s, peak, score, second_ratio, second_lag_s : ndarray, shape (C, P)
        ``second_lag_s``: the lag of the next separate maximum (as ``estimate_delays``).
    """
    g = setup
    lags = g.lags
    inside = g.inside[None]
    masked = np.where(inside, r, -np.inf)
    k = np.argmax(masked, axis=-1)[..., None]
    n_l = r.shape[-1]
    y0 = np.take_along_axis(r, np.clip(k - 1, 0, n_l - 1), axis=-1)[..., 0]
    y1 = np.take_along_axis(r, k, axis=-1)[..., 0]
    y2 = np.take_along_axis(r, np.clip(k + 1, 0, n_l - 1), axis=-1)[..., 0]
    den = y0 - 2 * y1 + y2
    frac = np.where(den < 0, 0.5 * (y0 - y2) / np.where(den < 0, den, -1.0), 0.0)
    frac = np.clip(frac, -0.5, 0.5)
    k = k[..., 0]
    lag_s = (lags[k] + frac) * g.step_s
    peak = y1 - 0.25 * (y0 - y2) * frac if g.decimated else y1
    centre = np.maximum(0.5 * (bands_hz[:, 0] + bands_hz[:, 1]), 1.0)  # (C,)
    lobe = np.maximum(2.0, 0.75 / centre / g.step_s)[:, None, None]
    lk = lags[k][..., None]
    away = (lags < lk - lobe) | (lags > lk + lobe)
    floor = inside & away
    n_floor = floor.sum(axis=-1)
    if g.decimated:
        # excluded lags below the peak count as -inf, above as +inf: the search window is
        # symmetric, so the kept values' middle stays at the middle rank (to a few ranks)
        # on every stride-th lag (the grid samples the correlation at 1.2-1.5x its Nyquist
        # rate; samples three steps apart are about independent: the statistics lose little)
        sub, fl = r[..., ::stride], floor[..., ::stride]
        below = lags[None, None, ::stride] < lags[k][..., None]
        med = _split_median(sub, fl, below)
        mad = _split_median(np.abs(sub - med[..., None]), fl, below) * 1.4826
    else:
        med = masked_median(r, floor)
        mad = masked_median(np.abs(r - med[..., None]), floor) * 1.4826
    score = np.where(n_floor > 8, (peak - med) / np.maximum(mad, 1e-12), np.inf)
    mid = r[..., 1:-1]
    locmax = (mid > r[..., :-2]) & (mid >= r[..., 2:]) & floor[..., 1:-1]
    cand = np.where(locmax, mid, -np.inf)
    j = np.argmax(cand, axis=-1)[..., None]
    second = np.take_along_axis(cand, j, axis=-1)[..., 0]
    second_lag_s = lags[j[..., 0] + 1] * g.step_s
    if g.decimated:  # vertex height of the highest separate maximum
        a0 = np.take_along_axis(r, j, axis=-1)[..., 0]
        a2 = np.take_along_axis(r, j + 2, axis=-1)[..., 0]
        d2 = a0 - 2 * second + a2
        with np.errstate(invalid="ignore"):
            top = second - 0.125 * (a2 - a0) ** 2 / np.where(d2 < 0, d2, -1.0)
        second = np.where(np.isfinite(second) & (d2 < 0), top, second)
    ratio = np.where(np.isfinite(second) & (peak > 0), second / np.maximum(peak, 1e-12), 0.0)
    return lag_s, peak, score, np.clip(ratio, 0.0, None), second_lag_s
