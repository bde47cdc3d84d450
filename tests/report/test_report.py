"""The survey report: structure, embedded images, numbers read back, bad inputs, Chromium."""

from __future__ import annotations

import base64
import io
import json
import re
from html.parser import HTMLParser

import click
import numpy as np
import pytest
from matplotlib import image as mpimg

from locate.errors import OptionError, ResultFileError, SiteFileError
from locate.io.site import load_site
from locate.report import chromium
from locate.report.build import (
    SECTIONS,
    build_report,
    make_report,
    recordings_info,
)
from tests.cli_helpers import digest, run, write_site

MM = 1e-3
MICS = [(0.0, 0.0, 1.5), (60.0, 4.0, 1.5), (58.0, 50.0, 1.6), (-3.0, 45.0, 1.4),
        (30.0, 70.0, 2.0)]
NAMES = [f"M{k}" for k in range(1, 6)]  # write_site names the mics M1..M5
RATE_HZ = 8000

# The site's receiver and barrier (site-file TOML appended by write_site)
EXTRA = """
[[receivers]]
name = "Hollin Cottage"
x = 95.0
y = 40.0
z = 4.0

[[barriers]]
label = "east fence"
line = [[75.0, 0.0], [78.0, 60.0]]
height_m = 2.5
"""


# ------------------------------------------------------------------------ invented results

def _cov(sx, sy, rho):
    c = rho * sx * sy
    return [[sx * sx, c, 0.0], [c, sy * sy, 0.0], [0.0, 0.0, 0.0]]


def _e95(cov):
    # 95 % ellipse of a 2-D Gaussian: chi-square 2 dof quantile 5.991 (scipy.stats.chi2)
    c = np.asarray(cov)[:2, :2]
    vals, vecs = np.linalg.eigh(c)
    major = vecs[:, 1]
    return {"semi_major_m": float(np.sqrt(5.991 * vals[1])),
            "semi_minor_m": float(np.sqrt(5.991 * vals[0])),
            "azimuth_deg": float(np.degrees(np.arctan2(major[0], major[1])) % 180.0)}


def fix_result(names=NAMES, n=3):
    """A hand-made fix result: three sounds, one with a rejected and a silent mic, one with an
    uncertainty budget (keys as documented in locate.accuracy.budget.uncertainty_budget)."""
    spots = [(31.2345, 22.4567), (12.5, 40.25), (48.0, 15.5), (20.0, 20.0)]
    covs = [_cov(0.012, 0.006, 0.3), _cov(0.4, 0.15, -0.5), _cov(0.002, 0.001, 0.0),
            _cov(0.05, 0.05, 0.0)]
    fixes = []
    for k in range(n):
        x, y = spots[k]
        f = {"t_s": 1.25 + 2.0 * k, "span_s": [1.2 + 2.0 * k, 1.5 + 2.0 * k],
             "position_m": [x, y, 1.0], "covariance_m2": covs[k], "ellipse95": _e95(covs[k]),
             "rejected_mics": ["M4"] if k == 1 else [], "dead_mics": ["M5"] if k == 1 else [],
             "used_mics": [m for m in names if k != 1 or m not in ("M4", "M5")],
             "residual_rms_s": [1.4e-5, 3.25e-5, 8.0e-6][k % 3], "chi2": 3.0, "dof": 5,
             "p_value": 0.7, "dims": 2, "band_hz": [200.0, 3000.0], "delays": [],
             "warnings": ["mic(s) M4 rejected: their timing disagrees"] if k == 1 else []}
        fixes.append(f)
    fixes[0]["uncertainty_budget"] = {
        "shares": {"timing": 0.2, "mic_positions": 0.55, "sound_speed": 0.15, "clocks": 0.0,
                   "wind": 0.1},
        "area_shares": {"timing": 0.3, "mic_positions": 0.6, "sound_speed": 0.2, "clocks": 0.0,
                        "wind": 0.12},
        "mic_position_shares": {m: 0.11 for m in names},
        "resurvey_gain": {m: (0.25 if m == "M3" else 0.0) for m in names},
        "dominant": "mic_positions", "hint": "re-survey mic M3",
        "declared": {"mic_positions": True, "sound_speed": True, "clocks": False,
                     "wind": True},
        "defaults": ["temperature_sd_c"],
        "sd": {"position_m": [0.05] * len(names), "height_m": [0.1] * len(names),
               "clock_s": [0.0] * len(names), "temperature_c": 2.0, "wind_mps": 0.5},
        "note": "", "method": "first-order propagation (JCGM 100:2008)"}
    return {"schema": "tdoa-result/1", "kind": "fix", "title": "Test survey at Fenwick Marsh",
            "sound_speed_mps": 338.07, "dims": 2, "source_z_m": 1.0,
            "mics": [{"name": m, "position_m": list(p)} for m, p in zip(names, MICS)],
            "warnings": ["recordings differ in length by 0.2 s"], "fixes": fixes}


