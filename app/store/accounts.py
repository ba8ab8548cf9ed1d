"""Accounts with roles, their API tokens and the secret that signs session cookies (team mode).

Passwords are hashed with argon2id (argon2-cffi, the reference implementation's binding); tokens are random
and only their SHA-256 is kept, so a copy of the database reveals neither.
"""

from __future__ import annotations

import contextlib
import hashlib
import secrets
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from functools import cache
from typing import Any

from sqlalchemy import delete, func, insert, select, update
from sqlalchemy.exc import IntegrityError

from app.store.audit import record_event
from app.store.engine import Gateway
from app.store.records import StoreError, now_iso
from app.store.tables import accounts, api_tokens, app_secrets, audit_events
from app.types import ACCOUNT_ROLES, AccountRole, check_choice

TOKEN_PREFIX = "hs_"
MIN_PASSWORD = 10
#: failed sign-ins for one name within the window before further tries are refused for a while
MAX_FAILED_LOGINS = 5
FAILED_LOGIN_WINDOW = timedelta(minutes=15)


@dataclass(frozen=True)
class Account:
    id: int
    name: str
    role: AccountRole
    created_at: str
    session_epoch: int

    def may(self, needed: AccountRole) -> bool:
        """Whether this account's role includes ``needed`` (viewer < analyst < admin)."""
        return ACCOUNT_ROLES.index(self.role) >= ACCOUNT_ROLES.index(needed)


def _account(row: object) -> Account:
    return Account(row.id, row.name, row.role, row.created_at, row.session_epoch)  # type: ignore[attr-defined]


def _check_password(password: str) -> None:
    if len(password) < MIN_PASSWORD:
        raise StoreError(f"A password needs at least {MIN_PASSWORD} characters.")


def _signed_in_as(name: str) -> str:
    """The sign-in name as the audit trail records a failed attempt: as typed when it is short and printable;
    otherwise unprintable characters as '?' and the first 64 characters with the length (anyone can type a
    name, and no account name is longer than 64 characters)."""
    shown = "".join(ch if ch.isprintable() else "?" for ch in name)
    return shown if len(shown) <= 64 else f"{shown[:64]}… ({len(shown):,} characters)"


