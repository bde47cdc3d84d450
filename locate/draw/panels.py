"""Diagnostics figure: each pair's GCC-PHAT curve and the residual of every pair.

What an engineer looks at when a fix looks wrong: is the peak sharp and inside the search window,
does the delay predicted from the fix sit on the measured peak, and which pair disagrees.
"""

from __future__ import annotations

import math
import textwrap

import numpy as np

from locate.draw import kit as mk
from locate.draw.kit import PALETTE
from locate.draw.mapdata import check_result, mics_of, pair_used, wind_of
from locate.errors import OptionError, ResultFileError
from locate.physics.air import travel_time_s

__all__ = ["panels_figure"]


def _predicted_delays(result, e, delays, file):
    """Delay predicted from the fix for each entry (s, or None), and residual measured - predicted.

    From ``predicted_s`` / ``residual_s`` when stored; else computed with
    :func:`locate.physics.air.travel_time_s` from the fix position, the result's ``mics`` list, its
    sound speed and wind.
    """
    geom = None
    c = result.get("sound_speed_mps")
    if result.get("mics") and c is not None:
        names, pos = mics_of(result, file=file)
        geom = (names, pos, float(c), wind_of(result))
    pred, res = [], []
    for d in delays:
        p = d.get("predicted_s")
        if p is None and d.get("residual_s") is not None and d.get("delay_s") is not None:
            p = float(d["delay_s"]) - float(d["residual_s"])
        if p is None and geom is not None and all(str(m) in geom[0] for m in d["mics"]):
            names, pos, c, wind = geom
            i, j = (names.index(str(m)) for m in d["mics"])
            src = e["position_m"]
            p = float(travel_time_s(src, pos[j], c, wind) - travel_time_s(src, pos[i], c, wind))
        pred.append(p)
        r = d.get("residual_s")
        if r is None and p is not None and d.get("delay_s") is not None:
            r = float(d["delay_s"]) - p
        res.append(r)
    return pred, res


def panels_figure(result, *, fix_index=0, correlations=None, file=None):
    """One panel per pair with its GCC-PHAT curve, and a bar chart of the residuals.

    Parameters
    ----------
    result : dict
        ``tdoa-result/1`` of kind ``"fix"`` (or ``"track"``: ``fix_index`` picks a point).
    fix_index : int
        Which fix (0-based).
    correlations : list of dict, optional
        ``{"mics": [a, b], "lags_s": [...], "correlation": [...], "search_s": [lo, hi],
        "delay_s": d}`` per pair; default: the fix's ``correlations`` list, or curves stored in
        its delay entries under the same keys.
    file : path, optional
        The result file, named in errors.

    Returns
    -------
    matplotlib.figure.Figure
        Pair axes labelled ``"pair:<a>-<b>"``, the residual axes ``"residuals"``.

    Notes
    -----
    Delay entries (``fixes[k].delays``) are read as ``{"mics": [a, b], "delay_s", "sd_s",
    "quality", "search_s", "curve": {"lags_s", "correlation"}}`` and optionally ``"used"``,
    ``"predicted_s"``, ``"residual_s"`` (measured - predicted).  Without the last two, the
    predicted delay is computed from the fix position and the result's ``mics`` list.
    """
    entries = check_result(result, file=file)
    if not 0 <= fix_index < len(entries):
        raise OptionError(f"fix {fix_index + 1} does not exist: the result has {len(entries)}",
                          field="fix_index")
    e = entries[fix_index]
    delays = [d for d in e["delays"] if isinstance(d, dict) and "mics" in d]
    if not delays:
        raise ResultFileError("this fix holds no per-pair delays to draw", file=file,
                              field=f"fixes[{fix_index}].delays")
    curves = {tuple(map(str, cv["mics"])): cv for cv in (correlations or e["correlations"] or [])
              if isinstance(cv, dict) and "mics" in cv}
    for d in delays:
        key = tuple(map(str, d["mics"]))
        if isinstance(d.get("curve"), dict) and "lags_s" in d["curve"]:
            curves.setdefault(key, d["curve"])
        elif "correlation" in d and "lags_s" in d:
            curves.setdefault(key, d)
    pred, res = _predicted_delays(result, e, delays, file)
    with mk.style():
        return _compose(e, fix_index, delays, curves, pred, res)


