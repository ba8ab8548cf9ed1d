"""Bootstrap engine: intervals against scipy and published values, reproducibility, failures."""

from __future__ import annotations

import hashlib
import importlib.util
import json
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import sparse, stats

from app.stats.bootstrap import (
    BootstrapCancelled,
    bootstrap_to_dict,
    bootstrap_trend,
    draw_cells,
    draw_replicates,
    extend_bootstrap,
    intervals_from_replicates,
)
from app.stats.cells import Cells, build_cells
from app.stats.design import Design, design_matrix, window_centre
from app.stats.irls import fit_batch
from app.stats.jackknife import cluster_cases, departure_cases, jackknife_acceleration
from tests.test_stats_irls import clustered_roster

REFERENCES = Path(__file__).parent / "data"


def small_cells(seed: int = 3, **kw: int) -> tuple[Cells, Design]:
    cells = build_cells(clustered_roster(seed, **kw))
    return cells, design_matrix(cells.groups, "linear", window_centre(cells.window))


# ---------------------------------------------------------------- scipy cross-check

def _statistic_from_units(unit_cells: np.ndarray, design: Design):
    """A scipy-style vectorised statistic: the log odds ratio of the data made of the given units."""
    g = design.matrix.shape[0]

    def statistic(idx: np.ndarray, axis: int = -1) -> np.ndarray:
        idx = np.asarray(idx, dtype=np.int64)
        flat = idx.reshape(-1, idx.shape[-1])
        counts = np.stack([unit_cells[row].sum(axis=0) for row in flat]).astype(float)
        fit = fit_batch(design.matrix, counts[:, :g], counts[:, :g] + counts[:, g:])
        return fit.beta[:, design.slope].reshape(idx.shape[:-1])

    return statistic


@pytest.mark.parametrize("unit", ["departure", "firm"])
@pytest.mark.parametrize("method", ["percentile", "basic", "bca"])
def test_intervals_equal_scipy_on_the_same_replicates(unit: str, method: str) -> None:
    # oracle: scipy.stats.bootstrap(n_resamples=0, bootstrap_result=...) on our replicates, with the
    # resampling unit as scipy's "sample" so its jackknife leaves out one departure / one firm
    cells, design = small_cells(firms=40, years=5)
    result = bootstrap_trend(cells, design, unit=unit, resamples=999, seed=11)  # type: ignore[arg-type]
    assert result.failed == 0
    dense = cells.firm_matrix.toarray()
    if unit == "firm":
        unit_cells = dense
    else:  # one row per departure: a unit vector on its cell
        cell_of = np.repeat(np.arange(dense.shape[1]), dense.sum(axis=0))
        unit_cells = np.eye(dense.shape[1], dtype=np.int64)[cell_of]
    sample = np.arange(unit_cells.shape[0])
    ref = stats.bootstrap(
        (sample,), _statistic_from_units(unit_cells, design), n_resamples=0, method=method,
        bootstrap_result=SimpleNamespace(bootstrap_distribution=result.replicates),
        confidence_level=0.95, vectorized=True,
    )
    np.testing.assert_allclose(result.log_intervals[method], ref.confidence_interval, rtol=1e-10)
    np.testing.assert_allclose(result.intervals[method], np.exp(ref.confidence_interval), rtol=1e-10)


def test_grouped_jackknife_equals_one_case_per_unit() -> None:
    # hand-derived: leaving out any departure of a cell gives that cell's case
    cells, _ = small_cells(firms=30, years=4)
    counts = np.concatenate([cells.forced, cells.voluntary])
    cases = departure_cases(counts)
    assert cases.weights.sum() == counts.sum()
    firm = cluster_cases(cells.firm_matrix)
    assert firm.weights.sum() == cells.firm_matrix.shape[0]
    dense = cells.firm_matrix.toarray()
    one_by_one = {tuple(counts - row) for row in dense}
    assert {tuple(row) for row in firm.cells} == one_by_one


# ---------------------------------------------------------------- published values

SPATIAL_A = np.array([48, 36, 20, 29, 42, 42, 20, 42, 22, 41, 45, 14, 6, 0, 33, 28, 34, 4, 32, 24, 47,
                      41, 24, 26, 30, 41], dtype=float)
