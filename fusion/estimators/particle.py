"""The particle estimator: the full nonlinear posterior of each direction's range.

`ParticleFuser` has the interface of `fusion.Fuser` (decoding, air temperature, crosstalk
screening, held-sample detection, one decision per reading, `StepBatch` results, `push`)
and replaces the Gaussian-sum Kalman step with a bootstrap particle filter (Gordon,
Salmond & Smith 1993) compiled with numba, `particle_run`.

The model, per direction
------------------------
State
    ``N`` particles of (range, rate) with weights. Between readings every particle moves
    by the white-acceleration constant-velocity model, its noise drawn from the exact
    discretised covariance ``q [[dt^3/3, dt^2/2], [dt^2/2, dt]]`` through its Cholesky
    factor (Bar-Shalom, Li & Kirubarajan 2001, §6.2.2).
IR triangulation readings
    Gaussian in *volts* around the curve's voltage at the particle's range (linear
    interpolation of `TriangulationCurve.grid`, mount offset removed), with the unit's
    total volts sigma and, as in its decoder, the reflectivity term ``gain_sigma`` times
    the reading's voltage, mixed with a small uniform outlier component over the output
    span. No inversion and no linearisation: a voltage below the peak fits particles on
    both sides of the peak equally well, so both branches of the near-zone fold-back
    keep their weight until other evidence (an echo reading, a dropout, motion) tells
    them apart.
Echo readings
    The beam mixture of `fusion.noise.BeamMixture` (Thrun, Burgard & Fox 2005, eq. 6.12,
    with the blanking extension) around the particle's range, its hit sigma taken from
    the reading's decoded sigma. A reading whose arrival screening matched to another
    unit's echo meets, besides, the Kalman path's first-arrival crosstalk term
    (`fusion.estimators._kernels.XT_DENS`) for the particles whose own echo would have
    come later, ``P(own range > z) = Phi((r - z) / sigma)``. A dropout counts as a reading at the maximum range:
    likely for particles inside the blanking zone (``min_range_m + offset_m``), and also
    for particles anywhere through the mixture's ``w_max`` part.
Resampling
    Systematic resampling (Douc & Cappé 2005, "systematic") when the effective sample
    size ``(sum w)^2 / sum w^2`` (Kong, Liu & Wong 1994) falls below
    ``resample_below * N``, then roughening (Gordon et al. 1993, §4): every resampled
    particle is jittered by a zero-mean Gaussian with standard deviation
    ``K * E * N^(-1/d)`` per state component, ``E`` that component's spread (max - min)
    among the resampled particles, ``d = 2`` and ``K = roughening`` (default 0.2, as
    suggested there). Without roughening, readings that arrive with no time between them
    (no process noise to spread the copies) would leave identical copies and the cloud
    would collapse; with 2000 particles (``E`` about 7 sigma) it inflates the variance by
    about 0.1 % per resample. ``E`` is taken on each side of the direction's peak
    separately: over the whole cloud it would be the gap between the two near-zone
    branches, and the jitter would smear out the narrow near branch.

Outputs and decisions
---------------------
State
    The weighted mean and covariance of the particles after the reading (before any
    resampling, which only adds Monte-Carlo noise).
Multimodal
    A direction's posterior is *multimodal* when both sides of the peak of its first IR
    ranger's curve (``peak_range_m + offset_m``) hold more than ``1 - ambiguous_below``
    of the posterior mass: then ``n_hyp`` is 2, otherwise 1. ``p_major`` is the mass on
    the heavier side (1 for a direction without an IR ranger).
Decisions
    The codes of `fusion.decisions`, as in the Kalman path. A reading is *gated* when its
    innovation against the predictive (weighted mean, ``S`` = particle variance + R) is
    beyond the chi-square gate at ``gate_probability``, or when its predictive
    likelihood is dominated by the outlier part of its model; a gated reading changes no
    weight, and crosstalk-suspect readings that are gated are *crosstalk*. An IR reading
    with two candidates is *ambiguous* when the posterior mass on the side of its
    curve's peak that holds most mass is below ``ambiguous_below``; its ``branch`` is
    that side (0 far, 1 near) and ``branch_prob`` that mass. Echo readings report branch
    0 (their only candidate) with probability 1, like the Kalman path. The innovation
    and NIS of an IR reading are taken against the predictive of the particles on its
    branch's side of the peak. ``loglik`` is the log predictive density of the reading
    under its model: per metre for echo readings, per volt for IR readings.
Re-acquisition
    Gated readings go to the re-acquisition buffer of the Kalman path (both IR
    candidates; an accepted reading empties it): when ``reacquire_count`` mutually
    consistent ones of one sensor (two of an IR and an echo ranger, ``reacquire_count //
    2 + 1`` of two units of one kind) fall inside ``reacquire_window_s``, the particles
    are drawn afresh around the line through them, in equal groups when two stories fit
    (decision *reacquired*, branch probability 1 / number of stories, as in the Kalman
    path).
Determinism
    Each direction has its own random stream (xoshiro256++, Blackman & Vigna 2021; normals
    by the ziggurat of Marsaglia & Tsang 2000) whose state lives in the estimator state,
    seeded from ``seed``: a run is reproducible, and
    feeding the same readings one `push` at a time or in `process` chunks gives the same
    numbers.

References
----------
N. J. Gordon, D. J. Salmond and A. F. M. Smith, "Novel approach to nonlinear/non-Gaussian
Bayesian state estimation", IEE Proceedings F 140(2), 107-113 (1993).
R. Douc and O. Cappé, "Comparison of resampling schemes for particle filtering", Proc.
4th Int. Symp. on Image and Signal Processing and Analysis, 64-69 (2005).
A. Kong, J. S. Liu and W. H. Wong, "Sequential imputations and Bayesian missing data
problems", J. Am. Stat. Assoc. 89(425), 278-288 (1994): the effective sample size.
S. Thrun, W. Burgard and D. Fox, *Probabilistic Robotics*, MIT Press (2005), §6.3.
Y. Bar-Shalom, X. R. Li and T. Kirubarajan, *Estimation with Applications to Tracking and
Navigation*, Wiley (2001): the white-acceleration model (§6.2), NIS gating (§5.4).
D. Blackman and S. Vigna, "Scrambled linear pseudorandom number generators", ACM Trans.
Math. Software 47(4), 36 (2021): xoshiro256++ and the splitmix64 seeder.
G. Marsaglia and W. W. Tsang, "The ziggurat method for generating random variables",
J. Statistical Software 5(8) (2000).
G. Marsaglia, "Generating a variable from the tail of the normal distribution",
Technometrics 6(1), 101-102 (1964).
"""
from __future__ import annotations

