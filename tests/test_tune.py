"""Tuning recovers the noise a log was simulated with.

The tuning-run demo log was simulated with exactly the noise its embedded rig states
(datasets/tuning-run.scenario.toml), so the rig's values are the truth to recover.
"""
import dataclasses
import math
import os

import numpy as np
import pytest

from fusion.rig import Rig
from replay.logfile import open_log
from replay.run import run
from replay.tune import apply, default_parameters, tune, _hessian

LOG = os.path.join(os.path.dirname(__file__), "..", "datasets", "tuning-run.h5")


def _true_rig():
    with open_log(LOG) as log:
        return Rig.from_toml(log.rig_toml)


def _perturbed(rig):
    ps = default_parameters(rig)
    return apply(rig, [dataclasses.replace(p, value=p.value * (2.0 if i % 2 else 0.5))
                       for i, p in enumerate(ps)])


@pytest.fixture(scope="module")
def tuned():
    rig = _true_rig()
    return rig, tune(LOG, rig=_perturbed(rig), objective="innovations", intervals=False)


def test_innovations_likelihood_recovers_simulated_noise_within_15_percent(tuned):
    # Maximum likelihood from the prediction-error decomposition (Schweppe 1965) is
    # consistent: on a long log with known noise it returns that noise.
    rig, res = tuned
    true = {p.name: p.value for p in default_parameters(rig)}
    for p in res.params:
        if p.name == "estimator.accel_psd":
            continue  # the simulated motion is smooth waypoints, not white acceleration
        assert abs(p.value / true[p.name] - 1) < 0.15, (p.name, p.value, true[p.name])
    assert res.loglik_after > res.loglik_before


def test_tuned_nis_moves_to_consistency(tuned):
    # Time-averaged NIS inside its 95 % chi-square bounds after tuning (Bar-Shalom, Li &
    # Kirubarajan 2001, §5.4, eq. 5.4.2-6); the perturbed start is outside them.
    # The simulated motion is not white acceleration, so exact consistency is not owed;
    # tuning must move the NIS most of the way to 1 and end within a few per cent.
    _, res = tuned
    mean, n, (lo, hi) = res.nis_after
    m0, _, (lo0, hi0) = res.nis_before
    assert not (lo0 <= m0 <= hi0)
    assert abs(mean - 1) < 0.25 * abs(m0 - 1)
    assert abs(mean - 1) < 0.03


def test_replay_with_tuned_rig_is_as_accurate_as_with_true_noise(tuned, tmp_path):
    rig, res = tuned
    r_true = run(LOG, rig=rig, out=tmp_path / "a.h5").errors()["all"]["rmse_m"]
    r_tuned = run(LOG, rig=res.rig, out=tmp_path / "b.h5").errors()["all"]["rmse_m"]
    # "within Monte-Carlo error": a few per cent of the RMSE on ~40 000 fused readings
    assert r_tuned <= 1.05 * r_true


def test_truth_objective_fits_sensor_noise_to_residuals():
    rig = _true_rig()
    res = tune(LOG, rig=_perturbed(rig), objective="truth", intervals=False)
    true = {p.name: p.value for p in default_parameters(rig)}
    for name in ("sensor.ir_front.volts_sigma", "sensor.echo_a.sigma_m",
                 "sensor.echo_a.sigma_frac", "sensor.echo_b.sigma_m"):
        assert abs(res.value(name) / true[name] - 1) < 0.15, name


def test_curvature_interval_matches_a_quadratic():
    # The observed-information interval: for f = (x-1)^2 / (2 s^2) the Hessian is 1/s^2.
    s = 0.3
    H = _hessian(lambda x: float((x[0] - 1) ** 2 / (2 * s * s) + (x[1] + 2) ** 2), np.array([1.0, -2.0]))
    assert math.isclose(H[0, 0], 1 / s ** 2, rel_tol=1e-6)
    assert math.isclose(H[1, 1], 2.0, rel_tol=1e-6)
    assert abs(H[0, 1]) < 1e-6


