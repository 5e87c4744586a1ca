"""Chi-square quantile and tail probability without importing `scipy.stats`.

The same special functions `scipy.stats.chi2` evaluates (``ppf = 2 gammaincinv(k/2, p)``,
``sf = chdtrc(k, x)``), so results are identical; importing `scipy.stats` would add about
20 MB to every process that only needs a gate threshold.
"""
from __future__ import annotations

from scipy import special


def chi2_ppf(p, dof):
    """Quantile: the x with P(chi2_dof <= x) = p."""
    return 2.0 * special.gammaincinv(dof / 2.0, p)


def chi2_sf(x, dof):
    """Upper tail probability P(chi2_dof > x)."""
    return special.chdtrc(dof, x)
