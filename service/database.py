"""The process's database handle: an engine and the two kinds of transaction routes use."""

from __future__ import annotations

import threading
from collections.abc import Iterator
from contextlib import contextmanager, nullcontext
from typing import Any

from sqlalchemy import Engine, event, text
from sqlalchemy.orm import Session

from .db import writer

__all__ = ["Database"]


class Database:
    """``read()`` and ``write()`` each open a session inside one transaction, committed when
    the block ends without an error and rolled back otherwise."""

    def __init__(self, engine: Engine):
        self.engine = engine
        self._writer = writer(engine)
        #: Things built once from rows that never change (survey versions' screeners, reference
        #: samples), kept per database; every session opened here carries it as
        #: ``session.info["memo"]`` (see ``service.screeners``).
        self.memo: dict[str, Any] = {}
        # SQLite has one writer at a time. Queueing this process's writers on a lock keeps them
        # out of SQLite's busy handler, which sleeps in steps of up to 100 ms; other processes
        # still wait through the busy timeout.
        self._write_lock = threading.Lock() if engine.dialect.name == "sqlite" else None
        self._checkpointer: threading.Thread | None = None
        self._stop = threading.Event()

    def checkpoint_in_background(self, every_seconds: float = 1.0) -> None:
        """SQLite only: move the write-ahead log into the database from a thread of its own,
        instead of in whichever commit crosses the log's size limit (a checkpoint syncs the
        file to disk, which would stall that commit and every post waiting behind it)."""
        if self.engine.dialect.name != "sqlite" or self._checkpointer is not None:
            return

        @event.listens_for(self.engine, "connect")
        def _no_automatic_checkpoint(dbapi_connection, _record) -> None:
            dbapi_connection.execute("PRAGMA wal_autocheckpoint=0")

        def run() -> None:
            while not self._stop.wait(every_seconds):
                try:
                    with self.engine.connect() as connection:
                        connection.exec_driver_sql("PRAGMA wal_checkpoint(PASSIVE)")
                except Exception:  # housekeeping; the next round tries again
                    continue

        self.engine.dispose()  # connections made from now on get the setting
        self._checkpointer = threading.Thread(target=run, name="heedful-checkpoint", daemon=True)
        self._checkpointer.start()

    @contextmanager
    def read(self) -> Iterator[Session]:
        with (
            Session(self.engine, expire_on_commit=False, info={"memo": self.memo}) as session,
            session.begin(),
        ):
            yield session

    @contextmanager
    def write(self) -> Iterator[Session]:
        with (
            self._write_lock or nullcontext(),
            Session(self._writer, expire_on_commit=False, info={"memo": self.memo}) as session,
            session.begin(),
        ):
            yield session

    def ping(self) -> None:
        with self.engine.connect() as connection:
            connection.execute(text("SELECT 1"))

    def dispose(self) -> None:
        self._stop.set()
        if self._checkpointer is not None:
            self._checkpointer.join(timeout=10)
            self._checkpointer = None
        self.engine.dispose()
