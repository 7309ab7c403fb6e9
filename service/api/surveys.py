"""Surveys: register instruments (versions), read them, rotate secrets, re-screen, summaries."""

from __future__ import annotations

import datetime as dt
from typing import Any

from fastapi import APIRouter, Request, Response
from fastapi.responses import JSONResponse
from starlette.concurrency import run_in_threadpool

from detectors import Instrument
from detectors.screening import reference_detectors

from .. import outcomes, registration, store
from ..ingest import forget_credentials
from ..models import JobKind, Role, Survey
from ..problems import Problem
from ..rescreen import rescreen
from ..schemas import (
    DayTally,
    DetectorTally,
    LintWarning,
    ReferenceInfo,
    RescreenReply,
    SecretRotated,
    SurveyDetail,
    SurveyList,
    SurveyRegistered,
    SurveyReport,
    SurveySettingsIn,
    SurveySettingsOut,
    SurveySummaryRow,
    VersionInfo,
)
from .common import EVIDENCE_NOTE, errors, read_json
from .deps import Admin, DatabaseDep, MetricsDep, Reader, SettingsDep, authenticate
from .jobs import ACCEPTED, JobQueueDep, accepted, over_sync_limit

router = APIRouter(tags=["surveys"])

_INSTRUMENT_SCHEMA = Instrument.model_json_schema(ref_template="#/components/schemas/{model}")
_EXAMPLE_INSTRUMENT = {
    "survey": "orchard-volunteers-2027",
    "title": "Volunteer survey 2027",
    "response_format": {"points": 5, "lowest": 1},
    "items": [
        {"id": "be01", "text": "I feel part of the orchard team.", "scale": "belonging"},
        {"id": "be02", "text": "I often feel like an outsider.", "scale": "belonging", "keyed": -1},
    ],
}


def survey_or_404(session: Any, survey: str) -> Survey:
    found = store.get_survey(session, survey)
    if found is None:
        raise Problem(404, f"No survey {survey!r} is registered.", kind="unknown-survey")
    return found


@router.post(
    "/v1/surveys",
    operation_id="registerSurvey",
    summary="Register an instrument (a changed one becomes a new version); returns lint warnings",
    description=(
        "Registers a survey's instrument document. The same document again changes nothing "
        "(200); a changed one under the same survey id becomes a new version (201), and "
        "respondents keep the version they were screened with. The reply lists design warnings "
        "that limit screening and the survey's webhook secret."
    ),
    response_model=SurveyRegistered,
    status_code=201,
    responses=errors(
        400, 401, 403, 413, 415, 422,
        also={200: {"description": "The same document was already registered"}},
    ),
    openapi_extra={
        "requestBody": {
            "required": True,
            "content": {
                "application/json": {
                    "schema": {"$ref": "#/components/schemas/Instrument"},
                    "examples": {"small": {"value": _EXAMPLE_INSTRUMENT}},
                }
            },
        }
    },
)
async def register_survey(
    request: Request, response: Response, database: DatabaseDep, settings: SettingsDep
) -> SurveyRegistered:
    caller = await run_in_threadpool(
        authenticate, database, request.headers.get("authorization")
    )
    if caller.role is not Role.ADMIN:
        raise Problem(
            403,
            f"This key has the role {caller.role.value!r}; registering a survey needs an "
            "admin key.",
            kind="forbidden",
        )
    _, document = await read_json(request, settings.max_body_bytes)
    reply = await run_in_threadpool(_register, database, document)
    if not reply.new_version:
        response.status_code = 200
    return reply


def _register(database: Any, document: Any) -> SurveyRegistered:
    registered = registration.register_survey(database, document)
    return SurveyRegistered(
        survey=registered.survey,
        title=registered.title,
        version=registered.version,
        new_version=registered.new_version,
        lint=[
            LintWarning(code=n.code, location=n.location, message=n.message)
            for n in registered.lint
        ],
        webhook_secret=registered.webhook_secret,
    )


@router.get(
    "/v1/surveys",
    operation_id="listSurveys",
    summary="List the registered surveys",
    description="Every registered survey with its current version and number of respondents.",
    response_model=SurveyList,
    responses=errors(401, 403),
)
def list_surveys(caller: Reader, database: DatabaseDep) -> SurveyList:
    with database.read() as session:
        rows = store.list_surveys(session)
    return SurveyList(
        data=[
            SurveySummaryRow(
                survey=s.survey, title=s.title, version=number, respondents=count,
                created_at=s.created_at,
            )
            for s, number, count in rows
        ]
    )


def _reference_info(session: Any, survey: Survey, numbers: dict[int, int]) -> ReferenceInfo | None:
    reference = store.reference_of(session, survey.current_reference_id)
    if reference is None:
        return None
    return ReferenceInfo(
        id=reference.id,
        version=numbers[reference.survey_version_id],
        respondents=reference.respondents,
        detectors=reference_detectors(reference.data),
        created_at=reference.created_at,
    )


