"""Rosters pages: upload, confirm the column roles, detail counts, rejected rows, delete, JSON twins."""

from __future__ import annotations

import csv
import io
import re
from typing import Any

import pandas as pd
import pytest
from conftest import DEMO_CSV

from app.store import Store

# demo_data/README.md "Columns": which header holds which role
DEMO_ROLES = {"firm_id": "Issuer Code", "firm_name": "Issuer Name", "sector": "Industry", "year": "FY",
              "date": "Exit Date", "reason": "Exit Reason", "executive": "Executive", "age": "Age at Exit",
              "tenure": "Years in Role", "interim": "Interim?", "notes": "Comment"}
XSS = "<script>alert(1)</script>"


def upload(client: Any, data: bytes, filename: str = "roster.csv") -> Any:
    return client.post("/rosters/upload", files={"file": (filename, data, "text/csv")})


def confirm(client: Any, page: Any, **extra: str) -> Any:
    form = {"token": page.token, "name": page.name}
    form |= {f"role_{r}": h for r, h in page.roles.items() if h}
    form |= extra
    return client.post("/rosters/confirm", data=form, follow_redirects=False)


def expected_counts(frame: pd.DataFrame, clean: pd.DataFrame) -> dict[str, int]:
    cols = [c for c in frame.columns if c != "line"]
    duplicates = int(frame.duplicated(subset=cols).sum())
    return {"rows_total": len(frame), "duplicates": duplicates,
            "rejected": len(frame) - duplicates - len(clean), "accepted": len(clean)}


def test_upload_shows_detected_roles_then_confirm_imports(empty_client: Any, store: Store,
                                                          demo_frame: pd.DataFrame,
                                                          demo_clean: pd.DataFrame) -> None:
    preview = upload(empty_client, DEMO_CSV.read_bytes())
    assert preview.status_code == 200
    assert preview.template.name == "roster_confirm.html"
    page = preview.context["page"]
    assert page.roles == DEMO_ROLES | {"announced": None}  # the demo roster has no announcement dates
    assert page.preview.missing_roles == ()
    assert page.duplicate_of is None
    assert len(page.preview.rows) == 10
    assert re.search(r'<select id="role_firm_id"[^>]*>.*?<option value="Issuer Code" selected>', preview.text, re.S)
    assert store.counts()["rosters"] == 0  # nothing is stored before the confirm step

    done = confirm(empty_client, page)
    assert done.status_code == 303
    roster_id = int(done.headers["location"].rstrip("/").rsplit("/", 1)[1])
    detail = empty_client.get(done.headers["location"])
    assert detail.template.name == "roster_detail.html"
    roster = detail.context["page"].roster
    counts = expected_counts(demo_frame, demo_clean)
    # demo_data/README.md: 10 exact duplicate rows and 4 rows an importer should reject
    assert counts["duplicates"] == 10 and counts["rejected"] == 4
    assert {k: getattr(roster, k) for k in counts} == counts
    assert roster.columns == DEMO_ROLES and roster.id == roster_id
    assert detail.context["page"].firms == demo_clean["Issuer Code"].nunique()
    assert f'<div class="v">{counts["accepted"]:,}</div>' in detail.text  # with thousands separators
    api = empty_client.get(f"/api/rosters/{roster_id}").json()
    assert api["roster"]["accepted"] == counts["accepted"] and api["rejected_total"] == 4


def test_role_override_through_the_form(empty_client: Any) -> None:
    data = ("Company,Ticker,Year,Outcome\n" + "".join(
        f"Quorvane Ltd,QV{i % 5},{2000 + i % 6},{'C7' if i % 3 else 'C9'}\n" for i in range(30))
    ).encode()  # codes without departure wording: neither the header nor the values name the reason
    page = upload(empty_client, data, "outcomes.csv").context["page"]
    assert page.roles["reason"] is None and "reason code" in page.preview.missing_roles
    refused = confirm(empty_client, page)
    assert refused.status_code == 400 and "reason code" in refused.context["page"].error
    done = confirm(empty_client, page, role_reason="Outcome")
    assert done.status_code == 303
    roster = empty_client.get(done.headers["location"]).context["page"].roster
    assert roster.columns["reason"] == "Outcome" and roster.accepted == 30


