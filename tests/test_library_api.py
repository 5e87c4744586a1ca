"""The library used from code: misuse says what is wrong (one project exception naming
the field), and what a user hands over is used, not silently dropped."""
from __future__ import annotations

import os

import numpy as np
import pytest

from fusion import make_fuser
from fusion.errors import ConfigError, InputError
from fusion.fuser import Fuser
from fusion.rig import Rig
from fusion.sensors.air import echo_time
from replay.run import run

ECHO = {"name": "echo", "kind": "echo", "direction": "front", "output": "echo_time",
        "tick_s": 0.0, "min_range_m": 0.03, "max_range_m": 4.0, "sigma_m": 0.003,
        "sigma_frac": 0.0}


def test_pushed_air_is_used_when_the_rig_names_no_stream():
    # c(0 degC) against c(20 degC): 3.5 % of range (ideal gas; common practice, no source)
    rig = Rig.from_dict({"sensor": [ECHO]})
    f = Fuser(rig)
    f.push_air(0.0, 0.0)
    b = f.process({"echo": (np.array([1.0]), np.array([echo_time(0.5, 0.0)]))})
    assert b.temp_c[0] == 0.0
    assert abs(b.z_m[0, 0] - 0.5) < 1e-6


def test_a_sensor_without_a_direction_is_refused():
    d = dict(ECHO)
    del d["direction"]
    with pytest.raises(ConfigError, match="direction"):
        Rig.from_dict({"sensor": [d]})


def test_rig_replace_checks_what_it_is_given():
    rig = Rig.from_dict({"sensor": [ECHO]})
    with pytest.raises(ConfigError, match="accel_psd"):
        rig.replace(estimator={"accel_psd": -5.0})
    with pytest.raises(ConfigError, match="schedule.order"):
        rig.replace(schedule={"order": ["nope"]})
    with pytest.raises(ConfigError, match="key must be the sensor's name"):
        rig.replace(sensors={"other": rig.sensors["echo"]})
    # a dict changes only the keys it names; a new direction comes with its sensor
    r2 = rig.replace(estimator={"kind": "particle"})
    assert r2.estimator.kind == "particle" and r2.estimator.accel_psd == rig.estimator.accel_psd
    from dataclasses import replace
    r3 = rig.replace(sensors={"echo": replace(rig.sensors["echo"], direction="left")})
    assert r3.directions == ("front", "left")
    assert type(make_fuser(r2)).__name__ == "ParticleFuser"


def test_misuse_of_the_fuser_names_the_field():
    f = Fuser(Rig.from_dict({"sensor": [ECHO]}))
    with pytest.raises(InputError, match="no direction 'Front'"):
        f.estimate("Front")
    with pytest.raises(InputError, match="push_air"):
        f.push_air([0.0, 1.0], [20.0])
    with pytest.raises(InputError, match="readings"):
        f.process([(0.0, 0.001)])
    with pytest.raises(InputError, match="t_s, raw"):
        f.process({"echo": (np.zeros(1),)})
    with pytest.raises(InputError, match="environment"):
        f.process({"echo": (np.zeros(1), np.zeros(1))}, environment={"temp": (0, 20)})


def test_replay_result_names_a_bad_direction_and_an_unsmoothed_run():
    res = run(os.path.join(os.path.dirname(__file__), "..", "datasets", "shelf-pass.h5"))
    with pytest.raises(InputError, match="no direction 'Front'"):
        res.errors("Front")
    with pytest.raises(InputError, match="not smoothed"):
        res.errors("front", smoothed=True)
    assert res.errors("front")["all"]["n"] > 0


def test_one_stray_far_future_stamp_does_not_wipe_the_air_history():
    e2 = dict(ECHO, name="echo2")
    rig = Rig.from_dict({"air": {"stream": "air"}, "sensor": [ECHO, e2]})
    f = Fuser(rig)
    f.push_air(np.arange(0.0, 400.0), np.full(400, 5.0))
    raw = np.array([echo_time(1.0, 5.0)])
    for name, t in (("echo", 10.0), ("echo", 1e6), ("echo2", 10.05)):
        b = f.process({name: (np.array([t]), raw)})
    assert b.temp_c[0] == 5.0 and b.flags[0] == 0


def test_rig_checks_directions_and_names():
    rig = Rig.from_dict({"sensor": [ECHO]})
    for kw in ({"directions": ()}, {"directions": ("front", "front")}, {"name": None}):
        with pytest.raises(ConfigError):
            rig.replace(**kw)
    with pytest.raises(ConfigError, match="named twice"):
        Rig.from_dict({"direction": [{"name": "front"}, {"name": "front"}],
                       "sensor": [ECHO]})


def test_the_summary_says_a_sensor_stopped_for_good(tmp_path):
    from replay.logfile import SensorStream, open_log, write_log
    src = os.path.join(os.path.dirname(__file__), "..", "datasets", "cold-store-dock.h5")
    with open_log(src) as log:
        streams = []
        for n in log.sensors:
            s = log.read_sensor(n)
            keep = s.t_s < 80.0 if n == "echo_front" else np.ones(len(s), bool)
            streams.append(SensorStream(n, s.kind, s.output, s.t_s[keep], s.raw[keep],
                                        None if s.ping_t_s is None else s.ping_t_s[keep]))
        env = {e: ("air_temperature", *log.environment(e)) for e in log.environments}
        rig_toml = log.rig_toml
    path = tmp_path / "stops.h5"
    write_log(path, rig_toml, streams, env, None)
    text = run(path, out=tmp_path / "stops.track.h5").summary()
    assert "echo_front was silent from 80.0 s to the end of the log (70.0 s)" in text
