"""Event detection over recordings of any length in bounded memory.

:func:`locate.signal.events.detect_events` works on the frame-energy envelope of a whole recording.
Here the same detection runs as the envelope arrives, block after block, and keeps only what
the rule still needs:

* the background (20th percentile of each ``background_s`` segment, interpolated between
  segment centres) of a frame is final once the next segment is complete;
* whether a frame belongs to an event needs the activity ``max_spread_s`` either side;
* a run of event frames is closed once ``min_gap_s`` of quiet has followed it.

Frames older than all of that are dropped, so memory is a few background segments of
envelope (plus the longest event) whatever the recording length.  The events are those of
``detect_events`` on the whole envelope, to the last frame.

:func:`stream_frame_energy` reads the recordings in blocks that overlap by ``pad_s`` on each
side when a band is given, so the FFT band-pass of each block has no edge transients in the
frames it keeps.
"""

from __future__ import annotations

import warnings

import numpy as np
from scipy import fft as sfft

from locate.signal.events import (
    FRAME_S,
    ONSET_GATE_DB,
    Event,
    frame_energy_db,
    whitened_energy_db,
    whitening_window,
)

__all__ = ["EventStream", "stream_frame_energy", "scan_recordings"]


def _low(part):
    """20th percentile of each mic's frames; frames a mic has no audio for are NaN and left
    out (a mic with none in the segment has no background there, so it is never active)."""
    if np.isfinite(part).all():
        return np.percentile(part, 20, axis=-1)
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanpercentile(part, 20, axis=-1)


