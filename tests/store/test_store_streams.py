"""LogStream: a large batch committed chunk by chunk, visible in one step, invisible if it fails."""

from __future__ import annotations

import queue
import threading
from typing import Any

import pytest
from sqlalchemy import text

from service.store import Database, Finished, LogStream, get_allocation, verify_chain
from tests.store.conftest import CREATED_AT, MIX_VERSION, allocation_body

from .test_store_writer import batch


class Producer:
    """Chunks handed to a LogStream from another thread, as the batch process's pipe hands them."""

    def __init__(self) -> None:
        self._chunks: queue.SimpleQueue[Any] = queue.SimpleQueue()

    def put(self, ids: list[str], members: list[str], bodies: list[str]) -> None:
        self._chunks.put((ids, members, bodies))

    def finish(self) -> None:
        self._chunks.put(Finished(None))

    def fail(self, error: BaseException) -> None:
        self._chunks.put(error)

    def pull(self, timeout: float) -> Any:
        try:
            got = self._chunks.get(timeout=timeout)
        except queue.Empty:
            return None
        if isinstance(got, BaseException):
            raise got
        return got


def chunk(plan_id: str, start: int, n: int) -> tuple[list[str], list[str], list[str]]:
    ids = [f"{plan_id}-s{i}" for i in range(start, start + n)]
    return ids, ["m-ana"] * n, [allocation_body(plan_id, a, "m-ana") for a in ids]


def visible(database: Database, plan_id: str, allocation_id: str) -> bool:
    with database.reading() as s:
        return get_allocation(s, plan_id, allocation_id) is not None


def batch_state(database: Database, batch_id: str) -> str:
    with database.reading() as s:
        return str(s.execute(text("SELECT state FROM allocation_batches WHERE batch_id = :b"), {"b": batch_id}).scalar_one())


def test_rows_appear_together_and_singles_go_between_chunks(database: Database, plan_id: str) -> None:
    source = Producer()
    stream = LogStream(plan_id, MIX_VERSION, CREATED_AT, 30, pull=source.pull)
    done = database.writer.submit_stream(stream)
    source.put(*chunk(plan_id, 0, 10))
    # A single written while the stream is open commits at once: it does not wait for the batch.
    database.writer.submit(batch(plan_id, [f"{plan_id}-single"])).result(timeout=10)
    assert visible(database, plan_id, f"{plan_id}-single")
    assert not visible(database, plan_id, f"{plan_id}-s0")  # staged, committed, not yet visible
    source.put(*chunk(plan_id, 10, 20))
    source.finish()
    done.result(timeout=10)
    assert all(visible(database, plan_id, f"{plan_id}-s{i}") for i in range(30))
    assert batch_state(database, stream.batch_id) == "visible"
    report = verify_chain(database, plan_id)
    assert report.ok and report.checked == 31  # one chain: the single sits between the chunks


def test_a_failed_stream_leaves_nothing_visible(database: Database, plan_id: str) -> None:
    source = Producer()
    stream = LogStream(plan_id, MIX_VERSION, CREATED_AT, 30, pull=source.pull)
    done = database.writer.submit_stream(stream)
    source.put(*chunk(plan_id, 0, 10))
    source.fail(RuntimeError("the producer gave up"))
    with pytest.raises(RuntimeError, match="gave up"):
        done.result(timeout=10)
    assert not any(visible(database, plan_id, f"{plan_id}-s{i}") for i in range(10))
    assert batch_state(database, stream.batch_id) == "abandoned"
    # The chain keeps what was committed (it never forgets) and still verifies.
    assert verify_chain(database, plan_id).ok
    database.writer.append(batch(plan_id, [f"{plan_id}-after"]))  # the writer goes on
    assert visible(database, plan_id, f"{plan_id}-after")


def test_a_stream_that_sends_too_many_rows_fails(database: Database, plan_id: str) -> None:
    source = Producer()
    stream = LogStream(plan_id, MIX_VERSION, CREATED_AT, 5, pull=source.pull)
    done = database.writer.submit_stream(stream)
    threading.Thread(target=lambda: (source.put(*chunk(plan_id, 0, 6)), source.finish())).start()
    with pytest.raises(ValueError, match="announced 5 rows"):
        done.result(timeout=10)
    assert batch_state(database, stream.batch_id) == "abandoned"


def test_a_quiet_producer_abandons_the_stream(database: Database, plan_id: str) -> None:
    source = Producer()
    stream = LogStream(plan_id, MIX_VERSION, CREATED_AT, 30, pull=source.pull, wait_seconds=0.2)
    done = database.writer.submit_stream(stream)
    source.put(*chunk(plan_id, 0, 10))  # then nothing more: the batch process hung
    with pytest.raises(TimeoutError, match="no rows for 0.2 s"):
        done.result(timeout=10)
    assert batch_state(database, stream.batch_id) == "abandoned"
    assert not visible(database, plan_id, f"{plan_id}-s0")
