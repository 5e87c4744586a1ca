"""The fuser: readings in, one decision per reading and a track per direction out.

`Fuser` keeps the estimator state between calls. `Fuser.process` runs whole arrays of
readings (a replay chunk, processed in stamp order); `Fuser.push` runs one reading
through the same code, so readings pushed in stamp order get exactly the decisions a
replay gives. (On the robot readings are pushed as they arrive; only a sensor whose
clock jumps ahead makes the two orders differ, and only the pushed order can show it:
decision ``clock_ahead``.)
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from . import decisions as D
from .errors import InputError
from .estimators import _kernels as K
from .measurements import Measurements
from .noise import echo_mixture
from .rig import Rig
from .screening import (_T_MAX_C, _T_MIN_C, air_at, classify_crosstalk, raw_noise, repeat_probability,
                        stuck_limit, stuck_readings)
from .sensors.air import speed_of_sound
from ._chi2 import chi2_ppf

__all__ = ["Fuser", "Estimate", "Decision", "StepBatch", "make_fuser"]


def make_fuser(rig: Rig):
    """The fuser the rig's ``[estimator] kind`` asks for: `Fuser` (Kalman) or
    `fusion.estimators.particle.ParticleFuser`; both have the same interface."""
    if rig.estimator.kind == "particle":
        from .estimators.particle import ParticleFuser
        return ParticleFuser(rig)
    return Fuser(rig)

_PING_MEMORY_S = 1.0


@dataclass(frozen=True)
class Estimate:
    """The fused state of one direction after a reading.

    ``range_m`` and ``sigma_m`` are the moments of the whole Gaussian sum, so while two
    near-zone hypotheses are alive the sigma covers both; ``p_major`` is the weight of
    the heaviest hypothesis and ``range_major_m`` is not reported separately here (see
    the track file).
    """

    t_s: float
    direction: str
    range_m: float
    sigma_m: float
    rate_mps: float
    rate_sigma_mps: float
    p_major: float
    n_hypotheses: int


@dataclass(frozen=True)
class Decision:
    """What happened to one reading."""

    sensor: str
    t_s: float
    code: int
    innovation_m: float
    nis: float
    branch: int
    branch_prob: float
    flags: int

    @property
    def reason(self) -> str:
        return D.name_of(self.code)

    @property
    def accepted(self) -> bool:
        return self.code < D.FIRST_REJECT


@dataclass
class StepBatch:
    """Per-reading results of `Fuser.process`.

    Every array has one entry per input reading, sensor by sensor in the order the
    readings were given; ``order`` is the permutation the estimator processed them in
    (time order), so ``x[order]`` is a time-ordered view. ``row`` is the reading's index
    in its sensor's input arrays, so ``(sensor, row)`` identifies it.
    """

    order: np.ndarray       # processing (time) order
    sensor: np.ndarray      # int, index into Fuser.sensor_names
    row: np.ndarray         # int, index within that sensor's input
    t_s: np.ndarray         # reading timestamp
    t_meas_s: np.ndarray    # timestamp minus latency
    direction: np.ndarray   # int, index into Fuser.directions
    code: np.ndarray
    flags: np.ndarray
    innovation_m: np.ndarray
    nis: np.ndarray
    branch: np.ndarray
    branch_prob: np.ndarray
    loglik: np.ndarray
    z_m: np.ndarray         # (n, 2) candidates (far/only, near)
    sigma_m: np.ndarray     # (n, 2)
    raw_m: np.ndarray
    temp_c: np.ndarray
    state: np.ndarray       # (n, 5): range, rate, P00, P01, P11 after the reading
    p_major: np.ndarray
    n_hyp: np.ndarray
    t_state_s: np.ndarray

    def __len__(self):
        return len(self.code)

    def in_time_order(self) -> "StepBatch":
        """A copy with every array in processing (time) order."""
        o = self.order
        kw = {f: np.take(getattr(self, f), o, axis=0) for f in self.__dataclass_fields__
              if f != "order"}
        return StepBatch(order=np.arange(len(o)), **kw)


def _params(est, tau=None) -> np.ndarray:
    p = np.zeros(K.N_PARAMS)
    p[K.P_Q] = est.accel_psd
    p[K.P_GATE] = np.inf if est.gate_probability >= 1.0 else chi2_ppf(est.gate_probability, 1)
    p[K.P_K] = est.max_hypotheses
    p[K.P_PRUNE] = est.prune_weight
    p[K.P_NEAR_PRIOR] = est.near_prior
    p[K.P_AMB] = est.ambiguous_below
    p[K.P_OUTLIER] = est.outlier_density
    p[K.P_REACQ_N] = est.reacquire_count
    p[K.P_REACQ_W] = est.reacquire_window_s
    p[K.P_MAX_LAG] = est.max_lag_s
    p[K.P_MAX_LEAD] = est.max_lead_s
    p[K.P_INIT_RATE] = est.init_rate_sigma_mps
    p[K.P_MERGE] = 1.0
    p[K.P_VMAX] = est.max_rate_mps
    return p


class Fuser:
    """Fuse a rig's rangers, one direction per track.

    Parameters
    ----------
    rig : fusion.Rig

    Examples
    --------
    >>> from fusion import Fuser, Rig                       # doctest: +SKIP
    >>> fuser = Fuser(Rig.load("datasets/cold-store-dock.rig.toml"))  # doctest: +SKIP
    >>> est, dec = fuser.push("echo_front", 0.0, 0.00291)   # doctest: +SKIP
    >>> dec.reason, round(est.range_m, 3)                   # doctest: +SKIP
    ('accepted', 0.5)
    """

    #: The ``estimator.kind`` this class runs; a subclass with another engine (the
    #: particle estimator) overrides it, its message and `_kernel`.
    estimator_kind = "kalman"
    _kind_hint = ("Fuser runs the Kalman estimator; fusion.make_fuser(rig) builds the one "
                  "the rig asks for (ParticleFuser for kind='particle')")

    def __init__(self, rig: Rig):
        if rig.estimator.kind != self.estimator_kind:
            raise InputError(self._kind_hint, field="estimator.kind")
        self.rig = rig
        self.sensor_names = tuple(rig.sensors)
        self.directions = tuple(rig.directions)
        self._index = {n: i for i, n in enumerate(self.sensor_names)}
        sens = [rig.sensors[n] for n in self.sensor_names]
        self._dir_of = np.array([self.directions.index(s.direction) for s in sens], np.int64)
        self._kind = np.array([K.KIND_ECHO if s.kind == "echo" else K.KIND_IR for s in sens],
                              np.int64)
        self._hold = np.array([getattr(s, "hold_s", 0.0) for s in sens])
        self._blank = np.array([getattr(s, "min_range_m", 0.0) + s.offset_m for s in sens])
        # Dropout evidence from the same beam mixture the particle estimator uses: "no
        # echo" is likely inside the blanking zone, and has the max-range weight outside.
        mix = [echo_mixture(s) if s.kind == "echo" else None for s in sens]
        self._p_blank_drop = np.array([m.p_blank_dropout if m else 0.0 for m in mix])
        self._p_drop = np.array([m.w_max if m else 0.0 for m in mix])
        c_fast, c_slow = speed_of_sound(60.0), speed_of_sound(-40.0)
        self._tau_min = np.array([2 * getattr(s, "min_range_m", 0.0) / c_fast for s in sens])
        self._tau_max = np.array([2 * getattr(s, "max_range_m", 0.0) / c_slow for s in sens])
        self._par = _params(rig.estimator)
        # A unit whose output stays at one value for longer than its own noise allows is
        # stuck: those readings are decided `stuck` before they reach the estimator.
        self._stuck_limit = [stuck_limit(repeat_probability(*raw_noise(s))) for s in sens]
        self._stuck_run = [None] * len(sens)
        self.state = K.new_state(len(self.directions), len(sens), rig.estimator.max_hypotheses)
        self._air_t = np.zeros(0)
        self._air_v = np.zeros(0)
        self._rh_t = np.zeros(0)
        self._rh_v = np.zeros(0)
        self._first_air = math.nan  # the first good air sample (a unit's power-up air)
        self._air_pushed = self._rh_pushed = False
        self._last_batch_t = math.inf  # first reading time of the last batch decoded
        self._pings = [(np.zeros(0), np.zeros(0), np.zeros(0, np.int64)) if k == K.KIND_ECHO
                       else (None, None, None) for k in self._kind]
        self._crosstalk_possible = int(np.count_nonzero(self._kind == K.KIND_ECHO)) >= 2

    # --- environment -------------------------------------------------------------
    # Only usable samples are kept (a failed one carries no value; the staleness of the
    # last good one is what the decode needs), and samples far older than the readings
    # being decoded are dropped, so streaming for days keeps push cheap and memory flat.
    def push_air(self, t_s, temp_c) -> None:
        """Add air-temperature samples, degC (not kelvin); NaN, and a value outside
        -60..90 degC, marks a failed sample.

        Pushed samples are used whether or not the rig names an ``[air] stream`` (that
        name only says which stream of a log to replay). Samples more than a minute older
        than the first reading of the last two batches decoded are forgotten (streaming
        for days keeps memory flat): a reading older than that, decoded later, gets the
        configured fallback temperature (and the ``temp_fallback`` flag) if no kept
        sample precedes it.
        """
        try:
            t_s = np.atleast_1d(np.asarray(t_s, float))
            temp_c = np.atleast_1d(np.asarray(temp_c, float))
        except (TypeError, ValueError):
            raise InputError("expected numbers (t_s, temp_c)", field="push_air") from None
        if t_s.shape != temp_c.shape or t_s.ndim != 1:
            raise InputError(f"t_s has {t_s.size} values but temp_c has {temp_c.size}; "
                             "expected 1-D arrays of one length", field="push_air")
        self._air_pushed = True
        good = _good_air(t_s, temp_c)
        t_s, temp_c = t_s[good], temp_c[good]
        if t_s.size and not np.isfinite(self._first_air):
            self._first_air = float(temp_c[np.argmin(t_s)])
        self._air_t, self._air_v = _append_sorted(self._air_t, self._air_v, t_s, temp_c)

    def push_humidity(self, t_s, relative_humidity) -> None:
        """Add relative-humidity samples (fraction 0..1; others count as failed), used
        whether or not the rig names an ``[air] humidity_stream``."""
        try:
            t_s = np.atleast_1d(np.asarray(t_s, float))
            rh = np.atleast_1d(np.asarray(relative_humidity, float))
        except (TypeError, ValueError):
            raise InputError("expected numbers (t_s, relative_humidity)",
                             field="push_humidity") from None
        if t_s.shape != rh.shape or t_s.ndim != 1:
            raise InputError(f"t_s has {t_s.size} values but relative_humidity has {rh.size}; "
                             "expected 1-D arrays of one length", field="push_humidity")
        self._rh_pushed = True
        good = np.isfinite(t_s) & np.isfinite(rh) & (rh >= 0) & (rh <= 1)
        self._rh_t, self._rh_v = _append_sorted(self._rh_t, self._rh_v, t_s[good], rh[good])

    def _forget_environment_before(self, t_s) -> None:
        """Drop samples no reading from `t_s` - `_ENV_KEEP_S` on can use (the last one
        before that stays: it is the value then)."""
        cut = t_s - _ENV_KEEP_S
        for t_name, v_name in (("_air_t", "_air_v"), ("_rh_t", "_rh_v")):
            t = getattr(self, t_name)
            if t.shape[0] < 2 or not t[1] <= cut:
                continue  # nothing to drop (the usual case: checked without a search)
            j = int(np.searchsorted(t, cut, side="right")) - 1
            if j > 0:
                setattr(self, t_name, t[j:])
                setattr(self, v_name, getattr(self, v_name)[j:])

    def _humidity_at(self, t):
        air = self.rig.air
        if not (air.humidity_stream or self._rh_pushed) or self._rh_t.size == 0:
            return np.full(t.shape, air.relative_humidity)
        j = np.searchsorted(self._rh_t, t, side="right") - 1
        return np.where(j >= 0, self._rh_v[np.maximum(j, 0)], air.relative_humidity)

    def _power_up_temp(self):
        return self._first_air if np.isfinite(self._first_air) else self.rig.air.fallback_temp_c

    # --- readings ----------------------------------------------------------------
    def decode(self, name: str, t_s, raw, ping_t_s=None) -> tuple[Measurements, np.ndarray]:
        """Decode one sensor's readings; returns measurements and the temperature used."""
        s = self.rig.sensors[name]
        t_s = np.asarray(t_s, dtype=float)
        temp, tsig, fb = air_at(t_s, self._air_t, self._air_v, self.rig.air, clean=True,
                                streamed=bool(self.rig.air.stream) or self._air_pushed)
        if s.kind == "echo":
            rh = self._humidity_at(t_s)
            pu = getattr(s, "power_up_temp_c", math.nan)
            pu = self._power_up_temp() if not np.isfinite(pu) else pu
            m = s.decode(raw, t_s, temp, tsig, rh, power_up_temp_c=pu)
            m.flags[fb] |= D.FLAG_TEMP_FALLBACK
        else:
            m = s.decode(raw, t_s)
        return m, temp

    def process(self, readings: dict, environment: dict | None = None) -> StepBatch:
        """Run arrays of readings through the estimator.

        Parameters
        ----------
        readings : dict
            Sensor name -> ``(t_s, raw)`` or ``(t_s, raw, ping_t_s)``.
        environment : dict, optional
            ``{"air": (t_s, temp_c), "humidity": (t_s, rh)}``; samples are added before
            the readings are decoded (each reading uses the last sample before it).
        """
        return self.run_prepared(self.prepare(readings, environment))

    def prepare(self, readings: dict, environment: dict | None = None) -> dict | None:
        """Decode and screen readings without running the estimator.

        Returns the concatenated event arrays that `run_prepared` consumes; the tuner
        uses this to decode a log once and run the estimator many times.
        """
        if environment:
            if not isinstance(environment, dict) or set(environment) - {"air", "humidity"}:
                raise InputError("expected environment={'air': (t_s, temp_c), 'humidity': "
                                 "(t_s, rh)}", field="environment")
            for key, push in (("air", self.push_air), ("humidity", self.push_humidity)):
                if key in environment:
                    value = environment[key]
                    if not isinstance(value, (tuple, list)) or len(value) != 2:
                        raise InputError("expected a pair (t_s, values)",
                                         field=f"environment.{key}")
                    push(*value)
        if not isinstance(readings, dict):
            raise InputError("expected a dict: sensor name -> (t_s, raw) or (t_s, raw, "
                             "ping_t_s)", field="readings")
        parts = []
        for name, value in readings.items():
            if name not in self._index:
                raise InputError(f"unknown sensor {name!r}; the rig has "
                                 f"{', '.join(self.sensor_names)}", field="sensor")
            if not isinstance(value, (tuple, list)) or not 2 <= len(value) <= 3:
                raise InputError("expected (t_s, raw) or (t_s, raw, ping_t_s)", field=name)
            t_s, raw = value[0], value[1]
            ping = value[2] if len(value) > 2 else None
            try:
                t_s = np.atleast_1d(np.asarray(t_s, dtype=float))
                raw = np.atleast_1d(np.asarray(raw)) if self.rig.sensors[name].output == "serial" \
                    else np.atleast_1d(np.asarray(raw, dtype=float))
                if ping is not None:
                    ping = np.atleast_1d(np.asarray(ping, dtype=float))
            except (TypeError, ValueError):
                raise InputError("expected 1-D arrays of numbers (t_s, raw[, ping_t_s]); only a "
                                 "serial unit's raw is text", field=name) from None
            if t_s.ndim != 1 or raw.shape != t_s.shape:
                raise InputError(f"t_s has {t_s.size} values but raw has {raw.size}; expected "
                                 "1-D arrays of one length", field=f"{name}.raw")
            if ping is not None and ping.shape != t_s.shape:
                raise InputError(f"ping_t_s has {ping.size} values but t_s has {t_s.size}",
                                 field=f"{name}.ping_t_s")
            if len(t_s) == 0:
                continue
            m, temp = self.decode(name, t_s, raw, ping)
            i = self._index[name]
            if self._stuck_limit[i]:
                # a text frame is compared by the range it carries (parsed once already)
                value = raw if raw.dtype.kind in "fiub" else m.raw_m
                stuck, self._stuck_run[i] = stuck_readings(
                    value, (m.code == D.ACCEPTED) & np.isfinite(m.t_s), t_s,
                    self._stuck_limit[i], self._hold[i], self._stuck_run[i])
                m.code[stuck] = D.STUCK
            parts.append((i, t_s, raw, ping, m, temp))
        if not parts:
            return None
        # one copy of each part into the event arrays
        n = sum(len(p[1]) for p in parts)
        sensor = np.empty(n, np.int64)
        row = np.empty(n, np.int64)
        t_s, t_meas, raw_m, temp, rawv, tof, ping = (np.empty(n) for _ in range(7))
        z, sg = np.empty((n, 2)), np.empty((n, 2))
        code = np.empty(n, np.int8)
        flags = np.empty(n, np.int16)
        a = 0
        for i, ts, raw, pg, m, tp in parts:
            b = a + len(ts)
            sensor[a:b] = i
            row[a:b] = np.arange(b - a)
            t_s[a:b] = ts
            t_meas[a:b] = m.t_s
            z[a:b] = m.z_m
            sg[a:b] = m.sigma_m
            code[a:b] = m.code
            flags[a:b] = m.flags
            raw_m[a:b] = m.raw_m
            temp[a:b] = tp
            rawv[a:b] = raw if raw.dtype.kind in "fiu" else np.nan
            tof[a:b] = m.tof_s
            ping[a:b] = np.nan if pg is None else pg
            a = b
        bad_t = ~np.isfinite(t_meas)
        code[bad_t] = D.INVALID
        order = _processing_order(sensor, t_meas, ping)
        self._screen_crosstalk(sensor, ping, tof, code, flags, order)
        fin = t_s[np.isfinite(t_s)]
        if fin.size:
            # the earlier of this batch's and the last batch's first reading: one stray
            # far-future stamp does not wipe the history the next readings need
            first = float(fin.min())
            self._forget_environment_before(min(first, self._last_batch_t))
            self._last_batch_t = first
        # The order is kept with the times it was computed from: a caller that hands
        # run_prepared other times (the tuner shifting latencies) gets a fresh sort.
        return dict(sensor=sensor, row=row, t_s=t_s, t_meas=t_meas, z=z, sg=sg, code=code,
                    flags=flags, raw_m=raw_m, temp=temp, rawv=rawv, ping=ping,
                    _order=(t_meas, order))

    def run_prepared(self, prep: dict | None) -> StepBatch:
        """Run the estimator over events from `prepare` (arrays are not modified)."""
        if prep is None:
            return _empty_batch()
        sensor, t_meas = prep["sensor"], prep["t_meas"]
        cached = prep.get("_order")
        order = cached[1] if cached is not None and cached[0] is t_meas else \
            _processing_order(sensor, t_meas, prep["ping"])
        bad_t = ~np.isfinite(t_meas)
        n = len(order)
        out = {k: np.empty(n, dt) for k, dt in (("code", np.int8), ("flags", np.int16),
                                                 ("innov", float), ("nis", float),
                                                 ("branch", np.int8), ("bprob", float),
                                                 ("ll", float), ("pmaj", float),
                                                 ("nh", np.int8), ("tt", float))}
        track = np.empty((n, 5))
        direction = np.take(self._dir_of, sensor)
        self._kernel(order, np.where(bad_t, 0.0, t_meas), direction, sensor, prep["z"],
                     prep["sg"], prep["code"], prep["flags"], prep["rawv"], out, track)
        return StepBatch(order=order, sensor=sensor, row=prep["row"], t_s=prep["t_s"],
                         t_meas_s=t_meas, direction=direction, code=out["code"],
                         flags=out["flags"], innovation_m=out["innov"], nis=out["nis"],
                         branch=out["branch"], branch_prob=out["bprob"], loglik=out["ll"],
                         z_m=prep["z"], sigma_m=prep["sg"], raw_m=prep["raw_m"],
                         temp_c=prep["temp"], state=track, p_major=out["pmaj"],
                         n_hyp=out["nh"], t_state_s=out["tt"])

    def _kernel(self, order, t, direction, sensor, z, sg, code, flags, rawv, out, track):
        """Run the estimator kernel over the events (subclasses swap the estimator)."""
        st = self.state
        K.kalman_run(order, t, direction, sensor, z, sg, code, flags, rawv,
                     self._kind, self._hold, self._blank, self._p_blank_drop, self._p_drop,
                     self._par, st["W"], st["X"], st["P"], st["NH"], st["T"], st["RBT"],
                     st["RBZ"], st["RBV"], st["RBS"], st["RBN"], st["LAST_RAW"], st["LAST_NEW_T"],
                     st["T_SRC"], st["LAST_T"], st["AHEAD"], st["LEAP"],
                     st["CLOCK_ODD"],
                     out["code"], out["flags"], out["innov"], out["nis"], out["branch"],
                     out["bprob"], out["ll"], track, out["pmaj"], out["nh"], out["tt"])

    def _screen_crosstalk(self, sensor, ping, tof, code, flags, order):
        if not self._crosstalk_possible:
            return  # a lone echo ranger hears no other unit's ping
        is_echo = self._kind[sensor] == K.KIND_ECHO
        has_ping = is_echo & np.isfinite(ping)
        if not has_ping.any():
            return
        rank = _rank_of(order)
        # Add this batch's pings to the memory, then classify against them causally: a
        # reading sees only pings whose readings come before it in processing order, as
        # it would if they were pushed one by one (earlier batches rank -1).
        new = []
        for j, (p, tf, rk) in enumerate(self._pings):
            if p is None:
                new.append((None, None, None))
                continue
            mine = np.logical_and(sensor == j, has_ping)
            pj = np.concatenate([p, ping[mine]])
            tj = np.concatenate([tf, tof[mine]])
            rj = np.concatenate([np.full(len(p), -1, np.int64), rank[mine]])
            o = np.argsort(pj, kind="stable")
            new.append((pj[o], tj[o], rj[o]))
        rx = np.where(has_ping, ping + tof, np.nan)
        suspect, definite = classify_crosstalk(rx, sensor, new, self._tau_min, self._tau_max,
                                               K.XT_TOL_S, rank=rank)
        # Only a timing match is evidence (a ping merely inside the listening window is
        # not). A match is symmetric — when unit a hears b's echo, b's own reading matches
        # a's ping just as well — so it marks both suspect and the track decides, by the
        # first-arrival rule (`_kernels.XT_DENS`): the one that reads short of its track
        # is the likelier crosstalk.
        flags[definite & (code == D.ACCEPTED)] |= D.FLAG_CROSSTALK_SUSPECT
        horizon = np.nanmax(ping[has_ping]) - _PING_MEMORY_S
        self._pings = [(None, None, None) if p is None else
                       (p[p >= horizon], tf[p >= horizon], np.full(int((p >= horizon).sum()), -1))
                       for p, tf, _ in new]

    # --- one reading ------------------------------------------------------------
    def push(self, sensor: str, t_s: float, raw, ping_t_s: float = math.nan):
        """Fuse one reading; returns ``(Estimate, Decision)``.

        A reading for a sensor the rig does not describe gets the decision
        ``unknown_sensor`` (the estimate is that of the first direction, unchanged).
        """
        try:
            t = float(t_s)
        except (TypeError, ValueError):
            t = math.nan
        if not isinstance(sensor, str) or sensor not in self._index:
            d = 0
            est = self.estimate(self.directions[d])
            return est, Decision(str(sensor), t, D.UNKNOWN_SENSOR, math.nan, math.nan,
                                 -1, math.nan, 0)
        s = self.rig.sensors[sensor]
        if s.output == "serial":
            rawa = np.array([raw if isinstance(raw, str) else ""], dtype=object).astype(str)
        else:
            try:
                rawa = np.array([float(raw)])
            except (TypeError, ValueError):
                rawa = np.array([math.nan])
        try:
            p = float(ping_t_s)
        except (TypeError, ValueError):
            p = math.nan
        b = self.process({sensor: (np.array([t]), rawa, np.array([p]))})
        return self._estimate_from(b, 0), Decision(sensor, t, int(b.code[0]),
                                                   float(b.innovation_m[0]), float(b.nis[0]),
                                                   int(b.branch[0]), float(b.branch_prob[0]),
                                                   int(b.flags[0]))

    def _estimate_from(self, b: StepBatch, i: int) -> Estimate:
        x = b.state[i]
        return Estimate(float(b.t_state_s[i]), self.directions[int(b.direction[i])], float(x[0]),
                        float(math.sqrt(x[2])) if x[2] >= 0 else math.nan, float(x[1]),
                        float(math.sqrt(x[4])) if x[4] >= 0 else math.nan, float(b.p_major[i]),
                        int(b.n_hyp[i]))

    def estimate(self, direction: str) -> Estimate:
        """The current estimate of one direction (NaN before its first reading)."""
        if direction not in self.directions:
            raise InputError(f"no direction {direction!r}; the rig has "
                             f"{', '.join(self.directions)}", field="direction")
        d = self.directions.index(direction)
        st = self.state
        nh = int(st["NH"][d])
        if nh == 0:
            return Estimate(math.nan, direction, math.nan, math.nan, math.nan, math.nan,
                            math.nan, 0)
        mom = np.empty(5)
        K._moments(st["W"][d], st["X"][d], st["P"][d], nh, mom)
        return Estimate(float(st["T"][d]), direction, float(mom[0]), float(math.sqrt(mom[2])),
                        float(mom[1]), float(math.sqrt(mom[4])), float(st["W"][d, :nh].max()), nh)


