"""The example inputs in datasets/examples are what `replay.examples` writes, and the
commands they are for work on them: `import` keeps every row and the readings, and
`calibrate` recovers the curve the readings were made from (round trips through our own
models; the figures checked are the rig's, not outside references)."""
from __future__ import annotations

import os

import numpy as np

from fusion.rig import Rig
from replay.cli import main
from replay.examples import EXAMPLES, write_examples
from replay.logfile import open_log

DATA = os.path.join(os.path.dirname(__file__), "..", "datasets")
EX = os.path.join(DATA, "examples")


def test_the_bundled_examples_are_what_the_generator_writes(tmp_path):
    write_examples(tmp_path)
    for name in EXAMPLES:
        with open(os.path.join(EX, name), "rb") as a, open(tmp_path / name, "rb") as b:
            assert a.read() == b.read(), name


def test_import_keeps_every_reading_of_the_source_log(tmp_path, capsys):
    out = tmp_path / "dock.h5"
    assert main(["import", os.path.join(EX, "dock-approach.csv"), "--rig",
                 os.path.join(EX, "dock-approach.rig.toml"), "-o", str(out)]) == 0
    assert ", 0 reported" in capsys.readouterr().out
    with open_log(out) as got, open_log(os.path.join(DATA, "cold-store-dock.h5")) as src:
        for name in src.sensors:
            a, b = got.read_sensor(name), src.read_sensor(name)
            m = (b.t_s >= 40.0) & (b.t_s < 55.0)
            assert np.array_equal(a.t_s, b.t_s[m])
            assert np.array_equal(np.asarray(a.raw, float), np.asarray(b.raw, float)[m])


def test_calibrate_recovers_the_curve_the_pairs_came_from(tmp_path, capsys):
    out = tmp_path / "curve.toml"
    assert main(["calibrate", os.path.join(EX, "ir-front.pairs.csv"), "-o", str(out)]) == 0
    rig = Rig.load(os.path.join(EX, "dock-approach.rig.toml"))
    truth = rig.sensors["ir_front"].curve
    text = open(os.path.join(EX, "dock-approach.rig.toml"), encoding="utf-8").read()
    fitted_text = open(out, encoding="utf-8").read()
    # paste the fitted [curve] into the rig as [sensor.curve] of the IR ranger (the
    # calibrate help's own instruction) and compare ranges across the span
    block = "\n" + fitted_text.split("\n[curve]\n", 1)[1].split("\n[", 1)[0]
    start = text.index("[sensor.curve]")
    end = text.index("\n[", start + 1)
    fitted = Rig.from_toml(text[:start] + "[sensor.curve]" + block + text[end:])
    fc = fitted.sensors["ir_front"].curve
    r = np.linspace(max(truth.peak_range_m, fc.peak_range_m) + 0.03, 0.75, 20)
    far_fit = np.array([fc.ranges(float(truth.volts(x)))[1] for x in r])
    assert np.max(np.abs(far_fit - r)) < 0.01  # within a centimetre on the far side
