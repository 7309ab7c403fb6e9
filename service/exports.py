"""Exports: a stored survey as one table, one row per respondent, in CSV, Parquet, SPSS (.sav)
or Stata (.dta).

Columns, in order:

- ``respondent_id``, ``version`` (the survey version the respondent was screened with),
  ``received_at``, ``submitted_at`` (UTC), ``duration_seconds``;
- one column per item (answer codes as received; empty when unanswered): the current
  version's items in presentation order, then items only earlier versions had;
- ``<detector>_score`` and ``<detector>_flag`` (1 flagged, 0 not, empty when not assessed or not
  applicable) for every detector of the engine's registry, from the stored results (stored
  results of a detector since removed from the registry are counted in the summary, not
  exported; a re-screen replaces them);
- ``flag_count``, ``verdict``, ``careless_score``, ``review_decision`` (the latest review);
- the scale scores of ``detectors.scales.scale_scores`` (``scale_<name>`` and, where a scale holds
  opposite pairs, ``scale_<name>_adjusted``), computed from the stored answers with each
  respondent's own survey version.

Rows come in the order respondents arrived. Respondents are read and parsed as columns
(``survey_data``: a chunk at a time, or the whole survey already read, as the nightly job
shares it with the report) and turned into rows in chunks of :data:`EXPORT_CHUNK`; CSV and
Parquet are written chunk by chunk, SPSS and Stata (whose writer takes a whole table) from
the joined chunks. Every file is written atomically.

In SPSS and Stata files, names are made valid by ``stat_files.statistical_names``; items carry
their text as variable label and their response format's labels as value labels, scores carry
the detector's summary, flags are labelled 0/1, and ``verdict`` and ``review_decision`` are
integer codes with value labels (codes in the order of ``models.Verdict`` and
``models.Decision``, from 0).
"""

from __future__ import annotations

import csv
import dataclasses
import datetime as dt
import io
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy.orm import Session

from detectors import MISSING, REGISTRY, ResponseMatrix, State
from detectors.scales import scale_scores

from . import store
from .files import formula_safe, write_atomic
from .models import Decision, Survey, Verdict
from .screeners import Screener
from .stat_files import STAT_FORMATS, statistical_names, unique_names, write_labelled
from .survey_data import SurveyData, SurveyItems, survey_items, survey_parts

__all__ = [
    "EXPORT_FORMATS",
    "WITHOUT_CHOICES",
    "MEDIA_TYPES",
    "SUFFIXES",
    "EXPORT_CHUNK",
    "ExportColumn",
    "ExportLayout",
    "ExportSummary",
    "export_layout",
    "export_chunks",
    "export_frame",
    "write_export",
]

EXPORT_FORMATS = ("csv", "parquet", "sav", "dta")
#: ``excluded``: respondents whose latest review is ``exclude``; ``flagged``: respondents with at
#: least one flag (``flag_count > 0``, as ``flagged=true`` on the respondents list).
WITHOUT_CHOICES = ("excluded", "flagged")
MEDIA_TYPES = {
    "csv": "text/csv; charset=utf-8",
    "parquet": "application/vnd.apache.parquet",
    "sav": "application/x-spss-sav",
    "dta": "application/x-stata-dta",
}
SUFFIXES = {"csv": ".csv", "parquet": ".parquet", "sav": ".sav", "dta": ".dta"}
#: Respondents read, parsed and scored per step: 50,000 keeps a 1,000,000 x 50 export under
#: 600 MB for CSV and Parquet, against about 820 MB with 100,000, at the same speed
#: (bench_export.py).
EXPORT_CHUNK = 50_000
#: Decimals of scores in CSV files (as ``heedful screen`` writes them).
CSV_DECIMALS = 6

VERDICT_CODES = {verdict.value: code for code, verdict in enumerate(Verdict)}
DECISION_CODES = {decision.value: code for code, decision in enumerate(Decision)}
FLAG_LABELS = {0: "not flagged", 1: "flagged"}
#: Display width of whole-number counts (version, flag count) in SPSS and Stata.
COUNT_DIGITS = 8


