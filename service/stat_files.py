"""SPSS (.sav) and Stata (.dta) files: reading them with their labels, writing them with
valid variable names and labels, and drafting an instrument from a labelled file.

Both formats are read and written with pyreadstat. What the formats allow, and what this module
does about it:

- **Variable names** (:func:`statistical_names`): every character other than an ASCII letter,
  digit or ``_`` becomes ``_``; a name that does not start with a letter gets a ``v`` in front;
  names are cut to 64 characters for SPSS and 32 for Stata; a name that is a reserved word of
  either program (``with``, ``by``, ``in``, ``int``, ``str80`` ...) gets a ``_`` appended; a name
  already taken (compared without regard to case, as SPSS does) gets ``_2``, ``_3`` ... (cut
  further to stay within the limit). Columns are named in order, so the same columns always get
  the same names.
- **Labels**: variable labels are cut to 256 bytes (SPSS) or 80 characters (Stata), value labels
  to 120 bytes (SPSS); a cut label ends in ``...``.
"""

from __future__ import annotations

import re
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from detectors import ResponseDataError, ResponseProblem

__all__ = [
    "STAT_FORMATS",
    "for_writer",
    "STAT_SUFFIXES",
    "NAME_LIMITS",
    "statistical_names",
    "unique_names",
    "fit_label",
    "write_labelled",
    "LabelledTable",
    "read_labelled",
    "DraftColumn",
    "InstrumentDraft",
    "draft_instrument",
    "UNGUESSABLE",
]

STAT_FORMATS = ("sav", "dta")
#: File suffixes read as each format.
STAT_SUFFIXES = {".sav": "sav", ".zsav": "sav", ".dta": "dta"}
#: Longest variable name: SPSS 64 bytes, Stata 32 characters (the programs' documented limits,
#: from memory; readstat refuses longer names).
NAME_LIMITS = {"sav": 64, "dta": 32}
#: Longest variable label: SPSS 256 bytes, Stata 80 characters (readstat refuses longer ones
#: for Stata and cuts them for SPSS).
VARIABLE_LABEL_LIMITS = {"sav": 256, "dta": 80}
#: Longest value label in bytes: SPSS 120; Stata's limit (32,000) is never reached here.
VALUE_LABEL_LIMITS = {"sav": 120, "dta": 32_000}
#: Longest file label: SPSS 64 bytes, Stata 80 characters.
FILE_LABEL_LIMITS = {"sav": 64, "dta": 80}
#: Words neither program accepts as a variable name (SPSS's reserved keywords and Stata's
#: reserved names, from memory; compared without regard to case; Stata's ``str1`` ...
#: ``str2045`` below).
RESERVED = frozenset(
    "all and by eq ge gt le lt ne not or to with "
    "_all _b byte _coef _cons double float if in int long _n _pi _pred _rc _skip strl using".split()
)
_STRING_TYPE = re.compile(r"str\d+")
#: Characters kept in a variable name.
_NOT_NAME = re.compile(r"[^A-Za-z0-9_]")


def _reserved(name: str) -> bool:
    lowered = name.lower()
    return lowered in RESERVED or _STRING_TYPE.fullmatch(lowered) is not None


def unique_names(
    names: Sequence[str], limit: int | None = None, *, ignore_case: bool = True
) -> list[str]:
    """Make ``names`` unique, in order: a name already taken (ignoring case, unless
    ``ignore_case`` is False) gets ``_2``, ``_3`` ..., cut to stay within ``limit``
    characters."""
    taken: set[str] = set()
    out = []
    for name in names:
        candidate = name
        number = 1
        while (candidate.lower() if ignore_case else candidate) in taken:
            number += 1
            suffix = f"_{number}"
            stem = name if limit is None else name[: limit - len(suffix)]
            candidate = stem + suffix
        taken.add(candidate.lower() if ignore_case else candidate)
        out.append(candidate)
    return out


def statistical_names(names: Sequence[str], fmt: str) -> list[str]:
    """Valid, unique SPSS (``fmt="sav"``) or Stata (``"dta"``) variable names for ``names``,
    by the rule in the module docstring.

    >>> statistical_names(["respondent_id", "q-01", "1st", "with", "Q_01"], "dta")
    ['respondent_id', 'q_01', 'v1st', 'with_', 'Q_01_2']
    """
    limit = NAME_LIMITS[fmt]
    cleaned = []
    for name in names:
        text = _NOT_NAME.sub("_", str(name))
        if not text or not text[0].isalpha():
            text = "v" + text
        text = text[:limit]
        if _reserved(text):
            text = text[: limit - 1] + "_"
        cleaned.append(text)
    return unique_names(cleaned, limit)


