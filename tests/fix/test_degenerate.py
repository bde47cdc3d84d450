"""Degenerate physics: the tool says what is wrong and what would help, on stderr and in the
result JSON, instead of printing a confident position.

Invented scenes on the exact simulator (locate.synth), run through ``tdoa fix``:

* a nearly collinear array (mics within 2 cm of one line): the source and its mirror image
  across the line explain the delays almost equally well;
* a source on the extension of a line of mics (those pairs' delays sit at their largest value
  and carry no first-order information: the misfit is far from quadratic);
* a reflection stronger than the direct sound (direct path screened, a wall behind the array):
  the correlation follows the echo and the delays point at the mirror image of the source;
* a tonal source (harmonics of 400 Hz) analysed away from its onset: every correlation has a
  row of equal peaks one period apart;
* a far source beyond a compact array: a bearing, but no range.

The truth of each check is the scene's construction (geometry, image-source position); the
physics of each failure is textbook TDOA geometry (hyperbolae degenerate on a baseline's
extension; the image-source model of a plane reflector; periodic correlation of a periodic
signal: common practice).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from locate.geometry.ellipses import chi2_scale
from locate.synth import Emission, Waveform, simulate_events
from tests.cli_helpers import run, write_site
from tests.scenes import ARRAY_40M

RATE_HZ = 16000.0
BANG = Waveform(kind="impulse", band_hz=(150.0, 4000.0), duration_s=0.08, rms_pa_at_1m=5.0)


def _record(mics, emissions, *, duration_s=1.5, snr_db=None, noise_rms=None, seed=3):
    sim = simulate_events(np.asarray(mics, float), emissions, sample_rate_hz=RATE_HZ,
                          duration_s=duration_s, temperature_c=12.0, relative_humidity=70.0,
                          snr_db=snr_db, noise_rms=noise_rms, rng=np.random.default_rng(seed))
    return sim.signals


def _fix(folder, mics, signals, *args, extra=""):
    """Run ``tdoa fix``; returns (exit code, stderr, result JSON or None)."""
    site = write_site(folder, mics, signals, RATE_HZ, extra=extra)
    out = folder / "fix.json"
    code, _, stderr = run(["fix", site, "--json", out, *args])
    assert "Traceback" not in stderr
    return code, stderr, json.loads(out.read_text()) if out.exists() else None


def _warnings(result):
    """All warnings of a result: top level and per fix."""
    return result["warnings"] + [w for f in result["fixes"] for w in f["warnings"]]


def _said(words, stderr, result):
    """Each of ``words`` is in one warning line on stderr and in one warning of the JSON."""
    lines = [ln for ln in stderr.splitlines() if ln.startswith("tdoa: warning: ")]
    for w in words:
        assert any(w in ln for ln in lines), (w, stderr)
        assert any(w in x for x in _warnings(result)), (w, _warnings(result))


def _mahalanobis2(fix, truth_m):
    """Squared Mahalanobis distance of the truth from the fix in its horizontal covariance."""
    e = np.asarray(fix["position_m"][:2]) - np.asarray(truth_m[:2])
    cov = np.asarray(fix["covariance_m2"], float)[:2, :2]
    if not np.all(np.isfinite(cov)):
        return 0.0  # unbounded ellipse: covers everything
    return float(e @ np.linalg.solve(cov, e))


def test_nearly_collinear_array_warns_and_reports_the_mirror_across_the_line(tmp_path):
    mics = np.array([[0.0, 0.02, 1.2], [15.0, -0.01, 1.2], [30.0, 0.015, 1.2],
                     [45.0, -0.02, 1.2], [60.0, 0.0, 1.2]])
    truth = np.array([30.0, 25.0, 0.0])
    signals = _record(mics, [Emission(truth, 0.3, BANG)], snr_db=15.0)
    code, stderr, result = _fix(tmp_path, mics, signals,
                                extra="\n[survey]\nposition_sd_m = 0.05\n")
    assert code == 0, stderr
    _said(["poor geometry", "nearly on one line", "move a mic off the line"], stderr, result)
    _said(["ambiguous geometry", "second position"], stderr, result)
    (f,) = result["fixes"]
    found = {tuple(np.round(f["position_m"][:2])), tuple(np.round(f["mirror_position_m"][:2]))}
    assert found == {(30.0, 25.0), (30.0, -25.0)}  # the source and its mirror, to 0.5 m


def test_source_on_the_extension_of_a_line_of_mics(tmp_path):
    """Three mics on y = 0 and one off it; the source 50 m beyond the end of the line."""
    mics = np.array([[0.0, 0.0, 1.2], [20.0, 0.0, 1.2], [40.0, 0.0, 1.2], [20.0, 30.0, 1.2]])
    truth = np.array([90.0, 0.0, 1.2])
    signals = _record(mics, [Emission(truth, 0.3, BANG)], snr_db=15.0, seed=207)
    code, stderr, result = _fix(tmp_path, mics, signals, "--source-z", "1.2")
    assert code == 0, stderr
    _said(["near the extension of the line through mics", "M1-M2", "a mic off that line"],
          stderr, result)
    (f,) = result["fixes"]
    # honest: the truth inside the (enlarged) 95 % ellipse (chi-square, 2 dof)
    assert _mahalanobis2(f, truth) <= chi2_scale(0.95, 2)


@pytest.mark.parametrize("direct_gain, echo_wins", [(0.3, True), (1.5, False)],
                         ids=["echo-10dB-stronger", "direct-stronger-control"])
def test_an_echo_stronger_than_the_direct_sound_is_called_out(tmp_path, direct_gain,
                                                               echo_wins):
    """Direct path screened (gain 0.3), a wall at y = 45 m behind the array reflecting fully:
    the image source is at (20, 65) m (image-source model of a plane reflector)."""
    truth = np.array([20.0, 25.0, 0.0])
    image = np.array([20.0, 65.0, 0.0])
    direct = _record(ARRAY_40M, [Emission(truth, 0.3, BANG)], duration_s=2.0, seed=4)
    echo = _record(ARRAY_40M, [Emission(image, 0.3, BANG)], duration_s=2.0, seed=4)
    noise = 0.002 * np.random.default_rng(9).normal(size=direct.shape)
    code, stderr, result = _fix(tmp_path, ARRAY_40M, direct_gain * direct + echo + noise)
    assert code == 0, stderr
    (f,) = result["fixes"]
    if echo_wins:
        # the delays point at the image; the first arrivals show the direct path
        assert np.linalg.norm(np.array(f["position_m"][:2]) - image[:2]) < 1.0
        _said(["first arrivals do not fit this position", "echo stronger than the direct",
               "span around the first arrival"], stderr, result)
    else:
        assert np.linalg.norm(np.array(f["position_m"][:2]) - truth[:2]) < 0.1
        assert not any("first arrivals" in w for w in _warnings(result))


def test_a_tonal_source_is_flagged_ambiguous_and_not_given_a_small_ellipse(tmp_path):
    truth = np.array([15.0, 22.0, 0.0])
    tone = Waveform(kind="tone", duration_s=2.5, fundamental_hz=400.0,
                    harmonics=(1.0, 0.6, 0.3), rms_pa_at_1m=5.0)
    signals = _record(ARRAY_40M, [Emission(truth, 0.3, tone)], duration_s=3.0, snr_db=15.0)
    code, stderr, result = _fix(tmp_path, ARRAY_40M, signals, "--from", "1.0", "--to", "1.8",
                                "--source-z", "0+-0")
    assert code == 0, stderr
    _said(["ambiguous correlation", "tonal", "a broadband part of the sound",
           "most pairs are ambiguous", "do not rely on it"], stderr, result)
    (f,) = result["fixes"]
    assert _mahalanobis2(f, truth) <= chi2_scale(0.95, 2)  # the truth inside the ellipse
    # and the ellipse is no confident one: wider than one wavelength at 400 Hz (0.85 m)
    assert f["ellipse95"]["semi_minor_m"] > 339.17 / 400.0


def test_a_far_source_beyond_a_compact_array_gives_a_bearing_not_a_position(tmp_path):
    """Five mics within 2 m hear a bang 1 km away at 0 dB SNR: the wavefront is flat to a few
    microseconds across the array, so the delays fix a direction only."""
    mics = np.array([[0.0, 0.0, 1.2], [2.0, 0.0, 1.2], [2.0, 2.0, 1.2], [0.0, 2.0, 1.2],
                     [1.0, 1.0, 1.5]])
    truth = np.array([800.0, 600.0, 0.0])
    heard_s = 0.3 + 1000.0 / 339.17  # emitted at 0.3 s, 1 km at 339 m/s (12 degC, 70 % RH)
    signals = _record(mics, [Emission(truth, 0.3, BANG)], duration_s=heard_s + 0.4,
                      snr_db=0.0, seed=200)
    code, stderr, result = _fix(tmp_path, mics, signals, "--from", f"{heard_s - 0.1:.2f}",
                                "--to", f"{heard_s + 0.2:.2f}")
    assert "bearing but no range" in stderr and "mics spread wider" in stderr
    if result is None:  # the solver ran off beyond 10^4 apertures: no position at all
        assert code == 1, stderr
    else:  # a position along the bearing, with an unbounded ellipse
        assert code == 0, stderr
        (f,) = result["fixes"]
        assert f["ellipse95"]["semi_major_m"] is None  # JSON null: unbounded
        _said(["bearing but no range"], stderr, result)
    bearing = float(stderr.split("toward ")[1].split(" deg")[0])
    nearest = float(stderr.split("beyond about ")[1].split(" m")[0])
    centre = mics.mean(axis=0)
    true_bearing = np.degrees(np.arctan2(truth[0] - centre[0], truth[1] - centre[1]))
    assert abs(bearing - true_bearing) < 3.0  # degrees
    assert nearest < 1000.0  # the stated range interval holds the truth
