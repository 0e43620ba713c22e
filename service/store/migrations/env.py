"""Alembic environment for mixline's store.

Called from code (service.store.revisions) with a connection already inside a
transaction in ``config.attributes["connection"]``; or from the ``alembic`` command
with the repo-root alembic.ini, taking the URL from MIXLINE_DATABASE_URL or the ini's
``sqlalchemy.url``.
"""

from __future__ import annotations

import os
from logging.config import fileConfig

from alembic import context

from service.store.schema import Base

config = context.config
target_metadata = Base.metadata

if config.config_file_name is not None:  # the alembic command, not the service
    fileConfig(config.config_file_name, disable_existing_loggers=False)


def _url() -> str:
    url = os.environ.get("MIXLINE_DATABASE_URL") or config.get_main_option("sqlalchemy.url")
    if not url:
        raise RuntimeError("set MIXLINE_DATABASE_URL (or sqlalchemy.url in alembic.ini)")
    return url


def _configure_and_run(connection: object) -> None:
    context.configure(
        connection=connection,  # type: ignore[arg-type]
        target_metadata=target_metadata,
        # Our SQLite connections run DDL inside the BEGIN we emit, so it is transactional.
        transactional_ddl=True,
        render_as_batch=True,
        compare_type=True,
    )
    with context.begin_transaction():
        context.run_migrations()


def run_migrations_offline() -> None:
    context.configure(url=_url(), target_metadata=target_metadata, literal_binds=True)
    with context.begin_transaction():
        context.run_migrations()


def run_migrations_online() -> None:
    connection = config.attributes.get("connection")
    if connection is not None:
        _configure_and_run(connection)
        return
    from service.store.database import make_engine, write_bind
    from service.store.revisions import lock_for_migration

    engine = make_engine(_url())
    try:
        with write_bind(engine).begin() as connection:
            lock_for_migration(connection)
            _configure_and_run(connection)
    finally:
        engine.dispose()


if context.is_offline_mode():
    run_migrations_offline()
else:
    run_migrations_online()
