"""Uncertainty budget: survey, clock, sound-speed and wind uncertainties in every ellipse.

The delays measured by :mod:`locate.signal.delays` carry only the correlation (timing) noise.  The
model that turns them into a position also depends on *nuisance* inputs known only to a
declared standard deviation: the mic positions (horizontal sd per axis, height sd), each
recorder's clock offset, the sound speed (through the air temperature) and a uniform wind.

Method
------
* **Propagation** - law of propagation of uncertainty, first order (JCGM 100:2008, GUM,
  5.1.2 eq. (10) and 5.2.2 eq. (13) for the covariance of outputs sharing inputs): the
  nuisances add  Q_n = sum_k G_k S_k G_k^T  to the delay covariance, with
  G_k = d(predicted delays)/d(nuisance k) at the current source estimate and S_k the diagonal
  of declared variances (the nuisances are independent).  d(travel time)/d(mic) is minus the
  gradient with respect to the source (the time of flight depends on mic - source only,
  :func:`locate.physics.air.travel_time_gradient`); the clock columns are the pair incidence
  (+1 at j, -1 at i); sound speed and wind by central differences of
  :func:`locate.fix.solver.predict_delays`; dc/dT by a central difference of
  :func:`locate.physics.air.sound_speed_mps` (Cramer 1993).
* **Iteration** - G depends on the source, so :func:`fix_with_budget` fixes, evaluates Q_n at
  the fix and fixes again with Q_n added, re-evaluating Q_n at each new fix until a pass moves
  the fix by less than a tenth of its smallest sd (at most :data:`MAX_PASSES` fits).  Two
  passes are *not* always enough: when the fit can absorb a nuisance (five mics and a sound
  speed that is 1 sd off), the first, timing-only fix is centimetres off, G evaluated there
  points slightly wrong and the second fix keeps a bias of about one sd of the (then
  millimetre-size) ellipse; the third pass removes it and the fourth confirms it (measured:
  coverage 77 % with two passes, 93.5 % with the iteration - docs/uncertainty.md).
* **Budget** - for the weighted least-squares estimate with W = Q_total^+ the position
  covariance splits exactly into components (JCGM 100:2008 eq. (13) with the linearised
  estimator as the measurement function)  C_k = H Q_k H^T,  H = (J^T W J)^-1 J^T W,
  which add up to (J^T W J)^-1 for the linear model.  The headline share is the share of the
  horizontal variance (trace of the x, y block), which is additive; the share of the 95 %
  ellipse *area* (pi times the product of the semi-axes) is also given but does not add up.
* **Check** - Monte Carlo propagation in the manner of JCGM 101:2008 (GUM Supplement 1,
  clause 7): draw the nuisances and the timing noise, predict the delays from the perturbed
  model, refit with the nominal model, take the empirical covariance
  (:mod:`locate.accuracy.monte_carlo`).
"""

from __future__ import annotations

import dataclasses

import numpy as np

from locate.accuracy.inputs import (
    TAPED_SURVEY_DEFAULTS,
    TIMING_ONLY,
    declared_sds,
    has_nuisance,
    nuisance_sds,
    sound_speed_slope_mps_per_c,
    timing_only,
)
from locate.accuracy.monte_carlo import MC_AGREEMENT, axes_disagreement, monte_carlo_covariance
from locate.accuracy.next_mic import GDOP_LIMIT, geometry_check, suggest_mic
from locate.accuracy.propagation import (
    COMPONENTS,
    component_covariances,
    ellipse_area_m2,
    nuisance_delay_covariance,
    nuisance_jacobians,
)
from locate.fix.solver import locate_source
from locate.geometry.ellipses import ellipse

__all__ = [
    "COMPONENTS",
    "TAPED_SURVEY_DEFAULTS",
    "GDOP_LIMIT",
    "MC_AGREEMENT",
    "MAX_PASSES",
    "SETTLE_FRACTION",
    "nuisance_sds",
    "declared_sds",
    "has_nuisance",
    "sound_speed_slope_mps_per_c",
    "nuisance_jacobians",
    "nuisance_delay_covariance",
    "component_covariances",
    "ellipse_area_m2",
    "geometry_check",
    "suggest_mic",
    "uncertainty_budget",
    "fix_with_budget",
    "extra_covariance_hook",
    "budget_summary",
    "monte_carlo_covariance",
    "axes_disagreement",
]