import math
from types import MappingProxyType

import numpy as np
from numba import njit

from ..errors import InputError
from ..fuser import Estimate, Fuser
from ..noise import MIN_SHORT_RANGE_M, BeamMixture, echo_mixture as default_mixture
from . import _kernels as K

__all__ = ["ParticleFuser", "particle_run", "new_state", "systematic_resample",
           "effective_sample_size", "default_mixture", "IR_OUTLIER_WEIGHT", "ROUGHENING",
           "GRID_POINTS"]

#: Weight of the uniform outlier component of the IR voltage likelihood.
IR_OUTLIER_WEIGHT = 0.02
#: Roughening constant ``K`` of Gordon et al. (1993).
ROUGHENING = 0.2
#: Points of the dense curve table each IR ranger's likelihood interpolates.
GRID_POINTS = 4096

# Decision codes and flags: the Kalman kernel's copies of fusion.decisions.
ACCEPTED, AMBIGUOUS, REACQUIRED = K.ACCEPTED, K.AMBIGUOUS, K.REACQUIRED
HELD, DROPOUT, CROSSTALK, GATED, LATE = K.HELD, K.DROPOUT, K.CROSSTALK, K.GATED, K.LATE
FLAG_CROSSTALK_SUSPECT, FLAG_R_INFLATED = K.FLAG_CROSSTALK_SUSPECT, K.FLAG_R_INFLATED
KIND_IR, KIND_ECHO = K.KIND_IR, K.KIND_ECHO
RB = K.RB

# Indices into the parameter vector (see `_params`).
P_Q, P_GATE, P_NEAR_PRIOR, P_AMB, P_REACQ_N, P_REACQ_W, P_MAX_LAG, P_INIT_RATE, \
    P_RESAMPLE, P_ROUGHEN, P_VMAX, P_MAX_LEAD = range(12)
N_PARAMS = 12

# Columns of the per-sensor model table (see `ParticleFuser._sensor_table`).
S_HOLD, S_OFFSET, S_SPLIT, S_VSIG, S_IR_OUT, S_VSPAN, S_DR, S_W_HIT, S_W_SHORT, S_W_MAX, \
    S_W_RAND, S_LAMBDA, S_ZMAX, S_WIDTH, S_BLANK, S_P_BLANK, S_DROP_SIGMA, S_GAIN = range(18)
N_SENS_COLS = 18

_U53 = 1.0 / 9007199254740992.0  # 2**-53: 53 random bits to a double in [0, 1)
_INV_SQRT_2PI = 1.0 / math.sqrt(2.0 * math.pi)
_INV_SQRT_2 = 1.0 / math.sqrt(2.0)
_SQRT1_2 = math.sqrt(0.5)
_MASK64 = (1 << 64) - 1
# Beyond 8 sigma from both ends of [0, z_max] the hit Gaussian's truncation mass differs
# from 1 by less than 1e-15: skip the two erfc calls there.
_TRUNC_SKIP = 8.0
# Smallest roughening spread, so copies of one particle still separate (metres, m/s).
_MIN_SPREAD = 1e-9
_LOG_TINY = math.log(np.finfo(float).tiny)


# ------------------------------------------------------------------------- random stream
def _splitmix64(x):
    x = (x + 0x9E3779B97F4A7C15) & _MASK64
    z = x
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & _MASK64
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & _MASK64
    return x, z ^ (z >> 31)


def _seed_streams(seed: int, n_dir: int) -> np.ndarray:
    """xoshiro256++ states, one independent stream per direction, from one seed."""
    out = np.zeros((n_dir, 4), np.uint64)
    for d in range(n_dir):
        x = (int(seed) * 0x632BE59BD9B4E019 + d * 0xD1B54A32D192ED03) & _MASK64
        for j in range(4):
            x, out[d, j] = _splitmix64(x)
    return out


def _ziggurat_tables(n=256, r=3.6541528853610088):
    """Layer tables of the ziggurat for the standard normal (Marsaglia & Tsang 2000).

    ``n`` strips of equal area ``v`` under ``f(x) = exp(-x^2/2)``: the base strip is the
    box ``[0, r] x [0, f(r)]`` plus the tail beyond ``r``, so ``v = r f(r) + int_r^inf f``
    and its equivalent width is ``x_0 = v / f(r)``; above it ``x_{i+1} = f^-1(f(x_i) +
    v / x_i)`` down to ``x_n = 0``. ``r`` is the value for 256 strips given there.
    """
    f = lambda x: math.exp(-0.5 * x * x)  # noqa: E731
    v = r * f(r) + math.sqrt(math.pi / 2.0) * math.erfc(r / math.sqrt(2.0))
    x = np.zeros(n + 1)
    x[0] = v / f(r)
    x[1] = r
    for i in range(1, n - 1):
        x[i + 1] = math.sqrt(-2.0 * math.log(f(x[i]) + v / x[i]))
    x[n] = 0.0
    k = np.array([int(math.ldexp(x[i + 1] / x[i], 53)) for i in range(n)], np.uint64)
    w = x[:n] * 2.0 ** -53
    fx = np.exp(-0.5 * x * x)
    return k, w, fx, r


# Global arrays are frozen into the compiled code as constants.
_ZK, _ZW, _ZF, _ZR = _ziggurat_tables()


@njit(cache=True, inline="always")
def _rotl(x, k):
    return (x << np.uint64(k)) | (x >> np.uint64(64 - k))


@njit(cache=True, inline="always")
def _xoshiro(s0, s1, s2, s3):
    """xoshiro256++ (Blackman & Vigna 2021): 64 random bits and the next state; every
    bit is usable (the ziggurat takes its strip index from the low bits)."""
    out = _rotl(s0 + s3, 23) + s0
    t = s1 << np.uint64(17)
    s2 ^= s0
    s3 ^= s1
    s1 ^= s2
    s0 ^= s3
    s2 ^= t
    s3 = _rotl(s3, 45)
    return out, s0, s1, s2, s3


@njit(cache=True, inline="always")
def _unit(u):
    return float(u >> np.uint64(11)) * _U53


