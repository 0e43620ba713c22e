"""The group-commit ChainWriter: concurrency, ordering, failure isolation, shutdown."""

from __future__ import annotations

import threading
import time
from concurrent.futures import Future, ThreadPoolExecutor, wait
from pathlib import Path
from typing import Any

import orjson
import pytest
from sqlalchemy import text
from sqlalchemy.exc import DBAPIError, IntegrityError

from service.store import ChainWriter, Database, LogBatch, insert_mix, insert_plan, verify_chain
from tests.store.conftest import (
    CREATED_AT,
    MIX_VERSION,
    AppendRows,
    allocation_body,
    logged_rows,
)


def batch(plan_id: str, allocation_ids: list[str], member_id: str = "m-ana") -> LogBatch:
    return LogBatch(
        plan_id=plan_id,
        mix_version=MIX_VERSION,
        created_at=CREATED_AT,
        allocation_ids=allocation_ids,
        member_ids=[member_id] * len(allocation_ids),
        bodies=[allocation_body(plan_id, a, member_id) for a in allocation_ids],
    )


def logged_ids(database: Database, plan_id: str) -> list[tuple[int, str]]:
    return [(row.seq, row.allocation_id) for row in logged_rows(database, plan_id)]


def test_sixteen_threads_of_single_appends(database: Database, plan_id: str) -> None:
    threads, per_thread = 16, 50
    start = threading.Barrier(threads)

    def client(t: int) -> None:
        start.wait()
        for i in range(per_thread):
            database.writer.append(batch(plan_id, [f"{plan_id}-t{t}-{i}"]))

    with ThreadPoolExecutor(threads) as pool:
        for done in [pool.submit(client, t) for t in range(threads)]:
            done.result()

    rows = logged_ids(database, plan_id)
    assert [seq for seq, _ in rows] == list(range(1, threads * per_thread + 1))
    assert len({a for _, a in rows}) == threads * per_thread
    report = verify_chain(database, plan_id)
    assert report.ok and report.checked == threads * per_thread
    # Each client's own appends keep their order in the chain.
    for t in range(threads):
        mine = [a for _, a in rows if a.startswith(f"{plan_id}-t{t}-")]
        assert mine == [f"{plan_id}-t{t}-{i}" for i in range(per_thread)]


def test_large_batch_in_one_go(database: Database, plan_id: str) -> None:
    n = 5_000  # above the PostgreSQL COPY threshold
    ids = [f"{plan_id}-{i}" for i in range(n)]
    database.writer.append(batch(plan_id, ids))
    assert logged_ids(database, plan_id) == list(enumerate(ids, start=1))
    assert verify_chain(database, plan_id).ok


def test_one_bad_job_fails_alone(database: Database, plan_id: str) -> None:
    futures: list[Future[None]] = []
    for i in range(20):
        futures.append(database.writer.submit(batch(plan_id, [f"{plan_id}-early-{i}"])))
    unknown_plan = database.writer.submit(batch(plan_id + "-missing", [f"{plan_id}-orphan"]))
    duplicate = database.writer.submit(batch(plan_id, [f"{plan_id}-early-0"]))
    for i in range(20):
        futures.append(database.writer.submit(batch(plan_id, [f"{plan_id}-late-{i}"])))

    wait([*futures, unknown_plan, duplicate])
    assert all(f.exception() is None for f in futures)
    with pytest.raises(IntegrityError):
        unknown_plan.result()
    with pytest.raises(IntegrityError):
        duplicate.result()
    assert [seq for seq, _ in logged_ids(database, plan_id)] == list(range(1, 41))
    assert verify_chain(database, plan_id).ok


def test_groups_keep_submission_order_and_split_big_batches(
    database: Database, plan_id: str
) -> None:
    writer = ChainWriter(database.engine, max_group_rows=10)
    writer.start()
    try:
        sizes = [4, 4, 25, 4, 1, 9, 3]
        submitted: list[list[str]] = [
            [f"{plan_id}-b{b}-{i}" for i in range(size)] for b, size in enumerate(sizes)
        ]
        futures = [writer.submit(batch(plan_id, ids)) for ids in submitted]
        for future in futures:
            future.result()
    finally:
        writer.close()
    expected = [a for ids in submitted for a in ids]
    assert logged_ids(database, plan_id) == list(enumerate(expected, start=1))
    assert verify_chain(database, plan_id).ok


