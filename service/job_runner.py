"""What a background job does, and the worker's side of its row.

``JobRunner.run`` takes a job (``jobs.claim``), renews its heartbeat from a thread of its own
while it runs, calls the same use cases as the synchronous endpoints (``rescreen.rescreen``,
``reports.build_report``, ``exports.write_export``) and records the result. A re-screen's
result is written in the same transaction as the re-screen itself, so it is done exactly when
its results are. The sweep (``JobRunner.sweep``) finds stale jobs of dead workers and queued
jobs whose message was lost; ``service.job_queue`` calls it on every consumer.
"""

from __future__ import annotations

import datetime as dt
import json
import logging
import os
import shutil
import socket
import threading
import uuid
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from . import jobs
from .database import Database
from .db import sqlite_path, utcnow
from .errors import UnknownSurvey
from .jobs import JobView
from .metrics import Metrics
from .models import JobKind, JobState
from .settings import Settings

__all__ = ["JobRunner", "job_folder", "private_folder", "REPORT_FILE"]

log = logging.getLogger("heedful.jobs")

#: The report's file name in its job's folder.
REPORT_FILE = "report.html"


def job_folder(settings: Settings) -> Path:
    """Where job results (and the queue file without a broker) are kept: ``HEEDFUL_JOB_FOLDER``,
    else ``<name>-jobs`` beside a SQLite database ``<name>.db``, else ``./heedful-jobs``."""
    if settings.job_folder:
        return Path(settings.job_folder)
    path = sqlite_path(settings.database_url)
    if path is not None:
        return path.parent / f"{path.stem}-jobs"
    return Path("heedful-jobs")


def private_folder(path: Path) -> Path:
    """A folder readable by its owner only: exports hold answers."""
    path.mkdir(mode=0o700, parents=True, exist_ok=True)
    return path


