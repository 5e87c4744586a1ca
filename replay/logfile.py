"""The self-describing log file: raw readings, environment, ground truth and the rig.

A log is an HDF5 file laid out as ``docs/log-format.md`` describes (format version 1).
It carries the rig description it was recorded with, so it replays with no other file,
and every number in it has its unit beside it.

Writing is atomic (temporary file in the target directory, then rename) and
deterministic: equal content, including an explicit ``created_utc``, gives identical
bytes, because the writer stores no object timestamps and lays groups out in name
order. Reading checks the structure when the file is opened (no bulk data is read),
and every dataset carries the Fletcher-32 checksum filter, so a damaged chunk raises
`LogFormatError` instead of returning wrong numbers.

Examples
--------
>>> import numpy as np, os, tempfile
>>> path = os.path.join(tempfile.mkdtemp(), "run.h5")
>>> s = SensorStream("ir_front", "triangulation", "counts", t_s=np.arange(3) * 0.02,
...                  raw=np.array([512.0, 511.0, 509.0]))
>>> write_log(path, "name = 'demo'\\n", [s], {}, created_utc="2024-01-01T00:00:00+00:00")
>>> with open_log(path) as log:
...     log.sensors["ir_front"].n, float(log.read_sensor("ir_front").raw[0])
(3, 512.0)
"""
from __future__ import annotations

import datetime as _dt
import hashlib
import math
import os
import re
from dataclasses import dataclass

import h5py
import numpy as np

from fusion import __version__
from fusion.errors import InputError, LogFormatError

from ._io import atomic_output, refuse_overwrite

try:  # tomllib is in the standard library from 3.11 on
    import tomllib as _tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as _tomllib

__all__ = ["FORMAT", "FORMAT_VERSION", "KINDS", "OUTPUTS", "RAW_UNITS", "QUANTITIES",
           "QUANTITY_UNITS", "LABELS", "LABEL_LEGEND", "SensorStream", "SensorInfo",
           "EnvironmentInfo", "write_log", "open_log", "LogFile"]

FORMAT = "rangefuse-log"
FORMAT_VERSION = 1

KINDS = ("triangulation", "echo")
# Units of /sensors/<name>/raw for each output kind.
RAW_UNITS = {"counts": "count", "volts": "V", "echo_time": "s", "pulse_width": "s",
             "analog": "V", "serial": "text"}
OUTPUTS = tuple(RAW_UNITS)
QUANTITY_UNITS = {"air_temperature": "degC", "relative_humidity": "1"}
QUANTITIES = tuple(QUANTITY_UNITS)
LABELS = ("genuine", "crosstalk", "multipath ghost", "dropout", "held repeat", "no target")
LABEL_LEGEND = ", ".join(f"{i} {name}" for i, name in enumerate(LABELS))

CHUNK_ROWS = 65536          # rows per chunk for numbers (512 KiB of float64)
_CHUNK_BYTES = 1 << 20      # cap for text chunks, whose rows are as wide as the longest frame
_FILTERS = dict(compression="gzip", compression_opts=4, shuffle=True, fletcher32=True)
# The HDF5 1.10 file format: every metadata block (object headers, chunk indexes) carries
# a checksum, so a damaged header is reported instead of read as other numbers; readable
# by HDF5 1.10 (2016) and later.
LIBVER = ("v110", "v110")
_SCAN_ROWS = 65536          # rows of t_s read at a time when scanning for window bounds


# --------------------------------------------------------------------------------------
# In-memory description of one sensor's readings
# --------------------------------------------------------------------------------------
def _name_problem(name) -> str | None:
    if not isinstance(name, str) or not name:
        return "a name must be a non-empty string"
    if "/" in name or name in (".", "..") or "\x00" in name or name != name.strip():
        return (f"name {name!r} cannot be an HDF5 group name; expected no '/', no NUL and no "
                "leading or trailing spaces")
    return None


def _float_array(values, field: str, name: str) -> np.ndarray:
    try:
        arr = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError("expected numbers (float64)", field=f"{name}.{field}") from None
    if arr.ndim != 1:
        raise InputError(f"expected a 1-D array, got shape {arr.shape}", field=f"{name}.{field}")
    return arr


def _text_array(values, name: str) -> np.ndarray:
    if isinstance(values, np.ndarray) and values.ndim != 1:
        raise InputError(f"expected a 1-D sequence of text frames, got shape {values.shape}",
                         field=f"{name}.raw")
    out = np.empty(len(values), dtype=object)
    if isinstance(values, np.ndarray) and values.dtype.kind in "OU":
        out[:] = values
        try:
            # the common case (a log's frames) in one pass of C: all text, no NUL
            if "\x00" not in "".join(out):
                return out
        except TypeError:
            pass  # a frame that is not text: the loop below names its row
    for i, v in enumerate(values):
        if not isinstance(v, str):
            raise InputError(f"a serial frame must be str, got {type(v).__name__}",
                             field=f"{name}.raw", row=i)
        if "\x00" in v:
            # HDF5 strings end at the first NUL; storing one would silently cut the frame.
            raise InputError("a serial frame contains a NUL character, which the log cannot "
                             "hold", field=f"{name}.raw", row=i)
        out[i] = v
    return out


