"""Monte Carlo acceptance of the stationary fix on the project's exact simulator (issue 2).

Scene: 5 mics, ~40 m aperture, broadband burst 100-4000 Hz, 1 s, 10 dB SNR per channel
(simulator definition: white noise over the full band, see locate.synth), 48 kHz.
The Cramer-Rao bound is evaluated at the truth for each trial's own delay covariance
(Chan & Ho 1994 form, locate.geometry.ellipses.crlb_covariance); the 95 % region uses chi-square
with 2 dof (scipy.stats.chi2.ppf(0.95, 2) = 5.991).
"""

import numpy as np
import pytest
from matplotlib.path import Path as PolyPath

from locate.fix.solver import locate_source
from locate.geometry.ellipses import crlb_covariance
from locate.physics.air import sound_speed_mps, wind_vector_mps
from locate.signal.delays import DelaySet
from tests.scenes import ARRAY_40M, CENTRE_40M, burst_delays, inside

pytestmark = pytest.mark.slow


def _monte_carlo(positions, rng, **kw):
    errs, crlb_tr, hits, rejected = [], [], 0, 0
    for src in positions:
        ds, sim = burst_delays(ARRAY_40M, src, rng, **kw)
        fx = locate_source(ARRAY_40M, ds, sim.sound_speed_mps, wind_mps=kw.get("wind_mps"),
                           source_z_m=src[2])
        errs.append(fx.position_m[:2] - src[:2])
        hits += inside(fx, src)
        rejected += bool(fx.rejected_mics)
        bound = crlb_covariance(src, ARRAY_40M, ds.pairs, ds.covariance_s2, sim.sound_speed_mps,
                                wind_mps=kw.get("wind_mps"))
        crlb_tr.append(np.trace(bound[:2, :2]))
    errs = np.array(errs)
    rmse = np.sqrt(np.mean(np.sum(errs**2, axis=1)))
    return rmse, np.sqrt(np.mean(crlb_tr)), hits / len(positions), rejected, errs


def _inside_positions(rng, n):
    poly = PolyPath(ARRAY_40M[:4, :2])
    out = []
    while len(out) < n:
        p = rng.uniform([0, 0], [40, 38])
        if poly.contains_point(p):
            out.append(np.array([p[0], p[1], 0.0]))
    return out


def test_inside_the_array_rmse_near_crlb_and_ellipses_calibrated():
    rng = np.random.default_rng(2026)
    rmse, crlb, coverage, rejected, _ = _monte_carlo(_inside_positions(rng, 200), rng)
    print(f"inside: RMSE {rmse * 1e3:.4f} mm, CRLB {crlb * 1e3:.4f} mm, "
          f"ratio {rmse / crlb:.2f}, 95 % coverage {coverage:.3f}, rejected {rejected}")
    assert rmse <= 1.3 * crlb
    assert 0.90 <= coverage <= 0.99
    assert rejected <= 2


def test_source_150_m_outside_the_array_has_large_but_honest_ellipses():
    rng = np.random.default_rng(150)
    az = rng.uniform(0, 2 * np.pi, 200)
    radius = 150.0 + 27.0  # 150 m beyond the array edge (~27 m from its centre)
    positions = [np.array([CENTRE_40M[0] + radius * np.sin(a),
                           CENTRE_40M[1] + radius * np.cos(a), 0.0]) for a in az]
    rmse, crlb, coverage, _, _ = _monte_carlo(positions, rng)
    print(f"outside: RMSE {rmse * 1e3:.3f} mm, CRLB {crlb * 1e3:.3f} mm, "
          f"ratio {rmse / crlb:.2f}, 95 % coverage {coverage:.3f}")
    assert rmse <= 1.3 * crlb
    assert 0.90 <= coverage <= 0.99


def test_mic_with_4_ms_clock_error_is_rejected_and_the_fix_stays_good():
    rng = np.random.default_rng(4)
    positions = _inside_positions(rng, 100)
    clock = np.array([0.0, 0.0, 0.004, 0.0, 0.0])
    errs_bad, errs_ref, rejected_right = [], [], 0
    keep = np.array([0, 1, 3, 4])
    for src in positions:
        ds, sim = burst_delays(ARRAY_40M, src, rng, clock_offsets_s=clock)
        fx = locate_source(ARRAY_40M, ds, sim.sound_speed_mps, mic_names=list("ABCDE"))
        rejected_right += fx.rejected_mics == ["C"]
        errs_bad.append(fx.position_m[:2] - src[:2])
        # reference: the same delays with mic C simply left out
        sel = np.flatnonzero(np.all(np.isin(ds.pairs, keep), axis=1))
        sub = ds.subset(np.isin(np.arange(len(ds.pairs)), sel))
        remap = {m: k for k, m in enumerate(keep)}
        sub = DelaySet(**{**sub.__dict__,
                          "pairs": np.vectorize(remap.get)(sub.pairs)})
        ref = locate_source(ARRAY_40M[keep], sub, sim.sound_speed_mps, reject=False)
        errs_ref.append(ref.position_m[:2] - src[:2])
    rmse_bad = np.sqrt(np.mean(np.sum(np.square(errs_bad), axis=1)))
    rmse_ref = np.sqrt(np.mean(np.sum(np.square(errs_ref), axis=1)))
    print(f"clock fault: rejected correctly {rejected_right}/100, RMSE {rmse_bad * 1e3:.4f} mm "
          f"vs {rmse_ref * 1e3:.4f} mm without the mic")
    assert rejected_right >= 95
    assert rmse_bad <= 1.1 * rmse_ref


@pytest.mark.parametrize("temperature_c", [-15.0, 38.0])
def test_cold_and_hot_sites_show_no_bias_beyond_the_noise(temperature_c):
    rng = np.random.default_rng(int(temperature_c) + 100)
    src = np.array([28.0, 12.0, 0.0])
    rmse, crlb, coverage, _, errs = _monte_carlo([src] * 60, rng, temperature_c=temperature_c,
                                                 relative_humidity=60.0)
    mean = errs.mean(axis=0)
    se = errs.std(axis=0, ddof=1) / np.sqrt(len(errs))
    print(f"{temperature_c} degC: bias {mean * 1e3} mm, se {se * 1e3} mm")
    assert np.all(np.abs(mean) <= 3.5 * se)
    # the temperature matters: the 20 degC sound speed would be biased by far more
    ds, sim = burst_delays(ARRAY_40M, src, rng, temperature_c=temperature_c,
                           relative_humidity=60.0)
    wrong = locate_source(ARRAY_40M, ds, sound_speed_mps(20.0, 60.0))
    assert np.linalg.norm(wrong.position_m[:2] - src[:2]) > 100 * np.max(se)


def test_eight_metre_per_second_wind_shows_no_bias_beyond_the_noise():
    rng = np.random.default_rng(8)
    src = np.array([9.0, 27.0, 0.0])
    wind = wind_vector_mps(8.0, 250.0)
    rmse, crlb, coverage, _, errs = _monte_carlo([src] * 60, rng, wind_mps=wind)
    mean = errs.mean(axis=0)
    se = errs.std(axis=0, ddof=1) / np.sqrt(len(errs))
    print(f"wind: bias {mean * 1e3} mm, se {se * 1e3} mm, coverage {coverage}")
    assert np.all(np.abs(mean) <= 3.5 * se)
    assert 0.85 <= coverage <= 1.0
