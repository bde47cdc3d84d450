"""Map and diagnostics figures, inspected through matplotlib objects (not pixels)."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from matplotlib.collections import Collection
from matplotlib.image import AxesImage
from matplotlib.patches import Ellipse
from matplotlib.text import Text
from scipy.stats import chi2

from locate.draw.figures import check_result, draw_map, panels_figure, save_figure
from locate.errors import OptionError, ResultFileError
from locate.io.sketch import Georef, SiteSketch
from locate.physics.air import sound_speed_mps, travel_time_s, wind_vector_mps

MM = 1e-3
CM = 1e-2

NAMES = ["M1", "M2", "M3", "M4", "M5"]
MICS = np.array([[0.0, 0.0, 1.2], [60.0, 5.0, 1.2], [55.0, 48.0, 1.5], [-4.0, 42.0, 1.2],
                 [28.0, 70.0, 1.2]])
SOURCE = np.array([31.0, 22.0, 1.0])
C = float(sound_speed_mps(6.0, 80.0))
WIND_SPEED, WIND_FROM = 4.0, 250.0
WIND = wind_vector_mps(WIND_SPEED, WIND_FROM)
COV = np.array([[0.04, 0.015, 0.0], [0.015, 0.02, 0.0], [0.0, 0.0, 0.0]])


def exact_fix_result(rejected=("M5",), cov=COV, curves=False, n_fixes=1):
    """A fix result built by hand from an exact geometry: every delay is the wind-aware travel
    time difference (locate.physics.air.travel_time_s), so each used pair's hyperbola passes through
    SOURCE.  The rejected mic's delays are spoiled by 3 ms (an echo)."""
    t = travel_time_s(SOURCE, MICS, C, WIND)
    delays = []
    for i in range(len(NAMES)):
        for j in range(i + 1, len(NAMES)):
            d = float(t[j] - t[i])
            bad = NAMES[i] in rejected or NAMES[j] in rejected
            entry = {"mics": [NAMES[i], NAMES[j]], "delay_s": d + (3e-3 if bad else 0.0),
                     "sd_s": 2e-5, "quality": "good", "search_s": [-0.2, 0.2]}
            if curves:
                lags = np.arange(-0.2, 0.2, 1 / 48000.0)
                entry["curve"] = {"lags_s": lags.tolist(),
                                  "correlation": np.exp(-0.5 * ((lags - d) / 1e-4) ** 2).tolist()}
            delays.append(entry)
    fix = {"t_s": 3.2, "span_s": [3.2, 3.45], "position_m": SOURCE.tolist(),
           "covariance_m2": np.asarray(cov).tolist(), "rejected_mics": list(rejected),
           "used_mics": [n for n in NAMES if n not in rejected], "delays": delays}
    fixes = [fix] + [dict(fix, t_s=5.0 + k, position_m=(SOURCE + [5.0 * k, -3.0, 0]).tolist())
                     for k in range(1, n_fixes)]
    return {"schema": "tdoa-result/1", "kind": "fix", "title": "Greyfield depot",
            "sound_speed_mps": C,
            "air": {"temperature_c": 6.0, "relative_humidity": 80.0,
                    "wind_speed_mps": WIND_SPEED, "wind_from_deg": WIND_FROM},
            "mics": [{"name": n, "position_m": p.tolist()} for n, p in zip(NAMES, MICS,
                                                                             strict=True)],
            "fixes": fixes}


@pytest.fixture(scope="module")
def fix_map():
    return draw_map(MICS, NAMES, exact_fix_result(), receivers=[("R1", [85.0, 30.0, 0.0])],
                    barriers=[("fence", [[70.0, 0.0], [72.0, 45.0]])])


def axes(fig, label):
    (ax,) = [a for a in fig.axes if a.get_label() == label]
    return ax


def by_gid(ax, prefix):
    arts = list(ax.lines) + list(ax.patches) + list(ax.collections) + list(ax.texts)
    return [a for a in arts if (a.get_gid() or "").startswith(prefix)]


def distance_to_polyline(point, vertices):
    """Shortest distance from a point (2,) to a polyline (K, 2), metres."""
    a, b = vertices[:-1], vertices[1:]
    ab = b - a
    t = np.clip(np.einsum("ij,ij->i", point - a, ab) / np.maximum(np.einsum("ij,ij->i", ab, ab),
                                                                   1e-300), 0.0, 1.0)
    return float(np.min(np.linalg.norm(a + t[:, None] * ab - point, axis=1)))


