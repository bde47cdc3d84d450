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


def level_sections(result, site):
    """One block per level entry: source power per band, and the receivers.

    Returns
    -------
    list of dict
        ``label``, ``fix``, ``position``, ``bands`` (header strings), ``lw`` / ``spread``
        (strings per band), ``lwa``, ``unit``, ``calibrated``, ``receivers`` rows (``name``,
        ``distance``, ``lp`` per band, ``lpa``, ``barrier``), ``notes``.
    """
    out = []
    for k, lev in enumerate(level_entries(result), 1):
        bands = list(lev.get("bands_hz") or [])
        calibrated = bool(lev.get("calibrated", True))
        pos = lev.get("position_m")
        rec = []
        for r in lev.get("receivers") or []:
            bar = [v for v in r.get("barrier_db") or [] if rf.finite(v)]
            rec.append({"name": r.get("name", rf.DASH),
                        "distance": rf.num(r.get("distance_m"), 1, "m"),
                        "lp": [rf.db(v) for v in r.get("lp_db") or []],
                        "lpa": rf.db(r.get("lpa_db")),
                        "barrier": rf.num(max(bar), 1, "dB") if bar and max(bar) > 0
                        else "none"})
        out.append({
            "label": result.get("_label", ""), "fix": str(lev.get("fix", k)),
            "position": f"x {rf.num(pos[0], 2, 'm')}, y {rf.num(pos[1], 2, 'm')}"
            if pos else rf.DASH,
            "bands": [f"{b:g}" if b < 1000 else f"{b / 1000:g}{rf.NBSP}k" for b in bands],
            "lw": [rf.db(v) for v in lev.get("source_lw_db") or []],
            "spread": [rf.db(v) for v in lev.get("mic_spread_db") or []],
            "lwa": rf.db(lev.get("source_lwa_db")),
            "lw_sd": _position_sd_text(lev.get("lw_position_sd_db")),
            "unit": "dB re 1 pW" if calibrated else "dB re full scale (uncalibrated)",
            "lp_unit": "dB re 20 µPa" if calibrated else "dB re full scale (uncalibrated)",
            "calibrated": calibrated, "receivers": rec,
            "notes": list(lev.get("notes") or []),
        })
    return out


def _position_sd_text(sd_db):
    if not rf.finite(sd_db):
        return "uncertainty from the position not given"
    if float(sd_db) < 0.05:
        return f"the position's uncertainty adds under {rf.num(0.1, 1, 'dB')}"
    return f"the position's uncertainty adds ±{rf.NBSP}{rf.num(sd_db, 1, 'dB')}"
