"""The ``heedful`` command: parses arguments and calls the library, the jobs or the service."""

from __future__ import annotations

import argparse
import importlib.util
import json
import sys
import tempfile
from collections.abc import Sequence
from pathlib import Path
from typing import Any, TextIO

EXIT_OK, EXIT_FAILED, EXIT_BAD_INPUT = 0, 1, 2
#: ``files.OUTPUT_FORMATS``, repeated so that building the parser imports neither the engine
#: nor pandas: commands that only touch the database start in a fraction of the time (a test
#: keeps the two equal).
OUTPUT_FORMATS = ("csv", "json", "parquet")
#: Show progress only for runs long enough to notice, and only in a terminal.
PROGRESS_FROM_RESPONDENTS = 50_000


def _parse_settings(pairs: Sequence[str]) -> dict[str, dict[str, Any]]:
    """``detector.setting=value`` pairs (value read as JSON, else as text) to nested dicts."""
    out: dict[str, dict[str, Any]] = {}
    for pair in pairs:
        target, sep, raw = pair.partition("=")
        detector, dot, setting = target.partition(".")
        if not sep or not dot or not detector or not setting:
            raise argparse.ArgumentTypeError(
                f"--set {pair!r}: write it as DETECTOR.SETTING=VALUE, e.g. long_string.run_cutoff=12"
            )
        try:
            value = json.loads(raw)
        except json.JSONDecodeError:
            value = raw
        out.setdefault(detector, {})[setting] = value
    return out


def _print_problems(error: Exception, stream: TextIO) -> None:
    print(f"error: {error}", file=stream)


def _library_error(error: Exception) -> bool:
    """Whether ``error`` is one of the engine's own (a bad instrument, bad responses, a bad
    setting); the engine is imported only by commands that use it."""
    errors = sys.modules.get("detectors.errors")
    return errors is not None and isinstance(error, errors.HeedfulError)


# lint -------------------------------------------------------------------------------------------


def cmd_lint(args: argparse.Namespace) -> int:
    from detectors import lint, load_instrument

    instrument = load_instrument(args.instrument)
    notes = lint(instrument)
    print(
        f"{args.instrument}: {len(instrument.items)} items, {len(instrument.scales)} scale(s), "
        f"{len(instrument.blocks)} block(s), {len(instrument.pairs)} opposite pair(s)"
    )
    for note in notes:
        print(f"warning: {note}")
    print(f"{len(notes)} warning(s)" if notes else "no warnings")
    return EXIT_OK


# screen -----------------------------------------------------------------------------------------


def _summary_lines(summary: dict[str, Any], n_rejected: int) -> list[str]:
    lines = [
        f"Screened {summary['respondents']} respondent(s); "
        f"{summary['flagged_any']} flagged by at least one detector."
    ]
    verdicts = summary["verdicts"]
    lines.append(
        f"Verdicts: {verdicts['ok']} ok, {verdicts['review']} to review, "
        f"{verdicts['likely_careless']} likely careless (flags from two or more kinds of index)."
    )
    if n_rejected:
        lines.append(f"{n_rejected} invalid row(s) were set aside and not screened.")
    width = max(len(name) for name in summary["detectors"]) if summary["detectors"] else 8
    lines.append(f"  {'detector':<{width}}  flagged  not assessed  not applicable")
    for name, counts in summary["detectors"].items():
        lines.append(
            f"  {name:<{width}}  {counts['flagged']:>7}  {counts['not_assessed']:>12}  "
            f"{counts['not_applicable']:>14}"
        )
    for name, counts in summary["detectors"].items():
        for reason, count in counts["reasons"].items():
            lines.append(f"  {name}: {count} not judged: {reason}")
    lines.append("Flags are evidence for a reviewer's decision, not a verdict on a respondent.")
    return lines


