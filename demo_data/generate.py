"""Seeded generator of the invented demo roster (every company, person and number here is made up).

Run ``python demo_data/generate.py [--out PATH] [--seed N]`` to write the CSV, or import
``generate_roster(seed=...)`` for a DataFrame and ``TRUTH`` for the parameters it was drawn from.

The scenario, in the order the draws happen:

1. About 600 invented companies in ten sectors, listed for fiscal years 1995-2024.
2. Each firm-year has at most one chief-executive departure, with probability
   ``expit(logit(base_rate) + u_f)``, ``u_f ~ N(0, departure_rate_firm_sd)`` (some firms churn more).
3. Each departure is forced with probability ``expit(b0 + sector_intercept + sector_slope * (year - 2010)
   + v_f)``, ``v_f ~ N(0, firm_sd)``; u and v are independent.
4. A reason code in the roster's own wording is drawn from the generator's forced or voluntary list; a
   small share of departures is recorded as "Unknown" whatever its real kind.
5. Interim chiefs who follow some departures leave again a few months later ("Interim term ended");
   some firms carry a "Still in post" row for the serving chief; a few rows say "Data error".
6. Only a fraction of the records of 1995-1997 and 2023-2024 is kept (thin coverage), then the mess:
   rows that cannot be parsed and exact duplicate rows.

Because of the firm effect ``v_f`` the population-averaged share follows a flatter curve than the
firm-level one, so the plain binomial GLM of forced share on year recovers the *marginal* odds ratio,
computed here by Gauss-Hermite integration (``TRUTH["marginal_odds_ratio_per_year"]``).
"""

from __future__ import annotations

import argparse
import math
from datetime import date, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

DEFAULT_SEED = 20240611
COLUMNS = ("Issuer Code", "Issuer Name", "Industry", "FY", "Exit Date", "Exit Reason", "Executive",
           "Age at Exit", "Years in Role", "Interim?", "Comment")

# Sector sizes sum to 600; the two sectors whose trends differ are larger so the difference shows.
SECTOR_FIRMS = {
    "Technology": 90, "Utilities": 80, "Financials": 56, "Industrials": 56, "Healthcare": 54,
    "Energy": 54, "Consumer Goods": 54, "Retail": 52, "Materials": 52, "Telecommunications": 52,
}
SECTOR_INTERCEPTS = {
    "Technology": 0.20, "Utilities": -0.30, "Financials": 0.15, "Industrials": 0.0, "Healthcare": -0.10,
    "Energy": 0.10, "Consumer Goods": -0.05, "Retail": 0.25, "Materials": 0.05, "Telecommunications": -0.15,
}
B0 = -1.10
B1 = 0.035
FIRM_SD = 0.4
SECTOR_SLOPES = {s: B1 for s in SECTOR_FIRMS} | {"Technology": 0.12, "Utilities": -0.04}

FORCED_CODES = {"Dismissed by board": 0.35, "Stepped down under pressure": 0.30,
                "Ousted after activist campaign": 0.15, "Terminated for cause": 0.20}
VOLUNTARY_CODES = {"Retired": 0.40, "Left for another post": 0.22, "Resigned - personal reasons": 0.15,
                   "Merger - role eliminated": 0.10, "Health reasons": 0.08, "Died in office": 0.05}
EXCLUDED_CODES = ("Interim term ended", "Still in post", "Unknown", "Data error")

YEARS = (1995, 2024)
CENTRE_YEAR = 2010
FULL_COVERAGE = (1998, 2022)
COVERAGE_FRACTION = {1995: 0.22, 1996: 0.27, 1997: 0.33, 2023: 0.30, 2024: 0.20}


