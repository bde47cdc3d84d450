"""Reading the recordings of a site on one common time base (the I/O edge for audio).

:func:`open_recordings` checks the audio files of a :class:`locate.io.site.Site` (readable,
non-empty, enough channels, one sample rate, overlapping in time) and returns a
:class:`Recordings` that reads spans or streams blocks of all mics, aligned.

Time base
---------
Common time ``t`` (seconds) is 0 at the first sample of a mic with ``offset_s = 0``; when the
mics carry ``start_time`` stamps it is 0 at the earliest stamp.  Mic ``i``'s sample ``k`` (mic
time ``tau = k / fs``) was recorded at common time

    t = o_i + tau / (1 + drift_ppm_i 1e-6),   o_i = offset_s_i + (start_time_i - earliest),

i.e. a mic whose clock runs fast by ``drift_ppm`` counts ``fs (1 + drift 1e-6)`` samples per
common second.  A read shifts every mic by whole samples and returns the sub-sample remainder:
the common time of a feature seen at block sample ``n`` of mic ``i`` is
``start_s + n / fs + residual_offset_s[i]``.  Drifting mics are resampled onto the common grid
with a Kaiser-windowed sinc interpolator (band-limited interpolation, Smith & Gossett 1984,
"A flexible sampling-rate conversion method", ICASSP).

Only the frames of the requested span are read from disk (``SoundFile.seek`` + ``read``), so
hour-long files stream in bounded memory through :meth:`Recordings.blocks`.
"""

from __future__ import annotations

import os
import stat
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

import numpy as np
import soundfile

from locate.common import atomic_target
from locate.errors import OptionError, RecordingError
from locate.io.site import start_time_offsets_s
from locate.io.wav_header import truncation_note

__all__ = ["Recordings", "open_recordings", "check_signals", "write_audio",
           "CLIP_LEVEL", "DEAD_DB"]

CLIP_LEVEL = 0.999  # |x| at or above this fraction of full scale counts as clipped
CLIP_RUN = 3  # this many consecutive clipped samples is clipping (common practice)
CLIP_FRACTION = 1e-4  # ... or more than 0.01 % of the samples
DEAD_DB = 40.0  # a channel this far below the median channel rms is dead
SINC_HALF_TAPS = 32  # half-width of the windowed-sinc interpolator (samples)
SINC_KAISER_BETA = 8.6  # Kaiser shape; ~ -80 dB side lobes (Kaiser & Schafer 1980)
SINC_FARROW_DEGREE = 10  # polynomial degree of the kernel in the fractional position
_LENGTH_WARN_S = 1.0
MEMORY_FRACTION = 0.25  # a read may take at most this fraction of the machine's memory

CONTAINERS = {".wav": ("WAV", "WAVEX", "RF64", "W64"), ".wave": ("WAV", "WAVEX"),
              ".flac": ("FLAC",), ".ogg": ("OGG",), ".oga": ("OGG",), ".opus": ("OGG",),
              ".aif": ("AIFF",), ".aiff": ("AIFF",), ".aifc": ("AIFF",), ".caf": ("CAF",),
              ".w64": ("W64",), ".rf64": ("RF64",), ".mp3": ("MP3",)}
"""What a file extension promises (libsndfile format names)."""

LOSSY = ("OGG", "MP3")  # lossy codecs: their phase and timing are not kept exactly


def regular_file(path, field, site_path=None):
    """Refuse, before it is opened, a path that is missing or not a regular file (a FIFO
    would wait forever for a writer, a device never ends)."""
    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        named = f" (named by {field} in {Path(site_path).name})" if site_path else ""
        raise RecordingError(f"file not found{named}", file=path, field=field) from None
    except OSError as exc:
        raise RecordingError(f"cannot read the file ({exc.strerror})", file=path,
                             field=field) from None
    if stat.S_ISDIR(mode):
        raise RecordingError("is a folder, not a recording: name the audio file", file=path,
                             field=field)
    if not stat.S_ISREG(mode):
        raise RecordingError("is not a regular file (a pipe, device or socket): copy the "
                             "recording to a file and name that", file=path, field=field)


def container_note(path, info) -> str | None:
    """A warning when the file's content is not what its extension says (OGG in a .wav)."""
    fmt = str(getattr(info, "format", "") or "").upper()
    expected = CONTAINERS.get(Path(path).suffix.lower())
    if not fmt or expected is None or fmt in expected:
        return None
    lossy = (" lossy-compressed audio: arrival times may be blurred;"
             if fmt in LOSSY else "")
    return (f"{Path(path).name} holds {fmt} audio but is named {Path(path).suffix}:"
            f"{lossy} check it is the right file and rename it")


