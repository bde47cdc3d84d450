"""GIS output: result dictionaries as RFC 7946 GeoJSON, and positions in both frames.

The solver works in local east-north-up metres (:mod:`locate.geometry.frames`); for sites given in
WGS84 these helpers put the results back on the Earth:

* :func:`add_wgs84_positions` adds ``"position_wgs84": [lat, lon, alt]`` beside every
  ``"position_m"`` of a ``tdoa-result/1`` dictionary (fixes, track points, mics);
* :func:`result_geojson` builds a FeatureCollection of the fixes (points), their confidence
  ellipses (polygons), the track (a line and its points) and the mics (points);
* :func:`check_geojson_output` refuses early, before any computation, a GeoJSON output for a
  site in local metres or into a folder that does not exist;
* :func:`write_geojson` writes the collection atomically
(:func:`locate.results.documents.write_atomic`).

Source: RFC 7946 (The GeoJSON Format, IETF 2016): positions are [longitude, latitude,
altitude], the CRS is WGS84 (sec. 4), polygon exterior rings are closed and counter-clockwise
(sec. 3.1.6).  Ellipses use the chi-square quantile with 2 degrees of freedom
(:func:`locate.geometry.frames.ellipse_polygon_feature`).
"""

from __future__ import annotations

import json

import numpy as np

from locate.errors import OptionError
from locate.geometry import frames as geo
from locate.results.documents import check_output_path, jsonable, write_atomic

__all__ = [
    "position_wgs84",
    "add_wgs84_positions",
    "result_geojson",
    "check_geojson_output",
    "write_geojson",
]


def position_wgs84(position_m, origin) -> list[float]:
    """Local metres ``(3,)`` -> ``[lat_deg, lon_deg, alt_m]`` (WGS84, ellipsoidal height).

    Parameters
    ----------
    position_m : array_like, shape (3,)
    origin : tuple of float
        ``(lat0, lon0, alt0)`` of the local frame (``Site.origin_wgs84``).

    Returns
    -------
    list of float, length 3
        Latitude and longitude rounded to 1e-9 degree (0.1 mm), altitude to 0.1 mm.
    """
    p = np.asarray(position_m, dtype=float).reshape(3)
    lat, lon, alt = geo.wgs84_from_enu(p, geo.require_origin(origin))
    return [round(float(lat), 9), round(float(lon), 9), round(float(alt), 4)]


def add_wgs84_positions(result: dict, origin) -> dict:
    """Add ``"position_wgs84"`` beside each ``"position_m"`` of a result dict (in place).

    Covers ``result["fixes"][k]``, ``result["track"]["points"][k]`` and ``result["mics"][k]``.
    Nothing happens when ``origin`` is None (a site in local metres).

    Returns
    -------
    dict
        The same ``result``.
    """
    if origin is None:
        return result
    items = list(result.get("fixes") or []) + list(result.get("mics") or [])
    track = result.get("track")
    if isinstance(track, dict):
        items += list(track.get("points") or [])
    for item in items:
        pos = item.get("position_m")
        if pos is not None and np.all(np.isfinite(np.asarray(pos, dtype=float))):
            item["position_wgs84"] = position_wgs84(pos, origin)
    return result


def _horizontal_cov(entry):
    cov = entry.get("covariance_m2")
    if cov is None:
        return None
    c = np.asarray(cov, dtype=float)
    if c.shape[-2:] != (3, 3) and c.shape != (2, 2):
        return None
    c = c[:2, :2]
    return c if np.all(np.isfinite(c)) else None


def _fix_props(entry, k, probability):
    props = {"kind": "fix", "index": k, "t_s": entry.get("t_s"),
             "position_m": entry.get("position_m")}
    e = entry.get("ellipse95")
    if e is not None:
        props.update(semi_major95_m=e.get("semi_major_m"), semi_minor95_m=e.get("semi_minor_m"),
                     azimuth95_deg=e.get("azimuth_deg"))
    for key in ("t_utc", "absent_mics", "rejected_mics", "residual_rms_s", "p_value", "dims"):
        if key in entry:
            props[key] = entry[key]
    if "air_fit" in entry:
        props["sound_speed_fit_mps"] = entry["air_fit"].get("sound_speed_mps")
    props["probability"] = probability
    return props


