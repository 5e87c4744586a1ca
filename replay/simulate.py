"""The scenario simulator: ``rangefuse simulate SCENARIO.toml -o LOG [--seed N]``.

`simulate` runs a `replay.scenario.Scenario` and returns a `SimulatedRun` (sensor
streams with per-reading labels, environment streams, ground truth and the rig text);
`write_simulated` writes it as a log. The physics, in brief (``docs/scenario.md`` has
the whole story):

IR triangulation rangers
    The unit measures every ``hold_s`` (its own cycle) and holds its output in between.
    Each measurement is the unit's curve at the true sensor range (both sides of the
    peak, so a target nearer than the peak folds back), shifted by ``gain_bias`` times
    the strength a weak return loses (the unit reads the spot's position, so reflectivity
    biases it only a little), plus output noise that grows as the return weakens
    (``sigma / gain**weak_exponent``).
    Beyond the unit's reach (``see_max_m`` times the square root of the gain: the
    return power falls as gain over range squared) the output drops to a noisy floor.
    The host samples at its own rate and sees the held value through its ADC, so held
    samples repeat the same counts exactly unless ADC noise is configured.
Echo rangers
    Each ping's round trip is ``2 r / c(T, RH)`` at the *actual* air temperature and
    humidity (Cramer 1993 through `fusion.sensors.air.speed_of_sound`), plus timing
    noise. The unit hears the first sound that arrives after its ring-down
    (``2 min_range_m / c``) and before its timeout: its own target's echo, a nearer
    reflector in its beam cone, a late multipath ghost, or another unit's ping
    (crosstalk). Targets beyond ``max_range_m`` return nothing; soft or slanted targets
    drop echoes. The reading reaches the host through `EchoRanger.encode`, so every
    output style carries its own quantisation and temperature compensation.
Air
    The true temperature and humidity follow waypoints; the temperature sensor lags
    them with a first-order time constant and adds noise and a resolution step.

Reading labels (`replay.logfile.LABELS`): 0 genuine, 1 crosstalk, 2 multipath ghost or
beam-cone clutter (an echo, but not the target's direct one), 3 dropout (no echo from the
target: soft surface, inside the blanking zone, a dropout burst; for IR no return while
a target is in reach), 4 held repeat (a sample of a measurement already sampled, or a
stuck output), 5 no target (nothing within reach).

References
----------
O. Cramer, "The variation of the specific heat ratio and the speed of sound in air with
temperature, pressure, humidity, and CO2 concentration", J. Acoust. Soc. Am. 93(5),
2510-2516 (1993).
"""
from __future__ import annotations

import argparse
import dataclasses
import glob
import math
import os
import sys
import zlib
from dataclasses import dataclass

import numpy as np
from scipy.signal import lfilter

from fusion.errors import InputError, RangefuseError
from fusion.screening import safe_cycle_s
from fusion.sensors.adc import adc_lsb_v, volts_to_counts
from fusion.sensors.air import speed_of_sound

from ._io import check_output
from .logfile import SensorStream, write_log
from .scenario import Scenario, load_scenario

__all__ = ["SimulatedRun", "simulate", "write_simulated", "regenerate", "ping_schedule",
           "register", "main", "GENUINE", "CROSSTALK", "GHOST", "DROPOUT", "HELD", "NO_TARGET"]

GENUINE, CROSSTALK, GHOST, DROPOUT, HELD, NO_TARGET = range(6)
_SCENARIO_SUFFIX = ".scenario.toml"


