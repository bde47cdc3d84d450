"""Kinematics of moving sources: paths, emission (retarded) times, predicted delays."""

import numpy as np
import pytest
from scipy import optimize

from locate.errors import ConvergenceError
from locate.physics import air
from locate.track.motion import (
    Path,
    closest_approach,
    emission_time_iterative_s,
    emission_time_s,
    heading_deg,
    straight_path,
)
from locate.track.retarded import Parametrisation, arrival_times, predict_delays

US = 1e-6
NS = 1e-9
MM = 1e-3

MICS = np.array([(0, 0, 1.5), (25, 5, 1.2), (10, 30, 1.5), (-20, 20, 1.3), (-15, -15, 1.4),
                 (20, -20, 1.6)], float)
PAIRS = np.stack(np.triu_indices(6, 1), axis=1)
C = 343.0


class _Curved:
    """A path that is not a Path: constant-speed circle (for the iterative solver)."""

    def __init__(self, centre, radius, omega):
        self.centre, self.radius, self.omega = np.asarray(centre, float), radius, omega

    def position_m(self, t):
        a = self.omega * np.asarray(t, float)
        return self.centre + self.radius * np.stack([np.cos(a), np.sin(a), 0 * a], -1)

    def velocity_mps(self, t):
        a = self.omega * np.asarray(t, float)
        return self.radius * self.omega * np.stack([-np.sin(a), np.cos(a), 0 * a], -1)


def test_closed_form_emission_time_satisfies_the_retarded_time_equation():
    # Textbook kinematics: the sound heard at m at t left at t_e with t = t_e + |p(t_e) - m| / c.
    path = straight_path([-300.0, -40.0, 2.0], [55.0, 10.0, 0.0], 0.0)
    t_h = np.linspace(0.0, 12.0, 41)
    t_e = emission_time_s(t_h[:, None], MICS[None], path, C)
    dist = np.linalg.norm(path.position_m(t_e) - MICS[None], axis=-1)
    np.testing.assert_allclose(t_e + dist / C, np.repeat(t_h[:, None], 6, 1), atol=1 * NS)
    assert np.all(t_e < t_h[:, None])


def test_closed_form_matches_iteration_and_a_reference_root_finder_with_wind():
    # Outside check: scipy.optimize.brentq on t_e + T(p(t_e) -> m) - t_h (textbook kinematics;
    # T in wind from locate.physics.air.travel_time_s) against the closed-form quadratic root and
    # the
    # bounded Newton/fixed-point iteration.
    wind = air.wind_vector_mps(8.0, 300.0)
    path = Path(np.array([0.0, 5.0, 11.0]),
                np.array([[-150.0, 30.0, 1.0], [0.0, 30.0, 1.0], [60.0, -40.0, 3.0]]))
    t_h = np.array([-3.0, 0.5, 4.99, 5.0, 7.3, 14.0])
    m = MICS[2]
    closed = emission_time_s(t_h, m, path, C, wind)

    class Wrapped:  # hide the Path type so that the iterative solver is used
        position_m = staticmethod(path.position_m)
        velocity_mps = staticmethod(path.velocity_mps)

    iterative = emission_time_iterative_s(t_h, m, Wrapped(), C, wind)
    reference = [optimize.brentq(lambda e, t=t: e + air.travel_time_s(path.position_m(e), m, C,
                                                                       wind) - t, t - 10, t,
                                 xtol=1e-14) for t in t_h]
    np.testing.assert_allclose(closed, reference, atol=1 * NS)
    np.testing.assert_allclose(iterative, reference, atol=1 * NS)


def test_iterative_solver_handles_a_curved_path():
    # Reference: scipy.optimize.brentq on the same equation.
    path = _Curved([0.0, 0.0, 5.0], 80.0, 0.4)  # 32 m/s on a circle
    t_h = np.linspace(1.0, 9.0, 5)
    got = emission_time_iterative_s(t_h, MICS[1], path, C)
    ref = [optimize.brentq(lambda e, t=t: e + np.linalg.norm(path.position_m(e) - MICS[1]) / C - t,
                           t - 5, t, xtol=1e-14) for t in t_h]
    np.testing.assert_allclose(got, ref, atol=1 * NS)


def test_supersonic_source_raises_convergence_error():
    path = straight_path([0, 0, 0], [400.0, 0, 0])
    with pytest.raises(ConvergenceError, match="sound speed"):
        emission_time_s(np.array([1.0]), MICS[0], path, C)


