"""Air physics against published values and reference libraries."""

import numpy as np
import pytest
from scipy import optimize

from locate.physics import air

MPS = 1.0


@pytest.mark.parametrize("temperature_c", [-15.0, 0.0, 10.0, 20.0, 30.0, 38.0])
def test_dry_sound_speed_matches_iso_9613_1_form(temperature_c):
    # ISO 9613-1:1993: c = 343.2 (T / 293.15 K)^0.5 m/s for dry air.
    iso = 343.2 * np.sqrt((temperature_c + 273.15) / 293.15)
    assert air.sound_speed_dry_iso9613_mps(temperature_c) == pytest.approx(iso, abs=1e-9)
    # Cramer (1993) at 0 % RH must agree with the ISO dry-air form within 0.1 %.
    assert air.sound_speed_mps(temperature_c, 0.0) == pytest.approx(iso, rel=1e-3)


@pytest.mark.parametrize("temperature_c, expected", [(0.0, 331.3), (20.0, 343.2)])
def test_sound_speed_matches_handbook_values(temperature_c, expected):
    # Handbook form c = 331.3 sqrt(1 + theta / 273.15): 331.3 m/s at 0 degC, 343.2 m/s at 20 degC.
    assert air.sound_speed_mps(temperature_c, 0.0) == pytest.approx(expected, abs=0.3 * MPS)


def test_humidity_raises_sound_speed_by_a_few_tenths_of_a_percent():
    # Cramer (1993); from memory: about +0.3 to +0.4 % at 100 % RH, 20 degC, against dry air.
    ratio = air.sound_speed_mps(20.0, 100.0) / air.sound_speed_mps(20.0, 0.0) - 1.0
    assert 0.003 <= ratio <= 0.004


def test_sound_speed_slope_is_about_0p6_mps_per_degree():
    # Common practice: ~0.6 m/s per degC near room temperature.
    slope = air.sound_speed_mps(21.0, 50.0) - air.sound_speed_mps(19.0, 50.0)
    assert slope / 2 == pytest.approx(0.6, abs=0.03)


def test_travel_time_with_wind_solves_the_moving_air_equation():
    # Reference: scipy.optimize.brentq on |r - w t| = c t (wavefront carried by the wind).
    rng = np.random.default_rng(4)
    c = 340.0
    for _ in range(20):
        src = rng.uniform(-200, 200, 3)
        mic = rng.uniform(-200, 200, 3)
        wind = np.append(rng.uniform(-15, 15, 2), 0.0)
        r = mic - src
        t_ref = optimize.brentq(lambda t, r=r, w=wind: np.linalg.norm(r - w * t) - c * t,
                                0.0, 10.0, xtol=1e-15)
        assert air.travel_time_s(src, mic, c, wind) == pytest.approx(t_ref, abs=1e-12)


def test_wind_from_west_speeds_up_sound_travelling_east():
    # Meteorological convention (common practice): wind from 270 deg moves air toward +x.
    w = air.wind_vector_mps(8.0, 270.0)
    assert w == pytest.approx([8.0, 0.0, 0.0], abs=1e-12)
    assert air.travel_time_s([0, 0, 0], [100, 0, 0], 340.0, w) == pytest.approx(100 / 348.0)
    assert air.travel_time_s([100, 0, 0], [0, 0, 0], 340.0, w) == pytest.approx(100 / 332.0)


def test_travel_time_gradient_matches_finite_differences():
    # Reference: central finite differences of travel_time_s.
    src = np.array([12.0, -30.0, 2.0])
    mic = np.array([-40.0, 25.0, 1.5])
    wind = np.array([5.0, -3.0, 0.0])
    g = air.travel_time_gradient(src, mic, 337.0, wind)
    h = 1e-4
    num = [(air.travel_time_s(src + h * e, mic, 337.0, wind)
            - air.travel_time_s(src - h * e, mic, 337.0, wind)) / (2 * h) for e in np.eye(3)]
    assert g == pytest.approx(num, abs=1e-10)


def test_travel_time_broadcasts_over_sources_and_mics():
    src = np.zeros((4, 1, 3))
    mics = np.ones((1, 5, 3))
    assert air.travel_time_s(src, mics, 340.0).shape == (4, 5)


@pytest.mark.parametrize("t, rh, row", [
    # ISO 9613-2:1996 Table 2 (dB/km at 63..8000 Hz), from memory via REFERENCES.md.
    (10.0, 70.0, [0.1, 0.4, 1.0, 1.9, 3.7, 9.7, 32.8, 117]),
    (20.0, 70.0, [0.1, 0.3, 1.1, 2.8, 5.0, 9.0, 22.9, 76.6]),
    (15.0, 20.0, [0.3, 0.6, 1.2, 2.7, 8.2, 28.2, 88.8, 202]),
    (15.0, 50.0, [0.1, 0.5, 1.2, 2.2, 4.2, 10.8, 36.2, 129]),
])
def test_absorption_matches_iso_9613_2_table_2(t, rh, row):
    exact = 1000.0 * 10 ** (0.3 * np.arange(-4, 4))  # exact octave mid-bands (IEC 61260-1)
    alpha_db_per_km = air.absorption_db_per_m(exact, t, rh) * 1000.0
    for got, want in zip(alpha_db_per_km, row):
        assert got == pytest.approx(want, abs=0.051 + 0.02 * want)
