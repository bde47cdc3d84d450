"""Which band to analyse a moving source in when its sound is an engine's: above its lines.

An engine or a propeller radiates a series of harmonics of its firing or blade-passing
frequency over a broadband floor.  In a harmonic band the cross-correlation of two mics peaks
every 1 / f0 seconds (side lobes at the harmonic spacing, common practice), far more often than
the largest possible delay, so a delay picked there may be a side lobe.  The broadband part
above the lines carries no such ambiguity.  :func:`band_above_lines_hz` finds, from the mean
power spectrum of the mics, the highest frequency that still holds strong tonal lines and the
band above it where the sound stands over the background floor.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage
from scipy import signal as ssig

__all__ = ["band_above_lines_hz", "LINE_DB", "FLOOR_DB"]

LINE_DB = 10.0    # a line stands this far above the spectrum's running median (common practice)
FLOOR_DB = 6.0    # the band must stand this far above the background floor (common practice)


def band_above_lines_hz(signals, sample_rate_hz, *, resolution_hz=4.0, block_s=1.0,
                        min_octaves=0.5):
    """The broadband stretch above a sound's harmonic lines, or None.

    The Welch power spectrum (scipy.signal.welch, Hann, ``resolution_hz`` bins) of each mic in
    each ``block_s`` block is compared with its running median over 25 bins: a bin more than
    :data:`LINE_DB` above it is a line; so is one of the mean spectrum of the mics over the
    whole span.  The band starts above the highest line (by 1/6 octave) and ends where the
    spectrum, smoothed over 1/3 octave, falls to within :data:`FLOOR_DB` of its lowest value
    below 0.45 fs (the background floor).

    Parameters
    ----------
    signals : array_like, shape (N, T)
    sample_rate_hz : float
    resolution_hz : float
        Bin width of the spectrum.
    block_s : float
        Length of the blocks searched for lines.
    min_octaves : float
        Narrowest band worth proposing.

    Returns
    -------
    (lo_hz, hi_hz, top_line_hz) or None
        None when no lines are found (nothing to stay above) or no band of ``min_octaves``
        stands over the floor above them.
    """
    x = np.asarray(signals, float)
    fs = float(sample_rate_hz)
    nper = int(min(x.shape[-1], 2 ** int(np.ceil(np.log2(fs / resolution_hz)))))
    f, p = ssig.welch(x, fs, nperseg=nper, axis=-1)
    p = np.mean(p, axis=0)
    keep = (f >= 20.0) & (f <= 0.45 * fs)
    f, p = f[keep], p[keep]
    if f.size < 50:
        return None
    # lines block by block (``block_s``), each mic on its own: a moving source's Doppler shift
    # changes over the span and differs between mics, which smears its lines in a long average
    n_blk = max(1, int(x.shape[-1] // int(block_s * fs)))
    db = 10.0 * np.log10(np.maximum(p, 1e-300))
    hit = np.flatnonzero(db - ndimage.median_filter(db, size=25, mode="nearest") > LINE_DB)
    top = float(f[hit[-1]]) if hit.size else 0.0
    for blk in np.array_split(x, n_blk, axis=-1):
        _, pb = ssig.welch(blk, fs, nperseg=min(nper, blk.shape[-1]), axis=-1)
        db = 10.0 * np.log10(np.maximum(pb[:, keep], 1e-300))
        lines = db - ndimage.median_filter(db, size=(1, 25), mode="nearest") > LINE_DB
        hit = np.flatnonzero(lines.any(axis=0))
        if hit.size:
            top = max(top, float(f[hit[-1]]))
    if top == 0.0:
        return None
    # 1/3-octave smoothing: mean power over [f 2^-1/6, f 2^1/6]
    cum = np.concatenate([[0.0], np.cumsum(p)])
    a = np.searchsorted(f, f * 2 ** (-1 / 6))
    b = np.searchsorted(f, f * 2 ** (1 / 6), side="right")
    smooth = 10.0 * np.log10(np.maximum((cum[b] - cum[a]) / np.maximum(b - a, 1), 1e-300))
    floor = float(np.min(smooth))
    lo = top * 2 ** (1 / 6)
    above = (f >= lo) & (smooth >= floor + FLOOR_DB)
    if not np.any(above):
        return None
    # the first contiguous stretch above the floor, from lo up
    idx = np.flatnonzero(above)
    gaps = np.flatnonzero(np.diff(idx) > 1)
    end = idx[gaps[0]] if gaps.size else idx[-1]
    hi = float(f[end])
    lo = float(max(lo, f[idx[0]]))
    if hi < lo * 2 ** min_octaves:
        return None
    return lo, hi, top
