"""Screening decisions made on whole arrays before the estimator: air temperature at
each reading, crosstalk between echo rangers by ping timing, and sensors whose output
sticks at one value.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

from .sensors.air import speed_of_sound

__all__ = ["air_at", "classify_crosstalk", "safe_cycle_s", "repeat_probability",
           "raw_noise", "stuck_limit", "stuck_readings"]

_T_MIN_C, _T_MAX_C = -60.0, 90.0
# Age limit of the pings a predicted crosstalk arrival is drawn from (within the
# fuser's 1 s ping memory, so pushing one by one and a batch see the same pings).
PREDICT_WINDOW_S = 0.5


def air_at(t_s, sample_t_s, sample_temp_c, air, clean=False, streamed=None):
    """Air temperature at reading times, causally (the last good sample before each).

    Parameters
    ----------
    t_s : (n,) array
        Reading times.
    sample_t_s, sample_temp_c : (m,) arrays
        Temperature stream; NaN, infinite and implausible samples count as failures.
    air : fusion.rig.AirConfig
    clean : bool
        The samples are already sorted, with only usable ones (skips the check).
    streamed : bool, optional
        Whether samples are expected (default: the rig names an air stream). Without,
        the configured temperature is the design, not a fallback.

    Returns
    -------
    temp_c, temp_sigma_c : (n,) arrays
    fallback : (n,) bool
        True where the stream was missing or stale and a fallback value was used.
    """
    t_s = np.asarray(t_s, dtype=float)
    st = np.asarray(sample_t_s, dtype=float)
    sv = np.asarray(sample_temp_c, dtype=float)
    if not clean:
        good = np.isfinite(st) & np.isfinite(sv) & (sv > _T_MIN_C) & (sv < _T_MAX_C)
        st, sv = st[good], sv[good]
    temp = np.full(t_s.shape, air.fallback_temp_c)
    sigma = np.full(t_s.shape, air.fallback_sigma_c)
    if not (bool(air.stream) if streamed is None else streamed):
        # no stream: the configured value is the design, not a fault
        return temp, sigma, np.zeros(t_s.shape, bool)
    fallback = np.ones(t_s.shape, bool)
    if st.size:
        cap = max(air.fallback_sigma_c, air.temp_sigma_c) if air.fallback_sigma_c > 0 \
            else math.inf
        _air_scan(t_s.reshape(-1), st, sv, air.stale_after_s, air.temp_sigma_c,
                  air.stale_growth_c_per_s, cap, temp.reshape(-1), sigma.reshape(-1),
                  fallback.reshape(-1))
    return temp, sigma, fallback


@njit(cache=True)
def _air_scan(t, st, sv, stale_after, sigma0, growth, cap, temp, sigma, fallback):
    """`air_at` over readings: the last sample at or before each time (its age beyond
    `stale_after` grows the sigma, up to `cap`); readings with none keep the fallback."""
    m = st.shape[0]
    j = -1
    for i in range(t.shape[0]):
        ti = t[i]
        if not math.isfinite(ti):
            continue  # no usable time: the fallback
        # readings are nearly always in time order: walk from the last position
        if j >= 0 and st[j] > ti:
            j = np.searchsorted(st, ti, side="right") - 1
        while j + 1 < m and st[j + 1] <= ti:
            j += 1
        if j < 0:
            continue
        age = ti - st[j]
        temp[i] = sv[j]
        g = sigma0 + growth * max(age - stale_after, 0.0)
        # a stale sample is never worth less than no sample at all (the fallback sigma)
        sigma[i] = min(g, cap)
        fallback[i] = age > stale_after


def classify_crosstalk(rx_t, sensor, pings, tau_min_s, tau_max_s, tol_s, rank=None,
                       predict_window_s=PREDICT_WINDOW_S):
    """Find echo readings that are another unit's ping, by timing.

    A reading received at ``rx_t`` by unit ``a`` is *suspect* when another unit ``b``
    pinged at ``p`` with ``rx_t - p`` a plausible flight time for ``b``'s sound
    (inside ``[tau_min_s[b], tau_max_s[b]]``); it is *definite* crosstalk when that
    flight time also matches ``b``'s own echo time for the ping within ``tol_s``.

    Screening is causal, and the two readings of a crosstalk pair arrive together (``a``
    hears the sound that ``b`` hears as its own echo), so when ``a``'s reading is
    screened first ``b``'s ping and echo time are not known yet. Then ``b``'s *predicted*
    arrival is used: a free-running unit fires on a steady period, so its next ping is
    its last known ping plus the last interval, and its echo time is close to the last
    one it reported. The tolerance grows by the unit's observed interval change (ping
    jitter) and its last change of echo time (target motion over one period). Only pings
    at most `predict_window_s` before the reading are used, so that the one-by-one path
    (whose ping memory is `fusion.fuser`'s ``_PING_MEMORY_S``) and a batch agree. A
    match either way is *definite*: the track then decides between the two readings.

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
    predict_window_s : float
        Age limit of the pings a predicted arrival is drawn from; 0 turns prediction off.

    Returns
    -------
    suspect, definite : (n,) bool arrays
    """
    rx_t = np.asarray(rx_t, dtype=float).reshape(-1)
    sensor = np.asarray(sensor, dtype=np.int64).reshape(-1)
    nb = len(pings)
    starts = np.zeros(nb + 1, np.int64)
    causal = np.zeros(nb, np.bool_)
    for b, entry in enumerate(pings):
        k = 0 if entry[0] is None else len(entry[0])
        starts[b + 1] = starts[b] + k
        causal[b] = k > 0 and len(entry) > 2 and rank is not None
    pf, tf, rf = np.empty(starts[-1]), np.empty(starts[-1]), np.full(starts[-1], -1, np.int64)
    for b, entry in enumerate(pings):
        if starts[b + 1] > starts[b]:
            pf[starts[b]:starts[b + 1]] = entry[0]
            tf[starts[b]:starts[b + 1]] = entry[1]
            if causal[b]:
                rf[starts[b]:starts[b + 1]] = entry[2]
    rk = np.zeros(rx_t.shape, np.int64) if rank is None else np.asarray(rank, np.int64)
    suspect = np.zeros(rx_t.shape, bool)
    definite = np.zeros(rx_t.shape, bool)
    _crosstalk_scan(rx_t, sensor, pf, tf, rf, starts, causal, rk,
                    np.asarray(tau_min_s, float), np.asarray(tau_max_s, float), float(tol_s),
                    float(predict_window_s), suspect, definite)
    return suspect, definite


_PREDICT_BACK = 8  # known pings scanned back for the last three causal ones


@njit(cache=True)
def _crosstalk_scan(rx_t, sensor, pf, tf, rf, starts, causal, rank, tau_min, tau_max, tol,
                    window, suspect, definite):
    """`classify_crosstalk` reading by reading: unit ``b``'s known pings are
    ``pf[starts[b]:starts[b + 1]]`` (sorted), with echo times `tf` and reader ranks `rf`.

    Besides a match with a known ping, the *predicted* next echo arrival of a
    free-running unit counts: its last three known (causal) pings no older than
    `window` before the reading, newest first, give the period and its jitter, the
    newest known echo time and its last change give the tolerance."""
    q = np.empty(3)
    e = np.empty(3)
    for i in range(rx_t.shape[0]):
        rx = rx_t[i]
        if not math.isfinite(rx):
            continue
        a = sensor[i]
        for b in range(starts.shape[0] - 1):
            lo_b, hi_b = starts[b], starts[b + 1]
            if b == a or hi_b == lo_b:
                continue
            p = pf[lo_b:hi_b]
            tof = tf[lo_b:hi_b]
            prank = rf[lo_b:hi_b]
            ck = causal[b]
            hi = np.searchsorted(p, rx - tau_min[b], side="right")
            if window > 0:
                got = 0
                for off in range(1, _PREDICT_BACK + 1):
                    k = hi - off
                    if k < 0 or got >= 3:
                        break
                    if p[k] >= rx - window and (not ck or prank[k] < rank[i]):
                        q[got] = p[k]
                        e[got] = tof[k]
                        got += 1
                if got == 3:
                    period = q[0] - q[1]
                    jitter = abs(period - (q[1] - q[2]))
                    p_next = q[0] + period
                    # the echo time of the newest ping that has one, and its change
                    tof0 = e[0] if math.isfinite(e[0]) else e[1]
                    tof1 = e[1] if math.isfinite(e[0]) else e[2]
                    drift = abs(tof0 - tof1) if math.isfinite(tof1) else 0.0
                    if (math.isfinite(tof0) and p_next >= rx - tau_max[b]
                            and p_next <= rx - tau_min[b]
                            and abs(rx - p_next - tof0) <= tol + jitter + drift):
                        definite[i] = True
            lo = np.searchsorted(p, rx - tau_max[b], side="left")
            if hi > lo:
                suspect[i] = True
                for k in range(lo, hi):
                    if abs(rx - p[k] - tof[k]) <= tol and (not ck or prank[k] < rank[i]):
                        definite[i] = True


def safe_cycle_s(max_range_m, ring_down_s=0.001, temp_min_c=-10.0, margin=1.1):
    """Shortest safe time between consecutive pings of a shared firing schedule.

    Every unit's echo window (ring-down plus the round trip to its maximum range at the
    slowest expected speed of sound) must close before the next unit fires, with a margin
    for late multipath echoes.
    """
    c = speed_of_sound(temp_min_c)
    return margin * (ring_down_s + 2.0 * float(np.max(max_range_m)) / c)


# --------------------------------------------------------------------------------------
# A sensor whose output sticks at one value
# --------------------------------------------------------------------------------------
def repeat_probability(sigma, quantum) -> float:
    """Chance that two independent readings of a still target show the same raw value.

    Each reading is the true value plus Gaussian noise of standard deviation `sigma`,
    rounded to a grid of step `quantum` whose offset relative to the true value is
    uniform (the usual quantisation model; B. Widrow and I. Kollar, *Quantization
    Noise*, Cambridge University Press 2008, ch. 4-5, from memory). The two readings then
    fall in one step with probability ``E[max(0, 1 - |D| / quantum)]``, ``D ~ N(0, 2
    sigma^2)``, which is ``2 Phi(1/s) - 1 - 2 s (phi(0) - phi(1/s))`` with ``s = sqrt(2)
    sigma / quantum``: about ``1 / (2 sqrt(pi) sigma / quantum)`` once the noise spans
    a few steps. A raw value with no quantum (``quantum <= 0``: ideal, noise-free
    numbers such as a simulation's) cannot be judged and counts as always repeating.
    """
    sigma, quantum = float(sigma), float(quantum)
    if not quantum > 0:
        return 1.0
    if not sigma > 0:
        return 1.0
    s = math.sqrt(2.0) * sigma / quantum
    a = 1.0 / s
    phi0 = 1.0 / math.sqrt(2.0 * math.pi)
    big_phi = 0.5 * (1.0 + math.erf(a / math.sqrt(2.0)))
    return float(min(1.0, max(0.0, 2.0 * big_phi - 1.0
                             - 2.0 * s * (phi0 - phi0 * math.exp(-0.5 * a * a)))))


def raw_noise(sensor):
    """``(sigma, quantum)`` of a sensor's raw value for a still target, in raw units.

    The smallest noise the rig describes is used (the constant term of an echo ranger's
    range noise at its minimum range), so a quiet unit is not taken for a stuck one.
    """
    if sensor.kind == "triangulation":
        if sensor.output == "counts":
            return sensor.volts_sigma, sensor.adc_vref / 2.0 ** sensor.adc_bits
        return sensor.volts_sigma, 0.0
    sigma_m = sensor.sigma_m + sensor.sigma_frac * sensor.min_range_m
    if sensor.output == "echo_time":
        return 2.0 * sigma_m / speed_of_sound(20.0), sensor.tick_s
    if sensor.output == "pulse_width":
        return sigma_m * sensor.seconds_per_m, sensor.tick_s
    if sensor.output == "analog":
        return sigma_m * sensor.volts_per_m, sensor.volts_step
    return sigma_m, sensor.frame_unit_m


def stuck_limit(p_repeat, false_alarm=1e-6, minimum=8) -> int:
    """Measurement cycles of one unchanged raw value after which a sensor counts as stuck.

    The run of ``n`` cycles happens by chance with probability ``p_repeat**(n - 1)``;
    the limit keeps that below `false_alarm`, and is never below `minimum`. Returns 0
    (never stuck) when the noise is too small against the quantum to tell a stuck output
    from a steady one (``p_repeat >= 0.5``).
    """
    p = float(p_repeat)
    if not p < 0.5:
        return 0
    if p <= 0.0:
        return int(minimum)
    return int(max(minimum, 1 + math.ceil(math.log(false_alarm) / math.log(p))))


def stuck_readings(raw, usable, t_s, limit, hold_s=0.0, carry=None):
    """Readings that repeat one raw value for `limit` or more measurement cycles in a row.

    Parameters
    ----------
    raw : (n,) array
        One sensor's raw values in the order they were read (numbers or text frames).
    usable : (n,) bool
        Readings that passed the sensor's own screening; only these form runs (a
        dropout or invalid reading between two equal values neither breaks nor extends
        a run).
    t_s : (n,) array
        Reading times.
    limit : int
        From `stuck_limit`; 0 turns the check off.
    hold_s : float
        The unit's own measurement cycle: host samples inside one cycle repeat it by
        design, so a run counts ``floor(duration / hold_s) + 1`` cycles at most.
    carry : tuple, optional
        ``(value, first_time, readings)`` of the run in progress, from the previous call.

    Returns
    -------
    stuck : (n,) bool
    carry : tuple or None
        The run in progress after these readings.
    """
    n = len(raw)
    stuck = np.zeros(n, bool)
    usable = np.asarray(usable, bool)
    if limit <= 0 or not usable.any():
        return stuck, carry
    raw = np.asarray(raw)
    last = int(np.flatnonzero(usable)[-1])
    cont0 = carry is not None and bool(raw[int(np.argmax(usable))] == carry[0])
    if raw.dtype.kind in "fiub":
        values = raw.astype(np.float64, copy=False)
    else:
        # text frames: equal frames get equal ids (only equality matters; usable frames
        # parsed, so they are strings or bytes)
        ids = {}
        values = np.full(n, np.nan)
        for i in np.flatnonzero(usable):
            values[i] = ids.setdefault(raw[i], len(ids))
    t_first, count = _stuck_scan(values, usable, np.asarray(t_s, dtype=float), int(limit),
                                 float(hold_s), cont0,
                                 float(carry[1]) if cont0 else 0.0,
                                 int(carry[2]) if cont0 else 0, stuck)
    return stuck, (raw[last], t_first, count)


@njit(cache=True)
def _stuck_scan(values, usable, t, limit, hold_s, cont0, carry_t, carry_n, stuck):
    """One pass of `stuck_readings` over usable readings; returns the open run's
    first time and length."""
    have = False
    prev = 0.0
    t_first = carry_t
    count = carry_n
    for i in range(values.shape[0]):
        if not usable[i]:
            continue
        v = values[i]
        if have:
            if v == prev:
                count += 1
            else:
                count = 1
                t_first = t[i]
        elif cont0:
            count += 1
        else:
            count = 1
            t_first = t[i]
        have = True
        prev = v
        cycles = float(count)
        if hold_s > 0:
            x = (t[i] - t_first) / hold_s
            if math.isnan(x):
                cycles = math.nan  # as np.minimum: a NaN bound is never stuck
            else:
                cycles = min(cycles, math.floor(x) + 1.0)
        stuck[i] = cycles >= limit
    return t_first, count

