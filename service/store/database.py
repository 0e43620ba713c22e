"""The Database handle: engines, transaction scopes, migrations and the chain writer.

SQLite is driven the way SQLAlchemy documents for taking over transaction control
from the sqlite3 driver (connect hook: ``isolation_level = None``; begin hook: emit
our own BEGIN). Read transactions use a deferred ``BEGIN``; every write transaction
uses ``BEGIN IMMEDIATE``, because a deferred transaction that reads and then writes
fails with SQLITE_BUSY at once, whatever busy_timeout says.

On PostgreSQL, ``reading()`` is REPEATABLE READ READ ONLY, so several queries (the
chain walk reads the head and then the rows) see one snapshot; ``writing()`` is the
server default, READ COMMITTED.
"""

from __future__ import annotations

import contextlib
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.engine import make_url
from sqlalchemy.exc import SQLAlchemyError
from sqlalchemy.orm import Session

from service.store import revisions
from service.store.writer import ChainWriter

_BEGIN_OPTION = "mixline_sqlite_begin"
_SQLITE_PRAGMAS = (
    "PRAGMA journal_mode=WAL",
    "PRAGMA synchronous=NORMAL",
    "PRAGMA busy_timeout=5000",
    "PRAGMA foreign_keys=ON",
    # Shrink the WAL file back after a very large batch has been checkpointed.
    "PRAGMA journal_size_limit=67108864",
)


def make_engine(
    url: str, *, pool_size: int = 10, max_overflow: int = 20, sqlite_query_only: bool = False
) -> Engine:
    """An Engine for ``url`` with mixline's SQLite transaction handling installed.

    ``sqlite_query_only`` makes every connection of the engine refuse writes.
    """
    parsed = make_url(url)
    backend = parsed.get_backend_name()
    options: dict[str, Any] = {"pool_size": pool_size, "max_overflow": max_overflow}
    if backend == "sqlite":
        if parsed.database in (None, "", ":memory:") or "mode=memory" in str(parsed):
            # Each pooled connection (and the writer's own) would see its own empty database.
            raise ValueError("an in-memory SQLite database cannot be shared; use a file path")
    elif backend == "postgresql":
        options["pool_pre_ping"] = True
        if "connect_timeout" not in parsed.query:
            options["connect_args"] = {"connect_timeout": 5}
    else:
        raise ValueError(
            f"unsupported database {backend!r}: use sqlite:/// or postgresql+psycopg://"
        )
    engine = create_engine(url, **options)
    if backend == "sqlite":
        _install_sqlite_hooks(engine, query_only=sqlite_query_only)
    return engine


def write_bind(engine: Engine) -> Engine:
    """``engine`` as used for write transactions (BEGIN IMMEDIATE on SQLite)."""
    if engine.dialect.name == "sqlite":
        return engine.execution_options(**{_BEGIN_OPTION: "BEGIN IMMEDIATE"})
    return engine


def _install_sqlite_hooks(engine: Engine, *, query_only: bool) -> None:
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection: Any, connection_record: Any) -> None:
        dbapi_connection.isolation_level = None
        for pragma in _SQLITE_PRAGMAS:
            dbapi_connection.execute(pragma)
        if query_only:
            dbapi_connection.execute("PRAGMA query_only=ON")

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Any) -> None:
        conn.exec_driver_sql(conn.get_execution_options().get(_BEGIN_OPTION, "BEGIN"))


class Database:
    """One database (SQLite file or PostgreSQL), its sessions and its chain writer."""

    def __init__(self, url: str, *, pool_size: int = 10, max_overflow: int = 20) -> None:
        self.url = url
        self.engine = make_engine(url, pool_size=pool_size, max_overflow=max_overflow)
        self.dialect: str = self.engine.dialect.name
        self._write_bind = write_bind(self.engine)
        self._read_bind: Engine
        if self.dialect == "sqlite":
            # A pool of its own whose connections refuse writes, as PostgreSQL's
            # read-only transactions do, so a write in reading() fails on both.
            self._read_bind = make_engine(
                url, pool_size=pool_size, max_overflow=max_overflow, sqlite_query_only=True
            )
        else:
            self._read_bind = self.engine.execution_options(
                isolation_level="REPEATABLE READ", postgresql_readonly=True
            )
        # SQLite has one write lock per file; the writers of this process queue for it on a
        # Python lock instead (see ChainWriter), which hands it over without sleeping.
        self._sqlite_write_lock = threading.RLock() if self.dialect == "sqlite" else None
        self.writer = ChainWriter(self.engine, sqlite_write_lock=self._sqlite_write_lock)

    def __repr__(self) -> str:
        return f"Database({self.engine.url.render_as_string(hide_password=True)!r})"

    def upgrade(self) -> None:
        """Run the Alembic migrations up to head (idempotent)."""
        revisions.upgrade(self._write_bind)

    def migrations_current(self) -> bool:
        """True if the database is at the newest revision; False if behind, empty or unreachable."""
        try:
            return revisions.is_current(self.engine)
        except SQLAlchemyError:
            return False

    def ping(self) -> bool:
        try:
            with self.engine.connect() as conn:
                conn.exec_driver_sql("SELECT 1")
            return True
        except SQLAlchemyError:
            return False

    @contextmanager
    def reading(self) -> Iterator[Session]:
        """A session for read-only work on one consistent snapshot; writes are refused."""
        with Session(self._read_bind, expire_on_commit=False) as session:
            yield session

    @contextmanager
    def writing(self) -> Iterator[Session]:
        """A short write transaction: commits on success, rolls back on an exception."""
        held = self._sqlite_write_lock if self._sqlite_write_lock is not None else contextlib.nullcontext()
        background = self._sqlite_write_lock is not None and self.writer.checkpoints_in_background
        with held, Session(self._write_bind, expire_on_commit=False) as session, session.begin():
            if background:
                # Otherwise the COMMIT that takes the WAL past 1,000 pages checkpoints it while
                # holding the write lock: a 2,000-asset mix (6 MB of text) did so at every
                # publication, and the log writer, hence every allocation, waited 20-80 ms.
                session.connection().exec_driver_sql("PRAGMA wal_autocheckpoint=0")
            yield session
        if background:
            self.writer.wrote_elsewhere()

    def start(self) -> None:
        """Start the chain writer (its thread and connection)."""
        self.writer.start()

    def close(self) -> None:
        """Stop the writer after it has written everything submitted, then close all connections."""
        self.writer.close()
        if self.dialect == "sqlite":
            self._read_bind.dispose()
        self.engine.dispose()
