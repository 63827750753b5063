"""Chi-square quantiles for innovation gates, computed at generation time.

The generator must not depend on scipy (a test-only dependency) and its output must not change
with what is installed, so the quantile is computed here from the regularized lower incomplete
gamma function P(k/2, x/2) (series and continued fraction as in Press et al., Numerical Recipes,
2nd ed., 1992, section 6.2) and inverted by bisection to full double precision. The tests check
it against ``scipy.stats.chi2.ppf``.
"""

from __future__ import annotations

import math

__all__ = ["chi2_cdf", "chi2_ppf"]


def _gamma_p(a: float, x: float) -> float:
    """Regularized lower incomplete gamma P(a, x)."""
    if x <= 0.0:
        return 0.0
    lg = math.lgamma(a)
    if x < a + 1.0:
        # series: P = e^-x x^a / Gamma(a+1) * sum x^n / ((a+1)...(a+n))
        term = 1.0 / a
        total = term
        ap = a
        for _ in range(10000):
            ap += 1.0
            term *= x / ap
            total += term
            if abs(term) < abs(total) * 1e-17:
                break
        return total * math.exp(-x + a * math.log(x) - lg)
    # continued fraction for Q = 1 - P (modified Lentz)
    tiny = 1e-300
    b = x + 1.0 - a
    c = 1.0 / tiny
    d = 1.0 / b
    h = d
    for i in range(1, 10000):
        an = -i * (i - a)
        b += 2.0
        d = an * d + b
        if abs(d) < tiny:
            d = tiny
        c = b + an / c
        if abs(c) < tiny:
            c = tiny
        d = 1.0 / d
        delta = d * c
        h *= delta
        if abs(delta - 1.0) < 1e-17:
            break
    q = math.exp(-x + a * math.log(x) - lg) * h
    return 1.0 - q


def chi2_cdf(x: float, dof: int) -> float:
    """CDF of the chi-square distribution with ``dof`` degrees of freedom."""
    return _gamma_p(0.5 * dof, 0.5 * x)


def chi2_ppf(prob: float, dof: int) -> float:
    """Quantile: the x with chi2_cdf(x, dof) == prob, for 0 < prob < 1."""
    if not 0.0 < prob < 1.0:
        raise ValueError("probability must be strictly between 0 and 1")
    if dof < 1:
        raise ValueError("degrees of freedom must be >= 1")
    lo, hi = 0.0, max(1.0, float(dof))
    while chi2_cdf(hi, dof) < prob:
        hi *= 2.0
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if mid in (lo, hi):
            break
        if chi2_cdf(mid, dof) < prob:
            lo = mid
        else:
            hi = mid
    return 0.5 * (lo + hi)
