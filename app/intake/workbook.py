"""XLSX workbooks: the zip-bomb and encryption guard, and the rows of one sheet as text.

Line numbers are Excel row numbers. Real spreadsheet dates arrive as ISO text, which the date reader
takes as it is.
"""

from __future__ import annotations

import io
import warnings
import zipfile
from collections.abc import Iterator
from datetime import date, datetime, time
from time import monotonic

from app.intake.headers import SourceRow, assemble
from app.intake.rawtable import DEFAULT_LIMITS, RawTable, ReadLimits, RosterFileError


def _size(n: int) -> str:
    return f"{n / 1024 / 1024:.1f} MB" if n >= 1024 * 1024 else f"{n:,} bytes"


def _check_zip(data: bytes, limits: ReadLimits) -> None:
    """Refuse archives that are not workbooks or that would expand beyond the limit.

    Declared sizes are trustworthy here: ``zipfile`` stops reading an entry at its declared size,
    so openpyxl can never inflate more than what is checked.
    """
    try:
        with zipfile.ZipFile(io.BytesIO(data)) as zf:
            infos = zf.infolist()
    except (zipfile.BadZipFile, zipfile.LargeZipFile, ValueError, OSError) as exc:
        raise RosterFileError(f"The file starts like an XLSX (zip) file but the archive is damaged ({exc}).") from None
    if len(infos) > limits.max_zip_entries:
        raise RosterFileError(
            f"The XLSX archive holds {len(infos):,} entries (limit {limits.max_zip_entries:,}); refusing it."
        )
    total = sum(i.file_size for i in infos)
    if total > limits.max_uncompressed:
        raise RosterFileError(
            f"The XLSX file would expand to {_size(total)} (limit {_size(limits.max_uncompressed)}); "
            "refusing a possible zip bomb."
        )
    names = {i.filename for i in infos}
    if "xl/workbook.xml" not in names:
        shown = ", ".join(sorted(names)[:5]) or "nothing"
        raise RosterFileError(f"The file is a zip archive but not an XLSX workbook (it holds {shown}).")
    if any(i.flag_bits & 0x1 for i in infos):
        raise RosterFileError("The XLSX file is encrypted; save an unprotected copy and upload that.")


def _cell_text(value: object) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return str(int(value)) if value.is_integer() and abs(value) < 1e15 else repr(value)
    if isinstance(value, datetime):
        return value.date().isoformat() if value.time() == time(0) else value.isoformat(sep=" ")
    if isinstance(value, date | time):
        return value.isoformat()
    return str(value).replace("\ufeff", "")


def read_xlsx(
    data: bytes, *, sheet: str | None = None, limits: ReadLimits = DEFAULT_LIMITS,
    max_rows: int | None = None, header_row: int | None = None,
) -> RawTable:
    """Read the first sheet (or ``sheet``) of a workbook; line numbers are Excel row numbers."""
    import openpyxl  # heavy; only needed for workbooks

    _check_zip(data, limits)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            wb = openpyxl.load_workbook(io.BytesIO(data), read_only=True, data_only=True)
        except Exception as exc:  # openpyxl raises KeyError, XML and zip errors for broken files
            raise RosterFileError(
                f"The XLSX workbook is damaged or not one openpyxl can read ({type(exc).__name__}: {exc})."
            ) from None
        try:
            sheets = tuple(wb.sheetnames)
            name = sheet if sheet is not None else (sheets[0] if sheets else None)
            if name is None or name not in sheets:
                listed = ", ".join(repr(s) for s in sheets) or "no sheets"
                what = f"no sheet named {sheet!r}" if sheet is not None else "no sheets"
                raise RosterFileError(f"The workbook has {what}; its sheets are: {listed}.")
            ws = wb[name]
            if not hasattr(ws, "iter_rows"):
                raise RosterFileError(f"Sheet {name!r} is a chart, not a table; choose another sheet.")

            def rows() -> Iterator[SourceRow]:
                deadline = monotonic() + limits.max_seconds
                for line, values in enumerate(ws.iter_rows(min_row=1, values_only=True), start=1):
                    if line > limits.max_sheet_rows:
                        raise RosterFileError(
                            f"Sheet {name!r} has more than {limits.max_sheet_rows:,} rows (blank ones included); "
                            "delete the unused rows or save the roster as CSV.")
                    if line % 1000 == 0 and monotonic() > deadline:
                        raise RosterFileError(
                            f"Reading sheet {name!r} took longer than {limits.max_seconds:g} s (stopped at row "
                            f"{line:,}); save the roster as CSV, which reads much faster.")
                    row = [_cell_text(v) for v in values]
                    while row and row[-1] == "":
                        row.pop()
                    yield line, row, "", ""

            try:
                table = assemble(rows(), limits=limits, header_row=header_row, max_rows=max_rows, pad=True)
            except RosterFileError as exc:
                if "every line is blank" in str(exc):
                    raise RosterFileError(f"Sheet {name!r} has no header row: it is empty.") from None
                raise
        except RosterFileError:
            raise
        except Exception as exc:
            raise RosterFileError(
                f"The XLSX workbook is damaged: reading it failed ({type(exc).__name__}: {exc})."
            ) from None
        finally:
            wb.close()
    table.sheet, table.sheets = name, sheets
    table.messages.extend(f"Workbook note: {w.message}" for w in caught)
    return table


