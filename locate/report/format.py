"""How numbers are written in a report: units, precision, minus signs, missing values.

Pure string formatting.  Every number carries its unit after a no-break space; negative
numbers take the typographic minus (U+2212); a missing or non-finite value is an em dash.
Precision follows the uncertainty where one is known: a standard deviation is written with two
significant digits and its value to the same decimal place (JCGM 100:2008, GUM, 7.2.6), never
finer than the caller's resolution.
"""

from __future__ import annotations

import math
import re

from locate.common import format_length

__all__ = ["MINUS", "NBSP", "DASH", "client_words", "finite", "num", "length", "seconds",
           "micro_seconds",
           "degrees", "pm", "db", "percent", "latitude", "longitude", "decimals_for_position"]

MINUS = "\u2212"
NBSP = "\u00a0"
DASH = "\u2014"


def finite(v) -> bool:
    """True for a real, finite number (not None, not a bool)."""
    if v is None or isinstance(v, bool):
        return False
    try:
        return math.isfinite(float(v))
    except (TypeError, ValueError):
        return False


def num(v, decimals: int = 2, unit: str = "", *, sign: bool = False) -> str:
    """``v`` to ``decimals`` places with a typographic minus and an optional unit."""
    if not finite(v):
        return DASH
    d = max(int(decimals), 0)
    text = f"{float(v):.{d}f}"
    if float(text) == 0.0:
        text = f"{0.0:.{d}f}"  # no "-0.00"
    if sign and not text.startswith("-"):
        text = "+" + text
    text = text.replace("-", MINUS)
    return f"{text}{NBSP}{unit}" if unit else text


def length(v_m) -> str:
    """A length with a unit chosen for its size (:func:`locate.common.format_length`), with a
    no-break space and a typographic minus."""
    return format_length(v_m, sep=NBSP).replace("-", MINUS)


def seconds(v_s, decimals: int = 3) -> str:
    return num(v_s, decimals, "s")


def micro_seconds(v_s) -> str:
    """A small time in microseconds, three significant digits at most."""
    if not finite(v_s):
        return DASH
    us = float(v_s) * 1e6
    decimals = 2 if abs(us) < 10 else 1 if abs(us) < 100 else 0
    return num(us, decimals, "µs")


def degrees(v_deg, decimals: int = 0) -> str:
    if not finite(v_deg):
        return DASH
    return num(float(v_deg) % 360.0, decimals) + "°"


def _sd_decimals(sd, max_decimals):
    """Decimal places that give ``sd`` two significant digits, capped at ``max_decimals``."""
    if not finite(sd) or float(sd) <= 0:
        return max_decimals
    d = 1 - int(math.floor(math.log10(float(sd))))
    return int(min(max(d, 0), max_decimals))


def pm(v, sd, unit: str = "", *, max_decimals: int = 2) -> str:
    """``value ± sd unit`` to the precision of the sd (two significant digits, GUM 7.2.6).

    An sd that rounds to zero at ``max_decimals`` is written ``< half a step``.
    """
    if not finite(v):
        return DASH
    d = _sd_decimals(sd, max_decimals)
    sep = "" if unit == "°" else NBSP
    tail = f"{sep}{unit}" if unit else ""
    value = num(v, d)
    if not finite(sd):
        return f"{value}{tail}"
    if round(float(sd), d) == 0:
        half = 0.5 * 10.0 ** (-d)
        return f"{value}{NBSP}±{NBSP}<{NBSP}{num(half, d + 1)}{tail}"
    return f"{value}{NBSP}±{NBSP}{num(sd, d)}{tail}"


def db(v, decimals: int = 1) -> str:
    """A level in dB (no unit; the column header carries it)."""
    return num(v, decimals)


def percent(share, decimals: int = 0) -> str:
    """A fraction as a percentage."""
    if not finite(share):
        return DASH
    return num(100.0 * float(share), decimals, "%")


def latitude(lat_deg, decimals: int = 7) -> str:
    """``52.1234567° N`` (7 decimals: about 1 cm)."""
    if not finite(lat_deg):
        return DASH
    v = float(lat_deg)
    return f"{abs(v):.{decimals}f}°{NBSP}{'N' if v >= 0 else 'S'}"


def longitude(lon_deg, decimals: int = 7) -> str:
    """``1.2345678° W``."""
    if not finite(lon_deg):
        return DASH
    v = float(lon_deg)
    return f"{abs(v):.{decimals}f}°{NBSP}{'E' if v >= 0 else 'W'}"


def decimals_for_position(semi_major_m, lo: int = 1, hi: int = 3) -> int:
    """Decimal places (metres) for a position whose 95 % half-axis is ``semi_major_m``.

    The last digit is about a third of the half-axis or finer: 8 mm -> 3, 40 cm -> 1.
    """
    if not finite(semi_major_m):
        return lo
    if float(semi_major_m) <= 0:
        return hi
    step = float(semi_major_m) / 3.0
    d = int(math.ceil(-math.log10(step)))
    return int(min(max(d, lo), hi))


# What the tool's own notes say in its terms, and what a client reads instead.  The core speaks
# in option and field names (they tell a user of the tool what to type); a report is read by
# people who never type them.
_CLIENT_WORDS = (
    (r"\s*\(?\bsee tdoa plan\)?", " (see the planning map)"),
    (r"\bwith --band around it\b|\ba --band around it\b", "an analysis band around it"),
    (r"\ba better --band\b", "a better-chosen analysis band"),
    (r"--band\b", "the analysis band"),
    (r"--source-z\b", "the source height"),
    (r"--sound-speed\b", "the sound speed"),
    (r"--solve-air\b", "solving for the sound speed"),
    (r"--window\b", "the analysis window"),
    (r"--from/--to\b|--from\b|--to\b", "the analysed time span"),
    (r"--[a-z][a-z0-9-]+", "a setting of the analysis"),
    (r"\btemperature_sd_c\b", "the air temperature's uncertainty"),
    (r"\bwind_sd_mps\b", "the wind's uncertainty"),
    (r"\bposition_sd_m\b", "the mic positions' uncertainty"),
    (r"\bheight_sd_m\b", "the mic heights' uncertainty"),
    (r"\bclock_sd_s\b", "the clocks' uncertainty"),
    (r"\btdoa (?:fix|track|level|sync|check|plan|events)\b", "the analysis"),
)
_CLIENT_RE = [(re.compile(a), b) for a, b in _CLIENT_WORDS]


def client_words(text):
    """``text`` with command-line options and internal field names said in plain words.

    Applied to every value the report prints, so a note written for a user of the tool reads
    as it should to a client.  Non-strings pass unchanged.
    """
    if not isinstance(text, str) or hasattr(text, "__html__"):
        return text  # numbers, and markup already made of finalized values (macros)
    for rx, words in _CLIENT_RE:
        text = rx.sub(words, text)
    return text
