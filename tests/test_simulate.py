"""The scenario simulator: physics against outside facts, schedules, faults, files.

Small inline scenarios (a few seconds each) keep the whole module fast.
"""
from __future__ import annotations

import argparse
import glob
import math
import os

import numpy as np
import pytest

from fusion import decisions as D
from fusion.errors import ConfigError
from fusion.rig import Rig
from replay.logfile import open_log
from replay.scenario import load_scenario, scenario_from_toml
from replay.simulate import (CROSSTALK, DROPOUT, GENUINE, GHOST, HELD, NO_TARGET, main,
                             register, simulate, write_simulated)

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
DATASETS = os.path.join(ROOT, "datasets")

# Ideal-gas speed of sound in dry air, c = sqrt(gamma R T / M), computed here on its own
# (gamma = 1.4, R = 8.314462618 J/(mol K), M = 0.028964 kg/mol; textbook physics).
def _c_ideal(temp_c):
    return math.sqrt(1.4 * 8.314462618 * (temp_c + 273.15) / 0.028964)


# A typical 10-80 cm IR triangulation ranger (the parameters of
# TriangulationCurve.typical_10_80: peak 2.70 V near 0.148 m, 1.50 V at 0.06 and 0.40 m).
TYPICAL_CURVE = """
[rig.sensor.curve]
model = "saturating-inverse"
A_vm = 0.70468
b_m = 0.069785
lam_m = 0.10868
p = 1.90063
offset_v = 0.0
min_range_m = 0.10
max_range_m = 0.80
"""


def _echo(name, output="echo_time", **keys):
    table = {"name": name, "kind": "echo", "direction": "front", "output": output,
             "min_range_m": 0.15, "max_range_m": 4.0, "sigma_m": 0.003, "sigma_frac": 0.0,
             "tick_s": 1e-7, "ping_logged": True}
    table.update(keys)
    lines = [f"{k} = {v!r}".replace("True", "true") if not isinstance(v, str) else f'{k} = "{v}"'
             for k, v in table.items()]
    return "\n[[rig.sensor]]\n" + "\n".join(lines) + "\n"


def _ir(name="ir", extra=""):
    return f"""
[[rig.sensor]]
name = "{name}"
kind = "triangulation"
direction = "front"
output = "counts"
adc_bits = 10
adc_vref = 5.0
volts_sigma = 0.002
hold_s = 0.04
{extra}
""" + TYPICAL_CURVE


def _scenario(body, sensors, mode="free", duration=10.0, seed=1, air=None, where="<test>"):
    air = air or "[air]\ntemp_c = 20.0\n"
    text = f"""name = "t"
duration_s = {duration}
seed = {seed}

[rig]
name = "test-rig"

[rig.schedule]
mode = "{mode}"

[[rig.direction]]
name = "front"
{sensors}
{air}
{body}
"""
    return scenario_from_toml(text, where=where)


def _decoded_range(run, name, temp_c, rh=0.0, power_up_temp_c=None):
    s = run.streams[name]
    sensor = run.scenario.rig.sensors[name]
    m = sensor.decode(s.raw, s.t_s, temp_c, 0.0, rh, power_up_temp_c=power_up_temp_c)
    return m.z_m[:, 0]


# --------------------------------------------------------------------------------------
# Echo physics
# --------------------------------------------------------------------------------------
def test_echo_time_follows_the_actual_air_temperature():
    air = "[air]\ntemp_c = [[0, 4.0], [5, 4.0], [5.2, 25.0], [10, 25.0]]\nrelative_humidity = 0.0\n"
    sc = _scenario('[[target]]\ndirection = "front"\nwaypoints = 1.0\n'
                   '[sensor.e]\nsigma_m = 0.0\nping_period_s = 0.05\n',
                   _echo("e"), air=air)
    run = simulate(sc)
    s = run.streams["e"]
    cold = s.raw[(s.ping_t_s < 4.9)]
    warm = s.raw[(s.ping_t_s > 5.3)]
    assert np.all(s.label == GENUINE)
    # Round trip 2 r / c(T) at the true temperature, to the timer tick (0.1 us).
    assert np.allclose(cold, 2.0 / _c_ideal(4.0), atol=1.5e-7)
    assert np.allclose(warm, 2.0 / _c_ideal(25.0), atol=1.5e-7)
    # A 21 degC rise shortens the echo time for a fixed range by about 3.5 %
    # (common practice, no source: c grows by about 0.6 m/s per degC).
    shortening = 1.0 - warm.mean() / cold.mean()
    assert 0.033 < shortening < 0.038