MAX_PASSES = 4
"""Most fits :func:`fix_with_budget` makes (it stops earlier once the fix has settled)."""

SETTLE_FRACTION = 0.1
"""The budget iteration has settled when a pass moves the fix by less than this fraction of
its smallest standard deviation."""


# ------------------------------------------------------------------------------ the budget
_HINTS = {
    "timing": "a longer or louder sound",
    "mic_positions": "re-survey mic {mic}",
    "sound_speed": "measure the air temperature",
    "clocks": "synchronise the recorder clocks",
    "wind": "measure the wind speed and direction",
    "reflections": "the ground reflection limits the timing: mics mounted on the ground "
                   "(boundary plates) avoid it",
    "source_height": "find out how high the source was (its height is only assumed)",
}
_NOT_DECLARED = ("survey uncertainty not declared: " + TIMING_ONLY
                 + " (declare them in the site file, e.g. a [survey] table)")


def _r(v, nd=4):
    return round(float(v), nd) if np.isfinite(v) else None


def _resurvey_gains(fix, mics, delays, sound_speed_mps, sds, wind_mps, dims, dropped, var):
    """Fraction of the horizontal variance removed if each mic were re-surveyed as well as the
    best-surveyed mic, shape (N,); zero for the best ones."""
    gains = np.zeros(len(mics))
    if var <= 0:
        return gains
    pos, hgt = np.asarray(sds["position_m"]), np.asarray(sds["height_m"])
    for k in np.flatnonzero((pos > pos.min()) | (hgt > hgt.min())):
        p, h = pos.copy(), hgt.copy()
        p[k], h[k] = pos.min(), hgt.min()
        cc = component_covariances(fix.position_m, mics, delays, sound_speed_mps,
                                   sds={**sds, "position_m": p, "height_m": h},
                                   wind_mps=wind_mps, dims=dims, used=fix.used,
                                   dropped_pairs=dropped)
        gains[k] = 1.0 - float(np.trace(cc["total"][:2, :2])) / var
    return gains


