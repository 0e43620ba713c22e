"""What one process keeps between requests: settings, the database, and caches of immutable things.

Plans (their name, currency and policy), keys and published mixes never change once written, so a
replica may keep them for its lifetime. The active version can change on any replica: pages read
it live, and allocations use what this process read at most ``active_version_ttl_seconds`` ago
(an activation here is seen here at once), so every replica follows an activation within that.
Keys can be revoked or expire, so what a replica knows of one is re-read after a few seconds
(auth.py).
"""

from __future__ import annotations

import asyncio
import gc
import logging
import multiprocessing
import os
import threading
import time
from concurrent.futures import Future, ProcessPoolExecutor, ThreadPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

import orjson
from sqlalchemy.exc import SQLAlchemyError
from starlette.concurrency import run_in_threadpool

from service.allocation import (
    MixState,
    MixView,
    Policy,
    plan_activation,
    plan_retirement,
    require_in_force,
    state_of,
)
from service.numerics import Frontier, MixInputs, SolvedMix, efficient_frontier
from service.settings import Settings
from service.store import (
    Conflict,
    Database,
    HeadSigner,
    KeyRecord,
    MixLifecycle,
    PlanRecord,
    get_frontier,
    get_key,
    get_mix,
    get_plan,
    insert_frontier,
    insert_mix,
    json_text,
    list_lifecycle,
    lock_lifecycle,
    record_activation,
    record_retirement,
)

from .access_log import AccessLog
from .auth import Caller, KeyRing
from .batch_process import BatchProcess
from .deciding import SinglesTogether
from .errors import ConflictError, NotFound
from .metrics import Metrics
from .publishing import (
    PUBLICATION_PROCESS_MIN_BYTES,
    NotReadHere,
    Publication,
    PublishLimits,
    Reading,
    read_here,
    read_publication,
    solve_here,
    solve_publication,
)
from .rate_limits import TokenBuckets


@dataclass(frozen=True)
class PlanView:
    plan_id: str
    name: str
    currency: str
    policy: Policy

    @classmethod
    def from_record(cls, record: PlanRecord) -> PlanView:
        return cls(record.plan_id, record.name, record.currency, Policy.from_document(record.policy))


log = logging.getLogger("mixline.mixes")


def keep_for_life() -> None:
    """Move what the process now holds out of the cyclic collector's generations.

    A published mix and its frontier stay cached for the process's life; a 2,000-asset mix is
    many containers, and every full collection walked them again: single allocations' p99 rose
    from 7 to 29 ms after four large publications (p50 unchanged), and back to 14 ms with this.
    Objects frozen are still freed when their last reference goes; only a reference cycle made
    just before a publication would outlive it."""
    gc.freeze()

#: Frontiers of at least this many assets are solved in a child process (smaller ones take a
#: few milliseconds: a process hop would cost more than the GIL they hold).
FRONTIER_PROCESS_MIN_ASSETS = 500
#: The child's niceness increment: solving a frontier is background work next to requests.
FRONTIER_PROCESS_NICE = 10


def frontier_with_text(inputs: MixInputs) -> tuple[Frontier, str]:
    """The exact frontier and the text it is stored as, made where it is solved: in the frontier
    process for a large mix, so that the serving process only unpickles and stores it."""
    found = efficient_frontier(inputs)
    return found, json_text(found.to_document())


