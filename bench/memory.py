"""Peak memory of `replay.run` against log length, and covariance health over 10^7 readings.

Memory: synthetic two-ranger logs of 10^5, 10^6 and 10^7 readings (the last one only
without ``--quick``, and by default only when the 10^6 replay's speed says it will take at
most a minute: ``--full`` runs it whatever it takes) are written directly with
`replay.logfile.write_log` from vectorised readings (IR counts through the unit's curve,
echo times through `EchoRanger.encode`), without ground truth (as a field log; ``--truth``
adds it at 20 Hz). Each is replayed in a fresh interpreter, which reports its resident
set after imports and the kernel's compile or cache load, and its peak resident set
(``resource.getrusage(RUSAGE_SELF).ru_maxrss``) after `replay.run`. The logs are kept in
the bench's temp folder and reused by size.

Covariance health: 10^7 readings (10^6 with ``--quick``) generated hour by hour and fed to
`Fuser.process` in chunks of 65 536, in a fresh interpreter. Over every reading: the
smallest eigenvalue of the fused 2x2 covariance and of ``det P``; at every chunk boundary,
for every live Gaussian-sum component, the smallest eigenvalue and ``|P01 - P10|``; and
the steady-state range sigma in the same overlap-zone dwell of every 60 s trajectory
cycle, compared between the first and the last ten cycles.

Run: ``python bench/memory.py [--quick]``. Figures only; nothing is asserted.
"""
from __future__ import annotations

import argparse
import os
import time

import _common as C

_WRITE = """
import json, time
import _common as C
t0 = time.perf_counter()
n = C.write_synth_log({path!r}, {n}, truth={truth})
print(json.dumps({{"n": n, "s": time.perf_counter() - t0, "rss_mb": C.rss_mb_of_self()}}))
"""

_REPLAY = """
import json, os, time
import _common as C
from fusion.fuser import Fuser
from replay.run import run
rig = C.two_ranger_rig()
f = Fuser(rig)
d = C.synth_block(rig, 0.0, 1.0)
f.push_air(*d["air"])
f.process(d["readings"])           # compile or load the kernel: not the replay's memory
base = C.rss_mb_of_self()
t0 = time.perf_counter()
res = run({path!r}, out={out!r}, smooth={smooth})
dt = time.perf_counter() - t0
os.remove({out!r})
print(json.dumps({{"base_mb": base, "peak_mb": C.rss_mb_of_self(), "s": dt,
                  "n": res.n_readings}}))
"""

