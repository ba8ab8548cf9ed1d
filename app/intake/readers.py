"""Turn uploaded bytes (CSV or XLSX) into a header and rows of text, refusing hostile files early.

Everything a roster can contain is read as text here; typing and validation happen in
``app.intake.validation``. Whole-file problems raise ``RosterFileError`` with one sentence saying what and
where; row-level problems met while reading (wrong number of fields, broken quoting) come back as
``RejectedRow`` entries so the rest of the file still imports.
"""

from __future__ import annotations

import codecs
import csv
import re
from collections import Counter
from collections.abc import Iterator

from app.intake.fastcsv import clean_bytes, read_clean_body
from app.intake.headers import HEADER_SCAN, SourceRow, assemble
from app.intake.rawtable import DEFAULT_LIMITS, RawTable, ReadLimits, RosterFileError
from app.intake.workbook import _size, read_xlsx

__all__ = ["DEFAULT_LIMITS", "DELIMITERS", "RawTable", "ReadLimits", "RosterFileError", "decode_text",
           "detect_delimiter", "looks_like_xlsx", "read_csv_text", "read_table", "read_xlsx"]

DELIMITERS = (",", ";", "\t", "|")
DELIMITER_NAMES = {",": "comma", ";": "semicolon", "\t": "tab", "|": "pipe"}


def looks_like_xlsx(data: bytes, filename: str) -> bool:
    """Content decides (a zip signature); the file name only matters for an empty or tiny file."""
    return data[:4] == b"PK\x03\x04" or (len(data) < 4 and filename.lower().endswith((".xlsx", ".xlsm")))


# -- text files -------------------------------------------------------------------------------------
_BINARY_SIGNATURES = {
    b"\xd0\xcf\x11\xe0": "an old Excel 97-2003 (.xls) or other OLE2 document; save it as .xlsx or CSV",
    b"%PDF": "a PDF document, not a table",
    b"\x89PNG": "a PNG image, not a table",
    b"\x1f\x8b": "a gzip archive; unpack it first",
    b"PK\x05\x06": "an empty zip archive",
}
# bytes that never occur in text files (everything below 0x20 except tab, LF, FF, CR, ESC; and DEL)
_CONTROL = bytes(b for b in range(32) if b not in (9, 10, 12, 13, 27)) + b"\x7f"


