"""Several sounds at once (issue 17): two steady sources, a wall echo, the background test.

Truth: the exact simulator's source positions (locate.synth, tests/mixtures.py); the noise
coherence bound is the Beta(1, K - 1) law of the Welch coherence of independent signals
(Carter 1987, Proc. IEEE 75(2) 236-255).
"""

import json

import numpy as np
import pytest

from locate.io.audio import open_recordings
from locate.io.site import load_site
from locate.workflows.fixing import STEADY_COHERENCE, background_coherence, noise_coherence
from locate.workflows.locating import locate_recordings
from tests.cli_helpers import run, write_site
from tests.mixtures import FAN, HUM, RATE, YARD, mixture

# hum 60 m from the fan, both in and beside the yard (invented plants A and B)
HUM_AT, FAN_AT = (-5.0, 10.0, 1.0), (55.0, 15.0, 1.0)


def _two_plants(tmp_path, seed=11):
    rng = np.random.default_rng(seed)
    sig, _ = mixture(rng, YARD, steadies=[(HUM_AT, HUM), (FAN_AT, FAN)], duration_s=4.0,
                     steady_db=(0.0, 0.0), noise_db=-15.0)
    return write_site(tmp_path, YARD, sig, RATE, temperature_c=20.0, humidity=50.0)


def test_two_plants_each_fixed_with_its_band_and_mapped(tmp_path):
    path = _two_plants(tmp_path)
    out, png = tmp_path / "two.json", tmp_path / "two.png"
    code, stdout, stderr = run(["fix", path, "--from", "0.5", "--to", "3.5", "--sources",
                                "auto", "--source-z", "1", "--json", out, "--sources-map", png])
    assert code == 0, stderr
    fixes = json.loads(out.read_text())["fixes"]
    assert len(fixes) == 2
    for truth, tonal in ((HUM_AT, True), (FAN_AT, False)):
        d = [np.hypot(*(np.array(f["position_m"][:2]) - truth[:2])) for f in fixes]
        f = fixes[int(np.argmin(d))]
        assert min(d) < 1.0  # issue 17 acceptance: each within 1 m
        assert f["tonal"] is tonal
        if tonal:  # 100 Hz harmonics (tests/mixtures.HUM): the lines' band starts at 100 Hz
            assert abs(f["band_hz"][0] - 100.0) < 5.0
        else:  # the fan's band is 80-3000 Hz: the reported band overlaps it
            assert f["band_hz"][0] < 3000.0 and f["band_hz"][1] > 80.0
    assert png.stat().st_size > 10_000
    assert "source 1" in stdout and "source 2" in stdout


def test_a_plain_span_fix_says_a_second_source_was_not_separated(tmp_path):
    site = load_site(_two_plants(tmp_path))
    res = locate_recordings(site, open_recordings(site), start_s=0.5, stop_s=3.5,
                            source_z_m=1.0)
    assert any("not separated" in w and "--sources auto" in w for w in res["fixes"][0]["warnings"])


def test_one_steady_source_gives_no_second_source_note(tmp_path):
    rng = np.random.default_rng(12)
    sig, _ = mixture(rng, YARD, steadies=[(FAN_AT, FAN)], duration_s=4.0, noise_db=-15.0)
    site = load_site(write_site(tmp_path, YARD, sig, RATE, temperature_c=20.0, humidity=50.0))
    res = locate_recordings(site, open_recordings(site), start_s=0.5, stop_s=3.5,
                            source_z_m=1.0)
    f = res["fixes"][0]
    assert np.hypot(*(np.array(f["position_m"][:2]) - FAN_AT[:2])) < 1.0
    assert not any("not separated" in w for w in f["warnings"])


