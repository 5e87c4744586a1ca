"""IR triangulation ranger: voltage-vs-range curve, its two-sided inversion and its fit.

An IR triangulation ranger's analog output rises from near zero at contact to a peak
at a short range, then falls roughly as the inverse of range. Below the peak voltage
one voltage means two ranges, one on each side of the peak; `TriangulationCurve`
returns both and leaves the choice to the caller (the fuser), which has the evidence.

A curve is one of two models:

``"saturating-inverse"``
    ``V(r) = A (1 - exp(-(r/lam)**p)) / (r + b) + offset``. The inverse-range far side
    is the triangulation geometry (spot displacement on the detector is proportional
    to baseline over range); the saturating factor stands for the near-zone loss of
    the return spot off the detector, which pulls the output down towards contact.
``"table"``
    A calibration table of (range, volts) knots with a shape-preserving piecewise
    cubic (Fritsch & Carlson 1980) through them. Beyond the last knot the table goes
    on as an inverse-range tail that meets the cubic with the same value and slope;
    below the first knot it goes on as a straight line. Both extensions are flagged.

`fit_report` fits both models to calibration pairs and picks one by the corrected
Akaike information criterion; `TriangulationCurve.fit` returns just the curve.

References
----------
F. N. Fritsch and R. E. Carlson, "Monotone piecewise cubic interpolation", SIAM J.
Numer. Anal. 17(2), 238-246 (1980).
H. Akaike, "A new look at the statistical model identification", IEEE Trans.
Automatic Control 19(6), 716-723 (1974).
C. M. Hurvich and C.-L. Tsai, "Regression and time series model selection in small
samples", Biometrika 76(2), 297-307 (1989): the small-sample correction (AICc).
Q. F. Stout, "Unimodal regression via prefix isotonic regression", Computational
Statistics & Data Analysis 53(2), 289-297 (2008).
"""
from __future__ import annotations

import dataclasses
import enum
import math
import numbers
import warnings
from dataclasses import dataclass

import numpy as np
from scipy.interpolate import PchipInterpolator
from scipy.optimize import brentq, least_squares

from ..errors import CalibrationError, ConfigError, InputError

__all__ = ["TriangulationCurve", "RangeFlag", "CurveFit", "FitCandidate", "fit_report",
           "CalibrationWarning", "SATURATING_INVERSE", "TABLE", "MODELS", "PARAM_NAMES",
           "MIN_PAIRS"]

SATURATING_INVERSE = "saturating-inverse"
TABLE = "table"
MODELS = (SATURATING_INVERSE, TABLE)
PARAM_NAMES = ("A_vm", "b_m", "lam_m", "p", "offset_v")
PARAM_UNITS = ("V m", "m", "m", "", "V")
# Five parameters and at least one degree of freedom left for the noise.
MIN_PAIRS = 6
MIN_DISTINCT_RANGES = 5
LOOKUP_POINTS = 4096
_SPAN_KEYS = ("min_range_m", "max_range_m")


class CalibrationWarning(UserWarning):
    """A calibration worked but something about the pairs or the fit needs a look."""


class RangeFlag(enum.IntFlag):
    """Bit flags `TriangulationCurve.ranges` returns with ``with_flags=True``.

    ``NONE``: both solutions found, inside the valid span, not extrapolated.
    ``ABOVE_PEAK``: the voltage is above the peak; there is no solution.
    ``NO_NEAR`` / ``NO_FAR``: that side has no solution (the voltage is below the
    near side's value at contact, or at or below the far side's asymptote).
    ``NEAR_OUTSIDE_SPAN`` / ``FAR_OUTSIDE_SPAN``: the solution exists but lies outside
    ``[min_range_m, max_range_m]``.
    ``NEAR_EXTRAPOLATED`` / ``FAR_EXTRAPOLATED``: a table curve's solution lies beyond
    its knots, on the straight-line or inverse-range extension.
    ``NOT_FINITE``: the voltage was NaN or infinite (a missing reading).
    """

    NONE = 0
    ABOVE_PEAK = 1
    NO_NEAR = 2
    NO_FAR = 4
    NEAR_OUTSIDE_SPAN = 8
    FAR_OUTSIDE_SPAN = 16
    NEAR_EXTRAPOLATED = 32
    FAR_EXTRAPOLATED = 64
    NOT_FINITE = 128


# ----------------------------------------------------------------------------- shapes
# A shape is the bare function V(r) for r >= 0 with its derivative, plus what the
# inversion needs beyond the dense lookups: where the lookups end on each side and how
# to invert past those ends.

class _SaturatingInverse:
    def __init__(self, params):
        self.A, self.b, self.lam, self.p, self.c = params

    def v(self, r):
        z = (r / self.lam) ** self.p
        return self.A * -np.expm1(-z) / (r + self.b) + self.c

    def v_dv(self, r):
        x = r / self.lam
        xp1 = x ** (self.p - 1.0)
        z = xp1 * x
        e = np.exp(-z)
        g = -np.expm1(-z)
        rb = r + self.b
        dg = e * self.p * xp1 / self.lam
        return self.A * g / rb + self.c, self.A * (dg * rb - g) / (rb * rb)

    def contact_volts(self):
        return self.c

    def peak(self, r_scan_max):
        r = np.concatenate(([0.0], np.geomspace(self.lam * 1e-6, r_scan_max, 8192)))
        v = self.v(r)
        i = int(np.argmax(v))
        if i == len(r) - 1:
            raise ConfigError(f"the parameters give a curve that still rises at {r_scan_max:.3g} m; "
                              "expected a peak at a short range", field="params")
        if i == 0:
            raise ConfigError("the parameters give a curve that falls from contact; expected a "
                              "rise to a peak", field="params")
        lo, hi = r[i - 1], r[i + 1]
        dlo, dhi = self.v_dv(np.array([lo, hi]))[1]
        if dlo > 0 > dhi:
            r_pk = brentq(lambda x: float(self.v_dv(np.array(x))[1]), lo, hi, xtol=1e-15, rtol=1e-15)
        else:
            r_pk = r[i]
        return float(r_pk), float(self.v(np.array(r_pk)))

    def near_lookup_start(self, r_pk):
        return 0.0

    def far_lookup_end(self, r_pk, max_range_m):
        return max(4.0 * max_range_m, 4.0 * r_pk)

    def near_tail_inverse(self, v):
        # The lookup starts at contact: below V(0) there is no near solution.
        return np.full_like(v, np.nan)

    def far_tail_inverse(self, v, r_end):
        # Far out the saturating factor is 1 and V = A / (r + b) + c inverts exactly;
        # Newton steps take care of what is left of the factor.
        with np.errstate(all="ignore"):
            r = self.A / (v - self.c) - self.b
            ok = np.isfinite(r) & (v > self.c)
            r = np.where(ok, np.maximum(r, r_end), r_end)
            for _ in range(3):
                f, d = self.v_dv(r)
                step = (f - v) / d
                r = np.where(ok & np.isfinite(step), np.maximum(r - step, r_end), r)
        return np.where(ok, r, np.nan)

    def extrapolated(self, r):
        z = np.zeros(np.shape(r), dtype=bool)
        return z, z