def test_humid_air_carries_sound_faster():
    # Water vapour is lighter than air: at 25 degC and 90 % relative humidity sound is
    # a few tenths of a percent faster than in dry air (Cramer 1993, J. Acoust. Soc. Am.
    # 93(5), Fig. of c against humidity; from memory).
    def echo(rh):
        air = f"[air]\ntemp_c = 25.0\nrelative_humidity = {rh}\n"
        sc = _scenario('[[target]]\ndirection = "front"\nwaypoints = 2.0\n'
                       '[sensor.e]\nsigma_m = 0.0\n', _echo("e"), air=air, duration=1.0)
        return simulate(sc).streams["e"].raw.mean()
    gain = echo(0.0) / echo(0.9) - 1.0
    assert 0.002 < gain < 0.008


def test_power_up_compensation_reports_short_after_the_air_warms():
    air = "[air]\ntemp_c = [[0, 4.0], [5, 4.0], [5.2, 25.0], [10, 25.0]]\n"
    sc = _scenario('[[target]]\ndirection = "front"\nwaypoints = 1.0\n[sensor.e]\nsigma_m = 0.0\n',
                   _echo("e", "pulse_width", compensation="power_up", seconds_per_m=0.0058,
                         tick_s=1e-6), air=air)
    run = simulate(sc)
    s = run.streams["e"]
    reported = s.raw / 0.0058
    cold, warm = reported[s.t_s < 4.9], reported[s.t_s > 5.3]
    q = 1e-6 / 0.0058  # one capture tick in reported metres
    # Powered up at 4 degC it keeps c(4 degC): right in the cold ...
    assert np.allclose(cold, 1.0, atol=q)
    # ... and short by c(4)/c(25) once the air is warm (ideal gas, dry air).
    assert np.allclose(warm, _c_ideal(4.0) / _c_ideal(25.0), atol=q)
    # Decoding with the actual temperature and the power-up temperature undoes it.
    temp = np.where(s.t_s < 5.0, 4.0, 25.0)
    assert np.allclose(_decoded_range(run, "e", temp, power_up_temp_c=4.0)[s.t_s > 5.3], 1.0,
                       atol=2 * q)


def test_blanking_zone_maximum_range_and_clutter():
    body = """
[[target]]
direction = "front"
waypoints = [[0, 0.10], [3.0, 0.10], [3.01, 5.0], [6.0, 5.0], [6.01, 2.0]]

[sensor.e]
sigma_m = 0.0
blank_behaviour = "dropout"

[sensor.r]
sigma_m = 0.0
blank_behaviour = "ring_down"

[[sensor.e.clutter]]
from_s = 7.0
to_s = 9.0
range_m = 0.6
"""
    sc = _scenario(body, _echo("e") + _echo("r"), mode="round_robin")
    run = simulate(sc)
    e, r = run.streams["e"], run.streams["r"]
    c = _c_ideal(20.0)
    inside = e.ping_t_s < 3.0
    # Inside the blanking zone there is no echo (0 = nothing timed), or the unit's
    # ring-down tail read as an echo at its minimum range.
    assert np.all(e.raw[inside] == 0) and np.all(e.label[inside] == DROPOUT)
    ri = r.ping_t_s < 3.0
    assert np.allclose(r.raw[ri], 2 * 0.15 / c, atol=2e-7) and np.all(r.label[ri] == DROPOUT)
    # Beyond the maximum range: nothing returns.
    far = (e.ping_t_s > 3.1) & (e.ping_t_s < 6.0)
    assert np.all(e.raw[far] == 0) and np.all(e.label[far] == NO_TARGET)
    # A nearer reflector inside the cone wins over the target at 2 m.
    cl = (e.ping_t_s >= 7.0) & (e.ping_t_s < 9.0)
    assert np.allclose(e.raw[cl], 2 * 0.6 / c, atol=2e-7) and np.all(e.label[cl] == GHOST)
    after = e.ping_t_s > 9.0
    assert np.allclose(e.raw[after], 2 * 2.0 / c, atol=2e-7)
    assert np.all(e.label[after] == GENUINE)


