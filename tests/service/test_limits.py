"""Limits: callers checked before bodies are read, rate limits, a bounded writer queue with a
fast lane for small posts, bounded error replies."""

from __future__ import annotations

import threading
from concurrent.futures import Future

import pytest

from service.errors import WriterBusy
from service.ingest import Submission
from service.ingest_queue import LARGE_ROWS_PER_GROUP, SMALL_POST, IngestQueue, _Job
from service.limits import TokenBuckets

from .conftest import body_of, random_rows, respondent, signed_headers

URL = "/v1/surveys/pulse/responses"


class Clock:
    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


def test_token_buckets_allow_a_burst_then_the_rate():
    clock = Clock()
    buckets = TokenBuckets(2.0, 3, clock=clock)
    assert [buckets.take("k") for _ in range(3)] == [0.0, 0.0, 0.0]
    assert buckets.take("k") == pytest.approx(0.5)  # one token comes back every 0.5 s
    assert buckets.take("other") == 0.0  # each name has its own bucket
    clock.now += 0.5
    assert buckets.wait("k") == 0.0
    assert buckets.take("k") == 0.0
    assert buckets.take("k") > 0
    clock.now += 100
    assert [buckets.take("k") for _ in range(3)] == [0.0, 0.0, 0.0]  # never above the burst
    assert buckets.take("k") > 0
    assert TokenBuckets(0, 1).take("k") == 0.0  # rate 0: no limit


def test_token_buckets_forget_full_buckets_beyond_their_bound():
    clock = Clock()
    buckets = TokenBuckets(1.0, 2, max_names=10, clock=clock)
    for i in range(10):
        buckets.take(f"n{i}")
    clock.now += 5  # every bucket full again
    buckets.take("late")
    assert len(buckets._buckets) <= 10


def test_a_wrong_key_is_refused_before_the_body_is_read(service, survey):
    service.app.state.settings = service.app.state.settings.model_copy(
        update={"max_body_bytes": 2048}
    )
    big = body_of({"responses": random_rows(50)})
    assert len(big) > 2048
    wrong = service.client.post(
        URL, content=big, headers={"Authorization": "Bearer nope", "content-type": "application/json"}
    )
    assert wrong.status_code == 401  # not 413: the body was never read
    stale = signed_headers(survey["webhook_secret"], big, timestamp=1_000_000_000)
    assert service.client.post(URL, content=big, headers=stale).status_code == 401
    right = service.client.post(
        URL, content=big, headers={**service.auth(service.ingest), "content-type": "application/json"}
    )
    assert right.status_code == 413


def test_an_address_presenting_wrong_keys_is_held_back(service, survey):
    from service.limits import Limits

    settings = service.app.state.settings.model_copy(
        update={"failed_auth_burst": 5, "failed_auth_per_second": 0.01}
    )
    service.app.state.limits = Limits(settings)
    statuses = [
        service.client.get("/v1/surveys", headers={"Authorization": f"Bearer wrong{i}"}).status_code
        for i in range(6)
    ]
    assert statuses == [401] * 5 + [429]
    held = service.client.get("/v1/surveys", headers=service.auth(service.analyst))
    assert held.status_code == 429
    assert int(held.headers["retry-after"]) >= 1
    assert held.json()["type"] == "/problems/too-many-requests"
    body = body_of(respondent("x1", [1] * 8))
    forged = service.client.post(URL, content=body, headers=signed_headers(survey["webhook_secret"][:-4] + "AAA=", body))
    assert forged.status_code == 429


def test_each_key_has_its_own_rate(service, survey):
    from service.limits import Limits

    service.app.state.limits = Limits(service.app.state.settings.model_copy(
        update={"rate_limit_per_second": 0.01, "rate_limit_burst": 3}
    ))
    statuses = [
        service.client.get("/v1/surveys", headers=service.auth(service.analyst)).status_code
        for _ in range(4)
    ]
    assert statuses == [200, 200, 200, 429]
    assert service.client.get("/v1/surveys", headers=service.auth(service.admin)).status_code == 200
    posts = [
        service.client.post(URL, json=respondent(f"k{i}", [1, 2] * 4),
                            headers=service.auth(service.ingest)).status_code
        for i in range(4)
    ]
    assert posts == [201, 201, 201, 429]


def _job(rows: int) -> _Job:
    return _Job(Submission("pulse", [{}] * rows), Future())


def test_small_posts_go_first_in_groups_of_their_own_and_batches_take_turns(service):
    queue = IngestQueue(service.database, service.app.state.settings)
    big = LARGE_ROWS_PER_GROUP // 2 - 10
    queue._large.extend([_job(big), _job(big), _job(LARGE_ROWS_PER_GROUP * 3), _job(big)])
    queue._small.extend([_job(1), _job(SMALL_POST)])

    def sizes() -> list[int]:
        return [len(j.submission.rows) for j in queue._next_group()]

    queue._waiting_rows = sum(len(j.submission.rows) for j in [*queue._large, *queue._small])
    assert sizes() == [1, SMALL_POST]  # small posts first, without a batch
    queue._small.append(_job(2))  # a single arriving now waits behind one group of batches
    queue._waiting_rows += 2
    assert sizes() == [big, big]  # batches up to the group's bound
    assert sizes() == [2]
    assert sizes() == [LARGE_ROWS_PER_GROUP * 3]  # a batch above the bound goes alone
    assert sizes() == [big]
    assert queue._waiting_rows == 0


def test_the_writer_queue_is_bounded(service, survey):
    settings = service.app.state.settings.model_copy(update={"max_waiting_posts": 1})
    queue = IngestQueue(service.database, settings)
    release = threading.Event()
    busy = threading.Event()
    processed = []

    def hold(group):
        busy.set()
        release.wait(10)
        processed.extend(group)
        for job in group:
            job.future.set_result(None)

    queue._process = hold
    try:
        first = queue.submit(Submission("pulse", [{}]))
        assert busy.wait(10)  # the writer holds the first post
        second = queue.submit(Submission("pulse", [{}]))
        with pytest.raises(WriterBusy) as refused:
            queue.submit(Submission("pulse", [{}]))
        assert refused.value.retry_after >= 1
        release.set()
        first.result(10)
        second.result(10)
    finally:
        release.set()
        queue.close()
    assert len(processed) == 2


def test_a_full_writer_queue_answers_503_with_retry_after(service, survey):
    def refuse(submission):
        raise WriterBusy(2000, 5000, retry_after=2)

    service.app.state.ingest_queue.submit = refuse
    reply = service.client.post(URL, json=respondent("b1", [1] * 8),
                                headers=service.auth(service.ingest))
    assert reply.status_code == 503
    assert reply.headers["retry-after"] == "2"
    assert reply.json()["type"] == "/problems/writer-busy"


def test_error_replies_list_the_first_problems_and_count_them_all(service, survey):
    rows = [respondent(f"o{i}", [9] * 8) for i in range(300)]
    reply = service.client.post(URL, json={"responses": rows}, headers=service.auth(service.ingest))
    assert reply.status_code == 422
    problem = reply.json()
    assert problem["problem_count"] == 300 * 8
    assert len(problem["errors"]) == 100
    assert "first 100" in problem["detail"]
