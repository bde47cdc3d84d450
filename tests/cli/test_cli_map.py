"""``tdoa map`` end to end: formats, one fix with its hyperbolae, bad inputs (issue 4)."""

import json

import numpy as np
import pytest

from locate.synth import Emission, Waveform, simulate_events
from tests.cli_helpers import run, write_site
from tests.scenes import ARRAY_40M


@pytest.fixture(scope="module")
def fixed(tmp_path_factory):
    folder = tmp_path_factory.mktemp("map")
    rng = np.random.default_rng(12)
    ev = [Emission(np.array([14.0, 21.0, 0.0]), 0.3,
                   Waveform(kind="impulse", band_hz=(150.0, 5000.0), duration_s=0.06,
                            rms_pa_at_1m=5.0))]
    sim = simulate_events(ARRAY_40M, ev, sample_rate_hz=48000.0, duration_s=1.2,
                          noise_rms=0.01, rng=rng)
    site = write_site(folder, ARRAY_40M, sim.signals, 48000.0)
    result = folder / "fix.json"
    code, _, err = run(["fix", site, "--json", result, "--panels", folder / "p.png"])
    assert code == 0, err
    return site, result


@pytest.mark.parametrize("ext", ["png", "svg", "pdf"])
def test_map_is_written_in_each_format(fixed, tmp_path, ext):
    site, result = fixed
    out = tmp_path / f"map.{ext}"
    code, stdout, err = run(["map", site, result, "-o", out, "--fix", 1])
    assert code == 0, err
    assert out.stat().st_size > 10_000
    assert not list(tmp_path.glob(".*.part"))


def test_map_refuses_a_result_of_another_schema(fixed, tmp_path):
    site, _ = fixed
    bad = tmp_path / "other.json"
    bad.write_text(json.dumps({"schema": "not-ours/3", "fixes": []}))
    code, _, err = run(["map", site, bad, "-o", tmp_path / "m.png"])
    assert code == 2 and "schema" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "m.png").exists()


def test_map_refuses_a_missing_sketch_image(fixed, tmp_path):
    site, result = fixed
    other = tmp_path / "with_image.toml"
    text = site.read_text().replace('file = "rec.wav"', f'file = "{site.parent / "rec.wav"}"')
    other.write_text(text + '\n[sketch]\nimage = "gone.png"\n'
                     "refs = [ { pixel = [0, 0], at = [0.0, 0.0] }, "
                     "{ pixel = [100, 0], at = [50.0, 0.0] } ]\n")
    code, _, err = run(["map", other, result, "-o", tmp_path / "m.png"])
    assert code == 2 and "sketch.image" in err


def test_map_refuses_too_few_control_points(fixed, tmp_path):
    site, result = fixed
    other = tmp_path / "one_ref.toml"
    img = tmp_path / "plan.png"
    from matplotlib.figure import Figure
    Figure(figsize=(2, 2)).savefig(img)
    text = site.read_text().replace('file = "rec.wav"', f'file = "{site.parent / "rec.wav"}"')
    other.write_text(text + f'\n[sketch]\nimage = "{img}"\n'
                     "refs = [ { pixel = [0, 0], at = [0.0, 0.0] } ]\n")
    code, _, err = run(["map", other, result, "-o", tmp_path / "m.png"])
    assert code == 2 and "refs" in err


def test_map_fix_number_out_of_range(fixed, tmp_path):
    site, result = fixed
    code, _, err = run(["map", site, result, "-o", tmp_path / "m.png", "--fix", 9])
    assert code == 2 and "--fix" in err
