"""Sensor faults are survived: every fault scenario in datasets/faults is simulated,
replayed, and the fused track must stay sound and come back to the truth after the fault.

Recovery time (printed, ``pytest -s``): from the end of the fault to the first fused
state from which every later one is within three sigma of the truth *and* within
``ERROR_BOUND_M`` — the three-sigma band of a consistent Gaussian estimate (Bar-Shalom,
Li & Kirubarajan, *Estimation with Applications to Tracking and Navigation*, 2001, §5.4,
consistency of the estimation error) plus an absolute bound for a ranger on a robot
(common practice, no source). Fused states are those the track file records: one per
fused reading, so a stretch in which every reading is rejected counts against recovery.

The bound on recovery, ``RECOVERY_BOUND_S``, is the rig's re-acquisition window (five
mutually consistent readings within 0.5 s restart a track, docs/rig.md) plus one echo
ranger cycle of margin; it is this project's design figure, not a published one.
"""
from __future__ import annotations

import glob
import math
import os

import h5py
import numpy as np
import pytest

from fusion import decisions as D
from fusion.fuser import Fuser
from fusion.screening import air_at
from fusion.sensors.air import speed_of_sound
from replay.run import run
from replay.scenario import load_scenario, scenario_from_toml
from replay.simulate import CROSSTALK as LABEL_CROSSTALK, DROPOUT as LABEL_DROPOUT
from replay.simulate import simulate, write_simulated

HERE = os.path.dirname(os.path.abspath(__file__))
FAULT_DIR = os.path.join(os.path.dirname(HERE), "datasets", "faults")
FAULT_FILES = sorted(glob.glob(os.path.join(FAULT_DIR, "*.scenario.toml")))
ERROR_BOUND_M = 0.03
RECOVERY_BOUND_S = 0.6
SETTLE_S = 1.0           # the first second: the track starts from one reading

RESULTS: dict[str, dict] = {}


@pytest.fixture(scope="module", autouse=True)
def _print_table():
    yield
    if not RESULTS:
        return
    print("\n\nfault recovery (replay of datasets/faults/*.scenario.toml)")
    print(f"  {'fault':<31}{'window s':>12}{'recovery s':>12}{'max |err| in mm':>17}"
          f"{'NEES in':>9}  notes")
    for name, r in sorted(RESULTS.items()):
        print(f"  {name:<31}{r['window']:>12}{r['recovery_s']:>12.3f}{r['max_in_mm']:>17.1f}"
              f"{r['nees_in']:>9.2f}  {r.get('note', '')}")


# ------------------------------------------------------------------------ helpers
def _variant(path, old, new):
    """The scenario with one piece of text replaced (a harsher or mirrored fault)."""
    with open(path, encoding="utf-8") as fh:
        text = fh.read()
    assert old in text, old
    return scenario_from_toml(text.replace(old, new), where=path,
                              base_dir=os.path.dirname(path))


def _without_fault(path):
    with open(path, encoding="utf-8") as fh:
        text = fh.read()
    return scenario_from_toml(text[: text.index("[[fault]]")], where=path,
                              base_dir=os.path.dirname(path))


