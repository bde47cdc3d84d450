"""What a survey report says: the template's data, built from a site and its result dicts.

Pure: numbers are read from the ``tdoa-result/1`` dicts (and the :class:`locate.io.site.Site`)
and written as strings by :mod:`locate.report.format`; nothing is recomputed except the 95 %
ellipse of track points (from their covariance, :func:`locate.geometry.ellipses.ellipse`) and WGS84
positions that a result does not already carry (:func:`locate.geometry.frames.wgs84_from_enu`).

Each ``*_section`` function returns a plain dict (or list of dicts) that
``templates/report.html.j2`` lays out; the keys are documented where they are made.
"""

from __future__ import annotations

import numpy as np

from locate.geometry.ellipses import ellipse
from locate.report import format as rf
from locate.report.budget import budget_sections
from locate.report.levels import level_entries, level_sections
from locate.report.methods import methods_section
from locate.results.documents import fix_label

__all__ = ["wgs84_of", "setup_section", "fix_section", "track_section", "level_sections",
           "budget_sections", "level_entries", "summary_lines", "cautions_of", "methods_section",
           "heading_text", "speed_text"]

_REJECTED_WHY = "timing disagrees with the other mics (integrity test)"
_DEAD_WHY = "no usable correlation (did it record the sound?)"
_NO_CHECK = ("no pair delay was left over to check this fix (as many unknowns as independent "
             "delays): its ellipse reflects the timing noise only and a wrong delay would go "
             "unnoticed")


def wgs84_of(item, site):
    """``(lat, lon, alt)`` of a result item: its ``position_wgs84`` or converted from
    ``position_m`` at the site's origin; None for a local site."""
    g = item.get("position_wgs84")
    if isinstance(g, list | tuple) and len(g) == 3 and all(rf.finite(v) for v in g):
        return tuple(float(v) for v in g)
    origin = getattr(site, "origin_wgs84", None)
    pos = item.get("position_m")
    if origin is None or pos is None:
        return None
    from locate.geometry.frames import wgs84_from_enu

    p = np.asarray(pos, dtype=float).reshape(-1)
    if p.size == 2:
        p = np.append(p, 0.0)
    lat, lon, alt = wgs84_from_enu(p, origin)
    return float(lat), float(lon), float(alt)


def _latlon(g):
    return (rf.latitude(g[0]), rf.longitude(g[1])) if g else (rf.DASH, rf.DASH)


# ---------------------------------------------------------------------------------- set-up

