"""Tests for locate.geometry.frames: WGS84 <-> ENU (pyproj, EPSG:4979 -> EPSG:4978) and GeoJSON."""

import numpy as np
import pyproj
import pytest

from locate.errors import OptionError, TdoaError
from locate.geometry import frames as geo

MM = 1e-3
A_WGS84_M = 6378137.0  # WGS84 semi-major axis, NIMA TR8350.2 Table 3.1
INV_F_WGS84 = 298.257223563  # WGS84 inverse flattening, NIMA TR8350.2 Table 3.1
B_WGS84_M = 6356752.3142  # WGS84 semi-minor axis, NIMA TR8350.2 Table 3.3 (derived constant)

ORIGIN = (52.37, 4.89, 12.0)  # an invented site


def _ecef_closed_form(lat_deg, lon_deg, h_m):
    """Geodetic -> ECEF from the WGS84 constants alone (textbook: N = a / sqrt(1 - e^2 sin^2 p))."""
    f = 1.0 / INV_F_WGS84
    e2 = f * (2.0 - f)
    p, lam = np.deg2rad(lat_deg), np.deg2rad(lon_deg)
    n = A_WGS84_M / np.sqrt(1.0 - e2 * np.sin(p) ** 2)
    return np.stack([(n + h_m) * np.cos(p) * np.cos(lam),
                     (n + h_m) * np.cos(p) * np.sin(lam),
                     (n * (1.0 - e2) + h_m) * np.sin(p)], axis=-1)


def test_ecef_of_equator_and_pole_match_wgs84_axes():
    # (0, 0, 0) lies on the equator at the semi-major axis; the pole at the semi-minor axis
    # (NIMA TR8350.2); pyproj EPSG:4979 -> EPSG:4978 is the route under test.
    np.testing.assert_allclose(geo.ecef_from_wgs84(0.0, 0.0, 0.0), [A_WGS84_M, 0, 0], atol=MM)
    np.testing.assert_allclose(geo.ecef_from_wgs84(90.0, 0.0, 0.0), [0, 0, B_WGS84_M], atol=MM)


def test_ecef_matches_closed_form_from_wgs84_constants():
    rng = np.random.default_rng(1)
    lat = rng.uniform(-89, 89, 50)
    lon = rng.uniform(-180, 180, 50)
    h = rng.uniform(-100, 3000, 50)
    # reference: closed-form ellipsoid formula with a = 6378137 m, 1/f = 298.257223563
    np.testing.assert_allclose(geo.ecef_from_wgs84(lat, lon, h), _ecef_closed_form(lat, lon, h),
                               rtol=0, atol=MM)


def test_enu_matches_proj_topocentric_pipeline():
    # reference: PROJ's own geocentric -> topocentric conversion (pyproj pipeline,
    # +proj=cart then +proj=topocentric on the WGS84 ellipsoid), an independent route to ENU
    lat0, lon0, h0 = ORIGIN
    pipe = pyproj.Transformer.from_pipeline(
        f"+proj=pipeline +step +proj=cart +ellps=WGS84 +step +proj=topocentric +ellps=WGS84 "
        f"+lat_0={lat0} +lon_0={lon0} +h_0={h0}")
    rng = np.random.default_rng(2)
    lat = lat0 + rng.uniform(-0.05, 0.05, 40)
    lon = lon0 + rng.uniform(-0.05, 0.05, 40)
    h = h0 + rng.uniform(-30, 30, 40)
    ref = np.stack(pipe.transform(lon, lat, h), axis=-1)
    np.testing.assert_allclose(geo.enu_from_wgs84(lat, lon, h, ORIGIN), ref, rtol=0, atol=MM)


