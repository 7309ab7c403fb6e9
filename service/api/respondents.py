"""Analyst API: find flagged respondents, read their evidence, record reviews, erase."""

from __future__ import annotations

import csv
import io
from typing import Annotated, Literal
from urllib.parse import urlencode

from fastapi import APIRouter, Query, Request, Response

from .. import review as review_cases
from .. import store
from ..files import formula_safe
from ..models import Decision
from ..problems import Problem
from ..schemas import (
    RespondentDetail,
    RespondentPage,
    ReviewIn,
    ReviewOut,
    ZonedTime,
)
from .common import EVIDENCE_NOTE, errors
from .deps import Admin, DatabaseDep, Reader, SettingsDep

router = APIRouter(tags=["respondents"])

CSV_COLUMNS = [
    "respondent_id", "flag_count", "flags", "verdict", "careless_score", "review_decision",
    "received_at", "version",
]
Sort = Literal[
    "received_at", "-received_at", "flag_count", "-flag_count", "respondent_id", "-respondent_id",
    "careless_score", "-careless_score",
]


def _wants_csv(request: Request) -> bool:
    accept = request.headers.get("accept", "")
    media = [part.split(";", 1)[0].strip().lower() for part in accept.split(",")]
    if "text/csv" in media:
        return True
    if accept and not any(m in ("application/json", "*/*", "application/*", "") for m in media):
        raise Problem(406, "This resource is available as application/json or text/csv.")
    return False


@router.get(
    "/v1/surveys/{survey}/respondents",
    operation_id="listRespondents",
    summary="Find respondents by flags, detector, review status and arrival time (paged)",
    description=(
        "A page of respondents with their flag count, flags, verdict, careless score and latest "
        "review decision, filtered and sorted as asked; `next_cursor` leads to the next page. "
        "Use it to find the respondents a person should look at first. " + EVIDENCE_NOTE
    ),
    response_model=RespondentPage,
    responses=errors(401, 403, 404, 406, 422, also={
        200: {
            "description": "A page of respondents; `Accept: text/csv` gives the same rows as CSV "
            "(the next page's URL in the `Link` header).",
            "content": {"text/csv": {"schema": {"type": "string"}}},
        }
    }),
)
def list_respondents(
    survey: str,
    request: Request,
    caller: Reader,
    database: DatabaseDep,
    settings: SettingsDep,
    flagged: Annotated[
        bool | None, Query(description="Only respondents with (true) or without (false) flags.")
    ] = None,
    detector: Annotated[
        str | None, Query(description="Only those flagged by this detector.")
    ] = None,
    review: Annotated[
        Literal["keep", "exclude", "undecided", "none"] | None,
        Query(description="Only this latest review decision; `none` for not yet reviewed."),
    ] = None,
    received_after: Annotated[
        ZonedTime | None, Query(description="Received at or after this time.")
    ] = None,
    received_before: Annotated[
        ZonedTime | None, Query(description="Received before this time.")
    ] = None,
    min_flags: Annotated[
        int | None,
        Query(ge=0, le=store.LARGEST_SMALLINT, description="At least this many flags."),
    ] = None,
    verdict: Annotated[
        Literal["ok", "review", "likely_careless"] | None,
        Query(description="Only respondents with this verdict."),
    ] = None,
    sort: Annotated[
        Sort,
        Query(
            description="Sort key; a leading '-' sorts descending. Sorting by careless_score "
            "lists only respondents that have one (screened against a reference sample), "
            "equal scores by flag count (the same direction)."
        ),
    ] = "-flag_count",
    limit: Annotated[int, Query(ge=1, description="Rows per page.")] = 100,
    cursor: Annotated[
        str | None, Query(description="`next_cursor` of the previous page.")
    ] = None,
) -> RespondentPage | Response:
    as_csv = _wants_csv(request)
    if limit > settings.page_limit_max:
        raise Problem(
            422, f"limit must be at most {settings.page_limit_max}.", kind="invalid-request",
            errors=[{"pointer": "query:limit", "detail": f"at most {settings.page_limit_max}"}],
        )
    query = store.ListQuery(
        flagged=flagged, detector=detector, review=review, received_after=received_after,
        received_before=received_before, min_flags=min_flags, verdict=verdict, sort=sort,
        limit=limit, cursor=cursor,
    )
    with database.read() as session:
        page = review_cases.respondents_page(session, survey, query)
    data, next_cursor = page.data, page.next_cursor
    if not as_csv:
        return page
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    for row in data:
        writer.writerow(
            [
                formula_safe(row.respondent_id), row.flag_count, formula_safe(";".join(row.flags)),
                row.verdict.value if row.verdict else "",
                "" if row.careless_score is None else f"{row.careless_score:.6g}",
                row.review_decision.value if row.review_decision else "",
                row.received_at.isoformat(), row.version,
            ]
        )
    headers = {}
    if next_cursor is not None:
        params = [(k, v) for k, v in request.query_params.multi_items() if k != "cursor"]
        url = request.url.replace(query=urlencode([*params, ("cursor", next_cursor)]))
        headers["Link"] = f'<{url}>; rel="next"'
        headers["Heedful-Next-Cursor"] = next_cursor
    return Response(out.getvalue(), media_type="text/csv; charset=utf-8", headers=headers)


