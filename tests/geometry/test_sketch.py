"""Site sketch: georeferencing by control points, outlines, GeoJSON, image reading."""

from __future__ import annotations

import json
from types import SimpleNamespace

import numpy as np
import pytest

from locate.errors import SiteFileError
from locate.io.sketch import (
    Georef,
    geojson_features,
    label_point,
    load_sketch,
    read_geojson,
    read_image,
    shape_outlines,
)

MM = 1e-3  # metre
PX = 1.0  # pixel


def truth_transform(scale_m_per_px, rotation_deg, offset_m, shear=0.0):
    """Exact pixel (col, row) -> map (x, y) built by hand: row flip, shear, rotation, scale."""
    t = np.radians(rotation_deg)
    rot = np.array([[np.cos(t), -np.sin(t)], [np.sin(t), np.cos(t)]])
    flip = np.diag([1.0, -1.0])  # rows grow downward, y grows north (image convention)
    sh = np.array([[1.0, shear], [0.0, 1.0]])
    m = scale_m_per_px * rot @ sh @ flip
    return lambda px: np.asarray(px, float) @ m.T + np.asarray(offset_m, float)


def test_two_points_give_the_exact_similarity_with_the_row_flip():
    # Reference: the transform constructed by hand above (textbook similarity).
    true = truth_transform(0.05, 17.0, [12.0, -3.0])
    px = np.array([[102.0, 880.0], [950.0, 870.0]])
    g = Georef.from_control_points(px, true(px))
    assert g.kind == "similarity"
    probe = np.array([[0.0, 0.0], [640.0, 480.0], [1200.0, -50.0]])
    np.testing.assert_allclose(g.to_map(probe), true(probe), atol=0.01 * MM)
    np.testing.assert_allclose(g.to_pixels(g.to_map(px)), px, atol=0.1 * PX)
    assert g.residual_rms_px == 0.0


def test_going_down_the_image_is_going_south_for_a_north_up_plan():
    # 0.1 m per pixel, pixel (0, 0) at (0, 10) m: pixel (0, 100) is 10 m further south.
    g = Georef.from_control_points([[0, 0], [100, 0]], [[0.0, 10.0], [10.0, 10.0]])
    np.testing.assert_allclose(g.to_map([0, 100]), [0.0, 0.0], atol=0.01 * MM)
    np.testing.assert_allclose(g.metres_per_pixel, 0.1, atol=1e-6 * MM)
    assert g.axis_aligned
    # imshow(origin="upper") extent: outer edges of the edge pixels (centres at integers)
    left, right, bottom, top = g.extent_m(200, 100)
    assert (left, right, bottom, top) == pytest.approx((-0.05, 19.95, 0.05, 10.05), abs=1e-9)


def test_affine_from_exact_points_round_trips_within_a_tenth_of_a_pixel():
    true = truth_transform(0.08, -32.0, [250.0, 40.0], shear=0.04)
    px = np.array([[30.0, 40.0], [1800.0, 95.0], [1700.0, 1300.0], [60.0, 1250.0],
                   [900.0, 700.0]])
    g = Georef.from_control_points(px, true(px), image_size_px=(1920, 1400))
    assert g.kind == "affine" and g.n_points == 5
    np.testing.assert_allclose(g.to_pixels(true(px)), px, atol=0.1 * PX)
    assert g.residual_rms_px < 1e-6 * PX
    assert g.warnings == ()
    probe = np.array([[0.0, 0.0], [1919.0, 1399.0]])
    np.testing.assert_allclose(g.to_map(probe), true(probe), atol=0.01 * MM)


def test_affine_residual_is_reported_in_pixels_and_metres():
    true = truth_transform(0.05, 10.0, [0.0, 0.0])
    px = np.array([[0.0, 0.0], [1000.0, 0.0], [1000.0, 800.0], [0.0, 800.0]])
    at = true(px)
    # Move one map point 0.1 m (2 px) east. With 4 points and 6 unknowns, the least-squares
    # misfit of a single moved point is spread as +-d/4 pattern: each point is off by d/4 in
    # the direction (+,-,+,-) for this rectangle layout (hand algebra), so the RMS is d/4.
    at[1, 0] += 0.1
    g = Georef.from_control_points(px, at, image_size_px=(1000, 800))
    np.testing.assert_allclose(g.residual_rms_m, 0.1 / 4, atol=0.01 * MM)
    np.testing.assert_allclose(g.residual_rms_px, 2.0 / 4, atol=0.01 * PX)
    # the same number from the public transform
    miss_px = np.linalg.norm(g.to_pixels(at) - px, axis=1)
    np.testing.assert_allclose(g.residual_rms_px, np.sqrt(np.mean(miss_px**2)), atol=1e-3 * PX)
    assert g.warnings == ()  # 0.5 px is within clicking precision


