"""A corpus of bad inputs run through the ``tdoa`` command line, end to end.

Every case starts from one small, valid invented scene (five mics of ``ARRAY_40M``, one bang,
2 s at 16 kHz), breaks one thing - the site file, a recording, the geometry or the command
line - and runs the command.  For each case we check:

* the exit code: 2 for bad input, 1 when the input is valid but nothing usable is found, 0 for
  doubtful-but-usable input (which must then warn, on stderr and in the result JSON);
* an error is exactly one line on stderr, ``tdoa: error: FILE: FIELD: message``, that names the
  file and the field or value and says what to do; never a traceback;
* no result file and no temporary file (``.NAME.*.part``) is left behind by a failed run;
* every input file is byte-identical afterwards (sha256 before and after).

The expected messages are the project's own contract (docs/architecture.md, "Errors"); the
physical plausibility limits they quote are common practice for outdoor surveys.
"""

from __future__ import annotations

import json
import shutil
import struct
from dataclasses import dataclass

import numpy as np
import pytest
import soundfile

from locate.synth import Emission, Waveform, simulate_events
from tests.cli_helpers import digest, run, write_site
from tests.scenes import ARRAY_40M

RATE_HZ = 16000.0
DURATION_S = 2.0
SOURCE_M = (12.0, 25.0, 0.0)
BANG = Waveform(kind="impulse", band_hz=(150.0, 4000.0), duration_s=0.08, rms_pa_at_1m=5.0)


def _simulate(mics, source_m=SOURCE_M, *, duration_s=DURATION_S, rms_pa=5.0, seed=11):
    wf = Waveform(kind="impulse", band_hz=(150.0, 4000.0), duration_s=0.08, rms_pa_at_1m=rms_pa)
    sim = simulate_events(np.asarray(mics, float), [Emission(np.array(source_m), 0.4, wf)],
                          sample_rate_hz=RATE_HZ, duration_s=duration_s, temperature_c=12.0,
                          relative_humidity=70.0, noise_rms=0.002,
                          rng=np.random.default_rng(seed))
    return sim.signals


@pytest.fixture(scope="module")
def base_scene(tmp_path_factory):
    """A valid site + multichannel float WAV; every case works on a copy."""
    folder = tmp_path_factory.mktemp("base")
    write_site(folder, ARRAY_40M, _simulate(ARRAY_40M), RATE_HZ)
    return folder


# ------------------------------------------------------------------------------ case helpers

def _edit(folder, old, new, *, name="site.toml", count=1):
    p = folder / name
    text = p.read_text()
    assert old in text, (old, text)
    p.write_text(text.replace(old, new, count))


def _keep_mics(folder, n):
    """Keep only the first n [[mics]] tables of the site file."""
    p = folder / "site.toml"
    head, *mics = p.read_text().split("[[mics]]")
    p.write_text("[[mics]]".join([head, *mics[:n]]))


def _rewrite_scene(folder, mics, signals, **kw):
    for p in folder.iterdir():
        p.unlink()
    write_site(folder, mics, signals, RATE_HZ, **kw)


