"""Batch replay: stream a log through the fusion core and write a track file.

The log is read window by window (`replay.logfile.LogFile.iter_windows`), each window
goes through `fusion.Fuser.process`, and the results are appended to an HDF5 track file
and folded into running diagnostics, so memory stays flat in the log's length.
"""
from __future__ import annotations

import collections
import functools
import json
import math
import os
import queue
import sys
import threading
import time
from dataclasses import dataclass, field

import h5py
import numpy as np

from fusion import decisions as D
from fusion.errors import InputError, LogFormatError, RangefuseError
from fusion.fuser import make_fuser  # noqa: F401 (make_fuser: replay's public name too)
from fusion.rig import Rig
from fusion.estimators.smoother import rts_smooth

from . import _window_stats as W
from . import metrics as M
from ._chunks import ChunkEncoding, fletcher32
from ._io import atomic_output, refuse_overwrite
from .logfile import LIBVER, open_log

__all__ = ["run", "ReplayResult", "TRACK_FORMAT", "TRACK_FORMAT_VERSION", "make_fuser",
           "load_rig", "register"]

TRACK_FORMAT = "rangefuse-track"
TRACK_FORMAT_VERSION = 1
# Every column carries the Fletcher-32 checksum. Columns that compress well (integers,
# times, probabilities, temperatures: 1-50 % of their size) are compressed with gzip
# level 1, which every HDF5 reader has; measured ranges, sigmas, innovations and
# covariances are noise in their low bits (gzip keeps 55-90 % of them) and are stored
# plain, which on the bench's one-hour log halves the replay's time for 60 % more bytes.
_FILTERS = dict(compression="gzip", compression_opts=1, shuffle=True, fletcher32=True)
_PLAIN = dict(fletcher32=True)
_WINDOW_ROWS = 32768  # readings per replay window when the window is chosen automatically
_CHUNK = 16384  # rows per chunk of a track column (128 KiB of float64)

# track flags
TRACK_MULTIMODAL = 1
TRACK_REACQUIRED = 2
TRACK_TEMP_FALLBACK = 4

_DECISION_COLS = [  # name, dtype, units, compressed
    ("sensor", np.int16, "", True), ("row", np.int64, "", True), ("t_s", np.float64, "s", True),
    ("direction", np.int8, "", True), ("decision", np.int8, "", True),
    ("flags", np.int16, "", True), ("innovation_m", np.float64, "m", False),
    ("nis", np.float64, "1", False), ("branch", np.int8, "", True),
    ("branch_prob", np.float64, "1", True), ("loglik", np.float64, "1", False),
    ("z_far_m", np.float64, "m", False), ("z_near_m", np.float64, "m", False),
    ("sigma_far_m", np.float64, "m", False), ("sigma_near_m", np.float64, "m", False),
    ("temp_c", np.float64, "degC", True)]
_TRACK_COLS = [("t_s", np.float64, "s", True), ("range_m", np.float64, "m", False),
               ("sigma_m", np.float64, "m", False), ("rate_mps", np.float64, "m/s", False),
               ("rate_sigma_mps", np.float64, "m/s", False),
               ("cov_rr_m2", np.float64, "m2", False), ("cov_rv_m2ps", np.float64, "m2/s", False),
               ("cov_vv_m2ps2", np.float64, "m2/s2", False), ("p_major", np.float64, "1", True),
               ("n_hypotheses", np.int8, "", True), ("flags", np.int8, "", True)]


def load_rig(rig) -> Rig | None:
    if rig is None or isinstance(rig, Rig):
        return rig
    return Rig.load(rig)


class _Column:
    """A dataset the `_ChunkWriter` writes, with its encoding and its rows so far."""

    def __init__(self, ds):
        self.ds = ds
        self.encoding = ChunkEncoding.of(ds)
        self.rows = ds.shape[0]


class _ChunkWriter:
    """Writes chunks into HDF5 datasets on one worker thread, in the order given.

    Compressing and writing the track file is a third of a replay's work; on a second
    core it overlaps the next windows' reading, decoding and fusing instead of adding to
    them. The chunks are encoded by `replay._chunks` outside h5py's lock (HDF5's own
    filters would hold it, and the log reads would wait), so only storing the bytes is
    one HDF5 call at a time. A write that fails is raised again from the next `put` or
    from `wait`.
    """

    def __init__(self, depth=2):
        # at most `depth` batches waiting (a flush of the decisions is 16 chunks of at
        # most 128 KiB): memory stays bounded (8 cost 8 MB more at 10^7 readings and
        # bought no speed on the bench's one-hour log)
        self._q = queue.Queue(maxsize=depth)
        self._error = None
        self._cancel = False
        self._scratch = {}  # the worker's encoding buffers
        self._thread = threading.Thread(target=self._work, name="rangefuse-track-writer",
                                        daemon=True)
        self._thread.start()

    def column(self, ds) -> _Column:
        return _Column(ds)

    def _write(self, col, start, data):
        end = start + len(data)
        enc = col.encoding
        if enc is None or start % enc.rows or len(data) > enc.rows:
            if col.rows < end:
                col.ds.resize((end,))
                col.rows = end
            col.ds[start:end] = data
            return
        raw = enc.encode(data, self._scratch)
        if col.rows < end:
            col.ds.resize((end,))
            col.rows = end
        col.ds.id.write_direct_chunk((start,), raw)

    def _work(self):
        while True:
            job = self._q.get()
            try:
                if job is None:
                    return
                for col, start, data, done in job:
                    if self._error is None and not self._cancel:
                        try:
                            self._write(col, start, data)
                        except BaseException as exc:  # noqa: BLE001 (to the main thread)
                            self._error = exc
                    if done is not None:
                        done()
            finally:
                self._q.task_done()

    def _raise(self):
        if self._error is not None:
            exc, self._error = self._error, None
            self._cancel = True  # nothing after a failed write is written
            raise exc

    def put(self, batch):
        """For each ``(col, start, data, done)`` of `batch`, in order: write `data` at
        row `start` of `col` (growing it), then call `done` (None: nothing to call).
        One batch is one hand-over to the thread (each costs a wake-up and the GIL)."""
        self._raise()
        self._q.put(list(batch))

    def wait(self):
        """Return when every chunk given so far is in the file."""
        self._q.join()
        self._raise()

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is not None:
            self._cancel = True  # the file is being thrown away: skip what is left
        self._q.put(None)
        self._thread.join()
        if exc_type is None:
            self._raise()
        return False


