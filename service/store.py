"""Data functions: keys, surveys, respondents and their stored screenings, reviews, erasures.

Every function takes a session and leaves the transaction to its caller. Bulk writes go through
SQLAlchemy Core (``executemany``), never one ORM object per row.
"""

from __future__ import annotations

import base64
import binascii
import datetime as dt
import hashlib
import hmac
import json
import secrets
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import orjson
from sqlalchemy import (
    JSON,
    Row,
    String,
    and_,
    bindparam,
    case,
    delete,
    false,
    func,
    insert,
    literal_column,
    or_,
    select,
    type_coerce,
    update,
)
from sqlalchemy.orm import Session

from .db import storable_time, utcnow
from .models import (
    ApiKey,
    Decision,
    DetectorCode,
    Erasure,
    ReferenceSample,
    Respondent,
    ResponseHistory,
    Review,
    Role,
    ScreeningHistory,
    Survey,
    SurveyVersion,
    Verdict,
    WebhookDelivery,
    WebSession,
)
from .security import new_token, new_webhook_secret

if TYPE_CHECKING:
    #: A result row of any width (SQLAlchemy types a row by its columns).
    AnyRow = Row[*tuple[Any, ...]]

__all__ = [
    "canonical_digest",
    "create_key",
    "list_keys",
    "revoke_key",
    "find_key",
    "get_survey",
    "list_surveys",
    "register_version",
    "rotate_secret",
    "versions_of",
    "version_numbers",
    "reference_of",
    "count_respondents",
    "existing_respondents",
    "insert_respondents",
    "replace_respondents",
    "record_deliveries",
    "deliveries_seen",
    "prune_deliveries",
    "ListQuery",
    "Cursor",
    "list_respondents",
    "get_respondent",
    "reviews_of",
    "history_of",
    "add_review",
    "erase_respondent",
    "report",
    "BadCursor",
    "respondent_counts",
    "latest_reference",
    "stored_answer_rows",
    "timed_rows",
    "count_stale",
    "screening_rows",
    "insert_screening_history",
    "screening_history_of",
    "flag_bits_counts",
    "flag_bits_by_day",
    "detector_code_map",
    "add_detector_codes",
    "packed_results_of",
    "packed_results_between",
    "survey_pks",
    "survey_flags",
    "respondents_of",
    "survey_rows",
]

#: Rows per IN (...) list: well under SQLite's bound-parameter limit.
IN_CHUNK = 500


def canonical_digest(value: Any) -> str:
    """sha256 of the canonical JSON of ``value`` (sorted keys, no spaces)."""
    text = json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _chunks(values: Sequence[Any], size: int = IN_CHUNK) -> Iterable[Sequence[Any]]:
    for start in range(0, len(values), size):
        yield values[start : start + size]


# Keys -------------------------------------------------------------------------------------------


def create_key(session: Session, name: str, role: Role) -> str:
    """Store a new key and return its token (the only time it is visible)."""
    token = new_token()
    session.add(ApiKey(name=name, role=role, lookup=token.lookup, token_hash=token.token_hash))
    session.flush()
    return token.token


def list_keys(session: Session) -> list[ApiKey]:
    return list(session.scalars(select(ApiKey).order_by(ApiKey.name)))


def revoke_key(session: Session, name: str) -> bool:
    key = session.scalar(select(ApiKey).where(ApiKey.name == name))
    if key is None:
        return False
    if key.revoked_at is None:
        key.revoked_at = utcnow()
    return True


def find_key(session: Session, lookup: str) -> AnyRow | None:
    """(id, name, role, token_hash) of the active key with this lookup part."""
    return session.execute(
        select(ApiKey.id, ApiKey.name, ApiKey.role, ApiKey.token_hash).where(
            ApiKey.lookup == lookup, ApiKey.revoked_at.is_(None)
        )
    ).first()


# Sessions of the review pages --------------------------------------------------------------------


def add_web_session(
    session: Session, key_id: int, lookup: str, token_hash: str, form_token: str,
    expires_at: dt.datetime,
) -> None:
    session.add(
        WebSession(
            key_id=key_id, lookup=lookup, token_hash=token_hash, form_token=form_token,
            created_at=utcnow(), expires_at=expires_at,
        )
    )
    session.flush()