class Replayed:
    """A simulated fault run, replayed, with the track file's contents in memory."""

    def __init__(self, scenario, tmp_path, tag):
        self.sc = scenario
        self.fault = scenario.faults[0]
        self.sim = simulate(scenario)
        self.log = str(tmp_path / f"{tag}.h5")
        write_simulated(self.log, self.sim)
        self.out = str(tmp_path / f"{tag}.track.h5")
        self.result = run(self.log, out=self.out)
        with h5py.File(self.out, "r") as f:
            self.dec = {k: f["decisions"][k][:] for k in f["decisions"]}
            self.track = {k: f["track/front"][k][:] for k in f["track/front"]}
        self.names = list(scenario.rig.sensors)
        tt, tr = self.sim.truth["front"]
        self.t = self.track["t_s"]
        self.err = self.track["range_m"] - np.interp(self.t, tt, tr)
        self.sigma = self.track["sigma_m"]

    def ok(self):
        return (np.abs(self.err) < 3 * self.sigma) & (np.abs(self.err) < ERROR_BOUND_M)

    def recovery_after(self, t0, t_end=math.inf):
        """Seconds from t0 to the first fused state from which all later ones (up to
        t_end) are good; inf if they never are."""
        m = (self.t >= t0) & (self.t < t_end)
        idx = np.flatnonzero(m)
        if idx.size == 0:
            return math.inf
        good = self.ok()[idx]
        bad = np.flatnonzero(~good)
        if bad.size == 0:
            return float(self.t[idx[0]] - t0)
        if bad[-1] == idx.size - 1:
            return math.inf
        return float(self.t[idx[bad[-1] + 1]] - t0)

    def sensor_rows(self, name, lo=-math.inf, hi=math.inf):
        si = self.names.index(name)
        return (self.dec["sensor"] == si) & (self.dec["t_s"] >= lo) & (self.dec["t_s"] < hi)

    def record(self, name, note=""):
        f = self.fault
        m = (self.t >= f.from_s) & (self.t < f.to_s)
        RESULTS[name] = dict(window=f"{f.from_s:g}-{f.to_s:g}",
                             recovery_s=self.recovery_after(f.to_s),
                             max_in_mm=1e3 * float(np.max(np.abs(self.err[m]))) if m.any()
                             else math.nan,
                             nees_in=float(np.mean((self.err[m] / self.sigma[m]) ** 2))
                             if m.any() else math.nan, note=note)
        print(f"\n{name}: recovery {RESULTS[name]['recovery_s']:.3f} s after the fault; "
              f"{note}")


def _common_checks(r: Replayed):
    f = r.fault
    # every reading in the log got exactly one decision: (sensor, row) covers each once
    n_log = sum(len(s) for s in r.sim.streams.values())
    assert len(r.dec["decision"]) == n_log
    for si, name in enumerate(r.names):
        rows = np.sort(r.dec["row"][r.dec["sensor"] == si])
        assert np.array_equal(rows, np.arange(len(r.sim.streams[name])))
    assert np.all((r.dec["decision"] >= 0) & (r.dec["decision"] < len(D.NAMES)))
    # the fused track: no NaN outside the fault, a finite positive definite covariance
    outside = (r.t < f.from_s) | (r.t >= f.to_s)
    assert np.all(np.isfinite(r.track["range_m"][outside]))
    assert np.all(np.isfinite(r.sigma[outside]))
    for k in ("cov_rr_m2", "cov_rv_m2ps", "cov_vv_m2ps2"):
        assert np.all(np.isfinite(r.track[k]))
    det = r.track["cov_rr_m2"] * r.track["cov_vv_m2ps2"] - r.track["cov_rv_m2ps"] ** 2
    assert np.all(r.track["cov_rr_m2"] > 0) and np.all(det > 0)
    # and it comes back: within the bound after the fault, and sound before it
    rec = r.recovery_after(f.to_s)
    assert rec <= RECOVERY_BOUND_S, rec
    before = (r.t >= SETTLE_S) & (r.t < f.from_s)
    assert np.all(r.ok()[before])


def test_there_is_a_test_for_every_fault_scenario():
    kinds = sorted(load_scenario(p).faults[0].kind for p in FAULT_FILES)
    assert kinds == sorted(["stuck", "dead", "dropout_burst", "crosstalk_burst",
                            "target_jump", "temp_fail", "clock_jump"])


def _path(kind):
    return os.path.join(FAULT_DIR, f"{kind}.scenario.toml")


