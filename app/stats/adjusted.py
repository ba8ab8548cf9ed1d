"""The adjusted trend: a departure-level logit of forced vs voluntary on year + age band + tenure band + sector.

Departures are collapsed to cells (year x bands x sector), so the fit is a grouped binomial GLM whose
coefficients equal the record-level logit's. The firm-clustered covariance is computed from firm x cell
counts: a firm's score is the sum over its cells of x_c (forced_gc - n_gc mu_c), so the records are never
needed. It equals statsmodels ``GLM(...).fit(cov_type='cluster', cov_kwds={'groups': firm})`` with its
default small-sample correction G/(G-1) * (N-1)/(N-K) (tests/test_stats_adjusted.py checks both against
statsmodels on the record-level data). Written by hand because statsmodels clusters observations, and a
cell here holds departures of several firms.

Bands are in completed years (the cell store keeps whole years): age <50, 50-59, 60-64, 65+ (left-closed);
tenure <3, 3-6, 7-10, >10 completed years (so a tenure of 10.5 years is in 7-10).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import statsmodels.api as sm
from scipy import sparse, stats

from app.stats.bootstrap import BootstrapResult, _assemble, bootstrap_trend
from app.stats.cells import Cells
from app.stats.design import Design
from app.stats.sampling import draw_replicates
from app.stats.statistics import coefficient_statistic

ADJUSTMENTS = ("age", "tenure", "sector")
AGE_BANDS = ("<50", "50-59", "60-64", "65+")
AGE_EDGES = (50, 60, 65)
TENURE_BANDS = ("<3", "3-6", "7-10", ">10")
TENURE_EDGES = (3, 7, 11)
Z95 = float(stats.norm.ppf(0.975))


class AdjustedError(ValueError):
    """The adjusted model cannot be fitted on these data; the message says why."""


def parse_adjust(text: str | Sequence[str] | None) -> tuple[str, ...]:
    """``age,tenure,sector`` (any subset, any order) -> the adjustments in canonical order."""
    parts = ([p.strip().lower() for p in text.split(",") if p.strip()] if isinstance(text, str)
             else [str(p).strip().lower() for p in (text or ())])
    bad = [p for p in parts if p not in ADJUSTMENTS]
    if bad:
        raise AdjustedError(f"The adjustments are {', '.join(ADJUSTMENTS)} (comma-separated); got {', '.join(bad)}.")
    return tuple(a for a in ADJUSTMENTS if a in parts)


def band(values: np.ndarray, edges: Sequence[int], labels: Sequence[str]) -> np.ndarray:
    """Band labels of completed-year values (NaN -> None); left-closed: ``edges[i]`` starts band i + 1."""
    values = np.asarray(values, dtype=float)
    idx = np.searchsorted(np.asarray(edges, dtype=float), np.floor(values), side="right")
    out = np.asarray(labels, dtype=object)[np.minimum(idx, len(labels) - 1)]
    out[np.isnan(values)] = None
    return out


@dataclass(frozen=True)
class AdjustedCells:
    """Departures collapsed to (year, age band, tenure band, sector) cells, and firm x cell counts."""

    cells: pd.DataFrame  # year, age_band, tenure_band, sector, forced, voluntary (unused keys are "")
    firm_forced: sparse.csr_matrix = field(repr=False)  # firms x cells
    firm_voluntary: sparse.csr_matrix = field(repr=False)
    firm_ids: np.ndarray = field(repr=False)
    adjust: tuple[str, ...]
    departures: int
    dropped: dict[str, int]  # departures left out for a missing adjusting field, per field (first missing)


def collapse(frame: pd.DataFrame, adjust: Sequence[str]) -> AdjustedCells:
    """Cells of the adjusted model from forced/voluntary rows (records or counted cells).

    ``frame`` has ``year``, ``category`` (forced or voluntary only), ``age``, ``tenure``, ``sector``,
    ``firm_id`` and optionally a ``departures`` weight. Rows missing an adjusting field are dropped and
    counted under the first missing field in the order age, tenure, sector.
    """
    adjust = parse_adjust(adjust)
    weight = (frame["departures"].to_numpy(dtype=np.int64) if "departures" in frame
              else np.ones(len(frame), dtype=np.int64))
    keep = np.ones(len(frame), dtype=bool)
    dropped: dict[str, int] = {}
    for name in adjust:
        missing = frame[name].isna().to_numpy() & keep
        dropped[name] = int(weight[missing].sum())
        keep &= ~missing
    rows = frame.loc[keep]
    w = weight[keep]
    age = (band(rows["age"].astype(float).to_numpy(), AGE_EDGES, AGE_BANDS) if "age" in adjust
           else np.full(len(rows), "", dtype=object))
    tenure = (band(rows["tenure"].astype(float).to_numpy(), TENURE_EDGES, TENURE_BANDS) if "tenure" in adjust
              else np.full(len(rows), "", dtype=object))
    sector = (rows["sector"].astype(str).to_numpy(dtype=object) if "sector" in adjust
              else np.full(len(rows), "", dtype=object))
    forced = (rows["category"] == "forced").to_numpy()
    keyed = pd.DataFrame({"year": rows["year"].to_numpy(dtype=np.int64), "age_band": age, "tenure_band": tenure,
                          "sector": sector, "forced": np.where(forced, w, 0), "voluntary": np.where(forced, 0, w)})
    keys = ["year", "age_band", "tenure_band", "sector"]
    cells = keyed.groupby(keys, sort=True)[["forced", "voluntary"]].sum().reset_index()
    index = pd.MultiIndex.from_frame(cells[keys])
    col = index.get_indexer(pd.MultiIndex.from_frame(keyed[keys]))
    firm_codes, firm_ids = pd.factorize(rows["firm_id"].astype(str).to_numpy(), sort=True)
    shape = (len(firm_ids), len(cells))
    ff = sparse.csr_matrix((keyed["forced"].to_numpy(), (firm_codes, col)), shape=shape)
    fv = sparse.csr_matrix((keyed["voluntary"].to_numpy(), (firm_codes, col)), shape=shape)
    ff.sum_duplicates()
    fv.sum_duplicates()
    return AdjustedCells(cells, ff, fv, np.asarray(firm_ids), adjust, int(w.sum()), dropped)


def design(cells: pd.DataFrame, adjust: Sequence[str]) -> tuple[np.ndarray, list[str]]:
    """Intercept, year (from the first year), and treatment dummies for each adjustment (first level = base)."""
    year0 = int(cells["year"].min())
    columns = [np.ones(len(cells)), (cells["year"] - year0).to_numpy(dtype=float)]
    names = ["const", "year"]
    order = {"age": ("age_band", AGE_BANDS), "tenure": ("tenure_band", TENURE_BANDS), "sector": ("sector", None)}
    for name in adjust:
        column, levels = order[name]
        present = [lv for lv in (levels or sorted(cells[column].unique())) if (cells[column] == lv).any()]
        for level in present[1:]:
            columns.append((cells[column] == level).to_numpy(dtype=float))
            names.append(f"{name}[{level}]")
    return np.column_stack(columns), names


@dataclass(frozen=True)
class AdjustedFit:
    adjust: tuple[str, ...]
    window: tuple[int, int]
    params: pd.Series
    cluster_cov: np.ndarray = field(repr=False)
    departures: int
    forced: int
    firms: int
    dropped: dict[str, int]

    @property
    def coef(self) -> float:
        return float(self.params["year"])

    @property
    def cluster_se(self) -> float:
        """Firm-clustered standard error of the log odds ratio per year."""
        return float(np.sqrt(self.cluster_cov[1, 1]))

    @property
    def odds_ratio(self) -> float:
        return float(np.exp(self.coef))

    @property
    def cluster_interval(self) -> tuple[float, float]:
        return (float(np.exp(self.coef - Z95 * self.cluster_se)), float(np.exp(self.coef + Z95 * self.cluster_se)))


def fit_adjusted(data: AdjustedCells, window: tuple[int, int]) -> AdjustedFit:
    """The grouped binomial GLM (statsmodels) and its firm-clustered covariance (by hand, from firm counts)."""
    cells = data.cells
    n = (cells["forced"] + cells["voluntary"]).to_numpy(dtype=float)
    if len(cells) == 0 or cells["year"].nunique() < 2:
        raise AdjustedError("The adjusted trend needs forced or voluntary departures in at least two years.")
    forced_total = int(cells["forced"].sum())
    if forced_total in (0, data.departures):
        raise AdjustedError("The adjusted trend needs both forced and voluntary departures.")
    x, names = design(cells, data.adjust)
    if np.linalg.matrix_rank(x) < x.shape[1]:
        raise AdjustedError("The adjustments cannot be told apart from the year in these data "
                            "(the design is singular); drop one with --adjust.")
    endog = np.column_stack([cells["forced"].to_numpy(dtype=float), cells["voluntary"].to_numpy(dtype=float)])
    result = sm.GLM(endog, x, family=sm.families.Binomial()).fit()
    beta = np.asarray(result.params, dtype=float)
    mu = 1.0 / (1.0 + np.exp(-(x @ beta)))
    bread = np.linalg.inv(x.T @ (x * (n * mu * (1 - mu))[:, None]))
    # each firm's score: sum over its cells of x_c (forced_gc - n_gc mu_c)
    scores = np.asarray(data.firm_forced @ x) - np.asarray((data.firm_forced + data.firm_voluntary) @ (x * mu[:, None]))
    groups, nobs, k = scores.shape[0], data.departures, x.shape[1]
    if groups < 2:
        raise AdjustedError("Firm-clustered standard errors need departures from at least two firms.")
    correction = groups / (groups - 1) * (nobs - 1) / (nobs - k)
    cov = correction * bread @ (scores.T @ scores) @ bread
    return AdjustedFit(data.adjust, window, pd.Series(beta, index=names), cov, data.departures, forced_total,
                       groups, dict(data.dropped))


@dataclass(frozen=True)
class MixShift:
    """How the age or tenure mix of departures differs between the first and second half of the window."""

    field: str
    bands: tuple[str, ...]
    first: tuple[int, int]
    second: tuple[int, int]
    first_shares: tuple[float, ...]
    second_shares: tuple[float, ...]
    p_value: float | None
    moved: bool
    sentence: str


def mix_by_year(frame: pd.DataFrame, name: str) -> pd.DataFrame:
    """Departures per year and band of ``name`` (age or tenure; rows with the field), years x bands."""
    edges, labels = (AGE_EDGES, AGE_BANDS) if name == "age" else (TENURE_EDGES, TENURE_BANDS)
    weight = frame["departures"].to_numpy(dtype=np.int64) if "departures" in frame else np.ones(len(frame), np.int64)
    bands = band(frame[name].astype(float).to_numpy(), edges, labels)
    known = np.array([b is not None for b in bands], dtype=bool)
    table = (pd.DataFrame({"year": frame["year"].to_numpy()[known], "band": bands[known], "n": weight[known]})
             .groupby(["year", "band"])["n"].sum().unstack(fill_value=0))
    return table.reindex(columns=list(labels), fill_value=0).astype(np.int64)


def mix_shift(table: pd.DataFrame, name: str, *, alpha: float = 0.05) -> MixShift:
    """Pearson chi-square test (scipy) of the band mix in the first vs second half of the window's years."""
    labels = tuple(str(c) for c in table.columns)
    years = sorted(int(y) for y in table.index)
    if len(years) < 2:
        return MixShift(name, labels, (0, 0), (0, 0), (), (), None, False,
                        f"The {name} mix cannot be compared: departures with a known {name} fall in one year only.")
    half = len(years) // 2
    first, second = years[:half], years[half:]
    a = table.loc[first].sum().to_numpy(dtype=float)
    b = table.loc[second].sum().to_numpy(dtype=float)
    both = np.vstack([a, b])
    used = both.sum(axis=0) > 0
    p = float(stats.chi2_contingency(both[:, used], correction=False)[1]) if used.sum() >= 2 else None
    sa, sb = tuple(float(v) for v in a / a.sum()), tuple(float(v) for v in b / b.sum())
    moved = p is not None and p < alpha
    spans = f"{first[0]}\u2013{first[-1]} and {second[0]}\u2013{second[-1]}"
    biggest = int(np.argmax(np.abs(np.array(sb) - np.array(sa))))
    detail = (f"the share {labels[biggest]} went from {sa[biggest]:.0%} to {sb[biggest]:.0%}")
    if moved:
        sentence = (f"The {name} mix of departures moved between {spans} ({detail}; chi-square p = {p:.3g}): "
                    "part of a trend in the raw share may be a change in who departs; read the adjusted trend.")
    else:
        sentence = (f"The {name} mix of departures did not clearly move between {spans} ({detail}"
                    + (f"; chi-square p = {p:.3g})." if p is not None else ")."))
    return MixShift(name, labels, (first[0], first[-1]), (second[0], second[-1]), sa, sb, p, moved, sentence)


