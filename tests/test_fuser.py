"""The fuser's decisions: near-zone ambiguity, crosstalk, re-acquisition, held samples,
the streaming front against the batch core, latency and mount offsets.

References beside the checks: Alspach & Sorenson (1972) for the Gaussian sum (each
component an extended Kalman filter, weights from the predictive likelihood of the raw
reading); Bar-Shalom, Li & Kirubarajan (2001) for chi-square gating; Thrun, Burgard & Fox
(2005) ch. 6 for "no return" as evidence; filterpy as a reference library. Every run is
seeded and short.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from filterpy.kalman import ExtendedKalmanFilter, KalmanFilter

from fusion import decisions as D
from fusion.errors import InputError
from fusion.fuser import Fuser
from fusion.rig import Rig
from fusion.noise import echo_mixture
from fusion.sensors.air import echo_time, speed_of_sound
from fusion.sensors.triangulation import TriangulationCurve

TEMP_C = 20.0  # the rig's fallback air temperature (no air stream configured)
C20 = speed_of_sound(TEMP_C)
CURVE = TriangulationCurve.typical_10_80()
NEAR_M, FAR_M = 0.06, 0.40  # 1.50 V on both sides of the peak (common practice, no source)


# ----------------------------------------------------------------------------- helpers

def _echo(name="echo", direction="front", **keys):
    d = {"name": name, "kind": "echo", "direction": direction, "output": "echo_time",
         "tick_s": 0.0, "min_range_m": 0.03, "max_range_m": 4.0, "sigma_m": 0.003,
         "sigma_frac": 0.0}
    d.update(keys)
    return d


def _ir(name="ir", direction="front", **keys):
    d = {"name": name, "kind": "triangulation", "direction": direction, "output": "volts",
         "volts_sigma": 0.01, "curve": CURVE.to_dict()}
    d.update(keys)
    return d


def _rig(sensors, **estimator):
    return Rig.from_dict({"air": {"fallback_temp_c": TEMP_C, "fallback_sigma_c": 0.0},
                          "estimator": estimator, "sensor": sensors})


def _tof(range_m):
    return echo_time(range_m, TEMP_C)


def _near_weight(fuser, d=0):
    """Total weight of the components below the curve's peak (the near branch)."""
    st = fuser.state
    nh = int(st["NH"][d])
    w, x = st["W"][d, :nh], st["X"][d, :nh, 0]
    return float(w[x < CURVE.peak_range_m].sum())


def _p_far(b):
    return np.where(b.branch == 0, b.branch_prob, 1.0 - b.branch_prob)


def _kf_final_variance(t, r_var, est):
    """Final range variance of filterpy's linear Kalman filter (the reference library) on
    the fuser's model: white acceleration of spectral density ``accel_psd`` (Bar-Shalom,
    Li & Kirubarajan 2001, §6.2.2, from memory), range measured with variances `r_var`,
    started from the first reading with rate sigma ``init_rate_sigma_mps``. The variances
    do not depend on the measured values."""
    f = KalmanFilter(dim_x=2, dim_z=1)
    f.x = np.zeros(2)
    f.P = np.diag([r_var[0], est.init_rate_sigma_mps ** 2])
    f.H = np.array([[1.0, 0.0]])
    for k in range(1, len(t)):
        dt = t[k] - t[k - 1]
        f.F = np.array([[1.0, dt], [0.0, 1.0]])
        f.Q = est.accel_psd * np.array([[dt ** 3 / 3, dt ** 2 / 2], [dt ** 2 / 2, dt]])
        f.predict()
        f.update(np.zeros(1), R=r_var[k])
    return f.P[0, 0]


# A robot standing still in front of something close: a slow motion prior.
SLOW = dict(accel_psd=1e-4, init_rate_sigma_mps=0.01)


# ------------------------------------------------------------ 5. near-zone ambiguity

def test_curve_folds_back_at_the_check_values():
    # The typical 10-80 cm unit: peak of 2.70 V near 0.148 m, 1.50 V at both 0.06 m and
    # 0.40 m (common practice, no source); the tests below rest on it.
    assert CURVE.peak_range_m == pytest.approx(0.148, abs=0.002)
    near, far = CURVE.ranges(float(CURVE.volts(NEAR_M)))
    assert near == pytest.approx(NEAR_M, abs=1e-6)
    assert far == pytest.approx(FAR_M, abs=0.002)


def test_ir_alone_keeps_both_hypotheses():
    # Without other evidence both candidate ranges stay alive as a Gaussian sum
    # (Alspach & Sorenson 1972) and the reported sigma covers both.
    fuser = Fuser(_rig([_ir()], **SLOW))
    rng = np.random.default_rng(1)
    t = np.arange(5) * 0.03
    v = CURVE.volts(NEAR_M) + rng.normal(0.0, 0.01, 5)
    b = fuser.process({"ir": (t, v)})
    assert np.all(b.code == D.AMBIGUOUS)
    assert np.all(b.n_hyp == 2)
    assert np.all(np.isfinite(b.z_m)) and np.all(b.z_m[:, 1] < CURVE.peak_range_m)
    mean, sigma = b.state[:, 0], np.sqrt(b.state[:, 2])
    # both candidates within two sigma of the reported range (each branch keeps >= 20 %)
    for c in (0, 1):
        assert np.all(np.abs(b.z_m[:, c] - mean) <= 2.0 * sigma)
    assert np.all(sigma > 0.1)  # the candidates are 0.34 m apart; one sensor sigma is mm


@pytest.mark.parametrize("q, rate_sigma", [(0.5, 0.5), (1e-4, 0.01)])
def test_branch_weights_match_a_bank_of_voltage_space_ekfs(q, rate_sigma):
    # Alspach & Sorenson (1972): each branch is an extended Kalman filter of the raw
    # voltage, h(x) = V(range), and its weight is updated by the predictive likelihood
    # N(v; V(x-), H P- H' + sigma_V^2). filterpy's ExtendedKalmanFilter is the reference.
    # A static voltage favours the far branch, since on the steep near side the motion
    # the model allows would make the voltage wander far more (both agree on this).
    rig = _rig([_ir()], accel_psd=q, init_rate_sigma_mps=rate_sigma,
               outlier_density=1e-300, prune_weight=1e-12)
    rng = np.random.default_rng(2)
    n = 12
    t = np.arange(n) * 0.03
    v = CURVE.volts(NEAR_M) + rng.normal(0.0, 0.01, n)
    b = Fuser(rig).process({"ir": (t, v)})
    assert np.all(b.n_hyp == 2)
    sv = rig.sensors["ir"].total_volts_sigma
    log_lik = np.zeros((2, n))
    for c in range(2):
        ekf = ExtendedKalmanFilter(dim_x=2, dim_z=1)
        ekf.x = np.array([[b.z_m[0, c]], [0.0]])
        ekf.P = np.diag([b.sigma_m[0, c] ** 2, rate_sigma ** 2])
        ekf.R = np.array([[sv ** 2]])
        for k in range(1, n):
            dt = t[k] - t[k - 1]
            ekf.F = np.array([[1.0, dt], [0.0, 1.0]])
            ekf.Q = q * np.array([[dt ** 3 / 3, dt ** 2 / 2], [dt ** 2 / 2, dt]])
            ekf.predict()
            ekf.update(np.array([[v[k]]]),
                       lambda x: np.array([[float(CURVE.slope(x[0, 0])), 0.0]]),
                       lambda x: np.array([[float(CURVE.volts(x[0, 0]))]]))
            log_lik[c, k] = log_lik[c, k - 1] + ekf.log_likelihood
    # equal priors (near_prior 0.5): posterior log-odds far:near = log-likelihood ratio
    ref = log_lik[0] - log_lik[1]
    pf = _p_far(b)
    got = np.log(pf / (1.0 - pf))
    # The kernel linearises the curve at each candidate, the EKF at its prediction; the
    # two first-order approximations differ by the curvature of V (the slope changes by
    # about 1 % per millimetre on the near side); each differs from the exact nonlinear
    # posterior by a few hundredths per reading, so compare each reading's change of
    # log-odds to 0.1. Leaving out the |dr/dV| factor would shift each by about
    # log(sigma_far / sigma_near) = 2.2.
    np.testing.assert_allclose(np.diff(got), np.diff(ref), rtol=0, atol=0.1)
    assert ref[-1] > 0.5  # and the evidence really went one way


