"""``tdoa fix --window W --sweep``: every window of a long span through the fast path.

Truth is the simulator's source position (locate.synth, exact propagation per mic); the
reference for the per-window answers is the ordinary ``fix --window`` path; the 95 % level
is scipy.stats.chi2 (2 degrees of freedom).
"""

import json

import numpy as np
import pytest
from scipy import stats

from locate.synth import Emission, Waveform, simulate_events
from tests.cli_helpers import run, write_site

RATE_HZ = 16000.0
MICS = np.array([[0.0, 0.0, 1.2], [40.0, 0.0, 1.5], [38.0, 35.0, 1.1], [2.0, 38.0, 1.3],
                 [20.0, 18.0, 1.0], [-5.0, 20.0, 1.4]])
SOURCE_M = np.array([55.0, 70.0, 1.0])  # an invented compressor north-east of the array
CHI2_95_2D = stats.chi2.ppf(0.95, 2)


@pytest.fixture(scope="module")
def hum(tmp_path_factory):
    """12 s of a steady broadband source at 10 dB SNR; a copy with mic M3's clock 3 ms off."""
    folder = tmp_path_factory.mktemp("sweep")
    wave = Waveform(kind="noise", band_hz=(150.0, 3000.0), duration_s=12.0)
    sim = simulate_events(MICS, [Emission(SOURCE_M, 0.0, wave)], sample_rate_hz=RATE_HZ,
                          duration_s=12.5, snr_db=10.0, rng=np.random.default_rng(3),
                          temperature_c=12.0, relative_humidity=70.0)  # as write_site
    site = write_site(folder, MICS, sim.signals, RATE_HZ)
    late = sim.signals.copy()
    late[2] = np.roll(late[2], int(0.003 * RATE_HZ))  # M3 records 3 ms late
    bad = write_site(folder, MICS, late, RATE_HZ, name="late.toml", audio="late.wav")
    return site, bad


def _fixes(path):
    return json.loads(path.read_text())["fixes"]


def _m2(entries):
    err = np.array([f["position_m"][:2] for f in entries]) - SOURCE_M[:2]
    cov = np.array([f["covariance_m2"] for f in entries])[:, :2, :2]
    return np.einsum("wi,wij,wj->w", err, np.linalg.inv(cov), err)


def test_sweep_agrees_with_the_per_window_path_and_covers_the_truth(hum, tmp_path):
    site, _ = hum
    fast, slow = tmp_path / "fast.json", tmp_path / "slow.json"
    args = ["fix", site, "--from", 1.0, "--to", 11.0, "--window", 0.5, "--source-z", "1.0+-0",
            "--band", "150:3000"]
    code, out, err = run(args + ["--sweep", "--json", fast])
    assert code == 0, err
    assert "20 window(s) of 0.5 s every 0.5 s" in out and "median position" in out
    code, _, err = run(args + ["--json", slow])
    assert code == 0, err
    a, b = _fixes(fast), _fixes(slow)
    assert [f["t_s"] for f in a] == pytest.approx([f["t_s"] for f in b])
    pa, pb = (np.array([f["position_m"] for f in x]) for x in (a, b))
    sd = np.sqrt(np.array([np.linalg.eigvalsh(np.array(f["covariance_m2"])[:2, :2])[-1]
                           for f in b]))
    # --sweep only chooses the output: the same windows, delays, checks and budget
    assert np.all(np.linalg.norm(pa[:, :2] - pb[:, :2], axis=1) < 0.1 * sd)
    ratio = (np.array([f["ellipse95"]["semi_major_m"] for f in a])
             / np.array([f["ellipse95"]["semi_major_m"] for f in b]))
    assert np.all((ratio > 0.95) & (ratio < 1.05)), ratio
    # independent windows: the truth inside the 95 % ellipse ~19 times in 20 (>= 17: binomial
    # probability of fewer is about 7 %)
    assert np.sum(_m2(a) < CHI2_95_2D) >= 17
    assert all(f["uncertainty_budget"] is not None and len(f["delays"]) == 15 for f in a)
    assert all(d["mics"][0].startswith("M") for f in a for d in f["delays"])


def test_sweep_with_overlapping_windows_rejects_a_late_mic_in_every_window(hum, tmp_path):
    _, late = hum
    out_json = tmp_path / "late.json"
    code, out, err = run(["fix", late, "--from", 1.0, "--to", 6.0, "--window", 0.5, "--hop",
                          0.25, "--sweep", "--source-z", 1.0, "--band", "150:3000", "--json",
                          out_json])
    assert code == 0, err
    fixes = _fixes(out_json)
    assert len(fixes) == 19  # (5 - 0.5) / 0.25 + 1
    assert all(f["rejected_mics"] == ["M3"] for f in fixes)
    assert "rejected" in err
    assert np.mean(_m2(fixes) < CHI2_95_2D) >= 0.8


@pytest.mark.parametrize("extra, field", [
    (["--sweep"], "--sweep"),  # no --window
    (["--window", 0.5, "--hop", 0.25], "--hop"),  # --hop without --sweep
    (["--window", 0.5, "--hop", 0.75, "--sweep"], "--hop"),  # hop longer than the window
])
def test_sweep_option_errors_name_the_option(hum, extra, field):
    site, _ = hum
    code, out, err = run(["fix", site, "--from", 1.0, "--to", 3.0, *extra])
    assert code == 2
    assert len(err.strip().splitlines()) == 1 and field in err and "Traceback" not in err
