"""Declared survey, clock, sound-speed and wind uncertainties in a track.

The windowed delays carry only the correlation (timing) noise.  The path also depends on
nuisance inputs known to a declared standard deviation (the site's ``[survey]``; the dict of
:func:`locate.accuracy.inputs.declared_sds`): mic positions, recorder clock offsets, the sound
speed, a uniform wind and (2-D tracks) the source height.  They are common to every window,
so their effect is a correlated shift of the whole path, not extra scatter per window.

Method - law of propagation of uncertainty to first order (JCGM 100:2008, GUM, 5.1.2 eq. (10);
5.2.2 eq. (13) for outputs that share inputs), as the stationary budget does:

* the weighted least-squares path ``theta`` moves by ``dtheta = -(J^T J)^-1 J^T M G dnu`` when
  a nuisance moves by ``dnu``, with ``J`` the whitened Jacobian of the delays of all windows,
  ``M`` the whitening and ``G = d(predicted delays)/d(nuisance)`` (central differences of
  :func:`locate.track.retarded.predict_delays`; a clock offset of a recorder shifts the
  delays of its mics by the pair incidence);
* a track point ``p(t_e)`` moves by ``q dtheta`` plus ``v dt_e`` where the emission time
  itself depends on the nuisance (``t_heard = t_e + T(p(t_e) -> m_ref)``: the sound speed,
  the reference mic's position and its clock), again by central differences;
* the covariances ``sum_k D_k diag(sd_k^2) D_k^T`` add to the timing covariances of the path
  parameters, the points and (through ``dtheta``) the velocity.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from locate.track.pathfit import whitening
from locate.track.retarded import predict_delays

__all__ = ["COMPONENTS", "has_declared", "timing_only", "nuisance_columns", "track_budget",
           "window_covariance_s2", "TIMING_ONLY_NOTE", "TIMING_AND_HEIGHT_NOTE", "GROUND_NOTE"]

COMPONENTS = ("mic_positions", "clocks", "sound_speed", "wind", "source_height")
TIMING_ONLY_NOTE = ("timing only: no survey, clock, temperature or wind uncertainty is declared "
                    "in the site file ([survey]), so the ellipses, heading and speed "
                    "uncertainties hold only if the mic positions, clocks and air are exact")
TIMING_AND_HEIGHT_NOTE = ("timing only, plus the source height: no survey, clock, temperature "
                          "or wind uncertainty is declared in the site file ([survey]), so the "
                          "ellipses, heading and speed uncertainties hold only if the mic "
                          "positions, clocks and air are exact")
GROUND_NOTE = ("; the pull of a ground reflection on the delays of a source near the ground is "
               "not included (a reflecting ground can leave the points centimetres to decimetres "
               "outside their ellipses: docs/methods.md)")
_H_POS = 0.01  # central-difference steps: m, s, m/s (the delays are smooth in all of them)
_H_CLK = 1e-5
_H_C = 0.05
_H_W = 0.05


def has_declared(sds) -> bool:
    """Any declared nuisance, the source height of a 2-D track included."""
    return sds is not None and (any(bool(v) for v in sds.get("declared", {}).values())
                                or float(sds.get("source_height_m", 0.0)) > 0)


def timing_only(sds) -> bool:
    """True when no survey, clock or air uncertainty is declared (the source height, which
    a 2-D track always assumes or profiles, does not count)."""
    d = {} if sds is None else sds.get("declared", {})
    return not any(d.get(k) for k in ("mic_positions", "clocks", "sound_speed", "wind"))


def nuisance_columns(sds, n_mics):
    """``[(component, kind, index, sd)]``: one column per declared nuisance with sd > 0."""
    cols = []
    pos, hgt = np.asarray(sds["position_m"], float), np.asarray(sds["height_m"], float)
    for k in range(n_mics):
        for axis, sd in ((0, pos[k]), (1, pos[k]), (2, hgt[k])):
            if sd > 0:
                cols.append(("mic_positions", "mic", (k, axis), float(sd)))
    groups = np.asarray(sds["clock_group"], int)
    for g in np.unique(groups):
        sd = float(np.max(np.asarray(sds["clock_s"], float)[groups == g]))
        if sd > 0:
            cols.append(("clocks", "clock", np.flatnonzero(groups == g), sd))
    if sds["sound_speed_mps"] > 0:
        cols.append(("sound_speed", "c", None, float(sds["sound_speed_mps"])))
    if sds["wind_mps"] > 0:
        for axis in (0, 1):
            cols.append(("wind", "wind", axis, float(sds["wind_mps"])))
    if float(sds.get("source_height_m", 0.0)) > 0:  # the height of a 2-D track
        cols.append(("source_height", "z", None, float(sds["source_height_m"])))
    return cols


def _perturbed(kind, index, h, mics, c, wind, t_h, ref):
    m = mics.copy()
    cc = c
    w = np.zeros(3) if wind is None else np.asarray(wind, float).copy()
    th = t_h.copy()
    shift = np.zeros(len(mics))
    if kind == "mic":
        m[index[0], index[1]] += h
    elif kind == "clock":
        shift[index] = h
        th = t_h + shift[ref]  # the reference mic's clock moves the heard times too
    elif kind == "c":
        cc = c + h
    elif kind == "wind":
        w[index] += h
    return m, cc, w, th, shift  # "z": the path's height moves (_at_height)


_STEP = {"mic": _H_POS, "clock": _H_CLK, "c": _H_C, "wind": _H_W, "z": _H_POS}


def _at_height(par, kind, dz):
    """``par`` with its height moved by ``dz`` for a source-height column, else ``par``."""
    return dataclasses.replace(par, source_z_m=par.source_z_m + dz) if kind == "z" else par


def _delay_gradient(par, theta, t_heard_s, mics, pairs, c, wind_mps, kind, index, ref):
    """Change of the predicted delays per unit of one nuisance column, shape (W, P)
    (central differences; a recorder's clock shifts its mics' delays by the pair incidence)."""
    h = _STEP[kind]
    d = []
    for sign in (1.0, -1.0):
        m, cc, w, th, shift = _perturbed(kind, index, sign * h, mics, c, wind_mps, t_heard_s,
                                         ref)
        pred = predict_delays(_at_height(par, kind, sign * h), theta, th, m, pairs, cc, w,
                              jacobian=False, reference_mic=ref)[0]
        d.append(pred + (shift[pairs[:, 1]] - shift[pairs[:, 0]]))
    return (d[0] - d[1]) / (2 * h)


def window_covariance_s2(par, theta, t_heard_s, mic_positions_m, pairs, sound_speed_mps,
                         wind_mps, sds, reference_mic=0):
    """Each window's delay covariance from the declared nuisances, shape (W, P, P).

    ``sum_k sd_k^2 g_k g_k^T`` with ``g_k`` the change of the window's predicted delays per
    unit nuisance k (the columns of :func:`nuisance_columns` but the source height, the same
    central differences
    as :func:`track_budget`).  The tracker weighs each window's delays with it besides the
    correlation noise, so a misfit that the declared errors explain is not taken for a bad
    model (chi-square scaling, window rejection, model adequacy) and then counted twice;
    it enters each window as if independent, while the shift it causes is common to all
    windows - that part is :func:`track_budget`'s.
    """
    mics = np.asarray(mic_positions_m, float)
    pairs = np.asarray(pairs, int)
    t_h = np.asarray(t_heard_s, float)
    out = None
    for _, kind, index, sd in nuisance_columns(sds, len(mics)):
        if kind == "z":
            # not the source height: the tracker reads it from the delays (a profile of the
            # fit's chi-square over heights, locate.track.tracker.height_profile), which a
            # height term in the weights would flatten; its common shift is in the budget
            continue
        g = sd * _delay_gradient(par, theta, t_h, mics, pairs, float(sound_speed_mps),
                                 wind_mps, kind, index, reference_mic)
        g = np.where(np.isfinite(g), g, 0.0)
        add = np.einsum("wp,wq->wpq", g, g)
        out = add if out is None else out + add
    if out is None:
        out = np.zeros((len(t_h), len(pairs), len(pairs)))
    return out


def track_budget(fit, covariance_s2, usable, mic_positions_m, pairs, sound_speed_mps,
                 wind_mps, sds):
    """Parameter and point covariances added by the declared nuisances (module docstring).

    Parameters
    ----------
    fit : locate.track.pathfit.PathFit
    covariance_s2 : ndarray, shape (W, P, P)
        The windows' delay covariance (for the weights).
    usable : ndarray, shape (W, P) bool
    mic_positions_m, pairs, sound_speed_mps, wind_mps
    sds : dict
        From :func:`locate.accuracy.inputs.declared_sds` / ``nuisance_sds``.

    Returns
    -------
    dict
        ``theta_cov`` (n, n), ``point_cov`` (W, 3, 3), ``components`` {name: share of the mean
        horizontal point variance added}, ``point_cov_by`` {name: (W, 3, 3)}.
    """
    mics = np.asarray(mic_positions_m, float)
    pairs = np.asarray(pairs, int)
    par, theta = fit.par, fit.theta
    sel = np.flatnonzero(fit.used)
    t_h = fit.t_heard_s
    ref = fit.reference_mic
    c = float(sound_speed_mps)
    m_w, _ = whitening(covariance_s2[sel], np.asarray(usable, bool)[sel])
    kw = dict(reference_mic=ref)
    _, jac, _ = predict_delays(par, theta, t_h[sel], mics, pairs, c, wind_mps, **kw)
    jw = np.einsum("wqp,wpn->wqn", m_w, jac).reshape(-1, par.n_params)
    solve = np.linalg.pinv(jw.T @ jw) @ jw.T  # (n, W*P)
    n_w = len(t_h)
    theta_cov = np.zeros((par.n_params, par.n_params))
    point_cov = np.zeros((n_w, 3, 3))
    by = {}
    for comp, kind, index, sd in nuisance_columns(sds, len(mics)):
        if kind == "z" and par.dims != 2:
            continue  # a 3-D track solves its height
        h = _STEP[kind]
        g = _delay_gradient(par, theta, t_h[sel], mics, pairs, c, wind_mps, kind, index, ref)
        dtheta = -solve @ np.einsum("wqp,wp->wq", m_w, g).reshape(-1)  # (n,)
        d_pt = []
        for sign in (1.0, -1.0):
            # the point at its stated emission time (as locate.track.tracker.describe_fit)
            d_pt.append(_at_height(par, kind, sign * h).path(theta + sign * h * dtheta)
                        .position_m(fit.t_emit_s))
        dp = (d_pt[0] - d_pt[1]) / (2 * h)  # (W, 3)
        dp = np.where(np.isfinite(dp), dp, 0.0)
        theta_cov += sd**2 * np.outer(dtheta, dtheta)
        add = sd**2 * np.einsum("wi,wj->wij", dp, dp)
        point_cov += add
        by[comp] = by.get(comp, 0.0) + add
    total = float(np.mean(np.trace(point_cov[:, :2, :2], axis1=1, axis2=2)))
    shares = {k: (float(np.mean(np.trace(v[:, :2, :2], axis1=1, axis2=2))) / total
                  if total > 0 else 0.0) for k, v in by.items()}
    return {"theta_cov": theta_cov, "point_cov": point_cov, "components": shares,
            "point_cov_by": by}