class EventStream:
    """Incremental :func:`locate.signal.events.detect_events`.

    Feed consecutive envelope chunks ``(N, F_k)`` with :meth:`add`; :meth:`finish` returns
    every event (those already closed are also available in :attr:`events` as they close).
    Parameters as ``detect_events``.
    """

    def __init__(self, n_mics, *, frame_s=FRAME_S, t0_s=0.0, threshold_db=10.0, min_mics=3,
                 max_spread_s=0.5, min_gap_s=0.3, background_s=5.0, pad_s=0.05,
                 min_duration_s=0.0, peak_db=None):
        self.n_mics = int(n_mics)
        self.peak_db = None if peak_db is None else float(peak_db)
        self.frame_s, self.t0_s = float(frame_s), float(t0_s)
        self.threshold_db, self.pad_s = float(threshold_db), float(pad_s)
        self.min_mics = min(int(min_mics), self.n_mics)
        self.min_duration_s = float(min_duration_s)
        self.spread = int(np.ceil(max_spread_s / frame_s))
        self.gap = int(np.ceil(min_gap_s / frame_s))
        self.seg = max(int(background_s / frame_s), 4)
        self.buf = np.zeros((self.n_mics, 0))
        self.buf0 = 0  # global index of buf[:, 0]
        self.n = 0  # frames received
        self.lows: list = []  # background of each complete segment, (N,) each
        self.done_until = 0  # mask frames below this are settled
        self.run = None  # (first, last) mask frame of the open run
        self.events: list[Event] = []

    def add(self, energy_db):
        """Append frames ``(N, F)`` of the envelope."""
        e = np.asarray(energy_db, dtype=float)
        if e.shape[0] != self.n_mics:
            raise ValueError(f"energy must have {self.n_mics} rows, got {e.shape!r}")
        self.buf = np.concatenate([self.buf, e], axis=1)
        self.n += e.shape[1]
        while (len(self.lows) + 1) * self.seg <= self.n:
            s = len(self.lows)
            part = self.buf[:, s * self.seg - self.buf0:(s + 1) * self.seg - self.buf0]
            self.lows.append(_low(part))
        self._advance(final=False)

    def finish(self) -> list[Event]:
        """Close the stream; all events in time order."""
        if self.n == 0:
            return []
        s = len(self.lows)
        if s * self.seg < self.n:  # the last, partial segment: padded with its last frame
            part = self.buf[:, s * self.seg - self.buf0:]
            pad = (s + 1) * self.seg - self.n
            part = np.concatenate([part, np.repeat(part[:, -1:], pad, axis=1)], axis=1)
            self.lows.append(_low(part))
        self._advance(final=True)
        return list(self.events)

    def _background(self, lo, hi):
        """Background of global frames [lo, hi), (N, hi - lo)."""
        lows = np.stack(self.lows, axis=1)
        t = np.arange(lo, hi)
        if lows.shape[1] == 1 and self.n <= self.seg:
            return np.repeat(lows, hi - lo, axis=1)
        centres = (np.arange(lows.shape[1]) + 0.5) * self.seg
        return np.stack([np.interp(t, centres, lows[k]) for k in range(self.n_mics)])

    def _advance(self, final):
        if not self.lows:
            return
        n_lows = len(self.lows)
        if final:
            bg_end = self.n
        else:  # a frame's background is final up to the centre of the last complete segment
            bg_end = min(int(np.floor((n_lows - 0.5) * self.seg)) + 1, self.n)
        lo = self.buf0
        if bg_end <= lo:
            return
        e = self.buf[:, : bg_end - lo]
        above = e - self._background(lo, bg_end)
        active = above >= self.threshold_db
        # mask frame t needs activity in [t - spread, t + spread]
        mask_end = self.n if final else bg_end - self.spread
        first = self.done_until
        if mask_end <= first:
            return
        t = np.arange(first, mask_end)
        cs = np.concatenate([np.zeros((self.n_mics, 1)), np.cumsum(active, axis=1)], axis=1)
        a_lo = np.clip(t - self.spread, lo, bg_end) - lo
        a_hi = np.clip(t + self.spread + 1, lo, bg_end) - lo
        counts = np.sum((cs[:, a_hi] - cs[:, a_lo]) > 0, axis=0)
        mask = (counts >= self.min_mics) & active[:, t - lo].any(axis=0)
        idx = t[mask]
        if idx.size:
            cut = np.flatnonzero(np.diff(idx) > self.gap)
            starts = np.concatenate([idx[:1], idx[cut + 1]])
            ends = np.concatenate([idx[cut], idx[-1:]])
            if self.run is not None and starts[0] - self.run[1] <= self.gap:
                starts[0] = self.run[0]  # the open run goes on
            elif self.run is not None:
                self._emit(active, above, lo, bg_end)
            for a, b in zip(starts[:-1], ends[:-1]):  # loop over events, not frames
                self.run = (int(a), int(b))
                self._emit(active, above, lo, bg_end)
            self.run = (int(starts[-1]), int(ends[-1]))
        if self.run is not None and (final or mask_end - 1 - self.run[1] > self.gap):
            self._emit(active, above, lo, bg_end)
        self.done_until = mask_end
        # keep what an open run, the next mask frames and the open segment still need
        keep = min(self.done_until, self.run[0] if self.run else self.done_until) - self.spread
        keep = min(keep, len(self.lows) * self.seg)
        keep = max(keep, self.buf0)
        if keep > self.buf0:
            self.buf = self.buf[:, keep - self.buf0:]
            self.buf0 = keep

    def _emit(self, active, above, lo, bg_end):
        s, t = self.run
        self.run = None
        a, b = max(s - self.spread, 0), min(t + self.spread + 1, self.n)
        act = active[:, a - lo:b - lo]
        abv = above[:, a - lo:b - lo]
        heard = act.any(axis=1)
        if heard.sum() < self.min_mics:
            return
        fs_ = self.frame_s
        first = np.where(heard, np.argmax(act, axis=1), -1)
        last = np.where(heard, act.shape[1] - 1 - np.argmax(act[:, ::-1], axis=1), -1)
        onset = np.where(heard, self.t0_s + (a + first) * fs_, np.nan)
        offset = np.where(heard, self.t0_s + (a + last + 1) * fs_, np.nan)
        level = float(np.max(np.where(act, abv, -np.inf)))
        loud = int(np.argmax(np.max(np.where(act, abv, -np.inf), axis=1)))
        duration = float(offset[loud] - onset[loud])
        if duration < self.min_duration_s or (self.peak_db is not None and level < self.peak_db):
            return
        self.events.append(Event(
            t_start_s=float(max(np.nanmin(onset) - self.pad_s, self.t0_s)),
            t_end_s=float(min(np.nanmax(offset) + self.pad_s, self.t0_s + self.n * fs_)),
            onset_s=onset, level_db=level, n_mics=int(heard.sum()), duration_s=duration))


