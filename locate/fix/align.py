"""Arrival-aligned analysis windows for continuous sounds.

A span cut at the same common times for every mic holds, for a sound that lasts longer than the
span (a hum, a steady plant noise), a part that one mic hears and the other does not: the
first or last ``|delay|`` of the window.  That part lowers the measured coherence as if it were
noise, so the delay variances computed from the coherence come out too large (by 1.6-20x in
variance at 0-20 dB SNR in this project's simulations), while the delays themselves lose
little.  Cutting each mic's window later by its arrival offset (pre-steering the records
before correlating them, common practice) leaves only the residual delay between the windows,
and the model holds again.  A burst wholly inside the span keeps its place
in each shifted window and gains nothing; aligning is done only when the sound goes on across
both ends of the span (:func:`sound_at_both_edges`), since shifted windows also move
reflections against the direct sound.

The offsets come from a first pass over the same span: pair delays reduced to arrival times
(:func:`locate.fix.solver.arrival_times`), centred on their median.  The shifted spans are read
through
:meth:`locate.io.audio.Recordings.with_clocks`, and the shifts are added back to the delays.
"""

from __future__ import annotations

import numpy as np

__all__ = ["aligned_recordings", "arrival_shifts_s", "shifted_recordings", "shifted_span_inside",
           "sound_at_both_edges", "MIN_SHIFT_SAMPLES", "EDGE_POWER_RATIO"]

MIN_SHIFT_SAMPLES = 2.0  # below this largest shift (samples) the first pass is kept
EDGE_POWER_RATIO = 0.5  # the sound goes on across the span's ends: edges this loud vs the span


def arrival_shifts_s(delays, n_mics) -> np.ndarray | None:
    """Per-mic window shifts (seconds, median zero) from a first pass, or None.

    None when the first pass is not to be trusted (an ambiguous pair: a tonal sound or a strong
    echo, whose peaks may be a cycle off), when its good pairs connect fewer than three mics,
    or when the windows need no shifting (largest shift under ``MIN_SHIFT_SAMPLES``).  Mics
    without good pairs are not shifted.
    """
    from locate.fix.solver import arrival_times

    quality = np.asarray(delays.quality)
    good = quality == "good"
    if np.any(quality == "ambiguous") or good.sum() < 3:
        return None
    try:
        tau, _, connected, _ = arrival_times(delays.subset(good), n_mics)
    except (ValueError, np.linalg.LinAlgError):
        return None
    if np.sum(connected) < 3:
        return None
    shifts = np.where(connected, tau, np.nan)
    shifts = np.where(connected, shifts - np.nanmedian(shifts), 0.0)
    if np.max(np.abs(shifts)) * delays.sample_rate_hz < MIN_SHIFT_SAMPLES:
        return None
    return shifts


def shifted_span_inside(recordings, shifts_s, start_s, stop_s):
    """Does the span ``start_s..stop_s``, read ``shifts_s[i]`` later for mic ``i``, stay in the
    time that every mic covers?  ``start_s``/``stop_s`` may be arrays (one span each)."""
    tol = 0.5 / recordings.sample_rate_hz
    return ((np.asarray(start_s) + float(np.min(shifts_s)) >= recordings.start_s - tol)
            & (np.asarray(stop_s) + float(np.max(shifts_s)) <= recordings.stop_s + tol))


def shifted_recordings(recordings, shifts_s, start_s, stop_s):
    """``recordings`` read ``shifts_s[i]`` later for mic ``i``, or None if a shifted span
    would leave the time that every mic covers."""
    if not shifted_span_inside(recordings, shifts_s, start_s, stop_s):
        return None
    return recordings.with_clocks(recordings.offsets_s - shifts_s, recordings.drift_ppm)


def sound_at_both_edges(signals, sample_rate_hz, shifts_s, ratio=EDGE_POWER_RATIO) -> bool:
    """Does the sound go on across both ends of the span (a continuous sound)?

    The mean power of the first and of the last ``max |shift|`` (at least 1 ms) of each mic's
    span against the whole span's; True when, for the median mic, both ends reach ``ratio``.
    A burst inside the span leaves only background at its ends.
    """
    x = np.asarray(signals, dtype=float)
    n = x.shape[1]
    e = int(min(max(np.max(np.abs(shifts_s)) * sample_rate_hz, 1e-3 * sample_rate_hz), n // 4))
    if e < 1:
        return False
    whole = np.mean(x**2, axis=1)
    ends = np.minimum(np.mean(x[:, :e] ** 2, axis=1), np.mean(x[:, -e:] ** 2, axis=1))
    ok = whole > 0
    return bool(ok.any() and np.median(ends[ok] / whole[ok]) >= ratio)


def aligned_recordings(recordings, first_pass, start_s, stop_s, signals=None):
    """``(recordings read at each mic's arrival offset, shifts_s (N,))``, or
    ``(recordings, None)`` when the first pass gives no shifts (:func:`arrival_shifts_s`), the
    shifted span leaves the recordings, or - with the span's ``signals`` given - the sound does
    not go on across both ends of the span (:func:`sound_at_both_edges`)."""
    shifts = arrival_shifts_s(first_pass, recordings.n_mics)
    if shifts is None or (signals is not None and not sound_at_both_edges(
            signals, recordings.sample_rate_hz, shifts)):
        return recordings, None
    shifted = shifted_recordings(recordings, shifts, start_s, stop_s)
    return (recordings, None) if shifted is None else (shifted, shifts)
