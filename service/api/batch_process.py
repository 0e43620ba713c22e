"""The serving side of the batch process (service.allocation.batch_worker): start it, talk to it.

A record-keeper's batch is decided in a process of its own, so that portals do not pay for it.

Reading 300,000 members, their rules, record texts and answers are a few seconds of Python; in
the serving process they would hold the interpreter lock, and every portal request arriving
meanwhile would wait for it. Here that work runs in a child process (the same pipeline,
`allocate`), which hands the records back in chunks; the serving process only writes them to
the log (the writer commits each chunk on its own and serves other requests between chunks,
see store.LogStream) and sends the answer.

A batch is a conversation of three steps over one pipe, so that nothing is logged before every
member is checked and the Idempotency-Key is claimed:

    parent                                   child
    ("read", limit) + body bytes        ->   parse, read the batch's shape
                                        <-   ("version", v) | ("refused", ...)
    ("decide", setting)                 ->   every member read, checked, decided
                                        <-   ("decided", n) | ("refused", ...)
    ("write",)                          ->   records in chunks
                                        <-   ("head", bytes), ("rows", ids, members, records, results) ... ("done",)
    ("cancel",) at any point ends the conversation; the child waits for the next batch.
"""

from __future__ import annotations

import logging
import multiprocessing
import threading
from collections.abc import Callable
from multiprocessing.connection import Connection
from typing import Any

from service.allocation import Setting
from service.allocation.batch_worker import serve_batches
from service.allocation.engine import BATCH_TAIL
from service.store import Finished, IdempotencyCompletion

log = logging.getLogger("mixline.batch")

class BatchConversation:
    """One batch in the child process; steps are blocking calls (run them off the event loop)."""

    def __init__(self, process: BatchProcess, conn: Connection) -> None:
        self._process = process
        self._conn = conn
        self._open = True
        self.body: bytes | memoryview = b""

    def _answer(self) -> tuple[Any, ...]:
        try:
            message: tuple[Any, ...] = self._conn.recv()
        except (EOFError, OSError) as error:
            self._open = False
            self._process.lost()
            raise RuntimeError("the batch process ended unexpectedly") from error
        if message[0] == "refused":
            self._open = False
            raise message[1].error()
        return message

    def read(self, raw: bytes, limit: int) -> str:
        """Send the body; the batch's mix version once its shape was read."""
        self._conn.send(("read", limit))
        self._conn.send_bytes(raw)
        return str(self._answer()[1])

    def decide(self, on: Setting) -> int:
        """Every member decided in the child; how many (MemberErrors if any member is bad)."""
        self._conn.send(("decide", on))
        return int(self._answer()[1])

    def puller(self, completion: Callable[[memoryview], IdempotencyCompletion | None]) -> Callable[[float], Any]:
        """For a LogStream the log writer pulls from: asks the child to write, then hands over each
        chunk of records as it arrives and, last, Finished with `completion(answer)`. The answer
        body is then `self.body`. The writer thread reads the pipe itself: no thread between."""
        self._conn.send(("write",))
        # The answer grows in one buffer as chunks arrive (a large bytearray grows in place), so
        # that a 300,000-member answer is held once, not as chunks plus their join.
        answer = bytearray()
        results = 0

        def pull(timeout: float) -> Any:
            nonlocal results
            while True:
                if not self._conn.poll(timeout):
                    return None
                message = self._answer()
                if message[0] == "head":
                    answer[:0] = message[1]
                    continue
                if message[0] == "rows":
                    if results:
                        answer.extend(b",")
                    answer.extend(message[4])
                    results += 1
                    return message[1], message[2], message[3]
                answer.extend(BATCH_TAIL)
                self.body = memoryview(answer)
                self._open = False
                return Finished(completion(self.body))

        return pull

    def close(self) -> None:
        """End the conversation (cancelling it in the child if it is still open)."""
        if self._open:
            self._open = False
            try:
                self._conn.send(("cancel",))
            except OSError:
                self._process.lost()
        self._process.release()


class BatchProcess:
    """The child process, started on first use and restarted if it dies; one batch at a time."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._process: Any = None
        self._conn: Connection | None = None

    def _ensure(self) -> Connection:
        if self._process is None or not self._process.is_alive() or self._conn is None:
            context = multiprocessing.get_context("spawn")
            parent, child = context.Pipe(duplex=True)
            process = context.Process(target=serve_batches, args=(child,), name="mixline-batch", daemon=True)
            process.start()
            child.close()
            self._process, self._conn = process, parent
        return self._conn

    def conversation(self) -> BatchConversation:
        """Blocks until the child is free; the caller must close() the conversation."""
        self._lock.acquire()
        try:
            return BatchConversation(self, self._ensure())
        except BaseException:
            self._lock.release()
            raise

    def release(self) -> None:
        self._lock.release()

    def lost(self) -> None:
        log.error("the batch process ended; it is started again for the next batch")
        self._process, self._conn = None, None

    def close(self) -> None:
        process, conn = self._process, self._conn
        self._process, self._conn = None, None
        if conn is not None:
            conn.close()
        if process is not None:
            process.join(timeout=5)
            if process.is_alive():
                process.terminate()


