"""Speed of sound in air against published values and textbook relations."""
import math

import numpy as np
import pytest

from fusion.sensors.air import echo_range, echo_time, range_per_kelvin, speed_of_sound


# Dry air at one standard atmosphere. 0 degC: 331.3 m/s and 20 degC: 343.2 m/s are the
# values printed in acoustics textbooks' tables (from memory). The other temperatures come
# from the ideal-gas textbook relation c = 331.3 sqrt(1 + T / 273.15) (from memory), which
# our implementation does not use directly (it computes sqrt(gamma R T / M)).
@pytest.mark.parametrize("temp_c, expected_mps", [
    (0.0, 331.3),
    (20.0, 343.2),
    (-20.0, 331.3 * math.sqrt(1 - 20 / 273.15)),   # ~319.0
    (10.0, 331.3 * math.sqrt(1 + 10 / 273.15)),    # ~337.3
    (30.0, 331.3 * math.sqrt(1 + 30 / 273.15)),    # ~349.0
    (40.0, 331.3 * math.sqrt(1 + 40 / 273.15)),    # ~354.7
])
def test_dry_air_table(temp_c, expected_mps):
    assert speed_of_sound(temp_c) == pytest.approx(expected_mps, abs=0.2)


def test_humidity_raises_speed_at_20c():
    # Cramer (1993), J. Acoust. Soc. Am. 93(5): at 20 degC, saturated air carries sound
    # about 1.2 m/s faster than dry air (from memory).
    delta = speed_of_sound(20.0, 1.0) - speed_of_sound(20.0, 0.0)
    assert delta == pytest.approx(1.2, abs=0.2)
    # Half the vapour, roughly half the effect (the vapour term is close to linear in the
    # mole fraction at these low fractions; Cramer 1993, eq. 15, from memory).
    half = speed_of_sound(20.0, 0.5) - speed_of_sound(20.0, 0.0)
    assert half == pytest.approx(delta / 2, rel=0.05)


def test_slope_near_room_temperature():
    # About 0.6 m/s per degC near room temperature (common practice, no source). It
    # follows from the ideal gas, c proportional to sqrt(T_kelvin): dc/dT = c / (2 T_K) =
    # 343.2 / (2 * 293.15) = 0.585 m/s per K at 20 degC (343.2 m/s: textbook value, from
    # memory).
    slope = (speed_of_sound(25.0) - speed_of_sound(15.0)) / 10.0
    assert slope == pytest.approx(0.6, abs=0.02)
    assert slope == pytest.approx(343.2 / (2 * 293.15), rel=0.01)


def test_echo_range_and_time_are_inverse():
    t = np.array([1e-4, 5.83e-3, 2e-2])
    for temp in (-10.0, 20.0, 40.0):
        np.testing.assert_allclose(echo_time(echo_range(t, temp), temp), t, rtol=1e-12)
    # 5.83 ms at 20 degC is a reflector 1.0 m away: 343.2 * 0.00583 / 2 (textbook value
    # of c at 20 degC, from memory).
    assert echo_range(5.83e-3, 20.0) == pytest.approx(1.0, abs=0.002)


def test_range_per_kelvin_is_the_ideal_gas_derivative():
    # For a fixed echo time, range = c t / 2 with c = sqrt(gamma R T_K / M) for dry air
    # (the ideal-gas speed of sound; common practice, no source), so
    # d(range)/dT = range / (2 (T + 273.15)). Asserted directly, in dry air, where that
    # relation is exact.
    for r in (0.25, 1.0, 3.7):
        for temp in (-15.0, 0.0, 20.0, 35.0):
            assert range_per_kelvin(r, temp) == pytest.approx(r / (2 * (temp + 273.15)),
                                                              rel=1e-12)
    # 1 m at 20 degC: 1.706 mm per K, the "about 0.17 % of range per kelvin" of the trade
    # (common practice, no source).
    assert range_per_kelvin(1.0, 20.0) == pytest.approx(0.0017, rel=0.01)
    # And against a central difference of the module's own dry-air echo_range.
    t = 0.01
    for temp in (-15.0, 20.0, 35.0):
        h = 1e-3
        numeric = (echo_range(t, temp + h) - echo_range(t, temp - h)) / (2 * h)
        assert range_per_kelvin(echo_range(t, temp), temp) == pytest.approx(numeric, rel=1e-6)


def test_range_per_kelvin_in_humid_air_follows_the_humid_speed():
    # Humid air's speed of sound climbs faster with temperature than dry air's, because at
    # a fixed relative humidity its vapour fraction rises with temperature (Cramer 1993,
    # eq. 15, with the saturation pressure of Davis 1992; both from memory): the slope of
    # range for a fixed echo time is that of echo_range with humidity, above the dry one.
    t = 0.01
    for temp, rh in ((20.0, 0.5), (35.0, 1.0), (0.0, 0.8)):
        h = 1e-3
        numeric = (echo_range(t, temp + h, rh) - echo_range(t, temp - h, rh)) / (2 * h)
        r = echo_range(t, temp, rh)
        assert range_per_kelvin(r, temp, rh) == pytest.approx(numeric, rel=1e-4)
        assert range_per_kelvin(r, temp, rh) > range_per_kelvin(r, temp)
    # per reading: dry where the humidity is 0
    r = np.array([1.0, 1.0])
    both = range_per_kelvin(r, np.array([20.0, 20.0]), np.array([0.0, 0.5]))
    assert both[0] == range_per_kelvin(1.0, 20.0) and both[1] > both[0]