def fit_label(text: str, fmt: str, kind: str = "variable") -> str:
    """Cut a label to the format's limit (``kind`` is ``variable``, ``value`` or ``file``); a cut
    label ends in ``...``. SPSS limits count UTF-8 bytes, Stata's characters."""
    limit = {"variable": VARIABLE_LABEL_LIMITS, "value": VALUE_LABEL_LIMITS,
             "file": FILE_LABEL_LIMITS}[kind][fmt]
    if fmt == "dta":
        return text if len(text) <= limit else text[: limit - 3] + "..."
    encoded = text.encode("utf-8")
    if len(encoded) <= limit:
        return text
    return encoded[: limit - 3].decode("utf-8", errors="ignore") + "..."


def for_writer(frame: pd.DataFrame) -> Any:
    """``frame`` as the SPSS and Stata writer reads it fastest: a polars frame with missing
    values as nulls. The writer walks every cell in Python; for a pandas frame it asks
    ``pandas.isna`` of each cell of a column with missing values (most of an export's time),
    for a polars frame it compares with None. The file holds the same values and types either
    way (``tests/service/test_exports.py`` reads both back)."""
    import polars as pl

    return pl.from_pandas(frame, nan_to_null=True)


def write_labelled(
    frame: pd.DataFrame,
    path: str | Path,
    fmt: str,
    *,
    variable_labels: Mapping[str, str],
    value_labels: Mapping[str, Mapping[int, str]],
    formats: Mapping[str, str] | None = None,
    measures: Mapping[str, str] | None = None,
    file_label: str = "",
) -> None:
    """Write ``frame`` (columns already named validly) as SPSS or Stata with labels.

    ``formats`` gives display formats by column (e.g. a date-time format for a column of the
    program's date-time numbers, ``F1.0`` for whole numbers); ``measures`` the SPSS
    measurement level by column (Stata has none). Labels are cut to the format's limits
    (:func:`fit_label`).
    SPSS files are written with the format's row compression (small whole numbers take one
    byte).
    """
    import pyreadstat

    column_labels: dict[str, str | None] = {
        name: fit_label(label, fmt) for name, label in variable_labels.items() if label
    }
    labels: dict[str, dict[int | float, str]] = {
        name: {code: fit_label(text, fmt, "value") for code, text in codes.items()}
        for name, codes in value_labels.items()
        if codes
    }
    rows = for_writer(frame)
    if fmt == "sav":
        pyreadstat.write_sav(
            rows, str(path), file_label=fit_label(file_label, fmt, "file"),
            column_labels=column_labels, variable_value_labels=labels, row_compress=True,
            variable_format=dict(formats or {}) or None,
            variable_measure=dict(measures or {}) or None,
        )
    elif fmt == "dta":
        pyreadstat.write_dta(
            rows, str(path), file_label=fit_label(file_label, fmt, "file"),
            column_labels=column_labels, variable_value_labels=labels,
            variable_format=dict(formats or {}) or None,
        )
    else:
        raise ValueError(f"format must be one of {', '.join(STAT_FORMATS)}; got {fmt!r}")


# Reading ----------------------------------------------------------------------------------------


@dataclass(frozen=True)
class LabelledTable:
    """A file's data (answer codes, not their labels) and its metadata."""

    frame: pd.DataFrame
    variable_labels: dict[str, str]
    value_labels: dict[str, dict[float, str]]
    #: Codes declared missing in the file, per variable (SPSS user-missing values).
    missing_codes: dict[str, set[float]]
    #: The program's display format per variable (``F8.0``, ``DATETIME20``, ``%td`` ...).
    formats: dict[str, str | None]
    #: ``string`` or a numeric storage type per variable.
    storage: dict[str, str]
    file_label: str


