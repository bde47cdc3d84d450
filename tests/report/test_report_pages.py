"""The report as a client receives it: printed to A4 by headless Chromium, pages rendered with
poppler (pdftoppm, pdftohtml), and checked for the title block, plain client text and print
sizes."""

from __future__ import annotations

import re
import shutil
import subprocess

import pytest
from matplotlib.text import Text

from locate.io.site import load_site
from locate.report import chromium
from locate.report.build import PRINT_WIDTH_IN, map_figure_for_print
from locate.workflows.demo_data import demo_dir
from tests.cli_helpers import run

MIN_PRINT_PT = 7.0  # smallest readable text on a printed page (common practice)

needs_tools = pytest.mark.skipif(
    chromium.find_chromium() is None or shutil.which("pdftoppm") is None
    or shutil.which("pdftohtml") is None,
    reason="needs Chromium and poppler-utils (Debian: apt-get install chromium poppler-utils)")

# Command-line options and internal field names that must not reach a client's page
FORBIDDEN = re.compile(
    r"(?<![\w-])--[a-z][a-z0-9-]+|\b(?:temperature_sd_c|position_sd_m|height_sd_m|clock_sd_s|"
    r"wind_sd_mps|source_z_m|sound_speed_mps|semi_major_m|covariance_m2|residual_rms_s|"
    r"tdoa (?:plan|fix|track|level|sync|check))\b")


@pytest.fixture(scope="module")
def demo_report(tmp_path_factory):
    out = tmp_path_factory.mktemp("client")
    site = demo_dir() / "yard.toml"
    assert run(["-q", "fix", site, "--source-z", "1", "--json", out / "fix.json"])[0] == 0
    assert run(["-q", "level", site, out / "fix.json", "--json", out / "level.json"])[0] == 0
    code, _, err = run(["-q", "report", site, out / "fix.json", out / "level.json", "-o",
                        out / "report.pdf"])
    assert code == 0, err
    return out


def _pages_xml(pdf):
    # pdftohtml -xml -zoom 1: font sizes in PDF points (poppler-utils)
    return subprocess.run(["pdftohtml", "-xml", "-i", "-q", "-zoom", "1", "-stdout", str(pdf)],
                          capture_output=True, text=True, check=True).stdout


def _page_texts(xml):
    pages = re.split(r"<page ", xml)[1:]
    return [re.sub(r"<[^>]+>", "", p) for p in pages]


@needs_tools
def test_the_title_block_carries_the_site_files_report_fields(demo_report):
    text = " ".join(_page_texts(_pages_xml(demo_report / "report.pdf"))[0].split())
    site = load_site(demo_dir() / "yard.toml")
    assert site.report  # the demo declares a title block
    for label, key in (("CLIENT", "client"), ("JOB REFERENCE", "job_reference"),
                       ("PREPARED BY", "author"), ("REVISION", "revision"),
                       ("SURVEY DATES", "survey_dates"), ("SITE ADDRESS", "site_address")):
        assert label in text.upper(), label
        value = site.report[key].replace("'", "&apos;")
        assert value.split()[0] in text.replace("&#39;", "'").replace("&apos;", "'"), key


@needs_tools
def test_no_command_line_option_or_internal_field_name_reaches_the_client(demo_report):
    xml = _pages_xml(demo_report / "report.pdf")
    hits = [m.group(0) for page in _page_texts(xml) for m in FORBIDDEN.finditer(page)]
    assert not hits, sorted(set(hits))


@needs_tools
def test_every_printed_text_is_at_least_7_pt_at_a4(demo_report):
    xml = _pages_xml(demo_report / "report.pdf")
    sizes = [float(s) for s in re.findall(r'<fontspec[^>]*size="([\d.]+)"', xml)]
    assert sizes and min(sizes) >= MIN_PRINT_PT - 0.05, sorted(set(sizes))[:5]


@needs_tools
def test_the_map_page_renders_and_its_figure_text_prints_at_7_pt(demo_report):
    import json

    # the page with the map renders (pdftoppm) and is not blank
    xml = _pages_xml(demo_report / "report.pdf")
    page = next(k for k, t in enumerate(_page_texts(xml), 1) if "Site maps" in t)
    png = demo_report / "map-page"
    subprocess.run(["pdftoppm", "-r", "40", "-png", "-f", str(page), "-l", str(page),
                    str(demo_report / "report.pdf"), str(png)], check=True)
    assert list(demo_report.glob("map-page*.png"))
    # the figure is drawn at the printed width, so its font sizes are printed sizes
    site = load_site(demo_dir() / "yard.toml")
    fig = map_figure_for_print(site, json.loads((demo_report / "fix.json").read_text()), [])
    fig.canvas.draw()
    scale = PRINT_WIDTH_IN / fig.get_figwidth()
    sizes = [t.get_fontsize() * scale for t in fig.findobj(Text)
             if t.get_visible() and t.get_text().strip()]
    assert min(sizes) >= MIN_PRINT_PT, min(sizes)


def test_a_plan_result_goes_into_the_report_with_print_sized_text(tmp_path):
    # the planning map joins the site maps, redrawn at the printed width; every text on it is
    # at least MIN_PRINT_PT (common practice for print), and the caption is in plain words
    from locate.accuracy.plan_site import plan_site
    from locate.draw.plan import plan_figure

    site_path = demo_dir() / "yard.toml"
    code, _, err = run(["-q", "plan", site_path, "--source-z", "1", "--json",
                        tmp_path / "plan.json"])
    assert code == 0, err
    code, _, err = run(["-q", "report", site_path, tmp_path / "plan.json", "-o",
                        tmp_path / "r.html"])
    assert code == 0, err
    html = (tmp_path / "r.html").read_text()
    assert "Where this microphone layout can locate a sound" in html
    assert "one more microphone at (" in html
    assert not FORBIDDEN.search(re.sub(r"<[^>]+>", " ", html.split("<body", 1)[1]))
    site = load_site(site_path, require_audio=False)
    res = plan_site(site, timing_sd_s=2e-5, candidates="auto", region="auto", source_z_m=1.0,
                    n_propose=1)
    fig = plan_figure(res, site, width_in=PRINT_WIDTH_IN)
    fig.canvas.draw()
    sizes = [t.get_fontsize() for t in fig.findobj(Text)
             if t.get_visible() and t.get_text().strip()]
    assert min(sizes) >= MIN_PRINT_PT, min(sizes)
