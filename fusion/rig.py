"""The rig: which rangers a robot carries, where they face, and how to fuse them.

A rig is described in TOML (see ``docs/rig.md``) and embedded in every log. It has one or
more directions, each fused into its own track from the sensors that face it; the echo
rangers of every direction share the air and can hear each other's pings.
"""
from __future__ import annotations

import math
import os
import re
from dataclasses import dataclass, field, fields, asdict
from types import MappingProxyType

from .errors import ConfigError
from . import _toml

__all__ = ["Rig", "AirConfig", "EstimatorConfig", "ScheduleConfig"]


def _table_line_of(text: str | None, name: str) -> int | None:
    """1-based line of the table header ``[name]`` or ``[[name]]`` (for error messages)."""
    pat = re.compile(r"\s*\[\[?\s*" + re.escape(name) + r"\s*\]")
    for i, line in enumerate((text or "").splitlines()):
        if pat.match(line):
            return i + 1
    return None


def _line_of(text: str | None, *needles: str) -> int | None:
    """1-based line of the first line matching all needles in order (for error messages)."""
    if not text:
        return None
    pat = re.compile(r"\s*".join(re.escape(n) for n in needles[:1]) + r"\s*=")
    lines = text.splitlines()
    start = 0
    if len(needles) > 1:  # locate the block that names this sensor first
        for i, line in enumerate(lines):
            if re.match(r"\s*name\s*=\s*[\"']" + re.escape(needles[1]) + r"[\"']", line):
                start = i
                # walk back to the table header
                while start > 0 and not lines[start].lstrip().startswith("["):
                    start -= 1
                break
    for i in range(start, len(lines)):
        if pat.match(lines[i]):
            return i + 1
    # a key that is a sub-table: its header, [sensor.curv] for "curv"
    head = re.compile(r"\s*\[\[?[^\]]*\.\s*" + re.escape(needles[0]) + r"\s*\]")
    for i in range(start, len(lines)):
        if head.match(lines[i]):
            return i + 1
    return None


def _take(cls, d: dict, where: str, table: str, text: str | None):
    """Build a config dataclass from a TOML table, checking keys and types."""
    known = {f.name: f for f in fields(cls)}
    kw = {}
    for key, value in d.items():
        if key not in known:
            raise ConfigError(f"unknown key {key!r}; expected one of {', '.join(sorted(known))}",
                              file=where, field=f"{table}.{key}", row=_line_of(text, key))
        default = known[key].default
        typ = type(default)
        if typ is float and isinstance(value, int) and not isinstance(value, bool):
            value = float(value)
        if typ is tuple and isinstance(value, list):
            value = tuple(value)
        if not isinstance(value, typ) or (isinstance(value, bool) and typ is not bool):
            raise ConfigError(f"expected {typ.__name__}, got {value!r}", file=where,
                              field=f"{table}.{key}", row=_line_of(text, key))
        kw[key] = value
    obj = cls(**kw)
    problem = obj.problem()
    if problem:
        key, msg = problem
        raise ConfigError(msg, file=where, field=f"{table}.{key}", row=_line_of(text, key))
    return obj


