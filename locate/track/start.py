"""A starting path for a moving source whose delays drift too fast for per-pair peaks.

Fast sources near long baselines spread a pair's correlation over a plateau (the drift of the
delay during the window) that noise can hide, so single peaks do not give delays; the
correlation is still there in sum.  The start is found by steered response power (the summed
correlation at predicted delays; the SRP of beamforming practice) with two changes for motion:

1. **Per window**: a grid of stationary positions around the array; each pair's curve is
   integrated over the lag interval that a source moving at up to the expected speed can sweep
   during the window (``window * v * |grad delay|``), divided by the noise that interval
   carries, and summed over pairs; the best cell is that window's position.
2. **Line**: the per-window directions are reliable where the ranges are not (a drift-tolerant
   sum flattens the range); a straight line through the directions by RANSAC (random sample
   consensus, Fischler & Bolles 1981, Comm. ACM 24(6) 381-395) fixes the path up to its scale,
   and the scale is the one with the highest path SRP (step 3's measure).
3. **Grid and polish**: the path's own SRP - each pair's envelope integrated over the interval
   its predicted delay sweeps during the window - over a coarse grid of straight paths
   (closest-approach time, heading, speed, miss distance, height) with a wide lag tolerance;
   the bearing line and the best grid paths are polished by Nelder-Mead while the tolerance
   shrinks to the main lobe (continuation), and the highest SRP wins.  The pair anchor of
   :mod:`locate.track.retarded` is approximated to first order here (delay rate times the offset of
   the pair centre), which is ample for a start.
"""

from __future__ import annotations

import numpy as np
from scipy import optimize, signal

from locate.physics import air
from locate.track.motion import Path
from locate.track.retarded import Parametrisation, predict_delays

__all__ = ["srp_fixes", "bearing_line", "scale_search", "path_srp", "polish_path"]


def _grid(mics, dims, source_z_m, lobe_s, c):
    centre = mics.mean(axis=0)
    ap = max(float(np.max(np.linalg.norm(mics - centre, axis=1))), 1.0)
    ranges = ap * np.geomspace(0.25, 30.0, 22)
    if dims == 2:
        az = np.deg2rad(np.arange(0.0, 360.0, 1.5))
        r, a = np.meshgrid(ranges, az, indexing="ij")
        pts = np.stack([centre[0] + r * np.sin(a), centre[1] + r * np.cos(a),
                        np.full(r.shape, source_z_m)], axis=-1).reshape(-1, 3)
    else:
        n = 2500
        k = np.arange(n) + 0.5
        z = k / n  # upper hemisphere, Fibonacci lattice (even area coverage)
        phi = np.pi * (1 + 5**0.5) * k
        u = np.stack([np.sqrt(1 - z**2) * np.cos(phi), np.sqrt(1 - z**2) * np.sin(phi), z], -1)
        pts = (centre + ranges[:, None, None] * u[None]).reshape(-1, 3)
    return pts


def _integrate(cum, lags_s, lo_s, hi_s):
    """Integral of curves (cumulative sums ``cum`` (..., L)) over [lo, hi] by interpolation."""
    dt = lags_s[1] - lags_s[0]
    def at(t):
        u = np.clip(np.nan_to_num((t - lags_s[0]) / dt, nan=0.0), 0.0, lags_s.size - 1.0)
        i = np.minimum(np.floor(u).astype(int), lags_s.size - 2)
        f = u - i
        a = np.take_along_axis(cum, i, axis=-1)
        b = np.take_along_axis(cum, i + 1, axis=-1)
        return a + f * (b - a)
    return at(hi_s) - at(lo_s)


def envelope(curves):
    """Hilbert envelope of correlation curves along the lag axis (scipy.signal.hilbert).

    A band-pass correlation integrates to about zero over more than a period of its lowest
    frequency, so a smeared peak must be summed as an envelope, not as signed values.
    """
    return np.abs(signal.hilbert(np.asarray(curves, float), axis=-1))


def _normalised(curves):
    """Envelopes minus their median, over their robust sd: their cumulative sums."""
    curves = envelope(curves)
    med = np.median(curves, axis=-1, keepdims=True)
    mad = 1.4826 * np.median(np.abs(curves - med), axis=-1, keepdims=True)
    z = (curves - med) / np.maximum(mad, 1e-12)
    return np.cumsum(z, axis=-1)