def find_web_session(session: Session, lookup: str, now: dt.datetime) -> AnyRow | None:
    """(token_hash, form_token, expires_at, key name, key role) of an unexpired session whose
    key is not revoked."""
    return session.execute(
        select(
            WebSession.token_hash, WebSession.form_token, WebSession.expires_at, ApiKey.name,
            ApiKey.role,
        )
        .join(ApiKey, ApiKey.id == WebSession.key_id)
        .where(
            WebSession.lookup == lookup, WebSession.expires_at > now, ApiKey.revoked_at.is_(None)
        )
    ).first()


def end_web_session(session: Session, lookup: str) -> None:
    session.execute(delete(WebSession).where(WebSession.lookup == lookup))


def prune_web_sessions(session: Session, now: dt.datetime) -> int:
    """Delete expired sessions; returns how many."""
    result = session.execute(delete(WebSession).where(WebSession.expires_at <= now))
    return int(getattr(result, "rowcount", 0) or 0)


# Surveys ----------------------------------------------------------------------------------------


def get_survey(session: Session, survey: str) -> Survey | None:
    if "\x00" in survey:  # never stored, and PostgreSQL refuses it in a query
        return None
    return session.scalar(select(Survey).where(Survey.survey == survey))


def all_surveys(session: Session) -> list[Survey]:
    return list(session.scalars(select(Survey).order_by(Survey.survey)))


def review_counts(session: Session, survey_ids: Sequence[int] | None) -> list[AnyRow]:
    """(survey id, verdict, review decision, flagged, respondents) of the surveys (all: None)."""
    # A literal, not a bound 0: PostgreSQL would see the select's and the grouping's
    # parameters as two expressions.
    flagged = Respondent.flag_count > literal_column("0")
    statement = select(
        Respondent.survey_id, Respondent.verdict, Respondent.review_decision,
        flagged.label("flagged"), func.count(),
    ).group_by(Respondent.survey_id, Respondent.verdict, Respondent.review_decision, flagged)
    if survey_ids is not None:
        statement = statement.where(Respondent.survey_id.in_(survey_ids))
    return list(session.execute(statement))


def list_surveys(session: Session) -> list[tuple[Survey, int, int]]:
    """(survey, current version number, respondent count) for every survey."""
    counts = (
        select(Respondent.survey_id, func.count().label("n"))
        .group_by(Respondent.survey_id)
        .subquery()
    )
    rows = session.execute(
        select(Survey, SurveyVersion.number, func.coalesce(counts.c.n, 0))
        .join(SurveyVersion, SurveyVersion.id == Survey.current_version_id)
        .outerjoin(counts, counts.c.survey_id == Survey.id)
        .order_by(Survey.survey)
    )
    return [(s, int(n), int(c)) for s, n, c in rows]


@dataclass(frozen=True)
class Registered:
    survey: Survey
    version: SurveyVersion
    new_version: bool


def register_version(session: Session, document: dict[str, Any], title: str) -> Registered:
    """Register an instrument document: a new survey, a new version of a changed one, or
    nothing new when the same document is already the current version."""
    survey_id = document["survey"]
    digest = canonical_digest(document)
    survey = session.scalar(select(Survey).where(Survey.survey == survey_id).with_for_update())
    if survey is None:
        survey = Survey(
            survey=survey_id,
            title=title,
            webhook_secret=new_webhook_secret(),
            erasure_salt=secrets.token_hex(32),
        )
        session.add(survey)
        session.flush()
    else:
        current = session.get(SurveyVersion, survey.current_version_id)
        if current is not None and current.digest == digest:
            return Registered(survey, current, new_version=False)
    number = (
        session.scalar(
            select(func.max(SurveyVersion.number)).where(SurveyVersion.survey_id == survey.id)
        )
        or 0
    ) + 1
    version = SurveyVersion(survey_id=survey.id, number=number, document=document, digest=digest)
    session.add(version)
    session.flush()
    survey.current_version_id = version.id
    # A reference sample belongs to one version; the new one has none until a re-screen.
    survey.current_reference_id = None
    survey.title = title
    return Registered(survey, version, new_version=True)


def rotate_secret(session: Session, survey: Survey, grace: dt.timedelta) -> dt.datetime:
    until = utcnow() + grace
    survey.previous_webhook_secret = survey.webhook_secret
    survey.previous_secret_until = until
    survey.webhook_secret = new_webhook_secret()
    return until


def versions_of(session: Session, survey_id: int) -> list[SurveyVersion]:
    return list(
        session.scalars(
            select(SurveyVersion)
            .where(SurveyVersion.survey_id == survey_id)
            .order_by(SurveyVersion.number)
        )
    )


