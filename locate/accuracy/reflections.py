"""Delay errors from a ground reflection: a systematic term in every pair's uncertainty.

Sound reflected by the ground reaches a mic a little after the direct sound: from a source at
height h_s to a mic at height h_m, r apart horizontally, the image method (textbook; a
reflecting plane z = 0 and an image source at (x, y, -h_s)) gives the extra travel time
Delta = (|m - s'| - |m - s|) / c, about 2 h_s h_m / (r c) far out.  When Delta is within the
correlation peak's width (a fraction of a millisecond for a mic 1.5 m up and a source near the
ground) the two arrivals merge into one peak and its maximum moves: the delay is biased by
tens of microseconds, far more than the correlation noise of a loud sound.
:func:`locate.signal.delays.multipath_bias_s` gives that bias for each pair to first order,
with the pair's own spectral weights.

The bias is not random, but its size is unknown: it depends on the ground's reflection
coefficient Q (0.9-1 for asphalt, concrete and packed earth; lower at mid and high frequencies
over grass - common practice) and on the source height, which is seldom known.  It is not
corrected; its second moment over the plausible range enters the delay covariance
(an uncorrected systematic effect with an unknown size, JCGM 100:2008 F.2.4.5: its
uncertainty is the root mean square over the range):

    M = sum_s w_s b_s b_s^T

over Q uniform in the range seen in the mics' spectra (four-point midpoint rule) and, when the
source height carries a standard deviation, 16 heights evenly over z0 +- sqrt(3) sd (midpoint
rule; heights kept at 2 cm or more): the bias is not smooth in the height, and a 3-point rule
missed it between its nodes.  A peak jump (a cross term higher than the direct peak) enters
each pair on its own.

Calibration (tests/benchmarks/coverage_table.py, docs/uncertainty.md): on the simulator with a
ground reflection of Q uniform in [0, 1] the pair delay errors divided by the resulting sds have
an rms below 1 and the ellipse coverage stays within 90-98 %.

Only mics between 0 and :data:`MAX_MIC_HEIGHT_M` above the ground count (the site's z is the
height above a flat ground at z = 0; a mic high on a mast or a z that is an altitude is left
out).
"""

from __future__ import annotations

import numpy as np

from locate.physics.air import travel_time_s
from locate.signal.delays import DelaySet, multipath_biases_s

__all__ = ["ground_reflection_term", "TYPICAL_MIC_HEIGHT_M", "estimate_ground_q",
           "GROUND_Q_RANGE", "MAX_MIC_HEIGHT_M", "MODEL_ERROR", "ground_bias_covariance",
           "with_ground_reflection", "ground_echo_pairs"]

GROUND_Q_RANGE = (0.5, 1.0)
"""Plausible range of the ground's reflection coefficient (hard to moderately soft ground)."""

MAX_MIC_HEIGHT_M = 30.0
"""A mic higher than this above z = 0 is not modelled (its z is probably an altitude)."""

TYPICAL_MIC_HEIGHT_M = 1.5
"""Height of a mic above the ground when the site does not say (a tripod or a stake at head
height, common practice): a WGS84 site's z are ellipsoidal heights, so its ground is taken
this far below the lowest mic."""

MODEL_ERROR = 0.5
"""Fraction of each pair's modelled bias taken as an independent model error (calibrated on
the simulator: the first-order bias is within about half of the measured one,
tests/benchmarks/coverage_table.py)."""

_Q_NODES = GROUND_Q_RANGE[0] + (np.arange(4) + 0.5) / 4 * (GROUND_Q_RANGE[1] - GROUND_Q_RANGE[0])
_N_HEIGHTS = 16
# Source heights for the ground term: a midpoint rule over z0 +- sqrt(3) sd (the range of a
# uniform distribution with that sd, e.g. 0-2 m for the default 1 m +- 0.6 m).  The bias is
# not a smooth function of the height (the reflection's lag moves through the correlation
# peak and its ripple through the band), so a 3-point Gauss rule under-samples it: measured
# on the bursts family with exact mics, 52 % coverage with 3 heights, 82 % with 8, 87 % with
# 16 and 32 (tests/benchmarks/coverage_table.py --exact-mics).
_H_NODES = np.sqrt(3.0) * (2.0 * (np.arange(_N_HEIGHTS) + 0.5) / _N_HEIGHTS - 1.0)
_H_WEIGHTS = np.full(_N_HEIGHTS, 1.0 / _N_HEIGHTS)
_MIN_SOURCE_Z_M = 0.02