BOOT_SAMPLE = np.array([10, 12, 12.5, 12.5, 13.9, 15, 21, 22, 23, 34, 50, 81, 89, 121, 134, 213])


def _leave_one_out(x: np.ndarray, statistic) -> np.ndarray:
    return np.array([statistic(np.delete(x, i)) for i in range(x.size)])


def test_acceleration_spatial_data_plug_in_variance() -> None:
    # Efron & Tibshirani 1993 ch. 14 (published, per tests/data/README.md): a = 0.061 (exact 0.061240)
    a = jackknife_acceleration([_leave_one_out(SPATIAL_A, np.var)])
    assert a == pytest.approx(0.061240, abs=5e-7)


def test_intervals_spatial_data_plug_in_variance() -> None:
    # Efron & Tibshirani 1993 ch. 14 (published): 90% BCa (115.8, 259.6), percentile (100.8, 233.9)
    rng = np.random.default_rng(20)
    reps = np.var(SPATIAL_A[rng.integers(0, SPATIAL_A.size, size=(40_000, SPATIAL_A.size))], axis=1)
    iv = intervals_from_replicates(np.var(SPATIAL_A), reps, _leave_one_out(SPATIAL_A, np.var), alpha=0.10)
    assert iv.acceleration == pytest.approx(0.061240, abs=5e-7)
    np.testing.assert_allclose(iv.bounds["bca"], (115.8, 259.6), rtol=0.03)
    np.testing.assert_allclose(iv.bounds["percentile"], (100.8, 233.9), rtol=0.03)
    # no standard error per resample was given, so the studentized interval (and its error) is NaN
    assert [0 < e < 2 for m in ("percentile", "basic", "bca", "normal") for e in iv.mc_error[m]] == [True] * 8
    assert np.isnan(iv.bounds["studentized"]).all() and np.isnan(iv.mc_error["studentized"]).all()


def test_acceleration_two_sample_mouse_data() -> None:
    # Efron & Tibshirani ch. 2 mouse data; value from scipy's test_BCa_acceleration_against_reference
    treatment = np.array([16, 23, 38, 94, 99, 141, 197.0])
    control = np.array([10, 27, 31, 40, 46, 50, 52, 104, 146.0])
    a = jackknife_acceleration([
        _leave_one_out(treatment, np.mean) - control.mean(),
        treatment.mean() - _leave_one_out(control, np.mean),
    ])
    assert a == pytest.approx(0.011008228344026734, rel=1e-12)


def test_acceleration_of_the_mean_r_boot_sample() -> None:
    # R boot via scipy's test_bootstrap_against_R (published): jackknife acceleration 0.061529 (computed)
    assert jackknife_acceleration([_leave_one_out(BOOT_SAMPLE, np.mean)]) == pytest.approx(0.061529, abs=5e-7)


@pytest.mark.slow
def test_intervals_of_the_mean_against_r_boot() -> None:
    # R boot, 10^6 resamples, via scipy's test_bootstrap_against_R (published):
    # basic (23.77, 79.12), percentile (28.86, 84.21), BCa (32.31, 91.43); rtol 0.005
    rng = np.random.default_rng(0)
    reps = np.concatenate([
        BOOT_SAMPLE[rng.integers(0, BOOT_SAMPLE.size, size=(500_000, BOOT_SAMPLE.size))].mean(axis=1)
        for _ in range(4)
    ])
    iv = intervals_from_replicates(BOOT_SAMPLE.mean(), reps, _leave_one_out(BOOT_SAMPLE, np.mean),
                                   mc_resamples=0)
    np.testing.assert_allclose(iv.bounds["basic"], (23.77, 79.12), rtol=0.005)
    np.testing.assert_allclose(iv.bounds["percentile"], (28.86, 84.21), rtol=0.005)
    np.testing.assert_allclose(iv.bounds["bca"], (32.31, 91.43), rtol=0.005)