def bootstrap_cells(data: AdjustedCells, window: tuple[int, int]) -> tuple[Cells, Design]:
    """The adjusted model as the bootstrap engine's ``Cells`` (firm x cell matrix: forced cells, then voluntary;
    ``groups`` also keeps ``age_band`` and ``tenure_band``, so :func:`design` of ``groups`` is the model's design)
    and ``Design`` (slope = the year column), so a firm resample is one count vector of the same cells."""
    x, names = design(data.cells, data.adjust)
    groups = pd.DataFrame({"year": data.cells["year"].to_numpy(dtype=np.int64),
                           "sector": data.cells["sector"].astype(str).to_numpy(),
                           "forced": data.cells["forced"].to_numpy(dtype=np.int64),
                           "voluntary": data.cells["voluntary"].to_numpy(dtype=np.int64),
                           # the bands ride along so the design can be rebuilt from the cells alone
                           "age_band": data.cells["age_band"].astype(str).to_numpy(),
                           "tenure_band": data.cells["tenure_band"].astype(str).to_numpy()})
    matrix = sparse.hstack([data.firm_forced, data.firm_voluntary], format="csr").astype(np.int64)
    cells = Cells(groups=groups, firm_ids=data.firm_ids, firm_matrix=matrix, window=window,
                  by_sector="sector" in data.adjust)
    return cells, Design(x, tuple(names), 1, float(data.cells["year"].min()))


