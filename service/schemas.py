"""What goes over the wire: input and public schemas per resource (table rows never do)."""

from __future__ import annotations

import datetime as dt
import unicodedata
from typing import Annotated, Any, Literal

from pydantic import (
    AfterValidator,
    AwareDatetime,
    BaseModel,
    ConfigDict,
    Field,
    StrictInt,
    StringConstraints,
    field_validator,
)

from .db import storable_time
from .models import Decision, Verdict

__all__ = [
    "ResponseIn",
    "BatchIn",
    "IngestReply",
    "RespondentOutcome",
    "RejectedRow",
    "RowProblem",
    "LintWarning",
    "SurveyRegistered",
    "SurveySummaryRow",
    "SurveyList",
    "SurveyDetail",
    "SurveySettingsIn",
    "SurveySettingsOut",
    "VersionInfo",
    "ReferenceInfo",
    "SecretRotated",
    "RescreenReply",
    "RespondentRow",
    "RespondentPage",
    "OutcomeOut",
    "ReviewIn",
    "ReviewOut",
    "HistoryEntry",
    "EarlierResult",
    "ScreeningHistoryEntry",
    "RespondentDetail",
    "DetectorTally",
    "DayTally",
    "SurveyReport",
    "DetectorInfo",
    "DetectorList",
    "Health",
    "ProblemOut",
    "FieldErrorOut",
    "ZonedTime",
    "MAX_META_DEPTH",
    "JobIn",
    "JobOut",
    "JobList",
]

VerdictField = Annotated[
    Verdict | None,
    Field(
        description="ok, review (one family of indices flags) or likely_careless (two or more, "
        "or a failed attention check with another flag). Evidence for a reviewer, not a decision."
    ),
]
CarelessScoreField = Annotated[
    float | None,
    Field(
        description="Share of the reference sample this respondent is more suspect than, in "
        "[0, 1], combining the carelessness indices; null before a reference sample exists."
    ),
]


def _printable_id(value: str) -> str:
    """Refuse control and format characters (Unicode Cc, Cf: NUL, zero-width, bidi controls):
    ids differing only by them look the same to a person, and NUL cannot be stored."""
    for position, character in enumerate(value):
        if unicodedata.category(character) in ("Cc", "Cf"):
            raise ValueError(
                f"respondent id holds a control or format character (U+{ord(character):04X}) "
                f"at position {position + 1}"
            )
    return value


def _without_nul(value: str) -> str:
    """Refuse NUL, which PostgreSQL cannot store in text (the other databases could)."""
    if "\x00" in value:
        raise ValueError(f"holds a NUL character at position {value.index(chr(0)) + 1}")
    return value


RespondentId = Annotated[
    str,
    StringConstraints(strip_whitespace=True, min_length=1, max_length=200),
    AfterValidator(_printable_id),
]
#: Deepest nesting of objects and lists in a respondent's ``meta`` (the JSON writer used for
#: storage stops at 254 levels; no survey platform needs more than a few).
MAX_META_DEPTH = 64


#: A time with a zone that can be stored in UTC.
ZonedTime = Annotated[AwareDatetime, AfterValidator(storable_time)]


def meta_depth(value: Any) -> int:
    """How deeply objects and lists nest in ``value`` (a scalar is 0), without recursion."""
    if not isinstance(value, dict | list):
        return 0
    deepest, stack = 0, [(value, 1)]
    while stack:
        node, depth = stack.pop()
        children = node.values() if isinstance(node, dict) else node
        deepest = max(deepest, depth)
        if deepest > MAX_META_DEPTH:
            break
        stack.extend((child, depth + 1) for child in children if isinstance(child, dict | list))
    return deepest


# Ingestion ---------------------------------------------------------------------------------------


