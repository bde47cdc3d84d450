"""Figures: the site map with fixes or a track, the diagnostics panels, and saving them.

Headless by construction: figures are :class:`matplotlib.figure.Figure` objects on an Agg canvas,
made without :mod:`matplotlib.pyplot`, so there is no window, no global figure list and no
backend switch in the caller's process.  :func:`save_figure` writes PNG, SVG or PDF atomically.
The look (palette and its source, symbols, furniture) is described in :mod:`locate.draw.kit`.

Functions
---------
* :func:`draw_map` - from plain arrays and a result dict (testable without a site file).
* :func:`map_figure` - the same from a :class:`locate.io.site.Site`.
* :func:`panels_figure` - per-pair GCC-PHAT curves and residuals (:mod:`locate.draw.panels`).
* :func:`save_figure` - PNG / SVG / PDF by extension, temp file + ``os.replace``.
* :func:`check_result` - is this a ``tdoa-result/1`` dict we can draw?
"""

from __future__ import annotations

import io
import math
import textwrap
from pathlib import Path

import numpy as np
from matplotlib.patches import Polygon, Rectangle
from matplotlib.transforms import Affine2D

from locate.common import write_atomic
from locate.draw import kit as mk
from locate.draw.kit import PALETTE, ellipse_axes
from locate.draw.mapdata import SCHEMA, check_result, mics_of, wind_of
from locate.draw.parts import (
    densify,
    draw_hyperbolae,
    draw_track,
    side_column,
    time_ticks,
    zoom_panel,
)
from locate.errors import OptionError, ResultFileError
from locate.geometry import frames as geo

__all__ = ["PALETTE", "SCHEMA", "ellipse_axes", "check_result", "draw_map", "map_figure",
           "panels_figure", "save_figure", "figure_bytes"]

_FORMATS = {".png": "png", ".svg": "svg", ".pdf": "pdf"}
_GRID_N = 321  # grid points per side for the hyperbola fields (~0.3 % of the view apart)


# --------------------------------------------------------------------------------------------
# The map


def _getter(air, result):
    if air is None:
        air = result.get("air") or {}
    if isinstance(air, dict):
        return air.get
    return lambda k, d=None: getattr(air, k, d)


def _caption_words(air, result, c, entries, kind):
    get = _getter(air, result)
    t, rh = get("temperature_c"), get("relative_humidity")
    words = []
    if t is not None:
        words.append(f"air {float(t):.1f} °C" + (f", RH {float(rh):.0f} %" if rh is not None
                                                 else ""))
    else:
        words.append("air temperature not given")
    if c is not None:
        words[-1] += f", sound speed {float(c):.1f} m/s"
    ws, wd = get("wind_speed_mps"), get("wind_from_deg")
    if ws:
        words[-1] += f", wind {float(ws):.1f} m/s from {float(wd or 0):.0f}°"
    key = "t_heard_s" if kind == "track" else "t_s"
    ts = [float(e[key]) for e in entries if e[key] is not None]
    ts += [v for e in entries if e["span_s"] is not None for v in e["span_s"]]
    if ts:
        t0, t1 = min(ts), max(ts)
        words.append(f"heard at {t0:.2f} s" if t1 - t0 < 5e-3
                     else f"heard {t0:.2f}–{t1:.2f} s into the recording")
    if kind == "track":
        words.append("track points are where the sound was emitted; time labels are emission "
                     "times")
        grown = max([e.get("grown", 1.0) for e in entries] or [1.0])
        majors = [e["e95"]["semi_major_m"] for e in entries if e["e95"] is not None]
        if not math.isfinite(grown):
            words.append("95 % ellipses (χ², 2 dof) are too small to draw at this scale: the "
                         f"largest semi-major is {mk.format_length(max(majors))}")
        else:
            words.append("95 % ellipses at intervals from each point's covariance (χ², 2 dof)"
                         + (f", drawn {grown:g} times enlarged as they would hide under the "
                            "track" if grown > 1.0 else ""))
        words.append("the arrows beside the track run from where a sound left the source to "
                     "where the source is when that sound is heard")
        tr = result.get("track") or {}
        if tr.get("model"):
            words.append(f"motion model {tr['model']}")
        if tr.get("flagged"):
            words.append("FLAGGED: the motion model does not explain the windows; the ellipses "
                         "are widened to cover the model error")
        if (tr.get("uncertainty") or {}).get("timing_only"):
            words.append("uncertainties are timing only (no survey, clock or air uncertainty "
                         "declared)")
    else:
        words.append("ellipses: 50 % and 95 % confidence from the fit covariance (χ², 2 dof)")
    words.append("local metres, x east, y north")
    return words