def version_numbers(session: Session, survey_id: int) -> dict[int, int]:
    """Version id to version number."""
    rows = session.execute(
        select(SurveyVersion.id, SurveyVersion.number).where(SurveyVersion.survey_id == survey_id)
    )
    return {vid: number for vid, number in rows}


def reference_of(session: Session, reference_id: int | None) -> ReferenceSample | None:
    return None if reference_id is None else session.get(ReferenceSample, reference_id)


def count_respondents(session: Session, survey_id: int) -> int:
    return int(
        session.scalar(select(func.count()).where(Respondent.survey_id == survey_id)) or 0
    )


# Respondents: writes ----------------------------------------------------------------------------


def existing_respondents(
    session: Session, survey_id: int, respondent_ids: Sequence[str]
) -> dict[str, AnyRow]:
    """respondent id -> (id, respondent_id, answers_digest, flag_bits, flag_count, verdict,
    careless_score, started_at, submitted_at, duration_seconds, meta) of stored ones."""
    out: dict[str, AnyRow] = {}
    for chunk in _chunks(list(respondent_ids)):
        rows = session.execute(
            select(
                Respondent.id,
                Respondent.respondent_id,
                Respondent.answers_digest,
                Respondent.flag_bits,
                Respondent.flag_count,
                Respondent.verdict,
                Respondent.careless_score,
                Respondent.started_at,
                Respondent.submitted_at,
                Respondent.duration_seconds,
                Respondent.meta,
            ).where(Respondent.survey_id == survey_id, Respondent.respondent_id.in_(chunk))
        )
        for row in rows:
            out[row.respondent_id] = row
    return out


def packed_results_of(session: Session, pks: Sequence[int]) -> dict[int, bytes | None]:
    """pk -> the packed results of each of these respondents that exists."""
    out: dict[int, bytes | None] = {}
    for chunk in _chunks(list(pks)):
        for pk, results in session.execute(
            select(Respondent.id, Respondent.results).where(Respondent.id.in_(chunk))
        ):
            out[pk] = results
    return out


def insert_respondents(session: Session, rows: list[dict[str, Any]]) -> list[int]:
    """Insert respondents (dicts of column values); return their ids in the same order."""
    if not rows:
        return []
    table = Respondent.__table__
    result = session.connection().execute(
        insert(table).returning(table.c.id, sort_by_parameter_order=True), rows
    )
    return [r[0] for r in result]


def replace_respondents(
    session: Session, rows: list[dict[str, Any]], history: list[dict[str, Any]]
) -> None:
    """Keep the earlier answers of respondents in ``history`` (``ResponseHistory`` rows),
    then overwrite the respondents with ``rows`` (each with ``pk``)."""
    if not rows:
        return
    connection = session.connection()
    if history:
        connection.execute(insert(ResponseHistory.__table__), history)
    table = Respondent.__table__
    values: dict[str, Any] = {k: bindparam(k) for k in rows[0] if k != "pk"}
    connection.execute(update(table).where(table.c.id == bindparam("pk")).values(values), rows)


def respondents_of(session: Session, pks: Sequence[int]) -> list[Row[Any]]:
    """Every column of the stored respondents with these ids."""
    out: list[Row[Any]] = []
    table = Respondent.__table__
    for chunk in _chunks(list(pks)):
        out.extend(session.execute(select(*table.c).where(table.c.id.in_(chunk))))
    return out


def json_text(value: Any) -> str:
    """Compact JSON text (NaN becomes null), as stored in JSON columns."""
    return orjson.dumps(value, option=orjson.OPT_SERIALIZE_NUMPY).decode()


def deliveries_seen(
    session: Session, survey_id: int, webhook_ids: Sequence[str]
) -> dict[str, str | None]:
    """Which of these webhook ids were already accepted for the survey, each with the digest of
    its body (None when accepted before digests were kept)."""
    seen: dict[str, str | None] = {}
    for chunk in _chunks(list(webhook_ids)):
        rows = session.execute(
            select(WebhookDelivery.webhook_id, WebhookDelivery.body_digest).where(
                WebhookDelivery.survey_id == survey_id, WebhookDelivery.webhook_id.in_(chunk)
            )
        )
        seen.update((webhook_id, digest) for webhook_id, digest in rows)
    return seen


def record_deliveries(session: Session, rows: list[dict[str, Any]]) -> None:
    if rows:
        session.connection().execute(insert(WebhookDelivery.__table__), rows)


