"""95 % ellipse coverage by scene family, cheap version of tests/benchmarks/coverage_table.py.

Invented scenes on the exact simulator (locate.synth) with a ground reflection (coefficient
0.3-1), the source height unknown (0-2 m, fixed with the default 1 m +- 0.6 m; 0-6 m solved
in 3-D with a mast mic), mic positions written N(0, 5 cm) off and the air temperature
N(0, 2 degC) off, both declared (see the benchmark's docstring).  The 95 % ellipse is
chi-square with 2 dof (5.991, scipy.stats.chi2).  Fixed seeds, 30 trials per family (not
tracks: about 20 s a trial, measured by the benchmark only): a family must cover 80-100 %
(a true 95 % over 30 trials: binomial sd 4 %; issue 18 asks 90-98 % over 200 trials, which
the benchmark measures), the pooled one 88-99 %.
"""

import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))
import coverage_table as ct  # noqa: E402

N_TRIALS = 30


@pytest.mark.slow
@pytest.mark.parametrize("family", [f for f in ct.FAMILIES if f != "tracks"])
def test_coverage_of_the_95_percent_ellipse_per_family(family):
    share, n, _ = ct.coverage(family, N_TRIALS, seed=1818)
    assert 0.8 <= share <= 1.0, (family, share)


@pytest.mark.slow
def test_coverage_with_exact_mics_is_not_lost_to_the_source_height():
    # mics written exactly, nothing declared: the ellipse is timing + ground reflection +
    # source height only (was 56 % with a 3-point height rule)
    share, n, _ = ct.coverage("bursts, ground reflection", N_TRIALS, seed=1819,
                              exact_mics=True)
    assert 0.8 <= share <= 1.0, share


def _loud_bang_fixes(case, n_trials, seed):
    """(healthy-mic rejections, fixes that the rejection moved beyond their own 95 % ellipse)
    for a loud coloured bang (strong 80-1200 Hz body, weak 1.2-5 kHz crack; SNR 30 dB) over a
    reflecting ground (0.5-0.95), 8 healthy mics.  'speed': the sound speed written 0.04 %
    high (a quarter of a degree; 2 degC declared).  'height': the source 0.3 m up, fixed at a
    given 1 m (+- 0.5 m)."""
    from types import SimpleNamespace

    from locate.accuracy.budget import fix_with_budget
    from locate.accuracy.inputs import nuisance_sds, sound_speed_slope_mps_per_c
    from locate.physics.air import sound_speed_mps
    from locate.signal.delays import all_pairs, estimate_delays, geometric_max_lag_s
    from locate.synth import Emission, Waveform, simulate_events
    from locate.workflows.fixing import reflection_uncertainty

    rate = 16000.0
    mics = np.vstack([ct.MICS, [[20.0, -3.0, 1.3], [43.0, 18.0, 1.2]]])
    rng = np.random.default_rng(seed)
    c_true = float(sound_speed_mps(ct.TEMPERATURE_C, ct.HUMIDITY))
    sd_c = abs(sound_speed_slope_mps_per_c(ct.TEMPERATURE_C, ct.HUMIDITY)) * 2.0
    pairs = all_pairs(len(mics))
    rejected = moved = 0
    for _ in range(n_trials):
        src = np.array([rng.uniform(3, 37), rng.uniform(3, 35),
                        0.3 if case == "height" else rng.uniform(0, 2)])
        wave = (Waveform(kind="impulse", band_hz=(80.0, 1200.0), duration_s=0.15,
                         rms_pa_at_1m=8.0),
                Waveform(kind="impulse", band_hz=(1200.0, 5000.0), duration_s=0.05,
                         rms_pa_at_1m=1.0))
        sim = simulate_events(mics, [Emission(src, 0.3, wave)], sample_rate_hz=rate,
                              duration_s=0.75, temperature_c=ct.TEMPERATURE_C,
                              relative_humidity=ct.HUMIDITY, snr_db=30.0,
                              ground_reflection=rng.uniform(0.5, 0.95), rng=rng)
        c = c_true * (1.0004 if case == "speed" else 1.0)
        z_sd = 0.5 if case == "height" else 0.6
        cond = SimpleNamespace(sound_speed_mps=c, wind_mps=np.zeros(3))
        sds = nuisance_sds(len(mics), sound_speed_sd_mps=sd_c, temperature_sd_c=2.0,
                           source_height_sd_m=z_sd)
        d = estimate_delays(sim.signals[:, int(0.3 * rate):int(0.6 * rate)], rate,
                            pairs=pairs, max_lag_s=geometric_max_lag_s(mics, pairs, c,
                                                                       margin_s=5e-4))
        d = reflection_uncertainty(d, mics, cond, source_z_m=1.0, source_z_sd_m=z_sd)
        models = {"source_z_m": z_sd, "sound_speed_mps": sd_c, "ground_z_m": 0.0}
        kw = dict(sds=sds, source_z_m=1.0, dims=2, model_sds=models)
        checked, _ = fix_with_budget(mics, d, c, **kw)
        plain, _ = fix_with_budget(mics, d, c, reject=False, **kw)
        rejected += not all(checked.used)
        step = checked.position_m[:2] - plain.position_m[:2]
        cov = np.asarray(plain.covariance_m2)[:2, :2]
        moved += bool(step @ np.linalg.solve(cov, step) > ct.CHI2_95)
    return rejected, moved


@pytest.mark.slow
@pytest.mark.parametrize("case", ["speed", "height"])
def test_a_declared_model_error_rejects_no_healthy_mic(case):
    # issue 18: a healthy mic is never rejected for an error the budget declares, and the
    # fix moves less than its own ellipse.  Measured (seed 44, 15 trials): speed 0, height 0
    # rejections (before the ground-reflection bound of locate.fix.solver: speed 1 - a mic
    # 11 m from the source whose arrival the ground reflection moved by ~120 us, 4-8 times
    # its modelled sd, inside the 310 us a merged reflection can do there).
    rejected, moved = _loud_bang_fixes(case, 8, seed=44)
    assert rejected == 0
    assert moved == 0
