"""Robustness readings carry the forced rate ratio and the adjusted odds ratio per year (issue 16), each
reading classifying a departure as its share does: code, then the mapping's rules, then its case overrides
(app.analysis.robustness_measures, app.analysis.robustness).

The roster, its universe of firm-years and its overrides are invented here by a seeded generator. Oracles, all
computed from the generated rows with pandas (never read back from the store), each reading's categories set by
hand (the code's category, then "a retirement below 60 counts as forced" written out as a pandas mask, then the
overrides):
- statsmodels' Poisson GLM of yearly forced departures inside the universe with log firm-years as offset
  (tests/data/README.md "Poisson trend with an exposure offset"), and its quasi-Poisson refit (``scale="X2"``)
  when the project reports a quasi-Poisson interval;
- statsmodels' record-level binomial GLM on year + age band + tenure band + sector with
  ``cov_type="cluster"`` by firm and its default small-sample correction (tests/data/README.md "Adjusted
  trend"; both entries list this file under "Robustness readings").
The bands are the issue's (age <50, 50-59, 60-64, 65+; tenure <3, 3-6, 7-10, >10 completed years), cut here by
hand with pandas.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from conftest import make_client
from scipy import stats

from app.analysis.adjusted import run_adjusted
from app.analysis.inputs import load_input
from app.analysis.overrides import add_override
from app.analysis.rates import run_rates
from app.analysis.robustness import Robustness, Variant, check_robustness
from app.analysis.robustness_report import robustness_to_dict
from app.analysis.rules import save_rules
from app.briefing.findings import robustness_finding
from app.cli import main
from app.intake.ingest import import_roster
from app.intake.universe import import_universe
from app.store import Store
from app.types import ClassificationRule

YEARS = list(range(2001, 2013))
WINDOW = (2001, 2012)
CATEGORIES = {"Dismissed": "forced", "Retired": "voluntary", "Resigned": "voluntary", "Still in post": "excluded"}
RULE = ClassificationRule("Retired", "age", "below", 60, "forced")
ALL = ("age", "tenure", "sector")


def roster_rows() -> pd.DataFrame:
    """Seeded invented departures: 60 firms in 3 sectors, 25-39 a year, ages 42-71 and tenures 0-16 years (one
    in twelve of each missing); older executives retire more, so the rule moves a fair share of records."""
    rng = np.random.default_rng(1616)
    rows = []
    for year in YEARS:
        for _ in range(int(rng.integers(25, 40))):
            firm = int(rng.integers(0, 60))
            age = round(float(rng.uniform(42, 71)), 1)
            reason = str(rng.choice(["Dismissed", "Retired", "Resigned"],
                                    p=[0.3, 0.5, 0.2] if age >= 58 else [0.45, 0.25, 0.3]))
            rows.append({"firm_id": f"F{firm:02d}", "year": year, "reason": reason,
                         "age": None if rng.random() < 1 / 12 else age,
                         "tenure": None if rng.random() < 1 / 12 else round(float(rng.uniform(0, 16)), 1),
                         "sector": ["Energy", "Retail", "Transport"][firm % 3]})
    rows.append({"firm_id": "F07", "year": 2006, "reason": "Still in post", "age": 50.0, "tenure": 4.0,
                 "sector": "Energy"})
    frame = pd.DataFrame(rows)
    frame["executive"] = [f"Exec {i}" for i in range(len(frame))]
    return frame


def universe_rows() -> pd.DataFrame:
    """F00..F49 in every year, F50..F54 from 2006 (a growing index); F55..F59 never."""
    pairs = [(f"F{i:02d}", y) for i in range(55) for y in YEARS if i < 50 or y >= 2006]
    return pd.DataFrame(pairs, columns=["firm_id", "year"])


def csv_bytes(frame: pd.DataFrame) -> bytes:
    return frame.to_csv(index=False).encode()


@pytest.fixture
def built(store: Store) -> dict[str, Any]:
    """Roster, universe, and a mapping whose newest version has the rule and two overrides."""
    rows = roster_rows()
    roster = import_roster(store, csv_bytes(rows[["firm_id", "year", "reason", "executive", "age", "tenure",
                                                   "sector"]]), "invented.csv", name="Invented").roster
    import_universe(store, roster.id, csv_bytes(universe_rows()), "index.csv")
    mapping = save_rules(store, store.save_mapping_version("rm map", CATEGORIES), (RULE,), note="academic rule")
    records = store.departures(roster.id)
    # an inside dismissal in 2004 counted voluntary; a retirement below 60 in 2010 (forced by the rule) counted
    # voluntary, the override winning over the rule; the still-in-post row counted forced
    chosen = {
        int(rows.index[(rows["year"] == 2004) & (rows["reason"] == "Dismissed") & (rows["firm_id"] < "F50")][0]):
            "voluntary",
        int(rows.index[(rows["year"] == 2010) & (rows["reason"] == "Retired") & (rows["age"] < 60)][0]): "voluntary",
        int(rows.index[rows["reason"] == "Still in post"][0]): "forced",
    }
    for row, category in chosen.items():
        departure = int(records.loc[records["executive"] == rows.at[row, "executive"], "id"].iloc[0])
        mapping = add_override(store, store.get_roster(roster.id), mapping, departure, category, "board minutes")
    return {"roster": roster.id, "rows": rows, "overrides": chosen}


def by_hand(rows: pd.DataFrame, categories: dict[str, str], *, rule: bool, overrides: dict[int, str]) -> pd.Series:
    """Each generated row's category under a reading: its code's, then (``rule``) a retirement below 60 counts as
    forced, then the overrides (which win)."""
    out = rows["reason"].map(categories).fillna("unmapped").astype(object)
    if rule:
        out[(rows["reason"] == "Retired") & rows["age"].notna() & (rows["age"] < 60)] = "forced"
    for row, category in overrides.items():
        out[row] = category
    return out


def reading_of(v: Variant, built: dict[str, Any]) -> pd.Series:
    """The hand categories of the readings check_robustness makes here (see ``readings``)."""
    rows, overrides = built["rows"], built["overrides"]
    if v.kind == "reference":
        return by_hand(rows, CATEGORIES, rule=True, overrides=overrides)
    if v.kind == "rules-off":
        return by_hand(rows, CATEGORIES, rule=False, overrides=overrides)
    if v.kind == "overrides-off":
        return by_hand(rows, CATEGORIES, rule=True, overrides={})
    assert v.kind == "moved", v.kind
    code, target = v.label.split(" as ")
    return by_hand(rows, CATEGORIES | {code: target}, rule=True, overrides=overrides)


def readings(store: Store, roster: int) -> Robustness:
    inp = load_input(store, roster, mapping="rm map", window=WINDOW)
    return check_robustness(store, inp, vary=["Resigned"], ambiguous_excluded=False, adjust=ALL)


def hand_rate(rows: pd.DataFrame, category: pd.Series) -> tuple[Any, list[int]]:
    """statsmodels' Poisson GLM of yearly forced departures inside the universe, offset log firm-years."""
    inside = rows.merge(universe_rows().assign(inside=True), on=["firm_id", "year"], how="left")["inside"].eq(True)
    forced = rows.loc[inside.to_numpy() & (category == "forced").to_numpy()].groupby("year").size() \
        .reindex(YEARS, fill_value=0)
    exposure = universe_rows().groupby("year").size().reindex(YEARS)
    X = sm.add_constant(np.array(YEARS, dtype=float) - 2006.5)
    model = sm.GLM(forced.to_numpy(dtype=float), X, family=sm.families.Poisson(),
                   offset=np.log(exposure.to_numpy(dtype=float)))
    return model, forced.tolist()