# --------------------------------------------------------------------------------------
# Results
# --------------------------------------------------------------------------------------
@dataclass
class SimulatedRun:
    """What `simulate` produced, ready for `write_simulated`.

    Attributes
    ----------
    scenario : Scenario
    seed : int
        The seed actually used.
    rig_toml : str
        The rig description embedded in the log.
    streams : dict of str -> replay.logfile.SensorStream
        One stream per rig sensor, with per-reading labels.
    environment : dict of str -> (quantity, t_s, value)
        Air-temperature (and humidity) streams as the sensors reported them.
    truth : dict of str -> (t_s, range_m)
        Ground-truth range per direction, from the direction's reference point.
    created_utc, clock, writer : str
        Root attributes of the log.
    """

    scenario: Scenario
    seed: int
    rig_toml: str
    streams: dict
    environment: dict
    truth: dict
    created_utc: str
    clock: str
    writer: str

    def label_counts(self, name: str) -> np.ndarray:
        """Readings of sensor `name` per label code 0..5."""
        return np.bincount(self.streams[name].label.astype(np.int64), minlength=6)

    def summary(self) -> str:
        from .logfile import LABELS
        lines = [f"simulated {self.scenario.name!r}: {self.scenario.duration_s:g} s, seed "
                 f"{self.seed}"]
        for name, s in self.streams.items():
            counts = self.label_counts(name)
            parts = ", ".join(f"{LABELS[i]} {int(c)}" for i, c in enumerate(counts) if c)
            lines.append(f"  {name:<16} {len(s.t_s):>8} readings ({parts or 'none'})")
        for name, (q, t, _v) in self.environment.items():
            lines.append(f"  {name:<16} {len(t):>8} {q} samples")
        for d, (t, r) in self.truth.items():
            lines.append(f"  truth {d:<10} {len(t):>8} samples, {np.min(r):.3f}..{np.max(r):.3f} m")
        return "\n".join(lines)


# --------------------------------------------------------------------------------------
# The world: truth, surfaces, air
# --------------------------------------------------------------------------------------
def _rng(seed: int, tag: str) -> np.random.Generator:
    # One generator per component, keyed by name: adding a sensor or a fault leaves the
    # random numbers of every other component unchanged.
    return np.random.default_rng(np.random.SeedSequence([int(seed), zlib.crc32(tag.encode())]))


class _World:
    def __init__(self, sc: Scenario):
        self.sc = sc
        self.duration = sc.duration_s
        self._jumps = [f for f in sc.faults if f.kind == "target_jump"]

    def truth(self, direction: str, t) -> np.ndarray:
        t = np.asarray(t, dtype=float)
        tg = self.sc.targets[direction]
        r = tg.motion.at(t)
        for st in tg.steps:
            r = np.where((t >= st.from_s) & (t < st.to_s), st.range_m, r)
        for f in self._jumps:
            if f.target == direction:
                r = np.where(f.active(t), r + f.params["jump_m"], r)
        return np.maximum(r, 0.0)

    def surface(self, direction: str, t):
        t = np.asarray(t, dtype=float)
        gain = np.ones(t.shape)
        slant = np.zeros(t.shape)
        p_drop = np.zeros(t.shape)
        for s in self.sc.surfaces:  # later segments override earlier ones where they overlap
            if s.direction != direction:
                continue
            m = (t >= s.from_s) & (t < s.to_s)
            gain[m], slant[m], p_drop[m] = s.ir_gain, s.slant_deg, s.echo_dropout_p
        return gain, slant, p_drop

    def temp(self, t) -> np.ndarray:
        return self.sc.air.temp_c.at(t)

    def rh(self, t) -> np.ndarray:
        return np.clip(self.sc.air.relative_humidity.at(t), 0.0, 1.0)

    def speed(self, t) -> np.ndarray:
        return np.asarray(speed_of_sound(self.temp(t), self.rh(t)), dtype=float)


def _faults(sc, kind, target):
    return [f for f in sc.faults if f.kind == kind and f.target == target]


# --------------------------------------------------------------------------------------
# IR triangulation rangers
# --------------------------------------------------------------------------------------
def _host_times(rate_hz, phase_s, jitter_s, duration, rng):
    n = max(0, int(math.ceil((duration - phase_s) * rate_hz)))
    t = phase_s + np.arange(n) / rate_hz
    t = t[t < duration]
    if jitter_s > 0:
        t = t + rng.uniform(-jitter_s, jitter_s, t.size)
    return t