class ResponseIn(BaseModel):
    """One completed response, as the survey platform sends it."""

    model_config = ConfigDict(
        extra="forbid",
        json_schema_extra={
            "examples": [
                {
                    "respondent_id": "v0001",
                    "answers": {"be01": 4, "be02": 2},
                    "submitted_at": "2027-05-04T09:30:00Z",
                    "duration_seconds": 412,
                    "meta": {"channel": "email"},
                }
            ]
        },
    )

    respondent_id: RespondentId
    answers: dict[str, StrictInt | None] = Field(
        description="Item id to the answer code; null or an absent item is unanswered."
    )
    started_at: ZonedTime | None = None
    submitted_at: ZonedTime | None = None
    duration_seconds: float | None = Field(default=None, ge=0)
    meta: dict[str, Any] | None = Field(
        default=None,
        description="Small free-form object, stored but never logged or screened; objects and "
        f"lists nested at most {MAX_META_DEPTH} levels deep.",
    )

    @field_validator("meta")
    @classmethod
    def _not_too_deep(cls, value: dict[str, Any] | None) -> dict[str, Any] | None:
        if value is not None and meta_depth(value) > MAX_META_DEPTH:
            raise ValueError(f"meta nests objects and lists more than {MAX_META_DEPTH} levels deep")
        return value


class BatchIn(BaseModel):
    """Several responses in one post."""

    model_config = ConfigDict(extra="forbid")

    responses: list[ResponseIn] = Field(min_length=1)


class RowProblem(BaseModel):
    item: str | None = Field(description="The item or field at fault; null for the whole row.")
    reason: str


class RejectedRow(BaseModel):
    row: int = Field(description="1-based position of the respondent in the post.")
    respondent_id: str | None
    problems: list[RowProblem]


class RespondentOutcome(BaseModel):
    respondent_id: str
    status: Literal["stored", "replaced", "duplicate"]
    flag_count: int
    flags: list[str] = Field(description="Detectors that raised a flag.")
    verdict: VerdictField = Field(
        default=None,
        description="Left out when the survey's `verdict_in_replies` setting is off. "
        "Evidence for a reviewer, not a decision about the person.",
    )
    careless_score: CarelessScoreField = Field(
        default=None,
        description="Left out when the survey's `verdict_in_replies` setting is off. "
        "Orders a reviewer's work; not a decision about the person.",
    )
    not_assessed: list[str] = Field(description="Detectors that could not judge this respondent.")


class IngestReply(BaseModel):
    model_config = ConfigDict(
        json_schema_extra={
            "examples": [
                {
                    "caution": "Flags, verdicts and careless scores are evidence for a human "
                    "reviewer's decision, not a verdict on a person. Do not cancel a complete, "
                    "withhold an incentive or exclude anyone automatically on this reply; have a "
                    "person read the evidence and record a review.",
                    "survey": "orchard-volunteers-2027",
                    "version": 1,
                    "received": 1,
                    "stored": 1,
                    "replaced": 0,
                    "duplicates": 0,
                    "replayed_delivery": False,
                    "rejected": [],
                    "results": [
                        {
                            "respondent_id": "v0001",
                            "status": "stored",
                            "flag_count": 1,
                            "flags": ["long_string"],
                            "verdict": "review",
                            "careless_score": None,
                            "not_assessed": ["mahalanobis"],
                        }
                    ],
                }
            ]
        }
    )

    caution: str = Field(
        description="What the reply may be used for: evidence for a person's review, never an "
        "automated decision about a respondent."
    )
    survey: str
    version: int = Field(description="The survey version the respondents were screened with.")
    received: int
    stored: int
    replaced: int
    duplicates: int
    replayed_delivery: bool = Field(
        description="True when this webhook-id was already accepted: nothing was processed again."
    )
    rejected: list[RejectedRow]
    results: list[RespondentOutcome]


# Surveys -----------------------------------------------------------------------------------------


class LintWarning(BaseModel):
    code: str
    location: str
    message: str


class SurveyRegistered(BaseModel):
    model_config = ConfigDict(
        json_schema_extra={
            "examples": [
                {
                    "survey": "orchard-volunteers-2027",
                    "title": "Volunteer survey 2027",
                    "version": 1,
                    "new_version": True,
                    "lint": [
                        {
                            "code": "short_scale",
                            "location": "scale 'belonging'",
                            "message": "has 2 item(s); a summed scale needs at least 4",
                        }
                    ],
                    "webhook_secret": "whsec_MfKQ9r8GKYqrTwjUPD8ILPZIo2LaLaSw",
                }
            ]
        }
    )

    survey: str
    title: str
    version: int
    new_version: bool = Field(description="False when the same document was already registered.")
    lint: list[LintWarning]
    webhook_secret: str