def _memory_bytes() -> float:
    try:
        return float(os.sysconf("SC_PHYS_PAGES")) * float(os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):
        return float("inf")


@dataclass(frozen=True)
class _Source:
    mic: str
    path: Path
    channel: int  # 1-based
    field: str  # site-file key the file came from
    n_frames: int
    parts: tuple | None = None  # a recorder's files (locate.io.filesets.Part), or one file


def _describe(exc) -> str:
    text = str(exc).strip().splitlines()
    return text[-1].strip() if text else type(exc).__name__


def open_recordings(site) -> Recordings:
    """Check the site's audio files and return a :class:`Recordings` reader.

    Raises
    ------
    RecordingError
        A file is missing, unreadable or empty, lacks the mic's channel, has another sample
        rate than the others, or the mics' recordings do not overlap in time.
    """
    if any(getattr(m, "files", None) is not None for m in site.mics):
        from locate.io.deployment import plan_deployment

        plan = plan_deployment(site)  # recorders writing many timestamped files
        rec = Recordings([_Source(*s[:5], parts=s[5]) for s in plan["sources"]],
                         plan["sample_rate_hz"], plan["offsets_s"], plan["drift_ppm"],
                         epoch=plan["epoch"], deployment=plan["deployment"])
        rec.warnings.extend(plan["deployment"].notes)
        return rec
    infos: dict[Path, object] = {}
    sources = []
    for i, mic in enumerate(site.mics):
        path, channel = site.mic_source(i)
        field = f"mics[{i}].file" if mic.file is not None else "recording.file"
        if path is None:
            raise RecordingError(f'mic "{mic.name}" has no recording: give [recording] file or '
                                 "a file for this mic", file=site.path, field=field)
        if path not in infos:
            regular_file(path, field, site.path)
            try:
                infos[path] = soundfile.info(str(path))
            except (RuntimeError, soundfile.SoundFileError, OSError) as exc:
                raise RecordingError(f"not a readable audio file ({_describe(exc)}): give a WAV"
                                     " or FLAC file", file=path, field=field) from None
            if infos[path].frames <= 0:
                raise RecordingError("the file holds no samples (zero length): copy it again "
                                     "from the recorder, or name the right file", file=path,
                                     field=field)
        info = infos[path]
        if channel > info.channels:
            raise RecordingError(f'mic "{mic.name}" is on channel {channel} but the file has '
                                 f"{info.channels} channel(s)", file=path,
                                 field=f"mics[{i}].channel")
        sources.append(_Source(mic.name, path, channel, field, int(info.frames)))
    rates = {p: int(inf.samplerate) for p, inf in infos.items()}
    first = sources[0].path
    for p, rate in rates.items():
        if rate != rates[first]:
            raise RecordingError(f"sample rate {rate} Hz differs from {rates[first]} Hz of "
                                 f"{first.name}: resample all recordings to one rate",
                                 file=p, field="sample rate")
    offsets = np.array([m.offset_s for m in site.mics], dtype=float)
    starts = start_time_offsets_s(site.mics)
    if starts is not None:
        offsets = offsets + starts
    drift = np.array([m.drift_ppm for m in site.mics], dtype=float)
    epoch = None
    if starts is not None:  # UTC of common time 0: the earliest start_time
        from locate.io.site import parse_start_time

        stamps = [parse_start_time(m.start_time) for m in site.mics]
        epoch = min(stamps, key=lambda w: (w[0] - stamps[0][0]) + w[1])
    rec = Recordings(tuple(sources), float(rates[first]), offsets, drift, epoch=epoch)
    notes = [container_note(p, inf) for p, inf in infos.items()]
    notes += [truncation_note(p, inf) for p, inf in infos.items()]
    rec.warnings[:0] = [n for n in notes if n]
    return rec


