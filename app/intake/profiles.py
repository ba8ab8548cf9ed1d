"""Intake profiles: read a later file from the same source the way the first was read (issue 14).

A profile (stored by :class:`app.store.profiles.ProfileQueries`) keeps the column roles, the header row, the date
reading and the fiscal-year end. A file whose header set matches a saved profile is *offered* it; it is applied
only when asked (``--profile NAME`` or the confirm page's choice), and anything chosen explicitly wins over it.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from typing import Any

from app.intake.rawtable import RosterFileError
from app.store import IntakeProfile, Store, StoreError
from app.store.profiles import PROFILE_NAME_MAX

#: what an import reads when neither the analyst nor a profile says otherwise
DEFAULT_DATE_ORDER = "auto"
DEFAULT_FY_END = 12


def resolve_options(profile: IntakeProfile | None, *, roles: Mapping[str, str] | None, header_row: int | None,
                    date_order: str | None, fy_end: int | None) -> dict[str, Any]:
    """The import options: each explicit choice (not None), else the profile's, else the default."""
    return {
        "roles": dict(roles) if roles else (dict(profile.roles) if profile else None),
        "header_row": header_row if header_row is not None else (profile.header_row if profile else None),
        "date_order": date_order or (profile.date_order if profile else DEFAULT_DATE_ORDER),
        "fy_end": fy_end if fy_end is not None else (profile.fy_end if profile else DEFAULT_FY_END),
    }


def proposed_profiles(store: Store, headers: Iterable[str]) -> list[IntakeProfile]:
    """Saved profiles whose file had exactly these headers (in any order), most recently saved first."""
    return store.profiles_for_headers(headers)


def save_profile(store: Store, name: str, *, headers: Iterable[str], roles: Mapping[str, str],
                 header_row: int | None, date_order: str, fy_end: int) -> IntakeProfile:
    """Save how a file was read under ``name`` (replacing a profile of that name)."""
    return store.save_profile(name, headers=headers, roles=roles, header_row=header_row, date_order=date_order,
                              fy_end=fy_end)


def check_profile_name(name: str) -> str:
    """A profile name as typed, trimmed; ``RosterFileError`` before anything is stored when it cannot be one."""
    cleaned = name.strip()
    if not cleaned or len(cleaned) > PROFILE_NAME_MAX or any(ord(ch) < 32 for ch in cleaned):
        raise RosterFileError(f"A profile name must be 1 to {PROFILE_NAME_MAX} printable characters; "
                              f"got {name[:40]!r}.")
    return cleaned


def chosen_profile(store: Store, name: str) -> IntakeProfile:
    """The profile an analyst chose by name; ``RosterFileError`` naming the saved ones when there is none."""
    try:
        return store.get_profile(check_profile_name(name))
    except StoreError as exc:
        raise RosterFileError(str(exc)) from None
