"""The service's subcommands of ``heedful``: serve, worker, db, keys, survey, rescreen, nightly, report,
openapi.

Only argument parsing and printing live here; the work is done by ``store`` and the use cases (``ingest``, ``rescreen``, ``registration``).
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from .command_support import (
    EXIT_FAILED,
    EXIT_OK,
    CommandFailed,
    add_database_option,
    database_named,
    guard,
    help_of,
    open_database,
    print_error,
    settings_from,
    unknown_survey,
)

__all__ = ["register", "register_document", "settings_from", "CommandFailed", "unknown_survey"]
#: Exit code after Ctrl-C (128 + SIGINT, as shells report it).
EXIT_INTERRUPTED = 130
DEFAULT_OPENAPI = Path("openapi") / "openapi.json"


# serve / db ---------------------------------------------------------------------------------------


def cmd_serve(args: argparse.Namespace) -> int:
    import uvicorn

    from .app import create_app, prepare_process
    from .observability import log_config

    overrides: dict[str, Any] = {}
    if args.host:
        overrides["host"] = args.host
    if args.port is not None:
        overrides["port"] = args.port
    settings = settings_from(args, **overrides)
    app = create_app(settings)
    prepare_process()
    print(f"Heedful listening on http://{settings.host}:{settings.port} "
          f"(docs: http://{settings.host}:{settings.port}/docs)", flush=True)
    uvicorn.run(
        app, host=settings.host, port=settings.port, log_level=settings.log_level,
        log_config=log_config(settings.log_level, settings.log_format == "json", args.access_log),
        access_log=False,
    )
    return EXIT_OK


def cmd_worker(args: argparse.Namespace) -> int:
    import logging.config

    from .app import prepare_process
    from .job_queue import JobQueue
    from .metrics import Metrics
    from .observability import log_config

    settings = settings_from(args)
    logging.config.dictConfig(log_config(settings.log_level, settings.log_format == "json"))
    database = open_database(args)
    metrics = Metrics()
    queue = JobQueue(database, settings, metrics)
    prepare_process()
    where = settings.job_broker or "the queue file in the job folder"
    print(f"Heedful worker: {args.threads} thread(s) running jobs from {where}", flush=True)
    if args.metrics_port is not None:
        from prometheus_client import start_http_server

        # The worker's own counts (jobs by kind and outcome, their durations); no key is
        # asked for, so it listens on the loopback address unless told otherwise.
        start_http_server(args.metrics_port, addr=args.metrics_host, registry=metrics.registry)
        print(f"  metrics: http://{args.metrics_host}:{args.metrics_port}/metrics", flush=True)
    try:
        queue.run_worker(args.threads)
    finally:
        queue.close()
        database.dispose()
    return EXIT_OK


def cmd_db_upgrade(args: argparse.Namespace) -> int:
    from .db import current_revision, make_engine, upgrade

    engine = make_engine(settings_from(args).database_url)
    upgrade(engine)
    print(f"database {database_named(args)}: schema at revision {current_revision(engine)}")
    engine.dispose()
    return EXIT_OK


# keys -------------------------------------------------------------------------------------------


def cmd_keys_create(args: argparse.Namespace) -> int:
    from sqlalchemy.exc import IntegrityError

    from . import store
    from .models import Role

    database = open_database(args, create=True)
    try:
        with database.write() as session:
            token = store.create_key(session, args.name, Role(args.role))
    except IntegrityError:
        return print_error(f"a key named {args.name!r} already exists")
    finally:
        database.dispose()
    print(f"Created {args.role} key {args.name!r}. The token is shown once; store it now:")
    print(token)
    return EXIT_OK


def cmd_keys_list(args: argparse.Namespace) -> int:
    from . import store

    database = open_database(args)
    with database.read() as session:
        keys = store.list_keys(session)
    database.dispose()
    print(f"{'name':<24} {'role':<8} {'created':<20} revoked")
    for key in keys:
        revoked = key.revoked_at.strftime("%Y-%m-%d %H:%M") if key.revoked_at else "-"
        print(f"{key.name:<24} {key.role.value:<8} {key.created_at:%Y-%m-%d %H:%M}     {revoked}")
    return EXIT_OK


def cmd_keys_revoke(args: argparse.Namespace) -> int:
    from . import store

    database = open_database(args)
    with database.write() as session:
        found = store.revoke_key(session, args.name)
    database.dispose()
    if not found:
        return print_error(f"no key named {args.name!r}")
    print(f"revoked key {args.name!r}")
    return EXIT_OK


# survey ------------------------------------------------------------------------------------------


def register_document(database: Any, document: Any) -> dict[str, Any]:
    """Register an instrument document (``registration.register_survey``); the reply the API
    gives (lint warnings as text, secret)."""
    from .registration import register_survey

    registered = register_survey(database, document)
    return {
        "survey": registered.survey,
        "version": registered.version,
        "new_version": registered.new_version,
        "lint": [str(note) for note in registered.lint],
        "webhook_secret": registered.webhook_secret,
    }


def cmd_survey_register(args: argparse.Namespace) -> int:
    path = Path(args.file)
    try:
        document = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        return print_error(f"no such file: {path}")
    except json.JSONDecodeError as error:
        return print_error(f"{path} is not valid JSON (line {error.lineno}): {error.msg}")
    from detectors import parse_instrument

    parse_instrument(document)  # an invalid document fails before any database is touched
    database = open_database(args, create=True)
    try:
        reply = register_document(database, document)
    finally:
        database.dispose()
    state = "new version" if reply["new_version"] else "unchanged"
    print(f"survey {reply['survey']!r}: version {reply['version']} ({state})")
    for note in reply["lint"]:
        print(f"warning: {note}")
    print(f"webhook secret: {reply['webhook_secret']}")
    return EXIT_OK


def cmd_survey_list(args: argparse.Namespace) -> int:
    from . import store

    database = open_database(args)
    with database.read() as session:
        rows = store.list_surveys(session)
    database.dispose()
    print(f"{'survey':<32} {'version':>7} {'respondents':>11}  title")
    for survey, number, count in rows:
        print(f"{survey.survey:<32} {number:>7} {count:>11}  {survey.title}")
    return EXIT_OK


def cmd_survey_show(args: argparse.Namespace) -> int:
    from . import store

    database = open_database(args)
    with database.read() as session:
        survey = store.get_survey(session, args.survey)
        if survey is None:
            database.dispose()
            raise unknown_survey(args, args.survey)
        versions = store.versions_of(session, survey.id)
        current = next(v for v in versions if v.id == survey.current_version_id)
        document = {
            "survey": survey.survey,
            "title": survey.title,
            "version": current.number,
            "versions": [v.number for v in versions],
            "respondents": store.count_respondents(session, survey.id),
            "reference_id": survey.current_reference_id,
            "verdict_in_replies": survey.verdict_in_replies,
            "webhook_secret": survey.webhook_secret,
            "instrument": current.document,
        }
    database.dispose()
    print(json.dumps(document, indent=2))
    return EXIT_OK


def cmd_survey_set(args: argparse.Namespace) -> int:
    from . import store

    database = open_database(args)
    try:
        with database.write() as session:
            survey = store.get_survey(session, args.survey)
            if survey is None:
                raise unknown_survey(args, args.survey)
            if args.verdict_in_replies is not None:
                survey.verdict_in_replies = args.verdict_in_replies == "yes"
            state = "carry" if survey.verdict_in_replies else "leave out"
    finally:
        database.dispose()
    print(f"survey {args.survey!r}: ingest replies {state} the verdict and careless score")
    return EXIT_OK


def cmd_rescreen(args: argparse.Namespace) -> int:
    from . import store
    from .rescreen import rescreen

    settings = settings_from(args)
    database = open_database(args)
    try:
        with database.write() as session:
            survey = store.get_survey(session, args.survey)
            if survey is None:
                raise unknown_survey(args, args.survey)
            reply = rescreen(session, survey, settings).reply()
    finally:
        database.dispose()
    print(f"re-screened {reply['respondents']} respondent(s) of {reply['survey']!r}")
    for reference in reply["references"]:
        print(
            f"  version {reference['version']}: reference sample {reference['id']} from "
            f"{reference['respondents']} respondents ({', '.join(reference['detectors'])})"
        )
    for version, reason in reply["without_reference"].items():
        print(f"  version {version}: no new reference sample: {reason}")
    return EXIT_OK


def cmd_nightly(args: argparse.Namespace) -> int:
    from .nightly import DEFAULT_WITHOUT, WITHOUT_FLAGGED_CAUTION, Progress, run_nightly

    without = DEFAULT_WITHOUT if args.without is None else tuple(
        w for w in args.without if w != "none"
    )
    if "flagged" in without:
        if not args.confirm_without_flagged:
            raise CommandFailed(
                "--without flagged leaves respondents out on the screening's evidence alone, "
                "unattended; give --confirm-without-flagged as well if that is really meant "
                "(review and export --without excluded is the safer way)"
            )
        print(f"warning: {WITHOUT_FLAGGED_CAUTION}", file=sys.stderr, flush=True)
    settings = settings_from(args)
    database = open_database(args)

    def report(run: Any) -> None:
        print(run.line(), file=sys.stderr if run.failed else sys.stdout, flush=True)

    try:
        runs = run_nightly(
            database, settings, args.out, surveys=args.survey, fmt=args.format, without=without,
            progress=Progress(sys.stderr), report=report,
        )
    except KeyboardInterrupt:
        print("\ninterrupted: the chunks already re-screened are kept; the next run finishes "
              "the rest", file=sys.stderr)
        return EXIT_INTERRUPTED
    finally:
        database.dispose()
    failed = [run for run in runs if run.failed]
    if not runs:
        print("no survey is registered; nothing to do")
    if failed:
        print(f"error: {len(failed)} of {len(runs)} survey(s) failed", file=sys.stderr)
        return EXIT_FAILED
    return EXIT_OK


def cmd_report(args: argparse.Namespace) -> int:
    from . import store
    from .files import write_atomic
    from .reports import build_report

    database = open_database(args)
    try:
        with database.read() as session:
            survey = store.get_survey(session, args.survey)
            if survey is None:
                raise unknown_survey(args, args.survey)
            text = build_report(session, survey)
    finally:
        database.dispose()
    write_atomic(args.out, lambda p: Path(p).write_text(text, encoding="utf-8"))
    print(f"wrote {args.out}")
    return EXIT_OK


def cmd_openapi(args: argparse.Namespace) -> int:
    from .app import openapi_document

    text = json.dumps(openapi_document(), indent=2, sort_keys=False) + "\n"
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(text, encoding="utf-8")
    print(f"wrote {out}")
    return EXIT_OK


# the parsers ------------------------------------------------------------------------------------


def register(subparsers: Any) -> None:
    """Add the service's subcommands to ``heedful``'s argument parser."""
    p = subparsers.add_parser("serve", help="run the screening web service")
    p.add_argument("--host", help="address to listen on (default: HEEDFUL_HOST, else 127.0.0.1)")
    p.add_argument("--port", type=int, help="port (default: HEEDFUL_PORT, else 8000)")
    p.add_argument(
        "--access-log", action="store_true",
        help="log a line per request: method, route template, status, time (never the path)",
    )
    add_database_option(p)
    p.set_defaults(func=guard(cmd_serve))

    p = subparsers.add_parser(
        "worker",
        help="run background jobs (re-screens, reports, exports) from the job queue, beside or "
        "instead of the threads of `heedful serve`; stops on Ctrl-C or SIGTERM",
    )
    p.add_argument(
        "--threads", type=int, default=1, help="jobs run at once (default: %(default)s)"
    )
    p.add_argument(
        "--metrics-port", type=int, metavar="PORT",
        help="serve the worker's job metrics (Prometheus text) on this port, without a key",
    )
    p.add_argument(
        "--metrics-host", default="127.0.0.1",
        help="address of --metrics-port (default: %(default)s; only expose it to the scraper)",
    )
    add_database_option(p)
    p.set_defaults(func=guard(cmd_worker))

    p = subparsers.add_parser("db", help="manage the service's database")
    db = p.add_subparsers(dest="db_command", metavar="ACTION")
    p.set_defaults(func=help_of(p))
    q = db.add_parser("upgrade", help="create or upgrade the schema (Alembic migrations)")
    add_database_option(q)
    q.set_defaults(func=guard(cmd_db_upgrade))

    p = subparsers.add_parser("keys", help="manage API keys")
    keys = p.add_subparsers(dest="keys_command", metavar="ACTION")
    p.set_defaults(func=help_of(p))
    q = keys.add_parser("create", help="create a key and print its token once")
    q.add_argument("--role", required=True, choices=["ingest", "analyst", "admin"])
    q.add_argument("--name", required=True, help="unique name, recorded with reviews")
    add_database_option(q)
    q.set_defaults(func=guard(cmd_keys_create))
    q = keys.add_parser("list", help="list keys (never their tokens)")
    add_database_option(q)
    q.set_defaults(func=guard(cmd_keys_list))
    q = keys.add_parser("revoke", help="revoke a key by name")
    q.add_argument("name")
    add_database_option(q)
    q.set_defaults(func=guard(cmd_keys_revoke))

    p = subparsers.add_parser("survey", help="register and inspect surveys")
    survey = p.add_subparsers(dest="survey_command", metavar="ACTION")
    p.set_defaults(func=help_of(p))
    q = survey.add_parser("register", help="register an instrument (JSON file)")
    q.add_argument("file")
    add_database_option(q)
    q.set_defaults(func=guard(cmd_survey_register))
    q = survey.add_parser("list", help="list registered surveys")
    add_database_option(q)
    q.set_defaults(func=guard(cmd_survey_list))
    q = survey.add_parser("show", help="show a survey (with its webhook secret)")
    q.add_argument("survey")
    add_database_option(q)
    q.set_defaults(func=guard(cmd_survey_show))
    q = survey.add_parser("set", help="change a survey's settings")
    q.add_argument("survey")
    q.add_argument(
        "--verdict-in-replies", choices=["yes", "no"],
        help="whether replies to posted responses carry the verdict and careless score "
        "(no: only flags, for platforms that should not act on them)",
    )
    add_database_option(q)
    q.set_defaults(func=guard(cmd_survey_set))

    p = subparsers.add_parser(
        "rescreen", help="re-estimate the reference sample and re-score a survey's respondents"
    )
    p.add_argument("--survey", required=True)
    add_database_option(p)
    p.set_defaults(func=guard(cmd_rescreen))

    from .file_commands import EXPORT_FORMATS, WITHOUT_CHOICES  # light: no storage imports

    p = subparsers.add_parser(
        "nightly",
        help="refresh reference samples, re-screen stale results, write exports and reports",
    )
    p.add_argument(
        "--survey", action="append", metavar="S",
        help="only this survey (repeatable; default: every registered survey)",
    )
    p.add_argument("--out", required=True, metavar="DIR",
                   help="folder for the files: DIR/<date>/<survey>/")
    p.add_argument("--format", choices=EXPORT_FORMATS, default="sav",
                   help="export format (default: %(default)s)")
    p.add_argument(
        "--without", action="append", choices=[*WITHOUT_CHOICES, "none"],
        help="leave these respondents out of the export (repeatable; default: excluded, i.e. "
        "reviewed as exclude; 'none' keeps everyone; 'flagged' needs --confirm-without-flagged)",
    )
    p.add_argument(
        "--confirm-without-flagged", action="store_true",
        help="confirm that --without flagged should drop flagged respondents without review "
        "(a warning is printed and recorded in nightly.json)",
    )
    add_database_option(p)
    p.set_defaults(func=guard(cmd_nightly))

    p = subparsers.add_parser("report", help="write a survey's screening report (HTML)")
    p.add_argument("--survey", required=True)
    p.add_argument("--out", required=True, metavar="FILE", help="the HTML file to write")
    add_database_option(p)
    p.set_defaults(func=guard(cmd_report))

    from .file_commands import register_file_commands

    register_file_commands(subparsers)  # export, import, instrument-from

    p = subparsers.add_parser("openapi", help="write the service's OpenAPI document")
    p.add_argument(
        "--out", default=str(DEFAULT_OPENAPI), help="output file (default: %(default)s)"
    )
    p.set_defaults(func=guard(cmd_openapi))
