"""``tdoa fix`` over a long deployment in time chunks: in this process, or on a Dask cluster.

The scan is cut into chunks that each own a part of the time axis and scan it with an overlap
on both sides; a chunk keeps the events first heard in its own part, so an event near a chunk
edge is found by both neighbours but kept by exactly one.  The chunks' scans start on the grid
of the whole scan's background segments (:class:`locate.signal.event_scan.EventStream`:
``background_s`` of 5 ms frames from the scan's start), so the frames, background segments and
detection rule a chunk sees in its own part are those of the whole scan, and the events and
fixes are those of one local run (the overlap must hold the longest event plus a background
segment either side; the default 30 s does for bangs).

The work of a chunk is :func:`run_chunk` (site file in, fix entries out); it runs in this
process, or on the workers of a Dask distributed scheduler, which must see the site and audio
files at the same paths.  A worker that dies mid-run has its chunks run again elsewhere by
the scheduler; the results are merged in time order either way.
"""

from __future__ import annotations

import uuid
from dataclasses import dataclass

import numpy as np

from locate.errors import NothingFoundError, OptionError
from locate.signal.events import FRAME_S

__all__ = ["Chunk", "plan_chunks", "run_chunk", "locate_chunked", "BACKGROUND_S",
           "DEFAULT_OVERLAP_S"]

BACKGROUND_S = 5.0  # the detector's background segment (EventStream default)
DEFAULT_OVERLAP_S = 30.0


@dataclass(frozen=True)
class Chunk:
    """Scan ``scan_s``; keep the events first heard in ``own_s`` (seconds, common time)."""

    index: int
    scan_s: tuple[float, float]
    own_s: tuple[float, float]


def plan_chunks(start_s, stop_s, sample_rate_hz, chunk_s, overlap_s=DEFAULT_OVERLAP_S):
    """Chunks covering ``[start_s, stop_s)`` whose scans start on the whole scan's grid.

    The grid is one background segment (``BACKGROUND_S`` of frames of
    ``round(FRAME_S fs)`` samples) counted in samples from ``start_s``; ``chunk_s`` and
    ``overlap_s`` are rounded up to it.
    """
    fs = float(sample_rate_hz)
    frame = max(int(round(FRAME_S * fs)), 1)
    seg = max(int(BACKGROUND_S / (frame / fs)), 4) * frame  # samples per background segment
    if not chunk_s or chunk_s <= 0:
        raise OptionError(f"chunk length {chunk_s!r} s must be positive", field="chunk_s")
    if overlap_s < 2 * BACKGROUND_S:
        raise OptionError(f"chunk overlap {overlap_s:g} s must be at least "
                          f"{2 * BACKGROUND_S:g} s (two background segments)",
                          field="chunk_overlap_s")
    n0, n1 = int(round(start_s * fs)), int(round(stop_s * fs))
    c = int(np.ceil(chunk_s * fs / seg)) * seg
    o = int(np.ceil(overlap_s * fs / seg)) * seg
    chunks = []
    for k, a in enumerate(range(n0, n1, c)):
        b = min(a + c, n1)
        lo, hi = max(a - o, n0), min(b + o, n1)
        own_hi = b if b < n1 else np.inf  # the last chunk owns its end
        chunks.append(Chunk(k, (lo / fs, hi / fs), (a / fs if k else -np.inf, own_hi / fs
                                                     if np.isfinite(own_hi) else np.inf)))
    return chunks


def run_chunk(site_path, chunk: Chunk, options: dict) -> dict:
    """One chunk's fixes: ``{"index", "entries", "warnings"}`` (runs on a worker)."""
    from locate.io.audio import open_recordings
    from locate.io.site import load_site
    from locate.workflows.locating import locate_recordings

    opts = dict(options)
    dims = opts.get("dims", 2)
    site = load_site(site_path, dims=dims)
    rec = open_recordings(site)
    try:
        r = locate_recordings(site, rec, scan_s=chunk.scan_s, own_s=chunk.own_s, **opts)
    except NothingFoundError as exc:
        return {"index": chunk.index, "entries": [],
                "warnings": list(getattr(exc, "warnings", []))}
    for entry in r["fixes"]:
        entry.pop("event", None)  # numbered within the chunk, not the recording
    return {"index": chunk.index, "entries": r["fixes"], "warnings": r["warnings"]}


def locate_chunked(site, recordings, *, chunk_s, overlap_s=DEFAULT_OVERLAP_S, scheduler=None,
                   progress=None, **options) -> dict:
    """The result of ``tdoa fix SITE`` (every event) computed chunk by chunk.

    Parameters
    ----------
    site : locate.io.site.Site
    recordings : locate.io.audio.Recordings
        Used for the span, the rate and the clock; each chunk opens its own reader.
    chunk_s, overlap_s : float
        Chunk length and overlap on each side, seconds (rounded up to the background grid).
    scheduler : str, optional
        Address of a Dask distributed scheduler (``tcp://host:port``); default: this process.
    progress : callable, optional
        Called with 1 as each chunk finishes.
    options
        Options of :func:`locate.workflows.locating.locate_recordings` (band_hz, dims,
        source_z_m, sound_speed_mps, threshold_db, reject).

    Raises
    ------
    NothingFoundError
        No chunk found an event.
    """
    from locate.workflows.fixing import add_clock_times, conditions_for, fix_result

    rec = recordings
    chunks = plan_chunks(rec.start_s, rec.stop_s, rec.sample_rate_hz, chunk_s, overlap_s)
    site_path = str(site.path)
    if scheduler is None:
        parts = []
        for ch in chunks:
            parts.append(run_chunk(site_path, ch, options))
            if progress:
                progress(1)
    else:
        parts = _run_dask(scheduler, site_path, chunks, options, progress)
    parts.sort(key=lambda p: p["index"])
    entries = sorted((e for p in parts for e in p["entries"]), key=lambda e: e["t_s"])
    warnings = list(site.warnings) + list(rec.warnings)
    warnings += [w for p in parts for w in p["warnings"]]
    cond = conditions_for(site, options.get("sound_speed_mps"))
    if not entries:
        err = NothingFoundError(f"no event stands out of the background between "
                                f"{rec.start_s:.2f} and {rec.stop_s:.2f} s (scanned in "
                                f"{len(chunks)} chunks)")
        err.warnings = list(dict.fromkeys(warnings))
        raise err
    result = fix_result(site, cond, entries, warnings=warnings, dims=options.get("dims", 2),
                        source_z_m=options.get("source_z_m", 0.0),
                        extra={"chunks": {"count": len(chunks), "chunk_s": float(chunk_s),
                                          "overlap_s": float(overlap_s),
                                          "scheduler": scheduler}})
    return add_clock_times(result, rec, site)


def _run_dask(address, site_path, chunks, options, progress):
    from distributed import as_completed

    from locate.workflows.batch import connect_scheduler

    client = connect_scheduler(address)
    with client:
        # pure=False: every chunk runs; retries: a chunk whose worker died runs again
        run = uuid.uuid4().hex[:12]
        futures = [client.submit(run_chunk, site_path, ch, options, pure=False, retries=2,
                                 key=f"tdoa-chunk-{run}-{ch.index}") for ch in chunks]
        parts = []
        for fut in as_completed(futures):
            parts.append(fut.result())
            if progress:
                progress(1)
    return parts