def _mics_out(entries, shown, key):
    """``{mic name: [fix numbers]}`` of the mics listed under ``key`` in the shown fixes."""
    out = {}
    for k in shown:
        for m in entries[k][key]:
            out.setdefault(m, []).append(k + 1)
    return out


def draw_map(mic_positions_m, mic_names, result, *, sketch=None, receivers=(), barriers=(),
             air=None, wind_mps=None, title=None, caption=None, fix_index=None,
             hyperbolae=None, zoom=None, width_in=8.0, file=None, caption_in_figure=True):
    """Draw a fix or track result on a map of the site.

    Parameters
    ----------
    mic_positions_m : array_like, shape (N, 2) or (N, 3), or None
        Mic positions, local metres; None: the result's own ``mics`` list.
    mic_names : sequence of str, length N (ignored when ``mic_positions_m`` is None)
    result : dict
        A ``tdoa-result/1`` result of kind ``"fix"`` or ``"track"``.  Delay entries of a fix
        (``fixes[k].delays``) are read as ``{"mics": [a, b], "delay_s": d, "used": bool}``
        (``used`` optional: a pair is used unless one of its mics is in ``rejected_mics``).
    sketch : locate.io.sketch.SiteSketch, optional
        Image, outlines and features to draw under the map.
    receivers : sequence of (name, position_m)
        Named points of interest.
    barriers : sequence of (label, line_m (K, 2))
    air : locate.io.site.Air or dict, optional
        For the caption (temperature, humidity, wind); default ``result["air"]``.
    wind_mps : array_like, shape (3,), optional
        Wind for the hyperbolae when the result does not record it (``wind_mps`` or
        ``air.wind_speed_mps`` / ``air.wind_from_deg``); default still air.
    title : str, optional
        Replaces the automatic title.
    caption : str, optional
        Appended to the automatic caption.
    fix_index : int, optional
        Draw only this fix (0-based).
    hyperbolae : bool, optional
        Draw each used pair's hyperbola; default: when one fix is drawn (with several, the
        curves of all fixes tangle; pick one with ``fix_index``).
    zoom : bool, optional
        Add a zoomed panel around the first estimate; default: when its 95 % ellipse would be
        under 5 mm across on the printed map.
    width_in : float
        Figure width, inches.
    file : path, optional
        The result file, named in errors.
    caption_in_figure : bool
        Print the caption under the map (a report prints it as the figure's caption
        instead).  Either way the text is kept as ``fig.tdoa_caption``.

    Returns
    -------
    matplotlib.figure.Figure
        Axes labelled ``"map"``, ``"legend"`` (and ``"zoom"``).  Artists carry gids:
        ``"hyperbola:<fix>:<a>-<b>"`` (contour sets), ``"ellipse50:<fix>"``,
        ``"ellipse95:<fix>"``, ``"estimate:<fix>"``, ``"mic:<name>"``, ``"rejected:<name>"``,
        ``"receiver:<name>"``, ``"track"``, ``"heading"``, ``"now:<point>"``.
    """
    if mic_positions_m is None:
        mic_names, mic_positions_m = mics_of(result, file=file)
    names = [str(n) for n in mic_names]
    mics = np.asarray(mic_positions_m, dtype=float)
    if mics.ndim != 2 or mics.shape[0] != len(names) or mics.shape[1] not in (2, 3):
        raise ValueError(f"mic_positions_m must be (N, 2|3) with N = {len(names)} names, "
                         f"got shape {mics.shape}")
    if mics.shape[1] == 2:
        mics = np.column_stack([mics, np.zeros(len(mics))])
    entries = check_result(result, file=file)
    if not entries:
        raise ResultFileError("the result holds no fix or track point to draw", file=file,
                              field="fixes" if result["kind"] == "fix" else "track.points")
    if fix_index is not None and not 0 <= fix_index < len(entries):
        raise OptionError(f"fix {fix_index + 1} does not exist: the result has "
                          f"{len(entries)}", field="fix_index")
    with mk.style():
        return _compose(names, mics, result, entries, sketch, receivers, barriers, air,
                        wind_mps, title, caption, fix_index, hyperbolae, zoom, width_in, file,
                        caption_in_figure)


