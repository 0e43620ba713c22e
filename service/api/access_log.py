"""The JSON access log and the incident log: one line per request, one writer thread.

Request handlers only put a tuple on a queue (no formatting, no I/O on the event loop); the
writer thread turns whatever is waiting into JSON lines and writes them with one call. A line
names the method, the route template (never the raw path: it holds allocation ids), the status,
the duration, the request id and the key id; never a member id, a query string or a secret.

Incidents (an unhandled error) carry the request id the 500 problem body shows. A failure that
repeats (same exception type at the same place) gets its traceback at most once a minute, the
others one short line with a count; a database that cannot be reached gets one short line every
30 seconds however many requests it refuses, never a traceback.
"""

from __future__ import annotations

import math
import queue
import sys
import threading
import time
import traceback
from datetime import UTC, datetime
from typing import Any, TextIO

import orjson

from service.timestamps import rfc3339

_STOP = object()
_DRAIN_AT_ONCE = 4096


def _location(exc: BaseException) -> str:
    tb = exc.__traceback__
    last = None
    while tb is not None:
        last = tb
        tb = tb.tb_next
    if last is None:
        return ""
    return f"{last.tb_frame.f_code.co_filename}:{last.tb_lineno}"


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip()
    return f"{type(exc).__name__}: {text.splitlines()[0][:300]}" if text else type(exc).__name__


class AccessLog:
    TRACEBACK_EVERY_SECONDS = 60.0
    OUTAGE_EVERY_SECONDS = 30.0

    def __init__(self, target: str = "stdout") -> None:
        """``target``: "stdout", "stderr", "off" (access lines dropped; incidents to stderr) or
        a file path, appended to."""
        self.target = target
        self.enabled = target != "off"
        self._queue: queue.SimpleQueue[Any] = queue.SimpleQueue()
        self._thread: threading.Thread | None = None
        self._lock = threading.Lock()
        self._owned: TextIO | None = None
        self._stream: TextIO = sys.stderr
        self._last_traceback: dict[tuple[str, str], float] = {}
        self._suppressed: dict[tuple[str, str], int] = {}
        self._outage_line_at = -math.inf
        self._outage_refused = 0
        self._second = -1
        self._second_text = ""

    # -- called by request handlers (cheap, never blocking) ---------------------------------

    def request(
        self, method: str, route: str | None, status: int, seconds: float, request_id: str, key_id: str | None
    ) -> None:
        if self.enabled:
            self._queue.put((time.time(), method, route, status, seconds, request_id, key_id))

    def incident(self, exc: BaseException, *, method: str, route: str, request_id: str | None) -> None:
        """An unhandled error: its traceback unless the same one was written within a minute."""
        where = _location(exc)
        key = (type(exc).__qualname__, where)
        now = time.monotonic()
        with self._lock:
            last = self._last_traceback.get(key)
            with_traceback = last is None or now - last >= self.TRACEBACK_EVERY_SECONDS
            if with_traceback:
                self._last_traceback[key] = now
                suppressed = self._suppressed.pop(key, 0)
            else:
                suppressed = self._suppressed[key] = self._suppressed.get(key, 0) + 1
        entry: dict[str, Any] = {
            "time": time.time(), "event": "error", "request_id": request_id, "method": method,
            "route": route, "error": _first_line(exc), "at": where,
        }
        if with_traceback:
            entry["repeats_without_traceback"] = suppressed
            self._queue.put((entry, exc))  # formatted by the writer thread
        else:
            entry["traceback"] = f"omitted: repeat {suppressed} within {self.TRACEBACK_EVERY_SECONDS:.0f} s"
            self._queue.put((entry, None))

    def outage(self, reason: str) -> None:
        """A request refused because the database cannot be reached: one line per 30 s."""
        now = time.monotonic()
        with self._lock:
            self._outage_refused += 1
            if now - self._outage_line_at < self.OUTAGE_EVERY_SECONDS:
                return
            refused, self._outage_refused = self._outage_refused, 0
            self._outage_line_at = now
        entry = {
            "time": time.time(), "event": "database-unavailable", "reason": reason,
            "requests_refused": refused, "next_line_in_seconds": self.OUTAGE_EVERY_SECONDS,
        }
        self._queue.put((entry, None))

    # -- life cycle -----------------------------------------------------------------------

    def start(self) -> None:
        with self._lock:
            if self._thread is not None:
                return
            if self.target == "stdout":
                self._stream = sys.stdout
            elif self.target in ("stderr", "off"):
                self._stream = sys.stderr
            else:
                self._owned = self._stream = open(self.target, "a", encoding="utf-8")
            self._thread = threading.Thread(target=self._run, name="mixline-access-log", daemon=True)
            self._thread.start()

    def flush(self, timeout: float = 5.0) -> bool:
        """Wait until everything put so far is written (tests and shutdown)."""
        if self._thread is None:
            return True
        done = threading.Event()
        self._queue.put(done)
        return done.wait(timeout)

    def close(self) -> None:
        with self._lock:
            thread, self._thread = self._thread, None
        if thread is not None:
            self._queue.put(_STOP)
            thread.join(5.0)
        if self._owned is not None:
            self._owned.close()
            self._owned = None

    # -- the writer thread ----------------------------------------------------------------

    def _run(self) -> None:
        while True:
            items = [self._queue.get()]
            while len(items) < _DRAIN_AT_ONCE:
                try:
                    items.append(self._queue.get_nowait())
                except queue.Empty:
                    break
            lines: list[bytes] = []
            stop = False
            events: list[threading.Event] = []
            for item in items:
                if item is _STOP:
                    stop = True
                elif isinstance(item, threading.Event):
                    events.append(item)
                else:
                    lines.append(self._line(item))
            if lines:
                try:
                    self._stream.write(b"".join(lines).decode())
                    self._stream.flush()
                except (OSError, ValueError):
                    pass  # a closed or full stream must not stop the service answering
            for event in events:
                event.set()
            if stop:
                return

    def _time(self, at: float) -> str:
        """rfc3339 of a unix time; the text up to the second is made once per second (this runs
        once per request, on the thread that shares the GIL with the event loop)."""
        second = int(at)
        micros = round((at - second) * 1e6)  # to the nearest microsecond, as datetime rounds
        if micros >= 1_000_000:
            second, micros = second + 1, micros - 1_000_000
        if second != self._second:
            self._second = second
            self._second_text = rfc3339(datetime.fromtimestamp(second, UTC))[:-8]  # without ".ffffffZ"
        return f"{self._second_text}.{micros:06d}Z"

    def _line(self, item: tuple[Any, ...]) -> bytes:
        if len(item) == 2:
            entry, exc = item
            entry = {**entry, "time": self._time(entry["time"])}
            if exc is not None:
                entry["traceback"] = "".join(traceback.format_exception(exc))
            return orjson.dumps(entry) + b"\n"
        at, method, route, status, seconds, request_id, key_id = item
        return orjson.dumps({
            "time": self._time(at),
            "event": "request",
            "request_id": request_id,
            "method": method,
            "route": route,
            "status": status,
            "duration_ms": round(seconds * 1000.0, 3),
            "key_id": key_id,
        }) + b"\n"


__all__ = ["AccessLog"]
