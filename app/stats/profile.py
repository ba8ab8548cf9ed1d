"""Grouped binomial logit fits and profile-likelihood intervals for one coefficient.

Every model in Helmshift is a binomial GLM on grouped counts (forced out of departures per group).
``fit_grouped_binomial`` wraps statsmodels' GLM so that separation, non-convergence and overflow
warnings become user-facing messages instead of stray warnings; ``profile_interval`` inverts the
likelihood-ratio test for one coefficient.

statsmodels has no profile-likelihood interval for GLMs (only Wald ``conf_int``), which is why the
root-finding below is written by hand.

statsmodels is imported inside the functions: importing it costs over a second, and this module is
imported at CLI and server start-up.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.special import expit, xlog1py

from app.stats.irls import converged_relative

#: fitted probabilities closer than this to 0 or 1 mean the MLE sits at infinity (separation)
SEPARATION_EPS = 1e-8
#: IRLS stops when |deviance change| / (|deviance| + 0.1) is below this (R's ``glm.control`` rule,
#: passed to statsmodels as ``atol = 0.1 tol, rtol = tol``). statsmodels' own default is an absolute
#: change, which rounding noise alone exceeds at ten million departures (the fit then never
#: "converges"); IRLS converges quadratically, so the estimate is far more precise than the rule.
GLM_TOL = 1e-10
GLM_MAXITER = 200
#: the bracket search steps out this many Wald SEs before calling a side open
_NEWTON_MAXITER = 100
_BRACKET_STEPS = (0.5, 1.0, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 16.0, 24.0, 32.0, 64.0)


@dataclass(frozen=True)
class GroupedFit:
    """A fitted grouped binomial logit.

    Attributes
    ----------
    params, bse : numpy.ndarray
        Coefficients (logit scale) and their model-based (binomial, dispersion 1) standard errors.
    cov : numpy.ndarray
        Covariance of ``params`` with dispersion fixed at 1.
    deviance : float
        Residual deviance, 2 * sum of observed * log(observed / fitted) over both cells of each group.
    pearson_chi2 : float
        Pearson X^2 = sum (forced - n p)^2 / (n p (1 - p)).
    df_resid : int
        Groups with at least one departure minus the number of coefficients.
    llf : float
        Log-likelihood in statsmodels' convention, which *includes* the log binomial coefficient
        log C(n, forced) (e.g. beetle mortality: -18.7151, where Dobson & Barnett print -186.235
        without that term). Only differences of ``llf`` are meaningful across software.
    mu : numpy.ndarray
        Fitted probabilities per group.
    converged : bool
        IRLS met its tolerance.
    separated : bool
        Some fitted probability is within ``SEPARATION_EPS`` of 0 or 1 (or statsmodels flagged
        perfect separation): at least one coefficient is infinite and must not be reported.
    messages : tuple of str
        User-facing notes about warnings met while fitting.
    """

    params: np.ndarray
    bse: np.ndarray
    cov: np.ndarray
    deviance: float
    pearson_chi2: float
    df_resid: int
    llf: float
    mu: np.ndarray
    converged: bool
    separated: bool
    messages: tuple[str, ...]

    @property
    def dispersion(self) -> float:
        """Pearson dispersion X^2 / df_resid (NaN with no residual df).

        Computed by hand: statsmodels' ``fit(scale="X2")`` is wrong for a two-column response
        (REFERENCES.md, star98: 0.034 instead of 14.37).
        """
        return self.pearson_chi2 / self.df_resid if self.df_resid > 0 else math.nan


@dataclass(frozen=True)
class ProfileResult:
    """Profile-likelihood interval for one coefficient, on the coefficient's own (logit) scale.

    ``low`` / ``high`` are ``-inf`` / ``inf`` when the profile deviance never reaches the cut-off on
    that side (separation or a likelihood that flattens out); ``message`` then says so.
    """

    low: float
    high: float
    message: str | None


def _response(forced: np.ndarray, totals: np.ndarray) -> np.ndarray:
    # The two-column (successes, failures) response keeps statsmodels' llf in the usual
    # binomial convention; proportions with var_weights give the same estimates but another llf.
    return np.column_stack([forced, totals - forced]).astype(float)


def _check_counts(forced: np.ndarray, totals: np.ndarray, X: np.ndarray) -> None:
    if forced.shape != totals.shape or forced.ndim != 1:
        raise ValueError("forced and totals must be one-dimensional arrays of the same length.")
    if X.ndim != 2 or X.shape[0] != len(forced):
        raise ValueError("X must be a two-dimensional design matrix with one row per group.")
    if np.any(totals <= 0):
        raise ValueError("Every group needs at least one departure (totals > 0).")
    if np.any(forced < 0) or np.any(forced > totals):
        raise ValueError("Forced counts must lie between 0 and the group total.")


def _warning_messages(caught: list[warnings.WarningMessage]) -> tuple[list[str], bool, bool]:
    from statsmodels.tools.sm_exceptions import ConvergenceWarning, PerfectSeparationWarning

    notes: list[str] = []
    separated = False
    failed = False
    for w in caught:
        if issubclass(w.category, PerfectSeparationWarning):
            separated = True
        elif issubclass(w.category, ConvergenceWarning):
            failed = True
        elif issubclass(w.category, RuntimeWarning):
            notes.append("Numerical overflow occurred while fitting; the estimates may be unreliable.")
        else:
            notes.append(f"The fitting routine warned: {w.message}")
    return sorted(set(notes)), separated, failed


def _glm_fit(endog: np.ndarray, X: np.ndarray, offset: np.ndarray | None
             ) -> tuple[dict[str, Any], list[warnings.WarningMessage]]:
    # the GLM module itself, not statsmodels.api (which also loads formulas, time series and graphics: ~0.6 s
    # of CPU at start-up on the 2-core machine, issue 13)
    from statsmodels.genmod import families
    from statsmodels.genmod.generalized_linear_model import GLM

    # statsmodels computes results lazily, so every attribute we need is read inside the
    # catch block; otherwise an overflow in a late ``mu`` evaluation escapes as a stray warning.
    with warnings.catch_warnings(record=True) as caught, np.errstate(all="warn"):
        warnings.simplefilter("always")
        model = GLM(endog, X, family=families.Binomial(), offset=offset)
        res = model.fit(tol=GLM_TOL, atol=0.1 * GLM_TOL, rtol=GLM_TOL, maxiter=GLM_MAXITER)
        out: dict[str, Any] = {
            "params": np.asarray(res.params, dtype=float),
            "bse": np.asarray(res.bse, dtype=float),
            "cov": np.asarray(res.cov_params(), dtype=float),
            "deviance": float(res.deviance),
            "pearson_chi2": float(res.pearson_chi2),
            "df_resid": int(round(float(res.df_resid))),
            "llf": float(res.llf),
            "mu": np.asarray(res.mu, dtype=float),
            "converged": bool(res.converged),
        }
    return out, list(caught)


def _information_inverse(X: np.ndarray, totals: np.ndarray, mu: np.ndarray, fallback: np.ndarray
                         ) -> tuple[np.ndarray, np.ndarray]:
    """Covariance ``(X' W X)^-1`` with ``W = n mu (1 - mu)`` at the *final* fitted shares.

    statsmodels reports the covariance of its last weighted least-squares step, whose weights come
    from the shares one iteration earlier; under a relative stopping rule that step can still be
    1e-7 away from the MLE. Evaluating the Fisher information at the estimate itself gives the
    converged standard errors. Falls back to statsmodels' matrix when the information is singular.
    """
    info = (X * (totals * mu * (1.0 - mu))[:, None]).T @ X
    try:
        cov = np.linalg.inv(info)
    except np.linalg.LinAlgError:
        cov = fallback
    if not np.isfinite(cov).all():
        cov = fallback
    with np.errstate(invalid="ignore"):
        return cov, np.sqrt(np.diag(cov))


def fit_grouped_binomial(forced: np.ndarray, totals: np.ndarray, X: np.ndarray, *,
                         offset: np.ndarray | None = None) -> GroupedFit:
    """Fit logit P(forced) = X b (+ offset) to grouped counts by maximum likelihood (IRLS).

    Parameters
    ----------
    forced, totals : array_like of int, shape (n_groups,)
        Forced departures and all counted departures per group; every total must be positive.
    X : numpy.ndarray, shape (n_groups, n_params)
        Design matrix (include a constant column yourself if the model needs one).
    offset : numpy.ndarray, optional
        Known part of the linear predictor.

    Returns
    -------
    GroupedFit
        Warnings from statsmodels are caught and returned as ``messages``; nothing is raised for
        separation or non-convergence (check ``separated`` and ``converged``).
    """
    forced = np.asarray(forced, dtype=float)
    totals = np.asarray(totals, dtype=float)
    X = np.asarray(X, dtype=float)
    _check_counts(forced, totals, X)
    res, caught = _glm_fit(_response(forced, totals), X, offset)
    notes, flagged, failed = _warning_messages(caught)
    mu = res["mu"]
    extreme = bool(np.any((mu < SEPARATION_EPS) | (mu > 1 - SEPARATION_EPS)))
    separated = flagged or extreme
    converged = res["converged"] and not failed
    if separated:
        notes.insert(0, "Some groups are perfectly predicted (separation): at least one coefficient "
                        "is infinite, so its estimate and Wald interval are not meaningful.")
    if not converged:
        notes.insert(0, "The model fit did not converge; treat the estimates with caution.")
    cov, bse = _information_inverse(X, totals, mu, res["cov"])
    return GroupedFit(
        params=res["params"], bse=bse, cov=cov, deviance=res["deviance"],
        pearson_chi2=res["pearson_chi2"], df_resid=res["df_resid"], llf=res["llf"], mu=mu,
        converged=converged, separated=separated, messages=tuple(notes),
    )


def _deviance(forced: np.ndarray, totals: np.ndarray, eta: np.ndarray) -> float:
    """Residual deviance at linear predictor ``eta``, accurate at any number of departures.

    Near the fit each term ``f log(f / (n p))`` is taken as ``f log1p((f - n p) / (n p))``, which
    keeps the term's relative precision (the difference of a saturated and a fitted log-likelihood
    of 1e6 departures would lose ten digits); far from it (tails the profile visits) as
    ``f (log(f / n) - log p)`` with ``log p = -log(1 + e^-eta)``, which never overflows.
    """
    p = expit(eta)
    q = expit(-eta)
    total = 0.0
    for count, share, log_share in ((forced, p, -np.logaddexp(0.0, -eta)),
                                    (totals - forced, q, -np.logaddexp(0.0, eta))):
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            fitted = totals * share
            ratio = (count - fitted) / fitted
            near = np.abs(ratio) < 0.5
            far = count * (np.log(count / totals) - log_share)
            term = np.where(near, xlog1py(count, np.where(near, ratio, 0.0)), far)
        total += float(np.sum(np.where(count > 0, term, 0.0)))
    return 2.0 * total


def _refit_deviance(forced: np.ndarray, totals: np.ndarray, Z: np.ndarray, offset: np.ndarray,
                    start: np.ndarray) -> tuple[float, np.ndarray]:
    """Deviance minimised over the coefficients of ``Z`` with ``offset`` fixed.

    A damped Newton ascent written here rather than statsmodels' IRLS: with the large offsets a
    profile visits (tens of logits), statsmodels' IRLS can diverge to a huge deviance while still
    reporting convergence. The binomial log-likelihood is concave, so step-halving makes every
    step an improvement and the deviance converges (to its infimum when a nuisance coefficient
    runs off to infinity). Returns the deviance and the maximiser (a warm start for the next call).
    """
    beta = start.copy()
    dev = _deviance(forced, totals, offset + Z @ beta)
    if Z.shape[1] == 0:
        return dev, beta

    def value(b: np.ndarray) -> float:
        return _deviance(forced, totals, offset + Z @ b)

    for _ in range(_NEWTON_MAXITER):
        p = expit(offset + Z @ beta)
        grad = Z.T @ (forced - totals * p)
        hess = (Z * (totals * p * (1.0 - p))[:, None]).T @ Z
        step = np.linalg.lstsq(hess, grad, rcond=None)[0]
        # A near-singular Hessian (fitted p near 0 or 1) gives huge Newton steps; halving up to
        # 2^-150 turns them into a usable line search along the same direction.
        trial, dev_trial, scale = beta, dev, 1.0
        while scale > 2.0**-150:
            if (candidate := value(beta + scale * step)) < dev:
                trial, dev_trial = beta + scale * step, candidate
                break
            scale /= 2.0
        if dev_trial >= dev:
            norm = float(np.linalg.norm(grad))
            if norm == 0.0 or not math.isfinite(norm):
                break
            # Far out in the tails the Hessian underflows to exactly zero and Newton stalls; walk
            # uphill along the gradient with a step that doubles while it keeps improving.
            radius = 1.0
            while radius < 1e12 and (candidate := value(beta + radius * grad / norm)) < dev_trial:
                trial, dev_trial = beta + radius * grad / norm, candidate
                radius *= 2.0
            if dev_trial >= dev:
                break
        stop = bool(converged_relative(np.array(dev), np.array(dev_trial), GLM_TOL))
        beta, dev = trial, dev_trial
        if stop:
            break
    return dev, beta


def profile_interval(forced: np.ndarray, totals: np.ndarray, X: np.ndarray, index: int,
                     alpha: float = 0.05, *, offset: np.ndarray | None = None,
                     dispersion: float = 1.0) -> ProfileResult:
    """Profile-likelihood interval for coefficient ``index`` of a grouped binomial logit.

    The interval is {b : (D(b) - D_min) / dispersion <= chi2_{1, 1 - alpha}}, where D(b) is the
    deviance minimised over the other coefficients with b_index fixed at b (moved into the offset
    and the rest refitted). Each end is found by ``scipy.optimize.brentq`` (xtol 1e-10) after
    bracketing by stepping out in multiples of the Wald standard error.

    Parameters
    ----------
    forced, totals : array_like of int, shape (n_groups,)
    X : numpy.ndarray, shape (n_groups, n_params)
    index : int
        Column of ``X`` whose coefficient is profiled.
    alpha : float
        1 - confidence level.
    offset : numpy.ndarray, optional
        Known part of the linear predictor, kept throughout.
    dispersion : float
        Divide the deviance difference by this (quasi-binomial profile); 1 for the binomial model.

    Returns
    -------
    ProfileResult
        Bounds on the logit (coefficient) scale; an end the profile never reaches is +/- inf, with
        a message, never an invented number.
    """
    # lazy: scipy.stats costs ~0.6 s to import, kept off start-up
    from scipy import optimize, stats

    forced = np.asarray(forced, dtype=float)
    totals = np.asarray(totals, dtype=float)
    X = np.asarray(X, dtype=float)
    if not 0.0 < alpha < 1.0:
        raise ValueError("alpha must lie strictly between 0 and 1.")
    if not 0 <= index < X.shape[1]:
        raise ValueError(f"index must be between 0 and {X.shape[1] - 1}; got {index}.")
    if not (dispersion > 0 and math.isfinite(dispersion)):
        raise ValueError("dispersion must be a positive finite number.")
    off = np.zeros(len(forced)) if offset is None else np.asarray(offset, dtype=float)
    full = fit_grouped_binomial(forced, totals, X, offset=off)
    b_hat = float(full.params[index])
    se = float(full.bse[index])
    if not (math.isfinite(b_hat) and math.isfinite(se) and se > 0):
        return ProfileResult(-math.inf, math.inf, "The coefficient could not be estimated, so no "
                             "profile interval exists.")
    cut = float(stats.chi2.ppf(1.0 - alpha, 1))
    others = np.delete(X, index, axis=1)
    column = X[:, index]

    # Start each refit from the last one (or the full fit); the line search keeps this safe.
    warm = [np.delete(full.params, index)]

    def deviance_at(b: float) -> float:
        dev, beta = _refit_deviance(forced, totals, others, off + b * column, warm[0])
        if np.all(np.isfinite(beta)):
            warm[0] = beta
        return dev

    def excess(b: float) -> float:
        return (deviance_at(b) - full.deviance) / dispersion - cut

    ends: list[float] = []
    notes: list[str] = []
    for sign, side in ((-1.0, "lower"), (1.0, "upper")):
        inner = b_hat
        root = None
        for k in _BRACKET_STEPS:
            outer = b_hat + sign * k * se
            value = excess(outer)
            if math.isfinite(value) and value > 0:
                lo, hi = sorted((inner, outer))
                root = optimize.brentq(excess, lo, hi, xtol=1e-10, rtol=4 * np.finfo(float).eps)
                break
            if math.isfinite(value):
                inner = outer
        if root is None:
            ends.append(sign * math.inf)
            notes.append(f"The profile likelihood never falls far enough on the {side} side "
                         f"(the data cannot bound it), so the {side} end is open.")
        else:
            ends.append(float(root))
    return ProfileResult(ends[0], ends[1], " ".join(notes) if notes else None)
