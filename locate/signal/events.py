"""Finding events (onsets above the background) in long multichannel recordings.

Two steps so that hour-long recordings stream in blocks with bounded memory:

1. :func:`frame_energy_db` turns a block of signals into short-frame energies (dB), per mic;
   the caller concatenates the frames of successive blocks (a few hundred numbers per second).
2. :func:`detect_events` finds spans where the energy stands above a slowly varying background
   (a low percentile over a few seconds, common practice for impulsive-noise detection) in
   enough mics, allowing for the travel time across the array.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import fft as sfft

__all__ = ["Event", "frame_energy_db", "detect_events", "FRAME_S"]

FRAME_S = 0.005
"""Frame length of the energy envelope, seconds."""


@dataclass(frozen=True)
class Event:
    """A detected event.

    Attributes
    ----------
    t_start_s, t_end_s : float
        Span holding the event in every mic that heard it, seconds into the recording.
    onset_s : ndarray, shape (N,)
        Onset time at each mic (NaN where a mic did not hear it).
    level_db : float
        Highest frame energy above the background, dB (largest over mics).
    n_mics : int
        How many mics heard it.
    duration_s : float
        Length of the loudest mic's active part.
    """

    t_start_s: float
    t_end_s: float
    onset_s: np.ndarray
    level_db: float
    n_mics: int
    duration_s: float

    def to_dict(self, mic_names=None) -> dict:
        first = int(np.nanargmin(self.onset_s)) if np.any(np.isfinite(self.onset_s)) else 0
        return {
            "t_s": float(np.nanmin(self.onset_s)) if np.any(np.isfinite(self.onset_s))
            else float(self.t_start_s),
            "span_s": [float(self.t_start_s), float(self.t_end_s)],
            "duration_s": float(self.duration_s),
            "level_db": float(self.level_db),
            "n_mics": int(self.n_mics),
            "first_mic": None if mic_names is None else mic_names[first],
        }


def frame_energy_db(signals, sample_rate_hz, *, frame_s=FRAME_S, band_hz=None):
    """Mean-square energy of consecutive frames, dB re 1 (full scale squared).

    Parameters
    ----------
    signals : array_like, shape (N, T)
    sample_rate_hz : float
    frame_s : float
        Frame length; trailing samples that do not fill a frame are dropped (pass blocks whose
        length is a whole number of frames to keep the frame grid continuous).
    band_hz : (float, float), optional
        Band-limit before measuring (FFT mask over the block).

    Returns
    -------
    ndarray, shape (N, T // frame)
    """
    x = np.asarray(signals, dtype=float)
    fs = float(sample_rate_hz)
    if band_hz is not None:
        n = x.shape[-1]
        nfft = sfft.next_fast_len(n, real=True)
        f = sfft.rfftfreq(nfft, 1 / fs)
        spec = sfft.rfft(x, nfft, axis=-1)
        spec[..., (f < band_hz[0]) | (f > band_hz[1])] = 0.0
        x = sfft.irfft(spec, nfft, axis=-1)[..., :n]
    frame = max(int(round(frame_s * fs)), 1)
    n_frames = x.shape[-1] // frame
    e = np.mean(x[..., : n_frames * frame].reshape(x.shape[0], n_frames, frame) ** 2, axis=-1)
    return 10.0 * np.log10(np.maximum(e, 1e-20))


def _background_db(energy_db, frames_per_segment):
    """Low percentile (20 %) of each segment, interpolated between segment centres."""
    n_mics, n = energy_db.shape
    seg = max(int(frames_per_segment), 4)
    n_seg = max(int(np.ceil(n / seg)), 1)
    pad = n_seg * seg - n
    e = np.pad(energy_db, ((0, 0), (0, pad)), mode="edge") if pad else energy_db
    lows = np.percentile(e.reshape(n_mics, n_seg, seg), 20, axis=-1)
    if n_seg == 1:
        return np.repeat(lows, n, axis=1)
    centres = (np.arange(n_seg) + 0.5) * seg
    t = np.arange(n)
    return np.stack([np.interp(t, centres, lows[k]) for k in range(n_mics)])


def detect_events(energy_db, *, frame_s=FRAME_S, t0_s=0.0, threshold_db=10.0, min_mics=3,
                  max_spread_s=0.5, min_gap_s=0.3, background_s=5.0, pad_s=0.05,
                  min_duration_s=0.0):
    """Events in a frame-energy envelope.

    Parameters
    ----------
    energy_db : array_like, shape (N, F)
        Output of :func:`frame_energy_db` over the whole recording.
    frame_s : float
    t0_s : float
        Time of frame 0, seconds into the recording.
    threshold_db : float
        How far above the background a frame must be to count as active.
    min_mics : int
        An event must be heard by at least this many mics.
    max_spread_s : float
        Largest arrival-time spread across the array (aperture / c plus margin): activity in
        different mics within this time belongs to one event.
    min_gap_s : float
        Quieter gaps shorter than this do not split an event.
    background_s : float
        Length of the segments over which the background percentile is taken.
    pad_s : float
        Margin added before the first onset and after the last offset.
    min_duration_s : float
        Shorter active spans are ignored.

    Returns
    -------
    list of Event
    """
    e = np.asarray(energy_db, dtype=float)
    n_mics, n = e.shape
    if n == 0:
        return []
    bg = _background_db(e, background_s / frame_s)
    active = (e - bg) >= threshold_db  # (N, F)
    spread = int(np.ceil(max_spread_s / frame_s))
    gap = int(np.ceil(min_gap_s / frame_s))
    # a frame belongs to an event when enough mics are active within +-spread of it
    counts = np.zeros(n)
    for k in range(n_mics):
        a = active[k].astype(float)
        cs = np.concatenate([[0.0], np.cumsum(a)])
        lo = np.clip(np.arange(n) - spread, 0, n)
        hi = np.clip(np.arange(n) + spread + 1, 0, n)
        counts += (cs[hi] - cs[lo]) > 0
    any_active = active.any(axis=0)
    mask = (counts >= min(min_mics, n_mics)) & any_active
    idx = np.flatnonzero(mask)
    if idx.size == 0:
        return []
    breaks = np.flatnonzero(np.diff(idx) > gap)
    starts = np.concatenate([[idx[0]], idx[breaks + 1]])
    ends = np.concatenate([idx[breaks], [idx[-1]]])
    events = []
    for s, t in zip(starts, ends):
        lo, hi = max(s - spread, 0), min(t + spread + 1, n)
        act = active[:, lo:hi]
        heard = act.any(axis=1)
        if heard.sum() < min(min_mics, n_mics):
            continue
        first = np.where(heard, np.argmax(act, axis=1), -1)
        last = np.where(heard, act.shape[1] - 1 - np.argmax(act[:, ::-1], axis=1), -1)
        onset = np.where(heard, t0_s + (lo + first) * frame_s, np.nan)
        offset = np.where(heard, t0_s + (lo + last + 1) * frame_s, np.nan)
        above = (e - bg)[:, lo:hi]
        level = float(np.max(np.where(act, above, -np.inf)))
        loud = int(np.argmax(np.max(np.where(act, above, -np.inf), axis=1)))
        duration = float(offset[loud] - onset[loud])
        if duration < min_duration_s:
            continue
        events.append(Event(
            t_start_s=float(max(np.nanmin(onset) - pad_s, t0_s)),
            t_end_s=float(min(np.nanmax(offset) + pad_s, t0_s + n * frame_s)),
            onset_s=onset, level_db=level, n_mics=int(heard.sum()), duration_s=duration,
        ))
    return events
