"""docs/log-format.md is the contract for foreign writers: its worked examples must
produce logs that rangefuse reads and `rangefuse check` calls valid."""
import os
import re
from pathlib import Path

import h5py
import numpy as np

from replay.check import check_log
from replay.cli import main
from replay.logfile import open_log

DOC = Path(__file__).resolve().parent.parent / "docs" / "log-format.md"


def _blocks(lang):
    return re.findall(rf"```{lang}\n(.*?)```", DOC.read_text(), re.S)


def test_h5py_example_writes_a_valid_log(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    script, fragment = _blocks("python")
    ns = {}
    exec(compile(script, str(DOC), "exec"), ns)
    report = check_log("bench.h5")
    assert report.ok, report.problems
    assert report.warnings == ()       # the example uses every filter, so no warnings
    with open_log("bench.h5") as log:
        echo = log.read_sensor("echo_front")
        assert np.isnan(echo.ping_t_s[1])
    # The serial fragment adds a text stream the reader gets back byte for byte.
    with h5py.File("bench.h5", "a") as f:
        exec(compile(fragment, str(DOC), "exec"), {**ns, "f": f})
    with open_log("bench.h5") as log:
        assert list(log.read_sensor("echo_side").raw) == ["R0300\r", "R0301\r"]


def test_csv_example_imports_to_the_same_readings(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    script, _ = _blocks("python")
    ns = {}
    exec(compile(script, str(DOC), "exec"), ns)
    os.rename("bench.h5", "from_h5py.h5")
    Path("bench.rig.toml").write_text(ns["RIG"])
    Path("bench.csv").write_text(_blocks("csv")[0])
    assert main(["import", "bench.csv", "--rig", "bench.rig.toml", "-o", "bench.h5"]) == 0
    assert "read 6 rows: 6 stored, 0 reported" in capsys.readouterr().out
    assert check_log("bench.h5").ok
    with open_log("bench.h5") as a, open_log("from_h5py.h5") as b:
        assert a.rig_toml == b.rig_toml
        for name in b.sensors:
            sa, sb = a.read_sensor(name), b.read_sensor(name)
            np.testing.assert_array_equal(sa.t_s, sb.t_s)
            np.testing.assert_array_equal(sa.raw, sb.raw)
            np.testing.assert_array_equal(sa.ping_t_s, sb.ping_t_s)
        np.testing.assert_array_equal(a.environment("air")[1], b.environment("air")[1])