def _simulate_ir(world: _World, name: str, sensor, sim, seed):
    sc = world.sc
    rng = _rng(seed, "ir:" + name)
    t = _host_times(sim.rate_hz, sim.phase_s, sim.jitter_s, world.duration, rng)
    n = t.size
    hold = sensor.hold_s if sim.hold_s is None else sim.hold_s
    if hold > 0:
        k = np.floor((t - sim.hold_phase_s) / hold).astype(np.int64)
        uk, inv = np.unique(k, return_inverse=True)
        t_meas = sim.hold_phase_s + uk * hold
    else:
        inv = np.arange(n)
        t_meas = t
    m = t_meas.size
    curve = sensor.curve
    r = np.maximum(world.truth(sensor.direction, t_meas) - sensor.offset_m, 0.0)
    gain, slant, _ = world.surface(sensor.direction, t_meas)
    g = gain * np.cos(np.radians(slant))
    sigma0 = sensor.volts_sigma if sim.volts_sigma is None else sim.volts_sigma
    reach = (curve.max_range_m if sim.see_max_m is None else sim.see_max_m) * np.sqrt(g)
    present = r <= reach
    noise = rng.standard_normal(m)
    floor_noise = rng.standard_normal(m)
    # A triangulation unit reads the spot's position, not its brightness: a weak return
    # is mostly noisier, and only slightly biased (``gain_bias`` of the lost strength).
    v_target = ((1.0 - sim.gain_bias * (1.0 - g)) * curve.volts(r)
                + sigma0 / g ** sim.weak_exponent * noise)
    floor = (0.5 * float(curve.volts(curve.max_range_m)) if sim.floor_volts is None
             else sim.floor_volts)
    lost = np.zeros(m, bool)
    for f in _faults(sc, "dropout_burst", name):
        u = _rng(seed, f"fault:{name}:dropout:{f.from_s}").random(m)
        lost |= f.active(t_meas) & (u < f.params["p"])
    see = present & ~lost
    v = np.where(see, v_target, floor + sigma0 * floor_noise)
    v = np.maximum(v, 0.0)

    label_m = np.where(see, GENUINE, np.where(present, DROPOUT, NO_TARGET)).astype(np.int8)
    label = label_m[inv]
    repeat = np.zeros(n, bool)
    repeat[1:] = inv[1:] == inv[:-1]
    label[repeat] = HELD
    vs = v[inv]
    if sensor.output == "counts":
        if sim.adc_noise_counts > 0:
            lsb = adc_lsb_v(sensor.adc_bits, sensor.adc_vref)
            vs = vs + sim.adc_noise_counts * lsb * rng.standard_normal(n)
        raw = volts_to_counts(vs, sensor.adc_bits, sensor.adc_vref).astype(float)
    else:
        raw = vs
    return _finish(sc, name, sensor, t, raw, None, label, seed)


# --------------------------------------------------------------------------------------
# Echo rangers
# --------------------------------------------------------------------------------------
def ping_schedule(rig, sims, duration_s, seed=0) -> dict:
    """Ping times of every echo ranger of a rig over ``[0, duration_s)``.

    ``"free"``: each unit on its own period and phase (plus a random delay of up to
    ``ping_jitter_s`` per ping). ``"round_robin"``: one shared cycle (the rig's
    ``cycle_s``, or `fusion.screening.safe_cycle_s` of all units' maximum ranges), the
    units in ``schedule.order`` then in rig order. ``"chained"``: each unit fires the
    next after its own safe window (`safe_cycle_s` of its maximum range).

    Returns
    -------
    dict of str -> ndarray
    """
    names = list(rig.echo_names)
    sched = rig.schedule
    out = {}
    if sched.mode == "free":
        for nm in names:
            s = sims[nm]
            n = max(0, int(math.ceil((duration_s - s.ping_phase_s) / s.ping_period_s)))
            out[nm] = s.ping_phase_s + np.arange(n) * s.ping_period_s
    else:
        order = list(sched.order) + [nm for nm in names if nm not in sched.order]
        if sched.mode == "round_robin":
            cycle = sched.cycle_s or safe_cycle_s([rig.sensors[nm].max_range_m for nm in order],
                                                  sched.ring_down_s)
            windows = np.full(len(order), cycle)
        else:
            windows = np.array([safe_cycle_s(rig.sensors[nm].max_range_m, sched.ring_down_s)
                                for nm in order])
        period = float(np.sum(windows))
        starts = np.concatenate(([0.0], np.cumsum(windows)[:-1]))
        n = int(math.ceil(duration_s / period))
        for nm, t0 in zip(order, starts):
            out[nm] = t0 + np.arange(n) * period
    for nm in names:
        p = out[nm]
        j = sims[nm].ping_jitter_s
        if j > 0:
            p = p + _rng(seed, "ping:" + nm).uniform(0.0, j, p.size)
        out[nm] = p[p < duration_s]
    return out


