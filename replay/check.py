"""``rangefuse check``: validate a log and summarise what it holds.

`check_log` does the work and returns a `CheckReport`; the command prints it. A
*problem* makes the log invalid (exit 2): the file does not follow the format, or
readings cannot be used as logged (reading times that are not finite, negative or going
backwards; non-finite raw values; readings the rig decodes as invalid; labels outside
the legend; a ping after its echo; environment values outside physical range; sensors
the rig does not describe or describes differently). A *warning* leaves it valid:
failed environment samples (NaN: the fuser uses the last good one), gaps, duplicated
reading times, empty streams, rig sensors or streams absent from the log. Every line names the file, the dataset, the first row concerned (0-based dataset
index) and what was expected.

The log is read in blocks of 65 536 rows, so memory stays flat for logs of any length.
"""
from __future__ import annotations

import argparse
import math
import os
import sys
from dataclasses import dataclass

import numpy as np

from fusion import decisions as D
from fusion.errors import LogFormatError, RangefuseError

from .logfile import CHUNK_ROWS, LABELS, LogFile

__all__ = ["CheckReport", "check_log", "register", "run", "GAP_FACTOR"]

GAP_FACTOR = 5.0        # an interval this many times the median interval is a gap
_LISTED = 5             # rows / gaps listed per finding
_TEMP_RANGE_C = (-60.0, 90.0)   # air temperatures a ranger on a machine can meet


def _line(path, field_, row, msg) -> str:
    return LogFormatError(msg, file=path, field=field_, row=row).one_line()


def _rows_text(rows, count) -> str:
    if count == 1:
        return f"row {rows[0]}"
    shown = ", ".join(str(r) for r in rows)
    return f"rows {shown}{', ...' if count > len(rows) else ''}"


class _Tally:
    """Count of rows meeting a condition, and the first few of them."""

    def __init__(self):
        self.count = 0
        self.rows: list[int] = []

    def add(self, mask, offset: int) -> None:
        idx = np.flatnonzero(mask)
        if idx.size:
            self.count += int(idx.size)
            room = _LISTED - len(self.rows)
            if room > 0:
                self.rows.extend(int(i) + offset for i in idx[:room])

    def report(self, out: list, path, field_, what: str, expected: str) -> None:
        if self.count:
            noun = "row" if self.count == 1 else "rows"
            out.append(_line(path, field_, self.rows[0],
                             f"{self.count} {noun} {what} ({_rows_text(self.rows, self.count)}); "
                             f"expected {expected}"))


class _TimeScan:
    """Block-by-block checks of a time column (flat memory)."""

    def __init__(self):
        self.nonfinite = _Tally()
        self.negative = _Tally()
        self.backwards = _Tally()
        self.duplicate = _Tally()
        self.t0, self.t1 = math.inf, -math.inf
        self._max = -math.inf      # latest time seen so far
        self._last = math.nan      # previous row's time
        self._medians: list[float] = []

    def feed(self, start: int, t: np.ndarray) -> None:
        if t.size == 0:
            return
        finite = np.isfinite(t)
        self.nonfinite.add(~finite, start)
        self.negative.add(finite & (t < 0), start)
        # Only finite times set the pace: after an infinite time every row would look late.
        running = np.fmax.accumulate(np.concatenate(([self._max], np.where(finite, t, -np.inf))))
        self.backwards.add(finite & (t < running[:-1]), start)
        prev = np.concatenate(([self._last], t[:-1]))
        self.duplicate.add(finite & (t == prev), start)
        d = t - prev
        d = d[np.isfinite(d) & (d > 0)]
        if d.size:
            self._medians.append(float(np.median(d)))
        if finite.any():
            self.t0 = min(self.t0, float(t[finite].min()))
            self.t1 = max(self.t1, float(t[finite].max()))
        self._max = float(running[-1])
        self._last = float(t[-1])

    @property
    def median_interval(self) -> float:
        # Exact for streams up to one block; the median of block medians beyond that.
        return float(np.median(self._medians)) if self._medians else math.nan

    def report(self, out: list, path, field_) -> None:
        self.nonfinite.report(out, path, field_, "with a time that is NaN or infinite",
                              "finite seconds")
        self.negative.report(out, path, field_, "with a negative time", "t_s >= 0")
        self.backwards.report(out, path, field_, "with a time earlier than a row before it",
                              "non-decreasing reading times")


