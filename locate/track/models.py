"""Motion models chosen by the data, and whether the chosen one explains the windows.

Candidates (all fitted to the same windowed delays by :func:`locate.track.pathfit.fit_path`):

* ``straight`` - one constant-velocity segment (2 positions per coordinate);
* ``segments`` - piecewise straight with turns: knots are added one at a time where they
  lower the chi-square most (greedy forward selection over a grid of emission times, each
  candidate refined by a local search), as long as the information criterion drops;
* ``smooth`` - a quadratic B-spline in emission time (constant acceleration between evenly
  spaced breakpoints, continuous velocity) with 1 to 3 intervals.

Selection: the Bayesian information criterion ``BIC = chi2 + k ln(n)`` (Schwarz 1978, Ann.
Statist. 6(2) 461-464) with ``chi2`` the whitened misfit of the model summed over the windows
that any candidate kept (a window one model rejects as an outlier still counts against it),
``k`` the number of path parameters and ``n`` the number of independent delays.  The lowest
BIC wins; the straight model is kept unless another beats it.

Adequacy (the stated test): the chosen model explains the windows when its reduced
chi-square ``chi2 / dof`` is below :data:`MISFIT_LIMIT`, no more than
:data:`BAD_WINDOW_FRACTION` of the kept windows exceed the 99.9 % point of their chi-square
distribution (scipy.stats.chi2), and it keeps at least :data:`MIN_KEPT_FRACTION` of all
windows.  Otherwise the track is flagged and every point's covariance
grows by the covariance of its own window's fix plus the square of the displacement that
window asks for (:func:`window_displacements`): the model error, measured at that point.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np
from scipy import stats

from locate.errors import ConvergenceError, NothingFoundError
from locate.physics import air
from locate.track.pathfit import PathFit, fit_path, max_speed_mps

__all__ = ["MODELS", "MISFIT_LIMIT", "BAD_WINDOW_FRACTION", "Candidate", "bic", "adequacy",
           "choose_model", "window_displacements", "turns"]

MODELS = ("auto", "straight", "segments", "smooth")
MISFIT_LIMIT = 2.0
"""Largest reduced chi-square of an adequate model (delay covariances are estimates; a factor
of about two is within what they may be off by on real recordings; common practice)."""
BAD_WINDOW_FRACTION = 0.1
MIN_KEPT_FRACTION = 0.7
"""A model that keeps (explains, or has usable delays in) fewer of the windows than this does
not describe the pass: windows it drops are windows it cannot account for."""
_MAX_TURNS = 6
_SMOOTH_INTERVALS = (1, 2, 3)


@dataclass
class Candidate:
    """One fitted model: its name, knots, degree, fit and criterion."""

    model: str
    fit: PathFit
    bic: float = np.inf
    chi2: float = np.inf

    @property
    def n_params(self) -> int:
        return int(self.fit.par.n_params)

    def summary(self) -> dict:
        return {"model": self.model, "n_params": self.n_params,
                "knots_s": [float(t) for t in self.fit.par.knot_times_s],
                "degree": int(self.fit.par.degree), "chi2": float(self.chi2),
                "bic": float(self.bic)}


def window_misfit(fit: PathFit, union):
    """Sum over ``union`` of each window's chi-square."""
    return float(np.sum(fit.window_chi2[union]))


def bic(cands, union):
    """Fill in each candidate's chi-square over ``union`` windows and its BIC."""
    n = max(int(np.sum(cands[0].fit.window_dof[union])), 1)
    for c in cands:
        c.chi2 = window_misfit(c.fit, union)
        c.bic = c.chi2 + c.n_params * np.log(n)
    return cands


def adequacy(fit: PathFit) -> dict:
    """Misfit of a fit: reduced chi-square, per-window p-values, and the verdict (module doc)."""
    used = fit.used
    dof_w = np.maximum(fit.window_dof, 1)
    p = stats.chi2.sf(fit.window_chi2, dof_w)
    red_w = fit.window_chi2 / dof_w
    red = fit.chi2 / fit.dof if fit.dof > 0 else float("nan")
    bad = used & (p < 1e-3)
    frac = float(bad.sum() / max(used.sum(), 1))
    kept = float(used.mean()) if used.size else 0.0
    ok = bool(np.isfinite(red) and red <= MISFIT_LIMIT and frac <= BAD_WINDOW_FRACTION
              and kept >= MIN_KEPT_FRACTION)
    return {"chi2_reduced": float(red), "window_chi2_reduced": red_w, "window_p": p,
            "bad_window_fraction": frac, "kept_fraction": kept, "adequate": ok}


