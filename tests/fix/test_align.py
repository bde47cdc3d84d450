"""Arrival-aligned windows (locate.fix.align): when they are used and what they leave alone.

Truth from the simulator (locate.synth); the spread of (error / stated sd) of a calibrated
delay is 1 (definition of a standard deviation).
"""

import json

import numpy as np

import locate.fix.align as align
from locate.signal.delays import all_pairs, estimate_delays, geometric_max_lag_s
from locate.synth import Emission, Waveform, simulate_events
from tests.cli_helpers import run, write_site
from tests.scenes import ARRAY_40M

RATE_HZ = 16000.0
SOURCE_M = np.array([70.0, 55.0, 0.5])


def _scene(duration_s, start_s, length_s, *, reflection=None, seed=4):
    wave = Waveform(kind="noise", band_hz=(150.0, 3000.0), duration_s=duration_s)
    return simulate_events(ARRAY_40M, [Emission(SOURCE_M, start_s, wave)],
                           sample_rate_hz=RATE_HZ, duration_s=length_s, snr_db=10.0,
                           ground_reflection=reflection, rng=np.random.default_rng(seed),
                           temperature_c=12.0, relative_humidity=70.0)


def test_edges_tell_a_continuous_sound_from_a_burst_inside_the_span():
    shifts = np.array([0.0, 0.05, 0.08, -0.02, 0.01])
    steady = _scene(4.0, 0.0, 4.0)
    a, b = int(1.0 * RATE_HZ), int(2.0 * RATE_HZ)
    assert align.sound_at_both_edges(steady.signals[:, a:b], RATE_HZ, shifts)
    burst = _scene(0.5, 1.3, 2.5)  # heard from about 1.6 s, inside the span 1.0..2.5 s
    a, b = int(1.0 * RATE_HZ), int(2.5 * RATE_HZ)
    assert not align.sound_at_both_edges(burst.signals[:, a:b], RATE_HZ, shifts)


def test_an_ambiguous_first_pass_is_not_used_for_shifts():
    sim = _scene(4.0, 0.0, 4.0)
    pairs = all_pairs(len(ARRAY_40M))
    ds = estimate_delays(sim.signals[:, 16000:32000], RATE_HZ, pairs=pairs,
                         max_lag_s=geometric_max_lag_s(ARRAY_40M, pairs, sim.sound_speed_mps))
    shifts = align.arrival_shifts_s(ds, len(ARRAY_40M))
    # the shifts are the arrival offsets (simulator truth), centred on their median
    truth = sim.arrivals_s[0] - np.median(sim.arrivals_s[0])
    np.testing.assert_allclose(shifts, truth, atol=1e-5)
    quality = list(ds.quality)
    quality[0] = "ambiguous"
    from dataclasses import replace
    assert align.arrival_shifts_s(replace(ds, quality=tuple(quality)), len(ARRAY_40M)) is None


def test_a_burst_with_a_ground_reflection_is_fixed_as_without_alignment(tmp_path, monkeypatch):
    # shifted windows also move the reflection against the direct sound: a burst inside its
    # span must get exactly the first-pass answer
    sim = _scene(0.4, 0.5, 2.0, reflection=0.8)
    site = write_site(tmp_path, ARRAY_40M, sim.signals, RATE_HZ)
    args = ["fix", site, "--from", 0.6, "--to", 1.6, "--source-z", 0.5, "--json"]
    code, _, err = run(args + [tmp_path / "a.json"])
    assert code == 0, err
    monkeypatch.setattr(align, "arrival_shifts_s", lambda *a, **k: None)
    code, _, err = run(args + [tmp_path / "b.json"])
    assert code == 0, err
    a, b = (json.loads((tmp_path / n).read_text())["fixes"][0] for n in ("a.json", "b.json"))
    assert a["position_m"] == b["position_m"] and a["covariance_m2"] == b["covariance_m2"]
    assert np.linalg.norm(np.array(a["position_m"][:2]) - SOURCE_M[:2]) < 0.5