@dataclass(frozen=True)
class AirConfig:
    """Where the air temperature comes from and what to do when it is missing.

    Attributes
    ----------
    stream : str
        Environment stream in the log with the air temperature, degC ("" = none).
    humidity_stream : str
        Environment stream with relative humidity as a fraction ("" = use
        `relative_humidity`).
    relative_humidity : float
        Fixed relative humidity (fraction 0..1) when there is no humidity stream.
    temp_sigma_c : float
        Uncertainty of a fresh temperature sample (sensor noise, lag), degC.
    fallback_temp_c : float
        Temperature used when no sample has arrived yet.
    fallback_sigma_c : float
        Uncertainty of the configured fallback temperature, degC.
    stale_after_s : float
        A sample older than this is stale: the last good value is used with its
        uncertainty growing by `stale_growth_c_per_s` per second of staleness.
    stale_growth_c_per_s : float
        Growth rate of the temperature uncertainty while the stream is stale.
    """

    stream: str = ""
    humidity_stream: str = ""
    relative_humidity: float = 0.0
    temp_sigma_c: float = 0.5
    fallback_temp_c: float = 20.0
    fallback_sigma_c: float = 8.0
    stale_after_s: float = 5.0
    stale_growth_c_per_s: float = 0.05

    def problem(self):
        if not 0.0 <= self.relative_humidity <= 1.0:
            return "relative_humidity", "relative_humidity is a fraction from 0 to 1"
        for k in ("temp_sigma_c", "fallback_sigma_c", "stale_after_s", "stale_growth_c_per_s"):
            v = getattr(self, k)
            if not (math.isfinite(v) and v >= 0):
                return k, f"{k} must be a number >= 0"
        if not -60 <= self.fallback_temp_c <= 90:
            return "fallback_temp_c", "fallback_temp_c must be an air temperature in -60..90 degC"
        return None


@dataclass(frozen=True)
class EstimatorConfig:
    """Estimator settings.

    Attributes
    ----------
    kind : {"kalman", "particle"}
        The Gaussian-sum Kalman estimator, or the particle estimator.
    accel_psd : float
        Spectral density of the white acceleration driving the constant-velocity model,
        m^2/s^3 (process noise ``Q = q [[dt^3/3, dt^2/2], [dt^2/2, dt]]``).
    gate_probability : float
        Probability mass inside the innovation gate (chi-square, 1 dof); 1.0 = no gate.
    init_rate_sigma_mps : float
        Range-rate uncertainty of a new track.
    max_hypotheses : int
        Components kept in the Gaussian sum (1..8).
    prune_weight : float
        Components lighter than this are dropped.
    near_prior : float
        Prior probability that a new track's IR reading is on the near side of the peak.
    ambiguous_below : float
        A reading's branch is reported ambiguous when its probability is below this.
    outlier_density : float
        Density (1/m) of readings unrelated to the target, used to keep a "this reading
        was an outlier" hypothesis alive.
    reacquire_count : int
        Mutually consistent rejected readings of one sensor that restart a track (two
        suffice from an IR and an echo ranger, ``reacquire_count // 2 + 1`` from two
        sensors of one kind).
    reacquire_window_s : float
        ...that many inside this time window.
    max_rate_mps : float
        Fastest range rate the rig expects; re-acquisition refuses a story that needs more.
    max_lag_s : float
        Readings older than the track by less than this are applied at the track time;
        older ones are rejected as late.
    max_lead_s : float
        A sensor whose stamps leap more than this ahead of every other sensor's is
        checked for a jumped clock; readings of a clock shown to run ahead are decided
        ``clock_ahead`` (0 turns the check off).
    particles : int
        Particle count for the particle estimator.
    resample_below : float
        Resample when the effective sample size falls below this fraction.
    seed : int
        Random seed of the particle estimator.
    """

    kind: str = "kalman"
    accel_psd: float = 0.5
    gate_probability: float = 0.9995
    init_rate_sigma_mps: float = 0.5
    max_hypotheses: int = 4
    prune_weight: float = 1e-4
    near_prior: float = 0.5
    ambiguous_below: float = 0.95
    outlier_density: float = 0.02
    reacquire_count: int = 5
    reacquire_window_s: float = 0.5
    max_rate_mps: float = 4.0
    max_lag_s: float = 0.05
    max_lead_s: float = 0.25
    particles: int = 2000
    resample_below: float = 0.5
    seed: int = 0

    def problem(self):
        if self.kind not in ("kalman", "particle"):
            return "kind", f"kind must be 'kalman' or 'particle', got {self.kind!r}"
        if not 0.5 < self.gate_probability <= 1.0:
            return "gate_probability", "gate_probability must be in (0.5, 1]"
        if not 1 <= self.max_hypotheses <= 8:
            return "max_hypotheses", "max_hypotheses must be 1..8"
        if not 0 < self.near_prior < 1:
            return "near_prior", "near_prior must be strictly between 0 and 1"
        if not 2 <= self.reacquire_count <= 16:
            # the re-acquisition buffer holds 16 entries: a longer story could never form
            return "reacquire_count", "reacquire_count must be 2..16"
        if self.particles < 10:
            return "particles", "particles must be >= 10"
        for k in ("accel_psd", "init_rate_sigma_mps", "reacquire_window_s", "max_lag_s",
                  "max_lead_s", "outlier_density", "max_rate_mps"):
            v = getattr(self, k)
            if not (math.isfinite(v) and v > 0) and not (k in ("max_lag_s", "max_lead_s")
                                                         and v == 0):
                return k, f"{k} must be a positive number"
        return None


