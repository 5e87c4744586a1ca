"""``rangefuse check``: valid logs pass, each class of bad input is one clear line.

Expected rates are by definition (a reading every 0.02 s is 50 Hz); the gap rule (an
interval over 5 x the median) is this project's, docs/log-format.md.
"""
import re

import h5py
import numpy as np
import pytest

from fusion.rig import Rig
from replay.check import check_log
from replay.cli import main
from replay.logfile import SensorStream, write_log

RIG_TOML = """\
name = "bench"

[air]
stream = "air"
humidity_stream = "rh"

[[direction]]
name = "front"

[[sensor]]
name = "ir_front"
kind = "triangulation"
direction = "front"
output = "volts"
[sensor.curve]
model = "saturating-inverse"
A_vm = 0.70468
b_m = 0.069785
lam_m = 0.10868
p = 1.90063
offset_v = 0.0
min_range_m = 0.10
max_range_m = 0.80

[[sensor]]
name = "echo_front"
kind = "echo"
direction = "front"
output = "echo_time"
ping_logged = true

[[sensor]]
name = "echo_serial"
kind = "echo"
direction = "front"
output = "serial"
"""
WHEN = "2024-05-01T12:00:00+00:00"


def _parts():
    """Sensor arrays of a clean log, as mutable dicts."""
    t_ir = np.arange(500) * 0.02
    t_e = 0.01 + np.arange(200) * 0.05
    return {
        "ir_front": dict(kind="triangulation", output="volts", t_s=t_ir,
                         raw=np.full(500, 1.0)),
        "echo_front": dict(kind="echo", output="echo_time", t_s=t_e, raw=np.full(200, 0.005),
                           ping_t_s=t_e - 0.006),
        "echo_serial": dict(kind="echo", output="serial", t_s=np.arange(100) * 0.1,
                            raw=["R1000\r"] * 100),
    }


def _env():
    t = np.arange(10.0)
    return {"air": ("air_temperature", t, np.full(10, 21.0)),
            "rh": ("relative_humidity", t, np.full(10, 0.45))}


def _write(path, parts=None, env=None, rig=RIG_TOML, drop=()):
    parts = _parts() if parts is None else parts
    streams = [SensorStream(name, **p) for name, p in parts.items() if name not in drop]
    write_log(path, rig, streams, _env() if env is None else env,
              {"front": (np.arange(5.0), np.full(5, 0.5))}, created_utc=WHEN)
    return str(path)


def _problem_lines(capsys, argv):
    code = main(argv)
    err = capsys.readouterr().err.strip().splitlines()
    return code, err


def _assert_one_line(err, path, field, row, *words):
    """Exactly one error line, naming the file, the dataset and the row."""
    assert len(err) == 1, err
    prefix = f"rangefuse check: error: {path}" + "".join(
        f", {part}" for part in (field, None if row is None else f"row {row}") if part)
    assert err[0].startswith(prefix + ":"), err[0]
    for w in words:
        assert w in err[0], (w, err[0])


def test_clean_log_is_valid_and_summarised(tmp_path, capsys):
    path = _write(tmp_path / "ok.h5")
    assert main(["check", path]) == 0
    out, err = capsys.readouterr()
    assert err == ""
    rows = {line.split()[0]: line.split() for line in out.splitlines() if line.startswith("    ")}
    assert rows["ir_front"][1:4] == ["triangulation", "volts", "500"]
    assert float(rows["ir_front"][4]) == pytest.approx(50.0)      # 1 / 0.02 s
    assert float(rows["echo_front"][4]) == pytest.approx(20.0)    # 1 / 0.05 s
    assert "9.980" in rows["ir_front"][-1]                        # last reading 499 * 0.02 s
    assert "truth: front" in out
    assert re.search(r"^valid \(0 warnings\)$", out, re.M)
    report = check_log(path)
    assert report.ok and report.problems == () and report.warnings == ()


def test_gap_is_a_warning_with_its_times(tmp_path, capsys):
    parts = _parts()
    parts["ir_front"]["t_s"] = parts["ir_front"]["t_s"].copy()
    parts["ir_front"]["t_s"][300:] += 1.0                         # 1.02 s between rows 299, 300
    path = _write(tmp_path / "gap.h5", parts)
    assert main(["check", path]) == 0
    out = capsys.readouterr().out
    line = [w for w in out.splitlines() if "gap longer" in w]
    assert len(line) == 1
    assert "/sensors/ir_front/t_s, row 300" in line[0]
    assert "5.980-7.000 s (1.020 s)" in line[0]
    assert "valid (1 warning)" in out