@njit(cache=True, inline="always")
def _gauss(s0, s1, s2, s3):
    """One standard normal by the ziggurat (Marsaglia & Tsang 2000) and the new state.

    About 99 % of draws take one 64-bit word and one comparison; the rest fall in a
    wedge (accepted against the density) or the base strip's tail beyond ``r``, drawn
    by Marsaglia's (1964) exponential method.
    """
    while True:
        u, s0, s1, s2, s3 = _xoshiro(s0, s1, s2, s3)
        i = int(u & np.uint64(255))
        neg = (u >> np.uint64(8)) & np.uint64(1)
        j = u >> np.uint64(11)
        x = float(j) * _ZW[i]
        if j < _ZK[i]:
            return (-x if neg else x), s0, s1, s2, s3
        if i == 0:
            while True:
                a, s0, s1, s2, s3 = _xoshiro(s0, s1, s2, s3)
                b, s0, s1, s2, s3 = _xoshiro(s0, s1, s2, s3)
                xx = -math.log(1.0 - _unit(a)) / _ZR
                yy = -math.log(1.0 - _unit(b))
                if yy + yy > xx * xx:
                    break
            x = _ZR + xx
            return (-x if neg else x), s0, s1, s2, s3
        c, s0, s1, s2, s3 = _xoshiro(s0, s1, s2, s3)
        y = _ZF[i] + _unit(c) * (_ZF[i + 1] - _ZF[i])
        if y < math.exp(-0.5 * x * x):
            return (-x if neg else x), s0, s1, s2, s3


@njit(cache=True)
def _gauss_pair(s0, s1, s2, s3):
    """Two independent standard normals and the new stream state."""
    g0, s0, s1, s2, s3 = _gauss(s0, s1, s2, s3)
    g1, s0, s1, s2, s3 = _gauss(s0, s1, s2, s3)
    return g0, g1, s0, s1, s2, s3


@njit(cache=True)
def _uniform(RNG, d):
    a, s0, s1, s2, s3 = _xoshiro(RNG[d, 0], RNG[d, 1], RNG[d, 2], RNG[d, 3])
    RNG[d, 0] = s0
    RNG[d, 1] = s1
    RNG[d, 2] = s2
    RNG[d, 3] = s3
    return _unit(a)


@njit(cache=True)
def _normals(RNG, d, out):
    """Fill ``out`` with standard normals from direction ``d``'s stream (for tests)."""
    s0, s1, s2, s3 = RNG[d, 0], RNG[d, 1], RNG[d, 2], RNG[d, 3]
    n = out.shape[0]
    for k in range(0, n - 1, 2):
        g0, g1, s0, s1, s2, s3 = _gauss_pair(s0, s1, s2, s3)
        out[k] = g0
        out[k + 1] = g1
    if n % 2:
        g0, g1, s0, s1, s2, s3 = _gauss_pair(s0, s1, s2, s3)
        out[n - 1] = g0
    RNG[d, 0] = s0
    RNG[d, 1] = s1
    RNG[d, 2] = s2
    RNG[d, 3] = s3


# ------------------------------------------------------------------------- resampling
@njit(cache=True)
def _systematic(w, u0, idx):
    """Systematic resampling: ``idx[j]`` is the particle whose cumulative-weight interval
    holds ``(j + u0) / N`` of the total (one uniform ``u0`` in [0, 1) for all ``N``)."""
    n = w.shape[0]
    tot = 0.0
    for k in range(n):
        tot += w[k]
    step = tot / n
    c = w[0]
    k = 0
    for j in range(n):
        pos = (j + u0) * step
        while pos >= c and k < n - 1:
            k += 1
            c += w[k]
        idx[j] = k


def systematic_resample(weights, u0: float) -> np.ndarray:
    """Indices of the particles kept by systematic resampling.

    Parameters
    ----------
    weights : (N,) array_like
        Non-negative particle weights (need not be normalised).
    u0 : float
        The one uniform draw in [0, 1) that places all ``N`` pointers.

    Returns
    -------
    ndarray of int64, shape (N,)
        Sorted parent indices. Particle ``k`` is drawn ``floor(N w_k)`` or
        ``floor(N w_k) + 1`` times (``w`` normalised).

    References
    ----------
    Douc & Cappé (2005), "systematic resampling".
    """
    w = np.ascontiguousarray(weights, dtype=float)
    if w.ndim != 1 or w.size == 0:
        raise InputError("weights must be a non-empty 1-D array", field="weights")
    if not np.all(np.isfinite(w) & (w >= 0)) or w.sum() <= 0:
        raise InputError("weights must be finite, >= 0 and not all 0", field="weights")
    if not 0.0 <= float(u0) < 1.0:
        raise InputError(f"u0 must be in [0, 1), got {u0!r}", field="u0")
    idx = np.empty(w.size, np.int64)
    _systematic(w, float(u0), idx)
    return idx


@njit(cache=True)
def _ess(w):
    # Scaled by the largest weight: unnormalised weights times small likelihoods can be
    # so small that their squares underflow.
    m = 0.0
    for k in range(w.shape[0]):
        m = max(m, w[k])
    if not m > 0.0:
        return 0.0
    inv = 1.0 / m
    s = 0.0
    s2 = 0.0
    for k in range(w.shape[0]):
        x = w[k] * inv
        s += x
        s2 += x * x
    return s * s / s2


def effective_sample_size(weights) -> float:
    """``(sum w)^2 / sum w^2``: N for equal weights, 1 when one particle holds all.

    References
    ----------
    Kong, Liu & Wong (1994).
    """
    w = np.ascontiguousarray(weights, dtype=float)
    if w.ndim != 1 or not np.all(np.isfinite(w) & (w >= 0)):
        raise InputError("weights must be a 1-D array of finite values >= 0", field="weights")
    return float(_ess(w))