@dataclass(frozen=True)
class StreamSummary:
    """One line of the summary table."""

    name: str
    kind: str
    output: str
    n: int
    rate_hz: float
    t0_s: float
    t1_s: float
    gaps: int = 0


@dataclass(frozen=True)
class CheckReport:
    """Result of `check_log`.

    Attributes
    ----------
    path : str
    problems : tuple of str
        One line per problem; any problem makes the log invalid.
    warnings : tuple of str
        One line per warning; the log stays valid.
    header : tuple of str
        Format version, writer, creation time, clock, rig.
    sensors : tuple of StreamSummary
    environment : tuple of str
        One summary line per environment stream.
    truth : tuple of str
        One summary line per truth direction.
    """

    path: str
    problems: tuple = ()
    warnings: tuple = ()
    header: tuple = ()
    sensors: tuple = ()
    environment: tuple = ()
    truth: tuple = ()

    @property
    def ok(self) -> bool:
        return not self.problems

    def summary(self, problems: bool = True) -> str:
        """Text summary; ``problems=False`` leaves the problem lines out (the CLI prints
        those on stderr)."""
        out = [f"log {self.path}"]
        if not self.header:  # the file could not be opened as a log
            if problems:
                out += [f"  {p}" for p in self.problems]
            out.append(f"NOT VALID: {_count(len(self.problems), 'problem')}")
            return "\n".join(out)
        out += [f"  {h}" for h in self.header]
        if self.sensors:
            out.append(f"  sensors ({len(self.sensors)}):")
            w = max(6, *(len(s.name) for s in self.sensors))
            out.append(f"    {'name':<{w}}  {'kind':<13}  {'output':<11}  {'readings':>9}  "
                       f"{'rate Hz':>8}  span s")
            for s in self.sensors:
                rate = f"{s.rate_hz:8.2f}" if math.isfinite(s.rate_hz) else f"{'-':>8}"
                span = (f"{_sec(s.t0_s)} .. {_sec(s.t1_s)}" if math.isfinite(s.t0_s) else "-")
                gaps = f"  ({s.gaps} {'gap' if s.gaps == 1 else 'gaps'})" if s.gaps else ""
                out.append(f"    {s.name:<{w}}  {s.kind:<13}  {s.output:<11}  {s.n:>9}  "
                           f"{rate}  {span}{gaps}")
        if self.environment:
            out.append(f"  environment ({len(self.environment)}):")
            out += [f"    {e}" for e in self.environment]
        out.append(f"  truth: {', '.join(self.truth) if self.truth else 'none'}")
        if self.warnings:
            out.append(f"  warnings ({len(self.warnings)}):")
            out += [f"    {w}" for w in self.warnings]
        if problems and self.problems:
            out.append(f"  problems ({len(self.problems)}):")
            out += [f"    {p}" for p in self.problems]
        if self.ok:
            out.append(f"valid ({_count(len(self.warnings), 'warning')})")
        else:
            out.append(f"NOT VALID: {_count(len(self.problems), 'problem')}, "
                       f"{_count(len(self.warnings), 'warning')}")
        return "\n".join(out)


def _sec(x: float) -> str:
    """Seconds with millisecond digits, in exponent form once the digits would run on."""
    return f"{x:.3f}" if abs(x) < 1e9 else f"{x:.6g}"


def _count(n: int, noun: str) -> str:
    return f"{n} {noun}{'' if n == 1 else 's'}"


def _span(t0, t1) -> str:
    return f"{_sec(t0)} .. {_sec(t1)} s" if math.isfinite(t0) else "no finite times"