class VersionInfo(BaseModel):
    number: int
    created_at: dt.datetime


class ReferenceInfo(BaseModel):
    id: int
    version: int
    respondents: int
    detectors: list[str]
    created_at: dt.datetime


class SurveySummaryRow(BaseModel):
    survey: str
    title: str
    version: int
    respondents: int
    created_at: dt.datetime


class SurveyList(BaseModel):
    model_config = ConfigDict(
        json_schema_extra={
            "examples": [
                {
                    "data": [
                        {
                            "survey": "orchard-volunteers-2027",
                            "title": "Volunteer survey 2027",
                            "version": 1,
                            "respondents": 600,
                            "created_at": "2027-05-04T09:30:00Z",
                        }
                    ]
                }
            ]
        }
    )

    data: list[SurveySummaryRow]


class SurveyDetail(SurveySummaryRow):
    model_config = ConfigDict(
        json_schema_extra={
            "examples": [
                {
                    "survey": "pulse",
                    "title": "Pulse",
                    "version": 1,
                    "respondents": 0,
                    "created_at": "2027-05-04T09:30:00Z",
                    "versions": [{"number": 1, "created_at": "2027-05-04T09:30:00Z"}],
                    "reference": None,
                    "instrument": {
                        "survey": "pulse",
                        "response_format": {"points": 5},
                        "items": [{"id": "q01"}],
                    },
                    "webhook_secret": None,
                }
            ]
        }
    )

    versions: list[VersionInfo]
    reference: ReferenceInfo | None
    instrument: dict[str, Any]
    verdict_in_replies: bool = Field(
        default=True,
        description="Whether ingest replies carry each respondent's verdict and careless score "
        "(flags are always in them).",
    )
    webhook_secret: str | None = Field(default=None, description="Only shown to admin keys.")


class SurveySettingsIn(BaseModel):
    """Settings of a survey that are not part of its instrument."""

    model_config = ConfigDict(
        extra="forbid", json_schema_extra={"examples": [{"verdict_in_replies": False}]}
    )

    verdict_in_replies: bool | None = Field(
        default=None,
        description="false leaves the verdict and careless score out of ingest replies, for "
        "platforms that should not see them (they could be acted on without review); flags "
        "stay in. Left out: unchanged.",
    )


class SurveySettingsOut(BaseModel):
    survey: str
    verdict_in_replies: bool


class SecretRotated(BaseModel):
    model_config = ConfigDict(
        json_schema_extra={
            "examples": [
                {
                    "survey": "orchard-volunteers-2027",
                    "webhook_secret": "whsec_MfKQ9r8GKYqrTwjUPD8ILPZIo2LaLaSw",
                    "previous_secret_valid_until": "2027-05-04T09:30:00Z",
                }
            ]
        }
    )

    survey: str
    webhook_secret: str
    previous_secret_valid_until: dt.datetime


class RescreenReply(BaseModel):
    model_config = ConfigDict(
        json_schema_extra={
            "examples": [
                {
                    "survey": "orchard-volunteers-2027",
                    "respondents": 600,
                    "references": [
                        {
                            "id": 1,
                            "version": 1,
                            "respondents": 600,
                            "detectors": ["mahalanobis"],
                            "created_at": "2027-05-04T09:30:00Z",
                        }
                    ],
                    "without_reference": {},
                }
            ]
        }
    )

    survey: str
    respondents: int
    references: list[ReferenceInfo]
    without_reference: dict[str, str] = Field(
        description="Survey version number to why no reference sample could be estimated."
    )


# Respondents -------------------------------------------------------------------------------------


class RespondentRow(BaseModel):
    respondent_id: str
    flag_count: int
    flags: list[str]
    verdict: VerdictField
    careless_score: CarelessScoreField
    review_decision: Decision | None
    received_at: dt.datetime
    version: int