def _seed_plates() -> tuple[Cells, Design]:
    """Crowder's seed germination plates: each plate a 'firm', each seed a 'departure'."""
    plates = pd.read_csv(REFERENCES / "seed_germination_plates.csv", comment="#")
    n = len(plates)
    germinated = plates["germinated"].to_numpy()
    failed = (plates["seeds"] - plates["germinated"]).to_numpy()
    groups = pd.DataFrame({"year": plates["plate"].to_numpy(), "sector": "",
                           "forced": germinated, "voluntary": failed})
    rows = np.concatenate([np.arange(n), np.arange(n)])
    cols = np.concatenate([np.arange(n), n + np.arange(n)])
    matrix = sparse.csr_matrix((np.concatenate([germinated, failed]), (rows, cols)), shape=(n, 2 * n))
    cells = Cells(groups=groups, firm_ids=plates["plate"].to_numpy(), firm_matrix=matrix,
                  window=(0, 0), by_sector=False)
    X = np.column_stack([np.ones(n), (plates["seed"] == "O73").to_numpy(float),
                         (plates["extract"] == "cucumber").to_numpy(float)])
    return cells, Design(matrix=X, names=("const", "seed[O73]", "extract[cucumber]"), slope=2, centre=0.0)


def test_plate_bootstrap_is_wider_than_record_bootstrap_on_seed_germination() -> None:
    # Crowder 1978 data, seed + extract model (computed, per tests/data/README.md): SE of the cucumber log-OR
    # ~0.145 resampling seeds (records), ~0.24 resampling plates (clusters)
    cells, design = _seed_plates()
    by_record = bootstrap_trend(cells, design, unit="departure", resamples=2000, seed=5)
    by_plate = bootstrap_trend(cells, design, unit="firm", resamples=2000, seed=5)
    assert by_record.coefficient == "extract[cucumber]"
    assert by_record.standard_error == pytest.approx(0.145, abs=0.02)
    assert by_plate.standard_error == pytest.approx(0.24, abs=0.04)
    assert by_plate.standard_error > 1.4 * by_record.standard_error


# ---------------------------------------------------------------- reproducibility

@pytest.mark.parametrize("unit", ["departure", "firm"])
def test_same_seed_same_numbers_whatever_chunks_and_workers(unit: str) -> None:
    cells, design = small_cells()
    runs = [draw_replicates(cells, design, unit=unit, resamples=1100, seed=9,  # type: ignore[arg-type]
                            chunk_size=c, workers=w).estimates
            for c, w in [(None, None), (250, 1), (300, 2), (5000, 3), (1, 2)]]
    for other in runs[1:]:
        np.testing.assert_array_equal(other, runs[0])
    different = draw_replicates(cells, design, unit=unit, resamples=1100, seed=10)  # type: ignore[arg-type]
    assert not np.array_equal(different.estimates, runs[0])


# Recorded from the engine as it stood at commit 41b5369, before the speed-ups (general IRLS
# solver, firm draws in passes of 40 x 6,000 indices): sha256 prefixes of the drawn counts of
# blocks 0 and 2, then over resamples 0..999 the nansum of the estimates, the number of failed
# fits and the estimates of resamples PICKED. Stored runs (firm draws by sampler 1, which sampler 2 equals up to SPAN firms) must keep these numbers.
PICKED = [0, 1, 249, 250, 499, 777, 998, 999]
RECORDED = {
    ("small", "linear", "departure"): (['aaa3b607b86dff1c', 'e376a415a1579c38'], 28.355694740203234, 0, ['-0.013691949784929656', '0.04460531673753235', '0.007309668806847226', '0.06379080238740566', '-0.05554832014303727', '-0.06716390971882158', '-5.889199333827214e-05', '0.023879864098818555']),
    ("small", "linear", "firm"): (['9154175437a831fc', 'fe64b6611c89459c'], 27.496408232272728, 0, ['0.05027889592168936', '-0.04537888147606412', '-0.03848071540469995', '-0.022700849120513955', '0.04803372846098861', '-0.04998600197661369', '0.07341281730996374', '0.07749450540224904']),
    ("small", "sector", "departure"): (['21060755fea91c15', 'ec473cb08b8ef32a'], 27.583703460411996, 0, ['0.019772507068425246', '-0.011839905974403455', '0.1090449604646784', '-0.021323270581770012', '0.025796452596256507', '0.00333387842744229', '0.010317017552847708', '0.08210896098810881']),
    ("small", "sector", "firm"): (['4eb3e39cc2acd4f4', 'cae262fd8b091d6c'], 29.174804429831063, 0, ['0.051099638317697024', '-0.04721503453229142', '-0.03355464527101166', '-0.01890636120502528', '0.029294974824680697', '-0.05048581362595651', '0.07571491876895042', '0.08595603668919696']),
    ("wide", "linear", "firm"): (['9706618e5e7cb515', '63fb845e39e7b11f'], 68.54885155058915, 0, ['0.06980351616237164', '0.06934131907427135', '0.06208306991249492', '0.0661401642296965', '0.06955578628313391', '0.0659797910887103', '0.06164692876307769', '0.06925661202342787']),
    ("wide", "sector", "firm"): (['98380fdf8901392e', 'ef8d3505d4bcb350'], 68.77668010173085, 0, ['0.0701465279768594', '0.06959107474055619', '0.06220170056743029', '0.06637787721615375', '0.06947302627342594', '0.06604471063689588', '0.06178555416848905', '0.06957631817594337']),
}
ROSTERS = {"small": {"seed": 3}, "wide": {"seed": 5, "firms": 6000, "years": 12, "sectors": 10}}