@dataclass
class _Pings:
    """One echo unit's pings and what it would hear of its own sound."""

    p: np.ndarray          # ping times
    c: np.ndarray          # speed of sound at each ping
    blank: np.ndarray      # ring-down end, seconds after the ping
    own: np.ndarray        # what the unit reports of its own ping, s after the ping; inf
    sound: np.ndarray      # first real echo of the ping back at the robot (no ring-down); inf
    own_label: np.ndarray  # label if the own arrival (or its absence) decides
    timeout: float


def _own_echoes(world, name, sensor, sim, p, seed) -> _Pings:
    sc = world.sc
    rng = _rng(seed, "echo:" + name)
    n = p.size
    c = world.speed(p)
    r = np.maximum(world.truth(sensor.direction, p) - sensor.offset_m, 0.0)
    _gain, slant, p_soft = world.surface(sensor.direction, p)
    sig_m = sensor.sigma_m if sim.sigma_m is None else sim.sigma_m
    sig_f = sensor.sigma_frac if sim.sigma_frac is None else sim.sigma_frac
    sigma = np.hypot(sig_m, sig_f * r)
    blank = 2.0 * sensor.min_range_m / c
    timeout = sensor.timeout_s

    # A flat surface slanted past the beam's half-angle reflects the ping away.
    p_slant = 1.0 / (1.0 + np.exp(-(slant - sim.beam_half_angle_deg) / 2.0))
    p_slant = np.where(slant > 0, p_slant, 0.0)
    p_drop = 1.0 - (1.0 - p_soft) * (1.0 - p_slant)
    u_drop, u_ghost, u_extra = rng.random(n), rng.random(n), rng.random(n)
    noise = rng.standard_normal(n)

    tof_d = 2.0 * np.maximum(r + sigma * noise, 0.0) / c
    in_reach = r <= sensor.max_range_m
    inside_blank = r < sensor.min_range_m
    heard_d = in_reach & ~inside_blank & (u_drop >= p_drop) & (tof_d >= blank) & (tof_d < timeout)
    lo, hi = sim.multipath_extra_m
    tof_g = tof_d + (lo + (hi - lo) * u_extra) / c
    ghost = in_reach & (u_ghost < sim.multipath_p) & (tof_g >= blank) & (tof_g < timeout)

    own = np.full(n, np.inf)
    label = np.where(in_reach, DROPOUT, NO_TARGET).astype(np.int8)
    own = np.where(heard_d, tof_d, own)
    label[heard_d] = GENUINE
    own = np.where(ghost, tof_g, own)
    label[ghost] = GHOST
    for i, cl in enumerate(sim.clutter):
        crng = _rng(seed, f"clutter:{name}:{i}")
        u = crng.random(n)
        tof_c = 2.0 * np.maximum(cl.range_m + sig_m * crng.standard_normal(n), 0.0) / c
        hit = ((p >= cl.from_s) & (p < cl.to_s) & (u < cl.p) & (tof_c >= blank)
               & (tof_c < timeout) & (tof_c < own))
        own = np.where(hit, tof_c, own)
        label[hit] = GHOST
    sound = own.copy()
    # Nothing heard and the target inside the blanking zone: some units report the tail
    # of their own ring-down as an echo at the minimum range.
    if sim.blank_behaviour == "ring_down":
        rd = ~np.isfinite(own) & inside_blank
        own = np.where(rd, blank, own)
        label[rd] = DROPOUT
    for f in _faults(sc, "dropout_burst", name):
        u = _rng(seed, f"fault:{name}:dropout:{f.from_s}").random(n)
        hit = f.active(p) & (u < f.params["p"])
        own[hit] = np.inf
        label[hit] = DROPOUT
    return _Pings(p=p, c=c, blank=blank, own=own, sound=sound, own_label=label,
                  timeout=timeout)


