"""Alembic environment: runs on the connection handed over by ``service.db.upgrade``,
or on ``sqlalchemy.url`` when Alembic's own command line is used."""

from __future__ import annotations

from alembic import context

from service import models  # noqa: F401  (registers the tables on the metadata)
from service.db import Base, make_engine

config = context.config
target_metadata = Base.metadata


def run_migrations_online() -> None:
    connection = config.attributes.get("connection")
    if connection is not None:
        context.configure(connection=connection, target_metadata=target_metadata)
        context.run_migrations()
        return
    url = config.get_main_option("sqlalchemy.url")
    if url is None:
        raise RuntimeError("the Alembic configuration names no sqlalchemy.url")
    engine = make_engine(url)
    with engine.begin() as own:
        context.configure(connection=own, target_metadata=target_metadata)
        context.run_migrations()
    engine.dispose()


def run_migrations_offline() -> None:
    context.configure(
        url=config.get_main_option("sqlalchemy.url"),
        target_metadata=target_metadata,
        literal_binds=True,
    )
    with context.begin_transaction():
        context.run_migrations()


if context.is_offline_mode():
    run_migrations_offline()
else:
    run_migrations_online()
