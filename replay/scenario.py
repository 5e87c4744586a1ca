"""Scenario files for the simulator: what happens around the robot during a run.

A scenario (TOML, described in ``docs/scenario.md``) names a rig and says how the world
behaves for `duration_s` seconds: where each direction's target is, what its surface is
like, how warm and humid the air is, how the air-temperature sensor lags and rattles,
how each of our sensors is sampled and disturbed, which foreign echo rangers are nearby,
and which faults strike when. `load_scenario` turns a file into a frozen `Scenario`;
`replay.simulate.simulate` turns a `Scenario` into a log.

Everything here is description and validation; the physics lives in `replay.simulate`.
Every mistake raises `fusion.errors.ConfigError` naming the file, the key (dotted, e.g.
``sensor.echo_front.clutter[1].range_m``) and the TOML line.
"""
from __future__ import annotations

import math
import numbers
import os
import re
from dataclasses import dataclass, field
from types import MappingProxyType

import numpy as np

from fusion import _toml
from fusion.errors import ConfigError, RangefuseError
from fusion.rig import Rig

__all__ = ["Scenario", "Profile", "Step", "Target", "Surface", "TempSensor", "HumiditySensor",
           "AirSpec", "Clutter", "IrSim", "EchoSim", "Foreign", "Fault", "FAULT_KINDS",
           "load_scenario", "scenario_from_toml", "DEFAULT_CREATED_UTC"]

FAULT_KINDS = ("stuck", "dead", "dropout_burst", "crosstalk_burst", "target_jump", "temp_fail",
               "clock_jump")
INTERPOLATIONS = ("linear", "smooth")
DEFAULT_CREATED_UTC = "2000-01-01T00:00:00+00:00"
MIN_TRUTH_RATE_HZ = 100.0
MAX_DURATION_S = 24 * 3600.0


# --------------------------------------------------------------------------------------
# Where a key is in the text (for error messages)
# --------------------------------------------------------------------------------------
_HEADER = re.compile(r"^\s*(\[\[?)\s*([^\]]+?)\s*\]\]?\s*(#.*)?$")
_KEYLINE = re.compile(r"^\s*([A-Za-z0-9_\-\"'.\s]+?)\s*=")


def _split_dotted(s: str) -> list:
    parts, cur, quote = [], "", None
    for ch in s:
        if quote:
            if ch == quote:
                quote = None
            else:
                cur += ch
        elif ch in "\"'":
            quote = ch
        elif ch == ".":
            parts.append(cur.strip())
            cur = ""
        else:
            cur += ch
    parts.append(cur.strip())
    return parts


class _Locator:
    """Maps a key path such as ``("fault", 2, "jump_s")`` to its 1-based line.

    A light scan of table headers and ``key =`` lines (not a TOML parser): it only has to
    point a person at the right line of a file the real parser has already accepted.
    """

    def __init__(self, text: str | None):
        self.lines: dict = {}
        if not text:
            return
        current: tuple = ()
        counts: dict = {}
        in_multiline = None
        for i, line in enumerate(text.splitlines(), start=1):
            if in_multiline:
                if in_multiline in line:
                    in_multiline = None
                continue
            m = _HEADER.match(line)
            if m and not line.lstrip().startswith("#"):
                keys = _split_dotted(m.group(2))
                path: list = []
                for k in keys[:-1]:
                    path.append(k)
                    idx = counts.get(tuple(path))
                    if idx is not None:  # a prefix that is an array of tables: its last item
                        path.append(idx)
                path.append(keys[-1])
                if m.group(1) == "[[":
                    idx = counts.get(tuple(path), -1) + 1
                    counts[tuple(path)] = idx
                    path.append(idx)
                current = tuple(path)
                self.lines.setdefault(current, i)
                continue
            k = _KEYLINE.match(line)
            if k and not line.lstrip().startswith("#"):
                full = current + tuple(_split_dotted(k.group(1)))
                self.lines.setdefault(full, i)
                rest = line[k.end():]
                for q in ('"""', "'''"):
                    if rest.count(q) == 1:
                        in_multiline = q

    def line(self, path) -> int | None:
        path = tuple(path)
        while path:
            if path in self.lines:
                return self.lines[path]
            path = path[:-1]
        return None


def _dotted(path) -> str:
    out = ""
    for p in path:
        if isinstance(p, int):
            out += f"[{p + 1}]"
        else:
            out += ("." if out else "") + str(p)
    return out


