"""Layers of the site map: the track, the side column (legend, fix list) and the zoom inset.

Used by :func:`locate.draw.figures.draw_map`; each function draws onto axes it is given.
"""

from __future__ import annotations

import math
import textwrap

import numpy as np
from matplotlib.lines import Line2D
from matplotlib.patches import FancyArrowPatch, Patch

from locate.draw import kit as mk
from locate.draw.kit import PALETTE
from locate.draw.mapdata import delay_misfit_field, used_pairs

__all__ = ["draw_hyperbolae", "draw_track", "time_ticks", "side_column", "zoom_panel", "densify"]


VISIBLE_TRACK_ELLIPSE_PT = 12.0  # a 95 % ellipse narrower than this hides under the track
MAX_TRACK_GROWTH = 100.0  # beyond this enlargement the ellipses are not drawn, only quoted


def draw_track(ax, lab, result, pts_e, shown, ell_of, entries, view, pt_per_m):
    """Path through the emission positions, time labels, ellipses, is-now lines, heading."""
    color = PALETTE["track"]
    pts = np.array([e["position_m"][:2] for e in pts_e])
    ax.plot(pts[:, 0], pts[:, 1], "-", color=color, lw=1.8, zorder=10, gid="track")
    kept = np.array([e["used"] for e in pts_e], dtype=bool)
    ax.plot(pts[kept, 0], pts[kept, 1], "o", ms=3.0, color=color, mec="white", mew=0.5,
            zorder=11)
    if not kept.all():  # windows the fit left out: hollow
        ax.plot(pts[~kept, 0], pts[~kept, 1], "o", ms=4.0, mfc="white", mec=color, mew=0.9,
                zorder=11, gid="track-unused")
    lab.protect(densify(pts), 3.5)
    # emission -> heard: where the source has moved on to while its sound travels.  On a
    # straight track that stretch lies on the path itself, so it is drawn as a straight
    # "dimension line" in a lane beside the path (left of the motion), with a tick at each end
    marks = set(ell_of)
    lane_m = 7.0 / pt_per_m
    for e, k in zip(pts_e, shown, strict=True):
        if e["now_m"] is None or k not in marks:
            continue
        a, b = np.asarray(e["position_m"][:2], float), np.asarray(e["now_m"][:2], float)
        d = float(np.hypot(*(b - a)))
        if d <= 0:
            continue
        side = np.array([-(b - a)[1], (b - a)[0]]) / d * lane_m
        for end in (a, b):
            ax.plot([end[0], end[0] + 1.3 * side[0]], [end[1], end[1] + 1.3 * side[1]], "-",
                    color=PALETTE["now"], lw=0.8, zorder=9)
        ax.add_patch(FancyArrowPatch(a + side, b + side, arrowstyle="-|>", mutation_scale=7,
                                     color=PALETTE["now"], lw=1.1, shrinkA=0, shrinkB=0,
                                     zorder=9, gid=f"now:{k + 1}"))
        lab.protect(np.vstack([a + side, 0.5 * (a + b) + side, b + side]), 3.0)
    # 95 % ellipses: enlarged by one round factor when they would hide under the track dots
    across = [2.0 * entries[k]["e95"]["semi_major_m"] * pt_per_m for k in ell_of
              if entries[k]["e95"] is not None]
    across = [v for v in across if v > 0]
    grow = 1.0
    if across and max(across) < VISIBLE_TRACK_ELLIPSE_PT:
        grow = max(mk.nice_length(VISIBLE_TRACK_ELLIPSE_PT / max(across)), 1.0)
    for k in ell_of:
        e95 = entries[k]["e95"]
        if grow > MAX_TRACK_GROWTH:  # too small to mean anything drawn: said in the caption
            entries[k]["grown"] = float("inf")
            continue
        if grow > 1.0:
            e95 = dict(e95, semi_major_m=e95["semi_major_m"] * grow,
                       semi_minor_m=e95["semi_minor_m"] * grow)
            entries[k]["grown"] = grow
        mk.draw_ellipse(ax, entries[k]["position_m"][:2], e95, 0.95,
                        PALETTE["estimate"], gid=f"ellipse95:{k + 1}", zorder=8)
    tr = result.get("track") or {}
    if tr.get("heading_deg") is not None and len(pts):
        az = math.radians(float(tr["heading_deg"]))
        start = pts[-1]
        end = start + 0.08 * (view[1] - view[0]) * np.array([math.sin(az), math.cos(az)])
        ax.annotate("", xy=end, xytext=start, zorder=13, gid="heading",
                    arrowprops=dict(arrowstyle="-|>,head_length=0.7,head_width=0.35",
                                    color=color, lw=2.0, shrinkA=0, shrinkB=0))
        lab.protect(end, 5.0)


