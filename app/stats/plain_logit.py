"""A grouped binomial logit and its profile-likelihood interval in plain Python (no numpy, scipy or statsmodels).

The straight trend and the spline bend test fit a handful of coefficients to one row per year (20-40
rows), where numpy buys nothing and its import (with scipy's) costs more than the whole first
``helmshift fit`` may take (issue 13). The algorithms are the engine's: IRLS from statsmodels' start
``mu = (y + 0.5) / 2`` with R's relative stopping rule (as :func:`app.stats.irls.fit_batch`), the covariance
at the final fitted shares (as :func:`app.stats.profile.fit_grouped_binomial`), the deviance in its
``log1p`` form, and the profile search of :func:`app.stats.profile.profile_interval` (damped Newton refits
of the other coefficients, the same bracket steps, Brent's root search with scipy's ``brentq`` tolerances).
tests/test_stats_plain.py checks the fits against statsmodels and the ends against an independent root
search. Anything unusual (separation, no convergence, a singular information matrix) returns None, and the
caller takes the statsmodels path, which explains it.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

__all__ = ["PlainFit", "brent_root", "deviance_near_far", "fit_logit", "profile_ends"]

Matrix = list[list[float]]
#: R's glm.control rule, as ``app.stats.profile.GLM_TOL``
TOL = 1e-10
MAX_ITER = 200
#: fitted shares this close to 0 or 1 mean separation (``app.stats.profile.SEPARATION_EPS``)
SEPARATION_EPS = 1e-8
BRACKET_STEPS = (0.5, 1.0, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 16.0, 24.0, 32.0, 64.0)
_NEWTON_MAXITER = 100
_EPS = 2.0**-52


@dataclass(frozen=True)
class PlainFit:
    """A converged, non-separated grouped logit fit (fields as :class:`app.stats.profile.GroupedFit`)."""

    params: list[float]
    bse: list[float]
    cov: Matrix
    deviance: float
    pearson_chi2: float
    df_resid: int
    llf: float
    mu: list[float]

    @property
    def dispersion(self) -> float:
        return self.pearson_chi2 / self.df_resid if self.df_resid > 0 else math.nan


def expit(x: float) -> float:
    if x >= 0.0:
        return 1.0 / (1.0 + math.exp(-x))
    e = math.exp(x)
    return e / (1.0 + e)


def _log1p_exp(x: float) -> float:
    """log(1 + e^x) without overflow (numpy's ``logaddexp(0, x)``)."""
    return max(x, 0.0) + math.log1p(math.exp(-abs(x)))


def _cholesky_solve(a: Matrix, rhs: Sequence[Sequence[float]]) -> Matrix | None:
    """Solve ``a X = rhs`` (columns of ``rhs``) for symmetric positive definite ``a``; None when it is not
    numerically so (the pivot test of ``app.stats.irls.solve_spd_stack``)."""
    k = len(a)
    scale = max(abs(a[i][i]) for i in range(k))
    if not scale > 0.0:
        return None
    low = [[0.0] * k for _ in range(k)]
    for i in range(k):
        for j in range(i + 1):
            value = a[i][j] - sum(low[i][m] * low[j][m] for m in range(j))
            if i == j:
                if not value > 1e-13 * scale:
                    return None
                low[i][i] = math.sqrt(value)
            else:
                low[i][j] = value / low[j][j]
    out: Matrix = []
    for column in rhs:
        y = [0.0] * k
        for i in range(k):
            y[i] = (column[i] - sum(low[i][m] * y[m] for m in range(i))) / low[i][i]
        x = [0.0] * k
        for i in reversed(range(k)):
            x[i] = (y[i] - sum(low[m][i] * x[m] for m in range(i + 1, k))) / low[i][i]
        out.append(x)
    return out


def _information(X: Matrix, weights: Sequence[float]) -> Matrix:
    k = len(X[0])
    return [[sum(w * row[i] * row[j] for row, w in zip(X, weights, strict=True)) for j in range(k)]
            for i in range(k)]


def _irls_deviance(forced: Sequence[float], totals: Sequence[float], mu: Sequence[float]) -> float:
    """Residual deviance in the ``log1p`` form of ``app.stats.irls.binomial_deviance`` (0 log 0 = 0)."""
    total = 0.0
    for f, n, p in zip(forced, totals, mu, strict=True):
        fitted = n * p
        other = n - fitted
        v = n - f
        if f > 0:
            total += f * math.log1p((f - fitted) / fitted)
        if v > 0:
            total += v * math.log1p((v - other) / other)
    return 2.0 * total


def fit_logit(forced: Sequence[float], totals: Sequence[float], X: Matrix) -> PlainFit | None:
    """Fit logit P(forced) = X b to grouped counts (every total positive); None unless it converges cleanly."""
    mu = [(f / n + 0.5) / 2.0 for f, n in zip(forced, totals, strict=True)]
    eta = [math.log(p / (1.0 - p)) for p in mu]
    dev = _irls_deviance(forced, totals, mu)
    beta: list[float] | None = None
    for _ in range(MAX_ITER):
        weights = [n * p * (1.0 - p) for n, p in zip(totals, mu, strict=True)]
        work = [w * e + (f - n * p) for w, e, f, n, p in zip(weights, eta, forced, totals, mu, strict=True)]
        xtwz = [sum(row[j] * z for row, z in zip(X, work, strict=True)) for j in range(len(X[0]))]
        solved = _cholesky_solve(_information(X, weights), [xtwz])
        if solved is None:
            return None
        beta = solved[0]
        eta = [sum(b * x for b, x in zip(beta, row, strict=True)) for row in X]
        mu = [expit(e) for e in eta]
        if any(p < SEPARATION_EPS or p > 1.0 - SEPARATION_EPS for p in mu):
            return None
        new = _irls_deviance(forced, totals, mu)
        if not (math.isfinite(new) and all(math.isfinite(b) for b in beta)):
            return None
        done = abs(new - dev) < TOL * (abs(new) + 0.1)
        dev = new
        if done:
            break
    else:
        return None
    assert beta is not None
    k = len(beta)
    cov = _cholesky_solve(_information(X, [n * p * (1.0 - p) for n, p in zip(totals, mu, strict=True)]),
                          [[float(i == j) for i in range(k)] for j in range(k)])
    if cov is None:
        return None
    pearson = sum((f - n * p) ** 2 / (n * p * (1.0 - p)) for f, n, p in zip(forced, totals, mu, strict=True))
    llf = sum(math.lgamma(n + 1.0) - math.lgamma(f + 1.0) - math.lgamma(n - f + 1.0) + f * math.log(p)
              + (n - f) * math.log1p(-p) for f, n, p in zip(forced, totals, mu, strict=True))
    return PlainFit(params=beta, bse=[math.sqrt(cov[i][i]) for i in range(k)], cov=cov, deviance=dev,
                    pearson_chi2=pearson, df_resid=len(forced) - k, llf=llf, mu=mu)


def deviance_near_far(forced: Sequence[float], totals: Sequence[float], eta: Sequence[float]) -> float:
    """Residual deviance at linear predictor ``eta`` as ``app.stats.profile._deviance`` takes it: the
    ``log1p`` form near the fit, ``f (log(f / n) - log p)`` in the tails a profile visits."""
    total = 0.0
    for f, n, e in zip(forced, totals, eta, strict=True):
        for count, share, log_share in ((f, expit(e), -_log1p_exp(-e)), (n - f, expit(-e), -_log1p_exp(e))):
            if count <= 0:
                continue
            fitted = n * share
            ratio = (count - fitted) / fitted if fitted > 0.0 else math.inf
            total += (count * math.log1p(ratio) if abs(ratio) < 0.5
                      else count * (math.log(count / n) - log_share))
    return 2.0 * total


def _refit(forced: Sequence[float], totals: Sequence[float], Z: Matrix, offset: Sequence[float],
           start: list[float]) -> tuple[float, list[float]]:
    """``app.stats.profile._refit_deviance``: the deviance minimised over Z's coefficients, ``offset`` fixed
    (damped Newton, step halving, then an uphill walk along the gradient where the Hessian underflows)."""
    def eta(b: Sequence[float]) -> list[float]:
        return [o + sum(c * z for c, z in zip(b, row, strict=True)) for o, row in zip(offset, Z, strict=True)]

    def value(b: Sequence[float]) -> float:
        return deviance_near_far(forced, totals, eta(b))

    beta = list(start)
    dev = value(beta)
    k = len(beta)
    if k == 0:
        return dev, beta
    for _ in range(_NEWTON_MAXITER):
        p = [expit(e) for e in eta(beta)]
        grad = [sum(row[j] * (f - n * q) for row, f, n, q in zip(Z, forced, totals, p, strict=True))
                for j in range(k)]
        solved = _cholesky_solve(_information(Z, [n * q * (1.0 - q) for n, q in zip(totals, p, strict=True)]),
                                 [grad])
        # a singular Hessian (numpy's lstsq would give its least-squares step): no Newton step, walk instead
        step = solved[0] if solved is not None else [0.0] * k
        trial, dev_trial, scale = beta, dev, 1.0
        while scale > 2.0**-150:
            candidate_beta = [b + scale * s for b, s in zip(beta, step, strict=True)]
            if (candidate := value(candidate_beta)) < dev:
                trial, dev_trial = candidate_beta, candidate
                break
            scale /= 2.0
        if dev_trial >= dev:
            norm = math.sqrt(sum(g * g for g in grad))
            if norm == 0.0 or not math.isfinite(norm):
                break
            radius = 1.0
            while radius < 1e12:
                candidate_beta = [b + radius * g / norm for b, g in zip(beta, grad, strict=True)]
                if (candidate := value(candidate_beta)) >= dev_trial:
                    break
                trial, dev_trial = candidate_beta, candidate
                radius *= 2.0
            if dev_trial >= dev:
                break
        stop = abs(dev_trial - dev) < TOL * (abs(dev_trial) + 0.1)
        beta, dev = trial, dev_trial
        if stop:
            break
    return dev, beta


def brent_root(f: Callable[[float], float], xa: float, xb: float, *, xtol: float = 1e-10,
               rtol: float = 4.0 * _EPS, maxiter: int = 100) -> float:
    """A root of ``f`` in [xa, xb] (signs must differ) by Brent's method, the algorithm and stopping rule of
    scipy's ``optimize.brentq`` (Brent 1973, as scipy's brentq.c writes it; recalled from memory and checked
    against ``brentq`` in tests/test_stats_plain.py)."""
    xpre, xcur = xa, xb
    fpre, fcur = f(xpre), f(xcur)
    if fpre == 0.0:
        return xpre
    if fcur == 0.0:
        return xcur
    if (fpre > 0.0) == (fcur > 0.0):
        raise ValueError("brent_root needs f(xa) and f(xb) of opposite signs.")
    xblk = fblk = spre = scur = 0.0
    for _ in range(maxiter):
        if fpre != 0.0 and fcur != 0.0 and (fpre > 0.0) != (fcur > 0.0):
            xblk, fblk = xpre, fpre
            spre = scur = xcur - xpre
        if abs(fblk) < abs(fcur):
            xpre, xcur, xblk = xcur, xblk, xcur
            fpre, fcur, fblk = fcur, fblk, fcur
        delta = (xtol + rtol * abs(xcur)) / 2.0
        sbis = (xblk - xcur) / 2.0
        if fcur == 0.0 or abs(sbis) < delta:
            return xcur
        if abs(spre) > delta and abs(fcur) < abs(fpre):
            if xpre == xblk:  # interpolate
                stry = -fcur * (xcur - xpre) / (fcur - fpre)
            else:  # extrapolate (inverse quadratic)
                dpre = (fpre - fcur) / (xpre - xcur)
                dblk = (fblk - fcur) / (xblk - xcur)
                stry = -fcur * (fblk * dblk - fpre * dpre) / (dblk * dpre * (fblk - fpre))
            if 2.0 * abs(stry) < min(abs(spre), 3.0 * abs(sbis) - delta):
                spre, scur = scur, stry
            else:
                spre = scur = sbis
        else:
            spre = scur = sbis
        xpre, fpre = xcur, fcur
        xcur += scur if abs(scur) > delta else (delta if sbis > 0 else -delta)
        fcur = f(xcur)
    raise ArithmeticError("Brent's root search did not converge.")


def profile_ends(forced: Sequence[float], totals: Sequence[float], X: Matrix, index: int, full: PlainFit,
                 cut: float, dispersion: float = 1.0) -> tuple[float, float, str | None]:
    """``app.stats.profile.profile_interval`` for coefficient ``index`` of ``full`` (a fit of X):
    {b : (D(b) - D_min) / dispersion <= cut}, an end the profile never reaches is -/+ inf with a note."""
    b_hat, se = full.params[index], full.bse[index]
    if not (math.isfinite(b_hat) and math.isfinite(se) and se > 0):
        return -math.inf, math.inf, "The coefficient could not be estimated, so no profile interval exists."
    others = [[v for j, v in enumerate(row) if j != index] for row in X]
    column = [row[index] for row in X]
    warm = [[v for j, v in enumerate(full.params) if j != index]]

    def excess(b: float) -> float:
        dev, beta = _refit(forced, totals, others, [b * c for c in column], warm[0])
        if all(math.isfinite(v) for v in beta):
            warm[0] = beta
        return (dev - full.deviance) / dispersion - cut

    ends: list[float] = []
    notes: list[str] = []
    for sign, side in ((-1.0, "lower"), (1.0, "upper")):
        inner, root = b_hat, None
        for k in BRACKET_STEPS:
            outer = b_hat + sign * k * se
            value = excess(outer)
            if math.isfinite(value) and value > 0:
                lo, hi = sorted((inner, outer))
                root = brent_root(excess, lo, hi)
                break
            if math.isfinite(value):
                inner = outer
        if root is None:
            ends.append(sign * math.inf)
            notes.append(f"The profile likelihood never falls far enough on the {side} side "
                         f"(the data cannot bound it), so the {side} end is open.")
        else:
            ends.append(root)
    return ends[0], ends[1], " ".join(notes) if notes else None