def _interp(log: LogFile, name: str, lo: float, hi: float, fallback: float):
    """Callable t -> value from an environment stream, or a constant if it cannot be used."""
    if not name or name not in log.environments:
        return lambda t: np.full(t.shape, fallback)
    t_e, v_e = log.environment(name)
    ok = np.isfinite(t_e) & np.isfinite(v_e)
    t_e, v_e = t_e[ok], v_e[ok]
    if t_e.size == 0 or np.any(np.diff(t_e) < 0):
        return lambda t: np.full(t.shape, fallback)
    v_e = np.clip(v_e, lo, hi)

    def at(t):
        v = np.interp(np.nan_to_num(t, nan=t_e[0]), t_e, v_e)
        return v
    return at


def _first_value(log: LogFile, name: str, fallback: float) -> float:
    """First finite sample of an environment stream (a power-up temperature), or fallback."""
    if name and name in log.environments:
        v = log.read_dataset(f"/environment/{name}/value", 0, CHUNK_ROWS)
        v = v[np.isfinite(v)]
        if v.size:
            return float(np.clip(v[0], *_TEMP_RANGE_C))
    return float(fallback)


def _load_embedded_rig(log: LogFile, problems: list, warnings: list):
    try:
        from fusion.rig import Rig
    except ImportError as exc:
        warnings.append(_line(log.path, "/rig", None, f"rig checks skipped: the rig module "
                              f"cannot be imported ({exc})"))
        return None
    try:
        return Rig.from_toml(log.rig_toml, where=f"{log.path}:/rig")
    except RangefuseError as exc:
        problems.append(_line(log.path, "/rig", exc.row,
                              f"the embedded rig description is invalid: {exc.one_line()}"))
        return None


def check_log(path, rig=None) -> CheckReport:
    """Validate a log file and summarise it.

    Parameters
    ----------
    path : str or path-like
        The log.
    rig : fusion.rig.Rig or path-like, optional
        Rig (or rig file) to check the log against. Default: the rig embedded in the log.

    Returns
    -------
    CheckReport
        ``.ok`` is True when there are no problems (warnings are allowed).
    """
    path = os.fspath(path)
    if isinstance(rig, (str, os.PathLike)):
        from fusion.rig import Rig
        rig = Rig.load(rig)
    try:
        log = LogFile(path)
    except RangefuseError as exc:
        return CheckReport(path, problems=(exc.one_line(),))
    problems: list[str] = []
    warnings: list[str] = []
    with log:
        header = [f"format {log.format_version}; written by {log.writer or '?'} at "
                  f"{log.created_utc or '?'}; clock: {log.clock or '(not described)'}"]
        embedded = _load_embedded_rig(log, problems, warnings)
        if rig is None:
            rig = embedded
            if rig is not None:
                header.append(f"rig {rig.name!r} (embedded)")
        else:
            header.append(f"rig {rig.name!r} from {rig.source or 'the caller'}")
            try:
                differs = embedded is not None and embedded.to_toml() != rig.to_toml()
            except Exception:  # noqa: BLE001 - a comparison must not stop the check
                differs = False
            if differs:
                warnings.append(_line(path, "/rig", None, "the rig embedded in the log differs "
                                      f"from {rig.source or 'the given rig'}; checked against the latter"))
        bare = log.unprotected_datasets()
        if bare:
            warnings.append(_line(path, bare[0], None, f"{_count(len(bare), 'dataset')} without "
                                  "the fletcher32 checksum filter (corruption there cannot be "
                                  f"detected): {', '.join(bare[:_LISTED])}"
                                  f"{', ...' if len(bare) > _LISTED else ''}; expected "
                                  "chunked datasets with fletcher32"))
        if not log.sensors:
            problems.append(_line(path, "/sensors", None, "the log has no sensor streams; expected "
                                  "at least one /sensors/<name> group"))
        sensors = []
        for name, info in log.sensors.items():
            try:
                sensors.append(_check_sensor(log, name, info, rig, problems, warnings))
            except LogFormatError as exc:
                problems.append(exc.one_line())
                sensors.append(StreamSummary(name, info.kind, info.output, info.n, math.nan,
                                             math.nan, math.nan))
        env = []
        for name, info in log.environments.items():
            try:
                env.append(_check_environment(log, name, info, problems, warnings))
            except LogFormatError as exc:
                problems.append(exc.one_line())
        truth = []
        for direction in log.truth_directions:
            try:
                truth.append(_check_truth(log, direction, rig, problems, warnings))
            except LogFormatError as exc:
                problems.append(exc.one_line())
        if rig is not None:
            _check_rig_coverage(log, rig, problems, warnings)
    # one line per distinct finding, in the order found
    return CheckReport(path, tuple(dict.fromkeys(problems)), tuple(dict.fromkeys(warnings)),
                       tuple(header), tuple(sensors), tuple(env), tuple(truth))