class _Ctx:
    """The file being read: raises ConfigError with file, dotted key and line."""

    def __init__(self, where: str, text: str | None):
        self.where = where
        self.text = text
        self.loc = _Locator(text)

    def error(self, path, message) -> ConfigError:
        return ConfigError(message, file=self.where, field=_dotted(path),
                           row=self.loc.line(path))

    # --- typed getters -----------------------------------------------------------
    def table(self, d, key, path, required=False):
        if key not in d:
            if required:
                raise self.error(path, f"missing table [{_dotted(path + (key,))}]")
            return {}
        v = d[key]
        if not isinstance(v, dict):
            raise self.error(path + (key,), f"expected a table, got {_show(v)}")
        return v

    def tables(self, d, key, path):
        v = d.get(key, [])
        if isinstance(v, dict):
            raise self.error(path + (key,), f"expected an array of tables [[{key}]], got a "
                             "single table")
        if not isinstance(v, list) or not all(isinstance(x, dict) for x in v):
            raise self.error(path + (key,), f"expected an array of tables [[{key}]]")
        return v

    def keys(self, d, allowed, path):
        for key in d:
            if key not in allowed:
                raise self.error(path + (key,), f"unknown key {key!r}; expected one of "
                                 + ", ".join(sorted(allowed)))

    def num(self, d, key, path, default=None, lo=None, hi=None, lo_open=False,
            required=False, allow_inf=False):
        if key not in d:
            if required:
                raise self.error(path + (key,), "missing; expected a number")
            return default
        v = d[key]
        if isinstance(v, bool) or not isinstance(v, numbers.Real):
            raise self.error(path + (key,), f"expected a number, got {_show(v)}")
        v = float(v)
        if math.isnan(v) or (math.isinf(v) and not allow_inf):
            raise self.error(path + (key,), f"expected a finite number, got {v}")
        if lo is not None and (v < lo or (lo_open and v == lo)):
            raise self.error(path + (key,), f"expected a number {'>' if lo_open else '>='} "
                             f"{lo}, got {v}")
        if hi is not None and v > hi:
            raise self.error(path + (key,), f"expected a number <= {hi}, got {v}")
        return v

    def integer(self, d, key, path, default=None, lo=None):
        if key not in d:
            return default
        v = d[key]
        if isinstance(v, bool) or not isinstance(v, numbers.Integral):
            raise self.error(path + (key,), f"expected a whole number, got {_show(v)}")
        if lo is not None and v < lo:
            raise self.error(path + (key,), f"expected a whole number >= {lo}, got {v}")
        return int(v)

    def string(self, d, key, path, default=None, choices=None, required=False):
        if key not in d:
            if required:
                raise self.error(path + (key,), "missing; expected a string")
            return default
        v = d[key]
        if not isinstance(v, str):
            raise self.error(path + (key,), f"expected a string, got {_show(v)}")
        if choices is not None and v not in choices:
            raise self.error(path + (key,), f"expected one of {', '.join(map(repr, choices))}, "
                             f"got {v!r}")
        return v

    def boolean(self, d, key, path, default=None):
        if key not in d:
            return default
        v = d[key]
        if not isinstance(v, bool):
            raise self.error(path + (key,), f"expected true or false, got {_show(v)}")
        return v

    def strings(self, d, key, path, default=None):
        if key not in d:
            return default
        v = d[key]
        if not isinstance(v, list) or not all(isinstance(x, str) for x in v):
            raise self.error(path + (key,), "expected a list of strings")
        return tuple(v)

    def pair(self, d, key, path, default, lo=0.0):
        """A number or a ``[low, high]`` pair (a uniform range), returned as a pair."""
        if key not in d:
            return default
        v = d[key]
        if isinstance(v, numbers.Real) and not isinstance(v, bool):
            v = [v, v]
        if (not isinstance(v, list) or len(v) != 2
                or any(isinstance(x, bool) or not isinstance(x, numbers.Real) for x in v)):
            raise self.error(path + (key,), "expected a number or a [low, high] pair of numbers")
        a, b = float(v[0]), float(v[1])
        if not (math.isfinite(a) and math.isfinite(b) and lo <= a <= b):
            raise self.error(path + (key,), f"expected {lo} <= low <= high, got [{a}, {b}]")
        return (a, b)


def _show(v) -> str:
    if isinstance(v, dict):
        return "a table"
    if isinstance(v, list):
        return "a list"
    return repr(v)


# --------------------------------------------------------------------------------------
# Description objects
# --------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Profile:
    """A quantity over time through waypoints ``(t_s, value)``.

    ``"linear"`` joins waypoints with straight lines; ``"smooth"`` with an ease-in,
    ease-out cubic ``3u^2 - 2u^3`` (zero rate at every waypoint, as a cart that stops
    at each). Before the first waypoint and after the last the value is held.
    """

    t_s: tuple
    value: tuple
    interpolation: str = "linear"

    @classmethod
    def constant(cls, value: float) -> "Profile":
        return cls((0.0,), (float(value),))

    def at(self, t_s) -> np.ndarray:
        t = np.asarray(t_s, dtype=float)
        tk = np.asarray(self.t_s)
        vk = np.asarray(self.value)
        if tk.size == 1:
            return np.full(t.shape, vk[0])
        if self.interpolation == "linear":
            return np.interp(t, tk, vk)
        i = np.clip(np.searchsorted(tk, t, side="right") - 1, 0, tk.size - 2)
        dt = tk[i + 1] - tk[i]
        u = np.clip((t - tk[i]) / dt, 0.0, 1.0)
        s = u * u * (3.0 - 2.0 * u)
        return vk[i] + (vk[i + 1] - vk[i]) * s

    @property
    def min(self) -> float:
        return float(min(self.value))

    @property
    def max(self) -> float:
        return float(max(self.value))