def track_result(n=8):
    pts = []
    for k in range(n):
        te = 1.0 + 0.5 * k
        pts.append({"t_emit_s": te, "t_heard_s": te + 0.1, "position_m": [-20.0 + 9.0 * k,
                                                                          -15.0, 0.8],
                    "covariance_m2": _cov(0.03, 0.02, 0.1), "used": k != 2})
    return {"schema": "tdoa-result/1", "kind": "track", "sound_speed_mps": 338.07,
            "mics": [{"name": m, "position_m": list(p)} for m, p in zip(NAMES, MICS)],
            "span_s": [1.0, 5.0], "warnings": [],
            "track": {"points": pts, "heading_deg": 89.64, "heading_sd_deg": 0.42,
                      "speed_mps": 18.05, "speed_sd_mps": 0.31, "model": "straight",
                      "closest_approach": [{"name": "M1", "t_s": 3.2, "t_heard_s": 3.25,
                                            "distance_m": 15.2, "distance_sd_m": 0.04,
                                            "within_span": True}],
                      "residual_rms_s": 2.1e-5, "warnings": []}}


def level_result():
    bands = [63, 125, 250, 500, 1000, 2000, 4000, 8000]
    lev = []
    for k in range(2):
        lev.append({"kind": "level", "fix": k + 1, "bands_hz": bands,
                    "source_lw_db": [80.1 + k, 85.25, 90.04, 95.5, 99.96, 97.3, 92.8, None],
                    "source_lwa_db": 103.37 + k, "mic_spread_db": [0.5, 1.2, 2.0, 3.1, 2.2,
                                                                   1.5, 4.0, None],
                    "receivers": [{"name": "Hollin Cottage", "distance_m": 70.2,
                                   "lp_db": [30.0, 35.5, 40.2, 44.4, 48.0, 45.1, 38.3, None],
                                   "lpa_db": 51.26 + k,
                                   "barrier_db": [4.2, 4.6, 5.3, 6.4, 8.0, 10.2, 12.6, None]}],
                    "units": "dB re 1 pW", "calibrated": True, "position_m": [31.2, 22.5, 1.0],
                    "lw_position_sd_db": 0.2, "notes": []})
    return {"schema": "tdoa-result/1", "kind": "level", "sound_speed_mps": 338.07,
            "mics": [{"name": m, "position_m": list(p)} for m, p in zip(NAMES, MICS)],
            "warnings": [], "levels": lev,
            "cautions": ["These levels are estimates from a few microphones, not a compliance "
                         "measurement."]}


def _signals(n_mics=5, seconds=0.5):
    rng = np.random.default_rng(7)
    return rng.normal(0.0, 0.1, (n_mics, int(seconds * RATE_HZ)))


