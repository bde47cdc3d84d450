"""WGS84 <-> local east-north-up (ENU) metres, and GeoJSON features.

Pure functions.  Local coordinates follow the package convention: ``(..., 3)`` arrays in metres,
x east, y north, z up, measured from an origin given as ``(lat0_deg, lon0_deg, alt0_m)`` on the
WGS84 ellipsoid (ellipsoidal height, not height above sea level).

Sources
-------
* Geodetic -> Earth-centred Earth-fixed (ECEF) cartesian coordinates: pyproj (PROJ) transform
  from EPSG:4979 (WGS 84 geographic 3-D: latitude, longitude, ellipsoidal height) to
  EPSG:4978 (WGS 84 geocentric X, Y, Z).  WGS84 ellipsoid a = 6 378 137 m,
  1/f = 298.257223563 (NIMA TR8350.2).
* ECEF -> ENU: the standard rotation of the geocentric frame onto the local tangent plane at the
  origin's geodetic latitude phi and longitude lambda (e.g. Hofmann-Wellenhof, Lichtenegger &
  Wasle, *GNSS*, 2008, sec. 10.2.2).
* GeoJSON: RFC 7946 (positions are [longitude, latitude(, altitude)]; polygon exterior rings are
  closed and counter-clockwise, sec. 3.1.6).
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np

from locate.errors import OptionError

__all__ = [
    "enu_from_wgs84",
    "wgs84_from_enu",
    "ecef_from_wgs84",
    "wgs84_from_ecef",
    "enu_rotation",
    "lonlat_to_local",
    "require_origin",
    "point_feature",
    "enu_point_feature",
    "linestring_feature",
    "ellipse_polygon_feature",
    "feature_collection",
]

GEODETIC_CRS = "EPSG:4979"  # WGS 84 geographic 3-D (lat, lon, ellipsoidal height)
GEOCENTRIC_CRS = "EPSG:4978"  # WGS 84 geocentric (ECEF X, Y, Z)


@lru_cache(maxsize=1)
def _transformer():
    import pyproj

    # always_xy: the axis order is (lon, lat, h) whatever the CRS definition says.
    return pyproj.Transformer.from_crs(GEODETIC_CRS, GEOCENTRIC_CRS, always_xy=True)


def _origin(origin):
    if origin is None:
        raise OptionError("no WGS84 origin: this needs a site with coordinates = \"wgs84\"")
    o = tuple(float(v) for v in origin)
    if len(o) == 2:
        o = (o[0], o[1], 0.0)
    if len(o) != 3 or not all(np.isfinite(o)):
        raise ValueError(f"origin must be (lat_deg, lon_deg, alt_m), got {origin!r}")
    return o


def ecef_from_wgs84(lat_deg, lon_deg, alt_m):
    """Geodetic WGS84 -> ECEF, shape ``(..., 3)`` metres (EPSG:4979 -> EPSG:4978 via pyproj)."""
    lat, lon, alt = np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in
                                          (lat_deg, lon_deg, alt_m)))
    x, y, z = _transformer().transform(lon, lat, alt)
    return np.stack([np.asarray(x, float), np.asarray(y, float), np.asarray(z, float)], axis=-1)


def wgs84_from_ecef(ecef_m):
    """ECEF ``(..., 3)`` metres -> ``(lat_deg, lon_deg, alt_m)`` arrays (EPSG:4978 -> EPSG:4979)."""
    e = np.asarray(ecef_m, dtype=float)
    lon, lat, alt = _transformer().transform(e[..., 0], e[..., 1], e[..., 2], direction="INVERSE")
    return np.asarray(lat, float), np.asarray(lon, float), np.asarray(alt, float)


def enu_rotation(lat0_deg, lon0_deg):
    """Rotation matrix ``(3, 3)`` taking ECEF difference vectors to local (east, north, up).

    Rows are the east, north and up unit vectors expressed in ECEF (geodetic normal at the
    origin): e = (-sin l, cos l, 0), n = (-sin p cos l, -sin p sin l, cos p),
    u = (cos p cos l, cos p sin l, sin p), with p = latitude and l = longitude.
    """
    p, lam = np.deg2rad(float(lat0_deg)), np.deg2rad(float(lon0_deg))
    sp, cp, sl, cl = np.sin(p), np.cos(p), np.sin(lam), np.cos(lam)
    return np.array([[-sl, cl, 0.0],
                     [-sp * cl, -sp * sl, cp],
                     [cp * cl, cp * sl, sp]])


def enu_from_wgs84(lat_deg, lon_deg, alt_m, origin):
    """WGS84 geodetic coordinates -> local east-north-up metres.

    Exact: geodetic -> ECEF by pyproj (EPSG:4979 -> EPSG:4978), then the ECEF -> ENU rotation
    at the origin.  No small-area approximation.

    Parameters
    ----------
    lat_deg, lon_deg, alt_m : array_like
        Latitude and longitude in degrees, ellipsoidal height in metres; they broadcast.
    origin : tuple of float
        ``(lat0_deg, lon0_deg, alt0_m)``, the point that becomes (0, 0, 0).

    Returns
    -------
    ndarray, shape (..., 3)
        (east, north, up) metres.
    """
    lat0, lon0, alt0 = _origin(origin)
    ecef = ecef_from_wgs84(lat_deg, lon_deg, alt_m)
    ecef0 = ecef_from_wgs84(lat0, lon0, alt0)
    return (ecef - ecef0) @ enu_rotation(lat0, lon0).T


def wgs84_from_enu(enu_m, origin):
    """Local east-north-up metres ``(..., 3)`` -> WGS84 ``(lat_deg, lon_deg, alt_m)``.

    Inverse of :func:`enu_from_wgs84` (ENU -> ECEF by the transposed rotation, then pyproj
    EPSG:4978 -> EPSG:4979).  Each returned array has the shape ``enu_m.shape[:-1]``.
    """
    lat0, lon0, alt0 = _origin(origin)
    enu = np.asarray(enu_m, dtype=float)
    if enu.shape[-1:] != (3,):
        raise ValueError(f"enu_m must have shape (..., 3), got {enu.shape!r}")
    ecef = enu @ enu_rotation(lat0, lon0) + ecef_from_wgs84(lat0, lon0, alt0)
    return wgs84_from_ecef(ecef)


def lonlat_to_local(lon_deg, lat_deg, origin):
    """GeoJSON-order ``(lon, lat)`` arrays -> local ``(x_m, y_m)`` arrays.

    Points are taken at the origin's ellipsoidal height (outlines drawn on a map); the result
    is the east and north parts of :func:`enu_from_wgs84`.
    """
    lat0, lon0, alt0 = _origin(origin)
    enu = enu_from_wgs84(lat_deg, lon_deg, alt0, (lat0, lon0, alt0))
    return enu[..., 0], enu[..., 1]


# --------------------------------------------------------------------------- GeoJSON (RFC 7946)

def require_origin(origin, *, file=None, what="GeoJSON"):
    """Return ``origin`` or raise :class:`~locate.errors.OptionError` if the site is local.

    A site in local metres has no place on the Earth, so nothing georeferenced can be written.
    """
    if origin is None:
        raise OptionError(f"{what} needs positions on the Earth, but this site uses local "
                          "coordinates: give the mics as lat/lon/alt with coordinates = "
                          "\"wgs84\" in the site file", file=file, field="coordinates")
    return _origin(origin)


def _position(lat, lon, alt=None):
    pos = [float(lon), float(lat)]  # RFC 7946 sec. 3.1.1: longitude first
    if alt is not None:
        pos.append(float(alt))
    return pos


def _feature(geometry, props):
    return {"type": "Feature", "geometry": geometry, "properties": dict(props or {})}


def point_feature(lat_deg, lon_deg, props=None, *, alt_m=None):
    """GeoJSON Point feature (dict) at a WGS84 position."""
    return _feature({"type": "Point", "coordinates": _position(lat_deg, lon_deg, alt_m)}, props)


def enu_point_feature(position_m, origin, props=None):
    """GeoJSON Point feature for a local position ``(3,)`` (converted with ``origin``)."""
    lat, lon, alt = wgs84_from_enu(np.asarray(position_m, float), require_origin(origin))
    return point_feature(lat, lon, props, alt_m=alt)


def linestring_feature(points_m, origin, props=None):
    """GeoJSON LineString feature through local positions ``(K, 3)`` or ``(K, 2)`` (z = 0)."""
    pts = np.asarray(points_m, dtype=float)
    if pts.ndim != 2 or pts.shape[0] < 2 or pts.shape[1] not in (2, 3):
        raise ValueError(f"points_m must have shape (K>=2, 2|3), got {pts.shape!r}")
    if pts.shape[1] == 2:
        pts = np.column_stack([pts, np.zeros(len(pts))])
    lat, lon, alt = wgs84_from_enu(pts, require_origin(origin))
    coords = [_position(a, b, c) for a, b, c in zip(lat, lon, alt, strict=True)]
    return _feature({"type": "LineString", "coordinates": coords}, props)


def ellipse_polygon_feature(center_enu, covariance_2x2, probability, origin, props=None, n=72):
    """GeoJSON Polygon feature: the horizontal confidence ellipse of a 2-D Gaussian.

    Parameters
    ----------
    center_enu : array_like, shape (2,) or (3,)
        Centre in local metres (z, if given, sets the altitude of the ring; default 0).
    covariance_2x2 : array_like, shape (2, 2)
        Covariance of (east, north), m^2.
    probability : float
        Probability content, 0 < p < 1.  The scale is the chi-square quantile with 2 degrees of
        freedom, which in closed form is k^2 = -2 ln(1 - p) (5.991 for p = 0.95).
    origin : tuple of float
        WGS84 ``(lat0, lon0, alt0)`` of the local frame.
    props : dict, optional
        Feature properties.
    n : int
        Number of distinct vertices (the ring has ``n + 1`` positions, first = last).

    Returns
    -------
    dict
        RFC 7946 Feature with a counter-clockwise, closed exterior ring in [lon, lat, alt] order.
    """
    org = require_origin(origin)
    if not 0.0 < float(probability) < 1.0:
        raise ValueError(f"probability must be in (0, 1), got {probability!r}")
    if int(n) < 8:
        raise ValueError(f"n must be at least 8, got {n!r}")
    cov = np.asarray(covariance_2x2, dtype=float)
    if cov.shape != (2, 2) or not np.all(np.isfinite(cov)):
        raise ValueError(f"covariance_2x2 must be a finite (2, 2) array, got {cov!r}")
    c = np.asarray(center_enu, dtype=float)
    z = float(c[2]) if c.shape == (3,) else 0.0
    evals, evecs = np.linalg.eigh(0.5 * (cov + cov.T))
    evals = np.clip(evals, 0.0, None)
    k = np.sqrt(-2.0 * np.log1p(-float(probability)))  # chi-square 2 dof quantile, closed form
    theta = np.linspace(0.0, 2.0 * np.pi, int(n), endpoint=False)
    unit = np.stack([np.cos(theta), np.sin(theta)], axis=-1)  # counter-clockwise in (e, n)
    xy = c[:2] + k * (unit * np.sqrt(evals)) @ evecs.T
    if np.linalg.det(evecs) < 0:  # a reflection would reverse the winding
        xy = xy[::-1]
    ring_m = np.column_stack([xy, np.full(len(xy), z)])
    lat, lon, alt = wgs84_from_enu(ring_m, org)
    coords = [_position(a, b, h) for a, b, h in zip(lat, lon, alt, strict=True)]
    coords.append(list(coords[0]))
    return _feature({"type": "Polygon", "coordinates": [coords]}, props)


def feature_collection(features):
    """GeoJSON FeatureCollection (dict) of the given features."""
    return {"type": "FeatureCollection", "features": list(features)}
