"""Metrics, request ids and private log lines.

The metrics text is read back with prometheus_client's own parser of the exposition format
(the format's reference implementation), not by string matching."""

from __future__ import annotations

import asyncio
import io
import json
import logging
import logging.config

import httpx
import pytest
from prometheus_client.parser import text_string_to_metric_families

from service.app import create_app
from service.observability import JsonLines, log_config
from service.security import new_webhook_secret
from service.settings import Settings

from .conftest import body_of, respondent, signed_headers


def samples(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    out = {}
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            out[(sample.name, tuple(sorted(sample.labels.items())))] = sample.value
    return out


@pytest.fixture
def captured():
    """Every record of the service's loggers at every level, and the database engine's at the
    level `heedful serve` sets for it, formatted as the service formats them."""
    stream = io.StringIO()
    handler = logging.StreamHandler(stream)
    handler.setFormatter(JsonLines())
    levels = {"heedful": logging.DEBUG, **{
        name: logging.getLevelName(entry["level"])
        for name, entry in log_config("debug")["loggers"].items() if name.startswith("sqlalchemy")
    }}
    loggers = [logging.getLogger(name) for name in levels]
    before = [lg.level for lg in loggers]
    for lg in loggers:
        lg.addHandler(handler)
        lg.setLevel(levels[lg.name])
    yield stream
    for lg, level in zip(loggers, before, strict=True):
        lg.removeHandler(handler)
        lg.setLevel(level)


def lines(stream: io.StringIO) -> list[dict]:
    return [json.loads(line) for line in stream.getvalue().splitlines() if line.strip()]


def test_metrics_count_posts_flags_refusals_and_requests(service, survey):
    admin = service.auth(service.admin)
    ordinary = respondent("m-ordinary", [4, 2, 4, 2, 5, 1, 4, 2])
    straight = respondent("m-straight", [3] * 8)
    reply = service.client.post(
        "/v1/surveys/pulse/responses", json={"responses": [ordinary, straight]},
        headers=service.auth(service.ingest),
    )
    assert reply.status_code == 201, reply.text
    again = service.client.post(
        "/v1/surveys/pulse/responses", json=ordinary, headers=service.auth(service.ingest)
    )
    assert again.json()["duplicates"] == 1
    service.client.post("/v1/surveys/pulse/responses", json=ordinary,
                        headers={"Authorization": "Bearer nope"})
    flags_raised = {
        name for r in reply.json()["results"] for name in r["flags"]
    }
    assert flags_raised  # the straightliner raises at least one flag

    report = service.client.get("/v1/surveys/pulse/report", headers=admin)
    assert report.status_code == 200
    text = service.client.get("/metrics", headers=admin).text
    got = samples(text)
    assert got[("heedful_jobs_total", (("kind", "report"), ("outcome", "done")))] == 1
    assert got[("heedful_job_duration_seconds_count", (("kind", "report"),))] == 1
    assert got[("heedful_respondents_total", (("outcome", "stored"),))] == 2
    assert got[("heedful_respondents_total", (("outcome", "duplicate"),))] == 1
    for name in flags_raised:
        assert got[("heedful_flags_total", (("detector", name),))] >= 1
    assert got[("heedful_refusals_total", (("reason", "unauthenticated"), ("status", "401")))] == 1
    posts = (
        "heedful_request_duration_seconds_count",
        (("method", "POST"), ("route", "/v1/surveys/{survey}/responses"), ("status", "2xx")),
    )
    assert got[posts] == 2  # by route template, never by path
    assert ("heedful_ingest_queue_depth", ()) in got
    assert "m-ordinary" not in text and "m-straight" not in text


def test_metrics_need_the_token_when_one_is_set(tmp_path):
    token = "t" * 24
    app = create_app(Settings(database_url=f"sqlite:///{tmp_path / 'm.db'}", metrics_token=token))
    from fastapi.testclient import TestClient

    with TestClient(app, raise_server_exceptions=False) as client:
        assert client.get("/metrics").status_code == 401
        assert client.get("/metrics", headers={"Authorization": "Bearer " + "x" * 24}).status_code == 401
        ok = client.get("/metrics", headers={"Authorization": f"Bearer {token}"})
        assert ok.status_code == 200
        assert ok.headers["content-type"].startswith("text/plain")


def test_metrics_without_a_token_answer_the_loopback_address_only(tmp_path):
    app = create_app(Settings(database_url=f"sqlite:///{tmp_path / 'm.db'}"))

    async def status_from(address: str) -> int:
        transport = httpx.ASGITransport(app=app, client=(address, 5000))
        async with httpx.AsyncClient(transport=transport, base_url="http://heedful") as client:
            return (await client.get("/metrics")).status_code

    for address, status in (("10.1.2.3", 403), ("127.0.0.1", 200), ("::1", 200)):
        assert asyncio.run(status_from(address)) == status, address


def test_every_reply_carries_a_request_id(service):
    plain = service.client.get("/healthz", headers={"X-Request-Id": "abc-123.def"})
    assert plain.headers["x-request-id"] == "abc-123.def"
    odd = service.client.get("/healthz", headers={"X-Request-Id": "bad id\twith spaces"})
    assert odd.headers["x-request-id"] != "bad id\twith spaces"
    assert len(odd.headers["x-request-id"]) == 32  # 16 hex digits of process, 16 of counter
    fresh = service.client.get("/healthz").headers["x-request-id"]
    assert fresh != service.client.get("/healthz").headers["x-request-id"]


def test_refusals_are_logged_with_their_reason_and_nothing_of_the_respondent(
    service, survey, captured
):
    secret = survey["webhook_secret"]
    post = respondent("secret-person-77", [1, 2, 3, 4, 5, 4, 3, 2], meta={"email": "x@y.example"})
    body = body_of(post)
    forged = signed_headers(new_webhook_secret(), body)
    forged["X-Request-Id"] = "req-forged-1"
    assert service.client.post(
        "/v1/surveys/pulse/responses", content=body, headers=forged
    ).status_code == 401
    stale = signed_headers(secret, body, timestamp=1_000_000_000)
    assert service.client.post(
        "/v1/surveys/pulse/responses", content=body, headers=stale
    ).status_code == 401
    assert service.client.post(
        "/v1/surveys/pulse/responses", content=body, headers={"Authorization": "Bearer wrong"}
    ).status_code == 401
    bad = respondent("secret-person-78", [9, 2, 3, 4, 5, 4, 3, 2])
    assert service.client.post(
        "/v1/surveys/pulse/responses", json=bad, headers=service.auth(service.ingest)
    ).status_code == 422
    assert service.client.get(
        "/v1/surveys/pulse/respondents/secret-person-79", headers=service.auth(service.analyst)
    ).status_code == 404

    records = [r for r in lines(captured) if r.get("event") == "refused"]
    reasons = [(r["status"], r["reason"]) for r in records]
    assert reasons == [
        (401, "bad-signature:signature-mismatch"),
        (401, "bad-signature:stale-timestamp"),
        (401, "unauthenticated"),
        (422, "invalid-responses"),
        (404, "unknown-respondent"),
    ]
    assert records[0]["request_id"] == "req-forged-1"
    assert {r["survey"] for r in records} == {"pulse"}
    assert records[4]["route"] == "/v1/surveys/{survey}/respondents/{respondent}"
    text = captured.getvalue()
    for private in ("secret-person", "x@y.example", "whsec_"):
        assert private not in text


def test_database_down_is_503_with_retry_after():
    # Nothing listens on port 1 of the loopback address: every connection is refused.
    app = create_app(
        Settings(database_url="postgresql+psycopg://postgres@127.0.0.1:1/test"), migrate=False
    )
    from fastapi.testclient import TestClient

    with TestClient(app, raise_server_exceptions=False) as client:
        body = body_of(respondent("r1", [1, 2]))
        reply = client.post(
            "/v1/surveys/pulse/responses", content=body,
            headers=signed_headers(new_webhook_secret(), body),
        )
    assert reply.status_code == 503, reply.text
    assert reply.headers["retry-after"] == "5"
    assert reply.json()["type"] == "/problems/database-unavailable"


def test_json_lines_carry_fields_and_only_the_type_of_an_exception():
    formatter = JsonLines()
    try:
        raise ValueError("answers of respondent r-99: 1,2,3")
    except ValueError:
        import sys

        record = logging.LogRecord(
            "heedful.service", logging.ERROR, __file__, 1, "failed %s", ("x",), sys.exc_info()
        )
    record.survey = "pulse"
    line = json.loads(formatter.format(record))
    assert line["message"] == "failed x" and line["level"] == "error"
    assert line["survey"] == "pulse" and line["exception"] == "ValueError"
    assert "r-99" not in json.dumps(line)
    assert line["time"].endswith("Z")


def test_the_serve_log_configuration_applies():
    config = log_config("info", json_lines=True, access=True)
    logging.config.dictConfig(config)
    try:
        handler = logging.getLogger("heedful").handlers[0]
        assert isinstance(handler.formatter, JsonLines)
        assert logging.getLogger("heedful.access").level == logging.INFO
        assert logging.getLogger("uvicorn.access").level == logging.WARNING
    finally:
        for name in ("heedful", "heedful.access", "uvicorn", "uvicorn.error", "uvicorn.access"):
            logger = logging.getLogger(name)
            logger.handlers.clear()
            logger.setLevel(logging.NOTSET)
            logger.propagate = True
