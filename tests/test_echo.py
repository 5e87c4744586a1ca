"""Echo ranger decoding: output styles, temperature compensation, limits and noise."""
import math

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from fusion import decisions as D
from fusion.errors import ConfigError, InputError
from fusion.sensors.air import speed_of_sound
from fusion.sensors.echo import EchoRanger

# Every valid (output, compensation) pair.
STYLES = [("echo_time", "host")] + [(o, c) for o in ("pulse_width", "analog", "serial")
                                    for c in ("fixed", "power_up", "self")]
OFFSET_M = 0.05


def make(output, compensation, **kw):
    return EchoRanger(name="e1", output=output, compensation=compensation, offset_m=OFFSET_M,
                      **kw)


def quantum_true_m(s, temp_c, rh, t0_c):
    """Quantum of one reading in true range, metres, worked out from the unit's scale."""
    c = speed_of_sound(temp_c, rh)
    if s.output == "echo_time":
        return c * s.tick_s / 2
    k = {"fixed": c / s.assumed_speed_mps, "power_up": c / speed_of_sound(t0_c),
         "self": 1.0}[s.compensation]
    q = {"pulse_width": s.tick_s / s.seconds_per_m, "analog": s.volts_step / s.volts_per_m,
         "serial": s.frame_unit_m}[s.output]
    return k * q


def decode1(s, raw, temp_c=20.0, temp_sigma_c=0.0, **kw):
    raw = np.asarray(raw, dtype=object if s.output == "serial" else float).reshape(-1)
    return s.decode(raw, np.zeros(raw.shape[0]), temp_c, temp_sigma_c, **kw)


# ---------------------------------------------------------------- round trip
@pytest.mark.parametrize("output, compensation", STYLES)
@settings(max_examples=40, deadline=None)
@given(frac=st.floats(0.0, 1.0), temp_c=st.floats(-20.0, 45.0), rh=st.floats(0.0, 1.0),
       t0_c=st.floats(-10.0, 40.0))
def test_decode_inverts_encode_within_quantisation(output, compensation, frac, temp_c, rh,
                                                   t0_c):
    s = make(output, compensation)
    # Inside the valid span with room for a quantum and for the power-up scale (<= 12 %).
    r_sensor = s.min_range_m + 0.02 + frac * (0.85 * s.max_range_m - s.min_range_m - 0.02)
    r = np.array([r_sensor + OFFSET_M])
    raw = s.encode(r, temp_c, rh, power_up_temp_c=t0_c)
    m = s.decode(raw, np.zeros(1), temp_c, 0.0, relative_humidity=rh, power_up_temp_c=t0_c)
    assert m.code[0] == D.ACCEPTED
    q = quantum_true_m(s, temp_c, rh, t0_c)
    # Rounding to the nearest quantum errs by at most half of it.
    assert abs(m.z_m[0, 0] - r[0]) <= q / 2 * (1 + 1e-9) + 1e-12
    assert math.isnan(m.z_m[0, 1])
    # raw_m is the range the sensor itself gave: the true sensor range divided by the
    # compensation factor k (1 for host timing, which applies c(T) itself).
    c = speed_of_sound(temp_c, rh)
    k = {"host": 1.0, "self": 1.0, "fixed": c / s.assumed_speed_mps,
         "power_up": c / speed_of_sound(t0_c)}[compensation]
    assert m.raw_m[0] * k + OFFSET_M == pytest.approx(m.z_m[0, 0], rel=1e-12)


@pytest.mark.parametrize("output, compensation", STYLES)
def test_quantisation_enters_sigma_as_uniform(output, compensation):
    # A uniform error over one quantum q has standard deviation q / sqrt(12) (common
    # practice, no source); with every other noise term off it is all that is left.
    s = make(output, compensation, sigma_m=0.0, sigma_frac=0.0, tick_s=2e-5, volts_step=0.01,
             frame_unit_m=0.01, power_up_temp_c=10.0)
    raw = s.encode(np.array([1.5]), 30.0, 0.0)
    m = s.decode(raw, np.zeros(1), 30.0, 0.0)
    q = quantum_true_m(s, 30.0, 0.0, 10.0)
    assert m.sigma_m[0, 0] == pytest.approx(q / math.sqrt(12), rel=1e-9)


