"""Posting responses: single and batch, idempotency, replacement, atomic and partial batches,
limits, signed webhooks; on SQLite and (when configured) PostgreSQL."""

from __future__ import annotations

import time

import numpy as np
import pytest
from sqlalchemy import func, select

from detectors import REGISTRY, ResponseMatrix, parse_instrument, screen
from service.models import Respondent, ResponseHistory, WebhookDelivery
from service.outcomes import NO_REFERENCE

from .conftest import (
    body_of,
    make_document,
    random_rows,
    respondent,
    signed_headers,
    stored_results,
)

URL = "/v1/surveys/pulse/responses"


def _count(service, model) -> int:
    with service.database.read() as session:
        return session.scalar(select(func.count()).select_from(model))


def test_single_post_is_screened_stored_and_replied(service, survey):
    row = respondent("r1", [3, 3, 3, 3, 3, 3, 3, 3], duration_seconds=95.5,
                     submitted_at="2027-05-04T09:30:00Z", meta={"channel": "email"})
    reply = service.client.post(URL, json=row, headers=service.auth(service.ingest))
    assert reply.status_code == 201, reply.text
    body = reply.json()
    assert (body["stored"], body["duplicates"], body["replaced"]) == (1, 0, 0)
    [result] = body["results"]
    # The same answers through the engine directly.
    instrument = parse_instrument(survey["document"])
    matrix = ResponseMatrix.from_arrays(instrument, np.array([[3] * 8], dtype=float), ["r1"])
    names = [n for n, cls in REGISTRY.items() if not cls.needs_sample]
    expected = screen(instrument, matrix, names=names, calibrate=False)  # no reference yet
    assert result["flags"] == [n for n in names if expected.results[n].flags[0]]
    assert result["flag_count"] == len(result["flags"])
    # Sample-dependent detectors wait for a reference sample.
    waiting = [n for n, cls in REGISTRY.items() if cls.needs_sample]
    assert set(waiting) <= set(result["not_assessed"])
    assert _count(service, Respondent) == 1
    assert len(stored_results(service.database)) == len(REGISTRY)
    detail = service.client.get(
        "/v1/surveys/pulse/respondents/r1", headers=service.auth(service.analyst)
    ).json()
    assert detail["answers"] == row["answers"]
    assert detail["meta"] == {"channel": "email"}
    assert detail["duration_seconds"] == 95.5
    for outcome in detail["results"]:
        if outcome["detector"] in waiting:
            assert outcome["state"] == "not_assessed"
            assert outcome["reason"] == NO_REFERENCE


def test_same_answers_again_is_a_duplicate_stored_once(service, survey):
    row = respondent("r1", [1, 2, 3, 4, 5, 4, 3, None])
    first = service.client.post(URL, json=row, headers=service.auth(service.ingest))
    # An explicit null and an absent item are the same unanswered item.
    without_null = {**row, "answers": {k: v for k, v in row["answers"].items() if v is not None}}
    again = service.client.post(URL, json=without_null, headers=service.auth(service.ingest))
    assert first.status_code == 201 and again.status_code == 200
    assert again.json()["results"][0]["status"] == "duplicate"
    assert again.json()["results"][0]["flags"] == first.json()["results"][0]["flags"]
    assert _count(service, Respondent) == 1


def test_other_answers_conflict_unless_replace_which_keeps_history(service, survey):
    headers = service.auth(service.ingest)
    service.client.post(URL, json=respondent("r1", [1, 2, 3, 4, 5, 4, 3, 2]), headers=headers)
    changed = respondent("r1", [5, 5, 5, 5, 5, 5, 5, 5])
    conflict = service.client.post(URL, json=changed, headers=headers)
    assert conflict.status_code == 409
    assert conflict.headers["content-type"].startswith("application/problem+json")
    assert conflict.json()["errors"][0]["respondent_id"] == "r1"
    replaced = service.client.post(URL, params={"replace": "true"}, json=changed, headers=headers)
    assert replaced.status_code == 201
    assert replaced.json()["results"][0]["status"] == "replaced"
    detail = service.client.get(
        "/v1/surveys/pulse/respondents/r1", headers=service.auth(service.analyst)
    ).json()
    assert detail["answers"] == changed["answers"]
    assert [h["answers"] for h in detail["history"]] == [
        {f"q{i + 1:02d}": v for i, v in enumerate([1, 2, 3, 4, 5, 4, 3, 2])}
    ]
    assert _count(service, Respondent) == 1
    assert _count(service, ResponseHistory) == 1
    assert len(stored_results(service.database)) == len(REGISTRY)