@router.get(
    "/v1/surveys/{survey}/respondents/{respondent:path}",
    operation_id="getRespondent",
    summary="A respondent's answers, every detector's result with evidence, reviews and history",
    description=(
        "Everything a reviewer needs to decide about one respondent: the answers as received, "
        "each detector's state, score, cut-off, evidence and a readable sentence, the reviews "
        "so far, replaced answers and earlier screening results. " + EVIDENCE_NOTE
    ),
    response_model=RespondentDetail,
    responses=errors(401, 403, 404),
)
def get_respondent(
    survey: str, respondent: str, caller: Reader, database: DatabaseDep
) -> RespondentDetail:
    with database.read() as session:
        return review_cases.respondent_detail(session, survey, respondent)


@router.post(
    "/v1/surveys/{survey}/respondents/{respondent:path}/review",
    operation_id="reviewRespondent",
    summary="Record a review decision (keep, exclude, undecided) with a note; append-only",
    description=(
        "Records a person's decision about a respondent after reading the evidence, with a note "
        "saying why and the name of the key that recorded it. Reviews are never changed or "
        "deleted (except by an erasure); the latest one is the respondent's "
        "`review_decision`, which exports and filters use. Decide on the evidence as a whole: "
        "a single flag, or flags of one kind, can come from a strong opinion or a badly "
        "translated item."
    ),
    response_model=ReviewOut,
    status_code=201,
    responses=errors(401, 403, 404, 422),
)
def review_respondent(
    survey: str, respondent: str, review: ReviewIn, caller: Reader, database: DatabaseDep
) -> ReviewOut:
    with database.write() as session:
        return review_cases.record_review(
            session, survey, respondent, Decision(review.decision), review.note, caller.name
        )


@router.delete(
    "/v1/surveys/{survey}/respondents/{respondent:path}",
    operation_id="eraseRespondent",
    summary="Erase a respondent's answers, results and review notes (keeps an audit line)",
    description=(
        "Answers an erasure request: removes the respondent's answers, history, results and "
        "reviews in one transaction and keeps only an audit line (when, by which key, and a "
        "keyed digest of the respondent id). Copies outside the service are not touched."
    ),
    status_code=204,
    responses=errors(401, 403, 404),
)
def erase_respondent(
    survey: str, respondent: str, caller: Admin, database: DatabaseDep
) -> Response:
    with database.write() as session:
        found_survey = review_cases.find_survey(session, survey)
        found = review_cases.find_respondent(session, found_survey, respondent)
        store.erase_respondent(session, found_survey, found, caller.name)
    return Response(status_code=204)


__all__ = ["router"]
