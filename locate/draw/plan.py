"""The planning figure: expected 95 % ellipse size over the site, and the proposed mic(s).

Headless (Agg canvas, no pyplot).  One map, or two side by side when mics are proposed
("the layout now" and "with the proposed mics"), on one shared colour scale:

* filled contours of the semi-major axis of the expected 95 % ellipse, logarithmic 1-2-5
  levels, colour map ``viridis`` reversed (perceptually uniform, readable in greyscale and with
  the common colour-vision deficiencies; light = small ellipse = good), labelled contour lines;
* the area where the array cannot locate hatched on grey;
* mics (filled triangles, names), proposed mics (hollow wine triangles, "+1" ...), receivers
  (squares), site candidates (small rings), the region of interest (dashed outline), site
  outlines and barriers from the site file;
* scale bar, north arrow, colour bar in metres, title and a caption stating the timing model.

Palette and text style follow :mod:`locate.draw.kit` (Tol 2021 colours).
"""

from __future__ import annotations

import math
import textwrap

import numpy as np
from matplotlib import colormaps
from matplotlib.colors import BoundaryNorm
from matplotlib.lines import Line2D
from matplotlib.patches import Patch, Polygon, Rectangle

from locate.accuracy.plan import CONDITION_LIMIT as _COND
from locate.common import format_length
from locate.draw import kit as mk
from locate.draw.kit import HALO, PALETTE

__all__ = ["plan_figure", "format_size"]

_CMAP = "viridis_r"
_NEW = PALETTE["estimate"]  # wine-red for proposed mics
_MASK_FACE = "#D4D4D4"
_MASK_HATCH = "#7A7A7A"
_REGION = PALETTE["ink"]


format_size = format_length  # the package's one length formatter


def _levels(values, limit):
    """Logarithmic 1-2-5 (or 1-3, or decade) contour levels covering ``values``."""
    v = values[np.isfinite(values)]
    if v.size == 0:
        return np.array([limit / 100, limit / 10, limit])
    lo, hi = max(np.percentile(v, 0.5), 1e-9), min(v.max(), limit)
    hi = max(hi, lo * 1.01)
    for mant in ((1, 2, 5), (1, 3), (1,)):
        e0, e1 = math.floor(math.log10(lo)), math.ceil(math.log10(hi))
        lv = np.array([m * 10.0**e for e in range(e0, e1 + 1) for m in mant])
        below, above = lv[lv <= lo], lv[lv >= hi]
        lv = lv[(lv >= (below.max() if below.size else lv[0]))
                & (lv <= (above.min() if above.size else lv[-1]))]
        if len(lv) <= 12:
            return lv
    return lv


def _scale_bar(ax, view, pt_per_m):
    x0, x1, y0, y1 = view
    length = mk.nice_length(0.22 * (x1 - x0))
    bx, by = x0 + 0.045 * (x1 - x0), y0 + 0.05 * (y1 - y0)
    h = 3.5 / pt_per_m
    ax.add_patch(Rectangle((bx - 4 / pt_per_m, by - 4 / pt_per_m), length + 8 / pt_per_m,
                           h + 19 / pt_per_m, facecolor="white", alpha=0.8, edgecolor="none",
                           zorder=19))
    for k in range(2):
        ax.add_patch(Rectangle((bx + k * length / 2, by), length / 2, h, zorder=20,
                               facecolor=PALETTE["ink"] if k == 0 else "white",
                               edgecolor=PALETTE["ink"], linewidth=0.7, gid="scalebar"))
    ax.text(bx + length / 2, by + h + 2 / pt_per_m, format_size(length), ha="center",
            va="bottom", fontsize=7.5, color=PALETTE["ink"], zorder=20, path_effects=HALO)


def _north_arrow(ax):
    cx, cy, h, w = 0.94, 0.80, 0.09, 0.022
    for side, fill in ((-1, PALETTE["ink"]), (1, "white")):
        ax.add_patch(Polygon([[cx, cy + h], [cx + side * w, cy], [cx, cy + 0.25 * h]],
                             closed=True, transform=ax.transAxes, facecolor=fill,
                             edgecolor=PALETTE["ink"], linewidth=0.6, zorder=21, gid="north"))
    ax.text(cx, cy + h + 0.012, "N", transform=ax.transAxes, ha="center", va="bottom",
            fontsize=9, fontweight="bold", color=PALETTE["ink"], zorder=21, path_effects=HALO)