def result_geojson(result: dict, origin, *, probability=0.95, ellipse_vertices=72) -> dict:
    """RFC 7946 FeatureCollection of a ``tdoa-result/1`` dictionary.

    Parameters
    ----------
    result : dict
        A fix or track result (``"fixes"`` and/or ``"track"``, and ``"mics"``).
    origin : tuple of float
        ``(lat0, lon0, alt0)`` of the local frame.
    probability : float
        Content of the ellipse polygons (0.95: the 95 % ellipses of the result).
    ellipse_vertices : int
        Vertices per ellipse ring.

    Returns
    -------
    dict
        Features, in order: for each fix a Point (``properties.kind = "fix"``) and, where its
        covariance is finite, a Polygon (``"ellipse"``); for a track a LineString
        (``"track"``) and one Point per track point (``"track_point"``) with its ellipse; one
        Point per mic (``"mic"``).  Properties carry the local values (``position_m``, times).

    Raises
    ------
    OptionError
        ``origin`` is None (the site is in local metres).
    """
    org = geo.require_origin(origin)
    feats = []
    for k, entry in enumerate(result.get("fixes") or [], 1):
        pos = entry["position_m"]
        props = _fix_props(entry, k, probability)
        feats.append(geo.enu_point_feature(pos, org, props))
        cov = _horizontal_cov(entry)
        if cov is not None:
            feats.append(geo.ellipse_polygon_feature(
                pos, cov, probability, org, {"kind": "ellipse", "index": k,
                                            "t_s": entry.get("t_s"),
                                            **({"t_utc": entry["t_utc"]}
                                               if "t_utc" in entry else {}),
                                            "probability": probability},
                n=ellipse_vertices))
    track = result.get("track")
    if isinstance(track, dict) and track.get("points"):
        pts = [p for p in track["points"] if p.get("used", True)]
        xyz = np.array([p["position_m"] for p in pts], dtype=float)
        if len(xyz) >= 2:
            feats.append(geo.linestring_feature(xyz, org, {
                "kind": "track", "heading_deg": track.get("heading_deg"),
                "heading_sd_deg": track.get("heading_sd_deg"),
                "speed_mps": track.get("speed_mps"), "speed_sd_mps": track.get("speed_sd_mps"),
            }))
        for k, p in enumerate(pts, 1):
            props = {"kind": "track_point", "index": k, "t_emit_s": p.get("t_emit_s"),
                     "t_heard_s": p.get("t_heard_s"), "position_m": p["position_m"]}
            for key in ("t_utc", "t_emit_utc"):
                if key in p:
                    props[key] = p[key]
            feats.append(geo.enu_point_feature(p["position_m"], org, props))
            cov = _horizontal_cov(p)
            if cov is not None:
                feats.append(geo.ellipse_polygon_feature(
                    p["position_m"], cov, probability, org,
                    {"kind": "ellipse", "track_point": k, "probability": probability},
                    n=ellipse_vertices))
    for m in result.get("mics") or []:
        feats.append(geo.enu_point_feature(m["position_m"], org, {
            "kind": "mic", "name": m.get("name"), "position_m": m["position_m"]}))
    return geo.feature_collection(jsonable(feats))


def check_geojson_output(path, site, inputs=(), *, option="--geojson"):
    """Refuse a GeoJSON output that cannot be written, before any computation.

    Raises
    ------
    OptionError
        The site uses local coordinates (no place on the Earth), the folder of ``path`` does not
        exist, or ``path`` is one of the inputs.
    """
    if path is None:
        return None
    if site.origin_wgs84 is None:
        raise OptionError(
            f"{option} needs mic positions on the Earth, but this site uses local metres: give "
            f'the mics as lat/lon/alt with coordinates = "wgs84" (or leave out {option})',
            file=site.path, field="coordinates")
    return check_output_path(path, inputs, option=option)


def write_geojson(path, result: dict, origin, *, probability=0.95):
    """Write :func:`result_geojson` of ``result`` to ``path`` atomically; returns the path."""
    fc = result_geojson(result, origin, probability=probability)
    return write_atomic(path, json.dumps(fc, indent=1, allow_nan=False) + "\n")
