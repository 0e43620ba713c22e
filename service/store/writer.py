"""The ChainWriter: the only code that appends to the allocation log.

One daemon thread owns one connection. It blocks for a job, drains every job already
waiting (up to ``max_group_rows`` rows, or one bigger batch on its own), and writes
them in one transaction: lock the plans' chain heads, hash the new links in order,
bulk-insert them, move the heads, commit, and only then resolve the jobs' futures.
Committing many small jobs together is what keeps single-allocation latency low
under concurrency: one commit (one fsync on PostgreSQL) serves every waiting request,
and SQLite never sees competing writers.

If a group fails, each of its jobs is retried alone, so one bad job (an unknown plan,
a duplicate allocation id) fails only its own future. A lost connection is replaced
and the group retried once.

Locking: SQLite takes the database write lock with BEGIN IMMEDIATE. PostgreSQL locks
the plans' chain_heads rows with SELECT ... FOR UPDATE (in plan_id order), so several
replicas sharing one database still build one consistent chain per plan.
"""

from __future__ import annotations

import hashlib
import queue
import threading
from collections.abc import Iterable, Iterator, Sequence
from concurrent.futures import Future
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Engine
from sqlalchemy.exc import DBAPIError

from service.store.chain import GENESIS_HASH, SEPARATOR
from service.store.records import LogBatch

_COLUMNS = "plan_id, seq, allocation_id, member_id, mix_version, created_at, body, prev_hash, row_hash"
# Below this many rows a pipelined executemany beats setting up COPY.
_COPY_MIN_ROWS = 2_000
# A larger page cache lets one very large batch stay in memory until COMMIT.
_SQLITE_WRITER_CACHE_KIB = 256 * 1024


@dataclass(frozen=True)
class _Job:
    batch: LogBatch
    size: int
    future: Future[None]


_STOP = object()


def _check_batch(batch: LogBatch) -> int:
    """Reject a malformed batch on the caller's thread, before it reaches the writer."""
    size = len(batch.allocation_ids)
    if len(batch.member_ids) != size or len(batch.bodies) != size:
        raise ValueError(
            f"batch for plan {batch.plan_id!r}: {size} allocation_ids, "
            f"{len(batch.member_ids)} member_ids, {len(batch.bodies)} bodies; they must match"
        )
    for name in ("plan_id", "mix_version", "created_at"):
        value = getattr(batch, name)
        if not isinstance(value, str) or not value:
            raise ValueError(f"batch {name} must be a non-empty string, got {value!r}")
        if SEPARATOR in value:
            raise ValueError(f"batch {name} contains the U+001F separator")
    for name in ("allocation_ids", "member_ids", "bodies"):
        values: Sequence[str] = getattr(batch, name)
        if not all(type(v) is str for v in values):
            raise ValueError(f"batch {name} must all be strings")
        if any(SEPARATOR in v for v in values):
            raise ValueError(f"batch {name} contain the U+001F separator")
    return size


def _links(
    batch: LogBatch, seq: int, prev_hash: str
) -> Iterator[tuple[str, int, str, str, str, str, str, str, str]]:
    """The batch's rows with seq and hashes, continuing the chain from (seq, prev_hash).

    The same text as chain.link_hash, built inline: this loop is the writer's hot path.
    """
    plan_id = batch.plan_id
    mix_version = batch.mix_version
    created_at = batch.created_at
    tail = f"{SEPARATOR}{mix_version}{SEPARATOR}{created_at}{SEPARATOR}"
    sha256 = hashlib.sha256
    for allocation_id, member_id, body in zip(
        batch.allocation_ids, batch.member_ids, batch.bodies, strict=True
    ):
        seq += 1
        text = f"{prev_hash}\x1f{plan_id}\x1f{seq}\x1f{allocation_id}\x1f{member_id}{tail}{body}"
        row_hash = sha256(text.encode()).hexdigest()
        yield (
            plan_id,
            seq,
            allocation_id,
            member_id,
            mix_version,
            created_at,
            body,
            prev_hash,
            row_hash,
        )
        prev_hash = row_hash


