"""Reason codes: a first suggestion of categories, the mapping CSV format, and version differences.

The suggestion is only a starting point for the analyst, who confirms every code; codes it cannot
place stay unmapped rather than being guessed.
"""

from __future__ import annotations

import csv
import io
import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field

from app.intake.spreadsheet_safety import FORMULA_TRIGGERS, neutralise_formula
from app.stats.cells import code_key
from app.types import CATEGORIES, Category

# Word lists: common practice in governance research (the usual reading of forced-turnover studies, from
# memory), not a standard; every suggestion is a starting point the analyst confirms before it is saved. Each
# entry is matched at the start of a word ("dismiss" matches "dismissed", "dismissal"); entries of three
# letters or fewer must match a whole word. A departure "under pressure" is read as forced, but "pressure" is
# also an ambiguity marker, so such codes are always flagged for the analyst.
WORDS: dict[Category, tuple[str, ...]] = {
    "forced": (
        "dismiss", "removed", "removal", "oust", "fired", "terminated", "termination", "sacked",
        "forced", "activist", "no confidence", "under pressure", "pushed out", "misconduct",
        "for cause", "replaced by board", "asked to leave", "asked to resign", "let go",
    ),
    # A departure is voluntary unless a source says it was forced: a plain resignation counts as voluntary.
    "voluntary": (
        "retire", "resign", "step down", "stood down", "step aside", "new role", "new job", "another post", "another job", "other position",
        "another company", "other opportunit", "left for", "left to join", "personal reasons", "family",
        "succession plan",
    ),
    # Interim chiefs leaving at the end of an agreed term did not depart by anyone's decision. A death or an
    # illness is neither the board's decision nor a career move, and a departure when the firm merges or is
    # taken over follows a change of control: such departures are usually left out of forced-versus-voluntary
    # comparisons (a merger is also flagged, as it can hide a forced exit).
    "excluded": (
        "still in post", "incumbent", "serving", "unknown", "data error", "n a", "not applicable",
        "interim term", "interim ended", "duplicate", "death", "died", "deceased", "passed away", "illness",
        "health", "medical", "merger", "merged", "acquisition", "acquire", "acquiring", "takeover", "taken over",
    ),
}
AMBIGUITY_MARKERS: tuple[str, ...] = (
    "pressure", "merger", "merged", "acquisition", "acquire", "acquiring", "takeover", "taken over", "restructur",
    "mutual agreement", "mutually", "agreed", "disagreement", "reorgani", "spin off", "role eliminated",
)
#: what the analyst should know about a suggestion from these words: the practice it follows (said on the page)
PRACTICE_NOTES: tuple[tuple[tuple[str, ...], str], ...] = (
    (("resign", "step down", "stood down", "step aside"),
     "a resignation counts as voluntary unless a source says it was forced"),
    (("death", "died", "deceased", "passed away", "illness", "health", "medical"),
     "a death or an illness is left out, as nobody decided it (some analysts count it as voluntary)"),
    (("merger", "merged", "acquisition", "acquire", "acquiring", "takeover", "taken over"),
     "a departure at a merger or takeover is left out, as control changed hands (it can hide a forced exit)"),
)


def _tokens(text: str) -> list[str]:
    return re.sub(r"[^0-9a-z]+", " ", text.lower()).split()


def _matches(phrase: str, tokens: list[str]) -> bool:
    words = _tokens(phrase)
    for start in range(len(tokens) - len(words) + 1):
        if all(tok == w if len(w) <= 3 else tok.startswith(w)
               for w, tok in zip(words, tokens[start:start + len(words)], strict=True)):
            return True
    return False


@dataclass(frozen=True)
class Suggestion:
    """The suggested category of one reason code and why.

    ``category`` is None when no word list matched, or when words of more than one category did.
    An ambiguous code may still carry a category (its one matching list) for the analyst to confirm.
    """

    code: str
    category: Category | None
    matched: tuple[str, ...]
    ambiguous: bool
    why: str


