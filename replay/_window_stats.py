"""One pass over a replay window's decisions: the counts, sums and track rows that
`replay.run._accumulate` folds into the running diagnostics.

Compiled with numba: the same work done with numpy takes a masked copy of a dozen
columns per direction and per sensor, which cost more than the estimator itself.

The results are the floats the numpy code gave, to the bit:

* sums by zone, sensor or direction are accumulated in reading order starting from 0.0
  per window, which is what ``np.bincount(..., weights=w)`` does;
* what numpy sums pairwise (``ndarray.sum``, ``np.nansum``: the NIS and log-likelihood
  totals) and the whiteness sequence are not summed here: the kernel packs the values,
  in order, into ``vals`` and the caller sums them with numpy;
* the truth range is the caller's `interp` (`replay.run._truth_interp`: numpy's
  `np.interp`, over the whole window, faster than a loop compiled here); the
  prediction is `replay.metrics.predict_range`'s operations in its order, with its
  ``dt ** 3`` taken by numpy (which may use a vector library for it) between two kernels;
* no fast-math: numba then keeps every multiply and add as written (no fused
  multiply-add).

The kernels let go of the GIL, so the track writer's thread runs meanwhile.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

from fusion import decisions as D

__all__ = ["WindowStats", "TRACK_F", "TRACK_I", "V_NIS", "V_WHITE", "V_LOGLIK", "D_NIS_N",
           "D_FUSED", "D_AMB", "D_AMB_UNRESOLVED", "D_REACQ", "D_BRANCH_N", "D_BRANCH_OK"]

# rows of WindowStats.track_f: the float track columns, in replay.run's _TRACK_COLS order
TRACK_F = ("t_s", "range_m", "sigma_m", "rate_mps", "rate_sigma_mps", "cov_rr_m2",
           "cov_rv_m2ps", "cov_vv_m2ps2", "p_major")
TRACK_I = ("n_hypotheses", "flags")  # rows of WindowStats.track_i (int8)
# rows of WindowStats.vals: values packed in reading order for numpy to sum
V_NIS = 0      # NIS of each NIS sample (fused, finite, not re-acquiring)
V_WHITE = 1    # sign(innovation) sqrt(NIS) of the same readings: the whiteness sequence
V_LOGLIK = 2   # log-likelihood of each fused reading, NaN as 0 (what np.nansum adds)
# columns of WindowStats.d_int, per direction
D_NIS_N, D_FUSED, D_AMB, D_AMB_UNRESOLVED, D_REACQ, D_BRANCH_N, D_BRANCH_OK = range(7)
# An error-sum block is a (6, 3) array: rows n, s1, s2, worst, nees, cover2 (the fields
# of replay.metrics.ErrorStats, see its add_sums), columns the zones near, overlap, far.


class WindowStats:
    """What `window_stats` needs for one log (the rig's and the truth's arrays) and its
    output arrays, kept from window to window (fresh multi-megabyte arrays per window
    cost page faults) and grown when a window is larger.

    `truths` maps each direction to ``(t_s, range_m)`` (finite, time-ordered, see
    `replay.run._clean_truth`) or None; `edges` to `replay.metrics.zone_edges`;
    ``interp(truth, t)`` is the truth range at times `t`.
    """

    def __init__(self, rig, names, dirs, truths, edges, interp):
        nd, ns = len(dirs), len(names)
        self.has_truth = np.array([truths[d] is not None for d in dirs])
        self.any_truth = bool(self.has_truth.any())
        self.truths = [truths[d] for d in dirs]
        self.interp = interp
        self.edge_near = np.array([edges[d][0] for d in dirs], float)
        self.edge_far = np.array([edges[d][1] for d in dirs], float)
        self.is_ir = np.array([rig.sensors[n].kind == "triangulation" for n in names])
        self.flag_bits = np.array(list(D.FLAG_NAMES), np.int64)
        self.amb_below = float(rig.estimator.ambiguous_below)
        self.accel_psd = float(rig.estimator.accel_psd)
        # small per-window results, cleared by the kernel on every call
        self.counts = np.zeros((ns, len(D.NAMES)), np.int64)
        self.s_nis = np.zeros(ns)
        self.s_nisn = np.zeros(ns, np.int64)
        self.s_flag = np.zeros((ns, len(D.FLAG_NAMES)), np.int64)
        self.fb_lo = np.zeros(ns)
        self.fb_hi = np.zeros(ns)
        self.d_int = np.zeros((nd, 7), np.int64)
        self.err = np.zeros((nd, 6, 3))
        self.raw_err = np.zeros((nd, ns, 6, 3))
        self.cap = -1
        self._grow(0)

    def _grow(self, n):
        if n <= self.cap:
            return
        nd = self.d_int.shape[0]
        cap = self.cap = max(n, 1024)
        self.track_f = np.empty((nd, len(TRACK_F), cap))
        self.track_i = np.empty((nd, len(TRACK_I), cap), np.int8)
        self.vals = np.empty((nd, 3, cap))
        m = cap if self.any_truth else 0
        self.truth_at = np.full((nd, m), np.nan)  # rows of directions with no truth stay NaN
        self.dt = np.empty(m)
        self.dt3 = np.empty(m)

    def run(self, b, t_first, t_last, n_t, gap_s, gap_from):
        """Fold the window `b` (a `fusion.fuser.StepBatch` in time order) into this
        object's per-window arrays; the per-sensor time arrays are updated in place."""
        n = len(b)
        self._grow(n)
        # Whole buffers go to the kernels, not slices: one array layout, so numba
        # compiles (or loads) each kernel once.
        dt, dt3, truth_at = self.dt, self.dt3, self.truth_at
        if self.any_truth:
            for di, tr in enumerate(self.truths):
                if tr is not None:
                    truth_at[di, :n] = self.interp(tr, b.t_meas_s)
            _prediction_dt(b.t_meas_s, b.t_state_s, b.state, dt)
            np.power(dt[:n], 3, out=dt3[:n])  # metrics.predict_range's dt ** 3, by numpy
        window_stats(b.sensor, b.direction, b.code, b.flags, b.nis, b.innovation_m, b.loglik,
                     b.z_m, b.sigma_m, b.branch, b.state, b.t_s, b.t_meas_s, b.t_state_s,
                     b.p_major, b.n_hyp,
                     truth_at, dt, dt3, self.accel_psd, self.has_truth,
                     self.edge_near, self.edge_far, self.is_ir,
                     self.flag_bits, D.FLAG_TEMP_FALLBACK, D.FIRST_REJECT, D.AMBIGUOUS,
                     D.REACQUIRED, self.amb_below,
                     t_first, t_last, n_t, gap_s, gap_from,
                     self.counts, self.s_nis, self.s_nisn, self.s_flag, self.fb_lo, self.fb_hi,
                     self.d_int, self.err, self.raw_err, self.track_f, self.track_i, self.vals)