class _Appender:
    """Resizable, chunked, checksummed datasets that grow chunk by chunk.

    Rows are copied into one buffer per column and written a whole chunk at a time, so
    each chunk is compressed once (a partly written chunk evicted from HDF5's cache
    would be compressed again on every later write). A full buffer goes to the
    `_ChunkWriter` and comes back to this column's pool when written, so memory holds a
    few chunks per column and buffers are reused rather than allocated.
    """

    def __init__(self, group, cols, writer):
        self.cols = {}
        self._dtype = {}
        for name, dt, units, packed in cols:
            ds = group.create_dataset(name, shape=(0,), maxshape=(None,), dtype=dt,
                                      chunks=(_CHUNK,), **(_FILTERS if packed else _PLAIN))
            if units:
                ds.attrs["units"] = units
            self.cols[name] = writer.column(ds)
            self._dtype[name] = dt
        self._writer = writer
        self._free = {name: collections.deque() for name in self.cols}  # written buffers
        self._buf = {name: self._new_buffer(name) for name in self.cols}
        self.n = 0          # rows written or buffered
        self._nbuf = 0

    def _new_buffer(self, name):
        try:
            return self._free[name].pop()
        except IndexError:
            return np.empty(_CHUNK, self._dtype[name])

    def append(self, **cols):
        m = len(next(iter(cols.values())))
        i = 0
        while i < m:
            k = min(_CHUNK - self._nbuf, m - i)
            for name, buf in self._buf.items():
                buf[self._nbuf:self._nbuf + k] = cols[name][i:i + k]
            self._nbuf += k
            self.n += k
            i += k
            if self._nbuf == _CHUNK:
                self.flush()

    def flush(self):
        """Hand the buffered rows to the writer (a whole chunk, or the last part one)."""
        if not self._nbuf:
            return
        start = self.n - self._nbuf
        batch = []
        for name, col in self.cols.items():
            buf = self._buf[name]
            batch.append((col, start, buf[:self._nbuf],
                          functools.partial(self._free[name].append, buf)))
            self._buf[name] = self._new_buffer(name)
        self._writer.put(batch)
        self._nbuf = 0


@dataclass
class _SensorStats:
    counts: np.ndarray = field(default_factory=lambda: np.zeros(len(D.NAMES), np.int64))
    nis_sum: float = 0.0
    nis_n: int = 0
    flag_counts: dict = field(default_factory=dict)
    raw_err: M.ErrorStats = field(default_factory=M.ErrorStats)
    # the longest silence between two readings, for the summary (a dead sensor); the
    # reading times are folded in by _window_stats.window_stats
    n_t: int = 0
    t_first: float = math.nan
    t_last: float = math.nan
    gap_s: float = 0.0
    gap_from_s: float = math.nan
    # when readings were decoded with a fallback air temperature
    fallback_from_s: float = math.nan
    fallback_to_s: float = math.nan

    def _fallback_span(self, lo, hi):
        if np.isfinite(lo):
            self.fallback_from_s = lo if not np.isfinite(self.fallback_from_s) else \
                min(self.fallback_from_s, lo)
            self.fallback_to_s = hi if not np.isfinite(self.fallback_to_s) else \
                max(self.fallback_to_s, hi)

    def _typical_interval(self):
        return (self.t_last - self.t_first) / (self.n_t - 1) if self.n_t > 1 else math.nan

    def silent_at_end(self, end_s) -> bool:
        """Whether the sensor stopped long before the log ended (same test as `silence`)."""
        iv = self._typical_interval()
        return bool(np.isfinite(iv) and end_s - self.t_last > max(1.0, 20 * iv))

    def silence(self):
        """``(gap_s, from_s)`` when one silence stands out (over 1 s and over 20 times the
        mean interval), else None."""
        if self.n_t < 2:
            return None
        mean = (self.t_last - self.t_first) / (self.n_t - 1)
        return (self.gap_s, self.gap_from_s) if self.gap_s > max(1.0, 20 * mean) else None


@dataclass
class _DirStats:
    err: M.ErrorStats = field(default_factory=M.ErrorStats)
    err_smooth: M.ErrorStats = field(default_factory=M.ErrorStats)
    white: M.Whiteness = field(default_factory=M.Whiteness)
    nis_sum: float = 0.0
    nis_n: int = 0
    loglik: float = 0.0
    amb_readings: int = 0      # IR readings with two candidates that were fused
    amb_unresolved: int = 0    # ...whose branch stayed ambiguous
    branch_n: int = 0          # ...below the peak by truth, with a valid echo nearby
    branch_ok: int = 0
    reacquired: int = 0