class MixCatalog:
    """Published mixes: solved once at publish, stored, and rebuilt from the stored document.

    Publishing answers once the tangency and the minimum-variance portfolio are solved and
    stored; the exact frontier (the costliest part: hundreds of corner portfolios at 200 assets)
    is solved right after, off the request, once per content hash, and stored beside the mix. A
    frontier request that comes before it is ready waits for that one computation; a replica that
    finds it stored by another never computes it.
    """

    def __init__(self, database: Database, settings: Settings, metrics: Metrics) -> None:
        self._db = database
        self._metrics = metrics
        self._settings = settings
        self._views: dict[tuple[str, str], MixView] = {}
        self._published: dict[tuple[str, str], dict[str, Any]] = {}
        # The published inputs, kept as their canonical text until first read (a large mix's
        # inputs are 100,000 numbers: parsed on the request that wants them, not at publish).
        self._inputs: dict[tuple[str, str], dict[str, Any] | bytes] = {}
        # plan id -> (active version, monotonic time it was read)
        self._active: dict[str, tuple[str | None, float]] = {}
        self._solved_by_hash: dict[str, SolvedMix] = {}
        self._frontiers: dict[str, Frontier] = {}
        self._pending: dict[str, Future[Frontier]] = {}
        self._solver = ThreadPoolExecutor(max_workers=1, thread_name_prefix="mixline-frontier")
        # Large frontiers are solved in one child process (forked on first use, so it starts
        # with everything imported): the critical line is a loop of small numpy calls that
        # would hold the GIL for hundreds of milliseconds and delay every other request.
        self._process: ProcessPoolExecutor | None = None
        self._lock = threading.Lock()

    def close(self) -> None:
        self._solver.shutdown(wait=False, cancel_futures=False)
        if self._process is not None:
            self._process.shutdown(wait=False, cancel_futures=True)

    def _child(self) -> ProcessPoolExecutor | None:
        """The frontier process (forked on first use), or None where processes cannot fork."""
        if not hasattr(os, "fork"):
            return None
        with self._lock:
            if self._process is None:
                # Lower CPU priority: on a busy node the scheduler serves requests first.
                self._process = ProcessPoolExecutor(max_workers=1, mp_context=multiprocessing.get_context("fork"),
                                                    initializer=os.nice, initargs=(FRONTIER_PROCESS_NICE,))
            return self._process

    def _efficient_frontier(self, inputs: MixInputs) -> tuple[Frontier, str]:
        child = self._child() if inputs.n >= FRONTIER_PROCESS_MIN_ASSETS else None
        if child is None:
            return frontier_with_text(inputs)
        try:
            return child.submit(frontier_with_text, inputs).result()
        except (BrokenProcessPool, OSError):
            self._child_failed("solving the frontier in this process")
            return frontier_with_text(inputs)

    def frontier(self, plan_id: str, version: str) -> tuple[MixView, Frontier]:
        view = self.view(plan_id, version)
        known = self._frontiers.get(view.content_hash) or view.solved.frontier
        if known is not None:
            return view, known
        return view, self._frontier_soon(view.content_hash, view.solved.inputs).result()

    def _frontier_soon(self, digest: str, inputs: MixInputs) -> Future[Frontier]:
        with self._lock:
            pending = self._pending.get(digest)
            if pending is None:
                pending = self._pending[digest] = self._solver.submit(self._solve_frontier, digest, inputs)
            return pending

    def _solve_frontier(self, digest: str, inputs: MixInputs) -> Frontier:
        try:
            with self._db.reading() as s:
                stored = get_frontier(s, digest)
            if stored is not None:
                found = Frontier.from_document(stored, len(inputs.codes))
            else:
                found, text = self._efficient_frontier(inputs)
                # Stored next on the same worker: whoever waits for this frontier is answered
                # from memory without waiting for the database.
                try:
                    self._solver.submit(self._store_frontier, digest, text)
                except RuntimeError:  # shutting down: store it now
                    self._store_frontier(digest, text)
            with self._lock:
                self._frontiers[digest] = found
            keep_for_life()
            return found
        finally:
            with self._lock:
                self._pending.pop(digest, None)

    def _store_frontier(self, digest: str, text: str) -> None:
        try:
            with self._db.writing() as s:
                insert_frontier(s, content_hash=digest, document=text)
        except SQLAlchemyError:
            # Kept in memory all the same; a later replica solves it once more.
            log.warning("could not store the frontier of %s", digest, exc_info=True)

    def _remember(
        self, plan_id: str, version: str, digest: str, solved: SolvedMix, doc: dict[str, Any],
        inputs: dict[str, Any] | bytes,
    ) -> MixView:
        view = MixView.from_solved(version, digest, solved)
        with self._lock:
            self._views[(plan_id, version)] = view
            self._published[(plan_id, version)] = doc
            self._inputs[(plan_id, version)] = inputs
            self._solved_by_hash[digest] = solved
        return view

    def _load(self, plan_id: str, version: str) -> tuple[MixView, dict[str, Any]] | None:
        key = (plan_id, version)
        view = self._views.get(key)
        if view is not None:
            return view, self._published[key]
        with self._db.reading() as s:
            record = get_mix(s, plan_id, version)
        if record is None:
            return None
        solved = self._solved_by_hash.get(record.content_hash)
        if solved is None:
            solved = SolvedMix.from_document(record.solved["numerics"])
        doc = record.solved["published"]
        return self._remember(plan_id, version, record.content_hash, solved, doc, record.inputs), doc

    def view(self, plan_id: str, version: str) -> MixView:
        found = self._load(plan_id, version)
        if found is None:
            raise NotFound(f"mix version {version!r} not found in plan {plan_id!r}")
        return found[0]

    def published(self, plan_id: str, version: str) -> dict[str, Any]:
        found = self._load(plan_id, version)
        if found is None:
            raise NotFound(f"mix version {version!r} not found in plan {plan_id!r}")
        return found[1]

    def inputs(self, plan_id: str, version: str) -> dict[str, Any]:
        """The published assumptions as stored (the canonical form that was hashed)."""
        self.published(plan_id, version)
        inputs = self._inputs[(plan_id, version)]
        if isinstance(inputs, bytes):
            inputs = self._inputs[(plan_id, version)] = orjson.loads(inputs)
        return inputs

    # ---- the lifecycle -----------------------------------------------------------------------

    def active_version(self, plan_id: str, *, max_age: float | None = None) -> str | None:
        """The plan's active version, read live, or as read at most ``max_age`` seconds ago."""
        if max_age is not None:
            known = self._active.get(plan_id)
            if known is not None and time.monotonic() - known[1] <= max_age:
                return known[0]
        read_at = time.monotonic()
        with self._db.reading() as s:
            record = get_plan(s, plan_id)
        if record is None:
            raise NotFound(f"plan {plan_id!r} not found")
        self._active[plan_id] = (record.active_version, read_at)
        return record.active_version

    def age(self, plan_id: str, version: str) -> float | None:
        """Seconds since the active version was read, if ``version``'s mix is known too (None:
        ``view_in_force`` would read the database first whatever ``max_age``)."""
        known = self._active.get(plan_id)
        if known is None or (plan_id, version) not in self._views:
            return None
        return time.monotonic() - known[1]

    def view_in_force(self, plan_id: str, version: str, *, live: bool = False) -> MixView:
        """The mix an allocation may use: ``version`` if it is the active one, else 409; the active
        version as read within its time to live, or (``live``) read now."""
        max_age = None if live else self._settings.active_version_ttl_seconds
        require_in_force(version, self.active_version(plan_id, max_age=max_age))
        return self.view(plan_id, version)

    def lifecycle(self, plan_id: str) -> tuple[str | None, list[MixLifecycle]]:
        with self._db.reading() as s:
            record = get_plan(s, plan_id)
            if record is None:
                raise NotFound(f"plan {plan_id!r} not found")
            return record.active_version, list_lifecycle(s, plan_id)

    def activate(self, plan_id: str, version: str, key_id: str) -> tuple[str | None, MixLifecycle]:
        """Put ``version`` in force, retiring the one before; (the retired version, the new
        lifecycle of ``version``). Activating the active version again changes nothing."""
        with self._db.writing() as s:
            active, found = self._locked(s, plan_id, version)
            step = plan_activation(version, state_of(version, active_version=active, retired=found.retired_at is not None), active)
            if step.changes:
                record_activation(s, plan_id, version, retires=step.retires, key_id=key_id, at=datetime.now(UTC))
        self._active[plan_id] = (version, time.monotonic())
        return step.retires, self._entry(plan_id, version)

    def retire(self, plan_id: str, version: str, key_id: str) -> MixLifecycle:
        """Withdraw a version that is not in force, for good (409 for the active one)."""
        with self._db.writing() as s:
            active, found = self._locked(s, plan_id, version)
            state = state_of(version, active_version=active, retired=found.retired_at is not None)
            if plan_retirement(version, state, active):
                record_retirement(s, plan_id, version, key_id=key_id, at=datetime.now(UTC))
        return self._entry(plan_id, version)

    @staticmethod
    def _locked(s: Any, plan_id: str, version: str) -> tuple[str | None, MixLifecycle]:
        try:
            active, found = lock_lifecycle(s, plan_id, version)
        except LookupError:
            raise NotFound(f"plan {plan_id!r} not found") from None
        if found is None:
            raise NotFound(f"mix version {version!r} not found in plan {plan_id!r}")
        return active, found

    def _entry(self, plan_id: str, version: str) -> MixLifecycle:
        _, entries = self.lifecycle(plan_id)
        return next(e for e in entries if e.version == version)

    def state(self, plan_id: str, version: str) -> tuple[MixState, MixLifecycle]:
        """A version's state and lifecycle, read live."""
        active, entries = self.lifecycle(plan_id)
        for entry in entries:
            if entry.version == version:
                return state_of(version, active_version=active, retired=entry.retired_at is not None), entry
        raise NotFound(f"mix version {version!r} not found in plan {plan_id!r}")

    def publish(self, plan: PlanView, raw: bytes, published_by: str | None = None) -> tuple[bool, dict[str, Any]]:
        """(created, body) for a publish request's body. Same version and content again: (False,
        the first body); other content: 409."""
        limits = PublishLimits(
            max_assets=self._settings.max_assets,
            max_cross_check_assets=self._settings.max_cross_check_assets,
            max_condition_number=self._settings.max_condition_number,
        )
        reading, held = self._read(raw, limits)
        existing = self._load(plan.plan_id, reading.version)
        if existing is not None:
            return self._same_or_conflict(reading.version, reading.digest, existing)
        found = self._solve(raw, reading, held, plan.policy, limits)
        if found.refused is not None:
            raise found.refused
        assert found.solved is not None and found.doc is not None and found.stored is not None
        solved, digest = found.solved, reading.digest
        if reading.n_assets >= FRONTIER_PROCESS_MIN_ASSETS and digest not in self._frontiers:
            # A large frontier is solved in the child process: start it now, while this mix is
            # stored and answered (a small one waits for the answer: in a thread it would slow it).
            self._frontier_soon(digest, solved.inputs)
        try:
            with self._db.writing() as s:
                insert_mix(
                    s,
                    plan_id=plan.plan_id,
                    version=reading.version,
                    content_hash=digest,
                    inputs=reading.text.decode(),
                    solved=found.stored,
                    published_by=published_by,
                )
        except Conflict:
            # Another replica published the same version meanwhile: answer as a repeat would.
            raced = self._load(plan.plan_id, reading.version)
            assert raced is not None
            return self._same_or_conflict(reading.version, digest, raced)
        self._remember(plan.plan_id, reading.version, digest, solved, found.doc, reading.text)
        keep_for_life()
        self._metrics.mixes.labels(plan.plan_id).inc()
        return True, found.doc

    # A large body is read and solved in the frontier process: this process only looks the
    # version up between the two steps, stores the mix and answers (publishing.py).

    def _read(self, raw: bytes, limits: PublishLimits) -> tuple[Reading, dict[str, Any] | ProcessPoolExecutor]:
        """The request read, and its canonical inputs if read here, or the process that holds them."""
        child = self._child() if len(raw) >= PUBLICATION_PROCESS_MIN_BYTES else None
        if child is not None:
            try:
                return child.submit(read_here, raw, limits).result(), child
            except (BrokenProcessPool, OSError):
                self._child_failed("publishing in this process")
        return read_publication(raw, limits)

    def _solve(
        self, raw: bytes, reading: Reading, held: dict[str, Any] | ProcessPoolExecutor, policy: Policy,
        limits: PublishLimits,
    ) -> Publication:
        """A new version solved where it was read (here again, if the frontier process lost it)."""
        if isinstance(held, ProcessPoolExecutor):
            try:
                return held.submit(solve_here, reading, policy, limits).result()
            except NotReadHere:
                log.warning("the frontier process no longer holds the reading; solving in this process")
            except (BrokenProcessPool, OSError):
                self._child_failed("solving in this process")
            held = read_publication(raw, limits)[1]
        return solve_publication(reading, held, policy, limits, self._solved_by_hash)

    def _child_failed(self, instead: str) -> None:
        log.warning("the frontier process failed; %s", instead, exc_info=True)
        self._process = None  # forked again on next use

    def solve_frontier_later(self, plan_id: str, version: str) -> None:
        """Start solving a published mix's frontier unless it is known or under way; returns at
        once (the publish route calls it after its answer has gone out)."""
        view = self.view(plan_id, version)
        if view.solved.frontier is None and view.content_hash not in self._frontiers:
            self._frontier_soon(view.content_hash, view.solved.inputs)

    @staticmethod
    def _same_or_conflict(
        version: str, digest: str, existing: tuple[MixView, dict[str, Any]]
    ) -> tuple[bool, dict[str, Any]]:
        view, doc = existing
        if view.content_hash != digest:
            raise ConflictError(
                f"mix version {version!r} is already published with content hash "
                f"{view.content_hash}; this request hashes to {digest}. A published mix never "
                "changes: publish a new version"
            )
        return False, doc


