"""Database engine, typed-model base and migrations.

SQLite (the embedded default) runs in WAL mode with foreign keys on; write transactions start
with ``BEGIN IMMEDIATE`` so two writers queue on the lock instead of failing half-way.
PostgreSQL is used through psycopg 3. Callers own sessions and transactions::

    with Session(engine) as session, session.begin():
        ...
"""

from __future__ import annotations

import datetime as dt
import os
import re
from pathlib import Path
from typing import Any, ClassVar

import orjson
from sqlalchemy import DateTime, Engine, Table, create_engine, event
from sqlalchemy.orm import DeclarativeBase
from sqlalchemy.types import TypeDecorator

__all__ = [
    "Base",
    "UTCDateTime",
    "make_engine",
    "sqlite_path",
    "describe_url",
    "writer",
    "upgrade",
    "current_revision",
    "head_revision",
    "utcnow",
]

MIGRATIONS = Path(__file__).with_name("migrations")
#: Seconds a SQLite writer waits for the lock before giving up.
SQLITE_BUSY_SECONDS = 30


def utcnow() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


def storable_time(value: dt.datetime) -> dt.datetime:
    """``value`` unchanged if it can be stored (a time zone, years 1..9999 once in UTC); else
    ``ValueError`` saying why."""
    if value.tzinfo is None or value.utcoffset() is None:
        raise ValueError("time must carry a time zone")
    try:
        value.astimezone(dt.UTC)
    except OverflowError:
        raise ValueError("time is outside the years 1..9999 when converted to UTC") from None
    return value


class UTCDateTime(TypeDecorator[dt.datetime]):
    """A timestamp stored in UTC and always returned timezone-aware (SQLite keeps no zone)."""

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: dt.datetime | None, dialect: Any) -> dt.datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError("timestamps must carry a time zone")
        value = value.astimezone(dt.UTC)
        return value.replace(tzinfo=None) if dialect.name == "sqlite" else value

    def process_result_value(self, value: dt.datetime | None, dialect: Any) -> dt.datetime | None:
        if value is None:
            return None
        return value.replace(tzinfo=dt.UTC) if value.tzinfo is None else value.astimezone(dt.UTC)


class Base(DeclarativeBase):
    """Base of every table."""

    #: Each model maps one table (the declarative base types it as any FROM clause).
    __table__: ClassVar[Table]


def _json_text(value: Any) -> str:
    return orjson.dumps(value, option=orjson.OPT_SERIALIZE_NUMPY).decode()


def sqlite_path(url: str) -> Path | None:
    """The file of a SQLite URL; None for other databases and in-memory SQLite."""
    from sqlalchemy.engine import make_url

    parsed = make_url(url)
    if not parsed.drivername.startswith("sqlite"):
        return None
    database = parsed.database or ""
    if database in ("", ":memory:") or database.startswith("file:"):
        return None
    return Path(database)


def describe_url(url: str) -> str:
    """The URL as an error message names it: the password hidden, a SQLite file's path shown."""
    from sqlalchemy.engine import make_url

    shown = make_url(url).render_as_string(hide_password=True)
    path = sqlite_path(url)
    return shown if path is None else f"{shown} (file {path})"


def _create_private(path: Path) -> None:
    """Create an empty SQLite file readable by its owner only: answers can be personal data.
    SQLite gives its -wal and -shm files the database file's permissions."""
    try:
        os.close(os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600))
    except FileExistsError:
        pass


#: Pooled SQLite connections: at least the server's request threads (40, the thread pool's
#: default) plus the writer, so that concurrent posts reuse connections instead of opening one
#: each (an overflow connection is closed when returned, and opening one runs the pragmas
#: below: a fifth of the server's busy time under 32 concurrent posts, measured with py-spy).
SQLITE_POOL_SIZE = 48


def make_engine(url: str, **kwargs: Any) -> Engine:
    """An engine for ``url`` with Heedful's connection settings (a new SQLite file is 0600)."""
    kwargs.setdefault("json_serializer", _json_text)
    # Errors and SQL logging never show the parameters (respondent ids, answers, meta).
    kwargs.setdefault("hide_parameters", True)
    if url.startswith("sqlite"):
        path = sqlite_path(url)
        if path is not None and not path.exists() and path.parent.is_dir():
            _create_private(path)
        if path is not None and "poolclass" not in kwargs:  # in memory: one shared connection
            kwargs.setdefault("pool_size", SQLITE_POOL_SIZE)
            kwargs.setdefault("max_overflow", 8)
        engine = create_engine(
            url, connect_args={"check_same_thread": False, "timeout": SQLITE_BUSY_SECONDS}, **kwargs
        )
        _configure_sqlite(engine)
        return engine
    kwargs.setdefault("pool_size", 16)
    kwargs.setdefault("max_overflow", 16)
    return create_engine(url, pool_pre_ping=True, **kwargs)