@dataclass(frozen=True, eq=False)
class SensorStream:
    """The readings of one sensor, in the order they were logged.

    Parameters
    ----------
    name : str
        Sensor name, as in the rig.
    kind : {"triangulation", "echo"}
        IR triangulation ranger or ultrasonic echo ranger.
    output : {"counts", "volts", "echo_time", "pulse_width", "analog", "serial"}
        What ``raw`` holds; fixes its unit (see `RAW_UNITS`).
    t_s : (n,) float64
        Time each reading was taken, seconds on the log's clock.
    raw : (n,) float64, or (n,) object array of str for ``output="serial"``
        The reading as the sensor gave it: ADC counts, volts, seconds, or a text frame.
    ping_t_s : (n,) float64, optional
        Transmit time of the ping that produced each reading (echo rangers only; NaN
        where unknown).
    label : (n,) int8, optional
        Simulator ground-truth label of each reading (see `LABELS`).

    Notes
    -----
    Arrays are converted to float64 (int8 for labels) on construction; a value that
    cannot be converted, or lengths that differ, raise `InputError`.
    """

    name: str
    kind: str
    output: str
    t_s: np.ndarray
    raw: np.ndarray
    ping_t_s: np.ndarray | None = None
    label: np.ndarray | None = None

    def __post_init__(self):
        problem = _name_problem(self.name)
        if problem:
            raise InputError(problem, field="sensor name")
        if self.kind not in KINDS:
            raise InputError(f"kind must be one of {', '.join(KINDS)}, got {self.kind!r}",
                             field=f"{self.name}.kind")
        if self.output not in OUTPUTS:
            raise InputError(f"output must be one of {', '.join(OUTPUTS)}, got {self.output!r}",
                             field=f"{self.name}.output")
        t_s = _float_array(self.t_s, "t_s", self.name)
        n = t_s.shape[0]
        if self.output == "serial":
            raw = _text_array(self.raw, self.name)
        else:
            raw = _float_array(self.raw, "raw", self.name)
        if raw.shape[0] != n:
            raise InputError(f"raw has {raw.shape[0]} values but t_s has {n}",
                             field=f"{self.name}.raw")
        ping = self.ping_t_s
        if ping is not None:
            if self.kind != "echo":
                raise InputError("ping times belong to echo rangers only", field=f"{self.name}.ping_t_s")
            ping = _float_array(ping, "ping_t_s", self.name)
            if ping.shape[0] != n:
                raise InputError(f"ping_t_s has {ping.shape[0]} values but t_s has {n}",
                                 field=f"{self.name}.ping_t_s")
        label = self.label
        if label is not None:
            lab = np.asarray(label)
            if lab.ndim != 1 or lab.shape[0] != n:
                raise InputError(f"label must be a 1-D array of {n} values", field=f"{self.name}.label")
            if lab.size and (lab.dtype.kind not in "iu" or lab.min() < 0 or lab.max() >= len(LABELS)):
                raise InputError(f"labels must be integers 0..{len(LABELS) - 1} ({LABEL_LEGEND})",
                                 field=f"{self.name}.label")
            label = lab.astype(np.int8)
        object.__setattr__(self, "t_s", t_s)
        object.__setattr__(self, "raw", raw)
        object.__setattr__(self, "ping_t_s", ping)
        object.__setattr__(self, "label", label)

    def __len__(self) -> int:
        return int(self.t_s.shape[0])

    @property
    def units(self) -> str:
        """Unit of ``raw``."""
        return RAW_UNITS[self.output]


@dataclass(frozen=True)
class SensorInfo:
    """What a log holds for one sensor, without its data."""

    name: str
    kind: str
    output: str
    n: int
    units: str
    has_ping: bool
    has_label: bool


@dataclass(frozen=True)
class EnvironmentInfo:
    """What a log holds for one environment stream, without its data."""

    name: str
    quantity: str
    units: str
    n: int


