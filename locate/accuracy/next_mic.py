"""Bad-geometry honesty: is an ellipse set by the array's shape rather than by its inputs?

A source outside the array is seen under a narrow angle: the range along the bearing is
poorly fixed whatever the inputs, and the ellipse grows long and radial.  GDOP
(:func:`locate.geometry.ellipses.gdop`; about 1 inside a good array) measures it.  When the
geometry limits a fix the budget says so and suggests where one more mic would help,
ranking candidates with the planning code (:func:`locate.accuracy.plan.propose_next_mic`) when it is
there.
"""

from __future__ import annotations

import numpy as np

from locate.geometry.ellipses import ellipse, gdop

__all__ = ["GDOP_LIMIT", "geometry_check", "suggest_mic"]

GDOP_LIMIT = 5.0
"""Above this GDOP (position sd per unit range sd; about 1 inside a good array) and outside
the array, the geometry, not the inputs, sets the ellipse."""


def geometry_check(source_m, mic_positions_m, covariance_m2, sound_speed_mps, *, dims=2):
    """Is the ellipse set by the geometry (source outside the array)?

    Returns
    -------
    dict
        ``gdop`` (:func:`locate.geometry.ellipses.gdop`), ``outside_array`` (bool: beyond every mic
        in the direction from the array centre), ``elongation`` (semi-major / semi-minor),
        ``radial`` (major axis within 30 deg of the bearing from the array centre),
        ``limited`` (outside and either GDOP above :data:`GDOP_LIMIT` or a radial ellipse
        more than 3x longer than wide), ``bearing_deg`` (from the array centre to the
        source, clockwise from north), ``distance_m`` and ``aperture_m`` (largest mic
        distance from the centre).
    """
    src = np.asarray(source_m, dtype=float).reshape(3)
    mics = np.asarray(mic_positions_m, dtype=float)
    centre = mics[:, :2].mean(axis=0)
    off = src[:2] - centre
    dist = float(np.hypot(*off))
    u = off / dist if dist > 0 else np.array([0.0, 1.0])
    reach = float(np.max((mics[:, :2] - centre) @ u))  # how far the array extends that way
    aperture = float(np.max(np.linalg.norm(mics[:, :2] - centre, axis=1)))
    outside = dist > reach
    e = ellipse(covariance_m2)
    elong = e["semi_major_m"] / max(e["semi_minor_m"], 1e-300)
    bearing = float(np.degrees(np.arctan2(u[0], u[1])) % 360.0)
    dev = abs((e["azimuth_deg"] - bearing + 90.0) % 180.0 - 90.0)
    g = gdop(src, mics, sound_speed_mps, dims=dims)
    radial = dev <= 30.0
    limited = bool(outside and (g > GDOP_LIMIT or (elong > 3.0 and radial)))
    return {"gdop": float(g), "outside_array": bool(outside), "elongation": float(elong),
            "radial": bool(radial), "limited": limited, "bearing_deg": bearing,
            "distance_m": dist, "aperture_m": aperture, "centre_m": centre}


def suggest_mic(source_m, mic_positions_m, geometry, sound_speed_mps, dims):
    """Where one more mic would help a source outside the array: (x, y, z) in metres.

    Candidates on rays at 0, +/-30 and +/-60 deg around the bearing from the array centre, at
    a quarter, half and three quarters of the way from the array's edge to the source; ranked
    by :func:`locate.accuracy.plan.propose_next_mic` when the planning module is there, otherwise
    the half-way point on the bearing (a mic there widens the aperture toward the source).
    """
    mics = np.asarray(mic_positions_m, dtype=float)
    centre, dist = geometry["centre_m"], geometry["distance_m"]
    edge = min(geometry["aperture_m"], dist)
    z = float(np.mean(mics[:, 2]))
    b0 = np.radians(geometry["bearing_deg"])
    fallback = np.array([*(centre + 0.5 * (edge + dist) * np.array([np.sin(b0), np.cos(b0)])),
                         z])
    try:
        from locate.accuracy.plan import propose_next_mic
    except ImportError:
        return fallback
    cand = [[*(centre + (edge + f * (dist - edge)) * np.array([np.sin(b), np.cos(b)])), z]
            for b in b0 + np.radians([0.0, 30.0, -30.0, 60.0, -60.0])
            for f in (0.25, 0.5, 0.75)]
    best = propose_next_mic(mics, np.array(cand), np.asarray(source_m, float)[None, :],
                            sound_speed_mps=sound_speed_mps, timing_sd_s=1e-5, dims=dims)
    return np.asarray(best[0].position_m, dtype=float)
