"""Tuning: estimate process and sensor noise from logs.

Two objectives:

* ``innovations`` — maximise the innovations log-likelihood over the noise parameters,
  across one or many logs (the prediction-error decomposition, Schweppe 1965). Needs no
  ground truth.
* ``truth`` — when the logs carry ground truth: each sensor's noise is fitted directly to
  its residuals against truth (maximum likelihood of the sensor's sigma model) over the
  readings the filter fused, re-selected with each fit, with a robust start and outliers
  trimmed; then, with those held, the process noise (and any latency) by the track's log
  score against truth (a proper scoring rule, floored for re-acquisitions).

Every likelihood evaluation decodes and fuses the logs with a rig that carries the
parameter values, through `fusion.Fuser.process` as `rangefuse replay` does, so the
figures the tuner reports for the rig it writes are the replay's figures for it.

Approximate 95 % intervals come from the curvature of the log-likelihood at the optimum
(observed information, in log-parameters); a parameter at a bound of its search range
has none (it is reported as at its bound), and an interval that reaches a bound is
reported one-sided.

References
----------
F. C. Schweppe, "Evaluation of likelihood functions for Gaussian signals", IEEE Trans.
Information Theory 11(1), 61-70 (1965).
A. C. Harvey, *Forecasting, Structural Time Series Models and the Kalman Filter*,
Cambridge University Press (1989), §3.4: the prediction-error decomposition.
"""
from __future__ import annotations

import argparse
import dataclasses
import math
import os
import sys
import time
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize

from fusion import decisions as D
from fusion._toml import dumps
from fusion.errors import InputError
from fusion.fuser import Fuser
from fusion.rig import Rig

from . import _window_stats as W
from . import metrics as M
from ._io import atomic_output
from .logfile import open_log
from .run import (_DirStats, _SensorStats, _accumulate, _clean_truth, _rig_for, _truth_interp,
                  load_rig)
from fusion.estimators.smoother import rts_smooth

__all__ = ["tune", "TuneResult", "Parameter", "register"]


@dataclass(frozen=True)
class Parameter:
    """One tunable value: where it lives in the rig, its current value and the range the
    search keeps it in (every value in ``[lower, upper]`` is one the rig accepts)."""

    name: str            # e.g. "estimator.accel_psd", "sensor.echo_front.sigma_m"
    value: float
    lower: float = 1e-9
    upper: float = 1e3

    @property
    def is_log(self) -> bool:
        """Searched in log space (scales); latencies, which may be 0, in seconds."""
        return not self.name.endswith("latency_s")


# How an interval came out (`TuneResult.ci_status`), and the words the summary uses.
CI_TWO_SIDED = "two-sided"
CI_BELOW = "one-sided below"     # the lower end reaches the search bound
CI_ABOVE = "one-sided above"     # the upper end reaches the search bound
CI_UNBOUNDED = "unbounded"       # both ends reach the bounds: the logs do not pin it
CI_AT_LOWER = "at lower bound"
CI_AT_UPPER = "at upper bound"
CI_NOT_MAXIMUM = "not a maximum"
CI_SKIPPED = "skipped"
CI_FITTED_TO_TRUTH = "fitted to truth"
CI_START_KEPT = "start kept"     # nothing evaluated scored above the starting rig
CI_NOT_SEARCHED = "not searched"  # the cap stopped the search before the direct search


@dataclass
class TuneResult:
    """Tuned parameters with intervals, and the fit before and after.

    The NIS, the fused readings' log-likelihood and the figures against truth are those
    `rangefuse replay` reports for the starting rig (before) and the written rig (after).
    """

    objective: str
    params: list                  # list of Parameter (tuned values)
    initial: list                 # list of Parameter (values before)
    ci95: dict                    # name -> (low, high) from the curvature (read with ci_status)
    loglik_before: float
    loglik_after: float
    nis_before: tuple             # (mean, n, (lo, hi)), over every direction
    nis_after: tuple
    rig: Rig
    history: list = field(default_factory=list)   # improvements: iteration, loglik, params
    seconds: float = 0.0
    n_evals: int = 0
    n_readings: int = 0
    message: str = ""
    # what the evaluations were: (count, what for), summing to n_evals
    eval_parts: list = field(default_factory=list)
    # the innovations log-likelihood of fused readings only, as `rangefuse replay` sums it
    loglik_fused_before: float = math.nan
    loglik_fused_after: float = math.nan
    # name -> one of the CI_* words: how its interval came out (or why there is none)
    ci_status: dict = field(default_factory=dict)
    # direction -> replay's "all zones" row against truth (n, rmse_m, bias_m, worst_m,
    # nees, cover2) before and after; empty without truth
    truth_before: dict = field(default_factory=dict)
    truth_after: dict = field(default_factory=dict)
    # direction -> (mean, n, (lo, hi)): replay's per-direction NIS before and after
    nis_dirs_before: dict = field(default_factory=dict)
    nis_dirs_after: dict = field(default_factory=dict)
    # set when the written rig is clearly worse against truth than the starting one
    worse_against_truth: str = ""
    # the track's log score against truth (`_truth_score`; NaN without truth)
    truth_score_before: float = math.nan
    truth_score_after: float = math.nan
    # the cap on the search's evaluations (EM and line search, the truth fit's runs, the
    # direct search; not the curvature's), how many the search made, and whether the
    # cap stopped it (0: not known)
    max_evals: int = 0
    n_search: int = 0
    capped: bool = False

    @property
    def best_iteration(self) -> int:
        """The iteration (likelihood evaluation) that found the tuned values, as the
        convergence figure numbers it."""
        return max(self.history, key=lambda h: h["loglik"])["iteration"] if self.history else 0

    def interval_text(self, name) -> str:
        """The 95 % interval of parameter `name` in words (see `ci_status`)."""
        status = self.ci_status.get(name, CI_NOT_MAXIMUM)
        lo, hi = self.ci95.get(name, (math.nan, math.nan))
        if status == CI_TWO_SIDED:
            return f"[{lo:.4g}, {hi:.4g}]"
        if status == CI_BELOW:
            return f"one-sided: below {hi:.4g}"
        if status == CI_ABOVE:
            return f"one-sided: above {lo:.4g}"
        return {CI_UNBOUNDED: "not pinned down by the logs",
                CI_AT_LOWER: "at its lower bound",
                CI_AT_UPPER: "at its upper bound",
                CI_SKIPPED: "skipped (--no-intervals)",
                CI_FITTED_TO_TRUTH: "fitted to truth (none)",
                CI_START_KEPT: "starting value kept (none)",
                CI_NOT_SEARCHED: "not searched: the cap stopped the search",
                }.get(status, "not a maximum here")

    def summary(self) -> str:
        parts = " + ".join(f"{n} {what}" for n, what in self.eval_parts if n)
        head, *notes = self.message.split("; ")
        L = []
        if self.worse_against_truth:
            L += [f"WARNING: {self.worse_against_truth}", ""]
        L += [f"tuning by {self.objective} over {self.n_readings} readings in "
              f"{self.seconds:.1f} s: {head}",
              f"  {self.n_evals} likelihood evaluations" + (f" = {parts}" if parts else "")]
        if self.max_evals:
            # what the cap covers, and whether it is what stopped the search
            L.append(f"  the search made {self.n_search} of them, "
                     + (f"and stopped at its cap of {self.max_evals}" if self.capped
                        else f"within its cap of {self.max_evals}")
                     + " (--max-evals, which covers EM,")
            L.append("  the truth fit and the direct search; the curvature's evaluations "
                     "come on top)")
        L.append(f"  tuned values found at iteration {self.best_iteration} (the convergence "
                 "figure's iterations count these evaluations)")
        L += [f"  note: {n}" for n in notes]
        L += ["", f"  {'parameter':<34}{'before':>12}{'tuned':>12}   {'95% interval'}"]
        for p0, p in zip(self.initial, self.params):
            L.append(f"  {p.name:<34}{p0.value:>12.4g}{p.value:>12.4g}   "
                     f"{self.interval_text(p.name)}")
        L.append("")
        truth = self.objective == "truth"
        L.append(f"  {'log-likelihood (nats)':<34}{'before':>12}{'tuned':>12}")
        L.append(f"  {'innovations objective (*)' if truth else 'tuning objective (*)':<34}"
                 f"{self.loglik_before:>12.1f}{self.loglik_after:>12.1f}")
        L.append(f"  {'fused readings only (**)':<34}{self.loglik_fused_before:>12.1f}"
                 f"{self.loglik_fused_after:>12.1f}")
        if math.isfinite(self.truth_score_before):
            L.append(f"  {'log score against truth (***)':<34}{self.truth_score_before:>12.1f}"
                     f"{self.truth_score_after:>12.1f}")
        L.append("  (*)  " + ("the innovations objective" if truth else "what the tuner "
                 "maximises") + ": the fused readings' innovations log-likelihood plus,")
        L.append("       for each gated or crosstalk reading, the outlier term log(outlier "
                 "density), so")
        L.append("       no parameter change can score by pushing readings out of the gate")
        L.append("  (**) the \"innovations log-likelihood\" of `rangefuse replay` (here summed "
                 "over directions)")
        if math.isfinite(self.truth_score_before):
            L.append("  (***) log density of the true range under the track's prediction at "
                     "each reading,")
            L.append("       floored by the outlier density" + (": what the truth objective "
                     "maximises for the process noise" if truth else ""))
        for label, (mean, n, (lo, hi)) in (("before", self.nis_before), ("after", self.nis_after)):
            L.append(f"  time-averaged NIS {label}: {mean:.3f} over {n} readings, 95% bounds "
                     f"[{lo:.3f}, {hi:.3f}]: {M.consistency_verdict(mean, n)}")
        if len(self.nis_dirs_after) > 1:
            # replay reports the NIS by direction: the same figures, direction by direction
            for d, (mean, n, _) in self.nis_dirs_after.items():
                m0, n0, _ = self.nis_dirs_before.get(d, (math.nan, 0, None))
                L.append(f"    direction {d}: {m0:.3f} ({M.consistency_verdict(m0, n0)}) -> "
                         f"{mean:.3f} ({M.consistency_verdict(mean, n)})")
        if self.truth_after:
            L.append("")
            L.append("  against truth (replay's filtered figures, all zones):")
            L.append(f"    {'direction':<12}{'RMSE mm':>18}{'NEES':>20}{'2σ cover':>20}")
            for d, a in self.truth_after.items():
                b = self.truth_before.get(d)
                if a is None or b is None:
                    continue
                L.append(f"    {d:<12}{1e3 * b['rmse_m']:>8.1f} -> {1e3 * a['rmse_m']:<6.1f}"
                         f"{b['nees']:>10.3g} -> {a['nees']:<7.3g}"
                         f"{100 * b['cover2']:>9.1f}% -> {100 * a['cover2']:.1f}%")
        return "\n".join(L)

    def plot(self, path=None):
        from .plots import plot_convergence
        return plot_convergence(self.history, out=path, objective=self.objective)

    def value(self, name) -> float:
        for p in self.params:
            if p.name == name:
                return p.value
        raise KeyError(name)


