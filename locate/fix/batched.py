"""Many stationary fixes at once: the locator of :mod:`locate.fix.solver`, vectorised over delay
sets.

For W delay sets of the same mics and pairs (e.g. the sliding windows of
:func:`locate.signal.windowed.estimate_delays_windows`) the steps of
:func:`locate.fix.solver.locate_source` run as array operations over the sets:

1. **Arrival times** by generalised least squares from the pair delays (batched Cholesky
   factors), with the same closure test: sets whose pairs close keep their covariance; sets
   whose misfit has no single stand-out pair have it scaled by the reduced chi-square (Birge
   ratio, common practice); sets with a stand-out pair are handed to ``locate_source``, which
   drops it.
2. **Start** - the spherical-interpolation linear solution (first stage of Chan & Ho 1994,
   IEEE Trans. SP 42(8)), batched normal equations.
3. **Refine** (:mod:`locate.fix.gauss_newton`) - Gauss-Newton with Levenberg-Marquardt damping on
   the whitened arrival-time residuals (Foy 1976, IEEE Trans. AES 12(2)), every set with its
   own damping, then two undamped Gauss-Newton polishing steps; covariance
   (J^T Q^-1 J)^-1 at the solution.
4. **Integrity** - the chi-square test of :mod:`locate.fix.solver` and its fault exclusion (the mic
   whose exclusion best restores consistency, one at a time), batched over the failing sets.
5. **Checks** - the ellipse-linearity check of :mod:`locate.fix.integrity`, batched.  Sets far
   outside the array (its far-field test), sets that did not converge, whose start was
   unusable or whose geometry is singular go through ``locate_source`` when ``fallback`` is
   true.  Mirror solutions (a second minimum) are not searched for.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from locate.errors import TdoaError
from locate.fix.gauss_newton import Model, solve, subsets
from locate.fix.solver import REJECT_P_VALUE, locate_source
from locate.signal.delays import DelaySet, all_pairs

try:  # the checks locate_source applies to a fix (absent in older trees: no checks there)
    from locate.fix.integrity import _MAX_ENLARGE, FAR_RATIO, LINEARITY_RATIO
except ImportError:  # pragma: no cover
    _MAX_ENLARGE = FAR_RATIO = LINEARITY_RATIO = None

__all__ = ["BatchFix", "locate_batch"]


@dataclass
class BatchFix:
    """Positions of W delay sets.

    Attributes
    ----------
    position_m : ndarray, shape (W, 3)
        NaN where no fix was possible.
    covariance_m2 : ndarray, shape (W, 3, 3)
        Zero z row and column for 2-D fixes.
    chi2 : ndarray, shape (W,)
    dof : ndarray of int, shape (W,)
    p_value : ndarray, shape (W,)
    converged : ndarray of bool, shape (W,)
    residual_rms_s : ndarray, shape (W,)
    closure_inflation : ndarray, shape (W,)
        Scale applied to the arrival-time covariance by the closure test (1: none).
    rejected : ndarray of bool, shape (W, N)
        Mics excluded by the integrity test.
    single : ndarray of bool, shape (W,)
        Sets solved by :func:`locate.fix.solver.locate_source` (a pair that does not close, no
        convergence, singular geometry).
    fixes : dict
        The :class:`locate.fix.solver.Fix` of each such set, by index.
    """

    position_m: np.ndarray
    covariance_m2: np.ndarray
    chi2: np.ndarray
    dof: np.ndarray
    p_value: np.ndarray
    converged: np.ndarray
    residual_rms_s: np.ndarray
    closure_inflation: np.ndarray
    rejected: np.ndarray
    single: np.ndarray
    fixes: dict


def _design(pairs, n_mics):
    """Pair delays from arrival times relative to mic 0: (P, N - 1)."""
    a = np.zeros((len(pairs), n_mics - 1))
    for r, (i, j) in enumerate(pairs):
        if j:
            a[r, j - 1] += 1.0
        if i:
            a[r, i - 1] -= 1.0
    return a


def _arrival_times(d, q, a):
    """Batched GLS: tau (W, N-1), its covariance (W, N-1, N-1) and the misfit chi2 (W,)."""
    q = 0.5 * (q + np.swapaxes(q, -1, -2))
    rhs = np.concatenate([np.broadcast_to(a, (len(d),) + a.shape), d[..., None]], axis=-1)
    sol = np.linalg.solve(q, rhs)  # Q^-1 [A d]
    qa, qd = sol[..., :-1], sol[..., -1]
    info = np.einsum("pu,wpv->wuv", a, qa)
    b = np.einsum("pu,wp->wu", a, qd)
    cov = np.linalg.inv(info)
    tau = (cov @ b[..., None])[..., 0]
    chi2 = np.einsum("wp,wp->w", d, qd) - np.einsum("wu,wu->w", b, tau)
    return tau, cov, np.maximum(chi2, 0.0)


def _standardised_residuals(d, q, a, tau, cov):
    """Whitened closure residuals over their own sd (as locate.fix.solver._closure_fit): (W, P)."""
    chol = np.linalg.cholesky(0.5 * (q + np.swapaxes(q, -1, -2)))
    aw = np.linalg.solve(chol, np.broadcast_to(a, (len(d),) + a.shape))
    resid = np.linalg.solve(chol, (d - tau @ a.T)[..., None])[..., 0]
    hat = np.sum((aw @ cov) * aw, axis=-1)
    return resid / np.sqrt(np.clip(1.0 - hat, 1e-9, None))


def locate_batch(mic_positions_m, delays_s, covariance_s2, sound_speed_mps, *, pairs=None,
                 wind_mps=None, dims=2, source_z_m=0.0, reject=True, fallback=True,
                 reject_p_value=REJECT_P_VALUE, extra_covariance_s2=None) -> BatchFix:
    """Locate a stationary source for each of W delay sets.

    Parameters
    ----------
    mic_positions_m : array_like, shape (N, 3)
    delays_s : array_like, shape (W, P)
        Pair delays t_j - t_i of every set.
    covariance_s2 : array_like, shape (W, P, P) or (P, P)
        Their covariance (one per set, or shared).
    sound_speed_mps : float
    pairs : array_like, shape (P, 2), optional
        Default: all pairs i < j.  Every mic must be in some pair.
    wind_mps : array_like, shape (3,), optional
    dims : {2, 3}
    source_z_m : float
        Source height of 2-D fixes.
    reject : bool
        Integrity test with mic exclusion (through ``locate_source``) for the sets that fail.
    fallback : bool
        Hand unusual sets (closure outlier, integrity failure, no convergence) to
        :func:`locate.fix.solver.locate_source`; otherwise they keep the batched answer (flagged by
        their p-value and ``converged``).
    reject_p_value : float
    extra_covariance_s2 : array_like, shape (W, P, P) or (P, P), optional
        Added to the delay covariance after the closure test, as in ``locate_source``: a
        closure misfit scales the measurement part only, never the declared survey, clock
        and air part.

    Returns
    -------
    BatchFix
    """
    mics = np.asarray(mic_positions_m, dtype=float)
    n_mics = len(mics)
    if dims not in (2, 3):
        raise ValueError(f"dims must be 2 or 3, got {dims!r}")
    pairs = all_pairs(n_mics) if pairs is None else np.asarray(pairs, int).reshape(-1, 2)
    d = np.atleast_2d(np.asarray(delays_s, dtype=float))
    n_w, n_p = d.shape
    if n_p != len(pairs):
        raise ValueError(f"delays_s has {n_p} pairs per set, pairs has {len(pairs)}")
    q = np.broadcast_to(np.asarray(covariance_s2, dtype=float), (n_w, n_p, n_p))
    if len(np.unique(pairs)) != n_mics:
        raise ValueError("every mic must appear in at least one pair")
    need = dims + 1
    if n_mics < need:
        raise ValueError(f"a {dims}-D fix needs at least {need} mics, got {n_mics}")
    finite = np.isfinite(d).all(axis=1) & np.isfinite(q).all(axis=(1, 2))
    single = ~finite
    a = _design(pairs, n_mics)
    tau = np.zeros((n_w, n_mics - 1))
    cov_u = np.tile(np.eye(n_mics - 1), (n_w, 1, 1))
    chi2_c = np.zeros(n_w)
    inflation = np.ones(n_w)
    ok = np.flatnonzero(finite)
    if ok.size:
        t, cu, c2 = _arrival_times(d[ok], q[ok], a)
        tau[ok], cov_u[ok], chi2_c[ok] = t, cu, c2
        dof_c = n_p - (n_mics - 1)
        fail = np.flatnonzero(stats.chi2.sf(c2, dof_c) < REJECT_P_VALUE) if dof_c > 0 else []
        if len(fail):
            f = ok[fail]
            mag = np.abs(_standardised_residuals(d[f], q[f], a, tau[f], cov_u[f]))
            outlier = mag.max(axis=1) > np.maximum(4.0, 4.0 * np.median(mag, axis=1))
            counts = np.bincount(pairs.ravel(), minlength=n_mics)
            k = np.argmax(mag, axis=1)
            thin = (counts[pairs[k, 0]] <= 2) | (counts[pairs[k, 1]] <= 2)
            drop = outlier & ~thin  # locate_source drops that pair: hand the set over
            scale = f[~drop]
            inflation[scale] = chi2_c[scale] / dof_c
            cov_u[scale] *= inflation[scale][:, None, None]
            single[f[drop]] = True
        if extra_covariance_s2 is not None:  # measurement part (scaled) + the declared part
            extra = np.broadcast_to(np.asarray(extra_covariance_s2, dtype=float),
                                    (n_w, n_p, n_p))
            q = q * inflation[:, None, None] + extra
            t, cu, _ = _arrival_times(d[ok], q[ok], a)
            tau[ok], cov_u[ok] = t, cu
    c, wind = float(sound_speed_mps), None if wind_mps is None else np.asarray(wind_mps, float)
    tau_f = np.zeros((n_w, n_mics))
    tau_f[:, 1:] = tau
    cov_f = np.zeros((n_w, n_mics, n_mics))
    cov_f[:, 1:, 1:] = cov_u
    used = np.tile(np.arange(n_mics), (n_w, 1))
    z, cz = subsets(tau_f, cov_f, used)
    _, x, chi2, converged, bad_start = solve(mics[used], z, cz, c, wind, dims, source_z_m)
    dof = np.full(n_w, n_mics - 1 - dims)
    p_value = np.where(dof > 0, stats.chi2.sf(chi2, np.maximum(dof, 1)), 1.0)
    rejected = np.zeros((n_w, n_mics), bool)
    if reject:
        _exclude(used, rejected, x, chi2, dof, p_value, tau_f, cov_f, mics, c, wind, dims,
                 source_z_m, reject_p_value, ~single & converged)
    position = np.full((n_w, 3), np.nan)
    covp = np.full((n_w, 3, 3), np.inf)
    covp[:, :, dims:] = 0.0
    covp[:, dims:, :] = 0.0
    rms = np.full(n_w, np.nan)
    n_used = np.where(rejected, 0, 1).sum(axis=1)
    fine = np.zeros(n_w, bool)
    for m in np.unique(n_used):  # one group per number of mics kept
        g = np.flatnonzero(n_used == m)
        keep = np.sort(np.where(rejected[g], n_mics, np.arange(n_mics)), axis=1)[:, :m]
        zg, czg = subsets(tau_f[g], cov_f[g], keep)
        model = Model(mics[keep], zg, czg, c, wind, dims, source_z_m)
        jw = model.jacobian(x[g])
        info = np.swapaxes(jw, 1, 2) @ jw
        ok = np.isfinite(info).all(axis=(1, 2)) & (np.abs(np.linalg.det(info)) > 0)
        covp[g[ok], :dims, :dims] = np.linalg.inv(info[ok])
        fine[g[ok]] = True
        position[g] = model.point(x[g])
        rms[g] = np.sqrt(np.mean(model.plain_residual(x[g]) ** 2, axis=1))
    misfit = (dof > 0) & (p_value < reject_p_value)
    birge = misfit & fine  # no exclusion restores consistency: Birge ratio, as locate_source
    covp[birge] *= (chi2[birge] / dof[birge])[:, None, None]
    inflation_p = np.where(birge, chi2 / np.maximum(dof, 1), 1.0)
    far = np.zeros(n_w, bool)
    for m in np.unique(n_used) if FAR_RATIO is not None else ():  # fix_checks, batched
        g = np.flatnonzero((n_used == m) & fine)
        if g.size == 0:
            continue
        keep = np.sort(np.where(rejected[g], n_mics, np.arange(n_mics)), axis=1)[:, :m]
        zg, czg = subsets(tau_f[g], cov_f[g], keep)
        model = Model(mics[keep], zg, czg, c, wind, dims, source_z_m)
        far[g], factor = _checks(model, mics[keep], x[g], chi2[g],
                                 covp[g, :dims, :dims], inflation_p[g], dims)
        covp[g] *= factor[:, None, None]
    single |= ~converged | bad_start | ~fine | far
    out = BatchFix(position_m=position, covariance_m2=covp, chi2=chi2, dof=dof,
                   p_value=p_value, converged=converged, residual_rms_s=rms,
                   closure_inflation=inflation, rejected=rejected, single=single, fixes={})
    if fallback:
        _single_sets(out, mics, pairs, d, q, sound_speed_mps, wind_mps, dims, source_z_m,
                     reject, reject_p_value)
    return out


def _checks(model, used_mics, x, chi2, cov, inflation, dims):
    """Far-outside flag and the ellipse factor of :func:`locate.fix.integrity.assess_fix`.

    Sets far outside the array (more than ``FAR_RATIO`` apertures) are flagged for the
    single-set locator, which runs the far-field likelihood-ratio test; for the others the
    exact misfit on the 95 % boundary is compared with the quadratic prediction (Bates & Watts
    1988, ch. 6) and the covariance enlarged where the rise falls below ``LINEARITY_RATIO``.
    """
    centre = used_mics.mean(axis=1)
    aperture = np.max(np.linalg.norm(used_mics[:, :, None, :2] - used_mics[:, None, :, :2],
                                     axis=-1), axis=(1, 2))
    point = model.point(x)
    far = np.linalg.norm(point[:, :2] - centre[:, :2], axis=1) > FAR_RATIO * aperture
    if dims == 2:
        t = np.linspace(0, 2 * np.pi, 16, endpoint=False)
        u = np.stack([np.cos(t), np.sin(t)], axis=-1)
    else:
        u = np.array([[i, j, k] for i in (-1, 0, 1) for j in (-1, 0, 1) for k in (-1, 0, 1)
                      if (i, j, k) != (0, 0, 0)], dtype=float)
        u = u / np.linalg.norm(u, axis=1, keepdims=True)
    c = 0.5 * (cov + np.swapaxes(cov, 1, 2))
    vals, vecs = np.linalg.eigh(c)
    ok = np.isfinite(c).all(axis=(1, 2))
    ok[ok] &= vals[ok, 0] > 0
    q = stats.chi2.ppf(0.95, dims)
    pts = x[:, None, :] + np.einsum("ud,wd,wed->wue", u, np.sqrt(q * np.clip(vals, 0, None)),
                                    vecs)
    sel = np.repeat(np.arange(len(x)), len(u))
    with np.errstate(over="ignore", invalid="ignore"):
        r = model.residual(pts.reshape(-1, dims), sel)
        rise = (np.sum(r**2, axis=-1).reshape(len(x), len(u)) - chi2[:, None]) / (
            q * np.maximum(inflation, 1.0))[:, None]
    low = np.min(np.where(np.isfinite(rise), rise, np.inf), axis=1)
    enlarge = ok & np.isfinite(low) & (low < LINEARITY_RATIO)
    factor = np.where(enlarge, np.minimum(1.0 / np.maximum(low, 1.0 / _MAX_ENLARGE),
                                          _MAX_ENLARGE), 1.0)
    return far, factor


def _exclude(used, rejected, x, chi2, dof, p_value, tau, cov, mics, c, wind, dims, source_z_m,
             p_reject, eligible):
    """Fault detection and exclusion of :func:`locate.fix.solver.locate_source`, over many sets.

    While a set fails the chi-square test and keeps more than dims + 2 mics, the mic whose
    exclusion gives the best p-value is dropped; the exclusions are kept only if the set then
    passes.  Updates ``rejected``, ``x``, ``chi2``, ``dof`` and ``p_value`` in place.
    """
    n_w, n_mics = used.shape
    need = dims + 1
    idx = np.flatnonzero(eligible & (dof > 0) & (p_value < p_reject))
    if idx.size == 0:
        return
    cur = used[idx].copy()
    st_x, st_chi2 = x[idx].copy(), chi2[idx].copy()
    st_dof, st_p = dof[idx].copy(), p_value[idx].copy()
    dropped = np.zeros((idx.size, n_mics), bool)
    active = np.ones(idx.size, bool)
    while True:
        m = cur.shape[1]
        active &= (st_dof > 0) & (st_p < p_reject) & (m > need + 1)
        a = np.flatnonzero(active)
        if a.size == 0:
            break
        cols = np.array([[j for j in range(m) if j != k] for k in range(m)])  # (m, m-1)
        trial = cur[a][:, cols].reshape(-1, m - 1)  # every exclusion of every active set
        zt, czt = subsets(tau[idx[a]].repeat(m, axis=0), cov[idx[a]].repeat(m, axis=0), trial)
        _, xt, ct, _, _ = solve(mics[trial], zt, czt, c, wind, dims, source_z_m)
        dt = m - 2 - dims
        pt = (stats.chi2.sf(ct, dt) if dt > 0 else np.ones_like(ct)).reshape(a.size, m)
        ct = ct.reshape(a.size, m)
        # same dof for every exclusion of a step: the best p-value is the least chi-square
        # (and chi-square does not underflow to a tie when several mics are faulty)
        best = np.argmin(np.where(np.isfinite(ct), ct, np.inf), axis=1)
        r = np.arange(a.size)
        dropped[a, cur[a, best]] = True
        new = np.empty((idx.size, m - 1), int)
        new[a] = cur[a][r[:, None], cols[best]]
        inactive = np.flatnonzero(~active)
        new[inactive] = cur[inactive, : m - 1]  # placeholder rows, never used again
        cur = new
        st_x[a] = xt.reshape(a.size, m, -1)[r, best]
        st_chi2[a], st_p[a], st_dof[a] = ct[r, best], pt[r, best], dt
    accept = dropped.any(axis=1) & ((st_dof == 0) | (st_p >= p_reject))
    g = idx[accept]
    rejected[g] = dropped[accept]
    x[g], chi2[g], dof[g], p_value[g] = st_x[accept], st_chi2[accept], st_dof[accept], \
        np.where(st_dof[accept] > 0, st_p[accept], 1.0)


def _single_sets(out, mics, pairs, d, q, c, wind, dims, source_z_m, reject, p_reject):
    """Solve the flagged sets one by one with :func:`locate.fix.solver.locate_source`."""
    n_p = len(pairs)
    names = np.array([f"M{k + 1}" for k in range(len(mics))])
    for w in np.flatnonzero(out.single):  # only the unusual sets: loop unavoidable
        ds = DelaySet(pairs=pairs, delay_s=d[w], sd_s=np.sqrt(np.abs(np.diag(q[w]))),
                      covariance_s2=q[w], peak=np.ones(n_p), score=np.full(n_p, np.inf),
                      second_ratio=np.zeros(n_p), quality=("good",) * n_p, t_s=0.0,
                      duration_s=0.0, band_hz=(0.0, 0.0), sample_rate_hz=0.0,
                      max_lag_s=np.full(n_p, np.inf))
        try:
            fx = locate_source(mics, ds, c, wind_mps=wind, dims=dims, source_z_m=source_z_m,
                               reject=reject, reject_p_value=p_reject, mic_names=list(names))
        except TdoaError:
            out.position_m[w] = np.nan
            out.covariance_m2[w] = np.nan
            out.converged[w] = False
            continue
        out.fixes[int(w)] = fx
        out.position_m[w] = fx.position_m
        out.covariance_m2[w] = fx.covariance_m2
        out.chi2[w], out.dof[w], out.p_value[w] = fx.chi2, fx.dof, fx.p_value
        out.converged[w] = fx.converged
        out.residual_rms_s[w] = fx.residual_rms_s
        out.rejected[w] = np.isin(names, fx.rejected_mics)
