"""Effective sound speed (and a uniform horizontal wind) solved jointly with the position.

With more mics than a fix needs, the arrival-time differences also tell how fast the sound
travelled.  The pair delays are first reduced to arrival times relative to one mic by
generalised least squares (:func:`locate.fix.solver.arrival_times`); the N - 1 arrival differences
``z_k = tau_k - tau_ref`` (covariance ``C``) are then fitted by

    z_k = T(p, m_k; c, w) - T(p, m_ref; c, w)

with T the time of flight in a uniform wind (:func:`locate.physics.air.travel_time_s`), for the
unknowns ``theta = (x, y[, z], c[, w_x, w_y])``: 3, 4, 5 or 6 of them, so the fit needs
N - 1 >= len(theta) arrival differences, i.e. N >= len(theta) + 1 mics (2-D + c: 4 mics,
2-D + c + wind: 6; 3-D + c: 5; 3-D + c + wind: 7).  It is solved by Levenberg-Marquardt
(``scipy.optimize.least_squares``, method "lm") on the whitened residuals
``L^-1 (z - model)`` with ``C = L L^T``, from the fixed-air fix; the covariance of theta is
``(J^T J)^-1`` of the whitened Jacobian (Foy 1976, IEEE Trans. AES 12(2), Taylor-series
location, extended to the extra unknowns).

Jacobian of T (implicit differentiation of F = |r - w T|^2 - c^2 T^2 = 0, r = m - p,
u = r - w T, D = w.u + c^2 T):  dT/dp = -u / D,  dT/dc = -c T^2 / D,  dT/dw = -T u / D.

The fitted speed is compared with the one the site's air gives (Cramer 1993 via
:mod:`locate.physics.air`, with the spread implied by ``air.temperature_sd_c``); when they differ by
more than :data:`DISAGREE_SIGMA` combined standard deviations a warning says so and names the
temperature the fitted speed corresponds to.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import optimize, stats

from locate.errors import ConvergenceError, NothingFoundError, OptionError
from locate.fix.solver import REJECT_P_VALUE, arrival_times
from locate.physics import air as _air

__all__ = [
    "AirFit",
    "n_unknowns",
    "min_mics",
    "require_mics",
    "solve_air",
    "sound_speed_sd_mps",
    "implied_temperature_c",
    "fit_entry",
    "summary_lines",
    "DISAGREE_SIGMA",
]

DISAGREE_SIGMA = 3.0
"""Fitted and site sound speeds (or winds) further apart than this many combined standard
deviations are reported as disagreeing (about 0.3 % false alarms for Gaussian errors)."""

_WIND_CHI2 = float(stats.chi2.ppf(stats.norm.cdf(DISAGREE_SIGMA) * 2 - 1, 2))


@dataclass
class AirFit:
    """Joint position and propagation fit.

    Attributes
    ----------
    position_m : ndarray, shape (3,)
    covariance_m2 : ndarray, shape (3, 3)
        Position covariance with the sound speed (and wind) unknown (zero z row/col in 2-D).
    sound_speed_mps, sound_speed_sd_mps : float
    wind_mps : ndarray, shape (3,)
        The wind used: fitted (horizontal) with ``solve_wind``, else the site's.
    wind_cov_m2ps2 : ndarray, shape (2, 2) or None
    parameters, parameter_covariance : ndarray, shapes (K,), (K, K)
        theta = (x, y[, z], c[, w_x, w_y]) and its covariance.
    used : ndarray of bool, shape (N,)
    chi2, dof, p_value, residual_rms_s : float, int, float, float
    inflation : float
        Factor applied to the covariance when the fit is inconsistent (reduced chi-square).
    site_sound_speed_mps, site_sound_speed_sd_mps : float
    implied_temperature_c : float or None
        Air temperature at which the site's humidity and pressure give the fitted speed.
    speed_disagreement_sigma : float
    warnings : list of str
    """

    position_m: np.ndarray
    covariance_m2: np.ndarray
    sound_speed_mps: float
    sound_speed_sd_mps: float
    wind_mps: np.ndarray
    wind_cov_m2ps2: np.ndarray | None
    parameters: np.ndarray
    parameter_covariance: np.ndarray
    used: np.ndarray
    chi2: float
    dof: int
    p_value: float
    residual_rms_s: float
    inflation: float
    site_sound_speed_mps: float
    site_sound_speed_sd_mps: float
    implied_temperature_c: float | None
    speed_disagreement_sigma: float
    dims: int = 2
    warnings: list = field(default_factory=list)
    floored: bool = False

    def to_dict(self, mic_names=None) -> dict:
        """The ``"air_fit"`` entry of a fix in the result JSON."""
        d = {
            "sound_speed_mps": round(self.sound_speed_mps, 4),
            "sound_speed_sd_mps": float(f"{self.sound_speed_sd_mps:.3g}"),
            "site_sound_speed_mps": round(self.site_sound_speed_mps, 4),
            "site_sound_speed_sd_mps": round(self.site_sound_speed_sd_mps, 4),
            "implied_temperature_c": None if self.implied_temperature_c is None
            else round(self.implied_temperature_c, 2),
            "disagreement_sigma": round(self.speed_disagreement_sigma, 2),
            "agrees": bool(self.speed_disagreement_sigma <= DISAGREE_SIGMA),
            "solved_wind": self.wind_cov_m2ps2 is not None,
            "wind_mps": [round(float(v), 4) for v in self.wind_mps],
            "chi2": self.chi2, "dof": self.dof, "p_value": self.p_value,
            "residual_rms_s": self.residual_rms_s, "covariance_inflation": self.inflation,
            "ellipse_kept_at_least_fixed_air": bool(self.floored),
        }
        if self.wind_cov_m2ps2 is not None:
            d["wind_cov_m2ps2"] = self.wind_cov_m2ps2.tolist()
            speed, sd, from_deg = _wind_summary(self.wind_mps[:2], self.wind_cov_m2ps2)
            d.update(wind_speed_mps=round(speed, 3), wind_speed_sd_mps=float(f"{sd:.3g}"),
                     wind_from_deg=round(from_deg, 1))
        if mic_names is not None:
            d["used_mics"] = [n for n, u in zip(mic_names, self.used, strict=True) if u]
        return d


def n_unknowns(dims: int, solve_wind: bool = False) -> int:
    """Number of unknowns: position (2 or 3), sound speed, and 2 wind components."""
    return int(dims) + 1 + (2 if solve_wind else 0)


def min_mics(dims: int, solve_wind: bool = False) -> int:
    """Fewest mics for the joint fit: N - 1 arrival differences >= number of unknowns."""
    return n_unknowns(dims, solve_wind) + 1


def require_mics(n_mics: int, dims: int, solve_wind: bool = False):
    """Raise :class:`OptionError` when the site has too few mics for ``--solve-air``."""
    need = min_mics(dims, solve_wind)
    if n_mics < need:
        what = f"x, y{', z' if dims == 3 else ''}, c" + (", wind x, wind y" if solve_wind else "")
        raise OptionError(f"solving {what} ({n_unknowns(dims, solve_wind)} unknowns) needs at "
                          f"least {need} mics ({need - 1} arrival differences); this site has "
                          f"{n_mics}", field="solve_wind" if solve_wind else "solve_air")


def sound_speed_sd_mps(air) -> float:
    """Sound-speed standard deviation implied by ``air.temperature_sd_c`` (0 with an override)."""
    if air.sound_speed_override_mps is not None or not air.temperature_sd_c:
        return 0.0
    return float(abs(_dc_dt(air)) * air.temperature_sd_c)


def _dc_dt(air, temperature_c=None) -> float:
    t = air.temperature_c if temperature_c is None else temperature_c
    c = [_air.sound_speed_mps(t + d, air.relative_humidity, air.pressure_kpa) for d in (-0.5, 0.5)]
    return float(c[1] - c[0])


def implied_temperature_c(sound_speed_mps, air) -> float | None:
    """Temperature at which the air's humidity and pressure give ``sound_speed_mps``.

    Inverts :func:`locate.physics.air.sound_speed_mps` (Cramer 1993) by root finding over -50..60
    degC;
    None when the speed is outside that range.
    """
    def f(t):
        return _air.sound_speed_mps(t, air.relative_humidity, air.pressure_kpa) - sound_speed_mps

    lo, hi = -50.0, 60.0
    if f(lo) * f(hi) > 0:
        return None
    return float(optimize.brentq(f, lo, hi, xtol=1e-6))


def _wind_summary(w, cov):
    w = np.asarray(w, float)
    speed = float(np.hypot(w[0], w[1]))
    grad = w / speed if speed > 0 else np.zeros(2)
    sd = float(np.sqrt(max(grad @ cov @ grad, 0.0))) if speed > 0 else float(
        np.sqrt(np.trace(cov) / 2))
    from_deg = float(np.rad2deg(np.arctan2(-w[0], -w[1])) % 360.0)  # air.wind_vector_mps inverse
    return speed, sd, from_deg


class _Model:
    """Whitened residuals and Jacobian of the arrival differences in theta."""

    def __init__(self, mics, z, cov, ref, rest, dims, source_z_m, solve_wind, wind0):
        self.mics, self.ref, self.rest = mics, ref, rest
        self.dims, self.source_z_m, self.solve_wind = dims, float(source_z_m), solve_wind
        self.wind0 = np.zeros(3) if wind0 is None else np.asarray(wind0, float).reshape(3)
        self.z = z
        self.chol = np.linalg.cholesky(0.5 * (cov + cov.T) + np.eye(len(z)) * 1e-30)

    def unpack(self, th):
        d = self.dims
        p = np.r_[th[:d], self.source_z_m] if d == 2 else np.asarray(th[:3], float)
        c = float(th[d])
        w = np.r_[th[d + 1], th[d + 2], self.wind0[2]] if self.solve_wind else self.wind0
        return p, c, w

    def arrivals(self, th):
        p, c, w = self.unpack(th)
        return _air.travel_time_s(p, self.mics, c, w)

    def residuals(self, th):
        t = self.arrivals(th)
        r = self.z - (t[self.rest] - t[self.ref])
        return np.linalg.solve(self.chol, r)

    def jacobian(self, th):
        p, c, w = self.unpack(th)
        r = self.mics - p
        t = _air.travel_time_s(p, self.mics, c, w)
        u = r - w * t[:, None]
        den = u @ w + c**2 * t
        cols = [-u[:, : self.dims] / den[:, None], (-c * t**2 / den)[:, None]]
        if self.solve_wind:
            cols.append(-(t / den)[:, None] * u[:, :2])
        g = np.hstack(cols)  # dT/dtheta, (N, K)
        jac = -(g[self.rest] - g[self.ref])  # derivative of the residual z - model
        return np.linalg.solve(self.chol, jac)


def _fit(mics, tau, cov, used_idx, start, dims, source_z_m, solve_wind, wind0):
    ref, rest = used_idx[0], used_idx[1:]
    m = np.zeros((len(rest), len(tau)))
    m[np.arange(len(rest)), rest] = 1.0
    m[:, ref] -= 1.0
    cz = m @ np.nan_to_num(cov, nan=0.0) @ m.T
    model = _Model(mics, tau[rest] - tau[ref], cz, ref, rest, dims, source_z_m, solve_wind,
                   wind0)
    sol = optimize.least_squares(model.residuals, start, jac=model.jacobian, method="lm",
                                 x_scale="jac", xtol=1e-12, ftol=1e-12, gtol=1e-12,
                                 max_nfev=200 * len(start))
    if not np.all(np.isfinite(sol.x)) or sol.x[dims] <= 0:
        raise ConvergenceError("the joint position and sound-speed fit did not converge")
    res = sol.fun
    jw = model.jacobian(sol.x)
    chi2 = float(res @ res)
    dof = len(rest) - len(start)
    return model, sol, jw, chi2, dof


def solve_air(mic_positions_m, delays, *, start_m, sound_speed_mps, air=None, wind_mps=None,
              solve_wind=False, dims=2, source_z_m=0.0, exclude=None, mic_names=None,
              extra_covariance_s2=None, floor_covariance_m2=None) -> AirFit:
    """Position, effective sound speed (and horizontal wind) from one event's delays.

    Parameters
    ----------
    mic_positions_m : array_like, shape (N, 3)
    delays : DelaySet
    start_m : array_like, shape (3,)
        Starting position (the fixed-air fix).
    sound_speed_mps : float
        The site's sound speed: start of the fit and the value it is compared with.
    air : locate.io.site.Air, optional
        The site's air, for the speed's uncertainty (``temperature_sd_c``), the implied
        temperature and the wind uncertainty (``wind_sd_mps``).
    wind_mps : array_like, shape (3,), optional
        The site's wind: used as is, or as the start and the comparison with ``solve_wind``.
    solve_wind : bool
    dims : {2, 3}
    source_z_m : float
        Source height of a 2-D fit.
    exclude : array_like of bool, shape (N,), optional
        Mics to leave out if the fit with every connected mic is inconsistent (e.g. those the
        fixed-air integrity test rejected).
    mic_names : sequence of str, optional
    extra_covariance_s2 : array_like, shape (P, P), optional
        Declared uncertainties other than the sound speed (and the wind, when it is solved)
        propagated to the delays (survey, clocks, source height): added to the delay
        covariance as in :func:`locate.fix.solver.locate_source`, so that solving the air
        keeps every declared uncertainty in the ellipse.
    floor_covariance_m2 : array_like, shape (3, 3), optional
        The fixed-air fix's covariance.  Solving for more unknowns cannot make the position
        better known (an extra unknown never adds information: the Fisher information of
        the position with a nuisance parameter is the Schur complement, textbook estimation
        theory), so the reported covariance is at least this one in every direction (its
        positive difference is added).

    Returns
    -------
    AirFit

    Raises
    ------
    NothingFoundError
        Fewer connected mics than the unknowns need.
    ConvergenceError
    """
    mics = np.asarray(mic_positions_m, dtype=float)
    n = len(mics)
    names = list(mic_names) if mic_names is not None else [f"M{k + 1}" for k in range(n)]
    tau, cov, connected, dropped, closure = arrival_times(delays, n, details=True)
    if extra_covariance_s2 is not None:  # as locate_source: measurement misfit scaled, then
        from locate.signal.delays import DelaySet  # the declared part added

        full = DelaySet(**{**delays.__dict__, "covariance_s2": delays.covariance_s2 * closure
                           + np.asarray(extra_covariance_s2, dtype=float)})
        keep = np.ones(len(delays.pairs), bool)
        keep[dropped] = False
        tau, cov, connected, _ = arrival_times(full.subset(keep), n, closure_p_value=0.0)
    k_unknown = n_unknowns(dims, solve_wind)
    used_idx = np.flatnonzero(connected)
    if used_idx.size < k_unknown + 1:
        raise NothingFoundError(f"only {used_idx.size} mic(s) have usable delays; solving the "
                                f"sound speed{' and wind' if solve_wind else ''} needs "
                                f"{k_unknown + 1}")
    w0 = np.zeros(3) if wind_mps is None else np.asarray(wind_mps, float).reshape(3)
    start = list(np.asarray(start_m, float)[:dims]) + [float(sound_speed_mps)]
    if solve_wind:
        start += [w0[0], w0[1]]
    start = np.array(start)
    model, sol, jw, chi2, dof = _fit(mics, tau, cov, used_idx, start, dims, source_z_m,
                                     solve_wind, w0)
    p_value = float(stats.chi2.sf(chi2, dof)) if dof > 0 else 1.0
    warnings = []
    if p_value < REJECT_P_VALUE and exclude is not None:
        keep = used_idx[~np.asarray(exclude, bool)[used_idx]]
        if k_unknown + 1 <= keep.size < used_idx.size:
            alt = _fit(mics, tau, cov, keep, sol.x, dims, source_z_m, solve_wind, w0)
            alt_p = float(stats.chi2.sf(alt[3], alt[4])) if alt[4] > 0 else 1.0
            if alt_p >= REJECT_P_VALUE:
                left = [names[k] for k in used_idx if k not in keep]
                warnings.append("mic(s) " + ", ".join(left) + " left out of the sound-speed fit:"
                                " their timing disagrees with the others")
                model, sol, jw, chi2, dof = alt
                used_idx, p_value = keep, alt_p
    if dof == 0:
        warnings.append("the sound-speed fit has no redundant mic: nothing checks it (add mics)")
    inflation = 1.0
    if dof > 0 and p_value < REJECT_P_VALUE:
        inflation = chi2 / dof
        warnings.append(f"the delays do not fit one position and sound speed well (chi-square "
                        f"p = {p_value:.1e}): uncertainties enlarged {np.sqrt(inflation):.1f}x")
    try:
        pcov = np.linalg.inv(jw.T @ jw) * inflation
    except np.linalg.LinAlgError:
        pcov = np.full((k_unknown, k_unknown), np.inf)
        warnings.append("the geometry cannot separate the sound speed from the position")
    x = sol.x
    p, c, w = model.unpack(x)
    covp = np.zeros((3, 3))
    covp[:dims, :dims] = pcov[:dims, :dims]
    floored = False
    if floor_covariance_m2 is not None:
        fl = np.asarray(floor_covariance_m2, float)[:dims, :dims]
        if np.all(np.isfinite(fl)) and np.all(np.isfinite(covp)):
            vals, vecs = np.linalg.eigh(0.5 * ((fl - covp[:dims, :dims])
                                               + (fl - covp[:dims, :dims]).T))
            if vals.max() > 1e-9 * max(np.trace(fl), 1e-300):
                covp[:dims, :dims] += (vecs * np.clip(vals, 0.0, None)) @ vecs.T
                floored = True
        elif not np.all(np.isfinite(fl)):
            covp[:dims, :dims] = fl
            floored = True
    sd_c = float(np.sqrt(max(pcov[dims, dims], 0.0)))
    wind_cov = pcov[dims + 1:, dims + 1:] if solve_wind else None
    c_site = float(sound_speed_mps)
    sd_site = sound_speed_sd_mps(air) if air is not None else 0.0
    z_sig = abs(c - c_site) / max(np.hypot(sd_c, sd_site), 1e-12)
    t_imp = implied_temperature_c(c, air) if air is not None else None
    if z_sig > DISAGREE_SIGMA:
        site_t = (f" ({air.temperature_c:g}"
                  + (f" ± {air.temperature_sd_c:g}" if air.temperature_sd_c else "")
                  + " °C)") if air is not None else ""
        imp = f"; it corresponds to about {t_imp:.1f} °C" if t_imp is not None else ""
        warnings.append(f"the sound speed fitted from the delays, {c:.3f} ± {sd_c:.2g} m/s, "
                        f"disagrees with {c_site:.2f} m/s from the site's air{site_t} by "
                        f"{z_sig:.1f} standard deviations{imp}: check air.temperature_c (or the "
                        "mic positions)")
    if solve_wind:
        wsd = air.wind_sd_mps if air is not None else 0.0
        diff = w[:2] - w0[:2]
        s = wind_cov + np.eye(2) * wsd**2
        d2 = float(diff @ np.linalg.solve(s, diff)) if np.all(np.isfinite(s)) else 0.0
        if d2 > _WIND_CHI2:
            speed, sd, frm = _wind_summary(w[:2], wind_cov)
            warnings.append(f"the wind fitted from the delays, {speed:.2f} ± {sd:.2g} m/s "
                            f"from {frm:.0f}° (from north), disagrees with the site's "
                            f"{np.hypot(*w0[:2]):.1f} m/s: check [air] wind_speed_mps and "
                            "wind_from_deg")
    t = model.arrivals(x)
    resid = model.z - (t[model.rest] - t[model.ref])
    used = np.isin(np.arange(n), used_idx)
    return AirFit(position_m=p, covariance_m2=covp, sound_speed_mps=c, sound_speed_sd_mps=sd_c,
                  wind_mps=np.asarray(w, float), wind_cov_m2ps2=wind_cov, parameters=x,
                  parameter_covariance=pcov, used=used, chi2=chi2, dof=int(dof),
                  p_value=p_value, residual_rms_s=float(np.sqrt(np.mean(resid**2))),
                  inflation=float(inflation), site_sound_speed_mps=c_site,
                  site_sound_speed_sd_mps=sd_site, implied_temperature_c=t_imp,
                  speed_disagreement_sigma=float(z_sig), dims=dims, warnings=warnings,
                  floored=floored)


# ----------------------------------------------------------------------------- result entries

def fit_entry(entry, fx, delays, site, cond, *, dims=2, source_z_m=0.0, solve_wind=False,
              extra_covariance_s2=None):
    """Solve the air for one fix and update its result entry (in place; also returned).

    The entry's position, covariance, ellipses and fit statistics become those of the joint
    fit; the fixed-air values move to ``entry["fixed_air"]``; ``entry["air_fit"]`` holds
    :meth:`AirFit.to_dict`; the fit's warnings are appended to ``entry["warnings"]``.
    ``extra_covariance_s2``: the declared uncertainties other than the solved ones, propagated
    to the delays (:func:`locate.workflows.fixing.air_fit_extra`).  The ellipse never comes
    out smaller than the fixed-air one (``floor_covariance_m2`` of :func:`solve_air`).
    """
    from locate.geometry.ellipses import ellipse

    names = site.mic_names
    rejected = np.isin(names, fx.rejected_mics)
    fit = solve_air(site.positions_m, delays, start_m=fx.position_m,
                    sound_speed_mps=cond.sound_speed_mps, air=site.air, wind_mps=cond.wind_mps,
                    solve_wind=solve_wind, dims=dims, source_z_m=source_z_m, exclude=rejected,
                    mic_names=names, extra_covariance_s2=extra_covariance_s2,
                    floor_covariance_m2=fx.covariance_m2)
    entry["fixed_air"] = {k: entry.get(k) for k in ("position_m", "covariance_m2", "ellipse95",
                                                     "residual_rms_s", "chi2", "dof", "p_value",
                                                     "used_mics", "rejected_mics")}
    entry["fixed_air"]["sound_speed_mps"] = round(cond.sound_speed_mps, 4)

    def rounded(e):
        return {k: (round(v, 4) if np.isfinite(v) else v) for k, v in e.items()}

    entry.update(
        position_m=[round(float(v), 4) for v in fit.position_m],
        covariance_m2=fit.covariance_m2.tolist(),
        ellipse95=rounded(ellipse(fit.covariance_m2, 0.95)),
        ellipse50=rounded(ellipse(fit.covariance_m2, 0.50)),
        residual_rms_s=fit.residual_rms_s, chi2=fit.chi2, dof=fit.dof, p_value=fit.p_value,
        used_mics=[n for n, u in zip(names, fit.used, strict=True) if u],
        rejected_mics=[n for n, u in zip(names, fit.used, strict=True)
                       if not u and n not in entry.get("dead_mics", [])],
        air_fit=fit.to_dict(names),
    )
    fixed = set(fx.warnings)  # statements about the fit with the site's air: say so
    kept = [f"with the site's sound speed ({cond.sound_speed_mps:.2f} m/s): {w}" if w in fixed
            else w for w in entry.get("warnings", [])]
    entry["warnings"] = list(dict.fromkeys(kept + fit.warnings))
    return entry


def summary_lines(result) -> list[str]:
    """One line per fix with the fitted sound speed (and wind), for the command line."""
    lines = []
    for k, f in enumerate(result.get("fixes", []), 1):
        a = f.get("air_fit")
        if not a:
            continue
        t = a["implied_temperature_c"]
        text = (f"#{k} sound speed {a['sound_speed_mps']:.3f} ± {a['sound_speed_sd_mps']:.2g}"
                f" m/s fitted (site air: {a['site_sound_speed_mps']:.2f} m/s"
                + (f"; fitted speed ~ {t:.1f} °C" if t is not None else "") + ")")
        if a.get("solved_wind"):
            text += (f"; wind {a['wind_speed_mps']:.2f} ± {a['wind_speed_sd_mps']:.2g} m/s "
                     f"from {a['wind_from_deg']:.0f}° (from north)")
        lines.append(text)
    return lines
