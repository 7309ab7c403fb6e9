"""The screening use cases: ingest posted responses, re-screen a survey.

The one place where the engine meets the store; the webhook route, the CLI and the demo server
all call these functions, so no screening logic is written twice. Detectors are only ever
reached through the engine's registry (``build_detectors``), so a detector added to the
registry is screened, stored and reported here without a change.
"""

from __future__ import annotations

import datetime as dt
import json
import threading
from collections import OrderedDict
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from pydantic import TypeAdapter, ValidationError
from sqlalchemy import func, select
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
from detectors.verdict import RANKS_KEY, Verdicts, assess, reference_ranks

from . import store
from .db import utcnow
from .models import ReferenceSample, Respondent, Survey, SurveyVersion
from .problems import Problem, field_error
from .schemas import ResponseIn
from .settings import Settings

__all__ = [
    "Screener",
    "screener_for",
    "reference_data",
    "check_rows",
    "screen_matrix",
    "ingest",
    "ingest_many",
    "Submission",
    "IngestOptions",
    "DEFERRED",
    "rescreen",
    "NO_REFERENCE",
    "clear_caches",
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

    @property
    def sample_detectors(self) -> list[str]:
        return [name for name, d in self.detectors.items() if d.needs_sample]


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
    screener = Screener(
        version_id=version.id,
        number=version.number,
        instrument=instrument,
        detectors=build_detectors(instrument),
        item_index=dict(instrument.item_index),
    )
    _screeners.put(version_id, screener)
    return screener


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
                column = loc[-1] if loc and loc[0] == "answers" and len(loc) > 1 else (
                    loc[0] if loc else None
                )
                problems.append(ResponseProblem(position + 1, rid, column, entry["msg"]))
    return good, problems


def check_rows(screener: Screener, raw_rows: Sequence[Any], max_meta_bytes: int) -> Checked:
    """Validate posted rows against the schema and the survey version's items; build the matrix
    of the valid ones. Problems name the row (1-based), the respondent and the item."""
    parsed, problems = _schema_problems(raw_rows)
    index = screener.item_index
    instrument = screener.instrument
    seen: dict[str, int] = {}
    for position, row in parsed.items():
        unknown = row.answers.keys() - index.keys()
        for item in sorted(unknown):
            problems.append(
                ResponseProblem(
                    position + 1,
                    row.respondent_id,
                    item,
                    f"unknown item: not in version {screener.number} of survey "
                    f"{instrument.survey!r}",
                )
            )
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


def outcome_rows(screened: Screened, pks: Sequence[int], reference_id: int | None) -> list[tuple]:
    """One row per respondent and detector (in ``store.OUTCOME_COLUMNS`` order), for a bulk
    insert."""
    rows: list[tuple] = []
    n = len(pks)
    for name, version in zip(screened.names, screened.versions, strict=True):
        result = screened.results[name]
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


def _reply(plan: _Plan, received: int) -> dict[str, Any]:
    results = []
    for i in sorted(plan.outcome):
        status, summary, flags, waiting = plan.outcome[i]
        results.append(
            {
                "respondent_id": plan.ids[i], "status": status,
                "flag_count": summary["flag_count"], "flags": flags,
                "verdict": summary["verdict"], "careless_score": summary["careless_score"],
                "not_assessed": waiting,
            }
        )
    return {
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


def _stored_matrix(screener: Screener, rows: Sequence[Any]) -> ResponseMatrix:
    items = screener.instrument.item_ids
    values = np.array(
        [[row.answers.get(item) for item in items] for row in rows], dtype=np.float64
    ).reshape(len(rows), len(items))
    values[np.isnan(values)] = MISSING
    durations = np.array([_seconds_taken(row) for row in rows], dtype=np.float64)
    return ResponseMatrix(
        respondent_ids=np.array([row.respondent_id for row in rows], dtype=object),
        answers=values.astype(np.int8),
        durations=durations,
    )


def rescreen(session: Session, survey: Survey, settings: Settings) -> dict[str, Any]:
    """Estimate each version's reference sample from its stored respondents (when there are
    enough), then re-score every stored respondent and record the reference it used."""
    counts = dict(
        session.execute(
            select(Respondent.survey_version_id, func.count())
            .where(Respondent.survey_id == survey.id)
            .group_by(Respondent.survey_version_id)
        ).all()
    )
    references: list[dict[str, Any]] = []
    without: dict[str, str] = {}
    total = 0
    now = utcnow()
    for version_id in sorted(counts):
        screener = screener_for(session, version_id)
        stored = session.execute(
            select(
                Respondent.id, Respondent.respondent_id, Respondent.answers,
                Respondent.duration_seconds, Respondent.started_at, Respondent.submitted_at,
            )
            .where(Respondent.survey_id == survey.id, Respondent.survey_version_id == version_id)
            .order_by(Respondent.id)
        ).all()
        matrix = _stored_matrix(screener, stored)
        pks = [row.id for row in stored]
        n = len(pks)
        total += n
        reference_id: int | None = None
        reference: Mapping[str, Any] | None = None
        if screener.sample_detectors:
            if n >= settings.reference_min_respondents:
                data = fit_references(screener.instrument, matrix)
                sample = ReferenceSample(
                    survey_version_id=version_id, respondents=n, data=data, created_at=now
                )
                session.add(sample)
                session.flush()
                reference_id, reference = sample.id, data
                references.append(
                    {
                        "id": sample.id, "version": screener.number, "respondents": n,
                        "detectors": sorted(k for k in data if k != RANKS_KEY), "created_at": now,
                    }
                )
            else:
                without[str(screener.number)] = (
                    f"{n} stored respondent(s); a reference sample needs at least "
                    f"{settings.reference_min_respondents} (HEEDFUL_REFERENCE_MIN_RESPONDENTS)"
                )
                latest = session.scalar(
                    select(ReferenceSample)
                    .where(ReferenceSample.survey_version_id == version_id)
                    .order_by(ReferenceSample.id.desc())
                )
                if latest is not None:
                    reference_id, reference = latest.id, latest.data
        if version_id == survey.current_version_id:
            survey.current_reference_id = reference_id
        for start in range(0, n, RESCREEN_CHUNK):
            part = np.arange(start, min(n, start + RESCREEN_CHUNK))
            chunk_pks = pks[start : start + RESCREEN_CHUNK]
            screened = screen_matrix(screener, matrix.take(part), reference)
            store.delete_outcomes(session, chunk_pks)
            store.insert_outcomes(session, outcome_rows(screened, chunk_pks, reference_id))
            updates = []
            for k, pk in enumerate(chunk_pks):
                updates.append(
                    {
                        "pk": pk, **_summary_columns(screened, k),
                        "reference_id": reference_id, "screened_at": now,
                    }
                )
            store.update_screening(session, updates)
    if survey.current_version_id not in counts:
        survey.current_reference_id = None
    session.flush()
    return {
        "survey": survey.survey,
        "respondents": total,
        "references": references,
        "without_reference": without,
    }
