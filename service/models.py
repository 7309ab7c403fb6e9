"""The stored tables, as typed SQLAlchemy models.

A survey has numbered versions (its instrument documents); every respondent keeps the version it
was screened with. A respondent's row holds its screening: the verdict, the careless score, the
flag set (a bitmask of ``detector_codes``) and every detector's state, flag and score
packed in ``results`` (layout: ``service.outcomes``); evidence is derived on read. Answers are
stored as received, so any later re-screen can use them; earlier answers replaced with
``?replace=true`` move to ``response_history``. Reviews are append-only.
"""

from __future__ import annotations

import datetime as dt
import enum
from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    Boolean,
    Enum,
    Float,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    SmallInteger,
    String,
    Text,
    UniqueConstraint,
    true,
)
from sqlalchemy.orm import Mapped, mapped_column

from .db import Base, UTCDateTime, utcnow

__all__ = [
    "Role",
    "Decision",
    "ApiKey",
    "Survey",
    "SurveyVersion",
    "ReferenceSample",
    "Respondent",
    "ResponseHistory",
    "ScreeningHistory",
    "DetectorCode",
    "Review",
    "WebhookDelivery",
    "Erasure",
    "JobKind",
    "JobState",
    "Job",
]


class Role(enum.StrEnum):
    """What a key may do: ``ingest`` posts responses, ``analyst`` reads and reviews,
    ``admin`` does everything."""

    INGEST = "ingest"
    ANALYST = "analyst"
    ADMIN = "admin"


class Decision(enum.StrEnum):
    """A reviewer's decision about a respondent."""

    KEEP = "keep"
    EXCLUDE = "exclude"
    UNDECIDED = "undecided"


class Verdict(enum.StrEnum):
    """The screening verdict on a respondent (evidence for a reviewer, not a decision)."""

    OK = "ok"
    REVIEW = "review"
    LIKELY_CARELESS = "likely_careless"


class JobKind(enum.StrEnum):
    """What a background job does (``service.jobs``)."""

    RESCREEN = "rescreen"
    REPORT = "report"
    EXPORT = "export"
    NIGHTLY = "nightly"


class JobState(enum.StrEnum):
    """Where a background job stands: ``queued`` -> ``running`` -> ``done`` or ``failed``;
    ``cancelled`` when a person stopped it while queued or running."""

    QUEUED = "queued"
    RUNNING = "running"
    DONE = "done"
    FAILED = "failed"
    CANCELLED = "cancelled"


def _enum(kind: type[enum.Enum], name: str) -> Enum:
    return Enum(
        kind,
        name=name,
        native_enum=False,
        length=16,
        values_callable=lambda members: [m.value for m in members],
    )


class ApiKey(Base):
    __tablename__ = "api_keys"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(100), unique=True)
    role: Mapped[Role] = mapped_column(_enum(Role, "role"))
    #: Public part of the token, to find the row without comparing secrets in the database.
    lookup: Mapped[str] = mapped_column(String(16), unique=True)
    #: sha256 of the whole token (hex); the token itself is never stored.
    token_hash: Mapped[str] = mapped_column(String(64))
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime(), default=utcnow)
    revoked_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime(), default=None)


class WebSession(Base):
    """A signed-in analyst on the review pages: the key it was opened with, until when it holds,
    and the form token every page's form carries. The cookie's token is stored as a hash."""

    __tablename__ = "web_sessions"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    lookup: Mapped[str] = mapped_column(String(16), unique=True)
    token_hash: Mapped[str] = mapped_column(String(64))
    form_token: Mapped[str] = mapped_column(String(64))
    key_id: Mapped[int] = mapped_column(ForeignKey("api_keys.id", ondelete="CASCADE"), index=True)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime(), default=utcnow)
    expires_at: Mapped[dt.datetime] = mapped_column(UTCDateTime(), index=True)


