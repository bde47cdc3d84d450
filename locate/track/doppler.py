"""Doppler shift of a tonal source: received frequency per mic per window, and a speed from it.

The frequency received at mic ``k`` is the emitted one divided by the rate at which arrival
time advances with emission time, ``f_k = f0 / (dA_k / dt_e) = f0 / (1 + grad T . v)`` with
``grad T`` the gradient of the travel time with respect to the source position
(:func:`locate.physics.air.travel_time_gradient`, so a uniform wind is included).  In still air
``grad T = -u / c`` with ``u`` the unit vector from the source to the mic at emission, which is
the textbook formula for a moving source and a still receiver:
``f_heard = f0 c / (c - v . u) = f0 c / (c - |v| cos(theta))``.

Frequency estimate: peak of a Hann-windowed, 8x zero-padded spectrum, refined by a parabola
through the log magnitudes of the three bins around the peak (common practice; the log
parabola is exact for a Gaussian window and within a small fraction of a bin for Hann).

The two speeds "agree" when they differ by less than three combined standard deviations plus
1 % of the speed: the peak estimate of a tone whose frequency sweeps during the window carries a
small bias (measured ~0.2 % on the simulator) that its scatter does not show.

The Doppler speed comes from fitting ``f0`` and the path parameters to all received frequencies
by least squares, starting from the delay-based track; it uses no delays, so it is an
independent estimate of the speed.
"""

from __future__ import annotations

import numpy as np
from scipy import fft as sfft
from scipy import optimize

from locate.physics import air
from locate.track.motion import Path, emission_time_s
from locate.track.retarded import Parametrisation

__all__ = ["received_frequency", "predicted_frequency", "peak_frequency_hz", "doppler_speed"]

_PAD = 8


def peak_frequency_hz(frames, sample_rate_hz, f_lo_hz, f_hi_hz):
    """Refined frequency of the strongest spectral peak of each frame in a band.

    Parameters
    ----------
    frames : array_like, shape (..., L)
    sample_rate_hz : float
    f_lo_hz, f_hi_hz : float or array_like broadcasting to (...)
        Search band.

    Returns
    -------
    freq_hz : ndarray, shape (...)
    level_db : ndarray, shape (...)
        Peak level over the median level of the band, dB.
    """
    x = np.asarray(frames, float)
    n = x.shape[-1]
    nfft = sfft.next_fast_len(_PAD * n, real=True)
    spec = np.abs(sfft.rfft((x - x.mean(axis=-1, keepdims=True)) * np.hanning(n), nfft, axis=-1))
    f = sfft.rfftfreq(nfft, 1.0 / sample_rate_hz)
    lo = np.asarray(f_lo_hz, float)[..., None]
    hi = np.asarray(f_hi_hz, float)[..., None]
    inband = (f >= lo) & (f <= hi)
    logm = np.log(np.maximum(spec, 1e-300))
    k = np.argmax(np.where(inband, logm, -np.inf), axis=-1)
    k = np.clip(k, 1, f.size - 2)
    y0 = np.take_along_axis(logm, (k - 1)[..., None], -1)[..., 0]
    y1 = np.take_along_axis(logm, k[..., None], -1)[..., 0]
    y2 = np.take_along_axis(logm, (k + 1)[..., None], -1)[..., 0]
    den = y0 - 2 * y1 + y2
    frac = np.where(den < 0, 0.5 * (y0 - y2) / np.where(den < 0, den, -1.0), 0.0)
    freq = (k + np.clip(frac, -0.5, 0.5)) * (f[1] - f[0])
    with np.errstate(all="ignore"):
        med = np.nanmedian(np.where(inband, logm, np.nan), axis=-1)
    return freq, 20.0 / np.log(10.0) * (y1 - med)


def received_frequency(signals, sample_rate_hz, t0_s, centres_s, window_s, f_lo_hz, f_hi_hz):
    """Received tone frequency at every mic in every window.

    Parameters
    ----------
    signals : array_like, shape (N, T)
    sample_rate_hz, t0_s : float
    centres_s : array_like, shape (W,)
    window_s : float
    f_lo_hz, f_hi_hz : float or array_like (W, N)

    Returns
    -------
    freq_hz, level_db : ndarray, shape (W, N)
    """
    x = np.asarray(signals, float)
    fs = float(sample_rate_hz)
    n = int(round(window_s * fs))
    starts = np.round((np.asarray(centres_s, float) - window_s / 2.0 - t0_s) * fs).astype(int)
    starts = np.clip(starts, 0, x.shape[1] - n)
    lo = np.broadcast_to(f_lo_hz, (len(starts), x.shape[0]))
    hi = np.broadcast_to(f_hi_hz, (len(starts), x.shape[0]))
    freq = np.zeros((len(starts), x.shape[0]))
    level = np.zeros_like(freq)
    for w, s in enumerate(starts):  # one FFT batch per window
        freq[w], level[w] = peak_frequency_hz(x[:, s:s + n], fs, lo[w], hi[w])
    return freq, level


def predicted_frequency(f0_hz, path, t_heard_s, mic_positions_m, sound_speed_mps, wind_mps=None):
    """Frequency heard at each mic at each time from a source emitting ``f0_hz``.

    Parameters
    ----------
    f0_hz : float
    path : Path (or any path object)
    t_heard_s : array_like, shape (W,)
    mic_positions_m : array_like, shape (N, 3)

    Returns
    -------
    ndarray, shape (W, N)
        ``f0 / (1 + grad T . v)`` at each mic's own emission time (module docstring).
    """
    mics = np.asarray(mic_positions_m, float)
    t_e = emission_time_s(np.asarray(t_heard_s, float)[:, None], mics[None], path,
                          sound_speed_mps, wind_mps)
    p = path.position_m(t_e)
    g = air.travel_time_gradient(p, mics[None], sound_speed_mps, wind_mps)
    return f0_hz / (1.0 + np.einsum("wki,wki->wk", g, path.velocity_mps(t_e)))