def prune_deliveries(session: Session, before: dt.datetime) -> int:
    """Forget webhook ids older than ``before`` (their timestamps are refused anyway)."""
    result = session.execute(delete(WebhookDelivery).where(WebhookDelivery.received_at < before))
    return int(getattr(result, "rowcount", 0) or 0)


# Respondents: reads -----------------------------------------------------------------------------

SORTS = {
    "received_at": Respondent.received_at,
    "flag_count": Respondent.flag_count,
    "respondent_id": Respondent.respondent_id,
    "careless_score": Respondent.careless_score,
}


class BadCursor(ValueError):
    """A cursor that this service did not issue for this query."""


@dataclass(frozen=True)
class Cursor:
    sort: str
    value: Any
    pk: int

    def encode(self) -> str:
        value = self.value.isoformat() if isinstance(self.value, dt.datetime) else self.value
        raw = json.dumps([self.sort, value, self.pk], separators=(",", ":")).encode()
        return base64.urlsafe_b64encode(raw).decode().rstrip("=")

    @classmethod
    def decode(cls, text: str, sort: str) -> Cursor:
        try:
            raw = base64.urlsafe_b64decode(text + "=" * (-len(text) % 4))
            sort_of, value, pk = json.loads(raw)
        except (binascii.Error, ValueError, TypeError) as error:
            raise BadCursor("the cursor is not one this service issued") from error
        if sort_of != sort:
            raise BadCursor(f"the cursor belongs to sort={sort_of!r}, not sort={sort!r}")
        field = sort.lstrip("-")
        try:
            if field == "received_at":
                value = storable_time(dt.datetime.fromisoformat(value))
            elif field == "flag_count":
                value = _within(int(value), LARGEST_SMALLINT)
            elif field == "careless_score":
                score, flags = value  # ties broken by the flag count
                value = [float(score), _within(int(flags), LARGEST_SMALLINT)]
            else:
                value = str(value)
                if "\x00" in value:
                    raise ValueError("NUL in a respondent id")
            pk = _within(int(pk), LARGEST_INT)
        except (TypeError, ValueError, OverflowError) as error:
            raise BadCursor("the cursor is not one this service issued") from error
        return cls(sort, value, pk)

    @classmethod
    def after(cls, sort: str, row: Any) -> Cursor:
        """The cursor that lists what comes after ``row`` (a respondent, or a listed row) in
        the order ``sort`` names."""
        field = sort.lstrip("-")
        value = getattr(row, field)
        if field == "careless_score":
            value = [value, row.flag_count]
        return cls(sort, value, row.id)


#: Largest values of the SmallInteger and Integer columns (flag count, row id) compared with
#: values from a request.
LARGEST_SMALLINT, LARGEST_INT = 2**15 - 1, 2**31 - 1


def _within(value: int, largest: int) -> int:
    if not 0 <= value <= largest:
        raise ValueError(f"{value} is outside 0..{largest}")
    return value


@dataclass(frozen=True)
class ListQuery:
    flagged: bool | None = None
    detector: str | None = None
    review: str | None = None  # a Decision value, or "none" for not reviewed
    received_after: dt.datetime | None = None
    received_before: dt.datetime | None = None
    min_flags: int | None = None
    verdict: str | None = None
    sort: str = "-flag_count"
    limit: int = 100
    cursor: str | None = None