def test_tune_cli_writes_a_rig_that_loads(tmp_path, capsys):
    from replay.cli import main
    out = tmp_path / "tuned.rig.toml"
    code = main(["tune", LOG, "-o", str(out), "--param", "sensor.ir_front.volts_sigma",
                 "--no-intervals"])
    assert code == 0
    rig = Rig.load(out)
    assert abs(rig.sensors["ir_front"].volts_sigma / 0.01 - 1) < 0.15
    assert "tuned rig" in capsys.readouterr().out
    assert main(["tune", LOG, "-o", LOG]) == 2


@pytest.fixture(scope="module")
def tuned_with_intervals():
    rig = _true_rig()
    return rig, tune(LOG, rig=rig, objective="innovations")


def test_evaluation_counts_add_up_and_name_the_curvature(tuned_with_intervals):
    _, res = tuned_with_intervals
    assert sum(n for n, _ in res.eval_parts) == res.n_evals
    parts = dict((what, n) for n, what in res.eval_parts)
    # A central-difference Hessian of k parameters takes f(x), f(x +- h e_i) and
    # f(x + h e_i + h e_j) for i < j: 1 + 2k + k(k-1)/2 evaluations (common practice,
    # no source). Here k = 6 (process noise and five sensor-noise terms).
    # f(x) itself may already be known from the direct search that ended there.
    k = len(res.params)
    full = 1 + 2 * k + k * (k - 1) // 2
    assert parts["for the curvature (95% intervals)"] in (full, full - 1)
    text = res.summary()
    assert f"{res.n_evals} likelihood evaluations = " in text
    for n, what in res.eval_parts:
        assert f"{n} {what}" in text


def test_convergence_history_ends_at_the_reported_values(tuned_with_intervals):
    # The figure marks the best iteration of the history: it must be the search step
    # that produced the tuned values, not a curvature probe.
    _, res = tuned_with_intervals
    best = max(res.history, key=lambda h: h["loglik"])
    assert best is res.history[-1]
    tuned = {p.name: p.value for p in res.params}
    assert best["params"] == pytest.approx(tuned, rel=1e-12)
    assert best["iteration"] == res.best_iteration
    n_search = sum(n for n, what in res.eval_parts if "curvature" not in what)
    assert 1 <= res.best_iteration <= n_search
    assert f"tuned values found at iteration {res.best_iteration} " in res.summary()


def test_fused_loglik_matches_the_replay_summary(tuned_with_intervals, tmp_path):
    # `rangefuse replay` sums the innovations log-likelihood over fused readings; the
    # tuner's objective adds, for each gated or crosstalk reading, the log of the outlier
    # density (docs/rig.md, estimator.outlier_density) it is scored with.
    rig, res = tuned_with_intervals
    before = run(LOG, rig=rig, out=tmp_path / "before.h5")
    after = run(LOG, rig=res.rig, out=tmp_path / "after.h5")
    assert res.loglik_fused_before == pytest.approx(sum(d.loglik for d in before.dirs.values()),
                                                    rel=1e-9)
    assert res.loglik_fused_after == pytest.approx(sum(d.loglik for d in after.dirs.values()),
                                                   rel=1e-6)
    rej = before.rejections()
    assert "crosstalk" not in rej          # the tuning run has none (its echo rangers alternate)
    n_gated = sum(rej.get("gated", {}).values())
    assert n_gated > 0
    assert res.loglik_before - res.loglik_fused_before == pytest.approx(
        n_gated * math.log(rig.estimator.outlier_density), rel=1e-6)
    text = res.summary()
    assert "tuning objective" in text and "fused readings only" in text


def test_tune_help_describes_every_argument(capsys):
    from replay.cli import main
    with pytest.raises(SystemExit):
        main(["tune", "--help"])
    text = capsys.readouterr().out
    pos = text.split("positional arguments:", 1)[1].split("options:", 1)[0]
    assert "LOG" in pos and "log file" in pos
    obj = text.split("--objective {auto,innovations,truth}", 2)[2].split("--param", 1)[0]
    assert "innovations" in obj and "truth" in obj and "default" in obj
    assert "Fused ranges are not a safety-rated protective function: do not rely on them" in " ".join(text.split())
