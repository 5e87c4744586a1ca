"""Track files out to CSV, and the checked reader the figures share.

A track file (written by `replay.run.run`) holds, per replayed log, one decision row per
reading (``/decisions``), the fused track of each direction (``/track/<direction>``) and,
when the log carried it, ground truth (``/truth/<direction>``); several logs replayed
together sit under ``/runs/<i>/``. Names of sensors, directions, decisions and flags are
JSON lists/maps in the root attributes, so the file describes itself.

`track_to_csv` streams both tables to CSV in slices of `SLICE_ROWS` rows, so memory
stays flat in the length of the log, and writes each file atomically.

Examples
--------
>>> paths = track_to_csv("dock.track.h5")             # doctest: +SKIP
>>> paths                                             # doctest: +SKIP
['dock.track.csv', 'dock.decisions.csv']
"""
from __future__ import annotations

import csv
import json
import math
import os

import h5py
import numpy as np

from fusion import decisions as D
from fusion.errors import InputError, LogFormatError

from ._io import atomic_output, staged
from .logfile import _hdf5_reason, hdf5_open_problem

__all__ = ["track_to_csv", "csv_prefix", "TrackFile", "SLICE_ROWS", "DECISION_CSV_COLUMNS",
           "TRACK_CSV_ORDER"]

TRACK_FORMAT = "rangefuse-track"        # same value as replay.run.TRACK_FORMAT
SUPPORTED_VERSION = 1
SLICE_ROWS = 1 << 18                    # rows read per step (4 HDF5 chunks of the writer)

# Decision columns read from the file, and the CSV columns made from them.
# Every column of docs/track-format.md's decisions table, in its order.
_DECISION_READ = ("sensor", "row", "t_s", "direction", "decision", "flags", "innovation_m",
                  "nis", "branch", "branch_prob", "loglik", "z_far_m", "z_near_m",
                  "sigma_far_m", "sigma_near_m", "temp_c")
DECISION_CSV_COLUMNS = _DECISION_READ   # sensor, direction, decision and flags by name
# Track columns in the order a reader wants them (others follow in name order).
TRACK_CSV_ORDER = ("t_s", "range_m", "sigma_m", "rate_mps", "rate_sigma_mps",
                   "range_smoothed_m", "sigma_smoothed_m", "rate_smoothed_mps", "cov_rr_m2",
                   "cov_rv_m2ps", "cov_vv_m2ps2", "p_major", "n_hypotheses", "flags")


