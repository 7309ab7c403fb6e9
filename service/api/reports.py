"""Screening reports: one self-contained HTML page per survey."""

from __future__ import annotations

from fastapi import APIRouter
from fastapi.responses import HTMLResponse, Response

from ..models import JobKind
from ..reports import build_report
from .common import EVIDENCE_NOTE, errors
from .deps import DatabaseDep, MetricsDep, Reader, SettingsDep
from .jobs import ACCEPTED, JobQueueDep, accepted, over_sync_limit
from .surveys import survey_or_404

router = APIRouter(tags=["reports"])


@router.get(
    "/v1/surveys/{survey}/report",
    operation_id="getSurveyReport",
    summary="The survey's screening report as one self-contained HTML page",
    description=(
        "The screening report for the survey's analyst: key figures, design notes, each "
        "detector's distribution and cut-off, overlapping flags, flags by day, answer patterns "
        "and scale statistics with and without the flagged. A survey of more than "
        "HEEDFUL_SYNC_LIMIT_RESPONDENTS respondents gets a background job instead: 202 with the "
        "job document and `Location`; the page is the job's result. " + EVIDENCE_NOTE
    ),
    response_class=HTMLResponse,
    responses=errors(401, 403, 404, also={
        **ACCEPTED,
        200: {
            "description": "An HTML page with its pictures embedded (opens offline): instrument "
            "notes, each detector's score distribution and cut-off, overlapping flags, flag "
            "rate by day, answer patterns, and scale statistics with and without the flagged.",
            "content": {
                "text/html": {
                    "schema": {"type": "string"},
                    "example": (
                        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
                        "<title>Screening report: orchard-volunteers-2027</title>...</head>"
                        "<body><main><header><h1>Screening report: Volunteer survey 2027</h1>"
                        "...</main></body></html>"
                    ),
                }
            },
        }
    }),
)
def survey_report(
    survey: str, caller: Reader, database: DatabaseDep, metrics: MetricsDep,
    settings: SettingsDep, queue: JobQueueDep,
) -> Response:
    if over_sync_limit(database, survey, settings):
        return accepted(queue.submit(survey, JobKind.REPORT, {}, caller.name))
    with database.read() as session:
        found = survey_or_404(session, survey)
        with metrics.job("report"):
            page = build_report(session, found)
    return HTMLResponse(page)


__all__ = ["router"]
