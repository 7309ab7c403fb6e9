"""Fixtures for the service tests: a fresh database per test (SQLite, and PostgreSQL when
HEEDFUL_TEST_POSTGRES_URL is set, each test in its own schema; without it the PostgreSQL runs
show as skipped, with the reason), the app, keys, a survey."""

from __future__ import annotations

import json
import math
import os
import time
import uuid
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

import numpy as np
import pytest
from sqlalchemy import create_engine, select

from service import outcomes, store
from service.app import create_app
from service.models import Respondent, Role
from service.security import sign_webhook
from service.settings import Settings

with warnings.catch_warnings():
    # Starlette warns once, at import, that it prefers another HTTP client package; the
    # client used (httpx) works the same for these tests.
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

POSTGRES_URL = os.environ.get("HEEDFUL_TEST_POSTGRES_URL")
BACKENDS = ["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)]
#: Shown by ``pytest -ra`` for every PostgreSQL run left out.
NO_POSTGRES = (
    "PostgreSQL runs need HEEDFUL_TEST_POSTGRES_URL, e.g. "
    "postgresql+psycopg://postgres@127.0.0.1:5432/test (README, 'Running the tests')"
)


def _with_search_path(url: str, schema: str) -> str:
    joiner = "&" if "?" in url else "?"
    return f"{url}{joiner}options=-csearch_path%3D{schema}"


@pytest.fixture(autouse=True)
def _own_job_folder(tmp_path, monkeypatch) -> None:
    """Each test's job results and queue file in its own folder: a PostgreSQL database has no
    file to put them beside, and the default (./heedful-jobs) would be shared by every test."""
    monkeypatch.setenv("HEEDFUL_JOB_FOLDER", str(tmp_path / "jobs"))


@pytest.fixture(params=BACKENDS)
def database_url(request, tmp_path) -> Iterator[str]:
    """A URL of an empty database: a SQLite file, or a fresh PostgreSQL schema."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'heedful.db'}"
        return
    with postgres_schema() as url:
        yield url


@contextmanager
def postgres_schema() -> Iterator[str]:
    """The URL of a fresh PostgreSQL schema, dropped afterwards (skips without PostgreSQL)."""
    if not POSTGRES_URL:
        pytest.skip(NO_POSTGRES)
    schema = f"heedful_test_{uuid.uuid4().hex[:12]}"
    admin = create_engine(POSTGRES_URL)
    with admin.begin() as connection:
        connection.exec_driver_sql(f'CREATE SCHEMA "{schema}"')
    try:
        yield _with_search_path(POSTGRES_URL, schema)
    finally:
        with admin.begin() as connection:
            connection.exec_driver_sql(f'DROP SCHEMA "{schema}" CASCADE')
        admin.dispose()


@pytest.fixture
def settings(database_url) -> Settings:
    return Settings(database_url=database_url, reference_min_respondents=50)


@dataclass
class Service:
    """The app under test, its client and one key of each role."""

    app: Any
    client: TestClient
    admin: str
    ingest: str
    analyst: str

    def auth(self, token: str) -> dict[str, str]:
        return {"Authorization": f"Bearer {token}"}

    @property
    def database(self):
        return self.app.state.database


@pytest.fixture
def service(settings) -> Iterator[Service]:
    app = create_app(settings)
    with app.state.database.write() as session:
        admin = store.create_key(session, "admin-key", Role.ADMIN)
        ingest = store.create_key(session, "ingest-key", Role.INGEST)
        analyst = store.create_key(session, "analyst-key", Role.ANALYST)
    with TestClient(app, raise_server_exceptions=False) as client:
        yield Service(app, client, admin, ingest, analyst)


def make_document(n_items: int = 8, points: int = 5, survey: str = "pulse", **extra) -> dict:
    """A one-scale, balanced-keyed instrument document q01..qNN in two blocks."""
    items = [
        {
            "id": f"q{i + 1:02d}",
            "text": f"statement {i + 1}",
            "scale": "s",
            "keyed": 1 if i % 2 == 0 else -1,
            "block": "a" if i < n_items // 2 else "b",
        }
        for i in range(n_items)
    ]
    return {"survey": survey, "title": "Pulse", "response_format": {"points": points},
            "items": items, **extra}


@pytest.fixture
def survey(service) -> dict:
    """A registered survey: the registration reply plus the document."""
    document = make_document()
    reply = service.client.post("/v1/surveys", json=document, headers=service.auth(service.admin))
    assert reply.status_code == 201, reply.text
    return {**reply.json(), "document": document}


def respondent(rid: str, answers, item_ids=None, **extra) -> dict:
    """A posted respondent from a list of answers (None = missing)."""
    item_ids = item_ids or [f"q{i + 1:02d}" for i in range(len(answers))]
    return {"respondent_id": rid, "answers": dict(zip(item_ids, answers, strict=True)), **extra}


def random_rows(n: int, n_items: int = 8, seed: int = 0, prefix: str = "r") -> list[dict]:
    """Respondents answering 1..5 at random, some straightlining, a few missing answers."""
    rng = np.random.default_rng(seed)
    answers = rng.integers(1, 6, size=(n, n_items)).astype(object)
    answers[: n // 10] = rng.integers(1, 6, size=(n // 10, 1))  # straightliners
    answers[rng.random((n, n_items)) < 0.02] = None
    return [
        respondent(f"{prefix}{i:05d}", [None if a is None else int(a) for a in row])
        for i, row in enumerate(answers.tolist())
    ]


def signed_headers(secret: str, body: bytes, webhook_id: str | None = None,
                   timestamp: int | None = None) -> dict[str, str]:
    webhook_id = webhook_id or f"msg_{uuid.uuid4().hex}"
    timestamp = int(time.time()) if timestamp is None else timestamp
    return {
        "content-type": "application/json",
        "webhook-id": webhook_id,
        "webhook-timestamp": str(timestamp),
        "webhook-signature": sign_webhook(secret, webhook_id, timestamp, body),
    }


def body_of(document: Any) -> bytes:
    return json.dumps(document).encode()


def stored_results(database) -> dict[tuple[str, str], tuple[int, bool, float | None]]:
    """(respondent id, detector) -> (state, flagged, score) of every stored result."""
    with database.read() as session:
        rows = session.execute(select(Respondent.respondent_id, Respondent.results)).all()
        columns = outcomes.result_columns(
            [row[1] for row in rows], outcomes.detector_codes(session)
        )
    out = {}
    for i, (rid, _) in enumerate(rows):
        for j, name in enumerate(columns.names):
            if columns.present[i, j]:
                score = float(columns.scores[i, j])
                out[(rid, name)] = (
                    int(columns.states[i, j]), bool(columns.flagged[i, j]),
                    None if np.isnan(score) else score,
                )
    return out


def same_evidence(shown: Any, expected: Any) -> bool:
    """Evidence read back equals the engine's, floats to 1e-12 relative (screening a
    respondent alone may sum in another order than screening the batch)."""
    if isinstance(expected, float) and isinstance(shown, float):
        return math.isclose(shown, expected, rel_tol=1e-12, abs_tol=1e-12)
    if isinstance(expected, dict) and isinstance(shown, dict):
        return shown.keys() == expected.keys() and all(
            same_evidence(shown[k], expected[k]) for k in expected
        )
    if isinstance(expected, list) and isinstance(shown, list):
        return len(shown) == len(expected) and all(
            same_evidence(a, b) for a, b in zip(shown, expected, strict=True)
        )
    return shown == expected
