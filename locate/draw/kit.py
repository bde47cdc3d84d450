"""Map furniture for :mod:`locate.draw.figures`: palette, view, scale bar, north arrow, ellipses,
labels.

The visual language
-------------------
* Colours: Paul Tol's "high-contrast" and "muted" qualitative schemes (P. Tol, *Colour Schemes*,
  SRON technical note SRON/EPS/TN/09-002, issue 3.2, 2021), chosen because they stay distinct
  for the common colour-vision deficiencies.  No meaning rests on colour alone: mics are
  filled triangles, rejected mics hollow triangles with a cross, receivers squares, the estimate
  a white-ringed dot; the 50 % ellipse is solid, the 95 % ellipse dashed with a pale fill;
  hyperbolae are thin, lighter and labelled with their pair along the line.  In greyscale the
  roles still read by shape, line style and lightness.
* The legend, fix list and zoom live in a side column and the caption under the map, so
  nothing is drawn over the answer; labels are moved off the estimate and off each other.
"""

from __future__ import annotations

import contextlib
import math
import warnings

import numpy as np
from matplotlib import patheffects, rc_context
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.patches import Ellipse, Polygon, Rectangle
from scipy.stats import chi2

from locate.common import format_length as common_format_length
from locate.geometry.ellipses import ellipse

__all__ = ["PALETTE", "STYLE", "ellipse_axes", "nice_length", "format_length", "plain",
           "style"]

# Tol (2021) high-contrast: blue #004488, yellow #DDAA33; muted: wine #882255, teal #44AA99,
# indigo #332288, olive #999933; the greys are ours, picked for print.  Greyscale lightness
# (Rec. 601 luma) keeps the roles apart: mic 55, estimate 70, track 50 (dark) against
# hyperbola 137, olive 137 and receiver fill 172 (light).
PALETTE = {
    "mic": "#004488", "rejected": "#555555", "receiver": "#DDAA33", "estimate": "#882255",
    "hyperbola": "#44AA99", "hyperbola_text": "#2C7A6E", "track": "#332288", "now": "#999933",
    "ink": "#222222", "note": "#444444", "shape_fill": "#ECE8DF", "shape_edge": "#8C8677",
    "shape_text": "#5E5A50", "barrier": "#5A5A5A", "grid": "#D9D9D9", "paper": "#FCFCFA",
    "window": "#E8EEF4", "window_edge": "#8FA6BD", "muted": "#9A9A9A",
}
STYLE = {"font.family": "DejaVu Sans", "font.size": 8.5, "axes.linewidth": 0.6,
         "xtick.labelsize": 7.5, "ytick.labelsize": 7.5, "svg.fonttype": "none",
         "pdf.fonttype": 42, "image.interpolation": "antialiased",
         "text.parse_math": False}  # user text (titles, mic names) is text, never mathtext
HALO = [patheffects.withStroke(linewidth=2.6, foreground="white")]


@contextlib.contextmanager
def style():
    """The house style (:data:`STYLE`) for building or saving a figure; a name in a script
    the font lacks (CJK in DejaVu Sans) is drawn as boxes without a warning per glyph."""
    with rc_context(STYLE), warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="Glyph .* missing from", category=UserWarning)
        yield


def plain(text) -> str:
    """``text`` shown as written by a matplotlib text made outside :data:`STYLE` (where
    ``text.parse_math`` is on): each ``$`` escaped, so no mathtext is parsed and a backslash
    stays a backslash (matplotlib reads a string with an even number of unescaped ``$`` as
    mathtext, and prints ``\\$`` as ``$``)."""
    return str(text).replace("$", r"\$")


def ellipse_axes(covariance_m2, probability=0.95):
    """Confidence ellipse of a 2-D Gaussian position, with the angle matplotlib wants.

    Parameters
    ----------
    covariance_m2 : array_like, shape (2, 2) or (3, 3)
        Position covariance, m^2; only the x-y block is used.
    probability : float
        Probability inside the ellipse.

    Returns
    -------
    dict or None
        :func:`locate.geometry.ellipses.ellipse` (``semi_major_m``, ``semi_minor_m``,
        ``azimuth_deg``
        clockwise from north; chi-square with 2 degrees of freedom) plus ``angle_deg``, the
        major axis counter-clockwise from +x.  None when the covariance is not finite (the
        position is not determined).
    """
    e = ellipse(covariance_m2, probability)
    if not all(math.isfinite(v) for v in e.values()):
        return None
    return dict(e, angle_deg=90.0 - e["azimuth_deg"])