class _Table:
    def __init__(self, r, v):
        self.r, self.v_k = r, v
        self.r0, self.rn = float(r[0]), float(r[-1])
        self.v0, self.vn = float(v[0]), float(v[-1])
        self.k = int(np.argmax(v))
        self.cubic = PchipInterpolator(r, v, extrapolate=False)
        self.dcubic = self.cubic.derivative()
        # Straight line below the first knot: the cubic's end slope when the table
        # starts on the near side, else the line back to zero volts at contact.
        if self.k > 0:
            s0 = float(self.dcubic(self.r0))
            if not s0 > 0.0:
                s0 = float((v[1] - v[0]) / (r[1] - r[0]))
        else:
            s0 = self.v0 / self.r0 if self.r0 > 0.0 else 0.0
        self.s0 = float(s0)
        # Inverse-range tail past the last knot, V = vn (rn + d) / (r + d), with the
        # cubic's value and slope at the knot; a straight line if vn <= 0.
        sn = float(self.dcubic(self.rn))
        if not sn < 0.0:
            sn = float((v[-1] - v[-2]) / (r[-1] - r[-2]))
        self.sn = sn
        self.inverse_tail = self.vn > 0.0
        self.d = self.vn / -sn - self.rn if self.inverse_tail else math.nan

    def _near_line(self, r):
        return self.v0 - self.s0 * (self.r0 - r)

    def _far_tail(self, r):
        if self.inverse_tail:
            return self.vn * (self.rn + self.d) / (r + self.d)
        return self.vn + self.sn * (r - self.rn)

    def v(self, r):
        inside = self.cubic(np.clip(r, self.r0, self.rn))
        out = np.where(r < self.r0, self._near_line(r), inside)
        return np.where(r > self.rn, self._far_tail(r), out)

    def v_dv(self, r):
        rc = np.clip(r, self.r0, self.rn)
        v = np.where(r < self.r0, self._near_line(r), self.cubic(rc))
        dv = np.where(r < self.r0, self.s0, self.dcubic(rc))
        if self.inverse_tail:
            tail_d = -self.vn * (self.rn + self.d) / (r + self.d) ** 2
        else:
            tail_d = np.full_like(r, self.sn)
        v = np.where(r > self.rn, self._far_tail(r), v)
        dv = np.where(r > self.rn, tail_d, dv)
        return v, dv

    def contact_volts(self):
        return self.v0 - self.s0 * self.r0 if self.r0 > 0 else self.v0

    def peak(self, r_scan_max):
        # The Fritsch-Carlson slope is zero at a local maximum knot and the cubic is
        # monotone between knots, so the interpolant's peak is the largest knot.
        return float(self.r[self.k]), float(self.v_k[self.k])

    def near_lookup_start(self, r_pk):
        return self.r0

    def far_lookup_end(self, r_pk, max_range_m):
        return self.rn

    def near_tail_inverse(self, v):
        with np.errstate(all="ignore"):
            r = self.r0 - (self.v0 - v) / self.s0 if self.s0 > 0 else np.full_like(v, np.nan)
        return np.where(r >= 0.0, r, np.nan)

    def far_tail_inverse(self, v, r_end):
        with np.errstate(all="ignore"):
            if self.inverse_tail:
                r = np.where(v > 0.0, self.vn * (self.rn + self.d) / v - self.d, np.nan)
            else:
                r = self.rn + (v - self.vn) / self.sn
        return r

    def extrapolated(self, r):
        return r < self.r0, r > self.rn


# ------------------------------------------------------------------------ helpers

def _as_float_array(x):
    a = np.asarray(x, dtype=float)
    return a, a.ndim == 0


def _out(a, scalar):
    return float(a) if scalar else a


def _finite_float(value, key):
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise ConfigError(f"expected a number, got {value!r}", field=key)
    f = float(value)
    if not math.isfinite(f):
        raise ConfigError(f"expected a finite number, got {value!r}", field=key)
    return f


def _float_tuple(values, key):
    try:
        a = np.asarray(values, dtype=float).ravel()
    except (TypeError, ValueError):
        raise ConfigError("expected a list of numbers", field=key) from None
    return tuple(float(x) for x in a)


def _nan_key(x):
    """Equality key treating NaN as equal to NaN."""
    if isinstance(x, tuple):
        return tuple(_nan_key(v) for v in x)
    if isinstance(x, float) and math.isnan(x):
        return "nan"
    return x


def _cosine_grid(lo, hi, n, both_ends=True):
    """Points from lo to hi, dense at lo (and at hi if ``both_ends``): next to the peak
    the curve is flat and next to contact it bends, so even spacing in range would waste
    points where the curve is straight."""
    t = np.linspace(0.0, 1.0, n)
    if both_ends:
        u = 0.5 * (1.0 - np.cos(np.pi * t))
    else:
        u = 1.0 - np.cos(0.5 * np.pi * t)
    r = lo + (hi - lo) * u
    r[0], r[-1] = lo, hi
    return r


# ------------------------------------------------------------------------ the curve