def srp_fixes(lags_s, curves, window_s, mic_positions_m, pairs, sound_speed_mps, wind_mps=None,
              *, dims=2, source_z_m=0.0, expected_speed_mps=20.0, lobe_s=1e-3):
    """Per-window positions by motion-tolerant steered response power (module docstring).

    Parameters
    ----------
    lags_s : ndarray, shape (L,)
    curves : ndarray, shape (W, P, L)
        From :func:`locate.track.delays.gcc_curves`.
    window_s : float
    mic_positions_m : array_like, shape (N, 3)
    pairs : array_like, shape (P, 2)
    sound_speed_mps : float
    dims : {2, 3}
    expected_speed_mps : float
    lobe_s : float
        Correlation main-lobe width (about 1 / bandwidth).

    Returns
    -------
    position_m : ndarray, shape (W, 3)
    score : ndarray, shape (W,)
        Summed pair scores at the best cell (robust standard deviations).
    """
    mics = np.asarray(mic_positions_m, float)
    pairs = np.asarray(pairs, int)
    ii, jj = pairs[:, 0], pairs[:, 1]
    pts = _grid(mics, dims, source_z_m, lobe_s, sound_speed_mps)
    tt = air.travel_time_s(pts[:, None, :], mics[None], sound_speed_mps, wind_mps)
    g = air.travel_time_gradient(pts[:, None, :], mics[None], sound_speed_mps, wind_mps)
    d = tt[:, jj] - tt[:, ii]  # (G, P)
    sweep = window_s * expected_speed_mps * np.linalg.norm(g[:, jj] - g[:, ii], axis=-1)
    dt = lags_s[1] - lags_s[0]
    cum = _normalised(curves)  # (W, P, L)
    n_w = curves.shape[0]
    best = np.zeros((n_w, 3))
    score = np.full(n_w, -np.inf)
    # the sweep bound assumes motion straight along the steepest delay change; the actual
    # sweep is usually much smaller, so try fractions of it and keep the best
    for frac in (0.03, 0.1, 0.3, 1.0):
        half = 0.5 * np.maximum(frac * sweep, lobe_s)
        noise = np.sqrt(2 * half / dt)  # sd of a sum of ~unit-variance lags (lobe-correlated)
        lo_t, hi_t = (d - half).T, (d + half).T  # (P, G)
        for w in range(n_w):  # loop over windows; grid and pairs vectorised
            s = (_integrate(cum[w], lags_s, lo_t, hi_t) / noise.T).sum(axis=0)
            k = int(np.argmax(s))
            if s[k] > score[w]:
                best[w], score[w] = pts[k], s[k]
    return best, score


def _ray_rows(t_s, u, dims):
    """Linear constraints cross(p(t) - O, u) = 0 on [p0 - O, v] (homogeneous), per window."""
    if dims == 2:
        r = np.stack([u[:, 1], -u[:, 0], t_s * u[:, 1], -t_s * u[:, 0]], axis=1)
        return r[:, None, :]  # (W, 1, 4)
    zero = np.zeros_like(u[:, 0])
    cx = np.stack([np.stack([zero, -u[:, 2], u[:, 1]], -1),
                   np.stack([u[:, 2], zero, -u[:, 0]], -1),
                   np.stack([-u[:, 1], u[:, 0], zero], -1)], axis=1)  # [u]x, (W, 3, 3)
    return np.concatenate([cx, cx * t_s[:, None, None]], axis=2)  # (W, 3, 6)


def _line_from(rows):
    _, _, vt = np.linalg.svd(rows.reshape(-1, rows.shape[-1]))
    return vt[-1]


