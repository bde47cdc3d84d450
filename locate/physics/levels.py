"""Sound levels: octave bands, source sound power, level at a receiver, barrier estimate.

Pure numpy; every function broadcasts over leading axes, with octave bands on the **last** axis
``(..., B)`` and time on the last axis of signals ``(..., T)``.  Levels are dB re 20 uPa (sound
pressure, ``lp``) or dB re 1 pW (sound power, ``lw``).  A band with no usable signal is NaN.

Sources
-------
* Octave bands, A-weighting, band levels of a signal: see :mod:`locate.physics.bands` (re-exported).
* Point-source spreading: ISO 9613-2:1996 eq. (7), A_div = 20 lg(d / 1 m) + 11 dB (textbook
  10 lg(4 pi) = 10.99 dB); hemispherical radiation over a reflecting plane: + 8 dB
  (10 lg(2 pi), textbook).
* Air absorption: ISO 9613-1:1993 through :func:`locate.physics.air.absorption_db_per_m`,
evaluated at
  the exact mid-band frequency as ISO 9613-2:1996 clause 7.2 does.
* Barrier: Maekawa, Z. (1968), Applied Acoustics 1, 157-173, the common fit 10 lg(3 + 20 N) dB
  with the Fresnel number N = 2 delta / lambda.
"""

from __future__ import annotations

import numpy as np

from locate.errors import OptionError, SiteFileError
from locate.physics.air import REFERENCE_PRESSURE_KPA, absorption_db_per_m
from locate.physics.air import sound_speed_mps as _sound_speed_mps
from locate.physics.bands import (
    OCTAVE_BANDS_HZ,
    a_weighting_db,
    background_corrected_db,
    band_edges_hz,
    energetic_mean_db,
    exact_mid_band_hz,
    lwa_db,
    octave_band_edges_hz,
    octave_band_levels_db,
)

__all__ = [
    # re-exported from locate.physics.bands
    "OCTAVE_BANDS_HZ",
    "exact_mid_band_hz",
    "band_edges_hz",
    "octave_band_edges_hz",
    "a_weighting_db",
    "octave_band_levels_db",
    "background_corrected_db",
    "energetic_mean_db",
    "lwa_db",
    # propagation
    "CAUTIONS",
    "MIN_DISTANCE_M",
    "air_attenuation_db",
    "source_power_level_db",
    "combine_mics",
    "level_uncertainty_db",
    "barrier_path_difference_m",
    "fresnel_number",
    "barrier_attenuation_db",
    "receiver_levels_db",
    "level_result",
]

MIN_DISTANCE_M = 0.5  # closer than this the point-source model has no meaning (common practice)
CAUTIONS = (
    "These levels are estimates from a few microphones, not a compliance measurement.",
    "Only spherical spreading, air absorption (ISO 9613-1) and a single-edge barrier estimate "
    "are modelled; ground effect, wind and temperature gradients, reflections and source "
    "directivity are not.",
    "A regulatory noise assessment must follow the local code and the practice of a competent, "
    "licensed person.",
    "Recording people (speech) may be regulated where you are; check before you record.",
)

_MAEKAWA_ZERO_N = -0.1  # 3 + 20 N = 1 here: the fit reaches 0 dB, continuous cut-off
_DB = 10.0 / np.log(10.0)  # 4.343 dB per neper of power


