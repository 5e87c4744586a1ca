"""Noise models: Gaussians against scipy, the beam mixture's normalisation and EM fit."""
import math

import numpy as np
import pytest
from hypothesis import example, given, settings, strategies as st
from scipy import integrate, stats

from fusion.errors import CalibrationError, ConfigError, InputError
from fusion.noise import (LOG_FLOOR, MIN_SHORT_RANGE_M, BeamMixture, RangeGaussian,
                          VoltageGaussian)


# ---------------------------------------------------------------- Gaussians
def test_range_gaussian_against_scipy():
    g = RangeGaussian(0.003, 0.002)
    z = np.linspace(0.5, 3.0, 7)[:, None]
    r = np.array([0.4, 1.0, 2.0, 3.5])
    ll = g.loglik(z, r)
    assert ll.shape == (7, 4)
    sigma = np.sqrt(0.003 ** 2 + (0.002 * r) ** 2)
    # Reference library: scipy.stats.norm.
    np.testing.assert_allclose(ll, stats.norm.logpdf(z, loc=r, scale=sigma), rtol=1e-12)
    np.testing.assert_allclose(g.sigma(r), sigma, rtol=1e-12)
    np.testing.assert_allclose(g.variance(r), sigma ** 2, rtol=1e-12)


def test_range_gaussian_rejects_bad_parameters():
    with pytest.raises(ConfigError):
        RangeGaussian(0.0, 0.01)
    with pytest.raises(ConfigError) as exc:
        RangeGaussian.from_dict({"sigma_m": 0.01, "sigma_frac": -1}, where="tune.toml")
    assert exc.value.field == "noise.sigma_frac" and exc.value.file == "tune.toml"
    assert RangeGaussian.from_dict(RangeGaussian(0.01, 0.02).to_dict()) == \
        RangeGaussian(0.01, 0.02)


class _InverseCurve:
    """A stand-in IR curve, V = a / (r + b), falling roughly as 1/r past the peak."""

    def __init__(self, a=0.6, b=0.05):
        self.a, self.b = a, b

    def volts(self, r):
        return self.a / (np.asarray(r) + self.b)

    def slope(self, r):
        return -self.a / (np.asarray(r) + self.b) ** 2


class _CurveWithoutSlope(_InverseCurve):
    slope = None


def test_voltage_gaussian_loglik_against_scipy():
    curve = _InverseCurve()
    m = VoltageGaussian(0.01, curve)
    v = np.array([0.3, 0.6, 1.2])[:, None]
    r = np.array([0.3, 0.5, 1.0, 2.0])
    np.testing.assert_allclose(m.loglik(v, r), stats.norm.logpdf(v, curve.volts(r), 0.01),
                               rtol=1e-12)


def test_voltage_gaussian_range_sigma_matches_monte_carlo():
    # Delta method: sigma_r = sigma_V / |dV/dr| (first-order propagation; common practice,
    # no source). Check it by pushing voltage noise through the inverse curve.
    curve = _InverseCurve()
    m = VoltageGaussian(0.002, curve)
    rng = np.random.default_rng(7)
    for r in (0.3, 0.8, 1.5):
        v = curve.volts(r) + rng.normal(0.0, 0.002, 20000)
        r_hat = curve.a / v - curve.b
        # 20 000 samples: the standard error of a sample std is ~0.5 %; the curve's
        # curvature adds a little more at the far end, hence 3 %.
        assert np.std(r_hat) == pytest.approx(m.range_sigma(r), rel=0.03)
    # Without a slope method the model differentiates volts() numerically.
    np.testing.assert_allclose(VoltageGaussian(0.002, _CurveWithoutSlope()).range_sigma(
        [0.3, 1.5]), m.range_sigma([0.3, 1.5]), rtol=1e-6)
    with pytest.raises(ConfigError):
        VoltageGaussian(0.01, object())


# ---------------------------------------------------------------- beam mixture
MIX = BeamMixture(w_hit=0.7, w_short=0.15, w_max=0.05, w_rand=0.1, sigma_hit_m=0.03,
                  lambda_short=1.5, z_max_m=4.0, max_width_m=0.01)


def test_components_against_scipy():
    # Thrun, Burgard & Fox (2005), §6.3, the beam model's components, which their mixture
    # (eq. 6.12, as tests/test_particle.py cites it) combines; section and equation numbers
    # from memory: a Gaussian truncated to [0, z_max], an exponential truncated to
    # [0, z*], a uniform on [0, z_max]. Reference: scipy.stats.
    z = np.linspace(0.0, 3.98, 41)[:, None]
    r = np.array([0.05, 1.0, 2.5, 3.99])
    lc = MIX.component_logpdf(z, r)
    s, zmax, lam = MIX.sigma_hit_m, MIX.z_max_m, MIX.lambda_short
    hit = stats.truncnorm.logpdf(z, -r / s, (zmax - r) / s, loc=r, scale=s)
    np.testing.assert_allclose(lc[..., 0], hit, rtol=1e-9, atol=1e-9)
    short = stats.truncexpon.logpdf(z, lam * r, scale=1 / lam)
    inside = z <= r
    np.testing.assert_allclose(lc[..., 1][inside], np.broadcast_to(short, inside.shape)[inside],
                               rtol=1e-9)
    assert np.all(np.isneginf(lc[..., 1][~inside]))
    np.testing.assert_allclose(lc[..., 3], np.broadcast_to(stats.uniform.logpdf(z, 0, zmax),
                                                           lc[..., 3].shape))