@dataclass(frozen=True)
class Step:
    """An object steps into the beam: the target range is `range_m` during [from_s, to_s)."""

    from_s: float
    to_s: float
    range_m: float


@dataclass(frozen=True)
class Target:
    """What one direction looks at: a moving target, plus objects stepping into the beam."""

    direction: str
    motion: Profile
    steps: tuple = ()


@dataclass(frozen=True)
class Surface:
    """The target's surface in one direction during [from_s, to_s).

    ``ir_gain`` scales the IR return (dark or padded surfaces < 1); ``slant_deg`` tilts
    the surface away from the beam axis (IR gain times cos(slant), echo dropouts grow
    once the slant passes the echo beam's half-angle); ``echo_dropout_p`` is the
    probability that a soft surface returns no echo to a ping.
    """

    direction: str
    from_s: float
    to_s: float
    ir_gain: float = 1.0
    slant_deg: float = 0.0
    echo_dropout_p: float = 0.0


@dataclass(frozen=True)
class TempSensor:
    """The air-temperature sensor: sampled at `rate_hz`, lagging the air by a first-order
    time constant `lag_s`, with white noise `noise_c` and a resolution `resolution_c`."""

    stream: str = "air_temp"
    rate_hz: float = 1.0
    phase_s: float = 0.0
    noise_c: float = 0.1
    lag_s: float = 10.0
    resolution_c: float = 0.0


@dataclass(frozen=True)
class HumiditySensor:
    """A relative-humidity stream (fraction 0..1) with noise `noise` and lag `lag_s`."""

    stream: str = "humidity"
    rate_hz: float = 0.2
    phase_s: float = 0.0
    noise: float = 0.01
    lag_s: float = 20.0


@dataclass(frozen=True)
class AirSpec:
    """The true air (temperature and humidity profiles) and the sensors that watch it."""

    temp_c: Profile
    relative_humidity: Profile
    sensor: TempSensor | None
    humidity_sensor: HumiditySensor | None = None


@dataclass(frozen=True)
class Clutter:
    """A static reflector inside an echo ranger's beam cone during [from_s, to_s): it
    returns an echo to a ping with probability `p`."""

    from_s: float
    to_s: float
    range_m: float
    p: float = 1.0


@dataclass(frozen=True)
class IrSim:
    """How one IR triangulation ranger behaves in the simulation.

    ``None`` fields take the rig's value (``hold_s``, ``volts_sigma``) or a default from
    the curve (``floor_volts``: half the voltage at the end of the valid span;
    ``see_max_m``: the valid span's end).
    """

    rate_hz: float = 100.0
    phase_s: float = 0.0
    jitter_s: float = 0.0
    hold_s: float | None = None
    hold_phase_s: float = 0.0
    volts_sigma: float | None = None
    weak_exponent: float = 1.0
    gain_bias: float = 0.1
    adc_noise_counts: float = 0.0
    floor_volts: float | None = None
    see_max_m: float | None = None


@dataclass(frozen=True)
class EchoSim:
    """How one echo ranger behaves in the simulation.

    ``None`` noise fields take the rig's ``sigma_m`` and ``sigma_frac``.
    """

    ping_period_s: float | None = None
    ping_phase_s: float = 0.0
    ping_jitter_s: float = 0.0
    sigma_m: float | None = None
    sigma_frac: float | None = None
    multipath_p: float = 0.0
    multipath_extra_m: tuple = (0.3, 1.0)
    crosstalk_p: float = 1.0
    beam_half_angle_deg: float = 15.0
    blank_behaviour: str = "dropout"
    power_up_temp_c: float | None = None
    clutter: tuple = ()


DEFAULT_PING_PERIOD_S = 0.06


@dataclass(frozen=True)
class Foreign:
    """A free-running echo ranger that is not ours (a neighbouring cart).

    It pings every `period_s` during [from_s, to_s); its sound reaches the listed units
    of ours after travelling `path_m` (a profile: the cart moves). Each arrival is loud
    enough to trigger our unit with probability `p`. Its pings are never logged.
    """

    name: str
    period_s: float
    phase_s: float
    from_s: float
    to_s: float
    path_m: Profile
    heard_by: tuple
    p: float = 1.0


@dataclass(frozen=True)
class Fault:
    """A fault mode active during [from_s, to_s).

    ``target`` is the sensor, environment stream or direction the fault applies to;
    ``params`` holds the kind's own parameters (see ``docs/scenario.md``).
    """

    kind: str
    target: str
    from_s: float
    to_s: float
    params: MappingProxyType = field(default_factory=lambda: MappingProxyType({}))

    def active(self, t_s) -> np.ndarray:
        t = np.asarray(t_s, dtype=float)
        return (t >= self.from_s) & (t < self.to_s)


