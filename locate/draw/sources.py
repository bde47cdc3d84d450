"""Where the sound comes from, band by band: the SRP-PHAT maps of a span over the site.

The consultant's evidence that the 100 Hz hum comes from plant A and the broadband noise from
plant B: one small map per band (the tonal lines first, then the octaves that carry sound),
each shaded by how strongly the pairs' whitened correlations agree on a source at each point
(0 = the band's median, 1 = its highest), with the mics, the site's outlines and every fixed
source (numbered, with its 95 % ellipse where it is large enough to see).  A source is marked
on the panels of the bands that show it and drawn hollow on the others.

The maps come from :func:`locate.workflows.sources.locate_sources` (objects with ``label``,
``band_hz``, ``x_m``, ``y_m``, ``power``, ``floor``, ``tonal``); nothing here computes them.
"""

from __future__ import annotations

import math

import numpy as np
from matplotlib.patches import Ellipse, Polygon

from locate.draw import kit as mk
from locate.draw.kit import PALETTE, ellipse_axes

__all__ = ["sources_figure"]

_CMAP = "magma_r"


def _panel_maps(maps, max_panels=8):
    """The tonal map and the octave maps that hold something, at most ``max_panels``."""
    keep = []
    for m in maps:
        ex = m.power - m.floor
        top = float(np.max(ex))
        if top > 10.0 * max(getattr(m, "sigma", 0.0), 1e-9) or m.tonal:
            keep.append(m)
    return (keep or list(maps))[:max_panels]


def _shapes(site):
    sk = getattr(site, "sketch", None)
    return [] if sk is None else list(getattr(sk, "shapes", ()) or ())


def sources_figure(site, result, maps, *, title=None):
    """The per-band figure (a :class:`matplotlib.figure.Figure`)."""
    panels = _panel_maps(maps)
    n = len(panels)
    cols = min(n, 3) if n > 1 else 1
    rows = int(math.ceil(n / cols))
    fig = mk.new_figure(3.3 * cols + 0.6, 3.25 * rows + 0.9)
    mics = np.asarray(site.positions_m, float)
    names = list(site.mic_names)
    fixes = result.get("fixes", [])
    colours = ["#004488", "#BB5566", "#228833", "#DDAA33", "#332288", "#999933"]
    for k, m in enumerate(panels):
        ax = fig.add_subplot(rows, cols, k + 1)
        xs, ys, pw, floor = m.x_m, m.y_m, m.power, m.floor
        zoom = getattr(m, "zoom", None)
        if m.tonal and zoom is not None:  # the whole-site tonal map is a mesh of periodic
            xs, ys, pw = zoom  # ridges: show every line's correlation near the source
            floor = float(np.median(pw))
        ex = pw - floor
        top = max(float(ex.max()), 1e-12)
        img = np.clip(ex / top, 0.0, 1.0)
        ax.imshow(img, origin="lower", extent=(xs[0], xs[-1], ys[0], ys[-1]),
                  cmap=_CMAP, vmin=0.0, vmax=1.0, interpolation="bilinear", aspect="equal")
        for shp in _shapes(site):
            ol = np.asarray(shp["outline"], float)
            ax.add_patch(Polygon(ol[:, :2], closed=True, fill=False, lw=0.7,
                                 ec=PALETTE["shape_edge"]))
        ax.plot(mics[:, 0], mics[:, 1], "^", ms=5, mfc=PALETTE["mic"], mec="white", mew=0.6,
                zorder=5)
        if k == 0:
            for (x, y, _), nm in zip(mics, names):
                ax.annotate(nm, (x, y), xytext=(3, 3), textcoords="offset points",
                            fontsize=6, color=PALETTE["mic"])
        for f in fixes:
            s = int(f.get("source", 0))
            col = colours[s % len(colours)]
            x, y = f["position_m"][:2]
            shown = m.label in f.get("bands", []) and not (m.tonal and zoom is not None)
            ax.plot([x], [y], "o", ms=8, mfc=col if shown else "none", mec="white" if shown
                    else col, mew=1.2, zorder=7)
            ax.annotate(f"{s + 1}", (x, y), xytext=(6, -10), textcoords="offset points",
                        fontsize=8, fontweight="bold", color=col, zorder=8,
                        path_effects=mk.HALO)
            cov = np.asarray(f.get("covariance_m2", [[np.nan] * 3] * 3), float)[:2, :2]
            e = ellipse_axes(cov) if np.all(np.isfinite(cov)) and shown else None
            if e is not None and e["semi_major_m"] > 0.01 * (xs[-1] - xs[0]):
                ax.add_patch(Ellipse((x, y), 2 * e["semi_major_m"], 2 * e["semi_minor_m"],
                                     angle=e["angle_deg"], fill=False, ls="--", lw=0.9, ec=col,
                                     zorder=6))
        lo, hi = m.band_hz
        what = (f"tonal lines {lo:.0f}-{hi:.0f} Hz" + (" (near the source)" if zoom is not None
                                                        else "") if m.tonal
                else f"{m.label} ({lo:.0f}-{hi:.0f} Hz)")
        for cx, cy in getattr(m, "candidates", [])[:8]:
            ax.plot([cx], [cy], "x", ms=6, color=PALETTE["ink"], mew=1.0, zorder=7)
        ax.set_title(what, fontsize=8)
        ax.tick_params(labelsize=6)
        ax.set_xlim(xs[0], xs[-1])
        ax.set_ylim(ys[0], ys[-1])
        if k % cols == 0:
            ax.set_ylabel("y (m, north)", fontsize=7)
        if k >= n - cols:
            ax.set_xlabel("x (m, east)", fontsize=7)
    lines = []
    for f in fixes:
        x, y = f["position_m"][:2]
        lo, hi = f.get("band_hz", [0, 0])
        e = f["ellipse95"]["semi_major_m"]
        lines.append(f"{int(f.get('source', 0)) + 1}: x {x:.1f} m, y {y:.1f} m, "
                     f"{lo:.0f}-{hi:.0f} Hz" + (" (tonal)" if f.get("tonal") else "")
                     + ("" if e is None else f", 95 % ellipse {mk.format_length(e)}"))
    head = title or result.get("title") or getattr(site, "title", "") or ""
    fig.suptitle(f"Where the sound comes from, band by band{': ' + head if head else ''}",
                 fontsize=9.5)
    key = ("Shade: agreement of all mic pairs on a source there (whitened correlation, "
           "SRP-PHAT), 0 = band median, 1 = band highest.  Filled: the source stands out in "
           "that band; x: other positions a tonal source fits almost as well.")
    fig.text(0.01, 0.005, key + "\n" + "; ".join(lines), fontsize=6.5, va="bottom",
             color=PALETTE["note"], wrap=True)
    fig.subplots_adjust(left=0.08, right=0.98, top=0.9, bottom=0.14, wspace=0.25, hspace=0.3)
    return fig