@dataclass(frozen=True, eq=False)
class TriangulationCurve:
    """One IR triangulation ranger's output voltage against range.

    Parameters
    ----------
    model : {"saturating-inverse", "table"}
        Which representation the curve uses.
    params : tuple of float
        For ``"saturating-inverse"``: ``(A_vm, b_m, lam_m, p, offset_v)`` of
        ``V(r) = A (1 - exp(-(r/lam)**p)) / (r + b) + offset``. Empty for a table.
    table_range_m, table_volts : tuple of float
        For ``"table"``: the knots, ranges strictly increasing from >= 0, voltages
        strictly rising to a single maximum and strictly falling after it (at least
        two knots at and after the maximum). Empty for the parametric model.
    min_range_m, max_range_m : float
        The valid span; ``max_range_m`` lies on the far side of the peak. A table
        defaults to its first and last knot; the parametric model needs both.
    residual_sigma_v : float
        Residual standard deviation of the calibration fit, volts; NaN if unknown.
    param_cov : tuple of tuple of float, optional
        Covariance of ``params`` from the fit (5 x 5), or None.
    aic : float
        Akaike information criterion of the fit (``n ln(RSS/n) + 2k``); NaN if unknown.

    Raises
    ------
    ConfigError
        If a field is missing, malformed or gives a curve without a single peak.

    Notes
    -----
    The peak, the contact voltage and dense monotone lookups for each side are
    computed once at construction, so `ranges` is a table look-up plus one Newton
    step, vectorised over any number of readings.

    Examples
    --------
    >>> c = TriangulationCurve.typical_10_80()
    >>> near, far = c.ranges(1.5)
    >>> round(near, 3), round(far, 3)
    (0.06, 0.4)
    """

    model: str
    params: tuple = ()
    table_range_m: tuple = ()
    table_volts: tuple = ()
    min_range_m: float = math.nan
    max_range_m: float = math.nan
    residual_sigma_v: float = math.nan
    param_cov: tuple | None = None
    aic: float = math.nan

    # -------------------------------------------------------------- construction
    def __post_init__(self):
        setf = object.__setattr__
        if self.model not in MODELS:
            raise ConfigError(f"unknown curve model {self.model!r}; expected one of "
                              f"{', '.join(repr(m) for m in MODELS)}", field="model")
        params = _float_tuple(self.params, "params")
        r_t = _float_tuple(self.table_range_m, "range_m")
        v_t = _float_tuple(self.table_volts, "volts")
        setf(self, "params", params)
        setf(self, "table_range_m", r_t)
        setf(self, "table_volts", v_t)
        if self.model == SATURATING_INVERSE:
            shape = self._check_params(params, r_t, v_t)
        else:
            shape = self._check_table(params, r_t, v_t)
            if math.isnan(float(self.min_range_m)):
                setf(self, "min_range_m", r_t[0])
            if math.isnan(float(self.max_range_m)):
                setf(self, "max_range_m", r_t[-1])
        lo = self._span_value(self.min_range_m, "min_range_m")
        hi = self._span_value(self.max_range_m, "max_range_m")
        if lo < 0.0 or hi <= lo:
            raise ConfigError(f"expected 0 <= min_range_m < max_range_m (got {lo} and {hi})",
                              field="min_range_m" if lo < 0.0 else "max_range_m")
        setf(self, "min_range_m", lo)
        setf(self, "max_range_m", hi)
        sig = float(self.residual_sigma_v)
        if not (math.isnan(sig) or (math.isfinite(sig) and sig >= 0.0)):
            raise ConfigError(f"expected a non-negative number of volts or nan (got {sig})",
                              field="residual_sigma_v")
        setf(self, "residual_sigma_v", sig)
        setf(self, "aic", float(self.aic))
        setf(self, "param_cov", self._check_cov(self.param_cov, len(params)))

        r_pk, v_pk = shape.peak(max(5.0 * hi, 50.0 * params[2]) if params else hi)
        if hi <= r_pk:
            raise ConfigError(f"max_range_m ({hi} m) must lie beyond the peak at {r_pk:.4g} m: the "
                              "valid span includes the far side", field="max_range_m")
        setf(self, "_shape", shape)
        setf(self, "_peak", (r_pk, v_pk))
        setf(self, "_v_contact", float(shape.contact_volts()))
        self._build_lookups(shape, r_pk, v_pk, hi)

    @staticmethod
    def _span_value(value, key):
        if isinstance(value, bool) or not isinstance(value, numbers.Real):
            raise ConfigError(f"expected a number of metres, got {value!r}", field=key)
        if math.isnan(float(value)):
            raise ConfigError("the valid span is required: give min_range_m and max_range_m in "
                              "metres", field=key)
        return _finite_float(value, key)

    @staticmethod
    def _check_params(params, r_t, v_t):
        if r_t or v_t:
            raise ConfigError("a saturating-inverse curve takes parameters, not a table",
                              field="range_m")
        if len(params) != len(PARAM_NAMES):
            raise ConfigError(f"expected {len(PARAM_NAMES)} parameters {PARAM_NAMES}, got "
                              f"{len(params)}", field="params")
        for name, value in zip(PARAM_NAMES, params):
            if not math.isfinite(value):
                raise ConfigError(f"expected a finite number, got {value}", field=name)
            if name != "offset_v" and value <= 0.0:
                raise ConfigError(f"expected a positive number, got {value}", field=name)
        return _SaturatingInverse(params)

    @staticmethod
    def _check_table(params, r, v):
        if params:
            raise ConfigError("a table curve takes range_m and volts, not parameters", field="params")
        if len(r) != len(v):
            raise ConfigError(f"range_m has {len(r)} entries but volts has {len(v)}", field="volts")
        if len(r) < 3:
            raise ConfigError(f"a table needs at least 3 knots, got {len(r)}", field="range_m")
        ra, va = np.array(r), np.array(v)
        for key, a in (("range_m", ra), ("volts", va)):
            bad = np.flatnonzero(~np.isfinite(a))
            if bad.size:
                raise ConfigError(f"entry {bad[0]} is {a[bad[0]]}; expected finite numbers", field=key)
        if ra[0] < 0.0:
            raise ConfigError(f"ranges must be >= 0 m (entry 0 is {ra[0]})", field="range_m")
        step = np.flatnonzero(np.diff(ra) <= 0.0)
        if step.size:
            raise ConfigError(f"ranges must increase strictly (entry {step[0] + 1} is not above "
                              f"entry {step[0]})", field="range_m")
        k = int(np.argmax(va))
        dv = np.diff(va)
        rising, falling = np.flatnonzero(dv[:k] <= 0.0), np.flatnonzero(dv[k:] >= 0.0) + k
        if rising.size or falling.size:
            where = [int(i) + 1 for i in rising] + [int(i) + 1 for i in falling]
            raise ConfigError("voltages must rise strictly to one maximum and fall strictly after "
                              f"it, so that each side can be inverted; entries {where} break this",
                              field="volts")
        if k > len(r) - 2:
            raise ConfigError("the table has no far side: the largest voltage is its last entry; "
                              "expected knots beyond the peak", field="volts")
        if va[k] <= 0.0:
            raise ConfigError("the peak voltage must be positive", field="volts")
        return _Table(ra, va)

    @staticmethod
    def _check_cov(cov, k):
        if cov is None:
            return None
        try:
            a = np.asarray(cov, dtype=float)
        except (TypeError, ValueError):
            raise ConfigError("expected a square list of lists of numbers", field="param_cov") from None
        if k == 0:
            raise ConfigError("a table curve has no parameter covariance", field="param_cov")
        if a.shape != (k, k):
            raise ConfigError(f"expected a {k} x {k} covariance of the parameters, got shape "
                              f"{a.shape}", field="param_cov")
        if not np.all(np.isfinite(a)):
            raise ConfigError("covariance entries must be finite numbers", field="param_cov")
        return tuple(tuple(float(x) for x in row) for row in a)

    def _build_lookups(self, shape, r_pk, v_pk, hi):
        setf = object.__setattr__
        n = LOOKUP_POINTS
        r_near = _cosine_grid(shape.near_lookup_start(r_pk), r_pk, n)
        r_far = _cosine_grid(r_pk, shape.far_lookup_end(r_pk, hi), n, both_ends=False)[::-1]
        with np.errstate(all="ignore"):
            v_near = shape.v(r_near)
            v_far = shape.v(r_far)
        # Rounding can break strict monotony by an ulp next to the peak; the lookup only
        # needs a non-decreasing abscissa.
        v_near = np.maximum.accumulate(v_near)
        v_far = np.maximum.accumulate(v_far)
        v_near[-1] = v_far[-1] = v_pk
        scale = max(abs(v_pk), 1e-300)
        if np.any(np.diff(shape.v(r_near)) < -1e-9 * scale) or \
                np.any(np.diff(shape.v(r_far)) < -1e-9 * scale):
            raise ConfigError("the parameters give a curve with more than one peak; expected one "
                              "rise to a peak and one fall after it", field="params")
        setf(self, "_near", (r_near, v_near, float(np.max(np.diff(r_near)))))
        setf(self, "_far", (r_far, v_far, float(np.max(-np.diff(r_far)))))

    # ---------------------------------------------------------------- factories
    @classmethod
    def saturating_inverse(cls, A_vm, b_m, lam_m, p, offset_v=0.0, *, min_range_m, max_range_m,
                           **extra):
        """A parametric curve ``V(r) = A (1 - exp(-(r/lam)**p)) / (r + b) + offset``."""
        return cls(model=SATURATING_INVERSE, params=(A_vm, b_m, lam_m, p, offset_v),
                   min_range_m=min_range_m, max_range_m=max_range_m, **extra)

    @classmethod
    def from_table(cls, range_m, volts, *, min_range_m=math.nan, max_range_m=math.nan, **extra):
        """A table curve through the knots ``(range_m, volts)``."""
        return cls(model=TABLE, table_range_m=tuple(np.asarray(range_m, float)),
                   table_volts=tuple(np.asarray(volts, float)), min_range_m=min_range_m,
                   max_range_m=max_range_m, **extra)

    @classmethod
    def typical_10_80(cls):
        """A typical IR triangulation ranger rated for 10-80 cm.

        ``A = 0.70468 V m, b = 0.069785 m, lam = 0.10868 m, p = 1.90063, offset = 0``,
        valid span 0.10-0.80 m. It reproduces the common-practice check values of such
        units: a peak of 2.70 V near 0.148 m and 1.50 V at both 0.06 m and 0.40 m
        (common practice, no source). Use it for simulation and defaults; calibrate a
        real unit with `fit`, as units differ by tens of percent.
        """
        return cls.saturating_inverse(0.70468, 0.069785, 0.10868, 1.90063, 0.0,
                                      min_range_m=0.10, max_range_m=0.80)

    @classmethod
    def fit(cls, range_m, volts, model="auto", **kwargs):
        """Fit a curve to calibration pairs; see `fit_report` for the arguments.

        Warnings about the pairs are issued as `CalibrationWarning`.

        Returns
        -------
        TriangulationCurve
        """
        result = fit_report(range_m, volts, model, **kwargs)
        for text in result.warnings:
            warnings.warn(text, CalibrationWarning, stacklevel=2)
        return result.curve

    # --------------------------------------------------------------- equality
    def _key(self):
        return (self.model, self.params, self.table_range_m, self.table_volts, self.min_range_m,
                self.max_range_m, self.residual_sigma_v, self.param_cov, self.aic)

    def __eq__(self, other):
        if not isinstance(other, TriangulationCurve):
            return NotImplemented
        return _nan_key(self._key()) == _nan_key(other._key())

    def __hash__(self):
        return hash(_nan_key(self._key()))

    # -------------------------------------------------------------- properties
    @property
    def peak_range_m(self) -> float:
        """Range of the peak voltage, metres."""
        return self._peak[0]

    @property
    def peak_volts(self) -> float:
        """The peak voltage."""
        return self._peak[1]

    @property
    def contact_volts(self) -> float:
        """The voltage as range goes to zero; below it there is no near-side solution."""
        return self._v_contact

    def param_dict(self) -> dict:
        """The parameters by name (empty for a table)."""
        return dict(zip(PARAM_NAMES, self.params)) if self.params else {}

    def param_sigma(self) -> dict:
        """One-sigma uncertainty of each parameter from ``param_cov`` (empty if unknown)."""
        if self.param_cov is None:
            return {}
        return dict(zip(PARAM_NAMES, np.sqrt(np.diag(np.asarray(self.param_cov))).tolist()))

    # -------------------------------------------------------------- evaluation
    def volts(self, range_m):
        """Output voltage at ``range_m`` (NaN for negative or NaN ranges).

        Parameters
        ----------
        range_m : float or array_like

        Returns
        -------
        float or ndarray
        """
        r, scalar = _as_float_array(range_m)
        ok = r >= 0.0
        with np.errstate(all="ignore"):
            v = self._shape.v(np.where(ok, r, 0.0))
        return _out(np.where(ok, v, np.nan), scalar)

    def slope(self, range_m):
        """dV/dr in V/m at ``range_m`` (analytic for the parametric model)."""
        r, scalar = _as_float_array(range_m)
        ok = r >= 0.0
        with np.errstate(all="ignore"):
            d = self._shape.v_dv(np.where(ok, r, 0.0))[1]
        return _out(np.where(ok, d, np.nan), scalar)

    def range_sigma(self, range_m, volts_sigma):
        """Range standard deviation from a voltage one, ``volts_sigma / |dV/dr|``.

        Infinite at the peak, where the curve is flat.

        Parameters
        ----------
        range_m : float or array_like
        volts_sigma : float or array_like
            Non-negative voltage standard deviation.

        Returns
        -------
        float or ndarray
            Metres.
        """
        s = np.asarray(volts_sigma, dtype=float)
        if np.any(s < 0.0):
            raise InputError("volts_sigma must be >= 0", field="volts_sigma")
        r, scalar = _as_float_array(range_m)
        d = np.abs(np.asarray(self.slope(r)))
        with np.errstate(divide="ignore", invalid="ignore"):
            out = np.where((d == 0.0) | (r == self.peak_range_m), np.inf, s / d)
        out = np.where(np.isnan(d), np.nan, out)
        return _out(out, scalar and s.ndim == 0)

    def in_span(self, range_m):
        """True where ``min_range_m <= range_m <= max_range_m`` (False for NaN)."""
        r, scalar = _as_float_array(range_m)
        inside = (r >= self.min_range_m) & (r <= self.max_range_m)
        return bool(inside) if scalar else inside

    def ranges(self, volts, with_flags=False):
        """Both ranges that give ``volts``: the near-side and the far-side solution.

        Parameters
        ----------
        volts : float or array_like
        with_flags : bool, optional
            Also return `RangeFlag` bits per reading.

        Returns
        -------
        near_m, far_m : float or ndarray
            NaN where that side has no solution: both above the peak voltage; the near
            side below `contact_volts`; the far side at or below its asymptote. A far
            solution beyond ``max_range_m`` is returned and flagged ``FAR_OUTSIDE_SPAN``.
        flags : ndarray of uint16, optional
            Only with ``with_flags=True``.

        Notes
        -----
        Each side is a dense monotone lookup (`LOOKUP_POINTS` points, clustered where
        the curve is flat) followed by one Newton step on the curve itself; the step is
        kept only where it stays inside one lookup cell, which leaves the lookup value
        next to the peak where the inversion is ill-conditioned anyway.
        """
        v, scalar = _as_float_array(volts)
        shape = self._shape
        r_pk, v_pk = self._peak
        finite = np.isfinite(v)
        above = finite & (v > v_pk)
        vv = np.where(finite & ~above, v, v_pk)

        r_near, v_near, cell_n = self._near
        r_far, v_far, cell_f = self._far
        with np.errstate(all="ignore"):
            near = self._polish(np.interp(vv, v_near, r_near), vv, r_near[0], r_pk, cell_n)
            near_tail = vv < v_near[0]
            if np.any(near_tail):
                near = np.where(near_tail, shape.near_tail_inverse(vv), near)
            far = self._polish(np.interp(vv, v_far, r_far), vv, r_pk, r_far[0], cell_f)
            far_tail = vv < v_far[0]
            if np.any(far_tail):
                far = np.where(far_tail, shape.far_tail_inverse(vv, r_far[0]), far)
        bad = ~finite | above
        near = np.where(bad, np.nan, near)
        far = np.where(bad, np.nan, far)
        if not with_flags:
            return _out(near, scalar), _out(far, scalar)

        has_near, has_far = ~np.isnan(near), ~np.isnan(far)
        ext_near, _ = shape.extrapolated(np.where(has_near, near, r_pk))
        _, ext_far = shape.extrapolated(np.where(has_far, far, r_pk))
        lo, hi = self.min_range_m, self.max_range_m
        F = RangeFlag
        flags = (~finite * np.uint16(F.NOT_FINITE)
                 | above * np.uint16(F.ABOVE_PEAK)
                 | (~bad & ~has_near) * np.uint16(F.NO_NEAR)
                 | (~bad & ~has_far) * np.uint16(F.NO_FAR)
                 | (has_near & ((near < lo) | (near > hi))) * np.uint16(F.NEAR_OUTSIDE_SPAN)
                 | (has_far & ((far < lo) | (far > hi))) * np.uint16(F.FAR_OUTSIDE_SPAN)
                 | (has_near & ext_near) * np.uint16(F.NEAR_EXTRAPOLATED)
                 | (has_far & ext_far) * np.uint16(F.FAR_EXTRAPOLATED)).astype(np.uint16)
        if scalar:
            return float(near), float(far), int(flags)
        return near, far, flags

    def _polish(self, r, v, lo, hi, cell):
        f, d = self._shape.v_dv(r)
        step = (f - v) / d
        ok = np.isfinite(step) & (np.abs(step) <= cell)
        return np.clip(np.where(ok, r - step, r), lo, hi)

    def grid(self, n=2048, r_max=None):
        """A dense, evenly spaced table of the curve for compiled kernels.

        Parameters
        ----------
        n : int, optional
            Number of points (>= 2).
        r_max : float, optional
            Last range, metres (default twice ``max_range_m``). The first is 0.

        Returns
        -------
        range_m, volts : ndarray
            float64, ``range_m`` evenly spaced so that a kernel finds the cell by division.
        """
        if isinstance(n, bool) or not isinstance(n, numbers.Integral) or n < 2:
            raise InputError(f"n must be a whole number >= 2 (got {n!r})", field="n")
        r_max = 2.0 * self.max_range_m if r_max is None else float(r_max)
        if not (math.isfinite(r_max) and r_max > 0.0):
            raise InputError(f"r_max must be a positive number of metres (got {r_max!r})",
                             field="r_max")
        r = np.linspace(0.0, r_max, int(n))
        return r, np.asarray(self.volts(r), dtype=float)

    # ------------------------------------------------------------ serialisation
    def to_dict(self) -> dict:
        """Plain values (str, float, lists of float) for a TOML ``[curve]`` table.

        NaN and missing optional fields are left out; `from_dict` restores them.
        """
        d: dict = {"model": self.model}
        if self.model == SATURATING_INVERSE:
            d.update(zip(PARAM_NAMES, self.params))
        else:
            d["range_m"] = list(self.table_range_m)
            d["volts"] = list(self.table_volts)
        d["min_range_m"] = self.min_range_m
        d["max_range_m"] = self.max_range_m
        if not math.isnan(self.residual_sigma_v):
            d["residual_sigma_v"] = self.residual_sigma_v
        if not math.isnan(self.aic):
            d["aic"] = self.aic
        if self.param_cov is not None:
            d["param_cov"] = [list(row) for row in self.param_cov]
        return d

    @classmethod
    def from_dict(cls, d, where=""):
        """Build a curve from `to_dict` output (for instance a TOML ``[curve]`` table).

        Parameters
        ----------
        d : dict
        where : str, optional
            The file the table came from, for error messages.

        Raises
        ------
        ConfigError
            Naming the bad key (``field``) and ``file=where``.
        """
        file = where or None
        if not isinstance(d, dict):
            raise ConfigError("expected a table of curve fields", file=file, field="curve")
        model = d.get("model")
        if model is None:
            raise ConfigError(f"missing; expected one of {', '.join(repr(m) for m in MODELS)}",
                              file=file, field="model")
        if model not in MODELS:
            raise ConfigError(f"unknown model {model!r}; expected one of "
                              f"{', '.join(repr(m) for m in MODELS)}", file=file, field="model")
        common = ("model",) + _SPAN_KEYS + ("residual_sigma_v", "aic")
        own = PARAM_NAMES + ("param_cov",) if model == SATURATING_INVERSE else ("range_m", "volts")
        allowed = common + own
        for key in d:
            if key not in allowed:
                raise ConfigError(f"unknown key for a {model} curve; expected {', '.join(allowed)}",
                                  file=file, field=key)
        try:
            kw = {}
            for key in _SPAN_KEYS + ("residual_sigma_v", "aic"):
                if key in d:
                    value = d[key]
                    if isinstance(value, bool) or not isinstance(value, numbers.Real):
                        raise ConfigError(f"expected a number, got {value!r}", field=key)
                    kw[key] = float(value)
            if model == SATURATING_INVERSE:
                params = []
                for name in PARAM_NAMES:
                    if name not in d:
                        raise ConfigError("missing; a saturating-inverse curve needs "
                                          f"{', '.join(PARAM_NAMES)}", field=name)
                    params.append(_finite_float(d[name], name))
                for key in _SPAN_KEYS:
                    if key not in d:
                        raise ConfigError("missing; the valid span in metres is required",
                                          field=key)
                cov = d.get("param_cov")
                if cov is not None and not (isinstance(cov, list) and all(
                        isinstance(row, list) and all(isinstance(x, numbers.Real) and not
                                                      isinstance(x, bool) for x in row)
                        for row in cov)):
                    raise ConfigError("expected a list of lists of numbers", field="param_cov")
                return cls(model=model, params=tuple(params), param_cov=cov, **kw)
            for key in ("range_m", "volts"):
                value = d.get(key)
                if value is None:
                    raise ConfigError("missing; a table curve needs range_m and volts lists",
                                      field=key)
                if not isinstance(value, list) or not all(
                        isinstance(x, numbers.Real) and not isinstance(x, bool) for x in value):
                    raise ConfigError("expected a list of numbers", field=key)
            return cls(model=model, table_range_m=tuple(d["range_m"]), table_volts=tuple(d["volts"]),
                       **kw)
        except ConfigError as exc:
            if exc.file:
                raise
            raise ConfigError(exc.message, file=file, field=exc.field, row=exc.row) from None