def bearing_line(t_s, direction, weight, *, dims=2, tol_deg=5.0, rng=None):
    """Straight line (up to scale) through the directions seen from one point, by RANSAC.

    A constant-velocity path p(t) = O + (a + b t) seen from O in directions u(t) obeys
    cross(a + b t, u) = 0, linear and homogeneous in (a, b): its scale is free (the bearing-only
    ambiguity of target motion analysis, textbook).  Random samples of three windows
    (Fischler & Bolles 1981) give candidates; the one whose directions agree with most of the
    weight within ``tol_deg`` is refitted by SVD on its inliers.

    Parameters
    ----------
    t_s : ndarray, shape (W,)
    direction : ndarray, shape (W, 3)
        Unit vectors from O (only x, y used for ``dims=2``).
    weight : ndarray, shape (W,)
    dims : {2, 3}

    Returns
    -------
    a, b : ndarray, shape (3,)
        Offset and rate of the line relative to O, unit scale; ``a + b t`` points along the
        directions (not against them).
    inliers : ndarray, shape (W,) bool
    """
    rng = np.random.default_rng(0) if rng is None else rng
    t = np.asarray(t_s, float)
    t = t - t.mean()
    u = np.asarray(direction, float)[:, :dims]
    u = u / np.linalg.norm(u, axis=1, keepdims=True)
    rows = _ray_rows(t, u, dims)
    n = len(t)
    cos_tol = np.cos(np.deg2rad(tol_deg))
    best, best_w = None, -1.0
    samples = rng.integers(0, n, size=(min(600, max(60, n * 20)), 3))
    for smp in samples:  # a few hundred tiny SVDs
        if len(set(smp.tolist())) < 3:
            continue
        x = _line_from(rows[smp])
        pos = x[:dims] + t[:, None] * x[dims:]
        norm = np.linalg.norm(pos, axis=1)
        cos = np.einsum("wi,wi->w", pos, u) / np.maximum(norm, 1e-12)
        sign = 1.0 if np.sum(weight * np.sign(cos)) >= 0 else -1.0
        inl = sign * cos > cos_tol
        score = float(np.sum(weight[inl]))
        if score > best_w:
            best, best_w = (x * sign, inl), score
    x, inl = best
    if inl.sum() >= 3:
        x2 = _line_from(rows[inl])
        x = x2 if np.dot(x2, x) >= 0 else -x2
    a = np.zeros(3)
    b = np.zeros(3)
    a[:dims], b[:dims] = x[:dims], x[dims:]
    a = a - b * np.mean(np.asarray(t_s, float))  # back to absolute time
    return a, b, inl


def scale_search(a, b, origin, t_heard_s, lags_s, curves, window_s, mic_positions_m, pairs,
                 sound_speed_mps, wind_mps=None, *, dims=2, source_z_m=0.0, lobe_s=1e-3,
                 reference_mic=0):
    """Pick the scale of a bearing line by the path SRP; returns a straight Path."""
    mics = np.asarray(mic_positions_m, float)
    t_h = np.asarray(t_heard_s, float)
    rel = a + t_h[:, None] * b
    typical = float(np.median(np.linalg.norm(rel[:, :dims], axis=1)))
    ap = max(float(np.max(np.linalg.norm(mics - mics.mean(0), axis=1))), 1.0)
    best, best_s = None, -np.inf
    cum = _normalised(curves)
    for rng_m in ap * np.geomspace(0.3, 40.0, 40):
        q = origin + rel * (rng_m / max(typical, 1e-12))
        if dims == 2:
            q[:, 2] = source_z_m
        t_e = t_h - air.travel_time_s(q, mics[reference_mic], sound_speed_mps, wind_mps)
        design = np.stack([np.ones_like(t_e), t_e - t_e.mean()], axis=1)
        coef, *_ = np.linalg.lstsq(design, q, rcond=None)
        if np.linalg.norm(coef[1]) >= 0.9 * sound_speed_mps:
            continue
        path = Path(np.array([t_e.min(), t_e.max()]),
                    coef[0] + (np.array([t_e.min(), t_e.max()]) - t_e.mean())[:, None] * coef[1])
        s = path_srp(path, lags_s, curves, t_h, window_s, mics, pairs, sound_speed_mps,
                     wind_mps, dims=dims, source_z_m=source_z_m, lobe_s=lobe_s, cum=cum)
        if s > best_s:
            best, best_s = path, s
    return best, best_s


def path_srp(path, lags_s, curves, centres_s, window_s, mic_positions_m, pairs, sound_speed_mps,
             wind_mps=None, *, dims=2, source_z_m=0.0, lobe_s=1e-3, cum=None):
    """SRP of a path: each pair's curve integrated over the lags its delay sweeps in a window."""
    par = Parametrisation(path.knot_times_s, dims, source_z_m)
    return -_neg_srp(par.theta(path), par, _normalised(curves) if cum is None else cum, lags_s,
                     np.asarray(centres_s, float), window_s, np.asarray(mic_positions_m, float),
                     pairs, sound_speed_mps, wind_mps, lobe_s)


