"""The output of ``tdoa fix --window W --sweep``: a summary of many windows on screen.

The windows themselves are those of ``fix --window`` (:func:`locate.workflows.windows.
window_fixes`: per-pair delays, checks and budget in every window); this module only sums them
up.  :func:`sweep_fixes` is kept as the name of that run.
"""

from __future__ import annotations

import numpy as np

from locate.workflows.windows import window_fixes

__all__ = ["sweep_fixes", "AMBIGUOUS_VERDICT", "sweep_verdict", "sweep_summary_lines"]

AMBIGUOUS_VERDICT = ("most pairs are ambiguous: this position may be one of several; do not "
                     "rely on it without a broadband sound")
"""The verdict of a window whose pairs are mostly ambiguous (as a single fix says it)."""


def sweep_fixes(recordings, site, cond, start_s, stop_s, window_s, hop_s=None, **kw):
    """Fix every window of ``[start_s, stop_s)``: :func:`locate.workflows.windows.window_fixes`
    (same arguments and results)."""
    return window_fixes(recordings, site, cond, start_s, stop_s, window_s, hop_s, **kw)


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