def hand_adjusted(rows: pd.DataFrame, category: pd.Series) -> tuple[Any, pd.DataFrame]:
    """statsmodels' record-level logit on year + bands + sector, SEs clustered by firm (default correction)."""
    data = rows.assign(category=category.to_numpy())
    data = data.loc[data["category"].isin(["forced", "voluntary"]) & data["year"].between(*WINDOW)]
    data = data.dropna(subset=["age", "tenure", "sector"]).copy()
    age = np.floor(data["age"].astype(float))
    tenure = np.floor(data["tenure"].astype(float))
    data["age_band"] = np.select([age < 50, age < 60, age < 65], ["a<50", "b50-59", "c60-64"], "d65+")
    data["tenure_band"] = np.select([tenure < 3, tenure < 7, tenure < 11], ["a<3", "b3-6", "c7-10"], "d>10")
    data["forced"] = (data["category"] == "forced").astype(float)
    data["t"] = data["year"] - data["year"].min()
    groups = pd.factorize(data["firm_id"])[0]
    fit = smf.glm("forced ~ t + C(age_band) + C(tenure_band) + C(sector)", data,
                  family=sm.families.Binomial()).fit(cov_type="cluster", cov_kwds={"groups": groups})
    return fit, data


def test_each_reading_measures_equal_statsmodels(store: Store, built: dict[str, Any]) -> None:
    rows = built["rows"]
    result = readings(store, built["roster"])
    kinds = [v.kind for v in result.variants]
    assert kinds[:3] == ["reference", "rules-off", "overrides-off"] and kinds.count("moved") == 2  # forced, excluded (app.types.CATEGORIES)
    for v in result.variants:
        category = reading_of(v, built)
        assert v.rate is not None and v.adjusted is not None
        model, forced = hand_rate(rows, category)
        assert v.rate.forced == sum(forced)  # forced departures inside the universe, counted with pandas
        poisson = model.fit(tol=1e-12)
        assert v.rate.error is None, v.label
        assert np.log(v.rate.rate_ratio) == pytest.approx(float(poisson.params[1]), abs=1e-8), v.label
        # Wald interval: Poisson, or quasi-Poisson (statsmodels' scale="X2") when the project refitted
        wald_fit = model.fit(tol=1e-12, scale="X2") if v.rate.quasi else poisson
        lo, hi = np.exp(wald_fit.conf_int()[1])
        assert v.rate.wald == pytest.approx((lo, hi), rel=1e-8), v.label
        assert v.rate.profile is not None and v.rate.profile[0] < v.rate.rate_ratio < v.rate.profile[1]
        assert v.rate.firm_years == len(universe_rows())

        logit, data = hand_adjusted(rows, category)
        assert v.adjusted.error is None, v.label
        assert np.log(v.adjusted.odds_ratio) == pytest.approx(float(logit.params["t"]), abs=1e-8), v.label
        assert v.adjusted.cluster_se == pytest.approx(float(logit.bse["t"]), abs=1e-6), v.label
        assert v.adjusted.departures == len(data) and v.adjusted.forced == int(data["forced"].sum())
        z = stats.norm.ppf(0.975)
        assert v.adjusted.cluster == pytest.approx(tuple(np.exp(logit.params["t"] + np.array([-z, z])
                                                                * logit.bse["t"])), rel=1e-6)


