"""Chi-square quantiles without scipy at start-up: the regularized incomplete gamma function, inverted by bisection.

The tracker needs a handful of quantiles (gates per degree of freedom, the median of its noise statistic) when it
starts; scipy.special or scipy.stats would cost a large part of the 0.5 s start-up budget for that. The lower
regularized gamma P(a, x) is evaluated by its power series for x < a + 1 and by the Lentz continued fraction of
the upper tail otherwise (the classic pair, as in Press et al., Numerical Recipes, section 6.2); tests compare
with scipy.stats.chi2.
"""

from __future__ import annotations

import math

_EPS = 1e-15
_TINY = 1e-300


def _gamma_series(a: float, x: float) -> float:
    """Return P(a, x) by its power series (accurate for x < a + 1)."""
    term = total = 1.0 / a
    ap = a
    for _ in range(10_000):
        ap += 1.0
        term *= x / ap
        total += term
        if abs(term) < abs(total) * _EPS:
            break
    return total * math.exp(-x + a * math.log(x) - math.lgamma(a))


def _gamma_fraction(a: float, x: float) -> float:
    """Return Q(a, x) = 1 - P(a, x) by the modified Lentz continued fraction (accurate for x >= a + 1)."""
    b = x + 1.0 - a
    c = 1.0 / _TINY
    d = 1.0 / b
    h = d
    for i in range(1, 10_000):
        an = -i * (i - a)
        b += 2.0
        d = an * d + b
        d = _TINY if abs(d) < _TINY else d
        c = b + an / c
        c = _TINY if abs(c) < _TINY else c
        d = 1.0 / d
        delta = d * c
        h *= delta
        if abs(delta - 1.0) < _EPS:
            break
    return math.exp(-x + a * math.log(x) - math.lgamma(a)) * h


def regularized_gamma_p(a: float, x: float) -> float:
    """Return P(a, x) = gamma(a, x) / Gamma(a), the lower regularized incomplete gamma function (a > 0, x >= 0)."""
    if x <= 0.0:
        return 0.0
    return _gamma_series(a, x) if x < a + 1.0 else 1.0 - _gamma_fraction(a, x)


def regularized_gamma_q(a: float, x: float) -> float:
    """Return Q(a, x) = 1 - P(a, x), computed without the cancellation of 1 - P in the far tail."""
    if x <= 0.0:
        return 1.0
    return 1.0 - _gamma_series(a, x) if x < a + 1.0 else _gamma_fraction(a, x)


def chi2_cdf(x: float, dof: float) -> float:
    """Return P(X <= x) for X chi-square with dof degrees of freedom."""
    return regularized_gamma_p(0.5 * dof, 0.5 * x)


def chi2_sf(x: float, dof: float) -> float:
    """Return P(X > x) for X chi-square with dof degrees of freedom."""
    return regularized_gamma_q(0.5 * dof, 0.5 * x)


def chi2_quantile(probability: float, dof: float) -> float:
    """Return x with P(X <= x) = probability for X chi-square with dof degrees of freedom (bisection to 1e-13).

    Above the median the upper tail is matched instead (1 - probability against chi2_sf), so gates at
    probabilities like 1 - 1e-9 keep their precision.
    """
    if not 0.0 < probability < 1.0:
        if probability == 0.0:
            return 0.0
        if probability == 1.0:
            return math.inf
        raise ValueError(f"probability must lie in [0, 1], got {probability!r}")
    upper = probability > 0.5
    target = 1.0 - probability if upper else probability

    def below(x):
        """True while x lies below the quantile."""
        return chi2_sf(x, dof) > target if upper else chi2_cdf(x, dof) < target

    lo, hi = 0.0, max(1.0, dof)
    while below(hi):
        hi *= 2.0
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if below(mid):
            lo = mid
        else:
            hi = mid
        if hi - lo <= 1e-13 * hi:
            break
    return 0.5 * (lo + hi)
