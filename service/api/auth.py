"""API keys: issuing secrets, recognising a bearer, and the role/plan rules of the contract.

A secret reads `mxl_<key_id>_<random>`: the key id finds the stored hash, the random part is
256 bits, and the comparison of hashes is constant-time. The bootstrap operator key is whatever
string the operator set, so a bearer that does not parse is checked against it alone; it is
known from the settings, so it works while the database is down.

A process trusts what it read about a key for `MIXLINE_KEY_CACHE_SECONDS` (2 s by default, at
most 5): a key revoked on one replica is refused by every replica within that time. Expiry is
checked on every request. Every recognised key spends a token of its rate limit; every failed
authentication spends one of its client address's (rate_limits.py), and once those are gone the
address gets 429 instead of 401, so guessing secrets runs at a few tries a second.
"""

from __future__ import annotations

import secrets
import time
from collections.abc import Callable
from dataclasses import dataclass

from service.store import KeyRecord, secret_hash, secret_matches
from service.timestamps import utc_now

from .errors import Forbidden, NotFound, TooManyRequests, Unauthorized
from .rate_limits import TokenBuckets
from .request_context import current_request

KeyLoader = Callable[[str], KeyRecord | None]

BOOTSTRAP_KEY_ID = "operator-bootstrap"
_PREFIX = "mxl_"
_KEY_ID_LENGTH = 16
_MAX_ABSENT = 10_000


def new_secret() -> tuple[str, str]:
    key_id = secrets.token_hex(_KEY_ID_LENGTH // 2)
    return key_id, f"{_PREFIX}{key_id}_{secrets.token_urlsafe(32)}"


def key_id_of(secret: str) -> str:
    if secret.startswith(_PREFIX) and len(secret) > len(_PREFIX) + _KEY_ID_LENGTH + 1:
        key_id = secret[len(_PREFIX) : len(_PREFIX) + _KEY_ID_LENGTH]
        if secret[len(_PREFIX) + _KEY_ID_LENGTH] == "_":
            return key_id
    return BOOTSTRAP_KEY_ID


@dataclass(frozen=True)
class Caller:
    key_id: str
    role: str
    plan_id: str | None

    def require(self, plan_id: str, *roles: str) -> None:
        """404 for another plan (it must not learn the plan exists), then 403 for the wrong role."""
        if self.role == "operator":
            return
        if self.plan_id != plan_id:
            raise NotFound(f"plan {plan_id!r} not found")
        if not roles:
            raise Forbidden(f"a {self.role} key may not do this; it needs the operator role")
        if self.role not in roles:
            raise Forbidden(f"a {self.role} key may not do this; it needs one of: {', '.join(roles)}")

    def require_operator(self) -> None:
        if self.role != "operator":
            raise Forbidden(f"a {self.role} key may not do this; it needs the operator role")


class KeyRing:
    """Recognises bearers; what it read about a key is trusted for ``cache_seconds``."""

    def __init__(
        self,
        *,
        cache_seconds: float = 2.0,
        requests: TokenBuckets | None = None,
        failures: TokenBuckets | None = None,
        bootstrap_secret: str | None = None,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self._known: dict[str, tuple[KeyRecord, float]] = {}
        # Key ids just read and not found, so that the same request does not read them twice;
        # at most _MAX_ABSENT of them (guessed ids are refused by the failure limit soon after).
        self._absent: dict[str, float] = {}
        self._cache_seconds = cache_seconds
        self._requests = requests
        self._failures = failures
        self._clock = clock
        self._bootstrap = (
            None
            if not bootstrap_secret
            else KeyRecord(BOOTSTRAP_KEY_ID, None, "operator", secret_hash(bootstrap_secret), utc_now())
        )

    def remember(self, record: KeyRecord) -> None:
        self._known[record.key_id] = (record, self._clock())

    def due(self, authorization: str | None) -> str | None:
        """The key id of this bearer if what is known of it must be (re)read first, else None."""
        if not authorization:
            return None
        scheme, _, secret = authorization.partition(" ")
        secret = secret.strip()
        if scheme.lower() != "bearer" or not secret:
            return None
        key_id = key_id_of(secret)
        if key_id == BOOTSTRAP_KEY_ID:
            return None
        known = self._known.get(key_id)
        if known is not None and self._clock() - known[1] < self._cache_seconds:
            return None
        return key_id

    def store(self, key_id: str, record: KeyRecord | None) -> None:
        """What was just read for ``key_id`` (None: no such key)."""
        if record is None:
            now = self._clock()
            self._known.pop(key_id, None)
            if len(self._absent) >= _MAX_ABSENT:
                self._absent = {k: t for k, t in self._absent.items() if now - t < self._cache_seconds}
                if len(self._absent) >= _MAX_ABSENT:
                    self._absent.clear()
            self._absent[key_id] = now
        else:
            self._absent.pop(key_id, None)
            self._known[key_id] = (record, self._clock())

    def lookup(self, key_id: str, load: KeyLoader) -> KeyRecord | None:
        if key_id == BOOTSTRAP_KEY_ID:
            return self._bootstrap
        now = self._clock()
        known = self._known.get(key_id)
        if known is not None and now - known[1] < self._cache_seconds:
            return known[0]
        absent = self._absent.get(key_id)
        if absent is not None and now - absent < self._cache_seconds:
            return None  # read a moment ago (in a worker thread, see AppState.caller): no such key
        record = load(key_id)
        self.store(key_id, record)
        return record

    def _refuse(self, detail: str) -> Unauthorized:
        if self._failures is not None:
            info = current_request.get()
            wait = self._failures.take(info.client if info is not None else "")
            if wait > 0.0:
                raise TooManyRequests(
                    "too many failed authentications from this address; retry later", retry_after=wait
                )
        return Unauthorized(detail, headers={"WWW-Authenticate": "Bearer"})

    def caller(self, authorization: str | None, load: KeyLoader) -> Caller:
        if not authorization:
            raise self._refuse("missing Authorization: Bearer <key>")
        scheme, _, secret = authorization.partition(" ")
        secret = secret.strip()
        if scheme.lower() != "bearer" or not secret:
            raise self._refuse("Authorization must be 'Bearer <key>'")
        record = self.lookup(key_id_of(secret), load)
        if record is None or not secret_matches(secret, record.secret_hash):
            raise self._refuse("unknown or wrong key")
        unusable = record.unusable_at(utc_now())
        if unusable is not None:
            raise self._refuse(f"key {record.key_id} is {unusable}; ask the operator for a new one")
        info = current_request.get()
        if info is not None:
            info.key_id = record.key_id
        if self._requests is not None:
            wait = self._requests.take(record.key_id)
            if wait > 0.0:
                raise TooManyRequests(
                    f"key {record.key_id} is over its rate limit of {self._requests.rate:g} requests "
                    "per second", retry_after=wait,
                )
        return Caller(record.key_id, record.role, record.plan_id)


__all__ = ["BOOTSTRAP_KEY_ID", "Caller", "KeyLoader", "KeyRing", "key_id_of", "new_secret"]