@dataclass(frozen=True)
class Scenario:
    """A complete simulation scenario (see ``docs/scenario.md``)."""

    name: str
    rig: Rig
    rig_toml: str
    duration_s: float
    seed: int
    truth_rate_hz: float
    air: AirSpec
    targets: MappingProxyType
    surfaces: tuple
    sensors: MappingProxyType
    foreign: tuple
    faults: tuple
    description: str = ""
    created_utc: str = DEFAULT_CREATED_UTC
    clock: str = "seconds since the start of the simulated run"
    source: str = field(default="", compare=False)
    rig_source: str = field(default="", compare=False)  # the rig file read, "" if inline

    def summary(self) -> str:
        lines = [f"scenario {self.name!r}: {self.duration_s:g} s, seed {self.seed}, rig "
                 f"{self.rig.name!r} ({len(self.rig.sensors)} sensors, schedule "
                 f"{self.rig.schedule.mode})"]
        for d, tg in self.targets.items():
            lines.append(f"  target {d}: {tg.motion.min:.3g}..{tg.motion.max:.3g} m, "
                         f"{len(tg.steps)} step(s)")
        lines.append(f"  air {self.air.temp_c.min:.3g}..{self.air.temp_c.max:.3g} degC")
        if self.foreign:
            lines.append(f"  foreign echo rangers: {', '.join(f.name for f in self.foreign)}")
        for f in self.faults:
            lines.append(f"  fault {f.kind} on {f.target} {f.from_s:g}..{f.to_s:g} s")
        return "\n".join(lines)


# --------------------------------------------------------------------------------------
# Parsing
# --------------------------------------------------------------------------------------
_TOP = {"name", "description", "rig", "duration_s", "seed", "truth_rate_hz", "created_utc",
        "clock", "air", "target", "surface", "sensor", "foreign", "fault"}
_IR_KEYS = {f for f in IrSim.__dataclass_fields__}
_ECHO_KEYS = {f for f in EchoSim.__dataclass_fields__}
_FAULT_PARAMS = {
    "stuck": {"value"},
    "dead": set(),
    "dropout_burst": {"p"},
    "crosstalk_burst": {"p"},
    "target_jump": {"jump_m"},
    "temp_fail": {"mode"},
    "clock_jump": {"jump_s"},
}


def load_scenario(path) -> Scenario:
    """Read a scenario file.

    Parameters
    ----------
    path : str or path-like

    Returns
    -------
    Scenario

    Raises
    ------
    ConfigError
        Unreadable file, bad TOML, or a scenario that does not make sense, naming the
        file, the key and the line. A rig given by path is loaded relative to the
        scenario file; its own errors name the rig file.
    """
    path = os.fspath(path)
    try:
        with open(path, "rb") as fh:
            data = fh.read()
    except OSError as exc:
        raise ConfigError(f"cannot read the scenario file ({exc.strerror})", file=path) from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        raise ConfigError("the scenario file is not UTF-8 text", file=path) from None
    return scenario_from_toml(text, where=path, base_dir=os.path.dirname(os.path.abspath(path)))


def scenario_from_toml(text: str, where: str = "<scenario>", base_dir: str | None = None
                       ) -> Scenario:
    """Parse scenario TOML text (see `load_scenario`); `base_dir` anchors a rig path."""
    data = _toml.loads(text, where=where)
    return _parse(data, _Ctx(where, text), base_dir or os.getcwd())


def _profile(ctx, d, key, path, default=None, lo=None, hi=None, interp_key=None,
             required=False, duration=None):
    """A number (constant) or waypoints ``[[t_s, value], ...]``."""
    interp = "linear"
    if interp_key is not None:
        interp = ctx.string(d, interp_key, path, "linear", INTERPOLATIONS)
    if key not in d:
        if required:
            raise ctx.error(path + (key,), "missing; expected a number or waypoints "
                            "[[t_s, value], ...]")
        return None if default is None else Profile.constant(default)
    v = d[key]
    p = path + (key,)
    if isinstance(v, numbers.Real) and not isinstance(v, bool):
        t_k, v_k = [0.0], [float(v)]
    elif isinstance(v, list) and v:
        t_k, v_k = [], []
        for i, wp in enumerate(v):
            if (not isinstance(wp, list) or len(wp) != 2
                    or any(isinstance(x, bool) or not isinstance(x, numbers.Real) for x in wp)):
                raise ctx.error(p, f"waypoint {i + 1} is {_show(wp)}; expected [t_s, value]")
            t_k.append(float(wp[0]))
            v_k.append(float(wp[1]))
    else:
        raise ctx.error(p, f"expected a number or waypoints [[t_s, value], ...], got {_show(v)}")
    t_a, v_a = np.array(t_k), np.array(v_k)
    if not (np.all(np.isfinite(t_a)) and np.all(np.isfinite(v_a))):
        raise ctx.error(p, "waypoints must be finite numbers")
    if np.any(np.diff(t_a) <= 0):
        i = int(np.flatnonzero(np.diff(t_a) <= 0)[0])
        raise ctx.error(p, f"waypoint times must increase strictly (waypoint {i + 2} at "
                        f"{t_a[i + 1]} s follows {t_a[i]} s)")
    if t_a[0] < 0:
        raise ctx.error(p, f"waypoint times start at t = 0 or later, got {t_a[0]}")
    if lo is not None and np.any(v_a < lo):
        raise ctx.error(p, f"values must be >= {lo}, got {v_a.min()}")
    if hi is not None and np.any(v_a > hi):
        raise ctx.error(p, f"values must be <= {hi}, got {v_a.max()}")
    return Profile(tuple(t_a.tolist()), tuple(v_a.tolist()), interp)