def test_emission_time_broadcasts_times_against_mics():
    path = straight_path([-100.0, -30.0, 0.5], [20.0, 0.0, 0.0])
    t_e = emission_time_s(np.zeros((4, 1)), MICS[None], path, C)
    assert t_e.shape == (4, 6)
    one = emission_time_s(0.0, MICS[3], path, C)
    np.testing.assert_allclose(t_e[0, 3], one, atol=1e-15)


@pytest.mark.parametrize("kw", [dict(anchor="reference"), dict(anchor="pair"),
                                dict(retarded=False),
                                dict(warp=Path(np.array([0.0, 6.0, 14.0]),
                                               np.array([[-152, 28, 1], [-2, 33, 1],
                                                         [62, -18, 4.0]])))])
@pytest.mark.parametrize("dims", [2, 3])
def test_delay_jacobian_matches_central_differences(kw, dims):
    # Reference: central finite differences of the same predictions (step 0.1 mm).
    par = Parametrisation(np.array([0.0, 6.0, 14.0]), dims, 1.0)
    true = Path(par.knot_times_s, np.array([[-150.0, 30, 1], [0, 30, 1], [60, -20, 3]]))
    theta = par.theta(true)
    t_c = np.linspace(-1.0, 15.0, 23)
    wind = np.array([5.0, -3.0, 0.0])
    _, jac, _ = predict_delays(par, theta, t_c, MICS, PAIRS, C, wind, **kw)
    num = np.zeros_like(jac)
    for k in range(theta.size):
        h = np.zeros_like(theta)
        h[k] = 1e-4
        up = predict_delays(par, theta + h, t_c, MICS, PAIRS, C, wind, jacobian=False, **kw)[0]
        dn = predict_delays(par, theta - h, t_c, MICS, PAIRS, C, wind, jacobian=False, **kw)[0]
        num[..., k] = (up - dn) / 2e-4
    np.testing.assert_allclose(jac, num, atol=1e-9)  # s/m: 1 ns of delay per metre


def test_reference_anchored_delays_are_arrival_differences_of_one_emission():
    path = straight_path([-120.0, -30.0, 0.5], [20.0, 0.0, 0.0])
    par = Parametrisation(path.knot_times_s, 2, 0.5)
    t_c = np.array([1.0, 4.0, 9.0])
    d, _, t_e = predict_delays(par, par.theta(path), t_c, MICS, PAIRS, C)
    t_e0, arr = arrival_times(path, t_c, MICS, C)
    np.testing.assert_allclose(d, arr[:, PAIRS[:, 1]] - arr[:, PAIRS[:, 0]], atol=1 * NS)
    np.testing.assert_allclose(arr[:, 0], t_c, atol=1 * NS)
    np.testing.assert_allclose(t_e[:, 0], t_e0, atol=1 * NS)


def test_pair_anchor_centres_the_two_arrivals_on_the_window():
    path = straight_path([-120.0, -30.0, 0.5], [20.0, 0.0, 0.0])
    par = Parametrisation(path.knot_times_s, 2, 0.5)
    t_c = np.array([2.0, 6.0])
    _, _, e = predict_delays(par, par.theta(path), t_c, MICS, PAIRS, C, anchor="pair")
    p = path.position_m(e)
    a_i = e + np.linalg.norm(p - MICS[PAIRS[:, 0]], axis=-1) / C
    a_j = e + np.linalg.norm(p - MICS[PAIRS[:, 1]], axis=-1) / C
    np.testing.assert_allclose(0.5 * (a_i + a_j), np.repeat(t_c[:, None], 15, 1), atol=1 * NS)


def test_heading_is_clockwise_from_north():
    # Convention (docs/architecture.md): azimuth clockwise from +y (north) toward +x (east).
    v = np.array([[0, 1, 0], [1, 0, 0], [0, -1, 0], [-1, 0, 0], [1, 1, 0]], float)
    np.testing.assert_allclose(heading_deg(v), [0, 90, 180, 270, 45], atol=1e-12)


def test_closest_approach_of_a_straight_road():
    # Textbook geometry: a line y = -30 passes 30 m from the origin at x = 0.
    path = straight_path([-100.0, -30.0, 0.0], [20.0, 0.0, 0.0], 0.0)
    t, dist, pos = closest_approach(path, np.array([[0.0, 0.0, 0.0], [40.0, 10.0, 0.0]]))
    np.testing.assert_allclose(t, [5.0, 7.0], atol=1e-12)
    np.testing.assert_allclose(dist, [30.0, 40.0], atol=1 * MM)
    np.testing.assert_allclose(pos[1], [40.0, -30.0, 0.0], atol=1 * MM)


def test_path_rejects_non_increasing_knots():
    with pytest.raises(ValueError, match="increase"):
        Path(np.array([0.0, 0.0]), np.zeros((2, 3)))