def test_choosing_none_for_a_detected_role_leaves_it_out(empty_client: Any) -> None:
    page = upload(empty_client, DEMO_CSV.read_bytes()).context["page"]
    form = {"token": page.token, "name": "no notes"} | {f"role_{r}": h for r, h in page.roles.items()}
    form["role_notes"] = ""  # the select's "— none —" option
    done = empty_client.post("/rosters/confirm", data=form, follow_redirects=False)
    assert done.status_code == 303
    roster = empty_client.get(done.headers["location"]).context["page"].roster
    assert "notes" not in roster.columns


def test_same_file_again_warns_and_needs_explicit_consent(client: Any, demo_store: Store) -> None:
    before = demo_store.counts()
    preview = upload(client, DEMO_CSV.read_bytes())
    page = preview.context["page"]
    assert page.duplicate_of is not None and page.duplicate_of.id == 1
    assert "import it again anyway" in preview.text and "already imported" in preview.text
    refused = confirm(client, page)
    assert refused.status_code == 400
    assert "already imported" in refused.context["page"].error
    assert demo_store.counts() == before
    again = confirm(client, page, allow_same_file="yes", name="Demo copy")
    assert again.status_code == 303
    assert demo_store.counts()["rosters"] == before["rosters"] + 1


def test_rejected_rows_download_has_line_numbers_and_neutralised_formulas(empty_client: Any,
                                                                           store: Store) -> None:
    data = (b"Issuer Code,Issuer Name,FY,Exit Reason\n"
            b"HX0001,Brixel plc,2001,Retired\n"
            b"HX0002,=HYPERLINK(\"http://x\"),2002,\n"  # no reason: rejected, formula in a cell
            b"HX0003,Ulvanor AG,20O3,Retired\n"  # letter O in the year: rejected
            b"HX0004,Tamaric,2004,Dismissed\n")
    result = empty_client.post("/api/rosters", files={"file": ("mess.csv", data, "text/csv")})
    assert result.status_code == 201
    roster_id = result.json()["id"]
    response = empty_client.get(f"/rosters/{roster_id}/rejected.csv")
    assert response.status_code == 200 and response.headers["content-type"].startswith("text/csv")
    assert "attachment" in response.headers["content-disposition"]
    rows = list(csv.DictReader(io.StringIO(response.text)))
    assert [int(r["line"]) for r in rows] == [3, 4]  # header is line 1 (count them above)
    assert all(r["reason"] for r in rows)
    # OWASP CSV injection advice: a cell starting with = gets a leading apostrophe
    assert not any(cell.startswith(("=", "+", "-", "@")) for r in rows for cell in r.values())
    assert "HYPERLINK" in rows[0]["raw"]


def test_import_api_keys_and_duplicate_conflict(empty_client: Any, demo_frame: pd.DataFrame,
                                                demo_clean: pd.DataFrame) -> None:
    files = {"file": ("roster.csv", DEMO_CSV.read_bytes(), "text/csv")}
    created = empty_client.post("/api/rosters", files=files, data={"name": "Demo via API"})
    assert created.status_code == 201
    body = created.json()
    assert set(body) == {"roster", "id", "rows", "accepted", "rejected", "duplicates", "version", "added",
                         "removed", "changed", "header_row", "columns", "messages"}
    counts = expected_counts(demo_frame, demo_clean)
    assert (body["roster"], body["rows"], body["accepted"], body["rejected"], body["duplicates"]) == (
        "Demo via API", counts["rows_total"], counts["accepted"], counts["rejected"], counts["duplicates"])
    again = empty_client.post("/api/rosters", files=files)
    assert again.status_code == 409 and "already imported" in again.json()["error"]
    listed = empty_client.get("/api/rosters").json()
    assert [r["name"] for r in listed["rosters"]] == ["Demo via API"]


def test_import_api_says_how_an_ambiguous_date_column_was_read(empty_client: Any) -> None:
    """01/02/2019 and 03/04/2020 read either way (no part over 12): the CLI printed that the column was read
    day/month/year, the API said nothing (found probing a served instance, session 7). Both day-first readings
    are counted by hand: 1 February 2019 and 3 April 2020."""
    data = b"Firm ID,Reason,Departure date\nF1,Retired,01/02/2019\nF2,Dismissed,03/04/2020\n"
    result = empty_client.post("/api/rosters", files={"file": ("amb.csv", data, "text/csv")})
    assert result.status_code == 201
    assert any("day/month/year" in m for m in result.json()["messages"]), result.json()["messages"]
    listed = empty_client.get(f"/api/rosters/{result.json()['id']}/departures").json()["departures"]
    assert [(d["firm_id"], d["date"]) for d in listed] == [("F1", "2019-02-01"), ("F2", "2020-04-03")]


