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