def _check_sensor(log, name, info, rig, problems, warnings) -> StreamSummary:
    path, where = log.path, f"/sensors/{name}"
    times = _TimeScan()
    bad_raw, bad_label = _Tally(), _Tally()
    ping_after, ping_bad, invalid = _Tally(), _Tally(), _Tally()
    model = None
    if rig is not None:
        model = rig.sensors.get(name)
        if model is None:
            problems.append(_line(path, where, None, f"sensor {name!r} is not described by the "
                                  f"rig; expected one of {', '.join(rig.sensors)}"))
        elif (model.kind, model.output) != (info.kind, info.output):
            problems.append(_line(path, where, None, f"kind/output is {info.kind}/{info.output} "
                                  f"but the rig describes {model.kind}/{model.output}"))
            model = None
    if model is not None:
        try:
            temp_at = _interp(log, rig.air.stream, *_TEMP_RANGE_C, rig.air.fallback_temp_c)
            rh_at = _interp(log, rig.air.humidity_stream, 0.0, 1.0, rig.air.relative_humidity)
            power_up = _first_value(log, rig.air.stream, rig.air.fallback_temp_c)
        except LogFormatError:
            # an unreadable air stream is reported once, by its own check; this sensor's
            # readings are still checked, only not decoded with the rig
            model = None
        sigma = rig.air.temp_sigma_c
    if info.has_ping and info.kind != "echo":
        warnings.append(_line(path, f"{where}/ping_t_s", None, "ping times on an IR "
                              "triangulation ranger are ignored; expected them on echo rangers only"))
    if info.n == 0:
        warnings.append(_line(path, f"{where}/t_s", None, "the sensor has no readings"))
    decode_failed = None
    for start, s in log.blocks(name, CHUNK_ROWS):
        times.feed(start, s.t_s)
        if info.output != "serial":
            bad_raw.add(~np.isfinite(s.raw), start)
        if s.ping_t_s is not None:
            p = s.ping_t_s
            ping_bad.add(np.isinf(p) | (p < 0), start)
            ping_after.add(np.isfinite(p) & np.isfinite(s.t_s) & (p > s.t_s), start)
        if s.label is not None:
            bad_label.add((s.label < 0) | (s.label >= len(LABELS)), start)
        if model is not None and decode_failed is None:
            try:
                m = model.decode(s.raw, s.t_s, temp_at(s.t_s), sigma, rh_at(s.t_s),
                                 power_up_temp_c=power_up)
                # Rows already reported for a non-finite time or raw value are not
                # counted again as undecodable.
                explained = ~np.isfinite(s.t_s)
                if info.output != "serial":
                    explained |= ~np.isfinite(s.raw)
                invalid.add((np.asarray(m.code) == D.INVALID) & ~explained, start)
            except (ValueError, TypeError, RangefuseError) as exc:
                row = start + (getattr(exc, "row", None) or 0)
                decode_failed = (row, getattr(exc, "message", None) or str(exc))
    times.report(problems, path, f"{where}/t_s")
    times.duplicate.report(warnings, path, f"{where}/t_s", "with the same time as the row before",
                           "distinct reading times (is the clock too coarse?)")
    bad_raw.report(problems, path, f"{where}/raw", "with a raw value that is NaN or infinite",
                   f"finite values (unit {info.units!r}) as the sensor gave them")
    ping_bad.report(problems, path, f"{where}/ping_t_s", "with an infinite or negative ping time",
                    "finite seconds >= 0, or NaN where unknown")
    ping_after.report(problems, path, f"{where}/ping_t_s", "with the ping after the reading",
                      "ping_t_s <= t_s (the ping comes before its echo)")
    bad_label.report(problems, path, f"{where}/label", "with a label outside the legend",
                     f"0..{len(LABELS) - 1}")
    invalid.report(problems, path, f"{where}/raw", "that the rig decodes as invalid",
                   "values the sensor can produce (in range, well-formed frames)")
    if decode_failed is not None:
        problems.append(_line(path, f"{where}/raw", decode_failed[0],
                              f"decoding with the rig failed: {decode_failed[1]}"))
    med = times.median_interval
    gaps = _find_gaps(log, name, info.n, med) if math.isfinite(med) else []
    if gaps:
        shown = "; ".join(f"{_sec(a)}-{_sec(b)} s ({_sec(b - a)} s)" for _, a, b in gaps[:_LISTED])
        more = f" and {len(gaps) - _LISTED} more" if len(gaps) > _LISTED else ""
        warnings.append(_line(path, f"{where}/t_s", gaps[0][0],
                              f"{_count(len(gaps), 'gap')} longer than {GAP_FACTOR:g} x the "
                              f"median interval ({med:.4g} s): {shown}{more}"))
    rate = 1.0 / med if math.isfinite(med) and med > 0 else math.nan
    return StreamSummary(name, info.kind, info.output, info.n, rate, times.t0, times.t1, len(gaps))


