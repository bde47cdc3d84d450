"""Stationary locator: reference-solver agreement, ellipse scale, integrity test, geometry."""

import numpy as np
import pytest
from scipy import optimize, stats

from locate.errors import NothingFoundError
from locate.fix.solver import arrival_times, locate_source, predict_delays
from locate.geometry.ellipses import crlb_covariance, ellipse, gdop
from locate.physics.air import travel_time_s
from locate.signal.delays import DelaySet, all_pairs
from tests.scenes import ARRAY_40M

MM = 1e-3
US = 1e-6


def synthetic_delays(mics, source, sd_s, rng, *, c=343.0, wind=None, clock=None):
    """Delay set from exact geometry + independent per-mic arrival noise (sd_s each)."""
    n = len(mics)
    pairs = all_pairs(n)
    t = travel_time_s(source, mics, c, wind) + rng.normal(0.0, sd_s, n)
    if clock is not None:
        t = t + clock
    a = np.zeros((len(pairs), n))
    a[np.arange(len(pairs)), pairs[:, 0]] = -1.0
    a[np.arange(len(pairs)), pairs[:, 1]] = 1.0
    cov = sd_s**2 * a @ a.T + np.eye(len(pairs)) * (0.05 * sd_s) ** 2
    d = t[pairs[:, 1]] - t[pairs[:, 0]] + rng.normal(0, 0.05 * sd_s, len(pairs))
    return DelaySet(pairs=pairs, delay_s=d, sd_s=np.sqrt(np.diag(cov)), covariance_s2=cov,
                    peak=np.ones(len(pairs)), score=np.full(len(pairs), 100.0),
                    second_ratio=np.zeros(len(pairs)), quality=("good",) * len(pairs), t_s=0.0,
                    duration_s=1.0, band_hz=(100.0, 4000.0), sample_rate_hz=48000.0,
                    max_lag_s=np.full(len(pairs), 0.2))


def test_solution_agrees_with_scipy_least_squares():
    # Reference: scipy.optimize.least_squares on the same whitened arrival-time residuals.
    rng = np.random.default_rng(2)
    src = np.array([27.0, 11.0, 0.0])
    ds = synthetic_delays(ARRAY_40M, src, 20 * US, rng)
    fx = locate_source(ARRAY_40M, ds, 343.0, dims=2, source_z_m=0.0)
    tau, cov, _, _ = arrival_times(ds, len(ARRAY_40M))
    z = tau[1:]
    chol = np.linalg.cholesky(cov[1:, 1:])

    def resid(p):
        t = travel_time_s(np.array([p[0], p[1], 0.0]), ARRAY_40M, 343.0)
        return np.linalg.solve(chol, z - (t[1:] - t[0]))

    ref = optimize.least_squares(resid, x0=[20.0, 18.0], xtol=1e-15, ftol=1e-15, gtol=1e-15)
    assert fx.position_m[:2] == pytest.approx(ref.x, abs=0.01 * MM)
    # covariance = (J^T J)^-1 of the whitened problem (reference Jacobian from scipy)
    ref_cov = np.linalg.inv(ref.jac.T @ ref.jac)
    assert fx.covariance_m2[:2, :2] == pytest.approx(ref_cov, rel=1e-3)


def test_ellipse_uses_the_chi_square_two_dof_scale():
    # Reference: scipy.stats.chi2.ppf(0.95, 2) = 5.991; semi-axes = sqrt(k * eigenvalues).
    cov = np.array([[4.0, 1.2], [1.2, 1.0]])
    e = ellipse(cov, 0.95)
    vals = np.linalg.eigvalsh(cov)
    k = stats.chi2.ppf(0.95, 2)
    assert k == pytest.approx(5.991, abs=1e-3)
    assert e["semi_major_m"] == pytest.approx(np.sqrt(k * vals[1]))
    assert e["semi_minor_m"] == pytest.approx(np.sqrt(k * vals[0]))
    # major axis closer to x (east) than y: azimuth between 45 and 135 deg from north
    assert 45.0 < e["azimuth_deg"] < 135.0
    assert ellipse(np.diag([1.0, 9.0]))["azimuth_deg"] == pytest.approx(0.0, abs=1e-9)


def test_crlb_matches_the_locator_covariance_at_the_truth_for_small_noise():
    rng = np.random.default_rng(8)
    src = np.array([12.0, 30.0, 0.0])
    ds = synthetic_delays(ARRAY_40M, src, 1 * US, rng)
    fx = locate_source(ARRAY_40M, ds, 343.0)
    bound = crlb_covariance(src, ARRAY_40M, ds.pairs, ds.covariance_s2, 343.0)
    assert fx.covariance_m2[:2, :2] == pytest.approx(bound[:2, :2], rel=0.01)


def test_gdop_grows_outside_the_array():
    # Common practice: positioning accuracy degrades quickly outside the array.
    assert gdop([20.0, 18.0, 0.0], ARRAY_40M, 343.0) < gdop([220.0, 18.0, 0.0], ARRAY_40M,
                                                             343.0) / 10


def test_synthetic_monte_carlo_is_efficient_and_calibrated():
    # Fast check on exact synthetic delays (the audio-level check is in test_acceptance_fix).
    rng = np.random.default_rng(21)
    errs, inside = [], 0
    src = np.array([31.0, 7.0, 0.0])
    for _ in range(300):
        ds = synthetic_delays(ARRAY_40M, src, 10 * US, rng)
        fx = locate_source(ARRAY_40M, ds, 343.0)
        e = fx.position_m[:2] - src[:2]
        errs.append(e)
        inside += e @ np.linalg.solve(fx.covariance_m2[:2, :2], e) <= 5.991
    bound = crlb_covariance(src, ARRAY_40M, ds.pairs, ds.covariance_s2, 343.0)
    rmse = np.sqrt(np.mean(np.sum(np.square(errs), axis=1)))
    assert rmse <= 1.15 * np.sqrt(np.trace(bound))
    assert 0.92 <= inside / 300 <= 0.98


