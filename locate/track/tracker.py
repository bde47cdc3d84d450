"""Moving-source tracks: path, heading, speed, and where the source is when it is heard.

The pipeline (:func:`track_recording`):

1. plain windowed GCC delays (:mod:`locate.track.delays`) -> a starting path fitted with the
   pair-anchored retarded-time model (:mod:`locate.track.retarded`, :mod:`locate.track.pathfit`);
2. windows warped along the current path -> residual delays -> the path refitted with the exact
   reference-anchored model, repeated until it settles;
3. track points at each window's emission time with their covariance, heading and speed with
   standard deviations (first-order propagation), the position the source has reached when its
   sound is heard, closest approaches, and - when the source has a tone - a Doppler speed
   (:mod:`locate.track.doppler`).

Conventions: times on the recording time base of the reference mic; heading clockwise from
north (+y) toward east (+x); ``speed_mps`` is the 3-D speed.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np

from locate.errors import NothingFoundError, OptionError, TdoaError
from locate.physics import air
from locate.signal.delays import geometric_max_lag_s
from locate.track import bands as track_bands
from locate.track import budget as track_budget
from locate.track import delays as track_delays
from locate.track import doppler
from locate.track import models as track_models
from locate.track import start as track_start
from locate.track.motion import Path, SplinePath, closest_approach, heading_deg
from locate.track.pathfit import PathFit, fit_path, knot_times
from locate.track.retarded import Parametrisation, predict_delays

__all__ = [
    "TrackResult", "describe_fit", "track_recording", "track_to_dict", "stationary_message",
    "naive_fit", "STATIONARY_SPEED_MPS", "coherent_band_hz",
]

STATIONARY_SPEED_MPS = 0.5
"""Below this fitted speed (or below two standard deviations) the source counts as stationary."""


@dataclass
class TrackResult:
    """A reconstructed track.

    Attributes
    ----------
    fit : PathFit
    path : Path
    t_heard_s, t_emit_s : ndarray, shape (W,)
    position_m : ndarray, shape (W, 3)
        Where each window's sound was emitted.
    covariance_m2 : ndarray, shape (W, 3, 3)
    position_now_m : ndarray, shape (W, 3)
        Where the source is at ``t_heard_s``.
    covariance_now_m2 : ndarray, shape (W, 3, 3)
    lag_m : ndarray, shape (W,)
        Distance between the heard-from and the is-now positions.
    lag_bearing_deg : ndarray, shape (W,)
        Azimuth of the is-now position minus that of the heard-from one, seen from
        ``bearing_from_m``, wrapped to (-180, 180].
    lag_angle_deg : ndarray, shape (W,)
        3-D angle between the two sight lines from ``bearing_from_m``.
    bearing_from_m : ndarray, shape (3,)
    velocity_mps : ndarray, shape (3,)
        Mean velocity over the emission span; ``velocity_covariance`` (3, 3).
    heading_deg, heading_sd_deg, speed_mps, speed_sd_mps : float
    segments : list of dict
        Per segment: t_start_s, t_stop_s, heading_deg, speed_mps (and their sd).
    closest : list of dict
        Per point of interest: index, t_s, t_heard_s, distance_m, distance_sd_m,
        position_m, within_span.
    stationary : bool
    doppler : dict or None
    warnings : list of str
    """

    fit: PathFit
    path: Path
    t_heard_s: np.ndarray
    t_emit_s: np.ndarray
    position_m: np.ndarray
    covariance_m2: np.ndarray
    position_now_m: np.ndarray
    covariance_now_m2: np.ndarray
    lag_m: np.ndarray
    lag_bearing_deg: np.ndarray
    lag_angle_deg: np.ndarray
    bearing_from_m: np.ndarray
    velocity_mps: np.ndarray
    velocity_covariance: np.ndarray
    heading_deg: float
    heading_sd_deg: float
    speed_mps: float
    speed_sd_mps: float
    segments: list
    closest: list
    stationary: bool
    model: str = "straight"
    doppler: dict | None = None
    sound_speed_mps: float = 343.0
    warnings: list = field(default_factory=list)
    fit_inputs: dict = field(default_factory=dict)
    point_velocity_mps: np.ndarray | None = None
    point_velocity_covariance: np.ndarray | None = None
    model_requested: str = "straight"
    model_reason: str = ""
    candidates: list = field(default_factory=list)
    misfit: dict = field(default_factory=dict)
    adequate: bool = True
    straight_holds: bool = True
    turns: list = field(default_factory=list)
    uncertainty: dict = field(default_factory=dict)
    t_emit_sd_s: np.ndarray | None = None
    heard_covariance_m2: np.ndarray | None = None
    source_height: dict | None = None
    band_hz: tuple | None = None

    def point_heading_speed(self):
        """Per point: heading, its sd, speed, its sd (arrays of shape (W,))."""
        out = [_heading_speed(v, c) for v, c in zip(self.point_velocity_mps,
                                                    self.point_velocity_covariance)]
        return tuple(np.array(col) for col in zip(*out)) if out else (np.zeros(0),) * 4


def _heading_speed(v, cov):
    """Heading, its sd, speed, its sd (first-order propagation) of a velocity (3,), cov (3,3)."""
    h2 = v[0] ** 2 + v[1] ** 2
    speed = float(np.linalg.norm(v))
    jh = np.array([v[1], -v[0], 0.0]) / max(h2, 1e-300)  # d atan2(vx, vy) / dv, rad
    js = v / max(speed, 1e-300)
    return (float(heading_deg(v)), float(np.rad2deg(np.sqrt(max(jh @ cov @ jh, 0.0)))), speed,
            float(np.sqrt(max(js @ cov @ js, 0.0))))


def _azimuth_deg(vec):
    return np.rad2deg(np.arctan2(vec[..., 0], vec[..., 1]))


def describe_fit(fit: PathFit, mic_positions_m, sound_speed_mps, wind_mps=None, *,
                 bearing_from_m=None, points_m=None, model="straight"):
    """Track points and derived quantities of a path fit.

    Parameters
    ----------
    fit : PathFit
    mic_positions_m : array_like, shape (N, 3)
    sound_speed_mps : float
    wind_mps : array_like, shape (3,), optional
    bearing_from_m : array_like, shape (3,), optional
        Where the lag bearing is seen from (default: the reference mic).
    points_m : array_like, shape (M, 3), optional
        Points for the closest approach (default: the mics).

    Returns
    -------
    TrackResult
    """
    mics = np.asarray(mic_positions_m, float)
    par, th, cov = fit.par, fit.theta, fit.covariance
    path = fit.path
    sel = fit.used
    t_h, t_e = fit.t_heard_s, fit.t_emit_s
    # total derivative of p(t_e(theta)) for the reference-anchored emission time
    b_e = par.basis(t_e)
    v_e = path.velocity_mps(t_e)
    if fit.retarded:
        g0 = air.travel_time_gradient(path.position_m(t_e), mics[fit.reference_mic],
                                      sound_speed_mps, wind_mps)
        de = -np.einsum("wi,win->wn", g0, b_e) / (1.0 + np.einsum("wi,wi->w", g0, v_e))[:, None]
        q = b_e + v_e[..., None] * de[:, None, :]
    else:
        q = b_e
    pos = path.position_m(t_e)
    # A point is reported as "the source was here at t_emit_s"; it is scored against where the
    # source was at that stated time, so its covariance is that of p(t) at fixed t (B cov B^T).
    # The covariance of "where the sound heard at t_heard_s came from" (q cov q^T, q the total
    # derivative through the emission time) differs from it by v * dt_e: a range error dr
    # shifts the emission time by dr / c and the point along the track by (v / c) dr - two
    # thirds of the range error for a jet at 220 m/s, negligible for a car.  The emission-time
    # sd is reported beside it (``t_emit_sd_s``).
    pcov = np.einsum("win,nm,wjm->wij", b_e, cov, b_e)
    heard_cov = np.einsum("win,nm,wjm->wij", q, cov, q)
    if fit.retarded:
        t_emit_sd = np.sqrt(np.maximum(np.einsum("wn,nm,wm->w", de, cov, de), 0.0))
    else:
        t_emit_sd = np.zeros(len(t_e))
    b_h = par.basis(t_h)
    now = path.position_m(t_h)
    ncov = np.einsum("win,nm,wjm->wij", b_h, cov, b_h)
    origin = (mics[fit.reference_mic] if bearing_from_m is None
              else np.asarray(bearing_from_m, float))
    a, b = pos - origin, now - origin
    lag_bearing = (_azimuth_deg(b) - _azimuth_deg(a) + 180.0) % 360.0 - 180.0
    cosang = np.einsum("wi,wi->w", a, b) / np.maximum(
        np.linalg.norm(a, axis=1) * np.linalg.norm(b, axis=1), 1e-300)
    lag_angle = np.rad2deg(np.arccos(np.clip(cosang, -1.0, 1.0)))

    t_lo, t_hi = float(t_e[sel].min()), float(t_e[sel].max())
    if t_hi <= t_lo:
        t_hi = t_lo + 1e-3
    a_v = (par.basis(np.array(t_hi)) - par.basis(np.array(t_lo))) / (t_hi - t_lo)  # (3, n)
    vel = a_v @ th
    vcov = a_v @ cov @ a_v.T
    hd, hd_sd, sp, sp_sd = _heading_speed(vel, vcov)
    segments = []
    kt = par.knot_times_s
    for k in range(par.n_knots - 1):
        a_k = (par.basis(np.array(kt[k + 1])) - par.basis(np.array(kt[k]))) / (kt[k + 1] - kt[k])
        h_k = _heading_speed(a_k @ th, a_k @ cov @ a_k.T)
        segments.append({"t_start_s": float(kt[k]), "t_stop_s": float(kt[k + 1]),
                         "heading_deg": h_k[0], "heading_sd_deg": h_k[1],
                         "speed_mps": h_k[2], "speed_sd_mps": h_k[3]})
    pts = mics if points_m is None else np.asarray(points_m, float).reshape(-1, 3)
    closest = _closest(par, th, cov, pts, sound_speed_mps, wind_mps, (t_lo, t_hi))
    d_e = par.basis(t_e, 1)  # velocity of each point, (W, 3, n)
    pvel = np.einsum("win,n->wi", d_e, th)
    pvcov = np.einsum("win,nm,wjm->wij", d_e, cov, d_e)
    stationary = bool(sp < STATIONARY_SPEED_MPS or sp < 2.0 * sp_sd)
    return TrackResult(
        fit=fit, path=path, t_heard_s=t_h, t_emit_s=t_e, position_m=pos, covariance_m2=pcov,
        position_now_m=now, covariance_now_m2=ncov, lag_m=np.linalg.norm(now - pos, axis=1),
        lag_bearing_deg=lag_bearing, lag_angle_deg=lag_angle, bearing_from_m=origin,
        velocity_mps=vel, velocity_covariance=vcov, heading_deg=hd, heading_sd_deg=hd_sd,
        speed_mps=sp, speed_sd_mps=sp_sd, segments=segments, closest=closest,
        stationary=stationary, model=model, sound_speed_mps=float(sound_speed_mps),
        warnings=list(fit.warnings), point_velocity_mps=pvel, point_velocity_covariance=pvcov,
        t_emit_sd_s=t_emit_sd, heard_covariance_m2=heard_cov)


def _closest(par, th, cov, pts, c, wind, span):
    """Closest approach of the path to each point, sd by finite-difference propagation."""
    def cpa(theta):
        t, dist, pos = closest_approach(par.path(theta), pts)
        return t, dist, pos

    t0, d0, p0 = cpa(th)
    jt = np.zeros((len(pts), par.n_params))
    jd = np.zeros_like(jt)
    for k in range(par.n_params):
        h = np.zeros(par.n_params)
        h[k] = 1e-3
        tp, dp, _ = cpa(th + h)
        tm, dm, _ = cpa(th - h)
        jt[:, k], jd[:, k] = (tp - tm) / 2e-3, (dp - dm) / 2e-3
    heard = t0 + air.travel_time_s(p0, pts, c, wind)
    out = []
    for m in range(len(pts)):
        out.append({
            "index": m, "t_s": float(t0[m]), "t_heard_s": float(heard[m]),
            "distance_m": float(d0[m]),
            "t_sd_s": float(np.sqrt(max(jt[m] @ cov @ jt[m], 0.0))),
            "distance_sd_m": float(np.sqrt(max(jd[m] @ cov @ jd[m], 0.0))),
            "position_m": p0[m].tolist(),
            "within_span": bool(span[0] <= t0[m] <= span[1]),
        })
    return out


def stationary_message(result: TrackResult) -> str:
    """The user message for a track whose source does not appear to move."""
    return (f"the source appears stationary (fitted speed {result.speed_mps:.2f} ± "
            f"{result.speed_sd_mps:.2f} m/s); locate it with `tdoa fix` instead of `tdoa track`")


def naive_fit(result: TrackResult, mic_positions_m, sound_speed_mps, wind_mps=None):
    """Refit the same delays ignoring the retarded time (source at p(t_heard)) - for comparison.

    Uses the absolute delays of the final pass of ``result`` (its warped residuals plus the
    reference-anchored prediction of the path they were warped along).

    Returns
    -------
    TrackResult
        Its ``position_m`` are the naive positions, timed at ``t_heard_s``.
    """
    fit = result.fit
    meas = result.fit_inputs
    mics = np.asarray(mic_positions_m, float)
    d_abs = meas["absolute_delays_s"]
    nf = fit_path(fit.t_heard_s, d_abs, meas["covariance_s2"], mics, meas["pairs"],
                  sound_speed_mps, wind_mps=wind_mps, dims=fit.par.dims,
                  source_z_m=fit.par.source_z_m, model=result.model, usable=meas["usable"],
                  retarded=False, initial=fit.path)
    return describe_fit(nf, mics, sound_speed_mps, wind_mps, model=result.model)


def _check_inputs(signals, fs, mics, dims, model, sound_speed_mps):
    x = np.asarray(signals, float)
    if x.ndim != 2 or x.shape[0] != len(mics):
        raise OptionError(f"signals must have shape (n_mics={len(mics)}, n_samples), "
                          f"got {x.shape!r}", field="signals")
    if dims not in (2, 3):
        raise OptionError(f"dims must be 2 or 3, got {dims!r}", field="dims")
    if model not in track_models.MODELS:
        raise OptionError(f"model must be one of {', '.join(track_models.MODELS)}, got "
                          f"{model!r}", field="model")
    need = 4 if dims == 2 else 5
    if len(mics) < need:
        raise OptionError(f"a {dims}-D track needs at least {need} mics, got {len(mics)}",
                          field="mics")
    if not (np.isfinite(sound_speed_mps) and sound_speed_mps > 0 and fs > 0):
        raise OptionError(f"sound speed and sample rate must be positive, got "
                          f"{sound_speed_mps!r} m/s, {fs!r} Hz")
    if not np.all(np.isfinite(x)) or np.all(np.std(x, axis=1) == 0):
        raise NothingFoundError("the span holds no signal (silent or constant channels)")
    return x


MIN_START_WINDOWS = 3
"""Coherent start windows the start search needs (a line through bearings needs three)."""
MIN_TRACK_WINDOWS = 4
"""Track windows a path fit needs at least (more than the 2-4 knots' worth of parameters)."""


def _check_span(span_s, window_s, hop_s, window_given=True):
    """Refuse, saying why, a span too short for the start search and the track windows."""
    if not (np.isfinite(window_s) and window_s > 0):
        raise OptionError(f"the window must be positive, got {window_s!r} s", field="window_s")
    if not (np.isfinite(hop_s) and hop_s > 0):
        raise OptionError(f"the hop must be positive, got {hop_s!r} s", field="hop_s")
    if window_given and window_s > span_s:
        raise OptionError(f"the window ({window_s:g} s) is longer than the span analysed "
                          f"({span_s:.3g} s); shorten window_s or widen start_s/stop_s",
                          field="window_s")
    plain = max(0.25, window_s)
    need = max(MIN_START_WINDOWS * plain, window_s + (MIN_TRACK_WINDOWS - 1) * hop_s)
    if span_s + 1e-9 < need:
        raise OptionError(
            f"the span ({span_s:.3g} s) is too short for a track: the start search needs "
            f"{MIN_START_WINDOWS} windows of {plain:.3g} s and the fit {MIN_TRACK_WINDOWS} "
            f"windows of {window_s:.3g} s every {hop_s:.3g} s, so at least {need:.3g} s; widen "
            "start_s/stop_s (or shorten window_s); a sound that does not move is located "
            "with `tdoa fix`", field="stop_s")


def overlap_factor(window_s, hop_s):
    """Variance factor for estimates built from windows overlapping by ``window - hop``."""
    k = np.arange(1, int(np.ceil(window_s / hop_s)) + 1)
    return float(1.0 + 2.0 * np.sum(np.clip(1.0 - k * hop_s / window_s, 0.0, None)))


HEIGHT_PROFILE_SDS = tuple(np.linspace(-2.5, 2.5, 11))
"""Heights tried around the given or assumed one of a 2-D track, in its sds."""
HEIGHT_FLOOR_SD_M = 0.05
"""Least sd of a height read from the delays: a vehicle or a person radiates from a body tens
of centimetres across, so its acoustic height is not sharper than this (common practice)."""
HEIGHT_MOVE_SDS = 0.25
"""Make the track again at the delays' height when it is this many (final) sds away."""


def height_profile(result: TrackResult, mic_positions_m, sound_speed_mps, wind_mps, z0_m,
                   sd_m):
    """The source height of a 2-D track from its delays, with the given/assumed height as prior.

    The final delays of ``result`` are refitted (same windows, knots and degree, no outlier
    rejection) at fixed heights: ``J(z) = chi2(z) / s + ((z - z0) / sd)^2`` is the negative
    log posterior (up to a constant) of the height with the Gaussian prior N(z0, sd^2)
    (e.g. Gelman et al., Bayesian Data Analysis, ch. 2), ``s`` the reduced chi-square at the
    best height when above one times the variance factor of overlapping windows.  ``J`` is
    tried on a grid (:data:`HEIGHT_PROFILE_SDS`), its lowest cell refined by a bounded scalar
    search (scipy.optimize.minimize_scalar), and the sd taken from its curvature
    (``sd_z = (J''/2)^-1/2``).  The grid matters: with every mic at one height the delays
    cannot tell a height from its mirror image in the mics' plane, and the prior picks.

    Returns
    -------
    dict
        ``z_m``, ``sd_m``, ``prior_z_m``, ``prior_sd_m``, ``chi2_drop`` (chi-square at the
        prior height minus at ``z_m``), ``heights_m``, ``chi2`` (the grid).
    """
    from scipy.optimize import minimize_scalar

    fit = result.fit
    meas = result.fit_inputs
    mics = np.asarray(mic_positions_m, float)
    usable = np.asarray(meas["usable"], bool) & fit.used[:, None]
    z0, sd = float(z0_m), float(sd_m)
    cache = {}

    def chi2(z):
        z = float(z)
        if z not in cache:
            par = dataclasses.replace(fit.par, source_z_m=z)
            try:
                f = fit_path(fit.t_heard_s, meas["absolute_delays_s"], meas["covariance_s2"],
                             mics, meas["pairs"], sound_speed_mps, wind_mps=wind_mps, dims=2,
                             source_z_m=z, usable=usable, initial=par.path(fit.theta),
                             knots_s=fit.par.knot_times_s, degree=fit.par.degree,
                             reference_mic=fit.reference_mic, reject=False)
                cache[z] = float(f.chi2) if np.isfinite(f.chi2) else np.inf
            except (TdoaError, ValueError, np.linalg.LinAlgError):
                cache[z] = np.inf
        return cache[z]

    zs = z0 + sd * np.asarray(HEIGHT_PROFILE_SDS)
    grid = np.array([chi2(z) for z in zs])
    out = {"prior_z_m": z0, "prior_sd_m": sd, "z_m": z0, "sd_m": sd, "chi2_drop": 0.0,
           "heights_m": zs.tolist(), "chi2": [float(v) for v in grid]}
    if not np.any(np.isfinite(grid)):
        return out
    dof = max(int(fit.dof), 1)
    factor = overlap_factor(meas.get("window_s", 1.0), meas.get("hop_s", 1.0))
    scale = max(float(np.min(grid)) / dof, 1.0) * factor

    def post(z):
        return chi2(z) / scale + ((z - z0) / sd) ** 2

    # every local minimum of the grid is refined (the chi-square of exact delays is narrow
    # and may have a mirror basin); the lowest refined posterior wins
    pg = np.array([post(z) for z in zs])
    best = (np.inf, z0)
    for k in range(len(zs)):
        if pg[k] <= pg[max(k - 1, 0)] and pg[k] <= pg[min(k + 1, len(zs) - 1)]:
            lo, hi = zs[max(k - 1, 0)], zs[min(k + 1, len(zs) - 1)]
            zk = float(minimize_scalar(post, bounds=(lo, hi), method="bounded",
                                       options={"xatol": 1e-3 * sd}).x)
            best = min(best, (post(zk), zk))
    z = best[1]
    h = max(1e-3, 1e-2 * sd)
    curv = (post(z + h) - 2.0 * post(z) + post(z - h)) / h**2
    sd_z = float(np.sqrt(2.0 / curv)) if np.isfinite(curv) and curv > 2.0 / sd**2 else sd
    out.update(z_m=z, sd_m=min(max(sd_z, HEIGHT_FLOOR_SD_M), sd),
               chi2_drop=float(chi2(z0) - chi2(z)))
    return out


def track_recording(signals, sample_rate_hz, mic_positions_m, sound_speed_mps, *,
                    source_z_sd_m=None, **kwargs):
    """Reconstruct a moving source's track (:func:`_track_recording`, whose parameters it takes).

    ``source_z_sd_m`` (2-D tracks): the uncertainty of ``source_z_m`` (given or assumed).
    Then the height is also read from the delays (:func:`height_profile`): when they point
    elsewhere the track is made again at that height, and the remaining height uncertainty
    enters the points, heading and speed (:mod:`locate.track.budget`).  The result's
    ``source_height`` says which.  None: the height is exact.

    With the automatic band (``band_hz`` None): when the whole band gives no track, or a track
    whose model misfit is gross (reduced chi-square above :data:`GROSS_MISFIT`: delays picked
    on side lobes), and the sound has harmonic lines (an engine or a propeller), the track is
    tried again in the band above its lines (:func:`locate.track.bands.band_above_lines_hz`);
    the result says which band it used and why.  A refusal names the band to try, or says that
    the band above the lines gave no track either.
    """
    auto = kwargs.get("band_hz") is None
    try:
        res = _track_one(signals, sample_rate_hz, mic_positions_m, sound_speed_mps,
                         source_z_sd_m, kwargs)
    except NothingFoundError as exc:
        if not auto or "stationary" in exc.message:
            raise
        # the automatic band found nothing: try the bands the sound itself points to, and
        # propose none that did not give a track here
        tried = []
        for band, why in _candidate_bands(signals, sample_rate_hz, mic_positions_m,
                                          sound_speed_mps):
            alt, fail = _in_band(band, signals, sample_rate_hz, mic_positions_m,
                                 sound_speed_mps, source_z_sd_m, kwargs)
            if alt is not None:
                alt.warnings.insert(0, "the whole band gave no track ("
                                       + exc.message.split(";")[0].split(": the whole")[0]
                                       + "); "
                                       f"tracked in {band[0]:.0f}-{band[1]:.0f} Hz, {why}")
                return alt
            tried.append(f"{band[0]:.0f}-{band[1]:.0f} Hz ({why}) gave none either: {fail}")
        if tried:
            exc.message += "; " + "; ".join(tried) + ("; no band to propose: none of those "
                                                      "gave a track")
        else:
            exc.message += "; no octave band gave a clear correlation peak between the mics either"
        raise
    if auto and not res.adequate and _reduced(res) > GROSS_MISFIT:
        lines = _lines_band(signals, sample_rate_hz)
        if lines is not None:
            band = (lines[0], lines[1])
            alt, _ = _in_band(band, signals, sample_rate_hz, mic_positions_m,
                              sound_speed_mps, source_z_sd_m, kwargs)
            if alt is not None and (alt.adequate or _reduced(alt) < _reduced(res)):
                alt.warnings.insert(0, f"the whole band gave delays that no path explains "
                                       f"(reduced chi-square {_reduced(res):.0f}); tracked in "
                                       f"{band[0]:.0f}-{band[1]:.0f} Hz, " + _lines_note(lines))
                return _trustworthy(alt, kwargs)
    if not auto:
        res.band_hz = tuple(float(b) for b in kwargs["band_hz"])
    return _trustworthy(res, kwargs)


GROSS_MISFIT = 100.0  # reduced chi-square past any model error the widening should cover


def _trustworthy(res, kwargs):
    """``res``, or a refusal when the data chose the model and even it leaves the delays
    unexplained by more than :data:`GROSS_MISFIT` times their noise: a widened track that far
    from its delays says where the source is not, not where it is.  A model the user forced
    stays a flagged, widened track (the misfit then says the model is wrong)."""
    if kwargs.get("model", "straight") == "auto" and _reduced(res) > GROSS_MISFIT:
        band = (f" in {res.band_hz[0]:.0f}-{res.band_hz[1]:.0f} Hz"
                if res.band_hz is not None else "")
        raise NothingFoundError(
            f"no trustworthy track{band}: no motion model explains the delays (reduced "
            f"chi-square {_reduced(res):.0f} with the best, {res.model}; above "
            f"{GROSS_MISFIT:g} the widened ellipses would be guesses): the mics may hear "
            "several sources, strong reflections or a sound whose correlation repeats (an "
            "engine's or propeller's harmonic lines); try a band around the source's sound "
            "above its lines, a shorter span around the pass, or fix single moments with "
            "`tdoa fix`")
    return res


def _reduced(res):
    red = res.misfit.get("chi2_reduced") if res.misfit else None
    return float(red) if red is not None else 0.0


def _lines_band(signals, sample_rate_hz):
    try:
        return track_bands.band_above_lines_hz(signals, sample_rate_hz)
    except (ValueError, FloatingPointError):
        return None


def _lines_note(lines):
    return (f"above the sound's harmonic lines (up to {lines[2]:.0f} Hz: an engine's or a "
            "propeller's), whose correlation repeats at their spacing and drifts with the "
            "Doppler shift")


def _candidate_bands(signals, sample_rate_hz, mic_positions_m, sound_speed_mps):
    """Bands to try when the whole band gives no track: [((lo, hi), why), ...]."""
    out = []
    lines = _lines_band(signals, sample_rate_hz)
    if lines is not None:
        out.append(((lines[0], lines[1]), _lines_note(lines)))
    try:
        best = coherent_band_hz(signals, sample_rate_hz, mic_positions_m, sound_speed_mps)
    except (ValueError, FloatingPointError, TdoaError):
        best = None
    if best is not None and (lines is None or abs(np.log2(best[0] / lines[0])) > 0.25
                             or abs(np.log2(best[1] / lines[1])) > 0.25):
        out.append(((best[0], best[1]), f"where the mics' correlation peaks stand highest "
                                        f"({best[2]:.0f} robust sd above the floor)"))
    return out


def _track_one(signals, fs, mics, c, source_z_sd_m, kwargs):
    """One track in the kwargs' band: the height read from the delays too when uncertain."""
    if source_z_sd_m is None or float(source_z_sd_m) <= 0 or kwargs.get("dims", 2) != 2:
        return _track_recording(signals, fs, mics, c, **kwargs)
    return _track_with_height(signals, fs, mics, c, float(source_z_sd_m), kwargs)


def _in_band(band, signals, sample_rate_hz, mic_positions_m, sound_speed_mps, source_z_sd_m,
             kwargs):
    """The track in ``band`` (lo, hi), or (None, why not)."""
    try:
        res = _track_one(signals, sample_rate_hz, mic_positions_m, sound_speed_mps,
                         source_z_sd_m, dict(kwargs, band_hz=(band[0], band[1])))
    except NothingFoundError as exc:
        return None, exc.message.split(";")[0]
    res.band_hz = (float(band[0]), float(band[1]))
    return res, ""


def _with_height_sd(sds, sd_m, n_mics):
    zero = np.zeros(n_mics)
    out = dict(sds) if sds else {"declared": {}, "position_m": zero, "height_m": zero,
                                 "clock_s": zero, "clock_group": np.zeros(n_mics, int),
                                 "sound_speed_mps": 0.0, "wind_mps": 0.0}
    out["source_height_m"] = float(sd_m)
    return out


def _track_with_height(signals, fs, mics, c, sd_m, kwargs):
    z0 = float(kwargs.get("source_z_m", 0.0))
    base = kwargs.get("nuisance_sds")
    first = _track_recording(signals, fs, mics, c,
                             **dict(kwargs, nuisance_sds=_with_height_sd(base, sd_m, len(mics))))
    prof = height_profile(first, mics, c, kwargs.get("wind_mps"), z0, sd_m)
    result = first
    moved = abs(prof["z_m"] - z0) > HEIGHT_MOVE_SDS * prof["sd_m"] and prof["chi2_drop"] > 4.0
    if moved:
        again = _track_recording(signals, fs, mics, c,
                                 **dict(kwargs, source_z_m=prof["z_m"],
                                        nuisance_sds=_with_height_sd(base, prof["sd_m"],
                                                                     len(mics))))
        if again.fit.chi2 <= first.fit.chi2 or not first.adequate:
            result = again
        else:
            moved = False
    result.source_height = dict(prof, used_z_m=float(prof["z_m"] if moved else z0),
                                used_sd_m=float(prof["sd_m"] if moved else sd_m),
                                from_delays=bool(moved))
    if moved:
        result.warnings.append(
            f"the delays place the source at {prof['z_m']:.2f} ± {prof['sd_m']:.2f} m height, "
            f"not the {z0:g} m given or assumed: the track was made at that height")
    return result


def coherent_band_hz(signals, sample_rate_hz, mic_positions_m, sound_speed_mps, *,
                     window_s=0.3, n_windows=8, min_score=6.0):
    """The octave bands in which the mics hear the same sound: a band to try.

    GCC-PHAT (Knapp & Carter 1976) of every pair over ``n_windows`` short windows spread over
    the span (short, so that a moving source's delay barely drifts within one; a coherence
    averaged over the whole span would cancel as the delay drifts), band by band (nominal
    octaves 31.5 Hz ... up to 0.45 fs, edges at mid / sqrt 2 and mid * sqrt 2, IEC 61260);
    a band's score is the peak height in robust standard deviations of its curve, the median
    over pairs in the window where it is highest.  The best band is widened by its neighbours
    that reach half its score.

    Returns
    -------
    (lo_hz, hi_hz, score) or None
        None when no band's score reaches ``min_score`` (the weak-peak limit of
        :data:`locate.signal.delays.WEAK_PEAK_SCORE`).
    """
    x = np.asarray(signals, float)
    fs = float(sample_rate_hz)
    mics = np.asarray(mic_positions_m, float)
    span = x.shape[1] / fs
    w = min(window_s, span)
    centres = np.linspace(w / 2.0, span - w / 2.0, max(1, min(n_windows, int(span / w))))
    pairs = np.stack(np.triu_indices(len(mics), k=1), axis=1)
    max_lag = geometric_max_lag_s(mics, pairs, sound_speed_mps)
    mids = 1000.0 * 2.0 ** np.arange(-5, 5)
    mids = mids[mids * np.sqrt(2.0) <= 0.45 * fs]
    vals = []
    for m in mids:
        _, cur = track_delays.gcc_curves(x, fs, 0.0, centres, w, pairs, max_lag,
                                         band_hz=(m / np.sqrt(2.0), m * np.sqrt(2.0)))
        r = np.abs(cur.astype(float))
        med = np.median(r, axis=-1)
        mad = 1.4826 * np.median(np.abs(r - med[..., None]), axis=-1)
        z = (r.max(axis=-1) - med) / np.maximum(mad, 1e-12)  # (W, P)
        vals.append(float(np.max(np.median(z, axis=1))))
    vals = np.array(vals)
    if vals.size == 0 or vals.max() < min_score:
        return None
    k = int(np.argmax(vals))
    lo = hi = k
    while lo > 0 and vals[lo - 1] >= 0.5 * vals[k]:
        lo -= 1
    while hi < len(vals) - 1 and vals[hi + 1] >= 0.5 * vals[k]:
        hi += 1
    return (float(mids[lo] / np.sqrt(2.0)), float(mids[hi] * np.sqrt(2.0)), float(vals[k]))


def _track_recording(signals, sample_rate_hz, mic_positions_m, sound_speed_mps, *, t0_s=0.0,
                    window_s=None, hop_s=None, band_hz=None, dims=2, source_z_m=0.0,
                    wind_mps=None, model="straight", segment_s=None, expected_speed_mps=20.0,
                    reference_mic=0, points_m=None, bearing_from_m=None, tone_hz=None,
                    passes=4, allow_stationary=False, nuisance_sds=None, progress=None):
    """Reconstruct a moving source's track from synchronised recordings.

    Parameters
    ----------
    signals : array_like, shape (N, T)
        The analysed span of every mic; sample 0 is at ``t0_s`` (recording time).
    sample_rate_hz : float
    mic_positions_m : array_like, shape (N, 3)
    sound_speed_mps : float
    t0_s : float
    window_s, hop_s : float, optional
        Track window and hop (default: :func:`locate.track.delays.default_window_s`).
    band_hz : (float, float), optional
        Analysis band (default: found from the data per window).
    dims : {2, 3}
        2: the source moves at height ``source_z_m``; 3: free height (aircraft).
    wind_mps : array_like, shape (3,), optional
    model : {"straight", "segments"}
    segment_s : float, optional
        Segment length of the ``"segments"`` model.
    expected_speed_mps : float
        Sets the default window.
    reference_mic : int
    points_m : array_like, shape (M, 3), optional
        Points for the closest approach (default: the mics; add receivers here).
    bearing_from_m : array_like, shape (3,), optional
        Where the heard-vs-now bearing lag is seen from (default: the reference mic).
    tone_hz : float or "auto" or None
        Track this tone (or the strongest one) for the Doppler speed; None: skip.
    passes : int
        Warped refinement passes at most.
    allow_stationary : bool
        Return a stationary-looking result instead of raising.
    nuisance_sds : dict, optional
        Declared survey, clock, sound-speed and wind sds
        (:func:`locate.accuracy.inputs.declared_sds`); they enter the points, heading and
        speed (:mod:`locate.track.budget`).  None or nothing declared: timing only, and the
        result says so.
    progress : callable(done, total), optional

    Returns
    -------
    TrackResult
        ``fit_inputs`` holds the final measured delays (for :func:`naive_fit`).

    Raises
    ------
    locate.errors.OptionError
        Bad window, hop, dims or model.
    locate.errors.NothingFoundError
        No coherent sound in the span, or the source appears stationary.
    """
    mics = np.asarray(mic_positions_m, float)
    fs = float(sample_rate_hz)
    c = float(sound_speed_mps)
    x = _check_inputs(signals, fs, mics, dims, model, c)
    v_guess = float(expected_speed_mps)
    if not (np.isfinite(v_guess) and 0.0 < v_guess < c):
        raise OptionError(f"the speed guess must be above 0 and below the sound speed "
                          f"({c:.0f} m/s), got {expected_speed_mps!r} m/s",
                          field="expected_speed_mps")
    w_def, h_def, plain_w = track_delays.default_window_s(mics, c, expected_speed_mps)
    window_given = window_s is not None
    window_s = w_def if window_s is None else float(window_s)
    hop_s = (window_s / 2.0 if window_s != w_def else h_def) if hop_s is None else float(hop_s)
    span_s = x.shape[1] / fs
    _check_span(span_s, window_s, hop_s, window_given)
    centres = track_delays.window_centres(x.shape[1], fs, t0_s, window_s, hop_s)
    plain_w = min(max(0.25, window_s), span_s)
    plain_c = track_delays.window_centres(x.shape[1], fs, t0_s, plain_w, plain_w)
    pairs = np.stack(np.triu_indices(len(mics), k=1), axis=1)
    wind_speed = 0.0 if wind_mps is None else float(np.linalg.norm(wind_mps))
    n_total = len(plain_c) + (passes + 1) * len(centres)
    done = [0]

    def tick(*_):
        done[0] += 1
        if progress is not None:
            progress(done[0], n_total)

    # pass 1: plain windows -> motion-tolerant SRP fixes -> RANSAC line -> SRP polish
    lo, hi = (20.0, 0.45 * fs) if band_hz is None else band_hz
    lobe = 1.0 / max(hi - lo, 1.0)
    lags, curves = track_delays.gcc_curves(
        x, fs, t0_s, plain_c, plain_w, pairs,
        geometric_max_lag_s(mics, pairs, c, wind_speed_mps=wind_speed), band_hz=band_hz,
        progress=tick)
    kw = dict(wind_mps=wind_mps, dims=dims, source_z_m=source_z_m, model=model,
              segment_s=segment_s, reference_mic=reference_mic,
              turn_sd_mps=0.5 * expected_speed_mps)
    fix_m, score = track_start.srp_fixes(lags, curves, plain_w, mics, pairs, c, wind_mps,
                                         dims=dims, source_z_m=source_z_m,
                                         expected_speed_mps=expected_speed_mps, lobe_s=lobe)
    good = score > 3.0 * np.sqrt(len(pairs))
    if good.sum() < 3:
        raise NothingFoundError(
            f"only {int(good.sum())} of the {len(plain_c)} start windows of {plain_w:g} s hold a "
            f"sound that all the mics hear alike (a track needs {MIN_START_WINDOWS}); check "
            "start_s/stop_s (is the source audible then?) and band_hz")
    origin = mics.mean(axis=0)
    u = fix_m - origin
    u /= np.maximum(np.linalg.norm(u, axis=1, keepdims=True), 1e-12)
    a, b, _ = track_start.bearing_line(plain_c[good], u[good], score[good], dims=dims)
    start, _ = track_start.scale_search(a, b, origin, plain_c, lags, curves, plain_w, mics,
                                        pairs, c, wind_mps, dims=dims, source_z_m=source_z_m,
                                        lobe_s=lobe, reference_mic=reference_mic)
    if start is None:
        raise NothingFoundError("no subsonic straight path fits the directions heard; check "
                                "--from/--to and --band")
    # candidates: the bearing line and the best cells of a coarse path grid, each polished
    # from a wide lag tolerance down to the main lobe; the highest final SRP wins
    cands, cum = track_start.grid_start(lags, curves, plain_c, plain_w, mics, pairs, c,
                                        wind_mps, dims=dims, source_z_m=source_z_m,
                                        expected_speed_mps=expected_speed_mps, lobe_s=lobe)
    best_s = -np.inf
    for cand in [start] + cands[:3]:
        pol, val = track_start.polish_path(cand, lags, curves, plain_c, plain_w, mics, pairs,
                                           c, wind_mps, dims=dims, source_z_m=source_z_m,
                                           lobe_s=lobe, floors_s=(0.02, 0.005, 0.0),
                                           maxfev=300, cum=cum)
        if val > best_s:
            start, best_s = pol, val

    # pass 2..: windows warped along the current path, reference-anchored model (straight)
    span = track_delays.emission_span_s(start, centres, window_s, mics[reference_mic], c,
                                        wind_mps)
    knots = knot_times(span[0], span[1], "straight", len(centres))
    kw["model"] = "straight"
    max_lag = min(0.02, window_s / 4.0)

    def measure(warp, tolerant, lag):
        eps, cov_w, ok_w = track_delays.warped_delays(
            x, fs, t0_s, centres, window_s, warp, mics, pairs, c, wind_mps=wind_mps,
            band_hz=band_hz, max_lag_s=lag, reference_mic=reference_mic,
            tolerant=tolerant, progress=tick)
        if not track_budget.timing_only(nuisance_sds):
            # the declared errors' share of each window's delay error (locate.track.budget)
            wpar = _par_of(warp, dims, source_z_m)
            cov_w = cov_w + track_budget.window_covariance_s2(
                wpar, wpar.theta(warp), centres, mics, pairs, c, wind_mps, nuisance_sds,
                reference_mic=reference_mic)
        if ok_w.sum(axis=1).max(initial=0) < dims + 1:
            short = len(centres) < 2 * MIN_TRACK_WINDOWS
            raise NothingFoundError(
                "the start path does not line up the mics' sound in any of the "
                f"{len(centres)} track windows"
                + (f": the span ({span_s:.3g} s) is probably too short for the start search "
                   "to find the path (widen --from/--to)" if short else "")
                + (" (searched band {:g}-{:g} Hz)".format(*band_hz) if band_hz is not None
                   else ("; or" if short else ":") + " the whole band was searched, give "
                   "--band around the source's sound (e.g. its octaves above the background)")
                + "; a source passing close to the mics may need a shorter --window")
        return eps, cov_w, ok_w, warp

    def next_lag(f):
        # next search: a few times what the path leaves unexplained, plus two lobes
        return float(np.clip(8.0 * f.residual_rms_s + 2.0 * lobe, 2e-3, min(0.02, window_s / 4)))

    warp = start
    fit = None
    meas = None
    n_ok = 0
    for k in range(passes + 1):
        tolerant = k == 0
        meas = measure(warp, tolerant, max_lag)
        new = fit_path(centres, meas[0], meas[1], mics, pairs, c, usable=meas[2], warp=warp,
                       initial=warp, robust=tolerant, knots_s=knots, **kw)
        moved = np.max(np.linalg.norm(new.path.position_m(new.t_emit_s)
                                      - warp.position_m(new.t_emit_s), axis=1))
        fit, warp = new, new.path
        max_lag = next_lag(fit)
        sd = np.sqrt(np.max(np.linalg.eigvalsh(fit.covariance)))
        n_ok, n_ok_prev = (0 if tolerant else int(meas[2].sum())), n_ok
        if k >= 2 and moved < max(0.5 * sd, 0.05) and n_ok <= 1.02 * n_ok_prev:
            break

    # motion model chosen by the data (locate.track.models), then re-measured along it
    fit_kw = dict(wind_mps=wind_mps, dims=dims, source_z_m=source_z_m,
                  reference_mic=reference_mic)
    chosen = track_models.Candidate("straight", fit)
    candidates = [chosen]
    straight_fit = fit
    if model != "straight":
        structure = None
        wide = min(0.05, window_s / 4.0)
        n_tol = 0
        for rnd in range(5):
            # tolerant rounds (drift-tolerant peaks over a wide search, robust fits) while the
            # chosen path still leaves windows unexplained; then fine rounds
            tol = n_tol < 4 and (rnd == 0 or chosen.fit.used.mean() < 0.9
                                 or track_models.adequacy(chosen.fit)["bad_window_fraction"]
                                 > track_models.BAD_WINDOW_FRACTION)
            n_tol += tol
            data = (centres,) + meas + (mics, pairs, c, fit_kw)
            chosen, candidates = track_models.choose_model(model, straight_fit, data,
                                                            segment_s=segment_s)
            key = (chosen.model, chosen.fit.par.n_knots)
            if chosen.model == "straight" and rnd == 0:
                break
            if not tol and key == structure:
                break
            structure = key
            warp = chosen.fit.path
            meas = measure(warp, tol, wide if tol else next_lag(chosen.fit))
            # the same structure refitted to the new delays, and the straight one beside it
            fit = fit_path(centres, meas[0], meas[1], mics, pairs, c, usable=meas[2],
                           warp=warp, initial=warp, knots_s=chosen.fit.par.knot_times_s,
                           degree=chosen.fit.par.degree, **fit_kw)
            chosen = track_models.Candidate(chosen.model, fit)
            straight_fit = fit_path(centres, meas[0], meas[1], mics, pairs, c,
                                    usable=meas[2], warp=warp, initial=straight_fit.path,
                                    knots_s=straight_fit.par.knot_times_s, degree=1, **fit_kw)
        if chosen.model == "segments" and segment_s is None and chosen.fit.par.n_knots > 2:
            # last: drop the knots the final delays do not need (backward elimination)
            data = (centres,) + meas + (mics, pairs, c, fit_kw)
            chosen = track_models.prune(chosen, data, chosen.fit.used)
            able = chosen.fit.window_dof >= dims + 1
            chosen = track_models.polish_knots(chosen, data, able)
            # and the delays measured once more along the polished path
            warp = chosen.fit.path
            meas = measure(warp, False, next_lag(chosen.fit))
            fit = fit_path(centres, meas[0], meas[1], mics, pairs, c, usable=meas[2],
                           warp=warp, initial=warp, knots_s=chosen.fit.par.knot_times_s,
                           degree=1, **fit_kw)
            chosen = track_models.Candidate(chosen.model, fit)
        fit = chosen.fit
    # Overlapping windows share samples, so their delay errors are correlated (for a
    # rectangular window the correlation of windows k hops apart is 1 - k hop / window); the
    # fit treats windows as independent.  Scale the path covariance by the long-run variance
    # factor 1 + 2 sum_k max(0, 1 - k hop / window) of such a sequence (common practice for
    # averages of overlapping segments).
    fit = dataclasses.replace(fit, covariance=fit.covariance * overlap_factor(window_s, hop_s),
                              covariance_scale=fit.covariance_scale
                              * overlap_factor(window_s, hop_s))
    # Errors shared by neighbouring windows beyond their overlap (slowly varying delay biases
    # of a distant fast source, the warp's linearisation) do not average down over the
    # windows: a delete-one-block jackknife over contiguous blocks of windows (Kuensch 1989,
    # Ann. Statist. 17(3)) sees them; the larger of the two covariances is kept.
    fit = _block_jackknife(fit, centres, meas, mics, pairs, c, fit_kw)
    describe_kw = dict(bearing_from_m=bearing_from_m, points_m=points_m, model=chosen.model)
    if track_budget.has_declared(nuisance_sds):
        bud = track_budget.track_budget(fit, meas[1], meas[2], mics, pairs, c, wind_mps,
                                        nuisance_sds)
        timing_cov = describe_fit(fit, mics, c, wind_mps, **describe_kw).covariance_m2
        fit = dataclasses.replace(fit, covariance=fit.covariance + bud["theta_cov"])
        result = describe_fit(fit, mics, c, wind_mps, **describe_kw)
        result.covariance_m2 = timing_cov + bud["point_cov"]
        shares = {k: round(v, 4) for k, v in bud["components"].items()}
        only = track_budget.timing_only(nuisance_sds)
        note = (track_budget.TIMING_AND_HEIGHT_NOTE if only else "includes the declared "
                + ", ".join(f"{k.replace('_', ' ')} ({100 * v:.0f} % of the added variance)"
                            for k, v in shares.items())
                + " uncertainties (first-order propagation)")
        result.uncertainty = {"declared": not only, "timing_only": only,
                              "components_share": shares, "note": note}
    else:
        result = describe_fit(fit, mics, c, wind_mps, **describe_kw)
        result.uncertainty = {"declared": False, "timing_only": True,
                              "note": track_budget.TIMING_ONLY_NOTE}
    if dims == 2:
        result.uncertainty["note"] += track_budget.GROUND_NOTE
    eps, cov_w, ok_w, warp_used = meas
    wpar = _par_of(warp_used, dims, source_z_m)
    pred_w = predict_delays(wpar, wpar.theta(warp_used), centres, mics, pairs, c, wind_mps,
                            reference_mic=reference_mic, jacobian=False)[0]
    result.fit_inputs = {"pairs": pairs, "absolute_delays_s": pred_w + eps,
                         "covariance_s2": cov_w, "usable": ok_w, "window_s": window_s,
                         "hop_s": hop_s, "plain_window_s": plain_w}
    _assess(result, chosen, candidates, model, meas, mics, pairs, c, wind_mps)
    if result.stationary and not allow_stationary:
        raise NothingFoundError(stationary_message(result))
    if tone_hz is not None:
        result.doppler = doppler.doppler_speed(x, fs, t0_s, centres, window_s, result, mics, c,
                                               wind_mps=wind_mps, tone_hz=tone_hz)
    return result


JACKKNIFE_BLOCKS = 8
"""Contiguous blocks of windows of the delete-one-block jackknife (:func:`_block_jackknife`)."""


def _block_jackknife(fit: PathFit, centres, meas, mics, pairs, c, fit_kw):
    """``fit`` with its covariance raised to the delete-one-block jackknife covariance.

    The windows are cut into :data:`JACKKNIFE_BLOCKS` contiguous blocks; the path is refitted
    without each block in turn (same knots, degree and measured delays) and the jackknife
    covariance ``(B - 1) / B * sum_b (theta_b - mean)(theta_b - mean)^T`` (Kuensch 1989) is
    compared with the formal one in the formal one's whitened frame: directions where the
    jackknife is larger take its variance, the others keep the formal one (so the result is
    never smaller than the formal covariance).  Blocks whose removal leaves a knot interval
    without data are skipped; with fewer than five refits, or for a curved (degree 2) path
    whose end blocks would be extrapolated, the fit is returned unchanged.
    """
    eps, cov_w, ok_w, warp = meas
    used = np.flatnonzero(fit.used)
    if used.size < 4 * JACKKNIFE_BLOCKS or fit.par.degree != 1:
        return fit
    blocks = np.array_split(used, JACKKNIFE_BLOCKS)
    kt = fit.par.knot_times_s
    thetas = []
    for blk in blocks:
        keep = ok_w.copy()
        keep[blk] = False
        t_left = fit.t_emit_s[np.setdiff1d(used, blk)]
        # every knot interval still needs windows of its own
        counts = np.histogram(t_left, bins=kt)[0] if kt.size > 2 else [t_left.size]
        if np.min(counts) < 3:
            continue
        try:
            jf = fit_path(centres, eps, cov_w, mics, pairs, c, usable=keep, warp=warp,
                          initial=fit.path, knots_s=kt, degree=fit.par.degree, **fit_kw)
        except (ValueError, np.linalg.LinAlgError, NothingFoundError):
            continue
        if np.all(np.isfinite(jf.theta)) and jf.theta.shape == fit.theta.shape:
            thetas.append(jf.theta)
    nb = len(thetas)
    if nb < 5:
        return fit
    th = np.array(thetas)
    dev = th - th.mean(axis=0)
    jack = (nb - 1.0) / nb * dev.T @ dev
    try:
        chol = np.linalg.cholesky(fit.covariance)
    except np.linalg.LinAlgError:
        return fit
    inv = np.linalg.inv(chol)
    lam, vec = np.linalg.eigh(inv @ jack @ inv.T)
    grown = chol @ (vec * np.maximum(lam, 1.0)) @ vec.T @ chol.T
    return dataclasses.replace(fit, covariance=0.5 * (grown + grown.T))


track_recording.__doc__ = _track_recording.__doc__


def _par_of(path, dims, source_z_m):
    """The parametrisation that represents ``path`` exactly."""
    degree = path.degree if isinstance(path, SplinePath) else 1
    return Parametrisation(path.knot_times_s, dims, source_z_m, degree)


def _assess(result: TrackResult, chosen, candidates, requested, meas, mics, pairs, c, wind):
    """Model choice, misfit verdict and - when the model does not explain the windows -
    point, heading and speed uncertainties grown to cover it (locate.track.models)."""
    fit = result.fit
    result.model_requested = requested
    result.candidates = [cd.summary() for cd in candidates]
    straight = next((cd for cd in candidates if cd.model == "straight"), None)
    if requested == "straight":
        result.model_reason = "requested (--model straight)"
    elif len(candidates) == 1:
        result.model_reason = "only candidate"
    else:
        listed = ", ".join(f"{cd.model} ({cd.fit.par.n_knots - 1} interval(s), degree "
                           f"{cd.fit.par.degree}) {cd.bic:.6g}" for cd in candidates)
        result.model_reason = (f"{chosen.model}: lowest BIC = chi2 + k ln n among the "
                               f"candidates fitted to the same delays ({listed})"
                               + ("; knots then pruned and their times polished"
                                  if chosen.model == "segments" else ""))
    adq = track_models.adequacy(fit)
    result.misfit = adq
    result.adequate = adq["adequate"]
    result.turns = track_models.turns(fit)
    result.straight_holds = bool(chosen.model == "straight" and adq["adequate"])
    if chosen.model != "straight" and straight is not None and requested == "auto":
        result.warnings.append(
            f"the source does not move in a straight line (the {chosen.model} model fits the "
            f"delays better by the BIC): heading and speed are given per track point; the "
            f"overall values are a mean over the span")
    if adq["adequate"]:
        return
    eps, cov_w, ok_w, _ = meas
    shift, wcov = track_models.window_displacements(fit, eps, cov_w, ok_w, mics, pairs, c, wind)
    shift = np.where(np.isfinite(shift), shift, 0.0)
    red_w = adq["window_chi2_reduced"]
    # a window with too few usable delays for its own fix says nothing about the model error
    # at its point: it gets the largest error seen at any other point (conservative)
    alone = fit.window_dof < fit.par.dims + 1
    if alone.any() and (~alone).any():
        size = np.einsum("wii->w", wcov) * np.maximum(red_w, 1.0) + np.sum(shift**2, axis=1)
        k = int(np.argmax(np.where(alone, -np.inf, size)))
        wcov[alone] = wcov[k] * max(red_w[k], 1.0)
        shift[alone] = shift[k]
        red_w = np.where(alone, 1.0, red_w)
    result.covariance_m2 = track_models.inflate(result.covariance_m2, shift, wcov, red_w)
    result.covariance_now_m2 = track_models.inflate(result.covariance_now_m2, shift, wcov, red_w)
    t = result.t_emit_s
    if t.size >= 3:  # velocity error implied by the changing displacement
        dv = np.gradient(shift, t, axis=0)
        result.point_velocity_covariance = (result.point_velocity_covariance
                                            + np.einsum("wi,wj->wij", dv, dv))
        rms_dv = np.sqrt(np.mean(np.sum(dv**2, axis=1)))
        result.velocity_covariance = result.velocity_covariance + np.eye(3) * rms_dv**2 / 3
        hd = _heading_speed(result.velocity_mps, result.velocity_covariance)
        result.heading_sd_deg, result.speed_sd_mps = hd[1], hd[3]
    result.warnings.append(
        f"the {chosen.model} model does not explain the windows (reduced chi-square "
        f"{adq['chi2_reduced']:.1f}, limit {track_models.MISFIT_LIMIT:g}; "
        f"{100 * adq['bad_window_fraction']:.0f} % of windows beyond their 99.9 % limit, "
        f"{100 * adq['kept_fraction']:.0f} % of windows kept): the "
        "track is flagged and its ellipses, heading and speed uncertainties are widened to "
        "cover the model error")


def track_to_dict(result: TrackResult, mic_names, point_names=None) -> dict:
    """The ``"track"`` part of a ``tdoa-result/1`` JSON (schema in DESIGN.md, plus extras).

    Parameters
    ----------
    result : TrackResult
    mic_names : sequence of str
    point_names : sequence of str, optional
        Names of the closest-approach points (default: the mic names).

    Returns
    -------
    dict
    """
    names = list(mic_names if point_names is None else point_names)
    used = result.fit.used
    pts = []
    hd, hd_sd, sp, sp_sd = result.point_heading_speed()
    red_w = result.misfit.get("window_chi2_reduced")
    for w in range(len(result.t_heard_s)):
        pts.append({
            "heading_deg": float(hd[w]), "heading_sd_deg": float(hd_sd[w]),
            "speed_mps": float(sp[w]), "speed_sd_mps": float(sp_sd[w]),
            "misfit": None if red_w is None else float(red_w[w]),
            "t_emit_s": float(result.t_emit_s[w]), "t_heard_s": float(result.t_heard_s[w]),
            "t_emit_sd_s": (None if result.t_emit_sd_s is None
                            else float(result.t_emit_sd_s[w])),
            "position_m": result.position_m[w].tolist(),
            "covariance_m2": result.covariance_m2[w].tolist(),
            "position_now_m": result.position_now_m[w].tolist(),
            "lag_m": float(result.lag_m[w]), "lag_bearing_deg": float(result.lag_bearing_deg[w]),
            "lag_angle_deg": float(result.lag_angle_deg[w]), "used": bool(used[w]),
        })
    closest = [dict(c, name=names[c["index"]] if c["index"] < len(names) else str(c["index"]))
               for c in result.closest]
    for c in closest:
        c.pop("index")
    holds = result.straight_holds
    return {
        "points": pts,
        "band_hz": None if result.band_hz is None else list(result.band_hz),
        "heading_deg": result.heading_deg if holds else None,
        "heading_sd_deg": result.heading_sd_deg if holds else None,
        "speed_mps": result.speed_mps if holds else None,
        "speed_sd_mps": result.speed_sd_mps if holds else None,
        "mean_heading_deg": result.heading_deg, "mean_heading_sd_deg": result.heading_sd_deg,
        "mean_speed_mps": result.speed_mps, "mean_speed_sd_mps": result.speed_sd_mps,
        "straight_holds": holds,
        "model_requested": result.model_requested, "model_reason": result.model_reason,
        "model_candidates": result.candidates,
        "misfit_chi2_reduced": result.misfit.get("chi2_reduced"),
        "misfit_bad_window_fraction": result.misfit.get("bad_window_fraction"),
        "model_adequate": result.adequate, "flagged": not result.adequate,
        "turns": result.turns, "uncertainty": result.uncertainty,
        "uncertainty_note": result.uncertainty.get("note"),
        "velocity_mps": result.velocity_mps.tolist(), "model": result.model,
        "segments": result.segments, "closest_approach": closest,
        "bearing_from_m": result.bearing_from_m.tolist(),
        "knots": {"t_s": result.path.knot_times_s.tolist(),
                  "position_m": result.path.knot_positions_m.tolist()},
        "residual_rms_s": result.fit.residual_rms_s, "chi2": result.fit.chi2,
        "dof": result.fit.dof, "stationary": result.stationary,
        "doppler": result.doppler, "warnings": list(result.warnings),
        "source_height": result.source_height,
    }