# ============================================================================ fitting

@dataclass(frozen=True, eq=False)
class FitCandidate:
    """One model fitted to the calibration pairs.

    Attributes
    ----------
    model : str
    curve : TriangulationCurve or None
        None when the model could not be fitted (see ``failure``).
    n_params : int
        Parameters counted by the information criteria (knots for a table).
    rss : float
        Residual sum of squares, V^2.
    residual_sigma_v : float
        ``sqrt(rss / (n - n_params))``; NaN without degrees of freedom left.
    aic, aicc : float
        ``n ln(rss/n) + 2k`` and its small-sample correction ``+ 2k(k+1)/(n-k-1)``
        (infinite when ``k >= n - 1``).
    fitted_volts : ndarray or None
        The model at the calibration ranges.
    failure : str
        Why the model could not be fitted ("" when it was).
    notes : tuple of str
        Warnings that belong to this candidate.
    """

    model: str
    curve: TriangulationCurve | None
    n_params: int = 0
    rss: float = math.nan
    residual_sigma_v: float = math.nan
    aic: float = math.nan
    aicc: float = math.nan
    fitted_volts: np.ndarray | None = None
    failure: str = ""
    notes: tuple = ()

    @property
    def ok(self) -> bool:
        return self.curve is not None


@dataclass(frozen=True, eq=False)
class CurveFit:
    """The result of `fit_report`: the chosen curve, both candidates and the warnings.

    Attributes
    ----------
    curve : TriangulationCurve
        The chosen curve, carrying its residual sigma, AIC and covariance.
    model : str
        The chosen model.
    candidates : tuple of FitCandidate
    range_m, volts : ndarray
        The pairs, sorted by range.
    rows : ndarray of int
        Row number (or 0-based index) of each sorted pair in the input.
    row_label : str
        ``"row"`` for file rows, ``"index"`` for array positions.
    warnings : tuple of str
    where : str
        The source file, if any.
    """

    curve: TriangulationCurve
    model: str
    candidates: tuple
    range_m: np.ndarray
    volts: np.ndarray
    rows: np.ndarray
    row_label: str
    warnings: tuple
    where: str = ""

    def candidate(self, model) -> FitCandidate:
        for c in self.candidates:
            if c.model == model:
                return c
        raise KeyError(model)

    @property
    def fitted_volts(self) -> np.ndarray:
        return self.candidate(self.model).fitted_volts

    @property
    def residuals_v(self) -> np.ndarray:
        """Measured minus fitted voltage for the chosen model."""
        return self.volts - self.fitted_volts

    def summary(self) -> str:
        """A plain-text report: candidates, parameters, peak, residual table, warnings."""
        c = self.curve
        out = []
        src = f" from {self.where}" if self.where else ""
        out.append(f"IR triangulation curve fit{src}: {len(self.range_m)} pairs, "
                   f"{self.range_m.min():.4g}-{self.range_m.max():.4g} m, "
                   f"{self.volts.min():.4g}-{self.volts.max():.4g} V")
        out.append(f"chosen model: {self.model}")
        out.append("")
        out.append(f"  {'candidate':<20}{'k':>4}{'sigma_V':>12}{'AIC':>12}{'AICc':>12}")
        for cand in self.candidates:
            mark = "  <- chosen" if cand.model == self.model else ""
            if cand.ok:
                out.append(f"  {cand.model:<20}{cand.n_params:>4}{cand.residual_sigma_v:>12.4g}"
                           f"{cand.aic:>12.2f}{cand.aicc:>12.2f}{mark}")
            else:
                out.append(f"  {cand.model:<20}  not fitted: {cand.failure}")
        out.append("")
        if c.model == SATURATING_INVERSE:
            out.append("parameters (+/- 1 sigma):")
            sig = c.param_sigma()
            for name, unit in zip(PARAM_NAMES, PARAM_UNITS):
                value = c.param_dict()[name]
                s = f" +/- {sig[name]:.3g}" if name in sig else ""
                out.append(f"  {name:<10}{value:>12.6g}{s} {unit}".rstrip())
        else:
            out.append(f"table: {len(c.table_range_m)} knots from {c.table_range_m[0]:.4g} to "
                       f"{c.table_range_m[-1]:.4g} m (shape-preserving cubic between knots)")
        out.append(f"peak: {c.peak_volts:.4g} V at {c.peak_range_m:.4g} m")
        out.append(f"valid span: {c.min_range_m:.4g}-{c.max_range_m:.4g} m")
        out.append(f"residual sigma: {c.residual_sigma_v:.4g} V")
        out.append("")
        out.append(f"residuals ({self.model}):")
        out.append(f"  {self.row_label:>6}{'range_m':>10}{'measured_V':>12}{'fitted_V':>12}"
                   f"{'residual_V':>12}")
        for row, r, v, f in zip(self.rows, self.range_m, self.volts, self.fitted_volts):
            out.append(f"  {int(row):>6}{r:>10.4f}{v:>12.4f}{f:>12.4f}{v - f:>12.4f}")
        if self.warnings:
            out.append("")
            out.append("warnings:")
            out.extend(f"  - {w}" for w in self.warnings)
        return "\n".join(out)