def uncertainty_budget(fix, delays, mic_positions_m, sound_speed_mps, *, sds, wind_mps=None,
                       mic_names=None):
    """The ``"uncertainty_budget"`` entry of a fix in the result JSON.

    Parameters
    ----------
    fix : locate.fix.solver.Fix
    delays : locate.signal.delays.DelaySet
        The measured delays of the fix (timing covariance only, without nuisances).
    mic_positions_m : array_like, shape (N, 3)
    sound_speed_mps : float
    sds : dict
        From :func:`declared_sds` or :func:`nuisance_sds`.
    wind_mps : array_like (3,), optional
    mic_names : sequence of str, optional

    Returns
    -------
    dict
        ``shares`` (component -> share of the horizontal variance, adding up to 1; plus
        ``unexplained`` when the fix enlarged its ellipse for a misfit), ``area_shares``
        (component -> its own 95 % ellipse area over the total's; not additive),
        ``mic_position_shares`` (mic -> share of the variance), ``resurvey_gain`` (mic ->
        fraction of the variance removed were that mic re-surveyed as well as the best one;
        the hint names the mic with the largest gain - a badly surveyed mic is down-weighted
        by the fit, so its share can be small while re-surveying it helps most - or, when
        all are surveyed alike, the mic with the largest share), ``dominant``, ``hint``
        (one line), ``geometry`` (see :func:`geometry_check`; with ``suggest_mic_m`` when
        the geometry limits the fix), ``declared`` (component -> bool), ``defaults``,
        ``sd`` (the declared values), ``note`` and ``method``.
    """
    mics = np.asarray(mic_positions_m, dtype=float)
    n = len(mics)
    names = list(mic_names) if mic_names is not None else [f"M{k + 1}" for k in range(n)]
    pair_index = {tuple(names[m] for m in p): k for k, p in enumerate(delays.pairs)}
    dropped = [pair_index[p] for p in getattr(fix, "dropped_pairs", []) if p in pair_index]
    dims = int(getattr(fix, "dims", 2))
    cc = component_covariances(fix.position_m, mics, delays, sound_speed_mps, sds=sds,
                               wind_mps=wind_mps, dims=dims, used=fix.used,
                               dropped_pairs=dropped, per_mic=True)
    var = {k: float(np.trace(cc[k][:2, :2])) for k in COMPONENTS}
    inflation = float(getattr(fix, "covariance_inflation", 1.0))
    total = sum(var.values()) * inflation
    shares = {k: (v / total if total > 0 else 0.0) for k, v in var.items()}
    if inflation > 1.0:
        shares["unexplained"] = 1.0 - 1.0 / inflation
    area_total = ellipse_area_m2(cc["total"]) * inflation
    area_shares = {k: (ellipse_area_m2(cc[k]) / area_total if area_total > 0 else 0.0)
                   for k in COMPONENTS}
    mic_var = np.trace(cc["per_mic"][:, :2, :2], axis1=1, axis2=2)
    mic_shares = {names[k]: mic_var[k] / total if total > 0 else 0.0 for k in range(n)}
    gain = _resurvey_gains(fix, mics, delays, sound_speed_mps, sds, wind_mps, dims, dropped,
                           sum(var.values()))
    worst_mic = names[int(np.argmax(gain))] if np.any(gain > 0) else names[int(np.argmax(mic_var))]
    dominant = max(shares, key=shares.get)
    geom = geometry_check(fix.position_m, mics[np.asarray(fix.used, bool)], fix.covariance_m2,
                          sound_speed_mps, dims=dims)
    declared = dict(sds["declared"])
    if geom["limited"]:
        spot = suggest_mic(fix.position_m, mics[np.asarray(fix.used, bool)], geom,
                            sound_speed_mps, dims)
        geom["suggest_mic_m"] = [round(float(v), 1) for v in spot]
        off = np.asarray(spot[:2], float) - geom["centre_m"]
        spot_bearing = float(np.degrees(np.arctan2(off[0], off[1])) % 360.0)
        hint = (f"the source is outside the array (bearing {geom['bearing_deg']:.0f}° from "
                f"the array centre): for this source, a mic out that way, best near "
                f"({spot[0]:.0f}, {spot[1]:.0f}) m (bearing {spot_bearing:.0f}°); the planning "
                f"map weighs every place of the site at once")
    elif dominant == "unexplained":
        hint = ("the delays disagree more than the declared uncertainties allow: check the "
                "survey, the clocks and for echoes")
    elif not declared["mic_positions"] and dominant == "timing":
        hint = "declare the survey uncertainty in the site file for an honest ellipse"
    else:
        hint = _HINTS[dominant].format(mic=worst_mic)
    notes = []
    if not declared["mic_positions"]:
        notes.append(_NOT_DECLARED if timing_only(sds) else
                     "survey uncertainty not declared: the mic positions are treated as exact "
                     "(declare them in the site file, e.g. a [survey] table)")
    if sds["defaults"]:
        notes.append("taped-survey defaults used for " + ", ".join(sds["defaults"]))
    if np.any(np.asarray(sds["clock_s"]) > 0) and len(np.unique(sds["clock_group"])) == 1:
        notes.append("all mics share one recording clock: clock_sd_s cancels in the delays")
    geom_out = {k: (_r(v, 2) if isinstance(v, float) else v) for k, v in geom.items()
                if k != "centre_m"}
    return {
        "shares": {k: _r(v) for k, v in shares.items()},
        "area_shares": {k: _r(v) for k, v in area_shares.items()},
        "mic_position_shares": {k: _r(v) for k, v in mic_shares.items()},
        "resurvey_gain": {names[k]: _r(gain[k]) for k in range(n)},
        "dominant": dominant,
        "hint": hint,
        "geometry": geom_out,
        "declared": declared,
        "defaults": list(sds["defaults"]),
        "sd": {"position_m": [_r(v) for v in sds["position_m"]],
               "height_m": [_r(v) for v in sds["height_m"]],
               "clock_s": [float(v) for v in sds["clock_s"]],
               "temperature_c": _r(sds["temperature_c"]),
               "sound_speed_mps": _r(sds["sound_speed_mps"]),
               "wind_mps": _r(sds["wind_mps"])},
        "note": "; ".join(notes),
        "method": "first-order propagation (JCGM 100:2008)",
    }


