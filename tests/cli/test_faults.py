"""Faults injected on purpose: the output side, the operating system, hostile names, odd files.

The promises under test (house rules, issue 23): a bad input or a refusal of the operating
system is one line naming the file, exit code 2 (1 for an internal failure), never a
traceback; an input is never overwritten; a command's outputs are committed together (temp
files renamed only when every output was written), so a failure or an interrupt at any output
step leaves every earlier output as it was and no temporary file behind.

Faults injected here:
  * an output path that is an input (directly, through ``..``, a symlink or a hard link) or
    another output of the same run; a batch summary named like a task result;
  * an interrupt (KeyboardInterrupt) and an OS error raised at each output step of ``fix``;
  * a full disk (RLIMIT_FSIZE in a child process), a folder where a file must go, a file
    where a folder must be, a name longer than NAME_MAX, a symlink loop;
  * a FIFO given as a recording and as a site file, ``/dev/zero`` as a site file, a UTF-8
    byte-order mark, OGG audio in a ``.wav``, a truncated FLAC;
  * NaN/inf option values; result files with null / infinite positions, text times, deep
    nesting;
  * hostile names ($, backslash, =, +, -, @, unicode, 200 characters) through JSON, CSV,
    GeoJSON, PNG/SVG maps and the HTML report;
  * batch names and output folders that lead out of the batch's folder; SIGTERM to a batch
    with the worker processes counted before and after.
"""

from __future__ import annotations

import csv
import errno
import io
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import soundfile

from locate.geometry import frames
from locate.synth import Emission, Waveform, simulate_events
from tests.cli_helpers import digest, run, write_site
from tests.field_scene import site_dict
from tests.field_scene import write_site as write_site_dict
from tests.scenes import ARRAY_40M

REPO = Path(__file__).resolve().parents[2]
RATE_HZ = 16000.0
SOURCE_M = np.array([14.0, 22.0, 0.5])
ORIGIN = (47.0102, 8.3051, 512.0)  # an invented survey origin (lat, lon, ellipsoidal height)
HOSTILE = ["=HYPERLINK(\"http://x\")", "$\\alpha$ 5$", "-2+3", "@SUM(A1)",
           "Ünïcødé ☃ 麦克风 " + "x" * 190]  # one name per mic of ARRAY_40M
TITLE = "Survey $x^2$ \\ <script>alert(1)</script> = + @"


def _one_line_error(code, err, want=2):
    assert code == want, err
    assert "Traceback" not in err, err
    lines = [ln for ln in err.strip().splitlines() if ln.startswith("tdoa: error")]
    assert len(lines) == 1, err
    return lines[0]


def _signals():
    wf = Waveform(kind="impulse", band_hz=(200.0, 4000.0), duration_s=0.08, rms_pa_at_1m=5.0)
    sim = simulate_events(ARRAY_40M, [Emission(SOURCE_M, 0.3, wf)], sample_rate_hz=RATE_HZ,
                          duration_s=1.2, temperature_c=12.0, relative_humidity=70.0,
                          noise_rms=0.002, rng=np.random.default_rng(23))
    return sim.signals


@pytest.fixture(scope="module")
def scene(tmp_path_factory):
    """One bang at (14, 22) m heard by the 40 m array; a site file and a first result."""
    folder = tmp_path_factory.mktemp("faults")
    site = write_site(folder, ARRAY_40M, _signals(), RATE_HZ)
    return site


def _copy_scene(scene, folder):
    folder = Path(folder)
    (folder / "rec.wav").write_bytes((scene.parent / "rec.wav").read_bytes())
    (folder / "site.toml").write_text(scene.read_text())
    return folder / "site.toml"


def _fix_args(site, **outs):
    args = ["fix", site, "--from", "0.2", "--to", "0.7", "--source-z", "0.5"]
    for opt, path in outs.items():
        args += [f"--{opt}", path]
    return args


# --------------------------------------------------------------------- outputs vs inputs