# --------------------------------------------------------------------------------------
# Reading a track file (shared with replay.plots)
# --------------------------------------------------------------------------------------
class TrackFile:
    """A track file opened for reading, its layout checked (no bulk data read).

    Parameters
    ----------
    path : str or path-like
        Track file written by `replay.run.run` (``rangefuse replay``).

    Raises
    ------
    InputError
        The file does not exist.
    LogFormatError
        The file is not a rangefuse track file, is of a newer format version, or lacks a
        group, dataset or attribute the format defines (the message names it).
    """

    def __init__(self, path):
        self.path = os.fspath(path)
        # a track file this command wrote is read where it waits to be put in place
        where = staged(self.path)
        if not os.path.exists(where):
            raise InputError("no such file; expected a track file written by "
                             "`rangefuse replay`", file=self.path)
        if os.path.isdir(where):
            raise InputError("is a folder; expected a track file", file=self.path)
        try:
            self.f = h5py.File(where, "r")
        except OSError as exc:
            raise LogFormatError(f"{hdf5_open_problem(exc)}; expected a track file written by "
                                 "`rangefuse replay`", file=self.path) from None
        try:
            self._load()
        except BaseException:
            self.f.close()
            raise

    # --- context manager -----------------------------------------------------------
    def close(self) -> None:
        self.f.close()

    def __enter__(self) -> "TrackFile":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def error(self, message, field=None, row=None) -> LogFormatError:
        return LogFormatError(message, file=self.path, field=field, row=row)

    # --- layout --------------------------------------------------------------------
    def _attr(self, key):
        if key not in self.f.attrs:
            raise self.error("attribute missing; expected it in every track file", field=key)
        v = self.f.attrs[key]
        return v.decode("utf-8", "replace") if isinstance(v, bytes) else v

    def _json_attr(self, key, kind):
        text = self._attr(key)
        try:
            value = json.loads(str(text))
        except ValueError:
            raise self.error("expected a JSON string", field=key) from None
        if kind is list:
            if not (isinstance(value, list) and all(isinstance(x, str) for x in value)):
                raise self.error("expected a JSON list of names", field=key)
            return tuple(value)
        if not (isinstance(value, dict) and all(isinstance(v, str) for v in value.values())):
            raise self.error("expected a JSON object of bit -> name", field=key)
        try:
            return {int(k): v for k, v in value.items()}
        except ValueError:
            raise self.error("expected integer bit keys", field=key) from None

    def _load(self) -> None:
        fmt = self.f.attrs.get("format")
        fmt = fmt.decode() if isinstance(fmt, bytes) else fmt
        if fmt == "rangefuse-log":
            raise self.error("this is a log, not a track file; replay it first "
                             "(rangefuse replay LOG -o TRACK.h5)", field="format")
        if fmt != TRACK_FORMAT:
            raise self.error(f"expected format {TRACK_FORMAT!r}, found {fmt!r}; not a track "
                             "file written by `rangefuse replay`", field="format")
        version = self._attr("format_version")
        try:
            version = int(version)
        except (TypeError, ValueError):
            raise self.error("expected an integer", field="format_version") from None
        if version > SUPPORTED_VERSION or version < 1:
            raise self.error(f"format version {version} is not supported (this rangefuse reads "
                             f"version {SUPPORTED_VERSION}); upgrade rangefuse",
                             field="format_version")
        self.sensor_names = self._json_attr("sensor_names", list)
        self.direction_names = self._json_attr("direction_names", list)
        self.decision_names = self._json_attr("decision_names", list)
        self.flag_names = self._json_attr("flag_names", dict)
        self.track_flag_names = self._json_attr("track_flag_names", dict)
        fused = set(D.NAMES[:D.FIRST_REJECT])
        self.fused_code = np.array([n in fused for n in self.decision_names], bool)
        if "decisions" in self.f:
            self.runs = (self.f,)
        elif "runs" in self.f:
            keys = list(self.f["runs"].keys())
            if not keys or not all(k.isdigit() for k in keys):
                raise self.error("expected groups named 0, 1, ... (one per replayed log)",
                                 field="/runs")
            self.runs = tuple(self.f["runs"][k] for k in sorted(keys, key=int))
        else:
            raise self.error("group missing; expected /decisions (or /runs/<i>/decisions)",
                             field="/decisions")
        for g in self.runs:
            self.decisions(g)

    # --- parts ---------------------------------------------------------------------
    def run(self, index=None):
        """The group of replayed log `index` (default: the first)."""
        i = 0 if index is None else index
        if not isinstance(i, (int, np.integer)) or not 0 <= i < len(self.runs):
            raise InputError(f"run {index!r} does not exist; the track file holds "
                             f"{len(self.runs)} run(s), numbered 0..{len(self.runs) - 1}",
                             file=self.path, field="--run")
        return self.runs[int(i)]

    def log_name(self, group) -> str:
        log = group.attrs.get("log", "")
        log = log.decode() if isinstance(log, bytes) else str(log)
        return os.path.basename(log) if log else os.path.basename(self.path)

    def directions(self, direction=None) -> tuple:
        """Direction names to use: all, or the one asked for (checked)."""
        if direction is None:
            return self.direction_names
        if direction not in self.direction_names:
            raise InputError(f"unknown direction {direction!r}; the track has "
                             f"{', '.join(self.direction_names) or 'none'}", file=self.path,
                             field="--direction")
        return (direction,)

    def _columns(self, group, names, where, required=True) -> dict:
        out = {}
        n = None
        for name in names:
            if name not in group:
                if required:
                    raise self.error("dataset missing; expected it in every track file",
                                     field=f"{where}/{name}")
                continue
            ds = group[name]
            if not isinstance(ds, h5py.Dataset) or ds.ndim != 1:
                raise self.error("expected a 1-D dataset", field=ds.name)
            if n is None:
                n = ds.shape[0]
            elif ds.shape[0] != n:
                raise self.error(f"has {ds.shape[0]} rows but {names[0]} has {n}",
                                 field=ds.name)
            out[name] = ds
        return out

    def decisions(self, group) -> dict:
        """The decision datasets of one run, name -> dataset (lengths checked)."""
        if "decisions" not in group or not isinstance(group["decisions"], h5py.Group):
            raise self.error("group missing", field=f"{group.name.rstrip('/')}/decisions")
        g = group["decisions"]
        return self._columns(g, _DECISION_READ, g.name)

    def track_group(self, group, direction):
        where = f"{group.name.rstrip('/')}/track/{direction}"
        if where not in self.f or not isinstance(self.f[where], h5py.Group):
            raise self.error("group missing; expected one track group per direction",
                             field=where)
        return self.f[where]

    def track(self, group, direction, extra=()) -> dict:
        """Track datasets of one direction: t_s, range_m, sigma_m (required) and those of
        `extra` that are present (lengths checked)."""
        g = self.track_group(group, direction)
        cols = self._columns(g, ("t_s", "range_m", "sigma_m"), g.name)
        cols.update(self._columns(g, ("t_s",) + tuple(extra), g.name, required=False))
        return cols

    def truth(self, group, direction):
        """(t_s, range_m) datasets of the direction's ground truth, or None."""
        where = f"{group.name.rstrip('/')}/truth/{direction}"
        if where not in self.f:
            return None
        cols = self._columns(self.f[where], ("t_s", "range_m"), where)
        return cols["t_s"], cols["range_m"]

    def read(self, ds, start, stop) -> np.ndarray:
        """Rows ``start:stop`` of a dataset; a damaged chunk raises `LogFormatError`."""
        try:
            return ds[start:stop]
        except (OSError, ValueError) as exc:
            raise self.error(f"cannot read rows {start}..{stop - 1} ({_hdf5_reason(exc)}); "
                             "the file may be damaged", field=ds.name) from None

    def time_span(self, group):
        """``(first_s, last_s)``: the earliest and latest finite reading time of one run's
        decisions, or None when it has none."""
        t = self.decisions(group)["t_s"]
        lo, hi = np.inf, -np.inf
        for a, b in self.slices(t.shape[0]):
            v = self.read(t, a, b)
            v = v[np.isfinite(v)]
            if v.size:
                lo, hi = min(lo, float(v.min())), max(hi, float(v.max()))
        return (lo, hi) if lo <= hi else None

    def check_time_range(self, group, lo, hi) -> None:
        """Refuse a time range (``--from``/``--to``, seconds) that misses the run's
        readings altogether: it would draw an empty figure."""
        if math.isinf(lo) and math.isinf(hi):
            return
        span = self.time_span(group)
        if span is None:
            return
        if lo > span[1] or hi < span[0]:
            a = "start" if math.isinf(lo) else f"{lo:g} s"
            b = "end" if math.isinf(hi) else f"{hi:g} s"
            raise InputError(f"no reading between {a} and {b}; the track spans "
                             f"{span[0]:g} s to {span[1]:g} s", file=self.path,
                             field="--from" if lo > span[1] else "--to")

    def slices(self, n, rows=None):
        rows = SLICE_ROWS if rows is None else rows   # read at call time (tests shrink it)
        for start in range(0, n, rows):
            yield start, min(n, start + rows)