def _crosstalk_arrivals(world, rig, sims, pings, receiver, seed):
    """Times at which other units' sound reaches `receiver` loudly enough to trigger it."""
    sc = world.sc
    a = rig.sensors[receiver]
    arrivals = []
    for other, pb in pings.items():
        if other == receiver or pb.p.size == 0:
            continue
        # Our units ride together on the robot: the echo that comes back to b comes back
        # to a as well (a hears it off its axis, with probability crosstalk_p), at b's
        # own echo time after b's ping.
        rng = _rng(seed, f"xt:{other}->{receiver}")
        u = rng.random(pb.p.size)
        x = pb.p + pb.sound + 2.0 * a.sigma_m * rng.standard_normal(pb.p.size) / pb.c
        ok = np.isfinite(pb.sound) & (u < sims[receiver].crosstalk_p)
        arrivals.append(x[ok])
    for fu in sc.foreign:
        if receiver not in fu.heard_by:
            continue
        k0 = int(math.ceil((fu.from_s - fu.phase_s) / fu.period_s))
        k1 = int(math.ceil((min(fu.to_s, world.duration) - fu.phase_s) / fu.period_s))
        pf = fu.phase_s + np.arange(max(k0, 0), max(k1, 0)) * fu.period_s
        pf = pf[(pf >= fu.from_s) & (pf < fu.to_s)]
        rng = _rng(seed, f"foreign:{fu.name}->{receiver}")
        u = rng.random(pf.size)
        x = pf + fu.path_m.at(pf) / world.speed(pf)
        arrivals.append(x[u < fu.p])
    if not arrivals:
        return np.zeros(0)
    return np.sort(np.concatenate(arrivals))


def _simulate_echoes(world: _World, seed) -> dict:
    sc = world.sc
    rig = sc.rig
    sims = sc.sensors
    schedule = ping_schedule(rig, sims, world.duration, seed)
    pings = {}
    for nm, p in schedule.items():
        dead = np.zeros(p.size, bool)
        for f in _faults(sc, "dead", nm):  # a dead unit neither pings nor reports
            dead |= f.active(p)
        pings[nm] = _own_echoes(world, nm, rig.sensors[nm], sims[nm], p[~dead], seed)
    out = {}
    for nm, pk in pings.items():
        sensor = rig.sensors[nm]
        sim = sims[nm]
        x = _crosstalk_arrivals(world, rig, sims, pings, nm, seed)
        start = pk.p + pk.blank
        end = pk.p + np.minimum(pk.own, pk.timeout)
        # The first foreign arrival after the ring-down; it wins if it beats the unit's own.
        xs = np.concatenate((x, [np.inf]))
        first = xs[np.searchsorted(x, start, side="left")]
        xt = first < end
        for f in _faults(sc, "crosstalk_burst", nm):
            # Another unit's ping inside the listening window, at a random point of it.
            rng = _rng(seed, f"fault:{nm}:crosstalk:{f.from_s}")
            u, w = rng.random(pk.p.size), rng.random(pk.p.size)
            hit = f.active(pk.p) & (u < f.params["p"]) & (end > start)
            burst = start + w * (end - start)
            first = np.where(hit & (~xt | (burst < first)), burst, first)
            xt |= hit
        for f in _faults(sc, "dropout_burst", nm):
            u = _rng(seed, f"fault:{nm}:dropout:{f.from_s}").random(pk.p.size)
            xt &= ~(f.active(pk.p) & (u < f.params["p"]))
        tof = np.where(xt, first - pk.p, pk.own)
        label = np.where(xt, CROSSTALK, pk.own_label).astype(np.int8)
        heard = np.isfinite(tof)
        t_s = pk.p + np.where(heard, tof, pk.timeout) + sensor.latency_s
        raw, keep = _encode_echo(world, sensor, sim, pk, tof, heard)
        ping = pk.p if sensor.ping_logged else None
        out[nm] = _finish(sc, nm, sensor, t_s[keep], raw[keep],
                          None if ping is None else ping[keep], label[keep], seed)
    return out


