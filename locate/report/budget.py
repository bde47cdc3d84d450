"""The uncertainty budget in a report: what makes each ellipse as large as it is.

Pure: the strings for the ``uncertainty_budget`` entry of a fix (keys as written by
:func:`locate.accuracy.budget.uncertainty_budget`): each component's share of the horizontal
variance,
the area of the ellipse it alone would give, the mics' shares and re-survey gains, the hint,
and the uncertainties that were assumed.
"""

from __future__ import annotations

from locate.report import format as rf
from locate.results.documents import fix_label

__all__ = ["COMPONENT_NAMES", "budget_sections", "assumed_text"]

COMPONENT_NAMES = {"timing": "Timing (correlation noise)", "mic_positions": "Mic positions",
                   "sound_speed": "Sound speed (air temperature)", "clocks": "Recorder clocks",
                   "wind": "Wind", "unexplained": "Misfit beyond the declared uncertainties",
                   "reflections": "Ground reflection (timing bias)",
                   "source_height": "Source height (assumed)"}

# site-file fields named in ``defaults`` -> the assumption they feed
_DEFAULT_OF = {"position": "mic_positions", "height": "mic_positions", "temperature": "temperature",
               "clock": "clocks", "wind": "wind"}


def _spread(values, fmt):
    vals = sorted({float(v) for v in values if rf.finite(v)})
    if not vals:
        return None
    return fmt(vals[0]) if len(vals) == 1 else f"{fmt(vals[0])} to {fmt(vals[-1])}"


def assumed_text(b):
    """One line: the standard deviations the budget assumed, "(default)" where the site file
    gave none."""
    sd, declared = b.get("sd") or {}, b.get("declared") or {}
    defaults = {_DEFAULT_OF[k] for d in b.get("defaults") or [] for k in _DEFAULT_OF if k in d}
    parts = []
    if declared.get("mic_positions"):
        horiz = _spread(sd.get("position_m") or [], rf.length)
        height = _spread(sd.get("height_m") or [], rf.length)
        if horiz:
            parts.append(f"mic positions {horiz} per horizontal axis"
                         + (f" and {height} in height" if height else "")
                         + (" (default)" if "mic_positions" in defaults else ""))
    if declared.get("sound_speed") and rf.finite(sd.get("temperature_c")):
        parts.append(f"air temperature ±{rf.NBSP}{rf.num(sd['temperature_c'], 1, '°C')}"
                     + (" (default)" if "temperature" in defaults else ""))
    if declared.get("clocks"):
        clock = _spread(sd.get("clock_s") or [], rf.micro_seconds)
        if clock:
            parts.append(f"recorder clocks {clock}" + (" (default)" if "clocks" in defaults
                                                        else ""))
    if declared.get("wind") and rf.finite(sd.get("wind_mps")):
        parts.append(f"wind {rf.num(sd['wind_mps'], 1, 'm/s')}"
                     + (" (default)" if "wind" in defaults else ""))
    return "; ".join(parts)


def budget_sections(result):
    """The uncertainty budget of each fix that carries ``uncertainty_budget``.

    Returns
    -------
    list of dict
        ``label``, ``fix``, ``rows`` (``name``, ``share``, ``area``, ``declared``), ``hint``,
        ``note``, ``method``, ``assumed``, ``dominant``, ``mics`` (``name``, ``share``,
        ``gain``) rows and ``gains`` (False when no re-survey would help: column left out).
    """
    out = []
    for k, f in enumerate(result.get("fixes") or [], 1):
        b = f.get("uncertainty_budget")
        if not isinstance(b, dict):
            continue
        shares, area = b.get("shares") or {}, b.get("area_shares") or {}
        declared = b.get("declared") or {}
        rows = [{"name": COMPONENT_NAMES.get(c, c.replace("_", " ")),
                 "share": rf.percent(v, 1),
                 "area": rf.percent(area.get(c), 1) if c in area else rf.DASH,
                 "declared": "yes" if declared.get(c)
                 else (rf.DASH if c in ("timing", "unexplained", "reflections") else "no")}
                for c, v in shares.items()]
        gains = b.get("resurvey_gain") or {}
        mics = [{"name": m, "share": rf.percent(v, 1), "gain": rf.percent(gains.get(m), 1)}
                for m, v in (b.get("mic_position_shares") or {}).items()]
        out.append({"label": result.get("_label", ""), "fix": fix_label(f, k), "rows": rows,
                    "hint": b.get("hint", ""), "note": _plain_note(b),
                    "method": b.get("method", ""), "mics": mics,
                    "gains": any(rf.finite(g) and float(g) > 0 for g in gains.values()),
                    "assumed": assumed_text(b),
                    "dominant": COMPONENT_NAMES.get(b.get("dominant"), b.get("dominant"))})
    return out


def _plain_note(b):
    """The budget's note for a client: no site-file field or table names."""
    note = b.get("note", "") or ""
    declared = b.get("declared") or {}
    if not any(declared.get(k) for k in ("mic_positions", "clocks", "sound_speed", "wind")):
        return ("Timing-only uncertainty: nothing was stated about how well the microphone "
                "positions, the recorder clocks or the air are known, so they were taken as "
                "exact and the ellipse shows the timing of the sound alone")
    if not declared.get("mic_positions"):
        return ("The microphone positions were taken as exact (how well they were surveyed "
                "was not stated)")
    return note