# ------------------------------------------------------------------------ stuck
def test_stuck_ir_ranger_is_rejected_as_stuck(tmp_path):
    r = Replayed(load_scenario(_path("stuck")), tmp_path, "stuck")
    f = r.fault
    _common_checks(r)
    win = r.sensor_rows(f.target, f.from_s, f.to_s)
    codes = r.dec["decision"][win]
    fused = np.mean(codes < D.FIRST_REJECT)
    # The frozen output is decided `stuck` once it has outlived the noise (a handful of
    # measurement cycles); it is no longer fused after that. 0.9 is a design figure, not a
    # published value: the stuck rule needs at least 8 of the unit's 30 ms cycles
    # (docs/track-format.md, code 11; hold_s in datasets/tuning-run.rig.toml), 0.21 s to
    # the 8th, about 4 % of the 5 s fault, whose readings are `accepted` or `held` until
    # then; 0.9 leaves room beyond that.
    assert np.mean(codes == D.STUCK) > 0.9
    late = r.dec["t_s"][win] >= f.from_s + 0.5
    assert not np.any(codes[late] < D.FIRST_REJECT)
    r.record("stuck (IR)", f"{100 * fused:.1f} % of the stuck readings fused, "
                           f"{100 * np.mean(codes == D.STUCK):.1f} % decided stuck")


def test_stuck_echo_ranger_does_not_drag_the_track(tmp_path):
    """Harsher than the committed scenario: the host-timed echo ranger (the most precise
    unit) freezes while the target keeps moving."""
    sc = _variant(_path("stuck"), 'sensor = "ir_front"', 'sensor = "echo_a"')
    r = Replayed(sc, tmp_path, "stuck_echo")
    f = r.fault
    _common_checks(r)
    codes = r.dec["decision"][r.sensor_rows("echo_a", f.from_s, f.to_s)]
    # The run must first outlive the noise. The stuck rule (docs/track-format.md, code
    # 11): n cycles with p^(n-1) < 1e-6, at least 8, where p is the chance that two noisy
    # readings of a still target give one raw value. For a tick far below the noise
    # sigma_t of the echo time, p is about tick / (2 sqrt(pi) sigma_t): the difference of
    # two readings is N(0, 2 sigma_t^2), whose density at 0 is 1 / (2 sqrt(pi) sigma_t)
    # (common practice, no source). Here p ~ 0.016 asks for 5 cycles, so the floor of 8
    # holds: the first 7 equal readings may be fused, from the 8th on they are stuck.
    s = r.sc.rig.sensors["echo_a"]
    sigma_t = 2 * s.sigma_m / speed_of_sound(20.0)
    p = s.tick_s / (2 * math.sqrt(math.pi) * sigma_t)
    limit = max(8, 1 + math.ceil(math.log(1e-6) / math.log(p)))
    assert np.sum(codes < D.FIRST_REJECT) <= limit - 1
    inside = (r.t >= f.from_s) & (r.t < f.to_s)
    assert np.all(np.abs(r.err[inside]) < ERROR_BOUND_M)
    r.record("stuck (echo, variant)", f"{int(np.sum(codes < D.FIRST_REJECT))} stuck readings "
                                      "fused before detection")


# ------------------------------------------------------------------------ dead
def test_dead_echo_ranger_leaves_the_track_to_the_others(tmp_path):
    r = Replayed(load_scenario(_path("dead")), tmp_path, "dead")
    f = r.fault
    _common_checks(r)
    assert not np.any(r.sensor_rows(f.target, f.from_s, f.to_s))
    inside = (r.t >= f.from_s) & (r.t < f.to_s)
    # the other rangers keep fusing: no stretch without a fused state longer than 0.1 s.
    # 0.1 s is a design figure, not a published value: about three of the IR ranger's
    # 30 ms measurement cycles (hold_s in datasets/tuning-run.rig.toml), and the echo
    # ranger left fires every round-robin cycle besides; a longer gap means the live
    # rangers stopped being fused too.
    assert np.max(np.diff(r.t[inside])) < 0.1
    assert np.all(r.ok()[inside])
    r.record("dead (echo_b)", "carried by ir_front and echo_a")