def test_one_hyperbola_per_used_pair_each_through_the_true_source(fix_map):
    ax = axes(fix_map, "map")
    sets = by_gid(ax, "hyperbola:1:")
    pairs = sorted(s.get_gid().split(":")[2] for s in sets)
    # used pairs: all pairs among M1..M4 (M5 rejected): C(4, 2) = 6
    assert pairs == sorted(["M1-M2", "M1-M3", "M1-M4", "M2-M3", "M2-M4", "M3-M4"])
    for cs in sets:
        assert isinstance(cs, Collection)
        verts = [p.vertices for p in cs.get_paths() if len(p.vertices) > 1]
        # Reference: the delays were made with locate.physics.air.travel_time_s at the true
        # source, so
        # the zero contour of predicted - measured must pass through it (grid ~0.3 m apart,
        # linear interpolation along cell edges: well within 1 cm; ignoring the 4 m/s wind
        # would put them 10-45 cm off).
        d = min(distance_to_polyline(SOURCE[:2], v) for v in verts)
        assert d < 1 * CM, (cs.get_gid(), d)


def test_two_ellipses_per_fix_sized_by_the_chi_square_quantile(fix_map):
    ax = axes(fix_map, "map")
    lam = np.linalg.eigvalsh(COV[:2, :2])
    for p, gid in ((0.5, "ellipse50:1"), (0.95, "ellipse95:1")):
        (e,) = by_gid(ax, gid)
        assert isinstance(e, Ellipse)
        # Reference: scipy.stats.chi2.ppf(p, 2) (5.991 at 95 %, from memory) times the largest
        # covariance eigenvalue gives the squared semi-major axis.
        k2 = chi2.ppf(p, 2)
        assert e.width == pytest.approx(2 * math.sqrt(k2 * lam[1]), abs=1 * MM)
        assert e.height == pytest.approx(2 * math.sqrt(k2 * lam[0]), abs=1 * MM)
        np.testing.assert_allclose(e.center, SOURCE[:2], atol=1 * MM)
    assert chi2.ppf(0.95, 2) == pytest.approx(5.991, abs=1e-3)  # ISO/handbook table value


def test_a_marker_per_mic_and_the_rejected_mic_drawn_hollow(fix_map):
    ax = axes(fix_map, "map")
    filled = {a.get_gid()[4:]: a for a in by_gid(ax, "mic:")}
    hollow = {a.get_gid()[9:]: a for a in by_gid(ax, "rejected:")}
    assert sorted(filled) == ["M1", "M2", "M3", "M4"] and sorted(hollow) == ["M5"]
    assert filled["M1"].get_marker() == hollow["M5"].get_marker() == "^"
    assert hollow["M5"].get_markerfacecolor() == "white"
    assert filled["M1"].get_markerfacecolor() != "white"
    legend_texts = [t.get_text() for t in axes(fix_map, "legend").get_legend().get_texts()]
    assert any("rejected: M5" in t for t in legend_texts)
    for nm, p in zip(NAMES, MICS, strict=True):
        art = filled.get(nm) or hollow[nm]
        np.testing.assert_allclose(np.ravel(art.get_data()), p[:2], atol=1e-9)


def test_no_text_covers_the_estimate(fix_map):
    ax = axes(fix_map, "map")
    fix_map.canvas.draw()
    r = fix_map.canvas.get_renderer()
    est = ax.transData.transform(SOURCE[:2])
    radius = 5.0 * fix_map.dpi / 72.0  # the estimate marker's radius, points -> pixels
    texts = [t for t in ax.texts + [c for c in ax.get_children() if isinstance(c, Text)]
             if t.get_text().strip() and t.get_visible()]
    assert len(texts) >= len(NAMES)
    for t in texts:
        bb = t.get_window_extent(r)
        qx, qy = min(max(est[0], bb.x0), bb.x1), min(max(est[1], bb.y0), bb.y1)
        assert math.hypot(qx - est[0], qy - est[1]) > radius, t.get_text()