def time_ticks(ax, lab, ts, pts, pt_per_m, most=6):
    """Ticks across the path at round emission times (interpolated along it), labelled."""
    order = np.argsort(ts)
    ts, pts = ts[order], pts[order]
    span = ts[-1] - ts[0]
    if not span > 0:
        return
    mag = 10.0 ** math.floor(math.log10(span / most))
    step = next(m * mag for m in (1, 2, 2.5, 5, 10) if span / (m * mag) <= most)
    digits = max(0, -math.floor(math.log10(step) + 1e-9)) + (1 if step / mag == 2.5 else 0)
    marks = np.arange(math.ceil(ts[0] / step - 1e-9) * step, ts[-1] + 1e-9, step)
    x, y = np.interp(marks, ts, pts[:, 0]), np.interp(marks, ts, pts[:, 1])
    k = np.clip(np.searchsorted(ts, marks), 1, len(ts) - 1)
    d = pts[k] - pts[k - 1]
    norm = np.maximum(np.hypot(d[:, 0], d[:, 1]), 1e-12)[:, None]
    n = np.column_stack([-d[:, 1], d[:, 0]]) / norm
    half = 4.0 / pt_per_m
    for tm, px, py, (nx, ny) in zip(marks, x, y, n, strict=True):
        ax.plot([px - half * nx, px + half * nx], [py - half * ny, py + half * ny],
                color=PALETTE["track"], lw=1.2, zorder=11, solid_capstyle="butt", gid="tick")
        lab.point_label((px, py), f"{tm:.{digits}f} s", prefer=(1 if ny <= 0 else -1, -1),
                        dist_pt=5, fontsize=7.2, color=PALETTE["track"])


def _wrap(text, width=24):
    """Legend text wrapped at spaces only (mic names often hold hyphens)."""
    return textwrap.fill(text, width, break_on_hyphens=False, break_long_words=False)


def who_text(out, n_shown):
    return ", ".join(nm if n_shown == 1 else f"{nm} (fix {', '.join(map(str, fx))})"
                     for nm, fx in out.items())


