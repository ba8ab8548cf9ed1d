"""The confirm page offers intake profiles (issue 14): a saved profile whose header set matches the upload is
proposed, applying it fills the column roles, header row, date reading and fiscal-year end, and the analyst can
save the choices of an import as a profile. Files are invented here; fiscal years worked by hand (a fiscal year
is named by the calendar year in which it ends, issue 14's convention)."""

from __future__ import annotations

from typing import Any

from app.store import Store

ROLES = {"firm_id": "Ref", "reason": "Why", "date": "Exit"}


def awkward(rows: list[tuple[str, str, str]], order: tuple[str, ...] = ("Ref", "Why", "Exit")) -> bytes:
    lines = ["Exits register,,", "Generated on 2026-01-05,,", ",,", ",".join(order)]
    lines += [",".join(dict(zip(("Ref", "Why", "Exit"), r, strict=True))[h] for h in order) for r in rows]
    return ("\n".join(lines) + "\n").encode()


def upload(client: Any, data: bytes, filename: str) -> Any:
    response = client.post("/rosters/upload", files={"file": (filename, data, "text/csv")})
    assert response.status_code == 200, response.text
    return response.context["page"]


def test_save_a_profile_on_confirm_then_apply_it_to_the_next_file(empty_client: Any, store: Store) -> None:
    page = upload(empty_client, awkward([("F1", "Retired", "04/03/2020"), ("F2", "Ousted", "01/02/2019")]), "w1.csv")
    assert page.profiles == () and page.proposed_profile is None
    form = {"token": page.token, "name": "week 1", "header_row": "4", "date_order": "mdy", "fy_end": "3",
            "save_profile": "desk A"} | {f"role_{r}": h for r, h in ROLES.items()}
    done = empty_client.post("/rosters/confirm", data=form, follow_redirects=False)
    assert done.status_code == 303, done.text
    saved = store.get_profile("desk A")
    assert (saved.roles, saved.header_row, saved.date_order, saved.fy_end) == (ROLES, 4, "mdy", 3)

    # next week's file: same headers, other order; the page proposes the profile but does not apply it unasked
    data = awkward([("F3", "Retired", "04/03/2020")], order=("Exit", "Ref", "Why"))
    page = upload(empty_client, data, "w2.csv")
    assert page.profiles == ("desk A",) and page.proposed_profile == "desk A" and page.profile is None
    html = empty_client.post("/rosters/upload", files={"file": ("w2.csv", data, "text/csv")}).text
    assert "Saved profile \u201cdesk A\u201d matches this file\u2019s columns" in html
    applied = empty_client.post("/rosters/review", data={"token": page.token, "name": "week 2", "profile": "desk A",
                                                         "apply_profile": "yes", "date_order": "auto",
                                                         "fy_end": "12"})
    assert applied.status_code == 200, applied.text
    page = applied.context["page"]
    assert page.profile == "desk A"
    assert ({r: h for r, h in page.roles.items() if h}, page.header_row, page.date_order, page.fy_end) == (
        ROLES, 4, "mdy", 3)
    assert page.review is not None and page.review.accepted == 1
    form = {"token": page.token, "name": "week 2", "header_row": str(page.header_row), "date_order": page.date_order,
            "fy_end": str(page.fy_end)} | {f"role_{r}": h for r, h in ROLES.items()}
    done = empty_client.post("/rosters/confirm", data=form, follow_redirects=False)
    assert done.status_code == 303
    week2 = store.get_roster("week 2")
    # 3 April 2020 (month/day/year) with fiscal years ending in March: FY2021
    assert store.departures(week2.id)["year"].tolist() == [2021]


def test_an_unknown_profile_is_refused_with_its_name(empty_client: Any, store: Store) -> None:
    page = upload(empty_client, awkward([("F1", "Retired", "04/03/2020")]), "w1.csv")
    response = empty_client.post("/rosters/review", data={"token": page.token, "profile": "nope",
                                                          "apply_profile": "yes"})
    assert response.status_code == 400
    assert "No intake profile is named 'nope'" in response.context["page"].error
    assert store.list_rosters() == []
