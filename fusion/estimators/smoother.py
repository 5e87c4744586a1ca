"""Rauch-Tung-Striebel fixed-interval smoothing of a Kalman run, for offline replay.

References
----------
H. E. Rauch, F. Tung, C. T. Striebel, "Maximum likelihood estimates of linear dynamic
systems", AIAA Journal 3(8), 1445-1450 (1965).
"""
from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["rts_smooth"]


@njit(cache=True)
def _rts_block(t, x, P, q, xs, Ps, t_next, xs_next, Ps_next, has_next):
    n = t.shape[0]
    for k in range(n - 1, -1, -1):
        if k == n - 1:
            if not has_next:
                xs[k, 0] = x[k, 0]
                xs[k, 1] = x[k, 1]
                for a in range(2):
                    for b in range(2):
                        Ps[k, a, b] = P[k, a, b]
                continue
            tn = t_next
            xn0 = xs_next[0]
            xn1 = xs_next[1]
            pn = Ps_next
        else:
            tn = t[k + 1]
            xn0 = xs[k + 1, 0]
            xn1 = xs[k + 1, 1]
            pn = Ps[k + 1]
        dt = tn - t[k]
        # predicted state and covariance, F = [[1, dt], [0, 1]]
        xp0 = x[k, 0] + dt * x[k, 1]
        xp1 = x[k, 1]
        p00, p01, p11 = P[k, 0, 0], P[k, 0, 1], P[k, 1, 1]
        a00 = p00 + 2 * dt * p01 + dt * dt * p11 + q * dt ** 3 / 3.0
        a01 = p01 + dt * p11 + q * dt * dt / 2.0
        a11 = p11 + q * dt
        det = a00 * a11 - a01 * a01
        # C = P F' ; G = C Pp^-1
        c00 = p00 + dt * p01
        c01 = p01
        c10 = p01 + dt * p11
        c11 = p11
        i00 = a11 / det
        i01 = -a01 / det
        i11 = a00 / det
        g00 = c00 * i00 + c01 * i01
        g01 = c00 * i01 + c01 * i11
        g10 = c10 * i00 + c11 * i01
        g11 = c10 * i01 + c11 * i11
        d0 = xn0 - xp0
        d1 = xn1 - xp1
        xs[k, 0] = x[k, 0] + g00 * d0 + g01 * d1
        xs[k, 1] = x[k, 1] + g10 * d0 + g11 * d1
        e00 = pn[0, 0] - a00
        e01 = pn[0, 1] - a01
        e11 = pn[1, 1] - a11
        # G E G'
        h00 = g00 * e00 + g01 * e01
        h01 = g00 * e01 + g01 * e11
        h10 = g10 * e00 + g11 * e01
        h11 = g10 * e01 + g11 * e11
        Ps[k, 0, 0] = p00 + h00 * g00 + h01 * g01
        Ps[k, 0, 1] = p01 + h00 * g10 + h01 * g11
        Ps[k, 1, 0] = Ps[k, 0, 1]
        Ps[k, 1, 1] = p11 + h10 * g10 + h11 * g11


def rts_smooth(t_s, x, P, accel_psd, nxt=None):
    """Smooth filtered states of the white-acceleration model backwards in time.

    Parameters
    ----------
    t_s : (n,) array
        Times of the filtered states (non-decreasing).
    x : (n, 2) array
        Filtered range and rate.
    P : (n, 2, 2) array
        Filtered covariances.
    accel_psd : float
        Process-noise spectral density q used by the filter (m^2/s^3).
    nxt : tuple, optional
        ``(t_next, xs_next, Ps_next)``: the smoothed state just after this block, to
        smooth a long run block by block from the end (flat memory).

    Returns
    -------
    xs, Ps : smoothed states and covariances, same shapes as `x` and `P`.

    References
    ----------
    Rauch, Tung & Striebel (1965).

    Examples
    --------
    >>> import numpy as np
    >>> t = np.arange(3.0); x = np.array([[0., 1.], [1., 1.], [2., 1.]])
    >>> P = np.tile(np.eye(2), (3, 1, 1))
    >>> xs, Ps = rts_smooth(t, x, P, 0.1)
    >>> bool(Ps[0, 0, 0] < P[0, 0, 0])
    True
    """
    t_s = np.ascontiguousarray(t_s, dtype=float)
    x = np.ascontiguousarray(x, dtype=float)
    P = np.ascontiguousarray(P, dtype=float)
    xs = np.empty_like(x)
    Ps = np.empty_like(P)
    if len(t_s) == 0:
        return xs, Ps
    if nxt is None:
        _rts_block(t_s, x, P, float(accel_psd), xs, Ps, 0.0, np.zeros(2), np.zeros((2, 2)), False)
    else:
        tn, xn, pn = nxt
        _rts_block(t_s, x, P, float(accel_psd), xs, Ps, float(tn), np.asarray(xn, float),
                   np.asarray(pn, float), True)
    return xs, Ps