# --- parameters in a rig ------------------------------------------------------------------
# The longest latency searched, seconds: far beyond any ranger's (a few ms to tens of ms).
_MAX_LATENCY_S = 0.2


def default_parameters(rig: Rig, latency=False) -> list:
    """The tunable parameters of `rig`: process noise and each sensor's noise terms (and,
    with `latency`, each sensor's latency), each with a search range inside the values
    the rig accepts (a latency is >= 0: `fusion.rig` refuses a negative one)."""
    ps = [Parameter("estimator.accel_psd", rig.estimator.accel_psd, 1e-6, 1e3)]
    for name, s in rig.sensors.items():
        if s.kind == "triangulation":
            ps.append(Parameter(f"sensor.{name}.volts_sigma", s.volts_sigma, 1e-5, 1.0))
        else:
            ps.append(Parameter(f"sensor.{name}.sigma_m", s.sigma_m, 1e-5, 1.0))
            ps.append(Parameter(f"sensor.{name}.sigma_frac", max(s.sigma_frac, 1e-5), 1e-6, 0.5))
        if latency:
            ps.append(Parameter(f"sensor.{name}.latency_s", s.latency_s, 0.0,
                                max(_MAX_LATENCY_S, s.latency_s)))
    return ps


def apply(rig: Rig, params) -> Rig:
    """A rig with the given parameter values put in place."""
    est = rig.estimator
    sensors = dict(rig.sensors)
    for p in params:
        parts = p.name.split(".")
        if parts[0] == "estimator":
            est = dataclasses.replace(est, **{parts[1]: float(p.value)})
        elif parts[0] == "sensor":
            key = parts[-1]
            sname = ".".join(parts[1:-1])
            sensors[sname] = dataclasses.replace(sensors[sname], **{key: float(p.value)})
        else:
            raise InputError(f"unknown parameter {p.name!r}", field="params")
    return rig.replace(estimator=est, sensors=sensors)


_TUNED_MARK = "tuned by rangefuse tune"


def rig_text_with(text, tuned: Rig, params, head=()) -> str:
    """The rig file `text` with each parameter's tuned value put in place, so the tuned
    rig keeps the user's comments, order and spelling; `head` lines go first (a previous
    tuning's head lines are replaced).

    Each value replaces its key's value on its own line (a trailing comment stays), or is
    added after the table's header or the sensor's ``name`` line where the key was left
    to its default. When the text cannot be edited so that it reads back as `tuned`
    (an unusual layout: inline tables, a key spread over lines), the whole rig is written
    out instead.
    """
    import re

    from fusion._toml import _float

    def fallback():
        return "\n".join(list(head) + [dumps(tuned.to_dict(), trim_float_noise=True)])

    if not text or not text.strip():
        return fallback()
    # lines as the file has them: "\n" only (a comment may hold other line separators),
    # and a file written with CRLF is given back with CRLF
    eol = "\r\n" if "\r\n" in text else "\n"
    lines = text.replace("\r\n", "\n").split("\n")
    if lines and lines[-1] == "":
        lines.pop()
    if lines and lines[0].startswith(f"# {_TUNED_MARK}"):  # a previous tuning's head ...
        lines.pop(0)
        change = re.compile(r"#   \S+: \S+ -> \S+$")  # ... its change lines, and no other
        while lines and (change.match(lines[0]) or lines[0].startswith("# WARNING:")):
            lines.pop(0)
    header = re.compile(r"\s*\[")
    sensor_header = re.compile(r"\s*\[\[\s*sensor\s*\]\]")
    for p in params:
        parts = p.name.split(".")
        key, value = parts[-1], _float(float(p.value), trim=True)
        if parts[0] == "estimator":
            starts = [i for i, ln in enumerate(lines) if re.match(r"\s*\[\s*estimator\s*\]", ln)]
            if not starts:
                lines += ["", "[estimator]", f"{key} = {value}"]
                continue
            lo, anchor = starts[0], starts[0]
        elif parts[0] == "sensor":
            name = ".".join(parts[1:-1])
            named = re.compile(r"\s*name\s*=\s*[\"']" + re.escape(name) + r"[\"']\s*(#.*)?$")
            hit = None
            for i, ln in enumerate(lines):
                if named.match(ln):
                    top = i
                    while top > 0 and not header.match(lines[top]):
                        top -= 1
                    if sensor_header.match(lines[top]):  # a sensor's name, not a direction's
                        hit, lo = i, top
                        break
            if hit is None:
                return fallback()
            anchor = hit
        else:
            return fallback()
        hi = next((i for i in range(lo + 1, len(lines)) if header.match(lines[i])), len(lines))
        line_of_key = re.compile(r"(\s*" + re.escape(key) + r"\s*=\s*)([^#]*?)(\s*#.*)?$")
        at = next((i for i in range(lo + 1, hi) if line_of_key.match(lines[i])), None)
        if at is None:
            lines.insert(anchor + 1, f"{key} = {value}")
        else:
            m = line_of_key.match(lines[at])
            lines[at] = m.group(1) + value + (m.group(3) or "")
    out = eol.join(list(head) + lines) + eol
    try:
        # compared as written out (a NaN, an unset power-up air, is not equal to itself)
        same = dumps(Rig.from_toml(out).to_dict()) == \
            dumps(Rig.from_toml(dumps(tuned.to_dict(), trim_float_noise=True)).to_dict())
    except Exception:  # noqa: BLE001 - any failure to read it back: write the rig whole
        same = False
    return out if same else fallback()


