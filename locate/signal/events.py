"""Finding events (onsets above the background) in long multichannel recordings.

Two steps so that hour-long recordings stream in blocks with bounded memory:

1. :func:`frame_energy_db` turns a block of signals into short-frame energies (dB), per mic;
   the caller concatenates the frames of successive blocks (a few hundred numbers per second).
2. :func:`detect_events` finds spans where the energy stands above a slowly varying background
   (a low percentile over a few seconds, common practice for impulsive-noise detection) in
   enough mics, allowing for the travel time across the array.

Under a steady sound (a fan, a hum) the plain energy is the wrong envelope: a hum's level
beats and the fan's fills the band, so a bang 10 dB above them barely moves it, and its
fluctuations make false onsets.  :func:`whitened_energy_db` divides each frame's short-time
power spectrum by the background spectrum of the block (its median over frames, per mic and
bin: the "pre-whitening" of spectral-flux onset detectors, common practice) and averages the
ratio over the band: a steady sound of any spectrum becomes a flat 0 dB line that fluctuates
by a fraction of a dB, and a bang stands out in every bin the steady sound leaves free.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import fft as sfft

__all__ = ["Event", "frame_energy_db", "whitened_energy_db", "detect_events", "FRAME_S",
           "ONSET_GATE_DB", "whitening_window"]

FRAME_S = 0.005
"""Frame length of the energy envelope, seconds."""

ONSET_GATE_DB = 4.0
"""With the whitened envelope a mic counts as hearing an event from the frame its level is
``threshold - ONSET_GATE_DB`` above the background (the onset), while the event must reach the
full threshold in its loudest mic (hysteresis, common practice)."""


def whitening_window(sample_rate_hz) -> int:
    """Analysis window of :func:`whitened_energy_db`: the power of two nearest above 20 ms
    (bins of at most 50 Hz, so the lines of a 100 Hz hum fall in separate bins)."""
    return int(2 ** np.ceil(np.log2(0.02 * float(sample_rate_hz))))


def whitened_energy_db(signals, sample_rate_hz, *, frame, n_frames, history, band_hz=None):
    """Pre-whitened frame energies of a block, dB re its background (0 dB: background).

    Parameters
    ----------
    signals : array_like, shape (N, T)
        The block with ``history`` samples before its first frame (and any after its last).
    sample_rate_hz : float
    frame : int
        Frame length (hop), samples.
    n_frames : int
        Frames to return: frame ``t`` ends at sample ``history + (t + 1) * frame``.
    history : int
        Samples before the first frame; the window of a frame ends at the frame's end (a
        sound is counted from the frame it enters, not before).  Frames whose window would
        reach before the block's first sample read 0 dB (the recording's start is an edge).
    band_hz : (float, float), optional
        Bins kept (default 50 Hz .. 0.45 fs).

    Returns
    -------
    ndarray, shape (N, n_frames)
        10 lg of the band mean of P(t, f) / B(f), B the median of P over the block's frames
        divided by ln 2 (the median of an exponential power is ln 2 times its mean).
    """
    x = np.asarray(signals, dtype=float)
    fs = float(sample_rate_hz)
    n_win = whitening_window(fs)
    lo, hi = (50.0, 0.45 * fs) if band_hz is None else band_hz
    f = sfft.rfftfreq(n_win, 1.0 / fs)
    sel = np.flatnonzero((f >= lo) & (f <= hi))
    if sel.size == 0:
        sel = np.arange(1, f.size)
    need = history + n_frames * frame
    if x.shape[1] < need:
        x = np.pad(x, ((0, 0), (0, need - x.shape[1])))
    lead = max(n_win - frame - history, 0)
    if lead:
        x = np.pad(x, ((0, 0), (lead, 0)))
    first_end = lead + history + frame  # end of frame 0's window
    # background frames over the whole block (every frame whose window fits)
    n_all = (x.shape[1] - n_win) // frame + 1
    win = np.hanning(n_win + 2)[1:-1]
    out = np.empty((x.shape[0], n_frames))
    starts = first_end - n_win + np.arange(n_frames) * frame
    bg_starts = np.arange(max(n_all, 1)) * frame
    for k in range(x.shape[0]):
        def power(st, xk=x[k]):
            idx = st[:, None] + np.arange(n_win)[None, :]
            spec = sfft.rfft(xk[idx] * win, axis=-1)[:, sel]
            return spec.real**2 + spec.imag**2
        pb = power(bg_starts)
        live = np.any(pb > 0, axis=-1)  # windows of digital silence (a recorder off, or a
        pb = pb[live] if np.any(live) else pb  # file's zero-filled end) are no background
        bg = np.median(pb, axis=0) / np.log(2.0)
        p = power(starts)
        dead = ~np.any(p > 0, axis=-1)
        p = p / np.maximum(bg, 1e-300)
        out[k] = 10.0 * np.log10(np.maximum(np.mean(p, axis=-1), 1e-20))
        out[k, dead] = 0.0  # silence is not an event
    # windows reaching before the data (the recording's start): an edge, not a sound
    out[:, starts < lead] = 0.0
    return out


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
                  min_duration_s=0.0, peak_db=None):
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
    peak_db : float, optional
        An event must stand this far above the background in its loudest frame (default:
        ``threshold_db``, which already holds).

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
        if duration < min_duration_s or (peak_db is not None and level < peak_db):
            continue
        events.append(Event(
            t_start_s=float(max(np.nanmin(onset) - pad_s, t0_s)),
            t_end_s=float(min(np.nanmax(offset) + pad_s, t0_s + n * frame_s)),
            onset_s=onset, level_db=level, n_mics=int(heard.sum()), duration_s=duration,
        ))
    return events
