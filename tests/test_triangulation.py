"""IR triangulation curve: check values, inversion, noise, serialisation, fitting, ADC."""
from __future__ import annotations

import math
import re
import warnings

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy import stats
from scipy.interpolate import PchipInterpolator
from scipy.optimize import curve_fit, minimize_scalar

from fusion._toml import dumps, loads
from fusion.errors import CalibrationError, ConfigError, InputError
from fusion.sensors.adc import (adc_lsb_v, adc_quantisation_sigma_v, counts_to_volts,
                                volts_to_counts)
from fusion.sensors.triangulation import (CalibrationWarning, RangeFlag, TriangulationCurve,
                                          fit_report)

TYPICAL = TriangulationCurve.typical_10_80()
TRUE_PARAMS = (0.70468, 0.069785, 0.10868, 1.90063, 0.0)


def formula(r, A, b, lam, p, offset):
    """The saturating-inverse family written out independently of the module."""
    return A * (1.0 - np.exp(-(r / lam) ** p)) / (r + b) + offset


def sample_table():
    # A calibration table of the typical unit at 25 ranges, as a bench would record it.
    r = np.linspace(0.03, 0.80, 25)
    return TriangulationCurve.from_table(r, formula(r, *TRUE_PARAMS))


TABLE = sample_table()


# ------------------------------------------------------------------ check values

def test_typical_unit_matches_the_check_values_of_a_10_80_cm_ranger():
    # A 10-80 cm IR triangulation ranger peaks near 0.15 m at about 2.7 V and reads
    # about 1.5 V at both ~6 cm and ~40 cm (common practice, no source).
    c = TYPICAL
    assert c.peak_range_m == pytest.approx(0.148, abs=0.005)
    assert c.peak_volts == pytest.approx(2.70, abs=0.02)
    assert c.volts(0.06) == pytest.approx(1.50, abs=0.01)
    assert c.volts(0.40) == pytest.approx(1.50, abs=0.01)
    near, far = c.ranges(1.5)
    assert near == pytest.approx(0.06, abs=0.001)
    assert far == pytest.approx(0.40, abs=0.001)
    assert (c.min_range_m, c.max_range_m) == (0.10, 0.80)


def test_peak_agrees_with_a_scipy_maximisation_of_the_formula():
    # Reference: scipy.optimize.minimize_scalar (bounded Brent) on the written-out formula.
    res = minimize_scalar(lambda r: -formula(r, *TRUE_PARAMS), bounds=(0.01, 1.0),
                          method="bounded", options={"xatol": 1e-10})
    assert TYPICAL.peak_range_m == pytest.approx(res.x, abs=1e-7)
    assert TYPICAL.peak_volts == pytest.approx(-res.fun, abs=1e-12)


def test_analytic_slope_agrees_with_central_differences():
    r = np.array([0.02, 0.08, 0.2, 0.5, 1.5])
    h = 1e-6
    numeric = (formula(r + h, *TRUE_PARAMS) - formula(r - h, *TRUE_PARAMS)) / (2 * h)
    np.testing.assert_allclose(TYPICAL.slope(r), numeric, rtol=1e-6)


def test_volts_is_vectorised_and_nan_for_impossible_ranges():
    r = np.array([0.06, 0.40, -0.1, np.nan])
    v = TYPICAL.volts(r)
    np.testing.assert_allclose(v[:2], formula(r[:2], *TRUE_PARAMS), rtol=1e-14)
    assert np.isnan(v[2]) and np.isnan(v[3])
    assert isinstance(TYPICAL.volts(0.2), float)


def test_table_interpolates_with_scipy_pchip_inside_the_knots():
    # Inside the knots the table is the Fritsch & Carlson (1980) monotone cubic; scipy's
    # PchipInterpolator is the reference implementation.
    r_k = np.array(TABLE.table_range_m)
    ref = PchipInterpolator(r_k, np.array(TABLE.table_volts))
    r = np.linspace(r_k[0], r_k[-1], 777)
    np.testing.assert_allclose(TABLE.volts(r), ref(r), rtol=1e-13, atol=1e-13)
    # Its peak is the largest knot (the cubic has zero slope there and is monotone between knots).
    k = int(np.argmax(TABLE.table_volts))
    assert TABLE.peak_range_m == r_k[k]
    assert TABLE.peak_volts == TABLE.table_volts[k]
    assert TABLE.slope(TABLE.peak_range_m) == 0.0