MANY_FIXES = 40  # above this many fixes on one map (a sweep), fixes are drawn as dots
VISIBLE_ELLIPSE_PT = 17.0  # a 95 % ellipse narrower than this (6 mm in print) hides under its dot


def _enlargement(e95, pt_per_m):
    """A round factor (1, 2, 5 x 10^k) that makes a 95 % ellipse visible beside its dot on a
    map of several fixes; 1 when it is visible as it is."""
    if e95 is None:
        return 1.0
    across_pt = 2.0 * e95["semi_major_m"] * pt_per_m
    if across_pt >= VISIBLE_ELLIPSE_PT or not across_pt > 0:
        return 1.0
    return max(mk.nice_length(VISIBLE_ELLIPSE_PT / across_pt), 1.0)


def _scaled(e, factor):
    if e is None or factor == 1.0:
        return e
    return dict(e, semi_major_m=e["semi_major_m"] * factor,
                semi_minor_m=e["semi_minor_m"] * factor)


def _compose(names, mics, result, entries, sketch, receivers, barriers, air, wind_mps, title,
             caption, fix_index, hyperbolae, zoom, width_in, file, caption_in_figure=True):
    kind = result["kind"]
    shown = [fix_index] if fix_index is not None else list(range(len(entries)))
    c = result.get("sound_speed_mps")
    wind = wind_of(result, wind_mps)
    rec = [(str(n), np.asarray(p, dtype=float)[:2]) for n, p in receivers]
    est = np.array([entries[k]["position_m"][:2] for k in shown])

    # ---- view and layout (inches): map on the left, side column right, caption below
    many = kind == "fix" and len(shown) > MANY_FIXES  # a sweep: dots, every k-th ellipse
    step = 1 if kind == "fix" and not many else max(1, math.ceil(len(shown) / 8))
    ell_of = [k for n, k in enumerate(shown) if entries[k]["e95"] is not None
              and (n % step == 0 or n == len(shown) - 1)]
    core = [mics[:, :2], est] + [p[None] for _, p in rec]
    core += [entries[k]["now_m"][None, :2] for k in shown if entries[k]["now_m"] is not None]
    boxes = [(entries[k]["position_m"][:2], mk.ellipse_half_box(entries[k]["e95"]))
             for k in ell_of]
    x0, x1, y0, y1, clipped = mk.fit_view(np.vstack(core), boxes)
    view = (x0, x1, y0, y1)
    left_in, top_in, bottom_in = 0.6, 0.55, 0.95 if caption_in_figure else 0.45
    map_w = width_in * 0.68
    map_h = map_w * (y1 - y0) / (x1 - x0)
    fig_h = round(map_h + top_in + bottom_in, 2)  # whole pixels at 100, 150 and 300 dpi
    fig = mk.new_figure(width_in, fig_h)
    ax = fig.add_axes([left_in / width_in, bottom_in / fig_h, map_w / width_in, map_h / fig_h],
                      label="map")
    ax.set_xlim(x0, x1)
    ax.set_ylim(y0, y1)
    ax.set_aspect("equal", adjustable="box")
    ax.set_facecolor(PALETTE["paper"])
    ax.grid(True, color=PALETTE["grid"], linewidth=0.5)
    ax.set_axisbelow(True)
    ax.set_xlabel("x east (m)", fontsize=7.5, labelpad=1.5)
    ax.set_ylabel("y north (m)", fontsize=7.5, labelpad=1.5)
    ax.tick_params(length=2.5, pad=1.5)
    pt_per_m = map_w * 72.0 / (x1 - x0)
    notes = []
    lab = mk.Labeller(fig, ax)
    lab.protect(est if not many else est[[shown.index(k) for k in ell_of]],
                7.5 if kind == "fix" else 3.5, weight=100.0 if kind == "fix" else 3.0)
    lab.protect(mics[:, :2], 5.5, weight=10.0)
    for _, p in rec:
        lab.protect(p, 5.0, weight=10.0)
    for _, line in barriers:  # keep labels off the barrier lines
        lab.protect(densify(np.asarray(line, dtype=float)), 2.5)

    _underlay(ax, sketch, barriers)

    # ---- hyperbolae, then what they point at
    draw_h = (len(shown) == 1 and kind == "fix") if hyperbolae is None else bool(hyperbolae)
    lines = []
    if hyperbolae is None and kind == "fix" and len(shown) > 1:
        notes.append("hyperbolae are drawn when one fix is mapped on its own")
    if draw_h and kind == "fix" and c is not None:
        for k in shown:
            drawn, more = draw_hyperbolae(ax, entries[k], k, names, mics, c, wind, view, _GRID_N,
                                      file)
            lines += [(cs, text, entries[k]["position_m"]) for cs, text in drawn]
            notes += more
    color = PALETTE["estimate"]
    if kind == "track":
        draw_track(ax, lab, result, [entries[k] for k in shown], shown, ell_of, entries,
                    view, pt_per_m)
    elif many:
        ax.plot(est[:, 0], est[:, 1], "o", ms=2.2, color=color, alpha=0.45, mew=0,
                zorder=29, gid="estimates")
        for k in ell_of:
            mk.draw_ellipse(ax, entries[k]["position_m"][:2], entries[k]["e95"], 0.95, color,
                            gid=f"ellipse95:{k + 1}")
        notes.append(f"{len(shown)} fixes drawn as dots; the 95 % ellipses and numbers of every "
                     f"{step}th")
    else:
        grown = {k: _enlargement(entries[k]["e95"], pt_per_m) if len(shown) > 1 else 1.0
                 for k in shown}
        if any(g > 1.0 for g in grown.values()):
            notes.append("ellipses marked ×N are drawn N times enlarged, as they would hide "
                         "under their dots at map scale (true sizes in the list)")
        for k in shown:
            e = entries[k]
            grow = grown[k]
            if e["e95"] is not None:
                mk.draw_ellipse(ax, e["position_m"][:2], _scaled(e["e95"], grow), 0.95, color,
                                gid=f"ellipse95:{k + 1}")
                mk.draw_ellipse(ax, e["position_m"][:2], _scaled(e["e50"], grow), 0.50, color,
                                gid=f"ellipse50:{k + 1}")
            ax.plot(*e["position_m"][:2], "o", ms=6.5, color=color, mec="white", mew=1.2,
                    zorder=30, gid=f"estimate:{k + 1}")
            if e["mirror_m"] is not None:
                ax.plot(*e["mirror_m"][:2], "D", ms=5, mfc="none", mec=color, mew=1.0,
                        zorder=29, gid=f"mirror:{k + 1}")
                lab.protect(e["mirror_m"][:2], 5.0)
    for n in clipped:
        k = ell_of[n]
        notes.append(f"the 95 % ellipse of {'fix' if kind == 'fix' else 'point'} "
                     f"{entries[k].get('label', k + 1) if kind == 'fix' else k + 1} "
                     f"(semi-major {mk.format_length(entries[k]['e95']['semi_major_m'])}) "
                     "reaches beyond the view")

    # ---- furniture first (scale bar, north arrow in the emptiest corners), so labels avoid it
    weights = [(tuple(p), 10) for p in est] + [(tuple(p), 3) for p in mics[:, :2]]
    weights += [(tuple(p), 2) for _, p in rec]
    sb = mk.pick_corner(view, weights, 0.34, 0.14, ("ll", "lr", "ul", "ur"))
    furniture = mk.scale_bar(ax, view, sb, pt_per_m)[1]
    weights.append(((x0 if sb[1] == "l" else x1, y0 if sb[0] == "l" else y1), 50))
    furniture += mk.north_arrow(ax, mk.pick_corner(view, weights, 0.12, 0.24,
                                                   ("ur", "ul", "lr", "ll")))
    lab.placed += [a.get_window_extent(lab.renderer).expanded(1.1, 1.1) for a in furniture]

    # ---- mics, receivers and all labels
    rejected = _mics_out(entries, shown, "rejected")
    dead = {m: v for m, v in _mics_out(entries, shown, "dead").items() if m not in rejected}
    _draw_points(ax, lab, names, mics, rec, rejected, dead)
    _underlay_labels(lab, sketch, barriers)
    if kind == "track":
        ts = [entries[k]["t_s"] for k in shown]
        if len(shown) >= 2 and all(t is not None for t in ts):
            time_ticks(ax, lab, np.asarray(ts, dtype=float), est, pt_per_m)
    if kind == "fix" and len(shown) > 1:
        for k in (ell_of if many else shown):
            g = 1.0 if many else grown[k]
            lab.point_label(entries[k]["position_m"][:2],
                            entries[k].get("label", str(k + 1))
                            + (f" (×{g:g})" if g > 1.0 else ""), prefer=(1, 1),
                            dist_pt=5, fontsize=8, fontweight="bold", color=color)
    if len(lines) <= 15:
        for cs, text, at in lines:
            lab.line_label([p.vertices for p in cs.get_paths()], text, at, fontsize=7.0,
                           color=PALETTE["hyperbola_text"])

    # ---- side column and caption
    side, list_bottom = side_column(fig, ax, result, entries, shown, rejected, dead,
                                     bool(lines), rec)
    first = entries[shown[0]]
    if kind == "fix" and first["e95"] is not None and len(shown) == 1:
        tiny = 2 * first["e95"]["semi_major_m"] * pt_per_m < 14.0  # < 5 mm across in print
        if tiny if zoom is None else zoom:
            if zoom_panel(fig, side, list_bottom, first, shown[0], names, mics, c, wind, file):
                notes.append(f"the inset enlarges fix {shown[0] + 1}, whose ellipses are too "
                             "small to see at map scale")
            else:
                notes.append(f"the ellipses of fix {shown[0] + 1} are too small to see at map "
                             "scale (sizes in the list)")
    if title is None:
        what = "track" if kind == "track" else ("fix" if len(shown) == 1 else "fixes")
        title = f"{result.get('title') or result.get('site') or 'Site'} — {what}"
    fig.text(left_in / width_in, 1 - 0.16 / fig_h, title, ha="left", va="top", fontsize=11,
             fontweight="bold", color=PALETTE["ink"])
    words = _caption_words(air, result, c, [entries[k] for k in shown], kind) + notes
    if caption:
        words.append(caption)
    sentence = "; ".join(words) + "."
    fig.tdoa_caption = sentence[0].upper() + sentence[1:]
    if caption_in_figure:
        wrapped = textwrap.wrap(fig.tdoa_caption, 140)
        room_in = 0.06 + len(wrapped) * 7.2 * 1.3 / 72.0  # lines of 7.2 pt, spacing 1.3
        if room_in > 0.42:
            _grow_bottom(fig, room_in - 0.42)
        fig_h = fig.get_figheight()
        fig.text(left_in / width_in, room_in / fig_h if room_in > 0.42 else 0.42 / fig_h,
                 "\n".join(wrapped), ha="left", va="top", fontsize=7.2, color=PALETTE["note"],
                 linespacing=1.3)
    return fig