def test_tof_of_self_timing_unit_matches_host_timed_echo():
    # Crosstalk classification compares round-trip times, so a self-timing unit must imply
    # the same round trip as a host-timed echo from the same reflector.
    host = make("echo_time", "host", tick_s=0.0)
    unit = make("serial", "fixed")
    raw = unit.encode(np.array([2.0]), 15.0)
    m = unit.decode(raw, np.zeros(1), 15.0, 0.0)
    expected = host.encode(np.array([m.z_m[0, 0]]), 15.0)[0]
    assert m.tof_s[0] == pytest.approx(expected, rel=1e-12)


# ---------------------------------------------------------------- temperature
def test_echo_time_at_20c():
    # 5.83 ms round trip at 20 degC: 343.2 m/s * 5.83 ms / 2 = 1.0004 m (343.2 m/s is the
    # textbook speed at 20 degC, from memory).
    s = EchoRanger(name="e1")
    m = decode1(s, [5.83e-3], temp_c=20.0)
    assert m.code[0] == D.ACCEPTED
    assert m.z_m[0, 0] == pytest.approx(1.0, abs=0.002)
    assert m.tof_s[0] == 5.83e-3


def test_power_up_compensation():
    # Unit powered up at 4 degC; air now 25 degC; it reports 1.000 m. The ideal-gas
    # relation c = 331.3 sqrt(1 + T/273.15) (textbook, from memory) gives
    # true = 1.000 * c(25) / c(4) = sqrt(298.15 / 277.15) = 1.0372 m.
    s = EchoRanger(name="e1", output="serial", compensation="power_up")
    m = decode1(s, ["R1000"], temp_c=25.0, power_up_temp_c=4.0)
    assert m.code[0] == D.ACCEPTED
    assert m.z_m[0, 0] == pytest.approx(math.sqrt(298.15 / 277.15), rel=2e-4)
    # Rule of thumb: about 0.17 %/K, so 21 K is ~3.6 % (common practice, no source).
    assert m.z_m[0, 0] - 1.0 == pytest.approx(0.0017 * 21, abs=0.003)
    assert m.raw_m[0] == pytest.approx(1.0)


def test_power_up_temperature_precedence_and_missing():
    s = EchoRanger(name="e1", output="serial", compensation="power_up")
    with pytest.raises(InputError) as exc:
        decode1(s, ["R1000"], temp_c=25.0)
    assert exc.value.field == "sensor.e1.power_up_temp_c"
    with pytest.raises(InputError):
        decode1(s, ["R1000"], temp_c=25.0, power_up_temp_c=float("nan"))
    # A configured power-up temperature wins over the log's first sample.
    fixed_t0 = EchoRanger(name="e1", output="serial", compensation="power_up",
                          power_up_temp_c=4.0)
    m = decode1(fixed_t0, ["R1000"], temp_c=25.0, power_up_temp_c=25.0)
    assert m.z_m[0, 0] == pytest.approx(math.sqrt(298.15 / 277.15), rel=2e-4)


def test_fixed_speed_unit_in_cold_air():
    # A unit assuming 343.2 m/s (20 degC) in 0 degC air reads long by c(20)/c(0); the
    # corrected range is 331.3/343.2 of the report, the ~3.5 % error of a 20 degC mistake
    # (textbook speeds at 0 and 20 degC, from memory; about 0.17 % per kelvin, common
    # practice, no source).
    s = EchoRanger(name="e1", output="pulse_width", compensation="fixed", tick_s=0.0)
    m = decode1(s, [1.0 * 2 / 343.2], temp_c=0.0)
    assert m.z_m[0, 0] == pytest.approx(331.3 / 343.2, abs=0.0006)


