"""Command-line hygiene found by a new user's pass: every output is checked (under its own
option name) before any work, the outputs of one command appear together or not at all
(errors, Ctrl-C, SIGTERM, a reader that leaves), numbers are checked up front, and the
messages say what is wrong where.

Each test drives `replay.cli.main` on a small simulated log; where "no work was done" is
the point, the work itself is replaced by a recorder.
"""
from __future__ import annotations

import csv
import os
import re
import signal
import stat
import sys

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10: the package depends on tomli there
    import tomli as tomllib

import h5py
import numpy as np
import pytest

import replay.calibrate as calibrate
import replay.export as export
import replay.logfile as logfile
import replay.plots as plots
import replay.run as replay_run
import replay.tune as tune
from fusion.errors import InputError
from fusion.rig import Rig
from replay.cli import SAFETY, main
from replay.schedule import firing_plan
from replay.simulate import simulate, write_simulated

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
SCENARIO = os.path.join(ROOT, "datasets", "faults", "dead.scenario.toml")
SHELF_RIG = os.path.join(ROOT, "datasets", "shelf-pass.rig.toml")
PAIRS = os.path.join(ROOT, "datasets", "examples", "ir-front.pairs.csv")
DOC = os.path.join(ROOT, "docs", "track-format.md")
LINUX_PROC = pytest.mark.skipif(not os.path.isdir("/proc/self"), reason="needs a Linux /proc")