class AccountQueries(Gateway):
    """Accounts, API tokens, sign-in checks and the session secret."""

    def has_accounts(self) -> bool:
        with self.engine.connect() as conn:
            return conn.execute(select(accounts.c.id).limit(1)).first() is not None

    def add_account(self, name: str, role: str, password: str) -> Account:
        name = name.strip()
        if not name or len(name) > 64 or any(ch.isspace() or not ch.isprintable() for ch in name):
            raise StoreError("An account name is 1 to 64 printable characters without spaces.")
        check_choice(role, ACCOUNT_ROLES, "role")
        _check_password(password)
        try:
            with self._tx() as conn:
                new_id = conn.execute(insert(accounts).values(
                    name=name, role=role, password_hash=_hasher().hash(password), created_at=now_iso(),
                    session_epoch=0)).inserted_primary_key[0]  # type: ignore[index]
                record_event(conn, "account_add", f"account:{name}", {"id": new_id, "role": role})
        except IntegrityError:
            raise StoreError(f"An account named {name!r} already exists.") from None
        return self.get_account(name)

    def get_account(self, ref: int | str) -> Account:
        column = accounts.c.id if isinstance(ref, int) else accounts.c.name
        with self.engine.connect() as conn:
            row = conn.execute(select(accounts).where(column == ref)).first()
        if row is None:
            raise StoreError(f"There is no account {ref!r}.")
        return _account(row)

    def list_accounts(self) -> list[Account]:
        with self.engine.connect() as conn:
            return [_account(r) for r in conn.execute(select(accounts).order_by(accounts.c.name))]

    def remove_account(self, name: str) -> None:
        account = self.get_account(name)
        with self._tx() as conn:
            if account.role == "admin":
                admins = conn.execute(select(func.count()).select_from(accounts)
                                      .where(accounts.c.role == "admin")).scalar_one()
                others = conn.execute(select(func.count()).select_from(accounts)).scalar_one() - 1
                if admins == 1 and others > 0:
                    raise StoreError(f"{name!r} is the last admin; make another account admin first.")
            conn.execute(delete(api_tokens).where(api_tokens.c.account_id == account.id))
            conn.execute(delete(accounts).where(accounts.c.id == account.id))
            record_event(conn, "account_remove", f"account:{name}", {"id": account.id})

    def set_role(self, name: str, role: str) -> Account:
        """Give an account another role (effective at its next request); the last admin stays an admin."""
        check_choice(role, ACCOUNT_ROLES, "role")
        account = self.get_account(name)
        with self._tx() as conn:
            if account.role == "admin" and role != "admin":
                admins = conn.execute(select(func.count()).select_from(accounts)
                                      .where(accounts.c.role == "admin")).scalar_one()
                if admins == 1:
                    raise StoreError(f"{name!r} is the last admin; make another account admin first.")
            conn.execute(update(accounts).where(accounts.c.id == account.id).values(role=role))
            record_event(conn, "account_role", f"account:{name}", {"id": account.id, "from": account.role,
                                                                   "to": role})
        return self.get_account(account.id)

    def set_password(self, name: str, password: str) -> None:
        """A new password; every session of the account is signed out."""
        _check_password(password)
        account = self.get_account(name)
        with self._tx() as conn:
            conn.execute(update(accounts).where(accounts.c.id == account.id).values(
                password_hash=_hasher().hash(password), session_epoch=accounts.c.session_epoch + 1))
            record_event(conn, "account_password", f"account:{name}", {"id": account.id})

    def check_password(self, name: str, password: str) -> Account | None:
        """The account when the password is right; ``None`` otherwise (the failure is recorded)."""
        with self.engine.connect() as conn:
            row = conn.execute(select(accounts).where(accounts.c.name == name)).first()
        ok = False
        if row is not None:
            from argon2.exceptions import InvalidHashError, VerificationError

            try:
                ok = _hasher().verify(row.password_hash, password)
            except (VerificationError, InvalidHashError):
                ok = False
        else:
            from argon2.exceptions import InvalidHashError, VerificationError

            # spend the same time as a real check, so a wrong name is not told apart from a wrong password
            with contextlib.suppress(VerificationError, InvalidHashError):
                _hasher().verify(_dummy_hash(), password)
        if not ok:
            with self._tx() as conn:
                shown = _signed_in_as(name)
                record_event(conn, "login_failed", f"account:{shown}", {}, actor=shown or "(blank)")
            return None
        return _account(row)

    def failed_logins_recently(self, name: str, *, now: datetime | None = None) -> tuple[int, str | None]:
        """How many sign-ins for ``name`` failed within the window, and the oldest one's time."""
        since = ((now or datetime.now(UTC)) - FAILED_LOGIN_WINDOW).replace(microsecond=0).isoformat()
        with self.engine.connect() as conn:
            rows = conn.execute(select(audit_events.c.at).where(
                audit_events.c.action == "login_failed", audit_events.c.target == f"account:{_signed_in_as(name)}",
                audit_events.c.at >= since).order_by(audit_events.c.at)).fetchall()
        return len(rows), (rows[0].at if rows else None)

    def create_token(self, name: str) -> str:
        """A new API token for the account, returned once; only its hash is stored."""
        account = self.get_account(name)
        token = TOKEN_PREFIX + secrets.token_urlsafe(32)
        with self._tx() as conn:
            token_id = conn.execute(insert(api_tokens).values(
                account_id=account.id, token_sha256=hashlib.sha256(token.encode()).hexdigest(),
                created_at=now_iso())).inserted_primary_key[0]  # type: ignore[index]
            record_event(conn, "token_create", f"account:{name}", {"token_id": token_id})
        return token

    def account_for_token(self, token: str) -> Account | None:
        digest = hashlib.sha256(token.encode("utf-8", "replace")).hexdigest()
        with self.engine.connect() as conn:
            row = conn.execute(select(accounts).join(api_tokens, api_tokens.c.account_id == accounts.c.id)
                               .where(api_tokens.c.token_sha256 == digest)).first()
        return _account(row) if row is not None else None

    def secret(self, name: str) -> str:
        """A random secret shared by every server process on this store (made on first use)."""
        with self.engine.connect() as conn:
            value = conn.execute(select(app_secrets.c.value).where(app_secrets.c.name == name)).scalar()
        if value is not None:
            return str(value)
        try:
            with self._tx() as conn:
                conn.execute(insert(app_secrets).values(name=name, value=secrets.token_urlsafe(48)))
        except IntegrityError:
            pass  # another process made it first; use theirs
        with self.engine.connect() as conn:
            return str(conn.execute(select(app_secrets.c.value).where(app_secrets.c.name == name)).scalar_one())


@cache
def _hasher() -> Any:
    # lazy: argon2 is needed only when an account signs in or changes, not to open the store (CLI start-up)
    from argon2 import PasswordHasher

    return PasswordHasher()


@cache
def _dummy_hash() -> str:
    # hashed on first use, not at import: one argon2 hash costs ~0.1 s by design (issue 13, start-up)
    return str(_hasher().hash("not a password anybody has"))
