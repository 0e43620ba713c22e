"""Migrations: upgrade/downgrade, the readiness checks built on them, and the models
agreeing with what the migrations create."""

from __future__ import annotations

from pathlib import Path

from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from sqlalchemy import inspect

from service.store import Database
from service.store.revisions import downgrade, script_heads
from service.store.schema import Base

EXPECTED_TABLES = {
    "alembic_version", "allocation_batches", "allocations", "api_keys", "chain_heads", "frontiers", "idempotency_keys", "mixes",
    "plans",
}


def test_upgrade_makes_migrations_current(empty_db_url: str) -> None:
    db = Database(empty_db_url)
    try:
        assert db.ping()
        assert not db.migrations_current()  # nothing there yet
        db.upgrade()
        assert db.migrations_current()
        assert set(inspect(db.engine).get_table_names()) == EXPECTED_TABLES
        db.upgrade()  # a second run changes nothing
        assert db.migrations_current()
    finally:
        db.close()


def test_downgrade_to_base_is_not_current(empty_db_url: str) -> None:
    db = Database(empty_db_url)
    try:
        db.upgrade()
        downgrade(db.engine, "base")
        assert not db.migrations_current()
        assert set(inspect(db.engine).get_table_names()) <= {"alembic_version"}
        db.upgrade()
        assert db.migrations_current()
    finally:
        db.close()


def test_models_match_the_migrations(db_url: str) -> None:
    db = Database(db_url)
    try:
        with db.engine.connect() as conn:
            context = MigrationContext.configure(conn, opts={"compare_type": True})
            assert compare_metadata(context, Base.metadata) == []
    finally:
        db.close()


def test_one_head_shipped_as_package_data() -> None:
    assert script_heads() == frozenset({"0006"})
    migrations = Path(__file__).resolve().parents[2] / "service" / "store" / "migrations"
    assert (migrations / "env.py").is_file()


def test_unreachable_database_reports_false(tmp_path: Path) -> None:
    # Port 1 on loopback refuses at once: no server is ever there.
    db = Database("postgresql+psycopg://postgres@127.0.0.1:1/mixline")
    try:
        assert not db.ping()
        assert not db.migrations_current()
    finally:
        db.close()
    sqlite_dir = Database(f"sqlite:///{tmp_path}/missing-dir/x.db")
    try:
        assert not sqlite_dir.ping()
    finally:
        sqlite_dir.close()


def test_one_revision_behind_is_not_current(empty_db_url: str) -> None:
    from service.store.revisions import downgrade

    db = Database(empty_db_url)
    try:
        db.upgrade()
        downgrade(db.engine, "0002")
        assert not db.migrations_current()  # /readyz reports not ready in this state
        db.upgrade()
        assert db.migrations_current()
    finally:
        db.close()


def test_the_lifecycle_revision_keeps_the_version_in_force(empty_db_url: str) -> None:
    """A plan's active version from before the lifecycle columns existed counts as activated at its
    publication time (the only time known); other versions stay published."""
    from sqlalchemy import text

    from service.store import list_lifecycle
    from service.store.revisions import downgrade

    db = Database(empty_db_url)
    try:
        db.upgrade()
        downgrade(db.engine, "0005")
        with db.engine.begin() as conn:
            conn.execute(text("INSERT INTO plans (plan_id, name, currency, policy, active_version, created_at) "
                              "VALUES ('p', 'P', 'USD', '{}', 'v1', :t)"), {"t": "2026-11-01 00:00:00+00:00"})
            for version, at in (("v1", "2026-11-02 00:00:00+00:00"), ("v2", "2026-11-03 00:00:00+00:00")):
                conn.execute(text("INSERT INTO mixes (plan_id, version, content_hash, inputs, solved, created_at) "
                                  "VALUES ('p', :v, :h, '{}', '{}', :t)"), {"v": version, "h": "a" * 64, "t": at})
        db.upgrade()
        with db.reading() as s:
            v1, v2 = list_lifecycle(s, "p")
        assert v1.activated_at == v1.published_at and v1.retired_at is None
        assert v2.activated_at is None and v2.published_by is None
    finally:
        db.close()
