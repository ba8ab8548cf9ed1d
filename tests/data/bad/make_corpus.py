"""Write the bad-input corpus for tests/test_ingest_bad_inputs.py into this folder.

Run from the project root: ``python tests/data/bad/make_corpus.py``. The content is fixed (seeded
random bytes); only the timestamps openpyxl writes into the two workbooks built from a real
workbook (truncated.xlsx, xml_entity_bomb.xlsx) change between runs. Every name, firm and code here
is invented.
"""

from __future__ import annotations

import codecs
import gzip
import io
import random
import zipfile
from pathlib import Path

import openpyxl

HERE = Path(__file__).parent
STAMP = (2026, 1, 1, 0, 0, 0)
HEADER = "Issuer Code,Issuer Name,Industry,FY,Exit Date,Exit Reason,Executive,Age at Exit,Years in Role,Interim?,Comment"
GOOD = [
    "KV01,Kestrel Vane plc,Utilities,2011,31/03/2011,Retired,Ada Quill,61,7,no,",
    "OB02,Orrin Basalt,Mining,2012,15/06/2012,Dismissed,Bram Tolle,55,3.5,yes,",
]


def csv_file(*rows: str) -> bytes:
    return ("\r\n".join([HEADER, *rows]) + "\r\n").encode("utf-8")


def xlsx_bytes() -> bytes:
    wb = openpyxl.Workbook()
    ws = wb.active
    ws.append(HEADER.split(","))
    for row in GOOD:
        ws.append(row.split(","))
    buf = io.BytesIO()
    wb.save(buf)
    return buf.getvalue()


def zip_of(entries: dict[str, bytes], compression: int = zipfile.ZIP_DEFLATED) -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", compression) as zf:
        for name, data in entries.items():
            zf.writestr(zipfile.ZipInfo(name, date_time=STAMP), data)
    return buf.getvalue()


def zip_bomb() -> bytes:
    """A workbook-shaped zip whose sheet inflates to 210 MB of zeros but is ~1 KB on disk (bzip2)."""
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as zf:
        zf.writestr(zipfile.ZipInfo("[Content_Types].xml", date_time=STAMP), "<Types/>")
        zf.writestr(zipfile.ZipInfo("xl/workbook.xml", date_time=STAMP), "<workbook/>")
        info = zipfile.ZipInfo("xl/worksheets/sheet1.xml", date_time=STAMP)
        info.compress_type = zipfile.ZIP_BZIP2
        with zf.open(info, "w", force_zip64=True) as f:
            chunk = b"\0" * (1 << 20)
            for _ in range(210):
                f.write(chunk)
    return buf.getvalue()


def xml_entity_bomb() -> bytes:
    """A real workbook whose sheet XML declares nested entities ("billion laughs")."""
    src = zipfile.ZipFile(io.BytesIO(xlsx_bytes()))
    dtd = ('<?xml version="1.0"?><!DOCTYPE lolz [<!ENTITY lol0 "lollollollollollollollollollol">'
           + "".join(f'<!ENTITY lol{i} "' + f"&lol{i - 1};" * 10 + '">' for i in range(1, 10)) + "]>")
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as zf:
        for info in src.infolist():
            data = src.read(info.filename)
            if info.filename == "xl/worksheets/sheet1.xml":
                sheet = data.decode()
                data = (dtd + sheet[sheet.index("<worksheet"):].replace("</sheetData>", "", 1)
                        .replace("<sheetData>", "<sheetData>&lol9;</sheetData>", 1)).encode()
            zf.writestr(info, data)
    return out.getvalue()


