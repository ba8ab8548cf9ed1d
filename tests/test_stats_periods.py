"""Period comparison: pooled forced shares of two periods, their difference with Newcombe's hybrid score
interval, and the odds ratio between them with a profile-likelihood interval.

Sources: Newcombe (1998) Statistics in Medicine 17, 873-890, method 10 (tests/data/README.md); statsmodels
``confint_proportions_2indep(method='newcomb')``, ``Table2x2`` and a Binomial GLM with an offset on counts
that pandas takes from demo_data/roster.csv.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from conftest import copy_database, read_mapping
from scipy import stats
from statsmodels.stats.contingency_tables import Table2x2
from statsmodels.stats.proportion import confint_proportions_2indep

from app.cli import main
from app.stats.periods import PeriodError, compare_periods, default_periods, parse_periods

ROSTER = "Demo index (invented)"


def _counts(rows: dict[int, tuple[int, int]]) -> pd.DataFrame:
    return pd.DataFrame({"year": list(rows), "forced": [f for f, _ in rows.values()],
                         "total": [n for _, n in rows.values()]})


@pytest.mark.parametrize(("second", "first", "expected"), [
    ((56, 70), (48, 80), (0.0524, 0.3339)),  # Newcombe 1998 Table II example (a), method 10
    ((9, 10), (3, 10), (0.1705, 0.8090)),  # Newcombe 1998 example (b), method 10 (from memory)
])
def test_newcombe_published_examples(second: tuple[int, int], first: tuple[int, int],
                                     expected: tuple[float, float]) -> None:
    # the first period's counts in 2000-2001, the second's in 2003; 2002 has no departures
    counts = _counts({2000: first, 2001: (0, 0), 2003: second})
    result = compare_periods(counts, (2000, 2002), (2003, 2003))
    assert result.difference == pytest.approx(second[0] / second[1] - first[0] / first[1])
    assert result.conf_int == pytest.approx(expected, abs=5e-5)


def test_odds_ratio_between_periods_against_statsmodels() -> None:
    counts = _counts({2000: (48, 80), 2003: (56, 70)})
    result = compare_periods(counts, (2000, 2000), (2003, 2003))
    table = Table2x2(np.array([[56, 14], [48, 32]]))  # rows: second, first; columns: forced, voluntary
    assert result.odds_ratio == pytest.approx(table.oddsratio, rel=1e-9)
    low, high = result.odds_ratio_conf_int or (math.nan, math.nan)
    # profile likelihood: at each end the deviance of the model with the log odds ratio fixed (statsmodels
    # GLM with that value as an offset) exceeds the minimum by the chi-square(1) 95% quantile
    # (the first period split over two unequal rows keeps statsmodels off a perfect fit; with one share per
    # period the likelihood differs from the pooled one by a constant, so the profile is the same)
    endog = np.array([[20.0, 20.0], [28.0, 12.0], [56.0, 14.0]])
    indicator = np.array([0.0, 0.0, 1.0])
    full = sm.GLM(endog, sm.add_constant(indicator), family=sm.families.Binomial()).fit()
    for end in (low, high):
        fixed = sm.GLM(endog, np.ones((3, 1)), family=sm.families.Binomial(),
                       offset=math.log(end) * indicator).fit()
        assert fixed.deviance - full.deviance == pytest.approx(stats.chi2.ppf(0.95, 1), abs=1e-6)
    assert low < table.oddsratio < high


def test_default_is_last_third_against_the_rest() -> None:
    assert default_periods((1998, 2022)) == ((1998, 2014), (2015, 2022))  # 25 years: last 8 against 17
    assert default_periods((2001, 2003)) == ((2001, 2002), (2003, 2003))
    with pytest.raises(PeriodError, match="cannot be split"):
        default_periods((2001, 2001))


@pytest.mark.parametrize(("text", "message"), [
    ("1997-2009", "look like 1997-2009:2010-2022"),
    ("1997-2009:2010", "look like"),
    ("2009-1997:2010-2022", "starts (2009) after it ends (1997)"),
    ("1997-2010:2010-2022", "must end before the second"),
])
def test_bad_periods_say_what(text: str, message: str) -> None:
    counts = _counts({y: (5, 20) for y in range(1997, 2023)})
    with pytest.raises(PeriodError) as info:
        compare_periods(counts, *parse_periods(text))
    assert message in str(info.value)
    with pytest.raises(PeriodError, match="no forced or voluntary departures"):
        compare_periods(counts, (1900, 1910), (2000, 2001))


def test_cli_compare_on_the_demo(capsys: pytest.CaptureFixture[str], shared_demo_db: Path, tmp_path: Path,
                                 demo_clean: pd.DataFrame) -> None:
    db = str(copy_database(shared_demo_db, tmp_path / "cli.db"))
    code = main(["fit", "--roster", ROSTER, "--compare", "1997-2009:2010-2022", "--db", db, "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    import json

    periods: dict[str, Any] = json.loads(out)["periods"]
    cats = demo_clean["Exit Reason"].map(read_mapping("mapping-standard.csv"))
    counted = demo_clean.loc[cats.isin(["forced", "voluntary"])].assign(forced=cats == "forced")
    expected = {}
    for name, (a, b) in (("first", (1997, 2009)), ("second", (2010, 2022))):
        part = counted.loc[counted["year"].between(a, b)]
        expected[name] = (int(part["forced"].sum()), len(part))
        assert (periods[name]["forced"], periods[name]["total"]) == expected[name]
        assert periods[name]["years"] == [a, b]
    (f1, n1), (f2, n2) = expected["first"], expected["second"]
    assert periods["difference"] == pytest.approx(f2 / n2 - f1 / n1, rel=1e-12)
    oracle = confint_proportions_2indep(f2, n2, f1, n1, method="newcomb", compare="diff")
    assert periods["conf_int"] == pytest.approx([float(oracle[0]), float(oracle[1])], rel=1e-9)
    assert periods["odds_ratio"] == pytest.approx((f2 / (n2 - f2)) / (f1 / (n1 - f1)), rel=1e-9)
    code = main(["fit", "--roster", ROSTER, "--compare", "2009-1997:2010-2022", "--db", db])
    _, err = capsys.readouterr()
    assert code != 0 and "starts (2009) after it ends (1997)" in err


def test_trend_page_compares_the_last_third_by_default(client: Any) -> None:
    body = client.get("/api/rosters/1/trend").json()
    lo, hi = body["window"]
    first, second = default_periods((lo, hi))
    assert body["periods"]["first"]["years"] == list(first)
    assert body["periods"]["second"]["years"] == list(second)
    chosen = client.get("/api/rosters/1/trend", params={"first": "1995-2000", "second": "2001-2022"}).json()
    assert chosen["periods"]["first"]["years"] == [1995, 2000]
    overlapping = client.get("/api/rosters/1/trend", params={"first": "1995-2005", "second": "2001-2022"})
    assert overlapping.status_code == 200 and "must end before the second" in overlapping.json()["periods_error"]
    bad = client.get("/api/rosters/1/trend", params={"first": "soon", "second": "2001-2022"})
    assert bad.status_code == 400 and "like 1998-2014" in bad.json()["error"]