def test_echo_reading_resolves_the_near_branch():
    # An echo ranger that can see 0.06 m (min_range 0.03) reads the target: the far
    # hypothesis predicts 0.40 m and cannot explain it, so the near branch takes the
    # weight (Bayes' rule over the Gaussian sum; Alspach & Sorenson 1972).
    fuser = Fuser(_rig([_ir(), _echo(min_range_m=0.03)], **SLOW))
    rng = np.random.default_rng(3)
    t = np.arange(4) * 0.03
    b = fuser.process({"ir": (t, CURVE.volts(NEAR_M) + rng.normal(0.0, 0.01, 4))})
    assert np.all(b.code == D.AMBIGUOUS)
    assert 0.2 < _near_weight(fuser) < 0.8
    e = fuser.process({"echo": ([0.12], _tof([NEAR_M + 0.001]))})
    assert e.code[0] == D.ACCEPTED
    assert _near_weight(fuser) > 0.99
    assert e.p_major[0] > 0.99
    assert e.state[0, 0] == pytest.approx(NEAR_M, abs=0.005)
    # the next IR reading is now decided on the near side
    est, dec = fuser.push("ir", 0.15, float(CURVE.volts(NEAR_M)))
    assert dec.code == D.ACCEPTED and dec.branch == 1 and dec.branch_prob > 0.99
    assert est.range_m == pytest.approx(NEAR_M, abs=0.005)
    assert est.sigma_m < 0.01


def test_echo_dropout_inside_blanking_favours_the_near_branch():
    # "Nothing heard" is evidence (Thrun, Burgard & Fox 2005, ch. 6: a sensor model
    # gives the probability of every outcome, a miss included): an echo ranger that
    # cannot hear inside 0.15 m misses a target at 0.06 m far more often than one at
    # 0.40 m, so a dropout raises the near branch's odds. By Bayes' rule they move by the
    # likelihood ratio of a dropout, near (0.06 m) against far (0.40 m), under the beam
    # mixture the sensor gets (fusion.noise.echo_mixture; a dropout counts as a reading at
    # the maximum range), as tests/test_particle.py checks for the particle estimator.
    odds, ratio = {}, {}
    for blank in (0.15, 0.03):
        fuser = Fuser(_rig([_ir(), _echo(min_range_m=blank)], **SLOW))
        rng = np.random.default_rng(4)
        fuser.process({"ir": (np.arange(4) * 0.03,
                              CURVE.volts(NEAR_M) + rng.normal(0.0, 0.01, 4))})
        w0 = _near_weight(fuser)
        est, dec = fuser.push("echo", 0.12, 0.0)  # a zero echo time: no echo
        assert dec.code == D.DROPOUT
        assert est.n_hypotheses == 2
        w1 = _near_weight(fuser)
        odds[blank] = (w1 / (1 - w1)) / (w0 / (1 - w0))
        mix = echo_mixture(fuser.rig.sensors["echo"])
        ratio[blank] = math.exp(mix.loglik(mix.z_max_m, NEAR_M, dropout=True)
                                - mix.loglik(mix.z_max_m, FAR_M, dropout=True))
    # Blanking at 0.15 m: a dropout is p_blank_dropout likely for the near candidate and
    # w_max for the far one (19 with the default weights). The Kalman path weighs by
    # those probabilities, the mixture by the density in its max-range box, which adds the
    # uniform part's share of the box and 1 - p_blank_dropout: 19.000 against 19.003, hence
    # the 1e-3 tolerance.
    assert ratio[0.15] > 10
    assert odds[0.15] == pytest.approx(ratio[0.15], rel=1e-3)
    assert odds[0.15] > odds[0.03]
    # with both hypotheses outside the blanking zone a miss says nothing about the branch:
    # the mixture's ratio is 1
    assert ratio[0.03] == pytest.approx(1.0, rel=1e-9)
    assert odds[0.03] == pytest.approx(ratio[0.03], rel=0.05)


# ------------------------------------------------------------------- 6. crosstalk

def _crosstalk_readings(with_pings):
    """Two free-running echo rangers on two directions; one reading of A is B's echo.

    A faces a target at 1.0 m, B one at 0.6 m; both ping every 50 ms, B 25 ms after A,
    so their echo windows do not overlap. At cycle 20 A's clock has drifted and it pings
    1.2 ms after B: it hears B's echo first and reports B's flight time minus 1.2 ms.
    """
    n = 40
    p_a = np.arange(n) * 0.05
    p_b = p_a + 0.025
    tof_a = np.full(n, _tof(1.0))
    tof_b = np.full(n, _tof(0.6))
    k = 20
    p_a[k] = p_b[k] + 0.0012
    tof_a[k] = tof_b[k] - 0.0012  # reception at p_b + tof_b: B's echo
    out = {}
    for name, p, tof in (("a", p_a, tof_a), ("b", p_b, tof_b)):
        out[name] = (p + tof, tof, p) if with_pings else (p + tof, tof)
    return out, k


def test_crosstalk_by_ping_timing():
    # With ping times logged, a reading received at p_b + tof_b -- the time since B's ping
    # equal to B's own echo time -- is B's sound (common practice, no source). It is far
    # off A's track, so it is decided crosstalk and leaves the track alone; without the
    # ping times the same reading is only an outlier beyond the gate.
    rig = _rig([_echo("a", "front", ping_logged=True),
                _echo("b", "left", ping_logged=True)])
    res = {}
    for with_pings in (True, False):
        readings, k = _crosstalk_readings(with_pings)
        fuser = Fuser(rig)
        b = fuser.process(readings)
        a_rows = np.flatnonzero(b.sensor == fuser.sensor_names.index("a"))
        b_rows = np.flatnonzero(b.sensor == fuser.sensor_names.index("b"))
        assert b.z_m[a_rows[k], 0] == pytest.approx(C20 * (_tof(0.6) - 0.0012) / 2, rel=1e-9)
        assert b.code[a_rows[k]] == (D.CROSSTALK if with_pings else D.GATED)
        # every other reading of both units is accepted, B's of that cycle included
        others = np.delete(a_rows, k)
        assert np.all(b.code[others] == D.ACCEPTED)
        assert np.all(b.code[b_rows] == D.ACCEPTED)
        if with_pings:
            assert b.flags[a_rows[k]] & D.FLAG_CROSSTALK_SUSPECT
            assert not np.any(b.flags[others] & D.FLAG_CROSSTALK_SUSPECT)
        assert b.state[a_rows[k], 0] == pytest.approx(1.0, abs=0.005)
        res[with_pings] = b.state[a_rows]
    # A's track is the same either way: the reading was not used
    np.testing.assert_array_equal(res[True], res[False])