@njit(cache=True)
def _resample(d, split, R, V, W, RNG, CR, CV, IDX, rough):
    """Systematic resampling, then roughening: a Gaussian jitter of ``K E N^(-1/d)`` per
    component (Gordon et al. 1993, d = 2), ``E`` the spread of the resampled particles on
    the particle's own side of ``split`` (the direction's peak), so that the gap between
    the two near-zone branches does not blur the narrow near branch."""
    n = R.shape[1]
    _systematic(W[d], _uniform(RNG, d), IDX)
    ext = np.empty((2, 4))          # per side: range min, max, rate min, max
    for g in range(2):
        ext[g, 0] = math.inf
        ext[g, 1] = -math.inf
        ext[g, 2] = math.inf
        ext[g, 3] = -math.inf
    for j in range(n):
        r = R[d, IDX[j]]
        v = V[d, IDX[j]]
        CR[j] = r
        CV[j] = v
        g = 1 if r < split else 0
        ext[g, 0] = min(ext[g, 0], r)
        ext[g, 1] = max(ext[g, 1], r)
        ext[g, 2] = min(ext[g, 2], v)
        ext[g, 3] = max(ext[g, 3], v)
    scale = rough / math.sqrt(n)
    sr0 = scale * max(ext[0, 1] - ext[0, 0], _MIN_SPREAD)
    sv0 = scale * max(ext[0, 3] - ext[0, 2], _MIN_SPREAD)
    sr1 = scale * max(ext[1, 1] - ext[1, 0], _MIN_SPREAD)
    sv1 = scale * max(ext[1, 3] - ext[1, 2], _MIN_SPREAD)
    s0, s1, s2, s3 = RNG[d, 0], RNG[d, 1], RNG[d, 2], RNG[d, 3]
    wn = 1.0 / n
    for j in range(n):
        g0, g1, s0, s1, s2, s3 = _gauss_pair(s0, s1, s2, s3)
        r = CR[j]
        if r < split:
            R[d, j] = r + sr1 * g0
            V[d, j] = CV[j] + sv1 * g1
        else:
            R[d, j] = r + sr0 * g0
            V[d, j] = CV[j] + sv0 * g1
        W[d, j] = wn
    RNG[d, 0] = s0
    RNG[d, 1] = s1
    RNG[d, 2] = s2
    RNG[d, 3] = s3


# ------------------------------------------------------------------------- likelihoods
@njit(cache=True)
def _phi_diff(a, b):
    """Phi(b) - Phi(a) for a <= b, from the tail that keeps precision."""
    if a > 0.0:
        return 0.5 * (math.erfc(a * _SQRT1_2) - math.erfc(b * _SQRT1_2))
    if b < 0.0:
        return 0.5 * (math.erfc(-b * _SQRT1_2) - math.erfc(-a * _SQRT1_2))
    return 1.0 - 0.5 * (math.erfc(-a * _SQRT1_2) + math.erfc(b * _SQRT1_2))


@njit(cache=True, inline="always")
def _beam(z, r, inv_sig, w_hit, w_short, w_max, w_rand, lam, zmax, blank, p_blank,
          short_num, box, rand):
    """BeamMixture density of sensor-frame reading ``z`` (clipped to [0, zmax]) at
    sensor-frame range ``r``, as its hit part, its short and max parts, and its random
    part (Thrun et al. 2005, eq. 6.12, with `fusion.noise.BeamMixture`'s blanking).
    ``short_num`` is ``lam exp(-lam z)``, ``box`` the max-component density at ``z`` (0
    outside the box), ``rand`` ``1 / zmax``."""
    u = (z - r) * inv_sig
    hit = math.exp(-0.5 * u * u) * inv_sig * _INV_SQRT_2PI
    a = -r * inv_sig
    b = (zmax - r) * inv_sig
    if a > -_TRUNC_SKIP or b < _TRUNC_SKIP:
        zt = _phi_diff(a, b)
        hit = hit / zt if zt > 0.0 else 0.0
    rs = min(max(r, MIN_SHORT_RANGE_M), zmax)
    short = short_num / -math.expm1(-lam * rs) if z <= rs else 0.0
    pb = p_blank if r < blank else 0.0
    keep = 1.0 - pb
    return keep * w_hit * hit, keep * (w_short * short + w_max * box) + pb * box, \
        keep * w_rand * rand


@njit(cache=True)
def _beam_lik(z, r, sigma, mix, out):
    """Vectorised `_beam` for tests: ``out[k] = p(z | r[k])`` with sensor table row ``mix``."""
    zmax = mix[S_ZMAX]
    zc = min(max(z, 0.0), zmax)
    lam = mix[S_LAMBDA]
    box = 1.0 / mix[S_WIDTH] if zc >= zmax - mix[S_WIDTH] else 0.0
    for k in range(r.shape[0]):
        h, o, u = _beam(zc, r[k], 1.0 / sigma, mix[S_W_HIT], mix[S_W_SHORT], mix[S_W_MAX],
                        mix[S_W_RAND], lam, zmax, mix[S_BLANK], mix[S_P_BLANK],
                        lam * math.exp(-lam * zc), box, 1.0 / zmax)
        out[k] = h + o + u


@njit(cache=True)
def _lik_echo(d, z, sigma, row, xt, R, W, WN):
    """Weighted likelihoods ``WN = W p(z | particle)``, with the crosstalk density `xt`
    (0 for a reading no timing match marked) for the particles beyond the reading;
    returns (sum of the hit part, sum of the rest)."""
    zmax = row[S_ZMAX]
    off = row[S_OFFSET]
    lam = row[S_LAMBDA]
    width = row[S_WIDTH]
    zc = min(max(z - off, 0.0), zmax)
    box = 1.0 / width if zc >= zmax - width else 0.0
    short_num = lam * math.exp(-lam * zc)
    inv_sig = 1.0 / sigma
    w_hit = row[S_W_HIT]
    w_short = row[S_W_SHORT]
    w_max = row[S_W_MAX]
    w_rand = row[S_W_RAND]
    blank = row[S_BLANK]
    p_blank = row[S_P_BLANK]
    rand = 1.0 / zmax
    sh = 0.0
    so = 0.0
    for k in range(R.shape[1]):
        h, o, u = _beam(zc, R[d, k] - off, inv_sig, w_hit, w_short, w_max, w_rand, lam, zmax,
                        blank, p_blank, short_num, box, rand)
        if xt > 0.0:
            # the reading is another unit's sound if this unit's own echo came later
            o += xt * 0.5 * math.erfc((z - R[d, k]) * inv_sig * _INV_SQRT_2)
        w = W[d, k]
        sh += w * h
        so += w * o
        WN[k] = w * (h + o)
    return sh, so


