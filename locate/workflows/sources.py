"""``tdoa fix --sources N|auto``: every source that stands out of one span, each fixed.

Orchestration of :mod:`locate.fix.sources` over the recordings: the span's SRP-PHAT maps per
band, the peaks, then for each peak its own delays - the recordings read at the arrival offsets
the peak predicts (pre-steered), the other sources' part of the spectrum left out (a tonal
source keeps only its lines, a broadband one loses them), a search window of a few
milliseconds around the peak's delays - and a weighted least-squares fix with its ellipse
(:func:`locate.fix.solver.locate_source`).  Each entry of ``fixes`` carries its ``source``
index and ``band_hz``; a peak that gives no separate fix is said in the warnings.
"""

from __future__ import annotations

import numpy as np
from scipy import fft as sfft

from locate.errors import NothingFoundError
from locate.fix.align import shifted_recordings
from locate.fix.solver import locate_source, predict_delays
from locate.fix.sources import (
    SADDLE,
    find_sources,
    line_guard_hz,
    line_width_hz,
    remove_lines,
    site_grid,
    spectral_lines,
    srp_maps,
)
from locate.geometry.layout import mirror_note
from locate.physics.air import travel_time_s
from locate.results.documents import fix_to_dict
from locate.signal.delays import all_pairs, estimate_delays

__all__ = ["source_maps", "fix_sources", "SEARCH_S", "SAME_SOURCE_M"]

SEARCH_S = 2.5e-3
"""Half-width of each pair's search window around the delays of a fix being refined, s."""

FIRST_SEARCH_S = 8e-3
"""...and around the delays of a broadband map peak (a far source's peak is a ridge along its
bearing, and the map's maximum may lie anywhere along it), s."""

MIN_GOOD_SHARE = 0.5
"""A source needs this share of its pairs with a steered PHAT peak of
:data:`MIN_STEERED_PEAK` or more: a peak whose
delays do not correlate when steered at is a sidelobe of the others, not a source."""

MIN_STEERED_PEAK = 0.2
"""A pair counts toward :data:`MIN_GOOD_SHARE` when its PHAT peak, steered at the source, reaches
this height (one source alone gives 0.8-1; two of equal level sharing the band about half
each; the peak of independent noise over K bins is of order 1 / sqrt(K), below 0.05 for the
thousands of bins of a one-second span).  The 'weak'/'ambiguous' grades of the plain delays
do not serve here: the other source's part of the correlation sits in the pair's floor."""

SAME_SOURCE_M = 3.0
"""Two fixes closer than this are one source seen twice."""




def source_maps(recordings, site, cond, start_s, stop_s, *, band_hz=None, source_z_m=0.0,
                grid_n=161, extent_m=None):
    """The SRP-PHAT maps of a span: ``(maps, spectra, lines_hz, signals)``."""
    signals, _ = recordings.read(start_s, stop_s)
    pos = site.positions_m
    pairs = all_pairs(len(pos))
    x, y = site_grid(pos, extent_m=extent_m, n=grid_n)
    lines = spectral_lines(signals, recordings.sample_rate_hz, band_hz=band_hz)
    maps, spectra = srp_maps(signals, recordings.sample_rate_hz, pos, pairs,
                             cond.sound_speed_mps, x_m=x, y_m=y, z_m=source_z_m,
                             wind_mps=cond.wind_mps, band_hz=band_hz, line_freqs_hz=lines)
    return maps, spectra, lines, signals