def _push_all(fuser, readings, events):
    decided = {}
    for _, name, i in events:
        t, tof, p = readings[name]
        _, dec = fuser.push(name, t[i], tof[i], p[i])
        decided[(name, i)] = dec.code
    return decided


def test_crosstalk_by_ping_timing_through_push():
    # The same decision one reading at a time, once B's reading (which carries B's ping
    # time and echo time) is in: B's echo and A's false reading arrive at the same instant.
    rig = _rig([_echo("a", "front", ping_logged=True),
                _echo("b", "left", ping_logged=True)])
    readings, k = _crosstalk_readings(True)
    events = sorted((t, name == "a", i) for name, (ts, _, _) in readings.items()
                    for i, t in enumerate(ts))  # at a tie, B first
    decided = _push_all(Fuser(rig), readings,
                        [(t, "a" if is_a else "b", i) for t, is_a, i in events])
    assert decided[("a", k)] == D.CROSSTALK
    assert sum(c != D.ACCEPTED for c in decided.values()) == 1


def test_crosstalk_push_in_process_order_equals_process():
    # One implementation (README.md, "Library": `Fuser.process` runs whole arrays through
    # the same compiled core as `push`; DEVELOPERS.md, "The pipeline"): pushing the
    # readings in the order `process` runs them (time, then sensor index) should decide as
    # `process` does.
    rig = _rig([_echo("a", "front", ping_logged=True),
                _echo("b", "left", ping_logged=True)])
    readings, k = _crosstalk_readings(True)
    fuser = Fuser(rig)
    b = fuser.process(readings)
    events = [(None, fuser.sensor_names[b.sensor[i]], b.row[i]) for i in b.order]
    decided = _push_all(Fuser(rig), readings, events)
    assert [decided[(n, i)] for _, n, i in events] == b.code[b.order].tolist()


def _coincident_pair(offset_m, with_pings=True, n=40, k=20):
    """A and B face targets at 0.6 m on two directions and ping every 50 ms, B 25 ms
    after A. At cycle `k` the two pings come together: A hears B's echo at B's echo
    instant, which A reports `offset_m` off its own range (A pinged 2 offset / c after B
    for a negative offset; before B, its own echo lost, for a positive one)."""
    p_a = np.arange(n) * 0.05
    p_b = p_a + 0.025
    tof_a, tof_b = np.full(n, _tof(0.6)), np.full(n, _tof(0.6))
    dp = -2.0 * offset_m / C20
    p_a[k] = p_b[k] + dp
    tof_a[k] = tof_b[k] - dp
    out = {}
    for name, p, tof in (("a", p_a, tof_a), ("b", p_b, tof_b)):
        out[name] = (p + tof, tof, p) if with_pings else (p + tof, tof)
    return out, k


@pytest.mark.parametrize("units", [-3.0, -2.0, -1.0, 1.0, 2.0, 3.0])
def test_timing_matched_reading_inside_the_gate_follows_the_first_arrival_rule(units):
    # A threshold echo detector reports the first sound after its ring-down (common
    # practice, no source). A reading at the instant another unit's echo arrives is that
    # unit's sound if this unit heard it (even odds, `XT_HEAR_P`) and its own echo would
    # have come later, P(own range > z) = Phi(-y / sqrt(S)); or its own echo, if that came
    # back inside the match tolerance, N(y; 0, S) * 2 * XT_HALF_M. The kernel's
    # predictive density and decision are checked against that mixture with scipy's
    # normal distribution.
    from scipy.stats import norm
    from fusion.estimators import _kernels as K
    rig = _rig([_echo("a", "front", ping_logged=True), _echo("b", "left", ping_logged=True)],
               **SLOW)
    sigma = 0.003  # about A's predicted sigma: the sensor's, and a little for the track
    fuser = Fuser(rig)
    b = fuser.process(_coincident_pair(units * sigma)[0])
    a_rows = np.flatnonzero(b.sensor == fuser.sensor_names.index("a"))
    i = a_rows[20]
    assert b.flags[i] & D.FLAG_CROSSTALK_SUSPECT
    y, nis = float(b.innovation_m[i]), float(b.nis[i])
    sd = abs(y) / math.sqrt(nis)
    assert sd == pytest.approx(sigma, rel=0.2)
    own = norm.pdf(y, scale=sd)
    other = (rig.estimator.outlier_density
             + K.XT_HEAR_P * norm.cdf(-y / sd) / (2.0 * K.XT_HALF_M))
    assert b.loglik[i] == pytest.approx(math.log(own + other), rel=1e-9)
    assert b.code[i] == (D.CROSSTALK if other > own else D.ACCEPTED)
    # the genuine partner, B's reading of the same instant, is matched too and kept
    b_rows = np.flatnonzero(b.sensor == fuser.sensor_names.index("b"))
    assert b.code[b_rows[20]] == D.ACCEPTED
    # Without the match the same reading meets only the ordinary outlier density.
    plain = Fuser(rig).process(_coincident_pair(units * sigma, with_pings=False)[0])
    assert plain.code[np.flatnonzero(plain.sensor == 0)[20]] == D.ACCEPTED


def test_first_arrival_rule_rejects_short_and_keeps_long_matched_readings():
    # The asymmetry itself: three sigma short of the track a matched reading is decided
    # crosstalk; three sigma beyond it, it is the unit's own echo.
    rig = _rig([_echo("a", "front", ping_logged=True), _echo("b", "left", ping_logged=True)],
               **SLOW)
    codes = {}
    for sign in (-1, 1):
        fuser = Fuser(rig)
        b = fuser.process(_coincident_pair(sign * 3 * 0.003)[0])
        codes[sign] = int(b.code[np.flatnonzero(b.sensor == 0)[20]])
    assert codes == {-1: D.CROSSTALK, 1: D.ACCEPTED}


