"""Array planning: how well would this mic layout locate a source, and where should the next mic go?

Everything here is the Cramer-Rao bound (CRLB) of the stationary locator in
:mod:`locate.fix.solver`, evaluated in batches so that a 200 x 200 map takes a fraction of a second:

* the gradient of the travel time from every map point to every mic
  (:func:`locate.physics.air.travel_time_gradient`, uniform wind allowed), shape (G, N, 3);
* the pair-delay information for the timing model, folded onto the mics once:
  M = A^T Q^+ A with A the (P, N) pair incidence matrix (row of pair (i, j): -1 at i, +1 at j,
  as ``delay = t_j - t_i``) and Q the pair-delay covariance, so that the position information
  at every point is G^T M G (``einsum``) - the same as ``J^T Q^+ J`` with J = A G of
  :func:`locate.geometry.ellipses.crlb_covariance` (Chan & Ho 1994, IEEE Trans. SP 42(8) 1905-1915);
* batched symmetric eigen-decompositions for the inverse, the condition number and the
  95 % ellipse (chi-square with 2 degrees of freedom, as :func:`locate.geometry.ellipses.ellipse`).

The timing model (:mod:`locate.accuracy.timing`) is either a given arrival-time accuracy per mic
or the bound predicted from the sound's band, duration and SNR (Carter 1987).

A point is *un-locatable* where the information matrix is singular or ill-conditioned
(condition number above :data:`CONDITION_LIMIT`) or where the 95 % semi-major axis exceeds the
stated limit (default: the larger side of the mapped area - an ellipse bigger than the map
says nothing).

The site-file glue (:func:`plan_site`, candidates and region of interest) is in
:mod:`locate.accuracy.plan_site`; the figure in :mod:`locate.draw.plan`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from matplotlib.path import Path as _MplPath

from locate.accuracy.timing import TimingModel, timing_model
from locate.errors import OptionError
from locate.geometry.ellipses import ellipse_arrays
from locate.physics.air import travel_time_gradient

__all__ = [
    "CONDITION_LIMIT",
    "MAX_GRID_POINTS",
    "Proposal",
    "expected_ellipses",
    "expected_ellipse_grid",
    "points_in_polygon",
    "candidate_grid",
    "propose_next_mic",
    "propose_mics",
    "region_metric",
]

CONDITION_LIMIT = 1e10
"""Information matrices with a larger condition number count as un-locatable."""

MAX_GRID_POINTS = 2_000_000
"""Refuse bigger maps (memory: about 200 bytes per point and mic)."""

_CHUNK = 200_000  # points x candidates evaluated at once (bounds the memory of a proposal)


# ------------------------------------------------------------------------------ checks
def _mics(mic_positions_m, dims):
    pos = np.asarray(mic_positions_m, dtype=float)
    if pos.ndim != 2 or pos.shape[1] != 3:
        raise OptionError(f"mic positions must have shape (N, 3), got {pos.shape!r}",
                          field="mics")
    if dims not in (2, 3):
        raise OptionError(f"dims must be 2 or 3, got {dims!r}", field="dims")
    need = dims + 1
    if len(pos) < need:
        raise OptionError(f"a {dims}-D fix needs at least {need} mics, the layout has "
                          f"{len(pos)}: add mics (planned positions are enough)", field="mics")
    if not np.all(np.isfinite(pos)):
        raise OptionError("mic positions must be finite numbers", field="mics")
    return pos


def _resolve_timing(n_mics, timing, timing_sd_s, band_hz, snr_db, duration_s):
    if timing is not None:
        if any(v is not None for v in (timing_sd_s, band_hz, snr_db, duration_s)):
            raise OptionError("give a TimingModel or timing parameters, not both",
                              field="timing")
        if timing.n_mics != n_mics:
            raise OptionError(f"the timing model is for {timing.n_mics} mics, the layout has "
                              f"{n_mics}", field="timing")
        return timing
    return timing_model(n_mics, timing_sd_s=timing_sd_s, band_hz=band_hz, snr_db=snr_db,
                        duration_s=duration_s)


# ------------------------------------------------------------------------------ batched CRLB
def _gradients(points_m, mic_positions_m, sound_speed_mps, wind_mps, dims):
    """d(travel time)/d(source) for every point and mic, shape (..., N, dims), s/m."""
    g = travel_time_gradient(np.asarray(points_m, float)[..., None, :], mic_positions_m,
                             sound_speed_mps, wind_mps)
    return g[..., :dims]


def _ellipse_batch(info, probability, limit_m):
    """95 %-type ellipse of the horizontal CRLB for a stack of information matrices.

    ``info`` (..., d, d) in 1/m^2.  Returns dict of arrays (...): semi_major_m, semi_minor_m,
    azimuth_deg (clockwise from north), condition, locatable, covariance_m2 (..., 2, 2).
    """
    info = 0.5 * (info + np.swapaxes(info, -1, -2))
    lam, vec = np.linalg.eigh(info)
    lo, hi = lam[..., 0], lam[..., -1]
    with np.errstate(divide="ignore", invalid="ignore"):
        cond = np.where(lo > 0, hi / lo, np.inf)
        ok = np.isfinite(cond) & (cond <= CONDITION_LIMIT) & (hi > 0)
        inv_lam = np.where(ok[..., None], 1.0 / np.where(lam > 0, lam, 1.0), np.nan)
    cov = np.einsum("...ik,...k,...jk->...ij", vec[..., :2, :], inv_lam, vec[..., :2, :])
    e = ellipse_arrays(cov, probability)
    major = e["semi_major_m"]
    return {"semi_major_m": np.where(ok, major, np.inf),
            "semi_minor_m": np.where(ok, e["semi_minor_m"], np.inf),
            "azimuth_deg": np.where(ok, e["azimuth_deg"], np.nan), "condition": cond,
            "locatable": ok & (major <= limit_m), "covariance_m2": cov}


def expected_ellipses(points_m, mic_positions_m, *, sound_speed_mps, timing=None,
                      timing_sd_s=None, band_hz=None, snr_db=None, duration_s=None, dims=2,
                      wind_mps=None, probability=0.95, max_semi_major_m=np.inf):
    """CRLB confidence ellipse of a source at each of ``points_m``.

    Parameters
    ----------
    points_m : array_like, shape (..., 3)
        Source positions (for ``dims`` = 2 the height is the known source height).
    mic_positions_m : array_like, shape (N, 3)
    sound_speed_mps : float
    timing : TimingModel, optional
        Or build one from ``timing_sd_s`` / ``band_hz``, ``snr_db``, ``duration_s``
        (see :func:`locate.accuracy.timing.timing_model`).
    dims : {2, 3}
        2: horizontal position at a known height; 3: full position (ellipse of its x-y part).
    wind_mps : array_like, shape (3,), optional
    probability : float
    max_semi_major_m : float
        Points with a larger semi-major axis are flagged as not locatable.

    Returns
    -------
    dict
        Arrays of shape (...): ``semi_major_m``, ``semi_minor_m`` (inf where singular),
        ``azimuth_deg``, ``condition``, ``locatable`` (bool); ``covariance_m2`` (..., 2, 2).
    """
    pos = _mics(mic_positions_m, dims)
    tm = _resolve_timing(len(pos), timing, timing_sd_s, band_hz, snr_db, duration_s)
    g = _gradients(points_m, pos, sound_speed_mps, wind_mps, dims)
    info = np.einsum("...ni,nm,...mj->...ij", g, tm.information_weights(), g)
    return _ellipse_batch(info, probability, max_semi_major_m)


def expected_ellipse_grid(mic_positions_m, xs_m, ys_m, *, sound_speed_mps, source_z_m=0.0,
                          timing=None, timing_sd_s=None, band_hz=None, snr_db=None,
                          duration_s=None, dims=2, wind_mps=None, probability=0.95,
                          max_semi_major_m=None):
    """Expected confidence ellipse over a rectangular grid of source positions.

    Parameters
    ----------
    mic_positions_m : array_like, shape (N, 3)
    xs_m, ys_m : array_like, shape (nx,), (ny,)
        Grid lines, metres east and north.
    sound_speed_mps : float
    source_z_m : float
        Source height of the mapped plane.
    timing, timing_sd_s, band_hz, snr_db, duration_s
        The timing model (:func:`locate.accuracy.timing.timing_model`).
    dims : {2, 3}
    wind_mps : array_like, shape (3,), optional
    probability : float
        Coverage of the ellipse (0.95: the 95 % ellipse).
    max_semi_major_m : float, optional
        Larger ellipses count as un-locatable; default the larger side of the grid.

    Returns
    -------
    dict
        ``xs_m`` (nx,), ``ys_m`` (ny,); arrays of shape (ny, nx) (row = y):
        ``semi_major_m``, ``semi_minor_m``, ``azimuth_deg``, ``condition``, ``locatable``;
        ``max_semi_major_m`` (the limit used), ``timing`` (the TimingModel).
    """
    xs = np.asarray(xs_m, dtype=float).ravel()
    ys = np.asarray(ys_m, dtype=float).ravel()
    if xs.size < 2 or ys.size < 2:
        raise OptionError("the grid needs at least 2 lines in x and in y", field="grid")
    if xs.size * ys.size > MAX_GRID_POINTS:
        raise OptionError(f"grid of {xs.size} x {ys.size} points is too large (limit "
                          f"{MAX_GRID_POINTS}): use a coarser grid step", field="grid_step_m")
    pos = _mics(mic_positions_m, dims)
    tm = _resolve_timing(len(pos), timing, timing_sd_s, band_hz, snr_db, duration_s)
    if max_semi_major_m is None:
        max_semi_major_m = float(max(np.ptp(xs), np.ptp(ys)))
    xx, yy = np.meshgrid(xs, ys)
    pts = np.stack([xx, yy, np.full_like(xx, float(source_z_m))], axis=-1)
    out = expected_ellipses(pts, pos, sound_speed_mps=sound_speed_mps, timing=tm, dims=dims,
                            wind_mps=wind_mps, probability=probability,
                            max_semi_major_m=max_semi_major_m)
    out.pop("covariance_m2")
    out.update(xs_m=xs, ys_m=ys, max_semi_major_m=float(max_semi_major_m), timing=tm)
    return out


# ------------------------------------------------------------------------------ regions
def points_in_polygon(outline_m, step_m=None, *, z_m=0.0, target_points=400):
    """Grid points inside a polygon (``matplotlib.path.Path.contains_points``).

    Parameters
    ----------
    outline_m : array_like, shape (K, 2)
        Polygon vertices, metres (closed implicitly).
    step_m : float, optional
        Grid spacing.  Default (or when the polygon is too small for it): the spacing that puts
        about ``target_points`` points inside.
    z_m : float
        Height given to the points.

    Returns
    -------
    ndarray, shape (R, 3)

    Raises
    ------
    OptionError
        Fewer than 3 vertices, or a polygon without area.
    """
    v = np.asarray(outline_m, dtype=float)
    if v.ndim != 2 or v.shape[1] != 2 or len(v) < 3 or not np.all(np.isfinite(v)):
        raise OptionError("a region outline needs at least 3 finite [x, y] vertices",
                          field="region.outline")
    area = 0.5 * abs(np.dot(v[:, 0], np.roll(v[:, 1], -1)) - np.dot(v[:, 1], np.roll(v[:, 0], -1)))
    span = float(np.ptp(v, axis=0).max())
    if not area > 1e-9 * span**2 or span == 0:
        raise OptionError("the region outline encloses no area (its vertices are on a line)",
                          field="region.outline")
    path = _MplPath(v)
    steps = [] if step_m is None else [float(step_m)]
    steps.append(np.sqrt(area / target_points))
    for step in steps:
        xs = np.arange(v[:, 0].min() + step / 2, v[:, 0].max(), step)
        ys = np.arange(v[:, 1].min() + step / 2, v[:, 1].max(), step)
        xx, yy = np.meshgrid(xs, ys)
        xy = np.column_stack([xx.ravel(), yy.ravel()])
        inside = xy[path.contains_points(xy)]
        if len(inside):
            return np.column_stack([inside, np.full(len(inside), float(z_m))])
    # a sliver narrower than any grid: its vertices' centroid is the region
    return np.array([[*v.mean(axis=0), float(z_m)]])


def candidate_grid(extent_m, *, step_m=None, n_side=25, z_m=1.5, avoid_m=None, min_gap_m=None):
    """Candidate mic positions on a regular grid over ``extent_m`` = (x0, x1, y0, y1).

    Points closer than ``min_gap_m`` (default one grid step) to any of ``avoid_m`` (M, 3)
    (the existing mics) are left out.  Returns shape (K, 3) at height ``z_m``.
    """
    x0, x1, y0, y1 = (float(e) for e in extent_m)
    if not (x1 > x0 and y1 > y0):
        raise OptionError(f"extent must be (x0, x1, y0, y1) with x1 > x0 and y1 > y0, got "
                          f"{tuple(extent_m)!r}", field="extent_m")
    step = float(step_m) if step_m else max(x1 - x0, y1 - y0) / (n_side - 1)
    xx, yy = np.meshgrid(np.arange(x0, x1 + 1e-9 * step, step),
                         np.arange(y0, y1 + 1e-9 * step, step))
    pts = np.column_stack([xx.ravel(), yy.ravel(), np.full(xx.size, float(z_m))])
    if avoid_m is not None and len(avoid_m):
        gap = step if min_gap_m is None else float(min_gap_m)
        d = np.linalg.norm(pts[:, None, :2] - np.asarray(avoid_m, float)[None, :, :2], axis=-1)
        pts = pts[d.min(axis=1) >= gap]
    return pts


# ------------------------------------------------------------------------------ proposals
@dataclass
class Proposal:
    """A proposed mic and what it does to the region metric.

    Attributes
    ----------
    name : str
    position_m : ndarray, shape (3,)
    metric_before_m, metric_after_m : float
        Worst (or mean) 95 % semi-major axis over the locatable region points, before and
        after adding the mic (and, for greedy picks, all earlier picks).
    unlocatable_before, unlocatable_after : int
        Region points the array cannot locate.
    factor : float
        metric_before_m / metric_after_m (> 1 is an improvement).
    """

    name: str
    position_m: np.ndarray
    metric_before_m: float
    metric_after_m: float
    unlocatable_before: int
    unlocatable_after: int
    factor: float

    def to_dict(self) -> dict:
        return {"name": self.name, "position_m": [float(v) for v in self.position_m],
                "metric_before_m": finite_or_none(self.metric_before_m),
                "metric_after_m": finite_or_none(self.metric_after_m),
                "unlocatable_before": int(self.unlocatable_before),
                "unlocatable_after": int(self.unlocatable_after),
                "factor": finite_or_none(self.factor)}


def finite_or_none(v):
    """A float for JSON, or None where the value is not finite (not locatable)."""
    return float(v) if np.isfinite(v) else None


def _metric(semi_major_m, locatable, objective, axis=0):
    """(unlocatable count, worst or mean semi-major over the locatable points) along ``axis``."""
    bad = np.sum(~locatable, axis=axis)
    n_ok = np.sum(locatable, axis=axis)
    if objective == "worst":
        m = np.max(np.where(locatable, semi_major_m, -np.inf), axis=axis)
    else:
        total = np.sum(np.where(locatable, semi_major_m, 0.0), axis=axis)
        m = total / np.maximum(n_ok, 1)
    return bad, np.where(n_ok > 0, m, np.inf)


def region_metric(mic_positions_m, region_points_m, *, objective="worst", **kw):
    """(unlocatable count, worst or mean 95 % semi-major axis in m) over the region points.

    Keyword arguments are those of :func:`expected_ellipses`.
    """
    check_objective(objective)
    e = expected_ellipses(_region(region_points_m), mic_positions_m, **kw)
    bad, m = _metric(e["semi_major_m"], e["locatable"], objective)
    return int(bad), float(m)


def check_objective(objective):
    """Refuse an objective other than "worst" or "mean" (the parameter is named)."""
    if objective not in ("worst", "mean"):
        raise OptionError(f'objective must be "worst" or "mean", got {objective!r}',
                          field="objective")


def _region(region_points_m):
    r = np.asarray(region_points_m, dtype=float)
    if r.ndim != 2 or r.shape[1] != 3 or len(r) == 0:
        raise OptionError("the region of interest holds no points (give receivers, a region "
                          "outline, or points of shape (R, 3))", field="region")
    return r


def _candidates(candidates_m, names):
    c = np.asarray(candidates_m, dtype=float)
    if c.ndim != 2 or c.shape[1] != 3 or len(c) == 0:
        raise OptionError("there are no candidate mic positions (give candidates of shape "
                          "(K, 3) or a candidate grid)", field="candidates")
    names = [f"C{k + 1}" for k in range(len(c))] if names is None else list(names)
    if len(names) != len(c):
        raise OptionError(f"{len(names)} candidate names for {len(c)} candidates",
                          field="candidates")
    return c, names


def _score_candidates(pos, tm, cand, region, c, wind, dims, probability, limit, objective):
    """Metric over the region for the layout plus each candidate: (bad (K,), metric (K,))."""
    ext = tm.with_mics(1)
    m = ext.information_weights()  # (N+1, N+1)
    n = len(pos)
    g_e = _gradients(region, pos, c, wind, dims)  # (R, N, d)
    base = np.einsum("rni,nm,rmj->rij", g_e, m[:n, :n], g_e)
    h = np.einsum("rni,n->ri", g_e, m[:n, n])
    bad = np.empty(len(cand), dtype=int)
    metric = np.empty(len(cand))
    step = max(1, _CHUNK // max(len(region), 1))
    for k0 in range(0, len(cand), step):
        gc = _gradients(region, cand[k0:k0 + step], c, wind, dims)  # (R, Kc, d)
        hg = np.einsum("ri,rkj->rkij", h, gc)
        info = (base[:, None] + hg + np.swapaxes(hg, -1, -2)
                + m[n, n] * np.einsum("rki,rkj->rkij", gc, gc))
        e = _ellipse_batch(info, probability, limit)
        bad[k0:k0 + step], metric[k0:k0 + step] = _metric(e["semi_major_m"], e["locatable"],
                                                          objective, axis=0)
    return bad, metric


def propose_next_mic(mic_positions_m, candidates_m, region_points_m, *, sound_speed_mps,
                     objective="worst", candidate_names=None, timing=None, timing_sd_s=None,
                     band_hz=None, snr_db=None, duration_s=None, dims=2, wind_mps=None,
                     probability=0.95, max_semi_major_m=np.inf):
    """Rank candidate positions for one more mic by the accuracy they give over a region.

    Parameters
    ----------
    mic_positions_m : array_like, shape (N, 3)
    candidates_m : array_like, shape (K, 3)
        Where a mic could go.
    region_points_m : array_like, shape (R, 3)
        Source positions that matter (receivers, or a polygon sampled by
        :func:`points_in_polygon`).
    sound_speed_mps : float
    objective : {'worst', 'mean'}
        Minimise the worst or the mean 95 % semi-major axis over the region.  Region points the
        array cannot locate count first (fewer is better), the metric over the rest second.
    candidate_names : sequence of str, optional
    timing, timing_sd_s, band_hz, snr_db, duration_s
        Timing model of the existing mics; the new mic gets the median of theirs.
    dims, wind_mps, probability, max_semi_major_m
        As :func:`expected_ellipses`.

    Returns
    -------
    list of Proposal
        All candidates, best first.
    """
    check_objective(objective)
    pos = _mics(mic_positions_m, dims)
    tm = _resolve_timing(len(pos), timing, timing_sd_s, band_hz, snr_db, duration_s)
    cand, names = _candidates(candidates_m, candidate_names)
    region = _region(region_points_m)
    kw = dict(sound_speed_mps=sound_speed_mps, timing=tm, dims=dims, wind_mps=wind_mps,
              probability=probability, max_semi_major_m=max_semi_major_m)
    bad0, m0 = region_metric(pos, region, objective=objective, **kw)
    bad, metric = _score_candidates(pos, tm, cand, region, sound_speed_mps, wind_mps, dims,
                                    probability, max_semi_major_m, objective)
    order = np.lexsort((metric, bad))
    out = []
    for k in order:
        with np.errstate(divide="ignore", invalid="ignore"):
            factor = m0 / metric[k] if np.isfinite(m0) and metric[k] > 0 else np.inf
        out.append(Proposal(names[k], cand[k].copy(), m0, float(metric[k]), bad0, int(bad[k]),
                            float(factor)))
    return out


def propose_mics(mic_positions_m, candidates_m, region_points_m, *, k=1, sound_speed_mps,
                 objective="worst", candidate_names=None, timing=None, timing_sd_s=None,
                 band_hz=None, snr_db=None, duration_s=None, **kw):
    """Greedily pick ``k`` mics, one at a time, each the best next mic given the earlier picks.

    Arguments as :func:`propose_next_mic`.  Returns a list of ``k`` :class:`Proposal`; each
    one's ``metric_before_m`` is the metric with the earlier picks in place.
    """
    pos = _mics(mic_positions_m, kw.get("dims", 2))
    tm = _resolve_timing(len(pos), timing, timing_sd_s, band_hz, snr_db, duration_s)
    cand, names = _candidates(candidates_m, candidate_names)
    if not 1 <= int(k) <= len(cand):
        raise OptionError(f"can propose 1 to {len(cand)} mics from {len(cand)} candidates, "
                          f"asked for {k!r}", field="n_propose")
    picks = []
    for _ in range(int(k)):
        best = propose_next_mic(pos, cand, region_points_m, sound_speed_mps=sound_speed_mps,
                                objective=objective, candidate_names=names, timing=tm, **kw)[0]
        picks.append(best)
        keep = [n != best.name for n in names]
        pos = np.vstack([pos, best.position_m])
        tm = tm.with_mics(1)
        cand, names = cand[keep], [n for n, q in zip(names, keep, strict=True) if q]
    return picks


__all__ += ["TimingModel", "timing_model"]
