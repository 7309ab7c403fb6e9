"""Live `heedful serve` processes killed and raced: acknowledged means stored, once.

1. Signed posts from a few concurrent clients; the server is killed with SIGKILL part-way and
   started again on the same database. Every acknowledged (2xx) respondent is stored exactly
   once with the answers sent, every other one is stored once or not at all, and posting the
   unacknowledged ones again stores each once.
2. Two server processes on one PostgreSQL database get the same respondents at the same time:
   each is stored once, exactly one post of each is answered `stored` and the others
   `duplicate`, with the same flags.

Counts are bounded (a few hundred posts), so each test takes well under a minute.
"""

from __future__ import annotations

import json
import threading
import uuid
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import httpx
import pytest
from sqlalchemy import create_engine, func, select

from service.answers import as_received
from service.models import Respondent, Survey

from .conftest import make_document, random_rows, signed_headers
from .live_server import LiveServer, create_key, serving, start_server

SURVEY = "pulse"
ITEMS = [f"q{i + 1:02d}" for i in range(8)]
CLIENTS = 6
POSTS = 300
#: Acknowledged posts after which the server is killed (the rest meet a dead server).
KILL_AFTER = 100
#: The rate limits are off: a few hundred posts in seconds are what is tested.
NO_LIMITS = {"HEEDFUL_RATE_LIMIT_PER_SECOND": "0", "HEEDFUL_FAILED_AUTH_PER_SECOND": "0"}


def _register(server: LiveServer, admin: str) -> str:
    with httpx.Client(base_url=server.url, timeout=30) as client:
        reply = client.post("/v1/surveys", json=make_document(survey=SURVEY),
                            headers={"Authorization": f"Bearer {admin}"})
    assert reply.status_code in (200, 201), reply.text
    return reply.json()["webhook_secret"]


def _signed_post(client: httpx.Client, secret: str, row: dict) -> httpx.Response:
    body = json.dumps(row).encode()
    return client.post(f"/v1/surveys/{SURVEY}/responses", content=body,
                       headers=signed_headers(secret, body, f"msg_{uuid.uuid4().hex}"))


def _stored(database_url: str) -> dict[str, list[dict]]:
    """Respondent id -> the answers of every stored row under it, read from the database."""
    engine = create_engine(database_url)
    try:
        with engine.connect() as connection:
            rows = connection.execute(
                select(Respondent.respondent_id, Respondent.answer_codes)
                .join(Survey, Survey.id == Respondent.survey_id)
                .where(Survey.survey == SURVEY)
            ).all()
            counted = connection.execute(select(func.count()).select_from(Respondent)).scalar()
    finally:
        engine.dispose()
    assert counted == len(rows)
    stored: dict[str, list[dict]] = {}
    for rid, blob in rows:
        stored.setdefault(rid, []).append(as_received(blob, ITEMS))
    return stored


@dataclass
class Outcomes:
    """What the clients saw, per respondent id."""

    acknowledged: set[str] = field(default_factory=set)
    other: set[str] = field(default_factory=set)
    lock: threading.Lock = field(default_factory=threading.Lock)


def _post_until_killed(server: LiveServer, secret: str, rows: list[dict]) -> Outcomes:
    """Post ``rows`` from CLIENTS threads; SIGKILL the server after KILL_AFTER acknowledgements."""
    outcomes = Outcomes()
    pending: Iterator[dict] = iter(rows)
    take = threading.Lock()
    killed = threading.Event()

    def client() -> None:
        with httpx.Client(base_url=server.url, timeout=30) as http:
            while True:
                with take:
                    row = next(pending, None)
                if row is None:
                    return
                rid = row["respondent_id"]
                try:
                    reply = _signed_post(http, secret, row)
                    acknowledged = 200 <= reply.status_code < 300
                except httpx.TransportError:
                    acknowledged = False
                with outcomes.lock:
                    (outcomes.acknowledged if acknowledged else outcomes.other).add(rid)
                    if len(outcomes.acknowledged) >= KILL_AFTER and not killed.is_set():
                        killed.set()
                        server.kill()

    with ThreadPoolExecutor(CLIENTS) as pool:
        for running in [pool.submit(client) for _ in range(CLIENTS)]:
            running.result(timeout=120)
    assert killed.is_set(), "the server was never killed"
    return outcomes