def test_an_output_that_resolves_to_an_input_is_refused_before_any_work(scene, tmp_path):
    site = _copy_scene(scene, tmp_path)
    (tmp_path / "sub").mkdir()
    (tmp_path / "link.json").symlink_to(site)
    os.link(tmp_path / "rec.wav", tmp_path / "hard.csv")
    before = digest([site, tmp_path / "rec.wav"])
    cases = [("json", site), ("json", tmp_path / "sub" / ".." / "site.toml"),
             ("csv", tmp_path / "rec.wav"), ("json", tmp_path / "link.json"),
             ("csv", tmp_path / "hard.csv")]
    for opt, out in cases:
        code, _, err = run(_fix_args(site, **{opt: out}))
        line = _one_line_error(code, err)
        assert "input" in line and f"--{opt}" in line, line
    # two outputs of one run on one file
    code, _, err = run(_fix_args(site, json=tmp_path / "a.json", csv=tmp_path / "a.json"))
    assert "is also the --json output" in _one_line_error(code, err)
    assert digest([site, tmp_path / "rec.wav"]) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == [
        "hard.csv", "link.json", "rec.wav", "site.toml", "sub"]  # nothing written


def test_map_and_report_never_write_over_their_result_or_the_sketch(scene, tmp_path):
    site = _copy_scene(scene, tmp_path)
    res = tmp_path / "fix.json"
    assert run(_fix_args(site, json=res))[0] == 0
    png = tmp_path / "plan.png"  # the sketch image named by the site, and its GeoJSON layer
    import matplotlib.image
    matplotlib.image.imsave(png, np.full((60, 80, 3), 0.8))
    layer = tmp_path / "features.geojson"
    layer.write_text(json.dumps({"type": "FeatureCollection", "features": []}))
    site.write_text(site.read_text() + '\n[sketch]\nimage = "plan.png"\n'
                    'geojson = "features.geojson"\n'
                    'refs = [ { pixel = [0, 60], at = [-10.0, -10.0] }, '
                    '{ pixel = [80, 0], at = [50.0, 45.0] } ]\n')
    assert run(["check", site])[0] == 0
    before = digest([site, res, png, layer])
    for args in (["map", site, res, "-o", res], ["map", site, res, "-o", png],
                 ["map", site, res, "-o", layer.with_suffix(".geojson")],
                 ["fix", site, "--from", "0.2", "--to", "0.7", "--map", png],
                 ["report", site, res, "-o", res],
                 ["map", site, res, "-o", tmp_path / "m.png", "--panels", tmp_path / "m.png"]):
        _one_line_error(*run(args)[::2])
    assert digest([site, res, png, layer]) == before
    assert not (tmp_path / "m.png").exists()


# --------------------------------------------------------------------- one transaction

@pytest.fixture()
def earlier(scene, tmp_path):
    """A site and a complete earlier set of outputs of ``fix`` (JSON, CSV, map, panels)."""
    site = _copy_scene(scene, tmp_path)
    outs = {"json": tmp_path / "r.json", "csv": tmp_path / "r.csv", "map": tmp_path / "r.svg",
            "panels": tmp_path / "p.png"}
    code, _, err = run(_fix_args(site, **outs))
    assert code == 0, err
    return site, outs


# errno values and strerror texts of Linux (errno(3)); the advice words are ours
OS_FAULTS = [(errno.ENOSPC, "No space left on device", "disk is full"),
             (errno.EROFS, "Read-only file system", "read-only"),
             (errno.EACCES, "Permission denied", "permission"),
             (errno.EFBIG, "File too large", "file size limit")]


@pytest.mark.parametrize("fault", [None, *OS_FAULTS], ids=["interrupt", "ENOSPC", "EROFS",
                                                           "EACCES", "EFBIG"])
def test_a_fault_at_any_output_step_leaves_every_earlier_output_as_it_was(earlier, monkeypatch,
                                                                          fault):
    import locate.common as common

    site, outs = earlier
    folder = site.parent
    before = digest([site, folder / "rec.wav", *outs.values()])
    names = sorted(p.name for p in folder.iterdir())
    real = common.atomic_target
    for step in range(1, len(outs) + 1):
        calls = {"n": 0}

        def failing(path, *a, _step=step, _calls=calls, **kw):
            _calls["n"] += 1
            if _calls["n"] == _step:
                if fault is None:
                    raise KeyboardInterrupt()
                raise OSError(fault[0], fault[1], str(path))
            return real(path, *a, **kw)

        monkeypatch.setattr(common, "atomic_target", failing)
        code, out, err = run(_fix_args(site, **outs))
        assert calls["n"] == step, (step, calls)  # the fault came at this output step
        if fault is None:
            assert code == 130 and "interrupted" in err, err
        else:
            line = _one_line_error(code, err)
            assert fault[1] in line and fault[2] in line, line
            assert any(str(p) in line for p in outs.values()), line  # the file is named
        assert "written to" not in out  # nothing announced that did not happen
        assert digest([site, folder / "rec.wav", *outs.values()]) == before, step
        assert sorted(p.name for p in folder.iterdir()) == names, step  # no temp file


