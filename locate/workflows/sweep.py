"""Fixes of every window of a long span, fast: windowed delays + the batched locator.

``tdoa fix --window W --sweep`` uses this for hours of a steady (or slowly changing) source.
Block by block (:func:`locate.signal.windowed.recording_window_delays`, memory one block) the
delays of all windows are estimated together and located together
(:func:`locate.fix.batched.locate_batch`), each mic's windows shifted by its arrival offset
(:mod:`locate.fix.align`); the result entries have the fields of
:func:`locate.workflows.fixing.fix_span`'s, except what needs each window's samples or a full
single-window analysis: no echo (onset) check and no uncertainty budget per window,
and the per-pair delays are not kept (``delays`` is empty: an hour of windows would hold
millions of them).
"""

from __future__ import annotations

import numpy as np

from locate.fix.align import aligned_recordings
from locate.fix.batched import locate_batch
from locate.fix.solver import REJECT_P_VALUE, Fix
from locate.results.documents import fix_to_dict
from locate.signal.delays import all_pairs, estimate_delays
from locate.signal.windowed import recording_window_delays
from locate.workflows.fixing import ground_datum_m, reflection_uncertainty, search_lags_s

__all__ = ["sweep_fixes", "SWEEP_NOTE", "AMBIGUOUS_VERDICT", "sweep_verdict"]

AMBIGUOUS_VERDICT = ("most pairs are ambiguous: this position may be one of several; do not "
                     "rely on it without a broadband sound")
"""The verdict of a window whose pairs are mostly ambiguous (as a single fix says it)."""

SWEEP_NOTE = ("windows fixed by the fast sweep (windowed delays, batched locator): no echo "
              "check, no uncertainty budget and no pair delays kept per window - the ellipses "
              "are timing and ground reflection only (no survey, clock, air or "
              "source-height uncertainty in them); fix a single window without --sweep for "
              "those")


def _batched_fix(bf, w, names, dims):
    """A :class:`locate.fix.solver.Fix` from row ``w`` of a :class:`locate.fix.batched.BatchFix`."""
    rejected = bf.rejected[w]
    dof, p = int(bf.dof[w]), float(bf.p_value[w])  # after any exclusion
    warnings = []
    if bf.closure_inflation[w] > 1.0:
        warnings.append("the pair delays disagree with each other beyond their uncertainty "
                        "(echoes or reflections?): uncertainties scaled "
                        f"{np.sqrt(bf.closure_inflation[w]):.1f}x")
    if dof > 0 and p < REJECT_P_VALUE:
        warnings.append(f"the delays do not fit one source position well (chi-square p = "
                        f"{p:.1e}): the ellipse was enlarged (echoes, wind or temperature "
                        "errors?)")
    if rejected.any():
        warnings.append("mic(s) " + ", ".join(n for n, r in zip(names, rejected) if r)
                        + " rejected: their timing disagrees with the others (clock error, "
                        "echo or wrong position)")
    return Fix(position_m=bf.position_m[w].copy(), covariance_m2=bf.covariance_m2[w].copy(),
               used=~rejected, rejected_mics=[n for n, r in zip(names, rejected) if r],
               dead_mics=[], dropped_pairs=[], residual_rms_s=float(bf.residual_rms_s[w]),
               chi2=float(bf.chi2[w]), dof=max(dof, 0), p_value=p, mirror_position_m=None,
               warnings=warnings, converged=bool(bf.converged[w]), dims=dims)


def _quality_notes(quality, pairs, names):
    notes = []
    for label, text in (("weak", "weak correlation for pair(s) "),
                        ("ambiguous", "ambiguous correlation (several near-equal peaks) for "
                                      "pair(s) ")):
        sel = [f"{names[i]}-{names[j]}" for (i, j), q in zip(pairs, quality) if q == label]
        if sel:
            notes.append(text + ", ".join(sel))
    return notes


