"""Checks of a stationary fix against the places where TDOA location goes wrong quietly.

:func:`locate.fix.solver.locate_source` linearises the delay model at its solution; the covariance
(and the ellipse) it reports is only as good as that linearisation.  Two situations break it:

* **Far outside the array** - beyond a few apertures the hyperbolae become straight lines and
  the delays fix a bearing much better than a range; far enough out they cannot tell the
  source from one at infinity.  The test here is a likelihood-ratio comparison of the fix with
  the best source at (numerically) infinite range: if the misfit rises by less than the 95 %
  chi-square quantile for one degree of freedom (3.84, scipy.stats.chi2), the range is not
  determined at all (Wilks 1938, Ann. Math. Stat. 9(1) 60-62: twice the log-likelihood ratio of
  nested models is chi-square distributed): the fix keeps its bearing, its ellipse becomes
  unbounded and the warning gives the nearest range that still fits.
* **Non-quadratic misfit** - near the extension of a line through two mics (their delay is at
  its largest possible value and says almost nothing about the position) or with a nearly
  degenerate layout, the misfit inside the reported 95 % ellipse is far from the quadratic
  form the ellipse assumes.  The check evaluates the exact misfit on the ellipse's boundary and
  compares it with the quadratic prediction (the likelihood-region versus Wald-region check of
  nonlinear regression, Bates & Watts 1988, "Nonlinear Regression Analysis and Its
  Applications", ch. 6).  Where the exact rise is less than half the predicted one the
  ellipse is enlarged until the worst direction reaches the likelihood boundary.

Everything here is pure computation on the locator's whitened problem.
"""

from __future__ import annotations

import numpy as np
from scipy import optimize, stats

from locate.errors import NothingFoundError

__all__ = ["assess_fix", "FAR_RATIO", "LINEARITY_RATIO", "ENDFIRE_DEG"]

FAR_RATIO = 5.0
"""A fix farther than this many apertures from the array centre is 'far outside' (common
practice: beyond a few apertures the range error grows with the square of the distance)."""

LINEARITY_RATIO = 0.5
"""Exact misfit rise on the 95 % boundary below this fraction of the quadratic prediction:
the ellipse understates the uncertainty."""

ENDFIRE_DEG = 10.0
"""A source within this angle of the extension of a two-mic line is 'near the extension'."""

FAR_NOTE_APERTURES = 100.0
"""Beyond this many apertures a distance is not printed as a figure: the delays cannot tell it
from infinity, so "beyond about 552268051 m" would be a number without meaning."""

_INFINITY_APERTURES = 1e7  # "infinite" range for the far-field test, in apertures
_HARD_LIMIT_APERTURES = 1e4  # beyond this the position is never a measurement
_MAX_ENLARGE = 1e4  # largest variance factor the linearity check applies


def _aperture(problem):
    used = problem.mics[problem.used]
    centre = used.mean(axis=0)
    d = np.linalg.norm(used[:, None, :2] - used[None, :, :2], axis=-1)
    return centre, float(np.max(d))


def _directions(problem, az_rad, el_rad=None):
    """Params of points at 'infinite' range in the given directions, shape (K, dims)."""
    centre, aperture = _aperture(problem)
    far = _INFINITY_APERTURES * max(aperture, 1.0)
    if problem.dims == 2:
        return np.stack([centre[0] + far * np.sin(az_rad), centre[1] + far * np.cos(az_rad)],
                        axis=-1)
    return np.stack([centre[0] + far * np.cos(el_rad) * np.sin(az_rad),
                     centre[1] + far * np.cos(el_rad) * np.cos(az_rad),
                     centre[2] + far * np.sin(el_rad)], axis=-1)