def _processing_order(sensor, t_meas, ping):
    """Time order; invalid times first (decided harmlessly). Ties go to the earlier ping
    (two echo readings at one instant: the unit that pinged first heard its own sound),
    then to the sensor index, then to the input order: ``np.lexsort((sensor, ping,
    t_meas))`` with NaN times as -inf and NaN pings as +inf."""
    if t_meas.shape[0] == 1:
        return np.zeros(1, np.int64)  # one reading (a push)
    key = np.where(np.isfinite(t_meas), t_meas, -np.inf)
    pkey = np.where(np.isfinite(ping), ping, np.inf)
    # Each sensor's readings are nearly always in order already, so merging those runs is
    # cheap (a merge costs readings x runs: with many runs, readings interleaved by a
    # caller, the sort is the cheaper one).
    starts = np.flatnonzero(sensor[1:] != sensor[:-1]) + 1
    order = np.empty(key.shape[0], np.int64)
    if starts.size > _MERGE_RUNS_MAX or not _merge_runs(
            key, pkey, sensor, np.concatenate(([0], starts, [key.shape[0]])), order):
        order = np.lexsort((sensor, pkey, key))
    return order


_MERGE_RUNS_MAX = 32


@njit(cache=True)
def _merge_runs(key, pkey, sensor, bounds, order):
    """Stable merge of the runs ``bounds[r]:bounds[r + 1]`` (one sensor each) into `order`
    by (key, pkey, sensor); False (and `order` unusable) when a run is not in that order."""
    nr = bounds.shape[0] - 1
    for r in range(nr):
        for i in range(bounds[r] + 1, bounds[r + 1]):
            if not (key[i] > key[i - 1] or (key[i] == key[i - 1] and pkey[i] >= pkey[i - 1])):
                return False
    head = bounds[:-1].copy()
    for j in range(order.shape[0]):
        best = -1
        for r in range(nr):
            h = head[r]
            if h >= bounds[r + 1]:
                continue
            if best < 0:
                best = r
                continue
            b = head[best]
            # strictly before: on a full tie the earlier run (input order) stays first
            if key[h] < key[b] or (key[h] == key[b] and (
                    pkey[h] < pkey[b] or (pkey[h] == pkey[b] and sensor[h] < sensor[b]))):
                best = r
        order[j] = head[best]
        head[best] += 1
    return True


