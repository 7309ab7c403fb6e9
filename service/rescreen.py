"""Re-screening stored respondents: ``heedful rescreen`` and the nightly job.

One code path for ``heedful rescreen`` (everyone, a new reference, one transaction) and the
nightly job (only stale respondents, each chunk its own transaction): both find the screener
each respondent belongs to (``screening_targets``), read the stored answers in chunks into one
matrix (``read_stored``) and re-screen and write a chunk with ``rescreen_rows``; the stored
shape of a result is ``service.outcomes``'.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from sqlalchemy.orm import Session

from detectors import ResponseMatrix, fit_references
from detectors.screening import reference_detectors

from . import store
from .answers import matrix as stored_matrix
from .db import utcnow
from .models import ReferenceSample, Survey
from .outcomes import (
    StoredScreenings,
    detector_codes,
    flag_bits_of,
    result_columns,
    rewritten,
    screen_matrix,
    seconds_taken,
)
from .screeners import Screener, answers_fit, screener_for, uses_reference
from .settings import Settings

__all__ = [
    "RESCREEN_CHUNK",
    "READ_CHUNK",
    "Target",
    "screening_targets",
    "save_reference",
    "Stored",
    "read_stored",
    "RescreenCount",
    "rescreen_rows",
    "NewReference",
    "Rescreened",
    "rescreen",
]

#: Respondents screened and written per step of a re-screen (bounds memory).
RESCREEN_CHUNK = 50_000
#: Respondents read from storage per query while building a matrix (bounds memory).
READ_CHUNK = 50_000


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


def read_stored(
    session: Session,
    survey_id: int,
    target: Target,
    chunk: int = READ_CHUNK,
    progress: Callable[[int], None] | None = None,
) -> Stored:
    """Read the target's stored respondents ``chunk`` at a time into one matrix (the stored
    answer bytes of a chunk at once, durations as ``seconds_taken`` gives them);
    ``progress(rows_read)``."""
    items = target.screener.instrument.item_ids
    pks: list[np.ndarray] = []
    versions: list[np.ndarray] = []
    references: list[np.ndarray] = []
    durations: list[np.ndarray] = []
    answers: list[np.ndarray] = []
    ids: list[str] = []
    digests: list[str] = []
    withs: list[str | None] = []
    last = 0
    while True:
        rows = store.stored_answer_rows(session, survey_id, target.sources, last, chunk)
        if not rows:
            break
        pk, rid, version, codes, digest, seconds, reference, screened_with = zip(
            *rows, strict=True
        )
        block_pks = np.fromiter(pk, dtype=np.int64, count=len(rows))
        try:
            answers.append(stored_matrix(codes, len(items)))
        except ValueError as error:
            raise ValueError(
                f"the stored answers of respondents {rid[0]!r} to {rid[-1]!r} cannot be read "
                f"as answer records: {error}"
            ) from error
        block_seconds = np.array(seconds, dtype=np.float64)
        if np.isnan(block_seconds).any():
            for row in store.timed_rows(session, survey_id, int(block_pks[0]), int(block_pks[-1])):
                at = np.searchsorted(block_pks, row.id)
                if at < len(block_pks) and block_pks[at] == row.id:
                    block_seconds[at] = seconds_taken(row)
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
    before = StoredScreenings.read(session, pks)
    unchanged = before.found & (before.digests == stored.digests[positions])
    count.skipped = int((~unchanged).sum())
    before = before.take(unchanged)
    positions, pks, rescore = positions[unchanged], pks[unchanged], rescore[unchanged].copy()
    n = len(positions)
    if n == 0:
        return count
    screened = screen_matrix(screener, stored.matrix.take(positions), reference)
    codes = detector_codes(session, screened.names)
    names = screened.names
    sample = [name for name in names if name in screened.sample_names]
    new_bits = flag_bits_of(screened.flags, names, codes)
    # A detector that uses no reference gives a result that depends only on the answers and
    # the screener, so for a respondent stale only by its reference it is unchanged and stays
    # stored. As a check, the flags such detectors raise now are compared with the stored
    # ones; a respondent where they differ is rewritten whole.
    sample_bits = int(flag_bits_of(np.ones((len(sample), 1), bool), sample, codes)[0])
    rescore |= (before.flag_bits & ~sample_bits) != (new_bits & ~sample_bits)
    earlier = result_columns(before.results, codes, names)
    screenings = rewritten(
        screened, codes, keep=~rescore, before=before.results, before_kept=before.kept_evidence,
        rewrite=sample,
    )
    had_results = ~rescore | earlier.present.any(axis=1)
    state_changed = (earlier.present & (earlier.states != screened.states.T)).any(axis=1)
    changed = np.flatnonzero(
        had_results & (
            state_changed | (before.flag_bits != new_bits)
            | (before.verdicts != np.asarray(screenings.verdicts, dtype=object))
        )
    )
    versions = [type(screener.detectors[name]).version for name in names]
    store.insert_screening_history(
        session, *before.history(changed, earlier, codes, versions, screener.fingerprint, now)
    )
    store.update_screenings(
        session,
        screenings.update_rows(pks),
        {
            "reference_id": reference_id, "screened_at": now,
            "survey_version_id": screener.version_id, "screened_with": screener.fingerprint,
        },
    )
    count.rescreened = n
    count.changed = len(changed)
    count.results_written = len(sample) * n + (len(names) - len(sample)) * int(rescore.sum())
    return count


@dataclass(frozen=True)
class NewReference:
    """A reference sample estimated by a re-screen."""

    id: int
    version: int
    respondents: int
    detectors: list[str]
    created_at: dt.datetime


@dataclass
class Rescreened:
    """What ``rescreen`` did to a survey."""

    survey: str
    respondents: int
    references: list[NewReference]
    #: Version number to why it has no new reference sample.
    without_reference: dict[str, str]

    def reply(self) -> dict[str, Any]:
        """The reply in the documented shape (``schemas.RescreenReply``)."""
        return {
            "survey": self.survey,
            "respondents": self.respondents,
            "references": [
                {
                    "id": r.id, "version": r.version, "respondents": r.respondents,
                    "detectors": list(r.detectors), "created_at": r.created_at,
                }
                for r in self.references
            ],
            "without_reference": dict(self.without_reference),
        }


def rescreen(session: Session, survey: Survey, settings: Settings) -> Rescreened:
    """Estimate each screener's reference sample from its stored respondents (when there are
    enough), then re-score every stored respondent and record the reference it used.

    Respondents of an older survey version whose answers fit the current version (see
    :func:`answers_fit`) are re-screened with the current version and move to it.
    """
    references: list[NewReference] = []
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
                    NewReference(
                        sample.id, screener.number, n, reference_detectors(data), now
                    )
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
    return Rescreened(survey.survey, total, references, without)