class Recordings:
    """Aligned reader over all mics of a site (built by :func:`open_recordings`).

    Attributes
    ----------
    sample_rate_hz : float
    n_mics : int
    mic_names : list of str
    offsets_s : ndarray, shape (N,)
        ``o_i``: common time of each mic's first sample (offset_s plus start-time offset).
    drift_ppm : ndarray, shape (N,)
    start_s, stop_s : float
        Common time span that every mic covers.
    duration_s : float
        ``stop_s - start_s``.
    warnings : list of str
        Open-time notes plus, deduplicated, what reads found (zero fill, clipping, dead mics).
    epoch : (int, float) or None
        UTC of common time 0 (whole POSIX seconds, fraction) when the recordings carry clock
        time (bext stamps or start_time); None otherwise.
    deployment : locate.io.deployment.Deployment or None
        Recorders of many files (:mod:`locate.io.deployment`): the span is every time some mic
        covers, and a mic is left out where it has no audio (:meth:`uncovered`), not zero-filled.
    """

    def __init__(self, sources, sample_rate_hz, offsets_s, drift_ppm, *, epoch=None,
                 deployment=None):
        self.epoch = epoch
        self.deployment = deployment  # locate.io.deployment.Deployment, or None
        self._sources = tuple(sources)
        self._part_k0 = [None if s.parts is None else np.array([p.k0 for p in s.parts])
                         for s in self._sources]
        self.sample_rate_hz = float(sample_rate_hz)
        self.mic_names = [s.mic for s in self._sources]
        self.n_mics = len(self._sources)
        self.offsets_s = np.asarray(offsets_s, dtype=float)
        self.drift_ppm = np.asarray(drift_ppm, dtype=float)
        self.warnings: list[str] = []
        self._warned: set = set()
        self._heard = np.zeros(self.n_mics, dtype=bool)  # a non-zero sample read so far
        self._silent_text: dict[int, str] = {}
        n = np.array([s.n_frames for s in self._sources], dtype=float)
        self._cover = np.stack([self.offsets_s,
                                self.offsets_s + n / (self.sample_rate_hz * self._scale())], 1)
        self.start_s = float(np.max(self._cover[:, 0]))
        self.stop_s = float(np.min(self._cover[:, 1]))
        if deployment is not None:  # every time that some mic covers; gaps are left out
            self.start_s = float(np.min(self._cover[:, 0]))
            self.stop_s = float(np.max(self._cover[:, 1]))
            self.duration_s = self.stop_s - self.start_s
            return
        if self.stop_s <= self.start_s:
            a, b = int(np.argmax(self._cover[:, 0])), int(np.argmin(self._cover[:, 1]))
            raise RecordingError(
                f'the recordings do not overlap in time: mic "{self.mic_names[a]}" starts at '
                f'{self._cover[a, 0]:.3f} s, after mic "{self.mic_names[b]}" ends at '
                f"{self._cover[b, 1]:.3f} s: check start_time and offset_s",
                file=self._sources[a].path, field="start_time")
        self.duration_s = self.stop_s - self.start_s
        if np.ptp(self._cover[:, 1]) > _LENGTH_WARN_S:
            self.warnings.append(f"recordings differ in length by {np.ptp(self._cover[:, 1]):.1f}"
                                 f" s: all mics cover {self.start_s:.3f}..{self.stop_s:.3f} s")

    def with_clocks(self, offsets_s, drift_ppm) -> Recordings:
        """The same files read with other clock offsets ``o_i`` and drifts, shapes (N,).

        ``offsets_s`` are total offsets (``offset_s`` plus start-time offsets), as
        :attr:`offsets_s`.  Used by clock calibration to re-measure with a first fit applied.
        """
        return Recordings(self._sources, self.sample_rate_hz, offsets_s, drift_ppm,
                          epoch=self.epoch, deployment=self.deployment)

    def subset(self, index) -> Recordings:
        """The same reader over the mics ``index`` (sequence of ints) only."""
        idx = [int(i) for i in index]
        dep = None if self.deployment is None else self.deployment.subset(idx)
        return Recordings([self._sources[i] for i in idx], self.sample_rate_hz,
                          self.offsets_s[idx], self.drift_ppm[idx], epoch=self.epoch,
                          deployment=dep)

    def clock_time(self, t_s, digits=3) -> str | None:
        """ISO 8601 UTC text of common time ``t_s``; None when the recordings carry no clock."""
        if self.epoch is None or t_s is None or not np.isfinite(t_s):
            return None
        from locate.io.filesets import utc_text

        return utc_text(self.epoch[0], self.epoch[1], float(t_s), digits=digits)

    def seconds_at(self, whole, frac=0.0) -> float:
        """Common time (s) of a UTC instant (whole POSIX seconds, fraction); needs a clock."""
        if self.epoch is None:
            raise RecordingError("the recordings carry no clock time (no bext stamps, no "
                                 "start_time): give times in seconds", field="start_s")
        return float(int(whole) - int(self.epoch[0])) + float(frac) - float(self.epoch[1])

    def uncovered(self, start_s, stop_s) -> list[list[tuple[float, float]]]:
        """Per mic, the parts of ``[start_s, stop_s)`` (common time) it has no audio for.

        Before a recorder starts, after it stops and in the gaps between its files.  Empty
        lists for a reader of single files (those zero-fill, with a warning, as before).
        """
        out = [[] for _ in self._sources]
        if self.deployment is None:
            return out
        scale = self._scale() * self.sample_rate_hz
        for i, s in enumerate(self._sources):
            holes = [(-np.inf, 0.0)] + [(float(a), float(b)) for a, b in
                                        self.deployment.gaps[i]] + [(float(s.n_frames), np.inf)]
            for a, b in holes:
                lo = self.offsets_s[i] + a / scale[i]
                hi = self.offsets_s[i] + b / scale[i]
                lo, hi = max(lo, start_s), min(hi, stop_s)
                if hi > lo:
                    out[i].append((float(lo), float(hi)))
        return out

    def covering(self, start_s, stop_s) -> np.ndarray:
        """Which mics have audio over all of ``[start_s, stop_s)``, bool (N,)."""
        return np.array([not u for u in self.uncovered(start_s, stop_s)], dtype=bool)

    @property
    def files(self) -> list[tuple[str, Path, int]]:
        """``(mic name, audio file, 1-based channel)`` for every mic."""
        return [(s.mic, s.path, s.channel) for s in self._sources]

    def _scale(self) -> np.ndarray:
        return 1.0 + self.drift_ppm * 1e-6

    def _warn(self, key, message):
        if key not in self._warned:
            self._warned.add(key)
            self.warnings.append(message)

    def _check_span(self, start_s, stop_s):
        start_s, stop_s = float(start_s), float(stop_s)
        if not (np.isfinite(start_s) and np.isfinite(stop_s)) or start_s >= stop_s:
            raise RecordingError(f"the span {start_s:g}..{stop_s:g} s is empty: start_s must be "
                                 "before stop_s", file=self._sources[0].path, field="start_s")
        tol = 0.5 / self.sample_rate_hz
        end_all, begin_all = float(np.max(self._cover[:, 1])), float(np.min(self._cover[:, 0]))
        if stop_s > end_all + tol:
            raise RecordingError(f"stop_s {stop_s:.3f} s is past the end of the recordings: they "
                                 f"last {end_all:.3f} s (all mics cover {self.start_s:.3f}.."
                                 f"{self.stop_s:.3f} s)", file=self._sources[0].path,
                                 field="stop_s")
        if start_s < begin_all - tol:
            raise RecordingError(f"start_s {start_s:.3f} s is before the recordings begin "
                                 f"({begin_all:.3f} s)", file=self._sources[0].path,
                                 field="start_s")
        return start_s, stop_s

    def read(self, start_s, stop_s, *, out=None, scratch=None, gaps_ok=False):
        """Read the common-time span ``[start_s, stop_s)`` of every mic.

        Parameters
        ----------
        start_s, stop_s : float
            Common time, seconds (see the module notes).
        out : ndarray, shape (N, T), float64, optional
            Written in place and returned when its shape fits (saves allocating a block).
        scratch : dict, optional
            Holds the frame buffers of the files between calls (used by :meth:`blocks`).
        gaps_ok : bool
            A deployment only: read spans where some mic has no audio (as zeros), for a
            caller that leaves it out there (:meth:`uncovered`).  Otherwise such a span is an
            error naming the mic, its files and the gap: no command computes on zeros.

        Returns
        -------
        signals : ndarray, shape (N, T)
            float64, full scale = 1; ``T = round((stop_s - start_s) fs)``.  Samples outside a
            mic's recording are zero (and a warning is recorded).
        residual_offset_s : ndarray, shape (N,)
            Common time of block sample ``n`` of mic ``i`` is
            ``start_s + n / fs + residual_offset_s[i]``; ``|residual| <= 0.5 / fs``.

        Raises
        ------
        RecordingError
            Empty span, span outside the recordings, or NaN/inf samples in it.
        """
        start_s, stop_s = self._check_span(start_s, stop_s)
        if self.deployment is not None and not gaps_ok:
            self._refuse_gaps(start_s, stop_s)
        fs = self.sample_rate_hz
        n_out = max(int(round((stop_s - start_s) * fs)), 1)
        scale = self._scale()
        k0 = np.round((start_s - self.offsets_s) * fs * scale).astype(np.int64)
        residual = k0 / (fs * scale) + self.offsets_s - start_s
        drifting = self.drift_ppm != 0.0
        span = np.where(drifting, np.ceil((n_out - 1) * scale).astype(np.int64), n_out - 1)
        pad = np.where(drifting, SINC_HALF_TAPS, 0)
        lo, hi = k0 - pad, k0 + span + pad + 1  # frames needed, [lo, hi) in mic samples
        if out is None or out.shape != (self.n_mics, n_out) or out.dtype != np.float64:
            self._check_memory(n_out, start_s, stop_s)
            try:
                out = np.empty((self.n_mics, n_out))
            except MemoryError:
                raise RecordingError(self._memory_text(n_out, start_s, stop_s),
                                     file=self._sources[0].path, field="stop_s") from None
        by_file: dict[Path, list[int]] = {}
        for i, s in enumerate(self._sources):
            if s.parts is not None:  # a recorder's many files (gaps read as zeros, not used)
                x = _read_parts(s, lo[i], hi[i], scratch, i, self._part_k0[i])
                if not np.isfinite(x).all():
                    self._check_finite(x, i, start_s, stop_s)
                out[i] = _sinc_interpolate(x, SINC_HALF_TAPS + np.arange(n_out) * scale[i]) \
                    if drifting[i] else x
                continue
            by_file.setdefault(s.path, []).append(i)
        for path, idx in by_file.items():
            f_lo, f_hi = int(lo[idx].min()), int(hi[idx].max())
            block = _read_frames(path, f_lo, f_hi, self._sources[idx[0]].n_frames,
                                 scratch=scratch)
            finite = bool(np.isfinite(block).all()) if block.dtype.kind == "f" else True
            for i in idx:
                s = self._sources[i]
                x = block[lo[i] - f_lo: hi[i] - f_lo, s.channel - 1]
                if not finite:
                    self._check_finite(x, i, start_s, stop_s)
                self._zero_fill_note(i, k0[i], k0[i] + span[i] + 1, start_s, stop_s)
                if drifting[i]:
                    pos = SINC_HALF_TAPS + np.arange(n_out) * scale[i]
                    out[i] = _sinc_interpolate(x, pos)
                else:
                    out[i] = x
        if self.deployment is None:
            self._note_signals(out)
        else:  # channel notes only of the mics with audio over the whole span
            have = np.flatnonzero(self.covering(start_s, stop_s))
            if have.size:
                for key, msg in _signal_notes(out[have], [self.mic_names[i] for i in have]):
                    self._warn(key, msg)
        return out, residual

    def _note_signals(self, out):
        """Clipped and dead channels; "silent" only while a mic has given nothing but zeros
        in everything read so far (a note said too early is taken back)."""
        heard = np.array([bool(np.any(out[i])) for i in range(self.n_mics)], dtype=bool)
        for i in np.flatnonzero(heard & ~self._heard):
            key = (self.mic_names[i], "silent")
            if key in self._warned:
                self.warnings[:] = [w for w in self.warnings if w != self._silent_text[i]]
        self._heard |= heard
        for key, msg in _signal_notes(out, self.mic_names):
            if key[1] == "silent":
                i = self.mic_names.index(key[0])
                if self._heard[i]:
                    continue
                self._silent_text[i] = msg
            self._warn(key, msg)

    def _memory_text(self, n_out, start_s, stop_s):
        need = self.n_mics * n_out * 8.0
        return (f"the span {start_s:.3f}..{stop_s:.3f} s ({n_out} samples x {self.n_mics} "
                f"mics) needs {need / 1e9:.2f} GB to hold; this machine allows a read of "
                f"{MEMORY_FRACTION * _memory_bytes() / 1e9:.2f} GB: analyse a shorter span "
                "(--from/--to)")

    def _check_memory(self, n_out, start_s, stop_s):
        if self.n_mics * n_out * 8.0 > MEMORY_FRACTION * _memory_bytes():
            raise RecordingError(self._memory_text(n_out, start_s, stop_s),
                                 file=self._sources[0].path, field="stop_s")

    def _refuse_gaps(self, start_s, stop_s):
        for i, holes in enumerate(self.uncovered(start_s, stop_s)):
            if holes:
                a, b = holes[0]
                raise RecordingError(
                    f'mic "{self.mic_names[i]}" has no audio from {a:.3f} to {b:.3f} s '
                    f"(recorder off, or between its files), inside the span {start_s:.3f}.."
                    f"{stop_s:.3f} s: choose a span that every mic covers (tdoa check shows "
                    "the coverage)", file=self._sources[i].path,
                    field=self.deployment.fields[i])

    def blocks(self, block_s, overlap_s=0.0, start_s=None, stop_s=None, *,
               reuse=False, gaps_ok=False):
        """Yield ``(t0_s, signals (N, T), residual_offset_s (N,))`` block after block.

        Blocks are ``block_s`` long and start every ``block_s - overlap_s`` seconds (both
        rounded to whole samples); the last block is cut at ``stop_s``.  ``start_s`` and
        ``stop_s`` default to the span that all mics cover.  Memory is one block.

        With ``reuse=True`` every block is read into the same arrays (no new memory per
        block, which is most of the cost of reading): a block is valid only until the next
        one is asked for; copy what must outlive it.
        """
        fs = self.sample_rate_hz
        block_n = int(round(float(block_s) * fs))
        hop_n = block_n - int(round(float(overlap_s) * fs))
        if block_n < 1:
            raise OptionError(f"block length {block_s!r} s is shorter than one sample",
                              field="window_s")
        if hop_n < 1 or overlap_s < 0:
            raise OptionError(f"overlap {overlap_s!r} s must be >= 0 and shorter than the block"
                              f" ({block_s!r} s)", field="hop_s")
        start = self.start_s if start_s is None else float(start_s)
        stop = self.stop_s if stop_s is None else float(stop_s)
        self._check_span(start, stop)
        n0, n_stop = int(round(start * fs)), int(round(stop * fs))
        k = n0
        buffer, scratch = None, ({} if reuse else None)
        while True:
            k_end = min(k + block_n, n_stop)
            signals, residual = self.read(k / fs, k_end / fs, out=buffer, scratch=scratch,
                                          gaps_ok=gaps_ok)
            if reuse:
                buffer = signals
            yield k / fs, signals, residual
            if k_end >= n_stop:
                break
            k += hop_n

    def _check_finite(self, x, i, start_s, stop_s):
        bad = ~np.isfinite(x)
        if np.any(bad):
            s = self._sources[i]
            raise RecordingError(f'{int(bad.sum())} NaN/inf samples in channel {s.channel} '
                                 f'(mic "{s.mic}") between {start_s:.3f} and {stop_s:.3f} s: '
                                 "the file is damaged; export it again, or choose a span "
                                 "(--from/--to) without them", file=s.path,
                                 field=f"channel {s.channel}")

    def _zero_fill_note(self, i, first, end, start_s, stop_s):
        s = self._sources[i]
        if first < 0:
            self._warn((s.mic, "before"), f'mic "{s.mic}": the span from {start_s:.3f} s starts '
                       "before its recording does; filled with zeros")
        if end > s.n_frames:
            self._warn((s.mic, "after"), f'mic "{s.mic}": the span to {stop_s:.3f} s runs past '
                       "the end of its recording; filled with zeros")