def _masked(signals, fs, band_hz, lines_hz, tonal):
    """The signals with only the band's bins kept: its lines alone (tonal), or without them
    (their sinusoids subtracted first, so that no leakage is left)."""
    if not tonal and len(lines_hz):
        signals = remove_lines(signals, fs, lines_hz)
    n = signals.shape[1]
    nfft = sfft.next_fast_len(n, real=True)
    f = sfft.rfftfreq(nfft, 1 / fs)
    on_line = np.zeros(f.size, bool)
    width = line_width_hz(n / fs) if tonal else line_guard_hz(n / fs)
    for f0 in lines_hz:
        on_line |= np.abs(f - f0) <= width
    keep = (f >= band_hz[0]) & (f <= band_hz[1])
    keep &= on_line if tonal else ~on_line
    spec = sfft.rfft(signals, nfft, axis=-1)
    return sfft.irfft(np.where(keep, spec, 0.0), nfft, axis=-1)[:, :n]


def _source_delays(recordings, site, cond, start_s, stop_s, peak, lines_hz, pairs, centre,
                   search_s=SEARCH_S):
    """Delays of one map peak: reads pre-steered on ``centre``, its part of the spectrum, a
    narrow search."""
    fs = recordings.sample_rate_hz
    pos = site.positions_m
    t = travel_time_s(np.asarray(centre, float), pos, cond.sound_speed_mps, cond.wind_mps)
    shifts = t - np.median(t)
    a = start_s + max(0.0, -float(shifts.min()))
    b = stop_s - max(0.0, float(shifts.max()))
    if b - a < 0.25:
        return None
    shifted = shifted_recordings(recordings, shifts, a, b)
    if shifted is None:
        return None
    signals, residual = shifted.read(a, b)
    band = peak.band_hz
    if peak.tonal:
        band = (max(band[0] - 5.0, 1.0), band[1] + 5.0)
    signals = _masked(signals, fs, band, lines_hz, peak.tonal)
    ds = estimate_delays(signals, fs, max_lag_s=search_s, band_hz=band, pairs=pairs,
                         offsets_s=residual + shifts, t_s=a)
    return ds


