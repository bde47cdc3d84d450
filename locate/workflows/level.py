"""``tdoa level``: band levels at the mics over a fix's span -> source sound power -> receivers.

Orchestration over :mod:`locate.physics.levels` (pure) and a :class:`locate.io.audio.Recordings`
reader.
"""

from __future__ import annotations

import numpy as np

from locate.errors import OptionError, ResultFileError
from locate.physics import levels
from locate.results.documents import jsonable

__all__ = ["level_for_fix", "level_for_track", "levels_of_result"]


ABSORPTION = "band-average"  # ISO 9613-1 absorption averaged over each band (a spectrum flat
# per hertz): at long range in the 4-8 kHz bands the mid-band value overstates a band's loss
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


def level_for_fix(recordings, site, cond, entry, *, hemisphere=False, result_path=None,
                  ground=None):
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
    ground : float, optional
        ISO 9613-2 ground factor G for the receivers (None: free field).

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
    # a short taper at each end keeps strong bands from leaking into weak ones through the
    # spectrum of the cut (a rectangular cut leaks -6 dB per octave, common practice)
    taper = _taper(length)
    plain = aligned  # untapered, for the bounds (see _cover_leakage)
    aligned = aligned * taper
    # the part of each mic's delay below one sample, removed in the cross-spectra
    frac_s = (dist - dist.min()) / cond.sound_speed_mps - shift / fs
    cal = [m.full_scale_db_spl for m in site.mics]
    calibrated = all(c is not None for c in cal)
    fs_db = np.array([c if c is not None else 0.0 for c in cal]) if calibrated else None
    bands = levels.OCTAVE_BANDS_HZ
    if np.any(dist < 0.5):
        raise OptionError("the source is within 0.5 m of a mic: back-propagation is not "
                          "meaningful there", file=result_path, field="position_m")
    notes = []
    bg_span = _background_span(entry, recordings, length / fs)
    active_s = length / fs
    lp_auto = levels.octave_band_levels_db(aligned, fs, full_scale_db_spl=fs_db, bands_hz=bands)
    lp_bg = bg = None
    if bg_span is not None:
        bg, _ = recordings.read(*bg_span)
        bg = bg[:, :length]
        bg = bg * _taper(bg.shape[1])
        lp_bg = levels.octave_band_levels_db(bg, fs, full_scale_db_spl=fs_db, bands_hz=bands)
        if not _quieter(lp_auto, lp_bg, bands, entry.get("band_hz")):
            lp_bg = bg = None
            notes.append("the sound goes on beside the fix's span (a steady source?): there is "
                         "no background span to correct with; the source's part is taken from "
                         "the cross-spectra between mics")
    elif len(mics) >= 2:
        notes.append("no background span beside the event: the source's part of each band is "
                     "taken from the cross-spectra between mics (independent noise averages "
                     "out of them)")
    if lp_bg is not None:
        active_s = _active_duration_s(aligned, bg, fs) or active_s
    # level while the source sounds: the energy over the window spread over its active part
    to_active = 10.0 * np.log10(length / fs / active_s)
    att = levels.source_power_level_db(np.zeros((len(mics), len(bands))), dist, bands,
                                       cond.temperature_c, cond.relative_humidity,
                                       site.air.pressure_kpa, hemisphere=hemisphere,
                                       absorption=ABSORPTION)
    div = levels.source_power_level_db(np.zeros((len(mics), len(bands))), dist, bands,
                                       cond.temperature_c, cond.relative_humidity,
                                       site.air.pressure_kpa, hemisphere=hemisphere) - \
        levels.air_attenuation_db(dist, bands, cond.temperature_c, cond.relative_humidity,
                                  site.air.pressure_kpa)
    undo = (dist, cond.temperature_c, cond.relative_humidity, site.air.pressure_kpa)
    search = _lag_search_s(mics, source, dist, cov, cond.sound_speed_mps)
    est = _source_power(aligned, fs, fs_db, bands, att, div, undo, frac_s, lp_auto, bg,
                        to_active, search)
    if len(mics) >= 2 and np.any(np.isfinite(est["upper_db"])):
        est["upper_db"] = _cover_leakage(est["upper_db"], levels.pair_cross_powers(
            plain, fs, bands_hz=bands, full_scale_db_spl=fs_db, shifts_s=frac_s,
            undo_air=undo, search_s=search), div, to_active)
    lw, spread, upper = est["lw_db"], est["spread_db"], est["upper_db"]
    lp = est["mic_lp_db"]
    if est["disagree"]:
        notes.append("band(s) " + ", ".join(f"{b:g} Hz" for b in est["disagree"]) + ": the "
                     "part common to the mics differs by more than 2 dB from the level less "
                     "the background (sound that does not arrive alike at the mics: "
                     "turbulence, reflections or other sources; or a background that "
                     "changes); the background-corrected level is given")
    # position uncertainty -> distance uncertainty -> level uncertainty (per mic, worst)
    unit = (mics - source[None, :]) / dist[:, None]
    dist_sd = np.sqrt(np.clip(np.einsum("mi,ij,mj->m", unit, cov, unit), 0.0, None))
    lw_sd = float(np.max(levels.level_uncertainty_db(dist, dist_sd)))
    measures = _mic_measures(signals, bg, fs, fs_db, a)
    shape = _event_shape(measures)
    receivers = []
    for r in site.receivers:
        pred = levels.receiver_levels_db(lw, source, r.position_m, bands, cond.temperature_c,
                                         cond.relative_humidity, site.air.pressure_kpa,
                                         barriers=site.barriers,
                                         sound_speed_mps=cond.sound_speed_mps,
                                         hemisphere=hemisphere, receiver_name=r.name,
                                         ground=ground, barrier_method="iso9613-2",
                                         absorption=ABSORPTION, band_shape=est["shape"])
        pred.update(levels.receiver_event_measures(pred["lp_db"], bands, active_s, shape))
        receivers.append((r.name, pred))
    for _name, pred in receivers:  # the bound of the bands that are not levels, carried along
        if np.any(np.isfinite(upper)):
            pred["lp_upper_db"] = np.where(np.isfinite(upper), _forward(upper, lw, pred),
                                           np.nan)
    cautions = list(levels.CAUTIONS)
    cautions[1] = propagation_caution(ground)
    if not calibrated:
        cautions.insert(0, "No calibration (full_scale_db_spl) was given for every mic: levels "
                           "are relative to digital full scale (dBFS), not sound pressure.")
    mic_rows = []
    for m, d, row, meas in zip(site.mics, dist, lp, measures, strict=True):
        item = {"name": m.name, "distance_m": round(float(d), 3),
                "lp_db": jsonable(np.round(row, 2))}
        item.update({k: (round(v, 2) if isinstance(v, float) and np.isfinite(v) else
                         (None if isinstance(v, float) else v)) for k, v in meas.items()})
        mic_rows.append(item)
    out = levels.level_result(
        bands, lw, spread, receivers, cautions=cautions, upper_db=upper,
        units="dB re 1 pW" if calibrated else "dB re full scale (uncalibrated)",
        calibrated=calibrated, t_s=entry.get("t_s"), span_s=[a, b],
        position_m=[float(v) for v in source],
        lw_position_sd_db=round(lw_sd, 3),
        active_duration_s=round(float(active_s), 4),
        source_lw_method=est["method"],
        source_lw_floor_db=jsonable(np.round(est["floor_db"], 2)),
        propagation=propagation_method(ground),
        event_measures=EVENT_MEASURES_NOTE,
        mics=mic_rows,
        notes=notes,
    )
    return out