def air_attenuation_db(distance_m, bands_hz, temperature_c, relative_humidity,
                       pressure_kpa=REFERENCE_PRESSURE_KPA, *, absorption="mid-band"):
    """Atmospheric absorption over a path, per band, dB, shape ``(..., B)``.

    Parameters
    ----------
    distance_m : array_like, shape (...)
        Path length, m.
    bands_hz : sequence of float, shape (B,)
        Nominal octave (or one-third-octave) mid-band frequencies.
    temperature_c, relative_humidity, pressure_kpa : float
        Air state (degC, percent, kPa).
    absorption : {"mid-band", "band-average"}
        ``"mid-band"``: alpha(f_m) d, as ISO 9613-2:1996 clause 7.2.  ``"band-average"``: the
        band loss of a spectrum flat per hertz across the band's exact edges,
        -10 lg(mean over the band of 10^(-alpha(f) d / 10)); it matters at long range in dry air
        at 4-8 kHz, where the mid-band value overstates the loss of a band by several dB.
    """
    r = np.asarray(distance_m, dtype=float)[..., None]
    fm = exact_mid_band_hz(bands_hz)
    if absorption == "mid-band":
        return absorption_db_per_m(fm, temperature_c, relative_humidity, pressure_kpa) * r
    if absorption != "band-average":
        raise OptionError(f"absorption must be 'mid-band' or 'band-average', got {absorption!r}",
                          field="absorption")
    lo, hi = band_edges_hz(bands_hz)  # octave or one-third-octave edges, IEC 61260-1
    steps = (np.arange(256) + 0.5) / 256  # midpoint rule, uniform in hertz
    grid = lo[:, None] + (hi - lo)[:, None] * steps  # (B, 256)
    alpha = absorption_db_per_m(grid, temperature_c, relative_humidity, pressure_kpa)
    loss = alpha * r[..., None]  # (..., B, 256)
    return -10.0 * np.log10(np.mean(10.0 ** (-loss / 10.0), axis=-1))


def _divergence_db(distance_m, hemisphere):
    r = np.asarray(distance_m, dtype=float)
    if np.any(~(r > 0)):
        raise OptionError(f"distances must be > 0 m, got {distance_m!r}", field="distance_m")
    # ISO 9613-2:1996 eq. (7): 20 lg(d) + 11 dB; half space over a reflecting plane: + 8 dB
    return 20.0 * np.log10(r) + (8.0 if hemisphere else 11.0)


def source_power_level_db(lp_db, distance_m, bands_hz, temperature_c, relative_humidity,
                          pressure_kpa=REFERENCE_PRESSURE_KPA, *, hemisphere=False,
                          absorption="mid-band"):
    """Sound power level of a point source from band levels heard at known distances.

    Parameters
    ----------
    lp_db : array_like, shape (..., B)
        Band sound pressure levels at the mics, dB re 20 uPa.
    distance_m : array_like, shape (...)
        Source-mic distances, m.
    bands_hz : sequence of float, shape (B,)
        Nominal mid-band frequencies.
    temperature_c, relative_humidity, pressure_kpa : float
        Air state for the absorption.
    hemisphere : bool
        Source on a reflecting ground radiating into a half space (8 dB instead of 11 dB).
    absorption : {"mid-band", "band-average"}
        See :func:`air_attenuation_db`.

    Returns
    -------
    ndarray, shape (..., B)
        Lw = Lp + 20 lg r + 11 dB + A_atm, dB re 1 pW (ISO 9613-2:1996 eqs. (3), (7), (8)
        inverted); NaN propagates.  Near the source (r below a few source sizes) the
        point-source model does not hold.
    """
    lp = np.asarray(lp_db, dtype=float)
    adiv = _divergence_db(distance_m, hemisphere)[..., None]
    aatm = air_attenuation_db(distance_m, bands_hz, temperature_c, relative_humidity,
                              pressure_kpa, absorption=absorption)
    return lp + adiv + aatm


def combine_mics(lw_db):
    """Combine per-mic sound power estimates into one per band.

    Parameters
    ----------
    lw_db : array_like, shape (M, B)
        Lw estimated from each mic; NaN (or +-inf) where a mic's band is unusable.

    Returns
    -------
    lw_db : ndarray, shape (B,)
        Energetic mean over the mics with a usable value, 10 lg(mean 10^(Lw/10)).
    spread_db : ndarray, shape (B,)
        max - min over those mics (0 with one mic); NaN where no mic is usable.

    Notes
    -----
    Energetic rather than arithmetic: each mic samples the source's radiation in one
    direction, and sound power is the average intensity over the sphere, which is how
    ISO 3744 averages mean-square pressures over its measurement surface.  The energetic mean
    is at least the arithmetic mean of the dB values; they differ by about spread^2 / 35 dB
    for a small spread (0.3 dB for a 3 dB spread).
    """
    lw = np.asarray(lw_db, dtype=float)
    if lw.ndim != 2:
        raise ValueError(f"lw_db must have shape (M, B), got {lw.shape!r}")
    mean, count = energetic_mean_db(lw, axis=0)
    ok = np.isfinite(lw)
    spread = np.max(np.where(ok, lw, -np.inf), axis=0) - np.min(np.where(ok, lw, np.inf), axis=0)
    return mean, np.where(count > 0, spread, np.nan)


