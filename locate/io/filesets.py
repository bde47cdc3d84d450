"""Recorders that write many files: one time axis per recorder from its files' stamps.

A mic's ``file`` in the site file may be a glob (``"R2/*.wav"``) or a list of files.  The files
are placed on the recorder's own time axis (mic samples from the start of its first file):

1. by their BWF ``bext`` stamps (:mod:`locate.io.bext`), when every file has one;
2. else, from the mic's ``start_time`` in the site file, one after the other in name order;
3. else one after the other in name order from time 0 (no clock time; said in a note).

Gaps between files are kept as gaps (the mic is left out of what they cover, never filled
with zeros); overlapping files, mixed sample rates within a recorder and stamps that contradict
the sample rate are errors naming the file and the field.

Everything here is pure except :func:`describe_files`, which reads the headers.
"""

from __future__ import annotations

import datetime as _dt
import glob as _glob
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from locate.errors import RecordingError

__all__ = ["Part", "FileSet", "FileInfo", "expand_pattern", "is_pattern", "natural_key",
           "describe_files", "place_files", "utc_text", "SNAP_SAMPLES"]

SNAP_SAMPLES = 2  # stamps this close to back-to-back (in samples) are back-to-back
SNAP_WHOLE_S = 1.0  # ... or this close, when a stamp has only whole seconds


@dataclass(frozen=True)
class Part:
    """One file of a recorder: ``n_frames`` frames from mic sample ``k0`` of its time axis."""

    path: Path
    k0: int
    n_frames: int


@dataclass(frozen=True)
class FileInfo:
    """What placing needs of one file (from its header and its ``bext`` chunk)."""

    path: Path
    n_frames: int
    sample_rate_hz: int
    channels: int
    stamp: tuple[int, float] | None = None  # (whole POSIX s on the recorder clock, fraction)
    stamp_resolution_s: float = 0.0


@dataclass(frozen=True)
class FileSet:
    """A recorder's files on one axis.

    Attributes
    ----------
    parts : tuple of Part
        In time order; ``parts[0].k0 == 0``.
    sample_rate_hz : int
    source : str
        Where the placement came from: ``"bext"``, ``"start_time"`` or ``"name order"``.
    start : (int, float) or None
        UTC start of the first file: whole POSIX seconds and the fraction; None without clock.
    gaps : tuple of (int, int)
        Uncovered ``[k_lo, k_hi)`` mic-sample spans between files.
    notes : list of str
    """

    parts: tuple
    sample_rate_hz: int
    source: str
    start: tuple[int, float] | None
    gaps: tuple = ()
    notes: list = field(default_factory=list)

    @property
    def n_frames(self) -> int:
        """Mic samples from the first file's start to the last file's end."""
        last = self.parts[-1]
        return last.k0 + last.n_frames


_MAGIC = re.compile(r"[*?\[]")


def is_pattern(text: str) -> bool:
    """Whether a site-file ``file`` value is a glob pattern."""
    return bool(_MAGIC.search(str(text)))


def natural_key(path) -> list:
    """Sort key: names compared with their digit runs as numbers (``f9`` before ``f10``)."""
    return [int(t) if t.isdigit() else t.lower() for t in re.split(r"(\d+)", str(path))]


def expand_pattern(folder: Path, pattern: str) -> list[Path]:
    """Files matching a glob relative to ``folder``, in natural name order (folders skipped)."""
    base = Path(pattern).expanduser()
    full = base if base.is_absolute() else Path(folder) / base
    hits = [Path(h) for h in _glob.glob(str(full), recursive=True)]
    return sorted((h for h in hits if h.is_file()), key=natural_key)