def list_respondents(
    session: Session, survey_id: int, query: ListQuery
) -> tuple[list[AnyRow], str | None]:
    """One page of respondents and the cursor of the next page (None on the last)."""
    descending = query.sort.startswith("-")
    column = SORTS[query.sort.lstrip("-")]
    statement = select(
        Respondent.id,
        Respondent.respondent_id,
        Respondent.flag_count,
        Respondent.flag_bits,
        Respondent.verdict,
        Respondent.careless_score,
        Respondent.review_decision,
        Respondent.received_at,
        Respondent.survey_version_id,
    ).where(Respondent.survey_id == survey_id)
    if column is Respondent.careless_score:
        # NULLs sort differently on SQLite and PostgreSQL and cannot take part in a keyset:
        # a careless-score listing holds the respondents that have one.
        statement = statement.where(Respondent.careless_score.is_not(None))
    # Sorted by another column, the flag count is only a filter: "+ 0" keeps the planner from
    # reading the flag-count index and sorting every flagged row, instead of walking the sort
    # column's index and stopping after one page.
    count = Respondent.flag_count if column is Respondent.flag_count else Respondent.flag_count + 0
    if query.flagged is True:
        statement = statement.where(count > 0)
    elif query.flagged is False:
        statement = statement.where(count == 0)
    if query.min_flags is not None:
        statement = statement.where(count >= query.min_flags)
    if query.detector is not None:
        code = session.scalar(
            select(DetectorCode.code).where(DetectorCode.name == query.detector)
        )
        statement = statement.where(
            Respondent.flag_bits.op("&")(1 << code) != 0 if code is not None else false()
        )
    if query.verdict is not None:
        statement = statement.where(Respondent.verdict == Verdict(query.verdict))
    if query.review == "none":
        statement = statement.where(Respondent.review_decision.is_(None))
    elif query.review is not None:
        statement = statement.where(Respondent.review_decision == Decision(query.review))
    if query.received_after is not None:
        statement = statement.where(Respondent.received_at >= query.received_after)
    if query.received_before is not None:
        statement = statement.where(Respondent.received_at < query.received_before)
    # Careless scores tie often (a percentile among the reference's respondents: everyone
    # beyond the reference's most suspect shares the top value): ties go by the flag count.
    keys = [column, Respondent.flag_count] if column is Respondent.careless_score else [column]
    if query.cursor is not None:
        cursor = Cursor.decode(query.cursor, query.sort)
        values = cursor.value if len(keys) > 1 else [cursor.value]
        statement = statement.where(_after(keys, values, cursor.pk, descending))
    order = [*keys, Respondent.id]
    rows = list(session.execute(
        statement.order_by(*(c.desc() for c in order) if descending else order)
        .limit(query.limit + 1)
    ))
    next_cursor = None
    if len(rows) > query.limit:
        rows = rows[: query.limit]
        next_cursor = Cursor.after(query.sort, rows[-1]).encode()
    return rows, next_cursor


def _after(keys: Sequence[Any], values: Sequence[Any], pk: int, descending: bool) -> Any:
    """The keyset condition: rows that come after (``values``, ``pk``) in the order of
    ``keys`` then the row id."""
    beyond = (lambda c, v: c < v) if descending else (lambda c, v: c > v)
    columns, bounds = [*keys, Respondent.id], [*values, pk]
    return or_(*(
        and_(*(columns[j] == bounds[j] for j in range(i)), beyond(columns[i], bounds[i]))
        for i in range(len(columns))
    ))


def get_respondent(session: Session, survey_id: int, respondent_id: str) -> Respondent | None:
    if "\x00" in respondent_id:  # never stored, and PostgreSQL refuses it in a query
        return None
    return session.scalar(
        select(Respondent).where(
            Respondent.survey_id == survey_id, Respondent.respondent_id == respondent_id
        )
    )


def reviews_of(session: Session, pk: int) -> list[Review]:
    return list(
        session.scalars(
            select(Review).where(Review.respondent_pk == pk).order_by(Review.created_at, Review.id)
        )
    )


def history_of(session: Session, pk: int) -> list[ResponseHistory]:
    return list(
        session.scalars(
            select(ResponseHistory)
            .where(ResponseHistory.respondent_pk == pk)
            .order_by(ResponseHistory.replaced_at, ResponseHistory.id)
        )
    )


def add_review(
    session: Session, respondent: Respondent, decision: Decision, note: str, reviewer: str
) -> Review:
    review = Review(
        respondent_pk=respondent.id, decision=decision, note=note, reviewer=reviewer,
        created_at=utcnow(),
    )
    session.add(review)
    respondent.review_decision = decision
    session.flush()
    return review


def erase_respondent(session: Session, survey: Survey, respondent: Respondent, by: str) -> None:
    """Delete a respondent's answers, history, outcomes and reviews; keep one audit line."""
    digest = erasure_digest(survey, respondent.respondent_id)
    session.delete(respondent)
    session.add(Erasure(survey_id=survey.id, respondent_digest=digest, erased_by=by))
    session.flush()


def erasure_digest(survey: Survey, respondent_id: str) -> str:
    """Keyed digest of a respondent id: proves an id was erased without keeping the id."""
    return hmac.new(
        bytes.fromhex(survey.erasure_salt), respondent_id.encode("utf-8"), hashlib.sha256
    ).hexdigest()


# Re-screening -----------------------------------------------------------------------------------