EVENT_MEASURES_NOTE = (
    "At each mic (measured): LAeq,T over the analysed span T (background included, as a meter "
    "reads it), LAE (sound exposure level, re 1 s), LAFmax (time weighting F, 125 ms, IEC "
    "61672-1) and LCpeak, LAE and LAFmax with the background's mean square taken off when a "
    "background span was found.  At each receiver (predicted): LAeq,T over the time the "
    "source sounds, LAE, and LAFmax / LCpeak from the event's time shape measured at the mics "
    "(LAFmax - LAE, LCpeak - LCE; median over the mics).")


def propagation_method(ground):
    """Plain words for the propagation model used towards the receivers."""
    g = ("no ground effect (free field)" if ground is None else
         f"ground effect by the ISO 9613-2 general method with G = {ground:g} (from memory of "
         "the standard's Table 3)")
    return ("spherical spreading (20 lg d + 11 dB), air absorption per band (ISO 9613-1, "
            "weighted by the spectrum measured in each third of the octave band), "
            f"{g}, screening by walls "
            "10 lg(3 + 20 z K_met / lambda) capped at 20 dB, less the ground effect it replaces "
            "(ISO 9613-2 eqs. (12), (14), from memory)")


def propagation_caution(ground):
    return ("Propagation to the receivers is a screening estimate: " + propagation_method(ground)
            + ". Wind and temperature gradients, reflections from buildings and source "
              "directivity are not modelled; ISO 9613-2 assumes mild downwind conditions.")