def test_every_output_style_decodes_back_to_the_truth():
    sensors = (_echo("t") + _echo("p", "pulse_width", compensation="fixed", tick_s=1e-6)
               + _echo("a", "analog", compensation="fixed", volts_per_m=1.0,
                       volts_step=0.0048828125)
               + _echo("s", "serial", compensation="self"))
    body = ('[[target]]\ndirection = "front"\ninterpolation = "smooth"\n'
            'waypoints = [[0, 0.4], [10, 3.0]]\n'
            '[[target.step]]\nfrom_s = 10.0\nto_s = 12.0\nrange_m = 6.0\n')
    run = simulate(_scenario(body, sensors, mode="round_robin", duration=12.0,
                             air="[air]\ntemp_c = 12.0\n"))
    for name, quantum in (("t", 343 * 1e-7 / 2), ("p", 1e-6 * 343.2 / 2), ("a", 0.0048828125),
                          ("s", 0.001)):
        s = run.streams[name]
        z = _decoded_range(run, name, 12.0)
        ping = s.ping_t_s
        truth = np.interp(ping, *run.truth["front"])
        ok = (s.label == GENUINE) & (ping < 9.99)  # clear of the truth's step at 10 s
        assert ok[ping < 9.99].mean() > 0.95
        # Nothing beyond the maximum range: every style says "no echo" its own way, and
        # the unit's decoder reads it as a dropout.
        gone = ping >= 10.0
        assert np.all(s.label[gone] == NO_TARGET)
        m = run.scenario.rig.sensors[name].decode(s.raw[gone], s.t_s[gone], 12.0, 0.0)
        assert np.all(m.code == D.DROPOUT), name
        # Range noise 3 mm (1 sigma) plus the style's quantum.
        assert np.all(np.abs(z[ok] - truth[ok]) < 5 * 0.003 + quantum), name
    frames = run.streams["s"].raw
    assert all(f.startswith("R") for f in frames)


# --------------------------------------------------------------------------------------
# IR physics
# --------------------------------------------------------------------------------------
def test_ir_near_zone_folds_back_to_the_far_voltage():
    body = """
[[target]]
direction = "front"
waypoints = [[0, 0.06], [4, 0.06], [4.01, 0.40], [8, 0.40], [8.01, 0.148]]
"""
    run = simulate(_scenario(body, _ir(), duration=12.0))
    s = run.streams["ir"]
    volts = s.raw * 5.0 / 1024
    near = volts[(s.t_s > 0.5) & (s.t_s < 3.9)].mean()
    far = volts[(s.t_s > 4.5) & (s.t_s < 7.9)].mean()
    peak = volts[s.t_s > 8.5].mean()
    # A typical 10-80 cm unit gives about 1.5 V both at 6 cm (below its peak) and at 40 cm,
    # and about 2.7 V at its peak near 15 cm (common practice, no source).
    assert abs(near - 1.5) < 0.05 and abs(far - 1.5) < 0.05 and abs(near - far) < 0.05
    assert abs(peak - 2.7) < 0.05


def test_held_samples_repeat_exactly_with_new_values_each_cycle():
    body = """
[[target]]
direction = "front"
waypoints = [[0, 0.2], [10, 0.7]]

[sensor.ir]
rate_hz = 200.0
phase_s = 0.0025
hold_s = 0.04
volts_sigma = 0.01
"""
    run = simulate(_scenario(body, _ir()))
    s = run.streams["ir"]
    # Samples fall half-way between the unit's updates (phase 2.5 ms).
    cycle = np.floor(s.t_s / 0.04).astype(int)
    starts = np.r_[True, np.diff(cycle) != 0]
    # A host sampling every 5 ms sees each 40 ms measurement 8 times, as exact repeats.
    same_as_first = s.raw == s.raw[np.flatnonzero(starts)][np.cumsum(starts) - 1]
    assert np.all(same_as_first)
    assert np.all(np.bincount(cycle - cycle[0])[1:-1] == 8)
    assert np.all(s.label[starts] == GENUINE) and np.all(s.label[~starts] == HELD)
    # ... and a new measurement (new noise, moving target) at nearly every cycle.
    firsts = s.raw[starts]
    assert np.mean(np.diff(firsts) != 0) > 0.8
    # ADC noise at the host breaks the exact repeats.
    noisy = simulate(_scenario(body + "adc_noise_counts = 2.0\n", _ir())).streams["ir"]
    assert np.mean(np.diff(noisy.raw)[~starts[1:]] != 0) > 0.5


