"""Background jobs: the ``jobs`` table's rows and everything done to them.

A job is asked for (``submit``: ``queued``), taken by exactly one worker (``claim``: a
conditional update from ``queued`` to ``running``), renewed while it runs (``beat``, ``advance``)
and ends ``done`` (``finish``) or ``failed`` (``fail``). A running job whose worker stopped being
heard from is stale (``recover_stale``): it is queued again while attempts remain, else marked
failed. Every change of state is a conditional update, so two workers (or two sweepers on two
machines) that race on one job cannot both win. What a job does is ``service.job_runner``'s;
how it travels to a worker is ``service.job_queue``'s. Functions take a session; the caller owns
the transaction.
"""

from __future__ import annotations

import datetime as dt
import secrets
from collections.abc import Collection, Mapping
from dataclasses import dataclass
from typing import Any

from sqlalchemy import delete, select, update
from sqlalchemy.orm import Session

from . import store
from .errors import JobEnded, JobNotDone, UnknownJob, UnknownSurvey
from .models import Job, JobKind, JobState, Survey

__all__ = [
    "JobView",
    "submit",
    "view",
    "job_or_error",
    "recent",
    "finished_result",
    "claim",
    "beat",
    "advance",
    "finish",
    "fail",
    "Recovered",
    "recover_stale",
    "overdue_queued",
    "over_sync_limit",
    "cancel",
    "ENDED",
    "forget_ended",
    "RECENT_LIMIT",
]

#: Jobs a survey's listing shows (newest first).
RECENT_LIMIT = 50
#: Longest ``message`` kept (the column's width).
_MESSAGE_CHARS = 200


@dataclass(frozen=True)
class JobView:
    """A job as the API and the command line show it (never the table row)."""

    id: str
    kind: JobKind
    survey: str
    options: dict[str, Any]
    state: JobState
    progress: float
    message: str
    requested_by: str
    created_at: dt.datetime
    started_at: dt.datetime | None
    finished_at: dt.datetime | None
    attempts: int
    result: dict[str, Any] | None
    has_file: bool
    error: str | None


def _view(job: Job, survey: str) -> JobView:
    return JobView(
        id=job.id, kind=JobKind(job.kind), survey=survey, options=dict(job.options or {}),
        state=JobState(job.state), progress=job.progress, message=job.message,
        requested_by=job.requested_by, created_at=job.created_at, started_at=job.started_at,
        finished_at=job.finished_at, attempts=job.attempts, result=job.result,
        has_file=job.result_path is not None, error=job.error,
    )


def submit(
    session: Session, survey: str, kind: JobKind, options: Mapping[str, Any],
    requested_by: str, now: dt.datetime,
) -> JobView:
    """A new queued job of ``kind`` on ``survey`` (raises :class:`UnknownSurvey`)."""
    found = store.get_survey(session, survey)
    if found is None:
        raise UnknownSurvey(survey)
    job = Job(
        id=secrets.token_hex(12), kind=kind, survey_id=found.id, options=dict(options),
        state=JobState.QUEUED, progress=0.0, message="queued", requested_by=requested_by,
        created_at=now, heartbeat_at=now, attempts=0,
    )
    session.add(job)
    session.flush()
    return _view(job, found.survey)


def job_or_error(session: Session, job_id: str) -> tuple[Job, Survey]:
    """The job's row and its survey (raises :class:`UnknownJob`)."""
    row = session.execute(
        select(Job, Survey).join(Survey, Survey.id == Job.survey_id).where(Job.id == job_id)
    ).first()
    if row is None:
        raise UnknownJob(job_id)
    return row[0], row[1]


def view(session: Session, job_id: str) -> JobView:
    job, survey = job_or_error(session, job_id)
    return _view(job, survey.survey)


def recent(session: Session, survey: str, limit: int = RECENT_LIMIT) -> list[JobView]:
    """The survey's latest jobs, newest first (raises :class:`UnknownSurvey`)."""
    found = store.get_survey(session, survey)
    if found is None:
        raise UnknownSurvey(survey)
    rows = session.scalars(
        select(Job).where(Job.survey_id == found.id)
        .order_by(Job.created_at.desc(), Job.id.desc()).limit(limit)
    ).all()
    return [_view(job, found.survey) for job in rows]


def finished_result(session: Session, job_id: str) -> tuple[JobView, str | None]:
    """A done job and its result file's path (None for a result kept as JSON); raises
    :class:`JobNotDone` while it is queued or running, and when it failed."""
    job, survey = job_or_error(session, job_id)
    if job.state != JobState.DONE:
        raise JobNotDone(job.id, JobState(job.state).value, job.error)
    return _view(job, survey.survey), job.result_path


#: The states a job ends in.
ENDED = (JobState.DONE, JobState.FAILED, JobState.CANCELLED)


def cancel(session: Session, job_id: str, by: str, now: dt.datetime) -> JobView:
    """Stop a queued or running job (raises :class:`UnknownJob`, and :class:`JobEnded` when it
    has ended). A running job's worker finds out at its next stage or at the end and records
    nothing of it (a re-screen's results are written in the transaction that would end it)."""
    job, survey = job_or_error(session, job_id)
    stopped = _updated(
        session,
        update(Job).where(Job.id == job_id, Job.state.in_((JobState.QUEUED, JobState.RUNNING)))
        .values(state=JobState.CANCELLED, finished_at=now, heartbeat_at=now,
                message="cancelled", error=f"cancelled by {by}"[:_MESSAGE_CHARS]),
    )
    session.expire(job)
    if not stopped:
        raise JobEnded(job_id, JobState(job.state).value)
    return _view(job, survey.survey)


