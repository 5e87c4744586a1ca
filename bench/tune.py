"""Tuning time: `replay.tune.tune` on the one-hour, four-sensor log of `replay.py`.

The log is simulated from the same scenario as ``bench/replay.py`` (reused from the
bench's temp folder when that script already made it). `tune` decodes the log once and
re-runs the compiled estimator for every likelihood evaluation; the figures are the
wall-clock and CPU seconds of the whole call, the number of likelihood evaluations (EM
passes, line search and curvature intervals: ``TuneResult.n_evals``) and the seconds per
evaluation.

Run: ``python bench/tune.py [--quick] [--objective auto|innovations|truth]``
(``--quick``: a ten-minute log). Figures only; nothing is asserted.
"""
from __future__ import annotations

import argparse

import _common as C
from fusion.fuser import Fuser


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="a ten-minute log")
    ap.add_argument("--minutes", type=float, help="log length (default 60; 10 with --quick)")
    ap.add_argument("--objective", default="auto", choices=("auto", "innovations", "truth"),
                    help="tune's objective (default auto: truth, the log has ground truth)")
    args = ap.parse_args(argv)
    minutes = args.minutes or (10.0 if args.quick else 60.0)
    C.header(f"Tuning on a {minutes:g}-minute four-sensor log", args.quick)

    sim = C.hour_log(60.0 * minutes, reuse=True)
    log = sim["path"]
    print(f"log: {log}" + (" (reused)" if sim["reused"] else
                           f" (simulated in {sim['simulate_s']:.2f} s)"))
    rig, readings, _env, _truth = C.read_all(log)
    Fuser(rig).process(C.until(readings, 1.0))  # compile or load the kernel first

    from replay.tune import tune
    t, res = C.timed(lambda: tune(log, objective=args.objective), 1)
    evals = res.n_evals  # every likelihood evaluation (the history keeps improvements only)
    print(C.table([[res.objective, f"{res.n_readings:,}", str(evals), f"{t.best:.1f}",
                    f"{t.cpu_best:.1f}", f"{t.best / max(evals, 1):.2f}"]],
                  ["objective", "readings", "evaluations", "wall s", "CPU s",
                   "s/evaluation (all-in)"]))
    print()
    print(res.summary())
    print()
    target = "n/a with a log other than one hour" if minutes != 60 else \
        C.verdict(t.best <= 30.0)
    print(f"tune: {evals} evaluations in {t.best:.1f} s wall-clock ({t.cpu_best:.1f} s CPU)  "
          f"[target <= 30 s on the one-hour log: {target}]")


if __name__ == "__main__":
    main()
