"""Figures of a replay: fused versus raw tracks, filter consistency, tuner convergence.

Every figure reads the track file in slices (`replay.export.SLICE_ROWS` rows at a time)
and keeps only a bounded, decimated copy of each series, so an hour-long log plots in
seconds with modest memory. Two decimations are used:

- stride decimation for markers (every k-th reading, k doubling as the stream grows),
  which keeps the density of a cloud of readings honest;
- min/max decimation for lines and bands (each bucket of k consecutive samples keeps its
  lowest and highest point, and the lower and upper edges of the band), which keeps
  spikes that a stride would skip.

No series ever holds more than ``max_points`` points. Figures are built on matplotlib's
``Agg`` canvas without pyplot (so importing this module never changes the backend of an
interactive session) and saved atomically, in the format of the output suffix.

References
----------
Y. Bar-Shalom, X. R. Li, T. Kirubarajan, *Estimation with Applications to Tracking and
Navigation*, Wiley (2001), §5.4: normalised innovation squared (NIS), its chi-square
bounds, the time-averaged NIS and the whiteness test of the innovations.
"""
from __future__ import annotations

import math
import os

import numpy as np

from fusion import decisions as D
from fusion.errors import InputError

from . import metrics as M
from ._io import FIGURE_SUFFIXES, atomic_output, refuse_overwrite
from . import export as _export
from .export import TrackFile

__all__ = ["plot_track", "plot_diagnostics", "plot_convergence", "register", "SAFETY_FOOTER",
           "SENSOR_COLOURS"]

SAFETY_FOOTER = "Fused ranges are not a safety-rated protective function."

# Our own palette: warm and earthy hues for the raw sensors, kept clear of the deep blue of
# the fused track and of the near-black truth line, so the eye separates raw from fused.
SENSOR_COLOURS = ("#d1603d", "#3f9b5a", "#d9a13b", "#8b5fbf", "#4aa3c7", "#a8577e",
                  "#7f8c3a", "#8c6d5a")
FUSED_COLOUR = "#12355b"
SMOOTH_COLOUR = "#e0218a"
TRUTH_COLOUR = "#1c1c1c"
BAND_ALPHA = 0.18
OTHER_COLOUR = "#9a9a9a"    # the IR candidate not drawn as the reading (any sensor)
OTHER_ALPHA = 0.35
# One marker shape per rejection reason (hollow, in the sensor's colour).
REASON_MARKERS = {"held": "s", "dropout": "v", "out_of_range": "^", "crosstalk": "X",
                  "gated": "D", "invalid": "*", "late": "<", "unknown_sensor": ">"}
_DEFAULT_MARKER = "h"
FIGSIZE_IN = (12.0, 7.0)
DPI = 120
_ACF_LAGS = M.Whiteness().lags   # the replay summary's Ljung-Box lags
_HIST_LIMIT = 5.0


# --------------------------------------------------------------------------------------
# Streaming decimation
# --------------------------------------------------------------------------------------
class _Stride:
    """Every k-th sample of a stream, k doubling whenever more than `limit` are kept.

    The kept samples are those whose index in the stream is a multiple of k, so doubling k
    keeps every other one of them: the result is the same as one pass with the final k.
    """

    def __init__(self, limit: int):
        self.limit = max(1, int(limit))
        self.k = 1
        self.seen = 0
        self.parts = []
        self.kept = 0

    def add(self, *cols) -> None:
        n = len(cols[0])
        if n == 0:
            return
        first = (-self.seen) % self.k
        block = np.stack([np.asarray(c, np.float64)[first::self.k] for c in cols])
        self.seen += n
        self.parts.append(block)
        self.kept += block.shape[1]
        while self.kept > self.limit:
            allb = np.concatenate(self.parts, axis=1)[:, ::2]
            self.k *= 2
            self.parts = [allb]
            self.kept = allb.shape[1]

    def result(self, ncols: int) -> np.ndarray:
        if not self.parts:
            return np.zeros((ncols, 0))
        return np.concatenate(self.parts, axis=1)