def _grow_bottom(fig, extra_in):
    """Add ``extra_in`` inches below everything drawn so far (room for a longer caption)."""
    old_h = fig.get_figheight()
    new_h = old_h + extra_in
    fig.set_figheight(new_h)
    for ax in fig.axes:
        x0, y0, w, h = ax.get_position().bounds
        ax.set_position([x0, (y0 * old_h + extra_in) / new_h, w, h * old_h / new_h])
    for text in fig.texts:
        x, y = text.get_position()
        text.set_position((x, (y * old_h + extra_in) / new_h))


def _underlay(ax, sketch, barriers):
    """Image (muted under a white veil so the evidence reads), outlines, features, barriers."""
    if sketch is not None:
        if sketch.image is not None and sketch.georef is not None:
            h, w = sketch.image.shape[:2]
            im = ax.imshow(sketch.image, origin="upper", extent=(-0.5, w - 0.5, h - 0.5, -0.5),
                           zorder=0.5, cmap="gray" if sketch.image.ndim == 2 else None)
            im.set_transform(Affine2D(sketch.georef.pixel_to_map_affine()) + ax.transData)
            im.set_gid("sketch-image")
            ax.add_patch(Rectangle((0, 0), 1, 1, transform=ax.transAxes, facecolor="white",
                                   alpha=0.3, edgecolor="none", zorder=0.6))
            ax.grid(False)
        for s in list(sketch.outlines) + list(sketch.features):
            xy = s["outline_m"]
            if s.get("kind") == "point":
                ax.plot(xy[:, 0], xy[:, 1], "o", ms=3, color=PALETTE["shape_edge"], zorder=1)
            elif s.get("closed", s.get("kind") == "polygon"):
                ax.add_patch(Polygon(xy, closed=True, facecolor=PALETTE["shape_fill"],
                                     edgecolor=PALETTE["shape_edge"], linewidth=0.8, zorder=1,
                                     alpha=0.85))
            else:
                ax.plot(xy[:, 0], xy[:, 1], color=PALETTE["shape_edge"], lw=1.0, zorder=1)
    for _, line in barriers:
        ln = np.asarray(line, dtype=float)
        ax.plot(ln[:, 0], ln[:, 1], color=PALETTE["barrier"], lw=3.2, solid_capstyle="butt",
                zorder=2, gid="barrier")