def test_self_compensating_unit_is_not_corrected():
    s = EchoRanger(name="e1", output="analog", compensation="self", volts_step=0.0)
    for temp in (-10.0, 40.0):
        m = decode1(s, [1.234], temp_c=temp, temp_sigma_c=5.0)
        assert m.z_m[0, 0] == pytest.approx(1.234, rel=1e-12)
        # Its own sensor tracks the air, so our temperature error adds nothing.
        expected = math.hypot(s.sigma_m, s.sigma_frac * 1.234)
        assert m.sigma_m[0, 0] == pytest.approx(expected, rel=1e-12)


def test_temperature_uncertainty_in_sigma():
    # For a host-timed echo, dr/dT = r / (2 T_kelvin): about 0.17 % of range per kelvin
    # (common practice, no source), i.e. 1.7 mm at 1 m for a 1 K temperature sigma.
    s = EchoRanger(name="e1", sigma_m=0.0, sigma_frac=0.0, tick_s=0.0)
    t = 2.0 / speed_of_sound(20.0)
    m = decode1(s, [t], temp_c=20.0, temp_sigma_c=1.0)
    assert m.sigma_m[0, 0] == pytest.approx(1.0 / (2 * 293.15), rel=1e-9)
    assert m.sigma_m[0, 0] == pytest.approx(0.0017, rel=0.03)


def test_offset_and_latency():
    s = EchoRanger(name="e1", output="serial", compensation="self", offset_m=-0.1,
                   latency_s=0.02)
    m = s.decode(np.array(["R1500", "R2000"]), np.array([1.0, 2.0]), 20.0, 0.0)
    np.testing.assert_allclose(m.z_m[:, 0], [1.4, 1.9])
    np.testing.assert_allclose(m.raw_m, [1.5, 2.0])
    np.testing.assert_allclose(m.t_s, [0.98, 1.98])


# ---------------------------------------------------------------- codes
def test_echo_time_codes():
    s = EchoRanger(name="e1")
    c20 = speed_of_sound(20.0)
    raws = [0.0,                       # no echo
            s.timeout_s,               # timed out
            1.0,                       # far past the timeout
            2 * 0.10 / c20,            # inside the 0.15 m blanking
            2 * 4.2 / c20,             # beyond 4 m but before the timeout
            float("nan"), float("inf"), -1e-3,
            2 * 1.0 / c20]
    m = decode1(s, raws)
    assert list(m.code) == [D.DROPOUT, D.DROPOUT, D.DROPOUT, D.OUT_OF_RANGE,
                            D.OUT_OF_RANGE, D.INVALID, D.INVALID, D.INVALID, D.ACCEPTED]
    # Dropouts and invalid readings carry no range; out-of-range ones keep it for screening.
    assert np.all(np.isnan(m.z_m[[0, 1, 2, 5, 6, 7], 0]))
    np.testing.assert_allclose(m.z_m[[3, 4, 8], 0], [0.10, 4.2, 1.0], rtol=1e-12)
    assert np.all(np.isnan(m.raw_m[5:8]))


def test_default_timeout():
    # docs/rig.md, `timeout_s`: default 2 max_range_m / 340 x 1.1, the round trip to the
    # maximum range at 340 m/s plus a 10 % margin, enough for air down to about -35 degC.
    s = EchoRanger(name="e1", max_range_m=5.0)
    assert s.timeout_s == pytest.approx(2 * 5.0 / 340 * 1.1)
    assert s.timeout_s > 2 * 5.0 / speed_of_sound(-35.0)