_HEALTH = """
import json, math, time
import numpy as np
import _common as C
from fusion.fuser import Fuser
from fusion import decisions as D
rig = C.two_ranger_rig()
n_target = {n}
span = n_target / C.READINGS_PER_S
n_cycles = int(span // C.CYCLE_S)
f = Fuser(rig)
f.process(C.synth_block(rig, 0.0, 1.0)["readings"])  # compile or load first
f = Fuser(rig)
lo, hi = C.STEADY_WINDOW_S
sig_sum = np.zeros(n_cycles + 1); sig_n = np.zeros(n_cycles + 1)
err2_sum = np.zeros(n_cycles + 1)
n = 0
lam_min = math.inf; det_rel_min = math.inf; p00_min = math.inf
comp_lam_min = math.inf; asym_max = 0.0; comp_checks = 0
nonfinite = 0
t0 = time.perf_counter()
block = 3600.0
for a in np.arange(0.0, span, block):
    d = C.synth_block(rig, a, min(a + block, span), seed=1)
    f.push_air(*d["air"])
    for piece in C.chunks(d["readings"]):
        b = f.process(piece)
        n += len(b)
        x = b.state
        ok = np.isfinite(x[:, 0])
        nonfinite += int(np.sum(~np.isfinite(x[ok]).all(axis=1)))
        a00, a01, a11 = x[ok, 2], x[ok, 3], x[ok, 4]
        half = 0.5 * (a00 + a11)
        lmax = half + np.hypot(0.5 * (a00 - a11), a01)
        det = a00 * a11 - a01 * a01
        if a00.size:
            lam_min = min(lam_min, float(np.min(det / lmax)))   # stable smaller eigenvalue
            det_rel_min = min(det_rel_min, float(np.min(det / (a00 * a11))))
            p00_min = min(p00_min, float(np.min(a00)))
        st = f.state
        for dd in range(st["NH"].shape[0]):
            nh = int(st["NH"][dd])
            P = st["P"][dd, :nh]
            if nh:
                comp_checks += nh
                asym_max = max(asym_max, float(np.max(np.abs(P[:, 0, 1] - P[:, 1, 0]))))
                c00, c11, c01 = P[:, 0, 0], P[:, 1, 1], 0.5 * (P[:, 0, 1] + P[:, 1, 0])
                cl = 0.5 * (c00 + c11) + np.hypot(0.5 * (c00 - c11), c01)
                comp_lam_min = min(comp_lam_min, float(np.min((c00 * c11 - c01 * c01) / cl)))
        t = b.t_meas_s
        fused = (b.code < D.FIRST_REJECT) & ok
        cyc = np.floor(t / C.CYCLE_S).astype(np.int64)
        ph = t - cyc * C.CYCLE_S
        m = fused & (ph >= lo) & (ph < hi) & (cyc < n_cycles)
        sig_sum += np.bincount(cyc[m], np.sqrt(x[m, 2]), minlength=n_cycles + 1)
        sig_n += np.bincount(cyc[m], minlength=n_cycles + 1)
        err2_sum += np.bincount(cyc[m], (x[m, 0] - C.cycle_truth(b.t_state_s[m])) ** 2,
                                minlength=n_cycles + 1)
dt = time.perf_counter() - t0
have = sig_n[:n_cycles] > 0
per = np.where(have, sig_sum[:n_cycles] / np.maximum(sig_n[:n_cycles], 1), np.nan)
rms = np.sqrt(np.where(have, err2_sum[:n_cycles] / np.maximum(sig_n[:n_cycles], 1), np.nan))
k = min(10, n_cycles // 2)
slope = float(np.polyfit(np.flatnonzero(have), per[have], 1)[0]) if have.sum() > 2 else math.nan
print(json.dumps({{"n": n, "s": dt, "cycles": n_cycles, "lam_min": lam_min,
                  "det_rel_min": det_rel_min, "p00_min": p00_min, "comp_lam_min": comp_lam_min,
                  "asym_max": asym_max, "comp_checks": comp_checks, "nonfinite": nonfinite,
                  "sig_first": float(np.nanmean(per[:k])), "sig_last": float(np.nanmean(per[-k:])),
                  "sig_min": float(np.nanmin(per)), "sig_max": float(np.nanmax(per)),
                  "sig_slope_per_cycle": slope,
                  "rms_first": float(np.nanmean(rms[:k])), "rms_last": float(np.nanmean(rms[-k:])),
                  "k": k, "peak_mb": C.rss_mb_of_self()}}))
"""