def test_duplicate_times_warn_but_backwards_time_is_a_problem(tmp_path, capsys):
    parts = _parts()
    t = parts["ir_front"]["t_s"].copy()
    t[10] = t[9]                  # duplicate: warning
    t[40] = t[38]                 # earlier than row 39: problem
    parts["ir_front"]["t_s"] = t
    path = _write(tmp_path / "order.h5", parts)
    code, err = _problem_lines(capsys, ["check", path])
    assert code == 2
    _assert_one_line(err, path, "/sensors/ir_front/t_s", 40, "earlier than a row before", "non-decreasing")
    report = check_log(path)
    assert any("row 10" in w and "same time as the row before" in w for w in report.warnings)


@pytest.mark.parametrize("sensor, key, row, value, field, words", [
    ("ir_front", "t_s", 7, np.nan, "/sensors/ir_front/t_s", ("NaN or infinite",)),
    ("echo_front", "raw", 3, np.inf, "/sensors/echo_front/raw", ("NaN or infinite",)),
    ("echo_front", "ping_t_s", 5, 1.0, "/sensors/echo_front/ping_t_s", ("ping after the reading",)),
    ("echo_front", "ping_t_s", 6, -np.inf, "/sensors/echo_front/ping_t_s", ("infinite or negative ping",)),
])
def test_bad_values_are_one_line_each(tmp_path, capsys, sensor, key, row, value, field, words):
    parts = _parts()
    arr = np.array(parts[sensor][key], dtype=float)
    arr[row] = value
    parts[sensor][key] = arr
    path = _write(tmp_path / "bad.h5", parts)
    code, err = _problem_lines(capsys, ["check", path])
    assert code == 2
    _assert_one_line(err, path, field, row, *words)


def test_negative_time_is_a_problem(tmp_path, capsys):
    parts = _parts()
    t = parts["echo_front"]["t_s"] - 0.2           # rows 0..3 before t = 0
    parts["echo_front"]["t_s"], parts["echo_front"]["ping_t_s"] = t, t - 0.006
    path = _write(tmp_path / "neg.h5", parts)
    code, err = _problem_lines(capsys, ["check", path])
    assert code == 2
    err = [e for e in err if "/ping_t_s" not in e]  # the pings are negative too
    _assert_one_line(err, path, "/sensors/echo_front/t_s", 0, "4 rows with a negative time")


def test_readings_the_rig_decodes_as_invalid(tmp_path, capsys):
    parts = _parts()
    raw = parts["echo_serial"]["raw"][:]
    raw[12] = "R10x0"            # not a frame the unit sends
    raw[50] = "garbage"
    parts["echo_serial"]["raw"] = raw
    parts["echo_front"]["raw"] = parts["echo_front"]["raw"].copy()
    parts["echo_front"]["raw"][9] = -0.001        # a negative echo time
    path = _write(tmp_path / "inv.h5", parts)
    report = check_log(path)
    lines = [p for p in report.problems if "decodes as invalid" in p]
    assert len(lines) == 2
    assert any(p.startswith(f"{path}, /sensors/echo_serial/raw, row 12: 2 rows") for p in lines)
    assert any(p.startswith(f"{path}, /sensors/echo_front/raw, row 9: 1 row ") for p in lines)


def test_sensor_the_rig_does_not_describe(tmp_path, capsys):
    parts = _parts()
    parts["sonar_rear"] = dict(kind="echo", output="echo_time", t_s=np.arange(3.0),
                               raw=np.full(3, 0.005))
    path = _write(tmp_path / "extra.h5", parts)
    code, err = _problem_lines(capsys, ["check", path])
    assert code == 2
    _assert_one_line(err, path, "/sensors/sonar_rear", None, "not described by the rig")


def test_sensor_described_differently(tmp_path, capsys):
    parts = _parts()
    parts["echo_front"] = dict(kind="echo", output="pulse_width", t_s=np.arange(3.0),
                               raw=np.full(3, 0.005))
    path = _write(tmp_path / "diff.h5", parts)
    code, err = _problem_lines(capsys, ["check", path])
    assert code == 2
    _assert_one_line(err, path, "/sensors/echo_front", None, "echo/pulse_width", "echo/echo_time")


