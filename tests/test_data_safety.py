"""Data is never lost or corrupted: atomic outputs, inputs never overwritten, damage
detected on read, no CSV row dropped silently, and a long fuse that does not drift.

References: the steady-state covariance of a Kalman filter with constant noise and a
constant time step is the solution of the discrete algebraic Riccati equation (Kalman,
"A new approach to linear filtering and prediction problems", J. Basic Eng. 82, 1960;
computed here with scipy.linalg.solve_discrete_are as the reference library); the
white-acceleration model's process noise is Bar-Shalom, Li & Kirubarajan (2001),
§6.2.2. Writing to a temporary file and renaming it over the target is the POSIX way to
replace a file atomically (rename(2), common practice, no source).
"""
from __future__ import annotations

import hashlib
import os

import h5py
import numpy as np
import pytest
from scipy.linalg import solve_discrete_are

import replay.logfile as logfile
import replay.run as replay_run
from fusion import decisions as D
from fusion.errors import LogFormatError
from fusion.fuser import Fuser
from fusion.rig import Rig
from fusion.sensors.air import echo_time
from fusion.sensors.triangulation import TriangulationCurve
from replay.cli import main
from replay.csvimport import import_csv, load_rig_text
from replay.simulate import simulate, write_simulated

HERE = os.path.dirname(os.path.abspath(__file__))
DATASETS = os.path.join(os.path.dirname(HERE), "datasets")
RIG_PATH = os.path.join(DATASETS, "tuning-run.rig.toml")
SCENARIO = os.path.join(DATASETS, "faults", "dead.scenario.toml")


def _digest(path):
    with open(path, "rb") as fh:
        return hashlib.sha256(fh.read()).hexdigest()


def _cli(capsys, argv):
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err.strip().splitlines()


@pytest.fixture(scope="module")
def log_path(tmp_path_factory):
    path = str(tmp_path_factory.mktemp("safety") / "run.h5")
    write_simulated(path, simulate(SCENARIO))
    return path


@pytest.fixture()
def folder(tmp_path, log_path):
    """A fresh folder holding a copy of the log, its rig and a track file."""
    log = tmp_path / "run.h5"
    log.write_bytes(open(log_path, "rb").read())
    rig = tmp_path / "rig.toml"
    rig.write_bytes(open(RIG_PATH, "rb").read())
    replay_run.run(str(log), out=str(tmp_path / "run.track.h5"))
    csv = tmp_path / "run.csv"
    csv.write_text("t_s,sensor,raw\n0.0,ir_front,300\n0.01,echo_a,0.0029\n")
    curve = TriangulationCurve.typical_10_80()
    r = np.linspace(0.12, 0.8, 12)
    pairs = tmp_path / "pairs.csv"
    pairs.write_text("range_m,volts\n" + "".join(f"{a},{b}\n" for a, b in zip(r, curve.volts(r))))
    return tmp_path


# ----------------------------------------------------------------- killed part-way
def _listing(path):
    return sorted(os.listdir(path))


def test_replay_killed_part_way_leaves_no_output(folder, monkeypatch, capsys):
    before = _listing(folder)
    calls = []
    real = replay_run._accumulate

    def dies(*args, **kw):
        calls.append(1)
        real(*args, **kw)
        if len(calls) == 2:  # after some rows were appended to the track file
            raise KeyboardInterrupt

    monkeypatch.setattr(replay_run, "_accumulate", dies)
    code, _out, err = _cli(capsys, ["replay", str(folder / "run.h5"), "--window", "5",
                                    "-o", str(folder / "new.track.h5")])
    assert calls == [1, 1]
    assert code == 130 and err == ["rangefuse replay: interrupted; no partial output was kept"]
    assert _listing(folder) == before


def test_track_writer_failing_part_way_leaves_no_output(folder, monkeypatch, capsys):
    # The track file's chunks are written on a worker thread: its failure must reach
    # the command like any other, and the partial file must go.
    before = _listing(folder)
    calls = []
    real = replay_run._ChunkWriter._write

    def disk_full(self, *args):
        calls.append(1)
        if len(calls) == 3:
            raise OSError(28, "No space left on device")
        return real(self, *args)

    monkeypatch.setattr(replay_run._ChunkWriter, "_write", disk_full)
    code, _out, err = _cli(capsys, ["replay", str(folder / "run.h5"), "--window", "5",
                                    "-o", str(folder / "new.track.h5")])
    assert len(calls) >= 3
    assert code == 2 and len(err) == 1 and "No space left on device" in err[0], err
    assert _listing(folder) == before


