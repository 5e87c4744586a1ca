"""The ``rangefuse calibrate`` command end to end, its CSV reader, atomic writes and TOML."""
from __future__ import annotations

import math
import os

import numpy as np
import pytest

from fusion._toml import dumps, load, loads
from fusion.errors import ConfigError, InputError
from fusion.sensors.adc import volts_to_counts
from fusion.sensors.triangulation import TriangulationCurve, fit_report
from replay.calibrate import read_pairs, write_atomic
from replay.cli import main

TYPICAL = TriangulationCurve.typical_10_80()


def _pairs(n=24, seed=7, sigma=0.01):
    rng = np.random.default_rng(seed)
    r = np.round(np.linspace(0.04, 0.80, n), 4)
    v = np.round(TYPICAL.volts(r) + rng.normal(0.0, sigma, n), 4)
    return r, v


def _write_csv(path, header, rows):
    path.write_text(",".join(header) + "\n" + "".join(",".join(map(str, row)) + "\n" for row in rows))
    return path


@pytest.fixture
def pairs_csv(tmp_path):
    r, v = _pairs()
    return _write_csv(tmp_path / "pairs.csv", ["range_m", "volts", "note"],
                      [(a, b, "bench") for a, b in zip(r, v)])


def _one_error_line(capsys):
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    return err[0]


def test_calibrate_end_to_end_writes_a_curve_that_loads_back_equal(pairs_csv, tmp_path, capsys):
    out, fig = tmp_path / "curve.toml", tmp_path / "fit.png"
    assert main(["calibrate", str(pairs_csv), "-o", str(out), "--plot", str(fig)]) == 0
    printed = capsys.readouterr().out
    for word in ("chosen model", "saturating-inverse", "table", "AIC", "+/-", "peak",
                 "residual_V", "measured_V"):
        assert word in printed
    doc = load(out)
    curve = TriangulationCurve.from_dict(doc["curve"], where=str(out))
    r, v = _pairs()
    # The file trims float noise (at most 1e-12 relative, fusion._toml), so compare the
    # written values with the fit's to that tolerance.
    _assert_close_1e12(doc["curve"], fit_report(r, v).curve.to_dict())
    assert "[sensor.curve]" in printed and "[sensor.curve]" in out.read_text()
    assert doc["calibration"]["pairs"] == len(r)
    # The fitted unit still reads the typical unit's check values (common practice, no source).
    _, far = curve.ranges(1.5)
    assert far == pytest.approx(0.40, abs=0.01)
    assert fig.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["curve.toml", "fit.png", "pairs.csv"]


def test_calibrate_decodes_adc_counts(tmp_path, capsys):
    r, v = _pairs()
    counts = volts_to_counts(v, 10, 5.0)
    src = _write_csv(tmp_path / "counts.csv", ["range_m", "counts"], zip(r, counts))
    out = tmp_path / "c.toml"
    assert main(["calibrate", str(src), "-o", str(out), "--bits", "10", "--vref", "5"]) == 0
    assert "ADC quantisation" in capsys.readouterr().out
    curve = TriangulationCurve.from_dict(load(out)["curve"])
    # 10 bits on 5 V is a 4.9 mV step, below the 10 mV noise: the far side hardly moves.
    _, far = curve.ranges(TYPICAL.volts(0.5))
    assert far == pytest.approx(0.5, abs=0.01)


def test_calibrate_table_model_on_request(pairs_csv, tmp_path):
    out = tmp_path / "t.toml"
    assert main(["calibrate", str(pairs_csv), "-o", str(out), "--model", "table"]) == 0
    curve = TriangulationCurve.from_dict(load(out)["curve"])
    assert curve.model == "table" and len(curve.table_range_m) >= 4


@pytest.mark.parametrize("header, rows, extra, needles", [
    (["range_m", "volts"], [(0.1, 2.3), (0.2, "abc")], [], ["volts", "row 3", "abc"]),
    (["range_m", "volts"], [(0.1, 2.3), (0.2,)], [], ["row 3", "cell"]),
    (["distance", "volts"], [(0.1, 2.3)], [], ["range_m", "row 1"]),
    (["range_m", "volts", "counts"], [(0.1, 2.3, 400)], [], ["both volts and counts"]),
    (["range_m", "counts"], [(0.1, 400)], [], ["--bits and --vref"]),
    (["range_m", "counts"], [(0.1, 400), (0.2, 1500)], ["--bits", "10", "--vref", "5"],
     ["counts", "row 3", "0..1023"]),
    (["range_m", "volts"], [(0.1, 2.3), (0.2, 2.5), (0.3, 2.0)], [], ["at least 6"]),
    (["range_m", "volts"], [(0.05 * (i + 1), 2.0 + 0.01 * i) for i in range(8)], [],
     ["near side"]),
    (["range_m", "volts"], [(0.05 * (i + 1), 1.0) for i in range(7)] + [(-0.4, 1.0)], [],
     ["negative", "row 9"]),
    # more values than the header names: a shifted column would be fitted silently
    (["range_m", "volts"], [(0.1, 2.3, 7), (0.2, 2.5)], [], ["row 2", "header names 2"]),
    # an analog ranger's output stays inside its supply (common practice, no source)
    (["range_m", "volts"], [(0.1, 2.3), (0.2, 1e6)], [], ["volts", "row 3", "no ranger output"]),
])
def test_bad_input_exits_2_with_one_line(tmp_path, capsys, header, rows, extra, needles):
    src = _write_csv(tmp_path / "bad.csv", header, rows)
    out = tmp_path / "out.toml"
    assert main(["calibrate", str(src), "-o", str(out)] + extra) == 2
    line = _one_error_line(capsys)
    assert line.startswith("rangefuse calibrate: error: ")
    assert str(src) in line
    for needle in needles:
        assert needle in line
    assert not out.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.csv"]