@pytest.mark.parametrize("key", list(RECORDED), ids=["-".join(k) for k in RECORDED])
def test_draws_and_estimates_match_the_recorded_engine(key: tuple[str, str, str]) -> None:
    # oracle: numbers recorded from the earlier engine (above), and statsmodels GLM(Binomial) refits
    # of the drawn counts; the wide roster (6,000 firms) makes the firm draws span several passes
    roster, model, unit = key
    hashes, total, failed, picked = RECORDED[key]
    cells = build_cells(clustered_roster(**ROSTERS[roster]), by_sector=(model == "sector"))
    design = design_matrix(cells.groups, model, window_centre(cells.window))  # type: ignore[arg-type]
    drawn = {b: draw_cells(cells, unit=unit, seed=13, block=b, sampler=1)  # type: ignore[arg-type]
             for b in (0, 2)}
    assert [hashlib.sha256(drawn[b].astype(np.int64).tobytes()).hexdigest()[:16] for b in (0, 2)] == hashes
    est = draw_replicates(cells, design, unit=unit, resamples=1000, seed=13, sampler=1).estimates  # type: ignore[arg-type]
    assert int(np.isnan(est).sum()) == failed
    assert np.nansum(est) == pytest.approx(total, rel=1e-12)
    np.testing.assert_allclose(est[PICKED], [float(v) for v in picked], rtol=1e-12, atol=1e-14)
    g = cells.n_groups
    for i in (0, 1, 249):
        f, n = drawn[0][i, :g], drawn[0][i, :g] + drawn[0][i, g:]
        keep = n > 0
        ref = sm.GLM(np.column_stack([f[keep], n[keep] - f[keep]]), design.matrix[keep],
                     family=sm.families.Binomial()).fit(tol=1e-10)
        assert est[i] == pytest.approx(ref.params[design.slope], rel=1e-10, abs=1e-12)


def test_partial_block_and_offsets_equal_a_single_run() -> None:
    cells, design = small_cells()
    full = draw_replicates(cells, design, unit="firm", resamples=1000, seed=4)
    partial = draw_replicates(cells, design, unit="firm", resamples=100, seed=4)
    np.testing.assert_array_equal(partial.estimates, full.estimates[:100])
    middle = draw_replicates(cells, design, unit="firm", resamples=450, seed=4, start=300)
    np.testing.assert_array_equal(middle.estimates, full.estimates[300:750])
    np.testing.assert_array_equal(draw_cells(cells, unit="firm", seed=4, block=1).shape[0], 250)


def test_extension_reproduces_a_single_long_run() -> None:
    cells, design = small_cells()
    single = bootstrap_trend(cells, design, unit="firm", resamples=1000, seed=21)
    first = bootstrap_trend(cells, design, unit="firm", resamples=600, seed=21)
    extended = extend_bootstrap(first, cells, design, resamples=400)
    np.testing.assert_array_equal(extended.replicates, single.replicates)
    assert extended.intervals == single.intervals
    assert extended.mc_error == single.mc_error
    other_cells, other_design = small_cells(seed=4)
    with pytest.raises(ValueError, match="cannot extend"):
        extend_bootstrap(first, other_cells, other_design, resamples=10)


