"""Ingesting posted responses: the use case behind the webhook, the file import and the demo.

A post's rows are checked against the schema and the survey version's items (problems name
the row, the respondent and the item), screened together with the other posts of the same
transaction (``ingest_many``; see ``service.ingest_queue``) and written in bulk. Signatures and
keys are checked before a post is queued for the writer (:func:`admit_signed`, the routes'
key check), so a refused post never occupies it. The use case returns :class:`Ingested` and
raises domain errors (``service.errors``); only the web edge turns them into problems.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from pydantic import TypeAdapter, ValidationError
from sqlalchemy.orm import Session

from detectors import ResponseDataError, ResponseMatrix, ResponseProblem, check_answers

from . import store
from .answers import answers_of, encode
from .db import utcnow
from .errors import (
    CONFLICT_REASON,
    Conflict,
    NoVersion,
    RespondentConflict,
    ServiceError,
    SignatureRefused,
    UnknownSurvey,
    WebhookIdReused,
)
from .models import Survey
from .outcomes import (
    Summary,
    detector_codes,
    flags_column,
    not_assessed_of,
    screen_matrix,
    seconds_taken,
    written,
)
from .schemas import ResponseIn
from .screeners import Screener, reference_data, screener_for
from .security import WebhookRejected, check_webhook_headers, verify_webhook
from .settings import Settings

__all__ = [
    "BodyFieldProblem",
    "INGEST_CAUTION",
    "Checked",
    "check_rows",
    "seconds_taken",
    "answers_digest",
    "IngestOptions",
    "delivery_digest",
    "Submission",
    "DEFERRED",
    "Ingested",
    "RespondentOutcome",
    "RejectedRow",
    "ingest",
    "ingest_many",
    "admit_signed",
    "WebhookCredentials",
    "remembered_credentials",
    "read_credentials",
    "forget_credentials",
    "check_signature",
    "check_signature_headers",
]

_ROWS = TypeAdapter(list[ResponseIn])
_ROW = TypeAdapter(ResponseIn)


# Checking posted rows ----------------------------------------------------------------------------


@dataclass
class Checked:
    """The valid rows of a post as a matrix, and the problems of the others."""

    rows: list[ResponseIn]
    positions: list[int]  # 0-based position in the post of each valid row
    matrix: ResponseMatrix
    problems: list[ResponseProblem]
    bad_positions: set[int] = field(default_factory=set)


@dataclass(frozen=True)
class BodyFieldProblem(ResponseProblem):
    """A problem with a top-level field of a posted response (not an item of ``answers``),
    so that its JSON pointer names the field itself."""


def _leaves_to_library(raw: Any, loc: list[str], kind: str, items: Mapping[str, int]) -> bool:
    """Whether a schema error is one the library's checks name in their own words, so a post
    and a file get the same reason: a blank respondent id, a fractional answer to an item."""
    if not isinstance(raw, dict):
        return False
    if loc == ["respondent_id"]:
        return kind == "string_too_short" and isinstance(raw.get("respondent_id"), str)
    answers = raw.get("answers")
    return (
        len(loc) == 2 and loc[0] == "answers" and loc[1] in items and isinstance(answers, dict)
        and _fractional(answers.get(loc[1]))
    )


def _schema_problems(
    raw_rows: Sequence[Any], items: Mapping[str, int]
) -> tuple[dict[int, ResponseIn], list[ResponseProblem]]:
    try:
        return dict(enumerate(_ROWS.validate_python(raw_rows))), []
    except ValidationError:
        pass
    good: dict[int, ResponseIn] = {}
    problems: list[ResponseProblem] = []
    for position, raw in enumerate(raw_rows):
        try:
            good[position] = _ROW.validate_python(raw)
        except ValidationError as error:
            rid = _given_id(raw)
            for entry in error.errors():
                loc = [str(p) for p in entry["loc"]]
                if _leaves_to_library(raw, loc, entry["type"], items):
                    continue
                if loc and loc[0] == "answers" and len(loc) > 1:
                    problems.append(ResponseProblem(position + 1, rid, loc[1], entry["msg"]))
                else:
                    column = loc[0] if loc else None
                    problems.append(BodyFieldProblem(position + 1, rid, column, entry["msg"]))
    return good, problems


def _given_id(raw: Any) -> str | None:
    """The respondent id of a row the schema refused, if it is text (stripped; None if blank)."""
    rid = raw.get("respondent_id") if isinstance(raw, dict) else None
    return rid.strip() or None if isinstance(rid, str) else None


def _fractional(value: Any) -> bool:
    return isinstance(value, float) and bool(np.isfinite(value)) and value != round(value)


def _number(value: Any) -> float | None:
    """A posted answer the library's checks judge: an integer, or a finite number with a
    fractional part (a whole float is left to the schema, which takes integers only)."""
    if isinstance(value, int) and not isinstance(value, bool):
        return float(value)
    return value if _fractional(value) else None


def check_rows(screener: Screener, raw_rows: Sequence[Any], max_meta_bytes: int) -> Checked:
    """Validate posted rows against the schema and the survey version's items; build the matrix
    of the valid ones. Problems name the row (1-based), the respondent and the item.

    The schema (types, fields) and the size of ``meta`` are checked here; respondent ids and
    answers go through the library's :func:`detectors.check_answers`, as a file's rows do."""
    parsed, problems = _schema_problems(raw_rows, screener.item_index)
    instrument, index = screener.instrument, screener.item_index
    items = instrument.item_ids
    n = len(raw_rows)
    positions = sorted(parsed)
    rows = [parsed[p] for p in positions]
    values = np.full((n, len(items)), np.nan)
    values[positions] = np.array(
        [list(map(row.answers.get, items)) for row in rows], dtype=np.float64
    ).reshape(len(rows), len(items))
    ids: list[str | None] = [None] * n
    for position, row in zip(positions, rows, strict=True):
        ids[position] = row.respondent_id
        unknown = row.answers.keys() - index.keys()
        if unknown:
            problems += _unknown_items(screener, position, row.respondent_id, sorted(unknown))
        if row.meta is not None and max_meta_bytes >= 0:
            size = len(json.dumps(row.meta, separators=(",", ":")).encode("utf-8"))
            if size > max_meta_bytes:
                problems.append(
                    ResponseProblem(
                        position + 1, row.respondent_id, "meta",
                        f"meta is {size} bytes as JSON; at most {max_meta_bytes} are accepted",
                    )
                )
    # A row the schema refused still has its id and answers checked, so that every problem of
    # it is listed and its id counts when looking for repeated ones.
    id_refused = {  # ids the schema has named (missing, not text, too long)
        p.row - 1 for p in problems
        if isinstance(p, BodyFieldProblem) and p.column == "respondent_id" and p.row is not None
    }
    for position, raw in enumerate(raw_rows if len(parsed) < n else ()):
        if position in parsed:
            continue
        given = raw.get("respondent_id") if isinstance(raw, dict) else None
        if isinstance(given, str) and position not in id_refused:
            ids[position] = given
        else:
            id_refused.add(position)
        answers = raw.get("answers") if isinstance(raw, dict) else None
        if not isinstance(answers, dict):
            continue
        answers = {str(k): v for k, v in answers.items()}
        not_items = [item for item in answers if item not in index]
        problems += _unknown_items(screener, position, _given_id(raw), not_items)
        for item, value in answers.items():
            number = _number(value) if item in index else None
            if number is not None:
                values[position, index[item]] = number
    checked = check_answers(instrument, values, ids)
    problems += [
        p for p in checked.problems
        if not (p.row is not None and p.row - 1 in id_refused and p.column == "respondent_id")
    ]
    problems.sort(key=lambda p: (p.row or 0))
    bad = {p.row - 1 for p in problems if p.row is not None}
    keep = np.array([p not in bad for p in positions], dtype=bool)
    kept = np.asarray(positions, dtype=np.intp)[keep]
    durations = np.array([seconds_taken(row) for row in rows], dtype=np.float64)
    matrix = ResponseMatrix(
        respondent_ids=np.array([row.respondent_id for row in rows], dtype=object)[keep],
        answers=checked.answers[kept],
        durations=durations[keep],
    )
    return Checked(
        rows=[row for row, k in zip(rows, keep.tolist(), strict=True) if k],
        positions=kept.tolist(),
        matrix=matrix,
        problems=problems,
        bad_positions=bad,
    )


def _unknown_items(
    screener: Screener, position: int, respondent_id: str | None, unknown: Sequence[str]
) -> list[ResponseProblem]:
    """Answers to items the survey version does not have (a post names items per row; a file's
    columns are checked as a whole)."""
    return [
        ResponseProblem(
            position + 1, respondent_id, item,
            f"unknown item: not in version {screener.number} of survey "
            f"{screener.instrument.survey!r}",
        )
        for item in unknown
    ]


def answers_digest(answers: Mapping[str, int | None]) -> str:
    """Digest of the answered items only: an explicit null and an absent item are the same.
    The first 64 bits (16 hex digits): it only tells one respondent's answers from its own
    earlier ones."""
    return store.canonical_digest({k: v for k, v in answers.items() if v is not None})[:16]


# Ingestion -------------------------------------------------------------------------------------


@dataclass(frozen=True)
class IngestOptions:
    replace: bool = False
    partial: bool = False
    webhook_id: str | None = None
    #: ``delivery_digest`` of a signed body: the same webhook id with another body is refused.
    body_digest: str | None = None


def delivery_digest(body: bytes) -> str:
    """First 64 bits of a delivery body's sha256 (hex): tells a replay from another body."""
    return hashlib.sha256(body).hexdigest()[:16]