def test_two_writers_on_one_database_share_one_chain(db_url: str, plan_id: str) -> None:
    # Two Database objects stand for two replicas behind a load balancer.
    replicas = [Database(db_url), Database(db_url)]
    for replica in replicas:
        replica.start()
    try:
        def client(r: int) -> None:
            for i in range(40):
                replicas[r].writer.append(batch(plan_id, [f"{plan_id}-r{r}-{i}"]))

        with ThreadPoolExecutor(4) as pool:
            for done in [pool.submit(client, r % 2) for r in range(2)]:
                done.result()
        assert [seq for seq, _ in logged_ids(replicas[0], plan_id)] == list(range(1, 81))
        assert verify_chain(replicas[1], plan_id).ok
    finally:
        for replica in replicas:
            replica.close()


def test_a_head_moved_by_another_writer_is_not_written_over(db_url: str, plan_id: str) -> None:
    """PostgreSQL: a writer appends a small group in one statement hashed from the head it
    committed last, guarded by locking that head and checking it is still there. Two replicas
    taking turns move each other's head every time: each append must notice and go the
    ordinary way (read and lock the head), and the chain must come out whole."""
    if not db_url.startswith("postgresql"):
        pytest.skip("the one-statement append is PostgreSQL's")
    replicas = [Database(db_url), Database(db_url)]
    outcomes: list[bool] = []
    for replica in replicas:
        append_at_known_heads = replica.writer._append_at_known_heads

        def observed(dbapi: Any, jobs: Any, inner: Any = append_at_known_heads) -> bool:
            outcomes.append(inner(dbapi, jobs))
            return outcomes[-1]

        replica.writer._append_at_known_heads = observed  # type: ignore[method-assign]
        replica.start()
    try:
        for i in range(6):  # the same replica twice running: its head is still where it left it
            replicas[0].writer.append(batch(plan_id, [f"{plan_id}-own-{i}"]))
        assert outcomes.count(True) >= 4, outcomes
        outcomes.clear()
        for i in range(12):  # taking turns: each finds its head moved by the other
            replicas[(i + 1) % 2].writer.append(batch(plan_id, [f"{plan_id}-turn-{i}"]))
        assert outcomes and not any(outcomes), outcomes
        expected = [f"{plan_id}-own-{i}" for i in range(6)] + [f"{plan_id}-turn-{i}" for i in range(12)]
        assert logged_ids(replicas[0], plan_id) == list(enumerate(expected, start=1))
        assert verify_chain(replicas[1], plan_id).ok
    finally:
        for replica in replicas:
            replica.close()


def test_malformed_batches_are_refused_at_submit(database: Database, plan_id: str) -> None:
    good = batch(plan_id, [f"{plan_id}-1", f"{plan_id}-2"])
    with pytest.raises(ValueError, match="must match"):
        database.writer.submit(
            LogBatch(plan_id, MIX_VERSION, CREATED_AT, good.allocation_ids, ["m"], good.bodies)
        )
    with pytest.raises(ValueError, match="separator"):
        database.writer.submit(
            LogBatch(plan_id, MIX_VERSION, CREATED_AT, good.allocation_ids, ["m", "m\x1fx"],
                     good.bodies)
        )
    with pytest.raises(ValueError, match="created_at"):
        database.writer.submit(
            LogBatch(plan_id, MIX_VERSION, "", good.allocation_ids, ["m", "m"], good.bodies)
        )
    assert logged_ids(database, plan_id) == []


def test_empty_batch_resolves_without_writing(database: Database, plan_id: str) -> None:
    future = database.writer.submit(batch(plan_id, []))
    assert future.done() and future.result() is None
    assert logged_ids(database, plan_id) == []


def test_close_writes_what_was_submitted_then_refuses(db_url: str, plan_id: str) -> None:
    db = Database(db_url)
    db.start()
    futures = [db.writer.submit(batch(plan_id, [f"{plan_id}-{i}"])) for i in range(30)]
    db.writer.close()
    assert all(f.done() and f.exception() is None for f in futures)
    with pytest.raises(RuntimeError, match="not running"):
        db.writer.submit(batch(plan_id, [f"{plan_id}-late"]))
    db.start()  # a stopped writer can be started again
    db.writer.append(batch(plan_id, [f"{plan_id}-again"]))
    db.close()
    db.close()  # idempotent
    check = Database(db_url)
    try:
        assert len(logged_ids(check, plan_id)) == 31
        assert verify_chain(check, plan_id).ok
    finally:
        check.close()


