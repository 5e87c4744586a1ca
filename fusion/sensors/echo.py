"""Ultrasonic echo ranger: decoders, temperature compensation, limits and noise.

An echo ranger sends a ping and measures the round trip to the nearest reflector,
``range = c(T) t / 2``. What reaches the host depends on the unit's output style:

``echo_time``
    The host times the echo itself; the raw value is the round-trip time in seconds.
    The host applies ``c(T)`` (``compensation = "host"``, the only choice).
    Quantisation: the host timer's tick ``tick_s``, i.e. ``c tick / 2`` in range.
``pulse_width``
    The unit times the echo and reports a pulse whose width is proportional to range:
    ``reported = raw / seconds_per_m``. Quantisation: the host's capture tick
    ``tick_s``, i.e. ``tick / seconds_per_m`` in reported range.
``analog``
    The unit reports a voltage proportional to range: ``reported = raw / volts_per_m``.
    Quantisation: the host ADC step ``volts_step``, i.e. ``volts_step / volts_per_m``.
``serial``
    The unit sends text frames; ``frame_pattern`` (a regular expression with a named
    group ``range``) captures a count of ``frame_unit_m``. Quantisation: one count,
    ``frame_unit_m``. Our own default format is ``"R"`` followed by millimetres.

Self-timing units (every style but ``echo_time``) convert time to range themselves with
some speed of sound; ``compensation`` says which, and `EchoRanger.decode` corrects the
reported range to the actual air temperature:

``fixed``
    A fixed ``assumed_speed_mps``: ``true = reported c(T) / c_assumed``.
``power_up``
    The speed at the unit's power-up temperature ``T0`` (dry air, the unit only knows
    temperature): ``true = reported c(T) / c(T0)``.
``self``
    The unit compensates continuously with its own temperature sensor: no correction.

Every quantum ``q`` enters the noise as a uniform error, standard deviation
``q / sqrt(12)`` (common practice, no source).
"""
from __future__ import annotations

import math
import re
from dataclasses import dataclass, fields
import functools
from functools import cached_property
from typing import ClassVar

import numpy as np

from .. import decisions as D
from ..errors import ConfigError, InputError
from ..measurements import Measurements
from .air import speed_of_sound, speed_slope_per_kelvin

__all__ = ["EchoRanger", "OUTPUTS", "COMPENSATIONS", "DEFAULT_FRAME_PATTERN",
           "DEFAULT_FRAME_FORMAT"]

OUTPUTS = ("echo_time", "pulse_width", "analog", "serial")
COMPENSATIONS = ("host", "fixed", "power_up", "self")
DEFAULT_FRAME_PATTERN = r"^R(?P<range>\d{1,5})\r?$"
DEFAULT_FRAME_FORMAT = "R{count:04d}"

# Default timeout: the round trip to max range at 340 m/s (about 15 degC), plus 10 % margin:
# an echo from max range in air down to about -35 degC (309 m/s) still comes inside it.
_TIMEOUT_SPEED_MPS = 340.0
_TIMEOUT_MARGIN = 1.1
_SQRT12 = math.sqrt(12.0)
_FRAME_MEMO_MAX = 1 << 16  # distinct frames remembered per unit

_STR_FIELDS = ("name", "direction", "output", "frame_pattern", "frame_format", "compensation")
_BOOL_FIELDS = ("ping_logged",)