def sweep_fixes(recordings, site, cond, start_s, stop_s, window_s, hop_s=None, *,
                band_hz=None, dims=2, source_z_m=0.0, reject=True, progress=None):
    """Fix every window of ``[start_s, stop_s)``.

    Parameters
    ----------
    recordings : locate.io.audio.Recordings
    site : locate.io.site.Site
    cond : locate.workflows.fixing.Conditions
    start_s, stop_s : float
    window_s : float
        Window length, seconds.
    hop_s : float, optional
        Window step (default: ``window_s``, windows end to end).
    band_hz, dims, source_z_m, reject
        As :func:`locate.workflows.fixing.fix_span`.
    progress : callable, optional
        Called with the number of windows done after each block.

    Returns
    -------
    entries : list of dict
        Result-JSON fix entries, in time order, for the windows that gave a position.
    notes : list of str
        Windows without a position (how many).
    """
    hop_s = window_s if hop_s is None else hop_s
    positions, names = site.positions_m, site.mic_names
    pairs = all_pairs(len(names))
    max_lag = search_lags_s(site, cond, pairs)
    # Windows cut at each mic's arrival offset (locate.fix.align), from a first pass over the
    # start of the span: a steady source keeps its offsets.
    pilot_stop = min(stop_s, start_s + max(2.0, 4.0 * window_s))
    signals, residual = recordings.read(start_s, pilot_stop)
    pilot = estimate_delays(signals, recordings.sample_rate_hz, max_lag_s=max_lag,
                            band_hz=band_hz, pairs=pairs, offsets_s=residual)
    del signals
    # the ground reflection's bias (locate.accuracy.reflections) from the pilot's spectra at
    # the pilot's fix: a steady source keeps it, so every window gets the same term
    ground = reflection_uncertainty(pilot, positions, cond, dims=dims, source_z_m=source_z_m,
                                    mic_names=names,
                                    ground_z_m=ground_datum_m(site)).bias_covariance_s2
    shifted, shifts = aligned_recordings(recordings, pilot, start_s, stop_s)
    if shifts is None:
        shifts = np.zeros(len(names))
    move = shifts[pairs[:, 1]] - shifts[pairs[:, 0]]
    entries, missing = [], 0
    # blocks small enough for a progress bar in steps of about 2 % (never under 24 windows)
    n_windows = max(int((stop_s - start_s - window_s) // hop_s) + 1, 1)
    block = int(min(240, max(24, -(-n_windows // 50))))
    for wd in recording_window_delays(shifted, window_s, hop_s, max_lag_s=max_lag,
                                      band_hz=band_hz, pairs=pairs, start_s=start_s,
                                      stop_s=stop_s, block_windows=block):
        wd.delay_s += move
        cov = wd.covariance_s2 if ground is None else wd.covariance_s2 + ground[None]
        bf = locate_batch(positions, wd.delay_s, cov, cond.sound_speed_mps,
                          pairs=pairs, wind_mps=cond.wind_mps, dims=dims, source_z_m=source_z_m,
                          reject=reject)
        for w in range(len(wd)):
            fx = bf.fixes.get(w) if bf.single[w] else _batched_fix(bf, w, names, dims)
            if fx is None or not np.all(np.isfinite(fx.position_m)):
                missing += 1
                continue
            t0 = float(wd.t_s[w])
            entry = fix_to_dict(fx, wd.window(w), names, t_s=t0, span_s=(t0, t0 + window_s))
            verdict = ([AMBIGUOUS_VERDICT] if sum(q == "ambiguous" for q in wd.quality[w])
                       > len(pairs) // 2 else [])
            entry["warnings"] = list(dict.fromkeys(
                verdict + _quality_notes(wd.quality[w], pairs, names) + list(fx.warnings)))
            entry["uncertainty_budget"] = None
            entry["delays"] = []  # per-pair delays of every window: too many to keep
            entries.append(entry)
        if progress is not None:
            progress(len(wd))
    notes = [f"{missing} window(s) gave no position (no usable delays or geometry)"] \
        if missing else []
    return entries, notes


def sweep_verdict(entries):
    """The sweep's own "do not rely" warning when windows carry :data:`AMBIGUOUS_VERDICT`
    (empty list otherwise)."""
    n_bad = sum(AMBIGUOUS_VERDICT in e["warnings"] for e in entries)
    if not n_bad:
        return []
    return [f"{n_bad} of {len(entries)} window(s): most pairs are ambiguous (a tonal or "
            "periodic sound): their positions, and the median of them, may be one of several; "
            "do not rely on them without a broadband sound (tdoa fix --sources auto resolves "
            "tonal sounds with all pairs jointly where the geometry allows)"]


def sweep_summary_lines(entries, window_s, hop_s, max_warnings=5,
                        length=lambda v: f"{v:.3g} m"):
    """Printed summary of a sweep: where the fixes gather and how they scatter.

    ``length`` formats a length in metres for the screen.

    Returns
    -------
    lines : list of str
    warnings : list of str
        The first ``max_warnings`` window warnings (prefixed by the window start) and a count
        of the rest.
    """
    pos = np.array([e["position_m"] for e in entries], dtype=float)
    med = np.median(pos, axis=0)
    dist = np.linalg.norm(pos[:, :2] - med[:2], axis=1)
    major = np.array([e["ellipse95"]["semi_major_m"] or np.nan for e in entries], float)
    minor = np.array([e["ellipse95"]["semi_minor_m"] or np.nan for e in entries], float)
    n_rej = sum(bool(e["rejected_mics"]) for e in entries)
    t0, t1 = entries[0]["span_s"][0], entries[-1]["span_s"][1]
    verdict = sweep_verdict(entries)
    unreliable = sum(AMBIGUOUS_VERDICT in e["warnings"] for e in entries) * 2 >= len(entries)
    lines = [f"{len(entries)} window(s) of {window_s:g} s every {hop_s:g} s, "
             f"{t0:.2f}..{t1:.2f} s",
             ("   NOT RELIABLE (most pairs ambiguous): " if unreliable else "   ")
             + f"median position x {med[0]:.2f} m, y {med[1]:.2f} m, z {med[2]:.2f} m; "
             f"95 % of the fixes within {length(np.quantile(dist, 0.95))} of it",
             f"   median 95 % ellipse {length(np.nanmedian(major))} x "
             f"{length(np.nanmedian(minor))} "
             f"(half-axes); {n_rej} window(s) with a rejected mic"]
    warns = [f"window at {e['t_s']:.2f} s: {w}" for e in entries for w in e["warnings"]]
    if len(warns) > max_warnings:
        warns = warns[:max_warnings] + [f"... and {len(warns) - max_warnings} more window "
                                        "warning(s) in the result JSON"]
    return lines, verdict + warns