@pytest.fixture(scope="module")
def survey(tmp_path_factory):
    folder = tmp_path_factory.mktemp("report")
    site_path = write_site(folder, MICS, _signals(), RATE_HZ, extra=EXTRA)
    files = {}
    for name, res in (("fix.json", fix_result()), ("track.json", track_result()),
                      ("level.json", level_result())):
        files[name] = folder / name
        files[name].write_text(json.dumps(res))
    site = load_site(site_path)
    html = build_report(site, [fix_result(), track_result(), level_result()],
                        files=["fix.json", "track.json", "level.json"],
                        recordings=recordings_info(site), generated="2025-03-01")
    return {"folder": folder, "site_path": site_path, "site": site, "files": files,
            "html": html}


# ------------------------------------------------------------------------ reading the page

class Page(HTMLParser):
    """Tags with attributes, section ids, and each table's rows of cell texts."""

    def __init__(self, html):
        super().__init__(convert_charrefs=True)
        self.tags, self.tables, self.sections = [], {}, []
        self._table, self._row, self._cell = None, None, None
        self.feed(html)

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append((tag, a))
        if tag == "section":
            self.sections.append(a.get("id"))
        elif tag == "table":
            self._table = a.get("id") or f"table{len(self.tables)}"
            self.tables[self._table] = []
        elif tag == "tr" and self._table is not None:
            self._row = []
        elif tag in ("td", "th") and self._row is not None:
            self._cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self._row.append(" ".join("".join(self._cell).split()))
            self._cell = None
        elif tag == "tr" and self._row is not None:
            self.tables[self._table].append(self._row)
            self._row = None
        elif tag == "table":
            self._table = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data.replace("\u00a0", " "))

    def body_rows(self, table_id):
        """Rows after the header row."""
        return self.tables[table_id][1:]

    def facts(self, table_id):
        return {r[0]: r[1] for r in self.tables[table_id]}


NUMBER = re.compile(r"[-+]?\d+(?:\.(\d+))?")
UNITS_M = {"mm": 1e-3, "cm": 1e-2, "m": 1.0}


def value(text):
    """First number in a cell and half a unit of its last digit: (value, half_step)."""
    t = text.replace("\u2212", "-")
    m = NUMBER.search(t)
    assert m, f"no number in {text!r}"
    decimals = len(m.group(1) or "")
    return float(m.group(0)), 0.5 * 10.0 ** (-decimals)


def metres(text):
    """A length cell (``8.3 mm``, ``24.6 cm``, ``1.52 m``) in metres, with its half step."""
    v, half = value(text)
    unit = re.search(r"\d\s*(mm|cm|m)\b", text).group(1)
    return v * UNITS_M[unit], half * UNITS_M[unit]


def assert_shown(text, expected, *, extra=0.0):
    """The number shown equals ``expected`` to the digits shown."""
    v, half = value(text)
    assert abs(v - expected) <= half + extra + 1e-12, (text, expected)


# ------------------------------------------------------------------------ structure

def test_the_page_parses_and_holds_every_section_in_order(survey):
    page = Page(survey["html"])
    assert [s for s in page.sections if s in SECTIONS] == list(SECTIONS)
    (html_tag,) = [a for t, a in page.tags if t == "html"]
    assert html_tag.get("lang") == "en"  # WCAG 2 success criterion 3.1.1 (common practice)
    # each section is labelled by its heading
    for s in SECTIONS:
        assert f'id="{s}-title"' in survey["html"]


def test_one_table_row_per_fix_and_per_track_point(survey):
    page = Page(survey["html"])
    fixes = fix_result()["fixes"]
    assert [r[0] for r in page.body_rows("fixes-1")] == [str(k) for k in
                                                         range(1, len(fixes) + 1)]
    assert len(page.body_rows("quality-1")) == len(fixes)
    assert len(page.body_rows("points-1")) == len(track_result()["track"]["points"])


