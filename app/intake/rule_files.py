"""Classification-rule files: ``code,field,comparison,value,category`` CSV in, the same CSV out.

The whole file is rejected at the first bad line (nothing is saved), with the line and the fix named.
"""

from __future__ import annotations

import csv
import io
from collections.abc import Sequence

from app.intake.reasons import MappingFileError, refuse_nul_line
from app.intake.spreadsheet_safety import FORMULA_TRIGGERS, safe_csv
from app.stats.rules import RuleError, make_rule
from app.types import ClassificationRule

RULE_HEADER = ("code", "field", "comparison", "value", "category")


def _restore(cell: str) -> str:
    # undo the apostrophe safe_csv adds before a formula trigger, so exports round-trip
    if len(cell) > 1 and cell[0] == "'" and cell[1] in FORMULA_TRIGGERS:
        return cell[1:]
    return cell


def parse_rules_csv(data: bytes) -> tuple[ClassificationRule, ...]:
    """Rules in file order (the order they are evaluated in). The header row is required."""
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise MappingFileError(f"The rules file is not UTF-8 text (byte {exc.start}); save it as CSV UTF-8 "
                               "and try again.") from exc
    refuse_nul_line(text, "rules")
    reader = csv.reader(io.StringIO(text, newline=""))
    rules: list[ClassificationRule] = []
    header_seen = False
    for row in reader:
        line = reader.line_num
        cells = [c.strip() for c in row]
        if not any(cells):
            continue
        if not header_seen:
            if tuple(c.lower() for c in cells) != RULE_HEADER:
                raise MappingFileError(f"Line {line}: the rules file must start with the header "
                                       f"{','.join(RULE_HEADER)}; found {','.join(cells)!r}.", line)
            header_seen = True
            continue
        if len(cells) != len(RULE_HEADER):
            raise MappingFileError(f"Line {line}: expected {len(RULE_HEADER)} columns "
                                   f"({','.join(RULE_HEADER)}) but found {len(cells)}.", line)
        try:
            rules.append(make_rule(_restore(cells[0]), *cells[1:]))
        except RuleError as exc:
            raise MappingFileError(f"Line {line}: {exc}", line) from None
    if not header_seen:
        raise MappingFileError(f"The rules file is empty; it needs the header {','.join(RULE_HEADER)}.")
    return tuple(rules)


def rules_csv(rules: Sequence[ClassificationRule]) -> str:
    """Rules as CSV in evaluation order, safe to open in a spreadsheet."""
    return safe_csv([[r.code, r.field, r.comparison, r.value, r.category] for r in rules], list(RULE_HEADER))