def _read_frames(path, lo, hi, n_frames, scratch=None) -> np.ndarray:
    """Frames ``[lo, hi)`` of a file, ``(hi - lo, channels)`` float32, zeros outside the file.

    float32 holds 24-bit PCM exactly and halves the memory of a block of many channels; the
    caller converts one channel at a time to float64.  ``scratch`` (a dict) keeps the buffer
    of each file for the next call of the same size.
    """
    try:
        return _read_frames_from(path, lo, hi, n_frames, scratch)
    except (RuntimeError, soundfile.SoundFileError) as exc:  # libsndfile: damaged file
        raise RecordingError(f"could not decode the audio between frames {lo} and {hi} "
                             f"({_describe(exc)}): the file is damaged; export or copy it "
                             "again from the recorder", file=path, field="audio") from None


def _read_frames_from(path, lo, hi, n_frames, scratch):
    with soundfile.SoundFile(str(path)) as f:
        shape = (hi - lo, f.channels)
        out = None if scratch is None else scratch.get(path)
        if out is None or out.shape != shape:
            out = np.zeros(shape, dtype=np.float32)
            if scratch is not None:
                scratch[path] = out
        a, b = max(lo, 0), min(hi, n_frames)
        if b > a:
            f.seek(a)
            f.read(frames=b - a, dtype="float32", always_2d=True, out=out[a - lo: b - lo])
        out[: max(min(a, hi) - lo, 0)] = 0.0  # before the file (a reused buffer holds old data)
        out[max(b, lo) - lo:] = 0.0  # after it
    return out


