"""app.analysis.robustness: the trend under other readings of "forced", against direct fits."""

from __future__ import annotations

import math
from typing import Any

import pandas as pd
import pytest
from conftest import read_mapping, statsmodels_trend, year_counts

from app.analysis.inputs import load_input
from app.analysis.jobs import run_bootstrap_now
from app.analysis.robustness import check_robustness
from app.analysis.robustness_report import robustness_rows, robustness_to_dict
from app.stats.cells import assign_categories, build_cells
from app.stats.trend import fit_trend
from app.store import Store

ROSTER = 1
WINDOW = (1998, 2022)


def test_strict_mapping_variant_reproduces_a_direct_fit(demo_store: Store, demo_clean: pd.DataFrame,
                                                        demo_truth: dict[str, Any]) -> None:
    inp = load_input(demo_store, ROSTER)
    result = check_robustness(demo_store, inp, extra_mappings=["demo strict:1"])
    strict = next(v for v in result.variants if v.kind == "mapping")
    # the engine directly, on the strict mapping's categories
    records = inp.records.assign(category=assign_categories(inp.records["reason"],
                                                            demo_store.get_mapping("demo strict", 1).categories))
    direct = fit_trend(build_cells(records, WINDOW), "linear")
    assert strict.odds_ratio == pytest.approx(direct.odds_ratio, rel=1e-12)
    assert strict.profile == pytest.approx(direct.conf_int["profile"], rel=1e-12)
    # and statsmodels on pandas counts of the CSVs
    ref = statsmodels_trend(year_counts(demo_clean, read_mapping("mapping-strict.csv"), WINDOW), WINDOW)
    assert math.log(strict.odds_ratio) == pytest.approx(float(ref.params[1]), rel=1e-8)
    # the strict mapping excludes exactly the ambiguous codes (demo_data/README.md), so the two rows merge
    assert strict.label == "demo strict v1 = ambiguous codes excluded"
    assert sorted(c.split(":")[0] for c in strict.changes) == sorted(demo_truth["ambiguous_codes"])
    assert len(result.variants) == 2


def test_vary_moves_one_code_to_each_other_category(demo_store: Store, demo_clean: pd.DataFrame) -> None:
    inp = load_input(demo_store, ROSTER)
    result = check_robustness(demo_store, inp, vary=["Died in office"], ambiguous_excluded=False)
    labels = [v.label for v in result.variants]
    assert labels == ["demo standard v1", "Died in office as forced", "Died in office as excluded"]
    moved = result.variants[1]
    assert moved.changes == ("Died in office: voluntary → forced",)
    mapping = read_mapping("mapping-standard.csv") | {"Died in office": "forced"}
    ref = statsmodels_trend(year_counts(demo_clean, mapping, WINDOW), WINDOW)
    assert math.log(moved.odds_ratio) == pytest.approx(float(ref.params[1]), rel=1e-8)
    with pytest.raises(ValueError, match="does not occur"):
        check_robustness(demo_store, inp, vary=["Abducted"])


def test_verdict_follows_the_profile_intervals(demo_store: Store) -> None:
    inp = load_input(demo_store, ROSTER)
    result = check_robustness(demo_store, inp, extra_mappings=["demo strict"], vary=["Retired"])
    above = [v.profile is not None and v.profile[0] > 1 for v in result.variants]
    assert result.direction == "rising"  # demo_data/README.md: Wald 1.0149-1.0449 under the generator's codes
    assert result.holds == all(above)
    lo = min(v.odds_ratio for v in result.variants if v.odds_ratio)
    assert f"range from {lo:.3f}" in result.sentence
    rows = robustness_rows(result)
    assert list(rows["label"]) == [v.label for v in result.variants]
    assert rows["group"].iloc[0] not in set(rows["group"].iloc[1:])  # the reference row stands apart
    view = robustness_to_dict(result)
    assert view["variants"][0]["conf_int"]["profile"] == pytest.approx(list(result.variants[0].profile))


def test_a_stored_bootstrap_run_supplies_the_reference_interval(demo_store: Store) -> None:
    inp = load_input(demo_store, ROSTER)
    before = check_robustness(demo_store, inp).variants[0]
    assert before.bootstrap is None and "no stored bootstrap run" in before.bootstrap_note
    run = run_bootstrap_now(demo_store, inp, unit="firm", resamples=200, seed=5)
    after = check_robustness(demo_store, inp).variants[0]
    assert after.bootstrap == pytest.approx(tuple(run["conf_int"]["bca"]))
    assert f"run {run['run']}" in after.bootstrap_note and "firm" in after.bootstrap_note


def test_robustness_needs_a_mapping(store: Store) -> None:
    from conftest import DEMO_CSV

    from app.intake.ingest import import_roster

    roster = import_roster(store, DEMO_CSV.read_bytes(), "roster.csv").roster
    store.save_mapping_version("partial", {"Retired": "voluntary"})
    inp = load_input(store, roster.id, require_mapping=False)
    with pytest.raises(ValueError, match="needs a reference mapping"):
        check_robustness(store, inp)


def test_mappings_that_leave_counted_codes_unmapped_are_not_offered_and_never_drive_the_verdict(
        demo_store: Store, demo_clean: pd.DataFrame, client: Any) -> None:
    # another desk's mapping sharing no code with the demo roster (the situation of a new roster)
    demo_store.save_mapping_version("other desk", {"OUSTED-X": "forced", "RETIRED-X": "voluntary"}, {},
                                    author="test", note="no shared codes")
    inp = load_input(demo_store, ROSTER)
    default = check_robustness(demo_store, inp, extra_mappings="covering")
    assert [v.label for v in default.variants if v.kind == "mapping"] == ["demo strict v1 = ambiguous codes excluded"]
    assert [ref for ref, _ in default.left_out] == ["other desk:1"]
    standard = read_mapping("mapping-standard.csv")
    counted = year_counts(demo_clean, standard, WINDOW)  # pandas: forced + voluntary per year in the window
    codes = {c for c, cat in standard.items() if cat in ("forced", "voluntary")}
    why = default.left_out[0][1]
    assert f"gives no category to {len(codes & set(demo_clean['Exit Reason'])):,} of the" in why
    assert why.endswith(f"{int(counted['total'].sum()):,} departures")
    # chosen anyway: the reading is marked with every counted departure unmapped and is not in the verdict
    chosen = check_robustness(demo_store, inp, extra_mappings=["other desk:1"], ambiguous_excluded=False)
    other = next(v for v in chosen.variants if v.kind == "mapping")
    assert other.unmapped == int(counted["total"].sum())
    assert chosen.holds and chosen.direction == "rising"  # the reference alone decides; it rises
    assert "1 further reading leaves counted departures unmapped and is not part of this verdict." in chosen.sentence
    assert robustness_to_dict(chosen)["variants"][1]["unmapped"] == other.unmapped
    # every reading of a stored mapping links to its departures, and the linked lists have the counted lengths
    page = client.get(f"/rosters/{ROSTER}/robustness")
    assert "Not offered, because they would count" in page.text and "other desk:1" in page.text
    ref = next(v for v in page.context["page"].result.variants if v.kind == "reference")
    assert ref.mapping_ref == "demo standard:1"
    for category, expected in (("forced", ref.forced), ("counted", ref.departures)):
        listed = client.get(f"/api/rosters/{ROSTER}/departures", params={
            "mapping": ref.mapping_ref, "from": WINDOW[0], "to": WINDOW[1], "category": category}).json()
        assert listed["total"] == expected
    assert expected == int(counted["total"].sum())
    assert "category=counted" in page.text and "mapping=demo+standard%3A1" in page.text
