"""Reviewing respondents: the use cases behind the analyst API and the review pages.

Both edges (``service.api.respondents`` answering JSON and CSV, ``service.pages`` answering
HTML) call these functions inside the caller's transaction, so a decision recorded on a page is
the one the API reads back, and the other way round. They raise the domain errors of
``service.errors`` (``UnknownSurvey``, ``UnknownRespondent``, ``InvalidQuery``); only the edges
turn them into problems or pages.
"""

from __future__ import annotations

import datetime as dt
import time
from collections import Counter
from dataclasses import dataclass, replace

from sqlalchemy import select
from sqlalchemy.orm import Session

from detectors import REGISTRY

from . import outcomes, screeners, store
from .answers import answers_of
from .db import utcnow
from .errors import InvalidQuery, UnknownRespondent, UnknownSurvey
from .models import Decision, Respondent, Survey
from .schemas import (
    EarlierResult,
    HistoryEntry,
    OutcomeOut,
    RespondentDetail,
    RespondentPage,
    RespondentRow,
    ReviewOut,
    ScreeningHistoryEntry,
)

__all__ = [
    "find_survey",
    "find_respondent",
    "respondents_page",
    "respondent_detail",
    "detail_of",
    "record_review",
    "SurveyTally",
    "survey_tallies",
    "has_careless_scores",
    "neighbours",
    "SORT_FIELDS",
]

#: Columns a listing can be sorted by (a leading '-' sorts descending).
SORT_FIELDS = ("received_at", "flag_count", "respondent_id", "careless_score")


def find_survey(session: Session, survey: str) -> Survey:
    found = store.get_survey(session, survey)
    if found is None:
        raise UnknownSurvey(survey)
    return found


def find_respondent(session: Session, survey: Survey, respondent: str) -> Respondent:
    found = store.get_respondent(session, survey.id, respondent)
    if found is None:
        raise UnknownRespondent(survey.survey, respondent)
    return found


def _check(query: store.ListQuery) -> None:
    if query.detector is not None and query.detector not in REGISTRY:
        raise InvalidQuery(
            "detector", "unknown detector",
            f"Unknown detector {query.detector!r}; known: {', '.join(REGISTRY)}.",
        )
    if query.sort.lstrip("-") not in SORT_FIELDS:
        raise InvalidQuery(
            "sort", "unknown sort key",
            f"Unknown sort key {query.sort!r}; known: {', '.join(SORT_FIELDS)} (a leading '-' "
            "sorts descending).",
        )


def respondents_page(session: Session, survey: str, query: store.ListQuery) -> RespondentPage:
    """One page of a survey's respondents, filtered and sorted as ``query`` asks."""
    _check(query)
    found = find_survey(session, survey)
    numbers = store.version_numbers(session, found.id)
    codes = outcomes.detector_codes(session)
    try:
        rows, next_cursor = store.list_respondents(session, found.id, query)
    except store.BadCursor as error:
        raise InvalidQuery("cursor", str(error), str(error)) from None
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
    return RespondentPage(data=data, next_cursor=next_cursor)


def _split(flags: str) -> list[str]:
    """A history table's flag set."""
    return list(outcomes.flag_set(flags))


def respondent_detail(session: Session, survey: str, respondent: str) -> RespondentDetail:
    """Everything a reviewer reads about one respondent (answers, results, reviews, history)."""
    found_survey = find_survey(session, survey)
    return detail_of(session, found_survey, find_respondent(session, found_survey, respondent))


def detail_of(session: Session, found_survey: Survey, found: Respondent) -> RespondentDetail:
    """:func:`respondent_detail` of a survey and respondent already found."""
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


def record_review(
    session: Session, survey: str, respondent: str, decision: Decision, note: str, reviewer: str
) -> ReviewOut:
    """Append a person's decision about a respondent; it becomes the respondent's latest."""
    found_survey = find_survey(session, survey)
    found = find_respondent(session, found_survey, respondent)
    before = found.review_decision
    stored = store.add_review(session, found, decision, note, reviewer)
    _recount_review(session, found, before, decision)
    return ReviewOut(
        decision=stored.decision, note=stored.note, reviewer=stored.reviewer,
        created_at=stored.created_at,
    )


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


#: How long a survey's counts by verdict and review are used from memory before they are
#: counted again (counting reads every respondent of the survey: about a second at 1,000,000 on
#: SQLite). Reviews recorded by this process are added to them at once.
TALLY_SECONDS = 60.0
_TALLIES = "review-tallies"
VERDICT_KEYS = ("ok", "review", "likely_careless", "not_screened")
REVIEW_KEYS = ("keep", "exclude", "undecided", "not_reviewed")