def ellipse_from_stored(e95, probability):
    """Scale a stored 95 % ellipse dict to another probability (same shape, chi-square ratio)."""
    s = math.sqrt(chi2.ppf(probability, 2) / chi2.ppf(0.95, 2))
    az = float(e95.get("azimuth_deg", 0.0))
    return {"semi_major_m": float(e95["semi_major_m"]) * s,
            "semi_minor_m": float(e95["semi_minor_m"]) * s,
            "azimuth_deg": az % 180.0, "angle_deg": 90.0 - az}


def nice_length(x):
    """Largest 1, 2 or 5 x 10^k not above ``x`` (``x`` > 0)."""
    if not x > 0:
        return 1.0
    e = math.floor(math.log10(x))
    for m in (5.0, 2.0, 1.0):
        if m * 10.0**e <= x * (1 + 1e-12):
            return m * 10.0**e
    return 5.0 * 10.0 ** (e - 1)


format_length = common_format_length  # the package's one length formatter


def ellipse_half_box(e):
    """Half-widths (x, y) of the bounding box of an ellipse dict, shape (2,)."""
    a, b, t = e["semi_major_m"], e["semi_minor_m"], math.radians(e["angle_deg"])
    return np.array([math.hypot(a * math.cos(t), b * math.sin(t)),
                     math.hypot(a * math.sin(t), b * math.cos(t))])


def fit_view(core_xy, boxes, ratio_range=(0.62, 1.25), min_span_m=10.0, margin=0.07):
    """View limits holding ``core_xy`` and as much of ``boxes`` as is sensible.

    Parameters
    ----------
    core_xy : ndarray, shape (K, 2)
        Points that must be seen (mics, receivers, estimates).
    boxes : list of (centre (2,), half (2,))
        Extents that should be seen (95 % ellipses).

    Returns
    -------
    (x0, x1, y0, y1, clipped)
        ``clipped`` lists the indices of boxes cut off.  A box may grow the view by at most
        half a core span on each side (so the array stays readable); then a margin and padding
        to a printable aspect ratio.
    """
    lo, hi = core_xy.min(axis=0), core_xy.max(axis=0)
    span = max(float((hi - lo).max()), min_span_m)
    allowed_lo, allowed_hi = lo - 0.5 * span, hi + 0.5 * span
    want_lo, want_hi = lo.copy(), hi.copy()
    clipped = []
    for n, (centre, half) in enumerate(boxes):
        blo, bhi = centre - half, centre + half
        if np.any(blo < allowed_lo) or np.any(bhi > allowed_hi):
            clipped.append(n)
        want_lo = np.minimum(want_lo, np.maximum(blo, allowed_lo))
        want_hi = np.maximum(want_hi, np.minimum(bhi, allowed_hi))
    mid = 0.5 * (want_lo + want_hi)
    size = np.maximum(want_hi - want_lo, min_span_m) * (1 + 2 * margin)
    ratio = size[1] / size[0]
    if ratio < ratio_range[0]:
        size[1] = size[0] * ratio_range[0]
    elif ratio > ratio_range[1]:
        size[0] = size[1] / ratio_range[1]
    return (mid[0] - size[0] / 2, mid[0] + size[0] / 2, mid[1] - size[1] / 2,
            mid[1] + size[1] / 2, clipped)


def new_figure(width_in, height_in):
    """A :class:`~matplotlib.figure.Figure` on an Agg canvas (no pyplot, no window)."""
    fig = Figure(figsize=(width_in, height_in))
    FigureCanvasAgg(fig)
    return fig


def pick_corner(view, points, wfrac, hfrac, prefer):
    """The corner (``'ll'``, ``'lr'``, ``'ul'``, ``'ur'``) whose box holds the least weight.

    ``points`` is a list of ((x, y), weight); ties go to the earlier corner in ``prefer``.
    """
    x0, x1, y0, y1 = view
    w, h = (x1 - x0) * wfrac, (y1 - y0) * hfrac
    corners = {"ll": (x0, y0), "lr": (x1 - w, y0), "ul": (x0, y1 - h), "ur": (x1 - w, y1 - h)}
    best, best_score = prefer[0], None
    for name in prefer:
        bx, by = corners[name]
        score = sum(wt for (px, py), wt in points if bx <= px <= bx + w and by <= py <= by + h)
        if best_score is None or score < best_score:
            best, best_score = name, score
    return best