def test_serial_codes():
    s = EchoRanger(name="e1", output="serial", compensation="self")
    frames = ["R1000", "R1000\r", "R1000\r\n", b"R1000",
              "R12a4", "", "X123", "R" + "1" * 9, "R", " R1000", "R-100", None, 12.5,
              b"\xff\xfe", "R\u0661\u0662\u0663",   # non-ASCII digits are garbled text too
              "R4000", "R9999",                     # reported as max: dropouts
              "R0100", "R0000"]                     # inside blanking
    m = decode1(s, frames)
    expected = ([D.ACCEPTED] * 4 + [D.INVALID] * 11 + [D.DROPOUT] * 2
                + [D.OUT_OF_RANGE] * 2)
    assert list(m.code) == expected
    np.testing.assert_allclose(m.z_m[:4, 0], 1.0)


def test_self_timing_dropout_and_range_codes():
    pw = EchoRanger(name="e1", output="pulse_width", compensation="self", tick_s=0.0)
    m = decode1(pw, np.array([0.0, 4.0, 4.5, 3.99, 0.1, -1.0, np.nan]) * pw.seconds_per_m)
    assert list(m.code) == [D.DROPOUT, D.DROPOUT, D.DROPOUT, D.ACCEPTED, D.OUT_OF_RANGE,
                            D.INVALID, D.INVALID]
    an = EchoRanger(name="e1", output="analog", compensation="self", max_range_m=5.0,
                    dropout_report_m=6.0)
    m = decode1(an, [5.5, 6.0, 4.9, -0.01, np.inf])
    assert list(m.code) == [D.OUT_OF_RANGE, D.DROPOUT, D.ACCEPTED, D.INVALID, D.INVALID]


def test_bad_times_are_invalid_not_raised():
    s = EchoRanger(name="e1", output="serial", compensation="self")
    m = s.decode(np.array(["R1000", "R1000"]), np.array([0.0, np.nan]), 20.0, 0.0)
    assert list(m.code) == [D.ACCEPTED, D.INVALID]


@pytest.mark.parametrize("output, compensation", STYLES)
@settings(max_examples=30, deadline=None)
@given(data=st.data())
def test_decode_never_raises_on_bad_readings(output, compensation, data):
    s = make(output, compensation, power_up_temp_c=5.0)
    if output == "serial":
        raw = data.draw(st.lists(st.one_of(st.text(max_size=12), st.binary(max_size=8),
                                           st.none(), st.from_regex(r"R\d{0,7}\r?",
                                                                    fullmatch=True)),
                                 min_size=1, max_size=20))
        raw = np.array(raw, dtype=object)
    else:
        raw = np.array(data.draw(st.lists(st.floats(allow_nan=True, allow_infinity=True),
                                          min_size=1, max_size=20)))
    m = s.decode(raw, np.arange(len(raw), dtype=float), 20.0, 0.5)
    assert set(np.unique(m.code)) <= {D.ACCEPTED, D.DROPOUT, D.OUT_OF_RANGE, D.INVALID}
    ok = m.code == D.ACCEPTED
    assert np.all(np.isfinite(m.z_m[ok, 0])) and np.all(m.sigma_m[ok, 0] > 0)
    assert np.all((m.z_m[ok, 0] - OFFSET_M >= s.min_range_m - 1e-12)
                  & (m.z_m[ok, 0] - OFFSET_M <= s.max_range_m + 1e-12))
    gone = (m.code == D.DROPOUT) | (m.code == D.INVALID)
    assert np.all(np.isnan(m.z_m[gone])) and np.all(np.isnan(m.tof_s[gone]))
    assert np.all(np.isnan(m.z_m[:, 1]))


def test_empty_batch():
    m = EchoRanger(name="e1").decode(np.zeros(0), np.zeros(0), 20.0, 0.0)
    assert len(m) == 0 and m.z_m.shape == (0, 2)