def _fit(model, knots, degree, data, initial, max_nfev=200, reject=True):
    t_c, eps, cov, ok, warp, mics, pairs, c, kw = data
    try:
        f = fit_path(t_c, eps, cov, mics, pairs, c, usable=ok, warp=warp, initial=initial,
                     knots_s=knots, degree=degree, model="segments" if degree == 1 else "smooth",
                     max_nfev=max_nfev, reject=reject, **kw)
        if not np.all(np.isfinite(f.theta)) or max_speed_mps(f.par, f.theta) >= 0.95 * c:
            return None
    except (ConvergenceError, NothingFoundError, np.linalg.LinAlgError):
        return None
    return Candidate(model, f)


def _prune(best: Candidate, data, union, log_n):
    """Backward elimination: drop inner knots while that lowers the BIC."""
    crit = window_misfit(best.fit, union) + best.n_params * log_n
    while best.fit.par.n_knots > 2:
        knots = best.fit.par.knot_times_s
        trials = []
        for k in range(1, knots.size - 1):
            cand = _fit("segments", np.delete(knots, k), 1, data, best.fit.path)
            if cand is not None:
                trials.append((window_misfit(cand.fit, union) + cand.n_params * log_n, k, cand))
        if not trials:
            break
        c2, _, cand = min(trials, key=lambda r: r[0])
        if c2 > crit:
            break
        best, crit = cand, c2
    return best, crit


def _greedy_segments(base: Candidate, data, union, log_n, t_emit, seed=None):
    """Forward selection of turn knots (module docstring), after pruning a seed."""
    best = base
    best_crit = window_misfit(base.fit, union) + base.n_params * log_n
    if seed is not None and seed.fit.par.n_knots > 2:
        s = _fit("segments", seed.fit.par.knot_times_s, 1, data, seed.fit.path)
        if s is not None:
            s, crit = _prune(s, data, union, log_n)
            if crit < best_crit:
                best, best_crit = s, crit
    te = np.sort(t_emit[union])
    if te.size < 8:
        return best
    lo, hi = te[0], te[-1]
    dims = base.fit.par.dims
    for _ in range(_MAX_TURNS):
        knots = best.fit.par.knot_times_s
        grid = np.linspace(lo, hi, 11)[1:-1]
        step = grid[1] - grid[0]
        gap = 2.0 * np.median(np.diff(te))
        trials = []
        for t in grid:
            if np.min(np.abs(knots - t)) < max(gap, 0.25 * step):
                continue
            k2 = np.sort(np.append(knots, t))
            # a few Gauss-Newton steps rank the knot times (the current path is exactly
            # representable with the extra knot, so they start from it)
            cand = _fit("segments", k2, 1, data, best.fit.path, max_nfev=4, reject=False)
            if cand is not None:
                trials.append((window_misfit(cand.fit, union), t))
        if not trials:
            break
        trials.sort()
        t0 = trials[0][1]
        # refine the knot time around the best grid point (golden-free: a few local trials)
        local = [t0 + f * step for f in (-0.4, 0.0, 0.4)]
        refined = []
        for t in local:
            if not lo < t < hi or np.min(np.abs(knots - t)) < gap:
                continue
            cand = _fit("segments", np.sort(np.append(knots, t)), 1, data, best.fit.path)
            if cand is not None:
                refined.append((window_misfit(cand.fit, union), t, cand))
        if not refined:
            break
        chi2, t_new, cand = min(refined, key=lambda r: r[0])
        crit = chi2 + cand.n_params * log_n
        if crit >= best_crit - 2.0 * dims:  # must beat the BIC by more than its own rounding
            break
        best, best_crit = cand, crit
    if best.fit.par.n_knots > 3:
        best, _ = _prune(best, data, union, log_n)
    return best