def test_failed_resamples_are_counted_by_reason_and_flagged() -> None:
    # a roster with 2 forced among 40 departures: a departure resample has no forced departure with
    # probability (38/40)**40 = 0.13, so many resamples must fail, and all of them visibly
    records = pd.DataFrame({
        "firm_id": [f"F{i}" for i in range(40)], "year": np.repeat([2018, 2019, 2020, 2021], 10),
        "category": ["forced"] + ["voluntary"] * 29 + ["forced"] + ["voluntary"] * 9,
    })
    cells = build_cells(records)
    design = design_matrix(cells.groups, "linear", window_centre(cells.window))
    result = bootstrap_trend(cells, design, unit="departure", resamples=500, seed=2)
    drawn = np.vstack([draw_cells(cells, unit="departure", seed=2, block=b) for b in (0, 1)])
    no_forced = int((drawn[:, :cells.n_groups].sum(axis=1) == 0).sum())
    assert result.failed_by_reason["no_forced"] == no_forced > 0.05 * 500
    assert result.failed == int(np.isnan(result.replicates).sum()) == sum(result.failed_by_reason.values())
    assert result.failure_flag
    assert set(result.failures[np.isnan(result.replicates)]) <= {"no_forced", "separation"}
    assert result.resamples == 500


def test_progress_and_cancellation() -> None:
    cells, design = small_cells()
    seen: list[tuple[int, int]] = []
    bootstrap_trend(cells, design, unit="departure", resamples=1200, seed=1, chunk_size=500,
                    progress=lambda done, total: seen.append((done, total)))
    assert seen == [(500, 1200), (1000, 1200), (1200, 1200)]
    calls = iter([False, True])
    with pytest.raises(BootstrapCancelled) as info:
        bootstrap_trend(cells, design, unit="departure", resamples=1200, seed=1, chunk_size=250,
                        should_stop=lambda: next(calls))
    assert info.value.done == 250


@pytest.mark.parametrize(("kwargs", "message"), [
    ({"unit": "plate"}, "unit must be one of departure, firm"),
    ({"resamples": 0}, "resamples must be a whole number from 1"),
    ({"resamples": 10.5}, "resamples must be a whole number from 1"),
    ({"seed": -1}, "seed must be a whole number of at least 0"),
    ({"seed": "abc"}, "seed must be a whole number of at least 0"),
    ({"alpha": 1.5}, "alpha must be between 0 and 1"),
])
def test_bad_arguments_name_the_allowed_values(kwargs: dict, message: str) -> None:
    cells, design = small_cells()
    args = {"unit": "firm", "resamples": 100, "seed": 1} | kwargs
    with pytest.raises(ValueError, match=message):
        bootstrap_trend(cells, design, **args)


def test_dict_has_the_command_line_keys_and_is_json() -> None:
    cells, design = small_cells()
    result = bootstrap_trend(cells, design, unit="firm", resamples=300, seed=8)
    out = bootstrap_to_dict(result)
    assert {"odds_ratio", "conf_int", "resamples", "failed", "unit", "seed", "seconds"} <= set(out)
    assert set(out["conf_int"]) == {"percentile", "basic", "bca", "normal", "studentized"}
    assert out["odds_ratio"] == pytest.approx(np.exp(result.estimate))
    lo, hi = out["conf_int"]["percentile"]
    assert lo < out["odds_ratio"] < hi
    json.dumps(out)


# ---------------------------------------------------------------- coverage (small simulation)

def _load_simulation():
    path = Path(__file__).parents[1] / "benchmarks" / "simulate_coverage.py"
    spec = importlib.util.spec_from_file_location("simulate_coverage", path)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.mark.slow
def test_firm_percentile_coverage_is_near_nominal_on_clustered_rosters() -> None:
    # 60 simulated clustered rosters with a known slope: firm-unit 95% percentile intervals should
    # cover in 95% of data sets; binomial(60, 0.95) puts at least 52 covers within ~99.5%. Departure
    # resampling ignores the clustering and covers clearly less.
    sim = _load_simulation()
    table = sim.coverage_study(datasets=60, resamples=400, seed=123)
    covered = table.loc[("firm", "percentile"), "covered"]
    assert 52 <= covered <= 60
    assert table.loc[("departure", "percentile"), "covered"] < covered
