"""Universe import/derivation (app.intake.universe, app.store.universe) and rates over it (app.analysis.rates,
``helmshift universe`` and ``helmshift fit --measure rate``), on rosters built here by a fixed recipe.

Oracles: counts by hand from the recipe; statsmodels' Poisson GLM with log(firm-years) offset (tests/data/README.md
"Rates with an exposure offset"); statsmodels' exact Poisson interval (Garwood 1936).
"""

from __future__ import annotations

import json
import math
from datetime import date
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.stats.rates import confint_poisson

from app.analysis.inputs import load_input
from app.analysis.mapping_files import import_mapping_file
from app.analysis.rates import SHARE_VS_RATE, run_rates, universe_flags
from app.cli import main
from app.intake.ingest import NoValidRowsError, import_roster
from app.intake.readers import RosterFileError
from app.intake.universe import derive_universe, import_universe
from app.store import Store, StoreError

YEARS = range(2000, 2020)


def firms_in(year: int) -> int:
    """The growing universe: 200 firms in 2000, ten more each year (390 in 2019)."""
    return 200 + 10 * (year - 2000)


def recipe() -> dict[int, tuple[int, int]]:
    """Forced 2 per 100 firm-years every year (flat); voluntary 8 per 100 rising 5% a year."""
    return {y: (round(0.02 * firms_in(y)), round(0.08 * 1.05 ** (y - 2000) * firms_in(y))) for y in YEARS}


def roster_csv() -> bytes:
    lines = ["Firm ID,Fiscal Year,Exit Reason"]
    for y, (forced, voluntary) in recipe().items():
        reasons = ["Dismissed"] * forced + ["Retired"] * voluntary
        lines += [f"F{i:03d},{y},{r}" for i, r in enumerate(reasons)]
    lines.append("F399,2019,Still in post")  # a firm whose only row says the executive is still serving
    return ("\n".join(lines) + "\n").encode()


def spans_csv() -> bytes:
    lines = ["Company ID,First Year,Last Year"]
    for i in range(firms_in(2019)):
        first = 2000 if i < 200 else 2000 + (i - 200) // 10 + 1
        lines.append(f"F{i:03d},{first},2019")
    return ("\n".join(lines) + "\n").encode()


@pytest.fixture
def roster(store: Store) -> str:
    import_roster(store, roster_csv(), "recipe.csv", name="Recipe")
    import_mapping_file(store, b"code,category\nDismissed,forced\nRetired,voluntary\nStill in post,excluded\n",
                        roster="Recipe", name="recipe map")
    store.update_settings(store.get_roster("Recipe").id, mapping_name="recipe map")
    return "Recipe"


def test_span_file_gives_the_firm_years_of_the_recipe(store: Store, roster: str) -> None:
    report = import_universe(store, roster, spans_csv(), "index.csv")
    assert report.roles == {"firm_id": "Company ID", "first_year": "First Year", "last_year": "Last Year"}
    u = report.universe
    assert (u.shape, u.firms, u.source, u.approximate) == ("spans", 390, "file", False)
    assert u.firm_years == sum(firms_in(y) for y in YEARS)  # by hand: 20 years, 200..390 firms
    stored = store.universe_firm_years(u.id)
    assert stored.groupby("year").size().to_dict() == {y: firms_in(y) for y in YEARS}
    assert store.current_universe(store.get_roster(roster).id) == u


