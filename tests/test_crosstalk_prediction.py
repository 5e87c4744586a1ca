"""Crosstalk screening when the crosstalk reading is screened before its partner.

When unit A hears unit B's echo, A's false reading and B's own reading arrive at the same
instant; screening is causal, so if A's reading comes first B's ping is not known yet.
`fusion.screening.classify_crosstalk` then predicts B's arrival from B's last pings (a
free-running unit fires on a steady period, and its echo time changes little from one
ping to the next: common practice, no source). These tests build the pair by hand.
"""
from __future__ import annotations

import numpy as np
import pytest

from fusion import decisions as D
from fusion.fuser import Fuser
from fusion.screening import classify_crosstalk

from test_fuser import C20, _echo, _rig, _tof

TOL = 2.5e-4
TAU_MIN = np.array([2 * 0.03 / C20] * 2)
TAU_MAX = np.array([2 * 4.0 / C20] * 2)


def _b_pings(n=6, period=0.05, tof=None, t0=0.0):
    p = t0 + np.arange(n) * period
    return p, np.full(n, _tof(0.6) if tof is None else tof)


def _classify(rx_a, p_b, tof_b, window=0.5):
    pings = [(np.zeros(0), np.zeros(0), np.zeros(0, np.int64)),
             (p_b, tof_b, np.arange(len(p_b)))]
    rank = np.array([len(p_b)])  # A's reading comes after every known ping of B
    return classify_crosstalk(np.array([rx_a]), np.array([0]), pings, TAU_MIN, TAU_MAX, TOL,
                              rank=rank, predict_window_s=window)


def test_predicted_arrival_marks_the_earlier_reading_of_a_pair():
    # B pings every 50 ms with a 0.6 m echo; its next ping (at 0.30 s) is not known yet.
    # A reading received 20 us before B's predicted arrival (inside the timing tolerance)
    # is B's sound: definite with prediction, unmatched without it.
    p_b, tof_b = _b_pings()
    rx = 0.30 + _tof(0.6) - 2e-5
    assert _classify(rx, p_b, tof_b)[1][0]
    assert not _classify(rx, p_b, tof_b, window=0.0)[1][0]


def test_predicted_arrival_off_by_more_than_the_tolerance_does_not_match():
    # 2 ms from B's predicted arrival is about 69 cm of two-way path at 343 m/s, i.e.
    # 34 cm of range, eight times the 0.25 ms timing tolerance: not B's echo.
    p_b, tof_b = _b_pings()
    assert not _classify(0.30 + _tof(0.6) + 2e-3, p_b, tof_b)[1][0]


def test_prediction_tolerance_grows_with_the_observed_interval_change():
    # B's last two intervals differ by 1 ms (ping jitter): a reading 0.8 ms from B's
    # predicted arrival may be B's echo, and is marked.
    p_b = np.array([0.10, 0.15, 0.20, 0.25, 0.301])
    tof_b = np.full(p_b.size, _tof(0.6))
    p_next = 0.301 + 0.051
    assert _classify(p_next + _tof(0.6) + 8e-4, p_b, tof_b)[1][0]
    steady, _ = _b_pings(5, t0=0.10)
    assert not _classify(0.35 + _tof(0.6) + 8e-4, steady, tof_b)[1][0]


def test_pings_older_than_the_window_are_not_used():
    # The one-by-one path keeps pings for about a second; the prediction uses only the
    # last half second so that both paths see the same pings.
    p_b, tof_b = _b_pings()
    rx = 0.30 + _tof(0.6)
    assert _classify(rx, p_b, tof_b, window=0.5)[1][0]
    assert not _classify(rx, p_b, tof_b, window=0.12)[1][0]


def _pair_first(n=40, k=20):
    """Two free-running echo rangers; at cycle `k` A hears B's echo 20 us before B does.

    A faces 1.0 m, B 0.6 m, both ping every 50 ms, B 25 ms after A. At cycle k A's clock
    has drifted and it pings 1.2 ms after B; the sound B hears as its echo reaches A
    first, so A's false reading is processed before B's reading (and B's ping time).
    """
    p_a = np.arange(n) * 0.05
    p_b = p_a + 0.025
    tof_a = np.full(n, _tof(1.0))
    tof_b = np.full(n, _tof(0.6))
    p_a[k] = p_b[k] + 0.0012
    tof_a[k] = tof_b[k] - 0.0012 - 2e-5
    return {name: (p + tof, tof, p) for name, p, tof in (("a", p_a, tof_a),
                                                        ("b", p_b, tof_b))}, k


def test_earlier_crosstalk_reading_is_decided_crosstalk():
    # Without the prediction this reading could only be matched by B's reading, which
    # comes after it: it would be an unflagged outlier (gated), and B's genuine reading
    # would carry the suspicion instead.
    rig = _rig([_echo("a", "front", ping_logged=True), _echo("b", "left", ping_logged=True)])
    readings, k = _pair_first()
    fuser = Fuser(rig)
    b = fuser.process(readings)
    a_rows = np.flatnonzero(b.sensor == fuser.sensor_names.index("a"))
    b_rows = np.flatnonzero(b.sensor == fuser.sensor_names.index("b"))
    assert b.t_s[a_rows[k]] < b.t_s[b_rows[k]]
    assert b.flags[a_rows[k]] & D.FLAG_CROSSTALK_SUSPECT
    assert b.code[a_rows[k]] == D.CROSSTALK
    assert np.all(b.code[np.delete(a_rows, k)] == D.ACCEPTED)
    assert np.all(b.code[b_rows] == D.ACCEPTED)
    assert b.state[a_rows[k], 0] == pytest.approx(1.0, abs=0.005)


def test_prediction_push_in_process_order_equals_process():
    # One implementation: pushing one by one in the order `process` runs the readings
    # gives the same decisions and flags, prediction included.
    rig = _rig([_echo("a", "front", ping_logged=True), _echo("b", "left", ping_logged=True)])
    readings, k = _pair_first()
    fuser = Fuser(rig)
    b = fuser.process(readings)
    events = [(None, fuser.sensor_names[b.sensor[i]], b.row[i]) for i in b.order]
    pushed = Fuser(rig)
    flags = []
    for _, name, i in events:
        t, tof, p = readings[name]
        _, dec = pushed.push(name, t[i], tof[i], p[i])
        flags.append((dec.code, dec.flags))
    assert flags == list(zip(b.code[b.order].tolist(), b.flags[b.order].tolist()))
