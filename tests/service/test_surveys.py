"""Registering surveys and versions, reading them, detectors list, summaries."""

from __future__ import annotations

import pytest

from detectors import REGISTRY, lint, parse_instrument

from .conftest import make_document, random_rows


def test_register_returns_lint_warnings_and_secret(service):
    document = make_document(n_items=6, points=4)
    reply = service.client.post("/v1/surveys", json=document, headers=service.auth(service.admin))
    assert reply.status_code == 201
    body = reply.json()
    assert body["version"] == 1 and body["new_version"] is True
    assert body["webhook_secret"].startswith("whsec_")
    expected = lint(parse_instrument(document))
    assert [(w["code"], w["location"]) for w in body["lint"]] == [
        (n.code, n.location) for n in expected
    ]
    assert "no_midpoint" in {w["code"] for w in body["lint"]}


def test_same_document_is_not_a_new_version_and_a_change_is(service, survey):
    admin = service.auth(service.admin)
    again = service.client.post("/v1/surveys", json=survey["document"], headers=admin)
    assert again.status_code == 200
    assert again.json()["version"] == 1 and again.json()["new_version"] is False
    assert again.json()["webhook_secret"] == survey["webhook_secret"]
    changed = {**survey["document"], "title": "Pulse, second wave"}
    second = service.client.post("/v1/surveys", json=changed, headers=admin)
    assert second.status_code == 201 and second.json()["version"] == 2
    shown = service.client.get("/v1/surveys/pulse", headers=admin).json()
    assert [v["number"] for v in shown["versions"]] == [1, 2]
    assert shown["title"] == "Pulse, second wave"
    assert shown["instrument"]["title"] == "Pulse, second wave"


def test_invalid_instrument_names_every_field(service):
    document = make_document()
    document["response_format"]["points"] = 11
    document["items"][1]["id"] = document["items"][0]["id"]
    reply = service.client.post("/v1/surveys", json=document, headers=service.auth(service.admin))
    assert reply.status_code == 422
    problem = reply.json()
    assert reply.headers["content-type"].startswith("application/problem+json")
    assert problem["type"] == "/problems/invalid-instrument"
    assert "#/response_format/points" in {e["pointer"] for e in problem["errors"]}
    unknown_detector = make_document()
    unknown_detector["screening"] = {"no_such_detector": {}}
    reply = service.client.post(
        "/v1/surveys", json=unknown_detector, headers=service.auth(service.admin)
    )
    assert reply.status_code == 422
    assert reply.json()["errors"][0]["pointer"] == "#/screening/no_such_detector"
    malformed = service.client.post(
        "/v1/surveys", content=b"{", headers={**service.auth(service.admin),
                                               "content-type": "application/json"},
    )
    assert malformed.status_code == 400


@pytest.mark.parametrize("survey_id", ["..", ".", ".hidden", "-rf", "_x"])
def test_survey_ids_that_are_not_a_safe_slug_are_refused(service, survey_id):
    reply = service.client.post(
        "/v1/surveys", json=make_document(survey=survey_id), headers=service.auth(service.admin)
    )
    assert reply.status_code == 422, reply.text
    assert [e["pointer"] for e in reply.json()["errors"]] == ["#/survey"]
    listed = service.client.get("/v1/surveys", headers=service.auth(service.admin)).json()
    assert listed["data"] == []


def test_list_and_show_surveys_secret_for_admin_only(service, survey):
    service.client.post(
        "/v1/surveys/pulse/responses", json={"responses": random_rows(3)},
        headers=service.auth(service.ingest),
    )
    listed = service.client.get("/v1/surveys", headers=service.auth(service.analyst)).json()
    assert [(s["survey"], s["version"], s["respondents"]) for s in listed["data"]] == [
        ("pulse", 1, 3)
    ]
    as_analyst = service.client.get("/v1/surveys/pulse", headers=service.auth(service.analyst))
    assert as_analyst.json()["webhook_secret"] is None
    as_admin = service.client.get("/v1/surveys/pulse", headers=service.auth(service.admin))
    assert as_admin.json()["webhook_secret"] == survey["webhook_secret"]
    assert as_admin.json()["reference"] is None
    missing = service.client.get("/v1/surveys/none", headers=service.auth(service.analyst))
    assert missing.status_code == 404 and missing.json()["type"] == "/problems/unknown-survey"


def test_detectors_come_from_the_registry(service):
    reply = service.client.get("/v1/detectors", headers=service.auth(service.analyst)).json()
    assert [d["name"] for d in reply["data"]] == list(REGISTRY)
    for entry in reply["data"]:
        cls = REGISTRY[entry["name"]]
        assert entry["summary"] == cls.summary and entry["reference"] == cls.reference
        assert entry["needs_sample"] == cls.needs_sample
        assert entry["defaults"] == cls.defaults()


def test_a_title_with_a_nul_is_refused(service):
    reply = service.client.post(
        "/v1/surveys", json=make_document(title="Pulse\x00"), headers=service.auth(service.admin)
    )
    assert reply.status_code == 422, reply.text
    assert [e["pointer"] for e in reply.json()["errors"]] == ["#/title"]