def setup_section(site, results, recordings=None):
    """The survey set-up: mics, air, recordings, receivers, barriers.

    Parameters
    ----------
    site : locate.io.site.Site
    results : list of dict
    recordings : dict, optional
        ``files``: list of dict(file, channels, sample_rate_hz, duration_s, mics);
        ``start_s``, ``stop_s`` (span common to all mics); ``error`` (why they could not be
        opened).  None: not examined.

    Returns
    -------
    dict
        ``mics`` (rows), column flags (``wgs84``, ``drift``, ``full_scale``, ``survey_sd``),
        ``air`` (label, value) rows, ``recordings``, ``spans``, ``receivers``, ``barriers``,
        ``warnings``.
    """
    wgs = site.coordinates == "wgs84"
    mics = []
    for m in site.mics:
        x, y, z = (float(v) for v in m.position_m)
        file, channel = site.mic_source(site.mic_names.index(m.name))
        g = m.geodetic if wgs else None
        sds = [s for s in (m.position_sd_m, m.height_sd_m) if s is not None]
        mics.append({
            "name": m.name, "x": rf.num(x, 2), "y": rf.num(y, 2), "z": rf.num(z, 2),
            "lat": rf.latitude(g[0]) if g else "", "lon": rf.longitude(g[1]) if g else "",
            "file": file.name if file is not None else rf.DASH, "channel": str(channel),
            "offset": rf.num(m.offset_s, 6, "s", sign=True) if m.offset_s else "0 s",
            "drift": rf.num(m.drift_ppm, 2, "ppm", sign=True),
            "full_scale": rf.num(m.full_scale_db_spl, 1, "dB") if m.full_scale_db_spl
            is not None else "not calibrated",
            "survey_sd": " / ".join(rf.length(s) for s in sds) if sds else "not declared",
        })
    air = site.air
    speeds = sorted({round(float(r["sound_speed_mps"]), 2) for r in results
                     if rf.finite(r.get("sound_speed_mps"))})
    air_rows = [
        ("Air temperature", rf.num(air.temperature_c, 1, "°C")
         + (f" (±{rf.NBSP}{rf.num(air.temperature_sd_c, 1, '°C')})" if air.temperature_sd_c
            else "")),
        ("Relative humidity", rf.num(air.relative_humidity, 0, "%")),
        ("Air pressure", rf.num(air.pressure_kpa, 1, "kPa")),
        ("Wind", f"{rf.num(air.wind_speed_mps, 1, 'm/s')} from {rf.degrees(air.wind_from_deg)}"
         if air.wind_speed_mps else "calm (not given)"),
        ("Sound speed used", ", ".join(rf.num(c, 2, "m/s") for c in speeds) if speeds
         else rf.num(air.sound_speed_mps(), 2, "m/s")),
    ]
    spans = []
    for r in results:
        for k, f in enumerate(_entries(r), 1):
            s = f.get("span_s")
            if isinstance(s, list) and len(s) == 2:
                spans.append((r.get("_label", ""), k, float(s[0]), float(s[1])))
        if r.get("kind") == "track" and isinstance(r.get("span_s"), list):
            spans.append((r.get("_label", ""), None, *map(float, r["span_s"])))
    receivers = [{"name": rc.name, "x": rf.num(rc.position_m[0], 2),
                  "y": rf.num(rc.position_m[1], 2), "z": rf.num(rc.position_m[2], 2),
                  "lat": rf.latitude(rc.geodetic[0]) if wgs and rc.geodetic else "",
                  "lon": rf.longitude(rc.geodetic[1]) if wgs and rc.geodetic else ""}
                 for rc in site.receivers]
    barriers = []
    for b in site.barriers:
        line = np.asarray(b.line_m, dtype=float)
        barriers.append({"label": b.label, "height": rf.num(b.height_m, 1, "m"),
                         "length": rf.num(float(np.sum(np.linalg.norm(np.diff(line, axis=0),
                                                                       axis=1))), 1, "m"),
                         "ends": f"({rf.num(line[0, 0], 1)}, {rf.num(line[0, 1], 1)}) to "
                                 f"({rf.num(line[-1, 0], 1)}, {rf.num(line[-1, 1], 1)})"})
    origin = site.origin_wgs84
    return {
        "coordinates": "WGS84 latitude, longitude and ellipsoidal height, converted to local "
                       "metres east and north of the array centre" if wgs
        else "local metres, x east, y north, z up",
        "origin": f"{rf.latitude(origin[0])}, {rf.longitude(origin[1])}, "
                  f"{rf.num(origin[2], 2, 'm')}" if origin else None,
        "wgs84": wgs, "mics": mics,
        "drift": any(m.drift_ppm for m in site.mics),
        "full_scale": any(m.full_scale_db_spl is not None for m in site.mics),
        "survey_sd": any(m.position_sd_m is not None or m.height_sd_m is not None
                         for m in site.mics),
        "air": air_rows, "recordings": _recordings(recordings), "spans": [
            {"label": lab, "n": "" if n is None else str(n),
             "span": f"{rf.num(a, 3)}–{rf.num(b, 3)}{rf.NBSP}s", "length": rf.seconds(b - a)}
            for lab, n, a, b in spans],
        "receivers": receivers, "barriers": barriers, "warnings": list(site.warnings),
    }