def test_table_tails_join_the_cubic_smoothly_and_are_flagged():
    r_last = TABLE.table_range_m[-1]
    eps = 1e-7
    assert TABLE.volts(r_last + eps) == pytest.approx(TABLE.volts(r_last - eps), abs=1e-6)
    assert TABLE.slope(r_last + eps) == pytest.approx(TABLE.slope(r_last - eps), rel=1e-4)
    # The far tail keeps falling as an inverse of range, as the geometry does (common
    # practice, no source): V (r + d) is constant on it.
    r = np.array([1.0, 2.0, 4.0])
    v = TABLE.volts(r)
    assert np.all(np.diff(v) < 0) and np.all(v > 0)
    near, far, flags = TABLE.ranges(TABLE.volts(np.array([0.01, 2.0])), with_flags=True)
    assert flags[0] & RangeFlag.NEAR_EXTRAPOLATED
    assert flags[1] & RangeFlag.FAR_EXTRAPOLATED
    assert far[1] == pytest.approx(2.0, abs=1e-9)


# ------------------------------------------------------------------ inversion

def _near_side(curve):
    return st.floats(1e-3, curve.peak_range_m * (1 - 1e-3))


def _far_side(curve):
    return st.floats(curve.peak_range_m * (1 + 1e-3), 5.0)


@settings(max_examples=150, deadline=None)
@given(data=st.data(), which=st.sampled_from(["parametric", "table"]))
def test_ranges_inverts_volts_on_each_side_of_the_peak(data, which):
    curve = TYPICAL if which == "parametric" else TABLE
    r_near = data.draw(_near_side(curve))
    r_far = data.draw(_far_side(curve))
    near, _ = curve.ranges(curve.volts(r_near))
    _, far = curve.ranges(curve.volts(r_far))
    assert near == pytest.approx(r_near, abs=1e-7)
    assert far == pytest.approx(r_far, abs=1e-7)


@settings(max_examples=40, deadline=None)
@given(st.lists(st.floats(-0.5, 3.0), min_size=1, max_size=30))
def test_vectorised_ranges_equal_one_at_a_time(volts):
    near, far, flags = TYPICAL.ranges(np.array(volts), with_flags=True)
    one = [TYPICAL.ranges(v, with_flags=True) for v in volts]
    # numpy's array and scalar paths may round the last bit differently.
    np.testing.assert_allclose(near, [o[0] for o in one], rtol=1e-12, equal_nan=True)
    np.testing.assert_allclose(far, [o[1] for o in one], rtol=1e-12, equal_nan=True)
    np.testing.assert_array_equal(flags, [o[2] for o in one])


def test_ranges_flags_and_nan_where_there_is_no_solution():
    v = np.array([2.9, 0.5, -0.2, np.nan, 1.5])
    near, far, flags = TYPICAL.ranges(v, with_flags=True)
    assert np.isnan(near[0]) and np.isnan(far[0]) and flags[0] == RangeFlag.ABOVE_PEAK
    # 0.5 V is beyond the 0.80 m span on the far side: returned, but flagged.
    assert far[1] > TYPICAL.max_range_m and flags[1] & RangeFlag.FAR_OUTSIDE_SPAN
    assert formula(far[1], *TRUE_PARAMS) == pytest.approx(0.5, abs=1e-12)
    assert not TYPICAL.in_span(far[1])
    assert np.isnan(near[2]) and np.isnan(far[2])
    assert flags[2] & RangeFlag.NO_NEAR and flags[2] & RangeFlag.NO_FAR
    assert flags[3] == RangeFlag.NOT_FINITE
    # 1.5 V: near 0.06 m lies below the 0.10 m span, far 0.40 m inside it.
    assert flags[4] == RangeFlag.NEAR_OUTSIDE_SPAN
    np.testing.assert_array_equal(TYPICAL.in_span(np.array([0.05, 0.1, 0.5, 0.8, 0.81, np.nan])),
                                  [False, True, True, True, False, False])


def test_ranges_on_a_million_readings_is_vectorised():
    # Not a timing check: the call must accept and return arrays of this size.
    v = np.random.default_rng(5).uniform(0.0, 2.8, 1_000_000)
    near, far = TYPICAL.ranges(v)
    ok = ~np.isnan(far)
    np.testing.assert_allclose(formula(far[ok], *TRUE_PARAMS), v[ok], atol=1e-9)
    ok = ~np.isnan(near)
    np.testing.assert_allclose(formula(near[ok], *TRUE_PARAMS), v[ok], atol=1e-9)