def test_ir_target_out_of_reach_gives_the_floor_and_weak_returns_are_noisier():
    body = """
[[target]]
direction = "front"
waypoints = [[0, 0.40], [10, 0.40], [10.01, 1.5]]

[[surface]]
direction = "front"
from_s = 5.0
to_s = 10.0
ir_gain = 0.5

[sensor.ir]
volts_sigma = 0.02
floor_volts = 0.3
"""
    run = simulate(_scenario(body, _ir(), duration=15.0))
    s = run.streams["ir"]
    v = s.raw * 5.0 / 1024
    fresh = s.label != HELD
    strong = fresh & (s.t_s < 5)
    weak = fresh & (s.t_s > 5) & (s.t_s < 10)
    gone = fresh & (s.t_s > 10.1)
    assert np.all(s.label[gone] == NO_TARGET)
    assert abs(v[gone].mean() - 0.3) < 0.01
    # Half the return: twice the noise, and the output shifted by gain_bias (default 0.1)
    # of the lost half — triangulation reads the spot's position, not its brightness
    # (common practice, no source).
    assert abs(v[weak].mean() - (1 - 0.1 * 0.5) * v[strong].mean()) < 0.02
    ratio = v[weak].std() / v[strong].std()
    assert 1.6 < ratio < 2.5


# --------------------------------------------------------------------------------------
# Schedules and crosstalk
# --------------------------------------------------------------------------------------
def _two_units(mode, body=""):
    body = '[[target]]\ndirection = "front"\nwaypoints = 1.5\n' + body
    return simulate(_scenario(body, _echo("a") + _echo("b"), mode=mode, duration=20.0))


def test_round_robin_and_chained_schedules_have_no_crosstalk():
    for mode in ("round_robin", "chained"):
        run = _two_units(mode)
        for s in run.streams.values():
            assert len(s.t_s) > 200
            assert np.count_nonzero(s.label == CROSSTALK) == 0


def test_free_running_units_cross_talk_short():
    body = "[sensor.a]\nping_period_s = 0.05\n[sensor.b]\nping_period_s = 0.0513\n"
    run = _two_units("free", body)
    a = run.streams["a"]
    xt = a.label == CROSSTALK
    # B's echo reaches A first whenever B pinged less than (tof - ring-down) before A:
    # a fraction of about (2 r - 2 r_min) / c / period_B of A's readings (geometric
    # probability for two unsynchronised periods).
    c = _c_ideal(20.0)
    expected = (2 * 1.5 - 2 * 0.15) / c / 0.0513
    assert abs(xt.mean() - expected) < 0.05
    # Heard before its own echo: the reported range is short.
    r = a.raw * c / 2
    assert np.all(r[xt] < 1.5 + 0.01) and np.median(r[xt]) < 1.3
    # The echo A heard is the very echo B heard of its own ping (the timing a crosstalk
    # classifier relies on).
    b = run.streams["b"]
    rx_a = a.ping_t_s[xt] + a.raw[xt]
    rx_b = b.ping_t_s + b.raw
    j = np.searchsorted(rx_b, rx_a)
    gap = np.minimum(np.abs(rx_b[np.clip(j, 0, len(rx_b) - 1)] - rx_a),
                     np.abs(rx_b[np.clip(j - 1, 0, len(rx_b) - 1)] - rx_a))
    assert np.median(gap) < 1e-4


def test_foreign_units_cross_talk_only_while_near_and_are_not_logged():
    body = """
[[target]]
direction = "front"
waypoints = 2.0

[[foreign]]
name = "neighbour"
period_s = 0.043
from_s = 5.0
to_s = 10.0
path_m = 1.2
"""
    run = simulate(_scenario(body, _echo("a"), duration=15.0))
    a = run.streams["a"]
    inside = (a.ping_t_s >= 5.05) & (a.ping_t_s < 9.95)
    assert np.count_nonzero(a.label[~inside] == CROSSTALK) == 0
    assert np.count_nonzero(a.label[inside] == CROSSTALK) > 10
    assert set(run.streams) == {"a"}


