"""What the analyst signs a brief and deck with: title, author, date, confidentiality marking, takeaways.

Saved per roster on the Briefing page (app.store.briefing) or given for one export on the command line
(``helmshift export --title --author --marking --date``); blank fields fall back to the defaults below.
"""

from __future__ import annotations

import re
import unicodedata
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import UTC, date, datetime

from app.store import BriefingSettings

LIMITS = {"title": 160, "author": 120, "marking": 60, "takeaway": 400}
DEFAULT_MARKING = ""  # no marking unless the analyst sets one
_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}$")


class SignatureError(ValueError):
    """A field the analyst typed cannot go on a board paper as it is (the message names the field)."""


def default_title(roster_name: str) -> str:
    return f"Forced chief-executive departures: {roster_name}"


def clean_text(value: object, name: str, limit: int) -> str:
    """One line of plain text: trimmed, inner whitespace collapsed, no control characters, at most ``limit``."""
    text = " ".join(str(value or "").split())
    bad = [c for c in text if unicodedata.category(c) in ("Cc", "Cf", "Co", "Cs")]
    if bad:
        raise SignatureError(f"{name}: remove the control character U+{ord(bad[0]):04X}.")
    if len(text) > limit:
        raise SignatureError(f"{name}: at most {limit} characters; got {len(text)}.")
    return text


def clean_date(value: object) -> str:
    """``""`` (the day of the export) or a real ISO date ``YYYY-MM-DD``."""
    text = str(value or "").strip()
    if not text:
        return ""
    if not _DATE.match(text):
        raise SignatureError(f"date: write it as YYYY-MM-DD (for example 2026-12-03); got {text!r}.")
    try:
        date.fromisoformat(text)
    except ValueError as exc:
        raise SignatureError(f"date: {text} is not a calendar date.") from exc
    return text


def clean_takeaways(values: Mapping[str, object], allowed: tuple[str, ...]) -> dict[str, str]:
    """Finding name -> sentence, blank ones dropped (the finding's own takeaway is used for those)."""
    out: dict[str, str] = {}
    for name, value in values.items():
        if name not in allowed:
            raise SignatureError(f"takeaway: no finding called {name!r}; findings: {', '.join(allowed)}.")
        text = clean_text(value, f"takeaway for {name}", LIMITS["takeaway"])
        if text:
            out[name] = text
    return out


@dataclass(frozen=True)
class Signature:
    """Resolved for one export: every field has its final value."""

    title: str
    author: str
    marking: str
    date: date
    takeaways: dict[str, str] = field(default_factory=dict)

    @property
    def date_text(self) -> str:
        return f"{self.date.day} {self.date:%B %Y}"

    def takeaway(self, name: str, default: str) -> str:
        return self.takeaways.get(name) or default

    def byline(self) -> str:
        """E.g. "Prepared by A. Analyst · 3 December 2026 · CONFIDENTIAL" (blank parts left out)."""
        parts = [f"Prepared by {self.author}" if self.author else "Prepared", self.date_text]
        if self.marking:
            parts.append(self.marking)
        return " \u00b7 ".join(parts)


def resolve_signature(saved: BriefingSettings | None, roster_name: str, *, title: str | None = None,
                      author: str | None = None, marking: str | None = None, when: str | None = None) -> Signature:
    """Saved settings, overridden field by field by what was given for this export (``None``: not given)."""
    base = saved or BriefingSettings(0, takeaways={})
    chosen_title = clean_text(title if title is not None else base.title, "title", LIMITS["title"])
    chosen_date = clean_date(when if when is not None else base.date)
    return Signature(
        title=chosen_title or default_title(roster_name),
        author=clean_text(author if author is not None else base.author, "author", LIMITS["author"]),
        marking=clean_text(marking if marking is not None else base.marking, "marking", LIMITS["marking"]),
        date=date.fromisoformat(chosen_date) if chosen_date else datetime.now(UTC).date(),
        takeaways=dict(base.takeaways or {}),
    )