def side_column(fig, ax, result, entries, shown, rejected, dead, have_lines, rec):
    """Legend and fix list right of the map; returns (axes, bottom of the list in axes units)."""
    box = ax.get_position()
    side = fig.add_axes([box.x1 + 0.02, box.y0, 0.99 - box.x1 - 0.02, box.height],
                        label="legend")
    side.set_axis_off()
    color = PALETTE["estimate"]
    h = [Line2D([], [], ls="none", marker="^", ms=8, mfc=PALETTE["mic"], mec="white",
                label="microphone")]
    if rejected:
        h.append(Line2D([], [], ls="none", marker="^", ms=8, mfc="white",
                        mec=PALETTE["rejected"], mew=1.3,
                        label=_wrap(f"rejected: {who_text(rejected, len(shown))}")))
    if dead:
        h.append(Line2D([], [], ls="none", marker="^", ms=8, mfc="white",
                        mec=PALETTE["rejected"], mew=1.0,
                        label=_wrap(f"no usable signal: {who_text(dead, len(shown))}")))
    if rec:
        h.append(Line2D([], [], ls="none", marker="s", ms=6.5, mfc=PALETTE["receiver"],
                        mec=PALETTE["ink"], label="receiver"))
    if have_lines:
        h.append(Line2D([], [], color=PALETTE["hyperbola"], lw=0.9,
                        label="TDOA hyperbola\nof a used pair"))
    if result["kind"] == "track":
        h.append(Line2D([], [], color=PALETTE["track"], lw=1.8, marker="o", ms=3,
                        label="track (emission\npositions)"))
        if not all(entries[k]["used"] for k in shown):
            h.append(Line2D([], [], ls="none", marker="o", ms=4, mfc="white",
                            mec=PALETTE["track"], label="window left out\nof the fit"))
        if any(entries[k]["now_m"] is not None for k in shown):
            h.append(Line2D([], [], color=PALETTE["now"], lw=1.1, marker=">", ms=4,
                            markevery=[1], label="moves on while its\nsound travels"))
    else:
        h.append(Line2D([], [], ls="none", marker="o", ms=6.5, color=color, mec="white",
                        label="estimate"))
        h.append(Patch(facecolor="none", edgecolor=color, lw=1.5, label="50 % ellipse"))
    grown = max([entries[k].get("grown", 1.0) for k in shown] or [1.0])
    if math.isfinite(grown) and any(entries[k]["e95"] is not None for k in shown):
        h.append(Patch(facecolor=(*mk.rgb(color), 0.12), edgecolor=color, lw=1.3,
                       ls=(0, (5, 2.2)),
                       label="95 % ellipse" + (f"\n(drawn ×{grown:g})" if grown > 1.0 else "")))
    if any(entries[k]["mirror_m"] is not None for k in shown):
        h.append(Line2D([], [], ls="none", marker="D", ms=5, mfc="none", mec=color,
                        label="mirror solution"))
    leg = side.legend(handles=h, loc="upper left", bbox_to_anchor=(0.0, 1.0), frameon=False,
                      fontsize=7.8, handlelength=1.8, borderaxespad=0.0, labelspacing=0.7)
    r = fig.canvas.get_renderer()
    y = side.transAxes.inverted().transform((0, leg.get_window_extent(r).y0))[1] - 0.035
    t = side.text(0.0, y, listing(result, entries, shown), va="top", ha="left", fontsize=7.2,
                  color=PALETTE["ink"], linespacing=1.35, transform=side.transAxes)
    return side, side.transAxes.inverted().transform((0, t.get_window_extent(r).y0))[1]


def listing(result, entries, shown):
    """The text under the legend: position and 95 % ellipse per fix, or the track summary."""
    if result["kind"] == "track":
        tr = result.get("track") or {}
        lines = [f"{len(shown)} track points"]
        for key, fmt, unit in (("heading", "{:.0f}", "°"), ("speed", "{:.1f}", " m/s")):
            v = tr.get(f"{key}_deg" if key == "heading" else f"{key}_mps")
            sd = tr.get(f"{key}_sd_deg" if key == "heading" else f"{key}_sd_mps")
            if v is not None:
                lines.append(f"{key} {fmt.format(v)}" + (f" ± {fmt.format(sd)}" if sd else "")
                             + unit)
        return "\n".join(lines)
    lines = []
    for k in shown[:3]:
        e = entries[k]
        x, y = e["position_m"][:2]
        lines.append(f"fix {e.get('label', k + 1)}"
                     + (f" · t {float(e['t_s']):.2f} s" if e["t_s"] is not None else ""))
        lines.append(f"  x {x:.2f} m, y {y:.2f} m")
        if e["e95"] is not None:
            a, b = e["e95"]["semi_major_m"], e["e95"]["semi_minor_m"]
            lines.append("  95 % ellipse half-axes")
            lines.append(f"  {mk.format_length(a)} × {mk.format_length(b)}")
            lines.append(f"  long axis {e['e95']['azimuth_deg']:.0f}° from north")
    if len(shown) > 3:
        lines.append(f"… and {len(shown) - 3} more (see the JSON)")
    return "\n".join(lines)


