"""``tdoa level`` and ``tdoa plan`` end to end (issue 6)."""

import json

import numpy as np
import pytest

from locate.physics import levels
from locate.synth import Emission, Waveform, simulate_events
from tests.cli_helpers import run, write_site

BANDS = np.array(levels.OCTAVE_BANDS_HZ)
ARRAY = np.array([[0.0, 0.0, 1.5], [60.0, 0.0, 1.5], [60.0, 55.0, 1.5], [0.0, 55.0, 1.5],
                  [30.0, 25.0, 1.5], [35.0, -20.0, 1.5]])
P_FULL_SCALE_PA = 20.0  # the recorder's 0 dBFS sine is 20 Pa rms = 120 dB SPL


@pytest.fixture(scope="module",
                params=[(-60.0, 20.0, 1.5), (120.0, 150.0, 1.5), (-180.0, 260.0, 1.5)],
                ids=["about 60 m", "about 100 m", "about 300 m"])
def level_scene(request, tmp_path_factory):
    src = np.array(request.param)
    folder = tmp_path_factory.mktemp("level")
    wave = Waveform(kind="noise", band_hz=(80.0, 5600.0), duration_s=2.0, rms_pa_at_1m=60.0)
    rng = np.random.default_rng(61)
    sim = simulate_events(ARRAY, [Emission(src, 3.5, wave)], sample_rate_hz=24000.0,
                          duration_s=7.5, temperature_c=15.0, relative_humidity=60.0,
                          noise_rms=2e-4, rng=rng)
    site = write_site(folder, ARRAY, sim.signals, 24000.0, temperature_c=15.0, humidity=60.0,
                      full_scale_pa=P_FULL_SCALE_PA * np.sqrt(2))
    text = site.read_text().replace("channel = ", "full_scale_db_spl = 120.0\nchannel = ")
    text += '\n[[receivers]]\nname = "Rook Cottage"\nx = 20.0\ny = 80.0\nz = 1.5\n'
    site.write_text(text)
    # True sound power per band: free-field Lw = Lp(1 m) + 11 dB (textbook), with Lp(1 m)
    # the band level of the emitted signal itself (locate.physics.levels on the emitted samples).
    emitted = sim.emitted_signals[0] / (P_FULL_SCALE_PA * np.sqrt(2))
    lp1 = levels.octave_band_levels_db(emitted, sim.emitted_rate_hz, full_scale_db_spl=120.0)
    return site, src, lp1 + 11.0


def test_sound_power_is_recovered_within_1_db_per_band(level_scene, tmp_path):
    site, src, lw_true = level_scene
    fix_json, lev_json = tmp_path / "fix.json", tmp_path / "lev.json"
    code, _, err = run(["fix", site, "--source-z", src[2], "--json", fix_json])
    assert code == 0, err
    fx = json.loads(fix_json.read_text())["fixes"][0]
    assert np.linalg.norm(np.array(fx["position_m"][:2]) - src[:2]) < 1.0
    code, out, err = run(["level", site, fix_json, "--json", lev_json])
    assert code == 0, err
    doc = json.loads(lev_json.read_text())
    assert doc["kind"] == "level" and doc["bands_hz"] == list(levels.OCTAVE_BANDS_HZ)
    got = np.array([np.nan if v is None else v for v in doc["source_lw_db"]])
    sel = (BANDS >= 125) & (BANDS <= 4000)
    print("Lw error per band (dB):", np.round(got[sel] - lw_true[sel], 2))
    assert np.all(np.abs(got[sel] - lw_true[sel]) <= 1.0)
    # the level is averaged over the time the source sounds: the scene's 2 s burst
    assert abs(doc["active_duration_s"] - 2.0) < 0.1, doc["active_duration_s"]
    assert doc["receivers"][0]["name"] == "Rook Cottage"
    assert doc["cautions"] and "compliance" in " ".join(doc["cautions"])
    assert "Screening estimate" in out


def test_steady_source_without_background_leaves_out_bands_outside_its_band(tmp_path):
    # A steady 300-2500 Hz source sounds through the whole recording: there is no background
    # beside it to correct with, so the bands wholly outside the band it was located in
    # (octave edges per IEC 61260-1) hold only noise and must not be back-propagated.
    # Truth as the level scene: Lw = Lp(1 m) + 11 dB (textbook), Lp(1 m) of the emitted signal.
    src = np.array([-150.0, 120.0, 1.5])
    wave = Waveform(kind="noise", band_hz=(300.0, 2500.0), duration_s=8.0, rms_pa_at_1m=60.0)
    sim = simulate_events(ARRAY, [Emission(src, -1.0, wave)], sample_rate_hz=24000.0,
                          duration_s=6.5, temperature_c=15.0, relative_humidity=60.0,
                          noise_rms=2e-3, rng=np.random.default_rng(62))
    site = write_site(tmp_path, ARRAY, sim.signals, 24000.0, temperature_c=15.0,
                      humidity=60.0, full_scale_pa=P_FULL_SCALE_PA * np.sqrt(2))
    site.write_text(site.read_text().replace("channel = ", "full_scale_db_spl = 120.0\n"
                                             "channel = "))
    emitted = sim.emitted_signals[0] / (P_FULL_SCALE_PA * np.sqrt(2))
    lw_true = levels.octave_band_levels_db(emitted, sim.emitted_rate_hz,
                                           full_scale_db_spl=120.0) + 11.0
    fix_json, lev_json = tmp_path / "fix.json", tmp_path / "lev.json"
    code, _, err = run(["fix", site, "--from", 2.0, "--to", 4.0, "--source-z", src[2],
                        "--json", fix_json])
    assert code == 0, err
    code, out, err = run(["level", site, fix_json, "--json", lev_json])
    assert code == 0, err
    assert "cross-spectra" in err
    doc = json.loads(lev_json.read_text())
    got = {b: v for b, v in zip(doc["bands_hz"], doc["source_lw_db"])}
    up = dict(zip(doc["bands_hz"], doc["source_lw_upper_db"]))
    flag = dict(zip(doc["bands_hz"], doc["source_lw_is_upper_bound"]))
    # the bands holding only noise are not levels: upper bounds that hold, never levels
    for b in (63, 4000, 8000):
        assert got[b] is None and flag[b] is True, (b, got[b])
        assert up[b] >= lw_true[list(BANDS).index(b)], (b, up[b])
    for b in (500, 1000):
        assert flag[b] is False and abs(got[b] - lw_true[list(BANDS).index(b)]) <= 1.0, b
    # the A-weighted total sums the level bands only, and says which
    assert doc["source_lwa_bands_hz"] == [b for b in BANDS.tolist() if not flag[b]]
    assert "left out" in doc["source_lwa_note"] and "<" in out