# --- the likelihood machine ---------------------------------------------------------------
class _Problem:
    """Logs read once; each evaluation decodes and fuses them with a rig carrying the
    parameter values.

    The evaluation is `fusion.Fuser.process` on a fresh fuser of that rig, the code path
    of `rangefuse replay`: every term of a reading's sigma (an IR unit's ``gain_sigma``,
    an echo unit's air-temperature and quantisation terms), the stuck-output limits that
    follow from the noise and the latency shift all come from the sensors' own decoders,
    so the tuner cannot score a rig differently from the replay of the rig it writes.
    Decoding costs about as much as fusing (a few ms per 20 000 readings).

    ``preps`` keeps each log prepared with the starting rig: the sensor-noise fits
    (`_fit_sensor_noise`) split each reading's sigma into the tuned term and the rest
    from it.
    """

    def __init__(self, logs, rig, params, latency):
        self.rig = rig
        self.params = params
        self.latency = latency
        self.inputs = []      # per log: (readings, environment), as Fuser.process takes them
        self.preps = []
        self.truths = []
        self.n = 0
        self.sensor_names = tuple(rig.sensors)
        for path in logs:
            with open_log(path) as log:
                _rig_for(log, rig, path)
                readings = log.readings()
                env = log.environment_for(rig)
                truth = {d: _clean_truth(log.truth(d)) for d in rig.directions}
            prep = Fuser(rig).prepare(readings, env)
            if prep is None:
                continue
            self.inputs.append((readings, env))
            self.preps.append(prep)
            self.truths.append(truth)
            self.n += len(prep["sensor"])
        if not self.preps:
            raise InputError("the logs hold no readings to tune on", field="/sensors")

    def rig_for(self, values) -> Rig:
        """The starting rig with parameter values (name -> value) put in place."""
        return apply(self.rig, [Parameter(k, float(v)) for k, v in values.items()])

    def run(self, values):
        """Runs with parameter values (dict); returns total loglik, NIS stats, batches.

        Each batch is aligned with ``preps`` (same readings in the same order)."""
        rig = self.rig_for(values)
        total = 0.0
        self.last_fused = 0.0
        nis_sum, nis_n = 0.0, 0
        batches = []
        for readings, env in self.inputs:
            b = Fuser(rig).process(readings, env)
            acc = b.code < D.FIRST_REJECT
            gated = (b.code == D.GATED) | (b.code == D.CROSSTALK)
            # The objective keeps gated (and crosstalk) readings with their outlier-density
            # term, so a parameter change cannot gain by pushing readings out of the gate;
            # the replay summary's figure sums the fused readings only (`last_fused`).
            total += float(np.nansum(b.loglik[acc | gated]))
            self.last_fused += float(np.nansum(b.loglik[acc]))
            fin = acc & np.isfinite(b.nis) & (b.code != D.REACQUIRED)
            nis_sum += float(b.nis[fin].sum())
            nis_n += int(fin.sum())
            batches.append(b)
        return total, (nis_sum / max(nis_n, 1), nis_n, M.nis_bounds(nis_n)), batches


class _NoTrack:
    """Stands in for replay's track-file appender: the tuner keeps only the statistics."""

    def append(self, **cols):
        pass


def _replay_figures(rig, truths, batches) -> dict:
    """The figures `rangefuse replay` reports for `rig`, from the batches of its run
    (one per log, as `_Problem.run` returns them), folded by replay's own code
    (`replay.run._accumulate`): NIS and fused readings' log-likelihood by direction and
    over all, and each direction's "all zones" row against truth (None without truth)."""
    names, dirs = tuple(rig.sensors), tuple(rig.directions)
    sstats = {n: _SensorStats() for n in names}
    dstats = {d: _DirStats() for d in dirs}
    sink = {d: _NoTrack() for d in dirs}
    edges = {d: M.zone_edges(rig, d) for d in dirs}
    has_truth = {d: False for d in dirs}
    for b, truth in zip(batches, truths):
        if len(b) == 0:
            continue
        tr = {d: truth.get(d) for d in dirs}
        for d in dirs:
            has_truth[d] |= tr[d] is not None
        ws = W.WindowStats(rig, names, dirs, tr, edges, _truth_interp)
        _accumulate(b.in_time_order(), names, dirs, tr, sstats, dstats, sink, ws)
    nis_n = sum(ds.nis_n for ds in dstats.values())
    nis_mean = sum(ds.nis_sum for ds in dstats.values()) / nis_n if nis_n else math.nan
    by_dir = {d: ((ds.nis_sum / ds.nis_n if ds.nis_n else math.nan), ds.nis_n,
                  M.nis_bounds(ds.nis_n)) for d, ds in dstats.items()}
    truth_rows = {d: ds.err.table()["all"] for d, ds in dstats.items() if has_truth[d]}
    return {"nis": (nis_mean, nis_n, M.nis_bounds(nis_n)), "nis_dirs": by_dir,
            "loglik_fused": sum(ds.loglik for ds in dstats.values()), "truth": truth_rows}


# A tuned rig "clearly worse" against truth than the starting one: the RMSE of a
# direction up by more than 10 %, or its 2-sigma cover down by more than 5 points to
# below 90 % (design figures, not published values: well outside the scatter of these
# figures between seeds of the demo scenarios, and inside what a user would call worse).
_WORSE_RMSE = 1.10
_WORSE_COVER = 0.05
# The mean NEES is reported beside them (`_nees_note`), not judged: it is dominated by
# the few readings where the track is confidently on a target that has gone (a step the
# track re-acquires after a few readings). On the bench's one-hour log the simulator's
# own noise figures give a front NEES ten times the cautious starting rig's, with the
# 2-sigma cover, which those readings do not dominate, at 96.5 %.
_NEES_NOTE = 2.0


def _paired(before, after):
    """``(direction, before_row, after_row)`` for the directions both rigs were scored on."""
    for d, a in after.items():
        b = before.get(d)
        if a is not None and b is not None:
            yield d, b, a


def _worse_against_truth(before, after) -> str:
    """Words saying how the tuned rig is clearly worse against truth, or ''."""
    bad = []
    for d, b, a in _paired(before, after):
        if a["rmse_m"] > _WORSE_RMSE * b["rmse_m"] + 1e-6:
            bad.append(f"direction {d}: RMSE {1e3 * b['rmse_m']:.1f} -> "
                       f"{1e3 * a['rmse_m']:.1f} mm")
        if a["cover2"] < b["cover2"] - _WORSE_COVER and a["cover2"] < 0.90:
            bad.append(f"direction {d}: 2-sigma cover {100 * b['cover2']:.1f} -> "
                       f"{100 * a['cover2']:.1f} %")
    if not bad:
        return ""
    return ("the tuned rig is clearly worse against the logs' truth than the starting one ("
            + "; ".join(bad) + "); check it with `rangefuse replay LOG --rig TUNED.toml` "
            "before using it")


def _nees_note(before, after) -> str:
    """A note where a direction's mean NEES more than doubled to above 2, or ''."""
    grown = []
    for d, b, a in _paired(before, after):
        nb, na = b.get("nees", math.nan), a.get("nees", math.nan)
        if math.isfinite(nb) and math.isfinite(na) and na > _NEES_NOTE * max(nb, 1.0):
            grown.append(f"{d} {nb:.3g} -> {na:.3g} (2-sigma cover {100 * b['cover2']:.1f} -> "
                         f"{100 * a['cover2']:.1f} %)")
    if not grown:
        return ""
    # (no "; " inside: the summary splits its notes there)
    return ("the mean NEES grew in direction " + ", ".join(grown) + ". A few large errors "
            "weigh most in it (a track still on a target that has gone, until it "
            "re-acquires): the 2-sigma cover is the steadier figure")