def _field(ax, grid, levels, norm, cmap):
    xs, ys = grid["xs_m"], grid["ys_m"]
    ok = grid["locatable"]
    major = grid["semi_major_m"]
    # the fill runs on under the hatch (no holes at its edge); lines and labels stop there
    fill = np.clip(np.where(np.isfinite(major), major, levels[-1]), levels[0], levels[-1])
    cf = ax.contourf(xs, ys, fill, levels=levels, cmap=cmap, norm=norm, zorder=1)
    z = np.where(ok, fill, np.nan)
    inner = levels[1:-1]
    if ok.any():
        inner = inner[(inner > np.nanmin(z)) & (inner < np.nanmax(z))]
    cs = None
    if ok.any() and inner.size:
        cs = ax.contour(xs, ys, z, levels=inner, colors=[PALETTE["ink"]], linewidths=0.45,
                        alpha=0.75, zorder=2)
        ax.clabel(cs, fmt=format_size, fontsize=7.4, inline=False)
        for t in cs.labelTexts:
            t.set_path_effects(HALO)
            t.set_color(PALETTE["ink"])
            t.set_zorder(8)
    if not ok.all():
        # boundary from a continuous field, so it is smooth: log10(major / limit) where the
        # geometry is well conditioned, a large value where it is not
        cond_ok = np.isfinite(major) & (grid["condition"] <= _COND)
        with np.errstate(divide="ignore"):
            excess = np.where(cond_ok, np.log10(major / grid["max_semi_major_m"]), 10.0)
        excess = np.clip(excess, -10.0, 10.0)
        bad = ax.contourf(xs, ys, excess, levels=[0.0, 10.0], colors=[_MASK_FACE],
                          hatches=["////"], zorder=3, extend="max")
        bad.set_edgecolor(_MASK_HATCH)  # hatch lines take the edge colour; no outline
        bad.set_linewidth(0.0)
        bad.set_gid("unlocatable")
    return cf, cs


def _drop_crowded_labels(fig, ax, cs, keep_clear):
    """Remove contour labels on a marker or the map furniture, and all but 3 of each level."""
    r = fig.canvas.get_renderer()
    pts = [ax.transData.transform(ln.get_xydata()) for ln in ax.lines
           if ln.get_marker() not in (None, "None", "") and len(ln.get_xydata())]
    pts = np.vstack(pts) if pts else np.zeros((0, 2))
    rad = 9.0 * fig.dpi / 72.0
    seen = {}
    frame = ax.get_window_extent(r)
    for t in list(cs.labelTexts):
        bb = t.get_window_extent(r).expanded(1.15, 1.3)
        cut = bb.x0 < frame.x0 or bb.x1 > frame.x1 or bb.y0 < frame.y0 or bb.y1 > frame.y1
        qx = np.clip(pts[:, 0], bb.x0, bb.x1)
        qy = np.clip(pts[:, 1], bb.y0, bb.y1)
        near = np.any((qx - pts[:, 0]) ** 2 + (qy - pts[:, 1]) ** 2 < rad**2)
        seen[t.get_text()] = seen.get(t.get_text(), 0) + 1
        if cut or near or any(bb.overlaps(b) for b in keep_clear) or seen[t.get_text()] > 3:
            t.remove()
            cs.labelTexts.remove(t)
    return [t.get_window_extent(r) for t in cs.labelTexts]


def _underlay(ax, site):
    sk = getattr(site, "sketch", None)
    for s in (sk.shapes if sk is not None else ()):
        v = np.asarray(s["outline"], float)
        ax.add_patch(Polygon(v, closed=True, facecolor="none", edgecolor="white", lw=1.8,
                             zorder=4))
        ax.add_patch(Polygon(v, closed=True, facecolor="none", edgecolor=PALETTE["shape_edge"],
                             lw=0.8, zorder=4.1))
        if s.get("label"):
            c = v.mean(axis=0)
            ax.text(c[0], c[1], s["label"], ha="center", va="center", fontsize=7.4,
                    color=PALETTE["shape_text"], style="italic", zorder=4.2, path_effects=HALO)
    for b in getattr(site, "barriers", ()):
        ln = np.asarray(b.line_m, float)
        ax.plot(ln[:, 0], ln[:, 1], color="white", lw=4.0, zorder=4.25,
                solid_capstyle="butt")
        ax.plot(ln[:, 0], ln[:, 1], color=PALETTE["barrier"], lw=2.2, zorder=4.3,
                solid_capstyle="butt", gid=f"barrier:{b.label}")