def _per_mic_files(folder, rates_hz):
    """Replace the multichannel recording by one file per mic (``mK.wav``) at ``rates_hz``."""
    data, rate = soundfile.read(folder / "rec.wav", always_2d=True)
    (folder / "rec.wav").unlink()
    for k, r in enumerate(rates_hz, 1):
        soundfile.write(folder / f"m{k}.wav", data[:: int(rate // r), k - 1], int(r),
                        subtype="FLOAT")
    text = (folder / "site.toml").read_text().replace('[recording]\nfile = "rec.wav"\n', "")
    for k in range(1, len(rates_hz) + 1):
        text = text.replace(f"channel = {k}\n", f'file = "m{k}.wav"\n')
    (folder / "site.toml").write_text(text)


def _set_channel(folder, k, values):
    """Overwrite channel k (1-based) of rec.wav with ``values`` (full scale = 1)."""
    data, rate = soundfile.read(folder / "rec.wav", always_2d=True)
    data[:, k - 1] = values(data[:, k - 1])
    soundfile.write(folder / "rec.wav", data, rate, subtype="FLOAT")


def _wav_data_size_offset(raw: bytes) -> int:
    """Byte offset of the size field of the RIFF 'data' chunk (RIFF/WAVE layout, Microsoft)."""
    i = raw.find(b"data", 12)
    assert i > 0
    return i + 4


# ------------------------------------------------------------------------------------ cases

@dataclass
class Case:
    """One bad input: how to break the scene, the command, and what must come back."""

    id: str
    build: object  # callable(folder) -> None
    args: tuple = ("fix", "{site}", "--json", "{out}")
    code: int = 2
    where: tuple = ()  # each must appear in the error line (file name, field or value)
    advice: tuple = ()  # each must appear too: what is wrong and what to do
    warns: tuple = ()  # code 0: each must appear in a warning on stderr and in the JSON
    truth: tuple | None = None  # code 0: the fix must find the source ...
    tol_m: float | None = None  # ... within this distance (None: inside its 95 % ellipse)
    extra_files: tuple = ()  # files a successful run writes besides --json


def _nothing(folder):
    pass


# Layouts for the geometry cases (invented; metres, x east, y north, z up).
LINE = np.array([[0.0, 0.0, 1.2], [15.0, 0.0, 1.2], [30.0, 0.0, 1.2], [45.0, 0.0, 1.2],
                 [60.0, 0.0, 1.2]])
TWIN = ARRAY_40M.copy()
TWIN[4] = TWIN[1] + [0.004, 0.0, 0.0]  # M5 4 mm from M2: the same position entered twice
FAR_M = (560.0, 420.0, 0.0)  # 700 m from a 40 m array

CASES = [
    # ---------------------------------------------------------------- site files
    Case("site-toml-syntax-error",
         lambda f: _edit(f, "temperature_c = 12.0", "temperature_c = = 12.0"),
         where=("site.toml", "line 5"), advice=("TOML syntax error", "fix that line")),
    Case("site-decimal-comma-bare",
         lambda f: _edit(f, "temperature_c = 12.0", "temperature_c = 6,5"),
         where=("site.toml", "line 5"), advice=("decimal comma", "6.5")),
    Case("site-decimal-comma-quoted",
         lambda f: _edit(f, "temperature_c = 12.0", 'temperature_c = "6,5"'),
         where=("site.toml", "air.temperature_c"), advice=("decimal comma", "6.5")),
    Case("site-number-as-word",
         lambda f: _edit(f, "relative_humidity = 70.0", 'relative_humidity = "damp"'),
         where=("site.toml", "air.relative_humidity"), advice=("must be a number",)),
    Case("site-boolean-coordinate",
         lambda f: _edit(f, "x = 40.0", "x = true"),
         where=("site.toml", "mics[1].x"), advice=("must be a number", "boolean")),
    Case("site-temperature-in-kelvin",
         lambda f: _edit(f, "temperature_c = 12.0", "temperature_c = 290"),
         where=("site.toml", "air.temperature_c", "290"), advice=("kelvin", "16.85")),
    Case("site-pressure-in-pascals",
         lambda f: _edit(f, "relative_humidity = 70.0",
                         "relative_humidity = 70.0\npressure_kpa = 101325"),
         where=("site.toml", "air.pressure_kpa", "101325"), advice=("pascals", "101.325")),
    Case("site-missing-air-table",
         lambda f: _edit(f, "[air]\ntemperature_c = 12.0\nrelative_humidity = 70.0\n", ""),
         where=("site.toml", "air"), advice=("missing [air]", "add it")),
    Case("site-missing-mic-z",
         lambda f: _edit(f, "z = 1.1\n", ""),
         where=("site.toml", "mics[2].z"), advice=("missing", "height", "M3")),
    Case("site-unknown-key",
         lambda f: _edit(f, "relative_humidity = 70.0", "relative_humidty = 70.0"),
         where=("site.toml", "air.relative_humidty"), advice=('did you mean "relative_humidity"',)),
    Case("site-duplicate-mic-name",
         lambda f: _edit(f, 'name = "M4"', 'name = "M2"'),
         where=("site.toml", "mics[3].name", '"M2"'), advice=("duplicate", "its own name")),
    Case("site-nan-coordinate",
         lambda f: _edit(f, "y = 35.0", "y = nan"),
         where=("site.toml", "mics[2].y"), advice=("finite number",)),
    Case("site-absurd-humidity",
         lambda f: _edit(f, "relative_humidity = 70.0", "relative_humidity = 700"),
         where=("site.toml", "air.relative_humidity", "700"), advice=("0..100", "percent")),
    Case("site-absurd-wind",
         lambda f: _edit(f, "relative_humidity = 70.0",
                         "relative_humidity = 70.0\nwind_speed_mps = 90"),
         where=("site.toml", "air.wind_speed_mps", "90"), advice=("metres per second",)),
    Case("site-absurd-coordinate",
         lambda f: _edit(f, "x = 38.0", "x = 3.8e9"),
         where=("site.toml", "mics[2].x", "3.8e+09"), advice=("beyond +/-1000 km",
                                                               "metres from a nearby origin")),
    Case("site-channel-out-of-range",
         lambda f: _edit(f, "channel = 5", "channel = 9"),
         where=("site.toml", "mics[4].channel", "9"), advice=("does not exist", "5 channel(s)")),
    Case("site-channel-zero",
         lambda f: _edit(f, "channel = 1", "channel = 0"),
         where=("site.toml", "mics[0].channel"), advice=("count from 1",)),
    Case("site-channel-used-twice",
         lambda f: _edit(f, "channel = 4", "channel = 2"),
         where=("site.toml", "mics[3].channel"), advice=('already used by mic "M2"',)),
    Case("site-too-few-mics",
         lambda f: _keep_mics(f, 2),
         where=("site.toml", "mics"), advice=("2 mics given", "at least 3")),
    Case("site-unknown-coordinates",
         lambda f: _edit(f, 'coordinates = "local"', 'coordinates = "utm"'),
         where=("site.toml", "coordinates", "utm"), advice=('"local"', '"wgs84"')),
    Case("site-not-utf8",
         lambda f: (f / "site.toml").write_bytes(
             (f / "site.toml").read_bytes().replace(b"Fenwick", b"F\xe9nwick")),
         where=("site.toml", "line 1"), advice=("UTF-8",)),
    Case("site-file-missing",
         lambda f: (f / "site.toml").rename(f / "survey.toml"),
         where=("site.toml",), advice=("file not found", "check the path")),
    # ---------------------------------------------------------------- recordings
    Case("audio-truncated-to-a-third",
         lambda f: (f / "rec.wav").write_bytes((f / "rec.wav").read_bytes()[:214000]),
         args=("fix", "{site}", "--from", "1.0", "--to", "1.5", "--json", "{out}"),
         where=("rec.wav", "--to", "1.500"), advice=("past the end", "they last 0.66")),
    Case("audio-zero-bytes",
         lambda f: (f / "rec.wav").write_bytes(b""),
         where=("site.toml", "recording.file", "rec.wav"), advice=("as audio", "WAV or FLAC")),
    Case("audio-header-only-no-samples",
         lambda f: soundfile.write(f / "rec.wav", np.zeros((0, 5)), int(RATE_HZ)),
         where=("rec.wav", "recording.file"), advice=("no samples", "copy it again")),
    Case("audio-wrong-channel-count",
         lambda f: _set_channels(f, 3),
         where=("site.toml", "mics[3].channel"), advice=("does not exist", "3 channel(s)")),
    Case("audio-mismatched-sample-rates",
         lambda f: _per_mic_files(f, [RATE_HZ] * 4 + [RATE_HZ / 2]),
         where=("m5.wav", "sample rate"), advice=("8000 Hz differs from 16000 Hz",
                                                  "resample")),
    Case("audio-nan-samples-float-wav",
         lambda f: _set_channel(f, 3, lambda x: np.where(np.arange(x.size) % 997 == 5,
                                                          np.nan, x)),
         where=("rec.wav", "channel 3"), advice=("NaN", 'mic "M3"', "damaged", "export it again")),
    Case("audio-text-file-named-wav",
         lambda f: (f / "rec.wav").write_text("M1,M2,M3\n0.1,0.2,0.3\n"),
         where=("site.toml", "recording.file", "rec.wav"), advice=("as audio", "WAV or FLAC")),
    Case("audio-missing-file",
         lambda f: (f / "rec.wav").unlink(),
         where=("site.toml", "recording.file", "rec.wav"), advice=("file not found",)),
    Case("audio-header-claims-huge-length",
         lambda f: _huge_header(f),
         args=("fix", "{site}", "--from", "0.3", "--to", "0.9", "--json", "{out}"),
         code=0, warns=("shorter than its header",), truth=SOURCE_M, tol_m=0.05),
    Case("audio-all-zero-channel",
         lambda f: _set_channel(f, 2, np.zeros_like),
         code=0, warns=('mic "M2": silent', "no usable correlation for mic(s) M2"),
         truth=SOURCE_M, tol_m=0.05),
    Case("audio-clipped-channel",
         lambda f: _set_channel(f, 4, lambda x: np.clip(8.0 * x, -1.0, 1.0)),
         code=0, warns=('mic "M4"', "clipped", "less gain"), truth=SOURCE_M, tol_m=0.5),
    # ---------------------------------------------------------------- geometry
    Case("geometry-all-mics-at-one-point",
         lambda f: _rewrite_scene(f, np.tile([[5.0, 5.0, 1.2]], (5, 1)),
                                  _simulate(np.tile([[5.0, 5.0, 1.2]], (5, 1)))),
         where=("site.toml", "mics"), advice=("same place", "its own measured position")),
    Case("geometry-collinear-mics",
         lambda f: _rewrite_scene(f, LINE, _simulate(LINE)),
         code=0, warns=("poor geometry", "one line", "move a mic off the line")),
    Case("geometry-coincident-mics",
         lambda f: _rewrite_scene(f, TWIN, _simulate(TWIN)),
         code=0, warns=('"M2" and "M5"', "entered twice"), truth=SOURCE_M, tol_m=0.05),
    Case("geometry-source-far-outside",
         lambda f: _rewrite_scene(f, ARRAY_40M, _simulate(ARRAY_40M, FAR_M, duration_s=4.0,
                                                          rms_pa=60.0)),
         code=0, warns=("far outside the array", "bearing", "a mic nearer the source"),
         truth=FAR_M),
    # ---------------------------------------------------------------- command line
    Case("cli-span-beyond-the-end", _nothing,
         args=("fix", "{site}", "--from", "1.5", "--to", "3.5", "--json", "{out}"),
         where=("rec.wav", "--to", "3.500"), advice=("past the end", "last 2.000 s")),
    Case("cli-span-of-three-samples", _nothing,
         args=("fix", "{site}", "--from", "0.5", "--to", "0.5002", "--json", "{out}"),
         where=("--to", "0.5000..0.5002 s"), advice=("only 3 samples", "at least 64 samples")),
    Case("cli-negative-window", _nothing,
         args=("fix", "{site}", "--from", "0", "--to", "1", "--window", "-0.5",
               "--json", "{out}"),
         where=("--window", "-0.5"), advice=("must be positive",)),
    Case("cli-negative-from", _nothing,
         args=("fix", "{site}", "--from", "-1", "--to", "1", "--json", "{out}"),
         where=("--from", "-1"), advice=("must be >= 0",)),
    Case("cli-band-inverted", _nothing,
         args=("fix", "{site}", "--band", "4000:150", "--json", "{out}"),
         where=("--band", "4000:150"), advice=("below the high edge",)),
    Case("cli-band-above-nyquist", _nothing,
         args=("fix", "{site}", "--band", "100:12000", "--json", "{out}"),
         where=("--band", "12000"), advice=("Nyquist", "8000 Hz")),
    Case("cli-output-in-missing-folder", _nothing,
         args=("fix", "{site}", "--json", "{folder}/no-such-folder/out.json"),
         where=("out.json", "--json", "no-such-folder"), advice=("does not exist",
                                                                 "create it first")),
    Case("cli-output-is-the-site-file", _nothing,
         args=("fix", "{site}", "--json", "{site}"),
         where=("site.toml", "--json"), advice=("input files", "another output path")),
    Case("cli-output-is-the-recording", _nothing,
         args=("fix", "{site}", "--csv", "{folder}/rec.wav"),
         where=("rec.wav", "--csv"), advice=("input files", "another output path")),
    Case("cli-events-output-is-the-site-file", _nothing,
         args=("events", "{site}", "--json", "{site}"),
         where=("site.toml", "--json"), advice=("input files", "another output path")),
    Case("cli-implausible-sound-speed", _nothing,
         args=("fix", "{site}", "--sound-speed", "1500", "--json", "{out}"),
         where=("--sound-speed", "1500"), advice=("250-400 m/s",)),
    Case("cli-silence-finds-nothing",
         lambda f: _rewrite_scene(f, ARRAY_40M, 2e-3 * np.random.default_rng(5).normal(
             size=(5, int(RATE_HZ * DURATION_S)))),
         args=("events", "{site}", "--json", "{out}"), code=1,
         where=("0.00 and 2.00 s",), advice=("no event", "--from/--to", "lower --threshold")),
]

def _set_channels(folder, n):
    data, rate = soundfile.read(folder / "rec.wav", always_2d=True)
    soundfile.write(folder / "rec.wav", data[:, :n], rate, subtype="FLOAT")


def _huge_header(folder):
    """Claim ~4 GB of audio in the RIFF and data chunk headers of a 2 s file."""
    raw = bytearray((folder / "rec.wav").read_bytes())
    raw[4:8] = struct.pack("<I", 0xFFFFFFF0)
    k = _wav_data_size_offset(bytes(raw))
    raw[k:k + 4] = struct.pack("<I", 0xFFFFFF00)
    (folder / "rec.wav").write_bytes(bytes(raw))


def _expand(args, folder):
    subs = {"site": str(folder / "site.toml"), "out": str(folder / "out.json"),
            "folder": str(folder)}
    return [a.format(**subs) for a in args]


def _listing(folder):
    return sorted(p.name for p in folder.rglob("*"))


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_bad_input(case, base_scene, tmp_path):
    folder = tmp_path / "scene"
    shutil.copytree(base_scene, folder)
    case.build(folder)
    before_files = _listing(folder)
    before = digest([p for p in folder.rglob("*") if p.is_file()])
    code, stdout, stderr = run(_expand(case.args, folder))
    assert "Traceback" not in stderr and "Traceback" not in stdout
    assert code == case.code, stderr
    out = folder / "out.json"
    lines = stderr.strip().splitlines()
    if case.code != 0:
        assert len(lines) == 1, stderr
        line = lines[0]
        assert line.startswith("tdoa: error: "), line
        for w in case.where + case.advice:
            assert w in line, (w, line)
        assert not out.exists()
        assert _listing(folder) == before_files  # no result, no temp file (.out.json.*.part)
    else:
        assert all(ln.startswith("tdoa: warning: ") for ln in lines), stderr
        result = json.loads(out.read_text())
        in_json = " | ".join(result["warnings"]
                             + [w for f in result.get("fixes", []) for w in f["warnings"]])
        for w in case.warns:
            assert w in stderr, (w, stderr)
            assert w in in_json, (w, in_json)
        assert _listing(folder) == sorted(before_files + ["out.json", *case.extra_files])
        if case.truth is not None:
            (f,) = result["fixes"]
            e = np.array(f["position_m"][:2]) - np.array(case.truth[:2])
            if case.tol_m is not None:
                assert np.linalg.norm(e) < case.tol_m, f["position_m"]
            else:  # honest: the truth inside the 95 % ellipse (chi-square 2 dof, scipy)
                cov = np.array(f["covariance_m2"])[:2, :2]
                assert e @ np.linalg.solve(cov, e) <= 5.991, (f["position_m"], f["ellipse95"])
    assert digest([p for p in folder.rglob("*") if p.is_file() and p.name != "out.json"]) \
        == before  # inputs byte-identical


def test_the_corpus_has_at_least_thirty_cases():
    assert len(CASES) >= 30
    assert len({c.id for c in CASES}) == len(CASES)