class JobRunner:
    """Runs jobs of one database for one process; ``offer`` puts a job back on the queue (a
    stale job queued again)."""

    def __init__(
        self, database: Database, settings: Settings, metrics: Metrics,
        offer: Callable[[str], None],
    ):
        self.database = database
        self.settings = settings
        self.metrics = metrics
        self.offer = offer
        self.worker = f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:8]}"
        self.folder = job_folder(settings)
        self._running: set[str] = set()
        self._lock = threading.Lock()

    # running ----------------------------------------------------------------------------------

    def run(self, job_id: str) -> bool:
        """Run the job if it is still queued; False when another worker has it or it ended."""
        with self.database.write() as session:
            job = jobs.claim(session, job_id, self.worker, utcnow())
        if job is None:
            return False
        with self._lock:
            self._running.add(job_id)
        log.info("job %s started", job.kind.value,
                 extra={"event": "job-started", "survey": job.survey, "reason": job.kind.value})
        try:
            with self._heartbeat(job_id), self.metrics.job(job.kind.value):
                self._run(job)
        except _TakenOver as stopped:
            if isinstance(stopped, _Cancelled):
                # Stopped by a person: nothing of this run is kept.
                shutil.rmtree(self.folder / job_id, ignore_errors=True)
                log.info("job %s cancelled", job.kind.value, extra={
                    "event": "job-cancelled", "survey": job.survey, "reason": job.kind.value,
                })
            else:
                # A sweep found the job stale and queued it again: its other run counts.
                log.warning("job %s taken over", job.kind.value, extra={
                    "event": "job-taken-over", "survey": job.survey, "reason": job.kind.value,
                })
        except Exception as error:
            # Only the type: an error's message may quote answers or ids.
            what = f"{type(error).__name__} while running the {job.kind.value} job"
            if isinstance(error, UnknownSurvey):
                what = "the survey was deleted"
            with self.database.write() as session:
                jobs.fail(session, job_id, self.worker, what, utcnow())
            shutil.rmtree(self.folder / job_id, ignore_errors=True)
            log.warning("job %s failed", job.kind.value, extra={
                "event": "job-failed", "survey": job.survey, "reason": type(error).__name__,
            })
        else:
            log.info("job %s done", job.kind.value,
                     extra={"event": "job-done", "survey": job.survey, "reason": job.kind.value})
        finally:
            with self._lock:
                self._running.discard(job_id)
        return True

    def _advance(self, job: JobView, progress: float, message: str) -> None:
        """Record a stage; stop here when the job is no longer this worker's (cancelled, or
        found stale and queued again)."""
        with self.database.write() as session:
            if not jobs.advance(session, job.id, self.worker, progress, message, utcnow()):
                raise self._stopped(job.id)

    def _run(self, job: JobView) -> None:
        if job.kind is JobKind.RESCREEN:
            from .rescreen import rescreen

            self._advance(job, 0.1, "re-screening every stored respondent")
            with self.database.write() as session:
                survey = _survey(session, job.survey)
                reply = rescreen(session, survey, self.settings).reply()
                # In the re-screen's transaction: its results and the job's end commit together.
                if not jobs.finish(session, job.id, self.worker, utcnow(),
                                   result=json.loads(json.dumps(reply, default=_json_value))):
                    raise self._stopped(job.id)
            return
        target = private_folder(private_folder(self.folder) / job.id)
        if job.kind is JobKind.NIGHTLY:
            from .nightly import DEFAULT_FORMAT, nightly_survey

            self._advance(job, 0.1, "the nightly work: reference, re-screen, export, report")
            run = nightly_survey(
                self.database, self.settings, job.survey, target,
                fmt=job.options.get("format", DEFAULT_FORMAT),
                without=job.options.get("without") or (),
            )
            path = target / REPORT_FILE
            result: dict[str, Any] = run.as_dict()
        elif job.kind is JobKind.REPORT:
            from .reports import build_report

            self._advance(job, 0.1, "reading the survey and drawing the figures")
            with self.database.read() as session:
                survey = _survey(session, job.survey)
                page = build_report(session, survey)
            self._advance(job, 0.9, "writing the report")
            from .files import write_atomic

            path = target / REPORT_FILE
            write_atomic(path, lambda temporary: Path(temporary).write_text(page, encoding="utf-8"))
            result = {"file": REPORT_FILE}
        else:
            from .exports import SUFFIXES, write_export

            fmt = job.options.get("format", "csv")
            self._advance(job, 0.1, f"writing the {fmt} export")
            with self.database.read() as session:
                survey = _survey(session, job.survey)
                summary = write_export(
                    session, survey, fmt, target / f"{survey.survey}{SUFFIXES[fmt]}",
                    without=job.options.get("without") or (),
                )
            path = summary.path
            result = {
                "file": path.name, "format": fmt, "respondents": summary.respondents,
                "left_out": summary.left_out, "without": list(summary.without),
            }
        with self.database.write() as session:
            if not jobs.finish(session, job.id, self.worker, utcnow(), result_path=str(path),
                               result=result):
                raise self._stopped(job.id)

    def _stopped(self, job_id: str) -> _TakenOver:
        """Why a job stopped being this worker's: cancelled, or found stale and taken over."""
        with self.database.read() as session:
            cancelled = jobs.view(session, job_id).state is JobState.CANCELLED
        return _Cancelled() if cancelled else _TakenOver()

    @contextmanager
    def _heartbeat(self, job_id: str) -> Iterator[None]:
        """Renew the job's heartbeat from a thread while the block runs."""
        stop = threading.Event()
        every = max(0.2, self.settings.job_stale_seconds / 6)

        def beat() -> None:
            while not stop.wait(every):
                try:
                    with self.database.write() as session:
                        if not jobs.beat(session, job_id, self.worker, utcnow()):
                            return
                except Exception:  # the database is away for a moment; the next beat tries
                    continue

        thread = threading.Thread(target=beat, name=f"heedful-job-{job_id[:8]}", daemon=True)
        thread.start()
        try:
            yield
        finally:
            stop.set()

    # sweeping ---------------------------------------------------------------------------------

    def sweep(self) -> jobs.Recovered:
        """Queue again (or fail) the stale jobs of workers that stopped, and offer again the
        queued jobs waiting longer than the stale time (their message may have been lost)."""
        now = utcnow()
        with self._lock:
            alive = set(self._running)
        stale = self.settings.job_stale_seconds
        with self.database.write() as session:
            recovered = jobs.recover_stale(
                session, now, stale, self.settings.job_attempts, skip=alive
            )
            overdue = jobs.overdue_queued(session, now, stale)
            forgotten = (
                jobs.forget_ended(session, now, self.settings.job_keep_days)
                if self.settings.job_keep_days > 0 else []
            )
        for job_id in forgotten:
            shutil.rmtree(self.folder / job_id, ignore_errors=True)
        for job_id in recovered.queued_again + overdue:
            try:
                self.offer(job_id)
            except Exception as error:  # the broker is away: the next sweep offers it again
                log.warning("job could not be offered", extra={
                    "event": "job-offer-failed", "reason": type(error).__name__,
                })
        for job_id in recovered.failed:
            shutil.rmtree(self.folder / job_id, ignore_errors=True)
        return recovered


class _TakenOver(Exception):
    """The job stopped being this worker's while it ran (found stale and queued again)."""

    job_outcome = "taken_over"


class _Cancelled(_TakenOver):
    """The job was cancelled while it ran."""

    job_outcome = "cancelled"


def _survey(session: Any, name: str) -> Any:
    from . import store

    survey = store.get_survey(session, name)
    if survey is None:  # deleted since the job was asked for
        raise UnknownSurvey(name)
    return survey


def _json_value(value: Any) -> Any:
    if isinstance(value, dt.datetime):
        return value.isoformat().replace("+00:00", "Z")
    raise TypeError(type(value).__name__)
