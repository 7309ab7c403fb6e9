"""A real `heedful serve` process on a free loopback port, talked to over HTTP."""

from __future__ import annotations

import json

import httpx
import pytest

from .conftest import make_document, respondent, signed_headers
from .live_server import create_key, serving


@pytest.mark.slow
def test_serve_answers_over_http(database_url, tmp_path):
    admin = create_key(database_url, "admin")
    with serving(database_url, tmp_path / "serve.log") as server, \
            httpx.Client(base_url=server.url, timeout=10) as client:
        assert client.get("/readyz").json() == {"status": "ok"}
        headers = {"Authorization": f"Bearer {admin}"}
        registered = client.post("/v1/surveys", json=make_document(), headers=headers)
        assert registered.status_code == 201
        secret = registered.json()["webhook_secret"]
        body = json.dumps(respondent("p1", [4, 4, 4, 4, 4, 4, 4, 4])).encode()
        posted = client.post(
            "/v1/surveys/pulse/responses", content=body, headers=signed_headers(secret, body)
        )
        assert posted.status_code == 201, posted.text
        detail = client.get("/v1/surveys/pulse/respondents/p1", headers=headers)
        assert detail.status_code == 200 and detail.json()["answers"]["q01"] == 4
        assert client.get("/v1/surveys").status_code == 401
