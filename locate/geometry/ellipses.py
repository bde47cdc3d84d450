"""From covariance to what a client sees: confidence ellipses, the Cramer-Rao bound, GDOP.

Sources
-------
* Confidence region of a 2-D Gaussian: the ellipse x^T C^-1 x = k with k the chi-square
  quantile for 2 degrees of freedom (5.991 at 95 %, 1.386 at 50 %; scipy.stats.chi2).
* Cramer-Rao bound for TDOA location with Gaussian delay errors of covariance Q:
  CRLB = (J^T Q^-1 J)^-1 with J the Jacobian of the predicted delays with respect to the
  source position (Chan & Ho 1994, IEEE Trans. SP 42(8) 1905-1915, eq. (14) form).
* GDOP: sqrt(trace(CRLB)) / (c sigma) for equal, independent arrival-time errors sigma
  (common practice in radio and acoustic positioning).
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from locate.physics.air import travel_time_gradient

__all__ = [
    "chi2_scale",
    "ellipse",
    "ellipse_points",
    "delay_jacobian",
    "crlb_covariance",
    "gdop",
]


def chi2_scale(probability: float, dof: int = 2) -> float:
    """Chi-square quantile: the squared Mahalanobis radius of a ``probability`` region."""
    if not 0.0 < probability < 1.0:
        raise ValueError(f"probability must be in (0, 1), got {probability!r}")
    return float(stats.chi2.ppf(probability, dof))


def ellipse_arrays(covariance_m2, probability=0.95):
    """Confidence ellipses of many horizontal positions at once (the one ellipse function).

    Parameters
    ----------
    covariance_m2 : array_like, shape (..., 2, 2) or (..., 3, 3)
        Position covariances; only the horizontal (x, y) block is used.
    probability : float
        Coverage probability (chi-square with 2 degrees of freedom, :func:`chi2_scale`).

    Returns
    -------
    dict of numpy.ndarray, shape (...)
        ``semi_major_m``, ``semi_minor_m`` and ``azimuth_deg`` (of the major axis, clockwise
        from north, in [0, 180)); a non-finite covariance gives infinite axes and azimuth 0.

    Notes
    -----
    Closed-form eigen-decomposition of the symmetric 2 x 2 block [[a, b], [b, d]]: the
    eigenvalues are (a + d) / 2 +- sqrt(((a - d) / 2)^2 + b^2), the major axis at
    0.5 atan2(2b, a - d) counter-clockwise from +x (common practice).
    """
    c = np.asarray(covariance_m2, dtype=float)[..., :2, :2]
    a, d = c[..., 0, 0], c[..., 1, 1]
    b = 0.5 * (c[..., 0, 1] + c[..., 1, 0])
    ok = np.isfinite(a) & np.isfinite(b) & np.isfinite(d)
    a, b, d = (np.where(ok, v, 0.0) for v in (a, b, d))
    half = np.sqrt(0.25 * (a - d) ** 2 + b**2)
    big = np.clip(0.5 * (a + d) + half, 0.0, None)
    small = np.clip(0.5 * (a + d) - half, 0.0, None)
    k = chi2_scale(probability, 2)
    theta = 0.5 * np.degrees(np.arctan2(2.0 * b, a - d))  # major axis, ccw from +x
    azimuth = np.where(half > 0, (90.0 - theta) % 180.0, 0.0)
    return {"semi_major_m": np.where(ok, np.sqrt(k * big), np.inf),
            "semi_minor_m": np.where(ok, np.sqrt(k * small), np.inf),
            "azimuth_deg": np.where(ok, azimuth, 0.0)}


def ellipse(covariance_m2, probability=0.95):
    """Confidence ellipse of one horizontal position (:func:`ellipse_arrays` for one).

    Parameters
    ----------
    covariance_m2 : array_like, shape (2, 2) or (3, 3)
        Position covariance; only the horizontal (x, y) block is used.
    probability : float
        Coverage probability of the ellipse (chi-square with 2 degrees of freedom).

    Returns
    -------
    dict
        ``semi_major_m``, ``semi_minor_m`` and ``azimuth_deg`` (of the major axis, clockwise
        from north, in [0, 180)).
    """
    return {k: float(v) for k, v in ellipse_arrays(covariance_m2, probability).items()}


def ellipse_points(center_m, covariance_m2, probability=0.95, n=73):
    """Points on the confidence ellipse, shape (n, 2), closed (first == last)."""
    c = np.asarray(covariance_m2, dtype=float)[:2, :2]
    vals, vecs = np.linalg.eigh(0.5 * (c + c.T))
    k = chi2_scale(probability, 2)
    t = np.linspace(0.0, 2.0 * np.pi, n)
    circle = np.stack([np.cos(t), np.sin(t)], axis=-1)
    pts = circle * np.sqrt(k * np.clip(vals, 0, None))[None, :]
    return np.asarray(center_m, dtype=float)[:2] + pts @ vecs.T


def delay_jacobian(source_m, mic_positions_m, pairs, sound_speed_mps, *, dims=2, wind_mps=None):
    """Jacobian of the pair delays with respect to the source position.

    Returns
    -------
    ndarray, shape (P, dims)
        d(t_j - t_i)/d(source), seconds per metre; ``dims`` = 2 uses x, y only.
    """
    pairs = np.asarray(pairs, dtype=int)
    g = travel_time_gradient(np.asarray(source_m, float)[None, :], mic_positions_m,
                             sound_speed_mps, wind_mps)  # (N, 3)
    jac = g[pairs[:, 1]] - g[pairs[:, 0]]
    return jac[:, :dims]


def crlb_covariance(source_m, mic_positions_m, pairs, delay_covariance_s2, sound_speed_mps, *,
                    dims=2, wind_mps=None):
    """Cramer-Rao bound on the source position for the given delay covariance.

    Parameters
    ----------
    source_m : array_like, shape (3,)
    mic_positions_m : array_like, shape (N, 3)
    pairs : array_like, shape (P, 2)
    delay_covariance_s2 : array_like, shape (P, P)
        Covariance of the measured delays (may be singular for a redundant pair set; the
        pseudo-inverse is used).
    sound_speed_mps : float
    dims : {2, 3}
        2: horizontal position at a known height; 3: full position.
    wind_mps : array_like, shape (3,), optional

    Returns
    -------
    ndarray, shape (3, 3)
        Covariance bound in m^2; for ``dims`` = 2 the z row and column are zero.
    """
    jac = delay_jacobian(source_m, mic_positions_m, pairs, sound_speed_mps, dims=dims,
                         wind_mps=wind_mps)
    q = np.asarray(delay_covariance_s2, dtype=float)
    info = jac.T @ np.linalg.pinv(q, hermitian=True) @ jac
    out = np.zeros((3, 3))
    out[:dims, :dims] = np.linalg.inv(info)
    return out


def gdop(source_m, mic_positions_m, sound_speed_mps, *, dims=2, reference=0):
    """Geometric dilution of precision for TDOA against mic ``reference``.

    Equal, independent arrival-time errors are assumed (common practice): the delays to the
    reference then have covariance sigma^2 (I + 1 1^T).
    """
    pos = np.asarray(mic_positions_m, dtype=float)
    n = len(pos)
    others = [k for k in range(n) if k != reference]
    pairs = np.array([[reference, k] for k in others])
    q = np.eye(n - 1) + np.ones((n - 1, n - 1))
    cov = crlb_covariance(source_m, pos, pairs, q, sound_speed_mps, dims=dims)
    return float(np.sqrt(np.trace(cov)) / sound_speed_mps)