def _recordings(info):
    if info is None:
        return None
    if info.get("error"):
        return {"error": info["error"], "files": []}
    files = [{"file": f["file"], "channels": str(f["channels"]),
              "rate": rf.num(f["sample_rate_hz"], 0, "Hz"),
              "duration": rf.seconds(f["duration_s"], 2), "mics": ", ".join(f["mics"])}
             for f in info.get("files", [])]
    return {"error": None, "files": files,
            "common": f"{rf.num(info['start_s'], 3)}–{rf.num(info['stop_s'], 3)}{rf.NBSP}s "
                      f"({rf.seconds(info['stop_s'] - info['start_s'], 2)})"}


def _entries(result):
    if result.get("kind") == "fix":
        return list(result.get("fixes") or [])
    if result.get("kind") == "track":
        return list((result.get("track") or {}).get("points") or [])
    return []


# ---------------------------------------------------------------------------------- fixes

def _ellipse95(item):
    """The 95 % ellipse: from ``covariance_m2`` (unrounded) when it is finite, else the
    stored ``ellipse95``; ``{}`` when neither is there."""
    cov = item.get("covariance_m2")
    if cov is not None:
        c = np.asarray(cov, dtype=float)
        if c.shape[-2:] in ((2, 2), (3, 3)) and np.all(np.isfinite(c[:2, :2])):
            return ellipse(c, 0.95)
    return dict(item.get("ellipse95") or {})


def _reasons(f):
    out = [(m, _REJECTED_WHY) for m in f.get("rejected_mics") or []]
    out += [(m, _DEAD_WHY) for m in f.get("dead_mics") or []]
    return out


def fix_section(result, site):
    """One table row per fix (positions) and one per fix (fit quality).

    Returns
    -------
    dict
        ``label``, ``title``, ``wgs84``, ``rows`` (``n``, ``t``, ``x``, ``y``, ``z``,
        ``z_note``, ``lat``, ``lon``, ``major``, ``minor``, ``azimuth``, ``span``, ``band``,
        ``residual``, ``p``, ``used``, ``reasons`` [(mic, why)], ``warnings``), ``warnings``.
    """
    rows = []
    for k, f in enumerate(result.get("fixes") or [], 1):
        e = _ellipse95(f)
        d = rf.decimals_for_position(e.get("semi_major_m"))
        x, y, z = (list(f["position_m"]) + [None])[:3]
        g = wgs84_of(f, site)
        span, band = f.get("span_s"), f.get("band_hz")
        rows.append({
            "n": fix_label(f, k), "t": rf.seconds(f.get("t_s"))
            + (f" ({f['t_utc'].replace('T', ' ')})" if f.get("t_utc") else ""),
            "x": rf.num(x, d), "y": rf.num(y, d), "z": rf.num(z, 2),
            "z_note": _z_note(f, result),
            "lat": _latlon(g)[0], "lon": _latlon(g)[1],
            "major": rf.length(e.get("semi_major_m")), "minor": rf.length(e.get("semi_minor_m")),
            "azimuth": rf.degrees(e.get("azimuth_deg")),
            "span": f"{rf.num(span[0], 3)}–{rf.num(span[1], 3)}{rf.NBSP}s" if span else rf.DASH,
            "band": f"{rf.num(band[0], 0)}–{rf.num(band[1], 0)}{rf.NBSP}Hz" if band else rf.DASH,
            "residual": rf.micro_seconds(f.get("residual_rms_s")),
            "p": _p_value(f.get("p_value"), f.get("dof")),
            "used": ", ".join(f.get("used_mics") or []) or rf.DASH,
            "reasons": _reasons(f),
            "warnings": list(f.get("warnings") or []) + ([_NO_CHECK] if f.get("dof") == 0
                                                         else []),
        })
    return {"label": result.get("_label", ""), "title": result.get("title") or site.title,
            "wgs84": any(r["lat"] != rf.DASH for r in rows), "rows": rows,
            "warnings": list(result.get("warnings") or [])}


