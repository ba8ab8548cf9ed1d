"""pandas' C reader (``app.intake.fastcsv``) gives the same table as the line-by-line ``csv`` module reader.

The reference is Python's own ``csv`` module (strict), which ``read_csv_text`` drives line by line: for
every file below, the columnar read must give the same header, rows, line numbers, rejected rows, blank
count, footer lines and notes, or fall back to that reader.
"""

from __future__ import annotations

import random

import numpy as np
import pytest

from app.intake import fastcsv
from app.intake.rawtable import ReadLimits, RosterFileError
from app.intake.readers import read_table

HEADER = "Firm,Year,Reason,Notes"


def _view(table):  # type: ignore[no-untyped-def]
    if table.columns is not None:
        rows = [list(map(str, r)) for r in zip(*table.columns, strict=True)] if table.columns else []
        lines = [int(x) for x in table.column_lines]
    else:
        rows, lines = table.rows, table.lines
    return {
        "headers": table.headers, "header_line": table.header_line, "rows": rows, "lines": lines,
        "bad": [(r.line, r.reason, r.raw) for r in table.bad_rows], "blank": table.blank_rows,
        "footer": table.footer_lines, "above": table.skipped_above, "messages": table.messages,
        "delimiter": table.delimiter, "encoding": table.encoding,
    }


def _both(data: bytes, **kw):  # type: ignore[no-untyped-def]
    slow = read_table(data, "r.csv", **kw)
    fast = read_table(data, "r.csv", columnar=True, **kw)
    return _view(slow), _view(fast), fast.columns is not None


CASES = {
    "plain": f"{HEADER}\nF1,2001,Retired,\"a, b\"\nF2,2002,Fired,x\n",
    "crlf no final newline": f"{HEADER}\r\nF1,2001,Retired,n\r\nF2,2002,Fired,x",
    "title block and blank lines": f"Departures export\nGenerated on 2026-01-01\n\n{HEADER}\n\nF1,2001,R,\n,,,\nF2,2002,R,y\n\n",
    "footer": f"{HEADER}\nF1,2001,R,n\nF2,2002,R,n\n\nSource: invented\nTotal,2\n\n",
    "footer-like row in the middle": f"{HEADER}\nF1,2001,R,n\nSource: x,,,\nF2,2002,R,n\n",
    "short and long rows": f"{HEADER}\nF1,2001,R\nF2,2002,R,n\nF3,2003\nF4,2004,R,n\n",
    "long row later": f"{HEADER}\nF1,2001,R,n\nF2,2002,R,n,extra\n",
    "long first row": f"{HEADER}\nF1,2001,R,n,extra\nF2,2002,R,n\n",
    "trailing delimiters": "Firm,Year,Reason,Notes,,\nF1,2001,R,n,,\nF2,2002,R,,,\nF3,2003,R,n,x,\nF4,2004,R\n",
    "escaped quotes": f'{HEADER}\nF1,2001,"Re""tired",""\n"F2",2002,R,"a ""b"", c"\n',
    "quote after a closing quote": f'{HEADER}\nF1,2001,"Re"tired,n\nF2,2002,R,n\n',
    "quoted line break": f'{HEADER}\nF1,2001,R,"two\nlines"\nF2,2002,R,n\n',
    "mid-field quote": f'{HEADER}\nF1,20"01,R,n\nF2,2002,R,x"y"\n',
    "semicolons": "Firm;Year;Reason;Notes\nF1;2001;R;3,5\nF2;2002;R;n\n",
    "bom": "\ufeff" + f"{HEADER}\nF1,2001,R,n\n",
    "whitespace rows": f"{HEADER}\n   \nF1,2001,R,n\n \t ,  ,,\n",
    "header only": f"{HEADER}\n",
    "lone CR": f"{HEADER}\rF1,2001,R,n\r",
    "sep line": f"sep=,\n{HEADER}\nF1,2001,R,n\n",
}


@pytest.mark.parametrize("name", sorted(CASES))
def test_columnar_read_matches_the_csv_module(name: str) -> None:
    slow, fast, _ = _both(CASES[name].encode())
    assert fast == slow


def test_clean_files_take_the_fast_path_and_odd_ones_fall_back() -> None:
    # clean: pandas reads them (else this module would silently never run)
    for name in ("plain", "crlf no final newline", "title block and blank lines", "footer", "short and long rows",
                 "trailing delimiters", "escaped quotes", "semicolons", "bom"):
        assert _both(CASES[name].encode())[2], name
    # what pandas reads differently from the csv module or cannot number by line (and a quote inside an
    # unquoted cell, which both read alike but the byte check does not tell from the first case)
    for name in ("quote after a closing quote", "quoted line break", "lone CR", "sep line", "long first row",
                 "mid-field quote"):
        assert not _both(CASES[name].encode())[2], name