@njit(cache=True, nogil=True)
def _prediction_dt(t_meas, t_state, state, dt):
    """How far ahead of its state each reading is scored: ``max(t_meas - t_state, 0)``
    where the reading has a time and a state, else 0 (as `replay.run` did it in numpy)."""
    for i in range(t_meas.size):
        if math.isfinite(t_meas[i]) and math.isfinite(state[i, 0]):
            d = t_meas[i] - t_state[i]
            dt[i] = d if (d >= 0.0 or math.isnan(d)) else 0.0  # np.maximum keeps NaN
        else:
            dt[i] = 0.0


@njit(cache=True, nogil=True)
def _add_err(acc, zone, err, sigma):
    """One reading into an error-sum block, as `replay.metrics.ErrorStats.add` counts it
    (a reading with no finite error or no positive sigma is not counted)."""
    if not (math.isfinite(err) and math.isfinite(sigma) and sigma > 0):
        return
    ae = abs(err)
    acc[0, zone] += 1.0
    acc[1, zone] += err
    acc[2, zone] += err * err
    if ae > acc[3, zone]:
        acc[3, zone] = ae
    q = err / sigma
    acc[4, zone] += q * q
    if ae <= 2 * sigma:
        acc[5, zone] += 1.0


@njit(cache=True, nogil=True)
def window_stats(sensor, direction, code, flags, nis, innov, loglik, z, sig, branch, state,
                 t_s, t_meas, t_state, p_major, n_hyp,
                 truth_at, dt, dt3, accel_psd, has_truth, edge_near, edge_far, is_ir,
                 flag_bits, fb_bit, first_reject, code_amb, code_reacq, amb_below,
                 t_first, t_last, n_t, gap_s, gap_from,
                 counts, s_nis, s_nisn, s_flag, fb_lo, fb_hi, d_int, err, raw_err,
                 track_f, track_i, vals):
    """Fold one window's decisions (in processing order) into per-window sums.

    Per sensor: decision counts, NIS sum and count, flag counts, and, carried across
    windows in `t_first` .. `gap_from` (updated in place), the reading times: first,
    last, count, and the longest gap with its start; `fb_lo`/`fb_hi` the span of the
    readings decoded with a fallback air temperature (NaN if none). Per direction:
    `d_int` counts, the track rows of the fused readings (`track_f`, `track_i`,
    ``d_int[:, D_FUSED]`` rows), the values to sum in `vals`, and with truth the error
    sums `err` (the estimate predicted to each reading's time, `dt` ahead of its state,
    against `truth_at` there) and `raw_err` (each fused reading's own range, by sensor).
    """
    n = code.size
    counts[:] = 0
    s_nis[:] = 0.0
    s_nisn[:] = 0
    s_flag[:] = 0
    fb_lo[:] = np.nan
    fb_hi[:] = np.nan
    d_int[:] = 0
    err[:] = 0.0
    raw_err[:] = 0.0
    nf = flag_bits.size
    nd = d_int.shape[0]
    for i in range(n):
        s = sensor[i]
        d = direction[i]
        c = code[i]
        f = flags[i]
        acc = c < first_reject
        nis_ok = acc and math.isfinite(nis[i]) and c != code_reacq

        # --- per sensor
        counts[s, c] += 1
        if nis_ok:
            s_nis[s] += nis[i]
            s_nisn[s] += 1
        for j in range(nf):
            if f & flag_bits[j]:
                s_flag[s, j] += 1
        t = t_s[i]
        if math.isfinite(t):
            if math.isfinite(t_last[s]):
                gap = t - t_last[s]
                if gap > gap_s[s]:  # the first of the longest gaps
                    gap_s[s] = gap
                    gap_from[s] = t_last[s]
            else:
                t_first[s] = t  # the sensor's first finite time (t_last was unset)
            t_last[s] = t
            n_t[s] += 1
            if f & fb_bit:
                if not (t >= fb_lo[s]):  # NaN (none yet) or lower
                    fb_lo[s] = t
                if not (t <= fb_hi[s]):
                    fb_hi[s] = t
        if not 0 <= d < nd:
            continue  # a reading of no direction counts only for its sensor

        # --- per direction
        if nis_ok:
            k = d_int[d, D_NIS_N]
            vals[d, V_NIS, k] = nis[i]
            y = innov[i]
            sgn = 1.0 if y > 0 else (-1.0 if y < 0 else (0.0 if y == 0 else np.nan))  # np.sign
            vals[d, V_WHITE, k] = sgn * np.sqrt(nis[i])
            d_int[d, D_NIS_N] = k + 1
        if acc:
            k = d_int[d, D_FUSED]
            ll = loglik[i]
            vals[d, V_LOGLIK, k] = 0.0 if math.isnan(ll) else ll
            track_f[d, 0, k] = t_state[i]
            track_f[d, 1, k] = state[i, 0]
            track_f[d, 2, k] = np.sqrt(state[i, 2])
            track_f[d, 3, k] = state[i, 1]
            track_f[d, 4, k] = np.sqrt(state[i, 4])
            track_f[d, 5, k] = state[i, 2]
            track_f[d, 6, k] = state[i, 3]
            track_f[d, 7, k] = state[i, 4]
            track_f[d, 8, k] = p_major[i]
            tf = 0
            if p_major[i] < amb_below:
                tf |= 1   # TRACK_MULTIMODAL
            if c == code_reacq:
                tf |= 2   # TRACK_REACQUIRED
            if f & fb_bit:
                tf |= 4   # TRACK_TEMP_FALLBACK
            track_i[d, 0, k] = n_hyp[i]
            track_i[d, 1, k] = tf
            d_int[d, D_FUSED] = k + 1
            if math.isfinite(z[i, 1]) and math.isfinite(z[i, 0]):
                d_int[d, D_AMB] += 1
                if c == code_amb:
                    d_int[d, D_AMB_UNRESOLVED] += 1
        if c == code_reacq:
            d_int[d, D_REACQ] += 1

        # --- against truth: every reading of the direction, fused or not
        if not has_truth[d]:
            continue
        tr = truth_at[d, i]
        zone = 1  # replay.metrics.zone_of
        if tr < edge_near[d]:
            zone = 0
        if tr > edge_far[d]:
            zone = 2
        # replay.metrics.predict_range, its operations in its order
        h = dt[i]
        r_pred = state[i, 0] + state[i, 1] * h
        var = state[i, 2] + 2.0 * h * state[i, 3] + h * h * state[i, 4] + accel_psd * dt3[i] / 3.0
        seen = math.isfinite(t_meas[i]) and math.isfinite(state[i, 0])
        _add_err(err[d], zone, r_pred - tr if seen else np.nan, np.sqrt(var))
        near = branch[i] == 1
        if is_ir[s] and tr < edge_near[d] and acc and branch[i] >= 0:
            d_int[d, D_BRANCH_N] += 1
            if near:
                d_int[d, D_BRANCH_OK] += 1
        b = 1 if near else 0  # the candidate the reading was fused as
        _add_err(raw_err[d, s], zone, z[i, b] - tr if acc else np.nan, sig[i, b])