@dataclass(frozen=True)
class EchoRanger:
    """One ultrasonic echo ranger.

    Parameters
    ----------
    name : str
        Unique sensor name in the rig.
    direction : str
        The direction (track) this sensor looks along.
    output : {"echo_time", "pulse_width", "analog", "serial"}
        How readings reach the host (see the module docstring).
    min_range_m : float
        Blanking minimum: the transducer cannot hear echoes during its ring-down.
    max_range_m : float
        Largest range the unit measures.
    timeout_s : float, optional
        ``echo_time`` only: a raw time at or above it (or exactly 0) means no echo.
        Default ``2 max_range_m / 340 * 1.1``.
    sigma_m, sigma_frac : float
        Constant and proportional range noise (1 sigma).
    tick_s : float
        Timer quantum of ``echo_time`` and ``pulse_width`` readings (0: none).
    seconds_per_m : float
        ``pulse_width`` scale: seconds of pulse per metre of reported range.
    volts_per_m, volts_step : float
        ``analog`` scale and quantum (e.g. the ADC step; 0: none).
    frame_pattern : str
        ``serial``: regular expression with a named group ``range``. A frame must match
        it as a whole (one trailing newline is removed first); ``\\d`` means ASCII digits.
    frame_format : str
        ``serial``: `str.format` template with a ``count`` field, used by `encode`
        (the simulator) to write frames that ``frame_pattern`` reads back.
    frame_unit_m : float
        ``serial``: metres per captured count.
    dropout_report_m : float, optional
        Self-timing units report this range (or more) for "no echo". Default
        ``max_range_m``.
    compensation : {"host", "fixed", "power_up", "self"}, optional
        Default ``"host"`` for ``echo_time``, ``"fixed"`` otherwise.
    assumed_speed_mps : float
        Speed of sound a ``fixed`` unit assumes.
    power_up_temp_c : float
        ``power_up``: air temperature when the unit powered up. NaN means "the first
        air-temperature sample of the log", which the caller passes to `decode`.
    offset_m : float
        Mount offset along the axis: range from the direction's reference point is
        sensor range plus ``offset_m``.
    latency_s : float
        Reading time minus latency is the time the range refers to.
    ping_logged : bool
        Whether the log records this unit's ping times (for crosstalk classification).
    """

    name: str
    direction: str = "front"
    output: str = "echo_time"
    min_range_m: float = 0.15
    max_range_m: float = 4.0
    timeout_s: float | None = None
    sigma_m: float = 0.003
    sigma_frac: float = 0.002
    tick_s: float = 1e-6
    seconds_per_m: float = 2.0 / 343.2
    volts_per_m: float = 1.0
    volts_step: float = 5.0 / 1024.0
    frame_pattern: str = DEFAULT_FRAME_PATTERN
    frame_format: str = DEFAULT_FRAME_FORMAT
    frame_unit_m: float = 0.001
    dropout_report_m: float | None = None
    compensation: str | None = None
    assumed_speed_mps: float = 343.2
    power_up_temp_c: float = math.nan
    offset_m: float = 0.0
    latency_s: float = 0.0
    ping_logged: bool = False
    kind: ClassVar[str] = "echo"

    # ------------------------------------------------------------------ construction
    def __post_init__(self):
        name = self.name if isinstance(self.name, str) and self.name else "?"

        def bad(key, expected):
            raise ConfigError(f"expected {expected}, got {getattr(self, key)!r}",
                              field=f"sensor.{name}.{key}")

        if not isinstance(self.name, str) or not self.name:
            bad("name", "a non-empty string")
        for f in fields(self):
            v = getattr(self, f.name)
            if f.name in _STR_FIELDS:
                if f.name == "compensation" and v is None:
                    continue
                if not isinstance(v, str):
                    bad(f.name, "a string")
            elif f.name in _BOOL_FIELDS:
                if not isinstance(v, (bool, np.bool_)):
                    bad(f.name, "true or false")
                object.__setattr__(self, f.name, bool(v))
            else:
                if v is None and f.name in ("timeout_s", "dropout_report_m"):
                    continue
                if isinstance(v, (bool, np.bool_)) or not isinstance(v, (int, float, np.number)):
                    bad(f.name, "a number")
                object.__setattr__(self, f.name, float(v))

        if not self.direction:
            bad("direction", "a non-empty string")
        if self.output not in OUTPUTS:
            bad("output", "one of " + ", ".join(OUTPUTS))
        if not (math.isfinite(self.min_range_m) and self.min_range_m >= 0):
            bad("min_range_m", "a finite range >= 0")
        if not (math.isfinite(self.max_range_m) and self.max_range_m > self.min_range_m):
            bad("max_range_m", f"a finite range above min_range_m = {self.min_range_m}")
        if self.timeout_s is None:
            object.__setattr__(self, "timeout_s",
                               2.0 * self.max_range_m / _TIMEOUT_SPEED_MPS * _TIMEOUT_MARGIN)
        elif not (math.isfinite(self.timeout_s) and self.timeout_s > 0):
            bad("timeout_s", "a finite time > 0")
        for key in ("sigma_m", "sigma_frac", "tick_s", "volts_step"):
            v = getattr(self, key)
            if not (math.isfinite(v) and v >= 0):
                bad(key, "a finite value >= 0")
        for key in ("seconds_per_m", "volts_per_m", "frame_unit_m", "assumed_speed_mps"):
            v = getattr(self, key)
            if not (math.isfinite(v) and v > 0):
                bad(key, "a finite value > 0")
        if self.dropout_report_m is None:
            object.__setattr__(self, "dropout_report_m", self.max_range_m)
        elif math.isnan(self.dropout_report_m) or self.dropout_report_m <= self.min_range_m:
            bad("dropout_report_m", f"a range above min_range_m = {self.min_range_m} "
                "(inf if the unit never reports dropouts as a range)")
        if self.compensation is None:
            object.__setattr__(self, "compensation",
                               "host" if self.output == "echo_time" else "fixed")
        if self.compensation not in COMPENSATIONS:
            bad("compensation", "one of " + ", ".join(COMPENSATIONS))
        if (self.output == "echo_time") != (self.compensation == "host"):
            bad("compensation", '"host" for output "echo_time" (the host times the echo), '
                'and "fixed", "power_up" or "self" for a self-timing output')
        if not (math.isnan(self.power_up_temp_c)
                or (math.isfinite(self.power_up_temp_c) and self.power_up_temp_c > -273.15)):
            bad("power_up_temp_c", "a temperature above -273.15 degC, or nan for "
                "'the first air-temperature sample of the log'")
        if not math.isfinite(self.offset_m):
            bad("offset_m", "a finite offset")
        if not (math.isfinite(self.latency_s) and self.latency_s >= 0):
            bad("latency_s", "a finite latency >= 0")
        try:
            rx = re.compile(self.frame_pattern, re.ASCII)
        except re.error as exc:
            bad("frame_pattern", f"a valid regular expression ({exc})")
        if "range" not in rx.groupindex:
            bad("frame_pattern", "a regular expression with a named group (?P<range>...)")
        try:
            self.frame_format.format(count=0)
        except (KeyError, IndexError, ValueError) as exc:
            bad("frame_format", f"a str.format template with one field {{count}} ({exc!r})")

    @classmethod
    def from_dict(cls, d, where: str = "") -> "EchoRanger":
        """Build from a TOML table; keys are the field names.

        Raises
        ------
        ConfigError
            Unknown or missing keys, wrong types or values, naming ``sensor.NAME.KEY``.
        """
        if not isinstance(d, dict):
            raise ConfigError(f"expected a table of sensor settings, got {type(d).__name__}",
                              file=where or None, field="sensor")
        name = d.get("name")
        label = name if isinstance(name, str) and name else "?"
        known = {f.name for f in fields(cls)}
        for key in d:
            if key not in known:
                raise ConfigError(f"unknown key {key!r} for an echo ranger; expected one of "
                                  + ", ".join(sorted(known)),
                                  file=where or None, field=f"sensor.{label}.{key}")
        if "name" not in d:
            raise ConfigError("missing key 'name'", file=where or None, field="sensor.?.name")
        try:
            return cls(**d)
        except ConfigError as exc:
            raise ConfigError(exc.message, file=where or None, field=exc.field) from None

    def to_dict(self) -> dict:
        """All fields as a TOML-ready table (defaults resolved)."""
        return {f.name: getattr(self, f.name) for f in fields(self)}

    # ------------------------------------------------------------------ helpers
    @property
    def self_timing(self) -> bool:
        return self.output != "echo_time"

    def _frame_regex(self):
        return re.compile(self.frame_pattern, re.ASCII)

    @cached_property
    def _frame_memo(self) -> dict:
        """Frame -> parsed range, kept between decodes (see `_parse_frames`)."""
        return {}

    def _reported_quantum_m(self) -> float:
        """Quantum of the reported range of a self-timing unit, metres."""
        if self.output == "pulse_width":
            return self.tick_s / self.seconds_per_m
        if self.output == "analog":
            return self.volts_step / self.volts_per_m
        return self.frame_unit_m

    def _power_up_temp(self, power_up_temp_c):
        if math.isfinite(self.power_up_temp_c):
            return self.power_up_temp_c
        field = f"sensor.{self.name}.power_up_temp_c"
        if power_up_temp_c is None:
            raise InputError("power_up_temp_c is nan in the configuration, meaning 'the first "
                             "air-temperature sample of the log', but the caller passed none",
                             field=field)
        try:
            t0 = float(power_up_temp_c)
        except (TypeError, ValueError):
            t0 = math.nan
        if not (math.isfinite(t0) and t0 > -273.15):
            raise InputError(f"expected a power-up temperature above -273.15 degC, got "
                             f"{power_up_temp_c!r}", field=field)
        return t0

    def _scale(self, c_mps, power_up_temp_c):
        """True sensor range per reported range, ``k``, for a self-timing unit."""
        if self.compensation == "fixed":
            return c_mps / self.assumed_speed_mps
        if self.compensation == "power_up":
            # The unit knew only its temperature at power-up, so it assumed dry air.
            return c_mps / speed_of_sound(self._power_up_temp(power_up_temp_c))
        return np.ones_like(c_mps)

    # ------------------------------------------------------------------ decode
    def decode(self, raw, t_s, temp_c, temp_sigma_c, relative_humidity=0.0,
               power_up_temp_c=None) -> Measurements:
        """Turn ``n`` raw readings into range measurements.

        Parameters
        ----------
        raw : (n,) array_like
            Round-trip seconds (``echo_time``), pulse seconds (``pulse_width``), volts
            (``analog``) or text frames (``serial``: str or bytes).
        t_s : (n,) array_like
            Reading times, seconds.
        temp_c, temp_sigma_c : float or (n,) array_like
            Air temperature and its standard deviation, degC (finite: the caller applies
            any fallback for a missing temperature).
        relative_humidity : float or (n,) array_like
            Fraction from 0 to 1.
        power_up_temp_c : float, optional
            ``power_up`` units whose configured ``power_up_temp_c`` is NaN: the first
            air-temperature sample of the log. A finite configured value takes precedence.

        Returns
        -------
        Measurements
            ``z_m[:, 0]`` true range from the reference point (NaN for dropouts and invalid
            readings), ``z_m[:, 1]`` NaN, ``sigma_m[:, 0]`` its standard deviation,
            ``code`` ACCEPTED / DROPOUT / OUT_OF_RANGE / INVALID, ``tof_s`` the implied
            round trip, ``raw_m`` the range the sensor itself gave (reported range, or
            ``c(T) t / 2`` for ``echo_time``; NaN where invalid), ``t_s`` reading time
            minus latency.

        Notes
        -----
        Decisions, in order of precedence: INVALID (NaN, infinite or negative raw value,
        malformed frame, non-finite time), DROPOUT (``echo_time``: raw 0 or at least
        ``timeout_s``; ``pulse_width``: width 0; self-timing: reported range at least
        ``dropout_report_m``), OUT_OF_RANGE (compensated range from the sensor face below
        ``min_range_m`` or above ``max_range_m``), else ACCEPTED. The standard deviation is
        ``sqrt(sigma_m**2 + (sigma_frac r)**2 + (q / sqrt(12))**2 + (dr/dT temp_sigma_c)**2)``
        with ``q`` the quantum in true range and ``dr/dT = r / (2 (T + 273.15))`` (zero for
        ``self`` compensation, whose own sensor tracks the air).

        Raises
        ------
        InputError
            Arrays of the wrong shape, or temperatures/humidities that cannot be used.
            Bad *readings* never raise: they are flagged.
        """
        t = _as_float_1d(t_s, "t_s")
        n = t.shape[0]
        temp = _per_reading(temp_c, n, "temp_c")
        if not np.all(np.isfinite(temp) & (temp > -273.15)):
            raise InputError("expected finite air temperatures above -273.15 degC (apply the "
                             "fallback temperature before decoding)", field="temp_c")
        temp_sigma = _per_reading(temp_sigma_c, n, "temp_sigma_c")
        if not np.all(np.isfinite(temp_sigma) & (temp_sigma >= 0)):
            raise InputError("expected finite temperature standard deviations >= 0",
                             field="temp_sigma_c")
        rh = _per_reading(relative_humidity, n, "relative_humidity")
        if not np.all((rh >= 0) & (rh <= 1)):
            raise InputError("expected relative humidity as a fraction from 0 to 1",
                             field="relative_humidity")
        c = _speed_by_runs(temp, rh)

        with np.errstate(over="ignore", invalid="ignore"):
            if self.output == "serial":
                reported = self._parse_frames(raw, n)
                bad = np.isnan(reported)
                dropout = ~bad & (reported >= self.dropout_report_m)
            else:
                x = _numeric_raw(raw, n, self.output)
                bad = ~np.isfinite(x) | (x < 0)
                x = np.where(bad, np.nan, x)
                if self.output == "echo_time":
                    reported = c * x / 2.0  # echo_range, with c computed once above
                    dropout = ~bad & ((x == 0) | (x >= self.timeout_s))
                else:
                    scale = self.seconds_per_m if self.output == "pulse_width" else self.volts_per_m
                    reported = x / scale
                    bad |= ~np.isfinite(reported)
                    reported = np.where(bad, np.nan, reported)
                    dropout = ~bad & (reported >= self.dropout_report_m)
                    if self.output == "pulse_width":
                        # A zero width means the host's capture saw no pulse at all.
                        dropout |= ~bad & (x == 0)

            if self.output == "echo_time":
                r_sensor = reported
                quantum = c * self.tick_s / 2.0
                tof = x.copy()
            else:
                k = self._scale(c, power_up_temp_c)
                r_sensor = k * reported
                quantum = k * self._reported_quantum_m()
                tof = 2.0 * r_sensor / c
            if self.compensation == "self":
                # The unit's own sensor tracks the air; our temperature error does not enter.
                dr_dt = np.zeros(n)
            else:
                dr_dt = r_sensor * _slope_by_runs(temp, rh)  # range_per_kelvin

            bad |= ~np.isfinite(t)
            unusable = bad | dropout
            out = ~unusable & ((r_sensor < self.min_range_m) | (r_sensor > self.max_range_m))

            code = np.full(n, D.ACCEPTED, dtype=np.int8)
            code[out] = D.OUT_OF_RANGE
            code[dropout] = D.DROPOUT
            code[bad] = D.INVALID

            sigma = np.sqrt(self.sigma_m ** 2 + (self.sigma_frac * r_sensor) ** 2
                            + (quantum / _SQRT12) ** 2 + (dr_dt * temp_sigma) ** 2)
            # a range whose uncertainty overflowed (an absurd time, a hopeless air
            # sample) says nothing: it must not reach the estimator
            lost = ~unusable & ~np.isfinite(sigma)
            if lost.any():
                bad |= lost
                unusable = bad | dropout
                code[lost] = D.INVALID
            z = np.full((n, 2), np.nan)
            s = np.full((n, 2), np.nan)
            z[:, 0] = np.where(unusable, np.nan, r_sensor + self.offset_m)
            s[:, 0] = np.where(unusable, np.nan, sigma)
            tof = np.where(unusable, np.nan, tof)
            raw_m = np.where(bad, np.nan, reported)

        return Measurements(t_s=t - self.latency_s, z_m=z, sigma_m=s, code=code,
                            flags=np.zeros(n, np.int16), tof_s=tof, raw_m=raw_m)

    def _parse_frames(self, raw, n):
        frames = np.asarray(raw, dtype=object).reshape(-1)
        if frames.shape[0] != n:
            raise InputError(f"expected {n} frames (one per time), got {frames.shape[0]}",
                             field="raw")
        rx = self._frame_regex()
        unit = self.frame_unit_m
        # A unit sends few distinct frames (one per count it can report): parse each once,
        # across calls (a stream of garbage could grow the memo without bound: it is reset)
        seen = self._frame_memo
        if len(seen) > _FRAME_MEMO_MAX:
            # a new memo, not clear(): another fuser of this rig may be using this one
            seen = self.__dict__["_frame_memo"] = {}
        try:
            # set and map run in C: only the frames not met before are parsed here
            for f in set(frames).difference(seen):
                seen[f] = _parse_frame(rx, f, unit)
            return np.fromiter(map(seen.__getitem__, frames), float, n)
        except TypeError:
            pass  # an unhashable object among them: frame by frame
        out = np.empty(n)
        for i, f in enumerate(frames):
            try:
                v = seen.get(f)
            except TypeError:  # an unhashable object is no frame
                v = math.nan
            if v is None:
                v = seen[f] = _parse_frame(rx, f, unit)
            out[i] = v
        return out

    # ------------------------------------------------------------------ encode
    def encode(self, range_true_m, temp_c, relative_humidity=0.0, power_up_temp_c=None):
        """Raw readings the unit would give for true ranges (inverse of `decode`).

        Parameters
        ----------
        range_true_m : array_like
            True range from the direction's reference point (the quantity `decode`
            returns in ``z_m[:, 0]``); ``range_true_m - offset_m`` must be >= 0.
        temp_c, relative_humidity : float or array_like
            Actual air, broadcast against ``range_true_m``.
        power_up_temp_c : float, optional
            As in `decode`.

        Returns
        -------
        ndarray
            Seconds, volts, or str frames, quantised as the unit quantises: to the nearest
            tick, ADC step or count (rounding is our model; a truncating counter is biased
            by half a quantum, which the noise absorbs). Dropouts are not modelled here.
        """
        r, temp, rh = np.broadcast_arrays(np.asarray(range_true_m, dtype=float),
                                          np.asarray(temp_c, dtype=float),
                                          np.asarray(relative_humidity, dtype=float))
        r_sensor = r - self.offset_m
        if not np.all(np.isfinite(r_sensor) & (r_sensor >= 0)):
            raise InputError(f"expected finite true ranges >= offset_m = {self.offset_m}",
                             field="range_true_m")
        if not np.all(np.isfinite(temp) & (temp > -273.15)):
            raise InputError("expected finite air temperatures above -273.15 degC",
                             field="temp_c")
        if not np.all((rh >= 0) & (rh <= 1)):
            raise InputError("expected relative humidity as a fraction from 0 to 1",
                             field="relative_humidity")
        c = np.asarray(speed_of_sound(temp, rh), dtype=float)
        if self.output == "echo_time":
            return _quantise(2.0 * r_sensor / c, self.tick_s)
        reported = r_sensor / self._scale(c, power_up_temp_c)
        if self.output == "pulse_width":
            return _quantise(reported * self.seconds_per_m, self.tick_s)
        if self.output == "analog":
            return _quantise(reported * self.volts_per_m, self.volts_step)
        self._check_frame_format()
        counts = np.rint(reported / self.frame_unit_m).astype(np.int64)
        frames = [self.frame_format.format(count=int(k)) for k in counts.reshape(-1)]
        return np.array(frames, dtype=str).reshape(counts.shape)

    def _check_frame_format(self):
        probe = self.frame_format.format(count=1234)
        got = _parse_frame(self._frame_regex(), probe, 1.0)
        if got != 1234.0:
            raise ConfigError(f"frame_format writes {probe!r} for a count of 1234, which "
                              f"frame_pattern {self.frame_pattern!r} does not read back as 1234",
                              field=f"sensor.{self.name}.frame_format")


