"""``rangefuse import``: CSV text logs into log files, bad rows reported by line number.

CSV quoting follows RFC 4180 ("Common Format and MIME Type for CSV Files", 2005, sec. 2
rules 5-7), which Python's csv module implements: a quoted field may hold commas and
line breaks. Line-number reporting and "keep the good rows" are this project's rules
(docs/log-format.md), common practice, no source.
"""
import numpy as np
import pytest

from replay.cli import main
from replay.logfile import open_log
from tests.test_check import RIG_TOML

WHEN = "2024-05-01T12:00:00+00:00"

GOOD = (
    "t_s,sensor,raw,ping_t_s\n"
    "0.00,ir_front,1.00,\n"
    "0.02,ir_front,1.01,\n"
    "0.05,echo_front,0.0050,0.044\n"
    "0.10,echo_front,0.0051,\n"
    "0.10,echo_serial,R1000\\r,\n"          # backslash + r: kept as two characters
    '0.20,echo_serial,"R1001\r",\n'         # a real carriage return, quoted
    '0.30,echo_serial,"R10,02",\n'          # a comma inside a quoted frame
    "0.00,air,21.5,\n"
    "5.00,air,22.0,\n"
    "0.00,rh,0.45,\n"
    "0.00,truth.front,0.50,\n"
)


@pytest.fixture
def rig(tmp_path):
    path = tmp_path / "bench.rig.toml"
    path.write_text(RIG_TOML)
    return str(path)


def _csv(tmp_path, text, name="run.csv"):
    path = tmp_path / name
    path.write_bytes(text.encode("utf-8"))
    return str(path)


def _run(capsys, argv):
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err.strip().splitlines()


def test_good_csv_round_trips(tmp_path, rig, capsys):
    csv_path = _csv(tmp_path, GOOD)
    out_path = str(tmp_path / "run.h5")
    code, out, err = _run(capsys, ["import", csv_path, "--rig", rig, "-o", out_path,
                                   "--created-utc", WHEN, "--clock", "s since boot"])
    assert code == 0, err
    assert err == []
    assert "read 11 rows: 11 stored, 0 reported" in out
    with open_log(out_path) as log:
        assert log.rig_toml == RIG_TOML                       # the rig text, as written
        assert log.clock == "s since boot"
        ir = log.read_sensor("ir_front")
        np.testing.assert_array_equal(ir.t_s, [0.0, 0.02])
        np.testing.assert_array_equal(ir.raw, [1.0, 1.01])
        assert ir.ping_t_s is None
        echo = log.read_sensor("echo_front")
        np.testing.assert_array_equal(echo.raw, [0.0050, 0.0051])
        np.testing.assert_array_equal(echo.ping_t_s, [0.044, np.nan])
        assert list(log.read_sensor("echo_serial").raw) == ["R1000\\r", "R1001\r", "R10,02"]
        np.testing.assert_array_equal(log.environment("air")[1], [21.5, 22.0])
        assert log.environments["rh"].quantity == "relative_humidity"
        np.testing.assert_array_equal(log.truth("front")[1], [0.5])
    # The checker then flags the two frames the unit cannot have sent: the literal
    # backslash-r and the comma do not match the default frame pattern R<digits>[CR].
    code, out, err = _run(capsys, ["check", out_path])
    assert code == 2
    assert len(err) == 1
    assert f"{out_path}, /sensors/echo_serial/raw, row 0: 2 rows that the rig decodes" in err[0]


def test_three_column_header(tmp_path, rig, capsys):
    csv_path = _csv(tmp_path, "t_s,sensor,raw\n0.0,ir_front,1.0\n0.1,ir_front,1.1\n")
    code, out, _ = _run(capsys, ["import", csv_path, "--rig", rig, "-o", str(tmp_path / "a.h5")])
    assert code == 0
    assert "read 2 rows: 2 stored, 0 reported" in out
    # the rig's other units got no row: perhaps it is another robot's rig
    assert "note: no rows for the rig's echo_front, echo_serial" in out
    code, out, _ = _run(capsys, ["import", _csv(tmp_path, GOOD, "all.csv"), "--rig", rig,
                                 "-o", str(tmp_path / "b.h5")])
    assert code == 0 and "note:" not in out


BAD = (
    "t_s,sensor,raw,ping_t_s\n"            # 1
    "0.00,ir_front,1.00,\n"                # 2 good
    "0.02,ir_front,1.01\n"                 # 3 missing field
    "0.04,ir_front,1.02,,\n"               # 4 extra field
    "abc,ir_front,1.0,\n"                  # 5 t_s not a number
    "0.06,ir_front,volts,\n"               # 6 raw not a number
    "0.08,ir_rear,1.0,\n"                  # 7 unknown sensor
    "0.10,ir_front,1.0,0.09\n"             # 8 ping time on an IR ranger
    "\n"                                   # 9 blank: skipped, not a row
    "0.12,echo_front,0.005,x\n"            # 10 ping not a number
    "0.14,truth.rear,1.0,\n"               # 11 no such direction
    "0.16,echo_front,0.005,0.15\n"         # 12 good
)
BAD_ROWS = {3: "3 fields", 4: "5 fields", 5: "t_s", 6: "raw", 7: "unknown sensor 'ir_rear'",
            8: "ping_t_s", 10: "ping_t_s", 11: "unknown sensor 'truth.rear'"}


