"""A survey's stored respondents and results as columns: one read shared by the export and
the report.

:func:`read_survey` reads every stored respondent of a survey along the primary key, a chunk
at a time, and turns each chunk into columns at once (answer bytes with numpy, times as a
column, results with ``outcomes.result_columns``), so no Python runs per respondent beyond
the database driver's rows. The nightly job reads a survey once and hands the same
:class:`SurveyData` to ``exports.write_export`` and ``reports.build_report``; the API and the
commands let each read on its own (the export a chunk at a time, :func:`survey_parts`).
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from sqlalchemy.orm import Session

from detectors import MISSING

from . import store
from .answers import matrix as stored_matrix
from .models import Decision, Survey, SurveyVersion
from .outcomes import (
    DetectorCodes,
    ResultColumns,
    detector_codes,
    join_columns,
    registry_sorted,
    result_columns,
)
from .screeners import Screener, screener_for

__all__ = ["READ_CHUNK", "SurveyItems", "survey_items", "SurveyData", "survey_parts", "read_survey"]

#: Respondents read and converted per query (bounds the rows the driver holds at once).
READ_CHUNK = 50_000


@dataclass(frozen=True)
class SurveyItems:
    """A survey's versions and the items of all of them: the current version's items in
    presentation order, then items only earlier versions had (newest version first)."""

    versions: list[SurveyVersion]
    screeners: dict[int, Screener]
    numbers: dict[int, int]
    items: list[str]
    #: Version id to the columns of ``items`` its instrument's items are, in its order.
    columns: dict[int, np.ndarray]


def survey_items(session: Session, survey: Survey) -> SurveyItems:
    """The versions, screeners and item columns of a survey."""
    versions = store.versions_of(session, survey.id)
    numbers = {v.id: v.number for v in versions}
    screeners = {v.id: screener_for(session, v.id) for v in versions}
    newest_first = sorted(versions, key=lambda v: (v.id != survey.current_version_id, -v.number))
    items: dict[str, int] = {}
    for version in newest_first:
        for item in screeners[version.id].instrument.item_ids:
            items.setdefault(item, len(items))
    columns = {
        v.id: np.array([items[item] for item in screeners[v.id].instrument.item_ids], np.intp)
        for v in versions
    }
    return SurveyItems(versions, screeners, numbers, list(items), columns)


@dataclass(frozen=True, eq=False)
class SurveyData:
    """Stored respondents of a survey (ascending id), a column per stored field.

    ``answers`` holds every respondent's answers in the columns of ``layout.items``
    (``MISSING`` where unanswered or not an item of the respondent's version); times are
    ``datetime64[us]`` in UTC (NaT where none); ``reference_ids`` is -1 where none; verdicts
    and review decisions are their stored values (None where none); ``results`` holds every
    detector with a code (registry order, then others by name).
    """

    layout: SurveyItems
    pks: np.ndarray
    respondent_ids: np.ndarray
    version_ids: np.ndarray
    answers: np.ndarray
    received_at: np.ndarray
    submitted_at: np.ndarray
    started_at: np.ndarray
    durations: np.ndarray
    reference_ids: np.ndarray
    flag_counts: np.ndarray
    flag_bits: np.ndarray
    verdicts: np.ndarray
    careless_scores: np.ndarray
    decisions: np.ndarray
    results: ResultColumns

    def __len__(self) -> int:
        return len(self.pks)

    _ROW_FIELDS = (
        "pks", "respondent_ids", "version_ids", "answers", "received_at", "submitted_at",
        "started_at", "durations", "reference_ids", "flag_counts", "flag_bits", "verdicts",
        "careless_scores", "decisions",
    )

    def take(self, rows: np.ndarray | slice) -> SurveyData:
        """The respondents at ``rows`` (positions, a mask or a slice)."""
        values: dict[str, Any] = {name: getattr(self, name)[rows] for name in self._ROW_FIELDS}
        return SurveyData(layout=self.layout, results=self.results.take(rows), **values)

    def without(self, choices: Sequence[str]) -> SurveyData:
        """Leave out ``excluded`` respondents (latest review ``exclude``) and/or ``flagged``
        ones (at least one flag)."""
        keep = np.ones(len(self), dtype=bool)
        if "excluded" in choices:
            keep &= self.decisions != Decision.EXCLUDE.value
        if "flagged" in choices:
            keep &= self.flag_counts == 0
        return self if keep.all() else self.take(keep)

    def of_version(self, version_id: int) -> tuple[np.ndarray, np.ndarray]:
        """(positions, answers) of the respondents of a version, the answers in its items'
        order."""
        rows = np.flatnonzero(self.version_ids == version_id)
        columns = self.layout.columns[version_id]
        return rows, self.answers[np.ix_(rows, columns)]

    def seconds(self) -> np.ndarray:
        """Each response's duration as ``outcomes.seconds_taken`` gives it: the duration sent,
        else submitted minus started when both are known and not negative (NaN otherwise)."""
        taken = (self.submitted_at - self.started_at) / np.timedelta64(1, "s")
        taken = np.where(taken >= 0, taken, np.nan)  # NaT differences are NaN
        return np.where(np.isnan(self.durations), taken, self.durations)

    @classmethod
    def join(cls, parts: Sequence[SurveyData]) -> SurveyData:
        """Parts read one after the other as one."""
        if len(parts) == 1:
            return parts[0]
        values = {name: np.concatenate([getattr(p, name) for p in parts])
                  for name in cls._ROW_FIELDS}
        return cls(
            layout=parts[0].layout, results=join_columns([p.results for p in parts]), **values
        )


def _times(values: Sequence[Any]) -> np.ndarray:
    """Stored timestamps (text from SQLite, datetimes from PostgreSQL) as UTC
    ``datetime64[us]``."""
    import pandas as pd

    series = pd.Series(values, dtype=object)
    present = series.dropna()
    if present.empty:
        return np.full(len(series), np.datetime64("NaT"), dtype="datetime64[us]")
    if isinstance(present.iloc[0], str):
        out = pd.to_datetime(series, utc=True, format="ISO8601")
    else:
        out = pd.to_datetime(series, utc=True)
    return out.dt.tz_localize(None).to_numpy("datetime64[us]")


def _floats(values: Sequence[float | None]) -> np.ndarray:
    return np.array(values, dtype=np.float64)  # None becomes NaN


_FIELDS = 15


def _part(
    layout: SurveyItems, rows: Sequence[Any], codes: DetectorCodes, names: list[str]
) -> SurveyData:
    n = len(rows)
    columns: list[Sequence[Any]] = list(zip(*rows, strict=True)) if n else [()] * _FIELDS
    (pks, ids, version_ids, blobs, received, submitted, started, durations, references,
     counts, bits, verdicts, careless, decisions, results) = columns
    versions = np.fromiter(version_ids, dtype=np.int64, count=n)
    answers = np.full((n, len(layout.items)), MISSING, dtype=np.int8)
    for version_id in np.unique(versions).tolist():
        mine = np.flatnonzero(versions == version_id)
        where = layout.columns[version_id]
        try:
            codes_of = stored_matrix([blobs[i] for i in mine.tolist()], len(where))
        except ValueError as error:
            raise ValueError(
                f"the stored answers of respondents {ids[mine[0]]!r} to {ids[mine[-1]]!r} "
                f"cannot be read as answer records: {error}"
            ) from error
        answers[np.ix_(mine, where)] = codes_of
    return SurveyData(
        layout=layout,
        pks=np.fromiter(pks, dtype=np.int64, count=n),
        respondent_ids=np.array(ids, dtype=object),
        version_ids=versions,
        answers=answers,
        received_at=_times(received),
        submitted_at=_times(submitted),
        started_at=_times(started),
        durations=_floats(durations),
        reference_ids=np.fromiter((-1 if r is None else r for r in references), np.int64, n),
        flag_counts=np.fromiter(counts, dtype=np.int64, count=n),
        flag_bits=np.fromiter((b or 0 for b in bits), dtype=np.int64, count=n),
        verdicts=np.array(verdicts, dtype=object),
        careless_scores=_floats(careless),
        decisions=np.array(decisions, dtype=object),
        results=result_columns(results, codes, names),
    )


def survey_parts(
    session: Session, survey: Survey, *, layout: SurveyItems | None = None,
    chunk: int = READ_CHUNK,
) -> Iterator[SurveyData]:
    """A survey's stored respondents, ``chunk`` at a time in order of arrival (one empty part
    when there are none)."""
    layout = layout or survey_items(session, survey)
    codes = detector_codes(session)
    names = registry_sorted(codes.by_name)
    last = 0
    while True:  # bounded: each pass reads respondents after the last one read
        rows = store.survey_rows(session, survey.id, last, chunk)
        if rows:
            yield _part(layout, rows, codes, names)
        elif last == 0:
            yield _part(layout, [], codes, names)
        if len(rows) < chunk:
            return
        last = int(rows[-1][0])


def read_survey(session: Session, survey: Survey, *, chunk: int = READ_CHUNK) -> SurveyData:
    """Every stored respondent of a survey, as columns (see :class:`SurveyData`)."""
    return SurveyData.join(list(survey_parts(session, survey, chunk=chunk)))
