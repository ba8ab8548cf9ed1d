"""Rates and the adjusted trend in the briefing (issue 16) and the brief pack (issue 18), on the demo roster with a
universe derived from it.

Oracles: statsmodels (a Poisson GLM with log firm-years as offset, fitted here on the rate table, for the rate
ratio and the fitted rate line), the analysis functions run_rates / run_adjusted (themselves checked against
statsmodels and scipy in tests/test_universe_rates.py, tests/test_stats_rates.py and tests/test_stats_adjusted.py),
python-pptx reading back what the deck wrote, pdftotext (poppler) for the brief, hashlib and zipfile for the pack.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import zipfile
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import statsmodels.api as sm
from conftest import make_client
from pptx.enum.chart import XL_CHART_TYPE
from pptx.oxml.ns import qn

from app.analysis.adjusted import run_adjusted
from app.analysis.inputs import load_input
from app.analysis.rates import run_rates
from app.analysis.replication import build_pack
from app.analysis.runs import run_trend
from app.briefing.exports import brief_pack, deck_and_pack, default_charts
from app.briefing.findings import build_finding
from app.cli import main
from app.intake.universe import derive_universe
from app.store import Store, StoreError
from tests.test_signed_exports import _charts, _notes, _slides, _text

ROSTER = 1
ALL = ("age", "tenure", "sector")


@pytest.fixture
def measured(demo_store: Store) -> Store:
    """The demo roster with a universe derived from it (labelled an approximation)."""
    derive_universe(demo_store, ROSTER)
    return demo_store


def _values(series: Any, tag: str) -> list[float]:
    return [float(v.text) for v in series._element.find(qn(tag)).iter(qn("c:v"))]


def _err(series: Any, end: str) -> list[float]:
    bars = series._element.find(qn("c:errBars"))
    assert bars is not None
    return [float(v.text) for v in bars.find(qn(f"c:{end}")).iter(qn("c:v"))]


def test_rates_and_adjusted_slides_carry_the_analysis_numbers_native_charts_and_notes(measured: Store) -> None:
    inp = load_input(measured, ROSTER)
    deck, pack = deck_and_pack(measured, inp, ["rates", "adjusted"])
    slides = _slides(deck)
    assert len(slides) == 1 + 2 + 2  # title, the two ticked findings, methods, cautions
    rates_slide, adjusted_slide, methods = slides[1], slides[2], slides[3]
    a = run_rates(measured, inp)
    assert a.forced is not None and a.voluntary is not None
    years = a.table.years
    # outside oracle: statsmodels' Poisson GLM of the yearly forced counts with log firm-years as offset
    X = sm.add_constant(years["year"].to_numpy(dtype=float) - a.forced.centre)
    ref = sm.GLM(years["forced"].to_numpy(dtype=float), X, family=sm.families.Poisson(),
                 offset=np.log(years["firm_years"].to_numpy(dtype=float))).fit()
    assert a.forced.rate_ratio == pytest.approx(math.exp(ref.params[1]), rel=1e-8)
    # the native chart: observed rates with their exact intervals as error bars, and the fitted lines
    (chart,) = _charts(rates_slide)
    assert chart.chart_type == XL_CHART_TYPE.XY_SCATTER  # python-pptx reads a styled scatter back as XY_SCATTER
    observed, fitted, vol_observed, _ = chart.plots[0].series
    assert observed.name.startswith("Forced rate") and vol_observed.name.startswith("Voluntary rate")
    assert _values(observed, "c:xVal") == years["year"].astype(float).tolist()
    assert _values(observed, "c:yVal") == pytest.approx(years["forced_rate_per_100"].tolist(), rel=1e-12)
    assert _err(observed, "plus") == pytest.approx((years["forced_high"] - years["forced_rate_per_100"]).tolist(),
                                                   rel=1e-9)
    assert _values(vol_observed, "c:yVal") == pytest.approx(years["voluntary_rate_per_100"].tolist(), rel=1e-12)
    line = ref.predict(X, offset=np.log(np.full(len(years), 100.0)))  # statsmodels' fitted rate per 100
    assert _values(fitted, "c:yVal") == pytest.approx(line.tolist(), rel=1e-7)
    text = _text(rates_slide)
    assert f"Forced rate ratio {a.forced.rate_ratio:.3f} per year" in text
    assert f"voluntary {a.voluntary.rate_ratio:.3f} per year" in text and "\u2026" not in text
    notes = _notes(rates_slide)
    for fragment in ("Method: Poisson GLM", "Interval: exact Poisson per year", "Caveat: Share vs rate",
                     f"Universe: universe {a.universe.id}, derived from the roster (approximation)",
                     a.universe.fingerprint, f"Runs: {a.run_id}"):
        assert fragment in notes, fragment
    # the adjusted finding: a forest of the year-only and the adjusted odds ratio with firm-clustered intervals
    adjusted = run_adjusted(measured, inp, ALL).fit
    plain = run_adjusted(measured, inp, ()).fit
    (forest,) = _charts(adjusted_slide)
    assert forest.chart_type == XL_CHART_TYPE.BAR_CLUSTERED
    series = forest.plots[0].series[0]
    assert list(series.values) == pytest.approx([plain.odds_ratio, adjusted.odds_ratio], rel=1e-9)
    assert _err(series, "plus")[1] == pytest.approx(adjusted.cluster_interval[1] - adjusted.odds_ratio, rel=1e-9)
    text = _text(adjusted_slide)
    lo, hi = adjusted.cluster_interval
    assert f"odds ratio {adjusted.odds_ratio:.3f} per year (95% firm-clustered interval {lo:.3f} to {hi:.3f}" in text
    assert "age mix of departures" in text
    notes = _notes(adjusted_slide)
    assert "Adjustment set: age, tenure, sector." in notes and "Interval: firm-clustered" in notes
    assert "Caveat: Adjusting removes only the measured mix" in notes and "chi-square p" in notes
    # provenance on the methods slide, and the brief pack named there and in every footer
    body = _text(methods)
    assert f"Universe: universe {a.universe.id}, derived from the roster (approximation)" in body
    assert "Adjustment set: age, tenure, sector" in body
    assert f"Brief pack (every quoted run's replication pack): sha256 {pack.sha256}" in body
    for slide in slides[1:]:
        assert f"brief pack sha256 {pack.sha256[:16]}" in _text(slide)


def test_rates_need_a_universe_and_the_adjusted_trend_is_shown_only_when_ticked(demo_store: Store) -> None:
    inp = load_input(demo_store, ROSTER)
    assert "rates" not in default_charts(demo_store, inp) and "adjusted" not in default_charts(demo_store, inp)
    with pytest.raises(StoreError, match="no universe of firm-years yet"):
        build_finding(demo_store, inp, "rates")
    with pytest.raises(ValueError, match="^The rates finding was ticked but cannot be shown: .*no universe"):
        deck_and_pack(demo_store, inp, ["trend", "rates"])
    derive_universe(demo_store, ROSTER)
    chosen = default_charts(demo_store, inp)
    assert chosen[chosen.index("trend") + 1] == "rates" and "adjusted" not in chosen
    # a smaller adjustment set is named in the finding and its provenance
    finding = build_finding(demo_store, inp, "adjusted", adjust="age")
    assert finding.provenance.adjustment == ("age",)
    assert finding.numbers["odds_ratio"] == pytest.approx(run_adjusted(demo_store, inp, ("age",)).fit.odds_ratio,
                                                          rel=1e-12)


def _members(data: bytes) -> dict[str, bytes]:
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        return {name: archive.read(name) for name in archive.namelist()}


def test_brief_pack_holds_every_quoted_runs_pack_with_a_manifest_of_hashes(measured: Store) -> None:
    inp = load_input(measured, ROSTER)
    charts = ["coverage", "trend", "sectors", "rates", "adjusted"]
    pack = brief_pack(measured, inp, charts)
    assert brief_pack(measured, inp, charts).data == pack.data  # the same bytes each time: its sha256 names it
    files = _members(pack.data)
    manifest = json.loads(files["manifest.json"])
    assert [f["finding"] for f in manifest["findings"]] == charts
    by_name = {f["finding"]: f for f in manifest["findings"]}
    assert by_name["coverage"]["runs"] == []  # no stored run; its counts are in results.json
    trend_run = run_trend(measured, inp).run_id
    assert [r["run"] for r in by_name["trend"]["runs"]] == [trend_run]
    rates_run = run_rates(measured, inp).run_id
    adjusted_runs = [run_adjusted(measured, inp, ()).run_id, run_adjusted(measured, inp, ALL).run_id]
    assert [r["run"] for r in by_name["rates"]["runs"]] == [rates_run]
    assert [r["run"] for r in by_name["adjusted"]["runs"]] == adjusted_runs
    packed = 0
    for finding in manifest["findings"]:
        for entry in finding["runs"]:
            folder = entry["folder"]
            assert folder == f"run-{entry['run']}/"
            # every file named in the manifest is in the folder with that sha256, and nothing else is
            inside = {n.removeprefix(folder): d for n, d in files.items() if n.startswith(folder)}
            assert entry["files"] == {n: hashlib.sha256(d).hexdigest() for n, d in inside.items()}
            if entry["pack_sha256"] is not None:
                own = build_pack(measured, entry["run"])
                assert entry["pack_sha256"] == own.sha256
                assert inside == _members(own.data)  # the run's pack, unpacked byte for byte
                packed += 1
            else:
                assert entry["pack_refused"] and {"params.json", "results.json"} <= set(inside)
    assert packed >= 2  # the trend fit and the sector fit at least
    assert dict(pack.run_packs)[trend_run] == build_pack(measured, trend_run).sha256
    results = {f["finding"]: f for f in json.loads(files["results.json"])["findings"]}
    a = run_rates(measured, inp)
    assert a.forced is not None
    assert results["rates"]["numbers"]["rate_ratio"] == a.forced.rate_ratio
    assert results["rates"]["numbers"]["universe"]["fingerprint"] == a.universe.fingerprint
    assert results["adjusted"]["numbers"]["odds_ratio"] == run_adjusted(measured, inp, ALL).fit.odds_ratio
    coverage = results["coverage"]["numbers"]
    assert coverage["counted"] == sum(y["forced"] + y["voluntary"] for y in coverage["years"])
    readme = files["README.txt"].decode()
    assert "rates: run-" in readme
    # runs build_pack refuses today (rates, adjusted) are listed with the reason; once it packs them, none is
    refused = [r for f in manifest["findings"] for r in f["runs"] if r["pack_sha256"] is None]
    assert ("without a full replication pack" in readme) == bool(refused)
    # without the trend ticked, the trend fit behind the brief's headline is still in the pack
    other = json.loads(_members(brief_pack(measured, inp, ["rates"]).data)["manifest.json"])
    assert [f["finding"] for f in other["findings"]] == ["headline", "rates"]
    assert other["findings"][0]["runs"][0]["run"] == trend_run


def test_cli_export_writes_the_deck_and_the_pack_its_footer_names(measured: Store, tmp_path: Path,
                                                                   capsys: pytest.CaptureFixture[str]) -> None:
    db = measured.url
    deck, pack = tmp_path / "d.pptx", tmp_path / "p.zip"
    code = main(["export", "--roster", str(ROSTER), "--db", db, "--format", "pptx", "--chart", "rates,adjusted",
                 "--adjust", "age,tenure", "--out", str(deck), "--pack", str(pack)])
    assert code == 0
    sha = hashlib.sha256(pack.read_bytes()).hexdigest()
    assert f"brief pack, sha256 {sha}" in capsys.readouterr().err
    slides = _slides(deck.read_bytes())
    assert f"sha256 {sha}" in _text(slides[-2])
    assert "Adjustment set: age, tenure" in _notes(slides[2]) and "sector" not in _notes(slides[2]).split(
        "Adjustment set:")[1].split(".")[0]
    findings = json.loads(_members(pack.read_bytes())["manifest.json"])["findings"]
    assert [f["finding"] for f in findings] == ["headline", "rates", "adjusted"]
    code = main(["export", "--roster", str(ROSTER), "--db", db, "--format", "pptx", "--out", str(deck),
                 "--pack", str(deck)])
    assert code != 0 and "--pack and --out name the same file" in capsys.readouterr().err


def test_briefing_page_offers_the_measures_and_the_brief_pack(measured: Store) -> None:
    web = make_client(measured)
    page = web.get(f"/rosters/{ROSTER}/briefing?chart=rates&chart=adjusted")
    assert page.status_code == 200
    assert "Turnover rates per 100 firm-years" in page.text and "Trend adjusted for age, tenure and sector" in page.text
    assert f"/rosters/{ROSTER}/briefing/brief-pack.zip?chart=rates&amp;chart=adjusted" in page.text
    api = web.get(f"/api/rosters/{ROSTER}/briefing?chart=rates&chart=adjusted").json()
    assert [i["name"] for i in api["items"]] == ["rates", "adjusted"] and not any(i["error"] for i in api["items"])
    got = web.get(f"/rosters/{ROSTER}/briefing/brief-pack.zip?chart=rates&chart=adjusted")
    assert got.status_code == 200 and got.headers["content-type"] == "application/zip"
    assert got.headers["x-pack-sha256"] == hashlib.sha256(got.content).hexdigest()
    inp = load_input(measured, ROSTER)
    assert got.content == brief_pack(measured, inp, ["rates", "adjusted"]).data
    assert web.get(f"/rosters/{ROSTER}/briefing/brief-pack.zip?chart=nope").status_code == 400
    # the Trend page's Rates section draws the same figure the briefing exports
    trend = web.get(f"/rosters/{ROSTER}/trend")
    assert trend.status_code == 200 and 'data-figure-for="fig-rates"' in trend.text


@pytest.mark.slow
def test_brief_pdf_states_the_rate_ratio_adjusted_odds_ratio_provenance_and_pack(measured: Store,
                                                                                  tmp_path: Path) -> None:
    from test_export import AVAILABLE, WHY, pdf_text  # the export tests' browser check and PDF text reader

    if not AVAILABLE:
        pytest.skip(WHY)
    inp = load_input(measured, ROSTER)
    # through the command line: --chart is a comma list for the brief too, and --pack writes the brief pack
    out, zipped = tmp_path / "brief.pdf", tmp_path / "pack.zip"
    assert main(["export", "--roster", str(ROSTER), "--db", measured.url, "--format", "brief", "--chart",
                 "rates,adjusted", "--out", str(out), "--pack", str(zipped)]) == 0
    text = pdf_text(out.read_bytes(), tmp_path)
    pack = brief_pack(measured, inp, ["rates", "adjusted"])
    assert zipped.read_bytes() == pack.data
    a = run_rates(measured, inp)
    adjusted = run_adjusted(measured, inp, ALL).fit
    assert a.forced is not None and a.voluntary is not None
    lo, hi = a.forced.headline_interval()
    wald = (a.forced.quasi or a.forced).conf_int["wald"]
    # the estimates table: the analysis functions' numbers at three decimals
    assert f"Forced rate ratio per year {a.forced.rate_ratio:.3f} {lo:.3f} to {hi:.3f} profile likelihood" in text
    assert f"{a.forced.rate_ratio:.3f} {wald[0]:.3f} to {wald[1]:.3f} Wald" in text
    assert f"Voluntary rate ratio per year {a.voluntary.rate_ratio:.3f}" in text
    c_lo, c_hi = adjusted.cluster_interval
    assert f"{adjusted.odds_ratio:.3f} {c_lo:.3f} to {c_hi:.3f} firm-clustered Wald" in text
    assert "the forced rate" in text  # the decomposition sentence (method section)
    joined = text.replace("- ", "-")
    for fragment in (f"Universe: universe {a.universe.id}, derived from the roster (approximation)",
                     a.universe.fingerprint, "Adjustment set: age, tenure, sector",
                     f"Brief pack (every quoted run's replication pack): sha256 {pack.sha256}",
                     f"Replication pack of run {run_trend(measured, inp).run_id}: sha256"):
        assert fragment in joined, fragment
