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
    TIME_CONSTANT_S,
    a_weighting_db,
    background_corrected_db,
    band_edges_hz,
    c_weighting_db,
    energetic_mean_db,
    exact_mid_band_hz,
    frequency_weighted,
    lwa_db,
    octave_band_edges_hz,
    octave_band_levels_db,
    time_weighted_ms,
    weighting_response,
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
    # coherent source power, ISO 9613-2, event measures
    "pair_cross_powers",
    "band_mean_squares",
    "coherent_source_power",
    "ground_attenuation_db",
    "iso9613_barrier_db",
    "event_measures",
    "receiver_event_measures",
    "c_weighted_total_db",
    "c_weighting_db",
    "frequency_weighted",
    "time_weighted_ms",
    "weighting_response",
    "TIME_CONSTANT_S",
]

MIN_DISTANCE_M = 0.5  # closer than this the point-source model has no meaning (common practice)
CAUTIONS = (
    "These levels are estimates from a few microphones, not a compliance measurement.",
    "Propagation to receivers is a screening estimate: spherical spreading, air absorption "
    "(ISO 9613-1), a single-edge barrier and, only when a ground factor is given, the ISO "
    "9613-2 ground effect (as recalled); wind and temperature gradients, reflections and "
    "source directivity are not modelled.",
    "A regulatory noise assessment must follow the local code and the practice of a competent, "
    "licensed person.",
    "Recording people (speech) may be regulated where you are; check before you record.",
)

_MAEKAWA_ZERO_N = -0.1  # 3 + 20 N = 1 here: the fit reaches 0 dB, continuous cut-off
_DB = 10.0 / np.log(10.0)  # 4.343 dB per neper of power
_FULL_SCALE_SINE_MS_ = 0.5  # mean square of a 0 dBFS sine (AES17 convention)


