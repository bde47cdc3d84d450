"""A field deployment through the command line: recorders writing many bext-stamped files.

Invented scene (tests/deployment_scene.py, exact simulator locate.synth): 5 recorders at 8 kHz
start 0-7.9 s apart and write 45-60 s files stamped in their bext chunks; the deployment
crosses midnight; recorder 3 misses its 4th file (a 52 s gap); 8 bangs (2 Pa rms at 1 m) over
6 minutes, one straddling a file boundary of recorder 1, one while recorder 3 is off.
References: the simulator's true positions and arrival times, and Python's datetime for the
clock times.
"""

from __future__ import annotations

import csv
import datetime as dt
import json
import shutil

import numpy as np
import pytest
import soundfile

from locate.io.bext import insert_bext, pack_bext
from locate.results.geojson import result_geojson
from tests.deployment_scene import BASE, MICS5_M, parse_utc, plan_files, utc_of, write_deployment
from tests.field_scene import run_cli

FS = 8000
SOUND_SPEED = 336.6  # m/s at 8 degC, 60 % RH (the scene's air, Cramer 1993 via the site)


def _scene_times(starts, plan, pos):
    """Bang times: two straddle/gap cases placed from the file plan, the others spread."""
    b0 = starts[0] + (plan[0][0] + plan[0][1]) / FS  # end of recorder 1's second file
    gap_lo = starts[2] + sum(plan[2][:3]) / FS
    gap_hi = gap_lo + plan[2][3] / FS
    times = np.array([30.0, 70.0, 0.0, 140.0, 0.5 * (gap_lo + gap_hi), 250.0, 300.0, 355.0])
    # arrival at mic 1 30 ms before its file ends: the 0.1 s bang straddles the boundary
    times[2] = b0 - 0.03 - np.linalg.norm(MICS5_M[0] - pos[2]) / SOUND_SPEED
    return times


@pytest.fixture(scope="module")
def scene(tmp_path_factory):
    folder = tmp_path_factory.mktemp("deployment")
    starts, plan = plan_files(fs=FS)
    rng = np.random.default_rng(3)
    pos = np.c_[rng.uniform(5, 55, 8), rng.uniform(5, 55, 8), np.ones(8)]
    times = _scene_times(starts, plan, pos)
    sc = write_deployment(folder, fs=FS, bang_times_s=times, positions_m=pos, drop=((2, 3),),
                          bang_pa=2.0)
    sc.notes["positions"] = pos
    return sc


@pytest.fixture(scope="module")
def fixed(scene):
    out = scene.folder / "out"
    out.mkdir()
    code, stdout, stderr = run_cli(["fix", scene.site, "--source-z", "1.0",
                                    "--json", out / "r.json", "--csv", out / "r.csv"])
    assert code == 0, stderr
    return json.loads((out / "r.json").read_text()), out, stdout, stderr


def test_the_scene_has_a_straddling_bang_and_one_in_a_gap(scene):
    arr = scene.arrivals_s
    b = scene.boundaries_s(0)
    assert any(arr[2, 0] < t < arr[2, 0] + 0.1 for t in b)  # bang 3 at mic 1 spans a boundary
    assert not scene.covered(2, arr[4, 2]) and all(scene.covered(i, arr[4, i])
                                                   for i in (0, 1, 3, 4))


def test_fix_finds_all_8_bangs_once_within_half_a_metre_with_clock_times(scene, fixed):
    result, out, _, _ = fixed
    fixes = result["fixes"]
    pos = scene.notes["positions"]
    assert len(fixes) == 8  # every bang once, nothing spurious
    first = scene.arrivals_s.min(axis=1)  # true first arrival after BASE (simulator)
    for k, f in enumerate(fixes):
        assert abs(f["t_s"] - first[k]) < 0.02  # common time 0 = recorder 1's start = BASE
        err = np.linalg.norm(np.array(f["position_m"][:2]) - pos[k, :2])
        assert err < 0.5, (k, err)
        clock = parse_utc(f["t_utc"])
        assert abs((clock - utc_of(first[k])).total_seconds()) < 0.02
    assert [f.get("absent_mics") for f in fixes] == [None] * 4 + [["M3"]] + [None] * 3
    assert "M3" not in fixes[4]["used_mics"] and len(fixes[4]["used_mics"]) == 4
    assert any("M3 had no audio" in w for w in fixes[4]["warnings"])
    assert parse_utc(fixes[-1]["t_utc"]).date() == dt.date(2026, 11, 19)  # after midnight
    assert any("own clocks' stamps" in w for w in result["warnings"])  # bext is not TDOA sync
    assert result["clock"]["epoch_utc"] == BASE.strftime("%Y-%m-%dT%H:%M:%S.000000Z")
    rows = list(csv.DictReader((out / "r.csv").read_text().splitlines()))
    assert [r["t_utc"] for r in rows] == [f["t_utc"] for f in fixes]
    gj = result_geojson(result, (52.0, 1.0, 0.0))  # an invented origin: local site
    pts = [ft["properties"] for ft in gj["features"] if ft["properties"].get("kind") == "fix"]
    assert [p["t_utc"] for p in pts] == [f["t_utc"] for f in fixes]