@dataclass(frozen=True)
class SurveyTally:
    """A survey with its respondents counted by verdict and by latest review decision."""

    survey: str
    title: str
    respondents: int
    by_verdict: dict[str, int]  # ok, review, likely_careless, not_screened
    by_review: dict[str, int]  # keep, exclude, undecided, not_reviewed
    flagged_not_reviewed: int
    counted_at: dt.datetime  # when the respondents were last counted (reviews added since)


@dataclass
class _Counts:
    """A survey's counts as kept in the database memo (changed in place by new reviews)."""

    by_verdict: Counter[str]
    by_review: Counter[str]
    flagged_not_reviewed: int
    counted_at: dt.datetime
    counted: float  # time.monotonic() of the count


def _memo(session: Session) -> dict[int, _Counts]:
    memo = session.info.get("memo")
    if memo is None:  # a session of no Database: nothing is remembered
        return {}
    tallies: dict[int, _Counts] = memo.setdefault(_TALLIES, {})
    return tallies


def _count(session: Session, survey_ids: list[int] | None) -> dict[int, _Counts]:
    now, counted_at = time.monotonic(), utcnow()
    counts = {
        survey_id: _Counts(Counter(), Counter(), 0, counted_at, now)
        for survey_id in (survey_ids or [])
    }
    for survey_id, verdict, decision, raised, n in store.review_counts(session, survey_ids):
        found = counts.setdefault(survey_id, _Counts(Counter(), Counter(), 0, counted_at, now))
        found.by_verdict[verdict.value if verdict is not None else "not_screened"] += n
        found.by_review[decision.value if decision is not None else "not_reviewed"] += n
        if raised and decision is None:
            found.flagged_not_reviewed += n
    return counts


def survey_tallies(session: Session, only: Survey | None = None) -> list[SurveyTally]:
    """Every survey's (or ``only`` that one's) respondents by verdict and review decision,
    counted at most ``TALLY_SECONDS`` ago (``counted_at`` says when)."""
    surveys = [only] if only is not None else store.all_surveys(session)
    memo = _memo(session)
    now = time.monotonic()
    stale = [s.id for s in surveys if s.id not in memo or now - memo[s.id].counted > TALLY_SECONDS]
    if stale:
        memo.update(_count(session, stale if only is not None or len(stale) < 50 else None))
    out = []
    for survey in surveys:
        counts = memo.get(survey.id) or _Counts(Counter(), Counter(), 0, utcnow(), now)
        out.append(
            SurveyTally(
                survey=survey.survey, title=survey.title,
                respondents=sum(counts.by_verdict.values()),
                by_verdict={key: counts.by_verdict[key] for key in VERDICT_KEYS},
                by_review={key: counts.by_review[key] for key in REVIEW_KEYS},
                flagged_not_reviewed=counts.flagged_not_reviewed,
                counted_at=counts.counted_at,
            )
        )
    return out


def _recount_review(
    session: Session, respondent: Respondent, before: Decision | None, after: Decision
) -> None:
    """Move one respondent from its earlier decision to the new one in the remembered counts."""
    counts = _memo(session).get(respondent.survey_id)
    if counts is None:
        return
    counts.by_review[before.value if before is not None else "not_reviewed"] -= 1
    counts.by_review[after.value] += 1
    if before is None and respondent.flag_count > 0:
        counts.flagged_not_reviewed -= 1


def has_careless_scores(session: Session, survey: Survey) -> bool:
    """Whether any respondent of the survey has a careless score (a reference sample ran)."""
    return (
        session.scalar(
            select(Respondent.id)
            .where(Respondent.survey_id == survey.id, Respondent.careless_score.is_not(None))
            .limit(1)
        )
        is not None
    )


def neighbours(
    session: Session, found_survey: Survey, found: Respondent, query: store.ListQuery
) -> tuple[str | None, str | None]:
    """The respondents before and after ``found`` in the listing ``query`` describes (its
    filters and sort; its cursor and limit are ignored): (previous, next), None at an end or
    when the respondent is not in that listing's order (a sort value it lacks)."""
    _check(query)
    if getattr(found, query.sort.lstrip("-")) is None:
        return None, None
    around = []
    for sort in (query.sort[1:] if query.sort.startswith("-") else f"-{query.sort}", query.sort):
        cursor = store.Cursor.after(sort, found).encode()
        rows, _ = store.list_respondents(
            session, found_survey.id, replace(query, sort=sort, cursor=cursor, limit=1)
        )
        around.append(rows[0].respondent_id if rows else None)
    return around[0], around[1]