def test_bad_call_arguments_raise_input_error():
    s = EchoRanger(name="e1")
    with pytest.raises(InputError):
        s.decode(np.zeros(3), np.zeros(2), 20.0, 0.0)
    with pytest.raises(InputError):
        s.decode(np.zeros(2), np.zeros(2), np.array([20.0, np.nan]), 0.0)
    with pytest.raises(InputError):
        s.decode(np.zeros(2), np.zeros(2), 20.0, 0.0, relative_humidity=50.0)
    with pytest.raises(InputError):
        s.encode(np.array([-1.0]), 20.0)


# ---------------------------------------------------------------- configuration
def test_dict_round_trip():
    s = EchoRanger(name="left", direction="rear", output="serial", compensation="power_up",
                   max_range_m=6.0, offset_m=0.02, ping_logged=True, power_up_temp_c=4.0)
    d = s.to_dict()
    # the default timeout, as docs/rig.md (`timeout_s`) states it
    assert d["dropout_report_m"] == 6.0 and d["timeout_s"] == pytest.approx(2 * 6 / 340 * 1.1)
    assert EchoRanger.from_dict(d) == s
    # The NaN default ("first sample of the log") survives a round trip as NaN.
    d = EchoRanger(name="x", output="analog", compensation="power_up").to_dict()
    assert math.isnan(EchoRanger.from_dict(d).power_up_temp_c)


def test_defaults_resolved():
    assert EchoRanger(name="a").compensation == "host"
    assert EchoRanger(name="a", output="analog").compensation == "fixed"
    assert EchoRanger(name="a", max_range_m=3).dropout_report_m == 3.0


@pytest.mark.parametrize("key, value", [
    ("max_range_m", "far"), ("max_range_m", True), ("min_range_m", -0.1),
    ("max_range_m", 0.1),          # not above the 0.15 m minimum
    ("output", "sonar"), ("compensation", "host"),   # host timing needs echo_time
    ("frame_pattern", r"^R(\d+)$"), ("frame_pattern", "R(?P<range>"),
    ("frame_format", "R{n}"), ("tick_s", -1e-6), ("volts_per_m", 0.0),
    ("ping_logged", 1), ("power_up_temp_c", -300.0), ("latency_s", -0.01),
    ("sigma_m", float("inf")), ("dropout_report_m", 0.1), ("direction", ""),
])
def test_bad_values_name_the_field(key, value):
    d = {"name": "left", "output": "serial", key: value}
    with pytest.raises(ConfigError) as exc:
        EchoRanger.from_dict(d, where="rig.toml")
    assert exc.value.field == f"sensor.left.{key}"
    assert exc.value.file == "rig.toml"
    assert "expected" in exc.value.message


def test_unknown_and_missing_keys():
    with pytest.raises(ConfigError) as exc:
        EchoRanger.from_dict({"name": "left", "max_rnage_m": 4.0}, where="rig.toml")
    assert exc.value.field == "sensor.left.max_rnage_m" and exc.value.file == "rig.toml"
    with pytest.raises(ConfigError) as exc:
        EchoRanger.from_dict({"output": "analog"})
    assert exc.value.field == "sensor.?.name"
    with pytest.raises(ConfigError):
        EchoRanger.from_dict({"name": "x", "output": "echo_time", "compensation": "fixed"})


def test_frame_format_must_be_readable_by_pattern():
    s = EchoRanger(name="e1", output="serial", compensation="self",
                   frame_pattern=r"D=(?P<range>\d+)mm")
    assert decode1(s, ["D=1234mm"]).z_m[0, 0] == pytest.approx(1.234)
    with pytest.raises(ConfigError) as exc:
        s.encode(np.array([1.0]), 20.0)
    assert exc.value.field == "sensor.e1.frame_format"
    ok = EchoRanger(name="e1", output="serial", compensation="self",
                    frame_pattern=r"D=(?P<range>\d+)mm", frame_format="D={count}mm")
    assert list(ok.encode(np.array([1.0]), 20.0)) == ["D=1000mm"]
