"""Field-level parsing for site files: typed getters with one-line, field-named errors.

Used by :mod:`locate.io.site_tables` and :mod:`locate.io.site`.  Every getter raises
:class:`locate.errors.SiteFileError` naming the file and the field, and says what to do.
"""

from __future__ import annotations

import datetime as _dt
import difflib
import math
import os
import re
from pathlib import Path

import numpy as np

from locate.errors import SiteFileError

_DECIMAL_COMMA = re.compile(r"\s*[+-]?\d+,\d+\s*")
MAX_LOCAL_M = 1e6  # a local frame spans at most +/-1000 km (flat-earth metres; common practice)
_ISO = re.compile(r"(\d{4})-(\d{2})-(\d{2})[Tt ](\d{2}):(\d{2}):(\d{2})(\.\d+)?"
                  r"(Z|z|[+-]\d{2}:\d{2})?")


class Context:
    """Where we are: the site file (for messages and relative paths) and an audio-info cache."""

    def __init__(self, path):
        self.path = Path(path)
        self.folder = self.path.resolve().parent
        self.audio_info: dict[Path, object] = {}

    def error(self, field, message) -> SiteFileError:
        return SiteFileError(message, file=self.path, field=field or None)

    def resolve(self, text) -> Path:
        path = self.folder / Path(text).expanduser()
        try:
            return path.resolve()
        except (RuntimeError, OSError):  # a symlink loop: the loader names it where it is used
            return Path(os.path.abspath(path))


def _join(where, key):
    return f"{where}.{key}" if where else key


def check_keys(ctx, table, allowed, where):
    for key in table:
        if key not in allowed:
            close = difflib.get_close_matches(str(key), allowed, n=1, cutoff=0.6)
            hint = (f'did you mean "{close[0]}"?' if close
                    else "the valid keys are " + ", ".join(allowed))
            raise ctx.error(_join(where, key), f'unknown key "{key}": {hint}')


def get_table(ctx, raw, key, *, required=False):
    if key not in raw:
        if required:
            raise ctx.error(key, f"missing [{key}] table: add it to the site file")
        return None
    v = raw[key]
    if not isinstance(v, dict):
        raise ctx.error(key, f"must be a table ([{key}]), got {_kind(v)}")
    return v


def _kind(v) -> str:
    if isinstance(v, bool):
        return f"the boolean {str(v).lower()}"
    if isinstance(v, str):
        return f'the string "{v}"'
    if isinstance(v, list):
        return "an array"
    if isinstance(v, dict):
        return "a table"
    return f"{type(v).__name__} {v!r}"


def get_number(ctx, table, key, field, *, required=False, default=None, hint=""):
    """A finite float; booleans, strings ("6,5" -> decimal comma), NaN and inf refused."""
    if key not in table:
        if required:
            raise ctx.error(field, f"missing{': ' + hint if hint else ''}")
        return default
    v = table[key]
    if isinstance(v, bool):
        raise ctx.error(field, f"must be a number, got {_kind(v)}")
    if isinstance(v, str):
        if _DECIMAL_COMMA.fullmatch(v):
            raise ctx.error(field, f'"{v}" has a decimal comma: use a decimal point and no '
                            f"quotes ({v.strip().replace(',', '.')})")
        try:
            float(v)
        except ValueError:
            raise ctx.error(field, f"must be a number, got {_kind(v)}") from None
        raise ctx.error(field, f'must be a number, not the string "{v}": remove the quotes')
    if not isinstance(v, (int, float)):
        raise ctx.error(field, f"must be a number, got {_kind(v)}")
    v = float(v)
    if not math.isfinite(v):
        raise ctx.error(field, f"must be a finite number, got {v}")
    return v


def get_nonneg(ctx, table, key, field, default=None):
    v = get_number(ctx, table, key, field, default=default)
    if v is not None and v < 0:
        raise ctx.error(field, f"must be zero or positive (a standard deviation), got {v:g}")
    return v


def get_int(ctx, table, key, field, *, required=False, default=None, hint=""):
    if key not in table:
        if required:
            raise ctx.error(field, f"missing{': ' + hint if hint else ''}")
        return default
    v = table[key]
    if isinstance(v, float) and v.is_integer():
        raise ctx.error(field, f"must be a whole number: write {int(v)}, not {v}")
    if isinstance(v, str) and v.strip().isdigit():
        raise ctx.error(field, f'must be a whole number, not the string "{v}": remove the quotes')
    if isinstance(v, bool) or not isinstance(v, int):
        raise ctx.error(field, f"must be a whole number, got {_kind(v)}")
    return v


def get_str(ctx, table, key, field, *, required=False, hint=""):
    if key not in table:
        if required:
            raise ctx.error(field, f"missing{': ' + hint if hint else ''}")
        return None
    v = table[key]
    if not isinstance(v, str):
        raise ctx.error(field, f"must be a string in quotes, got {_kind(v)}")
    if required and not v.strip():
        raise ctx.error(field, f"must not be empty{': ' + hint if hint else ''}")
    return v


def get_coordinates(ctx, raw) -> str:
    c = get_str(ctx, raw, "coordinates", "coordinates")
    if c is None:
        return "local"
    if c.strip().lower() in ("local", "wgs84"):
        return c.strip().lower()
    raise ctx.error("coordinates", f'must be "local" (metres, x east, y north, z up) or '
                    f'"wgs84" (lat, lon, alt), got "{c}"')