def _compose(e, fix_index, delays, curves, pred, res):
    n = len(delays)
    ncols = min(3, n)
    nrows = math.ceil(n / ncols)
    names = [f"{d['mics'][0]}–{d['mics'][1]}" for d in delays]
    longest = max(len(t) for t in names)
    rotate = n * longest > 70
    bottom_in = 0.55 + (0.055 * longest if rotate else 0.2)
    top_in = 0.5
    fig_h = round(top_in + 1.5 * nrows + 1.45 + bottom_in, 2)
    fig = mk.new_figure(8.0, fig_h)
    outer = fig.add_gridspec(nrows + 1, ncols, height_ratios=[1.0] * nrows + [0.95],
                             left=0.075, right=0.985, top=1 - top_in / fig_h,
                             bottom=bottom_in / fig_h, hspace=0.75, wspace=0.2)
    used = [pair_used(e, str(d["mics"][0]), str(d["mics"][1]), d) for d in delays]
    for p, d in enumerate(delays):
        a, b = (str(m) for m in d["mics"])
        cell = outer[p // ncols, p % ncols].subgridspec(1, 2, width_ratios=[2.4, 1.0],
                                                        wspace=0.06)
        ax = fig.add_subplot(cell[0], label=f"pair:{a}-{b}")
        zx = fig.add_subplot(cell[1], label=f"peak:{a}-{b}")
        _pair_panel(ax, zx, d, curves.get((a, b)), used[p], pred[p])
        if p + ncols >= n:
            ax.set_xlabel("lag (ms)", fontsize=7, labelpad=1)
    _residual_bars(fig.add_subplot(outer[nrows, :], label="residuals"), delays, used, res,
                   names, rotate)
    t = e["t_s"]
    fig.text(0.075, 1 - 0.13 / fig_h, f"Pair diagnostics — fix {e.get('label', fix_index + 1)}"
             + (f", t {float(t):.2f} s" if t is not None else ""), ha="left", va="top",
             fontsize=10.5, fontweight="bold", color=PALETTE["ink"])
    note = ("GCC-PHAT against lag (ms), delay = t(second mic) − t(first). Dashed grey lines: the "
            "edges of the search window (shaded beyond it); small panel: about ±1 ms around "
            "the peak (bar under it: its lag scale), headed by Δ = measured − predicted delay. "
            "▼ and solid line: measured delay; dashed teal: delay predicted from the fix; "
            "grey: pair not used in the fix.")
    fig.text(0.075, 0.12 / fig_h, "\n".join(textwrap.wrap(note, 140)), ha="left",
             va="bottom", fontsize=7, color=PALETTE["note"], linespacing=1.3)
    return fig


def _pair_panel(ax, zx, d, cv, used, pred):
    """Full search window on ``ax``, the neighbourhood of the peak on ``zx``."""
    tone = PALETTE["mic"] if used else PALETTE["muted"]
    lo_hi = (cv or {}).get("search_s", d.get("search_s"))
    delay = d.get("delay_s", (cv or {}).get("delay_s"))
    marks = [v for v in (delay, pred) if v is not None]
    for a in (ax, zx):
        a.tick_params(labelsize=6.5, length=2, pad=1)
        if pred is not None:  # under the curve, so it never hides the peak
            a.axvline(pred * 1e3, color=PALETTE["hyperbola"], lw=1.1, ls=(0, (3, 1.5)),
                      zorder=1.5)
    zx.set_yticks([])
    zx.set_xticks([])
    if delay is not None and pred is not None:  # above the panel, never over the curve
        off_us = int(round((delay - pred) * 1e6))
        zx.set_title("Δ " + (f"{off_us:+d}".replace("-", "−") if off_us else "0") + " µs",
                     fontsize=6.8, pad=2, color=PALETTE["ink"])
    if cv is not None:
        lags = np.asarray(cv["lags_s"], dtype=float)
        corr = np.asarray(cv["correlation"], dtype=float)
        ax.plot(lags * 1e3, corr, color=tone, lw=0.8, zorder=2)
        if corr.size:
            top, bottom = float(np.nanmax(corr)), min(0.0, float(np.nanmin(corr)))
            ax.set_ylim(bottom - 0.05 * (top - bottom), top + 0.25 * (top - bottom))
        if lo_hi is not None and lags.size:
            width = lo_hi[1] - lo_hi[0]
            ax.set_xlim(min(lags.min(), lo_hi[0] - 0.12 * width) * 1e3,
                        max(lags.max(), lo_hi[1] + 0.12 * width) * 1e3)
        if marks and lags.size:
            mid = 0.5 * (min(marks) + max(marks))
            half = max(0.6e-3, 0.5 * (max(marks) - min(marks)) + 0.35e-3)
            sel = (lags >= mid - half) & (lags <= mid + half)
            zx.set_xlim((mid - half) * 1e3, (mid + half) * 1e3)
            # an x scale under the zoom: a 0.5 ms bar (tick numbers would not fit)
            bar_ms = 0.5 if half >= 0.4e-3 else 0.2
            x_a = (mid - half) * 1e3 + 0.1 * 2 * half * 1e3
            zx.plot([x_a, x_a + bar_ms], [-0.07, -0.07], color=PALETTE["ink"], lw=1.6,
                    transform=zx.get_xaxis_transform(), clip_on=False, solid_capstyle="butt")
            zx.text(x_a + bar_ms + 0.04 * 2 * half * 1e3, -0.07, f"{bar_ms:g} ms", fontsize=6.5,
                    va="center", ha="left", transform=zx.get_xaxis_transform(),
                    color=PALETTE["ink"])
            if np.count_nonzero(sel) >= 8:
                zx.plot(lags[sel] * 1e3, corr[sel], color=tone, lw=1.0, zorder=2)
                zt, zb = float(np.nanmax(corr[sel])), float(np.nanmin(corr[sel]))
                pad = 0.1 * max(zt - zb, 1e-6)
                zx.set_ylim(zb - pad, zt + 3.0 * pad)
            else:
                zx.text(0.5, 0.55, "stored\ncurve too\ncoarse\nhere", transform=zx.transAxes,
                        ha="center", va="center", fontsize=6, color="#666666", zorder=6,
                        path_effects=mk.HALO)
    else:
        ax.text(0.5, 0.5, "no curve stored", transform=ax.transAxes, ha="center",
                va="center", fontsize=7, color=PALETTE["muted"])
        zx.set_axis_off()
        if lo_hi is not None:
            width = lo_hi[1] - lo_hi[0]
            ax.set_xlim((lo_hi[0] - 0.1 * width) * 1e3, (lo_hi[1] + 0.1 * width) * 1e3)
    if lo_hi is not None:  # shade what lies outside the search window, edges dashed
        x0, x1 = ax.get_xlim()
        for u, v in ((x0, lo_hi[0] * 1e3), (lo_hi[1] * 1e3, x1)):
            if v > u:
                ax.axvspan(u, v, color=PALETTE["window"], zorder=0, lw=0)
        ax.set_xlim(x0, x1)
        for edge in lo_hi:
            ax.axvline(edge * 1e3, color=PALETTE["window_edge"], lw=0.6, ls="--", zorder=1)
    if delay is not None:
        for a in (ax, zx):
            a.plot(delay * 1e3, 0.94, "v", ms=5, color=PALETTE["estimate"], zorder=4,
                   transform=a.get_xaxis_transform(), clip_on=False)
        zx.axvline(delay * 1e3, color=PALETTE["estimate"], lw=0.9, zorder=3)
    q = d.get("quality")
    a, b = d["mics"]
    ax.set_title(f"{a}–{b}" + (f" · {q}" if q else "") + ("" if used else " · not used"),
                 fontsize=7.8, loc="left", pad=2,
                 color=PALETTE["ink"] if used else PALETTE["muted"])