def _neg_srp(theta, par, cum, lags_s, c_s, window_s, mics, pairs, c, wind, lobe_s,
             floor_s=0.0):
    dt = lags_s[1] - lags_s[0]
    try:
        d0 = predict_delays(par, theta, c_s, mics, pairs, c, wind, anchor="pair",
                            jacobian=False)[0]
        d1 = predict_delays(par, theta, c_s + window_s / 2, mics, pairs, c, wind,
                            anchor="pair", jacobian=False)[0]
    except ValueError:  # supersonic trial path
        return 1e9
    half = np.maximum(np.abs(d1 - d0), max(0.5 * lobe_s, floor_s))
    val = _integrate(cum, lags_s, (d0 - half)[..., None], (d0 + half)[..., None])[..., 0]
    return -float(np.sum(val / np.sqrt(2 * half / dt)))


def polish_path(path: Path, lags_s, curves, centres_s, window_s, mic_positions_m, pairs,
                sound_speed_mps, wind_mps=None, *, dims=2, source_z_m=0.0, lobe_s=1e-3,
                floors_s=(0.0,), maxfev=800, cum=None):
    """Maximise the path's own SRP (module docstring, step 3) from a straight ``path``.

    Returns
    -------
    Path, float
        The polished path and its SRP.
    """
    mics = np.asarray(mic_positions_m, float)
    par = Parametrisation(path.knot_times_s[[0, -1]], dims, source_z_m)
    cum = _normalised(curves) if cum is None else cum
    theta = par.theta(path)
    value = None
    kt = par.knot_times_s
    t_c = np.asarray(centres_s, float)
    pairs = np.asarray(pairs, int)

    def neg(th, floor):
        pos = np.full((2, 3), float(source_z_m))
        pos[:, :dims] = th.reshape(2, dims)
        v = (pos[1] - pos[0]) / (kt[1] - kt[0])
        p0 = pos[0] - v * kt[0]
        val = float(_straight_scores(p0[None], v[None], t_c, cum, lags_s, window_s, mics,
                                     pairs, sound_speed_mps, wind_mps, floor, lobe_s)[0])
        return -val if np.isfinite(val) else 1e12  # supersonic trial: worst

    for k_floor, floor in enumerate(floors_s):  # continuation: wide tolerance first
        span = np.ptp(theta.reshape(2, dims), axis=0).max() + 1.0
        step = (0.1 if k_floor == 0 else 0.03) * span
        simplex = [theta] + [theta + np.eye(theta.size)[k] * step for k in range(theta.size)]
        sol = optimize.minimize(neg, theta, args=(floor,), method="Nelder-Mead",
                                options={"initial_simplex": np.array(simplex), "maxfev": maxfev,
                                         "xatol": 0.05, "fatol": 0.1})
        theta, value = sol.x, -sol.fun
    return par.path(theta), value


def _straight_scores(p0, v, t_c, cum, lags_s, window_s, mics, pairs, c, wind, floor_s, lobe_s):
    """Path SRP of many straight paths p0 + v t at once (approximate pair anchor), (H,)."""
    ii, jj = pairs[:, 0], pairs[:, 1]
    w = np.zeros(3) if wind is None else np.asarray(wind, float)
    u = v - w  # (H, 3)
    pos_h = p0[:, None, :] + v[:, None, :] * t_c[None, :, None]  # (H, W, 3) at t_c
    r = mics[0] - pos_h
    a = c**2 - np.sum(u * u, axis=-1)[:, None]
    # only subsonic paths have one emission time; the others score -inf (their quadratic
    # would give NaN lags)
    sub = a[:, 0] > (0.05 * c) ** 2
    a = np.where(a > (0.05 * c) ** 2, a, c**2)
    b = np.einsum("hwi,hi->hw", r, u)
    r2 = np.sum(r * r, axis=-1)
    q = np.sqrt(b**2 + a * r2)
    tau = np.where(b >= 0, (b + q) / a, r2 / np.maximum(q - b, 1e-12))
    e0 = t_c[None, :] - tau
    pos = p0[:, None, :] + v[:, None, :] * e0[..., None]
    arr = e0[..., None] + air.travel_time_s(pos[:, :, None, :], mics, c, wind)  # (H, W, N)
    g = air.travel_time_gradient(pos[:, :, None, :], mics, c, wind)
    gv = np.einsum("hwni,hi->hwn", g, v)
    d = arr[..., jj] - arr[..., ii]
    rate = (gv[..., jj] - gv[..., ii]) / (1.0 + gv[..., :1])
    d = d + rate * (t_c[None, :, None] - 0.5 * (arr[..., ii] + arr[..., jj]))
    half = np.maximum(np.abs(rate) * window_s / 2, max(0.5 * lobe_s, floor_s))
    dt = lags_s[1] - lags_s[0]
    n_w, n_p, n_l = cum.shape
    flat = cum.reshape(-1)
    base = (np.arange(n_w)[:, None] * n_p + np.arange(n_p)[None, :]) * n_l  # (W, P)

    def at(tt):
        x = np.clip(np.nan_to_num((tt - lags_s[0]) / dt, nan=0.0), 0.0, n_l - 1.0)
        i = np.minimum(np.floor(x).astype(int), n_l - 2)
        f = x - i
        return flat[base + i] * (1 - f) + flat[base + i + 1] * f

    with np.errstate(invalid="ignore", over="ignore"):
        val = (at(d + half) - at(d - half)) / np.sqrt(2 * half / dt)
        total = val.sum(axis=(1, 2))
    return np.where(sub & np.isfinite(total), total, -np.inf)


