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