@dataclass(frozen=True)
class ExportColumn:
    """One column of the export: its name (CSV and Parquet), kind, label and value labels.

    ``kind`` is ``text``, ``int8`` (answers, flags), ``int16``, ``float``, ``time`` (UTC), or
    ``code`` (text in CSV and Parquet, labelled integer codes in SPSS and Stata). ``measure``
    is the SPSS measurement level (``nominal``, ``ordinal``, ``scale``); ``digits`` the width
    of a whole-number column's display format (``F1.0``, ``%1.0f``), None for other columns.
    """

    name: str
    kind: str
    label: str
    value_labels: dict[int, str] | None = None
    measure: str = "scale"
    digits: int | None = None


@dataclass
class ExportLayout:
    """The columns of a survey's export and what is needed to fill them."""

    survey: Survey
    columns: list[ExportColumn]
    items: list[str]
    detectors: list[str]
    scale_columns: list[str]
    screeners: dict[int, Screener]
    numbers: dict[int, int]
    #: Renamed column to the item, detector column or scale column it stands for, when an
    #: item id clashed with another column's name.
    names: dict[str, str] = field(default_factory=dict)
    #: Stored results of detectors no longer in the registry, met while reading (left out).
    unregistered_results: int = 0


@dataclass(frozen=True)
class ExportSummary:
    """What :func:`write_export` wrote."""

    survey: str
    format: str
    path: Path
    respondents: int
    left_out: int
    columns: int
    without: tuple[str, ...]
    #: Original column name to the name written, for names that had to change.
    renamed: dict[str, str]
    #: Stored results of detectors no longer in the registry (not in the export; a re-screen
    #: replaces them).
    unregistered_results: int = 0


def _check_options(fmt: str | None, without: Iterable[str]) -> tuple[str, ...]:
    if fmt is not None and fmt not in EXPORT_FORMATS:
        raise ValueError(f"format must be one of {', '.join(EXPORT_FORMATS)}; got {fmt!r}")
    chosen = tuple(dict.fromkeys(without))
    for entry in chosen:
        if entry not in WITHOUT_CHOICES:
            raise ValueError(
                f"without must be among {', '.join(WITHOUT_CHOICES)}; got {entry!r}"
            )
    return chosen


