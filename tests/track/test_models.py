"""Motion models chosen by the data, misfit flags and the track uncertainty budget.

Delays are the exact retarded-time delays of a known path (locate.track.retarded.predict_delays,
checked against the simulator in test_motion.py) plus Gaussian arrival noise, so the truth is
known exactly; references are named beside each check.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from locate import synth
from locate.accuracy.inputs import nuisance_sds
from locate.track import models
from locate.track.budget import track_budget
from locate.track.motion import Path, SplinePath, spline_basis, straight_path
from locate.track.pathfit import fit_path
from locate.track.retarded import Parametrisation, predict_delays
from locate.track.tracker import describe_fit

C = 343.0
MICS = np.array([(0, 0, 1.5), (25, 5, 1.2), (10, 30, 1.5), (-20, 20, 1.3), (-15, -15, 1.4),
                 (20, -20, 1.6)], float)
PAIRS = np.stack(np.triu_indices(6, 1), axis=1)
DIFF = np.zeros((len(PAIRS), 6))
DIFF[np.arange(len(PAIRS)), PAIRS[:, 1]] = 1.0
DIFF[np.arange(len(PAIRS)), PAIRS[:, 0]] = -1.0
SD = 20e-6  # s per arrival
CHI2_95_2D = stats.chi2.ppf(0.95, 2)  # scipy.stats.chi2


def _delays(path, t_c, rng, mics=MICS, sd=SD):
    degree = path.degree if isinstance(path, SplinePath) else 1
    par = Parametrisation(path.knot_times_s, 2, 0.5, degree)
    d0 = predict_delays(par, par.theta(path), t_c, mics, PAIRS, C, jacobian=False)[0]
    noise = rng.normal(size=(len(t_c), 6)) * sd
    cov = np.broadcast_to(sd**2 * DIFF @ DIFF.T, (len(t_c), len(PAIRS), len(PAIRS)))
    return d0 + noise[:, PAIRS[:, 1]] - noise[:, PAIRS[:, 0]], cov


TURN = Path(np.array([0.0, 6.0, 12.0]),
            np.array([[-70.0, -35.0, 0.5], [2.0, -35.0, 0.5], [2.0, 37.0, 0.5]]))
T_C = np.arange(0.6, 12.0, 0.2)


def _choose(path, requested="auto", seed=3):
    d, cov = _delays(path, T_C, np.random.default_rng(seed))
    straight = fit_path(T_C, d, cov, MICS, PAIRS, C, source_z_m=0.5)
    data = (T_C, d, cov, np.ones(d.shape, bool), None, MICS, PAIRS, C,
            dict(dims=2, source_z_m=0.5))
    return models.choose_model(requested, straight, data), data, straight


def test_spline_basis_matches_scipy_and_continues_straight():
    # scipy.interpolate.BSpline is the reference inside the breakpoints; outside, the path keeps
    # its end velocity (the model's stated convention).
    from scipy.interpolate import BSpline

    br = np.array([0.0, 2.0, 5.0, 6.0])
    knots = np.concatenate([[0.0, 0.0], br, [6.0, 6.0]])
    t = np.linspace(0.0, 6.0, 31)
    ref = BSpline(knots, np.eye(5), 2)(t)
    np.testing.assert_allclose(spline_basis(br, 2, t), ref, atol=1e-12)
    coef = np.random.default_rng(0).normal(size=(5, 3))
    path = SplinePath(br, coef, 2)
    np.testing.assert_allclose(path.position_m(7.5), path.position_m(6.0)
                               + 1.5 * path.velocity_mps(6.0), atol=1e-12)


@pytest.mark.parametrize("degree", [1, 2])
def test_delay_jacobian_of_both_path_families_matches_central_differences(degree):
    # textbook calculus: central differences of predict_delays against the exact Jacobian
    par = Parametrisation(np.array([0.0, 4.0, 8.0]), 2, 0.5, degree)
    theta = par.theta(straight_path([-60, -20, 0.5], [12, 3, 0], 0.0))
    theta = theta + np.random.default_rng(1).normal(size=theta.size)
    t = np.linspace(0.5, 8.0, 12)
    _, jac, _ = predict_delays(par, theta, t, MICS, PAIRS, C)
    num = np.zeros_like(jac)
    for k in range(theta.size):
        h = np.zeros(theta.size)
        h[k] = 1e-4
        num[..., k] = (predict_delays(par, theta + h, t, MICS, PAIRS, C, jacobian=False)[0]
                       - predict_delays(par, theta - h, t, MICS, PAIRS, C, jacobian=False)[0]
                       ) / 2e-4
    np.testing.assert_allclose(jac, num, atol=1e-9)


def test_straight_pass_keeps_the_straight_model():
    path = straight_path([-100.0, -30.0, 0.5], [18.0, 5.0, 0.0], 0.0, (0.0, 12.0))
    (chosen, cands), _, _ = _choose(path)
    assert chosen.model == "straight"
    assert models.adequacy(chosen.fit)["adequate"]


def test_a_turn_is_found_by_the_bic_within_half_a_second():
    # Issue 16: the turn found within 0.5 s; the piecewise-straight model beats the straight
    # one by the BIC (Schwarz 1978) and explains the delays (reduced chi-square ~1).
    (chosen, cands), data, _ = _choose(TURN)
    assert chosen.model == "segments"
    chosen = models.polish_knots(models.prune(chosen, data, chosen.fit.used), data,
                                 np.ones(T_C.size, bool))
    turns = [t for t in models.turns(chosen.fit) if t["is_turn"]]
    assert len(turns) == 1 and abs(turns[0]["t_s"] - 6.0) <= 0.5
    assert abs(turns[0]["heading_change_deg"] + 90.0) < 5.0  # east -> north: -90 deg
    adq = models.adequacy(chosen.fit)
    assert adq["adequate"] and adq["chi2_reduced"] < 1.5


def test_constant_acceleration_is_the_smooth_model():
    # 5 -> 30 m/s at 2.5 m/s^2 (textbook kinematics, locate.synth.AcceleratingPath): the
    # quadratic B-spline represents it exactly.
    acc = synth.AcceleratingPath([-60.0, -25.0, 0.5], [5.0, 0.0, 0.0], [2.5, 0.0, 0.0])
    t = np.linspace(-1.0, 13.0, 8)
    par = Parametrisation(np.array([-1.0, 13.0]), 2, 0.5, 2)
    fitted = SplinePath(np.array([-1.0, 13.0]),
                        np.c_[np.linalg.lstsq(spline_basis(par.knot_times_s, 2, t),
                                              acc.position_m(t)[:, :2], rcond=None)[0],
                              np.full(3, 0.5)], 2)
    np.testing.assert_allclose(fitted.position_m(t), acc.position_m(t), atol=1e-9)
    (chosen, _), _, _ = _choose(fitted)
    assert chosen.model == "smooth"
    v = np.linalg.norm(chosen.fit.path.velocity_mps(chosen.fit.t_emit_s), axis=1)
    true_v = np.linalg.norm(fitted.velocity_mps(chosen.fit.t_emit_s), axis=1)
    assert np.max(np.abs(v - true_v)) < 0.2  # m/s


def test_forced_straight_model_on_a_turn_is_flagged_and_its_ellipses_cover_the_error():
    (_, _), data, straight = _choose(TURN, "straight")
    adq = models.adequacy(straight)
    assert not adq["adequate"] and adq["chi2_reduced"] > 100
    res = describe_fit(straight, MICS, C)
    err = (res.position_m - TURN.position_m(res.t_emit_s))[:, :2]
    m2 = lambda cov: np.einsum("wi,wij,wj->w", err, np.linalg.inv(cov[:, :2, :2]), err)  # noqa
    assert np.mean(m2(res.covariance_m2) < CHI2_95_2D) < 0.5  # overconfident as fitted
    shift, wcov = models.window_displacements(straight, data[1], data[2], data[3], MICS, PAIRS,
                                              C)
    grown = models.inflate(res.covariance_m2, shift, wcov, adq["window_chi2_reduced"])
    assert np.mean(m2(grown) < CHI2_95_2D) >= 0.85


@pytest.mark.slow
def test_declared_mic_position_sd_matches_a_monte_carlo_of_the_path():
    # JCGM 101:2008 style check of the first-order budget (JCGM 100:2008 eq. 13): the mics are
    # displaced by N(0, 5 cm) per axis, the delays are those of the displaced array plus 5 us
    # timing noise, the path is fitted with the nominal array; the scatter of three track points
    # over the draws against the budget's sd (timing and survey components added).
    rng = np.random.default_rng(11)
    path = straight_path([-100.0, -30.0, 0.5], [18.0, 5.0, 0.0], 0.0, (0.0, 12.0))
    t_c = np.arange(0.5, 12.0, 0.5)
    sds = nuisance_sds(6, position_sd_m=0.05, height_sd_m=0.0)
    idx = [0, len(t_c) // 2, -1]
    errs = []
    for _ in range(50):
        moved = MICS + rng.normal(size=MICS.shape) * np.array([0.05, 0.05, 0.0])
        d, cov = _delays(path, t_c, rng, mics=moved, sd=5e-6)
        fit = fit_path(t_c, d, cov, MICS, PAIRS, C, source_z_m=0.5, reject=False)
        errs.append((fit.path.position_m(fit.t_emit_s) - path.position_m(fit.t_emit_s))[idx])
    scatter = np.std(np.array(errs), axis=0)[:, :2]  # (3 points, 2 axes)
    d, cov = _delays(path, t_c, rng, sd=5e-6)
    fit = fit_path(t_c, d, cov, MICS, PAIRS, C, source_z_m=0.5, reject=False)
    bud = track_budget(fit, cov, np.ones(d.shape, bool), MICS, PAIRS, C, None, sds)
    timing = describe_fit(fit, MICS, C).covariance_m2
    pred = np.sqrt(np.diagonal(timing + bud["point_cov"], axis1=1, axis2=2)[idx, :2])
    # 50 draws: the sd of an sd estimate is ~10 %; allow 30 %
    np.testing.assert_allclose(scatter, pred, rtol=0.3)
    assert bud["components"] == {"mic_positions": pytest.approx(1.0)}


@pytest.mark.slow
def test_declared_source_height_sd_matches_a_monte_carlo_of_the_path():
    # JCGM 101:2008 style check of the height term of locate.track.budget (first order, the
    # path's change per metre of height): true heights drawn uniformly over z0 -+ sqrt(3) sd
    # (sd 0.4 m),
    # exact delays plus 5 us timing noise, the path fitted at the stated 0.8 m; the rms error
    # of three track points against the budget's rms (timing and height components added).
    rng = np.random.default_rng(12)
    z0, z_sd = 0.8, 0.4
    t_c = np.arange(0.5, 12.0, 0.5)
    sds = nuisance_sds(6, source_height_sd_m=z_sd)
    idx = [0, len(t_c) // 2, -1]
    errs = []
    for _ in range(40):
        z = z0 + rng.uniform(-1.0, 1.0) * np.sqrt(3.0) * z_sd
        path = straight_path([-100.0, -30.0, z], [18.0, 5.0, 0.0], 0.0, (0.0, 12.0))
        par = Parametrisation(path.knot_times_s, 2, z, 1)
        d = predict_delays(par, par.theta(path), t_c, MICS, PAIRS, C, jacobian=False)[0]
        noise = rng.normal(size=(len(t_c), 6)) * 5e-6
        d = d + noise[:, PAIRS[:, 1]] - noise[:, PAIRS[:, 0]]
        cov = np.broadcast_to(25e-12 * DIFF @ DIFF.T, (len(t_c), len(PAIRS), len(PAIRS)))
        fit = fit_path(t_c, d, cov, MICS, PAIRS, C, source_z_m=z0, reject=False)
        errs.append((fit.path.position_m(fit.t_emit_s) - path.position_m(fit.t_emit_s))[idx])
    rms = np.sqrt(np.mean(np.array(errs) ** 2, axis=0))[:, :2]  # (3 points, 2 axes)
    path = straight_path([-100.0, -30.0, z0], [18.0, 5.0, 0.0], 0.0, (0.0, 12.0))
    d, cov = _delays(path, t_c, rng, sd=5e-6)
    fit = fit_path(t_c, d, cov, MICS, PAIRS, C, source_z_m=z0, reject=False)
    bud = track_budget(fit, cov, np.ones(d.shape, bool), MICS, PAIRS, C, None, sds)
    timing = describe_fit(fit, MICS, C).covariance_m2
    pred = np.sqrt(np.diagonal(timing + bud["point_cov"], axis1=1, axis2=2)[idx, :2])
    # the height term dominates (far above the 5 us timing part); 40 draws: allow 35 %
    assert np.all(np.trace(bud["point_cov"][idx, :2, :2], axis1=1, axis2=2)
                  > 3 * np.trace(timing[idx, :2, :2], axis1=1, axis2=2))
    np.testing.assert_allclose(rms, pred, rtol=0.35)
    assert bud["components"] == {"source_height": pytest.approx(1.0)}