def _truth_score(rig, truths, batches) -> float:
    """The track's log score against truth: at every reading of a direction with truth,
    the log density of the true range under the track's prediction to the reading's time
    (``N(r_pred, sigma_pred^2)`` as `rangefuse replay` scores it, `metrics.predict_range`),
    floored by the rig's outlier density.

    The log score is a proper scoring rule (Gneiting & Raftery 2007): it is best for the
    process noise whose predicted sigma matches the errors the track makes, rewarding a
    small error and an honest sigma at once (unlike the RMSE, which a sluggish track can
    win with a sigma that no longer covers). The floor, ``log(pdf + outlier_density)``,
    is the innovations objective's treatment of a gated reading: while something steps
    into the beam and the track is re-acquiring, its metres of error score a constant and
    cannot drag the process noise. Consecutive errors are correlated, so this is not a
    likelihood whose curvature gives an interval.

    References
    ----------
    T. Gneiting, A. E. Raftery, "Strictly proper scoring rules, prediction, and
    estimation", J. American Statistical Association 102(477), 359-378 (2007).
    """
    lam = rig.estimator.outlier_density
    q = rig.estimator.accel_psd
    total = 0.0
    for b, truth in zip(batches, truths):
        for di, d in enumerate(rig.directions):
            tr = truth.get(d)
            sel = b.direction == di
            if tr is None or not sel.any():
                continue
            tm, st, ts = b.t_meas_s[sel], b.state[sel], b.t_state_s[sel]
            seen = np.isfinite(tm) & np.isfinite(st[:, 0])
            # ahead of its state by max(t_meas - t_state, 0), as replay predicts it
            dt = np.maximum(np.where(seen, tm - ts, 0.0), 0.0)
            with np.errstate(invalid="ignore"):
                r, sd = M.predict_range(st[:, 0], st[:, 1], st[:, 2], st[:, 3], st[:, 4], dt, q)
                e = r - _truth_interp(tr, tm)
                ok = seen & np.isfinite(e) & np.isfinite(sd) & (sd > 0)
            e, sd = e[ok], sd[ok]
            pdf = np.exp(-0.5 * (e / sd) ** 2) / (math.sqrt(2 * math.pi) * sd)
            total += float(np.sum(np.log(pdf + lam)))
    return total


def _truth_refs(problem):
    """Reference ranges for every prepared reading from ground truth (no extra variance)."""
    refs = []
    for k, prep in enumerate(problem.preps):
        ref = np.full(len(prep["sensor"]), np.nan)
        for si, name in enumerate(problem.sensor_names):
            tr_d = problem.truths[k].get(problem.rig.sensors[name].direction)
            m = prep["sensor"] == si
            if tr_d is not None and m.any():
                ref[m] = _truth_interp(tr_d, prep["t_meas"][m])
        refs.append((ref, np.zeros_like(ref)))
    return refs


def _smoothed_refs(problem, batches, q):
    """E-step: smoothed range (and its variance) at every fused reading, and the expected
    process-noise statistic for the white-acceleration model.

    Returns ``(refs, q_hat)``: per log, reference range and extra variance per prepared
    reading; and the maximum-likelihood q given the smoothed states (Shumway & Stoffer
    1982: ``q = sum tr(Q1(dt)^-1 E[w w']) / (2 M)``).
    """
    refs = []
    num, den = 0.0, 0
    for b in batches:
        ref = np.full(len(b.code), np.nan)
        extra = np.zeros(len(b.code))
        acc = b.code < D.FIRST_REJECT
        for di in np.unique(b.direction):
            sel = acc & (b.direction == di)
            idx = b.order[sel[b.order]]
            if idx.size < 3:
                continue
            t = b.t_state_s[idx]
            x = b.state[idx, :2]
            P = np.empty((idx.size, 2, 2))
            P[:, 0, 0] = b.state[idx, 2]
            P[:, 0, 1] = P[:, 1, 0] = b.state[idx, 3]
            P[:, 1, 1] = b.state[idx, 4]
            xs, Ps = rts_smooth(t, x, P, q)
            ref[idx] = xs[:, 0]
            extra[idx] = Ps[:, 0, 0]
            dt = np.diff(t)
            ok = dt > 1e-6
            if not ok.any():
                continue
            dt = dt[ok]
            k0 = np.flatnonzero(ok)
            F = np.zeros((dt.size, 2, 2))
            F[:, 0, 0] = F[:, 1, 1] = 1.0
            F[:, 0, 1] = dt
            Q1 = np.empty((dt.size, 2, 2))
            Q1[:, 0, 0] = dt ** 3 / 3
            Q1[:, 0, 1] = Q1[:, 1, 0] = dt ** 2 / 2
            Q1[:, 1, 1] = dt
            Pk = P[k0]
            Pp = F @ Pk @ np.swapaxes(F, 1, 2) + q * Q1
            G = Pk @ np.swapaxes(F, 1, 2) @ np.linalg.inv(Pp)
            w = xs[k0 + 1] - np.einsum("kij,kj->ki", F, xs[k0])
            C = Ps[k0 + 1] @ np.swapaxes(G, 1, 2)        # Cov(x_{k+1}, x_k | all)
            Ew = (w[:, :, None] * w[:, None, :] + Ps[k0 + 1]
                  + F @ Ps[k0] @ np.swapaxes(F, 1, 2)
                  - C @ np.swapaxes(F, 1, 2) - F @ np.swapaxes(C, 1, 2))
            num += float(np.einsum("kij,kji->", np.linalg.inv(Q1), Ew))
            den += 2 * dt.size
        refs.append((ref, extra))
    return refs, (num / den if den else q)


def _fit_sensor_noise(problem: _Problem, refs, use=None) -> dict:
    """Each sensor's sigma model fitted by maximum likelihood to its residuals against a
    reference range (truth, or the smoothed track with its variance).

    Parameters
    ----------
    problem : _Problem
    refs : list of (ref, extra)
        Per log, the reference range and its variance at every prepared reading (NaN
        where there is none).
    use : list of bool arrays, optional
        Per log, the readings to fit to (default: every reading the decoder accepted).
        The truth objective passes the readings the filter fused: a ghost, a crosstalk
        echo or a clutter return is not the target, and its residual against the
        target's truth says nothing about the sensor's noise.

    Each reading's variance is split, from the starting rig's decode, into the tuned term
    and the rest (an echo unit's quantisation and air-temperature terms; an IR unit's
    quantisation and ``gain_sigma`` terms, through the curve's slope), so the fit moves
    only what the parameter moves in the decoder. Outliers are trimmed at 4 sigma,
    starting from a robust scale of the residuals standardised by the starting rig's
    sigma (1.4826 times their median absolute value, the normal-consistent MAD; Hampel
    1974), so a few far-off readings cannot inflate the first fit and keep themselves in.

    References
    ----------
    F. R. Hampel, "The influence curve and its role in robust estimation", J. American
    Statistical Association 69(346), 383-393 (1974): the median absolute deviation as a
    scale (from memory).
    """
    out = {}
    for si, name in enumerate(problem.sensor_names):
        s = problem.rig.sensors[name]
        res, rr, base, ex, volts = [], [], [], [], []
        for k, prep in enumerate(problem.preps):
            ref_all, extra_all = refs[k]
            sel = use[k] if use is not None else prep["code"] == D.ACCEPTED
            m = (prep["sensor"] == si) & sel & np.isfinite(ref_all)
            if not m.any():
                continue
            tr = ref_all[m]
            z = prep["z"][m]
            # the candidate on the reference's side of the curve
            col = np.where(np.isfinite(z[:, 1]) & (np.abs(z[:, 1] - tr) < np.abs(z[:, 0] - tr)), 1, 0)
            zz = z[np.arange(len(z)), col]
            sb = prep["sg"][m][np.arange(len(z)), col]
            ok = np.isfinite(zz) & np.isfinite(sb) & (sb > 0)
            res.append((zz - tr)[ok])
            # the range the decoder's sigma_frac multiplies: the unit's own, before the
            # mount offset (compensated for the air, as the decoder computes it)
            rr.append(zz[ok] - s.offset_m)
            base.append(sb[ok])
            ex.append(extra_all[m][ok])
            if s.kind == "triangulation":
                v = s.to_volts(prep["rawv"][m][ok])
                volts.append(np.where(np.isfinite(v), v, 0.0))
        if not res:
            continue
        e = np.concatenate(res)
        if e.size < 20:
            continue
        r = np.concatenate(rr)
        sb = np.concatenate(base)
        e2 = e * e + np.concatenate(ex)   # E[(z - x)^2]
        u = np.abs(e) / sb
        scale = 1.4826 * float(np.median(u))
        keep = u <= 4 * scale if scale > 0 else np.ones(e.size, bool)
        if keep.sum() < 20:
            continue
        if s.kind == "triangulation":
            # sigma^2 = (volts_sigma^2 + q^2 + (gain_sigma V)^2) / slope^2 (the decoder's
            # model): per reading a (1 / slope^2) and the part volts_sigma does not set
            from fusion.sensors.adc import adc_quantisation_sigma_v
            q = adc_quantisation_sigma_v(s.adc_bits, s.adc_vref) if s.output == "counts" else 0.0
            fixed = q * q + (s.gain_sigma * np.concatenate(volts)) ** 2
            a = sb ** 2 / (s.volts_sigma ** 2 + fixed)
            ov = a * fixed
            t = math.log(s.volts_sigma)
            for _ in range(4):
                def nll(t):
                    v = ov[keep] + a[keep] * math.exp(2 * t)
                    return 0.5 * np.sum(np.log(v) + e2[keep] / v)
                t = optimize.minimize_scalar(nll, bounds=(math.log(1e-7), math.log(10.0)),
                                             method="bounded", options={"xatol": 1e-5}).x
                keep = np.abs(e) <= 4 * np.sqrt(ov + a * math.exp(2 * t))
            out[f"sensor.{name}.volts_sigma"] = math.exp(t)
        else:
            ov = np.maximum(sb ** 2 - (s.sigma_m ** 2 + (s.sigma_frac * r) ** 2), 0)
            th = np.array([math.log(s.sigma_m), math.log(max(s.sigma_frac, 1e-5))])
            for _ in range(4):
                def nll(t):
                    v = ov[keep] + math.exp(2 * t[0]) + (math.exp(t[1]) * r[keep]) ** 2
                    return 0.5 * np.sum(np.log(v) + e2[keep] / v)
                th = optimize.minimize(nll, th, method="Nelder-Mead",
                                       options={"xatol": 1e-4, "fatol": 1e-6}).x
                v = ov + math.exp(2 * th[0]) + (math.exp(th[1]) * r) ** 2
                keep = np.abs(e) <= 4 * np.sqrt(v)
            out[f"sensor.{name}.sigma_m"] = math.exp(th[0])
            out[f"sensor.{name}.sigma_frac"] = math.exp(th[1])
    return out