def one_step_jackknife(data: AdjustedCells, fit: AdjustedFit) -> np.ndarray:
    """Leave-one-firm-out year slopes by one Newton step from the full fit: beta - H^-1 s_g.

    s_g is firm g's score (the same per-firm scores as the clustered covariance) and H the information
    X'WX at the estimate. Used only for the BCa acceleration, where it replaces thousands of refits (the
    exact jackknife took 11 s of a 15 s run at 100k departures and 5,000 firms); it is the infinitesimal
    jackknife of Efron & Tibshirani (1993) §21-22 in one-step form, and tests/test_stats_adjusted.py checks
    its acceleration against the exact leave-one-firm-out refits.
    """
    cells = data.cells
    x, _ = design(cells, data.adjust)
    beta = fit.params.to_numpy()
    n = (cells["forced"] + cells["voluntary"]).to_numpy(dtype=float)
    mu = 1.0 / (1.0 + np.exp(-(x @ beta)))
    bread = np.linalg.inv(x.T @ (x * (n * mu * (1 - mu))[:, None]))
    scores = np.asarray(data.firm_forced @ x) - np.asarray((data.firm_forced + data.firm_voluntary) @ (x * mu[:, None]))
    return np.asarray(fit.coef - scores @ bread[:, 1], dtype=float)