def _forward(upper, lw, pred):
    """Receiver band levels for source powers ``upper`` through the same propagation."""
    loss = pred["divergence_db"] + pred["air_db"] + pred["ground_db"] + pred["screen_db"]
    return np.asarray(upper, dtype=float) - loss


def _lag_search_s(mics, source, dist, cov, c):
    """How far each pair's residual lag is searched: 4 standard deviations of the predicted
    delay difference from the position's covariance, between 0.5 ms and 10 ms."""
    unit = (mics - source[None, :]) / dist[:, None]
    sd = 0.0
    for i in range(len(mics)):  # a few mics
        for j in range(i + 1, len(mics)):
            g = unit[j] - unit[i]
            sd = max(sd, float(np.sqrt(max(g @ cov @ g, 0.0))) / c)
    return float(np.clip(4.0 * sd, 5e-4, 1e-2)) if np.isfinite(sd) else 1e-2


def _source_power(aligned, fs, fs_db, bands, att, div, undo, frac_s, lp_auto, bg, to_active,
                  search_s=5e-4):
    """Per band, the source's part: from the cross-spectra between mics (absorption taken off
    each frequency bin, ``undo``; ``div`` the divergence alone) and, when a background span
    ``bg`` was found, from the mics' own spectra less the background's.  Where both are levels
    and agree within 2 dB the cross-spectral one is given, where they disagree the
    background-corrected one (sound that decorrelates between mics still counts) with a note;
    an upper bound where neither is a level."""
    m = aligned.shape[0]
    nb = len(bands)
    if m >= 2:
        cross = levels.pair_cross_powers(aligned, fs, bands_hz=bands, full_scale_db_spl=fs_db,
                                         shifts_s=frac_s, undo_air=undo, search_s=search_s)
        coh = levels.coherent_source_power(cross, div)
        lw_coh, upper = coh["lw_db"] + to_active, coh["upper_db"] + to_active
        spread_coh, floor = coh["spread_db"], coh["floor_db"] + to_active
        mic_coh = coh["mic_lw_db"] - att + to_active
        shape = coh["part_power"]
        steady = _steady_bands(aligned, fs, fs_db, bands, div, undo, frac_s, coh, search_s)
        if np.any(steady):  # a steady tone: its few degrees of freedom do not scatter it
            lw_coh = np.where(steady, coh["found_db"] + to_active, lw_coh)
            upper = np.where(steady, np.nan, upper)
    else:  # one mic: its whole band level is all that can be said (an upper bound)
        lw_coh = np.full(nb, np.nan)
        upper = levels.combine_mics(lp_auto + att + to_active)[0]
        spread_coh, floor = np.full(nb, np.nan), np.full(nb, np.nan)
        mic_coh = np.full(att.shape, np.nan)
        shape = None
    lw, spread, mic_lp = lw_coh.copy(), spread_coh.copy(), mic_coh.copy()
    method = ["coherent" if np.isfinite(v) else None for v in lw_coh]
    disagree = []
    if bg is not None:
        with np.errstate(divide="ignore"):
            own = 10.0 * np.log10(levels.band_mean_squares(
                aligned, fs, bands_hz=bands, full_scale_db_spl=fs_db, undo_air=undo))
            quiet = 10.0 * np.log10(levels.band_mean_squares(
                bg, fs, bands_hz=bands, full_scale_db_spl=fs_db, undo_air=undo))
        corrected = levels.background_corrected_db(own, quiet)
        lw_bg, spread_bg = levels.combine_mics(corrected + div + to_active)
        has_bg = np.isfinite(lw_bg)
        differ = has_bg & np.isfinite(lw_coh) & (np.abs(lw_coh - lw_bg) > 2.0)
        disagree = [bands[b] for b in np.flatnonzero(differ)]
        use_bg = has_bg & (~np.isfinite(lw_coh) | differ)
        lw = np.where(use_bg, lw_bg, lw)
        spread = np.where(use_bg, spread_bg, spread)
        mic_lp = np.where(use_bg[None, :], corrected + div - att + to_active, mic_lp)
        for b in np.flatnonzero(use_bg):
            method[b] = "background"
    upper = np.where(np.isfinite(lw), np.nan, upper)
    return {"lw_db": lw, "upper_db": upper, "spread_db": spread, "mic_lp_db": mic_lp,
            "method": method, "floor_db": floor, "disagree": disagree, "shape": shape}