def respondent_counts(session: Session, survey_id: int) -> dict[int, tuple[int, dt.datetime]]:
    """Survey version id -> (stored respondents, latest arrival) of the versions with any."""
    rows = session.execute(
        select(Respondent.survey_version_id, func.count(), func.max(Respondent.received_at))
        .where(Respondent.survey_id == survey_id)
        .group_by(Respondent.survey_version_id)
    )
    return {version: (int(n), latest) for version, n, latest in rows}


def latest_reference(session: Session, version_id: int) -> ReferenceSample | None:
    return session.scalar(
        select(ReferenceSample)
        .where(ReferenceSample.survey_version_id == version_id)
        .order_by(ReferenceSample.id.desc())
        .limit(1)
    )


def stored_answer_rows(
    session: Session, survey_id: int, version_ids: Sequence[int], after_pk: int, limit: int
) -> list[AnyRow]:
    """The next ``limit`` respondents (by id, after ``after_pk``) of these survey versions:
    id, respondent_id, survey_version_id, answer_codes, answers_digest,
    duration_seconds, reference_id, screened_with."""
    return list(
        session.execute(
            select(
                Respondent.id,
                Respondent.respondent_id,
                Respondent.survey_version_id,
                Respondent.answer_codes,
                Respondent.answers_digest,
                Respondent.duration_seconds,
                Respondent.reference_id,
                Respondent.screened_with,
            )
            .where(
                # "+ 0": walk the primary key from after_pk and stop after one chunk, instead
                # of reading every row of the survey through an index and sorting them.
                Respondent.survey_id + 0 == survey_id,
                Respondent.survey_version_id.in_(list(version_ids)),
                Respondent.id > after_pk,
            )
            .order_by(Respondent.id)
            .limit(limit)
        )
    )


def survey_rows(session: Session, survey_id: int, after_pk: int, limit: int) -> list[AnyRow]:
    """The next ``limit`` respondents of a survey (by id, after ``after_pk``), every column a
    whole-survey read needs: id, respondent_id, survey_version_id, answer_codes, received_at,
    submitted_at, started_at (times as stored: text in SQLite), duration_seconds,
    reference_id, flag_count, flag_bits, verdict, careless_score, review_decision (as stored
    text), results."""
    return list(
        session.connection().execute(
            select(
                Respondent.id,
                Respondent.respondent_id,
                Respondent.survey_version_id,
                Respondent.answer_codes,
                # Times and codes are read as stored and converted a column at a time, instead
                # of by one Python call per value.
                type_coerce(Respondent.received_at, String),
                type_coerce(Respondent.submitted_at, String),
                type_coerce(Respondent.started_at, String),
                Respondent.duration_seconds,
                Respondent.reference_id,
                Respondent.flag_count,
                Respondent.flag_bits,
                type_coerce(Respondent.verdict, String),
                Respondent.careless_score,
                type_coerce(Respondent.review_decision, String),
                Respondent.results,
            )
            .where(
                Respondent.survey_id + 0 == survey_id,  # by primary key range, as above
                Respondent.id > after_pk,
            )
            .order_by(Respondent.id)
            .limit(limit)
        )
    )


def timed_rows(session: Session, survey_id: int, low: int, high: int) -> list[AnyRow]:
    """(id, duration_seconds, started_at, submitted_at) of the respondents with ids in
    [low, high] that have no duration but both timestamps."""
    return list(
        session.execute(
            select(
                Respondent.id,
                Respondent.duration_seconds,
                Respondent.started_at,
                Respondent.submitted_at,
            ).where(
                Respondent.survey_id + 0 == survey_id,  # by primary key range, as above
                Respondent.id.between(low, high),
                Respondent.duration_seconds.is_(None),
                Respondent.started_at.is_not(None),
                Respondent.submitted_at.is_not(None),
            )
        )
    )


def count_stale(
    session: Session,
    survey_id: int,
    version_ids: Sequence[int],
    target_version_id: int,
    reference_id: int | None,
    fingerprint: str,
) -> int:
    """How many respondents of these versions were not screened with the target version, the
    reference sample ``reference_id`` and the screener ``fingerprint`` (see ``rescreen.Stored``)."""
    return int(
        session.scalar(
            select(func.count()).where(
                Respondent.survey_id == survey_id,
                Respondent.survey_version_id.in_(list(version_ids)),
                or_(
                    Respondent.survey_version_id != target_version_id,
                    Respondent.reference_id.is_distinct_from(reference_id),
                    Respondent.screened_with.is_distinct_from(fingerprint),
                ),
            )
        )
        or 0
    )


