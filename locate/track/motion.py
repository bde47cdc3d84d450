"""Source paths and the retarded (emission) time of the sound heard from them.

A moving source is heard from where it *was*: the sound that reaches mic ``m`` at ``t_heard``
left the source at the emission time ``t_emit`` that solves

    t_heard = t_emit + T(p(t_emit) -> m)                                        (1)

with ``T`` the time of flight (still air or a uniform wind,
:func:`locate.physics.air.travel_time_s`).
This module holds the path model and the solvers of (1); :mod:`locate.track.tracker` fits paths to
measured delays.

Path model
----------
:class:`Path` is piecewise linear in time: knot times ``t_0 < ... < t_K`` and knot positions
``P_0 ... P_K``; between knots the source moves at constant velocity, and before the first /
after the last knot it keeps the velocity of the end segment.  One segment is the straight,
constant-velocity path; more segments give a manoeuvring path with continuous position and
piecewise-constant velocity.  The position is linear in the knot positions,
``p(t) = sum_k w_k(t) P_k``, which makes the Jacobians of the fit exact and cheap.

Sources
-------
* Retarded time, eq. (1), and its closed form for straight constant-velocity motion (textbook
  kinematics): with ``r = m - p(t_heard)`` and the source velocity ``v`` relative to the air
  ``u = v - w`` (``w`` the wind), ``tau = t_heard - t_emit`` solves
  ``|r + u tau| = c tau``, i.e. ``(c^2 - |u|^2) tau^2 - 2 (r.u) tau - |r|^2 = 0``.
* The bounded fixed-point / Newton iteration follows the light-travel-time pattern used by
  astronomy position libraries (re-evaluate the target at the emission time, stop below a
  tolerance, raise after N passes).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from locate.errors import ConvergenceError
from locate.physics import air

__all__ = [
    "Path",
    "SplinePath",
    "spline_basis",
    "straight_path",
    "emission_time_s",
    "emission_time_iterative_s",
    "heading_deg",
    "closest_approach",
]

_NEWTON_PASSES = 30
_FIXED_POINT_PASSES = 200
_TOL_S = 1e-11


@dataclass(frozen=True)
class Path:
    """Piecewise-linear source path (constant velocity between knots).

    Attributes
    ----------
    knot_times_s : ndarray, shape (K+1,)
        Strictly increasing knot times, seconds (recording time base).
    knot_positions_m : ndarray, shape (K+1, 3)
        Source position at each knot, metres.
    """

    knot_times_s: np.ndarray
    knot_positions_m: np.ndarray

    def __post_init__(self):
        t = np.asarray(self.knot_times_s, dtype=float).reshape(-1)
        p = np.asarray(self.knot_positions_m, dtype=float).reshape(-1, 3)
        if t.size < 2 or p.shape[0] != t.size:
            raise ValueError(f"need >= 2 knots with one position each, got {t.size} times "
                             f"and {p.shape[0]} positions")
        if np.any(np.diff(t) <= 0):
            raise ValueError(f"knot_times_s must increase strictly, got {t!r}")
        object.__setattr__(self, "knot_times_s", t)
        object.__setattr__(self, "knot_positions_m", p)

    @property
    def n_segments(self) -> int:
        return self.knot_times_s.size - 1

    @property
    def segment_velocities_mps(self) -> np.ndarray:
        """Velocity of each segment, shape (K, 3)."""
        return np.diff(self.knot_positions_m, axis=0) / np.diff(self.knot_times_s)[:, None]

    def segment_index(self, t_s) -> np.ndarray:
        """Segment that holds each time (end segments extend to -inf / +inf), shape of t_s."""
        k = np.searchsorted(self.knot_times_s, np.asarray(t_s, dtype=float), side="right") - 1
        return np.clip(k, 0, self.n_segments - 1)

    def weights(self, t_s):
        """Interpolation weights ``w_k(t)`` and their time derivatives, each (..., K+1)."""
        t = np.asarray(t_s, dtype=float)
        k = self.segment_index(t)
        t0 = self.knot_times_s[k]
        dt = self.knot_times_s[k + 1] - t0
        a = (t - t0) / dt
        w = np.zeros(t.shape + (self.knot_times_s.size,))
        dw = np.zeros_like(w)
        np.put_along_axis(w, k[..., None], (1.0 - a)[..., None], axis=-1)
        np.put_along_axis(w, (k + 1)[..., None], a[..., None], axis=-1)
        np.put_along_axis(dw, k[..., None], (-1.0 / dt)[..., None], axis=-1)
        np.put_along_axis(dw, (k + 1)[..., None], (1.0 / dt)[..., None], axis=-1)
        return w, dw

    def position_m(self, t_s) -> np.ndarray:
        """Position at each time, shape (..., 3)."""
        w, _ = self.weights(t_s)
        return w @ self.knot_positions_m

    def velocity_mps(self, t_s) -> np.ndarray:
        """Velocity at each time (the right-hand segment at a knot), shape (..., 3)."""
        return self.segment_velocities_mps[self.segment_index(t_s)]

    def with_positions(self, knot_positions_m) -> Path:
        """The same knot times with new knot positions."""
        return Path(self.knot_times_s, knot_positions_m)


def spline_basis(breaks_s, degree, t_s, derivative=0):
    """Clamped B-spline basis of ``degree`` on the breakpoints ``breaks_s``, shape (..., n).

    ``n = K + degree`` basis functions for ``K`` intervals (de Boor's B-splines evaluated with
    scipy.interpolate.BSpline).  Outside the breakpoints the basis continues linearly (the
    source keeps its end velocity), as :class:`Path` does.

    Parameters
    ----------
    breaks_s : array_like, shape (K+1,)
    degree : int
    t_s : array_like, shape (...)
    derivative : {0, 1, 2}
    """
    br = np.asarray(breaks_s, dtype=float)
    k = int(degree)
    n = br.size - 1 + k
    spl = _splines(tuple(br.tolist()), k)
    t = np.asarray(t_s, dtype=float)
    flat = t.reshape(-1)
    lo, hi = br[0], br[-1]
    tc = np.clip(flat, lo, hi)
    if derivative == 0:
        out = spl[0](tc) + (flat - tc)[:, None] * spl[1](tc)
    elif derivative == 1:
        out = spl[1](tc)
    else:
        inside = ((flat >= lo) & (flat <= hi))[:, None]
        out = np.where(inside, spl[2](tc), 0.0) if k >= 2 else np.zeros((flat.size, n))
    return out.reshape(t.shape + (n,))


@functools.lru_cache(maxsize=64)
def _splines(breaks, k):
    """The basis B-splines of a clamped knot vector and their first two derivatives."""
    from scipy.interpolate import BSpline

    br = np.asarray(breaks, dtype=float)
    knots = np.concatenate([np.full(k, br[0]), br, np.full(k, br[-1])])
    spl = BSpline(knots, np.eye(br.size - 1 + k), k, extrapolate=True)
    return spl, spl.derivative(1), (spl.derivative(2) if k >= 2 else None)


@dataclass(frozen=True)
class SplinePath:
    """Smooth source path: a clamped B-spline of ``degree`` in emission time.

    Degree 2 has a continuous velocity and a constant acceleration between breakpoints (the
    "constant acceleration per segment" model); outside the breakpoints the source keeps its
    end velocity.

    Attributes
    ----------
    knot_times_s : ndarray, shape (K+1,)
        Breakpoints (strictly increasing).
    control_m : ndarray, shape (K+degree, 3)
        B-spline coefficients.
    degree : int
    """

    knot_times_s: np.ndarray
    control_m: np.ndarray
    degree: int = 2

    def __post_init__(self):
        t = np.asarray(self.knot_times_s, dtype=float).reshape(-1)
        c = np.asarray(self.control_m, dtype=float).reshape(-1, 3)
        if t.size < 2 or np.any(np.diff(t) <= 0) or c.shape[0] != t.size - 1 + self.degree:
            raise ValueError(f"need >= 2 increasing breakpoints and K+degree coefficients, got "
                             f"{t.size} breakpoints and {c.shape[0]} coefficients")
        object.__setattr__(self, "knot_times_s", t)
        object.__setattr__(self, "control_m", c)

    @property
    def n_segments(self) -> int:
        return self.knot_times_s.size - 1

    @property
    def knot_positions_m(self) -> np.ndarray:
        """Positions at the breakpoints, shape (K+1, 3)."""
        return self.position_m(self.knot_times_s)

    def position_m(self, t_s) -> np.ndarray:
        return spline_basis(self.knot_times_s, self.degree, t_s) @ self.control_m

    def velocity_mps(self, t_s) -> np.ndarray:
        return spline_basis(self.knot_times_s, self.degree, t_s, 1) @ self.control_m

    def acceleration_mps2(self, t_s) -> np.ndarray:
        return spline_basis(self.knot_times_s, self.degree, t_s, 2) @ self.control_m


def straight_path(position_m, velocity_mps, reference_time_s=0.0, span_s=(None, None)) -> Path:
    """Constant-velocity path through ``position_m`` at ``reference_time_s``.

    Parameters
    ----------
    position_m : array_like, shape (3,)
    velocity_mps : array_like, shape (3,)
    reference_time_s : float
    span_s : (float, float), optional
        Knot times (default: the reference time and one second later); they only set the
        parametrisation, the path is the same infinite line.
    """
    p = np.asarray(position_m, dtype=float).reshape(3)
    v = np.asarray(velocity_mps, dtype=float).reshape(3)
    t_a = reference_time_s if span_s[0] is None else float(span_s[0])
    t_b = t_a + 1.0 if span_s[1] is None else float(span_s[1])
    knots = np.array([t_a, t_b])
    return Path(knots, p + (knots - reference_time_s)[:, None] * v)


def _check_subsonic(u2, c):
    if np.any(u2 >= np.asarray(c, dtype=float) ** 2):
        raise ConvergenceError(
            f"source speed relative to the air reaches the sound speed ({np.sqrt(np.max(u2)):.1f}"
            " m/s); a subsonic source is needed for a single emission time")


def emission_time_s(t_heard_s, mic_m, path, sound_speed_mps, wind_mps=None):
    """Emission time of the sound heard at ``mic_m`` at ``t_heard_s``.

    Solves eq. (1) of the module: closed form on each constant-velocity segment of a
    :class:`Path` (the one root with ``t_emit <= t_heard``, textbook kinematics), or the
    bounded iteration of :func:`emission_time_iterative_s` for any other path object.

    Parameters
    ----------
    t_heard_s : array_like, shape (...)
        Arrival times at the mic, seconds.
    mic_m : array_like, shape (..., 3)
        Mic position(s); broadcasts against ``t_heard_s``.
    path : Path or object
        A :class:`Path`, or any object with ``position_m(t)`` and ``velocity_mps(t)``.
    sound_speed_mps : float
    wind_mps : array_like, shape (3,), optional
        Uniform wind (the way the air moves); ``None`` for still air.

    Returns
    -------
    ndarray, shape (...)
        Emission times, seconds.

    Raises
    ------
    locate.errors.ConvergenceError
        If the source is not subsonic relative to the air, or an iteration does not converge.
    """
    if not isinstance(path, Path):
        return emission_time_iterative_s(t_heard_s, mic_m, path, sound_speed_mps, wind_mps)
    t_h = np.asarray(t_heard_s, dtype=float)
    m = np.asarray(mic_m, dtype=float)
    shape = np.broadcast_shapes(t_h.shape, m.shape[:-1])
    t_h = np.broadcast_to(t_h, shape)[..., None]  # (..., 1) against segments
    m = np.broadcast_to(m, shape + (3,))[..., None, :]
    c = float(sound_speed_mps)
    w = np.zeros(3) if wind_mps is None else np.asarray(wind_mps, dtype=float).reshape(3)
    vel = path.segment_velocities_mps  # (K, 3)
    u = vel - w
    u2 = np.einsum("ki,ki->k", u, u)
    _check_subsonic(u2, c)
    # position on each segment's (extended) line at t_heard
    p_h = path.knot_positions_m[:-1] + (t_h - path.knot_times_s[:-1])[..., None] * vel
    r = m - p_h  # (..., K, 3)
    r2 = np.einsum("...i,...i->...", r, r)
    b = np.einsum("...ki,ki->...k", r, u)
    a = c**2 - u2
    q = np.sqrt(b**2 + a * r2)
    # stable roots of a tau^2 - 2 b tau - r2 = 0 (textbook quadratic, no cancellation)
    with np.errstate(invalid="ignore", divide="ignore"):
        tau = np.where(b >= 0, (b + q) / a, r2 / np.where(q - b > 0, q - b, 1.0))
    tau = np.where(r2 > 0, tau, 0.0)
    t_e = t_h - tau  # (..., K) candidate per segment
    lo = np.concatenate([[-np.inf], path.knot_times_s[1:-1]])
    hi = np.concatenate([path.knot_times_s[1:-1], [np.inf]])
    eps = 1e-9 * (1.0 + np.abs(t_e))
    ok = (t_e >= lo - eps) & (t_e <= hi + eps)
    # (1) is strictly monotone in t_emit for a subsonic source, so exactly one segment holds
    # its own root (two at a shared knot, where they agree); take the first.
    k = np.argmax(ok, axis=-1)
    if not np.all(np.any(ok, axis=-1)):
        raise ConvergenceError("no segment holds the emission time (inconsistent path)")
    return np.take_along_axis(t_e, k[..., None], axis=-1)[..., 0]


def emission_time_iterative_s(t_heard_s, mic_m, path, sound_speed_mps, wind_mps=None, *,
                              tol_s=_TOL_S):
    """Emission time by bounded Newton / fixed-point iteration, for any path.

    Newton steps on ``F(t_e) = t_e + T(p(t_e) -> m) - t_heard`` (derivative
    ``1 + grad T . v``), then plain fixed-point passes ``t_e <- t_heard - T(p(t_e) -> m)``
    (a contraction with factor ``|v|/c`` for a subsonic source) for any entry Newton has not
    settled.

    Parameters
    ----------
    t_heard_s : array_like, shape (...)
    mic_m : array_like, shape (..., 3)
    path : object with ``position_m(t)`` -> (..., 3) and ``velocity_mps(t)`` -> (..., 3)
    sound_speed_mps : float
    wind_mps : array_like, shape (3,), optional
    tol_s : float
        Stop when every step is below this.

    Returns
    -------
    ndarray, shape (...)

    Raises
    ------
    locate.errors.ConvergenceError
        After ``30`` Newton and ``200`` fixed-point passes without convergence.
    """
    t_h = np.asarray(t_heard_s, dtype=float)
    m = np.asarray(mic_m, dtype=float)
    shape = np.broadcast_shapes(t_h.shape, m.shape[:-1])
    t_h = np.broadcast_to(t_h, shape)
    m = np.broadcast_to(m, shape + (3,))
    c = float(sound_speed_mps)
    t_e = t_h - air.travel_time_s(path.position_m(t_h), m, c, wind_mps)
    step = np.full(shape, np.inf)
    for n in range(_NEWTON_PASSES + _FIXED_POINT_PASSES):
        p = path.position_m(t_e)
        f = t_e + air.travel_time_s(p, m, c, wind_mps) - t_h
        if n < _NEWTON_PASSES:
            g = air.travel_time_gradient(p, m, c, wind_mps)
            d = 1.0 + np.einsum("...i,...i->...", g, path.velocity_mps(t_e))
            if np.any(d <= 0):
                raise ConvergenceError("source at or above the sound speed: no single "
                                       "emission time")
            step = f / d
        else:
            step = f
        t_e = t_e - step
        if np.all(np.abs(step) < tol_s):
            return t_e
    raise ConvergenceError(
        f"emission time did not converge in {_NEWTON_PASSES + _FIXED_POINT_PASSES} passes "
        f"(last step {np.max(np.abs(step)):.3g} s)")


def heading_deg(velocity_mps):
    """Heading of a velocity, degrees clockwise from north (+y) toward east (+x), [0, 360).

    Parameters
    ----------
    velocity_mps : array_like, shape (..., 3) or (..., 2)

    Returns
    -------
    ndarray, shape (...)
    """
    v = np.asarray(velocity_mps, dtype=float)
    return np.mod(np.rad2deg(np.arctan2(v[..., 0], v[..., 1])), 360.0)


def closest_approach(path: Path, point_m, t_range_s=None):
    """Closest approach of a path to each point.

    Parameters
    ----------
    path : Path
    point_m : array_like, shape (M, 3)
    t_range_s : (float, float), optional
        Limit the search to this time interval (default: the whole, extended path).

    Returns
    -------
    t_s : ndarray, shape (M,)
        Time of the closest approach (source time).
    distance_m : ndarray, shape (M,)
    position_m : ndarray, shape (M, 3)
    """
    pts = np.asarray(point_m, dtype=float).reshape(-1, 3)
    if not isinstance(path, Path):
        return _closest_sampled(path, pts, t_range_s)
    k_t = path.knot_times_s
    lo = np.concatenate([[-np.inf], k_t[1:-1]])
    hi = np.concatenate([k_t[1:-1], [np.inf]])
    if t_range_s is not None:
        lo = np.maximum(lo, t_range_s[0])
        hi = np.minimum(hi, t_range_s[1])
    vel = path.segment_velocities_mps
    v2 = np.einsum("ki,ki->k", vel, vel)
    d = pts[:, None, :] - path.knot_positions_m[None, :-1, :]  # (M, K, 3)
    with np.errstate(invalid="ignore", divide="ignore"):
        t_star = k_t[:-1] + np.where(v2 > 0, np.einsum("mki,ki->mk", d, vel) / v2, 0.0)
    t_star = np.clip(t_star, lo, hi)
    valid = lo <= hi
    pos = path.position_m(t_star)  # (M, K, 3)
    dist = np.linalg.norm(pos - pts[:, None, :], axis=-1)
    dist = np.where(valid[None, :], dist, np.inf)
    k = np.argmin(dist, axis=1)
    rows = np.arange(len(pts))
    return t_star[rows, k], dist[rows, k], pos[rows, k]


def _closest_sampled(path, pts, t_range_s):
    """Closest approach of any smooth path: dense samples, then a parabola through the best."""
    k_t = np.asarray(path.knot_times_s, dtype=float)
    lo, hi = (k_t[0], k_t[-1]) if t_range_s is None else t_range_s
    span = max(hi - lo, 1e-6)
    if t_range_s is None:  # the ends continue straight: look a little beyond them
        lo, hi = lo - 0.5 * span, hi + 0.5 * span
    t = np.linspace(lo, hi, 4001)
    pos = path.position_m(t)
    dist = np.linalg.norm(pos[None] - pts[:, None], axis=-1)  # (M, T)
    k = np.clip(np.argmin(dist, axis=1), 1, t.size - 2)
    d0, d1, d2 = (dist[np.arange(len(pts)), k + o] for o in (-1, 0, 1))
    den = d0 - 2 * d1 + d2
    frac = np.where(den > 0, 0.5 * (d0 - d2) / np.where(den > 0, den, 1.0), 0.0)
    t_best = np.clip(t[k] + np.clip(frac, -1, 1) * (t[1] - t[0]), lo, hi)
    p = path.position_m(t_best)
    return t_best, np.linalg.norm(p - pts, axis=-1), p