def _each_step_interrupted(monkeypatch, args, outs, folder):
    """Run ``args`` once per output step with a KeyboardInterrupt raised at that step: every
    output stays as the complete earlier run left it, no temporary file is left."""
    import locate.common as common

    code, _, err = run(args)
    assert code == 0, err
    before = digest(outs)
    names = sorted(p.name for p in folder.iterdir())
    real = common.atomic_target
    for step in range(1, len(outs) + 1):
        calls = {"n": 0}

        def failing(path, *a, _step=step, _calls=calls, **kw):
            _calls["n"] += 1
            if _calls["n"] == _step:
                raise KeyboardInterrupt()
            return real(path, *a, **kw)

        monkeypatch.setattr(common, "atomic_target", failing)
        code, _, err = run(args)
        monkeypatch.setattr(common, "atomic_target", real)
        assert code == 130 and calls["n"] == step, (step, err)
        assert digest(outs) == before, step
        assert sorted(p.name for p in folder.iterdir()) == names, step


def test_sync_plan_and_map_commit_their_outputs_together(earlier, monkeypatch):
    site, outs = earlier
    folder = site.parent
    new_site, cal = folder / "synced.toml", folder / "cal.json"
    _each_step_interrupted(monkeypatch, ["sync", site, "--at", "14,22,0.5", "--from", "0.2",
                                         "--to", "0.7", "-o", new_site, "--json", cal],
                           [new_site, cal], folder)
    plan_png, plan_json = folder / "plan.png", folder / "plan.json"
    _each_step_interrupted(monkeypatch, ["plan", site, "-o", plan_png, "--json", plan_json,
                                         "--grid-step", "5"], [plan_png, plan_json], folder)
    m, pan = folder / "m.png", folder / "m-panels.svg"
    _each_step_interrupted(monkeypatch, ["map", site, outs["json"], "-o", m, "--panels", pan],
                           [m, pan], folder)


def test_a_span_too_long_for_memory_is_refused_with_the_limit_stated(scene, monkeypatch):
    import locate.io.audio as audio

    monkeypatch.setattr(audio, "_memory_bytes", lambda: 4.0e5)  # a machine of 400 kB
    line = _one_line_error(*run(["fix", scene, "--from", "0.0", "--to", "1.2"])[::2])
    assert "GB to hold" in line and "shorter span" in line and "rec.wav" in line, line


def test_a_batch_result_never_lands_on_a_recording(scene, tmp_path):
    site = _copy_scene(scene, tmp_path)
    before = digest([site, tmp_path / "rec.wav"])
    manifest = _manifest(tmp_path, f'[[task]]\nname = "a"\nsite = "{site.name}"\n'
                         'command = "fix"\nfrom = 0.2\nto = 0.7\noutput = "rec.wav"\n',
                         'output_dir = "."')
    line = _one_line_error(*run(["batch", manifest, "--jobs", "1"])[::2])
    assert "rec.wav" in line and "input" in line, line
    assert digest([site, tmp_path / "rec.wav"]) == before


def test_a_full_disk_in_a_child_process_is_one_line_and_keeps_the_earlier_outputs(earlier):
    # RLIMIT_FSIZE: a write past the limit fails with EFBIG (Python ignores SIGXFSZ): the
    # portable stand-in for a full disk (POSIX setrlimit).  The map is far above 8 kB.
    resource = pytest.importorskip("resource")
    site, outs = earlier
    before = digest(outs.values())

    def limit():
        resource.setrlimit(resource.RLIMIT_FSIZE, (8192, 8192))

    env = dict(os.environ, PYTHONPATH=str(REPO), PYTHONDONTWRITEBYTECODE="1",
               MPLCONFIGDIR=str(site.parent / "mpl"))
    proc = subprocess.run([sys.executable, "-m", "locate", *map(str, _fix_args(site, **outs))],
                          env=env, capture_output=True, text=True, preexec_fn=limit,
                          timeout=300)
    line = _one_line_error(proc.returncode, proc.stderr)
    assert "File too large" in line and any(str(p) in line for p in outs.values()), line
    assert digest(outs.values()) == before
    assert not [p for p in site.parent.iterdir() if p.name.endswith(".part")]