def _marginal_slopes() -> tuple[float, float]:
    """Pseudo-true slopes of ``logit(share) ~ year`` fitted to the population-averaged shares.

    Returns the pooled slope over the full-coverage window (all sectors, weighted by their expected
    departures) and the slope for a sector that follows the common b1 (attenuation alone).
    """
    nodes, weights = np.polynomial.hermite_e.hermegauss(60)
    weights = weights / weights.sum()
    years = np.arange(FULL_COVERAGE[0], FULL_COVERAGE[1] + 1, dtype=float)
    t = years - CENTRE_YEAR

    def averaged(eta: np.ndarray) -> np.ndarray:
        return (1.0 / (1.0 + np.exp(-(eta[:, None] + FIRM_SD * nodes[None, :])))) @ weights

    def slope(shares: np.ndarray, n: np.ndarray, tt: np.ndarray) -> float:
        # Newton-Raphson for a weighted two-parameter logistic fit to expected proportions.
        x = np.column_stack([np.ones_like(tt), tt])
        beta = np.zeros(2)
        for _ in range(50):
            p = 1.0 / (1.0 + np.exp(-(x @ beta)))
            step = np.linalg.solve(x.T @ (x * (n * p * (1 - p))[:, None]), x.T @ (n * (shares - p)))
            beta += step
            if np.abs(step).max() < 1e-13:
                break
        return float(beta[1])

    shares, n, tt = [], [], []
    for sector, firms in SECTOR_FIRMS.items():
        shares.append(averaged(B0 + SECTOR_INTERCEPTS[sector] + SECTOR_SLOPES[sector] * t))
        n.append(np.full_like(t, float(firms)))
        tt.append(t)
    pooled = slope(np.concatenate(shares), np.concatenate(n), np.concatenate(tt))
    baseline = slope(averaged(B0 + B1 * t), np.ones_like(t), t)
    return pooled, baseline


_POOLED, _BASELINE = _marginal_slopes()

TRUTH: dict[str, Any] = {
    "default_seed": DEFAULT_SEED,
    "firms": sum(SECTOR_FIRMS.values()),
    "years": YEARS,
    "full_coverage": FULL_COVERAGE,
    "coverage_fraction": dict(COVERAGE_FRACTION),
    "departure_base_rate": 0.115,
    "departure_rate_firm_sd": 0.5,
    "centre_year": CENTRE_YEAR,
    "b0": B0,
    "b1": B1,
    "odds_ratio_per_year": math.exp(B1),
    "firm_sd": FIRM_SD,
    "sector_firms": dict(SECTOR_FIRMS),
    "sector_intercepts": dict(SECTOR_INTERCEPTS),
    "sector_slopes": dict(SECTOR_SLOPES),
    "steep_sector": "Technology",
    "falling_sector": "Utilities",
    "marginal_b1_common_sectors": _BASELINE,
    "marginal_odds_ratio_per_year_common_sectors": math.exp(_BASELINE),
    "marginal_b1": _POOLED,
    "marginal_odds_ratio_per_year": math.exp(_POOLED),
    "code_categories": ({c: "forced" for c in FORCED_CODES} | {c: "voluntary" for c in VOLUNTARY_CODES}
                        | {c: "excluded" for c in EXCLUDED_CODES}),
    "ambiguous_codes": ("Stepped down under pressure", "Merger - role eliminated"),
    "unknown_share": 0.03,
    "interim_after_forced": 0.25,
    "still_in_post_share": 0.25,
    "data_error_rows": 6,
    "duplicate_rows": 10,
    "unparseable": {"impossible_date": "31/02/2011", "missing_issuer_code": 1, "bad_year": "20O9",
                    "missing_reason": 1},
}

# Invented word parts: combinations are checked to be unique, not to be absent from the world, so
# the parts are chosen to be unusual.
_NAME_HEADS = ("Quor", "Vell", "Brix", "Tamar", "Oskel", "Zephr", "Marnov", "Caldre", "Ulvan", "Dressa",
               "Kelvo", "Noram", "Pyxel", "Ostra", "Wendal", "Fennir", "Harvo", "Istel", "Jorun", "Lumek",
               "Sarvel", "Gavrin", "Teloq", "Brannic", "Ymber", "Corvad", "Elstro", "Aurel", "Dunvar", "Rhoss")
_NAME_TAILS = ("ex", "ion", "ant", "ora", "is", "eth", "anta", "ium", "ova", "ara", "eon", "ix")
_NAME_FORMS = ("Holdings", "Group", "Industries", "plc", "Systems", "Partners", "Corporation", "Works")
_FIRST = ("Maren", "Tobiah", "Ilsa", "Corwin", "Adaeze", "Priya", "Tomasz", "Sunniva", "Rafe", "Odile",
          "Kenji", "Lucia", "Emeka", "Vesna", "Hollis", "Annika", "Dario", "Mireille", "Osric", "Yara",
          "Bastian", "Niamh", "Teodor", "Saoirse", "Idris", "Felka", "Lorcan", "Zofia", "Amara", "Evander")
_LAST_HEADS = ("Brack", "Quill", "Ostr", "Wend", "Harl", "Fenn", "Corv", "Dalm", "Trell", "Ambr",
               "Kest", "Marl", "Pell", "Thorv", "Sabl")
