"""Exports: a survey's respondents, answers, scores, flags, reviews and scale scores as a file."""

from __future__ import annotations

import shutil
import tempfile
from pathlib import Path
from typing import Annotated, Literal

from fastapi import APIRouter, Query
from fastapi.responses import FileResponse, Response
from starlette.background import BackgroundTask

from .. import exports
from ..models import JobKind
from .common import errors
from .deps import DatabaseDep, MetricsDep, Reader, SettingsDep
from .jobs import ACCEPTED, JobQueueDep, accepted, over_sync_limit
from .surveys import survey_or_404

router = APIRouter(tags=["exports"])

#: The choices of the export module, as the query parameters' types.
ExportFormat = Literal[exports.EXPORT_FORMATS]  # type: ignore[valid-type]
Without = Literal[exports.WITHOUT_CHOICES]  # type: ignore[valid-type]

_EXAMPLE_CSV = (
    "respondent_id,version,received_at,submitted_at,duration_seconds,be01,be02,...,"
    "long_string_score,long_string_flag,...,flag_count,verdict,careless_score,review_decision,"
    "scale_belonging\n"
    "v0001,1,2027-05-04T09:30:02.118204Z,2027-05-04T09:29:58Z,412,4,2,...,3,0,...,0,ok,0.12,,"
    "4\n"
)


@router.get(
    "/v1/surveys/{survey}/export",
    operation_id="exportSurvey",
    summary="Download the survey as one file: a row per respondent (CSV, Parquet, SPSS, Stata)",
    description=(
        "One row per respondent: id, version, received and submitted times, the answers (one "
        "column per item), each detector's score and flag, the flag count, verdict, careless "
        "score, latest review decision and each scale's score. SPSS and Stata files carry "
        "variable labels (item text, detector summaries) and value labels (answer labels, 0/1 "
        "flags, verdict and review codes), with names made valid for the program. "
        "`without=excluded` leaves out respondents whose latest review is `exclude`; "
        "`without=flagged` leaves out everyone with a flag, on evidence alone. Flags are "
        "evidence for a reviewer's decision, not a verdict: review before excluding anyone. "
        "A survey of more than HEEDFUL_SYNC_LIMIT_RESPONDENTS respondents gets a background "
        "job instead: 202 with the job document and `Location`; the file is the job's result."
    ),
    response_class=FileResponse,
    responses=errors(401, 403, 404, 422, also={
        **ACCEPTED,
        200: {
            "description": "The file, as an attachment (`Content-Disposition`).",
            "content": {
                "text/csv": {"schema": {"type": "string"}, "example": _EXAMPLE_CSV},
                exports.MEDIA_TYPES["parquet"]: {"schema": {"type": "string", "format": "binary"}},
                exports.MEDIA_TYPES["sav"]: {"schema": {"type": "string", "format": "binary"}},
                exports.MEDIA_TYPES["dta"]: {"schema": {"type": "string", "format": "binary"}},
            },
        }
    }),
)
def export_survey(
    survey: str,
    caller: Reader,
    database: DatabaseDep,
    metrics: MetricsDep,
    settings: SettingsDep,
    queue: JobQueueDep,
    fmt: Annotated[
        ExportFormat,
        Query(alias="format", description="csv, parquet, sav (SPSS) or dta (Stata)."),
    ] = "csv",
    without: Annotated[
        list[Without] | None,
        Query(
            description="Leave out `excluded` respondents (latest review `exclude`) and/or "
            "`flagged` ones (any flag); repeatable."
        ),
    ] = None,
) -> Response:
    if over_sync_limit(database, survey, settings):
        options = {"format": fmt, "without": sorted(set(without or ()))}
        return accepted(queue.submit(survey, JobKind.EXPORT, options, caller.name))
    folder = Path(tempfile.mkdtemp(prefix="heedful-export-"))
    try:
        with database.read() as session:
            found = survey_or_404(session, survey)
            name = f"{found.survey}{exports.SUFFIXES[fmt]}"
            with metrics.job("export"):
                summary = exports.write_export(
                    session, found, fmt, folder / name, without=without or ()
                )
    except BaseException:
        shutil.rmtree(folder, ignore_errors=True)
        raise
    return FileResponse(
        summary.path,
        media_type=exports.MEDIA_TYPES[fmt],
        filename=name,
        headers={"Heedful-Respondents": str(summary.respondents)},
        background=BackgroundTask(shutil.rmtree, folder, ignore_errors=True),
    )


__all__ = ["router"]