def test_os_refusals_are_one_line_naming_the_file(earlier, tmp_path):
    site, outs = earlier
    (tmp_path / "afile").write_text("x")
    (tmp_path / "adir.json").mkdir()
    long_name = tmp_path / ("n" * 300 + ".json")
    cases = [(tmp_path / "afile" / "r.json", "is a file, not a folder"),
             (tmp_path / "adir.json", "is a directory"),
             (long_name, "too long")]
    for out, words in cases:
        code, _, err = run(_fix_args(site, json=out))
        line = _one_line_error(code, err)
        assert words in line, line
    loop = tmp_path / "loop.toml"
    loop.symlink_to(loop)
    line = _one_line_error(*run(["check", loop])[::2])
    assert "loop.toml" in line and "symbolic links" in line, line


def test_an_unexpected_exception_is_internal_error_exit_1_and_debug_shows_it(scene,
                                                                              monkeypatch):
    # `check` reads the site's conditions from workflows.conditions (it loads no solver).
    import locate.workflows.conditions as conditions

    def broken(*a, **k):
        raise TypeError("unsupported operand")

    monkeypatch.setattr(conditions, "conditions_for", broken)
    code, _, err = run(["check", scene])
    line = _one_line_error(code, err, want=1)
    assert line.startswith("tdoa: error: internal error: TypeError"), line
    code, _, err = run(["--debug", "check", scene])
    assert code == 1 and "Traceback" in err


# --------------------------------------------------------------------- hostile names

def _hostile_raw(rec="rec.wav", coordinates="local"):
    geod = None
    if coordinates == "wgs84":
        geod = [frames.wgs84_from_enu(p, ORIGIN) for p in ARRAY_40M]
    raw = site_dict(ARRAY_40M, temperature_c=12.0, relative_humidity=70.0, recording=rec,
                    coordinates=coordinates, geodetic=geod, title=TITLE)
    for m, name in zip(raw["mics"], HOSTILE):
        m["name"] = name
    raw["receivers"] = [{"name": "$No. 14\\ =A1", "x": 30.0, "y": 40.0, "z": 1.5}] \
        if coordinates == "local" else []
    return raw


@pytest.mark.parametrize("coordinates", ["local", "wgs84"])
def test_hostile_names_pass_through_every_output_format_as_text(scene, tmp_path, coordinates):
    (tmp_path / "rec.wav").write_bytes((scene.parent / "rec.wav").read_bytes())
    raw = _hostile_raw(coordinates=coordinates)
    site = write_site_dict(tmp_path / "site.toml", raw)
    code, _, err = run(["check", site])
    if code == 2 and "receivers" in err:
        raw.pop("receivers")
        site = write_site_dict(tmp_path / "site.toml", raw)
    outs = {"json": tmp_path / "r.json", "csv": tmp_path / "r.csv", "map": tmp_path / "m.svg"}
    if coordinates == "wgs84":
        outs["geojson"] = tmp_path / "r.geojson"
    code, _, err = run(_fix_args(site, **outs) + ["--no-reject"])
    assert code == 0, err
    doc = json.loads(outs["json"].read_text())
    assert [m["name"] for m in doc["mics"]] == HOSTILE  # JSON: the names as written
    svg = outs["map"].read_text()
    assert "&lt;script&gt;" in svg and "<script>" not in svg  # SVG: escaped text (XML 1.0)
    assert "麦克风" in svg and "$x^2$" in svg  # shown as typed, not parsed as mathtext
    rows = list(csv.reader(io.StringIO(outs["csv"].read_text())))
    assert float(rows[1][1]) == pytest.approx(doc["fixes"][0]["position_m"][0], abs=1e-3)
    if coordinates == "wgs84":
        gj = json.loads(outs["geojson"].read_text())
        names = {f["properties"].get("name") for f in gj["features"]}
        assert set(HOSTILE) <= names
    png = tmp_path / "m.png"
    assert run(["map", site, outs["json"], "-o", png])[0] == 0
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    html = tmp_path / "report.html"
    code, _, err = run(["report", site, outs["json"], "-o", html, "--title", TITLE])
    assert code == 0, err
    text = html.read_text()
    assert "<script>alert" not in text and "&lt;script&gt;alert(1)&lt;/script&gt;" in text