def decode_text(data: bytes, encoding: str | None) -> tuple[str, str]:
    """Decode ``data``; return (text, encoding name used).

    Auto-detection: a UTF-16/32 byte-order mark decides; otherwise strict UTF-8 (with or without a
    BOM), then cp1252 (Excel's "CSV" on Western Windows), then Latin-1, which accepts any byte.
    """
    if encoding:
        try:
            name = codecs.lookup(encoding).name
        except (LookupError, ValueError):  # ValueError: a NUL in the name
            raise RosterFileError(f"Unknown text encoding {encoding!r}; try utf-8, cp1252 or latin-1.") from None
        try:
            return data.decode(name), encoding
        except UnicodeDecodeError as exc:
            raise RosterFileError(
                f"The file cannot be read as {encoding}: byte 0x{data[exc.start]:02x} at position "
                f"{exc.start:,} is not valid in that encoding; leave the encoding on automatic or pick another."
            ) from None
    for bom, name in ((codecs.BOM_UTF32_LE, "utf-32"), (codecs.BOM_UTF32_BE, "utf-32"),
                      (codecs.BOM_UTF16_LE, "utf-16"), (codecs.BOM_UTF16_BE, "utf-16")):
        if data.startswith(bom):
            try:
                return data.decode(name), name
            except UnicodeDecodeError as exc:
                raise RosterFileError(
                    f"The file starts with a {name.upper()} byte-order mark but byte {exc.start:,} is not "
                    f"valid {name.upper()}; re-save it as UTF-8 CSV."
                ) from None
    for sig, what in _BINARY_SIGNATURES.items():
        if data.startswith(sig):
            raise RosterFileError(f"The file is {what}.")
    sample = data[:65536]
    if len(sample) >= 4 and sample[1::2].count(0) > 0.9 * (len(sample) // 2):
        raise RosterFileError(
            "The file looks like UTF-16 text without a byte-order mark; re-save it as UTF-8 CSV "
            "or choose the encoding utf-16-le."
        )
    if sum(sample.count(bytes([b])) for b in _CONTROL) > 0.05 * len(sample):
        raise RosterFileError(
            "The file does not look like text (it is full of binary control bytes); upload a CSV or XLSX file."
        )
    try:
        return data.decode("utf-8-sig"), ("utf-8-sig" if data.startswith(codecs.BOM_UTF8) else "utf-8")
    except UnicodeDecodeError:
        pass
    try:
        return data.decode("cp1252"), "cp1252"
    except UnicodeDecodeError:
        return data.decode("latin-1"), "latin-1"


def _first_lines(text: str, n: int = HEADER_SCAN) -> list[str]:
    lines = [line for line in text[:65536].splitlines() if line.strip(" \t\ufeff")]
    return lines[:n]


def detect_delimiter(text: str) -> str:
    """Pick the delimiter that splits the first non-blank lines most consistently (``csv.Sniffer`` breaks ties).

    Per delimiter, the count most lines share (quoted parts ignored) decides: the header and data rows
    share one count while a title line above them has none, and a free-text notes column ("Smith, J.")
    on a semicolon file adds commas to only some lines.
    """
    lines = [re.sub(r'"[^"]*"', "", line) for line in _first_lines(text)]
    scores: dict[str, tuple[int, int]] = {}
    for d in DELIMITERS:
        counts = Counter(c for c in (line.count(d) for line in lines) if c)
        scores[d] = max(((k, c) for c, k in counts.items()), default=(0, 0))
    best = max(scores.values())
    if best == (0, 0):
        return ","
    tied = [d for d in DELIMITERS if scores[d] == best]
    if len(tied) == 1:
        return tied[0]
    sample = text[:16384]
    try:
        sniffed = csv.Sniffer().sniff(sample[: sample.rfind("\n") + 1] or sample, delimiters="".join(tied))
        if sniffed.delimiter in tied:
            return sniffed.delimiter
    except csv.Error:
        pass
    return tied[0]


_LINE = re.compile(r"[^\r\n]*(?:\r\n|\r|\n)|[^\r\n]+\Z")


def read_csv_text(
    text: str, *, delimiter: str | None = None, limits: ReadLimits = DEFAULT_LIMITS,
    max_rows: int | None = None, header_row: int | None = None,
) -> RawTable:
    """Parse decoded CSV text; line numbers are physical lines (a quoted cell may span several)."""
    if not text.strip(" \t\r\n\ufeff\x0b\x0c"):
        raise RosterFileError("The file contains only whitespace: there is no header row and no data.")
    if "\ufeff" in text:
        # a stray BOM (two files pasted together, a cell copied from another file) is invisible junk
        text = text.replace("\ufeff", "")
    hint = re.match(r"sep=(.)\r?\n", text)
    skipped_lines = 0
    if hint and delimiter is None:
        # Excel's "sep=;" first line names the delimiter; it is not the header
        delimiter, text, skipped_lines = hint.group(1), text[hint.end():], 1
    delim = delimiter or detect_delimiter(text)
    # the csv module's per-field limit (131,072) is process-wide; raise it so an oversized cell is
    # reported as one rejected row by our own max_cell_chars check instead of aborting the file
    if csv.field_size_limit() < len(text) + 1:
        csv.field_size_limit(len(text) + 1)
    # lines one at a time, split as io.StringIO(newline="") would: StringIO copies the text into 4 bytes
    # per character first (~420 MB for a 100 MB roster), a generator holds one line
    lines = (m.group() for m in _LINE.finditer(text))
    reader = csv.reader(lines, delimiter=delim, strict=True)
    physical: list[str] | None = None

    def rows() -> Iterator[SourceRow]:
        nonlocal physical
        while True:
            start = reader.line_num + 1 + skipped_lines
            try:
                row = next(reader)
            except StopIteration:
                return
            except csv.Error as exc:
                if "unexpected end of data" in str(exc):
                    raise RosterFileError(
                        f"Line {start} opens a quoted field that is never closed (an unbalanced quote), so "
                        "the rest of the file would be read as one cell; fix the quote and upload again."
                    ) from None
                if physical is None:
                    physical = text.splitlines()
                at = start - 1 - skipped_lines
                raw = physical[at] if at < len(physical) else ""
                yield start, None, f"malformed quoting ({exc})", raw
                continue
            yield start, row, "", ""

    table = assemble(rows(), limits=limits, header_row=header_row, max_rows=max_rows)
    table.delimiter = delim
    return table


def read_table(
    data: bytes, filename: str, *, encoding: str | None = None, sheet: str | None = None,
    limits: ReadLimits = DEFAULT_LIMITS, max_rows: int | None = None, header_row: int | None = None,
    columnar: bool = False,
) -> RawTable:
    """Check whole-file limits, then read ``data`` as XLSX or CSV. ``filename`` is only a label.

    ``columnar``: a clean CSV may come back with its rows as ``columns`` (read by pandas, see
    :mod:`app.intake.fastcsv`); ``rows`` then holds only the first ones.
    """
    if len(data) > limits.max_bytes:
        raise RosterFileError(f"The file is {_size(len(data))}; the upload limit is {_size(limits.max_bytes)}.")
    if not data:
        raise RosterFileError("The file is empty (0 bytes).")
    if looks_like_xlsx(data, filename):
        return read_xlsx(data, sheet=sheet, limits=limits, max_rows=max_rows, header_row=header_row)
    if filename.lower().endswith((".xlsx", ".xlsm")):
        raise RosterFileError(f"{filename!r} is named like an XLSX workbook but is not a zip archive.")
    text, used = decode_text(data, encoding)
    if columnar and max_rows is None:
        head = read_csv_text(text, limits=limits, max_rows=1, header_row=header_row)
        if clean_bytes(data, used, text, head.delimiter or ","):
            del text  # the decoded copy is not needed by pandas (~100 MB for 1,000,000 rows)
            table = read_clean_body(data, head, limits)
            if table is not None:
                table.encoding = used
                return table
            text, used = decode_text(data, encoding)
    table = read_csv_text(text, limits=limits, max_rows=max_rows, header_row=header_row)
    table.encoding = used
    table.may_hold_nul = "\x00" in text
    return table