def test_overlapping_listening_windows_without_a_timing_match_start_tracks():
    # B (target 2.0 m) pings, A (target 1.0 m) pings 2 ms later, every 50 ms. A hears its
    # own echo 7.8 ms after B's ping, while B's sound needs 11.7 ms: the timing does not
    # match, so no reading is crosstalk (common practice, no source) and, as without ping
    # times, both tracks should start and every reading be accepted.
    rig = _rig([_echo("a", "front", ping_logged=True),
                _echo("b", "left", ping_logged=True)])
    n = 40
    p_b = np.arange(n) * 0.05
    p_a = p_b + 0.002
    tof_a, tof_b = np.full(n, _tof(1.0)), np.full(n, _tof(2.0))
    without = Fuser(rig).process({"a": (p_a + tof_a, tof_a), "b": (p_b + tof_b, tof_b)})
    assert np.all(without.code == D.ACCEPTED)
    with_pings = Fuser(rig).process({"a": (p_a + tof_a, tof_a, p_a),
                                     "b": (p_b + tof_b, tof_b, p_b)})
    assert np.mean(with_pings.code == D.ACCEPTED) > 0.9


# -------------------------------------------------------------- 7. re-acquisition

REACQ = dict(reacquire_count=5, reacquire_window_s=0.5)


def test_reacquires_after_a_real_jump_within_reacquire_count_readings():
    # Gating must not lock the track out when the target really changes: consistent
    # rejected readings restart it within a bounded time (docs/track-format.md, code 2
    # `reacquired`, and docs/rig.md, `reacquire_count` / `reacquire_window_s`; common
    # practice, no source).
    rig = _rig([_echo()], **REACQ)
    rng = np.random.default_rng(7)
    dt, n, jump = 0.05, 60, 20
    t = np.arange(n) * dt
    r = np.where(np.arange(n) < jump, 1.0, 0.5) + rng.normal(0.0, 0.003, n)
    b = Fuser(rig).process({"echo": (t, _tof(r))})
    reacq = np.flatnonzero(b.code == D.REACQUIRED)
    assert reacq.size == 1
    i = reacq[0]
    assert jump < i <= jump + REACQ["reacquire_count"] - 1
    assert t[i] - t[jump] <= REACQ["reacquire_window_s"]
    assert np.all(b.code[jump:i] == D.GATED)
    assert np.all(b.code[:jump] == D.ACCEPTED) and np.all(b.code[i + 1:] == D.ACCEPTED)
    assert abs(b.state[i, 0] - 0.5) < 3 * math.sqrt(b.state[i, 2])
    assert b.state[-1, 0] == pytest.approx(0.5, abs=0.005)


def test_rangers_of_two_kinds_that_agree_restart_the_track_at_the_second_reading():
    # Independent witnesses: when a sensor of the other kind confirms a new range, the
    # change is real (M-of-N track confirmation, Blackman & Popoli, Design and Analysis
    # of Modern Tracking Systems, 1999, from memory). Something steps in at 0.35 m, in
    # front of a target at 0.7 m: the IR ranger's reading is gated, the echo ranger's
    # 3 ms later restarts the track.
    rig = _rig([_ir(), _echo()], **REACQ)
    rng = np.random.default_rng(19)
    t_ir, t_echo = np.arange(100) * 0.02, np.arange(40) * 0.05 + 0.003
    r_ir = np.where(t_ir < 1.0, 0.7, 0.35)
    v = CURVE.volts(r_ir) + rng.normal(0.0, 0.005, t_ir.size)
    r = np.where(t_echo < 1.0, 0.7, 0.35) + rng.normal(0.0, 0.003, t_echo.size)
    b = Fuser(rig).process({"ir": (t_ir, v), "echo": (t_echo, _tof(r))}).in_time_order()
    first = np.flatnonzero(b.t_s >= 1.0)[0]
    assert list(b.sensor[first:first + 2]) == [0, 1]
    assert list(b.code[first:first + 2]) == [D.GATED, D.REACQUIRED]
    assert np.all(b.code[first + 2:] <= D.REACQUIRED)
    # Two readings 3 ms apart fix a slope only to metres per second, and the target
    # stands still: the new track's rate is that slope weighed against the prior rate
    # of a new track, 0 +- init_rate_sigma_mps, in information form (common practice, no
    # source) - not the raw slope, which would restart the track again.
    i, j = first, first + 1
    dt = b.t_s[j] - b.t_s[i]
    slope = (b.z_m[j, 0] - b.z_m[i, 0]) / dt
    w_slope = dt ** 2 / (b.sigma_m[i, 0] ** 2 + b.sigma_m[j, 0] ** 2)
    w_prior = 1.0 / rig.estimator.init_rate_sigma_mps ** 2
    assert b.state[j, 1] == pytest.approx(slope * w_slope / (w_slope + w_prior), rel=1e-9)
    assert b.state[j, 4] == pytest.approx(1.0 / (w_slope + w_prior), rel=1e-9)
    assert abs(b.state[j, 1]) < rig.estimator.init_rate_sigma_mps


def test_two_units_of_one_kind_restart_the_track_sooner_but_not_at_once():
    # Two echo rangers side by side can hear the same ghost or the same post in both
    # cones, so they are not independent: together they need reacquire_count // 2 + 1
    # readings (here 3, not 5; common practice, no source); two that tell different
    # wrong stories restart nothing.
    rig = _rig([_echo("a"), _echo("b")], **REACQ)
    rng = np.random.default_rng(17)
    n, jump = 40, 20
    t = np.arange(n) * 0.025                      # a and b take turns
    r = np.where(np.arange(n) < jump, 1.0, 0.5) + rng.normal(0.0, 0.003, n)
    who = np.arange(n) % 2
    b = Fuser(rig).process({"a": (t[who == 0], _tof(r[who == 0])),
                            "b": (t[who == 1], _tof(r[who == 1]))}).in_time_order()
    assert list(b.code[jump:jump + 3]) == [D.GATED, D.GATED, D.REACQUIRED]
    assert np.all(b.code[:jump] == D.ACCEPTED) and np.all(b.code[jump + 3:] == D.ACCEPTED)
    # a and b each report a different short range after the jump: no common story, and
    # each alone has fewer than reacquire_count readings in the window
    r2 = r.copy()
    k = np.arange(jump, jump + 8)
    r2[k] = np.where(who[k] == 0, 0.5, 0.75)
    b2 = Fuser(rig).process({"a": (t[who == 0], _tof(r2[who == 0])),
                             "b": (t[who == 1], _tof(r2[who == 1]))}).in_time_order()
    assert not np.any(b2.code[jump:jump + 7] == D.REACQUIRED)


def test_an_ir_ranger_that_sees_nothing_flags_no_target():
    # A target at 0.5 m gives way to a wall at 3 m, beyond the IR ranger's 0.8 m span:
    # the IR ranger's low voltage is out of range and flagged no_target, and the echo
    # ranger alone restarts the track after reacquire_count readings (an IR "nothing"
    # is no witness: a dark target gives it too; common practice, no source).
    rig = _rig([_ir(), _echo()], **REACQ)
    rng = np.random.default_rng(23)
    t_ir, t_echo = np.arange(100) * 0.02, np.arange(40) * 0.05 + 0.003
    v = np.where(t_ir < 1.0, CURVE.volts(0.5), 0.1) + rng.normal(0.0, 0.01, t_ir.size)
    r = np.where(t_echo < 1.0, 0.5, 3.0) + rng.normal(0.0, 0.003, t_echo.size)
    b = Fuser(rig).process({"ir": (t_ir, v), "echo": (t_echo, _tof(r))}).in_time_order()
    ir, after = b.sensor == 0, b.t_s >= 1.0
    assert np.all(b.code[ir & after] == D.OUT_OF_RANGE)
    assert np.all((b.flags[ir & after] & D.FLAG_NO_TARGET) != 0)
    assert not np.any((b.flags[ir & ~after] & D.FLAG_NO_TARGET) != 0)
    n = REACQ["reacquire_count"]
    codes = b.code[(b.sensor == 1) & after]
    assert list(codes[:n]) == [D.GATED] * (n - 1) + [D.REACQUIRED]
    assert b.state[-1, 0] == pytest.approx(3.0, abs=0.01)