_Q_GRID = np.linspace(0.0, 1.0, 21)


def _ground_paths(src, mics, heights, sound_speed_mps, wind_mps):
    """Extra travel time (H, N) and amplitude ratio direct/reflected distance (H, N)."""
    heights = np.asarray(heights, dtype=float)
    s = np.stack([np.full_like(heights, src[0]), np.full_like(heights, src[1]), heights],
                 axis=-1)[:, None, :]  # every height at once
    img = s * np.array([1.0, 1.0, -1.0])
    lags = (travel_time_s(img, mics, sound_speed_mps, wind_mps)
            - travel_time_s(s, mics, sound_speed_mps, wind_mps))
    return lags, np.linalg.norm(mics - s, axis=-1) / np.linalg.norm(mics - img, axis=-1)


def estimate_ground_q(delays: DelaySet, source_m, mic_positions_m, sound_speed_mps,
                      wind_mps=None, *, source_z_sd_m=0.0):
    """Range (lo, hi) of the ground's reflection coefficient seen in the mics' spectra, or None.

    A reflection at lag Delta_u multiplies mic u's power spectrum by
    |1 + q g_u e^{-i omega Delta_u}|^2 (g_u = direct / reflected distance): a ripple whose
    period in frequency differs from mic to mic.  The log power spectra are fitted as
    common source spectrum (one value per bin) + a per-mic level (spreading) + the ripple
    (a per-mic slope would absorb the ripple of a reflection within the peak width), over q
    on a grid of 0.05 and source heights within 2 sd of the given one, by least squares.
    The range holds every q whose residual sum of squares is within 9 residual variances of
    the best (a 3-sd likelihood interval, textbook regression), widened by one grid step.
    None when fewer than three mics can show the ground.
    """
    p = delays.spectral_power
    if p is None or p.shape[1] < 16:
        return None
    src = np.asarray(source_m, dtype=float).reshape(3)
    mics = np.asarray(mic_positions_m, dtype=float)
    ok = ((mics[:, 2] > 0) & (mics[:, 2] <= MAX_MIC_HEIGHT_M)
          & np.all(np.isfinite(p) & (p > 0), axis=1))
    if ok.sum() < 3:
        return None
    f = np.asarray(delays.spectral_freqs_hz, dtype=float)
    om = 2 * np.pi * f
    log_p = np.log(p[ok])
    sd = float(source_z_sd_m)
    heights = (np.unique(np.clip(src[2] + sd * np.linspace(-2, 2, 9), _MIN_SOURCE_Z_M, None))
               if sd > 0 else np.array([max(src[2], _MIN_SOURCE_Z_M)]))
    lags, ratios = _ground_paths(src, mics[ok], heights, sound_speed_mps, wind_mps)

    # every height and q at once: |1 + q g e^{-i omega lag}|^2 = 1 + (q g)^2 + 2 q g cos(omega lag)
    cos = np.cos(om[None, None, :] * lags[:, :, None])  # (H, n, B)
    qg = _Q_GRID[None, :, None, None] * ratios[:, None, :, None]  # (H, Q, n, 1)
    r = log_p - np.log(np.maximum(1.0 + qg**2 + 2.0 * qg * cos[:, None], 1e-300))
    r -= r.mean(axis=-2, keepdims=True)  # common spectrum per bin removed
    r -= r.mean(axis=-1, keepdims=True)  # level per mic removed
    table = np.einsum("hqnb,hqnb->hq", r, r)  # (H, Q) residual sums of squares
    best = float(np.min(table))
    n_res = log_p.size - log_p.shape[1] - log_p.shape[0]
    sigma2 = best / max(n_res, 1)
    # every q that fits within 3 sd at some height (rss rise <= 9 sigma^2; textbook
    # likelihood interval), widened by one grid step
    fits = np.flatnonzero(np.min(table, axis=0) <= best + 9.0 * sigma2)
    step = _Q_GRID[1] - _Q_GRID[0]
    return (max(0.0, float(_Q_GRID[fits.min()]) - step),
            min(1.0, float(_Q_GRID[fits.max()]) + step))


