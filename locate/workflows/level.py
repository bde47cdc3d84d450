"""``tdoa level``: band levels at the mics over a fix's span -> source sound power -> receivers.

Orchestration over :mod:`locate.physics.levels` (pure) and a :class:`locate.io.audio.Recordings`
reader.
"""

from __future__ import annotations

import numpy as np

from locate.errors import OptionError, ResultFileError
from locate.physics import levels
from locate.results.documents import jsonable

__all__ = ["level_for_fix"]


BACKGROUND_MARGIN_DB = 6.0  # a background span must be this much quieter in the source band


def _background_span(entry, recordings, length_s):
    """A span of the same length just before the fix's span (or after it at the start)."""
    a, b = entry["span_s"]
    lo = a - 0.05 - length_s
    if lo >= recordings.start_s:
        return lo, a - 0.05
    hi = b + 0.05 + length_s
    if hi <= recordings.stop_s:
        return b + 0.05, hi
    return None


def _active_duration_s(aligned, background, fs, frame_s=0.01, above_db=10.0):
    """How long the (emission-aligned) sound stands 10 dB above the background."""
    frame = max(int(frame_s * fs), 1)
    n = aligned.shape[1] // frame
    if n < 2 or background.shape[1] < frame:
        return None
    p = np.mean(aligned[:, : n * frame].reshape(len(aligned), n, frame) ** 2, axis=(0, 2))
    m = background.shape[1] // frame
    q = np.median(np.mean(background[:, : m * frame].reshape(len(background), m, frame) ** 2,
                          axis=(0, 2)))
    active = np.count_nonzero(p > q * 10 ** (above_db / 10))
    return active * frame / fs if active else None