def _p_value(p, dof):
    if not rf.finite(p) or not dof:
        return f"{rf.DASH} (no spare pairs)" if not dof else rf.DASH
    p = float(p)
    return "< 0.001" if p < 1e-3 else f"{p:.3f}"


# ---------------------------------------------------------------------------------- tracks

def heading_text(d):
    """``89.6 ± 0.4°`` from a dict with ``heading_deg`` and ``heading_sd_deg``."""
    return rf.pm(d.get("heading_deg"), d.get("heading_sd_deg"), "°", max_decimals=1)


def speed_text(d, *, kmh=False):
    """``18.05 ± 0.31 m/s`` (and ``(65.0 ± 1.1 km/h)``) from ``speed_mps``, ``speed_sd_mps``."""
    v, sd = d.get("speed_mps"), d.get("speed_sd_mps")
    text = rf.pm(v, sd, "m/s", max_decimals=2)
    if kmh and rf.finite(v):
        sd_kmh = 3.6 * float(sd) if rf.finite(sd) else None  # 1 m/s = 3.6 km/h
        text += f" ({rf.pm(3.6 * float(v), sd_kmh, 'km/h', max_decimals=1)})"
    return text


def track_section(result, site):
    """A moving source: the motion, closest approaches and one row per track point.

    Returns
    -------
    dict
        ``label``, ``title``, ``facts`` (label, value) rows, ``closest`` rows, ``points`` rows
        (``n``, ``emit``, ``heard``, ``x``, ``y``, ``lat``, ``lon``, ``major``, ``minor``,
        ``used``), ``wgs84``, ``warnings``.
    """
    tr = result.get("track") or {}
    pts = list(tr.get("points") or [])
    used = sum(1 for p in pts if p.get("used", True))
    emits = [p["t_emit_s"] for p in pts if rf.finite(p.get("t_emit_s"))]
    facts = [
        ("Heading (direction of travel, from north)", heading_text(tr)),
        ("Speed", speed_text(tr, kmh=True)),
        ("Motion model", {"straight": "straight line at constant speed",
                          "segments": "straight segments"}.get(tr.get("model"),
                                                               str(tr.get("model") or rf.DASH))),
        ("Track points", f"{used} used of {len(pts)}"),
        ("Emission times", f"{rf.num(min(emits), 2)}–{rf.num(max(emits), 2)}{rf.NBSP}s"
         if emits else rf.DASH),
        ("Timing residual (rms)", rf.micro_seconds(tr.get("residual_rms_s"))),
    ]
    dop = tr.get("doppler")
    if isinstance(dop, dict) and rf.finite(dop.get("speed_mps")):
        facts.append(("Speed from the Doppler shift (independent)",
                      rf.pm(dop["speed_mps"], dop.get("speed_sd_mps"), "m/s", max_decimals=2)))
    if len(tr.get("segments") or []) > 1:
        for k, s in enumerate(tr["segments"], 1):
            facts.append((f"Segment {k} ({rf.num(s.get('t_start_s'), 2)}–"
                          f"{rf.num(s.get('t_stop_s'), 2)}{rf.NBSP}s)",
                          f"{heading_text(s)}, {speed_text(s)}"))
    closest = [{"name": c.get("name", rf.DASH),
                "distance": rf.pm(c.get("distance_m"), c.get("distance_sd_m"), "m",
                                  max_decimals=2),
                "emit": rf.seconds(c.get("t_s"), 2), "heard": rf.seconds(c.get("t_heard_s"), 2),
                "note": "" if c.get("within_span", True) else "outside the analysed span"}
               for c in tr.get("closest_approach") or []]
    rows = []
    for k, p in enumerate(pts, 1):
        e = _ellipse95(p)
        d = rf.decimals_for_position(e.get("semi_major_m"))
        g = wgs84_of(p, site)
        rows.append({"n": str(k), "emit": rf.seconds(p.get("t_emit_s")),
                     "heard": rf.seconds(p.get("t_heard_s")),
                     "x": rf.num(p["position_m"][0], d), "y": rf.num(p["position_m"][1], d),
                     "lat": _latlon(g)[0], "lon": _latlon(g)[1],
                     "major": rf.length(e.get("semi_major_m")),
                     "minor": rf.length(e.get("semi_minor_m")),
                     "used": "yes" if p.get("used", True) else "no (outlier)"})
    return {"label": result.get("_label", ""), "title": result.get("title") or site.title,
            "facts": facts, "closest": closest, "points": rows,
            "wgs84": any(r["lat"] != rf.DASH for r in rows),
            "warnings": list(result.get("warnings") or []) + list(tr.get("warnings") or [])}