# ------------------------------------------------------------------------ bursts
def test_dropout_burst_readings_are_decided_dropout(tmp_path):
    r = Replayed(load_scenario(_path("dropout_burst")), tmp_path, "dropout_burst")
    f = r.fault
    _common_checks(r)
    si = r.names.index(f.target)
    labels = r.sim.streams[f.target].label
    m = r.dec["sensor"] == si
    codes = np.empty(len(labels), np.int8)
    codes[r.dec["row"][m]] = r.dec["decision"][m]
    drop = labels == LABEL_DROPOUT
    assert drop.sum() > 50
    assert np.all(codes[drop] == D.DROPOUT)
    inside = (r.t >= f.from_s) & (r.t < f.to_s)
    assert np.all(r.ok()[inside])
    r.record("dropout_burst (echo_a)", f"{int(drop.sum())} dropouts, all decided dropout")


def test_crosstalk_burst_readings_are_rejected(tmp_path):
    r = Replayed(load_scenario(_path("crosstalk_burst")), tmp_path, "crosstalk_burst")
    f = r.fault
    _common_checks(r)
    si = r.names.index(f.target)
    labels = r.sim.streams[f.target].label
    m = r.dec["sensor"] == si
    codes = np.empty(len(labels), np.int8)
    codes[r.dec["row"][m]] = r.dec["decision"][m]
    xt = labels == LABEL_CROSSTALK
    rejected = np.mean(codes[xt] >= D.FIRST_REJECT)
    # A burst lands at a random point of the listening window; one that lands within
    # the gate of the true echo is indistinguishable from it and harmless (the error bound
    # below checks that). 0.9 is a design figure, not a published value: the gate (a few
    # cm) is a small part of the 4 m the window spans, so nearly all bursts fall outside
    # it, and the tenth left over is room for those that land near the track.
    assert xt.sum() > 40 and rejected > 0.9
    inside = (r.t >= f.from_s) & (r.t < f.to_s)
    assert np.all(np.abs(r.err[inside]) < ERROR_BOUND_M)
    r.record("crosstalk_burst (echo_a)",
             f"{int(xt.sum())} crosstalk readings, {100 * rejected:.1f} % rejected")


# ------------------------------------------------------------------------ target jump
def test_target_jump_is_reacquired_within_the_bound(tmp_path):
    r = Replayed(load_scenario(_path("target_jump")), tmp_path, "target_jump")
    f = r.fault
    _common_checks(r)
    t_in = r.recovery_after(f.from_s, f.to_s)       # the object stepping in
    assert t_in <= RECOVERY_BOUND_S, t_in
    codes = r.dec["decision"]
    reacq = r.dec["t_s"][codes == D.REACQUIRED]
    assert np.any((reacq >= f.from_s) & (reacq < f.from_s + RECOVERY_BOUND_S))
    assert np.any((reacq >= f.to_s) & (reacq < f.to_s + RECOVERY_BOUND_S))
    r.record("target_jump (-0.35 m)", f"re-acquired {t_in:.3f} s after stepping in")