def _within_bounds(values: dict, params) -> dict:
    """`values` with each parameter's value brought into its search range: a fit may
    run past it (a noise term the data cannot tell from zero), and the rig written
    must hold only values the search range allows."""
    lim = {p.name: (p.lower, p.upper) for p in params}
    return {k: (min(max(v, lim[k][0]), lim[k][1]) if k in lim else v) for k, v in values.items()}


def _fit_to_truth(problem: _Problem, values: dict, params, rounds=4, rtol=0.01, *,
                  first=None, budget=None, seen=None):
    """Sensor noise fitted to truth residuals over the readings the filter fuses.

    Which readings the filter fuses depends on the noise it is given (the gate), so the
    selection and the fit alternate: run the filter with the current values, fit each
    sensor to its fused readings' residuals against truth, and repeat until no value
    moves by more than `rtol` (relative) or after `rounds` rounds.

    Parameters
    ----------
    problem : _Problem
    values : dict
        Starting values (name -> value).
    params : list of Parameter
        The parameters; only those among them are fitted.
    rounds, rtol : int, float
        At most `rounds` selections; stop when no value moves by more than `rtol`.
    first : list of batches, optional
        The run with `values`, when the caller has it (it costs no evaluation then).
    budget : int, optional
        At most this many runs of the filter (the search's cap).
    seen : callable, optional
        Called as ``seen(values, batches, evaluations)`` after each run it makes (the
        caller scores it).

    Returns
    -------
    fitted : dict
    evaluations : int
    capped : bool
        True when `budget` stopped the alternation before it settled.
    """
    names = {p.name for p in params}
    refs = _truth_refs(problem)
    cur = dict(values)
    fitted = {}
    n_eval = 0
    for k in range(rounds):
        if k == 0 and first is not None:
            batches = first
        elif budget is not None and n_eval >= budget:
            return fitted, n_eval, True
        else:
            _, _, batches = problem.run(cur)
            n_eval += 1
            if seen is not None:
                seen(dict(cur), batches, n_eval)
        use = [b.code < D.FIRST_REJECT for b in batches]
        new = _within_bounds({k: v for k, v in _fit_sensor_noise(problem, refs, use).items()
                              if k in names}, params)
        moved = max((abs(v / cur.get(k, v) - 1) for k, v in new.items()), default=0.0)
        fitted = new
        cur.update(new)
        if moved <= rtol:
            break
    return fitted, n_eval, False


class _CapReached(Exception):
    """An evaluation past a search stage's budget (the cap's remainder, or the polish's
    40) was asked for: that stage stops there, keeping the best point it ran."""


def _em(problem, values, history, max_rounds=8, tol=1e-6, *, start, budget):
    """Expectation-maximisation for the sensor noise, a line search for the process noise.

    Each round: EM passes (E-step = filter + RTS smoother; M-step = maximum likelihood
    of each sensor's sigma model given the smoothed track and its variance) until they
    stop gaining, then a bounded line search of the innovations likelihood over log q —
    EM's own q step converges too slowly here (the classic EM slowness for the process
    noise). Rounds repeat until the likelihood gains less than `tol` relative.

    `start` is ``(loglik, batches)`` of the run with `values` (the caller has it: it
    costs no evaluation); at most `budget` runs are made. Each improvement is appended
    to `history`, numbered by the run that found it.

    Returns ``(values, evaluations, loglik, capped)``: the best values run, with
    ``capped`` True when `budget` stopped EM before it converged.

    References
    ----------
    R. H. Shumway, D. S. Stoffer, "An approach to time series smoothing and forecasting
    using the EM algorithm", J. Time Series Analysis 3(4), 253-264 (1982).
    """
    values = dict(values)
    n_eval = [0]
    ll, batches = start
    best = [dict(values), ll]

    def run(v):
        if n_eval[0] >= budget:
            raise _CapReached
        ll, _, batches = problem.run(v)
        n_eval[0] += 1
        if ll > best[1]:
            best[0], best[1] = dict(v), ll
            history.append({"iteration": n_eval[0], "loglik": ll, "params": dict(v)})
        return ll, batches

    try:
        _em_rounds(problem, values, ll, batches, run, max_rounds, tol)
    except _CapReached:
        return best[0], n_eval[0], best[1], True
    return best[0], n_eval[0], best[1], False


def _em_rounds(problem, values, ll, batches, run, max_rounds, tol):
    """The rounds of `_em`, each evaluation through `run` (which keeps the best)."""
    qkey = "estimator.accel_psd"
    for _ in range(max_rounds):
        ll_round = ll
        for _ in range(6):  # EM passes on the sensor noise
            q = values.get(qkey, problem.rig.estimator.accel_psd)
            refs, _ = _smoothed_refs(problem, batches, q)
            new = _within_bounds({k: v for k, v in _fit_sensor_noise(problem, refs).items()
                                  if k in values}, problem.params)
            if not new:
                break
            trial = dict(values, **new)
            ll_new, b_new = run(trial)
            if ll_new <= ll + tol * abs(ll):
                if ll_new > ll:
                    values, ll, batches = trial, ll_new, b_new
                break
            values, ll, batches = trial, ll_new, b_new
        if qkey in values:
            top = [ll, None, None]  # the line search's best: loglik, values, batches

            def neg(logq):
                # the line search is unbounded: each q it asks for is run brought into
                # its search range, so every point run (and the best one the tuner
                # returns) is one the search range allows
                v = dict(values, **_within_bounds({qkey: math.exp(logq)}, problem.params))
                ll_q, b_q = run(v)
                if ll_q > top[0]:
                    top[:] = [ll_q, v, b_q]  # kept, so the best is not run a second time
                return -ll_q
            lq = math.log(values[qkey])
            optimize.minimize_scalar(neg, bracket=(lq - 1.0, lq), bounds=None,
                                     options={"xtol": 0.02, "maxiter": 30})
            if top[1] is not None:
                ll, values, batches = top
        if ll - ll_round <= tol * abs(ll):
            break


_POLISH_EVALS = 40  # direct-search evaluations after EM


def _hessian(f, x, h=0.05):
    """Finite-difference Hessian of `f` at `x`: central second differences on the
    diagonal, forward mixed differences off it; `h` is one step or one per coordinate."""
    n = len(x)
    h = np.broadcast_to(np.asarray(h, float), (n,))
    H = np.zeros((n, n))
    f0 = f(x)
    fp = np.zeros(n)
    fm = np.zeros(n)
    for i in range(n):
        e = np.zeros(n)
        e[i] = h[i]
        fp[i] = f(x + e)
        fm[i] = f(x - e)
        H[i, i] = (fp[i] - 2 * f0 + fm[i]) / h[i] ** 2
    for i in range(n):
        for j in range(i + 1, n):
            ei = np.zeros(n)
            ej = np.zeros(n)
            ei[i] = h[i]
            ej[j] = h[j]
            H[i, j] = H[j, i] = (f(x + ei + ej) - fp[i] - fp[j] + f0) / (h[i] * h[j])
    return H