# ------------------------------------------------------------------ noise

@settings(max_examples=100, deadline=None)
@given(st.floats(0.25, 3.0), st.floats(0.25, 3.0), st.floats(1e-4, 0.1))
def test_range_sigma_grows_with_range_on_the_far_side(r1, r2, sigma_v):
    # Just past the peak the curve steepens up to its inflection (about 0.23 m), so range
    # noise falls there first; beyond it the curve flattens and range noise grows
    # (common practice, no source).
    if abs(r1 - r2) < 1e-9:
        return
    lo, hi = sorted((r1, r2))
    assert TYPICAL.range_sigma(lo, sigma_v) < TYPICAL.range_sigma(hi, sigma_v)


def test_range_sigma_far_out_grows_as_the_square_of_range():
    # A triangulation ranger's range error grows with the square of range: with
    # V ~ A / (r + b), sigma_r = sigma_V (r + b)**2 / A (common practice, no source).
    r, s = 2.5, 0.01
    A, b = TRUE_PARAMS[:2]
    assert TYPICAL.range_sigma(r, s) == pytest.approx(s * (r + b) ** 2 / A, rel=1e-6)
    assert TYPICAL.range_sigma(TYPICAL.peak_range_m, s) == math.inf
    with pytest.raises(InputError):
        TYPICAL.range_sigma(0.3, -1.0)


def test_grid_is_even_and_follows_the_curve():
    r, v = TYPICAL.grid(n=101)
    assert r[0] == 0.0 and r[-1] == pytest.approx(2 * TYPICAL.max_range_m)
    np.testing.assert_allclose(np.diff(r), r[1] - r[0])
    np.testing.assert_allclose(v, formula(r, *TRUE_PARAMS), atol=1e-15)
    r, _ = TABLE.grid(n=5, r_max=1.0)
    np.testing.assert_allclose(r, [0.0, 0.25, 0.5, 0.75, 1.0])
    with pytest.raises(InputError):
        TYPICAL.grid(n=1)


# ------------------------------------------------------------------ serialisation

@pytest.mark.parametrize("curve", [TYPICAL, TABLE], ids=["parametric", "table"])
def test_to_dict_round_trips_through_toml(curve):
    text = dumps({"curve": curve.to_dict()})
    back = TriangulationCurve.from_dict(loads(text, "x.toml")["curve"], where="x.toml")
    assert back == curve and hash(back) == hash(curve)
    assert back.peak_range_m == curve.peak_range_m


@pytest.mark.parametrize("change, field", [
    ({"p": "two"}, "p"),
    ({"lam_m": -0.1}, "lam_m"),
    ({"model": "cubic"}, "model"),
    ({"colour": "red"}, "colour"),
    ({"max_range_m": 0.12}, "max_range_m"),  # before the peak at 0.148 m
    ({"param_cov": [[1.0, 2.0]]}, "param_cov"),
])
def test_from_dict_names_the_bad_key_and_file(change, field):
    d = TYPICAL.to_dict()
    d.update(change)
    with pytest.raises(ConfigError) as err:
        TriangulationCurve.from_dict(d, where="rig.toml")
    assert err.value.field == field and err.value.file == "rig.toml"


def test_from_dict_missing_key_and_bad_table():
    d = TYPICAL.to_dict()
    del d["b_m"]
    with pytest.raises(ConfigError) as err:
        TriangulationCurve.from_dict(d, where="rig.toml")
    assert err.value.field == "b_m"
    t = TABLE.to_dict()
    t["volts"] = list(t["volts"])
    t["volts"][20] = t["volts"][18]  # a bump on the far side: not invertible
    with pytest.raises(ConfigError) as err:
        TriangulationCurve.from_dict(t, where="rig.toml")
    assert err.value.field == "volts" and "20" in err.value.message


# ------------------------------------------------------------------ fitting

def _noisy_typical(n=60, sigma=0.01, seed=11, r_lo=0.04, r_hi=0.8):
    rng = np.random.default_rng(seed)
    r = np.linspace(r_lo, r_hi, n)
    return r, formula(r, *TRUE_PARAMS) + rng.normal(0.0, sigma, n)