def test_figures_are_embedded_png_with_alt_text_and_nothing_points_off_the_page(survey):
    page = Page(survey["html"])
    imgs = [a for t, a in page.tags if t == "img"]
    # one map per fix or track result, one chart per level entry
    assert len(imgs) == 2 + len(level_result()["levels"])
    for a in imgs:
        assert a["src"].startswith("data:image/png;base64,")
        png = base64.b64decode(a["src"].split(",", 1)[1])
        assert png[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)
        assert len(a.get("alt", "")) > 40
    refs = [a[k] for _, a in page.tags for k in ("src", "href") if k in a]
    assert all(r.startswith(("data:", "#")) for r in refs)
    assert not [t for t, _ in page.tags if t in ("script", "link", "iframe", "object")]
    assert "url(" not in survey["html"] and "@import" not in survey["html"]


def test_tables_are_real_tables_with_header_scopes(survey):
    page = Page(survey["html"])
    th = [a for t, a in page.tags if t == "th"]
    assert th and all(a.get("scope") in ("col", "row") for a in th)
    captions = survey["html"].count("<caption>")
    assert captions == survey["html"].count("<table")


# ------------------------------------------------------------------------ numbers

def test_fix_positions_and_ellipses_equal_the_result_json(survey):
    page = Page(survey["html"])
    for row, f in zip(page.body_rows("fixes-1"), fix_result()["fixes"]):
        _, heard, x, y, z, major, minor, azimuth = row
        assert_shown(heard, f["t_s"])
        assert_shown(x, f["position_m"][0])
        assert_shown(y, f["position_m"][1])
        assert_shown(z, f["position_m"][2])
        for cell, key in ((major, "semi_major_m"), (minor, "semi_minor_m")):
            v, half = metres(cell)
            assert abs(v - f["ellipse95"][key]) <= half + 0.01 * MM, (cell, f["ellipse95"])
        assert_shown(azimuth, f["ellipse95"]["azimuth_deg"])


def test_fit_quality_and_why_mics_were_not_used(survey):
    page = Page(survey["html"])
    rows = page.body_rows("quality-1")
    for row, f in zip(rows, fix_result()["fixes"]):
        assert_shown(row[3], f["residual_rms_s"] * 1e6)  # shown in microseconds
        assert row[5] == ", ".join(f["used_mics"])
    why = rows[1][6]
    assert "M4" in why and "integrity test" in why
    assert "M5" in why and "no usable correlation" in why
    assert rows[0][6] == "none"


def test_track_heading_speed_and_points_equal_the_result_json(survey):
    page = Page(survey["html"])
    tr = track_result()["track"]
    facts = page.facts("track-1")
    heading = facts["Heading (direction of travel, from north)"]
    assert_shown(heading, tr["heading_deg"])
    assert_shown(heading.split("±")[1], tr["heading_sd_deg"])
    speed = facts["Speed"]
    assert_shown(speed, tr["speed_mps"])
    assert_shown(speed.split("±")[1], tr["speed_sd_mps"])
    assert_shown(speed.split("(")[1], tr["speed_mps"] * 3.6)  # 1 m/s = 3.6 km/h (SI)
    for row, p in zip(page.body_rows("points-1"), tr["points"]):
        assert_shown(row[1], p["t_emit_s"])
        assert_shown(row[3], p["position_m"][0])
        assert_shown(row[4], p["position_m"][1])
        assert row[-1].startswith("yes" if p["used"] else "no")
    (closest,) = page.body_rows("closest-1")
    assert_shown(closest[1], tr["closest_approach"][0]["distance_m"])


def test_levels_and_receiver_predictions_equal_the_result_json(survey):
    page = Page(survey["html"])
    for k, lev in enumerate(level_result()["levels"], 1):
        lw_row, spread_row = page.body_rows(f"lw-{k}")
        for cell, v in zip(lw_row[1:-1], lev["source_lw_db"]):
            if v is None:
                assert cell == "\u2014"
            else:
                assert_shown(cell, v)
        assert_shown(lw_row[-1], lev["source_lwa_db"])
        assert_shown(spread_row[3], lev["mic_spread_db"][2])
        (rec,) = page.body_rows(f"receivers-{k}")
        r = lev["receivers"][0]
        assert rec[0] == r["name"]
        assert_shown(rec[1], r["distance_m"])
        assert_shown(rec[2 + 4], r["lp_db"][4])  # the 1 kHz band
        assert_shown(rec[-2], r["lpa_db"])
        assert_shown(rec[-1], max(v for v in r["barrier_db"] if v is not None))


