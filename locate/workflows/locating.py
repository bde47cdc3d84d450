"""What ``tdoa fix`` does, callable from Python: a site's recordings in, a result dict out.

:func:`locate_recordings` fixes every detected event, one span, or each window of a span,
with the same checks, uncertainty budget and warnings as the command line (which calls it and
only prints and writes).  The fast many-window path is :mod:`locate.workflows.sweep`.
"""

from __future__ import annotations

import re

import numpy as np

from locate.errors import NothingFoundError, OptionError
from locate.fix.air_solve import fit_entry
from locate.signal.event_choice import choose_events
from locate.workflows.fixing import (
    add_clock_times,
    air_fit_extra,
    conditions_for,
    fix_result,
    fix_span,
    plan_spans,
    require_events,
    scan_events,
)
from locate.workflows.progress import no_progress

__all__ = ["locate_recordings", "list_events", "same_shape", "no_progress"]


def same_shape(message: str) -> str:
    """A warning with its numbers blanked: the same note about other figures compares equal."""
    return re.sub(r"[-+]?\d+(\.\d+)?", "#", message)


def locate_recordings(site, recordings, *, start_s=None, stop_s=None, window_s=None,
                      band_hz=None, dims=2, source_z_m=0.0, source_z_sd_m=0.0,
                      source_z_basis="given", sound_speed_mps=None,
                      threshold_db=10.0, reject=True, keep_curves=False, solve_air=False,
                      solve_wind=False, events_choice=None, progress=no_progress,
                      scan_s=None, own_s=None) -> dict:
    """Fix a stationary source in a site's recordings.

    Parameters
    ----------
    site : locate.io.site.Site
    recordings : locate.io.audio.Recordings
        From :func:`locate.io.audio.open_recordings`.
    start_s, stop_s : float, optional
        A span, seconds into the recording; without it every detected event is fixed.
    window_s : float, optional
        With a span: fix each consecutive window of this length.
    band_hz : (float, float), optional
        Analysis band; default: where the signal stands above the noise.
    dims : {2, 3}
        2: horizontal fix at height ``source_z_m``; 3: full 3-D fix.
    source_z_sd_m, source_z_basis : float, str
        The height's standard deviation (it enters the uncertainty budget) and where it came
        from ("given", "assumed"); see :func:`locate.workflows.fixing.resolve_source_height`.
    sound_speed_mps : float, optional
        Override the sound speed from the site's air.
    threshold_db : float
        Event detection threshold above the background.
    reject : bool
        Run the integrity test (may exclude a mic).
    keep_curves : bool
        Keep each pair's correlation curve (for the diagnostics figure).
    solve_air, solve_wind : bool
        Solve the sound speed (and a uniform wind) with the position.
    events_choice : locate.signal.event_choice.EventChoice, optional
        Which detected events to fix.
    progress : callable
        ``progress(label, total)`` -> context manager with ``update(n)``.
    scan_s, own_s : (float, float), optional
        Without a span: scan only ``scan_s`` for events and fix those first heard within
        ``own_s`` (one chunk of a chunked scan, :mod:`locate.workflows.chunked`).

    Returns
    -------
    dict
        A ``tdoa-result/1`` document of kind ``fix``.

    Raises
    ------
    locate.errors.NothingFoundError
        No event, or no span gave a usable fix; its ``warnings`` attribute lists why.
    """
    rec = recordings
    cond = conditions_for(site, sound_speed_mps)
    warnings = list(site.warnings) + list(rec.warnings)
    if start_s is None:
        a, b = (rec.start_s, rec.stop_s) if scan_s is None else scan_s
        with progress("Scanning for events", b - a) as bar:
            events = scan_events(rec, site.positions_m, cond, band_hz=band_hz, start_s=a,
                                 stop_s=b, threshold_db=threshold_db, progress=bar.update)
        if own_s is not None:  # a chunk keeps the events first heard in its own part
            events = [ev for ev in events
                      if own_s[0] <= float(np.nanmin(ev.onset_s)) < own_s[1]]
        require_events(events, a, b)
        number = {id(ev): k for k, ev in enumerate(events, 1)}  # as `tdoa events` lists them
        events, notes = choose_events(events, events_choice)
        warnings.extend(notes)
        event_nos = [number.get(id(ev)) for ev in events]
        spans = plan_spans(events, rec, site.positions_m, cond)
        times = [float(np.nanmin(ev.onset_s)) for ev in events]
        onsets = [ev.onset_s for ev in events]
    elif window_s is not None:
        if window_s > stop_s - start_s:
            raise OptionError(f"window {window_s:g} s is longer than the span "
                              f"{stop_s - start_s:g} s", field="window_s")
        if not keep_curves and not solve_air:  # the batched windows (same treatment)
            from locate.workflows.windows import window_fixes

            n_win = int(np.floor((stop_s - start_s) / window_s + 1e-9))
            with progress("Locating", n_win) as bar:
                entries, notes = window_fixes(
                    rec, site, cond, start_s, stop_s, window_s, band_hz=band_hz, dims=dims,
                    source_z_m=source_z_m, source_z_sd_m=source_z_sd_m, reject=reject,
                    progress=bar.update)
            warnings.extend(notes)
            return _finish(site, rec, cond, entries, warnings, dims, source_z_m,
                           source_z_sd_m, source_z_basis, n_win)
        edges = np.arange(start_s, stop_s - window_s + 1e-9, window_s)
        spans = [(float(a), float(a + window_s)) for a in edges]
        times = [a for a, _ in spans]
        onsets = [None] * len(spans)
        event_nos = [None] * len(spans)
    else:
        spans, times = [(start_s, stop_s)], [start_s]
        onsets = [None]
        event_nos = [None]
    entries = []
    with progress("Locating", len(spans)) as bar:
        for (a, b), t, on, no in zip(spans, times, onsets, event_nos):
            try:
                entry, fx, ds, _ = fix_span(rec, site, cond, a, b, band_hz=band_hz, dims=dims,
                                            source_z_m=source_z_m, reject=reject,
                                            keep_curves=keep_curves, t_s=t,
                                            source_z_sd_m=source_z_sd_m, onset_s=on)
                if solve_air and entry.get("absent_mics"):
                    entry["warnings"].append("the sound speed was not solved for this fix: "
                                             "some mics had no audio over it")
                elif solve_air:
                    fit_entry(entry, fx, ds, site, cond, dims=dims, source_z_m=source_z_m,
                              solve_wind=solve_wind, extra_covariance_s2=air_fit_extra(
                                  site, fx, ds, cond, dims=dims, source_z_sd_m=source_z_sd_m,
                                  solve_wind=solve_wind))
            except NothingFoundError as exc:
                warnings.append((f"event {no} " if no is not None else "")
                                + f"span {a:.3f}..{b:.3f} s: {exc.message}")
                bar.update(1)
                continue
            if no is not None:
                entry["event"] = no
            entries.append(entry)
            bar.update(1)
    if start_s is not None and window_s is None and len(entries) == 1:
        from locate.workflows.sources import unseparated_note

        e = entries[0]
        cov = np.asarray(e.get("covariance_m2") or np.full((2, 2), np.nan), float)
        sd = float(np.sqrt(max(np.trace(cov[:2, :2]), 0.0))) if np.all(
            np.isfinite(cov[:2, :2])) else 0.0
        note = unseparated_note(rec, site, cond, start_s, stop_s, e["position_m"],
                                band_hz=band_hz, sd_m=sd,
                                source_z_m=source_z_m if dims == 2 else e["position_m"][2])
        if note:  # the fix's own warning (printed with it)
            e["warnings"].append(note)
    return _finish(site, rec, cond, entries, warnings, dims, source_z_m, source_z_sd_m,
                   source_z_basis, len(spans))


