"""Orchestration used by the command line: recordings in, result dictionaries out.

The CLI parses options and prints; this module strings the pure core together (air, delays,
fix, events) over a :class:`locate.io.audio.Recordings` reader.  Nothing here writes files.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from locate import __version__
from locate.errors import NothingFoundError, OptionError
from locate.fix.solver import locate_source
from locate.io.audio import check_signals
from locate.results.documents import CAUTIONS, SCHEMA, fix_to_dict
from locate.results.geojson import add_wgs84_positions
from locate.signal.delays import all_pairs, estimate_delays, geometric_max_lag_s
from locate.signal.echoes import onset_mismatch
from locate.signal.event_scan import scan_recordings
from locate.workflows.conditions import Conditions, conditions_for

__all__ = ["Conditions", "conditions_for", "scan_events", "fix_span", "fix_result",
           "delay_warnings", "fix_sds", "finish_entry", "search_lags_s",
           "plan_spans", "add_clock_times", "resolve_source_height", "reflection_uncertainty",
           "air_fit_extra"]

MIN_SPAN_SAMPLES = 64  # a shorter span cannot hold a correlation peak and its floor


def _array_spread_s(positions_m, cond):
    pos = np.asarray(positions_m, dtype=float)
    span = np.max(np.linalg.norm(pos[:, None] - pos[None], axis=-1))
    return span / (cond.sound_speed_mps - cond.wind_speed_mps) + 0.05


def scan_events(recordings, positions_m, cond, *, band_hz=None, start_s=None, stop_s=None,
                threshold_db=10.0, progress=None, block_s=10.0):
    """Detect events over a span of the recordings, streaming block by block.

    Parameters
    ----------
    recordings : locate.io.audio.Recordings
    positions_m : array_like, shape (N, 3)
    cond : Conditions
    band_hz : (float, float), optional
    start_s, stop_s : float, optional
        Span to scan (default: all that every mic covers).
    threshold_db : float
    progress : callable, optional
        Called with the number of seconds scanned after each block.
    block_s : float
        Block length; memory is bounded by one block of all channels.

    Returns
    -------
    list of locate.signal.events.Event
    """
    a = recordings.start_s if start_s is None else float(start_s)
    b = recordings.stop_s if stop_s is None else float(stop_s)
    # streaming detection (locate.signal.event_scan): overlapped band-passed blocks, envelope kept
    # only as long as the detection rule needs it, so memory does not grow with the span
    return scan_recordings(recordings, a, b, band_hz=band_hz, threshold_db=threshold_db,
                           min_mics=min(3, recordings.n_mics),
                           max_spread_s=_array_spread_s(positions_m, cond), pad_s=0.05,
                           progress=progress, block_s=block_s, whiten=True)


def plan_spans(events, recordings, positions_m, cond):
    """Analysis span for each event: the event in every mic plus the travel time across."""
    spread = _array_spread_s(positions_m, cond)
    spans = []
    for ev in events:
        lo = max(ev.t_start_s - 0.02, recordings.start_s)
        hi = min(ev.t_end_s + min(spread, 0.05), recordings.stop_s)
        spans.append((lo, hi))
    return spans


def search_lags_s(site, cond, pairs):
    """Lag search half-width of each pair, (P,) s: geometry, wind, 0.5 ms and 3 clock sds."""
    clock_sd = np.array([m.clock_sd_s or 0.0 for m in site.mics])
    margin = 5e-4 + 3.0 * (clock_sd[pairs[:, 0]] + clock_sd[pairs[:, 1]])
    return geometric_max_lag_s(site.positions_m, pairs, cond.sound_speed_mps,
                               wind_speed_mps=cond.wind_speed_mps, margin_s=margin)


ASSUMED_SOURCE_Z_M = 1.0
"""Source height of a 2-D fix when none is given: a source between the ground and 2 m
(people, vehicles, machinery, dropped objects: common practice)."""
ASSUMED_SOURCE_Z_SD_M = 0.6
"""Its standard deviation (0-2 m uniform has 0.58 m)."""
GIVEN_SOURCE_Z_SD_M = 0.5
"""Standard deviation of a source height given without one (a height judged by eye)."""


def resolve_source_height(source_z_m, source_z_sd_m=None, dims=2):
    """(height, sd, basis) of a 2-D fix from the command-line values.

    ``source_z_m`` may carry its own sd (``locate.cli.common.Height``, from ``1.0+-0.5``);
    a plain 0.0 is the option's default (not given): :data:`ASSUMED_SOURCE_Z_M` with
    :data:`ASSUMED_SOURCE_Z_SD_M`, basis ``"assumed"``.  A height given without an sd takes
    :data:`GIVEN_SOURCE_Z_SD_M`, basis ``"given"``.  3-D fixes solve the height: sd 0.
    """
    own_sd = getattr(source_z_m, "sd", None)
    given = own_sd is not None or type(source_z_m) is not float or float(source_z_m) != 0.0
    if dims == 3:
        return float(source_z_m), 0.0, "solved"
    if not given and source_z_sd_m is None:
        return ASSUMED_SOURCE_Z_M, ASSUMED_SOURCE_Z_SD_M, "assumed"
    z = float(source_z_m) if given else ASSUMED_SOURCE_Z_M
    sd = own_sd if own_sd is not None else source_z_sd_m
    if sd is None:
        sd = GIVEN_SOURCE_Z_SD_M
    if not (np.isfinite(sd) and sd >= 0):
        raise OptionError(f"source height uncertainty {sd!r} must be finite and >= 0",
                          field="source_z_sd_m")
    return z, float(sd), "given" if given else "assumed"


def _event_delays(recordings, site, cond, onset_s, start_s, stop_s, band_hz, max_lag, pairs):
    """The bang's own delays (locate.signal.onsets): the background before the earliest
    onset measured and removed, the onset part correlated; None without enough background."""
    from locate.signal.onsets import MIN_BACKGROUND_S, onset_delays

    onset_s = np.asarray(onset_s, float)
    if not np.any(np.isfinite(onset_s)):
        return None
    first = float(np.nanmin(onset_s))
    lo = max(recordings.start_s, first - EVENT_BACKGROUND_S)
    if first - lo < MIN_BACKGROUND_S + 0.02:
        return None
    signals, residual = recordings.read(lo, stop_s)
    fs = recordings.sample_rate_hz
    before = signals[:, : int((first - lo) * fs)]
    if background_coherence(before, fs, band_hz, max_lag_s=float(np.max(max_lag))) \
            < max(STEADY_COHERENCE, noise_coherence(before.shape[1])):
        return None  # nothing steady and coherent to remove: the plain delays serve better
    onset_idx = (onset_s - lo) * fs
    return onset_delays(signals, fs, onset_idx, max_lag_s=max_lag, pairs=pairs,
                        band_hz=band_hz, t_s=lo, offsets_s=residual,
                        spread_s=_array_spread_s(site.positions_m, cond))


STEADY_COHERENCE = 0.3
"""Coherence between mics, before an event, above which a steady source is sounding: the mean
magnitude-squared coherence of the most coherent 5 % of the bins, each mic's stretch shifted by
the lag of its correlation peak with the first mic (independent mic noise gives ~0.1 with the
~30 Welch segments of 1 s; a fan or the lines of a hum heard by every mic give 0.5-1).  Only
then is the background removed from the event's delays (locate.signal.onsets)."""

