"""The one code that turns a screening into stored rows and stored rows back into results.

Writing: :func:`screen_matrix` runs a screener over a matrix (:class:`Screened`);
:func:`outcome_rows` gives the detector rows to store and :meth:`Screened.summary` each
respondent's :class:`Summary` (flag set, verdict, careless score). Reading: :class:`Summary`
and :class:`StoredResult` are what the rest of the service gets back (states as the library's
:class:`~detectors.State`, the flag set as a tuple of detector names); how the flag set is
kept in a column (:func:`flags_column`, :func:`flag_set`) is known here and in no other module.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np
from sqlalchemy import case, func, literal, select
from sqlalchemy.orm import Session

from detectors import REGISTRY, DetectorResult, ResponseMatrix, State
from detectors.calibration import apply as apply_calibration
from detectors.screening import reference_calibration
from detectors.verdict import Verdicts, assess, reference_ranks

from . import store
from .models import DetectorOutcome, Respondent, Verdict
from .screeners import Screener

__all__ = [
    "NO_REFERENCE",
    "Screened",
    "screen_matrix",
    "Summary",
    "OutcomeRow",
    "outcome_rows",
    "StoredResult",
    "results_of",
    "flag_set",
    "flags_column",
    "evidence_columns",
    "assessed_scores",
    "detector_tallies",
    "assessed_sample",
    "flag_set_counts",
]

#: Reason stored for a sample-dependent detector before the survey has a reference sample.
NO_REFERENCE = "no reference sample yet"


# The flag set in a column ------------------------------------------------------------------------


def flags_column(names: Sequence[str]) -> str:
    """The stored form of a flag set: detector names in registry order, comma-separated."""
    return ",".join(names)


def flag_set(stored: str | None) -> tuple[str, ...]:
    """A stored flag set back as detector names ("" and None are no flags)."""
    return tuple(stored.split(",")) if stored else ()


# A respondent's summary --------------------------------------------------------------------------


@dataclass(frozen=True)
class Summary:
    """A respondent's screening summary: the flags raised, the verdict, the careless score."""

    flags: tuple[str, ...]
    verdict: Verdict
    careless_score: float | None

    @property
    def flag_count(self) -> int:
        return len(self.flags)

    def columns(self) -> dict[str, Any]:
        """The respondent row's summary columns."""
        return {
            "flag_count": self.flag_count,
            "flags": flags_column(self.flags),
            "verdict": self.verdict,
            "careless_score": self.careless_score,
        }

    @classmethod
    def stored(cls, flags: str | None, verdict: Any, careless_score: float | None) -> Summary:
        """A summary from a respondent (or history) row's columns."""
        return cls(flag_set(flags), Verdict(verdict), careless_score)


# Screening ---------------------------------------------------------------------------------------


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

    def summary(self, i: int) -> Summary:
        careless = float(self.verdicts.careless_score[i])
        return Summary(
            flags=tuple(self.flag_names(i)),
            verdict=Verdict(self.verdicts.verdict[i]),
            careless_score=None if careless != careless else careless,
        )


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
            if (calibrated := results[name]) is not None:
                flags[d] = calibrated.flags
    versions = [type(d).version for d in screener.detectors.values()]
    verdicts = assess(screener.instrument.verdict, results, reference_ranks(reference), n)
    return Screened(
        names, versions, results, flags, states, set(screener.sample_detectors), verdicts
    )


# Detector rows -----------------------------------------------------------------------------------


class OutcomeRow(NamedTuple):
    """One detector's result for one respondent, as stored (``store.OUTCOME_COLUMNS``)."""

    respondent_pk: int
    detector: str
    detector_version: str
    state: int  # a State code
    score: float | None
    cutoff: float | None
    flagged: bool
    reason: str | None
    evidence: str  # JSON text
    sentence: str
    reference_id: int | None


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


def evidence_columns(result: DetectorResult) -> list[dict[str, Any]]:
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


def _without_reference(name: str, version: str, pks: Sequence[int]) -> list[OutcomeRow]:
    sentence = f"{name}: not assessed ({NO_REFERENCE})."
    empty = store.json_text({})
    return [
        OutcomeRow(pk, name, version, int(State.NOT_ASSESSED), None, None, False, NO_REFERENCE,
                   empty, sentence, None)
        for pk in pks
    ]


def outcome_rows(
    screened: Screened,
    pks: Sequence[int],
    reference_id: int | None,
    only: Mapping[str, np.ndarray] | None = None,
) -> list[OutcomeRow]:
    """One row per respondent and detector, for a bulk insert; with ``only``, just the rows of
    the given respondent positions per detector."""
    rows: list[OutcomeRow] = []
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
            rows.extend(_without_reference(name, version, pks))
            continue
        scores, cutoffs = _finite(result.scores), _finite(result.cutoffs)
        flags, states = result.flags.tolist(), result.states.tolist()
        reasons = result.reasons.tolist()
        evidence = evidence_columns(result)
        uses_reference = reference_id if name in screened.sample_names else None
        describe, item_ids = result.describe, result.item_ids
        for i in range(n):
            if states[i] == State.ASSESSED:
                sentence = describe(evidence[i], item_ids)
            else:
                sentence = result.sentence_for(i)
            rows.append(
                OutcomeRow(
                    pks[i], name, version, states[i], scores[i], cutoffs[i], flags[i],
                    reasons[i], store.json_text(evidence[i]), sentence, uses_reference,
                )
            )
    return rows


