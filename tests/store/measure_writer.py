"""Throughput of the ChainWriter (a measurement, not a test; pytest does not collect it).

    .venv/bin/python -m tests.store.measure_writer [sqlite|postgres ...] [--rows 280000]

For each dialect: 16 threads each appending single-row batches (rows/s, append
latency p50/p99), then one large batch of ~400-byte JSON bodies (seconds from
submit to commit). SQLite uses a fresh file under /tmp; PostgreSQL a throwaway
database created from MIXLINE_TEST_POSTGRES_URL (dropped afterwards).
"""

from __future__ import annotations

import argparse
import os
import secrets
import statistics
import tempfile
import threading
import time
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import orjson

from service.store import Database, LogBatch, insert_plan, verify_chain
from tests.conftest import DEFAULT_POSTGRES_URL, POSTGRES_URL_ENV, _create_database, _drop_database

MIX_VERSION = "2026-q4"


def body(plan_id: str, allocation_id: str, member_id: str) -> str:
    """An invented allocation answer, about 400 bytes of canonical JSON."""
    return orjson.dumps(
        {
            "allocation_id": allocation_id,
            "amounts": {"risky": "61234.56", "safe": "40821.04"},
            "by_asset": {"GLEQ": "30617.28", "EMEQ": "12246.91", "GOVB": "18370.37"},
            "created_at": "2026-12-01T21:42:52.123456Z",
            "expected_return": 0.0571,
            "limited_by": None,
            "member_id": member_id,
            "mix_version": MIX_VERSION,
            "plan_id": plan_id,
            "risky_fraction": 0.6,
            "safe_fraction": 0.4,
            "unconstrained_risky_fraction": 0.6132,
            "volatility": 0.0934,
        },
        option=orjson.OPT_SORT_KEYS,
    ).decode()


def now_text() -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%S.000000Z", time.gmtime())


@contextmanager
def database_for(dialect: str) -> Iterator[Database]:
    if dialect == "sqlite":
        with tempfile.TemporaryDirectory() as folder:
            db = Database(f"sqlite:///{Path(folder) / 'measure.db'}")
            db.upgrade()
            db.start()
            try:
                yield db
            finally:
                db.close()
        return
    admin = os.environ.get(POSTGRES_URL_ENV, DEFAULT_POSTGRES_URL)
    url = _create_database(admin)
    try:
        db = Database(url)
        db.upgrade()
        db.start()
        try:
            yield db
        finally:
            db.close()
    finally:
        _drop_database(admin, url)


def new_plan(db: Database) -> str:
    plan_id = f"plan-{secrets.token_hex(4)}"
    with db.writing() as s:
        insert_plan(s, plan_id=plan_id, name="Measure", currency="EUR", policy={})
    return plan_id


def concurrent_singles(db: Database, threads: int, per_thread: int) -> None:
    plan_id = new_plan(db)
    latencies: list[list[float]] = [[] for _ in range(threads)]
    barrier = threading.Barrier(threads + 1)

    def client(t: int) -> None:
        barrier.wait()
        for _i in range(per_thread):
            allocation_id = str(uuid.uuid4())
            batch = LogBatch(plan_id, MIX_VERSION, now_text(), [allocation_id], [f"m{t}"],
                             [body(plan_id, allocation_id, f"m{t}")])
            started = time.perf_counter()
            db.writer.append(batch)
            latencies[t].append(time.perf_counter() - started)

    workers = [threading.Thread(target=client, args=(t,)) for t in range(threads)]
    for worker in workers:
        worker.start()
    barrier.wait()
    started = time.perf_counter()
    for worker in workers:
        worker.join()
    elapsed = time.perf_counter() - started
    every = sorted(x for per in latencies for x in per)
    p50 = statistics.median(every) * 1000
    p99 = every[int(0.99 * (len(every) - 1))] * 1000
    rows = threads * per_thread
    assert verify_chain(db, plan_id).ok
    print(f"  {threads} threads x {per_thread} single appends: {rows / elapsed:,.0f} rows/s, "
          f"append p50 {p50:.2f} ms, p99 {p99:.2f} ms, max {every[-1] * 1000:.1f} ms")


def one_big_batch(db: Database, rows: int) -> None:
    plan_id = new_plan(db)
    ids = [str(uuid.uuid4()) for _ in range(rows)]  # random, like the API's ids
    members = [f"m{i:07d}" for i in range(rows)]
    bodies = [body(plan_id, a, m) for a, m in zip(ids, members, strict=False)]
    mean_body = sum(map(len, bodies)) / rows
    batch = LogBatch(plan_id, MIX_VERSION, now_text(), ids, members, bodies)
    started = time.perf_counter()
    db.writer.append(batch)
    elapsed = time.perf_counter() - started
    verify_started = time.perf_counter()
    report = verify_chain(db, plan_id)
    verify_elapsed = time.perf_counter() - verify_started
    assert report.ok and report.checked == rows
    print(f"  one batch of {rows:,} rows (bodies {mean_body:.0f} B): {elapsed:.3f} s "
          f"({rows / elapsed:,.0f} rows/s); verify_chain {verify_elapsed:.3f} s")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("dialects", nargs="*", default=["sqlite", "postgres"])
    parser.add_argument("--rows", type=int, default=280_000)
    parser.add_argument("--threads", type=int, default=16)
    parser.add_argument("--per-thread", type=int, default=300)
    args = parser.parse_args()
    for dialect in args.dialects:
        print(dialect)
        with database_for(dialect) as db:
            concurrent_singles(db, args.threads, args.per_thread)
            one_big_batch(db, args.rows)


if __name__ == "__main__":
    main()