def forget_ended(session: Session, now: dt.datetime, keep_days: float) -> list[str]:
    """Delete the jobs that ended more than ``keep_days`` ago; their ids (the caller removes
    their result files)."""
    cutoff = now - dt.timedelta(days=keep_days)
    old = list(session.scalars(
        select(Job.id).where(Job.state.in_(ENDED), Job.finished_at < cutoff)
    ).all())
    for chunk in range(0, len(old), 500):  # bounded by the number found
        session.execute(
            delete(Job).where(Job.id.in_(old[chunk:chunk + 500]), Job.state.in_(ENDED)),
            execution_options={"synchronize_session": False},
        )
    return old


def _updated(session: Session, statement: Any) -> bool:
    """Run a conditional update; whether it changed a row."""
    done: Any = session.execute(statement, execution_options={"synchronize_session": False})
    return bool(done.rowcount)


def claim(session: Session, job_id: str, worker: str, now: dt.datetime) -> JobView | None:
    """Take a queued job for ``worker``; None when it is not queued (another worker has it,
    or it ended): of several workers offered one job, exactly one gets it."""
    taken = _updated(
        session,
        update(Job).where(Job.id == job_id, Job.state == JobState.QUEUED).values(
            state=JobState.RUNNING, worker=worker, started_at=now, heartbeat_at=now,
            attempts=Job.attempts + 1, progress=0.0, message="started",
        ),
    )
    return view(session, job_id) if taken else None


def _mine(job_id: str, worker: str) -> Any:
    return (Job.id == job_id, Job.state == JobState.RUNNING, Job.worker == worker)


def beat(session: Session, job_id: str, worker: str, now: dt.datetime) -> bool:
    """The worker is still at it; False when the job is no longer its own."""
    return _updated(session, update(Job).where(*_mine(job_id, worker)).values(heartbeat_at=now))


def advance(
    session: Session, job_id: str, worker: str, progress: float, message: str, now: dt.datetime
) -> bool:
    """Record a stage reached (``progress`` in 0..1)."""
    return _updated(
        session,
        update(Job).where(*_mine(job_id, worker)).values(
            progress=min(max(progress, 0.0), 1.0), message=message[:_MESSAGE_CHARS],
            heartbeat_at=now,
        ),
    )


def finish(
    session: Session, job_id: str, worker: str, now: dt.datetime, *,
    result_path: str | None = None, result: dict[str, Any] | None = None,
) -> bool:
    """The job is done; False (and nothing recorded) when it is no longer the worker's."""
    return _updated(
        session,
        update(Job).where(*_mine(job_id, worker)).values(
            state=JobState.DONE, progress=1.0, message="done", finished_at=now,
            heartbeat_at=now, result_path=result_path, result=result,
        ),
    )


def fail(session: Session, job_id: str, worker: str, error: str, now: dt.datetime) -> bool:
    """The job failed; ``error`` must hold no respondent data (the caller names the error's
    type and the stage, never its message)."""
    return _updated(
        session,
        update(Job).where(*_mine(job_id, worker)).values(
            state=JobState.FAILED, message="failed", finished_at=now, heartbeat_at=now,
            error=error,
        ),
    )


@dataclass(frozen=True)
class Recovered:
    """What a sweep did with the stale running jobs."""

    queued_again: list[str]
    failed: list[str]


def recover_stale(
    session: Session, now: dt.datetime, stale_seconds: float, attempts: int,
    skip: Collection[str] = (),
) -> Recovered:
    """Running jobs not heard from for ``stale_seconds`` (their worker stopped: killed, the
    machine lost) are queued again while fewer than ``attempts`` starts were made, and marked
    failed otherwise. ``skip`` names jobs the caller knows to be alive (its own)."""
    cutoff = now - dt.timedelta(seconds=stale_seconds)
    stale = session.execute(
        select(Job.id, Job.attempts).where(
            Job.state == JobState.RUNNING, Job.heartbeat_at < cutoff
        )
    ).all()
    queued, failed = [], []
    for job_id, started in stale:
        if job_id in skip:
            continue
        still_stale = (Job.id == job_id, Job.state == JobState.RUNNING, Job.heartbeat_at < cutoff)
        if started < attempts:
            if _updated(session, update(Job).where(*still_stale).values(
                state=JobState.QUEUED, worker=None, heartbeat_at=now, progress=0.0,
                message=f"queued again: its worker stopped during attempt {started}",
            )):
                queued.append(job_id)
        elif _updated(session, update(Job).where(*still_stale).values(
            state=JobState.FAILED, finished_at=now, heartbeat_at=now, message="failed",
            error=f"its worker stopped while running it, {started} time(s)",
        )):
            failed.append(job_id)
    return Recovered(queued, failed)


def overdue_queued(session: Session, now: dt.datetime, after_seconds: float) -> list[str]:
    """Queued jobs offered to the queue more than ``after_seconds`` ago, marked as offered
    now: the caller offers them again (a message lost with a worker that died between taking
    it and claiming the job). A job offered twice still runs once (``claim``)."""
    cutoff = now - dt.timedelta(seconds=after_seconds)
    waiting = session.scalars(
        select(Job.id).where(Job.state == JobState.QUEUED, Job.heartbeat_at < cutoff)
    ).all()
    return [
        job_id for job_id in waiting
        if _updated(session, update(Job).where(
            Job.id == job_id, Job.state == JobState.QUEUED, Job.heartbeat_at < cutoff
        ).values(heartbeat_at=now))
    ]


def over_sync_limit(session: Session, survey: Survey, limit: int) -> bool:
    """Whether the survey holds more respondents than a request may work through itself
    (``HEEDFUL_SYNC_LIMIT_RESPONDENTS``): it then gets a job."""
    return store.count_respondents(session, survey.id) > limit
