"""Posts written together (group commit): each keeps its own outcome, and stored evidence is
exactly the engine's."""

from __future__ import annotations

import threading

import numpy as np
from sqlalchemy import func, select

from detectors import ResponseDataError, ResponseMatrix, parse_instrument, screen
from service import jobs
from service.ingest_queue import IngestQueue
from service.models import Respondent
from service.problems import Problem

from .conftest import make_document, random_rows


def test_ingest_many_keeps_each_posts_outcome(service, survey, settings):
    rows = random_rows(4)
    changed = {**rows[0], "answers": {k: 1 for k in rows[0]["answers"]}}
    bad = {**rows[2], "answers": {**rows[2]["answers"], "q01": 9}}
    submissions = [
        jobs.Submission("pulse", [rows[0]], jobs.IngestOptions(webhook_id="m1")),
        jobs.Submission("pulse", [rows[0]]),  # same respondent: waits for the first
        jobs.Submission("pulse", [bad]),  # invalid: refused alone
        jobs.Submission("pulse", [rows[1]], jobs.IngestOptions(webhook_id="m1")),  # same id
        jobs.Submission("nowhere", [rows[3]]),
        jobs.Submission("pulse", [changed]),  # other answers: waits, then conflicts
    ]
    with service.database.write() as session:
        results = jobs.ingest_many(session, submissions, settings)
    assert results[0]["stored"] == 1
    assert results[1] is jobs.DEFERRED and results[3] is jobs.DEFERRED
    assert results[5] is jobs.DEFERRED
    assert isinstance(results[2], ResponseDataError)
    assert isinstance(results[4], Problem) and results[4].status == 404
    with service.database.write() as session:
        again = jobs.ingest_many(session, [submissions[i] for i in (1, 3, 5)], settings)
    assert again[0]["results"][0]["status"] == "duplicate"
    assert again[1]["replayed_delivery"] is True  # m1 was accepted in the first round
    assert isinstance(again[2], Problem) and again[2].status == 409
    with service.database.read() as session:
        assert session.scalar(select(func.count()).select_from(Respondent)) == 1


def test_queue_answers_concurrent_posts_after_commit(service, survey, settings):
    queue = IngestQueue(service.database, settings)
    rows = random_rows(60, seed=5)
    futures = []
    lock = threading.Lock()

    def post(row):
        future = queue.submit(jobs.Submission("pulse", [row]))
        with lock:
            futures.append(future)

    threads = [threading.Thread(target=post, args=(row,)) for row in rows + rows[:10]]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(timeout=30)
    replies = [future.result(timeout=60) for future in futures]
    queue.close()
    statuses = [reply["results"][0]["status"] for reply in replies]
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
        columns = jobs._evidence_columns(result)
        for i in range(len(result)):
            assert columns[i] == result.evidence_for(i), (name, i)
    # The rows the service would insert for these results.
    stored = jobs.Screened(
        names=list(screening.results),
        versions=[r.version for r in screening.results.values()],
        results=dict(screening.results),
        flags=np.array([r.flags for r in screening.results.values()]),
        states=np.array([r.states for r in screening.results.values()]),
        sample_names=set(),
        verdicts=screening.verdicts,
    )
    rows = jobs.outcome_rows(stored, list(range(200)), None)
    by_key = {(row[1], row[0]): row for row in rows}
    for name, result in screening.results.items():
        for i in range(len(result)):
            assert by_key[(name, i)][9] == result.sentence_for(i), (name, i)