def _read_parts(source, lo, hi, scratch, key, part_k0) -> np.ndarray:
    """Mic samples ``[lo, hi)`` of a recorder's channel across its files, float64 ``(hi - lo,)``.

    Samples no file covers are zero (the reader's callers leave the mic out there, see
    :meth:`Recordings.uncovered`).  ``scratch`` keeps one buffer per mic, so memory is one
    block however many files the recorder wrote.
    """
    n = int(hi - lo)
    out = None if scratch is None else scratch.get(("parts", key))
    if out is None or out.shape != (n,):
        out = np.zeros(n)
        if scratch is not None:
            scratch[("parts", key)] = out
    else:
        out[:] = 0.0
    first = max(int(np.searchsorted(part_k0, lo, side="right")) - 1, 0)
    for part in source.parts[first:]:
        if part.k0 >= hi:
            break
        a, b = max(lo, part.k0), min(hi, part.k0 + part.n_frames)
        if b <= a:
            continue
        with soundfile.SoundFile(str(part.path)) as f:
            f.seek(int(a - part.k0))
            x = f.read(frames=int(b - a), dtype="float32", always_2d=True)
        out[a - lo: a - lo + x.shape[0]] = x[:, source.channel - 1]
    return out


@lru_cache(maxsize=2)
def _sinc_table(half_taps, beta, n_phases):
    """Kaiser-windowed sinc kernel, ``(n_phases + 1, 2 half_taps)``.

    Row p is the kernel for a target p / n_phases of a sample past tap ``m = 0``; columns are
    the taps ``m = -half_taps + 1 .. half_taps``.
    """
    from scipy.special import i0

    m = np.arange(-half_taps + 1, half_taps + 1)
    u = m[None, :] - np.arange(n_phases + 1)[:, None] / n_phases
    window = i0(beta * np.sqrt(np.clip(1.0 - (u / half_taps) ** 2, 0.0, 1.0))) / i0(beta)
    return np.sinc(u) * window