@pytest.mark.parametrize("argv", [
    ["simulate", SCENARIO, "-o", "{d}/new.h5"],
    ["import", "{d}/run.csv", "--rig", "{d}/rig.toml", "-o", "{d}/new.h5"],
])
def test_log_writer_failing_part_way_leaves_no_output(folder, monkeypatch, capsys, argv):
    before = _listing(folder)
    calls = []
    real = logfile._put

    def disk_full(*args, **kw):
        calls.append(1)
        if len(calls) == 3:
            raise OSError(28, "No space left on device")
        return real(*args, **kw)

    monkeypatch.setattr(logfile, "_put", disk_full)
    code, _out, err = _cli(capsys, [a.format(d=folder) for a in argv])
    assert len(calls) == 3
    # one line, no traceback, and nothing left behind
    assert code == 2 and len(err) == 1 and "No space left on device" in err[0], err
    assert _listing(folder) == before


def test_figure_and_curve_writers_failing_leave_no_output(folder, monkeypatch, capsys):
    before = _listing(folder)

    def broken_fsync(fd):
        raise OSError(5, "Input/output error")

    monkeypatch.setattr("replay._io.os.fsync", broken_fsync)
    code, _out, err = _cli(capsys, ["calibrate", str(folder / "pairs.csv"), "-o",
                                    str(folder / "curve.toml")])
    assert code == 2 and len(err) == 1 and "Input/output error" in err[0], err
    assert _listing(folder) == before

    import matplotlib.figure

    def half_a_figure(self, fname, *a, **kw):
        with open(fname, "wb") as fh:
            fh.write(b"\x89PNG half")
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(matplotlib.figure.Figure, "savefig", half_a_figure)
    code, _out, err = _cli(capsys, ["plot", str(folder / "run.track.h5"), "-o",
                                    str(folder / "fig.png")])
    assert code == 2 and len(err) == 1, err
    assert _listing(folder) == before


# ----------------------------------------------------------------- inputs are kept
@pytest.mark.parametrize("argv, victim", [
    (["replay", "{d}/run.h5", "-o", "{d}/run.h5"], "run.h5"),
    (["replay", "{d}/run.h5", "--rig", "{d}/rig.toml", "-o", "{d}/./rig.toml"], "rig.toml"),
    (["tune", "{d}/run.h5", "-o", "{d}/run.h5"], "run.h5"),
    (["tune", "{d}/run.h5", "--rig", "{d}/rig.toml", "-o", "{d}/rig.toml"], "rig.toml"),
    (["import", "{d}/run.csv", "--rig", "{d}/rig.toml", "-o", "{d}/run.csv"], "run.csv"),
    (["import", "{d}/run.csv", "--rig", "{d}/rig.toml", "-o", "{d}/rig.toml"], "rig.toml"),
    (["simulate", "{d}/scenario.toml", "-o", "{d}/scenario.toml"], "scenario.toml"),
    (["calibrate", "{d}/pairs.csv", "-o", "{d}/pairs.csv"], "pairs.csv"),
    (["calibrate", "{d}/pairs.csv", "-o", "{d}/curve.toml", "--plot", "{d}/pairs.csv"],
     "pairs.csv"),
    (["plot", "{d}/run.track.h5", "-o", "{d}/run.track.h5"], "run.track.h5"),
])
def test_an_output_over_an_input_is_refused(folder, capsys, argv, victim):
    sc = folder / "scenario.toml"
    sc.write_text(open(SCENARIO).read().replace('"../tuning-run.rig.toml"', '"rig.toml"'))
    digest = _digest(folder / victim)
    before = _listing(folder)
    code, _out, err = _cli(capsys, [a.format(d=folder) for a in argv])
    assert code == 2 and len(err) == 1, err
    assert victim in err[0] and "input" in err[0], err[0]
    assert _digest(folder / victim) == digest
    assert _listing(folder) == before


def test_an_output_over_an_input_through_a_link_is_refused(folder, capsys):
    os.symlink(folder / "run.h5", folder / "alias.h5")
    digest = _digest(folder / "run.h5")
    code, _out, err = _cli(capsys, ["replay", str(folder / "run.h5"), "-o",
                                    str(folder / "alias.h5")])
    assert code == 2 and len(err) == 1 and "one of the inputs" in err[0]
    assert _digest(folder / "run.h5") == digest


