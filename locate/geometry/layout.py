"""The shape of a mic layout: is it (nearly) a line, and where is a point's mirror across it?

Mics on one line measure only distances along it and from it, not the side: a source and its
mirror image across the line give the same delays (exactly for a straight line, nearly for a
slightly bent one).  Textbook geometry; the line is the principal axis of the centred mic
positions (singular value decomposition).
"""

from __future__ import annotations

import numpy as np

__all__ = ["LINE_RATIO", "line_of", "mirror_note"]

LINE_RATIO = 0.05
"""Smallest over largest singular value of the centred horizontal layout below which the mics
are "nearly on one line" (as the site check uses)."""


def line_of(positions_m):
    """``(centre (2,), unit direction (2,), ratio)`` of the horizontal layout, ratio = smallest /
    largest singular value (0 for an exact line); None for fewer than two distinct mics."""
    p = np.asarray(positions_m, float)[:, :2]
    c = p.mean(axis=0)
    if len(p) < 2:
        return None
    _, s, vt = np.linalg.svd(p - c, full_matrices=False)
    if s[0] <= 0:
        return None
    return c, vt[0], float(s[-1] / s[0]) if len(s) > 1 else 0.0


def mirror_note(positions_m, point_m, names_used=None):
    """A warning when the mics are nearly on one line (mirror ambiguity), naming the mirror
    position of ``point_m`` across the line; None otherwise."""
    line = line_of(positions_m)
    if line is None:
        return None
    c, u, ratio = line
    if ratio >= LINE_RATIO:
        return None
    q = np.asarray(point_m, float)[:2] - c
    along = float(q @ u)
    mirror = c + 2.0 * along * u - q
    who = f" ({', '.join(names_used)})" if names_used else ""
    return (f"the mics used{who} lie nearly on one line: a source at its mirror image across "
            f"the line, ({mirror[0]:.1f}, {mirror[1]:.1f}) m, gives nearly the same delays; "
            "the side of the line rests on small departures from it (move a mic off the line)")


ENDFIRE_DEG = 10.0
"""A source within this angle of the extension of a two-mic line is "near the extension"."""


def endfire_pairs(positions_m, point_m, names, *, deg=ENDFIRE_DEG):
    """Names "A-B" of the mic pairs whose line, extended beyond the pair, passes within
    ``deg`` of ``point_m`` (seen from the pair's midpoint; horizontal).  There the pair's delay
    is at its largest possible value and says almost nothing about the position (textbook:
    the hyperbola degenerates to the baseline's extension)."""
    pos = np.asarray(positions_m, float)[:, :2]
    pt = np.asarray(point_m, float)[:2]
    out = []
    for a in range(len(pos)):
        for b in range(a + 1, len(pos)):
            base = pos[b] - pos[a]
            s = pt - 0.5 * (pos[a] + pos[b])
            nb, ns = np.linalg.norm(base), np.linalg.norm(s)
            if nb <= 0 or ns <= 0.5 * nb:
                continue
            if abs(float(base @ s)) / (nb * ns) >= np.cos(np.radians(deg)):
                out.append(f"{names[a]}-{names[b]}")
    return out
