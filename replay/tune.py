"""Tuning: estimate process and sensor noise from logs.

Two objectives:

* ``innovations`` — maximise the innovations log-likelihood over the noise parameters,
  across one or many logs (the prediction-error decomposition, Schweppe 1965). Needs no
  ground truth.
* ``truth`` — when the logs carry ground truth: each sensor's noise is fitted directly to
  its residuals against truth (maximum likelihood of the sensor's sigma model, with
  outliers trimmed), then the process noise by the innovations likelihood with those
  sensor noises held.

Approximate 95 % intervals come from the curvature of the log-likelihood at the optimum
(observed information, in log-parameters).

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
import time
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize

from fusion import decisions as D
from fusion._toml import dumps
from fusion.errors import InputError
from fusion.fuser import Fuser
from fusion.rig import Rig

from . import metrics as M
from ._io import atomic_output, refuse_overwrite
from .logfile import open_log
from .run import _clean_truth, _rig_for, _truth_interp, load_rig
from fusion.estimators.smoother import rts_smooth

__all__ = ["tune", "TuneResult", "Parameter", "register"]


@dataclass(frozen=True)
class Parameter:
    """One tunable value: where it lives in the rig and its current value."""

    name: str            # e.g. "estimator.accel_psd", "sensor.echo_front.sigma_m"
    value: float
    lower: float = 1e-9
    upper: float = 1e3


@dataclass
class TuneResult:
    """Tuned parameters with intervals, and the fit before and after."""

    objective: str
    params: list                  # list of Parameter (tuned values)
    initial: list                 # list of Parameter (values before)
    ci95: dict                    # name -> (low, high)
    loglik_before: float
    loglik_after: float
    nis_before: tuple             # (mean, n, (lo, hi))
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

    @property
    def best_iteration(self) -> int:
        """The iteration (likelihood evaluation) that found the tuned values, as the
        convergence figure numbers it."""
        return max(self.history, key=lambda h: h["loglik"])["iteration"] if self.history else 0

    def summary(self) -> str:
        parts = " + ".join(f"{n} {what}" for n, what in self.eval_parts if n)
        head, *notes = self.message.split("; ")
        L = [f"tuning by {self.objective} over {self.n_readings} readings in "
             f"{self.seconds:.1f} s: {head}",
             f"  {self.n_evals} likelihood evaluations" + (f" = {parts}" if parts else ""),
             f"  tuned values found at iteration {self.best_iteration} (the convergence "
             "figure's iterations count these evaluations)"]
        L += [f"  note: {n}" for n in notes]
        L += ["", f"  {'parameter':<34}{'before':>12}{'tuned':>12}{'95% interval':>26}"]
        for p0, p in zip(self.initial, self.params):
            lo, hi = self.ci95.get(p.name, (math.nan, math.nan))
            # no interval where the likelihood does not curve down along the parameter
            iv = f"[{lo:.4g}, {hi:.4g}]" if np.isfinite(lo) and np.isfinite(hi) else \
                "not a maximum here"
            L.append(f"  {p.name:<34}{p0.value:>12.4g}{p.value:>12.4g}{iv:>26}")
        L.append("")
        L.append(f"  {'log-likelihood (nats)':<34}{'before':>12}{'tuned':>12}")
        L.append(f"  {'tuning objective (*)':<34}{self.loglik_before:>12.1f}{self.loglik_after:>12.1f}")
        L.append(f"  {'fused readings only (**)':<34}{self.loglik_fused_before:>12.1f}"
                 f"{self.loglik_fused_after:>12.1f}")
        L.append("  (*)  what the tuner maximises: the fused readings' innovations log-likelihood "
                 "plus,")
        L.append("       for each gated or crosstalk reading, the outlier term log(outlier "
                 "density), so")
        L.append("       no parameter change can score by pushing readings out of the gate")
        L.append("  (**) the \"innovations log-likelihood\" of `rangefuse replay` (here summed "
                 "over directions)")
        for label, (mean, n, (lo, hi)) in (("before", self.nis_before), ("after", self.nis_after)):
            L.append(f"  time-averaged NIS {label}: {mean:.3f} over {n} readings, 95% bounds "
                     f"[{lo:.3f}, {hi:.3f}]: {M.consistency_verdict(mean, n)}")
        return "\n".join(L)

    def plot(self, path=None):
        from .plots import plot_convergence
        return plot_convergence(self.history, out=path)

    def value(self, name) -> float:
        for p in self.params:
            if p.name == name:
                return p.value
        raise KeyError(name)


# --- parameters in a rig ------------------------------------------------------------------
def default_parameters(rig: Rig, latency=False) -> list:
    ps = [Parameter("estimator.accel_psd", rig.estimator.accel_psd, 1e-6, 1e3)]
    for name, s in rig.sensors.items():
        if s.kind == "triangulation":
            ps.append(Parameter(f"sensor.{name}.volts_sigma", s.volts_sigma, 1e-5, 1.0))
        else:
            ps.append(Parameter(f"sensor.{name}.sigma_m", s.sigma_m, 1e-5, 1.0))
            ps.append(Parameter(f"sensor.{name}.sigma_frac", max(s.sigma_frac, 1e-5), 1e-6, 0.5))
        if latency:
            ps.append(Parameter(f"sensor.{name}.latency_s", s.latency_s, -0.2, 0.2))
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


# --- the likelihood machine ---------------------------------------------------------------
class _Problem:
    """Logs decoded once; the estimator re-run for each parameter vector."""

    def __init__(self, logs, rig, params, latency):
        self.rig = rig
        self.params = params
        self.latency = latency
        self.preps = []
        self.truths = []
        self.n = 0
        fuser = Fuser(rig)
        self.sensor_names = fuser.sensor_names
        for path in logs:
            with open_log(path) as log:
                _rig_for(log, rig, path)
                f = Fuser(rig)
                prep = f.prepare(log.readings(), log.environment_for(rig))
                if prep is None:
                    continue
                self.preps.append(prep)
                self.truths.append({d: _clean_truth(log.truth(d)) for d in rig.directions})
                self.n += len(prep["sensor"])
        if not self.preps:
            raise InputError("the logs hold no readings to tune on", field="/sensors")
        self.base = {p.name: p.value for p in params}
        self._split_sigma()

    def _split_sigma(self):
        """Per prepared reading, the part of sigma^2 that the tuned terms do not set."""
        self.other_var = []
        for prep in self.preps:
            ov = np.zeros_like(prep["sg"])
            for si, name in enumerate(self.sensor_names):
                s = self.rig.sensors[name]
                m = prep["sensor"] == si
                if s.kind == "echo":
                    r = prep["raw_m"][m]
                    tuned = s.sigma_m ** 2 + (s.sigma_frac * r) ** 2
                    ov[m, 0] = np.maximum(prep["sg"][m, 0] ** 2 - tuned, 0.0)
            self.other_var.append(ov)

    def sigmas(self, values, k):
        prep = self.preps[k]
        sg = prep["sg"].copy()
        for si, name in enumerate(self.sensor_names):
            s = self.rig.sensors[name]
            m = prep["sensor"] == si
            if s.kind == "triangulation":
                key = f"sensor.{name}.volts_sigma"
                if key in values:
                    from fusion.sensors.adc import adc_quantisation_sigma_v
                    q = adc_quantisation_sigma_v(s.adc_bits, s.adc_vref) if s.output == "counts" else 0.0
                    f = math.hypot(values[key], q) / math.hypot(s.volts_sigma, q)
                    sg[m] *= f
            else:
                a = values.get(f"sensor.{name}.sigma_m", s.sigma_m)
                b = values.get(f"sensor.{name}.sigma_frac", s.sigma_frac)
                r = prep["raw_m"][m]
                sg[m, 0] = np.sqrt(self.other_var[k][m, 0] + a * a + (b * r) ** 2)
        return sg

    def run(self, values):
        """Runs with parameter values (dict); returns total loglik, NIS stats, batches."""
        est = dataclasses.replace(self.rig.estimator,
                                  accel_psd=values.get("estimator.accel_psd",
                                                       self.rig.estimator.accel_psd))
        rig = self.rig.replace(estimator=est)
        total = 0.0
        self.last_fused = 0.0
        nis_sum, nis_n = 0.0, 0
        batches = []
        for k, prep in enumerate(self.preps):
            f = Fuser(rig)
            p2 = dict(prep)
            p2["sg"] = self.sigmas(values, k)
            if self.latency:
                t = prep["t_meas"].copy()
                for si, name in enumerate(self.sensor_names):
                    key = f"sensor.{name}.latency_s"
                    if key in values:
                        m = prep["sensor"] == si
                        t[m] = t[m] + self.rig.sensors[name].latency_s - values[key]
                p2["t_meas"] = t
            b = f.run_prepared(p2)
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


def _fit_sensor_noise(problem: _Problem, refs) -> dict:
    """Each sensor's sigma model fitted by maximum likelihood to its residuals against a
    reference range (truth, or the smoothed track with its variance), trimmed at 4 sigma."""
    out = {}
    for si, name in enumerate(problem.sensor_names):
        s = problem.rig.sensors[name]
        res, rr, base, ex = [], [], [], []
        for k, prep in enumerate(problem.preps):
            ref_all, extra_all = refs[k]
            m = (prep["sensor"] == si) & (prep["code"] == D.ACCEPTED) & np.isfinite(ref_all)
            if not m.any():
                continue
            tr = ref_all[m]
            z = prep["z"][m]
            # the candidate on the reference's side of the curve
            col = np.where(np.isfinite(z[:, 1]) & (np.abs(z[:, 1] - tr) < np.abs(z[:, 0] - tr)), 1, 0)
            zz = z[np.arange(len(z)), col]
            ok = np.isfinite(zz)
            res.append((zz - tr)[ok])
            rr.append(prep["raw_m"][m][ok] if s.kind == "echo" else zz[ok])
            base.append(prep["sg"][m][np.arange(len(z)), col][ok])
            ex.append(extra_all[m][ok])
        if not res:
            continue
        e = np.concatenate(res)
        r = np.concatenate(rr)
        sb = np.concatenate(base)
        e2 = e * e + np.concatenate(ex)   # E[(z - x)^2]
        if e.size < 20:
            continue
        keep = np.ones(e.size, bool)
        if s.kind == "triangulation":
            # sigma = f * base: closed form
            for _ in range(5):
                f = math.sqrt(np.mean(e2[keep] / sb[keep] ** 2))
                keep = np.abs(e) <= 4 * f * sb
            from fusion.sensors.adc import adc_quantisation_sigma_v
            q = adc_quantisation_sigma_v(s.adc_bits, s.adc_vref) if s.output == "counts" else 0.0
            tot = f * math.hypot(s.volts_sigma, q)
            out[f"sensor.{name}.volts_sigma"] = math.sqrt(max(tot * tot - q * q, 1e-12))
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


def _em(problem, values, history, max_rounds=8, tol=1e-6):
    """Expectation-maximisation for the sensor noise, a line search for the process noise.

    Each round: EM passes (E-step = filter + RTS smoother; M-step = maximum likelihood
    of each sensor's sigma model given the smoothed track and its variance) until they
    stop gaining, then a bounded line search of the innovations likelihood over log q —
    EM's own q step converges too slowly here (the classic EM slowness for the process
    noise). Rounds repeat until the likelihood gains less than `tol` relative.

    Returns ``(values, evaluations, loglik)``.

    References
    ----------
    R. H. Shumway, D. S. Stoffer, "An approach to time series smoothing and forecasting
    using the EM algorithm", J. Time Series Analysis 3(4), 253-264 (1982).
    """
    values = dict(values)
    n_eval = [0]
    best = [dict(values), -math.inf]

    def run(v):
        ll, _, batches = problem.run(v)
        n_eval[0] += 1
        if ll > best[1]:
            best[0], best[1] = dict(v), ll
            history.append({"iteration": n_eval[0], "loglik": ll, "params": dict(v)})
        return ll, batches

    ll, batches = run(values)
    qkey = "estimator.accel_psd"
    for _ in range(max_rounds):
        ll_round = ll
        for _ in range(6):  # EM passes on the sensor noise
            q = values.get(qkey, problem.rig.estimator.accel_psd)
            refs, _ = _smoothed_refs(problem, batches, q)
            new = {k: v for k, v in _fit_sensor_noise(problem, refs).items() if k in values}
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
            def neg(logq):
                return -run(dict(values, **{qkey: math.exp(logq)}))[0]
            lq = math.log(values[qkey])
            r = optimize.minimize_scalar(neg, bracket=(lq - 1.0, lq), bounds=None,
                                         options={"xtol": 0.02, "maxiter": 30})
            if -r.fun > ll:
                values = dict(values, **{qkey: math.exp(r.x)})
                ll, batches = run(values)
        if ll - ll_round <= tol * abs(ll):
            break
    return best[0], n_eval[0], best[1]


_POLISH_EVALS = 40  # direct-search evaluations after EM


def _hessian(f, x, h=0.05):
    n = len(x)
    H = np.zeros((n, n))
    f0 = f(x)
    fp = np.zeros(n)
    fm = np.zeros(n)
    for i in range(n):
        e = np.zeros(n)
        e[i] = h
        fp[i] = f(x + e)
        fm[i] = f(x - e)
        H[i, i] = (fp[i] - 2 * f0 + fm[i]) / h ** 2
    for i in range(n):
        for j in range(i + 1, n):
            ei = np.zeros(n)
            ej = np.zeros(n)
            ei[i] = h
            ej[j] = h
            H[i, j] = H[j, i] = (f(x + ei + ej) - fp[i] - fp[j] + f0) / h ** 2
    return H


def tune(logs, rig=None, *, objective="auto", params=None, latency=False, max_evals=600,
         intervals=True, em=True) -> TuneResult:
    """Tune a rig's noise parameters on one or more logs.

    Parameters
    ----------
    logs : path or list of paths
    rig : Rig or path, optional
        Starting rig (default: the one embedded in the first log).
    objective : {"auto", "innovations", "truth"}
        "auto" is "innovations"; "truth" fits each sensor's noise to its residuals
        against the logs' ground truth and only the process noise by likelihood.
    params : list of str, optional
        Parameter names to tune (default: process noise and every sensor's noise terms).
    latency : bool
        Also tune each sensor's latency (innovations objective).
    max_evals : int
        Cap on likelihood evaluations for the optimiser.
    intervals : bool
        Compute 95 % intervals from the likelihood's curvature.
    em : bool
        Start the innovations objective with expectation-maximisation passes (filter,
        smoother, closed-form or small M-steps) before the direct search.

    Returns
    -------
    TuneResult
    """
    t0 = time.perf_counter()
    paths = [os.fspath(logs)] if isinstance(logs, (str, os.PathLike)) else [os.fspath(p) for p in logs]
    rig = load_rig(rig)
    if rig is None:
        with open_log(paths[0]) as log:
            rig = _rig_for(log, None, paths[0])
    allp = default_parameters(rig, latency)
    if params:
        names = {p.name for p in allp}
        for n in params:
            if n not in names:
                raise InputError(f"unknown parameter {n!r}; tunable: {', '.join(sorted(names))}",
                                 field="--param")
        allp = [p for p in allp if p.name in params]
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
    ll0, nis0, _ = prob.run(values0)
    llf0 = prob.last_fused
    history = [{"iteration": 0, "loglik": ll0, "params": dict(values0)}]
    fixed = {}
    if objective == "truth":
        fixed = _fit_sensor_noise(prob, _truth_refs(prob))
        fixed = {k: v for k, v in fixed.items() if k in values0}
    em_iters = 0
    if objective == "innovations" and em:
        # Expectation-maximisation (Shumway & Stoffer 1982) climbs the same likelihood in
        # a few filter-and-smoother passes; the direct search below then only polishes.
        values_em, em_iters, ll_em = _em(prob, values0, history)
        if ll_em > ll0:
            values0 = {k: (values_em[k] if k in values_em else v) for k, v in values0.items()}
    free = [p for p in allp if p.name not in fixed]
    if em_iters and not latency:
        # EM and its line search come close but stop short of the maximum (the gating
        # makes the likelihood kinked): a short direct search polishes. On the bench's
        # one-hour log, 40 evaluations gain about 350 nats and make the curvature
        # positive definite, for 5 s.
        max_evals_direct = min(_POLISH_EVALS, max_evals)
    else:
        max_evals_direct = max_evals
    lin = [p.name.endswith("latency_s") for p in free]

    def to_values(x):
        v = dict(values0)
        v.update(fixed)
        for p, xi, is_lin in zip(free, x, lin):
            v[p.name] = float(xi) if is_lin else float(math.exp(xi))
        return v

    cache = {}
    best = [max(h["loglik"] for h in history)]
    n_evals = [em_iters]
    probing = [False]          # True while the curvature is measured around the optimum
    best_probe = [-math.inf]

    def nll(x):
        key = tuple(np.round(x, 10))
        if key not in cache:
            ll, _, _ = prob.run(to_values(x))
            cache[key] = -ll
            n_evals[0] += 1
            if probing[0]:
                # Probes around the tuned point measure curvature; they are not search
                # steps, so they stay out of the convergence history (which must end at
                # the values reported).
                best_probe[0] = max(best_probe[0], ll)
            elif ll > best[0]:  # the convergence history: each improvement of the optimum
                best[0] = ll
                history.append({"iteration": n_evals[0], "loglik": ll, "params": to_values(x)})
        return cache[key]

    x0 = np.array([values0[p.name] if is_lin else math.log(max(values0[p.name], p.lower))
                   for p, is_lin in zip(free, lin)])
    bounds = [(p.lower, p.upper) if is_lin else (math.log(p.lower), math.log(p.upper))
              for p, is_lin in zip(free, lin)]
    message = "nothing to optimise"
    x = x0
    eval_parts = [(em_iters, "by EM and the line search")]
    if em_iters and not max_evals_direct:
        message = "converged (EM and line search)"
    elif len(free):
        res = optimize.minimize(nll, x0, method="Powell", bounds=bounds,
                                options={"maxfev": max_evals_direct, "xtol": 1e-2, "ftol": 1e-6})
        x = res.x
        if em_iters:
            message = ("converged (EM and line search, then a direct search)" if res.success
                       else f"EM and line search, then {max_evals_direct} evaluations of direct "
                       "search")
        else:
            message = ("converged" if res.success else
                       f"stopped at the cap of {max_evals} evaluations (raise --max-evals)"
                       if res.nfev >= max_evals else str(res.message))
        eval_parts.append((n_evals[0] - em_iters, "by the direct search"))
    values = to_values(x)
    ci = {}
    if intervals and len(free):
        n_before = n_evals[0]
        probing[0] = True
        ll_tuned = -nll(x)
        H = _hessian(nll, x)
        probing[0] = False
        eval_parts.append((n_evals[0] - n_before, "for the curvature (95% intervals)"))
        kind = "marginal"
        try:
            np.linalg.cholesky(H)
            var = np.diag(np.linalg.inv(H))
        except np.linalg.LinAlgError:
            # not a clean maximum in every direction (the likelihood has the kinks of
            # gating): fall back to intervals with the other parameters held
            kind = "conditional"
            var = np.where(np.diag(H) > 0, 1.0 / np.where(np.diag(H) > 0, np.diag(H), 1.0), np.nan)
        sd = np.sqrt(var)
        for p, xi, sdi, is_lin in zip(free, x, sd, lin):
            ci[p.name] = (xi - 1.96 * sdi, xi + 1.96 * sdi) if is_lin else \
                (math.exp(xi - 1.96 * sdi), math.exp(xi + 1.96 * sdi))
        if kind == "conditional":
            message += "; curvature not positive definite: intervals hold the other parameters fixed"
        gain = best_probe[0] - ll_tuned
        if gain > 1.9:  # more than a 95 % interval spans: the search stopped short
            message += (f"; a curvature probe (5 % from the tuned values) scored {gain:.2f} "
                        "higher: the search stopped short of the maximum (a good fit, not the "
                        "best one)")
        elif gain > 0.05:
            message += (f"; a curvature probe scored {gain:.2f} higher: the optimum is flat "
                        "there (a 95% interval spans about 1.9 in log-likelihood)")
    if fixed and intervals:
        message += "; sensor noise fitted to truth residuals (intervals only for the rest)"
    if objective == "innovations" and has_truth:
        # The likelihood fits the innovations; a target whose motion is not white
        # acceleration (stops and steps) can pull the process noise to where truth says
        # otherwise. The logs can say which.
        message += ("; the logs carry truth: check the tuned rig against it with `rangefuse "
                    "replay LOG --rig TUNED.toml` (RMSE, NEES), or fit to it with "
                    "--objective truth")
    ll1, nis1, _ = prob.run(values)
    llf1 = prob.last_fused
    tuned = [dataclasses.replace(p, value=values[p.name]) for p in allp]
    return TuneResult(objective=objective, params=tuned, initial=allp, ci95=ci,
                      loglik_before=ll0, loglik_after=ll1, nis_before=nis0, nis_after=nis1,
                      rig=apply(rig, tuned), history=history,
                      seconds=time.perf_counter() - t0, n_readings=prob.n, message=message,
                      n_evals=n_evals[0], eval_parts=eval_parts,
                      loglik_fused_before=llf0, loglik_fused_after=llf1)


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
    p.add_argument("-o", "--out", required=True, metavar="TUNED.toml", help="tuned rig to write")
    p.add_argument("--objective", choices=("auto", "innovations", "truth"), default="auto",
                   help="innovations: maximise the innovations log-likelihood (needs no "
                        "ground truth); truth: fit each sensor's noise to its residuals "
                        "against the logs' /truth, then the process noise by likelihood "
                        "(every log needs truth); auto (default): innovations")
    p.add_argument("--param", action="append", metavar="NAME",
                   help="tune only this parameter (repeatable), e.g. estimator.accel_psd")
    p.add_argument("--latency", action="store_true", help="also tune sensor latencies")
    p.add_argument("--max-evals", type=int, default=600,
                   help="cap on likelihood evaluations (default 600)")
    p.add_argument("--no-intervals", action="store_true", help="skip the curvature intervals")
    p.add_argument("--plot", metavar="FIG.png", help="draw the tuner's convergence")
    p.set_defaults(func=_main)


def _main(args) -> int:
    inputs = list(args.logs) + ([args.rig] if args.rig else [])
    refuse_overwrite(args.out, inputs)
    res = tune(args.logs, rig=args.rig, objective=args.objective, params=args.param,
               latency=args.latency, max_evals=args.max_evals, intervals=not args.no_intervals)
    print(res.summary())
    with atomic_output(args.out, inputs=inputs) as tmp:
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(f"# tuned by rangefuse tune ({res.objective}) from "
                     f"{', '.join(os.path.basename(p) for p in args.logs)}\n")
            fh.write(dumps(res.rig.to_dict(), trim_float_noise=True))
    print(f"tuned rig: {args.out}")
    if args.plot:
        res.plot(args.plot)
        print(f"figure: {args.plot}")
    return 0