def _window(ctx, d, path, duration, need_from=True):
    a = ctx.num(d, "from_s", path, 0.0 if not need_from else None, lo=0.0, required=need_from)
    b = ctx.num(d, "to_s", path, duration, lo=0.0, allow_inf=True)
    if b <= a:
        raise ctx.error(path + ("to_s",), f"to_s must be after from_s = {a}, got {b}")
    return a, b


def _parse(data: dict, ctx: _Ctx, base_dir: str) -> Scenario:
    ctx.keys(data, _TOP, ())
    name = ctx.string(data, "name", (), "scenario")
    description = ctx.string(data, "description", (), "")
    duration = ctx.num(data, "duration_s", (), required=True, lo=0.0, lo_open=True,
                       hi=MAX_DURATION_S)
    seed = ctx.integer(data, "seed", (), 0, lo=0)
    truth_rate = ctx.num(data, "truth_rate_hz", (), 200.0, lo=MIN_TRUTH_RATE_HZ, hi=10000.0)
    created = ctx.string(data, "created_utc", (), DEFAULT_CREATED_UTC)
    clock = ctx.string(data, "clock", (), "seconds since the start of the simulated run")
    rig, rig_toml, rig_source = _rig(data, ctx, base_dir)

    # ---- air ----------------------------------------------------------------------
    a = ctx.table(data, "air", ())
    ap = ("air",)
    ctx.keys(a, {"temp_c", "interpolation", "relative_humidity", "sensor", "humidity_sensor"}, ap)
    temp = _profile(ctx, a, "temp_c", ap, default=20.0, lo=-60.0, hi=90.0,
                    interp_key="interpolation")
    rh = _profile(ctx, a, "relative_humidity", ap, default=rig.air.relative_humidity, lo=0.0,
                  hi=1.0)
    rh = Profile(rh.t_s, rh.value, temp.interpolation)
    sensor = None
    sp = ap + ("sensor",)
    s = ctx.table(a, "sensor", ap)
    default_stream = rig.air.stream or "air_temp"
    if s is not None:
        ctx.keys(s, set(TempSensor.__dataclass_fields__), sp)
        rate = ctx.num(s, "rate_hz", sp, 1.0, lo=0.0, hi=1000.0)
        if rate > 0:
            sensor = TempSensor(
                stream=ctx.string(s, "stream", sp, default_stream),
                rate_hz=rate,
                phase_s=ctx.num(s, "phase_s", sp, 0.0, lo=0.0),
                noise_c=ctx.num(s, "noise_c", sp, 0.1, lo=0.0),
                lag_s=ctx.num(s, "lag_s", sp, 10.0, lo=0.0),
                resolution_c=ctx.num(s, "resolution_c", sp, 0.0, lo=0.0))
    hsensor = None
    hp = ap + ("humidity_sensor",)
    h = ctx.table(a, "humidity_sensor", ap)
    if h or rig.air.humidity_stream:
        ctx.keys(h, set(HumiditySensor.__dataclass_fields__), hp)
        rate = ctx.num(h, "rate_hz", hp, 0.2, lo=0.0, hi=1000.0)
        if rate > 0:
            hsensor = HumiditySensor(
                stream=ctx.string(h, "stream", hp, rig.air.humidity_stream or "humidity"),
                rate_hz=rate,
                phase_s=ctx.num(h, "phase_s", hp, 0.0, lo=0.0),
                noise=ctx.num(h, "noise", hp, 0.01, lo=0.0, hi=1.0),
                lag_s=ctx.num(h, "lag_s", hp, 20.0, lo=0.0))
    if sensor and rig.air.stream and sensor.stream != rig.air.stream:
        raise ctx.error(sp + ("stream",), f"the rig reads the air temperature from stream "
                        f"{rig.air.stream!r}; a stream named {sensor.stream!r} would leave it "
                        "on its fallback (to simulate a missing stream, set rate_hz = 0)")
    if sensor and hsensor and sensor.stream == hsensor.stream:
        raise ctx.error(hp + ("stream",), f"the humidity stream needs a name other than the "
                        f"temperature stream's {sensor.stream!r}")
    air = AirSpec(temp, rh, sensor, hsensor)

    # ---- targets --------------------------------------------------------------------
    targets = {}
    for i, t in enumerate(ctx.tables(data, "target", ())):
        tp = ("target", i)
        ctx.keys(t, {"direction", "waypoints", "interpolation", "step"}, tp)
        d = ctx.string(t, "direction", tp, required=True)
        if d not in rig.directions:
            raise ctx.error(tp + ("direction",), f"the rig has no direction {d!r}; it has "
                            + ", ".join(rig.directions))
        if d in targets:
            raise ctx.error(tp + ("direction",), f"direction {d!r} has two [[target]] tables")
        motion = _profile(ctx, t, "waypoints", tp, lo=0.0, interp_key="interpolation",
                          required=True)
        steps = []
        for j, st in enumerate(ctx.tables(t, "step", tp)):
            sp_ = tp + ("step", j)
            ctx.keys(st, {"from_s", "to_s", "range_m"}, sp_)
            a_, b_ = _window(ctx, st, sp_, duration)
            steps.append(Step(a_, b_, ctx.num(st, "range_m", sp_, required=True, lo=0.0)))
        targets[d] = Target(d, motion, tuple(steps))
    for d in rig.directions:
        if d not in targets:
            raise ctx.error(("target",), f"direction {d!r} of the rig needs a [[target]] "
                            "table (direction = ..., waypoints = [[t_s, range_m], ...])")

    # ---- surfaces --------------------------------------------------------------------
    surfaces = []
    for i, s in enumerate(ctx.tables(data, "surface", ())):
        p = ("surface", i)
        ctx.keys(s, {"direction", "from_s", "to_s", "ir_gain", "slant_deg", "echo_dropout_p"}, p)
        d = ctx.string(s, "direction", p, required=True)
        if d not in rig.directions:
            raise ctx.error(p + ("direction",), f"the rig has no direction {d!r}")
        a_, b_ = _window(ctx, s, p, duration, need_from=False)
        surfaces.append(Surface(d, a_, b_,
                                ir_gain=ctx.num(s, "ir_gain", p, 1.0, lo=0.0, lo_open=True,
                                                hi=10.0),
                                slant_deg=ctx.num(s, "slant_deg", p, 0.0, lo=0.0, hi=89.0),
                                echo_dropout_p=ctx.num(s, "echo_dropout_p", p, 0.0, lo=0.0,
                                                       hi=1.0)))

    # ---- per-sensor settings -----------------------------------------------------------
    sims = {}
    stab = ctx.table(data, "sensor", ())
    for sname in stab:
        if sname not in rig.sensors:
            raise ctx.error(("sensor", sname), f"the rig has no sensor {sname!r}; it has "
                            + ", ".join(rig.sensors))
    for sname, sensor_ in rig.sensors.items():
        p = ("sensor", sname)
        st = ctx.table(stab, sname, ("sensor",))
        if sensor_.kind == "triangulation":
            sims[sname] = _ir_sim(ctx, st, p, sensor_)
        else:
            sims[sname] = _echo_sim(ctx, st, p, sensor_, rig, duration)

    # ---- foreign echo rangers ------------------------------------------------------------
    foreign = []
    echo_names = rig.echo_names
    for i, f in enumerate(ctx.tables(data, "foreign", ())):
        p = ("foreign", i)
        ctx.keys(f, {"name", "period_s", "phase_s", "from_s", "to_s", "path_m", "heard_by",
                     "p"}, p)
        fname = ctx.string(f, "name", p, f"foreign{i + 1}")
        if fname in rig.sensors:
            raise ctx.error(p + ("name",), f"{fname!r} is a sensor of the rig; a foreign unit "
                            "needs another name")
        a_, b_ = _window(ctx, f, p, duration, need_from=False)
        heard = ctx.strings(f, "heard_by", p, echo_names)
        for h_ in heard:
            if h_ not in echo_names:
                raise ctx.error(p + ("heard_by",), f"{h_!r} is not an echo ranger of the rig "
                                f"(echo rangers: {', '.join(echo_names) or 'none'})")
        foreign.append(Foreign(
            name=fname,
            period_s=ctx.num(f, "period_s", p, required=True, lo=1e-3, hi=10.0),
            phase_s=ctx.num(f, "phase_s", p, 0.0, lo=0.0),
            from_s=a_, to_s=b_,
            path_m=_profile(ctx, f, "path_m", p, lo=0.0, required=True),
            heard_by=heard,
            p=ctx.num(f, "p", p, 1.0, lo=0.0, hi=1.0)))

    # ---- faults ---------------------------------------------------------------------------
    faults = []
    env_names = [x.stream for x in (air.sensor, air.humidity_sensor) if x is not None]
    for i, f in enumerate(ctx.tables(data, "fault", ())):
        faults.append(_fault(ctx, f, ("fault", i), rig, duration, env_names))

    return Scenario(name=name, rig=rig, rig_toml=rig_toml, duration_s=duration, seed=seed,
                    truth_rate_hz=truth_rate, air=air, targets=MappingProxyType(targets),
                    surfaces=tuple(surfaces), sensors=MappingProxyType(sims),
                    foreign=tuple(foreign), faults=tuple(faults), description=description,
                    created_utc=created, clock=clock, source=ctx.where,
                    rig_source=rig_source)


