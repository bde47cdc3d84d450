"""Tests for locate.io.site: loading, validation messages, geometry warnings, TOML round trip."""

import copy
import datetime as dt

import numpy as np
import pytest
import soundfile

from locate.errors import OptionError, SiteFileError
from locate.geometry import frames as geo
from locate.io.site import dump_site_toml, load_site, parse_start_time, start_time_offsets_s
from locate.io.toml import dump_toml

FS = 8000


def _base(n_mics=4):
    layout = [(0.0, 0.0, 1.2), (40.0, 0.0, 1.5), (40.0, 30.0, 1.3), (0.0, 30.0, 1.2),
              (20.0, 50.0, 10.0)]
    return {
        "title": "Quarry test",
        "coordinates": "local",
        "air": {"temperature_c": 6.0, "relative_humidity": 80},
        "recording": {"file": "rec.wav"},
        "mics": [{"name": f"M{i + 1}", "x": x, "y": y, "z": z, "channel": i + 1}
                 for i, (x, y, z) in enumerate(layout[:n_mics])],
    }


def _write(tmp_path, data, *, channels=4, name="site.toml"):
    rec = tmp_path / "rec.wav"
    if channels and not rec.exists():
        soundfile.write(rec, np.zeros((FS // 10, channels)), FS)
    p = tmp_path / name
    p.write_text(data if isinstance(data, str) else dump_toml(data), encoding="utf-8")
    return p


def _error(path, field, *words, dims=2, **kw):
    """Load, expect SiteFileError on ``field``; the message names the file and the field."""
    with pytest.raises(SiteFileError) as info:
        load_site(path, dims=dims, **kw)
    err = info.value
    msg = str(err)
    assert err.field == field, msg
    assert str(path) in msg and field in msg, msg
    for w in words:
        assert w in msg, msg
    assert "\n" not in msg
    return msg


def test_valid_local_site_loads_with_defaults(tmp_path):
    site = load_site(_write(tmp_path, _base()))
    assert site.title == "Quarry test" and site.coordinates == "local"
    assert site.mic_names == ["M1", "M2", "M3", "M4"]
    np.testing.assert_array_equal(site.positions_m[1], [40.0, 0.0, 1.5])
    assert site.recording_file == (tmp_path / "rec.wav").resolve()
    assert site.mics[2].channel == 3 and site.mics[2].file is None
    assert site.mic_source(2) == ((tmp_path / "rec.wav").resolve(), 3)
    assert site.air.pressure_kpa == 101.325 and site.air.wind_speed_mps == 0.0
    assert site.warnings == () and site.origin_wgs84 is None and site.sketch is None
    # handbook form 331.3 sqrt(1 + theta/273.15) = 334.9 m/s at 6 degC in dry air; humidity
    # adds a few tenths of a m/s (Cramer 1993) -> within 1 m/s
    assert site.air.sound_speed_mps() == pytest.approx(331.3 * np.sqrt(1 + 6 / 273.15), abs=1.0)
    assert site.mic_index("M3") == 2
    with pytest.raises(OptionError, match='did you mean "M3"'):
        site.mic_index("m3")


def test_design_example_text_loads(tmp_path):
    # the example site file of DESIGN.md (trimmed of optional comments), mics added to three
    text = """
title = "Example survey"
coordinates = "local"
[air]
temperature_c = 6.0
relative_humidity = 80
pressure_kpa = 101.325
wind_speed_mps = 3.0
wind_from_deg = 270.0
[recording]
file = "rec.wav"
[[mics]]
name = "M1"
x = 0.0
y = 0.0
z = 1.2
channel = 1
[[mics]]
name = "M2"
x = 80.0
y = 0.0
z = 1.2
channel = 2
[[mics]]
name = "M3"
x = 40.0
y = 60.0
z = 1.2
channel = 4
[[receivers]]
name = "R1"
x = 60.0
y = 10.0
[sketch]
refs = [ { pixel = [102, 880], at = [0.0, 0.0] }, { pixel = [950, 870], at = [80.0, 0.0] } ]
shapes = [ { label = "store", outline = [[10,10],[30,10],[30,25],[10,25]] } ]
"""
    site = load_site(_write(tmp_path, text))
    # a wind FROM 270 deg (westerly) moves the air toward +x (meteorological convention,
    # common practice)
    np.testing.assert_allclose(site.air.wind_mps(), [3.0, 0.0, 0.0], atol=1e-12)
    np.testing.assert_array_equal(site.receivers[0].position_m, [60.0, 10.0, 1.5])
    assert len(site.sketch.refs) == 2 and site.sketch.image is None
    np.testing.assert_array_equal(site.sketch.refs[1][0], [950, 870])
    np.testing.assert_array_equal(site.sketch.shapes[0]["outline"][2], [30, 25])
    assert site.sketch.shapes[0]["label"] == "store"


def test_toml_syntax_error_reports_the_line(tmp_path):
    p = _write(tmp_path, 'title = "x"\n[air]\ntemperature_c = = 6\n')
    msg = _error(p, "line 3", "TOML syntax error at line 3")
    assert "temperature_c" in msg  # the offending line is quoted


@pytest.mark.parametrize("where, bad, good", [
    ("air", "temprature_c", "temperature_c"),
    ("top", "mic", "mics"),
    ("mic", "chanel", "channel"),
])
def test_unknown_key_suggests_the_closest_valid_key(tmp_path, where, bad, good):
    d = _base()
    if where == "air":
        d["air"][bad] = d["air"].pop("temperature_c")
        field = f"air.{bad}"
    elif where == "top":
        d[bad] = d.pop("mics")
        field = bad
    else:
        d["mics"][1][bad] = d["mics"][1].pop("channel")
        field = f"mics[1].{bad}"
    _error(_write(tmp_path, d), field, f'did you mean "{good}"')


@pytest.mark.parametrize("path, field, word", [
    (("air", "temperature_c"), "air.temperature_c", "degrees Celsius"),
    (("air", "relative_humidity"), "air.relative_humidity", "percent"),
    (("mics", 1, "x"), "mics[1].x", "east coordinate"),
    (("mics", 2, "z"), "mics[2].z", "height"),
    (("mics", 0, "name"), "mics[0].name", "name"),
    (("mics", 3, "channel"), "mics[3].channel", "1-based channel"),
])
def test_missing_required_field_is_named(tmp_path, path, field, word):
    d = _base()
    node = d
    for k in path[:-1]:
        node = node[k]
    del node[path[-1]]
    _error(_write(tmp_path, d), field, "missing", word)


def test_missing_air_table(tmp_path):
    d = _base()
    del d["air"]
    _error(_write(tmp_path, d), "air", "missing [air]")


@pytest.mark.parametrize("value, words", [
    (True, ["must be a number", "boolean"]),
    ("6,5", ["decimal comma", "use a decimal point", "6.5"]),
    ("6.5", ["remove the quotes"]),
    ("warm", ["must be a number"]),
    ([6.5], ["must be a number"]),
])
def test_wrong_types_for_numbers(tmp_path, value, words):
    d = _base()
    d["air"]["temperature_c"] = value
    _error(_write(tmp_path, d), "air.temperature_c", *words)


@pytest.mark.parametrize("value, word", [(2.0, "write 2"), ("2", "remove the quotes"),
                                         (True, "whole number"), (0, "count from 1"),
                                         (5, "has 4 channel")])
def test_bad_channels(tmp_path, value, word):
    d = _base()
    d["mics"][1]["channel"] = value
    _error(_write(tmp_path, d), "mics[1].channel", word)


def test_same_channel_twice_is_refused(tmp_path):
    d = _base()
    d["mics"][2]["channel"] = 1
    _error(_write(tmp_path, d), "mics[2].channel", 'already used by mic "M1"')


@pytest.mark.parametrize("value", [float("nan"), float("inf"), float("-inf")])
def test_non_finite_coordinates(tmp_path, value):
    d = _base()
    d["mics"][2]["y"] = value
    _error(_write(tmp_path, d), "mics[2].y", "finite")


def test_duplicate_mic_names(tmp_path):
    d = _base()
    d["mics"][3]["name"] = "M2"
    _error(_write(tmp_path, d), "mics[3].name", 'duplicate mic name "M2"', "mics[1]")


def test_missing_recording_file_names_recording_file(tmp_path):
    d = _base()
    d["recording"]["file"] = "nowhere.wav"
    _error(_write(tmp_path, d), "recording.file", "file not found", "nowhere.wav")
    site = load_site(tmp_path / "site.toml", require_audio=False)  # planning a layout
    assert any("file not found" in w for w in site.warnings)


def test_missing_per_mic_file_names_the_mic_field(tmp_path):
    d = _base()
    d["mics"][1]["file"] = "m2.flac"
    del d["mics"][1]["channel"]
    _error(_write(tmp_path, d), "mics[1].file", "file not found", "m2.flac")


def test_not_audio_recording_is_refused_at_load(tmp_path):
    (tmp_path / "rec.wav").write_text("this is not audio")
    _error(_write(tmp_path, _base()), "recording.file", "cannot read rec.wav as audio")


def test_no_audio_source_at_all(tmp_path):
    d = _base()
    del d["recording"]
    for m in d["mics"]:
        del m["channel"]
    _error(_write(tmp_path, d), "mics[0].file", "no recording")


@pytest.mark.parametrize("n, dims, need", [(2, 2, 3), (3, 3, 4)])
def test_too_few_mics(tmp_path, n, dims, need):
    _error(_write(tmp_path, _base(n)), "mics", f"needs at least {need}", dims=dims)


@pytest.mark.parametrize("key, value, words", [
    # plausibility limits and unit slips: common practice for outdoor surveys
    ("temperature_c", 290.0, ["looks like kelvin", "16.85"]),
    ("temperature_c", -60.0, ["outside -50..60"]),
    ("temperature_c", 86.0, ["Fahrenheit", "30.0 degC"]),
    ("relative_humidity", 120.0, ["0..100"]),
    ("relative_humidity", -5.0, ["0..100"]),
    ("pressure_kpa", 101325.0, ["looks like pascals", "101.325"]),
    ("pressure_kpa", 1013.25, ["hPa"]),
    ("pressure_kpa", 20.0, ["outside 50..110"]),
    ("wind_speed_mps", 40.0, ["storm"]),
    ("wind_speed_mps", -1.0, ["zero or positive"]),
    ("temperature_sd_c", -0.5, ["zero or positive"]),
    ("wind_sd_mps", -0.5, ["zero or positive"]),
    ("sound_speed_mps", 34.3, ["outside 250..450"]),
])
def test_absurd_air_values(tmp_path, key, value, words):
    d = _base()
    d["air"][key] = value
    _error(_write(tmp_path, d), f"air.{key}", *words)


def test_fractional_humidity_gives_a_warning_and_override_is_used(tmp_path):
    d = _base()
    d["air"].update(relative_humidity=0.8, sound_speed_mps=340.0, wind_from_deg=-90.0)
    site = load_site(_write(tmp_path, d))
    assert any("if you meant 80 %" in w for w in site.warnings)
    assert site.air.sound_speed_mps() == 340.0
    assert site.air.wind_from_deg == 270.0


@pytest.mark.parametrize("key, value, words", [
    ("position_sd_m", -0.1, ["zero or positive"]),
    ("clock_sd_s", -1e-6, ["zero or positive"]),
    ("drift_ppm", 5000.0, ["ppm"]),
    ("full_scale_db_spl", 20.0, ["0 dBFS"]),
    ("start_time", "yesterday", ["ISO 8601"]),
    ("offset_s", "0,25", ["use a decimal point"]),
])
def test_absurd_mic_values(tmp_path, key, value, words):
    d = _base()
    for m in d["mics"]:
        m[key] = value
    _error(_write(tmp_path, d), f"mics[0].{key}", *words)


def test_coordinates_must_be_local_or_wgs84(tmp_path):
    d = _base()
    d["coordinates"] = "utm"
    _error(_write(tmp_path, d), "coordinates", '"local"', '"wgs84"')


def test_survey_defaults_apply_to_mics_lacking_them(tmp_path):
    d = _base()
    d["survey"] = {"position_sd_m": 0.05, "height_sd_m": 0.1, "clock_sd_s": 2e-5}
    d["mics"][1]["position_sd_m"] = 0.5
    site = load_site(_write(tmp_path, d))
    assert [m.position_sd_m for m in site.mics] == [0.05, 0.5, 0.05, 0.05]
    assert all(m.height_sd_m == 0.1 and m.clock_sd_s == 2e-5 for m in site.mics)


# ------------------------------------------------------------------------------ geometry

def test_coincident_mics_warn_and_all_coincident_is_an_error(tmp_path):
    d = _base()
    d["mics"][3].update(x=40.004, y=0.003, z=1.5)
    site = load_site(_write(tmp_path, d))
    # 0.5 cm apart: below the 1 cm limit (common practice for tape-measured layouts)
    assert any('"M2" and "M4" are 0.5 cm apart' in w for w in site.warnings)
    for m in d["mics"]:
        m.update(x=1.0, y=2.0, z=1.0)
    _error(_write(tmp_path, d), "mics", "same place")


def test_collinear_layout_warns_poor_geometry(tmp_path):
    d = _base()
    for k, m in enumerate(d["mics"]):
        m.update(x=10.0 * k, y=0.02 * (-1) ** k)  # 2 cm off a 30 m line
    site = load_site(_write(tmp_path, d))
    assert any("poor geometry: mics are nearly on one line" in w for w in site.warnings)
    # a layout 30 m x 40 m is fine (this guards against a check that always fires)
    assert not any("poor geometry" in w for w in load_site(_write(tmp_path, _base())).warnings)


def test_planar_array_warns_for_3d_only(tmp_path):
    d = _base()
    for m in d["mics"]:
        m["z"] = 1.2
    p = _write(tmp_path, d)
    assert not any("height" in w for w in load_site(p, dims=2).warnings)
    assert any("height is poorly determined" in w for w in load_site(p, dims=3).warnings)
    d5 = _base(5)
    d5["recording"]["file"] = "rec5.wav"
    soundfile.write(tmp_path / "rec5.wav", np.zeros((FS // 10, 5)), FS)
    s5 = load_site(_write(tmp_path, d5, name="five.toml"), dims=3)  # one mic on a 10 m mast
    assert not any("height" in w for w in s5.warnings)


# --------------------------------------------------------------------- optional tables

def test_receivers_barriers_sketch(tmp_path):
    d = _base()
    (tmp_path / "plan.png").write_bytes(b"\x89PNG")
    d["receivers"] = [{"name": "House", "x": 100.0, "y": 5.0}, {"name": "Gate", "x": -20.0,
                                                                   "y": 0.0, "z": 3.0}]
    d["barriers"] = [{"label": "wall", "line": [[0, -5], [40, -5]], "height_m": 2.5}]
    d["sketch"] = {"image": "plan.png", "geojson": "missing.geojson",
                   "refs": [{"pixel": [0, 0], "at": [0.0, 0.0]},
                            {"pixel": [400, 0], "at": [40.0, 0.0]}]}
    site = load_site(_write(tmp_path, d))
    np.testing.assert_array_equal(site.receivers[0].position_m, [100.0, 5.0, 1.5])
    np.testing.assert_array_equal(site.receivers[1].position_m, [-20.0, 0.0, 3.0])
    assert site.barriers[0].label == "wall" and site.barriers[0].height_m == 2.5
    assert site.barriers[0].line_m.shape == (2, 2)
    assert site.sketch.image == (tmp_path / "plan.png").resolve()
    assert site.sketch.geojson == (tmp_path / "missing.geojson").resolve()
    assert any("sketch.geojson: file not found" in w for w in site.warnings)


@pytest.mark.parametrize("h", [0.0, -1.0])
def test_barrier_height_must_be_positive(tmp_path, h):
    d = _base()
    d["barriers"] = [{"label": "wall", "line": [[0, -5], [40, -5]], "height_m": h}]
    _error(_write(tmp_path, d), "barriers[0].height_m", "above zero")


def test_sketch_image_needs_two_refs_and_well_formed_shapes(tmp_path):
    d = _base()
    d["sketch"] = {"image": "plan.png", "refs": [{"pixel": [0, 0], "at": [0.0, 0.0]}]}
    _error(_write(tmp_path, d), "sketch.refs", "at least 2 refs")
    d["sketch"] = {"shapes": [{"label": "shed", "outline": [[0, 0]]}]}
    _error(_write(tmp_path, d), "sketch.shapes[0].outline", "at least 2")


def test_paths_are_relative_to_the_site_file_not_the_cwd(tmp_path, monkeypatch):
    sub = tmp_path / "survey"
    sub.mkdir()
    _write(sub, _base())
    monkeypatch.chdir(tmp_path)
    site = load_site("survey/site.toml")
    assert site.recording_file == (sub / "rec.wav").resolve()


def test_per_mic_files_default_to_channel_1_and_mix_with_recording(tmp_path):
    d = _base()
    soundfile.write(tmp_path / "m4.flac", np.zeros(FS // 10), FS)
    d["mics"][3] = {"name": "M4", "x": 0.0, "y": 30.0, "z": 1.2, "file": "m4.flac"}
    site = load_site(_write(tmp_path, d))
    assert site.mics[3].channel == 1 and site.mics[3].file == (tmp_path / "m4.flac").resolve()
    assert site.mic_source(3) == ((tmp_path / "m4.flac").resolve(), 1)
    d["mics"][3]["channel"] = 2
    _error(_write(tmp_path, d), "mics[3].channel", "m4.flac has 1 channel")


# ------------------------------------------------------------------------------- WGS84

def _wgs84_site(tmp_path):
    # invented site: a meadow near 47.5 N 8.7 E; mics ~ 50 m apart
    d = _base()
    d["coordinates"] = "wgs84"
    ll = [(47.5000, 8.7000, 420.0), (47.5000, 8.7007, 421.0), (47.5005, 8.7007, 422.0),
          (47.5005, 8.7000, 421.0)]
    for m, (lat, lon, alt) in zip(d["mics"], ll, strict=True):
        for k in ("x", "y", "z"):
            del m[k]
        m.update(lat=lat, lon=lon, alt=alt)
    d["receivers"] = [{"name": "Farm", "lat": 47.501, "lon": 8.701}]
    d["sketch"] = {"shapes": [{"label": "barn", "outline": [[47.5001, 8.7001],
                                                            [47.5001, 8.7002]]}]}
    return d, ll


def test_wgs84_site_is_converted_to_local_enu(tmp_path):
    d, ll = _wgs84_site(tmp_path)
    site = load_site(_write(tmp_path, d))
    ll = np.array(ll)
    origin = (ll[:, 0].mean(), ll[:, 1].mean(), ll[:, 2].mean())
    assert site.origin_wgs84 == pytest.approx(origin, abs=1e-12)
    # reference: pyproj EPSG:4979 -> EPSG:4978 then ENU rotation (tested in test_geo.py)
    ref = geo.enu_from_wgs84(ll[:, 0], ll[:, 1], ll[:, 2], origin)
    np.testing.assert_allclose(site.positions_m, ref, atol=1e-3)
    # 0.0007 deg of longitude at 47.5 N is about 52.7 m (from memory: 111.32 km cos(lat))
    assert site.positions_m[1, 0] - site.positions_m[0, 0] == pytest.approx(52.6, abs=0.3)
    assert site.mics[2].geodetic == (47.5005, 8.7007, 422.0)
    assert np.allclose(site.positions_m.mean(axis=0)[:2], 0.0, atol=0.05)
    far = site.receivers[0]
    assert far.geodetic == (47.501, 8.701, origin[2]) and abs(far.position_m[2]) < 0.2
    assert site.sketch.shapes[0]["outline"].shape == (2, 2)


def test_wgs84_site_refuses_xyz_and_bad_latitude(tmp_path):
    d, _ = _wgs84_site(tmp_path)
    d["mics"][1]["x"] = 3.0
    _error(_write(tmp_path, d), "mics[1].x", "lat, lon, alt instead of x, y, z")
    d, _ = _wgs84_site(tmp_path)
    d["mics"][1]["lat"] = 95.0
    _error(_write(tmp_path, d), "mics[1].lat", "-90..90")


# --------------------------------------------------------------------------- start times

def test_start_times_parse_with_fractional_seconds():
    # 2026-05-14T21:03:07Z is POSIX 1778792587 s (Python datetime as the reference)
    ref = dt.datetime(2026, 5, 14, 21, 3, 7, tzinfo=dt.timezone.utc).timestamp()
    assert parse_start_time("2026-05-14T21:03:07.250Z") == (int(ref), 0.25)
    assert parse_start_time("2026-05-14T23:03:07.1234567+02:00") == (int(ref), 0.1234567)
    with pytest.raises(ValueError):
        parse_start_time("2026-13-14T21:03:07Z")


def test_start_times_for_some_mics_only_are_refused(tmp_path):
    d = _base()
    d["mics"][0]["start_time"] = "2026-05-14T21:03:07.250Z"
    _error(_write(tmp_path, d), "mics[1].start_time", "every mic or for none")


def test_start_times_accept_toml_datetimes_and_give_offsets(tmp_path):
    d = _base()
    base = dt.datetime(2026, 5, 14, 21, 3, 7, 250000, tzinfo=dt.timezone.utc)
    for k, m in enumerate(d["mics"]):
        m["start_time"] = base + dt.timedelta(milliseconds=125 * k)
    site = load_site(_write(tmp_path, d))
    assert isinstance(site.mics[1].start_time, str)
    np.testing.assert_allclose(start_time_offsets_s(site.mics), [0, 0.125, 0.25, 0.375],
                               atol=1e-9)


# --------------------------------------------------------------------------- round trip

def test_dump_then_load_round_trips(tmp_path):
    d = _base()
    d["title"] = 'Quarry "north" \\ test\tA'
    d["survey"] = {"position_sd_m": 0.05}
    d["mics"][0]["offset_s"] = 1.25e-05
    d["mics"][1]["start_time"] = "x"  # replaced below
    for m in d["mics"]:
        m["start_time"] = dt.datetime(2026, 5, 14, 21, 3, 7, 250000, tzinfo=dt.timezone.utc)
    d["mics"][2]["drift_ppm"] = -3.5
    d["receivers"] = [{"name": "R 1", "x": 60.0, "y": 10.0}]
    d["barriers"] = [{"label": "wall", "line": [[0, -5], [40.5, -5]], "height_m": 2.5}]
    d["sketch"] = {"refs": [{"pixel": [1, 2], "at": [0.0, 0.0]},
                            {"pixel": [3, 4], "at": [40.0, 0.0]}],
                   "shapes": [{"label": "shed", "outline": [[0, 0], [1, 0], [1, 1]]}]}
    first = load_site(_write(tmp_path, d))
    text = dump_site_toml(first.raw)
    again = load_site(_write(tmp_path, text, name="again.toml"))
    assert again.raw == first.raw  # tomllib is the reference parser of the written text
    np.testing.assert_array_equal(again.positions_m, first.positions_m)
    assert [m.offset_s for m in again.mics] == [1.25e-05, 0.0, 0.0, 0.0]
    assert again.title == d["title"] and again.mics[2].drift_ppm == -3.5
    np.testing.assert_array_equal(again.barriers[0].line_m, [[0, -5], [40.5, -5]])


def test_dump_of_modified_raw_writes_offsets_for_sync(tmp_path):
    site = load_site(_write(tmp_path, _base()))
    raw = copy.deepcopy(site.raw)
    for m, off in zip(raw["mics"], np.array([0.0, 1e-3, -2.5e-4, 3.0]), strict=True):
        m["offset_s"] = off  # numpy floats, as a sync step would produce
    new = load_site(_write(tmp_path, dump_site_toml(raw), name="synced.toml"))
    assert [m.offset_s for m in new.mics] == [0.0, 1e-3, -2.5e-4, 3.0]
    assert site.raw["mics"][1].get("offset_s") is None  # the loaded site was not modified
