"""Reading a submitted form once, closing its temporary upload files straight away."""

from __future__ import annotations

from dataclasses import dataclass

from fastapi import Request
from starlette.datastructures import UploadFile


@dataclass(frozen=True)
class Upload:
    """An uploaded file's bytes; its name is a label only, never a path."""

    filename: str
    data: bytes


async def read_form(request: Request) -> dict[str, str | Upload]:
    """The form's fields as text and its files as bytes (last value wins for repeated fields)."""
    fields: dict[str, str | Upload] = {}
    async with request.form() as form:
        for key, value in form.multi_items():
            if isinstance(value, UploadFile):
                if value.filename:
                    fields[key] = Upload(value.filename, await value.read())
            else:
                fields[key] = value
    return fields
