"""Normal, chi-squared and beta tail probabilities and quantiles in plain Python (no numpy or scipy).

The straight and spline trend (:mod:`app.stats.trend_line`) is computed without numpy so that the first
``helmshift fit`` of new counts starts in well under a second (issue 13: numpy and scipy.special alone
take ~0.5 s to import on the 2-core machine, scipy.stats over a second). What it needs is small: the
normal quantile (``statistics.NormalDist``, Wichura's AS 241, accurate to about 1e-16), the chi-squared
survival function at whole degrees of freedom (closed forms), and the beta quantile of the
Clopper-Pearson interval, which no standard-library function offers, hence :func:`beta_ppf` below.
tests/test_stats_plain.py checks every function against scipy.stats and statsmodels.
"""

from __future__ import annotations

import math
from statistics import NormalDist

__all__ = ["beta_cdf", "beta_ppf", "chi2_sf", "clopper_pearson", "normal_quantile", "normal_sf",
           "regularized_beta", "wilson"]

_STANDARD = NormalDist()
#: continued-fraction terms before :func:`regularized_beta` gives up (it needs about sqrt(a + b) terms)
_CF_TERMS = 100_000
_TINY = 1e-300


def normal_quantile(p: float) -> float:
    """Quantile of the standard normal distribution (``scipy.stats.norm.ppf``)."""
    return _STANDARD.inv_cdf(p)


def normal_sf(z: float) -> float:
    """Upper tail P(Z > z) of the standard normal, accurate in relative terms far into the tail."""
    return 0.5 * math.erfc(z / math.sqrt(2.0))


def chi2_sf(x: float, df: int) -> float:
    """Upper tail P(X > x) of the chi-squared distribution with a whole number of degrees of freedom.

    Closed forms (common practice; e.g. Abramowitz & Stegun 26.4.4-26.4.5): ``erfc(sqrt(x / 2))`` for 1 df,
    ``exp(-x / 2)`` for 2, and ``Q(k + 2) = Q(k) + (x / 2)^(k / 2) exp(-x / 2) / Gamma(k / 2 + 1)`` above.
    Every added term is positive, so the relative precision holds in the far tail too.
    """
    if df < 1:
        raise ValueError(f"df must be a whole number of at least 1; got {df!r}.")
    if not x > 0.0:
        return 1.0
    if math.isinf(x):
        return 0.0
    half = 0.5 * x
    k = 1 if df % 2 else 2
    total = math.erfc(math.sqrt(half)) if k == 1 else math.exp(-half)
    while k < df:
        total += math.exp(0.5 * k * math.log(half) - half - math.lgamma(0.5 * k + 1.0))
        k += 2
    return total


_HALF_LOG_2PI = 0.5 * math.log(2.0 * math.pi)


def _stirling_error(z: float) -> float:
    """``lgamma(z) - ((z - 0.5) log z - z + log(2 pi) / 2)``, by its asymptotic series above 15."""
    if z <= 15.0:
        return math.lgamma(z) - (z - 0.5) * math.log(z) + z - _HALF_LOG_2PI
    inv = 1.0 / z
    inv2 = inv * inv
    return inv * (1.0 / 12 - inv2 * (1.0 / 360 - inv2 * (1.0 / 1260 - inv2 * (1.0 / 1680 - inv2 / 1188))))


def _deviance_term(x: float, m: float) -> float:
    """``x log(x / m) + m - x`` without the cancellation near x = m (Loader's bd0: a series there)."""
    if abs(x - m) < 0.1 * (x + m):
        v = (x - m) / (x + m)
        total, term = (x - m) * v, 2.0 * x * v
        for j in range(1, 1000):
            term *= v * v
            following = total + term / (2 * j + 1)
            if following == total:
                return total
            total = following
        return total
    return x * math.log(x / m) + m - x


def _log_front(x: float, a: float, b: float) -> float:
    """``log(x^a (1 - x)^b / B(a, b))``, written as Loader's saddle-point form (as R's dbinom is): the plain
    ``a log x + b log(1 - x) - log B(a, b)`` loses ten digits to cancellation at a roster year's counts."""
    s = a + b
    return (-_deviance_term(a, s * x) - _deviance_term(b, s * (1.0 - x)) + 0.5 * math.log(a * b / s)
            - _HALF_LOG_2PI - _stirling_error(a) - _stirling_error(b) + _stirling_error(s))