class RespondentPage(BaseModel):
    model_config = ConfigDict(
        json_schema_extra={
            "examples": [
                {
                    "data": [
                        {
                            "respondent_id": "v0042",
                            "flag_count": 2,
                            "flags": ["straightlining", "long_string"],
                            "verdict": "likely_careless",
                            "careless_score": 0.994,
                            "review_decision": None,
                            "received_at": "2027-05-04T09:30:00Z",
                            "version": 1,
                        }
                    ],
                    "next_cursor": "WyItZmxhZ19jb3VudCIsMiw0Ml0",
                }
            ]
        }
    )

    data: list[RespondentRow]
    next_cursor: str | None = Field(
        description="Pass as `cursor` for the next page; null on the last page."
    )


class OutcomeOut(BaseModel):
    detector: str
    detector_version: str
    state: Literal["assessed", "not_assessed", "not_applicable"]
    reason: str | None
    score: float | None
    cutoff: float | None
    flagged: bool
    evidence: dict[str, Any]
    sentence: str
    reference_id: int | None


class ReviewIn(BaseModel):
    model_config = ConfigDict(
        extra="forbid",
        json_schema_extra={
            "examples": [
                {
                    "decision": "exclude",
                    "note": "Read the answers: the same answer down all six grids, 9 of 10 "
                    "opposite pairs agreed with, and 33 items in 70 seconds. Three kinds of "
                    "evidence agree.",
                }
            ]
        },
    )

    decision: Decision
    note: Annotated[str, AfterValidator(_without_nul)] = Field(default="", max_length=5000)


class ReviewOut(BaseModel):
    model_config = ConfigDict(
        json_schema_extra={
            "examples": [
                {
                    "decision": "exclude",
                    "note": "Same answer on every page.",
                    "reviewer": "analyst-ana",
                    "created_at": "2027-05-04T09:30:00Z",
                }
            ]
        }
    )

    decision: Decision
    note: str
    reviewer: str
    created_at: dt.datetime


class HistoryEntry(BaseModel):
    answers: dict[str, Any]
    version: int
    received_at: dt.datetime
    replaced_at: dt.datetime
    flags: list[str]


class EarlierResult(BaseModel):
    version: str | None = Field(description="The detector's version that produced it.")
    state: Literal["assessed", "not_assessed", "not_applicable"]
    score: float | None
    flagged: bool


class ScreeningHistoryEntry(BaseModel):
    """An earlier screening result, kept because a re-screen changed it."""

    screened_at: dt.datetime = Field(description="When this result was produced.")
    replaced_at: dt.datetime = Field(description="When a re-screen replaced it.")
    version: int = Field(description="The survey version it was screened with.")
    reference_id: int | None = Field(description="The reference sample it was measured against.")
    flag_count: int
    flags: list[str]
    verdict: Verdict | None
    careless_score: float | None
    results: dict[str, EarlierResult] = Field(description="Each detector's result then.")