def ground_bias_covariance(delays: DelaySet, source_m, mic_positions_m, sound_speed_mps,
                           wind_mps=None, *, source_z_sd_m=0.0, q_range=None):
    """Second moment of the ground-reflection bias of every pair, (P, P) s^2.

    Parameters
    ----------
    delays : DelaySet
        Measured delays with their spectral weights.
    source_m : array_like, shape (3,)
        Source position (a first fix); its z is the height above the ground.
    mic_positions_m : array_like, shape (N, 3)
    sound_speed_mps : float
    wind_mps : array_like (3,), optional
    source_z_sd_m : float
        Standard deviation of the source height (0: the height is taken as known).
    q_range : (float, float), optional
        Range of the reflection coefficient (uniform).  Default: the coefficient seen in the
        mics' spectra (:func:`estimate_ground_q`) +- 2 sd, within 0..1; when the spectra
        cannot tell, :data:`GROUND_Q_RANGE`.

    Returns
    -------
    ndarray, shape (P, P)
    """
    src = np.asarray(source_m, dtype=float).reshape(3)
    mics = np.asarray(mic_positions_m, dtype=float)
    n_pairs = len(delays.pairs)
    ok = (mics[:, 2] > 0) & (mics[:, 2] <= MAX_MIC_HEIGHT_M)
    if not ok.any() or not np.all(np.isfinite(src)) or delays.spectral_weight is None:
        return np.zeros((n_pairs, n_pairs))
    if q_range is None:  # from the spectra, else the plausible range
        q_range = estimate_ground_q(delays, src, mics, sound_speed_mps, wind_mps,
                                    source_z_sd_m=source_z_sd_m) or GROUND_Q_RANGE
    lo, hi = q_range
    q_nodes = lo + (np.arange(4) + 0.5) / 4 * (hi - lo)
    sd = float(source_z_sd_m)
    if sd > 0:
        heights = np.maximum(src[2] + sd * _H_NODES, _MIN_SOURCE_Z_M)
        h_weights = _H_WEIGHTS
    else:
        heights = np.array([max(src[2], _MIN_SOURCE_Z_M)])
        h_weights = np.ones(1)
    # every height at once (H, N), then S = H x 4 scenarios, the q nodes inner
    s = np.stack([np.full_like(heights, src[0]), np.full_like(heights, src[1]), heights],
                 axis=-1)[:, None, :]
    img = s * np.array([1.0, 1.0, -1.0])
    lag = travel_time_s(img, mics, sound_speed_mps, wind_mps) - travel_time_s(
        s, mics, sound_speed_mps, wind_mps)
    ratio = np.linalg.norm(mics - s, axis=-1) / np.linalg.norm(mics - img, axis=-1)
    lags = np.repeat(np.where(ok, lag, 0.0), len(q_nodes), axis=0)
    gains = np.where(ok, q_nodes[None, :, None] * ratio[:, None, :], 0.0).reshape(lags.shape)
    weights = np.repeat(np.asarray(h_weights, float) / len(q_nodes), len(q_nodes))
    # (S, P): with the coarse peak choice, and the fine step alone from the true delay
    b_all, b = multipath_biases_s(delays, lags, gains)
    b_all = np.where(np.isfinite(b_all), b_all, 0.0)
    b = np.where(np.isfinite(b), b, 0.0)
    wts = np.asarray(weights)
    m = (b * wts[:, None]).T @ b
    # A peak jump (the highest correlation on a cross term, lag_j or -lag_i away) is a near
    # coin-flip decided by the noise where the two peaks are close: its pattern over the pairs
    # is not the modelled one.  Its mean square enters each pair on its own (independent).
    jump2 = wts @ (b_all - b) ** 2
    m = m + np.diag(jump2)
    # The first-order model misses part of the bias (a strong reflection is not a small
    # perturbation; real grounds are not one Q).  That part follows the mics, not the modelled
    # pattern: MODEL_ERROR of each mic's own arrival bias (least-squares split of the pair
    # biases into per-mic ones, minimum norm), independent between mics and between pairs.
    inc = np.zeros((n_pairs, len(mics)))
    inc[np.arange(n_pairs), delays.pairs[:, 1]] = 1.0
    inc[np.arange(n_pairs), delays.pairs[:, 0]] = -1.0
    beta = b @ np.linalg.pinv(inc).T  # (S, N)
    beta = beta - beta.mean(axis=1, keepdims=True)
    beta2 = wts @ beta**2  # (N,) mean square per mic
    per_mic = (inc**2) @ beta2  # (P,) beta_i^2 + beta_j^2
    m = m + MODEL_ERROR**2 * (np.diag(np.diag(m)) + np.diag(per_mic))
    return 0.5 * (m + m.T)