def test_csv_cells_that_a_spreadsheet_would_run_are_neutralised_numbers_stay_numbers():
    # OWASP "CSV Injection": prefix cells starting with = + - @ tab CR with a single quote
    from locate.results.documents import fixes_csv

    fix = {"t_s": 1.5, "position_m": [-3.0, -12.25, 0.5], "residual_rms_s": 1e-5,
           "p_value": 0.5, "ellipse95": {"semi_major_m": 1.0, "semi_minor_m": 0.5,
                                         "azimuth_deg": -10.0}}
    for first in ("=", "+", "-", "@", "\t", "\r"):
        rows = list(csv.reader(io.StringIO(fixes_csv({"fixes": [
            dict(fix, rejected_mics=[first + "cmd|' /C calc'!A0"],
                 warnings=[first + "1+1"])]}))))
        row = dict(zip(rows[0], rows[1]))
        shown = " " if first == "\r" else first  # a CR would end the row: made a space
        assert row["rejected_mics"].startswith("'" + shown), row
        assert row["warnings"].startswith("'" + shown), row
        assert row["x_m"] == "-3.000" and row["y_m"] == "-12.250"  # ours: still numbers
        assert row["azimuth95_deg"] == "-10.000"
    rows = list(csv.reader(io.StringIO(fixes_csv({"fixes": [
        dict(fix, rejected_mics=["M3"], warnings=["mic said"])]}))))
    assert rows[1][7] == "M3" and rows[1][10] == "mic said"  # plain text untouched


def test_mathtext_is_never_parsed_from_user_text():
    # matplotlib reads a string with an even number of unescaped $ as mathtext
    from matplotlib.figure import Figure

    from locate.draw import kit as mk
    from locate.draw.figures import figure_bytes

    for text in ("$\\frac{$", "a\\b $x", "$$", "\\$1$"):
        fig = Figure()
        fig.text(0.1, 0.5, mk.plain(text))
        assert figure_bytes(fig, "png")[:4] == b"\x89PNG"
        from matplotlib import rc_context
        with rc_context(mk.STYLE):
            fig2 = Figure()
            t = fig2.text(0.1, 0.5, text)
        assert b"<svg" in figure_bytes(fig2, "svg")
        assert t.get_text() == text


# --------------------------------------------------------------------- odd input files

def _run_child(args, timeout=60):
    env = dict(os.environ, PYTHONPATH=str(REPO))
    return subprocess.run([sys.executable, "-m", "locate", *map(str, args)], env=env,
                          capture_output=True, text=True, timeout=timeout)


def test_a_fifo_recording_or_site_file_and_dev_zero_are_refused_without_waiting(scene,
                                                                                tmp_path):
    fifo = tmp_path / "rec.wav"
    os.mkfifo(fifo)
    site = tmp_path / "site.toml"
    site.write_text(scene.read_text())
    proc = _run_child(["check", site])  # the timeout fails the test if it waits on the FIFO
    line = _one_line_error(proc.returncode, proc.stderr)
    assert "rec.wav" in line and "not a regular file" in line, line
    pipe_site = tmp_path / "pipe.toml"
    os.mkfifo(pipe_site)
    proc = _run_child(["check", pipe_site])
    assert "not a regular file" in _one_line_error(proc.returncode, proc.stderr)
    if os.path.exists("/dev/zero"):
        p = _run_child(["check", "/dev/zero"])
        assert "not a regular file" in _one_line_error(p.returncode, p.stderr)


def test_a_byte_order_mark_at_the_start_of_a_site_file_is_accepted(scene, tmp_path):
    site = _copy_scene(scene, tmp_path)
    site.write_bytes(b"\xef\xbb\xbf" + site.read_bytes())
    code, out, err = run(["check", site])
    assert code == 0, err
    assert "5 mics" in out