def bootstrap_adjusted(data: AdjustedCells, window: tuple[int, int], *, resamples: int, seed: int,
                       alpha: float = 0.05, workers: int | None = None, exact_jackknife: bool = False
                       ) -> BootstrapResult:
    """Firm bootstrap of the adjusted odds ratio per year: firms resampled with all their departures, each
    resample refitted by the batched IRLS (``app.stats.sampling.draw_replicates`` on the adjusted design);
    percentile, basic and BCa intervals, the BCa acceleration from the one-step leave-one-firm-out jackknife
    (``exact_jackknife``: refit every leave-one-firm-out case instead, as ``bootstrap_trend`` does)."""
    cells, dsg = bootstrap_cells(data, window)
    if exact_jackknife:
        return bootstrap_trend(cells, dsg, unit="firm", resamples=resamples, seed=seed, alpha=alpha,
                               workers=workers)
    fit = fit_adjusted(data, window)
    reps = draw_replicates(cells, dsg, unit="firm", resamples=resamples, seed=seed, coefficient=1, workers=workers)
    jk = (one_step_jackknife(data, fit), np.ones(len(data.firm_ids)))
    # the engine's own assembly of intervals, failures and Monte Carlo errors; no per-resample standard errors
    # are drawn here, so the studentized interval is n/a for this statistic
    statistic = coefficient_statistic(cells, dsg.matrix, 1, label=dsg.names[1])
    return _assemble(statistic, "firm", int(seed), alpha, (float(fit.coef), float("nan")), reps, jk, False)
