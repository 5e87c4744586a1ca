"""Shared pieces of the benchmark scripts: the machine report, timing, the bench rigs,
synthetic and simulated logs, and the filterpy baseline of the Kalman kernel.

Nothing here asserts anything: the scripts print figures and ratios against baselines
measured in the same run.

The baseline (`FilterpyKalman`) is the recursion of
`fusion.estimators._kernels.kalman_run` ported line by line to Python on filterpy's
``KalmanFilter`` (``predict`` and ``update`` per reading, F and Q set per time step, R
per reading): the same gate, the same near-zone Gaussian sum (components, the outlier
hypothesis, pruning, merging), the same re-acquisition and the same decisions. The
scripts check that it reproduces the compiled decisions and ranges before they print a
ratio, so the ratio compares equal work.

References
----------
R. E. Kalman, "A new approach to linear filtering and prediction problems", J. Basic
Eng. 82, 35-45 (1960).
Y. Bar-Shalom, X. R. Li, T. Kirubarajan, *Estimation with Applications to Tracking and
Navigation*, Wiley (2001), §5.2 (Joseph form), §5.4 (NIS gate), §6.2 (white-acceleration
model).
D. L. Alspach, H. W. Sorenson, "Nonlinear Bayesian estimation using Gaussian sum
approximations", IEEE Trans. Automatic Control 17(4), 439-448 (1972).
"""
from __future__ import annotations

import hashlib
import json
import math
import os
import platform
import subprocess
import sys
import tempfile
import time

import numpy as np

BENCH_DIR = os.path.dirname(os.path.abspath(__file__))
REPO = os.path.dirname(BENCH_DIR)
# The repository goes first: bench/replay.py and bench/tune.py must not shadow the
# `replay` package (the script's own folder is sys.path[0]).
sys.path[:] = [REPO] + [p for p in sys.path if os.path.abspath(p or os.curdir) != REPO]

from fusion.rig import Rig  # noqa: E402
from fusion.sensors.adc import volts_to_counts  # noqa: E402
from fusion.estimators import _kernels as K  # noqa: E402

CHUNK = 65536  # readings per Fuser.process call, the log reader's chunk


# --------------------------------------------------------------------------------------
# The machine and the clock
# --------------------------------------------------------------------------------------
def _version(mod):
    try:
        return __import__(mod).__version__
    except Exception:  # a missing optional package is reported, not fatal
        return "absent"


def machine_report() -> str:
    """Cores, CPU model, load and library versions, for the head of every report."""
    model = platform.processor() or "?"
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as fh:
            for line in fh:
                if line.startswith("model name"):
                    model = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    try:
        usable = len(os.sched_getaffinity(0))
    except AttributeError:
        usable = os.cpu_count()
    try:
        load = "load average %.2f %.2f %.2f" % os.getloadavg()
    except OSError:
        load = "load average ?"
    blas = ", ".join(f"{k}={os.environ[k]}" for k in ("OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE")
                     if k in os.environ)
    lines = [f"machine: {os.cpu_count()} CPUs ({usable} usable), {model}; {load}",
             f"python {platform.python_version()}, numpy {_version('numpy')}, numba "
             f"{_version('numba')}, scipy {_version('scipy')}, filterpy {_version('filterpy')}, "
             f"h5py {_version('h5py')}" + (f"; {blas}" if blas else "")]
    return "\n".join(lines)


def header(title: str, quick: bool) -> None:
    print(f"== {title}{' (--quick)' if quick else ''}")
    print(machine_report())
    print("Figures only; nothing is asserted. The machine is shared: a time is the best "
          "wall-clock of the repeats (median and process CPU time beside it where shown).")
    print()


class Timing:
    """Wall-clock and CPU seconds of repeated runs of one thing."""

    def __init__(self, wall, cpu):
        self.wall = list(wall)
        self.cpu = list(cpu)

    @property
    def best(self) -> float:
        return min(self.wall)

    @property
    def median(self) -> float:
        return float(np.median(self.wall))

    @property
    def cpu_best(self) -> float:
        return min(self.cpu)


def timed(fn, repeat=3):
    """Run ``fn()`` `repeat` times; returns ``(Timing, last_result)``.

    The best wall-clock time is the figure (on a shared machine other work only ever
    adds time); the process CPU time is kept beside it because it is less disturbed by
    other developers' jobs on the same cores.
    """
    wall, cpu, out = [], [], None
    for _ in range(max(1, repeat)):
        out = None  # let the last result go before the next run allocates its own
        c0, t0 = time.process_time(), time.perf_counter()
        out = fn()
        wall.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
    return Timing(wall, cpu), out


def table(rows, headers) -> str:
    """A plain text table; columns are right-aligned except the first."""
    cells = [[str(h) for h in headers]] + [[str(c) for c in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(headers))]
    out = []
    for k, r in enumerate(cells):
        out.append("  " + "  ".join(c.ljust(widths[i]) if i == 0 else c.rjust(widths[i])
                                    for i, c in enumerate(r)))
        if k == 0:
            out.append("  " + "  ".join("-" * w for w in widths))
    return "\n".join(out)


def verdict(ok: bool) -> str:
    return "PASS" if ok else "MISS"


def workdir(sub: str) -> str:
    """A folder under the system temp dir that the bench scripts share (logs are cached
    there by content, so `tune.py` reuses the log `replay.py` simulated)."""
    d = os.path.join(tempfile.gettempdir(), "rangefuse-bench", sub)
    os.makedirs(d, exist_ok=True)
    return d