def test_enu_horizontal_matches_azimuthal_equidistant_within_mm_over_1km():
    # reference: pyproj "+proj=aeqd" centred at the origin; within 1 km the tangent-plane
    # east/north and the azimuthal-equidistant map differ by ~d^3/(6 R^2) = 4 um (textbook)
    lat0, lon0, h0 = ORIGIN[0], ORIGIN[1], 0.0  # on the ellipsoid, where aeqd distances hold
    origin = (lat0, lon0, h0)
    aeqd = pyproj.Transformer.from_crs(
        "EPSG:4326", f"+proj=aeqd +lat_0={lat0} +lon_0={lon0} +ellps=WGS84 +units=m",
        always_xy=True)
    bearing = np.deg2rad(np.arange(0, 360, 30))
    dist_m = 1000.0
    geod = pyproj.Geod(ellps="WGS84")
    lon, lat, _ = geod.fwd(np.full(bearing.size, lon0), np.full(bearing.size, lat0),
                           np.rad2deg(bearing), np.full(bearing.size, dist_m))
    # points on the ellipsoid 1 km away sit ~d^2/(2R) = 7.8 cm below the tangent plane
    enu = geo.enu_from_wgs84(lat, lon, h0, origin)
    x_ref, y_ref = aeqd.transform(lon, lat)
    np.testing.assert_allclose(enu[:, 0], x_ref, rtol=0, atol=MM)
    np.testing.assert_allclose(enu[:, 1], y_ref, rtol=0, atol=MM)
    # drop of the ellipsoid below the tangent plane, d^2 / (2 R) with R ~ 6.38e6 m (textbook)
    np.testing.assert_allclose(enu[:, 2], -dist_m**2 / (2 * 6.38e6), rtol=0, atol=5 * MM)


def test_round_trip_is_below_a_millimetre():
    rng = np.random.default_rng(3)
    enu = rng.uniform(-2000, 2000, (100, 3))
    lat, lon, alt = geo.wgs84_from_enu(enu, ORIGIN)
    back = geo.enu_from_wgs84(lat, lon, alt, ORIGIN)
    assert np.max(np.linalg.norm(back - enu, axis=-1)) < MM


def test_origin_maps_to_zero_and_shapes_broadcast():
    assert np.allclose(geo.enu_from_wgs84(*ORIGIN, ORIGIN), 0.0, atol=MM)
    out = geo.enu_from_wgs84(np.full((4, 5), ORIGIN[0]), ORIGIN[1], ORIGIN[2], ORIGIN)
    assert out.shape == (4, 5, 3)
    lat, lon, alt = geo.wgs84_from_enu(np.zeros((4, 5, 3)), ORIGIN)
    assert lat.shape == lon.shape == alt.shape == (4, 5)


def test_north_offset_matches_geodesic_length_on_the_ellipsoid():
    # reference: pyproj.Geod.inv (geodesic on the WGS84 ellipsoid, Karney 2013); the origin is
    # put on the ellipsoid (h = 0) so that the geodesic and the ENU north axis agree to the
    # chord/arc difference d^3 / (24 R^2) < 1 um over 1.1 km (textbook)
    origin = (ORIGIN[0], ORIGIN[1], 0.0)
    enu = geo.enu_from_wgs84(origin[0] + 0.01, origin[1], 0.0, origin)
    _, _, d = pyproj.Geod(ellps="WGS84").inv(origin[1], origin[0], origin[1], origin[0] + 0.01)
    assert abs(enu[0]) < MM
    assert np.hypot(enu[1], enu[2]) == pytest.approx(d, abs=MM)
    # one degree of latitude near 52.4 deg N is about 111.27 km (from memory)
    assert d * 100 == pytest.approx(111.27e3, abs=20.0)


def test_lonlat_to_local_takes_geojson_order():
    # RFC 7946 order (lon, lat); same east/north as enu_from_wgs84 at the origin's height
    lon = np.array([ORIGIN[1] + 0.001, ORIGIN[1]])
    lat = np.array([ORIGIN[0], ORIGIN[0] + 0.001])
    x, y = geo.lonlat_to_local(lon, lat, ORIGIN)
    ref = geo.enu_from_wgs84(lat, lon, ORIGIN[2], ORIGIN)
    np.testing.assert_allclose(np.stack([x, y], -1), ref[:, :2], atol=MM)
    assert x[0] > 60 and abs(y[0]) < 0.01 and y[1] > 100  # 0.001 deg: ~68 m east, ~111 m north