def screening_rows(session: Session, pks: Sequence[int]) -> list[AnyRow]:
    """The stored screening of each of these respondents that still exists, as stored (times,
    verdicts and kept evidence as the driver gives them; ``outcomes`` reads them): id,
    answers_digest, survey_version_id, reference_id, screened_at, flag_count, flag_bits,
    verdict, careless_score, screened_with, results, kept_evidence."""
    out: list[AnyRow] = []
    connection = session.connection()
    for chunk in _chunks(list(pks), SCREENING_CHUNK):
        out.extend(
            connection.execute(
                select(
                    Respondent.id,
                    Respondent.answers_digest,
                    Respondent.survey_version_id,
                    Respondent.reference_id,
                    type_coerce(Respondent.screened_at, String),
                    Respondent.flag_count,
                    Respondent.flag_bits,
                    type_coerce(Respondent.verdict, String),
                    Respondent.careless_score,
                    Respondent.screened_with,
                    Respondent.results,
                    type_coerce(Respondent.kept_evidence, String),
                ).where(Respondent.id.in_(chunk))
            )
        )
    return out


def _bulk(
    session: Session, sql: str, table: Any, names: Sequence[str], rows: Sequence[Sequence[Any]],
    raw: Sequence[str] = (),
) -> None:
    """Run ``sql`` (columns in ``names`` order as ``{}`` placeholders) once per row through
    the driver's executemany, each value converted as its column's type converts it, once
    per column (``raw``: columns whose values are already as stored)."""
    connection = session.connection()
    dialect = connection.dialect
    mark = "?" if dialect.paramstyle == "qmark" else "%s"
    processors = [
        None if name in raw or name not in table.c else table.c[name].type.bind_processor(dialect)
        for name in names
    ]
    if any(p is not None for p in processors):
        converted = [list(row) for row in rows]
        for k, processor in enumerate(processors):
            if processor is None:
                continue
            given: Any = None
            value: Any = None
            for row in converted:
                if row[k] is None:
                    continue
                if row[k] is not given:  # one value repeated (a time) is converted once
                    given, value = row[k], processor(row[k])
                row[k] = value
        rows = converted
    marks = [
        f"CAST({mark} AS JSON)" if dialect.name == "postgresql" and name in table.c
        and isinstance(table.c[name].type, JSON) else mark
        for name in names
    ]
    connection.exec_driver_sql(sql.format(*marks), list(map(tuple, rows)))


#: Respondents per bulk read of stored screenings (SQLite allows 32,766 bound values).
SCREENING_CHUNK = 5_000
#: The screening columns ``update_screenings`` sets per respondent, in row order.
SCREENING_COLUMNS = (
    "flag_count", "flag_bits", "verdict", "careless_score", "results", "kept_evidence",
)


def update_screenings(
    session: Session, rows: Sequence[Sequence[Any]], fixed: dict[str, Any]
) -> None:
    """Set the stored screening of respondents in bulk: each row holds the values of
    ``SCREENING_COLUMNS`` (the verdict as its stored value, kept evidence as a dict or None),
    then the respondent's id; ``fixed`` sets columns (reference_id, screened_at,
    survey_version_id, screened_with) to one value for every row."""
    if not rows:
        return
    table = Respondent.__table__
    names = [*SCREENING_COLUMNS, *fixed]
    sets = ", ".join(f"{name} = {{}}" for name in names)
    dialect = session.connection().dialect
    values = []
    for name, value in fixed.items():  # converted once, not once per row
        processor = table.c[name].type.bind_processor(dialect)
        values.append(value if processor is None or value is None else processor(value))
    _bulk(
        session, f"UPDATE {table.name} SET {sets} WHERE id = {{}}", table, [*names, "id"],
        [(*row[:-1], *values, row[-1]) for row in rows],
        raw=("verdict", "results", *fixed),
    )


def insert_screening_history(
    session: Session, names: Sequence[str], rows: Sequence[Sequence[Any]],
    raw: Sequence[str] = (),
) -> None:
    """Insert screening history rows (values of the columns ``names``, in order; ``raw``:
    columns whose values are already as stored)."""
    if rows:
        table = ScreeningHistory.__table__
        columns = ", ".join(names)
        marks = ", ".join("{}" for _ in names)
        _bulk(session, f"INSERT INTO {table.name} ({columns}) VALUES ({marks})", table, names,
              rows, raw=raw)