@lru_cache(maxsize=2)
def _farrow_coefficients(half_taps, beta, degree):
    """Polynomial (in the fractional position) fit of the windowed-sinc kernel.

    Returns ``(degree + 1, 2 half_taps)``: kernel(m, mu) = sum_q c[q, m] (2 mu - 1)^q, fitted by
    least squares to the exact kernel at 1025 phases (Farrow structure: Farrow 1988, "A
    continuously variable digital delay element", IEEE ISCAS).  Degree 10 reproduces the
    kernel to 1e-8 of its sum (measured), far below the window's own -80 dB side lobes.
    """
    table = _sinc_table(half_taps, beta, 1024)
    u = 2.0 * np.arange(1025) / 1024 - 1.0
    v = np.vander(u, degree + 1, increasing=True)
    coef, *_ = np.linalg.lstsq(v, table, rcond=None)
    return coef


def _sinc_interpolate(x, pos) -> np.ndarray:
    """Band-limited value of ``x`` at fractional indices ``pos`` (Kaiser-windowed sinc).

    Farrow form: each polynomial coefficient of the kernel is one FIR filter run over ``x``
    (direct convolution), and the outputs at the integer parts of ``pos`` are combined by
    Horner's rule in the fractional parts.  ``x`` must extend ``SINC_HALF_TAPS`` samples beyond the
    range of ``pos`` on both sides.
    """
    h = SINC_HALF_TAPS
    coef = _farrow_coefficients(h, SINC_KAISER_BETA, SINC_FARROW_DEGREE)
    x = np.asarray(x, dtype=float)
    base = np.floor(pos).astype(np.int64)
    u = 2.0 * (pos - base) - 1.0
    # y_q[b] = sum_j c_q[j] x[b + j - h + 1] = (x * c_q reversed)[b + h]
    idx = np.clip(base, 0, len(x) - 1) + h
    out = np.zeros(pos.shape)
    for q in range(coef.shape[0] - 1, -1, -1):  # Horner; loop over polynomial terms only
        out = out * u + np.convolve(x, coef[q, ::-1])[idx]
    return out