def _cover_leakage(upper, cross_plain, att, to_active, pair_att=None):
    """Bounds that also cover what an untapered analysis of the same sound puts in the band:
    a strong neighbouring band or tone leaks into a weak band through the spectrum of a plain
    cut, and a bound must hold for the band level however it is read."""
    coh = levels.coherent_source_power(cross_plain, att, pair_attenuation_db=pair_att,
                                       min_dof=0)
    plain = np.where(np.isfinite(coh["lw_db"]), coh["lw_db"], coh["upper_db"]) + to_active
    with np.errstate(invalid="ignore"):
        return np.where(np.isfinite(upper), np.fmax(upper, plain), upper)


STEADY_PARTS = 4  # sub-spans of the steadiness check of a band with few degrees of freedom


def _steady_bands(aligned, fs, fs_db, bands, div, undo, frac_s, coh, search_s):
    """Bands clear of the noise but with few degrees of freedom (a tone) that read the same,
    within 1 dB, in each quarter of the span: a steady sound, whose level does not scatter
    like that of a random one (the 1 / sqrt(dof) allowance is for random sound)."""
    few = np.asarray(coh["few_dof"], dtype=bool)
    if not np.any(few):
        return few
    n = aligned.shape[1] // STEADY_PARTS
    runs = []
    for k in range(STEADY_PARTS):
        part = aligned[:, k * n:(k + 1) * n]
        cross = levels.pair_cross_powers(part, fs, bands_hz=bands, full_scale_db_spl=fs_db,
                                         shifts_s=frac_s, undo_air=undo, search_s=search_s)
        runs.append(levels.coherent_source_power(cross, div, min_dof=0)["lw_db"])
    runs = np.array(runs)
    with np.errstate(invalid="ignore"):
        same = np.all(np.isfinite(runs), axis=0) & (np.ptp(runs, axis=0) <= 1.0)
    return few & same


TAPER_FRACTION = 0.04  # Tukey window: 2 % of the span tapered at each end


def _taper(n):
    """Tukey window (scipy.signal.windows.tukey, alpha 0.04) scaled to unit mean square, so a
    steady sound keeps its level; a short event inside the flat part reads 0.11 dB high at
    most (1 / mean square of the window)."""
    from scipy.signal.windows import tukey

    w = tukey(n, TAPER_FRACTION)
    return w / np.sqrt(np.mean(w**2))


def _reference_units(x, fs_db):
    """Samples scaled so that 10 lg(mean square) is dB re 20 uPa (calibrated) or dBFS."""
    cal = np.zeros(x.shape[0]) if fs_db is None else np.asarray(fs_db, dtype=float)
    return x * (np.sqrt(2.0) * 10.0 ** (cal / 20.0))[:, None]


def _mic_measures(signals, bg, fs, fs_db, t0_s):
    """levels.event_measures of each mic over the span (background-corrected when given)."""
    y = _reference_units(signals, fs_db)
    ybg = None if bg is None else _reference_units(bg, fs_db)
    out = []
    for k in range(y.shape[0]):
        meas = levels.event_measures(y[k], fs, background_ref=None if ybg is None else ybg[k],
                                     t0_s=t0_s)
        out.append(meas)
    return out


def _event_shape(measures):
    """Median LAFmax - LAE and LCpeak - LCE over the mics (the event's time shape)."""
    d1 = [m["lafmax_db"] - m["lae_db"] for m in measures]
    d2 = [m["lcpeak_db"] - m["lce_db"] for m in measures]
    with np.errstate(all="ignore"):
        return {"lafmax_minus_lae_db": float(np.nanmedian(d1)) if np.any(np.isfinite(d1))
                else float("nan"),
                "lcpeak_minus_lce_db": float(np.nanmedian(d2)) if np.any(np.isfinite(d2))
                else float("nan")}


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

# ------------------------------------------------------------------------------ pass-bys

_STEP_S = 0.01  # time step of the pass-by's level history (F time constant / 12.5)