def read_labelled(path: str | Path, *, metadata_only: bool = False) -> LabelledTable:
    """Read an SPSS (.sav, .zsav) or Stata (.dta) file with pyreadstat.

    Values are the stored codes (value labels are not applied); codes declared missing in the
    file read as missing. With ``metadata_only`` no rows are read and ``missing_codes`` lists
    the declared missing codes. A file that cannot be read raises ``ResponseDataError``.
    """
    import pyreadstat

    path = Path(path)
    fmt = STAT_SUFFIXES.get(path.suffix.lower())
    if fmt is None:
        raise ResponseDataError(
            [ResponseProblem(None, None, None, f"cannot read {path.name}: not a .sav or .dta file")]
        )
    if not path.exists():
        raise ResponseDataError([ResponseProblem(None, None, None, f"no such file: {path}")])
    reader = pyreadstat.read_sav if fmt == "sav" else pyreadstat.read_dta
    try:
        # With user_missing the declared missing codes are listed (in the metadata only).
        frame, meta = reader(str(path), metadataonly=metadata_only, user_missing=metadata_only)
    except Exception as error:  # pyreadstat raises its own error types for damaged files
        raise ResponseDataError(
            [ResponseProblem(None, None, None, f"cannot read {path.name}: {error}")]
        ) from None
    missing: dict[str, set[float]] = {}
    for name, ranges in (getattr(meta, "missing_ranges", None) or {}).items():
        codes: set[float] = set()
        for entry in ranges:
            low, high = entry.get("lo"), entry.get("hi")
            if isinstance(low, int | float) and isinstance(high, int | float) and high - low < 1000:
                codes.update(float(v) for v in np.arange(np.ceil(low), np.floor(high) + 1))
        missing[name] = codes
    return LabelledTable(
        frame=frame,
        variable_labels={k: v for k, v in meta.column_names_to_labels.items() if v},
        value_labels={k: dict(v) for k, v in meta.variable_value_labels.items()},
        missing_codes=missing,
        formats=dict(meta.original_variable_types),
        storage=dict(meta.readstat_variable_types),
        file_label=meta.file_label or "",
    )


# Drafting an instrument -------------------------------------------------------------------------

#: What a file's labels cannot tell, printed with every draft.
UNGUESSABLE = (
    ("keyed", "every item is written keyed +1; set \"keyed\": -1 on reverse-keyed items"),
    ("scale", "no item has a scale; name the scale of each item"),
    ("opposite_pairs", "none are written; list pairs of items that state opposite things"),
    ("block", "no item has a block; name the grid or page each item was shown on"),
    ("instructed_answer", "attention-check items are not marked; give each one the answer "
                          "it asks for"),
)
#: Display formats of dates and times: SPSS's date formats and Stata's %t / %d formats.
_DATE_FORMAT = re.compile(
    r"^(%-?t|%-?d|(A|E|J|S)?DATE|DATETIME|YMDHMS|MTIME|DTIME|TIME|QYR|MOYR|WKYR|WKDAY|MONTH)",
    re.IGNORECASE,
)
#: Item ids the instrument accepts (``detectors.instrument.ItemId``).
_ITEM_ID = re.compile(r"^[A-Za-z0-9_.\-]{1,64}$")
#: Likert items have 2 to 10 points (the instrument's limits).
_MIN_POINTS, _MAX_POINTS = 2, 10
_MIN_LOWEST, _MAX_LOWEST = -50, 50


@dataclass(frozen=True)
class DraftColumn:
    """A column of the file: taken as an item (``reason`` None) or skipped, and why."""

    name: str
    reason: str | None = None
    response_format: dict[str, Any] | None = None
    text: str = ""
    note: str | None = None


@dataclass
class InstrumentDraft:
    """The drafted instrument document and what was decided for each column."""

    document: dict[str, Any]
    columns: list[DraftColumn] = field(default_factory=list)

    @property
    def items(self) -> list[DraftColumn]:
        return [c for c in self.columns if c.reason is None]

    @property
    def skipped(self) -> list[DraftColumn]:
        return [c for c in self.columns if c.reason is not None]


