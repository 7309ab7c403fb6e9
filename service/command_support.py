"""What the command modules of ``heedful`` share: settings and the database from the
arguments, the failure a command reports, the guard that turns failures into exit codes, and
the help of a command group.

Light on purpose: building the parser imports this module, and nothing here imports the
settings, the storage or the library until a command runs.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from .database import Database
    from .settings import Settings

__all__ = [
    "EXIT_OK",
    "EXIT_FAILED",
    "EXIT_BAD_INPUT",
    "CommandFailed",
    "add_database_option",
    "database_named",
    "guard",
    "help_of",
    "open_database",
    "print_error",
    "settings_from",
    "unknown_survey",
]

EXIT_OK, EXIT_FAILED, EXIT_BAD_INPUT = 0, 1, 2


def settings_from(args: argparse.Namespace, **overrides: Any) -> Settings:
    """The environment's settings, with ``--database`` (and other flags) taking precedence."""
    from .settings import Settings

    values = dict(overrides)
    if getattr(args, "database", None):
        values["database_url"] = args.database
    return Settings(**values)


class CommandFailed(Exception):
    """A command cannot go on; the message says why (exit code 2)."""


def database_named(args: argparse.Namespace) -> str:
    """The database a command reads, as messages name it."""
    from .db import describe_url

    return describe_url(settings_from(args).database_url)


def unknown_survey(args: argparse.Namespace, survey: str) -> CommandFailed:
    return CommandFailed(
        f"no survey {survey!r} is registered in the database {database_named(args)}; "
        "`heedful survey list` shows the registered ones, --database URL names another database"
    )


def open_database(args: argparse.Namespace, *, create: bool = False) -> Database:
    """The database of ``--database`` (else HEEDFUL_DATABASE_URL, else ./heedful.db), at the
    newest schema. Commands that only read or change stored surveys refuse a SQLite file that
    is not there instead of creating an empty one."""
    from .database import Database
    from .db import make_engine, sqlite_path, upgrade

    url = settings_from(args).database_url
    path = sqlite_path(url)
    if not create and path is not None and not path.exists():
        raise CommandFailed(
            f"no database at {path} (database URL {url}): name the database with --database "
            "URL or HEEDFUL_DATABASE_URL (the demo's is sqlite:///demo/heedful.db), or create "
            "one with `heedful db upgrade`"
        )
    engine = make_engine(url)
    upgrade(engine)
    return Database(engine)


def add_database_option(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--database", metavar="URL",
        help="database URL (default: HEEDFUL_DATABASE_URL, else sqlite:///./heedful.db)",
    )


def print_error(message: str) -> int:
    print(f"error: {message}", file=sys.stderr)
    return EXIT_BAD_INPUT


def help_of(parser: argparse.ArgumentParser) -> Any:
    """What a command group does when no command is given: list the commands (exit 2)."""

    def show(_args: argparse.Namespace) -> int:
        sys.stdout.write(parser.format_help())
        return EXIT_BAD_INPUT

    return show


def _new_sqlite_file(args: argparse.Namespace) -> Path | None:
    """The SQLite file this command would create, when it does not exist yet."""
    from pydantic import ValidationError

    from .db import sqlite_path

    try:
        path = sqlite_path(settings_from(args).database_url)
    except ValidationError:
        return None
    return path if path is not None and not path.exists() else None


def _remove_database_files(path: Path) -> None:
    for suffix in ("", "-wal", "-shm", "-journal"):
        Path(f"{path}{suffix}").unlink(missing_ok=True)


def guard(func: Any) -> Any:
    """Bad settings (e.g. an unsupported database URL) are bad input: exit code 2. A command
    that fails leaves no database file behind that it created."""

    def run(args: argparse.Namespace) -> int:
        from pydantic import ValidationError

        fresh = _new_sqlite_file(args) if hasattr(args, "database") else None
        code = EXIT_FAILED
        try:
            code = func(args)
            return code
        except ValidationError as error:
            first = error.errors()[0]
            where = ".".join(str(p) for p in first["loc"])
            code = print_error(f"invalid setting {where}: {first['msg']}")
            return code
        except CommandFailed as error:
            code = print_error(str(error))
            return code
        finally:
            if fresh is not None and code != EXIT_OK:
                _remove_database_files(fresh)

    return run