def _points(fig, ax, res, picks, lab_all, site):
    lab = mk.Labeller(fig, ax)
    lab.placed += lab_all
    mics = res.mic_positions_m
    lab.protect(mics[:, :2], 6.0)
    if res.region_outline_m is not None:
        v = np.vstack([res.region_outline_m, res.region_outline_m[:1]])
        ax.plot(v[:, 0], v[:, 1], color="white", lw=2.8, zorder=6)
        ax.plot(v[:, 0], v[:, 1], color=_REGION, lw=1.3, ls=(0, (5, 2.5)), zorder=6.1,
                gid="region")
    if res.candidate_kind == "site":
        ax.plot(res.candidates_m[:, 0], res.candidates_m[:, 1], "o", ms=4.2, mfc="white",
                mec=PALETTE["note"], mew=0.8, zorder=7, gid="candidates")
        lab.protect(res.candidates_m[:, :2], 3.5)
        cand_labels = len(res.candidates_m) <= 30
    else:
        cand_labels = False
    centre = mics[:, :2].mean(axis=0)
    for nm, p in zip(res.mic_names, mics, strict=True):
        ax.plot(*p[:2], "^", ms=9, mfc=PALETTE["mic"], mec="white", mew=0.8, zorder=15,
                gid=f"mic:{nm}")
    for p in picks:
        ax.plot(*p.position_m[:2], "^", ms=10, mfc="white", mec=_NEW, mew=1.8, zorder=16,
                gid=f"proposed:{p.name}", clip_on=False)
        lab.protect(p.position_m[:2], 6.0)
    for nm, p in res.receivers:
        ax.plot(*p[:2], "s", ms=7, mfc=PALETTE["receiver"], mec=PALETTE["ink"], mew=0.8,
                zorder=14, gid=f"receiver:{nm}")
        lab.protect(p[:2], 5.0)
    for nm, p in zip(res.mic_names, mics, strict=True):
        d = p[:2] - centre
        lab.point_label(p[:2], nm, prefer=(1 if d[0] >= 0 else -1, 1 if d[1] >= 0 else -1),
                        fontsize=8.2, fontweight="bold", color=PALETTE["mic"])
    for k, p in enumerate(picks):
        lab.point_label(p.position_m[:2], f"+{k + 1} {_pick_name(res, p)}", prefer=(1, 1),
                        fontsize=8.2, fontweight="bold", color=_NEW)
    for nm, p in res.receivers:
        lab.point_label(p[:2], nm, prefer=(1, -1), fontsize=7.6, color=PALETTE["ink"])
    chosen = {p.name for p in picks}
    shown = zip(res.candidate_names, res.candidates_m, strict=True) if cand_labels else ()
    for nm, p in shown:
        if nm not in chosen:
            lab.point_label(p[:2], nm, prefer=(1, 1), dist_pt=3.5, fontsize=6.5,
                            color=PALETTE["note"])
    for b in getattr(site, "barriers", ()):
        ln = np.asarray(b.line_m, float)
        k = int(np.argmax(ln[:, 1]))
        lab.point_label(ln[k], f"{b.label} ({b.height_m:g} m)", prefer=(0, 1.3), dist_pt=3,
                        fontsize=7.4, color=PALETTE["barrier"], fontstyle="italic")


def _pick_name(res, p):
    """Site candidates by name; grid candidates by where they are."""
    if res.candidate_kind == "site":
        return p.name
    return f"at ({p.position_m[0]:.0f}, {p.position_m[1]:.0f})"