def test_view_holds_the_mics_and_the_ellipse_and_the_scale_bar_is_round(fix_map):
    ax = axes(fix_map, "map")
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()
    assert x0 < MICS[:, 0].min() and x1 > MICS[:, 0].max()
    assert y0 < MICS[:, 1].min() and y1 > MICS[:, 1].max()
    bar = by_gid(ax, "scalebar")
    length = sum(p.get_width() for p in bar)
    mantissa = length / 10 ** math.floor(math.log10(length))
    assert mantissa in (1.0, 2.0, 5.0)
    assert any(t.get_text() == f"{length:.0f} m" for t in ax.texts)
    # the zoom panel shows the tiny ellipse at a scale where it is visible
    zoom = axes(fix_map, "zoom")
    assert by_gid(zoom, "zoom95:1") and by_gid(zoom, "zoom50:1")


def test_caption_gives_temperature_sound_speed_and_time_span(fix_map):
    words = " ".join(t.get_text() for t in fix_map.texts)
    assert "6.0 °C" in words and f"{C:.1f} m/s" in words and "3.20–3.45 s" in words
    assert f"wind {WIND_SPEED:.1f} m/s from {WIND_FROM:.0f}°" in words.replace("\n", " ")


def test_an_enormous_ellipse_is_clipped_and_the_caption_says_so():
    res = exact_fix_result(cov=np.diag([4e4, 1e4, 0.0]))  # 95 % semi-major ~490 m
    fig = draw_map(MICS, NAMES, res)
    ax = axes(fig, "map")
    x0, x1 = ax.get_xlim()
    core = np.ptp(MICS[:, :2], axis=0).max()
    assert x1 - x0 < 2.5 * core  # half an array span of ellipse each side, not 1 km
    words = " ".join(t.get_text() for t in fig.texts).replace("\n", " ")
    assert "reaches beyond the view" in words


def test_several_fixes_get_numbers_and_no_hyperbola_tangle():
    res = exact_fix_result(n_fixes=3)
    fig = draw_map(MICS, NAMES, res)
    ax = axes(fig, "map")
    assert not by_gid(ax, "hyperbola:")
    assert len(by_gid(ax, "ellipse95:")) == 3 and len(by_gid(ax, "estimate:")) == 3
    one = draw_map(MICS, NAMES, res, fix_index=1)
    assert len(by_gid(axes(one, "map"), "hyperbola:2:")) == 6


def test_a_sweep_of_many_fixes_is_drawn_as_dots_with_every_kth_ellipse():
    # hundreds of windows of one steady source: one dot each, 95 % ellipses and numbers for
    # about eight of them (common practice for dense point sets: thin the annotations)
    res = exact_fix_result(n_fixes=200)
    fig = draw_map(MICS, NAMES, res)
    ax = axes(fig, "map")
    (dots,) = by_gid(ax, "estimates")
    assert len(dots.get_xdata()) == 200
    assert 7 <= len(by_gid(ax, "ellipse95:")) <= 9 and not by_gid(ax, "estimate:")
    numbers = [t for t in ax.texts if t.get_text().isdigit()]
    assert 7 <= len(numbers) <= 9
    words = " ".join(t.get_text() for t in fig.texts).replace("\n", " ")
    assert "200 fixes drawn as dots" in words


def test_mics_can_come_from_the_result_itself():
    fig = draw_map(None, None, exact_fix_result())
    assert len(by_gid(axes(fig, "map"), "mic:")) == 4


def test_site_image_is_placed_by_its_control_points():
    img = np.full((40, 60, 3), 0.8)
    px = np.array([[0.0, 0.0], [59.0, 0.0], [59.0, 39.0]])
    at = np.array([[-10.0, 80.0], [75.0, 85.0], [78.0, -8.0]])
    g = Georef.from_control_points(px, at)
    fig = draw_map(MICS, NAMES, exact_fix_result(), sketch=SiteSketch(image=img, georef=g))
    ax = axes(fig, "map")
    (im,) = [a for a in ax.get_children() if isinstance(a, AxesImage)]
    # the image's own transform takes pixel centres to where the map puts the metres
    np.testing.assert_allclose(im.get_transform().transform(px), ax.transData.transform(at),
                               atol=0.01)