def _settled(previous_m, fix):
    """True when the fix moved less than :data:`SETTLE_FRACTION` of its smallest sd."""
    c = np.asarray(fix.covariance_m2, dtype=float)[:fix.dims, :fix.dims]
    if not np.all(np.isfinite(c)):
        return True
    sd_min = np.sqrt(max(float(np.linalg.eigvalsh(0.5 * (c + c.T))[0]), 0.0))
    move = float(np.linalg.norm(np.asarray(fix.position_m) - np.asarray(previous_m)))
    return move <= SETTLE_FRACTION * sd_min


def _iterate(locate, mics, delays, sound_speed_mps, wind_mps, sds, passes, kw):
    """Fixes with the nuisance covariance re-evaluated at the latest fix until it settles.

    Returns (fix, extra covariance of the last fit or None, number of fits, settled).
    """
    fix = locate(mics, delays, sound_speed_mps, wind_mps=wind_mps, **kw)
    if not has_nuisance(sds):
        return fix, None, 1, True
    extra, n_fits = None, 1
    while n_fits < max(int(passes), 2):
        extra = nuisance_delay_covariance(fix.position_m, mics, delays.pairs, sound_speed_mps,
                                          wind_mps, sds)
        previous = fix.position_m
        fix = locate(mics, delays, sound_speed_mps, wind_mps=wind_mps,
                     extra_covariance_s2=extra, **kw)
        n_fits += 1
        if _settled(previous, fix):
            return fix, extra, n_fits, True
    return fix, extra, n_fits, False


def fix_with_budget(mic_positions_m, delays, sound_speed_mps, *, sds, locate=locate_source,
                    wind_mps=None, passes=MAX_PASSES, monte_carlo=0, rng=None,
                    **locate_kwargs):
    """Fix a source with the declared uncertainties in its ellipse, and explain the ellipse.

    Pass 1 fixes with the timing noise only; the nuisance delay covariance is evaluated there
    (:func:`nuisance_delay_covariance`) and the next pass refits with it added
    (``extra_covariance_s2``), re-evaluated at each new fix until a pass moves the fix by less
    than :data:`SETTLE_FRACTION` of its smallest sd (module docstring: why two passes are not
    always enough).

    Parameters
    ----------
    mic_positions_m : array_like, shape (N, 3)
    delays : locate.signal.delays.DelaySet
    sound_speed_mps : float
    sds : dict
        :func:`declared_sds` / :func:`nuisance_sds`; nothing declared: one pass, no change.
    locate : callable
        The locator, ``locate(mic_positions_m, delays, sound_speed_mps, wind_mps=...,
        extra_covariance_s2=..., **locate_kwargs) -> Fix``.
    wind_mps : array_like (3,), optional
    passes : int
        Most fits in total (>= 2); the budget's ``passes`` says how many were made.
    monte_carlo : int
        If > 0, also run :func:`monte_carlo_covariance` with this many draws (1000 or more
        advised) at the fix; when its semi-axes differ from the first-order ones by more than
        :data:`MC_AGREEMENT` (and by more than 3 Monte Carlo standard errors,
        3 / sqrt(2 n), which matters below 450 draws), or when some draws locate no source,
        the propagation is too non-linear: the fix's covariance becomes the Monte Carlo 95 %
        region (:func:`monte_carlo_covariance`, ``region_covariance_m2``).
    rng : numpy.random.Generator, optional
        For the Monte Carlo draws.
    **locate_kwargs
        ``dims``, ``source_z_m``, ``reject``, ``mic_names``, ...

    Returns
    -------
    (Fix, dict)
        The fix and its :func:`uncertainty_budget`.
    """
    mics = np.asarray(mic_positions_m, dtype=float)
    fix, extra, n_passes, settled = _iterate(locate, mics, delays, sound_speed_mps, wind_mps,
                                             sds, passes, locate_kwargs)
    budget = uncertainty_budget(fix, delays, mics, sound_speed_mps, sds=sds, wind_mps=wind_mps,
                                mic_names=locate_kwargs.get("mic_names"))
    budget["passes"] = n_passes
    if not settled:
        budget["note"] = "; ".join(filter(None, [budget["note"], (
            f"the fix still moved after {n_passes} passes: the ellipse may be optimistic")]))
    if monte_carlo:
        mc_kw = {k: v for k, v in locate_kwargs.items() if k in ("dims", "source_z_m")}
        mc = monte_carlo_covariance(fix.position_m, mics, delays, sound_speed_mps, sds=sds,
                                    wind_mps=wind_mps, n_draws=int(monte_carlo), rng=rng,
                                    locate=locate, extra_covariance_s2=extra, **mc_kw)
        diff = axes_disagreement(fix.covariance_m2, mc["covariance_m2"])
        unlocated = mc["n_failed"] / mc["n_draws"]
        # 10 % (issue 9), but never within 3 Monte Carlo standard errors of an axis
        # (1 / sqrt(2 n) relative, Gaussian sampling of a variance: textbook statistics)
        tol = max(MC_AGREEMENT, 3.0 / np.sqrt(2.0 * mc["n_draws"]))
        use = bool(diff > tol or unlocated > 0)
        region = mc["region_covariance_m2"]
        budget["monte_carlo"] = {
            "n_draws": mc["n_draws"], "unlocated_fraction": _r(unlocated),
            "ellipse95": {k: _r(v) for k, v in ellipse(region).items()}
            if np.all(np.isfinite(region)) else None,
            "axes_disagreement": _r(diff), "tolerance": _r(tol), "used": use}
        if use and np.all(np.isfinite(region)):
            cov = np.zeros((3, 3))
            cov[:fix.dims, :fix.dims] = region[:fix.dims, :fix.dims]
            fix = dataclasses.replace(fix, covariance_m2=cov, warnings=[
                *fix.warnings, f"first-order and Monte Carlo ellipses differ by {100 * diff:.0f} "
                "%: the Monte Carlo 95 % region is reported"])
        elif use:
            fix = dataclasses.replace(fix, warnings=[
                *fix.warnings, f"{100 * unlocated:.0f} % of the Monte Carlo draws locate no source "
                "near the array: the 95 % region is unbounded and the ellipse understates it"])
        if use and np.all(np.isfinite(region)):
            budget["method"] = "Monte Carlo propagation (JCGM 101:2008)"
    return fix, budget


