"""docs/log-format.md is the contract for foreign writers: its worked examples must
produce logs that rangefuse reads and `rangefuse check` calls valid."""
import os
import re
try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10: the package depends on tomli there
    import tomli as tomllib
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


def _decisions(track_path):
    """(sensor name, decision name) per reading, read as docs/track-format.md describes."""
    import json
    with h5py.File(track_path, "r") as f:
        sensors = json.loads(f.attrs["sensor_names"])
        names = json.loads(f.attrs["decision_names"])
        s = f["decisions/sensor"][()]
        d = f["decisions/decision"][()]
    return [(sensors[i], names[k]) for i, k in zip(s, d)]


def test_worked_example_is_physically_consistent(tmp_path, monkeypatch):
    # The IR voltages and echo times must describe one target, so a replay fuses both
    # sensors instead of gating one of them away.
    monkeypatch.chdir(tmp_path)
    script, _ = _blocks("python")
    ns = {}
    exec(compile(script, str(DOC), "exec"), ns)
    with open_log("bench.h5") as log:
        ir, echo = log.read_sensor("ir_front"), log.read_sensor("echo_front")
        temp = float(log.environment("air")[1][0])
    # A host-timed echo is read when it returns: reading time = ping time + round trip
    # (common practice, no source).
    np.testing.assert_allclose(echo.t_s[0] - echo.ping_t_s[0], echo.raw[0], atol=1e-9)
    # Range from a round trip: r = c t / 2 with the ideal-gas speed of sound
    # c = 331.3 sqrt(1 + T/273.15) m/s (common practice, no source; dry air).
    c = 331.3 * np.sqrt(1.0 + temp / 273.15)
    r_echo = c * np.asarray(echo.raw) / 2.0
    # IR far-side ranges from the rig's own curve, V(r) = A (1 - exp(-(r/lam)^p))/(r + b)
    # + offset (docs/rig.md, "Curves"), inverted by bisection on the far side of the peak.
    k = next(s for s in tomllib.loads(ns["RIG"])["sensor"] if s["name"] == "ir_front")["curve"]

    def volts(r):
        return k["A_vm"] * (1 - np.exp(-(r / k["lam_m"]) ** k["p"])) / (r + k["b_m"]) \
            + k["offset_v"]

    def far_range(v):
        lo, hi = 0.2, k["max_range_m"]        # V falls monotonically here (peak ~0.15 m)
        for _ in range(60):
            mid = 0.5 * (lo + hi)
            lo, hi = (mid, hi) if volts(mid) > v else (lo, mid)
        return 0.5 * (lo + hi)

    r_ir = np.array([far_range(v) for v in ir.raw])
    # Both sensors see the same slowly moving target: each echo range lies within 1 cm
    # of the IR range interpolated to its time (a few sigma of 3 mm noise each).
    r_ir_at_echo = np.interp(echo.t_s, ir.t_s, r_ir)  # the second echo extrapolates flat
    assert np.all(np.abs(r_echo - r_ir_at_echo) < 0.01), (r_echo, r_ir_at_echo)


def test_replay_of_the_csv_example_fuses_every_reading(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    script, _ = _blocks("python")
    ns = {}
    exec(compile(script, str(DOC), "exec"), ns)
    os.remove("bench.h5")
    Path("bench.rig.toml").write_text(ns["RIG"])
    Path("bench.csv").write_text(_blocks("csv")[0])
    assert main(["import", "bench.csv", "--rig", "bench.rig.toml", "-o", "bench.h5"]) == 0
    assert main(["replay", "bench.h5", "-o", "bench.track.h5", "--quiet"]) == 0
    decisions = _decisions("bench.track.h5")
    assert [d for s, d in decisions if s == "echo_front"] == ["accepted", "accepted"]
    # Every IR reading is fused; as the doc says, only the one before any echo keeps
    # both near- and far-side candidates.
    assert [d for s, d in decisions if s == "ir_front"] == ["ambiguous", "accepted", "accepted"]