def test_writer_survives_a_lost_connection(
    database: Database, plan_id: str, append_rows: AppendRows
) -> None:
    if database.dialect != "postgresql":
        pytest.skip("needs a server that can drop our connection")
    append_rows(plan_id, 2)
    with database.engine.connect() as conn:
        killed: Any = conn.execute(
            text(
                "SELECT count(pg_terminate_backend(pid)) FROM pg_stat_activity "
                "WHERE datname = current_database() AND pid <> pg_backend_pid()"
            )
        ).scalar_one()
    assert killed >= 1  # at least the writer's own connection
    append_rows(plan_id, 3)
    assert [seq for seq, _ in logged_ids(database, plan_id)] == [1, 2, 3, 4, 5]
    assert verify_chain(database, plan_id).ok


def test_sqlite_wal_is_checkpointed_in_the_background(database: Database, plan_id: str) -> None:
    if database.dialect != "sqlite":
        pytest.skip("SQLite's write-ahead log only")
    path = Path(str(database.engine.url.database))
    before = path.stat().st_size
    database.writer.append(batch(plan_id, [f"{plan_id}-{i}" for i in range(3_000)]))
    # The writer commits to the WAL only; the main file grows once a checkpoint copies
    # the pages over, which here can only be the background checkpointer's doing.
    deadline = time.monotonic() + 5
    while path.stat().st_size == before and time.monotonic() < deadline:
        time.sleep(0.02)
    assert path.stat().st_size > before


def test_sqlite_writes_beside_the_log_leave_checkpoints_to_the_background(database: Database, plan_id: str) -> None:
    # A large write in Database.writing (a 2,000-asset mix is several MB) must not checkpoint
    # inside its COMMIT, which holds the write lock the log writer waits for: right after it the
    # main file is unchanged, and the background checkpointer copies the pages over soon after.
    if database.dialect != "sqlite":
        pytest.skip("SQLite's write-ahead log only")
    path = Path(str(database.engine.url.database))
    time.sleep(1.5)  # the plan's own pages checkpointed at the next idle tick
    before = path.stat().st_size
    big = orjson.dumps({"filler": "x" * 6_000_000}).decode()  # 1,500 pages: over SQLite's 1,000
    with database.writing() as s:
        assert s.execute(text("PRAGMA wal_autocheckpoint")).scalar() == 0
        insert_mix(s, plan_id=plan_id, version="big", content_hash="0" * 64, inputs=big, solved="{}")
    assert path.stat().st_size == before
    deadline = time.monotonic() + 5  # the pages may be copied over in more than one step
    while path.stat().st_size <= before + 5_000_000 and time.monotonic() < deadline:
        time.sleep(0.02)
    assert path.stat().st_size > before + 5_000_000


def test_sqlite_writes_without_the_writer_keep_automatic_checkpoints(tmp_path: Path) -> None:
    db = Database(f"sqlite:///{tmp_path / 'alone.db'}")
    try:
        db.upgrade()
        with db.writing() as s:
            assert s.execute(text("PRAGMA wal_autocheckpoint")).scalar() == 1000  # SQLite's default
    finally:
        db.close()


def test_writer_out_of_reach_fails_jobs_fast_and_reconnects(tmp_path: Path) -> None:
    # A database path that cannot be opened: every job fails with SQLAlchemy's error of an
    # unreachable database, one connect attempt serves the jobs of the next half second, and
    # the writer connects again once the file is there.
    path = tmp_path / "gone.db"
    path.mkdir()
    db = Database(f"sqlite:///{path}")
    attempts = []
    connect = db.engine.raw_connection

    def counted() -> Any:
        attempts.append(time.monotonic())
        return connect()

    db.engine.raw_connection = counted  # type: ignore[method-assign]
    db.start()
    try:
        for i in range(5):
            with pytest.raises(DBAPIError) as info:
                db.writer.append(batch("p", [f"x-{i}"]))
            assert info.value.connection_invalidated
        assert len(attempts) == 1
        time.sleep(ChainWriter.RECONNECT_PAUSE_SECONDS + 0.05)
        path.rmdir()
        db.upgrade()
        with db.writing() as s:
            insert_plan(s, plan_id="p", name="P", currency="EUR", policy={})
        db.writer.append(batch("p", ["x-ok"]))
        assert len(attempts) == 2
        assert verify_chain(db, "p").ok
    finally:
        db.close()
