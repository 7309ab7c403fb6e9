"""Posts written together (group commit): each keeps its own outcome, and stored evidence is
exactly the engine's."""

from __future__ import annotations

import json
import threading

import numpy as np
import pytest
from sqlalchemy import func, select

from detectors import REGISTRY, ResponseDataError, ResponseMatrix, State, parse_instrument, screen
from service import ingest, outcomes, store
from service.database import Database
from service.db import make_engine, upgrade
from service.errors import RespondentConflict, UnknownSurvey
from service.ingest_queue import IngestQueue
from service.models import Respondent
from service.problems import from_service
from service.registration import register_survey
from service.screeners import screener_for

from .conftest import body_of, make_document, random_rows, same_evidence, signed_headers

URL = "/v1/surveys/pulse/responses"
JSON = "application/json"


def test_ingest_many_keeps_each_posts_outcome(service, survey, settings):
    rows = random_rows(4)
    changed = {**rows[0], "answers": {k: 1 for k in rows[0]["answers"]}}
    bad = {**rows[2], "answers": {**rows[2]["answers"], "q01": 9}}
    submissions = [
        ingest.Submission("pulse", [rows[0]], ingest.IngestOptions(webhook_id="m1")),
        ingest.Submission("pulse", [rows[0]]),  # same respondent: waits for the first
        ingest.Submission("pulse", [bad]),  # invalid: refused alone
        ingest.Submission("pulse", [rows[1]], ingest.IngestOptions(webhook_id="m1")),  # same id
        ingest.Submission("nowhere", [rows[3]]),
        ingest.Submission("pulse", [changed]),  # other answers: waits, then conflicts
    ]
    with service.database.write() as session:
        results = ingest.ingest_many(session, submissions, settings)
    assert results[0].stored == 1
    assert results[1] is ingest.DEFERRED and results[3] is ingest.DEFERRED
    assert results[5] is ingest.DEFERRED
    assert isinstance(results[2], ResponseDataError)
    assert isinstance(results[4], UnknownSurvey) and from_service(results[4]).status == 404
    with service.database.write() as session:
        again = ingest.ingest_many(session, [submissions[i] for i in (1, 3, 5)], settings)
    assert again[0].results[0].status == "duplicate"
    assert again[1].replayed_delivery is True  # m1 was accepted in the first round
    assert isinstance(again[2], RespondentConflict)
    assert from_service(again[2]).status == 409
    with service.database.read() as session:
        assert session.scalar(select(func.count()).select_from(Respondent)) == 1


def test_queue_answers_concurrent_posts_after_commit(service, survey, settings):
    queue = IngestQueue(service.database, settings)
    rows = random_rows(60, seed=5)
    futures = []
    lock = threading.Lock()

    def post(row):
        future = queue.submit(ingest.Submission("pulse", [row]))
        with lock:
            futures.append(future)

    threads = [threading.Thread(target=post, args=(row,)) for row in rows + rows[:10]]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(timeout=30)
    replies = [future.result(timeout=60) for future in futures]
    queue.close()
    statuses = [reply.results[0].status for reply in replies]
    assert statuses.count("stored") == 60 and statuses.count("duplicate") == 10
    with service.database.read() as session:
        assert session.scalar(select(func.count()).select_from(Respondent)) == 60


def test_stored_evidence_and_sentences_are_the_engines():
    instrument = parse_instrument(make_document(n_items=12))
    rng = np.random.default_rng(11)
    values = rng.integers(1, 6, size=(200, 12)).astype(float)
    values[:20] = values[:20, :1]
    values[rng.random(values.shape) < 0.05] = np.nan
    matrix = ResponseMatrix.from_arrays(instrument, values)
    screening = screen(instrument, matrix)
    for name, result in screening.results.items():
        columns = outcomes.evidence_columns(result)
        for i in range(len(result)):
            assert columns[i] == result.evidence_for(i), (name, i)


