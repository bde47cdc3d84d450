"""Reading a ``tdoa-result/1`` dict for drawing: entries, used pairs, hyperbola fields.

Pure functions (no matplotlib): :func:`check_result` normalises fixes and track points,
:func:`pair_used` says which pairs a fix used, :func:`delay_misfit_field` gives the field whose
zero contour is a pair's TDOA hyperbola.
"""

from __future__ import annotations

import numpy as np

from locate.draw import kit as mk
from locate.draw.kit import ellipse_axes
from locate.errors import ResultFileError
from locate.physics.air import travel_time_s, wind_vector_mps
from locate.results.documents import SCHEMA, check_schema, fix_label

__all__ = ["SCHEMA", "check_result", "pair_used", "used_pairs", "delay_misfit_field", "mics_of",
           "wind_of"]



def vec3(v, where, file):
    try:
        a = np.asarray(v, dtype=float).ravel()
    except (TypeError, ValueError):
        a = np.array([])
    if a.size == 2:
        a = np.append(a, 0.0)
    if a.size != 3 or not np.all(np.isfinite(a)):
        raise ResultFileError(f"expected a position [x, y, z] in metres, got {v!r}",
                              file=file, field=where)
    return a


def check_result(result, *, file=None, kinds=("fix", "track")):
    """Check that ``result`` is a ``tdoa-result/1`` dict of a kind that can be drawn.

    Returns
    -------
    list of dict
        One per fix (or track point): ``t_s`` (emission time for a track), ``t_heard_s``,
        ``span_s`` ([start, stop] or None), ``position_m`` (3,), ``e50`` / ``e95`` (ellipse
        dicts, see :func:`ellipse_axes`, or None), ``rejected``, ``dead`` and ``used_mics``
        (names), ``used`` (track point kept in the fit), ``delays``, ``correlations``,
        ``mirror_m``, ``now_m`` ((3,) or None).  Ellipses come from ``covariance_m2``, else
        from a stored ``ellipse95``; a non-finite covariance gives no ellipse.

    Raises
    ------
    locate.errors.ResultFileError
        Another schema or kind, or a malformed entry.
    """
    if not isinstance(result, dict):
        raise ResultFileError("a result must be a JSON object", file=file)
    check_schema(result, file=file, kinds=kinds, reader="a map")
    kind = result.get("kind")
    if kind == "track":
        raw, key, tkey = (result.get("track") or {}).get("points"), "track.points", "t_emit_s"
    else:
        raw, key, tkey = result.get("fixes"), "fixes", "t_s"
    if not isinstance(raw, list):
        raise ResultFileError(f"{key} must be a list", file=file, field=key)
    out = []
    for n, f in enumerate(raw):
        where = f"{key}[{n}]"
        if not isinstance(f, dict) or "position_m" not in f:
            raise ResultFileError("missing position_m", file=file, field=where)
        span = f.get("span_s")
        e = {"t_s": f.get(tkey, f.get("t_s")), "t_heard_s": f.get("t_heard_s"),
             "span_s": [float(v) for v in span] if isinstance(span, list | tuple)
             and len(span) == 2 else None,
             "position_m": vec3(f["position_m"], f"{where}.position_m", file),
             "rejected": [str(m) for m in f.get("rejected_mics") or []],
             "dead": [str(m) for m in f.get("dead_mics") or []],
             "used_mics": None if f.get("used_mics") is None else [str(m) for m in
                                                                   f["used_mics"]],
             "used": bool(f.get("used", True)),
             "delays": list(f.get("delays") or []), "correlations": f.get("correlations"),
             "mirror_m": None, "now_m": None, "e50": None, "e95": None,
             "label": fix_label(f, n + 1)}
        if e["span_s"] is None and e["t_s"] is not None and f.get("duration_s") is not None:
            e["span_s"] = [float(e["t_s"]), float(e["t_s"]) + float(f["duration_s"])]
        for src, dst in (("mirror_position_m", "mirror_m"), ("position_now_m", "now_m")):
            if f.get(src) is not None:
                e[dst] = vec3(f[src], f"{where}.{src}", file)
        cov = f.get("covariance_m2")
        if cov is not None:
            try:
                c = np.asarray(cov, dtype=float)
            except (TypeError, ValueError):
                c = np.zeros(0)
            if c.shape not in ((2, 2), (3, 3)):
                raise ResultFileError(f"covariance_m2 must be a 2x2 or 3x3 matrix, got shape "
                                      f"{c.shape}", file=file, field=f"{where}.covariance_m2")
            e["e50"], e["e95"] = ellipse_axes(c, 0.50), ellipse_axes(c, 0.95)
        elif isinstance(f.get("ellipse95"), dict):
            e["e50"] = mk.ellipse_from_stored(f["ellipse95"], 0.50)
            e["e95"] = mk.ellipse_from_stored(f["ellipse95"], 0.95)
        if e["e95"] is None:
            e["e50"] = None
        out.append(e)
    return out