@dataclass
class Submission:
    """One post to ingest: the survey id, its decoded rows and options. Keys and signatures are
    checked before a submission is made (see :func:`admit_signed`)."""

    survey: str
    rows: Sequence[Any]
    options: IngestOptions = field(default_factory=IngestOptions)


class Deferred:
    """Result of a submission that touches a respondent claimed by an earlier submission of the
    same call: process it again after the others are committed."""


DEFERRED = Deferred()


@dataclass(frozen=True, slots=True)
class RespondentOutcome:
    """What happened to one respondent of a post."""

    respondent_id: str
    status: str  # stored, replaced or duplicate
    summary: Summary | None  # None: a duplicate of a delivery whose respondent is gone
    not_assessed: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class RejectedRow:
    """A row left out of a partial post, with every problem found in it."""

    row: int  # 1-based position in the post
    respondent_id: str | None
    problems: tuple[tuple[str | None, str], ...]  # (item or field, reason)


#: Carried by every ingest reply: the survey platform reads it, and it is the component most
#: likely to act on a reply without a person (cancel a complete, withhold an incentive).
INGEST_CAUTION = (
    "Flags, verdicts and careless scores are evidence for a human reviewer's decision, not a "
    "verdict on a person. Do not cancel a complete, withhold an incentive or exclude anyone "
    "automatically on this reply; have a person read the evidence and record a review."
)


