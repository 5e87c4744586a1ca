"""Consistency and accuracy diagnostics, accumulated chunk by chunk (flat memory).

References
----------
Y. Bar-Shalom, X. R. Li, T. Kirubarajan, *Estimation with Applications to Tracking and
Navigation*, Wiley (2001), §5.4: NEES, NIS and their chi-square bounds; the whiteness
test of the innovations (sample autocorrelation against +-1.96/sqrt(N)).
G. M. Ljung, G. E. P. Box, "On a measure of lack of fit in time series models",
Biometrika 65(2), 297-303 (1978): the portmanteau statistic.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from fusion._chi2 import chi2_ppf, chi2_sf

__all__ = ["ZONES", "zone_edges", "zone_of", "predict_range", "ErrorStats", "Whiteness", "nis_bounds",
           "consistency_verdict"]

ZONES = ("near", "overlap", "far")


def zone_edges(rig, direction):
    """(near_below_m, far_above_m) for a direction: below the IR peak is the fold-back
    zone; beyond the IR valid span only echo rangers see; in between they overlap."""
    peaks, spans = [], []
    for s in rig.sensors_facing(direction):
        if s.kind == "triangulation":
            peaks.append(s.curve.peak_range_m + s.offset_m)
            spans.append(s.curve.max_range_m + s.offset_m)
    if not peaks:
        return -math.inf, -math.inf
    return max(peaks), max(spans)


def zone_of(range_m, edges):
    r = np.asarray(range_m, float)
    z = np.ones(r.shape, np.int8)
    z[r < edges[0]] = 0
    z[r > edges[1]] = 2
    return z


def nis_bounds(n, dof=1, p=0.95):
    """Two-sided bounds of the time-averaged NIS of `n` readings (Bar-Shalom et al. §5.4)."""
    if n <= 0:
        return math.nan, math.nan
    a = (1 - p) / 2
    return chi2_ppf(a, n * dof) / n, chi2_ppf(1 - a, n * dof) / n


def consistency_verdict(mean, n, dof=1):
    lo, hi = nis_bounds(n, dof)
    if not np.isfinite(mean):
        return "n/a"
    return "consistent" if lo <= mean <= hi else ("too large" if mean > hi else "too small")


def predict_range(range_m, rate_mps, cov_rr, cov_rv, cov_vv, dt_s, accel_psd):
    """The track's range and its standard deviation predicted ``dt_s`` ahead under the
    white-acceleration model (what a user reading the track at that instant holds):
    ``r + v dt`` and ``sqrt(P00 + 2 dt P01 + dt^2 P11 + q dt^3 / 3)`` (Bar-Shalom, Li &
    Kirubarajan 2001, sec. 6.2)."""
    r = range_m + rate_mps * dt_s
    var = cov_rr + 2 * dt_s * cov_rv + dt_s ** 2 * cov_vv + accel_psd * dt_s ** 3 / 3
    return r, np.sqrt(var)


@dataclass
class ErrorStats:
    """Error of an estimate against truth, by zone."""

    n: np.ndarray = field(default_factory=lambda: np.zeros(3))
    s1: np.ndarray = field(default_factory=lambda: np.zeros(3))
    s2: np.ndarray = field(default_factory=lambda: np.zeros(3))
    worst: np.ndarray = field(default_factory=lambda: np.zeros(3))
    nees: np.ndarray = field(default_factory=lambda: np.zeros(3))
    cover2: np.ndarray = field(default_factory=lambda: np.zeros(3))

    def add(self, err, sigma, zone):
        ok = np.isfinite(err) & np.isfinite(sigma) & (sigma > 0)
        if not ok.any():
            return
        err, sigma, zone = err[ok], sigma[ok], zone[ok].astype(np.intp)
        ae = np.abs(err)
        self.n += np.bincount(zone, minlength=3)
        self.s1 += np.bincount(zone, weights=err, minlength=3)
        self.s2 += np.bincount(zone, weights=err * err, minlength=3)
        worst = np.zeros(3)
        np.maximum.at(worst, zone, ae)
        self.worst = np.maximum(self.worst, worst)
        self.nees += np.bincount(zone, weights=(err / sigma) ** 2, minlength=3)
        self.cover2 += np.bincount(zone, weights=ae <= 2 * sigma, minlength=3)

    def add_sums(self, block):
        """Add one chunk's sums, already made by zone: rows n, s1, s2, worst, nees,
        cover2 of a ``(6, 3)`` array, each summed in reading order from zero (what `add`
        adds, so the totals are the same floats)."""
        self.n += block[0]
        self.s1 += block[1]
        self.s2 += block[2]
        self.worst = np.maximum(self.worst, block[3])
        self.nees += block[4]
        self.cover2 += block[5]

    def merge(self, other):
        for k in ("n", "s1", "s2", "nees", "cover2"):
            setattr(self, k, getattr(self, k) + getattr(other, k))
        self.worst = np.maximum(self.worst, other.worst)

    def table(self, with_all=True) -> dict:
        out = {}
        keys = list(range(3)) + (["all"] if with_all else [])
        for z in keys:
            sl = slice(None) if z == "all" else slice(z, z + 1)
            n = self.n[sl].sum()
            name = z if z == "all" else ZONES[z]
            if n == 0:
                out[name] = None
                continue
            out[name] = {
                "n": int(n),
                "rmse_m": math.sqrt(self.s2[sl].sum() / n),
                "bias_m": self.s1[sl].sum() / n,
                "worst_m": float(self.worst[sl].max()),
                "nees": self.nees[sl].sum() / n,
                "cover2": self.cover2[sl].sum() / n,
            }
        return out


@dataclass
class Whiteness:
    """Streaming sample autocorrelation of normalised innovations, lags 1..L."""

    lags: int = 10
    n: int = 0
    s: float = 0.0
    s2: float = 0.0
    cross: np.ndarray = None
    tail: np.ndarray = None

    def __post_init__(self):
        self.cross = np.zeros(self.lags)
        self.tail = np.zeros(0)

    def add(self, e):
        e = np.asarray(e, float)
        e = e[np.isfinite(e)]
        if e.size == 0:
            return
        full = np.concatenate([self.tail, e])
        off = self.tail.size
        for k in range(1, self.lags + 1):
            # products e_t e_{t-k} for t in the new part
            start = max(off, k)
            if start < full.size:
                self.cross[k - 1] += float(np.dot(full[start:], full[start - k:full.size - k]))
        self.n += e.size
        self.s += float(e.sum())
        self.s2 += float((e * e).sum())
        self.tail = full[-self.lags:]

    def result(self) -> dict:
        if self.n <= self.lags + 1:
            return {"n": self.n, "rho": [], "bound": math.nan, "q": math.nan, "p": math.nan,
                    "white": None}
        mean = self.s / self.n
        var = self.s2 / self.n - mean * mean
        # sums of products of deviations, lag k (mean removed afterwards; exact up to ends)
        rho = [((self.cross[k - 1] / self.n) - mean * mean) / var for k in range(1, self.lags + 1)]
        n = self.n
        q = n * (n + 2) * sum(r * r / (n - k) for k, r in enumerate(rho, 1))
        p = float(chi2_sf(q, self.lags))
        bound = 1.96 / math.sqrt(n)
        return {"n": n, "rho": rho, "bound": bound, "q": q, "p": p,
                "white": bool(max(abs(r) for r in rho) <= max(bound, 0.05))}