# ----------------------------------------------------------------- damage on read
def test_a_damaged_dataset_is_detected_and_named(folder, capsys):
    path = folder / "run.h5"
    with h5py.File(path, "r") as f:
        info = f["sensors/echo_a/raw"].id.get_chunk_info(0)
    data = bytearray(path.read_bytes())
    data[info.byte_offset + info.size // 2] ^= 0x40
    path.write_bytes(bytes(data))
    with pytest.raises(LogFormatError) as exc:
        with logfile.open_log(path) as log:
            log.read_sensor("echo_a")
    assert exc.value.field == "/sensors/echo_a/raw" and "checksum" in exc.value.message
    for argv in (["check", str(path)],
                 ["replay", str(path), "-o", str(folder / "out.track.h5"), "--quiet"]):
        code, _out, err = _cli(capsys, argv)
        assert code == 2, argv
        line = [e for e in err if "/sensors/echo_a/raw" in e]
        assert len(line) == 1 and "checksum failed" in line[0] and "run.h5" in line[0], err
    assert not (folder / "out.track.h5").exists()


# ----------------------------------------------------------------- CSV rows
def test_csv_import_accounts_for_every_row(tmp_path):
    rig, text = load_rig_text(RIG_PATH)
    rng = np.random.default_rng(7)
    kinds = rng.integers(0, 8, 600)
    lines = ["t_s,sensor,raw"]
    good = 0
    for i, k in enumerate(kinds):
        t = f"{0.01 * i:.2f}"
        row = {0: f"{t},ir_front,{rng.integers(0, 1024)}",
               1: f"{t},echo_a,{rng.uniform(0.001, 0.02):.6f}",
               2: f"{t},air_temp,{rng.uniform(15, 25):.2f}",
               3: f"{t},truth.front,{rng.uniform(0.2, 1.0):.3f}",
               4: f"{t},echo_b",                         # missing field
               5: f"{t},echo_b,0.5,0.1",                 # extra field
               6: f"{t},sonar9,1.0",                     # unknown sensor
               7: ""}[int(k)]                            # blank line: not a row
        good += int(k) < 4
        lines.append(row)
    path = tmp_path / "rows.csv"
    path.write_text("\n".join(lines) + "\n")
    rep = import_csv(path, rig, text, tmp_path / "rows.h5")
    assert rep.rows_in == int(np.sum(kinds != 7)) and rep.blank_lines == int(np.sum(kinds == 7))
    assert rep.rows_in == rep.stored + len(rep.reported) and rep.stored == good
    # every reported row names its line; every stored row is in the log
    bad_lines = sorted(i + 2 for i, k in enumerate(kinds) if 4 <= k <= 6)
    assert sorted(e.row for e in rep.reported) == bad_lines
    with logfile.open_log(tmp_path / "rows.h5") as log:
        n = sum(info.n for info in log.sensors.values())
        n += sum(info.n for info in log.environments.values())
        n += sum(log.truth_rows.values())
    assert n == rep.stored


# ----------------------------------------------------------------- long run
def test_a_million_readings_keep_the_covariance_symmetric_and_steady():
    """10**6 readings of one echo ranger every 0.05 s: the covariance after every reading
    stays symmetric positive definite and sits on the Riccati steady state from the
    start of the run to its end (no drift)."""
    sigma_m, dt, q = 0.003, 0.05, 0.5
    rig = Rig.from_dict({
        "air": {"fallback_temp_c": 20.0, "fallback_sigma_c": 0.0},
        # no gate, and an outlier density so small that the "this reading was an
        # outlier" component never carries weight: the estimator is then exactly the
        # Kalman filter whose steady state the Riccati equation gives
        "estimator": {"accel_psd": q, "gate_probability": 1.0, "outlier_density": 1e-12},
        "sensor": [{"name": "echo", "kind": "echo", "direction": "front",
                    "output": "echo_time", "tick_s": 0.0, "sigma_m": sigma_m,
                    "sigma_frac": 0.0, "min_range_m": 0.05, "max_range_m": 4.0}]})
    F = np.array([[1.0, dt], [0.0, 1.0]])
    Q = q * np.array([[dt ** 3 / 3, dt ** 2 / 2], [dt ** 2 / 2, dt]])
    H = np.array([[1.0, 0.0]])
    prior = solve_discrete_are(F.T, H.T, Q, np.array([[sigma_m ** 2]]))
    post = prior - prior @ H.T @ np.linalg.inv(H @ prior @ H.T + sigma_m ** 2) @ H @ prior
    fuser = Fuser(rig)
    rng = np.random.default_rng(1)
    n_total, chunk = 1_000_000, 125_000
    first = last = None
    for k in range(n_total // chunk):
        t = (k * chunk + np.arange(chunk)) * dt
        # bounded noise (within 2 sigma) keeps the track one Gaussian: the covariance
        # then depends on the time steps only, and the Riccati solution applies
        r = 1.0 + rng.uniform(-2 * sigma_m, 2 * sigma_m, chunk)
        b = fuser.process({"echo": (t, echo_time(r, 20.0))})
        assert len(b) == chunk and np.all(b.code == D.ACCEPTED)
        p00, p01, p11 = b.state[:, 2], b.state[:, 3], b.state[:, 4]
        assert np.all(p00 > 0) and np.all(p00 * p11 - p01 ** 2 > 0)
        P = fuser.state["P"][0, 0]
        assert P[0, 1] == P[1, 0]
        if k == 0:
            first = b.state[1000:2000, 2:].mean(axis=0)
        last = b.state[-1000:, 2:].mean(axis=0)
    want = np.array([post[0, 0], post[0, 1], post[1, 1]])
    np.testing.assert_allclose(first, want, rtol=1e-6)
    np.testing.assert_allclose(last, want, rtol=1e-6)
    np.testing.assert_allclose(last, first, rtol=1e-9)
