"""The response matrix: one row per respondent, one column per item, in presentation order.

Answers are kept as 8-bit integer codes with :data:`MISSING` for an unanswered item, so a
million respondents by fifty items takes 50 MB and the detectors can compare whole columns.
:func:`matrix_from_frame` builds a matrix from a table (CSV, Parquet, the service's batches)
and checks every cell, reporting all problems with their row and column.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from typing import TYPE_CHECKING

import numpy as np

from .errors import ResponseDataError, ResponseProblem
from .instrument import Instrument

if TYPE_CHECKING:
    import pandas as pd

__all__ = ["MISSING", "ResponseMatrix", "CheckedResponses", "matrix_from_frame"]

#: Code of an unanswered item (never a valid answer: codes lie in -50..59).
MISSING = np.int8(-128)


@dataclass(frozen=True, eq=False)
class ResponseMatrix:
    """Answers of n respondents to the k items of an instrument.

    Attributes
    ----------
    respondent_ids : ndarray of str, shape (n,)
    answers : ndarray of int8, shape (n, k)
        Raw answer codes as given (never reverse-keyed); :data:`MISSING` where unanswered.
    durations : ndarray of float64, shape (n,), optional
        Seconds the respondent took, NaN where unknown.
    """

    respondent_ids: np.ndarray
    answers: np.ndarray
    durations: np.ndarray | None = field(default=None)

    def __post_init__(self) -> None:
        if self.answers.ndim != 2 or self.answers.dtype != np.int8:
            raise TypeError("answers must be a 2-D int8 array")
        if len(self.respondent_ids) != self.answers.shape[0]:
            raise ValueError("one respondent id is needed per row of answers")

    @property
    def n_respondents(self) -> int:
        return self.answers.shape[0]

    @property
    def n_items(self) -> int:
        return self.answers.shape[1]

    @cached_property
    def answered(self) -> np.ndarray:
        """Boolean (n, k): True where the item was answered."""
        return self.answers != MISSING

    def as_float(self, columns: np.ndarray | None = None) -> np.ndarray:
        """Answers as float64 with NaN for missing (optionally only some columns)."""
        sub = self.answers if columns is None else self.answers[:, columns]
        out = sub.astype(np.float64)
        out[sub == MISSING] = np.nan
        return out

    def take(self, rows: np.ndarray) -> ResponseMatrix:
        """A matrix of the selected rows (indices or a boolean mask)."""
        return ResponseMatrix(
            respondent_ids=self.respondent_ids[rows],
            answers=self.answers[rows],
            durations=None if self.durations is None else self.durations[rows],
        )

    @classmethod
    def from_arrays(
        cls,
        instrument: Instrument,
        answers: np.ndarray,
        respondent_ids: np.ndarray | list[str] | None = None,
        durations: np.ndarray | None = None,
    ) -> ResponseMatrix:
        """Build a matrix from a numeric array (NaN = missing), checking codes against the items."""
        import pandas as pd

        values = np.asarray(answers, dtype=np.float64)
        if values.ndim != 2 or values.shape[1] != len(instrument.items):
            raise ValueError(
                f"answers must have shape (n, {len(instrument.items)}); got {values.shape}"
            )
        ids = (
            np.arange(1, values.shape[0] + 1).astype(str).astype(object)
            if respondent_ids is None
            else np.asarray(respondent_ids, dtype=object)
        )
        frame = pd.DataFrame(values, columns=list(instrument.item_ids))
        frame.insert(0, "respondent_id", ids)
        if durations is not None:
            frame["duration_seconds"] = durations
        return matrix_from_frame(
            instrument, frame, duration_column="duration_seconds" if durations is not None else None
        ).matrix


@dataclass(frozen=True)
class CheckedResponses:
    """The valid part of a table and the rows rejected from it, with reasons."""

    matrix: ResponseMatrix
    rejected: pd.DataFrame  # the original rows plus 'row' and 'reason' columns
    problems: list[ResponseProblem]


def matrix_from_frame(
    instrument: Instrument,
    frame: pd.DataFrame,
    id_column: str = "respondent_id",
    duration_column: str | None = "duration_seconds",
    skip_invalid: bool = False,
) -> CheckedResponses:
    """Check a table of responses and convert it into a :class:`ResponseMatrix`.

    Parameters
    ----------
    instrument : Instrument
    frame : DataFrame
        One row per respondent: the id column, one column per item id, optionally a duration
        column. Empty cells (NaN, None, "") are missing answers.
    id_column : str
    duration_column : str or None
        Name of an optional column of seconds; ignored when absent from the table.
    skip_invalid : bool
        When False (default), any invalid row raises :class:`ResponseDataError` listing every
        problem. When True, invalid rows are left out and returned in ``CheckedResponses.rejected``.
        Problems with the whole table (missing or unknown columns) always raise.

    Returns
    -------
    CheckedResponses
        The matrix of valid rows, and the rejected rows with their reasons.
    """
    import pandas as pd

    table_problems: list[ResponseProblem] = []
    columns = [str(c) for c in frame.columns]
    if id_column not in columns:
        table_problems.append(
            ResponseProblem(None, None, id_column, "respondent id column is missing")
        )
    items = instrument.item_ids
    for item_id in items:
        if item_id not in columns:
            table_problems.append(ResponseProblem(None, None, item_id, "item column is missing"))
    known = set(items) | {id_column} | ({duration_column} if duration_column else set())
    for name in columns:
        if name not in known:
            table_problems.append(
                ResponseProblem(None, None, name, "unknown column: not an item of the instrument")
            )
    if table_problems:
        raise ResponseDataError(table_problems)

    n = len(frame)
    raw_ids = frame[id_column]
    ids = raw_ids.astype("string").str.strip()
    row_reasons: dict[int, list[tuple[str | None, str]]] = {}

    def add(rows: np.ndarray, column: str | None, reasons: list[str] | str) -> None:
        for position, row in enumerate(rows.tolist()):
            text = reasons if isinstance(reasons, str) else reasons[position]
            row_reasons.setdefault(row, []).append((column, text))

    empty_id = (ids.isna() | (ids == "")).to_numpy()
    add(np.flatnonzero(empty_id), id_column, "respondent id is empty")
    duplicated = ids.duplicated(keep=False).to_numpy() & ~empty_id
    if duplicated.any():
        rows = np.flatnonzero(duplicated)
        first_row = pd.Series(rows, index=ids.to_numpy()[rows]).groupby(level=0).transform("min")
        add(
            rows,
            id_column,
            [
                f"respondent id {ids.iloc[r]!r} appears more than once (first at row {f + 1})"
                for r, f in zip(rows.tolist(), first_row.to_numpy().tolist(), strict=True)
            ],
        )

    answers = np.full((n, len(items)), MISSING, dtype=np.int8)
    lowest, highest = instrument.lowest, instrument.highest
    for j, item_id in enumerate(items):
        column = frame[item_id]
        if column.dtype == object or pd.api.types.is_string_dtype(column.dtype):
            text = column.astype("string").str.strip()
            blank = text.isna() | (text == "")
            values = pd.to_numeric(text.where(~blank), errors="coerce").to_numpy(dtype=np.float64)
            not_number = np.isnan(values) & ~blank.to_numpy()
            if not_number.any():
                rows = np.flatnonzero(not_number)
                add(rows, item_id, [f"not a number: {text.iloc[r]!r}" for r in rows.tolist()])
        elif pd.api.types.is_bool_dtype(column.dtype):
            rows = np.arange(n)
            add(rows, item_id, "answers must be whole numbers, not true/false")
            continue
        else:
            values = column.to_numpy(dtype=np.float64, na_value=np.nan)
        present = ~np.isnan(values)
        fractional = present & (values != np.round(values))
        if fractional.any():
            rows = np.flatnonzero(fractional)
            add(rows, item_id, [f"not a whole number: {values[r]:g}" for r in rows.tolist()])
        outside = present & ~fractional & ((values < lowest[j]) | (values > highest[j]))
        if outside.any():
            rows = np.flatnonzero(outside)
            add(
                rows,
                item_id,
                [f"{values[r]:g} is outside the answer range {lowest[j]}..{highest[j]}" for r in rows.tolist()],
            )
        good = present & ~fractional & ~outside
        answers[good, j] = values[good].astype(np.int8)

    durations = None
    if duration_column and duration_column in columns:
        durations = pd.to_numeric(frame[duration_column], errors="coerce").to_numpy(dtype=np.float64)
        given = frame[duration_column].notna().to_numpy()
        bad = given & (np.isnan(durations) | (durations < 0))
        if bad.any():
            rows = np.flatnonzero(bad)
            add(rows, duration_column, "duration must be a number of seconds >= 0")

    problems = [
        ResponseProblem(row + 1, None if empty_id[row] else str(ids.iloc[row]), column, reason)
        for row in sorted(row_reasons)
        for column, reason in row_reasons[row]
    ]
    if problems and not skip_invalid:
        raise ResponseDataError(problems)

    keep = np.ones(n, dtype=bool)
    keep[list(row_reasons)] = False
    rejected = frame.iloc[sorted(row_reasons)].copy()
    rejected.insert(0, "row", [r + 1 for r in sorted(row_reasons)])
    rejected["reason"] = [
        "; ".join(f"{c}: {t}" if c else t for c, t in row_reasons[r]) for r in sorted(row_reasons)
    ]
    matrix = ResponseMatrix(
        respondent_ids=ids.to_numpy(dtype=object)[keep],
        answers=answers[keep],
        durations=None if durations is None else durations[keep],
    )
    return CheckedResponses(matrix=matrix, rejected=rejected, problems=problems)