def _encode_echo(world, sensor, sim, pk, tof, heard):
    """Raw readings for the reported times of flight (`tof`, NaN/inf: no echo)."""
    n = pk.p.size
    temp = world.temp(pk.p)
    rh = world.rh(pk.p)
    pu = sim.power_up_temp_c if sim.power_up_temp_c is not None else float(world.temp(0.0))
    # The true power-up temperature of the unit, whatever the rig file claims.
    unit = dataclasses.replace(sensor, power_up_temp_c=math.nan)
    keep = np.ones(n, bool)
    r_equiv = np.where(heard, pk.c * np.where(heard, tof, 0.0) / 2.0, 0.0)
    enc = unit.encode(r_equiv + sensor.offset_m, temp, rh, power_up_temp_c=pu)
    if sensor.output == "echo_time":
        raw = np.where(heard, enc, 0.0)  # the host timer saw nothing: 0 means no echo
    else:
        rep = sensor.dropout_report_m
        if not math.isfinite(rep):
            keep = heard  # a unit that reports nothing at all when it hears nothing
            rep = sensor.max_range_m
        drop = _reported_raw(sensor, rep)
        if sensor.output == "serial":
            raw = np.where(heard, enc.astype(object), drop).astype(object)
        else:
            raw = np.where(heard, enc, drop)
    return raw, keep


def _reported_raw(sensor, reported_m):
    """The raw value a self-timing unit sends for a reported range, rounded up so that it
    decodes to at least that range (how the unit says "no echo")."""
    if sensor.output == "serial":
        count = max(0, int(math.ceil(reported_m / sensor.frame_unit_m)) - 1)
        while count * sensor.frame_unit_m < reported_m:  # the decoder's own arithmetic
            count += 1
        return sensor.frame_format.format(count=count)
    if sensor.output == "pulse_width":
        scale, quantum = sensor.seconds_per_m, sensor.tick_s
    else:
        scale, quantum = sensor.volts_per_m, sensor.volts_step
    x = reported_m * scale
    if quantum > 0:
        k = math.ceil(x / quantum) - 1
        while k * quantum / scale < reported_m:
            k += 1
        x = k * quantum
    while x / scale < reported_m:
        x = np.nextafter(x, np.inf)
    return float(x)


# --------------------------------------------------------------------------------------
# Faults common to all sensors, and the stream
# --------------------------------------------------------------------------------------
def _finish(sc, name, sensor, t_s, raw, ping, label, seed) -> SensorStream:
    t_true = np.asarray(t_s, dtype=float)
    raw = raw.copy()
    label = label.copy()
    for f in _faults(sc, "stuck", name):
        m = f.active(t_true)
        if not m.any():
            continue
        if "value" in f.params:
            value = f.params["value"]
        else:  # the output freezes at what it showed when the fault struck
            before = np.flatnonzero(t_true < f.from_s)
            value = raw[before[-1]] if before.size else raw[np.flatnonzero(m)[0]]
        raw[m] = value
        label[m] = HELD
    t_log = t_true.copy()
    ping_log = None if ping is None else np.asarray(ping, dtype=float).copy()
    for f in _faults(sc, "clock_jump", name):
        m = f.active(t_true)
        t_log[m] += f.params["jump_s"]
        if ping_log is not None:
            ping_log[m] += f.params["jump_s"]
    keep = np.ones(t_true.size, bool)
    for f in _faults(sc, "dead", name):
        keep &= ~f.active(t_true)
    if raw.dtype == object:
        raw = np.array([str(x) for x in raw[keep]], dtype=object)
    else:
        raw = raw[keep]
    return SensorStream(name, sensor.kind, sensor.output, t_log[keep], raw,
                        None if ping_log is None else ping_log[keep], label[keep])