def test_firm_year_rows_with_bad_lines_are_reported_and_nothing_half_written(store: Store, roster: str) -> None:
    text = (b"firm,year\nA,2001\nA,2001\n,2002\nB,20x1\nB,1700\nC,FY2003\n")
    report = import_universe(store, roster, text, "fy.csv")
    assert (report.universe.shape, report.universe.firm_years, report.duplicates) == ("firm_years", 2, 1)
    assert [(r.line, r.reason) for r in report.rejected_rows] == [
        (4, "missing firm id (column 'firm' is empty)"), (5, "year '20x1' is not a whole number"),
        (6, f"year 1700 is outside 1900..{date.today().year + 1}")]
    assert [r.line for r in store.universe_rejected(report.universe.id)] == [4, 5, 6]
    before = store.universe_count()
    with pytest.raises(NoValidRowsError, match="line 2"):
        import_universe(store, roster, b"firm,year\nA,abc\n", "bad.csv")
    with pytest.raises(RosterFileError, match="fiscal-year column .* or first- and last-year"):
        import_universe(store, roster, b"firm,colour\nA,red\n", "bad.csv")
    with pytest.raises(RosterFileError, match="No column 'Nope'"):
        import_universe(store, roster, spans_csv(), "index.csv", roles={"year": "Nope"})
    assert store.universe_count() == before


def test_span_reversed_or_open_ended(store: Store, roster: str) -> None:
    report = import_universe(store, roster, b"id,from,to\nA,2005,2003\nB,2018,\n", "spans.csv")
    assert [r.reason for r in report.rejected_rows] == ["first year 2005 is after last year 2003"]
    # a blank last year runs to the roster's last year (2019): 2018 and 2019
    assert report.universe.firm_years == 2 and "roster's last year, 2019" in " ".join(report.messages)


def test_derived_universe_is_labelled_an_approximation(store: Store, roster: str) -> None:
    report = derive_universe(store, roster)
    u = report.universe
    assert u.approximate and u.source == "derived" and "approximation" in report.messages[0]
    # firm F000 has rows in every year, F399 only its still-in-post row in 2019 (by hand from the recipe)
    fy = store.universe_firm_years(u.id)
    assert fy.loc[fy["firm_id"] == "F000", "year"].tolist() == list(YEARS)
    assert fy.loc[fy["firm_id"] == "F399", "year"].tolist() == [2019]
    inp = load_input(store, roster, window=(2000, 2019))
    assert "approximation" in run_rates(store, inp).messages[0]


def test_done_when_flat_forced_rate_rising_voluntary_growing_universe(store: Store, roster: str) -> None:
    """Issue 16: a falling share, a forced rate ratio whose interval holds 1, and the sentence says so."""
    import_universe(store, roster, spans_csv(), "index.csv")
    inp = load_input(store, roster, window=(2000, 2019))
    a = run_rates(store, inp)
    assert a.error is None and a.forced is not None and a.voluntary is not None
    assert a.share_interval is not None and a.share_interval[1] < 1.0  # the share fell
    low, high = a.forced.conf_int["profile"]
    assert low < 1.0 < high and a.forced.conf_int["wald"][0] < 1.0 < a.forced.conf_int["wald"][1]
    assert a.voluntary.conf_int["profile"][0] > 1.0
    assert "the forced share fell because voluntary exits rose" in a.sentence  # type: ignore[operator]
    assert "while the forced rate was flat" in a.sentence  # type: ignore[operator]
    # the forced fit equals statsmodels on counts taken by hand from the recipe
    counts = recipe()
    y = np.array([counts[yr][0] for yr in YEARS], float)
    e = np.array([firms_in(yr) for yr in YEARS], float)
    ref = sm.GLM(y, sm.add_constant(np.array(YEARS, float) - 2009.5), family=sm.families.Poisson(),
                 offset=np.log(e)).fit()
    assert a.forced.log_rr == pytest.approx(ref.params[1], abs=1e-8)
    # the run records the universe and its fingerprint
    run = store.get_run(a.run_id)  # type: ignore[arg-type]
    assert run.params["model"] == "rate" and run.params["universe_fingerprint"] == a.universe.fingerprint
    assert a.flags.missing_count == 0 and a.flags.empty_years == ()
    assert run_rates(store, inp).run_id == a.run_id  # the same fit is not stored twice