class RespondentDetail(BaseModel):
    model_config = ConfigDict(
        json_schema_extra={
            "examples": [
                {
                    "respondent_id": "v0042",
                    "version": 1,
                    "received_at": "2027-05-04T09:30:00Z",
                    "started_at": None,
                    "submitted_at": "2027-05-04T09:30:00Z",
                    "duration_seconds": 95.0,
                    "meta": None,
                    "answers": {"be01": 3, "be02": 3},
                    "flag_count": 1,
                    "flags": ["long_string"],
                    "verdict": "review",
                    "careless_score": 0.91,
                    "review_decision": None,
                    "results": [
                        {
                            "detector": "long_string",
                            "detector_version": "1",
                            "state": "assessed",
                            "reason": None,
                            "score": 32.0,
                            "cutoff": 14.0,
                            "flagged": True,
                            "evidence": {"run_length": 32, "answer": 3},
                            "sentence": "same answer, 3, on 32 items in a row, be01 to sa08",
                            "reference_id": None,
                        }
                    ],
                    "reviews": [],
                    "history": [],
                    "screening_history": [
                        {
                            "screened_at": "2027-05-04T09:30:00Z",
                            "replaced_at": "2027-05-05T02:00:00Z",
                            "version": 1,
                            "reference_id": None,
                            "flag_count": 0,
                            "flags": [],
                            "verdict": "ok",
                            "careless_score": None,
                            "results": {
                                "long_string": {
                                    "version": "1", "state": "assessed", "score": 9.0,
                                    "flagged": False,
                                }
                            },
                        }
                    ],
                }
            ]
        }
    )

    respondent_id: str
    version: int
    received_at: dt.datetime
    started_at: dt.datetime | None
    submitted_at: dt.datetime | None
    duration_seconds: float | None
    meta: dict[str, Any] | None
    answers: dict[str, Any]
    flag_count: int
    flags: list[str]
    verdict: VerdictField
    careless_score: CarelessScoreField
    verdict_reason: str | None = Field(
        default=None,
        description="Why the verdict, in one sentence: the counted families that flagged the "
        "respondent, or the careless score's own review hurdle (a verdict other than 'ok' "
        "without any flag). Null before the respondent has a verdict.",
    )
    review_decision: Decision | None
    results: list[OutcomeOut]
    reviews: list[ReviewOut]
    history: list[HistoryEntry]
    screening_history: list[ScreeningHistoryEntry] = Field(
        description="Earlier screening results that a re-screen changed, newest first."
    )


class DetectorTally(BaseModel):
    assessed: int
    flagged: int
    not_assessed: int
    not_applicable: int
    flag_rate: float | None = Field(description="flagged / assessed; null when none assessed.")


class DayTally(BaseModel):
    day: dt.date
    respondents: int
    flagged_any: int
    flagged: dict[str, int]


class SurveyReport(BaseModel):
    model_config = ConfigDict(
        json_schema_extra={
            "examples": [
                {
                    "survey": "orchard-volunteers-2027",
                    "respondents": 600,
                    "flagged_any": 71,
                    "reviewed": {"none": 598, "exclude": 2},
                    "detectors": {
                        "long_string": {
                            "assessed": 600,
                            "flagged": 18,
                            "not_assessed": 0,
                            "not_applicable": 0,
                            "flag_rate": 0.03,
                        }
                    },
                    "days": [
                        {
                            "day": "2027-05-04",
                            "respondents": 600,
                            "flagged_any": 71,
                            "flagged": {"long_string": 18},
                        }
                    ],
                }
            ]
        }
    )

    survey: str
    respondents: int
    flagged_any: int
    reviewed: dict[str, int]
    detectors: dict[str, DetectorTally]
    days: list[DayTally]


# Detectors, health, problems ---------------------------------------------------------------------


class DetectorInfo(BaseModel):
    name: str
    version: str
    family: str
    summary: str
    reference: str
    needs_sample: bool
    defaults: dict[str, Any]


class DetectorList(BaseModel):
    model_config = ConfigDict(
        json_schema_extra={
            "examples": [
                {
                    "data": [
                        {
                            "name": "long_string",
                            "version": "1",
                            "family": "invariance",
                            "summary": "Longest run of identical consecutive answers.",
                            "reference": "Johnson, J. A. (2005). ...",
                            "needs_sample": False,
                            "defaults": {
                                "run_cutoff": None,
                                "repeat_probability": 0.5,
                                "alpha": 0.001,
                            },
                        }
                    ]
                }
            ]
        }
    )

    data: list[DetectorInfo]


class Health(BaseModel):
    model_config = ConfigDict(json_schema_extra={"examples": [{"status": "ok"}]})

    status: Literal["ok"]


class FieldErrorOut(BaseModel):
    model_config = ConfigDict(extra="allow")

    pointer: str = Field(description="JSON pointer into the body (or query:NAME, path:NAME).")
    detail: str