@dataclass
class ReplayResult:
    """What a replay did, with the path of the track file it wrote.

    Use `summary` for the text report and `plot` for the figure; the full per-reading
    record is in the track file (``decisions`` group) at `path`.
    """

    path: str
    log_paths: list
    rig: Rig
    sensor_names: tuple
    directions: tuple
    n_readings: int
    sensors: dict
    dirs: dict
    has_truth: bool
    smoothed: bool
    seconds: float
    span_s: tuple
    compile_s: float = 0.0  # compiling (or loading) the estimator kernel, not in `seconds`
    duration_s: float = math.nan  # the logs' own lengths added up (span_s is first to last)

    # --- figures -------------------------------------------------------------------
    def plot(self, path=None, **kw):
        """Fused versus raw tracks (see `replay.plots.plot_track`)."""
        from .plots import plot_track
        return plot_track(self.path, out=path, **kw)

    # --- numbers -------------------------------------------------------------------
    def rejections(self) -> dict:
        out = {}
        for name, st in self.sensors.items():
            for code in range(D.FIRST_REJECT, len(D.NAMES)):
                if st.counts[code]:
                    out.setdefault(D.NAMES[code], {})[name] = int(st.counts[code])
        return out

    def _dir(self, direction):
        d = direction or self.directions[0]
        if d not in self.dirs:
            raise InputError(f"no direction {d!r}; this replay has {', '.join(self.directions)}",
                             field="direction")
        return self.dirs[d]

    def errors(self, direction=None, smoothed=False) -> dict:
        """Error against truth by zone (empty zones None); ``smoothed`` needs a replay run
        with ``smooth=True``."""
        if smoothed and not self.smoothed:
            raise InputError("this replay was not smoothed; run it with smooth=True "
                             "(rangefuse replay --smooth)", field="smoothed")
        st = self._dir(direction)
        return (st.err_smooth if smoothed else st.err).table()

    def nis(self, direction=None):
        st = self._dir(direction)
        mean = st.nis_sum / st.nis_n if st.nis_n else math.nan
        return mean, st.nis_n, M.nis_bounds(st.nis_n)

    def summary(self) -> str:
        L = []
        span = self.span_s
        dur = self.duration_s if math.isfinite(self.duration_s) else span[1] - span[0]
        over = f"{dur:.1f} s" if len(self.log_paths) == 1 else \
            f"{dur:.1f} s ({len(self.log_paths)} logs)"
        L.append(f"replay of {', '.join(os.path.basename(p) for p in self.log_paths)}: "
                 f"{self.n_readings} readings over {over} in "
                 f"{self.seconds:.2f} s ({self.n_readings / max(self.seconds, 1e-9):,.0f} "
                 f"readings/s); estimator {self.rig.estimator.kind}")
        if self.compile_s > 0.5:
            L.append(f"(before that, {self.compile_s:.1f} s compiling the estimator kernel: once, "
                     "then it is cached)")
        L.append(f"track file: {self.path}")
        L.append("")
        L.append("decisions by sensor:")
        names = [n for n in D.NAMES]
        used = [c for c in range(len(names))
                if any(st.counts[c] for st in self.sensors.values())]
        L.append("  " + f"{'sensor':<16}" + "".join(f"{names[c]:>13}" for c in used)
                 + f"{'mean NIS':>10}")
        for name, st in self.sensors.items():
            mn = f"{st.nis_sum / st.nis_n:.2f}" if st.nis_n else "-"  # nothing fused
            L.append("  " + f"{name:<16}" + "".join(f"{int(st.counts[c]):>13}" for c in used)
                     + f"{mn:>10}")
        for d in self.directions:
            st = self.dirs[d]
            L.append("")
            L.append(f"direction {d}:")
            mean, n, (lo, hi) = self.nis(d)
            if n:
                verdict = M.consistency_verdict(mean, n)
                L.append(f"  time-averaged NIS {mean:.3f} over {n} fused readings; 95% bounds "
                         f"[{lo:.3f}, {hi:.3f}]: {verdict}")
                if verdict != "consistent":
                    L.append("    (the rig's noise figures do not fit this log; `rangefuse "
                             "tune` estimates them from it)")
            else:
                L.append("  no reading was fused: no NIS to judge")
            w = st.white.result()
            if w["rho"]:
                L.append(f"  innovation whiteness: lag-1..{len(w['rho'])} autocorrelation max "
                         f"|rho| = {max(abs(r) for r in w['rho']):.3f} (95% bound "
                         f"{w['bound']:.3f}); Ljung-Box Q = {w['q']:.1f}, p = {w['p']:.3g}")
            L.append(f"  innovations log-likelihood {st.loglik:.1f}"
                     + (" (particle estimator: IR readings are scored per volt, so it does not "
                        "compare with a Kalman run's)" if self.rig.estimator.kind == "particle"
                        else ""))
            if st.amb_readings:
                L.append(f"  near-zone ambiguity: {st.amb_readings} IR readings had two "
                         f"candidates; {st.amb_unresolved} stayed ambiguous "
                         f"({100 * st.amb_unresolved / st.amb_readings:.1f} %)")
            if st.branch_n:
                L.append(f"  branch correct for {st.branch_ok} of {st.branch_n} IR readings "
                         f"below the peak ({100 * st.branch_ok / st.branch_n:.2f} %)")
            if st.reacquired:
                L.append(f"  track re-acquired {st.reacquired} times")
            if self.has_truth:
                for label, tab in (("filtered", st.err.table()),) + (
                        (("smoothed", st.err_smooth.table()),) if self.smoothed else ()):
                    L.append(f"  against truth ({label}" + (", at track rows" if label ==
                                                            "smoothed" else "") + "):")
                    L.append(f"    {'zone':<8}{'n':>9}{'RMSE mm':>10}{'bias mm':>10}"
                             f"{'worst mm':>10}{'NEES':>10}{'2σ cover':>10}")
                    for z, row in tab.items():
                        if row is None:
                            continue
                        L.append(f"    {z:<8}{row['n']:>9}{1e3 * row['rmse_m']:>10.1f}"
                                 f"{1e3 * row['bias_m']:>10.1f}{1e3 * row['worst_m']:>10.1f}"
                                 f"{row['nees']:>10.3g}{100 * row['cover2']:>9.1f}%")
        rej = self.rejections()
        if rej:
            L.append("")
            L.append("rejections by reason: " + "; ".join(
                f"{r} {sum(v.values())} ({', '.join(f'{k} {c}' for k, c in v.items())})"
                for r, v in rej.items()))
        flagged = {}
        for name, st in self.sensors.items():
            for fname, c in st.flag_counts.items():
                if c and fname != "temp_fallback":  # that one has its own line below
                    flagged.setdefault(fname, {})[name] = c
        if flagged:
            L.append("flags (docs/track-format.md): " + "; ".join(
                f"{f} {sum(v.values())} ({', '.join(f'{k} {c}' for k, c in v.items())})"
                for f, v in flagged.items()))
        fb = sum(st.flag_counts.get("temp_fallback", 0) for st in self.sensors.values())
        if fb:
            lo = min((st.fallback_from_s for st in self.sensors.values()
                      if np.isfinite(st.fallback_from_s)), default=math.nan)
            hi = max((st.fallback_to_s for st in self.sensors.values()
                      if np.isfinite(st.fallback_to_s)), default=math.nan)
            when = f", between {lo:.1f} s and {hi:.1f} s" if np.isfinite(lo) else ""
            L.append(f"air temperature fallback (stale or missing stream) for {fb} "
                     f"readings{when}")
        for name, st in self.sensors.items():
            n_in = int(st.counts.sum())
            off = int(st.counts[D.GATED] + st.counts[D.CROSSTALK])
            if n_in >= 20 and off > n_in // 2:
                # most of a unit's readings disagreeing with the track is seldom the scene
                L.append(f"{name}: {off} of {n_in} readings rejected as gated or crosstalk; "
                         "does the rig describe this unit (output, units, offset, curve)?")
            quiet = st.silence()
            if quiet:
                L.append(f"{name} was silent for {quiet[0]:.1f} s from {quiet[1]:.1f} s")
            end = self.span_s[1]
            if len(self.log_paths) == 1 and st.silent_at_end(end):
                L.append(f"{name} was silent from {st.t_last:.1f} s to the end of the log "
                         f"({end - st.t_last:.1f} s)")
            if st.n_t == 0 and len(self.log_paths) == 1:
                L.append(f"{name} gave no reading")
        L.append("")
        L.append("Fused ranges are not a safety-rated protective function.")
        return "\n".join(L)


