"""The log file format: round trip, windows, checksums, versions, malformed files.

The layout under test is docs/log-format.md (format version 1). Facts about HDF5 used
here (chunk addresses from H5Dget_chunk_info, the Fletcher-32 filter failing the read of
a damaged chunk, optional object timestamps, NUL-padded fixed-length strings) are from
the HDF5 user guide and the h5py documentation, from memory. Atomic replace and
"never over an input" are common practice, no source.
"""
import os
import time

import h5py
import numpy as np
import pytest

from fusion.errors import InputError, LogFormatError
from replay import logfile
from replay.logfile import LogFile, SensorStream, open_log, write_log

RIG = 'name = "bench"\n\n[[sensor]]\nname = "ir_front"\nkind = "triangulation"\n'
WHEN = "2024-05-01T12:00:00+00:00"


def _streams(n=200, seed=1):
    rng = np.random.default_rng(seed)
    t_ir = np.cumsum(rng.uniform(0.01, 0.03, n))
    ir = SensorStream("ir_front", "triangulation", "counts", t_ir,
                      rng.integers(0, 1024, n).astype(float), label=rng.integers(0, 6, n))
    t_e = np.cumsum(rng.uniform(0.04, 0.06, n // 2))
    ping = t_e - 0.005
    ping[::3] = np.nan                     # unknown ping times
    echo = SensorStream("echo_front", "echo", "echo_time", t_e, rng.uniform(0.001, 0.02, n // 2),
                        ping_t_s=ping)
    frames = ["R1234\r", "R0150", "", "héllo ✓", "R\\r9", "  lead and trail  "]
    ser = SensorStream("echo_serial", "echo", "serial", np.arange(len(frames)) * 0.1, frames)
    return [ir, echo, ser]


def _env():
    t = np.arange(10.0)
    return {"air": ("air_temperature", t, 20 + 0.1 * t), "rh": ("relative_humidity", t, 0.4 + 0 * t)}


def _truth():
    return {"front": (np.arange(5.0), np.array([1.0, 1.1, np.nan, 1.3, 1.4]))}


def _write(path, streams=None, **kw):
    kw.setdefault("created_utc", WHEN)
    write_log(path, RIG, _streams() if streams is None else streams, _env(), _truth(),
              clock="seconds since logger power-up", **kw)
    return path


def test_round_trip_equal_including_serial_text_and_nan_pings(tmp_path):
    path = _write(tmp_path / "a.h5")
    streams = _streams()
    with open_log(path) as log:
        assert log.format_version == 1
        assert log.rig_toml == RIG
        assert log.created_utc == WHEN
        assert log.clock == "seconds since logger power-up"
        assert set(log.sensors) == {s.name for s in streams}
        for s in streams:
            got = log.read_sensor(s.name)
            info = log.sensors[s.name]
            assert (info.kind, info.output, info.n) == (s.kind, s.output, len(s))
            np.testing.assert_array_equal(got.t_s, s.t_s)
            if s.output == "serial":
                assert list(got.raw) == list(s.raw)    # exact text, "\r" and non-ASCII kept
            else:
                np.testing.assert_array_equal(got.raw, s.raw)
            if s.ping_t_s is None:
                assert got.ping_t_s is None
            else:
                np.testing.assert_array_equal(got.ping_t_s, s.ping_t_s)  # NaN == NaN here
                assert np.isnan(got.ping_t_s[0])
            if s.label is None:
                assert got.label is None
            else:
                assert got.label.dtype == np.int8
                np.testing.assert_array_equal(got.label, s.label)
        for name, (q, t, v) in _env().items():
            assert log.environments[name].quantity == q
            t2, v2 = log.environment(name)
            np.testing.assert_array_equal(t2, t)
            np.testing.assert_array_equal(v2, v)
        t, r = log.truth("front")
        np.testing.assert_array_equal(r, _truth()["front"][1])
        assert log.truth("rear") is None
        assert log.time_span() == (min(s.t_s.min() for s in streams),
                                   max(s.t_s.max() for s in streams))


def test_read_sensor_slices_like_python(tmp_path):
    path = _write(tmp_path / "a.h5")
    full = _streams()[0]
    with open_log(path) as log:
        part = log.read_sensor("ir_front", 10, 20)
        np.testing.assert_array_equal(part.raw, full.raw[10:20])
        np.testing.assert_array_equal(log.read_sensor("ir_front", -5).t_s, full.t_s[-5:])
        with pytest.raises(InputError, match="no sensor 'nope'"):
            log.read_sensor("nope")


def test_empty_stream_round_trip(tmp_path):
    s = SensorStream("echo_serial", "echo", "serial", [], [])
    write_log(tmp_path / "e.h5", RIG, [s], {}, created_utc=WHEN)
    with open_log(tmp_path / "e.h5") as log:
        assert log.sensors["echo_serial"].n == 0
        assert len(log.read_sensor("echo_serial")) == 0
        assert list(log.iter_windows(1.0)) == []


def test_every_dataset_chunked_compressed_checksummed_with_units(tmp_path):
    # docs/log-format.md: gzip 4 + shuffle + fletcher32 on every array, units on numbers.
    path = _write(tmp_path / "a.h5")
    seen = []

    def visit(name, obj):
        if isinstance(obj, h5py.Dataset) and obj.shape != ():
            seen.append(name)
            assert obj.chunks is not None and obj.chunks[0] <= logfile.CHUNK_ROWS, name
            assert obj.compression == "gzip" and obj.compression_opts == 4, name
            assert obj.shuffle and obj.fletcher32, name
            assert "units" in obj.attrs, name

    with h5py.File(path, "r") as f:
        f.visititems(visit)
        assert f.attrs["format"] == "rangefuse-log" and int(f.attrs["format_version"]) == 1
        assert f["sensors/ir_front/raw"].attrs["units"] == "count"
        assert f["sensors/echo_front/raw"].attrs["units"] == "s"
        assert f["sensors/echo_serial/raw"].attrs["units"] == "text"
        assert f["environment/rh/value"].attrs["units"] == "1"
        assert f["truth/front/range_m"].attrs["units"] == "m"
        assert "3 dropout" in f["sensors/ir_front/label"].attrs["legend"]
    assert "sensors/echo_serial/raw" in seen


def test_same_content_gives_identical_bytes(tmp_path):
    # HDF5 stores object modification times when asked to; the writer must not, so a
    # rewrite a second later (and from differently ordered inputs) is bit-for-bit equal.
    a = _write(tmp_path / "a.h5")
    time.sleep(1.1)
    b = _write(tmp_path / "b.h5", streams=list(reversed(_streams())))
    assert a.read_bytes() == b.read_bytes()
    c = _write(tmp_path / "c.h5", created_utc="2024-05-01T12:00:01+00:00")
    assert a.read_bytes() != c.read_bytes()


def test_failed_write_leaves_old_file_and_no_temp(tmp_path, monkeypatch):
    path = _write(tmp_path / "a.h5")
    before = path.read_bytes()
    calls = []

    def failing_put(*args, **kw):
        calls.append(1)
        if len(calls) > 3:
            raise OSError("disk full")
        return real_put(*args, **kw)

    real_put = logfile._put
    monkeypatch.setattr(logfile, "_put", failing_put)
    with pytest.raises(OSError, match="disk full"):
        _write(path)
    assert path.read_bytes() == before
    assert sorted(os.listdir(tmp_path)) == ["a.h5"]


def test_refuses_to_overwrite_an_input(tmp_path):
    path = _write(tmp_path / "a.h5")
    before = path.read_bytes()
    with pytest.raises(InputError, match="one of the inputs"):
        _write(path, inputs=[str(tmp_path / "." / "a.h5")])
    assert path.read_bytes() == before


@pytest.mark.parametrize("make, match", [
    (lambda: SensorStream("x", "echo", "echo_time", [0, 1], [1.0]), "raw has 1 values"),
    (lambda: SensorStream("x", "echo", "serial", [0], ["R1\x00"]), "NUL"),
    (lambda: SensorStream("x", "echo", "serial", [0], [12]), "must be str"),
    (lambda: SensorStream("x", "triangulation", "volts", [0], [1.0], ping_t_s=[0]), "echo rangers"),
    (lambda: SensorStream("x", "echo", "echo_time", [0], [1.0], label=[6]), "0..5"),
    (lambda: SensorStream("x", "sonar", "echo_time", [0], [1.0]), "kind"),
    (lambda: SensorStream("x/y", "echo", "echo_time", [0], [1.0]), "group name"),
    (lambda: SensorStream("x", "echo", "echo_time", ["a"], [1.0]), "numbers"),
])
def test_stream_validation(make, match):
    with pytest.raises(InputError, match=match):
        make()


def test_write_validation(tmp_path):
    s = _streams()[:1]
    with pytest.raises(InputError, match="quantity"):
        write_log(tmp_path / "a.h5", RIG, s, {"air": ("pressure", [0], [1])})
    with pytest.raises(InputError, match="TOML"):
        write_log(tmp_path / "a.h5", "name = = 3", s, {})
    with pytest.raises(InputError, match="ISO 8601"):
        write_log(tmp_path / "a.h5", RIG, s, {}, created_utc="yesterday")
    assert not os.listdir(tmp_path)


# --------------------------------------------------------------------------------------
# iter_windows
# --------------------------------------------------------------------------------------
def _window_streams(rng):
    n1, n2 = 1500, 400
    t1 = np.sort(rng.uniform(0, 47, n1))
    t1[100:110] = t1[100]                                 # equal times are non-decreasing too
    t2 = np.sort(rng.uniform(3, 61, n2))
    t2[200:] += 30.0                                      # a 30 s silence: empty windows
    return [SensorStream("a", "triangulation", "volts", t1, rng.normal(size=n1)),
            SensorStream("b", "echo", "echo_time", t2, rng.normal(size=n2), ping_t_s=t2 - 0.01)]


@pytest.mark.parametrize("max_rows", [1_000_000, 37])
def test_iter_windows_every_row_once_in_time_order(tmp_path, monkeypatch, max_rows):
    monkeypatch.setattr(logfile, "_SCAN_ROWS", 50)       # exercise the scan buffer refills
    streams = _window_streams(np.random.default_rng(7))
    write_log(tmp_path / "w.h5", RIG, streams, {}, created_utc=WHEN)
    w = 4.0
    got = {s.name: [] for s in streams}
    last_t = -np.inf
    with open_log(tmp_path / "w.h5") as log:
        for window in log.iter_windows(w, max_rows=max_rows):
            assert window, "empty windows are skipped"
            ks = set()
            for name, part in window.items():
                assert 0 < len(part) <= max_rows
                ks |= set(np.floor(part.t_s / w).astype(int).tolist())
                got[name].append(part)
                np.testing.assert_array_equal(part.ping_t_s is None, name == "a")
            assert len(ks) == 1, "a window holds readings of one interval [k w, (k+1) w)"
            lo = min(p.t_s.min() for p in window.values())
            assert lo >= last_t, "windows come in time order"
            last_t = max(p.t_s.max() for p in window.values())
    for s in streams:
        t = np.concatenate([p.t_s for p in got[s.name]])
        np.testing.assert_array_equal(t, s.t_s)
        np.testing.assert_array_equal(np.concatenate([p.raw for p in got[s.name]]), s.raw)


def test_iter_windows_keeps_rows_out_of_order_nan_and_jumps(tmp_path):
    t = np.arange(100) * 0.1
    t[20] = 0.5          # goes back in time
    t[30] = np.nan       # time unknown
    t[40] = 1e6          # a wild forward jump, then normal times again
    t[0] = np.nan
    s = SensorStream("a", "triangulation", "volts", t, np.arange(100.0))
    other = SensorStream("b", "triangulation", "volts", np.arange(50) * 0.2, np.zeros(50))
    write_log(tmp_path / "w.h5", RIG, [s, other], {}, created_utc=WHEN)
    with open_log(tmp_path / "w.h5") as log:
        windows = list(log.iter_windows(1.0))
    rows = np.concatenate([w["a"].raw for w in windows if "a" in w])
    np.testing.assert_array_equal(rows, np.arange(100.0))        # each row once, row order
    assert sum(len(w["b"]) for w in windows if "b" in w) == 50


def test_iter_windows_reads_bounded_slices(tmp_path, monkeypatch):
    # Flat memory: no read asks for more rows than the scan buffer or max_rows.
    n = 20000
    s = SensorStream("a", "triangulation", "volts", np.arange(n) * 1e-3, np.zeros(n))
    write_log(tmp_path / "big.h5", RIG, [s], {}, created_utc=WHEN)
    monkeypatch.setattr(logfile, "_SCAN_ROWS", 1000)
    sizes = []
    real = LogFile._read

    def spy(self, field, start=0, stop=None, text=False):
        out = real(self, field, start, stop, text)
        sizes.append(len(out))
        return out

    monkeypatch.setattr(LogFile, "_read", spy)
    with open_log(tmp_path / "big.h5") as log:
        total = sum(len(w["a"]) for w in log.iter_windows(100.0, max_rows=1500))
    assert total == n
    assert max(sizes) <= 1500


def test_iter_windows_rejects_bad_window(tmp_path):
    path = _write(tmp_path / "a.h5")
    with open_log(path) as log:
        with pytest.raises(InputError, match="window_s"):
            next(log.iter_windows(0.0))


# --------------------------------------------------------------------------------------
# Damaged and foreign files
# --------------------------------------------------------------------------------------
def _flip(path, offset, count=8):
    with open(path, "r+b") as fh:
        fh.seek(offset)
        data = bytearray(fh.read(count))
        fh.seek(offset)
        fh.write(bytes(b ^ 0xFF for b in data))


def test_flipped_bytes_in_a_chunk_are_detected(tmp_path):
    path = _write(tmp_path / "a.h5")
    with h5py.File(path, "r") as f:
        info = f["sensors/echo_front/raw"].id.get_chunk_info(0)
    _flip(path, info.byte_offset + info.size // 2)
    with open_log(path) as log:                 # the layout is intact
        log.read_sensor("ir_front")             # other datasets still read
        with pytest.raises(LogFormatError, match="checksum failed — the file is corrupt") as exc:
            log.read_sensor("echo_front")
    assert exc.value.field == "/sensors/echo_front/raw"
    assert exc.value.file == str(path)


def test_flipped_bytes_in_text_frames_are_detected(tmp_path):
    path = _write(tmp_path / "a.h5")
    with h5py.File(path, "r") as f:
        info = f["sensors/echo_serial/raw"].id.get_chunk_info(0)
    _flip(path, info.byte_offset + 2, 2)
    with open_log(path) as log:
        with pytest.raises(LogFormatError, match="checksum failed"):
            log.read_sensor("echo_serial")


def test_corrupt_rig_text_is_detected(tmp_path):
    path = _write(tmp_path / "a.h5")
    data = path.read_bytes()
    i = data.index(b'name = "bench"')
    _flip(path, i + 8, 1)
    with pytest.raises(LogFormatError, match="corrupt") as exc:
        open_log(path)
    assert exc.value.field == "/rig"


def test_truncated_file_is_refused(tmp_path):
    path = _write(tmp_path / "a.h5")
    size = path.stat().st_size
    with open(path, "r+b") as fh:
        fh.truncate(size // 2)
    with pytest.raises(LogFormatError, match="truncated") as exc:
        open_log(path)
    assert exc.value.file == str(path)


def test_newer_format_version_is_refused(tmp_path):
    path = _write(tmp_path / "a.h5")
    with h5py.File(path, "a") as f:
        f.attrs["format_version"] = 2
    with pytest.raises(LogFormatError,
                       match="written by a newer rangefuse: format_version 2, this reader knows 1"):
        open_log(path)


def test_not_a_log(tmp_path):
    text = tmp_path / "notes.h5"
    text.write_text("t_s,sensor,raw\n")
    with pytest.raises(LogFormatError, match="not an HDF5 file"):
        open_log(text)
    other = tmp_path / "other.h5"
    with h5py.File(other, "w") as f:
        f["x"] = np.zeros(3)
    with pytest.raises(LogFormatError, match="not a rangefuse log"):
        open_log(other)
    with pytest.raises(InputError, match="no such file"):
        open_log(tmp_path / "missing.h5")


def _del(f, name):
    del f[name]


def _replace(f, name, data, **attrs):
    del f[name]
    f[name] = data
    for k, v in attrs.items():
        f[name].attrs[k] = v


@pytest.mark.parametrize("mutate, field, match", [
    (lambda f: _del(f, "sensors/echo_front/raw"), "/sensors/echo_front/raw", "missing dataset"),
    (lambda f: _replace(f, "sensors/echo_front/raw", np.zeros(3), units="s"),
     "/sensors/echo_front/raw", "rows but"),
    (lambda f: _replace(f, "sensors/ir_front/t_s", np.zeros(200, np.float32), units="s"),
     "/sensors/ir_front/t_s", "float64"),
    (lambda f: _replace(f, "sensors/ir_front/t_s", np.zeros((200, 2)), units="s"),
     "/sensors/ir_front/t_s", "1-D"),
    (lambda f: _replace(f, "sensors/ir_front/t_s", np.zeros(200), units="ms"),
     "/sensors/ir_front/t_s", "expected 's'"),
    (lambda f: _replace(f, "sensors/ir_front/t_s", np.zeros(200)),
     "/sensors/ir_front/t_s", "missing attribute 'units'"),
    (lambda f: _replace(f, "sensors/echo_serial/raw", np.zeros(6), units="text"),
     "/sensors/echo_serial/raw", "UTF-8 strings"),
    (lambda f: _replace(f, "sensors/ir_front/label", np.zeros(200, np.int32)),
     "/sensors/ir_front/label", "int8"),
    (lambda f: f["sensors/ir_front"].attrs.__setitem__("kind", "laser"), "/sensors/ir_front", "kind"),
    (lambda f: f["sensors/ir_front"].attrs.__delitem__("output"), "/sensors/ir_front", "output"),
    (lambda f: f["environment/rh"].attrs.__setitem__("units", "%"), "/environment/rh", "units"),
    (lambda f: _del(f, "truth/front/range_m"), "/truth/front/range_m", "missing"),
    (lambda f: _del(f, "sensors"), "/sensors", "missing group"),
    (lambda f: _del(f, "rig"), "/rig", "missing"),
    (lambda f: f.attrs.__setitem__("format_version", "1"), "/", "integer"),
])
def test_malformed_layout_names_the_dataset(tmp_path, mutate, field, match):
    path = _write(tmp_path / "a.h5")
    with h5py.File(path, "a") as f:
        mutate(f)
    with pytest.raises(LogFormatError, match=match) as exc:
        open_log(path)
    assert exc.value.field == field
    assert exc.value.file == str(path)


def test_foreign_writer_variable_length_text_and_big_endian_are_read(tmp_path):
    # The format also accepts variable-length UTF-8 frames (a C/C++ writer's easiest choice)
    # and either byte order (HDF5 converts on read).
    path = _write(tmp_path / "a.h5")
    frames = ["R0100\r", "R0200"]
    with h5py.File(path, "a") as f:
        g = f["sensors/echo_serial"]
        for k in ("t_s", "raw"):
            del g[k]
        g["t_s"] = np.array([0.0, 0.1])
        g["t_s"].attrs["units"] = "s"
        g.create_dataset("raw", data=frames, dtype=h5py.string_dtype("utf-8"))
        g["raw"].attrs["units"] = "text"
        env = f["environment/air"]
        del env["value"]
        env["value"] = np.arange(10.0).astype(">f8")      # a big-endian logger
        env["value"].attrs["units"] = "degC"
    with open_log(path) as log:
        assert list(log.read_sensor("echo_serial").raw) == frames
        value = log.environment("air")[1]
        assert value.dtype == np.float64 and value.dtype.isnative
        np.testing.assert_array_equal(value, np.arange(10.0))