def _underlay_labels(lab, sketch, barriers):
    from locate.io.sketch import label_point

    if sketch is not None:
        for s in list(sketch.outlines) + list(sketch.features):
            if s.get("label"):
                lab.point_label(label_point(s["outline_m"]), s["label"], prefer=(0, 0),
                                dist_pt=4, offsets=[(0, 0), (0, 1.3), (0, -1.3), (1, 0)],
                                fontsize=7.5, fontstyle="italic", color=PALETTE["shape_text"])
    for label, line in barriers:
        if label:
            ln = np.asarray(line, dtype=float)
            d = ln[-1] - ln[0]
            side = (1, 0) if abs(d[1]) >= abs(d[0]) else (0, -1.3)
            lab.point_label(ln.mean(axis=0), label, prefer=side, dist_pt=6, fontsize=7.5,
                            fontstyle="italic", color=PALETTE["barrier"])


def _draw_points(ax, lab, names, mics, rec, rejected, dead):
    """Mic and receiver markers with their names (names pushed away from the array centre)."""
    for nm, p in zip(names, mics, strict=True):
        if nm in rejected:
            ax.plot(*p[:2], "^", ms=9, mfc="white", mec=PALETTE["rejected"], mew=1.3, zorder=15,
                    gid=f"rejected:{nm}")
            ax.plot(*p[:2], "x", ms=5, mec=PALETTE["rejected"], mew=1.2, zorder=16)
        elif nm in dead:
            ax.plot(*p[:2], "^", ms=9, mfc="white", mec=PALETTE["rejected"], mew=1.0, zorder=15,
                    ls="none", gid=f"dead:{nm}")
            ax.plot(*p[:2], "_", ms=5, mec=PALETTE["rejected"], mew=1.2, zorder=16)
        else:
            ax.plot(*p[:2], "^", ms=9, mfc=PALETTE["mic"], mec="white", mew=0.8, zorder=15,
                    gid=f"mic:{nm}")
    centre = mics[:, :2].mean(axis=0)
    for nm, p in zip(names, mics, strict=True):
        d = p[:2] - centre
        off = nm in rejected or nm in dead
        sx, sy = (1 if d[0] >= 0 else -1), (1 if d[1] >= 0 else -1)
        # beside the marker first (reads as its name), then above/below, diagonals last
        order = [(sx, 0), (-sx, 0), (0, 1.3 * sy), (0, -1.3 * sy), (sx, sy), (sx, -sy),
                 (-sx, sy), (-sx, -sy)]
        lab.point_label(p[:2], nm, prefer=order[0], offsets=order, dist_pt=5.5,
                        fontsize=8.5, fontweight="bold",
                        color=PALETTE["rejected"] if off else PALETTE["mic"],
                        fontstyle="italic" if off else "normal")
    for nm, p in rec:
        ax.plot(*p, "s", ms=7, mfc=PALETTE["receiver"], mec=PALETTE["ink"], mew=0.8, zorder=14,
                gid=f"receiver:{nm}")
        lab.point_label(p, nm, prefer=(1, -1), fontsize=8, color=PALETTE["ink"])