def _far_field_chi2(problem, bearing_rad, elevation_rad):
    """Smallest misfit of a source at 'infinite' range: grid over directions, then polish."""
    if problem.dims == 2:
        az = np.concatenate([np.linspace(0, 2 * np.pi, 720, endpoint=False), [bearing_rad]])
        chi = problem.chi2(_directions(problem, az))
        a0 = az[int(np.argmin(chi))]
        res = optimize.minimize_scalar(
            lambda a: float(problem.chi2(_directions(problem, np.array([a])))[0]),
            bounds=(a0 - np.pi / 360, a0 + np.pi / 360), method="bounded",
            options={"xatol": 1e-9})
        return min(float(np.min(chi)), float(res.fun))
    az, el = np.meshgrid(np.linspace(0, 2 * np.pi, 180, endpoint=False),
                         np.linspace(-np.pi / 2 * 0.98, np.pi / 2 * 0.98, 45), indexing="ij")
    az = np.concatenate([az.ravel(), [bearing_rad]])
    el = np.concatenate([el.ravel(), [elevation_rad]])
    chi = problem.chi2(_directions(problem, az, el))
    k = int(np.argmin(chi))
    res = optimize.minimize(
        lambda v: float(problem.chi2(_directions(problem, v[:1], v[1:]))[0]),
        np.array([az[k], el[k]]), method="Nelder-Mead",
        options={"xatol": 1e-9, "fatol": 1e-9, "maxiter": 400})
    return min(float(chi[k]), float(res.fun))


def _nearest_fitting_range(problem, bearing_rad, elevation_rad, chi2_min, scale, aperture):
    """Smallest range along the fix's direction whose misfit is within the 95 % quantile."""
    centre, _ = _aperture(problem)
    r = np.geomspace(max(aperture, 1e-3), _INFINITY_APERTURES * max(aperture, 1.0), 241)
    horiz = r * (np.cos(elevation_rad) if problem.dims == 3 else 1.0)
    pts = np.stack([centre[0] + horiz * np.sin(bearing_rad),
                    centre[1] + horiz * np.cos(bearing_rad)], axis=-1)
    if problem.dims == 3:
        pts = np.column_stack([pts, centre[2] + r * np.sin(elevation_rad)])
    with np.errstate(over="ignore", invalid="ignore"):
        fits = (problem.chi2(pts) - chi2_min) / scale <= stats.chi2.ppf(0.95, 1)
    return float(r[np.argmax(fits)]) if fits.any() else float(r[-1])


def _boundary_rise(problem, x, chi2_min, cov, expected):
    """Smallest and largest (exact rise / quadratic rise) on the 95 % boundary, or None."""
    dims = problem.dims
    c = 0.5 * (cov + cov.T)
    if not np.all(np.isfinite(c)):
        return None
    vals, vecs = np.linalg.eigh(c)
    if vals[0] <= 0:
        return None
    if dims == 2:
        t = np.linspace(0, 2 * np.pi, 16, endpoint=False)
        u = np.stack([np.cos(t), np.sin(t)], axis=-1)
    else:
        g = np.array([[i, j, k] for i in (-1, 0, 1) for j in (-1, 0, 1) for k in (-1, 0, 1)
                      if (i, j, k) != (0, 0, 0)], dtype=float)
        u = g / np.linalg.norm(g, axis=1, keepdims=True)
    q = stats.chi2.ppf(0.95, dims)
    pts = x + (u * np.sqrt(q * vals)) @ vecs.T
    with np.errstate(over="ignore", invalid="ignore"):
        rise = (problem.chi2(pts) - chi2_min) / expected
    rise = rise[np.isfinite(rise)]
    return (float(rise.min()), float(rise.max())) if rise.size else None


def _endfire_pairs(problem, point, names):
    """Names "A-B" of used mic pairs whose line extended passes near the source."""
    pos = problem.mics[problem.used]
    k = slice(0, 2) if problem.dims == 2 else slice(0, 3)
    out = []
    for a in range(len(pos)):
        for b in range(a + 1, len(pos)):
            base = pos[b, k] - pos[a, k]
            s = point[k] - 0.5 * (pos[a, k] + pos[b, k])
            nb, ns = np.linalg.norm(base), np.linalg.norm(s)
            if nb <= 0 or ns <= 0.5 * nb:
                continue
            cos = abs(float(base @ s)) / (nb * ns)
            if cos >= np.cos(np.radians(ENDFIRE_DEG)):
                out.append(f"{names[problem.used[a]]}-{names[problem.used[b]]}")
    return out


