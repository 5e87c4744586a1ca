"""Particle estimator throughput: particle-updates per second on one core.

A particle-update is one particle through one reading (predict, likelihood, weight), so
the figure is ``particles x readings / seconds``; the target is 20 million per second
(2000 particles at 10 000 readings per second). Also printed: the time to compile the
kernel (in a fresh cache folder; ``--warm`` times a load from numba's cache instead) and the
latency of the first and of later single
`push` calls.

Run: ``python bench/particle.py [--particles N] [--readings M] [--warm]``. Prints figures only;
nothing is asserted.
"""
from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time

# Unless --warm, compile into a fresh cache folder so the compile time printed is real.
if "--warm" not in sys.argv:
    os.environ["NUMBA_CACHE_DIR"] = tempfile.mkdtemp(prefix="rangefuse-numba-")

import numpy as np  # noqa: E402

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from fusion.rig import EstimatorConfig, Rig  # noqa: E402
from fusion.sensors.air import speed_of_sound  # noqa: E402
from fusion.sensors.echo import EchoRanger  # noqa: E402
from fusion.sensors.ir import TriangulationRanger  # noqa: E402
from fusion.sensors.triangulation import TriangulationCurve  # noqa: E402


def _rig(n_particles, with_ir):
    sensors = {"echo": EchoRanger(name="echo", direction="front")}
    if with_ir:
        sensors["ir"] = TriangulationRanger(name="ir", direction="front",
                                            curve=TriangulationCurve.typical_10_80(),
                                            output="volts")
    est = EstimatorConfig(kind="particle", particles=n_particles, seed=7)
    return Rig(name="bench", directions=("front",), sensors=sensors, estimator=est)


def _readings(n, with_ir, rate_hz=10_000.0, seed=1):
    """A target swinging between 0.3 and 0.7 m, read by the echo ranger (and the IR
    ranger on alternate readings)."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / rate_hz
    truth = 0.5 + 0.2 * np.sin(2 * np.pi * 0.5 * t)
    c = speed_of_sound(20.0)
    if not with_ir:
        return {"echo": (t, 2 * (truth + rng.normal(0, 0.003, n)) / c)}
    curve = TriangulationCurve.typical_10_80()
    te, ti = t[0::2], t[1::2]
    return {"echo": (te, 2 * (truth[0::2] + rng.normal(0, 0.003, te.size)) / c),
            "ir": (ti, curve.volts(truth[1::2]) + rng.normal(0, 0.01, ti.size))}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--particles", type=int, default=2000)
    ap.add_argument("--readings", type=int, default=100_000)
    ap.add_argument("--warm", action="store_true",
                    help="use numba's normal cache (time a cache load, not a compile)")
    args = ap.parse_args(argv)

    t0 = time.perf_counter()
    from fusion.estimators.particle import ParticleFuser
    t_import = time.perf_counter() - t0

    # Compile (or load from cache) on a tiny batch so the timing below is the kernel alone.
    t0 = time.perf_counter()
    ParticleFuser(_rig(16, True)).process(_readings(8, True))
    t_compile = time.perf_counter() - t0
    what = "cache load" if args.warm else "compile"
    print(f"import {t_import * 1e3:.0f} ms; {what} + first call {t_compile:.2f} s")

    for with_ir in (False, True):
        label = "echo + IR" if with_ir else "echo only"
        readings = _readings(args.readings, with_ir)
        fuser = ParticleFuser(_rig(args.particles, with_ir))
        t0 = time.perf_counter()
        b = fuser.process(readings)
        dt = time.perf_counter() - t0
        n = len(b)
        rate = args.particles * n / dt
        fused = int(np.sum(b.code < 3))
        print(f"{label:>10}: {args.particles} particles x {n} readings in {dt:.3f} s = "
              f"{rate / 1e6:.1f} M particle-updates/s ({n / dt:,.0f} readings/s; "
              f"{fused} fused; target 20 M/s: {'met' if rate >= 20e6 else 'NOT met'})")

    fuser = ParticleFuser(_rig(args.particles, True))
    c = speed_of_sound(20.0)
    t0 = time.perf_counter()
    fuser.push("echo", 0.0, 2 * 0.5 / c)
    first = time.perf_counter() - t0
    lat = []
    for k in range(1, 201):
        t0 = time.perf_counter()
        fuser.push("echo", k * 0.01, 2 * 0.5 / c)
        lat.append(time.perf_counter() - t0)
    print(f"push latency: first {first * 1e3:.2f} ms, then median "
          f"{np.median(lat) * 1e6:.0f} us, 99th percentile "
          f"{np.percentile(lat, 99) * 1e6:.0f} us ({args.particles} particles)")


if __name__ == "__main__":
    main()