def _parse_frame(rx, frame, unit):
    if isinstance(frame, bytes):
        try:
            frame = frame.decode("ascii")
        except UnicodeDecodeError:
            return math.nan
    if not isinstance(frame, str):
        return math.nan
    if frame.endswith("\n"):
        frame = frame[:-1]
    m = rx.fullmatch(frame)
    if m is None:
        return math.nan
    try:
        v = float(m.group("range")) * unit
    except (TypeError, ValueError):
        return math.nan
    return v if (math.isfinite(v) and v >= 0) else math.nan


def _speed_by_runs(temp, rh):
    """`speed_of_sound` per reading (see `_per_air_run`)."""
    return _per_air_run(speed_of_sound, _speed_memo, temp, rh)


def _slope_by_runs(temp, rh):
    """`speed_slope_per_kelvin` per reading (see `_per_air_run`)."""
    return _per_air_run(speed_slope_per_kelvin, _slope_memo, temp, rh)


def _per_air_run(f, memo, temp, rh):
    """``f(temp, rh)`` per reading, computed once per run of equal air (the temperature
    holds from one air sample to the next, so a window has far fewer runs than readings).
    A few readings (a push) take it from a small memo of recent air: a call on one
    reading costs some forty numpy operations."""
    n = temp.shape[0]
    if n <= 8:
        return np.array([memo(float(a), float(h)) for a, h in zip(temp, rh)])
    new = np.empty(n, bool)
    new[0] = True
    np.not_equal(temp[1:], temp[:-1], out=new[1:])
    new[1:] |= rh[1:] != rh[:-1]
    starts = np.flatnonzero(new)
    if starts.size <= n // 4:
        v = np.asarray(f(temp[starts], rh[starts]), dtype=float)
        return np.repeat(v, np.diff(np.append(starts, n)))
    return np.asarray(f(temp, rh), dtype=float).reshape(n)