def rss_mb_of_self() -> float:
    import resource
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: KiB


def run_python(code: str, env_extra=None, timeout=900) -> dict:
    """Run `code` in a fresh interpreter (bench dir on the path); it prints one JSON line
    last, which is returned."""
    env = dict(os.environ)
    env.update(env_extra or {})
    env["PYTHONPATH"] = os.pathsep.join([REPO, BENCH_DIR, env.get("PYTHONPATH", "")])
    p = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                       timeout=timeout)
    if p.returncode != 0:
        raise RuntimeError(f"subprocess failed ({p.returncode}):\n{p.stderr[-3000:]}")
    return json.loads(p.stdout.strip().splitlines()[-1])


# --------------------------------------------------------------------------------------
# The two-ranger bench rig and its synthetic readings
# --------------------------------------------------------------------------------------
# One IR triangulation ranger (10-bit counts, peak at 0.165 m, valid to 1.2 m) and one
# echo ranger (host-timed, short 5 cm blanking so it can settle the near-zone fold-back,
# pings logged) on one direction.
TWO_RANGER_RIG = """\
name = "bench-two-ranger"

[air]
stream = "air_temp"
relative_humidity = 0.5
temp_sigma_c = 0.3

[[direction]]
name = "front"

[[sensor]]
name = "ir_front"
kind = "triangulation"
direction = "front"
output = "counts"
adc_bits = 10
adc_vref = 5.0
volts_sigma = 0.012
hold_s = 0.032
near_min_m = 0.02

[sensor.curve]
model = "saturating-inverse"
A_vm = 0.80
b_m = 0.11
lam_m = 0.115
p = 2.05
offset_v = 0.06
min_range_m = 0.15
max_range_m = 1.2

[[sensor]]
name = "echo_front"
kind = "echo"
direction = "front"
output = "echo_time"
min_range_m = 0.05
max_range_m = 3.0
sigma_m = 0.003
sigma_frac = 0.002
tick_s = 1e-6
ping_logged = true
"""

# The truth repeats every CYCLE_S: a dwell in the overlap zone (where the steady-state
# sigma is compared between the start and the end of a long run), the near zone below the
# IR peak, inside the echo blanking, and the far zone that only the echo ranger reaches.
CYCLE_S = 60.0
CYCLE_WAYPOINTS = [(0.0, 0.5), (8.0, 0.5), (16.0, 0.10), (22.0, 0.10), (26.0, 0.04),
                   (30.0, 0.04), (36.0, 0.30), (44.0, 2.2), (52.0, 2.2), (60.0, 0.5)]
STEADY_WINDOW_S = (3.0, 8.0)   # inside the first dwell, after the approach has settled
IR_RATE_HZ = 50.0              # host sampling of the IR output
IR_TRUE_HOLD_S = 0.0326        # the unit's real cycle (the rig says a nominal 0.032 s)
ECHO_PERIOD_S = 0.05
READINGS_PER_S = IR_RATE_HZ + 1.0 / ECHO_PERIOD_S


def two_ranger_rig() -> Rig:
    return Rig.from_toml(TWO_RANGER_RIG, where="<bench two-ranger rig>")


def cycle_truth(t_s) -> np.ndarray:
    """The periodic bench trajectory (smooth waypoints), metres."""
    from replay.scenario import Profile
    tk, vk = zip(*CYCLE_WAYPOINTS)
    return Profile(tuple(tk), tuple(vk), "smooth").at(np.mod(t_s, CYCLE_S))


def air_truth(t_s) -> np.ndarray:
    return 20.0 + 2.0 * np.sin(2 * np.pi * np.asarray(t_s) / 3600.0)


def synth_block(rig: Rig, t0: float, t1: float, seed: int = 0) -> dict:
    """Synthetic readings of the two-ranger rig with times in ``[t0, t1)``.

    Vectorised and deterministic per (seed, t0): IR counts through the unit's curve with
    output noise, its sample-and-hold and the 10-bit ADC; echo round trips through
    `EchoRanger.encode` at the true air with range noise, 3 % dropouts, 0.5 % late ghost
    echoes and nothing heard inside the blanking or beyond the maximum range. A hold
    cycle straddling two blocks gets fresh noise in the second (one extra distinct sample
    per block, negligible).

    Returns
    -------
    dict
        ``readings`` (sensor -> (t_s, raw, ping_t_s)), ``air`` (t_s, temp_c) at 1 Hz and
        ``truth`` (t_s, range_m) at 20 Hz.
    """
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), int(round(t0 * 1000))]))
    ir = rig.sensors["ir_front"]
    echo = rig.sensors["echo_front"]
    out = {}
    # IR: host samples, each seeing the last measurement the unit made.
    k0, k1 = math.ceil(t0 * IR_RATE_HZ), math.ceil(t1 * IR_RATE_HZ)
    t = np.arange(k0, k1) / IR_RATE_HZ
    m = np.floor(t / IR_TRUE_HOLD_S).astype(np.int64)
    um, inv = np.unique(m, return_inverse=True)
    r = cycle_truth(um * IR_TRUE_HOLD_S)
    v = ir.curve.volts(r) + ir.volts_sigma * rng.standard_normal(um.size)
    floor = 0.5 * float(ir.curve.volts(ir.curve.max_range_m))
    far = r > 1.4  # beyond the unit's reach: a noisy floor
    v = np.where(far, floor + ir.volts_sigma * rng.standard_normal(um.size), v)
    counts = volts_to_counts(np.maximum(v, 0.0), ir.adc_bits, ir.adc_vref).astype(float)
    out["ir_front"] = (t, counts[inv], None)
    # Echo: pings, their echoes, encoded as the unit's host timer reads them.
    j0, j1 = math.ceil(t0 / ECHO_PERIOD_S), math.ceil(t1 / ECHO_PERIOD_S)
    p = np.arange(j0, j1) * ECHO_PERIOD_S + 0.004
    r = cycle_truth(p)
    n = p.size
    sig = np.hypot(echo.sigma_m, echo.sigma_frac * r)
    rn = np.maximum(r + sig * rng.standard_normal(n), 0.0)
    ghost = rng.random(n) < 0.005
    rn = rn + ghost * rng.uniform(0.3, 1.0, n)
    heard = (r >= echo.min_range_m) & (r <= echo.max_range_m) & (rng.random(n) >= 0.03)
    temp = air_truth(p)
    tof = echo.encode(rn, temp, 0.5)
    heard &= tof < echo.timeout_s
    raw = np.where(heard, tof, 0.0)
    out["echo_front"] = (p + np.where(heard, tof, echo.timeout_s), raw, p)
    ta = np.arange(math.ceil(t0), math.ceil(t1), dtype=float)
    air = (ta, air_truth(ta) + 0.05 * rng.standard_normal(ta.size))
    tt = np.arange(math.ceil(t0 * 20), math.ceil(t1 * 20)) / 20.0
    return {"readings": out, "air": air, "truth": (tt, cycle_truth(tt))}


