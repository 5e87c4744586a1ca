"""docs/rig.md's layout example loads as written, and its tables name every key the
sensor models accept (so nothing a rig can say is undocumented)."""
from __future__ import annotations

import os
import re
from dataclasses import fields

from fusion.rig import EstimatorConfig, Rig
from fusion.sensors.echo import EchoRanger
from fusion.sensors.ir import TriangulationRanger

DOC = os.path.join(os.path.dirname(__file__), "..", "docs", "rig.md")


def _text():
    return open(DOC, encoding="utf-8").read()


def test_the_layout_example_loads():
    block = re.search(r"```toml\n(.*?)```", _text(), re.S).group(1)
    rig = Rig.from_toml(block, where="docs/rig.md")
    assert set(rig.sensors) == {"ir_front", "echo_front"}
    # the [estimator] block shows the defaults
    est = EstimatorConfig()
    for f in fields(EstimatorConfig):
        assert getattr(rig.estimator, f.name) == getattr(est, f.name), f.name


def test_every_sensor_key_is_documented():
    text = _text()
    for cls in (TriangulationRanger, EchoRanger):
        for f in fields(cls):
            if f.name in ("name", "kind", "direction"):
                continue
            assert f"`{f.name}`" in text, f"{cls.__name__}.{f.name} is not in docs/rig.md"
