"""``rangefuse import``: turn a text log (CSV, one reading per row) into a log file.

The CSV has the header ``t_s,sensor,raw`` or ``t_s,sensor,raw,ping_t_s`` and one row
per reading. The ``sensor`` column names

- a rig sensor: ``raw`` is its reading (a number, or the text frame of a serial unit);
  ``ping_t_s`` (echo rangers only) is the transmit time of its ping, empty if unknown;
- the rig's air-temperature stream (``[air] stream``): ``raw`` is degC;
- the rig's humidity stream (``[air] humidity_stream``): ``raw`` is a fraction 0..1;
- ``truth.<direction>``: ``raw`` is the true range in metres for that rig direction.

The import judges syntax only: a row is reported when it has the wrong number of
fields, a number that does not parse, an unknown sensor, a ping time where there can
be none, or a text frame with a NUL. Values that parse are stored as they are, in the
file's row order (``rangefuse check`` judges them afterwards). Serial frames are stored
verbatim after CSV unquoting: no backslash escapes are interpreted, so ``\\r`` in the
file stays two characters; a real carriage return must be inside a quoted field.

Row numbers are line numbers of the CSV file (the header is row 1; a record whose
quoted field spans lines is numbered by its first line). Blank lines are skipped and
are not rows.
"""
from __future__ import annotations

import argparse
import csv
import math
import os
import sys
from array import array
from dataclasses import dataclass

import numpy as np

from fusion.errors import InputError

from ._io import refuse_overwrite
from .logfile import SensorStream, write_log

__all__ = ["ImportReport", "import_csv", "load_rig_text", "register", "run"]

HEADERS = (("t_s", "sensor", "raw"), ("t_s", "sensor", "raw", "ping_t_s"))
TRUTH_PREFIX = "truth."


@dataclass(frozen=True)
class ImportReport:
    """What `import_csv` did.

    Attributes
    ----------
    csv_path, out_path : str
    rows_in : int
        Data rows read (blank lines excluded). ``rows_in == stored + len(reported)``.
    stored : int
        Rows that went into the log (or would have, when ``written`` is False; the
        summary line then says "good" instead of "stored").
    reported : tuple of InputError
        One per row that could not be read, in file order.
    blank_lines : int
    written : bool
        Whether the log file was written.
    silent : tuple of str
        The rig's sensors that got no row (a rig for another robot, or a unit that was
        not logged).
    """

    csv_path: str
    out_path: str
    rows_in: int
    stored: int
    reported: tuple
    blank_lines: int
    written: bool
    silent: tuple = ()

    def summary_line(self) -> str:
        n = self.blank_lines
        blank = f"; {n} blank line{'' if n == 1 else 's'} skipped" if n else ""
        kept = "stored" if self.written else "good"
        return f"read {self.rows_in} rows: {self.stored} {kept}, {len(self.reported)} reported{blank}"


def load_rig_text(path):
    """``(rig, toml_text)`` from a rig file: the text is embedded in the log as written."""
    from fusion.rig import Rig

    return Rig.load_with_text(path)


def _number(text: str, what: str):
    """Parse a decimal number; returns (value, None) or (None, message)."""
    s = text.strip()
    if not s:
        return None, f"{what} is empty; expected a number"
    if "_" in s:  # float() accepts digit separators; a logger never writes them
        return None, f"{what} is {text!r}; expected a number"
    try:
        return float(s), None
    except ValueError:
        return None, f"{what} is {text!r}; expected a number"


class _Column:
    """Growing storage for one sensor's rows (8 bytes a number, not a Python float)."""

    def __init__(self, serial: bool):
        self.t = array("d")
        self.raw = [] if serial else array("d")
        self.ping = array("d")
        self.any_ping = False


