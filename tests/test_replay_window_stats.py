"""The replay's compiled diagnostics (`replay._window_stats`, through `replay.run`'s
`_accumulate`) give the floats the plain numpy version gives, bit for bit.

Reference: the numpy version the kernel replaced (`_numpy_accumulate` below: masked
copies per direction and sensor, `np.bincount` sums by zone, `np.interp` for the truth,
`replay.metrics.predict_range`, `ErrorStats.add`, `Whiteness.add`), on random windows
that hold every case a window can: rejected and re-acquiring readings, NaN times, NIS,
states and candidates, zero sigmas, readings before and after the truth, a direction
without truth, a sensor that stays silent for windows. Common practice (a rewrite
checked against the code it replaces), no source.
"""
from __future__ import annotations

import math
import os

import numpy as np
import pytest

import replay.run as R
from fusion import decisions as D
from fusion.fuser import StepBatch
from fusion.rig import Rig
from replay import _window_stats as W
from replay import metrics as M

DATA = os.path.join(os.path.dirname(__file__), "..", "datasets")


# ------------------------------------------------------------------ the numpy reference
def _add_times(st, t, fallback):
    ok = np.isfinite(t)
    t, fallback = t[ok], fallback[ok]
    if not t.size:
        return
    ts = np.concatenate([[st.t_last], t]) if np.isfinite(st.t_last) else t
    if ts.size > 1:
        d = np.diff(ts)
        k = int(np.argmax(d))
        if d[k] > st.gap_s:
            st.gap_s, st.gap_from_s = float(d[k]), float(ts[k])
    if not np.isfinite(st.t_first):
        st.t_first = float(t[0])
    st.t_last = float(t[-1])
    st.n_t += t.size
    if fallback.any():
        st._fallback_span(float(t[fallback].min()), float(t[fallback].max()))


def _numpy_accumulate(b, names, dirs, rig, truths, edges, sstats, dstats, rows):
    code = b.code
    ns, nc = len(names), len(D.NAMES)
    acc = code < D.FIRST_REJECT
    nis_ok = acc & np.isfinite(b.nis) & (code != D.REACQUIRED)
    nis0 = np.where(nis_ok, b.nis, 0.0)
    counts = np.bincount(b.sensor.astype(np.int64) * nc + code, minlength=ns * nc).reshape(ns, nc)
    s_nis = np.bincount(b.sensor, weights=nis0, minlength=ns)
    s_nisn = np.bincount(b.sensor, weights=nis_ok, minlength=ns)
    s_flag = {bit: np.bincount(b.sensor, weights=(b.flags & bit) != 0, minlength=ns)
              for bit in D.FLAG_NAMES}
    fb_flag = (b.flags & D.FLAG_TEMP_FALLBACK) != 0
    for si, name in enumerate(names):
        st = sstats[name]
        ms = b.sensor == si
        if ms.any():
            _add_times(st, b.t_s[ms], fb_flag[ms])
        st.counts += counts[si]
        st.nis_sum += float(s_nis[si])
        st.nis_n += int(s_nisn[si])
        for bit, fname in D.FLAG_NAMES.items():
            c = int(s_flag[bit][si])
            if c:
                st.flag_counts[fname] = st.flag_counts.get(fname, 0) + c
    near = b.branch == 1
    zsel = np.where(near, b.z_m[:, 1], b.z_m[:, 0])
    ssel = np.where(near, b.sigma_m[:, 1], b.sigma_m[:, 0])
    is_ir = np.array([rig.sensors[n].kind == "triangulation" for n in names])[b.sensor]
    for di, d in enumerate(dirs):
        m = b.direction == di
        ds = dstats[d]
        am = m & acc
        fin = m & nis_ok
        ds.nis_sum += float(nis0[fin].sum())
        ds.nis_n += int(fin.sum())
        ds.loglik += float(np.nansum(b.loglik[am]))
        ds.white.add(np.sign(b.innovation_m[fin]) * np.sqrt(b.nis[fin]))
        two = am & np.isfinite(b.z_m[:, 1]) & np.isfinite(b.z_m[:, 0])
        ds.amb_readings += int(two.sum())
        ds.amb_unresolved += int((two & (code == D.AMBIGUOUS)).sum())
        ds.reacquired += int((m & (code == D.REACQUIRED)).sum())
        x = b.state[am]
        ca = code[am]
        tflags = (np.where(b.p_major[am] < rig.estimator.ambiguous_below, R.TRACK_MULTIMODAL, 0)
                  | np.where(ca == D.REACQUIRED, R.TRACK_REACQUIRED, 0)
                  | np.where((b.flags[am] & D.FLAG_TEMP_FALLBACK) != 0,
                             R.TRACK_TEMP_FALLBACK, 0))
        rows[d].append(dict(t_s=b.t_state_s[am], range_m=x[:, 0], sigma_m=np.sqrt(x[:, 2]),
                            rate_mps=x[:, 1], rate_sigma_mps=np.sqrt(x[:, 4]),
                            cov_rr_m2=x[:, 2], cov_rv_m2ps=x[:, 3], cov_vv_m2ps2=x[:, 4],
                            p_major=b.p_major[am], n_hypotheses=b.n_hyp[am],
                            flags=tflags.astype(np.int8)))
        if truths[d] is None:
            continue
        im = np.flatnonzero(m)
        tm = b.t_meas_s[im]
        trm = R._truth_interp(truths[d], tm)
        zone = M.zone_of(trm, edges[d])
        xs = b.state[im]
        seen = np.isfinite(tm) & np.isfinite(xs[:, 0])
        dtp = np.zeros(len(im))
        dtp[seen] = np.maximum(tm[seen] - b.t_state_s[im][seen], 0.0)
        r_pred, s_pred = M.predict_range(xs[:, 0], xs[:, 1], xs[:, 2], xs[:, 3], xs[:, 4], dtp,
                                         rig.estimator.accel_psd)
        ds.err.add(np.where(seen, r_pred - trm, np.nan), s_pred, zone)
        below = is_ir[im] & (trm < edges[d][0]) & acc[im] & (b.branch[im] >= 0)
        ds.branch_n += int(below.sum())
        ds.branch_ok += int((below & near[im]).sum())
        err_raw = np.where(acc[im], zsel[im] - trm, np.nan)
        sens = b.sensor[im]
        for si in np.unique(sens):
            ms = sens == si
            sstats[names[si]].raw_err.add(err_raw[ms], ssel[im][ms], zone[ms])