def _lagged(world, t_sample, profile_at, lag_s, rate_hz):
    """A first-order lag ``tau dy/dt = u - y`` of the true quantity, at the sample times.

    Integrated on a grid fine against both the lag and the sampling (exact for an input
    held constant over each grid step), starting settled at the initial value.
    """
    if lag_s <= 0 or t_sample.size == 0:
        return profile_at(t_sample)
    dt = min(1.0 / rate_hz, lag_s / 20.0, 0.05)
    grid = np.arange(0.0, world.duration + 2 * dt, dt)
    u = profile_at(grid)
    a = math.exp(-dt / lag_s)
    y, _ = lfilter([1.0 - a], [1.0, -a], u, zi=[a * u[0]])
    return np.interp(t_sample, grid, y)


def _environment(world: _World, seed) -> dict:
    sc = world.sc
    env = {}
    ts = sc.air.sensor
    if ts is not None:
        rng = _rng(seed, "air:" + ts.stream)
        t = _host_times(ts.rate_hz, ts.phase_s, 0.0, world.duration, rng)
        v = (_lagged(world, t, world.temp, ts.lag_s, ts.rate_hz)
             + ts.noise_c * rng.standard_normal(t.size))
        if ts.resolution_c > 0:
            v = np.round(v / ts.resolution_c) * ts.resolution_c
        env[ts.stream] = ("air_temperature", t, v)
    hs = sc.air.humidity_sensor
    if hs is not None:
        rng = _rng(seed, "rh:" + hs.stream)
        t = _host_times(hs.rate_hz, hs.phase_s, 0.0, world.duration, rng)
        v = (_lagged(world, t, world.rh, hs.lag_s, hs.rate_hz)
             + hs.noise * rng.standard_normal(t.size))
        env[hs.stream] = ("relative_humidity", t, np.clip(v, 0.0, 1.0))
    for name, (q, t, v) in list(env.items()):
        keep = np.ones(t.size, bool)
        v = v.copy()
        for f in _faults(sc, "temp_fail", name):
            m = f.active(t)
            if f.params["mode"] == "nan":
                v[m] = np.nan
            else:
                keep &= ~m
        t_log = t.copy()
        for f in _faults(sc, "clock_jump", name):
            t_log[f.active(t)] += f.params["jump_s"]
        env[name] = (q, t_log[keep], v[keep])
    return env


# --------------------------------------------------------------------------------------
# The library entry points
# --------------------------------------------------------------------------------------
def simulate(scenario, seed: int | None = None) -> SimulatedRun:
    """Simulate a scenario.

    Parameters
    ----------
    scenario : Scenario or path-like
        A scenario, or a scenario file to load.
    seed : int, optional
        Overrides the scenario's seed. The same scenario and seed give identical
        streams (and, through `write_simulated`, identical log bytes).

    Returns
    -------
    SimulatedRun

    Raises
    ------
    ConfigError
        A scenario file that cannot be used.
    InputError
        A negative seed.

    Examples
    --------
    >>> run = simulate("datasets/cold-store-dock.scenario.toml")   # doctest: +SKIP
    >>> write_simulated("dock.h5", run)                            # doctest: +SKIP
    """
    sc = scenario if isinstance(scenario, Scenario) else load_scenario(scenario)
    if seed is None:
        seed = sc.seed
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise InputError(f"the seed must be a whole number >= 0, got {seed!r}", field="seed")
    seed = int(seed)
    world = _World(sc)
    streams = {}
    echoes = _simulate_echoes(world, seed) if sc.rig.echo_names else {}
    for name, sensor in sc.rig.sensors.items():
        if sensor.kind == "triangulation":
            streams[name] = _simulate_ir(world, name, sensor, sc.sensors[name], seed)
        else:
            streams[name] = echoes[name]
    n = int(math.floor(sc.duration_s * sc.truth_rate_hz + 1e-9)) + 1
    t_truth = np.arange(n) / sc.truth_rate_hz
    truth = {d: (t_truth, world.truth(d, t_truth)) for d in sc.rig.directions}
    writer = f"rangefuse simulate (scenario {sc.name!r}, seed {seed})"
    return SimulatedRun(scenario=sc, seed=seed, rig_toml=sc.rig_toml, streams=streams,
                        environment=_environment(world, seed), truth=truth,
                        created_utc=sc.created_utc, clock=sc.clock, writer=writer)


