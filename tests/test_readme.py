"""The README's library example runs as printed and fuses both readings.

The raw values in it were made from the cold-store-dock rig for a target at 0.30 m
(pulse width from the echo ranger's encoder at 4 degC, counts from the IR curve); the
check is that decoding and fusing them lands back at 0.30 m (a round trip through our
own models, not an outside reference)."""
from __future__ import annotations

import contextlib
import io
import os
import re

ROOT = os.path.join(os.path.dirname(__file__), "..")


def test_library_example_runs_and_accepts_both_readings(monkeypatch):
    text = open(os.path.join(ROOT, "README.md"), encoding="utf-8").read()
    code = re.search(r"```python\n(.*?)```", text, re.S).group(1)
    monkeypatch.chdir(ROOT)
    ns = {}
    with contextlib.redirect_stdout(io.StringIO()) as out:
        exec(compile(code, "README.md", "exec"), ns)
    assert out.getvalue().split()[0] == "accepted"
    assert abs(ns["est"].range_m - 0.30) < 0.005
    assert ns["dec"].reason == "accepted"
