"""The air: speed of sound, time of flight with wind, atmospheric absorption.

Pure functions on numpy arrays; every argument broadcasts.  Positions are ``(..., 3)`` arrays in
metres (x east, y north, z up).

Sources
-------
* Sound speed with humidity, pressure and CO2: Cramer, O. (1993), J. Acoust. Soc. Am. 93(5),
  2510-2516, eq. (15) with the coefficients of its Table III; water-vapour mole fraction from
  the saturation-pressure and enhancement-factor expressions given there (Davis 1992 forms).
* Dry-air check form: ISO 9613-1:1993, c = 343.2 (T / 293.15 K)^0.5 m/s.
* Pure-tone atmospheric absorption: ISO 9613-1:1993, eqs. (3)-(5) and Annex B (B.1-B.3).
* Time of flight in a uniform wind: textbook kinematics of a wavefront moving at c relative to
  air that moves at w: the ray from s reaches m after t with |m - s - w t| = c t.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "KELVIN_OFFSET",
    "REFERENCE_PRESSURE_KPA",
    "sound_speed_mps",
    "sound_speed_dry_iso9613_mps",
    "water_vapour_mole_fraction",
    "wind_vector_mps",
    "travel_time_s",
    "travel_time_gradient",
    "absorption_db_per_m",
]

KELVIN_OFFSET = 273.15  # 0 degC in kelvin (SI definition)
REFERENCE_PRESSURE_KPA = 101.325  # standard atmosphere, ISO 9613-1 clause 6
_T_TRIPLE_K = 273.16  # triple point of water, ISO 9613-1 Annex B
_T_REF_K = 293.15  # reference air temperature, ISO 9613-1 clause 6

# Cramer (1993) Table III coefficients, t in degC, p in Pa, x_w and x_c mole fractions.
_CRAMER = (
    331.5024, 0.603055, -0.000528,
    51.471935, 0.1495874, -0.000782,
    -1.82e-7, 3.73e-8, -2.93e-10,
    -85.20931, -0.228525, 5.91e-5,
    -2.835149, -2.15e-13, 29.179762, 0.000486,
)


def water_vapour_mole_fraction(temperature_c, relative_humidity,
                               pressure_kpa=REFERENCE_PRESSURE_KPA):
    """Mole fraction of water vapour in moist air.

    Parameters
    ----------
    temperature_c : array_like
        Air temperature, degC.
    relative_humidity : array_like
        Relative humidity, percent (0-100).
    pressure_kpa : array_like
        Static pressure, kPa.

    Returns
    -------
    ndarray
        x_w, dimensionless.

    Notes
    -----
    Saturation vapour pressure and enhancement factor as quoted by Cramer (1993), eqs. (A1)-(A2).
    """
    t = np.asarray(temperature_c, dtype=float)
    t_k = t + KELVIN_OFFSET
    p_pa = np.asarray(pressure_kpa, dtype=float) * 1e3
    p_sat_pa = np.exp(1.2811805e-5 * t_k**2 - 1.9509874e-2 * t_k + 34.04926034 - 6.3536311e3 / t_k)
    enhancement = 1.00062 + 3.14e-8 * p_pa + 5.6e-7 * t**2
    return np.asarray(relative_humidity, dtype=float) / 100.0 * enhancement * p_sat_pa / p_pa


def sound_speed_mps(temperature_c, relative_humidity=0.0, pressure_kpa=REFERENCE_PRESSURE_KPA,
                    co2_mole_fraction=0.0004):
    """Speed of sound in still moist air (zero-frequency limit).

    Parameters
    ----------
    temperature_c : array_like
        Air temperature, degC (Cramer's fit covers 0-30 degC; it is smooth and within about
        0.1 % of the ideal-gas value from -40 to +50 degC, which is how it is used here).
    relative_humidity : array_like
        Percent, 0-100.
    pressure_kpa : array_like
        Static pressure, kPa.
    co2_mole_fraction : float
        CO2 mole fraction (default 400 ppm).

    Returns
    -------
    ndarray or float
        Sound speed, m/s.

    Examples
    --------
    >>> round(float(sound_speed_mps(20.0, 0.0)), 1)
    343.4
    """
    a = _CRAMER
    t = np.asarray(temperature_c, dtype=float)
    p = np.asarray(pressure_kpa, dtype=float) * 1e3
    xw = water_vapour_mole_fraction(t, relative_humidity, pressure_kpa)
    xc = float(co2_mole_fraction)
    c = (a[0] + a[1] * t + a[2] * t**2
         + (a[3] + a[4] * t + a[5] * t**2) * xw
         + (a[6] + a[7] * t + a[8] * t**2) * p
         + (a[9] + a[10] * t + a[11] * t**2) * xc
         + a[12] * xw**2 + a[13] * p**2 + a[14] * xc**2 + a[15] * xw * p * xc)
    # Outside Cramer's 0-30 degC fit, keep the fit's humidity/pressure/CO2 corrections but take
    # the temperature dependence from the ideal gas (c proportional to sqrt(T)), anchored at the
    # fit's edge, so that -40 or +50 degC stay physical.
    edge = np.clip(t, 0.0, 30.0)
    if np.any(edge != t):
        c_edge = (a[0] + a[1] * edge + a[2] * edge**2
                  + (a[3] + a[4] * edge + a[5] * edge**2) * xw
                  + (a[6] + a[7] * edge + a[8] * edge**2) * p
                  + (a[9] + a[10] * edge + a[11] * edge**2) * xc
                  + a[12] * xw**2 + a[13] * p**2 + a[14] * xc**2 + a[15] * xw * p * xc)
        scaled = c_edge * np.sqrt((t + KELVIN_OFFSET) / (edge + KELVIN_OFFSET))
        c = np.where(edge != t, scaled, c)
    return c if c.ndim else float(c)


def sound_speed_dry_iso9613_mps(temperature_c):
    """Dry-air sound speed as written in ISO 9613-1:1993: 343.2 (T/293.15 K)^0.5 m/s."""
    t_k = np.asarray(temperature_c, dtype=float) + KELVIN_OFFSET
    c = 343.2 * np.sqrt(t_k / _T_REF_K)
    return c if c.ndim else float(c)


def wind_vector_mps(speed_mps, from_deg):
    """Horizontal wind velocity (the way the air moves), shape ``(..., 3)``.

    ``from_deg`` is the direction the wind blows FROM, clockwise from north (meteorological
    convention, common practice): a wind from 270 deg (westerly) moves the air toward +x (east).
    """
    speed = np.asarray(speed_mps, dtype=float)
    az = np.deg2rad(np.asarray(from_deg, dtype=float))
    # blowing TO the opposite direction: unit vector (sin, cos) of from-direction, negated
    return np.stack([-speed * np.sin(az), -speed * np.cos(az), np.zeros_like(speed * az)], axis=-1)


def travel_time_s(source_m, mic_m, sound_speed_mps, wind_mps=None):
    """Time for sound to go from ``source_m`` to ``mic_m`` in a uniform wind.

    Solves |r - w t| = c t for t >= 0 with r = mic - source (wavefront moving at c relative to
    the air, the air moving at w).  The root is
    t = (-(r.w) + sqrt((r.w)^2 + (c^2 - |w|^2) |r|^2)) / (c^2 - |w|^2).

    Parameters
    ----------
    source_m, mic_m : array_like, shape (..., 3)
        Positions, metres; they broadcast against each other.
    sound_speed_mps : array_like
        Sound speed relative to the air, m/s; broadcasts over the leading axes.
    wind_mps : array_like, shape (..., 3), optional
        Uniform wind velocity; ``None`` for still air.

    Returns
    -------
    ndarray, shape (...)
        Travel time, seconds.
    """
    r = np.asarray(mic_m, dtype=float) - np.asarray(source_m, dtype=float)
    c = np.asarray(sound_speed_mps, dtype=float)
    dist2 = np.einsum("...i,...i->...", r, r)
    if wind_mps is None:
        return np.sqrt(dist2) / c
    w = np.asarray(wind_mps, dtype=float)
    rw = np.einsum("...i,...i->...", r, w)
    a = c**2 - np.einsum("...i,...i->...", w, w)
    if np.any(a <= 0):
        raise ValueError("wind speed must be below the sound speed, "
                         f"got |w|^2 - c^2 = {-np.min(a)!r}")
    # Numerically stable form of the positive root: |r|^2 / (rw + sqrt(rw^2 + a |r|^2)).
    disc = np.sqrt(rw**2 + a * dist2)
    with np.errstate(invalid="ignore", divide="ignore"):
        t = np.where(dist2 > 0, dist2 / (rw + disc), 0.0)
    return t


def travel_time_gradient(source_m, mic_m, sound_speed_mps, wind_mps=None):
    """Gradient of :func:`travel_time_s` with respect to the source position, shape ``(..., 3)``.

    Implicit differentiation of F = |r - w t|^2 - c^2 t^2 = 0 with r = mic - source:
    dt/d(source) = -(r - w t) / (w.(r - w t) + c^2 t).  In still air this is -r / (c |r|).
    """
    r = np.asarray(mic_m, dtype=float) - np.asarray(source_m, dtype=float)
    c = np.asarray(sound_speed_mps, dtype=float)
    t = travel_time_s(source_m, mic_m, sound_speed_mps, wind_mps)
    if wind_mps is None:
        w = np.zeros(3)
    else:
        w = np.asarray(wind_mps, dtype=float)
    u = r - w * t[..., None]
    denom = np.einsum("...i,...i->...", w * np.ones_like(u), u) + c**2 * t
    with np.errstate(invalid="ignore", divide="ignore"):
        g = -u / denom[..., None]
    return np.where(np.isfinite(g), g, 0.0)


def absorption_db_per_m(frequency_hz, temperature_c, relative_humidity,
                        pressure_kpa=REFERENCE_PRESSURE_KPA):
    """Pure-tone atmospheric absorption coefficient, dB per metre (ISO 9613-1:1993).

    Parameters
    ----------
    frequency_hz : array_like
        Frequency, Hz.
    temperature_c : array_like
        Air temperature, degC.
    relative_humidity : array_like
        Percent, 0-100.
    pressure_kpa : array_like
        Static pressure, kPa.

    Returns
    -------
    ndarray
        alpha, dB/m (multiply by 1000 for the dB/km of ISO 9613-2 Table 2).

    Notes
    -----
    Molar concentration of water vapour h from ISO 9613-1 Annex B (B.1, B.2); relaxation
    frequencies of oxygen and nitrogen from eqs. (3), (4); attenuation from eq. (5).
    """
    f = np.asarray(frequency_hz, dtype=float)
    t_k = np.asarray(temperature_c, dtype=float) + KELVIN_OFFSET
    pa_rel = np.asarray(pressure_kpa, dtype=float) / REFERENCE_PRESSURE_KPA
    c_sat = -6.8346 * (_T_TRIPLE_K / t_k) ** 1.261 + 4.6151  # ISO 9613-1 (B.2)
    h = np.asarray(relative_humidity, dtype=float) * 10.0**c_sat / pa_rel  # (B.1), percent
    tr = t_k / _T_REF_K
    fr_o = pa_rel * (24.0 + 4.04e4 * h * (0.02 + h) / (0.391 + h))  # eq. (3)
    fr_n = pa_rel * tr**-0.5 * (9.0 + 280.0 * h * np.exp(-4.170 * (tr ** (-1.0 / 3.0) - 1.0)))
    alpha = 8.686 * f**2 * (
        1.84e-11 / pa_rel * tr**0.5
        + tr**-2.5 * (0.01275 * np.exp(-2239.1 / t_k) / (fr_o + f**2 / fr_o)
                      + 0.1068 * np.exp(-3352.0 / t_k) / (fr_n + f**2 / fr_n))
    )  # eq. (5)
    return alpha