def test_mic_with_a_gross_clock_error_is_rejected():
    rng = np.random.default_rng(5)
    src = np.array([18.0, 25.0, 0.0])
    clock = np.array([0.0, 0.0, 4e-3, 0.0, 0.0])
    ds = synthetic_delays(ARRAY_40M, src, 5 * US, rng, clock=clock)
    fx = locate_source(ARRAY_40M, ds, 343.0, mic_names=list("ABCDE"))
    assert fx.rejected_mics == ["C"]
    assert np.linalg.norm(fx.position_m[:2] - src[:2]) < 5 * MM
    assert any("rejected" in w for w in fx.warnings)


SEVEN_MICS = np.array([[0.0, 0.0, 1.2], [40.0, 0.0, 1.5], [38.0, 35.0, 1.1], [2.0, 38.0, 1.3],
                       [20.0, 18.0, 1.0], [-10.0, 20.0, 1.4], [25.0, -12.0, 1.2]])


def test_two_mics_with_gross_clock_errors_are_both_rejected():
    # With two faults of tens of ms against a 5 us timing sd every single exclusion leaves a
    # chi-square whose p-value underflows to 0; the exclusions must still be ranked.
    rng = np.random.default_rng(9)
    src = np.array([31.0, 12.0, 0.0])
    clock = np.array([0.0, 0.0, 0.031, 0.0, -0.0035, 0.0, 0.0])
    ds = synthetic_delays(SEVEN_MICS, src, 5 * US, rng, clock=clock)
    fx = locate_source(SEVEN_MICS, ds, 343.0, mic_names=list("ABCDEFG"))
    assert sorted(fx.rejected_mics) == ["C", "E"]
    assert np.linalg.norm(fx.position_m[:2] - src[:2]) < 5 * MM
    from locate.fix.batched import locate_batch
    bf = locate_batch(SEVEN_MICS, ds.delay_s[None], ds.covariance_s2, 343.0, fallback=False)
    assert list(np.flatnonzero(bf.rejected[0])) == [2, 4]
    assert np.linalg.norm(bf.position_m[0, :2] - src[:2]) < 5 * MM


@pytest.mark.parametrize("chi2, dof", [(3.0, 2), (50.0, 3), (300.0, 3), (700.0, 6)])
def test_log_p_value_matches_scipy_where_scipy_is_finite(chi2, dof):
    # reference: scipy.stats.chi2.logsf; beyond its range the asymptotic series takes over
    from locate.fix.solver import _log_p_value
    assert _log_p_value(chi2, dof) == pytest.approx(stats.chi2.logsf(chi2, dof), rel=1e-9)
    assert np.isfinite(_log_p_value(1e9, dof)) and _log_p_value(1e9, dof) < -4e8


def test_mirror_solution_is_reported_for_a_three_mic_layout():
    # Three mics, two range differences: two hyperbola branches can cross twice.
    mics = np.array([[0.0, 0.0, 0.0], [30.0, 0.0, 0.0], [0.0, 30.0, 0.0]])
    src = np.array([60.0, 55.0, 0.0])
    rng = np.random.default_rng(1)
    ds = synthetic_delays(mics, src, 1 * US, rng)
    fx = locate_source(mics, ds, 343.0)
    sols = [fx.position_m] + ([fx.mirror_position_m] if fx.mirror_position_m is not None else [])
    assert min(np.linalg.norm(s[:2] - src[:2]) for s in sols) < 0.01
    # the exact delays of both solutions agree (that is why both are reported)
    if fx.mirror_position_m is not None:
        d1 = predict_delays(fx.position_m, mics, ds.pairs, 343.0)
        d2 = predict_delays(fx.mirror_position_m, mics, ds.pairs, 343.0)
        assert np.max(np.abs(d1 - d2)) < 20 * US
        assert any("ambiguous geometry" in w for w in fx.warnings)


def test_three_dimensional_fix_recovers_height():
    mics = np.array([[0, 0, 1.0], [40, 0, 6.0], [38, 35, 1.2], [2, 38, 10.0], [20, 18, 1.0],
                     [50, 20, 3.0]], float)
    src = np.array([15.0, 22.0, 25.0])
    rng = np.random.default_rng(6)
    ds = synthetic_delays(mics, src, 2 * US, rng)
    fx = locate_source(mics, ds, 343.0, dims=3)
    assert fx.position_m == pytest.approx(src, abs=0.05)
    assert fx.covariance_m2[2, 2] > 0


def test_wind_enters_the_time_of_flight():
    rng = np.random.default_rng(4)
    src = np.array([10.0, 30.0, 0.0])
    wind = np.array([8.0, 0.0, 0.0])
    ds = synthetic_delays(ARRAY_40M, src, 2 * US, rng, wind=wind)
    with_wind = locate_source(ARRAY_40M, ds, 343.0, wind_mps=wind)
    without = locate_source(ARRAY_40M, ds, 343.0)
    assert np.linalg.norm(with_wind.position_m[:2] - src[:2]) < 5 * MM
    assert np.linalg.norm(without.position_m[:2] - src[:2]) > 0.1


def test_too_few_usable_mics_is_a_clear_error():
    rng = np.random.default_rng(0)
    mics = ARRAY_40M[:2]
    ds = synthetic_delays(mics, np.array([5.0, 5.0, 0.0]), 1 * US, rng)
    with pytest.raises(NothingFoundError, match="needs at least 3"):
        locate_source(mics, ds, 343.0)