def test_fit_recovers_the_parameters_within_their_reported_covariance():
    r, v = _noisy_typical()
    with warnings.catch_warnings():
        warnings.simplefilter("error", CalibrationWarning)
        curve = TriangulationCurve.fit(r, v)
    assert curve.model == "saturating-inverse"
    theta, cov = np.array(curve.params), np.array(curve.param_cov)
    d = theta - np.array(TRUE_PARAMS)
    assert np.all(np.abs(d) < 4.0 * np.sqrt(np.diag(cov)))
    # The squared Mahalanobis distance of the truth is chi-square with 5 dof.
    assert d @ np.linalg.solve(cov, d) < stats.chi2.ppf(0.999, 5)
    assert curve.residual_sigma_v == pytest.approx(0.01, rel=0.25)


def test_fit_covariance_matches_scipy_curve_fit():
    # Reference: scipy.optimize.curve_fit, whose pcov is s**2 (J^T J)**-1 with
    # s**2 = RSS / (n - k) when absolute_sigma is False.
    r, v = _noisy_typical(seed=4)
    curve = fit_report(r, v, model="saturating-inverse").curve
    popt, pcov = curve_fit(formula, r, v, p0=TRUE_PARAMS)
    np.testing.assert_allclose(curve.params, popt, rtol=1e-5, atol=1e-7)
    np.testing.assert_allclose(np.array(curve.param_cov), pcov, rtol=1e-3,
                               atol=1e-6 * np.max(np.abs(pcov)))


def test_aic_is_the_least_squares_formula():
    # Akaike (1974) for least squares with Gaussian errors: n ln(RSS/n) + 2k.
    r, v = _noisy_typical(seed=8)
    res = fit_report(r, v)
    for cand in res.candidates:
        rss = float(np.sum((v - cand.curve.volts(r)) ** 2))
        n, k = len(r), cand.n_params
        assert cand.aic == pytest.approx(n * math.log(rss / n) + 2 * k, rel=1e-9)
        # Hurvich & Tsai (1989) small-sample correction.
        assert cand.aicc == pytest.approx(cand.aic + 2 * k * (k + 1) / (n - k - 1), rel=1e-9)
    assert res.curve.aic == res.candidate(res.model).aic


def _s_shaped(r):
    # Rises as r**1.5 to 2.7 V at 0.15 m, then falls as a logistic step: a far side with
    # an inflection the saturating-inverse family cannot follow.
    far = 0.6 + 2.1 * (1 + math.exp(-6.0)) / (1 + np.exp((r - 0.45) / 0.05))
    return np.where(r < 0.15, 2.7 * np.clip(r / 0.15, 0, 1) ** 1.5, far)


def test_table_is_chosen_for_dense_data_off_the_family_shape():
    rng = np.random.default_rng(2)
    r = np.repeat(np.linspace(0.03, 0.8, 60), 4)
    v = _s_shaped(r) + rng.normal(0.0, 0.01, r.size)
    res = fit_report(r, v)
    assert res.model == "table"
    assert res.candidate("table").aicc < res.candidate("saturating-inverse").aicc
    assert res.curve.residual_sigma_v == pytest.approx(0.01, rel=0.3)
    near, far = res.curve.ranges(res.curve.volts(np.array([0.08, 0.5])))
    assert near[0] == pytest.approx(0.08, abs=1e-6) and far[1] == pytest.approx(0.5, abs=1e-6)


def test_few_points_favour_the_parametric_family():
    r, v = _noisy_typical(n=12, seed=3, r_lo=0.05)
    res = fit_report(r, v)
    assert res.model == "saturating-inverse"
    text = res.summary()
    for word in ("saturating-inverse", "table", "AIC", "A_vm", "peak", "residual"):
        assert word in text


def test_far_side_only_warns_that_the_near_side_is_extrapolated():
    r, v = _noisy_typical(n=20, seed=6, r_lo=0.2)
    with pytest.warns(CalibrationWarning) as rec:
        curve = TriangulationCurve.fit(r, v)
    texts = [str(w.message) for w in rec]
    assert any("near side" in m for m in texts)
    # With no point below the peak the near-side shape is free: the fit may also say a
    # shape parameter is poorly determined or stopped at its bound; nothing else.
    assert all(("near side" in m or "b_m" in m) for m in texts), texts
    # The far side is still calibrated.
    _, far = curve.ranges(formula(0.5, *TRUE_PARAMS))
    assert far == pytest.approx(0.5, abs=0.01)