def scale_bar(ax, view, corner, pt_per_m, *, fraction=0.22, label_size=7.5, label="above"):
    """A two-segment bar of a round length (about ``fraction`` of the view width).

    Returns ``(length_m, artists)``.  The bar patches carry the gid ``"scalebar"``.
    """
    x0, x1, y0, y1 = view
    length = nice_length(fraction * (x1 - x0))
    bar_h = 3.5 / pt_per_m
    pad_x, pad_y = 0.045 * (x1 - x0), 0.05 * (y1 - y0)
    bx = x0 + pad_x if corner[1] == "l" else x1 - pad_x - length
    by = y0 + pad_y if corner[0] == "l" else y1 - pad_y - 12 / pt_per_m
    ink = PALETTE["ink"]
    artists = []
    for k in range(2):
        artists.append(ax.add_patch(Rectangle(
            (bx + k * length / 2, by), length / 2, bar_h, zorder=20,
            facecolor=ink if k == 0 else "white", edgecolor=ink, linewidth=0.7,
            gid="scalebar")))
    if label == "above":
        t = ax.text(bx + length / 2, by + bar_h + 2.0 / pt_per_m, format_length(length),
                ha="center", va="bottom", fontsize=label_size, color=ink, zorder=20,
                path_effects=HALO)
    else:
        t = ax.text(bx + length + 3.0 / pt_per_m, by + bar_h / 2, format_length(length),
                    ha="left", va="center", fontsize=label_size, color=ink, zorder=20,
                    path_effects=HALO)
    return length, artists + [t]


def north_arrow(ax, corner):
    """A slim arrow with a half-filled head and an N, in axes-fraction coordinates.

    Returns the artists.  (The map is drawn in local x east, y north, so north is up.)
    """
    cx = 0.06 if corner[1] == "l" else 0.94
    cy = 0.78 if corner[0] == "u" else 0.07
    h, w = 0.09, 0.022
    out = []
    for side, fill in ((-1, PALETTE["ink"]), (1, "white")):
        out.append(ax.add_patch(Polygon(
            [[cx, cy + h], [cx + side * w, cy], [cx, cy + 0.25 * h]], closed=True,
            transform=ax.transAxes, facecolor=fill, edgecolor=PALETTE["ink"], linewidth=0.6,
            zorder=21, gid="north")))
    out.append(ax.text(cx, cy + h + 0.012, "N", transform=ax.transAxes, ha="center",
                       va="bottom", fontsize=9, fontweight="bold", color=PALETTE["ink"],
                       zorder=21, path_effects=HALO))
    return out


def rgb(hex_colour):
    """``'#RRGGBB'`` -> (r, g, b) in 0-1."""
    h = hex_colour.lstrip("#")
    return tuple(int(h[k:k + 2], 16) / 255 for k in (0, 2, 4))


def draw_ellipse(ax, xy, e, probability, color, *, gid, zorder=12):
    """Add a confidence ellipse: 95 %-type dashed with a pale fill, 50 %-type solid, unfilled."""
    common = dict(angle=e["angle_deg"], edgecolor=color, gid=gid)
    if probability >= 0.9:
        patch = Ellipse(xy, 2 * e["semi_major_m"], 2 * e["semi_minor_m"],
                        facecolor=(*rgb(color), 0.12), linestyle=(0, (5, 2.2)), linewidth=1.3,
                        zorder=zorder, **common)
    else:
        patch = Ellipse(xy, 2 * e["semi_major_m"], 2 * e["semi_minor_m"], facecolor="none",
                        linewidth=1.5, zorder=zorder + 0.1, **common)
    ax.add_patch(patch)
    return patch