def fix_sources(recordings, site, cond, start_s, stop_s, *, sources="auto", band_hz=None,
                dims=2, source_z_m=0.0, reject=True):
    """Fix every source standing out of a span (``sources``: a number, or "auto").

    Returns
    -------
    entries : list of dict
        One result-JSON fix entry per source, strongest first, with ``source`` (0, 1, ...),
        ``band_hz`` and ``bands`` (the map bands that show it).
    warnings : list of str
    maps : list of locate.fix.sources.BandMap
    """
    from locate.accuracy.budget import declared_sds, extra_covariance_hook, uncertainty_budget

    names = site.mic_names
    pos = site.positions_m
    pairs = all_pairs(len(names))
    maps, spectra, lines, _ = source_maps(recordings, site, cond, start_s, stop_s,
                                          band_hz=band_hz, source_z_m=source_z_m)
    limit = None if sources == "auto" else int(sources)
    peaks = find_sources(maps, spectra, pos, pairs, cond.sound_speed_mps, z_m=source_z_m,
                         wind_mps=cond.wind_mps)
    warnings = []
    if not peaks:
        raise NothingFoundError(f"no source stands out of the span {start_s:.2f}..{stop_s:.2f} "
                                "s on the maps of any band")
    if limit is not None and len(peaks) > limit:
        rest = peaks[limit:]
        warnings.append(f"{len(rest)} more source(s) stand out of the maps than the "
                        f"{limit} asked for (near " + "; ".join(
                            f"x {p.position_m[0]:.0f} m, y {p.position_m[1]:.0f} m, "
                            f"{', '.join(p.bands)}" for p in rest)
                        + "): run with --sources auto to fix them")
        peaks = peaks[:limit]
    sds = declared_sds(site)
    hook = extra_covariance_hook(pos, sds, dims=dims, source_z_m=source_z_m, reject=reject,
                                 mic_names=names)
    entries = []
    for peak in peaks:
        where = (f"the source near x {peak.position_m[0]:.0f} m, y {peak.position_m[1]:.0f} m "
                 f"({', '.join(peak.bands)})")
        try:
            centre = peak.position_m
            for it in range(4):  # re-steer on the fix until it settles (a far source's ridge)
                ds = _source_delays(recordings, site, cond, start_s, stop_s, peak, lines, pairs,
                                    centre=centre, search_s=SEARCH_S if it or peak.tonal
                                    else FIRST_SEARCH_S)
                if ds is None:
                    raise NothingFoundError("the span is too short for its arrival offsets")
                fx = locate_source(pos, ds, cond.sound_speed_mps, wind_mps=cond.wind_mps,
                                   dims=dims, source_z_m=source_z_m, reject=reject,
                                   mic_names=names, extra_covariance_s2=hook(ds, cond))
                if (not np.all(np.isfinite(fx.position_m))
                        or np.hypot(*(fx.position_m[:2] - centre[:2])) < 0.5):
                    break
                centre = fx.position_m
        except NothingFoundError as exc:
            warnings.append(f"{where} stands out of the maps but could not be fixed apart "
                            f"from the others: {exc.message}")
            continue
        usable = int(np.sum((ds.peak >= MIN_STEERED_PEAK) & np.isfinite(ds.sd_s)))
        if usable < MIN_GOOD_SHARE * len(ds.quality):
            warnings.append(f"{where} stands out of the maps but its delays do not correlate "
                            f"when steered at it ({usable} of {len(ds.quality)} pairs): a "
                            "sidelobe of the others or a source that could not be separated")
            continue
        moved = float(np.hypot(*(fx.position_m[:2] - peak.position_m[:2])))
        dup = [e for e in entries
               if np.hypot(*(np.asarray(e["position_m"][:2]) - fx.position_m[:2]))
               < SAME_SOURCE_M]
        if dup or not np.all(np.isfinite(fx.position_m)):
            warnings.append(f"{where} stands out of the maps but its delays lead to another "
                            "source's position: it could not be separated (a band or a span "
                            "where it is alone would help)")
            continue
        bm = next(m for m in maps if m.label == peak.bands[0])
        if not peak.tonal and bm.value_at(fx.position_m[:2]) < SADDLE * peak.height:
            fx.warnings.append(f"the fix lies {moved:.1f} m from its map peak, where the "
                               f"{bm.label} map is low: treat it with care")
        mirror = mirror_note(pos[np.asarray(fx.used, bool)], fx.position_m,
                             [n for n, u in zip(names, fx.used) if u])
        if mirror:
            fx.warnings.append(mirror)
        if peak.tonal:
            fx.warnings.append("a tonal source (spectral lines): its correlation repeats "
                               "every period; all pairs jointly chose this position")
            if peak.candidates:
                fx.warnings.append("other positions fit the tonal lines almost as well: "
                                   + "; ".join(f"({x:.1f}, {y:.1f}) m"
                                               for x, y in peak.candidates[:5])
                                   + ": do not rely on this position without a broadband "
                                   "part of the sound")
        ent = fix_to_dict(fx, ds, names, t_s=start_s, span_s=(start_s, stop_s))
        ent["uncertainty_budget"] = uncertainty_budget(
            fx, ds, pos, cond.sound_speed_mps, sds=sds, wind_mps=cond.wind_mps,
            mic_names=names)
        ent["source"] = len(entries)
        ent["band_hz"] = [round(float(peak.band_hz[0]), 1), round(float(peak.band_hz[1]), 1)]
        ent["bands"] = list(peak.bands)
        ent["tonal"] = bool(peak.tonal)
        ent["map_peak_m"] = [round(float(v), 2) for v in peak.position_m]
        ent["warnings"] = list(dict.fromkeys(fx.warnings))
        entries.append(ent)
    if not entries:
        err = NothingFoundError("no source on the maps gave a usable fix")
        err.warnings = warnings
        raise err
    return entries, warnings, maps


def predicted_delays_of(entry, site, cond):
    """Predicted pair delays of a fix entry (for checks)."""
    pairs = all_pairs(len(site.mic_names))
    return predict_delays(np.asarray(entry["position_m"], float), site.positions_m, pairs,
                          cond.sound_speed_mps, cond.wind_mps)