# ------------------------------------------------------------------------ temperature
def test_failed_temperature_falls_back_with_widened_sigma(tmp_path):
    """The sensor reads NaN for 12 s (the committed scenario's 5 s, stretched so the last
    good sample goes stale well inside the window)."""
    sc = _variant(_path("temp_fail"), "from_s = 8.0\nto_s = 13.0", "from_s = 3.0\nto_s = 15.0")
    r = Replayed(sc, tmp_path, "temp_fail")
    f = r.fault
    _common_checks(r)
    air = sc.rig.air
    _q, te, ve = r.sim.environment[air.stream]
    good = np.isfinite(ve)
    last_good_t = te[good & (te < f.from_s)][-1]
    last_good_v = ve[good & (te < f.from_s)][-1]
    flagged = (r.dec["flags"] & D.FLAG_TEMP_FALLBACK) != 0
    echo = np.isin(r.dec["sensor"], [r.names.index(n) for n in sc.rig.echo_names])
    # flagged exactly where the last good sample is older than stale_after_s
    t = r.dec["t_s"]
    stale = (t - last_good_t > air.stale_after_s) & (t < f.to_s)
    assert np.array_equal(flagged[echo], stale[echo])
    assert flagged.sum() > 100
    # the last good value is used, with its uncertainty grown by the staleness
    assert np.allclose(r.dec["temp_c"][flagged], last_good_v)
    _temp, tsig, fb = air_at(t[flagged], te, ve, air)
    assert np.all(fb) and np.all(tsig > air.temp_sigma_c)
    # and the echo sigma carries it: larger than with a fresh sample at that temperature
    for name in sc.rig.echo_names:
        si = r.names.index(name)
        m = flagged & (r.dec["sensor"] == si) & (r.dec["decision"] < D.FIRST_REJECT)
        s = r.sim.streams[name]
        rows = r.dec["row"][m]
        fresh = sc.rig.sensors[name].decode(s.raw[rows], s.t_s[rows], last_good_v,
                                            air.temp_sigma_c, air.relative_humidity)
        assert np.all(r.dec["sigma_far_m"][m] > fresh.sigma_m[:, 0])
    inside = (r.t >= f.from_s) & (r.t < f.to_s)
    assert np.all(r.ok()[inside])
    r.record("temp_fail (NaN, 3-15 s)", f"{int(flagged.sum())} readings flagged temp_fallback")


# ------------------------------------------------------------------------ clock jumps
def _stream(sc, path):
    """Push every reading in the order it really arrived (its true time, from the same
    run without the fault) with the time the log gives it."""
    run_ = simulate(sc)
    clean = simulate(_without_fault(path))
    fuser = Fuser(sc.rig)
    _q, te, ve = run_.environment[sc.rig.air.stream]
    fuser.push_air(te, ve)
    events = []
    for name, s in run_.streams.items():
        t_true = clean.streams[name].t_s
        assert len(t_true) == len(s)
        ping = s.ping_t_s if s.ping_t_s is not None else np.full(len(s), math.nan)
        events += [(t_true[i], name, s.t_s[i], s.raw[i], ping[i]) for i in range(len(s))]
    events.sort(key=lambda e: e[0])
    tt, tr = run_.truth["front"]
    out = []
    for t_true, name, t_log, raw, ping in events:
        est, dec = fuser.push(name, t_log, raw, ping)
        out.append((t_true, name, dec.code, est.range_m - np.interp(t_true, tt, tr),
                    est.sigma_m))
    return out


def test_clock_jump_back_is_late_and_the_track_survives(tmp_path):
    path = _path("clock_jump")
    sc = load_scenario(path)
    f = sc.faults[0]
    assert f.params["jump_s"] < -sc.rig.estimator.max_lag_s
    r = Replayed(sc, tmp_path, "clock_jump")
    _common_checks(r)
    inside = (r.t >= f.from_s) & (r.t < f.to_s)
    assert np.all(np.abs(r.err[inside]) < ERROR_BOUND_M)
    # On the robot, readings arrive in real time: every reading stamped further back
    # than the allowed lag is decided late, and the others carry the track.
    events = _stream(sc, path)
    codes = np.array([c for t, n, c, e, s in events if n == f.target and f.from_s <= t < f.to_s])
    assert len(codes) > 100 and np.all(codes == D.LATE)
    err = np.array([(t, e, s) for t, n, c, e, s in events if t >= SETTLE_S])
    assert np.all(np.isfinite(err[:, 1:])) and np.all(np.abs(err[:, 1]) < ERROR_BOUND_M)
    r.record("clock_jump (-0.5 s)", f"streamed: {len(codes)} readings of {f.target} late")