@router.get(
    "/v1/surveys/{survey}",
    operation_id="getSurvey",
    description=(
        "A survey's current instrument document, its versions, the reference sample in force "
        "and its settings; the webhook secret is shown to admin keys only."
    ),
    summary="A survey's current instrument, versions and reference sample "
    "(and webhook secret, for admin keys)",
    response_model=SurveyDetail,
    response_model_exclude_none=False,
    responses=errors(401, 403, 404),
)
def get_survey(survey: str, caller: Reader, database: DatabaseDep) -> SurveyDetail:
    with database.read() as session:
        found = survey_or_404(session, survey)
        versions = store.versions_of(session, found.id)
        numbers = {v.id: v.number for v in versions}
        current = next(v for v in versions if v.id == found.current_version_id)
        return SurveyDetail(
            survey=found.survey,
            title=found.title,
            version=current.number,
            respondents=store.count_respondents(session, found.id),
            created_at=found.created_at,
            versions=[VersionInfo(number=v.number, created_at=v.created_at) for v in versions],
            reference=_reference_info(session, found, numbers),
            instrument=current.document,
            verdict_in_replies=found.verdict_in_replies,
            webhook_secret=found.webhook_secret if caller.role is Role.ADMIN else None,
        )


@router.patch(
    "/v1/surveys/{survey}",
    operation_id="changeSurveySettings",
    summary="Change a survey's settings (whether ingest replies carry verdict and careless score)",
    description=(
        "Settings that are not part of the instrument. `verdict_in_replies: false` leaves the "
        "verdict and careless score out of the replies to posted responses: the survey platform "
        "reads those replies, and a platform may act on them without a person (cancel a "
        "complete, withhold an incentive). Flags stay in the reply; analysts still see "
        "everything. Fields left out of the body are unchanged."
    ),
    response_model=SurveySettingsOut,
    responses=errors(400, 401, 403, 404, 415, 422),
)
def change_survey_settings(
    survey: str, body: SurveySettingsIn, caller: Admin, database: DatabaseDep
) -> SurveySettingsOut:
    with database.write() as session:
        found = survey_or_404(session, survey)
        if body.verdict_in_replies is not None:
            found.verdict_in_replies = body.verdict_in_replies
        return SurveySettingsOut(
            survey=found.survey, verdict_in_replies=found.verdict_in_replies
        )


@router.post(
    "/v1/surveys/{survey}/webhook-secret",
    operation_id="rotateWebhookSecret",
    summary="Replace the survey's webhook secret (the old one verifies for a grace period)",
    description=(
        "A new webhook secret for the survey; the previous one keeps verifying signatures for "
        "HEEDFUL_SECRET_GRACE_SECONDS so the platform can switch without losing posts."
    ),
    response_model=SecretRotated,
    responses=errors(401, 403, 404),
)
def rotate_webhook_secret(
    survey: str, caller: Admin, database: DatabaseDep, settings: SettingsDep
) -> SecretRotated:
    with database.write() as session:
        found = survey_or_404(session, survey)
        until = store.rotate_secret(
            session, found, dt.timedelta(seconds=settings.secret_grace_seconds)
        )
        rotated = SecretRotated(
            survey=found.survey, webhook_secret=found.webhook_secret,
            previous_secret_valid_until=until,
        )
    forget_credentials(database.memo, survey)  # committed: the next post reads the new secret
    return rotated


@router.post(
    "/v1/surveys/{survey}/rescreen",
    operation_id="rescreenSurvey",
    summary="Re-estimate the reference sample from stored respondents and re-score them all",
    description=(
        "Estimates a reference sample per survey version from the stored respondents (once "
        "there are HEEDFUL_REFERENCE_MIN_RESPONDENTS) and re-screens every stored respondent "
        "against it; changed results keep the earlier ones in the screening history. A survey "
        "of more than HEEDFUL_SYNC_LIMIT_RESPONDENTS respondents is re-screened by a background "
        "job instead: 202 with the job document and `Location`."
    ),
    response_model=RescreenReply,
    responses=errors(401, 403, 404, also=ACCEPTED),
)
def rescreen_survey(
    survey: str, caller: Admin, database: DatabaseDep, settings: SettingsDep, metrics: MetricsDep,
    queue: JobQueueDep,
) -> RescreenReply | JSONResponse:
    if over_sync_limit(database, survey, settings):
        return accepted(queue.submit(survey, JobKind.RESCREEN, {}, caller.name))
    with database.write() as session:
        found = survey_or_404(session, survey)
        with metrics.job("rescreen"):
            return RescreenReply.model_validate(rescreen(session, found, settings).reply())


@router.get(
    "/v1/surveys/{survey}/summary",
    operation_id="getSurveySummary",
    summary="Counts and flag rates per detector and per day of arrival",
    description=(
        "How many respondents each detector flagged, could not judge or does not apply to, and "
        "the share flagged per day of arrival: a view of the survey, not of any person. "
        + EVIDENCE_NOTE
    ),
    response_model=SurveyReport,
    responses=errors(401, 403, 404),
)
def survey_summary(survey: str, caller: Reader, database: DatabaseDep) -> SurveyReport:
    with database.read() as session:
        found = survey_or_404(session, survey)
        counts = outcomes.survey_counts(session, found.id)
    return SurveyReport(
        survey=survey,
        respondents=counts["respondents"],
        flagged_any=counts["flagged_any"],
        reviewed=counts["reviewed"],
        detectors={
            name: DetectorTally(
                **tally,
                flag_rate=tally["flagged"] / tally["assessed"] if tally["assessed"] else None,
            )
            for name, tally in counts["detectors"].items()
        },
        days=[DayTally(**day) for day in counts["days"]],
    )


def instrument_schema() -> dict[str, Any]:
    """The instrument's JSON schema and its definitions, for the OpenAPI components."""
    schema = dict(_INSTRUMENT_SCHEMA)
    definitions = schema.pop("$defs", {})
    return {"Instrument": schema, **definitions}