def test_refuses_to_write_over_the_input(pairs_csv, capsys):
    before = pairs_csv.read_bytes()
    assert main(["calibrate", str(pairs_csv), "-o", str(pairs_csv)]) == 2
    assert "input" in _one_error_line(capsys)
    assert pairs_csv.read_bytes() == before


def test_missing_file_and_bad_figure_name(tmp_path, pairs_csv, capsys):
    assert main(["calibrate", str(tmp_path / "nope.csv"), "-o", str(tmp_path / "o.toml")]) == 2
    assert "nope.csv" in _one_error_line(capsys)
    assert main(["calibrate", str(pairs_csv), "-o", str(tmp_path / "o.toml"),
                 "--plot", str(tmp_path / "fig.xyz")]) == 2
    assert "fig.xyz" in _one_error_line(capsys)
    assert not (tmp_path / "o.toml").exists()


def test_help_shows_an_example(capsys):
    with pytest.raises(SystemExit) as stop:
        main(["calibrate", "--help"])
    assert stop.value.code == 0
    text = capsys.readouterr().out
    assert "example:" in text and "rangefuse calibrate " in text and "--bits 10" in text
    assert "[sensor.curve]" in text
    assert "Fused ranges are not a safety-rated protective function: do not rely on them" in " ".join(text.split())


def test_read_pairs_skips_blank_lines_and_reports_rows(tmp_path):
    src = tmp_path / "p.csv"
    src.write_text(" range_m , volts\n0.1,2.3\n\n0.2, 2.5\n")
    r, v, kind, rows = read_pairs(str(src))
    np.testing.assert_array_equal(r, [0.1, 0.2])
    np.testing.assert_array_equal(v, [2.3, 2.5])
    assert kind == "volts" and rows.tolist() == [2, 4]


def test_write_atomic_replaces_whole_files_and_leaves_no_temporary(tmp_path):
    target = tmp_path / "a.toml"
    target.write_text("old")
    write_atomic(str(target), "new text")
    assert target.read_text() == "new text"
    assert os.listdir(tmp_path) == ["a.toml"]
    with pytest.raises(InputError):
        write_atomic(str(tmp_path / "missing" / "b.toml"), "x")


# ------------------------------------------------------------------ TOML

def test_toml_dumps_reads_back_exactly():
    # Floats are written with repr, the shortest string that reads back to the same double
    # (Python's float repr, Steele & White 1990 / Gay 1990), so a round trip is exact.
    data = {"name": 'a "quoted"\tname', "flag": True, "n": 3,
            "x": [0.1, 1e-300, 2.5e16, -0.0, math.inf],
            "curve": {"p": 1.90063, "m": [[1.0 / 3, 2.0 / 3], [0.5, 0.25]], "deeper": {"k": 1}},
            "sensor": [{"id": "left", "w": 1.0}, {"id": "right", "w": 2.0}],
            "odd key": 1}
    back = loads(dumps(data))
    assert back == data
    assert math.isnan(loads(dumps({"v": math.nan}))["v"])


def _assert_close_1e12(got, want, where="curve"):
    """Same keys and strings; numbers (nested lists too) equal within 1e-12 relative."""
    if isinstance(want, dict):
        assert set(got) == set(want), where
        for k in want:
            _assert_close_1e12(got[k], want[k], f"{where}.{k}")
    elif isinstance(want, (list, tuple)):
        assert len(got) == len(want), where
        for i, (g, w) in enumerate(zip(got, want)):
            _assert_close_1e12(g, w, f"{where}[{i}]")
    elif isinstance(want, float):
        assert (math.isnan(got) and math.isnan(want)) or \
            abs(got - want) <= 1e-12 * abs(want), (where, got, want)
    else:
        assert got == want, where