def map_figure(site, result, *, warnings=None, **kwargs):
    """:func:`draw_map` for a :class:`locate.io.site.Site`: mics, receivers, barriers, air, sketch.

    Parameters
    ----------
    site : locate.io.site.Site
    result : dict
        ``tdoa-result/1`` fix or track result.
    warnings : list, optional
        Georeferencing warnings (large control-point residual) are appended here.
    **kwargs
        Passed to :func:`draw_map`.
    """
    from locate.io.sketch import load_sketch

    to_local = _wgs84_to_local(site) if getattr(site, "coordinates", "local") == "wgs84" else None
    sk = load_sketch(getattr(site, "sketch", None), file=site.path, to_local=to_local)
    if not result.get("title") and site.title:
        result = dict(result, title=site.title)
    kwargs.setdefault("wind_mps", site.air.wind_mps())
    fig = draw_map(site.positions_m, site.mic_names, result, sketch=sk,
                   receivers=[(r.name, r.position_m) for r in site.receivers],
                   barriers=[(b.label, b.line_m) for b in site.barriers], air=site.air,
                   **kwargs)
    if warnings is not None:
        warnings.extend(sk.warnings)
    return fig


def _wgs84_to_local(site):
    """``(lon, lat) -> (x, y)`` for GeoJSON on a wgs84 site (:func:`geo.lonlat_to_local`)."""
    if getattr(site, "origin_wgs84", None) is None:
        return None
    return lambda lon, lat: geo.lonlat_to_local(lon, lat, site.origin_wgs84)