def test_events_over_a_clock_time_span(scene):
    a, b = BASE + dt.timedelta(seconds=60), BASE + dt.timedelta(seconds=150)
    code, out, err = run_cli(["events", scene.site, "--from", a.isoformat() + "Z",
                              "--to", b.isoformat() + "Z", "--json", scene.folder / "ev.json"])
    assert code == 0, err
    ev = json.loads((scene.folder / "ev.json").read_text())
    first = scene.arrivals_s.min(axis=1)
    inside = first[(first > 60) & (first < 150)]
    assert len(ev["events"]) == len(inside) == 3
    for row, t in zip(ev["events"], inside):
        assert abs((parse_utc(row["t_utc"]) - utc_of(t)).total_seconds()) < 0.02
    assert ev["span_utc"][0].startswith("2026-11-18T23:58:00")


def test_check_prints_each_recorders_coverage_and_the_gap(scene):
    code, out, err = run_cli(["check", scene.site])
    assert code == 0, err
    assert out.count("times from bext") == 5
    lo = scene.starts_s[2] + sum(n for _, _, n in scene.files[2][:3]) / FS
    gap = [ln for ln in out.splitlines() if "1 gap(s)" in ln]
    assert len(gap) == 1 and f"({lo:.3f} s)" in gap[0]
    assert utc_of(lo).strftime("%H:%M:%S") in gap[0]


def test_unstamped_files_fall_back_to_name_order_with_a_note(tmp_path):
    pos = np.array([[20.0, 30.0, 1.0], [40.0, 15.0, 1.0]])
    sc = write_deployment(tmp_path, fs=FS, duration_s=110.0, starts_s=(0.0,) * 5,
                          bang_times_s=[40.0, 75.0], positions_m=pos, drop=(), stamp=False)
    code, out, err = run_cli(["fix", sc.site, "--source-z", "1.0", "--json", tmp_path / "r.json"])
    assert code == 0, err
    r = json.loads((tmp_path / "r.json").read_text())
    assert len(r["fixes"]) == 2 and "clock" not in r
    assert all("t_utc" not in f for f in r["fixes"])
    err_m = np.linalg.norm(np.array([f["position_m"][:2] for f in r["fixes"]]) - pos[:, :2],
                           axis=1)
    assert np.all(err_m < 0.5)
    assert any("name order" in w and "no clock time" in w for w in r["warnings"])
    assert "name order" in err


# ------------------------------------------------------------------------------ bad input

@pytest.fixture(scope="module")
def small(tmp_path_factory):
    """A valid 100 s deployment without bangs; each case breaks a copy."""
    folder = tmp_path_factory.mktemp("small")
    write_deployment(folder, fs=FS, duration_s=100.0, bang_times_s=[], positions_m=[], drop=())
    return folder


def _one_line_error(folder, name, field):
    code, out, err = run_cli(["check", folder / "site.toml"])
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2, err
    assert len(lines) == 1 and "Traceback" not in err, err
    assert name in lines[0] and field in lines[0], lines[0]
    return lines[0]


def _restamp(path, when, fs=FS):
    x, rate = soundfile.read(path, dtype="float32")
    soundfile.write(path, x, rate, subtype="PCM_16")
    insert_bext(path, pack_bext(when, fs))


def test_overlapping_stamps(small, tmp_path):
    f = shutil.copytree(small, tmp_path / "c")
    second = sorted((f / "R2").glob("*.wav"))[1]
    n_first = soundfile.info(sorted((f / "R2").glob("*.wav"))[0]).frames
    start = BASE + dt.timedelta(seconds=3.2 + n_first / FS - 1.5)  # 1.5 s inside the first
    _restamp(second, start)
    line = _one_line_error(f, second.name, "bext.TimeReference")
    assert "overlapping" in line


def test_mixed_sample_rates_within_a_recorder(small, tmp_path):
    f = shutil.copytree(small, tmp_path / "c")
    second = sorted((f / "R4").glob("*.wav"))[1]
    x, _ = soundfile.read(second, dtype="float32")
    soundfile.write(second, np.repeat(x, 2), 2 * FS, subtype="PCM_16")
    insert_bext(second, pack_bext(BASE + dt.timedelta(seconds=60), 2 * FS))
    _one_line_error(f, second.name, "sample rate")


def test_a_glob_that_matches_nothing(small, tmp_path):
    f = shutil.copytree(small, tmp_path / "c")
    site = f / "site.toml"
    site.write_text(site.read_text().replace("R5/*.wav", "R5/*.flac"))
    line = _one_line_error(f, "site.toml", "mics[4].file")
    assert "R5/*.flac" in line and "matches no file" in line


def test_a_corrupt_bext_chunk(small, tmp_path):
    f = shutil.copytree(small, tmp_path / "c")
    first = sorted((f / "R1").glob("*.wav"))[0]
    data = bytearray(first.read_bytes())
    at = data.index(b"bext") + 8 + 320  # OriginationDate (EBU Tech 3285, from memory)
    data[at:at + 10] = b"20XX-11-18"
    first.write_bytes(bytes(data))
    _one_line_error(f, first.name, "bext.OriginationDate")


def test_timeline_figure_shows_each_recorder_and_the_gap(scene, fixed, tmp_path):
    from locate.draw.timeline import timeline_figure
    from locate.io.audio import open_recordings
    from locate.io.site import load_site

    result = fixed[0]
    rec = open_recordings(load_site(scene.site))
    fig = timeline_figure(rec, result)
    cover, points = fig.axes[0], fig.axes[1]
    bars = cover.collections
    assert len(bars) == 5
    assert [len(b.get_paths()) for b in bars] == [1, 1, 2, 1, 1]  # M3: two spans, a gap
    assert len(points.collections[0].get_offsets()) == 8
    code, out, err = run_cli(["check", scene.site, "--timeline", tmp_path / "cover.png"])
    assert code == 0, err
    assert (tmp_path / "cover.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