def _path_of(result, result_path):
    tr = result.get("track") or {}
    pts = [p for p in tr.get("points") or [] if p.get("used", True)]
    try:
        te = np.array([float(p["t_emit_s"]) for p in pts])
        pos = np.array([[float(v) for v in p["position_m"]] for p in pts]).reshape(-1, 3)
    except (KeyError, TypeError, ValueError) as exc:
        raise ResultFileError(f"track points need t_emit_s and position_m ({exc})",
                              file=result_path, field="track.points") from None
    order = np.argsort(te)
    te, pos = te[order], pos[order]
    if te.size < 2 or not te[-1] - te[0] > 0.05:
        raise ResultFileError("the track has fewer than two used points over 0.05 s: no "
                              "pass-by to take levels over", file=result_path,
                              field="track.points")
    return te, pos


def _dense(te, pos, step_s):
    grid = np.arange(te[0], te[-1] + 0.5 * step_s, step_s)
    return grid, np.stack([np.interp(grid, te, pos[:, k]) for k in range(3)], axis=-1)


def _attenuation(dist, bands, cond, site, hemisphere, shape=None):
    """Free-field loss A = Lw - Lp per band for distances ``dist`` (...,): shape (..., B);
    ``shape`` (B, S) the source's power in parts of each band (absorption weighted by it)."""
    div = levels.source_power_level_db(np.zeros(np.shape(dist) + (len(bands),)), dist, bands,
                                       cond.temperature_c, cond.relative_humidity,
                                       site.air.pressure_kpa, hemisphere=hemisphere)
    div = div - levels.air_attenuation_db(dist, bands, cond.temperature_c,
                                          cond.relative_humidity, site.air.pressure_kpa)
    return div + levels.air_attenuation_db(dist, bands, cond.temperature_c,
                                           cond.relative_humidity, site.air.pressure_kpa,
                                           absorption=ABSORPTION, band_shape=shape)


def _on_emission_time(x, fs, t0_s, t_heard_s):
    """Samples of ``x`` (T,) (first sample at t0_s) at the times ``t_heard_s``: 4x band-limited
    up-sampling (scipy.signal.resample_poly) then linear interpolation (amplitude error below
    1 % up to 0.35 fs, textbook)."""
    from scipy.signal import resample_poly

    up = resample_poly(x, 4, 1)
    q = (np.asarray(t_heard_s) - t0_s) * fs * 4.0
    return np.interp(q, np.arange(up.size), up, left=0.0, right=0.0)