@functools.lru_cache(maxsize=256)
def _speed_memo(temp_c, rh):
    return float(np.asarray(speed_of_sound(np.array([temp_c]), np.array([rh])))[0])


@functools.lru_cache(maxsize=256)
def _slope_memo(temp_c, rh):
    return float(np.asarray(speed_slope_per_kelvin(np.array([temp_c]), np.array([rh])))[0])


def _quantise(x, quantum):
    return np.rint(x / quantum) * quantum if quantum > 0 else x


def _as_float_1d(x, field):
    try:
        a = np.asarray(x, dtype=float)
    except (TypeError, ValueError):
        raise InputError("expected an array of numbers", field=field) from None
    if a.ndim != 1:
        raise InputError(f"expected a 1-D array, got shape {a.shape}", field=field)
    return a


def _per_reading(x, n, field):
    try:
        a = np.asarray(x, dtype=float)
    except (TypeError, ValueError):
        raise InputError("expected a number or an array of numbers", field=field) from None
    if a.ndim == 0:
        return np.full(n, float(a))
    if a.shape != (n,):
        raise InputError(f"expected a scalar or shape ({n},), got shape {a.shape}", field=field)
    return a


def _numeric_raw(raw, n, output):
    try:
        a = np.asarray(raw, dtype=float).reshape(-1)
    except (TypeError, ValueError):
        raise InputError(f"expected numbers for output {output!r}", field="raw") from None
    if a.shape[0] != n:
        raise InputError(f"expected {n} raw readings (one per time), got {a.shape[0]}",
                         field="raw")
    return a