def test_invalid_batch_lists_every_problem_and_stores_nothing(service, survey):
    rows = random_rows(5)
    rows[1]["answers"]["q03"] = 9
    rows[3]["answers"]["q99"] = 1
    rows[4]["answers"]["q01"] = "4"  # strings are not answers
    rows.append(dict(rows[0]))  # duplicate respondent id within the post
    reply = service.client.post(
        URL, json={"responses": rows}, headers=service.auth(service.ingest)
    )
    assert reply.status_code == 422
    problem = reply.json()
    assert problem["type"] == "/problems/invalid-responses"
    found = {(e["row"], e["item"]) for e in problem["errors"]}
    assert {(2, "q03"), (4, "q99"), (5, "q01"), (1, "respondent_id"), (6, "respondent_id")} <= found
    pointers = {e["pointer"] for e in problem["errors"]}
    assert "#/responses/1/answers/q03" in pointers
    assert _count(service, Respondent) == 0


def test_partial_batch_stores_valid_rows_and_reports_rejected(service, survey):
    rows = random_rows(4)
    rows[2]["answers"]["q05"] = 0
    reply = service.client.post(
        URL, params={"partial": "true"}, json={"responses": rows},
        headers=service.auth(service.ingest),
    )
    assert reply.status_code == 201, reply.text
    body = reply.json()
    assert body["stored"] == 3
    assert [(r["row"], r["respondent_id"]) for r in body["rejected"]] == [(3, "r00002")]
    assert body["rejected"][0]["problems"][0]["item"] == "q05"
    assert _count(service, Respondent) == 3


def test_partial_batch_reports_conflicts_as_rejected(service, survey):
    headers = service.auth(service.ingest)
    rows = random_rows(3)
    service.client.post(URL, json=rows[0], headers=headers)
    changed = {**rows[0], "answers": {k: 1 for k in rows[0]["answers"]}}
    reply = service.client.post(
        URL, params={"partial": "true"}, json={"responses": [changed, rows[1], rows[2]]},
        headers=headers,
    )
    assert reply.status_code == 201
    assert reply.json()["stored"] == 2
    assert reply.json()["rejected"][0]["respondent_id"] == rows[0]["respondent_id"]


def test_limits_unknown_survey_and_malformed_bodies(service, survey, settings):
    headers = service.auth(service.ingest)
    small = service.app.state.settings.model_copy(
        update={"max_body_bytes": 2048, "max_batch_respondents": 3}
    )
    service.app.state.settings = small
    big = {"responses": random_rows(40)}
    assert service.client.post(URL, json=big, headers=headers).status_code == 413
    four = {"responses": random_rows(4)}
    too_many = service.client.post(URL, json=four, headers=headers)
    assert too_many.status_code == 413
    assert too_many.json()["type"] == "/problems/batch-too-large"
    service.app.state.settings = settings
    missing = service.client.post(
        "/v1/surveys/nope/responses", json=random_rows(1)[0], headers=headers
    )
    assert missing.status_code == 404
    assert missing.headers["content-type"].startswith("application/problem+json")
    malformed = service.client.post(
        URL, content=b'{"respondent_id": ', headers={**headers, "content-type": "application/json"}
    )
    assert malformed.status_code == 400
    assert "line 1" in malformed.json()["detail"]
    not_json = service.client.post(
        URL, content=b"a,b", headers={**headers, "content-type": "text/csv"}
    )
    assert not_json.status_code == 415
    wrong_shape = service.client.post(URL, json=[1, 2], headers=headers)
    assert wrong_shape.status_code == 422
    big_meta = respondent("m1", [1] * 8, meta={"note": "x" * 5000})
    meta_reply = service.client.post(URL, json=big_meta, headers=headers)
    assert meta_reply.status_code == 422
    assert meta_reply.json()["errors"][0]["pointer"] == "#/meta"
    assert _count(service, Respondent) == 0