@dataclass
class Ingested:
    """What one post did."""

    survey: str
    version: int
    received: int
    stored: int
    replaced: int
    duplicates: int
    replayed_delivery: bool
    rejected: list[RejectedRow]
    results: list[RespondentOutcome]
    #: Whether the reply carries verdicts and careless scores (the survey's setting).
    verdict_in_replies: bool = True

    def reply(self) -> dict[str, Any]:
        """The reply in the documented shape (``schemas.IngestReply``)."""
        results = []
        for outcome in self.results:
            summary = outcome.summary
            flags = list(summary.flags) if summary is not None else []
            result: dict[str, Any] = {
                "respondent_id": outcome.respondent_id, "status": outcome.status,
                "flag_count": len(flags), "flags": flags,
            }
            if self.verdict_in_replies:
                result["verdict"] = None if summary is None else summary.verdict.value
                result["careless_score"] = None if summary is None else summary.careless_score
            result["not_assessed"] = list(outcome.not_assessed)
            results.append(result)
        return {
            "caution": INGEST_CAUTION,
            "survey": self.survey,
            "version": self.version,
            "received": self.received,
            "stored": self.stored,
            "replaced": self.replaced,
            "duplicates": self.duplicates,
            "replayed_delivery": self.replayed_delivery,
            "rejected": [
                {
                    "row": r.row,
                    "respondent_id": r.respondent_id,
                    "problems": [{"item": item, "reason": reason} for item, reason in r.problems],
                }
                for r in self.rejected
            ],
            "results": results,
        }


