"""Background jobs: start one on a survey, follow it, fetch its result."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

from fastapi import APIRouter, Depends, Request
from fastapi.responses import FileResponse, HTMLResponse, JSONResponse, Response

from .. import exports, jobs
from ..db import utcnow
from ..job_queue import JobQueue
from ..job_runner import REPORT_FILE
from ..jobs import JobView
from ..models import JobKind, Role
from ..problems import Problem
from ..schemas import JobIn, JobList, JobOut
from .common import errors
from .deps import DatabaseDep, Reader

__all__ = ["router", "JobQueueDep", "ACCEPTED", "accepted", "job_out", "over_sync_limit"]

router = APIRouter(tags=["jobs"])


async def get_job_queue(request: Request) -> JobQueue:
    return request.app.state.job_queue


JobQueueDep = Annotated[JobQueue, Depends(get_job_queue)]

ACCEPTED: dict[int | str, dict[str, Any]] = {
    202: {
        "description": "The work runs as a background job: the job document, with "
        "`Location: /v1/jobs/{id}` to follow it.",
        "model": JobOut,
        "headers": {"Location": {"description": "The job's URL.", "schema": {"type": "string"}}},
    }
}


def job_out(job: JobView) -> JobOut:
    return JobOut(
        id=job.id, kind=job.kind.value, survey=job.survey, options=job.options,
        state=job.state.value, progress=job.progress, message=job.message,
        requested_by=job.requested_by, created_at=job.created_at, started_at=job.started_at,
        finished_at=job.finished_at, attempts=job.attempts, result=job.result,
        result_url=f"/v1/jobs/{job.id}/result" if job.state.value == "done" else None,
        error=job.error,
    )


def accepted(job: JobView) -> JSONResponse:
    """202 with the job document and its location."""
    return JSONResponse(
        job_out(job).model_dump(mode="json"), status_code=202,
        headers={"Location": f"/v1/jobs/{job.id}"},
    )


def over_sync_limit(database: Any, survey: str, settings: Any) -> bool:
    """Whether the survey is too large for a request to work through
    (``HEEDFUL_SYNC_LIMIT_RESPONDENTS``); raises ``UnknownSurvey``."""
    from .. import store
    from ..errors import UnknownSurvey

    with database.read() as session:
        found = store.get_survey(session, survey)
        if found is None:
            raise UnknownSurvey(survey)
        return jobs.over_sync_limit(session, found, settings.sync_limit_respondents)


#: Jobs that change stored results: an admin key starts them.
ADMIN_KINDS = ("rescreen", "nightly")


def options_of(body: JobIn) -> dict[str, Any]:
    if body.kind in ("export", "nightly"):
        return {"format": body.format, "without": sorted(set(body.without))}
    return {}


@router.post(
    "/v1/surveys/{survey}/jobs",
    operation_id="startJob",
    summary="Start a background job on a survey: re-screen, report, export or nightly work",
    description=(
        "Queues the job and answers at once with 202 and the job document; follow it at "
        "`Location`. A re-screen or the nightly work needs an admin key, a report or an export "
        "an analyst key. The nightly job's result is its report; its document lists the files. "
        "Flags are evidence for a reviewer's decision, not a verdict."
    ),
    status_code=202,
    response_model=JobOut,
    responses=errors(401, 403, 404, 422, also={
        202: {"description": "Queued: the job document; `Location` is its URL.",
              "headers": ACCEPTED[202]["headers"]},
    }),
)
def start_job(
    survey: str, body: JobIn, caller: Reader, queue: JobQueueDep
) -> JSONResponse:
    if body.kind in ADMIN_KINDS and caller.role != Role.ADMIN:
        raise Problem(
            403, f"This key has the role {caller.role.value!r}; a {body.kind} job needs: admin.",
            kind="forbidden",
        )
    return accepted(queue.submit(survey, JobKind(body.kind), options_of(body), caller.name))


@router.get(
    "/v1/surveys/{survey}/jobs",
    operation_id="listJobs",
    summary="The survey's latest background jobs, newest first",
    description="The survey's latest 50 jobs of every kind, newest first: state, progress, who "
    "asked for each and when, and a result link once done.",
    response_model=JobList,
    responses=errors(401, 403, 404),
)
def list_jobs(survey: str, caller: Reader, database: DatabaseDep) -> JobList:
    with database.read() as session:
        found = jobs.recent(session, survey)
    return JobList(data=[job_out(job) for job in found])


@router.get(
    "/v1/jobs/{job}",
    operation_id="getJob",
    summary="A background job: its state, progress and result link",
    description="Where the job stands: `queued`, `running` (with a coarse `progress` and the "
    "stage reached), `done` (with `result_url`) or `failed` (with `error`, which holds no "
    "respondent data). A job whose worker stopped is started again, at most "
    "HEEDFUL_JOB_ATTEMPTS times.",
    response_model=JobOut,
    responses=errors(401, 403, 404),
)
def get_job(job: str, caller: Reader, database: DatabaseDep) -> JobOut:
    with database.read() as session:
        return job_out(jobs.view(session, job))


@router.delete(
    "/v1/jobs/{job}",
    operation_id="cancelJob",
    summary="Cancel a queued or running job (the key that started it, or an admin key)",
    description="A queued job will not start; a running one stops at its next stage and "
    "records nothing (a re-screen writes its results only in the transaction that ends it). "
    "409 when the job has already ended. The job stays listed as `cancelled`, with who "
    "cancelled it in `error`.",
    response_model=JobOut,
    responses=errors(401, 403, 404, 409),
)
def cancel_job(job: str, caller: Reader, database: DatabaseDep) -> JobOut:
    with database.write() as session:
        found = jobs.view(session, job)
        if caller.role != Role.ADMIN and found.requested_by != caller.name:
            raise Problem(
                403, "Only the key that started a job, or an admin key, can cancel it.",
                kind="forbidden",
            )
        return job_out(jobs.cancel(session, job, caller.name, utcnow()))


@router.get(
    "/v1/jobs/{job}/result",
    operation_id="getJobResult",
    summary="A done job's result: the export file, the report page (also of a nightly job) or "
    "the re-screen's reply",
    description=(
        "409 while the job is queued or running, and when it failed (the problem's `state` "
        "says which). Flags are evidence for a reviewer's decision, not a verdict: review "
        "before excluding anyone."
    ),
    response_class=Response,
    responses=errors(401, 403, 404, 409, also={
        200: {
            "description": "An export as an attachment, a report as an HTML page, or a "
            "re-screen's reply as JSON.",
            "content": {
                "application/json": {"schema": {"type": "object"},
                                     "example": {"survey": "orchard-volunteers-2027",
                                                 "respondents": 600, "references": [],
                                                 "without_reference": {}}},
                "text/html": {"schema": {"type": "string"}},
                **{
                    exports.MEDIA_TYPES[fmt]: {"schema": {"type": "string", "format": "binary"}}
                    for fmt in exports.EXPORT_FORMATS
                },
            },
        }
    }),
)
def job_result(job: str, caller: Reader, database: DatabaseDep) -> Response:
    with database.read() as session:
        found, path = jobs.finished_result(session, job)
    if path is None:
        return JSONResponse(found.result)
    file = Path(path)
    if not file.is_file():
        raise Problem(404, "The job's result file is no longer there; start the job again.",
                      kind="job-result-gone")
    if file.name == REPORT_FILE and found.kind in (JobKind.REPORT, JobKind.NIGHTLY):
        return HTMLResponse(file.read_text(encoding="utf-8"))
    fmt = found.options.get("format", "csv")
    return FileResponse(
        file, media_type=exports.MEDIA_TYPES[fmt], filename=file.name,
        headers={"Heedful-Respondents": str((found.result or {}).get("respondents", ""))},
    )