def _aic(n, k, rss, scale):
    # RSS of an exact fit is 0 and ln(0) is -inf; floor it far below any real noise.
    rss = max(rss, n * (1e-12 * scale) ** 2)
    aic = n * math.log(rss / n) + 2.0 * k
    aicc = aic + 2.0 * k * (k + 1) / (n - k - 1) if n - k - 1 > 0 else math.inf
    return aic, aicc


def _pav_prefix_sse(y, w):
    """SSE of the best increasing step fit to ``y[:i+1]`` for every ``i`` (pool adjacent
    violators, one point at a time; Stout 2008)."""
    n = len(y)
    sse = np.empty(n)
    W, S, Q = [], [], []
    total = 0.0
    for i in range(n):
        W.append(w[i])
        S.append(w[i] * y[i])
        Q.append(w[i] * y[i] * y[i])
        while len(W) > 1 and S[-2] / W[-2] >= S[-1] / W[-1]:
            total -= (Q[-2] - S[-2] ** 2 / W[-2]) + (Q[-1] - S[-1] ** 2 / W[-1])
            w2, s2, q2 = W.pop(), S.pop(), Q.pop()
            W[-1] += w2
            S[-1] += s2
            Q[-1] += q2
            total += Q[-1] - S[-1] ** 2 / W[-1]
        sse[i] = max(total, 0.0)
    return sse


