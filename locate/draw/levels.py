"""Level charts: the source's sound power and the receivers' levels, each on its own scale.

Two panels, one above the other, sharing the octave bands: the source's sound power level
(dB re 1 pW) and the predicted sound pressure levels at the receivers (dB re 20 uPa) -- two
different quantities, never on one axis.  Bars start from a floor a little below the lowest
value shown (not from 0 dB, which would make every band look alike).  A band that is only an
upper bound is drawn as a hatched, open bar with a downward arrow and "<" on its value, so it
cannot be read as a level.  Labels are plain words ("spread between mics", "screening by the
yard wall: up to 4.8 dB").  Colours: Paul Tol's qualitative schemes (see
:mod:`locate.draw.kit`); meaning never rests on colour alone (hatching and arrows mark bounds).
"""

from __future__ import annotations

import io

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.patches import Patch

from locate.draw.kit import PALETTE, STYLE

__all__ = ["level_figure", "level_png"]

_SOURCE = "#004488"  # Tol high-contrast blue
_TOTAL = "#777777"  # the A-weighted total: grey, set apart from the bands
_RECEIVERS = ("#DDAA33", "#44AA99", "#882255", "#999933", "#332288")
_MAX_RECEIVERS = 5


def _arr(values, n):
    if values is None:
        return np.full(n, np.nan)
    return np.array([np.nan if v is None else float(v) for v in values], dtype=float)


def _floor(values):
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return 0.0
    return float(10.0 * np.floor((v.min() - 12.0) / 10.0))


def _band_label(b):
    return f"{b:g}" if b < 1000 else f"{b / 1000:g}k"


def _bars(ax, x, level, bound, floor, width, colour, *, labels=True, fontsize=7.0, span=40.0):
    """Level bars from ``floor``; upper bounds as hatched open bars with a downward arrow."""
    from locate.draw.kit import HALO

    ink = PALETTE["ink"]
    ok = np.isfinite(level)
    ax.bar(x[ok], level[ok] - floor, width, bottom=floor, color=colour, edgecolor=ink,
           linewidth=0.4, zorder=3)
    up = ~ok & np.isfinite(bound)
    ax.bar(x[up], bound[up] - floor, width, bottom=floor, facecolor="white", edgecolor=colour,
           hatch="////", linewidth=0.8, zorder=3)
    for xi, b in zip(x[up], bound[up], strict=True):
        ann = ax.annotate("", xy=(xi, b - 0.22 * span), xytext=(xi, b - 0.01 * span),
                          arrowprops={"arrowstyle": "-|>", "color": ink, "lw": 1.3,
                                      "mutation_scale": 11}, zorder=5)
        ann.arrow_patch.set_path_effects(HALO)
    if labels:
        for xi, v in zip(x[ok], level[ok], strict=True):
            ax.text(xi, v + 0.6, f"{v:.0f}", ha="center", va="bottom", fontsize=fontsize,
                    color=ink, zorder=6)
        for xi, b in zip(x[up], bound[up], strict=True):
            ax.text(xi, b + 0.6, f"<{b:.0f}", ha="center", va="bottom", fontsize=fontsize,
                    color=ink, zorder=6)


def _tidy(ax, ticks, names, floor, top, ylabel):
    ax.set_xticks(ticks, names)
    ax.set_ylim(floor, top)
    ax.set_ylabel(ylabel)
    ax.grid(axis="y", color=PALETTE["grid"], lw=0.6)
    ax.set_axisbelow(True)
    for s in ("top", "right"):
        ax.spines[s].set_visible(False)


