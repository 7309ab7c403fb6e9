"""Analyst queries: filters, sorting, cursor pages, CSV, detail, reviews, erasure, summary."""

from __future__ import annotations

import base64
import csv
import datetime as dt
import io
import json
from urllib.parse import quote

import pytest
from sqlalchemy import func, select

from service.models import Erasure, Respondent, Review

from .conftest import random_rows, stored_results

BASE = "/v1/surveys/pulse"


@pytest.fixture
def filled(service, survey):
    rows = random_rows(60, seed=7)
    reply = service.client.post(
        f"{BASE}/responses", json={"responses": rows}, headers=service.auth(service.ingest)
    )
    assert reply.status_code == 201
    return {r["respondent_id"]: r for r in reply.json()["results"]}


def _all_pages(service, **params):
    seen, cursor = [], None
    for _ in range(100):  # bounded
        query = {**params, **({"cursor": cursor} if cursor else {})}
        page = service.client.get(
            f"{BASE}/respondents", params=query, headers=service.auth(service.analyst)
        )
        assert page.status_code == 200, page.text
        seen.extend(page.json()["data"])
        cursor = page.json()["next_cursor"]
        if cursor is None:
            return seen
    raise AssertionError("pagination did not end")


@pytest.mark.parametrize("sort", ["-flag_count", "flag_count", "received_at", "-respondent_id"])
def test_cursor_pages_visit_every_respondent_once_in_order(service, filled, sort):
    rows = _all_pages(service, limit=7, sort=sort)
    assert sorted(r["respondent_id"] for r in rows) == sorted(filled)
    key = sort.lstrip("-")
    values = [r[key] for r in rows]
    assert values == sorted(values, reverse=sort.startswith("-"))


def test_filters(service, filled):
    flagged = {rid for rid, r in filled.items() if r["flag_count"] > 0}
    assert flagged and flagged != set(filled)
    assert {r["respondent_id"] for r in _all_pages(service, flagged="true")} == flagged
    assert {r["respondent_id"] for r in _all_pages(service, flagged="false")} == (
        set(filled) - flagged
    )
    two = {rid for rid, r in filled.items() if r["flag_count"] >= 2}
    assert {r["respondent_id"] for r in _all_pages(service, min_flags=2)} == two
    by_detector = {rid for rid, r in filled.items() if "long_string" in r["flags"]}
    assert {r["respondent_id"] for r in _all_pages(service, detector="long_string")} == (
        by_detector
    )
    some = sorted(filled)[0]
    service.client.post(
        f"{BASE}/respondents/{some}/review", json={"decision": "exclude", "note": "n"},
        headers=service.auth(service.analyst),
    )
    assert [r["respondent_id"] for r in _all_pages(service, review="exclude")] == [some]
    assert len(_all_pages(service, review="none")) == len(filled) - 1
    future = (dt.datetime.now(dt.UTC) + dt.timedelta(days=1)).isoformat()
    assert _all_pages(service, received_after=future) == []
    assert len(_all_pages(service, received_before=future)) == len(filled)


def test_bad_queries_are_problems(service, filled):
    reader = service.auth(service.analyst)
    for params in (
        {"detector": "nope"},
        {"cursor": "garbage!"},
        {"sort": "answers"},
        {"limit": 0},
        {"limit": 100000},
        {"received_after": "yesterday"},
    ):
        reply = service.client.get(f"{BASE}/respondents", params=params, headers=reader)
        assert reply.status_code == 422, params
        assert reply.headers["content-type"].startswith("application/problem+json")
        assert reply.json()["errors"], params
    first = service.client.get(f"{BASE}/respondents", params={"limit": 2}, headers=reader).json()
    other_sort = service.client.get(
        f"{BASE}/respondents",
        params={"limit": 2, "sort": "received_at", "cursor": first["next_cursor"]},
        headers=reader,
    )
    assert other_sort.status_code == 422
    assert service.client.get(
        f"{BASE}/respondents", headers={**reader, "Accept": "image/png"}
    ).status_code == 406


def _cursor(*parts) -> str:
    raw = json.dumps(list(parts)).encode()
    return base64.urlsafe_b64encode(raw).decode().rstrip("=")


@pytest.mark.parametrize(
    ("params", "pointer"),
    [
        ({"min_flags": 2**63}, "query:min_flags"),
        ({"received_after": "0001-01-01T00:00:00+01:00"}, "query:received_after"),
        ({"received_before": "9999-12-31T23:30:00-01:00"}, "query:received_before"),
        ({"cursor": _cursor("-flag_count", 2**70, 1)}, "query:cursor"),
        ({"cursor": _cursor("-flag_count", 1, 2**63)}, "query:cursor"),
        ({"cursor": _cursor("-flag_count", 1, -1)}, "query:cursor"),
        ({"sort": "received_at", "cursor": _cursor("received_at", "2027-01-01T00:00:00", 5)},
         "query:cursor"),
        ({"sort": "received_at", "cursor": _cursor("received_at", "0001-01-01T00:00+01:00", 5)},
         "query:cursor"),
        ({"sort": "respondent_id", "cursor": _cursor("respondent_id", "a\x00b", 5)},
         "query:cursor"),
    ],
)
def test_crafted_queries_are_refused_not_failed(service, filled, params, pointer):
    reply = service.client.get(
        f"{BASE}/respondents", params=params, headers=service.auth(service.analyst)
    )
    assert reply.status_code == 422, reply.text
    assert [e["pointer"] for e in reply.json()["errors"]] == [pointer]