def describe_files(paths, field_name, zone_s=0) -> list[FileInfo]:
    """Header, length and ``bext`` stamp of each file (the I/O part).

    ``zone_s`` is the recorder clock's offset from UTC in seconds (``+01:00`` -> 3600); the
    stamps returned are UTC.
    """
    import soundfile

    from locate.io.bext import read_bext, read_flac_bext

    out = []
    for p in paths:
        p = Path(p)
        if not p.is_file():
            raise RecordingError(f"file not found (named by {field_name})", file=p,
                                 field=field_name)
        try:
            info = soundfile.info(str(p))
        except (RuntimeError, soundfile.SoundFileError) as exc:
            text = str(exc).strip().splitlines()
            raise RecordingError(f"not a readable audio file ({text[-1] if text else exc}): "
                                 "give WAV or FLAC files", file=p, field=field_name) from None
        if info.frames <= 0:
            raise RecordingError("the file holds no samples (zero length): leave it out or "
                                 "copy it again from the recorder", file=p, field=field_name)
        stamp, res = None, 0.0
        if str(info.format) in ("WAV", "WAVEX", "RF64", "FLAC"):
            b = read_flac_bext(p) if str(info.format) == "FLAC" else read_bext(p)
            if b is not None:
                whole, frac = b.start(info.samplerate, file=p)
                stamp = (whole - int(zone_s), frac)
                res = SNAP_WHOLE_S if b.time_reference == 0 else 1.0 / info.samplerate
        out.append(FileInfo(p, int(info.frames), int(info.samplerate), int(info.channels),
                            stamp, res))
    return out


def place_files(infos, *, start_time=None, field_name="file", ordered_by="name") -> FileSet:
    """Place a recorder's files on one axis (rules in the module notes).

    Parameters
    ----------
    infos : sequence of FileInfo
        In name order (the fallback order).
    start_time : (int, float), optional
        UTC start of the first file from the site file (used when the files carry no stamps).
    field_name : str
        The site-file field that named the files (for messages).
    ordered_by : str
        How the fallback order was chosen, for the note (``"name"`` or ``"list"``).

    Raises
    ------
    RecordingError
        Mixed sample rates, some files stamped and others not, overlapping files.
    """
    infos = list(infos)
    if not infos:
        raise RecordingError("no files to place", field=field_name)
    fs = infos[0].sample_rate_hz
    for f in infos[1:]:
        if f.sample_rate_hz != fs:
            raise RecordingError(f"sample rate {f.sample_rate_hz} Hz differs from {fs} Hz of "
                                 f"{infos[0].path.name}, the recorder's first file: one "
                                 "recorder must keep one rate", file=f.path, field="sample rate")
    stamped = [f.stamp is not None for f in infos]
    notes = []
    if all(stamped):
        return _by_stamps(infos, fs, notes)
    if any(stamped):
        bad = infos[stamped.index(False)]
        raise RecordingError(f"has no bext time stamp while other files of the recorder "
                             f"({infos[stamped.index(True)].path.name}) have one: the files "
                             "cannot be placed in time together; leave it out", file=bad.path,
                             field="bext")
    parts, k = [], 0
    for f in infos:
        parts.append(Part(f.path, k, f.n_frames))
        k += f.n_frames
    order = "in the order listed" if ordered_by == "list" else "in name order"
    if start_time is not None:
        source = "start_time"
        if len(infos) > 1:
            notes.append(f"{field_name}: {len(infos)} files without bext stamps placed back to "
                         f"back {order} from start_time")
    else:
        source = "name order"
        notes.append(f"{field_name}: {len(infos)} file(s) without bext stamps or start_time "
                     f"placed back to back {order}: no clock time")
    return FileSet(tuple(parts), fs, source, start_time, (), notes)