def level_figure(lev):
    """The two-panel level chart of one ``kind: "level"`` entry.

    Parameters
    ----------
    lev : dict
        One level entry of a ``tdoa-result/1`` document (``bands_hz``, ``source_lw_db``,
        optionally ``source_lw_upper_db``, ``mic_spread_db``, ``source_lwa_db``,
        ``receivers`` with ``lp_db`` / ``lp_upper_db``, ``calibrated``).

    Returns
    -------
    matplotlib.figure.Figure
    """
    bands = [float(b) for b in lev.get("bands_hz") or []]
    n = len(bands)
    lw = _arr(lev.get("source_lw_db"), n)
    lw_up = _arr(lev.get("source_lw_upper_db"), n)
    spread = _arr(lev.get("mic_spread_db"), n)
    lwa = lev.get("source_lwa_db")
    calibrated = bool(lev.get("calibrated", True))
    receivers = list(lev.get("receivers") or [])[:_MAX_RECEIVERS]
    pass_by = lev.get("source") == "track"
    power_unit = "dB re 1 pW" if calibrated else "dB re full scale"
    pressure_unit = "dB re 20 µPa" if calibrated else "dB re full scale"
    x = np.arange(n, dtype=float)
    x_a = n + 0.6  # the A-weighted total, set apart from the bands
    ticks = list(x) + [x_a]
    names = [_band_label(b) for b in bands] + ["A-wtd"]
    labels = [_receiver_label(r, pass_by) for r in receivers]
    lines = sum(len(lab.splitlines()) for lab in labels)
    legend_in = 0.2 * lines + 0.5  # room under the lower panel for its legend, inches
    height = (5.0 + 0.2 * lines) if receivers else 2.8
    with _style():
        fig = Figure(figsize=(6.5, height))
        FigureCanvasAgg(fig)
        n_rows = 2 if receivers else 1
        gs = fig.add_gridspec(n_rows, 1, height_ratios=[1.0, 1.15][:n_rows], hspace=0.75)
        ax = fig.add_subplot(gs[0])
        floor = _floor(np.concatenate([lw, lw_up]))
        tops = np.concatenate([lw, lw_up, [lwa if lwa is not None else np.nan]])
        top = np.nanmax(tops) + 7.0 if np.any(np.isfinite(tops)) else floor + 10.0
        _bars(ax, x, lw, lw_up, floor, 0.62, _SOURCE, span=top - floor)
        ok = np.isfinite(lw) & np.isfinite(spread) & (spread > 0)
        if np.any(ok):
            ax.errorbar(x[ok], lw[ok], yerr=0.5 * spread[ok], fmt="none",
                        ecolor=PALETTE["ink"], elinewidth=0.8, capsize=2.5, zorder=4)
        if lwa is not None:
            ax.bar([x_a], [lwa - floor], 0.62, bottom=floor, color=_TOTAL,
                   edgecolor=PALETTE["ink"], linewidth=0.4, zorder=3)
            ax.text(x_a, lwa + 0.6, f"{lwa:.0f}", ha="center", va="bottom", fontsize=7.5,
                    fontweight="bold", zorder=6)
        _tidy(ax, ticks, names[:-1] + ["LwA"], floor, top, f"Lw, {power_unit}")
        ax.set_title("Source: sound power level per octave band"
                     + (" (constant over the pass)" if pass_by else ""),
                     loc="left", fontsize=9, fontweight="bold")
        handles = [Patch(facecolor=_SOURCE, edgecolor=PALETTE["ink"], lw=0.4,
                         label="sound power level")]
        if np.any(~np.isfinite(lw) & np.isfinite(lw_up)):
            handles.append(Patch(facecolor="white", edgecolor=_SOURCE, hatch="////",
                                 label="upper bound only (not clearly above the noise)"))
        if np.any(ok):
            handles.append(_line_handle("spread between mics (max − min)"))
        if lwa is not None:
            handles.append(Patch(facecolor=_TOTAL, edgecolor=PALETTE["ink"], lw=0.4,
                                 label="LwA: A-weighted total of the level bands"))
        ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(0.0, -0.13), ncol=2,
                  fontsize=7.5, frameon=False, handlelength=1.6)
        if receivers:
            _receiver_panel(fig.add_subplot(gs[1]), receivers, bands, x, x_a, ticks, names,
                            pressure_unit, pass_by, labels)
        fig.subplots_adjust(left=0.1, right=0.99, top=1.0 - 0.35 / height,
                            bottom=legend_in / height if receivers else 0.3)
    return fig