_LAST_TAILS = ("enby", "owick", "ander", "ismere", "ucott", "aven", "ethorpe", "ingle", "ardine", "olm")
_COMMENTS = ("Announced at AGM", "Successor named same day", "Effective end of quarter",
             "Per company announcement", "Effective immediately")


def _firm_names(rng: np.random.Generator, n: int) -> list[str]:
    names = [f"{h}{t} {form}" for h in _NAME_HEADS for t in _NAME_TAILS for form in _NAME_FORMS]
    return [names[i] for i in rng.choice(len(names), size=n, replace=False)]


def _person(rng: np.random.Generator) -> str:
    last = _LAST_HEADS[int(rng.integers(len(_LAST_HEADS)))] + _LAST_TAILS[int(rng.integers(len(_LAST_TAILS)))]
    return f"{_FIRST[int(rng.integers(len(_FIRST)))]} {last}"


def _expit(x: float) -> float:
    return 1.0 / (1.0 + math.exp(-x))


def _pick(rng: np.random.Generator, weights: dict[str, float]) -> str:
    codes = list(weights)
    p = np.array([weights[c] for c in codes])
    return codes[int(rng.choice(len(codes), p=p / p.sum()))]


def _voluntary_code(rng: np.random.Generator, age: int) -> str:
    # Older chiefs mostly retire; the category was already drawn, so this shapes wording only.
    weights = dict(VOLUNTARY_CODES)
    weights["Retired"] *= 2.0 if age >= 60 else (0.3 if age < 50 else 1.0)
    return _pick(rng, weights)


def _row(firm: dict[str, str], fy: int, exit_date: date | None, reason: str, person: str,
         age: int | None, start: date, interim: bool, comment: str = "") -> dict[str, str]:
    end = exit_date or date(YEARS[1], 12, 31)
    return {
        "Issuer Code": firm["code"], "Issuer Name": firm["name"], "Industry": firm["sector"],
        "FY": str(fy), "Exit Date": exit_date.strftime("%d/%m/%Y") if exit_date else "",
        "Exit Reason": reason, "Executive": person, "Age at Exit": "" if age is None else str(age),
        "Years in Role": f"{(end - start).days / 365.25:.1f}", "Interim?": "Y" if interim else "N",
        "Comment": comment,
    }


def _firm_records(rng: np.random.Generator, firm: dict[str, str]) -> list[dict[str, str]]:
    """Every record of one firm: departures, interim exits and possibly a still-in-post row."""
    sector = firm["sector"]
    churn = rng.normal(0.0, TRUTH["departure_rate_firm_sd"])
    v = rng.normal(0.0, FIRM_SD)
    rate = _expit(math.log(TRUTH["departure_base_rate"] / (1 - TRUTH["departure_base_rate"])) + churn)
    exits = []
    for year in range(YEARS[0], YEARS[1] + 1):
        if rng.random() < rate:
            exits.append(date(year, 1, 1) + timedelta(days=int(rng.integers(0, 365))))
    records: list[dict[str, str]] = []
    person, start = _person(rng), date(YEARS[0], 1, 1) - timedelta(days=int(rng.integers(100, 4500)))
    birth_age = int(rng.integers(42, 60)) - (YEARS[0] - start.year)  # age at appointment
    for i, exit_date in enumerate(exits):
        year = exit_date.year
        age = birth_age + (exit_date - start).days // 365
        eta = B0 + SECTOR_INTERCEPTS[sector] + SECTOR_SLOPES[sector] * (year - CENTRE_YEAR) + v
        forced = rng.random() < _expit(eta)
        reason = _pick(rng, FORCED_CODES) if forced else _voluntary_code(rng, age)
        if rng.random() < TRUTH["unknown_share"]:
            reason = "Unknown"
        comment = _COMMENTS[int(rng.integers(len(_COMMENTS)))] if rng.random() < 0.08 else ""
        records.append(_row(firm, year, exit_date, reason, person, age, start, False, comment))
        next_start = exit_date + timedelta(days=1)
        nxt = exits[i + 1] if i + 1 < len(exits) else date(YEARS[1] + 1, 6, 30)
        if forced and rng.random() < TRUTH["interim_after_forced"]:
            interim_end = exit_date + timedelta(days=int(rng.integers(60, 240)))
            if (nxt - interim_end).days > 90 and interim_end.year <= YEARS[1]:
                interim = _person(rng)
                records.append(_row(firm, interim_end.year, interim_end, "Interim term ended", interim,
                                    int(rng.integers(48, 66)), next_start, True, "Interim while search ran"))
                next_start = interim_end + timedelta(days=1)
        person, start = _person(rng), next_start
        birth_age = int(rng.integers(40, 58))
    if rng.random() < TRUTH["still_in_post_share"]:
        records.append(_row(firm, YEARS[1], None, "Still in post", person, None, start, False))
    return records