def _clean_truth(truth):
    """Finite, time-ordered truth samples (once per log), or None."""
    if truth is None:
        return None
    tt, rr = (np.asarray(a, float) for a in truth)
    ok = np.isfinite(tt) & np.isfinite(rr)
    tt, rr = tt[ok], rr[ok]
    if tt.size > 1 and np.any(np.diff(tt) < 0):
        o = np.argsort(tt, kind="stable")
        tt, rr = tt[o], rr[o]
    return tt, rr


def _truth_interp(truth, t):
    """Truth range at times `t` (NaN outside the truth's span); `truth` from `_clean_truth`."""
    if truth is None:
        return None
    tt, rr = truth
    if tt.size < 2:
        return np.full(np.shape(t), np.nan)
    return np.interp(t, tt, rr, left=np.nan, right=np.nan)


def run(log, rig=None, *, out=None, smooth=False, window_s=None, progress=False,
        inputs_extra=()) -> ReplayResult:
    """Replay one log (or several, one after another on separate tracks) through the core.

    Parameters
    ----------
    log : path or list of paths
        Log file(s) in the rangefuse HDF5 format.
    rig : Rig or path, optional
        Rig to use instead of the one embedded in the log.
    out : path, optional
        Track file to write (HDF5). Default: a file in a temporary folder.
    smooth : bool
        Also write Rauch-Tung-Striebel smoothed ranges.
    window_s : float, optional
        Seconds of log read per step (memory is proportional to it, not to log length).
        Default: chosen per log so that a window holds about 32 768 readings (at least
        1 s, at most an hour).
    progress : bool
        Print a progress bar on stderr.

    Returns
    -------
    ReplayResult
    """
    if window_s is not None and not (isinstance(window_s, (int, float)) and
                                     math.isfinite(window_s) and window_s > 0):
        raise InputError(f"expected a positive number of seconds, or None for the automatic "
                         f"window; got {window_s!r}", field="window_s")
    paths = [os.fspath(log)] if isinstance(log, (str, os.PathLike)) else [os.fspath(p) for p in log]
    if not paths:
        raise InputError("expected at least one log", field="log")
    if out is None:
        import tempfile
        out = os.path.join(tempfile.mkdtemp(prefix="rangefuse-"),
                           os.path.splitext(os.path.basename(paths[0]))[0] + ".track.h5")
    out = os.fspath(out)
    refuse_overwrite(out, paths + list(inputs_extra))
    rig_given = load_rig(rig)
    compile_s = _warm_kernel(rig_given, paths[0])
    t_start = time.perf_counter()
    with atomic_output(out, inputs=paths) as tmp:
        # Chunks are written whole (see _Appender), so no chunk cache is needed; the
        # default one would hold megabytes per column for nothing.
        with h5py.File(tmp, "w", libver=LIBVER, track_order=True, rdcc_nbytes=0) as f5, \
                _ChunkWriter() as writer:  # every chunk is written before the file closes
            result = _run_into(f5, paths, rig_given, smooth, window_s, progress, writer)
    result.path = out
    result.seconds = time.perf_counter() - t_start
    result.compile_s = compile_s
    return result