def test_uncertainty_budget_shares_equal_the_result_json(survey):
    page = Page(survey["html"])
    budget = fix_result()["fixes"][0]["uncertainty_budget"]
    rows = page.body_rows("budget-1")
    assert len(rows) == len(budget["shares"])
    for row, share in zip(rows, budget["shares"].values()):
        assert_shown(row[1], 100.0 * share)
    assert "re-survey mic M3" in survey["html"]
    text = " ".join(survey["html"].replace("\u00a0", " ").split())
    assert ("mic positions 5 cm per horizontal axis and 10 cm in height; air temperature "
            "± 2.0 °C (default); wind 0.5 m/s") in text
    gains = page.body_rows("budget-mics-1")
    assert [r[2] for r in gains] == ["0.0 %", "0.0 %", "25.0 %", "0.0 %", "0.0 %"]


def test_text_from_the_inputs_is_escaped(survey):
    html = build_report(survey["site"], [fix_result(n=1)], title="Yard <b>A</b> & B",
                        generated="2025-03-01")
    assert "Yard &lt;b&gt;A&lt;/b&gt; &amp; B" in html and "<b>A</b>" not in html


def test_set_up_lists_every_mic_the_air_and_the_recordings(survey):
    page = Page(survey["html"])
    site = survey["site"]
    rows = page.body_rows("mics-table")
    assert [r[0] for r in rows] == site.mic_names
    for row, m in zip(rows, site.mics):
        for cell, v in zip(row[1:4], m.position_m):
            assert_shown(cell, v)
    air = page.facts("air-table")
    assert_shown(air["Air temperature"], site.air.temperature_c)
    assert_shown(air["Relative humidity"], site.air.relative_humidity)
    assert_shown(air["Sound speed used"], fix_result()["sound_speed_mps"])
    (rec,) = page.body_rows("recordings-table")
    assert_shown(rec[2], RATE_HZ)
    assert_shown(rec[3], 0.5)  # 4000 samples at 8 kHz
    assert page.body_rows("receivers-table")[0][0] == "Hollin Cottage"


def test_methods_name_only_the_methods_the_results_used(survey):
    site = survey["site"]
    everything = survey["html"]
    for name in ("Knapp", "Carter", "Chan", "Foy", "Cramer", "ISO 9613-1", "IEC 61672-1",
                 "Maekawa", "JCGM 100"):
        assert name in everything
    fix_only = build_report(site, [dict(fix_result(), fixes=fix_result()["fixes"][1:])],
                            generated="2025-03-01")
    methods = fix_only.split('id="methods"')[1].split("</section>")[0]
    for name in ("Knapp", "Carter", "Chan", "Foy", "Cramer"):
        assert name in methods
    for name in ("ISO 9613", "IEC 61672", "Maekawa", "JCGM"):
        assert name not in methods


def test_cautions_say_estimates_defer_to_competent_persons_and_people_may_be_regulated(survey):
    cautions = survey["html"].split('id="cautions"')[1].split("</section>")[0]
    assert "not a compliance measurement" in cautions
    assert "competent, licensed person" in cautions
    assert "Recording people" in cautions
    assert cautions.count("not a compliance measurement") == 1  # said once, not per result


