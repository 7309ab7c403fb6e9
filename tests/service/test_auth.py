"""Keys and roles: 401 for a missing, unknown or revoked key, 403 for the wrong role."""

from __future__ import annotations

import pytest

from service import store

from .conftest import random_rows

# (method, path, body, roles allowed besides admin)
ENDPOINTS = [
    ("GET", "/v1/surveys", None, {"analyst"}),
    ("GET", "/v1/surveys/pulse", None, {"analyst"}),
    ("GET", "/v1/surveys/pulse/summary", None, {"analyst"}),
    ("GET", "/v1/surveys/pulse/respondents", None, {"analyst"}),
    ("GET", "/v1/surveys/pulse/respondents/r00000", None, {"analyst"}),
    ("POST", "/v1/surveys/pulse/respondents/r00000/review", {"decision": "keep"}, {"analyst"}),
    ("GET", "/v1/detectors", None, {"analyst"}),
    ("POST", "/v1/surveys/pulse/responses", "row", {"ingest"}),
    ("POST", "/v1/surveys/pulse/webhook-secret", None, set()),
    ("POST", "/v1/surveys/pulse/rescreen", None, set()),
    ("POST", "/v1/surveys", "document", set()),
    ("DELETE", "/v1/surveys/pulse/respondents/r00000", None, set()),
]


@pytest.fixture
def stored(service, survey):
    reply = service.client.post(
        "/v1/surveys/pulse/responses", json=random_rows(1)[0], headers=service.auth(service.ingest)
    )
    assert reply.status_code == 201
    return survey


def _call(service, method, path, body, headers, survey):
    if body == "row":
        body = random_rows(1, prefix="x")[0]
    elif body == "document":
        body = survey["document"]
    return service.client.request(method, path, json=body, headers=headers)


def test_role_matrix(service, stored):
    for method, path, body, allowed in ENDPOINTS:
        for role in ("ingest", "analyst"):
            reply = _call(service, method, path, body, service.auth(getattr(service, role)),
                          stored)
            if role in allowed:
                assert reply.status_code < 400, (method, path, role, reply.text)
            else:
                assert reply.status_code == 403, (method, path, role, reply.text)
                assert reply.headers["content-type"].startswith("application/problem+json")
                assert role in reply.json()["detail"]
        # Admin may do everything (erasure last so the respondent exists until then).
        reply = _call(service, method, path, body, service.auth(service.admin), stored)
        assert reply.status_code < 400, (method, path, "admin", reply.text)


def test_missing_unknown_malformed_and_revoked_keys(service, stored):
    path = "/v1/surveys"
    missing = service.client.get(path)
    assert missing.status_code == 401
    assert missing.headers["www-authenticate"].startswith("Bearer")
    assert missing.json()["type"] == "/problems/unauthenticated"
    for header in (
        "Bearer hf_000000000000_wrong",
        "Basic abc",
        "Bearer",
        f"Bearer {service.analyst[:-2]}xx",  # right lookup part, wrong secret
    ):
        assert service.client.get(path, headers={"Authorization": header}).status_code == 401
    assert service.client.get(path, headers=service.auth(service.analyst)).status_code == 200
    with service.database.write() as session:
        assert store.revoke_key(session, "analyst-key")
    assert service.client.get(path, headers=service.auth(service.analyst)).status_code == 401


def test_health_needs_no_key(service):
    assert service.client.get("/healthz").json() == {"status": "ok"}
    assert service.client.get("/readyz").json() == {"status": "ok"}


def test_unknown_route_is_a_problem(service):
    reply = service.client.get("/v1/nothing-here")
    assert reply.status_code == 404
    assert reply.headers["content-type"].startswith("application/problem+json")
    assert reply.json()["status"] == 404