def _find_tone(x, fs, t0_s, centres, window_s, lo, hi):
    freq, level = received_frequency(x, fs, t0_s, centres, window_s, lo, hi)
    return float(np.median(freq[level > np.percentile(level, 50)])) if freq.size else None


def doppler_speed(signals, sample_rate_hz, t0_s, centres_s, window_s, track, mic_positions_m,
                  sound_speed_mps, *, wind_mps=None, tone_hz="auto", band_hz=(50.0, None)):
    """Independent speed from the Doppler shift of a tone (module docstring).

    Parameters
    ----------
    signals : array_like, shape (N, T)
    sample_rate_hz, t0_s : float
    centres_s : array_like, shape (W,)
    window_s : float
    track : locate.track.tracker.TrackResult
        Starting path and parametrisation (the delay-based fit).
    mic_positions_m : array_like, shape (N, 3)
    sound_speed_mps : float
    wind_mps : array_like, shape (3,), optional
    tone_hz : float or "auto"
        Emitted frequency guess, or "auto" for the strongest spectral peak.
    band_hz : (float, float or None)
        Where to look for a tone in "auto" mode.

    Returns
    -------
    dict or None
        ``f0_hz, f0_sd_hz, speed_mps, speed_sd_mps, heading_deg, tdoa_speed_mps,
        difference_mps, z, agree, n_used, residual_rms_hz`` or None when no tone stands out.
    """
    x = np.asarray(signals, float)
    fs = float(sample_rate_hz)
    mics = np.asarray(mic_positions_m, float)
    c = float(sound_speed_mps)
    centres = np.asarray(centres_s, float)
    s_max = track.speed_mps + 3.0 * track.speed_sd_mps + 2.0
    if tone_hz == "auto":
        hi = band_hz[1] or 0.45 * fs
        guess = _find_tone(x, fs, t0_s, centres, window_s, band_hz[0], hi)
        if guess is None:
            return None
    else:
        guess = float(tone_hz)
    lo, hi = guess * c / (c + 1.3 * s_max), guess * c / max(c - 1.3 * s_max, 1.0)
    freq, level = received_frequency(x, fs, t0_s, centres, window_s, lo, hi)
    good = level > 10.0  # a tone at least 10 dB above the band's median spectrum
    if good.sum() < 8:
        return None
    # a straight path (the mean velocity over the track) keeps the fit well posed
    t_lo, t_hi = track.t_emit_s[track.fit.used].min(), track.t_emit_s[track.fit.used].max()
    par = Parametrisation(np.array([t_lo, t_hi]), track.fit.par.dims, track.fit.par.source_z_m)
    th0 = par.theta(track.path.with_positions(track.path.position_m(track.path.knot_times_s))) \
        if isinstance(track.path, Path) and track.path.n_segments == 1 else par.theta(
            Path(np.array([t_lo, t_hi]), track.path.position_m(np.array([t_lo, t_hi]))))

    def resid(q):
        try:
            pred = predicted_frequency(q[0], par.path(q[1:]), centres, mics, c, wind_mps)
        except ValueError:  # a trial step went supersonic
            return np.full(int(good.sum()), 1e6)
        return (freq - pred)[good]

    f0 = float(np.median(freq[good] / predicted_frequency(1.0, track.path, centres, mics, c,
                                                          wind_mps)[good]))
    q0 = np.concatenate([[f0], th0])
    sol = optimize.least_squares(resid, q0, loss="soft_l1",
                                 f_scale=max(0.05, 0.002 * f0), x_scale="jac")
    r = resid(sol.x)
    mad = 1.4826 * np.median(np.abs(r - np.median(r)))
    inl = np.abs(r) < max(5.0 * mad, 1e-6)
    idx = np.flatnonzero(good.ravel())[inl]
    good = np.zeros(good.size, bool)
    good[idx] = True
    good = good.reshape(freq.shape)
    sol = optimize.least_squares(resid, sol.x, x_scale="jac")
    r = resid(sol.x)
    n, k = r.size, sol.x.size
    s2 = float(r @ r / max(n - k, 1))
    cov = np.linalg.pinv(sol.jac.T @ sol.jac) * s2
    path = par.path(sol.x[1:])
    a_v = (par.basis(np.array(t_hi)) - par.basis(np.array(t_lo))) / (t_hi - t_lo)
    v = a_v @ sol.x[1:]
    vcov = a_v @ cov[1:, 1:] @ a_v.T
    speed = float(np.linalg.norm(v))
    js = v / max(speed, 1e-300)
    speed_sd = float(np.sqrt(max(js @ vcov @ js, 0.0)))
    diff = speed - track.speed_mps
    z = diff / np.hypot(speed_sd, track.speed_sd_mps)
    return {
        "f0_hz": float(sol.x[0]), "f0_sd_hz": float(np.sqrt(cov[0, 0])),
        "speed_mps": speed, "speed_sd_mps": speed_sd,
        "heading_deg": float(np.mod(np.rad2deg(np.arctan2(v[0], v[1])), 360.0)),
        "tdoa_speed_mps": track.speed_mps, "difference_mps": float(diff), "z": float(z),
        "agree": bool(abs(diff) <= 3.0 * np.hypot(speed_sd, track.speed_sd_mps)
                      + 0.01 * track.speed_mps),
        "n_used": int(n), "residual_rms_hz": float(np.sqrt(r @ r / n)),
        "model": "straight", "knots_m": path.knot_positions_m.tolist(),
    }
