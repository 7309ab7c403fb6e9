"""Analyst API: find flagged respondents, read their evidence, record reviews, erase."""

from __future__ import annotations

import csv
import io
from typing import Annotated, Literal
from urllib.parse import urlencode

from fastapi import APIRouter, Query, Request, Response
from sqlalchemy.orm import Session

from detectors import REGISTRY

from .. import outcomes, screeners, store
from ..answers import answers_of
from ..files import formula_safe
from ..models import Decision, Respondent
from ..problems import Problem
from ..schemas import (
    EarlierResult,
    HistoryEntry,
    OutcomeOut,
    RespondentDetail,
    RespondentPage,
    RespondentRow,
    ReviewIn,
    ReviewOut,
    ScreeningHistoryEntry,
    ZonedTime,
)
from .common import EVIDENCE_NOTE, errors
from .deps import Admin, DatabaseDep, Reader, SettingsDep
from .surveys import survey_or_404

router = APIRouter(tags=["respondents"])

CSV_COLUMNS = [
    "respondent_id", "flag_count", "flags", "verdict", "careless_score", "review_decision",
    "received_at", "version",
]
Sort = Literal[
    "received_at", "-received_at", "flag_count", "-flag_count", "respondent_id", "-respondent_id",
    "careless_score", "-careless_score",
]


def _split(flags: str) -> list[str]:
    """A history table's flag set."""
    return list(outcomes.flag_set(flags))


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
            "lists only respondents that have one (screened against a reference sample)."
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
    if detector is not None and detector not in REGISTRY:
        raise Problem(
            422, f"Unknown detector {detector!r}; known: {', '.join(REGISTRY)}.",
            kind="invalid-request",
            errors=[{"pointer": "query:detector", "detail": "unknown detector"}],
        )
    query = store.ListQuery(
        flagged=flagged, detector=detector, review=review, received_after=received_after,
        received_before=received_before, min_flags=min_flags, verdict=verdict, sort=sort,
        limit=limit, cursor=cursor,
    )
    with database.read() as session:
        found = survey_or_404(session, survey)
        numbers = store.version_numbers(session, found.id)
        codes = outcomes.detector_codes(session)
        try:
            rows, next_cursor = store.list_respondents(session, found.id, query)
        except store.BadCursor as error:
            raise Problem(
                422, str(error), kind="invalid-request",
                errors=[{"pointer": "query:cursor", "detail": str(error)}],
            ) from None
    data = [
        RespondentRow(
            respondent_id=r.respondent_id, flag_count=r.flag_count,
            flags=list(codes.names(r.flag_bits)),
            verdict=r.verdict, careless_score=r.careless_score,
            review_decision=r.review_decision, received_at=r.received_at,
            version=numbers[r.survey_version_id],
        )
        for r in rows
    ]
    if not as_csv:
        return RespondentPage(data=data, next_cursor=next_cursor)
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


def _respondent_or_404(session, survey_id: int, survey: str, respondent: str):
    found = store.get_respondent(session, survey_id, respondent)
    if found is None:
        raise Problem(
            404, f"Survey {survey!r} has no respondent {respondent!r}.", kind="unknown-respondent"
        )
    return found


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
        found_survey = survey_or_404(session, survey)
        found = _respondent_or_404(session, found_survey.id, survey, respondent)
        numbers = store.version_numbers(session, found_survey.id)
        results = outcomes.results_of(session, found)
        codes = outcomes.detector_codes(session)
        return RespondentDetail(
            respondent_id=found.respondent_id,
            version=numbers[found.survey_version_id],
            received_at=found.received_at,
            started_at=found.started_at,
            submitted_at=found.submitted_at,
            duration_seconds=found.duration_seconds,
            meta=found.meta,
            answers=answers_of(session, found.survey_version_id, found.answer_codes),
            flag_count=found.flag_count,
            flags=list(codes.names(found.flag_bits)),
            verdict=found.verdict,
            careless_score=found.careless_score,
            verdict_reason=_verdict_reason(session, found),
            review_decision=found.review_decision,
            results=[
                OutcomeOut(
                    detector=o.detector, detector_version=o.detector_version,
                    state=o.state.label, reason=o.reason, score=o.score, cutoff=o.cutoff,
                    flagged=o.flagged, evidence=o.evidence, sentence=o.sentence,
                    reference_id=o.reference_id,
                )
                for o in results
            ],
            reviews=[
                ReviewOut(
                    decision=r.decision, note=r.note, reviewer=r.reviewer, created_at=r.created_at
                )
                for r in store.reviews_of(session, found.id)
            ],
            history=[
                HistoryEntry(
                    answers=h.answers, version=numbers[h.survey_version_id],
                    received_at=h.received_at, replaced_at=h.replaced_at, flags=_split(h.flags),
                )
                for h in store.history_of(session, found.id)
            ],
            screening_history=[
                ScreeningHistoryEntry(
                    screened_at=h.screened_at, replaced_at=h.replaced_at,
                    version=numbers[h.survey_version_id], reference_id=h.reference_id,
                    flag_count=h.flag_count, flags=_split(h.flags), verdict=h.verdict,
                    careless_score=h.careless_score,
                    results={
                        name: EarlierResult.model_validate(value)
                        for name, value in outcomes.earlier_results(codes, h).items()
                    },
                )
                for h in store.screening_history_of(session, found.id)
            ],
        )


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
        found_survey = survey_or_404(session, survey)
        found = _respondent_or_404(session, found_survey.id, survey, respondent)
        stored = store.add_review(
            session, found, Decision(review.decision), review.note, caller.name
        )
        return ReviewOut(
            decision=stored.decision, note=stored.note, reviewer=stored.reviewer,
            created_at=stored.created_at,
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
        found_survey = survey_or_404(session, survey)
        found = _respondent_or_404(session, found_survey.id, survey, respondent)
        store.erase_respondent(session, found_survey, found, caller.name)
    return Response(status_code=204)


__all__ = ["router"]


def _verdict_reason(session: Session, found: Respondent) -> str | None:
    """Why the stored verdict, derived on read from the flags and the version's policy."""
    from detectors.verdict import explain

    if found.verdict is None:
        return None
    policy = screeners.screener_for(session, found.survey_version_id).instrument.verdict
    flags = outcomes.detector_codes(session).names(found.flag_bits)
    raised = {REGISTRY[name].family for name in flags if name in REGISTRY}
    families = [family for family in policy.families if family in raised]
    return explain(
        str(found.verdict), families, found.careless_score,
        policy.review_rate * policy.score_review_share,
        likely_from=policy.likely_careless_from,
    )