# ------------------------------------------------------------------ random windows
def _window(rng, rig, names, t0, n, silent=()):
    """A time-ordered window as `Fuser.process(...).in_time_order()` returns it."""
    ns = len(names)
    dir_of = np.array([rig.directions.index(rig.sensors[s].direction) for s in names])
    alive = np.array([i for i in range(ns) if names[i] not in silent])
    sensor = rng.choice(alive, n)
    t_s = np.sort(t0 + rng.random(n) * 2.0)
    t_s[rng.random(n) < 0.02] = np.nan
    code = rng.choice(len(D.NAMES), n, p=_code_p())
    acc = code < D.FIRST_REJECT
    nis = np.where(acc, rng.chisquare(1, n), np.nan)
    nis[rng.random(n) < 0.03] = np.nan
    innov = np.where(np.isfinite(nis), rng.normal(0, 0.02, n), np.nan)
    innov[rng.random(n) < 0.01] = 0.0
    z = np.stack([rng.uniform(0.05, 3.0, n), np.where(rng.random(n) < 0.3,
                                                       rng.uniform(0.02, 0.1, n), np.nan)], 1)
    z[rng.random(n) < 0.02, 0] = np.nan
    sig = np.abs(rng.normal(0.01, 0.01, (n, 2)))
    sig[rng.random(n) < 0.02, 0] = 0.0
    branch = np.where(acc, rng.choice([0, 1], n), -1).astype(np.int8)
    branch[np.isnan(z[:, 1]) & (branch == 1)] = 0
    state = np.stack([rng.uniform(0.02, 3.0, n), rng.normal(0, 0.3, n),
                      rng.uniform(1e-6, 1e-3, n), rng.normal(0, 1e-5, n),
                      rng.uniform(1e-4, 1e-2, n)], 1)
    state[rng.random(n) < 0.02] = np.nan
    latency = 0.01 * (sensor % 2)
    t_meas = t_s - latency
    t_state = np.where(acc, t_meas, t_meas - rng.uniform(0, 0.2, n))
    ahead = rng.random(n) < 0.02
    t_state[ahead] = t_meas[ahead] + 0.05  # a state newer than the reading: scored at dt 0
    t_state[rng.random(n) < 0.01] = np.nan
    return StepBatch(
        order=np.arange(n), row=np.arange(n), raw_m=z[:, 0], temp_c=np.full(n, 20.0),
        branch_prob=np.ones(n), sensor=sensor.astype(np.int64), direction=dir_of[sensor].astype(np.int64),
        code=code.astype(np.int8), flags=rng.choice([0, 0, 0, 1, 2, 3, 4, 5, 7], n).astype(np.int16),
        nis=nis, innovation_m=innov, loglik=np.where(rng.random(n) < 0.05, np.nan,
                                                     rng.normal(-2, 1, n)),
        z_m=z, sigma_m=sig, branch=branch, state=state, t_s=t_s, t_meas_s=t_meas,
        t_state_s=t_state, p_major=np.where(rng.random(n) < 0.02, np.nan,
                                            rng.uniform(0.5, 1.0, n)),
        n_hyp=rng.integers(1, 5, n).astype(np.int8))