def _rank_of(order):
    rank = np.empty(len(order), np.int64)
    rank[order] = np.arange(len(order))
    return rank


_ENV_KEEP_S = 60.0  # readings this much older than a batch's earliest get the fallback air


def _good_air(t_s, temp_c):
    return np.isfinite(t_s) & np.isfinite(temp_c) & (temp_c > _T_MIN_C) & (temp_c < _T_MAX_C)


def _append_sorted(t0, v0, t1, v1):
    t = np.concatenate([t0, t1])
    v = np.concatenate([v0, v1])
    if t.size > 1 and np.any(np.diff(t) < 0):
        o = np.argsort(t, kind="stable")
        t, v = t[o], v[o]
    return t, v


def _empty_batch() -> StepBatch:
    e = np.zeros(0)
    return StepBatch(order=np.zeros(0, np.int64), sensor=np.zeros(0, np.int64), row=np.zeros(0, np.int64), t_s=e, t_meas_s=e,
                     direction=np.zeros(0, np.int64), code=np.zeros(0, np.int8),
                     flags=np.zeros(0, np.int16), innovation_m=e, nis=e,
                     branch=np.zeros(0, np.int8), branch_prob=e, loglik=e, z_m=np.zeros((0, 2)),
                     sigma_m=np.zeros((0, 2)), raw_m=e, temp_c=e, state=np.zeros((0, 5)),
                     p_major=e, n_hyp=np.zeros(0, np.int8), t_state_s=e)
