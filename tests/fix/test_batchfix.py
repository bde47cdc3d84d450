"""Batched locator: the same fixes as locate_source and as scipy's least squares."""

import numpy as np
import pytest
from scipy.optimize import least_squares

from locate.fix.batched import locate_batch
from locate.fix.solver import locate_source, predict_delays
from locate.signal.delays import DelaySet, all_pairs

MM = 1e-3
C = 343.0
# An invented 8-mic layout over a 20 m yard.
MICS = np.array([[0, 0, 1.2], [20, 0, 1.5], [20, 18, 1.1], [0, 18, 1.3], [10, 9, 1.0],
                 [5, 14, 1.2], [15, 3, 1.4], [3, 6, 1.1]], float)
PAIRS = all_pairs(len(MICS))


def _sets(n, rng, dims=2, bad_every=0, echo_every=0):
    p = len(PAIRS)
    z = np.zeros(n) if dims == 2 else rng.uniform(0.0, 8.0, n)
    src = np.column_stack([rng.uniform(-30, 50, n), rng.uniform(-30, 50, n), z])
    b = np.zeros((p, len(MICS)))
    b[np.arange(p), PAIRS[:, 1]] = 1.0
    b[np.arange(p), PAIRS[:, 0]] = -1.0
    s_mic = rng.uniform(5e-6, 20e-6, (n, len(MICS)))
    s_pair = rng.uniform(2e-6, 8e-6, (n, p))
    q = np.einsum("pi,wi,qi->wpq", b, s_mic**2, b) + np.einsum("wp,pq->wpq", s_pair**2,
                                                                np.eye(p))
    d = predict_delays(src, MICS, PAIRS, C) + np.einsum("wpq,wq->wp", np.linalg.cholesky(q),
                                                        rng.normal(size=(n, p)))
    if bad_every:  # a 300 us clock error at mic 4 in some sets
        off = np.zeros((n, len(MICS)))
        off[::bad_every, 3] = 300e-6
        d = d + off[:, PAIRS[:, 1]] - off[:, PAIRS[:, 0]]
    if echo_every:  # one pair's peak on an echo 2 ms late in some other sets
        d[3::echo_every, 10] += 2e-3
    return src, d, q


def _delay_set(d, q):
    p = len(PAIRS)
    return DelaySet(pairs=PAIRS, delay_s=d, sd_s=np.sqrt(np.diag(q)), covariance_s2=q,
                    peak=np.ones(p), score=np.full(p, np.inf), second_ratio=np.zeros(p),
                    quality=("good",) * p, t_s=0.0, duration_s=0.5, band_hz=(100.0, 3000.0),
                    sample_rate_hz=48000.0, max_lag_s=np.full(p, 0.1))


@pytest.mark.parametrize("dims", [2, 3])
def test_batch_fixes_match_locate_source_including_rejected_mics(dims):
    # Reference: locate.fix.solver.locate_source, set by set (integrity test and mic exclusion on).
    rng = np.random.default_rng(3 + dims)
    _, d, q = _sets(60, rng, dims=dims, bad_every=6, echo_every=10)
    bf = locate_batch(MICS, d, q, C, dims=dims)
    assert bf.single[3::10].all()  # the pair that does not close goes to locate_source
    for w in range(len(d)):
        fx = locate_source(MICS, _delay_set(d[w], q[w]), C, dims=dims)
        # 1 um; locate_source stops its steps at a chi-square change of 1e-10, which along a
        # weak height direction (3-D) is up to 1e-4 of the position sd away from the minimum
        sd_max = np.sqrt(np.linalg.eigvalsh(fx.covariance_m2).max())
        tol = max(1e-3 * MM, 1e-4 * sd_max) if dims == 3 else 1e-3 * MM
        assert np.linalg.norm(bf.position_m[w] - fx.position_m) < tol
        assert np.allclose(bf.covariance_m2[w], fx.covariance_m2, rtol=1e-6 if dims == 2 else 1e-3,
                           atol=1e-12)
        names = [f"M{k + 1}" for k in np.flatnonzero(bf.rejected[w])]
        assert names == fx.rejected_mics
        assert bf.chi2[w] == pytest.approx(fx.chi2, rel=1e-6, abs=1e-9)
    # most sets with the clock error lost mic 4 (a few geometries absorb it into the position)
    assert bf.rejected[::6, 3].mean() >= 0.8 and not bf.rejected[1::6].any()


def test_batch_fix_is_the_least_squares_minimum_found_by_scipy():
    # Reference: scipy.optimize.least_squares on the whitened pair-delay residuals.
    rng = np.random.default_rng(8)
    _, d, q = _sets(5, rng)
    bf = locate_batch(MICS, d, q, C)
    for w in range(5):
        winv = np.linalg.inv(np.linalg.cholesky(q[w]))

        def resid(p, w=w, winv=winv):
            pred = predict_delays(np.array([p[0], p[1], 0.0]), MICS, PAIRS, C)
            return winv @ (d[w] - pred)

        ref = least_squares(resid, bf.position_m[w, :2] + 0.5, xtol=1e-14, ftol=1e-14,
                            gtol=1e-14)
        assert np.linalg.norm(ref.x - bf.position_m[w, :2]) < 1e-3 * MM  # 1 um


def test_shared_covariance_broadcasts_and_bad_sets_are_marked():
    # common practice: one covariance for every set; a non-finite set gives no position
    rng = np.random.default_rng(9)
    src, _, q = _sets(4, rng)
    noise = np.linalg.cholesky(q[0]) @ rng.normal(size=(len(PAIRS), 4))
    d = predict_delays(src, MICS, PAIRS, C) + noise.T
    d[2, 5] = np.nan
    bf = locate_batch(MICS, d, q[0], C, fallback=False)
    assert bf.position_m.shape == (4, 3) and bf.covariance_m2.shape == (4, 3, 3)
    assert bf.single[2] and not bf.single[[0, 1, 3]].any()
    with pytest.raises(ValueError, match="dims"):
        locate_batch(MICS, d, q, C, dims=4)