def _find_gaps(log, name, n, median):
    """[(row, t_before, t_after)] for consecutive finite times further apart than the limit."""
    limit = GAP_FACTOR * median
    gaps, last = [], math.nan
    for start in range(0, n, CHUNK_ROWS):
        t = log.read_times(name, start, start + CHUNK_ROWS)
        prev = np.concatenate(([last], t[:-1]))
        d = t - prev
        for i in np.flatnonzero(np.isfinite(d) & (d > limit)):
            gaps.append((start + int(i), float(prev[i]), float(t[i])))
        last = float(t[-1]) if t.size else last
    return gaps


def _scan_column(log, field_, n, times: _TimeScan | None = None, values=None):
    """Feed a time column (and optionally check a value column) block by block."""
    for start in range(0, n, CHUNK_ROWS):
        if times is not None:
            times.feed(start, log.read_dataset(field_, start, start + CHUNK_ROWS))
        if values is not None:
            values(start)


def _check_environment(log, name, info, problems, warnings) -> str:
    path, where = log.path, f"/environment/{name}"
    times = _TimeScan()
    nonfinite, out_range = _Tally(), _Tally()
    lo, hi = _TEMP_RANGE_C if info.quantity == "air_temperature" else (0.0, 1.0)
    vmax = [-math.inf]

    def values(start):
        v = log.read_dataset(f"{where}/value", start, start + CHUNK_ROWS)
        finite = np.isfinite(v)
        nonfinite.add(~finite, start)
        out_range.add(finite & ((v < lo) | (v > hi)), start)
        if finite.any():
            vmax[0] = max(vmax[0], float(v[finite].max()))

    _scan_column(log, f"{where}/t_s", info.n, times, values)
    times.report(problems, path, f"{where}/t_s")
    # A failed sample is written as NaN (a sensor that stopped answering): the fuser
    # counts it as a failure and uses the last good value with a growing sigma.
    if nonfinite.count:
        noun = "sample" if nonfinite.count == 1 else "samples"
        warnings.append(_line(path, f"{where}/value", nonfinite.rows[0],
                              f"{nonfinite.count} failed {noun}, NaN or infinite "
                              f"({_rows_text(nonfinite.rows, nonfinite.count)}): the replay "
                              "uses the last good one, its sigma growing once it is stale"))
    hint = ""
    if info.quantity == "relative_humidity" and 1.0 < vmax[0] <= 100.0:
        hint = " (values up to 100 look like percent: divide by 100)"
    out_range.report(problems, path, f"{where}/value", f"with a value outside {lo:g}..{hi:g} {info.units}",
                     f"{info.quantity} in {lo:g}..{hi:g} {info.units}{hint}")
    if info.n == 0:
        warnings.append(_line(path, f"{where}/t_s", None, "the stream has no samples"))
    return (f"{name:<12} {info.quantity:<17} {info.units:<4} {info.n:>9} samples  "
            f"{_span(times.t0, times.t1)}")