def _by_stamps(infos, fs, notes) -> FileSet:
    order = sorted(infos, key=lambda f: (f.stamp[0], f.stamp[1], natural_key(f.path)))
    w0, f0 = order[0].stamp
    parts, gaps = [], []
    end = None
    prev = None
    for f in order:
        k0 = (f.stamp[0] - w0) * fs + int(round((f.stamp[1] - f0) * fs))
        if prev is not None:
            gap = k0 - end
            snap = max(SNAP_SAMPLES, int(round(max(f.stamp_resolution_s,
                                                   prev.stamp_resolution_s) * fs)))
            if abs(gap) <= snap:
                if gap != 0 and snap > SNAP_SAMPLES:
                    notes.append(f"{f.path.name}: its whole-second stamp is {gap / fs:+.2f} s "
                                 f"from the end of {prev.path.name}: taken as back to back")
                k0 = end
            elif gap < 0:
                rate = prev.n_frames / ((k0 - parts[-1].k0) / fs) if k0 > parts[-1].k0 else 0
                raise RecordingError(
                    f"stamped {_dur(-gap / fs)} before the end of {prev.path.name} "
                    f"({prev.n_frames} frames = {prev.n_frames / fs:.3f} s at {fs} Hz, stamps "
                    f"{(k0 - parts[-1].k0) / fs:.3f} s apart"
                    + (f", as if recorded at {rate:.0f} Hz" if rate > 0 else "")
                    + "): overlapping files, or a sample rate that contradicts the stamps",
                    file=f.path, field="bext.TimeReference")
            else:
                gaps.append((end, k0))
        parts.append(Part(f.path, k0, f.n_frames))
        end = k0 + f.n_frames
        prev = f
    _check_rate(parts, fs)
    return FileSet(tuple(parts), fs, "bext", (w0, f0), tuple(gaps), notes)


STANDARD_RATES_HZ = (8000, 11025, 16000, 22050, 24000, 32000, 44100, 48000, 88200, 96000,
                     176400, 192000)  # common practice (audio recorders)


def _check_rate(parts, fs):
    """Refuse stamps whose spacing says the files were recorded at another standard rate.

    Files that all start ``r`` times their length apart, with ``r`` the ratio of ``fs`` to
    another standard rate (within 0.1 %), were written at that rate and labelled ``fs`` (or
    stamped with a clock counting at it): every file would leave the same proportional gap.
    """
    if len(parts) < 3:
        return
    r = np.array([(b.k0 - a.k0) / a.n_frames for a, b in zip(parts[:-1], parts[1:])])
    if np.ptp(r) > 2e-3 * r.mean() or abs(r.mean() - 1.0) < 2e-3:
        return
    true_rate = fs / r.mean()
    for rate in STANDARD_RATES_HZ:
        if rate != fs and abs(true_rate / rate - 1.0) < 1e-3:
            raise RecordingError(
                f"its files start {r.mean():.4f} times their length apart: the stamps say the "
                f"audio ran at {rate} Hz, but the header says {fs} Hz (a rate that contradicts "
                "the stamps): set the right rate, or give start_time and leave out the stamps",
                file=parts[0].path, field="sample rate")


def _dur(s: float) -> str:
    return f"{s:.3f} s" if s < 60 else f"{s / 60:.1f} min"


def utc_text(whole: int, frac: float, seconds: float = 0.0, *, digits: int = 3) -> str:
    """ISO 8601 UTC text of ``whole + frac + seconds`` (POSIX), e.g. ``2026-05-14T21:03:07.250Z``.

    Whole and fractional parts are added separately so that the milliseconds of a time weeks
    into a deployment are exact to the float's resolution of the offset, not of the epoch.
    """
    extra = float(frac) + float(seconds)
    sec = int(whole) + int(extra // 1)
    rest = extra - extra // 1
    scale = 10 ** digits
    ticks = int(round(rest * scale))
    if ticks >= scale:
        sec, ticks = sec + 1, ticks - scale
    t = _dt.datetime.fromtimestamp(sec, tz=_dt.timezone.utc)
    text = t.strftime("%Y-%m-%dT%H:%M:%S")
    return f"{text}.{ticks:0{digits}d}Z" if digits > 0 else text + "Z"