def _warm_kernel(rig, path) -> float:
    """Compile (or load from numba's cache) the estimator's kernel on one invalid
    reading, and the replay's diagnostics and checksum kernels, so the replay's own time
    is the replay's; returns the seconds it took."""
    t0 = time.perf_counter()
    try:
        if rig is None:
            with open_log(path) as log:
                rig = _rig_for(log, None, path)
        f = make_fuser(rig)
        name = next(iter(rig.sensors))
        raw = np.array([""]) if rig.sensors[name].output == "serial" else np.array([np.nan])
        b = f.process({name: (np.array([np.nan]), raw)})
    except RangefuseError:
        return 0.0  # the replay itself will report what is wrong
    # and the replay's own kernels, on that reading against a made-up truth
    dirs, ns = f.directions, len(f.sensor_names)
    truth = (np.array([0.0, 1.0]), np.array([1.0, 1.0]))
    ws = W.WindowStats(rig, f.sensor_names, dirs, {d: truth for d in dirs},
                       {d: M.zone_edges(rig, d) for d in dirs}, _truth_interp)
    ws.run(b.in_time_order(), np.full(ns, np.nan), np.full(ns, np.nan), np.zeros(ns, np.int64),
           np.zeros(ns), np.full(ns, np.nan))
    fletcher32(np.zeros(2, np.uint8))
    return time.perf_counter() - t0


def _rig_for(log, rig_given, path) -> Rig:
    if rig_given is not None:
        rig = rig_given
    else:
        if not log.rig_toml or not log.rig_toml.strip():
            raise LogFormatError("the log holds no rig description; pass --rig", file=path,
                                 field="/rig")
        rig = Rig.from_toml(log.rig_toml, where=f"{path}:/rig")
    missing = [n for n in log.sensors if n not in rig.sensors]
    if missing:
        raise InputError(f"the log has sensor {missing[0]!r}, which the rig does not describe "
                         f"(rig sensors: {', '.join(rig.sensors)})", file=path,
                         field=f"/sensors/{missing[0]}")
    for n, info in log.sensors.items():
        s = rig.sensors[n]
        if info.kind != s.kind or info.output != s.output:
            raise InputError(f"sensor {n!r} is {info.kind}/{info.output} in the log but "
                             f"{s.kind}/{s.output} in the rig", file=path,
                             field=f"/sensors/{n}")
    return rig


def _run_into(f5, paths, rig_given, smooth, window_s, progress, writer) -> ReplayResult:
    rig0 = None
    sensors_stats = {}
    dir_stats = {}
    n_total = 0
    span = (math.inf, -math.inf)
    duration = 0.0
    any_truth = False
    for li, path in enumerate(paths):
        with open_log(path) as log:
            rig = _rig_for(log, rig_given, path)
            if rig0 is None:
                rig0 = rig
                f5.attrs["format"] = TRACK_FORMAT
                f5.attrs["format_version"] = TRACK_FORMAT_VERSION
                f5.attrs["estimator"] = rig.estimator.kind
                f5.attrs["sensor_names"] = json.dumps(list(rig.sensors))
                f5.attrs["direction_names"] = json.dumps(list(rig.directions))
                f5.attrs["decision_names"] = json.dumps(list(D.NAMES))
                f5.attrs["flag_names"] = json.dumps({str(k): v for k, v in D.FLAG_NAMES.items()})
                f5.attrs["track_flag_names"] = json.dumps({"1": "multimodal", "2": "reacquired",
                                                           "4": "temp_fallback"})
                f5.attrs["safety"] = ("Fused ranges are not a safety-rated protective function.")
                f5.create_dataset("rig", data=rig.to_toml(), dtype=h5py.string_dtype())
            elif rig.sensor_names != rig0.sensor_names or rig.directions != rig0.directions:
                raise InputError("logs replayed together must share one rig layout (same "
                                 "sensors and directions)", file=path, field="/rig")
            grp = f5.create_group(f"runs/{li}") if len(paths) > 1 else f5
            grp.attrs["log"] = os.path.abspath(path)
            res = _replay_one(log, rig, grp, smooth, window_s, progress, path, writer)
            n_total += res["n"]
            any_truth |= res["has_truth"]
            if res["span"][0] <= res["span"][1]:
                span = (min(span[0], res["span"][0]), max(span[1], res["span"][1]))
                duration += res["span"][1] - res["span"][0]
            for k, v in res["sensors"].items():
                if k in sensors_stats:
                    a = sensors_stats[k]
                    a.counts += v.counts
                    a.nis_sum += v.nis_sum
                    a.nis_n += v.nis_n
                    for fk, fv in v.flag_counts.items():
                        a.flag_counts[fk] = a.flag_counts.get(fk, 0) + fv
                    a.raw_err.merge(v.raw_err)
                    if v.gap_s > a.gap_s:
                        a.gap_s, a.gap_from_s = v.gap_s, v.gap_from_s
                    if v.n_t:
                        a.t_first = v.t_first if not np.isfinite(a.t_first) else \
                            min(a.t_first, v.t_first)
                        a.t_last = v.t_last if not np.isfinite(a.t_last) else \
                            max(a.t_last, v.t_last)
                        a.n_t += v.n_t
                    a._fallback_span(v.fallback_from_s, v.fallback_to_s)
                else:
                    sensors_stats[k] = v
            for k, v in res["dirs"].items():
                if k in dir_stats:
                    a = dir_stats[k]
                    a.err.merge(v.err)
                    a.err_smooth.merge(v.err_smooth)
                    for attr in ("nis_sum", "nis_n", "loglik", "amb_readings", "amb_unresolved",
                                 "branch_n", "branch_ok", "reacquired"):
                        setattr(a, attr, getattr(a, attr) + getattr(v, attr))
                    a.white.add([])  # whiteness is reported for the first log's sequence
                else:
                    dir_stats[k] = v
    if not math.isfinite(span[0]):
        span = (0.0, 0.0)
    return ReplayResult(path="", log_paths=paths, rig=rig0, sensor_names=rig0.sensor_names,
                        directions=rig0.directions, n_readings=n_total, sensors=sensors_stats,
                        dirs=dir_stats, has_truth=any_truth, smoothed=smooth, seconds=0.0,
                        span_s=span, duration_s=duration)