def stream_frame_energy(recordings, start_s, stop_s, *, frame_s=FRAME_S, band_hz=None,
                        block_s=10.0, pad_s=0.5, whiten=False):
    """Yield ``(seconds covered, energy (N, F))`` over ``[start_s, stop_s)`` block by block.

    Frames are ``round(frame_s * fs)`` samples on a grid from ``start_s``.  With a band, each
    block is read with ``pad_s`` more audio on each side (where all mics have it), band-passed
    as a whole (FFT mask) and only the frames of the block itself are kept, so block edges
    leave no filter transients.  With ``whiten`` the envelope is
    :func:`locate.signal.events.whitened_energy_db` of each padded block (its background
    spectrum from the block and its padding).  Memory: one padded block.
    """
    fs = recordings.sample_rate_hz
    frame = max(int(round(frame_s * fs)), 1)
    block = max(int(block_s * fs) // frame, 1) * frame
    pad = int(np.ceil(pad_s * fs)) if band_hz is not None or whiten else 0
    if whiten:
        pad = max(pad, whitening_window(fs))
    n0, n_stop = int(round(start_s * fs)), int(round(stop_s * fs))
    lo_all = int(np.ceil(recordings.start_s * fs))
    hi_all = int(np.floor(recordings.stop_s * fs))
    k = n0
    raw, scratch = None, {}  # one set of block buffers, reused
    while k < n_stop - 1:
        k_end = min(k + block, n_stop)
        a, b = max(k - pad, min(lo_all, k)), min(k_end + pad, max(hi_all, k_end))
        # gaps_ok: a deployment's uncovered frames are blanked below, not read as signal
        raw, _ = recordings.read(a / fs, b / fs, out=raw, scratch=scratch, gaps_ok=True)
        sig = raw
        if whiten:
            n_fr = (k_end - k) // frame
            e = whitened_energy_db(sig, fs, frame=frame, n_frames=n_fr, history=k - a,
                                   band_hz=band_hz)
            if getattr(recordings, "deployment", None) is not None:
                # a recorder's start or a gap's end is a step, not an event: blank the frames
                # whose spectral window reaches into audio the mic does not have
                margin = whitening_window(fs) / fs
                holes = [[(lo - margin, hi + margin) for lo, hi in spans]
                         for spans in recordings.uncovered((k - pad) / fs, (k_end + pad) / fs)]
                _blank_uncovered(e, holes, k / fs, frame / fs)
            yield (k_end - k) / fs, e
            k = k_end
            continue
        if band_hz is not None:
            sig = _band(sig, fs, band_hz)
        e = frame_energy_db(sig[:, k - a:k_end - a], fs, frame_s=frame / fs)
        if getattr(recordings, "deployment", None) is not None:
            _blank_uncovered(e, recordings.uncovered(k / fs, k_end / fs), k / fs, frame / fs)
        yield (k_end - k) / fs, e
        k = k_end


def _blank_uncovered(energy, holes, t0_s, frame_s):
    """NaN in the frames of ``energy (N, F)`` that touch a span a mic has no audio for."""
    n = energy.shape[1]
    for i, spans in enumerate(holes):
        for lo, hi in spans:
            a = max(int(np.floor((lo - t0_s) / frame_s)), 0)
            b = min(int(np.ceil((hi - t0_s) / frame_s)), n)
            if b > a:
                energy[i, a:b] = np.nan


def _band(sig, fs, band_hz):
    """FFT band-pass of a block, as :func:`locate.signal.events.frame_energy_db` does."""
    n = sig.shape[-1]
    nfft = sfft.next_fast_len(n, real=True)
    f = sfft.rfftfreq(nfft, 1 / fs)
    spec = sfft.rfft(sig, nfft, axis=-1)
    spec[..., (f < band_hz[0]) | (f > band_hz[1])] = 0.0
    return sfft.irfft(spec, nfft, axis=-1)[..., :n]


def scan_recordings(recordings, start_s, stop_s, *, band_hz=None, threshold_db=10.0,
                    min_mics=3, max_spread_s=0.5, progress=None, block_s=10.0, whiten=False,
                    **detect):
    """Detect events over a span of the recordings in bounded memory.

    Parameters
    ----------
    recordings : locate.io.audio.Recordings
    start_s, stop_s : float
    band_hz : (float, float), optional
    threshold_db, min_mics, max_spread_s
        As :func:`locate.signal.events.detect_events` (``detect`` passes its other options).
    progress : callable, optional
        Called with the seconds scanned after each block.
    block_s : float
    whiten : bool
        Detect on the pre-whitened envelope (:func:`locate.signal.events.whitened_energy_db`):
        a mic hears the event from ``threshold_db - ONSET_GATE_DB`` and the event must reach
        ``threshold_db`` in its loudest mic.

    Returns
    -------
    list of locate.signal.events.Event
    """
    fs = recordings.sample_rate_hz
    frame = max(int(round(FRAME_S * fs)), 1)
    if whiten:
        detect.setdefault("peak_db", threshold_db)
        threshold_db = threshold_db - ONSET_GATE_DB
    stream = EventStream(recordings.n_mics, frame_s=frame / fs, t0_s=float(start_s),
                         threshold_db=threshold_db, min_mics=min_mics,
                         max_spread_s=max_spread_s, **detect)
    for seconds, e in stream_frame_energy(recordings, start_s, stop_s, frame_s=frame / fs,
                                          band_hz=band_hz, block_s=block_s, whiten=whiten):
        stream.add(e)
        if progress is not None:
            progress(seconds)
    return stream.finish()