@njit(cache=True)
def _lik_ir(d, volts, infl, row, grid, R, W, WN):
    """Weighted likelihoods of an IR voltage; returns (sum of the Gaussian part, sum of
    the outlier part)."""
    # the unit's noise and the reflectivity term of the decoder, at the reading's voltage
    sig = math.hypot(row[S_VSIG], row[S_GAIN] * volts) * math.sqrt(infl)
    eps = row[S_IR_OUT]
    a = (1.0 - eps) * _INV_SQRT_2PI / sig
    b = eps / row[S_VSPAN]
    h2 = 0.5 / (sig * sig)
    inv_dr = 1.0 / row[S_DR]
    off = row[S_OFFSET]
    g = grid.shape[0]
    last = g - 1.0
    v_first = grid[0]
    v_last = grid[g - 1]
    sg = 0.0
    sw = 0.0
    for k in range(R.shape[1]):
        x = (R[d, k] - off) * inv_dr
        if x <= 0.0:
            vm = v_first
        elif x >= last:
            vm = v_last
        else:
            j = int(x)
            f = x - j
            vm = grid[j] + f * (grid[j + 1] - grid[j])
        e = volts - vm
        p = a * math.exp(-e * e * h2)
        w = W[d, k]
        sg += w * p
        sw += w
        WN[k] = w * (p + b)
    return sg, sw * b


# ------------------------------------------------------------------------- moments
@njit(cache=True)
def _predict(d, dt, q, split, R, V, W, RNG, pri):
    """Move the particles by ``dt``; ``pri`` gets the predictive moments of range (total
    weight, mean, variance) of all particles, of those below ``split`` and of the rest."""
    n = R.shape[1]
    ref = R[d, 0] + dt * V[d, 0]
    a0 = 0.0
    a1 = 0.0
    a2 = 0.0
    b0 = 0.0
    b1 = 0.0
    b2 = 0.0
    if dt > 0.0:
        # Cholesky factor of q [[dt^3/3, dt^2/2], [dt^2/2, dt]].
        l00 = math.sqrt(q * dt ** 3 / 3.0)
        l10 = math.sqrt(q * dt) * (0.5 * math.sqrt(3.0))
        l11 = math.sqrt(q * dt) * 0.5
        s0, s1, s2, s3 = RNG[d, 0], RNG[d, 1], RNG[d, 2], RNG[d, 3]
        for k in range(n):
            g0, g1, s0, s1, s2, s3 = _gauss_pair(s0, s1, s2, s3)
            v = V[d, k]
            r = R[d, k] + dt * v + l00 * g0
            V[d, k] = v + l10 * g0 + l11 * g1
            R[d, k] = r
            w = W[d, k]
            x = r - ref
            lo = 1.0 if r < split else 0.0
            wl = lo * w
            wh = w - wl
            a0 += wl
            a1 += wl * x
            a2 += wl * x * x
            b0 += wh
            b1 += wh * x
            b2 += wh * x * x
        RNG[d, 0] = s0
        RNG[d, 1] = s1
        RNG[d, 2] = s2
        RNG[d, 3] = s3
    else:
        for k in range(n):
            r = R[d, k]
            w = W[d, k]
            x = r - ref
            lo = 1.0 if r < split else 0.0
            wl = lo * w
            wh = w - wl
            a0 += wl
            a1 += wl * x
            a2 += wl * x * x
            b0 += wh
            b1 += wh * x
            b2 += wh * x * x
    _pack(a0 + b0, a1 + b1, a2 + b2, ref, pri, 0)
    _pack(a0, a1, a2, ref, pri, 3)
    _pack(b0, b1, b2, ref, pri, 6)


@njit(cache=True)
def _pack(sw, s1, s2, ref, out, at):
    out[at] = sw
    if sw > 0.0:
        m = s1 / sw
        out[at + 1] = ref + m
        out[at + 2] = max(s2 / sw - m * m, 0.0)
    else:
        out[at + 1] = math.nan
        out[at + 2] = math.nan


@njit(cache=True)
def _summary(d, split_s, split_d, R, V, W, MOM, out):
    """Posterior moments of direction ``d`` into ``MOM[d]``; returns the mass below
    ``split_s`` and below ``split_d`` in ``out[0]``, ``out[1]`` (weights normalised)."""
    n = R.shape[1]
    rr = R[d, 0]
    vr = V[d, 0]
    sw = 0.0
    s1 = 0.0
    s2 = 0.0
    t1 = 0.0
    t2 = 0.0
    c = 0.0
    ms = 0.0
    md = 0.0
    for k in range(n):
        w = W[d, k]
        r = R[d, k]
        x = r - rr
        y = V[d, k] - vr
        sw += w
        s1 += w * x
        s2 += w * x * x
        t1 += w * y
        t2 += w * y * y
        c += w * x * y
        ms += w if r < split_s else 0.0
        md += w if r < split_d else 0.0
    mx = s1 / sw
    my = t1 / sw
    MOM[d, 0] = rr + mx
    MOM[d, 1] = vr + my
    MOM[d, 2] = max(s2 / sw - mx * mx, 0.0)
    MOM[d, 3] = c / sw - mx * my
    MOM[d, 4] = max(t2 / sw - my * my, 0.0)
    out[0] = ms / sw
    out[1] = md / sw


@njit(cache=True)
def _modes(d, p_lo, has_split, amb, NH, PMAJ):
    """n_hyp and p_major from the mass below the direction's peak (see module notes)."""
    if not has_split:
        NH[d] = 1
        PMAJ[d] = 1.0
        return
    pm = max(p_lo, 1.0 - p_lo)
    PMAJ[d] = pm
    NH[d] = 2 if 1.0 - pm > 1.0 - amb else 1


@njit(cache=True)
def _commit(d, W, WN, tot):
    inv = 1.0 / tot
    for k in range(W.shape[1]):
        W[d, k] = WN[k] * inv


@njit(cache=True)
def _fill(d, k0, k1, mr, sr, mv, sv, w, R, V, W, RNG):
    """Particles ``k0..k1-1`` of direction ``d``: range N(mr, sr^2), rate N(mv, sv^2)."""
    s0, s1, s2, s3 = RNG[d, 0], RNG[d, 1], RNG[d, 2], RNG[d, 3]
    for k in range(k0, k1):
        g0, g1, s0, s1, s2, s3 = _gauss_pair(s0, s1, s2, s3)
        R[d, k] = mr + sr * g0
        V[d, k] = mv + sv * g1
        W[d, k] = w
    RNG[d, 0] = s0
    RNG[d, 1] = s1
    RNG[d, 2] = s2
    RNG[d, 3] = s3


