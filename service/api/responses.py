"""Ingestion: the survey platform posts completed responses (key or signed webhook)."""

from __future__ import annotations

import asyncio
from typing import Any

import orjson
from fastapi import APIRouter, Query, Request, Response
from fastapi.concurrency import run_in_threadpool

from detectors import ResponseDataError

from ..database import Database
from ..errors import SignatureRefused, UnknownSurvey
from ..ingest import (
    BodyFieldProblem,
    IngestOptions,
    Submission,
    WebhookCredentials,
    check_signature,
    check_signature_headers,
    delivery_digest,
    read_credentials,
    remembered_credentials,
)
from ..ingest_queue import IngestQueue
from ..limits import Limits
from ..models import WEBHOOK_ID_LENGTH, Role
from ..problems import Problem, field_error
from ..schemas import IngestReply, ResponseIn
from ..security import NO_MATCH
from ..settings import Settings
from .common import errors, parse_json, read_body
from .deps import Caller, SettingsDep, authenticate

router = APIRouter(tags=["responses"])

_FIELDS = set(ResponseIn.model_fields)
#: Problems a 422 reply lists at most (``problem_count`` says how many there were).
MAX_LISTED_PROBLEMS = 100


@router.post(
    "/v1/surveys/{survey}/responses",
    operation_id="postResponses",
    summary="Post one completed response or a batch; each respondent is screened on arrival",
    description=(
        "Authenticate with an `ingest` (or `admin`) key, or sign the request as a Standard "
        "Webhooks sender with the survey's `webhook_secret` (headers `webhook-id`, "
        "`webhook-timestamp`, `webhook-signature`). The same respondent with the same answers "
        "is a duplicate (stored once); other answers under a stored respondent id are refused "
        "with 409 unless `replace=true`. A batch is all-or-nothing unless `partial=true`. "
        "The reply comes after the data is committed.\n\n"
        "**The reply is evidence for a person's review, not a decision.** It lists each "
        "respondent's flags and, unless the survey's `verdict_in_replies` setting is off, the "
        "verdict and careless score. A strong opinion, a short questionnaire or a badly "
        "translated item can raise flags. Do not cancel a complete, withhold an incentive or "
        "exclude anyone automatically on this reply; have a person read the evidence "
        "(`getRespondent`) and record a review. The reply's `caution` field says so too."
    ),
    response_model=IngestReply,
    status_code=201,
    responses=errors(
        400, 401, 403, 404, 409, 413, 415, 422,
        also={200: {"description": "Nothing new was stored (duplicates or a replay)"}},
    ),
    openapi_extra={
        "requestBody": {
            "required": True,
            "content": {
                "application/json": {
                    "schema": {
                        "oneOf": [
                            {"$ref": "#/components/schemas/ResponseIn"},
                            {"$ref": "#/components/schemas/BatchIn"},
                        ]
                    },
                    "examples": {
                        "one": {
                            "summary": "One respondent, every item answered",
                            "value": ResponseIn.model_json_schema()["examples"][0],
                        },
                        "batch": {
                            "summary": "A batch: an ordinary response, then one agreeing with "
                            "an item and its opposite",
                            "value": {
                                "responses": [
                                    {"respondent_id": "v0002", "answers": {"be01": 4, "be02": 1}},
                                    {"respondent_id": "v0003", "answers": {"be01": 5, "be02": 5}},
                                ]
                            },
                        },
                    },
                }
            },
        }
    },
)
async def post_responses(
    survey: str,
    request: Request,
    settings: SettingsDep,
    replace: bool = Query(
        False, description="Replace stored answers of a respondent (the old ones go to history)."
    ),
    partial: bool = Query(
        False, description="Store the valid respondents of a batch and report the rejected ones."
    ),
) -> Response:
    headers = request.headers
    signed = "webhook-signature" in headers or "webhook-id" in headers
    webhook_id = headers.get("webhook-id")
    if webhook_id is not None and len(webhook_id) > WEBHOOK_ID_LENGTH:
        raise Problem(
            422,
            f"The webhook-id header has {len(webhook_id)} characters; at most "
            f"{WEBHOOK_ID_LENGTH} are accepted.",
            kind="invalid-request",
            errors=[field_error("header:webhook-id", f"at most {WEBHOOK_ID_LENGTH} characters")],
        )
    database = request.app.state.database
    limits: Limits = request.app.state.limits
    address = request.client.host if request.client else None
    # The caller is checked before the body is parsed: a key before the body is read; a
    # signature's headers, timestamp and survey before it, its digest right after.
    limits.check_address(address)
    if signed:
        signature = (
            headers.get("webhook-id"), headers.get("webhook-timestamp"),
            headers.get("webhook-signature"),
        )
        try:
            # With the survey's secrets in memory (read less than a few seconds ago), without
            # a thread; an unknown survey is refused like a wrong signature, so that forged
            # posts cannot tell which surveys exist.
            credentials = remembered_credentials(database.memo, survey)
            if credentials is None:
                credentials = await run_in_threadpool(_read_credentials, database, survey)
            check_signature_headers(signature, settings)
            body = await read_body(request, settings.max_body_bytes)
            check_signature(credentials, signature, body, settings)
        except SignatureRefused:
            limits.failed(address)
            raise
        limits.admit(f"survey:{survey}")
        options = IngestOptions(replace=replace, partial=partial, webhook_id=signature[0])
        # Checked before the post is queued, so forged posts never occupy the writer; with the
        # survey's secrets in memory (read less than a few seconds ago), without a thread.
        credentials = remembered_credentials(database.memo, survey)
        if credentials is None:
            credentials = await run_in_threadpool(_read_credentials, database, survey)
        check_signature(credentials, signature, body, settings)
        options = IngestOptions(
            replace=replace, partial=partial, webhook_id=signature[0],
            body_digest=delivery_digest(body),
        )
    else:
        try:
            caller = await run_in_threadpool(_authorize, database, headers.get("authorization"))
        except Problem as refused:
            if refused.status == 401:
                limits.failed(address)
            raise
        limits.admit(caller.name)
        body = await read_body(request, settings.max_body_bytes)
        options = IngestOptions(replace=replace, partial=partial)
    document = parse_json(body, headers.get("content-type"))
    rows, batch = _rows_of(document, settings)
    queue: IngestQueue = request.app.state.ingest_queue
    try:
        ingested = await asyncio.wrap_future(queue.submit(Submission(survey, rows, options)))
    except ResponseDataError as error:
        listed = error.problems[:MAX_LISTED_PROBLEMS]
        more = len(error.problems) - len(listed)
        raise Problem(
            422,
            f"{len(error.problems)} problem(s) in the responses; nothing was stored."
            + (f" The first {len(listed)} are listed." if more else ""),
            kind="invalid-responses",
            errors=[
                field_error(
                    _pointer(batch, p), p.reason, row=p.row,
                    respondent_id=p.respondent_id, item=p.column,
                )
                for p in listed
            ],
            problem_count=len(error.problems),
        ) from None
    request.app.state.metrics.count_ingested(ingested)
    reply = ingested.reply()
    # The reply is built by the use case in the documented shape; it is sent as it is, since a
    # second validation of thousands of result rows would cost more than the screening.
    status = 200 if reply["stored"] == 0 and reply["replaced"] == 0 else 201
    return Response(orjson.dumps(reply), status_code=status, media_type="application/json")