def synth_readings(rig: Rig, n_readings: int, seed: int = 0, block_s: float = 3600.0):
    """About `n_readings` synthetic readings, generated block by block; returns the dict of
    `synth_block` for the whole span."""
    span = n_readings / READINGS_PER_S
    parts = [synth_block(rig, a, min(a + block_s, span), seed)
             for a in np.arange(0.0, span, block_s)]
    readings = {}
    for name in parts[0]["readings"]:
        t = np.concatenate([p["readings"][name][0] for p in parts])
        raw = np.concatenate([p["readings"][name][1] for p in parts])
        ping = None if parts[0]["readings"][name][2] is None else \
            np.concatenate([p["readings"][name][2] for p in parts])
        readings[name] = (t, raw, ping)
    cat = lambda key, i: np.concatenate([p[key][i] for p in parts])  # noqa: E731
    return {"readings": readings, "air": (cat("air", 0), cat("air", 1)),
            "truth": (cat("truth", 0), cat("truth", 1))}


def chunks(readings: dict, size: int = CHUNK) -> list:
    """Split per-sensor readings into time-ordered chunks of about `size` readings (all
    sensors), as a log reader hands them to `Fuser.process`."""
    names = list(readings)
    t_all = np.concatenate([readings[n][0] for n in names])
    edges = np.sort(t_all)[size::size]
    out = []
    lo = {n: 0 for n in names}
    for e in list(edges) + [np.inf]:
        piece = {}
        for n in names:
            t, raw, ping = readings[n]
            hi = int(np.searchsorted(t, e, side="left"))
            if hi > lo[n]:
                piece[n] = (t[lo[n]:hi], raw[lo[n]:hi]) + (() if ping is None
                                                           else (ping[lo[n]:hi],))
            lo[n] = hi
        if piece:
            out.append(piece)
    return out


def head(readings: dict, n: int) -> dict:
    """The first `n` readings in time order (all sensors together)."""
    t_all = np.sort(np.concatenate([v[0] for v in readings.values()]))
    cut = t_all[min(n, t_all.size) - 1]
    out = {}
    for name, (t, raw, *rest) in readings.items():
        k = int(np.searchsorted(t, cut, side="right"))
        ping = rest[0] if rest else None
        out[name] = (t[:k], raw[:k]) + (() if ping is None else (ping[:k],))
    return out


def write_synth_log(path: str, n_readings: int, seed: int = 0, truth: bool = True) -> int:
    """Write a synthetic two-ranger log of about `n_readings` readings (with ground truth
    at 20 Hz unless `truth` is false); returns the number of readings written."""
    from replay.logfile import SensorStream, write_log
    rig = two_ranger_rig()
    d = synth_readings(rig, n_readings, seed)
    streams = [SensorStream(name, rig.sensors[name].kind, rig.sensors[name].output, t, raw,
                            ping) for name, (t, raw, ping) in d["readings"].items()]
    write_log(path, TWO_RANGER_RIG, streams, {"air_temp": ("air_temperature", *d["air"])},
              {"front": d["truth"]} if truth else None,
              clock="seconds since the start of the synthetic run",
              writer="rangefuse bench", created_utc="2000-01-01T00:00:00+00:00")
    return sum(len(s.t_s) for s in streams)