@pytest.mark.parametrize("ghost_m", [1.0, 1.6])
def test_ghost_pairs_do_not_take_a_track_the_ir_ranger_cannot_see(ghost_m):
    # A dark (or clear) target the IR ranger cannot see, tracked by the echo ranger at
    # 0.5 m: a pair of multipath ghosts beyond the IR span (at twice the range, or
    # farther) stays rejected and the track stays (multipath: Thrun, Burgard & Fox,
    # Probabilistic Robotics, 2005, §6.3, from memory).
    rig = _rig([_ir(), _echo()], **REACQ)
    rng = np.random.default_rng(5)
    t_ir, t_echo = np.arange(150) * 0.02, np.arange(60) * 0.05 + 0.003
    v = 0.1 + rng.normal(0.0, 0.01, t_ir.size)
    r = 0.5 + rng.normal(0.0, 0.003, t_echo.size)
    r[30:32] = ghost_m + rng.normal(0.0, 0.003, 2)
    b = Fuser(rig).process({"ir": (t_ir, v), "echo": (t_echo, _tof(r))}).in_time_order()
    echo = b.code[b.sensor == 1]
    assert list(echo[30:32]) == [D.GATED, D.GATED]
    assert not np.any(b.code == D.REACQUIRED)
    assert np.all(np.abs(b.state[5:, 0] - 0.5) < 0.02)


def test_isolated_spikes_never_restart_the_track():
    rig = _rig([_echo()], **REACQ)
    rng = np.random.default_rng(8)
    n_need = REACQ["reacquire_count"]
    r, spike = [], []
    for _ in range(6):
        # bursts of one fewer consistent spike than a restart needs, then a good reading
        r += [1.0] * 5 + [0.5] * (n_need - 1)
        spike += [False] * 5 + [True] * (n_need - 1)
    # and a longer burst of spikes that tell no consistent story: alternately 0.5-0.8 m
    # short and long (the gate widens while the track coasts, so they stay well off it)
    m = n_need + 2
    wild = 1.0 + np.where(np.arange(m) % 2 == 0, -1.0, 1.0) * rng.uniform(0.5, 0.8, m)
    r += [1.0] * 5 + list(wild) + [1.0] * 5
    spike += [False] * 5 + [True] * m + [False] * 5
    r, spike = np.array(r), np.array(spike)
    r = r + rng.normal(0.0, 0.003, r.size)
    t = np.arange(r.size) * 0.05
    b = Fuser(rig).process({"echo": (t, _tof(r))})
    assert not np.any(b.code == D.REACQUIRED)
    assert np.all(b.code[spike] == D.GATED)
    assert np.all(b.code[~spike] == D.ACCEPTED)
    # the track coasts through the bursts (its truth within 3 sigma) and is back on the
    # target at every good reading
    assert np.all(np.abs(b.state[:, 0] - 1.0) < 3 * np.sqrt(b.state[:, 2]))
    assert np.all(np.abs(b.state[~spike, 0] - 1.0) < 0.01)


# ---------------------------------------------------------------- 8. held samples