# --------------------------------------------------------------------------------------
# Writing
# --------------------------------------------------------------------------------------
def _chunk_rows(n: int, row_bytes: int = 8) -> int:
    return max(1, min(n, CHUNK_ROWS, _CHUNK_BYTES // max(1, row_bytes)))


def _put(group, name: str, data: np.ndarray, units: str | None, **attrs):
    n = data.shape[0]
    if data.dtype == object:
        # Fixed-length UTF-8: HDF5 refuses the checksum filter on variable-length strings
        # (and their heap would sit outside it), so text frames are stored padded, in chunks
        # the checksum covers.
        encoded = [s.encode("utf-8") for s in data]
        width = max([1] + [len(b) for b in encoded])
        dtype = h5py.string_dtype("utf-8", width)
        data = np.array(encoded, dtype=dtype) if n else np.zeros(0, dtype=dtype)
        chunks = _chunk_rows(n, width)
    else:
        chunks = _chunk_rows(n, data.dtype.itemsize)
    ds = group.create_dataset(name, data=data, chunks=(chunks,), maxshape=(None,),
                              track_times=False, **_FILTERS)
    if units is not None:
        ds.attrs["units"] = units
    for key, value in attrs.items():
        ds.attrs[key] = value
    return ds


def _pairs(mapping, what: str, ncols: int):
    """Validate a dict of name -> tuple of arrays; returns sorted [(name, tuple)]."""
    out = []
    if mapping is None:
        return out
    if not isinstance(mapping, dict):
        raise InputError(f"{what} must be a dict of name -> tuple", field=what)
    for name in sorted(mapping):
        problem = _name_problem(name)
        if problem:
            raise InputError(problem, field=f"{what} name")
        value = mapping[name]
        if not isinstance(value, (tuple, list)) or len(value) != ncols:
            raise InputError(f"expected a tuple of {ncols} items", field=f"{what}.{name}")
        out.append((name, value))
    return out


def write_log(path, rig_toml: str, sensors, environment=None, truth=None, clock: str = "",
              writer: str | None = None, created_utc: str | None = None, inputs=None) -> None:
    """Write a log file (format version 1) atomically.

    Parameters
    ----------
    path : str or path-like
        Output file. Written to a temporary file in the same directory, then renamed over
        ``path``; on any error the temporary file is removed and ``path`` is untouched.
    rig_toml : str
        The rig description (TOML text) the log was recorded with.
    sensors : list of SensorStream, or dict of name -> SensorStream
        One stream per sensor (an empty stream is allowed).
    environment : dict of name -> (quantity, t_s, value), optional
        Environment streams; ``quantity`` is ``"air_temperature"`` (degC) or
        ``"relative_humidity"`` (fraction 0..1).
    truth : dict of direction -> (t_s, range_m), optional
        Ground-truth range per rig direction.
    clock : str
        What t = 0 means (free text, e.g. "seconds since power-up of the logger").
    writer : str, optional
        Program that wrote the file (default ``"rangefuse <version>"``).
    created_utc : str, optional
        ISO 8601 creation time. Default: now (UTC, whole seconds). Pass a fixed value to
        make the file reproducible: equal inputs then give identical bytes.
    inputs : list of path-like, optional
        Files the content was read from; writing over one of them raises `InputError`.

    Raises
    ------
    InputError
        Bad arrays, names, quantities or rig text, or ``path`` is one of ``inputs``.
    """
    path = os.fspath(path)
    refuse_overwrite(path, inputs)
    if not isinstance(rig_toml, str):
        raise InputError("the rig description must be TOML text (str)", field="rig")
    if "\x00" in rig_toml:
        raise InputError("the rig text contains a NUL character", field="rig")
    try:
        _tomllib.loads(rig_toml)
    except _tomllib.TOMLDecodeError as exc:
        raise InputError(f"the rig description is not valid TOML: {exc}", field="rig") from None

    if isinstance(sensors, dict):
        for key, stream in sensors.items():
            if not isinstance(stream, SensorStream) or stream.name != key:
                raise InputError("sensors dict must map each name to a SensorStream of that name",
                                 field=f"sensors.{key}")
        streams = list(sensors.values())
    else:
        streams = list(sensors)
    seen = set()
    for s in streams:
        if not isinstance(s, SensorStream):
            raise InputError(f"expected SensorStream, got {type(s).__name__}", field="sensors")
        if s.name in seen:
            raise InputError(f"sensor {s.name!r} given twice", field="sensors")
        seen.add(s.name)
    streams.sort(key=lambda s: s.name)

    env = []
    for name, (quantity, t_s, value) in _pairs(environment, "environment", 3):
        if quantity not in QUANTITY_UNITS:
            raise InputError(f"quantity must be one of {', '.join(QUANTITIES)}, got {quantity!r}",
                             field=f"environment.{name}")
        t = _float_array(t_s, "t_s", f"environment.{name}")
        v = _float_array(value, "value", f"environment.{name}")
        if t.shape != v.shape:
            raise InputError(f"value has {v.shape[0]} samples but t_s has {t.shape[0]}",
                             field=f"environment.{name}.value")
        env.append((name, quantity, t, v))
    tru = []
    for name, (t_s, range_m) in _pairs(truth, "truth", 2):
        t = _float_array(t_s, "t_s", f"truth.{name}")
        r = _float_array(range_m, "range_m", f"truth.{name}")
        if t.shape != r.shape:
            raise InputError(f"range_m has {r.shape[0]} values but t_s has {t.shape[0]}",
                             field=f"truth.{name}.range_m")
        tru.append((name, t, r))

    if created_utc is None:
        created_utc = _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat()
    try:
        _dt.datetime.fromisoformat(str(created_utc))
    except ValueError:
        raise InputError(f"created_utc must be an ISO 8601 time, got {created_utc!r}",
                         field="created_utc") from None
    writer = f"rangefuse {__version__}" if writer is None else str(writer)

    with atomic_output(path, inputs) as tmp:
        with h5py.File(tmp, "w", libver=LIBVER) as f:
            _write_layout(f, rig_toml, streams, env, tru, clock, writer, created_utc)
        fd = os.open(tmp, os.O_RDONLY)
        try:
            os.fsync(fd)  # the rename must not reach the disk before the data
        finally:
            os.close(fd)


def _write_layout(f, rig_toml, streams, env, tru, clock, writer, created_utc) -> None:
    f.attrs["format"] = FORMAT
    f.attrs["format_version"] = np.int64(FORMAT_VERSION)
    f.attrs["created_utc"] = str(created_utc)
    f.attrs["writer"] = writer
    f.attrs["clock"] = str(clock)
    rig = f.create_dataset("rig", data=rig_toml, dtype=h5py.string_dtype("utf-8"),
                           track_times=False)
    # HDF5 cannot filter a scalar dataset; a digest guards the rig text instead.
    rig.attrs["sha256"] = hashlib.sha256(rig_toml.encode("utf-8")).hexdigest()
    g_s = f.create_group("sensors")
    for s in streams:
        g = g_s.create_group(s.name)
        g.attrs["kind"] = s.kind
        g.attrs["output"] = s.output
        _put(g, "t_s", s.t_s, "s")
        _put(g, "raw", s.raw, s.units)
        if s.ping_t_s is not None:
            _put(g, "ping_t_s", s.ping_t_s, "s")
        if s.label is not None:
            _put(g, "label", s.label, "1", legend=LABEL_LEGEND)
    g_e = f.create_group("environment")
    for name, quantity, t, v in env:
        g = g_e.create_group(name)
        g.attrs["quantity"] = quantity
        g.attrs["units"] = QUANTITY_UNITS[quantity]
        _put(g, "t_s", t, "s")
        _put(g, "value", v, QUANTITY_UNITS[quantity])
    if tru:
        g_t = f.create_group("truth")
        for name, t, r in tru:
            g = g_t.create_group(name)
            _put(g, "t_s", t, "s")
            _put(g, "range_m", r, "m")


# --------------------------------------------------------------------------------------
# Reading
# --------------------------------------------------------------------------------------
def _bad_rows(ds, start, stop) -> tuple:
    """First and last row of the first chunk of ``ds[start:stop]`` that cannot be read
    (the rows a damaged chunk holds, within the dataset); the whole span read when no
    single chunk fails on its own."""
    n = ds.shape[0] if ds.shape else 0
    start, stop, _ = slice(start, stop).indices(n)
    size = ds.chunks[0] if ds.chunks else max(stop - start, 1)
    for lo in range(start - start % size, stop, size):
        hi = min(lo + size, n)
        try:
            ds[lo:hi]
        except (OSError, RuntimeError):
            return lo, hi - 1
    return start, max(start, stop - 1)


def _hdf5_reason(exc: BaseException) -> str:
    """The innermost reason of an h5py error ("file signature not found"), else its text."""
    text = str(exc)
    m = re.search(r"\(([^()]*)\)\s*$", text)
    return m.group(1) if m else text


def hdf5_open_problem(exc: BaseException) -> str:
    """What a failure to open a file as HDF5 means, in words (no library internals)."""
    reason = _hdf5_reason(exc)
    if "signature" in reason:
        return "not an HDF5 file"
    if "truncated" in reason:
        m = re.search(r"eof = (\d+).*stored_eof = (\d+)", reason)
        got = f": {int(m.group(1)):,} of {int(m.group(2)):,} bytes present" if m else ""
        return f"the file is truncated{got} (it was not written to the end)"
    return f"cannot open as HDF5 ({reason}); the file is corrupt"


def open_log(path) -> "LogFile":
    """Open a log for reading (same as ``LogFile(path)``); use it as a context manager."""
    return LogFile(path)


class LogFile:
    """A log opened for reading.

    Opening checks the layout, attributes, dtypes, shapes and units of everything the
    format defines, without reading bulk data; a file that does not conform raises
    `LogFormatError` naming the dataset. Data is read on request, in slices.

    Attributes
    ----------
    path : str
    format_version : int
    created_utc, writer, clock : str
        Root attributes.
    rig_toml : str
        The embedded rig description.
    sensors : dict of str -> SensorInfo
    environments : dict of str -> EnvironmentInfo
    environment_names : tuple of str
    truth_directions : tuple of str
    truth_rows : dict of str -> int
        Number of truth samples per direction.

    Examples
    --------
    >>> with LogFile("run.h5") as log:                       # doctest: +SKIP
    ...     for window in log.iter_windows(10.0):
    ...         for name, stream in window.items():
    ...             print(name, len(stream))
    """

    def __init__(self, path):
        self.path = os.fspath(path)
        self._f = None
        try:
            self._f = h5py.File(self.path, "r")
            self._open = {}
        except FileNotFoundError:
            raise InputError("no such file", file=self.path) from None
        except IsADirectoryError:
            raise InputError("is a directory, expected a log file", file=self.path) from None
        except PermissionError:
            raise InputError("permission denied", file=self.path) from None
        except OSError as exc:
            raise LogFormatError(f"{hdf5_open_problem(exc)}; expected a rangefuse log",
                                 file=self.path) from None
        try:
            self._load_layout()
        except LogFormatError:
            self.close()
            raise
        except (OSError, RuntimeError, KeyError, ValueError, TypeError) as exc:
            self.close()
            raise LogFormatError(f"cannot read the file's layout ({_hdf5_reason(exc)}) — the "
                                 "file is corrupt", file=self.path) from None
        self._span = None

    # --- context manager ---------------------------------------------------------
    def close(self) -> None:
        if self._f is not None:
            self._open = {}
            self._f.close()
            self._f = None

    def __enter__(self) -> "LogFile":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        return (f"LogFile({self.path!r}, format_version={self.format_version}, "
                f"sensors={list(self.sensors)})")

    # --- layout ------------------------------------------------------------------
    def _err(self, msg: str, field: str | None = None, row: int | None = None) -> LogFormatError:
        return LogFormatError(msg, file=self.path, field=field, row=row)

    def _attr_str(self, obj, key: str, where: str, expected: str) -> str:
        if key not in obj.attrs:
            raise self._err(f"missing attribute {key!r}; expected {expected}", where)
        value = obj.attrs[key]
        if isinstance(value, np.ndarray) and value.shape == ():
            value = value[()]
        if isinstance(value, (bytes, np.bytes_)):
            try:
                value = bytes(value).decode("utf-8")
            except UnicodeDecodeError:
                raise self._err(f"attribute {key!r} is not UTF-8 text", where) from None
        if not isinstance(value, str):
            raise self._err(f"attribute {key!r} must be a string; expected {expected}", where)
        return value

    def _group(self, parent, key: str, where: str):
        obj = parent.get(key)
        if obj is None:
            raise self._err(f"missing group; expected {where}", where)
        if not isinstance(obj, h5py.Group):
            raise self._err("expected a group, found a dataset", where)
        return obj

    def _column(self, group, key: str, where: str, kind: str, units: str | None, n=None):
        """Check a 1-D dataset: its dtype class, length and units attribute."""
        field = f"{where}/{key}"
        ds = group.get(key)
        if ds is None:
            raise self._err("missing dataset", field)
        if not isinstance(ds, h5py.Dataset):
            raise self._err("expected a dataset, found a group", field)
        if ds.ndim != 1:
            raise self._err(f"expected a 1-D dataset, got shape {ds.shape}", field)
        dt = ds.dtype
        if kind == "f8":
            ok = dt.kind == "f" and dt.itemsize == 8
            want = "float64"
        elif kind == "i1":
            ok = dt.kind == "i" and dt.itemsize == 1
            want = "int8"
        else:
            info = h5py.check_string_dtype(dt)
            ok = info is not None and info.encoding == "utf-8"
            want = "UTF-8 strings"
        if not ok:
            raise self._err(f"expected {want}, got dtype {dt}", field)
        if n is not None and ds.shape[0] != n:
            raise self._err(f"has {ds.shape[0]} rows but {where}/t_s has {n}; expected equal "
                            "lengths", field)
        if units is not None:
            got = self._attr_str(ds, "units", field, f"units={units!r}")
            if got != units:
                raise self._err(f"units attribute is {got!r}; expected {units!r}", field)
        return ds

    def _load_layout(self) -> None:
        f = self._f
        if "format" not in f.attrs:
            raise self._err(f"not a rangefuse log (no 'format' attribute; expected "
                            f"format={FORMAT!r})", "/")
        fmt = self._attr_str(f, "format", "/", repr(FORMAT))
        if fmt != FORMAT:
            raise self._err(f"not a rangefuse log (format={fmt!r}; expected {FORMAT!r})", "/")
        if "format_version" not in f.attrs:
            raise self._err("missing attribute 'format_version'; expected an integer", "/")
        version = f.attrs["format_version"]
        if isinstance(version, np.ndarray) and version.size == 1:
            version = version.reshape(())[()]
        if not isinstance(version, (int, np.integer)) or isinstance(version, bool):
            raise self._err(f"format_version must be an integer, got {version!r}", "/")
        version = int(version)
        if version > FORMAT_VERSION:
            raise self._err(f"written by a newer rangefuse: format_version {version}, this reader "
                            f"knows {FORMAT_VERSION}; upgrade rangefuse to read it", "/")
        if version < 1:
            raise self._err(f"format_version must be >= 1, got {version}", "/")
        self.format_version = version
        self.created_utc = self._attr_str(f, "created_utc", "/", "an ISO 8601 time")
        self.writer = self._attr_str(f, "writer", "/", "the writing program's name")
        self.clock = self._attr_str(f, "clock", "/", "what t = 0 means (may be empty)")

        rig = f.get("rig")
        if not isinstance(rig, h5py.Dataset):
            raise self._err("missing dataset; expected the rig TOML text", "/rig")
        info = h5py.check_string_dtype(rig.dtype)
        if info is None or rig.shape != ():
            raise self._err("expected a scalar UTF-8 string (the rig TOML)", "/rig")
        try:
            text = rig[()]
        except OSError as exc:
            raise self._err(f"cannot read ({_hdf5_reason(exc)}) — the file is corrupt", "/rig") from None
        if isinstance(text, (bytes, np.bytes_)):
            try:
                text = bytes(text).decode("utf-8")
            except UnicodeDecodeError:
                raise self._err("rig text is not UTF-8 — the file is corrupt", "/rig") from None
        if "sha256" in rig.attrs:
            digest = self._attr_str(rig, "sha256", "/rig", "hex SHA-256 of the text")
            if hashlib.sha256(text.encode("utf-8")).hexdigest() != digest.lower():
                raise self._err("checksum failed — the file is corrupt (rig text does not match "
                                "its sha256 attribute)", "/rig")
        self.rig_toml = text

        sensors = {}
        g_s = self._group(f, "sensors", "/sensors")
        for name in g_s:
            where = f"/sensors/{name}"
            g = self._group(g_s, name, where)
            kind = self._attr_str(g, "kind", where, " or ".join(KINDS))
            if kind not in KINDS:
                raise self._err(f"kind is {kind!r}; expected one of {', '.join(KINDS)}", where)
            output = self._attr_str(g, "output", where, " or ".join(OUTPUTS))
            if output not in OUTPUTS:
                raise self._err(f"output is {output!r}; expected one of {', '.join(OUTPUTS)}", where)
            n = self._column(g, "t_s", where, "f8", "s").shape[0]
            self._column(g, "raw", where, "str" if output == "serial" else "f8",
                         RAW_UNITS[output], n)
            has_ping = "ping_t_s" in g
            if has_ping:
                self._column(g, "ping_t_s", where, "f8", "s", n)
            has_label = "label" in g
            if has_label:
                self._column(g, "label", where, "i1", None, n)
            sensors[name] = SensorInfo(name, kind, output, n, RAW_UNITS[output], has_ping, has_label)
        self.sensors = sensors

        envs = {}
        g_e = self._group(f, "environment", "/environment")
        for name in g_e:
            where = f"/environment/{name}"
            g = self._group(g_e, name, where)
            quantity = self._attr_str(g, "quantity", where, " or ".join(QUANTITIES))
            if quantity not in QUANTITY_UNITS:
                raise self._err(f"quantity is {quantity!r}; expected one of "
                                f"{', '.join(QUANTITIES)}", where)
            units = QUANTITY_UNITS[quantity]
            got = self._attr_str(g, "units", where, repr(units))
            if got != units:
                raise self._err(f"units attribute is {got!r}; expected {units!r} for {quantity}", where)
            n = self._column(g, "t_s", where, "f8", "s").shape[0]
            self._column(g, "value", where, "f8", units, n)
            envs[name] = EnvironmentInfo(name, quantity, units, n)
        self.environments = envs
        self.environment_names = tuple(envs)

        dirs = {}
        if "truth" in f:
            g_t = self._group(f, "truth", "/truth")
            for name in g_t:
                where = f"/truth/{name}"
                g = self._group(g_t, name, where)
                n = self._column(g, "t_s", where, "f8", "s").shape[0]
                self._column(g, "range_m", where, "f8", "m", n)
                dirs[name] = n
        self.truth_rows = dirs
        self.truth_directions = tuple(dirs)

    # --- data --------------------------------------------------------------------
    def _read(self, field: str, start: int = 0, stop: int | None = None, text: bool = False):
        if self._f is None:
            raise InputError("the log is closed", file=self.path)
        # Keep each dataset open: HDF5's chunk cache lives with the open dataset, so
        # reopening it per read would decompress the same chunk again for every window.
        ds = self._open.get(field)
        if ds is None:
            try:
                ds = self._open[field] = self._f[field]
            except (KeyError, OSError, RuntimeError, ValueError) as exc:
                # It was there when the layout was checked: its header is damaged.
                raise self._err(f"cannot open the dataset ({_hdf5_reason(exc)}) — the file is "
                                "corrupt", field, start) from None
        try:
            if text:
                return np.asarray(ds.asstr()[start:stop], dtype=object)
            data = np.asarray(ds[start:stop])
            # Native float64 whatever byte order the writer used (compiled kernels need it).
            return data.astype(np.float64, copy=False) if data.dtype.kind == "f" else data
        except UnicodeDecodeError:
            raise self._err("text is not valid UTF-8 — the file is corrupt", field, start) from None
        except (OSError, RuntimeError) as exc:
            reason = _hdf5_reason(exc)
            if "filter" in reason or "checksum" in reason or "Fletcher" in reason:
                msg = "checksum failed — the file is corrupt"
            else:
                msg = "cannot read the data — the file is corrupt or truncated"
            first, last = _bad_rows(ds, start, stop)
            raise self._err(f"{msg} (rows {first}..{last}; HDF5: {reason})", field,
                            first) from None

    def unprotected_datasets(self) -> list:
        """Paths of 1-D datasets stored without the Fletcher-32 checksum filter (whose
        corruption would go unnoticed)."""
        out = []

        def visit(name, obj):
            if isinstance(obj, h5py.Dataset) and obj.ndim == 1 and not obj.fletcher32:
                out.append("/" + name)

        self._f.visititems(visit)
        return sorted(out)

    def _sensor_info(self, name: str) -> SensorInfo:
        info = self.sensors.get(name)
        if info is None:
            raise InputError(f"no sensor {name!r} in this log; it has "
                             f"{', '.join(self.sensors) or 'none'}", file=self.path,
                             field=f"/sensors/{name}")
        return info

    def read_sensor(self, name: str, start: int = 0, stop: int | None = None) -> SensorStream:
        """Readings ``start:stop`` (row indices, Python slice rules) of one sensor."""
        info = self._sensor_info(name)
        start, stop, _ = slice(start, stop).indices(info.n)
        stop = max(start, stop)
        where = f"/sensors/{name}"
        t_s = self._read(f"{where}/t_s", start, stop)
        raw = self._read(f"{where}/raw", start, stop, text=info.output == "serial")
        ping = self._read(f"{where}/ping_t_s", start, stop) if info.has_ping else None
        label = self._read(f"{where}/label", start, stop) if info.has_label else None
        return SensorStream(name, info.kind, info.output, t_s, raw, ping, label)

    def read_times(self, name: str, start: int = 0, stop: int | None = None) -> np.ndarray:
        """Only the ``t_s`` of readings ``start:stop`` of one sensor."""
        info = self._sensor_info(name)
        start, stop, _ = slice(start, stop).indices(info.n)
        return self._read(f"/sensors/{name}/t_s", start, max(start, stop))

    def blocks(self, name: str, rows: int = CHUNK_ROWS):
        """Yield ``(start_row, SensorStream)`` for consecutive blocks of ``rows`` readings."""
        n = self._sensor_info(name).n
        rows = max(1, int(rows))
        for start in range(0, n, rows):
            yield start, self.read_sensor(name, start, min(n, start + rows))

    def environment(self, name: str):
        """``(t_s, value)`` of an environment stream."""
        if name not in self.environments:
            raise InputError(f"no environment stream {name!r} in this log; it has "
                             f"{', '.join(self.environments) or 'none'}", file=self.path,
                             field=f"/environment/{name}")
        where = f"/environment/{name}"
        return self._read(f"{where}/t_s"), self._read(f"{where}/value")

    def environment_for(self, rig) -> dict:
        """The streams `rig` reads its air from, as `fusion.Fuser.prepare` takes them:
        ``{"air": (t_s, temp_c), "humidity": (t_s, rh)}``, each only if the log has it."""
        env = {}
        for key, stream in (("air", rig.air.stream), ("humidity", rig.air.humidity_stream)):
            if stream and stream in self.environments:
                env[key] = self.environment(stream)
        return env

    def readings(self) -> dict:
        """Every reading of every sensor, as `fusion.Fuser.prepare` takes them:
        ``{name: (t_s, raw, ping_t_s)}`` (the whole log in memory; replay reads windows)."""
        out = {}
        for name in self.sensors:
            s = self.read_sensor(name)
            out[name] = (s.t_s, s.raw, s.ping_t_s)
        return out

    def read_dataset(self, field: str, start: int = 0, stop: int | None = None) -> np.ndarray:
        """Rows ``start:stop`` of any 1-D dataset by its path (e.g. ``"/truth/front/t_s"``)."""
        ds = None if self._f is None else self._f.get(field)
        if not isinstance(ds, h5py.Dataset) or ds.ndim != 1:
            raise InputError("no such 1-D dataset in this log", file=self.path, field=field)
        info = h5py.check_string_dtype(self._f[field].dtype)
        return self._read(field, start, stop, text=info is not None)

    def truth(self, direction: str):
        """``(t_s, range_m)`` of the ground truth for a direction, or None if the log has none."""
        if direction not in self.truth_directions:
            return None
        where = f"/truth/{direction}"
        return self._read(f"{where}/t_s"), self._read(f"{where}/range_m")

    def time_span(self):
        """``(t0, t1)``: earliest and latest finite reading time over all sensors.

        Reads every ``t_s`` once, in blocks; ``(nan, nan)`` if the log has no finite
        reading time.
        """
        if self._span is None:
            lo, hi = math.inf, -math.inf
            for name, info in self.sensors.items():
                for start in range(0, info.n, _SCAN_ROWS):
                    t = self._read(f"/sensors/{name}/t_s", start, start + _SCAN_ROWS)
                    t = t[np.isfinite(t)]
                    if t.size:
                        lo, hi = min(lo, float(t.min())), max(hi, float(t.max()))
            self._span = (lo, hi) if lo <= hi else (math.nan, math.nan)
        return self._span

    def iter_windows(self, window_s: float = 10.0, sensors=None, max_rows: int = 1_000_000):
        """Yield the readings window by window, reading only a window at a time.

        Windows are ``[k w, (k+1) w)`` on the log's clock (``w = window_s``, ``k`` an
        integer); windows with no readings are skipped. Each yielded item is a dict
        name -> `SensorStream` holding, for each sensor with readings in the window, a
        contiguous block of its rows.

        Every row is delivered exactly once and each sensor's rows come in row order.
        For a sensor whose ``t_s`` is non-decreasing the block is exactly its readings
        with ``t_s`` in the window. Otherwise a sensor's block runs from where the last
        one ended up to the first row whose ``t_s`` reaches the window's end: a reading
        whose time went backwards, or is NaN, rides in the window of the rows around
        it, and the consumer (the estimator) decides about it. A forward jump holds that
        sensor's later rows back until the windows reach the jump.

        Parameters
        ----------
        window_s : float
            Window length, seconds (> 0).
        sensors : iterable of str, optional
            Sensors to deliver (default all).
        max_rows : int
            Memory bound: when a sensor has more readings than this in a window, the
            window is cut short at the time of its first reading beyond the bound and
            the rest follows in the next dict (so pieces still come in time order). With
            times out of order a cut may not help; then up to ``max_rows`` rows of the
            sensors holding the window up are delivered alone.

        Yields
        ------
        dict of str -> SensorStream
        """
        w = float(window_s)
        if not (math.isfinite(w) and w > 0):
            raise InputError(f"window_s must be a positive number of seconds, got {window_s!r}",
                             field="window_s")
        max_rows = int(max_rows)
        if max_rows < 1:
            raise InputError("max_rows must be >= 1", field="max_rows")
        names = list(self.sensors) if sensors is None else list(sensors)
        cursors = [_Cursor(self, name, self._sensor_info(name).n) for name in names]
        cursors = [c for c in cursors if c.n]
        if not cursors:
            return
        k = _window_index(_next_time(cursors), w)
        while cursors:
            end = (k + 1) * w
            nt = _next_time(cursors)
            if math.isfinite(nt) and not end > nt:
                # Past 2**53 windows the float grid is coarser than w: make progress anyway.
                end = math.nextafter(nt, math.inf)
            # A sensor with more than max_rows readings before `end` cuts the window short,
            # at the time of its first row beyond the limit: pieces stay in time order.
            cut = end
            for c in cursors:
                stop, found = c.scan(cut, max_rows)
                if not found and stop < c.n:
                    t_stop = c.time_at(stop)
                    if math.isfinite(t_stop):
                        cut = min(cut, t_stop)
            piece = {}
            for c in cursors:
                stop, _ = c.scan(cut, max_rows)
                if stop > c.pos:
                    piece[c.name] = self.read_sensor(c.name, c.pos, stop)
                    c.pos = stop
            if not piece:
                # Times out of order (or many equal times) defeat the cut: fall back to
                # delivering max_rows rows of the sensors that hold the window up.
                for c in cursors:
                    stop, found = c.scan(end, max_rows)
                    if not found and stop > c.pos:
                        piece[c.name] = self.read_sensor(c.name, c.pos, stop)
                        c.pos = stop
            if piece:
                yield piece
            cursors = [c for c in cursors if c.pos < c.n]
            if not cursors:
                break
            if cut < end or any(not c.scan(end, 1)[1] for c in cursors):
                continue  # rows of this window remain
            k = max(k + 1, _window_index(_next_time(cursors), w))


def _window_index(t: float, w: float) -> int:
    return int(math.floor(t / w)) if math.isfinite(t) else 0


def _next_time(cursors) -> float:
    """Earliest finite time at any cursor (NaN rows ride along with the next window)."""
    ts = [c.time_at(c.pos) for c in cursors]
    ts = [t for t in ts if math.isfinite(t)]
    return min(ts) if ts else math.nan


class _Cursor:
    """Position in one sensor's rows, with a buffered slice of its t_s for scanning."""

    def __init__(self, log: LogFile, name: str, n: int):
        self.log, self.name, self.n = log, name, n
        self.field = f"/sensors/{name}/t_s"
        self.pos = 0
        self._lo = 0
        self._buf = np.zeros(0)

    def _load(self, row: int) -> None:
        self._lo = row
        self._buf = self.log._read(self.field, row, min(self.n, row + _SCAN_ROWS))

    def time_at(self, row: int) -> float:
        if not self._lo <= row < self._lo + self._buf.size:
            self._load(row)
        return float(self._buf[row - self._lo])

    def scan(self, end: float, limit: int):
        """First row >= pos whose t_s >= end, searching at most `limit` rows.

        Returns ``(stop, found)``: ``found`` is False when the search stopped at the
        limit or at the last row without meeting such a row.
        """
        pos, lim = self.pos, min(self.n, self.pos + limit)
        while pos < lim:
            if not self._lo <= pos < self._lo + self._buf.size:
                self._load(pos)
            seg = self._buf[pos - self._lo: min(lim - self._lo, self._buf.size)]
            # +inf rides along like NaN; otherwise it would hold its sensor back forever
            hits = np.flatnonzero((seg >= end) & np.isfinite(seg))
            if hits.size:
                return pos + int(hits[0]), True
            pos += seg.size
        return lim, False