def _code_p():
    p = np.full(len(D.NAMES), 0.02)
    p[D.ACCEPTED], p[D.AMBIGUOUS], p[D.REACQUIRED] = 0.5, 0.15, 0.03
    return p / p.sum()


class _Rows:
    def __init__(self):
        self.parts = []

    def append(self, **cols):  # copies, as _Appender does: the columns are reused buffers
        self.parts.append({k: np.array(v) for k, v in cols.items()})


def _same(a, b, where):
    a, b = np.asarray(a), np.asarray(b)
    assert a.shape == b.shape and a.dtype.kind == b.dtype.kind, where
    if a.dtype.kind == "f":
        assert np.array_equal(a, b, equal_nan=True), where
    else:
        assert np.array_equal(a, b), where


def _same_stats(x, y, where):
    for k, v in vars(x).items():
        w = vars(y)[k]
        if isinstance(v, (M.ErrorStats, M.Whiteness)):
            _same_stats(v, w, f"{where}.{k}")
        elif isinstance(v, np.ndarray):
            _same(v, w, f"{where}.{k}")
        elif isinstance(v, float) and math.isnan(v):
            assert math.isnan(w), f"{where}.{k}"
        else:
            assert v == w, (f"{where}.{k}", v, w)


@pytest.mark.parametrize("rig_name", ["shelf-pass", "tuning-run"])
def test_compiled_diagnostics_equal_numpy(rig_name):
    rig = Rig.load(os.path.join(DATA, f"{rig_name}.rig.toml"))
    names, dirs = tuple(rig.sensors), tuple(rig.directions)
    rng = np.random.default_rng(2024)
    tt = np.arange(0.0, 30.0, 0.01)
    # from below the IR rangers' peak (the fold-back zone) to beyond their span
    truths = {d: (tt, 1.2 + 1.15 * np.sin(tt / 3.0 + i)) for i, d in enumerate(dirs)}
    if len(dirs) > 1:
        truths[dirs[-1]] = None  # a direction without truth
    edges = {d: M.zone_edges(rig, d) for d in dirs}
    ref_s = {n: R._SensorStats() for n in names}
    ref_d = {d: R._DirStats() for d in dirs}
    new_s = {n: R._SensorStats() for n in names}
    new_d = {d: R._DirStats() for d in dirs}
    ref_rows = {d: [] for d in dirs}
    new_rows = {d: _Rows() for d in dirs}
    ws = W.WindowStats(rig, names, dirs, truths, edges, R._truth_interp)
    # windows from before the truth (t < 0) to past its end (t > 30), of growing size
    # (the kernel's buffers grow), with the last sensor silent for a stretch
    for k, t0 in enumerate(np.arange(-4.0, 34.0, 2.0)):
        silent = (names[-1],) if 4 <= k < 9 else ()
        b = _window(rng, rig, names, t0, 200 + 150 * k, silent)
        with np.errstate(invalid="ignore"):
            _numpy_accumulate(b, names, dirs, rig, truths, edges, ref_s, ref_d, ref_rows)
        R._accumulate(b, names, dirs, truths, new_s, new_d, new_rows, ws)
    for n in names:
        _same_stats(ref_s[n], new_s[n], n)
    for d in dirs:
        _same_stats(ref_d[d], new_d[d], d)
        assert ref_d[d].white.result() == new_d[d].white.result()
        for col in R._TRACK_COLS:
            c = col[0]
            _same(np.concatenate([p[c] for p in ref_rows[d]]),
                  np.concatenate([p[c] for p in new_rows[d].parts]), (d, c))
    # the cases the windows were made to hold did occur
    assert any(st.raw_err.n.sum() for st in new_s.values())
    assert (new_d[dirs[0]].err.n > 0).all()  # near, overlap and far
    assert sum(ds.reacquired for ds in new_d.values()) and \
        sum(ds.branch_n for ds in new_d.values())
    assert any(st.gap_s > 2.0 for st in new_s.values())  # the silent stretch
    assert any(np.isfinite(st.fallback_from_s) for st in new_s.values())