def _format_from_labels(
    codes: Mapping[float, str], missing: set[float]
) -> tuple[dict[str, Any] | None, str | None, str | None]:
    """(response format, reason for skipping, note) from a variable's value labels."""
    usable = {c: t for c, t in codes.items() if float(c) not in missing}
    if not usable:
        return None, "its value labels are all declared missing", None
    if any(float(c) != round(float(c)) for c in usable):
        return None, "value labels on codes that are not whole numbers", None
    whole = sorted(int(round(float(c))) for c in usable)
    lowest, highest = whole[0], whole[-1]
    points = highest - lowest + 1
    if points < _MIN_POINTS or points > _MAX_POINTS:
        return None, (
            f"labelled codes {lowest}..{highest} span {points} points; an item has 2 to 10 "
            "(declare codes such as 'no answer' missing in the file, or add the item by hand)"
        ), None
    if not _MIN_LOWEST <= lowest <= _MAX_LOWEST:
        return None, f"lowest code {lowest} is outside {_MIN_LOWEST}..{_MAX_LOWEST}", None
    by_code = {int(round(float(c))): str(t) for c, t in usable.items()}
    fmt: dict[str, Any] = {"points": points, "lowest": lowest}
    note = None
    if len(by_code) == points:
        fmt["labels"] = [by_code[code] for code in range(lowest, highest + 1)]
    else:
        note = (
            f"labels on {len(by_code)} of the {points} codes {lowest}..{highest}; the draft "
            "has no labels for this format"
        )
    return fmt, None, note


def _survey_id(text: str) -> str:
    cleaned = re.sub(r"[^A-Za-z0-9_.\-]+", "-", text).strip("-.")[:64]
    return cleaned or "survey"


def draft_instrument(
    path: str | Path,
    *,
    survey: str | None = None,
    id_column: str = "respondent_id",
    duration_column: str | None = "duration_seconds",
    skip: Iterable[str] = (),
) -> InstrumentDraft:
    """Draft an instrument from an SPSS or Stata file's variable and value labels.

    A column becomes an item when it is numeric, is not the id or duration column (nor one
    listed in ``skip``), has no date or time display format, has a name the instrument accepts
    as an item id, and carries value labels on whole-number codes (codes declared missing
    left out) spanning 2 to 10 points. Its text is the variable label; its response format is
    ``lowest`` .. ``highest`` of the labelled codes, with the labels when every code has one.
    The format shared by most items becomes the instrument's; the other items get their own.
    Keys, scales, opposite pairs, blocks and attention checks are not in such a file
    (:data:`UNGUESSABLE`): the draft leaves them out.
    """
    path = Path(path)
    table = read_labelled(path, metadata_only=True)
    skipped = set(skip)
    columns: list[DraftColumn] = []
    for name in table.storage:
        reason = None
        fmt, note = None, None
        if name == id_column:
            reason = "the respondent id column"
        elif duration_column is not None and name == duration_column:
            reason = "the duration column"
        elif name in skipped:
            reason = "left out with --skip"
        elif table.storage[name] == "string":
            reason = "text, not numeric codes"
        elif _DATE_FORMAT.match(table.formats.get(name, "") or ""):
            reason = f"a date or time (display format {table.formats[name]})"
        elif not _ITEM_ID.match(name):
            reason = "its name is not a valid item id (letters, digits, '_', '.', '-'; up to 64)"
        elif not table.value_labels.get(name):
            reason = "no value labels, so the answer options are unknown (add it by hand)"
        else:
            fmt, reason, note = _format_from_labels(
                table.value_labels[name], table.missing_codes.get(name, set())
            )
        columns.append(
            DraftColumn(
                name=name, reason=reason, response_format=fmt if reason is None else None,
                text=table.variable_labels.get(name, ""), note=note,
            )
        )
    taken = [c for c in columns if c.reason is None]
    if not taken:
        raise ResponseDataError(
            [ResponseProblem(None, None, c.name, f"not an item: {c.reason}") for c in columns]
            or [ResponseProblem(None, None, None, f"{path.name} has no columns")]
        )

    def key(fmt: dict[str, Any] | None) -> tuple:
        assert fmt is not None  # every column taken as an item has its format
        return fmt["points"], fmt["lowest"], tuple(fmt.get("labels") or ())

    counts: Counter[tuple] = Counter()
    first_seen: dict[tuple, int] = {}
    for position, column in enumerate(taken):
        counts[key(column.response_format)] += 1
        first_seen.setdefault(key(column.response_format), position)
    # The format of most items; on a tie, the one met first.
    common_key = max(counts, key=lambda k: (counts[k], -first_seen[k]))
    common = taken[first_seen[common_key]].response_format
    items = []
    for column in taken:
        item: dict[str, Any] = {"id": column.name, "text": column.text}
        if key(column.response_format) != common_key:
            item["response_format"] = column.response_format
        items.append(item)
    document = {
        "survey": survey if survey is not None else _survey_id(path.stem),
        "title": table.file_label,
        "response_format": common,
        "items": items,
    }
    return InstrumentDraft(document=document, columns=columns)