def exact_track_result(n=14):
    v = np.array([27.0, 12.0, 0.0])
    start = np.array([-30.0, -10.0, 1.0])
    pts = []
    for k in range(n):
        te = 1.0 + 0.18 * k
        p = start + v * (te - 1.0)
        th = te + float(travel_time_s(p, MICS[0], C))
        pts.append({"t_emit_s": te, "t_heard_s": th, "position_m": p.tolist(),
                    "position_now_m": (start + v * (th - 1.0)).tolist(),
                    "covariance_m2": (np.eye(3) * 0.09).tolist(), "used": k != 3})
    heading = math.degrees(math.atan2(v[0], v[1])) % 360
    return {"schema": "tdoa-result/1", "kind": "track", "sound_speed_mps": C,
            "track": {"points": pts, "heading_deg": heading, "heading_sd_deg": 2.0,
                      "speed_mps": float(np.hypot(*v[:2])), "speed_sd_mps": 0.3}}


def test_track_map_has_path_heading_arrow_ellipses_at_intervals_and_is_now_arcs():
    res = exact_track_result()
    fig = draw_map(MICS, NAMES, res)
    ax = axes(fig, "map")
    (path,) = [a for a in ax.lines if a.get_gid() == "track"]
    np.testing.assert_allclose(np.column_stack(path.get_data()),
                               [p["position_m"][:2] for p in res["track"]["points"]], atol=1e-9)
    ells = by_gid(ax, "ellipse95:")
    assert 2 <= len(ells) <= 9
    arcs = by_gid(ax, "now:")
    assert len(arcs) == len(ells)
    (arrow,) = [a for a in ax.texts if a.get_gid() == "heading"]
    (x1, y1), (x0, y0) = arrow.xy, arrow.xyann
    # Reference: heading clockwise from north, atan2(east, north) (DESIGN.md convention).
    assert math.degrees(math.atan2(x1 - x0, y1 - y0)) % 360 == pytest.approx(
        res["track"]["heading_deg"], abs=0.01)
    assert by_gid(ax, "track-unused")
    ticks = [t.get_text() for t in ax.texts if t.get_text().endswith(" s")]
    assert ticks and len(ticks) <= 7
    # time labels are round emission times
    assert all(abs(float(t[:-2]) * 2 - round(float(t[:-2]) * 2)) < 1e-9 for t in ticks)


def test_panels_have_a_curve_per_pair_and_residuals_from_the_geometry():
    res = exact_fix_result(curves=True)
    fig = panels_figure(res)
    pair_axes = [a for a in fig.axes if a.get_label().startswith("pair:")]
    assert len(pair_axes) == 10
    ax = axes(fig, "pair:M1-M2")
    (curve,) = [ln for ln in ax.lines if len(ln.get_xdata()) > 1000]
    np.testing.assert_allclose(curve.get_xdata(), np.arange(-0.2, 0.2, 1 / 48000.0) * 1e3)
    bars = axes(fig, "residuals").patches
    heights_us = np.array([b.get_height() for b in bars])
    # residual = measured - predicted (predicted from the fix and the mics with travel_time_s):
    # the exact pairs are 0, the spoiled M5 pairs +3000 us but cut at the plot range
    used = np.array([("M5" not in d["mics"]) for d in res["fixes"][0]["delays"]])
    np.testing.assert_allclose(heights_us[used], 0.0, atol=0.01)
    assert np.all(heights_us[~used] > 0)
    cut = [t.get_text() for t in axes(fig, "residuals").texts]
    assert cut.count("3000 µs") == 4


def test_results_of_another_schema_or_kind_are_refused():
    with pytest.raises(ResultFileError) as err:
        check_result({"schema": "other/2", "kind": "fix", "fixes": []}, file="r.json")
    assert err.value.field == "schema" and err.value.file == "r.json"
    with pytest.raises(ResultFileError) as err:
        check_result({"schema": "tdoa-result/1", "kind": "level"})
    assert err.value.field == "kind"
    bad = exact_fix_result()
    bad["fixes"][0]["delays"][0]["mics"] = ["M1", "M9"]
    with pytest.raises(ResultFileError, match="M9"):
        draw_map(MICS, NAMES, bad)
    with pytest.raises(OptionError):
        draw_map(MICS, NAMES, exact_fix_result(), fix_index=4)


@pytest.mark.parametrize("suffix, magic, min_bytes", [
    (".png", b"\x89PNG", 40_000), (".svg", b"<?xml", 40_000), (".pdf", b"%PDF", 15_000)])