@dataclass
class _Plan:
    index: int
    survey: Survey
    screener: Screener
    checked: Checked
    options: IngestOptions
    ids: list[str]
    digests: list[str]
    replayed: bool = False
    new: list[int] = field(default_factory=list)
    replaced: list[int] = field(default_factory=list)
    duplicates: list[int] = field(default_factory=list)
    rejected: list[RejectedRow] = field(default_factory=list)
    outcome: dict[int, RespondentOutcome] = field(default_factory=dict)


#: How long a survey's webhook secrets are trusted from memory before they are read again. A
#: rotation made through this process's database handle takes effect at once; one made by
#: another process (the command line, another replica) within this many seconds, and the
#: previous secret stays valid through the rotation's grace period anyway.
CREDENTIALS_SECONDS = 2.0
_CREDENTIALS = "webhook-credentials"


@dataclass(frozen=True)
class WebhookCredentials:
    """A survey's webhook secrets: the current one, and the previous one until it expires."""

    secret: str
    previous: str | None
    previous_until: dt.datetime | None
    read_at: float  # time.monotonic() when read from the database

    def candidates(self, now: dt.datetime) -> list[str]:
        out = [self.secret]
        if self.previous and self.previous_until and self.previous_until > now:
            out.append(self.previous)
        return out


def remembered_credentials(memo: dict[str, Any], survey: str) -> WebhookCredentials | None:
    """The survey's credentials if read less than ``CREDENTIALS_SECONDS`` ago, else None."""
    found = memo.get(_CREDENTIALS, {}).get(survey)
    if found is None or time.monotonic() - found.read_at > CREDENTIALS_SECONDS:
        return None
    return found


def read_credentials(session: Session, survey: str) -> WebhookCredentials:
    """The survey's credentials from the database (remembered in the session's database memo).
    Raises ``UnknownSurvey``."""
    found = store.get_survey(session, survey)
    if found is None:
        raise UnknownSurvey(survey)
    credentials = WebhookCredentials(
        found.webhook_secret, found.previous_webhook_secret, found.previous_secret_until,
        time.monotonic(),
    )
    memo = session.info.get("memo")
    if memo is not None:
        memo.setdefault(_CREDENTIALS, {})[survey] = credentials
    return credentials


def forget_credentials(memo: dict[str, Any], survey: str) -> None:
    """Drop remembered credentials (after a rotation)."""
    memo.get(_CREDENTIALS, {}).pop(survey, None)


def check_signature(
    credentials: WebhookCredentials,
    signature: tuple[str | None, str | None, str | None],
    body: bytes,
    settings: Settings,
) -> None:
    """Verify a Standard Webhooks delivery (``webhook-id``, ``webhook-timestamp``,
    ``webhook-signature``) under the survey's secret, or its previous one within the
    rotation's grace period. Raises ``SignatureRefused``."""
    try:
        verify_webhook(
            credentials.candidates(dt.datetime.now(dt.UTC)), *signature, body,
            settings.webhook_tolerance_seconds,
        )
    except WebhookRejected as error:
        raise SignatureRefused(error.reason, error.code) from None