class _Progress:
    def __init__(self, total, label, enabled):
        self.total, self.label, self.enabled = max(total, 1), label, enabled
        self.done = 0
        self.last = 0.0

    def add(self, n):
        self.done += n
        if not self.enabled:
            return
        now = time.monotonic()
        if now - self.last < 0.2 and self.done < self.total:
            return
        self.last = now
        frac = min(self.done / self.total, 1.0)
        bar = "#" * int(30 * frac)
        sys.stderr.write(f"\r{self.label} [{bar:<30}] {100 * frac:5.1f}% {self.done}/{self.total}")
        if self.done >= self.total:
            sys.stderr.write("\n")
        sys.stderr.flush()


def _auto_window_s(log) -> float:
    """A window holding about `_WINDOW_ROWS` readings, from the log's mean reading rate.

    Fewer, larger windows spend less time per reading in Python; memory stays bounded by
    the row count, not the log length."""
    n = sum(info.n for info in log.sensors.values())
    t0, t1 = log.time_span()
    span = t1 - t0
    if not (n and math.isfinite(span) and span > 0):
        return 10.0
    return float(min(max(_WINDOW_ROWS * span / n, 1.0), 3600.0))


def _replay_one(log, rig, grp, smooth, window_s, progress, path, writer) -> dict:
    fuser = make_fuser(rig)
    names = fuser.sensor_names
    dirs = fuser.directions
    env = log.environment_for(rig)
    # The environment is small next to the readings: hand it over once, causally used.
    if "air" in env:
        fuser.push_air(*env["air"])
    if "humidity" in env:
        fuser.push_humidity(*env["humidity"])
    raw_truths = {d: log.truth(d) for d in dirs}  # read once: scored, then copied in
    truths = {d: _clean_truth(raw_truths[d]) for d in dirs}
    has_truth = any(v is not None for v in truths.values())
    edges = {d: M.zone_edges(rig, d) for d in dirs}
    dec = _Appender(grp.create_group("decisions"), _DECISION_COLS, writer)
    tracks = {d: _Appender(grp.create_group(f"track/{d}"), _TRACK_COLS, writer) for d in dirs}
    # The truth copy is known now: written while the windows are replayed, not after.
    for d in dirs:
        if raw_truths[d] is not None:
            g = grp.create_group(f"truth/{d}")
            for k, v in zip(("t_s", "range_m"), raw_truths[d]):
                v = np.asarray(v)
                if not v.shape[0]:  # an empty truth stream: nothing to hand the writer
                    g.create_dataset(k, data=v, **_FILTERS).attrs["units"] = \
                        "s" if k == "t_s" else "m"
                    continue
                ds = g.create_dataset(k, shape=v.shape, dtype=v.dtype,
                                      chunks=(min(_CHUNK, v.shape[0]),), **_FILTERS)
                ds.attrs["units"] = "s" if k == "t_s" else "m"
                col = writer.column(ds)
                writer.put((col, i, v[i:i + _CHUNK], None)
                           for i in range(0, v.shape[0], _CHUNK))
    sstats = {n: _SensorStats() for n in names}
    dstats = {d: _DirStats() for d in dirs}
    ws = W.WindowStats(rig, names, dirs, truths, edges, _truth_interp)
    offsets = {n: 0 for n in log.sensors}  # each window's first row in the log, by sensor
    index = {n: i for i, n in enumerate(names)}
    total = sum(info.n for info in log.sensors.values())
    bar = _Progress(total, os.path.basename(path), progress and total > 200_000)
    span = (math.inf, -math.inf)
    for window in log.iter_windows(window_s or _auto_window_s(log)):
        readings = {}
        starts = np.zeros(len(names), np.int64)
        for name, stream in window.items():
            readings[name] = (stream.t_s, stream.raw, stream.ping_t_s)
            if name in index:
                starts[index[name]] = offsets[name]
            offsets[name] += len(stream)
        b = fuser.process(readings)
        if len(b) == 0:
            continue
        b = b.in_time_order()
        dec.append(sensor=b.sensor, row=b.row + starts[b.sensor], t_s=b.t_s,
                   direction=b.direction, decision=b.code, flags=b.flags,
                   innovation_m=b.innovation_m, nis=b.nis, branch=b.branch,
                   branch_prob=b.branch_prob, loglik=b.loglik, z_far_m=b.z_m[:, 0],
                   z_near_m=b.z_m[:, 1], sigma_far_m=b.sigma_m[:, 0],
                   sigma_near_m=b.sigma_m[:, 1], temp_c=b.temp_c)
        fin = np.isfinite(b.t_s)
        if fin.any():
            span = (min(span[0], float(b.t_s[fin].min())), max(span[1], float(b.t_s[fin].max())))
        _accumulate(b, names, dirs, truths, sstats, dstats, tracks, ws)
        bar.add(len(b))
    dec.flush()
    for tr in tracks.values():
        tr.flush()
    writer.wait()  # the smoothing reads the track back
    if smooth:
        for di, d in enumerate(dirs):
            _smooth_track(grp[f"track/{d}"], rig.estimator.accel_psd, truths[d], edges[d],
                          dstats[d])
    return {"n": dec.n, "sensors": sstats, "dirs": dstats, "has_truth": has_truth, "span": span}