def level_for_track(recordings, site, cond, result, *, hemisphere=False, result_path=None,
                    ground=None):
    """Sound power of a moving source over its tracked pass and LAFmax / LAE at the receivers.

    Each mic's record is resampled onto the source's emission time along the reconstructed
    path (so the mics line up sample by sample despite the Doppler compression), the source's
    part per band is taken from the cross-spectra between mics (as for a fix), its sound power
    is taken as constant over the pass, and the levels at each receiver follow the path
    forward: L_p(t_heard) = Lw - A(r(t_emit)) per band, heard at t_emit + r / c, A-weighted,
    F-time-weighted for LAFmax and integrated for LAE (over the tracked part of the pass).
    """
    te, pos = _path_of(result, result_path)
    fs = recordings.sample_rate_hz
    c = cond.sound_speed_mps
    mics = site.positions_m
    bands = levels.OCTAVE_BANDS_HZ
    cal = [m.full_scale_db_spl for m in site.mics]
    calibrated = all(v is not None for v in cal)
    fs_db = np.array([v if v is not None else 0.0 for v in cal]) if calibrated else None
    grid = np.arange(te[0], te[-1], 1.0 / fs)
    path = np.stack([np.interp(grid, te, pos[:, k]) for k in range(3)], axis=-1)
    dist = np.linalg.norm(path[None, :, :] - mics[:, None, :], axis=-1)  # (M, G)
    if np.any(dist < levels.MIN_DISTANCE_M):
        raise OptionError("the path passes within 0.5 m of a mic: back-propagation is not "
                          "meaningful there", file=result_path, field="track.points")
    heard = grid[None, :] + dist / c
    lo = max(float(heard.min()) - 0.05, recordings.start_s)
    hi = min(float(heard.max()) + 0.05, recordings.stop_s)
    if not hi - lo > 0.05:
        raise ResultFileError("the track lies outside the recordings", file=result_path,
                              field="track.points")
    raw, _ = recordings.read(lo, hi)
    y = np.stack([_on_emission_time(raw[k], fs, lo, heard[k]) for k in range(len(mics))])
    y_plain = y
    y = y * _taper(y.shape[1])  # against leakage from strong bands, as for a fix
    # the pairs' mean gain over the pass, per band: g = 10^(-A/20) at each instant
    coarse = np.arange(0, grid.size, max(int(_STEP_S * fs), 1))
    att_t = _attenuation(dist[:, coarse], bands, cond, site, hemisphere)  # (M, G', B)
    g = 10.0 ** (-att_t / 20.0)
    # the same per one-third of each octave (absorption at its own mid frequency), for the
    # cross-spectral parts: the absorption changes several-fold across an octave at 4-8 kHz
    thirds = (np.asarray(levels.exact_mid_band_hz(bands))[:, None]
              * 10.0 ** (0.1 * np.arange(-1, 2))[None, :]).ravel()
    att3 = levels.source_power_level_db(
        np.zeros(dist[:, coarse].shape + (thirds.size,)), dist[:, coarse], thirds,
        cond.temperature_c, cond.relative_humidity, site.air.pressure_kpa,
        hemisphere=hemisphere).reshape(dist.shape[0], coarse.size, len(bands), 3)
    g3 = 10.0 ** (-att3 / 20.0)
    cross = levels.pair_cross_powers(y, fs, bands_hz=bands, full_scale_db_spl=fs_db,
                                     search_s=2e-4)
    pairs = cross["pairs"]
    pair_att = -10.0 * np.log10(np.mean(g3[pairs[:, 0]] * g3[pairs[:, 1]], axis=1))  # (P,B,3)
    mic_att = -10.0 * np.log10(np.mean(g**2, axis=1))  # (M, B)
    coh = levels.coherent_source_power(cross, mic_att, pair_attenuation_db=pair_att)
    lw, upper, spread = coh["lw_db"], coh["upper_db"], coh["spread_db"]
    shape = coh["part_power"]
    if np.any(coh["few_dof"]):  # a steady tone reads the same in each quarter of the pass
        n_q = y.shape[1] // STEADY_PARTS
        runs = []
        for k in range(STEADY_PARTS):
            sel = (coarse >= k * n_q) & (coarse < (k + 1) * n_q)
            g_k, g3_k = g[:, sel], g3[:, sel]
            part = levels.pair_cross_powers(y[:, k * n_q:(k + 1) * n_q] * _taper(n_q), fs,
                                            bands_hz=bands,
                                            full_scale_db_spl=fs_db, search_s=2e-4)
            runs.append(levels.coherent_source_power(
                part, -10.0 * np.log10(np.mean(g_k**2, axis=1)), min_dof=0,
                pair_attenuation_db=-10.0 * np.log10(
                    np.mean(g3_k[pairs[:, 0]] * g3_k[pairs[:, 1]], axis=1)))["lw_db"])
        runs = np.array(runs)
        with np.errstate(invalid="ignore"):
            steady = (coh["few_dof"] & np.all(np.isfinite(runs), axis=0)
                      & (np.ptp(runs, axis=0) <= 1.0))
        lw = np.where(steady, coh["found_db"], lw)
        upper = np.where(steady, np.nan, upper)
    if np.any(np.isfinite(upper)):
        upper = _cover_leakage(upper, levels.pair_cross_powers(
            y_plain, fs, bands_hz=bands, full_scale_db_spl=fs_db, search_s=2e-4), mic_att, 0.0,
            pair_att)
    notes = ["the source's sound power is taken as constant over the tracked pass, from the "
             "part of each band common to the mics (cross-spectra along the path)"]
    # measured at the mics: the heard span of the tracked pass
    h0, h1 = heard.min(axis=1), heard.max(axis=1)
    bg = _pass_background(recordings, lo, hi)
    y_ref = _reference_units(raw, fs_db)
    bg_ref = None if bg is None else _reference_units(bg, fs_db)
    mic_rows = []
    step = _STEP_S
    dense_t, dense_p = _dense(te, pos, step)
    for k, m in enumerate(site.mics):
        i0, i1 = int(round((h0[k] - lo) * fs)), int(round((h1[k] - lo) * fs))
        meas = levels.event_measures(y_ref[k, i0:i1], fs, t0_s=h0[k],
                                     background_ref=None if bg_ref is None else bg_ref[k])
        pred = _pass_history(lw, dense_t, dense_p, m.position_m, bands, cond, site,
                             hemisphere, None, [], shape=shape)
        row = {"name": m.name, "closest_m": round(float(dist[k].min()), 3)}
        row.update({key: _round(v) for key, v in meas.items()})
        row["lafmax_predicted_db"] = _round(pred["lafmax_db"])
        row["lae_predicted_db"] = _round(pred["lae_db"])
        mic_rows.append(row)
    if bg is None:
        notes.append("no quiet span before or after the pass: the LAE and LAFmax measured at "
                     "the mics include the background")
    receivers = []
    for r in site.receivers:
        pred = _pass_history(lw, dense_t, dense_p, r.position_m, bands, cond, site, hemisphere,
                             ground, site.barriers, name=r.name, shape=shape)
        if np.any(np.isfinite(upper)):
            up = _pass_history(np.where(np.isfinite(upper), upper, np.nan), dense_t, dense_p,
                               r.position_m, bands, cond, site, hemisphere, ground,
                               site.barriers, name=r.name, shape=shape)
            pred["lp_upper_db"] = up["lp_db"]
        receivers.append((r.name, pred))
    cautions = list(levels.CAUTIONS)
    cautions[1] = propagation_caution(ground)
    cautions.insert(1, "LAE is integrated over the tracked part of the pass only (from "
                       f"{te[0]:.2f} s to {te[-1]:.2f} s of emission): sound before and after "
                       "it is not included.")
    if not calibrated:
        cautions.insert(0, "No calibration (full_scale_db_spl) was given for every mic: levels "
                           "are relative to digital full scale (dBFS), not sound pressure.")
    method = ["coherent" if np.isfinite(v) else None for v in lw]
    return levels.level_result(
        bands, lw, spread, receivers, cautions=cautions, upper_db=upper,
        units="dB re 1 pW" if calibrated else "dB re full scale (uncalibrated)",
        calibrated=calibrated, source="track", t_emit_span_s=[float(te[0]), float(te[-1])],
        lw_position_sd_db=None, active_duration_s=round(float(te[-1] - te[0]), 4),
        source_lw_method=method, source_lw_floor_db=jsonable(np.round(coh["floor_db"], 2)),
        propagation=propagation_method(ground), event_measures=PASS_MEASURES_NOTE,
        mics=mic_rows, notes=notes)