def export_layout(
    session: Session, survey: Survey, known: SurveyItems | None = None
) -> ExportLayout:
    """The export's columns for a survey: items of every version, detectors, scales
    (``known``: the survey's versions and items when already read)."""
    items_of = known or survey_items(session, survey)
    versions, numbers, screeners = items_of.versions, items_of.numbers, items_of.screeners
    # The current version first, then earlier ones, newest first.
    newest_first = sorted(versions, key=lambda v: (v.id != survey.current_version_id, -v.number))
    item_source: dict[str, tuple[Any, Any]] = {}
    scale_columns: list[str] = []
    for version in newest_first:
        instrument = screeners[version.id].instrument
        for item in instrument.items:
            item_source.setdefault(item.id, (instrument, item))
        empty = ResponseMatrix(
            respondent_ids=np.array([], dtype=object),
            answers=np.empty((0, len(instrument.items)), dtype=np.int8),
        )
        for column in scale_scores(instrument, empty).columns:
            if column not in scale_columns:
                scale_columns.append(str(column))
    items = list(item_source)
    detectors = list(REGISTRY)

    columns = [
        ExportColumn("respondent_id", "text", "Respondent id", measure="nominal"),
        ExportColumn(
            "version", "int16", "Survey version the respondent was screened with",
            measure="nominal", digits=COUNT_DIGITS,
        ),
        ExportColumn("received_at", "time", "When the response was received (UTC)"),
        ExportColumn("submitted_at", "time", "When the respondent submitted, as sent (UTC)"),
        ExportColumn("duration_seconds", "float", "Seconds the respondent took, as sent"),
    ]
    first_item = len(columns)
    for item_id in items:
        instrument, item = item_source[item_id]
        fmt = instrument.format_of(item)
        labels = (
            {fmt.lowest + k: text for k, text in enumerate(fmt.labels)} if fmt.labels else None
        )
        digits = max(len(str(fmt.lowest)), len(str(fmt.lowest + fmt.points - 1)))
        columns.append(
            ExportColumn(
                item_id, "int8", item.text or item_id, labels, measure="ordinal", digits=digits
            )
        )
    for name in detectors:
        summary = REGISTRY[name].summary
        columns.append(ExportColumn(f"{name}_score", "float", f"{name} score: {summary}"))
        columns.append(
            ExportColumn(
                f"{name}_flag", "int8",
                f"{name} flag (1 flagged, 0 not; empty when not assessed)", FLAG_LABELS,
                measure="nominal", digits=1,
            )
        )
    columns += [
        ExportColumn(
            "flag_count", "int16", "Number of detectors that flagged the respondent",
            digits=COUNT_DIGITS,
        ),
        ExportColumn(
            "verdict", "code",
            "Screening verdict: evidence for a reviewer's decision, not a decision",
            {code: value for value, code in VERDICT_CODES.items()},
            measure="nominal", digits=1,
        ),
        ExportColumn(
            "careless_score", "float", "Combined carelessness score, 0 to 1 (higher = more suspect)"
        ),
        ExportColumn(
            "review_decision", "code", "Latest review decision (empty when not reviewed)",
            {code: value for value, code in DECISION_CODES.items()},
            measure="nominal", digits=1,
        ),
    ]
    for column in scale_columns:
        base = column.removesuffix("_adjusted")
        scale = base.removeprefix("scale_")
        if column.endswith("_adjusted") and column != base:
            label = f"Scale {scale}, corrected for acquiescence"
        else:
            label = (
                f"Scale {scale}: mean of the answered items after reverse keying (empty when "
                "fewer than half are answered)"
            )
        columns.append(ExportColumn(column, "float", label))
    # An item id may clash with another column's name ("verdict", "scale_x"): the item gets a
    # suffix, the other columns keep their names.
    item_positions = list(range(first_item, first_item + len(items)))
    others = [i for i in range(len(columns)) if not first_item <= i < first_item + len(items)]
    order = others + item_positions
    unique = unique_names([columns[i].name for i in order], ignore_case=False)
    names = {}
    for position, name in zip(order, unique, strict=True):
        clashing = columns[position]
        if name != clashing.name:
            names[name] = clashing.name
            columns[position] = dataclasses.replace(clashing, name=name)
    return ExportLayout(
        survey=survey, columns=columns, items=items, detectors=detectors,
        scale_columns=scale_columns, screeners=screeners, numbers=numbers, names=names,
    )


# Stored respondents to rows ---------------------------------------------------------------------


def _nullable_int8(values: np.ndarray, missing: np.ndarray) -> pd.arrays.IntegerArray:
    data = np.where(missing, 0, values).astype(np.int8)
    return pd.arrays.IntegerArray(data, missing.copy())


def _utc(values: np.ndarray) -> Any:
    return pd.DatetimeIndex(values).tz_localize("UTC").array


def _chunk_frame(layout: ExportLayout, part: SurveyData) -> pd.DataFrame:
    n = len(part)
    assert layout.items == part.layout.items  # both from survey_items
    answers = part.answers
    results = part.results
    at = {name: j for j, name in enumerate(results.names)}
    # Results of detectors no longer in the registry are counted, not exported.
    retired = [j for j, name in enumerate(results.names) if name not in REGISTRY]
    layout.unregistered_results += int(results.present[:, retired].sum()) if retired else 0
    data: dict[str, Any] = {}
    columns = iter(layout.columns)

    def put(values: Any) -> None:
        data[next(columns).name] = values

    put(pd.array(part.respondent_ids, dtype="string"))
    numbers = np.array([layout.numbers[v] for v in part.version_ids.tolist()], dtype=np.int16)
    put(pd.array(numbers, dtype="Int16"))
    put(_utc(part.received_at))
    put(_utc(part.submitted_at))
    put(part.durations)
    for j in range(len(layout.items)):
        put(_nullable_int8(answers[:, j], answers[:, j] == MISSING))
    for name in layout.detectors:
        if name not in at:
            put(np.full(n, np.nan))
            put(_nullable_int8(np.zeros(n, np.int8), np.ones(n, dtype=bool)))
            continue
        j = at[name]
        assessed = results.present[:, j] & (results.states[:, j] == State.ASSESSED)
        put(np.where(assessed, results.scores[:, j], np.nan))
        put(_nullable_int8(results.flagged[:, j].astype(np.int8), ~assessed))
    put(pd.array(part.flag_counts.astype(np.int16), dtype="Int16"))
    put(pd.array(part.verdicts, dtype="string"))
    put(part.careless_scores)
    put(pd.array(part.decisions, dtype="string"))
    scales = {column: np.full(n, np.nan) for column in layout.scale_columns}
    for version_id in np.unique(part.version_ids).tolist():
        rows_of, answers_of = part.of_version(version_id)
        instrument = layout.screeners[version_id].instrument
        matrix = ResponseMatrix(respondent_ids=part.respondent_ids[rows_of], answers=answers_of)
        for column, values in scale_scores(instrument, matrix).items():
            scales[str(column)][rows_of] = values.to_numpy(dtype=np.float64)
    for column in layout.scale_columns:
        put(scales[column])
    return pd.DataFrame(data, copy=False)