class Survey(Base):
    __tablename__ = "surveys"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    survey: Mapped[str] = mapped_column(String(64), unique=True)
    title: Mapped[str] = mapped_column(Text, default="")
    current_version_id: Mapped[int | None] = mapped_column(
        ForeignKey("survey_versions.id", use_alter=True, name="fk_surveys_current_version"),
        default=None,
    )
    #: The reference sample of the current version used on arrival (None until a re-screen).
    current_reference_id: Mapped[int | None] = mapped_column(
        ForeignKey("reference_samples.id", use_alter=True, name="fk_surveys_current_reference"),
        default=None,
    )
    webhook_secret: Mapped[str] = mapped_column(String(100))
    previous_webhook_secret: Mapped[str | None] = mapped_column(String(100), default=None)
    previous_secret_until: Mapped[dt.datetime | None] = mapped_column(UTCDateTime(), default=None)
    #: Random key of the digests in the erasure audit lines.
    erasure_salt: Mapped[str] = mapped_column(String(64))
    #: Whether ingest replies (read by the survey platform, which may act on them unattended)
    #: carry each respondent's verdict and careless score; flags are always in them.
    verdict_in_replies: Mapped[bool] = mapped_column(Boolean, default=True, server_default=true())
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime(), default=utcnow)


class SurveyVersion(Base):
    __tablename__ = "survey_versions"
    __table_args__ = (UniqueConstraint("survey_id", "number"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    survey_id: Mapped[int] = mapped_column(ForeignKey("surveys.id", ondelete="CASCADE"))
    number: Mapped[int] = mapped_column(Integer)
    document: Mapped[dict[str, Any]] = mapped_column(JSON)
    #: sha256 of the canonical JSON of the document: an unchanged document is not a new version.
    digest: Mapped[str] = mapped_column(String(64))
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime(), default=utcnow)


class ReferenceSample(Base):
    """What sample-dependent detectors measure against, estimated from stored respondents."""

    __tablename__ = "reference_samples"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    survey_version_id: Mapped[int] = mapped_column(
        ForeignKey("survey_versions.id", ondelete="CASCADE"), index=True
    )
    respondents: Mapped[int] = mapped_column(Integer)
    #: Detector name to its reference (e.g. mean and covariance), as the engine returns it.
    data: Mapped[dict[str, Any]] = mapped_column(JSON)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime(), default=utcnow)


class Respondent(Base):
    """One respondent's current answers and the summary of their screening."""

    __tablename__ = "respondents"
    __table_args__ = (
        UniqueConstraint("survey_id", "respondent_id"),
        Index("ix_respondents_received", "survey_id", "received_at", "id"),
        Index("ix_respondents_flag_count", "survey_id", "flag_count", "id"),
        Index(
            "ix_respondents_careless_score", "survey_id", "careless_score", "flag_count", "id"
        ),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    survey_id: Mapped[int] = mapped_column(ForeignKey("surveys.id", ondelete="CASCADE"))
    respondent_id: Mapped[str] = mapped_column(String(200))
    survey_version_id: Mapped[int] = mapped_column(ForeignKey("survey_versions.id"))
    #: The answers as received, a byte per item of the version (``service.answers``).
    answer_codes: Mapped[bytes] = mapped_column(LargeBinary)
    #: sha256 of the answered items and their answers (first 64 bits): equal digests are
    #: duplicates.
    answers_digest: Mapped[str] = mapped_column(String(64))
    started_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime(), default=None)
    submitted_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime(), default=None)
    duration_seconds: Mapped[float | None] = mapped_column(Float, default=None)
    meta: Mapped[dict[str, Any] | None] = mapped_column(JSON, default=None)
    received_at: Mapped[dt.datetime] = mapped_column(UTCDateTime())
    screened_at: Mapped[dt.datetime] = mapped_column(UTCDateTime())
    reference_id: Mapped[int | None] = mapped_column(
        ForeignKey("reference_samples.id", ondelete="SET NULL"), default=None
    )
    flag_count: Mapped[int] = mapped_column(SmallInteger, default=0)
    #: The raised flags: bit ``code`` set for each flagging detector (``DetectorCode``).
    flag_bits: Mapped[int] = mapped_column(BigInteger, default=0, server_default="0")
    #: Every detector's code, state, flag and score, packed (``outcomes.PACKED``).
    results: Mapped[bytes | None] = mapped_column(LargeBinary, default=None)
    #: The evidence of detectors that compare respondents with each other (which screening
    #: the respondent alone would not give back), by detector code; None when there is none.
    kept_evidence: Mapped[dict[str, Any] | None] = mapped_column(
        JSON(none_as_null=True), default=None
    )
    #: ok / review / likely_careless under the instrument's verdict policy.
    verdict: Mapped[Verdict] = mapped_column(
        _enum(Verdict, "verdict"), default=Verdict.OK, server_default=Verdict.OK.value
    )
    #: Rank-based combination of the carelessness indices in [0, 1]; None before screening.
    careless_score: Mapped[float | None] = mapped_column(Float, default=None)
    review_decision: Mapped[Decision | None] = mapped_column(
        _enum(Decision, "decision"), default=None
    )
    #: Fingerprint of the screener the result was produced with (the version's instrument and
    #: every detector's name and version); None before fingerprints were kept (migration 0003).
    screened_with: Mapped[str | None] = mapped_column(String(64), default=None)