@njit(cache=True)
def _init_particles(d, z, sg, near_prior, init_rate, R, V, W, RNG):
    """Draw a new track's particles from its first reading (both IR candidates, shared
    by the near prior, when there are two). Returns the number of candidates."""
    n = R.shape[1]
    has0 = not math.isnan(z[0])
    has1 = not math.isnan(z[1])
    if has0 and has1:
        # Half the particles on each side whatever the prior, so a small prior still
        # leaves the near branch enough particles to grow from; the weights carry it.
        h = n // 2
        _fill(d, 0, h, z[1], sg[1], 0.0, init_rate, near_prior / h, R, V, W, RNG)
        _fill(d, h, n, z[0], sg[0], 0.0, init_rate, (1.0 - near_prior) / (n - h), R, V, W, RNG)
        return 2
    c = 0 if has0 else 1
    _fill(d, 0, n, z[c], sg[c], 0.0, init_rate, 1.0 / n, R, V, W, RNG)
    return 1


@njit(cache=True)
def _group(npart, npass):
    return npart // npass


# ------------------------------------------------------------------------- the kernel
@njit(cache=True)
def particle_run(order, ev_t, ev_dir, ev_sensor, ev_z, ev_s, ev_code, ev_flags, ev_raw,
                 ev_volts, sens_kind, sens, grids, dir_split, par,
                 R, V, W, NH, T, MOM, PMAJ, RNG, RBT, RBZ, RBV, RBS, RBN, LAST_RAW, LAST_NEW_T,
                 T_SRC, LAST_T, AHEAD, LEAP, CLOCK_ODD,
                 o_code, o_flags, o_innov, o_nis, o_branch, o_bprob, o_loglik, o_track, o_pmaj,
                 o_nh, o_tt):
    """Run the particle estimator over events in the order `order`, in place.

    The arguments follow `fusion.estimators._kernels.kalman_run`: events are read at
    ``order[i]`` and outputs written at the same index. Added: ``ev_volts``, the decoded
    voltage of IR readings (NaN otherwise); ``sens``, the per-sensor model table (columns
    ``S_*``); ``grids``, the IR curves' voltages on an even range grid from 0 (a row per
    sensor); ``dir_split``, each direction's peak range (NaN: no IR ranger). The state
    arrays (see `new_state`) are updated in place, so a run continues chunk after chunk.
    """
    n = order.shape[0]
    npart = R.shape[1]
    q = par[P_Q]
    gate = par[P_GATE]
    near_prior = par[P_NEAR_PRIOR]
    amb = par[P_AMB]
    reacq_n = int(par[P_REACQ_N])
    reacq_w = par[P_REACQ_W]
    vmax = par[P_VMAX]
    max_lag = par[P_MAX_LAG]
    max_lead = par[P_MAX_LEAD]
    init_rate = par[P_INIT_RATE]
    ess_min = par[P_RESAMPLE] * npart
    rough = par[P_ROUGHEN]
    WN = np.empty(npart)
    CR = np.empty(npart)
    CV = np.empty(npart)
    IDX = np.empty(npart, np.int64)
    pri = np.empty(9)
    mass = np.empty(2)
    ra = np.empty((2, 4))
    for ii in range(n):
        i = order[ii]
        d = ev_dir[i]
        s = ev_sensor[i]
        t = ev_t[i]
        code = ev_code[i]
        flags = ev_flags[i]
        innov = math.nan
        nis = math.nan
        branch = -1
        bprob = math.nan
        ll = math.nan
        row = sens[s]
        is_ir = sens_kind[s] == KIND_IR
        split_s = row[S_SPLIT] if is_ir else -math.inf
        split_d = dir_split[d]
        has_split = not math.isnan(split_d)
        # Screening shared with the Kalman kernel: late readings, held samples.
        code, flags, infl = K._screen(code, flags, d, s, t, ev_raw[i], is_ir, row[S_HOLD],
                                      max_lag, NH, T, LAST_RAW, LAST_NEW_T,
                                      max_lead, T_SRC, LAST_T, AHEAD, LEAP, CLOCK_ODD)
        suspect = (flags & FLAG_CROSSTALK_SUSPECT) != 0
        if code == ACCEPTED:
            z = ev_z[i]
            sg = ev_s[i]
            if NH[d] == 0:
                if suspect:
                    code = CROSSTALK
                else:
                    nc = _init_particles(d, z, sg, near_prior, init_rate, R, V, W, RNG)
                    T[d] = t
                    _summary(d, split_s, split_d, R, V, W, MOM, mass)
                    _modes(d, mass[1], has_split, amb, NH, PMAJ)
                    if nc == 2:
                        code = AMBIGUOUS
                        branch = 0 if near_prior < 0.5 else 1
                        bprob = max(near_prior, 1.0 - near_prior)
                    else:
                        branch = 0 if math.isnan(z[1]) else 1
                        bprob = 1.0
            else:
                tt = t if t > T[d] else T[d]
                _predict(d, tt - T[d], q, split_s, R, V, W, RNG, pri)
                T[d] = tt
                # The gate on the particle predictive (Bar-Shalom et al. 2001, §5.4).
                best_nis = math.inf
                best_y = math.nan
                for c in range(2):
                    if math.isnan(z[c]):
                        continue
                    y = z[c] - pri[1]
                    e = y * y / (pri[2] + sg[c] * sg[c] * infl)
                    if e < best_nis:
                        best_nis = e
                        best_y = y
                # The predictive density is wanted for gated readings too (the tuner's
                # likelihood); a reading the outlier part explains better is gated as well.
                if is_ir:
                    ps, po = _lik_ir(d, ev_volts[i], infl, row, grids[s], R, W, WN)
                else:
                    ps, po = _lik_echo(d, z[0], sg[0] * math.sqrt(infl), row,
                                       K.XT_DENS if suspect else 0.0, R, W, WN)
                tot = ps + po
                ll = math.log(tot) if tot > 0.0 else _LOG_TINY
                gated = not (best_nis <= gate and ps > po)
                if gated:
                    code = CROSSTALK if suspect else GATED
                    innov = best_y
                    nis = best_nis
                    K._buffer_rejected(d, t, s, z, sg, RBT, RBZ, RBV, RBS, RBN)
                    npass = K._reacq_check(d, t, RBT, RBZ, RBV, RBS, RBN, reacq_n,
                                           reacq_w, vmax, init_rate, sens_kind, ra)
                    if npass > 0:
                        # one equal group of particles per consistent story, with the
                        # Kalman path's spread (line-fit variance times the count)
                        for k in range(npass):
                            k0 = (k * _group(npart, npass))
                            k1 = npart if k == npass - 1 else k0 + _group(npart, npass)
                            _fill(d, k0, k1, ra[k, 0], math.sqrt(ra[k, 2] * reacq_n),
                                  ra[k, 1], math.sqrt(ra[k, 3]), 1.0 / npart, R, V, W, RNG)
                        RBN[d] = 0
                        code = REACQUIRED
                        branch = 0
                        bprob = 1.0 / npass
                        _summary(d, split_s, split_d, R, V, W, MOM, mass)
                        _modes(d, mass[1], has_split, amb, NH, PMAJ)
                else:
                    ess = _ess(WN)
                    _commit(d, W, WN, tot)
                    _summary(d, split_s, split_d, R, V, W, MOM, mass)
                    _modes(d, mass[1], has_split, amb, NH, PMAJ)
                    # as in the Kalman path: an accepted reading says the track is not lost
                    RBN[d] = 0
                    if is_ir:
                        p_near = mass[0]
                        branch = 1 if p_near >= 0.5 else 0
                        if math.isnan(z[branch]):
                            branch = 1 - branch
                        bprob = p_near if branch == 1 else 1.0 - p_near
                        two = not (math.isnan(z[0]) or math.isnan(z[1]))
                        code = AMBIGUOUS if two and bprob < amb else ACCEPTED
                        # the predictive of the particles on the branch's side of the peak
                        at = 3 if branch == 1 else 6
                        if pri[at] > 0.0:
                            mb, vb = pri[at + 1], pri[at + 2]
                        else:
                            mb, vb = pri[1], pri[2]
                        innov = z[branch] - mb
                        nis = innov * innov / (vb + sg[branch] * sg[branch] * infl)
                    else:
                        branch = 0
                        bprob = 1.0
                        code = ACCEPTED
                        innov = best_y
                        nis = best_nis
                    if ess < ess_min:
                        _resample(d, split_d, R, V, W, RNG, CR, CV, IDX, rough)
        elif code == DROPOUT and not is_ir and NH[d] > 0 and t >= T[d] - max_lag:
            # "Nothing heard": the max-range component, likely inside the blanking zone.
            tt = t if t > T[d] else T[d]
            _predict(d, tt - T[d], q, split_s, R, V, W, RNG, pri)
            T[d] = tt
            ps, po = _lik_echo(d, row[S_ZMAX] + row[S_OFFSET], row[S_DROP_SIGMA], row, 0.0,
                               R, W, WN)
            tot = ps + po
            if tot > 0.0:
                ess = _ess(WN)
                _commit(d, W, WN, tot)
                _summary(d, split_s, split_d, R, V, W, MOM, mass)
                _modes(d, mass[1], has_split, amb, NH, PMAJ)
                if ess < ess_min:
                    _resample(d, split_d, R, V, W, RNG, CR, CV, IDX, rough)
        o_code[i] = code
        o_flags[i] = flags
        o_innov[i] = innov
        o_nis[i] = nis
        o_branch[i] = branch
        o_bprob[i] = bprob
        o_loglik[i] = ll
        if NH[d] > 0:
            for j in range(5):
                o_track[i, j] = MOM[d, j]
            o_pmaj[i] = PMAJ[d]
        else:
            for j in range(5):
                o_track[i, j] = math.nan
            o_pmaj[i] = math.nan
        o_nh[i] = NH[d]
        o_tt[i] = T[d]


