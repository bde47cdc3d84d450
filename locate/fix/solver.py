"""Stationary-source locator: closed-form start, weighted least squares, bad-mic exclusion.

The measured pair delays d (covariance Q, from :mod:`locate.signal.delays`) are explained by the
source position p through  d_ij = T(p -> m_j) - T(p -> m_i)  with T the time of flight in a
uniform wind (:func:`locate.physics.air.travel_time_s`).  Steps:

1. **Pair consistency** - the pair delays are first reduced to arrival times relative to one
   mic by generalised least squares (they must close: d_ij + d_jk = d_ik).  A pair that does
   not close (an echo or a wrong correlation peak) fails a chi-square test and is dropped.
2. **Start** - the linear least-squares solution of the range-difference equations
   (spherical interpolation; the first stage of Chan & Ho 1994, IEEE Trans. SP 42(8)) and the
   minima of the misfit over a polar grid, so that two-branch (mirror) geometries are found.
3. **Refine** - Gauss-Newton with Levenberg-Marquardt damping on the whitened residuals
   (Foy 1976, IEEE Trans. AES 12(2), Taylor-series location).  The covariance of the position
   is (J^T Q^-1 J)^-1 at the solution; it is not rescaled by the residual, so an ellipse means
   what it says when the delay uncertainties are honest.
4. **Integrity** - in the manner of receiver autonomous integrity monitoring in GNSS: a
   chi-square test of the residual; on failure the mic whose exclusion best restores
   consistency is rejected and the fit repeated while enough mics remain.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import stats

from locate.errors import ConvergenceError, NothingFoundError
from locate.fix.integrity import _endfire_pairs, assess_fix
from locate.physics.air import travel_time_gradient, travel_time_s
from locate.signal.delays import DelaySet

__all__ = [
    "Fix",
    "predict_delays",
    "arrival_times",
    "locate_source",
    "REJECT_P_VALUE",
]

REJECT_P_VALUE = 1e-3
"""A fit whose chi-square p-value is below this fails the integrity test."""

MAX_DELAY_S = 1e4  # a pair delay beyond this (~3000 km of sound) is corrupt, not a measurement
MIN_DELAY_VAR_S2 = 1e-24  # (1 ps)^2: floor for a zero or vanishing delay variance


@dataclass
class Fix:
    """One stationary-source position estimate.

    Attributes
    ----------
    position_m : ndarray, shape (3,)
    covariance_m2 : ndarray, shape (3, 3)
        Zero z row and column for a 2-D fix (height given).
    used : ndarray of bool, shape (N,)
        Mics that entered the final fit.
    rejected_mics : list of str
        Mics excluded by the integrity test (bad clock, echo, ...).
    dead_mics : list of str
        Mics with no usable correlation at all.
    dropped_pairs : list of tuple
        Pairs whose delays did not close with the others.
    residual_rms_s : float
        RMS of the arrival-time residuals.
    chi2, dof, p_value : float, int, float
        Goodness of fit of the final solution.
    mirror_position_m : ndarray (3,) or None
        A second, equally consistent solution when the geometry allows two.
    warnings : list of str
    converged : bool
    dims : int
    arrival_s, arrival_cov_s2 : ndarray
        Arrival times relative to the reference mic and their covariance (used mics).
    """

    position_m: np.ndarray
    covariance_m2: np.ndarray
    used: np.ndarray
    rejected_mics: list
    dead_mics: list
    dropped_pairs: list
    residual_rms_s: float
    chi2: float
    dof: int
    p_value: float
    mirror_position_m: np.ndarray | None
    warnings: list = field(default_factory=list)
    converged: bool = True
    dims: int = 2
    residuals_s: np.ndarray | None = None
    covariance_inflation: float = 1.0


def _log_p_value(chi2, dof):
    """log P(X > chi2), X ~ chi-square(dof); finite far into the tail (ranking exclusions).

    Where scipy's ``logsf`` gives -inf, the leading terms of the upper incomplete gamma
    function's asymptotic series: log Q(a, x) ~ (a - 1) log x - x - lgamma(a), a = dof / 2,
    x = chi2 / 2 (Abramowitz & Stegun 1964, 6.5.32).
    """
    if dof <= 0:
        return 0.0
    v = float(stats.chi2.logsf(chi2, dof))
    if np.isfinite(v):
        return v
    a, x = 0.5 * dof, 0.5 * max(float(chi2), 1e-300)
    return (a - 1.0) * math.log(x) - x - math.lgamma(a)


def predict_delays(source_m, mic_positions_m, pairs, sound_speed_mps, wind_mps=None):
    """Predicted pair delays t_j - t_i for sources at ``source_m``.

    Parameters
    ----------
    source_m : array_like, shape (..., 3)
    mic_positions_m : array_like, shape (N, 3)
    pairs : array_like, shape (P, 2)
    sound_speed_mps : float
    wind_mps : array_like, shape (3,), optional

    Returns
    -------
    ndarray, shape (..., P)
    """
    pairs = np.asarray(pairs, dtype=int)
    src = np.asarray(source_m, dtype=float)[..., None, :]
    t = travel_time_s(src, np.asarray(mic_positions_m, dtype=float), sound_speed_mps, wind_mps)
    return t[..., pairs[:, 1]] - t[..., pairs[:, 0]]


def arrival_times(delays: DelaySet, n_mics: int, *, closure_p_value=REJECT_P_VALUE,
                  details=False):
    """Reduce pair delays to arrival times by generalised least squares.

    Pairs that do not close with the others (an echo or a wrong correlation peak) are dropped
    one at a time while one of them stands out (its standardised residual is more than four
    times the median and above 4); a mic is never cut off this way.  A misfit that remains
    (the pairs disagree across the board, e.g. ground reflections biasing every delay) scales
    the covariance by the reduced chi-square (Birge ratio, common practice).

    Parameters
    ----------
    delays : DelaySet
    n_mics : int
    details : bool
        Also return the covariance scale factor applied.

    Returns
    -------
    tau_s : ndarray, shape (N,)
        Arrival time of each mic minus that of the reference mic (NaN for mics without any
        usable pair).
    cov_s2 : ndarray, shape (N, N)
        Covariance (zero row/column for the reference, NaN-free only for connected mics).
    connected : ndarray of bool, shape (N,)
    dropped : list of int
        Indices of pairs that failed the closure test.
    inflation : float
        Only with ``details=True``.
    """
    var = np.diag(delays.covariance_s2)
    usable = (np.isfinite(var) & (var >= 0) & np.isfinite(delays.delay_s)
              & (np.abs(delays.delay_s) < MAX_DELAY_S))
    keep = usable.copy()
    dropped = []
    inflation = 1.0
    while True:
        result = _closure_fit(delays, np.flatnonzero(keep), n_mics)
        if result is None:
            out = (np.full(n_mics, np.nan), np.full((n_mics, n_mics), np.nan),
                   np.zeros(n_mics, bool), dropped)
            return out + (inflation,) if details else out
        tau, cov, connected, norm_resid, chi2, dof, idx = result
        if dof <= 0 or stats.chi2.sf(chi2, dof) >= closure_p_value:
            break
        mag = np.abs(norm_resid)
        k = int(np.argmax(mag))
        counts = np.bincount(delays.pairs[idx].ravel(), minlength=n_mics)
        i, j = delays.pairs[idx[k]]
        outlier = mag[k] > max(4.0, 4.0 * np.median(mag))
        if not outlier:
            # correlated pair errors (a reflection term) spread one gross error over the
            # standardised residuals: leave each pair out in turn and take the one whose
            # absence explains most of the misfit (at least half of it, and 16 = 4 sd squared)
            k, gain = _best_pair_to_drop(delays, idx, n_mics, chi2, counts)
            if k is not None:
                i, j = delays.pairs[idx[k]]
                outlier = gain > max(16.0, 0.5 * chi2)
        if not outlier or counts[i] <= 2 or counts[j] <= 2:
            inflation = chi2 / dof
            cov = cov * inflation
            break
        keep[idx[k]] = False
        dropped.append(int(idx[k]))
    out = (tau, cov, connected, dropped)
    return out + (inflation,) if details else out


def _best_pair_to_drop(delays, idx, n_mics, chi2, counts):
    """(position in ``idx``, chi-square drop) of the pair whose exclusion lowers the closure
    misfit most, among pairs whose mics keep at least two other pairs; (None, 0) if none."""
    best, gain = None, 0.0
    for r, k in enumerate(idx):
        i, j = delays.pairs[k]
        if counts[i] <= 2 or counts[j] <= 2:
            continue
        res = _closure_fit(delays, idx[idx != k], n_mics)
        if res is None or res[5] <= 0 or not res[2][delays.pairs[idx]].all():
            continue
        if chi2 - res[4] > gain:
            best, gain = r, chi2 - res[4]
    return best, gain


def _closure_fit(delays, idx, n_mics):
    if idx.size == 0:
        return None
    pairs = delays.pairs[idx]
    involved = np.unique(pairs)
    # connected component of the first involved mic
    ref = int(involved[0])
    comp = {ref}
    changed = True
    while changed:
        changed = False
        for i, j in pairs:
            if (i in comp) != (j in comp):
                comp.update((int(i), int(j)))
                changed = True
    members = sorted(comp)
    in_comp = np.array([(i in comp) and (j in comp) for i, j in pairs])
    idx = idx[in_comp]
    pairs = pairs[in_comp]
    unknown = [m for m in members if m != ref]
    if not unknown:
        return None
    col = {m: k for k, m in enumerate(unknown)}
    a = np.zeros((len(idx), len(unknown)))
    for r, (i, j) in enumerate(pairs):
        if j != ref:
            a[r, col[j]] += 1.0
        if i != ref:
            a[r, col[i]] -= 1.0
    d = delays.delay_s[idx]
    q = delays.covariance_s2[np.ix_(idx, idx)]
    q = 0.5 * (q + q.T)
    try:
        chol = np.linalg.cholesky(q)
    except np.linalg.LinAlgError:
        q = q + np.eye(len(idx)) * max(1e-6 * np.mean(np.diag(q)), MIN_DELAY_VAR_S2)
        chol = np.linalg.cholesky(q)
    aw = np.linalg.solve(chol, a)
    dw = np.linalg.solve(chol, d)
    sol, *_ = np.linalg.lstsq(aw, dw, rcond=None)
    info = aw.T @ aw
    cov_u = np.linalg.inv(info)
    resid_w = dw - aw @ sol
    chi2 = float(resid_w @ resid_w)
    dof = len(idx) - len(unknown)
    # standardised residual per pair (its own variance after the fit)
    hat = aw @ cov_u @ aw.T
    var_r = np.clip(1.0 - np.diag(hat), 1e-9, None)
    norm_resid = resid_w / np.sqrt(var_r)
    tau = np.full(n_mics, np.nan)
    cov = np.full((n_mics, n_mics), np.nan)
    tau[ref] = 0.0
    for m, k in col.items():
        tau[m] = sol[k]
    mem = np.array(members)
    cov[np.ix_(mem, mem)] = 0.0
    u = np.array(unknown)
    cov[np.ix_(u, u)] = cov_u
    connected = np.zeros(n_mics, bool)
    connected[mem] = True
    return tau, cov, connected, norm_resid, chi2, dof, idx


class _Problem:
    """Whitened residuals of the arrival-time model for one set of used mics."""

    def __init__(self, mic_positions_m, tau_s, cov_s2, used_idx, sound_speed_mps, wind_mps,
                 dims, source_z_m):
        self.mics = np.asarray(mic_positions_m, dtype=float)
        self.used = np.asarray(used_idx, dtype=int)
        self.c = float(sound_speed_mps)
        self.wind = None if wind_mps is None else np.asarray(wind_mps, dtype=float)
        self.dims = dims
        self.source_z_m = float(source_z_m)
        u0, rest = self.used[0], self.used[1:]
        self.ref, self.rest = u0, rest
        z = tau_s[rest] - tau_s[u0]
        m = np.zeros((len(rest), len(tau_s)))
        m[np.arange(len(rest)), rest] = 1.0
        m[:, u0] -= 1.0
        c_full = np.nan_to_num(cov_s2, nan=0.0)
        cz = m @ c_full @ m.T
        cz = 0.5 * (cz + cz.T)
        self.z = z
        self.cov = cz
        self.chol = np.linalg.cholesky(cz + np.eye(len(z)) * 1e-30)
        self.n_meas = len(z)

    def point(self, params):
        params = np.asarray(params, dtype=float)
        if self.dims == 2:
            zz = np.full(params.shape[:-1] + (1,), self.source_z_m)
            return np.concatenate([params, zz], axis=-1)
        return params

    def predict(self, params):
        p = self.point(params)[..., None, :]
        t = travel_time_s(p, self.mics, self.c, self.wind)
        return t[..., self.rest] - t[..., [self.ref]]

    def whitened(self, params):
        r = self.z - self.predict(params)
        return np.linalg.solve(self.chol, np.moveaxis(np.atleast_2d(r), -1, 0)).T.reshape(
            np.shape(r))

    def chi2(self, params):
        w = self.whitened(params)
        return np.sum(w**2, axis=-1)

    def jacobian_whitened(self, params):
        p = self.point(params)
        g = travel_time_gradient(p[None, :], self.mics, self.c, self.wind)  # (N, 3)
        jac = (g[self.rest] - g[self.ref])[:, : self.dims]
        return np.linalg.solve(self.chol, jac)


def _refine(problem: _Problem, start, max_iter=60):
    """Levenberg-Marquardt on the whitened residuals; returns (params, chi2, converged)."""
    x = np.asarray(start, dtype=float).copy()
    r = problem.whitened(x)
    chi2 = float(r @ r)
    lam = 1e-3
    converged = False
    for _ in range(max_iter):
        jw = problem.jacobian_whitened(x)
        jtj = jw.T @ jw
        g = jw.T @ r
        scale = np.sqrt(np.clip(np.diag(jtj), 1e-30, None))
        improved = False
        for _ in range(30):
            a = jtj + lam * np.diag(scale**2)
            try:
                step = np.linalg.solve(a, g)
            except np.linalg.LinAlgError:
                lam *= 10
                continue
            xn = x + step
            rn = problem.whitened(xn)
            chi2n = float(rn @ rn)
            if np.isfinite(chi2n) and chi2n <= chi2:
                improved = True
                break
            lam *= 10.0
        if not improved:
            converged = True  # no downhill step: at a minimum (to numerical precision)
            break
        small = np.linalg.norm(step) <= 1e-9 * (1.0 + np.linalg.norm(x))
        x, r = xn, rn
        dchi = chi2 - chi2n
        chi2 = chi2n
        lam = max(lam / 10.0, 1e-12)
        if small or dchi <= 1e-10 * (1.0 + chi2):
            converged = True
            break
    return x, chi2, converged


def _closed_form_start(problem: _Problem):
    """Spherical-interpolation linear solution (still air, mic ``ref`` as origin)."""
    mics = problem.mics
    m0 = mics[problem.ref]
    mi = mics[problem.rest] - m0
    r = problem.c * problem.z  # range differences R_i - R_0
    dims = problem.dims
    # |p - m_i|^2 = (R0 + r_i)^2  ->  -2 m_i.p - 2 r_i R0 = r_i^2 - |m_i|^2   (p relative to m0)
    if dims == 2:
        zrel = problem.source_z_m - m0[2]
        a = np.column_stack([-2 * mi[:, 0], -2 * mi[:, 1], -2 * r])
        b = r**2 - np.sum(mi**2, axis=1) + 2 * mi[:, 2] * zrel
    else:
        a = np.column_stack([-2 * mi, -2 * r])
        b = r**2 - np.sum(mi**2, axis=1)
    if a.shape[0] < a.shape[1]:
        return None
    try:
        sol, *_ = np.linalg.lstsq(a, b, rcond=None)
    except np.linalg.LinAlgError:
        return None
    p = sol[:dims] + m0[:dims]
    return p if np.all(np.isfinite(p)) else None


def _grid_starts(problem: _Problem, n_best=4):
    """Local minima of chi2 over a polar grid around the array (catches mirror solutions)."""
    used_pos = problem.mics[problem.used]
    centre = used_pos.mean(axis=0)
    aperture = max(np.max(np.linalg.norm(used_pos[:, None, :2] - used_pos[None, :, :2],
                                         axis=-1)), 1.0)
    radii = np.concatenate([[0.0], np.geomspace(0.02 * aperture, 60.0 * aperture, 70)])
    az = np.linspace(0, 2 * np.pi, 144, endpoint=False)
    if problem.dims == 2:
        rr, aa = np.meshgrid(radii, az, indexing="ij")
        pts = np.stack([centre[0] + rr * np.sin(aa), centre[1] + rr * np.cos(aa)], axis=-1)
    else:
        el = np.deg2rad(np.linspace(-80, 80, 17))
        rr, aa, ee = np.meshgrid(radii, az[::2], el, indexing="ij")
        pts = np.stack([centre[0] + rr * np.cos(ee) * np.sin(aa),
                        centre[1] + rr * np.cos(ee) * np.cos(aa),
                        centre[2] + rr * np.sin(ee)], axis=-1)
    chi = problem.chi2(pts.reshape(-1, problem.dims)).reshape(pts.shape[:-1])
    # local minima on the grid (wrap in azimuth)
    from scipy.ndimage import minimum_filter
    mode = ["nearest", "wrap"] + (["nearest"] if problem.dims == 3 else [])
    loc = chi == minimum_filter(chi, size=3, mode=mode)
    cand = np.flatnonzero(loc.ravel())
    order = cand[np.argsort(chi.ravel()[cand])][:n_best]
    return [pts.reshape(-1, problem.dims)[k] for k in order]


def _solve(problem: _Problem):
    """Best and (if any) mirror solution: list of (params, chi2, converged) sorted by chi2."""
    starts = []
    cf = _closed_form_start(problem)
    if cf is not None:
        starts.append(cf)
    starts.extend(_grid_starts(problem))
    sols = []
    for s in starts:
        x, chi2, ok = _refine(problem, s)
        if np.all(np.isfinite(x)):
            sols.append((x, chi2, ok))
    if not sols:
        raise ConvergenceError("the least-squares fit did not converge from any start")
    sols.sort(key=lambda t: t[1])
    distinct = [sols[0]]
    for s in sols[1:]:
        if all(np.linalg.norm(s[0] - d[0]) > 0.05 * (1 + np.linalg.norm(d[0] - problem.mics[
                problem.used].mean(0)[: problem.dims])) for d in distinct):
            distinct.append(s)
    return distinct


def _model_explanation(pos, tau, cov, used, sound_speed_mps, wind_mps, dims, source_z_m, x,
                       model_sds):
    """Best misfit with the source height (2-D) or the sound speed moved within 3 declared
    sds: (what, value text, chi2) or None.  A profile over a 13-point grid, each point refined
    from ``x`` (Levenberg-Marquardt)."""
    best = None
    grid = np.linspace(-3.0, 3.0, 13)
    sd_z = float(model_sds.get("source_z_m", 0.0) or 0.0)
    sd_c = float(model_sds.get("sound_speed_mps", 0.0) or 0.0)
    trials = []
    if dims == 2 and sd_z > 0:
        ground = model_sds.get("ground_z_m", 0.0)
        trials += [("source height", source_z_m + sd_z * t if ground is None
                    else max(source_z_m + sd_z * t, ground), sound_speed_mps) for t in grid]
    if sd_c > 0:
        trials += [("sound speed", source_z_m, sound_speed_mps + sd_c * t) for t in grid]
    for what, z, c in trials:
        try:
            prob = _Problem(pos, tau, cov, used, c, wind_mps, dims, z)
            _, chi2, _ = _refine(prob, x, max_iter=20)
        except (np.linalg.LinAlgError, ValueError):
            continue
        if np.isfinite(chi2) and (best is None or chi2 < best[2]):
            value = f"{z:.2f} m" if what == "source height" else f"{c:.2f} m/s"
            best = (what, value, float(chi2))
    return best


def reflection_bias_bound_s(mic_positions_m, source_m, sound_speed_mps, source_z_sd_m=0.0,
                            ground_z_m=0.0, peak_width_s=None):
    """Per mic, the largest shift a ground reflection can give its arrival, seconds.

    The reflection reaches mic u a lag ``D_u = (|m_u - s'| - |m_u - s|) / c`` after the direct
    sound (``s'``: the source mirrored in the ground plane z = ``ground_z_m``).  When ``D_u``
    is within the correlation peak's width the two arrivals merge into one peak, whose maximum
    for a symmetric pulse lies between the direct arrival and the midpoint of the two (equal
    amplitudes, a reflection coefficient of 1): the arrival moves by at most ``D_u / 2``
    (common practice for two merged equal pulses).  A reflection beyond the peak's width is
    a separate peak and moves nothing (``peak_width_s``; None: no limit).  ``D_u`` is taken
    at its largest over the source height +- 3 sds (heights kept above the ground)."""
    mics = np.asarray(mic_positions_m, float)
    src = np.asarray(source_m, float)
    g = float(ground_z_m)
    out = np.zeros(len(mics))
    for t in (-3.0, 0.0, 3.0):
        z = max(src[2] + t * float(source_z_sd_m), g)
        s = np.array([src[0], src[1], z])
        img = np.array([src[0], src[1], 2.0 * g - z])
        d = (np.linalg.norm(mics - img, axis=1) - np.linalg.norm(mics - s, axis=1))
        d = d / float(sound_speed_mps)
        if peak_width_s is not None:
            d = np.where(d <= peak_width_s, d, 0.0)
        out = np.maximum(out, 0.5 * d)
    return out


def _peak_half_width_s(delays):
    """Half-width of the correlation's main peak, 1 / (2 f_rms), with f_rms the rms frequency
    of the pairs' spectral weights (the fine peak of a band-pass correlation is a cosine at
    about that frequency under the envelope); None when the weights are not known."""
    f = getattr(delays, "spectral_freqs_hz", None)
    w = getattr(delays, "spectral_weight", None)
    if f is None or w is None:
        return None
    w = np.abs(np.asarray(w, float)).reshape(-1, np.size(f)).sum(axis=0)
    if not np.any(w > 0):
        return None
    f_rms = float(np.sqrt(np.sum(w * np.asarray(f, float) ** 2) / np.sum(w)))
    return 0.5 / f_rms if f_rms > 0 else None


def _reflection_explanation(pos, tau, cov, used, sound_speed_mps, wind_mps, dims, source_z_m,
                            x, k, bound_s):
    """Best misfit of all ``used`` mics with mic ``k``'s arrival moved within +-``bound_s``
    (a 13-point profile, each point refined from ``x``): chi2 or None."""
    best = None
    for b in np.linspace(-1.0, 1.0, 13) * bound_s:
        t2 = np.array(tau, float)
        t2[k] = t2[k] - b
        try:
            prob = _Problem(pos, t2, cov, used, sound_speed_mps, wind_mps, dims, source_z_m)
            _, chi2, _ = _refine(prob, x, max_iter=20)
        except (np.linalg.LinAlgError, ValueError):
            continue
        if np.isfinite(chi2) and (best is None or chi2 < best):
            best = float(chi2)
    return best


def locate_source(mic_positions_m, delays: DelaySet, sound_speed_mps, *, wind_mps=None,
                  dims=2, source_z_m=0.0, reject=True, mic_names=None,
                  extra_covariance_s2=None, reject_p_value=REJECT_P_VALUE, model_sds=None):
    """Locate a stationary source from measured pair delays.

    Parameters
    ----------
    mic_positions_m : array_like, shape (N, 3)
    delays : DelaySet
        Measured delays with covariance.
    sound_speed_mps : float
    wind_mps : array_like, shape (3,), optional
        Uniform wind (enters the time of flight).
    dims : {2, 3}
        2: solve x, y with the source height fixed at ``source_z_m``; 3: solve x, y, z.
    source_z_m : float
        Source height for 2-D fixes, metres (same datum as the mics).
    reject : bool
        Apply the integrity test and exclude inconsistent mics.
    mic_names : sequence of str, optional
    extra_covariance_s2 : array_like, shape (P, P), optional
        Added to the delay covariance (e.g. survey and clock uncertainties).
    reject_p_value : float
        Integrity-test threshold.
    model_sds : dict, optional
        ``{"source_z_m": sd, "sound_speed_mps": sd}``: model errors the budget declares.
        Before a mic is rejected, the misfit with the height (2-D) or the sound speed moved
        within 3 sds is compared with the misfit without the mic; if the model error fits
        as well (or restores consistency), no mic is rejected and the warning names the
        likely cause.

    Returns
    -------
    Fix

    Raises
    ------
    NothingFoundError
        Too few mics with usable delays.
    """
    pos = np.asarray(mic_positions_m, dtype=float)
    n_mics = len(pos)
    names = list(mic_names) if mic_names is not None else [f"M{k + 1}" for k in range(n_mics)]
    if dims not in (2, 3):
        raise ValueError(f"dims must be 2 or 3, got {dims!r}")
    # Pair consistency is judged on the measurement covariance alone; a misfit there scales the
    # measurement part only, never the declared survey/clock/air part added after it.
    tau, cov, connected, dropped, closure = arrival_times(delays, n_mics, details=True)
    if extra_covariance_s2 is not None:
        delays = DelaySet(**{**delays.__dict__, "covariance_s2": delays.covariance_s2 * closure
                             + np.asarray(extra_covariance_s2, dtype=float)})
        keep = np.ones(len(delays.pairs), bool)
        keep[dropped] = False
        tau, cov, connected, _ = arrival_times(delays.subset(keep), n_mics,
                                               closure_p_value=0.0)
    warnings = []
    if closure > 1.0:
        warnings.append(f"the pair delays disagree with each other beyond their uncertainty "
                        f"(echoes or reflections?): uncertainties scaled "
                        f"{np.sqrt(closure):.1f}x")
    dead = [names[k] for k in range(n_mics) if not connected[k]]
    if dead:
        warnings.append("no usable correlation for mic(s) " + ", ".join(dead)
                        + ": check that they recorded the event")
    dropped_pairs = [tuple(names[m] for m in delays.pairs[k]) for k in dropped]
    if dropped_pairs:
        warnings.append("pair delays that do not agree with the others were dropped: "
                        + ", ".join(f"{a}-{b}" for a, b in dropped_pairs)
                        + " (echo or wrong correlation peak)")
    used = np.flatnonzero(connected)
    need = dims + 1
    if used.size < need:
        raise NothingFoundError(
            f"only {used.size} mic(s) have usable delays; a {dims}-D fix needs at least {need}"
            " (more mics, a longer span or a better --band would help)")

    def fit(used_idx):
        prob = _Problem(pos, tau, cov, used_idx, sound_speed_mps, wind_mps, dims, source_z_m)
        sols = _solve(prob)
        x, chi2, ok = sols[0]
        dof = prob.n_meas - dims
        return prob, sols, x, chi2, ok, dof

    first = fit(used)
    prob, sols, x, chi2, ok, dof = first
    rejected = []
    if reject:
        # Fault detection and exclusion: drop, one at a time, the mic whose exclusion best
        # restores consistency; keep the exclusions only if consistency is restored in the end.
        state, trial_used, trial_rejected = first, used, []
        while (state[5] > 0 and stats.chi2.sf(state[3], state[5]) < reject_p_value
               and trial_used.size > need + 1):
            trials = [(k, fit(trial_used[trial_used != k])) for k in trial_used]
            # log p: with two or more faulty mics every p-value of one exclusion can
            # underflow to 0, and a tie would drop the first mic, not the worst one
            k, state = max(trials, key=lambda t: _log_p_value(t[1][3], t[1][5]))
            trial_used = trial_used[trial_used != k]
            trial_rejected.append(names[k])
        restored = trial_rejected and (state[5] == 0
                                       or stats.chi2.sf(state[3], state[5]) >= reject_p_value)
        model = None
        if trial_rejected and model_sds:
            # one bad mic, or a model error within the declared budget (source height, sound
            # speed)?  The model error wins whenever it fits as well: a healthy mic is never
            # rejected for an error the budget declares.
            model = _model_explanation(pos, tau, cov, used, sound_speed_mps, wind_mps, dims,
                                       source_z_m, x, model_sds)
            if model is not None and dof > 1:
                p_model = _log_p_value(model[2], dof - 1)
                p_mics = _log_p_value(state[3], state[5]) if state[5] > 0 else 0.0
                if p_model >= math.log(reject_p_value) or p_model >= p_mics:
                    restored = False
                    what, value, _ = model
                    warnings.append(
                        f"the delays disagree beyond their uncertainty, but no mic is to blame: "
                        f"they fit as well with the {what} at {value} (within the declared "
                        f"uncertainty); likely cause: the {what}"
                        + (" - measure the air temperature on site" if what == "sound speed"
                           else " - give the source height if it is known"))
        if (restored and len(trial_rejected) == 1 and model_sds
                and model_sds.get("ground_z_m", None) is not None and dof > 1):
            # one bad mic, or the ground reflection's bias at that mic?  A reflection inside
            # the correlation peak moves a mic's arrival by up to half its lag; when moving the
            # rejected mic's arrival within that bound restores consistency or fits as well as
            # dropping the mic (the rule of the model errors above), the mic is kept (its
            # misfit then widens the ellipse below) and the cause is named.
            k = names.index(trial_rejected[0])
            width = _peak_half_width_s(delays)
            bound = reflection_bias_bound_s(
                pos, prob.point(x), sound_speed_mps, model_sds.get("source_z_m", 0.0) or 0.0,
                model_sds["ground_z_m"], width)[k]
            if bound > 0:
                chi2_b = _reflection_explanation(pos, tau, cov, used, sound_speed_mps, wind_mps,
                                                 dims, source_z_m, x, k, bound)
                p_mics = _log_p_value(state[3], state[5]) if state[5] > 0 else 0.0
                p_b = None if chi2_b is None else _log_p_value(chi2_b, dof - 1)
                if p_b is not None and (p_b >= math.log(reject_p_value) or p_b >= p_mics):
                    restored = False
                    warnings.append(
                        f"mic {names[k]}'s timing disagrees with the others, but within what "
                        f"a ground reflection arriving inside the correlation peak can do at "
                        f"that mic (up to {1e6 * bound:.0f} us): kept; likely cause: the "
                        "ground reflection")
        if restored:
            prob, sols, x, chi2, ok, dof = state
            used, rejected = trial_used, trial_rejected
    p_value = float(stats.chi2.sf(chi2, dof)) if dof > 0 else 1.0
    inflation = 1.0
    if dof > 0 and p_value < reject_p_value:
        # No single exclusion explains the misfit (echoes, multipath, a wrong sound speed):
        # scale the covariance by the reduced chi-square (Birge ratio, common practice) so the
        # ellipse reflects the scatter actually seen, and say so.
        inflation = chi2 / dof
        warnings.append(f"the delays do not fit one source position well (chi-square p = "
                        f"{p_value:.1e}): the ellipse was enlarged {np.sqrt(inflation):.1f}x "
                        "to match the misfit (echoes, wind or temperature errors?)")
    if rejected:
        warnings.append("mic(s) " + ", ".join(rejected) + " rejected: their timing disagrees "
                        "with the others (clock error, echo or wrong position)")
    jw = prob.jacobian_whitened(x)
    info = jw.T @ jw
    covp = np.zeros((3, 3))
    try:
        covp[:dims, :dims] = np.linalg.inv(info) * inflation
    except np.linalg.LinAlgError:
        covp[:dims, :dims] = np.inf
        warnings.append("the geometry cannot fix the source (singular information matrix)")
    cond = np.linalg.cond(info) if np.all(np.isfinite(info)) else np.inf
    if cond > 1e12:
        line = _endfire_pairs(prob, prob.point(x), names)
        warnings.append("poor geometry: the position is nearly undetermined along one axis"
                        + (f"; the source is near the extension of the line through mics "
                           f"{', '.join(line)} (their delay is at its largest and says little "
                           "about the position): a mic off that line, toward the source, "
                           "would help" if line else ""))
    # far outside the array / non-quadratic misfit: warnings and an honest ellipse
    notes, covp[:dims, :dims] = assess_fix(prob, x, chi2, covp[:dims, :dims], inflation, names)
    warnings.extend(notes)
    mirror = None
    for alt_x, alt_chi2, _alt_ok in sols[1:]:
        thresh = chi2 + max(stats.chi2.ppf(0.95, max(dof, 1)), 4.0)
        if alt_chi2 <= thresh:
            mirror = prob.point(alt_x)
            warnings.append("ambiguous geometry: a second position fits the delays about as "
                            f"well, at ({mirror[0]:.1f}, {mirror[1]:.1f}) m")
            break
    resid = prob.z - prob.predict(x)
    return Fix(
        position_m=prob.point(x), covariance_m2=covp,
        used=np.isin(np.arange(n_mics), used), rejected_mics=rejected, dead_mics=dead,
        dropped_pairs=dropped_pairs, residual_rms_s=float(np.sqrt(np.mean(resid**2))),
        chi2=float(chi2), dof=int(dof), p_value=p_value, mirror_position_m=mirror,
        warnings=warnings, converged=bool(ok), dims=dims, residuals_s=resid,
        covariance_inflation=float(inflation),
    )