@pytest.mark.crash
@pytest.mark.slow
def test_a_killed_server_loses_no_acknowledged_response(database_url, tmp_path):
    admin = create_key(database_url, "admin")
    rows = random_rows(POSTS, seed=9, prefix="k")
    sent = {row["respondent_id"]: row["answers"] for row in rows}
    log = tmp_path / "serve.log"
    server = start_server(database_url, log, env=NO_LIMITS)
    try:
        secret = _register(server, admin)
        outcomes = _post_until_killed(server, secret, rows)
    finally:
        server.kill()
    assert outcomes.acknowledged | outcomes.other == set(sent)
    assert KILL_AFTER <= len(outcomes.acknowledged) < POSTS, len(outcomes.acknowledged)

    with serving(database_url, log, env=NO_LIMITS) as again:
        stored = _stored(database_url)
        assert set(stored) <= set(sent)
        for rid in outcomes.acknowledged:
            assert stored.get(rid) == [sent[rid]], rid  # once, as sent
        for rid in outcomes.other:
            assert stored.get(rid, [sent[rid]]) == [sent[rid]], rid  # once or not at all
        print(f"{len(outcomes.acknowledged)} acknowledged before the kill; of the other "
              f"{len(outcomes.other)}, {len(set(stored) & outcomes.other)} were stored")
        # The restarted server takes the rest: new ones stored, ones that made it duplicates.
        rest = sorted(outcomes.other)
        with httpx.Client(base_url=again.url, timeout=60) as client:
            reply = _signed_post(client, secret, {"responses": [
                {"respondent_id": rid, "answers": sent[rid]} for rid in rest
            ]})
        assert reply.status_code == 201, reply.text
        assert [(r["respondent_id"], r["status"]) for r in reply.json()["results"]] == [
            (rid, "duplicate" if rid in stored else "stored") for rid in rest
        ]
    assert _stored(database_url) == {rid: [answers] for rid, answers in sent.items()}


@pytest.mark.crash
@pytest.mark.slow
@pytest.mark.postgres
def test_two_servers_on_one_database_store_each_respondent_once(database_url, tmp_path):
    if not database_url.startswith("postgresql"):
        pytest.skip("two processes writing one database at once: PostgreSQL only")
    admin = create_key(database_url, "admin")
    rows = random_rows(80, seed=13, prefix="t")
    with serving(database_url, tmp_path / "first.log", env=NO_LIMITS) as first, \
            serving(database_url, tmp_path / "second.log", env=NO_LIMITS) as second:
        secret = _register(first, admin)
        # Every respondent goes to both servers, twice each, from concurrent clients.
        jobs = [(server, row) for row in rows for server in (first, second, second, first)]
        clients = {server.port: httpx.Client(base_url=server.url, timeout=60)
                   for server in (first, second)}

        def post(job: tuple[LiveServer, dict]) -> tuple[str, int, dict]:
            server, row = job
            reply = _signed_post(clients[server.port], secret, row)
            return row["respondent_id"], reply.status_code, reply.json()

        try:
            with ThreadPoolExecutor(CLIENTS) as pool:
                replies = list(pool.map(post, jobs, timeout=120))
        finally:
            for client in clients.values():
                client.close()
    by_respondent: dict[str, list[tuple[int, dict]]] = {}
    for rid, status, reply in replies:
        by_respondent.setdefault(rid, []).append((status, reply))
    for rid, answers in by_respondent.items():
        statuses = sorted(status for status, _ in answers)
        assert statuses == [200, 200, 200, 201], (rid, answers)
        outcomes = [reply["results"][0] for _, reply in answers]
        assert sorted(o["status"] for o in outcomes) == ["duplicate"] * 3 + ["stored"], outcomes
        assert len({tuple(o["flags"]) for o in outcomes}) == 1, outcomes
    assert _stored(database_url) == {row["respondent_id"]: [row["answers"]] for row in rows}
