"""Mapping files for a roster: import a CSV as the next version of a mapping, export a version as CSV."""

from __future__ import annotations

from typing import Any

from app.intake.reasons import parse_mapping_csv, unknown_codes
from app.intake.rule_files import parse_rules_csv, rules_csv
from app.intake.spreadsheet_safety import safe_csv
from app.store import Store


def import_mapping_file(store: Store, data: bytes, *, roster: int | str, name: str,
                        author: str = "analyst", rules: bytes | None = None) -> dict[str, Any]:
    """Save a mapping CSV (and optionally a rules CSV) as the next version of ``name``; report codes not
    in the roster.

    Unknown categories, spellings of one code with two categories, or a bad rule reject both files (nothing
    saved). Codes that do not occur in this roster (matched by code key) are kept (they serve other rosters)
    and reported; so are rules whose code the mapping does not list.
    """
    target = store.get_roster(roster)
    parsed = parse_mapping_csv(data)
    parsed_rules = parse_rules_csv(rules) if rules is not None else ()
    roster_codes = set(store.reason_counts(target.id)["code"].astype(str))
    saved = store.save_mapping_version(name, parsed.categories, parsed.labels, author=author,
                                       note=f"imported from CSV for roster {target.name}", rules=parsed_rules)
    if store.settings(target.id).mapping_name is None:
        store.update_settings(target.id, mapping_name=name)
    # by the code key (issue 14): "RETIRED" in the file names the roster's "Retired"
    not_in_roster = unknown_codes(parsed.categories, roster_codes)
    unmapped = unknown_codes(roster_codes, parsed.categories)
    return {"mapping": saved.name, "version": saved.version, "codes": len(saved.categories),
            "not_in_roster": not_in_roster, "unmapped_in_roster": unmapped,
            "rules": [r.describe() for r in saved.rules],
            "rules_for_unlisted_codes": sorted({r.code for r in saved.rules} - set(saved.categories))}


def export_rules_csv(store: Store, *, name: str, version: int | None = None) -> str:
    """A mapping version's rules as ``code,field,comparison,value,category`` CSV, in evaluation order."""
    return rules_csv(store.get_mapping(name, version).rules)


def export_mapping_csv(store: Store, *, name: str, version: int | None = None) -> str:
    mapping = store.get_mapping(name, version)
    rows = [[code, cat, mapping.labels.get(code, "")] for code, cat in sorted(mapping.categories.items())]
    return safe_csv(rows, ["code", "category", "label"])
