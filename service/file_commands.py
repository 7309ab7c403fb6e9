"""The file subcommands of ``heedful``: export, import, instrument-from.

Only argument parsing and printing live here; the work is done by ``exports``, ``imports`` and
``stat_files``.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from .command_support import (
    EXIT_BAD_INPUT,
    EXIT_OK,
    add_database_option,
    database_named,
    guard,
    open_database,
    print_error,
    settings_from,
    unknown_survey,
)

__all__ = ["register_file_commands"]

#: Problems printed before "... and N more".
SHOW_PROBLEMS = 20
CAUTION = "Flags are evidence for a reviewer's decision, not a verdict on a respondent."
#: ``exports.EXPORT_FORMATS`` and ``exports.WITHOUT_CHOICES``, repeated so that building the
#: parser does not import the export machinery (a test keeps them equal).
EXPORT_FORMATS = ("csv", "parquet", "sav", "dta")
WITHOUT_CHOICES = ("excluded", "flagged")


def _format_from(out: str, given: str | None) -> str | None:
    if given is not None:
        return given
    suffix = Path(out).suffix.lower().lstrip(".")
    return {"pq": "parquet"}.get(suffix, suffix if suffix in EXPORT_FORMATS else None)


# export -----------------------------------------------------------------------------------------


def cmd_export(args: argparse.Namespace) -> int:
    from . import store
    from .exports import write_export

    fmt = _format_from(args.out, args.format)
    if fmt is None:
        return print_error(
            f"cannot tell the format from {args.out!r}: give --format "
            f"({', '.join(EXPORT_FORMATS)}) or an --out file ending in .csv, .parquet, .sav "
            "or .dta"
        )
    database = open_database(args)
    try:
        with database.read() as session:
            survey = store.get_survey(session, args.survey)
            if survey is None:
                raise unknown_survey(args, args.survey)
            summary = write_export(session, survey, fmt, args.out, without=args.without or ())
    finally:
        database.dispose()
    print(
        f"Wrote {summary.path}: {summary.respondents} respondent(s), {summary.columns} "
        f"column(s), {fmt}."
    )
    if summary.without:
        print(
            f"Left out {summary.left_out} respondent(s) (--without {' '.join(summary.without)})."
        )
    if "flagged" in summary.without:
        print(
            "Respondents with flags were left out on the screening's evidence alone; review "
            "them and record decisions first, then export --without excluded."
        )
    for original, name in summary.renamed.items():
        print(f"  column {original!r} written as {name!r}")
    if summary.unregistered_results:
        print(
            f"{summary.unregistered_results} stored result(s) of detectors no longer in the "
            "registry are not in the export; `heedful rescreen` replaces them."
        )
    print(CAUTION)
    return EXIT_OK


# import -----------------------------------------------------------------------------------------


def _print_problems(problems: list[Any], stream: Any) -> None:
    for p in problems[:SHOW_PROBLEMS]:
        where = [f"row {p.row}" if p.row is not None else "file"]
        if p.respondent_id:
            where.append(f"respondent {p.respondent_id!r}")
        if p.column:
            where.append(p.column)
        print(f"  {', '.join(where)}: {p.reason}", file=stream)
    if len(problems) > SHOW_PROBLEMS:
        print(f"  ... and {len(problems) - SHOW_PROBLEMS} more", file=stream)


def cmd_import(args: argparse.Namespace) -> int:
    from detectors import ResponseProblem

    from .files import read_table
    from .imports import IMPORT_BATCH, ImportRefused, import_table

    batch_size = IMPORT_BATCH if args.batch_size is None else args.batch_size
    if batch_size < 1:
        return print_error("--batch-size must be at least 1")
    frame = read_table(args.file, id_column=args.id_column)
    settings = settings_from(args)
    database = open_database(args)
    try:
        report = import_table(
            database, args.survey, frame, settings, id_column=args.id_column,
            duration_column=args.duration_column or None, replace=args.replace,
            partial=args.partial, batch_size=batch_size,
        )
    except LookupError as error:
        return print_error(f"{error.args[0]} (database {database_named(args)})")
    except ImportRefused as refused:
        print(
            f"error: nothing was stored: {len(refused.problems)} problem(s) in {args.file}",
            file=sys.stderr,
        )
        _print_problems(refused.problems, sys.stderr)
        hints = ["--partial stores the valid rows and reports the others"]
        if refused.conflicts:
            hints.insert(0, "--replace replaces the stored answers (the earlier ones are kept "
                            "in the respondent's history)")
        for hint in hints:
            print(f"  ({hint})", file=sys.stderr)
        return EXIT_BAD_INPUT
    finally:
        database.dispose()
    print(
        f"{args.file}: {report.rows} row(s) into survey {report.survey!r} (version "
        f"{report.version}): {report.stored} stored, {report.replaced} replaced, "
        f"{report.duplicates} duplicate(s) (already stored with the same answers), "
        f"{len(report.rejected)} rejected"
    )
    if report.ignored_columns:
        shown = ", ".join(report.ignored_columns[:SHOW_PROBLEMS])
        more = len(report.ignored_columns) - SHOW_PROBLEMS
        print(
            f"Ignored {len(report.ignored_columns)} column(s) that are not items of the "
            f"survey: {shown}" + (f" and {more} more" if more > 0 else "")
        )
    if report.rejected:
        print("Rejected rows:")
        _print_problems(
            [
                ResponseProblem(entry["row"], entry["respondent_id"], p["item"], p["reason"])
                for entry in report.rejected
                for p in entry["problems"]
            ],
            sys.stdout,
        )
    return EXIT_OK


# instrument-from --------------------------------------------------------------------------------


def cmd_instrument_from(args: argparse.Namespace) -> int:
    from detectors import lint, parse_instrument

    from .files import write_atomic
    from .stat_files import UNGUESSABLE, draft_instrument

    skip = [name.strip() for name in (args.skip or "").split(",") if name.strip()]
    draft = draft_instrument(
        args.file, survey=args.survey, id_column=args.id_column,
        duration_column=args.duration_column or None, skip=skip,
    )
    instrument = parse_instrument(draft.document)
    notes = lint(instrument)
    text = json.dumps(draft.document, indent=2, ensure_ascii=False) + "\n"
    write_atomic(args.out, lambda p: Path(p).write_text(text, encoding="utf-8"))
    items = draft.items
    formats = {json.dumps(c.response_format, sort_keys=True) for c in items}
    print(
        f"Wrote {args.out}: survey {instrument.survey!r}, {len(items)} item(s) from "
        f"{len(draft.columns)} column(s) of {args.file}, {len(formats)} response format(s)."
    )
    for column in items:
        if column.note:
            print(f"  {column.name}: {column.note}")
    if draft.skipped:
        print("Columns not taken as items:")
        for column in draft.skipped:
            print(f"  {column.name}: {column.reason}")
    print()
    print("NOT IN THE FILE: complete the draft before screening with it.")
    print("A file's labels cannot tell these; the draft leaves them out:")
    for name, what in UNGUESSABLE:
        print(f"  - {name}: {what}")
    print(
        "Until they are filled in, acquiescence, the keyed indices, straightlining per grid "
        "and the attention checks cannot judge anyone correctly."
    )
    for note in notes:
        print(f"warning: {note}")
    return EXIT_OK


# the parsers ------------------------------------------------------------------------------------


def register_file_commands(subparsers: Any) -> None:
    """Add export, import and instrument-from to ``heedful``'s argument parser."""
    p = subparsers.add_parser(
        "export",
        help="write a stored survey, one row per respondent, as CSV, Parquet, SPSS or Stata",
    )
    p.add_argument("--survey", required=True)
    p.add_argument("--out", required=True, help="output file")
    p.add_argument(
        "--format", choices=EXPORT_FORMATS,
        help="csv, parquet, sav (SPSS) or dta (Stata); default: from --out's extension",
    )
    p.add_argument(
        "--without", action="append", choices=WITHOUT_CHOICES,
        help="leave out respondents whose latest review is 'exclude' (excluded) or who have any "
        "flag (flagged: on evidence alone; review first); repeatable",
    )
    add_database_option(p)
    p.set_defaults(func=guard(cmd_export))

    p = subparsers.add_parser(
        "import",
        help="post a responses file (CSV, Parquet, SPSS .sav, Stata .dta) into a stored survey",
    )
    p.add_argument("file", help="responses file: one row per respondent, one column per item")
    p.add_argument("--survey", required=True)
    p.add_argument("--id-column", default="respondent_id",
                   help="respondent id column (default: %(default)s)")
    p.add_argument("--duration-column", default="duration_seconds",
                   help="column of seconds taken, when present (default: %(default)s)")
    p.add_argument("--replace", action="store_true",
                   help="replace the answers of respondents stored with other answers")
    p.add_argument("--partial", action="store_true",
                   help="store the valid rows and report the others (default: all or nothing)")
    p.add_argument("--batch-size", type=int, default=None, metavar="N",
                   help="respondents screened and stored at a time (default: 5000)")
    add_database_option(p)
    p.set_defaults(func=guard(cmd_import))

    p = subparsers.add_parser(
        "instrument-from",
        help="draft an instrument from an SPSS (.sav) or Stata (.dta) file's labels",
    )
    p.add_argument("file", help="SPSS .sav or Stata .dta file with variable and value labels")
    p.add_argument("--out", required=True, help="instrument file to write (JSON)")
    p.add_argument("--survey", help="survey id (default: from the file name)")
    p.add_argument("--id-column", default="respondent_id",
                   help="respondent id column, not an item (default: %(default)s)")
    p.add_argument("--duration-column", default="duration_seconds",
                   help="duration column, not an item (default: %(default)s)")
    p.add_argument("--skip", metavar="COLUMNS",
                   help="comma-separated columns that are not items (e.g. gender,education)")
    p.set_defaults(func=guard(cmd_instrument_from))