def check_signature_headers(
    signature: tuple[str | None, str | None, str | None], settings: Settings
) -> None:
    """The checks of a signed delivery that need no body (headers, timestamp). Raises
    ``SignatureRefused``."""
    try:
        check_webhook_headers(*signature, settings.webhook_tolerance_seconds)
    except WebhookRejected as error:
        raise SignatureRefused(error.reason, error.code) from None


def admit_signed(
    session: Session,
    survey: str,
    signature: tuple[str | None, str | None, str | None],
    body: bytes,
    settings: Settings,
) -> None:
    """Check a signed delivery against the survey's secrets read from the database. Raises
    ``UnknownSurvey`` or ``SignatureRefused``."""
    check_signature(read_credentials(session, survey), signature, body, settings)


def ingest(
    session: Session,
    survey: Survey,
    raw_rows: Sequence[Any],
    options: IngestOptions,
    settings: Settings,
) -> Ingested:
    """Check, screen and store one post's responses.

    Raises ``ResponseDataError`` (any invalid row of an all-or-nothing post) or
    ``RespondentConflict`` (a respondent already stored with other answers, without
    ``replace``). The caller commits; nothing is written when this raises.
    """
    [result] = ingest_many(session, [Submission(survey.survey, raw_rows, options)], settings)
    if isinstance(result, BaseException):
        raise result
    assert isinstance(result, Ingested)
    return result