def import_csv(csv_path, rig, rig_toml: str, out_path, *, strict: bool = False,
               clock: str = "", created_utc: str | None = None, inputs=()) -> ImportReport:
    """Read a CSV text log and write a log file.

    Parameters
    ----------
    csv_path : str or path-like
        The CSV (UTF-8, header ``t_s,sensor,raw[,ping_t_s]``).
    rig : fusion.rig.Rig
        The rig the readings come from.
    rig_toml : str
        Its TOML text, embedded in the log.
    out_path : str or path-like
        The log to write (atomically; never over ``csv_path`` or ``inputs``).
    strict : bool
        Write nothing if any row is reported.
    clock, created_utc : str
        Passed to `write_log`.
    inputs : iterable of path-like
        Further input files the output must not overwrite (e.g. the rig file).

    Returns
    -------
    ImportReport
        The log is written when at least one row was stored and, with ``strict``, no row
        was reported.

    Raises
    ------
    InputError
        The file cannot be read, is not UTF-8, its header is wrong, or the output is an input.
    """
    csv_path, out_path = os.fspath(csv_path), os.fspath(out_path)
    inputs = [csv_path] + [os.fspath(p) for p in inputs]
    refuse_overwrite(out_path, inputs)

    columns = {name: _Column(s.output == "serial") for name, s in rig.sensors.items()}
    env_names = {}
    if rig.air.stream:
        env_names[rig.air.stream] = "air_temperature"
    if rig.air.humidity_stream:
        env_names[rig.air.humidity_stream] = "relative_humidity"
    env = {name: (array("d"), array("d")) for name in env_names}
    truth = {d: (array("d"), array("d")) for d in rig.directions}
    reported: list[InputError] = []
    rows_in = stored = blank = 0
    expected_names = ", ".join(list(rig.sensors) + list(env_names)
                               + [TRUTH_PREFIX + d for d in rig.directions])

    try:
        fh = open(csv_path, encoding="utf-8-sig", newline="")
    except OSError as exc:
        raise InputError(f"cannot read: {exc.strerror}", file=csv_path) from None
    row = 1
    with fh:
        reader = csv.reader(fh)
        try:
            header = next(reader, None)
            if header is None:
                raise InputError("the file is empty; expected the header t_s,sensor,raw[,ping_t_s]",
                                 file=csv_path, row=1)
            header = tuple(h.strip() for h in header)
            if header not in HEADERS:
                raise InputError(f"header is {','.join(header)!r}; expected t_s,sensor,raw or "
                                 "t_s,sensor,raw,ping_t_s", file=csv_path, field="header", row=1)
            ncol = len(header)
            last_line = reader.line_num
            for fields in reader:
                row, last_line = last_line + 1, reader.line_num
                if not fields:
                    blank += 1
                    continue
                rows_in += 1

                def bad(msg, field=None):
                    reported.append(InputError(msg, file=csv_path, field=field, row=row))

                if len(fields) != ncol:
                    bad(f"has {len(fields)} fields; expected {ncol} ({','.join(header)})")
                    continue
                t, msg = _number(fields[0], "t_s")
                if msg:
                    bad(msg, "t_s")
                    continue
                name = fields[1].strip()
                ping_text = fields[3].strip() if ncol == 4 else ""
                col = columns.get(name)
                if col is not None:
                    model = rig.sensors[name]
                    if model.output == "serial":
                        raw = fields[2]
                        if "\x00" in raw:
                            bad("the text frame contains a NUL character, which the log cannot "
                                "hold", "raw")
                            continue
                    else:
                        raw, msg = _number(fields[2], "raw")
                        if msg:
                            bad(msg, "raw")
                            continue
                    ping = math.nan
                    if ping_text:
                        if model.kind != "echo":
                            bad(f"ping_t_s given for {name!r}, an IR triangulation ranger; "
                                "expected it empty (ping times belong to echo rangers)", "ping_t_s")
                            continue
                        ping, msg = _number(ping_text, "ping_t_s")
                        if msg:
                            bad(msg, "ping_t_s")
                            continue
                        col.any_ping = col.any_ping or not math.isnan(ping)
                    col.t.append(t)
                    col.raw.append(raw)
                    col.ping.append(ping)
                    stored += 1
                    continue
                if name in env or (name.startswith(TRUTH_PREFIX) and name[len(TRUTH_PREFIX):] in truth):
                    if ping_text:
                        bad(f"ping_t_s given for {name!r}, which is not an echo ranger; "
                            "expected it empty", "ping_t_s")
                        continue
                    value, msg = _number(fields[2], "raw")
                    if msg:
                        bad(msg, "raw")
                        continue
                    ts, vs = env[name] if name in env else truth[name[len(TRUTH_PREFIX):]]
                    ts.append(t)
                    vs.append(value)
                    stored += 1
                    continue
                bad(f"unknown sensor {name!r}; expected one of {expected_names}", "sensor")
        except UnicodeDecodeError:
            raise InputError("the file is not UTF-8 text", file=csv_path, row=row + 1) from None
        except csv.Error as exc:
            raise InputError(f"cannot parse CSV: {exc}", file=csv_path, row=row) from None

    report = dict(csv_path=csv_path, out_path=out_path, rows_in=rows_in, stored=stored,
                  reported=tuple(reported), blank_lines=blank,
                  silent=tuple(n for n, col in columns.items() if not col.t))
    if stored == 0 or (strict and reported):
        return ImportReport(**report, written=False)

    def f8(values):
        return np.array(values, dtype=np.float64)

    streams = []
    for name, col in columns.items():
        model = rig.sensors[name]
        raw = np.array(col.raw, dtype=object) if model.output == "serial" else f8(col.raw)
        ping = f8(col.ping) if col.any_ping else None
        streams.append(SensorStream(name, model.kind, model.output, f8(col.t), raw, ping))
    environment = {name: (env_names[name], f8(ts), f8(vs))
                   for name, (ts, vs) in env.items() if len(ts)}
    truths = {d: (f8(ts), f8(rs)) for d, (ts, rs) in truth.items() if len(ts)}
    write_log(out_path, rig_toml, streams, environment, truths or None, clock=clock,
              created_utc=created_utc, inputs=inputs)
    return ImportReport(**report, written=True)