# --------------------------------------------------------------------------------------
# The one-hour, four-sensor simulated log
# --------------------------------------------------------------------------------------
FOUR_SENSOR_RIG = """\
# Two directions, an IR triangulation ranger and an echo ranger on each; the echo rangers
# free-run on different periods, so they hear each other (pings are logged).
name = "bench-two-directions"

[air]
stream = "air_temp"
relative_humidity = 0.5
temp_sigma_c = 0.3

[schedule]
mode = "free"

[[direction]]
name = "front"

[[direction]]
name = "left"

[[sensor]]
name = "ir_front"
kind = "triangulation"
direction = "front"
output = "counts"
adc_bits = 10
adc_vref = 5.0
volts_sigma = 0.012
hold_s = 0.032
near_min_m = 0.02

[sensor.curve]
model = "saturating-inverse"
A_vm = 0.80
b_m = 0.11
lam_m = 0.115
p = 2.05
offset_v = 0.06
min_range_m = 0.15
max_range_m = 1.2

[[sensor]]
name = "echo_front"
kind = "echo"
direction = "front"
output = "echo_time"
min_range_m = 0.06
max_range_m = 4.0
sigma_m = 0.003
sigma_frac = 0.002
tick_s = 1e-6
ping_logged = true

[[sensor]]
name = "ir_left"
kind = "triangulation"
direction = "left"
output = "counts"
adc_bits = 12
adc_vref = 3.3
volts_sigma = 0.008
hold_s = 0.025

[sensor.curve]
model = "saturating-inverse"
A_vm = 0.21
b_m = 0.025
lam_m = 0.038
p = 1.7
offset_v = 0.03
min_range_m = 0.05
max_range_m = 0.5

[[sensor]]
name = "echo_left"
kind = "echo"
direction = "left"
output = "serial"
compensation = "self"
min_range_m = 0.08
max_range_m = 2.5
sigma_m = 0.004
sigma_frac = 0.003
frame_unit_m = 0.001
ping_logged = true
"""


def _waypoints(pattern, period, duration):
    out = []
    for k in range(int(math.ceil(duration / period))):
        for t, r in pattern:
            tt = k * period + t
            if out and tt <= out[-1][0]:
                continue
            if tt <= duration:
                out.append((tt, r))
    return "[" + ", ".join(f"[{t:g}, {r:g}]" for t, r in out) + "]"


def hour_scenario(duration_s: float = 3600.0) -> str:
    """Scenario text: the four-sensor rig for `duration_s` (IR sampled at 80 Hz, echo
    pings every 60/63 ms: about 193 readings a second, 700 000 an hour)."""
    front = [(0, 2.5), (20, 2.5), (50, 0.6), (70, 0.3), (85, 0.1), (95, 0.1), (110, 0.8),
             (120, 2.5)]
    left = [(0, 0.36), (15, 0.34), (18, 0.85), (28, 0.85), (31, 0.33), (42, 0.07),
            (48, 0.07), (56, 0.30), (60, 0.36)]
    return f"""\
name = "bench-hour"
description = "one hour, two directions, IR + echo each (benchmark)"
rig = "bench-hour.rig.toml"
duration_s = {duration_s:g}
seed = 7070
truth_rate_hz = 100.0
created_utc = "2000-01-01T00:00:00+00:00"

[air]
temp_c = [[0, 18.0], [{duration_s:g}, 23.0]]
relative_humidity = 0.5

[air.sensor]
rate_hz = 1.0
noise_c = 0.05
lag_s = 10.0

[[target]]
direction = "front"
interpolation = "smooth"
waypoints = {_waypoints(front, 120.0, duration_s)}

  [[target.step]]
  from_s = 600.0
  to_s = 610.0
  range_m = 0.9

[[target]]
direction = "left"
interpolation = "smooth"
waypoints = {_waypoints(left, 60.0, duration_s)}

[sensor.ir_front]
rate_hz = 80.0
hold_s = 0.0326
hold_phase_s = 0.011

[sensor.ir_left]
rate_hz = 80.0
hold_s = 0.0252
hold_phase_s = 0.007

[sensor.echo_front]
ping_period_s = 0.06
ping_phase_s = 0.0
multipath_p = 0.01
multipath_extra_m = [0.4, 1.5]
crosstalk_p = 0.3

[sensor.echo_left]
ping_period_s = 0.063
ping_phase_s = 0.021
multipath_p = 0.02
multipath_extra_m = [0.2, 0.9]
crosstalk_p = 0.3
"""


def hour_log(duration_s: float = 3600.0, reuse: bool = False) -> dict:
    """Simulate the four-sensor scenario into a log in the bench's temp folder.

    The scenario and rig files are written beside the log (the folder is named by their
    content). With `reuse`, an existing log of the same content is used as it is.

    Returns
    -------
    dict
        ``path``, ``simulate_s`` and ``write_s`` (NaN when reused), ``reused``.
    """
    from replay.simulate import simulate, write_simulated
    text = hour_scenario(duration_s)
    key = hashlib.sha256((text + FOUR_SENSOR_RIG).encode()).hexdigest()[:12]
    d = workdir(f"hour-{key}")
    log = os.path.join(d, "bench-hour.h5")
    sc = os.path.join(d, "bench-hour.scenario.toml")
    with open(os.path.join(d, "bench-hour.rig.toml"), "w", encoding="utf-8") as fh:
        fh.write(FOUR_SENSOR_RIG)
    with open(sc, "w", encoding="utf-8") as fh:
        fh.write(text)
    if reuse and os.path.exists(log):
        return {"path": log, "simulate_s": math.nan, "write_s": math.nan, "reused": True}
    t0 = time.perf_counter()
    run = simulate(sc)
    t1 = time.perf_counter()
    write_simulated(log, run)
    return {"path": log, "simulate_s": t1 - t0, "write_s": time.perf_counter() - t1,
            "reused": False}


def until(readings: dict, t_end: float) -> dict:
    """The readings with times before `t_end` (each sensor's rows are in time order)."""
    out = {}
    for name, (t, raw, *rest) in readings.items():
        k = int(np.searchsorted(t, t_end, side="left"))
        ping = rest[0] if rest else None
        out[name] = (t[:k], raw[:k]) + (() if ping is None else (ping[:k],))
    return out


