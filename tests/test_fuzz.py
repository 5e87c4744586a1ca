"""Property and fuzz tests: decoders, the log reader and the streaming fuser never fail
in an unplanned way, whatever they are fed.

The properties are the project's contract (DEVELOPERS.md, "Conventions": every reading
in gets exactly one decision out; user errors raise the `fusion.errors` family; bad
*readings* are flagged, never raised) and two facts of estimation:

- a covariance matrix is symmetric positive definite; the Joseph-form update keeps it so
  under rounding (Bucy & Joseph, *Filtering for Stochastic Processes with Applications to
  Guidance*, 1968; Bar-Shalom, Li & Kirubarajan, *Estimation with Applications to
  Tracking and Navigation*, 2001, §5.2.3 — from memory);
- an HDF5 chunk protected by the Fletcher-32 filter fails its read when a byte of it
  changes (Fletcher, IEEE Trans. Commun. 30(1), 1982: every single-byte error changes
  the checksum).

Example counts are kept small so the whole file runs in seconds.
"""
from __future__ import annotations

import math
import os
import signal

import h5py
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from fusion import decisions as D
from fusion.errors import InputError, LogFormatError
from fusion.fuser import Fuser
from fusion.rig import Rig
from fusion.sensors.triangulation import TriangulationCurve
from replay.logfile import SensorStream, open_log, write_log

CURVE = TriangulationCurve.typical_10_80()
FAST = settings(max_examples=60, deadline=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])

# Every output style the rig format knows, on two directions.
RIG_DICT = {
    "name": "fuzz",
    "air": {"stream": "air"},
    "sensor": [
        {"name": "ir_counts", "kind": "triangulation", "direction": "front", "output": "counts",
         "hold_s": 0.03, "curve": CURVE.to_dict()},
        {"name": "ir_volts", "kind": "triangulation", "direction": "left", "output": "volts",
         "curve": CURVE.to_dict()},
        {"name": "echo_time", "kind": "echo", "direction": "front", "output": "echo_time",
         "ping_logged": True},
        {"name": "echo_pulse", "kind": "echo", "direction": "front", "output": "pulse_width"},
        {"name": "echo_analog", "kind": "echo", "direction": "left", "output": "analog",
         "compensation": "power_up"},
        {"name": "echo_serial", "kind": "echo", "direction": "left", "output": "serial",
         "compensation": "self"},
    ],
}
RIG = Rig.from_dict(RIG_DICT)
NAMES = list(RIG.sensors)

# Floats a broken sensor or logger can produce.
WILD_FLOATS = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True),
    st.floats(min_value=-1.0, max_value=5000.0),
    st.sampled_from([0.0, -0.0, 1e-300, -1e-12, 1e300, 5e-3, 512.0, 1023.0, 1024.0]),
)
WILD_TEXT = st.one_of(
    st.text(max_size=12),
    st.from_regex(r"R\d{0,7}\r?\n?", fullmatch=True),
    st.sampled_from(["R1000\r", "R", "R-5", "R99999", "r1000", "R1000\r\n", "R\u0661\u0662"]),
)


# ------------------------------------------------------------------------ decoders
@FAST
@given(raw=st.lists(WILD_FLOATS, min_size=1, max_size=30), name=st.sampled_from(
    ["ir_counts", "ir_volts", "echo_time", "echo_pulse", "echo_analog"]))
def test_numeric_decoders_flag_bad_readings_and_never_raise(raw, name):
    s = RIG.sensors[name]
    t = np.arange(len(raw)) * 0.01
    if s.kind == "echo":
        m = s.decode(np.array(raw), t, 20.0, 0.5, 0.3, power_up_temp_c=15.0)
    else:
        m = s.decode(np.array(raw), t)
    _check_measurements(m, len(raw), s)
    raw_a = np.array(raw)
    # A non-finite or negative raw value is never used (project contract, docs/rig.md).
    bad = ~np.isfinite(raw_a) | (raw_a < 0)
    assert np.all(m.code[bad] >= D.FIRST_REJECT)


@FAST
@given(frames=st.lists(WILD_TEXT, min_size=1, max_size=30))
def test_serial_decoder_flags_garbled_frames(frames):
    s = RIG.sensors["echo_serial"]
    m = s.decode(np.array(frames, dtype=object), np.arange(len(frames)) * 0.05, 20.0, 0.5)
    _check_measurements(m, len(frames), s)
    for f, code in zip(frames, m.code):
        # The rig's default frame is "R" and 1 to 5 ASCII digits, then optionally CR and
        # LF (docs/rig.md); anything else must be flagged, never read as a range.
        body = f[:-1] if f.endswith("\n") else f
        body = body[:-1] if body.endswith("\r") else body
        digits = body[1:]
        if not (body.startswith("R") and 1 <= len(digits) <= 5
                and all(c in "0123456789" for c in digits)):
            assert code == D.INVALID, f