# ---------------------------------------------------------------------------------- summary

def summary_lines(results, site):
    """One plain sentence per result for the "at a glance" box."""
    lines = []
    for r in results:
        kind, lab = r.get("kind"), r.get("_label", "")
        if kind == "fix":
            fixes = r.get("fixes") or []
            majors = [(f.get("ellipse95") or {}).get("semi_major_m") for f in fixes]
            majors = [m for m in majors if rf.finite(m)]
            text = f"{len(fixes)} sound{'s' if len(fixes) != 1 else ''} located ({lab})"
            if majors:
                text += (f"; 95 % confidence half-axes up to {rf.length(max(majors))}"
                         if len(majors) > 1 else
                         f"; 95 % confidence half-axis {rf.length(majors[0])}")
            rej = sorted({m for f in fixes for m in f.get("rejected_mics") or []}
                         | {m for f in fixes for m in f.get("dead_mics") or []})
            if rej:
                text += f"; not used in at least one fix: {', '.join(rej)}"
            lines.append(text + ".")
        elif kind == "track":
            tr = r.get("track") or {}
            lines.append(f"A moving source tracked ({lab}): heading {heading_text(tr)}, "
                         f"speed {speed_text(tr)}.")
        elif kind == "level":
            for lev in level_sections(r, site):
                rec = "; ".join(f"{x['lpa']} dB(A) predicted at {x['name']}"
                                for x in lev["receivers"])
                lines.append(f"Fix {lev['fix']}: sound power {lev['lwa']} "
                             f"{'dB(A) re 1 pW' if lev['calibrated'] else 'dB(A) re full scale'}"
                             + (f"; {rec}" if rec else "") + f" ({lab}).")
    return lines


def cautions_of(results, extra=()):
    """The cautions to print: the project's, each result's own, and ``extra``; no repeats."""
    from locate.physics.levels import CAUTIONS as LEVEL_CAUTIONS
    from locate.results.documents import CAUTIONS

    items = list(CAUTIONS)
    for r in results:
        items += [str(c) for c in r.get("cautions") or []]
        if r.get("kind") == "level":
            items += list(LEVEL_CAUTIONS)
    items += list(extra)
    out, themes = [], set()
    for c in dict.fromkeys(items):
        theme = next((t for t, words in _THEMES.items() if any(w in c.lower() for w in words)),
                     c)
        if theme not in themes:
            themes.add(theme)
            out.append(c)
    return out


# cautions saying the same thing in other words: the first of each theme is kept
_THEMES = {"compliance": ("compliance",), "competent": ("competent",),
           "people": ("recording people", "speech")}


def _z_note(fix, result):
    """How the height of a fix was set, in plain words: solved, given or assumed (± sd)."""
    if fix.get("dims", result.get("dims")) == 3:
        return "solved"
    basis = result.get("source_z_basis") or "given"
    sd = result.get("source_z_sd_m")
    return f"{basis}, ±{sd:g} m" if isinstance(sd, int | float) and sd > 0 else basis