def test_held_samples_are_counted_once():
    # A unit that re-measures every 30 ms and holds its output, read by a host every
    # 10 ms, repeats each measurement three times. Counting the repeats as new readings
    # would tighten the posterior for no information (docs/rig.md, `hold_s`: "exact
    # repeats inside it are decided `held` and counted once"; docs/track-format.md, code
    # 3); the repeats must be decided `held` and the posterior must be that of the new
    # samples.
    hold = 0.03
    rng = np.random.default_rng(9)
    n_new = 20
    v_new = CURVE.volts(0.3) + rng.normal(0.0, 0.01, n_new)
    v = np.repeat(v_new, 3)
    t = np.arange(3 * n_new) * 0.01
    new = np.arange(3 * n_new) % 3 == 0
    held_rig = _rig([_ir(hold_s=hold)])
    b = Fuser(held_rig).process({"ir": (t, v)})
    assert np.all(b.code[~new] == D.HELD)
    assert np.all(b.code[new] < D.FIRST_REJECT)
    assert np.sum(b.code == D.HELD) == 2 * n_new
    once = Fuser(held_rig).process({"ir": (t[new], v[new])})
    np.testing.assert_allclose(b.state[new], once.state, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(np.sqrt(b.state[-1, 2]), np.sqrt(once.state[-1, 2]), rtol=1e-12)
    # the same samples without hold_s count every repeat: an overconfident sigma. How much
    # overconfident: filterpy's Kalman filter (the reference library) with the same model
    # (white acceleration, q = accel_psd), the readings' own R and the same start, fed
    # every sample against the new ones only, gives the ratio of the final variances
    # (0.668 here, not 1/3: the process noise between samples limits what repeats add).
    # The Gaussian sum keeps light extra hypotheses early on (the near-side candidate, the
    # outlier child), so it is not bit for bit a single Kalman filter: 1 %, a design
    # figure, not a published value (they agree to about 0.1 %).
    naive = Fuser(_rig([_ir()])).process({"ir": (t, v)})
    assert np.all(naive.code < D.FIRST_REJECT)
    est = held_rig.estimator
    p_new = _kf_final_variance(t[new], b.sigma_m[new, 0] ** 2, est)
    p_all = _kf_final_variance(t, naive.sigma_m[:, 0] ** 2, est)
    assert p_all < p_new
    assert naive.state[-1, 2] / b.state[-1, 2] == pytest.approx(p_all / p_new, rel=0.01)


def test_fresh_values_faster_than_the_hold_cycle_inflate_r():
    # A value that changes sooner than the unit's cycle is a partial update; its R is
    # inflated (flag r_inflated) instead of trusting it in full: by hold_s / dt (docs/rig.md,
    # `hold_s`; docs/track-format.md, flag 4 `r_inflated`).
    hold = 0.03
    rng = np.random.default_rng(10)
    t = np.arange(30) * 0.01
    v = CURVE.volts(0.3) + rng.normal(0.0, 0.01, 30)
    b = Fuser(_rig([_ir(hold_s=hold)])).process({"ir": (t, v)})
    naive = Fuser(_rig([_ir()])).process({"ir": (t, v)})
    assert np.all(b.code < D.FIRST_REJECT)
    assert np.all(b.flags[1:] & D.FLAG_R_INFLATED) and not b.flags[0] & D.FLAG_R_INFLATED
    # The ratio of final variances that R x hold_s / dt (here x3 from the second reading
    # on) gives, from filterpy's Kalman filter of the same model (reference library; 2.49
    # here), to 1 % (the design figure of the test above).
    est = _rig([_ir()]).estimator
    r = naive.sigma_m[:, 0] ** 2
    inflated = r * np.r_[1.0, hold / np.diff(t)]
    p_ratio = _kf_final_variance(t, inflated, est) / _kf_final_variance(t, r, est)
    assert p_ratio > 1.0   # a larger R leaves a larger variance
    assert b.state[-1, 2] / naive.state[-1, 2] == pytest.approx(p_ratio, rel=0.01)


# ------------------------------------------------------ 9. push versus process, inputs

def _mixed_readings(rng):
    n = 40
    t_e = np.sort(rng.uniform(0.0, 2.0, n))
    r = 0.5 + 0.15 * np.sin(t_e) + rng.normal(0.0, 0.003, n)
    raw_e = _tof(r)
    raw_e[5] = np.nan          # invalid
    raw_e[9] = 0.0             # dropout
    raw_e[13] = _tof(0.01)     # inside the blanking zone: out of range
    raw_e[17] = _tof(2.5)      # a spike: gated
    t_e[21] = np.nan           # invalid time
    t_i = np.sort(rng.uniform(0.0, 2.0, n))
    v = CURVE.volts(0.5 + 0.15 * np.sin(t_i)) + rng.normal(0.0, 0.01, n)
    v[3] = np.nan
    v[7] = 4.9                 # far above the peak: out of range
    return {"echo": (t_e, raw_e), "ir": (t_i, v)}


def test_push_and_process_agree_reading_for_reading():
    # One implementation (README.md, "Library"; DEVELOPERS.md, "The pipeline": `push`
    # goes through exactly the same code as a replay): pushing the readings one by one in
    # the order the batch processed them gives the same decision and state for every
    # reading.
    rig = _rig([_ir(), _echo(min_range_m=0.15)])
    readings = _mixed_readings(np.random.default_rng(11))
    fuser = Fuser(rig)
    b = fuser.process(readings)
    n_in = sum(len(v[0]) for v in readings.values())
    # every reading in gets exactly one decision out (docs/track-format.md: "Every
    # reading of the log has exactly one row")
    assert len(b) == n_in
    assert sorted(b.order.tolist()) == list(range(n_in))
    pairs = set(zip(b.sensor.tolist(), b.row.tolist()))
    assert len(pairs) == n_in
    assert np.all((b.code >= 0) & (b.code < len(D.NAMES)))
    codes = set(b.code.tolist())
    assert {D.INVALID, D.DROPOUT, D.OUT_OF_RANGE, D.GATED, D.ACCEPTED} <= codes
    tord = b.in_time_order()
    assert np.all(np.diff(tord.t_meas_s[np.isfinite(tord.t_meas_s)]) >= 0)

    stream = Fuser(rig)
    for i in b.order:
        name = stream.sensor_names[b.sensor[i]]
        t_s, raw = readings[name]
        est, dec = stream.push(name, t_s[b.row[i]], raw[b.row[i]])
        assert dec.code == b.code[i]
        assert dec.flags == b.flags[i]
        assert dec.branch == b.branch[i]
        for got, want in ((dec.innovation_m, b.innovation_m[i]), (dec.nis, b.nis[i]),
                          (dec.branch_prob, b.branch_prob[i]), (est.range_m, b.state[i, 0]),
                          (est.rate_mps, b.state[i, 1]), (est.sigma_m ** 2, b.state[i, 2]),
                          (est.t_s, b.t_state_s[i])):
            assert got == pytest.approx(want, rel=1e-12, abs=1e-15, nan_ok=True)
    # and the estimators end in the same state
    for key in ("W", "X", "P", "NH", "T"):
        np.testing.assert_array_equal(stream.state[key], fuser.state[key])


def test_unknown_sensor():
    fuser = Fuser(_rig([_echo()]))
    fuser.push("echo", 0.0, _tof(1.0))
    before = fuser.estimate("front")
    est, dec = fuser.push("no_such_sensor", 0.05, 0.003)
    assert dec.code == D.UNKNOWN_SENSOR and dec.reason == "unknown_sensor"
    assert not dec.accepted
    assert est == before
    with pytest.raises(InputError) as exc:
        fuser.process({"no_such_sensor": ([0.1], [0.003])})
    assert exc.value.field == "sensor"
    assert "echo" in str(exc.value)  # names what the rig has


@pytest.mark.parametrize("sensor", ["echo", "ir"])
def test_nan_raw_and_nan_time_are_invalid(sensor):
    fuser = Fuser(_rig([_ir(), _echo()]))
    good = _tof(1.0) if sensor == "echo" else float(CURVE.volts(0.3))
    _, first = fuser.push(sensor, 0.0, good)
    assert first.accepted
    before = fuser.estimate("front")
    _, d1 = fuser.push(sensor, 0.05, math.nan)
    _, d2 = fuser.push(sensor, math.nan, good)
    assert d1.code == D.INVALID and d2.code == D.INVALID
    assert fuser.estimate("front") == before
    b = Fuser(_rig([_ir(), _echo()])).process(
        {sensor: (np.array([0.0, 0.05, np.nan]), np.array([good, np.nan, good]))})
    assert b.code.tolist() == [first.code, D.INVALID, D.INVALID]


def test_late_readings():
    # Readings older than the track by more than max_lag_s are `late`; within it they
    # are applied at the track's time (no retrodiction).
    fuser = Fuser(_rig([_echo()], max_lag_s=0.05))
    for t in (0.0, 0.1, 0.2, 1.0):
        fuser.push("echo", t, _tof(1.0))
    before = fuser.estimate("front")
    est, dec = fuser.push("echo", 0.9, _tof(1.0))
    assert dec.code == D.LATE
    assert est == before
    est, dec = fuser.push("echo", 0.97, _tof(1.0))
    assert dec.accepted and est.t_s == 1.0
    # the same in a later chunk through process
    b = fuser.process({"echo": (np.array([0.5, 0.99, 1.1]), _tof(np.full(3, 1.0)))})
    assert b.code.tolist() == [D.LATE, D.ACCEPTED, D.ACCEPTED]


# ------------------------------------------------------------ 10. latency and offset

def test_latency_applies_readings_at_the_measurement_time():
    # A reading stamped t by a sensor with latency L measured the range at t - L, so it
    # is processed and applied at t - L (docs/rig.md, `latency_s`: "reading time minus
    # latency = measurement time"; docs/track-format.md, track `t_s`).
    lat = 0.07
    rig = _rig([_echo("slow", latency_s=lat), _echo("fast")])
    rng = np.random.default_rng(12)
    t = np.arange(20) * 0.05
    r = 1.0 + 0.1 * t + rng.normal(0.0, 0.003, 20)
    # "slow" stamps each reading 70 ms late, after "fast" stamped a later measurement
    t_slow = t[::2] + lat
    b = Fuser(rig).process({"slow": (t_slow, _tof(r[::2])), "fast": (t[1::2], _tof(r[1::2]))})
    slow = b.sensor == Fuser(rig).sensor_names.index("slow")
    np.testing.assert_allclose(b.t_meas_s[slow], t_slow - lat, rtol=0, atol=1e-15)
    np.testing.assert_allclose(b.t_state_s[slow], t_slow - lat, rtol=0, atol=1e-15)
    np.testing.assert_array_equal(b.t_meas_s[~slow], t[1::2])
    # processing order follows measurement time, not the stamps
    assert np.all(np.diff(b.t_meas_s[b.order]) >= 0)
    # and the run equals one where both sensors are stamped at measurement time
    ref = Fuser(_rig([_echo("slow"), _echo("fast")])).process(
        {"slow": (t_slow - lat, _tof(r[::2])), "fast": (t[1::2], _tof(r[1::2]))})
    np.testing.assert_allclose(b.state, ref.state, rtol=1e-12, atol=1e-15)
    np.testing.assert_array_equal(b.order, ref.order)


def test_mount_offset_shifts_ranges():
    # offset_m: range from the direction's reference point = sensor range + offset_m.
    off_e, off_i = 0.05, -0.02
    fuser = Fuser(_rig([_echo(offset_m=off_e), _ir(offset_m=off_i)]))
    b = fuser.process({"echo": ([0.0], _tof([1.0])), "ir": ([0.01], [CURVE.volts(0.3)])})
    e = fuser.sensor_names.index("echo")
    i_e = np.flatnonzero(b.sensor == e)[0]
    i_i = np.flatnonzero(b.sensor != e)[0]
    # echo: c t / 2 from the sensor face, plus the offset (c at the fallback temperature)
    assert b.z_m[i_e, 0] == pytest.approx(1.0 + off_e, rel=1e-12)
    assert b.raw_m[i_e] == pytest.approx(1.0, rel=1e-12)
    # IR: both candidates shift
    near, far = CURVE.ranges(float(CURVE.volts(0.3)))
    assert b.z_m[i_i, 0] == pytest.approx(far + off_i, abs=1e-9)
    assert b.z_m[i_i, 1] == pytest.approx(near + off_i, abs=1e-9)
    # encode is the inverse: a true range from the reference point comes back unchanged
    sens = fuser.rig.sensors["echo"]
    raw = sens.encode(np.array([0.7, 1.3]), TEMP_C)
    np.testing.assert_allclose(raw, _tof(np.array([0.7, 1.3]) - off_e), rtol=1e-12)
    m, _ = fuser.decode("echo", np.array([0.0, 0.1]), raw)
    np.testing.assert_allclose(m.z_m[:, 0], [0.7, 1.3], rtol=1e-12)


# ------------------------------------------------------------------------ clock jumps
# One clock stamps every sensor of a log (the log format's rule): a sensor whose stamps
# leap ahead alone is the one to doubt (common practice, no source).

def _two_streams(t_ir, t_echo, r=0.40):
    v = float(CURVE.volts(r))
    return {"ir": (np.asarray(t_ir, float), np.full(len(t_ir), v)),
            "echo": (np.asarray(t_echo, float), np.full(len(t_echo), _tof(r)))}


def _push_in_arrival_order(fuser, events):
    return [fuser.push(name, t, raw)[1].code for _arrive, name, t, raw in sorted(events)]


def test_a_gap_in_the_whole_log_loses_no_reading():
    rig = _rig([_ir(), _echo()])
    t_ir = np.r_[np.arange(0, 2, 0.02), np.arange(5, 7, 0.02)]     # all silent 2..5 s
    t_echo = np.r_[np.arange(0.005, 2, 0.05), np.arange(5.005, 7, 0.05)]
    b = Fuser(rig).process(_two_streams(t_ir, t_echo))
    assert not np.any(b.code == D.CLOCK_AHEAD)
    assert not np.any(b.code == D.LATE)


def test_a_sensor_whose_clock_jumps_ahead_is_caught_and_the_others_keep_the_track():
    rig = _rig([_ir(), _echo()])
    v, tof = float(CURVE.volts(0.40)), _tof(0.40)
    jump = 0.5
    events = []  # (arrival, sensor, stamp, raw): arrival is the true time
    for t in np.arange(0, 6, 0.02):
        stamp = t + (jump if 2.0 <= t < 4.0 else 0.0)
        events.append((t, "ir", stamp, v))
    for t in np.arange(0.005, 6, 0.05):
        events.append((t, "echo", t, tof))
    f = Fuser(rig)
    codes = _push_in_arrival_order(f, events)
    ev = sorted(events)
    ir_in = [c for (a, n, _t, _r), c in zip(ev, codes) if n == "ir" and 2.0 <= a < 4.0]
    echo_in = [c for (a, n, _t, _r), c in zip(ev, codes) if n == "echo" and 2.0 <= a < 4.0]
    ir_after = [c for (a, n, _t, _r), c in zip(ev, codes) if n == "ir" and 4.1 <= a]
    assert D.LATE not in echo_in
    # the first leapt readings move the track's clock until an echo reading would have
    # been late behind them (at most one echo period); every later one is caught
    assert np.mean(np.array(ir_in) == D.CLOCK_AHEAD) > 0.95
    assert ir_in.count(D.ACCEPTED) <= 0.05 / 0.02 + 1
    assert D.CLOCK_AHEAD not in ir_after and ir_after.count(D.ACCEPTED) > 50
    est = f.estimate("front")
    assert abs(est.range_m - 0.40) < 0.01


def test_a_sensor_left_alone_ahead_is_believed_after_a_while():
    rig = _rig([_ir(), _echo()])
    v, tof = float(CURVE.volts(0.40)), _tof(0.40)
    events = [(t, "echo", t, tof) for t in np.arange(0.005, 2.0, 0.05)]
    # the IR leaps 0.5 s at 1 s and the echo ranger then falls silent for good at 2 s
    events += [(t, "ir", t + (0.5 if t >= 1.0 else 0.0), v) for t in np.arange(0, 5, 0.02)]
    f = Fuser(rig)
    codes = _push_in_arrival_order(f, events)
    ev = sorted(events)
    ir_late_phase = [c for (a, n, _t, _r), c in zip(ev, codes) if n == "ir" and a >= 2.0]
    from fusion.estimators._kernels import AHEAD_ESCAPE
    ahead = [i for i, c in enumerate(ir_late_phase) if c == D.CLOCK_AHEAD]
    assert len(ahead) <= AHEAD_ESCAPE
    assert ir_late_phase[-50:].count(D.ACCEPTED) == 50


def test_clock_screen_is_the_same_pushed_in_stamp_order_and_in_a_batch():
    rig = _rig([_ir(), _echo()])
    t_ir = np.r_[np.arange(0, 2, 0.02), np.arange(2.5, 4, 0.02)]   # leaps 0.5 s at 2 s
    t_echo = np.arange(0.005, 4, 0.05)
    streams = _two_streams(t_ir, t_echo)
    b = Fuser(rig).process(streams).in_time_order()
    f = Fuser(rig)
    ev = sorted([(t, n, t, raw) for n, (ts, raws) in streams.items() for t, raw in zip(ts, raws)],
                key=lambda e: (e[0], e[1] != "ir"))
    pushed = [f.push(n, t, raw)[1].code for _a, n, t, raw in ev]
    assert list(b.code) == pushed
    assert not np.any(b.code == D.CLOCK_AHEAD)


@pytest.mark.parametrize("jump, echo_period", [(0.3, 0.2), (0.5, 0.4), (0.5, 0.05)])
def test_a_jumped_clock_is_caught_whatever_the_partners_rate(jump, echo_period):
    rig = _rig([_ir(), _echo()])
    v, tof = float(CURVE.volts(0.40)), _tof(0.40)
    events = [(t, "ir", t + (jump if 2.0 <= t < 4.0 else 0.0), v) for t in np.arange(0, 6, 0.02)]
    events += [(t, "echo", t, tof) for t in np.arange(0.005, 6, echo_period)]
    ev = sorted(events)
    codes = _push_in_arrival_order(Fuser(rig), events)
    echo_codes = [c for (a, n, _t, _r), c in zip(ev, codes) if n == "echo"]
    assert D.LATE not in echo_codes
    ir_in = [c for (a, n, _t, _r), c in zip(ev, codes) if n == "ir" and 2.0 + echo_period < a < 4.0]
    assert np.mean(np.array(ir_in) == D.CLOCK_AHEAD) > 0.95
    ir_after = [c for (a, n, _t, _r), c in zip(ev, codes) if n == "ir" and a > 4.0 + echo_period]
    assert D.CLOCK_AHEAD not in ir_after and D.LATE not in ir_after


def test_a_sensor_alone_in_its_direction_is_caught_by_another_directions_sensor():
    rig = _rig([_ir(direction="front"), _echo(direction="left")])
    v, tof = float(CURVE.volts(0.40)), _tof(1.0)
    events = [(t, "ir", t + (0.5 if 2.0 <= t < 4.0 else 0.0), v) for t in np.arange(0, 6, 0.02)]
    events += [(t, "echo", t, tof) for t in np.arange(0.005, 6, 0.05)]
    ev = sorted(events)
    codes = _push_in_arrival_order(Fuser(rig), events)
    ir_in = [c for (a, n, _t, _r), c in zip(ev, codes) if n == "ir" and 2.1 < a < 4.0]
    assert np.mean(np.array(ir_in) == D.CLOCK_AHEAD) > 0.95
    # back in step, its own track's time label came back with it: nothing late
    ir_after = [c for (a, n, _t, _r), c in zip(ev, codes) if n == "ir" and a > 4.1]
    assert D.CLOCK_AHEAD not in ir_after and D.LATE not in ir_after


def test_a_one_sensor_rig_never_marks_a_leap():
    rig = _rig([_echo()])
    t = np.r_[np.arange(0, 1, 0.05), np.arange(3, 4, 0.05)]
    f = Fuser(rig)
    b = f.process({"echo": (t, np.full(t.size, _tof(1.0)))})
    assert not np.any(b.code == D.CLOCK_AHEAD)
    assert f.state["CLOCK_ODD"][0] == 0


def test_intermittent_farther_ghosts_do_not_take_the_track():
    # A multipath ghost is a later echo of the same target (common practice, no source):
    # every third reading at 2 m while the target stands at 1 m must not restart the
    # track there (an accepted reading empties the re-acquisition buffer).
    rig = _rig([_echo()])
    t = np.arange(0, 4, 0.02)
    r = np.where(np.arange(t.size) % 3 == 2, 2.0, 1.0)
    b = Fuser(rig).process({"echo": (t, _tof(r))}).in_time_order()
    assert not np.any(b.code == D.REACQUIRED)
    assert np.mean(np.abs(b.state[:, 0] - 1.0) < 0.05) > 0.99


def test_streaming_for_hours_keeps_the_air_history_bounded():
    # Pushing an air sample every 0.5 s and readings between them for three hours must
    # not grow the fuser's memory (a robot runs for days), and each reading still gets
    # the last good sample before it (failed samples are not kept: they carry no value).
    rig = Rig.from_dict({"air": {"stream": "air", "fallback_temp_c": 20.0},
                         "sensor": [_echo()]})
    f = Fuser(rig)
    sizes = []
    for k in range(0, 3 * 3600 * 2, 50):        # 25 s blocks
        ta = k * 0.5 + 0.5 * np.arange(50)
        va = 15.0 + 0.001 * ta
        va[7] = np.nan                               # a failed sample
        f.push_air(ta, va)
        tr = ta + 0.25
        b = f.process({"echo": (tr, np.full(tr.size, _tof(1.0)))})
        sizes.append(f._air_t.size)
        assert np.allclose(b.temp_c, va[np.where(np.isfinite(va), np.arange(50),
                                                 np.arange(50) - 1)])
    assert max(sizes) <= 2 * 60 / 0.5 + 60   # about the last minute and one block


def test_a_jump_caught_by_another_direction_costs_its_own_direction_nothing():
    # the jumped IR faces front with an echo ranger; a faster echo ranger on the left is
    # the first to show the jump: the front track's time goes back too
    rig = _rig([_ir(direction="front"), _echo(direction="front"),
                _echo(name="side", direction="left")])
    v, tof = float(CURVE.volts(0.40)), _tof(0.40)
    events = [(t, "ir", t + (1.5 if 2.0 <= t < 4.0 else 0.0), v) for t in np.arange(0, 6, 0.02)]
    events += [(t, "echo", t, tof) for t in np.arange(0.005, 6, 0.05)]
    events += [(t, "side", t, _tof(1.0)) for t in np.arange(0.003, 6, 0.01)]
    ev = sorted(events)
    codes = _push_in_arrival_order(Fuser(rig), events)
    assert D.LATE not in [c for (a, n, _t, _r), c in zip(ev, codes) if n != "ir"]


# ------------------------------------------------------------ processing order

def test_processing_order_is_the_three_key_sort():
    # The order events are run in: time (NaN first), then ping (NaN last), then sensor,
    # then input order -- numpy's stable lexsort as the reference. The fast path merges
    # the sensors' runs; interleaved or unsorted input falls back to the sort.
    from fusion.fuser import _processing_order
    rng = np.random.default_rng(7)
    merged = 0
    for _ in range(400):
        sensors, times, pings = [], [], []
        for s in range(int(rng.integers(1, 5))):
            n = int(rng.integers(1, 50))
            t = np.sort(rng.integers(0, 15, n) * 0.01)  # coarse: many ties between sensors
            if rng.random() < 0.3:
                t[rng.integers(0, n)] = np.nan
            if rng.random() < 0.2:
                t = rng.permutation(t)
            p = rng.integers(0, 4, n).astype(float)
            if rng.random() < 0.5:
                p[:] = np.nan
            sensors.append(np.full(n, s))
            times.append(t)
            pings.append(p)
        sensor, t, p = (np.concatenate(x) for x in (sensors, times, pings))
        ref = np.lexsort((sensor, np.where(np.isfinite(p), p, np.inf),
                          np.where(np.isfinite(t), t, -np.inf)))
        np.testing.assert_array_equal(_processing_order(sensor, t, p), ref)
        merged += bool(np.all(np.diff(np.where(np.isfinite(t), t, -np.inf)[sensor == 0]) >= 0))
    assert merged > 100  # the merge path was exercised, not only the fallback