def test_evidence_read_back_is_the_batch_screenings(service):
    """Evidence is derived on read by screening one respondent again; what a reader gets is
    what the engine gave the whole posted batch, entries that compare respondents included
    (kept with the result): checked against ``detectors.screen`` on the same batch."""
    document = make_document(n_items=12, survey="wide")
    assert service.client.post(
        "/v1/surveys", json=document, headers=service.auth(service.admin)
    ).status_code == 201
    rows = random_rows(60, n_items=12, seed=21)
    for i, row in enumerate(rows):
        row["duration_seconds"] = 30.0 + 7 * i
    for k in range(3):  # three respondents copying another's answers
        rows[10 + k]["answers"] = dict(rows[20]["answers"])
    reply = service.client.post(
        "/v1/surveys/wide/responses", json={"responses": rows},
        headers=service.auth(service.ingest),
    )
    assert reply.status_code == 201, reply.text
    instrument = parse_instrument(document)
    values = np.array(
        [[np.nan if r["answers"].get(item) is None else r["answers"][item]
          for item in instrument.item_ids] for r in rows], dtype=float,
    )
    matrix = ResponseMatrix.from_arrays(
        instrument, values, [r["respondent_id"] for r in rows],
        durations=np.array([r["duration_seconds"] for r in rows]),
    )
    names = [n for n, cls in REGISTRY.items() if not cls.needs_sample]
    screening = screen(instrument, matrix, names=names, calibrate=False)  # no reference yet
    assert screening.results["duplicate_answers"].scores[20] == 3  # the copies counted
    for i in (0, 10, 20, 41):
        detail = service.client.get(
            f"/v1/surveys/wide/respondents/{rows[i]['respondent_id']}",
            headers=service.auth(service.analyst),
        ).json()
        shown = {r["detector"]: r for r in detail["results"]}
        for name in names:
            result = screening.results[name]
            expected = json.loads(json.dumps(result.evidence_for(i)))  # tuples as lists
            assert same_evidence(shown[name]["evidence"], expected), (name, i)
            assert shown[name]["sentence"] == result.sentence_for(i), (name, i)
            assert shown[name]["state"] == State(int(result.states[i])).label


def test_refused_signatures_and_keys_never_reach_the_writer(service, survey, monkeypatch):
    submitted = []
    queue = service.app.state.ingest_queue
    real_submit = queue.submit
    monkeypatch.setattr(
        queue, "submit", lambda submission: submitted.append(submission) or real_submit(submission)
    )
    body = body_of(random_rows(1)[0])
    other = "whsec_" + "QUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUE="
    forged = service.client.post(URL, content=body, headers=signed_headers(other, body))
    assert forged.status_code == 401 and forged.json()["type"] == "/problems/bad-signature"
    unknown = service.client.post(
        "/v1/surveys/nowhere/responses", content=body,
        headers=signed_headers(survey["webhook_secret"], body),
    )
    # A signed post to a survey that does not exist is refused like a wrong signature, word for
    # word, so that forged posts cannot tell which surveys exist.
    assert unknown.status_code == 401 and unknown.json()["type"] == "/problems/bad-signature"
    assert unknown.json()["detail"] == forged.json()["detail"]
    analyst = service.client.post(
        URL, content=body, headers={**service.auth(service.analyst), "content-type": JSON}
    )
    assert analyst.status_code == 403
    assert submitted == []
    signed = service.client.post(
        URL, content=body, headers=signed_headers(survey["webhook_secret"], body)
    )
    assert signed.status_code == 201 and len(submitted) == 1


