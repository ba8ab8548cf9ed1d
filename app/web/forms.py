"""Reading a submitted form once, closing its temporary upload files straight away."""

from __future__ import annotations

from dataclasses import dataclass

from fastapi import Request
from starlette.datastructures import UploadFile
from starlette.exceptions import HTTPException

from app.web.deps import BadRequest


@dataclass(frozen=True)
class Upload:
    """An uploaded file's bytes; its name is a label only, never a path."""

    filename: str
    data: bytes


#: fields one form may carry: the Reason codes form sends three per code (code, category, label), so the
#: framework's default of 1,000 refused a roster of more than ~330 codes; the body stays under the upload limit
#: (app/web/security.py), which bounds what so many fields can cost
MAX_FIELDS = 150_000
#: files one form may carry (every page's form sends one at most)
MAX_FILES = 10


async def read_form(request: Request) -> dict[str, str | Upload]:
    """The form's fields as text and its files as bytes (last value wins for repeated fields)."""
    fields: dict[str, str | Upload] = {}
    try:
        async with request.form(max_files=MAX_FILES, max_fields=MAX_FIELDS) as form:
            for key, value in form.multi_items():
                if isinstance(value, UploadFile):
                    if value.filename:
                        refuse_nul(value.filename, f"the file name of form field {key!r}")
                        fields[key] = Upload(value.filename, await value.read())
                else:
                    refuse_nul(key, "a form field's name")
                    refuse_nul(value, f"form field {key!r}")
                    fields[key] = value
    except HTTPException as exc:
        if exc.status_code != 400:
            raise
        raise _unreadable(exc) from None
    return fields


def _unreadable(exc: HTTPException) -> BadRequest:
    """The framework's one-line refusal of a form it cannot parse ("Invalid multipart data."), with the cause."""
    detail = str(exc.detail).rstrip(".")
    # Starlette raises the HTTPException while handling its MultiPartException, whose cause is the parser's
    cause = str(getattr(exc.__context__, "__cause__", None) or "")
    if "header size" in cause or "header count" in cause:
        hint = ("a part's header (such as its file name) is too long; keep the file name under 4,000 "
                "characters")
    elif "boundary" in detail.lower():
        hint = "the multipart boundary is missing; send the form as multipart/form-data with its boundary"
    elif detail.startswith("Too many"):
        hint = (f"a form carries at most {MAX_FIELDS:,} fields and {MAX_FILES} files; send the fields its page "
                "has")
    elif "maximum size" in detail:
        hint = "a text field is over 1 MB; only the file may be that large"
    else:
        hint = "the multipart body is not well-formed (cut off, or a part without its headers); send it again"
    return BadRequest(f"The form could not be read ({detail}): {hint}. Nothing was stored.")


def refuse_nul(text: str, where: str) -> None:
    """Refuse a NUL character in anything a request names: no field has a use for it, and PostgreSQL text
    cannot hold one (the query would fail with a DataError, a 500, on the team desk's store)."""
    if "\x00" in text:
        raise BadRequest(f"A NUL character (U+0000) is in {where}, at character {text.index(chr(0)) + 1}; "
                         "nothing was read or stored. Remove it and try again.")


def refuse_nul_in_address(request: Request) -> None:
    """The app's dependency for every route: no NUL in the path or a query parameter (see ``refuse_nul``)."""
    refuse_nul(request.url.path, "the address")
    for key, value in request.query_params.multi_items():
        refuse_nul(key, "a query parameter's name")
        refuse_nul(value, f"query parameter {key!r}")
