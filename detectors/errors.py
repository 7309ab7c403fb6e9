"""Errors raised by the screening library.

The tree::

    HeedfulError                 base of every error raised on purpose
    ├── InstrumentError          an instrument definition is invalid (names the field or item)
    ├── ResponseDataError        a responses table cannot be screened (lists rows and columns)
    └── SettingError             a detector setting is out of range (names detector and setting)

Each error carries the context a caller needs to point at the offending input, so the CLI and
the web service can report it without parsing the message.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = [
    "HeedfulError",
    "InstrumentError",
    "ResponseDataError",
    "ResponseProblem",
    "SettingError",
]


class HeedfulError(Exception):
    """Base class of every error the library raises on purpose."""


@dataclass(frozen=True)
class FieldProblem:
    """One problem in a document: where (a dotted path) and what."""

    location: str
    message: str

    def __str__(self) -> str:
        return f"{self.location}: {self.message}" if self.location else self.message


class InstrumentError(HeedfulError):
    """An instrument definition is invalid.

    ``problems`` lists every problem found, each with the field path (``items[3].keyed``).
    """

    def __init__(self, problems: list[FieldProblem]):
        self.problems = list(problems)
        lines = "\n".join(f"  - {p}" for p in self.problems)
        super().__init__(f"The instrument is invalid ({len(self.problems)} problem(s)):\n{lines}")


@dataclass(frozen=True)
class ResponseProblem:
    """One invalid cell or row of a responses table.

    ``row`` is the 1-based data row (the header is row 0); ``column`` is ``None`` for a problem
    with the whole row (a duplicate respondent id) or the whole table (a missing item column).
    """

    row: int | None
    respondent_id: str | None
    column: str | None
    reason: str

    def __str__(self) -> str:
        where = []
        if self.row is not None:
            where.append(f"row {self.row}")
        if self.respondent_id is not None:
            where.append(f"respondent {self.respondent_id!r}")
        if self.column is not None:
            where.append(f"column {self.column!r}")
        return f"{', '.join(where) or 'table'}: {self.reason}"


class ResponseDataError(HeedfulError):
    """A responses table has invalid rows or columns; ``problems`` lists all of them."""

    shown = 20

    def __init__(self, problems: list[ResponseProblem]):
        self.problems = list(problems)
        head = "\n".join(f"  - {p}" for p in self.problems[: self.shown])
        more = len(self.problems) - self.shown
        tail = f"\n  ... and {more} more" if more > 0 else ""
        super().__init__(
            f"The responses have {len(self.problems)} problem(s):\n{head}{tail}"
        )


class SettingError(HeedfulError, ValueError):
    """A detector setting is unknown or out of its range."""

    def __init__(self, detector: str, setting: str, message: str):
        self.detector = detector
        self.setting = setting
        super().__init__(message)