def screening_history_of(session: Session, pk: int) -> list[ScreeningHistory]:
    """A respondent's earlier screening results, newest first."""
    return list(
        session.scalars(
            select(ScreeningHistory)
            .where(ScreeningHistory.respondent_pk == pk)
            .order_by(ScreeningHistory.replaced_at.desc(), ScreeningHistory.id.desc())
        )
    )


# Report -----------------------------------------------------------------------------------------


def detector_code_map(session: Session) -> dict[str, int]:
    """Detector name -> its stored code."""
    rows = session.execute(
        select(DetectorCode.code, DetectorCode.name).order_by(DetectorCode.code)
    )
    return {name: code for code, name in rows}


def add_detector_codes(session: Session, codes: dict[str, int]) -> None:
    if codes:
        session.connection().execute(
            insert(DetectorCode.__table__), [{"code": c, "name": n} for n, c in codes.items()]
        )


def survey_pks(session: Session, survey_id: int) -> list[int]:
    """The ids of a survey's respondents, ascending."""
    return list(
        session.scalars(
            select(Respondent.id).where(Respondent.survey_id == survey_id).order_by(Respondent.id)
        )
    )


def packed_results_between(
    session: Session, survey_id: int | None, low: int, high: int
) -> list[AnyRow]:
    """(id, results) of the respondents with ids in [low, high], read along the primary key
    (``survey_id`` None: the caller keeps its own respondents)."""
    statement = select(Respondent.id, Respondent.results).where(
        Respondent.id.between(low, high)
    )
    if survey_id is not None:
        statement = statement.where(Respondent.survey_id + 0 == survey_id)
    return list(session.connection().execute(statement.order_by(Respondent.id)))


def flag_bits_counts(session: Session, survey_id: int) -> list[AnyRow]:
    """(flag_bits, respondents) of the survey's flagged respondents."""
    return list(
        session.execute(
            select(Respondent.flag_bits, func.count())
            .where(Respondent.survey_id == survey_id, Respondent.flag_count > 0)
            .group_by(Respondent.flag_bits)
        )
    )


def flag_bits_by_day(session: Session, survey_id: int) -> list[AnyRow]:
    """(day, flag_bits, respondents) of the survey's flagged respondents per day (UTC)."""
    day = _day(session).label("day")
    return list(
        session.execute(
            select(day, Respondent.flag_bits, func.count())
            .where(Respondent.survey_id == survey_id, Respondent.flag_count > 0)
            .group_by(day, Respondent.flag_bits)
        )
    )


def survey_flags(session: Session, survey_id: int) -> list[AnyRow]:
    """(id, survey_version_id, flag_count, verdict, careless_score, review_decision) of every
    respondent of a survey, by id."""
    return list(
        session.execute(
            select(
                Respondent.id,
                Respondent.survey_version_id,
                Respondent.flag_count,
                Respondent.verdict,
                Respondent.careless_score,
                Respondent.review_decision,
            )
            .where(Respondent.survey_id == survey_id)
            .order_by(Respondent.id)
        )
    )


# Summary ----------------------------------------------------------------------------------------


def _day(session: Session) -> Any:
    if session.get_bind().dialect.name == "sqlite":
        return func.date(Respondent.received_at)
    return func.date(func.timezone("UTC", Respondent.received_at))


def report(session: Session, survey_id: int) -> dict[str, Any]:
    """Counts of respondents, flagged respondents and reviews, in all and per day of arrival
    (``outcomes.survey_counts`` adds the counts per detector)."""
    mine = Respondent.survey_id == survey_id
    flagged_any = case((Respondent.flag_count > 0, 1), else_=0)
    total, any_flag = session.execute(
        select(func.count(), func.coalesce(func.sum(flagged_any), 0)).where(mine)
    ).one()
    reviewed = {
        (decision.value if decision is not None else "none"): int(n)
        for decision, n in session.execute(
            select(Respondent.review_decision, func.count()).where(mine).group_by(
                Respondent.review_decision
            )
        )
    }
    day = _day(session).label("day")
    days: dict[str, dict[str, Any]] = {}
    for when, n, n_flagged in session.execute(
        select(day, func.count(), func.coalesce(func.sum(flagged_any), 0))
        .where(mine)
        .group_by(day)
        .order_by(day)
    ):
        days[str(when)] = {
            "day": dt.date.fromisoformat(str(when)),
            "respondents": int(n),
            "flagged_any": int(n_flagged),
            "flagged": {},
        }
    return {
        "respondents": int(total),
        "flagged_any": int(any_flag),
        "reviewed": reviewed,
        "days": list(days.values()),
    }
