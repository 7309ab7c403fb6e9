"""Background jobs: embedded (a SQLite queue consumed inside the app), across a restart, stale
jobs of dead workers, and the scale-out set-up (Redis, PostgreSQL, two apps and a worker)."""

from __future__ import annotations

import datetime as dt
import json
import os
import re
import subprocess
import time
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx
import pytest
from sqlalchemy import update

from service import jobs, store
from service.app import create_app
from service.models import Job, JobKind, Role
from service.settings import Settings

from .conftest import TestClient, make_document, postgres_schema, random_rows
from .live_server import free_port, heedful_command

#: Longest wait for a job (seconds); a job of a few hundred respondents takes a few seconds.
JOB_SECONDS = 120
REDIS_URL = os.environ.get("HEEDFUL_TEST_REDIS_URL", "redis://127.0.0.1:6379/0")


def _auth(token: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {token}"}


@contextmanager
def _app(settings: Settings) -> Iterator[tuple[TestClient, dict[str, str]]]:
    """An app on ``settings`` with a key of each role (made once per database)."""
    app = create_app(settings)
    keys = {}
    with app.state.database.write() as session:
        for role in (Role.ADMIN, Role.ANALYST):
            name = f"{role.value}-{uuid.uuid4().hex[:6]}"
            keys[role.value] = store.create_key(session, name, role)
    with TestClient(app, raise_server_exceptions=False) as client:
        yield client, keys


def _survey_with_respondents(client: TestClient, keys: dict[str, str], n: int = 150) -> str:
    reply = client.post("/v1/surveys", json=make_document(), headers=_auth(keys["admin"]))
    assert reply.status_code == 201, reply.text
    reply = client.post("/v1/surveys/pulse/responses", json={"responses": random_rows(n)},
                        headers=_auth(keys["admin"]))
    assert reply.status_code == 201, reply.status_code
    return "pulse"


def _wait_done(client: TestClient, token: str, job_id: str) -> dict:
    deadline = time.monotonic() + JOB_SECONDS
    while True:
        job = client.get(f"/v1/jobs/{job_id}", headers=_auth(token)).json()
        if job["state"] in ("done", "failed"):
            return job
        assert time.monotonic() < deadline, f"job still {job['state']} after {JOB_SECONDS} s"
        time.sleep(0.1)


def _start(client: TestClient, token: str, survey: str, **body) -> dict:
    reply = client.post(f"/v1/surveys/{survey}/jobs", json=body, headers=_auth(token))
    assert reply.status_code == 202, reply.text
    job = reply.json()
    assert reply.headers["location"] == f"/v1/jobs/{job['id']}"
    assert job["state"] in ("queued", "running", "done")
    return job


def _without_time(page: str) -> str:
    return re.sub(r"made \d{4}-\d\d-\d\d \d\d:\d\d UTC", "made (time) UTC", page)


def test_embedded_jobs_give_what_the_synchronous_endpoints_give(tmp_path):
    settings = Settings(database_url=f"sqlite:///{tmp_path / 'heedful.db'}",
                        reference_min_respondents=50)
    with _app(settings) as (client, keys):
        survey = _survey_with_respondents(client, keys)
        analyst = keys["analyst"]

        job = _start(client, analyst, survey, kind="export", format="csv", without=["flagged"])
        early = client.get(f"/v1/jobs/{job['id']}/result", headers=_auth(analyst))
        done = _wait_done(client, analyst, job["id"])
        assert early.status_code in (200, 409)
        assert done["state"] == "done", done
        assert done["progress"] == 1.0 and done["attempts"] == 1
        assert done["result_url"] == f"/v1/jobs/{job['id']}/result"
        assert done["requested_by"].startswith("analyst-")
        result = client.get(done["result_url"], headers=_auth(analyst))
        direct = client.get(f"/v1/surveys/{survey}/export?format=csv&without=flagged",
                            headers=_auth(analyst))
        assert result.status_code == direct.status_code == 200
        assert result.content == direct.content
        assert result.headers["heedful-respondents"] == direct.headers["heedful-respondents"]
        assert done["result"]["respondents"] == int(direct.headers["heedful-respondents"])

        job = _start(client, analyst, survey, kind="report")
        assert _wait_done(client, analyst, job["id"])["state"] == "done"
        page = client.get(f"/v1/jobs/{job['id']}/result", headers=_auth(analyst))
        direct = client.get(f"/v1/surveys/{survey}/report", headers=_auth(analyst))
        assert page.headers["content-type"].startswith("text/html")
        assert _without_time(page.text) == _without_time(direct.text)

        refused = client.post(f"/v1/surveys/{survey}/jobs", json={"kind": "rescreen"},
                              headers=_auth(analyst))
        assert refused.status_code == 403
        job = _start(client, keys["admin"], survey, kind="rescreen")
        done = _wait_done(client, analyst, job["id"])
        assert done["state"] == "done", done
        direct = client.post(f"/v1/surveys/{survey}/rescreen", headers=_auth(keys["admin"]))
        reply = client.get(f"/v1/jobs/{job['id']}/result", headers=_auth(analyst)).json()
        assert reply == done["result"]
        expected = direct.json()
        assert reply["respondents"] == expected["respondents"] == 150
        assert [(r["version"], r["respondents"], r["detectors"]) for r in reply["references"]] == [
            (r["version"], r["respondents"], r["detectors"]) for r in expected["references"]
        ]

        listing = client.get(f"/v1/surveys/{survey}/jobs", headers=_auth(analyst)).json()
        assert [j["kind"] for j in listing["data"]] == ["rescreen", "report", "export"]
        assert client.get("/v1/jobs/nope", headers=_auth(analyst)).status_code == 404
        assert client.get("/v1/surveys/other/jobs", headers=_auth(analyst)).status_code == 404
        metrics = client.get("/metrics").text
        # The job's runs and the synchronous endpoints' are counted alike.
        assert 'heedful_jobs_total{kind="export",outcome="done"} 2.0' in metrics
        assert 'heedful_jobs_total{kind="rescreen",outcome="done"} 2.0' in metrics


def test_the_nightly_work_of_a_survey_runs_as_a_job(tmp_path):
    settings = Settings(database_url=f"sqlite:///{tmp_path / 'heedful.db'}",
                        reference_min_respondents=50)
    with _app(settings) as (client, keys):
        survey = _survey_with_respondents(client, keys)
        refused = client.post(f"/v1/surveys/{survey}/jobs", json={"kind": "nightly"},
                              headers=_auth(keys["analyst"]))
        assert refused.status_code == 403
        job = _start(client, keys["admin"], survey, kind="nightly", format="csv",
                     without=["excluded"])
        done = _wait_done(client, keys["analyst"], job["id"])
        assert done["state"] == "done", done
        result = done["result"]
        assert result["respondents"] == 150 and result["error"] is None
        assert result["files"] == [f"{survey}.csv", "report.html", "nightly.json"]
        assert result["references"]  # the first night estimates a reference sample
        page = client.get(done["result_url"], headers=_auth(keys["analyst"]))
        assert page.headers["content-type"].startswith("text/html")
        direct = client.get(f"/v1/surveys/{survey}/report", headers=_auth(keys["analyst"]))
        # The night's report from its shared read is the report read on its own.
        assert _without_time(page.text) == _without_time(direct.text)
        again = _wait_done(client, keys["analyst"],
                           _start(client, keys["admin"], survey, kind="nightly")["id"])
        assert again["result"]["stale"] == 0 and again["result"]["references"] == []


def test_large_surveys_get_a_job_from_the_synchronous_endpoints(tmp_path):
    settings = Settings(database_url=f"sqlite:///{tmp_path / 'heedful.db'}",
                        reference_min_respondents=50, sync_limit_respondents=100)
    with _app(settings) as (client, keys):
        survey = _survey_with_respondents(client, keys, n=101)
        analyst = keys["analyst"]
        for method, path, token, kind in (
            ("GET", f"/v1/surveys/{survey}/export?format=parquet", analyst, "export"),
            ("GET", f"/v1/surveys/{survey}/report", analyst, "report"),
            ("POST", f"/v1/surveys/{survey}/rescreen", keys["admin"], "rescreen"),
        ):
            reply = client.request(method, path, headers=_auth(token))
            assert reply.status_code == 202, reply.text
            job = reply.json()
            assert job["kind"] == kind and reply.headers["location"] == f"/v1/jobs/{job['id']}"
            assert _wait_done(client, analyst, job["id"])["state"] == "done"
        assert job["options"] == {}
        exported = client.get(f"/v1/surveys/{survey}/jobs", headers=_auth(analyst)).json()
        assert exported["data"][-1]["options"] == {"format": "parquet", "without": []}


def test_a_queued_job_survives_a_restart(tmp_path):
    url = f"sqlite:///{tmp_path / 'heedful.db'}"
    # The default job folder: beside the database.
    stopped = Settings(database_url=url, job_workers=0, job_folder=None)
    with _app(stopped) as (client, keys):
        survey = _survey_with_respondents(client, keys, n=60)
        job = _start(client, keys["analyst"], survey, kind="export", format="sav")
        assert client.app.state.job_queue.waiting() == 1
        time.sleep(0.5)
        assert client.get(f"/v1/jobs/{job['id']}", headers=_auth(keys["analyst"])).json()[
            "state"] == "queued"
    assert (tmp_path / "heedful-jobs" / "queue.db").is_file()
    with _app(Settings(database_url=url, job_workers=1, job_folder=None)) as (client, keys):
        done = _wait_done(client, keys["analyst"], job["id"])
        assert done["state"] == "done" and done["attempts"] == 1
        result = client.get(done["result_url"], headers=_auth(keys["analyst"]))
        assert result.status_code == 200
        assert result.headers["content-disposition"].endswith('filename="pulse.sav"')
        assert done["result"]["respondents"] == 60


def _as_if_its_worker_died(app, job_id: str, attempts: int) -> None:
    """Take the job as a worker that then stopped: running, last heard of an hour ago."""
    hour_ago = dt.datetime.now(dt.UTC) - dt.timedelta(hours=1)
    with app.state.database.write() as session:
        assert jobs.claim(session, job_id, "gone:1:dead", hour_ago) is not None
        session.execute(update(Job).where(Job.id == job_id).values(attempts=attempts))


def test_a_stale_job_is_queued_again_then_failed_when_out_of_attempts(tmp_path):
    """A running job not heard from for HEEDFUL_JOB_STALE_SECONDS is queued again while fewer
    than HEEDFUL_JOB_ATTEMPTS starts were made, and marked failed after that."""
    url = f"sqlite:///{tmp_path / 'heedful.db'}"
    with _app(Settings(database_url=url, job_workers=0)) as (client, keys):
        survey = _survey_with_respondents(client, keys, n=60)
        retried = _start(client, keys["analyst"], survey, kind="report")
        given_up = _start(client, keys["analyst"], survey, kind="report")
        _as_if_its_worker_died(client.app, retried["id"], attempts=1)
        _as_if_its_worker_died(client.app, given_up["id"], attempts=2)
        # Claiming a running job again fails: only a queued one can be taken.
        with client.app.state.database.write() as session:
            assert jobs.claim(session, retried["id"], "other:2:x", dt.datetime.now(dt.UTC)) is None
    again = Settings(database_url=url, job_workers=1, job_stale_seconds=1, job_attempts=2)
    with _app(again) as (client, keys):
        analyst = keys["analyst"]
        done = _wait_done(client, analyst, retried["id"])
        assert done["state"] == "done" and done["attempts"] == 2
        failed = _wait_done(client, analyst, given_up["id"])
        assert failed["state"] == "failed" and failed["attempts"] == 2
        assert failed["error"] == "its worker stopped while running it, 2 time(s)"
        result = client.get(f"/v1/jobs/{given_up['id']}/result", headers=_auth(analyst))
        assert result.status_code == 409
        assert result.json()["state"] == "failed"


def test_claim_lets_one_of_two_workers_take_a_job(tmp_path):
    url = f"sqlite:///{tmp_path / 'heedful.db'}"
    with _app(Settings(database_url=url, job_workers=0)) as (client, keys):
        survey = _survey_with_respondents(client, keys, n=10)
        job = _start(client, keys["analyst"], survey, kind="report")
        now = dt.datetime.now(dt.UTC)
        with client.app.state.database.write() as session:
            first = jobs.claim(session, job["id"], "a:1:x", now)
            second = jobs.claim(session, job["id"], "b:2:y", now)
            # A worker whose job was taken from it records nothing.
            assert not jobs.finish(session, job["id"], "b:2:y", now, result={"file": "x"})
        assert first is not None and first.attempts == 1 and second is None


# scale-out: Redis and PostgreSQL -------------------------------------------------------------


def _redis_or_skip(url: str):
    import redis

    client = redis.Redis.from_url(url, socket_connect_timeout=1, socket_timeout=5)
    try:
        client.ping()
    except redis.RedisError as error:
        pytest.skip(f"Redis at {url} is not reachable ({type(error).__name__}); the scale-out "
                    "test needs it (HEEDFUL_TEST_REDIS_URL)")
    return client


@pytest.fixture
def postgres_schema_url() -> Iterator[str]:
    with postgres_schema() as url:
        yield url


@pytest.mark.postgres
@pytest.mark.slow
def test_two_apps_and_a_worker_share_jobs_over_redis_and_postgresql(postgres_schema_url, tmp_path):
    redis_client = _redis_or_skip(REDIS_URL)
    name = f"heedfultest{uuid.uuid4().hex}"  # letters and digits: the keys are named as given
    shared = {
        "database_url": postgres_schema_url, "job_broker": REDIS_URL, "job_queue_name": name,
        "job_folder": str(tmp_path / "jobs"), "reference_min_respondents": 50,
    }
    log = tmp_path / "worker.log"
    worker = None
    try:
        with _app(Settings(**shared, job_workers=1)) as (first, keys), \
                _app(Settings(**shared, job_workers=1)) as (second, _):
            survey = _survey_with_respondents(first, keys, n=120)
            env = {**os.environ, "HEEDFUL_DATABASE_URL": postgres_schema_url,
                   "HEEDFUL_JOB_BROKER": REDIS_URL, "HEEDFUL_JOB_QUEUE_NAME": name,
                   "HEEDFUL_JOB_FOLDER": shared["job_folder"], "HEEDFUL_LOG_FORMAT": "json"}
            metrics_port = free_port()
            with log.open("wb") as out:
                worker = subprocess.Popen(
                    [*heedful_command(), "worker", "--threads", "2",
                     "--metrics-port", str(metrics_port)],
                    env=env, stdout=out, stderr=subprocess.STDOUT,
                )
            started = []
            for i in range(8):
                client = first if i % 2 == 0 else second
                kind = "export" if i % 2 == 0 else "report"
                body = {"kind": kind, "format": "csv"} if kind == "export" else {"kind": kind}
                job = _start(client, keys["analyst"], survey, **body)
                # Offered twice: a second message for the same job must not run it again.
                client.app.state.job_queue.offer(job["id"])
                started.append(job["id"])
            done = [_wait_done(first, keys["analyst"], job_id) for job_id in started]
            assert [job["state"] for job in done] == ["done"] * 8, done
            assert [job["attempts"] for job in done] == [1] * 8
            runs_in_apps = 0
            for client in (first, second):
                for kind in ("export", "report"):
                    runs_in_apps += int(client.app.state.metrics.jobs.labels(kind, "done")._value
                                        .get())
            deadline = time.monotonic() + JOB_SECONDS
            while first.app.state.job_queue.waiting() and time.monotonic() < deadline:
                time.sleep(0.2)  # the duplicate messages are read and dropped
            assert first.app.state.job_queue.waiting() == 0
            # The worker's own counts, from its metrics port.
            text = httpx.get(f"http://127.0.0.1:{metrics_port}/metrics", timeout=10).text
            counted_by_worker = sum(
                float(line.rsplit(" ", 1)[1]) for line in text.splitlines()
                if line.startswith("heedful_jobs_total{") and 'outcome="done"' in line
            )
            worker.terminate()
            worker.wait(timeout=90)
            lines = [json.loads(line) for line in log.read_text().splitlines()
                     if line.startswith("{")]
            runs_in_worker = sum(1 for line in lines if line.get("event") == "job-started")
            # Each job ran exactly once, wherever it ran.
            assert runs_in_apps + runs_in_worker == 8, (runs_in_apps, runs_in_worker)
            assert counted_by_worker == runs_in_worker
            second_result = second.get(f"/v1/jobs/{started[0]}/result",
                                       headers=_auth(keys["analyst"]))
            assert second_result.status_code == 200
    finally:
        if worker is not None and worker.poll() is None:
            worker.kill()
            worker.wait(timeout=30)
        for key in redis_client.scan_iter(f"huey.*.{name}*"):
            redis_client.delete(key)
        redis_client.close()
    assert not list(Path(shared["job_folder"]).glob("*/*.part"))


def test_a_failed_job_names_the_error_type_not_its_message(tmp_path):
    settings = Settings(database_url=f"sqlite:///{tmp_path / 'heedful.db'}")
    with _app(settings) as (client, keys):
        survey = _survey_with_respondents(client, keys, n=10)
        queue = client.app.state.job_queue
        # A format the export refuses (the API's schema would not let it through).
        job = queue.submit(survey, JobKind.EXPORT, {"format": "r00001"}, "someone")
        failed = _wait_done(client, keys["analyst"], job.id)
        assert failed["state"] == "failed"
        assert failed["error"] == "KeyError while running the export job"
        assert not (Path(os.environ["HEEDFUL_JOB_FOLDER"]) / job.id).exists()
        result = client.get(f"/v1/jobs/{job.id}/result", headers=_auth(keys["analyst"]))
        assert result.status_code == 409
        assert "r00001" not in result.text
        assert 'heedful_jobs_total{kind="export",outcome="failed"} 1.0' in client.get(
            "/metrics").text


def test_a_queued_job_cancelled_by_the_key_that_started_it_never_runs(tmp_path):
    url = f"sqlite:///{tmp_path / 'heedful.db'}"
    with _app(Settings(database_url=url, job_workers=0)) as (client, keys):
        survey = _survey_with_respondents(client, keys, n=60)
        job = _start(client, keys["analyst"], survey, kind="report")
        with client.app.state.database.write() as session:
            other = store.create_key(session, "another-analyst", Role.ANALYST)
        refused = client.delete(f"/v1/jobs/{job['id']}", headers=_auth(other))
        assert refused.status_code == 403
        reply = client.delete(f"/v1/jobs/{job['id']}", headers=_auth(keys["analyst"]))
        assert reply.status_code == 200, reply.text
        assert reply.json()["state"] == "cancelled"
        assert reply.json()["error"].startswith("cancelled by analyst-")
        again = client.delete(f"/v1/jobs/{job['id']}", headers=_auth(keys["admin"]))
        assert again.status_code == 409 and again.json()["state"] == "cancelled"
        result = client.get(f"/v1/jobs/{job['id']}/result", headers=_auth(keys["analyst"]))
        assert result.status_code == 409 and result.json()["state"] == "cancelled"
        assert client.delete("/v1/jobs/nosuchjob", headers=_auth(keys["admin"])).status_code == 404
    with _app(Settings(database_url=url, job_workers=1)) as (client, keys):
        later = _start(client, keys["analyst"], survey, kind="report")
        assert _wait_done(client, keys["analyst"], later["id"])["state"] == "done"
        cancelled = client.get(f"/v1/jobs/{job['id']}", headers=_auth(keys["analyst"])).json()
        assert cancelled["state"] == "cancelled" and cancelled["attempts"] == 0


def test_a_running_job_cancelled_stops_at_its_next_stage_and_records_nothing(tmp_path):
    from service.job_runner import JobRunner, _Cancelled

    url = f"sqlite:///{tmp_path / 'heedful.db'}"
    with _app(Settings(database_url=url, job_workers=0)) as (client, keys):
        survey = _survey_with_respondents(client, keys, n=60)
        job = _start(client, keys["admin"], survey, kind="rescreen")
        app = client.app
        runner = JobRunner(app.state.database, app.state.settings, app.state.metrics,
                           offer=lambda job_id: None)
        with app.state.database.write() as session:
            running = jobs.claim(session, job["id"], runner.worker, dt.datetime.now(dt.UTC))
        assert running is not None
        reply = client.delete(f"/v1/jobs/{job['id']}", headers=_auth(keys["admin"]))
        assert reply.status_code == 200 and reply.json()["state"] == "cancelled"
        with pytest.raises(_Cancelled):
            runner._advance(running, 0.5, "the next stage")
        with app.state.database.write() as session:
            assert not jobs.finish(session, job["id"], runner.worker, dt.datetime.now(dt.UTC),
                                   result={"x": 1})
        shown = client.get(f"/v1/jobs/{job['id']}", headers=_auth(keys["admin"])).json()
        assert shown["state"] == "cancelled" and shown["result"] is None


def test_ended_jobs_and_their_files_are_deleted_after_the_keeping_days(tmp_path):
    url = f"sqlite:///{tmp_path / 'heedful.db'}"
    settings = Settings(database_url=url, job_workers=1, job_keep_days=30)
    with _app(settings) as (client, keys):
        survey = _survey_with_respondents(client, keys, n=60)
        analyst = keys["analyst"]
        old = _wait_done(client, analyst, _start(client, analyst, survey, kind="export")["id"])
        new = _wait_done(client, analyst, _start(client, analyst, survey, kind="export")["id"])
        runner = client.app.state.job_queue.runner
        folder = runner.folder / old["id"]
        assert folder.is_dir()
        with client.app.state.database.write() as session:
            session.execute(update(Job).where(Job.id == old["id"]).values(
                finished_at=dt.datetime.now(dt.UTC) - dt.timedelta(days=31)
            ))
        runner.sweep()
        assert client.get(f"/v1/jobs/{old['id']}", headers=_auth(analyst)).status_code == 404
        assert not folder.exists()
        kept = client.get(f"/v1/jobs/{new['id']}/result", headers=_auth(analyst))
        assert kept.status_code == 200