@dataclass(frozen=True)
class ScheduleConfig:
    """How the echo rangers fire.

    Attributes
    ----------
    mode : {"free", "round_robin", "chained"}
        Free-running (each unit on its own period: crosstalk is possible), round robin on
        a shared cycle, or chained (each unit triggers the next after its echo window).
    cycle_s : float
        Time between consecutive pings of the round robin (0 = let `rangefuse schedule`
        compute it).
    order : tuple of str
        Firing order (default: the sensors' order in the rig).
    ring_down_s : float
        Transducer ring-down after a ping, seconds.
    """

    mode: str = "free"
    cycle_s: float = 0.0
    order: tuple = ()
    ring_down_s: float = 0.001

    def problem(self):
        if self.mode not in ("free", "round_robin", "chained"):
            return "mode", f"mode must be 'free', 'round_robin' or 'chained', got {self.mode!r}"
        if not (math.isfinite(self.cycle_s) and self.cycle_s >= 0):
            return "cycle_s", "cycle_s must be >= 0"
        return None


@dataclass(frozen=True)
class Rig:
    """A robot's rangers and fusion settings.

    Examples
    --------
    >>> rig = Rig.load("datasets/cold-store-dock.rig.toml")   # doctest: +SKIP
    >>> sorted(rig.sensors)                                   # doctest: +SKIP
    ['echo_front', 'ir_front']
    """

    name: str
    directions: tuple
    sensors: MappingProxyType
    air: AirConfig = AirConfig()
    estimator: EstimatorConfig = EstimatorConfig()
    schedule: ScheduleConfig = ScheduleConfig()
    source: str = field(default="", compare=False)

    def __post_init__(self):
        if not isinstance(self.sensors, MappingProxyType):
            object.__setattr__(self, "sensors", MappingProxyType(dict(self.sensors)))

    # --- construction ------------------------------------------------------------
    @classmethod
    def load(cls, path) -> "Rig":
        return cls.load_with_text(path)[0]

    @classmethod
    def load_with_text(cls, path) -> tuple:
        """``(rig, toml_text)`` from a rig file (the text as written, for embedding)."""
        path = os.fspath(path)
        try:
            with open(path, "rb") as fh:
                text = fh.read().decode("utf-8")
        except OSError as exc:
            raise ConfigError(f"cannot read rig file: {exc.strerror}", file=path) from None
        except UnicodeDecodeError:
            raise ConfigError("rig file is not UTF-8 text", file=path) from None
        return cls.from_toml(text, where=path), text

    @classmethod
    def from_toml(cls, text: str, where: str = "<rig>") -> "Rig":
        data = _toml.loads(text, where=where)
        return cls.from_dict(data, where=where, text=text)

    @classmethod
    def from_dict(cls, data: dict, where: str = "<rig>", text: str | None = None) -> "Rig":
        allowed = {"name", "air", "estimator", "schedule", "direction", "sensor"}
        for key in data:
            if key not in allowed:
                raise ConfigError(f"unknown top-level key {key!r}; expected one of "
                                  f"{', '.join(sorted(allowed))}", file=where, field=key,
                                  row=_line_of(text, key) or _table_line_of(text, key))
        name = data.get("name", "rig")
        air = _take(AirConfig, data.get("air", {}), where, "air", text)
        est = _take(EstimatorConfig, data.get("estimator", {}), where, "estimator", text)
        sched = _take(ScheduleConfig, data.get("schedule", {}), where, "schedule", text)
        sensors = {}
        raw_sensors = data.get("sensor", [])
        if not isinstance(raw_sensors, list) or not raw_sensors:
            raise ConfigError("a rig needs at least one [[sensor]] table", file=where,
                              field="sensor")
        for i, sd in enumerate(raw_sensors):
            sname = sd.get("name")
            if not isinstance(sname, str) or not sname:
                raise ConfigError(f"[[sensor]] number {i + 1} needs a name", file=where,
                                  field="sensor.name")
            if sname in sensors:
                raise ConfigError(f"sensor name {sname!r} is used twice", file=where,
                                  field=f"sensor.{sname}", row=_line_of(text, "name", sname))
            kind = sd.get("kind")
            if "direction" not in sd:
                raise ConfigError("missing; expected the name of the direction (track) this "
                                  "ranger faces, e.g. \"front\"", file=where,
                                  field=f"sensor.{sname}.direction",
                                  row=_line_of(text, "name", sname))
            try:
                if kind == "triangulation":
                    from .sensors.ir import TriangulationRanger
                    sensors[sname] = TriangulationRanger.from_dict(sd, where=where)
                elif kind == "echo":
                    from .sensors.echo import EchoRanger
                    sensors[sname] = EchoRanger.from_dict(
                        {k: v for k, v in sd.items() if k != "kind"}, where=where)
                else:
                    raise ConfigError(f"kind must be 'triangulation' or 'echo', got {kind!r}",
                                      file=where, field=f"sensor.{sname}.kind")
            except ConfigError as exc:
                if exc.row is None and text:
                    key = (exc.field or "").rsplit(".", 1)[-1]
                    exc = ConfigError(exc.message, file=exc.file or where, field=exc.field,
                                      row=_line_of(text, key, sname))
                raise exc from None
        dirs = []
        for dd in data.get("direction", []):
            dn = dd.get("name") if isinstance(dd, dict) else None
            if not isinstance(dn, str) or not dn:
                raise ConfigError("each [[direction]] needs a name", file=where,
                                  field="direction.name")
            if dn in dirs:
                raise ConfigError(f"direction {dn!r} is named twice", file=where,
                                  field="direction.name", row=_line_of(text, "name", dn))
            dirs.append(dn)
        for s in sensors.values():
            if s.direction not in dirs:
                if data.get("direction"):
                    raise ConfigError(f"sensor {s.name!r} faces direction {s.direction!r}, "
                                      f"which no [[direction]] names (have {dirs})", file=where,
                                      field=f"sensor.{s.name}.direction",
                                      row=_line_of(text, "direction", s.name))
                dirs.append(s.direction)
        for sname in sched.order:
            if sname not in sensors or sensors[sname].kind != "echo":
                raise ConfigError(f"schedule order names {sname!r}, which is not an echo "
                                  "ranger of this rig", file=where, field="schedule.order",
                                  row=_line_of(text, "order"))
        return cls(name=str(name), directions=tuple(dirs), sensors=sensors, air=air,
                   estimator=est, schedule=sched, source=where)

    # --- description -------------------------------------------------------------
    def to_dict(self) -> dict:
        d = {"name": self.name}
        for key, obj, default in (("air", self.air, AirConfig()),
                                  ("estimator", self.estimator, EstimatorConfig()),
                                  ("schedule", self.schedule, ScheduleConfig())):
            d[key] = {k: (list(v) if isinstance(v, tuple) else v) for k, v in asdict(obj).items()}
        d["direction"] = [{"name": n} for n in self.directions]
        d["sensor"] = [{"name": s.name, "kind": s.kind, **s.to_dict()}
                       for s in self.sensors.values()]
        return d

    def to_toml(self) -> str:
        return _toml.dumps(self.to_dict())

    def replace(self, **changes) -> "Rig":
        """A copy with top-level parts replaced, checked as a rig file would be.

        ``air=``, ``estimator=`` and ``schedule=`` take a config object or a dict of the
        keys to change (``rig.replace(estimator={"kind": "particle"})``); ``sensors=`` a
        mapping name -> sensor (directions a new sensor faces are added); ``name=``,
        ``directions=``.

        Raises
        ------
        ConfigError
            Anything `from_dict` would refuse (an unknown key, a bad value, a schedule
            naming a sensor that is not an echo ranger, ...).
        """
        unknown = set(changes) - {f.name for f in fields(self)} - {"source"}
        if unknown:
            raise ConfigError(f"replace() got {', '.join(sorted(unknown))}; expected name, "
                              "directions, sensors, air, estimator or schedule",
                              field=sorted(unknown)[0])
        d = {f.name: getattr(self, f.name) for f in fields(self)}
        for key, cls in (("air", AirConfig), ("estimator", EstimatorConfig),
                         ("schedule", ScheduleConfig)):
            v = changes.get(key)
            if isinstance(v, dict):
                base = {k: (list(x) if isinstance(x, tuple) else x)
                        for k, x in asdict(d[key]).items()}
                # no file: a replaced rig was not read from one (a placeholder here
                # would be printed as if it were a file name)
                changes[key] = _take(cls, {**base, **v}, "", key, None)
        d.update(changes)
        sensors = dict(d["sensors"])
        for k, sen in sensors.items():
            if getattr(sen, "name", None) != k:
                raise ConfigError(f"sensors[{k!r}] is named {getattr(sen, 'name', None)!r}; "
                                  "the key must be the sensor's name", field=f"sensors.{k}")
        if "sensors" in changes and "directions" not in changes:
            dirs = list(d["directions"])
            dirs += [s.direction for s in sensors.values() if s.direction not in dirs]
            d["directions"] = tuple(dirs)
        if not isinstance(d["name"], str):
            raise ConfigError(f"name must be a string, got {d['name']!r}", field="name")
        dirs = tuple(d["directions"])
        if (not dirs or len(set(dirs)) != len(dirs)
                or not all(isinstance(x, str) and x for x in dirs)):
            raise ConfigError(f"directions must be distinct non-empty names, got {dirs!r}",
                              field="directions")
        missing = [sen.name for sen in sensors.values() if sen.direction not in dirs]
        if missing:
            raise ConfigError(f"sensor {missing[0]!r} faces a direction not in {dirs!r}",
                              field=f"sensors.{missing[0]}.direction")
        d["directions"] = dirs
        new = Rig(**d)
        # the same checks as a rig file: through the dictionary it would be written as
        Rig.from_dict(new.to_dict(), where="")
        return new

    # --- queries -----------------------------------------------------------------
    @property
    def sensor_names(self) -> tuple:
        return tuple(self.sensors)

    def sensors_facing(self, direction: str) -> tuple:
        return tuple(s for s in self.sensors.values() if s.direction == direction)

    @property
    def echo_names(self) -> tuple:
        return tuple(n for n, s in self.sensors.items() if s.kind == "echo")

    def summary(self) -> str:
        lines = [f"rig {self.name!r}: {len(self.sensors)} sensors, directions "
                 f"{', '.join(self.directions)}; estimator {self.estimator.kind}"]
        for s in self.sensors.values():
            lines.append(f"  {s.name:<16} {s.kind:<13} {s.output:<11} faces {s.direction}")
        return "\n".join(lines)