def extra_covariance_hook(mic_positions_m, sds, *, locate=locate_source, passes=MAX_PASSES,
                          **locate_kwargs):
    """An ``extra_covariance`` callable for :func:`locate.workflows.fixing.fix_span`.

    The callable ``(delays, cond) -> (P, P) or None`` runs the first passes of
    :func:`fix_with_budget` (up to ``passes - 1`` fits) and returns the nuisance delay
    covariance at the settled fix, so that ``fix_span``'s own fit is the last pass.
    ``locate_kwargs`` should be those of that fit (``dims``, ``source_z_m``, ``reject``,
    ``mic_names``).  ``None`` when nothing is declared (``fix_span`` then fits as before).
    """
    mics = np.asarray(mic_positions_m, dtype=float)

    def extra(delays, cond):
        if not has_nuisance(sds):
            return None
        fix, _, _, _ = _iterate(locate, mics, delays, cond.sound_speed_mps, cond.wind_mps, sds,
                                passes - 1, locate_kwargs)
        return nuisance_delay_covariance(fix.position_m, mics, delays.pairs,
                                         cond.sound_speed_mps, cond.wind_mps, sds)

    return extra


_LABELS = {"timing": "timing", "mic_positions": "mic positions", "sound_speed": "sound speed",
           "clocks": "clocks", "wind": "wind", "unexplained": "unexplained misfit",
           "reflections": "ground reflection", "source_height": "source height"}


def budget_summary(budget) -> str:
    """One line for the printed summary, e.g.
    ``uncertainty from: mic positions 71 %, timing 20 %, sound speed 9 % - re-survey mic M3``."""
    parts = [f"{_LABELS[k]} {100 * v:.0f} %" for k, v in
             sorted(budget["shares"].items(), key=lambda kv: -(kv[1] or 0.0))
             if v is not None and v >= 0.005]
    line = "uncertainty from: " + ", ".join(parts) + " - " + budget["hint"]
    if not budget["declared"].get("mic_positions", True):
        line += (" (survey uncertainty not declared: timing-only, mic positions, clocks and air "
                 "taken as exact)")
    return line