def test_a_bang_with_a_strong_wall_echo_is_one_event_fixed_within_0_2_m(tmp_path):
    # wall 8 m beyond the bang, reflection coefficient 0.8: path differences 4-16 m
    rng = np.random.default_rng(21)
    bang = (40.0, 20.0, 1.0)
    wall = ((48.0, 0.0, 0.0), (-1.0, 0.0, 0.0), 0.8)
    sig, _ = mixture(rng, YARD, bangs=[(bang, 1.5)], duration_s=4.0, snr_db=20.0, walls=[wall])
    site = load_site(write_site(tmp_path, YARD, sig, RATE, temperature_c=20.0, humidity=50.0))
    fixes = locate_recordings(site, open_recordings(site), source_z_m=1.0)["fixes"]
    assert len(fixes) == 1  # the echo is no second event
    assert np.hypot(*(np.array(fixes[0]["position_m"][:2]) - bang[:2])) < 0.2


def test_background_coherence_tells_a_far_fan_from_mic_noise():
    rng = np.random.default_rng(3)
    noise = rng.standard_normal((6, 16000))
    # Beta(1, K - 1) law: independent noise stays under its 99.9th percentile
    assert background_coherence(noise, RATE, max_lag_s=0.2) < noise_coherence(16000)
    assert noise_coherence(16000) < STEADY_COHERENCE
    # a fan 110 m away, 15 dB over the noise: inter-mic delays up to 0.15 s, longer than a
    # Welch segment - the pairs are aligned before the coherence is read
    sig, _ = mixture(rng, YARD, steadies=[((135.0, 20.0, 1.5), FAN)], duration_s=1.0,
                     noise_db=-15.0)
    assert background_coherence(sig, RATE, max_lag_s=0.2) > 0.8
    sig, _ = mixture(rng, YARD, steadies=[((-80.0, 60.0, 1.5), HUM)], duration_s=1.0,
                     noise_db=-15.0)
    assert background_coherence(sig, RATE, max_lag_s=0.2) > 0.8


@pytest.mark.slow
def test_bangs_over_a_fan_or_hum_coverage_over_20_trials():
    """Monte Carlo (fixed seeds): the acceptance benchmark's scenes, 20 trials (60 bangs)."""
    import tempfile
    from pathlib import Path

    from tests.benchmarks.accept_bangs_over_steady import trial

    rows = []
    with tempfile.TemporaryDirectory() as d:
        for s in range(20):
            rows.extend(trial(s, 0.0, 15.0, Path(d))[0])
    once = np.array([r[0] == 1 for r in rows])
    err = np.array([r[1] for r in rows])
    inside = np.array([r[2] for r in rows])
    assert once.all()  # every bang found once
    assert np.all(err <= 0.5)  # issue 17 acceptance: within 0.5 m
    assert inside.mean() >= 0.85  # 95 % ellipse; 60 bangs: 0.95 less 3.5 binomial sd (0.028)


def test_two_broadband_plants_with_overlapping_spectra_are_both_fixed(tmp_path):
    from locate.synth import Waveform
    from locate.workflows.sources import locate_sources

    # 200-4000 Hz and 80-3000 Hz fans 60 m apart, one of them outside the array
    a, b = (13.7, -27.0, 1.0), (28.4, 31.2, 1.0)
    other = Waveform(kind="noise", band_hz=(200.0, 4000.0), taper_s=0.0)
    rng = np.random.default_rng(3000)
    sig, _ = mixture(rng, YARD, steadies=[(a, other), (b, FAN)], duration_s=4.0,
                     steady_db=(0.0, 0.0), noise_db=-15.0)
    site = load_site(write_site(tmp_path, YARD, sig, RATE, temperature_c=20.0, humidity=50.0))
    result, _ = locate_sources(site, open_recordings(site), 0.5, 3.5, source_z_m=1.0)
    assert len(result["fixes"]) == 2
    for truth in (a, b):
        d = min(np.hypot(*(np.array(f["position_m"][:2]) - truth[:2])) for f in result["fixes"])
        assert d < 1.0  # issue 17 acceptance: each within 1 m