def test_point_feature_is_lon_lat_order():
    f = geo.point_feature(52.1, 4.3, {"name": "M1"})
    # RFC 7946 sec. 3.1.1: positions are [longitude, latitude]
    assert f == {"type": "Feature", "geometry": {"type": "Point", "coordinates": [4.3, 52.1]},
                 "properties": {"name": "M1"}}


def _signed_area(ring):
    x, y = np.asarray(ring)[:, 0], np.asarray(ring)[:, 1]
    return 0.5 * np.sum(x[:-1] * y[1:] - x[1:] * y[:-1])  # shoelace formula (textbook)


@pytest.mark.parametrize("cov", [[[4.0, 1.5], [1.5, 1.0]], [[1.0, -0.8], [-0.8, 2.0]],
                                 [[9.0, 0.0], [0.0, 1.0]]])
def test_ellipse_ring_is_closed_counter_clockwise_with_chi2_scale(cov):
    from scipy.stats import chi2

    f = geo.ellipse_polygon_feature([10.0, -5.0, 0.0], cov, 0.95, ORIGIN, {"p": 0.95}, n=72)
    ring = f["geometry"]["coordinates"][0]
    assert f["geometry"]["type"] == "Polygon" and len(ring) == 73 and ring[0] == ring[-1]
    assert _signed_area(ring) > 0  # RFC 7946 sec. 3.1.6: exterior ring counter-clockwise
    lat, lon, alt = (np.array([p[1] for p in ring]), np.array([p[0] for p in ring]),
                     np.array([p[2] for p in ring]))
    enu = geo.enu_from_wgs84(lat, lon, alt, ORIGIN)[:, :2] - [10.0, -5.0]
    # every vertex lies on the Mahalanobis contour d^2 = chi2.ppf(0.95, 2) (scipy.stats.chi2)
    d2 = np.einsum("ki,ij,kj->k", enu, np.linalg.inv(cov), enu)
    np.testing.assert_allclose(d2, chi2.ppf(0.95, 2), rtol=1e-6)
    # area pi * k^2 * sqrt(det C) for the 72-gon within 0.2 % (textbook ellipse area)
    area = _signed_area(np.vstack([enu, enu[:1]]))
    assert area == pytest.approx(np.pi * chi2.ppf(0.95, 2) * np.sqrt(np.linalg.det(cov)),
                                 rel=2e-3)


def test_linestring_and_collection():
    f = geo.linestring_feature([[0, 0], [100, 0], [100, 100]], ORIGIN, {"kind": "track"})
    coords = f["geometry"]["coordinates"]
    assert f["geometry"]["type"] == "LineString" and len(coords) == 3
    # 100 m east at 52.37 N is 0.001472 deg of longitude: 100 / (N cos p) with N from WGS84
    n_m = A_WGS84_M / np.sqrt(1 - (1 / INV_F_WGS84) * (2 - 1 / INV_F_WGS84)
                              * np.sin(np.deg2rad(ORIGIN[0])) ** 2)
    dlon = np.rad2deg(100.0 / (n_m * np.cos(np.deg2rad(ORIGIN[0]))))
    assert coords[1][0] - coords[0][0] == pytest.approx(dlon, rel=1e-5)
    fc = geo.feature_collection([f])
    assert fc["type"] == "FeatureCollection" and fc["features"] == [f]


def test_geojson_for_local_site_raises_option_error_naming_coordinates():
    with pytest.raises(OptionError, match="wgs84") as info:
        geo.require_origin(None, file="site.toml")
    assert isinstance(info.value, TdoaError)
    assert info.value.field == "coordinates" and "site.toml" in str(info.value)
    with pytest.raises(OptionError, match="wgs84"):
        geo.ellipse_polygon_feature([0, 0], np.eye(2), 0.95, None)
    with pytest.raises(OptionError, match="wgs84"):
        geo.enu_point_feature([0, 0, 0], None)