def test_non_monotone_table_side_warns_listing_the_rows():
    r, v = _noisy_typical(n=30, sigma=0.03, seed=1, r_lo=0.05)
    v[25] = v[24] + 0.1  # a reading that rises on the far side
    res = fit_report(r, v, model="table", rows=np.arange(30) + 2)
    text = next(w for w in res.warnings if "not monotone" in w)
    listed = {int(x) for x in re.findall(r"\b(\d+)\b", text.split(" at rows ")[1].split(";")[0])}
    assert {26, 27} <= listed  # row 26 holds index 24, row 27 the reading that rises


@pytest.mark.parametrize("r, v, needle", [
    (np.linspace(0.05, 0.8, 4), np.linspace(2, 1, 4), "at least 6"),
    (np.r_[np.linspace(0.05, 0.8, 7), np.nan], np.linspace(2, 1, 8), "finite"),
    (np.linspace(0.05, 0.8, 8), np.r_[np.linspace(2, 1, 7), np.inf], "finite"),
    (np.linspace(-0.1, 0.8, 8), np.linspace(2, 1, 8), "negative"),
    (np.linspace(0.05, 0.8, 8), np.full(8, 1.7), "equal"),
    (np.linspace(0.01, 0.12, 10), formula(np.linspace(0.01, 0.12, 10), *TRUE_PARAMS), "near side"),
    (np.repeat([0.1, 0.3, 0.5], 3), np.repeat([2.4, 2.0, 1.3], 3), "distinct"),
])
def test_bad_pairs_raise_calibration_error(r, v, needle):
    with pytest.raises(CalibrationError, match=needle):
        fit_report(r, v, where="pairs.csv")


def test_bad_pair_error_names_the_row():
    r, v = _noisy_typical(n=10)
    v[3] = np.nan
    with pytest.raises(CalibrationError) as err:
        fit_report(r, v, where="pairs.csv", rows=np.arange(10) + 2)
    assert err.value.row == 5 and err.value.field == "volts" and err.value.file == "pairs.csv"


# ------------------------------------------------------------------ ADC

def test_adc_ideal_transfer():
    # Ideal N-bit converter: one LSB is Vref / 2**N and code k stands for k LSB
    # (Widrow & Kollar 2008, ch. 1, from memory).
    assert adc_lsb_v(10, 5.0) == 5.0 / 1024
    assert counts_to_volts(512, 10, 5.0) == 2.5
    np.testing.assert_allclose(counts_to_volts(np.array([0, 1023]), 10, 5.0), [0.0, 5.0 * 1023 / 1024])
    assert volts_to_counts(6.0, 10, 5.0) == 1023 and volts_to_counts(-1.0, 10, 5.0) == 0
    assert adc_quantisation_sigma_v(12, 3.3) == pytest.approx(3.3 / 4096 / math.sqrt(12))


@settings(max_examples=200, deadline=None)
@given(bits=st.integers(1, 24), vref=st.floats(0.5, 10.0), u=st.floats(0.0, 1.0))
def test_adc_decode_inverts_encode_within_half_an_lsb(bits, vref, u):
    lsb = vref / 2 ** bits
    v = u * (2 ** bits - 0.5) * lsb  # inside the converter's range
    back = counts_to_volts(volts_to_counts(v, bits, vref), bits, vref)
    assert abs(back - v) <= 0.5 * lsb + 1e-12 * vref  # plus rounding of the arithmetic


def test_quantisation_error_has_the_uniform_model_variance():
    # Rounding error of a signal moving over many counts is uniform on +/- LSB/2, so its
    # standard deviation is LSB / sqrt(12) (Widrow 1956, from memory).
    v = np.random.default_rng(9).uniform(0.1, 4.9, 200_000)
    err = counts_to_volts(volts_to_counts(v, 10, 5.0), 10, 5.0) - v
    assert np.std(err) == pytest.approx(adc_quantisation_sigma_v(10, 5.0), rel=0.02)


@pytest.mark.parametrize("call, field", [
    (lambda: counts_to_volts([10, 1024], 10, 5.0), "counts"),
    (lambda: counts_to_volts(1, 0, 5.0), "bits"),
    (lambda: counts_to_volts(1, 10, -5.0), "vref"),
    (lambda: volts_to_counts([1.0, np.nan], 10, 5.0), "volts"),
])
def test_adc_bad_arguments_raise_input_error(call, field):
    with pytest.raises(InputError) as err:
        call()
    assert err.value.field == field
