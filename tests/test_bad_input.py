"""The bad-input catalogue: one test per class of bad input, through the real entry point.

The contract is the project's (DEVELOPERS.md, "Conventions"): a user error on the command
line is one line on stderr that names the file, the group/dataset/field, the row or
TOML line and what was expected, with exit status 2 and no traceback (``--debug``
shows it); a library call raises a `fusion.errors.RangefuseError` subclass carrying
``.file``, ``.field`` and ``.row``. Bad *readings* inside a well-formed log are not
errors of the tools that fuse them: every one gets a decision (``invalid``, ``late``,
``dropout``...), while ``rangefuse check`` reports them as problems with their row.
"""
from __future__ import annotations

import os
import shutil

import h5py
import numpy as np
import pytest

from fusion import decisions as D
from fusion.errors import (CalibrationError, ConfigError, InputError, LogFormatError,
                           RangefuseError)
from fusion.fuser import Fuser
from fusion.rig import Rig
from fusion.sensors.triangulation import TriangulationCurve
from replay.cli import COMMANDS, main
from replay.csvimport import import_csv
from replay.logfile import SensorStream, open_log, write_log
from replay.run import run as replay

HERE = os.path.dirname(os.path.abspath(__file__))
DATASETS = os.path.join(os.path.dirname(HERE), "datasets")
CURVE = TriangulationCurve.typical_10_80()
WHEN = "2024-05-01T12:00:00+00:00"

RIG_TOML = """\
name = "catalogue"

[air]
stream = "air"

[[direction]]
name = "front"

[[sensor]]
name = "ir"
kind = "triangulation"
direction = "front"
output = "counts"
hold_s = 0.03
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
name = "echo"
kind = "echo"
direction = "front"
output = "echo_time"
ping_logged = true

[[sensor]]
name = "frames"
kind = "echo"
direction = "front"
output = "serial"
"""
RIG = Rig.from_toml(RIG_TOML)


def _parts():
    """A clean log of a still target at 0.5 m, with the noise real units show (a log of
    exactly repeated values would rightly be decided `stuck`)."""
    rng = np.random.default_rng(5)
    t_ir = np.arange(200) * 0.02
    t_e = 0.01 + np.arange(80) * 0.05
    return {
        "ir": dict(kind="triangulation", output="counts", t_s=t_ir,
                   raw=300.0 + rng.integers(-3, 4, 200)),
        "echo": dict(kind="echo", output="echo_time", t_s=t_e,
                     raw=np.round(0.0029 + 2e-5 * rng.standard_normal(80), 6),
                     ping_t_s=t_e - 0.003),
        "frames": dict(kind="echo", output="serial", t_s=np.arange(40) * 0.1,
                       raw=[f"R{500 + k:04d}\r" for k in rng.integers(-3, 4, 40)]),
    }


def _write(path, parts=None, env=None, rig=RIG_TOML):
    parts = _parts() if parts is None else parts
    env = {"air": ("air_temperature", np.arange(4.0), np.full(4, 21.0))} if env is None else env
    write_log(str(path), rig, [SensorStream(n, **p) for n, p in parts.items()], env,
              {"front": (np.arange(5.0), np.full(5, 0.5))}, created_utc=WHEN)
    return str(path)


def _edit(parts, name, key, index, value):
    arr = np.array(parts[name][key], dtype=object if name == "frames" and key == "raw"
                   else float)
    arr[index] = value
    parts[name][key] = list(arr) if arr.dtype == object else arr
    return parts


def _err_line(capsys, argv, *words, debug_raises=None):
    """Run the command; it must exit 2 with exactly one stderr line naming `words`."""
    code = main(argv)
    out, err = capsys.readouterr()
    lines = err.strip().splitlines()
    assert code == 2, (code, err)
    assert len(lines) == 1, lines
    assert lines[0].startswith(f"rangefuse {argv[0]}: error: "), lines[0]
    assert "Traceback" not in err
    for w in words:
        assert w in lines[0], (w, lines[0])
    if debug_raises is not None:  # --debug shows the traceback: the exception escapes
        with pytest.raises(debug_raises):
            main(["--debug"] + list(argv))
        capsys.readouterr()
    return lines[0]


def _decisions(track):
    with h5py.File(track, "r") as f:
        return {k: f["decisions"][k][:] for k in f["decisions"]}


