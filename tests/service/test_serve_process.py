"""A real `heedful serve` process on a free loopback port, talked to over HTTP."""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest

from service.cli import main

from .conftest import make_document, respondent, signed_headers

START_SECONDS = 60


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def _command() -> list[str]:
    script = Path(sys.executable).with_name("heedful")
    return [str(script)] if script.exists() else [sys.executable, "-m", "service.cli"]


def _key(capsys, database_url: str, role: str) -> str:
    assert main(["keys", "create", "--role", role, "--name", role, "--database", database_url]) == 0
    return capsys.readouterr().out.strip().splitlines()[-1]


@pytest.mark.slow
def test_serve_answers_over_http(database_url, capsys, tmp_path):
    admin = _key(capsys, database_url, "admin")
    port = _free_port()
    log = (tmp_path / "serve.log").open("wb")
    process = subprocess.Popen(
        [*_command(), "serve", "--host", "127.0.0.1", "--port", str(port),
         "--database", database_url],
        stdout=log, stderr=subprocess.STDOUT, env={**os.environ, "HEEDFUL_LOG_LEVEL": "warning"},
    )
    base = f"http://127.0.0.1:{port}"
    try:
        with httpx.Client(base_url=base, timeout=10) as client:
            deadline = time.monotonic() + START_SECONDS
            while True:
                assert process.poll() is None, (tmp_path / "serve.log").read_text()
                try:
                    if client.get("/healthz").status_code == 200:
                        break
                except httpx.TransportError:
                    pass
                assert time.monotonic() < deadline, "heedful serve did not start in time"
                time.sleep(0.1)
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
    finally:
        process.terminate()
        try:
            process.wait(timeout=15)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=15)
        log.close()
