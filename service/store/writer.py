"""The ChainWriter: the only code that appends to the allocation log.

One daemon thread owns one connection. It blocks for a job, drains every job already
waiting (up to ``max_group_rows`` rows, or one bigger batch on its own; under load it
also waits a moment for stragglers, see ``_gather``), and writes them in one transaction: lock the plans' chain heads, hash the new links in order,
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

import contextlib
import hashlib
import logging
import queue
import threading
import time
from collections.abc import Callable, Iterable, Iterator, Sequence
from concurrent.futures import Future
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import Engine
from sqlalchemy.exc import DBAPIError

from service.store.chain import GENESIS_HASH, SEPARATOR
from service.store.idempotency import (
    IdempotencyRecord,
    KeyOperation,
    KeyRelease,
    KeyReservation,
    complete,
    completion_parameters,
    purge,
)
from service.store.idempotency import run as run_key_operation
from service.store.records import (
    ABANDONED,
    STAGED,
    VISIBLE,
    Finished,
    IdempotencyCompletion,
    LogBatch,
    LogStream,
)
from service.store.wal_checkpoints import WalCheckpointer

log = logging.getLogger("mixline.writer")

_COLUMNS = (
    "plan_id, seq, allocation_id, member_id, mix_version, created_at, body, prev_hash, row_hash, batch_id"
)
# Below this many rows a pipelined executemany beats setting up COPY.
_COPY_MIN_ROWS = 2_000

# PostgreSQL, a group whose plans' heads the writer committed last: one statement, sent in
# autocommit mode (one round trip, no BEGIN, no separate COMMIT), its arrays in binary (psycopg
# escapes a text array element by element with a regular expression). Its first part locks the heads
# and keeps only those still where this writer left them; rows and new heads are written only if
# every plan's head qualified, so a head moved by another replica (or by hand) writes nothing
# and the group goes the ordinary way, hashed from the heads as they are.
_APPEND_AT_KNOWN_HEADS = f"""
WITH known AS (
    SELECT h.plan_id FROM chain_heads AS h
    JOIN unnest(%b::text[], %b::bigint[], %b::text[]) AS k(plan_id, last_seq, last_hash)
      ON h.plan_id = k.plan_id AND h.last_seq = k.last_seq AND h.last_hash = k.last_hash
    ORDER BY h.plan_id
    FOR UPDATE OF h
), applies AS (
    SELECT count(*) = %b AS ok FROM known
), rows AS (
    INSERT INTO allocations ({_COLUMNS})
    SELECT r.* FROM unnest(
        %b::text[], %b::bigint[], %b::text[], %b::text[], %b::text[], %b::text[], %b::text[],
        %b::text[], %b::text[], %b::text[]
    ) AS r, applies WHERE applies.ok
    RETURNING 1
), heads AS (
    UPDATE chain_heads AS h SET last_seq = n.last_seq, last_hash = n.last_hash
    FROM unnest(%b::text[], %b::bigint[], %b::text[]) AS n(plan_id, last_seq, last_hash), applies
    WHERE h.plan_id = n.plan_id AND applies.ok
    RETURNING 1
)
SELECT applies.ok, (SELECT count(*) FROM rows), (SELECT count(*) FROM heads) FROM applies
"""
# A larger page cache keeps the indexes' hot pages of a large batch in memory.
_SQLITE_WRITER_CACHE_KIB = 64 * 1024


# How often the writer drops expired Idempotency-Key reservations, in seconds.
_PURGE_EVERY_SECONDS = 600.0


@dataclass(frozen=True)
class _Job:
    batch: LogBatch | LogStream | KeyOperation
    size: int
    future: Future[Any]
    outcome: list[Any] = field(default_factory=list)

    @property
    def logs(self) -> bool:
        return not isinstance(self.batch, KeyReservation | KeyRelease)

    @property
    def alone(self) -> bool:
        """A stream is written chunk by chunk (see ChainWriter._write_stream), not in a group."""
        return isinstance(self.batch, LogStream)


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
) -> Iterator[tuple[str, int, str, str, str, str, str, str, str, str | None]]:
    """The batch's rows with seq and hashes, continuing the chain from (seq, prev_hash).

    The text hashed is exactly chain.link_hash's (a test holds them equal); it is written out
    here with the batch's constant fields joined once, since this loop runs once per row.
    """
    plan_id = batch.plan_id
    mix_version = batch.mix_version
    created_at = batch.created_at
    batch_id = batch.batch_id
    sep = SEPARATOR
    sha256 = hashlib.sha256
    for allocation_id, member_id, body in batch.triples():
        seq += 1
        row_hash = sha256(
            f"{prev_hash}{sep}{plan_id}{sep}{seq}{sep}{allocation_id}{sep}{member_id}{sep}"
            f"{mix_version}{sep}{created_at}{sep}{body}".encode()
        ).hexdigest()
        yield (plan_id, seq, allocation_id, member_id, mix_version, created_at, body, prev_hash, row_hash, batch_id)
        prev_hash = row_hash


class _Chains:
    """Head positions of the plans in one transaction, advanced as rows are generated."""

    def __init__(self, heads: dict[str, tuple[int, str]]) -> None:
        self.heads = heads

    def rows(self, jobs: Iterable[_Job]) -> Iterator[tuple[Any, ...]]:
        for job in jobs:
            if not job.logs:
                continue
            assert isinstance(job.batch, LogBatch)
            plan_id = job.batch.plan_id
            seq, prev_hash = self.heads[plan_id]
            for row in _links(job.batch, seq, prev_hash):
                seq, prev_hash = row[1], row[8]
                yield row
            self.heads[plan_id] = (seq, prev_hash)


def _completions(jobs: Iterable[_Job]) -> list[tuple[Any, ...]]:
    """Idempotency answers to store with these rows (a stream's arrives after its last row)."""
    found = []
    for job in jobs:
        if not isinstance(job.batch, LogBatch):
            continue
        completes = job.batch.completion()
        if completes is not None:
            found.append(completion_parameters(completes))
    return found


def _head_rows(chains: _Chains) -> list[tuple[int, str, str]]:
    return [(seq, last, plan_id) for plan_id, (seq, last) in chains.heads.items()]


class ChainWriter:
    """Group-commit appender for the allocation log (see the module docstring)."""

    GATHER_GAP_SECONDS = 0.0003
    GATHER_MAX_SECONDS = 0.002
    GATHER_WRITE_SHARE = 0.5
    # After a failed connect, jobs fail at once for this long before the next attempt.
    RECONNECT_PAUSE_SECONDS = 0.5

    def __init__(
        self, engine: Engine, *, max_group_rows: int = 50_000, sqlite_write_lock: threading.RLock | None = None
    ) -> None:
        self._engine = engine
        # SQLite: the process's other writers (Database.writing) take this lock too, so that
        # the log writer waits for them on a lock that wakes it at once, not in SQLite's busy
        # handler, which sleeps 1, 2, 5, 10, 15, 20, 25 ms ... between tries.
        self._sqlite_lock = sqlite_write_lock if sqlite_write_lock is not None else threading.RLock()
        self._dialect = engine.dialect.name
        self._max_group_rows = max_group_rows
        self._queue: queue.SimpleQueue[Any] = queue.SimpleQueue()
        self._lock = threading.Lock()
        self._thread: threading.Thread | None = None
        self._running = False
        self._connection: Any = None  # a pooled DBAPI connection, owned by the writer thread
        self._checkpointer = WalCheckpointer(engine) if self._dialect == "sqlite" else None
        self._last_purge = 0.0
        # While a stream is written, WAL checkpoints wait: copying pages back to the database
        # file then would compete with the stream's own writes (one checkpoint follows it).
        self._streaming = False
        self._refused: tuple[float, Exception] | None = None  # (until when, the connect error)
        # PostgreSQL: each plan's head as this writer last committed it (see _APPEND_AT_KNOWN_HEADS);
        # forgotten whenever a transaction fails or the connection is replaced.
        self._known_heads: dict[str, tuple[int, str]] = {}
        # Called on the writer thread after each group as (jobs, rows, seconds); the api layer
        # turns it into metrics, so this module needs no metrics library. Once per group, not per row.
        self.group_written: Callable[[int, int, float], None] | None = None

    def queue_depth(self) -> int:
        """Jobs submitted and not yet taken by the writer thread (approximate, lock-free)."""
        return self._queue.qsize()

    @property
    def running(self) -> bool:
        return self._running

    @property
    def checkpoints_in_background(self) -> bool:
        """True on SQLite while this writer runs: WAL checkpoints are then its thread's work."""
        return self._checkpointer is not None and self._running

    def wrote_elsewhere(self) -> None:
        """Another connection of this process committed (``Database.writing``): its WAL pages
        are checkpointed in the background too, at the checkpointer's next idle tick."""
        if self._checkpointer is not None and not self._streaming:
            self._checkpointer.committed(1)

    def start(self) -> None:
        with self._lock:
            if self._running:
                return
            self._running = True
            if self._checkpointer is not None:
                self._checkpointer.start()
            self._thread = threading.Thread(
                target=self._run, name="mixline-chain-writer", daemon=True
            )
            self._thread.start()

    def close(self, timeout: float | None = None) -> None:
        """Write everything already submitted, then stop the thread. Idempotent."""
        with self._lock:
            if self._running:
                self._running = False
                self._queue.put(_STOP)
            thread = self._thread
            self._thread = None
        if thread is not None:
            thread.join(timeout)
        if self._checkpointer is not None:
            self._checkpointer.stop()

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

    def submit_stream(self, stream: LogStream) -> Future[None]:
        """Queue a stream (see LogStream); the future resolves once all its rows are committed."""
        probe = LogBatch(stream.plan_id, stream.mix_version, stream.created_at, (), (), ())
        _check_batch(probe)
        future: Future[None] = Future()
        with self._lock:
            if not self._running:
                raise RuntimeError("the chain writer is not running (Database.start() not called?)")
            self._queue.put(_Job(stream, stream.size, future))
        return future

    def submit_key_operation(self, operation: KeyOperation) -> Future[IdempotencyRecord | None]:
        """Run an Idempotency-Key reservation or release in the writer's next transaction."""
        future: Future[IdempotencyRecord | None] = Future()
        with self._lock:
            if not self._running:
                raise RuntimeError("the chain writer is not running (Database.start() not called?)")
            self._queue.put(_Job(operation, 0, future))
        return future

    def append(self, batch: LogBatch) -> None:
        """Submit and wait until committed; re-raises the writer's error if it failed."""
        self.submit(batch).result()

    # -- the writer thread ---------------------------------------------------------------

    def _run(self) -> None:
        in_flight: list[_Job] = []
        try:
            self._loop(in_flight)
        except BaseException as error:
            # Not expected (group failures are caught per job); still, no caller may be
            # left waiting on a future nobody will resolve.
            with self._lock:
                self._running = False
            stranded = [*in_flight]
            while True:
                try:
                    job = self._queue.get_nowait()
                except queue.Empty:
                    break
                if job is not _STOP:
                    stranded.append(job)
            for job in stranded:
                if not job.future.done():
                    job.future.set_exception(RuntimeError(f"the chain writer stopped: {error!r}"))
            raise
        finally:
            self._drop_connection(invalidate=False)

    def _loop(self, in_flight: list[_Job]) -> None:
        carried: Any = None
        recent_jobs = 1
        recent_write_seconds = 0.0
        while True:
            first = carried if carried is not None else self._queue.get()
            carried = None
            if first is _STOP:
                return
            in_flight[:] = [first]
            if first.alone:
                if first.future.set_running_or_notify_cancel():
                    stopping = self._write_stream(first, in_flight)
                    if stopping:
                        return
                continue
            group, carried, stopping = self._gather(first, recent_jobs, recent_write_seconds)
            in_flight[:] = group if carried is None else [*group, carried]
            recent_jobs = len(group)
            recent_write_seconds = self._write_reported(group)
            if stopping:
                return

    def _write_reported(self, group: list[_Job]) -> float:
        """Write the group's jobs that were not cancelled, report it, return the seconds it took."""
        started = time.monotonic()
        written = [j for j in group if j.future.set_running_or_notify_cancel()]
        self._write_group(written)
        seconds = time.monotonic() - started
        if self.group_written is not None and written:
            self._report(len(written), sum(j.size for j in written), seconds)
        return seconds

    def _report(self, jobs: int, rows: int, seconds: float) -> None:
        callback = self.group_written
        try:
            if callback is not None:
                callback(jobs, rows, seconds)
        except Exception:
            # A broken observer must never stop the log; say so and carry on.
            log.exception("the log writer's group_written callback failed")

    def _gather(
        self, first: _Job, recent_jobs: int, recent_write_seconds: float
    ) -> tuple[list[_Job], Any, bool]:
        """The group to write with ``first``: every job already waiting and, when the
        previous group had several jobs, those still arriving: each within
        GATHER_GAP_SECONDS of the last, for at most half as long as the previous write
        took (and GATHER_MAX_SECONDS).

        Without the wait, the clients released by one commit come back a moment after
        the next group has started, and groups settle into halves (8 and 8 for 16
        clients), so each commit serves half as many rows and each client waits two
        commits. Tying the wait to the write time means it is spent only where commits
        are dear (an fsync on PostgreSQL), and a lone request never waits.
        """
        group = [first]
        rows = first.size
        deadline: float | None = None
        while rows < self._max_group_rows and not first.alone:
            try:
                job = self._queue.get_nowait()
            except queue.Empty:
                if recent_jobs <= 1:
                    break
                now = time.monotonic()
                if deadline is None:
                    deadline = now + min(
                        self.GATHER_MAX_SECONDS, self.GATHER_WRITE_SHARE * recent_write_seconds
                    )
                wait = min(self.GATHER_GAP_SECONDS, deadline - now)
                if wait <= 0:
                    break
                try:
                    job = self._queue.get(timeout=wait)
                except queue.Empty:
                    break
            if job is _STOP:
                return group, None, True
            if rows + job.size > self._max_group_rows or job.alone:
                return group, job, False  # a big batch gets a transaction of its own
            group.append(job)
            rows += job.size
        return group, None, False

    # Rows of other requests are written between a stream's transactions, each of at most this
    # many rows (a few milliseconds), so that they wait for at most one of them. PostgreSQL pays
    # an fsync per commit and lets other plans' requests commit meanwhile: larger pieces there.
    STREAM_ROWS_PER_TRANSACTION = {"sqlite": 512, "postgresql": 4096}
    STREAM_POLL_SECONDS = 0.002

    def _write_stream(self, job: _Job, in_flight: list[_Job]) -> bool:
        """A LogStream: each chunk in its own transaction, other jobs between chunks, then the
        batch made visible in one step. Returns True if a stop was asked for meanwhile."""
        stream = job.batch
        assert isinstance(stream, LogStream)
        deferred: list[Any] = []
        stopping = False
        self._streaming = True
        try:
            self._batch_state(stream, STAGED, None, opening=True)
            step = self.STREAM_ROWS_PER_TRANSACTION.get(self._dialect, 1024)
            ids: list[str] = []
            members: list[str] = []
            bodies: list[str] = []
            while True:
                # Chunks are gathered up to a piece; a partial piece is written when no more
                # rows are waiting, so the stream never sits on rows it could commit.
                chunk = stream.next_chunk(0.0 if ids else self.STREAM_POLL_SECONDS)
                if isinstance(chunk, LogBatch):
                    ids += chunk.allocation_ids
                    members += chunk.member_ids
                    bodies += chunk.bodies
                    if len(ids) < step:
                        continue
                while ids and (len(ids) >= step or not isinstance(chunk, LogBatch)):
                    piece = LogBatch(
                        stream.plan_id, stream.mix_version, stream.created_at, ids[:step], members[:step],
                        bodies[:step], batch_id=stream.batch_id,
                    )
                    del ids[:step], members[:step], bodies[:step]
                    started = time.monotonic()
                    self._write_retrying([_Job(piece, len(piece.allocation_ids), Future())])
                    if self.group_written is not None:
                        self._report(1, len(piece.allocation_ids), time.monotonic() - started)
                    stopping = self._serve_waiting(deferred, in_flight) or stopping
                if isinstance(chunk, Finished):
                    break
                if chunk is None:
                    stopping = self._serve_waiting(deferred, in_flight) or stopping
            self._batch_state(stream, VISIBLE, chunk.completes)
        except BaseException as error:
            try:
                self._batch_state(stream, ABANDONED, None)
            except Exception:
                pass  # the rows stay invisible either way (their batch is not visible)
            job.future.set_exception(error)
        else:
            job.future.set_result(None)
        finally:
            self._streaming = False
            if self._checkpointer is not None:
                self._checkpointer.committed(stream.size)
        for waiting in deferred:
            self._queue.put(waiting)  # later streams, and a stop, keep their turn
        return stopping and not deferred

    def _serve_waiting(self, deferred: list[Any], in_flight: list[_Job]) -> bool:
        """Write every non-stream job already waiting, as one group; True if a stop came."""
        group: list[_Job] = []
        stopping = False
        while True:
            try:
                waiting = self._queue.get_nowait()
            except queue.Empty:
                break
            if waiting is _STOP:
                stopping = True
                deferred.append(waiting)
            elif waiting.alone:
                deferred.append(waiting)
            else:
                group.append(waiting)
        if group:
            in_flight.extend(group)
            self._write_reported(group)
            del in_flight[1:]
        return stopping

    def _batch_state(
        self, stream: LogStream, state: str, completes: IdempotencyCompletion | None, *, opening: bool = False
    ) -> None:
        """Record a stream's batch (opening) or move it to `state`, in one transaction."""
        dbapi = self._checkout().driver_connection
        p = "?" if self._dialect == "sqlite" else "%s"
        held = self._sqlite_lock if self._dialect == "sqlite" else contextlib.nullcontext()
        try:
            with held:
                self._mark_batch(dbapi, stream, state, completes, p, opening)
        except BaseException:
            self._rollback(dbapi)
            raise

    def _mark_batch(
        self, dbapi: Any, stream: LogStream, state: str, completes: IdempotencyCompletion | None, p: str, opening: bool
    ) -> None:
        if self._dialect == "sqlite":
            dbapi.execute("BEGIN IMMEDIATE")
        cursor = dbapi.cursor()
        if opening:
            cursor.execute(
                f"INSERT INTO allocation_batches (batch_id, plan_id, rows, state, created_at) "
                f"VALUES ({p}, {p}, {p}, {p}, {p})",
                (stream.batch_id, stream.plan_id, stream.size, state, stream.created_at),
            )
        else:
            cursor.execute(
                f"UPDATE allocation_batches SET state = {p} WHERE batch_id = {p}", (state, stream.batch_id)
            )
        if completes is not None:
            # The lease check as for any answer: one whose reservation was taken over
            # leaves the batch invisible.
            complete(cursor, [completion_parameters(completes)], p)
        dbapi.commit()

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
                    job.future.set_result(job.outcome[0] if job.outcome else None)
            return
        for job in group:
            job.future.set_result(job.outcome[0] if job.outcome else None)

    def _write_retrying(self, jobs: list[_Job]) -> None:
        try:
            self._write(jobs)
        except DBAPIError as error:
            if not error.connection_invalidated or any(job.alone for job in jobs):
                raise  # rolled back; the connection is still good
            self._drop_connection(invalidate=True)
            self._write(jobs)

    def _write(self, jobs: list[_Job]) -> None:
        """One transaction for ``jobs``; driver errors come out as SQLAlchemy's classes
        (IntegrityError, OperationalError, ...), marked when the connection was lost."""
        dbapi = self._checkout().driver_connection
        driver_error = self._engine.dialect.loaded_dbapi.Error
        try:
            if self._dialect == "sqlite":
                with self._sqlite_lock:
                    self._write_sqlite(dbapi, jobs)
            else:
                self._write_postgresql(dbapi, jobs)
        except driver_error as error:
            self._known_heads.clear()
            lost = self._engine.dialect.is_disconnect(error, dbapi, None)
            self._rollback(dbapi)
            raise DBAPIError.instance(
                None, None, error, driver_error, connection_invalidated=lost
            ) from error
        except BaseException:
            self._known_heads.clear()
            self._rollback(dbapi)
            raise

    def _rollback(self, dbapi: Any) -> None:
        try:
            dbapi.rollback()
        except Exception:
            self._drop_connection(invalidate=True)

    def _checkout(self) -> Any:
        if self._connection is None:
            driver_error = self._engine.dialect.loaded_dbapi.Error
            refused = self._refused
            if refused is not None and time.monotonic() < refused[0]:
                # Connected and failed a moment ago: the jobs waiting now fail at once instead of
                # each trying (and, with a server that does not answer, waiting out the timeout).
                raise DBAPIError.instance(
                    None, None, refused[1], driver_error, connection_invalidated=True
                ) from refused[1]
            try:
                self._connection = self._engine.raw_connection()
            except driver_error as error:
                self._refused = (time.monotonic() + self.RECONNECT_PAUSE_SECONDS, error)
                # The pool hands out the driver's own error here; callers tell an unreachable
                # database by SQLAlchemy's classes, as everywhere else.
                raise DBAPIError.instance(
                    None, None, error, driver_error, connection_invalidated=True
                ) from error
            self._refused = None
            if self._dialect == "sqlite":
                sqlite = self._connection.driver_connection
                sqlite.execute(f"PRAGMA cache_size=-{_SQLITE_WRITER_CACHE_KIB}")
                sqlite.execute("PRAGMA wal_autocheckpoint=0")  # see wal_checkpoints.py
        return self._connection

    def _drop_connection(self, *, invalidate: bool) -> None:
        self._known_heads.clear()
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

    def _key_operations(self, cursor: Any, jobs: list[_Job], placeholder: str) -> None:
        for job in jobs:
            if not job.logs:
                job.outcome[:] = [run_key_operation(cursor, job.batch, placeholder)]  # type: ignore[arg-type]
        now = time.time()
        if now - self._last_purge > _PURGE_EVERY_SECONDS:
            purge(cursor, int(now), placeholder)
            self._last_purge = now

    def _write_sqlite(self, dbapi: Any, jobs: list[_Job]) -> None:
        dbapi.execute("BEGIN IMMEDIATE")
        self._key_operations(dbapi.cursor(), jobs, "?")
        plan_ids = sorted({job.batch.plan_id for job in jobs if job.logs})
        heads: dict[str, tuple[int, str]] = {}
        for plan_id in plan_ids:
            found = dbapi.execute(
                "SELECT last_seq, last_hash FROM chain_heads WHERE plan_id = ?", (plan_id,)
            ).fetchone()
            heads[plan_id] = (found[0], found[1]) if found is not None else (0, GENESIS_HASH)
        chains = _Chains(heads)
        dbapi.executemany(
            f"INSERT INTO allocations ({_COLUMNS}) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            chains.rows(jobs),
        )
        dbapi.executemany(
            "INSERT INTO chain_heads (plan_id, last_seq, last_hash) VALUES (?, ?, ?) "
            "ON CONFLICT (plan_id) DO UPDATE "
            "SET last_seq = excluded.last_seq, last_hash = excluded.last_hash",
            [(plan_id, seq, last) for plan_id, (seq, last) in chains.heads.items()],
        )
        complete(dbapi.cursor(), _completions(jobs), "?")
        dbapi.commit()
        if self._checkpointer is not None and not self._streaming:
            self._checkpointer.committed(sum(job.size for job in jobs))

    def _write_postgresql(self, dbapi: Any, jobs: list[_Job]) -> None:
        if self._append_at_known_heads(dbapi, jobs):
            return
        plan_ids = sorted({job.batch.plan_id for job in jobs if job.logs})
        with dbapi.cursor() as cursor:
            self._key_operations(cursor, jobs, "%s")
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
            move_heads = (
                "UPDATE chain_heads SET last_seq = %s, last_hash = %s WHERE plan_id = %s"
            )
            # A stream's pieces always go by COPY: a pipelined executemany of a thousand rows
            # took ~35 ms a piece where COPY takes about two thirds of that.
            streamed = any(isinstance(job.batch, LogBatch) and job.batch.batch_id for job in jobs)
            if streamed or sum(job.size for job in jobs) >= _COPY_MIN_ROWS:
                with cursor.copy(f"COPY allocations ({_COLUMNS}) FROM STDIN") as copy:
                    for row in chains.rows(jobs):
                        copy.write_row(row)
                cursor.executemany(move_heads, _head_rows(chains))
                complete(cursor, _completions(jobs), "%s")
                dbapi.commit()
                self._known_heads.update(chains.heads)
                return
            rows = list(chains.rows(jobs))
            # Before the pipeline, which gives no row counts: an answer whose reservation was
            # taken over must fail its transaction (one round trip per keyed request).
            complete(cursor, _completions(jobs), "%s")
            # Insert, head update and COMMIT in one round trip (plus the lock's): this
            # path serves the small groups, where round trips are most of the time.
            with dbapi.pipeline():
                cursor.executemany(
                    f"INSERT INTO allocations ({_COLUMNS}) "
                    "VALUES (%s, %s, %s, %s, %s, %s, %s, %s, %s, %s)",
                    rows,
                )
                cursor.executemany(move_heads, _head_rows(chains))
                dbapi.commit()
            self._known_heads.update(chains.heads)

    def _append_at_known_heads(self, dbapi: Any, jobs: list[_Job]) -> bool:
        """Write a group of plain log rows in one round trip when this writer knows every plan's
        head (it committed it last); False, with nothing written, when it may not: a group with
        key operations or Idempotency-Key answers (their lease checks need the ordinary path),
        large groups and stream pieces (COPY), a plan not written since the connection was made,
        a head moved by someone else meanwhile."""
        if not self._known_heads or time.time() - self._last_purge > _PURGE_EVERY_SECONDS:
            return False
        rows_total = 0
        for job in jobs:
            batch = job.batch
            if not isinstance(batch, LogBatch) or batch.batch_id or batch.completion() is not None:
                return False
            if batch.plan_id not in self._known_heads:
                return False
            rows_total += job.size
        if rows_total >= _COPY_MIN_ROWS:
            return False
        plan_ids = sorted({job.batch.plan_id for job in jobs})
        known = {plan_id: self._known_heads[plan_id] for plan_id in plan_ids}
        chains = _Chains(dict(known))
        columns: list[list[Any]] = [[] for _ in range(10)]
        for row in chains.rows(jobs):
            for column, value in zip(columns, row, strict=True):
                column.append(value)
        new_heads = [chains.heads[p] for p in plan_ids]
        parameters = (
            plan_ids, [known[p][0] for p in plan_ids], [known[p][1] for p in plan_ids], len(plan_ids),
            *columns,
            plan_ids, [h[0] for h in new_heads], [h[1] for h in new_heads],
        )
        dbapi.autocommit = True
        try:
            with dbapi.cursor() as cursor:
                cursor.execute(_APPEND_AT_KNOWN_HEADS, parameters)
                applied, inserted, moved = cursor.fetchone()
        finally:
            dbapi.autocommit = False
        if not applied:
            for plan_id in plan_ids:
                self._known_heads.pop(plan_id, None)
            return False
        if inserted != rows_total or moved != len(plan_ids):
            # Cannot happen with the statement above (all or nothing); if it ever did, the chain
            # would need looking at, not a silent retry.
            raise RuntimeError(f"known-heads append wrote {inserted} rows and {moved} heads of {rows_total}, {len(plan_ids)}")
        self._known_heads.update(chains.heads)
        return True

    @staticmethod
    def _lock_heads_postgresql(cursor: Any, plan_ids: list[str]) -> dict[str, tuple[int, str]]:
        cursor.execute(
            "SELECT plan_id, last_seq, last_hash FROM chain_heads "
            "WHERE plan_id = ANY(%s) ORDER BY plan_id FOR UPDATE",
            (plan_ids,),
        )
        return {plan_id: (seq, last) for plan_id, seq, last in cursor.fetchall()}