class ProblemOut(BaseModel):
    """RFC 9457 problem details."""

    model_config = ConfigDict(
        extra="allow",
        title="Problem",
        json_schema_extra={
            "examples": [
                {
                    "type": "/problems/invalid-responses",
                    "title": "Invalid input",
                    "status": 422,
                    "detail": "1 problem(s) in the responses; nothing was stored.",
                    "instance": "/v1/surveys/orchard-volunteers-2027/responses",
                    "errors": [
                        {
                            "pointer": "#/responses/0/answers/be01",
                            "detail": "7 is outside the answer range 1..5",
                            "row": 1,
                            "respondent_id": "v0001",
                            "item": "be01",
                        }
                    ],
                }
            ]
        },
    )

    type: str
    title: str
    status: int
    detail: str
    instance: str
    errors: list[FieldErrorOut] | None = None


class JobIn(BaseModel):
    """A background job to start on a survey."""

    model_config = ConfigDict(
        extra="forbid",
        json_schema_extra={"examples": [{"kind": "export", "format": "sav",
                                         "without": ["excluded"]}]},
    )

    kind: Literal["rescreen", "report", "export", "nightly"] = Field(
        description="rescreen (admin): new reference sample and re-score everyone; report: the "
        "screening report; export: the survey as one file; nightly (admin): the nightly work "
        "for this survey (a new reference sample when due, stale results re-screened, the "
        "export and the report from one read)."
    )
    format: Literal["csv", "parquet", "sav", "dta"] = Field(
        default="csv", description="An export's format (export and nightly)."
    )
    without: list[Literal["excluded", "flagged"]] = Field(
        default_factory=list,
        description="An export leaves out `excluded` respondents (latest review `exclude`) "
        "and/or `flagged` ones (any flag, on evidence alone) (export and nightly).",
    )


class JobOut(BaseModel):
    """A background job: where it stands and, once done, where its result is."""

    model_config = ConfigDict(
        json_schema_extra={
            "examples": [
                {
                    "id": "5f0c9e2a71d4b3c8a6e1f047", "kind": "export",
                    "survey": "orchard-volunteers-2027",
                    "options": {"format": "sav", "without": ["excluded"]}, "state": "done",
                    "progress": 1.0, "message": "done", "requested_by": "analyst-ben",
                    "created_at": "2027-05-04T09:30:00Z", "started_at": "2027-05-04T09:30:01Z",
                    "finished_at": "2027-05-04T09:31:12Z", "attempts": 1,
                    "result": {"file": "orchard-volunteers-2027.sav", "format": "sav",
                               "respondents": 598, "left_out": 2, "without": ["excluded"]},
                    "result_url": "/v1/jobs/5f0c9e2a71d4b3c8a6e1f047/result", "error": None,
                }
            ]
        }
    )

    id: str
    kind: Literal["rescreen", "report", "export", "nightly"]
    survey: str
    options: dict[str, Any]
    state: Literal["queued", "running", "done", "failed", "cancelled"] = Field(
        description="queued, running, done, failed or cancelled."
    )
    progress: float = Field(description="0 to 1, by stages.")
    message: str = Field(description="The stage reached, in a few words.")
    requested_by: str = Field(description="The name of the key that started the job.")
    created_at: dt.datetime
    started_at: dt.datetime | None
    finished_at: dt.datetime | None
    attempts: int = Field(description="Times a worker started it (a stale job starts again).")
    result: dict[str, Any] | None = Field(
        description="A re-screen's reply (as `POST .../rescreen` gives it), or what an export "
        "or report wrote; null until done."
    )
    result_url: str | None = Field(description="Where the result is, once done.")
    error: str | None = Field(description="Why it failed (no respondent data).")


class JobList(BaseModel):
    """A survey's latest jobs, newest first."""

    model_config = ConfigDict(
        json_schema_extra={
            "examples": [
                {
                    "data": [
                        {
                            "id": "9a41be07c3d25f6e18b0d4c7", "kind": "report",
                            "survey": "orchard-volunteers-2027", "options": {},
                            "state": "running", "progress": 0.1,
                            "message": "reading the survey and drawing the figures",
                            "requested_by": "analyst-ben", "created_at": "2027-05-04T09:40:00Z",
                            "started_at": "2027-05-04T09:40:01Z", "finished_at": None,
                            "attempts": 1, "result": None, "result_url": None, "error": None,
                        }
                    ]
                }
            ]
        }
    )

    data: list[JobOut]