def test_flags_name_missing_firms_and_years_without_rows(store: Store, roster: str) -> None:
    universe = "firm,year\n" + "\n".join(f"F{i:03d},{y}" for i in range(50) for y in range(2000, 2022)) + "\n"
    import_universe(store, roster, universe.encode(), "partial.csv")
    inp = load_input(store, roster, window=(2000, 2019))
    a = run_rates(store, inp)
    # by hand: the recipe's biggest year uses firms F000..F(forced+voluntary-1); F050 and up are missing
    used = max(f + v for f, v in recipe().values())
    assert a.flags.missing_count == used - 50 and a.flags.missing_firms[0] == "F050"
    assert a.table.outside > 0 and any("left out of the rates" in m for m in a.messages)
    assert a.flags.empty_years == ()  # 2020-2021 lie outside the window
    # over the whole universe, the roster has no rows in 2020 and 2021
    flags = universe_flags(inp.records, store.universe_firm_years(a.universe.id))
    assert flags.empty_years == (2020, 2021)
    assert any("2 universe year(s) have no roster rows" in m for m in flags.messages())


def test_rates_without_a_universe_say_how_to_get_one(store: Store, roster: str) -> None:
    with pytest.raises(StoreError, match="no universe of firm-years yet"):
        run_rates(store, load_input(store, roster))


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, Any, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, (json.loads(out) if "--json" in argv and code == 0 else out), err


def test_cli_universe_import_and_fit_measure_rate(capsys: pytest.CaptureFixture[str], store: Store, roster: str,
                                                  tmp_path: Path) -> None:
    db = store.url
    spans = tmp_path / "index.csv"
    spans.write_bytes(spans_csv())
    code, payload, err = run(capsys, "universe", "import", str(spans), "--roster", roster, "--db", db, "--json",
                             "--column", "first_year=First Year")
    assert code == 0, err
    assert (payload["firms"], payload["firm_years"], payload["years"], payload["rejected"]) == (
        390, sum(firms_in(y) for y in YEARS), [2000, 2019], 0)
    code, fit, err = run(capsys, "fit", "--roster", roster, "--measure", "rate", "--years", "2000-2019",
                         "--db", db, "--json")
    assert code == 0, err
    assert {"measure", "rate_ratio", "conf_int", "voluntary_rate_ratio", "firm_years", "years"} <= set(fit)
    assert fit["measure"] == "rate" and set(fit["conf_int"]) == {"wald", "profile"}
    assert fit["conf_int"]["profile"][0] < 1 < fit["conf_int"]["profile"][1]
    assert fit["firm_years"] == payload["firm_years"] and fit["caution"] == SHARE_VS_RATE
    first = fit["years"][0]
    lo, hi = confint_poisson(4, 200.0, method="exact-c")  # 2000: 4 forced in 200 firm-years (recipe)
    assert (first["year"], first["firm_years"], first["forced"]) == (2000, 200, 4)
    assert first["forced_rate_per_100"] == pytest.approx(2.0)
    assert first["interval"] == pytest.approx([100 * lo, 100 * hi], rel=1e-9)
    code, _, err = run(capsys, "universe", "import", str(spans), "--roster", roster, "--db", db,
                       "--column", "colour=Last Year")
    assert code != 0 and err.startswith("helmshift: --column takes ROLE=HEADER")
    code, _, err = run(capsys, "fit", "--roster", roster, "--measure", "rate", "--by", "sector", "--db", db)
    assert code != 0 and "straight Poisson trend only" in err
    code, derived, _ = run(capsys, "universe", "derive", "--roster", roster, "--db", db, "--json")
    assert code == 0 and derived["approximate"] is True and derived["universe"] == payload["universe"] + 1
    assert math.isfinite(fit["voluntary_rate_ratio"]) and fit["voluntary_rate_ratio"] > 1


def test_a_repeated_header_is_refused_by_the_shared_reader(store: Store, roster: str) -> None:
    with pytest.raises(RosterFileError, match="repeats column names: 'year'"):
        import_universe(store, roster, b"firm,year,year\nA,2001,x\n", "dup.csv")
    assert store.universe_count() == 0
