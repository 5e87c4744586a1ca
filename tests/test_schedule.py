"""``rangefuse schedule``: a round-robin firing cycle for a rig's echo rangers."""
import math
import os
import re

import pytest

from fusion.rig import Rig
from replay.cli import main
from replay.schedule import firing_plan

DATASETS = os.path.join(os.path.dirname(__file__), "..", "datasets")
SHELF = os.path.join(DATASETS, "shelf-pass.rig.toml")      # two echo rangers
DOCK = os.path.join(DATASETS, "cold-store-dock.rig.toml")  # one echo ranger


def _sound_mps(temp_c):
    # Speed of sound in dry air, c = 331.3 sqrt(1 + T / 273.15) m/s (ideal gas; common
    # practice, no source).
    return 331.3 * math.sqrt(1.0 + temp_c / 273.15)


def test_slot_is_the_echo_window_of_the_farthest_unit():
    # A unit may fire once the previous one's echo window has closed: ring-down plus the
    # round trip to the farthest range at the slowest sound, with the margin on top.
    rig = Rig.load(SHELF)
    plan = firing_plan(rig, temp_min_c=-20.0, margin=1.1)
    far = max(rig.sensors[n].max_range_m for n in rig.echo_names)
    expected = 1.1 * (rig.schedule.ring_down_s + 2.0 * far / _sound_mps(-20.0))
    assert plan["slot_s"] == pytest.approx(expected, rel=2e-3)
    # Two units: a full round is two slots, and each unit reads once per round.
    assert [n for n, _ in plan["order"]] == list(rig.echo_names)
    assert plan["round_s"] == pytest.approx(2 * plan["slot_s"], rel=1e-12)
    assert plan["rate_hz"] == pytest.approx(1.0 / plan["round_s"], rel=1e-12)
    assert [off for _, off in plan["order"]] == pytest.approx([0.0, plan["slot_s"]])


def _printed_schedule(text):
    return text.split("rig TOML:\n", 1)[1]


def test_printed_cycle_s_is_the_time_between_pings(tmp_path, capsys):
    # docs/rig.md: [schedule] cycle_s is the time between consecutive pings, i.e. one
    # slot, not the full round.
    assert main(["schedule", SHELF, "--temp-min", "-20"]) == 0
    out = capsys.readouterr().out
    assert "round robin for 2 echo rangers" in out
    plan = firing_plan(Rig.load(SHELF), temp_min_c=-20.0)
    cycle = float(re.search(r"cycle_s = ([0-9.]+)", out).group(1))
    assert plan["slot_s"] <= cycle < plan["slot_s"] + 1e-6   # rounded up, never below
    assert "time between consecutive pings" in out
    # The printed table pastes into the rig and loads, with that cycle.
    rig_text = open(SHELF, encoding="utf-8").read().replace('[schedule]\nmode = "free"\n',
                                                            _printed_schedule(out))
    path = tmp_path / "scheduled.rig.toml"
    path.write_text(rig_text)
    rig = Rig.load(path)
    assert rig.schedule.mode == "round_robin" and rig.schedule.cycle_s == cycle
    assert list(rig.schedule.order) == ["echo_front", "echo_left"]


def test_one_echo_ranger_is_named_in_the_singular(capsys):
    assert main(["schedule", DOCK]) == 0
    out = capsys.readouterr().out
    assert "round robin for 1 echo ranger " in out and "1 echo rangers" not in out


def test_help_explains_cycle_s_and_carries_the_caution(capsys):
    with pytest.raises(SystemExit) as stop:
        main(["schedule", "--help"])
    assert stop.value.code == 0
    text = capsys.readouterr().out
    assert "time between consecutive" in text and "example:" in text
    assert "Fused ranges are not a safety-rated protective function: do not rely on them" in " ".join(text.split())
