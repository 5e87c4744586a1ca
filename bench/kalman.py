"""Kalman pipeline throughput: compiled core against the same recursion on filterpy.

A two-ranger log (one IR triangulation ranger in ADC counts and one echo ranger on one
direction, synthetic, about 10^6 readings) goes through

* the compiled path: `fusion.Fuser.process` fed 65 536 readings at a time (decode,
  screening and the compiled kernel), and the kernel alone (`Fuser.run_prepared` on
  events prepared beforehand);
* the baseline: the same events (decoded and screened by the same `Fuser.prepare`, which is
  not what is being compared) through `_common.FilterpyKalman`, the kernel's recursion
  ported line by line to Python on filterpy's ``KalmanFilter``. It runs on the first
  whole trajectory cycles only (it is slow) and is normalised per reading. Before any
  ratio is printed the baseline's decisions and ranges are compared with the compiled
  run on the same events.

Also: numba's compile time (first call in a fresh interpreter with an empty cache) and
the first-call latency with the cache warm (another fresh interpreter).

Run: ``python bench/kalman.py [--quick]``. Figures only; nothing is asserted.
"""
from __future__ import annotations

import argparse
import tempfile
import time

import numpy as np

import _common as C
from fusion.fuser import Fuser

_CYCLE_READINGS = int(C.CYCLE_S * C.READINGS_PER_S)  # readings in one trajectory cycle

_COMPILE_PROBE = """
import json, time
t0 = time.perf_counter()
import numpy as np
import _common as C
from fusion.fuser import Fuser
t1 = time.perf_counter()
rig = C.two_ranger_rig()
d = C.synth_block(rig, 0.0, 2.0)
f = Fuser(rig)
f.push_air(*d["air"])
t2 = time.perf_counter()
f.process(d["readings"])
t3 = time.perf_counter()
f.process(C.synth_block(rig, 2.0, 4.0)["readings"])
t4 = time.perf_counter()
f.push("echo_front", 4.1, 0.003)
t5 = time.perf_counter()
print(json.dumps({"import_s": t1 - t0, "first_s": t3 - t2, "second_s": t4 - t3,
                  "push_s": t5 - t4}))
"""