# --------------------------------------------------------------------------------------
# Air temperature sensor
# --------------------------------------------------------------------------------------
def test_temperature_sensor_lags_like_a_first_order_system():
    air = """[air]
temp_c = [[0, 10.0], [5.0, 10.0], [5.001, 30.0]]
[air.sensor]
rate_hz = 10.0
noise_c = 0.0
lag_s = 5.0
"""
    run = simulate(_scenario('[[target]]\ndirection = "front"\nwaypoints = 1.0\n', _echo("a"),
                             air=air, duration=30.0))
    q, t, v = run.environment["air_temp"]
    assert q == "air_temperature"
    # A first-order lag reaches 1 - 1/e = 63.2 % of a step after one time constant, and
    # 95 % after three (common practice, no source).
    assert abs(np.interp(10.0, t, v) - (10 + 20 * (1 - math.exp(-1)))) < 0.15
    assert abs(np.interp(20.0, t, v) - (10 + 20 * (1 - math.exp(-3)))) < 0.15
    assert abs(v[t < 5.0] - 10.0).max() < 1e-9


# --------------------------------------------------------------------------------------
# Fault modes: every scenario under datasets/faults leaves its signature
# --------------------------------------------------------------------------------------
FAULT_FILES = sorted(glob.glob(os.path.join(DATASETS, "faults", "*.scenario.toml")))


def test_there_is_one_fault_scenario_per_fault_mode():
    from replay.scenario import FAULT_KINDS
    kinds = sorted(f.kind for p in FAULT_FILES for f in load_scenario(p).faults)
    assert kinds == sorted(FAULT_KINDS)


@pytest.mark.parametrize("path", FAULT_FILES, ids=lambda p: os.path.basename(p).split(".")[0])
def test_fault_signature(path, tmp_path):
    sc = load_scenario(path)
    (fault,) = sc.faults
    out = tmp_path / "fault.h5"
    write_simulated(out, simulate(sc))
    with open_log(out) as log:
        streams = {n: log.read_sensor(n) for n in log.sensors}
        env = {n: log.environment(n) for n in log.environment_names}
        truth_t, truth_r = log.truth("front")
    clean = simulate(scenario_from_toml(_without_faults(path), where=path,
                                        base_dir=os.path.dirname(path)))
    a, b = fault.from_s, fault.to_s
    kind = fault.kind
    if kind == "stuck":
        s = streams[fault.target]
        m = (s.t_s >= a) & (s.t_s < b)
        assert np.unique(s.raw[m]).size == 1 and np.all(s.label[m] == HELD)
        assert np.unique(s.raw[s.t_s < a]).size > 10
    elif kind == "dead":
        s = streams[fault.target]
        assert not np.any((s.t_s >= a) & (s.t_s < b))
        assert np.any(s.t_s < a) and np.any(s.t_s >= b)
    elif kind == "dropout_burst":
        s = streams[fault.target]
        m = (s.t_s >= a) & (s.t_s < b)
        assert np.mean(s.label[m] == DROPOUT) > 0.8 and np.all(s.raw[s.label == DROPOUT] == 0)
        assert np.mean(s.label[~m] == DROPOUT) < 0.05
    elif kind == "crosstalk_burst":
        s = streams[fault.target]
        m = (s.ping_t_s >= a) & (s.ping_t_s < b)
        xt = s.label == CROSSTALK
        assert np.mean(xt[m]) > 0.5 and not np.any(xt[~m])
        truth = np.interp(s.ping_t_s, truth_t, truth_r)
        assert np.all(s.raw[xt] * 300.0 / 2 < truth[xt] + 0.01)  # short, even at a slow c
    elif kind == "target_jump":
        ct, cr = clean.truth["front"]
        m = (truth_t >= a) & (truth_t < b)
        assert np.allclose(truth_r[m] - cr[m], fault.params["jump_m"])
        assert np.array_equal(truth_r[~m], cr[~m])
        s = streams["echo_a"]
        inside = (s.ping_t_s >= a + 0.1) & (s.ping_t_s < b) & (s.label == GENUINE)
        z = s.raw[inside] * _c_ideal(18.5) / 2
        assert np.allclose(z, np.interp(s.ping_t_s[inside], truth_t, truth_r), atol=0.03)
    elif kind == "temp_fail":
        t, v = env[fault.target]
        m = (t >= a) & (t < b)
        assert m.any() and np.all(np.isnan(v[m])) and np.all(np.isfinite(v[~m]))
        stop = simulate(scenario_from_toml(open(path).read().replace('mode = "nan"',
                                                                      'mode = "stop"'),
                                           where=path, base_dir=os.path.dirname(path)))
        _q, t2, v2 = stop.environment[fault.target]
        assert not np.any((t2 >= a) & (t2 < b)) and np.all(np.isfinite(v2))
    elif kind == "clock_jump":
        s = streams[fault.target]
        c = clean.streams[fault.target]
        dt = s.t_s - c.t_s
        m = (c.t_s >= a) & (c.t_s < b)
        assert np.allclose(dt[m], fault.params["jump_s"]) and np.all(dt[~m] == 0)
        steps = np.diff(s.t_s)
        assert steps.min() < -0.4  # the log's time runs backwards once
    else:  # pragma: no cover
        pytest.fail(f"no signature check for {kind}")
    # Outside the fault the run is the clean run.
    for name, s in streams.items():
        if name != getattr(fault, "target", None) and kind not in ("target_jump",):
            assert np.array_equal(s.t_s, clean.streams[name].t_s)