def test_rig_sensor_missing_from_log_is_a_warning(tmp_path, capsys):
    path = _write(tmp_path / "missing.h5", drop=("echo_serial",))
    assert main(["check", path]) == 0
    out = capsys.readouterr().out
    assert f"{path}, /sensors/echo_serial: rig sensor 'echo_serial' has no stream" in out


def test_humidity_in_percent_is_a_problem(tmp_path, capsys):
    env = _env()
    env["rh"] = ("relative_humidity", np.arange(10.0), np.full(10, 45.0))
    path = _write(tmp_path / "rh.h5", env=env)
    code, err = _problem_lines(capsys, ["check", path])
    assert code == 2
    _assert_one_line(err, path, "/environment/rh/value", 0, "look like percent")


def test_check_against_another_rig(tmp_path, capsys):
    path = _write(tmp_path / "ok.h5")
    other = tmp_path / "other.rig.toml"
    other.write_text(RIG_TOML.replace('output = "serial"', 'output = "analog"'))
    code, err = _problem_lines(capsys, ["check", path, "--rig", str(other)])
    assert code == 2
    _assert_one_line(err, path, "/sensors/echo_serial", None, "echo/serial", "echo/analog")
    report = check_log(path, Rig.load(other))
    assert any("differs from" in w for w in report.warnings)


def test_invalid_embedded_rig(tmp_path, capsys):
    path = _write(tmp_path / "rig.h5", rig=RIG_TOML.replace('kind = "echo"', 'kind = "laser"', 1))
    code, err = _problem_lines(capsys, ["check", path])
    assert code == 2
    assert len(err) == 1 and err[0].startswith(f"rangefuse check: error: {path}, /rig")
    assert "embedded rig description is invalid" in err[0]


def test_not_a_log_is_one_line(tmp_path, capsys):
    path = tmp_path / "notes.h5"
    path.write_text("not hdf5")
    code, err = _problem_lines(capsys, ["check", str(path)])
    assert code == 2
    _assert_one_line(err, str(path), None, None, "not an HDF5 file")


def test_newer_version_is_one_line(tmp_path, capsys):
    path = _write(tmp_path / "v2.h5")
    with h5py.File(path, "a") as f:
        f.attrs["format_version"] = 2
    code, err = _problem_lines(capsys, ["check", path])
    assert code == 2
    _assert_one_line(err, path, "/", None, "format_version 2, this reader knows 1")


def test_corrupt_chunk_is_one_line(tmp_path, capsys):
    path = _write(tmp_path / "bad.h5")
    with h5py.File(path, "r") as f:
        info = f["sensors/ir_front/raw"].id.get_chunk_info(0)
    with open(path, "r+b") as fh:
        fh.seek(info.byte_offset + info.size // 2)
        fh.write(b"\x00\xff\x00\xff")
    code, err = _problem_lines(capsys, ["check", path])
    assert code == 2
    _assert_one_line(err, path, "/sensors/ir_front/raw", 0, "checksum failed")


def test_help_has_an_example(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["check", "--help"])
    assert exc.value.code == 0
    assert "example:\n  rangefuse check" in capsys.readouterr().out


def test_a_damaged_air_stream_is_one_problem_and_the_sensors_are_still_checked(tmp_path):
    # A flipped byte in the air stream's data fails its Fletcher-32 checksum (HDF5's
    # filter; Fletcher 1982): reported once, at the stream, and the sensors' own rows are
    # still checked and summarised (every echo sensor reads the air to decode, so the
    # same failure had been listed once per sensor, and their summaries lost).
    import os
    import shutil
    src = os.path.join(os.path.dirname(__file__), "..", "datasets", "shelf-pass.h5")
    path = str(tmp_path / "damaged.h5")
    shutil.copy(src, path)
    with h5py.File(path, "r") as f:
        ds = f["environment/air_temp/value"]
        info = ds.id.get_chunk_info(0)
    data = bytearray(open(path, "rb").read())
    data[info.byte_offset + info.size // 2] ^= 0xFF
    open(path, "wb").write(bytes(data))
    rep = check_log(path)
    assert len(rep.problems) == 1
    assert "/environment/air_temp/value" in rep.problems[0] and "checksum" in rep.problems[0]
    assert len(rep.sensors) == 4
    assert all(np.isfinite(s.rate_hz) for s in rep.sensors)