def parse_sources(value):
    """``--sources``: a positive whole number or "auto" -> int or "auto"."""
    from locate.errors import OptionError

    text = str(value).strip().lower()
    if text == "auto":
        return "auto"
    try:
        n = int(text)
    except ValueError:
        n = 0
    if n < 1:
        raise OptionError(f"sources {value!r} must be a whole number of 1 or more, or auto",
                          field="sources")
    return n


def locate_sources(site, recordings, start_s, stop_s, *, sources="auto", band_hz=None, dims=2,
                   source_z_m=0.0, sound_speed_mps=None, reject=True):
    """What ``tdoa fix --from A --to B --sources N|auto`` does: ``(result, maps)``.

    ``result`` is a ``tdoa-result/1`` document of kind ``fix`` with one entry per source
    (``source``, ``band_hz``, ``bands``); ``maps`` the SRP-PHAT maps per band
    (:class:`locate.fix.sources.BandMap`, for :func:`locate.draw.sources.sources_figure`).
    """
    from locate.workflows.fixing import conditions_for, fix_result

    if dims != 2:
        from locate.errors import OptionError
        raise OptionError("several sources are fixed in 2-D (give --source-z)", field="dims")
    cond = conditions_for(site, sound_speed_mps)
    warnings = list(site.warnings) + list(recordings.warnings)
    entries, notes, maps = fix_sources(recordings, site, cond, start_s, stop_s, sources=sources,
                                       band_hz=band_hz, dims=dims, source_z_m=source_z_m,
                                       reject=reject)
    warnings.extend(notes)
    result = fix_result(site, cond, entries, warnings=warnings, dims=dims,
                        source_z_m=source_z_m,
                        extra={"sources": {"asked": sources, "found": len(entries),
                                           "bands": [m.label for m in maps]}})
    return result, maps


NOTE_SPAN_S = 6.0
"""The check for other sources reads at most this much of a span (its start)."""

OTHER_SOURCE_M = 10.0
"""A source of the span this far from its single fix (and beyond 3 sd of it) is another."""


def unseparated_note(recordings, site, cond, start_s, stop_s, position_m, *, band_hz=None,
                     source_z_m=0.0, sd_m=0.0):
    """A warning when the span holds a source other than the one fixed, else None.

    The single fix of a span (one set of pair delays) can describe one source at most; the
    span's sources are found and fixed as ``--sources auto`` does (:func:`fix_sources`: map
    peaks whose steered delays correlate) and any more than :data:`OTHER_SOURCE_M` (and
    3 ``sd_m``) from the fix is named.
    """
    if not np.all(np.isfinite(np.asarray(position_m, float)[:2])):
        return None
    stop = min(stop_s, start_s + NOTE_SPAN_S)
    if stop - start_s < 0.5:
        return None
    try:
        entries, _, _ = fix_sources(recordings, site, cond, start_s, stop, sources="auto",
                                    band_hz=band_hz, dims=2, source_z_m=source_z_m)
    except (NothingFoundError, ValueError):
        return None
    far = max(OTHER_SOURCE_M, 3.0 * float(sd_m) if np.isfinite(sd_m) else OTHER_SOURCE_M)
    xy = np.asarray(position_m, float)[:2]
    others = [e for e in entries if np.hypot(*(np.asarray(e["position_m"][:2]) - xy)) > far]
    if not others:
        return None
    where = "; ".join(f"x {e['position_m'][0]:.0f} m, y {e['position_m'][1]:.0f} m "
                      f"({', '.join(e['bands'])})" for e in others[:3])
    return (f"{len(others)} other source(s) stand out of this span's maps ({where}) and were "
            "not separated: this fix follows one sound only; run with --sources auto to fix "
            "each, or --sources-map to see them")