def test_allow_same_file_takes_yes_or_nothing(empty_client: Any) -> None:
    """The schema's enum is ["yes"]; "1" was read as no and answered 409 (found probing, session 7)."""
    files = {"file": ("roster.csv", DEMO_CSV.read_bytes(), "text/csv")}
    assert empty_client.post("/api/rosters", files=files).status_code == 201
    odd = empty_client.post("/api/rosters", files=files, data={"allow_same_file": "1"})
    assert odd.status_code == 400 and "allow_same_file" in odd.json()["error"]
    again = empty_client.post("/api/rosters", files=files, data={"allow_same_file": "yes", "name": "Second"})
    assert again.status_code == 201
    assert len(empty_client.get("/api/rosters").json()["rosters"]) == 2


def test_delete_roster(client: Any, demo_store: Store) -> None:
    response = client.post("/rosters/1/delete", data={"confirm": "yes"}, follow_redirects=False)
    assert response.status_code == 303 and response.headers["location"].endswith("/rosters")
    counts = demo_store.counts()
    assert counts["rosters"] == 0 and counts["departures"] == 0 and counts["rejected_rows"] == 0
    assert counts["mappings"] == 2  # mappings stay (roster_detail.html says so)
    assert client.get("/rosters/1").status_code == 404


@pytest.mark.parametrize("path", ["/rosters/999", "/rosters/999/rejected.csv", "/rosters/999/reasons"])
def test_unknown_roster_is_404_in_html(empty_client: Any, path: str) -> None:
    response = empty_client.get(path)
    assert response.status_code == 404
    assert response.template.name == "error.html"
    assert "999" in response.context["page"]["message"]


def test_unknown_roster_is_404_in_json(empty_client: Any) -> None:
    response = empty_client.get("/api/rosters/999")
    assert response.status_code == 404
    assert "999" in response.json()["error"]
    assert empty_client.post("/rosters/999/delete").status_code == 404


@pytest.mark.parametrize(("data", "filename"), [
    (b"\x89PNG\r\n\x1a\n" + bytes(range(256)) * 4, "picture.png"),
    (b"%PDF-1.4\n%\xe2\xe3\xcf\xd3\n1 0 obj\n<<>>\nendobj\n", "report.pdf"),
    (b"", "empty.csv"),
])
def test_non_roster_upload_gives_a_clear_message(empty_client: Any, store: Store, data: bytes,
                                                 filename: str) -> None:
    response = upload(empty_client, data, filename)
    assert response.status_code == 400
    assert response.template.name == "rosters.html"
    message = response.context["page"].message
    assert message and message.endswith(".")
    assert message in response.text or message.replace("'", "&#39;") in response.text
    assert store.counts()["rosters"] == 0


def test_markup_in_a_roster_is_shown_escaped(empty_client: Any) -> None:
    data = ("Issuer Code,Issuer Name,Industry,FY,Exit Reason\n"
            + "".join(f"HX{i:04d},{XSS},{XSS},{2000 + i % 5},{XSS if i % 2 else 'Retired'}\n" for i in range(12))
            + f"HX9999,{XSS},{XSS},not a year,Retired\n").encode()
    result = empty_client.post("/api/rosters", files={"file": ("x.csv", data, "text/csv")}, data={"name": XSS})
    assert result.status_code == 201
    roster_id = result.json()["id"]
    for path in (f"/rosters/{roster_id}", f"/rosters/{roster_id}/reasons", "/rosters"):
        html = empty_client.get(path).text
        assert XSS not in html, path
        assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html, path


def _awkward_csv() -> bytes:
    """A title block, month-first dates under an automatic day-first reading, and a source footer."""
    rows = ["Departures export,,", "Generated on 2026-05-01,,", ",,", "Ticker,How left,Date left"]
    rows += [f"F{i},Retired,{(i % 12) + 1:02d}/{13 + i % 10}/2015" for i in range(8)]  # month-first: 8 rows
    rows += [f"G{i},Dismissed,{13 + i % 10}/03/2016" for i in range(3)]  # day-first: 3 rows
    rows += [f"H{i},Still in post," for i in range(2)]
    rows += ["Source: invented for the tests,,"]
    return ("\n".join(rows) + "\n").encode()


