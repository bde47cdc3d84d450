"""First-order propagation of the nuisance uncertainties to the delays and the position.

Law of propagation of uncertainty (JCGM 100:2008, GUM, 5.1.2 eq. (10); 5.2.2 eq. (13) for
outputs that share inputs): the declared, independent nuisances add
Q_n = sum_k G_k S_k G_k^T to the delay covariance, G_k = d(predicted delays)/d(nuisance k) at
the source estimate, S_k the diagonal of declared variances.  The weighted least-squares
position (W = Q_total^+) then has the covariance C = sum_k H Q_k H^T with
H = (J^T W J)^-1 J^T W, which is (J^T W J)^-1 for the linear model, so the components add up.
See :mod:`locate.accuracy.budget` for how they are used.
"""

from __future__ import annotations

import numpy as np

from locate.fix.solver import predict_delays
from locate.geometry.ellipses import delay_jacobian, ellipse
from locate.geometry.pairs import incidence_matrix
from locate.physics.air import travel_time_gradient

__all__ = ["COMPONENTS", "nuisance_jacobians", "nuisance_delay_covariance",
           "component_covariances", "ellipse_area_m2"]

COMPONENTS = ("timing", "reflections", "mic_positions", "sound_speed", "clocks", "wind",
              "source_height")
"""Budget components, in the order they are reported."""

_DC_STEP_MPS = 0.01  # central-difference steps (delays are smooth in c and w)
_DW_STEP_MPS = 0.01


def nuisance_jacobians(source_m, mic_positions_m, pairs, sound_speed_mps, wind_mps, sds):
    """Sensitivity of the pair delays to each nuisance, with the nuisance sds.

    Parameters
    ----------
    source_m : array_like, shape (3,)
    mic_positions_m : array_like, shape (N, 3)
    pairs : array_like, shape (P, 2)
    sound_speed_mps : float
    wind_mps : array_like, shape (3,) or None
    sds : dict
        From :func:`nuisance_sds` or :func:`declared_sds`.

    Returns
    -------
    dict
        component -> ``(G, sd)`` with G of shape (P, K) (seconds per unit of the nuisance)
        and sd of shape (K,): ``mic_positions`` (K = 3N, columns x1 y1 z1 x2 ...),
        ``clocks`` (K = number of clock groups), ``sound_speed`` (K = 1), ``wind`` (K = 2),
        ``source_height`` (K = 2: the given height of a 2-D fix, sd ``source_height_m``,
        as the mean square of the delay change over a Gauss-Hermite rule; sds 1).
    """
    src = np.asarray(source_m, dtype=float).reshape(3)
    mics = np.asarray(mic_positions_m, dtype=float)
    pairs = np.asarray(pairs, dtype=int).reshape(-1, 2)
    n = len(mics)
    w = np.zeros(3) if wind_mps is None else np.asarray(wind_mps, dtype=float).reshape(3)
    c = float(sound_speed_mps)
    # d t_k / d m_k = - d t_k / d source (time of flight depends on m - s only)
    g_mic = -travel_time_gradient(src[None, :], mics, c, w)  # (N, 3)
    a = incidence_matrix(pairs, n)  # (P, N)
    g_pos = (a[:, :, None] * g_mic[None, :, :]).reshape(len(pairs), 3 * n)
    sd_pos = np.stack([sds["position_m"], sds["position_m"], sds["height_m"]], axis=1).ravel()
    groups = np.asarray(sds["clock_group"], dtype=int)
    uniq, col = np.unique(groups, return_inverse=True)
    g_clk = incidence_matrix(pairs, len(uniq), col)
    sd_clk = np.array([np.max(sds["clock_s"][groups == g]) for g in uniq])
    h = _DC_STEP_MPS
    g_c = ((predict_delays(src, mics, pairs, c + h, w) - predict_delays(src, mics, pairs, c - h, w))
           / (2 * h))[:, None]
    g_w = np.stack([(predict_delays(src, mics, pairs, c, w + _DW_STEP_MPS * e)
                     - predict_delays(src, mics, pairs, c, w - _DW_STEP_MPS * e))
                    / (2 * _DW_STEP_MPS) for e in np.eye(3)[:2]], axis=1)
    # Source height of a 2-D fix (given, not solved).  Near the mics' height the delays
    # depend on it to second order only (a zero first derivative), so its term is the mean
    # square of the delay change over the three-point Gauss-Hermite rule (z0 -+ sqrt(3) sd,
    # weights 1/6, 2/3, 1/6; heights kept >= 0): columns sqrt(w_k) (d(z_k) - d(z0)), sd 1.
    sd_z = float(sds.get("source_height_m", 0.0) or 0.0)
    ground = sds.get("ground_z_m", 0.0)  # None: no ground known (a WGS84 frame)
    d0 = predict_delays(src, mics, pairs, c, w)
    cols = []
    for t, wt in ((-np.sqrt(3.0), 1.0 / 6.0), (np.sqrt(3.0), 1.0 / 6.0)):
        s_k = src.copy()
        s_k[2] = src[2] + t * sd_z if ground is None else max(src[2] + t * sd_z, ground)
        cols.append(np.sqrt(wt) * (predict_delays(s_k, mics, pairs, c, w) - d0))
    g_z = np.stack(cols, axis=1)
    return {
        "source_height": (g_z, np.full(2, 1.0 if sd_z > 0 else 0.0)),
        "mic_positions": (g_pos, sd_pos),
        "clocks": (g_clk, sd_clk),
        "sound_speed": (g_c, np.array([sds["sound_speed_mps"]])),
        "wind": (g_w, np.array([sds["wind_mps"]] * 2)),
    }