# Curvature steps: 5 % in a log-parameter; 1 ms in a latency (readings come every 10 to
# 50 ms: a step of a few per cent of that moves the likelihood measurably, and stays
# inside the 0 bound of a latency of a few ms).
_STEP_LOG = 0.05
_STEP_LATENCY_S = 1e-3


def _intervals(x, sd, free, bounds, at_bound):
    """95 % intervals ``x +- 1.96 sd`` in the search coordinates, mapped back
    (log-parameters through exp, which gives inf rather than an overflow for a nearly flat
    direction), and how each came out against the search range; returns
    ``(ci, status)``. A parameter at a bound is reported as such whatever its curvature
    there (the curvature of a boundary point is not that of a maximum)."""
    ci, status = {}, {}
    for p, xi, sdi, (lo_b, hi_b), side in zip(free, x, sd, bounds, at_bound):
        if np.isfinite(sdi):
            lo, hi = xi - 1.96 * sdi, xi + 1.96 * sdi
            with np.errstate(over="ignore"):
                ci[p.name] = ((float(np.exp(lo)), float(np.exp(hi))) if p.is_log
                              else (float(lo), float(hi)))
            low_open, high_open = lo <= lo_b, hi >= hi_b
            status[p.name] = (CI_UNBOUNDED if low_open and high_open else CI_BELOW if low_open
                              else CI_ABOVE if high_open else CI_TWO_SIDED)
        else:
            status[p.name] = CI_NOT_MAXIMUM
        if side:
            status[p.name] = side
    return ci, status


def _log_paths(logs) -> list:
    """The log paths of `tune`'s `logs` argument: one path, or a non-empty list of them."""
    if isinstance(logs, (str, os.PathLike)):
        return [os.fspath(logs)]
    try:
        items = list(logs)
    except TypeError:
        raise InputError(f"expected a log path or a list of log paths, got {logs!r}",
                         field="logs") from None
    if not items:
        raise InputError("expected at least one log to tune on, got none", field="logs")
    for i, item in enumerate(items):
        if not isinstance(item, (str, os.PathLike)):
            raise InputError(f"expected a log path, got {item!r}", field=f"logs[{i}]")
    return [os.fspath(item) for item in items]


class _UnknownParameter(InputError):
    """A parameter name that is not one of the rig's tunable parameters.

    Parameters
    ----------
    param : object
        The name asked for.
    tunable : list of str
        The names that are tunable here.
    is_latency : bool
        `param` is a sensor's latency, tunable only when latencies are.
    field, latency_word : str
        The words of the caller: the library's argument (``params``, ``latency=True``),
        or the command's options (``--param``, ``--latency``).
    """

    def __init__(self, param, tunable, is_latency, *, field="params",
                 latency_word="latency=True"):
        self.param, self.tunable, self.is_latency = param, list(tunable), is_latency
        hint = f": a latency is tuned only with {latency_word}" if is_latency else ""
        super().__init__(f"unknown parameter {param!r}{hint}; tunable: "
                         f"{', '.join(self.tunable)}", field=field)


def _selected(rig, params, latency) -> list:
    """The parameters `tune` searches: those named in `params` (one name or a list of
    names), or all of `default_parameters` when it is None or empty."""
    allp = default_parameters(rig, latency)
    if params is None:
        return allp
    if isinstance(params, str):
        params = [params]    # one name, not a list of one-letter names
    try:
        wanted = list(params)
    except TypeError:
        raise InputError(f"expected a parameter name or a list of names, got {params!r}",
                         field="params") from None
    if not wanted:
        return allp
    names = [p.name for p in allp]
    latencies = {p.name for p in default_parameters(rig, latency=True)} - set(names)
    for n in wanted:
        if n not in names:
            raise _UnknownParameter(n, sorted(names), n in latencies)
    return [p for p in allp if p.name in wanted]