@pytest.mark.parametrize("model", [
    MIX,
    BeamMixture(w_hit=0.9, w_short=0.0, w_max=0.1, w_rand=0.0, sigma_hit_m=0.2,
                lambda_short=3.0, z_max_m=5.0, max_width_m=0.05),
    # Our blanking extension must keep the density normalised.
    BeamMixture(w_hit=0.6, w_short=0.2, w_max=0.1, w_rand=0.1, sigma_hit_m=0.01,
                lambda_short=0.5, z_max_m=4.0, blank_range_m=0.15, p_blank_dropout=0.95),
])
@pytest.mark.parametrize("r", [0.0, 0.05, 0.3, 1.7, 3.995, 4.0, 6.0, -0.2])
def test_density_integrates_to_one(model, r):
    # A real check of normalisation: numeric quadrature (scipy.integrate.quad) of
    # exp(loglik) over the support [0, z_max], with the breakpoints of the density.
    zmax = model.z_max_m
    # The short-reading exponential ends at z* (at least MIN_SHORT_RANGE_M).
    short_end = min(max(r, MIN_SHORT_RANGE_M), zmax)
    points = sorted({p for p in (short_end, zmax - model.max_width_m,
                                 r - 5 * model.sigma_hit_m,
                                 r + 5 * model.sigma_hit_m) if 0 < p < zmax})
    total, err = integrate.quad(lambda z: math.exp(model.loglik(z, r)), 0.0, zmax,
                                points=points, limit=400, epsabs=1e-10, epsrel=1e-10)
    assert total == pytest.approx(1.0, abs=1e-6)


def test_blanking_makes_dropouts_likely():
    m = BeamMixture(blank_range_m=0.15, p_blank_dropout=0.95)
    box = m.responsibilities(m.z_max_m, [0.1, 1.0])
    assert box[0, 2] > 0.99          # blanked: a max reading is almost surely the dropout
    # Probability mass of the max box for a blanked target: p_blank_dropout, plus the rest
    # of the mixture's own mass there (the max part and the uniform's share of the box;
    # the hit Gaussian at 0.1 m puts nothing near 4 m).
    mass, _ = integrate.quad(lambda z: math.exp(m.loglik(z, 0.1)),
                             m.z_max_m - m.max_width_m, m.z_max_m)
    in_box = m.w_max + m.w_rand * m.max_width_m / m.z_max_m
    assert mass == pytest.approx(0.95 + 0.05 * in_box, abs=1e-9)
    # A dropout flag counts as a max reading.
    assert m.loglik(1.0, 0.1, dropout=True) == m.loglik(m.z_max_m, 0.1)


@settings(max_examples=200, deadline=None)
# A reading no component can produce (all weight on the max box, reading at 0).
@example(z=0.0, r=0.0, w=[0.0, 0.0, 1.0, 0.0], sigma=1.0, lam=1.0)
@given(z=st.floats(-10, 100), r=st.floats(-10, 100),
       w=st.lists(st.floats(0, 1), min_size=4, max_size=4).filter(lambda w: sum(w) > 0.01),
       sigma=st.floats(1e-4, 2.0), lam=st.floats(1e-3, 100.0))
def test_loglik_finite_everywhere(z, r, w, sigma, lam):
    w = np.array(w) / sum(w)
    m = BeamMixture(*w, sigma_hit_m=sigma, lambda_short=lam, z_max_m=4.0,
                    blank_range_m=0.15)
    ll = m.loglik(z, r)
    assert math.isfinite(ll) and ll >= LOG_FLOOR
    resp = m.responsibilities(z, r)
    assert np.all(np.isfinite(resp)) and resp.sum() == pytest.approx(1.0)


def test_broadcasting_shapes():
    z = np.linspace(0, 4, 5)
    particles = np.linspace(0.1, 3.9, 300)
    assert MIX.loglik(z[:, None], particles).shape == (5, 300)
    assert MIX.loglik(z[:, None], np.tile(particles, (5, 1))).shape == (5, 300)
    assert MIX.responsibilities(z[:, None], particles).shape == (5, 300, 4)
    assert isinstance(MIX.loglik(1.0, 1.0), float)
    # Rows are independent readings: each row equals the one-reading call.
    np.testing.assert_allclose(MIX.loglik(z[:, None], particles)[2], MIX.loglik(z[2], particles))


