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

from .command_support import help_of

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


def _sample_matrix(args: argparse.Namespace, instrument: Any) -> Any:
    """The ``--sample`` file as a response matrix, or None without one."""
    if args.sample is None:
        return None
    from detectors import matrix_from_frame

    from .files import read_table

    frame = read_table(args.sample, id_column=args.id_column)
    return matrix_from_frame(
        instrument, frame, id_column=args.id_column, duration_column=args.duration_column
    ).matrix


def false_alarm_lines(rates: dict[str, Any]) -> list[str]:
    """Each index's stated false-alarm rate (``detectors.planting.false_alarm_rates``)."""
    source = (
        "answers simulated from the instrument (give --sample for your own)"
        if rates["simulated"] else "the sample given"
    )
    lines = [
        f"Expected false alarms, calibrated on {source}: the verdict policy sends "
        f"{rates['review_rate']:.1%} of ordinary respondents to review: "
        f"{rates['score_share']:.1%} through the careless score's own hurdle, the rest split "
        f"over {len(rates['families'])} families "
        + "(" + ", ".join(f"{f} {share:.2%}" for f, share in rates["families"].items()) + ")."
    ]
    width = max((len(name) for name in rates["indices"]), default=8)
    for name, entry in rates["indices"].items():
        if entry["assessed"] == 0:
            stated = "judges nobody on this instrument"
        elif entry["calibrated"]:
            stated = f"{entry['rate']:.2%} of ordinary respondents (score cut-off {entry['cutoff']:.3g})"
        else:
            stated = "fixed rule (its own cut-off)"
        lines.append(f"  {name:<{width}}  {entry['family']:<13}  {stated}")
    return lines


def cmd_lint(args: argparse.Namespace) -> int:
    from detectors import lint, load_instrument
    from detectors.planting import false_alarm_rates

    instrument = load_instrument(args.instrument)
    notes = lint(instrument)
    print(
        f"{args.instrument}: {len(instrument.items)} items, {len(instrument.scales)} scale(s), "
        f"{len(instrument.blocks)} block(s), {len(instrument.pairs)} opposite pair(s)"
    )
    for note in notes:
        print(f"warning: {note}")
    print(f"{len(notes)} warning(s)" if notes else "no warnings")
    rates = false_alarm_rates(instrument, _sample_matrix(args, instrument))
    for line in false_alarm_lines(rates):
        print(line)
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


# drill ------------------------------------------------------------------------------------------


def drill_lines(result: dict[str, Any]) -> list[str]:
    """A drill's figures (``detectors.planting.drill_summary``) as lines of text."""
    source = (
        "answers simulated from the instrument (no sample given)"
        if result["ordinary_respondents_simulated"]
        else f"{round(result['ordinary']['respondents'])} respondents of the sample given"
    )
    lines = [
        "SIMULATION: careless respondents planted by published recipes among the ordinary "
        f"ones ({source}), one in {round(1 / result['careless_share'])}, seeds "
        f"{', '.join(map(str, result['seeds']))}; mean over seeds.",
        f"  {'careless kind':<16} {'caught (not ok)':>16} {'likely careless':>16} {'ROC AUC':>8}",
    ]
    for kind, figures in result["kinds"].items():
        lines.append(
            f"  {kind:<16} {figures['not_ok']:>16.1%} {figures['likely_careless']:>16.1%} "
            f"{figures['auc']:>8.3f}"
        )
    ordinary = result["ordinary"]
    lines.append(
        f"  {'all kinds':<16} {result['careless_not_ok']:>16.1%} {'':>16} "
        f"{result['overall_auc']:>8.3f}"
    )
    lines.append(
        f"Ordinary respondents sent to review: {ordinary['not_ok']:.1%} "
        f"(likely careless: {ordinary['likely_careless']:.1%}); the policy means "
        f"{result['review_rate']:.1%}."
    )
    lines.append(f"  {'index':<22} {'ordinary flagged':>16} {'stated rate':>12}")
    for name, figures in result["per_index"].items():
        stated = figures.get("expected")
        lines.append(
            f"  {name:<22} {figures['flagged']:>16.2%} "
            f"{'fixed rule' if stated is None else f'{stated:.2%}':>12}"
        )
    lines.append("Recipes (Meade & Craig 2012; Curran 2016):")
    for kind, recipe in result["recipes"].items():
        lines.append(f"  {kind}: {recipe}")
    lines.append(
        "Real careless answering is more varied than any recipe, and a real sample holds some "
        "careless respondents among the ordinary ones: read these as what the design allows."
    )
    return lines


def cmd_drill(args: argparse.Namespace) -> int:
    from detectors import load_instrument
    from detectors.planting import drill_summary

    instrument = load_instrument(args.instrument)
    result = drill_summary(
        instrument, _sample_matrix(args, instrument), seeds=args.seeds, careless_share=args.careless_share,
        overrides=_parse_settings(args.set or []),
    )
    if args.format == "json":
        print(json.dumps(result, indent=2))
    else:
        print("\n".join(drill_lines(result)))
    return EXIT_OK


# the parser -------------------------------------------------------------------------------------


def _sample_arguments(p: argparse.ArgumentParser, sample_help: str) -> None:
    p.add_argument("--sample", metavar="FILE", help=sample_help)
    p.add_argument("--id-column", default="respondent_id", help="respondent id column (default: %(default)s)")
    p.add_argument(
        "--duration-column", default="duration_seconds",
        help="column of seconds taken, when present (default: %(default)s)",
    )


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="heedful",
        description="Screen survey responses for careless answering and response styles.",
    )
    commands = parser.add_subparsers(dest="command", metavar="COMMAND")
    parser.set_defaults(func=help_of(parser))

    p = commands.add_parser("lint", help="report design problems of an instrument that limit screening")
    p.add_argument("instrument", help="instrument definition (JSON)")
    _sample_arguments(p, "a reference sample to calibrate the cut-offs on (CSV, Parquet, .sav, "
                      ".dta); default: answers simulated from the instrument")
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

    p = commands.add_parser(
        "drill",
        help="plant careless respondents into a sample (or simulated answers) and show what "
        "the screen catches",
    )
    p.add_argument("--instrument", required=True, help="instrument definition (JSON)")
    _sample_arguments(p, "ordinary respondents to plant among (CSV, Parquet, .sav, .dta); "
                      "default: answers simulated from the instrument")
    p.add_argument(
        "--careless-share", type=float, default=0.10,
        help="share of careless respondents planted (default: %(default)s)",
    )
    p.add_argument(
        "--seeds", type=int, nargs="+", default=[1, 2, 3],
        help="planting seeds; figures are means over them (default: 1 2 3)",
    )
    p.add_argument(
        "--set", action="append", metavar="DETECTOR.SETTING=VALUE",
        help="override a detector setting (repeatable)",
    )
    p.add_argument("--format", choices=("text", "json"), default="text")
    p.set_defaults(func=cmd_drill)

    if importlib.util.find_spec("service.commands") is not None:
        from . import commands as service_commands

        service_commands.register(commands)
    return parser


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