def test_signed_webhook_valid_wrong_secret_stale_and_replay(service, survey):
    secret = survey["webhook_secret"]
    body = body_of(respondent("w1", [2, 4, 2, 4, 2, 4, 2, 4]))
    headers = signed_headers(secret, body, webhook_id="msg_1")
    first = service.client.post(URL, content=body, headers=headers)
    assert first.status_code == 201, first.text
    assert first.json()["replayed_delivery"] is False
    replay = service.client.post(URL, content=body, headers=headers)
    assert replay.status_code == 200
    assert replay.json()["replayed_delivery"] is True
    assert replay.json()["results"][0]["status"] == "duplicate"
    # A replay cannot replace answers, even with ?replace=true (the query is not signed).
    replay_replace = service.client.post(
        URL, params={"replace": "true"}, content=body, headers=headers
    )
    assert replay_replace.json()["replayed_delivery"] is True

    other = "whsec_" + "QUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUE="
    wrong = service.client.post(URL, content=body, headers=signed_headers(other, body))
    assert wrong.status_code == 401
    assert wrong.json()["type"] == "/problems/bad-signature"
    stale = signed_headers(secret, body, timestamp=int(time.time()) - 301)
    assert service.client.post(URL, content=body, headers=stale).status_code == 401
    future = signed_headers(secret, body, timestamp=int(time.time()) + 301)
    assert service.client.post(URL, content=body, headers=future).status_code == 401
    tampered = signed_headers(secret, body)
    changed = body.replace(b'"q01": 2', b'"q01": 5')
    assert service.client.post(URL, content=changed, headers=tampered).status_code == 401
    no_signature = {k: v for k, v in signed_headers(secret, body).items()
                    if k != "webhook-signature"}
    assert service.client.post(URL, content=body, headers=no_signature).status_code == 401
    assert _count(service, Respondent) == 1
    assert _count(service, WebhookDelivery) == 1


def test_rotated_secret_keeps_working_during_grace(service, survey):
    old = survey["webhook_secret"]
    # a first post puts the survey's secrets in the server's memory; the rotation below must
    # make the new secret work at once all the same
    body = body_of(respondent("a0", [2, 2, 1, 2, 1, 2, 1, 2]))
    assert service.client.post(URL, content=body, headers=signed_headers(old, body)).status_code == 201
    rotated = service.client.post(
        "/v1/surveys/pulse/webhook-secret", headers=service.auth(service.admin)
    )
    assert rotated.status_code == 200
    new = rotated.json()["webhook_secret"]
    assert new != old and new.startswith("whsec_")
    for rid, secret in (("a1", old), ("a2", new)):
        body = body_of(respondent(rid, [1, 2, 1, 2, 1, 2, 1, 2]))
        assert service.client.post(
            URL, content=body, headers=signed_headers(secret, body)
        ).status_code == 201


def test_reference_sample_after_rescreen_is_used_on_arrival(service, survey):
    headers = service.auth(service.ingest)
    rows = random_rows(120, seed=3)
    assert service.client.post(URL, json={"responses": rows}, headers=headers).status_code == 201
    rescreen = service.client.post(
        "/v1/surveys/pulse/rescreen", headers=service.auth(service.admin)
    )
    assert rescreen.status_code == 200, rescreen.text
    body = rescreen.json()
    assert body["respondents"] == 120
    sample = [n for n, cls in REGISTRY.items() if cls.needs_sample]
    assert [r["detectors"] for r in body["references"]] == [sorted(sample)]
    reference_id = body["references"][0]["id"]
    late = respondent("late", [1, 5, 1, 5, 1, 5, 1, 5])
    assert service.client.post(URL, json=late, headers=headers).status_code == 201
    detail = service.client.get(
        "/v1/surveys/pulse/respondents/late", headers=service.auth(service.analyst)
    ).json()
    for outcome in detail["results"]:
        if outcome["detector"] in sample:
            assert outcome["reference_id"] == reference_id
            assert outcome["reason"] != NO_REFERENCE
    shown = service.client.get("/v1/surveys/pulse", headers=service.auth(service.analyst)).json()
    assert shown["reference"]["id"] == reference_id
    assert shown["reference"]["respondents"] == 120