class Labeller:
    """Place text so it covers neither the protected points (estimates, markers) nor other text.

    Positions are tried in turn and tested in display space (the figure must have its final
    size and axes limits).  When no position is free, the least bad one is taken: leaving the
    map is worst, then covering a heavily weighted point (an estimate), then other text, then
    lightly weighted points (lines).
    """

    _OFFSETS = [(1, 1), (1, -1), (-1, 1), (-1, -1), (1, 0), (-1, 0), (0, 1.3), (0, -1.3)]

    def __init__(self, fig, ax):
        self.fig, self.ax = fig, ax
        self.renderer = fig.canvas.get_renderer()
        self.avoid = []  # (display x, display y, radius px, weight)
        self.placed = []  # display bboxes of placed text and furniture

    def protect(self, xy, radius_pt, weight=1.0):
        """Keep text at least ``radius_pt`` points from the data points ``xy`` (..., 2)."""
        d = self.ax.transData.transform(np.asarray(xy, dtype=float).reshape(-1, 2))
        r = radius_pt * self.fig.dpi / 72.0
        self.avoid.extend((float(px), float(py), r, float(weight)) for px, py in d)

    def _cost(self, bb):
        box = self.ax.get_window_extent(self.renderer)
        if bb.x0 < box.x0 or bb.x1 > box.x1 or bb.y0 < box.y0 or bb.y1 > box.y1:
            return 1e6
        cost = 0.0
        for px, py, r, w in self.avoid:
            qx, qy = min(max(px, bb.x0), bb.x1), min(max(py, bb.y0), bb.y1)
            if (qx - px) ** 2 + (qy - py) ** 2 < r * r:
                cost += w
        return cost + 20.0 * sum(bb.overlaps(p) for p in self.placed)

    def _free(self, bb):
        return self._cost(bb) == 0.0

    def _set(self, ann, ox, oy, dist_pt):
        ann.set_position((ox * dist_pt, oy * dist_pt))
        ann.set_ha("left" if ox > 0 else "right" if ox < 0 else "center")
        ann.set_va("bottom" if oy > 0 else "top" if oy < 0 else "center")
        return ann.get_window_extent(self.renderer).expanded(1.04, 1.08)

    def point_label(self, xy, text, *, prefer=(1, 1), dist_pt=6.0, offsets=None, **kw):
        """Label a point at the first free offset (``prefer`` first), else the least bad one."""
        pool = offsets or self._OFFSETS
        order = [tuple(prefer)] + [o for o in pool if o != tuple(prefer)]
        ann = self.ax.annotate(text, xy, textcoords="offset points", xytext=(0, 0),
                               path_effects=HALO, zorder=25, **kw)
        best = None
        for ox, oy in order:
            bb = self._set(ann, ox, oy, dist_pt)
            cost = self._cost(bb)
            if cost == 0.0:
                self.placed.append(bb)
                return ann
            if best is None or cost < best[0]:
                best = (cost, ox, oy)
        self.placed.append(self._set(ann, best[1], best[2], dist_pt))
        return ann

    def line_label(self, paths, text, away_from, **kw):
        """Write ``text`` along one of ``paths`` (list of (K, 2) vertex arrays, data units).

        Candidate spots run from the far end (from ``away_from``) inward; the text is rotated
        along the local direction of the line.  Returns the artist or None if nothing was free.
        """
        x0, x1 = self.ax.get_xlim()
        y0, y1 = self.ax.get_ylim()
        mx, my = 0.05 * (x1 - x0), 0.05 * (y1 - y0)
        cands = []
        for v in paths:
            if len(v) < 3:
                continue
            d = self.ax.transData.transform(v)
            ang = np.degrees(np.arctan2(np.gradient(d[:, 1]), np.gradient(d[:, 0])))
            ang = (ang + 90.0) % 180.0 - 90.0
            inside = ((v[:, 0] > x0 + mx) & (v[:, 0] < x1 - mx) & (v[:, 1] > y0 + my)
                      & (v[:, 1] < y1 - my))
            dist = np.linalg.norm(v - np.asarray(away_from)[:2], axis=1)
            cands += [(dist[k], v[k], ang[k]) for k in np.flatnonzero(inside)]
        if not cands:
            return None
        cands.sort(key=lambda c: -c[0])
        t = self.ax.text(0, 0, text, ha="center", va="center", path_effects=HALO, zorder=9,
                         rotation_mode="anchor", **kw)
        for _, xy, ang in cands[:: max(1, len(cands) // 60)]:
            t.set_position(xy)
            t.set_rotation(ang)
            bb = t.get_window_extent(self.renderer).expanded(1.1, 1.2)
            if self._free(bb):
                self.placed.append(bb)
                return t
        t.remove()
        return None