class _Chains:
    """Head positions of the plans in one transaction, advanced as rows are generated."""

    def __init__(self, heads: dict[str, tuple[int, str]]) -> None:
        self.heads = heads

    def rows(self, jobs: Iterable[_Job]) -> Iterator[tuple[Any, ...]]:
        for job in jobs:
            plan_id = job.batch.plan_id
            seq, prev_hash = self.heads[plan_id]
            for row in _links(job.batch, seq, prev_hash):
                seq, prev_hash = row[1], row[8]
                yield row
            self.heads[plan_id] = (seq, prev_hash)


class ChainWriter:
    """Group-commit appender for the allocation log (see the module docstring)."""

    def __init__(self, engine: Engine, *, max_group_rows: int = 50_000) -> None:
        self._engine = engine
        self._dialect = engine.dialect.name
        self._max_group_rows = max_group_rows
        self._queue: queue.SimpleQueue[Any] = queue.SimpleQueue()
        self._lock = threading.Lock()
        self._thread: threading.Thread | None = None
        self._running = False
        self._connection: Any = None  # a pooled DBAPI connection, owned by the writer thread

    @property
    def running(self) -> bool:
        return self._running

    def start(self) -> None:
        with self._lock:
            if self._running:
                return
            self._running = True
            self._thread = threading.Thread(
                target=self._run, name="mixline-chain-writer", daemon=True
            )
            self._thread.start()

    def close(self, timeout: float | None = None) -> None:
        """Write everything already submitted, then stop the thread. Idempotent."""
        with self._lock:
            if not self._running:
                return
            self._running = False
            self._queue.put(_STOP)
            thread = self._thread
            self._thread = None
        if thread is not None:
            thread.join(timeout)

    def submit(self, batch: LogBatch) -> Future[None]:
        """Queue ``batch``; the future resolves once its rows are committed.

        Raises ValueError for a malformed batch, RuntimeError if the writer is not running.
        """
        size = _check_batch(batch)
        future: Future[None] = Future()
        if size == 0:
            future.set_result(None)
            return future
        with self._lock:
            if not self._running:
                raise RuntimeError("the chain writer is not running (Database.start() not called?)")
            self._queue.put(_Job(batch, size, future))
        return future

    def append(self, batch: LogBatch) -> None:
        """Submit and wait until committed; re-raises the writer's error if it failed."""
        self.submit(batch).result()

    # -- the writer thread ---------------------------------------------------------------

    def _run(self) -> None:
        carried: Any = None
        try:
            while True:
                first = carried if carried is not None else self._queue.get()
                carried = None
                if first is _STOP:
                    return
                group: list[_Job] = [first]
                rows = first.size
                stopping = False
                while rows < self._max_group_rows:
                    try:
                        job = self._queue.get_nowait()
                    except queue.Empty:
                        break
                    if job is _STOP:
                        stopping = True
                        break
                    if rows + job.size > self._max_group_rows:
                        carried = job  # a big batch gets a transaction of its own
                        break
                    group.append(job)
                    rows += job.size
                self._write_group([j for j in group if j.future.set_running_or_notify_cancel()])
                if stopping:
                    return
        finally:
            self._drop_connection(invalidate=False)

    def _write_group(self, group: list[_Job]) -> None:
        if not group:
            return
        try:
            self._write_retrying(group)
        except Exception as error:
            if len(group) == 1:
                group[0].future.set_exception(error)
                return
            for job in group:
                try:
                    self._write_retrying([job])
                except Exception as job_error:
                    job.future.set_exception(job_error)
                else:
                    job.future.set_result(None)
            return
        for job in group:
            job.future.set_result(None)

    def _write_retrying(self, jobs: list[_Job]) -> None:
        try:
            self._write(jobs)
        except DBAPIError as error:
            self._drop_connection(invalidate=True)
            if not error.connection_invalidated:
                raise
            self._write(jobs)
        except Exception:
            self._drop_connection(invalidate=True)
            raise

    def _write(self, jobs: list[_Job]) -> None:
        connection = self._checkout()
        try:
            if self._dialect == "sqlite":
                self._write_sqlite(connection.driver_connection, jobs)
            else:
                self._write_postgresql(connection.driver_connection, jobs)
        except BaseException as error:
            try:
                connection.driver_connection.rollback()
            except Exception:
                pass
            if isinstance(error, self._engine.dialect.loaded_dbapi.Error):
                is_disconnect = self._engine.dialect.is_disconnect(
                    error, connection.driver_connection, None
                )
                raise DBAPIError.instance(
                    None, None, error, self._engine.dialect.loaded_dbapi.Error,
                    connection_invalidated=is_disconnect,
                ) from error
            raise

    def _checkout(self) -> Any:
        if self._connection is None:
            self._connection = self._engine.raw_connection()
            if self._dialect == "sqlite":
                self._connection.driver_connection.execute(
                    f"PRAGMA cache_size=-{_SQLITE_WRITER_CACHE_KIB}"
                )
        return self._connection

    def _drop_connection(self, *, invalidate: bool) -> None:
        connection, self._connection = self._connection, None
        if connection is None:
            return
        try:
            if invalidate:
                connection.invalidate()
            else:
                # Closed for good rather than pooled: it carries the writer's own settings.
                connection.detach()
                connection.close()
        except Exception:
            pass

    def _write_sqlite(self, dbapi: Any, jobs: list[_Job]) -> None:
        dbapi.execute("BEGIN IMMEDIATE")
        plan_ids = sorted({job.batch.plan_id for job in jobs})
        heads: dict[str, tuple[int, str]] = {}
        for plan_id in plan_ids:
            found = dbapi.execute(
                "SELECT last_seq, last_hash FROM chain_heads WHERE plan_id = ?", (plan_id,)
            ).fetchone()
            heads[plan_id] = (found[0], found[1]) if found is not None else (0, GENESIS_HASH)
        chains = _Chains(heads)
        dbapi.executemany(
            f"INSERT INTO allocations ({_COLUMNS}) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
            chains.rows(jobs),
        )
        dbapi.executemany(
            "INSERT INTO chain_heads (plan_id, last_seq, last_hash) VALUES (?, ?, ?) "
            "ON CONFLICT (plan_id) DO UPDATE "
            "SET last_seq = excluded.last_seq, last_hash = excluded.last_hash",
            [(plan_id, seq, last) for plan_id, (seq, last) in chains.heads.items()],
        )
        dbapi.commit()

    def _write_postgresql(self, dbapi: Any, jobs: list[_Job]) -> None:
        plan_ids = sorted({job.batch.plan_id for job in jobs})
        with dbapi.cursor() as cursor:
            heads = self._lock_heads_postgresql(cursor, plan_ids)
            missing = [p for p in plan_ids if p not in heads]
            if missing:
                cursor.executemany(
                    "INSERT INTO chain_heads (plan_id, last_seq, last_hash) VALUES (%s, 0, %s) "
                    "ON CONFLICT (plan_id) DO NOTHING",
                    [(plan_id, GENESIS_HASH) for plan_id in missing],
                )
                heads.update(self._lock_heads_postgresql(cursor, missing))
            chains = _Chains(heads)
            if sum(job.size for job in jobs) >= _COPY_MIN_ROWS:
                with cursor.copy(f"COPY allocations ({_COLUMNS}) FROM STDIN") as copy:
                    for row in chains.rows(jobs):
                        copy.write_row(row)
            else:
                cursor.executemany(
                    f"INSERT INTO allocations ({_COLUMNS}) "
                    "VALUES (%s, %s, %s, %s, %s, %s, %s, %s, %s)",
                    list(chains.rows(jobs)),
                )
            cursor.executemany(
                "UPDATE chain_heads SET last_seq = %s, last_hash = %s WHERE plan_id = %s",
                [(seq, last, plan_id) for plan_id, (seq, last) in chains.heads.items()],
            )
        dbapi.commit()

    @staticmethod
    def _lock_heads_postgresql(cursor: Any, plan_ids: list[str]) -> dict[str, tuple[int, str]]:
        cursor.execute(
            "SELECT plan_id, last_seq, last_hash FROM chain_heads "
            "WHERE plan_id = ANY(%s) ORDER BY plan_id FOR UPDATE",
            (plan_ids,),
        )
        return {plan_id: (seq, last) for plan_id, seq, last in cursor.fetchall()}
