"""Does a fix agree with the order in which the mics first heard the sound?

Cross-correlation follows the strongest common part of the signals.  When a reflection (a wall,
a building face, a cliff) is stronger than the direct sound - the direct path screened, the
reflector large and near - every pair's peak can belong to the echo, and the locator then
reports, consistently and with a small ellipse, the position of the *mirror image* of the
source.  The first arrival at each mic still comes along the direct path (it is the shortest),
so its onset pattern tells the two apart: the onsets must follow the travel times from the fix
up to one common emission time.  This module measures the onsets (first short frame well above
the span's initial background, the usual energy-threshold onset detector: common practice) and
reports a mismatch larger than the onset resolution.
"""

from __future__ import annotations

import numpy as np

from locate.physics.air import travel_time_s
from locate.signal.events import frame_energy_db

__all__ = ["first_arrivals_s", "onset_mismatch", "ONSET_FRAME_S", "ONSET_RISE_DB"]

ONSET_FRAME_S = 0.002
"""Frame length of the onset envelope, seconds."""

ONSET_RISE_DB = 10.0
"""An onset is the first frame this far above the span's initial background."""

_LEAD_S = 0.02  # the first 20 ms of a span are its background (event spans start earlier)
_MIN_PEAK_DB = 20.0  # a mic whose loudest frame is less far above the background: no onset
_TOLERANCE_S = 0.010  # onsets move by a few ms with level and rise time (common practice)


def first_arrivals_s(signals, sample_rate_hz):
    """Onset time of each channel from the start of the span, seconds; NaN where none.

    Parameters
    ----------
    signals : array_like, shape (N, T)
    sample_rate_hz : float

    Returns
    -------
    ndarray, shape (N,)
        NaN for a channel that is not quiet at the start of the span (a continuing sound) or
        whose sound does not stand out of the background.
    """
    fs = float(sample_rate_hz)
    e = frame_energy_db(signals, fs, frame_s=ONSET_FRAME_S)
    frame = max(int(round(ONSET_FRAME_S * fs)), 1) / fs
    lead = max(int(round(_LEAD_S / frame)), 1)
    out = np.full(e.shape[0], np.nan)
    if e.shape[1] <= 2 * lead:
        return out
    bg = np.median(e[:, :lead], axis=1)
    peak = e.max(axis=1)
    above = e >= (bg + ONSET_RISE_DB)[:, None]
    first = np.argmax(above, axis=1)
    ok = (peak - bg >= _MIN_PEAK_DB) & above.any(axis=1) & (first >= lead)
    out[ok] = first[ok] * frame
    return out


def onset_mismatch(signals, sample_rate_hz, mic_positions_m, position_m, sound_speed_mps,
                   mic_names, *, wind_mps=None, used=None):
    """A warning when the mics' first arrivals contradict the fix, else None.

    Parameters
    ----------
    signals : array_like, shape (N, T)
        The span the fix came from (common time base).
    sample_rate_hz : float
    mic_positions_m : array_like, shape (N, 3)
    position_m : array_like, shape (3,)
        The fix.
    sound_speed_mps : float
    mic_names : sequence of str
    wind_mps : array_like, shape (3,), optional
    used : array_like of bool, shape (N,), optional
        Mics that entered the fix (default: all).

    Returns
    -------
    str or None
    """
    onsets = first_arrivals_s(signals, sample_rate_hz)
    pos = np.asarray(mic_positions_m, dtype=float)
    if used is not None:
        onsets = np.where(np.asarray(used, bool), onsets, np.nan)
    ok = np.isfinite(onsets)
    if ok.sum() < 3 or not np.all(np.isfinite(position_m)):
        return None
    travel = travel_time_s(np.asarray(position_m, float)[None, :], pos[ok], sound_speed_mps,
                           wind_mps)
    emitted = onsets[ok] - travel  # one common emission time if the fix is right
    spread = emitted - np.median(emitted)
    k = int(np.argmax(np.abs(spread)))
    tol = _TOLERANCE_S + 2 * ONSET_FRAME_S
    if abs(spread[k]) <= tol:
        return None
    name = np.asarray(mic_names)[ok][k]
    when = "earlier" if spread[k] < 0 else "later"
    return (f"the first arrivals do not fit this position: mic {name} first heard the sound "
            f"{abs(spread[k]) * 1e3:.0f} ms {when} than a source here allows; the correlation "
            "may follow an echo stronger than the direct sound (the position of a reflection's "
            "mirror image); a --from/--to span around the first arrival only, or mics in "
            "clear view of the source, would help")