def export_chunks(
    session: Session,
    layout: ExportLayout,
    *,
    without: Iterable[str] = (),
    chunk_size: int = EXPORT_CHUNK,
    stored: SurveyData | None = None,
) -> Iterator[pd.DataFrame]:
    """The export's rows, ``chunk_size`` respondents at a time, in order of arrival: from
    ``stored`` when given (the survey already read), else read a chunk at a time."""
    chosen = _check_options(None, without)
    if stored is not None:
        kept = stored.without(chosen)
        for start in range(0, len(kept), chunk_size):
            yield _chunk_frame(layout, kept.take(slice(start, start + chunk_size)))
        return
    items = survey_items(session, layout.survey)
    for part in survey_parts(session, layout.survey, layout=items, chunk=chunk_size):
        kept = part.without(chosen)
        if len(kept):
            yield _chunk_frame(layout, kept)


def _empty_frame(layout: ExportLayout) -> pd.DataFrame:
    dtypes = {"text": "string", "int8": "Int8", "int16": "Int16", "float": "float64",
              "time": "datetime64[us, UTC]", "code": "string"}
    return pd.DataFrame({c.name: pd.Series(dtype=dtypes[c.kind]) for c in layout.columns})


def export_frame(
    session: Session, survey: Survey, *, without: Iterable[str] = (),
    stored: SurveyData | None = None,
) -> tuple[pd.DataFrame, ExportLayout]:
    """The whole export as one table (CSV and Parquet column names and types)."""
    layout = export_layout(session, survey, None if stored is None else stored.layout)
    parts = list(export_chunks(session, layout, without=without, stored=stored))
    frame = pd.concat(parts, ignore_index=True) if parts else _empty_frame(layout)
    return frame, layout


# Writing ----------------------------------------------------------------------------------------


def _arrow_schema(layout: ExportLayout, for_csv: bool) -> Any:
    import pyarrow as pa

    types: dict[str, pa.DataType] = {"text": pa.string(), "int8": pa.int8(), "int16": pa.int16(),
             "float": pa.float64(), "time": pa.timestamp("us", tz="UTC"), "code": pa.string()}
    if for_csv:
        types["time"] = pa.string()
    return pa.schema([(c.name, types[c.kind]) for c in layout.columns])


def _arrow_table(frame: pd.DataFrame, layout: ExportLayout, schema: Any, for_csv: bool) -> Any:
    import pyarrow as pa
    import pyarrow.compute as pc

    arrays: list[pa.Array] = []
    for column in layout.columns:
        values = frame[column.name]
        array: pa.Array
        if column.kind == "time":
            stamps = pa.array(values, type=pa.timestamp("us", tz="UTC"))
            # pyarrow-stubs accept only time-zone-less timestamps here; Arrow takes both.
            array = (
                pc.strftime(stamps, format="%Y-%m-%dT%H:%M:%SZ")  # type: ignore[arg-type]
                if for_csv else stamps
            )
        elif column.kind == "text" and for_csv:
            array = formula_safe(pa.array(values, type=pa.string(), from_pandas=True))
        elif column.kind == "float" and for_csv:
            array = pa.array(values.to_numpy().round(CSV_DECIMALS), type=pa.float64())
        else:
            array = pa.array(values, type=schema.field(column.name).type, from_pandas=True)
        arrays.append(array)
    return pa.Table.from_arrays(arrays, schema=schema)