def _beta_fraction(a: float, b: float, x: float) -> float:
    """The continued fraction of I_x(a, b) (DLMF 8.17.22), evaluated by the modified Lentz method."""
    c, d = 1.0, 1.0 - (a + b) * x / (a + 1.0)
    d = 1.0 / (d if abs(d) > _TINY else _TINY)
    value = d
    for m in range(1, _CF_TERMS):
        for numerator in (m * (b - m) * x / ((a + 2 * m - 1.0) * (a + 2 * m)),
                          -(a + m) * (a + b + m) * x / ((a + 2 * m) * (a + 2 * m + 1.0))):
            d = 1.0 + numerator * d
            d = 1.0 / (d if abs(d) > _TINY else _TINY)
            c = 1.0 + numerator / c
            c = c if abs(c) > _TINY else _TINY
            value *= c * d
        if abs(c * d - 1.0) < 1e-16:
            return value
    raise ArithmeticError(f"The incomplete beta function did not converge at a={a}, b={b}, x={x}.")


def regularized_beta(x: float, a: float, b: float) -> tuple[float, float]:
    """``(I_x(a, b), 1 - I_x(a, b))``, each computed directly, so either tail keeps its relative precision."""
    if x <= 0.0:
        return 0.0, 1.0
    if x >= 1.0:
        return 1.0, 0.0
    front = math.exp(_log_front(x, a, b))
    if x < (a + 1.0) / (a + b + 2.0):
        lower = front * _beta_fraction(a, b, x) / a
        return lower, 1.0 - lower
    upper = front * _beta_fraction(b, a, 1.0 - x) / b
    return 1.0 - upper, upper


def beta_cdf(x: float, a: float, b: float) -> float:
    """P(X <= x) for X ~ Beta(a, b) (``scipy.stats.beta.cdf``)."""
    return regularized_beta(x, a, b)[0]


def beta_ppf(q: float, a: float, b: float, *, upper: bool = False, start: float | None = None) -> float:
    """The x with P(X <= x) = q for X ~ Beta(a, b) (``scipy.stats.beta.ppf``); with ``upper``, the x with
    P(X > x) = q (``scipy.stats.beta.isf``).

    Newton's method on the tail probability, kept inside a bracket that bisection shrinks whenever a Newton
    step would leave it, until the step is below 1e-14 x: the answer is as precise as the tail
    probability itself (about 1e-13 relative for the counts of a roster year).
    """
    if not (0.0 < q < 1.0 and a > 0.0 and b > 0.0):
        raise ValueError("beta_ppf needs 0 < q < 1 and positive shape parameters.")
    lo, hi = 0.0, 1.0
    x = start if start is not None and 0.0 < start < 1.0 else a / (a + b)
    for _ in range(400):
        below, above = regularized_beta(x, a, b)
        excess = (above - q) if upper else (below - q)  # decreasing in x with ``upper``, increasing without
        if excess == 0.0:
            return x
        if (excess > 0.0) != upper:
            hi = x
        else:
            lo = x
        density = math.exp(_log_front(x, a, b)) / (x * (1.0 - x))
        new = x - excess / density * (-1.0 if upper else 1.0) if density > 0.0 else 0.5 * (lo + hi)
        if not lo < new < hi:  # also NaN: a step the bracket cannot hold is a bisection
            new = 0.5 * (lo + hi)
        # Newton converges quadratically: a step below 1e-14 x leaves an error far below that
        if abs(new - x) <= 1e-14 * x or hi - lo <= 4.0 * math.ulp(x):
            return new
        x = new
    raise ArithmeticError(f"The beta quantile did not converge at q={q}, a={a}, b={b}.")


def wilson(forced: int, total: int, alpha: float) -> tuple[float, float]:
    """Wilson score interval for forced / total, no continuity correction, clipped to [0, 1].

    Written as statsmodels' ``proportion_confint(method="wilson")`` writes it (centre and half-width over
    ``1 + z^2 / n``; common practice), so the two agree to the last few digits.
    """
    z = normal_quantile(1.0 - alpha / 2.0)
    share, z2 = forced / total, z * z
    denominator = 1.0 + z2 / total
    centre = (share + z2 / (2.0 * total)) / denominator
    half = z * math.sqrt(share * (1.0 - share) / total + z2 / (4.0 * total**2)) / denominator
    return min(max(centre - half, 0.0), 1.0), min(max(centre + half, 0.0), 1.0)


def clopper_pearson(forced: int, total: int, alpha: float) -> tuple[float, float]:
    """Clopper-Pearson (exact) interval: the alpha/2 quantile of Beta(x, n - x + 1) and the upper alpha/2
    quantile of Beta(x + 1, n - x) (common practice); exactly 0 at x = 0 and exactly 1 at x = n."""
    near = wilson(forced, total, alpha)  # within a few per cent of the exact bounds: Newton's start
    low = 0.0 if forced == 0 else beta_ppf(alpha / 2.0, forced, total - forced + 1.0, start=near[0])
    high = 1.0 if forced == total else beta_ppf(alpha / 2.0, forced + 1.0, total - forced, upper=True,
                                                start=near[1])
    return low, high
