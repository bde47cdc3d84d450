"""The deployment timeline: each recorder's coverage, and the events or fixes of the night.

Top panel: one bar per recorder where it has audio (gaps left blank), on clock time when the
recordings carry it.  Bottom panel (with a result): events' level above the background, or
fixes' distance from the array centre, against the same time axis.
"""

from __future__ import annotations

import datetime as _dt

import numpy as np

__all__ = ["timeline_figure"]


def _axis(rec):
    """Time converter and label: matplotlib dates (UTC) with clock time, else seconds."""
    if rec.epoch is None:
        return (lambda t: np.asarray(t, float)), "time (s from the first recorder's start)"
    import matplotlib.dates as mdates

    e0 = _dt.datetime.fromtimestamp(rec.epoch[0], tz=_dt.timezone.utc).replace(tzinfo=None)
    base = mdates.date2num(e0) + rec.epoch[1] / 86400.0

    def conv(t):
        return base + np.asarray(t, float) / 86400.0

    return conv, "clock time (UTC)"


def timeline_figure(rec, result=None, *, title=None):
    """Figure of the coverage of a deployment reader ``rec``, and of a result's events/fixes.

    Parameters
    ----------
    rec : locate.io.audio.Recordings
        A deployment (``rec.deployment`` set); single files show one bar per mic.
    result : dict, optional
        A ``tdoa-result/1`` document of kind ``fix`` or ``events``.
    """
    from matplotlib.figure import Figure

    from locate.io.deployment import coverage_rows

    rows = coverage_rows(rec)
    if not rows:  # single files: one bar each over what it covers
        rows = [dict(mic=n, start_s=float(a), stop_s=float(b), gaps=[], source="file",
                     files=1, sample_rate_hz=rec.sample_rate_hz)
                for n, (a, b) in zip(rec.mic_names, rec._cover)]
    conv, label = _axis(rec)
    points = _points(result) if result else None
    fig = Figure(figsize=(9.0, 2.2 + 0.35 * len(rows) + (2.2 if points else 0.0)))
    if points:
        ax, bx = fig.subplots(2, 1, sharex=True,
                              gridspec_kw={"height_ratios": [0.35 * len(rows) + 0.6, 2.2]})
    else:
        ax, bx = fig.subplots(1, 1), None
    for k, r in enumerate(rows):
        spans, t = [], r["start_s"]
        for lo, hi in r["gaps"]:
            spans.append((t, lo))
            t = hi
        spans.append((t, r["stop_s"]))
        xs = [(conv(a), conv(b) - conv(a)) for a, b in spans]
        ax.broken_barh(xs, (k - 0.35, 0.7), color="#3b6ea5")
        for lo, hi in r["gaps"]:
            ax.text(conv(0.5 * (lo + hi)), k, "gap", ha="center", va="center", fontsize=7,
                    color="#a03030")
    ax.set_yticks(range(len(rows)))
    ax.set_yticklabels([f"{r['mic']} ({r['source']})" for r in rows], fontsize=8)
    ax.set_ylim(len(rows) - 0.4, -0.6)
    ax.set_title(title or "Recorder coverage", fontsize=10)
    if points:
        t, y, ylabel, marks = points
        bx.scatter(conv(t), y, s=14, color="#c0392b", zorder=3)
        for k, (tt, yy, m) in enumerate(zip(t, y, marks), 1):
            bx.annotate(str(k) + m, (conv(tt), yy), fontsize=7, xytext=(3, 3),
                        textcoords="offset points")
        bx.set_ylabel(ylabel, fontsize=8)
        bx.grid(True, alpha=0.3)
        for tt in t:
            ax.axvline(conv(tt), color="#c0392b", lw=0.6, alpha=0.6)
    last = bx if bx is not None else ax
    last.set_xlabel(label, fontsize=8)
    if rec.epoch is not None:
        import matplotlib.dates as mdates

        last.xaxis.set_major_formatter(mdates.DateFormatter("%H:%M:%S"))
    fig.autofmt_xdate() if rec.epoch is not None else None
    fig.tight_layout()
    return fig


def _points(result):
    """(times, values, label, marks) of a result's events or fixes; None if it has neither."""
    if result.get("events"):
        ev = result["events"]
        return ([e["t_s"] for e in ev], [e["level_db"] for e in ev],
                "level above background (dB)", ["" for _ in ev])
    fixes = result.get("fixes") or []
    if not fixes:
        return None
    mics = np.array([m["position_m"] for m in result.get("mics", [])], float)
    centre = mics.mean(axis=0)[:2] if mics.size else np.zeros(2)
    d = [float(np.linalg.norm(np.array(f["position_m"][:2]) - centre)) for f in fixes]
    marks = ["*" if f.get("absent_mics") else "" for f in fixes]
    return [f["t_s"] for f in fixes], d, "distance from array centre (m); * a mic absent", marks
