"""Redraw a finished bootstrap run with this installation's engine and compare it with what the run stored.

A replication pack lets anyone recompute a run's intervals from its stored replicates without Helmshift; this
check goes one step further back: it draws every resample again from the run's recorded roster version,
mapping version, window, seed, sampler and options, exactly as the job did (in the job's chunks), and says
whether each replicate, failure reason and standard error is the same bit for bit, and how far the intervals
recomputed from the redrawn replicates lie from the stored ones. It is the check to run before quoting an old
run again after an upgrade or a move to another machine.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from app.analysis.jobs import CHUNK, RunDraw
from app.stats.bootstrap import Replicates
from app.store import Store, StoreError

#: what may differ between two computations of one run's summary without meaning anything: its timing
NOT_COMPARED = frozenset({"seconds"})
#: a recomputed summary within this relative difference of the stored one passes ``helmshift run check``: the
#: jackknife's linear algebra may round differently with another BLAS thread count or CPU (seen: 1e-15 in the
#: acceleration), 1e-9 is still six digits below the three decimals every page and export shows
SUMMARY_TOLERANCE = 1e-9


@dataclass(frozen=True)
class RunCheck:
    """What redrawing a run found."""

    run_id: int
    resamples: int
    sampler: int
    #: resamples whose estimate, failure reason or standard error differs from the stored one
    differing: int
    #: the first such resample (0-based, in resample order), None when none differs
    first_difference: int | None
    #: the largest absolute difference between a stored and a redrawn estimate (both fitted)
    largest_estimate_difference: float
    #: the largest relative difference between a number of the stored summary and the recomputed one
    #: (intervals, Monte Carlo errors, jackknife acceleration, bias, ...), and the key where it is
    largest_summary_difference: float
    summary_key: str | None

    @property
    def identical(self) -> bool:
        return self.differing == 0 and self.largest_summary_difference == 0.0

    @property
    def passed(self) -> bool:
        """Every replicate the same, and the summary within ``SUMMARY_TOLERANCE`` of the stored one."""
        return self.differing == 0 and self.largest_summary_difference <= SUMMARY_TOLERANCE

    def sentence(self) -> str:
        head = f"Run {self.run_id}: {self.resamples:,} resamples redrawn with sampler {self.sampler}"
        if self.differing:
            return (f"{head}; {self.differing:,} differ from the stored ones (the first is resample "
                    f"{self.first_difference}; largest difference of an estimate {self.largest_estimate_difference:.3g}). "
                    "The stored numbers are not what this installation draws: do not quote them as reproduced.")
        if self.largest_summary_difference == 0.0:
            return f"{head}: every replicate and every number of the summary is the same, bit for bit."
        return (f"{head}: every replicate is the same bit for bit; the recomputed summary differs from the stored "
                f"one by at most {self.largest_summary_difference:.2g} relative (at {self.summary_key}), "
                "the rounding of another machine's linear algebra, far below any digit a page shows.")

    def as_dict(self) -> dict[str, Any]:
        return {"run": self.run_id, "resamples": self.resamples, "sampler": self.sampler,
                "identical": self.identical, "differing": self.differing, "first_difference": self.first_difference,
                "largest_estimate_difference": self.largest_estimate_difference,
                "largest_summary_difference": self.largest_summary_difference, "summary_key": self.summary_key,
                "sentence": self.sentence()}


def check_run(store: Store, run_id: int) -> RunCheck:
    """Redraw finished bootstrap run ``run_id`` and compare (see the module's docstring)."""
    run = store.get_run(run_id)
    if run.kind != "bootstrap" or run.status != "done":
        raise StoreError(f"Run {run_id} is a {run.status} {run.kind} run; only a finished bootstrap run can be "
                         "redrawn and compared.")
    stored, reasons = store.replicates_with_failures(run_id)
    target = int(run.params["resamples"])
    if len(stored) != target:
        raise StoreError(f"Run {run_id} stored {len(stored):,} replicates of its {target:,} (a firm bootstrap of an "
                         "adjusted fit stores none): there is nothing to compare.")
    try:
        draw = RunDraw.of(store, run)
    except ValueError as exc:
        raise StoreError(f"Run {run_id} cannot be redrawn: {exc}") from exc
    blocks = [draw.chunk(start) for start in range(0, target, CHUNK)]  # the job's chunks
    estimates = np.concatenate([b.estimates for b in blocks])
    failures = [str(r) for b in blocks for r in b.failure.tolist()]
    errors = (None if any(b.standard_errors is None for b in blocks)
              else np.concatenate([np.asarray(b.standard_errors) for b in blocks]))
    stored_errors = store.replicate_standard_errors(run_id)

    differs = ~_same_bits(stored, estimates) | (np.asarray([str(r) for r in reasons]) != np.asarray(failures))
    if (errors is None) != (stored_errors is None):
        differs[:] = True
    elif errors is not None and stored_errors is not None:
        differs |= ~_same_bits(stored_errors, errors)
    both = np.isfinite(stored) & np.isfinite(estimates)
    largest = float(np.max(np.abs(stored[both] - estimates[both]), initial=0.0))

    summary = draw.summary(Replicates(0, estimates, np.asarray(failures, dtype=object), 0.0, errors))
    gap, where = _largest_gap(run.result or {}, summary, "")
    indices = np.flatnonzero(differs)
    return RunCheck(run_id=run_id, resamples=target, sampler=draw.sampler, differing=int(indices.size),
                    first_difference=int(indices[0]) if indices.size else None, largest_estimate_difference=largest,
                    largest_summary_difference=gap, summary_key=where)


def _same_bits(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Element-wise: the same float64 bit pattern (so NaN equals NaN, and 0.0 differs from -0.0)."""
    return np.ascontiguousarray(a, dtype="<f8").view("<u8") == np.ascontiguousarray(b, dtype="<f8").view("<u8")


def _largest_gap(stored: Any, again: Any, key: str) -> tuple[float, str | None]:
    """The largest relative difference between the numbers of two summaries (walked together), and its key; a
    key one has and the other lacks, or a number against a non-number, counts as infinitely far."""
    if isinstance(stored, dict) and isinstance(again, dict):
        gap, where = 0.0, None
        for k in sorted(set(stored) | set(again)):
            if k in NOT_COMPARED:
                continue
            if k not in stored or k not in again:
                return math.inf, f"{key}{k}"
            g, w = _largest_gap(stored[k], again[k], f"{key}{k}.")
            if g > gap:
                gap, where = g, w
        return gap, where
    if isinstance(stored, (list, tuple)) and isinstance(again, (list, tuple)):
        if len(stored) != len(again):
            return math.inf, key.rstrip(".")
        gap, where = 0.0, None
        for i, (s, a) in enumerate(zip(stored, again, strict=True)):
            g, w = _largest_gap(s, a, f"{key}{i}.")
            if g > gap:
                gap, where = g, w
        return gap, where
    numbers = (int, float)
    if isinstance(stored, numbers) and isinstance(again, numbers) and not isinstance(stored, bool):
        s, a = float(stored), float(again)
        if s == a or (math.isnan(s) and math.isnan(a)):
            return 0.0, None
        return abs(s - a) / max(abs(s), abs(a)), key.rstrip(".")
    return (0.0, None) if stored == again else (math.inf, key.rstrip("."))