def ingest_many(
    session: Session, submissions: Sequence[Submission], settings: Settings
) -> list[Ingested | BaseException | Deferred]:
    """Ingest several posts in the caller's transaction, screening their respondents together.

    Returns, per submission, what it did, the exception that refused it (a ``ServiceError``
    or a ``ResponseDataError``; a refused submission writes nothing), or :data:`DEFERRED`.
    Everything is checked before anything is written, so committing stores exactly the
    accepted submissions.
    """
    results: list[Ingested | BaseException | Deferred] = [DEFERRED] * len(submissions)
    surveys: dict[str, Survey | None] = {}
    plans: list[_Plan] = []
    for index, submission in enumerate(submissions):
        try:
            if submission.survey not in surveys:
                surveys[submission.survey] = store.get_survey(session, submission.survey)
            survey = surveys[submission.survey]
            if survey is None:
                raise UnknownSurvey(submission.survey)
            if survey.current_version_id is None:
                raise NoVersion(submission.survey)
            screener = screener_for(session, survey.current_version_id)
            checked = check_rows(screener, submission.rows, settings.max_meta_bytes)
            if checked.problems and not submission.options.partial:
                raise ResponseDataError(checked.problems)
        except (ServiceError, ResponseDataError) as error:
            results[index] = error
            continue
        ids = [row.respondent_id for row in checked.rows]
        plans.append(
            _Plan(
                index=index, survey=survey, screener=screener, checked=checked,
                options=submission.options, ids=ids,
                digests=[answers_digest(row.answers) for row in checked.rows],
            )
        )

    # Replayed webhook ids and stored respondents, one query per survey.
    seen_deliveries: dict[int, dict[str, str | None]] = {}
    existing: dict[int, dict[str, Any]] = {}
    for survey_id in {plan.survey.id for plan in plans}:
        mine = [plan for plan in plans if plan.survey.id == survey_id]
        webhook_ids = [p.options.webhook_id for p in mine if p.options.webhook_id is not None]
        seen_deliveries[survey_id] = store.deliveries_seen(session, survey_id, webhook_ids)
        existing[survey_id] = store.existing_respondents(
            session, survey_id, sorted({rid for p in mine for rid in p.ids})
        )

    claimed: set[tuple[int, str]] = set()
    claimed_deliveries: set[tuple[int, str]] = set()
    accepted: list[_Plan] = []
    for plan in plans:
        survey_id = plan.survey.id
        webhook_id = plan.options.webhook_id
        if webhook_id is not None and (survey_id, webhook_id) in claimed_deliveries:
            continue  # the same delivery twice in one call: the second waits (a replay)
        if any((survey_id, rid) in claimed for rid in plan.ids):
            continue  # deferred until the earlier submission is committed
        if webhook_id is not None and webhook_id in seen_deliveries[survey_id]:
            plan.replayed = True
            earlier, body = seen_deliveries[survey_id][webhook_id], plan.options.body_digest
            if earlier is not None and body is not None and earlier != body:
                results[plan.index] = WebhookIdReused(webhook_id)
                continue
        stored_rows = existing[survey_id]
        conflicts = []
        for i, (rid, digest) in enumerate(zip(plan.ids, plan.digests, strict=True)):
            stored = stored_rows.get(rid)
            if stored is None:
                (plan.duplicates if plan.replayed else plan.new).append(i)
            elif plan.replayed or (
                stored.answers_digest == digest
                and not (plan.options.replace and _details_differ(stored, plan.checked.rows[i]))
            ):
                plan.duplicates.append(i)
            elif plan.options.replace:
                plan.replaced.append(i)
            else:
                conflicts.append(i)
        plan.rejected = _rejected_rows(plan.checked)
        if conflicts:
            positions = plan.checked.positions
            if not plan.options.partial:
                results[plan.index] = RespondentConflict(
                    [Conflict(positions[i], plan.ids[i]) for i in conflicts]
                )
                continue
            plan.rejected.extend(
                RejectedRow(positions[i] + 1, plan.ids[i], (("respondent_id", CONFLICT_REASON),))
                for i in conflicts
            )
            plan.rejected.sort(key=lambda r: r.row)
        claimed.update((survey_id, plan.ids[i]) for i in plan.new + plan.replaced)
        if webhook_id is not None:
            claimed_deliveries.add((survey_id, webhook_id))
        accepted.append(plan)

    now = utcnow()
    by_version: dict[tuple[int, int], list[_Plan]] = {}
    for plan in accepted:
        by_version.setdefault((plan.survey.id, plan.screener.version_id), []).append(plan)
    for group in by_version.values():
        _store_group(session, group, existing[group[0].survey.id], now)

    waiting_pks = [
        existing[plan.survey.id][plan.ids[i]].id
        for plan in accepted
        for i in plan.duplicates
        if plan.ids[i] in existing[plan.survey.id]
    ]
    waiting = not_assessed_of(session, waiting_pks) if waiting_pks else {}
    codes = detector_codes(session) if waiting_pks else None
    deliveries = []
    for plan in accepted:
        stored_rows = existing[plan.survey.id]
        for i in plan.duplicates:
            stored = stored_rows.get(plan.ids[i])
            plan.outcome[i] = RespondentOutcome(
                plan.ids[i],
                "duplicate",
                None if stored is None or codes is None else Summary.stored(
                    codes, stored.flag_bits, stored.verdict, stored.careless_score
                ),
                () if stored is None else tuple(waiting.get(stored.id, [])),
            )
        if plan.options.webhook_id is not None and not plan.replayed:
            deliveries.append(
                {"survey_id": plan.survey.id, "webhook_id": plan.options.webhook_id,
                 "received_at": now, "body_digest": plan.options.body_digest}
            )
        results[plan.index] = _ingested(plan, len(submissions[plan.index].rows))
    store.record_deliveries(session, deliveries)
    return results


def _details_differ(stored: Any, row: ResponseIn) -> bool:
    """Whether a post with the stored answers brings other times, duration or meta (which
    ``replace`` stores, and the speed is judged again on)."""
    return (
        stored.started_at != row.started_at
        or stored.submitted_at != row.submitted_at
        or stored.duration_seconds != row.duration_seconds
        or stored.meta != row.meta
    )