def test_screeners_belong_to_their_database(tmp_path):
    # Two databases whose first survey version has the same id but other items.
    databases = []
    for n_items in (8, 10):
        engine = make_engine(f"sqlite:///{tmp_path / f'{n_items}.db'}")
        upgrade(engine)
        database = Database(engine)
        register_survey(database, make_document(n_items=n_items))
        databases.append(database)
    try:
        for database, n_items in zip(databases, (8, 10), strict=True):
            with database.read() as session:
                survey = store.get_survey(session, "pulse")
                screener = screener_for(session, survey.current_version_id)
                assert len(screener.instrument.item_ids) == n_items
                assert screener_for(session, survey.current_version_id) is screener
    finally:
        for database in databases:
            database.dispose()


def _nested(levels: int) -> dict:
    meta: dict = {}
    for _ in range(levels - 1):
        meta = {"a": meta}
    return meta


def _grouped(queue: IngestQueue, submissions: list[ingest.Submission]) -> list:
    """Submit posts while the writer is held, so that they are written as one group."""
    hold = threading.Event()
    original = queue._write

    def held(group):
        hold.wait(30)
        return original(group)

    queue._write = held  # type: ignore[method-assign]
    blocker = queue.submit(ingest.Submission("pulse", random_rows(1, prefix="first")))
    futures = [queue.submit(submission) for submission in submissions]
    hold.set()
    blocker.result(timeout=60)
    outcomes_ = []
    for future in futures:
        try:
            outcomes_.append(future.result(timeout=60))
        except Exception as error:  # noqa: BLE001 - the refusal is the outcome under test
            outcomes_.append(error)
    queue.close()
    return outcomes_


BAD_FIELDS = {
    # The time leaves years 1..9999 once converted to UTC (stored in UTC).
    "submitted_at": {"submitted_at": "0001-01-01T00:00:00+01:00"},
    "started_at": {"started_at": "9999-12-31T23:30:00-01:00"},
    # The JSON writer used for storage stops at 254 levels.
    "meta": {"meta": _nested(300)},
}


@pytest.mark.parametrize("field", sorted(BAD_FIELDS))
def test_a_bad_post_fails_alone_among_two_surveys(service, survey, settings, field):
    other = make_document(survey="other")
    reply = service.client.post("/v1/surveys", json=other, headers=service.auth(service.admin))
    assert reply.status_code == 201, reply.text
    rows = random_rows(6, seed=3)
    bad = {**rows[5], "respondent_id": "culprit", **BAD_FIELDS[field]}
    submissions = [
        ingest.Submission("pulse" if i % 2 else "other", [row]) for i, row in enumerate(rows[:5])
    ]
    submissions.insert(2, ingest.Submission("pulse", [bad]))
    outcomes_ = _grouped(IngestQueue(service.database, settings), submissions)
    refused = outcomes_.pop(2)
    assert isinstance(refused, ResponseDataError)
    assert [p.column for p in refused.problems] == [field]
    assert all(isinstance(o, ingest.Ingested) and o.stored == 1 for o in outcomes_), outcomes_
    with service.database.read() as session:
        assert session.scalar(select(func.count()).select_from(Respondent)) == 6
    reply = service.client.post(URL, json=bad, headers=service.auth(service.ingest))
    assert reply.status_code == 422, reply.text
    assert reply.json()["errors"][0]["pointer"] == f"#/{field}"


def test_an_unforeseen_failure_in_a_group_fails_only_its_post(service, survey, settings):
    def fail_on_culprit(session, submissions, settings):
        if any(row["respondent_id"] == "culprit" for s in submissions for row in s.rows):
            raise RuntimeError("refused by the store")
        return ingest.ingest_many(session, submissions, settings)

    rows = random_rows(5, seed=4)
    submissions = [ingest.Submission("pulse", [row]) for row in rows]
    submissions.insert(1, ingest.Submission("pulse", [{**rows[0], "respondent_id": "culprit"}]))
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr("service.ingest_queue.ingest_many", fail_on_culprit)
        outcomes_ = _grouped(IngestQueue(service.database, settings), submissions)
    assert isinstance(outcomes_.pop(1), RuntimeError)
    assert [o.stored for o in outcomes_] == [1] * 5