def test_review_step_before_import_and_its_choices(empty_client: Any, store: Store) -> None:
    page = upload(empty_client, _awkward_csv(), "awkward.csv").context["page"]
    assert page.header_row == 4 and page.roles["firm_id"] == "Ticker" and page.roles["reason"] == "How left"
    review = page.review
    # month-first wins the whole column (8 proofs against 3): the 3 day-first rows would be rejected
    assert (review.accepted, review.rejected, review.still_in_post) == (10, 3, 2)
    assert review.rejected_groups[0].count == 3 and len(review.rejected_groups[0].examples) == 2
    assert review.footer_lines == (18,) and store.counts()["rosters"] == 0
    form = {"token": page.token, "name": page.name, "header_row": "4", "date_order": "dmy", "fy_end": "3"}
    form |= {f"role_{r}": h for r, h in page.roles.items() if h}
    again = empty_client.post("/rosters/review", data=form)
    assert again.status_code == 200
    rv = again.context["page"].review
    assert (rv.accepted, rv.rejected) == (5, 8) and "end in March" in rv.date_rule
    assert "Check these choices" in again.text and "Review before import" in again.text
    assert store.counts()["rosters"] == 0
    bad = empty_client.post("/rosters/review", data=form | {"header_row": "x1"})
    assert bad.status_code == 400 and "must be a line number" in bad.context["page"].error
    done = empty_client.post("/rosters/confirm", data=form, follow_redirects=False)
    assert done.status_code == 303
    detail = empty_client.get(done.headers["location"]).context["page"]
    assert (detail.roster.accepted, detail.roster.rejected) == (5, 8)
    assert detail.rejected_groups[0].count == 8


def test_rejected_rows_page_groups_and_paginates(empty_client: Any) -> None:
    rows = ["Ticker,Reason,FY"] + [f"F{i},Retired,{2000 + i % 20}" for i in range(10)]
    rows += [f",Retired,{1950 + i}" for i in range(70)] + [f"F{i},Retired,FY later" for i in range(5)]
    page = upload(empty_client, ("\n".join(rows) + "\n").encode(), "many.csv").context["page"]
    done = confirm(empty_client, page)
    location = done.headers["location"]
    first = empty_client.get(location).context["page"]
    assert first.rejected_total == 75 and first.rejected_pages == 2 and len(first.rejected) == 50
    assert [(g.count, g.reason[:15]) for g in first.rejected_groups] == [(70, "missing firm id"), (5, "year … is not a")]
    second = empty_client.get(location + "?page=2")
    assert len(second.context["page"].rejected) == 25 and "page 2 of 2" in second.text
    assert empty_client.get(location + "?page=99").context["page"].rejected_page == 2


def test_coverage_and_trend_carry_the_row_count_forward(empty_client: Any) -> None:
    rows = ["Ticker,Reason,FY"] + [f"F{i % 9},{'Retired' if i % 2 else 'Dismissed'},{2000 + i % 15}"
                                   for i in range(60)] + [",Retired,2001", ",Retired,2002"]
    page = upload(empty_client, ("\n".join(rows) + "\n").encode(), "few.csv").context["page"]
    roster_url = confirm(empty_client, page).headers["location"]
    coverage = empty_client.get(roster_url + "/coverage").text
    assert "60 of 62 rows; 2 rejected" in coverage and "3.2% of the file's rows were rejected" in coverage
    trend = empty_client.get(roster_url + "/trend").text
    assert "60 of 62 rows; 2 rejected" in trend and "more than 2%" not in trend


def test_no_rejection_warning_at_or_below_two_percent(empty_client: Any) -> None:
    rows = ["Ticker,Reason,FY"] + [f"F{i % 9},Retired,{1950 + i}" for i in range(60)] + [",Retired,2001"]
    page = upload(empty_client, ("\n".join(rows) + "\n").encode(), "ok.csv").context["page"]
    coverage = empty_client.get(confirm(empty_client, page).headers["location"] + "/coverage").text
    assert "60 of 61 rows; 1 rejected" in coverage and "more than 2%" not in coverage