def level_for_fix(recordings, site, cond, entry, *, hemisphere=False, result_path=None):
    """Source sound power per octave band and predicted levels at the site's receivers.

    Parameters
    ----------
    recordings : locate.io.audio.Recordings
    site : locate.io.site.Site
    cond : locate.workflows.fixing.Conditions
    entry : dict
        One fix of a ``tdoa-result/1`` result (needs ``position_m``, ``span_s``,
        ``covariance_m2``).
    hemisphere : bool
        Source on hard ground radiating into a half space.

    Returns
    -------
    dict
        The ``"kind": "level"`` part (see docs/result-schema.md), plus per-mic band levels.
    """
    if "span_s" not in entry:
        raise ResultFileError("the fix has no span_s: re-run tdoa fix with this version",
                              file=result_path, field="fixes[].span_s")
    source = np.asarray(entry["position_m"], dtype=float)
    cov = np.asarray(entry["covariance_m2"], dtype=float)
    a, b = entry["span_s"]
    signals, _ = recordings.read(a, b)
    fs = recordings.sample_rate_hz
    mics = site.positions_m
    dist = np.linalg.norm(mics - source[None, :], axis=1)
    # Align the mics on emission time so that every mic integrates the same stretch of the
    # source's sound (the span covers the event at every mic, so it is longer than that).
    shift = np.round((dist - dist.min()) / cond.sound_speed_mps * fs).astype(int)
    length = signals.shape[1] - int(shift.max())
    if length < int(0.02 * fs):
        raise ResultFileError("the fix's span is too short for a level estimate",
                              file=result_path, field="fixes[].span_s")
    aligned = np.stack([signals[k, s0:s0 + length] for k, s0 in enumerate(shift)])
    cal = [m.full_scale_db_spl for m in site.mics]
    calibrated = all(c is not None for c in cal)
    fs_db = np.array([c if c is not None else 0.0 for c in cal]) if calibrated else None
    bands = levels.OCTAVE_BANDS_HZ
    lp = levels.octave_band_levels_db(aligned, fs, full_scale_db_spl=fs_db, bands_hz=bands)
    notes = []
    bg_span = _background_span(entry, recordings, length / fs)
    active_s = length / fs
    lp_bg = None
    if bg_span is not None:
        bg, _ = recordings.read(*bg_span)
        bg = bg[:, :length]
        lp_bg = levels.octave_band_levels_db(bg, fs, full_scale_db_spl=fs_db, bands_hz=bands)
        if not _quieter(lp, lp_bg, bands, entry.get("band_hz")):
            lp_bg = None
            notes.append("the sound goes on beside the fix's span (a steady source?): there is "
                         "no background span to correct with")
    if lp_bg is not None:
        lp = levels.background_corrected_db(lp, lp_bg)
        active_s = _active_duration_s(aligned, bg, fs) or active_s
    else:
        if bg_span is None:
            notes.append("no background span beside the event: levels are not "
                         "noise-corrected")
        lp, outside = _outside_source_band(lp, bands, entry.get("band_hz"))
        if outside:
            notes.append("band(s) " + ", ".join(f"{b:g} Hz" for b in outside) + " lie "
                         "outside the band the source was located in and could not be "
                         "noise-corrected: left out (they would carry background noise, "
                         "back-propagated as if it were the source)")
    # level while the source sounds: the energy over the window spread over its active part
    lp = lp + 10.0 * np.log10(length / fs / active_s)
    if np.any(dist < 0.5):
        raise OptionError("the source is within 0.5 m of a mic: back-propagation is not "
                          "meaningful there", file=result_path, field="position_m")
    lw_mics = levels.source_power_level_db(lp, dist, bands, cond.temperature_c,
                                           cond.relative_humidity, site.air.pressure_kpa,
                                           hemisphere=hemisphere)
    lw, spread = levels.combine_mics(lw_mics)
    # position uncertainty -> distance uncertainty -> level uncertainty (per mic, worst)
    unit = (mics - source[None, :]) / dist[:, None]
    dist_sd = np.sqrt(np.clip(np.einsum("mi,ij,mj->m", unit, cov, unit), 0.0, None))
    lw_sd = float(np.max(levels.level_uncertainty_db(dist, dist_sd)))
    receivers = []
    for r in site.receivers:
        pred = levels.receiver_levels_db(lw, source, r.position_m, bands, cond.temperature_c,
                                         cond.relative_humidity, site.air.pressure_kpa,
                                         barriers=site.barriers,
                                         sound_speed_mps=cond.sound_speed_mps,
                                         hemisphere=hemisphere, receiver_name=r.name)
        receivers.append((r.name, pred))
    cautions = list(levels.CAUTIONS)
    if not calibrated:
        cautions.insert(0, "No calibration (full_scale_db_spl) was given for every mic: levels "
                           "are relative to digital full scale (dBFS), not sound pressure.")
    out = levels.level_result(
        bands, lw, spread, receivers, cautions=cautions,
        units="dB re 1 pW" if calibrated else "dB re full scale (uncalibrated)",
        calibrated=calibrated, t_s=entry.get("t_s"), span_s=[a, b],
        position_m=[float(v) for v in source],
        lw_position_sd_db=round(lw_sd, 3),
        active_duration_s=round(float(active_s), 4),
        mics=[{"name": m.name, "distance_m": round(float(d), 3),
               "lp_db": jsonable(np.round(row, 2))}
              for m, d, row in zip(site.mics, dist, lp)],
        notes=notes,
    )
    return out


def _outside_source_band(lp, bands, band_hz):
    """Blank (NaN) the octave bands wholly outside the fix's coherent band ``band_hz``."""
    if band_hz is None or len(band_hz) != 2:
        return lp, []
    lo, hi = levels.octave_band_edges_hz(bands)
    outside = (hi <= float(band_hz[0])) | (lo >= float(band_hz[1]))
    if not outside.any():
        return lp, []
    lp = np.array(lp, dtype=float)
    lp[..., outside] = np.nan
    return lp, [b for b, o in zip(bands, outside) if o]


def _quieter(lp, lp_bg, bands, band_hz, margin_db=BACKGROUND_MARGIN_DB):
    """Is the background span at least ``margin_db`` below the fix's span in the source band?"""
    lo, hi = levels.octave_band_edges_hz(bands)
    sel = np.ones(len(bands), bool) if band_hz is None else (
        (hi > float(band_hz[0])) & (lo < float(band_hz[1])))
    with np.errstate(divide="ignore"):
        def total(x):
            x = np.asarray(x, dtype=float)[..., sel]
            return 10.0 * np.log10(np.nansum(10.0 ** (x / 10.0)))
        return total(lp) - total(lp_bg) >= margin_db