def panels_figure(result, **kwargs):
    """Per-pair GCC-PHAT panels and residuals: see :func:`locate.draw.panels.panels_figure`."""
    from locate.draw.panels import panels_figure as _panels

    return _panels(result, **kwargs)


# --------------------------------------------------------------------------------------------
# Output

def save_figure(fig, path, *, dpi=150):
    """Write ``fig`` as PNG, SVG or PDF (by extension), atomically.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    path : str or os.PathLike
        ``.png``, ``.svg`` or ``.pdf``.
    dpi : int
        Raster resolution (PNG, and images inside SVG/PDF); 300 for print.

    Returns
    -------
    pathlib.Path

    Notes
    -----
    Rendered to memory, written to a temporary file in the target folder, then moved over the
    target with ``os.replace``, so a reader never sees half a file.  SVG and PDF carry no
    creation date, so the same figure gives the same bytes.
    """
    p = Path(path)
    fmt = _FORMATS.get(p.suffix.lower())
    if fmt is None:
        raise OptionError(f"cannot write a figure as {p.suffix or 'a file without extension'!r}"
                          f": use one of {', '.join(_FORMATS)}", file=p, field="-o")
    if not p.parent.is_dir():
        raise OptionError(f"folder {str(p.parent)!r} does not exist", file=p, field="-o")
    write_atomic(p, figure_bytes(fig, fmt, dpi=dpi))  # rendered in full before any write
    return p


def figure_bytes(fig, fmt="png", *, dpi=150) -> bytes:
    """``fig`` rendered to memory as ``fmt`` ('png', 'svg' or 'pdf'), without a date."""
    buf = io.BytesIO()
    meta = {"png": {"Software": "tdoa"}, "svg": {"Date": None}, "pdf": {"CreationDate": None}}
    with mk.style():
        fig.savefig(buf, format=fmt, dpi=dpi, metadata=meta[fmt], facecolor="white")
    return buf.getvalue()