def _receiver_panel(ax, receivers, bands, x, x_a, ticks, names, unit, pass_by, labels):
    n = len(bands)
    k = len(receivers)
    width = 0.8 / k
    levels, bounds, totals = [], [], []
    for r in receivers:
        levels.append(_arr(r.get("lp_db"), n))
        bounds.append(_arr(r.get("lp_upper_db"), n))
        totals.append(r.get("laeq_db") if r.get("laeq_db") is not None else r.get("lpa_db"))
    floor = _floor(np.concatenate(levels + bounds))
    tops = np.concatenate(levels + bounds + [np.array(totals, dtype=float)])
    top = np.nanmax(tops) + 7.0 if np.any(np.isfinite(tops)) else floor + 10.0
    handles = []
    for j in range(len(receivers)):
        colour = _RECEIVERS[j % len(_RECEIVERS)]
        off = (j - (k - 1) / 2.0) * width
        _bars(ax, x + off, levels[j], bounds[j], floor, width * 0.92, colour,
              labels=k <= 2, fontsize=7.0, span=top - floor)
        if totals[j] is not None:
            ax.bar([x_a + off], [totals[j] - floor], width * 0.92, bottom=floor, color=colour,
                   edgecolor=PALETTE["ink"], linewidth=0.4, zorder=3)
            ax.text(x_a + off, totals[j] + 0.6, f"{totals[j]:.0f}", ha="center", va="bottom",
                    fontsize=7.0, fontweight="bold", zorder=6)
        handles.append(Patch(facecolor=colour, edgecolor=PALETTE["ink"], lw=0.4,
                             label=labels[j]))
    _tidy(ax, ticks, names[:-1] + ["LAeq"], floor, top, f"Lp, {unit}")
    what = ("Receivers: predicted sound pressure level, Leq over the pass per band" if pass_by
            else "Receivers: predicted sound pressure level, Leq while the source sounds")
    ax.set_title(what, loc="left", fontsize=9, fontweight="bold")
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(0.0, -0.13), ncol=1,
              fontsize=7.5, frameon=False, handlelength=1.6)


def _receiver_label(r, pass_by):
    d = r.get("distance_m")
    where = f"{r.get('name', '?')} ({'closest ' if pass_by else ''}{d:.0f} m)" if d is not None \
        else str(r.get("name", "?"))
    parts = []
    for key, sym in (("laeq_db", "LAeq"), ("lae_db", "LAE"), ("lafmax_db", "LAFmax"),
                     ("lcpeak_db", "LCpeak")):
        if r.get(key) is not None and not (pass_by and key == "lcpeak_db"):
            parts.append(f"{sym} {r[key]:.0f} dB")
            if key == "laeq_db" and r.get("laeq_interval_s") is not None:
                parts[-1] = f"LAeq over {r['laeq_interval_s']:.3g} s {r[key]:.0f} dB"
            if key == "lafmax_db" and r.get("t_lafmax_s") is not None:
                parts[-1] += f" (heard at {r['t_lafmax_s']:.1f} s)"
    screen = [v for v in (r.get("screen_db") or r.get("barrier_db") or []) if v is not None]
    wall = r.get("barrier_label")
    if screen and max(screen) > 0.05:
        by = f"the {wall}" if wall else "a wall"
        parts.append(f"screening by {by}: up to {max(screen):.1f} dB")
    import textwrap

    text = where + (": " + ", ".join(parts) if parts else "")
    return "\n".join(textwrap.wrap(text, 88, subsequent_indent="   "))


def _line_handle(label):
    from matplotlib.lines import Line2D

    return Line2D([], [], color=PALETTE["ink"], marker="_", markersize=6, lw=0.8, label=label)


class _style:
    def __enter__(self):
        import matplotlib

        self._ctx = matplotlib.rc_context(STYLE)
        self._ctx.__enter__()

    def __exit__(self, *exc):
        return self._ctx.__exit__(*exc)


def level_png(lev, dpi=150):
    """The chart of :func:`level_figure` as PNG bytes (white background)."""
    fig = level_figure(lev)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, metadata={"Software": "tdoa"}, facecolor="white")
    return buf.getvalue()