def zoom_panel(fig, side, list_bottom, e, k, names, mics, c, wind, file):
    """Zoomed square around one estimate, with its own scale bar, under the fix list."""
    box = side.get_position()
    fw, fh = fig.get_figwidth(), fig.get_figheight()
    top = box.y0 + list_bottom * box.height - 0.3 / fh
    w = box.width * 0.95
    hgt = w * fw / fh
    if top - hgt < box.y0:  # keep it beside the map, never over the caption
        hgt = top - box.y0
        w = hgt * fh / fw
    if hgt * fh < 1.0:  # under an inch: no room (long fix list); say so rather than squash
        return False
    zax = fig.add_axes([box.x0, top - hgt, w, hgt], label="zoom")
    x, y = e["position_m"][:2]
    half = max(1.5 * e["e95"]["semi_major_m"], 1e-7)  # the ellipse fills the inset
    zv = (x - half, x + half, y - half, y + half)
    zax.set_xlim(zv[0], zv[1])
    zax.set_ylim(zv[2], zv[3])
    zax.set_aspect("equal", adjustable="box")
    zax.set_xticks([])
    zax.set_yticks([])
    zax.set_facecolor(PALETTE["paper"])
    for s in zax.spines.values():
        s.set_color("#888888")
    if c is not None:
        draw_hyperbolae(zax, e, k, names, mics, c, wind, zv, 161, file, label=False)
    mk.draw_ellipse(zax, (x, y), e["e95"], 0.95, PALETTE["estimate"], gid=f"zoom95:{k + 1}")
    mk.draw_ellipse(zax, (x, y), e["e50"], 0.50, PALETTE["estimate"], gid=f"zoom50:{k + 1}")
    zax.plot(x, y, "o", ms=4, color=PALETTE["estimate"], mec="white", mew=0.8, zorder=30)
    mk.scale_bar(zax, zv, "ll", w * fw * 72.0 / (2 * half), fraction=0.3, label_size=7,
                 label="right")
    zax.set_title(f"fix {e.get('label', k + 1)}, enlarged", fontsize=7.5, loc="left", pad=2,
                  color=PALETTE["ink"])
    return True


def densify(line, n=40):
    """Points along a polyline (K, 2): ``n`` per segment, for keeping labels off it."""
    if len(line) < 2:
        return line
    t = np.linspace(0.0, 1.0, n)[:, None]
    return np.concatenate([a + t * (b - a) for a, b in zip(line[:-1], line[1:], strict=True)])


def draw_hyperbolae(ax, e, k, names, mics, c, wind, view, n_grid, file, *, label=True):
    """Draw the zero contours of every used pair; return [(ContourSet, text)] and notes."""
    xs = np.linspace(view[0], view[1], n_grid)
    ys = np.linspace(view[2], view[3], n_grid)
    drawn, notes = [], []
    for i, j, d in used_pairs(e, names, k, file):
        f = delay_misfit_field(mics, i, j, d, e["position_m"][2], xs, ys, c, wind)
        if not (f.min() < 0 < f.max()):
            base = mics[j, :2] - mics[i, :2]
            base_s = float(np.hypot(*base)) / c
            if base_s > 0 and float(np.min(np.abs(f))) < 0.05 * base_s:
                # the delay is (nearly) the whole baseline: the hyperbola has closed onto the
                # baseline's extension beyond the nearer mic - drawn as that ray
                near, far = (i, j) if d > 0 else (j, i)
                u = (mics[near, :2] - mics[far, :2]) / (base_s * c)
                reach = float(np.hypot(view[1] - view[0], view[3] - view[2]))
                ray = np.array([mics[near, :2], mics[near, :2] + reach * u])
                ax.plot(ray[:, 0], ray[:, 1], color=PALETTE["hyperbola"], lw=0.9, zorder=5,
                        gid=f"hyperbola:{k + 1}:{names[i]}-{names[j]}" if label else None)
                notes.append(f"the {names[i]}–{names[j]} delay is close to its largest possible "
                             f"value, so the source lies near the line through both mics beyond "
                             f"{names[near]} (drawn as a ray from {names[near]})")
                continue
            notes.append(f"the hyperbola of {names[i]}–{names[j]} lies outside the view")
            continue
        cs = ax.contour(xs, ys, f, levels=[0.0], colors=[PALETTE["hyperbola"]],
                        linewidths=0.9, zorder=5)
        if label:
            cs.set_gid(f"hyperbola:{k + 1}:{names[i]}-{names[j]}")
        drawn.append((cs, f"{names[i]}·{names[j]}"))
    return drawn, notes