def test_numeric_decoder_refuses_text_with_the_project_error():
    s = RIG.sensors["echo_time"]
    with pytest.raises(InputError) as exc:
        s.decode(np.array(["abc"], dtype=object), np.zeros(1), 20.0, 0.5)
    assert exc.value.field == "raw"


def _check_measurements(m, n, sensor):
    assert len(m) == n and m.z_m.shape == (n, 2) and m.sigma_m.shape == (n, 2)
    assert set(np.unique(m.code)) <= set(range(len(D.NAMES)))
    ok = m.code < D.FIRST_REJECT
    # A usable reading has at least one finite candidate with a finite, positive sigma.
    has = np.isfinite(m.z_m) & np.isfinite(m.sigma_m) & (m.sigma_m > 0)
    assert np.all(has[ok].any(axis=1))
    # NaN where there is no candidate, in both columns together with its sigma.
    assert np.array_equal(np.isnan(m.z_m), np.isnan(m.sigma_m))
    if sensor.kind == "echo":
        lo = sensor.min_range_m + sensor.offset_m
        hi = sensor.max_range_m + sensor.offset_m
        z = m.z_m[ok, 0]
        assert np.all((z >= lo - 1e-12) & (z <= hi + 1e-12))


# ------------------------------------------------------------------------ log reader
def _small_log(path):
    t = np.arange(40) * 0.05
    streams = [
        SensorStream("ir_counts", "triangulation", "counts", t, np.full(40, 300.0)),
        SensorStream("echo_serial", "echo", "serial", t + 0.01, ["R0500\r"] * 40),
        SensorStream("echo_time", "echo", "echo_time", t + 0.02, np.full(40, 0.0029),
                     ping_t_s=t + 0.017),
    ]
    env = {"air": ("air_temperature", np.arange(3.0), np.full(3, 21.0))}
    truth = {"front": (np.arange(3.0), np.full(3, 0.5))}
    write_log(path, RIG.to_toml(), streams, env, truth, created_utc="2024-01-01T00:00:00+00:00")
    return {s.name: s for s in streams}, env, truth


def _read_everything(path):
    with open_log(path) as log:
        out = {}
        for name in log.sensors:
            s = log.read_sensor(name)
            out[name] = (s.t_s, s.raw, s.ping_t_s)
        for name in log.environments:
            out["env:" + name] = log.environment(name)
        for d in log.truth_directions:
            out["truth:" + d] = log.truth(d)
        n = sum(len(s) for w in log.iter_windows(0.5) for s in w.values())
        out["rig"] = log.rig_toml
        out["n"] = n
        return out


@pytest.fixture(scope="module")
def clean_log(tmp_path_factory):
    path = str(tmp_path_factory.mktemp("fuzzlog") / "clean.h5")
    _small_log(path)
    with open(path, "rb") as fh:
        data = fh.read()
    return data, _read_everything(path), _chunk_spans(path)


def _chunk_spans(path):
    """Byte ranges of every stored chunk (the bytes the Fletcher-32 checksum covers)."""
    spans = []

    def visit(_name, obj):
        if isinstance(obj, h5py.Dataset) and obj.chunks:
            for i in range(obj.id.get_num_chunks()):
                info = obj.id.get_chunk_info(i)
                spans.append((info.byte_offset, info.size))

    with h5py.File(path, "r") as f:
        f.visititems(visit)
    return spans


def _same_as_written(got, expected):
    assert got.keys() == expected.keys()
    for key, want in expected.items():
        if key in ("rig", "n"):
            assert got[key] == want, key
            continue
        for a, b in zip(got[key], want):
            if a is None or b is None:
                assert a is None and b is None, key
            elif np.asarray(b).dtype == object:
                assert list(a) == list(b), key
            else:
                np.testing.assert_array_equal(a, b, err_msg=key)


