"""Running in production: pool sizes from settings, readiness that turns at shutdown, a
migration command that can run again."""

from __future__ import annotations

import http.client
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest
import uvicorn
from sqlalchemy.pool import QueuePool

from service.api import create_app
from service.cli import draining_server, main
from service.settings import Settings
from service.store import Database


def pool_of(db: Database) -> tuple[int, int]:
    pool = db.engine.pool
    assert isinstance(pool, QueuePool)
    return pool.size(), pool._max_overflow


def test_pool_sizes_come_from_the_environment(empty_db_url: str, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("MIXLINE_DATABASE_URL", empty_db_url)
    monkeypatch.setenv("MIXLINE_DB_POOL_SIZE", "3")
    monkeypatch.setenv("MIXLINE_DB_MAX_OVERFLOW", "4")
    app = create_app(migrate=False)
    db = app.state.mixline.db
    try:
        assert pool_of(db) == (3, 4)
    finally:
        db.close()


def test_pool_settings_refuse_nonsense() -> None:
    with pytest.raises(ValueError, match="db_pool_size"):
        Settings(db_pool_size=0)
    with pytest.raises(ValueError, match="db_max_overflow"):
        Settings(db_max_overflow=-1)


def test_migrate_runs_again_without_change(empty_db_url: str, monkeypatch: pytest.MonkeyPatch) -> None:
    """What a re-applied migration Job does: `mixline migrate` twice, with the Job's one-connection pool."""
    monkeypatch.setenv("MIXLINE_DATABASE_URL", empty_db_url)
    monkeypatch.setenv("MIXLINE_DB_POOL_SIZE", "1")
    monkeypatch.setenv("MIXLINE_DB_MAX_OVERFLOW", "0")
    assert main(["migrate"]) == 0
    assert main(["migrate"]) == 0
    db = Database(empty_db_url)
    try:
        assert db.migrations_current()
    finally:
        db.close()


@pytest.mark.anyio
async def test_readiness_turns_to_503_when_shutdown_starts(empty_db_url: str) -> None:
    db = Database(empty_db_url)
    app = create_app(Settings(database_url=empty_db_url), db)
    state = app.state.mixline
    try:
        async with (
            app.router.lifespan_context(app),
            httpx.AsyncClient(transport=httpx.ASGITransport(app=app), base_url="http://t") as c,
        ):
            assert (await c.get("/readyz")).status_code == 200
            # What uvicorn does on SIGTERM, through the server `mixline serve` runs.
            server = draining_server(uvicorn.Config(app))
            server.handle_exit(signal.SIGTERM, None)
            assert server.should_exit
            r = await c.get("/readyz")
            assert r.status_code == 503
            assert r.headers["content-type"].startswith("application/problem+json")
            assert "shutting down" in r.json()["detail"]
            assert (await c.get("/livez")).status_code == 200  # alive, only not ready
        assert state.shutting_down
    finally:
        db.close()


@pytest.mark.anyio
async def test_the_lifespan_shutdown_also_marks_the_app_not_ready(empty_db_url: str) -> None:
    db = Database(empty_db_url)
    app = create_app(Settings(database_url=empty_db_url), db)
    try:
        async with app.router.lifespan_context(app):
            assert not app.state.mixline.shutting_down
        assert app.state.mixline.shutting_down
    finally:
        db.close()


@pytest.mark.slow
def test_a_served_process_stops_being_ready_on_sigterm_and_exits_cleanly(tmp_path: Path) -> None:
    """`mixline serve` for real: after SIGTERM, a connection it still holds never hears "ready"
    again (503, or uvicorn closes it), and the process shuts down in order."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = int(s.getsockname()[1])
    env = {**os.environ, "MIXLINE_DATABASE_URL": f"sqlite:///{tmp_path / 'serve.db'}"}
    server = subprocess.Popen(
        [sys.executable, "-m", "service.cli", "serve", "--port", str(port)],
        env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
    )
    connection = http.client.HTTPConnection("127.0.0.1", port, timeout=5)
    try:
        deadline = time.monotonic() + 30
        while True:
            try:
                connection.request("GET", "/readyz")
                answer = connection.getresponse()
                answer.read()
                if answer.status == 200:
                    break
            except OSError:
                connection.close()
            assert time.monotonic() < deadline and server.poll() is None, "the server did not start"
            time.sleep(0.2)
        server.send_signal(signal.SIGTERM)
        try:
            connection.request("GET", "/readyz")
            after = connection.getresponse()
            after.read()
            assert after.status == 503
        except (OSError, http.client.HTTPException):
            pass  # closed by the server's shutdown: not ready either
        # uvicorn finishes its shutdown (the lifespan's, which flushes the log writer), then
        # raises the signal it caught again, so the exit status says SIGTERM.
        assert server.wait(timeout=30) in (0, -signal.SIGTERM)
        assert server.stderr is not None
        assert "Application shutdown complete" in server.stderr.read().decode()
    finally:
        connection.close()
        if server.poll() is None:
            server.kill()
            server.wait()
        if server.stderr is not None:
            server.stderr.close()