def _without_faults(path):
    text = open(path).read()
    return text[: text.index("[[fault]]")]


# --------------------------------------------------------------------------------------
# Reproducibility, datasets, errors, command line
# --------------------------------------------------------------------------------------
def _contents(path):
    """Every dataset's values and every attribute of an HDF5 file, by path."""
    import h5py
    out = {}

    def visit(name, obj):
        out[name + "@attrs"] = {k: (v.tolist() if hasattr(v, "tolist") else v)
                                for k, v in obj.attrs.items()}
        if isinstance(obj, h5py.Dataset):
            out[name] = (obj.dtype.str, obj.shape, obj[()])
    with h5py.File(path, "r") as f:
        out["/@attrs"] = dict(f.attrs)
        f.visititems(visit)
    return out


@pytest.mark.parametrize("name", ["cold-store-dock", "shelf-pass", "tuning-run"])
def test_demo_log_regenerates_exactly(tmp_path, name):
    # The scenario fixes the seed and the creation time, so its log comes back with every
    # value, dtype and attribute equal. (Equal values, not equal bytes: the bytes of a
    # gzip stream depend on the zlib build the installed h5py carries.)
    out = tmp_path / f"{name}.h5"
    write_simulated(out, simulate(os.path.join(DATASETS, f"{name}.scenario.toml")))
    new, committed = _contents(out), _contents(os.path.join(DATASETS, f"{name}.h5"))
    assert new.keys() == committed.keys()
    for key, value in committed.items():
        if key.endswith("@attrs"):
            assert new[key] == value, key
        else:
            (dt_a, shape_a, a), (dt_b, shape_b, b) = new[key], value
            assert (dt_a, shape_a) == (dt_b, shape_b), key
            if isinstance(b, np.ndarray) and b.dtype.kind == "f":
                np.testing.assert_array_equal(a, b, err_msg=key)  # NaN where NaN
            else:
                assert np.array_equal(a, b) if isinstance(b, np.ndarray) else a == b, key


def test_seed_makes_runs_repeatable_and_distinct():
    sc = load_scenario(os.path.join(DATASETS, "faults", "dropout_burst.scenario.toml"))
    r1, r2, r3 = simulate(sc, seed=5), simulate(sc, seed=5), simulate(sc, seed=6)
    for n in r1.streams:
        assert np.array_equal(r1.streams[n].raw, r2.streams[n].raw)
    assert not np.array_equal(r1.streams["echo_a"].raw, r3.streams["echo_a"].raw)