PASS_MEASURES_NOTE = (
    "Pass-by: at each receiver (predicted) LAFmax (time weighting F, 125 ms, IEC 61672-1) with "
    "the time it is reached (seconds into the recording) and the source's position then, and "
    "LAE (sound exposure level re 1 s) over the tracked pass; at each mic the same measured "
    "(background taken off when a quiet span was found) beside the prediction.")


def _round(v, nd=2):
    if isinstance(v, bool) or v is None:
        return v
    if isinstance(v, float | np.floating):
        return round(float(v), nd) if np.isfinite(v) else None
    return v


def _pass_background(recordings, lo, hi, length_s=1.0):
    """Up to 1 s of recording just before (or after) the pass, or None."""
    if lo - 0.1 - 0.25 >= recordings.start_s:
        a = max(recordings.start_s, lo - 0.1 - length_s)
        return recordings.read(a, lo - 0.1)[0]
    if hi + 0.1 + 0.25 <= recordings.stop_s:
        b = min(recordings.stop_s, hi + 0.1 + length_s)
        return recordings.read(hi + 0.1, b)[0]
    return None


def _pass_history(lw, t_emit, path, point, bands, cond, site, hemisphere, ground, barriers,
                  name=None, shape=None):
    """Band and A-weighted level history at ``point`` for a source of power ``lw`` along the
    path: LAFmax (time of it, source position then), LAE, band Leq over the pass."""
    point = np.asarray(point, dtype=float)
    dist = np.linalg.norm(path - point[None, :], axis=-1)
    if np.any(dist < levels.MIN_DISTANCE_M):
        who = f"receiver {name!r}" if name else "a mic"
        raise OptionError(f"the path passes within {levels.MIN_DISTANCE_M} m of {who}: no "
                          "level prediction there", field="receivers")
    # spreading and absorption for every point at once; ground and walls point by point
    lp = np.asarray(lw, dtype=float)[None, :] - _attenuation(dist, bands, cond, site, hemisphere,
                                                              shape)
    if barriers or ground is not None:
        zero = np.zeros(len(bands))
        extra = np.stack([(lambda r: r["ground_db"] + r["screen_db"])(levels.receiver_levels_db(
            zero, p, point, bands, cond.temperature_c, cond.relative_humidity,
            site.air.pressure_kpa, barriers=barriers, sound_speed_mps=cond.sound_speed_mps,
            hemisphere=hemisphere, receiver_name=name, ground=ground,
            barrier_method="iso9613-2", absorption=ABSORPTION)) for p in path])
        lp = lp - extra
    t_heard = t_emit + dist / cond.sound_speed_mps
    la = levels.lwa_db(lp, bands)  # (G,)
    ms = np.where(np.isfinite(la), 10.0 ** (la / 10.0), 0.0)
    dt = np.gradient(t_heard)  # heard time per emission step (Doppler)
    lae = 10.0 * np.log10(np.sum(ms * dt)) if np.any(ms > 0) else float("nan")
    # F time weighting on a uniform heard-time grid (IEC 61672-1, exponential, 125 ms)
    th = np.arange(t_heard[0], t_heard[-1], _STEP_S / 4)
    ms_u = np.interp(th, t_heard, ms)
    a = np.exp(-(_STEP_S / 4) / levels.TIME_CONSTANT_S["F"])
    from scipy.signal import lfilter
    f_ms = lfilter([1.0 - a], [1.0, -a], ms_u)
    k = int(np.argmax(f_ms))
    t_max = float(th[k])
    i_near = int(np.argmin(np.abs(t_heard - t_max)))
    energy = np.sum(10.0 ** (lp / 10.0) * dt[:, None], axis=0)
    span = float(t_heard[-1] - t_heard[0])
    with np.errstate(divide="ignore"):
        lp_eq = 10.0 * np.log10(energy / span)
    g = dict(levels.receiver_levels_db(
        lw, path[int(np.argmin(dist))], point, bands, cond.temperature_c,
        cond.relative_humidity, site.air.pressure_kpa, barriers=barriers,
        sound_speed_mps=cond.sound_speed_mps, hemisphere=hemisphere, receiver_name=name,
        ground=ground, barrier_method="iso9613-2", absorption=ABSORPTION, band_shape=shape))
    g.update({"distance_m": float(dist.min()), "lp_db": lp_eq, "lpa_db": float(
        levels.lwa_db(lp_eq, bands)), "laeq_db": float(levels.lwa_db(lp_eq, bands)),
        "laeq_interval_s": span, "lae_db": float(lae),
        "lafmax_db": float(10.0 * np.log10(f_ms[k])) if f_ms[k] > 0 else float("nan"),
        "t_lafmax_s": t_max, "position_at_lafmax_m": [float(v) for v in path[i_near]],
        "t_emit_at_lafmax_s": float(t_emit[i_near])})
    return g


