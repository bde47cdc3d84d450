"""Predicted delays of a moving source, with their exact Jacobians.

The measurement model of :mod:`locate.track.tracker`.  For the analysis window centred at ``t_c``:

* **reference anchor** (the default): the sound heard at the reference mic at ``t_c`` left the
  source at ``t_e`` with ``t_c = t_e + T(p(t_e) -> m_ref)``; it reaches mic ``k`` at
  ``A_k = t_e + T(p(t_e) -> m_k)`` and the pair delay is ``d_ij = A_j - A_i``.
* **pair anchor**: a GCC over a window common to both channels measures the sound whose two
  arrivals are centred on the window, ``(A_i + A_j) / 2 = t_c`` (for any taper symmetric about
  the centre the overlap of the two windows is centred there); each pair then has its own
  emission time.  This is the right reading of plain (unwarped) windowed delays when the
  delays are a sizeable fraction of the window.
* **warped windows**: when every channel was resampled along a previous path estimate
  (``warp``) so that the same emitted sound lines up with the reference mic, the measured delay
  is the residual ``t*_j - t*_i`` with ``t*_k = W_k(A_k)``; ``W_k(a)`` maps an arrival time at
  mic ``k`` to the reference-mic time of the same emission under the warp path
  (``W_k(a) = A_ref^w(E_k^w(a))``, identity for the reference mic).
* **naive** (``retarded=False``): the source is taken to sit at ``p(t_c)`` while its sound
  travels, ``d_ij = T(p(t_c) -> m_j) - T(p(t_c) -> m_i)`` - the stationary reading that ignores
  the retarded time, kept to show its bias.

Jacobians follow from implicit differentiation of the anchor equation (textbook calculus):
``dt_e/dtheta = -(g_ref . B) / (1 + g_ref . v)`` with ``g = grad T`` (:func:`locate.physics.air.
travel_time_gradient`), ``B = dp/dtheta`` and ``v`` the velocity at ``t_e``; then
``dA_k/dtheta = (1 + g_k . v) dt_e/dtheta + g_k . B``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from locate.errors import ConvergenceError
from locate.physics import air
from locate.track.motion import (
    Path,
    SplinePath,
    emission_time_iterative_s,
    emission_time_s,
    spline_basis,
)

__all__ = ["Parametrisation", "predict_delays", "arrival_times"]

_PASSES = 40
_TOL_S = 1e-11


@dataclass(frozen=True)
class Parametrisation:
    """Maps the free parameters of a piecewise-linear path to its knots.

    Attributes
    ----------
    knot_times_s : ndarray, shape (K+1,)
    dims : int
        2: x, y of each knot are free and z is fixed at ``source_z_m``; 3: x, y, z free.
    source_z_m : float
        Height of a 2-D path.

    Notes
    -----
    Parameter order is knot-major: ``[x0, y0, (z0), x1, y1, (z1), ...]``.
    """

    knot_times_s: np.ndarray
    dims: int = 2
    source_z_m: float = 0.0
    degree: int = 1

    @property
    def n_knots(self) -> int:
        return int(np.size(self.knot_times_s))

    @property
    def n_coef(self) -> int:
        """Coefficients per coordinate: the knots (degree 1) or the B-spline coefficients."""
        return self.n_knots - 1 + int(self.degree)

    @property
    def n_params(self) -> int:
        return self.n_coef * self.dims

    def path(self, theta):
        """The path of a parameter vector, shape (n_params,): a Path (degree 1) or a
        :class:`~locate.track.motion.SplinePath`."""
        pos = np.full((self.n_coef, 3), float(self.source_z_m))
        pos[:, : self.dims] = np.asarray(theta, dtype=float).reshape(self.n_coef, self.dims)
        if self.degree == 1:
            return Path(np.asarray(self.knot_times_s, dtype=float), pos)
        if self.dims == 2:  # a constant height is exact: B-spline weights sum to one
            pos[:, 2] = float(self.source_z_m)
        return SplinePath(np.asarray(self.knot_times_s, dtype=float), pos, int(self.degree))

    def theta(self, path) -> np.ndarray:
        """Parameter vector of ``path`` (degree 1: its positions at the knots; otherwise the
        least-squares B-spline through it, exact for any path the model can represent)."""
        if self.degree == 1:
            return path.position_m(self.knot_times_s)[:, : self.dims].reshape(-1).copy()
        kt = np.asarray(self.knot_times_s, dtype=float)
        t = np.unique(np.concatenate([np.linspace(a, b, 9) for a, b in zip(kt[:-1], kt[1:])]))
        w = spline_basis(kt, self.degree, t)
        coef, *_ = np.linalg.lstsq(w, path.position_m(t), rcond=None)
        return coef[:, : self.dims].reshape(-1).copy()

    def _weights(self, t_s, derivative=0):
        if self.degree == 1:
            w, dw = self.path(np.zeros(self.n_params)).weights(t_s)
            return w if derivative == 0 else dw
        return spline_basis(self.knot_times_s, self.degree, t_s, derivative)

    def basis(self, t_s, derivative=0) -> np.ndarray:
        """``dp/dtheta`` (or ``dv/dtheta`` with ``derivative=1``) at each time, shape
        (..., 3, n_params)."""
        w = self._weights(t_s, derivative)
        sel = np.eye(3)[:, : self.dims]  # (3, dims)
        b = np.einsum("...k,cd->...ckd", w, sel)
        return b.reshape(b.shape[:-2] + (self.n_params,))


def _solve_anchor(t_c, mic_a, mic_b, path, c, wind):
    """Emission e with (A_a(e) + A_b(e)) / 2 = t_c (Newton, then fixed point), any shape."""
    e = t_c - 0.5 * (air.travel_time_s(path.position_m(t_c), mic_a, c, wind)
                     + air.travel_time_s(path.position_m(t_c), mic_b, c, wind))
    step = np.inf
    for n in range(_PASSES + 200):
        p = path.position_m(e)
        f = e + 0.5 * (air.travel_time_s(p, mic_a, c, wind)
                       + air.travel_time_s(p, mic_b, c, wind)) - t_c
        if n < _PASSES:
            g = 0.5 * (air.travel_time_gradient(p, mic_a, c, wind)
                       + air.travel_time_gradient(p, mic_b, c, wind))
            d = 1.0 + np.einsum("...i,...i->...", g, path.velocity_mps(e))
            step = f / np.maximum(d, 1e-6)
        else:
            step = f
        e = e - step
        if np.all(np.abs(step) < _TOL_S):
            return e
    raise ConvergenceError("pair-anchored emission time did not converge "
                           f"(step {np.max(np.abs(step)):.3g} s)")


def arrival_times(path, t_heard_s, mic_positions_m, sound_speed_mps, wind_mps=None,
                  reference_mic=0):
    """Emission time and arrival at every mic of the sound heard at the reference mic.

    Parameters
    ----------
    path : Path or object with ``position_m`` and ``velocity_mps``
    t_heard_s : array_like, shape (W,)
    mic_positions_m : array_like, shape (N, 3)
    sound_speed_mps : float
    wind_mps : array_like, shape (3,), optional
    reference_mic : int

    Returns
    -------
    t_emit_s : ndarray, shape (W,)
    arrival_s : ndarray, shape (W, N)
    """
    mics = np.asarray(mic_positions_m, dtype=float)
    t_h = np.asarray(t_heard_s, dtype=float)
    t_e = emission_time_s(t_h, mics[reference_mic], path, sound_speed_mps, wind_mps)
    p = path.position_m(t_e)
    arr = t_e[:, None] + air.travel_time_s(p[:, None, :], mics[None], sound_speed_mps, wind_mps)
    return t_e, arr


def predict_delays(par: Parametrisation, theta, t_c_s, mic_positions_m, pairs, sound_speed_mps,
                   wind_mps=None, *, anchor="reference", reference_mic=0, warp=None,
                   retarded=True, jacobian=True):
    """Predicted pair delays for windows centred at ``t_c_s`` and their Jacobian.

    Parameters
    ----------
    par : Parametrisation
    theta : array_like, shape (n_params,)
    t_c_s : array_like, shape (W,)
        Window centres (reference-mic time), seconds.
    mic_positions_m : array_like, shape (N, 3)
    pairs : array_like, shape (P, 2)
    sound_speed_mps : float
    wind_mps : array_like, shape (3,), optional
    anchor : {"reference", "pair"}
        Which sound a window's delay belongs to (module docstring).
    reference_mic : int
    warp : Path, optional
        The path the channels were resampled along (reference anchor only).
    retarded : bool
        False: the naive model (source at ``p(t_c)``).
    jacobian : bool

    Returns
    -------
    delays_s : ndarray, shape (W, P)
    jac : ndarray, shape (W, P, n_params) or None
    t_emit_s : ndarray, shape (W, P)
        Emission time each delay belongs to (``t_c`` for the naive model).
    """
    if anchor not in ("reference", "pair"):
        raise ValueError(f"anchor must be 'reference' or 'pair', got {anchor!r}")
    if warp is not None and anchor != "reference":
        raise ValueError("warped windows are anchored at the reference mic")
    path = par.path(theta)
    mics = np.asarray(mic_positions_m, dtype=float)
    pairs = np.asarray(pairs, dtype=int)
    t_c = np.asarray(t_c_s, dtype=float)
    c = float(sound_speed_mps)
    ii, jj = pairs[:, 0], pairs[:, 1]
    n_w, n_p = t_c.size, len(pairs)

    if not retarded:
        p = path.position_m(t_c)[:, None, :]
        g = air.travel_time_gradient(p, mics[None], c, wind_mps)  # (W, N, 3)
        tt = air.travel_time_s(p, mics[None], c, wind_mps)
        d = tt[:, jj] - tt[:, ii]
        jac = None
        if jacobian:
            b = par.basis(t_c)  # (W, 3, n)
            gb = np.einsum("wki,win->wkn", g, b)
            jac = gb[:, jj] - gb[:, ii]
        return d, jac, np.broadcast_to(t_c[:, None], (n_w, n_p)).copy()

    if anchor == "pair":
        tc = np.broadcast_to(t_c[:, None], (n_w, n_p))
        e = _solve_anchor(tc, mics[ii], mics[jj], path, c, wind_mps)  # (W, P)
        p = path.position_m(e)
        v = path.velocity_mps(e)
        gi = air.travel_time_gradient(p, mics[ii], c, wind_mps)
        gj = air.travel_time_gradient(p, mics[jj], c, wind_mps)
        d = (air.travel_time_s(p, mics[jj], c, wind_mps)
             - air.travel_time_s(p, mics[ii], c, wind_mps))
        jac = None
        if jacobian:
            b = par.basis(e)  # (W, P, 3, n)
            gm = 0.5 * (gi + gj)
            de = (-np.einsum("wpi,wpin->wpn", gm, b)
                  / (1.0 + np.einsum("wpi,wpi->wp", gm, v))[..., None])
            q = b + v[..., None] * de[..., None, :]
            jac = np.einsum("wpi,wpin->wpn", gj - gi, q)
        return d, jac, e

    e = emission_time_s(t_c, mics[reference_mic], path, c, wind_mps)  # (W,)
    p = path.position_m(e)
    v = path.velocity_mps(e)
    tt = air.travel_time_s(p[:, None, :], mics[None], c, wind_mps)  # (W, N)
    g = air.travel_time_gradient(p[:, None, :], mics[None], c, wind_mps)  # (W, N, 3)
    arr = e[:, None] + tt
    dadt = None
    if jacobian:
        b = par.basis(e)  # (W, 3, n)
        g0 = g[:, reference_mic]
        de = -np.einsum("wi,win->wn", g0, b) / (1.0 + np.einsum("wi,wi->w", g0, v))[:, None]
        gv = np.einsum("wki,wi->wk", g, v)
        dadt = (1.0 + gv)[..., None] * de[:, None, :] + np.einsum("wki,win->wkn", g, b)
    if warp is not None:
        arr, scale = _warp_map(arr, mics, warp, c, wind_mps, reference_mic)
        if jacobian:
            dadt = dadt * scale[..., None]
    d = arr[:, jj] - arr[:, ii]
    jac = None if dadt is None else dadt[:, jj] - dadt[:, ii]
    return d, jac, np.broadcast_to(e[:, None], (n_w, n_p)).copy()


def _warp_map(arr, mics, warp: Path, c, wind, reference_mic):
    """W_k(a) for arrivals ``arr`` (W, N) and its derivative dW_k/da (W, N)."""
    solve = emission_time_s if isinstance(warp, Path) else emission_time_iterative_s
    e_w = solve(arr, mics[None], warp, c, wind)  # (W, N) emission under the warp path
    p_w = warp.position_m(e_w)
    v_w = warp.velocity_mps(e_w)
    m0 = mics[reference_mic]
    t_star = e_w + air.travel_time_s(p_w, m0, c, wind)
    g0 = air.travel_time_gradient(p_w, m0, c, wind)
    gk = air.travel_time_gradient(p_w, mics[None], c, wind)
    scale = (1.0 + np.einsum("wki,wki->wk", g0 * np.ones_like(gk), v_w)) / (
        1.0 + np.einsum("wki,wki->wk", gk, v_w))
    t_star[:, reference_mic] = arr[:, reference_mic]
    scale[:, reference_mic] = 1.0
    return t_star, scale