def test_clock_jump_forward_does_not_corrupt_the_track(tmp_path):
    path = _path("clock_jump")
    sc = _variant(path, "jump_s = -0.5", "jump_s = 0.5")
    f = sc.faults[0]
    r = Replayed(sc, tmp_path, "clock_jump_fwd")
    _common_checks(r)
    events = _stream(sc, path)
    err = np.array([(t, e, s) for t, n, c, e, s in events if t >= SETTLE_S])
    assert np.all(np.isfinite(err[:, 1:])) and np.all(np.abs(err[:, 1]) < ERROR_BOUND_M)
    others = np.array([c for t, n, c, e, s in events if n != f.target and f.from_s <= t < f.to_s])
    late = np.mean(others == D.LATE)
    # The jumped sensor is caught at the first reading of another sensor that would have
    # been late behind it (common practice, no source: one clock per log, so the sensor
    # that leapt alone is the one to doubt); the others keep the track.
    assert late == 0.0
    mine = np.array([c for t, n, c, e, s in events if n == f.target and f.from_s <= t < f.to_s])
    ahead = np.mean(mine == D.CLOCK_AHEAD)
    assert ahead > 0.95
    # and once its clock is back, it is back in step
    after = [c for t, n, c, e, s in events if n == f.target and f.to_s + 0.1 <= t < f.to_s + 2]
    assert after and D.CLOCK_AHEAD not in after
    r.record("clock_jump (+0.5 s, variant)",
             f"streamed: {100 * late:.0f} % of the other sensors' readings late; "
             f"{100 * ahead:.1f} % of {f.target}'s decided clock_ahead")


def test_repeat_probability_matches_a_simulated_quantiser():
    """The closed form of `repeat_probability` against the quantisation model it rests
    on, simulated (Widrow & Kollar, Quantization Noise, 2008, ch. 4-5, from memory:
    uniform grid offset, Gaussian noise)."""
    from fusion.screening import repeat_probability, stuck_limit
    rng = np.random.default_rng(3)
    for ratio in (0.3, 0.7, 2.0, 17.5):
        x = rng.uniform(0.0, 1.0, 400_000)
        a = np.round(x + ratio * rng.standard_normal(x.size))
        b = np.round(x + ratio * rng.standard_normal(x.size))
        assert repeat_probability(ratio, 1.0) == pytest.approx(np.mean(a == b), abs=4e-3)
    # a noiseless or unquantised value cannot be judged: the screen stays off
    assert stuck_limit(repeat_probability(0.0, 1.0)) == 0
    assert stuck_limit(repeat_probability(1.0, 0.0)) == 0


def _fault_summary(kind, tmp_path):
    """Simulate a fault scenario, replay it; ``(scenario, its fault, summary text)``."""
    sc = load_scenario(_path(kind))
    log = tmp_path / f"{kind}.h5"
    write_simulated(log, simulate(sc))
    return sc, sc.faults[0], run(log, out=tmp_path / f"{kind}.track.h5").summary()


def test_the_replay_summary_says_when_a_sensor_fell_silent_and_when_air_was_stale(tmp_path):
    # the dead fault: echo_b neither pings nor reports from 8 s to 13 s
    sc, f, text = _fault_summary("dead", tmp_path)
    line = next(x for x in text.splitlines() if "was silent" in x)
    gap, start = (float(v) for v in
                  line.split("silent for ")[1].replace(" s from ", " ").rstrip(" s").split())
    assert line.startswith(f.target) and abs(start - f.from_s) < 0.2
    assert abs(gap - (f.to_s - f.from_s)) < 0.2
    # the temperature fault: samples fail from from_s; the fallback starts once the last
    # good one is older than stale_after_s
    sc, f, text = _fault_summary("temp_fail", tmp_path)
    line = next(x for x in text.splitlines() if "fallback" in x)
    lo = float(line.split("between ")[1].split(" s")[0])
    assert f.from_s + sc.rig.air.stale_after_s - 1.0 < lo < f.to_s