_TOP_SHARE = 0.05  # the most coherent share of the bins (a hum's lines fill a few per cent)


def noise_coherence(n_samples, segment=1024):
    """99.9th percentile of the Welch magnitude-squared coherence of independent noise over a
    stretch of ``n_samples`` (segments of ``min(segment, n / 8)``, half overlapping): with K
    segments it is Beta(1, K - 1) distributed, P(C > c) = (1 - c)^(K - 1) (Carter 1987, Proc.
    IEEE 75(2) 236-255), so the percentile is 1 - 0.001^(1 / (K - 1)).  A short stretch needs a
    higher coherence to count as a steady source."""
    seg = min(segment, n_samples // 8)
    if seg < 64:
        return 1.0
    k = max(2.0 * n_samples / seg - 1.0, 2.0)
    return float(1.0 - 0.001 ** (1.0 / (k - 1.0)))


def background_coherence(signals, sample_rate_hz, band_hz=None, max_lag_s=0.3):
    """Coherence of a stretch between the first mic and up to four others (see
    :data:`STEADY_COHERENCE`); 0 for too short a stretch.

    A steady source far from the array reaches two mics up to aperture / c apart, longer than
    a Welch segment: unshifted, their segments hold different parts of its sound and read as
    incoherent.  So each pair is first aligned on the peak of its PHAT correlation within
    ``max_lag_s`` (a periodic hum stays coherent under any shift), then the magnitude-squared
    coherence (scipy.signal.coherence, Welch, 1024-sample segments) is taken over ``band_hz``
    (default 100 Hz to 0.4 fs), and the mean of its most coherent 5 % of bins is returned: a
    hum's lines fill only a few per cent of the band, and a band mean would hide them.
    """
    from scipy import fft as sfft
    from scipy.signal import coherence

    x = np.asarray(signals, float)
    n = x.shape[1]
    seg = min(1024, n // 8)
    if seg < 64 or x.shape[0] < 2:
        return 0.0
    fs = float(sample_rate_hz)
    lo, hi = band_hz if band_hz is not None else (100.0, 0.4 * fs)
    nfft = sfft.next_fast_len(2 * n, real=True)
    spec = sfft.rfft(x - x.mean(axis=1, keepdims=True), nfft, axis=-1)
    big = min(int(max_lag_s * fs), n // 2)
    vals = []
    for k in range(1, min(x.shape[0], 5)):
        g = np.conj(spec[0]) * spec[k]
        r = sfft.irfft(g / np.maximum(np.abs(g), 1e-300), nfft)
        lags = np.arange(-big, big + 1)
        lag = int(lags[np.argmax(r[lags % nfft])])  # x_k lags x_0 by `lag` samples
        a, b = (x[0, : n - lag], x[k, lag:]) if lag >= 0 else (x[0, -lag:], x[k, : n + lag])
        if a.size < 4 * seg:
            continue
        with np.errstate(divide="ignore", invalid="ignore"):  # a silent mic: no coherence
            f, c = coherence(a, b, fs=fs, nperseg=seg)
        sel = (f >= lo) & (f <= hi) & np.isfinite(c)
        if np.any(sel):
            top = np.sort(c[sel])[::-1][: max(int(np.ceil(_TOP_SHARE * sel.sum())), 1)]
            vals.append(float(np.mean(top)))
    return float(np.mean(vals)) if vals else 0.0


EVENT_BACKGROUND_S = 1.0
"""Stretch before an event's earliest onset read to measure the steady background, s."""


def fix_span(recordings, site, cond, start_s, stop_s, *, band_hz=None, dims=2, source_z_m=0.0,
             keep_curves=False, reject=True, t_s=None, extra_covariance=None,
             source_z_sd_m=0.0, onset_s=None):
    """Read one span, estimate delays and fix the source.

    ``onset_s`` (N,), the detected onsets of an event at each mic (NaN: not heard), selects
    the event path: the bang's own delays with the steady background before it removed
    (:func:`locate.signal.onsets.onset_delays`), falling back to the whole span when the
    recording holds too little background before the event.

    Returns
    -------
    (entry, fix, delays, warnings)
        ``entry`` is the result-JSON dict of the fix.
    """
    absent = _absent_mics(recordings, site, cond, start_s, stop_s)
    if absent:
        return _fix_without(absent, recordings, site, cond, start_s, stop_s, band_hz=band_hz,
                            dims=dims, source_z_m=source_z_m, keep_curves=keep_curves,
                            reject=reject, t_s=t_s)
    positions = site.positions_m
    names = site.mic_names
    signals, residual = recordings.read(start_s, stop_s)
    if signals.shape[1] < MIN_SPAN_SAMPLES:
        raise OptionError(f"the span {start_s:.4f}..{stop_s:.4f} s holds only "
                          f"{signals.shape[1]} samples: give a span (--from/--to or --window) "
                          f"of at least {MIN_SPAN_SAMPLES} samples that holds the whole sound "
                          "at every mic", field="stop_s")
    warnings = check_signals(signals, names)
    pairs = all_pairs(len(names))
    max_lag = search_lags_s(site, cond, pairs)
    delays = None
    if onset_s is not None and not keep_curves:
        delays = _event_delays(recordings, site, cond, onset_s, start_s, stop_s, band_hz,
                               max_lag, pairs)
    if delays is None:
        delays = estimate_delays(signals, recordings.sample_rate_hz, max_lag_s=max_lag,
                                 band_hz=band_hz, pairs=pairs, offsets_s=residual, t_s=start_s,
                                 keep_curves=keep_curves)
        delays = _aligned_delays(recordings, signals, delays, start_s, stop_s, band_hz,
                                 max_lag, keep_curves)
    # the ground reflection's bias in every pair's uncertainty; its peak is no ambiguity
    delays = reflection_uncertainty(delays, positions, cond, dims=dims, source_z_m=source_z_m,
                                    source_z_sd_m=source_z_sd_m if dims == 2 else 0.0,
                                    mic_names=names, ground_z_m=ground_datum_m(site))
    warnings.extend(delay_warnings(delays, names))
    sds, models = fix_sds(site, dims, source_z_sd_m)
    if extra_covariance is None:  # declared survey/clock/air uncertainties (none: no change)
        from locate.accuracy.budget import extra_covariance_hook

        extra_covariance = extra_covariance_hook(positions, sds, dims=dims,
                                                 source_z_m=source_z_m, reject=reject,
                                                 mic_names=names, model_sds=models)
    extra = extra_covariance(delays, cond)
    fix = locate_source(positions, delays, cond.sound_speed_mps, wind_mps=cond.wind_mps,
                        dims=dims, source_z_m=source_z_m, reject=reject, mic_names=names,
                        extra_covariance_s2=extra, model_sds=models)
    entry = finish_entry(fix, delays, signals, recordings.sample_rate_hz, site, cond, sds,
                         warnings, t_s=start_s if t_s is None else t_s,
                         span_s=(start_s, stop_s))
    return entry, fix, delays, entry["warnings"]


def delay_warnings(delays, names) -> list[str]:
    """The warnings about weak and ambiguous pairs of a delay set, with the site's mic names."""
    out = []
    weak = [f"{names[i]}-{names[j]}" for (i, j), q in zip(delays.pairs, delays.quality)
            if q == "weak"]
    amb = [f"{names[i]}-{names[j]}" for (i, j), q in zip(delays.pairs, delays.quality)
           if q == "ambiguous"]
    if weak:
        out.append("weak correlation for pair(s) " + ", ".join(weak))
    if amb:
        out.append("ambiguous correlation (several near-equal peaks: a tonal sound or a "
                   "strong echo?) for pair(s) " + ", ".join(amb)
                   + ": a broadband part of the sound or a --band around it would help")
    return out


def fix_sds(site, dims, source_z_sd_m):
    """(declared sds with the source height, model-error sds) of a fix (budget inputs)."""
    from locate.accuracy.budget import declared_sds
    from locate.accuracy.inputs import with_source_height

    sds = declared_sds(site)
    sds = with_source_height(sds, source_z_sd_m if dims == 2 else 0.0, ground_datum_m(site))
    return sds, model_error_sds(site, sds, dims)


def finish_entry(fix, delays, signals, sample_rate_hz, site, cond, sds, warnings, *, t_s,
                 span_s) -> dict:
    """The result entry of a fix: the geometry notes (ambiguous pairs, mirror, end-fire), the
    first-arrival (echo) check on the span's samples, the uncertainty budget and the warnings
    (``warnings`` so far + the fix's), named with the site's mics.  Shared by one span
    (:func:`fix_span`) and the windows of :mod:`locate.workflows.windows`."""
    from locate.accuracy.budget import uncertainty_budget
    from locate.geometry.layout import endfire_pairs, mirror_note

    positions, names = site.positions_m, site.mic_names
    warnings = list(warnings)
    n_amb = sum(q == "ambiguous" for q in delays.quality)
    if n_amb > len(delays.pairs) // 2:
        fix.warnings.append("most pairs are ambiguous: this position may be one of several; "
                            "do not rely on it without a broadband sound")
    used = np.asarray(fix.used, bool)
    used_names = [n for n, u in zip(names, fix.used) if u]
    mirror = mirror_note(positions[used], fix.position_m, used_names)
    if mirror:
        fix.warnings.append(mirror)
    if ((any("nearly undetermined" in w for w in fix.warnings) or _elongated(fix))
            and not any("near the extension" in w for w in fix.warnings)):
        ends = endfire_pairs(positions[used], fix.position_m, used_names)
        if ends:  # say why, as the linearity check does
            fix.warnings.append(f"the source is near the extension of the line through mics "
                                f"{', '.join(ends)} (their delay is at its largest and says "
                                "little about the position): a mic off that line, toward the "
                                "source, would help")
    echo = onset_mismatch(signals, sample_rate_hz, positions, fix.position_m,
                          cond.sound_speed_mps, names, wind_mps=cond.wind_mps, used=fix.used)
    if echo:
        fix.warnings.append(echo)
    warnings.extend(fix.warnings)
    entry = fix_to_dict(fix, delays, names, t_s=t_s, span_s=span_s)
    entry["uncertainty_budget"] = uncertainty_budget(
        fix, delays, positions, cond.sound_speed_mps, sds=sds, wind_mps=cond.wind_mps,
        mic_names=names)
    entry["warnings"] = list(dict.fromkeys(warnings))
    return entry


def _elongated(fix, ratio=10.0):
    """The horizontal ellipse is more than ``ratio`` times longer than wide (a range along a
    line of mics barely determined, even when the ellipse already says so)."""
    cov = np.asarray(fix.covariance_m2, float)[:2, :2]
    if not np.all(np.isfinite(cov)):
        return False
    lo, hi = np.linalg.eigvalsh(0.5 * (cov + cov.T))
    return bool(lo > 0 and hi > ratio**2 * lo)


def _absent_mics(recordings, site, cond, start_s, stop_s):
    """Indices of the mics with no audio somewhere over the span (and the arrival spread
    around it that the aligned second pass may read): recorders off or between files."""
    if getattr(recordings, "deployment", None) is None:
        return []
    pad = _array_spread_s(site.positions_m, cond)
    have = recordings.covering(start_s - pad, stop_s + pad)
    return [int(i) for i in np.flatnonzero(~have)]


def _fix_without(absent, recordings, site, cond, start_s, stop_s, *, dims, **kw):
    """:func:`fix_span` over the mics that have audio; the result names the others."""
    names = site.mic_names
    gone = [names[i] for i in absent]
    keep = [i for i in range(len(names)) if i not in absent]
    need = 3 if dims == 2 else 4
    if len(keep) < need:
        raise NothingFoundError(
            f"only {len(keep)} mic(s) have audio over {start_s:.3f}..{stop_s:.3f} s "
            f"({', '.join(gone)} not recording there): a {dims}-D fix needs {need}")
    entry, fix, delays, warnings = fix_span(
        recordings.subset(keep), replace(site, mics=tuple(site.mics[i] for i in keep)), cond,
        start_s, stop_s, dims=dims, **kw)
    note = (f"mic(s) {', '.join(gone)} had no audio over this span (recorder off or between "
            "files): left out of this fix")
    entry["absent_mics"] = gone
    entry["warnings"] = [note] + entry["warnings"]
    return entry, fix, delays, entry["warnings"]


def model_error_sds(site, sds, dims=2):
    """Model errors the integrity test weighs against a bad mic: the source height's sd (2-D)
    and the sound speed's - the declared one, else that of the taped-survey default air
    temperature sd (2 degC: a temperature not measured on site, docs/uncertainty.md)."""
    from locate.accuracy.inputs import TAPED_SURVEY_DEFAULTS, sound_speed_slope_mps_per_c

    sd_c = float(sds.get("sound_speed_mps", 0.0) or 0.0)
    if sd_c <= 0:
        air = site.air
        sd_c = abs(sound_speed_slope_mps_per_c(air.temperature_c, air.relative_humidity,
                                               air.pressure_kpa)) * TAPED_SURVEY_DEFAULTS[
            "temperature_sd_c"]
    return {"source_z_m": float(sds.get("source_height_m", 0.0) or 0.0) if dims == 2 else 0.0,
            "sound_speed_mps": sd_c, "ground_z_m": ground_datum_m(site)}


def ground_datum_m(site):
    """z of the ground in the site's frame: 0 for a local site (its z is the height above the
    ground, docs/site-file.md); None for a WGS84 site, whose z is an ellipsoidal height: the
    ground under the mics is not known there (the source height is not clamped to it; the
    ground-reflection term takes it a typical mic height below the lowest mic,
    ``locate.accuracy.reflections.ground_reflection_term``)."""
    return 0.0 if getattr(site, "coordinates", "local") == "local" else None


def reflection_uncertainty(delays, positions_m, cond, *, dims=2, source_z_m=0.0,
                           source_z_sd_m=0.0, mic_names=None, ground_z_m=0.0, first=None):
    """``delays`` with the ground-reflection bias term in their covariance
    (:mod:`locate.accuracy.reflections`), evaluated at a first, timing-only fix; unchanged when
    no first fix can be made.  ``ground_z_m``: z of the ground (None: not known, a WGS84
    site - taken a typical mic height below the lowest mic).  ``first`` ((position (3,),
    covariance (3, 3))) is that fix when it is already known (the batched first fixes of many
    windows)."""
    from locate.accuracy.reflections import (
        TYPICAL_MIC_HEIGHT_M,
        ground_echo_pairs,
        ground_reflection_term,
    )
    from locate.errors import TdoaError

    if first is None:
        try:
            fx = locate_source(positions_m, delays, cond.sound_speed_mps,
                               wind_mps=cond.wind_mps, dims=dims, source_z_m=source_z_m,
                               reject=True, mic_names=mic_names)
        except (TdoaError, ValueError, np.linalg.LinAlgError):
            return delays
        first = (fx.position_m, fx.covariance_m2)
    position, cov = (np.asarray(v, dtype=float) for v in first)
    if not np.all(np.isfinite(position)):
        return delays
    sd = float(source_z_sd_m) if dims == 2 else float(np.sqrt(max(
        cov[2, 2], 0.0)) if np.isfinite(cov[2, 2]) else 0.0)
    out = ground_reflection_term(delays, position, positions_m, cond.sound_speed_mps,
                                 cond.wind_mps, ground_z_m=ground_z_m, source_z_sd_m=sd)
    pos = np.array(positions_m, dtype=float)
    ground = (float(np.min(pos[:, 2])) - TYPICAL_MIC_HEIGHT_M if ground_z_m is None
              else float(ground_z_m))
    pos[:, 2] -= ground
    src = np.array(position, dtype=float)
    src[2] = max(src[2] - ground, 0.0)
    echo = ground_echo_pairs(out, src, pos, cond.sound_speed_mps, cond.wind_mps,
                             source_z_sd_m=sd)
    amb = np.array([q == "ambiguous" for q in out.quality]) & echo
    if amb.any():  # the next peak is the ground reflection's, not a second direct path
        out = replace(out, quality=tuple("good" if a else q
                                         for q, a in zip(out.quality, amb, strict=True)))
    return out


def air_fit_extra(site, fix, delays, cond, *, dims=2, source_z_sd_m=0.0, solve_wind=False):
    """Delay covariance of the declared uncertainties that ``--solve-air`` does not solve
    (survey, clocks, source height; the wind too unless it is solved), at the fixed-air fix;
    None when none is declared."""
    from locate.accuracy.inputs import declared_sds, has_nuisance, with_source_height
    from locate.accuracy.propagation import nuisance_delay_covariance

    sds = with_source_height(declared_sds(site), source_z_sd_m if dims == 2 else 0.0,
                             ground_datum_m(site))
    if not has_nuisance(sds):
        return None
    keep = ["mic_positions", "clocks", "source_height"] + ([] if solve_wind else ["wind"])
    return nuisance_delay_covariance(fix.position_m, site.positions_m, delays.pairs,
                                     cond.sound_speed_mps, cond.wind_mps, sds, components=keep)


def _aligned_delays(recordings, signals, delays, start_s, stop_s, band_hz, max_lag,
                    keep_curves):
    """Second pass with each mic's window shifted by its arrival offset (locate.fix.align), for
    a sound that goes on across the span's ends."""
    from locate.fix.align import aligned_recordings

    shifted, shifts = aligned_recordings(recordings, delays, start_s, stop_s, signals=signals)
    if shifts is None:
        return delays
    signals, residual = shifted.read(start_s, stop_s)
    ii, jj = delays.pairs[:, 0], delays.pairs[:, 1]
    # the search stays centred on the shifted pair delay: shrink it by the shift's size
    lag = np.maximum(max_lag - np.abs(shifts[jj] - shifts[ii]), 0.0) + 1e-3
    second = estimate_delays(signals, recordings.sample_rate_hz, max_lag_s=lag,
                             band_hz=band_hz, pairs=delays.pairs, offsets_s=residual + shifts,
                             t_s=start_s, keep_curves=keep_curves)
    if second.curves is not None:  # back on the lags of the unshifted windows
        for k, curve in enumerate(second.curves):
            move = float(shifts[jj[k]] - shifts[ii[k]])
            curve["lags_s"] = [v + move for v in curve["lags_s"]]
    return replace(second, max_lag_s=max_lag)


def fix_result(site, cond, entries, *, warnings=(), dims=2, source_z_m=0.0, kind="fix",
               extra=None) -> dict:
    """The top-level result dictionary (schema ``tdoa-result/1``)."""
    result = {
        "schema": SCHEMA,
        "kind": kind,
        "site": str(site.path),
        "title": site.title,
        "tool": {"name": "tdoa", "version": __version__},
        "sound_speed_mps": round(cond.sound_speed_mps, 3),
        "air": cond.to_dict(),
        "dims": dims,
        "source_z_m": source_z_m if dims == 2 else None,
        "mics": [{"name": m.name, "position_m": [float(v) for v in m.position_m]}
                 for m in site.mics],
        "warnings": list(dict.fromkeys(warnings)),
        "cautions": list(CAUTIONS),
    }
    if site.origin_wgs84 is not None:
        result["origin_wgs84"] = list(site.origin_wgs84)
    if kind == "fix":
        result["fixes"] = entries
    if extra:
        result.update(extra)
    add_wgs84_positions(result, site.origin_wgs84)  # "position_wgs84" beside "position_m"
    return result


def add_clock_times(result, recordings, site=None) -> dict:
    """Put ``t_utc`` (ISO 8601, UTC) beside every time of a result, in place.

    Fixes and events get ``t_utc`` beside ``t_s``; track points ``t_utc`` (when heard) and
    ``t_emit_utc``; a ``span_s`` gets ``span_utc``; the document gets ``clock`` (the UTC of
    time 0 and the recorders' declared time zones).  Nothing changes when the recordings
    carry no clock time (no bext stamps, no start_time).
    """
    if recordings is None or getattr(recordings, "epoch", None) is None:
        return result
    utc = recordings.clock_time

    def spans(d):
        if isinstance(d.get("span_s"), list) and len(d["span_s"]) == 2:
            d["span_utc"] = [utc(v) for v in d["span_s"]]

    for key in ("fixes", "events"):
        for d in result.get(key) or []:
            if d.get("t_s") is not None:
                d["t_utc"] = utc(d["t_s"])
            spans(d)
    track = result.get("track")
    if isinstance(track, dict):
        for p in track.get("points") or []:
            if p.get("t_heard_s") is not None:
                p["t_utc"] = utc(p["t_heard_s"])
            if p.get("t_emit_s") is not None:
                p["t_emit_utc"] = utc(p["t_emit_s"])
    spans(result)
    clock = {"epoch_utc": utc(0.0, digits=6),
             "note": "t_s are seconds after epoch_utc; t_utc is UTC"}
    if site is not None:
        zones = {m.name: m.time_zone for m in site.mics if getattr(m, "time_zone", None)}
        if zones:
            clock["time_zones"] = zones
    result["clock"] = clock
    return result


def require_events(events, start_s, stop_s):
    if not events:
        raise NothingFoundError(
            f"no event stands out of the background between {start_s:.2f} and {stop_s:.2f} s: "
            "give a span with --from/--to for a continuous sound, or lower --threshold")
    return events