def grid_start(lags_s, curves, centres_s, window_s, mic_positions_m, pairs, sound_speed_mps,
               wind_mps=None, *, dims=2, source_z_m=0.0, expected_speed_mps=20.0, lobe_s=1e-3,
               floor_s=0.02, keep=6):
    """Best straight paths of a coarse grid (closest-approach time, heading, speed, miss
    distance, height) by the path SRP with a wide lag tolerance; returns a list of Paths."""
    mics = np.asarray(mic_positions_m, float)
    pairs = np.asarray(pairs, int)
    t_c = np.asarray(centres_s, float)
    cum = _normalised(curves)
    centre = mics.mean(axis=0)
    ap = max(float(np.max(np.linalg.norm(mics - centre, axis=1))), 1.0)
    heading = np.deg2rad(np.arange(0.0, 360.0, 15.0))
    # speeds from 0.4 to 2.4 times the guess, physical ones only (below 0.9 c)
    speed = expected_speed_mps * np.array([0.4, 0.75, 1.3, 2.4])
    speed = np.unique(np.clip(speed, 0.5, 0.9 * sound_speed_mps))
    if dims == 2:
        miss = ap * np.array([-4.0, -1.5, -0.5, 0.0, 0.5, 1.5, 4.0])
        height = [source_z_m]
    else:  # aircraft: up to ~35 apertures away and high up, at aircraft speeds too
        speed = np.unique(np.clip(np.concatenate([speed, [35.0, 60.0, 110.0, 200.0]]), 0.5,
                                  0.9 * sound_speed_mps))
        miss = ap * np.array([-25.0, -12.0, -4.0, -1.5, 0.0, 1.5, 4.0, 12.0, 25.0])
        height = list(centre[2] + ap * np.array([0.5, 1.2, 2.5, 6.0, 12.0, 22.0]))
    # closest approach *heard* within the span; its emission time is earlier by the travel
    # time from the closest point (retarded-time lags of seconds for distant sources)
    t_cpa = np.linspace(t_c[0], t_c[-1], 9)
    g = np.array(np.meshgrid(t_cpa, heading, speed, miss, height, indexing="ij")).reshape(5, -1)
    d_hat = np.stack([np.sin(g[1]), np.cos(g[1]), 0 * g[1]], -1)
    n_hat = np.stack([np.cos(g[1]), -np.sin(g[1]), 0 * g[1]], -1)
    cpa = centre + g[3][:, None] * n_hat
    cpa[:, 2] = g[4]
    vel = g[2][:, None] * d_hat
    t_emit = g[0] - np.linalg.norm(cpa - centre, axis=1) / sound_speed_mps
    p0 = cpa - vel * t_emit[:, None]  # position at t = 0
    scores = np.concatenate([
        _straight_scores(p0[k:k + 400], vel[k:k + 400], t_c, cum, lags_s, window_s, mics, pairs,
                         sound_speed_mps, wind_mps, floor_s, lobe_s)
        for k in range(0, len(p0), 400)])
    best = np.argsort(-scores)[:keep]
    knots = np.array([t_c[0], t_c[-1]])
    return [Path(knots, p0[k] + knots[:, None] * vel[k]) for k in best], cum