def _configure_sqlite(engine: Engine) -> None:
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection: Any, _record: Any) -> None:
        # The driver's own transaction handling is switched off; "begin" below issues BEGIN.
        dbapi_connection.isolation_level = None
        cursor = dbapi_connection.cursor()
        cursor.execute("PRAGMA journal_mode=WAL")
        cursor.execute("PRAGMA foreign_keys=ON")
        # In WAL mode NORMAL keeps the database consistent after a crash; only the last
        # transactions before a power cut can be lost, never half of one.
        cursor.execute("PRAGMA synchronous=NORMAL")
        cursor.execute(f"PRAGMA busy_timeout={SQLITE_BUSY_SECONDS * 1000}")
        cursor.close()

    @event.listens_for(engine, "begin")
    def _on_begin(connection: Any) -> None:
        immediate = connection.get_execution_options().get("heedful_write", False)
        connection.exec_driver_sql("BEGIN IMMEDIATE" if immediate else "BEGIN")


def writer(engine: Engine) -> Engine:
    """The same engine, marked so SQLite takes the write lock when the transaction begins."""
    return engine.execution_options(heedful_write=True)


# Migrations -----------------------------------------------------------------------------------


def _alembic_config(url: str) -> Any:
    from alembic.config import Config

    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS))
    config.set_main_option("sqlalchemy.url", url.replace("%", "%%"))
    return config


#: A migration file's ``revision = "..."`` and ``down_revision = ...`` lines (type hint and either
#: quote allowed).
_REVISION_LINE = re.compile(
    r"""^(down_revision|revision)\s*(?::[^=]*)?=\s*(None|"([^"]*)"|'([^']*)')\s*$""", re.M
)


def newest_revision_on_file() -> str | None:
    """The head of the migration chain, read from the revision files' text without importing
    Alembic (a tenth of a second of every command's start); None when the files do not form a
    single chain in that plain form, and Alembic then decides."""
    revisions: set[str] = set()
    parents: set[str] = set()
    for path in (MIGRATIONS / "versions").glob("*.py"):
        found: dict[str, str | None] = {}
        for match in _REVISION_LINE.finditer(path.read_text(encoding="utf-8")):
            found[match.group(1)] = match.group(3) or match.group(4)
        if not found:
            continue  # not a revision (the package's __init__.py)
        revision, parent = found.get("revision"), found.get("down_revision", "")
        if not revision or parent == "":
            return None
        revisions.add(revision)
        if parent is not None:
            parents.add(parent)
    heads = revisions - parents
    return heads.pop() if len(heads) == 1 and parents <= revisions else None


def _at_newest(engine: Engine) -> bool:
    """Whether the database's schema already stands at the newest migration."""
    from sqlalchemy import inspect

    head = newest_revision_on_file()
    if head is None:
        return False
    with engine.connect() as connection:
        # Asked first, so that a new database does not log a failed query on the server.
        if not inspect(connection).has_table("alembic_version"):
            return False
        stored = connection.exec_driver_sql("SELECT version_num FROM alembic_version").all()
    return [row[0] for row in stored] == [head]


def upgrade(engine: Engine) -> None:
    """Bring the schema to the newest migration (creating it on an empty database); a
    database already there is left alone without starting Alembic."""
    if _at_newest(engine):
        return
    from alembic import command

    config = _alembic_config(engine.url.render_as_string(hide_password=False))
    with writer(engine).begin() as connection:
        config.attributes["connection"] = connection
        command.upgrade(config, "head")


def current_revision(engine: Engine) -> str | None:
    from alembic.migration import MigrationContext

    with engine.connect() as connection:
        return MigrationContext.configure(connection).get_current_revision()


def head_revision() -> str | None:
    from alembic.script import ScriptDirectory

    return ScriptDirectory.from_config(_alembic_config("sqlite://")).get_current_head()