def new_state(n_dir: int, n_sensor: int, n_particles: int, seed: int = 0) -> dict:
    """Fresh state arrays for `particle_run`.

    ``R``, ``V``, ``W``: range, rate and weight of each direction's particles; ``NH``: 0
    before the first reading, then the number of modes (1 or 2); ``T``: state time;
    ``MOM``: posterior range, rate, P00, P01, P11; ``PMAJ``: ``p_major``; ``RNG``: the
    random streams; the rest as in `fusion.estimators._kernels.new_state`.
    """
    st = {
        "R": np.zeros((n_dir, n_particles)), "V": np.zeros((n_dir, n_particles)),
        "W": np.full((n_dir, n_particles), 1.0 / n_particles),
        "NH": np.zeros(n_dir, np.int64), "T": np.full(n_dir, -np.inf),
        "MOM": np.full((n_dir, 5), np.nan), "PMAJ": np.full(n_dir, np.nan),
        "RNG": _seed_streams(seed, n_dir),
    }
    # The screening and re-acquisition buffers are the Kalman kernel's, shapes and all.
    kal = K.new_state(n_dir, n_sensor, 1)
    for key in ("RBT", "RBZ", "RBV", "RBS", "RBN", "LAST_RAW", "LAST_NEW_T", "T_SRC", "LAST_T",
                "AHEAD", "LEAP", "CLOCK_ODD"):
        st[key] = kal[key]
    return st


def _params(est, roughening) -> np.ndarray:
    from fusion._chi2 import chi2_ppf
    p = np.zeros(N_PARAMS)
    p[P_Q] = est.accel_psd
    p[P_GATE] = np.inf if est.gate_probability >= 1.0 else chi2_ppf(est.gate_probability, 1)
    p[P_NEAR_PRIOR] = est.near_prior
    p[P_AMB] = est.ambiguous_below
    p[P_REACQ_N] = est.reacquire_count
    p[P_REACQ_W] = est.reacquire_window_s
    p[P_MAX_LAG] = est.max_lag_s
    p[P_MAX_LEAD] = est.max_lead_s
    p[P_INIT_RATE] = est.init_rate_sigma_mps
    p[P_RESAMPLE] = est.resample_below
    p[P_ROUGHEN] = roughening
    p[P_VMAX] = est.max_rate_mps
    return p


