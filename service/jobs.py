"""The screening use cases: ingest posted responses, re-screen a survey.

The one place where the engine meets the store; the webhook route, the CLI and the demo server
all call these functions, so no screening logic is written twice. Detectors are only ever
reached through the engine's registry (``build_detectors``), so a detector added to the
registry is screened, stored and reported here without a change.
"""

from __future__ import annotations

import datetime as dt
import io
import json
import threading
from collections import OrderedDict
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from pydantic import TypeAdapter, ValidationError
from sqlalchemy.orm import Session

from detectors import (
    MISSING,
    DetectorResult,
    Instrument,
    ResponseDataError,
    ResponseMatrix,
    ResponseProblem,
    State,
    build_detectors,
    fit_references,
    parse_instrument,
)
from detectors.calibration import apply as apply_calibration
from detectors.screening import calibration_kinds, reference_calibration, reference_detectors
from detectors.verdict import Verdicts, assess, reference_ranks

from . import store
from .db import utcnow
from .models import ReferenceSample, Survey, SurveyVersion
from .problems import Problem, field_error
from .schemas import ResponseIn
from .settings import Settings

__all__ = [
    "BodyFieldProblem",
    "INGEST_CAUTION",
    "Screener",
    "screener_for",
    "reference_data",
    "check_rows",
    "screen_matrix",
    "answer_codes",
    "ingest",
    "ingest_many",
    "Submission",
    "IngestOptions",
    "DEFERRED",
    "rescreen",
    "NO_REFERENCE",
    "clear_caches",
    "screener_fingerprint",
    "answers_fit",
    "Target",
    "screening_targets",
    "uses_reference",
    "save_reference",
    "Stored",
    "read_stored",
    "RescreenCount",
    "rescreen_rows",
]

#: Reason stored for a sample-dependent detector before the survey has a reference sample.
NO_REFERENCE = "no reference sample yet"
#: Respondents screened and written per step of a re-screen (bounds memory).
RESCREEN_CHUNK = 50_000
_ROWS = TypeAdapter(list[ResponseIn])
_ROW = TypeAdapter(ResponseIn)


# Per-version screening objects, built once per process ------------------------------------------


@dataclass(frozen=True, eq=False)
class Screener:
    """A survey version's parsed instrument and detector objects."""

    version_id: int
    number: int
    instrument: Instrument
    detectors: dict[str, Any]
    item_index: dict[str, int]
    #: See :func:`screener_fingerprint`; stored with every result as ``screened_with``.
    fingerprint: str = ""

    @property
    def sample_detectors(self) -> list[str]:
        """Detectors whose result depends on the reference sample: those that need one, and
        those whose cut-off is calibrated from it."""
        calibrated = calibration_kinds(self.instrument, self.detectors)
        return [
            name for name, d in self.detectors.items() if d.needs_sample or name in calibrated
        ]


class _LRU:
    def __init__(self, size: int):
        self.size = size
        self.items: OrderedDict[Any, Any] = OrderedDict()
        self.lock = threading.Lock()

    def get(self, key: Any) -> Any:
        with self.lock:
            value = self.items.get(key)
            if value is not None:
                self.items.move_to_end(key)
            return value

    def put(self, key: Any, value: Any) -> None:
        with self.lock:
            self.items[key] = value
            self.items.move_to_end(key)
            while len(self.items) > self.size:
                self.items.popitem(last=False)

    def clear(self) -> None:
        with self.lock:
            self.items.clear()


# Versions and references never change once written, so caching them needs no invalidation.
_screeners = _LRU(128)
_references = _LRU(128)


def clear_caches() -> None:
    _screeners.clear()
    _references.clear()


def screener_for(session: Session, version_id: int) -> Screener:
    cached = _screeners.get(version_id)
    if cached is not None:
        return cached
    version = session.get(SurveyVersion, version_id)
    if version is None:
        raise LookupError(f"survey version {version_id} does not exist")
    instrument = parse_instrument(version.document)
    detectors = build_detectors(instrument)
    screener = Screener(
        version_id=version.id,
        number=version.number,
        instrument=instrument,
        detectors=detectors,
        item_index=dict(instrument.item_index),
        fingerprint=screener_fingerprint(version.digest, detectors),
    )
    _screeners.put(version_id, screener)
    return screener


def screener_fingerprint(document_digest: str, detectors: Mapping[str, Any]) -> str:
    """A digest of what a result depends on besides the answers and the reference sample: the
    version's instrument document (its digest) and the name and version of every detector.

    A stored result whose fingerprint differs from its screener's current one was produced by
    other code or settings (a detector added, removed or changed its version) and is stale.
    """
    return store.canonical_digest(
        {
            "instrument": document_digest,
            "detectors": {name: type(d).version for name, d in detectors.items()},
        }
    )


def reference_data(session: Session, reference_id: int | None) -> Mapping[str, Any] | None:
    if reference_id is None:
        return None
    cached = _references.get(reference_id)
    if cached is not None:
        return cached
    reference = session.get(ReferenceSample, reference_id)
    if reference is None:
        return None
    _references.put(reference_id, reference.data)
    return reference.data


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


