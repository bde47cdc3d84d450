"""Monte Carlo propagation of the nuisance uncertainties, in the manner of JCGM 101:2008.

GUM Supplement 1 (JCGM 101:2008, clause 7) propagates distributions instead of first-order
variances: draw every input from its probability distribution, evaluate the measurement
function for each draw, and describe the output by the empirical distribution.  Here an input
draw is one "true" world - mic positions, recorder clocks, sound speed, wind, and the timing
noise of the delays - and the measurement function is the locator itself: the delays that
world would produce at the source are refitted with the *written* (nominal) model, as a real
survey would.  The empirical covariance of the refitted positions is compared with the
first-order one (:func:`locate.accuracy.budget.component_covariances`); JCGM 101:2008 clause 8 uses
such a comparison to validate the law of propagation of uncertainty, and where the two
disagree the Monte Carlo one is the one to report.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from locate.errors import TdoaError
from locate.geometry.ellipses import chi2_scale, ellipse
from locate.physics.air import travel_time_s

__all__ = ["MC_AGREEMENT", "HORIZON_APERTURES", "draw_delays", "monte_carlo_covariance",
           "axes_disagreement"]

MC_AGREEMENT = 0.10
"""First-order and Monte Carlo ellipse axes agreeing within this fraction count as agreeing
(issue 9); beyond it the propagation is too non-linear and the Monte Carlo ellipse is used."""


HORIZON_APERTURES = 50.0
"""A refit farther than this many array radii from the array centre has run away (the drawn
delays fit no source): it counts as unlocated, not as a position."""


def _sqrt_psd(q):
    """A square root L (L L^T = q) of a symmetric positive semi-definite matrix."""
    q = 0.5 * (q + q.T)
    vals, vecs = np.linalg.eigh(q)
    return vecs * np.sqrt(np.clip(vals, 0.0, None))[None, :]


def draw_delays(source_m, mic_positions_m, pairs, timing_covariance_s2, sound_speed_mps, *,
                sds, wind_mps=None, n_draws, rng):
    """Pair delays of ``n_draws`` worlds drawn from the declared distributions.

    Every input is Gaussian with the declared sd (JCGM 101:2008, 6.4.7): each mic's true
    position (x, y with ``position_m``, z with ``height_m``), one clock error per clock group,
    the sound speed, each horizontal wind component, and the timing noise of the delays
    (covariance ``timing_covariance_s2``).

    Parameters
    ----------
    source_m : array_like, shape (3,)
    mic_positions_m : array_like, shape (N, 3)
        The written (nominal) positions.
    pairs : array_like, shape (P, 2)
    timing_covariance_s2 : array_like, shape (P, P)
    sound_speed_mps : float
    sds : dict
        From :func:`locate.accuracy.budget.nuisance_sds` /
        :func:`locate.accuracy.budget.declared_sds`.
    wind_mps : array_like (3,), optional
    n_draws : int
    rng : numpy.random.Generator

    Returns
    -------
    ndarray, shape (n_draws, P)
        Delays t_j - t_i, seconds.
    """
    src = np.asarray(source_m, dtype=float).reshape(3)
    mics = np.asarray(mic_positions_m, dtype=float)
    pairs = np.asarray(pairs, dtype=int).reshape(-1, 2)
    n, m = len(mics), int(n_draws)
    w = np.zeros(3) if wind_mps is None else np.asarray(wind_mps, dtype=float).reshape(3)
    sd_xyz = np.stack([sds["position_m"], sds["position_m"], sds["height_m"]], axis=1)
    true_mics = mics[None] + rng.standard_normal((m, n, 3)) * sd_xyz[None]
    groups = np.asarray(sds["clock_group"], dtype=int)
    uniq, col = np.unique(groups, return_inverse=True)
    sd_grp = np.array([np.max(sds["clock_s"][groups == g]) for g in uniq])
    clock = (rng.standard_normal((m, len(uniq))) * sd_grp)[:, col]  # (m, N)
    c = float(sound_speed_mps) + rng.standard_normal(m) * sds["sound_speed_mps"]
    dw = np.zeros((m, 3))
    dw[:, :2] = rng.standard_normal((m, 2)) * sds["wind_mps"]
    srcs = np.repeat(src[None, :], m, axis=0)
    srcs[:, 2] += rng.standard_normal(m) * float(sds.get("source_height_m", 0.0) or 0.0)
    t = travel_time_s(srcs[:, None, :], true_mics, c[:, None], (w + dw)[:, None, :]) + clock
    noise = rng.standard_normal((m, len(pairs))) @ _sqrt_psd(
        np.nan_to_num(np.asarray(timing_covariance_s2, dtype=float))).T
    return t[:, pairs[:, 1]] - t[:, pairs[:, 0]] + noise


def monte_carlo_covariance(source_m, mic_positions_m, delays, sound_speed_mps, *, sds,
                           wind_mps=None, n_draws=1000, rng=None, locate=None,
                           extra_covariance_s2=None, **locate_kwargs):
    """Empirical position covariance from refits of drawn worlds (JCGM 101:2008, clause 7).

    Parameters
    ----------
    source_m : array_like, shape (3,)
        Where the worlds put the source (the fix being checked).
    mic_positions_m : array_like, shape (N, 3)
        Written positions: the refits use these, as the real fix did.
    delays : locate.signal.delays.DelaySet
        Template: its pairs and timing covariance; the delays are replaced per draw.
    sound_speed_mps : float
        Nominal sound speed of the refits.
    sds : dict
    wind_mps : array_like (3,), optional
        Nominal wind.
    n_draws : int
        Number of worlds; the semi-axes carry a relative Monte Carlo error of about
        1 / sqrt(2 n_draws) (2 % for 1000).
    rng : numpy.random.Generator, optional
    locate : callable, optional
        The locator (default :func:`locate.fix.solver.locate_source`), called as
        ``locate(mic_positions_m, delays, sound_speed_mps, wind_mps=..., **locate_kwargs)``.
    extra_covariance_s2 : array_like (P, P), optional
        The nuisance delay covariance the real fix was weighted with (so the refits weight
        the pairs alike).
    **locate_kwargs
        ``dims``, ``source_z_m``, ...; ``reject`` defaults to False (the worlds hold no faulty
        mic, and the integrity test only adds time).

    Returns
    -------
    dict
        ``covariance_m2`` (3, 3): empirical covariance of the located draws; ``mean_m`` (3,);
        ``positions_m`` (n_ok, 3); ``region_covariance_m2`` (3, 3): the covariance scaled so
        that its 95 % ellipse holds 95 % of all draws (the hyper-ellipsoidal coverage region
        of JCGM 102:2011, 7.7.2, from memory: shape from the covariance, size from the sorted
        Mahalanobis distances; unlocated draws count as outside); ``coverage_factor`` (that
        scale); ``n_draws``; ``n_failed`` (draws whose refit raised a
        :class:`~locate.errors.TdoaError`, was not finite or ran beyond
        :data:`HORIZON_APERTURES` array radii).
    """
    if locate is None:
        from locate.fix.solver import locate_source as locate
    if int(n_draws) < 10:
        raise ValueError(f"n_draws must be at least 10, got {n_draws!r}")
    rng = np.random.default_rng(0) if rng is None else rng
    locate_kwargs.setdefault("reject", False)
    drawn = draw_delays(source_m, mic_positions_m, delays.pairs, delays.covariance_s2,
                        sound_speed_mps, sds=sds, wind_mps=wind_mps, n_draws=n_draws, rng=rng)
    unusable = ~np.isfinite(delays.delay_s)
    positions, failed = [], 0
    for row in drawn:
        d = dataclasses.replace(delays, delay_s=np.where(unusable, np.nan, row), curves=None)
        try:
            fix = locate(mic_positions_m, d, sound_speed_mps, wind_mps=wind_mps,
                         extra_covariance_s2=extra_covariance_s2, **locate_kwargs)
        except TdoaError:
            failed += 1
            continue
        positions.append(fix.position_m)
    pos = np.array(positions).reshape(-1, 3)
    mics = np.asarray(mic_positions_m, dtype=float)
    centre = mics[:, :2].mean(axis=0)
    radius = max(float(np.max(np.linalg.norm(mics[:, :2] - centre, axis=1))), 1.0)
    located = np.all(np.isfinite(pos), axis=1) & (
        np.linalg.norm(pos[:, :2] - centre, axis=1) <= HORIZON_APERTURES * radius)
    failed += int(np.sum(~located))
    pos = pos[located]
    nan3 = np.full((3, 3), np.nan)
    if len(pos) <= 3:
        return {"covariance_m2": nan3, "region_covariance_m2": nan3, "coverage_factor": np.nan,
                "mean_m": np.full(3, np.nan), "positions_m": pos, "n_draws": int(n_draws),
                "n_failed": failed}
    cov = np.cov(pos.T)
    mean = pos.mean(axis=0)
    dims = 2 if np.allclose(pos[:, 2], pos[0, 2]) else 3
    c = cov[:dims, :dims]
    dev = pos[:, :dims] - mean[:dims]
    maha = np.einsum("ki,ki->k", dev, np.linalg.solve(c, dev.T).T)
    maha = np.sort(np.concatenate([maha, np.full(failed, np.inf)]))
    k2 = float(maha[int(np.ceil(0.95 * len(maha))) - 1])  # JCGM 102:2011 7.7.2 (from memory)
    factor = k2 / chi2_scale(0.95, dims)
    region = cov * factor if np.isfinite(factor) else np.full((3, 3), np.inf)
    return {"covariance_m2": cov, "region_covariance_m2": region,
            "coverage_factor": float(factor), "mean_m": mean, "positions_m": pos,
            "n_draws": int(n_draws), "n_failed": int(failed)}


def axes_disagreement(reference_m2, other_m2, probability=0.95):
    """Largest relative difference of the ellipse semi-axes, max(|a'/a - 1|, |b'/b - 1|).

    Parameters
    ----------
    reference_m2, other_m2 : array_like, shape (2, 2) or (3, 3)
        Position covariances (horizontal block used).

    Returns
    -------
    float
        Dimensionless (0.1 is 10 %); ``inf`` when the reference is degenerate.
    """
    a = ellipse(reference_m2, probability)
    b = ellipse(other_m2, probability)
    out = 0.0
    for k in ("semi_major_m", "semi_minor_m"):
        if not (np.isfinite(a[k]) and a[k] > 0 and np.isfinite(b[k])):
            return float("inf")
        out = max(out, abs(b[k] / a[k] - 1.0))
    return float(out)