class ParticleFuser(Fuser):
    """Fuse a rig's rangers with the particle estimator (``estimator.kind = "particle"``).

    Same interface and outputs as `fusion.Fuser`; see the module notes for the model,
    the decisions and what *multimodal* means here.

    Parameters
    ----------
    rig : fusion.Rig
        With ``estimator.kind == "particle"``; ``estimator.particles``,
        ``resample_below`` and ``seed`` set the filter.
    mixtures : mapping, optional
        Echo sensor name -> `fusion.noise.BeamMixture` in the sensor's own frame (its
        ``sigma_hit_m`` serves dropouts only). Default `default_mixture` of each sensor.
    ir_outlier_weight : float, optional
        Weight of the uniform component of the IR voltage likelihood, spread over
        ``[0, max(adc_vref, peak + 3 sigma)]`` volts.
    roughening : float, optional
        Roughening constant ``K`` (0 turns roughening off).
    grid_points : int, optional
        Points of each IR curve's dense table.

    Examples
    --------
    >>> import dataclasses
    >>> from fusion.rig import Rig
    >>> rig = Rig.load("datasets/cold-store-dock.rig.toml")          # doctest: +SKIP
    >>> est = dataclasses.replace(rig.estimator, kind="particle")    # doctest: +SKIP
    >>> rig = rig.replace(estimator=est)                              # doctest: +SKIP
    >>> est, dec = ParticleFuser(rig).push("echo_front", 0.0, 0.0029)  # doctest: +SKIP
    >>> dec.reason, round(est.range_m, 3), est.n_hypotheses           # doctest: +SKIP
    ('accepted', 0.501, 1)
    """

    estimator_kind = "particle"
    _kind_hint = ("ParticleFuser runs the particle estimator; use fusion.Fuser for "
                  "kind='kalman'")

    def __init__(self, rig, *, mixtures=None, ir_outlier_weight: float = IR_OUTLIER_WEIGHT,
                 roughening: float = ROUGHENING, grid_points: int = GRID_POINTS):
        super().__init__(rig)
        if not (isinstance(ir_outlier_weight, (int, float)) and 0.0 < ir_outlier_weight < 1.0):
            raise InputError(f"ir_outlier_weight must be in (0, 1), got {ir_outlier_weight!r}",
                             field="ir_outlier_weight")
        if not (isinstance(roughening, (int, float)) and math.isfinite(roughening)
                and roughening >= 0.0):
            raise InputError(f"roughening must be a number >= 0, got {roughening!r}",
                             field="roughening")
        mixtures = dict(mixtures or {})
        for name, m in mixtures.items():
            s = rig.sensors.get(name)
            if s is None or s.kind != "echo":
                raise InputError(f"mixtures names {name!r}, which is not an echo ranger of "
                                 "this rig", field="mixtures")
            if not isinstance(m, BeamMixture):
                raise InputError(f"mixtures[{name!r}] must be a BeamMixture, got "
                                 f"{type(m).__name__}", field="mixtures")
        sens = [rig.sensors[n] for n in self.sensor_names]
        self.mixtures = MappingProxyType({s.name: mixtures.get(s.name) or default_mixture(s)
                                          for s in sens if s.kind == "echo"})
        self._sens, self._grids = self._sensor_table(sens, ir_outlier_weight, grid_points)
        self._dir_split = np.full(len(self.directions), np.nan)
        for j, s in enumerate(sens):
            d = self._dir_of[j]
            if s.kind != "echo" and np.isnan(self._dir_split[d]):
                self._dir_split[d] = self._sens[j, S_SPLIT]
        self._ppar = _params(rig.estimator, float(roughening))
        self.state = new_state(len(self.directions), len(sens), rig.estimator.particles,
                               rig.estimator.seed)

    def _sensor_table(self, sens, ir_out, grid_points):
        tab = np.zeros((len(sens), N_SENS_COLS))
        grids = np.zeros((len(sens), grid_points))
        for j, s in enumerate(sens):
            tab[j, S_OFFSET] = s.offset_m
            if s.kind == "echo":
                m = self.mixtures[s.name]
                tab[j, S_SPLIT] = -np.inf
                tab[j, [S_W_HIT, S_W_SHORT, S_W_MAX, S_W_RAND]] = m.weights
                tab[j, S_LAMBDA] = m.lambda_short
                tab[j, S_ZMAX] = m.z_max_m
                tab[j, S_WIDTH] = m.max_width_m
                tab[j, S_BLANK] = m.blank_range_m
                tab[j, S_P_BLANK] = m.p_blank_dropout
                tab[j, S_DROP_SIGMA] = m.sigma_hit_m
            else:
                r, v = s.curve.grid(grid_points)
                grids[j] = v
                sv = s.total_volts_sigma
                tab[j, S_HOLD] = s.hold_s
                tab[j, S_SPLIT] = s.curve.peak_range_m + s.offset_m
                tab[j, S_VSIG] = sv
                tab[j, S_GAIN] = getattr(s, "gain_sigma", 0.0)
                tab[j, S_IR_OUT] = ir_out
                tab[j, S_VSPAN] = max(s.adc_vref, s.curve.peak_volts + 3.0 * sv)
                tab[j, S_DR] = r[1] - r[0]
        return tab, grids

    def _kernel(self, order, t, direction, sensor, z, sg, code, flags, raw, out, track):
        """Run `particle_run` over the events (the hook `fusion.Fuser` calls)."""
        volts = np.full(len(t), np.nan)
        for j, name in enumerate(self.sensor_names):
            if self._kind[j] == KIND_IR:
                m = sensor == j
                if m.any():
                    volts[m] = self.rig.sensors[name].to_volts(raw[m])
        st = self.state
        particle_run(order, t, direction, sensor, z, sg, code, flags, raw, volts,
                     self._kind, self._sens, self._grids, self._dir_split, self._ppar,
                     st["R"], st["V"], st["W"], st["NH"], st["T"], st["MOM"], st["PMAJ"],
                     st["RNG"], st["RBT"], st["RBZ"], st["RBV"], st["RBS"], st["RBN"], st["LAST_RAW"],
                     st["LAST_NEW_T"], st["T_SRC"], st["LAST_T"], st["AHEAD"],
                     st["LEAP"], st["CLOCK_ODD"], out["code"],
                     out["flags"], out["innov"], out["nis"],
                     out["branch"], out["bprob"], out["ll"], track, out["pmaj"], out["nh"],
                     out["tt"])

    def estimate(self, direction: str) -> Estimate:
        """The current estimate of one direction (NaN before its first reading)."""
        if direction not in self.directions:
            raise InputError(f"no direction {direction!r}; the rig has "
                             f"{', '.join(self.directions)}", field="direction")
        d = self.directions.index(direction)
        st = self.state
        nh = int(st["NH"][d])
        if nh == 0:
            return Estimate(math.nan, direction, math.nan, math.nan, math.nan, math.nan,
                            math.nan, 0)
        m = st["MOM"][d]
        return Estimate(float(st["T"][d]), direction, float(m[0]), float(math.sqrt(m[2])),
                        float(m[1]), float(math.sqrt(m[4])), float(st["PMAJ"][d]), nh)