def _store_group(
    session: Session, plans: list[_Plan], stored_rows: dict[str, Any], now: dt.datetime
) -> None:
    """Screen the new and replaced respondents of plans sharing a survey version, together,
    and write them in bulk."""
    parts = [(plan, sorted(plan.new + plan.replaced)) for plan in plans]
    parts = [(plan, rows) for plan, rows in parts if rows]
    if not parts:
        return
    survey, screener = parts[0][0].survey, parts[0][0].screener
    reference_id = survey.current_reference_id
    reference = reference_data(session, reference_id)
    used_reference = reference_id if reference is not None else None
    matrices = [plan.checked.matrix.take(np.array(rows, dtype=np.intp)) for plan, rows in parts]
    matrix = ResponseMatrix(
        respondent_ids=np.concatenate([m.respondent_ids for m in matrices]),
        answers=np.concatenate([m.answers for m in matrices]),
        durations=np.concatenate([m.durations for m in matrices]),
    )
    screened = screen_matrix(screener, matrix, reference)
    codes = detector_codes(session, screened.names)
    screenings = written(screened, codes)
    new_values, old_values = [], []
    k = 0
    for plan, rows in parts:
        replaced = set(plan.replaced)
        for i in rows:
            row = plan.checked.rows[i]
            values = {
                "survey_version_id": screener.version_id,
                "answer_codes": encode(row.answers, screener.instrument.item_ids),
                "answers_digest": plan.digests[i],
                "started_at": row.started_at,
                "submitted_at": row.submitted_at,
                "duration_seconds": row.duration_seconds,
                "meta": row.meta,
                "received_at": now,
                "screened_at": now,
                "reference_id": used_reference,
                "screened_with": screener.fingerprint,
                **screenings[k].columns(codes),
            }
            if i in replaced:
                old_values.append({"pk": stored_rows[plan.ids[i]].id, **values})
            else:
                new_values.append(
                    {"survey_id": survey.id, "respondent_id": row.respondent_id, **values}
                )
            plan.outcome[i] = RespondentOutcome(
                plan.ids[i],
                "replaced" if i in replaced else "stored",
                screenings[k].summary,
                tuple(screened.not_assessed(k)),
            )
            k += 1
    store.insert_respondents(session, new_values)
    history = [
        {
            "respondent_pk": before.id,
            "survey_version_id": before.survey_version_id,
            "answers": answers_of(session, before.survey_version_id, before.answer_codes),
            "answers_digest": before.answers_digest,
            "started_at": before.started_at,
            "submitted_at": before.submitted_at,
            "duration_seconds": before.duration_seconds,
            "meta": before.meta,
            "received_at": before.received_at,
            "replaced_at": now,
            "flags": flags_column(codes.names(before.flag_bits)),
        }
        for before in store.respondents_of(session, [row["pk"] for row in old_values])
    ]
    store.replace_respondents(session, old_values, history)


def _ingested(plan: _Plan, received: int) -> Ingested:
    return Ingested(
        survey=plan.survey.survey,
        version=plan.screener.number,
        received=received,
        stored=len(plan.new),
        replaced=len(plan.replaced),
        duplicates=len(plan.duplicates),
        replayed_delivery=plan.replayed,
        rejected=plan.rejected,
        results=[plan.outcome[i] for i in sorted(plan.outcome)],
        verdict_in_replies=plan.survey.verdict_in_replies,
    )


def _rejected_rows(checked: Checked) -> list[RejectedRow]:
    by_row: dict[int, tuple[str | None, list[tuple[str | None, str]]]] = {}
    for p in checked.problems:
        assert p.row is not None
        entry = by_row.setdefault(p.row, (p.respondent_id, []))
        entry[1].append((p.column, p.reason))
    return [
        RejectedRow(row, by_row[row][0], tuple(by_row[row][1])) for row in sorted(by_row)
    ]