def _code_of(track, sensor, row):
    d = _decisions(track)
    si = list(RIG.sensors).index(sensor)
    m = (d["sensor"] == si) & (d["row"] == row)
    assert m.sum() == 1
    return int(d["decision"][m][0])


@pytest.fixture()
def good(tmp_path):
    return _write(tmp_path / "good.h5")


# ============================================================ files that are not logs
def test_truncated_file(tmp_path, capsys, good):
    path = tmp_path / "cut.h5"
    data = open(good, "rb").read()
    path.write_bytes(data[: len(data) // 2])
    _err_line(capsys, ["check", str(path)], str(path), "truncated")
    _err_line(capsys, ["replay", str(path), "-o", str(tmp_path / "t.h5")], str(path),
              "truncated", debug_raises=LogFormatError)
    with pytest.raises(LogFormatError) as exc:
        open_log(path)
    assert exc.value.file == str(path)


@pytest.mark.parametrize("content", [b"", b"t_s,sensor,raw\n0,ir,1\n", b"\x89HDF\r\n\x1a\n"])
def test_not_an_hdf5_file(tmp_path, capsys, content):
    path = tmp_path / "log.h5"
    path.write_bytes(content)
    line = _err_line(capsys, ["check", str(path)], str(path))
    assert "HDF5" in line or "truncated" in line or "corrupt" in line
    with pytest.raises(LogFormatError):
        open_log(path)


def test_missing_file(tmp_path, capsys):
    path = str(tmp_path / "nowhere.h5")
    _err_line(capsys, ["replay", path, "-o", str(tmp_path / "t.h5")], path, "no such file")


def test_hdf5_file_that_is_not_a_log(tmp_path, capsys):
    path = tmp_path / "other.h5"
    with h5py.File(path, "w") as f:
        f["x"] = np.arange(3.0)
    _err_line(capsys, ["check", str(path)], str(path), "/", "not a rangefuse log",
              "format='rangefuse-log'")


# ============================================================ layout
def _damage(good, tmp_path, how):
    path = tmp_path / "damaged.h5"
    shutil.copy(good, path)
    with h5py.File(path, "a") as f:
        g = f["sensors/ir"]
        del g["raw"]
        if how == "dtype":
            g.create_dataset("raw", data=np.full(200, 300, np.int32)).attrs["units"] = "count"
        elif how == "shape":
            g.create_dataset("raw", data=np.full((100, 2), 300.0)).attrs["units"] = "count"
        elif how == "length":
            g.create_dataset("raw", data=np.full(199, 300.0)).attrs["units"] = "count"
        elif how == "units":
            g.create_dataset("raw", data=np.full(200, 300.0)).attrs["units"] = "V"
    return str(path)


@pytest.mark.parametrize("how, words", [
    ("missing", ("missing dataset",)),
    ("dtype", ("expected float64", "int32")),
    ("shape", ("expected a 1-D dataset", "(100, 2)")),
    ("length", ("199 rows", "200")),
    ("units", ("units attribute is 'V'", "expected 'count'")),
])
def test_missing_dataset_wrong_dtype_shape_length_or_units(tmp_path, capsys, good, how, words):
    path = _damage(good, tmp_path, how)
    for cmd in ("check", "replay"):
        argv = [cmd, path] + (["-o", str(tmp_path / "t.h5")] if cmd == "replay" else [])
        _err_line(capsys, argv, path, "/sensors/ir/raw", *words)
    with pytest.raises(LogFormatError) as exc:
        open_log(path)
    assert (exc.value.file, exc.value.field) == (path, "/sensors/ir/raw")


def test_log_from_a_newer_format_version(tmp_path, capsys, good):
    with h5py.File(good, "a") as f:
        f.attrs["format_version"] = np.int64(7)
    _err_line(capsys, ["replay", good, "-o", str(tmp_path / "t.h5")], good, "format_version 7",
              "upgrade rangefuse")
    with pytest.raises(LogFormatError) as exc:
        open_log(good)
    assert exc.value.field == "/"


# ============================================================ readings
@pytest.mark.parametrize("sensor, key, row, value, words", [
    ("ir", "raw", 7, np.nan, ("/sensors/ir/raw", "row 7", "NaN or infinite")),
    ("echo", "raw", 3, np.inf, ("/sensors/echo/raw", "row 3", "NaN or infinite")),
    ("ir", "t_s", 5, np.nan, ("/sensors/ir/t_s", "row 5", "NaN or infinite")),
    ("echo", "t_s", 9, -np.inf, ("/sensors/echo/t_s", "row 9", "NaN or infinite")),
])
def test_nan_or_infinite_values(tmp_path, capsys, sensor, key, row, value, words):
    path = _write(tmp_path / "nan.h5", _edit(_parts(), sensor, key, row, value))
    _err_line(capsys, ["check", path], path, *words, "expected")
    # the fuser decides the reading invalid; the rest of the log is used
    track = str(tmp_path / "t.h5")
    assert main(["replay", path, "-o", track, "--quiet"]) == 0
    assert _code_of(track, sensor, row) == D.INVALID


def test_timestamps_out_of_order_or_duplicated(tmp_path, capsys):
    parts = _parts()
    _edit(parts, "ir", "t_s", 40, parts["ir"]["t_s"][30])    # back to row 30's time
    path = _write(tmp_path / "order.h5", parts)
    _err_line(capsys, ["check", path], path, "/sensors/ir/t_s", "row 40",
              "earlier than a row before it", "non-decreasing")
    track = str(tmp_path / "t.h5")
    assert main(["replay", path, "-o", track, "--quiet"]) == 0
    d = _decisions(track)
    assert len(d["decision"]) == 320        # every reading, the early one included
    # a duplicated time is legal (two sensors, or a fast host): a warning naming the row
    parts = _parts()
    _edit(parts, "ir", "t_s", 12, parts["ir"]["t_s"][11])
    path = _write(tmp_path / "dup.h5", parts)
    assert main(["check", path]) == 0
    out, err = capsys.readouterr()
    assert err == "" and "/sensors/ir/t_s, row 12" in out and "same time as the row before" in out


def test_streamed_reading_older_than_the_lag_is_late():
    fuser = Fuser(RIG)
    fuser.push("echo", 1.0, 0.0029)
    est, dec = fuser.push("echo", 0.5, 0.0029)
    assert dec.reason == "late" and est.t_s == 1.0


def test_readings_for_unknown_sensors(tmp_path, capsys):
    parts = _parts()
    parts["sonar9"] = dict(kind="echo", output="echo_time", t_s=np.arange(3.0),
                           raw=np.full(3, 0.003))
    path = _write(tmp_path / "extra.h5", parts)
    _err_line(capsys, ["check", path], path, "/sensors/sonar9", "not described by the rig")
    _err_line(capsys, ["replay", path, "-o", str(tmp_path / "t.h5")], path, "/sensors/sonar9",
              "rig does not describe", debug_raises=InputError)
    # streaming: a decision, not an exception
    est, dec = Fuser(RIG).push("sonar9", 0.0, 0.003)
    assert dec.reason == "unknown_sensor"
    with pytest.raises(InputError, match="sonar9"):
        Fuser(RIG).process({"sonar9": ([0.0], [0.003])})


@pytest.mark.parametrize("sensor, key, row, value, words, decided", [
    ("ir", "raw", 11, 5000.0, ("/sensors/ir/raw", "row 11", "decodes as invalid"), D.INVALID),
    ("ir", "raw", 12, -3.0, ("/sensors/ir/raw", "row 12", "decodes as invalid"), D.INVALID),
    ("echo", "raw", 4, -0.002, ("/sensors/echo/raw", "row 4", "decodes as invalid"), D.INVALID),
])
def test_absurd_values(tmp_path, capsys, sensor, key, row, value, words, decided):
    path = _write(tmp_path / "absurd.h5", _edit(_parts(), sensor, key, row, value))
    _err_line(capsys, ["check", path], path, *words)
    track = str(tmp_path / "t.h5")
    assert main(["replay", path, "-o", track, "--quiet"]) == 0
    assert _code_of(track, sensor, row) == decided


def test_absurd_air_temperature_is_a_problem_and_the_fuser_ignores_it(tmp_path, capsys):
    env = {"air": ("air_temperature", np.arange(4.0), np.array([21.0, 500.0, 21.0, 21.0]))}
    path = _write(tmp_path / "hot.h5", env=env)
    _err_line(capsys, ["check", path], path, "/environment/air/value", "row 1")
    # The replay treats the 500 degC sample as failed (fusion.Fuser.push_air: a value
    # outside -60..90 degC is a failed sample, and carries no value): the echo readings
    # after it keep the last good sample's 21 degC, and none is decoded with the fallback
    # temperature while a good sample is fresh.
    track = str(tmp_path / "t.h5")
    assert main(["replay", path, "-o", track, "--quiet"]) == 0
    d = _decisions(track)
    echo = d["sensor"] == list(RIG.sensors).index("echo")
    after = echo & (d["t_s"] >= 1.0) & (d["t_s"] < 2.0)
    assert after.sum() == 20
    assert np.all(d["temp_c"][after] == 21.0)
    assert not np.any(d["flags"][echo] & D.FLAG_TEMP_FALLBACK)


def test_echo_time_beyond_the_timeout_is_a_dropout_not_a_range(tmp_path):
    # A host timer that overflows reports an absurd time: it means "no echo"
    # (docs/rig.md: a raw time at or above timeout_s is a dropout).
    est, dec = Fuser(RIG).push("echo", 0.0, 1e9)
    assert dec.reason == "dropout" and np.isnan(est.range_m)


def test_empty_log(tmp_path, capsys):
    parts = {n: dict(p, t_s=np.zeros(0), raw=[] if n == "frames" else np.zeros(0))
             for n, p in _parts().items()}
    parts["echo"].pop("ping_t_s")
    path = _write(tmp_path / "empty.h5", parts)
    assert main(["check", path]) == 0
    out, err = capsys.readouterr()
    assert err == "" and out.count("the sensor has no readings") == 3
    track = str(tmp_path / "t.h5")
    assert main(["replay", path, "-o", track]) == 0
    assert "0 readings" in capsys.readouterr().out
    res = replay(path, out=str(tmp_path / "t2.h5"))
    assert res.n_readings == 0
    # an import that stores nothing writes nothing and says so
    csv = tmp_path / "empty.csv"
    csv.write_text("t_s,sensor,raw\n")
    rig = tmp_path / "rig.toml"
    rig.write_text(RIG_TOML)
    _err_line(capsys, ["import", str(csv), "--rig", str(rig), "-o", str(tmp_path / "x.h5")],
              str(csv), "no row could be stored")
    assert not (tmp_path / "x.h5").exists()


def test_an_empty_truth_stream_replays(tmp_path, capsys):
    # A log may carry a truth group with no samples (a run whose reference failed):
    # the replay scores nothing against it and still writes the track and its copy.
    path = str(tmp_path / "no-truth-samples.h5")
    write_log(path, RIG_TOML, [SensorStream(n, **p) for n, p in _parts().items()],
              {"air": ("air_temperature", np.arange(4.0), np.full(4, 21.0))},
              {"front": (np.zeros(0), np.zeros(0))}, created_utc=WHEN)
    track = str(tmp_path / "t.h5")
    assert main(["replay", path, "-o", track]) == 0
    with h5py.File(track, "r") as f:
        assert f["truth/front/t_s"].shape == (0,)
        assert f["decisions/decision"].shape == (320,)


def test_huge_gap(tmp_path, capsys):
    parts = _parts()
    for name in parts:
        t = np.array(parts[name]["t_s"], float)
        t[len(t) // 2:] += 1e6                                   # eleven days of silence
        parts[name]["t_s"] = t
        if "ping_t_s" in parts[name]:
            parts[name]["ping_t_s"] = t - 0.003
    path = _write(tmp_path / "gap.h5", parts)
    assert main(["check", path]) == 0
    out, err = capsys.readouterr()
    assert err == "" and "/sensors/echo/t_s, row 40" in out and "gap" in out
    track = str(tmp_path / "t.h5")
    assert main(["replay", path, "-o", track, "--quiet"]) == 0
    with h5py.File(track, "r") as f:
        t = f["track/front/t_s"][:]
        sigma = f["track/front/sigma_m"][:]
    # the track survives the gap: restarted as at the start of the log (not predicted
    # across it into a covariance of astronomical size), and it converges again
    after = t > 1e6
    assert t.max() > 1e6 and np.all(np.isfinite(sigma))
    assert sigma[after].max() <= 1.01 * sigma[~after].max() and sigma[after][-1] < 0.01


def test_huge_timestamp_does_not_break_the_track():
    fuser = Fuser(RIG)
    fuser.push("echo", 0.0, 0.0029)
    est, dec = fuser.push("echo", 1e300, 0.0029)
    assert dec.accepted and np.isfinite(est.sigma_m) and est.sigma_m < 0.1


def test_garbled_text_frames(tmp_path, capsys):
    path = _write(tmp_path / "garbled.h5", _edit(_parts(), "frames", "raw", 17, "R0\x7f5"))
    _err_line(capsys, ["check", path], path, "/sensors/frames/raw", "row 17",
              "well-formed frames")
    track = str(tmp_path / "t.h5")
    assert main(["replay", path, "-o", track, "--quiet"]) == 0
    assert _code_of(track, "frames", 17) == D.INVALID


# ============================================================ TOML
def _rig_file(tmp_path, old, new, name="rig.toml"):
    assert old in RIG_TOML, old
    text = RIG_TOML.replace(old, new, 1)
    path = tmp_path / name
    path.write_text(text)
    line = next(i + 1 for i, s in enumerate(text.splitlines()) if new.splitlines()[-1] in s)
    return str(path), line


@pytest.mark.parametrize("old, new, field, words", [
    ('[air]', '[air', None, ("not valid TOML",)),                                  # syntax
    ('hold_s = 0.03', 'hold_s = 0.03\ncolour = 3', "sensor.ir.colour", ("unknown key 'colour'",)),
    ('stream = "air"', 'stream = "air"\nwarmth = 1', "air.warmth", ("unknown key 'warmth'",)),
    ('hold_s = 0.03', 'hold_s = "fast"', "sensor.ir.hold_s", ("expected float",)),
    ('p = 1.90063', 'p = "x"', "sensor.ir.curve.p", ("expected a number",)),
    ('ping_logged = true', 'ping_logged = "yes"', "sensor.echo.ping_logged", ("true or false",)),
    ('output = "echo_time"', 'output = "echo_time"\nmax_range_m = -4.0',
     "sensor.echo.max_range_m", ("above min_range_m",)),
    ('name = "front"', 'name = "front"\n[estimator]\ngate_probability = 2.0',
     "estimator.gate_probability", ("(0.5, 1]",)),
    ('[air]', '[aire]', "aire", ("unknown top-level key 'aire'",)),   # a misspelt table
    ('[sensor.curve]', '[sensor.curv]', "sensor.ir.curv", ("unknown key 'curv'",)),  # sub-table
])
def test_rig_toml_errors_name_the_key_and_line(tmp_path, capsys, old, new, field, words):
    path, line = _rig_file(tmp_path, old, new)
    bits = [path, f"line {line}"] + ([field] if field else [])
    _err_line(capsys, ["schedule", path], *bits, *words, debug_raises=ConfigError)
    with pytest.raises(ConfigError) as exc:
        Rig.load(path)
    assert (exc.value.file, exc.value.row) == (path, line)
    if field:
        assert exc.value.field == field


def test_replay_with_a_bad_rig_file_names_it(tmp_path, capsys, good):
    path, line = _rig_file(tmp_path, 'hold_s = 0.03', 'hold_s = -1.0')
    _err_line(capsys, ["replay", good, "--rig", path, "-o", str(tmp_path / "t.h5")], path,
              "sensor.ir.hold_s", f"line {line}", ">= 0")


SCENARIO = os.path.join(DATASETS, "faults", "dead.scenario.toml")


@pytest.mark.parametrize("old, new, field, words", [
    ("duration_s = 20.0", "duration_s = = 20.0", None, ("not valid TOML",)),
    ("seed = 77", "seed = 77\nwobble = 1", "wobble", ("unknown key 'wobble'",)),
    ("duration_s = 20.0", 'duration_s = "long"', "duration_s", ("expected a number",)),
    ("duration_s = 20.0", "duration_s = -3", "duration_s", ("> 0",)),
    ('kind = "dead"', 'kind = "melt"', "fault[1].kind", ("melt",)),
])
def test_scenario_toml_errors_name_the_key_and_line(tmp_path, capsys, old, new, field, words):
    text = open(SCENARIO).read().replace('"../tuning-run.rig.toml"',
                                         repr(os.path.join(DATASETS, "tuning-run.rig.toml")))
    assert old in text
    text = text.replace(old, new, 1)
    line = next(i + 1 for i, s in enumerate(text.splitlines()) if new.splitlines()[-1] in s)
    path = tmp_path / "bad.scenario.toml"
    path.write_text(text)
    bits = [str(path), f"line {line}"] + ([field] if field else [])
    _err_line(capsys, ["simulate", str(path), "-o", str(tmp_path / "x.h5")], *bits, *words,
              debug_raises=ConfigError)
    assert not (tmp_path / "x.h5").exists()


# ============================================================ CSV
def test_csv_rows_with_missing_or_extra_fields(tmp_path, capsys):
    rig = tmp_path / "rig.toml"
    rig.write_text(RIG_TOML)
    csv = tmp_path / "run.csv"
    csv.write_text("t_s,sensor,raw\n0.00,ir,300\n0.02,ir\n0.04,ir,301,5,6\n0.06,echo,0.0029\n")
    out_h5 = tmp_path / "run.h5"
    assert main(["import", str(csv), "--rig", str(rig), "-o", str(out_h5)]) == 0
    out, err = capsys.readouterr()
    lines = err.strip().splitlines()
    assert len(lines) == 2 and "Traceback" not in err
    assert f"{csv}, row 3: has 2 fields; expected 3" in lines[0]
    assert f"{csv}, row 4: has 5 fields; expected 3" in lines[1]
    assert "read 4 rows: 2 stored, 2 reported" in out and out_h5.exists()
    # --strict: nothing written, exit 2 (each bad row, then the verdict)
    out2 = tmp_path / "strict.h5"
    assert main(["import", str(csv), "--rig", str(rig), "-o", str(out2), "--strict"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err[-1] == (f"rangefuse import: error: {csv}: 2 bad rows and --strict; "
                       "nothing written") and not out2.exists()
    rep = import_csv(csv, RIG, RIG_TOML, tmp_path / "lib.h5")
    assert [(e.file, e.row) for e in rep.reported] == [(str(csv), 3), (str(csv), 4)]
    assert all(isinstance(e, InputError) for e in rep.reported)


def test_csv_with_a_wrong_header_or_bad_bytes(tmp_path, capsys):
    rig = tmp_path / "rig.toml"
    rig.write_text(RIG_TOML)
    csv = tmp_path / "run.csv"
    csv.write_text("time,sensor,value\n0,ir,300\n")
    _err_line(capsys, ["import", str(csv), "--rig", str(rig), "-o", str(tmp_path / "x.h5")],
              str(csv), "header", "row 1", "expected t_s,sensor,raw")
    csv.write_bytes(b"t_s,sensor,raw\n0,ir,3\xff0\n")
    _err_line(capsys, ["import", str(csv), "--rig", str(rig), "-o", str(tmp_path / "x.h5")],
              str(csv), "row 2", "UTF-8")


# ============================================================ rig against log
def test_rig_that_does_not_match_the_logs_sensors(tmp_path, capsys, good):
    other = tmp_path / "other.toml"
    other.write_text(RIG_TOML.replace('name = "frames"', 'name = "text"'))
    _err_line(capsys, ["replay", good, "--rig", str(other), "-o", str(tmp_path / "t.h5")],
              good, "/sensors/frames", "rig does not describe")
    changed = tmp_path / "changed.toml"
    changed.write_text(RIG_TOML.replace('output = "counts"', 'output = "volts"'))
    _err_line(capsys, ["replay", good, "--rig", str(changed), "-o", str(tmp_path / "t.h5")],
              good, "/sensors/ir", "triangulation/counts in the log",
              "triangulation/volts in the rig")
    with pytest.raises(InputError) as exc:
        replay(good, rig=str(changed), out=str(tmp_path / "t.h5"))
    assert (exc.value.file, exc.value.field) == (good, "/sensors/ir")
    assert not (tmp_path / "t.h5").exists()


# ============================================================ outputs
def test_output_path_equal_to_an_input(tmp_path, capsys, good):
    before = open(good, "rb").read()
    _err_line(capsys, ["replay", good, "-o", good], good, "-o", "one of the inputs")
    assert open(good, "rb").read() == before
    with pytest.raises(InputError) as exc:
        replay(good, out=good)
    assert exc.value.field == "out"  # the library names its argument, the command its option


def test_folder_that_does_not_exist(tmp_path, capsys, good):
    out = str(tmp_path / "no" / "such" / "t.h5")
    _err_line(capsys, ["replay", good, "-o", out], out, "-o", "does not exist")
    with pytest.raises(InputError):
        write_log(out, RIG_TOML, [], created_utc=WHEN)


def test_folder_that_cannot_be_written(tmp_path, capsys, monkeypatch, good):
    # A folder without write permission. Root may write anywhere, and CI runs as root, so
    # the permission answer is what the test controls: the folder is made read-only, and
    # os.access is made to say so too for a user (root) whom the mode does not stop.
    ro = tmp_path / "ro"
    ro.mkdir()
    os.chmod(ro, 0o555)
    real_access = os.access
    monkeypatch.setattr(os, "access", lambda p, mode, *a, **k: False if os.fspath(p) == str(ro)
                        and mode & os.W_OK else real_access(p, mode, *a, **k))
    try:
        out = str(ro / "t.h5")
        _err_line(capsys, ["replay", good, "-o", out], out, "-o", "cannot be written")
        assert os.listdir(ro) == []
    finally:
        os.chmod(ro, 0o755)


@pytest.mark.skipif(not os.path.isdir("/proc/self"), reason="needs a Linux /proc")
def test_folder_that_refuses_the_file_although_access_allows_it(capsys, good):
    # /proc lets no one, root included, create a file, whatever os.access answers: the
    # failure comes from the write itself and must still be one line, exit 2.
    out = "/proc/rangefuse-test.track.h5"
    _err_line(capsys, ["replay", good, "-o", out], out, "-o", "cannot create a file")
    assert not os.path.exists(out)


# ============================================================ calibrate
def _pairs(tmp_path, r, v, name="pairs.csv"):
    path = tmp_path / name
    path.write_text("range_m,volts\n" + "".join(f"{a},{b}\n" for a, b in zip(r, v)))
    return str(path)


def test_calibrate_with_too_few_points(tmp_path, capsys):
    r = np.array([0.2, 0.4])
    path = _pairs(tmp_path, r, CURVE.volts(r))
    _err_line(capsys, ["calibrate", path, "-o", str(tmp_path / "c.toml")], path,
              "2 pair(s)", "at least", debug_raises=CalibrationError)


def test_calibrate_with_nan(tmp_path, capsys):
    r = np.linspace(0.12, 0.8, 10)
    v = CURVE.volts(r)
    v[3] = np.nan
    path = _pairs(tmp_path, r, v)
    _err_line(capsys, ["calibrate", path, "-o", str(tmp_path / "c.toml")], path, "volts",
              "row 5", "finite")


def test_calibrate_with_only_one_side_of_the_peak(tmp_path, capsys):
    near = np.linspace(0.01, 0.06, 12)            # all below the peak (about 0.15 m)
    path = _pairs(tmp_path, near, CURVE.volts(near), "near.csv")
    _err_line(capsys, ["calibrate", path, "-o", str(tmp_path / "c.toml")], path, "range_m",
              "only the near side of the peak")
    # the working span alone (beyond the peak) is the ordinary calibration
    far = np.linspace(0.2, 0.8, 12)
    path = _pairs(tmp_path, far, CURVE.volts(far), "far.csv")
    assert main(["calibrate", path, "-o", str(tmp_path / "far.toml")]) == 0
    capsys.readouterr()


# ============================================================ the command itself
def test_no_arguments_prints_the_help(capsys):
    assert main([]) == 2
    out = capsys.readouterr().out
    assert "usage: rangefuse" in out and "examples:" in out


def test_unknown_subcommand(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["frobnicate"])
    assert exc.value.code == 2
    err = capsys.readouterr().err
    assert "invalid choice: 'frobnicate'" in err and "Traceback" not in err


@pytest.mark.parametrize("command", [None] + [c for _, c in COMMANDS])
def test_help_shows_an_example(capsys, command):
    with pytest.raises(SystemExit) as exc:
        main(([command] if command else []) + ["--help"])
    assert exc.value.code == 0
    out = capsys.readouterr().out
    assert "example" in out.lower() and "rangefuse" in out
    # every command says plainly that fused ranges are no protective function (the
    # project's safety rule; wording checked whole, line breaks aside)
    assert "not a safety-rated protective function: do not rely on them to protect people" \
        in " ".join(out.split())


def test_debug_is_accepted_after_the_command_too(capsys, tmp_path):
    with pytest.raises(RangefuseError):
        main(["replay", str(tmp_path / "none.h5"), "-o", str(tmp_path / "o.h5"), "--debug"])


def test_every_error_type_is_the_project_family():
    for cls in (ConfigError, InputError, CalibrationError, LogFormatError):
        e = cls("what was expected", file="f", field="g", row=3)
        assert isinstance(e, RangefuseError) and (e.file, e.field, e.row) == ("f", "g", 3)
        # a TOML description is read by line, the rest by row
        word = "line" if cls is ConfigError else "row"
        assert e.one_line() == f"f, g, {word} 3: what was expected"