def cmd_screen(args: argparse.Namespace) -> int:
    from detectors import load_instrument, matrix_from_frame, screen

    from .files import format_from_path, read_table, write_atomic, write_screening

    overrides = _parse_settings(args.set or [])
    instrument = load_instrument(args.instrument)
    names = [n.strip() for n in args.only.split(",")] if args.only else None
    frame = read_table(args.responses, id_column=args.id_column)
    checked = matrix_from_frame(
        instrument,
        frame,
        id_column=args.id_column,
        duration_column=args.duration_column,
        skip_invalid=args.skip_invalid is not None,
    )
    interactive = sys.stderr.isatty() and checked.matrix.n_respondents >= PROGRESS_FROM_RESPONDENTS

    def progress(name: str, index: int, total: int) -> None:
        print(f"\rscreening {index + 1}/{total}: {name:<24}", end="", file=sys.stderr, flush=True)

    screening = screen(
        instrument, checked.matrix, overrides=overrides, names=names,
        progress=progress if interactive else None,
    )
    if interactive:
        print("\r" + " " * 50 + "\r", end="", file=sys.stderr)
    fmt = args.format or format_from_path(args.out)
    if args.skip_invalid is not None:
        write_atomic(args.skip_invalid, lambda p: checked.rejected.to_csv(p, index=False))
    if args.out is None:
        with tempfile.TemporaryDirectory() as folder:
            path = Path(folder) / f"screened.{fmt}"
            write_screening(screening, path, fmt)
            sys.stdout.write(path.read_text(encoding="utf-8"))
        report = sys.stderr
    else:
        write_screening(screening, args.out, fmt)
        report = sys.stdout
    for line in _summary_lines(screening.summary(), len(checked.rejected)):
        print(line, file=report)
    if args.out is not None:
        print(f"Wrote {args.out}", file=report)
    return EXIT_OK


# demo-data --------------------------------------------------------------------------------------


def cmd_demo_data(args: argparse.Namespace) -> int:
    from .demo import write_demo

    for path in write_demo(args.out, n=args.respondents, seed=args.seed):
        print(f"wrote {path}")
    return EXIT_OK


# the parser -------------------------------------------------------------------------------------


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="heedful",
        description="Screen survey responses for careless answering and response styles.",
    )
    commands = parser.add_subparsers(dest="command", metavar="COMMAND")
    parser.set_defaults(func=help_of(parser))

    p = commands.add_parser("lint", help="report design problems of an instrument that limit screening")
    p.add_argument("instrument", help="instrument definition (JSON)")
    p.set_defaults(func=cmd_lint)

    p = commands.add_parser(
        "screen", help="screen a responses file (CSV, Parquet, SPSS .sav or Stata .dta)"
    )
    p.add_argument("responses", help="responses file: one row per respondent, one column per item")
    p.add_argument("--instrument", required=True, help="instrument definition (JSON)")
    p.add_argument("--out", help="output file (default: CSV on standard output)")
    p.add_argument("--format", choices=OUTPUT_FORMATS, help="output format (default: from --out, else csv)")
    p.add_argument("--id-column", default="respondent_id", help="respondent id column (default: %(default)s)")
    p.add_argument(
        "--duration-column", default="duration_seconds",
        help="column of seconds taken, when present (default: %(default)s)",
    )
    p.add_argument(
        "--skip-invalid", metavar="FILE",
        help="screen the valid rows and write the rejected ones, with the reason, to FILE (CSV)",
    )
    p.add_argument(
        "--set", action="append", metavar="DETECTOR.SETTING=VALUE",
        help="override a detector setting (repeatable), e.g. long_string.run_cutoff=12",
    )
    p.add_argument("--only", metavar="NAMES", help="comma-separated detectors to run (default: all)")
    p.set_defaults(func=cmd_screen)

    p = commands.add_parser("demo-data", help="write a demo instrument and responses to try Heedful")
    p.add_argument("--out", required=True, help="folder to write into")
    p.add_argument("--respondents", type=int, default=600, help="how many (default: %(default)s)")
    p.add_argument("--seed", type=int, default=2027, help="random seed (default: %(default)s)")
    p.set_defaults(func=cmd_demo_data)

    if importlib.util.find_spec("service.commands") is not None:
        from . import commands as service_commands

        service_commands.register(commands)
    return parser


def help_of(parser: argparse.ArgumentParser) -> Any:
    """What a command group does when no command is given: list the commands (exit 2)."""

    def show(_args: argparse.Namespace) -> int:
        sys.stdout.write(parser.format_help())
        return EXIT_BAD_INPUT

    return show


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "format", None) == "parquet" and getattr(args, "out", "") is None:
        parser.error("--format parquet needs --out FILE")
    try:
        return int(args.func(args) or EXIT_OK)
    except argparse.ArgumentTypeError as error:
        print(f"error: {error}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyError as error:  # unknown detector name from --only or --set
        print(f"error: {error.args[0]}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except Exception as error:
        if not _library_error(error):
            raise
        _print_problems(error, sys.stderr)
        return EXIT_BAD_INPUT


if __name__ == "__main__":
    sys.exit(main())