def _finish(site, rec, cond, entries, warnings, dims, source_z_m, source_z_sd_m,
            source_z_basis, n_spans):
    # the reads' channel notes, unless a fix already said the same (its own figures)
    said = ({same_shape(w) for e in entries for w in e["warnings"]}
            | {same_shape(w) for w in warnings})
    warnings.extend(w for w in rec.warnings if same_shape(w) not in said)
    if not entries:
        err = NothingFoundError("no span gave a usable fix (see the warnings above)")
        err.warnings = warnings
        raise err
    extra = ({"source_z_sd_m": source_z_sd_m, "source_z_basis": source_z_basis}
             if dims == 2 else None)
    result = fix_result(site, cond, entries, warnings=warnings, dims=dims,
                        source_z_m=source_z_m, extra=extra)
    result["spans_without_fix"] = max(int(n_spans) - len(entries), 0)
    return add_clock_times(result, rec, site)


def list_events(site, recordings, *, start_s=None, stop_s=None, band_hz=None,
                threshold_db=10.0, progress=no_progress) -> dict:
    """What ``tdoa events`` does: the detected events of a span as a result dict.

    Returns
    -------
    dict
        A ``tdoa-result/1`` document of kind ``events``; ``events`` holds one dict per event
        (``t_s``, ``duration_s``, ``level_db``, ``n_mics``, ``first_mic``, ...) and
        ``span_s`` the span scanned.

    Raises
    ------
    locate.errors.NothingFoundError
        No event in the span.
    """
    rec = recordings
    cond = conditions_for(site)
    a = rec.start_s if start_s is None else start_s
    b = rec.stop_s if stop_s is None else stop_s
    with progress("Scanning for events", b - a) as bar:
        found = scan_events(rec, site.positions_m, cond, band_hz=band_hz, start_s=a, stop_s=b,
                            threshold_db=threshold_db, progress=bar.update)
    require_events(found, a, b)
    rows = [ev.to_dict(site.mic_names) for ev in found]
    return add_clock_times(fix_result(site, cond, [], kind="events",
                                      extra={"events": rows, "span_s": [a, b]},
                                      warnings=rec.warnings), rec, site)
