"""Token buckets: N requests per second per key with bursts up to B, kept in this process.

Each replica keeps its own buckets, so a key's ceiling across the service is the per-process
rate times the number of replicas; a shared store (the database) would cost a round trip per
request, which is the very load a limit guards against.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable


class TokenBuckets:
    """One bucket per key; ``take`` spends a token or says how long until one is there."""

    def __init__(
        self,
        rate: float,
        burst: int,
        *,
        max_keys: int = 100_000,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        if rate <= 0 or burst < 1:
            raise ValueError(f"rate must be > 0 and burst >= 1, got {rate} and {burst}")
        self.rate = rate
        self.burst = float(burst)
        self._max_keys = max_keys
        self._clock = clock
        self._buckets: dict[str, list[float]] = {}  # key -> [tokens, time of that count]
        self._lock = threading.Lock()

    def take(self, key: str) -> float:
        """0.0 when a token was spent; otherwise the seconds until the next token."""
        now = self._clock()
        with self._lock:
            bucket = self._buckets.get(key)
            if bucket is None:
                if len(self._buckets) >= self._max_keys:
                    self._forget_full(now)
                self._buckets[key] = [self.burst - 1.0, now]
                return 0.0
            tokens = min(self.burst, bucket[0] + (now - bucket[1]) * self.rate)
            bucket[1] = now
            if tokens >= 1.0:
                bucket[0] = tokens - 1.0
                return 0.0
            bucket[0] = tokens
            return (1.0 - tokens) / self.rate

    def _forget_full(self, now: float) -> None:
        # A full bucket holds nothing a new one would not: dropping it changes no answer. Many
        # addresses failing at once (an attack from a wide range) may leave none full; then the
        # oldest half goes, which errs towards letting a request through.
        refill = self.burst / self.rate
        self._buckets = {k: b for k, b in self._buckets.items() if now - b[1] < refill}
        if len(self._buckets) >= self._max_keys:
            by_age = sorted(self._buckets.items(), key=lambda item: item[1][1])
            self._buckets = dict(by_age[len(by_age) // 2 :])


__all__ = ["TokenBuckets"]