def _bad_lines(err, csv_path):
    rows = {}
    for line in err:
        if line.startswith("rangefuse import: bad row: "):
            rest = line[len("rangefuse import: bad row: "):]
            assert rest.startswith(csv_path + ", "), line
            row = int(rest.split("row ", 1)[1].split(":", 1)[0])
            rows[row] = rest
    return rows


def test_bad_rows_are_reported_and_good_rows_kept(tmp_path, rig, capsys):
    csv_path = _csv(tmp_path, BAD)
    out_path = str(tmp_path / "run.h5")
    code, out, err = _run(capsys, ["import", csv_path, "--rig", rig, "-o", out_path])
    assert code == 0
    rows = _bad_lines(err, csv_path)
    assert sorted(rows) == sorted(BAD_ROWS)
    for row, word in BAD_ROWS.items():
        assert word in rows[row], rows[row]
    assert "t_s, row 5: t_s is 'abc'; expected a number" in rows[5]
    assert "read 10 rows: 2 stored, 8 reported; 1 blank line skipped" in out
    with open_log(out_path) as log:
        assert log.sensors["ir_front"].n == 1 and log.sensors["echo_front"].n == 1
        np.testing.assert_array_equal(log.read_sensor("echo_front").ping_t_s, [0.15])


def test_strict_writes_nothing(tmp_path, rig, capsys):
    csv_path = _csv(tmp_path, BAD)
    out_path = tmp_path / "run.h5"
    code, out, err = _run(capsys, ["import", csv_path, "--rig", rig, "-o", str(out_path), "--strict"])
    assert code == 2
    assert sorted(_bad_lines(err, csv_path)) == sorted(BAD_ROWS)
    assert "nothing written" in err[-1]
    assert "read 10 rows: 2 good, 8 reported" in out
    assert not out_path.exists()
    assert [p.name for p in tmp_path.iterdir() if p.suffix == ".tmp"] == []


def test_nothing_readable_is_an_error(tmp_path, rig, capsys):
    csv_path = _csv(tmp_path, "t_s,sensor,raw\nx,ir_front,1\n")
    out_path = tmp_path / "run.h5"
    code, out, err = _run(capsys, ["import", csv_path, "--rig", rig, "-o", str(out_path)])
    assert code == 2
    assert sorted(_bad_lines(err, csv_path)) == [2]
    assert "no row could be stored" in err[-1]
    assert not out_path.exists()


def test_row_numbers_are_file_lines_across_quoted_line_breaks(tmp_path, rig, capsys):
    text = ("t_s,sensor,raw\n"
            '0.0,echo_serial,"R1000\n"\n'        # rows 2-3: one record
            "0.1,ir_front,?\n")                   # row 4
    csv_path = _csv(tmp_path, text)
    code, out, err = _run(capsys, ["import", csv_path, "--rig", rig, "-o", str(tmp_path / "a.h5")])
    assert code == 0
    assert sorted(_bad_lines(err, csv_path)) == [4]
    with open_log(tmp_path / "a.h5") as log:
        assert list(log.read_sensor("echo_serial").raw) == ["R1000\n"]


def test_max_report_limits_the_listing(tmp_path, rig, capsys):
    csv_path = _csv(tmp_path, BAD)
    code, out, err = _run(capsys, ["import", csv_path, "--rig", rig, "-o", str(tmp_path / "a.h5"),
                                   "--max-report", "2"])
    assert code == 0
    assert len(_bad_lines(err, csv_path)) == 2
    assert "6 more bad rows not shown" in err[-1]
    assert "8 reported" in out


@pytest.mark.parametrize("header", ["time,sensor,raw", "t_s,sensor", "t_s,raw,sensor", ""])
def test_wrong_header_is_one_line(tmp_path, rig, capsys, header):
    csv_path = _csv(tmp_path, header + ("\n" if header else "") + "0.0,ir_front,1.0\n"
                    if header else "")
    code, out, err = _run(capsys, ["import", csv_path, "--rig", rig, "-o", str(tmp_path / "a.h5")])
    assert code == 2
    assert len(err) == 1
    assert err[0].startswith(f"rangefuse import: error: {csv_path}"), err[0]
    assert "row 1:" in err[0] and "expected" in err[0]
    assert not (tmp_path / "a.h5").exists()


def test_never_writes_over_an_input(tmp_path, rig, capsys):
    csv_path = _csv(tmp_path, GOOD)
    for target in (csv_path, rig):
        before = open(target, "rb").read()
        code, out, err = _run(capsys, ["import", csv_path, "--rig", rig, "-o", target])
        assert code == 2
        assert len(err) == 1 and "one of the inputs" in err[0]
        assert open(target, "rb").read() == before


def test_not_utf8_is_one_line(tmp_path, rig, capsys):
    path = tmp_path / "latin.csv"
    path.write_bytes(b"t_s,sensor,raw\n0.0,echo_serial,\xe9t\xe9\n")
    code, out, err = _run(capsys, ["import", str(path), "--rig", rig, "-o", str(tmp_path / "a.h5")])
    assert code == 2
    assert len(err) == 1 and "not UTF-8" in err[0]


def test_help_has_an_example(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["import", "--help"])
    assert exc.value.code == 0
    assert "example:\n  rangefuse import" in capsys.readouterr().out