class AppState:
    def __init__(self, settings: Settings, database: Database, metrics: Metrics) -> None:
        self.settings = settings
        self.metrics = metrics
        self.db = database
        self.keys = KeyRing(
            cache_seconds=settings.key_cache_seconds,
            requests=TokenBuckets(settings.rate_limit_per_second, settings.rate_limit_burst),
            failures=TokenBuckets(settings.auth_failure_limit_per_second, settings.auth_failure_burst),
            bootstrap_secret=settings.bootstrap_operator_key,
        )
        self.access_log = AccessLog(settings.access_log)
        if settings.signing_key_file:
            self.signer = HeadSigner.from_file(settings.signing_key_file)
        elif settings.environment == "production":
            # Checked here, not in Settings: `mixline migrate` and `audit verify` sign nothing.
            raise ValueError(
                "MIXLINE_SIGNING_KEY_FILE is unset: production signs audit heads with a key that "
                "outlives the process and is the same on every replica; refusing to serve"
            )
        else:
            # Heads signed by a key that dies with the process (and differs per replica) cannot
            # be checked later: development only.
            self.signer = HeadSigner.generated()
            log.warning(
                "MIXLINE_SIGNING_KEY_FILE unset: audit heads are signed with an ephemeral key "
                "(id %s) that lasts only as long as this process (development only)", self.signer.key_id,
            )
        self.mixes = MixCatalog(database, settings, metrics)
        self.singles = SinglesTogether()
        self.batches = BatchProcess()
        self._plans: dict[str, PlanView] = {}
        self._refreshing: dict[tuple[str, str], asyncio.Task[MixView]] = {}
        # Set once the process begins to stop (SIGTERM, or the lifespan's shutdown): /readyz then
        # answers 503, so a balancer still holding a connection to it sends no new work.
        self.shutting_down = False

    async def caller(self, authorization: str | None) -> Caller:
        """The caller a bearer names. A key read for the first time, or re-read once its cache time
        is over (auth.py), is read in a worker thread: a database that hangs must not stall the
        event loop (and /livez with it)."""
        due = self.keys.due(authorization)
        if due is not None:
            self.keys.store(due, await run_in_threadpool(self.load_key, due))
        return self.keys.caller(authorization, self.load_key)

    def load_key(self, key_id: str) -> KeyRecord | None:
        with self.db.reading() as s:
            return get_key(s, key_id)

    def plan(self, plan_id: str) -> PlanView:
        view = self._plans.get(plan_id)
        if view is None:
            with self.db.reading() as s:
                record = get_plan(s, plan_id)
            if record is None:
                raise NotFound(f"plan {plan_id!r} not found")
            view = self._plans[plan_id] = PlanView.from_record(record)
        return view

    # What allocations need first is read in a worker thread whenever it comes from the database
    # (the plan once, the active version once its time to live is over, a mix once): a database
    # that hangs must not stall the event loop (and /livez with it), nor a large mix's stored
    # document be parsed on it. From memory, the answer comes on the loop.

    async def plan_soon(self, plan_id: str) -> PlanView:
        view = self._plans.get(plan_id)
        return view if view is not None else await run_in_threadpool(self.plan, plan_id)

    async def view_in_force_soon(self, plan_id: str, version: str) -> MixView:
        """``MixCatalog.view_in_force`` from memory, the active version re-read in the background
        once half its time to live is over; a request waits for a read only when what is known is
        older than that time (or unknown), and then for the one read under way, whoever started
        it (16 requests arriving together each read it otherwise)."""
        ttl = self.settings.active_version_ttl_seconds
        age = self.mixes.age(plan_id, version)
        if age is not None and age <= ttl:
            if age > ttl / 2:
                self._refresh(plan_id, version)
            return self.mixes.view_in_force(plan_id, version)
        return await asyncio.shield(self._refresh(plan_id, version))

    def _refresh(self, plan_id: str, version: str) -> asyncio.Task[MixView]:
        """The read of ``plan_id``'s active version (and ``version``'s mix) under way, or a new one."""
        key = (plan_id, version)
        task = self._refreshing.get(key)
        if task is None:
            task = asyncio.ensure_future(run_in_threadpool(self.mixes.view_in_force, plan_id, version, live=True))
            self._refreshing[key] = task

            def finished(done: asyncio.Task[MixView]) -> None:
                self._refreshing.pop(key, None)
                # A background refresh nobody awaits: its outcome is the next request's to see.
                if not done.cancelled():
                    done.exception()

            task.add_done_callback(finished)
        return task

    def active_version(self, plan_id: str) -> str | None:
        """Read live (pages and reads; allocations use MixCatalog.view_in_force)."""
        return self.mixes.active_version(plan_id)