def pair_of(d, names, where, file):
    """Mic indices (i, j) of a delay entry: ``"mics": [a, b]`` by name or ``"pair": [i, j]``."""
    if isinstance(d, dict) and "mics" in d:
        a, b = (str(m) for m in d["mics"])
        for m in (a, b):
            if m not in names:
                raise ResultFileError(f"the result names mic {m!r}, which the site does not "
                                      f"have ({', '.join(names)}): wrong site file?",
                                      file=file, field=f"{where}.mics")
        return names.index(a), names.index(b)
    if isinstance(d, dict) and "pair" in d:
        i, j = (int(k) for k in d["pair"])
        if not (0 <= i < len(names) and 0 <= j < len(names)):
            raise ResultFileError(f"pair {d['pair']!r} is outside the {len(names)} site mics",
                                  file=file, field=f"{where}.pair")
        return i, j
    raise ResultFileError("a delay entry needs 'mics': [a, b]", file=file, field=where)


def pair_used(entry, a, b, d=None):
    """Did the fix use the pair of mics named ``a``, ``b``?

    The delay entry's own ``used`` flag if it has one; else both mics in the fix's
    ``used_mics``; else neither of them rejected or without signal.
    """
    if d is not None and d.get("used") is not None:
        return bool(d["used"])
    if entry.get("used_mics") is not None:
        return a in entry["used_mics"] and b in entry["used_mics"]
    out = set(entry.get("rejected", ())) | set(entry.get("dead", ()))
    return a not in out and b not in out


def used_pairs(entry, names, fix_no, file):
    """``[(i, j, delay_s)]`` of the pairs a fix used (see :func:`pair_used`)."""
    out = []
    for k, d in enumerate(entry["delays"]):
        i, j = pair_of(d, names, f"fixes[{fix_no}].delays[{k}]", file)
        if d.get("delay_s") is not None and pair_used(entry, names[i], names[j], d):
            out.append((i, j, float(d["delay_s"])))
    return out


def delay_misfit_field(mics_m, i, j, delay_s, z_m, xs, ys, sound_speed_mps, wind_mps=None):
    """Predicted minus measured delay of pair (i, j) over a grid at height ``z_m``.

    Parameters
    ----------
    mics_m : ndarray, shape (N, 3)
    i, j : int
        The pair; the delay is t_j - t_i.
    delay_s : float
        Measured delay.
    xs, ys : ndarray, shapes (X,), (Y,)
        Grid lines, metres.
    sound_speed_mps : float
    wind_mps : ndarray, shape (3,), optional

    Returns
    -------
    ndarray, shape (Y, X)
        Seconds; its zero contour is the pair's TDOA hyperbola (with wind, the locus of equal
        predicted delay from :func:`locate.physics.air.travel_time_s`).
    """
    gx, gy = np.meshgrid(xs, ys)
    grid = np.stack([gx, gy, np.full_like(gx, z_m)], axis=-1)
    return (travel_time_s(grid, mics_m[j], sound_speed_mps, wind_mps)
            - travel_time_s(grid, mics_m[i], sound_speed_mps, wind_mps) - delay_s)


def wind_of(result, wind_mps=None):
    """Wind the result was computed with: ``wind_mps``, else ``air`` speed/direction, else the
    caller's ``wind_mps``; None for still air."""
    if result.get("wind_mps") is not None:
        return np.asarray(result["wind_mps"], dtype=float)
    air = result.get("air") or {}
    if air.get("wind_speed_mps") is not None:
        if not float(air["wind_speed_mps"]):
            return None
        return wind_vector_mps(float(air["wind_speed_mps"]), float(air.get("wind_from_deg") or 0))
    return None if wind_mps is None else np.asarray(wind_mps, dtype=float)


def mics_of(result, *, file=None):
    """``(names, positions (N, 3))`` from a result's top-level ``mics`` list."""
    raw = result.get("mics")
    if not isinstance(raw, list) or not raw:
        raise ResultFileError("the result lists no mics: give the site file", file=file,
                              field="mics")
    names = [str(m.get("name")) for m in raw]
    pos = np.array([vec3(m.get("position_m"), f"mics[{k}].position_m", file)
                    for k, m in enumerate(raw)])
    return names, pos