def test_wgs84_site_shows_positions_in_latitude_and_longitude(tmp_path):
    # mics given in WGS84; a fix placed exactly at mic B's local position must read back as
    # the latitude and longitude written in the site file (the site file is the truth)
    lat0, lon0 = 53.2671, -2.1484
    geo = [(lat0, lon0), (lat0, lon0 + 0.0009), (lat0 + 0.0005, lon0 + 0.0008),
           (lat0 + 0.0006, lon0 - 0.0001)]
    lines = ['title = "Hatherlow common"', 'coordinates = "wgs84"', "[air]",
             "temperature_c = 10.0", "relative_humidity = 70", "[recording]",
             'file = "rec.wav"']
    for k, (la, lo) in enumerate(geo, 1):
        lines += ["[[mics]]", f'name = "G{k}"', f"lat = {la}", f"lon = {lo}", "alt = 120.0",
                  f"channel = {k}"]
    path = tmp_path / "site.toml"
    path.write_text("\n".join(lines) + "\n")
    site = load_site(path, require_audio=False)
    res = fix_result(names=site.mic_names, n=1)
    res["mics"] = [{"name": m.name, "position_m": m.position_m.tolist()} for m in site.mics]
    res["fixes"][0]["position_m"] = site.mics[1].position_m.tolist()
    html = build_report(site, [res], generated="2025-03-01")
    page = Page(html)
    row = page.body_rows("fixes-1")[0]
    lat, lon = row[5], row[6]
    assert lat.endswith("N") and lon.endswith("W")
    assert abs(value(lat)[0] - geo[1][0]) < 1e-7  # 1e-7 deg is about 1 cm
    assert abs(value(lon)[0] - abs(geo[1][1])) < 1e-7
    mic_row = page.body_rows("mics-table")[1]
    assert abs(value(mic_row[4])[0] - geo[1][0]) < 1e-7


# ------------------------------------------------------------------------ bad input

def test_a_result_from_another_site_is_refused_naming_the_file_and_mics(survey, tmp_path):
    other = fix_result(names=["A1", "A2", "A3", "A4", "A5"])
    path = tmp_path / "other-site.json"
    path.write_text(json.dumps(other))
    with pytest.raises(ResultFileError) as err:
        make_report(survey["site_path"], [path], tmp_path / "r.html")
    assert err.value.field == "mics" and err.value.file == str(path)
    code, _, stderr = run(["report", survey["site_path"], path, "-o", tmp_path / "r.html"])
    assert code == 2 and "other-site.json" in stderr and "mics" in stderr
    assert not (tmp_path / "r.html").exists()


def test_a_missing_site_image_is_a_clear_error(tmp_path):
    site_path = write_site(tmp_path, MICS, _signals(), RATE_HZ, extra=(
        '\n[sketch]\nimage = "plan.png"\n'
        "refs = [ { pixel = [0, 0], at = [-10.0, 80.0] }, "
        "{ pixel = [59, 39], at = [80.0, -10.0] } ]\n"))
    mpimg.imsave(tmp_path / "plan.png", np.full((40, 60, 3), 0.8))
    result = tmp_path / "fix.json"
    result.write_text(json.dumps(fix_result(n=1)))
    make_report(site_path, [result], tmp_path / "ok.html")  # with the image: fine
    assert "data:image/png" in (tmp_path / "ok.html").read_text()
    (tmp_path / "plan.png").unlink()
    with pytest.raises(SiteFileError) as err:
        make_report(site_path, [result], tmp_path / "r.html")
    assert err.value.field == "sketch.image" and "missing" in err.value.message
    code, _, stderr = run(["report", site_path, result, "-o", tmp_path / "r.html"])
    assert code == 2 and "plan.png" in stderr and "missing" in stderr


@pytest.mark.parametrize("which", ["site", "result"])
def test_an_output_path_equal_to_an_input_is_refused_and_the_input_kept(survey, which):
    target = survey["site_path"] if which == "site" else survey["files"]["fix.json"]
    before = digest([target])
    code, _, stderr = run(["report", survey["site_path"], survey["files"]["fix.json"],
                           "-o", target])
    assert code == 2 and "input" in stderr
    assert digest([target]) == before