def assess_fix(problem, x, chi2_min, covariance, inflation, names):
    """Warnings and the covariance to report for a fix (see the module notes).

    Parameters
    ----------
    problem : locate.fix.solver._Problem
        The whitened problem of the final fit (``chi2``, ``point``, ``mics``, ``used``,
        ``dims``).
    x : ndarray, shape (dims,)
        The solution's parameters.
    chi2_min : float
        Misfit at ``x``.
    covariance : ndarray, shape (dims, dims)
        Position covariance as the locator would report it.
    inflation : float
        Factor already applied to the covariance for misfit (chi-square units scale by it).
    names : sequence of str
        All mic names (indexed like ``problem.mics``).

    Returns
    -------
    warnings : list of str
    covariance : ndarray, shape (dims, dims)
        The covariance to report: enlarged where the misfit is not quadratic, infinite when
        the delays fit a source at infinite range as well (a bearing, not a position).

    Raises
    ------
    NothingFoundError
        The mics are all at one place, or the fix ran beyond 10^4 apertures (no measurement).
    """
    warnings = []
    factor = 1.0
    point = problem.point(x)
    centre, aperture = _aperture(problem)
    offset = point[:2] - centre[:2]
    range_m = float(np.linalg.norm(offset))
    bearing = float(np.arctan2(offset[0], offset[1]))
    elevation = float(np.arctan2(point[2] - centre[2], max(range_m, 1e-300)))
    bearing_deg = np.degrees(bearing) % 360.0
    if aperture <= 0 or not np.isfinite(aperture):
        raise NothingFoundError("the mics are all at one place: a position needs mics spread "
                                "over the site")
    if range_m > FAR_RATIO * aperture:
        scale = max(float(inflation), 1.0)
        with np.errstate(over="ignore", invalid="ignore"):
            rise = (_far_field_chi2(problem, bearing, elevation) - chi2_min) / scale
        if range_m > _HARD_LIMIT_APERTURES * aperture or not rise >= stats.chi2.ppf(0.95, 1):
            nearest = _nearest_fitting_range(problem, bearing, elevation, chi2_min, scale,
                                             aperture)
            far = FAR_NOTE_APERTURES * aperture
            where = (f"at any distance beyond about {nearest:.0f} m" if nearest <= far else
                     f"far away (beyond {far:.0f} m, over {FAR_NOTE_APERTURES:.0f} times the "
                     "array's width)")
            message = (f"the delays give a bearing but no range: a source toward "
                       f"{bearing_deg:.0f} deg {where} fits them (the array is "
                       f"{aperture:.0f} m wide); mics spread wider or nearer the source would "
                       "give a position")
            if range_m > _HARD_LIMIT_APERTURES * aperture:
                raise NothingFoundError(message)  # a position out there is no measurement
            return [message], np.full_like(np.asarray(covariance, float), np.inf)
        warnings.append(
            f"the source is far outside the array ({range_m:.0f} m from its centre, "
            f"{range_m / aperture:.0f}x its {aperture:.0f} m width): the bearing "
            f"({bearing_deg:.0f} deg) is much better known than the range and the ellipse is "
            "approximate; a mic nearer the source would help")
    spread = _boundary_rise(problem, x, chi2_min, covariance, stats.chi2.ppf(
        0.95, problem.dims) * max(float(inflation), 1.0))
    if spread is not None and spread[0] < LINEARITY_RATIO:
        factor = min(1.0 / max(spread[0], 1.0 / _MAX_ENLARGE), _MAX_ENLARGE)
        pairs = _endfire_pairs(problem, point, names)
        if pairs:
            why = (f"the source is near the extension of the line through mics "
                   f"{', '.join(pairs)} (their delay is at its largest and says little about "
                   "the position): a mic off that line, toward the source, would help")
        elif inflation > 1.0:
            why = "the delays do not fit one position (see the misfit warning)"
        else:
            why = "a mic nearer the source or off the line of the others would help"
        warnings.append(f"the misfit is far from the straight-line model inside the 95 % "
                        f"ellipse: the ellipse was enlarged {np.sqrt(factor):.1f}x and is "
                        f"still approximate; {why}")
    return warnings, np.asarray(covariance, float) * factor
