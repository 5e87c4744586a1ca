"""Noise models as objects: one log-likelihood of readings given ranges for every estimator.

The particle filter, the Kalman filter and the tuner all ask the same question — how
likely is this reading if the true range were ``r``? — so each model answers it with a
vectorised ``loglik(z, range_m)`` that broadcasts with numpy rules. For readings against
particles pass ``z[:, None]`` and ``range_m`` of shape ``(p,)`` or ``(n, p)``.

`RangeGaussian`
    Gaussian in range with a constant and a proportional part (echo rangers).
`VoltageGaussian`
    Gaussian in volts through a voltage-range curve (IR triangulation rangers).
`BeamMixture`
    The robust four-part mixture of Thrun, Burgard & Fox (2005), with EM fitting.

References
----------
S. Thrun, W. Burgard and D. Fox, *Probabilistic Robotics*, MIT Press (2005), section 6.3
"Beam models of range finders", eq. (6.12) and Table 6.2.
A. P. Dempster, N. M. Laird and D. B. Rubin, "Maximum likelihood from incomplete data
via the EM algorithm", J. R. Stat. Soc. B 39(1), 1-38 (1977).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, fields

import numpy as np
from scipy import optimize, special

from .errors import CalibrationError, ConfigError, InputError

__all__ = ["RangeGaussian", "VoltageGaussian", "BeamMixture", "MixtureFit", "LOG_FLOOR",
           "MIN_SHORT_RANGE_M"]

#: Log-likelihoods are floored here (log of the smallest normal double), so no model
#: returns -inf for a reading that merely is very unlikely.
LOG_FLOOR = float(np.log(np.finfo(float).tiny))
_LOG_2PI = math.log(2.0 * math.pi)
#: The short-reading exponential lives on [0, r]; for r below this (a particle at or
#: behind the sensor face) it lives on [0, MIN_SHORT_RANGE_M] so it stays a proper density.
MIN_SHORT_RANGE_M = 1e-6
_COMPONENTS = ("hit", "short", "max", "rand")


def _check_number(value, field, *, minimum=None, strict=False, maximum=None, where=None):
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, float, np.number)):
        raise ConfigError(f"expected a number, got {value!r}", file=where, field=field)
    v = float(value)
    ok = math.isfinite(v)
    if ok and minimum is not None:
        ok = v > minimum if strict else v >= minimum
    if ok and maximum is not None:
        ok = v <= maximum
    if not ok:
        lo = "" if minimum is None else (f" > {minimum}" if strict else f" >= {minimum}")
        hi = "" if maximum is None else f" and <= {maximum}"
        raise ConfigError(f"expected a finite number{lo}{hi}, got {value!r}", file=where,
                          field=field)
    return v


def _from_dict(cls, d, where, prefix):
    if not isinstance(d, dict):
        raise ConfigError(f"expected a table, got {type(d).__name__}", file=where or None,
                          field=prefix)
    known = [f.name for f in fields(cls)]
    for key in d:
        if key not in known:
            raise ConfigError(f"unknown key {key!r}; expected one of " + ", ".join(known),
                              file=where or None, field=f"{prefix}.{key}")
    try:
        return cls(**d)
    except ConfigError as exc:
        field = exc.field if exc.field is None else f"{prefix}.{exc.field}"
        raise ConfigError(exc.message, file=where or None, field=field) from None


def _gauss_loglik(z, mean, var):
    return -0.5 * (_LOG_2PI + np.log(var) + (z - mean) ** 2 / var)


def _scalar_or_array(a):
    a = np.asarray(a, dtype=float)
    return float(a) if a.ndim == 0 else a


# ---------------------------------------------------------------------------- Gaussians
@dataclass(frozen=True)
class RangeGaussian:
    """Gaussian range noise, ``sigma(r) = sqrt(sigma_m**2 + (sigma_frac r)**2)``.

    Parameters
    ----------
    sigma_m : float
        Constant part, metres (> 0, so the density is proper at zero range).
    sigma_frac : float
        Proportional part, a fraction of range.

    Examples
    --------
    >>> RangeGaussian(0.003, 0.002).sigma(2.0)
    0.005
    """

    sigma_m: float
    sigma_frac: float = 0.0

    def __post_init__(self):
        object.__setattr__(self, "sigma_m", _check_number(self.sigma_m, "sigma_m",
                                                          minimum=0.0, strict=True))
        object.__setattr__(self, "sigma_frac", _check_number(self.sigma_frac, "sigma_frac",
                                                             minimum=0.0))

    def variance(self, range_m):
        """Variance at ``range_m``, m^2."""
        r = np.asarray(range_m, dtype=float)
        return _scalar_or_array(self.sigma_m ** 2 + (self.sigma_frac * r) ** 2)

    def sigma(self, range_m):
        """Standard deviation at ``range_m``, m."""
        return _scalar_or_array(np.sqrt(self.variance(range_m)))

    def loglik(self, z_m, range_m):
        """Log density of readings ``z_m`` given true ranges ``range_m`` (broadcasting)."""
        z = np.asarray(z_m, dtype=float)
        r = np.asarray(range_m, dtype=float)
        return _scalar_or_array(_gauss_loglik(z, r, self.variance(r)))

    def to_dict(self) -> dict:
        return {"sigma_m": self.sigma_m, "sigma_frac": self.sigma_frac}

    @classmethod
    def from_dict(cls, d, where: str = "", prefix: str = "noise") -> "RangeGaussian":
        return _from_dict(cls, d, where, prefix)


@dataclass(frozen=True)
class VoltageGaussian:
    """Gaussian voltage noise through a voltage-range curve (IR triangulation rangers).

    Parameters
    ----------
    volts_sigma : float
        Standard deviation of the output voltage, volts (> 0).
    curve : object
        Anything with ``volts(range_m)``; ``slope(range_m)`` (dV/dr, V/m) is used when
        present, otherwise a central difference of ``volts``.

    Notes
    -----
    The range uncertainty is the first-order (delta-method) propagation
    ``volts_sigma / |dV/dr|``; it is infinite at the curve's peak, where the slope is zero
    and one voltage does not pin the range down.
    """

    volts_sigma: float
    curve: object

    def __post_init__(self):
        object.__setattr__(self, "volts_sigma", _check_number(self.volts_sigma, "volts_sigma",
                                                              minimum=0.0, strict=True))
        if not callable(getattr(self.curve, "volts", None)):
            raise ConfigError("expected a curve object with a volts(range_m) method, got "
                              f"{type(self.curve).__name__}", field="curve")

    def loglik(self, volts, range_m):
        """Log density of voltages given true ranges (broadcasting)."""
        v = np.asarray(volts, dtype=float)
        mean = np.asarray(self.curve.volts(np.asarray(range_m, dtype=float)), dtype=float)
        return _scalar_or_array(_gauss_loglik(v, mean, self.volts_sigma ** 2))

    def slope(self, range_m):
        """dV/dr at ``range_m``, V/m."""
        r = np.asarray(range_m, dtype=float)
        if callable(getattr(self.curve, "slope", None)):
            return np.asarray(self.curve.slope(r), dtype=float)
        h = 1e-6 * np.maximum(1.0, np.abs(r))
        return (np.asarray(self.curve.volts(r + h), dtype=float)
                - np.asarray(self.curve.volts(r - h), dtype=float)) / (2.0 * h)

    def range_sigma(self, range_m):
        """Range standard deviation ``volts_sigma / |dV/dr|``, m (inf where the slope is 0)."""
        with np.errstate(divide="ignore"):
            return _scalar_or_array(self.volts_sigma / np.abs(self.slope(range_m)))


# ---------------------------------------------------------------------------- mixture
def _log_ndtr_diff(a, b):
    """``log(Phi(b) - Phi(a))`` for ``a < b``, accurate in both tails."""
    flip = a > 0
    lo = np.where(flip, -b, a)
    hi = np.where(flip, -a, b)
    lh = special.log_ndtr(hi)
    ll = special.log_ndtr(lo)
    with np.errstate(divide="ignore"):
        return lh + np.log(-np.expm1(ll - lh))


def _logsumexp_last(x):
    m = np.max(x, axis=-1)
    finite = np.isfinite(m)
    m0 = np.where(finite, m, 0.0)
    with np.errstate(divide="ignore"):
        out = m0 + np.log(np.sum(np.exp(x - m0[..., None]), axis=-1))
    return np.where(finite, out, m)


def _posterior(joint, log_w):
    """Normalise log joint densities over the last axis. A reading no component can
    produce (every joint is -inf) carries no information: its posterior is the prior."""
    norm = _logsumexp_last(joint)
    ok = np.isfinite(norm)[..., None]
    with np.errstate(invalid="ignore"):
        post = np.exp(np.where(ok, joint - np.where(ok, norm[..., None], 0.0), log_w))
    return post, norm


def _trunc_exp_mean_term(x):
    """``1/x - 1/expm1(x)``: mean of an exponential truncated to [0, z] is ``z`` times this
    at ``x = lambda z``. A series below 1e-3 avoids cancellation."""
    x = np.asarray(x, dtype=float)
    small = x < 1e-3
    xs = np.where(small, x, 1.0)
    with np.errstate(over="ignore"):
        direct = 1.0 / np.where(small, 1.0, x) - 1.0 / np.expm1(np.where(small, 1.0, x))
    return np.where(small, 0.5 - xs / 12.0 + xs ** 3 / 720.0, direct)


@dataclass(frozen=True)
class BeamMixture:
    """Robust mixture likelihood of a range finder (Thrun, Burgard & Fox 2005, eq. 6.12).

    ``p(z | r) = w_hit p_hit + w_short p_short + w_max p_max + w_rand p_rand`` on
    ``[0, z_max_m]``, for reading ``z`` and true (expected) range ``r``:

    - ``p_hit``: Gaussian ``N(z; r, sigma_hit_m**2)`` truncated to ``[0, z_max_m]``;
    - ``p_short``: exponential with rate ``lambda_short`` truncated to ``[0, r]`` —
      unexpected nearer reflectors and crosstalk (``r`` at least `MIN_SHORT_RANGE_M`);
    - ``p_max``: the point mass at ``z_max_m`` (dropouts), represented as a box of width
      ``max_width_m`` just below ``z_max_m``; readings at or beyond ``z_max_m``, and
      readings flagged as dropouts, land in it;
    - ``p_rand``: uniform on ``[0, z_max_m]``.

    Our extension, blanking: a single-transducer echo ranger cannot hear an echo during
    its ring-down, so when the true range is below ``blank_range_m`` it returns a dropout
    with probability ``p_blank_dropout``:
    ``p(z | r) = p_blank_dropout p_max + (1 - p_blank_dropout) (mixture)`` for
    ``r < blank_range_m``. ``blank_range_m = 0`` (the default) turns it off.

    Parameters
    ----------
    w_hit, w_short, w_max, w_rand : float
        Mixing weights, >= 0, summing to 1.
    sigma_hit_m : float
        Standard deviation of a correct reading, m.
    lambda_short : float
        Rate of the short-reading exponential, 1/m.
    z_max_m : float
        The sensor's maximum reading, m.
    max_width_m : float
        Width of the box standing for the point mass at ``z_max_m``.
    blank_range_m, p_blank_dropout : float
        Blanking extension (see above).

    Notes
    -----
    Readings below 0 are treated as 0 and readings above ``z_max_m`` as ``z_max_m`` (the
    support is ``[0, z_max_m]``). NaN readings give NaN; decoders flag them first.
    Log-likelihoods are floored at `LOG_FLOOR`, so they are finite for every finite
    reading and range.

    References
    ----------
    S. Thrun, W. Burgard and D. Fox, *Probabilistic Robotics* (2005), section 6.3,
    eqs. (6.4)-(6.12).
    """

    w_hit: float = 0.8
    w_short: float = 0.1
    w_max: float = 0.05
    w_rand: float = 0.05
    sigma_hit_m: float = 0.02
    lambda_short: float = 1.0
    z_max_m: float = 4.0
    max_width_m: float = 0.01
    blank_range_m: float = 0.0
    p_blank_dropout: float = 0.95

    def __post_init__(self):
        ws = []
        for key in ("w_hit", "w_short", "w_max", "w_rand"):
            ws.append(_check_number(getattr(self, key), key, minimum=0.0, maximum=1.0))
        total = sum(ws)
        if abs(total - 1.0) > 1e-6:
            raise ConfigError(f"expected mixing weights summing to 1, got {total:.9g}",
                              field="w_hit")
        for key, w in zip(("w_hit", "w_short", "w_max", "w_rand"), ws):
            object.__setattr__(self, key, w / total)
        for key in ("sigma_hit_m", "lambda_short", "z_max_m"):
            object.__setattr__(self, key, _check_number(getattr(self, key), key,
                                                        minimum=0.0, strict=True))
        object.__setattr__(self, "max_width_m", _check_number(
            self.max_width_m, "max_width_m", minimum=0.0, strict=True, maximum=self.z_max_m))
        object.__setattr__(self, "blank_range_m", _check_number(
            self.blank_range_m, "blank_range_m", minimum=0.0, maximum=self.z_max_m))
        object.__setattr__(self, "p_blank_dropout", _check_number(
            self.p_blank_dropout, "p_blank_dropout", minimum=0.0, maximum=1.0))

    @property
    def weights(self) -> np.ndarray:
        """``[w_hit, w_short, w_max, w_rand]``."""
        return np.array([self.w_hit, self.w_short, self.w_max, self.w_rand])

    # -------------------------------------------------------------- densities
    def component_logpdf(self, z_m, range_m, dropout=None):
        """Log densities of the four components, shape ``broadcast(z, range) + (4,)``.

        Order: hit, short, max, rand. Each is normalised on ``[0, z_max_m]``.
        """
        z, r = self._prepare(z_m, range_m, dropout)
        return self._components(z, r, self.sigma_hit_m, self.lambda_short)

    def _prepare(self, z_m, range_m, dropout):
        z = np.asarray(z_m, dtype=float)
        r = np.asarray(range_m, dtype=float)
        if dropout is not None:
            z = np.where(np.asarray(dropout, dtype=bool), self.z_max_m, z)
        z, r = np.broadcast_arrays(np.clip(z, 0.0, self.z_max_m), r)
        return z, r

    def _components(self, z, r, sigma, lam):
        zmax = self.z_max_m
        with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
            lhit = (-0.5 * ((z - r) / sigma) ** 2 - math.log(sigma) - 0.5 * _LOG_2PI
                    - _log_ndtr_diff(-r / sigma, (zmax - r) / sigma))
            r_short = np.clip(r, MIN_SHORT_RANGE_M, zmax)
            lshort = np.where(z <= r_short,
                              math.log(lam) - lam * z - np.log(-np.expm1(-lam * r_short)),
                              -np.inf)
        lmax = np.where(z >= zmax - self.max_width_m, -math.log(self.max_width_m), -np.inf)
        lrand = np.full(z.shape, -math.log(zmax))
        return np.stack([lhit, lshort, lmax, lrand], axis=-1)

    def _log_weights(self, r, weights=None):
        w = self.weights if weights is None else np.asarray(weights, dtype=float)
        if self.blank_range_m > 0 and self.p_blank_dropout > 0:
            pb = np.where(r < self.blank_range_m, self.p_blank_dropout, 0.0)[..., None]
            w = (1.0 - pb) * w + pb * np.array([0.0, 0.0, 1.0, 0.0])
        with np.errstate(divide="ignore"):
            return np.log(w)

    def loglik(self, z_m, range_m, dropout=None):
        """Log-likelihood of readings given true ranges, broadcasting (readings x particles).

        Parameters
        ----------
        z_m : array_like
            Readings, m.
        range_m : array_like
            True (expected) ranges, m, e.g. particles.
        dropout : array_like of bool, optional
            Readings flagged as dropouts; they count as hitting ``z_max_m``.

        Returns
        -------
        float or ndarray
            ``log p(z | r)``, floored at `LOG_FLOOR`.
        """
        z, r = self._prepare(z_m, range_m, dropout)
        lc = self._components(z, r, self.sigma_hit_m, self.lambda_short)
        out = _logsumexp_last(lc + self._log_weights(r))
        return _scalar_or_array(np.where(np.isnan(out), out, np.maximum(out, LOG_FLOOR)))

    def responsibilities(self, z_m, range_m, dropout=None) -> np.ndarray:
        """Posterior probability of each component for each reading, shape ``(..., 4)``.

        Order hit, short, max, rand; the blanking dropout (if on) counts as ``max``.
        """
        z, r = self._prepare(z_m, range_m, dropout)
        log_w = np.broadcast_to(self._log_weights(r), z.shape + (4,))
        return _posterior(self._components(z, r, self.sigma_hit_m, self.lambda_short) + log_w,
                          log_w)[0]

    # -------------------------------------------------------------- fitting
    @classmethod
    def fit(cls, z_m, true_range_m, *, z_max_m=None, init=None, dropout=None,
            max_iter: int = 500, tol: float = 1e-10,
            sigma_floor_m: float = 1e-4) -> "MixtureFit":
        """Maximum-likelihood parameters from readings with known true ranges, by EM.

        Follows "learn_intrinsic_parameters" (Thrun, Burgard & Fox 2005, Table 6.2):
        alternate responsibilities ``e_i,k`` of each reading for each component with
        re-estimates of the weights, ``sigma_hit`` and ``lambda_short``. Two departures,
        both needed for a true EM step (Dempster, Laird & Rubin 1977), which never
        lowers the likelihood:

        - the responsibilities are weighted by the current mixing weights (the table
          as printed normalises the bare component densities — from memory);
        - ``sigma_hit`` and ``lambda_short`` maximise the expected log-likelihood of the
          *truncated* densities (a bounded 1-D search, and the root of the truncated-
          exponential score), where the table uses the untruncated closed forms. The
          two agree when the truncation points are far from the readings.

        With blanking on, the probability of a blanking dropout is re-estimated too.
        ``z_max_m``, ``max_width_m`` and ``blank_range_m`` are held fixed.

        Parameters
        ----------
        z_m, true_range_m : (n,) array_like
            Readings and the true ranges they were taken at, m.
        z_max_m : float, optional
            Sensor maximum; default ``init.z_max_m``, or the largest reading.
        init : BeamMixture, optional
            Starting parameters (and the fixed ones).
        dropout : (n,) array_like of bool, optional
            Readings flagged as dropouts (counted as ``z_max_m``).
        max_iter : int
            Iteration limit.
        tol : float
            Stop when the mean log-likelihood per reading rises by less than this.
        sigma_floor_m : float
            Smallest ``sigma_hit_m`` allowed (keeps the hit Gaussian from collapsing onto
            repeated readings).

        Returns
        -------
        MixtureFit

        Raises
        ------
        InputError
            Non-finite or mismatched arrays.
        CalibrationError
            Fewer than 10 readings.
        """
        z = np.asarray(z_m, dtype=float).reshape(-1)
        r = np.asarray(true_range_m, dtype=float).reshape(-1)
        if z.shape != r.shape:
            raise InputError(f"expected readings and true ranges of one length, got "
                             f"{z.shape[0]} and {r.shape[0]}", field="true_range_m")
        if not (np.all(np.isfinite(z)) and np.all(np.isfinite(r))):
            raise InputError("expected finite readings and true ranges (flag dropouts with "
                             "dropout= instead of NaN)", field="z_m")
        if z.shape[0] < 10:
            raise CalibrationError(f"need at least 10 readings to fit a mixture, got "
                                   f"{z.shape[0]}", field="z_m")
        if init is None:
            zmax = float(np.max(z)) if z_max_m is None else z_max_m
            resid = np.abs(z - r)
            init = cls(w_hit=0.7, w_short=0.1, w_max=0.1, w_rand=0.1,
                       sigma_hit_m=max(1.4826 * float(np.median(resid)), sigma_floor_m),
                       lambda_short=1.0 / max(float(np.mean(np.abs(r))), 1e-3), z_max_m=zmax,
                       max_width_m=min(0.01, zmax))
        elif z_max_m is not None:
            init = _replace(init, z_max_m=z_max_m)
        model = init
        z, r = model._prepare(z, r, dropout)
        z = z.copy()
        r = r.copy()
        n = z.shape[0]
        blanked = (r < model.blank_range_m) if model.blank_range_m > 0 else np.zeros(n, bool)
        in_box = z >= model.z_max_m - model.max_width_m
        log_box = -math.log(model.max_width_m)
        r_short = np.clip(r, MIN_SHORT_RANGE_M, model.z_max_m)

        def total_loglik(m):
            return float(np.sum(m.loglik(z, r)))

        history = [total_loglik(model)]
        converged = False
        n_iter = 0
        for n_iter in range(1, max_iter + 1):
            # E-step on the base mixture, then the blanking component on top of it.
            lc = model._components(z, r, model.sigma_hit_m, model.lambda_short)
            with np.errstate(divide="ignore"):
                log_w = np.broadcast_to(np.log(model.weights), lc.shape)
            e, base = _posterior(lc + log_w, log_w)
            u = np.ones(n)
            pb = model.p_blank_dropout
            if np.any(blanked):
                with np.errstate(divide="ignore"):
                    lb = math.log(pb) + np.where(in_box, log_box, -np.inf) if pb > 0 else \
                        np.full(n, -np.inf)
                    lm = math.log1p(-pb) + base if pb < 1 else np.full(n, -np.inf)
                both = _logsumexp_last(np.stack([lb, lm], axis=-1))
                with np.errstate(invalid="ignore"):
                    rb = np.where(np.isfinite(both), np.exp(lb - both), 0.0)
                rb = np.where(blanked, rb, 0.0)
                u = 1.0 - rb
                pb = float(np.sum(rb[blanked]) / np.sum(blanked))
            e = e * u[:, None]

            # M-step.
            # (Every reading a blanking dropout leaves the base weights unidentified.)
            weights = e.sum(axis=0) / u.sum() if u.sum() > 0 else model.weights
            sigma = _fit_sigma(z, r, e[:, 0], model.z_max_m, model.sigma_hit_m, sigma_floor_m)
            lam = _fit_lambda(z, r_short, e[:, 1], model.lambda_short)
            new = _replace(model, w_hit=weights[0], w_short=weights[1], w_max=weights[2],
                           w_rand=weights[3], sigma_hit_m=sigma, lambda_short=lam,
                           p_blank_dropout=pb)
            ll = total_loglik(new)
            model = new
            history.append(ll)
            if ll - history[-2] < tol * n:
                converged = True
                break
        return MixtureFit(model=model, n_iter=n_iter, loglik=history[-1],
                          loglik_history=np.array(history), converged=converged, n_readings=n)

    # -------------------------------------------------------------- config
    def to_dict(self) -> dict:
        return {f.name: getattr(self, f.name) for f in fields(self)}

    @classmethod
    def from_dict(cls, d, where: str = "", prefix: str = "noise") -> "BeamMixture":
        """Build from a TOML table; keys are the field names (missing ones take defaults)."""
        return _from_dict(cls, d, where, prefix)


def _replace(model, **changes):
    d = model.to_dict()
    d.update({k: float(v) for k, v in changes.items()})
    return type(model)(**d)


def _fit_sigma(z, r, e_hit, zmax, sigma0, floor):
    """sigma maximising sum e_hit log N_trunc(z; r, sigma) over [0, zmax]."""
    s_e = float(np.sum(e_hit))
    if s_e <= 0:
        return sigma0
    d2 = (z - r) ** 2
    a0 = -r
    b0 = zmax - r

    def neg(log_s):
        s = math.exp(log_s)
        return float(np.sum(e_hit * (math.log(s) + 0.5 * d2 / s ** 2
                                     + _log_ndtr_diff(a0 / s, b0 / s))))

    # The untruncated closed form (Table 6.2, line 14) starts a search around it.
    closed = max(math.sqrt(float(np.sum(e_hit * d2)) / s_e), floor)
    lo = math.log(max(floor, closed / 20.0))
    hi = math.log(max(min(zmax, closed * 20.0), math.exp(lo) * 1.0001))
    res = optimize.minimize_scalar(neg, bounds=(lo, hi), method="bounded",
                                   options={"xatol": 1e-9})
    best = min((res.x, math.log(closed), math.log(max(sigma0, floor))), key=neg)
    return math.exp(best)


def _fit_lambda(z, r_short, e_short, lam0):
    """lambda solving the score of the exponential truncated to [0, r]:
    ``sum e (r h(lambda r)) = sum e z`` with ``h(x) = 1/x - 1/expm1(x)``."""
    s_ez = float(np.sum(e_short * z))
    if float(np.sum(e_short)) <= 0:
        return lam0
    lam_min, lam_max = 1e-9, 1e9

    def g(lam):
        return float(np.sum(e_short * r_short * _trunc_exp_mean_term(lam * r_short))) - s_ez

    if g(lam_min) <= 0:
        # Short readings no nearer than a uniform spread: the flattest exponential.
        return lam_min
    if g(lam_max) >= 0:
        return lam_max
    return optimize.brentq(g, lam_min, lam_max, xtol=1e-12, rtol=1e-12)


@dataclass(frozen=True)
class MixtureFit:
    """Result of `BeamMixture.fit`.

    Attributes
    ----------
    model : BeamMixture
        Fitted parameters.
    n_iter : int
        EM iterations run.
    loglik : float
        Total log-likelihood of the readings under ``model``.
    loglik_history : ndarray
        Total log-likelihood before the first and after every iteration (non-decreasing).
    converged : bool
        Whether the tolerance was met before ``max_iter``.
    n_readings : int
    """

    model: BeamMixture
    n_iter: int
    loglik: float
    loglik_history: np.ndarray
    converged: bool
    n_readings: int

    def summary(self) -> str:
        m = self.model
        lines = [f"beam mixture fit: {self.n_readings} readings, {self.n_iter} EM iterations, "
                 f"{'converged' if self.converged else 'NOT converged'}",
                 f"  log-likelihood {self.loglik:.6g} ({self.loglik / self.n_readings:.6g} "
                 "per reading)",
                 f"  weights hit {m.w_hit:.4f}  short {m.w_short:.4f}  max {m.w_max:.4f}  "
                 f"rand {m.w_rand:.4f}",
                 f"  sigma_hit {m.sigma_hit_m:.6g} m  lambda_short {m.lambda_short:.6g} /m  "
                 f"z_max {m.z_max_m:.6g} m"]
        if m.blank_range_m > 0:
            lines.append(f"  blanking below {m.blank_range_m:.6g} m: dropout probability "
                         f"{m.p_blank_dropout:.4f}")
        return "\n".join(lines)


def echo_mixture(sensor) -> BeamMixture:
    """The beam mixture an echo ranger gets unless one is given: `BeamMixture`'s default
    weights, in the sensor's own frame, to its maximum range, blanking below its minimum;
    the hit sigma (used for dropouts only: readings bring their own) is the sensor's noise
    at maximum range."""
    sigma = math.hypot(sensor.sigma_m, sensor.sigma_frac * sensor.max_range_m)
    return BeamMixture(z_max_m=sensor.max_range_m, blank_range_m=sensor.min_range_m,
                       sigma_hit_m=max(sigma, 1e-4), max_width_m=min(0.01, sensor.max_range_m))
