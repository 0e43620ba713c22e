"""What the log writer reports for metrics: each group's jobs, rows and seconds, and its queue depth.
The store layer knows no metrics library; the api layer passes a callback (tests/test_layers.py)."""

from __future__ import annotations

import logging
import threading
import time

import pytest

from service.store import Database, LogBatch
from tests.store.conftest import CREATED_AT, MIX_VERSION, allocation_body, logged_rows


def batch(plan_id: str, allocation_ids: list[str]) -> LogBatch:
    return LogBatch(
        plan_id, MIX_VERSION, CREATED_AT, allocation_ids, ["m-ana"] * len(allocation_ids),
        [allocation_body(plan_id, a, "m-ana") for a in allocation_ids],
    )


def test_every_group_is_reported_with_its_rows(database: Database, plan_id: str) -> None:
    reports: list[tuple[int, int, float]] = []
    lock = threading.Lock()

    def record(jobs: int, rows: int, seconds: float) -> None:
        with lock:
            reports.append((jobs, rows, seconds))

    database.writer.group_written = record
    sizes = [1, 5, 1, 250]
    for i, size in enumerate(sizes):
        database.writer.append(batch(plan_id, [f"al_r{i}_{j}" for j in range(size)]))
    # append() waits for each commit, so every group holds exactly one of them; the report
    # follows the commit, so give the last one a moment.
    deadline = time.monotonic() + 5
    while len(reports) < len(sizes) and time.monotonic() < deadline:
        time.sleep(0.01)
    assert [(jobs, rows) for jobs, rows, _ in reports] == [(1, s) for s in sizes]
    assert all(seconds > 0 for _, _, seconds in reports)
    assert database.writer.queue_depth() == 0


def test_a_failing_observer_does_not_stop_the_log(database: Database, plan_id: str, caplog: pytest.LogCaptureFixture) -> None:
    def broken(jobs: int, rows: int, seconds: float) -> None:
        raise RuntimeError("observer broke")

    database.writer.group_written = broken
    def failures() -> int:
        return sum("group_written callback failed" in r.getMessage() for r in caplog.records)

    with caplog.at_level(logging.ERROR, logger="mixline.writer"):
        database.writer.append(batch(plan_id, ["al_x1"]))
        database.writer.append(batch(plan_id, ["al_x2"]))
        # The report follows the commit that resolved append(): give the last one a moment.
        deadline = time.monotonic() + 5
        while failures() < 2 and time.monotonic() < deadline:
            time.sleep(0.01)
    assert database.writer.running
    assert failures() == 2
    assert [row.allocation_id for row in logged_rows(database, plan_id)] == ["al_x1", "al_x2"]