def test_level_without_calibration_is_labelled_dbfs(level_scene, tmp_path):
    site, src, _ = level_scene
    plain = tmp_path / "uncal.toml"
    plain.write_text(site.read_text().replace("full_scale_db_spl = 120.0\n", "")
                     .replace('file = "rec.wav"', f'file = "{site.parent / "rec.wav"}"'))
    fix_json, lev_json = tmp_path / "fix.json", tmp_path / "lev.json"
    assert run(["fix", plain, "--source-z", src[2], "--json", fix_json])[0] == 0
    code, out, err = run(["level", plain, fix_json, "--json", lev_json])
    assert code == 0, err
    doc = json.loads(lev_json.read_text())
    assert doc["calibrated"] is False and "full scale" in doc["units"]
    assert "dBFS" in out


def test_level_refuses_a_result_from_another_site(level_scene, tmp_path):
    site, _, _ = level_scene
    other = tmp_path / "other.json"
    other.write_text(json.dumps({"schema": "tdoa-result/1", "kind": "fix", "fixes": [],
                                 "mics": [{"name": "Q1"}, {"name": "Q2"}, {"name": "Q3"}]}))
    code, _, err = run(["level", site, other])
    assert code == 2 and "mics" in err and len(err.strip().splitlines()) == 1


def test_level_and_map_refuse_a_result_whose_same_named_mics_stand_elsewhere(level_scene,
                                                                            tmp_path):
    # common practice: a result belongs to the layout it was computed for; mics with this
    # site's names 300 m away mean another site, a few cm a re-survey (accepted)
    site, src, _ = level_scene
    fix_json = tmp_path / "fix.json"
    code, _, err = run(["fix", site, "--source-z", src[2], "--json", fix_json])
    assert code == 0, err
    doc = json.loads(fix_json.read_text())
    for m in doc["mics"]:
        m["position_m"][0] += 0.03
    resurveyed = tmp_path / "resurveyed.json"
    resurveyed.write_text(json.dumps(doc))
    code, _, err = run(["level", site, resurveyed])
    assert code == 0, err
    for m in doc["mics"]:
        m["position_m"][0] += 300.0
    elsewhere = tmp_path / "elsewhere.json"
    elsewhere.write_text(json.dumps(doc))
    for args in (["level", site, elsewhere], ["map", site, elsewhere, "-o", tmp_path / "m.png"]):
        code, _, err = run(args)
        assert code == 2 and "another site" in err and "mics" in err, err
        assert len(err.strip().splitlines()) == 1
    assert not (tmp_path / "m.png").exists()


def test_level_refuses_a_result_of_another_schema(level_scene, tmp_path):
    site, _, _ = level_scene
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps({"schema": "something-else/2"}))
    code, _, err = run(["level", site, bad])
    assert code == 2 and "schema" in err


def test_plan_proposes_a_mic_and_writes_a_map(level_scene, tmp_path):
    site, _, _ = level_scene
    png, doc_path = tmp_path / "plan.png", tmp_path / "plan.json"
    code, out, err = run(["plan", site, "--timing-sd", "2e-5", "-o", png, "--json", doc_path])
    assert code == 0, err
    assert png.stat().st_size > 20_000
    doc = json.loads(doc_path.read_text())
    assert doc["kind"] == "plan" and doc["proposals"]
    assert doc["proposals"][0]["factor"] > 1.0
    assert "Proposed next mic" in out


def test_plan_with_propose_0_maps_the_layout_only(level_scene, tmp_path):
    # --propose takes 0..10 (its help): 0 is the map of the present layout, no proposal
    site, _, _ = level_scene
    doc_path = tmp_path / "plan.json"
    code, out, err = run(["plan", site, "--timing-sd", "2e-5", "--propose", "0", "--json",
                          doc_path])
    assert code == 0, err
    assert json.loads(doc_path.read_text())["proposals"] == []
    assert "Proposed next mic" not in out


def test_plan_rejects_a_bad_extent(level_scene):
    site, _, _ = level_scene
    code, _, err = run(["plan", site, "--extent", "10:0:0:5"])
    assert code == 2 and "--extent" in err