def _some_outcome_rows(
    screened: Screened,
    name: str,
    version: str,
    pks: Sequence[int],
    reference_id: int | None,
    wanted: np.ndarray,
) -> list[OutcomeRow]:
    """``outcome_rows`` of one detector for the respondent positions ``wanted`` only."""
    result = screened.results[name]
    if result is None:
        return _without_reference(name, version, [pks[i] for i in wanted.tolist()])
    uses_reference = reference_id if name in screened.sample_names else None
    rows = []
    for i in wanted.tolist():
        evidence = result.evidence_for(i)
        score, cutoff = _finite(result.scores[i : i + 1])[0], _finite(result.cutoffs[i : i + 1])[0]
        rows.append(
            OutcomeRow(
                pks[i], name, version, int(result.states[i]), score, cutoff,
                bool(result.flags[i]), result.reasons[i], store.json_text(evidence),
                result.sentence_for(i), uses_reference,
            )
        )
    return rows


# Reading results back ----------------------------------------------------------------------------


@dataclass(frozen=True)
class StoredResult:
    """One detector's stored result for a respondent."""

    detector: str
    detector_version: str
    state: State
    score: float | None
    cutoff: float | None
    flagged: bool
    reason: str | None
    evidence: dict[str, Any]
    sentence: str
    reference_id: int | None


def results_of(session: Session, pk: int) -> list[StoredResult]:
    """A respondent's stored detector results, in registry order."""
    order = {name: i for i, name in enumerate(REGISTRY)}
    rows = sorted(
        store.outcomes_of(session, pk), key=lambda o: order.get(o.detector, len(order))
    )
    return [
        StoredResult(
            detector=o.detector, detector_version=o.detector_version, state=State(o.state),
            score=o.score, cutoff=o.cutoff, flagged=o.flagged, reason=o.reason,
            evidence=o.evidence, sentence=o.sentence, reference_id=o.reference_id,
        )
        for o in rows
    ]


#: Respondents whose results are counted per query (bounds memory).
TALLY_RESPONDENTS = 50_000


def detector_tallies(session: Session, survey_id: int, pks: np.ndarray) -> dict[str, Counter]:
    """Per detector, respondents by ``State`` and how many it flagged (key ``"flagged"``), for
    the survey's respondents ``pks`` (ascending), read a range of respondents at a time."""
    tallies: dict[str, Counter] = {}
    for start in range(0, len(pks), TALLY_RESPONDENTS):
        low, high = int(pks[start]), int(pks[min(start + TALLY_RESPONDENTS, len(pks)) - 1])
        in_range = session.scalar(select(func.count()).where(Respondent.id.between(low, high)))
        # Without other surveys' respondents in the range, no row needs checking.
        only = None if in_range == min(TALLY_RESPONDENTS, len(pks) - start) else survey_id
        for name, state, flagged, n in store.outcome_tallies(session, only, low, high):
            tally = tallies.setdefault(name, Counter())
            tally[State(int(state))] += int(n)
            if flagged:
                tally["flagged"] += int(n)
    return tallies


def assessed_sample(session: Session, pks: np.ndarray) -> dict[str, list[tuple]]:
    """Per detector, (score, flagged, cutoff) of its assessed results for respondents ``pks``."""
    samples: dict[str, list[tuple]] = {}
    for name, flagged, score, cutoff in store.outcome_sample(session, pks.tolist()):
        samples.setdefault(name, []).append((score, flagged, cutoff))
    return samples


def flag_set_counts(session: Session, survey_id: int) -> list[tuple[tuple[str, ...], int]]:
    """Each flag set raised in the survey (at least one flag) and its number of respondents."""
    return [
        (flag_set(flags), int(n)) for flags, n in store.flag_set_counts(session, survey_id)
    ]


#: Outcome rows converted to numbers per step (bounds the memory of one chunk's results).
OUTCOME_BATCH = 250_000


def assessed_scores(
    session: Session, detectors: Sequence[str], pks: np.ndarray
) -> tuple[np.ndarray, np.ndarray, int]:
    """Scores and flags (float, NaN unless assessed) of ``pks`` (sorted), shape
    (n, detectors), and the number of results of detectors not in ``detectors``.

    Only assessed results are read (the others are empty in the export). The detector's name
    comes back as its number (a CASE in the query), so every row converts to numbers at once
    and is put in place with array indexing (``tests/benchmarks/bench_export.py``).
    """
    n, d = len(pks), len(detectors)
    scores = np.full((n, d), np.nan)
    flags = np.full((n, d), np.nan)
    unknown = 0
    if n == 0:
        return scores, flags, unknown
    code = case(
        {name: number for number, name in enumerate(detectors)},
        value=DetectorOutcome.detector, else_=-1,
    ) if d else literal(-1)
    result = session.connection().execute(
        select(DetectorOutcome.respondent_pk, code, DetectorOutcome.score, DetectorOutcome.flagged)
        .where(
            DetectorOutcome.respondent_pk.between(int(pks[0]), int(pks[-1])),
            DetectorOutcome.state == int(State.ASSESSED),
        )
    )
    # Every column is a plain number, so the driver's tuples are used as they come: row
    # objects would cost more than the query (``tests/benchmarks/bench_export.py``).
    cursor = result.cursor
    while part := cursor.fetchmany(OUTCOME_BATCH):
        values = np.array(part, dtype=np.float64).reshape(len(part), 4)
        found = values[:, 0].astype(np.int64)
        position = np.searchsorted(pks, found)
        # The range may hold other surveys' respondents: keep this chunk's.
        mine = (position < n) & (pks[np.minimum(position, n - 1)] == found)
        number = values[:, 1].astype(np.int64)
        unknown += int((mine & (number < 0)).sum())
        mine &= number >= 0
        scores[position[mine], number[mine]] = values[mine, 2]
        flags[position[mine], number[mine]] = values[mine, 3]
    result.close()
    return scores, flags, unknown


