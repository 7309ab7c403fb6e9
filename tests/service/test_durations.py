"""Durations from a posted response's timestamps reach the speeding index, on arrival and after
a re-screen; on SQLite and (when configured) PostgreSQL."""

from __future__ import annotations

from .conftest import body_of, respondent, signed_headers

URL = "/v1/surveys/pulse/responses"


def _speeding(service, rid: str) -> dict:
    detail = service.client.get(
        f"/v1/surveys/pulse/respondents/{rid}", headers=service.auth(service.analyst)
    )
    assert detail.status_code == 200, detail.text
    [outcome] = [o for o in detail.json()["results"] if o["detector"] == "speeding"]
    return outcome


def test_started_and_submitted_at_give_the_duration(service, survey):
    answers = [1, 2, 3, 4, 5, 4, 3, 2]
    rows = [
        # 12 s for 8 items: 1.5 s per item (hand-computed), under the 2-second cut-off.
        respondent("fast", answers, started_at="2027-05-04T09:30:00Z",
                   submitted_at="2027-05-04T09:30:12Z"),
        # Other zones, 4 minutes apart: 240 s, 30 s per item.
        respondent("slow", answers, started_at="2027-05-04T11:30:00+02:00",
                   submitted_at="2027-05-04T09:34:00Z"),
        # A given duration takes precedence over the timestamps.
        respondent("given", answers, duration_seconds=80.0, started_at="2027-05-04T09:30:00Z",
                   submitted_at="2027-05-04T09:30:01Z"),
        # Submitted before it started: no usable duration.
        respondent("backwards", answers, started_at="2027-05-04T09:31:00Z",
                   submitted_at="2027-05-04T09:30:00Z"),
        respondent("untimed", answers, submitted_at="2027-05-04T09:30:00Z"),
    ]
    body = body_of({"responses": rows})
    reply = service.client.post(URL, content=body, headers=signed_headers(survey["webhook_secret"], body))
    assert reply.status_code == 201, reply.text
    results = {r["respondent_id"]: r for r in reply.json()["results"]}
    assert "speeding" in results["fast"]["flags"]
    assert "speeding" not in results["slow"]["flags"] + results["slow"]["not_assessed"]
    assert "speeding" in results["backwards"]["not_assessed"]
    assert "speeding" in results["untimed"]["not_assessed"]

    def check() -> None:
        fast = _speeding(service, "fast")
        assert fast["state"] == "assessed" and fast["flagged"]
        assert fast["evidence"]["duration_seconds"] == 12.0
        assert fast["evidence"]["seconds_per_item"] == 1.5
        assert _speeding(service, "slow")["evidence"]["duration_seconds"] == 240.0
        assert _speeding(service, "given")["evidence"]["duration_seconds"] == 80.0
        for rid in ("backwards", "untimed"):
            outcome = _speeding(service, rid)
            assert (outcome["state"], outcome["reason"]) == ("not_assessed", "no duration recorded")

    check()
    # The re-screen reads the stored timestamps again.
    rescreen = service.client.post("/v1/surveys/pulse/rescreen", headers=service.auth(service.admin))
    assert rescreen.status_code == 200, rescreen.text
    check()


def test_a_corrected_duration_or_meta_replaces_with_replace_and_is_judged_again(service, survey):
    answers = [1, 2, 3, 4, 5, 4, 3, 2]
    ingest_key = service.auth(service.ingest)
    first = respondent("p1", answers, duration_seconds=240.0, meta={"channel": "email"})
    assert service.client.post(URL, json=first, headers=ingest_key).status_code == 201
    # 12 s for 8 items: 1.5 s per item (hand-computed), under the 2-second cut-off.
    corrected = {**first, "duration_seconds": 12.0}
    plain = service.client.post(URL, json=corrected, headers=ingest_key)
    assert plain.status_code == 200 and plain.json()["results"][0]["status"] == "duplicate"
    replaced = service.client.post(URL, params={"replace": "true"}, json=corrected,
                                   headers=ingest_key)
    assert replaced.status_code == 201, replaced.text
    assert replaced.json()["results"][0]["status"] == "replaced"
    assert "speeding" in replaced.json()["results"][0]["flags"]
    assert _speeding(service, "p1")["evidence"]["duration_seconds"] == 12.0
    new_meta = {**corrected, "meta": {"channel": "sms"}}
    again = service.client.post(URL, params={"replace": "true"}, json=new_meta, headers=ingest_key)
    assert again.json()["results"][0]["status"] == "replaced"
    same = service.client.post(URL, params={"replace": "true"}, json=new_meta, headers=ingest_key)
    assert same.status_code == 200 and same.json()["results"][0]["status"] == "duplicate"
    detail = service.client.get(
        "/v1/surveys/pulse/respondents/p1", headers=service.auth(service.analyst)
    ).json()
    assert detail["meta"] == {"channel": "sms"} and detail["duration_seconds"] == 12.0
    assert len(detail["history"]) == 2  # the earlier duration and meta are kept there


def test_a_webhook_id_reused_for_another_body_is_a_conflict(service, survey):
    secret = survey["webhook_secret"]
    body = body_of(respondent("w1", [2, 4, 2, 4, 2, 4, 2, 4]))
    assert service.client.post(
        URL, content=body, headers=signed_headers(secret, body, webhook_id="msg_7")
    ).status_code == 201
    other = body_of(respondent("w2", [3, 3, 2, 4, 2, 4, 1, 5]))
    reused = service.client.post(
        URL, content=other, headers=signed_headers(secret, other, webhook_id="msg_7")
    )
    assert reused.status_code == 409, reused.text
    assert reused.json()["type"] == "/problems/webhook-id-reused"
    assert [e["pointer"] for e in reused.json()["errors"]] == ["header:webhook-id"]
    replay = service.client.post(
        URL, content=body, headers=signed_headers(secret, body, webhook_id="msg_7")
    )
    assert replay.status_code == 200 and replay.json()["replayed_delivery"] is True
    assert service.client.get(
        "/v1/surveys/pulse/respondents/w2", headers=service.auth(service.analyst)
    ).status_code == 404
