"""Weighted least-squares fit of a source path to windowed delays.

All windows are fitted at once: the residual of window ``w`` is its measured delay vector minus
the prediction of :func:`locate.track.retarded.predict_delays`, whitened by the Cholesky factor of
the
window's delay covariance (``L L^T = C_w``, residual ``L^-1 (d - d_pred)``), and the stack is
minimised with ``scipy.optimize.least_squares`` using the exact Jacobian.  The parameter
covariance is ``(J^T J)^-1`` at the solution (Gauss-Newton, e.g. Foy 1976, IEEE Trans. AES
12(2) 187-194, for the static case), multiplied by the reduced chi-square when that exceeds one
(the delays scatter more than their stated covariance: never shrink it).

Starting path: a stationary fix in every window (batched Levenberg-Marquardt from a ring of
starts; the naive model of one window), then a generalised least-squares line or polyline
through those fixes, weighted by their covariances.  Gross outlier windows are dropped on
their chi-square (p < 1e-4) and the fit repeated.

Motion models
-------------
``"straight"``: one constant-velocity segment.  ``"segments"``: constant-velocity segments
joined continuously at evenly spaced knots.  This manoeuvring model was preferred over a
Kalman filter + RTS smoother on per-window fixes because it keeps the exact retarded-time
measurement model for every window in one global fit (a filter needs a fix per window first,
which is poorly conditioned for distant sources and linearises the emission time away), it
needs no process-noise tuning, and its parameter covariance comes from the same Jacobian; the
straight model is its one-segment special case.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import optimize, stats

from locate.errors import ConvergenceError, NothingFoundError, OptionError
from locate.physics import air
from locate.track.motion import Path, emission_time_s
from locate.track.retarded import Parametrisation, predict_delays

__all__ = ["PathFit", "fit_path", "whitening", "stationary_fixes", "initial_path", "knot_times",
           "max_speed_mps"]

DEGREE = {"straight": 1, "segments": 1, "smooth": 2}
"""B-spline degree of each motion model (1: piecewise straight; 2: constant acceleration per
segment, continuous velocity)."""

_REJECT_P = 1e-4
_MAX_REJECT_FRACTION = 0.25


@dataclass
class PathFit:
    """Result of :func:`fit_path`.

    Attributes
    ----------
    par : Parametrisation
    theta : ndarray, shape (n,)
    covariance : ndarray, shape (n, n)
        Parameter covariance (already scaled by ``covariance_scale``).
    path : Path
    t_heard_s : ndarray, shape (W,)
        Window centres at the reference mic.
    t_emit_s : ndarray, shape (W,)
        Emission time of the sound heard then (``t_heard_s`` for the naive model).
    used : ndarray, shape (W,) bool
        Windows kept in the fit.
    window_chi2 : ndarray, shape (W,)
    window_dof : ndarray, shape (W,) int
    chi2, dof : float, int
    covariance_scale : float
    residual_rms_s : float
        rms of the unwhitened residuals of the used windows and pairs.
    converged : bool
    retarded, anchor, reference_mic, warp
        The measurement model (see :func:`locate.track.retarded.predict_delays`).
    warnings : list of str
    """

    par: Parametrisation
    theta: np.ndarray
    covariance: np.ndarray
    path: Path
    t_heard_s: np.ndarray
    t_emit_s: np.ndarray
    used: np.ndarray
    window_chi2: np.ndarray
    window_dof: np.ndarray
    chi2: float
    dof: int
    covariance_scale: float
    residual_rms_s: float
    converged: bool
    retarded: bool = True
    anchor: str = "reference"
    reference_mic: int = 0
    warp: Path | None = None
    warnings: list = field(default_factory=list)


def whitening(covariance_s2, usable=None):
    """Per-window whitening matrices from the delay covariances.

    Parameters
    ----------
    covariance_s2 : array_like, shape (W, P, P)
    usable : array_like, shape (W, P) bool, optional
        Pairs to keep; the others get zero columns.

    Returns
    -------
    m : ndarray, shape (W, P, P)
        ``m[w] @ r`` is the whitened residual (rows beyond the number of usable pairs are 0):
        the inverse Cholesky factor of the usable sub-covariance, or its eigen-decomposition
        square root when that is singular.
    rank : ndarray, shape (W,) int
    """
    cov = np.asarray(covariance_s2, dtype=float)
    n_w, n_p, _ = cov.shape
    ok = np.ones((n_w, n_p), bool) if usable is None else np.asarray(usable, bool).copy()
    ok &= np.isfinite(np.diagonal(cov, axis1=1, axis2=2)) & (np.diagonal(cov, axis1=1, axis2=2) > 0)
    m = np.zeros_like(cov)
    rank = np.zeros(n_w, int)
    for w in range(n_w):  # loop over windows (tens to hundreds), not samples
        idx = np.flatnonzero(ok[w])
        if idx.size == 0:
            continue
        sub = cov[w][np.ix_(idx, idx)]
        sub = 0.5 * (sub + sub.T)
        try:
            linv = np.linalg.inv(np.linalg.cholesky(sub))
        except np.linalg.LinAlgError:
            lam, vec = np.linalg.eigh(sub)
            keep = lam > lam.max() * 1e-10
            linv = (vec[:, keep] / np.sqrt(lam[keep])).T
        m[w][np.ix_(np.arange(linv.shape[0]), idx)] = linv
        rank[w] = linv.shape[0]
    return m, rank


def max_speed_mps(par, theta) -> float:
    """Largest speed of a path over its knot span (the velocity is piecewise constant for
    degree 1 and piecewise linear for degree 2, so the knots and segment middles bound it)."""
    kt = np.asarray(par.knot_times_s, float)
    t = np.concatenate([kt, 0.5 * (kt[1:] + kt[:-1])])
    v = np.einsum("win,n->wi", par.basis(t, 1), np.asarray(theta, float))
    return float(np.max(np.linalg.norm(v, axis=1)))


def knot_times(t_emit_lo_s, t_emit_hi_s, model, n_windows, segment_s=None):
    """Knot times of a path model over the emission span, shape (K+1,)."""
    lo, hi = float(t_emit_lo_s), float(t_emit_hi_s)
    if hi <= lo:
        hi = lo + 1.0
    if model == "straight":
        return np.array([lo, hi])
    if model not in ("segments", "smooth"):
        raise OptionError(f"model must be 'straight', 'segments' or 'smooth', got {model!r}",
                          field="model")
    if segment_s is None:
        n_seg = int(np.clip(round(n_windows / 8), 1, 24))
    else:
        if not segment_s > 0:
            raise OptionError(f"segment length must be positive, got {segment_s!r} s",
                              field="segment_s")
        n_seg = int(np.clip(round((hi - lo) / segment_s), 1, max(1, n_windows // 3)))
    return np.linspace(lo, hi, n_seg + 1)


def _starts(mics, dims, source_z_m):
    centre = mics.mean(axis=0)
    ap = max(float(np.max(np.linalg.norm(mics - centre, axis=1))), 1.0)
    az = np.deg2rad(np.arange(0, 360, 30.0))
    out = [centre.copy()]
    if dims == 2:
        for r in (0.5, 1.5, 4.0, 12.0):
            out += [centre + r * ap * np.array([np.sin(a), np.cos(a), 0.0]) for a in az]
        out = np.array(out)
        out[:, 2] = source_z_m
    else:
        for r in (1.5, 4.0, 12.0):
            for el in (15.0, 45.0, 75.0):
                e = np.deg2rad(el)
                out += [centre + r * ap * np.array([np.cos(e) * np.sin(a), np.cos(e) * np.cos(a),
                                                    np.sin(e)]) for a in az[::2]]
        out = np.array(out)
        out[0, 2] += ap
    return out


def stationary_fixes(delays_s, whiten, mic_positions_m, pairs, sound_speed_mps, wind_mps=None, *,
                     dims=2, source_z_m=0.0, passes=40):
    """Stationary least-squares fix in every window at once (batched Levenberg-Marquardt).

    Parameters
    ----------
    delays_s : array_like, shape (W, P)
    whiten : array_like, shape (W, P, P)
        From :func:`whitening`.
    mic_positions_m : array_like, shape (N, 3)
    pairs : array_like, shape (P, 2)
    sound_speed_mps : float
    wind_mps : array_like, shape (3,), optional
    dims : {2, 3}
    source_z_m : float

    Returns
    -------
    position_m : ndarray, shape (W, 3)
    covariance_m2 : ndarray, shape (W, 3, 3)
        Zero z row/column for 2-D.
    chi2 : ndarray, shape (W,)
    """
    mics = np.asarray(mic_positions_m, float)
    pairs = np.asarray(pairs, int)
    d = np.nan_to_num(np.asarray(delays_s, float))
    m = np.asarray(whiten, float)
    c = float(sound_speed_mps)
    ii, jj = pairs[:, 0], pairs[:, 1]
    starts = _starts(mics, dims, source_z_m)
    n_w, n_s = d.shape[0], len(starts)
    x = np.broadcast_to(starts, (n_w, n_s, 3)).copy()
    ap = max(float(np.max(np.linalg.norm(mics - mics.mean(0), axis=1))), 1.0)

    def evaluate(pos):
        tt = air.travel_time_s(pos[:, :, None, :], mics, c, wind_mps)  # (W, S, N)
        g = air.travel_time_gradient(pos[:, :, None, :], mics, c, wind_mps)
        r = np.einsum("wqp,wsp->wsq", m, d[:, None, :] - (tt[..., jj] - tt[..., ii]))
        jac = -np.einsum("wqp,wspi->wsqi", m, (g[..., jj, :] - g[..., ii, :])[..., :dims])
        return r, jac

    lam = np.full((n_w, n_s), 1e-3)
    r, jac = evaluate(x)
    cost = np.sum(r**2, axis=-1)
    for _ in range(passes):
        jtj = np.einsum("wsqi,wsqk->wsik", jac, jac)
        jtr = np.einsum("wsqi,wsq->wsi", jac, r)
        diag = np.einsum("wsii->wsi", jtj)
        a = jtj + lam[..., None, None] * (np.eye(dims) * np.maximum(diag, 1e-30)[..., None, :])
        step = -np.linalg.solve(a + 1e-30 * np.eye(dims), jtr[..., None])[..., 0]
        trial = x.copy()
        trial[..., :dims] += step
        # keep far-field solutions bounded (range is poorly determined there)
        off = trial - mics.mean(0)
        rad = np.linalg.norm(off, axis=-1, keepdims=True)
        trial = np.where(rad > 200 * ap, mics.mean(0) + off * (200 * ap / rad), trial)
        r_t, jac_t = evaluate(trial)
        cost_t = np.sum(r_t**2, axis=-1)
        better = cost_t < cost
        x = np.where(better[..., None], trial, x)
        r = np.where(better[..., None], r_t, r)
        jac = np.where(better[..., None, None], jac_t, jac)
        cost = np.where(better, cost_t, cost)
        lam = np.where(better, lam / 3.0, lam * 4.0)
    best = np.argmin(cost, axis=1)
    rows = np.arange(n_w)
    pos = x[rows, best]
    jb = jac[rows, best]
    cov = np.zeros((n_w, 3, 3))
    cov[:, :dims, :dims] = np.linalg.pinv(np.einsum("wqi,wqk->wik", jb, jb))
    if dims == 3:  # ground arrays: take the source above the mean mic plane
        z0 = mics[:, 2].mean()
        pos[:, 2] = np.where(pos[:, 2] < z0, 2 * z0 - pos[:, 2], pos[:, 2])
    return pos, cov, cost[rows, best]


def _polyline_gls(par, t_s, pos, cov, keep):
    """Knot positions of ``par`` from points (W, 3) with covariances (W, 3, 3), GLS."""
    dims = par.dims
    b = par.basis(t_s)[:, :dims, :]  # (W, dims, n)
    info = np.linalg.pinv(cov[:, :dims, :dims] + 1e-6 * np.eye(dims))
    info = info * keep[:, None, None]
    a = np.einsum("wdn,wde,wem->nm", b, info, b)
    y = np.einsum("wdn,wde,we->n", b, info, pos[:, :dims])
    a += 1e-9 * np.trace(a) / a.shape[0] * np.eye(a.shape[0])
    return np.linalg.solve(a, y)


def initial_path(t_heard_s, delays_s, whiten, mic_positions_m, pairs, sound_speed_mps,
                 wind_mps=None, *, dims=2, source_z_m=0.0, model="straight", segment_s=None,
                 reference_mic=0):
    """Starting path from per-window stationary fixes (module docstring).

    Returns
    -------
    Path
    """
    mics = np.asarray(mic_positions_m, float)
    pos, cov, chi2 = stationary_fixes(delays_s, whiten, mics, pairs, sound_speed_mps, wind_mps,
                                      dims=dims, source_z_m=source_z_m)
    t_e = np.asarray(t_heard_s, float) - air.travel_time_s(pos, mics[reference_mic],
                                                           sound_speed_mps, wind_mps)
    knots = knot_times(t_e.min(), t_e.max(), model, len(t_e), segment_s)
    par = Parametrisation(knots, dims, source_z_m, DEGREE.get(model, 1))
    keep = np.isfinite(chi2) & np.all(np.isfinite(pos), axis=1)
    theta = _polyline_gls(par, t_e, pos, cov, keep)
    for _ in range(3):  # drop fixes far off the line (Mahalanobis, chi-square 99.9 %)
        resid = pos[:, :dims] - np.einsum("wdn,n->wd", par.basis(t_e)[:, :dims], theta)
        info = np.linalg.pinv(cov[:, :dims, :dims] + 1e-6 * np.eye(dims))
        m2 = np.einsum("wd,wde,we->w", resid, info, resid)
        new_keep = keep & (m2 < stats.chi2.ppf(0.999, dims))
        if new_keep.sum() < max(3, par.n_params // dims + 1) or np.array_equal(new_keep, keep):
            break
        keep = new_keep
        theta = _polyline_gls(par, t_e, pos, cov, keep)
    return par.path(theta)


def _turn_rows(par, turn_sd_mps):
    """Rows (v_k+1 - v_k) / sd of the smoothness prior, shape (R, n_params)."""
    n_k, dims = par.n_knots, par.dims
    if turn_sd_mps is None or n_k < 3 or par.degree != 1:
        return np.zeros((0, par.n_params))
    dt = np.diff(par.knot_times_s)
    vel = np.zeros((n_k - 1, n_k))  # segment velocity = (P_k+1 - P_k) / dt_k
    vel[np.arange(n_k - 1), np.arange(n_k - 1)] = -1.0 / dt
    vel[np.arange(n_k - 1), np.arange(1, n_k)] = 1.0 / dt
    turn = (vel[1:] - vel[:-1]) / float(turn_sd_mps)  # (K-1, n_k)
    return np.kron(turn, np.eye(dims))


def fit_path(t_heard_s, delays_s, covariance_s2, mic_positions_m, pairs, sound_speed_mps, *,
             wind_mps=None, dims=2, source_z_m=0.0, model="straight", segment_s=None,
             usable=None, initial=None, anchor="reference", warp=None, reference_mic=0,
             retarded=True, robust=False, reject=True, knots_s=None, turn_sd_mps=None,
             degree=None, max_nfev=200):
    """Fit a path to the delays of many windows at once (weighted least squares).

    Parameters
    ----------
    t_heard_s : array_like, shape (W,)
        Window centres at the reference mic, seconds.
    delays_s : array_like, shape (W, P)
        Measured delays ``t_j - t_i`` (or warped residuals when ``warp`` is given).
    covariance_s2 : array_like, shape (W, P, P)
    mic_positions_m : array_like, shape (N, 3)
    pairs : array_like, shape (P, 2)
    sound_speed_mps : float
    wind_mps : array_like, shape (3,), optional
    dims : {2, 3}
        2: the source moves at the fixed height ``source_z_m``; 3: free height.
    model : {"straight", "segments"}
    segment_s : float, optional
        Segment length for ``"segments"`` (default: about 8 windows per segment).
    usable : array_like, shape (W, P) bool, optional
    initial : Path, optional
        Starting path (default: :func:`initial_path`).
    anchor, warp, reference_mic, retarded
        Measurement model, see :func:`locate.track.retarded.predict_delays`.
    robust : bool
        Soft-L1 loss (for coarse first-pass delays); the covariance is then approximate.
    reject : bool
        Drop outlier windows (chi-square p < 1e-4, at most a quarter of them) and refit.
    knots_s : array_like, shape (K+1,), optional
        Knot times of the path (default: from the model over the initial path's span).
    turn_sd_mps : float, optional
        ``"segments"``: prior standard deviation of the velocity change at each inner knot
        (a weak smoothness prior that keeps segments with few windows from running away;
        Tikhonov regularisation, e.g. Press et al., Numerical Recipes, sec. 19.5).  None: off.

    Returns
    -------
    PathFit
    """
    if dims not in (2, 3):
        raise OptionError(f"dims must be 2 or 3, got {dims!r}", field="dims")
    mics = np.asarray(mic_positions_m, float)
    t_h = np.asarray(t_heard_s, float)
    d = np.asarray(delays_s, float)
    ok = np.isfinite(d) if usable is None else (np.asarray(usable, bool) & np.isfinite(d))
    whiten, rank = whitening(covariance_s2, ok)
    d = np.where(ok, d, 0.0)
    used = rank >= dims + 1
    if used.sum() < 3:
        raise NothingFoundError(f"only {int(used.sum())} windows have enough usable delays "
                                f"for a track (need 3 with at least {dims + 1} pairs): no "
                                "path found follows the sound; try --band around the "
                                "source's sound, --speed-guess near its speed, or a span "
                                "centred on the pass")
    if initial is None:
        initial = initial_path(t_h[used], d[used], whiten[used], mics, pairs, sound_speed_mps,
                               wind_mps, dims=dims, source_z_m=source_z_m, model=model,
                               segment_s=segment_s, reference_mic=reference_mic)
    if knots_s is not None:
        knots = np.asarray(knots_s, float)
    elif model == "straight" and initial.n_segments == 1:
        knots = initial.knot_times_s
    else:
        span = initial.knot_times_s
        knots = knot_times(span[0], span[-1], model, int(used.sum()), segment_s)
    par = Parametrisation(knots, dims, source_z_m, DEGREE.get(model, 1) if degree is None
                          else int(degree))
    theta = par.theta(initial)
    kw = dict(anchor=anchor, reference_mic=reference_mic, warp=warp, retarded=retarded)
    reg = _turn_rows(par, turn_sd_mps)  # (R, n) prior rows, possibly empty
    warnings = []
    converged = True
    for _ in range(4):
        sel = np.flatnonzero(used)

        def fun(th, sel=sel):
            if max_speed_mps(par, th) >= 0.95 * sound_speed_mps:  # unphysical trial step
                return np.full(len(sel) * whiten.shape[1] + len(reg), 1e6)
            try:
                pred, _, _ = predict_delays(par, th, t_h[sel], mics, pairs, sound_speed_mps,
                                            wind_mps, jacobian=False, **kw)
            except ConvergenceError:  # a trial step went supersonic: reject it
                return np.full(len(sel) * whiten.shape[1] + len(reg), 1e6)
            return np.concatenate([np.einsum("wqp,wp->wq", whiten[sel], d[sel] - pred).ravel(),
                                   reg @ th])

        def jac(th, sel=sel):
            _, j, _ = predict_delays(par, th, t_h[sel], mics, pairs, sound_speed_mps, wind_mps,
                                     **kw)
            return np.concatenate([-np.einsum("wqp,wpn->wqn", whiten[sel], j).reshape(
                -1, par.n_params), reg])

        sol = optimize.least_squares(fun, theta, jac=jac, method="trf", x_scale="jac",
                                     loss="soft_l1" if robust else "linear", f_scale=3.0,
                                     max_nfev=max_nfev)
        theta = sol.x
        converged = bool(sol.success)
        pred, _, _ = predict_delays(par, theta, t_h, mics, pairs, sound_speed_mps, wind_mps,
                                    jacobian=False, **kw)
        wres = np.einsum("wqp,wp->wq", whiten, d - pred)
        wchi2 = np.sum(wres**2, axis=1)
        if not reject or robust:
            break
        # the outlier set is chosen afresh from every fit (a window dropped against an early
        # path comes back when the refitted path explains it)
        limit = stats.chi2.isf(_REJECT_P, np.maximum(rank, 1))
        able = rank >= dims + 1
        bad = able & (wchi2 > limit)
        n_max = int(_MAX_REJECT_FRACTION * len(t_h))
        worst = np.argsort(-np.where(bad, wchi2 / limit, -np.inf))[: min(n_max, bad.sum())]
        new_used = able.copy()
        new_used[worst] = False
        if np.array_equal(new_used, used):
            break
        used = new_used
    n_rej = int(((rank >= dims + 1) & ~used).sum())
    if n_rej:
        warnings.append(f"{n_rej} of {len(t_h)} windows dropped as outliers (chi-square)")
    sel = np.flatnonzero(used)
    _, j, _ = predict_delays(par, theta, t_h, mics, pairs, sound_speed_mps, wind_mps, **kw)
    jw = np.einsum("wqp,wpn->wqn", whiten[sel], j[sel]).reshape(-1, par.n_params)
    chi2 = float(wchi2[sel].sum())
    dof = int(rank[sel].sum() - par.n_params)
    scale = max(1.0, chi2 / dof) if dof > 0 else 1.0
    cov = np.linalg.pinv(jw.T @ jw + reg.T @ reg) * scale
    resid = np.where(ok, d - pred, np.nan)[sel]
    if not np.isfinite(resid).any():
        raise NothingFoundError("no window kept a usable delay after outlier rejection")
    path = par.path(theta)
    t_emit = (emission_time_s(t_h, mics[reference_mic], path, sound_speed_mps, wind_mps)
              if retarded else t_h.copy())
    return PathFit(
        par=par, theta=theta, covariance=cov, path=path, t_heard_s=t_h, t_emit_s=t_emit,
        used=used, window_chi2=wchi2,
        window_dof=rank, chi2=chi2, dof=dof, covariance_scale=scale,
        residual_rms_s=float(np.sqrt(np.nanmean(resid**2))), converged=converged,
        retarded=retarded, anchor=anchor, reference_mic=reference_mic, warp=warp,
        warnings=warnings)