def _thin(rng: np.random.Generator, frame: pd.DataFrame) -> pd.DataFrame:
    """Keep only a fraction of the departure records in the thin years (still-in-post rows stay)."""
    fy = frame["FY"].astype(int)
    keep_p = fy.map(COVERAGE_FRACTION).fillna(1.0).to_numpy(dtype=float, copy=True)
    keep_p[(frame["Exit Reason"] == "Still in post").to_numpy()] = 1.0
    return frame.loc[rng.random(len(frame)) < keep_p].reset_index(drop=True)


def _add_mess(rng: np.random.Generator, frame: pd.DataFrame) -> pd.DataFrame:
    """Data errors, rows that cannot be parsed, and exact duplicates."""
    frame = frame.copy()
    departures = frame.index[(frame["Exit Reason"] != "Still in post") & frame["FY"].astype(int).between(
        FULL_COVERAGE[0] + 1, FULL_COVERAGE[1] - 1)].to_numpy()
    chosen = rng.choice(departures, size=TRUTH["data_error_rows"] + 4, replace=False)
    errors, (bad_date, no_code, bad_year, no_reason) = chosen[:-4], chosen[-4:]
    frame.loc[errors, "Exit Reason"] = "Data error"
    frame.loc[errors, "Comment"] = "Superseded entry, see corrected row"
    frame.loc[bad_date, ["FY", "Exit Date"]] = ["2011", TRUTH["unparseable"]["impossible_date"]]
    frame.loc[no_code, "Issuer Code"] = ""
    frame.loc[bad_year, "FY"] = TRUTH["unparseable"]["bad_year"]
    frame.loc[no_reason, "Exit Reason"] = ""
    # Duplicates sit right after their originals, as a re-keyed provider extract would leave them.
    dupes = set(rng.choice(np.setdiff1d(frame.index.to_numpy(), chosen), size=TRUTH["duplicate_rows"],
                           replace=False).tolist())
    order = [i for idx in frame.index for i in ([idx, idx] if idx in dupes else [idx])]
    return frame.loc[order].reset_index(drop=True)


def generate_roster(seed: int = DEFAULT_SEED) -> pd.DataFrame:
    """Draw the invented roster: one row per record, every cell a string, columns ``COLUMNS``."""
    rng = np.random.default_rng(seed)
    sectors = [s for s, n in SECTOR_FIRMS.items() for _ in range(n)]
    names = _firm_names(rng, len(sectors))
    codes = rng.choice(np.arange(1000, 10000), size=len(sectors), replace=False)
    firms = [{"code": f"HX{c}", "name": nm, "sector": s} for c, nm, s in zip(codes, names, sectors, strict=True)]
    records = [r for firm in firms for r in _firm_records(rng, firm)]
    frame = pd.DataFrame.from_records(records, columns=list(COLUMNS))
    frame["_order"] = frame["Exit Date"].map(
        lambda d: d[6:] + d[3:5] + d[:2] if d else "99999999")
    frame = frame.sort_values(["FY", "Issuer Code", "_order"], kind="stable").drop(columns="_order")
    frame = _thin(rng, frame.reset_index(drop=True))
    return _add_mess(rng, frame)


def write_roster(path: Path, seed: int = DEFAULT_SEED) -> pd.DataFrame:
    """Write the roster as UTF-8 CSV with ``\\n`` line ends; returns the frame written."""
    frame = generate_roster(seed)
    path.parent.mkdir(parents=True, exist_ok=True)
    frame.to_csv(path, index=False, lineterminator="\n")
    return frame


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Write the invented Helmshift demo roster.")
    parser.add_argument("--out", type=Path, default=Path(__file__).with_name("roster.csv"))
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED)
    args = parser.parse_args(argv)
    frame = write_roster(args.out, args.seed)
    print(f"wrote {len(frame)} rows to {args.out} (seed {args.seed})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
