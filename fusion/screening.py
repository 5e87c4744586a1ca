"""Screening decisions made on whole arrays before the estimator: air temperature at
each reading, and crosstalk between echo rangers by ping timing.
"""
from __future__ import annotations

import numpy as np

from .sensors.air import speed_of_sound

__all__ = ["air_at", "classify_crosstalk", "safe_cycle_s"]

_T_MIN_C, _T_MAX_C = -60.0, 90.0


def air_at(t_s, sample_t_s, sample_temp_c, air):
    """Air temperature at reading times, causally (the last good sample before each).

    Parameters
    ----------
    t_s : (n,) array
        Reading times.
    sample_t_s, sample_temp_c : (m,) arrays
        Temperature stream; NaN, infinite and implausible samples count as failures.
    air : fusion.rig.AirConfig

    Returns
    -------
    temp_c, temp_sigma_c : (n,) arrays
    fallback : (n,) bool
        True where the stream was missing or stale and a fallback value was used.
    """
    t_s = np.asarray(t_s, dtype=float)
    st = np.asarray(sample_t_s, dtype=float)
    sv = np.asarray(sample_temp_c, dtype=float)
    good = np.isfinite(st) & np.isfinite(sv) & (sv > _T_MIN_C) & (sv < _T_MAX_C)
    st, sv = st[good], sv[good]
    temp = np.full(t_s.shape, air.fallback_temp_c)
    sigma = np.full(t_s.shape, air.fallback_sigma_c)
    if not air.stream:  # no stream configured: the configured value is the design, not a fault
        return temp, sigma, np.zeros(t_s.shape, bool)
    fallback = np.ones(t_s.shape, bool)
    if st.size:
        j = np.searchsorted(st, t_s, side="right") - 1
        have = (j >= 0) & np.isfinite(t_s)  # a reading with no usable time gets the fallback
        jj = np.where(have, j, 0)
        age = t_s - st[jj]
        temp = np.where(have, sv[jj], temp)
        stale = np.maximum(age - air.stale_after_s, 0.0)
        sigma = np.where(have, air.temp_sigma_c + air.stale_growth_c_per_s * stale, sigma)
        fallback = ~have | (age > air.stale_after_s)
    return temp, sigma, fallback


def classify_crosstalk(rx_t, sensor, pings, tau_min_s, tau_max_s, tol_s, rank=None):
    """Find echo readings that are another unit's ping, by timing.

    A reading received at ``rx_t`` by unit ``a`` is *suspect* when another unit ``b``
    pinged at ``p`` with ``rx_t - p`` a plausible flight time for ``b``'s sound
    (inside ``[tau_min_s[b], tau_max_s[b]]``); it is *definite* crosstalk when that
    flight time also matches ``b``'s own echo time for the ping within ``tol_s``.

    Parameters
    ----------
    rx_t : (n,) array
        Reception time (ping time plus time of flight); NaN where unknown.
    sensor : (n,) int array
        Echo sensor index of each reading.
    pings : list of (p_sorted, tof) or (p_sorted, tof, rank) tuples
        For each echo sensor index, its ping times (sorted) and the echo time it measured
        for each (NaN for none); with `rank`, also the processing rank of the reading
        that reported each ping (-1 for readings of earlier batches).
    tau_min_s, tau_max_s : sequences
        Plausible flight-time window per sensor index.
    tol_s : float
    rank : (n,) int array, optional
        Processing rank of each reading: a reading is matched only against pings whose
        readings rank before it (causal screening, as when readings are pushed one by one).

    Returns
    -------
    suspect, definite : (n,) bool arrays
    """
    rx_t = np.asarray(rx_t, dtype=float)
    sensor = np.asarray(sensor)
    suspect = np.zeros(rx_t.shape, bool)
    definite = np.zeros(rx_t.shape, bool)
    known = np.isfinite(rx_t)
    for a in np.unique(sensor[known]):
        ia = np.flatnonzero(known & (sensor == a))
        rx = rx_t[ia]
        for b, entry in enumerate(pings):
            p, tof = entry[0], entry[1]
            if b == a or p is None or len(p) == 0:
                continue
            prank = entry[2] if len(entry) > 2 and rank is not None else None
            lo = np.searchsorted(p, rx - tau_max_s[b], side="left")
            hi = np.searchsorted(p, rx - tau_min_s[b], side="right")
            cnt = hi - lo
            has = cnt > 0
            if not has.any():
                continue
            suspect[ia[has]] = True
            for off in range(int(cnt.max())):
                k = lo + off
                ok = k < hi
                kk = np.where(ok, k, 0)
                match = ok & (np.abs(rx - p[kk] - tof[kk]) <= tol_s)
                if prank is not None:
                    match &= prank[kk] < rank[ia]
                definite[ia[match]] = True
    return suspect, definite


def safe_cycle_s(max_range_m, ring_down_s=0.001, temp_min_c=-10.0, margin=1.1):
    """Shortest safe time between consecutive pings of a shared firing schedule.

    Every unit's echo window (ring-down plus the round trip to its maximum range at the
    slowest expected speed of sound) must close before the next unit fires, with a margin
    for late multipath echoes.
    """
    c = speed_of_sound(temp_min_c)
    return margin * (ring_down_s + 2.0 * float(np.max(max_range_m)) / c)