def _panel(fig, rect, res, site, grid, picks, levels, norm, cmap, heading, first):
    ax = fig.add_axes(rect, label="map" if first else "map_after")
    x0, x1, y0, y1 = res.extent_m
    ax.set_xlim(x0, x1)
    ax.set_ylim(y0, y1)
    ax.set_aspect("equal", adjustable="box")
    ax.set_facecolor(PALETTE["paper"])
    ax.tick_params(length=2.5, pad=1.5)
    ax.set_xlabel("x east (m)", fontsize=7.5, labelpad=1.5)
    if first:
        ax.set_ylabel("y north (m)", fontsize=7.5, labelpad=1.5)
    ax.set_title(heading, fontsize=9, loc="left", color=PALETTE["ink"], pad=4)
    cf, cs = _field(ax, grid, levels, norm, cmap)
    _underlay(ax, site)
    pt_per_m = rect[2] * fig.get_figwidth() * 72.0 / (x1 - x0)
    _scale_bar(ax, (x0, x1, y0, y1), pt_per_m)
    if first:
        _north_arrow(ax)
    r = fig.canvas.get_renderer()
    contour_labels = [] if cs is None else cs.labelTexts
    furniture = [a.get_window_extent(r) for a in ax.patches + ax.texts
                 if a not in contour_labels]
    _points(fig, ax, res, picks, furniture, site)
    if cs is not None:
        names = [t.get_window_extent(r) for t in ax.texts if t not in contour_labels]
        _drop_crowded_labels(fig, ax, cs, names + furniture)
    return ax, cf


def _caption(res):
    t = res.timing
    dims = ("2-D fix, source height known" if res.dims == 2 else "3-D fix")
    words = [f"Colour: semi-major axis of the {100 * res.probability:.0f} % confidence ellipse "
             f"(χ², 2 dof) that a fix of a source at each point would have: the "
             f"Cramér–Rao bound of the {dims}, map plane z = {res.source_z_m:g} m",
             f"timing: {t.describe()}"
             + ("; the SNR is taken as the same for every source position and mic"
                if t.kind == "carter" else "")]
    if not res.grid["locatable"].all() or (res.grid_after is not None
                                           and not res.grid_after["locatable"].all()):
        words.append("hatched: the array cannot locate there (ill-conditioned geometry, or an "
                     f"ellipse larger than {format_size(res.grid['max_semi_major_m'])})")
    words.append(f"sound speed {res.sound_speed_mps:.1f} m/s")
    if res.proposals:
        before = res.region_before
        region = {"polygon": "the region of interest (dashed)", "receivers": "the receivers",
                  "extent": "the whole map", "given": "the given points"}[res.region_kind]
        last = res.proposals[-1]
        names = ", ".join(f"{p.name} ({p.position_m[0]:.0f}, {p.position_m[1]:.0f})"
                          if res.candidate_kind == "site" else _pick_name(res, p)[3:]
                          for p in res.proposals)
        names = f"mic{'s' if len(res.proposals) > 1 else ''} at " + names
        what = "worst" if res.objective == "worst" else "mean"
        msg = (f"proposed: {names}; the {what} semi-major over {region} goes from "
               f"{format_size(before[1]) if np.isfinite(before[1]) else 'not locatable'} to "
               f"{format_size(last.metric_after_m)}")
        if np.isfinite(before[1]) and last.metric_after_m > 0:
            f = before[1] / last.metric_after_m
            msg += f" ({f:,.0f} × smaller)" if f >= 100 else f" ({f:.2g} × smaller)"
        if before[0] or last.unlocatable_after:
            msg += (f"; points not locatable {before[0]} -> {last.unlocatable_after} of "
                    f"{len(res.region_points_m)}")
        src = {"site": "the site file's candidates", "grid": "a grid of candidates",
               "given": "the given candidates"}[res.candidate_kind]
        words.append(msg + f", chosen greedily from {src}")
    declared = res.timing.extra_arrival_cov_s2 is not None
    words.append(("a bound with the declared survey and clock uncertainties: sound-speed "
                  "errors" if declared else "a bound: mic-position, clock and sound-speed "
                  "errors") + ", echoes and wind gusts make real ellipses larger; local "
                 "metres, x east, y north")
    return "; ".join(words) + "."


def plan_figure(plan_result, site=None, *, width_in=None):
    """Draw a :class:`locate.accuracy.plan_site.PlanResult`.

    Parameters
    ----------
    plan_result : PlanResult
    site : locate.io.site.Site, optional
        For site outlines (``sketch.shapes``) and barriers under the map.
    width_in : float, optional
        Figure width; default 7.5 in for one map, 12 in for two.

    Returns
    -------
    matplotlib.figure.Figure
        Axes labelled ``"map"`` (and ``"map_after"``) and ``"colorbar"``; the hatched area has
        gid ``"unlocatable"``, markers ``"mic:<name>"``, ``"proposed:<name>"``,
        ``"receiver:<name>"``.
    """
    with mk.style():
        return _compose(plan_result, site, width_in)