def draw_from_mixture(m, r, rng):
    """Readings from the mixture by composition, independently of the code under test."""
    k = rng.choice(4, size=r.size, p=[m.w_hit, m.w_short, m.w_max, m.w_rand])
    z = np.empty(r.size)
    i = k == 0
    s = m.sigma_hit_m
    z[i] = stats.truncnorm.rvs(-r[i] / s, (m.z_max_m - r[i]) / s, loc=r[i], scale=s,
                               random_state=rng)
    i = k == 1
    # Inverse CDF of the exponential truncated to [0, r].
    z[i] = -np.log1p(-rng.random(i.sum()) * -np.expm1(-m.lambda_short * r[i])) / m.lambda_short
    z[k == 2] = m.z_max_m
    z[k == 3] = rng.uniform(0, m.z_max_m, (k == 3).sum())
    return z


def test_em_recovers_parameters():
    n = 20_000
    rng = np.random.default_rng(20050801)
    r = rng.uniform(0.5, 3.5, n)
    z = draw_from_mixture(MIX, r, rng)
    fit = BeamMixture.fit(z, r, z_max_m=4.0)
    got = fit.model
    assert fit.converged
    # Weights: the multinomial standard error sqrt(w (1 - w) / n) is 0.002-0.003 here;
    # short and random readings overlap on [0, z*], which widens their errors, so allow
    # 5 standard errors.
    for name in ("w_hit", "w_short", "w_max", "w_rand"):
        w = getattr(MIX, name)
        assert getattr(got, name) == pytest.approx(w, abs=5 * math.sqrt(w * (1 - w) / n))
    # sigma_hit: standard error sigma / sqrt(2 n w_hit), ~0.6 %; allow 5 of them.
    assert got.sigma_hit_m == pytest.approx(MIX.sigma_hit_m,
                                            rel=5 / math.sqrt(2 * n * MIX.w_hit))
    # lambda_short: ~3000 short readings give ~2 % for a plain exponential; truncation to
    # [0, z*] and the overlap with the uniform part lose information, so allow 12 %.
    assert got.lambda_short == pytest.approx(MIX.lambda_short, rel=0.12)
    # EM never lowers the likelihood (Dempster, Laird & Rubin 1977, theorem 1).
    assert np.all(np.diff(fit.loglik_history) >= -1e-9 * abs(fit.loglik))
    # And the fit is at least as likely as the truth that generated the data.
    assert fit.loglik >= np.sum(MIX.loglik(z, r)) - 1e-6
    assert "converged" in fit.summary()


def test_em_estimates_blanking_dropout_probability():
    n = 20_000
    rng = np.random.default_rng(6)
    truth = BeamMixture(w_hit=0.8, w_short=0.1, w_max=0.05, w_rand=0.05, sigma_hit_m=0.01,
                        lambda_short=1.0, z_max_m=4.0, blank_range_m=0.15,
                        p_blank_dropout=0.9)
    r = rng.uniform(0.02, 3.0, n)
    z = draw_from_mixture(truth, r, rng)
    blanked = r < truth.blank_range_m
    z[blanked & (rng.random(n) < truth.p_blank_dropout)] = truth.z_max_m
    start = BeamMixture(z_max_m=4.0, blank_range_m=0.15, p_blank_dropout=0.5)
    got = BeamMixture.fit(z, r, init=start).model
    nb = blanked.sum()
    # Binomial standard error over the ~900 blanked readings; 5 of them.
    assert got.p_blank_dropout == pytest.approx(0.9, abs=5 * math.sqrt(0.9 * 0.1 / nb))
    assert got.w_hit == pytest.approx(0.8, abs=5 * math.sqrt(0.8 * 0.2 / n))


def test_fit_rejects_bad_input():
    with pytest.raises(CalibrationError):
        BeamMixture.fit(np.ones(5), np.ones(5), z_max_m=4.0)
    with pytest.raises(InputError):
        BeamMixture.fit(np.ones(20), np.ones(19), z_max_m=4.0)
    with pytest.raises(InputError):
        BeamMixture.fit(np.r_[np.ones(19), np.nan], np.ones(20), z_max_m=4.0)


def test_mixture_config_round_trip_and_errors():
    assert BeamMixture.from_dict(MIX.to_dict()) == MIX
    with pytest.raises(ConfigError) as exc:
        BeamMixture.from_dict({"w_hit": 0.9}, where="noise.toml")   # weights sum to 1.1
    assert exc.value.file == "noise.toml" and "summing to 1" in exc.value.message
    with pytest.raises(ConfigError) as exc:
        BeamMixture.from_dict({"sigma_hit": 0.1})
    assert exc.value.field == "noise.sigma_hit"
    with pytest.raises(ConfigError) as exc:
        BeamMixture.from_dict({"lambda_short": 0.0})
    assert exc.value.field == "noise.lambda_short"
    with pytest.raises(ConfigError):
        BeamMixture(max_width_m=5.0, z_max_m=4.0)