def _write_streamed(
    chunks: Iterator[pd.DataFrame], layout: ExportLayout, fmt: str, path: str
) -> int:
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    for_csv = fmt == "csv"
    schema = _arrow_schema(layout, for_csv)
    written = 0
    with open(path, "wb") as handle:
        if for_csv:
            # The header is written here, quoted only where needed (Arrow quotes every name).
            header = io.StringIO()
            csv.writer(header, lineterminator="\n").writerow(
                [formula_safe(name) for name in schema.names]
            )
            handle.write(header.getvalue().encode("utf-8"))
            writer: Any = pacsv.CSVWriter(
                handle, schema,
                write_options=pacsv.WriteOptions(include_header=False, quoting_style="needed"),
            )
        else:
            writer = pq.ParquetWriter(handle, schema)
        with writer:
            for chunk in chunks:
                writer.write_table(_arrow_table(chunk, layout, schema, for_csv))
                written += len(chunk)
            if written == 0 and not for_csv:
                writer.write_table(schema.empty_table())
    return written


def _statistical_layout(
    layout: ExportLayout, fmt: str
) -> tuple[list[str], dict[str, str], dict[str, dict[int, str]], dict[str, str]]:
    """SPSS/Stata names of the columns, their variable and value labels, and the renamed
    columns (original name to the name written)."""
    names = statistical_names([c.name for c in layout.columns], fmt)
    variable_labels: dict[str, str] = {}
    value_labels: dict[str, dict[int, str]] = {}
    renamed: dict[str, str] = {}
    for column, name in zip(layout.columns, names, strict=True):
        variable_labels[name] = column.label
        if column.value_labels:
            value_labels[name] = column.value_labels
        if name != column.name:
            renamed[layout.names.get(column.name, column.name)] = name
    return names, variable_labels, value_labels, renamed


def _display(layout: ExportLayout, names: list[str], fmt: str) -> tuple[dict, dict]:
    """Display formats and measurement levels by written name: whole numbers without
    decimals (an answer of 4 shows as 4, not 4.00), times as date-times; ordinal answers,
    nominal codes and flags, scale scores and counts. Stata files hold no measurement level."""
    formats: dict[str, str] = {}
    measures: dict[str, str] = {}
    for column, name in zip(layout.columns, names, strict=True):
        if column.kind == "time":
            formats[name] = TIME_FORMATS[fmt]
        elif column.digits is not None:
            formats[name] = f"F{column.digits}.0" if fmt == "sav" else f"%{column.digits}.0f"
        measures[name] = column.measure
    return formats, measures


#: Seconds from the programs' date origins to 1970-01-01: SPSS counts seconds from 1582-10-14,
#: Stata's %tc milliseconds from 1960-01-01.
_SPSS_EPOCH = (dt.datetime(1970, 1, 1) - dt.datetime(1582, 10, 14)).total_seconds()
_STATA_EPOCH = (dt.datetime(1970, 1, 1) - dt.datetime(1960, 1, 1)).total_seconds()
#: Display formats of the time columns (SPSS date-time with hundredths; Stata %tc).
TIME_FORMATS = {"sav": "DATETIME23.2", "dta": "%tc"}


def _time_numbers(values: pd.Series, fmt: str) -> np.ndarray:
    """UTC times as the program's numbers (given to the writer with a date-time format, so it
    need not copy the whole table to convert them)."""
    micros = values.dt.tz_convert("UTC").dt.tz_localize(None).to_numpy("datetime64[us]")
    missing = np.isnat(micros)
    seconds = micros.astype(np.int64) / 1e6
    if fmt == "sav":
        out = seconds + _SPSS_EPOCH
    else:
        out = np.round((seconds + _STATA_EPOCH) * 1000)
    out[missing] = np.nan
    return out