def compile_times():
    with tempfile.TemporaryDirectory(prefix="rangefuse-numba-") as cache:
        env = {"NUMBA_CACHE_DIR": cache}
        cold = C.run_python(_COMPILE_PROBE, env)
        warm = C.run_python(_COMPILE_PROBE, env)
    return cold, warm


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="a short run (about 15 s)")
    ap.add_argument("--readings", type=int, help="readings for the compiled path "
                    "(default 1 000 000; 200 000 with --quick)")
    ap.add_argument("--cycles", type=int, help="trajectory cycles (of %d readings) for the "
                    "baseline (default 5; 1 with --quick)" % _CYCLE_READINGS)
    ap.add_argument("--repeat", type=int, default=5, help="timed repeats of the compiled path")
    args = ap.parse_args(argv)
    n_comp = args.readings or (200_000 if args.quick else 1_000_000)
    n_base = _CYCLE_READINGS * (args.cycles or (1 if args.quick else 5))
    C.header("Kalman pipeline: compiled core versus filterpy", args.quick)

    rig = C.two_ranger_rig()
    t0 = time.perf_counter()
    data = C.synth_readings(rig, n_comp)
    t_gen = time.perf_counter() - t0
    readings, air = data["readings"], data["air"]
    n = sum(len(v[0]) for v in readings.values())
    pieces = C.chunks(readings)
    print(f"log: {n:,} readings (IR counts at {C.IR_RATE_HZ:g} Hz, echo every "
          f"{1e3 * C.ECHO_PERIOD_S:g} ms) over {n / C.READINGS_PER_S / 3600:.2f} h, "
          f"generated in {t_gen:.1f} s; {len(pieces)} chunks of about {C.CHUNK} readings")

    # compile (or load from numba's cache) before anything is timed
    warm = Fuser(rig)
    warm.push_air(*air)
    warm.process(C.head(readings, 500))

    # Fuser.process is prepare + run_prepared; both phases are timed inside the same
    # chunked run, so the kernel reads events that its chunk's decode left in cache, as
    # it does in replay. Each chunk's results are dropped once its codes are kept (as
    # replay does after writing them): holding every StepBatch would time the page
    # faults of a growing heap.
    def pipeline():
        f = Fuser(rig)
        f.push_air(*air)
        clocks = np.zeros((2, 2))  # phase x (wall, cpu)
        out = []
        for p in pieces:
            c0, t0 = time.process_time(), time.perf_counter()
            prep = f.prepare(p)
            c1, t1 = time.process_time(), time.perf_counter()
            out.append(f.run_prepared(prep).code)
            c2, t2 = time.process_time(), time.perf_counter()
            clocks += [[t1 - t0, c1 - c0], [t2 - t1, c2 - c1]]
        return np.concatenate(out), clocks

    runs = [C.timed(pipeline, 1) for _ in range(args.repeat)]
    tp = C.Timing([r[0].wall[0] for r in runs], [r[0].cpu[0] for r in runs])
    codes = runs[0][1][0]
    td = C.Timing([r[1][1][0, 0] for r in runs], [r[1][1][0, 1] for r in runs])
    tk = C.Timing([r[1][1][1, 0] for r in runs], [r[1][1][1, 1] for r in runs])
    del runs
    print(f"decisions (compiled, all readings): {C.decision_mix(codes)}")

    # --- the baseline, on the first whole cycles ---------------------------------------
    part = C.head(readings, n_base)
    fb = Fuser(rig)
    fb.push_air(*air)
    tdb, prep = C.timed(lambda: fb.prepare(part), 1)
    nb = len(prep["sensor"])
    ref = Fuser(rig).run_prepared(prep)
    tkb, _ = C.timed(lambda: Fuser(rig).run_prepared(prep), args.repeat)
    tb, base = C.timed(lambda: C.FilterpyKalman(Fuser(rig)).run_prepared(prep), 1)
    agree = C.agreement(ref, base)
    print(f"decisions (baseline slice, {nb:,} readings = {nb / _CYCLE_READINGS:.1f} cycles): "
          f"{C.decision_mix(ref.code)}")
    print()
    print(f"baseline agreement on its {agree['n']:,} readings: identical decisions "
          f"{100 * agree['decisions_equal']:.3f} % ({agree['n_decisions_differ']} differ), "
          f"identical branch {100 * agree['branch_equal']:.3f} % of fused readings, max |range "
          f"difference| {agree['max_range_diff_m']:.2e} m, max |sigma difference| "
          f"{agree['max_sigma_diff_m']:.2e} m, state present/absent mismatches "
          f"{agree['state_nan_mismatch']}")
    equal_work = agree["decisions_equal"] == 1.0 and agree["max_range_diff_m"] < 1e-9
    if not equal_work:
        print("  WARNING: the baseline does not reproduce the kernel (has _kernels.py changed?);"
              " the ratios below do not compare equal work")
    print()

    us = lambda s, k: 1e6 * s / k  # noqa: E731

    def row(label, k, t, fmt="{:.3f}"):
        return [label, f"{k:,}", f"{t.best:.3f}", f"{t.median:.3f}" if len(t.wall) > 1 else "",
                f"{t.cpu_best:.3f}", fmt.format(us(t.best, k)), fmt.format(us(t.cpu_best, k)),
                f"{k / t.best:,.0f}"]

    tbt = C.Timing([tdb.best + tb.best], [tdb.cpu_best + tb.cpu_best])
    rows = [row("compiled Fuser.process (decode + screen + kernel)", n, tp),
            row("  of which prepare (decode + screen)", n, td),
            row("  of which run_prepared (kernel)", n, tk),
            row("compiled run_prepared on the baseline slice", nb, tkb),
            row("baseline prepare (the same Fuser.prepare)", nb, tdb),
            row("baseline filterpy recursion", nb, tb, "{:.2f}"),
            row("baseline total", nb, tbt, "{:.2f}")]
    print(C.table(rows, ["path", "readings", "best s", "median s", "CPU s", "us/reading",
                         "CPU us/reading", "readings/s"]))
    print()

    def ratio(label, num, den, k_num, k_den):
        wall = us(num.best, k_num) / us(den.best, k_den)
        cpu = us(num.cpu_best, k_num) / us(den.cpu_best, k_den)
        print(f"ratio, {label}: {wall:,.0f}x wall-clock, {cpu:,.0f}x CPU  "
              f"[target >= 200x: {C.verdict(min(wall, cpu) >= 200 and equal_work)}]")

    ratio("whole pipeline per reading (baseline total / compiled Fuser.process)", tbt, tp, nb, n)
    ratio("recursion alone per reading (filterpy loop / run_prepared)", tb, tk, nb, n)
    ratio("recursion alone, both on the baseline slice", tb, tkb, nb, nb)
    rate, rate_cpu = n / tp.best, n / tp.cpu_best
    print(f"compiled readings/s including decode and screening: {rate:,.0f} wall-clock, "
          f"{rate_cpu:,.0f} per CPU second  [target >= 2,000,000 on one core: "
          f"{C.verdict(min(rate, rate_cpu) >= 2e6)}]")
    print()

    cold, warmc = compile_times()
    print("numba, fresh interpreter per line (import = numpy, numba and fusion; first call = "
          "the first Fuser.process of 2 s of readings):")
    print(C.table([
        ["empty cache (compile)", f"{cold['import_s']:.2f}", f"{cold['first_s']:.2f}",
         f"{1e3 * cold['second_s']:.1f}", f"{1e3 * cold['push_s']:.2f}"],
        ["warm cache (load)", f"{warmc['import_s']:.2f}", f"{warmc['first_s']:.2f}",
         f"{1e3 * warmc['second_s']:.1f}", f"{1e3 * warmc['push_s']:.2f}"]],
        ["numba cache", "import s", "first call s", "second call ms", "then push ms"]))


if __name__ == "__main__":
    main()