def test_a_large_affine_residual_warns_and_names_the_worst_point():
    true = truth_transform(0.05, 10.0, [0.0, 0.0])
    px = np.array([[0.0, 0.0], [1000.0, 0.0], [1000.0, 800.0], [0.0, 800.0], [500.0, 400.0]])
    at = true(px)
    at[4] += [1.5, -1.0]  # a mis-typed control point, ~36 px off
    g = Georef.from_control_points(px, at, image_size_px=(1000, 800))
    assert g.residual_rms_px > 2.0
    assert len(g.warnings) == 1
    assert "sketch.refs" in g.warnings[0] and "point 5" in g.warnings[0]


@pytest.mark.parametrize("pixels, at", [
    ([[10, 10]], [[0, 0]]),
    ([], []),
])
def test_fewer_than_two_control_points_is_an_error_naming_the_field(pixels, at):
    with pytest.raises(SiteFileError) as err:
        Georef.from_control_points(np.reshape(pixels, (-1, 2)), np.reshape(at, (-1, 2)),
                                   file="site.toml")
    assert err.value.field == "sketch.refs" and err.value.file == "site.toml"
    assert "at least 2" in str(err.value)


def test_collinear_control_points_are_refused_for_an_affine_fit():
    px = [[0, 0], [100, 100], [200, 200.5]]
    with pytest.raises(SiteFileError, match="one line") as err:
        Georef.from_control_points(px, [[0, 0], [5, 5], [10, 10]], file="site.toml")
    assert err.value.field == "sketch.refs"


def test_coincident_control_points_are_refused():
    with pytest.raises(SiteFileError, match="same pixel position"):
        Georef.from_control_points([[5, 5], [5, 5]], [[0, 0], [1, 1]])
    with pytest.raises(SiteFileError, match="same map position"):
        Georef.from_control_points([[5, 5], [50, 5]], [[1, 1], [1, 1]])


def test_control_points_must_be_pairs_of_numbers():
    with pytest.raises(SiteFileError, match=r"\[x, y\] pairs"):
        Georef.from_control_points([[1, 2, 3], [4, 5, 6]], [[0, 0], [1, 1]])
    with pytest.raises(SiteFileError, match="2 pixel positions but 3"):
        Georef.from_control_points([[1, 2], [4, 5]], [[0, 0], [1, 1], [2, 2]])


def test_label_point_of_a_triangle_is_its_vertex_mean():
    # Textbook: the area centroid of a triangle is the mean of its vertices.
    tri = [[0.0, 0.0], [9.0, 0.0], [3.0, 6.0]]
    np.testing.assert_allclose(label_point(tri), [4.0, 2.0], atol=1e-9)
    # an L-shape: union of a 4x1 and a 1x3 rectangle (areas 4 and 2, centroids (2, .5), (.5, 2))
    ell = [[0, 0], [4, 0], [4, 1], [1, 1], [1, 3], [0, 3]]
    np.testing.assert_allclose(label_point(ell), [(4 * 2 + 2 * 0.5) / 6, (4 * 0.5 + 2 * 2) / 6],
                               atol=1e-9)


def test_shape_outlines_are_checked_and_marked_closed():
    out = shape_outlines([{"label": "store", "outline": [[0, 0], [5, 0], [5, 4]]},
                          {"label": "fence", "outline": [[0, 0], [9, 9]]}])
    assert [o["closed"] for o in out] == [True, False]
    with pytest.raises(SiteFileError) as err:
        shape_outlines([{"label": "x", "outline": [[0, 0]]}], file="site.toml")
    assert err.value.field == "sketch.shapes[0].outline"