def _cli(capsys, argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err.strip().splitlines()


def _listing(path):
    return sorted(os.listdir(path))


@pytest.fixture(scope="module")
def log_path(tmp_path_factory):
    path = str(tmp_path_factory.mktemp("hygiene") / "run.h5")
    write_simulated(path, simulate(SCENARIO))
    return path


@pytest.fixture()
def folder(tmp_path, log_path):
    (tmp_path / "run.h5").write_bytes(open(log_path, "rb").read())
    return tmp_path


@pytest.fixture()
def no_tuning(monkeypatch):
    """Replaces the tuner: the list records every call (there should be none)."""
    calls = []

    def recorder(*args, **kw):
        calls.append(1)
        raise AssertionError("the tuner ran")

    monkeypatch.setattr(tune, "tune", recorder)
    return calls


# ============================================================ 1. outputs checked first
@LINUX_PROC
@pytest.mark.parametrize("argv, option, words", [
    (["-o", "{d}/t.toml", "--plot", "/proc/t.png"], "--plot", "cannot create a file"),
    (["-o", "{d}/t.toml", "--plot", "{d}/tune.xyz"], "--plot", "cannot tell the format"),
    (["-o", "{d}/t.toml", "--plot", "{d}/run.h5"], "--plot", "one of the inputs"),
    (["-o", "/proc/t.toml", "--plot", "{d}/t.png"], "-o", "cannot create a file"),
])
def test_tune_checks_every_output_under_its_own_option_before_tuning(folder, capsys, no_tuning,
                                                                     argv, option, words):
    before = _listing(folder)
    code, _out, err = _cli(capsys, ["tune", folder / "run.h5"]
                           + [a.format(d=folder) for a in argv])
    assert code == 2 and len(err) == 1, err
    assert f", {option}: " in err[0] and words in err[0], err[0]
    assert no_tuning == []
    assert _listing(folder) == before


@LINUX_PROC
def test_calibrate_checks_the_figure_before_fitting_and_writes_nothing(tmp_path, capsys,
                                                                       monkeypatch):
    fits = []
    real = calibrate.fit_report
    monkeypatch.setattr(calibrate, "fit_report", lambda *a, **k: fits.append(1) or real(*a, **k))
    code, _out, err = _cli(capsys, ["calibrate", PAIRS, "-o", tmp_path / "c.toml",
                                    "--plot", "/proc/x.png"])
    assert code == 2 and len(err) == 1 and "/proc/x.png, --plot: cannot create" in err[0], err
    assert fits == [] and _listing(tmp_path) == []


def test_outputs_of_one_command_appear_together_or_not_at_all(tmp_path, capsys, monkeypatch):
    # calibrate writes the curve, then the figure; the figure's write fails: the curve,
    # complete as it is, must not be left alone.
    writes = []
    real = os.fsync

    def second_fails(fd):
        writes.append(1)
        if len(writes) == 2:
            raise OSError(28, "No space left on device")
        return real(fd)

    monkeypatch.setattr("replay._io.os.fsync", second_fails)
    code, _out, err = _cli(capsys, ["calibrate", PAIRS, "-o", tmp_path / "c.toml",
                                    "--plot", tmp_path / "c.png"])
    assert len(writes) == 2
    assert code == 2 and len(err) == 1 and "No space left on device" in err[0], err
    assert _listing(tmp_path) == []


def test_every_output_is_written_when_the_reader_leaves(folder, monkeypatch):
    # `rangefuse replay ... | head -1`: the summary cannot be printed, the command still
    # ends normally and puts all of its outputs in place (not the track file alone).
    class Gone:
        def write(self, text):
            raise BrokenPipeError(32, "Broken pipe")

        def flush(self):
            raise BrokenPipeError(32, "Broken pipe")

    monkeypatch.setattr(sys, "stdout", Gone())
    code = main(["replay", str(folder / "run.h5"), "-o", str(folder / "run.track.h5"), "--csv"])
    assert code == 0
    assert _listing(folder) == ["run.decisions.csv", "run.h5", "run.track.csv",
                                "run.track.h5"]


# ============================================================ 2. schedule's numbers
@pytest.mark.parametrize("extra, option", [
    (["--temp-min", "-300"], "--temp-min"), (["--temp-min", "nan"], "--temp-min"),
    (["--temp-min", "inf"], "--temp-min"), (["--temp-min", "91"], "--temp-min"),
    (["--margin", "0"], "--margin"), (["--margin", "nan"], "--margin"),
    (["--margin", "-1"], "--margin"), (["--margin", "0.5"], "--margin"),
    (["--margin", "1e9"], "--margin"),   # a slip: a cycle of 28 million seconds
])
def test_schedule_refuses_numbers_that_give_no_safe_cycle(capsys, extra, option):
    code, out, err = _cli(capsys, ["schedule", SHELF_RIG] + extra)
    assert code == 2 and len(err) == 1, err
    assert err[0].startswith(f"rangefuse schedule: error: {option}: expected"), err[0]
    assert "cycle_s" not in out


def test_schedule_limits_hold_for_the_library_too():
    rig = Rig.load(SHELF_RIG)
    for kw, field in (({"margin": 0.9}, "--margin"), ({"temp_min_c": -61.0}, "--temp-min")):
        with pytest.raises(InputError) as exc:
            firing_plan(rig, **kw)
        assert exc.value.field == field
    # the ends of the range are accepted, and a margin of exactly 1
    assert firing_plan(rig, temp_min_c=-60.0, margin=1.0)["slot_s"] > 0
    assert firing_plan(rig, temp_min_c=90.0)["slot_s"] > 0


def test_schedule_rig_toml_carries_the_caution_as_a_comment(capsys):
    code, out, _err = _cli(capsys, ["schedule", SHELF_RIG])
    assert code == 0
    text = out.split("rig TOML:\n", 1)[1]
    comment = " ".join(line[2:] for line in text.splitlines() if line.startswith("# "))
    assert comment == SAFETY
    assert tomllib.loads(text)["schedule"]["mode"] == "round_robin"  # still pastes


# ============================================================ 3. tune --max-evals
@pytest.mark.parametrize("value", ["-1", "0"])
def test_max_evals_must_be_a_positive_whole_number(folder, capsys, no_tuning, value):
    code, _out, err = _cli(capsys, ["tune", folder / "run.h5", "-o", folder / "t.toml",
                                    "--max-evals", value])
    assert code == 2 and err == [f"rangefuse tune: error: --max-evals: expected a whole "
                                 f"number >= 1, got {value}"]
    assert no_tuning == [] and not (folder / "t.toml").exists()


def test_a_float_option_must_be_finite(folder, capsys):
    code, _out, err = _cli(capsys, ["replay", folder / "run.h5", "-o", folder / "t.h5",
                                    "--window", "nan"])
    assert code == 2 and err == ["rangefuse replay: error: --window: expected a finite "
                                 "number, got nan"]


# ============================================================ 4. interrupted replay
def _replay_all(folder):
    return ["replay", folder / "run.h5", "-o", folder / "big.track.h5", "--smooth", "--csv",
            "--plot", folder / "big.png"]


def test_ctrl_c_after_the_track_file_is_written_keeps_no_output(folder, capsys, monkeypatch):
    def interrupted(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(plots, "plot_track", interrupted)  # after the track file and CSVs
    before = _listing(folder)
    code, _out, err = _cli(capsys, _replay_all(folder))
    assert code == 130 and err == ["rangefuse replay: interrupted; no partial output was kept"]
    assert _listing(folder) == before  # nor any hidden temporary file


def test_an_interrupt_swallowed_on_its_way_still_keeps_no_output(folder, capsys, monkeypatch):
    # A Ctrl-C that arrives inside a callback from compiled code is swallowed there
    # (Python prints "Exception ignored ..." and goes on); the signal was noted, so the
    # command still keeps none of its outputs and says it was interrupted.
    import replay._io as io

    def swallowed(*a, **k):
        io.note_interrupt(signal.SIGINT)  # what the handler does before raising

    monkeypatch.setattr(plots, "plot_track", swallowed)
    before = _listing(folder)
    code, _out, err = _cli(capsys, _replay_all(folder))
    assert code == 130 and err == ["rangefuse replay: interrupted; no partial output was kept"]
    assert _listing(folder) == before


def test_a_device_or_pipe_is_never_replaced_by_an_output(folder, capsys):
    # Outputs are renamed into place; over a device or a pipe that would leave an
    # ordinary file where it stood (as root, over /dev/null). A pipe made here stands in.
    fifo = folder / "pipe.track.h5"
    os.mkfifo(fifo)
    code, _out, err = _cli(capsys, ["replay", folder / "run.h5", "-o", fifo])
    assert code == 2 and len(err) == 1 and "is a device or a pipe" in err[0], err
    assert stat.S_ISFIFO(os.stat(fifo).st_mode)


class _NotHandled(Exception):
    pass


def test_sigterm_stops_a_command_like_ctrl_c(folder, capsys, monkeypatch):
    def not_handled(signum, frame):
        raise _NotHandled("SIGTERM reached the default handling")

    real = export.TrackFile.slices

    def terminated_while_writing_csv(self, n, rows=None):
        os.kill(os.getpid(), signal.SIGTERM)
        yield from real(self, n, rows)

    monkeypatch.setattr(export.TrackFile, "slices", terminated_while_writing_csv)
    old = signal.signal(signal.SIGTERM, not_handled)
    try:
        before = _listing(folder)
        code, _out, err = _cli(capsys, _replay_all(folder))
        assert signal.getsignal(signal.SIGTERM) is not_handled  # given back
    finally:
        signal.signal(signal.SIGTERM, old)
    assert code == 143 and err == ["rangefuse replay: terminated; no partial output was kept"]
    assert _listing(folder) == before


# ============================================================ 5. plot --from past the end
def test_plot_time_range_outside_the_track_names_its_span(folder, capsys):
    track = folder / "run.track.h5"
    replay_run.run(str(folder / "run.h5"), out=str(track))
    with h5py.File(track, "r") as f:
        t = f["decisions/t_s"][:]
    first, last = np.nanmin(t), np.nanmax(t)
    for kind in ("track", "diagnostics"):
        for extra, option in ((["--from", last + 100], "--from"), (["--to", first - 5], "--to")):
            code, _out, err = _cli(capsys, ["plot", track, "-o", folder / "fig.png",
                                            "--kind", kind] + extra)
            assert code == 2 and len(err) == 1, err
            assert f"run.track.h5, {option}: no reading between" in err[0], err[0]
            assert f"the track spans {first:g} s to {last:g} s" in err[0], err[0]
    assert not (folder / "fig.png").exists()
    # a range that overlaps the track still draws
    code, _out, _err = _cli(capsys, ["plot", track, "-o", folder / "fig.png",
                                     "--from", (first + last) / 2, "--to", last + 100])
    assert code == 0 and (folder / "fig.png").exists()


# ============================================================ 6. two outputs, one path
def test_two_outputs_sharing_a_path_are_named_as_outputs(folder, capsys):
    out = folder / "y.track.h5"
    code, _out, err = _cli(capsys, ["replay", folder / "run.h5", "-o", out, "--plot", out])
    assert code == 2 and len(err) == 1, err
    assert "y.track.h5, --plot: two outputs share this path (-o and --plot)" in err[0]
    assert "input" not in err[0]


# ============================================================ 7. several logs, one --plot
def test_several_logs_get_one_figure_each_named_from_plot(folder, capsys):
    for name in ("a.h5", "b.h5"):
        (folder / name).write_bytes((folder / "run.h5").read_bytes())
    code, out, _err = _cli(capsys, ["replay", folder / "a.h5", folder / "b.h5", "-o",
                                    folder / "tracks", "--plot", folder / "multi.png",
                                    "--quiet"])
    assert code == 0
    assert _listing(folder / "tracks") == ["a.track.h5", "b.track.h5"]
    assert {"multi.a.png", "multi.b.png"} <= set(_listing(folder))
    assert f"figure: {folder / 'multi.a.png'}" in out


# ============================================================ 8. checksum rows
def _flip_a_byte(path, dataset, chunk):
    with h5py.File(path, "r") as f:
        info = f[dataset].id.get_chunk_info(chunk)
    data = bytearray(open(path, "rb").read())
    data[info.byte_offset + info.size // 2] ^= 0x40
    open(path, "wb").write(bytes(data))


def test_a_damaged_chunk_is_named_by_its_own_rows(tmp_path, capsys, monkeypatch):
    monkeypatch.setattr(logfile, "CHUNK_ROWS", 100)  # several chunks in a small log
    path = tmp_path / "run.h5"
    write_simulated(str(path), simulate(SCENARIO))
    with h5py.File(path, "r") as f:
        ds = f["sensors/ir_front/t_s"]
        n, chunks = ds.shape[0], ds.chunks[0]
    assert chunks == 100 and n > 300
    _flip_a_byte(path, "sensors/ir_front/t_s", 2)
    for argv in (["check", path], ["replay", path, "-o", tmp_path / "o.track.h5"]):
        code, _out, err = _cli(capsys, argv)
        line = [e for e in err if "/sensors/ir_front/t_s" in e]
        assert code == 2 and len(line) == 1, err
        assert "row 200: checksum failed" in line[0] and "(rows 200..299;" in line[0], line[0]


def test_a_damaged_last_chunk_ends_at_the_last_row(tmp_path, capsys):
    # a one-chunk dataset read whole: the span is the dataset's, not the read's request
    path = tmp_path / "run.h5"
    write_simulated(str(path), simulate(SCENARIO))
    with h5py.File(path, "r") as f:
        n = f["truth/front/t_s"].shape[0]
    _flip_a_byte(path, "truth/front/t_s", 0)
    code, _out, err = _cli(capsys, ["replay", path, "-o", tmp_path / "o.track.h5"])
    assert code == 2 and len(err) == 1, err
    assert f"(rows 0..{n - 1};" in err[0] and "None" not in err[0], err[0]


# ============================================================ 9. a file where a folder goes
def test_an_output_under_a_file_says_it_is_not_a_folder(folder, capsys):
    (folder / "afile").write_text("x")
    for out in (folder / "afile" / "x.track.h5", folder / "afile" / "sub" / "x.track.h5"):
        code, _out, err = _cli(capsys, ["replay", folder / "run.h5", "-o", out])
        assert code == 2 and len(err) == 1, err
        assert f"'{folder / 'afile'}' is a file, not a folder" in err[0], err[0]
        assert "does not exist" not in err[0]


# ============================================================ 10. loglik in decisions.csv
def _doc_decision_columns():
    text = open(DOC, encoding="utf-8").read()
    body = text.split("## `decisions/`", 1)[1].split("\n## ", 1)[0]
    cols = []
    for line in body.splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if len(cells) == 4 and cells[0].startswith("`"):
            cols += re.findall(r"`([a-z_0-9]+)`", cells[0])
    return cols


def test_decisions_csv_holds_every_documented_column_with_loglik(folder, capsys):
    code, _out, _err = _cli(capsys, ["replay", folder / "run.h5", "-o", folder / "r.track.h5",
                                     "--csv", "--quiet"])
    assert code == 0
    with open(folder / "r.decisions.csv", newline="") as fh:
        rows = list(csv.reader(fh))
    assert rows[0] == _doc_decision_columns()
    col = rows[0].index("loglik")
    with h5py.File(folder / "r.track.h5", "r") as f:
        want = f["decisions/loglik"][:]
    got = np.array([float(r[col]) if r[col] else np.nan for r in rows[1:]])
    assert np.isfinite(want).any()
    np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("wrong", ["--smoth", "--smoo"])
def test_a_misspelt_or_shortened_option_is_refused_by_the_command(tmp_path, capsys, wrong):
    # One line, like every input error, naming the command (not the top level) and where
    # its options are; a shortened option is not guessed: it could name another option
    # once one is added.
    log = os.path.join(ROOT, "datasets", "shelf-pass.h5")
    out = tmp_path / "x.track.h5"
    with pytest.raises(SystemExit) as exc:
        main(["replay", log, "-o", str(out), wrong])
    assert exc.value.code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == [f"rangefuse replay: error: unrecognized arguments: {wrong} "
                   "(see `rangefuse replay --help`)"]
    assert not out.exists()


@pytest.mark.parametrize("window", [0, -1.0, float("nan"), "10"])
def test_a_replay_window_must_be_a_positive_number_of_seconds(folder, window):
    # Zero had been taken as "automatic", silently (docs: seconds of log per step).
    with pytest.raises(InputError) as exc:
        replay_run.run(str(folder / "run.h5"), out=str(folder / "w.track.h5"), window_s=window)
    assert exc.value.field == "window_s"
    assert not (folder / "w.track.h5").exists()


def test_replay_of_no_log_is_refused():
    with pytest.raises(InputError) as exc:
        replay_run.run([])
    assert exc.value.field == "log"


def test_a_library_argument_is_named_by_its_option_on_the_command_line(folder, capsys):
    # plot_track refuses max_points=3 naming its argument; the command names its option.
    track = folder / "run.track.h5"
    replay_run.run(str(folder / "run.h5"), out=str(track))
    code, _out, err = _cli(capsys, ["plot", track, "-o", folder / "f.png", "--max-points", "3"])
    assert code == 2 and err == ["rangefuse plot: error: --max-points: must be at least 16, "
                                 "got 3"]
    # and plot takes the figure formats every other command's --plot takes
    code, _out, err = _cli(capsys, ["plot", track, "-o", folder / "f.gif"])
    assert code == 2 and "cannot tell the figure format" in err[0]
    assert not (folder / "f.png").exists() and not (folder / "f.gif").exists()


def test_an_interrupt_between_two_renames_waits_until_all_outputs_are_in_place(
        folder, capsys, monkeypatch):
    # A signal mask holds the main thread only: a Ctrl-C taken by one of numpy's worker
    # threads still runs the handler in the main thread, here between the first rename
    # and the next. The outputs must still appear together, and the line must say so.
    import replay._io as io
    real = os.replace
    calls = []

    def replace_then_ctrl_c(src, dst):
        real(src, dst)
        calls.append(dst)
        if len(calls) == 1:
            signal.getsignal(signal.SIGINT)(signal.SIGINT, None)  # the handler runs now

    monkeypatch.setattr(io.os, "replace", replace_then_ctrl_c)
    code, _out, err = _cli(capsys, _replay_all(folder))
    assert len(calls) == 4  # track file, two CSV files, figure
    assert code == 130 and err == ["rangefuse replay: interrupted; after its outputs were "
                                   "written"]
    assert _listing(folder) == ["big.decisions.csv", "big.png", "big.track.csv",
                                "big.track.h5", "run.h5"]


def test_an_output_name_too_long_for_its_temporary_file_is_refused_before_work(folder, capsys):
    # The file is written beside its target under a longer hidden name; a name that fits
    # the folder but leaves that one too long used to fail only after the replay.
    long = folder / ("a" * 245 + ".h5")
    code, _out, err = _cli(capsys, ["replay", folder / "run.h5", "-o", long])
    assert code == 2 and len(err) == 1 and "the file name is 248 bytes long" in err[0], err
    assert _listing(folder) == ["run.h5"]


def test_an_interrupted_demo_leaves_no_folder_behind(tmp_path, capsys, monkeypatch):
    # The demo makes its output folder; stopped before it ends, it removes it again with
    # the files that would have gone in.
    monkeypatch.setattr(plots, "plot_diagnostics", lambda *a, **k: (_ for _ in ()).throw(
        KeyboardInterrupt()))
    out = tmp_path / "demo-out"
    code, _out, err = _cli(capsys, ["demo", "--out", out])
    assert code == 130 and err == ["rangefuse demo: interrupted; no partial output was kept"]
    assert not out.exists()
    (tmp_path / "afile").write_text("x")
    code, _out, err = _cli(capsys, ["demo", "--out", tmp_path / "afile"])
    assert code == 2 and err[0].endswith("--out: is a file; expected a folder"), err