def air_attenuation_db(distance_m, bands_hz, temperature_c, relative_humidity,
                       pressure_kpa=REFERENCE_PRESSURE_KPA, *, absorption="mid-band",
                       band_shape=None):
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
    band_shape : array_like (B, S), optional
        The sound's power in S equal log-frequency parts of each band (e.g. the measured
        one-third octaves): the band loss is then -10 lg(sum_s w_s 10^(-alpha(f_s) d / 10) /
        sum_s w_s), alpha at each part's mid frequency; bands without a positive shape fall
        back to ``absorption``.
    """
    r = np.asarray(distance_m, dtype=float)[..., None]
    fm = exact_mid_band_hz(bands_hz)
    if band_shape is not None:
        base = air_attenuation_db(distance_m, bands_hz, temperature_c, relative_humidity,
                                  pressure_kpa, absorption=absorption)
        w = np.nan_to_num(np.clip(np.asarray(band_shape, dtype=float), 0.0, None))
        parts = w.shape[-1]
        octave = np.all(np.round(10.0 * np.log10(fm / 1000.0)) % 3 == 0)
        ratio = 10.0 ** (0.3 if octave else 0.1)  # band width, IEC 61260-1
        f_parts = fm[:, None] * ratio ** ((np.arange(parts) + 0.5) / parts - 0.5)[None, :]
        alpha = absorption_db_per_m(f_parts, temperature_c, relative_humidity, pressure_kpa)
        total = np.sum(w, axis=-1)
        with np.errstate(divide="ignore", invalid="ignore"):
            mix = -10.0 * np.log10(np.sum(w * 10.0 ** (-alpha * r[..., None] / 10.0), axis=-1)
                                   / total)
        return np.where(total > 0, mix, base)
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
                       hemisphere=False, absorption="mid-band", cap_db=20.0, receiver_name=None,
                       ground=None, barrier_method="maekawa", band_shape=None):
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
    band_shape : array_like (B, S), optional
        The source's power in parts of each band, see :func:`air_attenuation_db`.
    cap_db : float or None
        Barrier cap, see :func:`barrier_attenuation_db`.
    receiver_name : str, optional
        Named in error messages.
    ground : float, optional
        Ground factor G (0 hard ... 1 porous) of the ISO 9613-2 general method
        (:func:`ground_attenuation_db`); None: no ground effect (free field).
    barrier_method : {"maekawa", "iso9613-2"}
        ``"maekawa"``: :func:`barrier_attenuation_db`; ``"iso9613-2"``:
        :func:`iso9613_barrier_db`, whose screening replaces the ground effect where larger
        (A_bar = D_z - A_gr >= 0).

    Returns
    -------
    dict
        ``distance_m`` (float), ``lp_db`` (B,) = Lw - 20 lg r - 11 - A_atm - A_gr - A_bar
        (ISO 9613-2 eqs. (3), (7)), ``lpa_db`` (float, :func:`lwa_db` of ``lp_db``),
        ``barrier_db`` (B,) the screening (D_z, or the Maekawa loss), ``ground_db`` (B,) A_gr
        (zeros without ground), ``air_db`` (B,) A_atm, ``divergence_db`` (float),
        ``screen_db`` (B,) the screening applied, ``barrier_label`` (the most effective wall's
        label, None when no wall is in the way).

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
    if barrier_method not in ("maekawa", "iso9613-2"):
        raise OptionError(f"barrier_method must be 'maekawa' or 'iso9613-2', got "
                          f"{barrier_method!r}", field="barrier_method")
    barrier_db = np.zeros(fm.shape)
    barrier_label = None
    for i, barrier in enumerate(barriers):  # a few barriers, not samples
        line, height, label = _barrier_parts(barrier, i)
        _check_height(height, label, f"barriers[{i}].height_m")
        if barrier_method == "maekawa":
            n = fresnel_number(src, rcv, (line, height), fm, c)
            loss = barrier_attenuation_db(n, cap_db)
        else:
            loss = iso9613_barrier_db(src, rcv, (line, height), fm, c,
                                      cap_db=20.0 if cap_db is None else cap_db)
        if np.max(loss) > np.max(barrier_db):
            barrier_label = str(label)
        barrier_db = np.maximum(barrier_db, loss)
    ground_db = np.zeros(fm.shape)
    if ground is not None:
        ground_db = ground_attenuation_db(np.linalg.norm(rcv[:2] - src[:2]), src[2], rcv[2],
                                          bands_hz, ground)
    if barrier_method == "iso9613-2":
        screen = np.maximum(barrier_db - ground_db, 0.0)  # ISO 9613-2 eq. (12)
    else:
        screen = barrier_db
    div = float(_divergence_db(distance, hemisphere))
    air_db = air_attenuation_db(distance, bands_hz, temperature_c, relative_humidity,
                                pressure_kpa, absorption=absorption, band_shape=band_shape)
    lp = lw - div - air_db - ground_db - screen
    return {"distance_m": distance, "lp_db": lp, "lpa_db": float(lwa_db(lp, bands_hz)),
            "barrier_db": barrier_db, "ground_db": ground_db, "air_db": air_db,
            "divergence_db": div, "screen_db": screen, "barrier_label": barrier_label}


def _jsonable(values, decimals=2):
    a = np.round(np.asarray(values, dtype=float), decimals)
    if a.ndim == 0:
        return float(a) if np.isfinite(a) else None
    return [float(v) if np.isfinite(v) else None for v in a]


def level_result(bands_hz, lw_db, spread_db, receivers=(), *, cautions=CAUTIONS, upper_db=None,
                 **extra):
    """The ``"kind": "level"`` part of a ``tdoa-result/1`` document, JSON-ready.

    Parameters
    ----------
    bands_hz : sequence, shape (B,)
        Nominal mid-band frequencies (written as given).
    lw_db, spread_db : array_like, shape (B,)
        Sound power per band (NaN where not a level) and the spread between mics.
    receivers : iterable of (name, dict)
        Names with the dicts of :func:`receiver_levels_db` (plus, optionally, the event
        measures of :func:`receiver_event_measures` and ``lp_upper_db``).
    cautions : sequence of str
    upper_db : array_like (B,), optional
        Upper bounds of the bands that are not levels (NaN elsewhere).
    **extra
        Further keys (already JSON-ready), e.g. ``lw_position_sd_db``.

    Returns
    -------
    dict
        Values rounded to 0.01 dB / 0.01 m; non-finite values as ``None`` (JSON null).  A band
        given as an upper bound is ``null`` in ``source_lw_db`` (so that no reader takes it for
        a level), its bound is in ``source_lw_upper_db`` and ``source_lw_is_upper_bound`` flags
        it; ``source_lwa_db`` sums the level bands only (``source_lwa_bands_hz``).
    """
    lw = np.asarray(lw_db, dtype=float)
    up = np.full(lw.shape, np.nan) if upper_db is None else np.asarray(upper_db, dtype=float)
    is_up = np.isfinite(up) & ~np.isfinite(lw)
    bands = [float(b) if float(b) % 1 else int(b) for b in bands_hz]
    summed = [b for b, v in zip(bands, lw, strict=True) if np.isfinite(v)]
    left = [b for b, u in zip(bands, is_up, strict=True) if u]
    note = ("A-weighted total of the bands that are levels: " + ", ".join(f"{b:g}" for b in summed)
            + " Hz" if summed else "no band is a level: no A-weighted total")
    lwa_upper = lwa_db(np.where(is_up, up, lw), bands_hz)
    if left:
        note += ("; left out (upper bounds only): " + ", ".join(f"{b:g}" for b in left)
                 + " Hz, so the total is a lower bound of the whole; with those bands at their "
                 f"bounds it would be at most {float(lwa_upper):.1f} dB")
    rec_out = []
    for name, r in receivers:
        item = {"name": str(name), "distance_m": _jsonable(r["distance_m"]),
                "lp_db": _jsonable(r["lp_db"]), "lpa_db": _jsonable(r["lpa_db"]),
                "barrier_db": _jsonable(r["barrier_db"])}
        if r.get("barrier_label") is not None:
            item["barrier_label"] = str(r["barrier_label"])
        for key in ("lp_upper_db", "ground_db", "screen_db", "air_db"):
            if key in r:
                item[key] = _jsonable(r[key])
        for key in ("laeq_db", "laeq_interval_s", "lae_db", "lafmax_db", "lcpeak_db",
                    "lce_db", "divergence_db", "t_lafmax_s", "t_emit_at_lafmax_s",
                    "position_at_lafmax_m"):
            if key in r:
                item[key] = _jsonable(r[key], 3 if key.startswith("t_") else 2)
        rec_out.append(item)
    out = {
        "kind": "level",
        "bands_hz": bands,
        "source_lw_db": _jsonable(lw),
        "source_lw_upper_db": _jsonable(np.where(is_up, up, np.nan)),
        "source_lw_is_upper_bound": [bool(v) for v in is_up],
        "source_lwa_db": _jsonable(lwa_db(lw, bands_hz)),
        "source_lwa_bands_hz": summed,
        "source_lwa_upper_db": _jsonable(lwa_upper) if left else None,
        "source_lwa_note": note,
        "mic_spread_db": _jsonable(spread_db),
        "receivers": rec_out,
        "cautions": list(cautions),
    }
    out.update(extra)
    return out


# --------------------------------------------------------------------- coherent source power

COHERENT_MARGIN_DB = 10.0  # a band counts as a level when its coherent part stands this far
# above the noise floor of the cross-spectral estimate (common practice for "clearly above":
# the 10 dB at which background corrections become negligible)
_UPPER_SIGMAS = 3.0  # an upper bound is the estimate plus three of its standard errors
MIN_DOF = 50  # a level needs >= 50 degrees of freedom: sampling scatter <= 0.6 dB (1 sd)


def band_mean_squares(signals, sample_rate_hz, *, bands_hz=OCTAVE_BANDS_HZ,
                      full_scale_db_spl=None, undo_air=None):
    """Band mean squares ``(M, B)`` of each mic, as ``auto_ms`` of :func:`pair_cross_powers`
    (the same scaling and the same per-bin removal of the absorption, ``undo_air``)."""
    x = np.asarray(signals, dtype=float)
    fs = float(sample_rate_hz)
    m, n = x.shape
    cal = np.zeros(m) if full_scale_db_spl is None else np.broadcast_to(
        np.asarray(full_scale_db_spl, dtype=float), (m,))
    spec = np.fft.rfft(x * (10.0 ** (cal / 20.0) / np.sqrt(_FULL_SCALE_SINE_MS_))[:, None],
                       axis=-1)
    freqs = np.fft.rfftfreq(n, 1.0 / fs)
    if undo_air is not None:
        d, t_c, rh, p_kpa = undo_air
        alpha = absorption_db_per_m(np.maximum(freqs, 1.0), t_c, rh, p_kpa)
        spec = spec * 10.0 ** (alpha[None, :] * np.asarray(d, float)[:, None] / 20.0)
    weight = np.full(freqs.shape, 2.0)
    weight[0] = 0.0
    if n % 2 == 0:
        weight[-1] = 1.0
    lo, hi = octave_band_edges_hz(bands_hz)
    usable = (hi <= fs / 2.0) & (lo >= 4 * fs / n)
    power = np.abs(spec) ** 2 * (weight / n**2)
    out = np.stack([np.sum(power[:, (freqs >= a) & (freqs < b)], axis=-1)
                    for a, b in zip(lo, hi, strict=True)], axis=-1)
    return np.where(usable, out, np.nan)


def pair_cross_powers(signals, sample_rate_hz, *, bands_hz=OCTAVE_BANDS_HZ,
                      full_scale_db_spl=None, search_s=5e-4, shifts_s=None, undo_air=None,
                      parts=3):
    """Coherent band power of every mic pair from cross-spectra, with its noise floor.

    Parameters
    ----------
    signals : array_like, shape (M, T)
        The mics' samples, already aligned on emission time to within ``search_s`` (the same
        stretch of the source's sound in every row); digital full scale = amplitude 1.
    sample_rate_hz : float
    bands_hz : sequence, shape (B,)
        Nominal octave mid-band frequencies.
    full_scale_db_spl : array_like (M,), optional
        Calibration per mic (as :func:`octave_band_levels_db`); None: dBFS.
    search_s : float
        Each pair's residual lag is refined within +- this (the peak of the pair's broadband
        cross-correlation, interpolated 8 times).
    shifts_s : array_like (M,), optional
        Fractional residual alignment (s) to apply before the search, e.g. the part of the
        predicted delays below one sample.
    parts : int
        Each octave is split into this many equal log-frequency parts (3: the one-third
        octaves of IEC 61260-1), each summed in phase on its own: a small residual lag or a
        ground reflection turns the phase across an octave, less across a third of it.
    undo_air : tuple, optional
        ``(distance_m (M,), temperature_c, relative_humidity, pressure_kpa)``: take each
        path's ISO 9613-1 absorption off every frequency bin (gain 10^(alpha(f) d / 20)), so
        that the band's power is carried back exactly whatever its spectrum inside the band.

    Returns
    -------
    dict
        ``pairs`` (P, 2) mic indices; ``lag_s`` (P,) refined residual lag of mic j against
        mic i; ``cross_ms`` (P, B, S) per part of each band (S = ``parts``): the coherent mean
        square of the pair, sqrt(|z|^2 - V), z the sum over the part's bins of X_i X_j^* at
        the refined lag (one-sided, scaled like :func:`octave_band_levels_db`, so that a
        signal common to both mics gives its mean square), V its noise variance;
        ``noise_ms`` (P, B, S) sqrt(V); ``dof`` (P, B) the band's degrees of freedom
        (sum w)^2 / sum w^2, w = |X_i X_j| per bin (its sampling scatter is 1 / sqrt(dof) of
        the power, Bendat & Piersol, textbook); ``auto_ms`` (M, B) the mics' own band mean
        squares.  Units: p0^2 when calibrated (10 lg gives dB re 20 uPa), else a full-scale
        sine's mean square.  NaN where a band is unusable.

    Notes
    -----
    Independent noise at the two mics does not add up in the cross-spectrum: the sum of its
    products over N bins is a random complex number of variance V = sum P_i P_j, P the power
    per bin (a running median over 17 bins, so a tone's own bins do not count; for broadband
    sound it counts the coherent part too, conservatively), i.e. about N^(-1/2) of the noise
    power, while the source's part adds in phase (Bendat & Piersol's coherent output power,
    textbook).  |z| of noise alone follows a Rayleigh law, so |z|^2 - V removes its mean.
    """
    x = np.asarray(signals, dtype=float)
    fs = float(sample_rate_hz)
    m, n = x.shape
    if m < 2:
        raise ValueError("need at least two mics for cross-spectra")
    cal = np.zeros(m) if full_scale_db_spl is None else np.broadcast_to(
        np.asarray(full_scale_db_spl, dtype=float), (m,))
    # scale so that a mean square reads 10 lg(ms) in dB (a 0 dBFS sine reads cal)
    y = x * (10.0 ** (cal / 20.0) / np.sqrt(_FULL_SCALE_SINE_MS_))[:, None]
    spec = np.fft.rfft(y, axis=-1)
    freqs = np.fft.rfftfreq(n, 1.0 / fs)
    if shifts_s is not None:
        spec = spec * np.exp(2j * np.pi * freqs[None, :] * np.asarray(shifts_s, float)[:, None])
    if undo_air is not None:
        d, t_c, rh, p_kpa = undo_air
        alpha = absorption_db_per_m(np.maximum(freqs, 1.0), t_c, rh, p_kpa)
        spec = spec * 10.0 ** (alpha[None, :] * np.asarray(d, float)[:, None] / 20.0)
    weight = np.full(freqs.shape, 2.0)
    weight[0] = 0.0  # no DC
    if n % 2 == 0:
        weight[-1] = 1.0
    scale = weight / n**2
    lo, hi = octave_band_edges_hz(bands_hz)
    usable = (hi <= fs / 2.0) & (lo >= 4 * fs / n)
    members = [(freqs >= a) & (freqs < b) for a, b in zip(lo, hi, strict=True)]
    ratio = float((hi[0] / lo[0]) ** (1.0 / parts))  # the same for every octave band
    subs = [[(freqs >= a * ratio**k) & (freqs < a * ratio ** (k + 1)) for k in range(parts)]
            for a in lo]
    auto = np.stack([np.sum(np.abs(spec[:, sel]) ** 2 * scale[sel], axis=-1) for sel in members],
                    axis=-1)
    auto = np.where(usable, auto, np.nan)
    # each mic's power per bin as the noise sees it: a running median over 17 bins (scaled by
    # 1 / ln 2, the median of an exponential law, so a smooth spectrum keeps its mean) -- a
    # tone's few bins do not raise it, so a steady tone stands out of its own band's floor
    from scipy.ndimage import median_filter

    floor_bin = median_filter(np.abs(spec) ** 2 * scale, size=(1, 17), mode="nearest") / np.log(2)
    pairs = np.array([(i, j) for i in range(m) for j in range(i + 1, m)])
    from scipy import fft as sfft

    up = int(max(1, min(8, 2**22 // n)))  # interpolation factor of the lag search
    n_up = sfft.next_fast_len(up * n, real=True)
    step_s = n / (n_up * fs)  # lag step of the interpolated correlation
    half = max(int(np.ceil(search_s / step_s)), 1)
    in_bands = np.any(np.stack(members) & usable[:, None], axis=0)
    lags = np.zeros(len(pairs))
    cross = np.full((len(pairs), len(lo), parts), np.nan)
    noise = np.full((len(pairs), len(lo), parts), np.nan)
    dof = np.full((len(pairs), len(lo)), np.nan)
    for p, (i, j) in enumerate(pairs):  # a few dozen pairs at most
        g = spec[i] * np.conj(spec[j]) * scale
        # residual lag: peak of the broadband cross-correlation near zero (8x interpolated)
        r = sfft.irfft(np.where(in_bands, g, 0.0), n_up)
        window = np.concatenate([r[-half:], r[:half + 1]])
        peak = (int(np.argmax(window)) - half) * step_s  # = minus mic j's excess delay
        lags[p] = -peak
        g = g * np.exp(2j * np.pi * freqs * peak)
        v_bin = floor_bin[i] * floor_bin[j]
        w_bin = (np.abs(spec[i]) ** 2 * scale) * (np.abs(spec[j]) ** 2 * scale)
        for b in range(len(lo)):
            if not usable[b]:
                continue
            for k, sel in enumerate(subs[b]):
                z2 = abs(np.sum(g[sel])) ** 2
                var = float(np.sum(v_bin[sel]))
                cross[p, b, k] = np.sqrt(max(z2 - var, 0.0))
                noise[p, b, k] = np.sqrt(var)
            w = np.sqrt(w_bin[members[b]])
            dof[p, b] = np.sum(w) ** 2 / np.sum(w**2) if np.any(w > 0) else 0.0
    return {"pairs": pairs, "lag_s": lags, "cross_ms": cross, "noise_ms": noise, "auto_ms": auto,
            "dof": dof}


def _nan_mean(values, axis=0):
    """Mean over the finite values along ``axis``; NaN (no warning) where there are none."""
    v = np.asarray(values, dtype=float)
    ok = np.isfinite(v)
    count = np.sum(ok, axis=axis)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, np.sum(np.where(ok, v, 0.0), axis=axis) / count, np.nan)


def coherent_source_power(cross, attenuation_db, *, margin_db=COHERENT_MARGIN_DB,
                          pair_attenuation_db=None, min_dof=MIN_DOF):
    """Sound power per band from the pairs' coherent parts; upper bounds where it is not clear.

    Parameters
    ----------
    cross : dict
        From :func:`pair_cross_powers` (calibrated: dB re 20 uPa units).
    attenuation_db : array_like, shape (M, B)
        Each mic's propagation loss from the source, A = Lw - Lp per band (divergence plus
        absorption: :func:`source_power_level_db` of 0 dB).
    margin_db : float
        A band is a level when its estimate stands at least this far above the standard error
        of the pair mean (and above three times one pair's noise floor) and holds enough
        degrees of freedom (:data:`MIN_DOF`: sampling scatter 1 / sqrt(dof) <= 0.6 dB); else
        an upper bound.
    pair_attenuation_db : array_like (P, B) or (P, B, S), optional
        The pairs' own loss (per band, or per part of each band), -10 lg(mean over time of
        g_i g_j) for a moving source (g the pressure gain 10^(-A/20) of each path at each
        instant); default (A_i + A_j) / 2.

    Returns
    -------
    dict
        ``lw_db`` (B,) level or NaN; ``upper_db`` (B,) upper bound where not a level, else NaN;
        ``is_upper`` (B,) bool; ``floor_db`` (B,) the noise floor of the estimate (one standard
        error, as a sound power); ``mic_lw_db`` (M, B) each mic's estimate from its pairs;
        ``spread_db`` (B,) max - min of those over the mics; ``part_power`` (B, S) the power
        found in each part of each band (half its bound where not found): the spectrum's shape
        inside the band, for :func:`air_attenuation_db`; ``few_dof`` (B,) bands clear of the
        noise that miss only the degrees of freedom (a tone, or a short record), and
        ``found_db`` (B,) their value as a level would be.
    min_dof : float
        Degrees of freedom a level needs (:data:`MIN_DOF`).

    Notes
    -----
    Each pair (i, j) gives W_ij = C_ij 10^((A_i + A_j) / 20) (its coherent mean square
    carried back along both paths, geometric mean); W is their mean, its standard error
    s = sqrt(sum V_ij 10^((A_i + A_j) / 10)) / P (products of independent noises are
    uncorrelated between pairs).  Where the band is not a level the upper bound is
    (W + 3 s + n / 2)(1 + 3 / sqrt(dof)), n one pair's noise floor, capped by the mics' total
    band power (which bounds the source's part) times the same sampling allowance.
    """
    c = np.asarray(cross["cross_ms"], dtype=float)  # (P, B, S)
    v = np.asarray(cross["noise_ms"], dtype=float)
    auto = np.asarray(cross["auto_ms"], dtype=float)
    pairs = np.asarray(cross["pairs"])
    att = np.asarray(attenuation_db, dtype=float)
    if pair_attenuation_db is None:
        gain = 10.0 ** ((att[pairs[:, 0]] + att[pairs[:, 1]]) / 20.0)  # (P, B)
    else:
        gain = 10.0 ** (np.asarray(pair_attenuation_db, dtype=float) / 10.0)
    if gain.ndim == 2:
        gain = gain[..., None]  # the same for every part of the band
    w = c * gain
    n_p = np.sum(np.isfinite(w), axis=0)  # (B, S)
    clear = 10.0 ** (margin_db / 10.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        # inverse-variance weights: a pair whose noise, carried back to the source, is small
        # (the near mics in a band the air absorbs strongly) counts for more (the minimum-
        # variance unbiased mean of independent estimates, textbook)
        var = (v * gain) ** 2
        wt = np.where(np.isfinite(w) & (var > 0), 1.0 / np.where(var > 0, var, 1.0), 0.0)
        sum_wt = np.sum(wt, axis=0)
        flat = ~(sum_wt > 0)  # no noise estimate anywhere: the plain mean
        wt = np.where(flat[None], np.isfinite(w).astype(float), wt)
        sum_wt = np.where(flat, n_p, sum_wt)
        mean_w = np.nansum(wt * w, axis=0) / sum_wt
        se = np.sqrt(np.nansum(wt**2 * var, axis=0)) / sum_wt
        one = np.nansum(wt * v * gain, axis=0) / sum_wt  # one pair's noise floor (weighted)
        sub_ok = (n_p > 0) & (mean_w >= clear * se) & (mean_w >= 3.0 * one)
        sub_up = np.maximum(mean_w, 0.0) + _UPPER_SIGMAS * se + 0.5 * one
        found = np.sum(np.where(sub_ok, mean_w, 0.0), axis=-1)  # (B,)
        rest = np.sum(np.where(sub_ok, 0.0, sub_up), axis=-1)  # bound of the parts not found
        usable = np.all(n_p > 0, axis=-1)
        total = _nan_mean(auto * 10.0 ** (att / 10.0), axis=0)  # energetic mean over mics
        dof = _nan_mean(np.asarray(cross["dof"], dtype=float), axis=0)
        rel = 1.0 / np.sqrt(np.maximum(dof, 1.0))  # sampling scatter, shared by the pairs
        # a level: the parts not found could add at most 25 % (1 dB; half of it is added, so
        # the level is within 0.5 dB of the truth on that account), enough dof
        clear_enough = usable & (found > 0) & (rest <= 0.25 * found)
        ok = clear_enough & (dof >= min_dof)
        value = found + 0.5 * rest
        upper = np.minimum(found + rest, total) * (1.0 + _UPPER_SIGMAS * rel)
        lw = np.where(ok, 10.0 * np.log10(value), np.nan)
        found_db = np.where(clear_enough, 10.0 * np.log10(value), np.nan)
        up = np.where(~ok & usable, 10.0 * np.log10(upper), np.nan)
        floor = np.where(usable, 10.0 * np.log10(np.sqrt(np.sum(se**2, axis=-1))), np.nan)
        m = att.shape[0]
        mic_w = np.full(att.shape, np.nan)
        w_found = np.sum(np.where(sub_ok[None], w, 0.0), axis=-1)  # (P, B)
        for k in range(m):  # a mic's estimate: the mean over the pairs it belongs to
            mine = (pairs[:, 0] == k) | (pairs[:, 1] == k)
            mic_w[k] = _nan_mean(w_found[mine], axis=0) + 0.5 * rest
        mic_lw = np.where(ok & (mic_w > 0), 10.0 * np.log10(mic_w), np.nan)
    finite = np.isfinite(mic_lw)
    spread = np.where(np.any(finite, axis=0),
                      np.max(np.where(finite, mic_lw, -np.inf), axis=0)
                      - np.min(np.where(finite, mic_lw, np.inf), axis=0), np.nan)
    shape = np.where(sub_ok, mean_w, np.where(np.isfinite(sub_up), 0.5 * sub_up, 0.0))
    return {"few_dof": clear_enough & ~ok, "found_db": found_db, "part_power": shape,
            "lw_db": lw, "upper_db": up, "is_upper": ~ok & usable,
            "floor_db": floor,
            "mic_lw_db": mic_lw, "spread_db": spread}


# --------------------------------------------------------------- ISO 9613-2 general method

def _iso_ground_terms(h_m, dp_m):
    """a'(h) ... d'(h) of ISO 9613-2:1996 Table 3 (from memory), dB."""
    h = max(float(h_m), 0.0)
    near = 1.0 - np.exp(-dp_m / 50.0)
    a = (1.5 + 3.0 * np.exp(-0.12 * (h - 5.0) ** 2) * near
         + 5.7 * np.exp(-0.09 * h**2) * (1.0 - np.exp(-2.8e-6 * dp_m**2)))
    b = 1.5 + 8.6 * np.exp(-0.09 * h**2) * near
    c = 1.5 + 14.0 * np.exp(-0.46 * h**2) * near
    d = 1.5 + 5.0 * np.exp(-0.9 * h**2) * near
    return a, b, c, d


def _iso_end_region_db(h_m, dp_m, g):
    a, b, c, d = _iso_ground_terms(h_m, dp_m)
    # octave bands 63 ... 8000 Hz, ISO 9613-2:1996 Table 3 (from memory)
    return np.array([-1.5, -1.5 + g * a, -1.5 + g * b, -1.5 + g * c, -1.5 + g * d,
                     -1.5 * (1 - g), -1.5 * (1 - g), -1.5 * (1 - g)])


def ground_attenuation_db(horizontal_m, source_z_m, receiver_z_m, bands_hz=OCTAVE_BANDS_HZ,
                          ground_factor=0.0, middle_factor=None):
    """Ground attenuation A_gr per octave band, ISO 9613-2:1996 clause 7.3.1 (from memory).

    A_gr = A_s + A_r + A_m: source and receiver regions (30 h deep) with the Table 3 terms,
    middle region -3 q (63 Hz) or -3 q (1 - G_m), q = 1 - 30 (h_s + h_r) / d_p when the
    distance d_p exceeds 30 (h_s + h_r), else 0.  Negative values are gains (hard ground
    reflects: -3 dB near, down to -6 dB far over hard ground; over porous ground the 250-
    1000 Hz bands lose several dB at low heights).  Heights above the ground z = 0, m.
    Octave bands 63 Hz - 8 kHz only; valid for downwind propagation over flat ground.
    """
    bands = [int(round(float(b))) for b in bands_hz]
    if bands != list(OCTAVE_BANDS_HZ):
        raise OptionError(f"the ISO 9613-2 ground effect needs the octave bands "
                          f"{OCTAVE_BANDS_HZ}, got {bands_hz!r}", field="bands_hz")
    g = float(ground_factor)
    gm = g if middle_factor is None else float(middle_factor)
    if not (0.0 <= g <= 1.0 and 0.0 <= gm <= 1.0):
        raise OptionError(f"ground factor G must lie between 0 (hard) and 1 (porous), got "
                          f"{ground_factor!r}", field="ground")
    dp = max(float(horizontal_m), 0.0)
    hs, hr = max(float(source_z_m), 0.0), max(float(receiver_z_m), 0.0)
    q = 0.0 if dp <= 30.0 * (hs + hr) else 1.0 - 30.0 * (hs + hr) / dp
    am = np.full(8, -3.0 * q * (1.0 - gm))
    am[0] = -3.0 * q
    return _iso_end_region_db(hs, dp, g) + _iso_end_region_db(hr, dp, g) + am


def iso9613_barrier_db(source_m, receiver_m, barrier, frequency_hz, sound_speed_mps, *,
                       c2=20.0, cap_db=20.0):
    """Screening D_z of a single edge, ISO 9613-2:1996 eq. (14) (from memory), dB.

    D_z = 10 lg(3 + (C2 / lambda) C3 z K_met), C2 = 20 (ground reflections included through
    image sources: use 40 otherwise), C3 = 1 (single diffraction), z the path difference over
    the top (negative when the line of sight clears it), K_met = exp(-(1/2000)
    sqrt(d_ss d_sr d / (2 z))) for z > 0 (1 otherwise); 0 dB where the argument falls below 1
    (continuous), capped at 20 dB; 0 where the direct path does not cross the barrier in plan.
    """
    s = np.asarray(source_m, dtype=float)
    r = np.asarray(receiver_m, dtype=float)
    line, height, label = _barrier_parts(barrier, 0)
    z = barrier_path_difference_m(s, r, line, height, label=label)
    f = np.asarray(frequency_hz, dtype=float)
    if np.isnan(z):
        return np.zeros(f.shape)
    kmet = 1.0
    if z > 0:
        # the top point where the path crosses, for d_ss and d_sr
        d = float(np.linalg.norm(r - s))
        dss_dsr = 0.25 * (d + z) ** 2  # symmetric-edge value of d_ss d_sr (upper bound)
        top = _crossing_top(s, r, line, height)
        if top is not None:
            dss_dsr = float(np.linalg.norm(top - s) * np.linalg.norm(r - top))
        kmet = float(np.exp(-np.sqrt(dss_dsr * d / (2.0 * z)) / 2000.0))
    arg = 3.0 + c2 * f / float(sound_speed_mps) * z * kmet
    with np.errstate(divide="ignore", invalid="ignore"):
        dz = np.where(arg > 1.0, 10.0 * np.log10(arg), 0.0)
    return np.minimum(np.maximum(dz, 0.0), float(cap_db))


def _crossing_top(s, r, line, height):
    """The most effective top-edge point where the direct path crosses the line in plan."""
    line = np.asarray(line, dtype=float)
    p, e = line[:-1], np.diff(line, axis=0)
    d, w = r[:2] - s[:2], p - s[:2]
    denom = d[0] * e[:, 1] - d[1] * e[:, 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        t = (w[:, 0] * e[:, 1] - w[:, 1] * e[:, 0]) / denom
        u = (w[:, 0] * d[1] - w[:, 1] * d[0]) / denom
    hit = (denom != 0) & (t >= 0) & (t <= 1) & (u >= 0) & (u <= 1)
    if not np.any(hit):
        return None
    t = t[hit]
    top = np.column_stack([s[0] + t * d[0], s[1] + t * d[1], np.full(t.shape, float(height))])
    return top[int(np.argmax(_signed_delta(s, r, top)))]


# ------------------------------------------------------------------ event and pass-by measures

P0_PA = 20e-6  # reference sound pressure, Pa (ISO 1683)


def event_measures(signal_ref, sample_rate_hz, *, background_ref=None, t0_s=0.0):
    """LAeq,T, LAE, LAFmax (with its time), LCpeak and LCE of one mic's record of an event.

    Parameters
    ----------
    signal_ref : array_like, shape (T,)
        Sound pressure in units of the reference (20 uPa when calibrated: 10 lg of a mean
        square is then dB re 20 uPa), over the interval T the event lies in.
    sample_rate_hz : float
    background_ref : array_like, shape (T2,), optional
        A record of the background alone (same units).  Its A (and C) weighted mean square is
        taken off the event's energy (LAE, LCE) and off the F-weighted maximum: the source's
        part, as common practice corrects a sound exposure for steady background.
    t0_s : float
        Time of the first sample (for ``t_lafmax_s``).

    Returns
    -------
    dict
        ``laeq_db`` (LAeq,T over the whole record, background included, ISO 1996-1),
        ``interval_s`` (T), ``lae_db`` (LAE = 10 lg(int p_A^2 dt / (p0^2 1 s)), ISO 1996-1),
        ``lafmax_db`` (max of L_AF, time weighting F, IEC 61672-1), ``t_lafmax_s``,
        ``lcpeak_db`` (20 lg(max |p_C| / p0), IEC 61672-1), ``lce_db``,
        ``background_corrected`` (bool).  NaN where the source's part does not clear the
        background.
    """
    x = np.asarray(signal_ref, dtype=float)
    fs = float(sample_rate_hz)
    n = x.size
    xa = frequency_weighted(x, fs, "A")
    xc = frequency_weighted(x, fs, "C")
    ms_a = ms_c = 0.0
    if background_ref is not None and np.size(background_ref) > 1:
        bg = np.asarray(background_ref, dtype=float)
        ms_a = float(np.mean(frequency_weighted(bg, fs, "A") ** 2))
        ms_c = float(np.mean(frequency_weighted(bg, fs, "C") ** 2))
    f_ms = time_weighted_ms(xa, fs, TIME_CONSTANT_S["F"])
    k = int(np.argmax(f_ms))

    def db(v):
        return float(10.0 * np.log10(v)) if v > 0 else float("nan")

    return {
        "laeq_db": db(np.mean(xa**2)), "interval_s": n / fs,
        "lae_db": db(np.sum(xa**2) / fs - ms_a * n / fs),
        "lafmax_db": db(f_ms[k] - ms_a), "t_lafmax_s": t0_s + k / fs,
        "lcpeak_db": float(20.0 * np.log10(np.max(np.abs(xc)))) if np.any(xc) else float("nan"),
        "lce_db": db(np.sum(xc**2) / fs - ms_c * n / fs),
        "background_corrected": background_ref is not None,
    }


def c_weighted_total_db(bands_db, bands_hz=OCTAVE_BANDS_HZ):
    """C-weighted total of band levels over the usable bands (as :func:`lwa_db` for A)."""
    lv = np.asarray(bands_db, dtype=float)
    weighted = lv + c_weighting_db(exact_mid_band_hz(bands_hz))
    mean, count = energetic_mean_db(weighted, axis=-1)
    with np.errstate(divide="ignore"):
        return mean + 10.0 * np.log10(np.maximum(count, 1))


def receiver_event_measures(lp_db, bands_hz, duration_s, shape=None):
    """Event measures predicted at a receiver from its band levels while the source sounds.

    Parameters
    ----------
    lp_db : array_like (B,)
        Predicted band Leq over the time the source sounds (NaN bands left out).
    duration_s : float
        That time, s.
    shape : dict, optional
        ``lafmax_minus_lae_db`` and ``lcpeak_minus_lce_db`` measured at the mics: the event's
        time shape, carried to the receiver unchanged (propagation changes the level, not the
        time course, of a sound from a still source).

    Returns
    -------
    dict
        ``laeq_db`` with ``laeq_interval_s`` (LAeq,T over the time it sounds), ``lae_db``
        (= LAeq,T + 10 lg(T / 1 s), ISO 1996-1), ``lafmax_db`` and ``lcpeak_db`` (from the
        shape; NaN without it), ``lce_db``.
    """
    laeq = float(lwa_db(lp_db, bands_hz))
    lceq = float(c_weighted_total_db(lp_db, bands_hz))
    t = float(duration_s)
    lae = laeq + 10.0 * np.log10(t)
    lce = lceq + 10.0 * np.log10(t)
    shape = shape or {}
    d1 = shape.get("lafmax_minus_lae_db", float("nan"))
    d2 = shape.get("lcpeak_minus_lce_db", float("nan"))
    return {"laeq_db": laeq, "laeq_interval_s": t, "lae_db": lae, "lce_db": lce,
            "lafmax_db": lae + d1, "lcpeak_db": lce + d2}