def _signal_notes(signals, mic_names):
    """``[(key, message)]`` for clipped and dead channels in ``signals (N, T)``."""
    x = np.asarray(signals, dtype=float)
    if x.ndim != 2 or x.shape[0] != len(mic_names):
        raise ValueError(f"signals must have shape (len(mic_names), T), got {x.shape!r}")
    notes = []
    n_ch, n = x.shape
    n_full = np.zeros(n_ch, dtype=np.int64)
    run = np.zeros(n_ch, dtype=bool)
    rms = np.zeros(n_ch)
    silent = np.zeros(n_ch, dtype=bool)
    for i in range(n_ch):  # one channel at a time: temporaries of one channel only
        full = (x[i] >= CLIP_LEVEL) | (x[i] <= -CLIP_LEVEL)
        n_full[i] = np.count_nonzero(full)
        if n_full[i] >= CLIP_RUN and n >= CLIP_RUN:
            run[i] = bool(np.any(np.all(np.stack([full[k: n - CLIP_RUN + 1 + k]
                                                  for k in range(CLIP_RUN)]), axis=0)))
        # einsum, not np.dot: BLAS threads cost 20 ms per call on a busy machine (measured)
        rms[i] = np.sqrt(np.einsum("i,i->", x[i], x[i]) / n) if n else 0.0
        silent[i] = not np.any(x[i])
    clipped = run | (n_full > CLIP_FRACTION * n)
    median = float(np.median(rms[~silent])) if np.any(~silent) else 0.0
    with np.errstate(divide="ignore"):
        below_db = 20.0 * np.log10(median / rms) if median > 0 else np.zeros_like(rms)
    for i, name in enumerate(mic_names):
        if clipped[i]:
            notes.append(((name, "clipped"), f'mic "{name}": {int(n_full[i])} samples at full '
                          "scale (clipped): its delays and levels are unreliable; record with "
                          "less gain"))
        if silent[i]:
            notes.append(((name, "silent"), f'mic "{name}": silent (all samples zero): dead '
                          "channel or wrong channel number?"))
        elif median > 0 and below_db[i] > DEAD_DB:
            notes.append(((name, "dead"), f'mic "{name}": {below_db[i]:.0f} dB below the median '
                          "channel: dead or unplugged mic?"))
    return notes