def suggest_category(code: str) -> Suggestion:
    """Suggest a category for one reason code from the word lists."""
    tokens = _tokens(code)
    hits = {cat: tuple(w for w in WORDS[cat] if _matches(w, tokens)) for cat in CATEGORIES}
    cats = [cat for cat in CATEGORIES if hits[cat]]
    markers = tuple(m for m in AMBIGUITY_MARKERS if _matches(m, tokens))
    words = tuple(w for cat in cats for w in hits[cat])
    matched = words + tuple(m for m in markers if m not in words)
    category: Category | None = cats[0] if len(cats) == 1 else None
    ambiguous = bool(markers) or len(cats) > 1
    described = "; ".join(f"{cat} words: {', '.join(hits[cat])}" for cat in cats)
    # the practice behind a one-category suggestion (with two, the analyst weighs the words themselves)
    notes = [note for listed, note in PRACTICE_NOTES if len(cats) == 1 and any(w in matched for w in listed)]
    # a marker that is also one of the category's words (a merger) is explained by its note, not repeated
    doubtful = tuple(m for m in markers if m not in words)
    if len(cats) > 1:
        why = f"matches more than one category ({described}); left unmapped for the analyst to decide."
    elif markers and category:
        why = (f"{described}, but {', '.join(doubtful)} can mean otherwise; please confirm." if doubtful
               else f"{described}; please confirm.")
    elif markers:
        why = f"mentions {', '.join(markers)}, which could be any category; left unmapped."
    elif category:
        why = f"{described}."
    else:
        why = "no known words; left unmapped."
    if notes:
        why += " Common practice: " + "; ".join(notes) + "."
    return Suggestion(code=code, category=category, matched=matched, ambiguous=ambiguous, why=why)


def suggest_categories(codes: Iterable[str]) -> dict[str, Suggestion]:
    """Suggest a category for each distinct reason code (see :func:`suggest_category`)."""
    return {code: suggest_category(code) for code in dict.fromkeys(str(c) for c in codes)}


class MappingFileError(ValueError):
    """A mapping CSV that cannot be used; the message names the line and the fix."""

    def __init__(self, message: str, line: int | None = None) -> None:
        super().__init__(message)
        self.line = line


@dataclass(frozen=True)
class ParsedMapping:
    """Codes and categories (and optional labels) read from a mapping CSV, with their line numbers.

    Spellings of one code (same :func:`code_key`) that name the same category are one entry, under the first
    spelling; ``merged`` lists the others as (line, spelling) per kept code.
    """

    categories: dict[str, Category]
    labels: dict[str, str]
    lines: dict[str, int]
    merged: dict[str, tuple[tuple[int, str], ...]] = field(default_factory=dict)


def _restore(cell: str) -> str:
    # Undo the apostrophe mapping_csv adds before a formula trigger, so exports round-trip.
    if len(cell) > 1 and cell[0] == "'" and cell[1] in FORMULA_TRIGGERS:
        return cell[1:]
    return cell


def refuse_nul_line(text: str, what: str) -> None:
    """A NUL character has no place in a code, category, label or rule (and PostgreSQL text cannot hold one)."""
    if "\x00" in text:
        line = text.count("\n", 0, text.index("\x00")) + 1
        raise MappingFileError(f"The {what} file has a NUL character (U+0000) on line {line}; "
                               "save it again as CSV UTF-8 and try again. Nothing was saved.", line)