def _compose(res, site, width_in):
    two = bool(res.proposals) and res.grid_after is not None
    n = 2 if two else 1
    width = width_in or (12.0 if two else 7.5)
    x0, x1, y0, y1 = res.extent_m
    left, gap, right, cbar = 0.6, 0.35, 1.25, 0.16
    map_w = (width - left - right - gap * (n - 1)) / n
    map_h = map_w * (y1 - y0) / (x1 - x0)
    top, legend_h = 0.85, 0.35
    caption = textwrap.wrap(_caption(res), int(width * 17.5))
    bottom = 0.55 + legend_h + 0.14 * len(caption)
    height = map_h + top + bottom
    fig = mk.new_figure(width, height)
    vals = [res.grid["semi_major_m"][res.grid["locatable"]]]
    if two:
        vals.append(res.grid_after["semi_major_m"][res.grid_after["locatable"]])
    levels = _levels(np.concatenate(vals), res.grid["max_semi_major_m"])
    cmap = colormaps[_CMAP]
    norm = BoundaryNorm(levels, cmap.N)
    axes = []
    heading = "The layout now" if two else f"Layout: {len(res.mic_names)} mics"
    rect = [left / width, bottom / height, map_w / width, map_h / height]
    ax, cf = _panel(fig, rect, res, site, res.grid, [], levels, norm, cmap, heading, True)
    axes.append(ax)
    if two:
        k = len(res.proposals)
        rect2 = [(left + map_w + gap) / width, bottom / height, map_w / width, map_h / height]
        ax2, _ = _panel(fig, rect2, res, site, res.grid_after, res.proposals, levels, norm, cmap,
                        f"With the proposed mic{'s' if k > 1 else ''} (+{k})", False)
        axes.append(ax2)
    pos = axes[-1].get_position()
    cax = fig.add_axes([pos.x1 + 0.12 / width, pos.y0, cbar / width, pos.height],
                       label="colorbar")
    cb = fig.colorbar(cf, cax=cax, ticks=levels)
    cb.ax.set_yticklabels([format_size(v) for v in levels], fontsize=7.5)
    cb.set_label(f"{100 * res.probability:.0f} % ellipse semi-major axis", fontsize=7.5)
    cb.ax.tick_params(length=2)
    title = f"{res.title} — where this array can locate a sound"
    fig.text(left / width, 1 - 0.18 / height, title, ha="left", va="top", fontsize=11.5,
             fontweight="bold", color=PALETTE["ink"])
    fig.text(left / width, 1 - 0.45 / height, res.timing.describe()[0].upper()
             + res.timing.describe()[1:], ha="left", va="top", fontsize=8,
             color=PALETTE["note"])
    handles = [Line2D([], [], ls="none", marker="^", ms=8, mfc=PALETTE["mic"], mec="white",
                      label="mic")]
    if res.proposals:
        handles.append(Line2D([], [], ls="none", marker="^", ms=8, mfc="white", mec=_NEW,
                              mew=1.6, label="proposed mic"))
    if res.candidate_kind == "site":
        handles.append(Line2D([], [], ls="none", marker="o", ms=4.2, mfc="white",
                              mec=PALETTE["note"], label="candidate position"))
    if res.receivers:
        handles.append(Line2D([], [], ls="none", marker="s", ms=6.5, mfc=PALETTE["receiver"],
                              mec=PALETTE["ink"], label="receiver"))
    if res.region_outline_m is not None:
        handles.append(Line2D([], [], color=_REGION, lw=1.3, ls=(0, (5, 2.5)),
                              label="region of interest"))
    if not res.grid["locatable"].all() or (two and not res.grid_after["locatable"].all()):
        handles.append(Patch(facecolor=_MASK_FACE, edgecolor=_MASK_HATCH, hatch="////",
                             lw=0.0, label="cannot locate"))
    fig.legend(handles=handles, loc="upper left", ncols=len(handles), frameon=False,
               fontsize=7.8, bbox_to_anchor=(left / width, (bottom - 0.42) / height),
               handlelength=1.6, columnspacing=1.6, borderaxespad=0.0)
    fig.text(left / width, (bottom - 0.42 - legend_h) / height, "\n".join(caption),
             ha="left", va="top", fontsize=7.5, color=PALETTE["note"], linespacing=1.3)
    return fig