def with_ground_reflection(delays: DelaySet, source_m, mic_positions_m, sound_speed_mps,
                           wind_mps=None, *, source_z_sd_m=0.0):
    """``delays`` with the ground-reflection term of :func:`ground_bias_covariance` in its
    covariance (``DelaySet.with_bias``)."""
    m = ground_bias_covariance(delays, source_m, mic_positions_m, sound_speed_mps, wind_mps,
                               source_z_sd_m=source_z_sd_m)
    return delays.with_bias(m)


def ground_echo_pairs(delays: DelaySet, source_m, mic_positions_m, sound_speed_mps,
                      wind_mps=None, *, source_z_sd_m=0.0):
    """Pairs whose next correlation peak is the ground reflection's, (P,) bool.

    The correlation of (direct + reflected at mic i) with (direct + reflected at mic j) peaks
    at the delay d and, from the cross terms, at d + Delta_j (direct at i with the reflection
    at j) and d - Delta_i (image method, textbook).  A second peak within two samples of one
    of those, for a source height within 2 sd of the given one, is the ground's and not an
    ambiguity of the direct sound.  (Had the highest peak been a cross term, the direct one
    would sit at d - Delta_j or d + Delta_i: not recognised, the pair stays ambiguous.)
    """
    n_pairs = len(delays.pairs)
    out = np.zeros(n_pairs, bool)
    if delays.second_lag_s is None:
        return out
    src = np.asarray(source_m, dtype=float).reshape(3)
    mics = np.asarray(mic_positions_m, dtype=float)
    ok = (mics[:, 2] > 0) & (mics[:, 2] <= MAX_MIC_HEIGHT_M)
    sd = float(source_z_sd_m)
    heights = (np.clip(src[2] + sd * np.linspace(-2, 2, 9), _MIN_SOURCE_Z_M, None) if sd > 0
               else np.array([max(src[2], _MIN_SOURCE_Z_M)]))
    lags, _ = _ground_paths(src, mics, heights, sound_speed_mps, wind_mps)  # (H, N)
    tol = 2.0 / float(delays.sample_rate_hz)
    ii, jj = delays.pairs[:, 0], delays.pairs[:, 1]
    d, second = np.asarray(delays.delay_s, float), np.asarray(delays.second_lag_s, float)
    for k in range(n_pairs):
        i, j = ii[k], jj[k]
        if not (ok[i] or ok[j]) or not np.isfinite(d[k]):
            continue
        cand = np.concatenate([d[k] + lags[:, j] * ok[j], d[k] - lags[:, i] * ok[i]])
        out[k] = bool(np.any(np.abs(cand - second[k]) <= tol))
    return out


def ground_reflection_term(delays: DelaySet, source_m, mic_positions_m, sound_speed_mps,
                           wind_mps=None, *, ground_z_m=0.0, source_z_sd_m=0.0):
    """``delays`` with the ground-reflection term in their covariance, the ground at any z.

    The one call for every path that measures delays (events, windows of a sweep or a track,
    sync): the mics and the source are moved so that the ground is at z = 0 and
    :func:`with_ground_reflection` is applied.

    Parameters
    ----------
    delays : DelaySet
        One span's (or one window's) delays with their spectral weights.
    source_m : array_like, shape (3,)
        Source position in the mics' frame (a first fix, or the window's track point).
    mic_positions_m : array_like, shape (N, 3)
    sound_speed_mps : float
    wind_mps : array_like (3,), optional
    ground_z_m : float or None
        z of the ground in the mics' frame (0 for a local site).  None: not known (a WGS84
        site): :data:`TYPICAL_MIC_HEIGHT_M` below the lowest mic.
    source_z_sd_m : float
        Standard deviation of the source height.

    Returns
    -------
    DelaySet
        Unchanged when the source position is not finite.
    """
    mics = np.array(mic_positions_m, dtype=float)
    src = np.array(source_m, dtype=float).reshape(3)
    if not np.all(np.isfinite(src)) or not np.all(np.isfinite(mics)):
        return delays
    ground = (float(np.min(mics[:, 2])) - TYPICAL_MIC_HEIGHT_M if ground_z_m is None
              else float(ground_z_m))
    mics[:, 2] -= ground
    src[2] = max(src[2] - ground, 0.0)
    return with_ground_reflection(delays, src, mics, sound_speed_mps, wind_mps,
                                  source_z_sd_m=source_z_sd_m)