# --------------------------------------------------------------------------------------
# Command line
# --------------------------------------------------------------------------------------
_EPILOG = """\
example:
  rangefuse import bench-run.csv --rig my-robot.rig.toml -o bench-run.h5
  rangefuse check bench-run.h5

CSV (UTF-8), one reading per row:
  t_s,sensor,raw,ping_t_s
  0.000,ir_front,512,
  0.010,echo_front,0.00583,0.004
  0.500,air,21.5,
  0.500,truth.front,1.000,

Rows that cannot be read are reported on stderr with their line numbers (header = 1)
and the rest is stored; exit status 0 if anything was stored. With --strict any bad
row means exit status 2 and no output. The output is written atomically and never
over an input. See docs/log-format.md.
"""


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "import", help="convert a CSV text log into a log file",
        description="Convert a CSV text log (t_s,sensor,raw[,ping_t_s]) into a rangefuse\n"
                    "log file that embeds the rig description.",
        epilog=_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("csv", metavar="CSV", help="text log, one reading per row")
    p.add_argument("--rig", metavar="RIG", required=True, help="rig description (TOML)")
    p.add_argument("-o", "--output", "--out", dest="output", metavar="LOG", required=True,
                   help="log file to write (.h5)")
    p.add_argument("--strict", action="store_true",
                   help="write nothing and exit 2 if any row cannot be read")
    p.add_argument("--clock", default="", metavar="TEXT",
                   help="what t_s = 0 means, stored in the log (free text)")
    p.add_argument("--created-utc", metavar="ISO",
                   help="creation time to store (default now); fix it for reproducible files")
    p.add_argument("--max-report", type=int, default=50, metavar="N",
                   help="print at most N bad rows (default 50; 0 = all)")
    p.set_defaults(func=run)


def run(args) -> int:
    refuse_overwrite(args.output, [args.csv, args.rig])
    rig, text = load_rig_text(args.rig)
    report = import_csv(args.csv, rig, text, args.output, strict=args.strict, clock=args.clock,
                        created_utc=args.created_utc, inputs=[args.rig])
    limit = len(report.reported) if args.max_report <= 0 else args.max_report
    for err in report.reported[:limit]:
        print(f"rangefuse import: bad row: {err.one_line()}", file=sys.stderr)
    if len(report.reported) > limit:
        print(f"rangefuse import: ... and {len(report.reported) - limit} more bad rows not shown "
              "(--max-report 0 shows all)", file=sys.stderr)
    print(report.summary_line())
    if report.silent and report.stored:
        print(f"note: no rows for the rig's {', '.join(report.silent)}: is this the rig of "
              "the robot that made the log?")
    if report.written:
        print(f"wrote {report.out_path}")
        return 0
    if report.stored == 0:
        print(f"rangefuse import: error: {report.csv_path}: no row could be stored; nothing "
              "written", file=sys.stderr)
    else:
        print(f"rangefuse import: error: {report.csv_path}: {len(report.reported)} bad rows and "
              "--strict; nothing written", file=sys.stderr)
    return 2