def nuisance_delay_covariance(source_m, mic_positions_m, pairs, sound_speed_mps, wind_mps, sds,
                              *, components=None):
    """Delay covariance added by the declared nuisances (JCGM 100:2008 eq. (13)).

    Parameters
    ----------
    source_m, mic_positions_m, pairs, sound_speed_mps, wind_mps, sds
        As :func:`nuisance_jacobians`.
    components : sequence of str, optional
        Restrict to these nuisance components (default: all).

    Returns
    -------
    ndarray, shape (P, P)
        s^2; pass it as ``extra_covariance_s2`` to :func:`locate.fix.solver.locate_source`.
    """
    jac = nuisance_jacobians(source_m, mic_positions_m, pairs, sound_speed_mps, wind_mps, sds)
    p = len(np.asarray(pairs).reshape(-1, 2))
    out = np.zeros((p, p))
    for name, (g, sd) in jac.items():
        if components is None or name in components:
            out += (g * sd**2) @ g.T  # G diag(sd^2) G^T
    return 0.5 * (out + out.T)


def _usable_pairs(delays, used, dropped_idx=()):
    pairs = np.asarray(delays.pairs, dtype=int)
    ok = np.isfinite(delays.delay_s) & np.isfinite(np.diag(delays.covariance_s2))
    if used is not None:
        used = np.asarray(used, dtype=bool)
        ok &= used[pairs[:, 0]] & used[pairs[:, 1]]
    ok[list(dropped_idx)] = False
    return np.flatnonzero(ok)


def component_covariances(source_m, mic_positions_m, delays, sound_speed_mps, *, sds,
                          wind_mps=None, dims=2, used=None, dropped_pairs=(),
                          per_mic=False):
    """Position covariance of each budget component at ``source_m``.

    ``C_k = H Q_k H^T`` with ``H = (J^T W J)^-1 J^T W`` and ``W`` the pseudo-inverse of the
    total delay covariance (timing + nuisances); the components add up to ``(J^T W J)^-1``.

    Parameters
    ----------
    source_m : array_like, shape (3,)
    mic_positions_m : array_like, shape (N, 3)
    delays : locate.signal.delays.DelaySet
        Its ``covariance_s2`` is the timing component.
    sound_speed_mps : float
    sds : dict
    wind_mps : array_like (3,), optional
    dims : {2, 3}
    used : array_like of bool (N,), optional
        Mics that entered the fix (``Fix.used``); pairs with other mics are left out.
    dropped_pairs : sequence of int
        Indices of pairs the fix dropped.
    per_mic : bool
        Also return the mic-position component of each mic separately.

    Returns
    -------
    dict
        component -> (3, 3) covariance, m^2 (zero z row/column for ``dims`` = 2), plus
        ``"total"``; with ``per_mic``, ``"per_mic"`` -> (N, 3, 3).
    """
    src = np.asarray(source_m, dtype=float).reshape(3)
    mics = np.asarray(mic_positions_m, dtype=float)
    idx = _usable_pairs(delays, used, dropped_pairs)
    pairs = np.asarray(delays.pairs, dtype=int)[idx]
    jac = nuisance_jacobians(src, mics, pairs, sound_speed_mps, wind_mps, sds)
    cov = np.asarray(delays.covariance_s2, dtype=float)[np.ix_(idx, idx)]
    bias = getattr(delays, "bias_covariance_s2", None)
    bias = np.zeros_like(cov) if bias is None else np.asarray(bias, float)[np.ix_(idx, idx)]
    q = {"timing": cov - bias, "reflections": bias}
    for name, (g, sd) in jac.items():
        q[name] = (g * sd**2) @ g.T
    q_total = sum(q.values())
    w = np.linalg.pinv(0.5 * (q_total + q_total.T), rcond=1e-10, hermitian=True)
    j = delay_jacobian(src, mics, pairs, sound_speed_mps, dims=dims, wind_mps=wind_mps)
    info = j.T @ w @ j
    hmat = np.linalg.solve(info, j.T @ w)  # (dims, P)

    def embed(qk):
        out = np.zeros((3, 3))
        ck = hmat @ qk @ hmat.T
        out[:dims, :dims] = 0.5 * (ck + ck.T)
        return out

    result = {name: embed(q[name]) for name in COMPONENTS}
    result["total"] = embed(q_total)
    if per_mic:
        g, sd = jac["mic_positions"]
        result["per_mic"] = np.stack([
            embed((g[:, 3 * k:3 * k + 3] * sd[3 * k:3 * k + 3] ** 2) @ g[:, 3 * k:3 * k + 3].T)
            for k in range(len(mics))])
    return result


def ellipse_area_m2(covariance_m2, probability=0.95):
    """Area of the confidence ellipse, pi a b, m^2."""
    e = ellipse(covariance_m2, probability)
    return float(np.pi * e["semi_major_m"] * e["semi_minor_m"])
