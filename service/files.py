"""Reading response tables and writing screening results, for the CLI and the jobs."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from detectors import ResponseDataError, ResponseProblem, Screening, State

__all__ = [
    "read_table", "write_atomic", "screening_records", "write_screening", "OUTPUT_FORMATS",
    "FORMULA_STARTS", "formula_safe",
]

OUTPUT_FORMATS = ("csv", "json", "parquet")
#: Carried by every JSON screening document, which may travel far from the command line.
SCREENING_NOTE = (
    "Flags, verdicts and careless scores are evidence for a human reviewer's decision, not a "
    "verdict on a person: read the evidence before excluding anyone or withholding an "
    "incentive, and do not use them for automated decisions about people."
)
#: A text cell starting with one of these is taken for a formula by spreadsheet programs (CSV
#: injection: ``=HYPERLINK(...)``, ``@SUM(A1)``); every CSV writer of the service puts a single
#: quote before such a cell, which a spreadsheet shows as text. Common practice, no source.
FORMULA_STARTS = "=+-@\t\r"
_FORMULA_PATTERN = "^[=+\\-@\t\r]"
_READERS = {
    ".csv": "csv", ".txt": "csv", ".parquet": "parquet", ".pq": "parquet",
    ".sav": "labelled", ".zsav": "labelled", ".dta": "labelled",
}


def _id_text(column: pd.Series) -> pd.Series:
    """An id column as text; whole numbers (SPSS and Stata store numeric ids as doubles) lose
    their ``.0``."""
    if pd.api.types.is_float_dtype(column.dtype) or column.dtype == object:
        numbers = pd.to_numeric(column, errors="coerce")
        whole = numbers.notna() & (numbers == numbers.round())
        if whole.any() and (whole | column.isna()).all():
            return numbers.astype("Int64").astype("string")
    return column.astype("string")


def read_table(path: str | Path, id_column: str = "respondent_id") -> pd.DataFrame:
    """Read a responses table: CSV, Parquet, SPSS (.sav, .zsav) or Stata (.dta), chosen by the
    file's extension.

    The id column is read as text, so ids such as ``007`` keep their leading zeros (numeric ids
    of SPSS and Stata files are written without a decimal part); empty cells become missing
    values. SPSS and Stata files give the stored codes, not their value labels, and codes the
    file declares missing are missing.
    """
    path = Path(path)
    kind = _READERS.get(path.suffix.lower())
    if kind is None:
        raise ResponseDataError(
            [ResponseProblem(
                None, None, None,
                f"cannot read {path.name}: use a .csv, .parquet, .sav or .dta file",
            )]
        )
    if not path.exists():
        raise ResponseDataError([ResponseProblem(None, None, None, f"no such file: {path}")])
    if kind == "labelled":
        from .stat_files import read_labelled

        frame = read_labelled(path).frame
        if id_column in frame.columns:
            frame[id_column] = _id_text(frame[id_column])
        return frame
    try:
        if kind == "parquet":
            frame = pd.read_parquet(path)
            if id_column in frame.columns:
                frame[id_column] = frame[id_column].astype("string")
            return frame
        return pd.read_csv(path, dtype={id_column: "string"}, skipinitialspace=True)
    except (ValueError, OSError, pd.errors.ParserError) as error:
        raise ResponseDataError(
            [ResponseProblem(None, None, None, f"cannot read {path.name}: {error}")]
        ) from None


def write_atomic(path: str | Path, write: Any) -> None:
    """Write through a temporary file in the same folder, then rename: never half a file."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".part")
    os.close(handle)
    try:
        write(temporary)
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise


def screening_records(screening: Screening) -> list[dict[str, Any]]:
    """Every respondent with verdict, careless score, scale scores and every detector's score,
    flag, state, reason, evidence and sentence."""
    records = []
    count = screening.flag_count
    verdicts = screening.verdicts
    careless = [None if v != v else v for v in verdicts.careless_score.tolist()]
    scales = (
        screening.scales.astype(object).where(screening.scales.notna(), None).to_dict("records")
        if screening.scales is not None else None
    )
    sentences = {name: result.sentences() for name, result in screening.results.items()}
    for i, respondent in enumerate(screening.respondent_ids.tolist()):
        results = {}
        for name, result in screening.results.items():
            state = State(int(result.states[i]))
            assessed = state is State.ASSESSED
            results[name] = {
                "state": state.label,
                "score": float(result.scores[i]) if assessed else None,
                "flag": bool(result.flags[i]) if assessed else None,
                "reason": None if assessed else result.reasons[i],
                "evidence": result.evidence_for(i) if assessed else {},
                "sentence": sentences[name][i],
            }
        record = {
            "respondent_id": respondent,
            "flag_count": int(count[i]),
            "verdict": verdicts.verdict[i],
            "careless_score": careless[i],
            "flagging_families": verdicts.flagging_families(i),
            "verdict_reason": verdicts.reason(i),
        }
        if scales is not None:
            record["scales"] = scales[i]
        record["detectors"] = results
        records.append(record)
    return records


def write_screening(screening: Screening, out: str | Path, fmt: str) -> None:
    """Write the screening table as CSV or Parquet, or every detail as JSON."""
    if fmt == "json":
        document = {
            "survey": screening.instrument.survey,
            "note": SCREENING_NOTE,
            "respondents": screening_records(screening),
        }
        import orjson

        # orjson: the standard library's encoder runs in Python once it indents (minutes at
        # 200,000 respondents); missing values are written as null
        text = orjson.dumps(document, option=orjson.OPT_INDENT_2 | orjson.OPT_SERIALIZE_NUMPY)
        write_atomic(out, lambda p: Path(p).write_bytes(text))
        return
    frame = screening.to_frame()
    if fmt == "csv":
        write_atomic(out, lambda p: write_csv(frame, p))
    elif fmt == "parquet":
        write_atomic(out, lambda p: frame.to_parquet(p, index=False))
    else:
        raise ValueError(f"unknown output format {fmt!r}; use one of {', '.join(OUTPUT_FORMATS)}")


def write_csv(frame: pd.DataFrame, path: str | Path) -> None:
    """CSV through Arrow's writer (several times faster than pandas' on wide tables); scores
    rounded to 6 decimals, missing values as empty cells, text quoted only where needed and
    made ``formula_safe``."""
    import pyarrow as pa
    import pyarrow.csv as pacsv

    rounded = frame.copy(deep=False)
    for column in rounded.columns:
        if rounded[column].dtype == np.float64:
            rounded[column] = rounded[column].round(6)
    table = _formula_safe_table(pa.Table.from_pandas(rounded, preserve_index=False))
    pacsv.write_csv(table, str(path), pacsv.WriteOptions(quoting_style="needed"))


def formula_safe(values: Any) -> Any:
    """Text cells for a CSV file, each starting with a quote where it would start a formula
    (``FORMULA_STARTS``): a ``str``, or an Arrow string array (missing values stay missing)."""
    if isinstance(values, str):
        return "'" + values if values and values[0] in FORMULA_STARTS else values
    import pyarrow as pa
    import pyarrow.compute as pc

    quote, nothing = pa.scalar("'", type=values.type), pa.scalar("", type=values.type)
    risky = pc.match_substring_regex(values, _FORMULA_PATTERN)
    return pc.if_else(risky, pc.binary_join_element_wise(quote, values, nothing), values)


def _formula_safe_table(table: Any) -> Any:
    """The table with every text column and every column name made ``formula_safe``."""
    import pyarrow as pa

    columns = [
        formula_safe(column) if pa.types.is_string(column.type) or pa.types.is_large_string(
            column.type
        ) else column
        for column in table.columns
    ]
    return pa.table(columns, names=[formula_safe(name) for name in table.column_names])


def format_from_path(path: str | Path | None, default: str = "csv") -> str:
    if path is None:
        return default
    suffix = Path(path).suffix.lower().lstrip(".")
    return {"pq": "parquet"}.get(suffix, suffix) if suffix in ("csv", "json", "parquet", "pq") else default
