"""Compiled cores: the predict-gate-update-decide loop over a merged event array.

One implementation serves `fusion.Fuser.push` (an array of one event) and batch replay
(arrays of millions). Python objects describe the rig; these loops do the work. State is
held in plain arrays owned by the caller so a run can be continued chunk after chunk.

References
----------
R. E. Kalman, "A new approach to linear filtering and prediction problems", J. Basic
Eng. 82, 35-45 (1960).
Y. Bar-Shalom, X. R. Li, T. Kirubarajan, *Estimation with Applications to Tracking and
Navigation*, Wiley (2001): Joseph-form update (§5.2), NIS gating (§5.4), the
white-acceleration model (§6.2).
D. L. Alspach, H. W. Sorenson, "Nonlinear Bayesian estimation using Gaussian sum
approximations", IEEE Trans. Automatic Control 17(4), 439-448 (1972): the Gaussian sum
that keeps both near-zone hypotheses.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

# Keep in step with fusion.decisions (numba needs plain constants).
ACCEPTED, AMBIGUOUS, REACQUIRED = 0, 1, 2
FIRST_REJECT, HELD, DROPOUT, OUT_OF_RANGE, CROSSTALK, GATED, INVALID, LATE = 3, 3, 4, 5, 6, 7, 8, 9
CLOCK_AHEAD = 12
FLAG_CROSSTALK_SUSPECT = 2
FLAG_R_INFLATED = 4
KIND_IR, KIND_ECHO = 0, 1

# Indices into the parameter vector (see fusion.fuser._params).
P_Q, P_GATE, P_K, P_PRUNE, P_NEAR_PRIOR, P_AMB, P_OUTLIER, P_REACQ_N, P_REACQ_W, \
    P_MAX_LAG, P_INIT_RATE, P_MERGE, P_VMAX, P_MAX_LEAD = range(14)
N_PARAMS = 14
RB = 16  # re-acquisition buffer length per direction
# Crosstalk between echo rangers, as a first-arrival detector sees it. A unit reports the
# first sound above threshold after its ring-down. When screening has matched a reading's
# arrival time x to another unit's echo (within XT_TOL_S), two stories explain it:
#   crosstalk - the unit heard the other's sound (probability XT_HEAR_P) and its own echo
#               would have come later, P(own range > z) = Phi(-y / sqrt(S));
#   own echo  - its own echo came back within the match tolerance of x, probability
#               N(y; 0, S) * 2 * XT_HALF_M (the tolerance in range).
# So a matched reading meets the outlier density XT_HEAR_P * Phi(-y/sqrt(S)) / (2 XT_HALF_M)
# on top of the ordinary one: a matched reading short of the track is likely crosstalk,
# one at or beyond it is likely the unit's own echo (common practice, no source: the
# first-arrival rule of threshold echo detectors).
XT_TOL_S = 2.5e-4  # timing-match tolerance: about 4 cm of two-way path
XT_HALF_M = 0.5 * 343.0 * XT_TOL_S
XT_HEAR_P = 0.5  # no knowledge of how often one unit hears another: even odds
XT_DENS = XT_HEAR_P / (2.0 * XT_HALF_M)
# A sensor stamped ahead stays `clock_ahead` while other sensors keep reporting; after this
# many of its readings with no other sensor heard from, its clock is the only one left.
AHEAD_ESCAPE = 50
# A track whose predicted range sigma would pass this has forgotten its target: it
# restarts from the next reading instead of predicting across the gap (which, for an
# absurd time step, overflows to an infinite covariance).
LOST_SIGMA_M = 1000.0
MAXC = 8
LOG_2PI = math.log(2.0 * math.pi)


def new_state(n_dir: int, n_sensor: int, k: int) -> dict:
    """Fresh estimator state arrays for `kalman_run`."""
    return {
        "W": np.zeros((n_dir, MAXC)),          # log weights would drift; keep linear, normalised
        "X": np.zeros((n_dir, MAXC, 2)),
        "P": np.zeros((n_dir, MAXC, 2, 2)),
        "NH": np.zeros(n_dir, np.int64),
        "T": np.full(n_dir, -np.inf),
        "RBT": np.zeros((n_dir, RB)), "RBZ": np.zeros((n_dir, RB, 2)),
        "RBV": np.zeros((n_dir, RB, 2)), "RBS": np.full((n_dir, RB), -1, np.int64),
        "RBN": np.zeros(n_dir, np.int64),
        "LAST_RAW": np.full(n_sensor, np.nan), "LAST_NEW_T": np.full(n_sensor, -np.inf),
        # clock screening: each sensor's latest reading time, whether it is stamped ahead
        # (0 no; k >= 1 its k-th reading since another spoke), and whether its clock
        # leapt and no other sensor has confirmed the new time
        "LAST_T": np.full(n_sensor, -np.inf),
        "AHEAD": np.zeros(n_sensor, np.int64), "LEAP": np.zeros(n_sensor, np.int64),
        "CLOCK_ODD": np.zeros(1, np.int64),      # sensors marked leapt or ahead
        "T_SRC": np.full(n_dir, -1, np.int64),   # the sensor whose reading set T
    }


@njit(cache=True, inline="always")
def _predict(x, P, dt, q):
    # White-acceleration constant-velocity model (Bar-Shalom et al. 2001, §6.2.2).
    x0 = x[0] + dt * x[1]
    p00 = P[0, 0] + dt * (P[0, 1] + P[1, 0]) + dt * dt * P[1, 1] + q * dt ** 3 / 3.0
    p01 = P[0, 1] + dt * P[1, 1] + q * dt * dt / 2.0
    p11 = P[1, 1] + q * dt
    x[0] = x0
    P[0, 0] = p00
    P[0, 1] = p01
    P[1, 0] = p01
    P[1, 1] = p11


@njit(cache=True, inline="always")
def _joseph(x, P, z, r, xo, Po):
    # Joseph form (I-KH) P (I-KH)' + K R K' keeps P symmetric positive definite.
    s = P[0, 0] + r
    k0 = P[0, 0] / s
    k1 = P[1, 0] / s
    y = z - x[0]
    xo[0] = x[0] + k0 * y
    xo[1] = x[1] + k1 * y
    a00 = 1.0 - k0
    a10 = -k1
    # A = [[a00, 0], [a10, 1]]; A P A'
    p00 = a00 * a00 * P[0, 0]
    p01 = a00 * (a10 * P[0, 0] + P[1, 0])
    p11 = a10 * a10 * P[0, 0] + 2.0 * a10 * P[0, 1] + P[1, 1]
    Po[0, 0] = p00 + k0 * k0 * r
    Po[0, 1] = p01 + k0 * k1 * r
    Po[1, 0] = Po[0, 1]
    Po[1, 1] = p11 + k1 * k1 * r


@njit(cache=True, inline="always")
def _moments(W, X, P, nh, out):
    m0 = 0.0
    m1 = 0.0
    for k in range(nh):
        m0 += W[k] * X[k, 0]
        m1 += W[k] * X[k, 1]
    p00 = 0.0
    p01 = 0.0
    p11 = 0.0
    for k in range(nh):
        d0 = X[k, 0] - m0
        d1 = X[k, 1] - m1
        p00 += W[k] * (P[k, 0, 0] + d0 * d0)
        p01 += W[k] * (P[k, 0, 1] + d0 * d1)
        p11 += W[k] * (P[k, 1, 1] + d1 * d1)
    out[0] = m0
    out[1] = m1
    out[2] = p00
    out[3] = p01
    out[4] = p11


@njit(cache=True)
def _init_track(d, z, sg, near_prior, init_rate, W, X, P, NH):
    n = 0
    has0 = not math.isnan(z[0])
    has1 = not math.isnan(z[1])
    for c in range(2):
        if math.isnan(z[c]):
            continue
        X[d, n, 0] = z[c]
        X[d, n, 1] = 0.0
        P[d, n, 0, 0] = sg[c] * sg[c]
        P[d, n, 0, 1] = 0.0
        P[d, n, 1, 0] = 0.0
        P[d, n, 1, 1] = init_rate * init_rate
        if has0 and has1:
            W[d, n] = near_prior if c == 1 else 1.0 - near_prior
        else:
            W[d, n] = 1.0
        n += 1
    NH[d] = n
    return n


@njit(cache=True, inline="always")
def _move(d, i, j, RBT, RBZ, RBV, RBS):
    """Entry ``i`` of direction ``d``'s re-acquisition buffer to slot ``j``."""
    RBT[d, j] = RBT[d, i]
    RBS[d, j] = RBS[d, i]
    for c in range(2):
        RBZ[d, j, c] = RBZ[d, i, c]
        RBV[d, j, c] = RBV[d, i, c]


