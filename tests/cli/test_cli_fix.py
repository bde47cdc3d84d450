"""The ``tdoa fix`` / ``check`` / ``events`` commands end to end on simulated recordings."""

import json

import numpy as np
import pytest

from locate.synth import Emission, Waveform, simulate_events
from tests.cli_helpers import digest, run, write_site
from tests.scenes import ARRAY_40M

BANGS = [((8.0, 30.0, 0.5), 0.4), ((33.0, 6.0, 0.5), 1.6), ((22.0, 50.0, 0.5), 2.9),
         ((-15.0, 12.0, 0.5), 4.1)]


@pytest.fixture(scope="module")
def bang_site(tmp_path_factory):
    """Four impulsive events at different positions with a ground reflection (Q = 0.8)."""
    folder = tmp_path_factory.mktemp("bangs")
    rng = np.random.default_rng(42)
    events = [Emission(np.array(p), t, Waveform(kind="impulse", band_hz=(150.0, 5000.0),
                                                duration_s=0.08, rms_pa_at_1m=5.0))
              for p, t in BANGS]
    sim = simulate_events(ARRAY_40M, events, sample_rate_hz=48000.0, duration_s=5.0,
                          temperature_c=12.0, relative_humidity=70.0, ground_reflection=0.8,
                          noise_rms=0.002, rng=rng)
    return write_site(folder, ARRAY_40M, sim.signals, 48000.0)


def test_every_impulsive_event_is_found_and_fixed_within_a_metre(bang_site, tmp_path):
    out = tmp_path / "fix.json"
    before = digest([bang_site, bang_site.parent / "rec.wav"])
    code, stdout, stderr = run(["fix", bang_site, "--source-z", "0.5", "--json", out])
    assert code == 0, stderr
    result = json.loads(out.read_text())
    assert result["schema"] == "tdoa-result/1" and result["kind"] == "fix"
    fixes = result["fixes"]
    assert len(fixes) == len(BANGS)
    for f, (p, _) in zip(sorted(fixes, key=lambda f: f["t_s"]), BANGS):
        assert np.linalg.norm(np.array(f["position_m"][:2]) - np.array(p[:2])) < 1.0
        assert set(f["ellipse95"]) == {"semi_major_m", "semi_minor_m", "azimuth_deg"}
        assert np.array(f["covariance_m2"]).shape == (3, 3)
    assert "x " in stdout and "95 % ellipse" in stdout
    assert digest([bang_site, bang_site.parent / "rec.wav"]) == before  # inputs untouched


def test_a_span_gives_one_fix_and_csv(bang_site, tmp_path):
    csv = tmp_path / "fix.csv"
    code, stdout, stderr = run(["fix", bang_site, "--from", 1.5, "--to", 2.0, "--source-z", 0.5,
                                "--csv", csv, "--band", "150:5000"])
    assert code == 0, stderr
    rows = csv.read_text().strip().splitlines()
    assert len(rows) == 2 and rows[0].startswith("t_s,x_m,y_m")
    x, y = map(float, rows[1].split(",")[1:3])
    assert abs(x - 33.0) < 1.0 and abs(y - 6.0) < 1.0


def test_check_prints_the_geometry(bang_site):
    code, stdout, _ = run(["check", bang_site])
    assert code == 0
    assert "5 mics" in stdout and "48000 Hz" in stdout


def test_check_reads_the_signals_and_names_a_dead_mic(bang_site, tmp_path):
    # common practice: a channel 40 dB or more below the others is dead or unplugged
    import soundfile
    x, fs = soundfile.read(bang_site.parent / "rec.wav", always_2d=True)
    x[:, 3] *= 1e-5  # M4 at -100 dB
    soundfile.write(tmp_path / "rec.wav", x, fs, subtype="FLOAT")
    site = tmp_path / "site.toml"
    site.write_text(bang_site.read_text())
    code, stdout, stderr = run(["check", site])
    assert code == 0, stderr
    assert 'mic "M4"' in stderr and "dead or unplugged" in stderr
    assert "look usable" not in stdout and "channel warnings" in stdout
    code, stdout, _ = run(["check", bang_site])
    assert "no dead, silent or clipped channel" in stdout and "look usable" in stdout
    # fix says it once, with the fix (not again at the top level with other figures)
    code, _, stderr = run(["fix", site, "--from", 1.5, "--to", 2.0, "--source-z", 0.5])
    assert stderr.count("dead or unplugged") == 1, stderr


def test_events_lists_every_bang(bang_site):
    code, stdout, stderr = run(["events", bang_site])
    assert code == 0, stderr
    assert stdout.startswith(f"{len(BANGS)} event(s)")


@pytest.mark.parametrize("args, field", [
    (["--band", "4000:100"], "--band"),
    (["--band", "abc"], "--band"),
    (["--band", "100:30000"], "--band"),
    (["--from", "1.0"], "--to"),
    (["--from", "2.0", "--to", "1.0"], "--from"),
    (["--from", "1.0", "--to", "99.0"], "--to"),
    (["--from", "0", "--to", "1", "--window", "-1"], "--window"),
    (["--from", "0", "--to", "1", "--window", "5"], "--window"),
    (["--json", "/no/such/folder/out.json"], "--json"),
    (["--sound-speed", "1000"], "--sound-speed"),
])
def test_bad_options_exit_2_with_one_line_naming_the_field(bang_site, args, field):
    code, stdout, stderr = run(["fix", bang_site, *args])
    assert code == 2
    lines = stderr.strip().splitlines()
    assert len(lines) == 1 and field in lines[0], stderr
    assert "Traceback" not in stderr


def test_output_equal_to_an_input_is_refused(bang_site):
    before = digest([bang_site])
    code, _, stderr = run(["fix", bang_site, "--json", bang_site])
    assert code == 2 and "input" in stderr
    assert digest([bang_site]) == before


def test_debug_shows_a_traceback(bang_site):
    code, _, stderr = run(["--debug", "fix", bang_site, "--band", "9:1"])
    assert code == 2 and "Traceback" in stderr


def test_silence_finds_nothing_and_exits_1(tmp_path):
    rng = np.random.default_rng(0)
    site = write_site(tmp_path, ARRAY_40M, 1e-3 * rng.normal(size=(5, 48000)), 48000.0)
    out = tmp_path / "r.json"
    code, _, stderr = run(["fix", site, "--json", out])
    assert code == 1 and "no event" in stderr
    assert not out.exists()