def _accumulate(b, names, dirs, truths, sstats, dstats, tracks, ws):
    """Fold one window's decisions (`b`, in time order) into the running diagnostics and
    append its track rows; the per-reading work is `_window_stats.window_stats`.

    Against truth, the estimate a user would have read at every reading of a direction
    is scored (predicted to its time), not only at fused ones: a track that is rejecting
    everything is still wrong while it does."""
    st = [sstats[name] for name in names]
    t_first = np.array([s.t_first for s in st])
    t_last = np.array([s.t_last for s in st])
    n_t = np.array([s.n_t for s in st], np.int64)
    gap_s = np.array([s.gap_s for s in st])
    gap_from = np.array([s.gap_from_s for s in st])
    ws.run(b, t_first, t_last, n_t, gap_s, gap_from)
    for si, s in enumerate(st):
        s.t_first, s.t_last, s.n_t = float(t_first[si]), float(t_last[si]), int(n_t[si])
        s.gap_s, s.gap_from_s = float(gap_s[si]), float(gap_from[si])
        s._fallback_span(float(ws.fb_lo[si]), float(ws.fb_hi[si]))
        s.counts += ws.counts[si]
        s.nis_sum += float(ws.s_nis[si])
        s.nis_n += int(ws.s_nisn[si])
        for j, fname in enumerate(D.FLAG_NAMES.values()):
            c = int(ws.s_flag[si, j])
            if c:
                s.flag_counts[fname] = s.flag_counts.get(fname, 0) + c
    for di, d in enumerate(dirs):
        ds = dstats[d]
        k_nis, k_fused = int(ws.d_int[di, W.D_NIS_N]), int(ws.d_int[di, W.D_FUSED])
        # numpy's pairwise sums over the values in reading order: the same floats as
        # summing the masked columns
        ds.nis_sum += float(ws.vals[di, W.V_NIS, :k_nis].sum())
        ds.nis_n += k_nis
        ds.loglik += float(ws.vals[di, W.V_LOGLIK, :k_fused].sum())
        ds.white.add(ws.vals[di, W.V_WHITE, :k_nis])
        ds.amb_readings += int(ws.d_int[di, W.D_AMB])
        ds.amb_unresolved += int(ws.d_int[di, W.D_AMB_UNRESOLVED])
        ds.reacquired += int(ws.d_int[di, W.D_REACQ])
        if k_fused:  # views of the kernel's buffers, copied by the appender
            cols = {c: ws.track_f[di, j, :k_fused] for j, c in enumerate(W.TRACK_F)}
            cols.update({c: ws.track_i[di, j, :k_fused] for j, c in enumerate(W.TRACK_I)})
            tracks[d].append(**cols)
        if truths[d] is None:
            continue
        ds.err.add_sums(ws.err[di])
        ds.branch_n += int(ws.d_int[di, W.D_BRANCH_N])
        ds.branch_ok += int(ws.d_int[di, W.D_BRANCH_OK])
        for si, name in enumerate(names):
            sstats[name].raw_err.add_sums(ws.raw_err[di, si])


def _smooth_track(g, q, truth, edges, ds, block=1_000_000):
    n = g["t_s"].shape[0]
    if n == 0:
        return
    cols = [("range_smoothed_m", "m"), ("sigma_smoothed_m", "m"), ("rate_smoothed_mps", "m/s")]
    out = {}
    for c, u in cols:
        out[c] = g.create_dataset(c, shape=(n,), dtype=np.float64, chunks=(min(_CHUNK, n),),
                                  **_PLAIN)
        out[c].attrs["units"] = u
    # Backwards, block by block; a re-acquired row starts a new track, so the rows before
    # it are smoothed as the end of their own track (nothing after a restart says
    # anything about the target before it).
    nxt = None
    stop = n
    while stop > 0:
        start = max(0, stop - block)
        t = g["t_s"][start:stop]
        x = np.stack([g["range_m"][start:stop], g["rate_mps"][start:stop]], axis=1)
        P = np.empty((stop - start, 2, 2))
        P[:, 0, 0] = g["cov_rr_m2"][start:stop]
        P[:, 0, 1] = P[:, 1, 0] = g["cov_rv_m2ps"][start:stop]
        P[:, 1, 1] = g["cov_vv_m2ps2"][start:stop]
        restart = np.flatnonzero((g["flags"][start:stop] & TRACK_REACQUIRED) != 0)
        xs = np.empty_like(x)
        Ps = np.empty_like(P)
        hi = stop - start
        for lo in list(restart[::-1]) + [0]:
            if lo >= hi:
                continue
            xs[lo:hi], Ps[lo:hi] = rts_smooth(t[lo:hi], x[lo:hi], P[lo:hi], q, nxt)
            nxt = None if lo in restart else (t[lo], xs[lo], Ps[lo])
            hi = lo
        out["range_smoothed_m"][start:stop] = xs[:, 0]
        out["sigma_smoothed_m"][start:stop] = np.sqrt(Ps[:, 0, 0])
        out["rate_smoothed_mps"][start:stop] = xs[:, 1]
        if truth is not None:
            tr = _truth_interp(truth, t)
            ds.err_smooth.add(xs[:, 0] - tr, np.sqrt(Ps[:, 0, 0]), M.zone_of(tr, edges))
        stop = start