class _Envelope:
    """Min/max decimation of a time series, with the envelope of a band around it.

    Buckets of k consecutive samples (aligned to multiples of k in the stream) keep the
    time and value of their minimum and maximum and the lowest lower edge and highest
    upper edge of the band; when there are more than about `limit // 2` buckets,
    neighbours merge in pairs and k doubles. Summaries combine associatively, so the
    result does not depend on how the stream was sliced. The line then has fewer than
    `limit` points and the band polygon fewer than `limit` vertices.
    """

    _FIELDS = ("t0", "t1", "tmin", "vmin", "tmax", "vmax", "lo", "hi")

    def __init__(self, limit: int):
        self.nb_max = max(1, (int(limit) - 6) // 2)
        self.k = 1
        self.b = {f: np.zeros(0) for f in self._FIELDS}
        self.part = None      # summary of the incomplete last bucket
        self.part_n = 0       # samples in it (< k)
        self.n = 0

    @staticmethod
    def _summarise(tt, vv, ll, hh) -> dict:
        """(m, w) arrays -> one summary per row."""
        rows = np.arange(tt.shape[0])
        imin = np.argmin(vv, axis=1)      # first occurrence on ties, as `_combine`
        imax = np.argmax(vv, axis=1)
        lo = np.where(np.isnan(ll), np.inf, ll).min(axis=1)
        hi = np.where(np.isnan(hh), -np.inf, hh).max(axis=1)
        return {"t0": tt[:, 0], "t1": tt[:, -1], "tmin": tt[rows, imin],
                "vmin": vv[rows, imin], "tmax": tt[rows, imax], "vmax": vv[rows, imax],
                "lo": lo, "hi": hi}

    @staticmethod
    def _combine(a, c) -> dict:
        """Summaries of adjacent stretches, `a` before `c`."""
        lmin = a["vmin"] <= c["vmin"]
        lmax = a["vmax"] >= c["vmax"]
        return {"t0": a["t0"], "t1": c["t1"],
                "tmin": np.where(lmin, a["tmin"], c["tmin"]),
                "vmin": np.where(lmin, a["vmin"], c["vmin"]),
                "tmax": np.where(lmax, a["tmax"], c["tmax"]),
                "vmax": np.where(lmax, a["vmax"], c["vmax"]),
                "lo": np.minimum(a["lo"], c["lo"]), "hi": np.maximum(a["hi"], c["hi"])}

    def _push(self, summ) -> None:
        for f in self._FIELDS:
            self.b[f] = np.concatenate([self.b[f], summ[f]])

    def add(self, t, v, lo=None, hi=None) -> None:
        t = np.asarray(t, np.float64)
        v = np.asarray(v, np.float64)
        lo = v if lo is None else np.asarray(lo, np.float64)
        hi = v if hi is None else np.asarray(hi, np.float64)
        ok = np.isfinite(t) & np.isfinite(v)
        if not ok.any():
            return
        data = np.stack([t[ok], v[ok], lo[ok], hi[ok]])
        n = data.shape[1]
        self.n += n
        i = 0
        if self.part_n:
            # complete the bucket left open by the previous slice first
            i = min(self.k - self.part_n, n)
            self.part = self._combine(self.part, self._summarise(*data[:, None, :i]))
            self.part_n += i
            if self.part_n == self.k:
                self._push(self.part)
                self.part, self.part_n = None, 0
        rest = data[:, i:]
        m = rest.shape[1] // self.k
        if m:
            self._push(self._summarise(*rest[:, : m * self.k].reshape(4, m, self.k)))
        tail = rest[:, m * self.k:]
        if tail.shape[1]:
            self.part = self._summarise(*tail[:, None, :])
            self.part_n = tail.shape[1]
        while self.b["t0"].size > self.nb_max:
            self._merge()

    def _merge(self) -> None:
        b = self.b
        nb = b["t0"].size
        p = nb // 2
        merged = self._combine({f: b[f][0:2 * p:2] for f in self._FIELDS},
                               {f: b[f][1:2 * p:2] for f in self._FIELDS})
        if nb % 2:
            # the odd bucket is the first half of a bucket of the new size: it joins
            # whatever is already open after it
            last = {f: b[f][-1:] for f in self._FIELDS}
            self.part = last if self.part is None else self._combine(last, self.part)
            self.part_n += self.k
        self.b = merged
        self.k *= 2

    def _flushed(self) -> dict:
        """The buckets plus the open one (state unchanged)."""
        if self.part is None:
            return self.b
        return {f: np.concatenate([self.b[f], self.part[f]]) for f in self._FIELDS}

    def line(self):
        """(t, v) of the decimated line, in time order."""
        b = self._flushed()
        if b["t0"].size == 0:
            return np.zeros(0), np.zeros(0)
        first_is_min = b["tmin"] <= b["tmax"]
        t = np.stack([np.where(first_is_min, b["tmin"], b["tmax"]),
                      np.where(first_is_min, b["tmax"], b["tmin"])], axis=1)
        v = np.stack([np.where(first_is_min, b["vmin"], b["vmax"]),
                      np.where(first_is_min, b["vmax"], b["vmin"])], axis=1)
        single = (b["tmin"] == b["tmax"]) & (b["vmin"] == b["vmax"])
        keep = np.ones(t.shape, bool)
        keep[:, 1] = ~single
        return t[keep], v[keep]

    def band(self):
        """(t, lower, upper) of the band envelope, one point per bucket."""
        b = self._flushed()
        lo = np.where(np.isfinite(b["lo"]), b["lo"], np.nan)
        hi = np.where(np.isfinite(b["hi"]), b["hi"], np.nan)
        return 0.5 * (b["t0"] + b["t1"]), lo, hi


def _break_at(t, v, at):
    """The line ``(t, v)`` with a gap (a NaN point) just before each time in `at`: a
    restarted track is a new track, and a line joining the two would draw a motion that
    never happened."""
    at = np.asarray(at, float)
    if not (t.size and at.size):
        return t, v
    k = np.unique(np.searchsorted(t, at[(at > t[0]) & (at <= t[-1])], side="left"))
    return np.insert(t, k, t[k]), np.insert(v.astype(float), k, np.nan)


class _TruthCursor:
    """Interpolates a truth series at nondecreasing query times, reading it in slices."""

    def __init__(self, tf, t_ds, r_ds, query_field=None, ordered=True):
        self.tf, self.t_ds, self.r_ds = tf, t_ds, r_ds
        self.query_field = query_field
        # ordered=False: queries may step back (reading times less their sensor's latency);
        # a query before what is kept re-reads the truth from its start.
        self.ordered = ordered
        self.n = t_ds.shape[0]
        self._reset()
        self.last_q = -math.inf

    def _reset(self) -> None:
        self.next = 0
        self.t = np.zeros(0)
        self.r = np.zeros(0)
        self.dropped = False

    def _more(self) -> bool:
        if self.next >= self.n:
            return False
        a, b = self.next, min(self.n, self.next + _export.SLICE_ROWS)
        t = self.tf.read(self.t_ds, a, b)
        r = self.tf.read(self.r_ds, a, b)
        ok = np.isfinite(t) & np.isfinite(r)
        t, r = t[ok], r[ok]
        if t.size and (np.any(np.diff(t) < 0) or (self.t.size and t[0] < self.t[-1])):
            raise self.tf.error("truth times must not decrease", field=self.t_ds.name, row=a)
        self.t = np.concatenate([self.t, t])
        self.r = np.concatenate([self.r, r])
        self.next = b
        return True

    def at(self, q) -> np.ndarray:
        q = np.asarray(q, np.float64)
        if q.size == 0:
            return q.copy()
        fin = q[np.isfinite(q)]
        if fin.size:
            if self.ordered:
                if fin[0] < self.last_q or np.any(np.diff(fin) < 0):
                    raise self.tf.error("track times decrease; expected nondecreasing times "
                                        "to compare with truth", field=self.query_field)
                self.last_q = fin[-1]
            elif self.dropped and (self.t.size == 0 or fin.min() < self.t[0]):
                self._reset()
            hi = fin.max()
            while (self.t.size == 0 or self.t[-1] < hi) and self._more():
                pass
        if self.t.size < 2:
            out = np.full(q.shape, np.nan)
        else:
            out = np.interp(q, self.t, self.r, left=np.nan, right=np.nan)
        if fin.size and self.t.size > 2:
            # drop what no later query can need (keep one sample before the last query;
            # unordered: before the earliest query of this call)
            keep = fin[-1] if self.ordered else fin.min()
            cut = max(0, int(np.searchsorted(self.t, keep, side="right")) - 2)
            if cut:
                self.dropped = True
                self.t, self.r = self.t[cut:], self.r[cut:]
        return out


def _track_rig(tf):
    """The rig the replay used (the track file's `/rig` TOML)."""
    from fusion.errors import RangefuseError
    from fusion.rig import Rig
    if "rig" not in tf.f:
        raise tf.error("dataset missing; expected the rig TOML in every track file",
                       field="/rig")
    text = tf.f["rig"][()]
    text = text.decode("utf-8", "replace") if isinstance(text, bytes) else str(text)
    try:
        rig = Rig.from_toml(text, where=f"{tf.path}:/rig")
    except RangefuseError as exc:
        raise tf.error(f"the rig does not load ({exc})", field="/rig") from None
    missing = [n for n in tf.sensor_names if n not in rig.sensors]
    if missing:
        raise tf.error(f"sensor(s) {', '.join(missing)} of sensor_names are not in the rig",
                       field="/rig")
    return rig


# --------------------------------------------------------------------------------------
# Checks at the door
# --------------------------------------------------------------------------------------
def _figure(size=FIGSIZE_IN):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    fig = Figure(figsize=size, dpi=DPI, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _n(count, noun) -> str:
    """``"1 reading"``, ``"2,000 readings"``."""
    return f"{count:,} {noun}" + ("" if count == 1 else "s")


def _out_format(out, inputs):
    """The figure format of `out` (from its suffix), checked before any work is done."""
    if out is None:
        return None
    out = os.fspath(out)
    ext = os.path.splitext(out)[1].lower().lstrip(".")
    # the same figure formats as every other command's --plot
    if "." + ext not in FIGURE_SUFFIXES:
        others = ", ".join(k for k in FIGURE_SUFFIXES if k not in (".png", ".pdf", ".svg"))
        raise InputError(f"cannot tell the figure format from the name {out!r}; expected "
                         f"a suffix such as .png, .pdf or .svg (also {others})", file=out,
                         field="out")
    refuse_overwrite(out, inputs)
    return ext


def _save(fig, out, fmt, inputs) -> None:
    with atomic_output(out, inputs=inputs) as tmp:
        fig.savefig(tmp, format=fmt, dpi=DPI)


def _t_range(t_range):
    if t_range is None:
        return -math.inf, math.inf
    try:
        lo, hi = t_range
    except (TypeError, ValueError):
        raise InputError("expected (from_s, to_s)", field="t_range") from None
    lo = -math.inf if lo is None else float(lo)
    hi = math.inf if hi is None else float(hi)
    if math.isnan(lo) or math.isnan(hi) or not lo < hi:
        raise InputError(f"the time range must have from < to, got {lo:g} .. {hi:g} s",
                         field="--from/--to")
    return lo, hi


def _max_points(n):
    try:
        n = int(n)
    except (TypeError, ValueError):
        raise InputError(f"expected an integer, got {n!r}", field="max_points") from None
    if n < 16:
        raise InputError(f"must be at least 16, got {n}", field="max_points")
    return n


def _dot_size(n, small=4.0, large=1.8):
    """Marker size for a cloud of n points: large dots for a few, fine ones for many."""
    if n <= 200:
        return small
    if n >= 20_000:
        return large
    f = (math.log10(n) - math.log10(200)) / 2.0
    return small + f * (large - small)


def _reject_size(n):
    """Marker size of n rejected readings of one kind: 2.6 pt for up to 100, halving
    every fourfold more (no smaller than 1.2 pt), so a regular lattice of hundreds of
    crosstalk echoes stays a faint stipple instead of hatching over the panel."""
    if n <= 100:
        return 2.6
    return max(1.2, 2.6 - 0.5 * math.log2(n / 100))


def _colour(i):
    return SENSOR_COLOURS[i % len(SENSOR_COLOURS)]


def _range_text(lo, hi):
    if math.isinf(lo) and math.isinf(hi):
        return ""
    a = "start" if math.isinf(lo) else f"{lo:g} s"
    b = "end" if math.isinf(hi) else f"{hi:g} s"
    return f"; t from {a} to {b}"


def _footer(fig):
    # As the figure's x label, so the layout engine keeps room for it below the axes.
    fig.supxlabel(SAFETY_FOOTER, fontsize=8, color="#555555", style="italic")


def _run_label(tf, group, run):
    name = tf.log_name(group)
    if len(tf.runs) > 1:
        return f"{name} (run {0 if run is None else run} of {len(tf.runs)} in the track file)"
    return name


# --------------------------------------------------------------------------------------
# Fused versus raw tracks
# --------------------------------------------------------------------------------------
def plot_track(track_path, out=None, direction=None, t_range=None, max_points=200_000, *,
               run=None):
    """Fused versus raw distance tracks, one row of axes per direction.

    Each direction's axes show the raw range of every reading as small dots (one colour
    per sensor); for IR readings with two candidates (below the peak) the candidate the
    filter chose is a dot and the other one a faint light-grey dot. Rejected readings are
    small hollow markers in the sensor's colour, one shape per reason, a two-candidate IR
    reading at the candidate nearer the fused track at its time (the track interpolated
    between its rows); held repeats (exact repeats of a sample already drawn) are tiny
    and faint, under the lines. Readings that carry no range (dropouts, out of range) sit
    on a strip along the top edge. Over them: the fused range with its 2-sigma band, the
    smoothed range when the replay smoothed, and truth (thin dark line) when the log had
    it. The title of each direction gives the replay summary's RMSE against truth (every
    reading scored against the track predicted to its time; smoothed: at the track rows).
    Below each direction, the error of the track rows against truth with the filter's
    ±2σ; without truth, one panel with the air temperature the echo rangers used.

    Parameters
    ----------
    track_path : str or path-like
        Track file written by `replay.run.run`.
    out : str or path-like, optional
        Figure file to write (format from its suffix: .png, .pdf, .svg, ...).
    direction : str, optional
        Plot only this direction (default all).
    t_range : (float or None, float or None), optional
        Plot only readings with ``from <= t_s <= to``, seconds.
    max_points : int
        Upper bound on the points of any one plotted series (decimation).
    run : int, optional
        Which replayed log of a multi-log track file (default the first).

    Returns
    -------
    matplotlib.figure.Figure

    Raises
    ------
    InputError, LogFormatError
        Not a track file, missing group or dataset, unknown direction, bad time range,
        unknown figure suffix.

    Examples
    --------
    >>> fig = plot_track("dock.track.h5", out="dock.png")                # doctest: +SKIP
    >>> fig = plot_track("dock.track.h5", direction="front", t_range=(60, 90),
    ...                  out="dock-front.pdf")                           # doctest: +SKIP
    """
    track_path = os.fspath(track_path)
    fmt = _out_format(out, [track_path])
    lo_t, hi_t = _t_range(t_range)
    max_points = _max_points(max_points)
    with TrackFile(track_path) as tf:
        group = tf.run(run)
        dirs = tf.directions(direction)
        tf.check_time_range(group, lo_t, hi_t)
        data = _collect_track(tf, group, dirs, lo_t, hi_t, max_points)
        data["title"] = _run_label(tf, group, run)
        data["sensors"] = tf.sensor_names
        data["decision_names"] = tf.decision_names
    data["range_text"] = _range_text(lo_t, hi_t)
    data["t_range"] = (lo_t, hi_t)
    fig = _draw_track(data, dirs)
    if out is not None:
        _save(fig, out, fmt, [track_path])
    return fig


def _collect_track(tf, group, dirs, lo_t, hi_t, max_points) -> dict:
    dec = tf.decisions(group)
    dir_index = {d: tf.direction_names.index(d) for d in dirs}
    ncodes = len(tf.decision_names)
    rig = _track_rig(tf)
    latency = np.array([rig.sensors[n].latency_s for n in tf.sensor_names] or [0.0])
    q = rig.estimator.accel_psd
    held_code = tf.decision_names.index("held") if "held" in tf.decision_names else -1
    # series[(direction, sensor, kind)] with kind "fused", "other" or the rejection code;
    # rug[(direction, sensor, code)]: rejected readings that have no range.
    series, rug = {}, {}
    counts = {d: np.zeros(ncodes, np.int64) for d in dirs}
    temp = _Envelope(max_points)
    fused_code = tf.fused_code
    # Per direction: the track rows (one per fused reading, in the decisions' order), so
    # every reading can be scored against the estimate predicted to its time, as the
    # replay summary does (replay.run `_accumulate`), and a rejected IR reading with two
    # candidates drawn at the one nearer the track.
    pred = {}
    for d in dirs:
        cols = tf.track(group, d, extra=_STATE_COLS)
        for k in _STATE_COLS:
            if k not in cols:
                raise tf.error("dataset missing; expected it in every track file",
                               field=f"{tf.track_group(group, d).name}/{k}")
        truth = tf.truth(group, d)
        pred[d] = {"cols": cols, "nt": cols["t_s"].shape[0], "k": 0,
                   "err": M.ErrorStats(), "edges": M.zone_edges(rig, d),
                   "cursor": (_TruthCursor(tf, *truth, ordered=False)
                              if truth is not None else None)}
    n = dec["t_s"].shape[0]
    for a, b in tf.slices(n):
        t = tf.read(dec["t_s"], a, b)
        sel = (t >= lo_t) & (t <= hi_t)
        code = tf.read(dec["decision"], a, b).astype(np.int64)
        if code.size and (code.min() < 0 or code.max() >= ncodes):
            raise tf.error(f"decision code outside 0..{ncodes - 1}", field=dec["decision"].name)
        dirn = tf.read(dec["direction"], a, b)
        fused = fused_code[code]
        if not sel.any():
            # only count the fused readings, to keep track rows and readings in step
            for d in dirs:
                pred[d]["k"] += int((fused & (dirn == dir_index[d])).sum())
            continue
        col = {k: tf.read(dec[k], a, b) for k in
               ("sensor", "branch", "z_far_m", "z_near_m", "temp_c")}
        sensor = col["sensor"].astype(np.int64)
        if sensor.size and (sensor.min() < 0 or sensor.max() >= len(tf.sensor_names)):
            raise tf.error(f"sensor index outside 0..{len(tf.sensor_names) - 1}",
                           field=dec["sensor"].name)
        t_meas = t - latency[sensor]
        temp.add(t[sel], col["temp_c"][sel])
        zf, zn = col["z_far_m"], col["z_near_m"]
        chosen = np.where(col["branch"] == 1, zn, zf)
        # range of the track at each reading's time (set below, per direction)
        r_at = np.full(t.shape, np.nan)
        for d in dirs:
            md = dirn == dir_index[d]
            if md.any():
                r_at[md] = _score_direction(tf, pred[d], md, fused, t_meas, sel, q, d)
        # a rejected reading with two candidates: the one nearer the track (the far one
        # where there is no track yet); with one, that one
        both = np.isfinite(zf) & np.isfinite(zn)
        near_track = np.abs(zn - r_at) < np.abs(zf - r_at)
        shown_rej = np.where(both, np.where(near_track, zn, zf), np.where(np.isfinite(zf), zf, zn))
        shown = np.where(fused, chosen, shown_rej)
        other = np.where(both, np.where(shown == zf, zn, zf), np.nan)
        t, code, fused, sensor, dirn = t[sel], code[sel], fused[sel], sensor[sel], dirn[sel]
        shown, other = shown[sel], other[sel]
        for d in dirs:
            md = dirn == dir_index[d]
            if not md.any():
                continue
            counts[d] += np.bincount(code[md], minlength=ncodes)
            for s in np.unique(sensor[md]):
                s = int(s)
                ms = md & (sensor == s)
                # held repeats are drawn once, at their chosen candidate only
                for kind, m in (("fused", ms & fused), ("other", ms & (code != held_code))):
                    z = shown if kind == "fused" else other
                    m = m & np.isfinite(z)
                    if m.any():
                        series.setdefault((d, s, kind), _Stride(max_points)).add(t[m], z[m])
                for c in np.unique(code[ms & ~fused]):
                    c = int(c)
                    mc = ms & (code == c)
                    has = mc & np.isfinite(shown)
                    if has.any():
                        series.setdefault((d, s, c), _Stride(max_points)).add(t[has], shown[has])
                    none = mc & ~np.isfinite(shown)
                    if none.any():
                        rug.setdefault((d, s, c), _Stride(max_points)).add(t[none])
    for d in dirs:
        if pred[d]["k"] != pred[d]["nt"]:
            raise tf.error(f"has {pred[d]['nt']} rows but the decisions fused "
                           f"{pred[d]['k']} readings of direction {d}; expected one row per "
                           "fused reading", field=pred[d]["cols"]["t_s"].name)
    out = {"estimator": rig.estimator.kind,
           "series": {k: v.result(2) for k, v in series.items()},
           "rug": {k: v.result(1)[0] for k, v in rug.items()},
           "counts": counts, "temp": temp.line(), "dirs": {},
           # the largest thinning factor of raw readings, for the title
           "stride": max([v.k for v in series.values()] + [1])}
    flag_bits = {v: k for k, v in tf.track_flag_names.items()}
    reacq_bit = flag_bits.get("reacquired", 0)
    for d in dirs:
        cols = tf.track(group, d, extra=("range_smoothed_m", "sigma_smoothed_m", "flags"))
        fused = _Envelope(max_points)
        smooth = _Envelope(max_points) if "range_smoothed_m" in cols else None
        truth = tf.truth(group, d)
        err = _Envelope(max_points) if truth is not None else None
        cursor = (_TruthCursor(tf, *truth, query_field=cols["t_s"].name)
                  if truth is not None else None)
        restarts = _Stride(max_points)
        err_s = M.ErrorStats()    # smoothed, at the track rows (as the replay summary)
        edges = pred[d]["edges"]
        nt = cols["t_s"].shape[0]
        for a, b in tf.slices(nt):
            t = tf.read(cols["t_s"], a, b)
            sel = (t >= lo_t) & (t <= hi_t)
            if not sel.any():
                continue
            t = t[sel]
            r = tf.read(cols["range_m"], a, b)[sel]
            s = tf.read(cols["sigma_m"], a, b)[sel]
            fused.add(t, r, r - 2 * s, r + 2 * s)
            rs = ss = None
            if smooth is not None:
                rs = tf.read(cols["range_smoothed_m"], a, b)[sel]
                smooth.add(t, rs)
                if "sigma_smoothed_m" in cols:
                    ss = tf.read(cols["sigma_smoothed_m"], a, b)[sel]
            if reacq_bit and "flags" in cols:
                fl = tf.read(cols["flags"], a, b)[sel].astype(np.int64)
                m = (fl & reacq_bit) != 0
                restarts.add(t[m], r[m])
            if cursor is not None:
                tr = cursor.at(t)
                e = r - tr
                err.add(t, 1e3 * e, -2e3 * s, 2e3 * s)
                if rs is not None and ss is not None:
                    err_s.add(rs - tr, ss, M.zone_of(tr, edges))
        info = {"fused_line": fused.line(), "fused_band": fused.band(), "n_track": fused.n,
                "smooth": smooth.line() if smooth is not None else None,
                "restarts": restarts.result(2), "truth": None, "err": None,
                # the replay summary's "all" rows: every reading, the track predicted to
                # its time; smoothed: at the track rows
                "errors": pred[d]["err"].table()["all"],
                "errors_smooth": err_s.table()["all"]}
        if truth is not None:
            tl = _Envelope(max_points)
            t_ds, r_ds = truth
            for a, b in tf.slices(t_ds.shape[0]):
                t = tf.read(t_ds, a, b)
                sel = (t >= lo_t) & (t <= hi_t)
                if sel.any():
                    tl.add(t[sel], tf.read(r_ds, a, b)[sel])
            info["truth"] = tl.line()
            info["err"] = (err.line(), err.band())
        out["dirs"][d] = info
    return out


_STATE_COLS = ("rate_mps", "cov_rr_m2", "cov_rv_m2ps", "cov_vv_m2ps2")


def _score_direction(tf, P, md, fused, t_meas, sel, q, d):
    """One slice of decisions, rows `md` of direction `d`: the track's range at each
    reading's time (interpolated between track rows), and the error against truth of the
    estimate predicted to that time, added to ``P["err"]`` for the rows inside the time
    range (`sel`).

    The scoring is the replay summary's (replay.run `_accumulate`): each reading is scored
    against the track as it stood after the reading (the row it made if fused, else the
    last row before it), predicted with the constant-velocity model to the reading's
    measurement time, with the predicted variance as its sigma, zoned by truth.
    """
    fd = fused[md]
    c0, nacc, nt = P["k"], int(fd.sum()), P["nt"]
    if c0 + nacc > nt:
        raise tf.error(f"has {nt} rows but the decisions fuse more readings of direction "
                       f"{d}; expected one row per fused reading", field=P["cols"]["t_s"].name)
    P["k"] = c0 + nacc
    last = c0 - 1 + np.cumsum(fd)                 # the track row after each reading, -1: none
    lo, hi = max(c0 - 1, 0), min(c0 + nacc + 1, nt)
    tm = t_meas[md]
    if hi <= lo:
        return np.full(tm.shape, np.nan)
    cols = P["cols"]
    blk = {k: tf.read(cols[k], lo, hi) for k in ("t_s", "range_m") + _STATE_COLS}
    r_at = np.interp(tm, blk["t_s"], blk["range_m"]) if blk["t_s"].size else \
        np.full(tm.shape, np.nan)
    r_at[~np.isfinite(tm)] = np.nan
    sm = sel[md]
    if P["cursor"] is not None and sm.any():
        j = np.clip(last[sm] - lo, 0, hi - lo - 1)
        have = last[sm] >= 0
        x0 = np.where(have, blk["range_m"][j], np.nan)
        tq = tm[sm]
        truth = P["cursor"].at(tq)
        seen = np.isfinite(tq) & np.isfinite(x0)
        dt = np.zeros(tq.size)
        dt[seen] = np.maximum(tq[seen] - blk["t_s"][j][seen], 0.0)
        with np.errstate(invalid="ignore"):
            r_pred, s_pred = M.predict_range(x0, blk["rate_mps"][j], blk["cov_rr_m2"][j],
                                             blk["cov_rv_m2ps"][j], blk["cov_vv_m2ps2"][j],
                                             dt, q)
            P["err"].add(np.where(seen, r_pred - truth, np.nan), s_pred,
                         M.zone_of(truth, P["edges"]))
    return r_at


def _robust_limits(values, pad=0.06, lower=0.0):
    v = np.concatenate([np.asarray(x, float).ravel() for x in values]) if values else np.zeros(0)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return None
    lo, hi = float(v.min()), float(v.max())
    if hi - lo < 1e-6:
        lo, hi = lo - 0.05, hi + 0.05
    span = hi - lo
    bottom = lo - pad * span
    if lower is not None:
        bottom = max(lower, bottom)
    return bottom, hi + pad * span


def _draw_track(data, dirs):
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch
    from matplotlib.patches import Rectangle
    from matplotlib.transforms import blended_transform_factory

    names = data["decision_names"]
    sensors = data["sensors"]
    have_truth = any(data["dirs"][d]["truth"] is not None for d in dirs)
    nd = len(dirs)
    h = FIGSIZE_IN[1] if nd <= 2 else FIGSIZE_IN[1] + 2.6 * (nd - 2)
    fig = _figure((FIGSIZE_IN[0], h))
    if have_truth:
        ratios = []
        for _ in dirs:
            ratios += [3.0, 1.15]
    else:
        ratios = [3.0] * nd + [1.0]
    axes = fig.subplots(len(ratios), 1, sharex=True, gridspec_kw={"height_ratios": ratios})
    axes = np.atleast_1d(axes)
    used_sensors, used_reasons = set(), set()
    any_other = any_smooth = any_restart = any_rug = False
    for di, d in enumerate(dirs):
        ax = axes[2 * di] if have_truth else axes[di]
        info = data["dirs"][d]
        ylim_vals = []
        # raw readings first, so the fused track is drawn over them
        for (dd, s, kind), arr in sorted(data["series"].items(), key=lambda kv: str(kv[0])):
            if dd != d or arr.shape[1] == 0:
                continue
            c = _colour(s)
            used_sensors.add(s)
            t, z = arr
            sname = sensors[s] if 0 <= s < len(sensors) else f"#{s}"
            gid = f"raw:{d}:{sname}:{kind if isinstance(kind, str) else names[kind]}"
            if kind == "fused":
                ax.plot(t, z, ls="none", marker="o", ms=_dot_size(t.size, 4.0, 2.2), mew=0,
                        color=c, alpha=0.75,
                        rasterized=True, zorder=2, gid=gid)
                ylim_vals.append(z)
            elif kind == "other":
                ax.plot(t, z, ls="none", marker="o", ms=_dot_size(t.size, 3.0, 1.6), mew=0,
                        color=OTHER_COLOUR, alpha=OTHER_ALPHA,
                        rasterized=True, zorder=1, gid=gid)
                any_other = True
                ylim_vals.append(z)
            elif names[kind] == "held":
                # exact repeats of a sample already drawn: tiny and faint, under the lines
                used_reasons.add(kind)
                ax.plot(t, z, ls="none", marker=REASON_MARKERS["held"],
                        ms=_dot_size(t.size, 2.0, 1.2), mfc="none", mew=0.4, color=c,
                        alpha=0.35, rasterized=True, zorder=1, gid=gid)
            else:
                mk = REASON_MARKERS.get(names[kind], _DEFAULT_MARKER)
                used_reasons.add(kind)
                # small and thin: hundreds of them (crosstalk) must not read as hatching
                ax.plot(t, z, ls="none", marker=mk, ms=_reject_size(t.size),
                        mfc="none", mew=0.5, color=c, alpha=0.6, rasterized=True, zorder=3,
                        gid=gid)
                ylim_vals.append(z)
        # rejected readings without a range: a strip along the top, one row per reason
        rug_rows = sorted({c for (dd, s, c) in data["rug"] if dd == d})
        tr = blended_transform_factory(ax.transData, ax.transAxes)
        for (dd, s, c), t in data["rug"].items():
            if dd != d or t.size == 0:
                continue
            row = rug_rows.index(c)
            y = np.full(t.shape, 0.975 - 0.035 * row)
            mk = REASON_MARKERS.get(names[c], _DEFAULT_MARKER)
            sname = sensors[s] if 0 <= s < len(sensors) else f"#{s}"
            ax.plot(t, y, ls="none", marker=mk, ms=4.0, mfc="none", mew=0.9, color=_colour(s),
                    alpha=0.9, transform=tr, rasterized=True, zorder=3, clip_on=False,
                    gid=f"rug:{d}:{sname}:{names[c]}")
            used_sensors.add(s)
            used_reasons.add(c)
            any_rug = True
        if rug_rows:
            # a lane of its own, shaded and labelled, so its marks do not read as ranges
            floor = 0.975 - 0.035 * (len(rug_rows) - 1) - 0.025
            ax.add_patch(Rectangle((0.0, floor), 1.0, 1.0 - floor, transform=ax.transAxes,
                                   facecolor="#f2f2f2", edgecolor="none", zorder=0.5,
                                   gid=f"rug-lane:{d}"))
            ax.plot([0, 1], [floor, floor], color="#bbbbbb", lw=0.6, zorder=0.6,
                    transform=ax.transAxes)
            ax.text(0.004, floor - 0.008, "no range \u2191", transform=ax.transAxes,
                    fontsize=6.5, color="#777777", va="top", ha="left", zorder=9)
        tb, lo, hi = info["fused_band"]
        if tb.size:
            ax.fill_between(tb, lo, hi, color=FUSED_COLOUR, alpha=BAND_ALPHA, lw=0, zorder=4,
                            gid=f"band:{d}")
            ylim_vals += [lo, hi]
        rt = info["restarts"]
        tl, vl = _break_at(*info["fused_line"], rt[0])
        if tl.size:
            ax.plot(tl, vl, color=FUSED_COLOUR, lw=1.4, zorder=5, gid=f"fused:{d}")
        if info["smooth"] is not None and info["smooth"][0].size:
            ax.plot(*_break_at(*info["smooth"], rt[0]), color=SMOOTH_COLOUR, lw=1.0,
                    ls=(0, (4, 2)), zorder=6, gid=f"smoothed:{d}")
            any_smooth = True
        if info["truth"] is not None and info["truth"][0].size:
            ax.plot(*info["truth"], color=TRUTH_COLOUR, lw=0.8, zorder=7, gid=f"truth:{d}")
            ylim_vals.append(info["truth"][1])
        if rt.shape[1]:
            ax.plot(rt[0], rt[1], ls="none", marker="|", ms=14, mew=1.6, color=FUSED_COLOUR,
                    zorder=8, gid=f"restart:{d}")
            any_restart = True
        lim = _robust_limits(ylim_vals)
        if lim is not None:
            # leave head room for the strip of readings without a range
            top = lim[1]
            if rug_rows:
                top += (0.06 + 0.035 * len(rug_rows)) * (lim[1] - lim[0])
            ax.set_ylim(lim[0], top)
        ax.set_ylabel(f"{d}: range (m)")
        ax.grid(True, color="#e4e4e4", lw=0.6)
        ax.set_axisbelow(True)
        cnt = data["counts"][d]
        total = int(cnt.sum())
        nf = int(sum(cnt[i] for i, nm in enumerate(names) if nm in D.NAMES[:D.FIRST_REJECT]))
        bit = f"{d}: {_n(total, 'reading')}, {100 * nf / total:.0f} % fused" if total else \
            f"{d}: no readings"
        if info["errors"] is not None:
            # the replay summary's number: every reading, the track predicted to its time
            bit += (f"; RMSE against truth {1e3 * info['errors']['rmse_m']:.1f} mm over "
                    f"{_n(info['errors']['n'], 'reading')}")
            if info["errors_smooth"] is not None:
                bit += f" (smoothed, at track rows: {1e3 * info['errors_smooth']['rmse_m']:.1f} mm)"
        nrej = total - nf
        if nrej:
            bit += f"; {nrej:,} rejected"
        ax.set_title(bit, loc="left", fontsize=9)
        if total == 0 and not tl.size:
            ax.text(0.5, 0.5, "no readings in this time range", transform=ax.transAxes,
                    ha="center", va="center", color="#777777")
        if have_truth:
            ex = axes[2 * di + 1]
            if info["err"] is not None:
                (te, ve), (tbe, loe, hie) = info["err"]
                if tbe.size:
                    ex.fill_between(tbe, loe, hie, color=FUSED_COLOUR, alpha=BAND_ALPHA, lw=0,
                                    gid=f"errband:{d}")
                if te.size:
                    ex.plot(te, ve, color=FUSED_COLOUR, lw=0.9, gid=f"error:{d}")
                ex.axhline(0.0, color=TRUTH_COLOUR, lw=0.7)
                # Scale to the bulk of the errors and the band, so a few wild excursions
                # (already plain in the range panel above) do not flatten the rest.
                ae = np.abs(ve[np.isfinite(ve)])
                be = hie[np.isfinite(hie)]
                if ae.size or be.size:
                    top = 1.3 * max(np.percentile(ae, 90) if ae.size else 0.0,
                                    np.percentile(be, 99) if be.size else 0.0, 1e-3)
                    big = float(ae.max()) if ae.size else 0.0
                    if big <= 2 * top:
                        top = max(top, 1.05 * big)   # mild excursions: just show them
                    ex.set_ylim(-top, top)
                    if big > top:
                        worst = float(ve[np.isfinite(ve)][np.argmax(ae)])
                        ex.text(0.995, 0.04, f"errors beyond the axis (largest {worst:+,.0f} "
                                "mm)", transform=ex.transAxes, ha="right", va="bottom",
                                fontsize=7.5, color="#555555")
            else:
                ex.text(0.5, 0.5, "no truth for this direction", transform=ex.transAxes,
                        ha="center", va="center", color="#777777")
            ex.set_ylabel("fused − truth\n(mm)")
            ex.grid(True, color="#e4e4e4", lw=0.6)
    if not have_truth:
        tx = axes[-1]
        tt, tv = data["temp"]
        if tt.size:
            tx.plot(tt, tv, color="#b03a2e", lw=1.0, gid="temp")
            lim = _robust_limits([tv], pad=0.15, lower=None)
            if lim is not None and lim[1] - lim[0] < 1.0:
                mid = 0.5 * (lim[0] + lim[1])
                lim = (mid - 0.5, mid + 0.5)
            tx.set_ylim(*lim)
        else:
            tx.text(0.5, 0.5, "no air temperature used (no echo ranger readings)",
                    transform=tx.transAxes, ha="center", va="center", color="#777777")
        tx.set_ylabel("air temp. used\n(°C)")
        tx.grid(True, color="#e4e4e4", lw=0.6)
    axes[-1].set_xlabel("time (s)")
    for ax in axes:
        # seconds as they are on the log's clock, not as an offset (+1.4999e2) on a short span
        ax.ticklabel_format(axis="x", style="plain", useOffset=False)
    if all(math.isfinite(x) for x in data["t_range"]):
        axes[-1].set_xlim(*data["t_range"])     # the span asked for, even where it is empty
    fig.align_ylabels(axes)
    # one legend for the whole figure, outside the axes on the right
    handles = []
    for s in sorted(used_sensors):
        label = sensors[s] if 0 <= s < len(sensors) else f"sensor #{s}"
        handles.append(Line2D([], [], ls="none", marker="o", ms=5, mew=0, color=_colour(s),
                              label=label))
    if any_other:
        handles.append(Line2D([], [], ls="none", marker="o", ms=5, mew=0, color=OTHER_COLOUR,
                              alpha=OTHER_ALPHA, label="other IR candidate"))
    for c in sorted(used_reasons):
        n_c = sum(int(data["counts"][d][c]) for d in dirs)
        label = (f"held repeat ({n_c:,}; small, faint)" if names[c] == "held" else
                 f"rejected: {names[c].replace('_', ' ')} ({n_c:,})")
        handles.append(Line2D([], [], ls="none", marker=REASON_MARKERS.get(names[c], "h"),
                              ms=6, mfc="none", mew=1.0, color="#444444", label=label))
    if any_rug:
        handles.append(Line2D([], [], ls="none", marker="",
                              label="(no range: on the top strip)"))
    handles.append(Line2D([], [], color=FUSED_COLOUR, lw=1.6, label="fused range"))
    handles.append(Patch(color=FUSED_COLOUR, alpha=BAND_ALPHA, lw=0, label="fused ±2σ"))
    if any_smooth:
        handles.append(Line2D([], [], color=SMOOTH_COLOUR, lw=1.2, ls=(0, (4, 2)),
                              label="smoothed range"))
    if have_truth:
        handles.append(Line2D([], [], color=TRUTH_COLOUR, lw=0.9, label="truth"))
    if any_restart:
        handles.append(Line2D([], [], ls="none", marker="|", ms=10, mew=1.6,
                              color=FUSED_COLOUR, label="track restarted"))
    fig.legend(handles=handles, loc="outside right upper", fontsize=8.5, frameon=False)
    total = sum(int(data["counts"][d].sum()) for d in dirs)
    thin = (f"\n(display thinned: 1 in {data['stride']} raw readings shown, lines keep their "
            "extremes; zoom in with --from/--to)" if data["stride"] > 1 else "")
    fig.suptitle(f"fused versus raw ranges: {data['title']}{data['range_text']} "
                 f"({_n(total, 'reading')}; {data.get('estimator', 'kalman')} estimator){thin}",
                 fontsize=10.5)
    _footer(fig)
    return fig


# --------------------------------------------------------------------------------------
# Consistency diagnostics
# --------------------------------------------------------------------------------------
def plot_diagnostics(track_path, out=None, direction=None, *, t_range=None,
                     max_points=200_000, run=None):
    """Consistency of the filter: innovations, NIS, their distribution and whiteness.

    One row of four panels per direction, from the readings the replay summary takes as
    NIS samples: fused (accepted or ambiguous) with a finite NIS; re-acquiring readings
    are left out, their NIS being against the track they overturned. The time-averaged
    NIS, its verdict and the Ljung-Box p-value are therefore the summary's:

    1. innovations over time with ±2√S, where √S = |innovation| / √NIS (the file stores
       no S); one colour per sensor;
    2. NIS over time with the chi-square (1 dof) 95 % interval, and its running mean over
       the last W readings with the 95 % bounds of a mean of W (Bar-Shalom et al. 2001,
       §5.4); the overall time-averaged NIS and its verdict are in the panel title;
    3. a histogram of normalised innovations sign(ν)·√NIS against the N(0, 1) density;
    4. their sample autocorrelation at the summary's lags (1..10) with ±1.96/√N, and
       the Ljung-Box p-value over those lags (Ljung & Box 1978).

    Parameters
    ----------
    track_path : str or path-like
        Track file written by `replay.run.run`.
    out : str or path-like, optional
        Figure file to write (format from its suffix).
    direction : str, optional
        Only this direction (default all).
    t_range : (float or None, float or None), optional
        Only readings with ``from <= t_s <= to``, seconds.
    max_points : int
        Upper bound on the points of any one plotted series.
    run : int, optional
        Which replayed log of a multi-log track file (default the first).

    Returns
    -------
    matplotlib.figure.Figure

    References
    ----------
    Y. Bar-Shalom, X. R. Li, T. Kirubarajan, *Estimation with Applications to Tracking and
    Navigation*, Wiley (2001), §5.4.

    Examples
    --------
    >>> fig = plot_diagnostics("dock.track.h5", out="dock-nis.png")      # doctest: +SKIP
    """
    from scipy.stats import chi2
    track_path = os.fspath(track_path)
    fmt = _out_format(out, [track_path])
    lo_t, hi_t = _t_range(t_range)
    max_points = _max_points(max_points)
    edges = np.linspace(-_HIST_LIMIT, _HIST_LIMIT, 41)
    with TrackFile(track_path) as tf:
        group = tf.run(run)
        dirs = tf.directions(direction)
        tf.check_time_range(group, lo_t, hi_t)
        dec = tf.decisions(group)
        dir_index = {tf.direction_names.index(d): d for d in dirs}
        n_all = dec["t_s"].shape[0]
        # pass 1: how many fused readings per direction, to size the running window
        nfused = {d: 0 for d in dirs}
        for a, b in tf.slices(n_all):
            m = _fused_sel(tf, dec, a, b, lo_t, hi_t)
            if m is None:
                continue
            dirn = tf.read(dec["direction"], a, b)[m]
            for i, d in dir_index.items():
                nfused[d] += int((dirn == i).sum())
        win = {d: int(min(500, max(10, nfused[d] // 25))) for d in dirs}
        st = {d: {"innov": {}, "bound": {}, "nis": _Stride(max_points), "run": _Stride(max_points),
                  "hist": np.zeros(edges.size - 1, np.int64), "beyond": 0,
                  "white": M.Whiteness(lags=_ACF_LAGS), "sum": 0.0, "n": 0,
                  "tail": np.zeros(0), "gated": 0, "reacq": 0} for d in dirs}
        gated_code = tf.decision_names.index("gated") if "gated" in tf.decision_names else -1
        for a, b in tf.slices(n_all):
            m = _fused_sel(tf, dec, a, b, lo_t, hi_t, gated_code=gated_code)
            if m is None:
                continue
            m, gated, reacq = m
            cols = {k: tf.read(dec[k], a, b) for k in
                    ("t_s", "direction", "sensor", "innovation_m", "nis")}
            for i, d in dir_index.items():
                S = st[d]
                S["gated"] += int((gated & (cols["direction"] == i)).sum())
                S["reacq"] += int((reacq & (cols["direction"] == i)).sum())
                md = m & (cols["direction"] == i)
                if not md.any():
                    continue
                t, s = cols["t_s"][md], cols["sensor"][md]
                nu, nis = cols["innovation_m"][md], cols["nis"][md]
                with np.errstate(divide="ignore", invalid="ignore"):
                    sqrt_s = np.where(nis > 0, np.abs(nu) / np.sqrt(nis), np.nan)
                for si in np.unique(s):
                    ms = s == si
                    S["innov"].setdefault(int(si), _Stride(max_points)).add(
                        t[ms], 1e3 * nu[ms])
                    # the bound as an envelope: its largest value per display bucket
                    S["bound"].setdefault(int(si), _Envelope(min(max_points, 4000))).add(
                        t[ms], 2e3 * sqrt_s[ms])
                S["nis"].add(t, nis)
                # running mean over the last W fused readings, carried across slices
                W = win[d]
                full = np.concatenate([S["tail"], nis])
                cs = np.concatenate([[0.0], np.cumsum(full)])
                k0 = S["tail"].size
                idx = np.arange(k0, full.size)
                ok = idx >= W - 1
                means = (cs[idx[ok] + 1] - cs[idx[ok] + 1 - W]) / W
                S["run"].add(t[ok], means)
                S["tail"] = full[-(W - 1):] if W > 1 else np.zeros(0)
                z = np.sign(nu) * np.sqrt(nis)
                S["hist"] += np.histogram(z[np.isfinite(z)], bins=edges)[0]
                S["beyond"] += int((np.abs(z) > _HIST_LIMIT).sum())
                S["white"].add(z)
                S["sum"] += float(nis.sum())
                S["n"] += int(nis.size)
        title = _run_label(tf, group, run)
        sensors = tf.sensor_names
    nd = len(dirs)
    fig = _figure((FIGSIZE_IN[0], max(4.6, 3.4 * nd + 0.9)))
    axes = np.atleast_2d(fig.subplots(nd, 4, gridspec_kw={"width_ratios": [2.3, 2.3, 1.2, 1.2]},
                                      squeeze=False))
    lo95, hi95 = chi2.ppf(0.025, 1), chi2.ppf(0.975, 1)
    from scipy.stats import norm
    for r, d in enumerate(dirs):
        S = st[d]
        ax_i, ax_n, ax_h, ax_a = axes[r]
        # 1. innovations with their own +-2 sqrt(S), per sensor
        bound_tops = []
        for si, strd in sorted(S["innov"].items()):
            t, nu = strd.result(2)
            c = _colour(si)
            sname = sensors[si] if 0 <= si < len(sensors) else f"#{si}"
            ax_i.plot(t, nu, ls="none", marker="o", ms=_dot_size(t.size, 3.5, 2.0), mew=0,
                      color=c, alpha=0.7,
                      rasterized=True, gid=f"innov:{d}:{sname}")
            tb, _, b2 = S["bound"][si].band()
            ok = np.isfinite(b2)
            bound_tops.append(b2[ok])
            # a shaded band, not lines: S changes from reading to reading as other
            # sensors' updates shrink P, and lines would zigzag into a solid smear
            ax_i.fill_between(tb[ok], -b2[ok], b2[ok], color=c, alpha=0.14, lw=0, zorder=1,
                              gid=f"innovband:{d}:{sname}")
            ax_i.plot([], [], ls="none", marker="o", ms=4, color=c,
                      label=sensors[si] if 0 <= si < len(sensors) else f"#{si}")
        from matplotlib.patches import Patch
        handles, labels = ax_i.get_legend_handles_labels()
        # one swatch per sensor, side by side: the bands are drawn in the sensors' colours
        handles.append(tuple(Patch(color=_colour(si), alpha=0.3, lw=0)
                             for si in sorted(S["innov"])) or Patch(color="#777777", alpha=0.3))
        labels.append("±2√S (each sensor's band)")
        ax_i.set_ylabel(f"{d}: innovation (mm)")
        ax_i.set_xlabel("time (s)")
        left_out = [f"{S[k]:,} {what}" for k, what in (("gated", "gated"),
                                                        ("reacq", "re-acquiring"))
                    if S[k]]
        note = f"\n({' and '.join(left_out)} readings not shown)" if left_out else "\n"
        ax_i.set_title(f"innovations of {S['n']:,} fused readings{note}", fontsize=9)
        if S["innov"]:
            # scale to the innovations, not to the bounds: an IR reading at the curve's
            # peak has a huge sigma that would flatten everything else
            nu_all = np.abs(np.concatenate([v.result(2)[1] for v in S["innov"].values()]))
            b_all = np.concatenate(bound_tops)
            nu_all, b_all = nu_all[np.isfinite(nu_all)], b_all[np.isfinite(b_all)]
            top = max([np.percentile(nu_all, 99.5) if nu_all.size else 0.0,
                       np.percentile(b_all, 75) if b_all.size else 0.0, 1e-3])
            ax_i.set_ylim(-1.35 * top, 1.35 * top)
            # below the axes, clear of the data
            from matplotlib.legend_handler import HandlerTuple
            ax_i.legend(handles, labels, fontsize=7.5, loc="upper center",
                        bbox_to_anchor=(0.5, -0.2), ncols=3, markerscale=1.0, frameon=False,
                        handler_map={tuple: HandlerTuple(ndivide=None, pad=0.0)})
        # 2. NIS and its running mean
        tn, nis = S["nis"].result(2)
        ax_n.plot(tn, np.maximum(nis, 1e-6), ls="none", marker="o",
                  ms=_dot_size(tn.size, 3.5, 1.8), mew=0,
                  color="#7a7a7a", alpha=0.6, rasterized=True, label="NIS", gid=f"nis:{d}")
        ax_n.axhspan(lo95, hi95, color="#3f9b5a", alpha=0.10, lw=0, label="χ²(1) 95 %",
                     gid=f"nis95:{d}")
        tr_, rm = S["run"].result(2)
        W = win[d]
        blo, bhi = M.nis_bounds(W)
        if tr_.size:
            ax_n.plot(tr_, rm, color=FUSED_COLOUR, lw=1.2, label=f"mean of last {W}",
                      gid=f"nisrun:{d}")
            ax_n.axhline(blo, color=FUSED_COLOUR, lw=0.8, ls="--", label="its 95 % bounds",
                         gid=f"nisrunlo:{d}")
            ax_n.axhline(bhi, color=FUSED_COLOUR, lw=0.8, ls="--", gid=f"nisrunhi:{d}")
        ax_n.set_yscale("log")
        ax_n.set_ylabel("NIS (dimensionless)")
        ax_n.set_xlabel("time (s)")
        mean = S["sum"] / S["n"] if S["n"] else math.nan
        lo_b, hi_b = M.nis_bounds(S["n"])
        verdict = M.consistency_verdict(mean, S["n"])
        # the numbers and wording of the replay summary (same readings, same format)
        ax_n.set_title(f"time-averaged NIS {mean:.3f} over {_n(S['n'], 'reading')}: {verdict}"
                       f"\n(95 % bounds {lo_b:.3f} to {hi_b:.3f})" if S["n"] else
                       "no fused readings\n", fontsize=9)
        if tn.size:
            # fit the axis to the points, the running mean and both chi-square intervals
            pos = nis[nis > 0]
            vals = [hi95, lo95] + ([float(pos.max()), float(pos.min())] if pos.size else [])
            if tr_.size:
                vals += [float(np.nanmax(rm)), blo, bhi]
            ax_n.set_ylim(max(1e-6, min(vals)) / 2.5, max(vals) * 2.5)
            ax_n.legend(fontsize=7.5, loc="upper center", bbox_to_anchor=(0.5, -0.2),
                        ncols=2, frameon=False)
        # 3. histogram of normalised innovations
        width = edges[1] - edges[0]
        if S["n"]:
            dens = S["hist"] / (S["n"] * width)
            ax_h.bar(edges[:-1], dens, width=width, align="edge", color="#8fa9c4",
                     edgecolor="white", lw=0.4, label="observed", gid=f"hist:{d}")
            ax_h.set_ylim(0, 1.3 * max(float(dens.max()), 0.4))
        xx = np.linspace(-_HIST_LIMIT, _HIST_LIMIT, 201)
        ax_h.plot(xx, norm.pdf(xx), color=TRUTH_COLOUR, lw=1.1, label="N(0, 1)",
                  gid=f"normal:{d}")
        ax_h.set_xlabel("normalised innovation (σ)")
        ax_h.set_ylabel("density (1/σ)")
        beyond = f"\n({S['beyond']:,} beyond ±{_HIST_LIMIT:g} not shown)" if S["beyond"] \
            else "\n"
        ax_h.set_title(f"distribution{beyond}", fontsize=9)
        ax_h.legend(fontsize=7.5, loc="upper left", frameon=False)
        # 4. autocorrelation
        w = S["white"].result()
        if w["rho"]:
            lags = np.arange(1, len(w["rho"]) + 1)
            ax_a.vlines(lags, 0, w["rho"], color=FUSED_COLOUR, lw=1.6)
            ax_a.plot(lags, w["rho"], ls="none", marker="o", ms=3.5, color=FUSED_COLOUR,
                      gid=f"acf:{d}")
            ax_a.axhline(w["bound"], color="#b03a2e", lw=0.8, ls="--", gid=f"acfbound:{d}",
                         label=f"±1.96/√N (N={w['n']:,})")
            ax_a.axhline(-w["bound"], color="#b03a2e", lw=0.8, ls="--")
            ax_a.axhline(0, color="#333333", lw=0.6)
            ax_a.set_title(f"whiteness, lags 1..{len(w['rho'])}\n(Ljung-Box p = "
                           f"{w['p']:.3g})", fontsize=9)
            ax_a.legend(fontsize=7.5, loc="upper right", frameon=False)
            top = max(0.1, 1.25 * max(abs(x) for x in w["rho"]), 1.6 * w["bound"])
            ax_a.set_ylim(-top, top)
        else:
            ax_a.text(0.5, 0.5, "too few readings", transform=ax_a.transAxes, ha="center",
                      va="center", color="#777777")
        ax_a.set_xlabel("lag (readings)")
        ax_a.set_ylabel("autocorrelation (1)")
        for ax in (ax_i, ax_n, ax_h, ax_a):
            ax.grid(True, color="#e4e4e4", lw=0.6)
            ax.set_axisbelow(True)
    if math.isfinite(lo_t) and math.isfinite(hi_t):
        for row in axes:
            for ax in row[:2]:
                ax.set_xlim(lo_t, hi_t)
    fig.suptitle(f"filter consistency: {title}{_range_text(lo_t, hi_t)}", fontsize=10.5)
    _footer(fig)
    if out is not None:
        _save(fig, out, fmt, [track_path])
    return fig


def _fused_sel(tf, dec, a, b, lo_t, hi_t, gated_code=None):
    """Rows of slice a:b that are fused, in the time range, with a usable NIS."""
    t = tf.read(dec["t_s"], a, b)
    sel = (t >= lo_t) & (t <= hi_t)
    if not sel.any():
        return None
    code = tf.read(dec["decision"], a, b).astype(np.int64)
    ncodes = tf.fused_code.size
    if code.size and (code.min() < 0 or code.max() >= ncodes):
        raise tf.error(f"decision code outside 0..{ncodes - 1}", field=dec["decision"].name)
    nis = tf.read(dec["nis"], a, b)
    # as the replay summary (replay.run `_accumulate`): fused readings with a finite NIS,
    # except re-acquiring ones, whose NIS is against the track they overturned
    reacq = tf.decision_names.index("reacquired") if "reacquired" in tf.decision_names else -1
    m = sel & tf.fused_code[code] & np.isfinite(nis) & (code != reacq)
    if gated_code is None:
        return m
    return m, sel & (code == gated_code), sel & (code == reacq)


# --------------------------------------------------------------------------------------
# Tuner convergence
# --------------------------------------------------------------------------------------
def plot_convergence(history, out=None, objective="innovations"):
    """The tuner's convergence: the objective and the parameters per iteration.

    Parameters
    ----------
    history : list of dict
        ``{"iteration": int, "loglik": float, "params": {name: value}}`` per iteration;
        ``loglik`` is the objective the tuner maximised.
    out : str or path-like, optional
        Figure file to write (format from its suffix).
    objective : {"innovations", "truth"}
        What ``loglik`` is, for the top panel's title and label: the innovations
        log-likelihood, or the track's log score against truth.

    Returns
    -------
    matplotlib.figure.Figure

    Raises
    ------
    InputError
        An empty history, or a record without ``iteration``, ``loglik`` or ``params``.

    Examples
    --------
    >>> history = [{"iteration": 0, "loglik": -120.0, "params": {"accel_psd": 0.5}},
    ...            {"iteration": 1, "loglik": -95.5, "params": {"accel_psd": 0.21}}]
    >>> fig = plot_convergence(history)
    >>> fig.axes[1].get_yscale()
    'log'
    """
    fmt = _out_format(out, [])
    if not isinstance(history, (list, tuple)) or not history:
        raise InputError("expected a non-empty list of iteration records", field="history")
    its, ll, params = [], [], {}
    for i, h in enumerate(history):
        if not isinstance(h, dict):
            raise InputError("expected a dict with iteration, loglik and params",
                             field=f"history[{i}]")
        for key in ("iteration", "loglik", "params"):
            if key not in h:
                raise InputError(f"missing key {key!r}", field=f"history[{i}]")
        try:
            its.append(int(h["iteration"]))
            ll.append(float(h["loglik"]))
        except (TypeError, ValueError):
            raise InputError("iteration must be an integer and loglik a number",
                             field=f"history[{i}]") from None
        if not isinstance(h["params"], dict):
            raise InputError("params must be a dict of name -> value",
                             field=f"history[{i}].params")
        for name, v in h["params"].items():
            try:
                v = float(v)
            except (TypeError, ValueError):
                raise InputError(f"expected a number, got {v!r}",
                                 field=f"history[{i}].params.{name}") from None
            params.setdefault(str(name), ([], []))
            params[str(name)][0].append(its[-1])
            params[str(name)][1].append(v)
    its = np.array(its)
    ll = np.array(ll)
    fig = _figure()
    ax_l, ax_p = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [1, 1.3]})
    ax_l.plot(its, ll, color=FUSED_COLOUR, marker="o", ms=3, lw=1.2, gid="loglik")
    fin = np.isfinite(ll)
    if fin.any():
        best = int(np.flatnonzero(fin)[np.argmax(ll[fin])])
        ax_l.axvline(its[best], color="#999999", lw=0.8, ls="--")
        ax_l.text(0.99, 0.05, f"best {ll[best]:.6g} at iteration {its[best]}",
                  transform=ax_l.transAxes, ha="right", va="bottom", fontsize=8.5,
                  bbox=dict(facecolor="white", edgecolor="none", alpha=0.8))
    # the panel is titled by what it plots: the truth objective maximises a log score
    # against truth, which is no likelihood of the readings
    truth = objective == "truth"
    ax_l.set_ylabel("log score (nats)" if truth else "log-likelihood (nats)")
    ax_l.set_title("log score against truth" if truth else "innovations log-likelihood",
                   fontsize=9.5)
    positive = all(np.all(np.asarray(v) > 0) for _, v in params.values())
    units = {name: _param_unit(name) for name in params}
    ends = []
    for j, (name, (x, v)) in enumerate(params.items()):
        c = _colour(j)
        unit = units[name]
        ax_p.plot(x, v, color=c, marker="o", ms=2.5, lw=1.1,
                  label=f"{name} ({unit if unit is not None else 'unit ?'})",
                  gid=f"param:{name}")
        ends.append((x[-1], v[-1], c, name))
    if params:
        ax_p.set_yscale("log" if positive else "symlog")
        ax_p.legend(fontsize=8, loc="best", frameon=False)
    ax_p.margins(x=0.12)   # room for the final values written at the right end
    known = all(u is not None for u in units.values())
    ax_p.set_ylabel("parameter value\n(unit after each name)" if known else
                    "parameter value\n(unit after each name; ? = not known)")
    _end_labels(fig, ax_p, ends)
    ax_p.set_xlabel("iteration")
    ax_p.set_title("noise parameters" + ("" if positive else " (symmetric log scale)"),
                   fontsize=9.5)
    for ax in (ax_l, ax_p):
        ax.grid(True, color="#e4e4e4", lw=0.6)
    fig.suptitle("tuner convergence", fontsize=10.5)
    _footer(fig)
    if out is not None:
        _save(fig, out, fmt, [])
    return fig


# Units of the tuner's parameters, by the last part of their name ("sensor.<unit>.<key>").
PARAM_UNITS = {"accel_psd": "m²/s³", "volts_sigma": "V", "sigma_m": "m", "sigma_frac": "1",
               "latency_s": "s"}


def _param_unit(name):
    return PARAM_UNITS.get(str(name).rsplit(".", 1)[-1])


def _end_labels(fig, ax, ends, fontsize=8.0):
    """Final values written right of each line's last point, spread apart vertically so
    no two overlap (a thin leader joins a moved label to its point)."""
    if not ends:
        return
    fig.canvas.draw()     # the layout and the axis limits the labels are placed against
    # Room for the labels inside the axes (they are placed after the layout, which would
    # not make room for them: the widest was cut at the figure's edge).
    renderer = fig.canvas.get_renderer()
    probe = ax.text(0, 0, max((f"{v:.4g}" for _, v, _, _ in ends), key=len),
                    fontsize=fontsize, transform=None)
    need_px = probe.get_window_extent(renderer).width + 8 * fig.dpi / 72.0 + 4
    probe.remove()
    x0, x1 = ax.get_xlim()
    box = ax.get_window_extent(renderer)
    x_last = max(x for x, _, _, _ in ends)
    room_px = (x1 - x_last) / (x1 - x0) * box.width
    if room_px < need_px and box.width > need_px:
        # solve for the new right limit that leaves need_px after the last point
        per_px = (x_last - x0) / (box.width - need_px)
        ax.set_xlim(x0, x_last + need_px * per_px)
        fig.canvas.draw()
    y = np.array([ax.transData.transform((x, v))[1] for x, v, _, _ in ends])
    gap = 1.3 * fontsize * fig.dpi / 72.0          # one line of text, in pixels
    order = np.argsort(y)
    # clusters of labels closer than `gap`, each centred on the mean of its points
    groups = [[i] for i in order]
    while True:
        pos = []
        for g in groups:
            c = float(np.mean(y[g]))
            pos.append(c - gap * (len(g) - 1) / 2 + gap * np.arange(len(g)))
        for k in range(len(groups) - 1):
            if pos[k + 1][0] - pos[k][-1] < gap:
                groups[k:k + 2] = [groups[k] + groups[k + 1]]
                break
        else:
            break
    want = np.empty(len(ends))
    for g, p in zip(groups, pos):
        want[g] = p
    for i, (x, v, c, name) in enumerate(ends):
        dy = (want[i] - y[i]) * 72.0 / fig.dpi
        moved = abs(dy) > 0.5
        ax.annotate(f"{v:.4g}", (x, v), xytext=(8, dy), textcoords="offset points",
                    fontsize=fontsize, color=c, va="center", gid=f"end:{name}",
                    arrowprops=dict(arrowstyle="-", color=c, lw=0.5,
                                    shrinkA=0, shrinkB=1) if moved else None)


# --------------------------------------------------------------------------------------
# Command line
# --------------------------------------------------------------------------------------
def register(sub):
    import argparse
    p = sub.add_parser(
        "plot", help="draw fused versus raw tracks, or the filter's consistency diagnostics",
        description="Draw a figure from a track file written by `rangefuse replay`: fused "
                    "versus raw tracks per direction (--kind track), or innovations, NIS, "
                    "their distribution and whiteness (--kind diagnostics). The format "
                    "follows the suffix of -o (.png, .pdf, .svg).",
        epilog="examples:\n  rangefuse plot dock.track.h5 -o dock.png\n"
               "  rangefuse plot dock.track.h5 -o dock-nis.png --kind diagnostics "
               "--direction front --from 10 --to 70",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("track", metavar="TRACK", help="track file (HDF5) from `rangefuse replay`")
    p.add_argument("-o", "--out", "--output", dest="out", required=True, metavar="FIG",
                   help="figure file to write (.png, .pdf, .svg, ...)")
    p.add_argument("--kind", choices=("track", "diagnostics"), default="track",
                   help="which figure (default track)")
    p.add_argument("--direction", metavar="D", help="only this direction (default all)")
    p.add_argument("--from", dest="t_from", type=float, metavar="S",
                   help="start time, seconds on the log's clock")
    p.add_argument("--to", dest="t_to", type=float, metavar="S",
                   help="end time, seconds on the log's clock")
    p.add_argument("--run", type=int, metavar="I",
                   help="which log of a multi-log track file (default 0)")
    p.add_argument("--max-points", type=int, default=200_000, metavar="N",
                   help="at most N points per plotted series (default 200000)")
    p.set_defaults(func=_main)


def _main(args) -> int:
    t_range = None
    if args.t_from is not None or args.t_to is not None:
        t_range = (args.t_from, args.t_to)
    kw = dict(out=args.out, direction=args.direction, t_range=t_range,
              max_points=args.max_points, run=args.run)
    if args.kind == "diagnostics":
        plot_diagnostics(args.track, **kw)
    else:
        plot_track(args.track, **kw)
    print(f"figure: {args.out}")
    return 0