def level_uncertainty_db(distance_m, distance_sd_m, alpha_db_per_m=0.0):
    """Standard uncertainty of Lw (or Lp) from the distance uncertainty, dB.

    First-order propagation of 20 lg r + alpha r: sd_L = (20 / ln 10 / r + alpha) sd_r,
    i.e. 8.686 sd_r / r for spreading alone.  Shapes broadcast.
    """
    r = np.asarray(distance_m, dtype=float)
    return (2.0 * _DB / r + np.asarray(alpha_db_per_m, dtype=float)) * np.asarray(distance_sd_m)


def _check_height(height_m, label, field):
    h = float(height_m)
    if not (np.isfinite(h) and h > 0):
        raise SiteFileError(f"barrier {label!r} height must be a positive number of metres, "
                            f"got {height_m!r}", field=field)
    return h


def barrier_path_difference_m(source_m, receiver_m, line_m, height_m, *, label="barrier"):
    """Signed extra path over a barrier's top edge, m (NaN when the path does not cross it).

    Parameters
    ----------
    source_m, receiver_m : array_like, shape (3,)
        Positions, m (z up, ground at z = 0).
    line_m : array_like, shape (K, 2)
        The barrier in plan view (x, y), a polyline with K >= 2 vertices.
    height_m : float
        Height of the top edge above the z = 0 ground, m; must be > 0.

    Returns
    -------
    float
        delta = |S - T| + |T - R| - |S - R| with T the top edge above the point where the direct
        path crosses the line in plan; negative when the line of sight passes above the top.
        With several crossings the largest value (the most effective edge) is returned.
    """
    h = _check_height(height_m, label, "height_m")
    s = np.asarray(source_m, dtype=float)
    r = np.asarray(receiver_m, dtype=float)
    line = np.asarray(line_m, dtype=float)
    if line.ndim != 2 or line.shape[0] < 2 or line.shape[1] != 2:
        raise SiteFileError(f"barrier {label!r} line must be at least two (x, y) points, got "
                            f"shape {line.shape!r}", field="line_m")
    p, e = line[:-1], np.diff(line, axis=0)  # segments p + u e, 0 <= u <= 1
    d, w = r[:2] - s[:2], p - s[:2]  # direct path in plan: s + t d, 0 <= t <= 1
    denom = d[0] * e[:, 1] - d[1] * e[:, 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        t = (w[:, 0] * e[:, 1] - w[:, 1] * e[:, 0]) / denom
        u = (w[:, 0] * d[1] - w[:, 1] * d[0]) / denom
    hit = (denom != 0) & (t >= 0) & (t <= 1) & (u >= 0) & (u <= 1)
    if not np.any(hit):
        return float("nan")
    t = t[hit]
    top = np.column_stack([s[0] + t * d[0], s[1] + t * d[1], np.full(t.shape, h)])
    return float(np.max(_signed_delta(s, r, top)))


def _signed_delta(s, r, top):
    """Signed path difference over top points ``(H, 3)``: negative below the line of sight."""
    delta = (np.linalg.norm(top - s, axis=-1) + np.linalg.norm(r - top, axis=-1)
             - np.linalg.norm(r - s))
    d = r[:2] - s[:2]
    dd = float(d @ d)
    t = np.clip((top[:, :2] - s[:2]) @ d / dd, 0.0, 1.0) if dd > 0 else np.zeros(len(top))
    sight_z = s[2] + t * (r[2] - s[2])  # height of the line of sight where it passes the top
    return np.where(top[:, 2] >= sight_z, delta, -delta)


def fresnel_number(source_m, receiver_m, barrier, frequency_hz, sound_speed_mps):
    """Fresnel number N = 2 delta / lambda = 2 delta f / c of a barrier edge (Maekawa 1968).

    Parameters
    ----------
    source_m, receiver_m : array_like, shape (3,)
        Positions, m.
    barrier : array_like (3,), or tuple (line_m (K, 2), height_m), or ``locate.io.site.Barrier``
        Either the top-edge point itself, or the barrier in plan with its height (the top
        point is then found where the direct path crosses it, see
        :func:`barrier_path_difference_m`).
    frequency_hz : array_like, shape (F,)
        Frequencies, Hz (exact mid-band frequencies for octave bands).
    sound_speed_mps : float

    Returns
    -------
    ndarray, shape (F,)
        N, signed (negative when the line of sight clears the top); -inf when the direct path
        does not cross the barrier in plan (the barrier is not in the way, 0 dB).
    """
    s = np.asarray(source_m, dtype=float)
    r = np.asarray(receiver_m, dtype=float)
    if hasattr(barrier, "line_m") or (isinstance(barrier, tuple) and len(barrier) == 2):
        line, height, label = _barrier_parts(barrier, 0)
        delta = barrier_path_difference_m(s, r, line, height, label=label)
    else:
        top = np.asarray(barrier, dtype=float)
        if top.shape != (3,):
            raise ValueError(f"barrier must be a top point (3,), a (line_m, height_m) tuple or a "
                             f"Barrier, got {barrier!r}")
        delta = float(_signed_delta(s, r, top[None, :])[0])
    f = np.asarray(frequency_hz, dtype=float)
    if np.isnan(delta):
        return np.full(f.shape, -np.inf)
    return 2.0 * delta * f / float(sound_speed_mps)


def barrier_attenuation_db(fresnel_n, cap_db=20.0):
    """Barrier insertion loss from the Fresnel number, dB (Maekawa 1968, common fit).

    Parameters
    ----------
    fresnel_n : array_like
        N; negative when the line of sight clears the top.
    cap_db : float or None
        Upper limit (20 dB by default, common practice; ``None`` for none).

    Returns
    -------
    ndarray
        10 lg(3 + 20 N) for N >= -0.1, 0 dB below (the fit itself reaches 0 dB at N = -0.1,
        so the curve is continuous: 4.8 dB at grazing N = 0, 13.6 dB at N = 1, 20.1 dB at
        N = 5, against about 13 and 20 dB read from Maekawa's chart), capped; NaN stays NaN.
        From memory: this is ISO 9613-2 eq. (14) with C2 = 40, i.e. without its allowance
        for ground reflections.
    """
    n = np.asarray(fresnel_n, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        loss = np.where(n >= _MAEKAWA_ZERO_N, 10.0 * np.log10(3.0 + 20.0 * n), 0.0)
    loss = np.maximum(loss, 0.0)
    if cap_db is not None:
        loss = np.minimum(loss, float(cap_db))
    return np.where(np.isnan(n), np.nan, loss)


def _barrier_parts(barrier, index):
    """(line (K,2), height, label) from a locate.io.site.Barrier-like object or a tuple."""
    if hasattr(barrier, "line_m"):
        return barrier.line_m, barrier.height_m, getattr(barrier, "label", f"#{index + 1}")
    line, height = barrier[0], barrier[1]
    return line, height, f"#{index + 1}"


def receiver_levels_db(lw_db, source_m, receiver_m, bands_hz, temperature_c, relative_humidity,
                       pressure_kpa=REFERENCE_PRESSURE_KPA, *, barriers=(), sound_speed_mps=None,
                       hemisphere=False, absorption="mid-band", cap_db=20.0, receiver_name=None):
    """Predicted band levels at a receiver from the source sound power.

    Parameters
    ----------
    lw_db : array_like, shape (B,)
        Source sound power level per band, dB re 1 pW (NaN for unusable bands).
    source_m, receiver_m : array_like, shape (3,)
        Positions, m.
    bands_hz : sequence of float, shape (B,)
        Nominal mid-band frequencies.
    temperature_c, relative_humidity, pressure_kpa : float
        Air state.
    barriers : iterable
        ``locate.io.site.Barrier`` objects (``line_m`` (K,2), ``height_m``, ``label``) or
        ``(line_m, height_m)`` tuples.  Only the most effective one counts (no multiple
        diffraction).
    sound_speed_mps : float, optional
        For the wavelength; default :func:`locate.physics.air.sound_speed_mps` of the air state.
    hemisphere, absorption
        As in :func:`source_power_level_db`.
    cap_db : float or None
        Barrier cap, see :func:`barrier_attenuation_db`.
    receiver_name : str, optional
        Named in error messages.

    Returns
    -------
    dict
        ``distance_m`` (float), ``lp_db`` (B,) = Lw - 20 lg r - 11 - A_atm - A_bar (ISO 9613-2
        eqs. (3), (7)), ``lpa_db`` (float, :func:`lwa_db` of ``lp_db``), ``barrier_db`` (B,).

    Raises
    ------
    SiteFileError
        Receiver closer than :data:`MIN_DISTANCE_M` to the source; barrier height <= 0.
    """
    lw = np.asarray(lw_db, dtype=float)
    src = np.asarray(source_m, dtype=float)
    rcv = np.asarray(receiver_m, dtype=float)
    distance = float(np.linalg.norm(rcv - src))
    if not distance >= MIN_DISTANCE_M:
        who = f"receiver {receiver_name!r}" if receiver_name else "the receiver"
        raise SiteFileError(f"{who} is {distance:.2f} m from the source; a level prediction needs "
                            f"at least {MIN_DISTANCE_M} m", field="receivers")
    fm = exact_mid_band_hz(bands_hz)
    c = (_sound_speed_mps(temperature_c, relative_humidity, pressure_kpa)
         if sound_speed_mps is None else float(sound_speed_mps))
    barrier_db = np.zeros(fm.shape)
    for i, barrier in enumerate(barriers):  # a few barriers, not samples
        line, height, label = _barrier_parts(barrier, i)
        _check_height(height, label, f"barriers[{i}].height_m")
        n = fresnel_number(src, rcv, (line, height), fm, c)
        barrier_db = np.maximum(barrier_db, barrier_attenuation_db(n, cap_db))
    lp = (lw - _divergence_db(distance, hemisphere)
          - air_attenuation_db(distance, bands_hz, temperature_c, relative_humidity,
                               pressure_kpa, absorption=absorption)
          - barrier_db)
    return {"distance_m": distance, "lp_db": lp, "lpa_db": float(lwa_db(lp, bands_hz)),
            "barrier_db": barrier_db}


def _jsonable(values, decimals=2):
    a = np.round(np.asarray(values, dtype=float), decimals)
    if a.ndim == 0:
        return float(a) if np.isfinite(a) else None
    return [float(v) if np.isfinite(v) else None for v in a]


def level_result(bands_hz, lw_db, spread_db, receivers=(), *, cautions=CAUTIONS, **extra):
    """The ``"kind": "level"`` part of a ``tdoa-result/1`` document, JSON-ready.

    Parameters
    ----------
    bands_hz : sequence, shape (B,)
        Nominal mid-band frequencies (written as given).
    lw_db, spread_db : array_like, shape (B,)
        From :func:`combine_mics`.
    receivers : iterable of (name, dict)
        Names with the dicts of :func:`receiver_levels_db`.
    cautions : sequence of str
    **extra
        Further keys (already JSON-ready), e.g. ``lw_position_sd_db``.

    Returns
    -------
    dict
        Values rounded to 0.01 dB / 0.01 m; non-finite values as ``None`` (JSON null).
    """
    out = {
        "kind": "level",
        "bands_hz": [float(b) if float(b) % 1 else int(b) for b in bands_hz],
        "source_lw_db": _jsonable(lw_db),
        "source_lwa_db": _jsonable(lwa_db(lw_db, bands_hz)),
        "mic_spread_db": _jsonable(spread_db),
        "receivers": [{"name": str(name), "distance_m": _jsonable(r["distance_m"]),
                       "lp_db": _jsonable(r["lp_db"]), "lpa_db": _jsonable(r["lpa_db"]),
                       "barrier_db": _jsonable(r["barrier_db"])} for name, r in receivers],
        "cautions": list(cautions),
    }
    out.update(extra)
    return out