# --- command line ------------------------------------------------------------------------
def register(sub):
    p = sub.add_parser(
        "replay", help="replay logs through the fusion core and write track files",
        description="Replay one or more logs through the fusion core; write a track file "
                    "(HDF5: fused track per direction, one decision row per reading, the rig).",
        epilog="example:\n  rangefuse replay datasets/cold-store-dock.h5 -o dock.track.h5 "
               "--smooth --plot dock.png", formatter_class=__import__("argparse").RawDescriptionHelpFormatter)
    p.add_argument("logs", nargs="+", metavar="LOG", help="log file(s) (HDF5)")
    p.add_argument("--rig", help="rig TOML to use instead of the one embedded in each log")
    p.add_argument("-o", "--out", "--output", dest="out", required=True,
                   help="track file (one log) or folder (several logs)")
    p.add_argument("--smooth", action="store_true", help="add Rauch-Tung-Striebel smoothing")
    p.add_argument("--plot", metavar="FIG.png",
                   help="also draw fused versus raw tracks (several logs: one figure per log, "
                        "FIG.<log>.png)")
    p.add_argument("--csv", action="store_true",
                   help="also write OUT.track.csv and OUT.decisions.csv")
    p.add_argument("--window", type=float, default=None, metavar="S",
                   help="seconds of log read per step (default: about 32 768 readings)")
    p.add_argument("-q", "--quiet", action="store_true", help="print no summary")
    p.set_defaults(func=_main)


def _targets(args):
    """(log, track file, figure or None) per log, from the arguments."""
    if len(args.logs) == 1:
        outs = [args.out]
    else:
        if os.path.exists(args.out) and not os.path.isdir(args.out):
            raise InputError("with several logs, -o names a folder", file=args.out, field="-o")
        if os.path.splitext(args.out)[1].lower() in (".h5", ".hdf5") and \
                not os.path.isdir(args.out):
            raise InputError("with several logs, -o names a folder (one track file per log "
                             "goes in it); this looks like a file name", file=args.out,
                             field="-o")
        outs = [os.path.join(args.out, os.path.splitext(os.path.basename(p))[0] + ".track.h5")
                for p in args.logs]
        if len(set(map(os.path.abspath, outs))) < len(outs):
            raise InputError("two logs have the same file name, so their track files would "
                             "collide in the folder; replay them separately", file=args.out,
                             field="-o")
    figs = [None] * len(outs)
    if args.plot:
        # one figure per log, named from --plot: multi.png -> multi.<log>.png
        stem, ext = os.path.splitext(args.plot)
        figs = [args.plot] if len(outs) == 1 else \
            [f"{stem}.{os.path.splitext(os.path.basename(p))[0]}{ext}" for p in args.logs]
    return list(zip(args.logs, outs, figs))


def outputs(args) -> list:
    """Every file `rangefuse replay` will write (checked by the command line before any
    work): the track files (and their folder, with several logs), figures and CSVs."""
    from ._io import FIGURE_SUFFIXES, Output
    from .export import csv_prefix
    found = [Output(args.out, "-o", folder=True)] if len(args.logs) > 1 else []
    for _log, out, fig in _targets(args):
        found.append(Output(out, "-o"))
        if fig is not None:
            found.append(Output(fig, "--plot", FIGURE_SUFFIXES))
        if args.csv:
            found += [Output(csv_prefix(out) + end, "--csv")
                      for end in (".track.csv", ".decisions.csv")]
    return found


def _main(args) -> int:
    # The outputs were checked by the command line (`outputs`), and are put in place
    # together when the command ends (replay._io.command_outputs).
    from ._io import make_folder
    if args.window is not None and not args.window > 0:
        raise InputError(f"expected a positive number of seconds, got {args.window:g}",
                         field="--window")
    extra = [args.rig] if args.rig else []
    plan = _targets(args)
    if len(plan) > 1:
        make_folder(args.out)
    for log, out, fig in plan:
        res = run(log, rig=args.rig, out=out, smooth=args.smooth, window_s=args.window,
                  progress=sys.stderr.isatty(), inputs_extra=extra)
        if not args.quiet:
            print(res.summary())
        if args.csv:
            from .export import track_to_csv
            for p in track_to_csv(out):
                print(f"csv: {p}")
        if fig is not None:
            res.plot(fig)
            print(f"figure: {fig}")
        if args.quiet:
            print(f"track file: {out}")
    return 0