# --------------------------------------------------------------------------------------
# CSV
# --------------------------------------------------------------------------------------
_BRANCH_NAMES = {-1: "", 0: "far", 1: "near"}


def csv_prefix(track_path) -> str:
    """``dock.track.h5`` -> ``dock``; ``dock.h5`` -> ``dock``; other names are kept whole."""
    p = os.fspath(track_path)
    for suffix in (".track.h5", ".h5", ".hdf5"):
        if p.endswith(suffix) and len(p) > len(suffix):
            return p[: -len(suffix)]
    return p


def _fmt_float(a) -> list:
    # Shortest text that reads back to the same float64; NaN as an empty field.
    return ["" if x != x else repr(x) for x in np.asarray(a, np.float64).tolist()]


def _fmt_int(a) -> list:
    return [str(x) for x in np.asarray(a).tolist()]


def _lookup(names, codes, tf, ds, start, what, allow_minus_one=False):
    codes = np.asarray(codes, np.int64)
    bad = (codes < (-1 if allow_minus_one else 0)) | (codes >= len(names))
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise tf.error(f"{what} index {int(codes[i])} is outside the {len(names)} names in "
                       "the root attributes", field=ds.name, row=start + i)
    table = np.array(list(names) + [""], dtype=object)  # index -1 -> ""
    return table[codes].tolist()


def _flag_text(flags, names) -> list:
    out = np.empty(len(flags), dtype=object)
    flags = np.asarray(flags, np.int64)
    for value in np.unique(flags):
        parts = []
        v = int(value)
        bit = 1
        while v:
            if v & bit:
                parts.append(names.get(bit, f"bit{bit.bit_length() - 1}"))
                v &= ~bit
            bit <<= 1
        out[flags == value] = "|".join(parts)
    return out.tolist()