def test_trimmed_toml_writes_short_decimals_and_reads_back_within_1e12():
    # Binary floating point cannot hold most decimals: 0.1 + 0.2 is 0.30000000000000004
    # and the mean of three 0.05 is 0.05000000000000001 (IEEE 754 double, round to
    # nearest; D. Goldberg, "What every computer scientist should know about
    # floating-point arithmetic", ACM Computing Surveys 23(1), 1991). The trimmed writer
    # writes these as the decimals they stand for.
    noisy = {"a": 0.1 + 0.2, "b": (0.05 + 0.05 + 0.05) / 3, "c": 0.7 - 0.5,
             "d": [0.7 * 0.5, 4.5 / 3 * 2, 1e-5 * 3], "e": 1200.0 + 2.3e-13}
    text = dumps(noisy, trim_float_noise=True)
    for short in ("a = 0.3\n", "b = 0.05\n", "c = 0.2\n", "[0.35, 3.0, 3e-05]", "e = 1200.0\n"):
        assert short in text, text
    _assert_close_1e12(loads(text), noisy, "doc")
    # Values whose digits all carry information keep their exact repr: a fitted curve
    # (17-digit parameters, covariance, AIC) and values of repeating decimals.
    fitted = fit_report(*_pairs()).curve.to_dict()
    exact = {"third": 1.0 / 3, "r": 0.745 / 12, "v": 1.2023333333333335, "big": 2.0 ** 0.5 * 1e300,
             "tiny": 5e-324, "neg": -0.0, "inf": math.inf, "curve": fitted}
    back = loads(dumps(exact, trim_float_noise=True))
    assert back == exact
    # Whatever the value, a trimmed file reads back within 1e-12 relative.
    rng = np.random.default_rng(11)
    values = np.concatenate([rng.normal(0, 1, 500) * 10.0 ** rng.integers(-12, 12, 500),
                             np.round(rng.uniform(0, 5, 500), 3) * (1 + 2.2e-16)])
    got = loads(dumps({"x": values.tolist()}, trim_float_noise=True))["x"]
    np.testing.assert_allclose(got, values, rtol=1e-12, atol=0)
    # The default writer stays exact, bit for bit.
    assert loads(dumps(noisy)) == noisy


def test_calibrated_curve_pastes_into_a_rig_as_sensor_curve(pairs_csv, tmp_path, capsys):
    # docs/rig.md ("Curves"): a rig carries an IR ranger's curve as [sensor.curve].
    from fusion.rig import Rig
    for model in ("saturating-inverse", "table"):
        out = tmp_path / f"{model}.toml"
        assert main(["calibrate", str(pairs_csv), "-o", str(out), "--model", model]) == 0
        printed = capsys.readouterr().out
        assert "[sensor.curve]" in printed
        text = out.read_text()
        curve_table = text.split("[curve]\n", 1)[1].split("\n[calibration]", 1)[0]
        rig = Rig.from_toml('name = "bench"\n\n[[sensor]]\nname = "ir_left"\n'
                            'kind = "triangulation"\ndirection = "left"\noutput = "volts"\n'
                            "[sensor.curve]\n" + curve_table, where=str(out))
        assert rig.sensors["ir_left"].curve == TriangulationCurve.from_dict(load(out)["curve"])
        assert rig.sensors["ir_left"].curve.model == model


def test_toml_syntax_error_names_file_and_line():
    with pytest.raises(ConfigError) as err:
        loads('[curve]\nmodel = "table"\nrange_m = [0.1, 0.2\n', "left.toml")
    assert err.value.file == "left.toml" and err.value.row in (3, 4)
    with pytest.raises(ConfigError) as err:
        loads("a = 1\nb = = 2\n", "x.toml")
    assert err.value.row == 2 and "x.toml" in str(err.value)


def test_a_span_from_the_command_line_is_named_by_its_option(pairs_csv, tmp_path, capsys):
    out = tmp_path / "c.toml"
    assert main(["calibrate", str(pairs_csv), "-o", str(out), "--min-range", "0.5",
                 "--max-range", "0.2"]) == 2
    line = _one_error_line(capsys)
    assert "--max-range" in line and "0.5 and 0.2" in line
    assert not out.exists()


def test_a_span_past_the_pairs_is_said_to_be_extrapolated():
    # Readings inside the valid span are trusted; past the farthest pair the curve is the
    # model's guess, so a span stretched far beyond it is reported (no source: what a
    # calibration is).
    r, v = _pairs()
    far = fit_report(r, v, max_range_m=8.0)
    assert any("extrapolated" in w and "0.8 m" in w for w in far.warnings)
    near = fit_report(r, v)
    assert not any("past" in w and "extrapolated" in w for w in near.warnings)


def test_only_an_option_given_is_blamed(pairs_csv, tmp_path, capsys):
    # --min-range alone past the farthest pair: the span's end came from the pairs, so
    # the line names the option the user gave, not one they did not.
    out = tmp_path / "c.toml"
    assert main(["calibrate", str(pairs_csv), "-o", str(out), "--min-range", "5"]) == 2
    line = _one_error_line(capsys)
    assert "--min-range" in line and "--max-range" not in line