def _rig(data, ctx, base_dir):
    if "rig" not in data:
        raise ctx.error(("rig",), "missing; expected the rig file's path (relative to the "
                        "scenario file) or an inline [rig] table")
    v = data["rig"]
    if isinstance(v, str):
        path = v if os.path.isabs(v) else os.path.join(base_dir, v)
        if not os.path.isfile(path):
            raise ctx.error(("rig",), f"rig file {v!r} not found (looked for {path})")
        with open(path, "rb") as fh:
            try:
                text = fh.read().decode("utf-8")
            except UnicodeDecodeError:
                raise ConfigError("rig file is not UTF-8 text", file=path) from None
        return Rig.from_toml(text, where=path), text, path
    if isinstance(v, dict):
        try:
            rig = Rig.from_dict(v, where=ctx.where, text=ctx.text)
        except RangefuseError as exc:
            fieldname = "rig." + exc.field if exc.field else "rig"
            row = exc.row if exc.row is not None else ctx.loc.line(("rig",))
            raise ConfigError(exc.message, file=ctx.where, field=fieldname, row=row) from None
        return rig, rig.to_toml(), ""
    raise ctx.error(("rig",), f"expected a path (string) or a [rig] table, got {_show(v)}")


def _ir_sim(ctx, st, p, sensor):
    ctx.keys(st, _IR_KEYS, p)
    rate = ctx.num(st, "rate_hz", p, 100.0, lo=0.0, lo_open=True, hi=100000.0)
    jitter = ctx.num(st, "jitter_s", p, 0.0, lo=0.0)
    if jitter >= 0.5 / rate:
        raise ctx.error(p + ("jitter_s",), f"jitter_s must be below half the sample period "
                        f"({0.5 / rate:g} s) so samples stay in order")
    hold = ctx.num(st, "hold_s", p, None, lo=0.0)
    return IrSim(
        rate_hz=rate,
        phase_s=ctx.num(st, "phase_s", p, 0.0, lo=0.0),
        jitter_s=jitter,
        hold_s=hold,
        hold_phase_s=ctx.num(st, "hold_phase_s", p, 0.0, lo=0.0),
        volts_sigma=ctx.num(st, "volts_sigma", p, None, lo=0.0),
        weak_exponent=ctx.num(st, "weak_exponent", p, 1.0, lo=0.0, hi=4.0),
        gain_bias=ctx.num(st, "gain_bias", p, 0.1, lo=0.0, hi=1.0),
        adc_noise_counts=ctx.num(st, "adc_noise_counts", p, 0.0, lo=0.0),
        floor_volts=ctx.num(st, "floor_volts", p, None, lo=0.0),
        see_max_m=ctx.num(st, "see_max_m", p, None, lo=0.0, lo_open=True))


