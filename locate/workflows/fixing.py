"""Orchestration used by the command line: recordings in, result dictionaries out.

The CLI parses options and prints; this module strings the pure core together (air, delays,
fix, events) over a :class:`locate.io.audio.Recordings` reader.  Nothing here writes files.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

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

__all__ = ["Conditions", "conditions_for", "scan_events", "fix_span", "fix_result",
           "plan_spans"]

MIN_SPAN_SAMPLES = 64  # a shorter span cannot hold a correlation peak and its floor


@dataclass
class Conditions:
    """Propagation conditions of a run."""

    sound_speed_mps: float
    wind_mps: np.ndarray
    temperature_c: float
    relative_humidity: float
    wind_speed_mps: float
    wind_from_deg: float
    notes: list = field(default_factory=list)

    def to_dict(self) -> dict:
        return {
            "sound_speed_mps": round(self.sound_speed_mps, 3),
            "temperature_c": self.temperature_c,
            "relative_humidity": self.relative_humidity,
            "wind_speed_mps": self.wind_speed_mps,
            "wind_from_deg": self.wind_from_deg,
        }


def conditions_for(site, sound_speed_mps=None) -> Conditions:
    """Sound speed and wind for a site (``sound_speed_mps`` overrides the air model)."""
    air = site.air
    c = float(sound_speed_mps) if sound_speed_mps is not None else air.sound_speed_mps()
    if not 250.0 <= c <= 400.0:
        raise OptionError(f"sound speed {c:g} m/s is not plausible for air (250-400 m/s)",
                          field="sound_speed_mps")
    return Conditions(c, air.wind_mps(), air.temperature_c, air.relative_humidity,
                      air.wind_speed_mps, air.wind_from_deg)


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
    onset_idx = (onset_s - lo) * fs
    return onset_delays(signals, fs, onset_idx, max_lag_s=max_lag, pairs=pairs,
                        band_hz=band_hz, t_s=lo, offsets_s=residual,
                        spread_s=_array_spread_s(site.positions_m, cond))


EVENT_BACKGROUND_S = 1.0
"""Stretch before an event's earliest onset read to measure the steady background, s."""


def fix_span(recordings, site, cond, start_s, stop_s, *, band_hz=None, dims=2, source_z_m=0.0,
             keep_curves=False, reject=True, t_s=None, extra_covariance=None, onset_s=None):
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
    weak = [f"{names[i]}-{names[j]}" for (i, j), q in zip(delays.pairs, delays.quality)
            if q == "weak"]
    amb = [f"{names[i]}-{names[j]}" for (i, j), q in zip(delays.pairs, delays.quality)
           if q == "ambiguous"]
    if weak:
        warnings.append("weak correlation for pair(s) " + ", ".join(weak))
    if amb:
        warnings.append("ambiguous correlation (several near-equal peaks: a tonal sound or a "
                        "strong echo?) for pair(s) " + ", ".join(amb)
                        + ": a broadband part of the sound or a --band around it would help")
    from locate.accuracy.budget import declared_sds, extra_covariance_hook, uncertainty_budget

    sds = declared_sds(site)
    if extra_covariance is None:  # declared survey/clock/air uncertainties (none: no change)
        extra_covariance = extra_covariance_hook(positions, sds, dims=dims,
                                                 source_z_m=source_z_m, reject=reject,
                                                 mic_names=names)
    extra = extra_covariance(delays, cond)
    fix = locate_source(positions, delays, cond.sound_speed_mps, wind_mps=cond.wind_mps,
                        dims=dims, source_z_m=source_z_m, reject=reject, mic_names=names,
                        extra_covariance_s2=extra)
    if len(amb) > len(delays.pairs) // 2:
        fix.warnings.append("most pairs are ambiguous: this position may be one of several; "
                            "do not rely on it without a broadband sound")
    from locate.geometry.layout import endfire_pairs, mirror_note

    used_names = [n for n, u in zip(names, fix.used) if u]
    mirror = mirror_note(positions[np.asarray(fix.used, bool)], fix.position_m, used_names)
    if mirror:
        fix.warnings.append(mirror)
    if (any("nearly undetermined" in w for w in fix.warnings)
            and not any("near the extension" in w for w in fix.warnings)):
        ends = endfire_pairs(positions[np.asarray(fix.used, bool)], fix.position_m, used_names)
        if ends:  # say why, as the linearity check does
            fix.warnings.append(f"the source is near the extension of the line through mics "
                                f"{', '.join(ends)} (their delay is at its largest and says "
                                "little about the position): a mic off that line, toward the "
                                "source, would help")
    echo = onset_mismatch(signals, recordings.sample_rate_hz, positions, fix.position_m,
                          cond.sound_speed_mps, names, wind_mps=cond.wind_mps, used=fix.used)
    if echo:
        fix.warnings.append(echo)
    warnings.extend(fix.warnings)
    entry = fix_to_dict(fix, delays, names, t_s=start_s if t_s is None else t_s,
                        span_s=(start_s, stop_s))
    entry["uncertainty_budget"] = uncertainty_budget(
        fix, delays, positions, cond.sound_speed_mps, sds=sds, wind_mps=cond.wind_mps,
        mic_names=names)
    entry["warnings"] = list(dict.fromkeys(warnings))
    return entry, fix, delays, entry["warnings"]


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


def require_events(events, start_s, stop_s):
    if not events:
        raise NothingFoundError(
            f"no event stands out of the background between {start_s:.2f} and {stop_s:.2f} s: "
            "give a span with --from/--to for a continuous sound, or lower --threshold")
    return events