def _scenario_files(sc) -> list:
    """The files a scenario was read from (itself and its rig file): never outputs."""
    return [p for p in (sc.source, sc.rig_source) if p and os.path.exists(p)]


def write_simulated(path, run: SimulatedRun, inputs=()) -> None:
    """Write a simulated run as a log file (atomically; never over an input)."""
    ins = list(inputs) + _scenario_files(run.scenario)
    write_log(path, run.rig_toml, list(run.streams.values()), run.environment, run.truth,
              clock=run.clock, writer=run.writer, created_utc=run.created_utc, inputs=ins)


def regenerate(folder, verbose=False) -> list:
    """Re-simulate every ``*.scenario.toml`` directly in `folder` to ``<name>.h5`` beside it.

    Each log comes out bit for bit as committed: scenario files carry their seed and
    creation time. Returns the paths written.
    """
    folder = os.fspath(folder)
    if not os.path.isdir(folder):
        raise InputError("not a folder of scenario files", file=folder, field="--regenerate")
    paths = sorted(glob.glob(os.path.join(glob.escape(folder), "*" + _SCENARIO_SUFFIX)))
    if not paths:
        raise InputError(f"no *{_SCENARIO_SUFFIX} files here", file=folder, field="--regenerate")
    written = []
    for sp in paths:
        out = sp[: -len(_SCENARIO_SUFFIX)] + ".h5"
        run = simulate(sp)
        write_simulated(out, run)
        written.append(out)
        if verbose:
            print(f"{out}: {os.path.getsize(out)} bytes")
    return written


# --------------------------------------------------------------------------------------
# Command line
# --------------------------------------------------------------------------------------
def _seed_arg(text):
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 0, got {text!r}") from None
    if v < 0:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 0, got {v}")
    return v


def _add_arguments(p):
    p.add_argument("scenario", help="scenario file (TOML, see docs/scenario.md)")
    p.add_argument("-o", "--output", "--out", dest="output", required=True,
                   help="log file to write (HDF5)")
    p.add_argument("--seed", type=_seed_arg, default=None,
                   help="random seed (default: the scenario's seed)")
    p.add_argument("-q", "--quiet", action="store_true", help="do not print the summary")


def _run(args) -> int:
    sc = load_scenario(args.scenario)
    check_output(args.output, [args.scenario] + _scenario_files(sc), field="--output")
    run = simulate(sc, seed=args.seed)
    write_simulated(args.output, run, inputs=[args.scenario])
    if not args.quiet:
        print(run.summary())
        print(f"wrote {args.output}")
    return 0


def register(subparsers) -> None:
    """Add ``rangefuse simulate`` to the command's subparsers."""
    p = subparsers.add_parser("simulate", help="simulate a scenario into a log",
                              description="Simulate a scenario (rig, targets, air, "
                              "disturbances, faults) into a log with ground truth and "
                              "per-reading labels. Same scenario and seed, same bytes.",
                              epilog="example:\n  rangefuse simulate "
                              "datasets/shelf-pass.scenario.toml -o pass.h5 --seed 3\n\n"
                              "The scenario format is in docs/scenario.md.",
                              formatter_class=argparse.RawDescriptionHelpFormatter)
    _add_arguments(p)
    p.set_defaults(func=_run)


def main(argv=None) -> int:
    """``python -m replay.simulate`` — simulate one scenario, or ``--regenerate FOLDER``."""
    argv = list(sys.argv[1:] if argv is None else argv)
    try:
        if argv and argv[0] == "--regenerate":
            p = argparse.ArgumentParser(prog="python -m replay.simulate --regenerate")
            p.add_argument("--regenerate", metavar="FOLDER", required=True)
            args = p.parse_args(argv)
            regenerate(args.regenerate, verbose=True)
            return 0
        p = argparse.ArgumentParser(prog="python -m replay.simulate")
        _add_arguments(p)
        return _run(p.parse_args(argv))
    except RangefuseError as exc:
        print(f"simulate: error: {exc.one_line()}", file=sys.stderr)
        return 2


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
