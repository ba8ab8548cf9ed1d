"""Profile-likelihood ends are read from a recorded fit of the same counts, window and options (issue 13: cold pages).

The reference is the fit that searched for them (``profile_interval``, checked against published values in
tests/test_stats_trend.py): a fresh server (a new ``Store``, so an empty memo) must show exactly its
numbers and sentences without searching again, and must search again for other counts or another window.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest
from conftest import copy_database

import app.stats.trend as trend_module
import app.stats.trend_line as trend_line
from app.analysis.inputs import load_input
from app.analysis.runs import run_trend
from app.analysis.stored_fits import PROFILE_KEY
from app.stats.headline import headline_fields
from app.stats.trend_report import fit_to_dict
from app.store import Store

DEMO = "Demo index (invented)"


@pytest.fixture
def searches(monkeypatch: pytest.MonkeyPatch) -> list[float]:
    """Counts the profile searches ``fit_trend`` makes (the dispersion of each): the straight and spline trend
    search in ``app.stats.trend_line`` (``profile_ends``), the statsmodels path in ``profile_interval``."""
    calls: list[float] = []
    real, real_plain = trend_module.profile_interval, trend_line.profile_ends

    def counted(*args: Any, **kwargs: Any) -> Any:
        calls.append(kwargs.get("dispersion", 1.0))
        return real(*args, **kwargs)

    def counted_plain(*args: Any, **kwargs: Any) -> Any:
        calls.append(args[6] if len(args) > 6 else kwargs.get("dispersion", 1.0))
        return real_plain(*args, **kwargs)

    monkeypatch.setattr(trend_module, "profile_interval", counted)
    monkeypatch.setattr(trend_line, "profile_ends", counted_plain)
    return calls


@pytest.mark.parametrize("options", [{}, {"quasi": True}, {"model": "spline"}])
def test_a_fresh_server_reads_the_recorded_profile(shared_demo_db: Path, tmp_path: Path, searches: list[float],
                                                   options: dict[str, Any]) -> None:
    url = f"sqlite:///{copy_database(shared_demo_db, tmp_path / 'demo.db')}"
    first = Store(url)
    fitted = run_trend(first, load_input(first, DEMO), **options)
    expected = 2 if options.get("quasi") else 1
    assert len(searches) == expected  # the first fit searched (binomial, and quasi when asked)
    run = first.get_run(fitted.run_id)
    assert run.result is not None and set(run.result[PROFILE_KEY]) == set(fitted.fit.profiles)
    first.dispose()

    fresh = Store(url)  # a new server: nothing memoised
    again = run_trend(fresh, load_input(fresh, DEMO), **options)
    assert len(searches) == expected  # no new search
    assert again.run_id == fitted.run_id
    assert fit_to_dict(again.fit) == fit_to_dict(fitted.fit)  # every number, message and sentence
    assert headline_fields(again.fit) == headline_fields(fitted.fit)
    assert again.fit.profiles == fitted.fit.profiles
    # another window is other counts: searched afresh
    run_trend(fresh, load_input(fresh, DEMO, window=(1999, 2014)), **options)
    assert len(searches) == 2 * expected
    fresh.dispose()


def test_a_run_recorded_without_profiles_searches_again(shared_demo_db: Path, tmp_path: Path,
                                                        searches: list[float]) -> None:
    url = f"sqlite:///{copy_database(shared_demo_db, tmp_path / 'demo.db')}"
    first = Store(url)
    fitted = run_trend(first, load_input(first, DEMO))
    run = first.get_run(fitted.run_id)
    assert run.result is not None
    first.finish_run(run.id, {k: v for k, v in run.result.items() if k != PROFILE_KEY}, seconds=0.0)
    first.dispose()
    fresh = Store(url)
    again = run_trend(fresh, load_input(fresh, DEMO))
    assert len(searches) == 2
    assert fit_to_dict(again.fit) == fit_to_dict(fitted.fit)
    fresh.dispose()


def test_an_open_end_is_kept_as_null_and_read_back_as_infinite(shared_demo_db: Path, tmp_path: Path,
                                                               searches: list[float]) -> None:
    """JSON has no infinity: an open profile end is stored as null and comes back as an unbounded interval."""
    import math

    from app.analysis.stored_fits import profiles_to_json
    from app.stats.profile import ProfileResult

    open_end = ProfileResult(-math.inf, 0.05, "The lower end is open (a note).")
    assert profiles_to_json({"binomial": open_end}) == {"binomial": [None, 0.05, "The lower end is open (a note)."]}
    url = f"sqlite:///{copy_database(shared_demo_db, tmp_path / 'demo.db')}"
    first = Store(url)
    fitted = run_trend(first, load_input(first, DEMO))
    run = first.get_run(fitted.run_id)
    assert run.result is not None
    first.finish_run(run.id, {**run.result, PROFILE_KEY: profiles_to_json({"binomial": open_end})}, seconds=0.0)
    first.dispose()
    fresh = Store(url)
    again = run_trend(fresh, load_input(fresh, DEMO)).fit
    assert len(searches) == 1  # read, not searched
    assert again.profiles["binomial"] == open_end
    assert again.conf_int["profile"] == (0.0, math.exp(0.05))
    assert "The lower end is open (a note)." in again.messages
    fresh.dispose()
