"""Sound levels in a report: source power per octave band and the receivers' levels.

Pure: the strings the template shows for each level entry of a ``kind: "level"`` result
(``levels`` list, or the single entry at the top level), written by
:mod:`locate.report.format`.
"""

from __future__ import annotations

from locate.report import format as rf

__all__ = ["level_entries", "level_sections"]


def level_entries(result):
    if isinstance(result.get("levels"), list) and result["levels"]:
        return result["levels"]
    if result.get("source_lw_db") is not None:
        return [result]
    return []


def _bounded(values, bounds):
    """Band cells: the level, or "< bound" where the band is an upper bound only."""
    bounds = list(bounds or [None] * len(values or []))
    out = []
    for v, u in zip(values or [], bounds, strict=False):
        if v is None and u is not None:
            out.append(f"<{rf.NBSP}{rf.db(u, 0)}")
        else:
            out.append(rf.db(v))
    return out


def _screen_text(r):
    vals = [v for v in (r.get("screen_db") or r.get("barrier_db") or []) if rf.finite(v)]
    if not vals or max(vals) <= 0.05:
        return "none"
    wall = r.get("barrier_label")
    by = f"the {wall}" if wall else "a wall"
    return f"screening by {by}: up to {rf.num(max(vals), 1, 'dB')}"


def _measure_row(r, pass_by):
    row = {"name": r.get("name", rf.DASH),
           "distance": rf.num(r.get("distance_m", r.get("closest_m")), 1, "m"),
           "laeq": rf.db(r.get("laeq_db")),
           "interval": rf.num(r.get("laeq_interval_s", r.get("interval_s")), 2, "s"),
           "lae": rf.db(r.get("lae_db")), "lafmax": rf.db(r.get("lafmax_db")),
           "t_max": rf.seconds(r.get("t_lafmax_s"), 2) if r.get("t_lafmax_s") is not None
           else rf.DASH,
           "lcpeak": rf.DASH if pass_by else rf.db(r.get("lcpeak_db")),
           "lafmax_pred": rf.db(r.get("lafmax_predicted_db")),
           "lae_pred": rf.db(r.get("lae_predicted_db"))}
    return row


def level_sections(result, site):
    """One block per level entry: source power per band, and the receivers.

    Returns
    -------
    list of dict
        ``label``, ``fix``, ``what``, ``heading``, ``position``, ``bands`` (header strings),
        ``lw`` (strings per band, "< N" for upper bounds) / ``spread``, ``lwa``,
        ``lwa_note``, ``unit``, ``calibrated``, ``receivers`` rows (``name``, ``distance``,
        ``lp`` per band, ``lpa``, ``barrier`` and ``screen`` in words), ``measures`` (the
        receivers' LAeq/LAE/LAFmax/LCpeak rows), ``mic_measures`` (measured at the mics),
        ``pass_by``, ``has_bounds``, ``propagation``, ``measures_note``, ``notes``.
    """
    out = []
    for k, lev in enumerate(level_entries(result), 1):
        bands = list(lev.get("bands_hz") or [])
        calibrated = bool(lev.get("calibrated", True))
        pass_by = lev.get("source") == "track"
        pos = lev.get("position_m")
        rec, measures = [], []
        for r in lev.get("receivers") or []:
            bar = [v for v in r.get("barrier_db") or [] if rf.finite(v)]
            rec.append({"name": r.get("name", rf.DASH),
                        "distance": rf.num(r.get("distance_m"), 1, "m"),
                        "lp": _bounded(r.get("lp_db"), r.get("lp_upper_db")),
                        "lpa": rf.db(r.get("lpa_db")),
                        "barrier": rf.num(max(bar), 1, "dB") if bar and max(bar) > 0
                        else "none",
                        "screen": _screen_text(r)})
            if any(key in r for key in ("lae_db", "lafmax_db")):
                measures.append(dict(_measure_row(r, pass_by), screen=_screen_text(r)))
        mic_measures = [_measure_row(m, pass_by) for m in lev.get("mics") or []
                        if "lae_db" in m]
        fix_no = str(lev.get("fix", k))
        if pass_by:
            span = lev.get("t_emit_span_s") or [None, None]
            heading = (f"Pass-by, tracked from {rf.seconds(span[0], 2)} to "
                       f"{rf.seconds(span[1], 2)} (emission time)")
            what = "the pass-by"
        else:
            heading = (f"Fix {fix_no} at x {rf.num(pos[0], 2, 'm')}, y {rf.num(pos[1], 2, 'm')}"
                       if pos else f"Fix {fix_no}")
            what = f"fix {fix_no}"
        ups = lev.get("source_lw_upper_db")
        out.append({
            "label": result.get("_label", ""), "fix": fix_no, "what": what,
            "heading": heading, "pass_by": pass_by,
            "position": f"x {rf.num(pos[0], 2, 'm')}, y {rf.num(pos[1], 2, 'm')}"
            if pos else rf.DASH,
            "bands": [f"{b:g}" if b < 1000 else f"{b / 1000:g}{rf.NBSP}k" for b in bands],
            "lw": _bounded(lev.get("source_lw_db"), ups),
            "has_bounds": any(v is not None for v in ups or []),
            "spread": [rf.db(v) for v in lev.get("mic_spread_db") or []],
            "lwa": rf.db(lev.get("source_lwa_db")),
            "lwa_note": lev.get("source_lwa_note", ""),
            "lw_sd": _position_sd_text(lev.get("lw_position_sd_db")),
            "unit": "dB re 1 pW" if calibrated else "dB re full scale (uncalibrated)",
            "lp_unit": "dB re 20 µPa" if calibrated else "dB re full scale (uncalibrated)",
            "calibrated": calibrated, "receivers": rec, "measures": measures,
            "mic_measures": mic_measures,
            "propagation": lev.get("propagation", ""),
            "measures_note": lev.get("event_measures", ""),
            "notes": list(lev.get("notes") or []),
        })
    return out


def _position_sd_text(sd_db):
    if not rf.finite(sd_db):
        return "uncertainty from the position not given"
    if float(sd_db) < 0.05:
        return f"the position's uncertainty adds under {rf.num(0.1, 1, 'dB')}"
    return f"the position's uncertainty adds ±{rf.NBSP}{rf.num(sd_db, 1, 'dB')}"
