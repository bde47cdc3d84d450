"""Opening a deployment: recorders that write many timestamped files, on one common time base.

Used by :func:`locate.io.audio.open_recordings` when some mic's ``file`` is a glob or a list.
Each recorder's files are placed on its own axis (:mod:`locate.io.filesets`); the recorders
are then put on the common time base of :mod:`locate.io.audio` by their clock times:

    o_i = offset_s_i + (start_i - earliest start),

with ``start_i`` the UTC start of recorder i's first file (its ``bext`` stamp, corrected by the
mic's ``time_zone``, or its ``start_time``).  Declared ``offset_s`` and ``drift_ppm`` apply per
recorder as for single files.  Common time 0 is the earliest start; :attr:`Recordings.epoch`
holds its UTC.  Without clock times the recorders all start at 0 (plus ``offset_s``).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from locate.errors import RecordingError
from locate.io.filesets import describe_files, place_files
from locate.io.site import parse_start_time
from locate.io.site_tables import zone_seconds

__all__ = ["Deployment", "plan_deployment", "coverage_rows", "START_AGREE_S"]

START_AGREE_S = 1.0  # a start_time beside bext stamps must agree with them this well


@dataclass(frozen=True)
class Deployment:
    """What the reader knows of each recorder's files (one entry per mic, in site order).

    ``filesets`` are :class:`locate.io.filesets.FileSet`; ``gaps`` are the uncovered
    ``[k_lo, k_hi)`` mic-sample spans of each mic.
    """

    filesets: tuple
    fields: tuple
    gaps: tuple = ()
    notes: tuple = field(default_factory=tuple)

    def subset(self, idx) -> Deployment:
        return Deployment(tuple(self.filesets[i] for i in idx),
                          tuple(self.fields[i] for i in idx),
                          tuple(self.gaps[i] for i in idx), self.notes)


def _mic_files(site, i):
    m = site.mics[i]
    if m.files is not None:
        return list(m.files), f"mics[{i}].file", m.files_order or "name"
    path, _ = site.mic_source(i)
    fld = f"mics[{i}].file" if m.file is not None else "recording.file"
    if path is None:
        raise RecordingError(f'mic "{m.name}" has no recording: give [recording] file or a '
                             "file for this mic", file=site.path, field=f"mics[{i}].file")
    return [path], fld, "list"


def plan_deployment(site):
    """What :func:`locate.io.audio.open_recordings` needs to read every recorder's files.

    Returns
    -------
    dict
        ``sources`` (per mic: mic name, first file, channel, field, frames, parts),
        ``sample_rate_hz``, ``offsets_s`` (N,), ``drift_ppm`` (N,), ``epoch`` ((int, float)
        or None) and ``deployment`` (:class:`Deployment`).

    Raises
    ------
    RecordingError
        A glob matched nothing, a file is unreadable, a channel is missing from a file, sample
        rates differ (within a recorder or between recorders), files overlap, a ``bext`` chunk
        is corrupt or contradicts the rate, or only some recorders carry clock time.
    """
    cache, filesets, fields, sources, notes = {}, [], [], [], []
    for i, m in enumerate(site.mics):
        paths, fld, order = _mic_files(site, i)
        if not paths:
            raise RecordingError(f"{fld} matches no file: nothing to read for mic "
                                 f'"{m.name}"', file=site.path, field=fld)
        zone = zone_seconds(m.time_zone)
        key = (tuple(paths), zone, m.start_time)
        if key not in cache:
            infos = describe_files(paths, fld, zone)
            start = None
            if m.start_time:
                start = parse_start_time(m.start_time)
            cache[key] = (infos, place_files(infos, start_time=start, field_name=fld,
                                             ordered_by=order))
        infos, fs_set = cache[key]
        if fs_set.source == "bext" and m.start_time:
            given = parse_start_time(m.start_time)
            off = (given[0] - fs_set.start[0]) + (given[1] - fs_set.start[1])
            if abs(off) > START_AGREE_S:
                raise RecordingError(
                    f"start_time {m.start_time} is {off:+.3f} s from the bext stamp of "
                    f"{fs_set.parts[0].path.name} (time_zone {m.time_zone or 'UTC'}): the "
                    "stamps place the files; correct or remove start_time, or give the "
                    "recorder's time_zone", file=site.path, field=f"mics[{i}].start_time")
        channel = m.channel if m.channel is not None else 1
        for f in infos:
            if channel > f.channels:
                raise RecordingError(f'mic "{m.name}" is on channel {channel} but the file '
                                     f"has {f.channels} channel(s)", file=f.path,
                                     field=f"mics[{i}].channel")
        if fs_set.source == "bext" and m.time_zone is None:
            notes.append("bext stamps carry no time zone: read as UTC (give time_zone = "
                         '"+hh:mm" for a mic whose recorder kept local time)')
        notes.extend(fs_set.notes)
        filesets.append(fs_set)
        fields.append(fld)
        sources.append((m.name, paths[0], channel, fld, fs_set.n_frames, fs_set.parts))
    rate = filesets[0].sample_rate_hz
    for f in filesets:
        if f.sample_rate_hz != rate:
            raise RecordingError(f"sample rate {f.sample_rate_hz} Hz differs from {rate} Hz of "
                                 f'mic "{site.mics[0].name}": resample all recordings to one '
                                 "rate", file=f.parts[0].path, field="sample rate")
    clocked = [f.start is not None for f in filesets]
    if any(clocked) and not all(clocked):
        k = clocked.index(False)
        ref = clocked.index(True)
        raise RecordingError(f'mic "{site.mics[k].name}" has no clock time (no bext stamp, no '
                             f'start_time) while mic "{site.mics[ref].name}" has: give '
                             "start_time for it, or leave every clock out",
                             file=filesets[k].parts[0].path, field=f"mics[{k}].start_time")
    offsets = np.array([m.offset_s for m in site.mics], dtype=float)
    epoch = None
    if all(clocked):
        whole = np.array([f.start[0] for f in filesets], dtype=np.int64)
        frac = np.array([f.start[1] for f in filesets], dtype=float)
        rel = (whole - whole.min()).astype(float) + frac
        first = int(np.argmin(rel))
        epoch = (int(whole[first]), float(frac[first]))
        offsets = offsets + (rel - rel[first])
        recorders = {tuple(f.parts) for f in filesets}
        undeclared = all(m.clock_sd_s is None and not m.offset_s for m in site.mics)
        if len(recorders) > 1 and undeclared:
            notes.append("the recorders are placed by their own clocks' stamps: a fix needs "
                         "them in step to well under a millisecond; unless they share a "
                         "synchronised clock (GPS, timecode), calibrate them with tdoa sync or "
                         "declare clock_sd_s")
    drift = np.array([m.drift_ppm for m in site.mics], dtype=float)
    dep = Deployment(tuple(filesets), tuple(fields), tuple(f.gaps for f in filesets),
                     tuple(dict.fromkeys(notes)))
    return dict(sources=sources, sample_rate_hz=float(rate), offsets_s=offsets,
                drift_ppm=drift, epoch=epoch, deployment=dep)


def coverage_rows(rec) -> list[dict]:
    """Each recorder's coverage on the common time base, for ``tdoa check`` and the docs.

    Returns one dict per mic: ``mic``, ``files``, ``start_s``, ``stop_s``, ``start_utc``,
    ``stop_utc`` (None without clock), ``sample_rate_hz``, ``source`` and ``gaps`` (list of
    ``(start_s, stop_s)`` common time).
    """
    dep = rec.deployment
    rows = []
    if dep is None:
        return rows
    scale = rec.sample_rate_hz * (1.0 + rec.drift_ppm * 1e-6)
    for i, (name, fset) in enumerate(zip(rec.mic_names, dep.filesets)):
        t = lambda k, i=i: float(rec.offsets_s[i] + k / scale[i])  # noqa: E731
        a, b = t(0), t(fset.n_frames)
        gaps = [(t(lo), t(hi)) for lo, hi in dep.gaps[i]]
        rows.append(dict(mic=name, files=len(fset.parts), start_s=a, stop_s=b,
                         start_utc=rec.clock_time(a), stop_utc=rec.clock_time(b),
                         sample_rate_hz=fset.sample_rate_hz, source=fset.source, gaps=gaps,
                         gaps_utc=[(rec.clock_time(x), rec.clock_time(y)) for x, y in gaps]))
    return rows
