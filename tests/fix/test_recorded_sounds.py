"""``tdoa fix`` on recorded sounds (tests/data/sounds/stationary, LICENSES.md there).

A recorded hammer blow on metal and a recorded running lift machine are emitted at an invented
yard by the project simulator (locate.synth: exact delays, a ground reflection) and fixed
through the command line with the default source height (1 m +- 0.6 m).  The truth must lie
inside the reported 95 % ellipse (chi-square with 2 dof, 5.991: scipy.stats.chi2) and no
healthy mic may be rejected (issue 18).  The many-trial coverage of such scenes is the
"recorded sounds" row of docs/uncertainty.md (tests/benchmarks/coverage_table.py).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from scipy import stats

from locate.synth import Emission, recorded_waveform, simulate_events
from tests.cli_helpers import run, write_site

SOUNDS = Path(__file__).resolve().parents[1] / "data" / "sounds" / "stationary"
RATE_HZ = 16000.0
MICS = np.array([[0.0, 0.0, 1.2], [40.0, 0.0, 1.5], [38.0, 35.0, 1.1], [2.0, 38.0, 1.3],
                 [20.0, 18.0, 1.6], [-4.0, 19.0, 1.4]])
CHI2_95_2D = stats.chi2.ppf(0.95, 2)  # scipy.stats.chi2


def _fix_recorded(tmp_path, name, source_m, span_s, seed):
    x, fs = sf.read(SOUNDS / f"{name}.wav")
    wave = recorded_waveform(x, fs, rms_pa_at_1m=2.0)
    sim = simulate_events(MICS, [Emission(np.asarray(source_m, float), 0.3, wave)],
                          sample_rate_hz=RATE_HZ, duration_s=span_s[1] + 0.1,
                          temperature_c=12.0, relative_humidity=70.0, snr_db=20.0,
                          ground_reflection=0.7, rng=np.random.default_rng(seed))
    site = write_site(tmp_path, MICS, sim.signals, RATE_HZ)
    out = tmp_path / "fix.json"
    code, _, err = run(["fix", site, "--from", span_s[0], "--to", span_s[1], "--json", out])
    assert code == 0, err
    return json.loads(out.read_text())["fixes"][0]


@pytest.mark.parametrize(("name", "source_m", "span_s"), [
    ("impact_hammer", (27.0, 12.0, 0.4), (0.3, 0.95)),   # a hammer blow, 0.4 m up
    ("machinery_lift", (12.0, 26.0, 1.5), (0.45, 1.8)),  # a running machine, 1.5 m up
])
def test_a_recorded_sound_is_fixed_with_the_truth_inside_its_ellipse(tmp_path, name,
                                                                     source_m, span_s):
    fix = _fix_recorded(tmp_path, name, source_m, span_s, seed=3)
    e = np.asarray(fix["position_m"][:2]) - np.asarray(source_m[:2])
    cov = np.asarray(fix["covariance_m2"], float)[:2, :2]
    assert float(e @ np.linalg.solve(cov, e)) <= CHI2_95_2D, (e, cov)
    assert not fix["rejected_mics"]
    # a useful fix, not an ellipse that holds the whole yard: semi-major axis below 2 m
    assert np.sqrt(np.linalg.eigvalsh(CHI2_95_2D * cov).max()) < 2.0


def test_a_recorded_waveform_is_emitted_as_recorded():
    # at the recording's own rate the simulator emits the samples themselves (only the cut
    # above 0.45 fs, where the cow has almost nothing), scaled to the stated rms
    from locate.synth import emitted_signal

    x, fs = sf.read(SOUNDS / "animal_cow.wav")
    y = emitted_signal(recorded_waveform(x, fs, rms_pa_at_1m=2.0), fs,
                       np.random.default_rng(0))
    assert y.size == x.size
    assert np.sqrt(np.mean(y**2)) == pytest.approx(2.0, rel=1e-9)
    assert np.corrcoef(x, y)[0, 1] > 0.999
    # at twice the rate: the same sound, twice the samples (polyphase, scipy.signal)
    y2 = emitted_signal(recorded_waveform(x, fs), 2 * fs, np.random.default_rng(0))
    assert y2.size == 2 * x.size
    assert np.corrcoef(x, y2[::2])[0, 1] > 0.999
