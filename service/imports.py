"""Importing a responses file into a stored survey.

The file's rows go through the same use case as the webhook (``ingest.ingest``), in batches, so
an import is checked, screened, stored and de-duplicated exactly like posted responses: the same
respondent with the same answers is a duplicate, other answers under a stored respondent id are
a conflict unless ``replace`` is given. Respondent ids are checked over the whole file first
(``detectors.check_respondent_ids``), so an id repeated across two batches is found too.

The whole file is one transaction: by default any invalid row or conflict anywhere in the file
means nothing is stored (every problem is reported); with ``partial`` the valid rows are stored
and the others reported with their reasons.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from detectors import ResponseDataError, ResponseProblem, check_respondent_ids

from . import store
from .errors import CONFLICT_REASON, RespondentConflict
from .ingest import IngestOptions, ingest
from .screeners import screener_for
from .settings import Settings

__all__ = ["IMPORT_BATCH", "ImportReport", "ImportRefused", "posted_rows", "import_table"]

#: Respondents handed to the ingestion use case at a time (bounds memory and screening size).
IMPORT_BATCH = 5_000


@dataclass
class ImportReport:
    """Counts of an import; ``rejected`` rows (file row numbers, 1-based) with their reasons."""

    survey: str
    version: int
    rows: int
    stored: int = 0
    replaced: int = 0
    duplicates: int = 0
    rejected: list[dict[str, Any]] = field(default_factory=list)
    ignored_columns: list[str] = field(default_factory=list)


class ImportRefused(Exception):
    """Nothing was stored: the file has invalid rows or conflicts (without ``partial``)."""

    def __init__(self, problems: list[ResponseProblem], conflicts: int):
        self.problems = problems
        self.conflicts = conflicts
        super().__init__(f"{len(problems)} problem(s); nothing was stored")


def _answer_values(column: pd.Series) -> list[Any]:
    """A column of answers as posted values: whole numbers as ``int``, empty cells as ``None``,
    anything else as it is (the ingestion's checks then name it)."""
    n = len(column)
    if pd.api.types.is_bool_dtype(column.dtype):
        return column.astype(object).where(column.notna(), None).tolist()
    text = None
    if not pd.api.types.is_numeric_dtype(column.dtype):
        text = column.astype("string").str.strip()
        column = text.where(text != "")
    numbers = pd.to_numeric(column, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    out = np.full(n, None, dtype=object)
    present = ~np.isnan(numbers)
    whole = present & (numbers == np.round(numbers))
    rows = np.flatnonzero(whole)
    out[rows] = numbers[rows].astype(np.int64).tolist()
    rows = np.flatnonzero(present & ~whole)
    out[rows] = numbers[rows].tolist()
    if text is not None:
        unreadable = (~present & column.notna().to_numpy()).nonzero()[0]
        out[unreadable] = text.to_numpy(dtype=object)[unreadable].tolist()
    return out.tolist()


def posted_rows(
    frame: pd.DataFrame, items: Sequence[str], id_column: str, duration_column: str | None
) -> list[dict[str, Any]]:
    """The rows of a table as the webhook receives them (``respondent_id``, ``answers``,
    ``duration_seconds``); item columns absent from the table are left out."""
    ids = frame[id_column].astype("string").str.strip().fillna("").tolist()
    present = [item for item in items if item in frame.columns]
    columns = [_answer_values(frame[item]) for item in present]
    durations = None
    if duration_column is not None and duration_column in frame.columns:
        raw = frame[duration_column]
        numbers = pd.to_numeric(raw, errors="coerce")
        # An unreadable duration is passed as it is, so the ingestion names it.
        durations = (
            numbers.astype(object).where(numbers.notna(), raw).where(raw.notna(), None).tolist()
        )
    rows = []
    for position, values in enumerate(zip(*columns, strict=True) if columns else [()] * len(ids)):
        row: dict[str, Any] = {
            "respondent_id": ids[position], "answers": dict(zip(present, values, strict=True)),
        }
        if durations is not None and durations[position] is not None:
            row["duration_seconds"] = durations[position]
        rows.append(row)
    return rows


def import_table(
    database: Any,
    survey_id: str,
    frame: pd.DataFrame,
    settings: Settings,
    *,
    id_column: str = "respondent_id",
    duration_column: str | None = "duration_seconds",
    replace: bool = False,
    partial: bool = False,
    batch_size: int = IMPORT_BATCH,
) -> ImportReport:
    """Post a table's rows into a stored survey through ``ingest.ingest``, in one transaction.

    Raises ``LookupError`` for an unknown survey, ``ResponseDataError`` when a column is
    missing, and :class:`ImportRefused` (nothing stored) when rows are invalid or conflict
    with stored ones and ``partial`` is False.
    """
    if batch_size < 1:
        raise ValueError(f"batch_size must be at least 1; got {batch_size}")
    with database.write() as session:
        survey = store.get_survey(session, survey_id)
        if survey is None:
            raise LookupError(f"no survey {survey_id!r} is registered")
        if survey.current_version_id is None:
            raise LookupError(f"survey {survey_id!r} has no registered version")
        screener = screener_for(session, survey.current_version_id)
        items = list(screener.instrument.item_ids)
        columns = [str(c) for c in frame.columns]
        missing = [
            ResponseProblem(None, None, column, reason)
            for column, reason in [(id_column, "respondent id column is missing")]
            + [(item, "item column is missing") for item in items]
            if column not in columns
        ]
        if missing:
            raise ResponseDataError(missing)
        known = set(items) | {id_column} | ({duration_column} if duration_column else set())
        report = ImportReport(
            survey=survey.survey, version=screener.number, rows=len(frame),
            ignored_columns=[c for c in columns if c not in known],
        )
        problems: list[ResponseProblem] = []
        conflicts = 0
        # Ids are checked over the whole file (a repeated id may lie in two batches); rows with
        # a bad id are not posted.
        ids = check_respondent_ids(frame[id_column], id_column=id_column)
        if partial:
            report.rejected += _rejected(ids.problems)
        else:
            problems += ids.problems
        file_rows = np.flatnonzero(~ids.invalid).tolist()
        options = IngestOptions(replace=replace, partial=partial)
        for start in range(0, len(file_rows), batch_size):
            # Rows become posted dicts a batch at a time (a million at once would not fit).
            batch = posted_rows(
                frame.iloc[file_rows[start : start + batch_size]], items, id_column,
                duration_column,
            )

            def file_row(position: int | None, start: int = start) -> int | None:
                """1-based row of the file from a 1-based position in the batch."""
                return None if position is None else file_rows[start + position - 1] + 1

            try:
                reply = ingest(session, survey, batch, options, settings)
            except ResponseDataError as error:
                problems += [
                    ResponseProblem(file_row(p.row), p.respondent_id, p.column, p.reason)
                    for p in error.problems
                ]
                continue
            except RespondentConflict as error:  # respondents stored with other answers
                for conflict in error.conflicts:
                    problems.append(
                        ResponseProblem(
                            file_row(conflict.row), conflict.respondent_id, "respondent_id",
                            CONFLICT_REASON,
                        )
                    )
                    conflicts += 1
                continue
            report.stored += reply.stored
            report.replaced += reply.replaced
            report.duplicates += reply.duplicates
            report.rejected += [
                {
                    "row": file_row(entry.row),
                    "respondent_id": entry.respondent_id,
                    "problems": [
                        {"item": item, "reason": reason} for item, reason in entry.problems
                    ],
                }
                for entry in reply.rejected
            ]
        if problems:
            problems.sort(key=lambda p: p.row or 0)
            raise ImportRefused(problems, conflicts)  # leaving the block rolls back
        report.rejected.sort(key=lambda r: r["row"])
        return report


def _rejected(problems: list[ResponseProblem]) -> list[dict[str, Any]]:
    """Rejected rows as the report lists them, from problems in row order."""
    rows: dict[int | None, dict[str, Any]] = {}
    for p in problems:
        entry = rows.setdefault(
            p.row, {"row": p.row, "respondent_id": p.respondent_id, "problems": []}
        )
        entry["problems"].append({"item": p.column, "reason": p.reason})
    return list(rows.values())
