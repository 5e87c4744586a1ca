"""Speed of sound in air and the echo-ranging conversion.

The dry-air value is the ideal-gas speed ``sqrt(gamma R T / M)``; humidity enters as
the difference Cramer's (1993) fit predicts between humid and dry air at the same
temperature and pressure.

References
----------
O. Cramer, "The variation of the specific heat ratio and the speed of sound in air
with temperature, pressure, humidity, and CO2 concentration", J. Acoust. Soc. Am.
93(5), 2510-2516 (1993). Coefficients of its eq. (15), from memory.
R. S. Davis, "Equation for the determination of the density of moist air", Metrologia
29, 67-70 (1992): saturation vapour pressure and enhancement factor (from memory).
"""
from __future__ import annotations

import numpy as np

__all__ = ["speed_of_sound", "echo_range", "echo_time", "range_per_kelvin",
           "speed_slope_per_kelvin",
           "GAMMA_AIR", "MOLAR_MASS_AIR", "GAS_CONSTANT", "STANDARD_PRESSURE_PA"]

GAMMA_AIR = 1.4
MOLAR_MASS_AIR = 0.028964  # kg/mol, dry air
GAS_CONSTANT = 8.314462618  # J/(mol K), exact since the 2019 SI
STANDARD_PRESSURE_PA = 101325.0
_CO2_FRACTION = 0.000314  # mole fraction used in Cramer's paper

_A = (331.5024, 0.603055, -0.000528, 51.471935, 0.1495874, -0.000782, -1.82e-7, 3.73e-8,
      -2.93e-10, -85.20931, -0.228525, 5.91e-5, -2.835149, -2.15e-13, 29.179762, 0.000486)


def _check_fraction(relative_humidity):
    h = np.asarray(relative_humidity, dtype=float)
    if np.any((h < 0.0) | (h > 1.0)):
        raise ValueError("relative_humidity is a fraction from 0 to 1 (got a value outside it)")
    return h


def _cramer(t_c, xw, p):
    a = _A
    xc = _CO2_FRACTION
    return (a[0] + a[1] * t_c + a[2] * t_c ** 2
            + (a[3] + a[4] * t_c + a[5] * t_c ** 2) * xw
            + (a[6] + a[7] * t_c + a[8] * t_c ** 2) * p
            + (a[9] + a[10] * t_c + a[11] * t_c ** 2) * xc
            + a[12] * xw ** 2 + a[13] * p ** 2 + a[14] * xc ** 2 + a[15] * xw * p * xc)


def water_vapour_fraction(temp_c, relative_humidity, pressure_pa=STANDARD_PRESSURE_PA):
    """Mole fraction of water vapour from relative humidity (Davis 1992, from memory)."""
    t_k = np.asarray(temp_c, dtype=float) + 273.15
    t_c = t_k - 273.15
    psv = np.exp(1.2811805e-5 * t_k ** 2 - 1.9509874e-2 * t_k + 34.04926034 - 6.3536311e3 / t_k)
    f = 1.00062 + 3.14e-8 * pressure_pa + 5.6e-7 * t_c ** 2
    return _check_fraction(relative_humidity) * f * psv / pressure_pa


def speed_of_sound(temp_c, relative_humidity=0.0, pressure_pa=STANDARD_PRESSURE_PA):
    """Speed of sound in air, m/s.

    Parameters
    ----------
    temp_c : float or array_like
        Air temperature in degrees Celsius.
    relative_humidity : float or array_like, optional
        Relative humidity as a fraction from 0 to 1 (default dry air).
    pressure_pa : float, optional
        Static pressure in pascal (default one standard atmosphere).

    Returns
    -------
    float or ndarray
        Speed of sound in m/s: the ideal-gas dry-air value plus Cramer's humidity term.

    References
    ----------
    Cramer (1993), J. Acoust. Soc. Am. 93(5), eq. (15).

    Examples
    --------
    >>> round(float(speed_of_sound(20.0)), 1)
    343.2
    """
    t_c = np.asarray(temp_c, dtype=float)
    if np.any(t_c <= -273.15):
        raise ValueError("temp_c must be above absolute zero")
    dry = np.sqrt(GAMMA_AIR * GAS_CONSTANT * (t_c + 273.15) / MOLAR_MASS_AIR)
    h = _check_fraction(relative_humidity)
    if np.any(h > 0):
        xw = water_vapour_fraction(t_c, h, pressure_pa)
        dry = dry + (_cramer(t_c, xw, pressure_pa) - _cramer(t_c, 0.0, pressure_pa))
    return dry if dry.ndim else float(dry)


def echo_range(echo_time_s, temp_c, relative_humidity=0.0):
    """Range in metres from a round-trip echo time: ``c(T) * t / 2``.

    Examples
    --------
    >>> round(float(echo_range(0.01, 20.0)), 4)
    1.7162
    """
    return speed_of_sound(temp_c, relative_humidity) * np.asarray(echo_time_s, dtype=float) / 2.0


def echo_time(range_m, temp_c, relative_humidity=0.0):
    """Round-trip echo time in seconds for a reflector at ``range_m`` (inverse of `echo_range`)."""
    return 2.0 * np.asarray(range_m, dtype=float) / speed_of_sound(temp_c, relative_humidity)


def speed_slope_per_kelvin(temp_c, relative_humidity=0.0):
    """``(dc/dT) / c`` in 1/K: the relative change of the speed of sound per kelvin.

    In dry air ``1 / (2 (T + 273.15))`` (ideal gas, ``c`` proportional to ``sqrt(T)``).
    Humid air's speed rises faster with temperature, because its vapour fraction rises
    too: the slope of `speed_of_sound` with humidity (a central difference over +-0.05 K)
    is used there; at 20 degC and 50 % it is about 7 % above the dry slope.
    """
    t = np.asarray(temp_c, dtype=float)
    dry = 1.0 / (2.0 * (t + 273.15))
    h = _check_fraction(relative_humidity)
    if not np.any(h > 0):
        return dry
    step = 0.05
    slope = (speed_of_sound(t + step, h) - speed_of_sound(t - step, h)) / (2.0 * step)
    return np.where(h > 0, slope / speed_of_sound(t, h), dry)


def range_per_kelvin(range_m, temp_c, relative_humidity=0.0):
    """d(range)/d(T) in m/K for a fixed echo time: ``range * (dc/dT) / c``
    (`speed_slope_per_kelvin`): ``range / (2 (T + 273.15))`` in dry air."""
    return np.asarray(range_m, dtype=float) * speed_slope_per_kelvin(temp_c, relative_humidity)