def _read_credentials(database: Database, survey: str) -> WebhookCredentials:
    with database.read() as session:
        try:
            return read_credentials(session, survey)
        except UnknownSurvey:
            raise SignatureRefused(NO_MATCH, "unknown-survey") from None


def _authorize(database: Any, authorization: str | None) -> Caller:
    caller = authenticate(database, authorization)
    if caller.role not in (Role.INGEST, Role.ADMIN):
        raise Problem(
            403,
            f"This key has the role {caller.role.value!r}; posting responses needs an ingest "
            "or admin key.",
            kind="forbidden",
        )
    return caller


def _rows_of(document: Any, settings: Settings) -> tuple[list[Any], bool]:
    if isinstance(document, dict) and set(document) == {"responses"}:
        rows = document["responses"]
        if not isinstance(rows, list) or not rows:
            raise Problem(
                422, "`responses` must be a non-empty list of respondents.",
                kind="invalid-request",
                errors=[field_error("#/responses", "must be a non-empty list")],
            )
        batch = True
    elif isinstance(document, dict):
        rows, batch = [document], False
    else:
        raise Problem(
            422,
            "Send one respondent as an object, or a batch as {\"responses\": [...]}.",
            kind="invalid-request",
            errors=[field_error("#", "must be an object")],
        )
    if len(rows) > settings.max_batch_respondents:
        raise Problem(
            413,
            f"The post holds {len(rows)} respondents; at most {settings.max_batch_respondents} "
            "are accepted at once (HEEDFUL_MAX_BATCH_RESPONDENTS).",
            kind="batch-too-large",
        )
    return rows, batch


def _pointer(batch: bool, problem: Any) -> str:
    row, column = problem.row, problem.column
    base = f"#/responses/{row - 1}" if batch and row is not None else "#"
    if column is None:
        return base
    escaped = column.replace("~", "~0").replace("/", "~1")
    if column in _FIELDS or isinstance(problem, BodyFieldProblem):
        return f"{base}/{escaped}"
    return f"{base}/answers/{escaped}"


__all__ = ["router"]