def test_demo_datasets_are_complete_and_small():
    total = 0
    for name in ("cold-store-dock", "shelf-pass", "tuning-run"):
        rig = Rig.load(os.path.join(DATASETS, f"{name}.rig.toml"))
        sc = load_scenario(os.path.join(DATASETS, f"{name}.scenario.toml"))
        assert sc.rig == rig
        with open_log(os.path.join(DATASETS, f"{name}.h5")) as log:
            assert set(log.sensors) == set(rig.sensors)
            assert set(log.truth_directions) == set(rig.directions)
            assert Rig.from_toml(log.rig_toml) == rig
            t, _r = log.truth(rig.directions[0])
            assert np.median(np.diff(t)) <= 0.01  # truth at >= 100 Hz
        total += os.path.getsize(os.path.join(DATASETS, f"{name}.h5"))
    assert total < 5e6


def test_cold_store_dock_shows_what_it_promises():
    run = simulate(os.path.join(DATASETS, "cold-store-dock.scenario.toml"))
    rig = run.scenario.rig
    t, r = run.truth["front"]
    assert r.min() < rig.sensors["ir_front"].curve.peak_range_m       # inside the IR peak
    assert r.min() > rig.sensors["echo_front"].min_range_m            # the echo still sees it
    q, tt, temp = run.environment["air_temp"]
    assert temp[:5].mean() < 6 and temp[-5:].mean() > 22              # the air warms
    e = run.streams["echo_front"]
    assert np.count_nonzero(e.label == CROSSTALK) > 20                # the neighbour's pings


def test_scenario_errors_name_file_key_and_line(tmp_path):
    rig = os.path.join(DATASETS, "tuning-run.rig.toml")
    good = (f'rig = "{rig}"\nduration_s = 5.0\n\n[[target]]\ndirection = "front"\n'
            'waypoints = 1.0\n\n[sensor.echo_a]\nmultipath_p = 0.1\n')
    scenario_from_toml(good, where="s.toml")
    cases = [
        (good.replace("duration_s = 5.0", "duration_s = -5.0"), "duration_s", 2),
        (good.replace("multipath_p = 0.1", "multipath_q = 0.1"), "sensor.echo_a.multipath_q", 9),
        (good.replace("waypoints = 1.0", "waypoints = [[0, 1.0], [0, 2.0]]"),
         "target[1].waypoints", 6),
        (good + '\n[[fault]]\nkind = "dead"\nsensor = "sonar9"\nfrom_s = 1.0\n',
         "fault[1].sensor", 13),
        (good + '\n[[fault]]\nkind = "melt"\nsensor = "echo_a"\nfrom_s = 1.0\n',
         "fault[1].kind", 12),
        (good.replace('direction = "front"', 'direction = "back"'), "target[1].direction", 5),
        (good + "\n[sensor.echo_a.clutter]\nrange_m = 1\n", "sensor.echo_a.clutter", 11),
        (good + '\n[air.sensor]\nstream = "t_air"\n', "air.sensor.stream", 12),
    ]
    for text, field, row in cases:
        with pytest.raises(ConfigError) as info:
            scenario_from_toml(text, where="s.toml")
        err = info.value
        assert err.file == "s.toml"
        if field is not None:
            assert err.field == field and err.row == row, (err.field, err.row, err.message)
    p = tmp_path / "x.scenario.toml"
    p.write_text('rig = "missing.rig.toml"\nduration_s = 5.0\n')
    with pytest.raises(ConfigError, match="missing.rig.toml"):
        load_scenario(p)


def test_command_line(tmp_path, capsys):
    out = tmp_path / "run.h5"
    path = os.path.join(DATASETS, "faults", "dead.scenario.toml")
    assert main([path, "-o", str(out), "--seed", "3"]) == 0
    with open_log(out) as log:
        assert "seed 3" in log.writer
    assert main([path, "-o", path]) == 2  # never over an input
    bad = tmp_path / "bad.scenario.toml"
    bad.write_text(open(path).read().replace("duration_s = 20.0", "duration_s = 'long'"))
    assert main([str(bad), "-o", str(tmp_path / "b.h5")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 2 and "duration_s" in err[-1] and "bad.scenario.toml" in err[-1]
    parser = argparse.ArgumentParser()
    register(parser.add_subparsers())
    args = parser.parse_args(["simulate", path, "-o", str(tmp_path / "c.h5"), "-q"])
    assert args.func(args) == 0 and (tmp_path / "c.h5").exists()