def levels_of_result(site, recordings, result, *, result_path=None, fix_no=None,
                     hemisphere=False, ground=None) -> dict:
    """Levels for every fix of a fix result (or the ``fix_no``-th, 1-based), or for the pass-by
    of a track result: the ``tdoa level --json`` document.

    The document's ``levels`` list holds one entry per fix (with its ``fix`` number) or one for
    the track; with a single entry its keys are also at the top level.
    """
    from locate.results.documents import reading_result
    from locate.workflows.fixing import conditions_for, fix_result

    cond = conditions_for(site, result.get("sound_speed_mps"))
    out = []
    if result.get("kind") == "track":
        if fix_no is not None:
            raise OptionError("a fix number applies to a fix result; this result is a track",
                              field="fix_no")
        with reading_result(result_path):
            out.append(level_for_track(recordings, site, cond, result, hemisphere=hemisphere,
                                       result_path=result_path, ground=ground))
    else:
        fixes = result.get("fixes", [])
        if fix_no is not None:
            if not 1 <= fix_no <= len(fixes):
                raise OptionError(f"the result holds {len(fixes)} fix(es); fix {fix_no} is "
                                  "not one of them", field="fix_no")
            chosen = [(fix_no, fixes[fix_no - 1])]
        else:
            chosen = list(enumerate(fixes, 1))
        for k, entry in chosen:
            with reading_result(result_path):
                lev = level_for_fix(recordings, site, cond, entry, hemisphere=hemisphere,
                                    result_path=result_path, ground=ground)
            lev["fix"] = k
            out.append(lev)
    doc = fix_result(site, cond, [], kind="level", warnings=recordings.warnings,
                     extra={"levels": out})
    if len(out) == 1:
        doc.update({k: v for k, v in out[0].items() if k != "kind"})
    doc["cautions"] = out[0]["cautions"] if out else doc["cautions"]
    return doc