def _schema_problems(
    raw_rows: Sequence[Any],
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
            rid = raw.get("respondent_id") if isinstance(raw, dict) else None
            rid = rid.strip() if isinstance(rid, str) and rid.strip() else None
            for entry in error.errors():
                loc = [str(p) for p in entry["loc"]]
                if loc and loc[0] == "answers" and len(loc) > 1:
                    problems.append(ResponseProblem(position + 1, rid, loc[1], entry["msg"]))
                else:
                    column = loc[0] if loc else None
                    problems.append(BodyFieldProblem(position + 1, rid, column, entry["msg"]))
    return good, problems


def _answer_problems(
    screener: Screener, position: int, respondent_id: str | None, answers: dict[str, Any]
) -> list[ResponseProblem]:
    """Unknown items and answers out of range in one row's answers (its type errors are
    reported by the schema), so that a row failing the schema still has every problem listed."""
    index, instrument = screener.item_index, screener.instrument
    problems = []
    for item, value in answers.items():
        if item not in index:
            problems.append(
                ResponseProblem(
                    position + 1, respondent_id, item,
                    f"unknown item: not in version {screener.number} of survey "
                    f"{instrument.survey!r}",
                )
            )
            continue
        j = index[item]
        if isinstance(value, int) and not isinstance(value, bool) and not (
            instrument.lowest[j] <= value <= instrument.highest[j]
        ):
            problems.append(
                ResponseProblem(
                    position + 1, respondent_id, item,
                    f"{value:g} is outside the answer range "
                    f"{instrument.lowest[j]}..{instrument.highest[j]}",
                )
            )
    return problems


def check_rows(screener: Screener, raw_rows: Sequence[Any], max_meta_bytes: int) -> Checked:
    """Validate posted rows against the schema and the survey version's items; build the matrix
    of the valid ones. Problems name the row (1-based), the respondent and the item."""
    parsed, problems = _schema_problems(raw_rows)
    instrument = screener.instrument
    for position, raw in enumerate(raw_rows):
        if position in parsed or not isinstance(raw, dict):
            continue
        answers = raw.get("answers")
        if isinstance(answers, dict):
            rid = raw.get("respondent_id")
            rid = rid.strip() if isinstance(rid, str) and rid.strip() else None
            problems.extend(
                _answer_problems(screener, position, rid, {str(k): v for k, v in answers.items()})
            )
    seen: dict[str, int] = {}
    for position, row in parsed.items():
        unknown = dict.fromkeys(sorted(row.answers.keys() - screener.item_index.keys()))
        problems.extend(_answer_problems(screener, position, row.respondent_id, unknown))
        if row.meta is not None and max_meta_bytes >= 0:
            size = len(json.dumps(row.meta, separators=(",", ":")).encode("utf-8"))
            if size > max_meta_bytes:
                problems.append(
                    ResponseProblem(
                        position + 1, row.respondent_id, "meta",
                        f"meta is {size} bytes as JSON; at most {max_meta_bytes} are accepted",
                    )
                )
        if row.respondent_id in seen:
            first = seen[row.respondent_id]
            for where in (first, position):
                problems.append(
                    ResponseProblem(
                        where + 1, row.respondent_id, "respondent_id",
                        f"respondent id appears more than once in this post (rows {first + 1} "
                        f"and {position + 1})",
                    )
                )
        else:
            seen[row.respondent_id] = position
    positions = sorted(parsed)
    rows = [parsed[p] for p in positions]
    items = instrument.item_ids
    values = np.array(
        [[row.answers.get(item) for item in items] for row in rows], dtype=np.float64
    ).reshape(len(rows), len(items))
    present = ~np.isnan(values)
    outside = present & ((values < instrument.lowest) | (values > instrument.highest))
    for r, j in zip(*np.nonzero(outside), strict=True):
        problems.append(
            ResponseProblem(
                positions[r] + 1,
                rows[r].respondent_id,
                items[j],
                f"{values[r, j]:g} is outside the answer range "
                f"{instrument.lowest[j]}..{instrument.highest[j]}",
            )
        )
    values[~present | outside] = MISSING
    bad = {p.row - 1 for p in problems if p.row is not None}
    keep = np.array([p not in bad for p in positions], dtype=bool)
    durations = np.array([_seconds_taken(row) for row in rows], dtype=np.float64)
    matrix = ResponseMatrix(
        respondent_ids=np.array([row.respondent_id for row in rows], dtype=object)[keep],
        answers=values.astype(np.int8)[keep],
        durations=durations[keep],
    )
    problems.sort(key=lambda p: (p.row or 0))
    return Checked(
        rows=[row for row, k in zip(rows, keep.tolist(), strict=True) if k],
        positions=[p for p, k in zip(positions, keep.tolist(), strict=True) if k],
        matrix=matrix,
        problems=problems,
        bad_positions=bad,
    )


def _seconds_taken(row: Any) -> float:
    """The response's duration: ``duration_seconds`` when given, else ``submitted_at -
    started_at`` when both are known (NaN when neither, or when the difference is negative)."""
    if row.duration_seconds is not None:
        return row.duration_seconds
    if row.started_at is None or row.submitted_at is None:
        return np.nan
    seconds = (row.submitted_at - row.started_at).total_seconds()
    return seconds if seconds >= 0 else np.nan


def answers_digest(answers: Mapping[str, int | None]) -> str:
    """Digest of the answered items only: an explicit null and an absent item are the same."""
    return store.canonical_digest({k: v for k, v in answers.items() if v is not None})


# Screening -------------------------------------------------------------------------------------


@dataclass
class Screened:
    """Every detector's outcome for a matrix, ready to store."""

    names: list[str]
    versions: list[str]
    results: dict[str, DetectorResult | None]  # None: sample detector without a reference
    flags: np.ndarray  # bool (detectors, respondents)
    states: np.ndarray  # int8 (detectors, respondents)
    sample_names: set[str]  # detectors whose result depends on the reference sample
    verdicts: Verdicts  # verdict and careless score under the instrument's policy

    def flag_names(self, i: int) -> list[str]:
        return [self.names[d] for d in np.flatnonzero(self.flags[:, i])]

    def not_assessed(self, i: int) -> list[str]:
        return [self.names[d] for d in np.flatnonzero(self.states[:, i] != State.ASSESSED)]


def screen_matrix(
    screener: Screener, matrix: ResponseMatrix, reference: Mapping[str, Any] | None
) -> Screened:
    """Run every registered detector; a sample-dependent one only with a stored reference."""
    n = matrix.n_respondents
    names = list(screener.detectors)
    results: dict[str, DetectorResult | None] = {}
    flags = np.zeros((len(names), n), dtype=bool)
    states = np.full((len(names), n), State.NOT_ASSESSED, dtype=np.int8)
    for d, (name, detector) in enumerate(screener.detectors.items()):
        if detector.needs_sample and (reference is None or name not in reference):
            results[name] = None
            continue
        given = reference[name] if detector.needs_sample and reference is not None else None
        result = detector.screen(screener.instrument, matrix, given)
        results[name] = result
        flags[d] = result.flags
        states[d] = result.states
    calibration = reference_calibration(screener.instrument, screener.detectors, reference)
    if calibration is not None:
        results = apply_calibration(results, calibration, screener.detectors)
        for d, name in enumerate(names):
            if results[name] is not None:
                flags[d] = results[name].flags
    versions = [type(d).version for d in screener.detectors.values()]
    verdicts = assess(screener.instrument.verdict, results, reference_ranks(reference), n)
    return Screened(
        names, versions, results, flags, states, set(screener.sample_detectors), verdicts
    )


def _finite(values: np.ndarray) -> list[float | None]:
    return [None if v != v or v in (np.inf, -np.inf) else v for v in values.tolist()]


def _plain(value: Any) -> Any:
    """One evidence value as a plain Python value (as ``DetectorResult.evidence_for`` does)."""
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and value != value:
        return None
    return value


def _evidence_columns(result: DetectorResult) -> list[dict[str, Any]]:
    """Every respondent's evidence as plain values, converted column by column (the same values
    as ``result.evidence_for(i)``, without a per-respondent pass over numpy scalars)."""
    n = len(result)
    columns: dict[str, list[Any]] = {}
    for key, values in result.evidence.items():
        array = np.asarray(values)
        if array.dtype == object:
            columns[key] = [_plain(value) for value in values]
            continue
        listed = array.tolist()
        if array.dtype.kind == "f" and array.ndim == 1 and np.isnan(array).any():
            listed = [None if v != v else v for v in listed]
        columns[key] = listed
    keys = list(columns)
    return [dict(zip(keys, row, strict=True)) for row in zip(*columns.values(), strict=True)] if (
        keys
    ) else [{} for _ in range(n)]


def outcome_rows(
    screened: Screened,
    pks: Sequence[int],
    reference_id: int | None,
    only: Mapping[str, np.ndarray] | None = None,
) -> list[tuple]:
    """One row per respondent and detector (in ``store.OUTCOME_COLUMNS`` order), for a bulk
    insert; with ``only``, just the rows of the given respondent positions per detector."""
    rows: list[tuple] = []
    n = len(pks)
    for name, version in zip(screened.names, screened.versions, strict=True):
        result = screened.results[name]
        wanted = None if only is None else only.get(name, np.zeros(0, dtype=np.intp))
        if wanted is not None:
            if len(wanted) == 0:
                continue
            if len(wanted) < n:
                rows.extend(_some_outcome_rows(screened, name, version, pks, reference_id, wanted))
                continue
        if result is None:
            sentence = f"{name}: not assessed ({NO_REFERENCE})."
            empty = store.json_text({})
            rows.extend(
                (pk, name, version, int(State.NOT_ASSESSED), None, None, False, NO_REFERENCE,
                 empty, sentence, None)
                for pk in pks
            )
            continue
        scores, cutoffs = _finite(result.scores), _finite(result.cutoffs)
        flags, states = result.flags.tolist(), result.states.tolist()
        reasons = result.reasons.tolist()
        evidence = _evidence_columns(result)
        uses_reference = reference_id if name in screened.sample_names else None
        describe, item_ids = result.describe, result.item_ids
        for i in range(n):
            if states[i] == State.ASSESSED:
                sentence = describe(evidence[i], item_ids)
            else:
                sentence = result.sentence_for(i)
            rows.append(
                (pks[i], name, version, states[i], scores[i], cutoffs[i], flags[i], reasons[i],
                 store.json_text(evidence[i]), sentence, uses_reference)
            )
    return rows


def _some_outcome_rows(
    screened: Screened,
    name: str,
    version: str,
    pks: Sequence[int],
    reference_id: int | None,
    wanted: np.ndarray,
) -> list[tuple]:
    """``outcome_rows`` of one detector for the respondent positions ``wanted`` only."""
    result = screened.results[name]
    if result is None:
        sentence = f"{name}: not assessed ({NO_REFERENCE})."
        empty = store.json_text({})
        return [
            (pks[i], name, version, int(State.NOT_ASSESSED), None, None, False, NO_REFERENCE,
             empty, sentence, None)
            for i in wanted.tolist()
        ]
    uses_reference = reference_id if name in screened.sample_names else None
    rows = []
    for i in wanted.tolist():
        evidence = result.evidence_for(i)
        score, cutoff = _finite(result.scores[i : i + 1])[0], _finite(result.cutoffs[i : i + 1])[0]
        rows.append(
            (pks[i], name, version, int(result.states[i]), score, cutoff, bool(result.flags[i]),
             result.reasons[i], store.json_text(evidence), result.sentence_for(i), uses_reference)
        )
    return rows


def _summary_columns(screened: Screened, i: int) -> dict[str, Any]:
    """The respondent row's screening summary: flag count, flag names, verdict, careless score."""
    names = screened.flag_names(i)
    careless = float(screened.verdicts.careless_score[i])
    return {
        "flag_count": len(names),
        "flags": ",".join(names),
        "verdict": screened.verdicts.verdict[i],
        "careless_score": None if careless != careless else careless,
    }


# Ingestion -------------------------------------------------------------------------------------


@dataclass(frozen=True)
class IngestOptions:
    replace: bool = False
    partial: bool = False
    webhook_id: str | None = None


@dataclass
class Submission:
    """One post to ingest: the survey id, its decoded rows and options, and the caller checks.

    ``authorize(session)`` runs first (a key check), ``verify(survey)`` once the survey is
    found (a webhook signature); either raises a ``Problem`` to refuse the post.
    """

    survey: str
    rows: Sequence[Any]
    options: IngestOptions = field(default_factory=IngestOptions)
    authorize: Callable[[Session], None] | None = None
    verify: Callable[[Survey], None] | None = None


class Deferred:
    """Result of a submission that touches a respondent claimed by an earlier submission of the
    same call: process it again after the others are committed."""


DEFERRED = Deferred()


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
    rejected: list[dict[str, Any]] = field(default_factory=list)
    outcome: dict[int, tuple[str, int, list[str], list[str]]] = field(default_factory=dict)


_CONFLICT = (
    "respondent already stored with different answers; post again with ?replace=true to "
    "replace them (the earlier answers are kept in history)"
)


def ingest(
    session: Session,
    survey: Survey,
    raw_rows: Sequence[Any],
    options: IngestOptions,
    settings: Settings,
) -> dict[str, Any]:
    """Check, screen and store one post's responses; return the reply (see ``IngestReply``).

    Raises ``ResponseDataError`` (any invalid row of an all-or-nothing post) or a 409
    ``Problem`` (a respondent already stored with other answers, without ``replace``).
    The caller commits; nothing is written when this raises.
    """
    [result] = ingest_many(session, [Submission(survey.survey, raw_rows, options)], settings)
    if isinstance(result, BaseException):
        raise result
    assert isinstance(result, dict)
    return result


def ingest_many(
    session: Session, submissions: Sequence[Submission], settings: Settings
) -> list[dict[str, Any] | BaseException | Deferred]:
    """Ingest several posts in the caller's transaction, screening their respondents together.

    Returns, per submission, its reply, the exception that refused it (a ``Problem`` or a
    ``ResponseDataError``; a refused submission writes nothing), or :data:`DEFERRED`.
    Everything is checked before anything is written, so committing stores exactly the
    accepted submissions.
    """
    results: list[dict[str, Any] | BaseException | Deferred] = [DEFERRED] * len(submissions)
    surveys: dict[str, Survey | None] = {}
    plans: list[_Plan] = []
    for index, submission in enumerate(submissions):
        try:
            if submission.authorize is not None:
                submission.authorize(session)
            if submission.survey not in surveys:
                surveys[submission.survey] = store.get_survey(session, submission.survey)
            survey = surveys[submission.survey]
            if survey is None:
                raise Problem(
                    404, f"No survey {submission.survey!r} is registered.", kind="unknown-survey"
                )
            if submission.verify is not None:
                submission.verify(survey)
            if survey.current_version_id is None:
                raise Problem(409, "The survey has no registered version.", kind="no-version")
            screener = screener_for(session, survey.current_version_id)
            checked = check_rows(screener, submission.rows, settings.max_meta_bytes)
            if checked.problems and not submission.options.partial:
                raise ResponseDataError(checked.problems)
        except (Problem, ResponseDataError) as error:
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
    seen_deliveries: dict[int, set[str]] = {}
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
        plan.replayed = webhook_id is not None and webhook_id in seen_deliveries[survey_id]
        stored_rows = existing[survey_id]
        conflicts = []
        for i, (rid, digest) in enumerate(zip(plan.ids, plan.digests, strict=True)):
            stored = stored_rows.get(rid)
            if stored is None:
                (plan.duplicates if plan.replayed else plan.new).append(i)
            elif plan.replayed or stored.answers_digest == digest:
                plan.duplicates.append(i)
            elif plan.options.replace:
                plan.replaced.append(i)
            else:
                conflicts.append(i)
        plan.rejected = _rejected_rows(plan.checked)
        if conflicts:
            positions = plan.checked.positions
            if not plan.options.partial:
                results[plan.index] = Problem(
                    409,
                    f"{len(conflicts)} respondent(s) are already stored with different "
                    "answers; nothing was stored.",
                    kind="respondent-conflict",
                    errors=[
                        field_error(
                            f"#/responses/{positions[i]}/respondent_id", _CONFLICT,
                            row=positions[i] + 1, respondent_id=plan.ids[i],
                        )
                        for i in conflicts
                    ],
                )
                continue
            plan.rejected.extend(
                {
                    "row": positions[i] + 1,
                    "respondent_id": plan.ids[i],
                    "problems": [{"item": "respondent_id", "reason": _CONFLICT}],
                }
                for i in conflicts
            )
            plan.rejected.sort(key=lambda r: r["row"])
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
    waiting = store.not_assessed_of(session, waiting_pks) if waiting_pks else {}
    deliveries = []
    for plan in accepted:
        stored_rows = existing[plan.survey.id]
        for i in plan.duplicates:
            stored = stored_rows.get(plan.ids[i])
            flags = [] if stored is None or not stored.flags else stored.flags.split(",")
            summary = {
                "flag_count": len(flags),
                "verdict": None if stored is None else str(stored.verdict),
                "careless_score": None if stored is None else stored.careless_score,
            }
            plan.outcome[i] = (
                "duplicate", summary, flags, [] if stored is None else waiting.get(stored.id, [])
            )
        if plan.options.webhook_id is not None and not plan.replayed:
            deliveries.append(
                {"survey_id": plan.survey.id, "webhook_id": plan.options.webhook_id,
                 "received_at": now}
            )
        results[plan.index] = _reply(plan, len(submissions[plan.index].rows))
    store.record_deliveries(session, deliveries)
    return results


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
    new_values, old_values, pks_in_order = [], [], []
    new_positions = []
    k = 0
    for plan, rows in parts:
        replaced = set(plan.replaced)
        for i in rows:
            row = plan.checked.rows[i]
            summary = _summary_columns(screened, k)
            values = {
                "survey_version_id": screener.version_id,
                "answers": row.answers,
                "answers_digest": plan.digests[i],
                "started_at": row.started_at,
                "submitted_at": row.submitted_at,
                "duration_seconds": row.duration_seconds,
                "meta": row.meta,
                "received_at": now,
                "screened_at": now,
                "reference_id": used_reference,
                "screened_with": screener.fingerprint,
                **summary,
            }
            if i in replaced:
                pk = stored_rows[plan.ids[i]].id
                old_values.append({"pk": pk, **values})
                pks_in_order.append(pk)
            else:
                new_values.append(
                    {"survey_id": survey.id, "respondent_id": row.respondent_id, **values}
                )
                new_positions.append(len(pks_in_order))
                pks_in_order.append(None)
            plan.outcome[i] = (
                "replaced" if i in replaced else "stored",
                summary,
                screened.flag_names(k),
                screened.not_assessed(k),
            )
            k += 1
    for position, pk in zip(
        new_positions, store.insert_respondents(session, new_values), strict=True
    ):
        pks_in_order[position] = pk
    store.replace_respondents(session, old_values, now)
    store.insert_outcomes(session, outcome_rows(screened, pks_in_order, used_reference))


#: Carried by every ingest reply: the survey platform reads it, and it is the component most
#: likely to act on a reply without a person (cancel a complete, withhold an incentive).
INGEST_CAUTION = (
    "Flags, verdicts and careless scores are evidence for a human reviewer's decision, not a "
    "verdict on a person. Do not cancel a complete, withhold an incentive or exclude anyone "
    "automatically on this reply; have a person read the evidence and record a review."
)


def _reply(plan: _Plan, received: int) -> dict[str, Any]:
    results = []
    with_verdict = plan.survey.verdict_in_replies
    for i in sorted(plan.outcome):
        status, summary, flags, waiting = plan.outcome[i]
        result = {
            "respondent_id": plan.ids[i], "status": status,
            "flag_count": summary["flag_count"], "flags": flags,
        }
        if with_verdict:
            result["verdict"] = summary["verdict"]
            result["careless_score"] = summary["careless_score"]
        result["not_assessed"] = waiting
        results.append(result)
    return {
        "caution": INGEST_CAUTION,
        "survey": plan.survey.survey,
        "version": plan.screener.number,
        "received": received,
        "stored": len(plan.new),
        "replaced": len(plan.replaced),
        "duplicates": len(plan.duplicates),
        "replayed_delivery": plan.replayed,
        "rejected": plan.rejected,
        "results": results,
    }


def _rejected_rows(checked: Checked) -> list[dict[str, Any]]:
    by_row: dict[int, dict[str, Any]] = {}
    for p in checked.problems:
        assert p.row is not None
        entry = by_row.setdefault(
            p.row, {"row": p.row, "respondent_id": p.respondent_id, "problems": []}
        )
        entry["problems"].append({"item": p.column, "reason": p.reason})
    return [by_row[r] for r in sorted(by_row)]


# Re-screening ----------------------------------------------------------------------------------
#
# One code path for ``heedful rescreen`` (everyone, a new reference, one transaction) and the
# nightly job (only stale respondents, each chunk its own transaction): both find the screener
# each respondent belongs to (``screening_targets``), read the stored answers in chunks into one
# matrix (``read_stored``) and re-screen and write a chunk with ``rescreen_rows``.

#: Respondents read from storage per query while building a matrix (bounds memory).
READ_CHUNK = 50_000


def answers_fit(older: Instrument, newer: Instrument) -> bool:
    """True when answers stored under ``older`` mean the same under ``newer``: the same items in
    the same presentation order, each with the same answer range. Only then may a respondent of
    the older version be re-screened with the newer one."""
    return (
        older.item_ids == newer.item_ids
        and np.array_equal(older.lowest, newer.lowest)
        and np.array_equal(older.highest, newer.highest)
    )


@dataclass
class Target:
    """A screener and the survey versions whose respondents are (re-)screened with it: the
    version itself and older versions whose answers fit it (see :func:`answers_fit`)."""

    screener: Screener
    sources: list[int] = field(default_factory=list)
    respondents: int = 0
    latest_arrival: dt.datetime | None = None


def screening_targets(session: Session, survey: Survey) -> list[Target]:
    """The screeners that the survey's stored respondents are to be screened with now: the
    current version's for respondents of the current version and of older versions whose
    answers fit it, the respondent's own version's otherwise."""
    counts = store.respondent_counts(session, survey.id)
    current = (
        screener_for(session, survey.current_version_id)
        if survey.current_version_id is not None
        else None
    )
    targets: dict[int, Target] = {}
    for version_id in sorted(counts):
        screener = screener_for(session, version_id)
        if current is not None and answers_fit(screener.instrument, current.instrument):
            screener = current
        target = targets.setdefault(screener.version_id, Target(screener))
        n, latest = counts[version_id]
        target.sources.append(version_id)
        target.respondents += n
        if target.latest_arrival is None or (latest is not None and latest > target.latest_arrival):
            target.latest_arrival = latest
    return [targets[version_id] for version_id in sorted(targets)]


def uses_reference(screener: Screener) -> bool:
    """Whether the screener's results depend on a reference sample."""
    return bool(screener.sample_detectors)


def save_reference(
    session: Session, screener: Screener, respondents: int, data: dict[str, Any],
    now: dt.datetime,
) -> ReferenceSample:
    sample = ReferenceSample(
        survey_version_id=screener.version_id, respondents=respondents, data=data, created_at=now
    )
    session.add(sample)
    session.flush()
    return sample


@dataclass(frozen=True, eq=False)
class Stored:
    """A target's stored respondents, by id: their answers as a matrix and what their stored
    results were produced with."""

    pks: np.ndarray  # int64, ascending
    matrix: ResponseMatrix
    digests: np.ndarray  # object: answers_digest
    version_ids: np.ndarray  # int64: survey_version_id
    reference_ids: np.ndarray  # int64: reference_id, -1 for none
    screened_with: np.ndarray  # object: fingerprint, None before fingerprints were kept

    def __len__(self) -> int:
        return len(self.pks)

    def stale(self, screener: Screener, reference_id: int | None) -> tuple[np.ndarray, np.ndarray]:
        """(stale, rescore): which respondents' results are stale, and which of those were
        produced by another screener (so every detector's result is rewritten).

        A result is stale when the respondent belongs to an older survey version that the
        screener's version replaces, when it was produced with another reference sample than
        ``reference_id`` (or with none), or when its fingerprint differs from the screener's.
        """
        rescore = (self.version_ids != screener.version_id) | (
            self.screened_with != screener.fingerprint
        )
        wanted = -1 if reference_id is None else reference_id
        return rescore | (self.reference_ids != wanted), rescore


def answer_codes(texts: Sequence[str], items: tuple[str, ...]) -> np.ndarray:
    """int8 answer codes (rows x items) from the stored JSON texts of answers, parsed in one
    vectorised pass (Arrow's JSON reader); null or absent answers become ``MISSING``."""
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.json as pa_json

    codes = np.full((len(texts), len(items)), MISSING, dtype=np.int8)
    if not texts:
        return codes
    joined = "\n".join(texts)
    if joined.count("\n") != len(texts) - 1:  # a document stored over several lines
        joined = "\n".join(" ".join(text.splitlines()) for text in texts)
    schema = pa.schema([(item, pa.int64()) for item in items])
    table = pa_json.read_json(
        io.BytesIO(joined.encode("utf-8")),
        read_options=pa_json.ReadOptions(block_size=16 << 20),
        parse_options=pa_json.ParseOptions(
            explicit_schema=schema, unexpected_field_behavior="ignore"
        ),
    )
    if table.num_rows != len(texts):
        raise ValueError(f"{len(texts)} stored answer records gave {table.num_rows} rows")
    for j, item in enumerate(items):
        codes[:, j] = pc.fill_null(table.column(item), int(MISSING)).to_numpy()
    return codes


def read_stored(
    session: Session,
    survey_id: int,
    target: Target,
    chunk: int = READ_CHUNK,
    progress: Callable[[int], None] | None = None,
) -> Stored:
    """Read the target's stored respondents ``chunk`` at a time into one matrix (answers parsed
    column-wise, durations as ``_seconds_taken`` gives them); ``progress(rows_read)``."""
    items = target.screener.instrument.item_ids
    pks, ids, versions, digests, references, withs, durations, answers = ([] for _ in range(8))
    last = 0
    while True:
        rows = store.stored_answer_rows(session, survey_id, target.sources, last, chunk)
        if not rows:
            break
        pk, rid, version, text, digest, seconds, reference, screened_with = zip(*rows, strict=True)
        block_pks = np.fromiter(pk, dtype=np.int64, count=len(rows))
        try:
            answers.append(answer_codes(text, items))
        except (ValueError, TypeError) as error:  # Arrow's parse errors are ValueErrors
            raise ValueError(
                f"the stored answers of respondents {rid[0]!r} to {rid[-1]!r} cannot be read "
                f"as answer records: {error}"
            ) from error
        block_seconds = np.array(seconds, dtype=np.float64)
        if np.isnan(block_seconds).any():
            for row in store.timed_rows(session, survey_id, int(block_pks[0]), int(block_pks[-1])):
                at = np.searchsorted(block_pks, row.id)
                if at < len(block_pks) and block_pks[at] == row.id:
                    block_seconds[at] = _seconds_taken(row)
        pks.append(block_pks)
        ids.extend(rid)
        versions.append(np.fromiter(version, dtype=np.int64, count=len(rows)))
        digests.extend(digest)
        references.append(
            np.fromiter((-1 if r is None else r for r in reference), np.int64, len(rows))
        )
        withs.extend(screened_with)
        durations.append(block_seconds)
        last = int(block_pks[-1])
        if progress is not None:
            progress(len(ids))

    def stacked(parts: list[np.ndarray], dtype: Any) -> np.ndarray:
        return np.concatenate(parts) if parts else np.zeros(0, dtype=dtype)

    matrix = ResponseMatrix(
        respondent_ids=np.array(ids, dtype=object),
        answers=(
            np.concatenate(answers) if answers else np.zeros((0, len(items)), dtype=np.int8)
        ),
        durations=stacked(durations, np.float64),
    )
    return Stored(
        pks=stacked(pks, np.int64),
        matrix=matrix,
        digests=np.array(digests, dtype=object),
        version_ids=stacked(versions, np.int64),
        reference_ids=stacked(references, np.int64),
        screened_with=np.array(withs, dtype=object),
    )


@dataclass
class RescreenCount:
    """What re-screening some respondents did."""

    rescreened: int = 0
    #: Respondents whose result changed (an earlier result kept in the screening history).
    changed: int = 0
    #: Respondents left alone: erased, or given new answers, since their answers were read.
    skipped: int = 0
    #: Detector results written.
    results_written: int = 0

    def add(self, other: RescreenCount) -> None:
        self.rescreened += other.rescreened
        self.changed += other.changed
        self.skipped += other.skipped
        self.results_written += other.results_written


@dataclass
class _Earlier:
    """One detector's stored results for a chunk of respondents (aligned with the chunk)."""

    present: np.ndarray
    version: np.ndarray
    state: np.ndarray
    flagged: np.ndarray
    score: np.ndarray
    cutoff: np.ndarray


def _empty_earlier(n: int) -> _Earlier:
    return _Earlier(
        present=np.zeros(n, dtype=bool),
        version=np.full(n, None, dtype=object),
        state=np.full(n, -1, dtype=np.int8),
        flagged=np.zeros(n, dtype=bool),
        score=np.full(n, np.nan),
        cutoff=np.full(n, np.nan),
    )


def _place(earlier: _Earlier, pks: np.ndarray, rows: Sequence[Sequence[Any]]) -> None:
    """Put stored results (respondent_pk, version, state, flagged, score, cutoff) at the
    positions of their respondents in the ascending ``pks``."""
    if not rows:
        return
    pk, version, state, flagged, score, cutoff = zip(*rows, strict=True)
    found = np.fromiter(pk, dtype=np.int64, count=len(rows))
    at = np.minimum(np.searchsorted(pks, found), len(pks) - 1)
    hit = pks[at] == found  # rows of respondents outside the chunk are ignored
    where = at[hit]
    earlier.present[where] = True
    earlier.version[where] = np.array(version, dtype=object)[hit]
    earlier.state[where] = np.array(state, dtype=np.int8)[hit]
    earlier.flagged[where] = np.array(flagged, dtype=bool)[hit]
    earlier.score[where] = np.array(score, dtype=np.float64)[hit]
    earlier.cutoff[where] = np.array(cutoff, dtype=np.float64)[hit]


def _earlier_results(
    session: Session, pks: np.ndarray, names: Sequence[str]
) -> dict[str, _Earlier]:
    """The named detectors' stored results for the (ascending) respondent ``pks``, read as
    columns along the chunk's id range."""
    low, high = int(pks[0]), int(pks[-1])
    out = {}
    for name in names:
        out[name] = _empty_earlier(len(pks))
        _place(out[name], pks, store.outcome_values(session, name, low, high))
    return out


def _earlier_of_some(
    session: Session, pks: np.ndarray, some: np.ndarray, names: Sequence[str]
) -> dict[str, _Earlier]:
    """As :func:`_earlier_results` (aligned with all of ``pks``), filled in only at the
    positions ``some``: read by id when they are few, along the id range otherwise."""
    if len(some) * 4 >= len(pks):
        return _earlier_results(session, pks, names)
    wanted = pks[some]
    few = {name: _empty_earlier(len(wanted)) for name in names}
    by_detector: dict[str, list[tuple]] = {}
    for row in store.outcome_values_of(session, wanted.tolist(), names):
        by_detector.setdefault(row[1], []).append((row[0], *row[2:]))
    for name, rows in by_detector.items():
        _place(few[name], wanted, rows)
    out = {}
    for name, part in few.items():
        out[name] = _empty_earlier(len(pks))
        for column in ("present", "version", "state", "flagged", "score", "cutoff"):
            getattr(out[name], column)[some] = getattr(part, column)
    return out


def rescreen_rows(
    session: Session,
    screener: Screener,
    stored: Stored,
    positions: np.ndarray,
    reference_id: int | None,
    reference: Mapping[str, Any] | None,
    now: dt.datetime,
    rescore: np.ndarray | None = None,
) -> RescreenCount:
    """Re-screen the stored respondents at ``positions`` (ascending) with ``screener`` against
    the reference sample ``reference_id``, and write the results in the caller's transaction.

    Every detector's result is rewritten for respondents in ``rescore`` (produced by another
    screener; by default as ``Stored.stale`` finds). For the others (stale only because of
    the reference sample) only the reference-based detectors' results are rewritten: the other
    detectors' results depend only on the answers and the screener, which did not change. As a
    check, a respondent whose other detectors now raise different flags than stored is
    rewritten whole. The respondent's summary (flags, verdict, careless score), reference,
    survey version, screener fingerprint and screening time are always updated. When the
    result changed (the flags raised, the verdict, or the state of a detector judged both
    times), the earlier one is kept in the screening history first. Respondents erased or
    given new answers since ``stored`` was read are left alone.
    """
    count = RescreenCount()
    positions = np.asarray(positions, dtype=np.intp)
    if rescore is None:
        rescore = stored.stale(screener, reference_id)[1][positions]
    pks = stored.pks[positions]
    summaries_before = store.screening_rows(session, pks.tolist())
    unchanged = np.array(
        [
            (row := summaries_before.get(pk)) is not None and row.answers_digest == digest
            for pk, digest in zip(pks.tolist(), stored.digests[positions].tolist(), strict=True)
        ],
        dtype=bool,
    )
    count.skipped = int((~unchanged).sum())
    positions, pks, rescore = positions[unchanged], pks[unchanged], rescore[unchanged]
    n = len(positions)
    if n == 0:
        return count
    screened = screen_matrix(screener, stored.matrix.take(positions), reference)
    names = screened.names
    sample = {name for name in names if name in screened.sample_names}
    # A detector that uses no reference gives a result that depends only on the answers and
    # the screener, so for a respondent stale only by its reference it is unchanged and stays
    # stored. As a check, the flags such detectors raise now are compared with the stored
    # ones; a respondent where they differ is rewritten whole.
    others = [d for d, name in enumerate(names) if name not in sample]
    for k in np.flatnonzero(~rescore).tolist():
        now_flagged = [names[d] for d in others if screened.flags[d, k]]
        stored_flags = summaries_before[int(pks[k])].flags
        was_flagged = [f for f in stored_flags.split(",") if f and f not in sample]
        if now_flagged != was_flagged:
            rescore[k] = True
    earlier = _earlier_results(session, pks, [name for name in names if name in sample])
    if rescore.any():  # results of the other detectors, where they are rewritten too
        earlier.update(
            _earlier_of_some(
                session, pks, np.flatnonzero(rescore),
                [name for name in names if name not in sample],
            )
        )
    had_results = ~rescore.copy()
    state_changed = np.zeros(n, dtype=bool)
    write: dict[str, np.ndarray] = {}
    replace_single: list[dict[str, Any]] = []
    for d, name in enumerate(names):
        old = earlier.get(name)
        if old is not None:
            had_results |= old.present
            state_changed |= old.present & (old.state != screened.states[d])
        if name in sample:
            write[name] = np.arange(n)
            single = np.flatnonzero(~rescore & old.present)
            replace_single.extend({"pk": pk, "detector": name} for pk in pks[single].tolist())
        else:
            write[name] = np.flatnonzero(rescore)
    summaries = [_summary_columns(screened, k) for k in range(n)]
    changed = [
        k for k, pk in enumerate(pks.tolist())
        if had_results[k] and (
            state_changed[k]
            or summaries_before[pk].flags != summaries[k]["flags"]
            or str(summaries_before[pk].verdict) != str(summaries[k]["verdict"])
        )
    ]
    # The history keeps every detector's earlier result; read those not read yet.
    unread = np.array([k for k in changed if not rescore[k]], dtype=np.intp)
    if len(unread):
        other_names = [name for name in names if name not in sample]
        extra = _earlier_of_some(session, pks, unread, other_names)
        for name in other_names:
            if name not in earlier:
                earlier[name] = extra[name]
                continue
            for column in ("present", "version", "state", "flagged", "score", "cutoff"):
                getattr(earlier[name], column)[unread] = getattr(extra[name], column)[unread]
    history = []
    for k in changed:
        pk = int(pks[k])
        before = summaries_before[pk]
        history.append(
            {
                "respondent_pk": pk,
                "survey_version_id": before.survey_version_id,
                "reference_id": before.reference_id,
                "screened_at": before.screened_at,
                "replaced_at": now,
                "flag_count": before.flag_count,
                "flags": before.flags,
                "verdict": before.verdict,
                "careless_score": before.careless_score,
                "results": {
                    name: {
                        "version": earlier[name].version[k],
                        "state": State(int(earlier[name].state[k])).label,
                        "score": (
                            None if np.isnan(earlier[name].score[k])
                            else float(earlier[name].score[k])
                        ),
                        "flagged": bool(earlier[name].flagged[k]),
                    }
                    for name in names
                    if name in earlier and earlier[name].present[k]
                },
            }
        )
    store.insert_screening_history(session, history)
    store.delete_outcomes(session, pks[rescore & had_results].tolist())
    store.delete_outcome_rows(session, replace_single)
    rows = outcome_rows(screened, pks.tolist(), reference_id, only=write)
    store.insert_outcomes(session, rows)
    store.update_screening(
        session,
        [
            {
                "pk": pk, **summaries[k], "reference_id": reference_id, "screened_at": now,
                "survey_version_id": screener.version_id, "screened_with": screener.fingerprint,
            }
            for k, pk in enumerate(pks.tolist())
        ],
    )
    count.rescreened = n
    count.changed = len(history)
    count.results_written = len(rows)
    return count


def rescreen(session: Session, survey: Survey, settings: Settings) -> dict[str, Any]:
    """Estimate each screener's reference sample from its stored respondents (when there are
    enough), then re-score every stored respondent and record the reference it used.

    Respondents of an older survey version whose answers fit the current version (see
    :func:`answers_fit`) are re-screened with the current version and move to it.
    """
    references: list[dict[str, Any]] = []
    without: dict[str, str] = {}
    total = 0
    now = utcnow()
    targets = screening_targets(session, survey)
    for target in targets:
        screener = target.screener
        stored = read_stored(session, survey.id, target)
        n = len(stored)
        total += n
        reference_id: int | None = None
        reference: Mapping[str, Any] | None = None
        if uses_reference(screener):
            if n >= settings.reference_min_respondents:
                data = fit_references(screener.instrument, stored.matrix)
                sample = save_reference(session, screener, n, data, now)
                reference_id, reference = sample.id, data
                references.append(
                    {
                        "id": sample.id, "version": screener.number, "respondents": n,
                        "detectors": reference_detectors(data),
                        "created_at": now,
                    }
                )
            else:
                without[str(screener.number)] = (
                    f"{n} stored respondent(s); a reference sample needs at least "
                    f"{settings.reference_min_respondents} (HEEDFUL_REFERENCE_MIN_RESPONDENTS)"
                )
                latest = store.latest_reference(session, screener.version_id)
                if latest is not None:
                    reference_id, reference = latest.id, latest.data
        if screener.version_id == survey.current_version_id:
            survey.current_reference_id = reference_id
        everyone = np.arange(n)
        for start in range(0, n, RESCREEN_CHUNK):
            part = everyone[start : start + RESCREEN_CHUNK]
            rescreen_rows(
                session, screener, stored, part, reference_id, reference, now,
                rescore=np.ones(len(part), dtype=bool),
            )
    if survey.current_version_id not in {t.screener.version_id for t in targets}:
        survey.current_reference_id = None
    session.flush()
    return {
        "survey": survey.survey,
        "respondents": total,
        "references": references,
        "without_reference": without,
    }