def test_figures_are_written_atomically_in_each_format(tmp_path, fix_map, suffix, magic,
                                                       min_bytes):
    out = save_figure(fix_map, tmp_path / f"map{suffix}")
    data = Path(out).read_bytes()
    assert data.startswith(magic) and len(data) > min_bytes
    assert sorted(p.name for p in tmp_path.iterdir()) == [f"map{suffix}"]  # no temp left


def test_print_resolution_png_has_300_dpi_pixels(tmp_path, fix_map):
    from PIL import Image

    out = save_figure(fix_map, tmp_path / "map.png", dpi=300)
    with Image.open(out) as im:
        w, h = im.size
    fw, fh = fix_map.get_size_inches()
    assert (w, h) == (round(fw * 300), round(fh * 300))


def test_unknown_figure_format_is_an_option_error(tmp_path, fix_map):
    with pytest.raises(OptionError, match=r"\.png"):
        save_figure(fix_map, tmp_path / "map.jpg")
    with pytest.raises(OptionError, match="does not exist"):
        save_figure(fix_map, tmp_path / "nowhere" / "map.png")


def test_a_source_on_a_baseline_extension_gets_a_ray_not_an_outside_the_view_note():
    # Geometry (from memory, any acoustics text): on the line through two mics beyond one of
    # them the delay is the whole baseline over c, and the hyperbola closes onto that ray.
    global SOURCE
    keep = SOURCE
    try:
        SOURCE = MICS[1] + 0.5 * (MICS[1] - MICS[0])  # beyond M2 on the M1-M2 line
        res = exact_fix_result(rejected=(), cov=COV * 0.01)
    finally:
        SOURCE = keep
    fig = draw_map(MICS, NAMES, res)
    words = " ".join(t.get_text() for t in fig.texts).replace("\n", " ")
    assert "M1–M2 lies outside the view" not in words
    assert "beyond M2" in words
    (ray,) = [a for a in by_gid(axes(fig, "map"), "hyperbola:1:M1-M2")]
    xy = np.column_stack(ray.get_data())
    src = np.asarray(res["fixes"][0]["position_m"][:2])
    assert distance_to_polyline(src, xy) < 0.05  # the ray passes through the source (m)


def test_track_connectors_are_straight_beside_the_path_and_every_legend_entry_is_drawn():
    res = exact_track_result()
    fig = draw_map(MICS, NAMES, res)
    ax = axes(fig, "map")
    v = np.array([27.0, 12.0])
    for arrow in by_gid(ax, "now:"):
        (a, b) = arrow._posA_posB  # the arrow's two ends (straight: no connection style arc)
        d = np.asarray(b) - np.asarray(a)
        # parallel to the motion within 1 degree (geometry: the source moves along v)
        cosang = d @ v / (np.hypot(*d) * np.hypot(*v))
        assert cosang > math.cos(math.radians(1.0))
    legend = [t.get_text() for t in axes(fig, "legend").texts] if any(
        a.get_label() == "legend" for a in fig.axes) else [
        t.get_text() for leg in fig.legends for t in leg.get_texts()]
    legend = legend or [t.get_text() for a in fig.axes if a.get_legend()
                        for t in a.get_legend().get_texts()]
    if any("95 % ellipse" in t for t in legend):
        assert by_gid(ax, "ellipse95:")
    tiny = exact_track_result()
    for p in tiny["track"]["points"]:
        p["covariance_m2"] = (np.eye(3) * 1e-10).tolist()  # 10 µm: nothing to see at map scale
    fig = draw_map(MICS, NAMES, tiny)
    legend = [t.get_text() for a in fig.axes if a.get_legend()
              for t in a.get_legend().get_texts()]
    assert not any("95 % ellipse" in t for t in legend)
    assert not by_gid(axes(fig, "map"), "ellipse95:")
    words = " ".join(t.get_text() for t in fig.texts).replace("\n", " ")
    assert "too small to draw" in words


def test_the_zoom_panels_carry_a_lag_scale_and_the_offset_sits_above_the_curve():
    fig = panels_figure(exact_fix_result(curves=True))
    zooms = [a for a in fig.axes if a.get_label().startswith("peak:")]
    assert zooms
    for zx in zooms:
        assert zx.get_title().startswith("Δ ")
        assert any(t.get_text().endswith(" ms") for t in zx.texts)