def _check_truth(log, direction, rig, problems, warnings) -> str:
    path, where = log.path, f"/truth/{direction}"
    n = log.truth_rows[direction]
    times = _TimeScan()
    bad = _Tally()

    def values(start):
        r = log.read_dataset(f"{where}/range_m", start, start + CHUNK_ROWS)
        bad.add(np.isinf(r) | (r < 0), start)

    _scan_column(log, f"{where}/t_s", n, times, values)
    times.report(problems, path, f"{where}/t_s")
    bad.report(problems, path, f"{where}/range_m", "with a range that is negative or infinite",
               "metres >= 0, or NaN where the truth is unknown")
    if rig is not None and direction not in rig.directions:
        warnings.append(_line(path, where, None, f"direction {direction!r} is not one of the "
                              f"rig's ({', '.join(rig.directions)})"))
    return f"{direction} ({n} samples, {_span(times.t0, times.t1)})"


def _check_rig_coverage(log, rig, problems, warnings) -> None:
    path = log.path
    for name in rig.sensors:
        if name not in log.sensors:
            warnings.append(_line(path, f"/sensors/{name}", None,
                                  f"rig sensor {name!r} has no stream in the log"))
    for stream, quantity in ((rig.air.stream, "air_temperature"),
                             (rig.air.humidity_stream, "relative_humidity")):
        if not stream:
            continue
        info = log.environments.get(stream)
        if info is None:
            warnings.append(_line(path, f"/environment/{stream}", None,
                                  f"the rig reads {quantity} from stream {stream!r}, which the "
                                  "log lacks (the fallback value will be used)"))
        elif info.quantity != quantity:
            problems.append(_line(path, f"/environment/{stream}", None,
                                  f"quantity is {info.quantity} but the rig reads {quantity} "
                                  "from this stream"))


# --------------------------------------------------------------------------------------
# Command line
# --------------------------------------------------------------------------------------
_EPILOG = """\
example:
  rangefuse check datasets/cold-store-dock.h5
  rangefuse check run.h5 --rig my-robot.rig.toml

Exit status 0 when the log is valid (warnings such as gaps are allowed), 2 when it is
not: each problem is printed on stderr as one line naming the file, dataset, first row
(0-based) and what was expected.
"""


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "check", help="validate a log and summarise it",
        description="Validate a rangefuse log: layout, units, reading times, values, and\n"
                    "agreement with the rig (the embedded one unless --rig is given).",
        epilog=_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("log", metavar="LOG", help="log file (.h5)")
    p.add_argument("--rig", metavar="RIG", help="rig description (TOML) to check against "
                   "instead of the one embedded in the log")
    p.set_defaults(func=run)


def run(args) -> int:
    report = check_log(args.log, args.rig)
    print(report.summary(problems=False))
    for line in report.problems:
        print(f"rangefuse check: error: {line}", file=sys.stderr)
    return 0 if report.ok else 2