def check_signals(signals, mic_names) -> list[str]:
    """Warnings about clipped or dead channels.

    Parameters
    ----------
    signals : array_like, shape (N, T)
        Full scale = 1.
    mic_names : sequence of str, length N

    Returns
    -------
    list of str
        One message per problem, naming the mic.  Clipped: ``|x| >= 0.999`` on 3 or more
        consecutive samples, or on more than 0.01 % of the samples.  Dead: all zero, or rms
        more than 40 dB below the median channel.
    """
    return [msg for _, msg in _signal_notes(signals, list(mic_names))]


_FORMATS = {".wav": "WAV", ".flac": "FLAC"}


def write_audio(path, signals, sample_rate_hz, subtype=None) -> Path:
    """Write ``signals (N, T)`` (full scale = 1) to a WAV or FLAC file, atomically.

    The format follows the extension (``.wav``, ``.flac``); ``subtype`` defaults to
    ``"PCM_24"``.  The data go to a temporary file in the same folder that then replaces
    ``path`` (``os.replace``), so a reader never sees half a file.

    Raises
    ------
    ValueError
        Unknown extension, bad shape, non-finite samples, or samples beyond full scale for an
        integer subtype (they would be clipped).
    """
    p = Path(path)
    fmt = _FORMATS.get(p.suffix.lower())
    if fmt is None:
        raise ValueError(f"unknown audio extension {p.suffix!r}: use one of {sorted(_FORMATS)}")
    x = np.asarray(signals, dtype=float)
    if x.ndim == 1:
        x = x[None, :]
    if x.ndim != 2 or x.shape[1] == 0:
        raise ValueError(f"signals must have shape (n_channels, n_samples), got {x.shape!r}")
    if not np.all(np.isfinite(x)):
        raise ValueError("signals contain NaN or inf")
    subtype = subtype or "PCM_24"
    if subtype.startswith("PCM") and np.max(np.abs(x)) > 1.0:
        raise ValueError(f"peak {np.max(np.abs(x)):.3f} exceeds full scale (1.0): scale down")
    with atomic_target(p, suffix=p.suffix) as tmp:
        soundfile.write(tmp, x.T, int(round(sample_rate_hz)), subtype=subtype, format=fmt)
    return p