def test_too_few_respondents_for_a_reference(service, survey):
    service.client.post(
        URL, json={"responses": random_rows(10)}, headers=service.auth(service.ingest)
    )
    body = service.client.post(
        "/v1/surveys/pulse/rescreen", headers=service.auth(service.admin)
    ).json()
    assert body["references"] == []
    assert "at least 50" in body["without_reference"]["1"]


def test_new_version_keeps_old_respondents_on_their_version(service, survey):
    headers = service.auth(service.ingest)
    service.client.post(URL, json=respondent("old", [1, 2, 3, 4, 5, 4, 3, 2]), headers=headers)
    changed = make_document(n_items=10)
    registered = service.client.post(
        "/v1/surveys", json=changed, headers=service.auth(service.admin)
    )
    assert registered.status_code == 201 and registered.json()["version"] == 2
    new = respondent("new", [1, 2, 3, 4, 5, 4, 3, 2, 1, 2])
    assert service.client.post(URL, json=new, headers=headers).json()["version"] == 2
    reader = service.auth(service.analyst)
    assert service.client.get("/v1/surveys/pulse/respondents/old", headers=reader).json()[
        "version"
    ] == 1
    # Answers in the old version's shape now miss items but are still valid (unanswered).
    assert service.client.post(
        URL, json=respondent("x", [1] * 8), headers=headers
    ).status_code == 201
    rescreen = service.client.post(
        "/v1/surveys/pulse/rescreen", headers=service.auth(service.admin)
    )
    assert rescreen.status_code == 200 and rescreen.json()["respondents"] == 3
    # Each version is re-screened with its own instrument; neither has enough for a reference.
    assert rescreen.json()["without_reference"].keys() == {"1", "2"}


def test_remembered_webhook_secrets_expire(monkeypatch):
    from service import ingest

    clock = [100.0]
    monkeypatch.setattr(ingest.time, "monotonic", lambda: clock[0])
    memo: dict = {}
    credentials = ingest.WebhookCredentials("whsec_a", None, None, read_at=clock[0])
    memo.setdefault("webhook-credentials", {})["pulse"] = credentials
    assert ingest.remembered_credentials(memo, "pulse") is credentials
    clock[0] += ingest.CREDENTIALS_SECONDS + 0.01
    assert ingest.remembered_credentials(memo, "pulse") is None
    clock[0] = 100.0
    ingest.forget_credentials(memo, "pulse")
    assert ingest.remembered_credentials(memo, "pulse") is None
    assert ingest.remembered_credentials(memo, "other") is None


@pytest.mark.parametrize(
    "rid",
    ["a\x00b", "v0001\u200b", "\u202ev0001", "v00\u200d01", "v\x07001"],
    ids=["nul", "zero-width-space", "right-to-left-override", "zero-width-joiner", "bell"],
)
def test_control_and_format_characters_in_respondent_ids_are_refused(service, survey, rid):
    reply = service.client.post(
        URL, json=respondent(rid, [2, 4, 2, 4, 2, 4, 2, 4]), headers=service.auth(service.ingest)
    )
    assert reply.status_code == 422, reply.text
    [error] = reply.json()["errors"]
    assert error["pointer"] == "#/respondent_id" and "control or format" in error["detail"]
    assert _count(service, Respondent) == 0


def test_an_overlong_webhook_id_is_refused(service, survey):
    body = body_of(respondent("w1", [2, 4, 2, 4, 2, 4, 2, 4]))
    headers = signed_headers(survey["webhook_secret"], body, webhook_id="m" * 201)
    reply = service.client.post(URL, content=body, headers=headers)
    assert reply.status_code == 422, reply.text
    assert [e["pointer"] for e in reply.json()["errors"]] == ["header:webhook-id"]
    longest = signed_headers(survey["webhook_secret"], body, webhook_id="m" * 200)
    assert service.client.post(URL, content=body, headers=longest).status_code == 201
    assert _count(service, WebhookDelivery) == 1