def build() -> dict[str, bytes]:
    rng = random.Random(20261201)
    files: dict[str, bytes] = {
        "empty.csv": b"",
        "whitespace_only.csv": b"   \r\n\t\r\n  \n",
        "header_only.csv": (HEADER + "\r\n").encode(),
        "binary_garbage.csv": bytes(rng.randrange(256) for _ in range(4096)),
        # cp1252 bytes (0xE9 = e-acute) read with a declared utf-8 encoding
        "wrong_encoding_declared.csv": csv_file("CV03,Cr\u00e9mieux Verre,Glass,2013,,Retired,Eloi Mart,60,9,no,")
        .replace("Cr\u00e9mieux".encode(), "Cr\u00e9mieux".encode("cp1252")),
        "utf16_without_bom.csv": csv_file(*GOOD).decode().encode("utf-16-le"),
        "mixed_delimiters.csv": csv_file(GOOD[0], GOOD[1].replace(",", ";")),
        "ten_thousand_columns.csv": (",".join(f"c{i}" for i in range(10_000)) + "\r\n"
                                     + ",".join("1" for _ in range(10_000)) + "\r\n").encode(),
        "ten_thousand_fields_row.csv": csv_file(GOOD[0], ",".join("x" for _ in range(10_000))),
        "million_char_cell.csv": csv_file(GOOD[0], GOOD[1].replace("Orrin Basalt", "O" * 1_000_000)),
        "unbalanced_quote.csv": csv_file(GOOD[0], GOOD[1].replace("Orrin Basalt", '"Orrin Basalt'),
                                         "PL04,Pell Loam,Farming,2013,,Retired,Cato Fenn,58,2,no,"),
        "zip_not_xlsx.xlsx": zip_of({"readme.txt": b"not a workbook", "data/table.csv": csv_file(*GOOD)}),
        "zip_bomb.xlsx": zip_bomb(),
        "xml_entity_bomb.xlsx": xml_entity_bomb(),
        "damaged_workbook.xlsx": zip_of({"[Content_Types].xml": b"<Types/>", "xl/workbook.xml": b"<workbook><<<"}),
        "truncated.xlsx": xlsx_bytes()[:1500],
        "text_named_xlsx.xlsx": csv_file(*GOOD),
        "old_excel.xls": b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1" + bytes(504),
        "pdf_renamed.csv": b"%PDF-1.7\n%\xe2\xe3\xcf\xd3\n1 0 obj\n<<>>\nendobj\n",
        "gzipped.csv": gzip.compress(csv_file(*GOOD), mtime=0),
        "year_zero_and_9999.csv": csv_file(
            GOOD[0], "YZ05,Yarrow Zenith,Retail,,0000-01-01,Retired,Dora Pike,50,1,no,",
            "YN06,Yarrow Nine,Retail,9999,,Retired,Ezra Pike,50,1,no,"),
        "negative_ages.csv": csv_file(GOOD[0], "NA07,Nadir Arc,Media,2012,,Resigned,Fay Lund,-44,2,no,"),
        "absurd_ages.csv": csv_file(GOOD[0], "AA08,Apex Alder,Media,2012,,Resigned,Gil Rowe,212,2,no,"),
        "formula_payloads.csv": csv_file(
            GOOD[0], '=HYPERLINK("http://example.invalid"),Formula Firm,Tech,2012,,Retired,Hal Moss,'
                     '"=1+1",2,no,"@SUM(A1:A9)"',
            "FF09,+cmd|' /C calc'!A0,Tech,2012,,Retired,Ivo Dent,50,2,no,-2+3"),
        "html_payloads.csv": csv_file(
            GOOD[0], "HT10,<script>alert(1)</script> Holdings,Tech,2012,,Retired,Jan Roe,50,2,no,<b>bold</b>",
            "HT11,Img Ltd,Tech,<img src=x onerror=alert(1)>,,Retired,Kim Roe,50,2,no,"),
        "sql_payloads.csv": csv_file(
            GOOD[0], "SQ12,'; DROP TABLE departures; --,Tech,2012,,Retired,Lee Roe,50,2,no,",
            "SQ13,Robert Tables Ltd,Tech,2012 OR 1=1,,Retired,Max Roe,50,2,no,"),
        "nul_bytes.csv": csv_file(GOOD[0], GOOD[1].replace("Orrin", "Orr\x00in")),
        "bom_in_middle.csv": csv_file(GOOD[0]) + codecs.BOM_UTF8 + csv_file(GOOD[1]),
        "duplicate_headers.csv": (b"Issuer Code,FY,Exit Reason,FY\r\nKV01,2011,Retired,2012\r\n"),
        "missing_required_column.csv": (b"Issuer Code,Issuer Name,FY\r\nKV01,Kestrel Vane plc,2011\r\n"),
        "no_header_row.csv": ("\r\n".join(GOOD) + "\r\n").encode(),
        "all_rows_invalid.csv": csv_file(",Nameless,Tech,2011,,Retired,Nia Vo,50,1,no,",
                                         "NR14,No Reason,Tech,2011,,,Ola Vo,50,1,no,"),
        "impossible_dates.csv": csv_file(GOOD[0], "ID15,Ides Ltd,Tech,2011,31/02/2011,Retired,Pia Ek,50,1,no,"),
        "unparseable_dates.csv": csv_file(GOOD[0], "UD16,Undated Ltd,Tech,2011,last spring,Retired,Quin Ek,50,1,no,"),
        "year_date_disagree.csv": csv_file(GOOD[0], "YD17,Yonder Ltd,Tech,2011,01/01/2016,Retired,Rue Ek,50,1,no,"),
        "bad_interim_flag.csv": csv_file(GOOD[0], "BI18,Bivalve Ltd,Tech,2011,,Retired,Sol Ek,50,1,perhaps,"),
        "short_row.csv": csv_file(GOOD[0], "SR19,Short Row Ltd,Tech,2011"),
        "header_cell_too_long.csv": ("X" * 20_000 + ",Exit Reason,FY\r\nKV01,Retired,2011\r\n").encode(),
    }
    return files


def main() -> None:
    for name, data in build().items():
        (HERE / name).write_bytes(data)


if __name__ == "__main__":
    main()