def _echo_sim(ctx, st, p, sensor, rig, duration):
    ctx.keys(st, _ECHO_KEYS, p)
    period = ctx.num(st, "ping_period_s", p, None, lo=0.0, lo_open=True, hi=10.0)
    if period is not None and rig.schedule.mode != "free":
        raise ctx.error(p + ("ping_period_s",), f"ping_period_s applies to free-running units "
                        f"only; the rig fires on a {rig.schedule.mode} schedule "
                        "([schedule] in the rig)")
    if rig.schedule.mode != "free" and "ping_phase_s" in st:
        raise ctx.error(p + ("ping_phase_s",), f"ping_phase_s applies to free-running units "
                        f"only; the rig fires on a {rig.schedule.mode} schedule")
    if period is None:
        period = DEFAULT_PING_PERIOD_S
    window = sensor.timeout_s + rig.schedule.ring_down_s
    jitter = ctx.num(st, "ping_jitter_s", p, 0.0, lo=0.0)
    if rig.schedule.mode == "free" and period - jitter < window:
        raise ctx.error(p + ("ping_period_s",), f"a free-running unit pings after its "
                        f"listening window closes: ping_period_s (minus ping_jitter_s) must be "
                        f">= timeout_s + ring_down_s = {window:.4g} s, got {period - jitter:g}")
    clutter = []
    for j, c in enumerate(ctx.tables(st, "clutter", p)):
        cp = p + ("clutter", j)
        ctx.keys(c, {"from_s", "to_s", "range_m", "p"}, cp)
        a_, b_ = _window(ctx, c, cp, duration, need_from=False)
        clutter.append(Clutter(a_, b_, ctx.num(c, "range_m", cp, required=True, lo=0.0),
                               ctx.num(c, "p", cp, 1.0, lo=0.0, hi=1.0)))
    blank = ctx.string(st, "blank_behaviour", p, "dropout", ("dropout", "ring_down"))
    pu = ctx.num(st, "power_up_temp_c", p, None, lo=-60.0, hi=90.0)
    return EchoSim(
        ping_period_s=period,
        ping_phase_s=ctx.num(st, "ping_phase_s", p, 0.0, lo=0.0),
        ping_jitter_s=jitter,
        sigma_m=ctx.num(st, "sigma_m", p, None, lo=0.0),
        sigma_frac=ctx.num(st, "sigma_frac", p, None, lo=0.0),
        multipath_p=ctx.num(st, "multipath_p", p, 0.0, lo=0.0, hi=1.0),
        multipath_extra_m=ctx.pair(st, "multipath_extra_m", p, (0.3, 1.0)),
        crosstalk_p=ctx.num(st, "crosstalk_p", p, 1.0, lo=0.0, hi=1.0),
        beam_half_angle_deg=ctx.num(st, "beam_half_angle_deg", p, 15.0, lo=0.5, hi=89.0),
        blank_behaviour=blank,
        power_up_temp_c=pu,
        clutter=tuple(clutter))