def test_geojson_in_local_metres_gives_one_outline_per_ring_and_line():
    obj = {"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {"name": "yard"},
         "geometry": {"type": "Polygon", "coordinates": [[[0, 0], [10, 0], [10, 5], [0, 0]]]}},
        {"type": "Feature", "properties": {"label": "track"},
         "geometry": {"type": "MultiLineString", "coordinates": [[[0, 0], [1, 1]],
                                                                  [[2, 2], [3, 3]]]}},
        {"type": "Feature", "properties": {}, "geometry": {"type": "Point",
                                                             "coordinates": [4.0, 5.0, 2.0]}},
    ]}
    feats = geojson_features(obj)
    assert [(f["kind"], f["label"]) for f in feats] == [
        ("polygon", "yard"), ("line", "track"), ("line", "track"), ("point", "")]
    np.testing.assert_allclose(feats[3]["outline_m"], [[4.0, 5.0]])


def test_geojson_on_a_wgs84_site_goes_through_the_geo_conversion():
    pyproj = pytest.importorskip("pyproj")
    from locate.geometry import frames as geo

    origin = (52.0, 4.5, 0.0)
    to_local = lambda lon, lat: geo.lonlat_to_local(lon, lat, origin)  # noqa: E731
    obj = {"type": "LineString", "coordinates": [[4.5, 52.0], [4.5, 52.001]]}
    (line,) = geojson_features(obj, to_local=to_local)
    # Reference: pyproj.Geod WGS84 inverse distance for 0.001 deg of latitude (about 111 m).
    _, _, dist = pyproj.Geod(ellps="WGS84").inv(4.5, 52.0, 4.5, 52.001)
    np.testing.assert_allclose(line["outline_m"][0], [0.0, 0.0], atol=1 * MM)
    np.testing.assert_allclose(line["outline_m"][1, 0], 0.0, atol=1 * MM)
    np.testing.assert_allclose(line["outline_m"][1, 1], dist, atol=5 * MM)


def test_bad_geojson_is_a_clear_error(tmp_path):
    p = tmp_path / "feat.geojson"
    p.write_text("{ not json", encoding="utf-8")
    with pytest.raises(SiteFileError, match="cannot read GeoJSON"):
        read_geojson(p, file="site.toml")
    with pytest.raises(SiteFileError, match="does not exist") as err:
        read_geojson(tmp_path / "missing.geojson", file="site.toml")
    assert err.value.field == "sketch.geojson"
    p.write_text(json.dumps({"type": "Polygon", "coordinates": [[["a", 1]]]}), encoding="utf-8")
    with pytest.raises(SiteFileError, match="malformed Polygon"):
        read_geojson(p)


def _write_png(path, h=60, w=80):
    import matplotlib.image as mpimg

    img = np.zeros((h, w, 3))
    img[:, :, 1] = np.linspace(0, 1, w)[None, :]
    mpimg.imsave(path, img)


def test_read_image_reports_missing_and_unreadable_files(tmp_path):
    with pytest.raises(SiteFileError, match="does not exist") as err:
        read_image(tmp_path / "plan.png", file="site.toml")
    assert err.value.field == "sketch.image" and err.value.file == "site.toml"
    bad = tmp_path / "bad.png"
    bad.write_bytes(b"this is not an image")
    with pytest.raises(SiteFileError, match="cannot read site image"):
        read_image(bad, file="site.toml")
    good = tmp_path / "good.png"
    _write_png(good)
    assert read_image(good).shape[:2] == (60, 80)


def test_load_sketch_places_the_image_and_collects_outlines(tmp_path):
    png = tmp_path / "plan.png"
    _write_png(png)
    sk = SimpleNamespace(image=png, refs=((np.array([0.0, 0.0]), np.array([0.0, 6.0])),
                                          (np.array([80.0, 0.0]), np.array([8.0, 6.0]))),
                         shapes=({"label": "shed", "outline": np.array([[1, 1], [3, 1], [3, 2]])},),
                         geojson=None)
    out = load_sketch(sk, file=tmp_path / "site.toml")
    assert out.image.shape[:2] == (60, 80)
    np.testing.assert_allclose(out.georef.to_map([0, 60]), [0.0, 0.0], atol=0.01 * MM)
    assert [o["label"] for o in out.outlines] == ["shed"]
    no_refs = SimpleNamespace(image=png, refs=(), shapes=(), geojson=None)
    with pytest.raises(SiteFileError) as err:
        load_sketch(no_refs, file="site.toml")
    assert err.value.field == "sketch.refs"