def tune(logs, rig=None, *, objective="auto", params=None, latency=False, max_evals=600,
         intervals=True, em=True) -> TuneResult:
    """Tune a rig's noise parameters on one or more logs.

    Parameters
    ----------
    logs : path or list of paths
        One log, or several (at least one).
    rig : Rig or path, optional
        Starting rig (default: the one embedded in the first log).
    objective : {"auto", "innovations", "truth"}
        "auto" is "innovations"; "truth" fits each sensor's noise to its residuals
        against the logs' ground truth, over the readings the filter fuses, then the
        process noise to the track's log score against truth (`_truth_score`).
    params : str or list of str, optional
        Parameter name(s) to tune (default: process noise and every sensor's noise
        terms; a latency needs `latency`).
    latency : bool
        Also tune each sensor's latency, searched from 0 s.
    max_evals : int
        Cap on the search's likelihood evaluations: EM's passes and line search, the
        truth objective's runs to pick the fused readings, and the direct search (after
        EM without `latency`, a polish of at most 40 of them). The curvature intervals
        take ``1 + 2k + k(k-1)/2`` more for k parameters (innovations objective, with
        `intervals`). The result says whether the cap stopped the search.
    intervals : bool
        Compute 95 % intervals from the likelihood's curvature.
    em : bool
        Start the innovations objective with expectation-maximisation passes (filter,
        smoother, closed-form or small M-steps) before the direct search.

    Returns
    -------
    TuneResult
        Its before and after figures (NIS, fused log-likelihood, against truth) are
        those `rangefuse replay` reports for the starting and the tuned rig; when the
        logs carry truth and the tuned rig is clearly worse against it, its
        ``worse_against_truth`` says so (and the summary leads with a warning).
    """
    t0 = time.perf_counter()
    if isinstance(max_evals, bool) or not isinstance(max_evals, (int, np.integer)) or max_evals < 1:
        raise InputError(f"expected a whole number >= 1, got {max_evals!r}", field="max_evals")
    if objective not in ("auto", "innovations", "truth"):
        raise InputError(f"expected 'auto', 'innovations' or 'truth', got {objective!r}",
                         field="objective")
    max_evals = int(max_evals)
    paths = _log_paths(logs)
    rig = load_rig(rig)
    if rig is None:
        with open_log(paths[0]) as log:
            rig = _rig_for(log, None, paths[0])
    allp = _selected(rig, params, latency)
    prob = _Problem(paths, rig, allp, latency)
    has_truth = all(any(v is not None for v in tr.values()) for tr in prob.truths)
    if objective == "auto":
        # The innovations likelihood needs no truth and models every reading the filter
        # uses; truth residuals are an option for logs whose truth is trusted.
        objective = "innovations"
    if objective == "truth" and not has_truth:
        raise InputError("objective 'truth' needs ground truth in every log (/truth)",
                         file=paths[0], field="/truth")
    values0 = {p.name: p.value for p in allp}
    ll0, _, batches0 = prob.run(values0)
    llf0 = prob.last_fused
    fig0 = _replay_figures(rig, prob.truths, batches0)
    ts0 = _truth_score(rig, prob.truths, batches0) if has_truth else math.nan

    def score(v):
        """What the search maximises: the innovations objective, or (objective truth,
        for what is not fitted to residuals) the track's log score against truth."""
        ll, _, batches = prob.run(v)
        if objective == "truth":
            return _truth_score(prob.rig_for(v), prob.truths, batches)
        return ll

    # The history holds each improvement of the best point evaluated so far, by the
    # objective maximised, numbered by the evaluation that found it (curvature probes
    # aside). Its last entry is what the tuner returns and writes: a search may end
    # elsewhere (Powell's last point, a latency asked past its bound), and the figure's
    # "best", the summary and the rig must be one point.
    history = [{"iteration": 0, "loglik": ts0 if objective == "truth" else ll0,
                "params": dict(values0)}]
    fixed = {}
    eval_parts = []
    n_evals = [0]          # every evaluation; those of the search count against the cap
    stopped = ""           # the stage the cap stopped before the direct search, if any
    known = ll0 if objective == "innovations" else ts0   # the score of values0
    if objective == "truth":
        def seen(v, batches, iteration):
            # a run to pick the fused readings is an evaluation too: scored, it may be
            # the best point (with a small cap, the only ones past the start)
            ts = _truth_score(prob.rig_for(v), prob.truths, batches)
            if ts > history[-1]["loglik"]:
                history.append({"iteration": iteration, "loglik": ts, "params": dict(v)})

        fixed, n_fit, fit_capped = _fit_to_truth(prob, values0, allp, first=batches0,
                                                 budget=max_evals, seen=seen)
        stopped = "the truth fit" if fit_capped else ""
        if fixed:
            known = None   # the fitted values have not been scored yet
            if not fit_capped and n_fit < max_evals and \
                    all(p.name in fixed for p in allp):
                # nothing is left for the direct search, which would score the fit: run
                # it once, so that the rig written can be the fit (the rounds scored so
                # far ran the values before it)
                v = dict(values0, **fixed)
                _, _, batches = prob.run(v)
                n_fit += 1
                seen(v, batches, n_fit)
        n_evals[0] += n_fit
        eval_parts.append((n_fit, "to pick the fused readings for the truth fit"))
    em_iters = 0
    if objective == "innovations" and em:
        # Expectation-maximisation (Shumway & Stoffer 1982) climbs the same likelihood in
        # a few filter-and-smoother passes; the direct search below then only polishes.
        values_em, em_iters, ll_em, em_capped = _em(prob, values0, history,
                                                    start=(ll0, batches0), budget=max_evals)
        n_evals[0] += em_iters
        if ll_em > ll0:
            values0 = {k: (values_em[k] if k in values_em else v) for k, v in values0.items()}
            known = ll_em
        eval_parts.append((em_iters, "by EM and the line search"))
        stopped = "EM and the line search" if em_capped else ""
    free = [p for p in allp if p.name not in fixed]
    remaining = max_evals - n_evals[0]
    if free and remaining <= 0 and not stopped:
        stopped = "EM and the line search" if em_iters else "the truth fit"
    polish = bool(em_iters) and not latency
    if polish:
        # EM and its line search come close but stop short of the maximum (the gating
        # makes the likelihood kinked): a short direct search polishes. On the bench's
        # one-hour log, 40 evaluations gain about 350 nats and make the curvature
        # positive definite, for 5 s.
        budget = min(_POLISH_EVALS, remaining)
    else:
        budget = remaining
    bounds = [(math.log(p.lower), math.log(p.upper)) if p.is_log else (p.lower, p.upper)
              for p in free]

    def to_values(x):
        v = dict(values0)
        v.update(fixed)
        for p, xi, (lo, hi) in zip(free, x, bounds):
            if p.is_log:
                v[p.name] = math.exp(xi)  # any positive value is one the rig accepts
            else:
                # a latency's range is the rig's own (it refuses a negative one): kept in
                # it whatever a search step asks for
                v[p.name] = min(max(float(xi), lo), hi)
        return v

    def to_x(v):
        """The search coordinates of values `v`, inside the search range."""
        return np.array([min(max(math.log(max(v[p.name], p.lower)) if p.is_log
                                 else v[p.name], lo), hi)
                         for p, (lo, hi) in zip(free, bounds)])

    def key_of(x):
        return tuple(np.round(x, 10))

    cache = {}
    best = [history[-1]["loglik"]]
    n_direct = [0]
    probing = [False]          # True while the curvature is measured around the optimum
    best_probe = [-math.inf]

    def nll(x):
        key = key_of(x)
        if key not in cache:
            if not probing[0] and n_direct[0] >= budget:
                raise _CapReached
            ll = score(to_values(x))
            cache[key] = -ll
            n_evals[0] += 1
            if probing[0]:
                # Probes around the tuned point measure curvature; they are not search
                # steps, so they stay out of the convergence history (which must end at
                # the values reported).
                best_probe[0] = max(best_probe[0], ll)
            else:
                n_direct[0] += 1
                if ll > best[0]:  # the convergence history: each improvement of the best
                    best[0] = ll
                    history.append({"iteration": n_evals[0], "loglik": ll,
                                    "params": to_values(x)})
        return cache[key]

    x0 = to_x(values0)
    v0 = to_values(x0)
    if known is not None and all(math.isclose(v0[k], values0[k], rel_tol=1e-12, abs_tol=1e-15)
                                 for k in values0):
        cache[key_of(x0)] = -known     # already run (the start, or EM's best): no evaluation
    ended = ""       # how the direct search ended
    if free and budget > 0:
        try:
            res = optimize.minimize(nll, x0, method="Powell", bounds=bounds,
                                    options={"maxfev": max(1000 * len(free), 10 * budget),
                                             "xtol": 1e-2, "ftol": 1e-6})
            ended = "converged" if res.success else str(res.message)
        except _CapReached:
            ended = "polished" if polish and budget < remaining else "cap"
        eval_parts.append((n_direct[0], "by the direct search"))
    capped = bool(stopped) or ended == "cap"
    cap_words = (f"the cap of {max_evals} search evaluation{'' if max_evals == 1 else 's'} "
                 "(raise --max-evals)")
    lead = "EM and line search, then " if em_iters else ""
    if stopped:
        message = (f"{stopped} reached {cap_words}" + (": no direct search ran" if free
                                                       else ""))
    elif not free:
        message = "fitted to truth" if fixed else "nothing to optimise"
    elif ended == "converged":
        message = "converged" + (" (EM and line search, then a direct search)" if em_iters
                                 else "")
    elif ended == "polished":
        message = f"EM and line search, then a {n_direct[0]}-evaluation polish by direct search"
    elif ended == "cap":
        message = f"{lead}direct search stopped at {cap_words}"
    else:
        message = f"{lead}direct search: {ended}"
    # the best point evaluated, by the objective maximised (see `history`)
    values = dict(history[-1]["params"])
    # the fitted sensor noise is what the truth objective writes, unless the best point
    # evaluated holds other values (the start, or an earlier round of the fit when the
    # cap stopped it)
    start_kept = bool(fixed) and history[-1]["iteration"] == 0
    if start_kept:
        message += ("; no point evaluated scored above the starting rig against truth: its "
                    "values are kept")
    elif fixed and any(values[k] != v for k, v in fixed.items()):
        # an earlier round of the fit scored higher against truth than its last one (the
        # rounds move by about 1 %): that round is written, and the summary says so
        message += (f"; the fit's round at evaluation {history[-1]['iteration']} scored "
                    "highest against truth and is the one written")
        fixed = {k: values[k] for k in fixed}   # the values written are those fitted then
    x = to_x(values)
    ci, ci_status = {}, {}
    steps = np.array([_STEP_LOG if p.is_log else _STEP_LATENCY_S for p in free])
    # A parameter less than a curvature step from a bound of its search range is at that
    # bound: the search stopped at the boundary, where the likelihood need not curve down.
    at_bound = [CI_AT_LOWER if xi - h < lo else CI_AT_UPPER if xi + h > hi else ""
                for xi, h, (lo, hi) in zip(x, steps, bounds)]
    if not intervals:
        ci_status = {p.name: CI_SKIPPED for p in free}
    elif objective == "truth":
        # the truth score sums serially correlated errors: its curvature is no interval;
        # what the direct search never moved (the cap stopped the fit before it) is not
        # fitted to anything
        ci_status = {p.name: CI_NOT_SEARCHED if stopped else side or CI_FITTED_TO_TRUTH
                     for p, side in zip(free, at_bound)}
    elif len(free):
        n_before = n_evals[0]
        # A linear parameter (a latency) at a bound is held while the others' curvature
        # is measured: a probe past its bound would ask the rig for a value it refuses.
        # A log-parameter's probes stay positive, so it is probed wherever it is.
        inner = np.array([not (s and not p.is_log) for p, s in zip(free, at_bound)])
        probing[0] = True
        ll_tuned = -nll(x)
        sd = np.full(len(free), np.nan)
        kind = "marginal"
        if inner.any():
            xi_ = x[inner]

            def nll_inner(y):
                z = x.copy()
                z[inner] = y
                return nll(z)
            H = _hessian(nll_inner, xi_, steps[inner])
            try:
                np.linalg.cholesky(H)
                var = np.diag(np.linalg.inv(H))
            except np.linalg.LinAlgError:
                # not a clean maximum in every direction (the likelihood has the kinks of
                # gating): fall back to intervals with the other parameters held
                kind = "conditional"
                dg = np.diag(H)
                var = np.where(dg > 0, 1.0 / np.where(dg > 0, dg, 1.0), np.nan)
            sd[inner] = np.sqrt(var)
        probing[0] = False
        eval_parts.append((n_evals[0] - n_before, "for the curvature (95% intervals)"))
        ci, ci_status = _intervals(x, sd, free, bounds, at_bound)
        if kind == "conditional":
            message += "; curvature not positive definite: intervals hold the other parameters fixed"
        if any(at_bound):
            names = ", ".join(p.name for p, s in zip(free, at_bound) if s)
            if capped:
                # the search was cut short: that it left a parameter at a bound says
                # nothing of where the likelihood's maximum is
                message += (f"; {names} at a bound of the search range where the search, "
                            "stopped at the cap, left it: not shown to be the best value "
                            "there, so no interval")
            else:
                message += (f"; {names} at a bound of the search range: the likelihood has "
                            "no maximum inside it there, so no interval")
        gain = best_probe[0] - ll_tuned
        if gain > 1.9:  # more than a 95 % interval spans: the search stopped short
            message += (f"; a curvature probe (5 % from the tuned values) scored {gain:.2f} "
                        "higher: the search stopped short of the maximum (a good fit, not the "
                        "best one)")
        elif gain > 0.05:
            message += (f"; a curvature probe scored {gain:.2f} higher: the optimum is flat "
                        "there (a 95% interval spans about 1.9 in log-likelihood)")
    lim = {p.name: p for p in allp}
    clamped = []
    for k, v in fixed.items():
        # a fit to truth that falls outside the search range is held at its bound: it is
        # at that bound, not a fit (the innovations objective words it the same way)
        side = (CI_AT_LOWER if v <= lim[k].lower else CI_AT_UPPER if v >= lim[k].upper
                else "")
        ci_status[k] = side or CI_FITTED_TO_TRUTH
        if side:
            clamped.append(k)
    if clamped:
        message += (f"; {', '.join(clamped)}: the fit to truth falls outside the search "
                    "range, so it is held at the bound")
    if start_kept:
        ci_status = {p.name: CI_START_KEPT for p in allp}
    if objective == "truth":
        message += ("; sensor noise fitted to the truth residuals of the fused readings, the "
                    "rest to the track's log score against truth (no curvature intervals)")
    n_search = sum(n for n, what in eval_parts if "curvature" not in what)
    tuned = [dataclasses.replace(p, value=values[p.name]) for p in allp]
    rig1 = apply(rig, tuned)
    ll1, _, batches1 = prob.run(values)
    llf1 = prob.last_fused
    fig1 = _replay_figures(rig1, prob.truths, batches1)
    ts1 = _truth_score(rig1, prob.truths, batches1) if has_truth else math.nan
    worse = _worse_against_truth(fig0["truth"], fig1["truth"])
    if objective == "innovations" and ("RMSE" in worse or "cover" in worse):
        # the truth objective fits the sensor noise to the truth residuals and the process
        # noise to the track's errors: a cure for the RMSE and the cover; a NEES grown by
        # a few re-acquisitions it floors (see `_truth_score`) is not its to cure
        worse += ("; the innovations likelihood takes the target's motion for white "
                  "acceleration, and --objective truth fits the rig to the truth instead")
    nees = _nees_note(fig0["truth"], fig1["truth"])
    if nees:
        message += "; " + nees
    if objective == "innovations" and has_truth and not worse:
        # The likelihood fits the innovations; a target whose motion is not white
        # acceleration (stops and steps) can pull the process noise to where truth says
        # otherwise. The summary shows the replay's figures against truth for both rigs.
        message += ("; the logs carry truth: the figures against it are below (or fit to it "
                    "with --objective truth)")
    return TuneResult(objective=objective, params=tuned, initial=allp, ci95=ci,
                      loglik_before=ll0, loglik_after=ll1, nis_before=fig0["nis"],
                      nis_after=fig1["nis"], rig=rig1, history=history,
                      seconds=time.perf_counter() - t0, n_readings=prob.n, message=message,
                      n_evals=n_evals[0], eval_parts=eval_parts,
                      loglik_fused_before=llf0, loglik_fused_after=llf1, ci_status=ci_status,
                      truth_before=fig0["truth"], truth_after=fig1["truth"],
                      nis_dirs_before=fig0["nis_dirs"], nis_dirs_after=fig1["nis_dirs"],
                      worse_against_truth=worse, truth_score_before=ts0, truth_score_after=ts1,
                      max_evals=max_evals, n_search=n_search, capped=capped)