def track_to_csv(track_path, out_prefix=None) -> list:
    """Write a track file's fused tracks and decisions as two CSV files.

    Parameters
    ----------
    track_path : str or path-like
        Track file written by `replay.run.run`.
    out_prefix : str, optional
        Output path prefix; default the track path without ``.track.h5`` (or ``.h5``).

    Returns
    -------
    list of str
        ``[<prefix>.track.csv, <prefix>.decisions.csv]``.

    Notes
    -----
    ``<prefix>.track.csv`` has one row per fused reading of each direction: ``direction``
    and every column of ``/track/<direction>`` (the smoothed ones when the replay
    smoothed), ranges first; its ``flags`` are names joined by ``|`` as in the decisions.
    ``<prefix>.decisions.csv`` has one row per input reading: ``sensor`` (name),
    ``row``, ``t_s``, ``direction`` (name), ``decision`` (name), ``flags`` (names joined
    by ``|``), ``innovation_m``, ``nis``, ``branch`` (``far``, ``near`` or empty: the
    candidate fused; for a reading with one candidate, ``far``), ``branch_prob``,
    ``loglik``, ``z_far_m``, ``z_near_m``, ``sigma_far_m``, ``sigma_near_m``, ``temp_c``:
    every column of the decisions in docs/track-format.md, in its order. A file holding several
    replayed logs gets a leading ``run`` column in both. Missing values (NaN) are empty
    fields; floats are written with the shortest text that reads back exactly.
    Both files are written atomically (either both appear, or neither does), streaming
    `SLICE_ROWS` rows at a time.

    Raises
    ------
    InputError, LogFormatError
        Not a track file, a missing group or dataset, an output that is an input.
    """
    track_path = os.fspath(track_path)
    prefix = csv_prefix(track_path) if out_prefix is None else os.fspath(out_prefix)
    out_track = prefix + ".track.csv"
    out_dec = prefix + ".decisions.csv"
    with TrackFile(track_path) as tf:
        many = len(tf.runs) > 1
        plan = []  # (run index, group, direction, {name: dataset})
        columns = []
        for ri, g in enumerate(tf.runs):
            for d in tf.direction_names:
                grp = tf.track_group(g, d)
                names = [k for k in grp.keys() if isinstance(grp[k], h5py.Dataset)]
                rank = {k: i for i, k in enumerate(TRACK_CSV_ORDER)}
                names.sort(key=lambda k: (rank.get(k, len(rank)), k))
                cols = tf._columns(grp, ["t_s"] + [k for k in names if k != "t_s"],
                                   grp.name)
                plan.append((ri, d, cols))
                for k in cols:
                    if k not in columns:
                        columns.append(k)
        with atomic_output(out_track, inputs=[track_path]) as tmp_t, \
                atomic_output(out_dec, inputs=[track_path]) as tmp_d:
            with open(tmp_t, "w", newline="", encoding="utf-8") as fh:
                w = csv.writer(fh, lineterminator="\n")
                w.writerow((["run"] if many else []) + ["direction"] + columns)
                for ri, d, cols in plan:
                    n = cols["t_s"].shape[0]
                    for a, b in tf.slices(n):
                        m = b - a
                        out = []
                        if many:
                            out.append([str(ri)] * m)
                        out.append([d] * m)
                        for k in columns:
                            if k not in cols:
                                out.append([""] * m)
                                continue
                            v = tf.read(cols[k], a, b)
                            if k == "flags":
                                out.append(_flag_text(v, tf.track_flag_names))
                            elif v.dtype.kind == "f":
                                out.append(_fmt_float(v))
                            else:
                                out.append(_fmt_int(v))
                        w.writerows(zip(*out))
            with open(tmp_d, "w", newline="", encoding="utf-8") as fh:
                w = csv.writer(fh, lineterminator="\n")
                w.writerow((["run"] if many else []) + list(DECISION_CSV_COLUMNS))
                for ri, g in enumerate(tf.runs):
                    dec = tf.decisions(g)
                    n = dec["t_s"].shape[0]
                    for a, b in tf.slices(n):
                        out = [[str(ri)] * (b - a)] if many else []
                        for k in DECISION_CSV_COLUMNS:
                            v = tf.read(dec[k], a, b)
                            if k == "sensor":
                                out.append(_lookup(tf.sensor_names, v, tf, dec[k], a, "sensor"))
                            elif k == "direction":
                                out.append(_lookup(tf.direction_names, v, tf, dec[k], a,
                                                   "direction", allow_minus_one=True))
                            elif k == "decision":
                                out.append(_lookup(tf.decision_names, v, tf, dec[k], a,
                                                   "decision"))
                            elif k == "flags":
                                out.append(_flag_text(v, tf.flag_names))
                            elif k == "branch":
                                out.append([_BRANCH_NAMES.get(int(x), str(int(x))) for x in v])
                            elif v.dtype.kind == "f":
                                out.append(_fmt_float(v))
                            else:
                                out.append(_fmt_int(v))
                        w.writerows(zip(*out))
    return [out_track, out_dec]
