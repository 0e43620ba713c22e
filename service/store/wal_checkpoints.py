"""Background WAL checkpoints for a SQLite database written by the ChainWriter.

By default SQLite checkpoints inside the COMMIT of whichever connection pushed the
WAL past 1,000 pages: for the chain writer that adds the copy of every page (and an
fsync) to the latency of the request that happened to cross the line, about as long
again as the write itself for a large batch. The writer's connection therefore turns
automatic checkpoints off and this thread runs PASSIVE checkpoints on its own
connection instead; PASSIVE never waits for locks, so it does not hold up the writer.
"""

from __future__ import annotations

import threading
from typing import Any

from sqlalchemy import Engine

# About 1.5 MB of log rows: checkpoint in modest steps rather than after every commit.
_ROWS_PER_CHECKPOINT = 2_000
_IDLE_CHECKPOINT_SECONDS = 1.0


class WalCheckpointer:
    def __init__(self, engine: Engine) -> None:
        self._engine = engine
        self._wake = threading.Event()
        self._stopping = False
        self._pending_rows = 0
        self._thread: threading.Thread | None = None

    def start(self) -> None:
        self._stopping = False
        self._thread = threading.Thread(
            target=self._run, name="mixline-wal-checkpoint", daemon=True
        )
        self._thread.start()

    def committed(self, rows: int) -> None:
        """Called by the writer after each commit."""
        self._pending_rows += rows
        if self._pending_rows >= _ROWS_PER_CHECKPOINT:
            self._wake.set()

    def stop(self) -> None:
        self._stopping = True
        self._wake.set()
        if self._thread is not None:
            self._thread.join()
            self._thread = None

    def _run(self) -> None:
        connection: Any = None
        try:
            while not self._stopping:
                self._wake.wait(_IDLE_CHECKPOINT_SECONDS)
                self._wake.clear()
                if self._pending_rows == 0 or self._stopping:
                    continue
                self._pending_rows = 0
                try:
                    if connection is None:
                        connection = self._engine.raw_connection()
                    connection.driver_connection.execute("PRAGMA wal_checkpoint(PASSIVE)")
                except Exception:
                    # A failed checkpoint loses nothing; the next one (or SQLite's own at
                    # close) catches up. Start again on a fresh connection.
                    if connection is not None:
                        connection.invalidate()
                    connection = None
        finally:
            if connection is not None:
                connection.close()
