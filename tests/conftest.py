"""Fixtures shared by every test package: database URLs for both dialects, a started
Database, fresh plan ids.

- ``db_url``: parametrised ["sqlite", "postgres"], already migrated. SQLite: a file in
  the test's tmp_path (a copy of one migrated template). PostgreSQL: one database
  ``mixline_test_<random>`` per test session, created from the admin URL in
  MIXLINE_TEST_POSTGRES_URL, migrated once and dropped at the end. Tests on it isolate
  by using unique plan ids (``new_plan_id``): the chain writer commits on its own
  connection, so a per-test rolled-back transaction cannot contain it.
- ``empty_db_url``: the same two dialects, never migrated (a new database per test).
- ``database``: a migrated, started Database on ``db_url``, closed after the test.

PostgreSQL tests carry the ``postgres`` marker and are skipped with the reason when the
server cannot be reached, unless MIXLINE_REQUIRE_POSTGRES=1, which turns that into a failure.
"""

from __future__ import annotations

import os
import secrets
import shutil
from collections.abc import Iterator
from pathlib import Path

import psycopg
import pytest
from psycopg import sql
from sqlalchemy.engine import make_url

from service.store import Database

POSTGRES_URL_ENV = "MIXLINE_TEST_POSTGRES_URL"
DEFAULT_POSTGRES_URL = "postgresql+psycopg://postgres@127.0.0.1:5432/postgres"
DIALECTS = [
    pytest.param("sqlite", id="sqlite"),
    pytest.param("postgres", id="postgres", marks=pytest.mark.postgres),
]


def _conninfo(url: str) -> str:
    """A libpq URL (what psycopg.connect takes) for a SQLAlchemy URL."""
    return make_url(url).set(drivername="postgresql").render_as_string(hide_password=False)


def _with_database(url: str, name: str) -> str:
    return make_url(url).set(database=name).render_as_string(hide_password=False)


def _create_database(admin_url: str) -> str:
    name = f"mixline_test_{secrets.token_hex(6)}"
    with psycopg.connect(_conninfo(admin_url), autocommit=True) as admin:
        admin.execute(sql.SQL("CREATE DATABASE {}").format(sql.Identifier(name)))
    return _with_database(admin_url, name)


def _drop_database(admin_url: str, url: str) -> None:
    name = make_url(url).database
    assert name is not None and name.startswith("mixline_test_"), name
    with psycopg.connect(_conninfo(admin_url), autocommit=True) as admin:
        admin.execute(
            sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(sql.Identifier(name))
        )


@pytest.fixture(scope="session")
def postgres_admin_url() -> str:
    """The admin URL, once the server has answered; skips (or fails) otherwise."""
    url = os.environ.get(POSTGRES_URL_ENV, DEFAULT_POSTGRES_URL)
    shown = make_url(url).render_as_string(hide_password=True)
    try:
        with psycopg.connect(_conninfo(url), autocommit=True, connect_timeout=3) as admin:
            admin.execute("SELECT 1")
    except psycopg.Error as error:
        message = f"PostgreSQL not reachable at {shown}: {error}".strip()
        if os.environ.get("MIXLINE_REQUIRE_POSTGRES") == "1":
            pytest.fail(message)
        pytest.skip(message)
    return url


@pytest.fixture(scope="session")
def postgres_url(postgres_admin_url: str) -> Iterator[str]:
    """The session's migrated PostgreSQL database."""
    url = _create_database(postgres_admin_url)
    try:
        migrator = Database(url)
        try:
            migrator.upgrade()
        finally:
            migrator.close()
        yield url
    finally:
        _drop_database(postgres_admin_url, url)


@pytest.fixture(scope="session")
def sqlite_template(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """One migrated SQLite file; each test gets a copy, which is far quicker than migrating."""
    path = tmp_path_factory.mktemp("sqlite-template") / "mixline.db"
    migrator = Database(f"sqlite:///{path}")
    try:
        migrator.upgrade()
    finally:
        migrator.close()  # checkpoints the WAL into the main file
    return path


@pytest.fixture(params=DIALECTS)
def db_url(request: pytest.FixtureRequest, tmp_path: Path) -> str:
    if request.param == "sqlite":
        template: Path = request.getfixturevalue("sqlite_template")
        path = tmp_path / "mixline.db"
        shutil.copyfile(template, path)
        return f"sqlite:///{path}"
    url: str = request.getfixturevalue("postgres_url")
    return url


@pytest.fixture(params=DIALECTS)
def empty_db_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'empty.db'}"
        return
    admin_url: str = request.getfixturevalue("postgres_admin_url")
    url = _create_database(admin_url)
    try:
        yield url
    finally:
        _drop_database(admin_url, url)


@pytest.fixture
def database(db_url: str) -> Iterator[Database]:
    db = Database(db_url)
    db.start()
    try:
        yield db
    finally:
        db.close()


@pytest.fixture
def new_plan_id() -> str:
    return f"plan-{secrets.token_hex(4)}"