def test_a_rule_and_an_override_move_exactly_their_records(store: Store, built: dict[str, Any]) -> None:
    """Counted by hand: the rule makes every retirement below 60 forced (inside the window and universe), the
    overrides move their three records; the rate and the adjusted fit count the same records as the share."""
    rows, overrides = built["rows"], built["overrides"]
    result = readings(store, built["roster"])
    ref, rules_off, overrides_off = result.variants[:3]
    assert ref.rate is not None and rules_off.rate is not None and overrides_off.rate is not None
    inside = rows.merge(universe_rows().assign(inside=True), on=["firm_id", "year"], how="left")["inside"].eq(True)
    young_retired = (rows["reason"] == "Retired") & rows["age"].notna() & (rows["age"] < 60)
    overridden = rows.index.isin(list(overrides))
    # the rule alone (overrides kept in both readings): retirements below 60 not overridden, inside the universe
    moved_by_rule = int((young_retired & ~overridden & inside).sum())
    assert moved_by_rule > 10
    assert ref.rate.forced - rules_off.rate.forced == moved_by_rule
    assert ref.forced - rules_off.forced == int((young_retired & ~overridden).sum())  # the share: every firm
    # the overrides: an inside dismissal to voluntary (-1), a young retirement (forced by the rule) to voluntary
    # (-1 where inside the universe), the still-in-post row (excluded by its code) to forced (+1 where inside)
    still = rows.index[rows["reason"] == "Still in post"][0]
    expected = -1 - int(inside[list(overrides)[1]]) + int(inside[still])
    assert ref.rate.forced - overrides_off.rate.forced == expected
    assert ref.forced - overrides_off.forced == -1 - 1 + 1
    # the adjusted fit drops records missing age or tenure: its forced count is the hand count of complete rows
    complete = rows["age"].notna() & rows["tenure"].notna()
    category = by_hand(rows, CATEGORIES, rule=True, overrides=overrides)
    assert ref.adjusted is not None
    assert ref.adjusted.forced == int(((category == "forced") & complete).sum())
    assert sum(ref.adjusted.dropped.values()) == int((category.isin(["forced", "voluntary"]) & ~complete).sum())


def test_the_reference_reading_is_what_the_pages_fit(store: Store, built: dict[str, Any]) -> None:
    """The reference row's rate ratio and adjusted odds ratio are the Rates section's and the adjusted trend's."""
    inp = load_input(store, built["roster"], mapping="rm map", window=WINDOW)
    result = readings(store, built["roster"])
    ref = result.variants[0]
    rates = run_rates(store, inp, record=False)
    assert rates.forced is not None and ref.rate is not None
    assert ref.rate.rate_ratio == pytest.approx(rates.forced.rate_ratio, rel=1e-12)
    assert ref.rate.profile == pytest.approx(rates.forced.headline_interval(), rel=1e-10)
    adjusted = run_adjusted(store, inp, ALL).fit
    assert ref.adjusted is not None and ref.adjusted.odds_ratio == pytest.approx(adjusted.odds_ratio, rel=1e-12)
    universe = store.current_universe(built["roster"])
    assert universe is not None and result.universe_fingerprint == universe.fingerprint
    assert result.adjust == ALL and result.rate_holds is not None and result.adjusted_holds is not None
    assert "forced rate per firm-year" in result.rate_sentence
    assert "adjusted for age, tenure, sector" in result.adjusted_sentence