_BUDGET_S = 60.0  # longest 10^7-reading replay the default run waits for


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="10^5 and 10^6 only; health on 10^6")
    ap.add_argument("--smooth", action="store_true", help="replay with RTS smoothing too")
    ap.add_argument("--full", action="store_true",
                    help="replay the 10^7-reading log even when it would take long")
    ap.add_argument("--truth", action="store_true",
                    help="logs with ground truth at 20 Hz (replay then scores the track)")
    args = ap.parse_args(argv)
    sizes = [100_000, 1_000_000] + ([] if args.quick else [10_000_000])
    C.header("Replay memory against log length; covariance health", args.quick)

    wd = C.workdir("memory")
    rows, peaks, skipped = [], [], []
    rate = None
    for n in sizes:
        if n > 1_000_000 and not args.full and rate and n / rate > _BUDGET_S:
            # Keep the default run short on a shared machine: say so instead.
            skipped.append((n, n / rate))
            continue
        path = os.path.join(wd, f"synth-{'truth' if args.truth else 'notruth'}-{n}.h5")
        made = ""
        if not os.path.exists(path):
            w = C.run_python(_WRITE.format(path=path, n=n, truth=args.truth))
            made = f"written in {w['s']:.1f} s"
        else:
            made = "reused"
        out = path[:-3] + ".track.h5"
        if os.path.exists(out):
            os.remove(out)
        r = C.run_python(_REPLAY.format(path=path, out=out, smooth=args.smooth), timeout=1800)
        peaks.append(r["peak_mb"])
        rate = r["n"] / r["s"]
        rows.append([f"{r['n']:,}", f"{os.path.getsize(path) / 1e6:.1f}", made,
                     f"{r['base_mb']:.0f}", f"{r['peak_mb']:.0f}",
                     f"{r['peak_mb'] - r['base_mb']:.0f}", f"{r['s']:.1f}",
                     f"{r['n'] / r['s']:,.0f}"])
    print(f"replay.run(log, out=...{', smooth=True' if args.smooth else ''}), one fresh "
          "interpreter per log:")
    print(C.table(rows, ["readings", "log MB", "log", "RSS before MB", "peak RSS MB",
                         "peak - before MB", "replay s", "readings/s"]))
    for n, est in skipped:
        print(f"  {n:,} readings: skipped, the replay would take about {est:.0f} s at the "
              f"{rate:,.0f} readings/s just measured (budget {_BUDGET_S:g} s; --full runs it)")
    ratio = peaks[-1] / peaks[0]
    done = [n for n in sizes if n not in {k for k, _ in skipped}]
    # Proportional growth would hold every decision row in memory: ~150 bytes a reading.
    grow = (peaks[-1] - peaks[0]) / max(done[-1] - done[0], 1) * 1e6
    print(f"peak RSS, largest / smallest log: {ratio:.2f} ({done[-1] // done[0]}x the readings); "
          f"growth {grow:.2f} MB per million readings (holding the decisions in memory would "
          f"be ~150 MB per million; the growth is HDF5's chunk caches and free lists filling "
          f"to their bounds)  [target <= 300 MB at every size: {C.verdict(max(peaks) <= 300)}]")
    print()

    n_h = 1_000_000 if args.quick else 10_000_000
    t0 = time.perf_counter()
    h = C.run_python(_HEALTH.format(n=n_h), timeout=1800)
    print(f"covariance health: {h['n']:,} readings through Fuser.process in chunks of "
          f"{C.CHUNK} ({h['s']:.1f} s, {h['n'] / h['s']:,.0f} readings/s including the "
          f"synthesis; peak RSS {h['peak_mb']:.0f} MB; {time.perf_counter() - t0:.0f} s "
          "with the interpreter)")
    print(C.table([
        ["fused covariance, every reading: min eigenvalue", f"{h['lam_min']:.3e} m^2",
         C.verdict(h["lam_min"] > 0)],
        ["  min det P / (P00 P11) (1 - correlation^2)", f"{h['det_rel_min']:.3e}",
         C.verdict(h["det_rel_min"] > 0)],
        ["  non-finite states", f"{h['nonfinite']}", C.verdict(h["nonfinite"] == 0)],
        [f"components at chunk ends ({h['comp_checks']:,} checks): min eigenvalue",
         f"{h['comp_lam_min']:.3e} m^2", C.verdict(h["comp_lam_min"] > 0)],
        ["  max |P01 - P10|", f"{h['asym_max']:.3e}", C.verdict(h["asym_max"] <= 1e-12)],
        [f"steady sigma (dwell at 0.5 m), first {h['k']} cycles", f"{1e3 * h['sig_first']:.4f} mm",
         ""],
        [f"steady sigma, last {h['k']} cycles (of {h['cycles']:,})",
         f"{1e3 * h['sig_last']:.4f} mm",
         C.verdict(abs(h["sig_last"] / h["sig_first"] - 1) <= 0.02)],
        ["  per-cycle range of the steady sigma",
         f"{1e3 * h['sig_min']:.4f} .. {1e3 * h['sig_max']:.4f} mm", ""],
        ["  trend of the steady sigma", f"{1e3 * h['sig_slope_per_cycle']:.2e} mm/cycle", ""],
        [f"steady RMS error vs truth, first / last {h['k']} cycles",
         f"{1e3 * h['rms_first']:.3f} / {1e3 * h['rms_last']:.3f} mm", ""],
    ], ["check", "value", "verdict"]))
    print("(sigma drift verdict: the last cycles within 2 % of the first; symmetry: within "
          "1e-12)")


if __name__ == "__main__":
    main()