def _fault(ctx, f, p, rig, duration, env_names):
    kind = ctx.string(f, "kind", p, required=True, choices=FAULT_KINDS)
    allowed = {"kind", "sensor", "direction", "from_s", "to_s"} | _FAULT_PARAMS[kind]
    ctx.keys(f, allowed, p)
    a_, b_ = _window(ctx, f, p, duration)
    params = {}
    if kind == "target_jump":
        if "direction" in f:
            target = ctx.string(f, "direction", p)
            if target not in rig.directions:
                raise ctx.error(p + ("direction",), f"the rig has no direction {target!r}")
        elif "sensor" in f:
            sname = ctx.string(f, "sensor", p)
            if sname not in rig.sensors:
                raise ctx.error(p + ("sensor",), f"the rig has no sensor {sname!r}")
            target = rig.sensors[sname].direction
        else:
            raise ctx.error(p + ("direction",), "target_jump needs the direction whose truth "
                            "jumps (direction = ...)")
        params["jump_m"] = ctx.num(f, "jump_m", p, required=True)
    elif kind == "temp_fail":
        if "direction" in f:
            raise ctx.error(p + ("direction",), "temp_fail takes sensor = the air-temperature "
                            "stream's name, not a direction")
        default = env_names[0] if env_names else None
        target = ctx.string(f, "sensor", p, default)
        if target is None or target not in env_names:
            raise ctx.error(p + ("sensor",), "temp_fail needs an environment stream of the "
                            f"scenario (have {', '.join(env_names) or 'none'}), got {target!r}")
        params["mode"] = ctx.string(f, "mode", p, "nan", ("nan", "stop"))
    else:
        if "direction" in f:
            raise ctx.error(p + ("direction",), f"{kind} applies to a sensor (sensor = ...)")
        target = ctx.string(f, "sensor", p, required=True)
        ok = set(rig.sensors) | (set(env_names) if kind == "clock_jump" else set())
        if target not in ok:
            raise ctx.error(p + ("sensor",), f"{kind} needs a sensor of the rig"
                            + (" or an environment stream" if kind == "clock_jump" else "")
                            + f" ({', '.join(sorted(ok))}), got {target!r}")
        if kind == "crosstalk_burst" and rig.sensors[target].kind != "echo":
            raise ctx.error(p + ("sensor",), f"crosstalk_burst needs an echo ranger; "
                            f"{target!r} is an IR triangulation ranger")
        if kind in ("dropout_burst", "crosstalk_burst"):
            params["p"] = ctx.num(f, "p", p, 1.0, lo=0.0, hi=1.0)
        elif kind == "clock_jump":
            params["jump_s"] = ctx.num(f, "jump_s", p, required=True)
            if params["jump_s"] == 0:
                raise ctx.error(p + ("jump_s",), "jump_s must not be 0")
        elif kind == "stuck" and "value" in f:
            v = f["value"]
            is_serial = rig.sensors[target].output == "serial"
            if is_serial and not isinstance(v, str):
                raise ctx.error(p + ("value",), f"{target!r} sends text frames: value must be "
                                f"a frame (string), got {_show(v)}")
            if not is_serial and (isinstance(v, bool) or not isinstance(v, numbers.Real)
                                  or not math.isfinite(v) or v < 0):
                raise ctx.error(p + ("value",), f"value must be a raw reading >= 0 (in the "
                                f"unit's output {rig.sensors[target].output!r}), got {_show(v)}")
            params["value"] = v if is_serial else float(v)
    return Fault(kind, target, a_, b_, MappingProxyType(params))