# --- command line ---------------------------------------------------------------------------
def register(sub):
    p = sub.add_parser(
        "tune", help="estimate process and sensor noise from logs; write a tuned rig",
        description="Estimate the process noise and each sensor's noise parameters from\n"
                    "one or more logs by maximising the innovations log-likelihood, or\n"
                    "from residuals against ground truth when the logs carry it.",
        epilog="example:\n  rangefuse tune datasets/tuning-run.h5 -o tuned.rig.toml "
               "--objective innovations --plot tune.png",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("logs", nargs="+", metavar="LOG",
                   help="log file(s) (HDF5) to tune on; several logs are fitted together, "
                        "each on its own tracks")
    p.add_argument("--rig", help="starting rig (default: the one in the first log)")
    p.add_argument("-o", "--out", "--output", dest="out", required=True, metavar="TUNED.toml",
                   help="tuned rig to write")
    p.add_argument("--objective", choices=("auto", "innovations", "truth"), default="auto",
                   help="innovations: maximise the innovations log-likelihood (needs no "
                        "ground truth); truth: fit each sensor's noise to its residuals "
                        "against the logs' /truth, then the process noise to the track's "
                        "log score against it "
                        "(every log needs truth); auto (default): innovations")
    p.add_argument("--param", action="append", metavar="NAME",
                   help="tune only this parameter (repeatable), e.g. estimator.accel_psd "
                        "(a sensor's latency_s needs --latency)")
    p.add_argument("--latency", action="store_true", help="also tune sensor latencies")
    p.add_argument("--max-evals", type=int, default=600, metavar="N",
                   help="cap on the search's likelihood evaluations (default 600): EM's "
                        "passes and line search, the truth objective's runs to pick the "
                        "fused readings, and the direct search (after EM without --latency, "
                        "a polish of at most 40); the 95%% intervals' curvature takes "
                        "1 + 2k + k(k-1)/2 more for k parameters (--no-intervals skips it). "
                        "The summary says when the cap stopped the search")
    p.add_argument("--no-intervals", action="store_true", help="skip the curvature intervals")
    p.add_argument("--plot", metavar="FIG.png", help="draw the tuner's convergence")
    p.set_defaults(func=_main)


def _main(args) -> int:
    # (-o and --plot were checked by the command line before any work: not an input, one
    # path each, a folder that takes files)
    inputs = list(args.logs) + ([args.rig] if args.rig else [])
    try:
        res = tune(args.logs, rig=args.rig, objective=args.objective, params=args.param,
                   latency=args.latency, max_evals=args.max_evals,
                   intervals=not args.no_intervals)
    except _UnknownParameter as exc:
        # said in the command's words: its option and its flag, not the library's
        raise _UnknownParameter(exc.param, exc.tunable, exc.is_latency, field="--param",
                                latency_word="--latency") from None
    print(res.summary())
    if res.worse_against_truth:
        # said on stdout first thing, and here too: a script that keeps only the rig
        # must not miss it
        print(f"rangefuse tune: warning: {res.worse_against_truth}", file=sys.stderr)
    if args.rig:
        source = Rig.load_with_text(args.rig)[1]
    else:
        with open_log(args.logs[0]) as log:
            source = log.rig_toml
    head = [f"# {_TUNED_MARK} ({res.objective}) from "
            f"{', '.join(os.path.basename(p) for p in args.logs)}:"]
    head += [f"#   {p.name}: {p0.value:.4g} -> {p.value:.4g}"
             for p0, p in zip(res.initial, res.params)]
    if res.worse_against_truth:
        head.append(f"# WARNING: {res.worse_against_truth}")  # the rig carries it along
    with atomic_output(args.out, inputs=inputs) as tmp:
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(rig_text_with(source, res.rig, res.params, head))
    print(f"tuned rig: {args.out}")
    if args.plot:
        res.plot(args.plot)
        print(f"figure: {args.plot}")
    return 0