def read_all(path: str):
    """Every reading, the environment and truth of a log, for `Fuser.prepare`."""
    from replay.logfile import open_log
    with open_log(path) as log:
        rig = Rig.from_toml(log.rig_toml, where=path)
        readings = log.readings()
        env = log.environment_for(rig)
        truth = {d: log.truth(d) for d in rig.directions}
    return rig, readings, env, truth


# --------------------------------------------------------------------------------------
# The baseline: the same recursion in Python on filterpy
# --------------------------------------------------------------------------------------
def _outlier_density(outl, suspect, z, sg, infl, kf):
    """The kernel's `_outlier_density` on one filterpy component."""
    if not suspect:
        return outl
    c = 0 if not math.isnan(z[0]) else 1
    S = kf.P[0, 0] + sg[c] * sg[c] * infl
    return outl + K.XT_DENS * 0.5 * math.erfc((z[c] - kf.x[0, 0]) / math.sqrt(2.0 * S))


class FilterpyKalman:
    """`fusion.estimators._kernels.kalman_run`, ported line by line to filterpy.

    Every Gaussian-sum component is a ``filterpy.kalman.KalmanFilter``; each reading
    predicts them with ``predict()`` (F and Q of the white-acceleration model set for the
    step), tries each range candidate against the chi-square NIS gate, and updates a
    child copy with ``update(z, R=r)`` (filterpy's update is the Joseph form, as the
    kernel's). The outlier hypothesis, pruning, merging, re-acquisition, the held-sample
    test, the "nothing heard" weighting and the decisions are the kernel's.

    Parameters
    ----------
    fuser : fusion.Fuser
        Supplies the sensor tables and the parameter vector (its state is not touched).
    """

    def __init__(self, fuser):
        from filterpy.kalman import KalmanFilter
        self._KF = KalmanFilter
        self.kind = fuser._kind
        self.hold = fuser._hold
        self.blank = fuser._blank
        self.p_blank_drop = fuser._p_blank_drop
        self.p_drop = fuser._p_drop
        par = fuser._par
        self.q = par[K.P_Q]
        self.gate = par[K.P_GATE]
        self.K = int(par[K.P_K])
        self.prune = par[K.P_PRUNE]
        self.near_prior = par[K.P_NEAR_PRIOR]
        self.amb = par[K.P_AMB]
        self.outl = par[K.P_OUTLIER]
        self.reacq_n = int(par[K.P_REACQ_N])
        self.reacq_w = par[K.P_REACQ_W]
        self.max_lag = par[K.P_MAX_LAG]
        self.max_lead = par[K.P_MAX_LEAD]
        self.init_rate = par[K.P_INIT_RATE]
        self.merge_d2 = par[K.P_MERGE]
        self.vmax = par[K.P_VMAX]
        self.lost_var = K.LOST_SIGMA_M ** 2
        self.miss_keep = 100.0 * self.prune
        nd, ns = len(fuser.directions), len(fuser.sensor_names)
        self._dir_of = fuser._dir_of
        # One pool of filters per direction, reused: a fair filterpy user would not build
        # a new KalmanFilter for every component of every reading.
        self.pool = [[self._new_filter() for _ in range(K.MAXC)] for _ in range(nd)]
        self.comps = [[] for _ in range(nd)]      # per direction: [weight, KalmanFilter]
        self.T = [-math.inf] * nd
        self.rb = [[] for _ in range(nd)]          # rejected readings: (t, z0, z1, v0, v1)
        self.last_raw = [math.nan] * ns
        self.last_new_t = [-math.inf] * ns
        self.last_t = [-math.inf] * ns
        self.ahead = [0] * ns
        self.leap = [0] * ns
        self.t_src = [-1] * nd
        self._scratch = self._new_filter()

    def _new_filter(self):
        kf = self._KF(dim_x=2, dim_z=1)
        kf.H = np.array([[1.0, 0.0]])
        return kf

    def _put(self, d, k, x0, x1, p00, p01, p10, p11):
        # New arrays, never in place: children of the last reading still hold the old ones.
        kf = self.pool[d][k]
        kf.x = np.array([[x0], [x1]])
        kf.P = np.array([[p00, p01], [p10, p11]])
        return kf

    # --- the pieces of the kernel ---------------------------------------------------
    def _init_track(self, d, z, sg):
        has0, has1 = not math.isnan(z[0]), not math.isnan(z[1])
        comps = []
        for c in range(2):
            if math.isnan(z[c]):
                continue
            kf = self._put(d, len(comps), z[c], 0.0, sg[c] * sg[c], 0.0, 0.0,
                           self.init_rate * self.init_rate)
            if has0 and has1:
                w = self.near_prior if c == 1 else 1.0 - self.near_prior
            else:
                w = 1.0
            comps.append([w, kf])
        self.comps[d] = comps
        return len(comps)

    def _reacq_check(self, d, t):
        """`_kernels._reacq_check`: buffered entries are (t, z0, z1, v0, v1, sensor)."""
        buf = [e for e in self.rb[d] if t - e[0] <= self.reacq_w]
        self.rb[d] = buf
        n = len(buf)
        out = []
        nfew = min(self.reacq_n, 2)
        if n < nfew:
            return out
        for anchor in range(2):
            a = buf[-1][1 + anchor]
            if math.isnan(a):
                continue
            sa = math.sqrt(buf[-1][3 + anchor])
            story = []
            for e in buf:
                z0, z1 = e[1], e[2]
                best = 0
                if math.isnan(z0) or (not math.isnan(z1) and abs(z1 - a) < abs(z0 - a)):
                    best = 1
                zi, vi = e[1 + best], e[3 + best]
                reach = 3.0 * (math.sqrt(vi) + sa) + 0.01 + 0.5 * (t - e[0])
                if abs(zi - a) <= reach:
                    story.append((e[0], zi, vi, e[5]))
            others = [x[3] for x in story[1:] if x[3] != story[0][3]] if story else []
            kinds = any(self.kind[o] != self.kind[story[0][3]] for o in others)
            several = bool(others)
            need = nfew if kinds else (self.reacq_n // 2 + 1 if several else self.reacq_n)
            if len(story) < need:
                continue
            sw = st = sz = 0.0
            for tt, z, v, _s in story:
                w = 1.0 / v
                sw += w
                st += w * (tt - t)
                sz += w * z
            tm, zm = st / sw, sz / sw
            stt = stz = 0.0
            for tt, z, v, _s in story:
                w = 1.0 / v
                dt = tt - t - tm
                stt += w * dt * dt
                stz += w * dt * (z - zm)
            slope = stz / stt if stt > 0 else 0.0
            ok = abs(slope) <= self.vmax
            for tt, z, v, _s in story:
                pred = zm + slope * (tt - t - tm)
                if abs(z - pred) > 3.0 * math.sqrt(v) + 0.01:
                    ok = False
                    break
            if ok:
                # the slope weighed against the new track's prior rate, 0 +- init_rate
                r0 = self.init_rate
                prior = 1.0 / (r0 * r0) if r0 > 0 else math.inf
                if math.isinf(prior):
                    rate, var_rate = 0.0, 0.0
                else:
                    var_rate = 1.0 / (prior + stt)
                    rate = slope * stt * var_rate
                out.append((zm + rate * (0.0 - tm), rate, 1.0 / sw + tm * tm * var_rate,
                            var_rate))
        return out

    def _clock(self, code, d, s, t):
        """`_kernels._clock`, line for line."""
        if not (self.max_lead > 0.0) or math.isnan(t) or code == K.INVALID:
            return code
        ns = len(self.last_t)
        prev = self.last_t[s]
        latest = -math.inf
        for j in range(ns):
            if j != s and self.ahead[j] == 0 and self.last_t[j] > latest:
                latest = self.last_t[j]
        leap = (prev > -math.inf and t - prev > self.max_lead and latest > -math.inf
                and t - latest > self.max_lead)
        if self.ahead[s] > 0:
            if latest >= t - self.max_lead:
                self.ahead[s] = 0
                self.leap[s] = 0
                for dd in range(len(self.T)):
                    if self.t_src[dd] == s and t < self.T[dd]:
                        self.T[dd] = t
            else:
                self.ahead[s] += 1
                if self.ahead[s] > K.AHEAD_ESCAPE:
                    self.ahead[s] = 0
        elif not leap:
            for j in range(ns):
                if j != s and self.leap[j] and self.ahead[j] == 0:
                    if t < self.last_t[j] - self.max_lag:
                        self.ahead[j] = 1
                        for dd in range(len(self.T)):
                            if self.t_src[dd] == j and t < self.T[dd]:
                                self.T[dd] = t
                    else:
                        self.leap[j] = 0
        if self.ahead[s] == 0:
            if leap:
                self.leap[s] = 1
            else:
                for j in range(ns):
                    if j != s and self.ahead[j] > 0:
                        self.ahead[j] = 1
        self.last_t[s] = t
        if self.ahead[s] > 0:
            return K.CLOCK_AHEAD if code in (K.ACCEPTED, K.DROPOUT, K.OUT_OF_RANGE) else code
        if code == K.ACCEPTED and t > self.T[d]:
            self.t_src[d] = s
        return code

    @staticmethod
    def _moments(comps):
        m0 = m1 = 0.0
        for w, kf in comps:
            m0 += w * kf.x[0, 0]
            m1 += w * kf.x[1, 0]
        p00 = p01 = p11 = 0.0
        for w, kf in comps:
            d0 = kf.x[0, 0] - m0
            d1 = kf.x[1, 0] - m1
            p00 += w * (kf.P[0, 0] + d0 * d0)
            p01 += w * (kf.P[0, 1] + d0 * d1)
            p11 += w * (kf.P[1, 1] + d1 * d1)
        return m0, m1, p00, p01, p11

    # --- the recursion ----------------------------------------------------------------
    def run_prepared(self, prep) -> dict:
        """Run over the events of `fusion.Fuser.prepare`, in the kernel's order.

        Returns per-event arrays (input order): ``code``, ``branch``, ``bprob``,
        ``innov``, ``nis``, ``ll`` and ``state`` (range, rate, P00, P01, P11).
        """
        sensor, t_meas = prep["sensor"], prep["t_meas"]
        bad_t = ~np.isfinite(t_meas)
        order = _processing_order(prep)
        ev_t = np.where(bad_t, 0.0, t_meas).tolist()
        ev_dir = self._dir_of[sensor].tolist()
        ev_sensor = sensor.tolist()
        ev_z = prep["z"].tolist()
        ev_s = prep["sg"].tolist()
        ev_code = prep["code"].tolist()
        ev_flags = prep["flags"].tolist()
        ev_raw = prep["rawv"].tolist()
        n = len(order)
        o_code = np.empty(n, np.int8)
        o_branch = np.empty(n, np.int8)
        o_bprob = np.empty(n)
        o_innov = np.empty(n)
        o_nis = np.empty(n)
        o_ll = np.empty(n)
        o_state = np.empty((n, 5))
        q, gate, prune, outl, amb = self.q, self.gate, self.prune, self.outl, self.amb
        F = np.eye(2)
        Q = np.zeros((2, 2))
        LOG_2PI = K.LOG_2PI
        scratch = self._scratch
        for i in order.tolist():
            d = ev_dir[i]
            s = ev_sensor[i]
            t = ev_t[i]
            code = ev_code[i]
            flags = ev_flags[i]
            innov = nis = bprob = ll = math.nan
            branch = -1
            infl = 1.0
            comps = self.comps[d]
            code = self._clock(code, d, s, t)
            if code == K.ACCEPTED:
                if comps and t < self.T[d] - self.max_lag:
                    code = K.LATE
                elif self.kind[s] == K.KIND_IR and self.hold[s] > 0.0:
                    raw = ev_raw[i]
                    since = t - self.last_new_t[s]
                    if raw == self.last_raw[s] and since < 1.5 * self.hold[s]:
                        code = K.HELD
                    else:
                        if since < self.hold[s]:
                            infl = self.hold[s] / max(since, 1e-6)
                            flags |= K.FLAG_R_INFLATED
                        self.last_raw[s] = raw
                        self.last_new_t[s] = t
            suspect = (flags & K.FLAG_CROSSTALK_SUSPECT) != 0
            # a track whose predicted sigma would pass LOST_SIGMA_M restarts
            if code == K.ACCEPTED and comps and q * (t - self.T[d]) ** 3 / 3.0 > self.lost_var:
                self.comps[d] = comps = []
                self.rb[d] = []
            if code == K.ACCEPTED:
                z = ev_z[i]
                sg = ev_s[i]
                if not comps:
                    # any reading may start a track; re-acquisition overturns a bad start
                    nc = self._init_track(d, z, sg)
                    self.T[d] = t
                    if nc == 2:
                        code = K.AMBIGUOUS
                        branch = 0 if self.near_prior < 0.5 else 1
                        bprob = max(self.near_prior, 1.0 - self.near_prior)
                    else:
                        branch = 0 if math.isnan(z[1]) else 1
                        bprob = 1.0
                else:
                    tt = t if t > self.T[d] else self.T[d]
                    dt = tt - self.T[d]
                    nh = len(comps)
                    if dt > 0:
                        F[0, 1] = dt
                        Q[0, 0] = q * dt ** 3 / 3.0
                        Q[0, 1] = Q[1, 0] = q * dt * dt / 2.0
                        Q[1, 1] = q * dt
                        for w, kf in comps:
                            kf.predict(F=F, Q=Q)
                    self.T[d] = tt
                    # children: [weight, candidate (-1 outlier), nis, innovation, x0, x1, P]
                    ch = []
                    best_nis = math.inf
                    # Jacobian |dr/dv| of each candidate relative to the steepest one
                    smin = math.inf
                    for c in range(2):
                        if not math.isnan(z[c]) and sg[c] < smin:
                            smin = sg[c]
                    jac = [sg[c] / smin if not math.isnan(z[c]) else 0.0 for c in range(2)]
                    best_y = math.nan
                    for w, kf in comps:
                        for c in range(2):
                            if math.isnan(z[c]):
                                continue
                            r = sg[c] * sg[c] * infl
                            S = kf.P[0, 0] + r
                            y = z[c] - kf.x[0, 0]
                            e = y * y / S
                            if e < best_nis:
                                best_nis = e
                                best_y = y
                            if e <= gate:
                                # update() assigns new arrays, so sharing is safe
                                scratch.x = kf.x
                                scratch.P = kf.P
                                scratch.update(z[c], R=r)
                                cw = w * jac[c] * math.exp(-0.5 * (e + LOG_2PI + math.log(S)))
                                ch.append([cw, c, e, y, scratch.x[0, 0], scratch.x[1, 0],
                                           scratch.P])
                    if not ch:
                        innov = best_y
                        nis = best_nis
                        ll = math.log(sum(w * _outlier_density(outl, suspect, z, sg, infl, kf)
                                            for w, kf in comps))
                        code = K.CROSSTALK if suspect else K.GATED
                        buf = self.rb[d]
                        if len(buf) == K.RB:
                            buf.pop(0)
                        buf.append((t, z[0], z[1], sg[0] * sg[0], sg[1] * sg[1], s))
                        ra = self._reacq_check(d, t)
                        if ra:
                            npass = len(ra)
                            self.comps[d] = [[1.0 / npass,
                                              self._put(d, k, a[0], a[1], a[2] * self.reacq_n,
                                                        0.0, 0.0, a[3])]
                                             for k, a in enumerate(ra)]
                            self.rb[d] = []
                            code = K.REACQUIRED
                            branch = 0
                            bprob = 1.0 / npass
                    else:
                        nup = len(ch)
                        tot = 0.0
                        for c_ in ch:
                            tot += c_[0]
                        # "this reading is an outlier": each prior component stays alive
                        for w, kf in comps:
                            ch.append([w * _outlier_density(outl, suspect, z, sg, infl, kf), -1,
                                       math.nan, math.nan, kf.x[0, 0], kf.x[1, 0], kf.P])
                            tot += ch[-1][0]
                        ll = math.log(tot) if tot > 0 else -745.0
                        pb0 = pb1 = pmiss = 0.0
                        for c_ in ch:
                            c_[0] /= tot
                            if c_[1] == 0:
                                pb0 += c_[0]
                            elif c_[1] == 1:
                                pb1 += c_[0]
                            else:
                                pmiss += c_[0]
                        nchild = len(ch)
                        used = [False] * nchild
                        grp = [-1] * nchild
                        new = []
                        for slot in range(self.K):
                            bj, bw = -1, -1.0
                            for j in range(nchild):
                                cw = ch[j][0]
                                if not used[j] and cw > bw and (ch[j][1] >= 0
                                                                or cw >= self.miss_keep):
                                    bw, bj = cw, j
                            if bj < 0 or bw < prune:
                                break
                            used[bj] = True
                            cb = ch[bj]
                            wsum = cb[0]
                            m0 = cb[0] * cb[4]
                            m1 = cb[0] * cb[5]
                            for j in range(nchild):
                                if used[j]:
                                    continue
                                cj = ch[j]
                                dd = cj[4] - cb[4]
                                if dd * dd <= self.merge_d2 * (cj[6][0, 0] + cb[6][0, 0]):
                                    used[j] = True
                                    grp[j] = bj
                                    wsum += cj[0]
                                    m0 += cj[0] * cj[4]
                                    m1 += cj[0] * cj[5]
                            m0 /= wsum
                            m1 /= wsum
                            p00 = p01 = p11 = 0.0
                            for j in range(nchild):
                                if j == bj or grp[j] == bj:
                                    cj = ch[j]
                                    d0 = cj[4] - m0
                                    d1 = cj[5] - m1
                                    P = cj[6]
                                    p00 += cj[0] * (P[0, 0] + d0 * d0)
                                    p01 += cj[0] * (P[0, 1] + d0 * d1)
                                    p11 += cj[0] * (P[1, 1] + d1 * d1)
                            a01 = p01 / wsum
                            new.append([wsum, self._put(d, len(new), m0, m1, p00 / wsum,
                                                        a01, a01, p11 / wsum)])
                        ws = 0.0
                        for c_ in new:
                            ws += c_[0]
                        for c_ in new:
                            c_[0] /= ws
                        self.comps[d] = new
                        if pmiss > pb0 and pmiss > pb1:
                            code = K.CROSSTALK if suspect else K.GATED
                            innov = best_y
                            nis = best_nis
                        else:
                            self.rb[d] = []
                            branch = 0 if pb0 >= pb1 else 1
                            bprob = (pb0 if branch == 0 else pb1) / (pb0 + pb1)
                            code = K.ACCEPTED if bprob >= amb else K.AMBIGUOUS
                            bestw = -1.0
                            for j in range(nup):
                                if ch[j][1] == branch and ch[j][0] > bestw:
                                    bestw = ch[j][0]
                                    innov = ch[j][3]
                                    nis = ch[j][2]
            elif code == K.DROPOUT and self.kind[s] == K.KIND_ECHO and len(comps) > 1:
                # "Nothing heard": likely when the target is inside the blanking zone.
                ws = 0.0
                for c_ in comps:
                    kf = c_[1]
                    sd = math.sqrt(kf.P[0, 0])
                    pin = 0.5 * math.erfc(-(self.blank[s] - kf.x[0, 0]) / (sd * math.sqrt(2.0)))
                    c_[0] *= pin * self.p_blank_drop[s] + (1.0 - pin) * self.p_drop[s]
                    ws += c_[0]
                if ws > 0:
                    for c_ in comps:
                        c_[0] /= ws
                else:
                    for c_ in comps:
                        c_[0] = 1.0 / len(comps)
            o_code[i] = code
            o_branch[i] = branch
            o_bprob[i] = bprob
            o_innov[i] = innov
            o_nis[i] = nis
            o_ll[i] = ll
            comps = self.comps[d]
            if comps:
                o_state[i] = self._moments(comps)
            else:
                o_state[i] = math.nan
        return {"code": o_code, "branch": o_branch, "bprob": o_bprob, "innov": o_innov,
                "nis": o_nis, "ll": o_ll, "state": o_state}


def _processing_order(prep):
    """The order `Fuser.run_prepared` processes events in (time, then ping, then sensor)."""
    from fusion.fuser import _processing_order as order
    return order(prep["sensor"], prep["t_meas"], prep["ping"])


def agreement(batch, base) -> dict:
    """How closely the baseline reproduced the compiled run (same prepared events)."""
    same = batch.code == base["code"]
    fused = batch.code < K.FIRST_REJECT
    both = np.isfinite(batch.state[:, 0]) & np.isfinite(base["state"][:, 0])
    dr = np.abs(batch.state[:, 0] - base["state"][:, 0])[both]
    ds = np.abs(np.sqrt(batch.state[:, 2]) - np.sqrt(base["state"][:, 2]))[both]
    nan_mismatch = int(np.sum(np.isfinite(batch.state[:, 0]) != np.isfinite(base["state"][:, 0])))
    same_branch = (batch.branch == base["branch"])[fused]
    return {"n": int(same.size), "decisions_equal": float(same.mean()) if same.size else math.nan,
            "n_decisions_differ": int((~same).sum()),
            "branch_equal": float(same_branch.mean()) if same_branch.size else math.nan,
            "max_range_diff_m": float(dr.max()) if dr.size else math.nan,
            "max_sigma_diff_m": float(ds.max()) if ds.size else math.nan,
            "state_nan_mismatch": nan_mismatch}


def decision_mix(codes) -> str:
    from fusion import decisions as D
    counts = np.bincount(np.asarray(codes, np.int64), minlength=len(D.NAMES))
    n = max(int(counts.sum()), 1)
    return ", ".join(f"{D.NAMES[c]} {100 * counts[c] / n:.1f} %" for c in range(len(D.NAMES))
                     if counts[c])
