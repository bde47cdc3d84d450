"""Clock calibration from reference sounds made at known points (pure estimation).

Separate recorders keep their own time.  A reference sound (clap board, starter's blank,
loudspeaker chirp) made at a known point ``p`` gives, for every mic pair, the delay the geometry
predicts, ``g_ij = T(p -> m_j) - T(p -> m_i)`` (:func:`locate.physics.air.travel_time_s`), and the
delay
measured on the recordings' current time base, ``d_ij``.  Their difference is the difference of
the clock corrections, ``g_ij - d_ij = delta_j - delta_i``, where ``delta_i`` is what must be
added to mic i's ``offset_s`` (site-file convention: ``offset_s`` is added to the mic's times to
get true time).  The pair differences are reduced to one correction per mic relative to the
reference mic (the first mic: its correction is 0) by generalised least squares
(:func:`locate.fix.solver.arrival_times`, which also drops pairs that do not close), so the
covariance
of the corrections follows from the delay covariance of
:func:`locate.signal.delays.estimate_delays`,
plus the sound-speed, mic-survey and reference-point uncertainties propagated to first order.

Clock model (as :mod:`locate.io.audio`): mic sample k, mic time ``tau = k / fs``, was recorded at
``t = o_i + tau / (1 + drift_ppm_i 1e-6)``.  A wrong offset and drift make the correction
linear in mic time, ``delta_i(tau) = A_i + B_i tau`` with ``A_i = o*_i - o_i`` and
``B_i = 1/(1 + p*_i) - 1/(1 + p_i)`` (exact).  One reference event gives ``A_i`` (drift
unchanged); two events at mic times ``tau_1``, ``tau_2`` give ``B_i = (delta_2 - delta_1) /
(tau_2 - tau_1)`` and ``A_i = delta_1 - B_i tau_1``.

Delays of a reference event are measured in two stages so that clock offsets of seconds are
found: (1) GCC-PHAT (Knapp & Carter 1976) over the whole given span with a search window as
long as the span, reduced to a coarse arrival per mic; (2) each mic's recording is shifted by its
coarse arrival, the sound is located in the aligned energy envelope, and the delays of a short
window around it are estimated with their covariance by
:func:`locate.signal.delays.estimate_delays`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import fft as sfft

from locate.errors import NothingFoundError, OptionError
from locate.fix.solver import arrival_times
from locate.geometry.pairs import incidence_matrix
from locate.physics import air as _air
from locate.signal.delays import DelaySet, all_pairs, estimate_delays

__all__ = [
    "ReferenceEvent",
    "ClockFit",
    "coarse_arrivals",
    "reference_delays",
    "clock_corrections",
    "fit_clocks",
]

_FRAME_S = 0.005  # energy-envelope frame, s
_FINE_SEARCH_S = 0.002  # half-width of the fine delay search around the coarse alignment
_MIN_PHAT_SCORE = 8.0  # coarse GCC-PHAT peak over the correlation floor (in MADs) to trust it


@dataclass
class ReferenceEvent:
    """Measured delays of one reference sound and the common times at which each mic shows it.

    Attributes
    ----------
    delays : DelaySet
        Pair delays on the current time base (all pairs, fine stage).
    t_seen_s : ndarray, shape (N,)
        Common time (current offsets) of the middle of the analysed window at each mic, s.
    window_s : (float, float)
        Analysed window at the reference mic, common time.
    warnings : list of str
    """

    delays: DelaySet
    t_seen_s: np.ndarray
    window_s: tuple
    warnings: list = field(default_factory=list)


@dataclass
class ClockFit:
    """Clock corrections for every mic, relative to the reference mic.

    Attributes
    ----------
    reference : int
        Index of the reference mic (its offset and drift are kept).
    offset_s : ndarray, shape (N,)
        New ``offset_s`` of each mic for the site file.
    offset_sd_s : ndarray, shape (N,)
        Standard deviation of the new offsets (at the mic's first sample, tau = 0).
    correction_s : ndarray, shape (E, N)
        Measured correction at each reference event (``delta``), s.
    correction_sd_s : ndarray, shape (E, N)
    drift_ppm, drift_sd_ppm : ndarray, shape (N,) or None
        New ``drift_ppm`` and its standard deviation (two events only).
    clock_sd_s : ndarray, shape (N,)
        Largest standard deviation of the corrected clock over the span the recordings cover.
    warnings : list of str
    """

    reference: int
    offset_s: np.ndarray
    offset_sd_s: np.ndarray
    correction_s: np.ndarray
    correction_sd_s: np.ndarray
    drift_ppm: np.ndarray | None
    drift_sd_ppm: np.ndarray | None
    clock_sd_s: np.ndarray
    warnings: list = field(default_factory=list)


# ------------------------------------------------------------------------- delay measurement

def coarse_arrivals(signals, sample_rate_hz, *, max_lag_s, band_hz=None):
    """Coarse arrival of a loud sound at each mic relative to the first, from GCC-PHAT.

    Parameters
    ----------
    signals : array_like, shape (N, T)
    sample_rate_hz : float
    max_lag_s : float
        Search half-width for every pair (may be most of the span).
    band_hz : (float, float), optional

    Returns
    -------
    arrival_s : ndarray, shape (N,)
        Time at which mic i shows the sound minus the time at mic ``ref`` (NaN if not heard).
    ref : int
        The mic the arrivals are relative to (the first mic that heard the sound).
    dropped : list of int
        Pairs (row of ``all_pairs(N)``) whose peaks were weak or did not close with the others.
    """
    x = np.asarray(signals, dtype=float)
    n_mic, n = x.shape
    fs = float(sample_rate_hz)
    x = x - x.mean(axis=1, keepdims=True)
    lim = int(min(np.floor(max_lag_s * fs), n - 1))
    nfft = sfft.next_fast_len(n + lim + 1, real=True)
    freqs = sfft.rfftfreq(nfft, 1.0 / fs)
    lo, hi = (20.0, 0.45 * fs) if band_hz is None else band_hz
    mask = (freqs >= lo) & (freqs <= hi)
    spec = sfft.rfft(x, nfft, axis=-1)
    pairs = all_pairs(n_mic)
    lags = np.arange(-lim, lim + 1)
    lag_s = np.full(len(pairs), np.nan)
    score = np.zeros(len(pairs))
    for k, (i, j) in enumerate(pairs):  # one pair at a time keeps memory at one spectrum
        g = np.conj(spec[i]) * spec[j]
        g = np.where(mask, g / np.maximum(np.abs(g), 1e-300), 0.0)
        r = sfft.irfft(g, nfft)[lags % nfft]
        m = int(np.argmax(r))
        med = np.median(r)
        mad = 1.4826 * np.median(np.abs(r - med))
        score[k] = (r[m] - med) / max(mad, 1e-12)
        frac = 0.0
        if 0 < m < len(r) - 1:
            den = r[m - 1] - 2 * r[m] + r[m + 1]
            frac = float(np.clip(0.5 * (r[m - 1] - r[m + 1]) / den, -0.5, 0.5)) if den < 0 else 0.0
        lag_s[k] = (lags[m] + frac) / fs
    good = score >= _MIN_PHAT_SCORE
    sd = 1.0 / fs
    cov = np.diag(np.where(good, sd**2, np.inf))
    ds = DelaySet(pairs=pairs, delay_s=np.where(good, lag_s, np.nan), sd_s=np.full(len(pairs), sd),
                  covariance_s2=cov, peak=np.ones(len(pairs)), score=score,
                  second_ratio=np.zeros(len(pairs)), quality=("good",) * len(pairs), t_s=0.0,
                  duration_s=n / fs, band_hz=(lo, hi), sample_rate_hz=fs,
                  max_lag_s=np.full(len(pairs), lim / fs))
    tau, _, connected, dropped = arrival_times(ds, n_mic)
    dropped = sorted(set(dropped) | set(np.flatnonzero(~good).tolist()))
    if connected.sum() < 2:
        return np.full(n_mic, np.nan), 0, dropped
    ref = int(np.flatnonzero(connected)[0])
    return np.where(connected, tau, np.nan), ref, dropped


def _frame_db(x, frame):
    n_frames = x.shape[-1] // frame
    e = np.mean(x[..., : n_frames * frame].reshape(x.shape[0], n_frames, frame) ** 2, axis=-1)
    return 10.0 * np.log10(np.maximum(e, 1e-30))


def reference_delays(signals, sample_rate_hz, residual_offsets_s, *, t0_s=0.0, band_hz=None,
                     pad_s=0.05, mic_names=None, max_lag_s=None) -> ReferenceEvent:
    """Delays of one reference sound inside a span that holds it at every mic.

    Parameters
    ----------
    signals : array_like, shape (N, T)
        The span as read by :meth:`locate.io.audio.Recordings.read` (current offsets).
    sample_rate_hz : float
    residual_offsets_s : array_like, shape (N,)
        Sub-sample remainders returned by the read.
    t0_s : float
        Common time of the first sample.
    band_hz : (float, float), optional
    pad_s : float
        Margin kept before and after the sound in the fine window.
    mic_names : sequence of str, optional
    max_lag_s : float or array_like (P,), optional
        Lag search half-width of the fine stage around the coarse alignment.  Give the
        geometric one of ``tdoa fix`` (:func:`locate.signal.delays.geometric_max_lag_s`): the
        correlation floor and the next peak are then judged over the same lags, so the pairs
        are graded as ``fix`` grades them.  Default: 2 ms.

    Returns
    -------
    ReferenceEvent

    Raises
    ------
    NothingFoundError
        No sound common to the mics, or the span does not hold it at every mic.
    """
    x = np.asarray(signals, dtype=float)
    n_mic, n = x.shape
    fs = float(sample_rate_hz)
    names = list(mic_names) if mic_names is not None else [f"M{k + 1}" for k in range(n_mic)]
    res = np.asarray(residual_offsets_s, dtype=float)
    arr, ref, _ = coarse_arrivals(x, fs, max_lag_s=0.9 * n / fs, band_hz=band_hz)
    heard = np.isfinite(arr)
    if heard.sum() < 2:
        raise NothingFoundError(f"no sound common to the mics between {t0_s:.3f} and "
                                f"{t0_s + n / fs:.3f} s: give --from/--to around the reference "
                                "sound (wide enough to hold it at every mic)")
    warnings = []
    if not heard.all():
        deaf_names = [n_ for n_, h in zip(names, heard, strict=True) if not h]
        warnings.append("mic(s) " + ", ".join(deaf_names)
                        + " did not hear the reference sound clearly: their clocks are not set")
    shift = np.where(heard, np.round(np.nan_to_num(arr) * fs), 0).astype(np.int64)
    frame = max(int(round(_FRAME_S * fs)), 1)
    lo_s, hi_s = int(max(0, -shift.min())), int(n - max(0, shift.max()))
    if hi_s - lo_s < 4 * frame:
        raise NothingFoundError("the span is too short to hold the reference sound at every "
                                "mic: widen --from/--to by the largest clock error")
    aligned = np.stack([x[i, lo_s + shift[i]: hi_s + shift[i]] for i in range(n_mic)])
    e_db = _frame_db(aligned[heard], frame)
    excess = np.mean(e_db - np.median(e_db, axis=1, keepdims=True), axis=0)
    peak = int(np.argmax(excess))
    active = excess >= max(6.0, excess[peak] - 30.0)
    a = peak
    while a > 0 and active[a - 1]:
        a -= 1
    b = peak
    while b < len(active) - 1 and active[b + 1]:
        b += 1
    pad = int(round(pad_s * fs))
    w0 = max(lo_s + a * frame - pad, lo_s)
    w1 = min(lo_s + (b + 1) * frame + pad, hi_s)
    windows = np.stack([x[i, w0 + shift[i]: w1 + shift[i]] for i in range(n_mic)])
    offs = res + shift / fs
    search = _FINE_SEARCH_S + 2.0 / fs if max_lag_s is None else np.maximum(
        np.asarray(max_lag_s, dtype=float), _FINE_SEARCH_S + 2.0 / fs)
    ds = estimate_delays(windows, fs, max_lag_s=search, band_hz=band_hz,
                         offsets_s=offs, t_s=t0_s + w0 / fs)
    # pairs with a mic that did not hear the sound carry no clock information
    deaf = ~heard[ds.pairs[:, 0]] | ~heard[ds.pairs[:, 1]]
    if deaf.any():
        ds.covariance_s2[deaf, :] = 0.0
        ds.covariance_s2[:, deaf] = 0.0
        ds.covariance_s2[deaf, deaf] = np.inf
        ds.delay_s[deaf] = np.nan
    for grade, text in (("weak", "weak correlation of the reference sound for pair(s) "),
                        ("ambiguous", "ambiguous correlation of the reference sound (several "
                                      "near-equal peaks: an echo?) for pair(s) ")):
        flagged = [f"{names[i]}-{names[j]}" for (i, j), q, d in zip(ds.pairs, ds.quality, deaf,
                                                                      strict=True)
                   if q == grade and not d]
        if flagged:
            warnings.append(text + ", ".join(flagged))
    t_seen = t0_s + (0.5 * (w0 + w1) + shift) / fs + res
    return ReferenceEvent(ds, t_seen, (t0_s + w0 / fs, t0_s + w1 / fs), warnings)


# ------------------------------------------------------------------------- clock corrections


def clock_corrections(delays: DelaySet, point_m, mic_positions_m, sound_speed_mps, *,
                      wind_mps=None, sound_speed_sd_mps=0.0, position_sd_m=None,
                      point_sd_m=0.0):
    """Clock correction of every mic from the delays of a sound made at a known point.

    Parameters
    ----------
    delays : DelaySet
        Measured delays on the current time base.
    point_m : array_like, shape (3,)
        Where the sound was made, local metres.
    mic_positions_m : array_like, shape (N, 3)
    sound_speed_mps : float
    wind_mps : array_like, shape (3,), optional
    sound_speed_sd_mps : float
        Uncertainty of the sound speed (e.g. from the air temperature's).
    position_sd_m : array_like, shape (N,), optional
        Survey uncertainty of each mic position (per axis), metres.
    point_sd_m : float
        Uncertainty of the reference point (per axis), metres.

    Returns
    -------
    delta_s : ndarray, shape (N,)
        Correction to add to each mic's offset, relative to the reference mic (NaN for mics
        without usable pairs).
    cov_s2 : ndarray, shape (N, N)
    ref : int
        The reference mic (correction 0): the first mic with usable pairs.
    dropped : list of int
        Pairs that failed the closure test.
    """
    pos = np.asarray(mic_positions_m, dtype=float)
    n_mic = len(pos)
    p = np.asarray(point_m, dtype=float).reshape(3)
    c = float(sound_speed_mps)
    pairs = np.asarray(delays.pairs, dtype=int)
    t = _air.travel_time_s(p, pos, c, wind_mps)
    g = t[pairs[:, 1]] - t[pairs[:, 0]]
    m = incidence_matrix(pairs, n_mic)
    extra = np.zeros((len(pairs), len(pairs)))
    if sound_speed_sd_mps:
        dc = 1e-3 * c
        jc = (_air.travel_time_s(p, pos, c + dc, wind_mps) - t) / dc
        jp = m @ jc
        extra += float(sound_speed_sd_mps) ** 2 * np.outer(jp, jp)
    if position_sd_m is not None:
        v = (np.nan_to_num(np.asarray(position_sd_m, dtype=float)) / c) ** 2
        extra += m @ np.diag(v) @ m.T
    if point_sd_m:
        grad = _air.travel_time_gradient(p[None, :], pos, c, wind_mps)  # (N, 3)
        jp = m @ grad
        extra += float(point_sd_m) ** 2 * (jp @ jp.T)
    ok = np.isfinite(delays.delay_s) & np.isfinite(np.diag(delays.covariance_s2))
    cov = np.where(np.outer(ok, ok), np.nan_to_num(delays.covariance_s2, posinf=0.0) + extra,
                   0.0)
    cov[~ok, ~ok] = np.inf
    resid = DelaySet(**{**delays.__dict__, "delay_s": np.where(ok, g - delays.delay_s, np.nan),
                        "covariance_s2": cov})
    tau, cov_t, connected, dropped = arrival_times(resid, n_mic)
    if connected.sum() < 2:
        raise NothingFoundError("the reference sound gave no usable delays: check --from/--to "
                                "and that the sound is loud at every mic")
    ref = int(np.flatnonzero(connected)[0])
    return np.where(connected, tau, np.nan), cov_t, ref, dropped


def fit_clocks(events, offsets_s, drift_ppm, site_offset_s, cover_s, *, reference=0) -> ClockFit:
    """Offsets (one reference event) or offsets and drifts (two events) of every mic.

    Parameters
    ----------
    events : sequence of (delta_s (N,), cov_s2 (N, N), t_seen_s (N,))
        One or two reference events: corrections (:func:`clock_corrections`) and the common
        times at which each mic shows them (:attr:`ReferenceEvent.t_seen_s`).
    offsets_s : array_like, shape (N,)
        Current total offsets ``o_i`` (site ``offset_s`` plus start-time offsets).
    drift_ppm : array_like, shape (N,)
        Current drifts.
    site_offset_s : array_like, shape (N,)
        Current ``offset_s`` values of the site file.
    cover_s : array_like, shape (N, 2)
        Mic time span (tau at the first and last sample) of each recording, s.
    reference : int
        The reference mic (correction 0 at every event).

    Returns
    -------
    ClockFit
    """
    o = np.asarray(offsets_s, dtype=float)
    p = np.asarray(drift_ppm, dtype=float) * 1e-6
    base = np.asarray(site_offset_s, dtype=float)
    cover = np.asarray(cover_s, dtype=float)
    deltas = np.array([np.asarray(e[0], float) for e in events])
    sds = np.array([np.sqrt(np.clip(np.diag(np.nan_to_num(e[1], nan=np.inf)), 0, None))
                    for e in events])
    ref = int(reference)
    warnings = []
    if len(events) == 1:
        a, a_sd = deltas[0], sds[0]
        new_offset = base + np.nan_to_num(a)
        clock_sd = a_sd
        return ClockFit(ref, new_offset, a_sd, deltas, sds, None, None, clock_sd, warnings)
    if len(events) != 2:
        raise ValueError(f"give one or two reference events, got {len(events)}")
    taus = np.array([(np.asarray(e[2], float) - o) * (1.0 + p) for e in events])  # (2, N)
    dt = taus[1] - taus[0]
    if np.any(np.abs(dt) < 1.0):
        raise OptionError("the two reference events are less than 1 s apart: give two spans "
                          "far apart (ideally at the start and end of the recording)",
                          field="start2_s")
    b = (deltas[1] - deltas[0]) / dt
    a = deltas[0] - b * taus[0]
    var1, var2 = sds[0] ** 2, sds[1] ** 2  # events independent; per-mic variances
    a_sd = np.sqrt((taus[1] / dt) ** 2 * var1 + (taus[0] / dt) ** 2 * var2)
    b_sd = np.sqrt(var1 + var2) / np.abs(dt)
    # largest sd of the corrected clock over each recording (at one of its ends)
    f = (cover - taus[0][:, None]) / dt[:, None]  # (N, 2)
    clock_sd = np.sqrt(np.max((1 - f) ** 2 * var1[:, None] + f**2 * var2[:, None], axis=1))
    inv = 1.0 / (1.0 + p) + np.nan_to_num(b)
    new_ppm = (1.0 / inv - 1.0) * 1e6
    ppm_sd = b_sd * 1e6 / inv**2
    big = np.abs(new_ppm) > 200.0
    if big.any():
        warnings.append(f"fitted drift of {np.max(np.abs(new_ppm)):.0f} ppm is implausible for a "
                        "recorder clock: check that both spans hold the same reference sound")
    new_offset = base + np.nan_to_num(a)
    return ClockFit(ref, new_offset, a_sd, deltas, sds, new_ppm, ppm_sd, clock_sd, warnings)