class ResponseHistory(Base):
    """Earlier answers of a respondent, kept when they were replaced."""

    __tablename__ = "response_history"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    respondent_pk: Mapped[int] = mapped_column(
        ForeignKey("respondents.id", ondelete="CASCADE"), index=True
    )
    survey_version_id: Mapped[int] = mapped_column(ForeignKey("survey_versions.id"))
    answers: Mapped[dict[str, Any]] = mapped_column(JSON)
    answers_digest: Mapped[str] = mapped_column(String(64))
    started_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime(), default=None)
    submitted_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime(), default=None)
    duration_seconds: Mapped[float | None] = mapped_column(Float, default=None)
    meta: Mapped[dict[str, Any] | None] = mapped_column(JSON, default=None)
    received_at: Mapped[dt.datetime] = mapped_column(UTCDateTime())
    replaced_at: Mapped[dt.datetime] = mapped_column(UTCDateTime())
    flags: Mapped[str] = mapped_column(String(500), default="")


class ScreeningHistory(Base):
    """A respondent's earlier screening result, kept when a re-screen changed it."""

    __tablename__ = "screening_history"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    respondent_pk: Mapped[int] = mapped_column(
        ForeignKey("respondents.id", ondelete="CASCADE"), index=True
    )
    survey_version_id: Mapped[int] = mapped_column(ForeignKey("survey_versions.id"))
    reference_id: Mapped[int | None] = mapped_column(
        ForeignKey("reference_samples.id", ondelete="SET NULL"), default=None
    )
    #: When the earlier result was produced, and when the re-screen replaced it.
    screened_at: Mapped[dt.datetime] = mapped_column(UTCDateTime())
    replaced_at: Mapped[dt.datetime] = mapped_column(UTCDateTime())
    flag_count: Mapped[int] = mapped_column(SmallInteger, default=0)
    flags: Mapped[str] = mapped_column(String(500), default="")
    verdict: Mapped[Verdict] = mapped_column(_enum(Verdict, "verdict"), default=Verdict.OK)
    careless_score: Mapped[float | None] = mapped_column(Float, default=None)
    #: The earlier results packed (``outcomes.earlier_records``; earlier rows
    #: ``outcomes.EARLIER``: code, state and flag, score), and
    #: the detectors' versions (one text for all, a list in the packed order, or None when
    #: not known). Rows written before migration 0005 hold ``results`` instead (detector name
    #: to {"version", "state", "score", "flagged"}); later ones an empty object there.
    packed_results: Mapped[bytes | None] = mapped_column(LargeBinary, default=None)
    versions: Mapped[Any] = mapped_column(JSON(none_as_null=True), default=None)
    results: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)


class DetectorCode(Base):
    """A detector's stable number: its bit in ``Respondent.flag_bits`` and its tag in the
    packed results. Given on first sight and never changed or reused."""

    __tablename__ = "detector_codes"

    code: Mapped[int] = mapped_column(SmallInteger, primary_key=True, autoincrement=False)
    name: Mapped[str] = mapped_column(String(64), unique=True)