def test_ogg_audio_in_a_wav_file_is_named(scene, tmp_path):
    site = _copy_scene(scene, tmp_path)
    x, fs = soundfile.read(tmp_path / "rec.wav", always_2d=True)
    soundfile.write(tmp_path / "rec.wav", x * 0.5, fs, format="OGG", subtype="VORBIS")
    code, _, err = run(["check", site])
    assert code == 0, err
    assert "rec.wav holds OGG audio but is named .wav" in err


def test_a_truncated_flac_is_one_line_naming_the_file(scene, tmp_path):
    # a copy cut in half: libsndfile reads the header's length, then "flac decoder lost sync"
    x, fs = soundfile.read(scene.parent / "rec.wav", always_2d=True)
    flac = tmp_path / "rec.flac"
    soundfile.write(flac, np.tile(x, (8, 1)) * 0.5, fs, subtype="PCM_16")
    data = flac.read_bytes()
    flac.write_bytes(data[: len(data) // 2])
    site = tmp_path / "site.toml"
    site.write_text(scene.read_text().replace("rec.wav", "rec.flac"))
    for args in (["fix", site, "--from", "0.2", "--to", "9.0", "--source-z", "0.5"],
                 ["check", site]):
        line = _one_line_error(*run(args)[::2])
        assert "rec.flac" in line and "could not decode" in line and "damaged" in line, line


def test_a_mic_is_silent_only_if_it_is_zero_over_the_whole_span_read(tmp_path):
    # 70 s of digital silence, then a bang: the first 60 s block is all zeros at every mic
    x = np.zeros((5, int(75 * 8000)))
    wf = Waveform(kind="impulse", band_hz=(200.0, 3000.0), duration_s=0.08, rms_pa_at_1m=5.0)
    sim = simulate_events(ARRAY_40M, [Emission(SOURCE_M, 0.2, wf)], sample_rate_hz=8000.0,
                          duration_s=1.0, rng=np.random.default_rng(2))
    x[:, 70 * 8000: 71 * 8000] = sim.signals
    site = write_site(tmp_path, ARRAY_40M, x, 8000.0)
    code, out, err = run(["check", site])
    assert code == 0, err
    assert "silent" not in err and "no dead, silent or clipped channel" in out
    y = x.copy()
    y[2] = 0.0  # M3 really is dead over the whole span
    site = write_site(tmp_path, ARRAY_40M, y, 8000.0)
    code, out, err = run(["check", site])
    assert 'mic "M3": silent (all samples zero)' in err and err.count("silent (all") == 1


@pytest.mark.parametrize("frames_, rate, words", [(1, 48000.0, "too short"),
                                                  (40, 1.0, "too low")])
def test_check_says_recordings_that_cannot_locate_anything(tmp_path, frames_, rate, words):
    x = np.random.default_rng(1).standard_normal((5, frames_)) * 0.1
    site = write_site(tmp_path, ARRAY_40M, x, rate)
    code, out, err = run(["check", site])
    assert code == 0, err
    assert words in err and "look usable" not in out


# --------------------------------------------------------------------- option values

@pytest.mark.parametrize("option, value", [("--source-z", "nan"), ("--window", "inf"),
                                           ("--from", "nan"), ("--sound-speed", "-inf"),
                                           ("--threshold", "NaN"), ("--to", "1e999")])
def test_non_finite_option_values_are_refused_naming_the_option(scene, option, value):
    args = ["fix", scene, option, value]
    if option == "--window":
        args += ["--from", "0.1", "--to", "1.0"]
    line = _one_line_error(*run(args)[::2])
    assert option in line and "finite" in line, line


# --------------------------------------------------------------------- results read back

@pytest.fixture()
def result_file(earlier):
    site, outs = earlier
    return site, json.loads(outs["json"].read_text())


@pytest.mark.parametrize("change, field", [
    (lambda d: d["fixes"][0].update(position_m=None), "fixes[0].position_m"),
    (lambda d: d["fixes"][0].update(position_m=[1.0, float("inf"), 0.0]),
     "fixes[0].position_m[1]"),
    (lambda d: d["fixes"][0].update(position_m=[1.0, float("nan"), 0.0]),
     "fixes[0].position_m[1]"),
    (lambda d: d["fixes"][0].update(t_s="12.5"), "fixes[0].t_s"),
    (lambda d: d.update(fixes={"a": 1}), "fixes"),
    (lambda d: d["mics"][1].update(position_m=["x", 0, 0]), "mics[1].position_m[0]"),
])
def test_a_damaged_result_is_one_line_naming_the_file_and_field(result_file, tmp_path, change,
                                                                field):
    site, doc = result_file
    change(doc)
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps(doc))  # allow_nan: writes Infinity / NaN as Python does
    for args in (["map", site, bad, "-o", tmp_path / "m.png"], ["level", site, bad],
                 ["report", site, bad, "-o", tmp_path / "r.html"]):
        line = _one_line_error(*run(args)[::2])
        assert str(bad) in line and field in line, (args[0], line)
    assert not (tmp_path / "m.png").exists() and not (tmp_path / "r.html").exists()


def test_deeply_nested_or_piped_result_files_are_refused(earlier, tmp_path):
    site, _ = earlier
    deep = tmp_path / "deep.json"
    deep.write_text("[" * 100000 + "]" * 100000)
    line = _one_line_error(*run(["map", site, deep, "-o", tmp_path / "m.png"])[::2])
    assert "deep.json" in line and "nested too deeply" in line, line
    pipe = tmp_path / "pipe.json"
    os.mkfifo(pipe)
    p = _run_child(["map", site, pipe, "-o", tmp_path / "m.png"])
    assert "not a regular file" in _one_line_error(p.returncode, p.stderr)


# --------------------------------------------------------------------- batch

def _manifest(folder, body, defaults='output_dir = "out"'):
    path = Path(folder) / "jobs.toml"
    path.write_text(f"[defaults]\n{defaults}\n\n{body}")
    return path


def test_batch_names_and_outputs_stay_inside_the_batch_folder(scene, tmp_path):
    inner = tmp_path / "project"
    inner.mkdir()
    site = _copy_scene(scene, inner)
    (tmp_path / "elsewhere").mkdir()
    (inner / "escape").symlink_to(tmp_path / "elsewhere")
    task = f'[[task]]\nsite = "{site.name}"\ncommand = "fix"\nfrom = 0.2\nto = 0.7\n'
    cases = [
        (task + 'name = "../../evil"\n', 'output_dir = "out"', "task[1].name"),
        (task + 'name = "a"\noutput = "../a.json"\n', 'output_dir = "out"', "task[1].output"),
        (task + f'name = "a"\noutput = "{tmp_path / "elsewhere" / "a.json"}"\n',
         'output_dir = "out"', "task[1].output"),
        (task + 'name = "a"\n', 'output_dir = "../outside"', "defaults.output_dir"),
        (task + 'name = "a"\n', 'output_dir = "escape"', "defaults.output_dir"),
        (task + 'name = "a"\noutput = "batch-summary.json"\n', 'output_dir = "out"',
         "task[1].output"),
        (task + 'name = "a"\noutput = "../jobs.toml"\n', 'output_dir = "."',
         "task[1].output"),
    ]
    for body, defaults, field in cases:
        manifest = _manifest(inner, body, defaults)
        line = _one_line_error(*run(["batch", manifest, "--jobs", "1"])[::2])
        assert field in line, line
    assert sorted(p.name for p in (tmp_path / "elsewhere").iterdir()) == []
    assert sorted(p.name for p in tmp_path.iterdir()) == ["elsewhere", "project"]
    # the summary given on the command line may not be a task's result
    manifest = _manifest(inner, task + 'name = "a"\n')
    line = _one_line_error(*run(["batch", manifest, "--summary", inner / "out" / "a.json"])
                           [::2])
    assert "task 'a'" in line, line


def _group_pids(pgid):
    out = subprocess.run(["pgrep", "-g", str(pgid)], capture_output=True, text=True).stdout
    return [int(p) for p in out.split()]


@pytest.mark.skipif(sys.platform != "linux", reason="counts processes with pgrep -g (Linux)")
def test_sigterm_stops_a_batch_kills_its_workers_and_resume_finishes(tmp_path):
    # 6 event scans of 150 s of noise at 4 kHz on 2 workers: SIGTERM once 2 are written
    rng = np.random.default_rng(5)
    x = 2e-3 * rng.standard_normal((5, 150 * 4000))
    site = write_site(tmp_path, ARRAY_40M, x, 4000.0)
    body = "".join(f'[[task]]\nname = "scan-{k}"\nsite = "{site.name}"\ncommand = "events"\n\n'
                   for k in range(6))
    manifest = _manifest(tmp_path, body)
    env = dict(os.environ, PYTHONPATH=str(REPO))
    proc = subprocess.Popen([sys.executable, "-m", "locate", "batch", str(manifest), "--jobs",
                             "2"], env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, start_new_session=True)
    out = tmp_path / "out"
    most = 0
    while not out.exists() or len(list(out.glob("scan-*.json"))) < 1:
        most = max(most, len(_group_pids(proc.pid)))
        if proc.poll() is not None:
            pytest.fail(f"the batch ended first:\n{proc.stderr.read()}")
        time.sleep(0.05)
    most = max(most, len(_group_pids(proc.pid)))
    assert most >= 3  # the batch and its 2 workers (and multiprocessing's resource tracker)
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 143, err
    assert "Traceback" not in err and "rerun with --resume" in err
    deadline = time.time() + 10
    while _group_pids(proc.pid) and time.time() < deadline:
        time.sleep(0.1)
    assert _group_pids(proc.pid) == []  # no orphan worker
    kept = sorted(p.name for p in out.iterdir())
    assert 1 <= len(kept) < 6 and all(n.startswith("scan-") for n in kept), kept
    code, stdout, err = run(["batch", manifest, "--resume", "--jobs", "1"])
    assert code in (0, 1), err  # noise only: events may find nothing (exit 1)
    assert f"{len(kept)} skipped" in stdout
    assert len(list(out.glob("scan-*.json"))) == 6


# --------------------------------------------------------------------- more odd paths

def test_an_output_that_is_a_pipe_or_device_is_refused(earlier, tmp_path):
    site, _ = earlier
    fifo = tmp_path / "out.json"
    os.mkfifo(fifo)
    line = _one_line_error(*run(_fix_args(site, json=fifo))[::2])
    assert "device, pipe or socket" in line and "--json" in line, line
    assert not fifo.is_file() and fifo.exists()  # still the FIFO it was


def test_a_damaged_sketch_layer_is_refused_before_the_fix(earlier):
    site, outs = earlier
    (site.parent / "layer.geojson").write_text('{"type": "FeatureCollection", "features": [')
    site.write_text(site.read_text() + '\n[sketch]\ngeojson = "layer.geojson"\n')
    before = digest(outs.values())
    line = _one_line_error(*run(_fix_args(site, **outs))[::2])
    assert "layer.geojson" in line, line
    assert digest(outs.values()) == before


def test_a_file_name_that_is_not_utf8_and_a_closed_pipe_give_no_traceback(earlier, tmp_path):
    site, _ = earlier
    name = os.fsdecode(b"r\xff\xfe.json")  # bytes no UTF-8 decoder takes (surrogate escapes)
    env = dict(os.environ, PYTHONPATH=str(REPO), LC_ALL="C.UTF-8", PYTHONIOENCODING="utf-8")
    proc = subprocess.run([sys.executable, "-m", "locate", *map(str, _fix_args(site)),
                           "--json", os.fsencode(tmp_path / name)], env=env,
                          capture_output=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert b"Traceback" not in proc.stderr
    assert (tmp_path / name).is_file()
    assert b"Result written to" in proc.stdout
    # the reader of stdout goes away before tdoa writes (tdoa check ... | head -0)
    proc = subprocess.Popen([sys.executable, "-m", "locate", "check", str(site)], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    proc.stdout.close()
    with proc.stderr:
        err = proc.stderr.read()
    proc.wait(timeout=120)
    assert b"Traceback" not in err and b"Exception ignored" not in err, err
    assert b"error" not in err and proc.returncode == 1, err  # stopped quietly


def test_a_recording_that_is_a_symlink_loop_is_one_line_naming_it(scene, tmp_path):
    # pathlib raises RuntimeError("Symlink loop") on resolve(): it must not become internal
    site = tmp_path / "site.toml"
    site.write_text(scene.read_text())
    (tmp_path / "rec.wav").symlink_to(tmp_path / "rec.wav")
    line = _one_line_error(*run(["check", site])[::2])
    assert "rec.wav" in line and "symbolic link" in line and "recording.file" in line, line