def _pav_blocks(y, w):
    """Blocks ``(start, stop)`` of the strictly increasing pooled fit to ``y``."""
    blocks = []  # [start, stop, W, S]
    for i in range(len(y)):
        blocks.append([i, i + 1, w[i], w[i] * y[i]])
        while len(blocks) > 1 and blocks[-2][3] / blocks[-2][2] >= blocks[-1][3] / blocks[-1][2]:
            b = blocks.pop()
            blocks[-1][1] = b[1]
            blocks[-1][2] += b[2]
            blocks[-1][3] += b[3]
    return [(b[0], b[1]) for b in blocks]


def _unimodal_blocks(y, w):
    """Least-squares fit of ``y`` (weights ``w``) rising to one peak and falling after it.

    Returns the blocks of pooled points, in order, and the index of the peak block.
    """
    m = len(y)
    pre = _pav_prefix_sse(y, w)
    suf = _pav_prefix_sse(y[::-1], w[::-1])[::-1]
    # cost[j]: the first j points rise, the rest fall.
    cost = np.array([suf[0]] + [pre[j - 1] + (suf[j] if j < m else 0.0) for j in range(1, m + 1)])
    j = int(np.argmin(cost))
    rise = _pav_blocks(y[:j], w[:j])
    fall = [(m - b, m - a) for a, b in reversed(_pav_blocks(y[j:][::-1], w[j:][::-1]))]
    blocks = rise + fall
    means = [float(np.sum(w[a:b] * y[a:b]) / np.sum(w[a:b])) for a, b in blocks]
    if rise and fall and means[len(rise) - 1] == means[len(rise)]:
        a, b = blocks[len(rise) - 1][0], blocks[len(rise)][1]
        blocks[len(rise) - 1:len(rise) + 1] = [(a, b)]
        means[len(rise) - 1:len(rise) + 1] = [float(np.sum(w[a:b] * y[a:b]) / np.sum(w[a:b]))]
    return blocks, int(np.argmax(means))


def _describe_rows(rows, label, limit=12):
    rows = [int(r) for r in rows]
    text = ", ".join(str(r) for r in rows[:limit])
    if len(rows) > limit:
        text += f" and {len(rows) - limit} more"
    plural = {"row": "rows", "index": "indices"}[label]
    return f"{plural} {text}" if len(rows) > 1 else f"{label} {text}"