def parse_mapping_csv(data: bytes) -> ParsedMapping:
    """Read ``code,category[,label]`` rows; the whole file is rejected at the first bad line.

    A header row (``code,category[,label]``) is optional but recommended. The file must be UTF-8
    (a byte-order mark is allowed). Blank lines are ignored; categories are case-insensitive; cells
    are stripped of surrounding spaces. Codes match by :func:`code_key` (issue 14): a later spelling of a
    code already read is merged into it when it names the same category and rejects the file, naming both
    lines, when it does not.
    """
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise MappingFileError(f"The mapping file is not UTF-8 text (byte {exc.start}); "
                               "save it as CSV UTF-8 and try again.") from exc
    refuse_nul_line(text, "mapping")
    categories: dict[str, Category] = {}
    labels: dict[str, str] = {}
    lines: dict[str, int] = {}
    first_spelling: dict[str, str] = {}  # code key -> the spelling kept
    merged: dict[str, list[tuple[int, str]]] = {}
    reader = csv.reader(io.StringIO(text, newline=""))
    first = True
    for row in reader:
        line = reader.line_num
        cells = [c.strip() for c in row]
        if not any(cells):
            continue
        if first and [c.lower() for c in cells[:2]] == ["code", "category"]:
            first = False
            continue
        first = False
        if len(cells) < 2 or len(cells) > 3:
            raise MappingFileError(f"Line {line}: expected code,category[,label] but found "
                                   f"{len(cells)} column(s).", line)
        code, value = _restore(cells[0]), cells[1].lower()
        if not code:
            raise MappingFileError(f"Line {line}: the code is empty.", line)
        category = next((c for c in CATEGORIES if c == value), None)
        if category is None:
            raise MappingFileError(f"Line {line}: category {cells[1]!r} for code {code!r} is not one of "
                                   f"{', '.join(CATEGORIES)}.", line)
        label = _restore(cells[2]) if len(cells) == 3 else ""
        kept = first_spelling.get(code_key(code))
        if kept is not None:  # one code, spelt again: merged when it says the same, refused when it does not
            if categories[kept] != category:
                said = (f"already appears on line {lines[kept]}" if kept == code
                        else f"is a spelling of {kept!r} on line {lines[kept]}")
                raise MappingFileError(
                    f"Line {line}: code {code!r} {said}, which says {categories[kept]}, but this line says "
                    f"{category}; spellings that differ only in case, spaces, dashes or quotes are one code, "
                    "so give it one category.", line)
            merged.setdefault(kept, []).append((line, code))
            if label and kept not in labels:
                labels[kept] = label
            continue
        first_spelling[code_key(code)] = code
        categories[code] = category
        lines[code] = line
        if label:
            labels[code] = label
    if not categories:
        raise MappingFileError("The mapping file has no code,category rows.")
    return ParsedMapping(categories=categories, labels=labels, lines=lines,
                         merged={k: tuple(v) for k, v in merged.items()})


def mapping_csv(categories: Mapping[str, str], labels: Mapping[str, str] | None = None) -> str:
    """Write a mapping as ``code,category,label`` CSV text, sorted by code, safe to open in a spreadsheet."""
    labels = labels or {}
    buf = io.StringIO(newline="")
    writer = csv.writer(buf, lineterminator="\r\n")
    writer.writerow(["code", "category", "label"])
    for code in sorted(categories):
        category = categories[code]
        if category not in CATEGORIES:
            raise ValueError(f"category must be one of {', '.join(CATEGORIES)}; got {category!r} "
                             f"for code {code!r}.")
        writer.writerow([neutralise_formula(code), category, neutralise_formula(labels.get(code, ""))])
    return buf.getvalue()


@dataclass(frozen=True)
class MappingDiff:
    """What changed between two mapping versions, each part sorted by code."""

    added: tuple[tuple[str, str], ...]  # (code, category)
    removed: tuple[tuple[str, str], ...]  # (code, category)
    moved: tuple[tuple[str, str, str], ...]  # (code, from, to)
    relabelled: tuple[tuple[str, str, str], ...]  # (code, old label, new label)

    @property
    def unchanged(self) -> bool:
        return not (self.added or self.removed or self.moved or self.relabelled)


def diff_mappings(old: Mapping[str, str], new: Mapping[str, str],
                  old_labels: Mapping[str, str] | None = None,
                  new_labels: Mapping[str, str] | None = None) -> MappingDiff:
    """Compare two mappings: codes added, removed, moved to another category, or relabelled.

    Labels are compared only for codes in both versions, and only when both label sets are given;
    a missing label counts as the empty string.
    """
    both = sorted(set(old) & set(new))
    relabelled: tuple[tuple[str, str, str], ...] = ()
    if old_labels is not None and new_labels is not None:
        relabelled = tuple((c, old_labels.get(c, ""), new_labels.get(c, "")) for c in both
                           if old_labels.get(c, "") != new_labels.get(c, ""))
    return MappingDiff(
        added=tuple((c, new[c]) for c in sorted(set(new) - set(old))),
        removed=tuple((c, old[c]) for c in sorted(set(old) - set(new))),
        moved=tuple((c, old[c], new[c]) for c in both if old[c] != new[c]),
        relabelled=relabelled,
    )


def unknown_codes(mapping_codes: Iterable[str], roster_codes: Iterable[str]) -> list[str]:
    """Codes a mapping names that the roster never uses, sorted (usually a typo or another roster's code).

    Codes match by :func:`code_key`: "RETIRED " names the roster's "Retired".
    """
    used = {code_key(c) for c in roster_codes}
    return sorted({c for c in mapping_codes if code_key(c) not in used})
