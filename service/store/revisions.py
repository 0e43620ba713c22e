"""Running the Alembic migrations in ``service/store/migrations`` from code (no ini file).

The migration runs inside one transaction that the caller's engine begins (BEGIN
IMMEDIATE on SQLite, so DDL is transactional there too). On PostgreSQL it first takes
a transaction-scoped advisory lock, so replicas starting together migrate one at a time.
"""

from __future__ import annotations

from functools import cache
from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import Connection, Engine

MIGRATIONS_DIR = Path(__file__).resolve().parent / "migrations"
# Any fixed 64-bit number; it only has to be the same for every mixline process.
_MIGRATION_LOCK_ID = 0x6D69786C696E65


def alembic_config(connection: Connection | None = None) -> Config:
    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS_DIR))
    if connection is not None:
        config.attributes["connection"] = connection
    return config


@cache
def script_heads() -> frozenset[str]:
    return frozenset(ScriptDirectory.from_config(alembic_config()).get_heads())


def lock_for_migration(connection: Connection) -> None:
    """Serialise migrations across processes for the rest of this transaction."""
    if connection.dialect.name == "postgresql":
        connection.exec_driver_sql(f"SELECT pg_advisory_xact_lock({_MIGRATION_LOCK_ID})")
    # On SQLite the caller's BEGIN IMMEDIATE already holds the only write lock.


def _run(engine: Engine, action: str, target: str) -> None:
    with engine.begin() as connection:
        lock_for_migration(connection)
        config = alembic_config(connection)
        if action == "upgrade":
            command.upgrade(config, target)
        else:
            command.downgrade(config, target)


def upgrade(engine: Engine, target: str = "head") -> None:
    _run(engine, "upgrade", target)


def downgrade(engine: Engine, target: str = "base") -> None:
    _run(engine, "downgrade", target)


def current_heads(engine: Engine) -> frozenset[str]:
    with engine.connect() as connection:
        return frozenset(MigrationContext.configure(connection).get_current_heads())


def is_current(engine: Engine) -> bool:
    return current_heads(engine) == script_heads()