def _check_pairs(range_m, volts, where, rows):
    file = where or None
    try:
        r = np.asarray(range_m, dtype=float)
        v = np.asarray(volts, dtype=float)
    except (TypeError, ValueError):
        raise CalibrationError("range_m and volts must be numbers", file=file) from None
    if r.ndim != 1 or v.ndim != 1 or r.shape != v.shape:
        raise CalibrationError(f"range_m and volts must be 1-D and of one length (got shapes "
                               f"{r.shape} and {v.shape})", file=file)
    if rows is None:
        rows_a, label, row_of = np.arange(len(r)), "index", (lambda i: int(i))
    else:
        rows_a = np.asarray(rows, dtype=np.int64)
        if rows_a.shape != r.shape:
            raise CalibrationError("rows must give one row number per pair", file=file)
        label, row_of = "row", (lambda i: int(rows_a[i]))
    for name, a in (("range_m", r), ("volts", v)):
        bad = np.flatnonzero(~np.isfinite(a))
        if bad.size:
            raise CalibrationError(f"{a[bad[0]]} is not a usable value; expected a finite number",
                                   file=file, field=name, row=row_of(bad[0]))
    bad = np.flatnonzero(r < 0.0)
    if bad.size:
        raise CalibrationError(f"range {r[bad[0]]} m is negative; expected a distance >= 0",
                               file=file, field="range_m", row=row_of(bad[0]))
    if len(r) < MIN_PAIRS:
        raise CalibrationError(f"got {len(r)} pair(s); at least {MIN_PAIRS} are needed (the "
                               "parametric curve has 5 parameters, plus one degree of freedom "
                               "for the noise)", file=file)
    distinct = len(np.unique(r))
    if distinct < MIN_DISTINCT_RANGES:
        raise CalibrationError(f"the pairs are at only {distinct} distinct range(s); at least "
                               f"{MIN_DISTINCT_RANGES} are needed, on both sides of the peak",
                               file=file, field="range_m")
    if np.ptp(v) <= 1e-9 * max(np.max(np.abs(v)), 1e-12):
        raise CalibrationError(f"all voltages are equal ({v[0]} V): the ranger output does not "
                               "change with range; check the wiring and the column", file=file,
                               field="volts")
    return r, v, rows_a, label


def _sat_jac(params, r):
    A, b, lam, p, _c = params
    x = r / lam
    with np.errstate(divide="ignore", invalid="ignore"):
        z = x ** p
        e = np.exp(-z)
        g = -np.expm1(-z)
        rb = r + b
        lnx = np.where(r > 0, np.log(np.where(r > 0, x, 1.0)), 0.0)
        J = np.empty((len(r), 5))
        J[:, 0] = g / rb
        J[:, 1] = -A * g / rb ** 2
        J[:, 2] = -A / rb * e * p * z / lam
        J[:, 3] = A / rb * e * z * lnx
        J[:, 4] = 1.0
    return J


def _fit_saturating_inverse(r, v, peak_guess, span, far_only, scale):
    """Least-squares fit of the parametric family from several starts near the data peak."""
    n = len(r)
    r_pk, v_pk = peak_guess
    if far_only:
        r_pk, v_pk = 0.75 * r.min(), 1.1 * v.max()
    r_pk = max(r_pk, 1e-4 * max(r.max(), 1e-3))
    vmax = float(np.max(np.abs(v)))
    lower = [1e-12, 1e-6 * r_pk, 1e-3 * r_pk, 0.3, -2.0 * vmax]
    upper = [np.inf, 100.0 * max(r.max(), r_pk), 100.0 * max(r.max(), r_pk), 20.0, 2.0 * vmax]

    def resid(x):
        with np.errstate(all="ignore"):
            return _SaturatingInverse(x).v(r) - v

    def jac(x):
        return _sat_jac(x, r)

    best = None
    # Ratios to the peak range of a typical unit (b ~ 0.47, lam ~ 0.73 r_peak, p ~ 1.9),
    # spread so that one start lies in the basin of units that differ from it.
    for p0 in (1.5, 1.9, 3.0):
        for b_ratio in (0.25, 0.47, 1.0):
            b0, lam0 = b_ratio * r_pk, 0.73 * r_pk
            a0 = v_pk * (r_pk + b0) / -math.expm1(-((r_pk / lam0) ** p0))
            x0 = np.clip([a0, b0, lam0, p0, 0.0], lower, upper)
            try:
                res = least_squares(resid, x0, jac=jac, bounds=(lower, upper), x_scale="jac",
                                    method="trf", max_nfev=400)
            except (ValueError, np.linalg.LinAlgError):
                continue
            if np.all(np.isfinite(res.fun)) and (best is None or res.cost < best.cost):
                best = res
    if best is None:
        return FitCandidate(SATURATING_INVERSE, None, 5, failure="least squares did not converge "
                            "from any starting point")
    notes = []
    x = best.x
    rss = float(np.sum(best.fun ** 2))
    dof = n - 5
    s2 = rss / dof if dof > 0 else math.nan
    J = _sat_jac(x, r)
    _, sv, vt = np.linalg.svd(J, full_matrices=False)
    keep = sv > np.finfo(float).eps * max(J.shape) * sv[0]
    if not np.all(keep):
        notes.append("the pairs do not determine all five parameters of the saturating-inverse "
                     "curve (the Jacobian is singular); their uncertainties are unbounded")
        cov = np.full((5, 5), np.inf)
    else:
        vt = vt[keep]
        cov = (vt.T / sv[keep] ** 2) @ vt * s2
        cov = 0.5 * (cov + cov.T)
    loose = [name for name, value, var in zip(PARAM_NAMES, x, np.diag(cov))
             if name != "offset_v" and np.isfinite(var) and math.sqrt(var) > abs(value)]
    if loose and np.all(keep):
        notes.append(f"saturating-inverse parameter(s) {', '.join(loose)} are poorly determined by "
                     "the pairs (one sigma exceeds the value); cover more of the curve")
    at_bound = [PARAM_NAMES[i] for i in np.flatnonzero(best.active_mask)]
    if at_bound:
        notes.append(f"saturating-inverse parameter(s) {', '.join(at_bound)} stopped at a bound "
                     "of the search; the family may not suit this unit")
    aic, aicc = _aic(n, 5, rss, scale)
    try:
        curve = TriangulationCurve(
            model=SATURATING_INVERSE, params=tuple(x), min_range_m=span[0], max_range_m=span[1],
            residual_sigma_v=math.sqrt(s2) if dof > 0 else math.nan,
            param_cov=None if not np.all(np.isfinite(cov)) else cov, aic=aic)
    except ConfigError as exc:
        return FitCandidate(SATURATING_INVERSE, None, 5, rss, failure=exc.message)
    return FitCandidate(SATURATING_INVERSE, curve, 5, rss, curve.residual_sigma_v, aic, aicc,
                        curve.volts(r), notes=tuple(notes))