@settings(max_examples=60, deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(hits=st.lists(st.tuples(st.floats(0.0, 1.0, exclude_max=True), st.integers(1, 255)),
                     min_size=1, max_size=3),
       cut=st.one_of(st.none(), st.none(), st.floats(0.05, 0.999)))
def test_damaged_data_or_a_cut_file_is_detected_on_read(clean_log, tmp_path, hits, cut):
    """A changed byte inside any dataset's chunks, or a file cut short, raises
    LogFormatError naming the file; it never reads as other numbers (Fletcher 1982)."""
    data, expected, spans = clean_log
    buf = bytearray(data)
    total = sum(size for _, size in spans)
    for where, flip in hits:
        k = int(where * total)
        for off, size in spans:
            if k < size:
                buf[off + k] ^= flip
                break
            k -= size
    if cut is not None:
        buf = buf[: int(cut * len(buf))]
    path = str(tmp_path / "damaged.h5")
    with open(path, "wb") as fh:
        fh.write(bytes(buf))
    try:
        got = _read_everything(path)
    except LogFormatError as exc:
        assert exc.file == path
        return
    _same_as_written(got, expected)


def _read_in_child(path, expected):
    """Read a damaged log in a forked child (a damaged header can crash the HDF5 library
    itself); returns "same", "error", "silent", "escaped: <exception>", "hung" (no answer
    within `_CHILD_LIMIT_S`: an endless loop, not a slow machine) or "crashed: <how>"."""
    r, w = os.pipe()
    pid = os.fork()
    if pid == 0:  # pragma: no cover - runs in the child
        os.close(r)
        signal.alarm(_CHILD_LIMIT_S)
        try:
            got = _read_everything(path)
            try:
                _same_as_written(got, expected)
                out = "same"
            except AssertionError:
                out = "silent"
        except LogFormatError:
            out = "error"
        except BaseException as exc:  # noqa: BLE001 - any escape is the finding
            out = f"escaped: {type(exc).__name__}"
        os.write(w, out.encode())
        os._exit(0)
    os.close(w)
    out = os.read(r, 200).decode()
    os.close(r)
    _, status = os.waitpid(pid, 0)
    if out:
        return out
    if os.WIFSIGNALED(status) and os.WTERMSIG(status) == signal.SIGALRM:
        return "hung"
    return f"crashed: {'signal %d' % os.WTERMSIG(status) if os.WIFSIGNALED(status) else status}"


# A read of this small log takes milliseconds; only a loop that never ends reaches this.
_CHILD_LIMIT_S = 60


@pytest.mark.skipif(not hasattr(os, "fork"), reason="needs fork to survive a crash")
def test_damaged_dataset_header_is_detected_on_read(clean_log, tmp_path):
    """Flip each byte of one dataset's object header: the read must fail with
    LogFormatError or return exactly what was written."""
    data, expected, _spans = clean_log
    path = str(tmp_path / "clean.h5")
    with open(path, "wb") as fh:
        fh.write(data)
    with h5py.File(path, "r") as f:
        info = h5py.h5o.get_info(f["sensors/ir_counts/raw"].id)
        start, size = info.addr, info.hdr.space.total
    outcomes = {}
    bad = str(tmp_path / "damaged.h5")
    for off in range(start, start + size):
        buf = bytearray(data)
        buf[off] ^= 0xFF
        with open(bad, "wb") as fh:
            fh.write(bytes(buf))
        out = _read_in_child(bad, expected)
        if out not in ("same", "error"):
            outcomes[off] = out
    assert outcomes == {}


# ------------------------------------------------------------------------ the fuser
def _reading():
    sensor = st.one_of(st.sampled_from(NAMES), st.sampled_from(["", "sonar9", "IR_COUNTS"]))
    dt = st.one_of(st.floats(0.0, 0.2), st.sampled_from([0.0, -0.03, -1.0, 5.0, 1e6, 1e300]),
                   st.floats(allow_nan=True, allow_infinity=True))
    raw = st.one_of(WILD_FLOATS, WILD_TEXT, st.none(), st.integers(-5, 5000),
                    st.sampled_from([0.0029, 0.0058, 300, 512, 0.7, 1.5, "R0500\r"]))
    ping = st.one_of(st.just(math.nan), st.floats(-0.05, 0.0), WILD_FLOATS, st.none())
    odd_t = st.one_of(st.none(), st.just("soon"), st.just(math.nan))
    return st.tuples(sensor, dt, raw, ping, st.one_of(st.none(), odd_t))


def _check_state(fuser):
    """Every live hypothesis has a symmetric positive definite covariance."""
    s = fuser.state
    for d, direction in enumerate(fuser.directions):
        nh = int(s["NH"][d])
        if nh == 0:
            continue
        w = s["W"][d, :nh]
        assert np.all(np.isfinite(w)) and np.all(w >= 0) and abs(w.sum() - 1) < 1e-9
        assert np.all(np.isfinite(s["X"][d, :nh]))
        for P in s["P"][d, :nh]:
            assert np.all(np.isfinite(P)), P
            assert P[0, 1] == P[1, 0], P
            assert P[0, 0] > 0 and P[0, 0] * P[1, 1] - P[0, 1] ** 2 > 0, P
        est = fuser.estimate(direction)
        assert math.isfinite(est.range_m) and est.sigma_m > 0


@FAST
@given(readings=st.lists(_reading(), min_size=1, max_size=40),
       air=st.lists(st.tuples(st.floats(-1, 10), WILD_FLOATS), max_size=4))
def test_push_never_fails_and_keeps_every_covariance_positive_definite(readings, air):
    fuser = Fuser(RIG)
    if air:
        fuser.push_air([a for a, _ in air], [v for _, v in air])
    t = 0.0
    for sensor, dt, raw, ping, odd in readings:
        t = t + dt if math.isfinite(t + dt) else dt
        when = t if odd is None else odd
        est, dec = fuser.push(sensor, when, raw, ping)
        # exactly one decision, with a known code; unknown sensors are said so
        assert 0 <= dec.code < len(D.NAMES)
        if sensor not in RIG.sensors:
            assert dec.code == D.UNKNOWN_SENSOR
        if dec.accepted:
            assert math.isfinite(est.range_m) and est.sigma_m > 0
        _check_state(fuser)


@FAST
@given(readings=st.lists(st.tuples(st.sampled_from(NAMES), st.floats(0.0, 0.1), WILD_FLOATS),
                         min_size=1, max_size=60))
def test_process_gives_one_decision_per_reading(readings):
    fuser = Fuser(RIG)
    batch = {}
    t = 0.0
    for name, dt, raw in readings:
        t += dt
        ts, rs = batch.setdefault(name, ([], []))
        ts.append(t)
        rs.append("R0500\r" if RIG.sensors[name].output == "serial" and math.isfinite(raw)
                  else ("?" if RIG.sensors[name].output == "serial" else raw))
    b = fuser.process({k: (np.array(v[0]), np.array(v[1], dtype=object)
                           if RIG.sensors[k].output == "serial" else np.array(v[1]))
                       for k, v in batch.items()})
    assert len(b) == len(readings)
    # (sensor, row) names every reading once
    pairs = set(zip(b.sensor.tolist(), b.row.tolist()))
    assert len(pairs) == len(readings)
    assert np.all((b.code >= 0) & (b.code < len(D.NAMES)))
    assert sorted(b.order.tolist()) == list(range(len(readings)))
    _check_state(fuser)


@pytest.mark.parametrize("value", [
    (np.zeros(1), np.array(["x"], dtype=object)),          # text for a numeric unit
    (np.zeros(2), np.zeros(3)),                            # lengths differ
    (np.zeros(2), np.zeros(2), np.zeros(3)),               # ping times of another length
    (np.zeros((2, 2)), np.zeros((2, 2))),                  # not 1-D
    (["soon"], [0.003]),                                   # a time that is not a number
])
def test_process_refuses_malformed_arrays_with_the_project_error(value):
    with pytest.raises(InputError) as exc:
        Fuser(RIG).process({"echo_time": value})
    assert exc.value.field.startswith("echo_time")


def test_process_refuses_an_unknown_sensor_by_name():
    with pytest.raises(InputError, match="sonar9"):
        Fuser(RIG).process({"sonar9": (np.zeros(1), np.zeros(1))})


# ------------------------------------------------------------------------ stuck outputs
@FAST
@given(values=st.lists(st.sampled_from([1.0, 2.0, 3.0]), min_size=1, max_size=80),
       usable=st.lists(st.booleans(), min_size=80, max_size=80),
       cuts=st.lists(st.integers(0, 80), max_size=4), hold=st.sampled_from([0.0, 0.03]))
def test_stuck_screen_gives_the_same_answer_chunk_by_chunk(values, usable, cuts, hold):
    """Streaming and batch must agree (DEVELOPERS.md: push goes through exactly the same code
    as a replay)."""
    from fusion.screening import stuck_readings
    raw = np.array(values)
    ok = np.array(usable[: len(raw)])
    t = np.arange(len(raw)) * 0.01
    whole, _ = stuck_readings(raw, ok, t, 4, hold)
    parts, carry = [], None
    edges = [0] + sorted(c for c in cuts if c < len(raw)) + [len(raw)]
    for a, b in zip(edges[:-1], edges[1:]):
        m, carry = stuck_readings(raw[a:b], ok[a:b], t[a:b], 4, hold, carry)
        parts.append(m)
    np.testing.assert_array_equal(np.concatenate(parts), whole)
    # a reading is stuck only if it is usable and the three usable ones before it agree
    idx = np.flatnonzero(ok)
    for j, i in enumerate(idx):
        run = raw[idx[max(0, j - 3): j + 1]]
        expect = j >= 3 and np.all(run == raw[i])
        if hold == 0.0:
            assert whole[i] == expect
        else:
            assert whole[i] <= expect
    assert not np.any(whole[~ok])