@njit(cache=True)
def _buffer_rejected(d, t, s, z, sg, RBT, RBZ, RBV, RBS, RBN):
    """Append a rejected reading (both candidates, and its sensor) to the direction's
    re-acquisition buffer, dropping the oldest when it is full."""
    m = RBN[d]
    if m == RB:
        for j in range(RB - 1):
            _move(d, j + 1, j, RBT, RBZ, RBV, RBS)
        m = RB - 1
    RBN[d] = m + 1
    RBT[d, m] = t
    RBS[d, m] = s
    for c in range(2):
        RBZ[d, m, c] = z[c]
        RBV[d, m, c] = sg[c] * sg[c]


@njit(cache=True)
def _reacq_check(d, t, RBT, RBZ, RBV, RBS, RBN, nmin, window, vmax, rate_sigma, sens_kind,
                 out):
    """Do the rejected readings of the last `window` seconds tell one consistent story?

    Each buffered reading has one or two candidates. For each candidate of the newest
    reading (an anchor), every reading offers its candidate nearest the anchor; those
    within reach of the anchor (three sigma each, a centimetre, and 0.5 m/s of motion)
    form the story, which needs at least `nmin` readings from one sensor, two when
    sensors of both kinds tell it (independent witnesses: a new target seen by the IR
    ranger and the echo ranger alike is there, while clutter, ghosts and crosstalk are
    one kind's story), or ``nmin // 2 + 1`` when two units of one kind tell it (they can
    share a ghost or a post in both cones) — a weighted straight line that fits each
    within three sigma plus a centimetre, and a rate no faster than `vmax`.
    Readings outside the story (crosstalk, clutter) do not spoil it.

    The new track's rate is the line's slope weighed against the prior rate of a new
    track (0 with sigma `rate_sigma`): two readings a few milliseconds apart give a
    slope of metres per second from their noise alone, which the prior then outweighs.
    Returns how many anchors pass; ``out[k]`` = (range now, rate, variance of the
    range, variance of the rate).
    """
    n = RBN[d]
    j = 0
    for i in range(n):
        if t - RBT[d, i] <= window:
            _move(d, i, j, RBT, RBZ, RBV, RBS)
            j += 1
    RBN[d] = j
    n = j
    if n < min(nmin, 2):
        return 0
    npass = 0
    zc = np.empty(RB)
    sc = np.empty(RB, np.int64)
    vc = np.empty(RB)
    tc = np.empty(RB)
    for anchor in range(2):
        a = RBZ[d, n - 1, anchor]
        if math.isnan(a):
            continue
        sa = math.sqrt(RBV[d, n - 1, anchor])
        m = 0
        for i in range(n):
            best = 0
            if math.isnan(RBZ[d, i, 0]) or (not math.isnan(RBZ[d, i, 1]) and
                                             abs(RBZ[d, i, 1] - a) < abs(RBZ[d, i, 0] - a)):
                best = 1
            zi = RBZ[d, i, best]
            vi = RBV[d, i, best]
            reach = 3.0 * (math.sqrt(vi) + sa) + 0.01 + 0.5 * (t - RBT[d, i])
            if abs(zi - a) <= reach:
                zc[m] = zi
                vc[m] = vi
                tc[m] = RBT[d, i]
                sc[m] = RBS[d, i]
                m += 1
        # witnesses of another kind (an IR and an echo ranger: other physics, other
        # failures) confirm at once; two units of one kind can share a ghost or a post in
        # both cones: they shorten the story less
        kinds = False
        several = False
        for i in range(1, m):
            if sc[i] != sc[0]:
                several = True
                if sens_kind[sc[i]] != sens_kind[sc[0]]:
                    kinds = True
        need = min(nmin, 2) if kinds else (nmin // 2 + 1 if several else nmin)
        if m < need:
            continue
        sw = 0.0
        st = 0.0
        sz = 0.0
        for i in range(m):
            w = 1.0 / vc[i]
            sw += w
            st += w * (tc[i] - t)
            sz += w * zc[i]
        tm = st / sw
        zm = sz / sw
        stt = 0.0
        stz = 0.0
        for i in range(m):
            w = 1.0 / vc[i]
            dt = tc[i] - t - tm
            stt += w * dt * dt
            stz += w * dt * (zc[i] - zm)
        slope = stz / stt if stt > 0 else 0.0
        # a story that needs the target faster than any the rig expects is not one
        # (sliding crosstalk between free-running units draws such lines)
        ok = abs(slope) <= vmax
        for i in range(m):
            pred = zm + slope * (tc[i] - t - tm)
            if abs(zc[i] - pred) > 3.0 * math.sqrt(vc[i]) + 0.01:
                ok = False
                break
        if ok:
            # slope ~ N(rate, 1/stt) with the prior rate ~ N(0, rate_sigma^2)
            prior = 1.0 / (rate_sigma * rate_sigma) if rate_sigma > 0 else math.inf
            if math.isinf(prior):
                rate, var_rate = 0.0, 0.0
            else:
                var_rate = 1.0 / (prior + stt)
                rate = slope * stt * var_rate
            out[npass, 0] = zm + rate * (0.0 - tm)
            out[npass, 1] = rate
            out[npass, 2] = 1.0 / sw + tm * tm * var_rate
            out[npass, 3] = var_rate
            npass += 1
    return npass


@njit(cache=True)
def _clock(code, d, s, t, max_lead, max_lag, T, T_SRC, LAST_T, AHEAD, LEAP, ODD):
    """Catch a sensor whose clock jumped forward (one clock serves every sensor of a log).

    A reading more than `max_lead` past both its own sensor's previous reading and the
    latest reading of every other sensor marks its sensor as having leapt. A later
    reading of another sensor at or after the leapt one's time confirms the new time
    (the whole log had a gap). But a reading of another sensor, itself in step, stamped
    more than `max_lag` behind the leapt sensor's latest shows that the leapt clock runs
    ahead of the rest of the rig: that sensor is marked ahead, and where its readings
    had set the track's time, the time label goes back to this reading's (the track is
    made of real measurements; predicting across the leap only added process noise), in
    every direction, so nothing is lost to ``late``. A sensor marked ahead is decided ``clock_ahead`` until
    the others catch up with its time (its clock came back: its own track's label goes
    back with it), or until `AHEAD_ESCAPE` of its readings pass with no other sensor
    heard from (then its clock is the only one left; it stays marked as leapt, to be
    caught again if the others return behind it).

    In stamp order (a replay, or readings pushed as they were stamped) no reading is
    behind a leap, so this acts only on readings pushed as they arrive on the robot.
    Returns the code (``CLOCK_AHEAD`` or unchanged); updates the clock state and
    ``ODD[0]``, the number of sensors marked leapt or ahead.
    """
    if not (max_lead > 0.0) or math.isnan(t) or code == INVALID:
        return code
    ns = LAST_T.shape[0]
    prev = LAST_T[s]
    latest = -math.inf  # the latest reading of the other sensors in step
    for j in range(ns):
        if j != s and AHEAD[j] == 0 and LAST_T[j] > latest:
            latest = LAST_T[j]
    leap = prev > -math.inf and t - prev > max_lead and latest > -math.inf \
        and t - latest > max_lead
    if AHEAD[s] > 0:
        if latest >= t - max_lead:
            AHEAD[s] = 0  # back in step
            LEAP[s] = 0
            for dd in range(T.shape[0]):
                if T_SRC[dd] == s and t < T[dd]:
                    T[dd] = t
        else:
            AHEAD[s] += 1
            if AHEAD[s] > AHEAD_ESCAPE:
                AHEAD[s] = 0
    elif not leap:
        for j in range(ns):
            if j != s and LEAP[j] != 0 and AHEAD[j] == 0:
                if t < LAST_T[j] - max_lag:
                    AHEAD[j] = 1  # j's clock runs ahead of this in-step sensor's
                    for dd in range(T.shape[0]):  # every track whose time j set
                        if T_SRC[dd] == j and t < T[dd]:
                            T[dd] = t
                elif t >= LAST_T[j] - max_lag:
                    LEAP[j] = 0   # confirmed: the others are at its time too
    if AHEAD[s] == 0:
        if leap:
            LEAP[s] = 1
        else:
            for j in range(ns):
                if j != s and AHEAD[j] > 0:
                    AHEAD[j] = 1  # another sensor spoke: its escape count restarts
    LAST_T[s] = t
    odd = 0
    for j in range(ns):
        if AHEAD[j] > 0 or LEAP[j] != 0:
            odd += 1
    ODD[0] = odd
    if AHEAD[s] > 0:
        if code == ACCEPTED or code == DROPOUT or code == OUT_OF_RANGE:
            return CLOCK_AHEAD
        return code
    if code == ACCEPTED and t > T[d]:
        T_SRC[d] = s  # this reading moves the track's time
    return code


@njit(cache=True, inline="always")
def _screen(code, flags, d, s, t, raw, is_ir, hold, max_lag, NH, T, LAST_RAW, LAST_NEW_T,
            max_lead, T_SRC, LAST_T, AHEAD, LEAP, ODD):
    """Per-reading screening: a clock that jumped ahead, late readings, held samples, and
    R inflation for an IR ranger sampled faster than it updates.

    The particle kernel calls this; `kalman_run` spells the same steps out in its loop,
    because a call that passes these arrays costs numba's reference counting on every
    reading (measured: the Kalman loop 0.135 instead of 0.086 us per reading). Change
    both together.

    Returns ``(code, flags, infl)``; updates the sensor's clock and last new sample in
    place.
    """
    infl = 1.0
    code = _clock(code, d, s, t, max_lead, max_lag, T, T_SRC, LAST_T, AHEAD, LEAP, ODD)
    if code == ACCEPTED:
        if NH[d] > 0 and t < T[d] - max_lag:
            code = LATE
        elif is_ir and hold > 0.0:
            since = t - LAST_NEW_T[s]
            if raw == LAST_RAW[s] and since < 1.5 * hold:
                code = HELD
            else:
                if since < hold:
                    infl = hold / max(since, 1e-6)
                    flags |= FLAG_R_INFLATED
                LAST_RAW[s] = raw
                LAST_NEW_T[s] = t
    return code, flags, infl


@njit(cache=True, inline="always")
def _outlier_density(outl, suspect, z, sg, infl, x, p):
    """Density of "this reading is not of the track" under one component (per metre):
    the rig's outlier density, plus the crosstalk term for a timing-matched reading (see
    XT_DENS)."""
    if not suspect:
        return outl
    c = 0 if not math.isnan(z[0]) else 1
    S = p[0, 0] + sg[c] * sg[c] * infl
    return outl + XT_DENS * 0.5 * math.erfc((z[c] - x[0]) / math.sqrt(2.0 * S))


@njit(cache=True)
def kalman_run(order, ev_t, ev_dir, ev_sensor, ev_z, ev_s, ev_code, ev_flags, ev_raw,
               sens_kind, sens_hold, sens_blank, sens_p_blank_drop, sens_p_drop, par,
               W, X, P, NH, T, RBT, RBZ, RBV, RBS, RBN, LAST_RAW, LAST_NEW_T,
               T_SRC, LAST_T, AHEAD, LEAP, CLOCK_ODD,
               o_code, o_flags, o_innov, o_nis, o_branch, o_bprob, o_loglik, o_track, o_pmaj,
               o_nh, o_tt):
    """Run the Gaussian-sum Kalman estimator over events in the order `order`, in place.

    Events are read at ``order[i]`` and outputs written at the same index, so the
    caller's arrays stay in their own order and nothing is copied to sort them.

    Outputs per event: decision code and flags, innovation and NIS of the chosen
    hypothesis, chosen branch (0 far/only, 1 near, -1 none) and its probability, the
    predictive log-likelihood, and the direction's moment-matched state after the event
    (range, rate, P00, P01, P11), the weight of the heaviest component, the number of
    components and the state time.
    """
    n = order.shape[0]
    q = par[P_Q]
    gate = par[P_GATE]
    K = int(par[P_K])
    prune = par[P_PRUNE]
    near_prior = par[P_NEAR_PRIOR]
    amb = par[P_AMB]
    outl = par[P_OUTLIER]
    reacq_n = int(par[P_REACQ_N])
    reacq_w = par[P_REACQ_W]
    max_lag = par[P_MAX_LAG]
    max_lead = par[P_MAX_LEAD]
    init_rate = par[P_INIT_RATE]
    merge_d2 = par[P_MERGE]
    vmax = par[P_VMAX]
    miss_keep = 100.0 * prune
    CW = np.empty(3 * MAXC)
    CX = np.empty((3 * MAXC, 2))
    CP = np.empty((3 * MAXC, 2, 2))
    CB = np.empty(3 * MAXC, np.int64)     # candidate index, -1 = outlier hypothesis
    CNIS = np.empty(3 * MAXC)
    CY = np.empty(3 * MAXC)
    used = np.empty(3 * MAXC, np.bool_)
    grp = np.empty(3 * MAXC, np.int64)
    mom = np.empty(5)
    ra = np.empty((2, 4))
    jac = np.empty(2)
    for ii in range(n):
        i = order[ii]
        d = ev_dir[i]
        s = ev_sensor[i]
        t = ev_t[i]
        code = ev_code[i]
        flags = ev_flags[i]
        innov = math.nan
        nis = math.nan
        branch = -1
        bprob = math.nan
        ll = math.nan
        # The steps of `_screen`, spelled out (see there why); change both together.
        infl = 1.0
        # Clock screening (_clock). In step, the common case, it is three assignments, kept
        # here: a call per reading costs numba's reference counting of its arrays.
        if max_lead > 0.0 and code != INVALID and not math.isnan(t):
            if CLOCK_ODD[0] > 0 or t - LAST_T[s] > max_lead:
                code = _clock(code, d, s, t, max_lead, max_lag, T, T_SRC, LAST_T, AHEAD, LEAP,
                              CLOCK_ODD)
            else:
                LAST_T[s] = t
                if code == ACCEPTED and t > T[d]:
                    T_SRC[d] = s
        if code == ACCEPTED:
            if NH[d] > 0 and t < T[d] - max_lag:
                code = LATE
            elif sens_kind[s] == KIND_IR and sens_hold[s] > 0.0:
                raw = ev_raw[i]
                since = t - LAST_NEW_T[s]
                if raw == LAST_RAW[s] and since < 1.5 * sens_hold[s]:
                    code = HELD
                else:
                    if since < sens_hold[s]:
                        infl = sens_hold[s] / max(since, 1e-6)
                        flags |= FLAG_R_INFLATED
                    LAST_RAW[s] = raw
                    LAST_NEW_T[s] = t
        suspect = (flags & FLAG_CROSSTALK_SUSPECT) != 0
        if code == ACCEPTED and NH[d] > 0 and q * (t - T[d]) ** 3 / 3.0 > LOST_SIGMA_M ** 2:
            NH[d] = 0
            RBN[d] = 0
        if code == ACCEPTED:
            z = ev_z[i]
            sg = ev_s[i]
            if NH[d] == 0:
                # Any reading may start a track; one started on crosstalk is overturned by
                # the consistent readings that follow (re-acquisition).
                nc = _init_track(d, z, sg, near_prior, init_rate, W, X, P, NH)
                T[d] = t
                if nc == 2:
                    code = AMBIGUOUS
                    branch = 0 if near_prior < 0.5 else 1
                    bprob = max(near_prior, 1.0 - near_prior)
                else:
                    branch = 0 if math.isnan(z[1]) else 1
                    bprob = 1.0
            else:
                tt = t if t > T[d] else T[d]
                dt = tt - T[d]
                nh = NH[d]
                if dt > 0:
                    for k in range(nh):
                        _predict(X[d, k], P[d, k], dt, q)
                T[d] = tt
                nchild = 0
                best_nis = math.inf
                # Jacobian |dr/dv| of each candidate relative to the steepest one: for an IR
                # reading both candidates explain the same voltage.
                smin = math.inf
                for c in range(2):
                    if not math.isnan(z[c]) and sg[c] < smin:
                        smin = sg[c]
                for c in range(2):
                    jac[c] = sg[c] / smin if not math.isnan(z[c]) else 0.0
                best_y = math.nan
                for k in range(nh):
                    for c in range(2):
                        if math.isnan(z[c]):
                            continue
                        r = sg[c] * sg[c] * infl
                        S = P[d, k, 0, 0] + r
                        y = z[c] - X[d, k, 0]
                        e = y * y / S
                        if e < best_nis:
                            best_nis = e
                            best_y = y
                        if e <= gate:
                            _joseph(X[d, k], P[d, k], z[c], r, CX[nchild], CP[nchild])
                            # x jac[c]: the likelihood of the raw reading, not of its range
                            # image (a flat side of the IR curve maps a voltage to a wide range)
                            CW[nchild] = W[d, k] * jac[c] * math.exp(-0.5 * (e + LOG_2PI + math.log(S)))
                            CB[nchild] = c
                            CNIS[nchild] = e
                            CY[nchild] = y
                            nchild += 1
                if nchild == 0:
                    innov = best_y
                    nis = best_nis
                    # predictive density of a reading outside every gate: the outlier term
                    ll = 0.0
                    for k in range(nh):
                        ll += W[d, k] * _outlier_density(outl, suspect, z, sg, infl, X[d, k],
                                                         P[d, k])
                    ll = math.log(ll)
                    code = CROSSTALK if suspect else GATED
                    _buffer_rejected(d, t, s, z, sg, RBT, RBZ, RBV, RBS, RBN)
                    npass = _reacq_check(d, t, RBT, RBZ, RBV, RBS, RBN, reacq_n, reacq_w, vmax,
                                         init_rate, sens_kind, ra)
                    if npass > 0:
                        NH[d] = npass
                        for k in range(npass):
                            W[d, k] = 1.0 / npass
                            X[d, k, 0] = ra[k, 0]
                            X[d, k, 1] = ra[k, 1]
                            P[d, k, 0, 0] = ra[k, 2] * reacq_n
                            P[d, k, 0, 1] = 0.0
                            P[d, k, 1, 0] = 0.0
                            P[d, k, 1, 1] = ra[k, 3]
                        RBN[d] = 0
                        code = REACQUIRED
                        branch = 0
                        bprob = 1.0 / npass
                else:
                    tot = 0.0
                    for j in range(nchild):
                        tot += CW[j]
                    # "this reading is an outlier" hypotheses keep each prior component alive
                    for k in range(nh):
                        CX[nchild, 0] = X[d, k, 0]
                        CX[nchild, 1] = X[d, k, 1]
                        for a in range(2):
                            for b in range(2):
                                CP[nchild, a, b] = P[d, k, a, b]
                        CW[nchild] = W[d, k] * _outlier_density(outl, suspect, z, sg, infl,
                                                                X[d, k], P[d, k])
                        CB[nchild] = -1
                        tot += CW[nchild]
                        nchild += 1
                    ll = math.log(tot) if tot > 0 else -745.0
                    pb0 = 0.0
                    pb1 = 0.0
                    pmiss = 0.0
                    for j in range(nchild):
                        CW[j] /= tot
                        if CB[j] == 0:
                            pb0 += CW[j]
                        elif CB[j] == 1:
                            pb1 += CW[j]
                        else:
                            pmiss += CW[j]
                    # keep the K heaviest, merging near-duplicates into them
                    for j in range(nchild):
                        used[j] = False
                        grp[j] = -1
                    nk = 0
                    for slot in range(K):
                        bj = -1
                        bw = -1.0
                        for j in range(nchild):
                            # an outlier hypothesis is kept only while it is a real contender
                            if not used[j] and CW[j] > bw and (CB[j] >= 0 or CW[j] >= miss_keep):
                                bw = CW[j]
                                bj = j
                        if bj < 0 or bw < prune:
                            break
                        used[bj] = True
                        wsum = CW[bj]
                        m0 = CW[bj] * CX[bj, 0]
                        m1 = CW[bj] * CX[bj, 1]
                        for j in range(nchild):
                            if used[j]:
                                continue
                            dd = CX[j, 0] - CX[bj, 0]
                            if dd * dd <= merge_d2 * (CP[j, 0, 0] + CP[bj, 0, 0]):
                                used[j] = True
                                grp[j] = bj
                                wsum += CW[j]
                                m0 += CW[j] * CX[j, 0]
                                m1 += CW[j] * CX[j, 1]
                        m0 /= wsum
                        m1 /= wsum
                        p00 = 0.0
                        p01 = 0.0
                        p11 = 0.0
                        for j in range(nchild):
                            if j == bj or grp[j] == bj:
                                d0 = CX[j, 0] - m0
                                d1 = CX[j, 1] - m1
                                p00 += CW[j] * (CP[j, 0, 0] + d0 * d0)
                                p01 += CW[j] * (CP[j, 0, 1] + d0 * d1)
                                p11 += CW[j] * (CP[j, 1, 1] + d1 * d1)
                        W[d, nk] = wsum
                        X[d, nk, 0] = m0
                        X[d, nk, 1] = m1
                        P[d, nk, 0, 0] = p00 / wsum
                        P[d, nk, 0, 1] = p01 / wsum
                        P[d, nk, 1, 0] = p01 / wsum
                        P[d, nk, 1, 1] = p11 / wsum
                        nk += 1
                    ws = 0.0
                    for k in range(nk):
                        ws += W[d, k]
                    for k in range(nk):
                        W[d, k] /= ws
                    NH[d] = nk
                    # the reading's decision
                    if pmiss > pb0 and pmiss > pb1:
                        code = CROSSTALK if suspect else GATED
                        innov = best_y
                        nis = best_nis
                    else:
                        # an accepted reading says the track is not lost: a restart needs
                        # rejected readings with no confirmation between them (a real change
                        # hides the old target; clutter and ghosts come and go)
                        RBN[d] = 0
                        branch = 0 if pb0 >= pb1 else 1
                        bprob = (pb0 if branch == 0 else pb1) / (pb0 + pb1)
                        code = ACCEPTED if bprob >= amb else AMBIGUOUS
                        # innovation of the heaviest updated child on the chosen branch
                        bestw = -1.0
                        for j in range(nchild - nh):
                            if CB[j] == branch and CW[j] > bestw:
                                bestw = CW[j]
                                innov = CY[j]
                                nis = CNIS[j]
        elif code == DROPOUT and sens_kind[s] == KIND_ECHO and NH[d] > 1:
            # "Nothing heard": likely when the target is inside the blanking zone.
            nh = NH[d]
            ws = 0.0
            for k in range(nh):
                sd = math.sqrt(P[d, k, 0, 0])
                pin = 0.5 * math.erfc(-(sens_blank[s] - X[d, k, 0]) / (sd * math.sqrt(2.0)))
                W[d, k] *= pin * sens_p_blank_drop[s] + (1.0 - pin) * sens_p_drop[s]
                ws += W[d, k]
            if ws > 0:
                for k in range(nh):
                    W[d, k] /= ws
            else:
                for k in range(nh):
                    W[d, k] = 1.0 / nh
        o_code[i] = code
        o_flags[i] = flags
        o_innov[i] = innov
        o_nis[i] = nis
        o_branch[i] = branch
        o_bprob[i] = bprob
        o_loglik[i] = ll
        nh = NH[d]
        if nh > 0:
            _moments(W[d], X[d], P[d], nh, mom)
            pm = 0.0
            for k in range(nh):
                if W[d, k] > pm:
                    pm = W[d, k]
            for j in range(5):
                o_track[i, j] = mom[j]
            o_pmaj[i] = pm
        else:
            for j in range(5):
                o_track[i, j] = math.nan
            o_pmaj[i] = math.nan
        o_nh[i] = nh
        o_tt[i] = T[d]