def test_an_unknown_output_format_is_refused(survey, tmp_path):
    with pytest.raises(OptionError) as err:
        make_report(survey["site_path"], [survey["files"]["fix.json"]], tmp_path / "r.docx")
    assert err.value.field == "-o"


def test_pdf_without_chromium_says_to_write_html(survey, tmp_path, monkeypatch):
    monkeypatch.setenv("TDOA_CHROMIUM", "")
    code, _, stderr = run(["report", survey["site_path"], survey["files"]["fix.json"],
                           "-o", tmp_path / "r.pdf"])
    assert code == 2 and "Chromium" in stderr and ".html" in stderr
    assert not (tmp_path / "r.pdf").exists()


# ------------------------------------------------------------------------ CLI and demo

def test_cli_writes_the_html_report_atomically(survey, tmp_path):
    out = tmp_path / "report.html"
    code, stdout, _ = run(["report", survey["site_path"], *survey["files"].values(),
                           "-o", out, "--title", "Fenwick Marsh: night noise"])
    assert code == 0 and "Report written" in stdout
    page = Page(out.read_text())
    assert "Fenwick Marsh: night noise" in out.read_text()
    assert len(page.body_rows("fixes-1")) == 3
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no temp files left


def test_demo_step_writes_a_report_from_the_results_present(survey, tmp_path):
    from locate.cli import cli
    from locate.cli.demo import STEPS, find_demo_dir

    demo_dir = find_demo_dir()
    site = load_site(demo_dir / "yard.toml", require_audio=False)
    res = fix_result(names=site.mic_names, n=2)
    res["mics"] = [{"name": m.name, "position_m": m.position_m.tolist()} for m in site.mics]
    (tmp_path / "yard-fix.json").write_text(json.dumps(res))
    reports = dict(STEPS)["reports"]
    with click.Context(cli, obj={"quiet": True}) as ctx:
        reports(ctx, demo_dir, tmp_path)
    page = Page((tmp_path / "report.html").read_text())
    assert len(page.body_rows("fixes-1")) == 2
    assert not (tmp_path / "lane-report.html").exists()  # no track result: no lane report


# ------------------------------------------------------------------------ Chromium

needs_chromium = pytest.mark.skipif(
    chromium.find_chromium() is None,
    reason="Chromium is not installed (Debian: apt-get install chromium): the rendered-page "
           "checks need it")


@needs_chromium
def test_chromium_renders_a_screenshot_of_the_page(survey):
    assert "--headless" in chromium.OFFLINE_FLAGS
    assert any(f.startswith("--host-resolver-rules") for f in chromium.OFFLINE_FLAGS)
    png = chromium.screenshot(survey["html"], width_px=1000, height_px=1400)
    img = mpimg.imread(io.BytesIO(png), format="png")
    assert img.shape[:2] == (1400, 1000)
    # the page has ink on it (text and figures), not a blank or error page
    dark = np.mean(img[..., :3], axis=-1) < 0.5
    assert 0.005 < dark.mean() < 0.5


@needs_chromium
def test_cli_prints_the_report_to_an_a4_pdf(survey, tmp_path):
    out = tmp_path / "report.pdf"
    code, _, stderr = run(["report", survey["site_path"], *survey["files"].values(),
                           "-o", out])
    assert code == 0, stderr
    pdf = out.read_bytes()
    assert pdf.startswith(b"%PDF-")
    pages = pdf.count(b"/Type /Page") - pdf.count(b"/Type /Pages")
    assert pages >= len(SECTIONS) - 2  # big sections start on a new page
    boxes = {tuple(float(v) for v in m.split()) for m in
             re.findall(rb"/MediaBox\s*\[([^\]]*)\]", pdf)}
    # ISO 216: A4 is 210 mm x 297 mm = 595.28 pt x 841.89 pt (1 pt = 25.4/72 mm)
    for box in boxes:
        assert abs(box[2] - box[0] - 210 / 25.4 * 72) < 0.5
        assert abs(box[3] - box[1] - 297 / 25.4 * 72) < 0.5