# ---------------------------------------------------------------------------- start time

def parse_start_time(text) -> tuple[int, float]:
    """ISO 8601 date-time -> (whole POSIX seconds, fraction of a second).

    Accepts ``YYYY-MM-DDTHH:MM:SS[.fff...][Z|+hh:mm]`` (any number of fractional digits).
    A time without a zone is taken as UTC.  Raises :class:`ValueError` if malformed.
    """
    m = _ISO.fullmatch(str(text).strip())
    if not m:
        raise ValueError(f"not an ISO 8601 date-time: {text!r}")
    y, mo, d, hh, mi, ss = (int(g) for g in m.groups()[:6])
    zone = m.group(8)
    tz = _dt.timezone.utc
    if zone and zone not in ("Z", "z"):
        sign = 1 if zone[0] == "+" else -1
        tz = _dt.timezone(sign * _dt.timedelta(hours=int(zone[1:3]), minutes=int(zone[4:6])))
    whole = _dt.datetime(y, mo, d, hh, mi, ss, tzinfo=tz)  # ValueError on a bad date
    return int(whole.timestamp()), float(m.group(7) or 0.0)


def start_time_field(ctx, m, field):
    if "start_time" not in m:
        return None, None
    v = m["start_time"]
    if isinstance(v, _dt.datetime):
        text = v.isoformat()
    elif isinstance(v, str):
        text = v.strip()
    else:
        raise ctx.error(field, f"must be an ISO 8601 date-time such as "
                        f'"2026-05-14T21:03:07.250Z", got {_kind(v)}')
    try:
        parse_start_time(text)
    except ValueError as exc:
        raise ctx.error(field, f'"{text}" is not a valid ISO 8601 date-time ({exc}): write '
                        'e.g. "2026-05-14T21:03:07.250Z"') from None
    has_zone = bool(_ISO.fullmatch(text).group(8))
    return text, has_zone


# ----------------------------------------------------------------------------- positions

def position(ctx, t, coords, where, *, z_default=None, who=""):
    """(x, y, z) for local sites or (lat, lon, alt) for WGS84, checked."""
    if coords == "local":
        keys, wrong = ("x", "y", "z"), ("lat", "lon", "alt")
        hints = (("east coordinate", "metres"), ("north coordinate", "metres"),
                 ("height", "metres (z up)"))
    else:
        keys, wrong = ("lat", "lon", "alt"), ("x", "y", "z")
        hints = (("latitude", "degrees"), ("longitude", "degrees"),
                 ("ellipsoidal height", "metres"))
    for k in wrong:
        if k in t:
            raise ctx.error(_join(where, k), f'this site has coordinates = "{coords}": give '
                            + ", ".join(keys) + " instead of " + ", ".join(wrong))
    vals = []
    for k, h in zip(keys, hints, strict=True):
        required = not (k in ("z", "alt") and z_default is not None)
        vals.append(get_number(ctx, t, k, _join(where, k), required=required,
                               default=z_default, hint=f"give the {h[0]}{who} in {h[1]}"))
    if coords == "wgs84":
        if not -90.0 <= vals[0] <= 90.0:
            raise ctx.error(_join(where, "lat"), f"{vals[0]:g} is outside -90..90 degrees")
        if not -180.0 <= vals[1] <= 180.0:
            raise ctx.error(_join(where, "lon"), f"{vals[1]:g} is outside -180..180 degrees")
    for k, v in zip(keys, vals, strict=True):
        if (coords == "local" or k == "alt") and v is not None and abs(v) > MAX_LOCAL_M:
            todo = ("give the ellipsoidal height in metres" if k == "alt" else "give metres "
                    'from a nearby origin (or lat/lon with coordinates = "wgs84")')
            raise ctx.error(_join(where, k), f"{v:g} m is beyond +/-{MAX_LOCAL_M / 1e3:g} km: "
                            + todo)
    return vals



def table_array(ctx, raw, key):
    v = raw.get(key, [])
    if not isinstance(v, list) or not all(isinstance(x, dict) for x in v):
        raise ctx.error(key, f"must be [[{key}]] tables")
    return v


def points(ctx, value, field, coords, to_local, *, min_points):
    """``(K, 2)`` local metres from [[x, y], ...] (or [[lat, lon], ...] for WGS84 sites)."""
    what = "[x, y]" if coords == "local" else "[lat, lon]"
    if (not isinstance(value, list) or len(value) < min_points
            or not all(isinstance(p, list) and len(p) == 2 for p in value)):
        raise ctx.error(field, f"must be a list of at least {min_points} {what} pairs")
    pts = [[get_number(ctx, {"v": c}, "v", f"{field}[{k}]") for c in p]
           for k, p in enumerate(value)]
    pts = np.array(pts, dtype=float)
    if coords == "wgs84":
        if np.any(np.abs(pts[:, 0]) > 90.0):
            raise ctx.error(field, "latitude outside -90..90: give [lat, lon] pairs")
        if np.any(np.abs(pts[:, 1]) > 180.0):
            raise ctx.error(field, "longitude outside -180..180: give [lat, lon] pairs")
        pts = to_local(pts[:, 0], pts[:, 1])[:, :2]
    elif np.any(np.abs(pts) > MAX_LOCAL_M):
        raise ctx.error(field, f"a coordinate is beyond +/-{MAX_LOCAL_M / 1e3:g} km: give "
                        "metres from a nearby origin (pixels for an image)")
    return pts