def test_without_a_universe_the_rate_says_why_and_the_adjusted_set_follows_the_roster(store: Store) -> None:
    rows = roster_rows()
    roster = import_roster(store, csv_bytes(rows[["firm_id", "year", "reason", "executive", "age", "sector"]]),
                           "no-tenure.csv", name="No tenure").roster
    store.save_mapping_version("plain", CATEGORIES)
    inp = load_input(store, roster.id, mapping="plain", window=WINDOW)
    result = check_robustness(store, inp, ambiguous_excluded=False)
    assert result.adjust == ("age", "sector")  # no tenure column: not adjusted for it
    ref = result.variants[0]
    assert ref.rate is not None and ref.rate.rate_ratio is None and "no universe" in (ref.rate.error or "")
    assert result.rate_holds is None and "could not be fitted" in result.rate_sentence
    assert ref.adjusted is not None and ref.adjusted.odds_ratio is not None
    # adjusting for a field with no values leaves nothing to fit, and the row says why
    bare = check_robustness(store, inp, ambiguous_excluded=False, adjust="tenure").variants[0]
    assert bare.adjusted is not None and bare.adjusted.odds_ratio is None
    assert "left out for a missing tenure" in (bare.adjusted.error or "")


def test_page_json_cli_and_finding_show_the_measures(store: Store, built: dict[str, Any],
                                                     capsys: pytest.CaptureFixture[str]) -> None:
    roster = built["roster"]
    store.update_settings(roster, mapping_name="rm map", window=WINDOW)
    result = readings(store, roster)
    ref = result.variants[0]
    assert ref.rate is not None and ref.adjusted is not None and ref.rate.rate_ratio and ref.adjusted.odds_ratio
    client = make_client(store)
    query = "vary=Resigned&measures=1&adjusting=1&adjust=age&adjust=tenure&adjust=sector"
    page = client.get(f"/rosters/{roster}/robustness?{query}")
    assert page.status_code == 200
    html = page.text
    assert result.rate_sentence.split(" (")[0] in html and "firm-clustered" in html
    assert f"{ref.rate.rate_ratio:.3f}" in html and f"{ref.adjusted.odds_ratio:.3f}" in html
    body = client.get(f"/api/rosters/{roster}/robustness?{query}").json()["result"]
    assert body["rate_sentence"] == result.rate_sentence and body["adjust"] == list(ALL)
    assert body["variants"][0]["rate"]["rate_ratio"] == pytest.approx(ref.rate.rate_ratio, rel=1e-12)
    assert body["variants"][0]["adjusted"]["odds_ratio"] == pytest.approx(ref.adjusted.odds_ratio, rel=1e-12)
    assert client.get(f"/api/rosters/{roster}/robustness?measures=1&adjusting=1&adjust=colour").status_code == 400
    # a value the schema refuses is refused without adjusting=1 too (live-server fuzzing found it accepted)
    assert client.get(f"/api/rosters/{roster}/robustness?adjust=colour").status_code == 400
    # without measures=1 the page reads no firm counts and says how to ask for them
    plain = client.get(f"/api/rosters/{roster}/robustness?vary=Resigned").json()["result"]
    assert plain["rate_sentence"] == "" and plain["variants"][0]["rate"] is None
    schema = client.get("/openapi.json").json()["components"]["schemas"]
    assert {"rate", "adjusted"} <= set(schema["VariantOut"]["properties"])
    assert {"rate_sentence", "adjusted_sentence", "universe_fingerprint", "adjust"} <= \
        set(schema["RobustnessOut"]["properties"])

    code = main(["robustness", "--roster", str(roster), "--vary", "Resigned", "--adjust", "age,tenure,sector",
                 "--years", "2001-2012", "--db", store.url, "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    payload = json.loads(out)
    assert payload == json.loads(json.dumps({"roster": "Invented", "mapping": payload["mapping"],
                                             **robustness_to_dict(result)}))
    assert payload["provenance"]["universe_fingerprint"] == result.universe_fingerprint

    inp = load_input(store, roster, mapping="rm map", window=WINDOW)
    finding = robustness_finding(store, inp, vary=["Resigned"], adjust=ALL)
    assert finding.rows is not None
    assert finding.rows["rate_ratio"].iloc[0] == pytest.approx(ref.rate.rate_ratio, rel=1e-12)
    assert finding.rows["adjusted_odds_ratio"].iloc[0] == pytest.approx(ref.adjusted.odds_ratio, rel=1e-12)
    assert finding.provenance.universe_fingerprint == result.universe_fingerprint
    assert finding.provenance.adjustment == ALL
    assert result.rate_sentence in finding.caveat and "readings agree" in finding.takeaway
    assert finding.numbers["readings"][0]["rate_ratio"] == pytest.approx(ref.rate.rate_ratio, rel=1e-12)