def _residual_bars(ax, delays, used, res, names, rotate):
    """Residual per pair in microseconds; the y range follows the used pairs, so one wild
    rejected pair does not flatten the others (bars beyond are cut and their value written)."""
    n = len(delays)
    xs = np.arange(n)
    ax.axhline(0.0, color=PALETTE["ink"], lw=0.7, zorder=2)
    if all(r is None for r in res):
        ax.text(0.5, 0.5, "no residuals in this result", transform=ax.transAxes, ha="center",
                va="center", fontsize=8, color=PALETTE["muted"])
    else:
        vals = np.array([np.nan if r is None else float(r) * 1e6 for r in res])
        sds = np.array([float(d.get("sd_s") or 0.0) * 1e6 for d in delays])
        ref = np.abs(np.concatenate([vals[np.array(used)], sds[np.array(used)]]))
        ref = ref[np.isfinite(ref)]
        lim = 1.6 * float(ref.max()) if ref.size and ref.max() > 0 else \
            1.1 * float(np.nanmax(np.abs(vals)) or 1.0)
        ax.set_ylim(-lim, lim)
        for p in range(n):
            if not np.isfinite(vals[p]):
                continue
            v = float(np.clip(vals[p], -lim, lim))
            ax.bar(p, v, width=0.62, color=PALETTE["mic"] if used[p] else "white",
                   edgecolor=PALETTE["mic"] if used[p] else PALETTE["rejected"], lw=0.9,
                   hatch=None if used[p] else "////", zorder=3)
            if abs(vals[p]) > lim:
                ax.text(p, 0.92 * v, f"{vals[p]:.0f} µs", ha="center",
                        va="top" if v > 0 else "bottom", fontsize=6.5, color=PALETTE["ink"],
                        path_effects=mk.HALO, zorder=5)
        keep = np.isfinite(vals) & (np.abs(vals) <= lim) & (sds > 0)
        if np.any(keep):
            # drawn over the bars in the estimate colour, with a white halo line beneath, so
            # a ±1σ inside its own bar still shows
            ax.errorbar(xs[keep], vals[keep], yerr=sds[keep], fmt="none",
                        ecolor="white", elinewidth=3.2, capsize=4.5, capthick=3.2, zorder=4)
            ax.errorbar(xs[keep], vals[keep], yerr=sds[keep], fmt="o", ms=2.5,
                        color=PALETTE["estimate"], ecolor=PALETTE["estimate"], elinewidth=1.4,
                        capsize=4, capthick=1.4, zorder=5)
    ax.set_xticks(xs, names, fontsize=6.8, rotation=35 if rotate else 0,
                  ha="right" if rotate else "center", rotation_mode="anchor")
    ax.set_xlim(-0.6, n - 0.4)
    ax.set_ylabel("residual (µs)", fontsize=7.5)
    ax.tick_params(axis="y", labelsize=7)
    ax.grid(True, axis="y", color=PALETTE["grid"], lw=0.5, zorder=0)
    ax.set_title("measured − predicted delay, with ±1σ of the measurement; hatched: pair not "
                 "used", fontsize=7.8, loc="left", pad=3)