def choose_model(requested, straight: PathFit, data, *, segment_s=None, seed=None):
    """Fit the candidate models to the delays and pick one by the BIC (module docstring).

    Parameters
    ----------
    requested : {"auto", "straight", "segments", "smooth"}
    straight : PathFit
        The straight fit of these delays.
    data : tuple
        ``(t_c, delays, covariance, usable, warp, mics, pairs, c, fit_kw)``.
    segment_s : float, optional
        Evenly spaced segments of this length instead of the greedy turns.
    seed : Candidate, optional
        A previous piecewise-straight choice whose knots are tried (and pruned) first.

    Returns
    -------
    chosen : Candidate
    candidates : list of Candidate
    """
    base = Candidate("straight", straight)
    cands = [base]
    t_emit = straight.t_emit_s
    union = straight.window_dof >= straight.par.dims + 1
    log_n = np.log(max(int(np.sum(straight.window_dof[union])), 1))
    lo, hi = straight.par.knot_times_s[0], straight.par.knot_times_s[-1]
    if requested in ("auto", "smooth"):
        for k in _SMOOTH_INTERVALS:
            c = _fit("smooth", np.linspace(lo, hi, k + 1), 2, data, straight.path)
            if c is not None:
                cands.append(c)
    if requested == "auto":
        # Occam first: when the simplest candidates already explain the windows, the search
        # for turns is skipped
        for c in cands:
            union = union | c.fit.used
        bic(cands, union)
        best = min(cands, key=lambda c: c.bic)
        if adequacy(best.fit)["adequate"]:
            return best, cands
    if requested in ("auto", "segments"):
        if segment_s is not None:
            n_seg = int(np.clip(round((hi - lo) / segment_s), 1, max(1, union.sum() // 3)))
            c = _fit("segments", np.linspace(lo, hi, n_seg + 1), 1, data, straight.path)
            if c is not None:
                cands.append(c)
        else:
            cands.append(_greedy_segments(base, data, union, log_n, t_emit,
                                          seed if seed is not None
                                          and seed.model == "segments" else None))
    for c in cands:
        union = union | c.fit.used
    bic(cands, union)
    pool = cands if requested == "auto" else [c for c in cands if c.model == requested] or cands
    chosen = min(pool, key=lambda c: c.bic)
    return chosen, cands


def window_displacements(fit: PathFit, delays_s, covariance_s2, usable, mic_positions_m, pairs,
                         sound_speed_mps, wind_mps=None):
    """Per window: the displacement of its track point that its own delays ask for, and the
    covariance of that one-window fix (linearised at the point, velocity terms neglected).

    Returns
    -------
    shift_m : ndarray, shape (W, 3)
    covariance_m2 : ndarray, shape (W, 3, 3)
    """
    from locate.track.pathfit import whitening
    from locate.track.retarded import predict_delays

    mics = np.asarray(mic_positions_m, float)
    pairs = np.asarray(pairs, int)
    dims = fit.par.dims
    pos = fit.path.position_m(fit.t_emit_s)
    g = air.travel_time_gradient(pos[:, None, :], mics[None], sound_speed_mps, wind_mps)
    jac = (g[:, pairs[:, 1]] - g[:, pairs[:, 0]])[..., :dims]  # (W, P, dims)
    pred = predict_delays(fit.par, fit.theta, fit.t_heard_s, mics, pairs, sound_speed_mps,
                          wind_mps, anchor=fit.anchor, reference_mic=fit.reference_mic,
                          warp=fit.warp, retarded=fit.retarded, jacobian=False)[0]
    ok = np.asarray(usable, bool) & np.isfinite(delays_s)
    m, _ = whitening(covariance_s2, ok)
    r = np.einsum("wqp,wp->wq", m, np.where(ok, delays_s - pred, 0.0))
    a = np.einsum("wqp,wpd->wqd", m, jac)
    info = np.einsum("wqd,wqe->wde", a, a)
    cov = np.linalg.pinv(info)
    shift = np.einsum("wde,wqe,wq->wd", cov, a, r)
    out_s = np.zeros((len(pos), 3))
    out_c = np.zeros((len(pos), 3, 3))
    out_s[:, :dims] = shift
    out_c[:, :dims, :dims] = cov
    return out_s, out_c


def inflate(covariance_m2, shift_m, window_cov_m2, window_chi2_reduced):
    """Point covariances grown to cover the model error (module docstring)."""
    scale = np.maximum(np.asarray(window_chi2_reduced, float), 1.0)[:, None, None]
    # The model error is continuous along the track but a window's own fix measures it with
    # its own error (worst in range): besides the measured shift (rank one), every point gets
    # an isotropic term of the largest shift among its neighbours (+-NEIGHBOURS windows).
    s2 = np.sum(np.asarray(shift_m, float) ** 2, axis=1)
    k = NEIGHBOURS
    pad = np.pad(s2, k, mode="edge")
    near = np.max(np.lib.stride_tricks.sliding_window_view(pad, 2 * k + 1), axis=1)
    iso = np.zeros_like(np.asarray(covariance_m2, float))
    iso[:, 0, 0] = iso[:, 1, 1] = iso[:, 2, 2] = near
    return (covariance_m2 + window_cov_m2 * scale + iso
            + np.einsum("wi,wj->wij", shift_m, shift_m))


NEIGHBOURS = 3
"""Windows on each side whose model-error shift a flagged point's ellipse also covers."""


def turns(fit: PathFit, min_change_deg=10.0, merge_s=1.0):
    """Inner knots of a piecewise-straight fit where the heading changes, with the change."""
    par = fit.par
    if par.degree != 1 or par.n_knots < 3:
        return []
    kt = par.knot_times_s
    out = []
    for k in range(1, par.n_knots - 1):
        v_in = fit.path.velocity_mps(np.array(0.5 * (kt[k - 1] + kt[k])))
        v_out = fit.path.velocity_mps(np.array(0.5 * (kt[k] + kt[k + 1])))
        a_in = np.degrees(np.arctan2(v_in[0], v_in[1]))
        a_out = np.degrees(np.arctan2(v_out[0], v_out[1]))
        change = float((a_out - a_in + 180.0) % 360.0 - 180.0)
        out.append({"t_s": float(kt[k]), "heading_change_deg": change,
                    "speed_before_mps": float(np.linalg.norm(v_in)),
                    "speed_after_mps": float(np.linalg.norm(v_out))})
    # knots closer than merge_s are one manoeuvre (a corner the fit rounds with two or three
    # knots): its change is the sum of theirs, its time their change-weighted mean
    merged = []
    for t in out:
        last = merged[-1] if merged else None
        if last is not None and t["t_s"] - last["t_last_s"] < merge_s:
            w0, w1 = last["weight"], abs(t["heading_change_deg"])
            last["t_s"] = (last["t_s"] * w0 + t["t_s"] * w1) / max(w0 + w1, 1e-12)
            last["heading_change_deg"] += t["heading_change_deg"]
            last["weight"] = w0 + w1
            last["speed_after_mps"] = t["speed_after_mps"]
            last["t_last_s"] = t["t_s"]
            last["knots_s"].append(t["t_s"])
        else:
            merged.append(dict(t, t_last_s=t["t_s"], knots_s=[t["t_s"]],
                               weight=abs(t["heading_change_deg"])))
    for m in merged:
        m.pop("t_last_s")
        m.pop("weight")
        m["is_turn"] = bool(abs(m["heading_change_deg"]) >= min_change_deg)
    return merged


def replace_covariance(fit: PathFit, factor: float) -> PathFit:
    return dataclasses.replace(fit, covariance=fit.covariance * factor,
                               covariance_scale=fit.covariance_scale * factor)


def prune(chosen: Candidate, data, windows) -> Candidate:
    """Backward elimination of the inner knots of a piecewise-straight choice on ``windows``."""
    log_n = np.log(max(int(np.sum(chosen.fit.window_dof[windows])), 1))
    best, _ = _prune(chosen, data, windows, log_n)
    return best


def polish_knots(chosen: Candidate, data, windows, max_evals=10) -> Candidate:
    """Move each inner knot of a piecewise-straight choice to the time that fits best.

    One bounded scalar search per knot (scipy.optimize.minimize_scalar, Brent's bounded
    method) of the chi-square over ``windows``, each window's term capped at ten times its
    99.99 % point so that a window no path explains does not steer the knot.
    """
    from scipy import optimize

    best = chosen
    dof = np.maximum(best.fit.window_dof, 1)
    cap = 10.0 * stats.chi2.isf(1e-4, dof)

    def score(cand):
        return float(np.sum(np.minimum(cand.fit.window_chi2, cap)[windows]))

    for k in range(1, best.fit.par.n_knots - 1):
        kt = best.fit.par.knot_times_s
        gap = 0.1 * min(kt[k] - kt[k - 1], kt[k + 1] - kt[k])
        lo, hi = kt[k - 1] + gap, kt[k + 1] - gap
        cache = {}

        def f(t, kt=kt, k=k, cache=cache, start=best.fit.path):
            k2 = kt.copy()
            k2[k] = t
            cand = _fit("segments", k2, 1, data, start, reject=False)
            cache[t] = cand
            return np.inf if cand is None else score(cand)

        sol = optimize.minimize_scalar(f, bounds=(lo, hi), method="bounded",
                                       options={"xatol": 0.02, "maxiter": max_evals})
        base = score(best)
        if cache.get(sol.x) is not None and sol.fun < base:
            k2 = kt.copy()
            k2[k] = sol.x
            new = _fit("segments", k2, 1, data, cache[sol.x].fit.path)
            if new is not None:
                best = new
    return best