def test_csv_has_the_same_rows_and_a_next_link(service, filled):
    reader = service.auth(service.analyst)
    params = {"limit": 5, "sort": "respondent_id"}
    as_json = service.client.get(f"{BASE}/respondents", params=params, headers=reader).json()
    reply = service.client.get(
        f"{BASE}/respondents", params=params, headers={**reader, "Accept": "text/csv"}
    )
    assert reply.status_code == 200
    assert reply.headers["content-type"].startswith("text/csv")
    rows = list(csv.DictReader(io.StringIO(reply.text)))
    assert list(rows[0]) == [
        "respondent_id", "flag_count", "flags", "verdict", "careless_score", "review_decision",
        "received_at", "version",
    ]
    assert [r["verdict"] for r in rows] == [r["verdict"] for r in as_json["data"]]
    assert [r["respondent_id"] for r in rows] == [r["respondent_id"] for r in as_json["data"]]
    assert [r["flags"].split(";") if r["flags"] else [] for r in rows] == [
        r["flags"] for r in as_json["data"]
    ]
    assert as_json["next_cursor"] in reply.headers["link"]
    assert reply.headers["heedful-next-cursor"] == as_json["next_cursor"]


def test_detail_review_history_and_errors(service, filled):
    reader = service.auth(service.analyst)
    rid = next(rid for rid, r in filled.items() if r["flag_count"])
    detail = service.client.get(f"{BASE}/respondents/{rid}", headers=reader).json()
    assert detail["flags"] == filled[rid]["flags"]
    for outcome in detail["results"]:
        assert outcome["state"] in ("assessed", "not_assessed", "not_applicable")
        assert outcome["sentence"]
        if outcome["state"] == "assessed":
            assert outcome["evidence"] and outcome["flagged"] == (
                outcome["score"] >= outcome["cutoff"]
            )
        else:
            assert outcome["reason"]
    for decision in ("undecided", "exclude"):
        stored = service.client.post(
            f"{BASE}/respondents/{rid}/review", json={"decision": decision, "note": decision},
            headers=reader,
        )
        assert stored.status_code == 201 and stored.json()["reviewer"] == "analyst-key"
    detail = service.client.get(f"{BASE}/respondents/{rid}", headers=reader).json()
    assert [r["decision"] for r in detail["reviews"]] == ["undecided", "exclude"]
    assert detail["review_decision"] == "exclude"
    bad = service.client.post(
        f"{BASE}/respondents/{rid}/review", json={"decision": "maybe"}, headers=reader
    )
    assert bad.status_code == 422 and bad.json()["errors"][0]["pointer"] == "#/decision"
    missing = service.client.get(f"{BASE}/respondents/nobody", headers=reader)
    assert missing.status_code == 404
    assert missing.json()["type"] == "/problems/unknown-respondent"


def test_erasure_removes_everything_but_an_audit_line(service, filled):
    rid = sorted(filled)[0]
    service.client.post(
        f"{BASE}/respondents/{rid}/review", json={"decision": "keep", "note": "personal note"},
        headers=service.auth(service.analyst),
    )
    reply = service.client.delete(f"{BASE}/respondents/{rid}", headers=service.auth(service.admin))
    assert reply.status_code == 204
    assert service.client.get(
        f"{BASE}/respondents/{rid}", headers=service.auth(service.admin)
    ).status_code == 404
    with service.database.read() as session:
        assert session.scalar(select(func.count()).select_from(Review)) == 0
        assert session.scalar(
            select(func.count()).select_from(Respondent).where(Respondent.respondent_id == rid)
        ) == 0
        audit = session.scalars(select(Erasure)).all()
    assert len(stored_results(service.database)) == (len(filled) - 1) * len(detail_names(service))
    assert len(audit) == 1 and audit[0].erased_by == "admin-key"
    assert rid not in audit[0].respondent_digest


def detail_names(service):
    return service.client.get("/v1/detectors", headers=service.auth(service.admin)).json()["data"]


def test_summary_counts_match_the_stored_flags(service, filled):
    report = service.client.get(f"{BASE}/summary", headers=service.auth(service.analyst)).json()
    assert report["respondents"] == len(filled)
    assert report["flagged_any"] == sum(1 for r in filled.values() if r["flag_count"])
    for name, tally in report["detectors"].items():
        flagged = sum(1 for r in filled.values() if name in r["flags"])
        assert tally["flagged"] == flagged
        assert tally["assessed"] + tally["not_assessed"] + tally["not_applicable"] == len(filled)
        if tally["assessed"]:
            assert tally["flag_rate"] == pytest.approx(flagged / tally["assessed"])
    [day] = report["days"]
    assert day["day"] == dt.datetime.now(dt.UTC).date().isoformat()
    assert day["respondents"] == len(filled)
    assert report["reviewed"] == {"none": len(filled)}