class Review(Base):
    """A reviewer's decision; never updated or deleted except by an erasure."""

    __tablename__ = "reviews"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    respondent_pk: Mapped[int] = mapped_column(
        ForeignKey("respondents.id", ondelete="CASCADE"), index=True
    )
    decision: Mapped[Decision] = mapped_column(_enum(Decision, "decision"))
    note: Mapped[str] = mapped_column(Text, default="")
    reviewer: Mapped[str] = mapped_column(String(100))
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime(), default=utcnow)


#: Longest ``webhook-id`` kept (longer ones are refused before anything is stored).
WEBHOOK_ID_LENGTH = 200


class WebhookDelivery(Base):
    """Webhook ids already accepted, so a replayed delivery is answered as a duplicate."""

    __tablename__ = "webhook_deliveries"
    __table_args__ = (UniqueConstraint("survey_id", "webhook_id"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    survey_id: Mapped[int] = mapped_column(ForeignKey("surveys.id", ondelete="CASCADE"))
    webhook_id: Mapped[str] = mapped_column(String(WEBHOOK_ID_LENGTH))
    received_at: Mapped[dt.datetime] = mapped_column(UTCDateTime(), index=True)
    #: First 64 bits of the body's sha256 (hex): a webhook id reused for another body is
    #: refused. None for deliveries accepted before migration 0006.
    body_digest: Mapped[str | None] = mapped_column(String(16), default=None)


class Erasure(Base):
    """The audit line left by an erasure: who, when, and a keyed digest of the respondent id
    (which proves a given id was erased without keeping it)."""

    __tablename__ = "erasures"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    survey_id: Mapped[int] = mapped_column(ForeignKey("surveys.id", ondelete="CASCADE"))
    respondent_digest: Mapped[str] = mapped_column(String(64))
    erased_by: Mapped[str] = mapped_column(String(100))
    erased_at: Mapped[dt.datetime] = mapped_column(UTCDateTime(), default=utcnow)


class Job(Base):
    """A background job (re-screen, report, export) and what came of it (``service.jobs``).

    A worker takes a queued job with a conditional update (``state = 'queued'``), so that of
    several workers offered the same job only one runs it; while it runs it renews
    ``heartbeat_at``, and a running job whose heartbeat stopped is found stale.
    """

    __tablename__ = "jobs"
    __table_args__ = (Index("ix_jobs_survey_created", "survey_id", "created_at", "id"),)

    id: Mapped[str] = mapped_column(String(32), primary_key=True)
    kind: Mapped[JobKind] = mapped_column(_enum(JobKind, "job_kind"))
    survey_id: Mapped[int] = mapped_column(ForeignKey("surveys.id", ondelete="CASCADE"))
    #: The options the job was asked for (export format, respondents left out).
    options: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)
    state: Mapped[JobState] = mapped_column(_enum(JobState, "job_state"), index=True)
    #: 0..1, coarse (stages), with a short message naming the stage.
    progress: Mapped[float] = mapped_column(Float, default=0.0)
    message: Mapped[str] = mapped_column(String(200), default="")
    #: The name of the key that asked for it.
    requested_by: Mapped[str] = mapped_column(String(100))
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime())
    started_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime(), default=None)
    finished_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime(), default=None)
    heartbeat_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime(), default=None)
    #: Which worker runs it (host and process), for an operator reading the table.
    worker: Mapped[str | None] = mapped_column(String(200), default=None)
    #: How many times a worker took it (a stale job is queued again while attempts remain).
    attempts: Mapped[int] = mapped_column(Integer, default=0)
    #: A report's or export's file (in the job folder), or a re-screen's reply as JSON.
    result_path: Mapped[str | None] = mapped_column(Text, default=None)
    result: Mapped[dict[str, Any] | None] = mapped_column(JSON(none_as_null=True), default=None)
    #: Why it failed, in words that hold no respondent data (the error's type and stage).
    error: Mapped[str | None] = mapped_column(Text, default=None)