def test_header_row_choice_and_cp1252_match() -> None:
    data = CASES["title block and blank lines"].encode()
    assert _both(data, header_row=4)[0] == _both(data, header_row=4)[1]
    latin = f"{HEADER}\nF1,2001,Retraité,n\n".encode("cp1252")
    slow, fast, used = _both(latin)
    assert fast == slow and not used  # not UTF-8: line by line


def test_row_limit_names_the_same_line() -> None:
    data = (HEADER + "\n" + "".join(f"F{i},2001,R,n\n" for i in range(10)) + "\n").encode()
    limits = ReadLimits(max_data_rows=5, max_bytes=10**6)
    messages = []
    for columnar in (False, True):
        with pytest.raises(RosterFileError) as err:
            read_table(data, "r.csv", limits=limits, columnar=columnar)
        messages.append(str(err.value))
    assert messages[0] == messages[1] and "line 7" in messages[0]


def test_random_files_match() -> None:
    """Seeded random files of clean and odd cells: either path gives the same table."""
    rng = random.Random(14)
    cells = ["F1", "", " ", "2001", "Retired", '"a, b"', '"x ""y"""', "Source: n", "Total", "note", "3,5"]
    fast_used = 0
    for _ in range(300):
        lines = [HEADER] if rng.random() < 0.8 else ["Title", "", HEADER]
        for _ in range(rng.randrange(0, 12)):
            width = rng.choice((0, 1, 3, 4, 4, 4, 4, 4, 4, 4, 4, 5))
            lines.append(",".join(rng.choice(cells) for _ in range(width)))
        end = rng.choice(("\n", "\r\n"))
        text = end.join(lines) + (end if rng.random() < 0.8 else "")
        try:
            slow, fast, used = _both(text.encode())
        except RosterFileError as exc:
            with pytest.raises(RosterFileError) as again:
                read_table(text.encode(), "r.csv", columnar=True)
            assert str(again.value) == str(exc)
            continue
        assert fast == slow, text
        fast_used += used
    assert fast_used > 60


def test_line_starts_and_blank_cells() -> None:
    data = b"a\nbb\n\nccc"
    assert fastcsv._line_starts(data, 0).tolist() == [0, 2, 5, 6]
    assert fastcsv._blank(np.array(["", " ", "x", "\t"], dtype=object)).tolist() == [True, True, False, True]


def test_raw_json_built_per_batch_is_each_stored_rows_own(store, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    """The raw column, built a batch at a time, is ``json.dumps`` of the row the csv module reads on that line."""
    import csv
    import io
    import json

    from app.intake.ingest import import_roster
    from app.store import engine, raw_rows

    monkeypatch.setattr(engine, "BATCH_ROWS", 3)  # several batches, rejected and duplicate rows in between
    monkeypatch.setattr(raw_rows, "RAW_BATCH", 3)
    header = ["Issuer Code", "FY", "Exit Reason", "Comment"]
    body = [["F1", "2001", "Retired", "a, b"], ["F2", "20x1", "Fired", ""], ["F3", "2003", "Fired", 'q "x"'],
            ["F1", "2001", "Retired", "a, b"], ["F4", "2004", "Health", ""], ["", "2005", "Retired", "n"],
            ["F5", "2005", " Retired ", "é"], ["F6", "2006", "Fired", ""], ["F7", "2007", "Fired", "z"]]
    out = io.StringIO()
    csv.writer(out, lineterminator="\n").writerows([header, *body])
    report = import_roster(store, out.getvalue().encode(), "r.csv")
    frame = store.departures(report.roster.id, with_raw=True)
    by_line = {i + 2: dict(zip(header, row, strict=True)) for i, row in enumerate(body)}
    assert list(frame["line"]) == [2, 4, 6, 8, 9, 10]  # line 3: bad year, 5: a duplicate, 7: no firm id
    for line, raw in zip(frame["line"], frame["raw"], strict=True):
        assert json.loads(raw) == by_line[line] and raw == json.dumps(by_line[line], ensure_ascii=False)
    assert [(r.line, json.loads(r.raw)) for r in report.rejected_rows] == [(3, by_line[3]), (7, by_line[7])]