def _fit_table(r, v, u, counts, vmean, span, scale):
    """The best calibration table by AICc over a few knot spacings.

    Knots are the mean range and voltage of groups of ``g`` neighbouring distinct ranges
    (``g = 1`` keeps every distinct range), made unimodal by pooling (Stout 2008). The
    first and last distinct ranges stay knots of their own so that the table spans the
    data and no pair falls on an extension.
    """
    n = len(r)
    found, tried = [], []
    for g in (1, 2, 3, 4, 6, 8, 12, 16):
        m = len(u)
        if 2 + math.ceil((m - 2) / g) < 4:
            break
        grp = np.concatenate(([0], 1 + np.arange(m - 2) // g, [1 + (m - 3) // g + 1]))
        W = np.bincount(grp, weights=counts)
        R = np.bincount(grp, weights=counts * u) / W
        Y = np.bincount(grp, weights=counts * vmean) / W
        blocks, _ = _unimodal_blocks(Y, W)
        kr = np.array([np.sum(W[a:b] * R[a:b]) / np.sum(W[a:b]) for a, b in blocks])
        kv = np.array([np.sum(W[a:b] * Y[a:b]) / np.sum(W[a:b]) for a, b in blocks])
        try:
            curve = TriangulationCurve(model=TABLE, table_range_m=tuple(kr), table_volts=tuple(kv),
                                       min_range_m=span[0], max_range_m=span[1])
        except ConfigError as exc:
            tried.append(exc.message)
            continue
        fitted = curve.volts(r)
        rss = float(np.sum((v - fitted) ** 2))
        aic, aicc = _aic(n, len(kr), rss, scale)
        found.append((aicc, g, curve, fitted, rss, len(kr), aic))
    if not found:
        return FitCandidate(TABLE, None, failure=tried[0] if tried else "too few distinct ranges "
                            "for a table")
    # Lowest AICc; when every spacing leaves too few degrees of freedom, the finest.
    best = min(found, key=lambda c: c[0]) if any(math.isfinite(c[0]) for c in found) else found[0]
    aicc, g, curve, fitted, rss, k, aic = best
    dof = n - k
    sigma = math.sqrt(rss / dof) if dof > 0 else math.nan
    curve = dataclasses.replace(curve, residual_sigma_v=sigma, aic=aic)
    notes = []
    if g > 1:
        notes.append(f"the table's knots average groups of {g} neighbouring ranges (the spacing "
                     "with the lowest AICc)")
    if dof <= 0:
        notes.append("the table passes through every pair, so its residuals say nothing about "
                     "the noise; repeat readings at each range to estimate it")
    return FitCandidate(TABLE, curve, k, rss, sigma, aic, aicc, fitted, notes=tuple(notes))


# A span end past the farthest pair by more than this factor is reported as extrapolated
# (a design figure: a few per cent past the last pair is the usual rounding of a span).
_SPAN_STRETCH = 1.1


def fit_report(range_m, volts, model="auto", *, min_range_m=None, max_range_m=None, where="",
               rows=None) -> CurveFit:
    """Fit an IR triangulation curve to calibration pairs and report on it.

    Both models are fitted: the saturating-inverse family by least squares from several
    starts derived from the data's peak, and a calibration table whose knots are the
    data (or groups of it) made to rise to one peak and fall after it. ``model="auto"``
    keeps the one with the lower AICc; AICc counts the table's knots as parameters, so
    with few pairs the parametric family wins.

    Parameters
    ----------
    range_m, volts : array_like
        Calibration pairs, any order; repeated readings at one range are welcome.
    model : {"auto", "saturating-inverse", "table"}, optional
    min_range_m, max_range_m : float, optional
        The valid span written into the curve (default: the smallest and largest
        calibrated range).
    where : str, optional
        Source file, for messages.
    rows : sequence of int, optional
        Row number of each pair in the source file, for messages and the residual table.

    Returns
    -------
    CurveFit
        With ``.curve`` (carrying residual sigma, AIC and, for the parametric model, the
        parameter covariance ``s**2 (J^T J)**-1``) and ``.summary()``.

    Raises
    ------
    CalibrationError
        Fewer than `MIN_PAIRS` pairs or `MIN_DISTINCT_RANGES` distinct ranges, NaN or
        infinite values, negative ranges, all voltages equal, pairs only on the near
        side of the peak, or no model could be fitted.
    InputError
        An unknown ``model`` or a bad span.

    References
    ----------
    Akaike (1974); Hurvich & Tsai (1989); Fritsch & Carlson (1980); Stout (2008).
    """
    if model not in ("auto",) + MODELS:
        raise InputError(f"unknown model {model!r}; expected auto, {', '.join(MODELS)}",
                         field="model")
    file = where or None
    r, v, rows_a, label = _check_pairs(range_m, volts, where, rows)
    order = np.argsort(r, kind="stable")
    r, v, rows_a = r[order], v[order], rows_a[order]
    scale = float(np.max(np.abs(v)))

    u, inv, counts = np.unique(r, return_inverse=True, return_counts=True)
    counts = counts.astype(float)
    vmean = np.bincount(inv, weights=v) / counts
    blocks, pk = _unimodal_blocks(vmean, counts)
    pa, pb = blocks[pk]
    far_distinct = len(u) - pb
    if far_distinct < 2:
        raise CalibrationError(
            f"the voltage rises all the way to {u[-1]:.4g} m: the pairs cover only the near side "
            "of the peak; add pairs farther out, where the voltage falls with range (the working "
            "span)", file=file, field="range_m")
    far_only = pa == 0
    peak_r = float(np.sum(counts[pa:pb] * u[pa:pb]) / np.sum(counts[pa:pb]))
    peak_v = float(np.max(vmean[pa:pb]))

    lo = float(u[0]) if min_range_m is None else float(min_range_m)
    hi = float(u[-1]) if max_range_m is None else float(max_range_m)
    if not (math.isfinite(lo) and math.isfinite(hi) and 0.0 <= lo < hi):
        # the end the caller set is the one to change (the other came from the pairs)
        blame_min = not (math.isfinite(lo) and lo >= 0.0) or \
            (max_range_m is None and min_range_m is not None)
        raise InputError(f"the valid span must satisfy 0 <= min < max metres (got {lo} and {hi})",
                         field="min_range_m" if blame_min else "max_range_m")

    cands = (_fit_saturating_inverse(r, v, (peak_r, peak_v), (lo, hi), far_only, scale),
             _fit_table(r, v, u, counts, vmean, (lo, hi), scale))
    ok = [c for c in cands if c.ok]
    if model == "auto":
        if not ok:
            raise CalibrationError("no model could be fitted: " + "; ".join(
                f"{c.model}: {c.failure}" for c in cands), file=file)
        # Ties (both infinite, or equal) go to the parametric family, listed first.
        chosen = min(ok, key=lambda c: c.aicc)
    else:
        chosen = next(c for c in cands if c.model == model)
        if not chosen.ok:
            raise CalibrationError(f"the {model} model could not be fitted: {chosen.failure}",
                                   file=file)

    notes = list(chosen.notes)
    curve = chosen.curve
    if far_only or curve.peak_range_m < u[0]:
        notes.insert(0, f"no pairs on the near side of the peak: the voltage falls from the "
                     f"first pair at {u[0]:.4g} m on, so the peak and the near side below "
                     f"{u[0]:.4g} m are extrapolated, not calibrated (the {chosen.model} model "
                     f"puts the peak at {curve.peak_range_m:.4g} m, which the pairs do not pin "
                     "down); near-side solutions below the span are flagged NEAR_OUTSIDE_SPAN")
    if chosen.model == TABLE:
        pooled = [i for a, b in blocks if b - a > 1 for i in range(a, b)]
        if pooled:
            bad_rows = rows_a[np.isin(inv, pooled)]
            notes.append(f"the voltages are not monotone on each side of the peak at "
                         f"{_describe_rows(bad_rows, label)}; the table pools them into their "
                         "mean so each side can be inverted")
    reach = float(u[-1])
    if hi > _SPAN_STRETCH * reach:
        # the span is where readings are trusted; past the pairs it is the model's guess
        notes.append(f"the valid span reaches {hi:.4g} m, {hi / reach:.3g} times the farthest "
                     f"pair at {reach:.4g} m: ranges past {reach:.4g} m are extrapolated, not "
                     "calibrated; add pairs out to the span's end")
    if len(u) < 2 * MIN_DISTINCT_RANGES and chosen.model == SATURATING_INVERSE:
        notes.append(f"only {len(u)} distinct ranges: the parameter uncertainties are rough; "
                     "calibrate at 10 or more ranges across the span")
    return CurveFit(curve=curve, model=chosen.model, candidates=cands, range_m=r, volts=v,
                    rows=rows_a, row_label=label, warnings=tuple(notes), where=where)