def test_verdict_and_careless_score_after_a_reference(service, filled):
    reader = service.auth(service.analyst)
    # Before a reference sample there is nothing to rank against: no careless score yet, and a
    # careless-score listing is empty; verdicts come from the flags alone.
    before = _all_pages(service)
    assert {r["careless_score"] for r in before} == {None}
    assert _all_pages(service, sort="-careless_score") == []
    for r in before:
        expected = "ok" if r["flag_count"] == 0 else r["verdict"]
        assert r["verdict"] == expected and r["verdict"] in ("ok", "review", "likely_careless")
    assert service.client.post(
        f"{BASE}/rescreen", headers=service.auth(service.admin)
    ).status_code == 200
    rows = _all_pages(service, limit=7, sort="-careless_score")
    assert sorted(r["respondent_id"] for r in rows) == sorted(filled)
    scores = [r["careless_score"] for r in rows]
    assert scores == sorted(scores, reverse=True) and 0 <= min(scores) <= max(scores) <= 1
    for verdict in ("ok", "review", "likely_careless"):
        chosen = {r["respondent_id"] for r in rows if r["verdict"] == verdict}
        assert {r["respondent_id"] for r in _all_pages(service, verdict=verdict)} == chosen
    top = rows[0]["respondent_id"]
    detail = service.client.get(f"{BASE}/respondents/{top}", headers=reader).json()
    assert detail["careless_score"] == rows[0]["careless_score"]
    assert detail["verdict"] == rows[0]["verdict"]
    # Every detail says why its verdict: a review without any flag can only come from the
    # careless score's own hurdle, and says so.
    for row in rows:
        detail = service.client.get(
            f"{BASE}/respondents/{row['respondent_id']}", headers=reader
        ).json()
        reason = detail["verdict_reason"]
        if row["verdict"] == "ok":
            assert reason.startswith("no counted family flagged"), reason
        elif not row["flags"] or all(f in ("extreme_style", "midpoint_style") for f in row["flags"]):
            assert reason.startswith("careless score"), reason
        else:
            assert reason.startswith("flagged by"), reason


@pytest.mark.parametrize(
    "path", ["/v1/surveys/pu%00lse", f"{BASE}/respondents/a%00b", f"{BASE}/respondents/a%00b/review"]
)
def test_a_nul_in_a_path_id_is_not_found(service, filled, path):
    reply = service.client.request(
        "POST" if path.endswith("/review") else "GET", path,
        json={"decision": "keep", "note": "n"}, headers=service.auth(service.admin),
    )
    assert reply.status_code == 404, reply.text


@pytest.mark.parametrize("rid", ["a/b", "x/review", "/lead", "trail/", "50%/100%", "q?a#b"])
def test_ids_with_slashes_and_url_characters_can_be_read_reviewed_and_erased(
    service, survey, rid
):
    reply = service.client.post(
        f"{BASE}/responses", json={"respondent_id": rid, "answers": {"q01": 2, "q02": 4}},
        headers=service.auth(service.ingest),
    )
    assert reply.status_code == 201, reply.text
    path = f"{BASE}/respondents/{quote(rid, safe='')}"
    detail = service.client.get(path, headers=service.auth(service.analyst))
    assert detail.status_code == 200, detail.text
    assert detail.json()["respondent_id"] == rid
    review = service.client.post(
        f"{path}/review", json={"decision": "keep", "note": "read"},
        headers=service.auth(service.analyst),
    )
    assert review.status_code == 201, review.text
    assert service.client.delete(path, headers=service.auth(service.admin)).status_code == 204
    with service.database.read() as session:
        assert session.scalar(select(func.count()).select_from(Respondent)) == 0
        assert session.scalar(select(func.count()).select_from(Erasure)) == 1


def test_a_review_note_with_a_nul_is_refused(service, filled):
    some = sorted(filled)[0]
    reply = service.client.post(
        f"{BASE}/respondents/{some}/review", json={"decision": "keep", "note": "read\x00"},
        headers=service.auth(service.analyst),
    )
    assert reply.status_code == 422, reply.text
    assert [e["pointer"] for e in reply.json()["errors"]] == ["#/note"]


def test_careless_score_ties_go_by_flag_count_across_pages(service, filled):
    """Equal careless scores are common (a percentile among the reference's respondents);
    such respondents are listed by flag count, most first, and paging keeps that order."""
    assert service.client.post(
        f"{BASE}/rescreen", headers=service.auth(service.admin)
    ).status_code == 200
    for sort, sign in (("-careless_score", -1), ("careless_score", 1)):
        rows = _all_pages(service, limit=3, sort=sort)
        tied = [r for r in rows if [x["careless_score"] for x in rows].count(r["careless_score"]) > 1]
        assert len({r["flag_count"] for r in tied}) > 1  # ties that the flag count orders
        keys = [(sign * r["careless_score"], sign * r["flag_count"]) for r in rows]
        assert keys == sorted(keys)
        assert len({r["respondent_id"] for r in rows}) == len(rows) == len(filled)
