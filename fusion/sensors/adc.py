"""Decoding analog-to-digital converter counts for analog rangers.

The converter is taken as ideal and uniform: with ``bits`` bits and reference ``vref``
one count (one LSB) is ``vref / 2**bits`` volts and count ``k`` stands for ``k * LSB``.
Encoding rounds to the nearest count, so the round trip is exact to half an LSB, and
the rounding error of a signal that moves over many counts is uniform on
``[-LSB/2, LSB/2]``, with standard deviation ``LSB / sqrt(12)``.

Some host code divides by ``2**bits - 1`` instead; the two conventions differ by one
part in ``2**bits`` (0.1 % at 10 bits), below the scatter of a calibration.

References
----------
B. Widrow, "A study of rough amplitude quantization by means of Nyquist sampling
theory", IRE Trans. Circuit Theory 3(4), 266-276 (1956): the uniform model of
quantisation error and its variance LSB**2 / 12 (from memory).
B. Widrow and I. Kollar, *Quantization Noise*, Cambridge University Press (2008),
ch. 4-5 (from memory).
"""
from __future__ import annotations

import math
import numbers

import numpy as np

from ..errors import InputError

__all__ = ["adc_lsb_v", "counts_to_volts", "volts_to_counts", "adc_quantisation_sigma_v"]

_MAX_BITS = 32


def _check_converter(bits, vref):
    if isinstance(bits, bool) or not isinstance(bits, numbers.Integral):
        raise InputError(f"the converter resolution must be a whole number of bits (got {bits!r})",
                         field="bits")
    if not 1 <= int(bits) <= _MAX_BITS:
        raise InputError(f"the converter resolution must be 1 to {_MAX_BITS} bits (got {bits})",
                         field="bits")
    try:
        vref_f = float(vref)
    except (TypeError, ValueError):
        raise InputError(f"the reference voltage must be a number in volts (got {vref!r})",
                         field="vref") from None
    if not math.isfinite(vref_f) or vref_f <= 0.0:
        raise InputError(f"the reference voltage must be a positive number of volts (got {vref!r})",
                         field="vref")
    return int(bits), vref_f


def adc_lsb_v(bits, vref):
    """Size of one count in volts, ``vref / 2**bits``.

    Parameters
    ----------
    bits : int
        Converter resolution, 1 to 32.
    vref : float
        Reference (full-scale) voltage in volts.

    Returns
    -------
    float
        One LSB in volts.

    Examples
    --------
    >>> adc_lsb_v(10, 5.0)
    0.0048828125
    """
    bits, vref = _check_converter(bits, vref)
    return vref / float(2 ** bits)


def counts_to_volts(counts, bits, vref):
    """Voltage from converter counts, ``counts * vref / 2**bits``.

    Parameters
    ----------
    counts : int, float or array_like
        Counts from 0 to ``2**bits - 1``. Averaged (non-integer) counts are accepted;
        NaN marks a missing reading and stays NaN.
    bits : int
        Converter resolution, 1 to 32.
    vref : float
        Reference voltage in volts.

    Returns
    -------
    float or ndarray
        Volts, float64.

    Raises
    ------
    InputError
        If a count is infinite or outside ``0 .. 2**bits - 1`` (usually a wrong
        ``bits``); ``row`` is the 0-based index of the first such count.

    Examples
    --------
    >>> counts_to_volts(512, 10, 5.0)
    2.5
    """
    lsb = adc_lsb_v(bits, vref)
    c = np.asarray(counts, dtype=float)
    top = 2 ** int(bits) - 1
    bad = np.isinf(c) | (c < 0) | (c > top)
    if np.any(bad):
        i = int(np.flatnonzero(bad.ravel())[0])
        raise InputError(f"count {c.ravel()[i]!r} is outside 0..{top} for a {bits}-bit converter; "
                         "check --bits", field="counts", row=i)
    v = c * lsb
    return v if v.ndim else float(v)


def volts_to_counts(volts, bits, vref):
    """Converter counts for a voltage: rounded to the nearest count and clipped.

    Parameters
    ----------
    volts : float or array_like
        Finite voltages. Values beyond the converter's range clip to 0 or ``2**bits - 1``,
        as a real converter saturates.
    bits : int
        Converter resolution, 1 to 32.
    vref : float
        Reference voltage in volts.

    Returns
    -------
    int or ndarray of int64
        Counts. Exact halves round to the even count (`numpy.rint`).

    Raises
    ------
    InputError
        If a voltage is NaN or infinite (``row`` is its 0-based index).

    Examples
    --------
    >>> volts_to_counts(2.5, 10, 5.0)
    512
    """
    lsb = adc_lsb_v(bits, vref)
    v = np.asarray(volts, dtype=float)
    bad = ~np.isfinite(v)
    if np.any(bad):
        i = int(np.flatnonzero(bad.ravel())[0])
        raise InputError(f"voltage {v.ravel()[i]!r} cannot be encoded; expected a finite number",
                         field="volts", row=i)
    c = np.clip(np.rint(v / lsb), 0, 2 ** int(bits) - 1).astype(np.int64)
    return c if c.ndim else int(c)


def adc_quantisation_sigma_v(bits, vref):
    """Standard deviation of the rounding error, ``LSB / sqrt(12)``, in volts.

    Valid when the signal moves over several counts between readings (Widrow 1956);
    for a steady signal the error is a fixed bias instead.

    Examples
    --------
    >>> round(adc_quantisation_sigma_v(10, 5.0), 6)
    0.00141
    """
    return adc_lsb_v(bits, vref) / math.sqrt(12.0)
