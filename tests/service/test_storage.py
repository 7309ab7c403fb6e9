"""Storage details: SQLite pragmas, migrations on both backends, cascading erasure."""

from __future__ import annotations

import pytest
from sqlalchemy import inspect, text

from service.db import current_revision, head_revision, make_engine, upgrade
from service.models import Base


def test_migrations_create_every_table(database_url):
    engine = make_engine(database_url)
    upgrade(engine)
    upgrade(engine)  # a second run is a no-op
    assert current_revision(engine) == head_revision()
    tables = set(inspect(engine).get_table_names())
    assert set(Base.metadata.tables) <= tables
    engine.dispose()


def test_sqlite_runs_in_wal_mode_with_foreign_keys(tmp_path):
    engine = make_engine(f"sqlite:///{tmp_path / 'x.db'}")
    with engine.connect() as connection:
        assert connection.execute(text("PRAGMA journal_mode")).scalar() == "wal"
        assert connection.execute(text("PRAGMA foreign_keys")).scalar() == 1
    engine.dispose()


def test_unsupported_database_url_fails_at_settings_time():
    from pydantic import ValidationError

    from service.settings import Settings

    with pytest.raises(ValidationError, match="unsupported database URL"):
        Settings(database_url="mysql://root@localhost/x")
    with pytest.raises(ValidationError):
        Settings(port=0)
