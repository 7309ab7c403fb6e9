"""The response matrix: one row per respondent, one column per item, in presentation order.

Answers are kept as 8-bit integer codes with :data:`MISSING` for an unanswered item, so a
million respondents by fifty items takes 50 MB and the detectors can compare whole columns.
:func:`check_answers` holds the rules every input path shares (ids non-empty and unique,
answers whole numbers within their item's range), reporting every problem with its row,
respondent and item; :func:`matrix_from_frame` reads a table (CSV, Parquet, SPSS) into numbers
and builds a matrix through it, and the service checks posted rows through it.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field
from functools import cached_property
from typing import TYPE_CHECKING

import numpy as np

from .errors import ResponseDataError, ResponseProblem
from .instrument import Instrument

if TYPE_CHECKING:
    import pandas as pd

__all__ = [
    "MISSING",
    "ResponseMatrix",
    "CheckedResponses",
    "CheckedIds",
    "CheckedAnswers",
    "check_respondent_ids",
    "check_answers",
    "matrix_from_frame",
]

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


@dataclass(frozen=True)
class CheckedIds:
    """Respondent ids as checked: stripped, with the rows whose id is empty or repeated."""

    respondent_ids: np.ndarray  # object, shape (n,): stripped ids, None where empty
    invalid: np.ndarray  # bool, shape (n,)
    problems: list[ResponseProblem]  # in row order


@dataclass(frozen=True)
class CheckedAnswers:
    """Answers checked against an instrument: codes, invalid rows and their problems."""

    respondent_ids: np.ndarray | None  # as in :class:`CheckedIds`; None when ids were not given
    answers: np.ndarray  # int8, shape (n, k): codes, MISSING where unanswered or invalid
    invalid: np.ndarray  # bool, shape (n,): rows with at least one problem
    problems: list[ResponseProblem]  # by row; in a row the id first, then items in order


#: Rows listed in a repeated id's message before "...".
_ROWS_SHOWN = 5


def _row_numbers(rows: np.ndarray | Sequence[int] | None, n: int) -> np.ndarray:
    numbers = np.arange(1, n + 1) if rows is None else np.asarray(rows, dtype=np.int64)
    if numbers.shape != (n,):
        raise ValueError(f"one row number is needed per respondent; got {numbers.shape}")
    return numbers


#: Up to this many ids are checked in plain Python (see ``check_respondent_ids``).
_FEW_IDS = 256


def _stripped(value: object) -> str | None:
    """An id as text without surrounding white space, as a string column reads it; None for
    an empty one (None, NaN, pandas' NA, blank)."""
    if value is None or (isinstance(value, float) and value != value):
        return None
    if type(value).__name__ == "NAType":
        return None
    text = str(value).strip()
    return text or None


def check_respondent_ids(
    respondent_ids: Sequence[object] | np.ndarray | pd.Series,
    *,
    rows: np.ndarray | Sequence[int] | None = None,
    id_column: str = "respondent_id",
) -> CheckedIds:
    """Check respondent ids: none empty, none repeated.

    Parameters
    ----------
    respondent_ids : sequence of str (None, NaN or blank = empty), shape (n,)
        Surrounding white space is not part of an id.
    rows : sequence of int, optional
        The 1-based row number to name for each id (default 1..n).
    id_column : str
        The column or field named in the problems.

    Returns
    -------
    CheckedIds
        Every row of a repeated id is invalid, each named with all the rows of its id.
    """
    import pandas as pd

    if not isinstance(respondent_ids, pd.Series) and len(respondent_ids) <= _FEW_IDS:
        # A few ids (a post of a handful of respondents): plain Python is faster than the
        # frame operations' fixed cost, and reads every id the same way.
        stripped = np.array([_stripped(v) for v in respondent_ids] + [None], dtype=object)[:-1]
        n = len(stripped)
        numbers = _row_numbers(rows, n)
        empty = np.fromiter((v is None for v in stripped), dtype=bool, count=n)
        seen = Counter(v for v in stripped if v is not None)
        duplicated = np.fromiter(
            (v is not None and seen[v] > 1 for v in stripped), dtype=bool, count=n
        )
    else:
        raw = respondent_ids if isinstance(respondent_ids, pd.Series) else pd.Series(
            np.asarray(respondent_ids, dtype=object)
        )
        ids = raw.astype("string").str.strip()
        n = len(ids)
        numbers = _row_numbers(rows, n)
        empty = (ids.isna() | (ids == "")).to_numpy(dtype=bool)
        duplicated = ids.duplicated(keep=False).to_numpy(dtype=bool) & ~empty
        stripped = ids.to_numpy(dtype=object)
        stripped[empty] = None  # also replaces pandas' NA
    found: list[tuple[int, ResponseProblem]] = [
        (r, ResponseProblem(int(numbers[r]), None, id_column, "respondent id is empty"))
        for r in np.flatnonzero(empty).tolist()
    ]
    if duplicated.any():
        # Messages are built for the repeated rows only.
        where: dict[str, list[int]] = {}
        for r in np.flatnonzero(duplicated).tolist():
            where.setdefault(stripped[r], []).append(r)
        for rid, group in where.items():
            shown = ", ".join(str(numbers[r]) for r in group[:_ROWS_SHOWN])
            more = " ..." if len(group) > _ROWS_SHOWN else ""
            reason = f"respondent id {rid!r} appears more than once (rows {shown}{more})"
            found += [(r, ResponseProblem(int(numbers[r]), rid, id_column, reason)) for r in group]
    found.sort(key=lambda entry: entry[0])
    return CheckedIds(
        respondent_ids=stripped, invalid=empty | duplicated, problems=[p for _, p in found]
    )


def check_answers(
    instrument: Instrument,
    answers: np.ndarray,
    respondent_ids: Sequence[object] | np.ndarray | pd.Series | None = None,
    *,
    rows: np.ndarray | Sequence[int] | None = None,
    id_column: str = "respondent_id",
) -> CheckedAnswers:
    """Check answers (and respondent ids) against an instrument; the one place for these rules.

    An answer must be a whole number within its item's answer range; an id must be non-empty
    and appear once (:func:`check_respondent_ids`). Reading cells into numbers (text, true or
    false) is the caller's part.

    Parameters
    ----------
    instrument : Instrument
    answers : ndarray of float, shape (n, k)
        One column per item in the instrument's order; NaN where unanswered.
    respondent_ids : sequence of str, shape (n,), optional
        When None, ids are not checked and problems name no respondent.
    rows, id_column
        As for :func:`check_respondent_ids`.

    Returns
    -------
    CheckedAnswers
        The codes (invalid cells left MISSING), the invalid rows, and every problem with its
        row, respondent and item.

    Examples
    --------
    >>> from detectors import parse_instrument
    >>> instrument = parse_instrument({
    ...     "survey": "demo", "response_format": {"points": 5, "lowest": 1},
    ...     "items": [{"id": "q1", "text": "One.", "scale": "s"},
    ...               {"id": "q2", "text": "Two.", "scale": "s"}]})
    >>> checked = check_answers(instrument, np.array([[1, 2.5], [8, np.nan]]), ["a", "b"])
    >>> for problem in checked.problems:
    ...     print(problem)
    row 1, respondent 'a', column 'q2': not a whole number: 2.5
    row 2, respondent 'b', column 'q1': 8 is outside the answer range 1..5
    >>> checked.invalid.tolist()
    [True, True]
    """
    values = np.asarray(answers, dtype=np.float64)
    items = instrument.item_ids
    if values.ndim != 2 or values.shape[1] != len(items):
        raise ValueError(f"answers must have shape (n, {len(items)}); got {values.shape}")
    n = values.shape[0]
    numbers = _row_numbers(rows, n)
    ids = None if respondent_ids is None else check_respondent_ids(
        respondent_ids, rows=numbers, id_column=id_column
    )
    lowest, highest = instrument.lowest, instrument.highest
    # Whole-array passes for every cell; the reasons are worked out on the bad rows only.
    in_range = (values >= lowest) & (values <= highest)  # False where missing
    truncated = np.where(in_range, values, 0).astype(np.int8)  # codes lie in -50..59
    good = in_range & (truncated == values)
    codes = np.where(good, truncated, MISSING)
    invalid = (~good & ~np.isnan(values)).any(axis=1)
    bad_rows = np.flatnonzero(invalid)
    if ids is not None:
        invalid |= ids.invalid

    # Messages for the bad cells only, ordered by row, then the id, then the items.
    found: list[tuple[int, int, ResponseProblem]] = []
    if ids is not None:
        found += [(p.row or 0, -1, p) for p in ids.problems]
    named = None if ids is None else ids.respondent_ids

    def cell(r: int, j: int, reason: str) -> tuple[int, int, ResponseProblem]:
        rid = None if named is None else named[r]
        return (int(numbers[r]), j, ResponseProblem(int(numbers[r]), rid, items[j], reason))

    bad = values[bad_rows]
    present = ~np.isnan(bad)
    fractional = present & (bad != np.round(bad))
    outside = present & ~fractional & ((bad < lowest) | (bad > highest))
    for r, j in zip(*np.nonzero(fractional), strict=True):
        found.append(cell(int(bad_rows[r]), int(j), f"not a whole number: {bad[r, j]:g}"))
    for r, j in zip(*np.nonzero(outside), strict=True):
        found.append(
            cell(
                int(bad_rows[r]), int(j),
                f"{bad[r, j]:g} is outside the answer range {lowest[j]}..{highest[j]}",
            )
        )
    found.sort(key=lambda entry: entry[:2])
    return CheckedAnswers(
        respondent_ids=named, answers=codes, invalid=invalid, problems=[p for *_, p in found]
    )


def matrix_from_frame(
    instrument: Instrument,
    frame: pd.DataFrame,
    id_column: str = "respondent_id",
    duration_column: str | None = "duration_seconds",
    skip_invalid: bool = False,
) -> CheckedResponses:
    """Check a table of responses and convert it into a :class:`ResponseMatrix`.

    Cells are read into numbers here; ids and answers are then checked by
    :func:`check_answers`.

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
    # Cells that cannot be read as numbers: (row, column order, column, reason).
    unread: list[tuple[int, int, str, str]] = []
    values = np.full((n, len(items)), np.nan)
    for j, item_id in enumerate(items):
        column = frame[item_id]
        if column.dtype == object or pd.api.types.is_string_dtype(column.dtype):
            text = column.astype("string").str.strip()
            blank = text.isna() | (text == "")
            values[:, j] = pd.to_numeric(text.where(~blank), errors="coerce").to_numpy(
                dtype=np.float64
            )
            not_number = np.isnan(values[:, j]) & ~blank.to_numpy()
            unread += [
                (r, j, item_id, f"not a number: {text.iloc[r]!r}")
                for r in np.flatnonzero(not_number).tolist()
            ]
        elif pd.api.types.is_bool_dtype(column.dtype):
            unread += [
                (r, j, item_id, "answers must be whole numbers, not true/false") for r in range(n)
            ]
        else:
            values[:, j] = column.to_numpy(dtype=np.float64, na_value=np.nan)

    durations = None
    if duration_column and duration_column in columns:
        durations = pd.to_numeric(frame[duration_column], errors="coerce").to_numpy(dtype=np.float64)
        given = frame[duration_column].notna().to_numpy()
        bad = given & (np.isnan(durations) | (durations < 0))
        unread += [
            (r, len(items), duration_column, "duration must be a number of seconds >= 0")
            for r in np.flatnonzero(bad).tolist()
        ]

    checked = check_answers(instrument, values, frame[id_column], id_column=id_column)
    ids = checked.respondent_ids
    assert ids is not None
    order = {item_id: j for j, item_id in enumerate(items)}
    found = [
        (p.row - 1, order.get(p.column or "", -1), p)
        for p in checked.problems
        if p.row is not None
    ]
    found += [(r, j, ResponseProblem(r + 1, ids[r], c, t)) for r, j, c, t in unread]
    found.sort(key=lambda entry: entry[:2])
    problems = [p for *_, p in found]
    if problems and not skip_invalid:
        raise ResponseDataError(problems)

    row_reasons: dict[int, list[str]] = {}
    for r, _, p in found:
        row_reasons.setdefault(r, []).append(f"{p.column}: {p.reason}" if p.column else p.reason)
    bad_rows = sorted(row_reasons)
    keep = np.ones(n, dtype=bool)
    keep[bad_rows] = False
    rejected = frame.iloc[bad_rows].copy()
    rejected.insert(0, "row", [r + 1 for r in bad_rows])
    rejected["reason"] = ["; ".join(row_reasons[r]) for r in bad_rows]
    matrix = ResponseMatrix(
        respondent_ids=ids[keep],
        answers=checked.answers[keep],
        durations=None if durations is None else durations[keep],
    )
    return CheckedResponses(matrix=matrix, rejected=rejected, problems=problems)
