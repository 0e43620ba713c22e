"""Allocation ids: unique across replicas, ordered within one process, no system call per allocation."""

from __future__ import annotations

import secrets
import threading


class AllocationIds:
    """al_ + 80 random bits per process + a 48-bit counter: unique across replicas, ordered within
    one (so the log's unique index grows at its end). A request takes a block of consecutive
    counter values, one per member."""

    def __init__(self) -> None:
        self._stem = secrets.token_hex(10)
        self._counter = int.from_bytes(secrets.token_bytes(2), "big") << 32
        self._lock = threading.Lock()

    def block(self, n: int) -> list[str]:
        with self._lock:
            first = self._counter
            self._counter += n
        stem = self._stem
        return [f"al_{stem}{i:012x}" for i in range(first, first + n)]