def _statistical_chunk(
    frame: pd.DataFrame, layout: ExportLayout, names: list[str], fmt: str
) -> dict[str, np.ndarray]:
    """A chunk's columns with SPSS/Stata names and types: codes for ``code`` columns, times
    as numbers, whole numbers as float32 (exact for them, half the memory; written as
    doubles)."""
    data: dict[str, np.ndarray] = {}
    for column, name in zip(layout.columns, names, strict=True):
        values = frame[column.name]
        if column.kind == "text":
            out = values.astype(object).where(values.notna(), "").to_numpy(dtype=object)
        elif column.kind == "time":
            out = _time_numbers(values, fmt)
        elif column.kind == "code":
            codes = VERDICT_CODES if column.name == "verdict" else DECISION_CODES
            out = values.map(codes).to_numpy(dtype=np.float32, na_value=np.nan)
        elif column.kind in ("int8", "int16"):
            out = values.to_numpy(dtype=np.float32, na_value=np.nan)
        else:
            out = values.to_numpy(dtype=np.float64)
        data[name] = out
    return data


def write_export(
    session: Session,
    survey: Survey,
    fmt: str,
    path: str | Path,
    *,
    without: Iterable[str] = (),
    chunk_size: int = EXPORT_CHUNK,
    stored: SurveyData | None = None,
) -> ExportSummary:
    """Write a survey's export to ``path`` (atomically) in ``fmt`` (csv, parquet, sav, dta).

    ``without`` leaves out ``excluded`` respondents (latest review ``exclude``) and/or
    ``flagged`` ones (``flag_count > 0``). ``stored``: the survey as already read (the nightly
    job shares one read with the report); without it, reads in the caller's session, a chunk
    per query:
    a SQLite read transaction sees one snapshot throughout; under PostgreSQL's default
    isolation, respondents stored while the export runs may appear at its end. Raises
    ``ValueError`` for an unknown format or choice.
    """
    chosen = _check_options(fmt, without)
    path = Path(path)
    layout = export_layout(session, survey, None if stored is None else stored.layout)
    renamed = {layout.names[c]: c for c in layout.names}
    written = 0
    if fmt in STAT_FORMATS:
        names, variable_labels, value_labels, renamed = _statistical_layout(layout, fmt)
        # The writer takes one table: chunks are converted as they come and joined column by
        # column, each column's pieces freed as it is joined.
        pieces: dict[str, list[np.ndarray]] = {name: [] for name in names}
        for chunk in export_chunks(
            session, layout, without=chosen, chunk_size=chunk_size, stored=stored
        ):
            for name, values in _statistical_chunk(chunk, layout, names, fmt).items():
                pieces[name].append(values)
            written += len(chunk)
        if written == 0:
            for name, values in _statistical_chunk(_empty_frame(layout), layout, names, fmt).items():
                pieces[name].append(values)
        data = {}
        for name in names:
            parts = pieces.pop(name)
            data[name] = parts[0] if len(parts) == 1 else np.concatenate(parts)
            del parts
        table = pd.DataFrame(data, copy=False)
        del data
        formats, measures = _display(layout, names, fmt)
        write_atomic(
            path,
            lambda p: write_labelled(
                table, p, fmt, variable_labels=variable_labels, value_labels=value_labels,
                formats=formats, measures=measures, file_label=f"Heedful export of {survey.survey}",
            ),
        )
    else:
        def write(temporary: str) -> None:
            nonlocal written
            chunks = export_chunks(
                session, layout, without=chosen, chunk_size=chunk_size, stored=stored
            )
            written = _write_streamed(chunks, layout, fmt, temporary)

        write_atomic(path, write)
    # Counting costs a pass over the survey's index: only done when someone can be left out.
    if not chosen:
        left_out = 0
    elif stored is not None:
        left_out = len(stored) - written
    else:
        left_out = max(0, store.count_respondents(session, survey.id) - written)
    return ExportSummary(
        survey=survey.survey, format=fmt, path=path, respondents=written,
        left_out=left_out, columns=len(layout.columns), without=chosen, renamed=renamed,
        unregistered_results=layout.unregistered_results,
    )
